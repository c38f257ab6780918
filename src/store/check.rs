//! The SQL behind `slopewarden verify`: everything it reads to walk the
//! audit chain, recheck the seals and replay every series' fits. Read-only.

use rusqlite::params;

use super::seal::{self, SealKind};
use super::verdicts::{VERDICT_COLUMNS, verdict_of};
use super::{FIT_CHAIN, RECORD_CHAIN, Result, Store, VerdictKind, VerdictRow};

/// A row whose state column holds a word no command writes: its id and
/// the word.
pub type UnknownWord = (i64, String);

/// A fit row as verify replays it.
#[derive(Debug, Clone, PartialEq)]
pub struct StoredFit {
    /// Row id.
    pub id: i64,
    /// Version number.
    pub version: i64,
    /// The file that triggered it.
    pub trigger_file: Option<i64>,
    /// The verdict that triggered it.
    pub trigger_verdict: Option<i64>,
    /// The window change that triggered it.
    pub trigger_window: Option<i64>,
    /// The analysis window it used (None: all points).
    pub window: Option<String>,
    /// Transform name.
    pub transform: String,
    /// Non-detect policy name.
    pub non_detects: String,
    /// Confidence level.
    pub level: f64,
    /// Points in the fit.
    pub n: i64,
    /// Slope, intercept, slope standard error, slope p, CI low, CI high, R².
    pub stats: [Option<f64>; 7],
    /// Theil-Sen slope and interval, when computed at this version.
    pub robust: Option<(f64, f64, f64)>,
    /// origin, mean_x, mean_y, sxx, sxy, syy, sse.
    pub moments: [f64; 7],
    /// The previous fit row.
    pub prev_fit: Option<i64>,
}

/// A record row as verify replays it.
#[derive(Debug, Clone, PartialEq)]
pub struct StoredPoint {
    /// Row id.
    pub id: i64,
    /// The file that brought it.
    pub file_id: i64,
    /// Version.
    pub version: i64,
    /// Status now.
    pub status: String,
    /// x, y as stored.
    pub x: f64,
    /// y (the limit of a non-detect).
    pub y: f64,
    /// Non-detect.
    pub censored: bool,
    /// Entered the fit on arrival.
    pub in_fit: bool,
    /// Its point on the fitted scale.
    pub fit_point: Option<(f64, f64)>,
    /// Excluded by a verdict.
    pub excluded: bool,
}

/// A series with everything its replay needs.
#[derive(Debug, Clone, PartialEq)]
pub struct SeriesReplay {
    /// Series key.
    pub key: String,
    /// Its newest fit row as the series table points to it.
    pub latest_fit: Option<i64>,
    /// Fits, by version.
    pub fits: Vec<StoredFit>,
    /// Records, by row id.
    pub records: Vec<StoredPoint>,
    /// The kept ln(y) screen state as stored (`series.log_screen`): its
    /// bytes, or the SQLite type it has instead of a blob.
    pub log_screen: Option<std::result::Result<Vec<u8>, &'static str>>,
}

impl Store {
    /// Recomputes the seals of every scope of one kind in `ids` from the
    /// rows as they are now, in one pass over each table.
    pub fn recompute_seals(
        &self,
        kind: SealKind,
        ids: &[i64],
    ) -> Result<std::collections::HashMap<i64, String>> {
        seal::compute_all(&self.conn, kind, ids).map_err(self.wrap())
    }

    /// Ids of every row of `table` (source_files, findings, verdicts).
    pub fn row_ids(&self, table: &str) -> Result<Vec<i64>> {
        let sql = match table {
            "source_files" => "SELECT id FROM source_files ORDER BY id",
            "findings" => "SELECT id FROM findings ORDER BY id",
            "verdicts" => "SELECT id FROM verdicts ORDER BY id",
            "series_windows" => "SELECT id FROM series_windows ORDER BY id",
            _ => unreachable!("BUG: row_ids of an unexpected table {table}"),
        };
        let mut stmt = self.conn.prepare(sql).map_err(self.wrap())?;
        let rows = stmt.query_map([], |r| r.get(0)).map_err(self.wrap())?;
        rows.collect::<rusqlite::Result<_>>().map_err(self.wrap())
    }

