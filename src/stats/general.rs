//! Least squares and influence diagnostics for any number of coefficients,
//! through a QR factorisation of the design matrix (nalgebra).
//!
//! This path never forms XᵀX or its inverse: with X = QR, the hat values
//! are the squared row norms of Q, the coefficient changes on deleting
//! point i are `R⁻¹ qᵢ eᵢ / (1 − hᵢ)` (qᵢ the i-th row of Q), and
//! `diag((XᵀX)⁻¹)` is the squared row norms of `R⁻¹`, found by triangular
//! solves. It cross-checks the straight-line closed forms in tests and is
//! ready for a quadratic term.

use nalgebra::{DMatrix, DVector};

use super::error::{FitError, check_finite_pairs};

/// A column is treated as linearly dependent on the others when its
/// diagonal entry of R falls below this share of the column's norm.
const RANK_TOLERANCE: f64 = 1e-12;

/// When deleting a point would remove more than this share of the residual
/// sum of squares, `SSE − e²/(1 − h)` cancels too many digits, and the fit
/// without the point is solved again from its rows (as the straight-line
/// closed forms do).
const DOWNDATE_CANCELLATION: f64 = 1.0 - 1e-3;

/// Influence diagnostics of one point in a general linear fit.
#[derive(Debug, Clone, PartialEq)]
pub struct GeneralPoint {
    /// Hat value.
    pub leverage: f64,
    /// Residual y − ŷ.
    pub residual: f64,
    /// e / (s √(1 − h)); `None` at leverage 1 or without scatter.
    pub standardized_residual: Option<f64>,
    /// e / (s₍ᵢ₎ √(1 − h)); `None` where s₍ᵢ₎ is undefined or zero.
    pub studentized_residual: Option<f64>,
    /// Cook's distance.
    pub cooks_distance: Option<f64>,
    /// DFFITS.
    pub dffits: Option<f64>,
    /// DFBETAS, one per coefficient.
    pub dfbetas: Option<Vec<f64>>,
    /// Covariance ratio.
    pub covariance_ratio: Option<f64>,
}

/// A general least-squares fit with per-point diagnostics.
#[derive(Debug, Clone, PartialEq)]
pub struct GeneralFit {
    /// Coefficients, in the order of the design's columns.
    pub coefficients: Vec<f64>,
    /// Their standard errors.
    pub standard_errors: Vec<f64>,
    /// Residual standard deviation.
    pub residual_sd: f64,
    /// Residual degrees of freedom, n − p.
    pub df: usize,
    /// Diagnostics for every point, in input order.
    pub points: Vec<GeneralPoint>,
}

/// The design `[1, x]` of a straight line.
pub fn line_design(x: &[f64]) -> DMatrix<f64> {
    DMatrix::from_fn(x.len(), 2, |i, j| if j == 0 { 1.0 } else { x[i] })
}

/// The residual sum of squares of the fit without row `skip`, solved from
/// the remaining rows; `None` if they do not determine the coefficients.
fn sse_without_row(design: &DMatrix<f64>, y: &[f64], skip: usize) -> Option<f64> {
    let rows: Vec<usize> = (0..design.nrows()).filter(|&i| i != skip).collect();
    let d = design.select_rows(rows.iter());
    let yv = DVector::from_iterator(rows.len(), rows.iter().map(|&i| y[i]));
    let qr = d.clone().qr();
    let beta = qr.r().solve_upper_triangular(&(qr.q().transpose() * &yv))?;
    let resid = yv - d * beta;
    Some(resid.iter().map(|e| e * e).sum())
}

/// The design `[1, x, x²]` of a quadratic trend.
pub fn quadratic_design(x: &[f64]) -> DMatrix<f64> {
    DMatrix::from_fn(x.len(), 3, |i, j| x[i].powi(j as i32))
}

