//! One file's transaction: its records, the touched series' refits and
//! fit rows, its robust slopes, and the hand-over of its findings.

use super::*;

/// A series touched by the file: its row, streaming state and the arrivals.
pub(super) struct Touched {
    pub(super) row: SeriesRow,
    pub(super) settings: SeriesSettings,
    pub(super) state: SeriesState,
    pub(super) changed: bool,
    /// Points this file added to the fit, in order.
    pub(super) new_points: Vec<(f64, f64)>,
    /// The series' co-moments before this file.
    pub(super) before: Moments,
    /// Points of records awaiting review (kept out of the judging fit).
    pub(super) awaiting: Vec<(f64, f64)>,
    /// Records of this series in the file (Bonferroni over a backlog).
    pub(super) in_file: usize,
    /// The last arrival of this file and its record id.
    pub(super) last: Option<(Arrival, String)>,
    /// The unit of this file's first record of the series that names one
    /// (the series' own when configured): what a trend message's slopes
    /// are in.
    pub(super) unit: Option<String>,
    /// The fit of ln(y) on x, a second screen for multiplicative slips, for
    /// series fitted on the original scale while every y is positive.
    pub(super) log: Option<SeriesState>,
    /// The analysis window in force, as configured and on the fitted scale.
    pub(super) window: Option<(Window, Window)>,
    /// With a window: the points inside it, in arrival order.
    pub(super) window_points: std::collections::VecDeque<(f64, f64)>,
    /// The series' newest record before this file.
    pub(super) head_before: Option<i64>,
    /// The fits without the records left out of judging.
    pub(super) judging: Option<JudgingBase>,
    /// The low end of the judging fit's x range, when known.
    pub(super) judged_low: Option<JudgedLow>,
}

/// The file being stored.
pub(super) struct FileMeta<'a> {
    pub(super) name: &'a str,
    pub(super) sha: &'a str,
    pub(super) size: u64,
    pub(super) feed: &'a str,
}

/// A file's rows as [`store_file`] takes them: chunks from `next` (one
/// for a small file), and what the survey found of the whole.
pub(super) struct FileRows<'a> {
    pub(super) next: &'a mut dyn FnMut() -> Result<Option<records::ParsedFile>, records::FileError>,
    pub(super) survey: &'a Survey,
    /// The last chunk, handed back to be freed off the writer's thread.
    pub(super) spent: &'a mut Spent,
    /// The file comes in one piece (small): its rows are encoded for its
    /// seal as they are handed to the writer.
    pub(super) whole: bool,
}

/// What a file's last chunk leaves behind, freed by the reading thread
/// once the file is done: neither the writer (the busier thread while rows
/// are written) nor the computing one pays for a million small frees.
#[derive(Default)]
pub(super) struct Spent {
    pub(super) parsed: Option<records::ParsedFile>,
    /// Shared with the writer's batches until they are written.
    pub(super) records: Option<Arc<Vec<Record>>>,
}

