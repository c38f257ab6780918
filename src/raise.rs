//! Raising findings inside a file's transaction: store the finding, its
//! audit entry and its messages (rendered now, sent later by the outbox
//! sender), all in the transaction that stores the records, so that a
//! finding and its messages exist exactly when its records do.
//!
//! The judging itself is in [`crate::findings::rules`]; the wording in
//! [`crate::messages`]. This module only gathers what they need.

use serde::Serialize;
use serde_json::json;

use crate::config::{Config, SeriesSettings};
use crate::findings::advice::{AdviceInput, advise};
use crate::findings::causes::{Candidate, CauseInput, Change, XKind, rank_causes};
use crate::findings::rules::{
    CutoffSource, Measured, RecordJudgement, RecordKind, Thresholds, TrendChange,
};
use crate::messages::{
    Cause, ChartPoint, FindingKind, FitSummary, Flag, Notice, PointRole, RecordInfo, Rendered,
    RobustSlope, Severity, render_notice, render_notice_heading,
};
use crate::records::{Record, SeriesId};
use crate::stats::{LineFit, Transform};
use crate::store::seal::SealScope;
use crate::store::{AuditKind, FileId, NewFinding, NewMessage, SeriesRow, StoreError, Tx};

type Result<T> = std::result::Result<T, StoreError>;

/// What the file's transaction knows about one flagged record.
pub struct RecordCase<'a> {
    /// The record.
    pub record: &'a Record,
    /// Its stored row.
    pub row_id: i64,
    /// The series row (after the record).
    pub series: &'a SeriesRow,
    /// Its transform.
    pub transform: Transform,
    /// The series' fit with the record and without it (the fit before
    /// it arrived), when there is one.
    pub fits: (Option<LineFit>, Option<LineFit>),
    /// What the rules said (judged against the fit without records
    /// awaiting review).
    pub judgement: &'a RecordJudgement,
    /// How many records awaiting review were left out of the judging fit.
    pub left_out: usize,
    /// The record's point on the fitted scale.
    pub fit_point: (f64, f64),
    /// The series' points (fitted scale), the record included.
    pub points: &'a [(f64, f64)],
    /// Points awaiting review (fitted scale).
    pub awaiting: &'a [(f64, f64)],
    /// Its likely entry errors, best first ([`likely_causes`]).
    pub causes: &'a [Candidate],
    /// Robust slope of the series, if known.
    pub robust: Option<(f64, f64, f64)>,
    /// Whether to draw the chart (not for a message held for a digest).
    pub draw_chart: bool,
    /// The series' x range (fitted scale) before the record.
    pub span_before: Option<(f64, f64)>,
}

/// What x measures for a record of `file_name`: decimal years when the
/// feed takes x from a date column, when the series' configured `x_unit`
/// names years, or (no unit configured) when the series' surveyed x range
/// lies in calendar years; never guessed from the record itself, whose x
/// may be the typo.
fn x_kind_of(
    config: &Config,
    file_name: &str,
    transform: Transform,
    span_before: Option<(f64, f64)>,
    x_unit: Option<&str>,
) -> XKind {
    let from_date = matches!(
        config.feed_for(std::path::Path::new(file_name)).1.x,
        crate::records::XSource::Date { .. }
    );
    if let (false, Some(unit)) = (from_date, x_unit) {
        return if crate::config::unit_is_year(unit) {
            XKind::DecimalYear
        } else {
            XKind::Distance
        };
    }
    let span_in_years = span_before.is_some_and(|(lo, hi)| {
        transform == Transform::None
            && (1800.0..=2200.0).contains(&lo)
            && (1800.0..=2200.0).contains(&hi)
    });
    if from_date || span_in_years {
        XKind::DecimalYear
    } else {
        XKind::Distance
    }
}

/// The likely entry errors of a flagged record, best first (at most four),
/// scored against the series' fit without it (the fit before it arrived);
/// `others` are the fits of the series it could belong to instead. Pure,
/// so that a file's findings can rank their causes while its rows are
/// still being written.
pub fn likely_causes(
    config: &Config,
    record: &Record,
    fit_without: Option<&LineFit>,
    transform: Transform,
    span_before: Option<(f64, f64)>,
    others: &[(&str, &LineFit)],
    file_name: &str,
) -> Vec<Candidate> {
    let Some(fit) = fit_without else {
        return Vec::new();
    };
    let x_raw = format!("{}", record.x);
    let y_raw = format!("{}", record.y.number());
    let settings = config.series_settings(&record.series);
    rank_causes(&CauseInput {
        fit_without: fit,
        transform,
        x: record.x,
        y: record.y.number(),
        x_raw: &x_raw,
        y_raw: &y_raw,
        x_kind: x_kind_of(
            config,
            file_name,
            transform,
            span_before,
            settings.x_unit.as_deref(),
        ),
        unit: record.unit.as_deref(),
        x_unit: settings.x_unit.as_deref(),
        others,
        max: 4,
    })
    .candidates
}

