//! One file through the whole path, top to bottom: read and hash, parse and
//! validate, load each touched series' state, refit, then ONE transaction
//! (file, records, refused rows, fit rows, series states, audit), then move
//! the file out of the inbox.
//!
//! Exactly once: a file's content hash is stored in the same transaction as
//! its records, and the file leaves the inbox only after that commit. A crash
//! before the commit leaves the file in the inbox with nothing stored; a
//! crash after it leaves a file whose hash is known, which the next pass
//! skips and moves. A record id already stored with identical values is
//! counted as the same record, never twice; with other values it is kept
//! aside as a proposed version (a conflict), never overwriting.

/// The pipeline's maps are keyed by series keys and looked up for every
/// record; SipHash (the standard default) cost a few percent of a large
/// ingest. foldhash is seeded per process like the default.
type HashMap<K, V> = std::collections::HashMap<K, V, foldhash::fast::RandomState>;
use std::collections::VecDeque;
use std::io::{Seek, SeekFrom};
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::mpsc::{channel, sync_channel};
use std::time::SystemTime;

use thiserror::Error;
use tracing::{debug, info, info_span, warn};

use crate::clock;
use crate::config::{BadRows, Config, NonDetectPolicy, SeriesSettings};
use crate::findings::causes::Candidate;
use crate::findings::rules::{
    CutoffCache, Measured, RecordJudgement, RecordKind, Span, TrendChange, judge_record_with,
    judge_trend, ln_scale_ruled_out, outlier_measure,
};
use crate::inbox::{self, InboxError, ReadyFile};
use crate::raise;
use crate::records::{self, Matrix, Measure, Record, RecordError, SeriesId, Today, units};
use crate::stats::pairwise::PairwiseTrend;
use crate::stats::robust::{MannKendall, TheilSen, mann_kendall, theil_sen};
use crate::stats::{Arrival, LineFit, Moments, SeriesState, TQuantiles, Transform};
use crate::store::seal::SealScope;
use crate::store::{
    AuditKind, Behind, FileCounts, FileOutcome, FitBatch, NewFile, NewFit, RecordBatch,
    RecordPlacement, RobustRow, SeriesHeads, SeriesRow, Store, StoreError, write_behind,
};
use crate::window::Window;

/// The robust slope is recomputed (from all points) when a series has
/// grown by this factor since the last computation, so its total cost stays
/// within a small multiple of one computation at the final size.
const ROBUST_GROWTH: f64 = 2.0;

/// Up to this many points, the robust slope is recomputed at every refit:
/// in a short series (most monitoring series are) each record moves it, and
/// a message's robust slope should be the one with the record. The pairwise
/// slopes are kept meanwhile ([`SeriesCache::pairwise`]): a refit at every
/// record from 3 to 100 points costs about 0.5 ms in all (1.4 ms from
/// scratch; `cargo bench --bench robust`).
pub(crate) const ROBUST_EVERY_REFIT_UP_TO: i64 = 100;

/// The niceness of the thread that reads and parses files ahead (see
/// [`lower_this_thread_priority`]).
const READER_NICENESS: i32 = 10;

/// Lowers the calling thread's scheduling priority to `niceness` (Linux:
/// a thread's own nice value). Best effort: where it cannot be done the
/// thread runs at the process's priority, which is only slower.
fn lower_this_thread_priority(niceness: i32) {
    #[cfg(target_os = "linux")]
    // SAFETY: gettid has no preconditions; setpriority on this thread's id
    // only changes this thread's scheduling (raising niceness needs no
    // privilege) and reports failure through its return value.
    unsafe {
        let tid = libc::gettid();
        let _ = libc::setpriority(libc::PRIO_PROCESS, tid as libc::id_t, niceness);
    }
    #[cfg(not(target_os = "linux"))]
    let _ = niceness;
}

/// Records awaiting review are left out of the judging fit up to one in
/// this many of the series' points.
const MAX_LEFT_OUT_SHARE: usize = 10;

/// A file larger than this is neither read ahead on the reader thread nor
/// held in memory: a parsed record takes several times its line in memory
/// (about 480 bytes for a 58-byte line), so a 100 MB delivery parsed whole
/// took 1 GB, and even its bytes held whole took 100 MB. It is read from
/// disk when its turn comes, in pieces of [`PIECE_BYTES`], and parsed in
/// chunks of [`CHUNK_ROWS`] rows, twice (see [`Large`]): once to hash it and
/// count each series' records and the refused rows (what the outlier test
/// and the reject-file rule need of the whole file), once to store them,
/// in the same one transaction.
const LARGE_FILE_BYTES: u64 = 4 << 20;

/// Rows per chunk of a large file.
const CHUNK_ROWS: usize = 16_384;

/// Bytes read from disk at a time from a large file.
const PIECE_BYTES: usize = 1 << 20;

/// Refused rows listed in a finding or a reject-file reason; the rest are
/// counted (each is stored in `quarantined_rows` all the same).
const LISTED_ERRORS: usize = 200;

/// Fit points kept in [`SeriesCache`] at most (16 bytes each: 64 MB).
/// Past it they are all let go, and each series reads its points back
/// from the store at its next robust-slope computation: a daemon running
/// for months must not hold every point it ever stored.
const POINTS_KEPT_MAX: usize = 4_000_000;

/// Pairwise slopes kept in [`SeriesCache`] at most (8 bytes each: 32 MB,
/// 40 MB with the room each series keeps to grow;
/// a series of 100 points holds 4,950, so about 800 such series). Past it
/// no further series is kept: its robust slope is recomputed from scratch
/// (rebuilding kept slopes costs several times that, so nothing is let go
/// to make room).
const PAIRWISE_SLOPES_MAX: usize = 4_000_000;

/// The pairwise slopes of short series, kept between files within a bound
/// on the slopes held.
#[derive(Debug, Default)]
struct KeptPairs {
    series: HashMap<String, PairwiseTrend>,
    /// Slopes held by all of them.
    held: usize,
}

impl KeptPairs {
    /// The robust row of `key` from its kept pairwise slopes, brought up
    /// to `points` (Some(None) when undefined), or None when the series is
    /// not kept: longer than [`ROBUST_EVERY_REFIT_UP_TO`], or no room
    /// under `max` slopes. A series that takes the total past `max` still
    /// gets its row, and is then let go.
    fn robust(
        &mut self,
        key: &str,
        points: &[(f64, f64)],
        level: f64,
        max: usize,
    ) -> Option<Option<RobustRow>> {
        let n = points.len();
        if n as i64 > ROBUST_EVERY_REFIT_UP_TO {
            self.forget(key);
            return None;
        }
        if !self.series.contains_key(key) && self.held + n * n.saturating_sub(1) / 2 > max {
            return None;
        }
        let kept = self.series.entry(key.to_string()).or_default();
        self.held -= kept.slopes_held();
        kept.follow(points);
        self.held += kept.slopes_held();
        let row = robust_row_of(kept, level);
        if self.held > max {
            self.forget(key);
        }
        Some(row)
    }

    fn forget(&mut self, key: &str) {
        if let Some(k) = self.series.remove(key) {
            self.held -= k.slopes_held();
        }
    }

    fn clear(&mut self) {
        *self = KeptPairs::default();
    }
}

/// Series rows kept between files by the one writer, so that a series
/// touched by every file is not read back each time. Cleared whenever a
/// transaction fails, since its rows may then be ahead of the database.
#[derive(Debug, Default)]
pub struct SeriesCache {
    rows: HashMap<String, SeriesRow>,
    /// Series without a configured unit: the unit their records are in
    /// (see [`reconcile_units`]).
    units: RecordUnits,
    /// Every series key by its [`name_form`], read from the store when a
    /// file first creates a series.
    names: Option<HashMap<String, String>>,
    /// The fit points (fitted scale) of series whose robust slope has been
    /// computed once, so that later checkpoints need not read them back.
    /// Shared with the findings of a file still being written (a series'
    /// next points then go to a copy).
    points: HashMap<String, Arc<Vec<(f64, f64)>>>,
    /// Points of records awaiting review, per series.
    awaiting: HashMap<String, Vec<(f64, f64)>>,
    /// The low end of each series' judging fit, kept with `awaiting`.
    judged_low: HashMap<String, JudgedLow>,
    /// Critical values of the finding rules.
    cutoffs: CutoffCache,
    /// The last robust slope and interval computed per series.
    robust: HashMap<String, (f64, f64, f64)>,
    /// The pairwise slopes of series short enough for their robust slope
    /// to be recomputed at every refit, kept current point by point.
    pairwise: KeptPairs,
    /// Each series' latest least-squares fit, for the next file's "before"
    /// and for scoring other series' records against it; used only while
    /// its moments are the series' current ones.
    line_fits: HashMap<String, LineFit>,
    /// The ln(y) screen per series (None: not applicable).
    log: HashMap<String, Option<SeriesState>>,
    quantiles: Option<TQuantiles>,
    /// The store revision the cache was filled at: a verdict moves it on,
    /// and the cache is then refilled from the store.
    revision: Option<i64>,
    /// The analysis window in force per series (None: all points).
    windows: HashMap<String, Option<Window>>,
}

impl SeriesCache {
    /// An empty cache.
    pub fn new() -> Self {
        SeriesCache::default()
    }

    /// Forgets everything (after a failed transaction, or when another
    /// process may have changed findings, as a verdict does).
    pub fn clear(&mut self) {
        self.units.clear();
        self.names = None;
        self.rows.clear();
        self.points.clear();
        self.awaiting.clear();
        self.judged_low.clear();
        self.robust.clear();
        self.pairwise.clear();
        self.line_fits.clear();
        self.log.clear();
        self.windows.clear();
        self.revision = None;
    }

    /// The series' fit kept from its last refit, when it was made from
    /// exactly these moments at this level.
    fn known_fit(&self, key: &str, m: &Moments, level: f64) -> Option<LineFit> {
        self.line_fits
            .get(key)
            .filter(|f| f.moments == *m && f.level == level)
            .copied()
    }

    fn quantiles(&mut self, level: f64) -> &mut TQuantiles {
        if self.quantiles.as_ref().is_none_or(|q| q.level() != level) {
            self.quantiles = Some(TQuantiles::new(level));
        }
        self.quantiles.get_or_insert_with(|| TQuantiles::new(level))
    }
}

/// What happened to one file.
#[derive(Debug, Clone, PartialEq)]
pub enum Outcome {
    /// Stored; `counts` says how many records were new, the same, in
    /// conflict or refused.
    Ingested {
        /// Record counts.
        counts: FileCounts,
        /// Series refitted.
        refits: usize,
        /// Where the file went (None in keep-files mode).
        moved_to: Option<PathBuf>,
    },
    /// The same content was ingested before; nothing stored again.
    Duplicate {
        /// The first file with this content.
        first: String,
        /// Where the file went.
        moved_to: Option<PathBuf>,
    },
    /// The whole file was set aside.
    Quarantined {
        /// Why.
        reason: String,
        /// Where it went.
        moved_to: Option<PathBuf>,
    },
    /// The file disappeared before it could be read; nothing to do.
    Vanished,
}

