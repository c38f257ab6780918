//! Robust trend statistics: the Mann-Kendall trend test and the Theil-Sen
//! slope with Sen's confidence interval.
//!
//! Both work on pairs of points, of which there are n(n-1)/2, but neither
//! visits every pair: Mann-Kendall's S comes from Knight's (1966) merge-sort
//! count of discordant pairs (O(n log n)), and the Theil-Sen order statistics
//! come from [`super::slope_select`] (randomized interval contraction, about
//! O(n log n) per round and a few rounds).
//!
//! Conventions follow `scipy.stats.theilslopes` (scipy 1.10) for Theil-Sen and
//! Kendall's tie-corrected variance for Mann-Kendall; see each function.

use super::dist::{normal_quantile, normal_two_sided_p};
use super::slope_select::{MERGE_BLOCK, SlopeSelector, merge_count};
use super::{FitError, check_finite_pairs, check_level};

/// Mann-Kendall trend test of y against x (x is time or distance).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct MannKendall {
    /// Number of points.
    pub n: usize,
    /// Kendall's S: concordant minus discordant pairs, `sum over i<j of
    /// sgn(x_j - x_i) sgn(y_j - y_i)`. Pairs tied in x or in y count 0.
    pub s: i64,
    /// Variance of S under "no trend", corrected for ties in x and in y
    /// (Kendall's full form). 0 when every x or every y is the same.
    pub var_s: f64,
    /// Normal score with continuity correction: `(S - 1)/sqrt(var_s)` if
    /// S > 0, 0 if S = 0, `(S + 1)/sqrt(var_s)` if S < 0 (0 when var_s = 0).
    pub z: f64,
    /// Two-sided p-value `P(|Z| >= |z|)` from the normal approximation
    /// (1 when var_s = 0). Halve it for a one-sided test in the direction of S.
    pub p: f64,
    /// Kendall's tau-a: `S / (n(n-1)/2)`, in [-1, 1].
    pub tau: f64,
}

/// Mann-Kendall trend test: S by Knight's O(n log n) algorithm, Var(S) with
/// Kendall's correction for ties in both x and y, the continuity-corrected
/// normal score and its two-sided p-value.
///
/// Var(S) = [n(n-1)(2n+5) - Σt(t-1)(2t+5) - Σu(u-1)(2u+5)]/18
///        + [Σt(t-1)(t-2)][Σu(u-1)(u-2)]/(9n(n-1)(n-2))
///        + [Σt(t-1)][Σu(u-1)]/(2n(n-1)),
/// with t the sizes of groups of equal y and u of equal x. S is exact
/// (integers). Var(S) is built from exact integer pieces (no overflow or
/// cancellation, n up to 10^7 and beyond) and is accurate to a few ulps.
///
/// Errors: [`FitError::LengthMismatch`], [`FitError::NonFinite`], and
/// [`FitError::TooFewPoints`] below 3 points. All x equal or all y equal is
/// not an error: S = 0, var_s = 0, z = 0, p = 1.
pub fn mann_kendall(x: &[f64], y: &[f64]) -> Result<MannKendall, FitError> {
    check_finite_pairs(x, y)?;
    let n = x.len();
    if n < 3 {
        return Err(FitError::TooFewPoints {
            n,
            needed: 3,
            what: "the Mann-Kendall test",
        });
    }
    // Sort by (x, y); -0.0 made +0.0 so that it ties with 0.0.
    let mut pts: Vec<(f64, f64)> = x.iter().zip(y).map(|(&a, &b)| (a + 0.0, b + 0.0)).collect();
    pts.sort_unstable_by(|a, b| a.0.total_cmp(&b.0).then(a.1.total_cmp(&b.1)));
    let x_ties = run_lengths(&pts, |a, b| a.0 == b.0);
    let joint_ties = run_lengths(&pts, |a, b| a == b);
    let mut ys: Vec<f64> = pts.iter().map(|p| p.1).collect();
    let mut ys_sorted = ys.clone();
    ys_sorted.sort_unstable_by(f64::total_cmp);
    let y_ties = run_lengths(&ys_sorted, |a, b| a == b);

    // Discordant pairs: strict inversions of y in (x, y) order. Pairs tied in
    // x are in ascending y, so they never count.
    let discordant = merge_count(
        &mut ys,
        &mut Vec::new(),
        MERGE_BLOCK,
        u64::MAX,
        |_, _, _| u64::MAX,
    );

    let nn = n as u128;
    let all_pairs = nn * (nn - 1) / 2;
    let pairs_of = |g: &[u128]| g.iter().map(|&t| t * (t - 1) / 2).sum::<u128>();
    let tied_x = pairs_of(&x_ties);
    let tied_y = pairs_of(&y_ties);
    let tied_both = pairs_of(&joint_ties);
    let discordant = discordant as u128;
    // Knight (1966): concordant = all - tied in x - tied in y + tied in both - discordant.
    let concordant = all_pairs + tied_both - tied_x - tied_y - discordant;
    let s_wide = concordant as i128 - discordant as i128;
    Ok(mann_kendall_from(n, s_wide, &x_ties, &y_ties))
}

