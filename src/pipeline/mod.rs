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
//!
//! Layout: this file takes files in order and holds the plain path (one
//! file, one transaction, then the move); beside it
//! - `ahead`: files computed while the ones before them commit, and how
//!   each is settled or taken again;
//! - `store_file`: one file's transaction: records, refits, fit rows,
//!   robust slopes, and the hand-over of its findings;
//! - `judging`: what each new record is judged against;
//! - `raising`: a file's findings and the likely causes of its flagged
//!   records;
//! - `series_units`: the unit of a series without a configured one;
//! - `robust`: Theil-Sen and Mann-Kendall rows of fit versions;
//! - `cache`: what the computing thread keeps between files, within bounds.

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
    CutoffCache, Measured, RecordJudgement, RecordKind, Span, TrendChange, exact_cutoffs,
    judge_record_with, judge_trend, ln_scale_ruled_out, outlier_measure,
};
use crate::inbox::{self, InboxError, ReadyFile};
use crate::raise;
use crate::records::{self, Matrix, Measure, Record, RecordError, SeriesId, Today, units};
use crate::stats::pairwise::PairwiseTrend;
use crate::stats::robust::{MannKendall, TheilSen, mann_kendall, theil_sen};
use crate::stats::{Arrival, LineFit, Moments, SeriesState, TQuantiles, Transform};
use crate::store::seal::SealScope;
use crate::store::{
    AuditKind, Behind, FileCounts, FileOutcome, FitBatch, Joined, NewFile, NewFit, RecordBatch,
    RecordPlacement, RobustRow, SeriesHeads, SeriesRow, Store, StoreError, write_behind,
};
use crate::window::Window;

mod ahead;
mod cache;
mod judging;
mod raising;
mod robust;
mod series_units;
mod store_file;
#[cfg(test)]
mod tests;

use ahead::*;
pub use cache::SeriesCache;
use judging::*;
use raising::*;
use robust::*;
pub(crate) use robust::{robust_row, x_span};
use series_units::*;
use store_file::*;

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

/// The path of a file relative to the inbox, for display and storage.
pub fn relative_to(inbox: &Path, path: &Path) -> PathBuf {
    path.strip_prefix(inbox)
        .map(Path::to_path_buf)
        .unwrap_or_else(|_| path.to_path_buf())
}