/// Errors that stop processing of the file (it stays in the inbox and is
/// retried later): the store failing, or a move failing after the commit.
#[derive(Debug, Error)]
pub enum PipelineError {
    /// The database failed; nothing of this file was stored.
    #[error(transparent)]
    Store(#[from] StoreError),
    /// Reading or moving the file failed.
    #[error(transparent)]
    Inbox(#[from] InboxError),
}

/// A file read, hashed and parsed: everything about it that needs neither
/// the store nor the series' state, so that it can be done on another
/// thread while the previous file is being stored.
#[derive(Debug)]
pub struct Prepared {
    /// The hash, the size and (for a small file) the bytes.
    read: Result<(String, u64, Vec<u8>), InboxError>,
    /// `None` for a large file, parsed in chunks as it is stored.
    parsed: Option<Result<records::ParsedFile, records::FileError>>,
    /// A large file: open, read once already (hashed and surveyed).
    large: Option<Large>,
    now: SystemTime,
    /// The last chunk's records once stored, freed with the rest.
    stored: Option<Arc<Vec<Record>>>,
}

/// A large file, never held whole in memory: it is read from disk twice,
/// in pieces, through one open handle. The first read hashes it and
/// surveys its rows; the second stores them, hashing again, and fails at
/// the end (before the commit) if the content is not the same.
#[derive(Debug)]
struct Large {
    file: std::fs::File,
    survey: Result<Survey, records::FileError>,
}

/// The folder a file was listed in: its path without its listed relative
/// part (the inbox, or a folder given to `ingest`).
fn listing_root(file: &ReadyFile) -> PathBuf {
    let depth = file.relative.components().count();
    file.path
        .ancestors()
        .nth(depth)
        .map_or_else(|| PathBuf::from("."), Path::to_path_buf)
}

/// Reads, hashes and parses one file (no store, no series state); a large
/// file is read from disk once, hashed and surveyed, and kept open for
/// the second read that stores it (see [`LARGE_FILE_BYTES`]).
pub fn prepare(config: &Config, file: &ReadyFile, now: SystemTime) -> Prepared {
    let (_, layout) = config.feed_for(&file.relative);
    let rules = |id: &SeriesId| config.series_settings(id).rules();
    let opened = inbox::open_below(&file.path, &listing_root(file)).and_then(|f| {
        let size = inbox::size_within(&file.path, &f, config.max_file_bytes)?;
        Ok((f, size))
    });
    let mut large = None;
    let read = match opened {
        Ok((f, size)) if size > LARGE_FILE_BYTES => {
            let mut reader = inbox::HashingReader::new(&f, config.max_file_bytes, None);
            let survey = Survey::stream(&mut reader, size, layout, &rules, today_of(now));
            let read = reader
                .finish_within(&file.path, config.max_file_bytes)
                .map(|(sha, size)| (sha, size, Vec::new()));
            if read.is_ok() {
                large = Some(Large { file: f, survey });
            }
            read
        }
        Ok((f, _)) => inbox::read_opened(&file.path, f, config.max_file_bytes),
        Err(e) => Err(e),
    };
    let parsed = match (&read, &large) {
        (Ok((_, _, bytes)), None) => {
            Some(records::parse_file(bytes, layout, &rules, today_of(now)))
        }
        _ => None,
    };
    Prepared {
        read,
        parsed,
        large,
        now,
        stored: None,
    }
}

fn today_of(now: SystemTime) -> Today {
    let (year, month, day, _) = clock::civil(now);
    Today { year, month, day }
}

/// Processes one settled file.
pub fn process_file(
    config: &Config,
    store: &mut Store,
    cache: &mut SeriesCache,
    file: &ReadyFile,
    now: SystemTime,
) -> Result<Outcome, PipelineError> {
    let prepared = prepare(config, file, now);
    process_prepared(config, store, cache, file, prepared).0
}

/// Stores a prepared file (its one transaction) and moves it. Returns the
/// outcome and the prepared file's remains, so that the caller can free
/// them off the writer's thread.
pub fn process_prepared(
    config: &Config,
    store: &mut Store,
    cache: &mut SeriesCache,
    file: &ReadyFile,
    mut prepared: Prepared,
) -> (Result<Outcome, PipelineError>, Prepared) {
    let result = process_file_inner(config, store, cache, file, &mut prepared);
    if result.is_err() {
        cache.clear();
    }
    (result, prepared)
}

/// What the caller of [`process_in_order`] wants after each file.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Flow {
    /// Go on with the next file.
    Continue,
    /// Stop after this file.
    Stop,
}

/// Processes `files` in order, each with its configuration, storing one
/// while the next is read and parsed on a second thread. Stops before the
/// next file when `stop` is set or `each` says so; files not reached are
/// untouched (they stay in the inbox).
pub fn process_in_order(
    store: &mut Store,
    cache: &mut SeriesCache,
    files: &[(&Config, ReadyFile)],
    stop: &AtomicBool,
    mut each: impl FnMut(usize, &ReadyFile, Result<Outcome, PipelineError>) -> Flow,
) {
    if let Err(e) = store.for_ingest() {
        // Only a speed setting: ingest works without it.
        tracing::warn!(error = %e, "cannot keep statement journals in memory");
    }
    if files.len() <= 1 {
        // Nothing to overlap.
        for (i, (config, file)) in files.iter().enumerate() {
            if stop.load(Ordering::SeqCst) {
                return;
            }
            let result = process_file(config, store, cache, file, SystemTime::now());
            if each(i, file, result) == Flow::Stop {
                return;
            }
        }
        return;
    }
    // One file ahead at most: memory stays at two files' worth (three
    // while a file commits as the next one is computed).
    let (ready_tx, ready_rx) = sync_channel::<Option<Prepared>>(1);
    let (spent_tx, spent_rx) = channel::<Prepared>();
    std::thread::scope(|scope| {
        let reader = move || {
            // Reading ahead only matters while it keeps ahead, which it
            // does with the CPU left over. The writing thread paces a
            // backlog; with this thread at the default priority it waited
            // 2.9 s on the run queue in a 12 s backlog (its schedstat), with
            // this one lowered 2.0 s, and the backlog took 0.5-1 s less.
            lower_this_thread_priority(READER_NICENESS);
            for (config, file) in files {
                // Free what the writer is done with here, not on its thread.
                while spent_rx.try_recv().is_ok() {}
                // A large file is read by the writer when its turn comes,
                // so that two of them are never in memory at once.
                let prepared = if file.size > LARGE_FILE_BYTES {
                    None
                } else {
                    Some(prepare(config, file, SystemTime::now()))
                };
                if ready_tx.send(prepared).is_err() {
                    return;
                }
            }
        };
        if let Err(e) = std::thread::Builder::new()
            .name("inbox-reader".into())
            .spawn_scoped(scope, reader)
        {
            // Nothing is taken: the files stay in the inbox for next time.
            tracing::error!(error = %e, "cannot start the thread that reads the inbox");
        }
        let mut files_in = Taken {
            files,
            ready: &ready_rx,
            again: VecDeque::new(),
        };
        let mut next = 0;
        let mut plain = false;
        while next < files.len() && !stop.load(Ordering::SeqCst) {
            let (config, file) = &files[next];
            let Some(prepared) = files_in.take(next) else {
                break;
            };
            // A run of small files, each computed while the one before it
            // commits; the first file that cannot be goes the plain way.
            // (When no transaction can begin, the plain way meets the same
            // error and reports it.)
            if !std::mem::take(&mut plain) && overlappable(config, &prepared) {
                // The run's commits are made durable by a thread of their
                // own (see store::WalSync), not by the writer. Without
                // that, each commit syncs as usual.
                let durable = store
                    .commit_without_sync()
                    .inspect_err(|e| debug!(error = %e, "commits sync on the writer"))
                    .ok();
                files_in.again.push_front(prepared);
                let run = match store.begin() {
                    Ok(tx) => Some(write_behind(tx, durable, |b| {
                        run_ahead(b, &mut files_in, next, cache, stop, &spent_tx, &mut each)
                    })),
                    Err(_) => None,
                };
                if let Err(e) = store.commit_with_sync() {
                    // Without FULL the plain way's commits would not wait
                    // for the disk: no file is taken until it is back.
                    tracing::error!(error = %e, "cannot set the store's commits to sync again; stopping");
                    return;
                }
                let Some(run) = run else {
                    // No transaction can begin: the plain way meets the
                    // same error and reports it.
                    plain = true;
                    continue;
                };
                next = run.next;
                plain = run.plain;
                if run.stopped {
                    break;
                }
                continue;
            }
            let (result, spent) = process_prepared(config, store, cache, file, prepared);
            let _ = spent_tx.send(spent);
            next += 1;
            if each(next - 1, file, result) == Flow::Stop {
                break;
            }
        }
        // Dropping the receiver ends the reader at its next send.
        drop(files_in);
        drop(ready_rx);
    });
}

/// The files of [`process_in_order`] as they come from the reading thread,
/// with those to be taken again first (prepared again, in order).
struct Taken<'f, 'c> {
    files: &'f [(&'c Config, ReadyFile)],
    ready: &'f std::sync::mpsc::Receiver<Option<Prepared>>,
    /// Files `index`, `index + 1`, ... to be taken before the reader's next.
    again: VecDeque<Prepared>,
}

impl Taken<'_, '_> {
    /// File `index`, the next one in order.
    fn take(&mut self, index: usize) -> Option<Prepared> {
        if let Some(p) = self.again.pop_front() {
            return Some(p);
        }
        let (config, file) = self.files.get(index)?;
        let p = self.ready.recv().ok()?;
        Some(p.unwrap_or_else(|| prepare(config, file, SystemTime::now())))
    }

    /// File `index` read and parsed again (its records went to a
    /// transaction that was rolled back), to be taken next.
    fn again(&mut self, index: usize) {
        if let Some((config, file)) = self.files.get(index) {
            self.again
                .push_front(prepare(config, file, SystemTime::now()));
        }
    }
}

/// Whether a prepared file can be computed while the one before it
/// commits: a small file read and parsed whole, not to be rejected whole.
/// Others (large, unreadable, quarantined whole) take the plain way.
fn overlappable(config: &Config, p: &Prepared) -> bool {
    p.read.is_ok()
        && match &p.parsed {
            Some(Ok(parsed)) => parsed.errors.is_empty() || config.bad_rows != BadRows::RejectFile,
            _ => false,
        }
}

/// Where [`run_ahead`] stopped.
struct Run {
    /// The next file to take.
    next: usize,
    /// The caller's `each` said stop.
    stopped: bool,
    /// The next file must take the plain way.
    plain: bool,
}

impl Run {
    /// Go on from file `next`.
    fn next(next: usize) -> Run {
        Run {
            next,
            stopped: false,
            plain: false,
        }
    }

    /// Stop before file `next`: the caller said so.
    fn stopped(next: usize) -> Run {
        Run {
            next,
            stopped: true,
            plain: false,
        }
    }
}

/// A file whose transaction was ended (to commit) and not yet settled.
struct InFlight {
    index: usize,
    prepared: Prepared,
    queued: Queued,
}

/// Files ended (to commit) and not yet settled while the next one is
/// computed. With one, the computing thread waited for each commit (and
/// its sync) before it could go on to the file after next: 0.5 s of the
/// 1,000,000-record backlog in `Behind::outcome` (sched_switch stacks),
/// while the writing thread waited 1.0 s for work. With two, each wait
/// for a commit comes a file later, when that commit is usually done.
const IN_FLIGHT: usize = 2;

/// What settling the files in flight came to, when not every one of them
/// committed and was told to go on.
#[derive(Default)]
struct Unwound {
    /// Files in flight rolled back, to be taken again, in order.
    again: Vec<usize>,
    /// A file failed (reported to `each`, not taken again).
    failed: bool,
    /// `each` said stop (for a committed or a failed file).
    stopped: bool,
}

impl Unwound {
    fn note(&mut self, settled: Settled) {
        match settled {
            Settled::Done(Flow::Continue) => {}
            Settled::Done(Flow::Stop) => self.stopped = true,
            Settled::Failed(flow) => {
                self.failed = true;
                self.stopped |= flow == Flow::Stop;
            }
            Settled::Again(at) => self.again.push(at),
        }
    }

    fn add(&mut self, later: Unwound) {
        self.again.extend(later.again);
        self.failed |= later.failed;
        self.stopped |= later.stopped;
    }

    /// Whether anything but plain commits came of it.
    fn eventful(&self) -> bool {
        self.stopped || self.failed || !self.again.is_empty()
    }

    /// Where to go on from `next` (the first file not yet taken, or the
    /// file open while these were settled, rolled back): the files rolled
    /// back are taken again first, in order, with `next` after them if it
    /// was open; on a stop nothing is taken again (they stay in the inbox).
    fn go_on(self, files_in: &mut Taken<'_, '_>, next: usize, open: bool) -> Run {
        let mut again = self.again;
        if open {
            again.push(next);
        }
        let from = again.first().copied().unwrap_or(next);
        if self.stopped {
            return Run::stopped(from);
        }
        for &at in again.iter().rev() {
            files_in.again(at);
        }
        Run::next(from)
    }
}

/// Settles every file in flight, in order (their outcomes come before any
/// later transaction's). A file after one that failed or was rolled back
/// was computed on it: its own commit fails on the assumptions it checks,
/// and it is rolled back and taken again.
fn settle_all(
    b: &mut Behind<'_>,
    files: &[(&Config, ReadyFile)],
    in_flight: &mut VecDeque<InFlight>,
    cache: &mut SeriesCache,
    spent: &std::sync::mpsc::Sender<Prepared>,
    each: &mut impl FnMut(usize, &ReadyFile, Result<Outcome, PipelineError>) -> Flow,
) -> Unwound {
    let mut unwound = Unwound::default();
    while let Some(f) = in_flight.pop_front() {
        unwound.note(settle(b, files, f, cache, spent, each));
    }
    unwound
}

/// Stores files from `first` on, each in its own transaction, computing
/// each while the ones before it commit (see [`Start::Assumed`] and
/// [`IN_FLIGHT`]), until a file must take the plain way, the files run
/// out, a stop is asked, or a transaction fails. A file is reported to
/// `each` and moved only once its commit is known; a file computed on
/// assumptions that turned out wrong (a file before it failed, or the
/// store was not as assumed) is rolled back and taken again.
#[allow(clippy::too_many_arguments)]
fn run_ahead<'t, 'c: 't>(
    b: &mut Behind<'t>,
    files_in: &mut Taken<'_, 'c>,
    first: usize,
    cache: &mut SeriesCache,
    stop: &AtomicBool,
    spent: &std::sync::mpsc::Sender<Prepared>,
    each: &mut impl FnMut(usize, &ReadyFile, Result<Outcome, PipelineError>) -> Flow,
) -> Run {
    let files = files_in.files;
    let mut index = first;
    let mut in_flight: VecDeque<InFlight> = VecDeque::with_capacity(IN_FLIGHT);
    let mut start = Start::Read;
    loop {
        let current = if index < files.len() && !stop.load(Ordering::SeqCst) {
            files_in.take(index)
        } else {
            None
        };
        let Some(mut prepared) = current else {
            // Done (or stopping): settle the files in flight.
            let unwound = settle_all(b, files, &mut in_flight, cache, spent, each);
            return unwound.go_on(files_in, index, false);
        };
        let (config, file) = &files[index];
        if !overlappable(config, &prepared) {
            files_in.again.push_front(prepared);
            let unwound = settle_all(b, files, &mut in_flight, cache, spent, each);
            // This file was not touched: it stays first in line after the
            // ones taken again.
            return unwound.go_on(files_in, index, false);
        }
        let computed = compute_ahead(b, config, cache, file, &mut prepared, &start);
        // This file's transaction is still open. The oldest file in flight
        // is settled first once there are IN_FLIGHT of them; the others
        // too when it did not simply commit, or when this file will not
        // (its roll-back's outcome comes after theirs).
        let mut unwound = Unwound::default();
        if in_flight.len() >= IN_FLIGHT
            && let Some(f) = in_flight.pop_front()
        {
            unwound.note(settle(b, files, f, cache, spent, each));
        }
        if unwound.eventful() || !matches!(computed, Ok(Some(_))) {
            unwound.add(settle_all(b, files, &mut in_flight, cache, spent, each));
        }
        if unwound.eventful() {
            // This file was computed on the files in flight (or a stop was
            // asked): rolled back, it is taken again (or stays in the inbox).
            b.roll_back();
            cache.clear();
            return unwound.go_on(files_in, index, true);
        }
        match computed {
            Ok(Some(queued)) => {
                b.end(true);
                start = match cache.revision {
                    Some(revision) => Start::Assumed {
                        revision,
                        next_ids: queued.next_ids,
                        file_id: crate::store::FileId(queued.file_id.0 + 1),
                    },
                    None => Start::Read,
                };
                in_flight.push_back(InFlight {
                    index,
                    prepared,
                    queued,
                });
                index += 1;
            }
            Ok(None) => {
                // The plain way (same content stored already, or a file
                // that changed its mind part way).
                b.roll_back();
                files_in.again(index);
                return Run {
                    next: index,
                    stopped: false,
                    plain: true,
                };
            }
            Err(e) => {
                b.roll_back();
                cache.clear();
                if matches!(e, PipelineError::Store(StoreError::NotAsAssumed { .. })) {
                    debug!(file = %file.relative.display(), error = %e, "computed again");
                    files_in.again(index);
                    return Run::next(index);
                }
                let _ = spent.send(prepared);
                index += 1;
                start = Start::Read;
                if each(index - 1, file, Err(e)) == Flow::Stop {
                    return Run::stopped(index);
                }
            }
        }
    }
}

/// What became of a file in flight.
enum Settled {
    /// Committed and reported to `each`, which said this.
    Done(Flow),
    /// Failed and reported to `each`, which said this.
    Failed(Flow),
    /// Rolled back, to be taken again from this index.
    Again(usize),
}

/// Waits for the commit of the file in flight, then moves it and reports it.
fn settle(
    b: &mut Behind<'_>,
    files: &[(&Config, ReadyFile)],
    f: InFlight,
    cache: &mut SeriesCache,
    spent: &std::sync::mpsc::Sender<Prepared>,
    each: &mut impl FnMut(usize, &ReadyFile, Result<Outcome, PipelineError>) -> Flow,
) -> Settled {
    let Some((config, file)) = files.get(f.index) else {
        unreachable!("BUG: a file in flight is one of the files");
    };
    // Committed, and on disk when a WalSync was given.
    match b.outcome() {
        Ok(()) => {
            let _span = info_span!("file", file = %file.relative.display()).entered();
            let result = committed(config, file, &f.prepared, f.queued.counts, f.queued.refits);
            let _ = spent.send(f.prepared);
            Settled::Done(each(f.index, file, result))
        }
        Err(StoreError::NotAsAssumed { what }) => {
            debug!(file = %file.relative.display(), %what, "not as assumed; computed again");
            cache.clear();
            Settled::Again(f.index)
        }
        Err(e) => {
            cache.clear();
            let _ = spent.send(f.prepared);
            Settled::Failed(each(f.index, file, Err(e.into())))
        }
    }
}

