//! Sampling advice for a high-leverage record: how many more samples would
//! bring its leverage down to the cutoff.
//!
//! A record far from the rest of the series in x (a late sample after a
//! gap, a well far from the others) has high leverage: the fitted line
//! leans on it. That is not an error in the record; it is a gap in the
//! sampling, and more samples close it. Two plans are costed:
//!
//! - **replicates**: m more samples at exactly the record's x;
//! - **fill the gap**: m more samples evenly spaced strictly between the
//!   record's x and the nearest other x on its side of the data (the edge
//!   of the surveyed range), at fractions 1/(m+1), …, m/(m+1) of the gap.
//!
//! For each, the answer is the smallest m ≥ 1 after which the record's
//! leverage is no longer above the cutoff k·p/(n + m) (p = 2; k = 2 for the
//! 2p/n rule of Hoaglin & Welsch 1978, 3 for 3p/n of Velleman & Welsch
//! 1981). The cutoff falls as samples are added, which is why this is not
//! simply "until h is small". A flag is raised when h > cutoff, so h equal
//! to the cutoff counts as brought down.
//!
//! # Closed forms
//!
//! With n points (the record included), mean x̄ and Sxx on the fitted
//! scale, and d = x₀ − x̄ for the record at x₀, adding a group of m points
//! with mean c and centred sum of squares S₂ gives N = n + m,
//! x̄' = x̄ + m(c − x̄)/N and Sxx' = Sxx + S₂ + n·m·(c − x̄)²/N (the pooled
//! sum of squares), and the record's leverage is 1/N + (x₀ − x̄')²/Sxx'.
//!
//! - Replicates: c = x₀, S₂ = 0, so h(m) = 1/N + n²d² / (N·(N·Sxx + m·n·d²)).
//!   h(m) ≤ k·p/N is linear in m: with a = k·p − 1 > 0 it holds exactly when
//!   m ≥ (n²d² − a·n·Sxx) / (a·(Sxx + n·d²)).
//! - Filling a gap of width g: c = the gap's midpoint and
//!   S₂ = g²·m(m − 1)/(12(m + 1)); the smallest m is found by trying
//!   m = 1, 2, … up to the bound, O(1) each.
//!
//! Leverage depends on the fitted x scale: under a log-x transform the
//! samples are spread evenly in ln x, and the sentence says so.
//!
//! Invariant: pure. No I/O, no clock, no globals; no NaN or infinity is
//! returned.

use super::causes::show_digits;
use crate::stats::{Moments, Transform};

/// Number of coefficients of a straight line.
pub const P: usize = 2;

/// Default bound on the number of added samples searched.
pub const DEFAULT_BOUND: usize = 10_000;

/// Significant digits of x values in the sentence.
const SENTENCE_DIGITS: usize = 6;

/// The spread of x on the fitted scale: what leverage depends on.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Spread {
    /// Number of points.
    pub n: usize,
    /// Mean of x.
    pub mean: f64,
    /// Σ(x − x̄)².
    pub sxx: f64,
}

impl Spread {
    /// The spread of `x` (fitted scale), by the centred two-pass method;
    /// `None` when `x` is empty or holds a value that is not finite.
    pub fn of(x: &[f64]) -> Option<Spread> {
        let &origin = x.first()?;
        if x.iter().any(|v| !v.is_finite()) {
            return None;
        }
        let n = x.len();
        let shifted_mean = x.iter().map(|v| v - origin).sum::<f64>() / n as f64;
        let sxx = x
            .iter()
            .map(|v| {
                let d = (v - origin) - shifted_mean;
                d * d
            })
            .sum();
        let mean = origin + shifted_mean;
        (mean.is_finite() && f64::is_finite(sxx)).then_some(Spread { n, mean, sxx })
    }

    /// The spread held by a series' co-moments.
    pub fn from_moments(m: &Moments) -> Spread {
        Spread {
            n: m.n() as usize,
            mean: m.mean_x(),
            sxx: m.sxx(),
        }
    }

    /// Leverage of a point at `x0` that is one of the n points:
    /// 1/n + (x0 − x̄)²/Sxx; `None` when all x are equal.
    pub fn leverage(&self, x0: f64) -> Option<f64> {
        self.leverage_with_group(x0, 0, x0, 0.0)
    }

    /// Leverage of the point at `x0` (one of the n points) after `m` more
    /// points at exactly `x0`.
    pub fn leverage_with_replicates(&self, x0: f64, m: usize) -> Option<f64> {
        self.leverage_with_group(x0, m, x0, 0.0)
    }

