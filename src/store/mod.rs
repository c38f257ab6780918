//! The only SQL in slopewarden: a [`Store`] over SQLite (rusqlite, bundled).
//!
//! # Durability
//!
//! WAL journal with `synchronous = FULL`: a commit returns only after the
//! log is on disk, so a file leaves the inbox (archive move) only after its
//! records are durable, and a power cut cannot lose a record whose file was
//! already moved.
//!
//! # Migrations
//!
//! `migrations/NNNN_name.sql` are embedded in order; SQLite's `user_version`
//! counts how many have run. Pending ones apply in one exclusive
//! transaction at open. A database whose `user_version` is higher than this
//! binary knows is refused. Never reorder, edit or delete a shipped
//! migration.
//!
//! # Concurrency
//!
//! One writer (the daemon or `ingest`); readers (`status`, `history`) open
//! their own connection. WAL lets them read while the writer writes, and a
//! busy timeout rides out checkpoints.
//!
//! # Layout
//!
//! This file holds [`Store`] and [`Tx`] (one file's transaction) and the
//! plain row types; `rows` the record and fit rows queued and written in
//! multi-row INSERTs (`bulk` binds them in place); `behind` the writing
//! thread; `seal` and `audit` tamper evidence; `durable` and `checkpoint`
//! the WAL's syncs and checkpoints; `findings`, `verdicts`, `report`,
//! `metrics` and `check` the reads and writes of those parts.

mod audit;
mod behind;
mod bulk;
mod check;
mod checkpoint;
mod durable;
mod findings;
mod metrics;
mod report;
mod rows;
pub mod seal;
mod states;
mod verdicts;

use std::collections::HashSet;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, AtomicI64, Ordering};
use std::sync::{Arc, OnceLock};
use std::time::Duration;

use rusqlite::{Connection, OptionalExtension, params};
use thiserror::Error;

use crate::records::{Record, RecordError};
use crate::stats::{Arrival, LineFit, Moments, MomentsParts};

pub use audit::{AuditEntry, AuditKind, ChainBreak, verify_chain};
pub use behind::{Behind, write_behind};
pub use check::{SeriesReplay, StoredFit, StoredPoint};
pub use checkpoint::Checkpointer;
pub use durable::WalSync;
pub use findings::{FindingRow, NewFinding, NewMessage, OutboxMessage, RecordVersion};
pub use metrics::{GlanceFit, MetricsSnapshot, OpenFinding, SeriesGlance};
pub use report::{
    ReportFindingRow, ReportFitRow, ReportRecordRow, ReportSeriesRow, ReportVerdictRow,
};
use rows::*;
pub use rows::{FitBatch, IdCounters, RecordBatch};
pub use states::{FileOutcome, FindingStatus, RecordStatus, VerdictKind};
pub use verdicts::{NewVerdict, RecordState, ReviewTarget, SeriesAxis, VerdictRow};

/// The file stored with this content, if any.
fn file_by_hash(conn: &Connection, sha256: &str) -> rusqlite::Result<Option<FileRow>> {
    conn.prepare_cached("SELECT id, name, arrived_at, outcome FROM source_files WHERE sha256 = ?1")?
        .query_row([sha256], |r| {
            Ok(FileRow {
                id: FileId(r.get(0)?),
                name: r.get(1)?,
                arrived_at: r.get(2)?,
                outcome: r.get(3)?,
            })
        })
        .optional()
}

/// The embedded migrations, in order.
const MIGRATIONS: &[(&str, &str)] = &[
    (
        "0001_initial",
        include_str!("../../migrations/0001_initial.sql"),
    ),
    (
        "0002_findings",
        include_str!("../../migrations/0002_findings.sql"),
    ),
    (
        "0003_verdicts",
        include_str!("../../migrations/0003_verdicts.sql"),
    ),
    (
        "0004_log_screen",
        include_str!("../../migrations/0004_log_screen.sql"),
    ),
    (
        "0005_x_axis",
        include_str!("../../migrations/0005_x_axis.sql"),
    ),
];

/// Why the store failed.
#[derive(Debug, Error)]
pub enum StoreError {
    /// SQLite reported an error.
    #[error("database {path}: {}", sqlite_detail(source), path = path.display())]
    Sqlite {
        /// The database file.
        path: PathBuf,
        /// SQLite's error.
        source: rusqlite::Error,
    },
    /// The database was written by a newer slopewarden.
    #[error("database {path} has schema version {found}, but this slopewarden knows only up to {known}; run the newer slopewarden or restore a backup", path = path.display())]
    TooNew {
        /// The database file.
        path: PathBuf,
        /// Its user_version.
        found: i64,
        /// The highest this binary knows.
        known: i64,
    },
    /// The folder for the database could not be created.
    #[error("cannot create the folder for database {path}: {source}", path = path.display())]
    Folder {
        /// The database file.
        path: PathBuf,
        /// The operating system's reason.
        source: std::io::Error,
    },
    /// The thread writing a transaction's rows stopped (it panicked);
    /// the transaction is rolled back.
    #[error("the store's writing thread stopped; the file's transaction was rolled back")]
    WriterLost,
    /// A write of the transaction failed earlier (its error already
    /// reported); the transaction was rolled back.
    #[error("an earlier write of this transaction failed; it was rolled back")]
    Abandoned,
    /// A file computed while the one before it was committing assumed a
    /// store that is not the one it met (the file before failed, another
    /// process changed the store, or the file's content or records were
    /// stored already). Nothing of it was kept; it is computed again.
    #[error(
        "the store was not as assumed when the file was computed ({what}); its transaction was rolled back"
    )]
    NotAsAssumed {
        /// What differed.
        what: String,
    },
    /// Rows written without their ids were given others than the ones
    /// queued for them (see `rows::Given`; a defect, never expected): the
    /// transaction is rolled back rather than keep rows whose links point
    /// elsewhere.
    #[error(
        "rows were given other ids than queued ({what}); the file's transaction was rolled back and the file stays in the inbox: please report this"
    )]
    IdsOutOfStep {
        /// Which rows, and the ids.
        what: String,
    },
    /// A transaction committed, but the fsync that makes it durable
    /// failed: the file is not moved, and is taken again.
    #[error("database {path}: a committed transaction could not be made durable (fsync of the write-ahead log: {source}); check the disk; the file stays in the inbox and is taken again", path = path.display())]
    Durability {
        /// The database file.
        path: PathBuf,
        /// The operating system's reason.
        source: std::io::Error,
    },
}

type Result<T> = std::result::Result<T, StoreError>;

/// SQLite's error, and for a stored value no command writes (a state word
/// unknown to this build, text where a number belongs) what to do: only a
/// change made outside slopewarden leaves one.
fn sqlite_detail(e: &rusqlite::Error) -> String {
    match e {
        rusqlite::Error::FromSqlConversionFailure(..) | rusqlite::Error::InvalidColumnType(..) => {
            format!(
                "{e}; the database holds a value slopewarden does not write, so it was changed outside slopewarden: run `slopewarden verify`"
            )
        }
        _ => e.to_string(),
    }
}

/// Row id of a source file.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub struct FileId(pub i64);

/// Row id of a series.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub struct SeriesRowId(pub i64);

/// A file as recorded.
#[derive(Debug, Clone, PartialEq)]
pub struct FileRow {
    /// Row id.
    pub id: FileId,
    /// Path relative to the inbox when it arrived.
    pub name: String,
    /// When it arrived.
    pub arrived_at: String,
    /// What happened to it.
    pub outcome: FileOutcome,
}

/// A file about to be recorded.
#[derive(Debug, Clone, PartialEq)]
pub struct NewFile<'a> {
    /// Path relative to the inbox.
    pub name: &'a str,
    /// Hex SHA-256 of the content.
    pub sha256: &'a str,
    /// Size in bytes.
    pub size: u64,
    /// RFC 3339 UTC arrival time.
    pub arrived_at: &'a str,
    /// The feed whose layout was used.
    pub feed: &'a str,
}

/// What a file's ingest amounted to.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct FileCounts {
    /// Records stored for the first time.
    pub new: u64,
    /// Records already stored with identical values (not counted again).
    pub same: u64,
    /// Records whose id was stored with other values (kept as proposals).
    pub conflict: u64,
    /// Rows refused by validation.
    pub bad: u64,
}

/// What [`Tx::save_heads`] writes of a series: its newest fit version,
/// its current record and its ln(y) screen state.
#[derive(Debug, Clone)]
pub struct SeriesHeads {
    id: SeriesRowId,
    latest_fit: Option<i64>,
    latest_record: Option<i64>,
    log_screen: Option<Option<Moments>>,
}

impl SeriesHeads {
    /// The heads of `row`.
    pub fn of(row: &SeriesRow) -> Self {
        SeriesHeads {
            id: row.id,
            latest_fit: row.latest_fit,
            latest_record: row.latest_record,
            log_screen: row.log_screen,
        }
    }
}

/// A series and its running state.
#[derive(Debug, Clone, PartialEq)]
pub struct SeriesRow {
    /// Row id.
    pub id: SeriesRowId,
    /// The series key.
    pub key: String,
    /// Its unit, when configured.
    pub unit: Option<String>,
    /// Transform name (stats::Transform::name).
    pub transform: String,
    /// Non-detect policy as stored ("exclude", "substitute:0.5").
    pub non_detects: String,
    /// Co-moments of the points in the current fit.
    pub moments: Moments,
    /// The current fit version (0 before the first fit).
    pub fit_version: i64,
    /// n at the last robust-slope computation.
    pub robust_n: i64,
    /// When a record last arrived.
    pub last_arrival: Option<String>,
    /// Current record versions stored.
    pub records: i64,
    /// Non-detects among them.
    pub censored: i64,
    /// Row of the current fit version.
    pub latest_fit: Option<i64>,
    /// Row of the newest current record.
    pub latest_record: Option<i64>,
    /// Smallest and largest x in the fit (fitted scale), when it has points.
    pub x_span: Option<(f64, f64)>,
    /// The trend's hysteresis state: taken as significant.
    pub significant: bool,
    /// The analysis window of the current fit, in its stored text form
    /// (None: all points).
    pub window: Option<String>,
    /// The ln(y) screen's moments after the current fit: `Some(Some(m))`
    /// kept, `Some(None)` the screen is off (a y at or below zero), `None`
    /// not kept (rebuilt from the points when needed).
    pub log_screen: Option<Option<Moments>>,
}

/// Bytes of a kept ln(y) screen state: n and seven f64.
const LOG_SCREEN_BYTES: usize = 64;

