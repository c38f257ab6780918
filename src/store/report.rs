//! Read-only queries behind `slopewarden report`: series, every fit
//! version, records (all versions and statuses), findings and verdicts, as
//! plain rows. Nothing here writes.

use rusqlite::params;

use super::{FindingStatus, RecordStatus, Result, SeriesRowId, Store, VerdictKind};
use crate::findings::Severity;

/// A series as the report lists it.
#[derive(Debug, Clone, PartialEq)]
pub struct ReportSeriesRow {
    /// Row id.
    pub id: SeriesRowId,
    /// The series key, as written in the files.
    pub key: String,
    /// Its configured unit, if any.
    pub unit: Option<String>,
    /// The most common unit among its current records (for series without
    /// a configured unit).
    pub record_unit: Option<String>,
    /// Transform name (`none`, `log-y`, ...).
    pub transform: String,
    /// Non-detect policy as stored.
    pub non_detects: String,
    /// Row of the current fit version.
    pub latest_fit: Option<i64>,
    /// Current record versions stored.
    pub records: i64,
    /// Open findings.
    pub open_findings: i64,
    /// What x measures, as configured (`x_name`).
    pub x_name: Option<String>,
    /// x's unit, as configured (`x_unit`).
    pub x_unit: Option<String>,
}

/// One fit version, with what triggered it.
#[derive(Debug, Clone, PartialEq)]
pub struct ReportFitRow {
    /// Row id.
    pub id: i64,
    /// The series.
    pub series: SeriesRowId,
    /// Version number (1 for the first fit).
    pub version: i64,
    /// When it was computed (RFC 3339 UTC).
    pub created_at: String,
    /// The file that triggered it, by name.
    pub trigger_file: Option<String>,
    /// The verdict that triggered it.
    pub trigger_verdict: Option<i64>,
    /// What that verdict said.
    pub trigger_verdict_kind: Option<VerdictKind>,
    /// The finding that verdict was on.
    pub trigger_finding: Option<i64>,
    /// The analysis-window change that triggered it: its id and source
    /// (`command` or `config`).
    pub trigger_window: Option<(i64, String)>,
    /// The analysis window of this version in its stored text form
    /// (`x:LO..HI`, `last:N`, `since:DATE`); `None`: all points.
    pub window: Option<String>,
    /// Transform name of this version.
    pub transform: String,
    /// Non-detect policy of this version.
    pub non_detects: String,
    /// Confidence level of its intervals.
    pub level: f64,
    /// Points in the fit.
    pub n: i64,
    /// Non-detects stored for the series.
    pub n_censored: i64,
    /// Slope (fitted scale).
    pub slope: Option<f64>,
    /// Intercept at x = 0 (fitted scale).
    pub intercept: Option<f64>,
    /// Standard error of the slope.
    pub slope_se: Option<f64>,
    /// Two-sided p of the slope.
    pub slope_p: Option<f64>,
    /// Lower end of the slope's interval.
    pub slope_ci_low: Option<f64>,
    /// Upper end of the slope's interval.
    pub slope_ci_high: Option<f64>,
    /// R².
    pub r_squared: Option<f64>,
    /// Residual standard deviation.
    pub residual_sd: Option<f64>,
    /// Residual degrees of freedom.
    pub df: Option<i64>,
    /// Theil-Sen slope, when computed for this version.
    pub theil_sen_slope: Option<f64>,
    /// Its interval.
    pub theil_sen_ci_low: Option<f64>,
    /// Its interval.
    pub theil_sen_ci_high: Option<f64>,
    /// Mann-Kendall S.
    pub mann_kendall_s: Option<i64>,
    /// Mann-Kendall two-sided p.
    pub mann_kendall_p: Option<f64>,
    /// The x origin of the co-moments.
    pub origin: f64,
    /// Mean of x − origin.
    pub mean_x_shifted: f64,
    /// Mean of y (fitted scale).
    pub mean_y: f64,
    /// Σ(x − x̄)².
    pub sxx: f64,
    /// Σ(x − x̄)(y − ȳ).
    pub sxy: f64,
    /// Σ(y − ȳ)².
    pub syy: f64,
    /// Residual sum of squares.
    pub sse: f64,
    /// Smallest x in the fit (fitted scale).
    pub x_min: Option<f64>,
    /// Largest x in the fit (fitted scale).
    pub x_max: Option<f64>,
    /// Why a statistic is absent.
    pub note: Option<String>,
}

