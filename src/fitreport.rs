//! `slopewarden fit`: one CSV in, a fit with its diagnostics out, as text for
//! people or as the JSON contract that scripts read.
//!
//! [`analyse`] does the work (pure, given the columns); [`FitReport::json`]
//! and [`FitReport::write_text`] only format. The JSON field names are a
//! contract: `{"fit": {...}, "points": [...], "robust": {...}}` with exactly
//! the names in [`FitJson`], [`PointJson`] and [`RobustJson`].

use std::io::{self, Write};

use serde::Serialize;
use thiserror::Error;

use crate::stats::cutoffs::{Crossing, Cutoffs};
use crate::stats::robust::{MannKendall, TheilSen, mann_kendall, theil_sen};
use crate::stats::{
    FitError, LineFit, PointInfluence, Transform, durbin_watson, fit_line, influence, leave_one_out,
};
use crate::table::Columns;

/// Rows shown in the text table of points crossing a cutoff.
const TEXT_TABLE_ROWS: usize = 25;

/// What `slopewarden fit` computed for one file.
#[derive(Debug, Clone)]
pub struct FitReport {
    /// The file, as given on the command line.
    pub source: String,
    /// Name of the x column.
    pub x_name: String,
    /// Name of the y column.
    pub y_name: String,
    /// The scale of the fit.
    pub transform: Transform,
    /// x on the fitted scale, in file order.
    pub x: Vec<f64>,
    /// y on the fitted scale, in file order.
    pub y: Vec<f64>,
    /// x as written in the file.
    pub raw_x: Vec<f64>,
    /// y as written in the file.
    pub raw_y: Vec<f64>,
    /// File line of each point.
    pub lines: Vec<u64>,
    /// Record ids naming the points instead of file lines, for a series
    /// read from the store (`slopewarden diagnostics`), whose x and y are
    /// on the series' fitted scale rather than as written in a file.
    pub record_ids: Option<Vec<String>>,
    /// The least-squares fit.
    pub fit: LineFit,
    /// Diagnostics of every point, in file order.
    pub points: Vec<PointInfluence>,
    /// Theil-Sen slope, or why there is none.
    pub theil_sen: Result<TheilSen, FitError>,
    /// Mann-Kendall test, or why there is none.
    pub mann_kendall: Result<MannKendall, FitError>,
    /// Durbin-Watson statistic on x-ordered residuals.
    pub durbin_watson: Option<f64>,
}

/// Why a file could not be analysed.
#[derive(Debug, Error)]
pub enum AnalyseError {
    /// A value cannot be log-transformed; names the line and column.
    #[error(
        "{file}:{line}:{column}: {axis} = {value} is not positive, so the {transform} transform cannot take its logarithm; fit without that transform or check the value"
    )]
    NonPositive {
        /// The file.
        file: String,
        /// File line of the value.
        line: u64,
        /// 1-based column of the value (as passed in).
        column: usize,
        /// "x" or "y".
        axis: &'static str,
        /// The value.
        value: f64,
        /// The transform asked for.
        transform: Transform,
    },
    /// The fit itself is impossible (too few points, all x equal, ...).
    #[error("{file}: {error}")]
    Fit {
        /// The file.
        file: String,
        /// Why.
        error: FitError,
    },
}

