//! Theil-Sen and Mann-Kendall of a short series kept current point by point.
//!
//! A series refits at every file, and while it is short its robust slope is
//! recomputed at every refit. From scratch that costs a selection among
//! n(n-1)/2 pairwise slopes each time; kept here, a new point costs its n
//! slopes against the points before it, merged into the sorted list of all
//! of them, and S of Mann-Kendall its n signs. The statistics are then read
//! off the sorted lists by [`super::robust`]'s own finishing steps, so they
//! are the ones [`super::robust::theil_sen`] and
//! [`super::robust::mann_kendall`] give for the same points (the Theil-Sen
//! order statistics here are those of the sorted f64 slopes, the ground
//! truth that the selector reaches).
//!
//! Memory grows as n²/2 slopes (40 KB at n = 100), so it is meant for short
//! series; the caller decides how long.

use super::robust::{MannKendall, TheilSen, mann_kendall_from, theil_sen_from};
use super::{FitError, check_level};

/// The pairwise statistics of points taken in order.
#[derive(Debug, Clone, Default)]
pub struct PairwiseTrend {
    /// The points as given, in the order taken.
    points: Vec<(f64, f64)>,
    /// Every pairwise slope over pairs with distinct x, ascending
    /// (`f64::total_cmp`; -0.0 made +0.0).
    slopes: Vec<f64>,
    /// x and y each ascending (-0.0 made +0.0).
    xs: Vec<f64>,
    ys: Vec<f64>,
    /// Mann-Kendall's S: the sum over pairs of sgn(dx) sgn(dy).
    s: i128,
    /// A value that is not finite was taken: every answer is then the
    /// from-scratch function's (which names the error).
    not_finite: bool,
    /// Slopes of points taken but not yet merged into `slopes`.
    fresh: Vec<f64>,
}

impl PairwiseTrend {
    /// Nothing taken yet.
    pub fn new() -> PairwiseTrend {
        PairwiseTrend::default()
    }

    /// Points taken so far.
    pub fn len(&self) -> usize {
        self.points.len()
    }

    /// Whether no point has been taken.
    pub fn is_empty(&self) -> bool {
        self.points.is_empty()
    }

    /// Pairwise slopes held (memory: 8 bytes each, and at most a quarter
    /// more kept spare).
    pub fn slopes_held(&self) -> usize {
        self.slopes.len()
    }

    /// Takes the points of `all` not yet taken, when the ones taken are its
    /// start; otherwise starts again from `all`. Afterwards the statistics
    /// are those of `all`.
    pub fn follow(&mut self, all: &[(f64, f64)]) {
        let taken = self.points.len();
        if taken > all.len() || !same_points(&self.points, &all[..taken]) {
            *self = PairwiseTrend::new();
        }
        for &(x, y) in &all[self.points.len()..] {
            self.take(x, y);
        }
        self.settle();
    }

    /// Takes one more point.
    pub fn push(&mut self, x: f64, y: f64) {
        self.take(x, y);
        self.settle();
    }

    /// Takes a point, its slopes left in `fresh` for [`Self::settle`].
    fn take(&mut self, x: f64, y: f64) {
        if !(x.is_finite() && y.is_finite()) {
            self.not_finite = true;
        }
        let (x0, y0) = (x + 0.0, y + 0.0);
        if !self.not_finite {
            for &(xp, yp) in &self.points {
                let (xp, yp) = (xp + 0.0, yp + 0.0);
                if xp != x0 {
                    // As the selector computes a pair's slope: the same
                    // value whichever point comes first.
                    self.fresh.push((y0 - yp) / (x0 - xp) + 0.0);
                }
                self.s += sign(x0 - xp) * sign(y0 - yp);
            }
            insert_sorted(&mut self.xs, x0);
            insert_sorted(&mut self.ys, y0);
        }
        self.points.push((x, y));
    }

    /// Merges the slopes of the points just taken into the sorted list
    /// (once for several points: the merge moves the whole list).
    fn settle(&mut self) {
        if self.not_finite {
            self.fresh.clear();
            return;
        }
        self.fresh.sort_unstable_by(f64::total_cmp);
        merge_into(&mut self.slopes, &self.fresh);
        self.fresh.clear();
    }

    /// Theil-Sen slope with Sen's interval at `level`, as
    /// [`super::robust::theil_sen`] gives it for the points taken.
    pub fn theil_sen(&self, level: f64) -> Result<TheilSen, FitError> {
        if self.not_finite || self.points.len() < 2 || self.extreme() {
            return self.recomputed(|x, y| super::robust::theil_sen(x, y, level));
        }
        check_level(level)?;
        let slopes = &self.slopes;
        theil_sen_from(
            slopes.len() as u64,
            &self.xs,
            &self.ys,
            level,
            |ranks| Ok(ranks.iter().map(|&k| slopes[k as usize]).collect()),
            || {
                let p = &self.points;
                (0..p.len()).fold(0, |w, i| if p[i].0.abs() > p[w].0.abs() { i } else { w })
            },
        )
    }

