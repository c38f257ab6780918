//! Exact selection of the k-th smallest pairwise slope.
//!
//! For points (x_i, y_i) the pairwise slopes are
//! `s_pq = (y_q - y_p) / (x_q - x_p)` over the N' pairs with `x_p < x_q`,
//! each computed in f64 exactly as written (so the value is the one a
//! brute-force double loop, or `scipy.stats.theilslopes`, produces). Pairs
//! with equal x have no slope and are left out.
//!
//! [`SlopeSelector::select`] returns chosen order statistics of these N'
//! slopes without listing all of them: a few rounds of O(n log n) work each,
//! then a final list of O(n) slopes. At n = 10,000 (5e7 slopes) the median
//! and two more ranks take milliseconds; n = 1,000,000 takes seconds.
//!
//! # Counting the slopes at or below a threshold
//!
//! Sort the points by (x, y, input index): the *base order*. For a threshold
//! t, `s_pq <= t` with `x_p < x_q` is equivalent (in exact arithmetic) to
//! `u_q <= u_p` where `u = y - t x`. So if the points are put in the *cut
//! order* "ascending u, equal u by descending x, then base order", the pairs
//! with `s <= t` are exactly the pairs that the cut order puts the other way
//! round from the base order, and counting them is counting inversions of a
//! permutation: O(n log n) by merge sort. Breaking equal u by ascending x
//! instead counts `s < t`. Pairs with equal x keep their base order in every
//! cut order, so they are never counted.
//!
//! # Rounding (why the counts are exact for the f64 slopes)
//!
//! The u values are computed in f64 from x shifted by the x of the middle
//! point (`xs`), which keeps |t * xs| small when x is a date like 2026.37 or
//! 1.7e9 seconds. Each computed u_i is within `4 eps_half (|y_i| + |t| |xs_i|)`
//! of the exact `y_i - t (x_i - c)` (the shift, the product and the
//! difference each round once). Let `E = 16 eps_half (max|y| + |t| max|xs|)`
//! (plus a tiny floor for underflow). After sorting by computed u, neighbours
//! closer than `3E` are joined into *runs*. Two points p, q in different runs
//! have exact u differing by more than `2.4 E >= 19 eps_half |y_q - y_p|`,
//! and that difference is `|x_q - x_p| |S - t|` for their exact slope S, so
//! `|S - t| > 19 eps_half |S|`: farther than the at most `3.01 eps_half |S|`
//! by which the f64 slope can differ from S. So for such pairs the u order
//! agrees with the comparison of the *f64 slope* with t. Within a run, the
//! points are re-sorted by a merge sort whose comparator is the f64 slope of
//! the pair itself compared with t (the ground truth), and the run's share
//! of the count is recounted. That comparator is transitive (it is then the
//! exact order at threshold v, ties included) when the pairs of the run whose
//! f64 slope equals t share one exact slope v and the other slopes are more
//! than a few ulps from t. This holds for exact ties, as in integer or other
//! binary-exact data, where every pair with the same slope is counted
//! consistently. Only distinct exact slopes within a few ulps of each other
//! *and* of t can make it intransitive; a count can then be off by pairs
//! whose slopes are within a few ulps of t, and the answer by a few ulps.
//! The merge sort never fails on an intransitive comparator, and the search
//! below still ends and still returns the slope of an actual pair. (A
//! release-mode check against brute force on 240 random data sets of
//! 300..2500 points, including near-collinear decimal data, found no
//! difference.)
//!
//! # Search (randomized interval contraction)
//!
//! This follows the idea of Matoušek (1991) and Dillencourt, Mount &
//! Netanyahu (1992). The state is a sorted list of *cuts* (a threshold with
//! "<" or "<=", and its exact count). A target rank k lies in the bracket
//! between the last cut with count <= k and the next one. While a bracket
//! holds more than about 4n slopes, up to n slopes are drawn from it (the
//! pairs that the two cut orders put differently are the inversions of one
//! permutation relative to the other; a merge sort meets them in a fixed
//! order, and one uniform draw is taken in each of m equal strata of that
//! order), sorted, and the sample order statistics about `3 sqrt(m)` either
//! side of the target's expected position become new cuts (targets whose
//! windows nearly coincide share one). Each round shrinks a bracket by a
//! factor of about `6 / sqrt(m)`; m is cut down when fewer draws already
//! bring the bracket well below the listing size. A bracket whose two ends
//! are "< v" and "<= v" holds only slopes equal to v (a tie), so the answer
//! is v. If a sample value equals a bracket end, the other kind of cut at
//! that value is used, so a bracket cannot stall: a round that removes no
//! slope moves an end onto a slope value, and the next round then removes
//! slopes. Small brackets are listed (their inversions enumerated) and the
//! answer selected from the list.
//!
//! Once a bracket holds few slopes per point, the two cut orders are nearly
//! the same permutation, and insertion sort (O(n + slopes)) replaces merge
//! sort both for walking the bracket's pairs and for reaching a new cut's
//! order from the bracket's lower end (each swap then changes the count by
//! one). The random numbers come from a small SplitMix64 generator seeded
//! from n and the ranks, so results are reproducible.

use std::cmp::Ordering;

use crate::stats::{FitError, check_finite_pairs};

/// Number of pairs with distinct x: `n(n-1)/2 - sum over equal-x groups g(g-1)/2`.
///
/// x is expected to be finite (NaN values are grouped bitwise, never a panic).
#[cfg_attr(not(test), allow(dead_code))]
pub(crate) fn pair_count(x: &[f64]) -> u64 {
    let mut xs: Vec<f64> = x.iter().map(|&v| v + 0.0).collect();
    xs.sort_unstable_by(f64::total_cmp);
    pairs_in_sorted(&xs)
}