/// Fits `columns` on the `transform` scale at confidence `level`.
///
/// `source`, `x_name` and `y_name` are for messages and the summary.
pub fn analyse(
    source: &str,
    x_name: &str,
    y_name: &str,
    columns: Columns,
    transform: Transform,
    level: f64,
) -> Result<FitReport, AnalyseError> {
    let Columns {
        x,
        y,
        lines,
        x_column,
        y_column,
    } = columns;
    let (raw_x, raw_y) = (x, y);
    let (x, y) = if transform == Transform::None {
        (raw_x.clone(), raw_y.clone())
    } else {
        crate::stats::transform_points(&raw_x, &raw_y, transform).map_err(|e| match e {
            FitError::NonPositiveForLog { index, axis, value } => AnalyseError::NonPositive {
                file: source.to_string(),
                line: lines.get(index).copied().unwrap_or(0),
                column: if axis == "x" { x_column } else { y_column },
                axis,
                value,
                transform,
            },
            error => AnalyseError::Fit {
                file: source.to_string(),
                error,
            },
        })?
    };
    let fail = |error| AnalyseError::Fit {
        file: source.to_string(),
        error,
    };
    let fit = fit_line(&x, &y, level).map_err(fail)?;
    let points = influence(&x, &y, &fit).map_err(fail)?;
    let residuals: Vec<f64> = points.iter().map(PointInfluence::residual).collect();
    Ok(FitReport {
        source: source.to_string(),
        x_name: x_name.to_string(),
        y_name: y_name.to_string(),
        transform,
        theil_sen: theil_sen(&x, &y, level),
        mann_kendall: mann_kendall(&x, &y),
        durbin_watson: durbin_watson(&x, &residuals),
        x,
        y,
        raw_x,
        raw_y,
        lines,
        record_ids: None,
        fit,
        points,
    })
}

/// The `fit` object of the JSON output.
#[derive(Debug, Serialize)]
pub struct FitJson {
    n: usize,
    intercept: f64,
    slope: f64,
    intercept_se: f64,
    slope_se: f64,
    slope_t: Option<f64>,
    slope_p: Option<f64>,
    slope_ci_low: f64,
    slope_ci_high: f64,
    r_squared: Option<f64>,
    residual_sd: f64,
    df: usize,
}

/// One element of the `points` array of the JSON output.
#[derive(Debug, Serialize)]
pub struct PointJson {
    x: f64,
    y: f64,
    leverage: f64,
    standardized_residual: Option<f64>,
    studentized_residual: Option<f64>,
    cooks_distance: Option<f64>,
    dffits: Option<f64>,
    dfbetas_intercept: Option<f64>,
    dfbetas_slope: Option<f64>,
    covariance_ratio: Option<f64>,
}

/// The `robust` object of the JSON output.
#[derive(Debug, Serialize)]
pub struct RobustJson {
    theil_sen_slope: Option<f64>,
    theil_sen_ci_low: Option<f64>,
    theil_sen_ci_high: Option<f64>,
    mann_kendall_s: Option<i64>,
    mann_kendall_z: Option<f64>,
    mann_kendall_p: Option<f64>,
}

/// The whole JSON document.
#[derive(Debug, Serialize)]
pub struct ReportJson {
    fit: FitJson,
    points: Vec<PointJson>,
    robust: RobustJson,
}

impl FitReport {
    /// The JSON contract of `slopewarden fit --json`.
    pub fn json(&self) -> ReportJson {
        let f = &self.fit;
        let ts = self.theil_sen.as_ref().ok();
        let mk = self.mann_kendall.as_ref().ok();
        ReportJson {
            fit: FitJson {
                n: f.n,
                intercept: f.intercept,
                slope: f.slope,
                intercept_se: f.intercept_se,
                slope_se: f.slope_se,
                slope_t: f.slope_t,
                slope_p: f.slope_p,
                slope_ci_low: f.slope_ci_low,
                slope_ci_high: f.slope_ci_high,
                r_squared: f.r_squared,
                residual_sd: f.residual_sd,
                df: f.df,
            },
            points: self
                .points
                .iter()
                .zip(self.x.iter().zip(&self.y))
                .map(|(p, (&x, &y))| PointJson {
                    x,
                    y,
                    leverage: p.leverage(),
                    standardized_residual: p.standardized_residual(),
                    studentized_residual: p.studentized_residual(),
                    cooks_distance: p.cooks_distance(),
                    dffits: p.dffits(),
                    dfbetas_intercept: p.dfbetas_intercept(),
                    dfbetas_slope: p.dfbetas_slope(),
                    covariance_ratio: p.covariance_ratio(),
                })
                .collect(),
            robust: RobustJson {
                theil_sen_slope: ts.map(|t| t.slope),
                theil_sen_ci_low: ts.map(|t| t.ci_low),
                theil_sen_ci_high: ts.map(|t| t.ci_high),
                mann_kendall_s: mk.map(|m| m.s),
                mann_kendall_z: mk.map(|m| m.z),
                mann_kendall_p: mk.map(|m| m.p),
            },
        }
    }

