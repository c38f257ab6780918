//! Read-only queries behind the HTTP surface (`src/http/`): a read-only
//! connection, the counts `/metrics` exposes, and what the overview page
//! lists. Nothing here writes; the connection is opened with
//! `SQLITE_OPEN_READ_ONLY` and `query_only` besides.

use std::path::Path;
use std::time::Duration;

use rusqlite::{Connection, OpenFlags};

use super::{BulkStatements, MIGRATIONS, ReportSeriesRow, Result, SeriesRowId, Store, StoreError};

/// Whole-store counts for `/metrics`, read in one snapshot.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct MetricsSnapshot {
    /// Files whose records were stored (outcome `ingested` or `partial`).
    pub files_ingested: i64,
    /// Files set aside whole (outcome `quarantined`).
    pub files_quarantined: i64,
    /// Current record versions.
    pub records_current: i64,
    /// Rows refused by validation.
    pub rows_quarantined: i64,
    /// Series known.
    pub series: i64,
    /// Fit versions stored (one per touched series per file, verdict or
    /// window change).
    pub fit_versions: i64,
    /// Findings by (kind, status), ordered; a finding with several kinds
    /// counts once under each.
    pub findings: Vec<(String, String, i64)>,
    /// Outbox rows by status, ordered.
    pub outbox: Vec<(String, i64)>,
    /// When the newest file arrived, as stored (RFC 3339 UTC).
    pub last_arrival: Option<String>,
    /// The same instant in seconds since the Unix epoch (`None` when no
    /// file arrived yet or the stamp cannot be read).
    pub last_arrival_unix: Option<i64>,
}

/// The current fit of a series, as the overview lists it.
#[derive(Debug, Clone, PartialEq)]
pub struct GlanceFit {
    /// Version number.
    pub version: i64,
    /// When it was computed (RFC 3339 UTC).
    pub created_at: String,
    /// Points in the fit.
    pub n: i64,
    /// Confidence level of the interval.
    pub level: f64,
    /// Least-squares slope.
    pub slope: Option<f64>,
    /// Interval ends.
    pub slope_ci_low: Option<f64>,
    /// Interval ends.
    pub slope_ci_high: Option<f64>,
    /// Two-sided p against a slope of zero.
    pub slope_p: Option<f64>,
    /// The x range of the fit (fitted scale).
    pub x_min: Option<f64>,
    /// The x range of the fit (fitted scale).
    pub x_max: Option<f64>,
    /// Transform name of this version.
    pub transform: String,
}

/// A series with its current fit, read without touching its records.
#[derive(Debug, Clone, PartialEq)]
pub struct SeriesGlance {
    /// The series as the report reads it, except `record_unit`, which here
    /// is the unit of the newest current record (one row read, instead of
    /// counting the units of every record).
    pub row: ReportSeriesRow,
    /// The current fit, when there is one.
    pub fit: Option<GlanceFit>,
}

/// An open finding, as the overview lists it.
#[derive(Debug, Clone, PartialEq)]
pub struct OpenFinding {
    /// Finding id.
    pub id: i64,
    /// When it was raised (RFC 3339 UTC).
    pub created_at: String,
    /// The series, if any.
    pub series: Option<String>,
    /// The file, if any.
    pub file: Option<String>,
    /// Kind names.
    pub kinds: Vec<String>,
    /// How urgent.
    pub severity: crate::findings::Severity,
    /// Record ids concerned.
    pub record_ids: Vec<String>,
    /// One line for lists.
    pub summary: String,
}

fn string_list(text: &str) -> Vec<String> {
    serde_json::from_str(text).unwrap_or_default()
}

impl Store {
    /// Opens an existing store read-only (`SQLITE_OPEN_READ_ONLY`, and
    /// `query_only` besides): never creates, migrates or writes. A
    /// database written by a newer slopewarden is refused.
    pub fn open_read_only(path: &Path) -> Result<Store> {
        let wrap = |source| StoreError::Sqlite {
            path: path.to_path_buf(),
            source,
        };
        let conn = Connection::open_with_flags(
            path,
            OpenFlags::SQLITE_OPEN_READ_ONLY | OpenFlags::SQLITE_OPEN_NO_MUTEX,
        )
        .map_err(wrap)?;
        conn.busy_timeout(Duration::from_secs(5)).map_err(wrap)?;
        conn.pragma_update(None, "query_only", "ON").map_err(wrap)?;
        let found: i64 = conn
            .query_row("PRAGMA user_version", [], |r| r.get(0))
            .map_err(wrap)?;
        let known = MIGRATIONS.len() as i64;
        if found > known {
            return Err(StoreError::TooNew {
                path: path.to_path_buf(),
                found,
                known,
            });
        }
        Ok(Store {
            bulk: BulkStatements::default(),
            conn,
            path: path.to_path_buf(),
            catch_up: Default::default(),
        })
    }