/// [`pair_count`] for x already sorted with -0.0 made +0.0.
fn pairs_in_sorted(xs: &[f64]) -> u64 {
    let n = xs.len() as u128;
    let mut pairs = n * n.saturating_sub(1) / 2;
    for g in xs.chunk_by(|a, b| a == b).map(<[f64]>::len) {
        let g = g as u128;
        pairs -= g * (g - 1) / 2;
    }
    u64::try_from(pairs).unwrap_or(u64::MAX)
}

/// The k-th smallest (0-based) slope over pairs with distinct x.
///
/// Errors: [`FitError::LengthMismatch`], [`FitError::NonFinite`], and
/// [`FitError::RankOutOfRange`] when `k >= pair_count(x)`.
#[cfg_attr(not(test), allow(dead_code))]
pub(crate) fn kth_slope(x: &[f64], y: &[f64], k: u64) -> Result<f64, FitError> {
    let found = kth_slopes(x, y, &[k])?;
    Ok(found[0])
}

/// Several order statistics of the pairwise slopes, sharing the work; the
/// result is in the order of `ks` (0-based ranks, any order, repeats allowed).
#[cfg_attr(not(test), allow(dead_code))]
pub(crate) fn kth_slopes(x: &[f64], y: &[f64], ks: &[u64]) -> Result<Vec<f64>, FitError> {
    SlopeSelector::new(x, y)?.select(ks)
}

/// Sizes that steer the search; tests shrink them to reach every branch
/// with small inputs.
#[derive(Debug, Clone, Copy)]
struct Tuning {
    /// A bracket with at most this many slopes is listed and selected from.
    list_at_most: u64,
    /// Most slopes drawn from a bracket per round.
    sample: usize,
    /// Brackets with at most this many slopes per point are walked by
    /// insertion sort (O(n + slopes)) rather than merge sort (O(n log n)).
    nearly_sorted: u64,
}

impl Tuning {
    fn for_len(n: usize) -> Self {
        Tuning {
            list_at_most: (4 * n as u64).max(4096),
            sample: n.max(1024),
            nearly_sorted: 32,
        }
    }
}

/// Rounds after which a bracket is listed (or, if huge, estimated from a
/// sample) whatever its size. Exact arithmetic shrinks every bracket every
/// round; this only bounds the work if ulp-level near-ties stall it.
const MAX_ROUNDS: usize = 48;

/// One point, with what the search needs of it side by side in memory.
#[derive(Debug, Clone, Copy)]
struct Point {
    /// x as given (-0.0 made +0.0).
    x: f64,
    /// y as given (-0.0 made +0.0).
    y: f64,
    /// x minus the x of the middle point in base order.
    xs: f64,
    /// Distinct-x group, numbered 0, 1, ... in base order.
    group: usize,
}

/// The points prepared for slope selection.
#[derive(Debug, Clone)]
pub(crate) struct SlopeSelector {
    /// The points in base order (ascending x, then y, then input index).
    pts: Vec<Point>,
    /// Largest |y|.
    y_abs_max: f64,
    /// Largest |xs|.
    xs_abs_max: f64,
    /// Number of pairs with distinct x (N').
    pairs: u64,
}

/// A point in the sorted list of thresholds.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Threshold {
    /// Below every slope (count 0; cut order = base order).
    NegInf,
    /// Counts slopes `< v` (`strict`) or `<= v`; v is a finite slope value.
    At { v: f64, strict: bool },
    /// Above every slope (count N').
    PosInf,
}

impl Threshold {
    fn value(self) -> Option<f64> {
        match self {
            Threshold::At { v, .. } => Some(v),
            _ => None,
        }
    }

    /// Total order: -inf, then by value with "< v" before "<= v", then +inf.
    fn order(self, other: Self) -> Ordering {
        use Threshold::*;
        match (self, other) {
            (NegInf, NegInf) | (PosInf, PosInf) => Ordering::Equal,
            (NegInf, _) | (_, PosInf) => Ordering::Less,
            (_, NegInf) | (PosInf, _) => Ordering::Greater,
            (At { v: a, strict: sa }, At { v: b, strict: sb }) => a.total_cmp(&b).then(sb.cmp(&sa)),
        }
    }
}

/// A threshold, its exact count, and (while needed) its cut order.
#[derive(Debug)]
struct Cut {
    at: Threshold,
    count: u64,
    order: Option<Vec<usize>>,
}

