//! The rules that decide whether a new record, or a refit, deserves the
//! analyst's attention. Pure: numbers in, a judgement out.
//!
//! Alerts are trusted only when rare and right, so a record-level finding is
//! raised by three tests that clean arrivals seldom fail:
//! - `outlier`: the record against the fit *before* it arrived (its
//!   prediction t, which equals the externally studentized residual), beyond
//!   t(1 − α/(2k), n − 2) with a small α; k is the number of records of the
//!   series judged at once (Bonferroni over a backlog).
//! - `high_leverage`: leverage above the 2p/n cutoff *and* well above what a
//!   record at the series' usual spacing would have. In a time series the
//!   newest record always sits at the end of the x range, so 2p/n alone
//!   would flag routine arrivals; a gap, a wrong year or a distance typo
//!   puts the record far beyond the usual spacing.
//! - `influential`: Cook's distance beyond the median of F(p, n − p) (Cook
//!   1977), or 4/n when configured. |DFFITS| and |DFBETAS| crossings are
//!   reported with the finding but do not raise one alone: for the newest
//!   point of an evenly spaced series they cross their cutoffs for about
//!   one clean arrival in six (common practice treats them as screening
//!   values, not tests).
//!
//! The outlier test speaks from a series' fifth point; the leverage and
//! influence rules wait for `min_n_record` (10).
//!
//! A second outlier screen on the ln(y) scale catches multiplicative slips
//! (a decimal point, a unit) in series whose scatter grows with their
//! level. It is not asked where the series itself rules that scale out
//! ([`ln_scale_ruled_out`], the Box-Cox profile likelihood): in a series
//! with additive scatter whose level falls, the ln scale stretches the low
//! end, and the screen would flag ordinary records there.
//!
//! Trend-level findings (`sign_reversal`, `significance_change`) use
//! hysteresis: a trend becomes significant when p falls below α and stops
//! only when p rises above a wider release level, so a p-value hovering
//! near α does not flap; nothing is said below a minimum n.

use statrs::distribution::{ContinuousCDF, FisherSnedecor};

use crate::stats::dist::t_quantile;
use crate::stats::{Arrival, LineFit, Moments};

/// Number of coefficients of the straight line.
const P: usize = 2;

/// The Cook's distance cutoff in use.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum CooksRule {
    /// Median of F(p, n − p) (Cook 1977).
    MedianF,
    /// 4/n (Bollen & Jackman 1990).
    FourOverN,
}

/// Thresholds of the rules; [`Thresholds::default`] gives the published
/// cutoffs and the defaults documented in config/slopewarden.example.toml.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Thresholds {
    /// Leverage cutoff multiplier m in m·p/n (2, Hoaglin & Welsch 1978).
    pub leverage_multiplier: f64,
    /// Leverage must also exceed this multiple of the leverage a record at
    /// the series' usual spacing would have (2; a project default).
    pub unexpected_factor: f64,
    /// Cook's distance rule.
    pub cooks: CooksRule,
    /// Two-sided α of the outlier test, before Bonferroni (0.001).
    pub outlier_alpha: f64,
    /// A trend becomes significant below this p (0.05).
    pub significance_alpha: f64,
    /// A significant trend stops being so only above this p (0.10).
    pub release_alpha: f64,
    /// The leverage and influence rules judge a record once the series
    /// held this many points before it (10). The outlier test needs only 5
    /// (three residual degrees of freedom for its prediction t).
    pub min_n_record: usize,
    /// Trend changes are reported from this n on (10).
    pub min_n_trend: usize,
}

impl Default for Thresholds {
    fn default() -> Self {
        Thresholds {
            leverage_multiplier: 2.0,
            unexpected_factor: 2.0,
            cooks: CooksRule::MedianF,
            outlier_alpha: 0.001,
            significance_alpha: 0.05,
            release_alpha: 0.10,
            min_n_record: 10,
            min_n_trend: 10,
        }
    }
}

/// The kinds of record-level findings raised by these rules.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum RecordKind {
    /// Leverage beyond the cutoff and beyond the usual spacing.
    HighLeverage,
    /// Cook's distance beyond its cutoff.
    Influential,
    /// Far from the fit before it arrived.
    Outlier,
}

impl RecordKind {
    /// The stored name.
    pub fn name(self) -> &'static str {
        match self {
            RecordKind::HighLeverage => "high_leverage",
            RecordKind::Influential => "influential",
            RecordKind::Outlier => "outlier",
        }
    }
}

/// One measured value beside its cutoff, for the message.
#[derive(Debug, Clone, PartialEq)]
pub struct Measured {
    /// The finding kind the measure supports.
    pub kind: &'static str,
    /// What was measured.
    pub measure: &'static str,
    /// Its value.
    pub value: f64,
    /// The cutoff. NaN in the judgement of a record that crosses nothing
    /// where the measure was decided by a neighbouring cutoff (see
    /// [`CutoffCache`]); a flagged record's are all filled in
    /// ([`exact_cutoffs`]).
    pub cutoff: f64,
    /// Whether the cutoff was crossed.
    pub crossed: bool,
    /// Where the cutoff comes from (rendered only when a finding is
    /// written: most records cross nothing, and formatting every record's
    /// sources cost a tenth of the ingest time).
    pub source: CutoffSource,
}

/// Where a cutoff comes from, with the numbers that make it up.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum CutoffSource {
    /// The outlier test: alpha, residual degrees of freedom, and the
    /// number of records judged together (Bonferroni when above 1).
    Outlier {
        /// Two-sided level.
        alpha: f64,
        /// Degrees of freedom of the prediction t.
        df: usize,
        /// Records of the series judged together.
        k: usize,
    },
    /// The leverage rule and the usual-spacing comparison.
    Leverage {
        /// The multiplier of p/n.
        multiplier: f64,
        /// multiplier * p / n.
        cutoff: f64,
        /// The factor over the usual-spacing leverage.
        factor: f64,
        /// The leverage of a record at the usual spacing.
        expected: f64,
    },
    /// A fixed rule with its published source.
    Fixed(&'static str),
}

