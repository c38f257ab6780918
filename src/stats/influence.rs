//! Influence diagnostics for every point of a straight-line fit, in closed
//! form, and the fit with and without any one point.
//!
//! Formulas (Belsley, Kuh & Welsch 1980; Cook 1977; the project's
//! METHODS.md §2), with p = 2 coefficients, h the hat value, e the residual,
//! s the residual SD and s₍ᵢ₎ the residual SD without the point:
//!
//! - standardized residual r = e / (s √(1 − h))
//! - studentized residual  t = e / (s₍ᵢ₎ √(1 − h)), s₍ᵢ₎² = (SSE − e²/(1 − h)) / (n − 3)
//! - Cook's D = r²/p · h/(1 − h); DFFITS = t √(h/(1 − h))
//! - DFBETAS_j = (b_j − b_j₍ᵢ₎) / (s₍ᵢ₎ √[(XᵀX)⁻¹]_jj), positive when leaving
//!   the point out lowers the coefficient (the sign R and statsmodels use)
//! - COVRATIO = (s₍ᵢ₎²/s²)^p / (1 − h)

use super::error::FitError;
use super::line::{LineFit, is_exact};
use super::moments::Moments;

/// Leverage above `1 − LEVERAGE_ONE_GAP` counts as 1: the other points all
/// share one x, and the point fixes the slope alone (METHODS.md §2).
const LEVERAGE_ONE_GAP: f64 = 1e-9;

/// When leaving a point out would remove more than this share of the
/// residual sum of squares, the O(1) downdate cancels too many digits and
/// the fit without the point is recomputed from the data.
const DOWNDATE_CANCELLATION: f64 = 1.0 - 1e-3;

/// Why some leave-one-out measures of a point are absent.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Undefined {
    /// Leverage 1: every other point shares one x, so this point alone fixes
    /// the slope; leaving it out leaves no slope at all.
    FixesFitAlone,
    /// The points lie exactly on a line: there is no scatter to scale by.
    ExactLine,
    /// Only 3 points: the fit without one has no residual degrees of
    /// freedom, so s₍ᵢ₎ and everything built on it are undefined.
    NoLeaveOneOutDf,
    /// Without this point the others lie exactly on a line: its
    /// externally studentized residual is unbounded.
    ExactWithout,
}

impl Undefined {
    /// A sentence for people.
    pub fn explain(self) -> &'static str {
        match self {
            Undefined::FixesFitAlone => {
                "leverage 1: this point alone fixes the slope; leave-one-out measures are undefined"
            }
            Undefined::ExactLine => {
                "the points lie exactly on a line; scaled measures are undefined"
            }
            Undefined::NoLeaveOneOutDf => {
                "only 3 points: the fit without this point has no residual degrees of freedom"
            }
            Undefined::ExactWithout => {
                "without this point the rest lie exactly on a line; its studentized residual is unbounded"
            }
        }
    }
}

/// The influence diagnostics of one point in a straight-line fit.
///
/// Accessors return `None` for measures that are undefined for this point,
/// and [`PointInfluence::undefined`] says why. 80 bytes, so a million points
/// fit in memory comfortably.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PointInfluence {
    leverage: f64,
    residual: f64,
    standardized: f64,
    studentized: f64,
    cooks: f64,
    dffits: f64,
    dfbetas_intercept: f64,
    dfbetas_slope: f64,
    covratio: f64,
    undefined: Option<Undefined>,
}

impl PointInfluence {
    /// Hat value h (leverage), in [1/n, 1].
    pub fn leverage(&self) -> f64 {
        self.leverage
    }
    /// Raw residual y − ŷ.
    pub fn residual(&self) -> f64 {
        self.residual
    }
    /// Internally studentized residual e / (s √(1 − h)).
    pub fn standardized_residual(&self) -> Option<f64> {
        self.has_internal().then_some(self.standardized)
    }
    /// Externally studentized residual e / (s₍ᵢ₎ √(1 − h)).
    pub fn studentized_residual(&self) -> Option<f64> {
        self.has_external().then_some(self.studentized)
    }
    /// Cook's distance.
    pub fn cooks_distance(&self) -> Option<f64> {
        self.has_internal().then_some(self.cooks)
    }
    /// DFFITS.
    pub fn dffits(&self) -> Option<f64> {
        self.has_external().then_some(self.dffits)
    }
    /// DFBETAS for the intercept (at x = 0).
    pub fn dfbetas_intercept(&self) -> Option<f64> {
        self.has_external().then_some(self.dfbetas_intercept)
    }
    /// DFBETAS for the slope.
    pub fn dfbetas_slope(&self) -> Option<f64> {
        self.has_external().then_some(self.dfbetas_slope)
    }
    /// Covariance ratio (COVRATIO).
    pub fn covariance_ratio(&self) -> Option<f64> {
        match self.undefined {
            None | Some(Undefined::ExactWithout) => Some(self.covratio),
            _ => None,
        }
    }
    /// Why some measures are absent, if any are.
    pub fn undefined(&self) -> Option<Undefined> {
        self.undefined
    }