/// The `series.log_screen` value of a kept (or off) ln(y) screen state.
pub fn encode_log_screen(state: Option<Option<Moments>>) -> Option<Vec<u8>> {
    state.map(|m| match m {
        None => Vec::new(),
        Some(m) => {
            let p = m.to_parts();
            let mut b = Vec::with_capacity(LOG_SCREEN_BYTES);
            b.extend_from_slice(&p.n.to_le_bytes());
            for v in [p.origin, p.mean_x, p.mean_y, p.sxx, p.sxy, p.syy, p.sse] {
                b.extend_from_slice(&v.to_le_bytes());
            }
            b
        }
    })
}

/// Reads a `series.log_screen` value; anything but an empty blob or 64
/// bytes is taken as not kept (and reported by `verify`).
pub fn decode_log_screen(bytes: Option<&[u8]>) -> Option<Option<Moments>> {
    match bytes? {
        [] => Some(None),
        b if b.len() == LOG_SCREEN_BYTES => {
            let word = |i: usize| {
                let mut w = [0u8; 8];
                w.copy_from_slice(&b[i * 8..i * 8 + 8]);
                w
            };
            let f = |i: usize| f64::from_le_bytes(word(i));
            Some(Some(Moments::from_parts(MomentsParts {
                n: u64::from_le_bytes(word(0)),
                origin: f(1),
                mean_x: f(2),
                mean_y: f(3),
                sxx: f(4),
                sxy: f(5),
                syy: f(6),
                sse: f(7),
            })))
        }
        _ => None,
    }
}

/// A stored record's current version, for duplicate and conflict checks.
#[derive(Debug, Clone, PartialEq)]
pub struct StoredRecord {
    /// Row id.
    pub row: i64,
    /// Version number.
    pub version: i64,
    /// Series key.
    pub series: String,
    /// x.
    pub x: f64,
    /// y (or the limit).
    pub y: f64,
    /// Whether censored.
    pub censored: bool,
}

/// How a record entered the store.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RecordPlacement<'a> {
    /// Whether it enters the fit, and its point on the fitted scale.
    pub fit_point: Option<(f64, f64)>,
    /// Its arrival in the series' streaming state, when it entered the fit.
    pub arrival: Option<Joined<'a>>,
}

/// A record's arrival in its series' fit, as its row stores it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Joined<'a> {
    /// The arrival itself.
    pub arrival: &'a Arrival,
    /// The fit version the record joins.
    pub fit_version: i64,
    /// [`Arrival::slope_p_without`], when the caller knows it already (the
    /// p of the fit before the record, kept from that fit's refit); else
    /// worked out from the arrival.
    pub slope_p_without: Option<Option<f64>>,
}

/// One fit-history row about to be written.
#[derive(Debug, Clone, PartialEq)]
pub struct NewFit<'a> {
    /// The series' state after this version (its id, version number,
    /// co-moments, counts); written with the row so that a restart resumes
    /// exactly.
    pub state: &'a SeriesRow,
    /// The file that triggered the refit.
    pub trigger_file: Option<FileId>,
    /// RFC 3339 UTC.
    pub created_at: &'a str,
    /// Transform name.
    pub transform: &'a str,
    /// Non-detect policy.
    pub non_detects: &'a str,
    /// Confidence level.
    pub level: f64,
    /// The fit, when one exists (n ≥ 3 and x varies).
    pub fit: Option<&'a LineFit>,
    /// Robust slope, when computed for this version.
    pub robust: Option<RobustRow>,
    /// Why a statistic is absent.
    pub note: Option<String>,
}

/// Theil-Sen and Mann-Kendall figures for a fit row.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RobustRow {
    /// Theil-Sen slope.
    pub slope: f64,
    /// Its interval.
    pub ci_low: f64,
    /// Its interval.
    pub ci_high: f64,
    /// Mann-Kendall S.
    pub mk_s: i64,
    /// Mann-Kendall two-sided p.
    pub mk_p: f64,
}

/// A fit-history row as read back.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct FitHistoryRow {
    /// Version number.
    pub version: i64,
    /// When it was computed.
    pub created_at: String,
    /// The file that triggered it.
    pub trigger_file: Option<String>,
    /// The verdict that triggered it, with its finding and what it said.
    pub trigger_verdict: Option<VerdictTrigger>,
    /// The window change that triggered it: its id and where it came from
    /// (`command` or `config`).
    pub trigger_window: Option<(i64, String)>,
    /// The analysis window of this version (None: all points).
    pub window: Option<String>,
    /// Points in the fit.
    pub n: i64,
    /// Slope.
    pub slope: Option<f64>,
    /// Lower CI end.
    pub slope_ci_low: Option<f64>,
    /// Upper CI end.
    pub slope_ci_high: Option<f64>,
    /// Two-sided p.
    pub slope_p: Option<f64>,
    /// R².
    pub r_squared: Option<f64>,
    /// Theil-Sen slope, when computed.
    pub theil_sen_slope: Option<f64>,
    /// Why something is absent.
    pub note: Option<String>,
}

/// A verdict that made a fit version.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct VerdictTrigger {
    /// Verdict id.
    pub id: i64,
    /// The finding it closed or reopened.
    pub finding: i64,
    /// What it said.
    pub verdict: VerdictKind,
}

/// One series in `status`.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct SeriesStatus {
    /// Series key.
    pub series: String,
    /// Records stored (current versions, non-detects included).
    pub records: i64,
    /// Non-detects among them.
    pub censored: i64,
    /// Points in the current fit.
    pub n: i64,
    /// Current slope.
    pub slope: Option<f64>,
    /// Lower CI end.
    pub slope_ci_low: Option<f64>,
    /// Upper CI end.
    pub slope_ci_high: Option<f64>,
    /// Two-sided p.
    pub slope_p: Option<f64>,
    /// Last arrival.
    pub last_arrival: Option<String>,
    /// Open findings.
    pub open_findings: i64,
    /// Residual SD of the current fit (fitted scale).
    pub residual_sd: Option<f64>,
    /// The fit's level at the mean of x (fitted scale).
    pub level: Option<f64>,
    /// The smallest relative error in y the outlier test would catch at the
    /// current scatter (filled by the caller, which knows the thresholds).
    pub min_detectable_relative_error: Option<f64>,
    /// Current fit version.
    pub fit_version: i64,
    /// Transform.
    pub transform: String,
    /// Non-detect policy.
    pub non_detects: String,
    /// Unit of y: the series' configured unit (the caller fills in that of
    /// the newest record where none is configured).
    pub unit: Option<String>,
    /// What the slope and its interval are in, such as "mg/L per year" or
    /// "ln(mg/kg) per m" (filled by the caller, as the report words it).
    pub slope_unit: Option<String>,
}

/// A point of a series' current fit, for `diagnostics`.
#[derive(Debug, Clone, PartialEq)]
pub struct FitPoint {
    /// Record id.
    pub record_id: String,
    /// x on the fitted scale.
    pub x: f64,
    /// y on the fitted scale.
    pub y: f64,
}

/// The store.
pub struct Store {
    /// The multi-row INSERTs of record and fit rows, prepared once per
    /// connection (a file's worth of rows took longer to prepare than to
    /// write). Declared before `conn`, so that they are finalized before
    /// it closes.
    bulk: BulkStatements,
    conn: Connection,
    path: PathBuf,
    /// Set by the background checkpointer when the log has grown long and
    /// it has just copied it: the writer then copies the few frames
    /// committed meanwhile, so that its next transaction starts the log
    /// over (see [`checkpoint`]).
    catch_up: Arc<AtomicBool>,
}

impl Store {
    /// Opens (creating if needed) the database at `path`, in WAL mode with
    /// full synchronisation, and applies pending migrations.
    pub fn open(path: &Path) -> Result<Store> {
        if let Some(dir) = path.parent().filter(|d| !d.as_os_str().is_empty()) {
            std::fs::create_dir_all(dir).map_err(|source| StoreError::Folder {
                path: path.to_path_buf(),
                source,
            })?;
        }
        let conn = Connection::open(path).map_err(|source| StoreError::Sqlite {
            path: path.to_path_buf(),
            source,
        })?;
        Store::setup(conn, path.to_path_buf())
    }

    /// An in-memory store, for tests.
    pub fn open_in_memory() -> Result<Store> {
        let path = PathBuf::from(":memory:");
        let conn = Connection::open_in_memory().map_err(|source| StoreError::Sqlite {
            path: path.clone(),
            source,
        })?;
        Store::setup(conn, path)
    }

    fn setup(mut conn: Connection, path: PathBuf) -> Result<Store> {
        let wrap = |source| StoreError::Sqlite {
            path: path.clone(),
            source,
        };
        conn.busy_timeout(Duration::from_secs(30)).map_err(wrap)?;
        // A file's transaction uses some forty distinct statements (records
        // and fits in chunks and singly, findings, messages, audit, seals);
        // with rusqlite's default of 16 they evicted each other and were
        // parsed again for every file (6 % of a large ingest, measured).
        conn.set_prepared_statement_cache_capacity(128);
        // Takes effect only when the database is created. Record and fit
        // rows are wide (30-odd columns); 16 KiB pages hold more of them,
        // so appends split and log fewer pages (measured: about 20 % off
        // the ingest time of a large backlog).
        conn.pragma_update(None, "page_size", 16_384)
            .map_err(wrap)?;
        conn.pragma_update(None, "journal_mode", "WAL")
            .map_err(wrap)?;
        conn.pragma_update(None, "synchronous", "FULL")
            .map_err(wrap)?;
        // References are enforced as rows are written in debug builds (every
        // test), and checked by `verify` (`PRAGMA foreign_key_check`) in all
        // builds. A release writer leaves them to `verify`: the checks cost
        // two index lookups per record row, about 3 % of a large ingest
        // (callgrind, 150 files of the 1,000,000-record workload).
        conn.pragma_update(
            None,
            "foreign_keys",
            if cfg!(debug_assertions) { "ON" } else { "OFF" },
        )
        .map_err(wrap)?;
        // A page cache of 16 MiB (SQLite's default is 2): the indexes a
        // file's transaction looks up stay in memory. 64 MiB measured no
        // faster on a million-record backlog, and a large delivery's
        // transaction fills whatever is allowed (peak RSS counts it).
        conn.pragma_update(None, "cache_size", -16_384)
            .map_err(wrap)?;
        conn.pragma_update(None, "wal_autocheckpoint", 20_000)
            .map_err(wrap)?;
        migrate(&mut conn, &path)?;
        Ok(Store {
            bulk: BulkStatements::default(),
            conn,
            path,
            catch_up: Arc::default(),
        })
    }

