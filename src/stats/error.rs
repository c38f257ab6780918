//! Why a statistic could not be computed.

use thiserror::Error;

/// A fit or test that cannot be computed from the points given.
///
/// Every variant says what was wrong with the input, never "NaN": callers
/// turn these into messages for people (the record, the series, the fix).
#[derive(Debug, Clone, PartialEq, Error)]
pub enum FitError {
    /// Fewer points than the computation needs (`needed` is the minimum).
    #[error("{n} point(s) given; at least {needed} are needed for {what}")]
    TooFewPoints {
        /// Points given.
        n: usize,
        /// Points needed.
        needed: usize,
        /// What was being computed ("a slope with inference", "Mann-Kendall").
        what: &'static str,
    },
    /// Every x is the same, so a slope is undefined.
    #[error("all {n} x values are equal ({x}); a slope is undefined")]
    ConstantX {
        /// Points given.
        n: usize,
        /// The common x value.
        x: f64,
    },
    /// A value is NaN or infinite, or a quantity derived from finite values
    /// overflows (values near 1e300). `index` is the 0-based position in the
    /// input of the point concerned.
    #[error("point {index}: {axis} is not a finite number ({value})")]
    NonFinite {
        /// 0-based position of the point in the input.
        index: usize,
        /// Which coordinate ("x" or "y"), or which derived quantity
        /// overflowed ("pairwise slope", "intercept").
        axis: &'static str,
        /// The offending value, for the message.
        value: f64,
    },
    /// x and y have different lengths.
    #[error("x has {x_len} values but y has {y_len}")]
    LengthMismatch {
        /// Length of x.
        x_len: usize,
        /// Length of y.
        y_len: usize,
    },
    /// A log transform met a value that is zero or negative.
    #[error("point {index}: {axis} = {value} is not positive, so its logarithm is undefined")]
    NonPositiveForLog {
        /// 0-based position of the point in the input.
        index: usize,
        /// Which coordinate: "x" or "y".
        axis: &'static str,
        /// The offending value.
        value: f64,
    },
    /// A confidence level outside (0, 1).
    #[error("confidence level {0} is outside (0, 1); write for example 0.95")]
    BadLevel(f64),
    /// A requested rank is outside the available order statistics.
    #[error("rank {rank} requested but only {count} values exist")]
    RankOutOfRange {
        /// The requested 0-based rank.
        rank: u64,
        /// How many values exist.
        count: u64,
    },
}

/// Checks that `x` and `y` pair up and hold only finite numbers.
pub fn check_finite_pairs(x: &[f64], y: &[f64]) -> Result<(), FitError> {
    if x.len() != y.len() {
        return Err(FitError::LengthMismatch {
            x_len: x.len(),
            y_len: y.len(),
        });
    }
    for (index, (&xi, &yi)) in x.iter().zip(y).enumerate() {
        if !xi.is_finite() {
            return Err(FitError::NonFinite {
                index,
                axis: "x",
                value: xi,
            });
        }
        if !yi.is_finite() {
            return Err(FitError::NonFinite {
                index,
                axis: "y",
                value: yi,
            });
        }
    }
    Ok(())
}

/// Checks a confidence level.
pub fn check_level(level: f64) -> Result<(), FitError> {
    if level.is_finite() && level > 0.0 && level < 1.0 {
        Ok(())
    } else {
        Err(FitError::BadLevel(level))
    }
}