    fn has_internal(&self) -> bool {
        matches!(
            self.undefined,
            None | Some(Undefined::NoLeaveOneOutDf) | Some(Undefined::ExactWithout)
        )
    }
    fn has_external(&self) -> bool {
        self.undefined.is_none()
    }
}

/// What the closed forms need to know about one point and its fit.
#[derive(Debug, Clone, Copy)]
pub(crate) struct PointTerms {
    /// Number of points in the fit.
    pub n: f64,
    /// x − x̄.
    pub dx: f64,
    /// Residual in the fit.
    pub e: f64,
    /// Hat value.
    pub h: f64,
    /// 1 − h, computed as accurately as the caller can.
    pub one_minus_h: f64,
    /// Σ(x − x̄)² of the fit.
    pub sxx: f64,
    /// Mean of x in original units (for the intercept at x = 0).
    pub mean_x: f64,
    /// Residual SD of the fit (0 for an exact line).
    pub s: f64,
    /// Whether the fit is an exact line.
    pub exact: bool,
    /// Residual sum of squares without the point.
    pub sse_without: f64,
    /// Whether the fit without the point is an exact line.
    pub exact_without: bool,
}

/// The closed forms, shared by the batch and the streaming paths.
pub(crate) fn point_influence(t: PointTerms) -> PointInfluence {
    let mut out = PointInfluence {
        leverage: t.h.min(1.0),
        residual: t.e,
        standardized: 0.0,
        studentized: 0.0,
        cooks: 0.0,
        dffits: 0.0,
        dfbetas_intercept: 0.0,
        dfbetas_slope: 0.0,
        covratio: 0.0,
        undefined: None,
    };
    if t.one_minus_h <= LEVERAGE_ONE_GAP {
        out.leverage = 1.0;
        out.undefined = Some(Undefined::FixesFitAlone);
        return out;
    }
    if t.exact {
        out.undefined = Some(Undefined::ExactLine);
        return out;
    }
    let sqrt_omh = t.one_minus_h.sqrt();
    let r = t.e / (t.s * sqrt_omh);
    out.standardized = r;
    out.cooks = r * r / 2.0 * t.h / t.one_minus_h;
    if t.n < 4.0 {
        out.undefined = Some(Undefined::NoLeaveOneOutDf);
        return out;
    }
    let s2_i = (t.sse_without / (t.n - 3.0)).max(0.0);
    let s2 = t.s * t.s;
    out.covratio = (s2_i / s2).powi(2) / t.one_minus_h;
    if t.exact_without || s2_i <= 0.0 {
        out.undefined = Some(Undefined::ExactWithout);
        return out;
    }
    let s_i = s2_i.sqrt();
    let stud = t.e / (s_i * sqrt_omh);
    out.studentized = stud;
    out.dffits = stud * (t.h / t.one_minus_h).sqrt();
    let sqrt_sxx = t.sxx.sqrt();
    out.dfbetas_slope = t.dx * t.e / (sqrt_sxx * t.one_minus_h * s_i);
    let c00 = 1.0 / t.n + t.mean_x * t.mean_x / t.sxx;
    let delta_b0 = (1.0 / t.n - t.mean_x * t.dx / t.sxx) * t.e / t.one_minus_h;
    out.dfbetas_intercept = delta_b0 / (s_i * c00.sqrt());
    out
}

/// Diagnostics for every point of `fit`, in input order, collected into a
/// vector (80 bytes a point). [`Influence`] computes the same values on
/// demand without storing them.
///
/// `x` and `y` must be the points `fit` was computed from (same scale, same
/// order); they are checked for length only.
pub fn influence(x: &[f64], y: &[f64], fit: &LineFit) -> Result<Vec<PointInfluence>, FitError> {
    let mut out = Vec::new();
    influence_into(x, y, fit, &mut out)?;
    Ok(out)
}

