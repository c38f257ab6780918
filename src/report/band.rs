//! The confidence band for the mean of a straight-line fit, from the
//! figures a fit version stores. Pure: no I/O, no clock.
//!
//! At x₀ the fitted mean is ŷ = ȳ + b·(x₀ − x̄) and the band is
//! ŷ ± t(1 − (1 − level)/2, df) · s · √(1/n + (x₀ − x̄)²/Sxx), with s the
//! residual standard deviation and df = n − 2. The stored co-moments keep
//! x̄ relative to a per-series origin (see `stats::Moments`), so x₀ − x̄ is
//! taken as (x₀ − origin) − x̄_shifted, which keeps its digits when x is a
//! decimal year.

use crate::stats::dist::t_quantile;

/// What the band needs of a fit version (fitted scale).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LineStats {
    /// Points in the fit.
    pub n: f64,
    /// Residual degrees of freedom (n − 2).
    pub df: f64,
    /// Confidence level, e.g. 0.95.
    pub level: f64,
    /// Slope.
    pub slope: f64,
    /// Residual standard deviation.
    pub residual_sd: f64,
    /// x origin of the co-moments.
    pub origin: f64,
    /// Mean of x − origin.
    pub mean_x_shifted: f64,
    /// Mean of y.
    pub mean_y: f64,
    /// Σ(x − x̄)².
    pub sxx: f64,
}

/// One point of the band.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct BandPoint {
    /// x (fitted scale).
    pub x: f64,
    /// The fitted mean at x.
    pub fit: f64,
    /// Lower end of the band.
    pub low: f64,
    /// Upper end of the band.
    pub high: f64,
}

impl LineStats {
    /// The fitted mean at `x`.
    pub fn predict(&self, x: f64) -> f64 {
        self.mean_y + self.slope * ((x - self.origin) - self.mean_x_shifted)
    }

    fn usable(&self) -> bool {
        [
            self.n,
            self.df,
            self.slope,
            self.residual_sd,
            self.origin,
            self.mean_x_shifted,
            self.mean_y,
            self.sxx,
        ]
        .iter()
        .all(|v| v.is_finite())
            && self.n >= 3.0
            && self.df >= 1.0
            && self.sxx > 0.0
            && self.residual_sd >= 0.0
            && self.level > 0.0
            && self.level < 1.0
    }
}

/// The band at each of `xs`, or `None` when the figures do not define one
/// (fewer than 3 points, x constant, a level outside (0, 1), a non-finite
/// figure). An exact line (residual SD 0) has a band of zero width.
pub fn mean_band(stats: &LineStats, xs: &[f64]) -> Option<Vec<BandPoint>> {
    if !stats.usable() || xs.iter().any(|x| !x.is_finite()) {
        return None;
    }
    let t = t_quantile(0.5 + stats.level / 2.0, stats.df);
    Some(
        xs.iter()
            .map(|&x| {
                let dx = (x - stats.origin) - stats.mean_x_shifted;
                let half = t * stats.residual_sd * (1.0 / stats.n + dx * dx / stats.sxx).sqrt();
                let fit = stats.predict(x);
                BandPoint {
                    x,
                    fit,
                    low: fit - half,
                    high: fit + half,
                }
            })
            .collect(),
    )
}

/// `steps + 1` evenly spaced x from `lo` to `hi` (both included).
pub fn grid(lo: f64, hi: f64, steps: usize) -> Vec<f64> {
    let steps = steps.max(1);
    (0..=steps)
        .map(|i| lo + (hi - lo) * i as f64 / steps as f64)
        .collect()
}

#[cfg(test)]
// Reference values are kept exactly as R printed them (17 digits).
#[allow(clippy::excessive_precision, clippy::unwrap_used)]
mod tests {
    use super::*;

    /// Invented points (decimal years, mg/L).
    const X: [f64; 6] = [2011.0, 2011.5, 2012.25, 2013.0, 2014.5, 2015.0];
    const Y: [f64; 6] = [3.1, 3.4, 3.2, 3.9, 4.4, 4.3];

