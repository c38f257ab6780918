//! `slopewarden verify`: proves that the store is what the tool wrote.
//!
//! 1. The audit chain: every entry carries the SHA-256 of the one before.
//! 2. The seals: each entry that vouches for rows (a file's records and
//!    fits, a finding and its messages, a verdict with its record version
//!    and fit) names their SHA-256; every seal is recomputed, and every
//!    row must be vouched for by some entry.
//! 3. The states that verdicts change (a record's status and exclusion, a
//!    finding's status) must be what the verdict log says.
//! 4. Every reference between rows (a record's series and file, a fit's
//!    series, a finding's record) names a row that exists, and SQLite's
//!    own check of the file (pages, indexes, NOT NULL and CHECK
//!    constraints) finds nothing.
//! 5. Every stored fit is recomputed from the stored records with the
//!    stored settings, replaying the series in version order: a file adds
//!    its records' points, a verdict refits from scratch on the remaining
//!    points, exactly as ingest and `review` do.
//! 6. A series' kept ln(y) screen state (what ingest resumes the second
//!    outlier screen from) is what its current points give.
//!
//! Any failure is a [`Problem`] that names the table, the row and what does
//! not match.

use std::collections::{BTreeMap, HashMap, HashSet};

use crate::config::NonDetectPolicy;
use crate::stats::robust::theil_sen;
use crate::stats::{LineFit, Moments, MomentsParts, TQuantiles, Transform};
use crate::store::seal::{SealKind, seals_in};
use crate::store::{
    FindingStatus, RecordStatus, SeriesReplay, Store, StoreError, StoredPoint, VerdictKind,
    VerdictRow, decode_log_screen, verify_chain,
};
use crate::window::Window;

/// Relative agreement required between a stored and a recomputed figure.
/// Replays repeat the same arithmetic in the same order, so they agree
/// exactly in practice; the tolerance only allows for a platform's libm.
pub const TOLERANCE: f64 = 1e-9;

/// One thing that does not hold.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize)]
pub struct Problem {
    /// Where: `audit_log 17`, `fits 230 (series MW-3/nitrate, version 12)`.
    pub location: String,
    /// What does not match.
    pub what: String,
}

/// What verify looked at, and what it found.
#[derive(Debug, Clone, Default, PartialEq, Eq, serde::Serialize)]
pub struct VerifyReport {
    /// Audit entries walked.
    pub audit_entries: usize,
    /// Seals recomputed.
    pub seals: usize,
    /// Series replayed.
    pub series: usize,
    /// Fit versions recomputed.
    pub fits: usize,
    /// Everything that failed (empty: the store is intact).
    pub problems: Vec<Problem>,
}

impl VerifyReport {
    /// Whether everything held.
    pub fn ok(&self) -> bool {
        self.problems.is_empty()
    }

    fn problem(&mut self, location: impl Into<String>, what: impl Into<String>) {
        self.problems.push(Problem {
            location: location.into(),
            what: what.into(),
        });
    }
}