    /// Mann-Kendall, as [`super::robust::mann_kendall`] gives it for the
    /// points taken.
    pub fn mann_kendall(&self) -> Result<MannKendall, FitError> {
        if self.not_finite || self.points.len() < 3 {
            return self.recomputed(super::robust::mann_kendall);
        }
        let ties = |v: &[f64]| -> Vec<u128> {
            v.chunk_by(|a, b| a == b)
                .map(|c| c.len() as u128)
                .filter(|&len| len > 1)
                .collect()
        };
        Ok(mann_kendall_from(
            self.points.len(),
            self.s,
            &ties(&self.xs),
            &ties(&self.ys),
        ))
    }

    fn recomputed<T>(&self, f: impl FnOnce(&[f64], &[f64]) -> T) -> T {
        let (x, y): (Vec<f64>, Vec<f64>) = self.points.iter().copied().unzip();
        f(&x, &y)
    }

    /// Whether the selector would refuse these points as too extreme (a
    /// slope or `y - slope * x` that could overflow near 1e300): the same
    /// bound, computed the same way, so that the error is its own.
    fn extreme(&self) -> bool {
        let (xs, ys) = (&self.xs, &self.ys);
        let n = xs.len();
        if self.slopes.is_empty() {
            return false;
        }
        let centre = xs[n / 2];
        let min_gap = xs
            .windows(2)
            .filter(|w| w[1] != w[0])
            .map(|w| w[1] - w[0])
            .fold(f64::INFINITY, f64::min);
        let y_abs_max = ys.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        let xs_abs_max = xs.iter().fold(0.0f64, |m, v| m.max((v - centre).abs()));
        let slope_bound = (ys[n - 1] - ys[0]) / min_gap;
        let u_bound = y_abs_max + slope_bound * xs_abs_max;
        u_bound.is_nan() || u_bound > 1e300
    }
}

/// Bitwise equality of two runs of points (a stored point read back is the
/// same bits).
fn same_points(a: &[(f64, f64)], b: &[(f64, f64)]) -> bool {
    a.iter()
        .zip(b)
        .all(|(p, q)| p.0.to_bits() == q.0.to_bits() && p.1.to_bits() == q.1.to_bits())
}

fn sign(d: f64) -> i128 {
    if d > 0.0 {
        1
    } else if d < 0.0 {
        -1
    } else {
        0
    }
}

/// Inserts `v` into the ascending `sorted`.
fn insert_sorted(sorted: &mut Vec<f64>, v: f64) {
    let at = sorted.partition_point(|&e| e.total_cmp(&v).is_le());
    sorted.insert(at, v);
}