/// After a file's commit: logs it, moves it out of the inbox.
fn committed(
    config: &Config,
    file: &ReadyFile,
    prepared: &Prepared,
    counts: FileCounts,
    refits: usize,
) -> Result<Outcome, PipelineError> {
    info!(
        new = counts.new,
        same = counts.same,
        conflict = counts.conflict,
        bad = counts.bad,
        refits,
        "file committed"
    );
    crash_point("after-commit");
    let moved_to = move_done(config, file, prepared)?;
    Ok(Outcome::Ingested {
        counts,
        refits,
        moved_to,
    })
}

/// Computes a small file read and parsed whole into the current
/// transaction (see [`store_file_behind`]); `None` when it must take the
/// plain way instead (its content stored already, or unreadable after
/// all), its transaction to be rolled back.
fn compute_ahead<'t, 'c: 't>(
    b: &mut Behind<'t>,
    config: &'c Config,
    cache: &mut SeriesCache,
    file: &ReadyFile,
    prepared: &mut Prepared,
    start: &Start,
) -> Result<Option<Queued>, PipelineError> {
    let _span = info_span!("file", file = %file.relative.display()).entered();
    let now = prepared.now;
    let at = clock::rfc3339(now);
    let name = file.relative.to_string_lossy().into_owned();
    let (sha, size) = match &prepared.read {
        Ok((sha, size, _)) => (sha.clone(), *size),
        Err(_) => return Ok(None),
    };
    // A file computed ahead has this checked by its transaction.
    if matches!(start, Start::Read) && b.tx()?.file_by_hash(&sha)?.is_some() {
        return Ok(None);
    }
    let (feed, _) = config.feed_for(&file.relative);
    let mut whole = match prepared.parsed.take() {
        Some(Ok(p)) => p,
        other => {
            prepared.parsed = other;
            return Ok(None);
        }
    };
    let mut units = RecordUnits::default();
    reconcile_units(
        &mut whole,
        config,
        &mut units,
        &mut |key| match cache.units.get(key) {
            Some(u) => Ok(u.clone()),
            None => Ok(b.tx()?.series_unit(key)?),
        },
    )?;
    if !whole.errors.is_empty() && config.bad_rows == BadRows::RejectFile {
        // A unit refused: the whole file goes to quarantine, the plain way.
        prepared.parsed = Some(Ok(whole));
        return Ok(None);
    }
    cache.units.extend(units);
    let survey = Survey::of(&whole);
    let mut whole = Some(whole);
    let mut handed = Spent::default();
    let mut next_chunk =
        || -> Result<Option<records::ParsedFile>, records::FileError> { Ok(whole.take()) };
    let result = store_file_behind(
        b,
        config,
        cache,
        &FileMeta {
            name: &name,
            sha: &sha,
            size,
            feed,
        },
        &mut FileRows {
            next: &mut next_chunk,
            survey: &survey,
            spent: &mut handed,
            whole: true,
        },
        &at,
        clock::unix_seconds(now),
        start,
    );
    // Handed back for freeing off this thread.
    prepared.parsed = handed.parsed.map(Ok);
    prepared.stored = handed.records;
    Ok(result?.ok())
}

fn process_file_inner(
    config: &Config,
    store: &mut Store,
    cache: &mut SeriesCache,
    file: &ReadyFile,
    prepared: &mut Prepared,
) -> Result<Outcome, PipelineError> {
    let span = info_span!("file", file = %file.relative.display());
    let _enter = span.enter();
    let now = prepared.now;
    let at = clock::rfc3339(now);
    let name = file.relative.to_string_lossy().into_owned();
    let (sha, size) = match &prepared.read {
        Ok((sha, size, _)) => (sha.clone(), *size),
        Err(InboxError::Vanished { .. }) => {
            debug!("file vanished before it was read");
            return Ok(Outcome::Vanished);
        }
        Err(InboxError::TooLarge { size, max, .. }) => {
            let reason = format!(
                "the file is {size} bytes, above the limit of {max} bytes (watch.max_file_mb); split it or raise the limit"
            );
            return quarantine_whole(config, store, file, &name, "", 0, &reason, now, &at);
        }
        Err(_) => {
            let read = std::mem::replace(&mut prepared.read, Ok((String::new(), 0, Vec::new())));
            return Err(match read {
                Err(e) => e.into(),
                Ok(_) => unreachable!("BUG: matched as an error just above"),
            });
        }
    };
    if let Some(first) = store.file_by_hash(&sha)? {
        info!(first = %first.name, "same content already ingested; skipped");
        store.audit(
            &at,
            AuditKind::FileDuplicate,
            &name,
            &format!(
                "sha256 {sha}; same content as {} ingested {}; nothing stored again",
                first.name, first.arrived_at
            ),
        )?;
        let moved_to = move_done(config, file, prepared)?;
        return Ok(Outcome::Duplicate {
            first: first.name,
            moved_to,
        });
    }
    let (feed, layout) = config.feed_for(&file.relative);
    let rules = |id: &SeriesId| config.series_settings(id).rules();
    // What the rules need of the whole file before any record is stored.
    let mut units = RecordUnits::default();
    let (whole, survey) = match prepared.parsed.take() {
        Some(Ok(mut p)) => {
            reconcile_units(
                &mut p,
                config,
                &mut units,
                &mut |key| match cache.units.get(key) {
                    Some(u) => Ok(u.clone()),
                    None => Ok(store.series_unit(key)?),
                },
            )?;
            let survey = Survey::of(&p);
            (Some(p), survey)
        }
        Some(Err(e)) => {
            let reason = format!("{e}");
            return quarantine_whole(config, store, file, &name, &sha, size, &reason, now, &at);
        }
        None => {
            let surveyed = prepared.large.as_mut().map_or_else(
                || {
                    Err(records::FileError::Read {
                        reason: "the file was neither parsed nor surveyed".into(),
                    })
                },
                |l| std::mem::replace(&mut l.survey, Ok(Survey::default())),
            );
            match surveyed {
                Ok(survey) => (None, survey),
                Err(e) => {
                    let reason = format!("{e}");
                    return quarantine_whole(
                        config, store, file, &name, &sha, size, &reason, now, &at,
                    );
                }
            }
        }
    };
    if survey.errors > 0 && config.bad_rows == BadRows::RejectFile {
        let mut reason = format!(
            "{} row(s) refused and ingest.bad_rows = \"reject-file\"; fix them and deliver the file again:\n",
            survey.errors
        );
        for e in &survey.first_errors {
            reason.push_str(&format!("  {e}\n"));
        }
        if survey.errors > survey.first_errors.len() {
            reason.push_str(&format!(
                "  and {} more\n",
                survey.errors - survey.first_errors.len()
            ));
        }
        if let Some(p) = whole {
            prepared.parsed = Some(Ok(p));
        }
        return quarantine_whole(config, store, file, &name, &sha, size, &reason, now, &at);
    }
    // Stored with this file (a failure clears the cache).
    cache.units.extend(units);
    let mut whole = whole;
    // A large file is read again from its start, and must hash the same.
    let mut again = match (&whole, &prepared.large) {
        (None, Some(large)) => {
            let mut f = &large.file;
            f.seek(SeekFrom::Start(0))
                .map_err(|err| InboxError::read(&file.path, err))?;
            Some(inbox::HashingReader::new(
                f,
                config.max_file_bytes,
                Some(sha.clone()),
            ))
        }
        _ => None,
    };
    let mut stream = match again.as_mut() {
        None => None,
        Some(reader) => {
            match records::RecordStream::from_reader(
                reader,
                PIECE_BYTES,
                size,
                layout,
                &rules,
                today_of(now),
            ) {
                Ok(s) => Some(s),
                Err(e) => {
                    let reason = format!("{e}");
                    return quarantine_whole(
                        config, store, file, &name, &sha, size, &reason, now, &at,
                    );
                }
            }
        }
    };
    // Small files come in one piece, large ones chunk by chunk.
    let in_one_piece = stream.is_none();
    let mut handed = Spent::default();
    let mut next_chunk = || -> Result<Option<records::ParsedFile>, records::FileError> {
        match stream.as_mut() {
            Some(s) => s.next_chunk(CHUNK_ROWS),
            None => Ok(whole.take()),
        }
    };
    let result = store_file(
        config,
        store,
        cache,
        &FileMeta {
            name: &name,
            sha: &sha,
            size,
            feed,
        },
        &mut FileRows {
            next: &mut next_chunk,
            survey: &survey,
            spent: &mut handed,
            whole: in_one_piece,
        },
        &at,
        clock::unix_seconds(now),
    );
    // Handed back for freeing off this thread.
    prepared.parsed = handed.parsed.map(Ok);
    prepared.stored = handed.records;
    let (counts, refits) = match result? {
        Ok(done) => done,
        Err(e) => {
            // Found by the first pass already; a file that changed its
            // mind is set aside all the same.
            let reason = format!("{e}");
            return quarantine_whole(config, store, file, &name, &sha, size, &reason, now, &at);
        }
    };
    committed(config, file, prepared, counts, refits)
}

/// Fault injection for the fault suite (tests/faults.rs): when the
/// environment variable SLOPEWARDEN_CRASH_AT names this point, the process
/// aborts here, as a power cut or a kill would stop it. Unset in
/// production; reading one variable per file costs nothing measurable.
fn crash_point(name: &str) {
    if std::env::var_os("SLOPEWARDEN_CRASH_AT").is_some_and(|v| v == name) {
        eprintln!("slopewarden: crash point {name} reached (SLOPEWARDEN_CRASH_AT); aborting");
        std::process::abort();
    }
}

/// Moves a stored file to the archive. Should the file have become a link
/// leading outside the inbox meanwhile, its content as read is archived
/// (the bytes held, or a large file's open handle read again).
fn move_done(
    config: &Config,
    file: &ReadyFile,
    prepared: &Prepared,
) -> Result<Option<PathBuf>, PipelineError> {
    if config.keep_files {
        return Ok(None);
    }
    let mut bytes: &[u8];
    let mut handle: &std::fs::File;
    let content: Option<&mut dyn std::io::Read> = match (&prepared.large, &prepared.read) {
        (Some(large), _) => {
            handle = &large.file;
            handle
                .seek(SeekFrom::Start(0))
                .map_err(|err| InboxError::read(&file.path, err))?;
            Some(&mut handle)
        }
        (None, Ok((_, _, b))) => {
            bytes = b;
            Some(&mut bytes)
        }
        (None, Err(_)) => None,
    };
    let now = prepared.now;
    match inbox::archive_from_inbox(&file.path, &config.inbox, &config.archive, now, content) {
        Ok(p) => Ok(Some(p)),
        Err(InboxError::Vanished { .. }) => Ok(None),
        Err(e) => Err(e.into()),
    }
}

#[allow(clippy::too_many_arguments)]
fn quarantine_whole(
    config: &Config,
    store: &mut Store,
    file: &ReadyFile,
    name: &str,
    sha: &str,
    size: u64,
    reason: &str,
    now: SystemTime,
    at: &str,
) -> Result<Outcome, PipelineError> {
    warn!(reason, "file quarantined");
    let tx = store.begin()?;
    // A file too large to read has no hash; record it under a name-based
    // key so that the reason is still on file.
    let key = if sha.is_empty() {
        format!("unread:{name}:{at}")
    } else {
        sha.to_string()
    };
    let id = tx.insert_file(&NewFile {
        name,
        sha256: &key,
        size,
        arrived_at: at,
        feed: config.feed_for(&file.relative).0,
    })?;
    tx.finish_file(
        id,
        FileOutcome::Quarantined,
        FileCounts::default(),
        Some(reason),
    )?;
    let seal = tx.seal(SealScope::File(id.0))?;
    tx.append_audit(
        at,
        AuditKind::FileQuarantined,
        name,
        &format!("{reason} {seal}"),
    )?;
    raise::plain_finding(
        &tx,
        config,
        "quarantined",
        None,
        Some((id, name)),
        &[],
        &format!("file {name} set aside whole: {reason}"),
        serde_json::json!({ "reason": reason, "caution": raise::CAUTION,
            "judged_against": "the file format the feed expects" }),
        (None, None),
        None,
        None,
        at,
        clock::unix_seconds(now),
    )?;
    tx.commit()?;
    let moved_to = if config.keep_files {
        None
    } else {
        let text = format!(
            "slopewarden set this file aside on {at}.\n\nWhy: {reason}\n\nWhat to do: correct the file and drop the corrected copy into the inbox; nothing from this file was stored.\n"
        );
        match inbox::move_to_quarantine(&file.path, &config.quarantine, now, &text) {
            Ok(p) => Some(p),
            Err(InboxError::Vanished { .. }) => None,
            Err(e) => return Err(e.into()),
        }
    };
    Ok(Outcome::Quarantined {
        reason: reason.to_string(),
        moved_to,
    })
}

/// A series touched by the file: its row, streaming state and the arrivals.
struct Touched {
    row: SeriesRow,
    settings: SeriesSettings,
    state: SeriesState,
    changed: bool,
    /// Points this file added to the fit, in order.
    new_points: Vec<(f64, f64)>,
    /// The series' co-moments before this file.
    before: Moments,
    /// Points of records awaiting review (kept out of the judging fit).
    awaiting: Vec<(f64, f64)>,
    /// Records of this series in the file (Bonferroni over a backlog).
    in_file: usize,
    /// The last arrival of this file and its record id.
    last: Option<(Arrival, String)>,
    /// The unit of this file's first record of the series that names one
    /// (the series' own when configured): what a trend message's slopes
    /// are in.
    unit: Option<String>,
    /// The fit of ln(y) on x, a second screen for multiplicative slips, for
    /// series fitted on the original scale while every y is positive.
    log: Option<SeriesState>,
    /// The analysis window in force, as configured and on the fitted scale.
    window: Option<(Window, Window)>,
    /// With a window: the points inside it, in arrival order.
    window_points: std::collections::VecDeque<(f64, f64)>,
    /// The series' newest record before this file.
    head_before: Option<i64>,
    /// The fits without the records left out of judging.
    judging: Option<JudgingBase>,
    /// The low end of the judging fit's x range, when known.
    judged_low: Option<JudgedLow>,
}

/// The smallest x among a series' fit points other than its suspects
/// `awaiting[start..]` (those left out of the judging fit), kept from
/// record to record and from file to file.
#[derive(Debug, Clone, Copy)]
struct JudgedLow {
    start: usize,
    low: f64,
}

/// The smallest x of `points` (stored before the file) and `new` (the
/// file's so far) once each of `left_out` is taken away (as a multiset:
/// a suspect repeated is left out as often as it is listed).
fn low_without(points: &[(f64, f64)], new: &[(f64, f64)], left_out: &[(f64, f64)]) -> f64 {
    let mut skip: HashMap<(u64, u64), usize> = HashMap::default();
    for p in left_out {
        *skip.entry((p.0.to_bits(), p.1.to_bits())).or_default() += 1;
    }
    let mut low = f64::INFINITY;
    for p in points.iter().chain(new) {
        if let Some(c) = skip.get_mut(&(p.0.to_bits(), p.1.to_bits()))
            && *c > 0
        {
            *c -= 1;
            continue;
        }
        low = low.min(p.0);
    }
    low
}

