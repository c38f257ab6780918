//! Pure statistics for straight-line trends: no I/O, no clock, no globals.
//!
//! Everything here is a function of the numbers passed in, so every result
//! can be recomputed later from stored records and checked against outside
//! references (see `tests/reference_*.rs`).
//!
//! Main types:
//! - [`Moments`]: centred co-moments of (x, y), updated in O(1) per point
//!   added or removed (Welford-style), with a fixed per-series x origin.
//! - [`LineFit`]: least squares of y on x with inference (standard errors,
//!   t, two-sided p, confidence interval, R², residual SD).
//! - [`PointInfluence`], [`Influence`] and [`influence`]: leverage, standardized and
//!   studentized residuals, Cook's distance, DFFITS, DFBETAS, covariance
//!   ratio for every point, closed forms for the straight line.
//! - [`general`]: the same diagnostics for any number of coefficients via QR
//!   (nalgebra), used to cross-check the closed forms.
//! - [`SeriesState`]: the per-series streaming state; `add` returns the new
//!   point's own diagnostics and the fit with and without it.
//! - [`robust`]: Theil-Sen slope with its confidence interval, Mann-Kendall.
//! - [`pairwise`]: the same two kept current point by point for a short
//!   series (sorted pairwise slopes, running S).
//! - [`Transform`]: none, ln y, ln x, ln-ln, with results in original units.
//! - [`durbin_watson`]: serial correlation of x-ordered residuals.
//!
//! Invariant: no function here returns NaN or infinity. Quantities that are
//! undefined for the data (a point that fixes the fit alone, a perfect line,
//! too few degrees of freedom) are `None`, with the reason available.

pub mod cutoffs;
pub mod dist;
mod error;
pub mod general;
mod influence;
mod line;
mod moments;
pub mod pairwise;
pub mod robust;
mod serial;
mod slope_select;
mod streaming;
mod transform;

pub use error::{FitError, check_finite_pairs, check_level};
pub use influence::{
    Influence, LeaveOneOut, PointInfluence, Undefined, influence, influence_into, leave_one_out,
};
pub use line::{LineFit, TQuantiles, fit_line};
pub use moments::{Moments, MomentsParts};
pub use serial::durbin_watson;
pub use streaming::{Arrival, SeriesState};
pub use transform::{OriginalUnits, Transform, transform_points};
