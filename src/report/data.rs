//! Gathering what a report shows: the series matching the pattern, each
//! with its fit versions, records, findings and verdicts (read-only
//! queries in `store/report.rs`), plus the labels derived from them.

use std::collections::HashMap;

use globset::Glob;

use crate::stats::Transform;
use crate::store::{
    ReportFindingRow, ReportFitRow, ReportRecordRow, ReportSeriesRow, ReportVerdictRow,
    SeriesGlance, SeriesRowId, Store,
};

use super::ReportError;
use super::band::LineStats;

/// Everything of one series.
#[derive(Debug, Clone)]
pub struct SeriesData {
    /// The series row.
    pub row: ReportSeriesRow,
    /// Fit versions, oldest first.
    pub fits: Vec<ReportFitRow>,
    /// Record versions, in storage order.
    pub records: Vec<ReportRecordRow>,
    /// Findings, oldest first.
    pub findings: Vec<ReportFindingRow>,
    /// Verdicts, oldest first.
    pub verdicts: Vec<ReportVerdictRow>,
}

/// Everything a report shows.
#[derive(Debug, Clone)]
pub struct ReportData {
    /// The series, by key.
    pub series: Vec<SeriesData>,
    /// Findings not tied to a series (files, feeds); only without a pattern.
    pub loose_findings: Vec<ReportFindingRow>,
    /// The pattern, as given.
    pub pattern: Option<String>,
}

impl ReportData {
    /// Findings listed in all.
    pub fn finding_count(&self) -> usize {
        self.loose_findings.len() + self.series.iter().map(|s| s.findings.len()).sum::<usize>()
    }
}

/// What a report reads of each series besides its fits, findings and
/// verdicts.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Records {
    /// Every record version (the HTML report draws and lists them).
    Read,
    /// None (the CSV exports list fits, findings and verdicts only; a
    /// million records read for nothing took over a gigabyte).
    Skip,
}

/// Reads the series whose key matches `pattern` (all without one).
pub fn gather(
    store: &Store,
    pattern: Option<&str>,
    records: Records,
) -> Result<ReportData, ReportError> {
    let rows = matching_series(store, pattern)?;
    let mut data = gather_rows(store, rows, pattern.is_some(), records)?;
    data.pattern = pattern.map(str::to_string);
    Ok(data)
}

/// The rows of the series whose key matches `pattern` (all without one),
/// in report order.
pub fn matching_series(
    store: &Store,
    pattern: Option<&str>,
) -> Result<Vec<ReportSeriesRow>, ReportError> {
    let matcher = match pattern {
        Some(p) => Some(
            Glob::new(p)
                .map_err(|e| ReportError::Pattern {
                    pattern: p.to_string(),
                    reason: e.kind().to_string(),
                })?
                .compile_matcher(),
        ),
        None => None,
    };
    Ok(store
        .report_series()?
        .into_iter()
        .filter(|s| matcher.as_ref().is_none_or(|m| m.is_match(&s.key)))
        .collect())
}

/// Reads everything of the given series. With `only_these`, findings and
/// verdicts are read for these series alone (no findings about files and
/// feeds); without, every finding is read and those without a series are
/// kept as loose findings.
pub fn gather_rows(
    store: &Store,
    rows: Vec<ReportSeriesRow>,
    only_these: bool,
    read: Records,
) -> Result<ReportData, ReportError> {
    let ids: Vec<SeriesRowId> = rows.iter().map(|s| s.id).collect();

    let mut records: HashMap<SeriesRowId, Vec<ReportRecordRow>> = HashMap::new();
    if read == Records::Read {
        for r in store.report_records(&ids)? {
            records.entry(r.series).or_default().push(r);
        }
    }
    let mut findings: HashMap<SeriesRowId, Vec<ReportFindingRow>> = HashMap::new();
    let mut loose_findings = Vec::new();
    let filter = only_these.then_some(ids.as_slice());
    for f in store.report_findings(filter)? {
        match f.series {
            Some(s) => findings.entry(s).or_default().push(f),
            None => loose_findings.push(f),
        }
    }
    let mut verdicts: HashMap<SeriesRowId, Vec<ReportVerdictRow>> = HashMap::new();
    for v in store.report_verdicts(filter)? {
        if let Some(s) = v.series {
            verdicts.entry(s).or_default().push(v);
        }
    }
    let mut series = Vec::with_capacity(rows.len());
    for row in rows {
        let fits = store.report_fits(row.id)?;
        series.push(SeriesData {
            fits,
            records: records.remove(&row.id).unwrap_or_default(),
            findings: findings.remove(&row.id).unwrap_or_default(),
            verdicts: verdicts.remove(&row.id).unwrap_or_default(),
            row,
        });
    }
    Ok(ReportData {
        series,
        loose_findings,
        pattern: None,
    })
}