/// Raises a record-level finding; returns its id.
pub fn record_finding(
    tx: &Tx<'_>,
    config: &Config,
    case: &RecordCase<'_>,
    file: (FileId, &str),
    at: &str,
    now_unix: i64,
) -> Result<i64> {
    let r = case.record;
    let kinds: Vec<String> = case
        .judgement
        .kinds
        .iter()
        .map(|k| k.name().to_string())
        .collect();
    let severity = severity_of(config, &kinds);
    let level = config.level;
    let (with, without) = case.fits;
    let judged_against = if case.left_out == 0 {
        "the fit of the series before this record".to_string()
    } else {
        format!(
            "the fit of the series before this record, without the {} record(s) still awaiting review (so that one unverified record cannot mask another)",
            case.left_out
        )
    };

    let settings = config.series_settings(&r.series);
    let x_kind = x_kind_of(
        config,
        file.1,
        case.transform,
        case.span_before,
        settings.x_unit.as_deref(),
    );
    let x_raw = format!("{}", r.x);
    let y_raw = format!("{}", r.y.number());
    let unit = r.unit.clone().unwrap_or_default();
    let (x_label, x_unit) = (x_label(x_kind, &settings), x_unit(x_kind, &settings));
    let scale_note = scale_note(case.transform, &unit, &per_x(&x_label, &x_unit));
    let causes = case.causes;
    let cause_lines: Vec<Cause> = causes
        .iter()
        .map(|c| Cause {
            label: c.label.clone(),
            other_series: matches!(c.change, Change::OtherSeries { .. }),
            score_p: c.score.p,
        })
        .collect();
    let advice = if case.judgement.kinds.contains(&RecordKind::HighLeverage) {
        let xs: Vec<f64> = case
            .points
            .iter()
            .map(|p| original(case.transform, p.0, p.1).0)
            .collect();
        let index = case
            .points
            .iter()
            .rposition(|p| *p == case.fit_point)
            .unwrap_or(xs.len().saturating_sub(1));
        advise(&AdviceInput {
            x: &xs,
            record: index,
            transform: case.transform,
            multiplier: config.findings.leverage_multiplier,
            bound: 10_000,
        })
        .ok()
        .map(|a| a.sentence(&x_unit))
    } else {
        None
    };

    let no_cause = (causes.is_empty() && without.is_some())
        .then(|| no_cause_sentence(&case.judgement.kinds, x_kind, &x_label, advice.is_some()));

    let summary = format!(
        "record {} in {}: {}",
        r.record_id,
        case.series.key,
        kinds.join(", ").replace('_', " ")
    );
    let non_detects = settings.non_detects.name();
    let detail = serde_json::to_string(&RecordDetail {
        causes: causes.iter().map(CauseDetail::of).collect(),
        caution: CAUTION,
        expected_leverage: case.judgement.expected_leverage,
        fit_with: with.as_ref().map(FitDetail::of),
        fit_without: without.as_ref().map(FitDetail::of),
        judged_against: &judged_against,
        leverage: case.judgement.leverage,
        measures: case
            .judgement
            .measures
            .iter()
            .map(MeasureDetail::of)
            .collect(),
        no_cause: no_cause.as_deref(),
        non_detects: &non_detects,
        record: RecordFacts {
            censored: r.y.is_censored(),
            file: file.1,
            id: &r.record_id,
            line: r.line,
            unit: r.unit.as_deref(),
            x: r.x,
            x_name: settings
                .x_name
                .as_deref()
                .filter(|_| x_kind != XKind::DecimalYear),
            x_unit: (!x_unit.is_empty()).then_some(x_unit.as_str()),
            y: r.y.number(),
        },
        robust: case
            .robust
            .map(|(theil_sen_slope, ci_low, ci_high)| RobustDetail {
                ci_high,
                ci_low,
                theil_sen_slope,
            }),
        sampling_advice: advice.as_deref(),
        transform: case.transform.name(),
    })
    .unwrap_or_else(|e| unreachable!("BUG: a finding's detail is plain data: {e}"));
    let id = tx.insert_finding(&NewFinding {
        created_at: at,
        series: Some(case.series.id),
        file: Some(file.0),
        record_row: Some(case.row_id),
        record_ids: std::slice::from_ref(&r.record_id),
        kinds: &kinds,
        severity,
        // The version this file's refit gave the series (already counted).
        fit_version: Some(case.series.fit_version),
        // Only a suspect record is kept out of later judging (see pipeline).
        fit_point: case
            .judgement
            .kinds
            .iter()
            .any(|k| matches!(k, RecordKind::Outlier | RecordKind::HighLeverage))
            .then_some(case.fit_point),
        summary: &summary,
        detail: &detail,
    })?;

    // The message.
    let mut points: Vec<ChartPoint> = case
        .points
        .iter()
        .map(|&(fx, fy)| {
            let (x, y) = original(case.transform, fx, fy);
            let role = if (fx, fy) == case.fit_point {
                PointRole::ThisRecord
            } else if case.awaiting.contains(&(fx, fy)) {
                PointRole::AwaitingReview
            } else {
                PointRole::Fitted
            };
            ChartPoint {
                x,
                y,
                role,
                non_detect: false,
            }
        })
        .collect();
    if !case.draw_chart {
        points.clear();
    } else if !case.points.is_empty() && !points.iter().any(|p| p.role == PointRole::ThisRecord) {
        let (x, y) = original(case.transform, case.fit_point.0, case.fit_point.1);
        points.push(ChartPoint {
            x,
            y,
            role: PointRole::ThisRecord,
            non_detect: r.y.is_censored(),
        });
    }
    let (lo, hi) = case
        .points
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), p| {
            (a.min(p.0), b.max(p.0))
        });
    let notice = Notice {
        finding_id: id,
        instance: message_domain(tx, config)?,
        series: case.series.key.clone(),
        record: Some(RecordInfo {
            id: r.record_id.clone(),
            file: file.1.to_string(),
            line: r.line,
            x: x_raw.clone(),
            y: y_raw.clone(),
        }),
        trend_record: None,
        unit,
        x_label,
        x_unit,
        severity,
        kinds: kinds
            .iter()
            .filter_map(|k| FindingKind::from_name(k))
            .collect(),
        flags: flags(&case.judgement.measures),
        fit_with: with.as_ref().map(summary_of),
        fit_without: without.as_ref().map(summary_of),
        ci_level: level,
        scale_note,
        robust: case.robust.map(|(s, a, b)| RobustSlope {
            slope: s,
            ci: Some((a, b)),
        }),
        judged_against,
        causes: cause_lines,
        no_cause,
        sampling_advice: advice,
        nondetect_policy: non_detects,
        points,
        line_with: with
            .as_ref()
            .map(|f| line(case.transform, f, lo, hi))
            .unwrap_or_default(),
        line_without: without
            .as_ref()
            .map(|f| line(case.transform, f, lo, hi))
            .unwrap_or_default(),
        verdict_commands: verdict_commands(id, None),
        created_at: at.to_string(),
    };
    queue(tx, config, id, Some(&case.series.key), &notice, now_unix)?;
    audit_finding(tx, at, id, &summary)?;
    Ok(id)
}