    /// Writes the JSON document.
    pub fn write_json(&self, out: &mut impl Write) -> io::Result<()> {
        serde_json::to_writer(&mut *out, &self.json()).map_err(io::Error::other)?;
        writeln!(out)
    }

    /// Writes the summary for people.
    pub fn write_text(&self, out: &mut impl Write) -> io::Result<()> {
        let f = &self.fit;
        let pct = (f.level * 100.0).round();
        if self.record_ids.is_some() {
            // A stored series: its points come already on the fitted
            // scale, which the source line names.
            writeln!(out, "{}  ({} points)", self.source, f.n)?;
        } else {
            writeln!(
                out,
                "{}  ({} points, {} on {}, scale: {})",
                self.source,
                f.n,
                self.y_name,
                self.x_name,
                scale_words(self.transform)
            )?;
        }
        writeln!(out)?;
        writeln!(out, "Least-squares trend")?;
        let slope_line = format!(
            "  slope            {}   SE {}   {pct:.0}% CI [{}, {}]",
            num(f.slope),
            num(f.slope_se),
            num(f.slope_ci_low),
            num(f.slope_ci_high)
        );
        writeln!(out, "{slope_line}")?;
        match (f.slope_t, f.slope_p) {
            (Some(t), Some(p)) => writeln!(
                out,
                "  t = {} on {} df, two-sided p {}  ({})",
                fixed(t, 3),
                f.df,
                pval(p),
                if f.is_significant() {
                    format!("slope differs from zero at the {pct:.0}% level")
                } else {
                    format!("slope not distinguishable from zero at the {pct:.0}% level")
                }
            )?,
            _ => writeln!(
                out,
                "  the points lie exactly on a line: no scatter, so no t, p or interval"
            )?,
        }
        let scale = if self.transform == Transform::None {
            ""
        } else {
            " (fitted scale)"
        };
        writeln!(
            out,
            "  line at mean x   {}{scale} at {} = {}",
            num(f.level_at_mean_x()),
            self.x_name,
            num(f.mean_x())
        )?;
        writeln!(
            out,
            "  intercept        {} at {} = 0   SE {}",
            num(f.intercept),
            self.x_name,
            num(f.intercept_se)
        )?;
        let r2 = f
            .r_squared
            .map_or("undefined (all y equal)".to_string(), |r| fixed(r, 4));
        writeln!(
            out,
            "  R²               {r2}   residual SD {}",
            num(f.residual_sd)
        )?;
        if let Some(units) = self.transform.original_units(f) {
            writeln!(
                out,
                "  in original units: {} = {} ({pct:.0}% CI {} to {})",
                units.what,
                num(units.estimate),
                num(units.low),
                num(units.high)
            )?;
        }
        match self.durbin_watson {
            Some(d) if d < 1.5 => writeln!(
                out,
                "  Durbin-Watson    {}  residuals next to each other in x look alike; standard errors and p may be too small (d < 1.5, common practice)",
                fixed(d, 3)
            )?,
            Some(d) => writeln!(
                out,
                "  Durbin-Watson    {}  (residuals in x order; near 2 means no serial correlation)",
                fixed(d, 3)
            )?,
            None => {}
        }
        writeln!(out)?;
        writeln!(out, "Robust second opinion")?;
        match &self.theil_sen {
            Ok(ts) => writeln!(
                out,
                "  Theil-Sen slope  {}   {pct:.0}% CI [{}, {}]   (median of {} pairwise slopes)",
                num(ts.slope),
                num(ts.ci_low),
                num(ts.ci_high),
                ts.pairs
            )?,
            Err(e) => writeln!(out, "  Theil-Sen slope  not available: {e}")?,
        }
        match &self.mann_kendall {
            Ok(mk) => {
                writeln!(
                    out,
                    "  Mann-Kendall     S = {}, Z = {}, two-sided p {} (normal approximation, tie-corrected variance, continuity correction)",
                    mk.s,
                    fixed(mk.z, 3),
                    pval(mk.p)
                )?;
                writeln!(out, "  {}", self.agreement(mk))?;
            }
            Err(e) => writeln!(out, "  Mann-Kendall     not available: {e}")?,
        }
        writeln!(out)?;
        self.write_crossings(out)?;
        writeln!(out)?;
        writeln!(
            out,
            "A crossed cutoff is a prompt to check that record (field sheet, chain of custody, lab report, units, date), not a finding about the site or a compliance determination; the applicable regulations, the site's approved sampling plan and licensed professionals decide. No value was changed."
        )?;
        Ok(())
    }

