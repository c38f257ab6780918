//! Least squares of y on x with the usual inference.

use super::dist::{t_quantile, t_two_sided_p};
use super::error::{FitError, check_finite_pairs, check_level};
use super::moments::Moments;

/// Relative scatter below which a line counts as exact: residual SD at most
/// this fraction of the scale of y. Far below any measurement's precision,
/// far above f64 round-off (about 1e-16 per operation).
pub(crate) const EXACT_RELATIVE_SD: f64 = 1e-13;

/// A straight-line least-squares fit of y on x with inference.
///
/// The intercept is reported at x = 0 (as reference tables give it) and, for
/// people, at the mean of x (`level_at_mean_x`), which is better defined when
/// x is a calendar year.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LineFit {
    /// Number of points.
    pub n: usize,
    /// Intercept at x = 0.
    pub intercept: f64,
    /// Slope.
    pub slope: f64,
    /// Standard error of the intercept.
    pub intercept_se: f64,
    /// Standard error of the slope.
    pub slope_se: f64,
    /// t statistic of the slope; `None` for an exact line (no scatter).
    pub slope_t: Option<f64>,
    /// Two-sided p-value of the slope; `None` for an exact line.
    pub slope_p: Option<f64>,
    /// Lower end of the slope's confidence interval.
    pub slope_ci_low: f64,
    /// Upper end of the slope's confidence interval.
    pub slope_ci_high: f64,
    /// Confidence level of the interval, e.g. 0.95.
    pub level: f64,
    /// Coefficient of determination; `None` when every y is equal.
    pub r_squared: Option<f64>,
    /// Residual standard deviation `s = sqrt(SSE / df)`.
    pub residual_sd: f64,
    /// Residual degrees of freedom, n − 2.
    pub df: usize,
    /// Residual sum of squares.
    pub sse: f64,
    /// True when the points lie on a line to within round-off.
    pub exact: bool,
    /// The co-moments the fit was computed from.
    pub moments: Moments,
}

impl LineFit {
    /// Fits from co-moments. Needs n ≥ 3 and varying x.
    pub fn from_moments(m: &Moments, level: f64) -> Result<LineFit, FitError> {
        Self::from_moments_with(m, level, |df| t_quantile(0.5 + level / 2.0, df as f64))
    }

    /// As [`LineFit::from_moments`], taking the t quantile for the interval
    /// from `quantile(df)`: a caller refitting many series at one level can
    /// remember quantiles by df (see [`TQuantiles`]).
    pub fn from_moments_with(
        m: &Moments,
        level: f64,
        quantile: impl FnOnce(usize) -> f64,
    ) -> Result<LineFit, FitError> {
        check_level(level)?;
        let n = m.n() as usize;
        if n < 3 {
            return Err(FitError::TooFewPoints {
                n,
                needed: 3,
                what: "a slope with inference",
            });
        }
        if m.sxx() <= 0.0 {
            return Err(FitError::ConstantX { n, x: m.origin() });
        }
        let nf = n as f64;
        let df = n - 2;
        let dff = df as f64;
        let slope = m.sxy() / m.sxx();
        let mean_x = m.mean_x();
        let intercept = m.mean_y() - slope * mean_x;
        let sse = m.sse().max(0.0);
        let residual_sd = (sse / dff).sqrt();
        let exact = is_exact(residual_sd, m.mean_y(), m.syy(), nf);
        let (residual_sd, sse) = if exact {
            (0.0, 0.0)
        } else {
            (residual_sd, sse)
        };
        let slope_se = residual_sd / m.sxx().sqrt();
        let intercept_se = residual_sd * (1.0 / nf + mean_x * mean_x / m.sxx()).sqrt();
        let (slope_t, slope_p, half_width) = if exact {
            (None, None, 0.0)
        } else {
            let t = slope / slope_se;
            let q = quantile(df);
            (Some(t), Some(t_two_sided_p(t, dff)), q * slope_se)
        };
        let r_squared = (m.syy() > 0.0).then(|| (1.0 - sse / m.syy()).clamp(0.0, 1.0));
        Ok(LineFit {
            n,
            intercept,
            slope,
            intercept_se,
            slope_se,
            slope_t,
            slope_p,
            slope_ci_low: slope - half_width,
            slope_ci_high: slope + half_width,
            level,
            r_squared,
            residual_sd,
            df,
            sse,
            exact,
            moments: *m,
        })
    }

    /// Mean of x, in original units.
    pub fn mean_x(&self) -> f64 {
        self.moments.mean_x()
    }

    /// The fitted line's level at the mean of x (= mean of y), the natural
    /// intercept when x is a calendar year or a distance.
    pub fn level_at_mean_x(&self) -> f64 {
        self.moments.mean_y()
    }

    /// Fitted value at `x`.
    pub fn predict(&self, x: f64) -> f64 {
        self.moments.mean_y()
            + self.slope * ((x - self.moments.origin()) - self.moments.mean_x_shifted())
    }

    /// Standard error of the fitted line at `x`.
    pub fn se_mean_at(&self, x: f64) -> f64 {
        let dx = (x - self.moments.origin()) - self.moments.mean_x_shifted();
        self.residual_sd * (1.0 / self.n as f64 + dx * dx / self.moments.sxx()).sqrt()
    }

