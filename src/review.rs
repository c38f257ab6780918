//! Verdicts: an analyst says what a flagged record was, the series refits
//! on what remains, and every step is audited.
//!
//! - `confirmed` keeps the record as it is;
//! - `corrected` stores a new version of the record with the value given
//!   (the original stays, superseded);
//! - `excluded` takes the record out of the fit (it stays stored);
//! - a revert undoes the finding's latest verdict and reopens the finding.
//!
//! Each writes a verdict row, a new fit version that cites it (refitted
//! from scratch on the remaining points, so it is exactly what the
//! statistics engine gives on them), an audit entry sealing all three, and
//! moves the store revision on so that a running daemon reloads.

use crate::config::{Config, NonDetectPolicy};
use crate::findings::rules::next_significance;
use crate::records::SeriesId;
use crate::stats::{LineFit, Transform, fit_line};
use crate::store::seal::SealScope;
use crate::store::{
    AuditKind, FindingStatus, NewFit, NewVerdict, RecordStatus, SeriesRow, Store, StoreError, Tx,
    VerdictKind,
};
use crate::window::Window;

/// What the analyst says about a finding's record.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Verdict {
    /// The record is right as it is.
    Confirmed,
    /// The record was wrong; this is the right value (in the unit stored).
    Corrected {
        /// The corrected y.
        value: f64,
    },
    /// The record does not belong in the fit.
    Excluded,
}

impl Verdict {
    /// What is stored of it.
    pub fn kind(self) -> VerdictKind {
        match self {
            Verdict::Confirmed => VerdictKind::Confirmed,
            Verdict::Corrected { .. } => VerdictKind::Corrected,
            Verdict::Excluded => VerdictKind::Excluded,
        }
    }
}

/// A verdict, or the revert of the latest one.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Action {
    /// Record a verdict.
    Verdict(Verdict),
    /// Undo the finding's latest verdict and reopen the finding.
    Revert,
}

/// One review as the analyst gives it.
#[derive(Debug, Clone, PartialEq)]
pub struct Review<'a> {
    /// The finding.
    pub finding: i64,
    /// What to do.
    pub action: Action,
    /// Why (required: the audit trail says why a record changed).
    pub note: &'a str,
    /// Who.
    pub by: &'a str,
    /// When (RFC 3339 UTC, the caller's clock).
    pub at: &'a str,
}

/// What a review did.
#[derive(Debug, Clone, PartialEq)]
pub struct Reviewed {
    /// The verdict row written.
    pub verdict_id: i64,
    /// What the verdict said (`Reverted` for a revert).
    pub verdict: VerdictKind,
    /// The series refitted, if the finding has one.
    pub series: Option<String>,
    /// The new fit version.
    pub fit_version: Option<i64>,
    /// The fit before the verdict.
    pub before: Option<LineFit>,
    /// The fit after it.
    pub after: Option<LineFit>,
    /// The corrected version's row, for `corrected`.
    pub new_record_row: Option<i64>,
    /// The finding's status now.
    pub finding_status: FindingStatus,
    /// Open trend findings of the series that the record corrected or
    /// excluded here caused alone: (id, summary). They stay open (a
    /// verdict is the analyst's), but the refit may have undone them.
    pub caused_trends: Vec<(i64, String)>,
}