    /// Whether the store answers a query (for `/healthz`).
    pub fn readable(&self) -> Result<()> {
        self.conn
            .query_row("SELECT n FROM store_revision", [], |r| r.get::<_, i64>(0))
            .map(|_| ())
            .map_err(self.wrap())
    }

    /// The counts `/metrics` exposes, read in one transaction so that they
    /// agree with each other.
    pub fn metrics_snapshot(&self) -> Result<MetricsSnapshot> {
        let tx = self.conn.unchecked_transaction().map_err(self.wrap())?;
        let mut s = tx
            .query_row(
                // Records and fit versions are counted from each series'
                // current fit row (its running record count, and its
                // version number, which counts the series' versions), not
                // by scanning the two largest tables at every scrape.
                "SELECT (SELECT COUNT(*) FROM source_files WHERE outcome IN ('ingested', 'partial')),
                        (SELECT COUNT(*) FROM source_files WHERE outcome = 'quarantined'),
                        (SELECT COALESCE(SUM(f.records), 0) FROM series s JOIN fits f ON f.id = s.latest_fit),
                        (SELECT COUNT(*) FROM quarantined_rows),
                        (SELECT COUNT(*) FROM series),
                        (SELECT COALESCE(SUM(f.version), 0) FROM series s JOIN fits f ON f.id = s.latest_fit),
                        (SELECT MAX(arrived_at) FROM source_files)",
                [],
                |r| {
                    Ok(MetricsSnapshot {
                        files_ingested: r.get(0)?,
                        files_quarantined: r.get(1)?,
                        records_current: r.get(2)?,
                        rows_quarantined: r.get(3)?,
                        series: r.get(4)?,
                        fit_versions: r.get(5)?,
                        last_arrival: r.get(6)?,
                        ..MetricsSnapshot::default()
                    })
                },
            )
            .map_err(self.wrap())?;
        // SQLite reads the RFC 3339 stamp itself; NULL when it cannot.
        s.last_arrival_unix = match &s.last_arrival {
            Some(stamp) => tx
                .query_row("SELECT CAST(strftime('%s', ?1) AS INTEGER)", [stamp], |r| {
                    r.get(0)
                })
                .map_err(self.wrap())?,
            None => None,
        };
        s.findings = tx
            .prepare(
                "SELECT k.value, g.status, COUNT(*) FROM findings g, json_each(g.kinds) k
                 GROUP BY k.value, g.status ORDER BY k.value, g.status",
            )
            .and_then(|mut stmt| {
                stmt.query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))?
                    .collect::<std::result::Result<Vec<_>, _>>()
            })
            .map_err(self.wrap())?;
        s.outbox = tx
            .prepare("SELECT status, COUNT(*) FROM outbox GROUP BY status ORDER BY status")
            .and_then(|mut stmt| {
                stmt.query_map([], |r| Ok((r.get(0)?, r.get(1)?)))?
                    .collect::<std::result::Result<Vec<_>, _>>()
            })
            .map_err(self.wrap())?;
        tx.finish().map_err(self.wrap())?;
        Ok(s)
    }

    /// Every series with its current fit, ordered by key. Reads the series
    /// and fit rows (and one record row per series), never the records of
    /// a series, so it stays cheap on a large store.
    pub fn series_glance(&self) -> Result<Vec<SeriesGlance>> {
        self.glance_where(None)
    }

    /// The same for one series, by key; `None` if there is no such series.
    pub fn series_glance_of(&self, key: &str) -> Result<Option<SeriesGlance>> {
        Ok(self.glance_where(Some(key))?.pop())
    }

    fn glance_where(&self, key: Option<&str>) -> Result<Vec<SeriesGlance>> {
        let mut stmt = self
            .conn
            .prepare(
                "SELECT s.id, s.key, s.unit, s.transform, s.non_detects, s.latest_fit,
                        COALESCE(f.records, 0),
                        (SELECT COUNT(*) FROM findings g WHERE g.status = 'open' AND g.series_id = s.id),
                        (SELECT r.unit FROM records r WHERE r.id = s.latest_record),
                        f.version, f.created_at, f.n, f.level, f.slope, f.slope_ci_low,
                        f.slope_ci_high, f.slope_p, f.x_min, f.x_max, f.transform,
                        s.x_name, s.x_unit
                 FROM series s LEFT JOIN fits f ON f.id = s.latest_fit
                 WHERE ?1 IS NULL OR s.key = ?1
                 ORDER BY s.key",
            )
            .map_err(self.wrap())?;
        let rows = stmt
            .query_map([key], |r| {
                let fit = match r.get::<_, Option<i64>>(9)? {
                    Some(version) => Some(GlanceFit {
                        version,
                        created_at: r.get(10)?,
                        n: r.get(11)?,
                        level: r.get(12)?,
                        slope: r.get(13)?,
                        slope_ci_low: r.get(14)?,
                        slope_ci_high: r.get(15)?,
                        slope_p: r.get(16)?,
                        x_min: r.get(17)?,
                        x_max: r.get(18)?,
                        transform: r.get(19)?,
                    }),
                    None => None,
                };
                Ok(SeriesGlance {
                    row: ReportSeriesRow {
                        id: SeriesRowId(r.get(0)?),
                        key: r.get(1)?,
                        unit: r.get(2)?,
                        record_unit: r.get(8)?,
                        transform: r.get(3)?,
                        non_detects: r.get(4)?,
                        latest_fit: r.get(5)?,
                        records: r.get(6)?,
                        open_findings: r.get(7)?,
                        x_name: r.get(20)?,
                        x_unit: r.get(21)?,
                    },
                    fit,
                })
            })
            .map_err(self.wrap())?;
        rows.collect::<std::result::Result<Vec<_>, _>>()
            .map_err(self.wrap())
    }

    /// The newest `limit` open findings, newest first, and how many are
    /// open in all.
    pub fn open_findings(&self, limit: usize) -> Result<(Vec<OpenFinding>, i64)> {
        let tx = self.conn.unchecked_transaction().map_err(self.wrap())?;
        let total: i64 = tx
            .query_row(
                "SELECT COUNT(*) FROM findings WHERE status = 'open'",
                [],
                |r| r.get(0),
            )
            .map_err(self.wrap())?;
        let list = tx
            .prepare(
                "SELECT g.id, g.created_at, s.key, sf.name, g.kinds, g.severity, g.record_ids,
                        g.summary
                 FROM findings g LEFT JOIN series s ON s.id = g.series_id
                 LEFT JOIN source_files sf ON sf.id = g.file_id
                 WHERE g.status = 'open' ORDER BY g.id DESC LIMIT ?1",
            )
            .and_then(|mut stmt| {
                stmt.query_map([i64::try_from(limit).unwrap_or(i64::MAX)], |r| {
                    Ok(OpenFinding {
                        id: r.get(0)?,
                        created_at: r.get(1)?,
                        series: r.get(2)?,
                        file: r.get(3)?,
                        kinds: string_list(&r.get::<_, String>(4)?),
                        severity: r.get(5)?,
                        record_ids: string_list(&r.get::<_, String>(6)?),
                        summary: r.get(7)?,
                    })
                })?
                .collect::<std::result::Result<Vec<_>, _>>()
            })
            .map_err(self.wrap())?;
        tx.finish().map_err(self.wrap())?;
        Ok((list, total))
    }
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    #[test]
    fn an_empty_store_reads_as_zeros_and_refuses_writes() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("s.sqlite3");
        drop(Store::open(&path).unwrap());
        let store = Store::open_read_only(&path).unwrap();
        store.readable().unwrap();
        let s = store.metrics_snapshot().unwrap();
        assert_eq!(s, MetricsSnapshot::default());
        assert!(store.series_glance().unwrap().is_empty());
        assert_eq!(store.open_findings(10).unwrap(), (Vec::new(), 0));
        assert!(
            store
                .conn
                .execute("INSERT INTO store_revision (n) VALUES (1)", [])
                .is_err()
        );
    }

    #[test]
    fn a_missing_store_is_not_created() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("absent.sqlite3");
        assert!(Store::open_read_only(&path).is_err());
        assert!(!path.exists());
    }

    #[test]
    fn a_newer_schema_is_refused() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("s.sqlite3");
        drop(Store::open(&path).unwrap());
        let conn = Connection::open(&path).unwrap();
        conn.pragma_update(None, "user_version", 999).unwrap();
        drop(conn);
        assert!(matches!(
            Store::open_read_only(&path),
            Err(StoreError::TooNew { found: 999, .. })
        ));
    }
}
