//! The per-series streaming state: one O(1) update per arriving record,
//! which yields the fit before and after and the newcomer's own diagnostics
//! without touching older points.
//!
//! The newcomer is judged against the previous fit (METHODS.md §1, recursive
//! residuals): with `v = 1/n_old + (x − x̄_old)²/Sxx_old` and `d = y − ŷ_old(x)`,
//! its hat value in the new fit is `v/(1 + v)`, its residual `d/(1 + v)`, and
//! its externally studentized residual `d / (s_old √(1 + v))`, because the
//! fit without the newcomer *is* the previous fit. Nothing is subtracted, so
//! nothing cancels.

use super::dist::t_two_sided_p;
use super::error::FitError;
use super::influence::{LeaveOneOut, PointInfluence, PointTerms, point_influence};
use super::line::{LineFit, is_exact};
use super::moments::Moments;

/// The running state of one series: 64 bytes of co-moments.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct SeriesState {
    moments: Moments,
}

/// The newcomer measured against the fit before it arrived.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Prediction {
    /// Value the previous fit predicted at the newcomer's x.
    pub fitted: f64,
    /// Observed minus predicted.
    pub residual: f64,
    /// Standard error of a new observation at that x under the previous fit.
    pub se: f64,
    /// `residual / se`, Student t with `df` degrees of freedom; `None` when
    /// the previous fit was exact (no scatter to compare with).
    pub t: Option<f64>,
    /// Degrees of freedom of the previous fit, n_old − 2.
    pub df: usize,
    /// `v = 1/n_old + (x − x̄_old)²/Sxx_old`.
    pub leverage_factor: f64,
}

/// What one arriving point did to its series.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Arrival {
    /// The point's x.
    pub x: f64,
    /// The point's y.
    pub y: f64,
    /// Co-moments before the point arrived (= the fit without it).
    pub before: Moments,
    /// Co-moments with the point.
    pub after: Moments,
    /// The point's diagnostics in the new fit; `None` while the series has
    /// fewer than 3 points or no spread in x.
    pub influence: Option<PointInfluence>,
    /// The point against the previous fit; `None` while that fit had fewer
    /// than 3 points or no spread in x.
    pub prediction: Option<Prediction>,
}

impl Arrival {
    /// The fit with the newcomer.
    pub fn fit_with(&self, level: f64) -> Result<LineFit, FitError> {
        LineFit::from_moments(&self.after, level)
    }
    /// The fit without the newcomer (the previous fit).
    pub fn fit_without(&self, level: f64) -> Result<LineFit, FitError> {
        LineFit::from_moments(&self.before, level)
    }
    /// [`Arrival::fit_with`], the t quantile taken from `quantile` (see
    /// [`Arrival::fit_without_using`]).
    pub fn fit_with_using(
        &self,
        level: f64,
        quantile: impl FnMut(usize) -> f64,
    ) -> Result<LineFit, FitError> {
        LineFit::from_moments_with(&self.after, level, quantile)
    }
    /// [`Arrival::fit_without`] with the interval's t quantile for `df`
    /// degrees of freedom taken from `quantile` (a memo of `t_quantile`:
    /// the same fit, without its root search per call).
    pub fn fit_without_using(
        &self,
        level: f64,
        quantile: impl FnMut(usize) -> f64,
    ) -> Result<LineFit, FitError> {
        LineFit::from_moments_with(&self.before, level, quantile)
    }
    /// Both fits side by side.
    pub fn leave_one_out(&self, level: f64) -> Result<LeaveOneOut, FitError> {
        Ok(LeaveOneOut {
            with: self.fit_with(level)?,
            without: self.fit_without(level)?,
        })
    }
    /// Two-sided p-value of the new slope, without building the whole fit
    /// (no interval, so no quantile): the cheap path for every arrival.
    pub fn slope_p(&self) -> Option<f64> {
        slope_p_of(&self.after)
    }

    /// The slope before the newcomer arrived (the fit without it).
    pub fn slope_without(&self) -> Option<f64> {
        self.before.slope()
    }

    /// Two-sided p-value of the slope before the newcomer arrived.
    pub fn slope_p_without(&self) -> Option<f64> {
        slope_p_of(&self.before)
    }
}

/// Two-sided p of the slope of a set of co-moments; `None` with fewer than
/// 3 points, no spread in x, or an exact line.
fn slope_p_of(m: &Moments) -> Option<f64> {
    let n = m.n() as f64;
    if m.n() < 3 || m.sxx() <= 0.0 {
        return None;
    }
    // As [`LineFit::from_moments`] computes it, to the last bit (the
    // pipeline takes a refit's p for it): a rounding-negative SSE is 0.
    let s = (m.sse().max(0.0) / (n - 2.0)).sqrt();
    if is_exact(s, m.mean_y(), m.syy(), n) {
        return None;
    }
    let t = (m.sxy() / m.sxx()) / (s / m.sxx().sqrt());
    Some(t_two_sided_p(t, n - 2.0))
}