/// Why a review was refused or failed.
#[derive(Debug, thiserror::Error)]
pub enum ReviewError {
    /// The store failed.
    #[error(transparent)]
    Store(#[from] StoreError),
    /// A request that cannot be carried out, with what to do instead.
    #[error("{0}")]
    Refused(String),
}

/// The command that closes trend finding `trend` once the record that
/// alone caused it has been answered on finding `finding` by verdict
/// `verdict_id` (`corrected` or `excluded`).
pub fn close_trend_command(
    trend: i64,
    finding: i64,
    verdict: VerdictKind,
    verdict_id: i64,
) -> String {
    format!(
        "slopewarden review {trend} --verdict confirmed --note \"caused by the record of finding {finding}, {verdict} by verdict {verdict_id}\""
    )
}

fn refused(msg: impl Into<String>) -> ReviewError {
    ReviewError::Refused(msg.into())
}

/// Records a verdict (or a revert) in one transaction.
pub fn review(store: &mut Store, config: &Config, r: &Review<'_>) -> Result<Reviewed, ReviewError> {
    if r.note.trim().is_empty() {
        return Err(refused(
            "a verdict needs a note saying what was checked (field sheet, chain of custody, lab report): add --note TEXT",
        ));
    }
    if r.by.trim().is_empty() {
        return Err(refused("say who gives the verdict: add --by NAME"));
    }
    let tx = store.begin()?;
    let Some(target) = tx.review_target(r.finding)? else {
        return Err(refused(format!(
            "there is no finding {}; `slopewarden findings --open` lists the open ones",
            r.finding
        )));
    };
    let history = tx.verdicts_of(r.finding)?;
    let undone: std::collections::HashSet<i64> = history.iter().filter_map(|v| v.reverts).collect();
    let active = history
        .iter()
        .rev()
        .find(|v| v.verdict != VerdictKind::Reverted && !undone.contains(&v.id))
        .cloned();

    let series = match &target.series {
        Some(key) => tx.series_for_review(key)?,
        None => None,
    };
    let mut new_record_row = None;
    let mut head_change: Option<i64> = None;
    let (kind, value, reverts, record_row) = match r.action {
        Action::Verdict(v) => {
            if let Some(a) = &active {
                return Err(refused(format!(
                    "finding {} already has a verdict ({} by {} at {}, verdict {}); to change it, revert it first: slopewarden review {} --revert --note TEXT",
                    r.finding, a.verdict, a.by, a.at, a.id, r.finding
                )));
            }
            if !target.status.is_open() {
                return Err(refused(format!(
                    "finding {} is {}, not open",
                    r.finding, target.status
                )));
            }
            let needs_record = matches!(v, Verdict::Corrected { .. } | Verdict::Excluded);
            let record = match target.record_row {
                Some(row) => tx.record_state(row)?,
                None => None,
            };
            if needs_record && record.is_none() {
                return Err(refused(format!(
                    "finding {} concerns no single record (it is about a trend, a file or a feed), so it can only be confirmed: --verdict confirmed",
                    r.finding
                )));
            }
            match (v, &record, &series) {
                (Verdict::Excluded, Some(rec), _) => {
                    if rec.status != RecordStatus::Current {
                        return Err(refused(format!(
                            "record {} (row {}) is {}, not the current version",
                            rec.record_id, rec.row, rec.status
                        )));
                    }
                    tx.set_excluded(rec.row, true)?;
                }
                (Verdict::Corrected { value }, Some(rec), Some(s)) => {
                    if !value.is_finite() {
                        return Err(refused(format!(
                            "`{value}` is not a finite number; give the corrected value in {}",
                            rec.unit.as_deref().unwrap_or("the stored unit")
                        )));
                    }
                    if value < 0.0 {
                        return Err(refused(format!(
                            "{value} is negative; a concentration cannot be, give the corrected value in {}",
                            rec.unit.as_deref().unwrap_or("the stored unit")
                        )));
                    }
                    if rec.status != RecordStatus::Current {
                        return Err(refused(format!(
                            "record {} (row {}) is {}, not the current version",
                            rec.record_id, rec.row, rec.status
                        )));
                    }
                    let point = fit_point_of(s, rec.x, value)?;
                    let version = tx.max_version(&rec.record_id)? + 1;
                    let note = format!("corrected from {} by verdict: {}", rec.y, r.note);
                    let row = tx.insert_correction(
                        rec.row,
                        version,
                        value,
                        point,
                        s.latest_record,
                        &note,
                    )?;
                    tx.set_record_status(rec.row, RecordStatus::Superseded)?;
                    new_record_row = Some(row);
                    head_change = Some(row);
                }
                (Verdict::Corrected { .. }, Some(_), None) => {
                    return Err(refused(format!(
                        "finding {} has no series to refit",
                        r.finding
                    )));
                }
                _ => {}
            }
            let value = match v {
                Verdict::Corrected { value } => Some(value),
                _ => None,
            };
            (v.kind(), value, None, target.record_row)
        }
        Action::Revert => {
            let Some(a) = active else {
                return Err(refused(format!(
                    "finding {} has no verdict to revert",
                    r.finding
                )));
            };
            match a.verdict {
                VerdictKind::Excluded => {
                    if let Some(row) = a.record_row {
                        tx.set_excluded(row, false)?;
                    }
                }
                VerdictKind::Corrected => {
                    if let (Some(old), Some(new)) = (a.record_row, a.new_record_row) {
                        tx.set_record_status(new, RecordStatus::Superseded)?;
                        tx.set_record_status(old, RecordStatus::Current)?;
                    }
                }
                VerdictKind::Confirmed | VerdictKind::Reverted => {}
            }
            (VerdictKind::Reverted, None, Some(a.id), a.record_row)
        }
    };
    // The trend changes this record caused alone, for the analyst to look
    // at again against the refit (only for a record that now changed).
    let caused_trends = match (&target.series, r.action, record_row) {
        (Some(key), Action::Verdict(Verdict::Corrected { .. } | Verdict::Excluded), Some(row)) => {
            match tx.record_state(row)? {
                Some(rec) => tx.trend_findings_caused_by(key, &rec.record_id, r.finding)?,
                None => Vec::new(),
            }
        }
        _ => Vec::new(),
    };
    let verdict_id = tx.insert_verdict(&NewVerdict {
        finding: r.finding,
        verdict: kind,
        record_row,
        new_record_row,
        value,
        reverts,
        note: r.note,
        by: r.by,
        at: r.at,
    })?;
    let finding_status = kind.finding_status();
    tx.set_finding_status(r.finding, finding_status)?;

    let (before, after, fit_version) = match series {
        Some(mut s) => {
            if let Some(head) = head_change {
                s.latest_record = Some(head);
            }
            let window = effective_window(&tx, config, &s)?;
            let (before, after) = refit(
                &tx,
                config,
                &mut s,
                r.at,
                window,
                Trigger::Verdict(verdict_id),
            )?;
            (before, after, Some(s.fit_version))
        }
        None => (None, None, None),
    };
    tx.bump_revision()?;
    let seal = tx.seal(SealScope::Verdict(verdict_id))?;
    let what = match (r.action, reverts) {
        (Action::Revert, Some(v)) => format!("reverted verdict {v}"),
        _ => kind.to_string(),
    };
    let fit_text = match (&target.series, fit_version, &after) {
        (Some(k), Some(v), Some(f)) => format!(
            "; {k} refitted as version {v}: n = {}, slope = {}",
            f.n, f.slope
        ),
        (Some(k), Some(v), None) => format!("; {k} refitted as version {v} (no fit)"),
        _ => String::new(),
    };
    tx.append_audit(
        r.at,
        AuditKind::Verdict,
        &format!("finding {}", r.finding),
        &format!(
            "verdict {verdict_id}: {what} by {}: {}{fit_text} {seal}",
            r.by, r.note
        ),
    )?;
    tx.commit()?;
    Ok(Reviewed {
        verdict_id,
        verdict: kind,
        series: target.series,
        fit_version,
        before,
        after,
        new_record_row,
        finding_status,
        caused_trends,
    })
}

/// A corrected value's point on the series' fitted scale (None: a value
/// that does not enter the fit).
fn fit_point_of(s: &SeriesRow, x: f64, y: f64) -> Result<Option<(f64, f64)>, ReviewError> {
    let transform = Transform::from_name(&s.transform).unwrap_or(Transform::None);
    if transform == Transform::None {
        return Ok(Some((x, y)));
    }
    transform.apply(0, x, y).map(Some).map_err(|_| {
        refused(format!(
            "{y} cannot enter the {} fit of series {}: a logarithm needs a positive value",
            transform.name(),
            s.key
        ))
    })
}

/// What made a from-scratch refit.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Trigger {
    Verdict(i64),
    Window(i64),
}