/// Checks the whole store.
pub fn verify(store: &Store) -> Result<VerifyReport, StoreError> {
    let mut rep = VerifyReport::default();
    let entries = store.audit_entries()?;
    rep.audit_entries = entries.len();
    if let Err(b) = verify_chain(&entries) {
        rep.problem(format!("audit_log {}", b.id), b.reason);
    }

    // Seals: gathered from the entries, then recomputed kind by kind in
    // one pass over each table.
    let mut sealed: HashMap<&'static str, HashSet<i64>> = HashMap::new();
    let mut wanted: HashMap<SealKind, Vec<(i64, String, usize)>> = HashMap::new();
    for (index, e) in entries.iter().enumerate() {
        for (scope, hash) in seals_in(&e.detail) {
            rep.seals += 1;
            let (kind, id) = scope.parts();
            let name = match kind {
                SealKind::File => "file",
                SealKind::Finding => "finding",
                SealKind::Verdict => "verdict",
                SealKind::Window => "window",
            };
            sealed.entry(name).or_default().insert(id);
            wanted.entry(kind).or_default().push((id, hash, index));
        }
    }
    for (kind, list) in &wanted {
        let ids: Vec<i64> = list.iter().map(|(id, _, _)| *id).collect();
        let now = store.recompute_seals(*kind, &ids)?;
        for (id, hash, index) in list {
            if now.get(id) != Some(hash) {
                let e = &entries[*index];
                rep.problem(
                    format!("audit_log {} ({} {})", e.id, e.kind, e.subject),
                    format!(
                        "the rows of {} {id} no longer match the seal written when they were stored: a row of it was changed, added or deleted",
                        match kind {
                            SealKind::File => "file",
                            SealKind::Finding => "finding",
                            SealKind::Verdict => "verdict",
                            SealKind::Window => "window change",
                        }
                    ),
                );
            }
        }
    }
    // References: the writer leaves them unchecked in release builds.
    for (table, row, parent) in store.dangling_references()? {
        rep.problem(
            format!("{table} {row}"),
            format!(
                "it refers to a row of {parent} that does not exist (deleted or never written)"
            ),
        );
    }
    // The file itself, and the CHECK constraints the writer leaves to
    // verify in release builds.
    for found in store.file_problems()? {
        rep.problem(
            "database file",
            format!("SQLite's integrity check: {found}"),
        );
    }
    let ids = |k: &str| -> Vec<i64> {
        let mut v: Vec<i64> = sealed
            .get(k)
            .map(|s| s.iter().copied().collect())
            .unwrap_or_default();
        v.sort_unstable();
        v
    };
    let (files, findings, verdict_ids, window_ids) =
        (ids("file"), ids("finding"), ids("verdict"), ids("window"));
    for (table, kind, set) in [
        ("source_files", "file", &files),
        ("findings", "finding", &findings),
        ("verdicts", "verdict", &verdict_ids),
        ("series_windows", "window change", &window_ids),
    ] {
        let set: HashSet<i64> = set.iter().copied().collect();
        for id in store.row_ids(table)? {
            if !set.contains(&id) {
                rep.problem(
                    format!("{table} {id}"),
                    format!("no audit entry vouches for this {kind} (added behind the tool's back, or its entry was removed)"),
                );
            }
        }
    }
    for (table, id) in store.rows_outside(&files, &findings, &verdict_ids, &window_ids)? {
        rep.problem(
            format!("{table} {id}"),
            "no audit entry vouches for this row (added behind the tool's back, or its entry was removed)",
        );
    }

    // States that verdicts change.
    let (verdicts, unknown) = store.verdicts_to_check()?;
    for (id, word) in unknown {
        rep.problem(
            format!("verdicts {id}"),
            format!(
                "verdict `{word}` is none that slopewarden writes ({})",
                VerdictKind::ALL
                    .iter()
                    .map(|v| v.as_str())
                    .collect::<Vec<_>>()
                    .join(", ")
            ),
        );
    }
    let by_id: HashMap<i64, &VerdictRow> = verdicts.iter().map(|v| (v.id, v)).collect();
    let mut active: BTreeMap<i64, Option<&VerdictRow>> = BTreeMap::new();
    for v in &verdicts {
        let slot = active.entry(v.finding).or_insert(None);
        *slot = if v.verdict == VerdictKind::Reverted {
            None
        } else {
            Some(v)
        };
    }
    let mut want_excluded: HashSet<i64> = HashSet::new();
    let mut want_status: HashMap<i64, RecordStatus> = HashMap::new();
    for v in &verdicts {
        if v.verdict == VerdictKind::Corrected
            && let Some(new) = v.new_record_row
        {
            want_status.insert(new, RecordStatus::Superseded);
        }
    }
    for v in active.values().flatten() {
        match v.verdict {
            VerdictKind::Excluded => {
                if let Some(r) = v.record_row {
                    want_excluded.insert(r);
                }
            }
            VerdictKind::Corrected => {
                if let Some(r) = v.record_row {
                    want_status.insert(r, RecordStatus::Superseded);
                }
                if let Some(n) = v.new_record_row {
                    want_status.insert(n, RecordStatus::Current);
                }
            }
            VerdictKind::Confirmed | VerdictKind::Reverted => {}
        }
    }
    for (row, status, excluded, version) in store.record_flags()? {
        if excluded != want_excluded.contains(&row) {
            rep.problem(
                format!("records {row}"),
                if excluded {
                    "marked excluded, but no standing verdict excluded it"
                } else {
                    "a standing verdict excluded it, but it is not marked excluded"
                },
            );
        }
        let ok = match want_status.get(&row) {
            Some(w) => status == w.as_str(),
            None => {
                status == RecordStatus::Current.as_str()
                    || (status == RecordStatus::Proposed.as_str() && version > 1)
            }
        };
        if !ok {
            rep.problem(
                format!("records {row}"),
                format!(
                    "status `{status}` is not what the verdict log gives ({})",
                    want_status
                        .get(&row)
                        .copied()
                        .unwrap_or(RecordStatus::Current)
                ),
            );
        }
    }
    for (id, status) in store.finding_statuses()? {
        let want = match active.get(&id) {
            Some(Some(v)) => v.verdict.finding_status(),
            _ => FindingStatus::Open,
        };
        if status != want.as_str() {
            rep.problem(
                format!("findings {id}"),
                format!("status `{status}`, but the verdict log gives `{want}`"),
            );
        }
    }

    // Fits, replayed.
    let mut quantiles: HashMap<u64, TQuantiles> = HashMap::new();
    for sid in store.series_ids()? {
        let s = store.series_replay(sid)?;
        rep.series += 1;
        replay(&s, &by_id, &mut quantiles, &mut rep);
    }
    Ok(rep)
}