    /// Rows whose reference names a row that does not exist (SQLite's
    /// `PRAGMA foreign_key_check`): (table, row id, referenced table).
    pub fn dangling_references(&self) -> Result<Vec<(String, i64, String)>> {
        let mut stmt = self
            .conn
            .prepare("PRAGMA foreign_key_check")
            .map_err(self.wrap())?;
        let rows = stmt
            .query_map([], |r| {
                Ok((
                    r.get(0)?,
                    r.get::<_, Option<i64>>(1)?.unwrap_or(0),
                    r.get(2)?,
                ))
            })
            .map_err(self.wrap())?;
        rows.collect::<rusqlite::Result<_>>().map_err(self.wrap())
    }

    /// What SQLite's own check of the database file finds (`PRAGMA
    /// integrity_check`: pages, indexes, and rows breaking a NOT NULL or
    /// CHECK constraint, such as a state word no command writes); empty
    /// when it finds nothing. At most 100 messages, as SQLite gives them.
    pub fn file_problems(&self) -> Result<Vec<String>> {
        let mut stmt = self
            .conn
            .prepare("PRAGMA integrity_check")
            .map_err(self.wrap())?;
        let rows = stmt
            .query_map([], |r| r.get::<_, String>(0))
            .map_err(self.wrap())?;
        let found = rows
            .collect::<rusqlite::Result<Vec<_>>>()
            .map_err(self.wrap())?;
        Ok(found.into_iter().filter(|m| m != "ok").collect())
    }

    /// Record rows whose file is not among `files` and that no verdict in
    /// `verdicts` stored; fit rows triggered by neither; outbox rows of
    /// findings not in `findings`. Returns (table, row id) pairs.
    pub fn rows_outside(
        &self,
        files: &[i64],
        findings: &[i64],
        verdicts: &[i64],
        windows: &[i64],
    ) -> Result<Vec<(&'static str, i64)>> {
        let wrap = self.wrap();
        self.conn
            .execute_batch(
                "CREATE TEMP TABLE IF NOT EXISTS sealed (kind TEXT NOT NULL, id INTEGER NOT NULL, PRIMARY KEY (kind, id));
                 DELETE FROM temp.sealed;",
            )
            .map_err(&wrap)?;
        {
            let mut ins = self
                .conn
                .prepare("INSERT OR IGNORE INTO temp.sealed (kind, id) VALUES (?1, ?2)")
                .map_err(&wrap)?;
            for (kind, ids) in [
                ("file", files),
                ("finding", findings),
                ("verdict", verdicts),
                ("window", windows),
            ] {
                for id in ids {
                    ins.execute(params![kind, id]).map_err(&wrap)?;
                }
            }
        }
        let mut out = Vec::new();
        for (table, sql) in [
            (
                "records",
                "SELECT r.id FROM records r
                 WHERE NOT EXISTS (SELECT 1 FROM temp.sealed s WHERE s.kind = 'file' AND s.id = r.file_id)
                   AND NOT EXISTS (SELECT 1 FROM verdicts v JOIN temp.sealed s ON s.kind = 'verdict' AND s.id = v.id
                                   WHERE v.new_record_row = r.id)
                 ORDER BY r.id",
            ),
            (
                "fits",
                "SELECT f.id FROM fits f
                 WHERE NOT EXISTS (SELECT 1 FROM temp.sealed s WHERE s.kind = 'file' AND s.id = f.trigger_file)
                   AND NOT EXISTS (SELECT 1 FROM temp.sealed s WHERE s.kind = 'verdict' AND s.id = f.trigger_verdict)
                   AND NOT EXISTS (SELECT 1 FROM temp.sealed s WHERE s.kind = 'window' AND s.id = f.trigger_window)
                 ORDER BY f.id",
            ),
            (
                "quarantined_rows",
                "SELECT q.id FROM quarantined_rows q
                 WHERE NOT EXISTS (SELECT 1 FROM temp.sealed s WHERE s.kind = 'file' AND s.id = q.file_id)
                 ORDER BY q.id",
            ),
            (
                "outbox",
                "SELECT o.id FROM outbox o WHERE o.finding_id IS NOT NULL
                   AND NOT EXISTS (SELECT 1 FROM temp.sealed s WHERE s.kind = 'finding' AND s.id = o.finding_id)
                 ORDER BY o.id",
            ),
        ] {
            let mut stmt = self.conn.prepare(sql).map_err(&wrap)?;
            let ids = stmt
                .query_map([], |r| r.get::<_, i64>(0))
                .map_err(&wrap)?
                .collect::<rusqlite::Result<Vec<i64>>>()
                .map_err(&wrap)?;
            out.extend(ids.into_iter().map(|id| (table, id)));
        }
        Ok(out)
    }