/// One stored record version.
#[derive(Debug, Clone, PartialEq)]
pub struct ReportRecordRow {
    /// Row id.
    pub row: i64,
    /// The series.
    pub series: SeriesRowId,
    /// Record id as written.
    pub record_id: String,
    /// Version number.
    pub version: i64,
    /// Where this version stands.
    pub status: RecordStatus,
    /// x as recorded.
    pub x: f64,
    /// y as recorded (the limit of a non-detect).
    pub y: f64,
    /// A non-detect.
    pub censored: bool,
    /// Whether it entered the fit.
    pub in_fit: bool,
    /// Its point on the fitted scale, when in the fit.
    pub fit_x: Option<f64>,
    /// Its point on the fitted scale, when in the fit.
    pub fit_y: Option<f64>,
    /// Excluded from the fit by a verdict.
    pub excluded: bool,
    /// Unit.
    pub unit: Option<String>,
    /// Sampling date as written.
    pub sampled_at: Option<String>,
    /// Note.
    pub note: Option<String>,
    /// The file it came in, by name.
    pub file: Option<String>,
    /// Line in that file.
    pub line: i64,
    /// Diagnostics in the fit it joined.
    pub leverage: Option<f64>,
    /// Externally studentized residual.
    pub studentized_residual: Option<f64>,
    /// Cook's distance.
    pub cooks_distance: Option<f64>,
    /// DFFITS.
    pub dffits: Option<f64>,
    /// DFBETAS of the slope.
    pub dfbetas_slope: Option<f64>,
    /// Fit version it joined.
    pub joined_fit: Option<i64>,
}

/// A finding as the report lists it.
#[derive(Debug, Clone, PartialEq)]
pub struct ReportFindingRow {
    /// Finding id.
    pub id: i64,
    /// RFC 3339 UTC.
    pub created_at: String,
    /// The series, if any.
    pub series: Option<SeriesRowId>,
    /// The series key, if any.
    pub series_key: Option<String>,
    /// The file that brought it, by name.
    pub file: Option<String>,
    /// The record row concerned, for a record-level finding.
    pub record_row: Option<i64>,
    /// Record ids concerned.
    pub record_ids: Vec<String>,
    /// Kind names.
    pub kinds: Vec<String>,
    /// How urgent.
    pub severity: Severity,
    /// Where it stands.
    pub status: FindingStatus,
    /// The fit version stored with it.
    pub fit_version: Option<i64>,
    /// One line.
    pub summary: String,
    /// The numbers, as the JSON text stored (see `detail_value`).
    pub detail: String,
}

impl ReportFindingRow {
    /// The finding's document, parsed (`null` if it is not JSON). Kept as
    /// text until asked for: 29,000 parsed documents took 400 MB.
    pub fn detail_value(&self) -> serde_json::Value {
        serde_json::from_str(&self.detail).unwrap_or(serde_json::Value::Null)
    }
}

/// A verdict (or revert) as the report lists it.
#[derive(Debug, Clone, PartialEq)]
pub struct ReportVerdictRow {
    /// Verdict id.
    pub id: i64,
    /// The finding.
    pub finding_id: i64,
    /// The finding's series, if any.
    pub series: Option<SeriesRowId>,
    /// The finding's series key, if any.
    pub series_key: Option<String>,
    /// What it said.
    pub verdict: VerdictKind,
    /// Record id of the record concerned.
    pub record_id: Option<String>,
    /// Corrected: version number of the new record version.
    pub new_record_version: Option<i64>,
    /// Corrected: the value as given.
    pub value: Option<f64>,
    /// Reverted: the verdict undone.
    pub reverts: Option<i64>,
    /// The analyst's note.
    pub note: String,
    /// Who.
    pub by_whom: String,
    /// When (RFC 3339 UTC).
    pub at: String,
}

/// JSON array text of row ids, for `json_each`.
fn id_list(ids: &[SeriesRowId]) -> String {
    let list: Vec<i64> = ids.iter().map(|s| s.0).collect();
    serde_json::to_string(&list).unwrap_or_else(|_| "[]".into())
}