impl SeriesData {
    /// The current fit version.
    pub fn current_fit(&self) -> Option<&ReportFitRow> {
        let id = self.row.latest_fit?;
        self.fits.iter().rev().find(|f| f.id == id)
    }

    /// The series' transform (that of the current fit, else the series').
    pub fn transform(&self) -> Transform {
        self.current_fit()
            .and_then(|f| Transform::from_name(&f.transform))
            .or_else(|| Transform::from_name(&self.row.transform))
            .unwrap_or_default()
    }

    /// The unit of y: the configured one, else the usual one of its records.
    pub fn unit(&self) -> Option<&str> {
        self.row
            .unit
            .as_deref()
            .or(self.row.record_unit.as_deref())
            .filter(|u| !u.trim().is_empty())
    }

    /// Whether x reads as decimal years: every recorded x between 1800
    /// and 2200 (the same reading the findings use for their wording).
    pub fn x_is_year(&self) -> bool {
        !self.records.is_empty()
            && self
                .records
                .iter()
                .all(|r| (1800.0..=2200.0).contains(&r.x))
    }

    /// Labels for axes and slopes.
    pub fn labels(&self) -> Labels {
        labels(
            self.transform(),
            self.unit(),
            XMeasure::of(
                self.row.x_name.as_deref(),
                self.row.x_unit.as_deref(),
                self.x_is_year(),
            ),
        )
    }
}

/// What the numbers of a series are in.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Labels {
    /// The x axis.
    pub x_axis: String,
    /// The y axis.
    pub y_axis: String,
    /// The unit of the slope.
    pub slope_unit: String,
    /// The unit of y on the fitted scale (for intercepts and levels).
    pub y_unit: String,
    /// The fitted scale in words.
    pub scale: String,
    /// Where the intercept lies, for its row in the figures.
    pub intercept: String,
}

/// What x is, for labels: decimal years, or a quantity with what it
/// measures and its unit when the configuration names them (`x_name`,
/// `x_unit`).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum XMeasure<'a> {
    /// Decimal years.
    Year,
    /// Anything else (a distance, a depth), as recorded.
    Quantity {
        /// What x measures, such as "distance from the source".
        name: Option<&'a str>,
        /// Its unit, such as "m".
        unit: Option<&'a str>,
    },
}

impl<'a> XMeasure<'a> {
    /// The configured name and unit when there are any (a configured
    /// "year" unit reads as years), else decimal years when x reads so.
    pub fn of(name: Option<&'a str>, unit: Option<&'a str>, x_is_year: bool) -> Self {
        let named = name.is_some() || unit.is_some();
        let unit_is_year = unit.is_some_and(crate::config::unit_is_year);
        if unit_is_year || (x_is_year && !named) {
            XMeasure::Year
        } else {
            XMeasure::Quantity { name, unit }
        }
    }
}