    /// (record row, status, excluded) of every record row.
    pub fn record_flags(&self) -> Result<Vec<(i64, String, bool, i64)>> {
        let mut stmt = self
            .conn
            .prepare("SELECT id, status, excluded, version FROM records ORDER BY id")
            .map_err(self.wrap())?;
        let rows = stmt
            .query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?)))
            .map_err(self.wrap())?;
        rows.collect::<rusqlite::Result<_>>().map_err(self.wrap())
    }

    /// Every verdict, oldest first, as `verify` reads them: a row whose
    /// verdict is not a word slopewarden writes (only a write that got
    /// past the CHECK constraint can store one) comes apart as (id, word),
    /// so that it is reported instead of failing the read.
    pub fn verdicts_to_check(&self) -> Result<(Vec<VerdictRow>, Vec<UnknownWord>)> {
        let words = VerdictKind::ALL
            .iter()
            .map(|v| format!("'{}'", v.as_str()))
            .collect::<Vec<_>>()
            .join(", ");
        let mut known = self
            .conn
            .prepare(&format!(
                "SELECT {VERDICT_COLUMNS} FROM verdicts WHERE verdict IN ({words}) ORDER BY id"
            ))
            .map_err(self.wrap())?;
        let rows = known
            .query_map([], verdict_of)
            .and_then(|rows| rows.collect::<rusqlite::Result<Vec<_>>>())
            .map_err(self.wrap())?;
        let mut unknown = self
            .conn
            .prepare(&format!(
                "SELECT id, CAST(verdict AS TEXT) FROM verdicts
                 WHERE verdict IS NULL OR verdict NOT IN ({words}) ORDER BY id"
            ))
            .map_err(self.wrap())?;
        let odd = unknown
            .query_map([], |r| {
                Ok((
                    r.get(0)?,
                    r.get::<_, Option<String>>(1)?.unwrap_or_default(),
                ))
            })
            .and_then(|rows| rows.collect::<rusqlite::Result<Vec<_>>>())
            .map_err(self.wrap())?;
        Ok((rows, odd))
    }

    /// (finding id, status) of every finding.
    pub fn finding_statuses(&self) -> Result<Vec<(i64, String)>> {
        let mut stmt = self
            .conn
            .prepare("SELECT id, status FROM findings ORDER BY id")
            .map_err(self.wrap())?;
        let rows = stmt
            .query_map([], |r| Ok((r.get(0)?, r.get(1)?)))
            .map_err(self.wrap())?;
        rows.collect::<rusqlite::Result<_>>().map_err(self.wrap())
    }

    /// Series row ids, in order.
    pub fn series_ids(&self) -> Result<Vec<i64>> {
        let mut stmt = self
            .conn
            .prepare("SELECT id FROM series ORDER BY id")
            .map_err(self.wrap())?;
        let rows = stmt.query_map([], |r| r.get(0)).map_err(self.wrap())?;
        rows.collect::<rusqlite::Result<_>>().map_err(self.wrap())
    }

    /// Everything the replay of one series needs.
    pub fn series_replay(&self, series: i64) -> Result<SeriesReplay> {
        let wrap = self.wrap();
        type Heads = (
            String,
            Option<i64>,
            Option<i64>,
            Option<std::result::Result<Vec<u8>, &'static str>>,
        );
        let (key, latest_fit, latest_record, log_screen): Heads = self
            .conn
            .query_row(
                "SELECT key, latest_fit, latest_record, log_screen FROM series WHERE id = ?1",
                [series],
                |r| {
                    use rusqlite::types::ValueRef;
                    let kept = match r.get_ref(3)? {
                        ValueRef::Null => None,
                        ValueRef::Blob(b) => Some(Ok(b.to_vec())),
                        ValueRef::Text(_) => Some(Err("text")),
                        ValueRef::Integer(_) => Some(Err("integer")),
                        ValueRef::Real(_) => Some(Err("real")),
                    };
                    Ok((r.get(0)?, r.get(1)?, r.get(2)?, kept))
                },
            )
            .map_err(&wrap)?;
        let mut stmt = self
            .conn
            .prepare_cached(
                // Walked from the series' newest version by row id (the
                // tables are not indexed by series); a removed or unlinked
                // row breaks the walk, and the seals catch it.
                &format!(
                    "{FIT_CHAIN}SELECT f.id, f.version, f.trigger_file, f.trigger_verdict, f.transform, f.non_detects, f.level, f.n,
                        f.slope, f.intercept, f.slope_se, f.slope_p, f.slope_ci_low, f.slope_ci_high, f.r_squared,
                        f.theil_sen_slope, f.theil_sen_ci_low, f.theil_sen_ci_high,
                        f.origin, f.mean_x, f.mean_y, f.sxx, f.sxy, f.syy, f.sse, f.prev_fit, f.trigger_window, f.window
                 FROM chain c CROSS JOIN fits f ON f.id = c.id ORDER BY f.version, f.id"
                ),
            )
            .map_err(&wrap)?;
        let fits = stmt
            .query_map([latest_fit], |r| {
                Ok(StoredFit {
                    id: r.get(0)?,
                    version: r.get(1)?,
                    trigger_file: r.get(2)?,
                    trigger_verdict: r.get(3)?,
                    transform: r.get(4)?,
                    non_detects: r.get(5)?,
                    level: r.get(6)?,
                    n: r.get(7)?,
                    stats: [
                        r.get(8)?,
                        r.get(9)?,
                        r.get(10)?,
                        r.get(11)?,
                        r.get(12)?,
                        r.get(13)?,
                        r.get(14)?,
                    ],
                    robust: match (r.get(15)?, r.get(16)?, r.get(17)?) {
                        (Some(a), Some(b), Some(c)) => Some((a, b, c)),
                        _ => None,
                    },
                    moments: [
                        r.get(18)?,
                        r.get(19)?,
                        r.get(20)?,
                        r.get(21)?,
                        r.get(22)?,
                        r.get(23)?,
                        r.get(24)?,
                    ],
                    prev_fit: r.get(25)?,
                    trigger_window: r.get(26)?,
                    window: r.get(27)?,
                })
            })
            .map_err(&wrap)?
            .collect::<rusqlite::Result<Vec<_>>>()
            .map_err(&wrap)?;
        let mut stmt = self
            .conn
            .prepare_cached(
                &format!(
                    "{RECORD_CHAIN}SELECT r.id, r.file_id, r.version, r.status, r.x, r.y, r.censored, r.in_fit, r.fit_x, r.fit_y, r.excluded
                 FROM chain c CROSS JOIN records r ON r.id = c.id ORDER BY r.id"
                ),
            )
            .map_err(&wrap)?;
        let records = stmt
            .query_map([latest_record], |r| {
                Ok(StoredPoint {
                    id: r.get(0)?,
                    file_id: r.get(1)?,
                    version: r.get(2)?,
                    status: r.get(3)?,
                    x: r.get(4)?,
                    y: r.get(5)?,
                    censored: r.get(6)?,
                    in_fit: r.get(7)?,
                    fit_point: match (r.get(8)?, r.get(9)?) {
                        (Some(a), Some(b)) => Some((a, b)),
                        _ => None,
                    },
                    excluded: r.get(10)?,
                })
            })
            .map_err(&wrap)?
            .collect::<rusqlite::Result<Vec<_>>>()
            .map_err(&wrap)?;
        Ok(SeriesReplay {
            key,
            latest_fit,
            fits,
            records,
            log_screen,
        })
    }
}