    /// Standard error of a new observation at `x` (prediction interval).
    pub fn se_prediction_at(&self, x: f64) -> f64 {
        let dx = (x - self.moments.origin()) - self.moments.mean_x_shifted();
        self.residual_sd * (1.0 + 1.0 / self.n as f64 + dx * dx / self.moments.sxx()).sqrt()
    }

    /// Whether the slope's confidence interval excludes zero.
    pub fn is_significant(&self) -> bool {
        self.slope_ci_low > 0.0 || self.slope_ci_high < 0.0
    }

    /// The fit of the same points without `(x, y)`, from the co-moments in
    /// O(1). The caller guarantees that `(x, y)` is one of the points.
    pub fn without(&self, x: f64, y: f64) -> Result<LineFit, FitError> {
        LineFit::from_moments(&self.moments.without(x, y), self.level)
    }
}

/// Two-sided t quantiles at one confidence level, remembered by degrees of
/// freedom. Owned by the caller (no global cache); the values are exactly
/// what [`t_quantile`] returns.
#[derive(Debug, Clone, PartialEq)]
pub struct TQuantiles {
    level: f64,
    by_df: std::collections::HashMap<usize, f64>,
}

impl TQuantiles {
    /// An empty table for intervals at `level`.
    pub fn new(level: f64) -> Self {
        TQuantiles {
            level,
            by_df: std::collections::HashMap::new(),
        }
    }

    /// The level the table is for.
    pub fn level(&self) -> f64 {
        self.level
    }

    /// t(0.5 + level/2, df).
    pub fn get(&mut self, df: usize) -> f64 {
        let level = self.level;
        *self
            .by_df
            .entry(df)
            .or_insert_with(|| t_quantile(0.5 + level / 2.0, df as f64))
    }
}

/// Whether a residual SD is round-off relative to the scale of y.
pub(crate) fn is_exact(residual_sd: f64, mean_y: f64, syy: f64, n: f64) -> bool {
    let scale = mean_y.abs().max((syy / n).sqrt());
    residual_sd <= EXACT_RELATIVE_SD * scale
}

/// Fits y on x by the centred two-pass method.
///
/// Errors: fewer than 3 points, all x equal, NaN or infinite input, x and y
/// of different lengths, a level outside (0, 1).
pub fn fit_line(x: &[f64], y: &[f64], level: f64) -> Result<LineFit, FitError> {
    check_finite_pairs(x, y)?;
    check_level(level)?;
    LineFit::from_moments(&Moments::from_points(x, y), level)
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    #[test]
    fn remembered_quantiles_give_the_same_fit() {
        let x = [1.0, 2.0, 3.5, 4.0, 6.0];
        let y = [2.0, 2.9, 4.4, 5.2, 6.8];
        let m = Moments::from_points(&x, &y);
        let mut table = TQuantiles::new(0.95);
        let a = LineFit::from_moments(&m, 0.95).unwrap();
        let b = LineFit::from_moments_with(&m, 0.95, |df| table.get(df)).unwrap();
        let c = LineFit::from_moments_with(&m, 0.95, |df| table.get(df)).unwrap();
        assert_eq!(a, b);
        assert_eq!(b, c);
    }

    #[test]
    fn rejects_fewer_than_three_points() {
        let err = fit_line(&[1.0, 2.0], &[1.0, 2.0], 0.95).unwrap_err();
        assert!(matches!(
            err,
            FitError::TooFewPoints {
                n: 2,
                needed: 3,
                ..
            }
        ));
    }

    #[test]
    fn rejects_constant_x() {
        let err = fit_line(&[4.0; 5], &[1.0, 2.0, 3.0, 4.0, 5.0], 0.95).unwrap_err();
        assert!(matches!(err, FitError::ConstantX { n: 5, .. }));
    }

    #[test]
    fn rejects_non_finite_input_naming_the_point() {
        let err = fit_line(&[1.0, 2.0, 3.0], &[1.0, f64::NAN, 3.0], 0.95).unwrap_err();
        assert!(matches!(
            err,
            FitError::NonFinite {
                index: 1,
                axis: "y",
                ..
            }
        ));
        let err = fit_line(&[1.0, f64::INFINITY, 3.0], &[1.0, 2.0, 3.0], 0.95).unwrap_err();
        assert!(matches!(
            err,
            FitError::NonFinite {
                index: 1,
                axis: "x",
                ..
            }
        ));
    }

    #[test]
    fn exact_line_has_no_t_or_p_and_a_zero_width_interval() {
        let x = [2019.25, 2019.5, 2019.75, 2020.0, 2020.25];
        let y: Vec<f64> = x.iter().map(|v| 3.0 * (v - 2019.0) + 1.0).collect();
        let fit = fit_line(&x, &y, 0.95).unwrap();
        assert!(fit.exact);
        assert_eq!(fit.slope_t, None);
        assert_eq!(fit.slope_p, None);
        assert!((fit.slope - 3.0).abs() < 1e-9);
        assert_eq!(fit.slope_ci_low, fit.slope);
        assert_eq!(fit.residual_sd, 0.0);
        assert_eq!(fit.r_squared, Some(1.0));
    }

    #[test]
    fn constant_y_gives_zero_slope_and_no_r_squared() {
        let fit = fit_line(&[1.0, 2.0, 3.0, 4.0], &[5.0; 4], 0.95).unwrap();
        assert_eq!(fit.slope, 0.0);
        assert!(fit.exact);
        assert_eq!(fit.r_squared, None);
    }
}