impl std::fmt::Display for CutoffSource {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match *self {
            CutoffSource::Outlier { alpha, df, k } if k > 1 => write!(
                f,
                "t(1 - {alpha}/(2*{k}), {df}) for a two-sided test at alpha = {alpha}, Bonferroni over {k} records judged together"
            ),
            CutoffSource::Outlier { alpha, df, .. } => write!(
                f,
                "t(1 - {alpha}/2, {df}) for a two-sided test at alpha = {alpha}"
            ),
            CutoffSource::Leverage {
                multiplier,
                cutoff,
                factor,
                expected,
            } => write!(
                f,
                "above {multiplier}p/n = {cutoff:.3} (Hoaglin & Welsch 1978) and above {factor} x the leverage of a record at the usual spacing ({expected:.3}; project default)"
            ),
            CutoffSource::Fixed(s) => f.write_str(s),
        }
    }
}

/// Where the series' x values lay before the newcomer.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Span {
    /// Smallest x in the fit.
    pub min: f64,
    /// Largest x in the fit.
    pub max: f64,
}

/// The verdict of the rules on one new record.
#[derive(Debug, Clone, PartialEq)]
pub struct RecordJudgement {
    /// Kinds raised (empty: nothing to report).
    pub kinds: Vec<RecordKind>,
    /// Every measure looked at, crossed or not.
    pub measures: Vec<Measured>,
    /// The record's leverage in the fit with it.
    pub leverage: f64,
    /// The leverage a record at the usual spacing would have had.
    pub expected_leverage: f64,
    /// Points in the fit with the record.
    pub n: usize,
}

/// Judges one arrival. `judged` is the fit's arrival as seen by the rules
/// (against the fit without records still awaiting review); `span` is the x
/// range before it; `k` the number of the series' records judged together.
/// `None` while the series is too short to judge.
pub fn judge_record(
    judged: &Arrival,
    span: Span,
    k: usize,
    t: &Thresholds,
) -> Option<RecordJudgement> {
    judge_record_with(judged, span, k, t, &mut CutoffCache::default())
}

/// Critical values already computed, keyed by their degrees of freedom:
/// a quantile costs microseconds, and a backlog judges millions of
/// records against a few thousand distinct values. Memoisation only; the
/// results are those of [`judge_record`].
///
/// A long series meets a new df with every record, so past [`GRID_FROM`]
/// a record's side of a cutoff is settled, where it can be, by the cutoffs
/// at the two grid points around its df: both cutoffs fall as the df grow
/// (t(1 − α/2k, df) towards the normal quantile, the median of F(2, n − 2)
/// towards ln 2), so one at most as large as the record's measure, or one
/// at least as small, decides it. Only a measure between the two, and a
/// record that is flagged (whose every cutoff is shown), needs the exact
/// value at its own df. Decisions and shown values are those of the exact
/// computation: [`BRACKET_MARGIN`] keeps round-off out of the comparison.
#[derive(Debug, Default, Clone)]
pub struct CutoffCache {
    outlier_t: FastMap<(usize, usize, u64), f64>,
    median_f: FastMap<usize, f64>,
}

/// Looked up for every record judged: SipHash (the standard default) made
/// the lookups half of this cache's cost in a large ingest (perf).
type FastMap<K, V> = std::collections::HashMap<K, V, foldhash::fast::RandomState>;

/// The name of Cook's distance among a judgement's measures.
const COOKS_DISTANCE: &str = "Cook's distance";

/// Below this many degrees of freedom (or points), cutoffs are computed at
/// each value: series that short are many, and share them.
const GRID_FROM: usize = 256;

/// The relative margin by which a measure must clear a neighbouring
/// cutoff to be decided by it (the quantiles are accurate to far better).
const BRACKET_MARGIN: f64 = 1e-9;

/// The grid points around `v` (the largest at most `v`, the smallest
/// above it), spaced by the power of two nearest `v / GRID_FROM` from
/// below: about 256 per doubling. `None` when `v` is below the grid or on
/// it (its own value is then the one to compute and keep).
fn grid_around(v: usize) -> Option<(usize, usize)> {
    if v < 2 * GRID_FROM {
        return None;
    }
    let step = 1usize << (v / GRID_FROM).ilog2();
    let low = v - v % step;
    (low != v).then_some((low, low + step))
}

/// Whether `value` exceeds `cutoff(at)`, where `cutoff` falls as `at`
/// grows, asked of the grid points around `at` first (see [`CutoffCache`]);
/// with `cutoff(at)` when that was needed, else NaN.
fn beyond_falling(value: f64, at: usize, cutoff: &mut dyn FnMut(usize) -> f64) -> (bool, f64) {
    if let Some((low, high)) = grid_around(at) {
        if value <= cutoff(high) * (1.0 - BRACKET_MARGIN) {
            return (false, f64::NAN);
        }
        if value > cutoff(low) * (1.0 + BRACKET_MARGIN) {
            return (true, f64::NAN);
        }
    }
    let exact = cutoff(at);
    (value > exact, exact)
}

impl CutoffCache {
    /// t(1 − alpha/2k, df), memoised.
    fn outlier_t(&mut self, df: usize, k: usize, alpha: f64) -> f64 {
        *self
            .outlier_t
            .entry((df, k, alpha.to_bits()))
            .or_insert_with(|| t_quantile(1.0 - alpha / (2.0 * k as f64), df as f64))
    }

    /// The median of F(p, n − p), memoised.
    fn median_f(&mut self, n: usize) -> f64 {
        *self.median_f.entry(n).or_insert_with(|| {
            let (pf, nf) = (P as f64, n as f64);
            FisherSnedecor::new(pf, nf - pf)
                .map(|f| f.inverse_cdf(0.5))
                .unwrap_or(f64::INFINITY)
        })
    }
}

/// The fewest points the fit a record is judged against may have for the
/// outlier test: its prediction t then has 3 residual degrees of freedom.
/// With 1 or 2, the scatter rests on one or two residuals, and three points
/// that happen to lie on a line to the last digit (rounded decimal data
/// can) leave a scatter of round-off that any newcomer would be far from.
const MIN_N_OUTLIER: usize = 5;

