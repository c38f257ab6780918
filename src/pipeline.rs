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
    judge_trend, outlier_measure,
};
use crate::inbox::{self, InboxError, ReadyFile};
use crate::raise;
use crate::records::{self, Measure, Record, RecordError, SeriesId, Today};
use crate::stats::robust::{mann_kendall, theil_sen};
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

/// Records awaiting review are left out of the judging fit up to one in
/// this many of the series' points.
const MAX_LEFT_OUT_SHARE: usize = 10;

/// A file larger than this is neither read ahead on the reader thread nor
/// parsed whole: a parsed record takes several times its line in memory
/// (about 480 bytes for a 58-byte line), so a 100 MB delivery parsed whole
/// took 1 GB. It is read when its turn comes and parsed in chunks of
/// [`CHUNK_ROWS`] rows, twice: once to count each series' records and the
/// refused rows (what the outlier test and the reject-file rule need of
/// the whole file), once to store them, in the same one transaction.
const LARGE_FILE_BYTES: u64 = 4 << 20;

/// Rows per chunk of a large file.
const CHUNK_ROWS: usize = 16_384;

/// Refused rows listed in a finding or a reject-file reason; the rest are
/// counted (each is stored in `quarantined_rows` all the same).
const LISTED_ERRORS: usize = 200;

/// Fit points kept in [`SeriesCache`] at most (16 bytes each: 64 MB).
/// Past it they are all let go, and each series reads its points back
/// from the store at its next robust-slope computation: a daemon running
/// for months must not hold every point it ever stored.
const POINTS_KEPT_MAX: usize = 4_000_000;