/// As [`influence`], writing into `out` (cleared first) so that a caller
/// diagnosing many fits reuses one allocation.
pub fn influence_into(
    x: &[f64],
    y: &[f64],
    fit: &LineFit,
    out: &mut Vec<PointInfluence>,
) -> Result<(), FitError> {
    let view = Influence::new(x, y, fit)?;
    out.clear();
    out.reserve(fit.n);
    out.extend(view.iter());
    Ok(())
}

/// Every point's diagnostics, each computed in O(1) when asked for, with no
/// storage: scanning all of them costs one pass over the data.
#[derive(Debug, Clone, Copy)]
pub struct Influence<'a> {
    x: &'a [f64],
    y: &'a [f64],
    fit: &'a LineFit,
    n: f64,
    origin: f64,
    mx: f64,
    my: f64,
    sxx: f64,
    inv_sxx: f64,
    inv_n: f64,
    n1_over_n: f64,
    df_i: f64,
    exact_s2: f64,
    cancel_at: f64,
    mean_x: f64,
}

impl<'a> Influence<'a> {
    /// A view over the points of `fit`; `x` and `y` must be its points (same
    /// scale, same order), checked for length only.
    pub fn new(x: &'a [f64], y: &'a [f64], fit: &'a LineFit) -> Result<Influence<'a>, FitError> {
        if x.len() != y.len() || x.len() != fit.n {
            return Err(FitError::LengthMismatch {
                x_len: x.len(),
                y_len: y.len(),
            });
        }
        let m = &fit.moments;
        let n = fit.n as f64;
        let my = m.mean_y();
        // s₍ᵢ₎ at or below this is an exact line without the point (see is_exact).
        let scale = my.abs().max((m.syy() / n).sqrt());
        let t = super::line::EXACT_RELATIVE_SD * scale;
        Ok(Influence {
            x,
            y,
            fit,
            n,
            origin: m.origin(),
            mx: m.mean_x_shifted(),
            my,
            sxx: m.sxx(),
            inv_sxx: 1.0 / m.sxx(),
            inv_n: 1.0 / n,
            n1_over_n: (n - 1.0) / n,
            df_i: (n - 3.0).max(1.0),
            exact_s2: t * t,
            cancel_at: DOWNDATE_CANCELLATION * fit.sse,
            mean_x: m.mean_x(),
        })
    }

    /// Number of points.
    pub fn len(&self) -> usize {
        self.fit.n
    }

    /// Whether there are no points (never, for a valid fit).
    pub fn is_empty(&self) -> bool {
        self.fit.n == 0
    }

    /// The diagnostics of point `i` (0-based); `None` past the end.
    pub fn get(&self, i: usize) -> Option<PointInfluence> {
        let (&xi, &yi) = (self.x.get(i)?, self.y.get(i)?);
        let dx = (xi - self.origin) - self.mx;
        let e = (yi - self.my) - self.fit.slope * dx;
        let dx2 = dx * dx * self.inv_sxx;
        let h = self.inv_n + dx2;
        let one_minus_h = self.n1_over_n - dx2;
        let reduction = if one_minus_h > 0.0 {
            e * e / one_minus_h
        } else {
            0.0
        };
        let (sse_without, exact_without) =
            if !self.fit.exact && one_minus_h > LEVERAGE_ONE_GAP && reduction > self.cancel_at {
                // Almost all the scatter sits in this point: recompute the
                // fit without it from the data instead of subtracting.
                let rest = moments_without(self.x, self.y, i);
                let s_rest = (rest.sse() / self.df_i).sqrt();
                let exact = is_exact(s_rest, rest.mean_y(), rest.syy(), self.n - 1.0);
                (if exact { 0.0 } else { rest.sse() }, exact)
            } else {
                let sse_i = (self.fit.sse - reduction).max(0.0);
                (sse_i, sse_i / self.df_i <= self.exact_s2)
            };
        Some(point_influence(PointTerms {
            n: self.n,
            dx,
            e,
            h,
            one_minus_h,
            sxx: self.sxx,
            mean_x: self.mean_x,
            s: self.fit.residual_sd,
            exact: self.fit.exact,
            sse_without,
            exact_without,
        }))
    }

    /// Every point's diagnostics, in input order.
    pub fn iter(&self) -> impl Iterator<Item = PointInfluence> + '_ {
        (0..self.fit.n).filter_map(move |i| self.get(i))
    }
}

fn moments_without(x: &[f64], y: &[f64], skip: usize) -> Moments {
    let keep = |v: &[f64]| -> Vec<f64> {
        v.iter()
            .enumerate()
            .filter(|&(j, _)| j != skip)
            .map(|(_, &a)| a)
            .collect()
    };
    Moments::from_points(&keep(x), &keep(y))
}