/// Raises a finding without a record under judgement (a trend change, a
/// conflict, rows or a file set aside); returns its id.
#[allow(clippy::too_many_arguments)]
pub fn plain_finding(
    tx: &Tx<'_>,
    config: &Config,
    kind: &str,
    series: Option<&SeriesRow>,
    file: Option<(FileId, &str)>,
    record_ids: &[String],
    summary: &str,
    detail: serde_json::Value,
    fits: (Option<&LineFit>, Option<&LineFit>),
    robust: Option<(f64, f64, f64)>,
    record_row: Option<i64>,
    at: &str,
    now_unix: i64,
) -> Result<i64> {
    let kinds = vec![kind.to_string()];
    let severity = severity_of(config, &kinds);
    let transform = series.and_then(|s| Transform::from_name(&s.transform));
    let settings = series.map(|s| config.series_settings(&SeriesId(s.key.clone())));
    let x_kind = match (series, file, transform, &settings) {
        (Some(s), Some(f), Some(t), Some(set)) => {
            Some(x_kind_of(config, f.1, t, s.x_span, set.x_unit.as_deref()))
        }
        _ => None,
    };
    let id = tx.insert_finding(&NewFinding {
        created_at: at,
        series: series.map(|s| s.id),
        file: file.map(|f| f.0),
        record_row,
        record_ids,
        kinds: &kinds,
        severity,
        fit_version: series.map(|s| s.fit_version),
        fit_point: None,
        summary,
        detail: &detail.to_string(),
    })?;
    // A trend's detail names the unit of its series' values.
    let unit = series
        .and_then(|s| s.unit.clone())
        .or_else(|| {
            detail
                .get("unit")
                .and_then(|v| v.as_str())
                .map(str::to_string)
        })
        .unwrap_or_default();
    let (x_label, x_unit) = match (x_kind, &settings) {
        (Some(k), Some(set)) => (x_label(k, set), x_unit(k, set)),
        _ => ("x".to_string(), String::new()),
    };
    let scale_note = transform.and_then(|t| scale_note(t, &unit, &per_x(&x_label, &x_unit)));
    let notice = Notice {
        finding_id: id,
        instance: message_domain(tx, config)?,
        series: match (series, file) {
            (Some(s), _) => s.key.clone(),
            (None, Some(f)) => f.1.to_string(),
            (None, None) => detail
                .get("feed")
                .and_then(|v| v.as_str())
                .map_or_else(String::new, |f| format!("feed {f}")),
        },
        record: None,
        trend_record: (detail.get("caused_by_newest_record") == Some(&json!(true)))
            .then(|| detail.get("newest_record").and_then(|v| v.as_str()))
            .flatten()
            .map(str::to_string),
        unit,
        x_label,
        x_unit,
        severity,
        kinds: Vec::new(),
        flags: vec![Flag {
            kind: FindingKind::from_name(kind).unwrap_or(FindingKind::Quarantined),
            // A trend change says what changed; the kind and series are
            // already in the flag's name and the message's first line.
            measure: detail
                .get("flag")
                .and_then(|v| v.as_str())
                .unwrap_or(summary)
                .to_string(),
            value: None,
            cutoff: None,
            cutoff_source: detail
                .get("rule")
                .and_then(|v| v.as_str())
                .unwrap_or("")
                .to_string(),
        }],
        fit_with: fits.0.map(summary_of),
        fit_without: fits.1.map(summary_of),
        ci_level: config.level,
        scale_note,
        robust: robust.map(|(s, a, b)| RobustSlope {
            slope: s,
            ci: Some((a, b)),
        }),
        judged_against: detail
            .get("judged_against")
            .and_then(|v| v.as_str())
            .unwrap_or("the previous fit of the series")
            .to_string(),
        causes: Vec::new(),
        no_cause: None,
        sampling_advice: None,
        nondetect_policy: series.map_or_else(String::new, |s| s.non_detects.clone()),
        points: Vec::new(),
        line_with: Vec::new(),
        line_without: Vec::new(),
        verdict_commands: match (
            record_row,
            detail.get("proposed_y").and_then(|v| v.as_f64()),
        ) {
            // A resubmitted value: keep the stored one, take the new one, or
            // leave the record out.
            (Some(_), Some(y)) => verdict_commands(id, Some(y)),
            // No single record: `review` takes only "confirmed" here.
            _ => vec![format!(
                "slopewarden review {id} --verdict confirmed --note \"...\""
            )],
        },
        created_at: at.to_string(),
    };
    queue(
        tx,
        config,
        id,
        series.map(|s| s.key.as_str()),
        &notice,
        now_unix,
    )?;
    audit_finding(tx, at, id, summary)?;
    Ok(id)
}