fn string_list(text: &str) -> Vec<String> {
    serde_json::from_str(text).unwrap_or_default()
}

impl Store {
    /// Every series, ordered by key.
    pub fn report_series(&self) -> Result<Vec<ReportSeriesRow>> {
        let mut stmt = self
            .conn
            .prepare(
                "SELECT s.id, s.key, s.unit, s.transform, s.non_detects, s.latest_fit,
                        COALESCE(f.records, 0),
                        (SELECT COUNT(*) FROM findings g WHERE g.series_id = s.id AND g.status = 'open'),
                        s.x_name, s.x_unit
                 FROM series s LEFT JOIN fits f ON f.id = s.latest_fit
                 ORDER BY s.key",
            )
            .map_err(self.wrap())?;
        let mut rows = stmt
            .query_map([], |r| {
                Ok(ReportSeriesRow {
                    id: SeriesRowId(r.get(0)?),
                    key: r.get(1)?,
                    unit: r.get(2)?,
                    record_unit: None,
                    transform: r.get(3)?,
                    non_detects: r.get(4)?,
                    latest_fit: r.get(5)?,
                    records: r.get(6)?,
                    open_findings: r.get(7)?,
                    x_name: r.get(8)?,
                    x_unit: r.get(9)?,
                })
            })
            .map_err(self.wrap())?
            .collect::<std::result::Result<Vec<_>, _>>()
            .map_err(self.wrap())?;
        // The usual unit of each series' current records, in one pass.
        let mut stmt = self
            .conn
            .prepare(
                "SELECT series_id, unit, COUNT(*) AS c FROM records
                 WHERE status = 'current' AND unit IS NOT NULL
                 GROUP BY series_id, unit ORDER BY series_id, c DESC, unit",
            )
            .map_err(self.wrap())?;
        let units = stmt
            .query_map([], |r| Ok((r.get::<_, i64>(0)?, r.get::<_, String>(1)?)))
            .map_err(self.wrap())?
            .collect::<std::result::Result<Vec<_>, _>>()
            .map_err(self.wrap())?;
        let mut first: std::collections::HashMap<i64, String> = std::collections::HashMap::new();
        for (series, unit) in units {
            first.entry(series).or_insert(unit);
        }
        for row in &mut rows {
            row.record_unit = first.remove(&row.id.0);
        }
        Ok(rows)
    }