/// Axis and slope labels for a transform, a unit of y and what x is.
pub fn labels(transform: Transform, unit: Option<&str>, x: XMeasure<'_>) -> Labels {
    let unit = unit.unwrap_or("unit not stated");
    let (per_x, x_plain, x_log) = match x {
        XMeasure::Year => (
            "per year".to_string(),
            "Year (decimal)".to_string(),
            "ln year".to_string(),
        ),
        XMeasure::Quantity { name, unit: x_unit } => {
            let per = x_unit.map_or_else(|| "per unit of x".to_string(), |u| format!("per {u}"));
            let plain = match (name, x_unit) {
                (Some(n), Some(u)) => format!("{} ({u})", capitalised(n)),
                (Some(n), None) => capitalised(n),
                (None, Some(u)) => format!("x ({u})"),
                (None, None) => "x (as recorded)".to_string(),
            };
            let log = match (name, x_unit) {
                (Some(n), Some(u)) => format!("ln {n} (in {u})"),
                (Some(n), None) => format!("ln {n}"),
                (None, Some(u)) => format!("ln x (x in {u})"),
                (None, None) => "ln x (x as recorded)".to_string(),
            };
            (per, plain, log)
        }
    };
    let intercept = match (transform, x) {
        (Transform::LogX | Transform::LogLog, XMeasure::Quantity { unit: Some(u), .. }) => {
            format!("Intercept at ln x = 0 (x = 1 {u})")
        }
        (Transform::LogX | Transform::LogLog, _) => "Intercept at ln x = 0 (x = 1)".to_string(),
        (_, XMeasure::Year) => "Intercept at year 0 (far outside the data)".to_string(),
        (_, XMeasure::Quantity { unit: Some(u), .. }) => format!("Intercept at x = 0 {u}"),
        (_, XMeasure::Quantity { unit: None, .. }) => "Intercept at x = 0".to_string(),
    };
    match transform {
        Transform::None => Labels {
            x_axis: x_plain,
            y_axis: format!("Concentration ({unit})"),
            slope_unit: format!("{unit} {per_x}"),
            y_unit: unit.to_string(),
            scale: "y on x (no transform)".into(),
            intercept,
        },
        Transform::LogY => Labels {
            x_axis: x_plain,
            y_axis: format!("ln concentration (concentration in {unit})"),
            slope_unit: format!("ln({unit}) {per_x}"),
            y_unit: format!("ln({unit})"),
            scale: "ln y on x".into(),
            intercept,
        },
        Transform::LogX => Labels {
            x_axis: x_log,
            y_axis: format!("Concentration ({unit})"),
            slope_unit: format!("{unit} per unit of ln x"),
            y_unit: unit.to_string(),
            scale: "y on ln x".into(),
            intercept,
        },
        Transform::LogLog => Labels {
            x_axis: x_log,
            y_axis: format!("ln concentration (concentration in {unit})"),
            slope_unit: "power-law exponent (ln y per ln x)".into(),
            y_unit: format!("ln({unit})"),
            scale: "ln y on ln x".into(),
            intercept,
        },
    }
}

/// The slope unit of a series, from its transform, unit and the x range
/// of its fit (decimal years when within 1800–2200, as the report reads
/// it from the records), read without touching its records: for the
/// overview page and `status`.
pub fn glance_slope_unit(s: &SeriesGlance) -> String {
    let transform = s
        .fit
        .as_ref()
        .and_then(|f| Transform::from_name(&f.transform))
        .or_else(|| Transform::from_name(&s.row.transform))
        .unwrap_or_default();
    let unit = s
        .row
        .unit
        .as_deref()
        .or(s.row.record_unit.as_deref())
        .filter(|u| !u.trim().is_empty());
    let x_is_year = s.fit.as_ref().is_some_and(|f| {
        matches!((f.x_min, f.x_max), (Some(lo), Some(hi))
            if (1800.0..=2200.0).contains(&lo) && (1800.0..=2200.0).contains(&hi))
    });
    let x = XMeasure::of(s.row.x_name.as_deref(), s.row.x_unit.as_deref(), x_is_year);
    labels(transform, unit, x).slope_unit
}

/// `text` with its first letter in capitals, for an axis title.
fn capitalised(text: &str) -> String {
    let mut chars = text.chars();
    match chars.next() {
        Some(first) => first.to_uppercase().chain(chars).collect(),
        None => String::new(),
    }
}

/// The band figures of a fit version, when it has a line.
pub fn line_stats(f: &ReportFitRow) -> Option<LineStats> {
    Some(LineStats {
        n: f.n as f64,
        df: f.df? as f64,
        level: f.level,
        slope: f.slope?,
        residual_sd: f.residual_sd?,
        origin: f.origin,
        mean_x_shifted: f.mean_x_shifted,
        mean_y: f.mean_y,
        sxx: f.sxx,
    })
}