/// A trend change as a finding.
#[allow(clippy::too_many_arguments)]
pub fn trend_finding(
    tx: &Tx<'_>,
    config: &Config,
    change: &TrendChange,
    series: &SeriesRow,
    file: (FileId, &str),
    before: Option<&LineFit>,
    after: &LineFit,
    (newest, unit): (Option<&str>, Option<&str>),
    robust: Option<(f64, f64, f64)>,
    at: &str,
    now_unix: i64,
) -> Result<i64> {
    let cause = match change.caused_by_newest {
        Some(true) => {
            " The newest record alone causes it: without it, the change would not happen."
        }
        Some(false) => " It does not hinge on the newest record alone.",
        None => "",
    };
    let summary = format!(
        "{} in {}: {}.{cause}",
        change.kind.replace('_', " "),
        series.key,
        change.summary
    );
    let detail = json!({
        "change": change.summary,
        "caused_by_newest_record": change.caused_by_newest,
        "newest_record": newest,
        "unit": unit,
        "fit_before": before.map(FitDetail::of),
        "fit_after": FitDetail::of(after),
        "flag": format!("{}.{cause}", change.summary),
        "rule": trend_rule(
            change.kind,
            &config.series_settings(&SeriesId(series.key.clone())).findings
        ),
        "judged_against": "the previous fit version of the series",
        "caution": CAUTION,
    });
    let ids: Vec<String> = newest.map(|s| vec![s.to_string()]).unwrap_or_default();
    plain_finding(
        tx,
        config,
        change.kind,
        Some(series),
        Some(file),
        &ids,
        &summary,
        detail,
        (Some(after), before),
        robust,
        None,
        at,
        now_unix,
    )
}