impl SlopeSelector {
    /// Sorts the points into base order and checks them.
    ///
    /// Errors: [`FitError::LengthMismatch`], [`FitError::NonFinite`] for a
    /// NaN or infinite input, and also [`FitError::NonFinite`] with axis
    /// `"pairwise slope"` when the data are so extreme (around 1e300) that a
    /// pairwise slope or `y - slope * x` could overflow f64.
    pub(crate) fn new(x: &[f64], y: &[f64]) -> Result<Self, FitError> {
        check_finite_pairs(x, y)?;
        let n = x.len();
        let mut idx: Vec<usize> = (0..n).collect();
        idx.sort_unstable_by(|&a, &b| {
            (x[a] + 0.0)
                .total_cmp(&(x[b] + 0.0))
                .then((y[a] + 0.0).total_cmp(&(y[b] + 0.0)))
                .then(a.cmp(&b))
        });
        let xb: Vec<f64> = idx.iter().map(|&i| x[i] + 0.0).collect();
        let yb: Vec<f64> = idx.iter().map(|&i| y[i] + 0.0).collect();
        let centre = if n == 0 { 0.0 } else { xb[n / 2] };
        let mut pts = Vec::with_capacity(n);
        let mut g = 0usize;
        let mut min_gap = f64::INFINITY;
        let mut gap_at = 0usize;
        for i in 0..n {
            if i > 0 && xb[i] != xb[i - 1] {
                g += 1;
                let gap = xb[i] - xb[i - 1];
                if gap < min_gap {
                    min_gap = gap;
                    gap_at = idx[i];
                }
            }
            pts.push(Point {
                x: xb[i],
                y: yb[i],
                xs: xb[i] - centre,
                group: g,
            });
        }
        let y_abs_max = yb.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        let xs_abs_max = pts.iter().fold(0.0f64, |m, p| m.max(p.xs.abs()));
        let pairs = pairs_in_sorted(&xb);
        if pairs > 0 {
            let (ymin, ymax) = yb
                .iter()
                .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &v| {
                    (lo.min(v), hi.max(v))
                });
            // Largest possible |slope| (up to rounding), then the largest |u|.
            let slope_bound = (ymax - ymin) / min_gap;
            let u_bound = y_abs_max + slope_bound * xs_abs_max;
            if u_bound.is_nan() || u_bound > 1e300 {
                return Err(FitError::NonFinite {
                    index: gap_at,
                    axis: "pairwise slope",
                    value: f64::INFINITY,
                });
            }
        }
        Ok(SlopeSelector {
            pts,
            y_abs_max,
            xs_abs_max,
            pairs,
        })
    }

    /// Number of pairs with distinct x (N').
    pub(crate) fn pairs(&self) -> u64 {
        self.pairs
    }

    /// Order statistics (0-based ranks, any order, repeats allowed) of the
    /// pairwise slopes; the result follows the order of `ks`.
    ///
    /// Errors: [`FitError::RankOutOfRange`] if a rank is `>= pairs()`.
    pub(crate) fn select(&self, ks: &[u64]) -> Result<Vec<f64>, FitError> {
        self.select_tuned(ks, Tuning::for_len(self.pts.len()))
    }

    fn select_tuned(&self, ks: &[u64], tuning: Tuning) -> Result<Vec<f64>, FitError> {
        if let Some(&rank) = ks.iter().find(|&&k| k >= self.pairs) {
            return Err(FitError::RankOutOfRange {
                rank,
                count: self.pairs,
            });
        }
        let mut targets = ks.to_vec();
        targets.sort_unstable();
        targets.dedup();
        let found = if self.pairs <= tuning.list_at_most {
            let mut all = self.all_slopes();
            let ranks: Vec<usize> = targets.iter().map(|&k| k as usize).collect();
            select_sorted_ranks(&mut all, &ranks)
        } else {
            self.contract(&targets, tuning)
        };
        Ok(ks
            .iter()
            .map(|k| {
                // BUG if missing: `targets` holds every element of `ks`.
                let at = targets.binary_search(k).unwrap_or(0);
                found[at]
            })
            .collect())
    }

    /// f64 slope of the pair at base positions p < q (distinct x); -0.0 made +0.0.
    #[inline]
    fn slope(&self, p: usize, q: usize) -> f64 {
        let (a, b) = (&self.pts[p], &self.pts[q]);
        (b.y - a.y) / (b.x - a.x) + 0.0
    }

    /// Every slope, by brute force (small inputs only).
    fn all_slopes(&self) -> Vec<f64> {
        let n = self.pts.len();
        let mut out = Vec::with_capacity(usize::try_from(self.pairs).unwrap_or(0));
        for p in 0..n {
            for q in p + 1..n {
                if self.pts[p].group != self.pts[q].group {
                    out.push(self.slope(p, q));
                }
            }
        }
        out
    }

    /// Whether the cut order at (t, strict) reverses the base-order pair p < q.
    #[inline]
    fn reversed(&self, p: usize, q: usize, t: f64, strict: bool) -> bool {
        if self.pts[p].group == self.pts[q].group {
            return false;
        }
        let s = self.slope(p, q);
        if strict { s < t } else { s <= t }
    }

    /// The cut order at a threshold (the points, as base positions, in
    /// order) and its count (how many slopes it puts at or below the threshold).
    ///
    /// `near`, if given, is the order and count of a cut with few slopes
    /// between it and this one; the order is then reached from it by
    /// insertion sort, each swap of two points adding or removing one pair
    /// reversed from the base order.
    fn cut_order(
        &self,
        at: Threshold,
        near: Option<(&[usize], u64)>,
        buf: &mut Vec<usize>,
    ) -> (Vec<usize>, u64) {
        let n = self.pts.len();
        let (t, strict) = match at {
            Threshold::NegInf => return ((0..n).collect(), 0),
            Threshold::PosInf => {
                // Descending x groups, base order inside a group.
                let mut out = Vec::with_capacity(n);
                let mut end = n;
                for start in (0..n).rev() {
                    if start == 0 || self.pts[start - 1].group != self.pts[start].group {
                        out.extend(start..end);
                        end = start;
                    }
                }
                return (out, self.pairs);
            }
            Threshold::At { v, strict } => (v, strict),
        };
        let key = |i: usize| {
            let p = &self.pts[i];
            (sortable_bits(p.y - t * p.xs), i)
        };
        // Sort by (u, base position) and count the pairs this order reverses.
        let (keyed, mut count) = match near {
            None => {
                let mut keyed: Vec<(u64, usize)> = (0..n).map(key).collect();
                let count = merge_count(
                    &mut keyed,
                    &mut Vec::new(),
                    MERGE_BLOCK,
                    u64::MAX,
                    |_, _, _| u64::MAX,
                );
                (keyed, count)
            }
            Some((start, start_count)) => {
                let mut keyed: Vec<(u64, usize)> = start.iter().map(|&i| key(i)).collect();
                let (mut gained, mut lost) = (0u64, 0u64);
                for i in 1..n {
                    let r = keyed[i];
                    let mut p = i;
                    while p > 0 && r < keyed[p - 1] {
                        // r moves ahead of keyed[p - 1].
                        let ahead = u64::from(keyed[p - 1].1 < r.1);
                        gained += ahead;
                        lost += 1 - ahead;
                        keyed[p] = keyed[p - 1];
                        p -= 1;
                    }
                    keyed[p] = r;
                }
                // The result counts pairs of the final order, so it is >= 0.
                (keyed, (start_count + gained).saturating_sub(lost))
            }
        };
        let mut order: Vec<usize> = keyed.iter().map(|&(_, i)| i).collect();
        // Rounding bound on u (see the module notes).
        let e = 8.0 * f64::EPSILON * (self.y_abs_max + t.abs() * self.xs_abs_max)
            + 4.0 * f64::MIN_POSITIVE;
        let gap = 3.0 * e;
        let mut start = 0;
        for k in 1..=n {
            if k < n && from_sortable_bits(keyed[k].0) - from_sortable_bits(keyed[k - 1].0) <= gap {
                continue;
            }
            if k - start > 1 {
                // Re-sort the run with the f64 slopes themselves and swap
                // its pairs' share of the count.
                let run = &mut order[start..k];
                // The run's pairs are among those counted, so this cannot
                // go below 0; saturate anyway rather than risk a panic.
                count = count.saturating_sub(inversions(run, buf));
                merge_sort_by(run, buf, |l, r| {
                    // r goes first if the cut order puts r before l.
                    if r < l {
                        !self.reversed(r, l, t, strict)
                    } else {
                        self.reversed(l, r, t, strict)
                    }
                });
                count += inversions(run, buf);
            }
            start = k;
        }
        (order, count)
    }

    /// Slopes of the pairs that the two cut orders put differently: the
    /// slopes in the bracket (lo, hi].
    fn list_bracket(&self, lo: &[usize], hi: &[usize], size: u64, tuning: Tuning) -> Vec<f64> {
        let (mut w, tagged) = relabel(lo, hi);
        let mut out = Vec::new();
        merge_count(
            &mut w,
            &mut Vec::new(),
            block_for(size, lo.len(), tuning),
            0,
            |r, rest, before| {
                let b = point_of(lo, tagged, r);
                for &l in rest {
                    let a = point_of(lo, tagged, l);
                    // The hi order puts a before b and the lo order b before a.
                    // Keep the pair if the lo order agrees with the base order
                    // (always, unless rounding made the cuts disagree).
                    if b < a {
                        out.push(self.slope(b, a));
                    }
                }
                before + rest.len() as u64
            },
        );
        out
    }

    /// About `m` slopes drawn from the `size` pairs that the two cut orders
    /// put differently: one uniform draw in each of m equal strata of the
    /// order in which a merge sort meets those pairs (stratified sampling;
    /// every pair is equally likely and sample proportions vary no more
    /// than with independent draws).
    fn sample_bracket(
        &self,
        lo: &[usize],
        hi: &[usize],
        size: u64,
        m: usize,
        tuning: Tuning,
        rng: &mut SplitMix64,
    ) -> Vec<f64> {
        let mut draws = Vec::with_capacity(m);
        let stratum = |i: usize| (u128::from(size) * i as u128 / m as u128) as u64;
        for i in 0..m {
            let (a, b) = (stratum(i), stratum(i + 1));
            if b > a {
                draws.push(a + rng.below(b - a));
            }
        }
        let (mut w, tagged) = relabel(lo, hi);
        let mut out = Vec::with_capacity(draws.len());
        let mut d = 0;
        let first = draws.first().copied().unwrap_or(u64::MAX);
        merge_count(
            &mut w,
            &mut Vec::new(),
            block_for(size, lo.len(), tuning),
            first,
            |r, rest, before| {
                let end = before + rest.len() as u64;
                while d < draws.len() && draws[d] < end {
                    let l = rest[(draws[d] - before) as usize];
                    let (a, b) = (point_of(lo, tagged, l), point_of(lo, tagged, r));
                    out.push(self.slope(a.min(b), a.max(b)));
                    d += 1;
                }
                draws.get(d).copied().unwrap_or(u64::MAX)
            },
        );
        out
    }

    /// Randomized interval contraction for sorted, distinct target ranks.
    fn contract(&self, targets: &[u64], tuning: Tuning) -> Vec<f64> {
        let n = self.pts.len();
        let mut seed = (n as u64).wrapping_mul(0x9E37_79B9_7F4A_7C15) ^ self.pairs;
        for &k in targets {
            seed = SplitMix64(seed ^ k).next();
        }
        let mut rng = SplitMix64(seed);
        let mut buf = Vec::new();
        let mut cuts = vec![
            Cut {
                at: Threshold::NegInf,
                count: 0,
                order: None,
            },
            Cut {
                at: Threshold::PosInf,
                count: self.pairs,
                order: None,
            },
        ];
        let mut answers: Vec<Option<f64>> = vec![None; targets.len()];
        for round in 0.. {
            // Brackets of the unresolved targets: (index of lower cut, targets).
            let mut brackets: Vec<(usize, Vec<usize>)> = Vec::new();
            for (ti, &k) in targets.iter().enumerate() {
                if answers[ti].is_some() {
                    continue;
                }
                // cuts[0].count = 0 <= k < N' = last count, so 1 <= i + 1 < len.
                let i = cuts.partition_point(|c| c.count <= k) - 1;
                match brackets.last_mut() {
                    Some((j, tis)) if *j == i => tis.push(ti),
                    _ => brackets.push((i, vec![ti])),
                }
            }
            if brackets.is_empty() {
                break;
            }
            for (ci, cut) in cuts.iter_mut().enumerate() {
                let needed = brackets.iter().any(|&(i, _)| ci == i || ci == i + 1);
                if !needed {
                    cut.order = None;
                } else if cut.order.is_none() {
                    cut.order = Some(self.cut_order(cut.at, None, &mut buf).0);
                }
            }
            // New thresholds, each with the bracket it came from.
            let mut new_at: Vec<(Threshold, usize)> = Vec::new();
            for (i, tis) in &brackets {
                let (lo, hi) = (&cuts[*i], &cuts[*i + 1]);
                let (lo_order, hi_order) = match (&lo.order, &hi.order) {
                    (Some(a), Some(b)) => (a.as_slice(), b.as_slice()),
                    _ => unreachable!(
                        "BUG: the orders of all bracket ends were filled in just above"
                    ),
                };
                // A bracket between "< v" and "<= v" holds only slopes equal to v.
                if let (Some(a), Some(b)) = (lo.at.value(), hi.at.value())
                    && a == b
                {
                    for &ti in tis {
                        answers[ti] = Some(a);
                    }
                    continue;
                }
                let size = hi.count - lo.count;
                let end_value = lo.at.value().or(hi.at.value());
                let late = round >= MAX_ROUNDS;
                if size <= tuning.list_at_most
                    || (late && size <= tuning.list_at_most.saturating_mul(64))
                {
                    let mut slopes = self.list_bracket(lo_order, hi_order, size, tuning);
                    if slopes.is_empty() {
                        // Only if rounding made the two cuts disagree (see notes).
                        slopes.push(end_value.unwrap_or(0.0));
                    }
                    let last = slopes.len() - 1;
                    let rank = |ti: usize| ((targets[ti] - lo.count) as usize).min(last);
                    if let [ti] = tis[..] {
                        let r = rank(ti);
                        slopes.select_nth_unstable_by(r, f64::total_cmp);
                        answers[ti] = Some(slopes[r]);
                    } else {
                        // `tis` follow `targets`, which are sorted, so the
                        // ranks are too.
                        let ranks: Vec<usize> = tis.iter().map(|&ti| rank(ti)).collect();
                        let found = select_sorted_ranks(&mut slopes, &ranks);
                        for (&ti, v) in tis.iter().zip(found) {
                            answers[ti] = Some(v);
                        }
                    }
                    continue;
                }
                // Enough draws to bring the bracket to 1/8 of the listing size
                // in one round if possible: its width is about 6 size / sqrt(m).
                let ratio = size as f64 / tuning.list_at_most as f64;
                let wanted = (2304.0 * ratio * ratio).max(64.0);
                let m = if wanted < tuning.sample as f64 {
                    wanted as usize
                } else {
                    tuning.sample
                };
                let mut sample = self.sample_bracket(lo_order, hi_order, size, m, tuning, &mut rng);
                if sample.is_empty() {
                    sample.push(end_value.unwrap_or(0.0));
                }
                sort_floats(&mut sample);
                let m = sample.len() as f64;
                let half_width = (3.0 * m.sqrt()).min(m / 4.0);
                // Expected sample position of each target.
                let pos = |ti: usize| ((targets[ti] - lo.count) as f64 + 0.5) / size as f64 * m;
                if late {
                    // Give up contracting (never expected): nearest sample.
                    for &ti in tis {
                        answers[ti] = Some(sample[(pos(ti) as usize).min(sample.len() - 1)]);
                    }
                    continue;
                }
                // Targets whose windows nearly coincide share one window.
                let mut c = 0;
                while c < tis.len() {
                    let first = pos(tis[c]);
                    let mut last = first;
                    c += 1;
                    while c < tis.len() && pos(tis[c]) - first <= half_width / 2.0 {
                        last = pos(tis[c]);
                        c += 1;
                    }
                    let ia = (first - half_width).floor();
                    let ib = (last + half_width).ceil();
                    if ia >= 0.0 {
                        let v = sample[ia as usize];
                        // "< v" would not move the lower end if it is "< v" already.
                        let strict = lo.at.value() != Some(v);
                        new_at.push((Threshold::At { v, strict }, *i));
                    }
                    if ib <= m - 1.0 {
                        let v = sample[ib as usize];
                        let strict = hi.at.value() == Some(v);
                        new_at.push((Threshold::At { v, strict }, *i));
                    }
                }
            }
            new_at.sort_by(|a, b| a.0.order(b.0));
            new_at.dedup_by(|a, b| a.0 == b.0);
            let mut fresh = Vec::with_capacity(new_at.len());
            for (at, from) in new_at {
                let pos = cuts.partition_point(|c| c.at.order(at) == Ordering::Less);
                if cuts[pos].at == at {
                    continue;
                }
                // Few slopes between the new cut and its bracket's lower end:
                // start from that order.
                let lo = &cuts[from];
                let size = cuts[from + 1].count - lo.count;
                let near = match &lo.order {
                    Some(o) if size <= tuning.nearly_sorted.saturating_mul(n as u64) => {
                        Some((o.as_slice(), lo.count))
                    }
                    _ => None,
                };
                let (order, count) = self.cut_order(at, near, &mut buf);
                fresh.push(Cut {
                    at,
                    count,
                    order: Some(order),
                });
            }
            for cut in fresh {
                let pos = cuts.partition_point(|c| c.at.order(cut.at) == Ordering::Less);
                // Counts must not decrease along the list; a cut that breaks
                // this (possible only through ulp-level near-ties) is dropped.
                if cuts[pos - 1].count <= cut.count && cut.count <= cuts[pos].count {
                    cuts.insert(pos, cut);
                }
            }
        }
        answers
            .into_iter()
            .map(|a| a.expect("BUG: the loop above ends only when every target has an answer"))
            .collect()
    }
}