/// A series' fits (both scales) without the suspects awaiting review from
/// index `from` to `len` of its awaiting list.
#[derive(Debug, Clone, Copy)]
struct JudgingBase {
    from: usize,
    len: usize,
    state: Option<SeriesState>,
    log: Option<SeriesState>,
}

impl JudgingBase {
    fn take(&mut self, p: (f64, f64)) {
        if let Some(s) = self.state.as_mut()
            && s.add(p.0, p.1).is_err()
        {
            self.state = None;
        }
        if let Some(l) = self.log.as_mut()
            && (p.1 <= 0.0 || l.add(p.0, p.1.ln()).is_err())
        {
            self.log = None;
        }
    }
}

/// The judging base for `awaiting[start..]` left out of `state` and `log`:
/// the kept one when it still fits, extended when the share left out grew,
/// rebuilt when the suspects changed.
fn judging_base(
    slot: &mut Option<JudgingBase>,
    state: SeriesState,
    log: Option<SeriesState>,
    awaiting: &[(f64, f64)],
    start: usize,
) -> JudgingBase {
    let remove = |b: &mut JudgingBase, points: &[(f64, f64)]| {
        for &(x, y) in points {
            if let Some(s) = b.state.as_mut()
                && s.remove(x, y).is_err()
            {
                b.state = None;
            }
            if let Some(l) = b.log.as_mut()
                && (y <= 0.0 || l.remove(x, y.ln()).is_err())
            {
                b.log = None;
            }
        }
    };
    match slot {
        Some(b) if b.len == awaiting.len() && b.from == start => {}
        Some(b) if b.len == awaiting.len() && b.from > start => {
            let extra = &awaiting[start..b.from];
            remove(b, extra);
            b.from = start;
        }
        _ => {
            let mut b = JudgingBase {
                from: start,
                len: awaiting.len(),
                state: Some(state),
                log,
            };
            remove(&mut b, &awaiting[start..]);
            *slot = Some(b);
        }
    }
    slot.unwrap_or(JudgingBase {
        from: start,
        len: awaiting.len(),
        state: None,
        log: None,
    })
}

/// A record the rules flagged, waiting for the file's fits.
struct Flagged {
    record: Record,
    row_id: i64,
    arrival: Arrival,
    judgement: RecordJudgement,
    fit_point: (f64, f64),
    left_out: usize,
    span_before: (f64, f64),
}

/// What the rules need of a whole file before any of its records is
/// stored: how many records each series gets (the outlier test corrects
/// for them), and the refused rows (the reject-file rule).
#[derive(Debug, Default)]
struct Survey {
    per_series: HashMap<String, usize>,
    errors: usize,
    /// The first [`LISTED_ERRORS`] refused rows.
    first_errors: Vec<RecordError>,
}

impl Survey {
    fn of(p: &records::ParsedFile) -> Survey {
        let mut s = Survey::default();
        s.add(p);
        s
    }

    /// A large file's survey, from a first pass in chunks.
    fn stream(
        reader: &mut dyn std::io::Read,
        size: u64,
        layout: &records::Layout,
        rules: &dyn Fn(&SeriesId) -> records::SeriesRules,
        today: Today,
    ) -> Result<Survey, records::FileError> {
        let mut s = Survey::default();
        let mut stream =
            records::RecordStream::from_reader(reader, PIECE_BYTES, size, layout, rules, today)?;
        while let Some(chunk) = stream.next_chunk(CHUNK_ROWS)? {
            s.add(&chunk);
        }
        Ok(s)
    }

    fn add(&mut self, p: &records::ParsedFile) {
        for r in &p.records {
            match self.per_series.get_mut(r.series.as_str()) {
                Some(n) => *n += 1,
                None => {
                    self.per_series.insert(r.series.as_str().to_string(), 1);
                }
            }
        }
        self.add_errors(&p.errors);
    }

    fn add_errors(&mut self, errors: &[RecordError]) {
        self.errors += errors.len();
        let room = LISTED_ERRORS.saturating_sub(self.first_errors.len());
        self.first_errors.extend(errors.iter().take(room).cloned());
    }

    /// The refused rows of the whole file: those found by the survey and
    /// `late`, those found after it, the first ones listed in line order.
    fn refused_with(&self, late: Survey) -> (usize, Vec<RecordError>) {
        let mut first = self.first_errors.clone();
        if late.errors > 0 {
            first.extend(late.first_errors);
            first.sort_by_key(|e| e.line);
            first.truncate(LISTED_ERRORS);
        }
        (self.errors + late.errors, first)
    }
}

/// The file being stored.
struct FileMeta<'a> {
    name: &'a str,
    sha: &'a str,
    size: u64,
    feed: &'a str,
}

/// A file's rows as [`store_file`] takes them: chunks from `next` (one
/// for a small file), and what the survey found of the whole.
struct FileRows<'a> {
    next: &'a mut dyn FnMut() -> Result<Option<records::ParsedFile>, records::FileError>,
    survey: &'a Survey,
    /// The last chunk, handed back to be freed off the writer's thread.
    spent: &'a mut Spent,
    /// The file comes in one piece (small): its rows are encoded for its
    /// seal as they are handed to the writer.
    whole: bool,
}

/// What a file's last chunk leaves behind, freed by the reading thread
/// once the file is done: neither the writer (the busier thread while rows
/// are written) nor the computing one pays for a million small frees.
#[derive(Default)]
struct Spent {
    parsed: Option<records::ParsedFile>,
    /// Shared with the writer's batches until they are written.
    records: Option<Arc<Vec<Record>>>,
}

/// Stores a file in its one transaction. The outer error is the store's;
/// the inner one a file that turned out unreadable part way (its
/// transaction rolled back).
fn store_file(
    config: &Config,
    store: &mut Store,
    cache: &mut SeriesCache,
    meta: &FileMeta<'_>,
    rows: &mut FileRows<'_>,
    at: &str,
    now_unix: i64,
) -> Result<Result<(FileCounts, usize), records::FileError>, PipelineError> {
    let tx = store.begin()?;
    // The rows are written on a second thread while this one computes the
    // next ones; every read waits for the writes queued before it.
    write_behind(tx, None, |b| {
        match store_file_behind(b, config, cache, meta, rows, at, now_unix, &Start::Read)? {
            Ok(done) => {
                b.commit()?;
                Ok(Ok((done.counts, done.refits)))
            }
            // Dropped unended: rolled back.
            Err(e) => Ok(Err(e)),
        }
    })
}

/// How a file's transaction learns what the store holds before it.
#[derive(Debug, Clone, Copy)]
enum Start {
    /// Read from the store (the first file of a run, or any file whose
    /// transaction begins only once the one before has committed).
    Read,
    /// Assumed from the file before it, still being committed, so that
    /// this one is computed meanwhile: the store revision, the next row
    /// ids and the file's id. The transaction's first job checks them and
    /// that the file's content is not stored yet; the unique index on
    /// (record id, version) checks its record ids as they are written. If
    /// any is not as assumed, the transaction fails with
    /// [`StoreError::NotAsAssumed`] and the file is computed again.
    Assumed {
        revision: i64,
        next_ids: (i64, i64),
        file_id: crate::store::FileId,
    },
}

/// The outcome of writing record rows of a file computed ahead: such a
/// file assumed none of its record ids stored, so a row refused by the
/// unique index on (record id, version 1) means the assumption was wrong
/// (the file is computed again, and the record then takes the way of a
/// resubmission), not that the store failed.
fn written_as_assumed(written: Result<(), StoreError>, assumed: bool) -> Result<(), StoreError> {
    match written {
        Err(StoreError::Sqlite {
            source: rusqlite::Error::SqliteFailure(e, _),
            ..
        }) if assumed && e.code == rusqlite::ErrorCode::ConstraintViolation => {
            Err(StoreError::NotAsAssumed {
                what: "one of its record ids is stored already".into(),
            })
        }
        other => other,
    }
}

/// A file whose rows are all queued and whose transaction can end.
#[derive(Debug, Clone, Copy)]
struct Queued {
    counts: FileCounts,
    refits: usize,
    file_id: crate::store::FileId,
    /// The next record and fit row ids after this file's.
    next_ids: (i64, i64),
}