/// The rule a trend change was raised by, in words.
fn trend_rule(kind: &str, f: &Thresholds) -> String {
    let significance = format!(
        "a trend counts as significant once p < {}, and stays so until p > {} (hysteresis), from n = {}; project defaults",
        f.significance_alpha, f.release_alpha, f.min_n_trend
    );
    if kind == "sign_reversal" {
        format!("raised when a significant trend's slope changes sign: {significance}")
    } else {
        significance
    }
}

/// What a message calls x: "year" for decimal years (the renderer's cue
/// for "per year"), else the configured `x_name`, else "x".
fn x_label(kind: XKind, settings: &SeriesSettings) -> String {
    match (kind, &settings.x_name) {
        (XKind::DecimalYear, _) => "year".into(),
        (_, Some(name)) => name.clone(),
        (_, None) => "x".into(),
    }
}

/// Why a record finding lists no likely entry error: which errors were
/// tried, and what is left to check. Said only when they were tried (the
/// series had a fit without the record) and none fitted markedly better.
fn no_cause_sentence(kinds: &[RecordKind], x_kind: XKind, x_label: &str, advice: bool) -> String {
    let x_errors = match x_kind {
        XKind::DecimalYear => "a year off by 1 or 10".to_string(),
        XKind::Distance | XKind::Other if x_label == "x" => {
            "x ten times too large or too small".to_string()
        }
        XKind::Distance | XKind::Other => format!("a {x_label} ten times too large or too small"),
    };
    let see_advice = if advice {
        " and see the sampling advice"
    } else {
        ""
    };
    let tried = format!(
        "None of the entry errors tried (a slipped decimal point, a unit mix-up, a lost minus sign, transposed digits, {x_errors}, a record filed under the wrong series) fits the trend without the record markedly better than the record as written."
    );
    let next = if kinds.contains(&RecordKind::Outlier) && kinds.contains(&RecordKind::HighLeverage)
    {
        format!(
            "If its value and {x_label} are right, the sample lies beyond the range surveyed so far and departs from the trend, which there rests on this record alone: check the sample itself (where and how it was taken){see_advice}."
        )
    } else if kinds.contains(&RecordKind::Outlier) {
        "If its value is as the laboratory reported it, check the sample itself: where, at what depth and how it was taken, its holding time, and anything unusual noted on the field sheet.".to_string()
    } else if kinds.contains(&RecordKind::HighLeverage) {
        format!(
            "It is not far enough from that trend to be an outlier, but its {x_label} lies far beyond the series' usual spacing: check that first{}.",
            if advice {
                ", and if it is right, see the sampling advice"
            } else {
                ""
            }
        )
    } else {
        format!(
            "It is not far enough from that trend to be an outlier: it weighs on the trend through its {x_label} together with its departure from it, as a correct record often does while a series is short. Check its {x_label} and its value; if both are right, confirm it."
        )
    };
    format!("{tried} {next}")
}

/// x's unit in a message: the configured `x_unit` unless x is years
/// (which the label already says); empty when not configured.
fn x_unit(kind: XKind, settings: &SeriesSettings) -> String {
    match kind {
        XKind::DecimalYear => String::new(),
        _ => settings.x_unit.clone().unwrap_or_default(),
    }
}

/// What a slope is per: "year", the unit of x, or "unit of x".
fn per_x(x_label: &str, x_unit: &str) -> String {
    if x_label == "year" {
        "year".into()
    } else if x_unit.is_empty() {
        "unit of x".into()
    } else {
        x_unit.to_string()
    }
}

/// The sentence saying what the slopes of a transformed fit are in (None
/// on the plain scale, where the message states the unit itself).
fn scale_note(transform: Transform, unit: &str, per: &str) -> Option<String> {
    let y = if unit.is_empty() { "y" } else { unit };
    match transform {
        Transform::None => None,
        Transform::LogY => Some(format!(
            "Fitted on the ln(y) scale: slopes are in ln({y}) per {per}; a slope b is a change of 100 × (e^b − 1) % per {per}."
        )),
        Transform::LogX => Some(format!(
            "Fitted on the ln(x) scale: slopes are in {y} per unit of ln x."
        )),
        Transform::LogLog => Some(
            "Fitted on the ln(y)-ln(x) scale: slopes are power-law exponents (ln y per ln x)."
                .to_string(),
        ),
    }
}