/// f64 bits mapped so that unsigned order is `total_cmp` order.
#[inline]
fn sortable_bits(v: f64) -> u64 {
    let b = v.to_bits();
    if b >> 63 == 1 { !b } else { b | (1 << 63) }
}

/// Insertion-sort block length for a permutation of n with `size` inversions.
fn block_for(size: u64, n: usize, tuning: Tuning) -> usize {
    if size <= tuning.nearly_sorted.saturating_mul(n as u64) {
        n
    } else {
        MERGE_BLOCK
    }
}

/// Inverse of [`sortable_bits`].
#[inline]
fn from_sortable_bits(k: u64) -> f64 {
    f64::from_bits(if k >> 63 == 1 { k & !(1 << 63) } else { !k })
}

/// The `hi` order written as positions in the `lo` order (its inversions
/// are the pairs the two orders put differently). When n <= 2^32 each entry
/// also carries its point in the low 32 bits (`tagged`), which keeps the
/// order and saves a look-up per pair later.
fn relabel(lo: &[usize], hi: &[usize]) -> (Vec<u64>, bool) {
    let tagged = lo.len() as u64 <= 1 << 32;
    let mut pos = vec![0u64; lo.len()];
    for (i, &e) in lo.iter().enumerate() {
        pos[e] = i as u64;
    }
    let w = hi
        .iter()
        .map(|&e| {
            if tagged {
                pos[e] << 32 | e as u64
            } else {
                pos[e]
            }
        })
        .collect();
    (w, tagged)
}