/// [`store_file`] inside the file's transaction: `b.tx()` for the
/// transaction itself (after the writes queued so far), `b.later` for
/// writes nothing below reads back before the commit.
#[allow(clippy::too_many_arguments)]
fn store_file_behind<'t, 'c: 't>(
    b: &mut Behind<'t>,
    config: &'c Config,
    cache: &mut SeriesCache,
    meta: &FileMeta<'_>,
    rows: &mut FileRows<'_>,
    at: &str,
    now_unix: i64,
    start: &Start,
) -> Result<Result<Queued, records::FileError>, PipelineError> {
    let FileMeta {
        name,
        sha,
        size,
        feed,
    } = *meta;
    let assumed = matches!(start, Start::Assumed { .. });
    let (ids, file_id) = match *start {
        Start::Read => {
            // Checked inside the write transaction: no verdict can slip in between.
            let revision = b.tx()?.revision()?;
            if cache.revision != Some(revision) {
                cache.clear();
                cache.revision = Some(revision);
            }
            let ids = b.tx()?.ids();
            let file_id = b.tx()?.insert_file(&NewFile {
                name,
                sha256: sha,
                size,
                arrived_at: at,
                feed,
            })?;
            (ids, file_id)
        }
        Start::Assumed {
            revision,
            next_ids,
            file_id,
        } => {
            let ids = crate::store::IdCounters::starting_at(next_ids);
            let shared = Arc::clone(&ids);
            let (name, sha, at, feed) = (
                name.to_string(),
                sha.to_string(),
                at.to_string(),
                feed.to_string(),
            );
            b.later(move |tx| {
                let differs = |what: String| Err(StoreError::NotAsAssumed { what });
                let now = tx.revision()?;
                if now != revision {
                    return differs(format!("store revision {now}, not {revision}"));
                }
                if tx.first_ids() != next_ids {
                    return differs(format!(
                        "next row ids {:?}, not {next_ids:?}",
                        tx.first_ids()
                    ));
                }
                if let Some(first) = tx.file_by_hash(&sha)? {
                    return differs(format!("the same content is stored as {}", first.name));
                }
                let id = tx.insert_file(&NewFile {
                    name: &name,
                    sha256: &sha,
                    size,
                    arrived_at: &at,
                    feed: &feed,
                })?;
                if id != file_id {
                    return differs(format!("file id {}, not {}", id.0, file_id.0));
                }
                tx.adopt_ids(shared);
                Ok(())
            });
            (ids, file_id)
        }
    };
    let mut counts = FileCounts::default();
    let per_series = &rows.survey.per_series;
    // Sized for every series of the file at once: a Touched is large, and
    // regrowing the map moved them all (measured in memmove).
    let mut touched: HashMap<String, Touched> =
        HashMap::with_capacity_and_hasher(per_series.len(), Default::default());
    let mut order: Vec<String> = Vec::with_capacity(per_series.len());
    let mut flagged: Vec<Flagged> = Vec::new();
    let mut plain: Vec<PlainFinding> = Vec::new();
    // Rows of a large file refused over their unit on the second read.
    let mut late = Survey::default();
    loop {
        let mut parsed = match (rows.next)() {
            Ok(Some(chunk)) => chunk,
            Ok(None) => break,
            Err(e) => return Ok(Err(e)),
        };
        if !rows.whole {
            // A large file's chunks, read again: its survey, from the
            // first read, could not ask the store for its series' units.
            // (Its records per series still count rows refused here, which
            // makes the outlier test of those series a little stricter.)
            let parse_errors = std::mem::take(&mut parsed.errors);
            reconcile_units(&mut parsed, config, &mut cache.units, &mut |key| {
                Ok(b.tx()?.series_unit(key)?)
            })?;
            if let Some(first) = parsed.errors.first()
                && config.bad_rows == BadRows::RejectFile
            {
                return Ok(Err(records::FileError::Malformed {
                    line: first.line,
                    reason: format!(
                        "{}; ingest.bad_rows = \"reject-file\": fix the row and deliver the file again",
                        first.reason
                    ),
                }));
            }
            late.add_errors(&parsed.errors);
            if !parse_errors.is_empty() {
                parsed.errors.extend(parse_errors);
                parsed.errors.sort_by_key(|e| e.line);
            }
        }
        counts.bad += parsed.errors.len() as u64;
        if !parsed.errors.is_empty() {
            let errors = parsed.errors.clone();
            b.later(move |tx| {
                errors
                    .iter()
                    .try_for_each(|e| tx.insert_bad_row(file_id, e))
            });
        }
        // Shared with the writing thread, which writes them in batches.
        let records = Arc::new(std::mem::take(&mut parsed.records));
        // Ids stored by earlier files: those records take the slow path (same
        // record again, or a conflict); all others are written in batches.
        // Taking the transaction back here also bounds memory: the writing
        // thread is never more than one chunk of records behind. A file
        // computed ahead (a whole small one) assumes none, and its
        // transaction checks that.
        let stored = match start {
            Start::Read => b
                .tx()?
                .stored_ids(records.iter().map(|r| r.record_id.as_str()))?,
            // The unique index on (record id, version) checks it as the
            // rows are written (see `written_as_assumed`).
            Start::Assumed { .. } => Default::default(),
        };
        let mut batch = RecordBatch::new(Arc::clone(&records));
        for (index, record) in records.iter().enumerate() {
            let key = record.series.as_str();
            if !touched.contains_key(key) {
                let settings = config.series_settings(&record.series);
                // Taken out, put back after the commit (a failure clears the cache).
                let cached = cache.rows.remove(key);
                let row = match cached {
                    Some(row) => row,
                    None => match b.tx()?.series(key)? {
                        Some(row) => row,
                        None => {
                            if let Some(other) = named_alike(cache, b, key)? {
                                plain.push(similar_series(
                                    key,
                                    &other,
                                    record,
                                    per_series.get(key).copied().unwrap_or(1),
                                    name,
                                ));
                            }
                            b.tx()?.create_series(
                                key,
                                settings.unit.as_deref(),
                                settings.transform.name(),
                                &settings.non_detects.name(),
                                settings.x_name.as_deref(),
                                settings.x_unit.as_deref(),
                            )?
                        }
                    },
                };
                let state = SeriesState::from_moments(row.moments);
                let window = match cache.windows.get(key) {
                    Some(w) => *w,
                    None => {
                        let w = match b.tx()?.window_override(row.id)? {
                            Some(text) if text == "all" => None,
                            // Validated when it was stored.
                            Some(text) => Window::parse(&text).ok(),
                            None => settings.window,
                        };
                        cache.windows.insert(key.to_string(), w);
                        w
                    }
                };
                let transform = settings.transform;
                let window = window.map(|w| (w, w.on_fit_scale(transform)));
                let window_points = match window {
                    Some((_, w)) => w.select(&b.tx()?.fit_points(&row)?, |p| p.0).into(),
                    None => std::collections::VecDeque::new(),
                };
                // The low end of the judging fit is kept with the list of
                // suspects it leaves out, and only with it.
                let (awaiting, judged_low) = match cache.awaiting.remove(key) {
                    Some(a) => (a, cache.judged_low.remove(key)),
                    None => (b.tx()?.awaiting_review(row.id)?, None),
                };
                let log = match cache.log.remove(key) {
                    // The ln(y) screen follows all points; a windowed fit goes
                    // without it.
                    _ if window.is_some() => None,
                    Some(l) => l,
                    None if settings.transform != Transform::None => None,
                    // Kept with the series' heads: no walk through its
                    // points (a long series took 0.1 s a restart).
                    None if row.log_screen.is_some() => {
                        row.log_screen.flatten().map(SeriesState::from_moments)
                    }
                    None => {
                        let points = if row.moments.n() == 0 {
                            Vec::new()
                        } else {
                            b.tx()?.fit_points(&row)?
                        };
                        log_state(&points)
                    }
                };
                let head_before = row.latest_record;
                // A series with no point yet has all its points seen here:
                // they are kept from the start, so that its first robust
                // slope needs no walk through the store (a wait for the
                // writing thread).
                if row.moments.n() == 0 && window.is_none() && !cache.points.contains_key(key) {
                    cache.points.insert(key.to_string(), Arc::default());
                }
                let in_file = per_series.get(key).copied().unwrap_or(1);
                touched.insert(
                    key.to_string(),
                    Touched {
                        before: row.moments,
                        row,
                        settings,
                        state,
                        changed: false,
                        // Sized once: a large delivery's points must not
                        // double their way up.
                        new_points: Vec::with_capacity(in_file),
                        awaiting,
                        in_file,
                        last: None,
                        unit: None,
                        log,
                        window,
                        window_points,
                        head_before,
                        judging: None,
                        judged_low,
                    },
                );
                order.push(key.to_string());
            }
            let Some(t) = touched.get_mut(key) else {
                unreachable!("BUG: the series was inserted just above");
            };
            if t.unit.is_none() {
                t.unit = t.row.unit.clone().or_else(|| record.unit.clone());
            }
            let joins = t.row.fit_version + 1;
            let fit_point = match fit_point(record, &t.settings) {
                Ok(p) => p,
                Err(reason) => {
                    // A value the fit cannot take (zero under a log): set the
                    // row aside like any refused row.
                    let bad = refused(record, reason);
                    b.later(move |tx| tx.insert_bad_row(file_id, &bad));
                    counts.bad += 1;
                    continue;
                }
            };
            let mut probe = t.state;
            // Outside the window, a record is stored and eligible, but neither
            // enters this fit nor is judged against it.
            let admitted = match (t.window, fit_point) {
                (Some((_, w)), Some(p)) => w.admits_x(p.0),
                _ => true,
            };
            let arrival: Option<Arrival> = match fit_point.filter(|_| admitted) {
                Some((fx, fy)) => match probe.add(fx, fy) {
                    Ok(a) => {
                        if let Some((_, w)) = t.window {
                            t.window_points.push_back((fx, fy));
                            if let Window::Last(n) = w
                                && t.window_points.len() > n
                                && let Some((ox, oy)) = t.window_points.pop_front()
                            {
                                // The oldest point leaves; the file's fit is
                                // recomputed from the window's points at the end.
                                let _ = probe.remove(ox, oy);
                            }
                        }
                        Some(a)
                    }
                    Err(err) => {
                        // Validated records are finite; a transform could still
                        // overflow. Set the row aside rather than guess.
                        let reason = format!("the value cannot enter the fit: {err}");
                        let bad = refused(record, reason);
                        b.later(move |tx| tx.insert_bad_row(file_id, &bad));
                        counts.bad += 1;
                        continue;
                    }
                },
                None => None,
            };
            let placement = RecordPlacement {
                fit_point,
                arrival: arrival.as_ref().map(|a| (a, joins, config.level)),
            };
            if !stored.contains(record.record_id.as_str()) {
                let row_id = batch.queue_current(
                    &ids,
                    index,
                    t.row.id,
                    file_id,
                    placement,
                    t.row.latest_record,
                );
                if batch.is_worth_handing() {
                    let mut full = batch.take();
                    if rows.whole {
                        full.encode_seal();
                    }
                    b.later(move |tx| written_as_assumed(tx.flush_records(&mut full), assumed));
                }
                t.row.latest_record = Some(row_id);
                counts.new += 1;
                t.row.records += 1;
                if record.y.is_censored() {
                    t.row.censored += 1;
                }
                t.row.last_arrival = Some(at.to_string());
                t.changed = true;
                if let (Some(a), Some(p)) = (&arrival, fit_point) {
                    // Judge against the fit without records awaiting review.
                    // At most a tenth of the points are left out (the newest
                    // suspects): leaving out more would judge newcomers against
                    // a fit too thin to trust, and swamp clean records.
                    // (Not in a windowed fit: a suspect may have left the window.)
                    let cap = if t.window.is_some() {
                        0
                    } else {
                        (t.state.n() as usize) / MAX_LEFT_OUT_SHARE
                    };
                    let start = t.awaiting.len().saturating_sub(cap);
                    let left_out = &t.awaiting[start..];
                    // The fits without the left-out points, kept from record to
                    // record and rebuilt only when the suspects change: removing
                    // them afresh for every record cost O(suspects) each.
                    let base = if left_out.is_empty() {
                        None
                    } else {
                        Some(judging_base(
                            &mut t.judging,
                            t.state,
                            t.log,
                            &t.awaiting,
                            start,
                        ))
                    };
                    let judged = match &base {
                        None => Some(*a),
                        Some(b) => b
                            .state
                            .and_then(|mut st| st.add(p.0, p.1).ok())
                            .or(Some(*a)),
                    };
                    // The same on the ln(y) scale, where a decimal slip or a unit
                    // mix-up stands out even in a series whose scatter grows
                    // with its level.
                    let log_judged = match t.log.as_mut() {
                        Some(ls) if p.1 > 0.0 => {
                            let judged = match &base {
                                None => {
                                    let mut copy = *ls;
                                    copy.add(p.0, p.1.ln()).ok()
                                }
                                Some(b) => b.log.and_then(|mut l| l.add(p.0, p.1.ln()).ok()),
                            };
                            if ls.add(p.0, p.1.ln()).is_err() {
                                t.log = None;
                            }
                            judged
                        }
                        Some(_) => {
                            t.log = None;
                            None
                        }
                        None => None,
                    };
                    // The low end of the range judged against leaves out the
                    // suspects too: a date typed ten years early sets it
                    // otherwise, and the next such typo then looks like the
                    // usual spacing. The high end keeps every point: a time
                    // series grows there, and with a suspect at its newest
                    // end left out, each record after it would look far out
                    // in turn.
                    let judged_span = match t.row.x_span {
                        Some((lo, hi)) if left_out.iter().any(|q| q.0 <= lo) => {
                            let low = match t.judged_low {
                                Some(m) if m.start == start => m.low,
                                Some(m) if m.start < start => {
                                    // Older suspects are back in the judging fit.
                                    let back = &t.awaiting[m.start..start];
                                    back.iter().fold(m.low, |l, q| l.min(q.0))
                                }
                                _ => {
                                    let stored = match cache.points.get(key) {
                                        Some(p) => Arc::clone(p),
                                        None => {
                                            let p: Vec<(f64, f64)> = b
                                                .tx()?
                                                .fit_points_with_rows(t.head_before)?
                                                .into_iter()
                                                .map(|(_, x, y)| (x, y))
                                                .collect();
                                            let p = Arc::new(p);
                                            if t.window.is_none() {
                                                cache
                                                    .points
                                                    .insert(key.to_string(), Arc::clone(&p));
                                            }
                                            p
                                        }
                                    };
                                    low_without(&stored, &t.new_points, left_out)
                                }
                            };
                            t.judged_low = Some(JudgedLow { start, low });
                            Some((if low.is_finite() { low.max(lo) } else { lo }, hi))
                        }
                        other => other,
                    };
                    let awaiting_before = t.awaiting.len();
                    let mut judgement = match (judged, judged_span) {
                        (Some(judged), Some((lo, hi))) => judge_record_with(
                            &judged,
                            Span { min: lo, max: hi },
                            t.in_file,
                            &t.settings.findings,
                            &mut cache.cutoffs,
                        ),
                        _ => None,
                    };
                    // The ln(y) screen asks only whether the record is an
                    // outlier there, and not where the series (before the
                    // record) rules that scale out: with additive scatter
                    // and a falling level, the ln scale stretches the low
                    // end and would flag ordinary records. (Asked last:
                    // only a record the screen would flag needs it.)
                    if let (Some(j), Some(lj), Some(mj), Some(_)) =
                        (judgement.as_mut(), log_judged, judged, t.row.x_span)
                        && !j.kinds.contains(&RecordKind::Outlier)
                        && let Some(m) = outlier_measure(
                            &lj,
                            t.in_file,
                            &t.settings.findings,
                            &mut cache.cutoffs,
                        )
                        && m.crossed
                        && !ln_scale_ruled_out(&mj.before, &lj.before)
                    {
                        j.kinds.push(RecordKind::Outlier);
                        j.kinds.sort();
                        j.measures.push(Measured {
                            measure: "prediction t on the ln(y) scale (second screen for multiplicative slips)",
                            ..m
                        });
                    }
                    if let (Some(j), Some((lo, hi))) = (judgement, t.row.x_span)
                        && !j.kinds.is_empty()
                    {
                        // Only a record that sits off the line or far out in x
                        // can mask the next one; an influential record on the
                        // line stays in the judging fit.
                        let suspect = j
                            .kinds
                            .iter()
                            .any(|k| matches!(k, RecordKind::Outlier | RecordKind::HighLeverage));
                        flagged.push(Flagged {
                            record: record.clone(),
                            row_id,
                            arrival: *a,
                            judgement: j,
                            fit_point: p,
                            left_out: left_out.len(),
                            span_before: (lo, hi),
                        });
                        if suspect {
                            t.awaiting.push(p);
                        }
                    }
                    t.row.x_span = Some(match t.row.x_span {
                        Some((lo, hi)) => (lo.min(p.0), hi.max(p.0)),
                        None => (p.0, p.0),
                    });
                    t.state = probe;
                    // So does the low end of its range (a new suspect is among
                    // those left out, and changes nothing there).
                    if let Some(m) = t.judged_low.as_mut()
                        && t.awaiting.len() == awaiting_before
                    {
                        m.low = m.low.min(p.0);
                    }
                    // The judging base takes the point too, unless it became a
                    // suspect (then the base is rebuilt for the next record).
                    match t.judging.as_mut() {
                        Some(j) if j.len == t.awaiting.len() => j.take(p),
                        _ => t.judging = None,
                    }
                    t.new_points.push(p);
                    // The id's buffer is reused: one allocation per series
                    // and file, not per record.
                    match t.last.as_mut() {
                        Some((arrival, id)) => {
                            *arrival = *a;
                            id.clear();
                            id.push_str(&record.record_id);
                        }
                        None => t.last = Some((*a, record.record_id.clone())),
                    }
                }
                continue;
            }
            let Some((stored_record, max_version)) = b.tx()?.current_record(&record.record_id)?
            else {
                unreachable!("BUG: stored_ids found a version 1, so a current version exists");
            };
            let same = stored_record.series == key
                && stored_record.x == record.x
                && stored_record.y == record.y.number()
                && stored_record.censored == record.y.is_censored();
            if same {
                counts.same += 1;
            } else if !b.tx()?.has_proposal(
                &record.record_id,
                record.x,
                record.y.number(),
                record.y.is_censored(),
            )? {
                counts.conflict += 1;
                b.tx()?
                    .insert_proposed(record, t.row.id, file_id, max_version + 1)?;
                let answerable = (stored_record.series == key
                    && stored_record.x == record.x
                    && !stored_record.censored
                    && !record.y.is_censored())
                .then_some((stored_record.row, record.y.number()));
                plain.push(PlainFinding {
                kind: "conflict",
                series: key.to_string(),
                record_ids: vec![record.record_id.clone()],
                judged_against: "the stored version of the record",
                answerable,
                summary: format!(
                    "record {} resubmitted in {name} line {} with other values (stored: x {}, y {}; new: x {}, y {}); kept as proposed version {}, the stored version is unchanged",
                    record.record_id,
                    record.line,
                    stored_record.x,
                    stored_record.y,
                    record.x,
                    record.y.number(),
                    max_version + 1
                ),
            });
                b.tx()?.append_audit(
                at,
                AuditKind::Conflict,
                &record.record_id,
                &format!(
                    "{name} line {}: record {} resubmitted with other values (stored: series {}, x {}, y {}; new: series {}, x {}, y {}); kept as proposed version {}, the stored version is unchanged",
                    record.line,
                    record.record_id,
                    stored_record.series,
                    stored_record.x,
                    stored_record.y,
                    key,
                    record.x,
                    record.y.number(),
                    max_version + 1
                ),
            )?;
            } else {
                counts.same += 1;
            }
        }
        if !batch.is_empty() {
            if rows.whole {
                batch.encode_seal();
            }
            b.later(move |tx| written_as_assumed(tx.flush_records(&mut batch), assumed));
        }
        // The records go when the writing thread is done with them; the
        // previous chunk's here (the writer finished it before this chunk's
        // ids were read), the last one's on the reading thread.
        rows.spent.records = Some(records);
        rows.spent.parsed = Some(parsed);
    }
    // Robust slopes first: gather the series due for one, compute them on
    // a second thread while the file's last records are written, then
    // write the fit rows.
    let mut due: Vec<&str> = Vec::new();
    let mut windowed: Vec<(&str, Vec<(f64, f64)>)> = Vec::new();
    for key in &order {
        let Some(t) = touched.get_mut(key) else {
            continue;
        };
        let n = t.state.n() as i64;
        if t.window.is_some() {
            // A window's fit is recomputed from its points; so is its
            // robust slope, at every refit (a window is short, or fixed).
            let (x, y): (Vec<f64>, Vec<f64>) = t.window_points.iter().copied().unzip();
            t.state = SeriesState::from_moments(Moments::from_points(&x, &y));
            t.row.x_span = x_span(&x);
            if t.changed && x.len() >= 3 {
                windowed.push((key.as_str(), t.window_points.iter().copied().collect()));
            }
            continue;
        }
        let stale_enough =
            n <= ROBUST_EVERY_REFIT_UP_TO || (n as f64) >= ROBUST_GROWTH * (t.row.robust_n as f64);
        if !t.changed || n < 3 || !stale_enough {
            continue;
        }
        match cache.points.entry(key.clone()) {
            std::collections::hash_map::Entry::Occupied(e) => {
                join_points(e.into_mut(), &mut t.new_points);
            }
            std::collections::hash_map::Entry::Vacant(e) => {
                // The points stored before this file, then this file's
                // (taken, not copied: a large file's are megabytes).
                let stored = b.tx()?.fit_points_with_rows(t.head_before)?;
                let mut points = std::mem::take(&mut t.new_points);
                if !stored.is_empty() {
                    points.splice(0..0, stored.into_iter().map(|(_, x, y)| (x, y)));
                }
                e.insert(Arc::new(points));
            }
        }
        due.push(key);
    }
    let mut robust_of: HashMap<&str, RobustRow> = HashMap::default();
    {
        // A short series' pairwise slopes are kept and take only the new
        // points; a longer one's are selected afresh, on two threads.
        let mut fresh: Vec<&str> = Vec::new();
        for &key in &due {
            let Some(points) = cache.points.get(key) else {
                continue;
            };
            match cache
                .pairwise
                .robust(key, points, config.level, PAIRWISE_SLOPES_MAX)
            {
                Some(Some(r)) => {
                    robust_of.insert(key, r);
                    cache
                        .robust
                        .insert(key.to_string(), (r.slope, r.ci_low, r.ci_high));
                }
                Some(None) => {}
                None => fresh.push(key),
            }
        }
        let jobs: Vec<(&str, &[(f64, f64)])> = fresh
            .iter()
            .filter_map(|k| cache.points.get(*k).map(|p| (*k, p.as_slice())))
            .chain(windowed.iter().map(|(k, p)| (*k, p.as_slice())))
            .collect();
        for (key, r) in robust_rows_split(&jobs, config.level) {
            robust_of.insert(key, r);
            cache
                .robust
                .insert(key.to_string(), (r.slope, r.ci_low, r.ci_high));
        }
    }
    let mut refits = 0;
    let mut refit_list = String::new();
    let mut fits = FitBatch::new();
    let mut heads: Vec<SeriesHeads> = Vec::with_capacity(order.len());
    let mut trends: Vec<(String, TrendChange, Option<LineFit>, LineFit)> = Vec::new();
    for key in &order {
        let Some(t) = touched.get_mut(key) else {
            continue;
        };
        if !t.changed {
            continue;
        }
        let _series_span = tracing::debug_span!("series", series = %key).entered();
        refits += 1;
        t.row.fit_version += 1;
        t.row.moments = *t.state.moments();
        t.row.window = t.window.map(|(w, _)| w.text());
        let quantiles = cache.quantiles(config.level);
        let fit =
            LineFit::from_moments_with(t.state.moments(), config.level, |df| quantiles.get(df));
        let robust = robust_of.get(key.as_str()).copied();
        if robust.is_some() {
            t.row.robust_n = t.state.n() as i64;
        }
        if let Ok(new_fit) = &fit {
            let previous = match cache.known_fit(key, &t.before, config.level) {
                Some(f) => Some(f),
                None => {
                    let quantiles = cache.quantiles(config.level);
                    LineFit::from_moments_with(&t.before, config.level, |df| quantiles.get(df)).ok()
                }
            };
            cache.line_fits.insert(key.clone(), *new_fit);
            let without = t
                .last
                .as_ref()
                .and_then(|(a, _)| a.slope_without().map(|s| (s, a.slope_p_without())));
            let (significant, changes) = judge_trend(
                previous.as_ref().map(|f| (f.slope, t.row.significant, f.n)),
                new_fit,
                without,
                &t.settings.findings,
            );
            t.row.significant = significant;
            for change in changes {
                trends.push((key.clone(), change, previous, *new_fit));
            }
        }
        let note = match (&fit, &robust) {
            (Err(e), _) => Some(format!("no fit yet: {e}")),
            (Ok(_), None) => Some(format!(
                "robust slope not recomputed at this version (last at n = {})",
                t.row.robust_n
            )),
            _ => None,
        };
        let fit_row = fits.queue(
            &ids,
            &NewFit {
                state: &t.row,
                trigger_file: Some(file_id),
                created_at: at,
                transform: t.settings.transform.name(),
                non_detects: &t.settings.non_detects.name(),
                level: config.level,
                fit: fit.as_ref().ok(),
                robust,
                note,
            },
        );
        if fits.is_worth_handing() {
            let mut full = fits.take();
            if rows.whole {
                full.encode_seal();
            }
            b.later(move |tx| tx.flush_fits(&mut full));
        }
        t.row.latest_fit = Some(fit_row);
        // The ln(y) screen resumes from here after a restart (kept only
        // where the screen runs: untransformed series without a window).
        t.row.log_screen = match (t.window, t.settings.transform) {
            (None, Transform::None) => Some(t.log.map(|l| *l.moments())),
            _ => None,
        };
        heads.push(SeriesHeads::of(&t.row));
        refit_list.push_str(&refit_detail(&t.row, fit.as_ref().ok()));
        refit_list.push('\n');
    }
    let outcome = if counts.bad > 0 {
        FileOutcome::Partial
    } else {
        FileOutcome::Ingested
    };
    if !fits.is_empty() {
        if rows.whole {
            fits.encode_seal();
        }
        b.later(move |tx| tx.flush_fits(&mut fits));
    }
    if !heads.is_empty() {
        b.later(move |tx| heads.iter().try_for_each(|h| tx.save_heads(h)));
    }
    // The fits with and without each flagged record, here rather than on
    // the writing thread, with the remembered t quantiles.
    let fits: Vec<WithWithout> = {
        let quantiles = cache.quantiles(config.level);
        flagged
            .iter()
            .map(|f| {
                let with = f
                    .arrival
                    .fit_with_using(config.level, |df| quantiles.get(df));
                let without = f
                    .arrival
                    .fit_without_using(config.level, |df| quantiles.get(df));
                (with.ok(), without.ok())
            })
            .collect()
    };
    // While the rows are still being written.
    let causes = rank_flagged(config, cache, &touched, (&flagged, &fits), name);
    // The series' kept points take this file's now; the findings share
    // them instead of copying them.
    for (key, t) in touched.iter_mut() {
        if let Some(p) = cache.points.get_mut(key) {
            join_points(p, &mut t.new_points);
        }
    }
    let work = FindingsWork::gather(
        cache,
        &touched,
        rows.survey.refused_with(late),
        (flagged, causes, fits),
        plain,
        trends,
    );
    // The findings, the file's row and its seal and audit entry are written
    // last, on the writing thread, in the file's transaction; the caller
    // ends it.
    {
        let (name, sha, feed, at) = (
            name.to_string(),
            sha.to_string(),
            feed.to_string(),
            at.to_string(),
        );
        b.later(move |tx| {
            let findings = if work.is_empty() {
                0
            } else {
                raise_findings(tx, config, &work, (file_id, &name), &at, now_unix)?
            };
            tx.finish_file(file_id, outcome, counts, None)?;
            let seal = tx.seal(SealScope::File(file_id.0))?;
            tx.append_audit(
                &at,
                AuditKind::FileIngested,
                &name,
                &format!(
                    "sha256 {sha}; feed {feed}; {} new, {} already stored, {} conflicts, {} rows set aside; {refits} series refitted:\n{refit_list}{seal}",
                    counts.new, counts.same, counts.conflict, counts.bad
                ),
            )?;
            if findings > 0 {
                info!(file = %name, findings, "findings raised");
            }
            Ok(())
        });
    }
    let next_ids = ids.next();
    // The cache moves on as if the transaction commits: if it does not,
    // the caller clears the cache.
    for (key, t) in touched {
        cache.awaiting.insert(key.clone(), t.awaiting);
        if let Some(m) = t.judged_low {
            cache.judged_low.insert(key.clone(), m);
        }
        cache.log.insert(key.clone(), t.log);
        cache.rows.insert(key, t.row);
    }
    if cache.points.values().map(|p| p.len()).sum::<usize>() > POINTS_KEPT_MAX {
        cache.points = HashMap::default();
    }
    Ok(Ok(Queued {
        counts,
        refits,
        file_id,
        next_ids,
    }))
}

