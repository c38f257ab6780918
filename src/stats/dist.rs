//! Tail probabilities and quantiles, computed the accurate way round.
//!
//! Two-sided p-values come straight from the lower tail (the regularized
//! incomplete beta function for Student t, `erfc` for the normal), never as
//! `1 - cdf`, which throws away the digits of small p-values.

use statrs::distribution::{ContinuousCDF, Normal, StudentsT};
use statrs::function::beta::beta_reg;
use statrs::function::gamma::ln_gamma;

/// Two-sided p-value of a Student t statistic with `df` degrees of freedom:
/// `P(|T| >= |t|) = I_{df/(df+t^2)}(df/2, 1/2)`.
///
/// `df` must be positive and `t` finite; callers guarantee both.
pub fn t_two_sided_p(t: f64, df: f64) -> f64 {
    let x = df / (df + t * t);
    // x is in (0, 1]; at t = 0 it is exactly 1 and the p-value is 1.
    beta_reg(df / 2.0, 0.5, x).clamp(0.0, 1.0)
}

/// An upper bound on [`t_two_sided_p`] for every `df >= 1`, at the cost of
/// one arctangent: the two-sided tail of Student t with one degree of
/// freedom (the Cauchy distribution), `1 - (2/pi) atan(|t|)`, which is the
/// heaviest of the family (Student t grows more peaked as df grows; the
/// tests check the bound against the incomplete-beta tail over a grid).
/// A caller that needs only `p >= threshold` can skip the exact tail when
/// this bound is already well below the threshold.
pub fn t_two_sided_p_bound(t: f64) -> f64 {
    // 2/pi * atan(1/|t|) = 1 - 2/pi * atan(|t|), without the cancellation.
    std::f64::consts::FRAC_2_PI * (1.0 / t.abs()).atan()
}

/// The |t| beyond which [`t_two_sided_p_bound`] is below `p`, so every t
/// tail is: `1 / tan(p pi/2)`, its inverse, for a caller that screens many
/// t against one threshold (one tangent instead of an arctangent each).
/// Negative (every t is beyond) when `p > 1`, which no tail reaches.
pub fn t_beyond_p_bound(p: f64) -> f64 {
    if p > 1.0 {
        return -1.0;
    }
    1.0 / (p * std::f64::consts::FRAC_PI_2).tan()
}

/// Upper quantile of Student t: the `t` with `P(T <= t) = prob`.
///
/// `prob` must lie in (0, 1) and `df` be positive; callers guarantee both.
///
/// From df = 3 on, the start is the Cornish-Fisher expansion of t in the
/// normal quantile to the fourth power of 1/df (Abramowitz & Stegun 1964,
/// 26.7.5), and Newton steps on the tail function itself polish it until a
/// step changes it by less than about 1e-14 relative: the tail's own
/// accuracy, as before, at a few incomplete-beta evaluations instead of
/// statrs' inverse (about 0.1 ms each, thousands of times in a backlog's
/// Bonferroni cutoffs). Below df = 3, or if the polish does not settle, the
/// start is statrs' inverse, which is off by about 2e-8 relative at large
/// df (df = 1e5 against R's `qt`), polished by two Newton steps.
pub fn t_quantile(prob: f64, df: f64) -> f64 {
    if prob < 0.5 {
        return -t_quantile(1.0 - prob, df);
    }
    let upper = 1.0 - prob;
    let ln_norm =
        ln_gamma((df + 1.0) / 2.0) - ln_gamma(df / 2.0) - 0.5 * (df * std::f64::consts::PI).ln();
    // One Newton step on P(T > q) = upper; None where it cannot be taken.
    let step = |q: f64| -> Option<f64> {
        let density = (ln_norm - (df + 1.0) / 2.0 * (q * q / df).ln_1p()).exp();
        if !(density.is_finite() && density > 0.0) || q <= 0.0 {
            return None;
        }
        let s = (0.5 * t_two_sided_p(q, df) - upper) / density;
        s.is_finite().then_some(s)
    };
    if df >= 3.0 && upper > 0.0 {
        let z = normal_quantile(prob);
        let (z2, v) = (z * z, df);
        let g1 = (z2 + 1.0) * z / 4.0;
        let g2 = ((5.0 * z2 + 16.0) * z2 + 3.0) * z / 96.0;
        let g3 = (((3.0 * z2 + 19.0) * z2 + 17.0) * z2 - 15.0) * z / 384.0;
        let g4 = ((((79.0 * z2 + 776.0) * z2 + 1482.0) * z2 - 1920.0) * z2 - 945.0) * z / 92160.0;
        let mut q = z + (g1 + (g2 + (g3 + g4 / v) / v) / v) / v;
        for _ in 0..8 {
            match step(q) {
                Some(s) if q + s > 0.0 => {
                    q += s;
                    if s.abs() <= 1e-14 * q {
                        return q;
                    }
                }
                _ => break,
            }
        }
    }
    let mut q = match StudentsT::new(0.0, 1.0, df) {
        Ok(dist) => dist.inverse_cdf(prob),
        // BUG: df > 0 and finite is checked by every caller.
        Err(_) => unreachable!("BUG: Student t with df = {df}"),
    };
    for _ in 0..2 {
        match step(q) {
            Some(s) => q += s,
            None => break,
        }
    }
    q
}