    /// Settings for a connection that ingests. A statement that changes
    /// several rows and may abort keeps a statement journal (the pages it
    /// changes, to undo just that statement); above 64 KiB SQLite spills
    /// it to a temporary file, which for a file's record batches meant some
    /// 60 page writes to `/var/tmp` per 1,000 records (strace), before they
    /// ran `OR FAIL` (see [`INSERT_RECORD_HEAD`]). Kept in memory for the
    /// statements that still keep one: each touches a few pages. Only the
    /// ingesting connection: readers' sorts of large results keep spilling
    /// to disk.
    ///
    /// CHECK constraints, like references, are enforced as rows are written
    /// in debug builds (every test) and left to `verify` (`PRAGMA
    /// integrity_check`, which reports any row breaking one) by a release
    /// writer. SQLite tests a CHECK's `IN` list of three or more words by
    /// building a temporary b-tree of the words for every row written: on a
    /// 1,000,000-record backlog that was 0.4 s of the writing thread's
    /// 3.5 s (three alternated runs each way, `benches/threads.py`). The
    /// words written come from the enums of [`states`] (bound values) or
    /// from SQL text that every test runs under the constraints.
    pub fn for_ingest(&mut self) -> Result<()> {
        self.conn
            .pragma_update(None, "temp_store", "MEMORY")
            .map_err(self.wrap())?;
        self.conn
            .pragma_update(None, "ignore_check_constraints", !cfg!(debug_assertions))
            .map_err(self.wrap())
    }

    fn wrap(&self) -> impl Fn(rusqlite::Error) -> StoreError + '_ {
        move |source| StoreError::Sqlite {
            path: self.path.clone(),
            source,
        }
    }

    /// The database file.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// The file already ingested with this content, if any.
    pub fn file_by_hash(&self, sha256: &str) -> Result<Option<FileRow>> {
        file_by_hash(&self.conn, sha256).map_err(self.wrap())
    }

    /// Starts the one transaction in which a file's records, refits and
    /// audit entries commit together or not at all.
    pub fn begin(&mut self) -> Result<Tx<'_>> {
        let mut tx = Tx {
            tx: &mut self.conn,
            path: self.path.clone(),
            pending_audit: std::cell::RefCell::new(None),
            ids: std::cell::RefCell::new(Arc::new(IdCounters::default())),
            first: seal::FirstIds::ALL,
            written: std::cell::RefCell::new(Vec::new()),
            recent: std::cell::RefCell::new(Vec::new()),
            findings_written: std::cell::RefCell::new(Vec::new()),
            bulk: std::cell::RefCell::new(&mut self.bulk),
            next_rowid: std::cell::Cell::default(),
            catch_up: &self.catch_up,
        };
        tx.renew()?;
        Ok(tx)
    }

    /// One audit entry in its own transaction (for events outside a file's
    /// transaction, such as a skipped duplicate file).
    pub fn audit(&mut self, at: &str, kind: AuditKind, subject: &str, detail: &str) -> Result<()> {
        let tx = self.begin()?;
        tx.append_audit(at, kind, subject, detail)?;
        tx.commit()
    }

    /// Every series with its current state, ordered by key.
    pub fn status(&self) -> Result<Vec<SeriesStatus>> {
        let mut stmt = self
            .conn
            .prepare(
                "SELECT s.key, COALESCE(f.n, 0), COALESCE(f.version, 0), f.created_at, s.transform,
                        s.non_detects, s.unit, COALESCE(f.records, 0), COALESCE(f.n_censored, 0),
                        f.slope, f.slope_ci_low, f.slope_ci_high, f.slope_p,
                        (SELECT COUNT(*) FROM findings g WHERE g.series_id = s.id AND g.status = 'open'),
                        f.residual_sd, f.mean_y
                 FROM series s LEFT JOIN fits f ON f.id = s.latest_fit
                 ORDER BY s.key",
            )
            .map_err(self.wrap())?;
        let rows = stmt
            .query_map([], |r| {
                Ok(SeriesStatus {
                    series: r.get(0)?,
                    n: r.get(1)?,
                    fit_version: r.get(2)?,
                    last_arrival: r.get(3)?,
                    transform: r.get(4)?,
                    non_detects: r.get(5)?,
                    unit: r.get(6)?,
                    records: r.get(7)?,
                    censored: r.get(8)?,
                    slope: r.get(9)?,
                    slope_ci_low: r.get(10)?,
                    slope_ci_high: r.get(11)?,
                    slope_p: r.get(12)?,
                    open_findings: r.get(13)?,
                    residual_sd: r.get(14)?,
                    level: r.get(15)?,
                    min_detectable_relative_error: None,
                    slope_unit: None,
                })
            })
            .map_err(self.wrap())?;
        rows.collect::<std::result::Result<Vec<_>, _>>()
            .map_err(self.wrap())
    }

    /// Every fit version of a series, oldest first; `None` if the series is unknown.
    pub fn history(&self, series: &str) -> Result<Option<Vec<FitHistoryRow>>> {
        let Some(id) = self.series_id(series)? else {
            return Ok(None);
        };
        let mut stmt = self
            .conn
            .prepare(
                "WITH RECURSIVE chain(id) AS (
                     SELECT latest_fit FROM series WHERE id = ?1
                     UNION ALL
                     SELECT f.prev_fit FROM chain c CROSS JOIN fits f ON f.id = c.id WHERE f.prev_fit IS NOT NULL
                 )
                 SELECT f.version, f.created_at, sf.name, f.n, f.slope, f.slope_ci_low, f.slope_ci_high,
                        f.slope_p, f.r_squared, f.theil_sen_slope, f.note, v.id, v.finding_id, v.verdict,
                        w.id, w.source, f.window
                 FROM chain c CROSS JOIN fits f ON f.id = c.id
                 LEFT JOIN source_files sf ON sf.id = f.trigger_file
                 LEFT JOIN verdicts v ON v.id = f.trigger_verdict
                 LEFT JOIN series_windows w ON w.id = f.trigger_window
                 ORDER BY f.version",
            )
            .map_err(self.wrap())?;
        let rows = stmt
            .query_map([id.0], |r| {
                Ok(FitHistoryRow {
                    version: r.get(0)?,
                    created_at: r.get(1)?,
                    trigger_file: r.get(2)?,
                    n: r.get(3)?,
                    slope: r.get(4)?,
                    slope_ci_low: r.get(5)?,
                    slope_ci_high: r.get(6)?,
                    slope_p: r.get(7)?,
                    r_squared: r.get(8)?,
                    theil_sen_slope: r.get(9)?,
                    note: r.get(10)?,
                    trigger_verdict: match (r.get(11)?, r.get(12)?, r.get(13)?) {
                        (Some(id), Some(finding), Some(verdict)) => Some(VerdictTrigger {
                            id,
                            finding,
                            verdict,
                        }),
                        _ => None,
                    },
                    trigger_window: match (r.get(14)?, r.get(15)?) {
                        (Some(id), Some(source)) => Some((id, source)),
                        _ => None,
                    },
                    window: r.get(16)?,
                })
            })
            .map_err(self.wrap())?;
        rows.collect::<std::result::Result<Vec<_>, _>>()
            .map(Some)
            .map_err(self.wrap())
    }

    fn series_id(&self, key: &str) -> Result<Option<SeriesRowId>> {
        self.conn
            .query_row("SELECT id FROM series WHERE key = ?1", [key], |r| {
                r.get(0).map(SeriesRowId)
            })
            .optional()
            .map_err(self.wrap())
    }

    /// The series row, if the series exists.
    pub fn series(&self, key: &str) -> Result<Option<SeriesRow>> {
        series_row(&self.conn, key).map_err(self.wrap())
    }

    /// The unit a series' stored records name (see [`series_unit`]).
    pub fn series_unit(&self, key: &str) -> Result<Option<String>> {
        series_unit(&self.conn, key).map_err(self.wrap())
    }

    /// The points of a series' current fit, in arrival order.
    pub fn fit_points(&self, key: &str) -> Result<Option<Vec<FitPoint>>> {
        let Some(row) = self.series(key)? else {
            return Ok(None);
        };
        let points = chain_points(&self.conn, row.latest_record).map_err(self.wrap())?;
        Ok(Some(
            points
                .into_iter()
                .map(|(record_id, x, y)| FitPoint { record_id, x, y })
                .collect(),
        ))
    }

    /// Counts for tests and `status`: (files, current records, proposed
    /// versions, quarantined rows, fits).
    pub fn totals(&self) -> Result<Totals> {
        self.conn
            .query_row(
                "SELECT (SELECT COUNT(*) FROM source_files),
                        (SELECT COUNT(*) FROM records WHERE status = 'current'),
                        (SELECT COUNT(*) FROM records WHERE status = 'proposed'),
                        (SELECT COUNT(*) FROM quarantined_rows),
                        (SELECT COUNT(*) FROM fits),
                        (SELECT COUNT(*) FROM source_files WHERE outcome = 'quarantined')",
                [],
                |r| {
                    Ok(Totals {
                        files: r.get(0)?,
                        records: r.get(1)?,
                        proposed: r.get(2)?,
                        quarantined_rows: r.get(3)?,
                        fits: r.get(4)?,
                        quarantined_files: r.get(5)?,
                    })
                },
            )
            .map_err(self.wrap())
    }

    /// Copies the whole database to `dest` with SQLite's online backup, in
    /// one step under a read transaction (a consistent snapshot; a running
    /// daemon keeps writing meanwhile). The copy is written beside `dest`,
    /// checked with `PRAGMA integrity_check`, synced, then renamed into
    /// place, so `dest` is never a partial file. Returns its size in bytes.
    pub fn backup_to(&self, dest: &Path) -> Result<u64> {
        let partial = dest.with_file_name(format!(
            ".{}.partial",
            dest.file_name()
                .map_or_else(|| "backup".into(), |n| n.to_string_lossy())
        ));
        let wrap_dest = |source| StoreError::Sqlite {
            path: dest.to_path_buf(),
            source,
        };
        let folder_err = |source| StoreError::Folder {
            path: dest.to_path_buf(),
            source,
        };
        let _ = std::fs::remove_file(&partial);
        {
            let mut copy = Connection::open(&partial).map_err(wrap_dest)?;
            {
                let backup =
                    rusqlite::backup::Backup::new(&self.conn, &mut copy).map_err(wrap_dest)?;
                backup
                    .run_to_completion(i32::MAX, Duration::ZERO, None)
                    .map_err(wrap_dest)?;
            }
            let check: String = copy
                .query_row("PRAGMA integrity_check", [], |r| r.get(0))
                .map_err(wrap_dest)?;
            if check != "ok" {
                let _ = std::fs::remove_file(&partial);
                return Err(StoreError::Sqlite {
                    path: dest.to_path_buf(),
                    source: rusqlite::Error::SqliteFailure(
                        rusqlite::ffi::Error::new(rusqlite::ffi::SQLITE_CORRUPT),
                        Some(format!("the copy does not pass integrity_check: {check}")),
                    ),
                });
            }
        }
        std::fs::File::open(&partial)
            .and_then(|f| f.sync_all())
            .map_err(folder_err)?;
        std::fs::rename(&partial, dest).map_err(folder_err)?;
        if let Some(dir) = dest.parent().filter(|d| !d.as_os_str().is_empty()) {
            let _ = std::fs::File::open(dir).and_then(|d| d.sync_all());
        }
        std::fs::metadata(dest).map(|m| m.len()).map_err(folder_err)
    }

    /// The detail of the newest audit entry of a kind.
    pub fn last_audit_detail(&self, kind: AuditKind) -> Result<Option<String>> {
        audit::last_detail_of(&self.conn, kind).map_err(self.wrap())
    }

    /// Every audit entry, oldest first.
    pub fn audit_entries(&self) -> Result<Vec<AuditEntry>> {
        audit::entries(&self.conn).map_err(self.wrap())
    }
}