    /// Leverage of the point at `x0` (one of the n points) after `m` more
    /// points evenly spaced strictly between `edge` and `x0`, at
    /// `edge + j·(x0 − edge)/(m + 1)`, j = 1..m.
    pub fn leverage_with_fill(&self, x0: f64, edge: f64, m: usize) -> Option<f64> {
        let g = x0 - edge;
        let mf = m as f64;
        let s2 = g * g * mf * (mf - 1.0) / (12.0 * (mf + 1.0));
        let centre = edge + 0.5 * g;
        self.leverage_with_group(x0, m, centre, s2)
    }

    /// Leverage at `x0` after adding `m` points whose mean is `centre` and
    /// whose own centred sum of squares is `s2`, by pooling.
    fn leverage_with_group(&self, x0: f64, m: usize, centre: f64, s2: f64) -> Option<f64> {
        let n = self.n as f64;
        let mf = m as f64;
        let total = n + mf;
        if self.n == 0 {
            return None;
        }
        // Relative to the old mean, so decimal years keep their digits.
        let dc = centre - self.mean;
        let shift = mf * dc / total;
        let sxx = self.sxx + s2 + n * mf * dc * dc / total;
        if sxx.is_nan() || sxx <= 0.0 {
            return None;
        }
        let d = (x0 - self.mean) - shift;
        let h = 1.0 / total + d * d / sxx;
        h.is_finite().then_some(h)
    }
}

/// The leverage cutoff k·p/n, p = 2.
pub fn cutoff(multiplier: f64, n: usize) -> f64 {
    multiplier * P as f64 / n as f64
}

/// The name of the cutoff rule for people: "2p/n", "3p/n", "2.5p/n".
pub fn rule_name(multiplier: f64) -> String {
    format!("{}p/n", show_digits(multiplier, 4))
}

/// The smallest m ≥ 1, at most `bound`, such that after m more samples at
/// exactly `x0` the record at `x0` is no longer above k·p/(n + m), from
/// the closed form (module documentation). `None` when not reachable
/// within `bound` (always when k·p ≤ 1).
pub fn replicates_needed(s: &Spread, x0: f64, multiplier: f64, bound: usize) -> Option<usize> {
    let ok = |m: usize| {
        s.leverage_with_replicates(x0, m)
            .is_some_and(|h| h <= cutoff(multiplier, s.n + m))
    };
    let a = multiplier * P as f64 - 1.0;
    if a.is_nan() || a <= 0.0 || bound == 0 {
        return None;
    }
    let n = s.n as f64;
    let d = x0 - s.mean;
    let q = (n * n * d * d - a * n * s.sxx) / (a * (s.sxx + n * d * d));
    if !q.is_finite() {
        return None;
    }
    if q > bound as f64 + 1.0 {
        return None;
    }
    // The condition is monotone in m; settle the rounding at the boundary
    // with the leverage itself.
    let mut m = (q.ceil().max(1.0)) as usize;
    while m > 1 && ok(m - 1) {
        m -= 1;
    }
    while m <= bound && !ok(m) {
        m += 1;
    }
    (m <= bound).then_some(m)
}

/// The smallest m ≥ 1, at most `bound`, such that after m more samples
/// evenly spaced strictly between `edge` and `x0` the record at `x0` is no
/// longer above k·p/(n + m). `None` when not reachable within `bound`.
pub fn fill_needed(s: &Spread, x0: f64, edge: f64, multiplier: f64, bound: usize) -> Option<usize> {
    (1..=bound).find(|&m| {
        s.leverage_with_fill(x0, edge, m)
            .is_some_and(|h| h <= cutoff(multiplier, s.n + m))
    })
}

/// What [`advise`] needs.
#[derive(Debug, Clone, Copy)]
pub struct AdviceInput<'a> {
    /// Every point's x in original units, the record included.
    pub x: &'a [f64],
    /// Index of the record in `x`.
    pub record: usize,
    /// The series' transform; only its x part matters.
    pub transform: Transform,
    /// k in the cutoff k·p/n: 2 or 3.
    pub multiplier: f64,
    /// Largest number of added samples searched, e.g. [`DEFAULT_BOUND`].
    pub bound: usize,
}