/// The points of the fit a record is judged against, when there are
/// enough for the outlier test ([`MIN_N_OUTLIER`]), with whether there are
/// enough for the leverage and influence rules too (`min_n_record`).
///
/// The outlier test is exact for any residual df under the model, and its
/// critical value grows as the df shrink (t(1 − 0.0005, 3) = 12.92), so it
/// can speak early: a unit slip in a young series is flagged on arrival
/// instead of staying unflagged in the fit, where it would mask the
/// records after it. A few points put any newcomer far out in x, so
/// leverage and influence wait for `min_n_record`.
fn judged_points(judged: &Arrival, t: &Thresholds) -> Option<(usize, bool)> {
    let n_before = judged.before.n() as usize;
    (n_before >= MIN_N_OUTLIER).then_some((n_before, n_before >= t.min_n_record))
}

/// How much better the ln(y) scale describes a series than the original
/// one: the Box-Cox profile log-likelihood of λ = 0 less that of λ = 1
/// (Box & Cox 1964), for the straight-line fits of the same points on the
/// two scales. With SSE_λ the residual sum of squares of the fit of the
/// transformed y, ℓ(λ) = −(n/2)·ln SSE_λ + (λ − 1)·Σ ln y (plus a constant),
/// so ℓ(0) − ℓ(1) = (n/2)·(ln SSE_1 − ln SSE_0) − n·mean(ln y): the ln
/// fit's residuals are scaled back by the geometric mean of y before they
/// are compared. The same quantity as `MASS::boxcox(fit, lambda = c(0, 1))`
/// in R (its `y[1] - y[2]`).
///
/// `None` when the two fits are not of the same points, have fewer than 3,
/// or either has no residual scatter.
pub fn ln_scale_advantage(original: &Moments, ln: &Moments) -> Option<f64> {
    let n = original.n();
    if n < 3 || ln.n() != n {
        return None;
    }
    let (sse_1, sse_0) = (original.sse(), ln.sse());
    if !(sse_1 > 0.0 && sse_0 > 0.0 && sse_1.is_finite() && sse_0.is_finite()) {
        return None;
    }
    let n = n as f64;
    Some(n / 2.0 * (sse_1.ln() - sse_0.ln()) - n * ln.mean_y())
}

/// Half the 0.95 quantile of χ² with one degree of freedom (R:
/// `qchisq(0.95, 1) / 2`): the drop in profile log-likelihood that bounds
/// the approximate 95 % interval of the Box-Cox λ (Box & Cox 1964).
pub const BOX_COX_HALF_CHI2_95: f64 = 3.841458820694124 / 2.0;

/// Whether a series rules the ln(y) scale out: λ = 1 alone already lies
/// more than [`BOX_COX_HALF_CHI2_95`] above λ = 0 in profile
/// log-likelihood, so (the maximum being at least as high) λ = 0 is
/// outside the approximate 95 % interval of λ. `false` when it cannot be
/// told ([`ln_scale_advantage`] is `None`).
pub fn ln_scale_ruled_out(original: &Moments, ln: &Moments) -> bool {
    ln_scale_advantage(original, ln).is_some_and(|a| a < -BOX_COX_HALF_CHI2_95)
}

/// The outlier rule alone: the record's prediction t against the
/// Bonferroni critical value, as [`judge_record_with`] measures it (and
/// `None` where that would judge nothing, or has no prediction t). A second
/// screen that only asks whether a record is an outlier (the ln(y) fit)
/// needs no leverage or influence measures.
pub fn outlier_measure(
    judged: &Arrival,
    k: usize,
    t: &Thresholds,
    cache: &mut CutoffCache,
) -> Option<Measured> {
    judged_points(judged, t)?;
    let pred = judged.prediction?;
    let tv = pred.t?;
    if pred.df < 1 {
        return None;
    }
    let kk = k.max(1);
    let alpha = t.outlier_alpha;
    // |t| beyond the Bonferroni critical value t(1 − alpha/2k, df): the
    // very cutoff the finding shows, memoised per (df, k), so a backlog
    // pays one quantile per distinct pair instead of one per record, and
    // past the grid's start mostly decided by its neighbours.
    let (crossed, mut cutoff) =
        beyond_falling(tv.abs(), pred.df, &mut |df| cache.outlier_t(df, kk, alpha));
    // A crossed cutoff is shown; one the grid decided is otherwise left
    // for `exact_cutoffs` (NaN).
    if crossed && cutoff.is_nan() {
        cutoff = cache.outlier_t(pred.df, kk, alpha);
    }
    Some(Measured {
        kind: "outlier",
        measure: "prediction t (externally studentized residual)",
        value: tv,
        cutoff,
        crossed,
        source: CutoffSource::Outlier {
            alpha: t.outlier_alpha,
            df: pred.df,
            k: kk,
        },
    })
}