/// Whole-store counts.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
pub struct Totals {
    /// Source files recorded.
    pub files: i64,
    /// Current record versions.
    pub records: i64,
    /// Proposed versions awaiting review (conflicts).
    pub proposed: i64,
    /// Rows refused by validation.
    pub quarantined_rows: i64,
    /// Fit-history rows.
    pub fits: i64,
    /// Files quarantined whole.
    pub quarantined_files: i64,
}

/// The transaction of one file.
pub struct Tx<'a> {
    /// The connection, inside `BEGIN IMMEDIATE` until [`Tx::commit`] or
    /// drop (which rolls back). Held by `&mut`, so that a transaction can
    /// move to another thread while its rows are written ([`Behind`]).
    tx: &'a mut Connection,
    path: PathBuf,
    pending_audit: std::cell::RefCell<Option<String>>,
    /// Row ids handed out for records and fits queued in this transaction.
    /// The writer holds the write lock from `begin`, so nobody else can
    /// take these ids, and queued rows can chain to each other before they
    /// are written.
    ids: std::cell::RefCell<Arc<IdCounters>>,
    /// The first ids this transaction can have written (bounds the seals'
    /// queries to its own rows).
    first: seal::FirstIds,
    /// The files inserted by this transaction and not sealed yet, with
    /// their rows encoded as they were written (usually one file).
    written: std::cell::RefCell<Vec<WrittenFile>>,
    /// Messages counted towards a recipient's hourly limit, per
    /// (recipient, since): counted once, then kept up to date as this
    /// transaction queues messages (nobody else writes meanwhile).
    recent: std::cell::RefCell<Vec<(String, i64, i64)>>,
    /// Findings inserted by this transaction and not sealed yet, with
    /// their rows encoded as they were written.
    findings_written: std::cell::RefCell<Vec<(i64, seal::FindingRows)>>,
    /// The connection's multi-row INSERTs of record and fit rows.
    bulk: std::cell::RefCell<&'a mut BulkStatements>,
    /// The id SQLite gives the next record row and the next fit row
    /// inserted without one (the table's highest id + 1), kept as rows are
    /// written (see [`rows::Given`]).
    next_rowid: std::cell::Cell<NextRowIds>,
    /// The store's flag from the background checkpointer.
    catch_up: &'a AtomicBool,
}