    /// The figures of a least-squares fit of `Y` on `X`, computed here by
    /// the textbook two-pass formulas with the given origin.
    fn stats(origin: f64, level: f64) -> LineStats {
        let n = X.len() as f64;
        let mx = X.iter().map(|x| x - origin).sum::<f64>() / n;
        let my = Y.iter().sum::<f64>() / n;
        let sxx: f64 = X.iter().map(|x| (x - origin - mx).powi(2)).sum();
        let sxy: f64 = X
            .iter()
            .zip(Y)
            .map(|(x, y)| (x - origin - mx) * (y - my))
            .sum();
        let slope = sxy / sxx;
        let sse: f64 = X
            .iter()
            .zip(Y)
            .map(|(x, y)| (y - (my + slope * (x - origin - mx))).powi(2))
            .sum();
        LineStats {
            n,
            df: n - 2.0,
            level,
            slope,
            residual_sd: (sse / (n - 2.0)).sqrt(),
            origin,
            mean_x_shifted: mx,
            mean_y: my,
            sxx,
        }
    }

    fn close(a: f64, b: f64) -> bool {
        (a - b).abs() <= 1e-10 * b.abs().max(1.0)
    }

    // Reference: R 4.2.2 (Debian r-base-core), with the same points:
    // predict(lm(y ~ x), data.frame(x = c(2011, 2013, 2016)),
    //         interval = "confidence", level = 0.95), printed with
    // options(digits = 17).
    #[test]
    fn band_matches_r_predict_confidence() {
        let want = [
            (
                2011.0,
                3.0967871485941338,
                2.7171116493472973,
                3.4764626478409704,
            ),
            (
                2013.0,
                3.7579919678713636,
                3.5228731093556509,
                3.9931108263870763,
            ),
            (
                2016.0,
                4.7497991967872082,
                4.1994769558839620,
                5.3001214376904544,
            ),
        ];
        let xs: Vec<f64> = want.iter().map(|w| w.0).collect();
        for origin in [0.0, 2011.0] {
            let band = mean_band(&stats(origin, 0.95), &xs).unwrap();
            for (b, w) in band.iter().zip(want) {
                assert!(
                    close(b.fit, w.1),
                    "origin {origin}: fit {} vs {}",
                    b.fit,
                    w.1
                );
                assert!(
                    close(b.low, w.2),
                    "origin {origin}: low {} vs {}",
                    b.low,
                    w.2
                );
                assert!(
                    close(b.high, w.3),
                    "origin {origin}: high {} vs {}",
                    b.high,
                    w.3
                );
            }
        }
    }

    // Reference: R 4.2.2, the same with level = 0.90 at x = 2013.
    #[test]
    fn band_follows_the_level() {
        let b = mean_band(&stats(2011.0, 0.90), &[2013.0]).unwrap()[0];
        assert!(close(b.low, 3.5774598975656544), "{}", b.low);
        assert!(close(b.high, 3.9385240381770728), "{}", b.high);
    }

    #[test]
    fn band_is_narrowest_at_the_mean_of_x() {
        let s = stats(2011.0, 0.95);
        let mean = s.origin + s.mean_x_shifted;
        let band = mean_band(&s, &[mean - 1.0, mean, mean + 1.0]).unwrap();
        let width = |b: &BandPoint| b.high - b.low;
        assert!(width(&band[1]) < width(&band[0]));
        assert!(width(&band[1]) < width(&band[2]));
        assert!(close(width(&band[0]), width(&band[2])));
    }

    #[test]
    fn no_band_without_enough_to_define_one() {
        let s = stats(0.0, 0.95);
        assert!(
            mean_band(
                &LineStats {
                    n: 2.0,
                    df: 0.0,
                    ..s
                },
                &[1.0]
            )
            .is_none()
        );
        assert!(mean_band(&LineStats { sxx: 0.0, ..s }, &[1.0]).is_none());
        assert!(mean_band(&LineStats { level: 1.0, ..s }, &[1.0]).is_none());
        assert!(mean_band(&s, &[f64::NAN]).is_none());
        // An exact line: a band of zero width around the line.
        let b = mean_band(
            &LineStats {
                residual_sd: 0.0,
                ..s
            },
            &[2012.0],
        )
        .unwrap()[0];
        assert_eq!(b.low, b.fit);
        assert_eq!(b.high, b.fit);
    }

    #[test]
    fn grid_includes_both_ends() {
        assert_eq!(grid(0.0, 1.0, 4), vec![0.0, 0.25, 0.5, 0.75, 1.0]);
        assert_eq!(grid(2.0, 2.0, 0), vec![2.0, 2.0]);
    }
}