    fn agreement(&self, mk: &MannKendall) -> String {
        let alpha = 1.0 - self.fit.level;
        let ols_sig = self.fit.is_significant();
        let mk_sig = mk.p < alpha;
        let dir = |s: f64| {
            if s > 0.0 {
                "rising"
            } else if s < 0.0 {
                "falling"
            } else {
                "flat"
            }
        };
        let ts_dir = self
            .theil_sen
            .as_ref()
            .map_or(dir(self.fit.slope), |t| dir(t.slope));
        match (ols_sig, mk_sig) {
            (true, true) if dir(self.fit.slope) == ts_dir => {
                format!("both methods find a {} trend", dir(self.fit.slope))
            }
            (false, false) => "neither method finds a trend distinguishable from zero".to_string(),
            _ => format!(
                "the methods disagree: least squares says {} (p {}), Mann-Kendall says {} (p {}); look at the points below before trusting either",
                if ols_sig {
                    dir(self.fit.slope)
                } else {
                    "no clear trend"
                },
                self.fit.slope_p.map_or("undefined".into(), pval),
                if mk_sig { ts_dir } else { "no clear trend" },
                pval(mk.p)
            ),
        }
    }

    fn write_crossings(&self, out: &mut impl Write) -> io::Result<()> {
        let n = self.fit.n;
        let cut = Cutoffs::common(n, 2, 0.05);
        let mut flagged: Vec<(usize, Vec<Crossing>)> = self
            .points
            .iter()
            .enumerate()
            .map(|(i, p)| (i, cut.crossings(p)))
            .filter(|(_, c)| !c.is_empty())
            .collect();
        if flagged.is_empty() {
            writeln!(
                out,
                "No point crosses the common cutoffs (listed with --json as raw values)."
            )?;
            return Ok(());
        }
        // Most influential first: Cook's distance, then leverage.
        let key = |i: usize| {
            let p = &self.points[i];
            (p.cooks_distance().unwrap_or(f64::MAX), p.leverage())
        };
        flagged.sort_by(|a, b| {
            key(b.0)
                .partial_cmp(&key(a.0))
                .unwrap_or(std::cmp::Ordering::Equal)
        });
        writeln!(
            out,
            "Points crossing a common cutoff: {} of {n}{}",
            flagged.len(),
            if flagged.len() > TEXT_TABLE_ROWS {
                format!(", the {TEXT_TABLE_ROWS} most influential shown (all values with --json)")
            } else {
                String::new()
            }
        )?;
        // A record id can be longer than a line number: the column is as
        // wide as the longest shown.
        let name_of = |i: usize| match &self.record_ids {
            Some(ids) => ids.get(i).cloned().unwrap_or_default(),
            None => self.lines.get(i).copied().unwrap_or(0).to_string(),
        };
        let width = flagged
            .iter()
            .take(TEXT_TABLE_ROWS)
            .map(|(i, _)| name_of(*i).chars().count())
            .max()
            .unwrap_or(0)
            .max(7);
        writeln!(
            out,
            "  {:>width$} {:>12} {:>12} {:>8} {:>8} {:>8} {:>8} {:>8} {:>12}  crosses",
            if self.record_ids.is_some() {
                "record"
            } else {
                "line"
            },
            "x",
            "y",
            "h",
            "t",
            "D",
            "DFFITS",
            "DFB(b)",
            "slope w/o"
        )?;
        writeln!(
            out,
            "  ({}; h leverage, t studentized residual, D Cook's distance, DFB(b) DFBETAS of the slope, slope w/o the slope refitted without that point)",
            if self.record_ids.is_some() {
                "x and y on the series' fitted scale"
            } else {
                "x and y as written in the file"
            }
        )?;
        for (i, crossings) in flagged.iter().take(TEXT_TABLE_ROWS) {
            let p = &self.points[*i];
            let opt = |v: Option<f64>| v.map_or("-".to_string(), cell);
            let without = leave_one_out(&self.x, &self.y, &self.fit, *i)
                .ok()
                .map_or("-".to_string(), |l| num(l.without.slope));
            let labels: Vec<&str> = crossings.iter().map(|c| c.label()).collect();
            writeln!(
                out,
                "  {:>width$} {:>12} {:>12} {:>8} {:>8} {:>8} {:>8} {:>8} {:>12}  {}",
                name_of(*i),
                num(self.raw_x[*i]),
                num(self.raw_y[*i]),
                cell(p.leverage()),
                opt(p.studentized_residual()),
                opt(p.cooks_distance()),
                opt(p.dffits()),
                opt(p.dfbetas_slope()),
                without,
                labels.join(" ")
            )?;
            if let Some(why) = p.undefined() {
                writeln!(out, "          note: {}", why.explain())?;
            }
        }
        let mut used: Vec<Crossing> = flagged
            .iter()
            .flat_map(|(_, c)| c.iter().copied())
            .collect();
        used.sort();
        used.dedup();
        writeln!(out, "  cutoffs (n = {n}, p = 2):")?;
        for c in used {
            let value = match c {
                Crossing::Leverage => fixed(cut.leverage, 4),
                Crossing::LeverageStrong => fixed(cut.leverage_strong, 4),
                Crossing::CooksMedianF => cut.cooks_median_f.map_or("-".into(), |v| fixed(v, 4)),
                Crossing::CooksFourOverN => fixed(cut.cooks_four_over_n, 4),
                Crossing::Dffits => fixed(cut.dffits, 4),
                Crossing::DfbetasSlope => fixed(cut.dfbetas, 4),
                Crossing::CovRatio => fixed(cut.covratio, 4),
                Crossing::OutlierBonferroni => cut.outlier_t.map_or("-".into(), |v| fixed(v, 3)),
                Crossing::FixesFitAlone => "1".into(),
            };
            writeln!(out, "    {:<9} {:>8}  {}", c.label(), value, c.source())?;
        }
        Ok(())
    }
}