impl Tx<'_> {
    fn wrap(&self) -> impl Fn(rusqlite::Error) -> StoreError + '_ {
        move |source| StoreError::Sqlite {
            path: self.path.clone(),
            source,
        }
    }

    /// Records a file.
    pub fn insert_file(&self, f: &NewFile<'_>) -> Result<FileId> {
        self.tx
            .prepare_cached(
                "INSERT INTO source_files (name, sha256, size, arrived_at, feed, outcome,
                    records_new, records_same, records_conflict, records_bad)
                 VALUES (?1, ?2, ?3, ?4, ?5, 'ingested', 0, 0, 0, 0)",
            )
            .and_then(|mut s| {
                s.execute(params![
                    f.name,
                    f.sha256,
                    f.size as i64,
                    f.arrived_at,
                    f.feed
                ])
            })
            .map_err(self.wrap())?;
        let id = self.tx.last_insert_rowid();
        self.written.borrow_mut().push(WrittenFile {
            id,
            name: f.name.to_string(),
            sha256: f.sha256.to_string(),
            size: f.size as i64,
            arrived_at: f.arrived_at.to_string(),
            feed: f.feed.to_string(),
            outcome: FileOutcome::Ingested.as_str(),
            counts: [0; 4],
            detail: None,
            rows: seal::FileRows::default(),
        });
        Ok(FileId(id))
    }

    /// Sets a file's outcome and counts once its rows are processed.
    pub fn finish_file(
        &self,
        id: FileId,
        outcome: FileOutcome,
        counts: FileCounts,
        detail: Option<&str>,
    ) -> Result<()> {
        let counts = [
            counts.new as i64,
            counts.same as i64,
            counts.conflict as i64,
            counts.bad as i64,
        ];
        self.tx
            .prepare_cached(
                "UPDATE source_files SET outcome = ?2, records_new = ?3, records_same = ?4,
                    records_conflict = ?5, records_bad = ?6, detail = ?7 WHERE id = ?1",
            )
            .and_then(|mut s| {
                s.execute(params![
                    id.0,
                    outcome.as_str(),
                    counts[0],
                    counts[1],
                    counts[2],
                    counts[3],
                    detail
                ])
            })
            .map_err(self.wrap())?;
        if let Some(w) = self.written.borrow_mut().iter_mut().find(|w| w.id == id.0) {
            w.outcome = outcome.as_str();
            w.counts = counts;
            w.detail = detail.map(str::to_string);
        }
        Ok(())
    }

    /// The series row, if it exists.
    pub fn series(&self, key: &str) -> Result<Option<SeriesRow>> {
        series_row(self.tx, key).map_err(self.wrap())
    }

    /// The unit a series' stored records name (see [`series_unit`]).
    pub fn series_unit(&self, key: &str) -> Result<Option<String>> {
        series_unit(self.tx, key).map_err(self.wrap())
    }

    /// Creates a series with its settings.
    pub fn create_series(
        &self,
        key: &str,
        unit: Option<&str>,
        transform: &str,
        non_detects: &str,
        x_name: Option<&str>,
        x_unit: Option<&str>,
    ) -> Result<SeriesRow> {
        self.tx
            .prepare_cached(
                "INSERT INTO series (key, unit, transform, non_detects, x_name, x_unit) \
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6)",
            )
            .and_then(|mut s| s.execute(params![key, unit, transform, non_detects, x_name, x_unit]))
            .map_err(self.wrap())?;
        Ok(SeriesRow {
            id: SeriesRowId(self.tx.last_insert_rowid()),
            key: key.to_string(),
            unit: unit.map(str::to_string),
            transform: transform.to_string(),
            non_detects: non_detects.to_string(),
            moments: Moments::new(),
            fit_version: 0,
            robust_n: 0,
            last_arrival: None,
            records: 0,
            censored: 0,
            latest_fit: None,
            latest_record: None,
            x_span: None,
            significant: false,
            window: None,
            log_screen: None,
        })
    }

    /// Which of `ids` are already stored (in any version). Asked once per
    /// file, before its records are queued, so that new records can be
    /// written in multi-row statements and only resubmissions take the
    /// slow path.
    pub fn stored_ids<'s>(
        &self,
        ids: impl IntoIterator<Item = &'s str>,
    ) -> Result<HashSet<String>> {
        const CHUNK: usize = 100;
        static SQL: OnceLock<String> = OnceLock::new();
        let sql = SQL.get_or_init(|| {
            format!(
                "SELECT record_id FROM records WHERE version = 1 AND record_id IN ({})",
                vec!["?"; CHUNK].join(", ")
            )
        });
        let mut found = HashSet::new();
        let mut stmt = self.tx.prepare_cached(sql).map_err(self.wrap())?;
        let mut ids = ids.into_iter().peekable();
        while ids.peek().is_some() {
            for i in 1..=CHUNK {
                // Unfilled places stay NULL, which matches nothing.
                let id = ids.next();
                stmt.raw_bind_parameter(i, id).map_err(self.wrap())?;
            }
            let mut rows = stmt.raw_query();
            while let Some(row) = rows.next().map_err(self.wrap())? {
                found.insert(row.get::<_, String>(0).map_err(self.wrap())?);
            }
        }
        Ok(found)
    }

    /// The counters this transaction's record and fit row ids come from,
    /// for queuing rows while the transaction is away being written to.
    pub fn ids(&self) -> Arc<IdCounters> {
        Arc::clone(&self.ids.borrow())
    }

    /// Takes `ids` as this transaction's counters: rows queued with them
    /// ahead of the transaction (a file computed while the one before it
    /// was committing) and rows queued here then share one sequence. The
    /// caller has checked that they start at [`Tx::first_ids`].
    pub fn adopt_ids(&self, ids: Arc<IdCounters>) {
        *self.ids.borrow_mut() = ids;
    }

    /// The first record and fit row ids this transaction can write.
    pub fn first_ids(&self) -> (i64, i64) {
        (self.first.records, self.first.fits)
    }

    /// Queues `batch`'s `source[index]` with an id of this transaction
    /// ([`RecordBatch::queue_current`]) and writes the batch when full.
    pub fn queue_current(
        &self,
        batch: &mut RecordBatch,
        index: usize,
        series: SeriesRowId,
        file: FileId,
        placement: RecordPlacement<'_>,
        prev_in_series: Option<i64>,
    ) -> Result<i64> {
        let id = batch.queue_current(
            &self.ids.borrow(),
            index,
            series,
            file,
            placement,
            prev_in_series,
        );
        if batch.is_full() {
            self.flush_records(batch)?;
        }
        Ok(id)
    }

    /// Writes every queued record.
    pub fn flush_records(&self, batch: &mut RecordBatch) -> Result<()> {
        let source = &batch.source;
        match batch.encoded.take() {
            Some(encoded) => self.note_encoded(encoded, |rows| &mut rows.records),
            None => self.note_written(
                &batch.rows,
                |r| Some(r.file),
                |w, r| {
                    seal_columns(&mut w.records, r.id, |put| {
                        record_columns(&source[r.index], r, put)
                    });
                },
            ),
        }
        let mut next = self.next_rowid.get();
        let written = self.write_bulk(
            &batch.rows,
            BulkTable::Records,
            (|row: &PendingRecord| row.id, &mut next.records),
            |row, out| record_columns(&source[row.index], row, out),
        );
        self.next_rowid.set(next);
        batch.rows.clear();
        written
    }

    /// Appends rows encoded ahead of the write (`encode_seal` of a batch)
    /// to their file's `section`, when this transaction inserted the file.
    fn note_encoded(
        &self,
        (file, encoded): (i64, seal::SealRows),
        section: fn(&mut seal::FileRows) -> &mut seal::SealRows,
    ) {
        let mut written = self.written.borrow_mut();
        if let Some(w) = written.iter_mut().find(|w| w.id == file)
            && w.rows.keeping()
        {
            section(&mut w.rows).append(encoded);
            w.rows.check_budget();
        }
    }

    /// Encodes, for the seal of their file, those of `rows` that belong to
    /// a file this transaction inserted (`file_of`).
    fn note_written<R>(
        &self,
        rows: &[R],
        file_of: impl Fn(&R) -> Option<i64>,
        encode: impl Fn(&mut seal::FileRows, &R),
    ) {
        let mut written = self.written.borrow_mut();
        if written.is_empty() {
            return;
        }
        for r in rows {
            let Some(file) = file_of(r) else {
                continue;
            };
            if let Some(w) = written.iter_mut().find(|w| w.id == file)
                && w.rows.keeping()
            {
                encode(&mut w.rows, r);
                w.rows.check_budget();
            }
        }
    }

    /// Inserts `rows` in multi-row statements, their values bound in place
    /// by `columns`. The rows at the front whose ids continue the table's
    /// (`next`, `next + 1`, ...) go without their ids, which SQLite then
    /// gives them (see [`rows::Given`]); the others, if any, name theirs.
    /// `next` is left at the id SQLite gives the next row without one.
    fn write_bulk<'r, R>(
        &self,
        rows: &'r [R],
        table: BulkTable,
        (id_of, next): (impl Fn(&R) -> i64, &mut i64),
        columns: impl Fn(&'r R, &mut Values<'r, '_>),
    ) -> Result<()> {
        let continuing = rows
            .iter()
            .zip(*next..)
            .take_while(|(r, id)| id_of(r) == *id)
            .count();
        let (by_sqlite, named) = rows.split_at(continuing);
        self.write_bulk_as(by_sqlite, table, Given::BySqlite, &columns)?;
        if !by_sqlite.is_empty() {
            *next += continuing as i64;
            // SQLite gave the last of them the id it was queued with, or
            // the rows already chained to it would point elsewhere.
            let last = self.tx.last_insert_rowid();
            if last != *next - 1 {
                return Err(StoreError::IdsOutOfStep {
                    what: format!(
                        "{table:?} rows took ids up to {last}, not up to {} as queued",
                        *next - 1
                    ),
                });
            }
        }
        self.write_bulk_as(named, table, Given::Named, &columns)?;
        if let Some(highest) = named.iter().map(&id_of).max() {
            *next = (*next).max(highest + 1);
        }
        Ok(())
    }

    /// [`Tx::write_bulk`]'s statements for `rows`, with ids `given` so.
    fn write_bulk_as<'r, R>(
        &self,
        rows: &'r [R],
        table: BulkTable,
        given: Given,
        columns: impl Fn(&'r R, &mut Values<'r, '_>),
    ) -> Result<()> {
        if rows.is_empty() {
            return Ok(());
        }
        let (chunk, columns_per_row) = table.shape();
        let mut statements = self.bulk.borrow_mut();
        let mut bound: Vec<bulk::Val<'r>> = Vec::with_capacity(chunk * columns_per_row);
        let values = |row: &'r R, out: &mut Vec<bulk::Val<'r>>| {
            columns(
                row,
                &mut Values {
                    out,
                    without_id: given == Given::BySqlite,
                },
            )
        };
        let mut groups = rows.chunks_exact(chunk);
        if rows.len() >= chunk {
            let stmt = statements
                .get(self.tx, table, given, true)
                .map_err(self.wrap())?;
            for group in groups.by_ref() {
                bound.clear();
                for row in group {
                    values(row, &mut bound);
                }
                stmt.run(&bound).map_err(self.wrap())?;
            }
        }
        if !groups.remainder().is_empty() {
            let stmt = statements
                .get(self.tx, table, given, false)
                .map_err(self.wrap())?;
            for row in groups.remainder() {
                bound.clear();
                values(row, &mut bound);
                stmt.run(&bound).map_err(self.wrap())?;
            }
        }
        Ok(())
    }

    /// Stores a resubmission with other values as a proposed new version.
    pub fn insert_proposed(
        &self,
        record: &Record,
        series: SeriesRowId,
        file: FileId,
        version: i64,
    ) -> Result<i64> {
        let id = self.ids.borrow().record();
        // A rare path (a resubmission): one copy of the record is cheap.
        let mut batch = RecordBatch::new(Arc::new(vec![record.clone()]));
        batch.rows.push(PendingRecord {
            id,
            index: 0,
            version,
            status: RecordStatus::Proposed,
            series: series.0,
            file: file.0,
            fit_point: None,
            diagnostics: None,
            prev_in_series: None,
            attributes: attributes_json(record),
        });
        self.flush_records(&mut batch)?;
        Ok(id)
    }

    /// The current version of a record id, and the highest version number
    /// stored for it (proposals included).
    pub fn current_record(&self, record_id: &str) -> Result<Option<(StoredRecord, i64)>> {
        let current = self
            .tx
            .prepare_cached(
                "SELECT r.id, r.version, s.key, r.x, r.y, r.censored FROM records r
                 JOIN series s ON s.id = r.series_id WHERE r.record_id = ?1 AND r.status = 'current'",
            )
            .and_then(|mut s| {
                s.query_row([record_id], |r| {
                    Ok(StoredRecord {
                        row: r.get(0)?,
                        version: r.get(1)?,
                        series: r.get(2)?,
                        x: r.get(3)?,
                        y: r.get(4)?,
                        censored: r.get(5)?,
                    })
                })
                .optional()
            })
            .map_err(self.wrap())?;
        let Some(current) = current else {
            return Ok(None);
        };
        let max: i64 = self
            .tx
            .prepare_cached("SELECT MAX(version) FROM records WHERE record_id = ?1")
            .and_then(|mut s| s.query_row([record_id], |r| r.get(0)))
            .map_err(self.wrap())?;
        Ok(Some((current, max)))
    }

    /// Whether an identical proposal is already stored (a resubmitted
    /// conflicting file is not counted twice).
    pub fn has_proposal(&self, record_id: &str, x: f64, y: f64, censored: bool) -> Result<bool> {
        self.tx
            .prepare_cached(
                "SELECT 1 FROM records WHERE record_id = ?1 AND status = 'proposed' AND x = ?2 AND y = ?3 AND censored = ?4",
            )
            .and_then(|mut s| s.exists(params![record_id, x, y, censored]))
            .map_err(self.wrap())
    }

    /// Keeps a refused row with where and why.
    pub fn insert_bad_row(&self, file: FileId, e: &RecordError) -> Result<()> {
        self.tx
            .prepare_cached(
                "INSERT INTO quarantined_rows (file_id, line, col, field, record_id, reason, raw)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7)",
            )
            .and_then(|mut s| {
                s.execute(params![
                    file.0,
                    e.line as i64,
                    e.column.map(|c| c as i64),
                    e.field,
                    e.record_id,
                    e.reason,
                    e.raw
                ])
            })
            .map_err(self.wrap())?;
        if let Some(w) = self
            .written
            .borrow_mut()
            .iter_mut()
            .find(|w| w.id == file.0)
            && w.rows.keeping()
        {
            let id = self.tx.last_insert_rowid();
            w.rows
                .quarantined
                .row(id)
                .put(&id)
                .put(&file.0)
                .put(&(e.line as i64))
                .put(&e.column.map(|c| c as i64))
                .put(&e.field)
                .put(&e.record_id)
                .put(&e.reason)
                .put(&e.raw);
            w.rows.check_budget();
        }
        Ok(())
    }

    /// Queues a fit-history row and returns the row id it will have; rows
    /// are written in multi-row statements as the batch fills and by
    /// [`Tx::flush_fits`].
    pub fn queue_fit(&self, batch: &mut FitBatch, f: &NewFit<'_>) -> Result<i64> {
        let id = batch.queue(&self.ids.borrow(), f);
        if batch.is_full() {
            self.flush_fits(batch)?;
        }
        Ok(id)
    }

    /// Writes every queued fit row.
    pub fn flush_fits(&self, batch: &mut FitBatch) -> Result<()> {
        match batch.encoded.take() {
            Some(encoded) => self.note_encoded(encoded, |rows| &mut rows.fits),
            None => self.note_written(
                &batch.rows,
                |f| f.trigger_file,
                |w, f| {
                    seal_columns(&mut w.fits, f.id, |put| fit_columns(f, put));
                },
            ),
        }
        let mut next = self.next_rowid.get();
        let written = self.write_bulk(
            &batch.rows,
            BulkTable::Fits,
            (|row: &PendingFit| row.id, &mut next.fits),
            |row, out| fit_columns(row, out),
        );
        self.next_rowid.set(next);
        batch.rows.clear();
        written
    }

    /// The points of a series' current fit (fitted scale), in arrival
    /// order, walking back from `row.latest_record` (which may be ahead of
    /// the stored head inside this transaction).
    pub fn fit_points(&self, row: &SeriesRow) -> Result<Vec<(f64, f64)>> {
        let points = chain_points(self.tx, row.latest_record).map_err(self.wrap())?;
        Ok(points.into_iter().map(|(_, x, y)| (x, y)).collect())
    }

    /// Points the series at its newest fit version and current record.
    pub fn save_series_heads(&self, row: &SeriesRow) -> Result<()> {
        self.save_heads(&SeriesHeads::of(row))
    }

    /// [`Tx::save_series_heads`] from the heads alone.
    pub fn save_heads(&self, row: &SeriesHeads) -> Result<()> {
        self.tx
            .prepare_cached(
                "UPDATE series SET latest_fit = ?2, latest_record = ?3, log_screen = ?4 WHERE id = ?1",
            )
            .and_then(|mut s| {
                s.execute(params![
                    row.id.0,
                    row.latest_fit,
                    row.latest_record,
                    encode_log_screen(row.log_screen)
                ])
            })
            .map_err(self.wrap())?;
        Ok(())
    }

    /// Appends an audit entry, chained to the previous one by SHA-256.
    pub fn append_audit(
        &self,
        at: &str,
        kind: AuditKind,
        subject: &str,
        detail: &str,
    ) -> Result<()> {
        let prev = self.pending_audit.borrow().clone();
        let hash = audit::append(self.tx, prev.as_deref(), at, kind, subject, detail)
            .map_err(self.wrap())?;
        *self.pending_audit.borrow_mut() = Some(hash);
        Ok(())
    }

    /// The seal of `scope` as it stands in this transaction, as the text
    /// to append to the audit entry that vouches for it.
    ///
    /// A file inserted by this transaction is sealed from the values its
    /// rows were written with, kept as they were bound (no read-back: the
    /// read-back was about an eighth of a large ingest); debug builds also
    /// read the rows back and check that both agree. Other scopes, and a
    /// file sealed a second time in one transaction, are read back.
    pub fn seal(&self, scope: seal::SealScope) -> Result<String> {
        let hash = match scope {
            seal::SealScope::File(id) => {
                let taken = {
                    let mut written = self.written.borrow_mut();
                    let at = written.iter().position(|w| w.id == id);
                    at.map(|i| written.swap_remove(i))
                };
                match taken {
                    Some(mut w) if w.rows.keeping() => {
                        let hash = w.rows.seal(&mut w.own_row());
                        if cfg!(debug_assertions) {
                            let read_back =
                                seal::compute(self.tx, scope, self.first).map_err(self.wrap())?;
                            debug_assert_eq!(
                                hash, read_back,
                                "BUG: the seal of file {id} from the values written differs from the rows read back"
                            );
                        }
                        hash
                    }
                    // Not written here, or too large to keep: read back.
                    _ => seal::compute(self.tx, scope, self.first).map_err(self.wrap())?,
                }
            }
            seal::SealScope::Finding(id) => {
                let taken = {
                    let mut written = self.findings_written.borrow_mut();
                    let at = written.iter().position(|w| w.0 == id);
                    at.map(|i| written.swap_remove(i))
                };
                match taken {
                    Some((_, mut rows)) => {
                        let hash = rows.seal();
                        if cfg!(debug_assertions) {
                            let read_back =
                                seal::compute(self.tx, scope, self.first).map_err(self.wrap())?;
                            debug_assert_eq!(
                                hash, read_back,
                                "BUG: the seal of finding {id} from the values written differs from the rows read back"
                            );
                        }
                        hash
                    }
                    None => seal::compute(self.tx, scope, self.first).map_err(self.wrap())?,
                }
            }
            _ => seal::compute(self.tx, scope, self.first).map_err(self.wrap())?,
        };
        Ok(seal::seal_text(scope, &hash))
    }

    /// Commits: everything of the file is durable when this returns.
    pub fn commit(self) -> Result<()> {
        // A failed COMMIT leaves the transaction open; the drop rolls it back.
        self.tx.execute_batch("COMMIT").map_err(self.wrap())?;
        self.after_commit();
        Ok(())
    }

    /// Between transactions: the writer's part in keeping the log short
    /// (see [`checkpoint`]). Never fails the commit before it.
    fn after_commit(&self) {
        if self.catch_up.swap(false, Ordering::Relaxed) {
            checkpoint::catch_up(self.tx, &self.path);
        }
    }

    /// Begins the next transaction on this connection (after [`Tx::end`]),
    /// as [`Store::begin`] does: the write lock, the newest audit hash and
    /// the first free row ids read afresh.
    pub fn renew(&mut self) -> Result<()> {
        self.tx
            .execute_batch("BEGIN IMMEDIATE")
            .map_err(self.wrap())?;
        // The newest audit entry is read inside the write transaction, never
        // kept between transactions: the sender thread and the `review`
        // command append entries from their own connections.
        let last = audit::last_hash(self.tx).map_err(self.wrap())?;
        *self.pending_audit.get_mut() = last;
        let first = seal::FirstIds::next(self.tx).map_err(self.wrap())?;
        let ids = IdCounters::default();
        ids.records.store(first.records, Ordering::Relaxed);
        ids.fits.store(first.fits, Ordering::Relaxed);
        *self.ids.get_mut() = Arc::new(ids);
        self.next_rowid.set(NextRowIds {
            records: first.records,
            fits: first.fits,
        });
        self.first = first;
        self.written.get_mut().clear();
        self.recent.get_mut().clear();
        self.findings_written.get_mut().clear();
        Ok(())
    }

    /// Ends the transaction and keeps the connection for [`Tx::renew`]:
    /// commits it, or rolls it back when `commit` is false. A failed
    /// COMMIT is rolled back before its error is returned.
    pub fn end(&mut self, commit: bool) -> Result<()> {
        if self.tx.is_autocommit() {
            return Ok(());
        }
        if commit {
            let done = self.tx.execute_batch("COMMIT").map_err(self.wrap());
            if done.is_err() && !self.tx.is_autocommit() {
                let _ = self.tx.execute_batch("ROLLBACK");
            }
            if done.is_ok() {
                self.after_commit();
            }
            done
        } else {
            self.tx.execute_batch("ROLLBACK").map_err(self.wrap())
        }
    }

    /// The file already ingested with this content, if any (as
    /// [`Store::file_by_hash`], inside the transaction).
    pub fn file_by_hash(&self, sha256: &str) -> Result<Option<FileRow>> {
        file_by_hash(self.tx, sha256).map_err(self.wrap())
    }
}