/// Mann-Kendall from S (`s_wide`, exact) and the sizes (> 1) of the groups
/// of equal x and of equal y: what [`mann_kendall`] and
/// [`super::pairwise::PairwiseTrend`] share, so both give the same result
/// for the same points. `n >= 3`.
pub(crate) fn mann_kendall_from(
    n: usize,
    s_wide: i128,
    x_ties: &[u128],
    y_ties: &[u128],
) -> MannKendall {
    let nn = n as u128;
    let all_pairs = nn * (nn - 1) / 2;
    // |S| <= n(n-1)/2, which fits i64 for any slice length in practice.
    let s = i64::try_from(s_wide).unwrap_or(if s_wide > 0 { i64::MAX } else { i64::MIN });

    let degenerate = x_ties.first() == Some(&nn) || y_ties.first() == Some(&nn);
    let var_s = if degenerate {
        0.0
    } else {
        kendall_var_s(nn, y_ties, x_ties)
    };
    let z = if var_s > 0.0 {
        match s.signum() {
            1 => (s - 1) as f64 / var_s.sqrt(),
            -1 => (s + 1) as f64 / var_s.sqrt(),
            _ => 0.0,
        }
    } else {
        0.0
    };
    let p = if z == 0.0 { 1.0 } else { normal_two_sided_p(z) };
    MannKendall {
        n,
        s,
        var_s,
        z,
        p,
        tau: s as f64 / all_pairs as f64,
    }
}

/// Kendall's Var(S) with ties in y (`t`) and x (`u`), n >= 3, as exact
/// rational pieces turned into f64 at the end (no overflow, no cancellation,
/// for any n whose pair counts fit u128).
fn kendall_var_s(n: u128, t: &[u128], u: &[u128]) -> f64 {
    let cube = |g: u128| g * (g - 1) * (2 * g + 5);
    let t1 = cube(n) as i128
        - t.iter().map(|&g| cube(g)).sum::<u128>() as i128
        - u.iter().map(|&g| cube(g)).sum::<u128>() as i128;
    let triple = |g: &[u128]| g.iter().map(|&g| g * (g - 1) * (g - 2)).sum::<u128>();
    let double = |g: &[u128]| g.iter().map(|&g| g * (g - 1)).sum::<u128>();
    let d2 = 9 * n * (n - 1) * (n - 2);
    let d3 = 2 * n * (n - 1);
    let (q2, r2) = mul_div_rem(triple(t), triple(u), d2);
    let (q3, r3) = mul_div_rem(double(t), double(u), d3);
    // Var = (t1 + 18 (q2 + q3)) / 18 + r2 / d2 + r3 / d3, the integer part exact.
    let whole = t1 + 18 * (q2 + q3) as i128;
    (whole as f64 / 18.0 + r2 as f64 / d2 as f64 + r3 as f64 / d3 as f64).max(0.0)
}

/// `(a*b) / d` and `(a*b) % d` through a 256-bit product, for d > 0 and a
/// quotient that fits u128 (here a, b <= d).
fn mul_div_rem(a: u128, b: u128, d: u128) -> (u128, u128) {
    const LOW: u128 = u64::MAX as u128;
    let (a1, a0) = (a >> 64, a & LOW);
    let (b1, b0) = (b >> 64, b & LOW);
    let (p00, p01, p10, p11) = (a0 * b0, a0 * b1, a1 * b0, a1 * b1);
    let mid = (p00 >> 64) + (p01 & LOW) + (p10 & LOW);
    let lo = (p00 & LOW) | (mid << 64);
    let hi = p11 + (p01 >> 64) + (p10 >> 64) + (mid >> 64);
    let (mut q, mut rem) = (0u128, 0u128);
    for i in (0..256u32).rev() {
        let bit = if i >= 128 {
            (hi >> (i - 128)) & 1
        } else {
            (lo >> i) & 1
        };
        let carry = rem >> 127;
        rem = (rem << 1) | bit;
        q <<= 1;
        if carry == 1 || rem >= d {
            rem = rem.wrapping_sub(d);
            q |= 1;
        }
    }
    (q, rem)
}