    /// Every fit version of a series, oldest first (walking the version
    /// chain back from the current one).
    pub fn report_fits(&self, series: SeriesRowId) -> Result<Vec<ReportFitRow>> {
        let mut stmt = self
            .conn
            .prepare_cached(
                "WITH RECURSIVE chain(id) AS (
                     SELECT latest_fit FROM series WHERE id = ?1 AND latest_fit IS NOT NULL
                     UNION ALL
                     SELECT f.prev_fit FROM chain c CROSS JOIN fits f ON f.id = c.id WHERE f.prev_fit IS NOT NULL
                 )
                 SELECT f.id, f.series_id, f.version, f.created_at, sf.name, f.trigger_verdict, v.verdict,
                        v.finding_id, f.transform, f.non_detects, f.level, f.n, f.n_censored, f.slope,
                        f.intercept, f.slope_se, f.slope_p, f.slope_ci_low, f.slope_ci_high, f.r_squared,
                        f.residual_sd, f.df, f.theil_sen_slope, f.theil_sen_ci_low, f.theil_sen_ci_high,
                        f.mann_kendall_s, f.mann_kendall_p, f.origin, f.mean_x, f.mean_y, f.sxx, f.sxy,
                        f.syy, f.sse, f.x_min, f.x_max, f.note, w.id, w.source, f.window
                 FROM chain c CROSS JOIN fits f ON f.id = c.id
                 LEFT JOIN source_files sf ON sf.id = f.trigger_file
                 LEFT JOIN verdicts v ON v.id = f.trigger_verdict
                 LEFT JOIN series_windows w ON w.id = f.trigger_window
                 ORDER BY f.version, f.id",
            )
            .map_err(self.wrap())?;
        let rows = stmt
            .query_map([series.0], |r| {
                Ok(ReportFitRow {
                    id: r.get(0)?,
                    series: SeriesRowId(r.get(1)?),
                    version: r.get(2)?,
                    created_at: r.get(3)?,
                    trigger_file: r.get(4)?,
                    trigger_verdict: r.get(5)?,
                    trigger_verdict_kind: r.get(6)?,
                    trigger_finding: r.get(7)?,
                    transform: r.get(8)?,
                    non_detects: r.get(9)?,
                    level: r.get(10)?,
                    n: r.get(11)?,
                    n_censored: r.get(12)?,
                    slope: r.get(13)?,
                    intercept: r.get(14)?,
                    slope_se: r.get(15)?,
                    slope_p: r.get(16)?,
                    slope_ci_low: r.get(17)?,
                    slope_ci_high: r.get(18)?,
                    r_squared: r.get(19)?,
                    residual_sd: r.get(20)?,
                    df: r.get(21)?,
                    theil_sen_slope: r.get(22)?,
                    theil_sen_ci_low: r.get(23)?,
                    theil_sen_ci_high: r.get(24)?,
                    mann_kendall_s: r.get(25)?,
                    mann_kendall_p: r.get(26)?,
                    origin: r.get(27)?,
                    mean_x_shifted: r.get(28)?,
                    mean_y: r.get(29)?,
                    sxx: r.get(30)?,
                    sxy: r.get(31)?,
                    syy: r.get(32)?,
                    sse: r.get(33)?,
                    x_min: r.get(34)?,
                    x_max: r.get(35)?,
                    note: r.get(36)?,
                    trigger_window: match (r.get(37)?, r.get(38)?) {
                        (Some(id), Some(source)) => Some((id, source)),
                        _ => None,
                    },
                    window: r.get(39)?,
                })
            })
            .map_err(self.wrap())?;
        rows.collect::<std::result::Result<Vec<_>, _>>()
            .map_err(self.wrap())
    }

    /// Every stored record version of the given series (all statuses),
    /// ordered by series, then storage order. One pass over the records.
    pub fn report_records(&self, series: &[SeriesRowId]) -> Result<Vec<ReportRecordRow>> {
        if series.is_empty() {
            return Ok(Vec::new());
        }
        let mut stmt = self
            .conn
            .prepare(
                "SELECT r.id, r.series_id, r.record_id, r.version, r.status, r.x, r.y, r.censored,
                        r.in_fit, r.fit_x, r.fit_y, r.excluded, r.unit, r.sampled_at, r.note, sf.name,
                        r.line, r.leverage, r.studentized_residual, r.cooks_distance, r.dffits,
                        r.dfbetas_slope, r.joined_fit
                 FROM records r LEFT JOIN source_files sf ON sf.id = r.file_id
                 WHERE r.series_id IN (SELECT value FROM json_each(?1))
                 ORDER BY r.series_id, r.id",
            )
            .map_err(self.wrap())?;
        let rows = stmt
            .query_map([id_list(series)], |r| {
                Ok(ReportRecordRow {
                    row: r.get(0)?,
                    series: SeriesRowId(r.get(1)?),
                    record_id: r.get(2)?,
                    version: r.get(3)?,
                    status: r.get(4)?,
                    x: r.get(5)?,
                    y: r.get(6)?,
                    censored: r.get(7)?,
                    in_fit: r.get(8)?,
                    fit_x: r.get(9)?,
                    fit_y: r.get(10)?,
                    excluded: r.get(11)?,
                    unit: r.get(12)?,
                    sampled_at: r.get(13)?,
                    note: r.get(14)?,
                    file: r.get(15)?,
                    line: r.get(16)?,
                    leverage: r.get(17)?,
                    studentized_residual: r.get(18)?,
                    cooks_distance: r.get(19)?,
                    dffits: r.get(20)?,
                    dfbetas_slope: r.get(21)?,
                    joined_fit: r.get(22)?,
                })
            })
            .map_err(self.wrap())?;
        rows.collect::<std::result::Result<Vec<_>, _>>()
            .map_err(self.wrap())
    }

    /// Findings oldest first: those of the given series, or, with `None`,
    /// every finding (those about files and feeds without a series too).
    pub fn report_findings(&self, series: Option<&[SeriesRowId]>) -> Result<Vec<ReportFindingRow>> {
        self.report_findings_of(series, false)
    }

    /// The findings about files and feeds (without a series), oldest first.
    pub fn report_loose_findings(&self) -> Result<Vec<ReportFindingRow>> {
        self.report_findings_of(None, true)
    }

    fn report_findings_of(
        &self,
        series: Option<&[SeriesRowId]>,
        loose_only: bool,
    ) -> Result<Vec<ReportFindingRow>> {
        let sql =
            "SELECT g.id, g.created_at, g.series_id, s.key, sf.name, g.record_row, g.record_ids,
                          g.kinds, g.severity, g.status, g.fit_version, g.summary, g.detail
                   FROM findings g LEFT JOIN series s ON s.id = g.series_id
                   LEFT JOIN source_files sf ON sf.id = g.file_id
                   WHERE (?1 IS NULL OR g.series_id IN (SELECT value FROM json_each(?1)))
                     AND (?2 = 0 OR g.series_id IS NULL)
                   ORDER BY g.id";
        let mut stmt = self.conn.prepare(sql).map_err(self.wrap())?;
        let filter = series.map(id_list);
        let rows = stmt
            .query_map(params![filter, loose_only], |r| {
                let ids: String = r.get(6)?;
                let kinds: String = r.get(7)?;
                let detail: String = r.get(12)?;
                Ok(ReportFindingRow {
                    id: r.get(0)?,
                    created_at: r.get(1)?,
                    series: r.get::<_, Option<i64>>(2)?.map(SeriesRowId),
                    series_key: r.get(3)?,
                    file: r.get(4)?,
                    record_row: r.get(5)?,
                    record_ids: string_list(&ids),
                    kinds: string_list(&kinds),
                    severity: r.get(8)?,
                    status: r.get(9)?,
                    fit_version: r.get(10)?,
                    summary: r.get(11)?,
                    detail,
                })
            })
            .map_err(self.wrap())?;
        rows.collect::<std::result::Result<Vec<_>, _>>()
            .map_err(self.wrap())
    }

    /// Verdicts oldest first: those on findings of the given series, or,
    /// with `None`, every verdict.
    pub fn report_verdicts(&self, series: Option<&[SeriesRowId]>) -> Result<Vec<ReportVerdictRow>> {
        let sql = "SELECT v.id, v.finding_id, g.series_id, s.key, v.verdict,
                          COALESCE(r.record_id, nr.record_id), nr.version, v.value, v.reverts, v.note,
                          v.by_whom, v.at
                   FROM verdicts v JOIN findings g ON g.id = v.finding_id
                   LEFT JOIN series s ON s.id = g.series_id
                   LEFT JOIN records r ON r.id = v.record_row
                   LEFT JOIN records nr ON nr.id = v.new_record_row
                   WHERE ?1 IS NULL OR g.series_id IN (SELECT value FROM json_each(?1))
                   ORDER BY v.at, v.id";
        let mut stmt = self.conn.prepare(sql).map_err(self.wrap())?;
        let filter = series.map(id_list);
        let rows = stmt
            .query_map(params![filter], |r| {
                Ok(ReportVerdictRow {
                    id: r.get(0)?,
                    finding_id: r.get(1)?,
                    series: r.get::<_, Option<i64>>(2)?.map(SeriesRowId),
                    series_key: r.get(3)?,
                    verdict: r.get(4)?,
                    record_id: r.get(5)?,
                    new_record_version: r.get(6)?,
                    value: r.get(7)?,
                    reverts: r.get(8)?,
                    note: r.get(9)?,
                    by_whom: r.get(10)?,
                    at: r.get(11)?,
                })
            })
            .map_err(self.wrap())?;
        rows.collect::<std::result::Result<Vec<_>, _>>()
            .map_err(self.wrap())
    }
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    #[test]
    fn an_empty_store_reports_nothing() {
        let store = Store::open_in_memory().unwrap();
        assert!(store.report_series().unwrap().is_empty());
        assert!(store.report_records(&[]).unwrap().is_empty());
        assert!(store.report_records(&[SeriesRowId(1)]).unwrap().is_empty());
        assert!(store.report_findings(None).unwrap().is_empty());
        assert!(store.report_findings(Some(&[])).unwrap().is_empty());
        assert!(store.report_verdicts(None).unwrap().is_empty());
        assert!(store.report_fits(SeriesRowId(1)).unwrap().is_empty());
    }
}