/// Why there is no advice.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum NoAdvice {
    /// `record` is not an index into `x`.
    RecordMissing {
        /// The index given.
        index: usize,
        /// Number of points.
        n: usize,
    },
    /// Fewer than 3 points.
    TooFewPoints {
        /// Number of points.
        n: usize,
    },
    /// An x is not finite, or not positive under a log-x transform.
    OffScale {
        /// 0-based index of the point.
        index: usize,
    },
    /// All x are equal: leverage is undefined.
    ConstantX,
    /// The multiplier is not a positive number.
    BadMultiplier,
    /// The record is not above the cutoff: nothing to advise.
    NotAboveCutoff {
        /// The record's leverage.
        leverage: f64,
        /// The cutoff.
        cutoff: f64,
    },
}

impl NoAdvice {
    /// A sentence for people.
    pub fn explain(self) -> String {
        match self {
            NoAdvice::RecordMissing { index, n } => {
                format!("record index {index} is not among the {n} points")
            }
            NoAdvice::TooFewPoints { n } => {
                format!("{n} point(s): leverage cutoffs need at least 3")
            }
            NoAdvice::OffScale { index } => {
                format!("point {index}: x cannot be put on the fitted scale")
            }
            NoAdvice::ConstantX => "all x are equal: leverage is undefined".to_string(),
            NoAdvice::BadMultiplier => "the cutoff multiplier must be positive".to_string(),
            NoAdvice::NotAboveCutoff { leverage, cutoff } => format!(
                "leverage {} is not above the cutoff {}; no more samples are needed",
                show_digits(leverage, 3),
                show_digits(cutoff, 3)
            ),
        }
    }
}

/// How many more samples would bring a high-leverage record down to the
/// cutoff.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Advice {
    /// Points now, the record included.
    pub n: usize,
    /// The record's leverage now.
    pub leverage: f64,
    /// The cutoff now, k·p/n.
    pub cutoff: f64,
    /// k.
    pub multiplier: f64,
    /// The record's x, original units.
    pub record_x: f64,
    /// The nearest other x on the record's side of the data, original
    /// units; `None` if there is none.
    pub edge_x: Option<f64>,
    /// Smallest number of samples at `record_x` that would do; `None` if
    /// more than `bound`.
    pub replicates: Option<usize>,
    /// Smallest number of samples spread between `edge_x` and `record_x`
    /// that would do; `None` if more than `bound` or no edge.
    pub fill_gap: Option<usize>,
    /// The search bound.
    pub bound: usize,
    /// Samples are spread evenly in ln x (log-x transforms).
    pub log_x: bool,
}

impl Advice {
    /// One plain-language line, e.g. "Its leverage is 0.52, above the 2p/n
    /// cutoff of 0.33 (n = 12). 2 more samples at x = 2031.5, or 4 spread
    /// evenly between x = 2024 and 2031.5, would bring it to the cutoff or
    /// below (the cutoff falls as n grows)."
    ///
    /// `x_unit` is x's unit ("m"), empty when x has none to name (a year, or
    /// not configured): with one, places read "at 1850 m" and "between 600 m
    /// and 1850 m"; without, "at x = 1850".
    pub fn sentence(&self, x_unit: &str) -> String {
        let rule = rule_name(self.multiplier);
        let at = |v: f64| {
            let v = show_digits(v, SENTENCE_DIGITS);
            if x_unit.is_empty() {
                format!("x = {v}")
            } else {
                format!("{v} {x_unit}")
            }
        };
        let x0 = at(self.record_x);
        let head = format!(
            "Its leverage is {}, above the {rule} cutoff of {} (n = {}).",
            show_digits(self.leverage, 2),
            show_digits(self.cutoff, 2),
            self.n
        );
        let plural = |m: usize| if m == 1 { "sample" } else { "samples" };
        let spread = |m: usize, edge: f64| {
            let (low, high) = if edge <= self.record_x {
                (edge, self.record_x)
            } else {
                (self.record_x, edge)
            };
            let high = show_digits(high, SENTENCE_DIGITS);
            format!(
                "{m} spread evenly{} between {} and {}",
                if self.log_x { " on the log scale" } else { "" },
                at(low),
                if x_unit.is_empty() {
                    high
                } else {
                    format!("{high} {x_unit}")
                }
            )
        };
        let tail = "would bring it to the cutoff or below (the cutoff falls as n grows).";
        let body = match (self.replicates, self.fill_gap, self.edge_x) {
            (Some(r), Some(f), Some(edge)) => format!(
                "{r} more {} at {x0}, or {}, {tail}",
                plural(r),
                spread(f, edge)
            ),
            (Some(r), _, _) => format!(
                "{r} more {} at {x0} {tail} Spreading up to {} samples toward the rest of the data would not.",
                plural(r),
                self.bound
            ),
            (None, Some(f), Some(edge)) => format!(
                "{} more samples, {tail} Up to {} samples at {x0} alone would not.",
                spread(f, edge),
                self.bound
            ),
            _ => format!(
                "Even {} more samples at {x0} or toward the rest of the data would not bring it to the cutoff.",
                self.bound
            ),
        };
        format!("{head} {body}")
    }
}

