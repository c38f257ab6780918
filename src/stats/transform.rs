//! Per-series transforms (none, ln y, ln x, ln-ln) and results in original
//! units.
//!
//! Concentrations are usually right-skewed with spread growing with level,
//! so ln y often gives even residuals; ln C = ln C₀ − k·t is first-order
//! decay; ln y on ln x is a power law whose slope is the exponent
//! (METHODS.md §7).

use serde::{Deserialize, Serialize};

use super::error::FitError;
use super::line::LineFit;

/// The scale a series is fitted on.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Default, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Transform {
    /// y on x.
    #[default]
    None,
    /// ln y on x (exponential change).
    LogY,
    /// y on ln x.
    LogX,
    /// ln y on ln x (power law).
    LogLog,
}

impl Transform {
    /// The name used in configuration and on the command line.
    pub fn name(self) -> &'static str {
        match self {
            Transform::None => "none",
            Transform::LogY => "log-y",
            Transform::LogX => "log-x",
            Transform::LogLog => "log-log",
        }
    }

    /// Parses a name as written by [`Transform::name`].
    pub fn from_name(name: &str) -> Option<Transform> {
        match name {
            "none" => Some(Transform::None),
            "log-y" => Some(Transform::LogY),
            "log-x" => Some(Transform::LogX),
            "log-log" => Some(Transform::LogLog),
            _ => None,
        }
    }

    fn logs_x(self) -> bool {
        matches!(self, Transform::LogX | Transform::LogLog)
    }

    fn logs_y(self) -> bool {
        matches!(self, Transform::LogY | Transform::LogLog)
    }

    /// One point on the fitted scale. `index` names the point in errors.
    pub fn apply(self, index: usize, x: f64, y: f64) -> Result<(f64, f64), FitError> {
        let tx = if self.logs_x() {
            ln_positive(index, "x", x)?
        } else {
            x
        };
        let ty = if self.logs_y() {
            ln_positive(index, "y", y)?
        } else {
            y
        };
        Ok((tx, ty))
    }

    /// The slope and its interval expressed in original units, where that
    /// reads better than the fitted scale.
    pub fn original_units(self, fit: &LineFit) -> Option<OriginalUnits> {
        let pct = |b: f64| 100.0 * b.exp_m1();
        match self {
            Transform::None => None,
            Transform::LogY => Some(OriginalUnits {
                what: "percent change in y per unit of x (the median, not the mean)",
                estimate: pct(fit.slope),
                low: pct(fit.slope_ci_low),
                high: pct(fit.slope_ci_high),
            }),
            Transform::LogX => {
                let l2 = std::f64::consts::LN_2;
                Some(OriginalUnits {
                    what: "change in y per doubling of x",
                    estimate: fit.slope * l2,
                    low: fit.slope_ci_low * l2,
                    high: fit.slope_ci_high * l2,
                })
            }
            Transform::LogLog => {
                let per_doubling = |b: f64| 100.0 * (b * std::f64::consts::LN_2).exp_m1();
                Some(OriginalUnits {
                    what: "percent change in y per doubling of x (power-law exponent = slope)",
                    estimate: per_doubling(fit.slope),
                    low: per_doubling(fit.slope_ci_low),
                    high: per_doubling(fit.slope_ci_high),
                })
            }
        }
    }
}

impl std::fmt::Display for Transform {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.name())
    }
}

/// A slope restated in original units, with its interval.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct OriginalUnits {
    /// What the numbers mean.
    pub what: &'static str,
    /// The estimate.
    pub estimate: f64,
    /// Lower end of the interval.
    pub low: f64,
    /// Upper end of the interval.
    pub high: f64,
}

fn ln_positive(index: usize, axis: &'static str, value: f64) -> Result<f64, FitError> {
    if !value.is_finite() {
        return Err(FitError::NonFinite { index, axis, value });
    }
    if value <= 0.0 {
        return Err(FitError::NonPositiveForLog { index, axis, value });
    }
    Ok(value.ln())
}

/// All points on the fitted scale; the first non-positive value under a log
/// is an error naming its 0-based index.
pub fn transform_points(
    x: &[f64],
    y: &[f64],
    t: Transform,
) -> Result<(Vec<f64>, Vec<f64>), FitError> {
    if x.len() != y.len() {
        return Err(FitError::LengthMismatch {
            x_len: x.len(),
            y_len: y.len(),
        });
    }
    let mut tx = Vec::with_capacity(x.len());
    let mut ty = Vec::with_capacity(y.len());
    for (i, (&a, &b)) in x.iter().zip(y).enumerate() {
        let (p, q) = t.apply(i, a, b)?;
        tx.push(p);
        ty.push(q);
    }
    Ok((tx, ty))
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::super::line::fit_line;
    use super::*;

    #[test]
    fn log_of_non_positive_value_names_the_point() {
        let err =
            transform_points(&[1.0, 2.0, 3.0], &[4.0, 0.0, 1.0], Transform::LogY).unwrap_err();
        assert_eq!(
            err,
            FitError::NonPositiveForLog {
                index: 1,
                axis: "y",
                value: 0.0
            }
        );
        let err = transform_points(&[1.0, -2.0], &[4.0, 1.0], Transform::LogLog).unwrap_err();
        assert!(matches!(
            err,
            FitError::NonPositiveForLog {
                index: 1,
                axis: "x",
                ..
            }
        ));
    }

    #[test]
    fn log_y_slope_reads_as_percent_change() {
        // y halves every unit of x: ln y falls by ln 2 per unit, −50 % per unit.
        let x = [0.0, 1.0, 2.0, 3.0];
        let y = [80.0, 40.0, 20.0, 10.0];
        let (tx, ty) = transform_points(&x, &y, Transform::LogY).unwrap();
        let fit = fit_line(&tx, &ty, 0.95).unwrap();
        let o = Transform::LogY.original_units(&fit).unwrap();
        assert!((o.estimate + 50.0).abs() < 1e-9);
    }

    #[test]
    fn names_round_trip() {
        for t in [
            Transform::None,
            Transform::LogY,
            Transform::LogX,
            Transform::LogLog,
        ] {
            assert_eq!(Transform::from_name(t.name()), Some(t));
        }
    }
}