/// Series rows kept between files by the one writer, so that a series
/// touched by every file is not read back each time. Cleared whenever a
/// transaction fails, since its rows may then be ahead of the database.
#[derive(Debug, Default)]
pub struct SeriesCache {
    rows: HashMap<String, SeriesRow>,
    /// The fit points (fitted scale) of series whose robust slope has been
    /// computed once, so that later checkpoints need not read them back.
    points: HashMap<String, Vec<(f64, f64)>>,
    /// Points of records awaiting review, per series.
    awaiting: HashMap<String, Vec<(f64, f64)>>,
    /// Critical values of the finding rules.
    cutoffs: CutoffCache,
    /// The last robust slope and interval computed per series.
    robust: HashMap<String, (f64, f64, f64)>,
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
        self.rows.clear();
        self.points.clear();
        self.awaiting.clear();
        self.robust.clear();
        self.log.clear();
        self.windows.clear();
        self.revision = None;
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
    read: Result<(String, u64, Vec<u8>), InboxError>,
    /// `None` for a large file, parsed in chunks as it is stored.
    parsed: Option<Result<records::ParsedFile, records::FileError>>,
    now: SystemTime,
    /// The last chunk's records once stored, freed with the rest.
    stored: Option<Arc<Vec<Record>>>,
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
/// file is only read (see [`LARGE_FILE_BYTES`]).
pub fn prepare(config: &Config, file: &ReadyFile, now: SystemTime) -> Prepared {
    let read = inbox::read_below(&file.path, &listing_root(file), config.max_file_bytes);
    let parsed = read
        .as_ref()
        .ok()
        .filter(|(_, _, bytes)| bytes.len() as u64 <= LARGE_FILE_BYTES)
        .map(|(_, _, bytes)| {
            let (_, layout) = config.feed_for(&file.relative);
            let rules = |id: &SeriesId| config.series_settings(id).rules();
            records::parse_file(bytes, layout, &rules, today_of(now))
        });
    Prepared {
        read,
        parsed,
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
    // One file ahead at most: memory stays at two files' worth.
    let (ready_tx, ready_rx) = sync_channel::<Option<Prepared>>(1);
    let (spent_tx, spent_rx) = channel::<Prepared>();
    std::thread::scope(|scope| {
        scope.spawn(move || {
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
        });
        for (i, (config, file)) in files.iter().enumerate() {
            if stop.load(Ordering::SeqCst) {
                break;
            }
            let Ok(prepared) = ready_rx.recv() else {
                break;
            };
            let prepared = prepared.unwrap_or_else(|| prepare(config, file, SystemTime::now()));
            let (result, spent) = process_prepared(config, store, cache, file, prepared);
            let _ = spent_tx.send(spent);
            if each(i, file, result) == Flow::Stop {
                break;
            }
        }
        // Dropping the receiver ends the reader at its next send.
        drop(ready_rx);
    });
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
        let moved_to = move_done(
            config,
            file,
            now,
            prepared.read.as_ref().ok().map(|(_, _, b)| b.as_slice()),
        )?;
        return Ok(Outcome::Duplicate {
            first: first.name,
            moved_to,
        });
    }
    let (feed, layout) = config.feed_for(&file.relative);
    let rules = |id: &SeriesId| config.series_settings(id).rules();
    let bytes: &[u8] = match &prepared.read {
        Ok((_, _, b)) => b,
        Err(_) => &[],
    };
    // What the rules need of the whole file before any record is stored.
    let (whole, survey) = match prepared.parsed.take() {
        Some(Ok(p)) => {
            let survey = Survey::of(&p);
            (Some(p), survey)
        }
        Some(Err(e)) => {
            let reason = format!("{e}");
            return quarantine_whole(config, store, file, &name, &sha, size, &reason, now, &at);
        }
        None => match Survey::stream(bytes, layout, &rules, today_of(now)) {
            Ok(survey) => (None, survey),
            Err(e) => {
                let reason = format!("{e}");
                return quarantine_whole(config, store, file, &name, &sha, size, &reason, now, &at);
            }
        },
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
    let mut whole = whole;
    let mut stream = if whole.is_some() {
        None
    } else {
        match records::RecordStream::new(bytes, layout, &rules, today_of(now)) {
            Ok(s) => Some(s),
            Err(e) => {
                let reason = format!("{e}");
                return quarantine_whole(config, store, file, &name, &sha, size, &reason, now, &at);
            }
        }
    };
    // Small files come in one piece, large ones chunk by chunk.
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
    info!(
        new = counts.new,
        same = counts.same,
        conflict = counts.conflict,
        bad = counts.bad,
        refits,
        "file committed"
    );
    crash_point("after-commit");
    let moved_to = move_done(
        config,
        file,
        now,
        prepared.read.as_ref().ok().map(|(_, _, b)| b.as_slice()),
    )?;
    Ok(Outcome::Ingested {
        counts,
        refits,
        moved_to,
    })
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

fn move_done(
    config: &Config,
    file: &ReadyFile,
    now: SystemTime,
    read: Option<&[u8]>,
) -> Result<Option<PathBuf>, PipelineError> {
    if config.keep_files {
        return Ok(None);
    }
    match inbox::archive_from_inbox(&file.path, &config.inbox, &config.archive, now, read) {
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
        bytes: &[u8],
        layout: &records::Layout,
        rules: &dyn Fn(&SeriesId) -> records::SeriesRules,
        today: Today,
    ) -> Result<Survey, records::FileError> {
        let mut s = Survey::default();
        let mut stream = records::RecordStream::new(bytes, layout, rules, today)?;
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
        self.errors += p.errors.len();
        let room = LISTED_ERRORS.saturating_sub(self.first_errors.len());
        self.first_errors
            .extend(p.errors.iter().take(room).cloned());
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
    write_behind(tx, |b| {
        store_file_behind(b, config, cache, meta, rows, at, now_unix)
    })
}

/// [`store_file`] inside the file's transaction: `b.tx()` for the
/// transaction itself (after the writes queued so far), `b.later` for
/// writes nothing below reads back before the commit.
#[allow(clippy::too_many_arguments)]
fn store_file_behind(
    b: &mut Behind<'_>,
    config: &Config,
    cache: &mut SeriesCache,
    meta: &FileMeta<'_>,
    rows: &mut FileRows<'_>,
    at: &str,
    now_unix: i64,
) -> Result<Result<(FileCounts, usize), records::FileError>, PipelineError> {
    let FileMeta {
        name,
        sha,
        size,
        feed,
    } = *meta;
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
    let mut counts = FileCounts::default();
    let mut touched: HashMap<String, Touched> = HashMap::default();
    let mut order: Vec<String> = Vec::new();
    let per_series = &rows.survey.per_series;
    let mut flagged: Vec<Flagged> = Vec::new();
    let mut plain: Vec<PlainFinding> = Vec::new();
    loop {
        let mut parsed = match (rows.next)() {
            Ok(Some(chunk)) => chunk,
            Ok(None) => break,
            Err(e) => return Ok(Err(e)),
        };
        counts.bad += parsed.errors.len() as u64;
        if !parsed.errors.is_empty() {
            let errors = parsed.errors.clone();
            b.later(move |tx| {
                errors
                    .iter()
                    .try_for_each(|e| tx.insert_bad_row(file_id, e))
            });
        }
        // Ids stored by earlier files: those records take the slow path (same
        // record again, or a conflict); all others are written in batches.
        // Taking the transaction back here also bounds memory: the writing
        // thread is never more than one chunk of records behind.
        let stored = b
            .tx()?
            .stored_ids(parsed.records.iter().map(|r| r.record_id.as_str()))?;
        // Shared with the writing thread, which writes them in batches.
        let records = Arc::new(std::mem::take(&mut parsed.records));
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
                        None => b.tx()?.create_series(
                            key,
                            settings.unit.as_deref(),
                            settings.transform.name(),
                            &settings.non_detects.name(),
                        )?,
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
                let awaiting = match cache.awaiting.remove(key) {
                    Some(a) => a,
                    None => b.tx()?.awaiting_review(row.id)?,
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
                        log,
                        window,
                        window_points,
                        head_before,
                        judging: None,
                    },
                );
                order.push(key.to_string());
            }
            let Some(t) = touched.get_mut(key) else {
                unreachable!("BUG: the series was inserted just above");
            };
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
                    b.later(move |tx| tx.flush_records(&mut full));
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
                    let mut judgement = match (judged, t.row.x_span) {
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
                    // outlier there.
                    if let (Some(j), Some(lj), Some(_)) =
                        (judgement.as_mut(), log_judged, t.row.x_span)
                        && !j.kinds.contains(&RecordKind::Outlier)
                        && let Some(m) = outlier_measure(
                            &lj,
                            t.in_file,
                            &t.settings.findings,
                            &mut cache.cutoffs,
                        )
                        && m.crossed
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
                plain.push(PlainFinding {
                kind: "conflict",
                series: key.to_string(),
                record_ids: vec![record.record_id.clone()],
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
            b.later(move |tx| tx.flush_records(&mut batch));
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
        if !t.changed || n < 3 || (n as f64) < ROBUST_GROWTH * (t.row.robust_n as f64) {
            continue;
        }
        match cache.points.entry(key.clone()) {
            std::collections::hash_map::Entry::Occupied(e) => {
                e.into_mut().append(&mut t.new_points);
            }
            std::collections::hash_map::Entry::Vacant(e) => {
                // The points stored before this file, then this file's
                // (taken, not copied: a large file's are megabytes).
                let stored = b.tx()?.fit_points_with_rows(t.head_before)?;
                let mut points = std::mem::take(&mut t.new_points);
                if !stored.is_empty() {
                    points.splice(0..0, stored.into_iter().map(|(_, x, y)| (x, y)));
                }
                e.insert(points);
            }
        }
        due.push(key);
    }
    let mut robust_of: HashMap<&str, RobustRow> = HashMap::default();
    {
        let jobs: Vec<(&str, &[(f64, f64)])> = due
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
            let quantiles = cache.quantiles(config.level);
            let previous =
                LineFit::from_moments_with(&t.before, config.level, |df| quantiles.get(df)).ok();
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
        b.later(move |tx| tx.flush_fits(&mut fits));
    }
    if !heads.is_empty() {
        b.later(move |tx| heads.iter().try_for_each(|h| tx.save_heads(h)));
    }
    // Before the transaction is taken back: the rows still being written
    // meanwhile.
    let causes = rank_flagged(config, cache, &touched, &flagged, name);
    let findings = raise_findings(
        b.tx()?,
        config,
        cache,
        rows.survey,
        &touched,
        &flagged,
        &causes,
        &plain,
        &trends,
        (file_id, name),
        at,
        now_unix,
    )?;
    let tx = b.finish()?;
    tx.finish_file(file_id, outcome, counts, None)?;
    let seal = tx.seal(SealScope::File(file_id.0))?;
    tx.append_audit(
        at,
        AuditKind::FileIngested,
        name,
        &format!(
            "sha256 {sha}; feed {feed}; {} new, {} already stored, {} conflicts, {} rows set aside; {refits} series refitted:\n{refit_list}{seal}",
            counts.new, counts.same, counts.conflict, counts.bad
        ),
    )?;
    tx.commit()?;
    for (key, mut t) in touched {
        if let Some(p) = cache.points.get_mut(&key) {
            p.append(&mut t.new_points);
        }
        cache.awaiting.insert(key.clone(), t.awaiting);
        cache.log.insert(key.clone(), t.log);
        cache.rows.insert(key, t.row);
    }
    if cache.points.values().map(Vec::len).sum::<usize>() > POINTS_KEPT_MAX {
        cache.points = HashMap::default();
    }
    if findings > 0 {
        info!(findings, "findings raised");
    }
    Ok(Ok((counts, refits)))
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

/// A finding without a record under judgement, waiting for the file's fits.
struct PlainFinding {
    kind: &'static str,
    series: String,
    record_ids: Vec<String>,
    summary: String,
}

/// The series a flagged record could belong to instead: those of the file
/// and those met earlier, indexed by site and by parameter (the key's parts
/// before and after the first '/'), with their fits computed when first
/// asked for. Built once per file: scanning every series for every flagged
/// record cost O(series) each.
struct Neighbours<'a> {
    /// Key, scale (transform name) and moments.
    series: Vec<(&'a str, &'a str, Moments)>,
    fits: Vec<Option<Option<LineFit>>>,
    by_site: HashMap<&'a str, Vec<usize>>,
    by_parameter: HashMap<&'a str, Vec<usize>>,
}

impl<'a> Neighbours<'a> {
    fn of(touched: &'a HashMap<String, Touched>, earlier: &'a HashMap<String, SeriesRow>) -> Self {
        let series: Vec<(&str, &str, Moments)> = touched
            .iter()
            .map(|(k, o)| (k.as_str(), o.settings.transform.name(), *o.state.moments()))
            .chain(
                earlier
                    .iter()
                    .filter(|(k, _)| !touched.contains_key(*k))
                    .map(|(k, r)| (k.as_str(), r.transform.as_str(), r.moments)),
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
            fits: vec![None; series.len()],
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
    flagged: &[Flagged],
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
        .map(|f| {
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
            let mut mine: Vec<(&str, LineFit)> = Vec::new();
            for i in related {
                let Some(&(k, other_scale, m)) = neighbours.series.get(i) else {
                    continue;
                };
                if k == key || other_scale != scale {
                    continue;
                }
                let fit = neighbours.fits[i].get_or_insert_with(|| {
                    LineFit::from_moments_with(&m, config.level, |df| quantiles.get(df)).ok()
                });
                if let Some(fit) = fit {
                    mine.push((k, *fit));
                }
            }
            raise::likely_causes(
                config,
                &f.record,
                &f.arrival,
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

/// Raises the file's findings (records flagged by the rules, conflicts,
/// refused rows, trend changes) in its transaction. Returns how many.
#[allow(clippy::too_many_arguments)]
fn raise_findings(
    tx: &crate::store::Tx<'_>,
    config: &Config,
    cache: &mut SeriesCache,
    survey: &Survey,
    touched: &HashMap<String, Touched>,
    flagged: &[Flagged],
    causes: &[Vec<Candidate>],
    plain: &[PlainFinding],
    trends: &[(String, TrendChange, Option<LineFit>, LineFit)],
    file: (crate::store::FileId, &str),
    at: &str,
    now_unix: i64,
) -> Result<usize, PipelineError> {
    let mut raised = 0;
    let mut series_points: HashMap<&str, Vec<(f64, f64)>> = HashMap::default();
    if !flagged.is_empty() {
        for (f, causes) in flagged.iter().zip(causes) {
            let record = &f.record;
            let key = record.series.as_str();
            let Some(t) = touched.get(key) else {
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
                    // From the points kept for the robust slope when there
                    // are (those before this file, then this file's),
                    // else walked from the store.
                    let points = match cache.points.get(key) {
                        Some(before) => {
                            let mut all = Vec::with_capacity(before.len() + t.new_points.len());
                            all.extend_from_slice(before);
                            all.extend_from_slice(&t.new_points);
                            #[cfg(debug_assertions)]
                            {
                                let stored = tx.fit_points(&t.row)?;
                                debug_assert_eq!(all, stored, "kept points of {key}");
                            }
                            all
                        }
                        None => tx.fit_points(&t.row)?,
                    };
                    series_points.insert(key, points);
                }
                series_points.get(key).map_or(&[], Vec::as_slice)
            } else {
                &[]
            };
            let robust = cache.robust.get(key).copied();
            raise::record_finding(
                tx,
                config,
                &raise::RecordCase {
                    record,
                    row_id: f.row_id,
                    series: &t.row,
                    transform: t.settings.transform,
                    arrival: &f.arrival,
                    judgement: &f.judgement,
                    left_out: f.left_out,
                    fit_point: f.fit_point,
                    points,
                    awaiting: &t.awaiting,
                    causes,
                    robust,
                    draw_chart,
                    span_before: Some(f.span_before),
                },
                file,
                at,
                now_unix,
            )?;
            raised += 1;
        }
    }
    for p in plain {
        let series = touched.get(&p.series).map(|t| &t.row);
        raise::plain_finding(
            tx,
            config,
            p.kind,
            series,
            Some(file),
            &p.record_ids,
            &p.summary,
            serde_json::json!({ "summary": p.summary, "caution": raise::CAUTION }),
            (None, None),
            at,
            now_unix,
        )?;
        raised += 1;
    }
    if survey.errors > 0 {
        let listed = &survey.first_errors;
        let ids: Vec<String> = listed.iter().filter_map(|e| e.record_id.clone()).collect();
        let rows: Vec<serde_json::Value> = listed
            .iter()
            .map(|e| {
                serde_json::json!({"line": e.line, "column": e.column, "field": e.field,
                "record_id": e.record_id, "reason": e.reason})
            })
            .collect();
        let first = listed.first().map(|e| e.to_string()).unwrap_or_default();
        let more = if survey.errors > listed.len() {
            format!(
                " ({} listed here; all are in the store's quarantined rows)",
                listed.len()
            )
        } else {
            String::new()
        };
        let summary = format!(
            "{} row(s) of {} set aside by validation; the rest of the file was stored{more}. First: {first}",
            survey.errors, file.1
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
            at,
            now_unix,
        )?;
        raised += 1;
    }
    for (key, change, before, after) in trends {
        let Some(t) = touched.get(key) else {
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
            t.last.as_ref().map(|(_, id)| id.as_str()),
            at,
            now_unix,
        )?;
        raised += 1;
    }
    Ok(raised)
}

/// A stored-side refusal of a parsed record, in the parser's error shape.
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

/// Theil-Sen and Mann-Kendall of a series' points; None when undefined.
pub(crate) fn robust_row(points: &[(f64, f64)], level: f64) -> Option<RobustRow> {
    let (x, y): (Vec<f64>, Vec<f64>) = points.iter().copied().unzip();
    let ts = theil_sen(&x, &y, level).ok()?;
    let mk = mann_kendall(&x, &y).ok()?;
    Some(RobustRow {
        slope: ts.slope,
        ci_low: ts.ci_low,
        ci_high: ts.ci_high,
        mk_s: mk.s,
        mk_p: mk.p,
    })
}

/// The path of a file relative to the inbox, for display and storage.
pub fn relative_to(inbox: &Path, path: &Path) -> PathBuf {
    path.strip_prefix(inbox)
        .map(Path::to_path_buf)
        .unwrap_or_else(|_| path.to_path_buf())
}