/// The caution every finding carries.
pub const CAUTION: &str = "A statistical flag is a prompt to verify the record, not a compliance determination. The applicable regulations, the site's approved sampling plan and licensed professionals decide what the data mean.";

/// The Message-ID domain: this database's token under the instance name.
/// The finding's audit entry, sealing the finding and its queued messages
/// (so it is appended after them).
fn audit_finding(tx: &Tx<'_>, at: &str, id: i64, summary: &str) -> Result<()> {
    let seal = tx.seal(SealScope::Finding(id))?;
    tx.append_audit(
        at,
        AuditKind::Finding,
        &format!("finding {id}"),
        &format!("{summary} {seal}"),
    )
}

fn message_domain(tx: &Tx<'_>, config: &Config) -> Result<String> {
    Ok(format!("{}.{}", tx.store_token()?, config.mail.instance))
}

/// The three verdicts on a record, `corrected` with `value` ready when it
/// is known (a resubmitted value), else with V to fill in.
fn verdict_commands(id: i64, value: Option<f64>) -> Vec<String> {
    let corrected = value.map_or("corrected --value V".to_string(), |y| {
        format!("corrected --value {y}")
    });
    ["confirmed", corrected.as_str(), "excluded"]
        .iter()
        .map(|v| format!("slopewarden review {id} --verdict {v} --note \"...\""))
        .collect()
}

fn severity_of(config: &Config, kinds: &[String]) -> Severity {
    // Two independent record-level signals at once: the record changes
    // what the trend says.
    if kinds.len() >= 2 {
        return Severity::Alert;
    }
    kinds
        .iter()
        .map(|k| config.mail.severity_of(k))
        .max()
        .unwrap_or(Severity::Notice)
}

/// Whether every recipient of the series is at their hourly limit, so that
/// its messages will be held for a digest (which carries no chart): the
/// caller can then skip reading points and drawing.
pub fn all_held(tx: &Tx<'_>, config: &Config, series: Option<&str>, now_unix: i64) -> Result<bool> {
    for to in config.mail.recipients(series) {
        if tx.messages_since(&to, now_unix - 3600)? < i64::from(config.mail.max_per_hour) {
            return Ok(false);
        }
    }
    Ok(true)
}

/// Queues the message for each recipient, holding it for a digest when the
/// recipient has had `max_per_hour` messages in the last hour. A held row
/// keeps only the message's identity and subject, which is all the digest
/// lists: the notice itself is the finding (`slopewarden show`), so its
/// bodies are neither rendered nor stored a second time (in a backlog with
/// many findings, rendering and storing held bodies took half the ingest).
fn queue(
    tx: &Tx<'_>,
    config: &Config,
    finding: i64,
    series: Option<&str>,
    notice: &Notice,
    now_unix: i64,
) -> Result<()> {
    let mut full: Option<Rendered> = None;
    let mut heading: Option<Rendered> = None;
    for to in config.mail.recipients(series) {
        let recent = tx.messages_since(&to, now_unix - 3600)?;
        let held = recent >= i64::from(config.mail.max_per_hour);
        let rendered: &Rendered = if held {
            heading.get_or_insert_with(|| render_notice_heading(notice))
        } else {
            full.get_or_insert_with(|| render_notice(notice))
        };
        tx.queue_message(&NewMessage {
            finding: Some(finding),
            recipient: &to,
            message_id: &rendered.message_id,
            subject: &rendered.subject,
            text: &rendered.text,
            html: &rendered.html,
            chart: rendered
                .chart
                .as_ref()
                .map(|c| (c.content_id.as_str(), c.png.as_slice())),
            date_unix: now_unix,
            held,
        })?;
    }
    Ok(())
}

fn flags(measures: &[Measured]) -> Vec<Flag> {
    measures
        .iter()
        .filter(|m| m.crossed)
        .map(|m| Flag {
            kind: FindingKind::from_name(m.kind).unwrap_or(FindingKind::Influential),
            measure: m.measure.to_string(),
            value: Some(m.value),
            cutoff: Some(m.cutoff),
            cutoff_source: m.source.to_string(),
        })
        .collect()
}

// A record finding's `detail` document, written straight to text: building
// a `serde_json::Value` first cost about a third of raising a finding on
// the writing thread. Fields are declared in byte order of their names, the
// order a `Value` object writes them in, so that the stored text is what it
// was when built as a `Value`.