/// The point behind an entry of [`relabel`]'s output.
#[inline]
fn point_of(lo: &[usize], tagged: bool, v: u64) -> usize {
    if tagged {
        (v & 0xFFFF_FFFF) as usize
    } else {
        lo[v as usize]
    }
}

/// Sorts f64 values (finite, no -0.0) through their integer keys, which is
/// faster than comparing floats.
/// The values of ascending 0-based `ranks` (repeats allowed, each below
/// `v.len()`) in `v` sorted by `f64::total_cmp`, without sorting all of
/// `v`: each rank is selected in the part right of the one before (O(len)
/// per rank instead of O(len log len) for the sort). `v` is reordered.
fn select_sorted_ranks(v: &mut [f64], ranks: &[usize]) -> Vec<f64> {
    let mut out = Vec::with_capacity(ranks.len());
    let mut from = 0;
    for &r in ranks {
        if r >= from {
            let (_, nth, _) = v[from..].select_nth_unstable_by(r - from, f64::total_cmp);
            out.push(*nth);
            from = r + 1;
        } else {
            // A repeat of the rank just selected (ranks ascend).
            out.push(v[r]);
        }
    }
    out
}

fn sort_floats(v: &mut [f64]) {
    let mut keys: Vec<u64> = v.iter().map(|&f| sortable_bits(f)).collect();
    keys.sort_unstable();
    for (f, k) in v.iter_mut().zip(keys) {
        *f = from_sortable_bits(k);
    }
}