/// Replays one series' fit versions and compares each with the stored row.
fn replay(
    s: &SeriesReplay,
    verdicts: &HashMap<i64, &VerdictRow>,
    quantiles: &mut HashMap<u64, TQuantiles>,
    rep: &mut VerifyReport,
) {
    let correction_rows: HashSet<i64> =
        verdicts.values().filter_map(|v| v.new_record_row).collect();
    let records: HashMap<i64, &StoredPoint> = s.records.iter().map(|r| (r.id, r)).collect();
    let mut by_file: BTreeMap<i64, Vec<&StoredPoint>> = BTreeMap::new();
    for r in &s.records {
        if r.in_fit && !correction_rows.contains(&r.id) {
            by_file.entry(r.file_id).or_default().push(r);
        }
    }
    let mut set: BTreeMap<i64, (f64, f64)> = BTreeMap::new();
    let mut moments = Moments::new();
    let mut prev: Option<i64> = None;
    for (i, f) in s.fits.iter().enumerate() {
        rep.fits += 1;
        let here = format!("fits {} (series {}, version {})", f.id, s.key, f.version);
        if f.version != i as i64 + 1 {
            rep.problem(
                &here,
                format!(
                    "version {} where {} was expected: a fit version is missing",
                    f.version,
                    i + 1
                ),
            );
        }
        if f.prev_fit != prev {
            rep.problem(
                &here,
                "its previous-version link does not point at the version before it",
            );
        }
        prev = Some(f.id);
        let transform = Transform::from_name(&f.transform);
        let policy = NonDetectPolicy::from_name(&f.non_detects);
        let (Some(transform), Some(policy)) = (transform, policy) else {
            rep.problem(
                &here,
                format!("unknown settings `{}` / `{}`", f.transform, f.non_detects),
            );
            return;
        };
        let point_of = |r: &StoredPoint, rep: &mut VerifyReport| -> Option<(f64, f64)> {
            let want = expected_point(r, transform, policy);
            if want != r.fit_point {
                rep.problem(
                    format!("records {}", r.id),
                    format!(
                        "its point on the fitted scale {:?} is not what x = {}, y = {} give under `{}` and non-detects `{}` ({want:?})",
                        r.fit_point, r.x, r.y, f.transform, f.non_detects
                    ),
                );
            }
            r.fit_point
        };
        let window = match f.window.as_deref().map(Window::parse) {
            None => None,
            Some(Ok(w)) => Some(w.on_fit_scale(transform)),
            Some(Err(e)) => {
                rep.problem(&here, format!("its stored window cannot be read: {e}"));
                return;
            }
        };
        let in_window = |set: &BTreeMap<i64, (f64, f64)>| -> Vec<(f64, f64)> {
            let all: Vec<(f64, f64)> = set.values().copied().collect();
            match window {
                Some(w) => w.select(&all, |p| p.0),
                None => all,
            }
        };
        let from_scratch = |points: Vec<(f64, f64)>| {
            let (x, y): (Vec<f64>, Vec<f64>) = points.into_iter().unzip();
            Moments::from_points(&x, &y)
        };
        match (f.trigger_file, f.trigger_verdict, f.trigger_window) {
            (Some(file), None, None) => {
                for r in by_file.get(&file).map(Vec::as_slice).unwrap_or(&[]) {
                    if let Some(p) = point_of(r, rep) {
                        if window.is_none() {
                            moments.add(p.0, p.1);
                        }
                        set.insert(r.id, p);
                    }
                }
                if window.is_some() {
                    moments = from_scratch(in_window(&set));
                }
            }
            (None, Some(v), None) => {
                let Some(v) = verdicts.get(&v) else {
                    rep.problem(&here, format!("cites verdict {v}, which is not stored"));
                    return;
                };
                apply_verdict(v, verdicts, &records, &mut set, rep, &point_of);
                moments = from_scratch(in_window(&set));
            }
            (None, None, Some(_)) => {
                moments = from_scratch(in_window(&set));
            }
            _ => {
                rep.problem(
                    &here,
                    "cites no trigger, or more than one (a file, a verdict or a window change)",
                );
                return;
            }
        }
        let points = in_window(&set);
        compare_fit(f, &moments, &points, quantiles, rep, &here);
    }
    if let Some(Err(kind)) = &s.log_screen {
        rep.problem(
            format!("series {}", s.key),
            format!("its kept ln(y) screen state is a {kind} value, not a blob"),
        );
    }
    if let Some(Ok(bytes)) = &s.log_screen {
        let last = s.fits.last();
        let screened = last.is_some_and(|f| {
            Transform::from_name(&f.transform) == Some(Transform::None) && f.window.is_none()
        });
        let points: Vec<(f64, f64)> = set.values().copied().collect();
        check_log_screen(bytes, screened, &points, &format!("series {}", s.key), rep);
    }
    if s.latest_fit != prev {
        rep.problem(
            format!("series {}", s.key),
            "its current-fit pointer is not its newest fit version",
        );
    }
}

