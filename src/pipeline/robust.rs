//! Theil-Sen and Mann-Kendall rows of fit versions, from kept pairwise
//! slopes or afresh, on two threads when there is work for two.

use super::*;

/// The robust rows of several series, on the calling thread; those whose
/// robust slope is undefined are left out.
pub(super) fn robust_rows<'k>(
    jobs: &[(&'k str, &[(f64, f64)])],
    level: f64,
) -> Vec<(&'k str, RobustRow)> {
    jobs.iter()
        .filter_map(|(k, p)| robust_row(p, level).map(|r| (*k, r)))
        .collect()
}

/// [`robust_rows`] on two threads when there is work for two, the jobs
/// split in halves of about equal points.
pub(super) fn robust_rows_split<'k>(
    jobs: &[(&'k str, &[(f64, f64)])],
    level: f64,
) -> Vec<(&'k str, RobustRow)> {
    let total: usize = jobs.iter().map(|j| j.1.len()).sum();
    if jobs.len() < 2 || total < 2_000 {
        return robust_rows(jobs, level);
    }
    let mut half = 0;
    let mut points = 0;
    while half < jobs.len() && points * 2 < total {
        points += jobs[half].1.len();
        half += 1;
    }
    let (first, second) = jobs.split_at(half);
    std::thread::scope(|scope| {
        let worker = scope.spawn(|| robust_rows(second, level));
        let mut out = robust_rows(first, level);
        out.extend(
            worker
                .join()
                .unwrap_or_else(|e| std::panic::resume_unwind(e)),
        );
        out
    })
}

/// The smallest and largest x, when there are any.
pub(crate) fn x_span(x: &[f64]) -> Option<(f64, f64)> {
    x.iter().fold(None, |span, &v| match span {
        None => Some((v, v)),
        Some((lo, hi)) => Some((f64::min(lo, v), f64::max(hi, v))),
    })
}

/// [`robust_row`] from pairwise slopes kept current.
pub(super) fn robust_row_of(kept: &PairwiseTrend, level: f64) -> Option<RobustRow> {
    Some(robust_row_from(
        kept.theil_sen(level).ok()?,
        kept.mann_kendall().ok()?,
    ))
}

/// Theil-Sen and Mann-Kendall of a series' points; None when undefined.
pub(crate) fn robust_row(points: &[(f64, f64)], level: f64) -> Option<RobustRow> {
    let (x, y): (Vec<f64>, Vec<f64>) = points.iter().copied().unzip();
    Some(robust_row_from(
        theil_sen(&x, &y, level).ok()?,
        mann_kendall(&x, &y).ok()?,
    ))
}

pub(super) fn robust_row_from(ts: TheilSen, mk: MannKendall) -> RobustRow {
    RobustRow {
        slope: ts.slope,
        ci_low: ts.ci_low,
        ci_high: ts.ci_high,
        mk_s: mk.s,
        mk_p: mk.p,
    }
}