fn scale_words(t: Transform) -> &'static str {
    match t {
        Transform::None => "as given",
        Transform::LogY => "natural log of y",
        Transform::LogX => "natural log of x",
        Transform::LogLog => "natural logs of both",
    }
}

/// A number with 6 significant digits, in plain or scientific notation.
fn num(v: f64) -> String {
    if v == 0.0 {
        return "0".into();
    }
    let a = v.abs();
    if (1e-4..1e7).contains(&a) {
        let digits = (5 - a.log10().floor() as i32).clamp(0, 10) as usize;
        let s = format!("{v:.digits$}");
        if s.contains('.') {
            s.trim_end_matches('0').trim_end_matches('.').to_string()
        } else {
            s
        }
    } else {
        format!("{v:.5e}")
    }
}

fn fixed(v: f64, places: usize) -> String {
    format!("{v:.places$}")
}

fn pval(p: f64) -> String {
    if p >= 1e-4 {
        format!("= {p:.4}")
    } else if p > 0.0 {
        format!("= {p:.2e}")
    } else {
        // Below the smallest double: the tail underflowed.
        "< 1e-300".to_string()
    }
}

/// A table cell: 4 significant digits, scientific when very small or large.
fn cell(v: f64) -> String {
    let a = v.abs();
    if v == 0.0 || (1e-3..1e5).contains(&a) {
        let digits = if v == 0.0 {
            3
        } else {
            (3 - a.log10().floor() as i32).clamp(0, 6) as usize
        };
        format!("{v:.digits$}")
    } else {
        format!("{v:.2e}")
    }
}