/// The analysis window in force for a series: the `window` command's,
/// else the configuration's.
pub fn effective_window(
    tx: &Tx<'_>,
    config: &Config,
    s: &SeriesRow,
) -> Result<Option<Window>, ReviewError> {
    match tx.window_override(s.id)? {
        Some(text) if text == "all" => Ok(None),
        Some(text) => Window::parse(&text).map(Some).map_err(refused),
        None => Ok(config.series_settings(&SeriesId(s.key.clone())).window),
    }
}

/// Refits the series from scratch on its remaining points (within
/// `window`) and writes the fit version citing its trigger. Returns the
/// fits before and after.
fn refit(
    tx: &Tx<'_>,
    config: &Config,
    s: &mut SeriesRow,
    at: &str,
    window: Option<Window>,
    trigger: Trigger,
) -> Result<(Option<LineFit>, Option<LineFit>), ReviewError> {
    let before = LineFit::from_moments(&s.moments, config.level).ok();
    let transform = Transform::from_name(&s.transform).unwrap_or(Transform::None);
    let all: Vec<(f64, f64)> = tx
        .fit_points_with_rows(s.latest_record)?
        .into_iter()
        .map(|(_, x, y)| (x, y))
        .collect();
    let points = match window {
        Some(w) => w.on_fit_scale(transform).select(&all, |p| p.0),
        None => all,
    };
    let (x, y): (Vec<f64>, Vec<f64>) = points.iter().copied().unzip();
    let fit = fit_line(&x, &y, config.level);
    s.moments = crate::stats::Moments::from_points(&x, &y);
    s.fit_version += 1;
    s.window = window.map(|w| w.text());
    s.x_span = crate::pipeline::x_span(&x);
    let robust = if points.len() >= 3 {
        crate::pipeline::robust_row(&points, config.level)
    } else {
        None
    };
    s.robust_n = x.len() as i64;
    let thresholds = &config.series_settings(&SeriesId(s.key.clone())).findings;
    s.significant = next_significance(
        s.significant,
        fit.as_ref().ok().and_then(|f| f.slope_p),
        x.len(),
        thresholds,
    );
    let non_detects = NonDetectPolicy::from_name(&s.non_detects)
        .map_or_else(|| s.non_detects.clone(), |p| p.name());
    let note = match &fit {
        Err(e) => Some(format!("no fit: {e}")),
        Ok(_) => None,
    };
    let mut batch = crate::store::FitBatch::new();
    let fit_row = tx.queue_fit(
        &mut batch,
        &NewFit {
            state: s,
            trigger_file: None,
            created_at: at,
            transform: &s.transform.clone(),
            non_detects: &non_detects,
            level: config.level,
            fit: fit.as_ref().ok(),
            robust,
            note,
        },
    )?;
    tx.flush_fits(&mut batch)?;
    match trigger {
        Trigger::Verdict(id) => tx.cite_verdict(fit_row, id)?,
        Trigger::Window(id) => tx.cite_window(fit_row, id)?,
    }
    s.latest_fit = Some(fit_row);
    // The ln(y) screen is rebuilt from the points when the series is next
    // ingested (a verdict or a window changes which points it holds).
    s.log_screen = None;
    tx.save_series_heads(s)?;
    Ok((before, fit.ok()))
}

