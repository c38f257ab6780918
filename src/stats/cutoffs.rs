//! The usual cutoffs for influence diagnostics, with their sources
//! (METHODS.md §2). Cutoffs are conventions, not tests: crossing one is a
//! reason to look at a point, nothing more.

use statrs::distribution::{ContinuousCDF, FisherSnedecor};

use super::dist::t_quantile;
use super::influence::PointInfluence;

/// Which cutoff a point crosses.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Crossing {
    /// Leverage above 2p/n (Hoaglin & Welsch 1978).
    Leverage,
    /// Leverage above 3p/n (Velleman & Welsch 1981), the stronger band.
    LeverageStrong,
    /// Cook's distance above the median of F(p, n − p) (Cook 1977).
    CooksMedianF,
    /// Cook's distance above 4/n (Bollen & Jackman 1990).
    CooksFourOverN,
    /// |DFFITS| above 2√(p/n) (Belsley, Kuh & Welsch 1980).
    Dffits,
    /// |DFBETAS of the slope| above 2/√n (Belsley, Kuh & Welsch 1980).
    DfbetasSlope,
    /// |COVRATIO − 1| above 3p/n (Belsley, Kuh & Welsch 1980).
    CovRatio,
    /// |studentized residual| above the Bonferroni t critical value
    /// t(1 − α/(2n), n − p − 1) (Weisberg; Cook & Weisberg 1982).
    OutlierBonferroni,
    /// Leverage 1: the point alone fixes the slope.
    FixesFitAlone,
}

impl Crossing {
    /// Short label for tables.
    pub fn label(self) -> &'static str {
        match self {
            Crossing::Leverage => "h>2p/n",
            Crossing::LeverageStrong => "h>3p/n",
            Crossing::CooksMedianF => "D>F50",
            Crossing::CooksFourOverN => "D>4/n",
            Crossing::Dffits => "DFFITS",
            Crossing::DfbetasSlope => "DFBETAS",
            Crossing::CovRatio => "COVRATIO",
            Crossing::OutlierBonferroni => "t>Bonf",
            Crossing::FixesFitAlone => "h=1",
        }
    }

    /// The rule and where it comes from.
    pub fn source(self) -> &'static str {
        match self {
            Crossing::Leverage => "leverage above 2p/n (Hoaglin & Welsch 1978)",
            Crossing::LeverageStrong => "leverage above 3p/n (Velleman & Welsch 1981)",
            Crossing::CooksMedianF => "Cook's distance above the median of F(p, n-p) (Cook 1977)",
            Crossing::CooksFourOverN => "Cook's distance above 4/n (Bollen & Jackman 1990)",
            Crossing::Dffits => "|DFFITS| above 2*sqrt(p/n) (Belsley, Kuh & Welsch 1980)",
            Crossing::DfbetasSlope => {
                "|DFBETAS of the slope| above 2/sqrt(n) (Belsley, Kuh & Welsch 1980)"
            }
            Crossing::CovRatio => "|COVRATIO - 1| above 3p/n (Belsley, Kuh & Welsch 1980)",
            Crossing::OutlierBonferroni => {
                "|studentized residual| above t(1 - 0.05/(2n), n-p-1), Bonferroni over all points (Cook & Weisberg 1982)"
            }
            Crossing::FixesFitAlone => {
                "leverage 1: every other point shares one x, this point alone fixes the slope"
            }
        }
    }
}

/// The cutoff values for a fit of `n` points and `p` coefficients.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Cutoffs {
    /// 2p/n.
    pub leverage: f64,
    /// 3p/n.
    pub leverage_strong: f64,
    /// Median of F(p, n − p); `None` when n ≤ p.
    pub cooks_median_f: Option<f64>,
    /// 4/n.
    pub cooks_four_over_n: f64,
    /// 2√(p/n).
    pub dffits: f64,
    /// 2/√n.
    pub dfbetas: f64,
    /// 3p/n.
    pub covratio: f64,
    /// Bonferroni t critical value at family-wise α; `None` when n − p − 1 < 1.
    pub outlier_t: Option<f64>,
}

impl Cutoffs {
    /// The common cutoffs; `alpha` is the family-wise level of the
    /// Bonferroni outlier test (0.05 is usual).
    pub fn common(n: usize, p: usize, alpha: f64) -> Cutoffs {
        let nf = n as f64;
        let pf = p as f64;
        let cooks_median_f = (n > p)
            .then(|| FisherSnedecor::new(pf, (n - p) as f64).ok())
            .flatten()
            .map(|f| f.inverse_cdf(0.5));
        let outlier_t =
            (n > p + 1).then(|| t_quantile(1.0 - alpha / (2.0 * nf), (n - p - 1) as f64));
        Cutoffs {
            leverage: 2.0 * pf / nf,
            leverage_strong: 3.0 * pf / nf,
            cooks_median_f,
            cooks_four_over_n: 4.0 / nf,
            dffits: 2.0 * (pf / nf).sqrt(),
            dfbetas: 2.0 / nf.sqrt(),
            covratio: 3.0 * pf / nf,
            outlier_t,
        }
    }

    /// Every cutoff that `point` crosses, strongest first within a kind.
    pub fn crossings(&self, point: &PointInfluence) -> Vec<Crossing> {
        let mut out = Vec::new();
        if point.undefined() == Some(super::Undefined::FixesFitAlone) {
            out.push(Crossing::FixesFitAlone);
            return out;
        }
        let h = point.leverage();
        if h > self.leverage_strong {
            out.push(Crossing::LeverageStrong);
        } else if h > self.leverage {
            out.push(Crossing::Leverage);
        }
        if let Some(d) = point.cooks_distance() {
            if self.cooks_median_f.is_some_and(|c| d > c) {
                out.push(Crossing::CooksMedianF);
            } else if d > self.cooks_four_over_n {
                out.push(Crossing::CooksFourOverN);
            }
        }
        if point.dffits().is_some_and(|v| v.abs() > self.dffits) {
            out.push(Crossing::Dffits);
        }
        if point
            .dfbetas_slope()
            .is_some_and(|v| v.abs() > self.dfbetas)
        {
            out.push(Crossing::DfbetasSlope);
        }
        if point
            .covariance_ratio()
            .is_some_and(|v| (v - 1.0).abs() > self.covratio)
        {
            out.push(Crossing::CovRatio);
        }
        if let (Some(t), Some(c)) = (point.studentized_residual(), self.outlier_t)
            && t.abs() > c
        {
            out.push(Crossing::OutlierBonferroni);
        }
        out
    }
}

#[cfg(test)]
// Reference values are kept exactly as R printed them (17 digits).
#[allow(clippy::excessive_precision)]
mod tests {
    use super::*;

    // Reference: R 4.2.2 qf(0.5, 2, 34) = 0.70747218105992538 and
    // qt(1 - 0.05/72, 33) = 3.4910606163531646 (Debian r-base-core).
    #[test]
    fn cutoff_values_match_r_quantiles() {
        let c = Cutoffs::common(36, 2, 0.05);
        let f = c.cooks_median_f.unwrap_or(0.0);
        assert!((f - 0.70747218105992538).abs() < 1e-9, "{f}");
        let t = c.outlier_t.unwrap_or(0.0);
        assert!((t - 3.4910606163531646).abs() < 1e-9, "{t}");
        assert!((c.leverage - 4.0 / 36.0).abs() < 1e-15);
    }
}
