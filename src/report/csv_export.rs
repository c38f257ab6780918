//! CSV exports: fits, findings and verdicts, one file each. Text cells are
//! neutralised against spreadsheet formula injection
//! ([`spreadsheet_text`]); numbers come from `f64`/`i64` and are written
//! as numbers (shortest round-trip form, e.g. `-3e-5`), so they stay
//! numeric in any program.

use std::path::{Path, PathBuf};

use super::data::{ReportData, detail_fit};
use super::escape::spreadsheet_text;

/// One cell.
#[derive(Debug, Clone, PartialEq)]
pub enum Cell {
    /// Text from the data: neutralised.
    Text(String),
    /// A number written by the report.
    Num(Option<f64>),
    /// An integer written by the report.
    Int(Option<i64>),
}

impl Cell {
    fn text(s: impl Into<String>) -> Cell {
        Cell::Text(s.into())
    }

    fn opt_text(s: Option<&str>) -> Cell {
        Cell::Text(s.unwrap_or_default().to_string())
    }

    /// The cell as written.
    pub fn render(&self) -> String {
        match self {
            Cell::Text(s) => spreadsheet_text(s),
            Cell::Num(Some(v)) if v.is_finite() => {
                // Debug is the shortest text that reads back to the same
                // f64, with an exponent for tiny and huge values.
                let t = format!("{v:?}");
                if t == "-0.0" { "0.0".into() } else { t }
            }
            Cell::Num(_) => String::new(),
            Cell::Int(Some(v)) => v.to_string(),
            Cell::Int(None) => String::new(),
        }
    }
}

/// The three files written for `--out`: `trend.csv` gives `trend-fits.csv`,
/// `trend-findings.csv` and `trend-verdicts.csv` beside it (the extension
/// of `--out` is dropped, whatever it is); an existing folder gets
/// `fits.csv`, `findings.csv` and `verdicts.csv` inside it.
pub fn paths(out: &Path) -> [PathBuf; 3] {
    if out.is_dir() {
        return ["fits", "findings", "verdicts"].map(|k| out.join(format!("{k}.csv")));
    }
    let stem = out
        .file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_else(|| "report".into());
    let dir = out.parent().unwrap_or(Path::new(""));
    ["fits", "findings", "verdicts"].map(|k| dir.join(format!("{stem}-{k}.csv")))
}

/// Header and rows of a table, the rows made as they are written: the
/// tables of a large store are not held whole (277,000 fit versions took
/// some 400 MB as cells).
pub type Table<'a> = (Vec<&'static str>, Box<dyn Iterator<Item = Vec<Cell>> + 'a>);

/// Every fit version of every series.
pub fn fits(data: &ReportData) -> Table<'_> {
    let header = vec![
        "series",
        "version",
        "current",
        "created_at",
        "trigger_file",
        "trigger_verdict",
        "trigger_window",
        "window",
        "transform",
        "non_detects",
        "level",
        "n",
        "n_censored",
        "slope",
        "slope_se",
        "slope_ci_low",
        "slope_ci_high",
        "slope_p",
        "intercept",
        "mean_x",
        "mean_y",
        "r_squared",
        "residual_sd",
        "df",
        "theil_sen_slope",
        "theil_sen_ci_low",
        "theil_sen_ci_high",
        "mann_kendall_s",
        "mann_kendall_p",
        "x_min",
        "x_max",
        "unit",
        "note",
    ];
    let rows = data.series.iter().flat_map(|s| {
        s.fits.iter().map(move |f| {
            vec![
                Cell::text(&s.row.key),
                Cell::Int(Some(f.version)),
                Cell::Int(Some(i64::from(s.row.latest_fit == Some(f.id)))),
                Cell::text(&f.created_at),
                Cell::opt_text(f.trigger_file.as_deref()),
                Cell::Int(f.trigger_verdict),
                Cell::Int(f.trigger_window.as_ref().map(|w| w.0)),
                Cell::opt_text(f.window.as_deref()),
                Cell::text(&f.transform),
                Cell::text(&f.non_detects),
                Cell::Num(Some(f.level)),
                Cell::Int(Some(f.n)),
                Cell::Int(Some(f.n_censored)),
                Cell::Num(f.slope),
                Cell::Num(f.slope_se),
                Cell::Num(f.slope_ci_low),
                Cell::Num(f.slope_ci_high),
                Cell::Num(f.slope_p),
                Cell::Num(f.intercept),
                Cell::Num((f.n > 0).then_some(f.origin + f.mean_x_shifted)),
                Cell::Num((f.n > 0).then_some(f.mean_y)),
                Cell::Num(f.r_squared),
                Cell::Num(f.residual_sd),
                Cell::Int(f.df),
                Cell::Num(f.theil_sen_slope),
                Cell::Num(f.theil_sen_ci_low),
                Cell::Num(f.theil_sen_ci_high),
                Cell::Int(f.mann_kendall_s),
                Cell::Num(f.mann_kendall_p),
                Cell::Num(f.x_min),
                Cell::Num(f.x_max),
                Cell::opt_text(s.unit()),
                Cell::opt_text(f.note.as_deref()),
            ]
        })
    });
    (header, Box::new(rows))
}

