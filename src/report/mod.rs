//! Reports of how each trend came to be: one self-contained HTML file
//! (inline SVG, no external assets) or CSV exports of fits, findings and
//! verdicts. Read-only: a report never writes to the store.
//!
//! Layout:
//! - `data`: gathers the series matching the pattern and everything of
//!   each (read-only queries in `store/report.rs`), and derives labels.
//! - `html` and `svg`: the page and its inline charts.
//! - `csv_export`: the three CSV files.
//! - `band`, `format`, `escape`: pure helpers (the confidence band for the
//!   mean, numbers for people, HTML and spreadsheet escaping), unit-tested.
//!
//! Data from files (series keys, record ids, notes, units, file names,
//! verdict notes, finding summaries) is escaped wherever it lands in the
//! page, SVG text included, and the page's Content-Security-Policy forbids
//! scripts besides. CSV text cells are neutralised against formula
//! injection; numbers are written as numbers.

mod band;
mod csv_export;
mod data;
mod escape;
mod format;
mod html;
mod svg;

use std::io::Write as _;
use std::path::{Path, PathBuf};

use crate::store::Store;

pub use band::{BandPoint, LineStats, mean_band};
pub use csv_export::paths as csv_paths;
pub use escape::{html as escape_html, spreadsheet_text};

// For the HTTP overview page (`crate::http`), which shows the same
// figures and charts as the report.
pub use data::glance_slope_unit;
pub(crate) use format::{html_number, level as level_text, opt_p, sig};
pub(crate) use html::STYLE;

/// The output format of `slopewarden report`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ReportFormat {
    /// One self-contained HTML file.
    Html,
    /// CSV exports (fits, findings, verdicts), safe against formula injection.
    Csv,
}

/// What a written report holds, for the command's summary line.
#[derive(Debug, Clone, PartialEq, Eq, Default)]
pub struct ReportSummary {
    /// Series included.
    pub series: usize,
    /// Findings listed.
    pub findings: usize,
    /// Files written.
    pub files: Vec<std::path::PathBuf>,
    /// Advice when the HTML file is too large to open comfortably.
    pub size_note: Option<String>,
}

/// An HTML report larger than this opens slowly in a browser, or not at
/// all (a 1,000-series store of 1,000 points each gave 416 MiB).
const LARGE_REPORT_BYTES: usize = 100 << 20;

/// What to say about an HTML report of `bytes` covering `series` series:
/// nothing unless it is large, then how to write one for part of the site.
pub fn size_note(bytes: usize, series: usize) -> Option<String> {
    (bytes > LARGE_REPORT_BYTES && series > 1).then(|| {
        format!(
            "The report is {} MB for {series} series; a browser opens a file that size slowly or not at all. Write one for part of the site with --series GLOB (for example --series 'MW-*/*'), or the figures as CSV with --format csv.",
            bytes >> 20
        )
    })
}