/// [`judge_record`] with a cache of critical values.
pub fn judge_record_with(
    judged: &Arrival,
    span: Span,
    k: usize,
    t: &Thresholds,
    cache: &mut CutoffCache,
) -> Option<RecordJudgement> {
    let (n_before, full) = judged_points(judged, t)?;
    let n = n_before + 1;
    let nf = n as f64;
    let pf = P as f64;
    let mut kinds = Vec::new();
    // Up to five measures (prediction t, leverage, Cook's distance, DFFITS,
    // DFBETAS): sized once, as this runs for every record of a backlog.
    let mut measures = Vec::with_capacity(5);

    // Outlier: prediction t against the fit before the record.
    if let Some(m) = outlier_measure(judged, k, t, cache) {
        if m.crossed {
            kinds.push(RecordKind::Outlier);
        }
        measures.push(m);
    }

    // Leverage, against the cutoff and against the usual spacing.
    let mb = judged.before.mean_x();
    let sb = judged.before.sxx();
    let x = judged.x;
    let leverage_of = |xe: f64| {
        let m = (n_before as f64 * mb + xe) / nf;
        let s = sb + n_before as f64 / nf * (xe - mb) * (xe - mb);
        if s > 0.0 {
            1.0 / nf + (xe - m) * (xe - m) / s
        } else {
            1.0
        }
    };
    let leverage = judged
        .influence
        .as_ref()
        .map_or_else(|| leverage_of(x), |p| p.leverage());
    let gap = if n_before > 1 {
        (span.max - span.min) / (n_before - 1) as f64
    } else {
        0.0
    };
    let expected_x = x.clamp(span.min - gap, span.max + gap);
    let expected_leverage = leverage_of(expected_x);
    let cutoff = t.leverage_multiplier * pf / nf;
    let crossed = leverage > cutoff && leverage > t.unexpected_factor * expected_leverage;
    if crossed {
        kinds.push(RecordKind::HighLeverage);
    }
    measures.push(Measured {
        kind: "high_leverage",
        measure: "leverage",
        value: leverage,
        cutoff: cutoff.max(t.unexpected_factor * expected_leverage),
        crossed,
        source: CutoffSource::Leverage {
            multiplier: t.leverage_multiplier,
            cutoff,
            factor: t.unexpected_factor,
            expected: expected_leverage,
        },
    });

    // Influence.
    if let Some(inf) = judged.influence.as_ref() {
        if let Some(d) = inf.cooks_distance() {
            let (cut, crossed, source) = match t.cooks {
                CooksRule::MedianF => {
                    let (crossed, mut cut) = beyond_falling(d, n, &mut |n| cache.median_f(n));
                    // As for the outlier test's cutoff.
                    if crossed && cut.is_nan() {
                        cut = cache.median_f(n);
                    }
                    (cut, crossed, "median of F(p, n-p) (Cook 1977)")
                }
                CooksRule::FourOverN => (4.0 / nf, d > 4.0 / nf, "4/n (Bollen & Jackman 1990)"),
            };
            if crossed {
                kinds.push(RecordKind::Influential);
            }
            measures.push(Measured {
                kind: "influential",
                measure: COOKS_DISTANCE,
                value: d,
                cutoff: cut,
                crossed,
                source: CutoffSource::Fixed(source),
            });
        }
        if let Some(v) = inf.dffits() {
            let cut = 2.0 * (pf / nf).sqrt();
            measures.push(Measured {
                kind: "influential",
                measure: "|DFFITS| (reported, not raised alone)",
                value: v.abs(),
                cutoff: cut,
                crossed: v.abs() > cut,
                source: CutoffSource::Fixed("2*sqrt(p/n) (Belsley, Kuh & Welsch 1980)"),
            });
        }
        if let Some(v) = inf.dfbetas_slope() {
            let cut = 2.0 / nf.sqrt();
            measures.push(Measured {
                kind: "influential",
                measure: "|DFBETAS of the slope| (reported, not raised alone)",
                value: v.abs(),
                cutoff: cut,
                crossed: v.abs() > cut,
                source: CutoffSource::Fixed("2/sqrt(n) (Belsley, Kuh & Welsch 1980)"),
            });
        }
    }
    if !full {
        // Too few points for the leverage and influence rules: only the
        // outlier test speaks, and only its measure is shown.
        kinds.retain(|k| *k == RecordKind::Outlier);
        measures.retain(|m| m.kind == "outlier");
    }
    kinds.sort();
    if !kinds.is_empty() {
        exact_cutoffs(&mut measures, n, cache);
    }
    Some(RecordJudgement {
        kinds,
        measures,
        leverage,
        expected_leverage,
        n,
    })
}

/// Fills in the cutoffs a judgement left out while deciding (NaN: the
/// measure stayed below a neighbouring cutoff), for a record that is
/// flagged and shows every measure with its cutoff; `n` counts the judged
/// fit's points with the record ([`RecordJudgement::n`]). A judgement that
/// becomes flagged later (by the ln(y) screen) needs it called again.
pub fn exact_cutoffs(measures: &mut [Measured], n: usize, cache: &mut CutoffCache) {
    for m in measures.iter_mut().filter(|m| m.cutoff.is_nan()) {
        m.cutoff = match m.source {
            CutoffSource::Outlier { alpha, df, k } => cache.outlier_t(df, k, alpha),
            // The only other cutoff left out: the median of F(p, n - p).
            _ if m.measure == COOKS_DISTANCE => cache.median_f(n),
            _ => continue,
        };
    }
}

/// A change in the trend reported by [`judge_trend`].
#[derive(Debug, Clone, PartialEq)]
pub struct TrendChange {
    /// `sign_reversal` or `significance_change`.
    pub kind: &'static str,
    /// What changed, for people.
    pub summary: String,
    /// Whether the newest record alone causes it (without it, the change
    /// would not happen).
    pub caused_by_newest: Option<bool>,
}

/// The trend's hysteresis state after a fit: is it taken as significant?
pub fn next_significance(previous: bool, p: Option<f64>, n: usize, t: &Thresholds) -> bool {
    match p {
        _ if n < t.min_n_trend => false,
        None => previous,
        Some(p) if previous => p <= t.release_alpha,
        Some(p) => p < t.significance_alpha,
    }
}