/// Every finding, with the fits with and without its record.
pub fn findings(data: &ReportData) -> Table<'_> {
    let header = vec![
        "finding_id",
        "series",
        "created_at",
        "severity",
        "status",
        "kinds",
        "record_ids",
        "file",
        "fit_version",
        "summary",
        "with_n",
        "with_slope",
        "with_slope_ci_low",
        "with_slope_ci_high",
        "with_slope_p",
        "with_intercept",
        "without_n",
        "without_slope",
        "without_slope_ci_low",
        "without_slope_ci_high",
        "without_slope_p",
        "without_intercept",
        "detail_json",
    ];
    let mut all: Vec<_> = data
        .series
        .iter()
        .flat_map(|s| s.findings.iter())
        .chain(data.loose_findings.iter())
        .collect();
    all.sort_by_key(|f| f.id);
    let rows = all.into_iter().map(|f| {
        let mut row = vec![
            Cell::Int(Some(f.id)),
            Cell::opt_text(f.series_key.as_deref()),
            Cell::text(&f.created_at),
            Cell::text(f.severity.as_str()),
            Cell::text(f.status.as_str()),
            Cell::text(f.kinds.join(";")),
            Cell::text(f.record_ids.join(";")),
            Cell::opt_text(f.file.as_deref()),
            Cell::Int(f.fit_version),
            Cell::text(&f.summary),
        ];
        let detail = f.detail_value();
        for key in ["fit_with", "fit_without"] {
            let fit = detail_fit(&detail, key);
            row.push(Cell::Int(fit.and_then(|v| v.n)));
            row.push(Cell::Num(fit.and_then(|v| v.slope)));
            row.push(Cell::Num(fit.and_then(|v| v.ci_low)));
            row.push(Cell::Num(fit.and_then(|v| v.ci_high)));
            row.push(Cell::Num(fit.and_then(|v| v.p)));
            row.push(Cell::Num(fit.and_then(|v| v.intercept)));
        }
        row.push(Cell::text(detail.to_string()));
        row
    });
    (header, Box::new(rows))
}

/// Every verdict, oldest first.
pub fn verdicts(data: &ReportData) -> Table<'_> {
    let header = vec![
        "verdict_id",
        "finding_id",
        "series",
        "record_id",
        "verdict",
        "value",
        "new_record_version",
        "reverts",
        "note",
        "by",
        "at",
    ];
    let mut all: Vec<_> = data.series.iter().flat_map(|s| s.verdicts.iter()).collect();
    all.sort_by(|a, b| a.at.cmp(&b.at).then(a.id.cmp(&b.id)));
    let rows = all.into_iter().map(|v| {
        vec![
            Cell::Int(Some(v.id)),
            Cell::Int(Some(v.finding_id)),
            Cell::opt_text(v.series_key.as_deref()),
            Cell::opt_text(v.record_id.as_deref()),
            Cell::text(v.verdict.as_str()),
            Cell::Num(v.value),
            Cell::Int(v.new_record_version),
            Cell::Int(v.reverts),
            Cell::text(&v.note),
            Cell::text(&v.by_whom),
            Cell::text(&v.at),
        ]
    });
    (header, Box::new(rows))
}

/// Writes a table as CSV (RFC 4180 quoting by the `csv` crate, `\n` line
/// ends) to `out`, row by row.
pub fn write_table<W: std::io::Write>(table: Table<'_>, out: W) -> Result<W, csv::Error> {
    let mut w = csv::WriterBuilder::new()
        .terminator(csv::Terminator::Any(b'\n'))
        .from_writer(out);
    w.write_record(&table.0)?;
    for row in table.1 {
        w.write_record(row.iter().map(Cell::render))?;
    }
    w.into_inner()
        .map_err(|e| csv::Error::from(std::io::Error::other(e.to_string())))
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    #[test]
    fn numbers_stay_numbers_and_text_is_neutralised() {
        assert_eq!(Cell::Num(Some(-1.5)).render(), "-1.5");
        assert_eq!(Cell::Num(Some(-3e-5)).render(), "-3e-5");
        assert_eq!(Cell::Num(Some(0.2048)).render(), "0.2048");
        assert_eq!(Cell::Num(Some(-0.0)).render(), "0.0");
        assert_eq!(Cell::Num(None).render(), "");
        assert_eq!(Cell::Num(Some(f64::NAN)).render(), "");
        assert_eq!(Cell::Int(Some(-4)).render(), "-4");
        assert_eq!(Cell::text("-4").render(), "'-4");
        assert_eq!(Cell::text("=SUM(1+1)").render(), "'=SUM(1+1)");
        for v in [-1.5, -3e-5, 6.02e23, 1e-300] {
            assert_eq!(Cell::Num(Some(v)).render().parse::<f64>().unwrap(), v);
        }
    }

    #[test]
    fn quoting_survives_commas_quotes_and_newlines() {
        let table: Table = (
            vec!["a", "b"],
            Box::new(std::iter::once(vec![
                Cell::text("x, \"y\"\nz"),
                Cell::text("+1,2"),
            ])),
        );
        let bytes = write_table(table, Vec::new()).unwrap();
        let mut r = csv::Reader::from_reader(bytes.as_slice());
        let rec = r.records().next().unwrap().unwrap();
        assert_eq!(&rec[0], "x, \"y\"\nz");
        assert_eq!(&rec[1], "'+1,2");
    }

    #[test]
    fn file_names_derive_from_the_stem() {
        let [a, b, c] = paths(Path::new("/tmp/does-not-exist/trend.csv"));
        assert_eq!(a, Path::new("/tmp/does-not-exist/trend-fits.csv"));
        assert_eq!(b, Path::new("/tmp/does-not-exist/trend-findings.csv"));
        assert_eq!(c, Path::new("/tmp/does-not-exist/trend-verdicts.csv"));
        let [a, ..] = paths(Path::new("trend"));
        assert_eq!(a, Path::new("trend-fits.csv"));
        let dir = tempfile::tempdir().unwrap();
        let [a, ..] = paths(dir.path());
        assert_eq!(a, dir.path().join("fits.csv"));
    }
}
