//! The SQL behind verdicts: reading what a verdict concerns, storing a
//! corrected version, excluding a record, closing or reopening a finding,
//! and the store revision that tells a running daemon to reload.

use rusqlite::{OptionalExtension, params};

use super::{FindingStatus, RecordStatus, Result, SeriesRow, Store, Tx, VerdictKind, series_row};

/// A finding as a verdict needs it.
#[derive(Debug, Clone, PartialEq)]
pub struct ReviewTarget {
    /// Finding id.
    pub id: i64,
    /// Its series' key, if any.
    pub series: Option<String>,
    /// The record row it concerns, if any.
    pub record_row: Option<i64>,
    /// Where the finding stands.
    pub status: FindingStatus,
    /// One line for lists.
    pub summary: String,
}

/// A record row as a verdict needs it.
#[derive(Debug, Clone, PartialEq)]
pub struct RecordState {
    /// Row id.
    pub row: i64,
    /// The record id as delivered.
    pub record_id: String,
    /// Version number.
    pub version: i64,
    /// Where this version stands.
    pub status: RecordStatus,
    /// x as stored.
    pub x: f64,
    /// y as stored (the limit of a non-detect).
    pub y: f64,
    /// Whether a non-detect.
    pub censored: bool,
    /// Whether it entered the fit on arrival.
    pub in_fit: bool,
    /// Excluded by a verdict.
    pub excluded: bool,
    /// Its unit.
    pub unit: Option<String>,
}

/// A stored verdict.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct VerdictRow {
    /// Verdict id.
    pub id: i64,
    /// The finding.
    pub finding: i64,
    /// What it said.
    pub verdict: VerdictKind,
    /// The record judged.
    pub record_row: Option<i64>,
    /// The corrected version stored.
    pub new_record_row: Option<i64>,
    /// The corrected value as given.
    pub value: Option<f64>,
    /// The verdict a revert undoes.
    pub reverts: Option<i64>,
    /// Why.
    pub note: String,
    /// Who.
    pub by: String,
    /// When (RFC 3339 UTC).
    pub at: String,
}

/// What a series' x measures and its unit, as stored (`series.x_name`,
/// `series.x_unit`; None: not configured).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct SeriesAxis {
    /// The series row.
    pub id: super::SeriesRowId,
    /// The series key.
    pub key: String,
    /// What x measures, such as "distance from the source".
    pub name: Option<String>,
    /// x's unit, such as "m".
    pub unit: Option<String>,
}

/// A verdict about to be stored.
#[derive(Debug, Clone, PartialEq)]
pub struct NewVerdict<'a> {
    /// The finding.
    pub finding: i64,
    /// What it says.
    pub verdict: VerdictKind,
    /// The record judged.
    pub record_row: Option<i64>,
    /// The corrected version stored.
    pub new_record_row: Option<i64>,
    /// The corrected value as given.
    pub value: Option<f64>,
    /// The verdict a revert undoes.
    pub reverts: Option<i64>,
    /// Why.
    pub note: &'a str,
    /// Who.
    pub by: &'a str,
    /// When.
    pub at: &'a str,
}

pub(super) fn verdict_of(r: &rusqlite::Row<'_>) -> rusqlite::Result<VerdictRow> {
    Ok(VerdictRow {
        id: r.get(0)?,
        finding: r.get(1)?,
        verdict: r.get(2)?,
        record_row: r.get(3)?,
        new_record_row: r.get(4)?,
        value: r.get(5)?,
        reverts: r.get(6)?,
        note: r.get(7)?,
        by: r.get(8)?,
        at: r.get(9)?,
    })
}

pub(super) const VERDICT_COLUMNS: &str =
    "id, finding_id, verdict, record_row, new_record_row, value, reverts, note, by_whom, at";

fn verdicts_of(
    conn: &rusqlite::Connection,
    finding: Option<i64>,
) -> rusqlite::Result<Vec<VerdictRow>> {
    let mut stmt = conn.prepare_cached(&format!(
        "SELECT {VERDICT_COLUMNS} FROM verdicts WHERE ?1 IS NULL OR finding_id = ?1 ORDER BY id"
    ))?;
    let rows = stmt.query_map([finding], verdict_of)?;
    rows.collect()
}