/// Merges the ascending `new` into the ascending `sorted`, from the back,
/// in place.
fn merge_into(sorted: &mut Vec<f64>, new: &[f64]) {
    let old = sorted.len();
    let needed = old + new.len();
    if needed > sorted.capacity() {
        // A quarter to spare, not the doubling `resize` would allow: the
        // caller bounds the slopes held, and this keeps the memory within
        // 1.25 times that.
        sorted.reserve_exact(needed + needed / 4 - old);
    }
    sorted.resize(needed, 0.0);
    let (mut i, mut j, mut k) = (old, new.len(), old + new.len());
    while j > 0 {
        if i > 0 && sorted[i - 1].total_cmp(&new[j - 1]).is_gt() {
            sorted[k - 1] = sorted[i - 1];
            i -= 1;
        } else {
            sorted[k - 1] = new[j - 1];
            j -= 1;
        }
        k -= 1;
    }
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    //! The running statistics against the from-scratch functions (which are
    //! themselves checked against scipy, R and worked examples in
    //! `robust.rs`) and against the definition by brute force.
    use super::*;
    use crate::stats::robust::{mann_kendall, theil_sen};
    use proptest::prelude::*;

    fn scratch(points: &[(f64, f64)]) -> (Vec<f64>, Vec<f64>) {
        points.iter().copied().unzip()
    }

    /// Every prefix of `points`: the running statistics equal the
    /// from-scratch ones, errors included.
    fn agrees_at_every_prefix(points: &[(f64, f64)]) -> Result<(), TestCaseError> {
        let mut run = PairwiseTrend::new();
        for (i, &(x, y)) in points.iter().enumerate() {
            run.push(x, y);
            let (xs, ys) = scratch(&points[..=i]);
            prop_assert_eq!(
                run.theil_sen(0.95),
                theil_sen(&xs, &ys, 0.95),
                "n = {}",
                i + 1
            );
            prop_assert_eq!(run.mann_kendall(), mann_kendall(&xs, &ys), "n = {}", i + 1);
        }
        Ok(())
    }

    fn points() -> impl Strategy<Value = Vec<(f64, f64)>> {
        // Rounded values, so that ties in x, in y and in slopes are common.
        prop::collection::vec((0i32..40, -50i32..50), 0..70).prop_map(|v| {
            v.into_iter()
                .map(|(x, y)| (2000.0 + f64::from(x) * 0.25, f64::from(y) / 10.0))
                .collect()
        })
    }

    proptest! {
        #[test]
        fn running_equals_from_scratch(p in points()) {
            agrees_at_every_prefix(&p)?;
        }
    }

    /// Decimal data without ties (a quarterly well, noisy), 120 points: past
    /// the size where the selector stops listing every slope (4,096 pairs),
    /// so the two ways of reaching the order statistics meet.
    #[test]
    fn decimal_series_past_the_listing_size() {
        let mut s = 7u64;
        let mut r = || {
            s = s
                .wrapping_mul(6_364_136_223_846_793_005)
                .wrapping_add(1_442_695_040_888_963_407);
            (s >> 11) as f64 / (1u64 << 53) as f64
        };
        let p: Vec<(f64, f64)> = (0..120)
            .map(|i| {
                let x = 2001.0 + f64::from(i) * 0.25 + 0.01 * r();
                (x, 4.0 + 0.3 * (x - 2001.0) + 2.0 * r())
            })
            .collect();
        agrees_at_every_prefix(&p).unwrap();
    }

    /// The median pairwise slope by the definition (every slope listed and
    /// sorted) for a small hand-checkable series.
    #[test]
    fn slope_by_definition() {
        // Points (1, 1), (2, 3), (4, 4), (2, 5): the pairs with distinct x
        // have slopes 2, 1, 4, 0.5 and -0.5 (x = 2 twice has none); sorted
        // -0.5, 0.5, 1, 2, 4, the median is 1.
        let mut run = PairwiseTrend::new();
        for (x, y) in [(1.0, 1.0), (2.0, 3.0), (4.0, 4.0), (2.0, 5.0)] {
            run.push(x, y);
        }
        let ts = run.theil_sen(0.95).unwrap();
        assert_eq!(ts.pairs, 5);
        assert_eq!(ts.slope, 1.0);
        // Pairs: (1,1)-(2,3) ++, (1,1)-(4,4) ++, (1,1)-(2,5) ++,
        // (2,3)-(4,4) ++, (2,3)-(2,5) tie in x: 0, (4,4)-(2,5) +- : -1.
        assert_eq!(run.mann_kendall().unwrap().s, 3);
    }

    #[test]
    fn following_a_list_takes_only_its_new_points_and_restarts_when_it_changed() {
        let first = [(1.0, 2.0), (2.0, 2.5), (3.0, 4.5)];
        let mut run = PairwiseTrend::new();
        run.follow(&first);
        assert_eq!(run.len(), 3);
        let longer = [(1.0, 2.0), (2.0, 2.5), (3.0, 4.5), (4.0, 4.0)];
        run.follow(&longer);
        let (x, y) = scratch(&longer);
        assert_eq!(run.theil_sen(0.9), theil_sen(&x, &y, 0.9));
        // A point left out in the middle: start again.
        let other = [(1.0, 2.0), (3.0, 4.5), (4.0, 4.0)];
        run.follow(&other);
        let (x, y) = scratch(&other);
        assert_eq!(run.len(), 3);
        assert_eq!(run.theil_sen(0.9), theil_sen(&x, &y, 0.9));
        assert_eq!(run.mann_kendall(), mann_kendall(&x, &y));
    }

    #[test]
    fn errors_are_the_from_scratch_ones() {
        let mut run = PairwiseTrend::new();
        run.push(3.0, 1.0);
        run.push(3.0, 2.0);
        assert_eq!(
            run.theil_sen(0.95),
            theil_sen(&[3.0, 3.0], &[1.0, 2.0], 0.95)
        );
        assert!(run.theil_sen(0.95).is_err());
        assert_eq!(run.theil_sen(1.5), theil_sen(&[3.0, 3.0], &[1.0, 2.0], 1.5));
        run.push(4.0, f64::NAN);
        assert!(matches!(
            run.mann_kendall(),
            Err(FitError::NonFinite { .. })
        ));
        let mut huge = PairwiseTrend::new();
        for (x, y) in [(0.0, -1e300), (1e-10, 1e300), (1.0, 0.0)] {
            huge.push(x, y);
        }
        let (x, y) = scratch(&huge.points);
        assert_eq!(huge.theil_sen(0.95), theil_sen(&x, &y, 0.95));
        assert!(huge.theil_sen(0.95).is_err());
    }
}