impl SeriesState {
    /// An empty series.
    pub const fn new() -> Self {
        SeriesState {
            moments: Moments::new(),
        }
    }

    /// Resumes from stored co-moments.
    pub const fn from_moments(moments: Moments) -> Self {
        SeriesState { moments }
    }

    /// The co-moments of every point added and not removed.
    pub fn moments(&self) -> &Moments {
        &self.moments
    }

    /// Number of points.
    pub fn n(&self) -> u64 {
        self.moments.n()
    }

    /// The current fit.
    pub fn fit(&self, level: f64) -> Result<LineFit, FitError> {
        LineFit::from_moments(&self.moments, level)
    }

    /// Adds a point and reports what it did. A non-finite value is refused
    /// and leaves the state unchanged.
    pub fn add(&mut self, x: f64, y: f64) -> Result<Arrival, FitError> {
        check_point(x, y)?;
        let before = self.moments;
        self.moments.add(x, y);
        let after = self.moments;
        let (influence, prediction) = judge_newcomer(&before, &after, x, y);
        Ok(Arrival {
            x,
            y,
            before,
            after,
            influence,
            prediction,
        })
    }

    /// Removes a point that was added before (an excluded record, a
    /// corrected value's old version). The caller guarantees it was added.
    pub fn remove(&mut self, x: f64, y: f64) -> Result<(), FitError> {
        check_point(x, y)?;
        self.moments.remove(x, y);
        Ok(())
    }
}

fn check_point(x: f64, y: f64) -> Result<(), FitError> {
    if !x.is_finite() {
        return Err(FitError::NonFinite {
            index: 0,
            axis: "x",
            value: x,
        });
    }
    if !y.is_finite() {
        return Err(FitError::NonFinite {
            index: 0,
            axis: "y",
            value: y,
        });
    }
    Ok(())
}