/// Compares a refit with the previous one. `previous` is the slope, its
/// hysteresis state and its n before; `without_newest` the slope and p of
/// the new fit without its newest record, when known. Nothing is reported
/// until the previous fit itself had the minimum n: reaching it only sets
/// the state, the same as when a series arrives whole in one file.
pub fn judge_trend(
    previous: Option<(f64, bool, usize)>,
    new_fit: &LineFit,
    without_newest: Option<(f64, Option<f64>)>,
    t: &Thresholds,
) -> (bool, Vec<TrendChange>) {
    let n = new_fit.n;
    let prev_sig = previous.is_some_and(|(_, s, _)| s);
    let now_sig = next_significance(prev_sig, new_fit.slope_p, n, t);
    let mut out = Vec::new();
    let Some((prev_slope, _, prev_n)) = previous else {
        return (now_sig, out);
    };
    if n < t.min_n_trend || prev_n < t.min_n_trend {
        return (now_sig, out);
    }
    // "p = 0.128", or "p < 0.001" where three decimals would read 0.000.
    let p_text = |p: Option<f64>| match p {
        None => "p undefined".to_string(),
        Some(p) if p < 0.001 => "p < 0.001".to_string(),
        Some(p) => format!("p = {p:.3}"),
    };
    if prev_sig && prev_slope.signum() != new_fit.slope.signum() && new_fit.slope != 0.0 {
        let caused = without_newest.map(|(s, _)| s.signum() == prev_slope.signum());
        out.push(TrendChange {
            kind: "sign_reversal",
            summary: format!(
                "the slope changed sign: {prev_slope:.4} before, {:.4} now ({})",
                new_fit.slope,
                p_text(new_fit.slope_p)
            ),
            caused_by_newest: caused,
        });
    }
    if now_sig != prev_sig {
        let caused =
            without_newest.map(|(_, p)| next_significance(prev_sig, p, n - 1, t) == prev_sig);
        out.push(TrendChange {
            kind: "significance_change",
            summary: if now_sig {
                format!(
                    "the trend became significant: {}, below {} (it stops being so only above {})",
                    p_text(new_fit.slope_p),
                    t.significance_alpha,
                    t.release_alpha
                )
            } else {
                format!(
                    "the trend is no longer significant: {}, above {}",
                    p_text(new_fit.slope_p),
                    t.release_alpha
                )
            },
            caused_by_newest: caused,
        });
    }
    (now_sig, out)
}

/// The smallest relative error in y that the outlier test would catch for
/// a record at the series' mean x, at its current scatter: the test's
/// critical value times the prediction standard error s·sqrt(1 + 1/n),
/// relative to the level there (for a ln(y) fit, the ratio exp(...) − 1).
/// Errors smaller than this hide in the scatter; `None` when the fit has no
/// degrees of freedom or a zero level.
pub fn smallest_detectable_error(
    n: usize,
    residual_sd: f64,
    level: f64,
    log_y: bool,
    t: &Thresholds,
) -> Option<f64> {
    if n < 3 || !residual_sd.is_finite() {
        return None;
    }
    let crit = t_quantile(1.0 - t.outlier_alpha / 2.0, (n - 2) as f64);
    let half = crit * residual_sd * (1.0 + 1.0 / n as f64).sqrt();
    if log_y {
        Some(half.exp_m1())
    } else if level != 0.0 && level.is_finite() {
        Some(half / level.abs())
    } else {
        None
    }
}