/// Number of pairs i < j with `seq[i] > seq[j]`.
fn inversions(seq: &[usize], buf: &mut Vec<usize>) -> u64 {
    let mut work = seq.to_vec();
    merge_count(&mut work, buf, MERGE_BLOCK, u64::MAX, |_, _, _| u64::MAX)
}

/// Block length for insertion sort before merging, when nothing is known
/// about the order of the input.
pub(crate) const MERGE_BLOCK: usize = 16;

/// Sorts `v` ascending (stably) and returns its number of inversions
/// (pairs i < j with `v[i] > v[j]`).
///
/// The sort meets the inversions in a fixed order, numbered 0, 1, ...: each
/// time an element `r` is placed before the run `rest` of larger elements
/// that preceded it, the pairs (rest[0], r), (rest[1], r), ... get the next
/// numbers, starting at `before`. When that range passes `mark`,
/// `on_mark(r, rest, before)` is called and returns the next mark (at least
/// `before + rest.len()`); `u64::MAX` means never. With `mark = u64::MAX` this
/// is a plain count.
///
/// Blocks of `block` elements are first sorted by insertion, then merged
/// (the merge step is branch-free for speed). With `block >= v.len()` it is
/// a pure insertion sort, O(n + inversions): the right choice when `v` is
/// known to be nearly sorted.
pub(crate) fn merge_count<T: Copy + Default + PartialOrd>(
    v: &mut [T],
    buf: &mut Vec<T>,
    block: usize,
    mut mark: u64,
    mut on_mark: impl FnMut(T, &[T], u64) -> u64,
) -> u64 {
    let n = v.len();
    let block = block.max(1);
    let mut count = 0u64;
    // Insertion sort of short blocks.
    for start in (0..n).step_by(block) {
        let end = (start + block).min(n);
        for i in start + 1..end {
            let r = v[i];
            let mut p = i;
            while p > start && r < v[p - 1] {
                p -= 1;
            }
            if p < i {
                let passed = (i - p) as u64;
                if count + passed > mark {
                    mark = on_mark(r, &v[p..i], count);
                }
                count += passed;
                v.copy_within(p..i, p + 1);
                v[p] = r;
            }
        }
    }
    if n <= block {
        return count;
    }
    buf.clear();
    buf.resize(n, T::default());
    let mut width = block;
    let mut in_v = true;
    while width < n {
        let (src, dst): (&[T], &mut [T]) = if in_v {
            (&*v, &mut buf[..])
        } else {
            (&buf[..], &mut *v)
        };
        for lo in (0..n).step_by(2 * width) {
            let mid = (lo + width).min(n);
            let hi = (lo + 2 * width).min(n);
            let (left, right) = (&src[lo..mid], &src[mid..hi]);
            let out = &mut dst[lo..hi];
            let (nl, nr) = (left.len(), right.len());
            let (mut i, mut j) = (0, 0);
            while i < nl && j < nr {
                let (l, r) = (left[i], right[j]);
                let take_right = r < l;
                let passed = if take_right { (nl - i) as u64 } else { 0 };
                if count + passed > mark {
                    mark = on_mark(r, &left[i..], count);
                }
                count += passed;
                out[i + j] = if take_right { r } else { l };
                i += usize::from(!take_right);
                j += usize::from(take_right);
            }
            out[i + j..nl + j].copy_from_slice(&left[i..]);
            out[nl + j..].copy_from_slice(&right[j..]);
        }
        in_v = !in_v;
        width *= 2;
    }
    if !in_v {
        v.copy_from_slice(&buf[..n]);
    }
    count
}