/// Stores a file in its one transaction. The outer error is the store's;
/// the inner one a file that turned out unreadable part way (its
/// transaction rolled back).
pub(super) fn store_file(
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
pub(super) enum Start {
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
pub(super) fn written_as_assumed(
    written: Result<(), StoreError>,
    assumed: bool,
) -> Result<(), StoreError> {
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
pub(super) struct Queued {
    pub(super) counts: FileCounts,
    pub(super) refits: usize,
    pub(super) file_id: crate::store::FileId,
    /// The next record and fit row ids after this file's.
    pub(super) next_ids: (i64, i64),
}

/// [`store_file`] inside the file's transaction: `b.tx()` for the
/// transaction itself (after the writes queued so far), `b.later` for
/// writes nothing below reads back before the commit.
#[allow(clippy::too_many_arguments)]
pub(super) fn store_file_behind<'t, 'c: 't>(
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
        name, sha, feed, ..
    } = *meta;
    let assumed = matches!(start, Start::Assumed { .. });
    let (ids, file_id) = begin_file(b, cache, meta, at, start)?;
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
                let t = touch_series(b, config, cache, record, per_series, name, &mut plain)?;
                touched.insert(key.to_string(), t);
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
            // The first record of a series in a file arrives on the fit of
            // the file before, whose p is known: an incomplete beta
            // function per record spared.
            let placement = RecordPlacement {
                fit_point,
                arrival: arrival.as_ref().map(|a| Joined {
                    arrival: a,
                    fit_version: joins,
                    slope_p_without: (a.before == t.before)
                        .then(|| cache.known_fit(key, &t.before, config.level))
                        .flatten()
                        .map(|f| f.slope_p),
                }),
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
                    judge_arrival(b, cache, t, record, row_id, (a, p, probe), &mut flagged)?;
                }
                continue;
            }
            resubmitted(
                b,
                record,
                t.row.id,
                file_id,
                (name, at),
                &mut counts,
                &mut plain,
            )?;
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
    let Refits {
        count: refits,
        list: refit_list,
        trends,
    } = queue_refits(
        b,
        config,
        cache,
        &mut touched,
        &order,
        (&ids, file_id),
        at,
        rows.whole,
    )?;
    let outcome = if counts.bad > 0 {
        FileOutcome::Partial
    } else {
        FileOutcome::Ingested
    };
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

/// What [`queue_refits`] did: how many series it refitted, a line each
/// for the file's audit entry, and the trend changes to raise.
struct Refits {
    count: usize,
    list: String,
    trends: Vec<(String, TrendChange, Option<LineFit>, LineFit)>,
}

/// Refits each series the file changed: its robust slope when due (on a
/// second thread while the file's last records are written), its fit row
/// with the series' running state, its trend judged against the fit
/// before, and its new heads, all queued for the writing thread.
#[allow(clippy::too_many_arguments)]
fn queue_refits(
    b: &mut Behind<'_>,
    config: &Config,
    cache: &mut SeriesCache,
    touched: &mut HashMap<String, Touched>,
    order: &[String],
    (ids, file_id): (&Arc<crate::store::IdCounters>, crate::store::FileId),
    at: &str,
    whole: bool,
) -> Result<Refits, PipelineError> {
    // Robust slopes first: gather the series due for one, compute them on
    // a second thread while the file's last records are written, then
    // write the fit rows.
    let mut due: Vec<&str> = Vec::new();
    let mut windowed: Vec<(&str, Vec<(f64, f64)>)> = Vec::new();
    for key in order {
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
    for key in order {
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
            // Without the newest record: for a series' only record of the
            // file, the fit before (its p as that fit computed it).
            let without = t.last.as_ref().and_then(|(a, _)| {
                a.slope_without().map(|s| match &previous {
                    Some(f) if a.before == t.before => (s, f.slope_p),
                    _ => (s, a.slope_p_without()),
                })
            });
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
            ids,
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
            if whole {
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
    if !fits.is_empty() {
        if whole {
            fits.encode_seal();
        }
        b.later(move |tx| tx.flush_fits(&mut fits));
    }
    if !heads.is_empty() {
        b.later(move |tx| heads.iter().try_for_each(|h| tx.save_heads(h)));
    }
    Ok(Refits {
        count: refits,
        list: refit_list,
        trends,
    })
}

/// A series' state as a file first touches it: from the cache, else read
/// from the store, else created (raising `similar_series` when its key
/// reads like an existing one's), with its window, the records awaiting
/// review, and its ln(y) screen.
fn touch_series(
    b: &mut Behind<'_>,
    config: &Config,
    cache: &mut SeriesCache,
    record: &Record,
    per_series: &HashMap<String, usize>,
    name: &str,
    plain: &mut Vec<PlainFinding>,
) -> Result<Touched, PipelineError> {
    let key = record.series.as_str();
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
        None if row.log_screen.is_some() => row.log_screen.flatten().map(SeriesState::from_moments),
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
    Ok(Touched {
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
    })
}

/// Judges a new record that entered its series' fit (`a`, at point `p`,
/// the state with it `probe`) against the fit without the records still
/// awaiting review, on the original and the ln(y) scale, and moves the
/// series on: a flagged record is listed, and a suspect joins those left
/// out of judging the next ones.
fn judge_arrival(
    b: &mut Behind<'_>,
    cache: &mut SeriesCache,
    t: &mut Touched,
    record: &Record,
    row_id: i64,
    (a, p, probe): (&Arrival, (f64, f64), SeriesState),
    flagged: &mut Vec<Flagged>,
) -> Result<(), PipelineError> {
    let key = record.series.as_str();
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
                                cache.points.insert(key.to_string(), Arc::clone(&p));
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
        && let Some(m) = outlier_measure(&lj, t.in_file, &t.settings.findings, &mut cache.cutoffs)
        && m.crossed
        && !ln_scale_ruled_out(&mj.before, &lj.before)
    {
        j.kinds.push(RecordKind::Outlier);
        j.kinds.sort();
        // Flagged now: its other measures show their cutoffs too.
        exact_cutoffs(&mut j.measures, j.n, &mut cache.cutoffs);
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
    Ok(())
}

/// A record whose id is stored already: the same record again, or other
/// values kept aside as a proposed version with a `conflict` finding and
/// an audit entry (once per distinct proposal).
fn resubmitted(
    b: &mut Behind<'_>,
    record: &Record,
    series_row: crate::store::SeriesRowId,
    file_id: crate::store::FileId,
    (name, at): (&str, &str),
    counts: &mut FileCounts,
    plain: &mut Vec<PlainFinding>,
) -> Result<(), PipelineError> {
    let key = record.series.as_str();
    let Some((stored_record, max_version)) = b.tx()?.current_record(&record.record_id)? else {
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
            .insert_proposed(record, series_row, file_id, max_version + 1)?;
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
    Ok(())
}

/// The file's row and its transaction's row ids: read from the store
/// ([`Start::Read`], the cache cleared when the store moved on under it),
/// or assumed from the file before, with a first job that checks every
/// assumption ([`Start::Assumed`]).
fn begin_file(
    b: &mut Behind<'_>,
    cache: &mut SeriesCache,
    meta: &FileMeta<'_>,
    at: &str,
    start: &Start,
) -> Result<(Arc<crate::store::IdCounters>, crate::store::FileId), PipelineError> {
    let FileMeta {
        name,
        sha,
        size,
        feed,
    } = *meta;
    Ok(match *start {
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
    })
}

/// Appends a file's new points to a series' kept ones, leaving `new`
/// without its buffer: taken whole when nothing was kept yet (a large
/// file's points are megabytes), copied only when the kept ones are still
/// shared with findings being written.
pub(super) fn join_points(kept: &mut Arc<Vec<(f64, f64)>>, new: &mut Vec<(f64, f64)>) {
    if kept.is_empty() {
        *kept = Arc::new(std::mem::take(new));
    } else {
        Arc::make_mut(kept).append(new);
        *new = Vec::new();
    }
}

/// The ln(y)-on-x state of a series' points, when every y is positive.
pub(super) fn log_state(points: &[(f64, f64)]) -> Option<SeriesState> {
    let mut s = SeriesState::new();
    for &(x, y) in points {
        if y <= 0.0 {
            return None;
        }
        s.add(x, y.ln()).ok()?;
    }
    Some(s)
}

/// One line per refit in the file's audit entry: which version of which
/// series, and its n. The statistics themselves are on the fit row, and
/// verifying recomputes them from the records.
pub(super) fn refit_detail(row: &SeriesRow, fit: Option<&LineFit>) -> String {
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
pub(super) fn fit_point(
    record: &Record,
    settings: &SeriesSettings,
) -> Result<Option<(f64, f64)>, String> {
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
