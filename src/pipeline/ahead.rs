//! Files computed while the ones before them commit: the reading thread's
//! queue, the files in flight, and how each is settled or taken again.

use super::*;

/// The files of [`process_in_order`] as they come from the reading thread,
/// with those to be taken again first (prepared again, in order).
pub(super) struct Taken<'f, 'c> {
    pub(super) files: &'f [(&'c Config, ReadyFile)],
    pub(super) ready: &'f std::sync::mpsc::Receiver<Option<Prepared>>,
    /// Files `index`, `index + 1`, ... to be taken before the reader's next.
    pub(super) again: VecDeque<Prepared>,
}

impl Taken<'_, '_> {
    /// File `index`, the next one in order.
    pub(super) fn take(&mut self, index: usize) -> Option<Prepared> {
        if let Some(p) = self.again.pop_front() {
            return Some(p);
        }
        let (config, file) = self.files.get(index)?;
        let p = self.ready.recv().ok()?;
        Some(p.unwrap_or_else(|| prepare(config, file, SystemTime::now())))
    }

    /// File `index` read and parsed again (its records went to a
    /// transaction that was rolled back), to be taken next.
    pub(super) fn again(&mut self, index: usize) {
        if let Some((config, file)) = self.files.get(index) {
            self.again
                .push_front(prepare(config, file, SystemTime::now()));
        }
    }
}

/// Whether a prepared file can be computed while the one before it
/// commits: a small file read and parsed whole, not to be rejected whole.
/// Others (large, unreadable, quarantined whole) take the plain way.
pub(super) fn overlappable(config: &Config, p: &Prepared) -> bool {
    p.read.is_ok()
        && match &p.parsed {
            Some(Ok(parsed)) => parsed.errors.is_empty() || config.bad_rows != BadRows::RejectFile,
            _ => false,
        }
}

/// Where [`run_ahead`] stopped.
pub(super) struct Run {
    /// The next file to take.
    pub(super) next: usize,
    /// The caller's `each` said stop.
    pub(super) stopped: bool,
    /// The next file must take the plain way.
    pub(super) plain: bool,
}

impl Run {
    /// Go on from file `next`.
    pub(super) fn next(next: usize) -> Run {
        Run {
            next,
            stopped: false,
            plain: false,
        }
    }

    /// Stop before file `next`: the caller said so.
    pub(super) fn stopped(next: usize) -> Run {
        Run {
            next,
            stopped: true,
            plain: false,
        }
    }
}

/// A file whose transaction was ended (to commit) and not yet settled.
pub(super) struct InFlight {
    pub(super) index: usize,
    pub(super) prepared: Prepared,
    pub(super) queued: Queued,
}

/// Files ended (to commit) and not yet settled while the next one is
/// computed. With one, the computing thread waited for each commit (and
/// its sync) before it could go on to the file after next: 0.5 s of the
/// 1,000,000-record backlog in `Behind::outcome` (sched_switch stacks),
/// while the writing thread waited 1.0 s for work. With two, each wait
/// for a commit comes a file later, when that commit is usually done.
pub(super) const IN_FLIGHT: usize = 2;

/// What settling the files in flight came to, when not every one of them
/// committed and was told to go on.
#[derive(Default)]
pub(super) struct Unwound {
    /// Files in flight rolled back, to be taken again, in order.
    pub(super) again: Vec<usize>,
    /// A file failed (reported to `each`, not taken again).
    pub(super) failed: bool,
    /// `each` said stop (for a committed or a failed file).
    pub(super) stopped: bool,
}

impl Unwound {
    pub(super) fn note(&mut self, settled: Settled) {
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

    pub(super) fn add(&mut self, later: Unwound) {
        self.again.extend(later.again);
        self.failed |= later.failed;
        self.stopped |= later.stopped;
    }

    /// Whether anything but plain commits came of it.
    pub(super) fn eventful(&self) -> bool {
        self.stopped || self.failed || !self.again.is_empty()
    }

    /// Where to go on from `next` (the first file not yet taken, or the
    /// file open while these were settled, rolled back): the files rolled
    /// back are taken again first, in order, with `next` after them if it
    /// was open; on a stop nothing is taken again (they stay in the inbox).
    pub(super) fn go_on(self, files_in: &mut Taken<'_, '_>, next: usize, open: bool) -> Run {
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
pub(super) fn settle_all(
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
pub(super) fn run_ahead<'t, 'c: 't>(
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
pub(super) enum Settled {
    /// Committed and reported to `each`, which said this.
    Done(Flow),
    /// Failed and reported to `each`, which said this.
    Failed(Flow),
    /// Rolled back, to be taken again from this index.
    Again(usize),
}

/// Waits for the commit of the file in flight, then moves it and reports it.
pub(super) fn settle(
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
pub(super) fn committed(
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
pub(super) fn compute_ahead<'t, 'c: 't>(
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