fn judge_newcomer(
    before: &Moments,
    after: &Moments,
    x: f64,
    y: f64,
) -> (Option<PointInfluence>, Option<Prediction>) {
    let n_new = after.n() as f64;
    let n_old = before.n() as f64;
    if after.n() < 3 || after.sxx() <= 0.0 {
        return (None, None);
    }
    let s_new = (after.sse() / (n_new - 2.0)).sqrt();
    let exact = is_exact(s_new, after.mean_y(), after.syy(), n_new);
    let s = if exact { 0.0 } else { s_new };
    let dx_new = (x - after.origin()) - after.mean_x_shifted();
    let Some(v) = before.leverage_factor(x) else {
        // Every earlier x was equal: the newcomer alone fixes the slope.
        let terms = PointTerms {
            n: n_new,
            dx: dx_new,
            e: 0.0,
            h: 1.0,
            one_minus_h: 0.0,
            sxx: after.sxx(),
            mean_x: after.mean_x(),
            s,
            exact,
            sse_without: before.sse(),
            exact_without: true,
        };
        return (Some(point_influence(terms)), None);
    };
    // leverage_factor returned Some, so Sxx_old > 0 and predict is Some too.
    let fitted = before.predict(x).unwrap_or(before.mean_y());
    let d = y - fitted;
    let df_old = n_old - 2.0;
    let (s_old, exact_old) = if before.n() >= 3 {
        let s_old = (before.sse() / df_old).sqrt();
        let exact_old = is_exact(s_old, before.mean_y(), before.syy(), n_old);
        (if exact_old { 0.0 } else { s_old }, exact_old)
    } else {
        (0.0, true)
    };
    let terms = PointTerms {
        n: n_new,
        dx: dx_new,
        e: d / (1.0 + v),
        h: v / (1.0 + v),
        one_minus_h: 1.0 / (1.0 + v),
        sxx: after.sxx(),
        mean_x: after.mean_x(),
        s,
        exact,
        sse_without: if exact_old { 0.0 } else { before.sse() },
        exact_without: exact_old,
    };
    let prediction = (before.n() >= 3).then(|| {
        let se = s_old * (1.0 + v).sqrt();
        Prediction {
            fitted,
            residual: d,
            se,
            t: (!exact_old).then(|| d / se),
            df: before.n() as usize - 2,
            leverage_factor: v,
        }
    });
    (Some(point_influence(terms)), prediction)
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::super::influence::influence;
    use super::super::line::fit_line;
    use super::*;

    fn close(a: f64, b: f64) -> bool {
        (a - b).abs() <= 1e-10 * a.abs().max(b.abs()).max(1e-12)
    }

    #[test]
    fn newcomer_diagnostics_equal_batch_diagnostics_of_last_point() {
        let x = [
            2019.1, 2019.4, 2019.6, 2019.9, 2020.2, 2020.4, 2020.7, 2021.0, 2023.5,
        ];
        let y = [5.2, 5.0, 5.3, 4.9, 4.8, 4.9, 4.6, 4.7, 9.9];
        let mut st = SeriesState::new();
        let mut last = None;
        for (&a, &b) in x.iter().zip(&y) {
            last = Some(st.add(a, b).unwrap());
        }
        let arrival = last.unwrap();
        let fit = fit_line(&x, &y, 0.95).unwrap();
        let batch = influence(&x, &y, &fit).unwrap()[8];
        let got = arrival.influence.unwrap();
        assert!(close(got.leverage(), batch.leverage()));
        assert!(close(got.residual(), batch.residual()));
        for (a, b) in [
            (got.standardized_residual(), batch.standardized_residual()),
            (got.studentized_residual(), batch.studentized_residual()),
            (got.cooks_distance(), batch.cooks_distance()),
            (got.dffits(), batch.dffits()),
            (got.dfbetas_intercept(), batch.dfbetas_intercept()),
            (got.dfbetas_slope(), batch.dfbetas_slope()),
            (got.covariance_ratio(), batch.covariance_ratio()),
        ] {
            assert!(close(a.unwrap(), b.unwrap()), "{a:?} vs {b:?}");
        }
        // The prediction t equals the studentized residual (METHODS.md §1).
        let pred = arrival.prediction.unwrap();
        assert!(close(pred.t.unwrap(), got.studentized_residual().unwrap()));
        assert!(close(arrival.slope_p().unwrap(), fit.slope_p.unwrap()));
        let before = fit_line(&x[..8], &y[..8], 0.95).unwrap();
        assert!(close(
            arrival.fit_without(0.95).unwrap().slope,
            before.slope
        ));
    }

    /// The per-series state must stay small: a daemon keeps one per series
    /// (the target is a few hundred bytes).
    #[test]
    fn series_state_is_64_bytes() {
        assert_eq!(std::mem::size_of::<SeriesState>(), 64);
    }

    /// The pipeline stores a refit's slope p as the next record's "p
    /// without" (same moments), so the two must agree to the last bit,
    /// exact lines and a single spread-free x included.
    #[test]
    fn slope_p_without_is_the_p_of_the_fit_before_bit_for_bit() {
        let series: [&[(f64, f64)]; 4] = [
            &[
                (2019.1, 5.2),
                (2019.4, 5.0),
                (2019.6, 5.3),
                (2019.9, 4.9),
                (2020.2, 4.8),
                (2021.0, 4.7),
                (2023.5, 9.9),
            ],
            // An exact line: no p on either side.
            &[(1.0, 2.0), (2.0, 4.0), (3.0, 6.0), (4.0, 8.0), (5.0, 10.0)],
            &[
                (0.0, 1e-9),
                (10.0, 3e-9),
                (20.0, 2e-9),
                (30.0, 5e-9),
                (45.0, 4e-9),
            ],
            &[
                (100.0, 41.0),
                (250.0, 40.5),
                (400.0, 38.0),
                (900.0, 30.5),
                (1850.0, 48.2),
            ],
        ];
        for points in series {
            let mut st = SeriesState::new();
            for (i, &(x, y)) in points.iter().enumerate() {
                let before = *st.moments();
                let arrival = st.add(x, y).unwrap();
                let refit = LineFit::from_moments(&before, 0.95).ok();
                let want = refit.and_then(|f| f.slope_p);
                let got = arrival.slope_p_without();
                assert_eq!(
                    got.map(f64::to_bits),
                    want.map(f64::to_bits),
                    "point {i} of {points:?}"
                );
            }
        }
    }

    #[test]
    fn refuses_non_finite_and_keeps_state() {
        let mut st = SeriesState::new();
        st.add(1.0, 2.0).unwrap();
        assert!(st.add(f64::NAN, 1.0).is_err());
        assert!(st.add(2.0, f64::INFINITY).is_err());
        assert_eq!(st.n(), 1);
    }

    #[test]
    fn first_points_have_no_diagnostics() {
        let mut st = SeriesState::new();
        assert_eq!(st.add(1.0, 2.0).unwrap().influence, None);
        assert_eq!(st.add(2.0, 2.5).unwrap().influence, None);
        let third = st.add(3.0, 2.0).unwrap();
        assert!(third.influence.is_some());
        assert_eq!(third.prediction, None);
    }

    #[test]
    fn a_new_x_after_a_single_x_fixes_the_slope_alone() {
        let mut st = SeriesState::new();
        for y in [1.0, 2.0, 3.0] {
            st.add(10.0, y).unwrap();
        }
        let a = st.add(50.0, 4.0).unwrap();
        let inf = a.influence.unwrap();
        assert_eq!(inf.leverage(), 1.0);
        assert_eq!(inf.studentized_residual(), None);
    }
}