/// Two-sided p-value of a standard normal statistic: `P(|Z| >= |z|)`.
pub fn normal_two_sided_p(z: f64) -> f64 {
    // musl's erfc (the libm crate) is accurate to about one ulp; statrs'
    // erfc was off by about 5e-11 relative at the 5 % point.
    libm::erfc(z.abs() / std::f64::consts::SQRT_2).clamp(0.0, 1.0)
}

/// Standard normal quantile: the `z` with `P(Z <= z) = prob`, `prob` in (0, 1).
pub fn normal_quantile(prob: f64) -> f64 {
    match Normal::new(0.0, 1.0) {
        Ok(dist) => dist.inverse_cdf(prob),
        Err(_) => unreachable!("BUG: the standard normal always exists"),
    }
}

#[cfg(test)]
// Reference values are kept exactly as R printed them (17 digits).
#[allow(clippy::excessive_precision)]
mod tests {
    use super::*;

    fn rel(a: f64, b: f64) -> f64 {
        ((a - b) / b).abs()
    }

    // Reference: R 4.2.2 (Debian r-base-core), 2*pt(-abs(t), df) printed
    // with 17 significant digits. METHODS.md §1 names t = 8, df = 45 as the
    // case where 2*(1 - cdf) loses digits.
    #[test]
    fn t_tail_matches_r_pt() {
        let cases = [
            (0.0, 5.0, 1.0),
            (8.0, 45.0, 3.4470660900988402e-10),
            (2.228, 10.0, 0.050011771817111327),
            (1.5, 3.0, 0.23058386524482283),
            (30.0, 1000.0, 1.5374687444045064e-141),
            (0.5, 1.0, 0.70483276469913358),
        ];
        for (t, df, want) in cases {
            let got = t_two_sided_p(t, df);
            assert!(
                rel(got, want) < 1e-11,
                "t={t} df={df}: got {got}, want {want}"
            );
        }
    }

    // Reference: R 4.2.2, qt(0.975, 34) and qnorm(0.975).
    #[test]
    fn quantiles_match_r() {
        assert!(rel(t_quantile(0.975, 34.0), 2.0322445093177182) < 1e-12);
        assert!(rel(normal_quantile(0.975), 1.9599639845400536) < 1e-14);
    }

    // The bound is the df = 1 tail itself (exact there: R 4.2.2,
    // 2*pt(-0.5, 1) = 0.70483276469913358, as above), and lies above the
    // tail for every df >= 1 (checked here against the incomplete-beta tail
    // that the cases above tie to R, over a grid of t and df).
    #[test]
    fn the_cauchy_tail_bounds_every_t_tail_from_above() {
        assert!(rel(t_two_sided_p_bound(0.5), 0.70483276469913358) < 1e-14);
        assert!(rel(t_two_sided_p_bound(-0.5), 0.70483276469913358) < 1e-14);
        for df in (1..=60).chain([100, 1_000, 100_000]) {
            for k in 0..=400 {
                let t = 0.05 * f64::from(k) * (1.0 + f64::from(k) / 40.0);
                let exact = t_two_sided_p(t, f64::from(df));
                let bound = t_two_sided_p_bound(t);
                assert!(
                    bound >= exact * (1.0 - 1e-12),
                    "t={t} df={df}: bound {bound} < tail {exact}"
                );
            }
        }
    }

    /// Its inverse agrees with it (up to round-off at the threshold itself).
    #[test]
    fn the_bound_and_its_inverse_agree() {
        for p in [1e-12, 1e-6, 0.001, 0.0499, 0.05, 0.3, 0.9, 0.999] {
            let cut = t_beyond_p_bound(p);
            for f in [0.5, 0.99, 0.999_999, 1.000_001, 1.01, 2.0] {
                let t = cut * f;
                assert_eq!(
                    t_two_sided_p_bound(t) < p,
                    t.abs() > cut,
                    "p={p} t={t} cut={cut}"
                );
            }
        }
        assert!(t_beyond_p_bound(1.5) < 0.0);
        assert!(t_two_sided_p_bound(0.0) <= 1.0);
    }

    #[test]
    fn symmetric_in_sign_of_t() {
        assert_eq!(t_two_sided_p(-2.5, 7.0), t_two_sided_p(2.5, 7.0));
        assert_eq!(normal_two_sided_p(-1.3), normal_two_sided_p(1.3));
    }

    // Reference: R 4.2.2, 2*pnorm(-qnorm(0.975)) = 0.050000000000000065.
    #[test]
    fn normal_tail_matches_r() {
        let p = normal_two_sided_p(1.9599639845400536);
        assert!(rel(p, 0.050000000000000065) < 1e-13, "{p}");
    }
}