/// A fit as stored inside a finding's `detail` (`fit_with`, `fit_without`).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DetailFit {
    /// Points.
    pub n: Option<i64>,
    /// Slope.
    pub slope: Option<f64>,
    /// Interval.
    pub ci_low: Option<f64>,
    /// Interval.
    pub ci_high: Option<f64>,
    /// Two-sided p.
    pub p: Option<f64>,
    /// Intercept at x = 0.
    pub intercept: Option<f64>,
}

/// The fit under `key` in a finding's detail, when present.
pub fn detail_fit(detail: &serde_json::Value, key: &str) -> Option<DetailFit> {
    let f = detail.get(key)?.as_object()?;
    let num = |k: &str| f.get(k).and_then(serde_json::Value::as_f64);
    Some(DetailFit {
        n: f.get("n").and_then(serde_json::Value::as_i64),
        slope: num("slope"),
        ci_low: num("slope_ci_low"),
        ci_high: num("slope_ci_high"),
        p: num("slope_p"),
        intercept: num("intercept"),
    })
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    #[test]
    fn labels_name_the_scale_and_the_unit() {
        let plain = XMeasure::of(None, None, false);
        let l = labels(
            Transform::None,
            Some("mg/L"),
            XMeasure::of(None, None, true),
        );
        assert_eq!(l.x_axis, "Year (decimal)");
        assert_eq!(l.y_axis, "Concentration (mg/L)");
        assert_eq!(l.slope_unit, "mg/L per year");
        assert_eq!(l.intercept, "Intercept at year 0 (far outside the data)");
        let l = labels(Transform::LogY, Some("mg/kg"), plain);
        assert_eq!(l.intercept, "Intercept at x = 0");
        assert_eq!(l.y_axis, "ln concentration (concentration in mg/kg)");
        assert_eq!(l.slope_unit, "ln(mg/kg) per unit of x");
        let l = labels(Transform::LogLog, None, plain);
        assert_eq!(l.x_axis, "ln x (x as recorded)");
        assert_eq!(l.y_unit, "ln(unit not stated)");
    }

    #[test]
    fn a_configured_x_name_and_unit_label_the_axis_and_the_slope() {
        let distance = XMeasure::of(Some("distance from the source"), Some("m"), false);
        let l = labels(Transform::LogY, Some("mg/kg"), distance);
        assert_eq!(l.x_axis, "Distance from the source (m)");
        assert_eq!(l.slope_unit, "ln(mg/kg) per m");
        let l = labels(Transform::None, Some("mg/kg"), distance);
        assert_eq!(l.slope_unit, "mg/kg per m");
        assert_eq!(l.intercept, "Intercept at x = 0 m");
        let l = labels(Transform::LogX, Some("mg/kg"), distance);
        assert_eq!(l.x_axis, "ln distance from the source (in m)");
        assert_eq!(l.intercept, "Intercept at ln x = 0 (x = 1 m)");
        // A configured unit wins over the reading of x as years (a transect
        // 1,800 to 2,200 m long), and a unit alone still labels the axis.
        let l = labels(
            Transform::None,
            Some("mg/kg"),
            XMeasure::of(None, Some("m"), true),
        );
        assert_eq!(l.x_axis, "x (m)");
        assert_eq!(l.slope_unit, "mg/kg per m");
        // "year" configured reads as years.
        let l = labels(
            Transform::None,
            Some("mg/L"),
            XMeasure::of(None, Some("year"), false),
        );
        assert_eq!(l.slope_unit, "mg/L per year");
    }

    #[test]
    fn detail_fits_are_read_and_absent_ones_are_none() {
        let d = serde_json::json!({
            "fit_with": {"n": 21, "slope": 3.02, "slope_ci_low": -0.37, "slope_ci_high": 6.41,
                         "slope_p": 0.0775, "intercept": -6071.2},
            "fit_without": null
        });
        let w = detail_fit(&d, "fit_with").unwrap();
        assert_eq!(w.n, Some(21));
        assert_eq!(w.slope, Some(3.02));
        assert_eq!(w.ci_low, Some(-0.37));
        assert_eq!(w.p, Some(0.0775));
        assert!(detail_fit(&d, "fit_without").is_none());
        assert!(detail_fit(&d, "fit_before").is_none());
    }
}