/// Sizes (> 1) of runs of neighbours that `same` joins, in a sorted slice.
fn run_lengths<T>(sorted: &[T], same: impl Fn(&T, &T) -> bool) -> Vec<u128> {
    sorted
        .chunk_by(|a, b| same(a, b))
        .map(|c| c.len() as u128)
        .filter(|&len| len > 1)
        .collect()
}

/// Theil-Sen slope with its confidence interval.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TheilSen {
    /// Median of the pairwise slopes `(y_j - y_i)/(x_j - x_i)` over pairs with
    /// distinct x (the mean of the two middle ones when there is an even
    /// number of them).
    pub slope: f64,
    /// `median(y) - slope * median(x)`.
    pub intercept: f64,
    /// Lower confidence limit for the slope: an order statistic of the
    /// pairwise slopes (Sen 1968).
    pub ci_low: f64,
    /// Upper confidence limit for the slope: an order statistic of the
    /// pairwise slopes (Sen 1968).
    pub ci_high: f64,
    /// Confidence level of [ci_low, ci_high], as given (e.g. 0.95).
    pub level: f64,
    /// Number of pairwise slopes N' (pairs with distinct x).
    pub pairs: u64,
}

/// Theil-Sen slope, intercept and Sen's confidence interval, as
/// `scipy.stats.theilslopes(y, x, alpha=level, method='separate')`
/// (scipy 1.10) computes them.
///
/// - slope: median of the N' pairwise slopes over pairs with distinct x;
/// - intercept: `median(y) - slope * median(x)`;
/// - CI (Sen 1968, eq. 2.6): `sigsq = [n(n-1)(2n+5) - Σ_x k(k-1)(2k+5) -
///   Σ_y k(k-1)(2k+5)]/18` over groups of equal x and of equal y,
///   `z = |Φ⁻¹((1 - level)/2)|`, `Ru = min(round((N' + z√sigsq)/2), N'-1)`,
///   `Rl = max(round((N' - z√sigsq)/2) - 1, 0)` with round half to even;
///   the limits are the slopes of 0-based rank Rl and Ru.
///
/// Two deliberate differences from scipy: `level` is the confidence level
/// itself (scipy reads 0.1 as "90%"; here it means a 10% interval), and when
/// heavy ties make sigsq negative (scipy then returns NaN limits) it is
/// taken as 0, giving the middle slopes as limits.
///
/// Cost: a few rounds of O(n log n) work. On one core of the development
/// machine n = 10,000 took about 20 ms and n = 1,000,000 about 3.5 s.
///
/// Errors: [`FitError::LengthMismatch`], [`FitError::NonFinite`],
/// [`FitError::BadLevel`], [`FitError::TooFewPoints`] below 2 points,
/// [`FitError::ConstantX`] when every x is the same, and
/// [`FitError::NonFinite`] with axis `"pairwise slope"` or `"intercept"` if
/// values near 1e300 would overflow (for the intercept, `index` is the point
/// with the largest |x|).
pub fn theil_sen(x: &[f64], y: &[f64], level: f64) -> Result<TheilSen, FitError> {
    check_finite_pairs(x, y)?;
    check_level(level)?;
    let n = x.len();
    if n < 2 {
        return Err(FitError::TooFewPoints {
            n,
            needed: 2,
            what: "a Theil-Sen slope",
        });
    }
    let selector = SlopeSelector::new(x, y)?;
    let mut xs: Vec<f64> = x.iter().map(|&v| v + 0.0).collect();
    let mut ys: Vec<f64> = y.iter().map(|&v| v + 0.0).collect();
    xs.sort_unstable_by(f64::total_cmp);
    ys.sort_unstable_by(f64::total_cmp);
    theil_sen_from(
        selector.pairs(),
        &xs,
        &ys,
        level,
        |ranks| selector.select(ranks),
        || (0..n).fold(0, |w, i| if x[i].abs() > x[w].abs() { i } else { w }),
    )
}