/// Fits `y` on the columns of `design` and computes every diagnostic.
///
/// Errors: fewer than p + 1 points, a design whose columns are linearly
/// dependent (for a line: all x equal), non-finite values.
pub fn fit_general(design: &DMatrix<f64>, y: &[f64]) -> Result<GeneralFit, FitError> {
    let (n, p) = design.shape();
    if y.len() != n {
        return Err(FitError::LengthMismatch {
            x_len: n,
            y_len: y.len(),
        });
    }
    let col1: Vec<f64> = if p > 1 {
        design.column(1).iter().copied().collect()
    } else {
        vec![0.0; n]
    };
    check_finite_pairs(&col1, y)?;
    if n < p + 1 {
        return Err(FitError::TooFewPoints {
            n,
            needed: p + 1,
            what: "a fit with inference",
        });
    }
    let qr = design.clone().qr();
    let q = qr.q();
    let r = qr.r();
    for j in 0..p {
        let norm = design.column(j).norm();
        if r[(j, j)].abs() <= RANK_TOLERANCE * norm.max(f64::MIN_POSITIVE) {
            return Err(FitError::ConstantX {
                n,
                x: col1.first().copied().unwrap_or(0.0),
            });
        }
    }
    let yv = DVector::from_column_slice(y);
    let qty = q.transpose() * &yv;
    let Some(beta) = r.solve_upper_triangular(&qty) else {
        return Err(FitError::ConstantX {
            n,
            x: col1.first().copied().unwrap_or(0.0),
        });
    };
    let Some(r_inv) = r.solve_upper_triangular(&DMatrix::identity(p, p)) else {
        return Err(FitError::ConstantX {
            n,
            x: col1.first().copied().unwrap_or(0.0),
        });
    };
    let fitted = design * &beta;
    let resid = &yv - fitted;
    let sse: f64 = resid.iter().map(|e| e * e).sum();
    let df = n - p;
    let s2 = sse / df as f64;
    let s = s2.sqrt();
    let c_diag: Vec<f64> = (0..p).map(|j| r_inv.row(j).norm_squared()).collect();
    let standard_errors = c_diag.iter().map(|c| s * c.sqrt()).collect();
    let pf = p as f64;
    let mut points = Vec::with_capacity(n);
    for i in 0..n {
        let qi = q.row(i).transpose();
        let h = qi.norm_squared();
        let e = resid[i];
        let omh = 1.0 - h;
        if omh <= 1e-9 || s <= 0.0 {
            points.push(GeneralPoint {
                leverage: h.min(1.0),
                residual: e,
                standardized_residual: None,
                studentized_residual: None,
                cooks_distance: None,
                dffits: None,
                dfbetas: None,
                covariance_ratio: None,
            });
            continue;
        }
        let r_std = e / (s * omh.sqrt());
        let cooks = r_std * r_std / pf * h / omh;
        let (stud, dffits, dfbetas, covratio) = if df >= 2 {
            let reduction = e * e / omh;
            let sse_i = if reduction > DOWNDATE_CANCELLATION * sse {
                sse_without_row(design, y, i).unwrap_or(sse - reduction)
            } else {
                sse - reduction
            };
            let s2_i = (sse_i / (df - 1) as f64).max(0.0);
            let covratio = (s2_i / s2).powi(p as i32) / omh;
            if s2_i > 0.0 {
                let s_i = s2_i.sqrt();
                let t = e / (s_i * omh.sqrt());
                let delta = &r_inv * &qi * (e / omh);
                let dfb = (0..p)
                    .map(|j| delta[j] / (s_i * c_diag[j].sqrt()))
                    .collect();
                (
                    Some(t),
                    Some(t * (h / omh).sqrt()),
                    Some(dfb),
                    Some(covratio),
                )
            } else {
                (None, None, None, Some(covratio))
            }
        } else {
            (None, None, None, None)
        };
        points.push(GeneralPoint {
            leverage: h,
            residual: e,
            standardized_residual: Some(r_std),
            studentized_residual: stud,
            cooks_distance: Some(cooks),
            dffits,
            dfbetas,
            covariance_ratio: covratio,
        });
    }
    Ok(GeneralFit {
        coefficients: beta.iter().copied().collect(),
        standard_errors,
        residual_sd: s,
        df,
        points,
    })
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    #[test]
    fn recovers_an_exact_quadratic() {
        let x: Vec<f64> = (0..8).map(f64::from).collect();
        let y: Vec<f64> = x.iter().map(|v| 1.5 - 0.25 * v + 0.125 * v * v).collect();
        let fit = fit_general(&quadratic_design(&x), &y).unwrap();
        for (got, want) in fit.coefficients.iter().zip([1.5, -0.25, 0.125]) {
            assert!((got - want).abs() < 1e-12, "{got} vs {want}");
        }
    }

    #[test]
    fn hat_values_sum_to_the_number_of_coefficients() {
        let x = [0.5, 1.0, 2.5, 3.0, 7.0, 7.5, 12.0];
        let y = [1.0, 2.0, 2.0, 4.0, 5.0, 9.0, 7.0];
        let fit = fit_general(&line_design(&x), &y).unwrap();
        let total: f64 = fit.points.iter().map(|p| p.leverage).sum();
        assert!((total - 2.0).abs() < 1e-12);
    }

    #[test]
    fn constant_x_is_a_typed_error() {
        let err = fit_general(&line_design(&[3.0; 4]), &[1.0, 2.0, 3.0, 4.0]).unwrap_err();
        assert!(matches!(err, FitError::ConstantX { .. }));
    }
}