/// Why a report could not be written.
#[derive(Debug, thiserror::Error)]
pub enum ReportError {
    /// Reading the store failed.
    #[error(transparent)]
    Store(#[from] crate::store::StoreError),
    /// Writing the output failed.
    #[error("cannot write {path}: {source}")]
    Write {
        /// The file.
        path: std::path::PathBuf,
        /// Why.
        source: std::io::Error,
    },
    /// The series pattern is not a valid glob.
    #[error("`{pattern}` is not a valid series pattern: {reason}")]
    Pattern {
        /// As given.
        pattern: String,
        /// Why.
        reason: String,
    },
}

/// Writes the report of the series matching `pattern` (a glob on the
/// series key; all series without one) to `out`. `generated_at` is the
/// RFC 3339 time printed on the report (the caller's clock).
///
/// HTML: one file at `out`. CSV: three files derived from `out` (see
/// [`csv_paths`]): `trend.csv` gives `trend-fits.csv`, `trend-findings.csv`
/// and `trend-verdicts.csv`. Each file is written beside its final name
/// and renamed into place, so a reader never sees half a report.
pub fn write_report(
    store: &Store,
    pattern: Option<&str>,
    format: ReportFormat,
    out: &Path,
    generated_at: &str,
) -> Result<ReportSummary, ReportError> {
    if format == ReportFormat::Html {
        return write_html(store, pattern, out, generated_at, RECORDS_PER_RUN);
    }
    let data = data::gather(store, pattern, data::Records::Skip)?;
    let mut summary = ReportSummary {
        series: data.series.len(),
        findings: data.finding_count(),
        files: Vec::new(),
        size_note: None,
    };
    match format {
        ReportFormat::Html => unreachable!("BUG: written by write_html above"),
        ReportFormat::Csv => {
            let tables = [
                csv_export::fits(&data),
                csv_export::findings(&data),
                csv_export::verdicts(&data),
            ];
            for (path, table) in csv_export::paths(out).into_iter().zip(tables) {
                write_atomically_with(&path, |f| {
                    let buffered = csv_export::write_table(table, std::io::BufWriter::new(f))
                        .map_err(|e| std::io::Error::other(e.to_string()))?;
                    buffered.into_inner().map_err(|e| e.into_error())?;
                    Ok(())
                })?;
                summary.files.push(path);
            }
        }
    }
    Ok(summary)
}

/// Record versions read at once for an HTML report: its series are read
/// and written in runs of about this many, so that a large store's report
/// holds one run, not every record (a million took 1.4 GB).
const RECORDS_PER_RUN: i64 = 100_000;

/// The HTML report, series after series: each run of series is read, its
/// sections written to a scratch file beside `out`, and dropped; then the
/// summary page (which lists every series first) and the sections go into
/// `out`.
fn write_html(
    store: &Store,
    pattern: Option<&str>,
    out: &Path,
    generated_at: &str,
    run_records: i64,
) -> Result<ReportSummary, ReportError> {
    let rows = data::matching_series(store, pattern)?;
    let loose = match pattern {
        None => store.report_loose_findings()?,
        Some(_) => Vec::new(),
    };
    let mut summary = ReportSummary {
        series: rows.len(),
        findings: loose.len(),
        files: Vec::new(),
        size_note: None,
    };
    let scratch = beside(out, "sections");
    let wrote = |e| ReportError::Write {
        path: scratch.clone(),
        source: e,
    };
    let written = (|| -> Result<u64, ReportError> {
        let mut sections = std::io::BufWriter::new(std::fs::File::create(&scratch).map_err(wrote)?);
        let mut glances = Vec::with_capacity(rows.len());
        let mut run = Vec::new();
        let mut in_run = 0i64;
        let mut rows = rows.into_iter().peekable();
        while let Some(row) = rows.next() {
            in_run += row.records;
            run.push(row);
            if in_run < run_records && rows.peek().is_some() {
                continue;
            }
            let data =
                data::gather_rows(store, std::mem::take(&mut run), true, data::Records::Read)?;
            in_run = 0;
            let mut text = String::new();
            for s in &data.series {
                glances.push(html::Glance::of(s));
                summary.findings += s.findings.len();
                text.clear();
                html::series_section(&mut text, s);
                sections.write_all(text.as_bytes()).map_err(wrote)?;
            }
        }
        sections.flush().map_err(wrote)?;
        drop(sections);
        let head = html::head(&glances, &loose, pattern, generated_at);
        let mut size = 0u64;
        write_atomically_with(out, |f| {
            let mut w = std::io::BufWriter::new(f);
            w.write_all(head.as_bytes())?;
            let copied = std::io::copy(&mut std::fs::File::open(&scratch)?, &mut w)?;
            w.write_all(html::TAIL.as_bytes())?;
            size = head.len() as u64 + copied + html::TAIL.len() as u64;
            w.into_inner().map_err(|e| e.into_error())?;
            Ok(())
        })?;
        Ok(size)
    })();
    let _ = std::fs::remove_file(&scratch);
    let size = written?;
    summary.size_note = size_note(usize::try_from(size).unwrap_or(usize::MAX), summary.series);
    summary.files.push(out.to_path_buf());
    Ok(summary)
}

/// A scratch file's path beside `path`: hidden, named for this process.
fn beside(path: &Path, what: &str) -> PathBuf {
    let mut name = std::ffi::OsString::from(".");
    name.push(path.file_name().unwrap_or_default());
    name.push(format!(".{what}.{}.tmp", std::process::id()));
    path.with_file_name(name)
}

/// The scatter of each series in `rows` (in that order), drawn exactly as
/// in the report's section of the series: records on the fitted scale,
/// the current line and its confidence band, flagged records labelled.
/// Reads every record version of these series (one pass over the
/// records), their fit versions, findings and verdicts.
pub(crate) fn scatter_figures(
    store: &Store,
    rows: Vec<crate::store::ReportSeriesRow>,
) -> Result<Vec<String>, ReportError> {
    if rows.is_empty() {
        return Ok(Vec::new());
    }
    let data = data::gather_rows(store, rows, true, data::Records::Read)?;
    Ok(data.series.iter().map(html::series_scatter).collect())
}

/// Has `write` fill a temporary file beside `path`, syncs it and renames
/// it over `path`.
fn write_atomically_with(
    path: &Path,
    write: impl FnOnce(&mut std::fs::File) -> std::io::Result<()>,
) -> Result<(), ReportError> {
    let err = |source| ReportError::Write {
        path: path.to_path_buf(),
        source,
    };
    let name = path
        .file_name()
        .ok_or_else(|| err(std::io::Error::other("the output path names no file")))?;
    let mut tmp_name = std::ffi::OsString::from(".");
    tmp_name.push(name);
    tmp_name.push(format!(".{}.tmp", std::process::id()));
    let tmp: PathBuf = path.with_file_name(tmp_name);
    let result = std::fs::File::create(&tmp)
        .and_then(|mut f| {
            write(&mut f)?;
            f.sync_all()
        })
        .and_then(|()| std::fs::rename(&tmp, path));
    if let Err(e) = result {
        let _ = std::fs::remove_file(&tmp);
        return Err(err(e));
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    /// A report written a series at a time is the one written in one
    /// run, byte for byte, and leaves no scratch file behind.
    #[test]
    fn a_report_written_in_runs_is_the_report_written_at_once() {
        use std::time::SystemTime;
        let dir = tempfile::tempdir().unwrap();
        let config = crate::config::Config::defaults_in(dir.path());
        std::fs::create_dir_all(&config.inbox).unwrap();
        let mut store = Store::open(&config.database).unwrap();
        let mut cache = crate::pipeline::SeriesCache::new();
        let mut text = String::from("record_id,series,x,y,unit\n");
        for i in 0..40 {
            let series = ["MW-1/nitrate", "MW-2/nitrate", "MW-3/boron"][i % 3];
            let y = 4.0 + (i % 7) as f64 * 0.1 + if i == 31 { 40.0 } else { 0.0 };
            text.push_str(&format!("R{i},{series},{}.5,{y},mg/L\n", 2000 + i));
        }
        let path = config.inbox.join("a.csv");
        std::fs::write(&path, &text).unwrap();
        let file = crate::inbox::ReadyFile {
            size: text.len() as u64,
            path,
            relative: "a.csv".into(),
            modified: SystemTime::UNIX_EPOCH,
        };
        crate::pipeline::process_file(&config, &mut store, &mut cache, &file, SystemTime::now())
            .unwrap();
        let at = "2026-12-05T07:00:00Z";
        let once = dir.path().join("once.html");
        let runs = dir.path().join("runs.html");
        let a = write_html(&store, None, &once, at, i64::MAX).unwrap();
        let b = write_html(&store, None, &runs, at, 1).unwrap();
        assert_eq!((a.series, a.findings), (b.series, b.findings));
        assert_eq!(a.series, 3);
        assert!(a.findings > 0, "the planted value raises a finding");
        let page = std::fs::read_to_string(&once).unwrap();
        assert_eq!(page, std::fs::read_to_string(&runs).unwrap());
        assert!(page.starts_with("<!DOCTYPE html>") && page.ends_with(html::TAIL));
        assert_eq!(page.matches("<section class=\"series\"").count(), 3);
        for key in ["MW-1/nitrate", "MW-2/nitrate", "MW-3/boron"] {
            let heading = format!("<span class=\"key\">{key}</span></h2>");
            assert!(page.contains(&heading), "{key}");
        }
        let left: Vec<_> = std::fs::read_dir(dir.path())
            .unwrap()
            .filter_map(|e| e.ok())
            .map(|e| e.file_name().to_string_lossy().into_owned())
            .filter(|n| n.ends_with(".tmp"))
            .collect();
        assert!(left.is_empty(), "{left:?}");
    }

    /// The size at which a browser struggles is common practice, not a
    /// standard: the note only points at the narrower ways to write one.
    #[test]
    fn a_large_report_says_how_to_write_a_smaller_one() {
        assert_eq!(size_note(LARGE_REPORT_BYTES, 1_000), None);
        assert_eq!(size_note(436 << 20, 1), None, "one series cannot be split");
        let note = size_note(436 << 20, 1_000).unwrap();
        assert!(
            note.starts_with("The report is 436 MB for 1000 series"),
            "{note}"
        );
        assert!(
            note.contains("--series GLOB") && note.contains("--format csv"),
            "{note}"
        );
    }
}