/// Checks a record's stored point on the fitted scale and returns it.
type PointOf<'a> = dyn Fn(&StoredPoint, &mut VerifyReport) -> Option<(f64, f64)> + 'a;

fn apply_verdict(
    v: &VerdictRow,
    verdicts: &HashMap<i64, &VerdictRow>,
    records: &HashMap<i64, &StoredPoint>,
    set: &mut BTreeMap<i64, (f64, f64)>,
    rep: &mut VerifyReport,
    point_of: &PointOf<'_>,
) {
    let add = |row: Option<i64>, set: &mut BTreeMap<i64, (f64, f64)>, rep: &mut VerifyReport| {
        if let Some(r) = row.and_then(|r| records.get(&r))
            && r.in_fit
            && let Some(p) = point_of(r, rep)
        {
            set.insert(r.id, p);
        }
    };
    let undo = |row: Option<i64>, set: &mut BTreeMap<i64, (f64, f64)>| {
        if let Some(r) = row {
            set.remove(&r);
        }
    };
    match v.verdict {
        VerdictKind::Excluded => undo(v.record_row, set),
        VerdictKind::Corrected => {
            undo(v.record_row, set);
            add(v.new_record_row, set, rep);
        }
        VerdictKind::Reverted => match v.reverts.and_then(|w| verdicts.get(&w)) {
            Some(w) if w.verdict == VerdictKind::Excluded => add(w.record_row, set, rep),
            Some(w) if w.verdict == VerdictKind::Corrected => {
                undo(w.new_record_row, set);
                add(w.record_row, set, rep);
            }
            Some(_) => {}
            None => rep.problem(
                format!("verdicts {}", v.id),
                "reverts a verdict that is not stored",
            ),
        },
        VerdictKind::Confirmed => {}
    }
}

/// The point a record gives on the fitted scale under the stored settings.
fn expected_point(r: &StoredPoint, t: Transform, p: NonDetectPolicy) -> Option<(f64, f64)> {
    if !r.in_fit {
        return None;
    }
    let y = match (r.censored, p) {
        (false, _) => r.y,
        (true, NonDetectPolicy::Exclude) => return None,
        (true, NonDetectPolicy::Substitute { fraction }) => fraction * r.y,
    };
    if t == Transform::None {
        return Some((r.x, y));
    }
    t.apply(0, r.x, y).ok()
}