/// Appends a file's new points to a series' kept ones, leaving `new`
/// without its buffer: taken whole when nothing was kept yet (a large
/// file's points are megabytes), copied only when the kept ones are still
/// shared with findings being written.
fn join_points(kept: &mut Arc<Vec<(f64, f64)>>, new: &mut Vec<(f64, f64)>) {
    if kept.is_empty() {
        *kept = Arc::new(std::mem::take(new));
    } else {
        Arc::make_mut(kept).append(new);
        *new = Vec::new();
    }
}

/// The ln(y)-on-x state of a series' points, when every y is positive.
fn log_state(points: &[(f64, f64)]) -> Option<SeriesState> {
    let mut s = SeriesState::new();
    for &(x, y) in points {
        if y <= 0.0 {
            return None;
        }
        s.add(x, y.ln()).ok()?;
    }
    Some(s)
}

/// A series' fit with a record and without it (the fit before it arrived).
type WithWithout = (Option<LineFit>, Option<LineFit>);

/// A finding without a record under judgement, waiting for the file's fits.
struct PlainFinding {
    kind: &'static str,
    series: String,
    record_ids: Vec<String>,
    summary: String,
    /// What the finding compared the file with, as its detail says.
    judged_against: &'static str,
    /// A conflict that only changes y within the same series: the stored
    /// record's row and the resubmitted y, so that a verdict can take the
    /// new value (or exclude the record) as for a flagged record.
    answerable: Option<(i64, f64)>,
}

/// The series a flagged record could belong to instead: those of the file
/// and those met earlier, indexed by site and by parameter (the key's parts
/// before and after the first '/'), with their fits computed when first
/// asked for. Built once per file: scanning every series for every flagged
/// record cost O(series) each.
struct Neighbours<'a> {
    /// Key, scale (transform name) and moments (lent, not copied: a file
    /// with a flagged record builds this over every series met).
    series: Vec<(&'a str, &'a str, &'a Moments)>,
    /// The fits asked for so far, by index into `series`.
    fits: HashMap<usize, Option<LineFit>>,
    by_site: HashMap<&'a str, Vec<usize>>,
    by_parameter: HashMap<&'a str, Vec<usize>>,
}

impl<'a> Neighbours<'a> {
    fn of(touched: &'a HashMap<String, Touched>, earlier: &'a HashMap<String, SeriesRow>) -> Self {
        let series: Vec<(&str, &str, &Moments)> = touched
            .iter()
            .map(|(k, o)| (k.as_str(), o.settings.transform.name(), o.state.moments()))
            .chain(
                earlier
                    .iter()
                    .filter(|(k, _)| !touched.contains_key(*k))
                    .map(|(k, r)| (k.as_str(), r.transform.as_str(), &r.moments)),
            )
            .collect();
        let mut by_site: HashMap<&str, Vec<usize>> = HashMap::default();
        let mut by_parameter: HashMap<&str, Vec<usize>> = HashMap::default();
        for (i, (k, _, _)) in series.iter().enumerate() {
            let (site, parameter) = k.split_once('/').unwrap_or((k, ""));
            by_site.entry(site).or_default().push(i);
            if !parameter.is_empty() {
                by_parameter.entry(parameter).or_default().push(i);
            }
        }
        Neighbours {
            fits: HashMap::default(),
            series,
            by_site,
            by_parameter,
        }
    }
}

/// The likely entry errors of each flagged record (in `flagged` order):
/// pure, so worked out while the file's rows are still being written.
fn rank_flagged(
    config: &Config,
    cache: &mut SeriesCache,
    touched: &HashMap<String, Touched>,
    (flagged, fits): (&[Flagged], &[WithWithout]),
    file_name: &str,
) -> Vec<Vec<Candidate>> {
    if flagged.is_empty() {
        return Vec::new();
    }
    let quantiles = cache.quantiles(config.level);
    let mut quantiles = std::mem::replace(quantiles, TQuantiles::new(config.level));
    let mut neighbours = Neighbours::of(touched, &cache.rows);
    let ranked = flagged
        .iter()
        .zip(fits)
        .map(|(f, (_, without))| {
            let key = f.record.series.as_str();
            let Some(t) = touched.get(key) else {
                return Vec::new();
            };
            // "Belongs to another series": the series that share its site or
            // its parameter (the key's part before or after the first '/')
            // and its scale: those of this file, and those met earlier.
            let (site, parameter) = key.split_once('/').unwrap_or((key, ""));
            let scale = t.settings.transform.name();
            let related = neighbours
                .by_site
                .get(site)
                .into_iter()
                .chain(
                    (!parameter.is_empty())
                        .then(|| neighbours.by_parameter.get(parameter))
                        .flatten(),
                )
                .flatten()
                .copied();
            // Their fits, computed once per file; then lent, not copied
            // (a record can have a hundred related series).
            let mut related_here: Vec<usize> = Vec::new();
            for i in related {
                let Some(&(k, other_scale, m)) = neighbours.series.get(i) else {
                    continue;
                };
                if k == key || other_scale != scale {
                    continue;
                }
                neighbours.fits.entry(i).or_insert_with(|| {
                    cache.known_fit(k, m, config.level).or_else(|| {
                        LineFit::from_moments_with(m, config.level, |df| quantiles.get(df)).ok()
                    })
                });
                related_here.push(i);
            }
            let mine: Vec<(&str, &LineFit)> = related_here
                .iter()
                .filter_map(|&i| {
                    let fit = neighbours.fits.get(&i)?.as_ref()?;
                    Some((neighbours.series.get(i)?.0, fit))
                })
                .collect();
            raise::likely_causes(
                config,
                &f.record,
                without.as_ref(),
                t.settings.transform,
                Some(f.span_before),
                &mine,
                file_name,
            )
        })
        .collect();
    *cache.quantiles(config.level) = quantiles;
    ranked
}

/// What a file's findings need of its series, taken out of the computing
/// state so that they can be raised on the writing thread while the
/// computing one goes on with the next file.
struct SeriesView {
    row: SeriesRow,
    transform: Transform,
    awaiting: Vec<(f64, f64)>,
    /// The series' fit points when kept in memory, shared with the cache
    /// (else walked from the store when a chart or the sampling advice
    /// needs them).
    points: Option<Arc<Vec<(f64, f64)>>>,
    robust: Option<(f64, f64, f64)>,
    /// The id of the file's last record of the series.
    last_id: Option<String>,
    /// The unit of the series' values in this file.
    unit: Option<String>,
}

/// A file's findings, owned: raised by [`raise_findings`] inside the
/// file's transaction.
struct FindingsWork {
    series: HashMap<String, SeriesView>,
    flagged: Vec<Flagged>,
    causes: Vec<Vec<Candidate>>,
    /// Each flagged record's series fit with it and without it.
    fits: Vec<WithWithout>,
    plain: Vec<PlainFinding>,
    trends: Vec<(String, TrendChange, Option<LineFit>, LineFit)>,
    errors: usize,
    first_errors: Vec<RecordError>,
}