/// [`smallest_detectable_error`] for people: "±14%" on the original
/// scale; on a ln(y) scale, where the error is a factor and a value can be
/// too high or too low by it, "×/÷3.2" (a value 3.2 times too high or too
/// low would be caught).
pub fn detectable_text(error: f64, log_y: bool) -> String {
    if !log_y {
        return format!("±{:.0}%", 100.0 * error);
    }
    let factor = 1.0 + error;
    if factor >= 1000.0 {
        "×/÷>999".to_string()
    } else if factor >= 10.0 {
        format!("×/÷{factor:.0}")
    } else {
        format!("×/÷{factor:.1}")
    }
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;
    use crate::stats::{SeriesState, fit_line};

    #[test]
    fn the_detectable_error_reads_as_a_share_or_as_a_factor() {
        assert_eq!(detectable_text(0.1412, false), "±14%");
        // exp(2.42) − 1 = 10.2: eleven times too high or too low.
        assert_eq!(detectable_text(2.42f64.exp_m1(), true), "×/÷11");
        assert_eq!(detectable_text(0.35, true), "×/÷1.4");
        assert_eq!(detectable_text(5000.0, true), "×/÷>999");
    }

    /// ℓ(0) − ℓ(1) of the Box-Cox profile likelihood against R 4.2.2's
    /// MASS 7.3-58.2 (Debian bookworm r-cran-mass),
    /// `b <- boxcox(lm(y ~ x), lambda = c(0, 1), plotit = FALSE); b$y[1] - b$y[2]`,
    /// on three of R's datasets: `cars` (dist on speed; Ezekiel 1930),
    /// `women` (weight on height) and Anscombe's (1973) set I, where the
    /// original scale is the better one.
    #[test]
    fn ln_scale_advantage_matches_r_mass_boxcox() {
        fn advantage(x: &[f64], y: &[f64]) -> f64 {
            let ln: Vec<f64> = y.iter().map(|v| v.ln()).collect();
            ln_scale_advantage(&Moments::from_points(x, y), &Moments::from_points(x, &ln)).unwrap()
        }
        let rel = |a: f64, b: f64| ((a - b) / b).abs();
        let speed = [
            4.0, 4.0, 7.0, 7.0, 8.0, 9.0, 10.0, 10.0, 10.0, 11.0, 11.0, 12.0, 12.0, 12.0, 12.0,
            13.0, 13.0, 13.0, 13.0, 14.0, 14.0, 14.0, 14.0, 15.0, 15.0, 15.0, 16.0, 16.0, 17.0,
            17.0, 17.0, 18.0, 18.0, 18.0, 18.0, 19.0, 19.0, 19.0, 20.0, 20.0, 20.0, 20.0, 20.0,
            22.0, 23.0, 24.0, 24.0, 24.0, 24.0, 25.0,
        ];
        let dist = [
            2.0, 10.0, 4.0, 22.0, 16.0, 10.0, 18.0, 26.0, 34.0, 17.0, 28.0, 14.0, 20.0, 24.0, 28.0,
            26.0, 34.0, 34.0, 46.0, 26.0, 36.0, 60.0, 80.0, 20.0, 26.0, 54.0, 32.0, 40.0, 32.0,
            40.0, 50.0, 42.0, 56.0, 76.0, 84.0, 36.0, 46.0, 68.0, 32.0, 48.0, 52.0, 56.0, 64.0,
            66.0, 54.0, 70.0, 92.0, 93.0, 120.0, 85.0,
        ];
        let a = advantage(&speed, &dist);
        assert!(rel(a, 0.191_461_183_564_726_4) < 1e-9, "{a}");
        let height: Vec<f64> = (58..=72).map(f64::from).collect();
        let weight = [
            115.0, 117.0, 120.0, 123.0, 126.0, 129.0, 132.0, 135.0, 139.0, 142.0, 146.0, 150.0,
            154.0, 159.0, 164.0,
        ];
        let a = advantage(&height, &weight);
        assert!(rel(a, 10.70224849916422) < 1e-9, "{a}");
        let x1 = [10.0, 8.0, 13.0, 9.0, 11.0, 14.0, 6.0, 4.0, 12.0, 7.0, 5.0];
        let y1 = [
            8.04, 6.95, 7.58, 8.81, 8.33, 9.96, 7.24, 4.26, 10.84, 4.82, 5.68,
        ];
        let a = advantage(&x1, &y1);
        assert!(rel(a, -0.398_432_333_780_566_4) < 1e-9, "{a}");
    }

    /// χ²(0.95, 1) against R 4.2.2 (`qchisq(0.95, 1)` = 3.841458820694124)
    /// through statrs' inverse CDF, and the rule on a series with additive
    /// scatter whose level falls tenfold (the ln scale ruled out) and on one
    /// with multiplicative scatter (invented, deterministic).
    #[test]
    fn the_ln_scale_is_ruled_out_only_by_a_clear_box_cox_margin() {
        use statrs::distribution::ChiSquared;
        let q = ChiSquared::new(1.0).unwrap().inverse_cdf(0.95);
        assert!(((q - 2.0 * BOX_COX_HALF_CHI2_95) / q).abs() < 1e-9, "{q}");
        let wiggle = |i: usize| ((i * 37) % 23) as f64 / 11.0 - 1.0;
        let x: Vec<f64> = (0..200).map(|i| i as f64).collect();
        let additive: Vec<f64> = (0..200)
            .map(|i| 10.0 - 0.045 * i as f64 + 0.3 * wiggle(i))
            .collect();
        let multiplicative: Vec<f64> = (0..200)
            .map(|i| (2.3 - 0.0115 * i as f64 + 0.3 * wiggle(i)).exp())
            .collect();
        for (y, ruled_out) in [(&additive, true), (&multiplicative, false)] {
            let ln: Vec<f64> = y.iter().map(|v| v.ln()).collect();
            let (m, l) = (Moments::from_points(&x, y), Moments::from_points(&x, &ln));
            assert_eq!(
                ln_scale_ruled_out(&m, &l),
                ruled_out,
                "{:?}",
                ln_scale_advantage(&m, &l)
            );
        }
    }

    #[test]
    fn ln_scale_advantage_needs_the_same_points_with_scatter() {
        let x = [1.0, 2.0, 3.0, 4.0];
        let y = [2.0, 4.0, 6.0, 8.0];
        let ln: Vec<f64> = y.iter().map(|v: &f64| v.ln()).collect();
        // An exact line on the original scale: no scatter to compare.
        let exact = Moments::from_points(&x, &y);
        assert_eq!(
            ln_scale_advantage(&exact, &Moments::from_points(&x, &ln)),
            None
        );
        // Different points on the two scales.
        let y = [2.0, 4.5, 6.0, 8.0];
        let three = Moments::from_points(&x[..3], &ln[..3]);
        assert_eq!(
            ln_scale_advantage(&Moments::from_points(&x, &y), &three),
            None
        );
    }

    /// The grid of cutoffs: none below 512, then about 256 points per
    /// doubling, a power of two apart, around every value not on it.
    #[test]
    fn the_cutoff_grid_brackets_each_value_from_512_on() {
        assert!((0..512).all(|v| grid_around(v).is_none()));
        for v in [513usize, 701, 1023, 1025, 4097, 100_003, 10_000_001] {
            let (low, high) = grid_around(v).unwrap();
            let step = high - low;
            assert!(low < v && v < high, "{v}: {low}..{high}");
            assert!(step.is_power_of_two(), "{v}: {step}");
            assert!(
                step <= v / GRID_FROM && 2 * step > v / GRID_FROM,
                "{v}: {step}"
            );
        }
        assert_eq!(grid_around(1024), None);
        assert_eq!(grid_around(100_000 - 100_000 % 256), None);
    }

    /// Deciding from the cutoffs at the neighbouring grid points gives the
    /// exact decision (the t quantile and the median of F computed at the
    /// record's own df or n) on both sides of the cutoff, within round-off
    /// of it, and at it, from short series to a million points. The exact
    /// values are `stats::dist::t_quantile` (checked against R's `qt` in
    /// its own tests) and statrs 0.19's F inverse CDF; this test holds the
    /// grid to them, and the next one holds both to R.
    #[test]
    fn decisions_from_neighbouring_cutoffs_are_the_exact_ones() {
        let mut cache = CutoffCache::default();
        let offsets = [1e-3, 1e-6, 1e-9, 1e-12, 0.0, -1e-12, -1e-9, -1e-6, -1e-3];
        let alpha = 0.001;
        for df in (3..4_000).step_by(37).chain([99_999, 100_003, 1_000_001]) {
            for k in [1usize, 7, 1_000] {
                let exact = t_quantile(1.0 - alpha / (2.0 * k as f64), df as f64);
                for f in offsets {
                    let t = exact * (1.0 + f);
                    let (got, _) = beyond_falling(t, df, &mut |d| cache.outlier_t(d, k, alpha));
                    assert_eq!(got, t > exact, "df {df}, k {k}, t {t}, cutoff {exact}");
                }
            }
        }
        for n in (5..5_000).step_by(41).chain([100_002, 1_000_003]) {
            let exact = FisherSnedecor::new(P as f64, (n - P) as f64)
                .unwrap()
                .inverse_cdf(0.5);
            for f in offsets {
                let d = exact * (1.0 + f);
                let (got, _) = beyond_falling(d, n, &mut |m| cache.median_f(m));
                assert_eq!(got, d > exact, "n {n}, D {d}, cutoff {exact}");
            }
        }
    }

    /// A long series (past the grid's start) flagged for leverage alone
    /// shows every measure with its exact cutoff, the outlier test's and
    /// Cook's among them, though neither was needed to flag it; a routine
    /// record on the same series crosses nothing. Reference values from R
    /// 4.2.2 (Debian r-base-core): `qt(1 - 0.0005, 1998)` =
    /// 3.2954030195709718 and `qf(0.5, 2, 1999)` = 0.69338758280960477.
    #[test]
    fn a_flagged_record_of_a_long_series_shows_every_cutoff() {
        let pts = quarterly(2_000);
        let last = pts[pts.len() - 1].0;
        let line = {
            let mut s = SeriesState::new();
            for &(x, y) in &pts {
                s.add(x, y).unwrap();
            }
            LineFit::from_moments(s.moments(), 0.95).unwrap()
        };
        // Four hundred years beyond a range of five hundred (quarterly
        // from 2010), on the fitted line.
        let far = (last + 400.0, line.predict(last + 400.0));
        let j = judge(&pts, far);
        assert!(j.kinds.contains(&RecordKind::HighLeverage), "{j:?}");
        assert!(!j.kinds.contains(&RecordKind::Outlier), "{j:?}");
        // The prediction t of a newcomer to n points has n - 2 df.
        let df = pts.len() - 2;
        let outlier = j.measures.iter().find(|m| m.kind == "outlier").unwrap();
        assert_eq!(outlier.cutoff, t_quantile(1.0 - 0.001 / 2.0, df as f64));
        let cooks = j
            .measures
            .iter()
            .find(|m| m.measure == "Cook's distance")
            .unwrap();
        let median = FisherSnedecor::new(2.0, (pts.len() + 1 - 2) as f64)
            .unwrap()
            .inverse_cdf(0.5);
        assert_eq!(cooks.cutoff, median);
        assert!((outlier.cutoff / 3.295_403_019_570_972 - 1.0).abs() < 1e-9);
        assert!((cooks.cutoff / 0.693_387_582_809_605 - 1.0).abs() < 1e-9);
        assert!(j.measures.iter().all(|m| m.cutoff.is_finite()), "{j:?}");
        let routine = judge(&pts, (last + 0.25, line.predict(last + 0.25)));
        assert!(routine.kinds.is_empty(), "{routine:?}");
    }

    /// Quarterly series with a small deterministic wiggle (invented).
    fn quarterly(n: usize) -> Vec<(f64, f64)> {
        (0..n)
            .map(|i| {
                let x = 2010.0 + i as f64 * 0.25;
                (
                    x,
                    5.0 + 0.2 * (x - 2010.0) + 0.3 * ((i * 7 % 5) as f64 - 2.0) / 2.0,
                )
            })
            .collect()
    }

    fn judge(points: &[(f64, f64)], newcomer: (f64, f64)) -> RecordJudgement {
        let mut s = SeriesState::new();
        for &(x, y) in points {
            s.add(x, y).unwrap();
        }
        let span = Span {
            min: points.iter().map(|p| p.0).fold(f64::INFINITY, f64::min),
            max: points.iter().map(|p| p.0).fold(f64::NEG_INFINITY, f64::max),
        };
        let a = s.add(newcomer.0, newcomer.1).unwrap();
        judge_record(&a, span, 1, &Thresholds::default()).unwrap()
    }

    #[test]
    fn a_routine_next_quarter_raises_nothing() {
        let pts = quarterly(30);
        let j = judge(&pts, (2017.5, 5.0 + 0.2 * 7.5 + 0.1));
        assert!(j.kinds.is_empty(), "{j:?}");
        // The newest point's leverage is near 4/n, twice the average
        // 2/n; it is expected there.
        assert!(j.leverage > 3.5 / 31.0, "{}", j.leverage);
    }

    /// The outlier rule on its own (the ln(y) screen's) is the very measure
    /// the whole judgement holds: same value, cutoff and verdict, for a
    /// clean newcomer, a slipped one, every k, and a series too short.
    #[test]
    fn the_outlier_rule_alone_matches_the_whole_judgement() {
        let base = quarterly(24);
        let t = Thresholds::default();
        for (newcomer, points) in [
            ((2016.1, 6.3), &base[..]),
            ((2016.1, 63.0), &base[..]),
            ((2016.1, 0.63), &base[..]),
            ((2010.9, 5.2), &base[..3]),
        ] {
            let mut s = SeriesState::new();
            for &(x, y) in points {
                s.add(x, y).unwrap();
            }
            let a = s.add(newcomer.0, newcomer.1).unwrap();
            let span = Span {
                min: 2010.0,
                max: 2016.0,
            };
            for k in [1, 2, 50] {
                let mut cache = CutoffCache::default();
                let alone = outlier_measure(&a, k, &t, &mut cache);
                let whole = judge_record(&a, span, k, &t)
                    .and_then(|j| j.measures.into_iter().find(|m| m.kind == "outlier"));
                assert_eq!(alone, whole, "newcomer {newcomer:?}, k = {k}");
            }
        }
        // The slipped value is caught, the clean one is not.
        let mut s = SeriesState::new();
        for &(x, y) in &base {
            s.add(x, y).unwrap();
        }
        let mut slipped = s;
        let slipped = slipped.add(2016.1, 63.0).unwrap();
        let clean = s.add(2016.1, 6.3).unwrap();
        let mut cache = CutoffCache::default();
        assert!(
            outlier_measure(&slipped, 1, &t, &mut cache)
                .unwrap()
                .crossed
        );
        assert!(!outlier_measure(&clean, 1, &t, &mut cache).unwrap().crossed);
        // Too short to judge: nothing, as for the whole judgement.
        let mut short = SeriesState::new();
        short.add(2010.0, 5.0).unwrap();
        let a = short.add(2010.25, 5.1).unwrap();
        assert_eq!(outlier_measure(&a, 1, &t, &mut cache), None);
    }

    #[test]
    fn a_value_entered_ten_times_too_large_is_an_outlier_and_influential() {
        let pts = quarterly(30);
        let j = judge(&pts, (2017.5, 10.0 * (5.0 + 0.2 * 7.5)));
        assert!(j.kinds.contains(&RecordKind::Outlier), "{j:?}");
        assert!(j.kinds.contains(&RecordKind::Influential), "{j:?}");
    }

    #[test]
    fn a_wrong_year_far_ahead_has_unexpected_leverage() {
        let pts = quarterly(30);
        // 2027 instead of 2017: ten years beyond the surveyed range.
        let j = judge(&pts, (2027.5, 5.0 + 0.2 * 7.5));
        assert!(j.kinds.contains(&RecordKind::HighLeverage), "{j:?}");
    }

    /// Below `min_n_record` only the outlier test speaks (from 5 points
    /// on, its prediction t has df = n − 2 ≥ 3): a value far off the line is
    /// flagged with that one measure, and a record far out in x but on the
    /// line raises nothing. Its cutoff at 5 points is t(1 − 0.001/2, 3) =
    /// 12.923978636688 (R 4.2.2: `qt(1 - 0.0005, 3)`).
    #[test]
    fn short_series_are_judged_by_the_outlier_test_alone() {
        let pts = quarterly(5);
        let mut s = SeriesState::new();
        for &(x, y) in &pts {
            s.add(x, y).unwrap();
        }
        let span = Span {
            min: 2010.0,
            max: 2011.0,
        };
        let off = s.clone().add(2011.25, 100.0).unwrap();
        let j = judge_record(&off, span, 1, &Thresholds::default()).unwrap();
        assert_eq!(j.kinds, [RecordKind::Outlier]);
        assert_eq!(j.measures.len(), 1);
        assert_eq!(j.measures[0].kind, "outlier");
        assert!((j.measures[0].cutoff / 12.923_978_636_688 - 1.0).abs() < 1e-9);
        // Twenty years beyond the range, on the fitted line: no outlier,
        // and leverage is not judged yet.
        let line = LineFit::from_moments(s.moments(), 0.95).unwrap();
        let far = s.clone().add(2030.0, line.predict(2030.0)).unwrap();
        let j = judge_record(&far, span, 1, &Thresholds::default()).unwrap();
        assert!(j.kinds.is_empty(), "{j:?}");
        // Four points before the newcomer: too few to judge it.
        let mut four = SeriesState::new();
        for &(x, y) in &pts[..4] {
            four.add(x, y).unwrap();
        }
        let a = four.add(2011.0, 100.0).unwrap();
        assert!(judge_record(&a, span, 1, &Thresholds::default()).is_none());
    }

    #[test]
    fn bonferroni_raises_the_bar_for_records_judged_together() {
        let pts = quarterly(30);
        let mut s = SeriesState::new();
        for &(x, y) in &pts {
            s.add(x, y).unwrap();
        }
        let a = s.add(2017.5, 5.0 + 0.2 * 7.5 + 1.6).unwrap();
        let span = Span {
            min: 2010.0,
            max: 2017.25,
        };
        let one = judge_record(&a, span, 1, &Thresholds::default()).unwrap();
        let many = judge_record(&a, span, 50, &Thresholds::default()).unwrap();
        let cut = |j: &RecordJudgement| j.measures[0].cutoff;
        assert!(cut(&many) > cut(&one));
    }

    #[test]
    fn smallest_detectable_error_grows_with_scatter() {
        let t = Thresholds::default();
        let a = smallest_detectable_error(30, 0.1, 5.0, false, &t).unwrap();
        let b = smallest_detectable_error(30, 0.2, 5.0, false, &t).unwrap();
        assert!((b / a - 2.0).abs() < 1e-12);
        // t(0.9995, 28) is 3.674 (R: qt(0.9995, 28)); 3.674 * 0.1 * sqrt(31/30) / 5.
        assert!(
            (a - 3.6739 * 0.1 * (31.0f64 / 30.0).sqrt() / 5.0).abs() < 1e-4,
            "{a}"
        );
        assert!(smallest_detectable_error(2, 0.1, 5.0, false, &t).is_none());
    }

    #[test]
    fn significance_has_hysteresis() {
        let t = Thresholds::default();
        assert!(next_significance(false, Some(0.04), 20, &t));
        assert!(!next_significance(false, Some(0.06), 20, &t));
        // Once significant, p between alpha and the release level keeps it.
        assert!(next_significance(true, Some(0.07), 20, &t));
        assert!(!next_significance(true, Some(0.11), 20, &t));
        assert!(!next_significance(true, Some(0.001), 5, &t));
    }

    #[test]
    fn a_p_value_hovering_around_alpha_does_not_flap() {
        let t = Thresholds::default();
        let mut sig = false;
        let mut flips = 0;
        for (i, p) in [0.049, 0.051, 0.048, 0.06, 0.055, 0.045, 0.07, 0.052, 0.049]
            .iter()
            .enumerate()
        {
            let now = next_significance(sig, Some(*p), 20 + i, &t);
            flips += usize::from(now != sig);
            sig = now;
        }
        assert_eq!(flips, 1);
    }

    #[test]
    fn reaching_the_minimum_n_sets_the_state_without_a_finding() {
        // Regression: the 10th arrival of a steep series was reported as
        // "became significant", though it was significant all along.
        let t = Thresholds::default();
        let x: Vec<f64> = (0..10).map(|i| i as f64).collect();
        let y: Vec<f64> = x.iter().map(|v| 1.0 + 2.0 * v + 0.1 * (v % 3.0)).collect();
        let fit = fit_line(&x, &y, 0.95).unwrap();
        let (sig, changes) = judge_trend(Some((2.0, false, 9)), &fit, Some((2.0, Some(1e-6))), &t);
        assert!(sig);
        assert!(changes.is_empty(), "{changes:?}");
    }

    #[test]
    fn a_reversed_significant_slope_is_reported_with_its_cause() {
        let t = Thresholds::default();
        let x: Vec<f64> = (0..20).map(|i| i as f64).collect();
        let y: Vec<f64> = x.iter().map(|v| 10.0 - 0.5 * v + 0.1 * (v % 3.0)).collect();
        let fit = fit_line(&x, &y, 0.95).unwrap();
        let (sig, changes) = judge_trend(Some((0.4, true, 19)), &fit, Some((0.3, Some(0.01))), &t);
        assert!(sig);
        assert_eq!(changes.len(), 1);
        assert_eq!(changes[0].kind, "sign_reversal");
        assert_eq!(changes[0].caused_by_newest, Some(true));
    }
}