/// The `detail` of a record-level finding.
#[derive(Serialize)]
struct RecordDetail<'a> {
    causes: Vec<CauseDetail<'a>>,
    caution: &'a str,
    expected_leverage: f64,
    fit_with: Option<FitDetail>,
    fit_without: Option<FitDetail>,
    judged_against: &'a str,
    leverage: f64,
    measures: Vec<MeasureDetail<'a>>,
    /// Why no likely entry error is listed (set only when none is).
    #[serde(skip_serializing_if = "Option::is_none")]
    no_cause: Option<&'a str>,
    non_detects: &'a str,
    record: RecordFacts<'a>,
    robust: Option<RobustDetail>,
    sampling_advice: Option<&'a str>,
    transform: &'a str,
}

/// A likely entry error in a finding's detail.
#[derive(Serialize)]
struct CauseDetail<'a> {
    kind: String,
    label: &'a str,
    p: f64,
    prediction_t: f64,
    x: f64,
    y: f64,
}

impl<'a> CauseDetail<'a> {
    fn of(c: &'a Candidate) -> Self {
        CauseDetail {
            kind: format!("{:?}", c.kind),
            label: &c.label,
            p: c.score.p,
            prediction_t: c.score.t,
            x: c.x,
            y: c.y,
        }
    }
}

/// A measure looked at, crossed or not, in a finding's detail.
#[derive(Serialize)]
struct MeasureDetail<'a> {
    crossed: bool,
    cutoff: f64,
    kind: &'a str,
    measure: &'a str,
    #[serde(serialize_with = "as_text")]
    source: &'a CutoffSource,
    value: f64,
}

impl<'a> MeasureDetail<'a> {
    fn of(m: &'a Measured) -> Self {
        MeasureDetail {
            crossed: m.crossed,
            cutoff: m.cutoff,
            kind: m.kind,
            measure: m.measure,
            source: &m.source,
            value: m.value,
        }
    }
}

/// Writes a value as the text its `Display` gives, without an interim
/// `String`.
fn as_text<S: serde::Serializer>(v: &&CutoffSource, s: S) -> std::result::Result<S::Ok, S::Error> {
    s.collect_str(*v)
}

/// A fit with or without the record, in a finding's detail.
#[derive(Serialize)]
struct FitDetail {
    intercept: f64,
    n: usize,
    slope: f64,
    slope_ci_high: f64,
    slope_ci_low: f64,
    slope_p: Option<f64>,
}

impl FitDetail {
    fn of(f: &LineFit) -> Self {
        FitDetail {
            intercept: f.intercept,
            n: f.n,
            slope: f.slope,
            slope_ci_high: f.slope_ci_high,
            slope_ci_low: f.slope_ci_low,
            slope_p: f.slope_p,
        }
    }
}

/// The record as written, in a finding's detail.
#[derive(Serialize)]
struct RecordFacts<'a> {
    censored: bool,
    file: &'a str,
    id: &'a str,
    line: u64,
    unit: Option<&'a str>,
    x: f64,
    /// What x measures and its unit, when configured (and x is not years).
    #[serde(skip_serializing_if = "Option::is_none")]
    x_name: Option<&'a str>,
    #[serde(skip_serializing_if = "Option::is_none")]
    x_unit: Option<&'a str>,
    y: f64,
}

/// The series' robust slope, in a finding's detail.
#[derive(Serialize)]
struct RobustDetail {
    ci_high: f64,
    ci_low: f64,
    theil_sen_slope: f64,
}

fn summary_of(f: &LineFit) -> FitSummary {
    FitSummary {
        n: f.n as u64,
        slope: f.slope,
        slope_ci: Some((f.slope_ci_low, f.slope_ci_high)),
        slope_p: f.slope_p,
        intercept: f.intercept,
    }
}

/// A fitted-scale point in original units.
fn original(t: Transform, x: f64, y: f64) -> (f64, f64) {
    match t {
        Transform::None => (x, y),
        Transform::LogY => (x, y.exp()),
        Transform::LogX => (x.exp(), y),
        Transform::LogLog => (x.exp(), y.exp()),
    }
}