impl FindingsWork {
    fn gather(
        cache: &SeriesCache,
        touched: &HashMap<String, Touched>,
        (errors, first_errors): (usize, Vec<RecordError>),
        (flagged, causes, fits): (Vec<Flagged>, Vec<Vec<Candidate>>, Vec<WithWithout>),
        plain: Vec<PlainFinding>,
        trends: Vec<(String, TrendChange, Option<LineFit>, LineFit)>,
    ) -> FindingsWork {
        let mut series: HashMap<String, SeriesView> = HashMap::default();
        let keys = flagged
            .iter()
            .map(|f| f.record.series.as_str())
            .chain(plain.iter().map(|p| p.series.as_str()))
            .chain(trends.iter().map(|t| t.0.as_str()));
        for key in keys {
            if series.contains_key(key) {
                continue;
            }
            let Some(t) = touched.get(key) else {
                continue;
            };
            // The series' points when kept (this file's among them).
            let points = cache.points.get(key).map(Arc::clone);
            series.insert(
                key.to_string(),
                SeriesView {
                    row: t.row.clone(),
                    transform: t.settings.transform,
                    awaiting: t.awaiting.clone(),
                    points,
                    robust: cache.robust.get(key).copied(),
                    last_id: t.last.as_ref().map(|(_, id)| id.clone()),
                    unit: t.unit.clone(),
                },
            );
        }
        FindingsWork {
            series,
            flagged,
            causes,
            fits,
            plain,
            trends,
            errors,
            first_errors,
        }
    }

    fn is_empty(&self) -> bool {
        self.flagged.is_empty()
            && self.plain.is_empty()
            && self.trends.is_empty()
            && self.errors == 0
    }
}

/// Raises a file's findings inside its transaction; returns how many.
fn raise_findings(
    tx: &crate::store::Tx<'_>,
    config: &Config,
    work: &FindingsWork,
    file: (crate::store::FileId, &str),
    at: &str,
    now_unix: i64,
) -> Result<usize, StoreError> {
    let mut raised = 0;
    let mut series_points: HashMap<&str, Arc<Vec<(f64, f64)>>> = HashMap::default();
    for ((f, causes), fits) in work.flagged.iter().zip(&work.causes).zip(&work.fits) {
        let record = &f.record;
        let key = record.series.as_str();
        let Some(t) = work.series.get(key) else {
            continue;
        };
        // Points feed the chart and the sampling advice; a message held
        // for a digest has no chart.
        let high_leverage = f.judgement.kinds.contains(&RecordKind::HighLeverage);
        let draw_chart = !raise::all_held(tx, config, Some(key), now_unix)?;
        // Read once per series and file: a backlog file can flag dozens
        // of records of one long series.
        let points: &[(f64, f64)] = if high_leverage || draw_chart {
            if !series_points.contains_key(key) {
                let points = match &t.points {
                    Some(all) => {
                        #[cfg(debug_assertions)]
                        {
                            let stored = tx.fit_points(&t.row)?;
                            debug_assert_eq!(**all, stored, "kept points of {key}");
                        }
                        Arc::clone(all)
                    }
                    None => Arc::new(tx.fit_points(&t.row)?),
                };
                series_points.insert(key, points);
            }
            series_points.get(key).map_or(&[], |p| p.as_slice())
        } else {
            &[]
        };
        raise::record_finding(
            tx,
            config,
            &raise::RecordCase {
                record,
                row_id: f.row_id,
                series: &t.row,
                transform: t.transform,
                fits: *fits,
                judgement: &f.judgement,
                left_out: f.left_out,
                fit_point: f.fit_point,
                points,
                awaiting: &t.awaiting,
                causes,
                robust: t.robust,
                draw_chart,
                span_before: Some(f.span_before),
            },
            file,
            at,
            now_unix,
        )?;
        raised += 1;
    }
    for p in &work.plain {
        let series = work.series.get(&p.series).map(|t| &t.row);
        raise::plain_finding(
            tx,
            config,
            p.kind,
            series,
            Some(file),
            &p.record_ids,
            &p.summary,
            match p.answerable {
                Some((_, y)) => {
                    serde_json::json!({ "summary": p.summary, "caution": raise::CAUTION,
                    "judged_against": p.judged_against, "proposed_y": y })
                }
                None => serde_json::json!({ "summary": p.summary, "caution": raise::CAUTION,
                    "judged_against": p.judged_against }),
            },
            (None, None),
            None,
            p.answerable.map(|(row, _)| row),
            at,
            now_unix,
        )?;
        raised += 1;
    }
    if work.errors > 0 {
        let listed = &work.first_errors;
        let ids: Vec<String> = listed.iter().filter_map(|e| e.record_id.clone()).collect();
        let rows: Vec<serde_json::Value> = listed
            .iter()
            .map(|e| {
                serde_json::json!({"line": e.line, "column": e.column, "field": e.field,
                "record_id": e.record_id, "reason": e.reason})
            })
            .collect();
        let first = listed.first().map(|e| e.to_string()).unwrap_or_default();
        let more = if work.errors > listed.len() {
            format!(
                " ({} listed here; all are in the store's quarantined rows)",
                listed.len()
            )
        } else {
            String::new()
        };
        let summary = format!(
            "{} row(s) of {} set aside by validation; the rest of the file was stored{more}. First: {first}",
            work.errors, file.1
        );
        raise::plain_finding(
            tx,
            config,
            "quarantined",
            None,
            Some(file),
            &ids,
            &summary,
            serde_json::json!({ "rows": rows, "caution": raise::CAUTION,
                "judged_against": "the validation rules of the series (see the configuration)" }),
            (None, None),
            None,
            None,
            at,
            now_unix,
        )?;
        raised += 1;
    }
    for (key, change, before, after) in &work.trends {
        let Some(t) = work.series.get(key) else {
            continue;
        };
        raise::trend_finding(
            tx,
            config,
            change,
            &t.row,
            file,
            before.as_ref(),
            after,
            (t.last_id.as_deref(), t.unit.as_deref()),
            t.robust,
            at,
            now_unix,
        )?;
        raised += 1;
    }
    Ok(raised)
}

/// A stored-side refusal of a parsed record, in the parser's error shape.
/// A series key as people would read it aloud: letter case, white space,
/// hyphens and underscores left out (`MW-1/Nitrate`, `mw1 / nitrate` and
/// `MW_1/nitrate` are one form).
fn name_form(key: &str) -> String {
    key.chars()
        .filter(|c| !c.is_whitespace() && *c != '-' && *c != '_')
        .flat_map(char::to_lowercase)
        .collect()
}

/// The existing series whose key has the same [`name_form`] as `key`, a
/// series about to be created; `key` is remembered either way.
fn named_alike(
    cache: &mut SeriesCache,
    b: &mut Behind<'_>,
    key: &str,
) -> Result<Option<String>, PipelineError> {
    if cache.names.is_none() {
        let keys = b.tx()?.series_keys()?;
        cache.names = Some(keys.into_iter().map(|k| (name_form(&k), k)).collect());
    }
    let names = cache.names.get_or_insert_with(HashMap::default);
    Ok(match names.entry(name_form(key)) {
        std::collections::hash_map::Entry::Occupied(e) if e.get() != key => Some(e.get().clone()),
        std::collections::hash_map::Entry::Occupied(_) => None,
        std::collections::hash_map::Entry::Vacant(e) => {
            e.insert(key.to_string());
            None
        }
    })
}

/// The finding on a new series named like an existing one: most likely
/// the same location and parameter typed another way, whose records then
/// miss that series' trend and its checks.
fn similar_series(
    key: &str,
    other: &str,
    first: &Record,
    in_file: usize,
    file: &str,
) -> PlainFinding {
    PlainFinding {
        kind: "similar_series",
        series: key.to_string(),
        record_ids: vec![first.record_id.clone()],
        judged_against: "the names of the series stored before this file",
        answerable: None,
        summary: format!(
            "new series {key} is named like the existing series {other}: {in_file} record(s) of {file} (first {}, line {}) went to the new series, outside {other}'s trend",
            first.record_id, first.line
        ),
    }
}

/// The unit of each series without a configured one: that of its
/// records, `None` while none of them names a unit.
type RecordUnits = HashMap<String, Option<String>>;

/// Puts a chunk's records of series without a configured unit in the unit
/// their series' records are in (the first unit of the unit table such a
/// series met, stored or earlier in the chunk): a record naming another
/// unit is converted
/// when the unit table can (a laboratory reporting in µg/L what it used to
/// report in mg/L), and set aside with the reason when it cannot (a soil
/// value in mg/kg filed in a water series), so that no series mixes units
/// unseen. The refused rows join the chunk's errors in line order. `known`
/// holds what is settled so far and learns; `stored` asks the store about
/// a series it does not hold. A chunk put in its units already is left as
/// it is.
fn reconcile_units(
    chunk: &mut records::ParsedFile,
    config: &Config,
    known: &mut RecordUnits,
    stored: &mut dyn FnMut(&str) -> Result<Option<String>, PipelineError>,
) -> Result<(), PipelineError> {
    /// What one series' records are put in.
    enum Target {
        /// Its configured unit: the parser converted them already.
        Configured,
        /// No unit yet: the next record naming one sets it.
        Open(Matrix),
        /// This unit.
        Unit(String, Matrix),
    }
    let mut targets: HashMap<String, Target> = HashMap::default();
    let mut refused = Vec::new();
    let mut records = Vec::with_capacity(chunk.records.len());
    for mut record in std::mem::take(&mut chunk.records) {
        let key = record.series.as_str();
        let target = match targets.get_mut(key) {
            Some(t) => t,
            None => {
                let settings = config.series_settings(&record.series);
                let t = if settings.unit.is_some() {
                    Target::Configured
                } else {
                    let unit = match known.get(key) {
                        Some(u) => u.clone(),
                        None => {
                            let u = stored(key)?;
                            known.insert(key.to_string(), u.clone());
                            u
                        }
                    };
                    match unit {
                        Some(u) => Target::Unit(u, settings.matrix),
                        None => Target::Open(settings.matrix),
                    }
                };
                targets.entry(key.to_string()).or_insert(t)
            }
        };
        let converted = match (&*target, record.unit.as_deref()) {
            (Target::Configured, _) | (_, None) => None,
            // A unit the table does not know (a typing slip, or a unit such
            // as pCi/L it has no conversions for) sets nothing: the
            // records after it are not refused over a slip in one cell.
            (Target::Open(_), Some(written)) if !units::is_known(written) => None,
            (Target::Open(matrix), Some(written)) => {
                let unit = written.to_string();
                known.insert(key.to_string(), Some(unit.clone()));
                *target = Target::Unit(unit, *matrix);
                None
            }
            (Target::Unit(unit, _), Some(written)) if unit == written => None,
            (Target::Unit(unit, matrix), Some(written)) => Some(
                units::convert_measure(record.y, written, unit, *matrix)
                    .map(|y| (y, unit.clone()))
                    .map_err(|why| {
                        format!(
                            "{why} (series {key} has no unit configured; its records so far are in {unit})"
                        )
                    }),
            ),
        };
        match converted {
            None => records.push(record),
            Some(Ok((y, unit))) => {
                record.y = y;
                record.unit = Some(unit);
                records.push(record);
            }
            Some(Err(reason)) => refused.push(RecordError {
                line: record.line,
                column: chunk.unit_column.as_ref().map(|c| c.0),
                field: chunk.unit_column.as_ref().map(|c| c.1.clone()),
                record_id: Some(record.record_id),
                reason,
                raw: record.raw,
            }),
        }
    }
    chunk.records = records;
    if !refused.is_empty() {
        chunk.errors.append(&mut refused);
        chunk.errors.sort_by_key(|e| e.line);
    }
    Ok(())
}

fn refused(record: &Record, reason: String) -> RecordError {
    RecordError {
        line: record.line,
        column: None,
        field: None,
        record_id: Some(record.record_id.clone()),
        reason,
        raw: record.raw.clone(),
    }
}

/// One line per refit in the file's audit entry: which version of which
/// series, and its n. The statistics themselves are on the fit row, and
/// verifying recomputes them from the records.
fn refit_detail(row: &SeriesRow, fit: Option<&LineFit>) -> String {
    let status = if fit.is_some() {
        "fitted"
    } else {
        "no fit yet"
    };
    format!(
        "{} v{} n={} {status}",
        row.key,
        row.fit_version,
        row.moments.n()
    )
}

/// The point a record contributes to its series' fit, on the fitted scale;
/// `None` for a non-detect left out by policy.
fn fit_point(record: &Record, settings: &SeriesSettings) -> Result<Option<(f64, f64)>, String> {
    let y = match (record.y, settings.non_detects) {
        (Measure::Detected(v), _) => v,
        (Measure::NonDetect { .. }, NonDetectPolicy::Exclude) => return Ok(None),
        (Measure::NonDetect { limit }, NonDetectPolicy::Substitute { fraction }) => {
            fraction * limit
        }
    };
    if settings.transform == Transform::None {
        return Ok(Some((record.x, y)));
    }
    settings
        .transform
        .apply(0, record.x, y)
        .map(Some)
        .map_err(|_| {
            format!(
                "record {} (x = {}, y = {}) cannot enter the {} fit of series {}: a logarithm needs a positive value; check the value, or change the series' transform",
                record.record_id,
                record.x,
                y,
                settings.transform.name(),
                record.series
            )
        })
}

/// The robust rows of several series; those whose robust slope is
/// undefined are left out. (Two threads were tried here for backlogs that
/// bring many series to a checkpoint at once; no gain could be measured
/// beside the reader thread, so it stays simple.)
fn robust_rows<'k>(jobs: &[(&'k str, &[(f64, f64)])], level: f64) -> Vec<(&'k str, RobustRow)> {
    jobs.iter()
        .filter_map(|(k, p)| robust_row(p, level).map(|r| (*k, r)))
        .collect()
}