impl Drop for Tx<'_> {
    fn drop(&mut self) {
        if !self.tx.is_autocommit() {
            // Nothing of a file's transaction is kept unless it commits.
            let _ = self.tx.execute_batch("ROLLBACK");
        }
    }
}

/// How far back [`series_unit`] looks for a record naming a known unit.
const UNIT_LOOKBACK: i64 = 1_000;

/// The unit-table unit named by a series' newest current record that names
/// one (its records' unit when none is configured: the ingest converts
/// later records to it or sets them aside), among its last
/// [`UNIT_LOOKBACK`] records, newest first; `None` for a new series or one
/// whose records name no unit the table knows.
fn series_unit(conn: &Connection, key: &str) -> rusqlite::Result<Option<String>> {
    let mut stmt = conn.prepare_cached(
        "WITH RECURSIVE chain(unit, prev, depth) AS (
             SELECT r.unit, r.prev_in_series, 1 FROM series s
             JOIN records r ON r.id = s.latest_record WHERE s.key = +?1
             UNION ALL
             SELECT r.unit, r.prev_in_series, c.depth + 1 FROM chain c
             JOIN records r ON r.id = c.prev WHERE c.depth < ?2
         )
         SELECT unit FROM chain WHERE unit IS NOT NULL",
    )?;
    // Rows come as the walk goes: it stops at the first known unit.
    let mut rows = stmt.query(params![key, UNIT_LOOKBACK])?;
    while let Some(row) = rows.next()? {
        let unit: String = row.get(0)?;
        if crate::records::units::is_known(&unit) {
            return Ok(Some(unit));
        }
    }
    Ok(None)
}

fn series_row(conn: &Connection, key: &str) -> rusqlite::Result<Option<SeriesRow>> {
    // `+?1`, not `?1`: with a bare parameter SQLite re-parsed this statement
    // for every new key (its planner weighs the bound value), about 250,000
    // instructions a lookup. The index is used either way.
    conn.prepare_cached(
        "SELECT s.id, s.key, s.unit, s.transform, s.non_detects, COALESCE(f.n, 0), COALESCE(f.origin, 0),
                COALESCE(f.mean_x, 0), COALESCE(f.mean_y, 0), COALESCE(f.sxx, 0), COALESCE(f.sxy, 0),
                COALESCE(f.syy, 0), COALESCE(f.sse, 0), COALESCE(f.version, 0), COALESCE(f.robust_n, 0),
                f.created_at, COALESCE(f.records, 0), COALESCE(f.n_censored, 0), s.latest_fit, s.latest_record,
                f.x_min, f.x_max, COALESCE(f.significant, 0), f.window, s.log_screen
         FROM series s LEFT JOIN fits f ON f.id = s.latest_fit
         WHERE s.key = +?1",
    )?
    .query_row([key], |r| {
        Ok(SeriesRow {
            id: SeriesRowId(r.get(0)?),
            key: r.get(1)?,
            unit: r.get(2)?,
            transform: r.get(3)?,
            non_detects: r.get(4)?,
            moments: Moments::from_parts(MomentsParts {
                n: r.get::<_, i64>(5)?.max(0) as u64,
                origin: r.get(6)?,
                mean_x: r.get(7)?,
                mean_y: r.get(8)?,
                sxx: r.get(9)?,
                sxy: r.get(10)?,
                syy: r.get(11)?,
                sse: r.get(12)?,
            }),
            fit_version: r.get(13)?,
            robust_n: r.get(14)?,
            last_arrival: r.get(15)?,
            records: r.get(16)?,
            censored: r.get(17)?,
            latest_fit: r.get(18)?,
            latest_record: r.get(19)?,
            x_span: match (r.get::<_, Option<f64>>(20)?, r.get::<_, Option<f64>>(21)?) {
                (Some(a), Some(b)) => Some((a, b)),
                _ => None,
            },
            significant: r.get(22)?,
            window: r.get(23)?,
            // Anything but a blob is taken as not kept (`verify` names it).
            log_screen: match r.get_ref(24)? {
                rusqlite::types::ValueRef::Blob(b) => decode_log_screen(Some(b)),
                _ => None,
            },
        })
    })
    .optional()
}

/// The in-fit points of a series, oldest first, by walking its record chain
/// back from the record `head`.
fn chain_rows(conn: &Connection, head: Option<i64>) -> rusqlite::Result<Vec<(i64, f64, f64)>> {
    chain_in_fit(conn, head, "id")
}

fn chain_points(conn: &Connection, head: Option<i64>) -> rusqlite::Result<Vec<(String, f64, f64)>> {
    chain_in_fit(conn, head, "record_id")
}

/// The ids of a series' records from the record `?1` back to its first,
/// through `prev_in_series`, as the table `chain(id)` (the records table
/// is not indexed by series: the walk looks rows up by id).
pub(super) const RECORD_CHAIN: &str = "WITH RECURSIVE chain(id) AS (
     SELECT ?1 WHERE ?1 IS NOT NULL
     UNION ALL
     SELECT r.prev_in_series FROM chain c CROSS JOIN records r ON r.id = c.id WHERE r.prev_in_series IS NOT NULL
 ) ";

/// The same for a series' fit versions from the fit `?1`, through `prev_fit`.
pub(super) const FIT_CHAIN: &str = "WITH RECURSIVE chain(id) AS (
     SELECT ?1 WHERE ?1 IS NOT NULL
     UNION ALL
     SELECT f.prev_fit FROM chain c CROSS JOIN fits f ON f.id = c.id WHERE f.prev_fit IS NOT NULL
 ) ";

/// The in-fit points of a series (fitted scale) with the records' `key`
/// column, oldest row first, walking its chain back from `head`.
fn chain_in_fit<K: rusqlite::types::FromSql>(
    conn: &Connection,
    head: Option<i64>,
    key: &str,
) -> rusqlite::Result<Vec<(K, f64, f64)>> {
    let Some(head) = head else {
        return Ok(Vec::new());
    };
    let mut stmt = conn.prepare_cached(&format!(
        "{RECORD_CHAIN}SELECT r.{key}, r.fit_x, r.fit_y FROM chain c CROSS JOIN records r ON r.id = c.id
         WHERE r.status = 'current' AND r.in_fit = 1 AND r.excluded = 0 ORDER BY r.id"
    ))?;
    let rows = stmt.query_map([head], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))?;
    rows.collect()
}