/// Stable bottom-up merge sort of `v`; `right_first(l, r)` says whether `r`,
/// from the later run, goes before `l`, from the earlier run. An
/// inconsistent comparator gives some permutation, never a panic.
fn merge_sort_by(
    v: &mut [usize],
    buf: &mut Vec<usize>,
    mut right_first: impl FnMut(usize, usize) -> bool,
) {
    let n = v.len();
    buf.clear();
    buf.resize(n, 0);
    let mut width = 1;
    let mut in_v = true;
    while width < n {
        let (src, dst): (&[usize], &mut [usize]) = if in_v {
            (&*v, &mut buf[..])
        } else {
            (&buf[..], &mut *v)
        };
        for lo in (0..n).step_by(2 * width) {
            let mid = (lo + width).min(n);
            let hi = (lo + 2 * width).min(n);
            let (left, right) = (&src[lo..mid], &src[mid..hi]);
            let out = &mut dst[lo..hi];
            let (mut i, mut j) = (0, 0);
            while i < left.len() && j < right.len() {
                if right_first(left[i], right[j]) {
                    out[i + j] = right[j];
                    j += 1;
                } else {
                    out[i + j] = left[i];
                    i += 1;
                }
            }
            out[i + j..left.len() + j].copy_from_slice(&left[i..]);
            out[left.len() + j..].copy_from_slice(&right[j..]);
        }
        in_v = !in_v;
        width *= 2;
    }
    if !in_v {
        v.copy_from_slice(&buf[..n]);
    }
}

/// SplitMix64 (Steele, Lea & Flood 2014): small, fast, reproducible.
struct SplitMix64(u64);