/// The smallest and largest x, when there are any.
/// [`robust_rows`] on two threads when there is work for two, the jobs
/// split in halves of about equal points.
fn robust_rows_split<'k>(
    jobs: &[(&'k str, &[(f64, f64)])],
    level: f64,
) -> Vec<(&'k str, RobustRow)> {
    let total: usize = jobs.iter().map(|j| j.1.len()).sum();
    if jobs.len() < 2 || total < 2_000 {
        return robust_rows(jobs, level);
    }
    let mut half = 0;
    let mut points = 0;
    while half < jobs.len() && points * 2 < total {
        points += jobs[half].1.len();
        half += 1;
    }
    let (first, second) = jobs.split_at(half);
    std::thread::scope(|scope| {
        let worker = scope.spawn(|| robust_rows(second, level));
        let mut out = robust_rows(first, level);
        out.extend(
            worker
                .join()
                .unwrap_or_else(|e| std::panic::resume_unwind(e)),
        );
        out
    })
}

pub(crate) fn x_span(x: &[f64]) -> Option<(f64, f64)> {
    x.iter().fold(None, |span, &v| match span {
        None => Some((v, v)),
        Some((lo, hi)) => Some((f64::min(lo, v), f64::max(hi, v))),
    })
}

/// [`robust_row`] from pairwise slopes kept current.
fn robust_row_of(kept: &PairwiseTrend, level: f64) -> Option<RobustRow> {
    Some(robust_row_from(
        kept.theil_sen(level).ok()?,
        kept.mann_kendall().ok()?,
    ))
}

/// Theil-Sen and Mann-Kendall of a series' points; None when undefined.
pub(crate) fn robust_row(points: &[(f64, f64)], level: f64) -> Option<RobustRow> {
    let (x, y): (Vec<f64>, Vec<f64>) = points.iter().copied().unzip();
    Some(robust_row_from(
        theil_sen(&x, &y, level).ok()?,
        mann_kendall(&x, &y).ok()?,
    ))
}

fn robust_row_from(ts: TheilSen, mk: MannKendall) -> RobustRow {
    RobustRow {
        slope: ts.slope,
        ci_low: ts.ci_low,
        ci_high: ts.ci_high,
        mk_s: mk.s,
        mk_p: mk.p,
    }
}

/// The path of a file relative to the inbox, for display and storage.
pub fn relative_to(inbox: &Path, path: &Path) -> PathBuf {
    path.strip_prefix(inbox)
        .map(Path::to_path_buf)
        .unwrap_or_else(|_| path.to_path_buf())
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    //! A file computed while the one before it commits checks, inside its
    //! own transaction, everything it assumed; each wrong assumption rolls
    //! it back whole.
    use super::*;

    fn quarterly(n: usize) -> Vec<(f64, f64)> {
        (0..n)
            .map(|i| {
                let x = 2010.0 + i as f64 * 0.25;
                // Rounded, with a wobble, so that slopes tie now and then.
                (
                    x,
                    ((5.0 + 0.2 * (x - 2010.0) + ((i * 7) % 5) as f64 * 0.3) * 10.0).round() / 10.0,
                )
            })
            .collect()
    }

    /// Kept slopes give the row computed from scratch (`robust_row`, whose
    /// Theil-Sen and Mann-Kendall are checked against scipy in
    /// tests/reference_robust.rs), file after file.
    #[test]
    fn kept_pairwise_slopes_give_the_robust_row_from_scratch() {
        let mut kept = KeptPairs::default();
        let all = quarterly(100);
        for n in [3, 4, 9, 10, 40, 99, 100] {
            let row = kept.robust("W-1/nitrate", &all[..n], 0.95, 1_000_000);
            assert_eq!(row, Some(robust_row(&all[..n], 0.95)), "n = {n}");
        }
        assert_eq!(kept.held, 4_950);
        // Past 100 points the series is let go, and computed from scratch.
        let longer = quarterly(101);
        assert_eq!(kept.robust("W-1/nitrate", &longer, 0.95, 1_000_000), None);
        assert_eq!((kept.series.len(), kept.held), (0, 0));
    }

    /// The bound on slopes held: no series is kept past it, and the one
    /// that grows past it still gets its row, then is let go.
    #[test]
    fn kept_pairwise_slopes_stay_within_their_bound() {
        let mut kept = KeptPairs::default();
        let a = quarterly(15);
        // 10 points: 45 slopes, room under 100.
        assert!(kept.robust("A", &a[..10], 0.95, 100).is_some());
        assert_eq!(kept.held, 45);
        // 12 points more for another series (66 slopes): no room.
        assert_eq!(kept.robust("B", &a[..12], 0.95, 100), None);
        assert!(!kept.series.contains_key("B"));
        // The kept series grows to 15 points (105 slopes): its row, then gone.
        assert_eq!(kept.robust("A", &a, 0.95, 100), Some(robust_row(&a, 0.95)));
        assert_eq!((kept.series.len(), kept.held), (0, 0));
        // With room again, B is kept.
        assert!(kept.robust("B", &a[..12], 0.95, 100).is_some());
        assert_eq!(kept.held, 66);
    }

    /// The reading thread's lower priority is its own (the kernel's nice
    /// value of that thread, read back from /proc), not the process's.
    #[cfg(target_os = "linux")]
    #[test]
    fn a_thread_lowers_its_own_priority_only() {
        fn nice_of(stat: &str) -> i32 {
            // Fields after the command name, which is in parentheses; the
            // nice value is field 19 of the line.
            let after = &stat[stat.rfind(')').unwrap() + 2..];
            after.split(' ').nth(16).unwrap().parse().unwrap()
        }
        let own = || nice_of(&std::fs::read_to_string("/proc/thread-self/stat").unwrap());
        let before = own();
        let (inside, process) = std::thread::spawn(move || {
            lower_this_thread_priority(before + 3);
            (
                own(),
                nice_of(&std::fs::read_to_string("/proc/self/stat").unwrap()),
            )
        })
        .join()
        .unwrap();
        assert_eq!(inside, before + 3);
        assert_eq!(process, before, "the main thread keeps its priority");
        assert_eq!(own(), before);
    }

    fn deliver(inbox: &Path, name: &str, first_id: usize, n: usize, shift: f64) -> ReadyFile {
        let mut text = String::from("record_id,series,x,y\n");
        for i in 0..n {
            let x = 2000.0 + (first_id + i) as f64 * 0.25;
            let y = 5.0 + 0.1 * x.sin() + shift;
            text.push_str(&format!("W{:04},MW-7/nitrate,{x},{y}\n", first_id + i));
        }
        let path = inbox.join(name);
        std::fs::write(&path, text).unwrap();
        ReadyFile {
            size: std::fs::metadata(&path).unwrap().len(),
            path,
            relative: name.into(),
            modified: SystemTime::UNIX_EPOCH,
        }
    }

    /// A number read through a connection of its own (committed rows).
    fn count(db: &Path, sql: &str) -> i64 {
        rusqlite::Connection::open(db)
            .unwrap()
            .query_row(sql, [], |r| r.get(0))
            .unwrap()
    }

    /// What a second file may assume after the first one committed.
    fn assumed(db: &Path, cache: &SeriesCache) -> Start {
        Start::Assumed {
            revision: cache.revision.unwrap(),
            next_ids: (
                count(db, "SELECT MAX(id) + 1 FROM records"),
                count(db, "SELECT MAX(id) + 1 FROM fits"),
            ),
            file_id: crate::store::FileId(count(db, "SELECT MAX(id) + 1 FROM source_files")),
        }
    }

    /// Computes `file` ahead on `start` and commits; the commit's outcome.
    fn ahead(
        config: &Config,
        store: &mut Store,
        cache: &mut SeriesCache,
        file: &ReadyFile,
        start: &Start,
    ) -> Result<(), StoreError> {
        let mut prepared = prepare(config, file, SystemTime::now());
        let tx = store.begin().unwrap();
        // A read while computing (the cache lacks the series) already
        // meets a wrong assumption; otherwise the commit does.
        write_behind(tx, None, |b| {
            match compute_ahead(b, config, cache, file, &mut prepared, start) {
                Ok(Some(_)) => b.commit(),
                Ok(None) => panic!("the file should not take the plain way"),
                // Left unended: rolled back.
                Err(PipelineError::Store(e)) => Err(e),
                Err(e) => panic!("{e}"),
            }
        })
    }

    /// A store holding the first file, and the second file to come.
    fn setup() -> (tempfile::TempDir, Config, Store, SeriesCache) {
        let dir = tempfile::tempdir().unwrap();
        let config = Config::defaults_in(dir.path());
        std::fs::create_dir_all(&config.inbox).unwrap();
        let mut store = Store::open(&config.database).unwrap();
        let mut cache = SeriesCache::new();
        let first = deliver(&config.inbox, "a.csv", 1, 12, 0.0);
        let done = process_file(&config, &mut store, &mut cache, &first, SystemTime::now());
        assert!(matches!(done, Ok(Outcome::Ingested { .. })), "{done:?}");
        (dir, config, store, cache)
    }

    fn refused_whole(db: &Path, outcome: Result<(), StoreError>, what: &str) {
        match outcome {
            Err(StoreError::NotAsAssumed { what: said }) => {
                assert!(said.contains(what), "{said} should say {what}")
            }
            other => panic!("expected a wrong assumption about {what}, got {other:?}"),
        }
        assert_eq!(count(db, "SELECT COUNT(*) FROM records"), 12);
        assert_eq!(count(db, "SELECT COUNT(*) FROM source_files"), 1);
        assert_eq!(count(db, "SELECT COUNT(*) FROM fits"), 1);
    }

    #[test]
    fn right_assumptions_commit_the_same_rows_as_reading_them() {
        let (_dir, config, mut store, mut cache) = setup();
        let start = assumed(&config.database, &cache);
        let next = deliver(&config.inbox, "b.csv", 13, 6, 0.0);
        ahead(&config, &mut store, &mut cache, &next, &start).unwrap();
        assert_eq!(count(&config.database, "SELECT COUNT(*) FROM records"), 18);
        assert_eq!(count(&config.database, "SELECT MAX(id) FROM records"), 18);
        assert_eq!(
            count(
                &config.database,
                "SELECT COUNT(*) FROM records WHERE file_id = 2"
            ),
            6
        );
        assert_eq!(count(&config.database, "SELECT MAX(version) FROM fits"), 2);
        assert!(crate::verify::verify(&store).unwrap().ok());
    }

    #[test]
    fn a_verdict_given_meanwhile_is_caught_by_the_store_revision() {
        let (_dir, config, mut store, mut cache) = setup();
        let start = assumed(&config.database, &cache);
        let tx = store.begin().unwrap();
        tx.bump_revision().unwrap();
        tx.commit().unwrap();
        let next = deliver(&config.inbox, "b.csv", 13, 6, 0.0);
        let outcome = ahead(&config, &mut store, &mut cache, &next, &start);
        refused_whole(&config.database, outcome, "store revision");
    }

    #[test]
    fn rows_written_meanwhile_are_caught_by_the_next_ids() {
        let (_dir, config, mut store, mut cache) = setup();
        let Start::Assumed {
            revision, file_id, ..
        } = assumed(&config.database, &cache)
        else {
            unreachable!()
        };
        let next = deliver(&config.inbox, "b.csv", 13, 6, 0.0);
        // As if the file before had written one record fewer.
        let start = Start::Assumed {
            revision,
            next_ids: (12, 2),
            file_id,
        };
        let outcome = ahead(&config, &mut store, &mut cache, &next, &start);
        refused_whole(&config.database, outcome, "next row ids");
        // As if it had taken another file id.
        let mut cache = SeriesCache::new();
        let start = Start::Assumed {
            revision,
            next_ids: (13, 2),
            file_id: crate::store::FileId(file_id.0 + 1),
        };
        let outcome = {
            let tx = store.begin().unwrap();
            let revision_read = tx.revision().unwrap();
            drop(tx);
            cache.revision = Some(revision_read);
            ahead(&config, &mut store, &mut cache, &next, &start)
        };
        refused_whole(&config.database, outcome, "file id");
    }

    #[test]
    fn a_large_file_is_stored_from_disk_and_set_aside_if_it_changes_meanwhile() {
        let (_dir, config, mut store, mut cache) = setup();
        let db = config.database.clone();
        // Above LARGE_FILE_BYTES, so read from disk in pieces, twice.
        let big = deliver(&config.inbox, "big.csv", 100, 100_000, 0.0);
        assert!(big.size > LARGE_FILE_BYTES, "{}", big.size);
        let bytes = std::fs::read(&big.path).unwrap();
        let sha = hex::encode(<sha2::Sha256 as sha2::Digest>::digest(&bytes));
        let prepared = prepare(&config, &big, SystemTime::now());
        assert!(prepared.large.is_some() && prepared.parsed.is_none());
        assert!(
            matches!(&prepared.read, Ok((h, n, b)) if *h == sha && *n == big.size && b.is_empty()),
            "hashed on the first read, not held: {:?}",
            prepared.read.as_ref().map(|(h, n, b)| (h, n, b.len()))
        );
        let (done, _) = process_prepared(&config, &mut store, &mut cache, &big, prepared);
        assert!(matches!(done, Ok(Outcome::Ingested { .. })), "{done:?}");
        assert_eq!(count(&db, "SELECT count(*) FROM records"), 12 + 100_000);
        let stored: String = rusqlite::Connection::open(&db)
            .unwrap()
            .query_row(
                "SELECT sha256 FROM source_files WHERE name = 'big.csv'",
                [],
                |r| r.get(0),
            )
            .unwrap();
        assert_eq!(stored, sha);

        // The same size, one value changed in the last row after the first
        // read: the second read hashes differently and nothing is stored.
        let late = deliver(&config.inbox, "late.csv", 200_000, 100_000, 1.0);
        let prepared = prepare(&config, &late, SystemTime::now());
        let mut text = std::fs::read(&late.path).unwrap();
        let at = text.len() - 2;
        text[at] = if text[at] == b'1' { b'2' } else { b'1' };
        {
            use std::io::Write;
            let mut f = std::fs::OpenOptions::new()
                .write(true)
                .open(&late.path)
                .unwrap();
            f.write_all(&text).unwrap();
        }
        let (done, _) = process_prepared(&config, &mut store, &mut cache, &late, prepared);
        match done {
            Ok(Outcome::Quarantined { reason, .. }) => assert!(
                reason.contains("changed while it was being read"),
                "{reason}"
            ),
            other => panic!("{other:?}"),
        }
        assert_eq!(count(&db, "SELECT count(*) FROM records"), 12 + 100_000);
        assert_eq!(
            count(
                &db,
                "SELECT count(*) FROM source_files WHERE outcome = 'quarantined'"
            ),
            1
        );
    }

    #[test]
    fn a_stored_id_in_the_middle_of_a_statement_leaves_nothing_of_the_file() {
        // Bulk INSERTs run OR FAIL: the rows before the failing one in the
        // same statement are written, then go with the transaction.
        let (_dir, config, mut store, mut cache) = setup();
        let start = assumed(&config.database, &cache);
        // 40 new records (more than a statement's 32 rows), W0012 among
        // the first 32.
        let next = deliver(&config.inbox, "b.csv", 13, 40, 0.0);
        let text = std::fs::read_to_string(&next.path).unwrap();
        let mut lines: Vec<&str> = text.lines().collect();
        lines.insert(11, "W0012,MW-7/nitrate,2003.0,5.0");
        std::fs::write(&next.path, lines.join("\n") + "\n").unwrap();
        let next = ReadyFile {
            size: std::fs::metadata(&next.path).unwrap().len(),
            ..next
        };
        let outcome = ahead(&config, &mut store, &mut cache, &next, &start);
        refused_whole(&config.database, outcome, "record ids is stored already");
        assert_eq!(
            count(
                &config.database,
                "SELECT COUNT(*) FROM records WHERE file_id = 2"
            ),
            0
        );
    }

    #[test]
    fn records_or_content_stored_already_are_caught() {
        let (_dir, config, mut store, mut cache) = setup();
        let start = assumed(&config.database, &cache);
        // W0012 again, then new ones: the file takes the way of a
        // resubmission instead.
        let overlapping = deliver(&config.inbox, "b.csv", 12, 6, 0.0);
        let outcome = ahead(&config, &mut store, &mut cache, &overlapping, &start);
        refused_whole(&config.database, outcome, "record ids is stored already");
        // The first file's bytes under another name.
        let mut cache = SeriesCache::new();
        cache.revision = match start {
            Start::Assumed { revision, .. } => Some(revision),
            Start::Read => None,
        };
        let again = deliver(&config.inbox, "c.csv", 1, 12, 0.0);
        let outcome = ahead(&config, &mut store, &mut cache, &again, &start);
        refused_whole(&config.database, outcome, "same content is stored as a.csv");
    }
}