fn migrate(conn: &mut Connection, path: &Path) -> Result<()> {
    let wrap = |source| StoreError::Sqlite {
        path: path.to_path_buf(),
        source,
    };
    let known = MIGRATIONS.len() as i64;
    // A reader (`status` beside a running daemon) must not take the write
    // lock: look first, and only lock when there is something to apply.
    let current: i64 = conn
        .query_row("PRAGMA user_version", [], |r| r.get(0))
        .map_err(wrap)?;
    if current == known {
        return Ok(());
    }
    let tx = conn
        .transaction_with_behavior(rusqlite::TransactionBehavior::Exclusive)
        .map_err(wrap)?;
    let version: i64 = tx
        .query_row("PRAGMA user_version", [], |r| r.get(0))
        .map_err(wrap)?;
    if version > known {
        return Err(StoreError::TooNew {
            path: path.to_path_buf(),
            found: version,
            known,
        });
    }
    for (_, sql) in &MIGRATIONS[version as usize..] {
        tx.execute_batch(sql).map_err(wrap)?;
    }
    tx.pragma_update(None, "user_version", known)
        .map_err(wrap)?;
    tx.commit().map_err(wrap)
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    #[test]
    fn migrating_twice_is_harmless() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("db.sqlite3");
        drop(Store::open(&path).unwrap());
        let store = Store::open(&path).unwrap();
        assert_eq!(store.totals().unwrap().files, 0);
    }

    #[test]
    fn refuses_a_database_from_a_newer_version() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("db.sqlite3");
        drop(Store::open(&path).unwrap());
        let conn = Connection::open(&path).unwrap();
        conn.pragma_update(None, "user_version", 99).unwrap();
        drop(conn);
        let err = Store::open(&path).err().unwrap();
        assert!(matches!(err, StoreError::TooNew { found: 99, .. }), "{err}");
        assert!(err.to_string().contains("schema version 99"));
    }

    use crate::records::{Measure, SeriesId};
    use crate::stats::SeriesState;
    use seal::{SealKind, SealScope};

    // Values below are invented to be awkward for the seals: NaN, -0.0,
    // None, empty and non-ASCII text, rows written out of id order.

    fn record(id: &str, x: f64, y: Measure, line: u64) -> Record {
        Record {
            record_id: id.to_string(),
            series: SeriesId("MW-Ü/nitrate".to_string()),
            x,
            y,
            unit: Some("µg/L".to_string()),
            unit_as_written: None,
            sampled_at: Some(String::new()),
            note: None,
            attributes: Vec::new(),
            line,
            raw: format!("{id},{x},…"),
        }
    }

    fn bad_row(line: u64, field: Option<&str>, reason: &str) -> RecordError {
        RecordError {
            line,
            column: field.map(|_| 3),
            field: field.map(str::to_string),
            record_id: Some(String::new()),
            reason: reason.to_string(),
            raw: String::new(),
        }
    }

    fn new_file<'a>(name: &'a str, sha: &'a str) -> NewFile<'a> {
        NewFile {
            name,
            sha256: sha,
            size: 1 << 40,
            arrived_at: "2026-12-02T00:00:00Z",
            feed: "lab—ü",
        }
    }

    /// Seals `File(id)` in `tx`, checking the text against the seal of the
    /// rows read back in the transaction; returns the hash.
    fn seal_checked(tx: &Tx<'_>, id: FileId) -> String {
        let scope = SealScope::File(id.0);
        let read_back = seal::compute(tx.tx, scope, tx.first).unwrap();
        let text = tx.seal(scope).unwrap();
        assert_eq!(text, seal::seal_text(scope, &read_back));
        read_back
    }

    /// A fit row for `state` triggered by `file`.
    fn new_fit<'a>(
        state: &'a SeriesRow,
        file: Option<FileId>,
        fit: Option<&'a LineFit>,
    ) -> NewFit<'a> {
        NewFit {
            state,
            trigger_file: file,
            created_at: "2026-12-02T00:00:00Z",
            transform: "log",
            non_detects: "substitute:0.5",
            level: 0.95,
            fit,
            robust: None,
            note: None,
        }
    }

    #[test]
    fn a_file_sealed_from_its_written_values_matches_its_rows_read_back() {
        let mut store = Store::open_in_memory().unwrap();
        let tx = store.begin().unwrap();
        let file = tx
            .insert_file(&new_file("Brunnen Ü 7 (März).csv", "ab12"))
            .unwrap();
        tx.insert_bad_row(file, &bad_row(2, None, "kein Wert — leer"))
            .unwrap();
        let mut row = tx
            .create_series("MW-Ü/nitrate", Some("µg/L"), "log", "exclude", None, None)
            .unwrap();
        let mut state = SeriesState::new();
        let mut arrivals = Vec::new();
        for (x, y) in [(2020.0, 1.0), (2021.0, -0.0), (2022.0, 3.5), (2023.0, 3.0)] {
            arrivals.push(state.add(x, y).unwrap());
        }
        let mut owned = Vec::new();
        for i in 0..80u32 {
            let x = if i == 0 {
                -0.0
            } else {
                2020.0 + f64::from(i) / 4.0
            };
            let y = match i % 3 {
                0 => Measure::Detected(-0.0),
                1 => Measure::NonDetect { limit: 0.5 },
                _ => Measure::Detected(f64::from(i) * 1e-300),
            };
            let mut r = record(&format!("R-{i}"), x, y, u64::from(i) + 2);
            if i % 4 == 0 {
                r.attributes = vec![
                    ("Tiefe".to_string(), "3 m".to_string()),
                    ("leer".to_string(), String::new()),
                ];
                r.note = Some("Probe trüb ☁".to_string());
                r.unit = None;
            }
            owned.push(r);
        }
        let owned = Arc::new(owned);
        let mut batch = RecordBatch::new(Arc::clone(&owned));
        let mut prev = None;
        for (i, r) in owned.iter().enumerate() {
            if i % 9 == 4 {
                // A conflict in the middle of a batch: written at once,
                // with an id after the queued rows written later.
                tx.insert_proposed(r, row.id, file, 2).unwrap();
                continue;
            }
            if i % 17 == 5 {
                tx.insert_bad_row(file, &bad_row(90 + i as u64, Some("wert"), "ungültig"))
                    .unwrap();
            }
            let arrival = &arrivals[i % arrivals.len()];
            let placement = match i % 5 {
                0 => RecordPlacement {
                    fit_point: Some((-0.0, f64::NAN)),
                    arrival: None,
                },
                1 => RecordPlacement {
                    fit_point: None,
                    arrival: None,
                },
                _ => RecordPlacement {
                    fit_point: Some((r.x, 0.25)),
                    arrival: Some(Joined {
                        arrival,
                        fit_version: 7,
                        slope_p_without: None,
                    }),
                },
            };
            if i % 11 == 3 {
                // Diagnostics no measure yields today, written as bound.
                let id = tx.ids.borrow().record();
                batch.rows.push(PendingRecord {
                    id,
                    index: i,
                    version: 1,
                    status: RecordStatus::Current,
                    series: row.id.0,
                    file: file.0,
                    fit_point: Some((0.0, -0.0)),
                    diagnostics: Some(DiagnosticsRow {
                        joined_fit: 0,
                        leverage: Some(f64::NAN),
                        standardized: Some(-0.0),
                        studentized: Some(f64::INFINITY),
                        cooks: Some(f64::NEG_INFINITY),
                        dffits: None,
                        dfbetas_intercept: Some(1e300),
                        dfbetas_slope: Some(-5e-324),
                        covariance_ratio: Some(2.0),
                        prediction_t: Some(-f64::NAN),
                        slope_without: Some(0.0),
                        slope_p_without: None,
                        undefined: Some(""),
                    }),
                    prev_in_series: prev,
                    attributes: attributes_json(r),
                });
                prev = Some(id);
                continue;
            }
            prev = Some(
                tx.queue_current(&mut batch, i, row.id, file, placement, prev)
                    .unwrap(),
            );
        }
        tx.flush_records(&mut batch).unwrap();
        row.moments = *state.moments();
        row.latest_record = prev;
        let mut line = LineFit::from_moments(state.moments(), 0.95).unwrap();
        line.slope_t = Some(f64::NAN);
        line.r_squared = Some(-0.0);
        line.intercept = -0.0;
        let mut fits = FitBatch::new();
        for v in 0..20 {
            row.fit_version = v + 1;
            row.x_span = (v % 2 == 0).then_some((-0.0, 3.0));
            row.significant = v % 3 == 0;
            row.window = (v % 4 == 1).then(|| "last:40 — ü".to_string());
            let mut f = new_fit(&row, Some(file), (v % 2 == 1).then_some(&line));
            f.robust = (v % 5 == 0).then_some(RobustRow {
                slope: -0.0,
                ci_low: f64::NAN,
                ci_high: 4.0,
                mk_s: -12,
                mk_p: 1.0,
            });
            f.note = (v % 3 == 1).then(|| "kein Trend — zu wenig".to_string());
            row.latest_fit = Some(tx.queue_fit(&mut fits, &f).unwrap());
        }
        // A fit triggered by no file is no part of the file's seal.
        tx.queue_fit(&mut fits, &new_fit(&row, None, None)).unwrap();
        tx.flush_fits(&mut fits).unwrap();
        tx.insert_bad_row(file, &bad_row(200, Some("ö"), ""))
            .unwrap();
        tx.finish_file(
            file,
            FileOutcome::Partial,
            FileCounts {
                new: 60,
                same: 0,
                conflict: 9,
                bad: 7,
            },
            Some("teilweise — ü"),
        )
        .unwrap();
        // The seal below is computed from these, not read back.
        let kept = tx.written.borrow()[0].rows.records.len();
        assert_eq!(kept, owned.len());
        let hash = seal_checked(&tx, file);
        tx.commit().unwrap();
        // `verify` recomputes the same seal from the whole store.
        let again = store.recompute_seals(SealKind::File, &[file.0]).unwrap();
        assert_eq!(again[&file.0], hash);
        let totals = store.totals().unwrap();
        assert_eq!(totals.proposed, 9);
        assert!(totals.quarantined_rows >= 5);
    }

    /// `batch`'s records queued as current versions of `series` (written
    /// as the batch fills), for the id tests; returns the ids they were
    /// queued with.
    fn queue_plain(
        tx: &Tx<'_>,
        batch: &mut RecordBatch,
        series: SeriesRowId,
        file: FileId,
    ) -> Vec<i64> {
        (0..batch.source.len())
            .map(|i| {
                tx.queue_current(
                    batch,
                    i,
                    series,
                    file,
                    RecordPlacement {
                        fit_point: None,
                        arrival: None,
                    },
                    None,
                )
                .unwrap()
            })
            .collect()
    }

    fn plain_records(prefix: &str, count: u32) -> Arc<Vec<Record>> {
        Arc::new(
            (0..count)
                .map(|i| {
                    let id = format!("{prefix}-{i}");
                    record(
                        &id,
                        2020.0 + f64::from(i),
                        Measure::Detected(1.0),
                        u64::from(i) + 2,
                    )
                })
                .collect(),
        )
    }

    /// A file and a series to queue records of, for the id tests.
    fn file_and_series(tx: &Tx<'_>) -> (FileId, SeriesRow) {
        let file = tx.insert_file(&new_file("a.csv", "aa")).unwrap();
        let row = tx
            .create_series("MW-Ü/nitrate", None, "none", "exclude", None, None)
            .unwrap();
        (file, row)
    }

    /// The row ids of the records whose record id is `like`, in order.
    fn row_ids_of(tx: &Tx<'_>, like: &str) -> Vec<i64> {
        ids_of(tx, like).into_iter().map(|r| r.0).collect()
    }

    fn ids_of(tx: &Tx<'_>, like: &str) -> Vec<(i64, String)> {
        let mut stmt = tx
            .tx
            .prepare("SELECT id, record_id FROM records WHERE record_id LIKE ?1 ORDER BY id")
            .unwrap();
        stmt.query_map([like], |r| Ok((r.get(0)?, r.get(1)?)))
            .unwrap()
            .collect::<rusqlite::Result<_>>()
            .unwrap()
    }

    #[test]
    fn rows_continuing_the_table_ids_go_without_them_and_keep_the_queued_ones() {
        let mut store = Store::open_in_memory().unwrap();
        let tx = store.begin().unwrap();
        let (file, row) = file_and_series(&tx);
        // Two whole statements and six rows one by one, all continuing.
        let mut batch = RecordBatch::new(plain_records("A", 70));
        let queued = queue_plain(&tx, &mut batch, row.id, file);
        tx.flush_records(&mut batch).unwrap();
        let stored = ids_of(&tx, "A-%");
        assert_eq!(row_ids_of(&tx, "A-%"), queued);
        assert_eq!(stored[0].1, "A-0");
        assert_eq!(stored[69].1, "A-69");
        assert_eq!(tx.next_rowid.get().records, queued[69] + 1);
        {
            // Only the statements without ids were needed.
            let bulk = tx.bulk.borrow();
            let prepared: Vec<bool> = bulk.records.iter().map(Option::is_some).collect();
            assert_eq!(prepared, [false, false, true, true]);
        }
        // Rows queued, then a proposed version written ahead of them with
        // a later id: the queued rows no longer continue the table's ids
        // and name theirs; the rows after them continue again.
        let mut batch = RecordBatch::new(plain_records("B", 40));
        let queued = queue_plain(&tx, &mut batch, row.id, file);
        assert!(!batch.rows.is_empty(), "some of them still queued");
        let proposed = tx
            .insert_proposed(&plain_records("C", 1)[0], row.id, file, 2)
            .unwrap();
        assert!(proposed > queued[39]);
        tx.flush_records(&mut batch).unwrap();
        assert_eq!(row_ids_of(&tx, "B-%"), queued);
        assert_eq!(tx.next_rowid.get().records, proposed + 1);
        {
            // The rows still queued named their ids.
            let bulk = tx.bulk.borrow();
            assert!(bulk.records[0].is_some() || bulk.records[1].is_some());
        }
        let mut batch = RecordBatch::new(plain_records("D", 3));
        let queued = queue_plain(&tx, &mut batch, row.id, file);
        assert_eq!(queued[0], proposed + 1);
        tx.flush_records(&mut batch).unwrap();
        assert_eq!(row_ids_of(&tx, "D-%"), queued);
        // The seal of the file, from the values as written, matches the
        // rows read back, ids included.
        seal_checked(&tx, file);
    }

    #[test]
    fn rows_given_other_ids_than_queued_fail_the_transaction() {
        let mut store = Store::open_in_memory().unwrap();
        let tx = store.begin().unwrap();
        let (file, row) = file_and_series(&tx);
        let mut batch = RecordBatch::new(plain_records("A", 5));
        let first = queue_plain(&tx, &mut batch, row.id, file)[0];
        assert_eq!(batch.rows.len(), 5, "all still queued");
        // A row written behind the transaction's back takes the id the
        // first queued row was to get from SQLite.
        tx.tx
            .execute(
                "INSERT INTO records (id, record_id, version, status, series_id, x, y, censored,
                 in_fit, file_id, line, raw) VALUES (?1, 'X', 1, 'current', ?2, 0, 0, 0, 0, ?3, 1, '')",
                rusqlite::params![first, row.id.0, file.0],
            )
            .unwrap();
        let err = tx.flush_records(&mut batch).unwrap_err();
        assert!(matches!(err, StoreError::IdsOutOfStep { .. }), "{err}");
        assert!(err.to_string().contains("please report this"), "{err}");
    }

    #[test]
    fn two_files_and_a_second_seal_in_one_transaction_are_each_sealed_right() {
        let mut store = Store::open_in_memory().unwrap();
        let tx = store.begin().unwrap();
        let a = tx.insert_file(&new_file("a.csv", "aa")).unwrap();
        let b = tx.insert_file(&new_file("b.csv", "bb")).unwrap();
        let row = tx
            .create_series("S", None, "none", "exclude", None, None)
            .unwrap();
        let records: Vec<Record> = (0..5)
            .map(|i| record(&format!("X{i}"), f64::from(i), Measure::Detected(1.0), 1))
            .collect();
        let records = Arc::new(records);
        let mut batch = RecordBatch::new(Arc::clone(&records));
        for (i, _) in records.iter().enumerate() {
            let file = if i % 2 == 0 { a } else { b };
            tx.insert_bad_row(file, &bad_row(i as u64, None, "x"))
                .unwrap();
            let placement = RecordPlacement {
                fit_point: None,
                arrival: None,
            };
            tx.queue_current(&mut batch, i, row.id, file, placement, None)
                .unwrap();
        }
        tx.flush_records(&mut batch).unwrap();
        let mut fits = FitBatch::new();
        tx.queue_fit(&mut fits, &new_fit(&row, Some(b), None))
            .unwrap();
        tx.queue_fit(&mut fits, &new_fit(&row, Some(a), None))
            .unwrap();
        tx.flush_fits(&mut fits).unwrap();
        tx.finish_file(
            b,
            FileOutcome::Quarantined,
            FileCounts::default(),
            Some("whole"),
        )
        .unwrap();
        let hash_b = seal_checked(&tx, b);
        let hash_a = seal_checked(&tx, a);
        // A row added after the file was sealed, and the file sealed
        // again: read back this time, so still right.
        tx.insert_bad_row(a, &bad_row(99, None, "late")).unwrap();
        let hash_a2 = seal_checked(&tx, a);
        assert_ne!(hash_a, hash_a2);
        assert!(tx.written.borrow().is_empty());
        tx.commit().unwrap();
        let again = store.recompute_seals(SealKind::File, &[a.0, b.0]).unwrap();
        assert_eq!(again[&a.0], hash_a2);
        assert_eq!(again[&b.0], hash_b);
    }

    #[test]
    fn a_file_too_large_to_keep_its_encoded_rows_is_sealed_from_the_rows_read_back() {
        let mut store = Store::open_in_memory().unwrap();
        let tx = store.begin().unwrap();
        let file = tx.insert_file(&new_file("big.csv", "bb")).unwrap();
        let row = tx
            .create_series("S", None, "none", "exclude", None, None)
            .unwrap();
        // Several times the test budget of encoded rows.
        let records: Vec<Record> = (0..2_000)
            .map(|i| record(&format!("B{i:05}"), f64::from(i), Measure::Detected(2.5), 1))
            .collect();
        let records = Arc::new(records);
        let mut batch = RecordBatch::new(Arc::clone(&records));
        for i in 0..records.len() {
            let placement = RecordPlacement {
                fit_point: None,
                arrival: None,
            };
            tx.queue_current(&mut batch, i, row.id, file, placement, None)
                .unwrap();
        }
        tx.flush_records(&mut batch).unwrap();
        tx.insert_bad_row(file, &bad_row(7, None, "late")).unwrap();
        assert!(
            tx.written
                .borrow()
                .iter()
                .all(|w| !w.rows.keeping() && w.rows.records.len() == 0),
            "the buffers were dropped at the budget"
        );
        tx.finish_file(file, FileOutcome::Partial, FileCounts::default(), None)
            .unwrap();
        let hash = seal_checked(&tx, file);
        tx.commit().unwrap();
        let again = store.recompute_seals(SealKind::File, &[file.0]).unwrap();
        assert_eq!(again[&file.0], hash);
    }

    #[cfg(debug_assertions)]
    #[test]
    #[should_panic(expected = "differs from the rows read back")]
    fn debug_builds_catch_a_seal_from_values_that_the_rows_do_not_match() {
        let mut store = Store::open_in_memory().unwrap();
        let tx = store.begin().unwrap();
        let file = tx.insert_file(&new_file("a.csv", "aa")).unwrap();
        tx.insert_bad_row(file, &bad_row(2, None, "x")).unwrap();
        // A change the value-based seal cannot see.
        tx.tx
            .execute("UPDATE quarantined_rows SET reason = 'y'", [])
            .unwrap();
        let _ = tx.seal(SealScope::File(file.0));
    }

    #[test]
    fn moments_round_trip_through_the_series_row_bit_for_bit() {
        let mut store = Store::open_in_memory().unwrap();
        let mut m = Moments::new();
        for (x, y) in [(2024.1, 3.3), (2024.35, 2.9), (2024.6, 3.1)] {
            m.add(x, y);
        }
        let tx = store.begin().unwrap();
        let mut row = tx
            .create_series("MW-1/nitrate", Some("mg/L"), "none", "exclude", None, None)
            .unwrap();
        row.moments = m;
        row.fit_version = 3;
        row.records = 3;
        let mut fits = FitBatch::new();
        let fit_row = tx
            .queue_fit(
                &mut fits,
                &NewFit {
                    state: &row,
                    trigger_file: None,
                    created_at: "2026-12-02T00:00:00Z",
                    transform: "none",
                    non_detects: "exclude",
                    level: 0.95,
                    fit: None,
                    robust: None,
                    note: None,
                },
            )
            .unwrap();
        tx.flush_fits(&mut fits).unwrap();
        row.latest_fit = Some(fit_row);
        tx.save_series_heads(&row).unwrap();
        tx.commit().unwrap();
        let back = store.series("MW-1/nitrate").unwrap().unwrap();
        assert_eq!(back.moments, m);
        assert_eq!(back.fit_version, 3);
    }
}