/// Costs the two sampling plans for the record `input.record`.
pub fn advise(input: &AdviceInput<'_>) -> Result<Advice, NoAdvice> {
    let n = input.x.len();
    let Some(&record_x) = input.x.get(input.record) else {
        return Err(NoAdvice::RecordMissing {
            index: input.record,
            n,
        });
    };
    if n < 3 {
        return Err(NoAdvice::TooFewPoints { n });
    }
    if !(input.multiplier > 0.0 && input.multiplier.is_finite()) {
        return Err(NoAdvice::BadMultiplier);
    }
    let scaled = input
        .x
        .iter()
        .enumerate()
        .map(|(i, &x)| fitted_x(input.transform, x).ok_or(NoAdvice::OffScale { index: i }))
        .collect::<Result<Vec<f64>, NoAdvice>>()?;
    let spread = Spread::of(&scaled).ok_or(NoAdvice::OffScale { index: 0 })?;
    let x0 = scaled[input.record];
    let leverage = spread.leverage(x0).ok_or(NoAdvice::ConstantX)?;
    let cut = cutoff(input.multiplier, n);
    if leverage <= cut {
        return Err(NoAdvice::NotAboveCutoff {
            leverage,
            cutoff: cut,
        });
    }
    // The nearest other x between the record and the bulk of the data.
    let others = scaled
        .iter()
        .zip(input.x)
        .enumerate()
        .filter(|&(i, _)| i != input.record)
        .map(|(_, pair)| pair);
    let edge = if x0 >= spread.mean {
        others
            .filter(|(s, _)| **s < x0)
            .max_by(|a, b| a.0.total_cmp(b.0))
    } else {
        others
            .filter(|(s, _)| **s > x0)
            .min_by(|a, b| a.0.total_cmp(b.0))
    };
    let replicates = replicates_needed(&spread, x0, input.multiplier, input.bound);
    let fill_gap =
        edge.and_then(|(&e, _)| fill_needed(&spread, x0, e, input.multiplier, input.bound));
    Ok(Advice {
        n,
        leverage,
        cutoff: cut,
        multiplier: input.multiplier,
        record_x,
        edge_x: edge.map(|(_, &raw)| raw),
        replicates,
        fill_gap,
        bound: input.bound,
        log_x: matches!(input.transform, Transform::LogX | Transform::LogLog),
    })
}