/// Theil-Sen from the number of pairwise slopes, x and y each sorted (-0.0
/// made +0.0), and a way to select pairwise slopes by 0-based rank: what
/// [`theil_sen`] and [`super::pairwise::PairwiseTrend`] share, so both give
/// the same result for the same slopes. `widest` names the point with the
/// largest |x| for the error an overflowing intercept raises. `n >= 2`.
pub(crate) fn theil_sen_from(
    pairs: u64,
    xs: &[f64],
    ys: &[f64],
    level: f64,
    select: impl FnOnce(&[u64]) -> Result<Vec<f64>, FitError>,
    widest: impl FnOnce() -> usize,
) -> Result<TheilSen, FitError> {
    let n = xs.len();
    if pairs == 0 {
        return Err(FitError::ConstantX { n, x: xs[0] + 0.0 });
    }
    let (mid_lo, mid_hi) = if pairs % 2 == 1 {
        (pairs / 2, pairs / 2)
    } else {
        (pairs / 2 - 1, pairs / 2)
    };

    let nn = n as u128;
    let cube = |g: u128| (g * (g - 1) * (2 * g + 5)) as i128;
    let tie_sum = |v: &[f64]| {
        run_lengths(v, |a, b| a == b)
            .into_iter()
            .map(cube)
            .sum::<i128>()
    };
    let sigsq = ((cube(nn) - tie_sum(xs) - tie_sum(ys)) as f64 / 18.0).max(0.0);
    let z = normal_quantile((1.0 - level) / 2.0).abs();
    let spread = z * sigsq.sqrt();
    let nt = pairs as f64;
    let upper = ((nt + spread) / 2.0).round_ties_even().min(nt - 1.0);
    let lower = (((nt - spread) / 2.0).round_ties_even() - 1.0).max(0.0);
    // Both are whole numbers in [0, N' - 1] (N' < 2^53 for any real input).
    let (rl, ru) = (lower as u64, upper as u64);

    let found = select(&[mid_lo, mid_hi, rl, ru])?;
    let slope = if mid_lo == mid_hi {
        found[0]
    } else {
        mean_of_two(found[0], found[1])
    };
    let intercept = sorted_median(ys) - slope * sorted_median(xs);
    if !intercept.is_finite() {
        return Err(FitError::NonFinite {
            index: widest(),
            axis: "intercept",
            value: intercept,
        });
    }
    Ok(TheilSen {
        slope,
        intercept,
        ci_low: found[2],
        ci_high: found[3],
        level,
        pairs,
    })
}

/// `(a + b) / 2` as numpy's median computes it, without overflowing.
fn mean_of_two(a: f64, b: f64) -> f64 {
    let m = (a + b) / 2.0;
    if m.is_finite() { m } else { a / 2.0 + b / 2.0 }
}

