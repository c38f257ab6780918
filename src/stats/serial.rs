//! Serial correlation of residuals in x order.

/// Durbin-Watson statistic `d = Σ(e_t − e_{t−1})² / Σ e_t²` over residuals
/// taken in increasing x (ties keep input order). About 2(1 − r₁); values
/// well below 2 mean positively correlated residuals, which make OLS
/// standard errors and p-values too small (Durbin & Watson 1950, 1951).
///
/// `None` for fewer than 2 residuals or when every residual is zero.
pub fn durbin_watson(x: &[f64], residuals: &[f64]) -> Option<f64> {
    let n = x.len().min(residuals.len());
    if n < 2 {
        return None;
    }
    let mut order: Vec<usize> = (0..n).collect();
    order.sort_by(|&a, &b| x[a].total_cmp(&x[b]));
    let mut num = 0.0;
    let mut den = 0.0;
    let mut prev: Option<f64> = None;
    for &i in &order {
        let e = residuals[i];
        den += e * e;
        if let Some(p) = prev {
            num += (e - p) * (e - p);
        }
        prev = Some(e);
    }
    (den > 0.0).then(|| num / den)
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    #[test]
    fn alternating_residuals_give_a_value_near_four() {
        // e = +1, −1, +1, −1: d = 4·3/4 = 3 (hand computation).
        let d = durbin_watson(&[1.0, 2.0, 3.0, 4.0], &[1.0, -1.0, 1.0, -1.0]).unwrap();
        assert!((d - 3.0).abs() < 1e-15);
    }

    #[test]
    fn orders_by_x_first() {
        let a = durbin_watson(&[3.0, 1.0, 2.0], &[0.5, -1.0, 2.0]).unwrap();
        let b = durbin_watson(&[1.0, 2.0, 3.0], &[-1.0, 2.0, 0.5]).unwrap();
        assert_eq!(a, b);
    }

    #[test]
    fn zero_residuals_have_no_statistic() {
        assert_eq!(durbin_watson(&[1.0, 2.0], &[0.0, 0.0]), None);
    }
}