/// x on the fitted scale (y plays no part; 1 is a placeholder any log
/// accepts).
fn fitted_x(t: Transform, x: f64) -> Option<f64> {
    let (tx, _) = t.apply(0, x, 1.0).ok()?;
    tx.is_finite().then_some(tx)
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    /// Brute force: leverage of point 0 in `x` (fitted scale).
    fn hat0(x: &[f64]) -> f64 {
        let n = x.len() as f64;
        let mean = x.iter().sum::<f64>() / n;
        let sxx: f64 = x.iter().map(|v| (v - mean) * (v - mean)).sum();
        1.0 / n + (x[0] - mean) * (x[0] - mean) / sxx
    }

    #[test]
    fn closed_forms_match_brute_force_leverage() {
        let base = [9.0, 1.0, 2.0, 2.5, 3.0, 4.0];
        let s = Spread::of(&base).unwrap();
        for m in 1..6 {
            let mut rep = base.to_vec();
            rep.extend(std::iter::repeat_n(9.0, m));
            let a = s.leverage_with_replicates(9.0, m).unwrap();
            assert!((a - hat0(&rep)).abs() < 1e-14, "m={m}");
            let mut fill = base.to_vec();
            fill.extend((1..=m).map(|j| 4.0 + j as f64 * 5.0 / (m as f64 + 1.0)));
            let b = s.leverage_with_fill(9.0, 4.0, m).unwrap();
            assert!((b - hat0(&fill)).abs() < 1e-14, "m={m}");
        }
    }

    #[test]
    fn spread_from_moments_matches_spread_of_points() {
        let x = [2020.0, 2020.25, 2020.5, 2021.75, 2029.0];
        let a = Spread::of(&x).unwrap();
        let b = Spread::from_moments(&Moments::from_points(&x, &[0.0; 5]));
        assert_eq!(a.n, b.n);
        assert!((a.mean - b.mean).abs() < 1e-12);
        assert!((a.sxx - b.sxx).abs() < 1e-12 * a.sxx);
    }

    #[test]
    fn replicate_count_is_the_smallest_that_works() {
        let base = [9.0, 1.0, 2.0, 2.5, 3.0, 4.0, 1.5, 3.5];
        let s = Spread::of(&base).unwrap();
        let m = replicates_needed(&s, 9.0, 2.0, 1000).unwrap();
        let h = |m| s.leverage_with_replicates(9.0, m).unwrap();
        assert!(h(m) <= cutoff(2.0, base.len() + m));
        if m > 1 {
            assert!(h(m - 1) > cutoff(2.0, base.len() + m - 1));
        }
        // A bound below the answer gives None.
        assert_eq!(replicates_needed(&s, 9.0, 2.0, m - 1), None);
        // 2p/n with k·p ≤ 1 is never reachable.
        assert_eq!(replicates_needed(&s, 9.0, 0.5, 1000), None);
    }

    #[test]
    fn record_below_cutoff_gets_no_advice() {
        let x = [1.0, 2.0, 3.0, 4.0, 5.0, 6.0];
        let err = advise(&AdviceInput {
            x: &x,
            record: 2,
            transform: Transform::None,
            multiplier: 2.0,
            bound: DEFAULT_BOUND,
        })
        .unwrap_err();
        assert!(matches!(err, NoAdvice::NotAboveCutoff { .. }));
    }

    #[test]
    fn rejects_bad_input_with_a_reason() {
        let x = [1.0, 2.0, 30.0];
        let inp = |record, transform, multiplier| AdviceInput {
            x: &x,
            record,
            transform,
            multiplier,
            bound: 10,
        };
        assert_eq!(
            advise(&inp(5, Transform::None, 2.0)).unwrap_err(),
            NoAdvice::RecordMissing { index: 5, n: 3 }
        );
        assert_eq!(
            advise(&inp(2, Transform::None, -1.0)).unwrap_err(),
            NoAdvice::BadMultiplier
        );
        let neg = [-1.0, 2.0, 30.0];
        let err = advise(&AdviceInput {
            x: &neg,
            record: 2,
            transform: Transform::LogX,
            multiplier: 2.0,
            bound: 10,
        })
        .unwrap_err();
        assert_eq!(err, NoAdvice::OffScale { index: 0 });
        let same = [3.0, 3.0, 3.0, 3.0];
        let err = advise(&AdviceInput {
            x: &same,
            record: 0,
            transform: Transform::None,
            multiplier: 2.0,
            bound: 10,
        })
        .unwrap_err();
        assert_eq!(err, NoAdvice::ConstantX);
    }

    #[test]
    fn sentence_names_both_plans_and_the_rule() {
        // Invented: quarterly 2020–2023, then one sample in 2031.5.
        let mut x: Vec<f64> = (0..16).map(|i| 2020.0 + 0.25 * f64::from(i)).collect();
        x.push(2031.5);
        let a = advise(&AdviceInput {
            x: &x,
            record: 16,
            transform: Transform::None,
            multiplier: 2.0,
            bound: DEFAULT_BOUND,
        })
        .unwrap();
        assert_eq!(a.edge_x, Some(2023.75));
        let (r, f) = (a.replicates.unwrap(), a.fill_gap.unwrap());
        let s = a.sentence("");
        assert!(
            s.contains(&format!("{r} more samples at x = 2031.5")),
            "{s}"
        );
        assert!(
            s.contains(&format!("{f} spread evenly between x = 2023.75 and 2031.5")),
            "{s}"
        );
        assert!(s.contains("2p/n cutoff"), "{s}");
        // With x's unit configured, the places are given in it.
        let s = a.sentence("m");
        assert!(s.contains(&format!("{r} more samples at 2031.5 m")), "{s}");
        assert!(
            s.contains(&format!("{f} spread evenly between 2023.75 m and 2031.5 m")),
            "{s}"
        );
    }
}