/// What a window change did.
#[derive(Debug, Clone, PartialEq)]
pub struct WindowChanged {
    /// The series.
    pub series: String,
    /// The window now in force (None: all points).
    pub window: Option<String>,
    /// The new fit version.
    pub fit_version: i64,
    /// The fit before.
    pub before: Option<LineFit>,
    /// The fit after.
    pub after: Option<LineFit>,
}

/// Sets a series' analysis window by command: `text` is a window
/// (`x:LO..HI`, `last:N`, `since:YYYY-MM-DD`), `all` for every point, or
/// `config` to give the choice back to the configuration. Audited; refits.
pub fn set_window(
    store: &mut Store,
    config: &Config,
    key: &str,
    text: &str,
    note: &str,
    by: &str,
    at: &str,
) -> Result<WindowChanged, ReviewError> {
    if note.trim().is_empty() {
        return Err(refused(
            "a window change needs a note saying why: add --note TEXT",
        ));
    }
    let stored = match text.trim() {
        "config" => None,
        "all" => Some("all".to_string()),
        t => Some(
            Window::parse(t)
                .map_err(|e| refused(format!("{e}; or `all`, or `config`")))?
                .text(),
        ),
    };
    let tx = store.begin()?;
    let Some(mut s) = tx.series_for_review(key)? else {
        return Err(refused(format!(
            "there is no series `{key}`; `slopewarden status` lists them"
        )));
    };
    let id = tx.insert_window_change(s.id, stored.as_deref(), "command", note, by, at)?;
    let window = effective_window(&tx, config, &s)?;
    let changed = window_change(&tx, config, &mut s, window, id, at, by, note)?;
    tx.commit()?;
    Ok(changed)
}