/// Checks a kept ln(y) screen state against the one the series' current
/// points give (oldest row first, as the daemon builds it).
fn check_log_screen(
    bytes: &[u8],
    screened: bool,
    points: &[(f64, f64)],
    here: &str,
    rep: &mut VerifyReport,
) {
    let Some(kept) = decode_log_screen(Some(bytes)) else {
        rep.problem(
            here,
            format!(
                "its kept ln(y) screen state cannot be read ({} bytes)",
                bytes.len()
            ),
        );
        return;
    };
    if !screened {
        rep.problem(
            here,
            "a ln(y) screen state is kept, but its current fit is transformed or windowed",
        );
        return;
    }
    let mut expected = Some(Moments::new());
    for &(x, y) in points {
        match expected.as_mut() {
            Some(m) if y > 0.0 => m.add(x, y.ln()),
            _ => expected = None,
        }
    }
    match (kept, expected) {
        (None, None) => {}
        (Some(_), None) => rep.problem(
            here,
            "a ln(y) screen state is kept, but some of its values are at or below zero",
        ),
        (None, Some(_)) => rep.problem(
            here,
            "its ln(y) screen is kept as off, but all of its values are above zero",
        ),
        (Some(k), Some(e)) => {
            let (k, e) = (k.to_parts(), e.to_parts());
            let pairs = [
                ("mean x", k.origin + k.mean_x, e.origin + e.mean_x),
                ("mean ln y", k.mean_y, e.mean_y),
                ("Sxx", k.sxx, e.sxx),
                ("Sxy", k.sxy, e.sxy),
                ("Syy", k.syy, e.syy),
                ("SSE", k.sse, e.sse),
            ];
            if k.n != e.n {
                rep.problem(
                    here,
                    format!(
                        "its kept ln(y) screen state has n = {}, its records give {}",
                        k.n, e.n
                    ),
                );
            } else if let Some((name, a, b)) = pairs.iter().find(|(_, a, b)| !close(*a, *b)) {
                rep.problem(
                    here,
                    format!(
                        "its kept ln(y) screen state has {name} = {a:e}, its records give {b:e}"
                    ),
                );
            }
        }
    }
}

fn close(a: f64, b: f64) -> bool {
    a == b || (a - b).abs() <= TOLERANCE * a.abs().max(b.abs())
}

fn compare_fit(
    f: &crate::store::StoredFit,
    m: &Moments,
    points: &[(f64, f64)],
    quantiles: &mut HashMap<u64, TQuantiles>,
    rep: &mut VerifyReport,
    here: &str,
) {
    if f.n as u64 != m.n() {
        rep.problem(
            here,
            format!("n = {} stored, {} recomputed from the records", f.n, m.n()),
        );
        return;
    }
    let got = m.to_parts();
    let MomentsParts {
        origin,
        mean_x,
        mean_y,
        sxx,
        sxy,
        syy,
        sse,
        ..
    } = got;
    let names = ["origin", "mean x", "mean y", "Sxx", "Sxy", "Syy", "SSE"];
    for (k, (stored, re)) in f
        .moments
        .iter()
        .zip([origin, mean_x, mean_y, sxx, sxy, syy, sse])
        .enumerate()
    {
        if m.n() > 0 && !close(*stored, re) {
            rep.problem(
                here,
                format!(
                    "{} = {stored:e} stored, {re:e} recomputed from the records",
                    names[k]
                ),
            );
            return;
        }
    }
    let q = quantiles
        .entry(f.level.to_bits())
        .or_insert_with(|| TQuantiles::new(f.level));
    let fit = LineFit::from_moments_with(m, f.level, |df| q.get(df)).ok();
    let names = [
        "slope",
        "intercept",
        "slope standard error",
        "slope p",
        "CI low",
        "CI high",
        "R²",
    ];
    let re: [Option<f64>; 7] = match &fit {
        Some(l) => [
            Some(l.slope),
            Some(l.intercept),
            Some(l.slope_se),
            l.slope_p,
            Some(l.slope_ci_low),
            Some(l.slope_ci_high),
            l.r_squared,
        ],
        None => [None; 7],
    };
    for k in 0..7 {
        match (f.stats[k], re[k]) {
            (Some(a), Some(b)) if close(a, b) => {}
            (None, None) => {}
            (a, b) => {
                rep.problem(
                    here,
                    format!(
                        "{} = {a:?} stored, {b:?} recomputed from the records",
                        names[k]
                    ),
                );
                return;
            }
        }
    }
    if let Some((s, lo, hi)) = f.robust {
        let (x, y): (Vec<f64>, Vec<f64>) = points.iter().copied().unzip();
        match theil_sen(&x, &y, f.level) {
            Ok(ts) if close(ts.slope, s) && close(ts.ci_low, lo) && close(ts.ci_high, hi) => {}
            Ok(ts) => rep.problem(
                here,
                format!(
                    "Theil-Sen slope {s:e} [{lo:e}, {hi:e}] stored, {:e} [{:e}, {:e}] recomputed",
                    ts.slope, ts.ci_low, ts.ci_high
                ),
            ),
            Err(e) => rep.problem(
                here,
                format!("Theil-Sen slope stored, but none can be recomputed: {e}"),
            ),
        }
    }
}