/// The fit with and without one point: the comparison every finding shows.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LeaveOneOut {
    /// The fit with every point.
    pub with: LineFit,
    /// The fit without the point.
    pub without: LineFit,
}

impl LeaveOneOut {
    /// Whether the two slopes point different ways (zero counts as no sign).
    pub fn sign_changed(&self) -> bool {
        self.with.slope.signum() != self.without.slope.signum()
            && self.with.slope != 0.0
            && self.without.slope != 0.0
    }
    /// Whether the slope is significant at the fit's level in one fit and
    /// not in the other.
    pub fn significance_changed(&self) -> bool {
        self.with.is_significant() != self.without.is_significant()
    }
    /// Slope with minus slope without.
    pub fn slope_shift(&self) -> f64 {
        self.with.slope - self.without.slope
    }
}

/// The fit without point `i`: O(1) from the co-moments, or recomputed from
/// the data when the point holds almost all the scatter (see module docs).
pub fn leave_one_out(
    x: &[f64],
    y: &[f64],
    fit: &LineFit,
    i: usize,
) -> Result<LeaveOneOut, FitError> {
    if x.len() != y.len() || x.len() != fit.n || i >= fit.n {
        return Err(FitError::LengthMismatch {
            x_len: x.len(),
            y_len: y.len(),
        });
    }
    let m = &fit.moments;
    let dx = (x[i] - m.origin()) - m.mean_x_shifted();
    let n = fit.n as f64;
    let one_minus_h = (n - 1.0) / n - dx * dx / m.sxx();
    let e = (y[i] - m.mean_y()) - fit.slope * dx;
    let risky = one_minus_h <= 1e-6
        || (one_minus_h > 0.0 && e * e / one_minus_h > DOWNDATE_CANCELLATION * fit.sse);
    let rest = if risky {
        moments_without(x, y, i)
    } else {
        m.without(x[i], y[i])
    };
    Ok(LeaveOneOut {
        with: *fit,
        without: LineFit::from_moments(&rest, fit.level)?,
    })
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::super::line::fit_line;
    use super::*;

    #[test]
    fn three_points_have_no_leave_one_out_measures() {
        let x = [1.0, 2.0, 4.0];
        let y = [1.0, 3.0, 2.0];
        let fit = fit_line(&x, &y, 0.95).unwrap();
        let inf = influence(&x, &y, &fit).unwrap();
        for p in &inf {
            assert_eq!(p.undefined(), Some(Undefined::NoLeaveOneOutDf));
            assert!(p.standardized_residual().is_some());
            assert!(p.cooks_distance().is_some());
            assert_eq!(p.studentized_residual(), None);
            assert_eq!(p.dffits(), None);
            assert_eq!(p.covariance_ratio(), None);
        }
    }

    #[test]
    fn one_point_off_an_exact_line_is_unbounded_but_not_infinite() {
        let x = [1.0, 2.0, 3.0, 4.0, 5.0, 6.0];
        let y = [2.0, 4.0, 6.0, 8.0, 10.0, 30.0];
        let fit = fit_line(&x, &y, 0.95).unwrap();
        let inf = influence(&x, &y, &fit).unwrap();
        assert_eq!(inf[5].undefined(), Some(Undefined::ExactWithout));
        assert_eq!(inf[5].studentized_residual(), None);
        assert_eq!(inf[5].covariance_ratio(), Some(0.0));
        assert!(inf[0].studentized_residual().unwrap().is_finite());
        let loo = leave_one_out(&x, &y, &fit, 5).unwrap();
        assert!((loo.without.slope - 2.0).abs() < 1e-12);
        assert!(loo.without.exact);
    }

    #[test]
    fn leave_one_out_matches_refit_without_the_point() {
        let x = [1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 20.0];
        let y = [1.2, 1.9, 3.2, 3.8, 5.1, 6.2, 2.0];
        let fit = fit_line(&x, &y, 0.95).unwrap();
        let loo = leave_one_out(&x, &y, &fit, 6).unwrap();
        let refit = fit_line(&x[..6], &y[..6], 0.95).unwrap();
        assert!((loo.without.slope - refit.slope).abs() < 1e-12);
        assert!((loo.without.slope_se - refit.slope_se).abs() < 1e-12);
        assert!(loo.without.is_significant());
        assert!(loo.significance_changed() || loo.sign_changed() || loo.slope_shift() < 0.0);
    }
}