impl SplitMix64 {
    fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform in 0..bound (bound > 0), by multiply-high (bias < bound / 2^64).
    fn below(&mut self, bound: u64) -> u64 {
        ((self.next() as u128 * bound as u128) >> 64) as u64
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    // Every check below compares against the definition (oracle): all pairs
    // with x_i < x_j, slope (y_j - y_i)/(x_j - x_i) in f64, sorted. No
    // outside statistic is involved; the scipy-checked values are in
    // `robust.rs`.
    fn brute(x: &[f64], y: &[f64]) -> Vec<f64> {
        let mut s = Vec::new();
        for i in 0..x.len() {
            for j in 0..x.len() {
                if x[j] > x[i] {
                    s.push((y[j] - y[i]) / (x[j] - x[i]) + 0.0);
                }
            }
        }
        s.sort_by(f64::total_cmp);
        s
    }

    /// Selects every rank at once and each of a few ranks alone with the
    /// given tuning, and compares with brute force.
    fn check(x: &[f64], y: &[f64], tuning: Tuning) -> Result<(), TestCaseError> {
        let want = brute(x, y);
        let sel = SlopeSelector::new(x, y).unwrap();
        prop_assert_eq!(sel.pairs(), want.len() as u64);
        prop_assert_eq!(pair_count(x), want.len() as u64);
        if want.is_empty() {
            return Ok(());
        }
        let ks: Vec<u64> = (0..want.len() as u64).rev().collect();
        let got = sel.select_tuned(&ks, tuning).unwrap();
        for (&k, g) in ks.iter().zip(&got) {
            prop_assert!(
                same_slope(*g, want[k as usize]),
                "rank {} of {}: {} vs {}",
                k,
                want.len(),
                g,
                want[k as usize]
            );
        }
        let m = want.len() as u64;
        for k in [0, m / 3, m / 2, m - 1] {
            let got = sel.select_tuned(&[k], tuning).unwrap();
            prop_assert!(
                same_slope(got[0], want[k as usize]),
                "rank {} alone: {} vs {}",
                k,
                got[0],
                want[k as usize]
            );
        }
        Ok(())
    }

    /// Equal, or a few ulps apart: the selector ranks pairs by comparisons
    /// on centred coordinates, and when two different pairs' slopes lie
    /// within a few ulps of each other (found by proptest: x = 2026.0 and
    /// 2025.738, slopes 0.98445595854930{63,65}), their rounded quotients
    /// can order differently from those comparisons. A difference of 1e-15
    /// relative has no statistical meaning; any real mis-ranking would be
    /// off by a whole gap between slopes.
    fn same_slope(a: f64, b: f64) -> bool {
        a == b || (a - b).abs() <= 1e-15 * a.abs().max(b.abs())
    }

    fn tiny_tuning() -> impl Strategy<Value = Tuning> {
        (
            0u64..6,
            4usize..40,
            prop::sample::select(vec![0u64, 1, 32, 1000]),
        )
            .prop_map(|(list_at_most, sample, nearly_sorted)| Tuning {
                list_at_most,
                sample,
                nearly_sorted,
            })
    }

    fn data() -> impl Strategy<Value = (Vec<f64>, Vec<f64>)> {
        let sizes = 2usize..45;
        prop_oneof![
            // Integers with heavy ties in x and y.
            sizes.clone().prop_flat_map(|n| (
                prop::collection::vec((0i32..6).prop_map(f64::from), n),
                prop::collection::vec((-3i32..4).prop_map(f64::from), n),
            )),
            // Reals.
            sizes.clone().prop_flat_map(|n| (
                prop::collection::vec(-10.0f64..10.0, n),
                prop::collection::vec(-10.0f64..10.0, n),
            )),
            // Decimal years 2026 +- 0.5, y with 2 decimals.
            sizes.clone().prop_flat_map(|n| (
                prop::collection::vec(
                    (-500i32..500).prop_map(|d| 2026.0 + f64::from(d) / 1000.0),
                    n
                ),
                prop::collection::vec((-300i32..300).prop_map(|c| f64::from(c) / 100.0), n),
            )),
            // Monthly dates and a straight line plus small integer noise.
            sizes
                .clone()
                .prop_flat_map(|n| (
                    prop::collection::vec((0i32..48).prop_map(|m| 2020.0 + f64::from(m) / 12.0), n),
                    prop::collection::vec(-2i32..3, n),
                ))
                .prop_map(|(x, e)| {
                    let y = x
                        .iter()
                        .zip(e)
                        .map(|(&t, e)| 0.5 * (t - 2020.0) + f64::from(e))
                        .collect();
                    (x, y)
                }),
            // Unix seconds near 1.7e9 (many equal times), y in [0, 1).
            sizes.clone().prop_flat_map(|n| (
                prop::collection::vec((0i32..20).prop_map(|s| 1.7e9 + f64::from(s) * 3600.0), n),
                prop::collection::vec(0.0f64..1.0, n),
            )),
            // All y equal.
            sizes.clone().prop_flat_map(|n| (
                prop::collection::vec((0i32..10).prop_map(f64::from), n),
                Just(vec![4.25; n]),
            )),
            // Exactly collinear integer points: every slope equal.
            sizes
                .prop_flat_map(|n| prop::collection::vec(0i32..30, n))
                .prop_map(|x| {
                    let y = x.iter().map(|&v| f64::from(3 * v - 7)).collect();
                    (x.into_iter().map(|v| f64::from(3 * v)).collect(), y)
                }),
        ]
    }

    proptest! {
        #![proptest_config(ProptestConfig::with_cases(600))]

        #[test]
        fn selection_matches_brute_force((x, y) in data(), tuning in tiny_tuning()) {
            check(&x, &y, tuning)?;
        }
    }

    #[test]
    fn default_tuning_matches_brute_force_on_larger_inputs() {
        let mut rng = SplitMix64(7);
        let n = 1500;
        let unit = |r: &mut SplitMix64| (r.next() >> 11) as f64 / (1u64 << 53) as f64;
        // Decimal years with jitter; y a trend plus noise rounded to 2 decimals.
        let x: Vec<f64> = (0..n)
            .map(|i| 2000.0 + i as f64 / 52.0 + 0.01 * unit(&mut rng))
            .collect();
        let y: Vec<f64> = x
            .iter()
            .map(|&t| ((0.3 * (t - 2000.0) + unit(&mut rng)) * 100.0).round() / 100.0)
            .collect();
        let want = brute(&x, &y);
        let m = want.len() as u64;
        let ks = [0, 1, m / 4, m / 2 - 1, m / 2, 3 * m / 4, m - 1];
        let got = kth_slopes(&x, &y, &ks).unwrap();
        for (k, g) in ks.iter().zip(got) {
            assert_eq!(g, want[*k as usize], "rank {k}");
        }
        // Integer data with very heavy ties.
        let x: Vec<f64> = (0..n).map(|i| (i % 37) as f64).collect();
        let y: Vec<f64> = (0..n).map(|i| ((i * 13) % 11) as f64).collect();
        let want = brute(&x, &y);
        let m = want.len() as u64;
        for k in [0, m / 3, m / 2, m - 1] {
            assert_eq!(kth_slope(&x, &y, k).unwrap(), want[k as usize], "rank {k}");
        }
    }

    #[test]
    fn errors_and_counts() {
        assert_eq!(pair_count(&[]), 0);
        assert_eq!(pair_count(&[1.0, 1.0, 2.0, 2.0, 2.0, 3.0]), 15 - 1 - 3);
        assert_eq!(pair_count(&[0.0, -0.0]), 0);
        assert!(matches!(
            kth_slope(&[1.0, 2.0], &[1.0, 2.0], 1),
            Err(FitError::RankOutOfRange { rank: 1, count: 1 })
        ));
        assert!(matches!(
            kth_slope(&[1.0, 1.0], &[1.0, 2.0], 0),
            Err(FitError::RankOutOfRange { rank: 0, count: 0 })
        ));
        assert!(matches!(
            kth_slope(&[1.0], &[1.0, 2.0], 0),
            Err(FitError::LengthMismatch { .. })
        ));
        assert!(matches!(
            kth_slope(&[1.0, 2.0], &[f64::NAN, 2.0], 0),
            Err(FitError::NonFinite {
                index: 0,
                axis: "y",
                ..
            })
        ));
        assert!(matches!(
            kth_slope(&[-1e308, 1e308], &[0.0, 1.0], 0),
            Err(FitError::NonFinite {
                axis: "pairwise slope",
                ..
            })
        ));
        assert_eq!(
            kth_slopes(&[1.0, 2.0, 4.0], &[0.0, 1.0, 3.0], &[2, 0, 2]).unwrap(),
            vec![1.0, 1.0, 1.0]
        );
    }

    #[test]
    fn sortable_bits_round_trip_and_order() {
        let v = [
            -f64::MAX,
            -2.5,
            -f64::MIN_POSITIVE,
            0.0,
            1e-310,
            0.1,
            3.0,
            f64::MAX,
        ];
        for w in v.windows(2) {
            assert!(sortable_bits(w[0]) < sortable_bits(w[1]));
        }
        for &f in &v {
            assert_eq!(from_sortable_bits(sortable_bits(f)).to_bits(), f.to_bits());
        }
        let mut s = vec![3.0, -1.0, 0.5, -7.25, 0.0];
        sort_floats(&mut s);
        assert_eq!(s, vec![-7.25, -1.0, 0.0, 0.5, 3.0]);
    }

    #[test]
    fn merge_count_counts_and_numbers_every_inversion() {
        let mut rng = SplitMix64(3);
        for n in [0usize, 1, 2, 5, 16, 17, 33, 200] {
            let seq: Vec<usize> = (0..n)
                .map(|_| rng.below(n as u64 / 2 + 1) as usize)
                .collect();
            let mut direct = Vec::new();
            for i in 0..n {
                for j in i + 1..n {
                    if seq[i] > seq[j] {
                        direct.push((seq[i], seq[j]));
                    }
                }
            }
            assert_eq!(inversions(&seq, &mut Vec::new()), direct.len() as u64);
            direct.sort_unstable();
            // Listing every inversion through the mark callback, numbered in
            // order, for merge sort, pure insertion sort and odd block lengths.
            for block in [MERGE_BLOCK, n, 1, 3] {
                let mut sorted = seq.clone();
                let mut listed = Vec::new();
                let total =
                    merge_count(&mut sorted, &mut Vec::new(), block, 0, |r, rest, before| {
                        assert_eq!(before, listed.len() as u64);
                        listed.extend(rest.iter().map(|&l| (l, r)));
                        before + rest.len() as u64
                    });
                assert_eq!(total, direct.len() as u64);
                assert!(sorted.windows(2).all(|w| w[0] <= w[1]));
                listed.sort_unstable();
                assert_eq!(listed, direct, "block {block}");
            }
        }
    }
}