/// A fit as a polyline in original units over [lo, hi] (fitted scale).
fn line(t: Transform, f: &LineFit, lo: f64, hi: f64) -> Vec<(f64, f64)> {
    if !(lo.is_finite() && hi.is_finite()) {
        return Vec::new();
    }
    let steps = if t == Transform::None { 1 } else { 40 };
    (0..=steps)
        .map(|i| {
            let x = lo + (hi - lo) * i as f64 / steps as f64;
            original(t, x, f.predict(x))
        })
        .collect()
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    #[test]
    fn a_transformed_fit_says_what_its_slopes_are_in() {
        let note = scale_note(Transform::LogY, "mg/kg", &per_x("distance", "m")).unwrap();
        assert_eq!(
            note,
            "Fitted on the ln(y) scale: slopes are in ln(mg/kg) per m; a slope b is a change of 100 × (e^b − 1) % per m."
        );
        assert!(
            scale_note(Transform::LogY, "", &per_x("year", ""))
                .unwrap()
                .contains("ln(y) per year")
        );
        assert!(
            scale_note(Transform::LogX, "µg/L", &per_x("x", ""))
                .unwrap()
                .contains("µg/L per unit of ln x")
        );
        assert_eq!(scale_note(Transform::None, "mg/L", "year"), None);
    }

    /// The detail text is byte for byte what the same document built as a
    /// `serde_json::Value` writes (keys in byte order, non-finite numbers as
    /// null), so that details stored before and after read alike.
    #[test]
    fn record_detail_text_is_what_a_json_value_writes() {
        let measured = Measured {
            kind: "influential",
            measure: "Cook's distance",
            value: 0.3327495477634257,
            cutoff: 0.6979259801646126,
            crossed: false,
            source: CutoffSource::Fixed("median of F(p, n-p) (Cook 1977)"),
        };
        let fit = FitDetail {
            intercept: 566.5708603682494,
            n: 107,
            slope: -0.409899373498981,
            slope_ci_high: 0.8958401960693619,
            slope_ci_low: -1.715638943067324,
            slope_p: None,
        };
        let text = serde_json::to_string(&RecordDetail {
            causes: vec![CauseDetail {
                kind: "DecimalSlip".to_string(),
                label: "decimal point slipped 1 place",
                p: 0.5,
                prediction_t: f64::NAN,
                x: 10.6,
                y: 20.3,
            }],
            caution: CAUTION,
            expected_leverage: 0.017222590425636425,
            fit_with: Some(fit),
            fit_without: None,
            judged_against: "the fit of the series before this record",
            leverage: f64::INFINITY,
            measures: vec![MeasureDetail::of(&measured)],
            no_cause: None,
            non_detects: "exclude",
            record: RecordFacts {
                censored: true,
                file: "ü \"x\".csv",
                id: "R1",
                line: 634,
                unit: None,
                x: 10.6,
                x_name: Some("distance"),
                x_unit: Some("m"),
                y: 203.0,
            },
            robust: Some(RobustDetail {
                ci_high: -0.010554906140411196,
                ci_low: -0.016507785192246587,
                theil_sen_slope: -0.013278852513213856,
            }),
            sampling_advice: None,
            transform: "none",
        })
        .unwrap();
        let value = json!({
            "record": {"id": "R1", "x": 10.6, "y": 203.0, "censored": true,
                       "unit": None::<&str>, "file": "ü \"x\".csv", "line": 634,
                       "x_name": "distance", "x_unit": "m"},
            "judged_against": "the fit of the series before this record",
            "measures": [{"kind": "influential", "measure": "Cook's distance",
                "value": 0.3327495477634257, "cutoff": 0.6979259801646126, "crossed": false,
                "source": "median of F(p, n-p) (Cook 1977)"}],
            "leverage": f64::INFINITY,
            "expected_leverage": 0.017222590425636425,
            "fit_with": {"n": 107, "slope": -0.409899373498981, "intercept": 566.5708603682494,
                "slope_ci_low": -1.715638943067324, "slope_ci_high": 0.8958401960693619,
                "slope_p": None::<f64>},
            "fit_without": serde_json::Value::Null,
            "robust": {"theil_sen_slope": -0.013278852513213856,
                "ci_low": -0.016507785192246587, "ci_high": -0.010554906140411196},
            "causes": [{"kind": "DecimalSlip", "label": "decimal point slipped 1 place",
                "x": 10.6, "y": 20.3, "prediction_t": f64::NAN, "p": 0.5}],
            "sampling_advice": None::<&str>,
            "transform": "none",
            "non_detects": "exclude",
            "caution": CAUTION,
        });
        assert_eq!(text, value.to_string());
        assert!(
            text.starts_with(r#"{"causes":[{"kind":"DecimalSlip""#),
            "{text}"
        );
        assert!(text.contains(r#""leverage":null"#), "{text}");
    }
}