/// Applies windows whose configuration changed since a series' last fit
/// (at start-up of `run` and `ingest`): each change is recorded, audited
/// and refits. Returns what changed.
pub fn apply_config_windows(
    store: &mut Store,
    config: &Config,
    at: &str,
) -> Result<Vec<WindowChanged>, ReviewError> {
    let tx = store.begin()?;
    let mut done = Vec::new();
    for key in tx.series_keys()? {
        let Some(mut s) = tx.series_for_review(&key)? else {
            continue;
        };
        if s.fit_version == 0 {
            continue;
        }
        let window = effective_window(&tx, config, &s)?;
        if window.map(|w| w.text()) == s.window {
            continue;
        }
        let text = window.map(|w| w.text());
        let note = "the configuration's window changed";
        let id = tx.insert_window_change(
            s.id,
            Some(text.as_deref().unwrap_or("all")),
            "config",
            note,
            "configuration",
            at,
        )?;
        done.push(window_change(
            &tx,
            config,
            &mut s,
            window,
            id,
            at,
            "configuration",
            note,
        )?);
    }
    if done.is_empty() {
        drop(tx);
    } else {
        tx.bump_revision()?;
        tx.commit()?;
    }
    Ok(done)
}

#[allow(clippy::too_many_arguments)]
fn window_change(
    tx: &Tx<'_>,
    config: &Config,
    s: &mut SeriesRow,
    window: Option<Window>,
    change: i64,
    at: &str,
    by: &str,
    note: &str,
) -> Result<WindowChanged, ReviewError> {
    let (before, after) = refit(tx, config, s, at, window, Trigger::Window(change))?;
    tx.bump_revision()?;
    let seal = tx.seal(SealScope::Window(change))?;
    let text = window.map_or_else(|| "all points".to_string(), |w| w.text());
    let fit_text = match &after {
        Some(f) => format!("n = {}, slope = {}", f.n, f.slope),
        None => "no fit".into(),
    };
    tx.append_audit(
        at,
        AuditKind::Window,
        &s.key,
        &format!(
            "window change {change}: {text} by {by}: {note}; refitted as version {}: {fit_text} {seal}",
            s.fit_version
        ),
    )?;
    Ok(WindowChanged {
        series: s.key.clone(),
        window: window.map(|w| w.text()),
        fit_version: s.fit_version,
        before,
        after,
    })
}