/// Median of a sorted, non-empty slice (numpy's convention for even length).
fn sorted_median(v: &[f64]) -> f64 {
    let n = v.len();
    if n % 2 == 1 {
        v[n / 2]
    } else {
        mean_of_two(v[n / 2 - 1], v[n / 2])
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    fn close(got: f64, want: f64, tol: f64) -> bool {
        (got - want).abs() <= tol
    }

    fn time_axis(n: usize) -> Vec<f64> {
        (1..=n).map(|i| i as f64).collect()
    }

    // Source: METHODS.md §10 item 3, a Mann-Kendall example worked by hand
    // (Holy Cross note): S = 54, Var(S) = 332.67, Z = 2.9058, p ≈ 0.0018.
    // The source's p is ONE-sided; ours is two-sided, so we compare p / 2.
    #[test]
    fn mann_kendall_worked_example_by_hand() {
        let y = [
            12.9, 14.8, 13.2, 15.7, 13.8, 15.6, 12.9, 11.0, 17.3, 15.9, 19.0, 18.3, 20.1, 21.7,
        ];
        let mk = mann_kendall(&time_axis(y.len()), &y).unwrap();
        assert_eq!(mk.n, 14);
        assert_eq!(mk.s, 54);
        assert!(close(mk.var_s, 332.67, 0.005), "{}", mk.var_s);
        assert!(close(mk.z, 2.9058, 5e-5), "{}", mk.z);
        assert!(close(mk.p / 2.0, 0.0018, 5e-5), "{}", mk.p);
        assert!(close(mk.tau, 54.0 / 91.0, 1e-15));
    }

    // Source: US EPA QA/G-9S (2006) p. 109 example as quoted in a secondary
    // source (METHODS.md §10 item 4): S = 22, Var(S) = 155.33 (tie groups of
    // 4 and 2), Z = 1.685, ONE-sided p = 0.046.
    #[test]
    fn mann_kendall_epa_g9s_example() {
        let y = [
            10.0, 10.0, 10.0, 5.0, 10.0, 20.0, 18.0, 17.0, 15.0, 24.0, 15.0,
        ];
        let mk = mann_kendall(&time_axis(y.len()), &y).unwrap();
        assert_eq!(mk.s, 22);
        assert!(close(mk.var_s, 155.33, 0.005), "{}", mk.var_s);
        assert!(close(mk.z, 1.685, 5e-4), "{}", mk.z);
        assert!(close(mk.p / 2.0, 0.046, 5e-4), "{}", mk.p);
    }

    // Source: Kendall, Rank Correlation Methods, Ex. 4.3, as quoted in public
    // R documentation (METHODS.md §10 item 5): S = 34, Var(S) = 203.30 with
    // ties in both variables. Also scipy 1.10.1 (Debian bookworm
    // python3-scipy): kendalltau(x, y).pvalue = 0.01709988176895423, which is
    // the normal tail of S / sqrt(Var(S)) without continuity correction.
    #[test]
    fn mann_kendall_two_way_ties_kendall_example() {
        let x = [1.5, 1.5, 3.0, 4.0, 6.0, 6.0, 6.0, 8.0, 9.5, 9.5, 11.0, 12.0];
        let y = [
            2.5, 2.5, 7.0, 4.5, 1.0, 4.5, 6.0, 11.5, 11.5, 8.5, 8.5, 10.0,
        ];
        let mk = mann_kendall(&x, &y).unwrap();
        assert_eq!(mk.s, 34);
        assert!(close(mk.var_s, 203.30, 0.005), "{}", mk.var_s);
        let p_plain = normal_two_sided_p(mk.s as f64 / mk.var_s.sqrt());
        assert!(
            close(p_plain / 0.01709988176895423, 1.0, 1e-12),
            "{p_plain}"
        );
    }

    // Source: scipy 1.10.1 (Debian bookworm python3-scipy):
    // kendalltau(x, y).pvalue = 3.415537520793748e-11 for this tie-heavy data
    // (x = i // 3, y = (7i mod 5) + i // 10, i = 0..59).
    #[test]
    fn mann_kendall_variance_matches_scipy_kendalltau() {
        let x: Vec<f64> = (0..60).map(|i| (i / 3) as f64).collect();
        let y: Vec<f64> = (0..60).map(|i| ((i * 7) % 5 + i / 10) as f64).collect();
        let mk = mann_kendall(&x, &y).unwrap();
        let p_plain = normal_two_sided_p(mk.s as f64 / mk.var_s.sqrt());
        assert!(
            close(p_plain / 3.415537520793748e-11, 1.0, 1e-9),
            "{p_plain}"
        );
    }

    // Source: Wisconsin Administrative Code, Mann-Kendall Table A, as
    // reproduced in a site report (METHODS.md §10 item 7): S = -5.
    #[test]
    fn mann_kendall_wisconsin_table_a() {
        let y = [100.0, 50.0, 85.0, 75.0, 50.0];
        let mk = mann_kendall(&time_axis(5), &y).unwrap();
        assert_eq!(mk.s, -5);
        assert!(mk.z < 0.0);
    }

    #[test]
    fn mann_kendall_degenerate_and_errors() {
        let flat = mann_kendall(&[1.0, 2.0, 3.0, 4.0], &[5.0; 4]).unwrap();
        assert_eq!((flat.s, flat.var_s, flat.z, flat.p), (0, 0.0, 0.0, 1.0));
        let same_x = mann_kendall(&[2.0; 4], &[1.0, 2.0, 3.0, 4.0]).unwrap();
        assert_eq!((same_x.s, same_x.var_s, same_x.p), (0, 0.0, 1.0));
        assert!(matches!(
            mann_kendall(&[1.0, 2.0], &[1.0, 2.0]),
            Err(FitError::TooFewPoints {
                n: 2,
                needed: 3,
                ..
            })
        ));
        assert!(matches!(
            mann_kendall(&[1.0, 2.0, 3.0], &[1.0, f64::NAN, 3.0]),
            Err(FitError::NonFinite {
                index: 1,
                axis: "y",
                ..
            })
        ));
        assert!(matches!(
            mann_kendall(&[1.0, 2.0, 3.0], &[1.0, 2.0]),
            Err(FitError::LengthMismatch { x_len: 3, y_len: 2 })
        ));
        // -0.0 ties with 0.0.
        let mk = mann_kendall(&[0.0, -0.0, 1.0], &[1.0, 2.0, 3.0]).unwrap();
        assert_eq!(mk.s, 2);
    }

    // Source: direct calculation. With one point apart in x and one apart
    // in y (n = 10^7), S = n - 1 with probability 1/n and -1 otherwise under
    // "no trend", so Var(S) = n - 1 exactly; the formula's terms are ~1e21,
    // so this checks that the exact evaluation avoids cancellation.
    #[test]
    fn kendall_variance_exact_for_huge_n() {
        let n: u128 = 10_000_000;
        let v = kendall_var_s(n, &[n - 1], &[n - 1]);
        assert_eq!(v, 9_999_999.0);
        // No ties: n(n-1)(2n+5)/18 (Mann 1945), computed in integers here.
        let want = (n * (n - 1) * (2 * n + 5)) as f64 / 18.0;
        assert_eq!(kendall_var_s(n, &[], &[]), want);
    }

    #[test]
    fn mul_div_rem_matches_u128_when_it_fits() {
        for &(a, b, d) in &[
            (7u128, 9u128, 4u128),
            (u64::MAX as u128, u64::MAX as u128, 12345),
            (1 << 100, 1 << 27, (1 << 120) + 3),
        ] {
            assert_eq!(mul_div_rem(a, b, d), ((a * b) / d, (a * b) % d));
        }
        // 2^200 / 2^90 = 2^110.
        assert_eq!(mul_div_rem(1 << 100, 1 << 100, 1 << 90), (1 << 110, 0));
    }

    // Source: public R documentation example citing Hollander & Wolfe (1999)
    // (METHODS.md §10 item 6): slope 0.5, 95% CI [0.3243, 0.75] from 101
    // slopes. Also scipy 1.10.1 (Debian bookworm python3-scipy):
    // theilslopes(y, x, 0.95) = (0.5, -2.0, 0.32432432432432434, 0.75).
    #[test]
    fn theil_sen_hollander_wolfe_example() {
        let y = [
            21.0, 4.0, 9.0, 12.0, 35.0, 18.0, 10.0, 22.0, 24.0, 1.0, 6.0, 8.0, 13.0, 16.0, 19.0,
        ];
        let x = [
            67.0, 28.0, 30.0, 28.0, 52.0, 40.0, 25.0, 37.0, 44.0, 10.0, 14.0, 20.0, 28.0, 40.0,
            51.0,
        ];
        let ts = theil_sen(&x, &y, 0.95).unwrap();
        assert_eq!(ts.pairs, 101);
        assert_eq!(ts.slope, 0.5);
        assert!(close(ts.ci_low, 0.3243, 5e-5));
        assert!(close(ts.ci_high, 0.75, 5e-5));
        assert_eq!(ts.ci_low, 0.32432432432432434);
        assert_eq!(ts.intercept, -2.0);
        assert_eq!(ts.level, 0.95);
    }

    // Source: scipy 1.10.1 (Debian bookworm python3-scipy), theilslopes(y, x,
    // level) with x = 2020 + i/12, y = ((37 i) mod 23 - 11)/4 + 0.125 i,
    // i = 0..199: at 0.95 (1.5, -3030.0, 1.4531250000000207,
    // 1.5588235294117647); at 0.80 (1.5, -3030.0, 1.472727272727297,
    // 1.5350877192982457).
    #[test]
    fn theil_sen_matches_scipy_monthly_series() {
        let x: Vec<f64> = (0..200).map(|i| 2020.0 + i as f64 / 12.0).collect();
        let y: Vec<f64> = (0..200)
            .map(|i| ((i * 37) % 23 - 11) as f64 / 4.0 + i as f64 * 0.125)
            .collect();
        let ts = theil_sen(&x, &y, 0.95).unwrap();
        assert_eq!(
            (ts.slope, ts.intercept, ts.ci_low, ts.ci_high),
            (1.5, -3030.0, 1.4531250000000207, 1.5588235294117647)
        );
        let ts = theil_sen(&x, &y, 0.80).unwrap();
        assert_eq!(
            (ts.slope, ts.intercept, ts.ci_low, ts.ci_high),
            (1.5, -3030.0, 1.472727272727297, 1.5350877192982457)
        );
    }

    // Source: scipy 1.10.1 (Debian bookworm python3-scipy), theilslopes(y, x,
    // 0.9) with x = i // 3, y = (7i mod 5) + i // 10, i = 0..59 (ties in both):
    // (0.3038461538461539, 1.613461538461538, 0.25, 0.35714285714285715).
    #[test]
    fn theil_sen_matches_scipy_with_ties() {
        let x: Vec<f64> = (0..60).map(|i| (i / 3) as f64).collect();
        let y: Vec<f64> = (0..60).map(|i| ((i * 7) % 5 + i / 10) as f64).collect();
        let ts = theil_sen(&x, &y, 0.9).unwrap();
        assert_eq!(
            (ts.slope, ts.intercept, ts.ci_low, ts.ci_high),
            (
                0.3038461538461539,
                1.613461538461538,
                0.25,
                0.35714285714285715
            )
        );
    }

    #[test]
    fn theil_sen_errors_and_edge_cases() {
        assert!(matches!(
            theil_sen(&[1.0], &[2.0], 0.95),
            Err(FitError::TooFewPoints {
                n: 1,
                needed: 2,
                ..
            })
        ));
        assert!(matches!(
            theil_sen(&[3.0, 3.0, 3.0], &[1.0, 2.0, 3.0], 0.95),
            Err(FitError::ConstantX { n: 3, .. })
        ));
        assert!(matches!(
            theil_sen(&[1.0, 2.0], &[1.0, 2.0], 1.0),
            Err(FitError::BadLevel(_))
        ));
        assert!(matches!(
            theil_sen(&[1.0, f64::INFINITY], &[1.0, 2.0], 0.95),
            Err(FitError::NonFinite {
                index: 1,
                axis: "x",
                ..
            })
        ));
        assert!(matches!(
            theil_sen(&[0.0, 1e-300], &[-1e300, 1e300], 0.95),
            Err(FitError::NonFinite {
                axis: "pairwise slope",
                ..
            })
        ));
        // Slopes of 1e9 are fine, but 1e9 times median x ~1e300 overflows
        // the intercept.
        let x = [1e300, 1e300 + 1e290, 1e300 + 2e290];
        assert!(matches!(
            theil_sen(&x, &[0.0, 1e299, 2e299], 0.95),
            Err(FitError::NonFinite {
                index: 2,
                axis: "intercept",
                ..
            })
        ));
        // Two points: one slope, which is also both limits.
        let ts = theil_sen(&[1.0, 3.0], &[1.0, 2.0], 0.95).unwrap();
        assert_eq!(
            (ts.slope, ts.ci_low, ts.ci_high, ts.pairs),
            (0.5, 0.5, 0.5, 1)
        );
        // All y equal with x ties: scipy gives NaN limits (negative sigsq); we give 0.
        let ts = theil_sen(&[1.0, 1.0, 2.0, 3.0], &[4.0; 4], 0.95).unwrap();
        assert_eq!(
            (ts.slope, ts.ci_low, ts.ci_high, ts.intercept),
            (0.0, 0.0, 0.0, 4.0)
        );
    }

    /// Kendall's S by its O(n^2) definition.
    fn s_by_definition(x: &[f64], y: &[f64]) -> i64 {
        let sgn = |d: f64| (d > 0.0) as i64 - (d < 0.0) as i64;
        let mut s = 0;
        for i in 0..x.len() {
            for j in i + 1..x.len() {
                s += sgn(x[j] - x[i]) * sgn(y[j] - y[i]);
            }
        }
        s
    }

    /// Var(S) from the tie-group sizes, evaluated plainly in f64.
    fn var_by_formula(x: &[f64], y: &[f64]) -> f64 {
        let groups = |v: &[f64]| {
            let mut seen: Vec<(f64, f64)> = Vec::new();
            for &a in v {
                match seen.iter_mut().find(|(b, _)| *b == a) {
                    Some((_, c)) => *c += 1.0,
                    None => seen.push((a, 1.0)),
                }
            }
            seen.into_iter().map(|(_, c)| c).collect::<Vec<f64>>()
        };
        let (t, u) = (groups(y), groups(x));
        let n = x.len() as f64;
        let sum = |g: &[f64], f: &dyn Fn(f64) -> f64| g.iter().map(|&k| f(k)).sum::<f64>();
        let a = |k: f64| k * (k - 1.0) * (2.0 * k + 5.0);
        let b = |k: f64| k * (k - 1.0) * (k - 2.0);
        let c = |k: f64| k * (k - 1.0);
        (a(n) - sum(&t, &a) - sum(&u, &a)) / 18.0
            + sum(&t, &b) * sum(&u, &b) / (9.0 * n * (n - 1.0) * (n - 2.0))
            + sum(&t, &c) * sum(&u, &c) / (2.0 * n * (n - 1.0))
    }

    /// Sorted pairwise slopes by brute force, as scipy forms them.
    fn all_slopes(x: &[f64], y: &[f64]) -> Vec<f64> {
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

    fn tied_data() -> impl Strategy<Value = (Vec<f64>, Vec<f64>)> {
        (3usize..60).prop_flat_map(|n| {
            (
                prop::collection::vec(0i32..8, n),
                prop::collection::vec(-4i32..4, n),
                prop::bool::ANY,
            )
                .prop_map(|(x, y, real)| {
                    let x: Vec<f64> = x.into_iter().map(f64::from).collect();
                    let y: Vec<f64> = if real {
                        y.iter()
                            .zip(&x)
                            .map(|(&v, &a)| f64::from(v) * 0.37 + a * 1.1)
                            .collect()
                    } else {
                        y.into_iter().map(f64::from).collect()
                    };
                    (x, y)
                })
        })
    }

    proptest! {
        // Oracle: the definition of S (all pairs) and Kendall's tie formula.
        #[test]
        fn mann_kendall_matches_definition((x, y) in tied_data()) {
            let mk = mann_kendall(&x, &y).unwrap();
            prop_assert_eq!(mk.s, s_by_definition(&x, &y));
            let want = var_by_formula(&x, &y).max(0.0);
            prop_assert!((mk.var_s - want).abs() <= 1e-9 * want.max(1.0), "{} vs {}", mk.var_s, want);
            prop_assert!(mk.p.is_finite() && (0.0..=1.0).contains(&mk.p));
            prop_assert!(mk.z.is_finite() && mk.tau.abs() <= 1.0);
        }

        // Oracle: brute-force sorted slopes and the scipy 1.10 rank rule
        // (restated independently here).
        #[test]
        fn theil_sen_matches_brute_force((x, y) in tied_data(), level in 0.5f64..0.99) {
            let slopes = all_slopes(&x, &y);
            prop_assume!(!slopes.is_empty());
            let ts = theil_sen(&x, &y, level).unwrap();
            let m = slopes.len();
            let median = if m % 2 == 1 { slopes[m / 2] } else { (slopes[m / 2 - 1] + slopes[m / 2]) / 2.0 };
            prop_assert_eq!(ts.slope, median);
            prop_assert_eq!(ts.pairs, m as u64);
            let n = x.len() as f64;
            let ties = |v: &[f64]| {
                let mut s = v.to_vec();
                s.sort_by(f64::total_cmp);
                s.chunk_by(|a, b| a == b).map(|c| c.len() as f64).map(|k| k * (k - 1.0) * (2.0 * k + 5.0)).sum::<f64>()
            };
            let sigsq = ((n * (n - 1.0) * (2.0 * n + 5.0) - ties(&x) - ties(&y)) / 18.0).max(0.0);
            let z = -normal_quantile((1.0 - level) / 2.0);
            let ru = (((m as f64 + z * sigsq.sqrt()) / 2.0).round_ties_even() as usize).min(m - 1);
            let rl = ((((m as f64 - z * sigsq.sqrt()) / 2.0).round_ties_even()) - 1.0).max(0.0) as usize;
            prop_assert_eq!((ts.ci_low, ts.ci_high), (slopes[rl], slopes[ru]));
        }
    }
}