impl Store {
    /// Every verdict, oldest first (of one finding, when given).
    pub fn verdicts(&self, finding: Option<i64>) -> Result<Vec<VerdictRow>> {
        verdicts_of(&self.conn, finding).map_err(self.wrap())
    }

    /// The store revision (see [`Tx::bump_revision`]).
    pub fn revision(&self) -> Result<i64> {
        self.conn
            .query_row("SELECT n FROM store_revision", [], |r| r.get(0))
            .map_err(self.wrap())
    }
}

impl Tx<'_> {
    /// The store revision: changed by every change made outside the ingest
    /// path, so that a running daemon knows to reload its caches.
    pub fn revision(&self) -> Result<i64> {
        self.tx
            .prepare_cached("SELECT n FROM store_revision")
            .and_then(|mut s| s.query_row([], |r| r.get(0)))
            .map_err(self.wrap())
    }

    /// Moves the store revision on.
    pub fn bump_revision(&self) -> Result<()> {
        self.tx
            .execute("UPDATE store_revision SET n = n + 1", [])
            .map_err(self.wrap())?;
        Ok(())
    }

    /// The finding a verdict concerns.
    pub fn review_target(&self, finding: i64) -> Result<Option<ReviewTarget>> {
        self.tx
            .prepare_cached(
                "SELECT f.id, s.key, f.record_row, f.status, f.summary
                 FROM findings f LEFT JOIN series s ON s.id = f.series_id WHERE f.id = ?1",
            )
            .and_then(|mut s| {
                s.query_row([finding], |r| {
                    Ok(ReviewTarget {
                        id: r.get(0)?,
                        series: r.get(1)?,
                        record_row: r.get(2)?,
                        status: r.get(3)?,
                        summary: r.get(4)?,
                    })
                })
                .optional()
            })
            .map_err(self.wrap())
    }

    /// Open trend findings of a series that its newest record `record_id`
    /// alone caused (a sign reversal or a significance change that would
    /// not have happened without it), other than `finding`: (id, summary),
    /// oldest first.
    pub fn trend_findings_caused_by(
        &self,
        series: &str,
        record_id: &str,
        finding: i64,
    ) -> Result<Vec<(i64, String)>> {
        let mut stmt = self
            .tx
            .prepare_cached(
                "SELECT f.id, f.summary FROM findings f JOIN series s ON s.id = f.series_id
                 WHERE s.key = ?1 AND f.status = 'open' AND f.id != ?3 AND f.record_row IS NULL
                   AND json_extract(f.detail, '$.caused_by_newest_record') = 1
                   AND json_extract(f.detail, '$.newest_record') = ?2
                 ORDER BY f.id",
            )
            .map_err(self.wrap())?;
        let rows = stmt
            .query_map(params![series, record_id, finding], |r| {
                Ok((r.get(0)?, r.get(1)?))
            })
            .map_err(self.wrap())?;
        rows.collect::<rusqlite::Result<_>>().map_err(self.wrap())
    }

    /// The verdicts of a finding, oldest first.
    pub fn verdicts_of(&self, finding: i64) -> Result<Vec<VerdictRow>> {
        verdicts_of(self.tx, Some(finding)).map_err(self.wrap())
    }

    /// A record row's state.
    pub fn record_state(&self, row: i64) -> Result<Option<RecordState>> {
        self.tx
            .prepare_cached(
                "SELECT id, record_id, version, status, x, y, censored, in_fit, excluded, unit
                 FROM records WHERE id = ?1",
            )
            .and_then(|mut s| {
                s.query_row([row], |r| {
                    Ok(RecordState {
                        row: r.get(0)?,
                        record_id: r.get(1)?,
                        version: r.get(2)?,
                        status: r.get(3)?,
                        x: r.get(4)?,
                        y: r.get(5)?,
                        censored: r.get(6)?,
                        in_fit: r.get(7)?,
                        excluded: r.get(8)?,
                        unit: r.get(9)?,
                    })
                })
                .optional()
            })
            .map_err(self.wrap())
    }

    /// The highest version stored for a record id.
    pub fn max_version(&self, record_id: &str) -> Result<i64> {
        self.tx
            .prepare_cached("SELECT COALESCE(MAX(version), 0) FROM records WHERE record_id = ?1")
            .and_then(|mut s| s.query_row([record_id], |r| r.get(0)))
            .map_err(self.wrap())
    }

    /// Stores a corrected version of the record in row `original`: the
    /// same provenance (file, line, raw text), the new value, its point on
    /// the fitted scale (None: not in the fit), chained after the series'
    /// newest record. Returns the new row id. The caller supersedes the
    /// original.
    pub fn insert_correction(
        &self,
        original: i64,
        version: i64,
        y: f64,
        fit_point: Option<(f64, f64)>,
        prev_in_series: Option<i64>,
        note: &str,
    ) -> Result<i64> {
        let id = self.ids.borrow().record();
        let (fx, fy) = fit_point.unzip();
        self.tx
            .prepare_cached(
                "INSERT INTO records (id, record_id, version, status, series_id, x, y, censored, in_fit,
                     fit_x, fit_y, unit, unit_as_written, sampled_at, note, attributes, file_id, line,
                     raw, prev_in_series)
                 SELECT ?1, record_id, ?2, 'current', series_id, x, ?3, 0, ?4, ?5, ?6, unit,
                     unit_as_written, sampled_at, ?7, attributes, file_id, line, raw, ?8
                 FROM records WHERE id = ?9",
            )
            .and_then(|mut s| {
                s.execute(params![
                    id,
                    version,
                    y,
                    fit_point.is_some(),
                    fx,
                    fy,
                    note,
                    prev_in_series,
                    original
                ])
            })
            .map_err(self.wrap())?;
        Ok(id)
    }

    /// Sets a record row's status (`current` or `superseded`).
    pub fn set_record_status(&self, row: i64, status: RecordStatus) -> Result<()> {
        self.tx
            .prepare_cached("UPDATE records SET status = ?2 WHERE id = ?1")
            .and_then(|mut s| s.execute(params![row, status]))
            .map_err(self.wrap())?;
        Ok(())
    }

    /// Excludes a record row from its series' fit, or takes it back.
    pub fn set_excluded(&self, row: i64, excluded: bool) -> Result<()> {
        self.tx
            .prepare_cached("UPDATE records SET excluded = ?2 WHERE id = ?1")
            .and_then(|mut s| s.execute(params![row, excluded]))
            .map_err(self.wrap())?;
        Ok(())
    }

    /// Sets a finding's status.
    pub fn set_finding_status(&self, finding: i64, status: FindingStatus) -> Result<()> {
        self.tx
            .prepare_cached("UPDATE findings SET status = ?2 WHERE id = ?1")
            .and_then(|mut s| s.execute(params![finding, status]))
            .map_err(self.wrap())?;
        Ok(())
    }

    /// Stores a verdict and returns its id.
    pub fn insert_verdict(&self, v: &NewVerdict<'_>) -> Result<i64> {
        self.tx
            .prepare_cached(
                "INSERT INTO verdicts (finding_id, verdict, record_row, new_record_row, value, reverts, note, by_whom, at)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9)",
            )
            .and_then(|mut s| {
                s.execute(params![
                    v.finding,
                    v.verdict,
                    v.record_row,
                    v.new_record_row,
                    v.value,
                    v.reverts,
                    v.note,
                    v.by,
                    v.at
                ])
            })
            .map_err(self.wrap())?;
        Ok(self.tx.last_insert_rowid())
    }

    /// Marks a fit row, written in this transaction, as made by a verdict.
    pub fn cite_verdict(&self, fit_row: i64, verdict: i64) -> Result<()> {
        self.tx
            .prepare_cached("UPDATE fits SET trigger_verdict = ?2 WHERE id = ?1")
            .and_then(|mut s| s.execute(params![fit_row, verdict]))
            .map_err(self.wrap())?;
        Ok(())
    }

    /// The analysis window set by the `window` command for a series, in
    /// its text form (`all` for every point); None when the configuration
    /// decides (no command, or the newest command gave the choice back).
    pub fn window_override(&self, series: super::SeriesRowId) -> Result<Option<String>> {
        // `+?1`: see `series_row` (a bare parameter made SQLite re-parse
        // the statement for every series).
        self.tx
            .prepare_cached(
                "SELECT window FROM series_windows WHERE series_id = +?1 AND source = 'command'
                 ORDER BY id DESC LIMIT 1",
            )
            .and_then(|mut s| {
                s.query_row([series.0], |r| r.get::<_, Option<String>>(0))
                    .optional()
            })
            .map(Option::flatten)
            .map_err(self.wrap())
    }

    /// Records a window change and returns its id. `window` is the text
    /// form, `all`, or None (a command giving the choice back to the
    /// configuration).
    pub fn insert_window_change(
        &self,
        series: super::SeriesRowId,
        window: Option<&str>,
        source: &str,
        note: &str,
        by: &str,
        at: &str,
    ) -> Result<i64> {
        self.tx
            .prepare_cached(
                "INSERT INTO series_windows (series_id, window, source, note, by_whom, at)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6)",
            )
            .and_then(|mut s| s.execute(params![series.0, window, source, note, by, at]))
            .map_err(self.wrap())?;
        Ok(self.tx.last_insert_rowid())
    }

    /// Marks a fit row, written in this transaction, as made by a window
    /// change.
    pub fn cite_window(&self, fit_row: i64, window_row: i64) -> Result<()> {
        self.tx
            .prepare_cached("UPDATE fits SET trigger_window = ?2 WHERE id = ?1")
            .and_then(|mut s| s.execute(params![fit_row, window_row]))
            .map_err(self.wrap())?;
        Ok(())
    }

    /// Every series key, in order.
    pub fn series_keys(&self) -> Result<Vec<String>> {
        let mut stmt = self
            .tx
            .prepare_cached("SELECT key FROM series ORDER BY id")
            .map_err(self.wrap())?;
        let rows = stmt.query_map([], |r| r.get(0)).map_err(self.wrap())?;
        rows.collect::<rusqlite::Result<_>>().map_err(self.wrap())
    }

    /// Every series' row id and key with its stored x name and unit, in
    /// order.
    pub fn series_axes(&self) -> Result<Vec<SeriesAxis>> {
        let mut stmt = self
            .tx
            .prepare_cached("SELECT id, key, x_name, x_unit FROM series ORDER BY id")
            .map_err(self.wrap())?;
        let rows = stmt
            .query_map([], |r| {
                Ok(SeriesAxis {
                    id: super::SeriesRowId(r.get(0)?),
                    key: r.get(1)?,
                    name: r.get(2)?,
                    unit: r.get(3)?,
                })
            })
            .map_err(self.wrap())?;
        rows.collect::<rusqlite::Result<_>>().map_err(self.wrap())
    }

    /// Stores what a series' x measures and its unit.
    pub fn set_series_axis(
        &self,
        id: super::SeriesRowId,
        name: Option<&str>,
        unit: Option<&str>,
    ) -> Result<()> {
        self.tx
            .prepare_cached("UPDATE series SET x_name = ?2, x_unit = ?3 WHERE id = ?1")
            .and_then(|mut s| s.execute(params![id.0, name, unit]))
            .map_err(self.wrap())?;
        Ok(())
    }

    /// A series' row by key (for a verdict, outside the ingest cache).
    pub fn series_for_review(&self, key: &str) -> Result<Option<SeriesRow>> {
        series_row(self.tx, key).map_err(self.wrap())
    }

    /// The in-fit points of a series with their record rows, oldest row
    /// first, walking its chain from `head`.
    pub fn fit_points_with_rows(&self, head: Option<i64>) -> Result<Vec<(i64, f64, f64)>> {
        super::chain_rows(self.tx, head).map_err(self.wrap())
    }
}
