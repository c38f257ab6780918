//! Properties of the statistics engine on random data (proptest).
//!
//! The outside references are in `reference_*.rs`; these check that the
//! streaming path, the leave-one-out shortcut and the general QR path agree
//! with the batch closed forms, including at x offsets where naive sums lose
//! every digit (Unix seconds ≈ 1.7e9, decimal years ≈ 2026 ± 0.5).
#![allow(clippy::unwrap_used)]

use proptest::prelude::*;
use slopewarden::stats::general::{fit_general, line_design};
use slopewarden::stats::{Moments, SeriesState, fit_line, influence, leave_one_out};

/// Agreement to 1e-9 relative to the larger value, or to the quantity's
/// natural scale when both are near zero (a slope near 0 is compared on the
/// scale of sqrt(Syy/Sxx), not on its own tiny magnitude).
fn assert_close(what: &str, a: f64, b: f64, scale: f64) {
    let tol = 1e-9 * a.abs().max(b.abs()).max(scale);
    assert!((a - b).abs() <= tol, "{what}: {a} vs {b} (scale {scale})");
}

/// Random series: x = base + spread·u, y = a + b(x − base) + noise.
fn series() -> impl Strategy<Value = (Vec<f64>, Vec<f64>)> {
    let bases = prop_oneof![
        Just((0.0, 100.0)),
        Just((2026.0, 0.5)),
        Just((1.7e9, 3.0e7)),
        Just((-50.0, 1e-3)),
    ];
    (
        bases,
        4usize..200,
        -5.0f64..5.0,
        0.01f64..10.0,
        any::<u64>(),
    )
        .prop_map(|((base, spread), n, b, sigma, seed)| {
            let mut s = seed | 1;
            let mut next = move || {
                // xorshift64*: deterministic, good enough for test data.
                s ^= s >> 12;
                s ^= s << 25;
                s ^= s >> 27;
                (s.wrapping_mul(0x2545_F491_4F6C_DD1D) >> 11) as f64 / (1u64 << 53) as f64
            };
            let mut x = Vec::with_capacity(n);
            let mut y = Vec::with_capacity(n);
            for _ in 0..n {
                let u = next();
                let noise = (next() + next() + next() - 1.5) * 2.0;
                x.push(base + spread * u);
                y.push(10.0 + b * u * 10.0 + sigma * noise);
            }
            (x, y)
        })
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(300))]

    #[test]
    fn streaming_equals_batch((x, y) in series()) {
        let batch = fit_line(&x, &y, 0.95).unwrap();
        let mut state = SeriesState::new();
        let mut last = None;
        for (&a, &b) in x.iter().zip(&y) {
            last = Some(state.add(a, b).unwrap());
        }
        let stream = state.fit(0.95).unwrap();
        let slope_scale = (batch.moments.syy() / batch.moments.sxx()).sqrt();
        assert_close("slope", stream.slope, batch.slope, slope_scale);
        assert_close("slope_se", stream.slope_se, batch.slope_se, 0.0);
        assert_close("residual_sd", stream.residual_sd, batch.residual_sd, 0.0);
        assert_close("intercept", stream.intercept, batch.intercept, batch.intercept_se);
        assert_close("intercept_se", stream.intercept_se, batch.intercept_se, 0.0);
        assert_close("r_squared", stream.r_squared.unwrap(), batch.r_squared.unwrap(), 1.0);
        assert_close("slope_p", stream.slope_p.unwrap(), batch.slope_p.unwrap(), 1e-300);
        // The newcomer's own diagnostics equal the batch diagnostics of the
        // last point.
        let arrival = last.unwrap();
        let newcomer = arrival.influence.unwrap();
        let all = influence(&x, &y, &batch).unwrap();
        let lastb = all.last().unwrap();
        assert_close("leverage", newcomer.leverage(), lastb.leverage(), 0.0);
        assert_close("studentized", newcomer.studentized_residual().unwrap(), lastb.studentized_residual().unwrap(), 1.0);
        let h = lastb.leverage();
        assert_close("sqrt cooks", newcomer.cooks_distance().unwrap().sqrt(), lastb.cooks_distance().unwrap().sqrt(), (h / (1.0 - h)).sqrt());
        let dx_factor = ((x[x.len() - 1] - batch.mean_x()).powi(2) / (batch.moments.sxx() * (1.0 - h))).sqrt();
        assert_close("dffits", newcomer.dffits().unwrap(), lastb.dffits().unwrap(), (h / (1.0 - h)).sqrt());
        assert_close("dfbetas_slope", newcomer.dfbetas_slope().unwrap(), lastb.dfbetas_slope().unwrap(), dx_factor);
        assert_close("covratio", newcomer.covariance_ratio().unwrap(), lastb.covariance_ratio().unwrap(), 0.0);
    }

    #[test]
    fn removing_points_equals_batch_of_the_rest((x, y) in series(), pick in any::<u64>()) {
        let mut m = Moments::new();
        for (&a, &b) in x.iter().zip(&y) {
            m.add(a, b);
        }
        let (mut kx, mut ky) = (Vec::new(), Vec::new());
        for i in 0..x.len() {
            // Remove about a third of the points, never the first three.
            if i >= 3 && (pick >> (i % 64)) & 3 == 0 {
                m.remove(x[i], y[i]);
            } else {
                kx.push(x[i]);
                ky.push(y[i]);
            }
        }
        let kept = Moments::from_points(&kx, &ky);
        prop_assume!(kept.sxx() > 0.0);
        assert_eq!(m.n(), kept.n());
        let scale = (kept.syy() / kept.sxx()).sqrt();
        assert_close("slope", m.slope().unwrap(), kept.slope().unwrap(), scale);
        // Downdating subtracts each removed point's share from the SSE of
        // all points, so its rounding is relative to that larger sum, not
        // to what is left (a kept SSE of 2e-5 from a full one of 1e-3 came
        // out 2.5e-9 relative off, 5e-14 absolute).
        let full_sse = Moments::from_points(&x, &y).sse();
        assert_close("sse", m.sse(), kept.sse(), full_sse);
        assert_close("mean_x", m.mean_x(), kept.mean_x(), (kept.sxx() / kept.n() as f64).sqrt());
    }

    #[test]
    fn leave_one_out_equals_refit_without_the_point((x, y) in series(), pick in any::<usize>()) {
        let fit = fit_line(&x, &y, 0.95).unwrap();
        let i = pick % x.len();
        let loo = leave_one_out(&x, &y, &fit, i).unwrap();
        let (mut rx, mut ry) = (x.clone(), y.clone());
        rx.remove(i);
        ry.remove(i);
        prop_assume!(Moments::from_points(&rx, &ry).sxx() > 0.0 && rx.len() >= 3);
        let refit = fit_line(&rx, &ry, 0.95).unwrap();
        let scale = refit.slope_se.max((refit.moments.syy() / refit.moments.sxx()).sqrt());
        assert_close("slope", loo.without.slope, refit.slope, scale);
        assert_close("slope_se", loo.without.slope_se, refit.slope_se, 0.0);
        assert_close("slope_p", loo.without.slope_p.unwrap(), refit.slope_p.unwrap(), 1e-300);
    }

    #[test]
    fn closed_forms_equal_the_qr_path((x, y) in series()) {
        let fit = fit_line(&x, &y, 0.95).unwrap();
        let closed = influence(&x, &y, &fit).unwrap();
        // The QR path works on x as given; shift by the first x as the
        // closed forms do, which leaves every diagnostic but the intercept's
        // DFBETAS unchanged.
        let shifted: Vec<f64> = x.iter().map(|v| v - x[0]).collect();
        let general = fit_general(&line_design(&shifted), &y).unwrap();
        assert_close("slope", general.coefficients[1], fit.slope, fit.slope_se);
        assert_close("slope_se", general.standard_errors[1], fit.slope_se, 0.0);
        for (i, (c, g)) in closed.iter().zip(&general.points).enumerate() {
            assert_close("leverage", c.leverage(), g.leverage, 0.0);
            assert_close("standardized", c.standardized_residual().unwrap(), g.standardized_residual.unwrap(), 1.0);
            assert_close("studentized", c.studentized_residual().unwrap(), g.studentized_residual.unwrap(), 1.0);
            // Cook's D is quadratic in a residual that may be round-off
            // small; compare its square root on the scale sqrt(h/(1 − h)).
            let h = c.leverage();
            assert_close("sqrt cooks", c.cooks_distance().unwrap().sqrt(), g.cooks_distance.unwrap().sqrt(), (h / (1.0 - h)).sqrt());
            // DFFITS and DFBETAS are a studentized residual (scale 1) times a
            // leverage factor; near-zero residuals are round-off in both
            // paths, so compare on that factor's scale.
            let dx_factor = ((x[i] - fit.mean_x()).powi(2) / (fit.moments.sxx() * (1.0 - h))).sqrt();
            assert_close("dffits", c.dffits().unwrap(), g.dffits.unwrap(), (h / (1.0 - h)).sqrt());
            assert_close("dfbetas_slope", c.dfbetas_slope().unwrap(), g.dfbetas.as_ref().unwrap()[1], dx_factor);
            assert_close("covratio", c.covariance_ratio().unwrap(), g.covariance_ratio.unwrap(), 0.0);
        }
    }

    #[test]
    fn an_exact_line_is_recovered(a in -100.0f64..100.0, b in -10.0f64..10.0, n in 3usize..60, base in prop_oneof![Just(0.0), Just(2026.0), Just(1.7e9)]) {
        let x: Vec<f64> = (0..n).map(|i| base + i as f64 * 0.25).collect();
        let y: Vec<f64> = (0..n).map(|i| a + b * i as f64 * 0.25).collect();
        let fit = fit_line(&x, &y, 0.95).unwrap();
        assert_close("slope", fit.slope, b, 1.0);
        prop_assert!(fit.exact);
        prop_assert!(fit.slope_p.is_none());
    }

    #[test]
    fn residuals_sum_to_zero_and_order_does_not_matter((x, y) in series()) {
        let fit = fit_line(&x, &y, 0.95).unwrap();
        let pts = influence(&x, &y, &fit).unwrap();
        let sum: f64 = pts.iter().map(|p| p.residual()).sum();
        let abs: f64 = pts.iter().map(|p| p.residual().abs()).sum();
        prop_assert!(sum.abs() <= 1e-9 * abs.max(1e-300));
        let (rx, ry): (Vec<f64>, Vec<f64>) = x.iter().rev().zip(y.iter().rev()).map(|(a, b)| (*a, *b)).unzip();
        let rev = fit_line(&rx, &ry, 0.95).unwrap();
        assert_close("slope", rev.slope, fit.slope, fit.slope_se);
        assert_close("slope_se", rev.slope_se, fit.slope_se, 0.0);
    }

    #[test]
    fn scaling_y_scales_the_slope((x, y) in series(), k in prop_oneof![Just(1e-3), Just(7.5), Just(1e3)]) {
        let fit = fit_line(&x, &y, 0.95).unwrap();
        let ky: Vec<f64> = y.iter().map(|v| v * k).collect();
        let scaled = fit_line(&x, &ky, 0.95).unwrap();
        assert_close("slope", scaled.slope, fit.slope * k, fit.slope_se * k);
        assert_close("t", scaled.slope_t.unwrap(), fit.slope_t.unwrap(), 1.0);
    }
}

#[test]
fn too_few_points_is_an_error_never_nan() {
    assert!(fit_line(&[], &[], 0.95).is_err());
    assert!(fit_line(&[1.0], &[1.0], 0.95).is_err());
    assert!(fit_line(&[1.0, 2.0], &[1.0, 3.0], 0.95).is_err());
    let mut s = SeriesState::new();
    assert!(s.fit(0.95).is_err());
    s.add(1.0, 1.0).unwrap();
    assert!(s.fit(0.95).is_err());
}
