//! What the computing thread keeps between files: series rows, points,
//! pairwise slopes, fits and critical values, each within a bound.

use super::*;

/// The pairwise slopes of short series, kept between files within a bound
/// on the slopes held.
#[derive(Debug, Default)]
pub(super) struct KeptPairs {
    pub(super) series: HashMap<String, PairwiseTrend>,
    /// Slopes held by all of them.
    pub(super) held: usize,
}

impl KeptPairs {
    /// The robust row of `key` from its kept pairwise slopes, brought up
    /// to `points` (Some(None) when undefined), or None when the series is
    /// not kept: longer than [`ROBUST_EVERY_REFIT_UP_TO`], or no room
    /// under `max` slopes. A series that takes the total past `max` still
    /// gets its row, and is then let go.
    pub(super) fn robust(
        &mut self,
        key: &str,
        points: &[(f64, f64)],
        level: f64,
        max: usize,
    ) -> Option<Option<RobustRow>> {
        let n = points.len();
        if n as i64 > ROBUST_EVERY_REFIT_UP_TO {
            self.forget(key);
            return None;
        }
        if !self.series.contains_key(key) && self.held + n * n.saturating_sub(1) / 2 > max {
            return None;
        }
        let kept = self.series.entry(key.to_string()).or_default();
        self.held -= kept.slopes_held();
        kept.follow(points);
        self.held += kept.slopes_held();
        let row = robust_row_of(kept, level);
        if self.held > max {
            self.forget(key);
        }
        Some(row)
    }

    pub(super) fn forget(&mut self, key: &str) {
        if let Some(k) = self.series.remove(key) {
            self.held -= k.slopes_held();
        }
    }

    pub(super) fn clear(&mut self) {
        *self = KeptPairs::default();
    }
}

/// Series rows kept between files by the one writer, so that a series
/// touched by every file is not read back each time. Cleared whenever a
/// transaction fails, since its rows may then be ahead of the database.
#[derive(Debug, Default)]
pub struct SeriesCache {
    pub(super) rows: HashMap<String, SeriesRow>,
    /// Series without a configured unit: the unit their records are in
    /// (see [`reconcile_units`]).
    pub(super) units: RecordUnits,
    /// Every series key by its [`name_form`], read from the store when a
    /// file first creates a series.
    pub(super) names: Option<HashMap<String, String>>,
    /// The fit points (fitted scale) of series whose robust slope has been
    /// computed once, so that later checkpoints need not read them back.
    /// Shared with the findings of a file still being written (a series'
    /// next points then go to a copy).
    pub(super) points: HashMap<String, Arc<Vec<(f64, f64)>>>,
    /// Points of records awaiting review, per series.
    pub(super) awaiting: HashMap<String, Vec<(f64, f64)>>,
    /// The low end of each series' judging fit, kept with `awaiting`.
    pub(super) judged_low: HashMap<String, JudgedLow>,
    /// Critical values of the finding rules.
    pub(super) cutoffs: CutoffCache,
    /// The last robust slope and interval computed per series.
    pub(super) robust: HashMap<String, (f64, f64, f64)>,
    /// The pairwise slopes of series short enough for their robust slope
    /// to be recomputed at every refit, kept current point by point.
    pub(super) pairwise: KeptPairs,
    /// Each series' latest least-squares fit, for the next file's "before"
    /// and for scoring other series' records against it; used only while
    /// its moments are the series' current ones.
    pub(super) line_fits: HashMap<String, LineFit>,
    /// The ln(y) screen per series (None: not applicable).
    pub(super) log: HashMap<String, Option<SeriesState>>,
    pub(super) quantiles: Option<TQuantiles>,
    /// The store revision the cache was filled at: a verdict moves it on,
    /// and the cache is then refilled from the store.
    pub(super) revision: Option<i64>,
    /// The analysis window in force per series (None: all points).
    pub(super) windows: HashMap<String, Option<Window>>,
}

impl SeriesCache {
    /// An empty cache.
    pub fn new() -> Self {
        SeriesCache::default()
    }

    /// Forgets everything (after a failed transaction, or when another
    /// process may have changed findings, as a verdict does).
    pub fn clear(&mut self) {
        self.units.clear();
        self.names = None;
        self.rows.clear();
        self.points.clear();
        self.awaiting.clear();
        self.judged_low.clear();
        self.robust.clear();
        self.pairwise.clear();
        self.line_fits.clear();
        self.log.clear();
        self.windows.clear();
        self.revision = None;
    }

    /// The series' fit kept from its last refit, when it was made from
    /// exactly these moments at this level.
    pub(super) fn known_fit(&self, key: &str, m: &Moments, level: f64) -> Option<LineFit> {
        self.line_fits
            .get(key)
            .filter(|f| f.moments == *m && f.level == level)
            .copied()
    }

    pub(super) fn quantiles(&mut self, level: f64) -> &mut TQuantiles {
        if self.quantiles.as_ref().is_none_or(|q| q.level() != level) {
            self.quantiles = Some(TQuantiles::new(level));
        }
        self.quantiles.get_or_insert_with(|| TQuantiles::new(level))
    }
}
