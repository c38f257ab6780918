//! `slopewarden show`: one finding for a person at a terminal, from what
//! the finding stored when it was raised (its numbers, cutoffs, fits with
//! and without the record, ranked causes) and its verdict log.

use std::fmt::Write;

use serde_json::Value;

use crate::raise::CAUTION;
use crate::store::{
    FindingRow, FitHistoryRow, RecordStatus, RecordVersion, VerdictKind, VerdictRow,
};

/// What became, since a trend finding was raised, of the record it hinged
/// on: read by the caller for a finding whose change the newest record
/// alone caused.
#[derive(Debug, Clone, Default)]
pub struct Since {
    /// The record findings about that record, each with its verdicts,
    /// oldest first.
    pub about_record: Vec<(FindingRow, Vec<VerdictRow>)>,
    /// The series' current fit.
    pub current: Option<FitHistoryRow>,
}

/// The verdict that set a closed finding's status (the newest of that
/// name), if any.
fn deciding(f: &FindingRow, verdicts: &[VerdictRow]) -> Option<VerdictRow> {
    verdicts
        .iter()
        .rev()
        .find(|v| {
            v.verdict != VerdictKind::Reverted
                && v.verdict.finding_status() == f.status
                && v.reverts.is_none()
        })
        .cloned()
}

fn num(v: &Value) -> String {
    match v.as_f64() {
        Some(x) if x != 0.0 && (x.abs() < 1e-3 || x.abs() >= 1e6) => format!("{x:.4e}"),
        Some(x) => format!("{}", (x * 1e4).round() / 1e4),
        None => "-".into(),
    }
}

fn p_text(v: &Value) -> String {
    v.as_f64()
        .map_or("undefined".into(), |p| format!("{p:.3e}"))
}

fn fit_line(label: &str, f: &Value) -> String {
    if f.is_null() {
        return format!("  {label:<8} no fit\n");
    }
    format!(
        "  {label:<8} slope {} [{}, {}]  p = {}  n = {}  intercept {}\n",
        num(&f["slope"]),
        num(&f["slope_ci_low"]),
        num(&f["slope_ci_high"]),
        p_text(&f["slope_p"]),
        f["n"],
        num(&f["intercept"])
    )
}

/// The finding as text, with its verdicts; for a trend finding caused by
/// one record, what became of that record since (`since`).
pub fn describe_finding(f: &FindingRow, verdicts: &[VerdictRow], since: Option<&Since>) -> String {
    let d = &f.detail;
    let mut o = String::new();
    let _ = writeln!(
        o,
        "finding {}  [{}]  {}  status: {}",
        f.id,
        f.kinds.join(", "),
        f.severity,
        f.status
    );
    let _ = writeln!(o, "{}", f.summary);
    let _ = writeln!(
        o,
        "series {}  raised {}{}{}",
        f.series.as_deref().unwrap_or("-"),
        f.created_at,
        f.file
            .as_ref()
            .map_or(String::new(), |n| format!("  from file {n}")),
        f.fit_version
            .map_or(String::new(), |v| format!("  on fit version {v}"))
    );
    let r = &d["record"];
    if r.is_object() {
        let _ = writeln!(
            o,
            "\nrecord {}  ({} line {})\n  {} = {}{}  y = {} {}{}",
            r["id"].as_str().unwrap_or("?"),
            r["file"].as_str().unwrap_or("?"),
            r["line"],
            r["x_name"].as_str().unwrap_or("x"),
            num(&r["x"]),
            r["x_unit"]
                .as_str()
                .map_or(String::new(), |u| format!(" {u}")),
            num(&r["y"]),
            r["unit"].as_str().unwrap_or(""),
            if r["censored"].as_bool() == Some(true) {
                "  (non-detect: the value is the reporting limit)"
            } else {
                ""
            }
        );
    }
    if let Some(ms) = d["measures"].as_array().filter(|m| !m.is_empty()) {
        let _ = writeln!(
            o,
            "\nmeasures (judged against {})",
            d["judged_against"]
                .as_str()
                .unwrap_or("the fit before the record")
        );
        for m in ms {
            let _ = writeln!(
                o,
                "  {} {:<52} {:>12}  cutoff {:>10}  {}",
                if m["crossed"].as_bool() == Some(true) {
                    "!"
                } else {
                    " "
                },
                m["measure"].as_str().unwrap_or(""),
                num(&m["value"]),
                num(&m["cutoff"]),
                m["source"].as_str().unwrap_or("")
            );
        }
        let _ = writeln!(o, "  (! marks a cutoff crossed)");
    }
    if d.get("fit_with").is_some() || d.get("fit_without").is_some() {
        let scale = d["transform"].as_str().filter(|t| *t != "none");
        let _ = writeln!(
            o,
            "\nthe fit with and without the record{}",
            scale.map_or(String::new(), |t| format!(" ({t} scale)"))
        );
        o.push_str(&fit_line("with", &d["fit_with"]));
        o.push_str(&fit_line("without", &d["fit_without"]));
    }
    if d.get("fit_before").is_some() || d.get("fit_after").is_some() {
        if let Some(c) = d["change"].as_str() {
            let _ = writeln!(o, "\n{c}");
        }
        if let Some(r) = d["rule"].as_str() {
            let _ = writeln!(o, "rule: {r}");
        }
        let _ = writeln!(o, "\nthe fit before and after");
        o.push_str(&fit_line("before", &d["fit_before"]));
        o.push_str(&fit_line("after", &d["fit_after"]));
        if let Some(r) = d["newest_record"].as_str() {
            let _ = writeln!(
                o,
                "  newest record {r}{}",
                match d["caused_by_newest_record"].as_bool() {
                    Some(true) => ": without it, the change would not happen",
                    Some(false) => ": the change does not hinge on it alone",
                    None => "",
                }
            );
        }
    }
    if let Some(rows) = d["rows"].as_array().filter(|r| !r.is_empty()) {
        let _ = writeln!(o, "\nrows set aside");
        for r in rows {
            let _ = writeln!(
                o,
                "  line {} column {} ({}), record {}: {}",
                r["line"],
                r["column"],
                r["field"].as_str().unwrap_or("-"),
                r["record_id"].as_str().unwrap_or("-"),
                r["reason"].as_str().unwrap_or("")
            );
        }
    }
    let rb = &d["robust"];
    if rb.is_object() {
        let _ = writeln!(
            o,
            "  robust   Theil-Sen slope {} [{}, {}]",
            num(&rb["theil_sen_slope"]),
            num(&rb["ci_low"]),
            num(&rb["ci_high"])
        );
    }
    if let Some(nd) = d["non_detects"].as_str() {
        let _ = writeln!(o, "  non-detects: {nd}");
    }
    if let Some(cs) = d["causes"].as_array().filter(|c| !c.is_empty()) {
        let _ = writeln!(
            o,
            "\nlikely entry errors to check, most plausible first (scored against the fit without the record; nothing is corrected automatically)"
        );
        for (i, c) in cs.iter().enumerate() {
            let _ = writeln!(
                o,
                "  {}. {}  (prediction t {}, p {})",
                i + 1,
                c["label"].as_str().unwrap_or(""),
                num(&c["prediction_t"]),
                p_text(&c["p"])
            );
        }
    }
    if let Some(note) = d["no_cause"].as_str() {
        let _ = writeln!(o, "\nlikely entry errors to check\n  none listed. {note}");
    }
    if let Some(a) = d["sampling_advice"].as_str() {
        let _ = writeln!(o, "\nsampling advice\n  {a}");
    }
    // A trend change one record caused: has that record been answered?
    let mut settled_by: Option<(i64, VerdictRow)> = None;
    if let (Some(since), Some(record)) = (since, d["newest_record"].as_str()) {
        let _ = writeln!(o, "\nsince then");
        if since.about_record.is_empty() {
            let _ = writeln!(o, "  no finding about record {record}");
        }
        for (g, vs) in &since.about_record {
            match deciding(g, vs) {
                Some(v) => {
                    let _ = writeln!(
                        o,
                        "  finding {} about record {record}: {} by verdict {}{} (by {}: {})",
                        g.id,
                        g.status,
                        v.id,
                        v.value.map_or(String::new(), |x| format!(", to {x}")),
                        v.by,
                        v.note
                    );
                    if matches!(v.verdict, VerdictKind::Corrected | VerdictKind::Excluded) {
                        settled_by = Some((g.id, v));
                    }
                }
                None if vs.is_empty() => {
                    let _ = writeln!(
                        o,
                        "  finding {} about record {record}: {}, no verdict yet",
                        g.id, g.status
                    );
                }
                None => {
                    let _ = writeln!(
                        o,
                        "  finding {} about record {record}: {} again, its verdict reverted",
                        g.id, g.status
                    );
                }
            }
        }
        if let Some(c) = &since.current {
            let v = |x: Option<f64>| num(&x.map_or(Value::Null, Value::from));
            let _ = writeln!(
                o,
                "  the series now, fit version {}: slope {} [{}, {}]  p = {}  n = {}",
                c.version,
                v(c.slope),
                v(c.slope_ci_low),
                v(c.slope_ci_high),
                p_text(&c.slope_p.map_or(Value::Null, Value::from)),
                c.n
            );
        }
    }

    let _ = writeln!(o, "\nverdicts");
    if verdicts.is_empty() {
        let _ = writeln!(o, "  none yet");
    }
    for v in verdicts {
        let _ = writeln!(
            o,
            "  {}  verdict {}: {}{}{} by {}: {}",
            v.at,
            v.id,
            v.verdict,
            v.value.map_or(String::new(), |x| format!(" to {x}")),
            v.reverts.map_or(String::new(), |w| format!(" verdict {w}")),
            v.by,
            v.note
        );
    }
    if let (true, Some((finding, v))) = (f.status.is_open(), &settled_by) {
        let _ = writeln!(
            o,
            "\nthe record this change hinged on has been {}; compare the series now (above) with the change, then close this finding:\n  {}",
            v.verdict,
            crate::review::close_trend_command(f.id, *finding, v.verdict, v.id)
        );
    } else if let (true, Some(y)) = (f.status.is_open(), d["proposed_y"].as_f64()) {
        let _ = writeln!(
            o,
            "\nonce both versions are checked (confirmed keeps the stored value; corrected takes the resubmitted one, or the one you found, and refits; excluded leaves the record out of the fit):\n  slopewarden review {id} --verdict confirmed --note \"...\"\n  slopewarden review {id} --verdict corrected --value {y} --note \"...\"\n  slopewarden review {id} --verdict excluded --note \"...\"",
            id = f.id
        );
    } else if f.status.is_open() && !r.is_object() {
        let _ = writeln!(
            o,
            "\nthis finding concerns no single record; once it has been looked into:\n  slopewarden review {} --verdict confirmed --note \"...\"",
            f.id
        );
    } else if f.status.is_open() {
        let _ = writeln!(
            o,
            "\nafter checking the record (field sheet, chain of custody, lab report):\n  slopewarden review {id} --verdict confirmed --note \"...\"\n  slopewarden review {id} --verdict corrected --value V --note \"...\"\n  slopewarden review {id} --verdict excluded --note \"...\"",
            id = f.id
        );
    } else {
        let _ = writeln!(
            o,
            "\nto undo the verdict: slopewarden review {} --revert --note \"...\"",
            f.id
        );
    }
    let _ = writeln!(o, "\n{CAUTION}");
    o
}

/// A number for the record view, or "-" when not defined.
fn opt_num(v: Option<f64>) -> String {
    num(&v.map_or(Value::Null, Value::from))
}

/// Everything stored about one record, for `slopewarden record`: each
/// version with where it came from and its diagnostics on arrival, then
/// every finding that names it with its verdicts.
pub fn describe_record(
    record_id: &str,
    versions: &[RecordVersion],
    findings: &[(FindingRow, Vec<VerdictRow>)],
) -> String {
    let mut o = String::new();
    let series: Vec<&str> =
        versions
            .iter()
            .map(|v| v.series.as_str())
            .fold(Vec::new(), |mut a, s| {
                if !a.contains(&s) {
                    a.push(s);
                }
                a
            });
    if versions.is_empty() {
        // A row set aside by validation: only its finding knows of it.
        let _ = writeln!(
            o,
            "record {record_id}: not stored (set aside when it arrived); the findings below say why"
        );
    } else {
        let _ = writeln!(
            o,
            "record {record_id}: {} version(s), in {}",
            versions.len(),
            series.join(", ")
        );
    }
    for v in versions {
        // Decimal years read as such when nothing else is configured (as
        // the findings word it).
        let x_name = match (&v.x_name, &v.x_unit) {
            (Some(n), _) => n.as_str(),
            (None, None) if (1800.0..=2200.0).contains(&v.x) => "year",
            (None, _) => "x",
        };
        let x_unit = v
            .x_unit
            .as_deref()
            .map_or(String::new(), |u| format!(" {u}"));
        let state = match (v.status, v.in_fit, v.excluded) {
            (_, _, true) => "excluded from the fit by a verdict",
            (RecordStatus::Current, true, false) => "in the fit",
            (RecordStatus::Current, false, false) if v.censored => "not in the fit (a non-detect)",
            (RecordStatus::Current, false, false) => "not in the fit",
            (RecordStatus::Proposed, _, _) => "a resubmission kept aside, not in the fit",
            (RecordStatus::Superseded, _, _) => {
                "no longer in use: a later version, or the revert of its verdict, replaced it"
            }
        };
        let _ = writeln!(
            o,
            "\nversion {}  {}  ({state})\n  {x_name} = {}{x_unit}  y = {}{}{}",
            v.version,
            v.status,
            num(&Value::from(v.x)),
            num(&Value::from(v.y)),
            v.unit.as_deref().map_or(String::new(), |u| format!(" {u}")),
            if v.censored {
                "  (non-detect: the value is the reporting limit)"
            } else {
                ""
            }
        );
        let _ = writeln!(
            o,
            "  from {} line {} (arrived {}){}",
            v.file,
            v.line,
            v.arrived_at,
            v.sampled_at
                .as_deref()
                .map_or(String::new(), |d| format!(", sampled {d}"))
        );
        let _ = writeln!(o, "  as written: {}", v.raw.trim_end());
        if let Some(n) = &v.note {
            let _ = writeln!(o, "  note: {n}");
        }
        let measured = [
            v.leverage,
            v.studentized_residual,
            v.cooks_distance,
            v.dffits,
            v.dfbetas_slope,
            v.prediction_t,
        ]
        .iter()
        .any(Option::is_some);
        match v.joined_fit {
            Some(fit) if !measured => {
                let _ = writeln!(
                    o,
                    "  joined fit version {fit}; no diagnostics on arrival (too few points then to measure influence)"
                );
            }
            Some(fit) => {
                let _ = writeln!(
                    o,
                    "  on arrival (fit version {fit}): leverage {}, studentized residual {}, Cook's distance {}, DFFITS {}, DFBETAS of the slope {}",
                    opt_num(v.leverage),
                    opt_num(v.studentized_residual),
                    opt_num(v.cooks_distance),
                    opt_num(v.dffits),
                    opt_num(v.dfbetas_slope)
                );
                let _ = writeln!(
                    o,
                    "  against the fit before it: prediction t {}; slope without it {} (p {})",
                    opt_num(v.prediction_t),
                    opt_num(v.slope_without),
                    p_text(&v.slope_p_without.map_or(Value::Null, Value::from))
                );
            }
            None => {
                let _ = writeln!(
                    o,
                    "  no diagnostics on arrival: it joined no fit when it arrived (a version stored by a verdict, a record left out of the fit, or a series still too short)"
                );
            }
        }
    }
    let _ = writeln!(o, "\nfindings naming it");
    if findings.is_empty() {
        let _ = writeln!(o, "  none");
    }
    for (f, vs) in findings {
        let _ = writeln!(
            o,
            "  {}  {}  [{}]  {}: {}",
            f.id,
            f.severity,
            f.kinds.join(", "),
            f.status,
            f.summary
        );
        for v in vs {
            let _ = writeln!(
                o,
                "      verdict {}: {}{}{} by {} at {}: {}",
                v.id,
                v.verdict,
                v.value.map_or(String::new(), |x| format!(" to {x}")),
                v.reverts.map_or(String::new(), |w| format!(" verdict {w}")),
                v.by,
                v.at,
                v.note
            );
        }
    }
    let _ = writeln!(
        o,
        "\n`slopewarden show N` gives a finding in full.\n\n{CAUTION}"
    );
    o
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::store::FindingStatus;
    use serde_json::json;

    fn row(status: &str, detail: Value) -> FindingRow {
        FindingRow {
            id: 7,
            series: Some("MW-2/boron".into()),
            record_ids: vec!["Q-17".into()],
            kinds: vec!["outlier".into()],
            severity: crate::findings::Severity::Warning,
            status: FindingStatus::from_word(status).unwrap_or_else(|| panic!("{status}")),
            created_at: "2026-03-01T00:00:00Z".into(),
            file: Some("march.csv".into()),
            fit_version: Some(4),
            summary: "record Q-17 in MW-2/boron: outlier".into(),
            detail,
        }
    }

    #[test]
    fn a_record_finding_shows_its_numbers_fits_causes_and_how_to_answer() {
        let d = json!({
            "record": {"id": "Q-17", "file": "march.csv", "line": 12, "x": 2025.5, "y": 41.0, "unit": "mg/L", "censored": false},
            "measures": [{"kind": "outlier", "measure": "prediction t", "value": 9.5, "cutoff": 4.2, "crossed": true, "source": "t(1 - 0.001/2, 20)"}],
            "fit_with": {"slope": 0.5, "slope_ci_low": 0.1, "slope_ci_high": 0.9, "slope_p": 0.02, "n": 23, "intercept": 1.0},
            "fit_without": {"slope": 0.1, "slope_ci_low": -0.1, "slope_ci_high": 0.3, "slope_p": 0.3, "n": 22, "intercept": 1.0},
            "causes": [{"label": "decimal point slipped 1 place: 4.1 mg/L instead of 41 mg/L", "prediction_t": 0.3, "p": 0.76, "y": 4.1}],
        });
        let open = describe_finding(&row("open", d.clone()), &[], None);
        for want in [
            "record Q-17  (march.csv line 12)",
            "x = 2025.5  y = 41 mg/L",
            "! prediction t",
            "with     slope 0.5 [0.1, 0.9]",
            "without  slope 0.1",
            "1. decimal point slipped",
            "--verdict corrected --value V",
            "not a compliance determination",
        ] {
            assert!(open.contains(want), "missing `{want}` in:\n{open}");
        }
        let v = VerdictRow {
            id: 3,
            finding: 7,
            verdict: VerdictKind::Corrected,
            record_row: Some(17),
            new_record_row: Some(90),
            value: Some(4.1),
            reverts: None,
            note: "lab report".into(),
            by: "A. Ruiz".into(),
            at: "2026-03-02T00:00:00Z".into(),
        };
        let closed = describe_finding(&row("corrected", d), &[v], None);
        assert!(
            closed.contains("verdict 3: corrected to 4.1 by A. Ruiz: lab report"),
            "{closed}"
        );
        assert!(closed.contains("--revert"), "{closed}");
        assert!(!closed.contains("--verdict excluded"), "{closed}");
    }

    #[test]
    fn a_trend_finding_follows_the_record_it_hinged_on_through_its_verdicts() {
        let trend = FindingRow {
            id: 8,
            record_ids: vec![],
            kinds: vec!["sign_reversal".into()],
            ..row(
                "open",
                json!({"change": "the slope changed sign", "newest_record": "Q-17", "caused_by_newest_record": true}),
            )
        };
        let verdict = |id: i64, verdict: &str, reverts: Option<i64>| VerdictRow {
            id,
            finding: 7,
            verdict: VerdictKind::from_word(verdict).unwrap_or_else(|| panic!("{verdict}")),
            record_row: Some(17),
            new_record_row: None,
            value: None,
            reverts,
            note: "lab report".into(),
            by: "A. Ruiz".into(),
            at: "2026-03-02T00:00:00Z".into(),
        };
        let since = |status: &str, verdicts: Vec<VerdictRow>| Since {
            about_record: vec![(row(status, json!({})), verdicts)],
            current: None,
        };
        let waiting = describe_finding(&trend, &[], Some(&since("open", vec![])));
        assert!(
            waiting.contains("finding 7 about record Q-17: open, no verdict yet"),
            "{waiting}"
        );
        assert!(!waiting.contains("caused by the record"), "{waiting}");
        let excluded = describe_finding(
            &trend,
            &[],
            Some(&since("excluded", vec![verdict(1, "excluded", None)])),
        );
        assert!(
            excluded.contains("finding 7 about record Q-17: excluded by verdict 1 (by A. Ruiz: lab report)")
                && excluded.contains(
                    "slopewarden review 8 --verdict confirmed --note \"caused by the record of finding 7, excluded by verdict 1\""
                ),
            "{excluded}"
        );
        // Reverted: open again, and nothing to close the trend finding with.
        let reverted = describe_finding(
            &trend,
            &[],
            Some(&since(
                "open",
                vec![
                    verdict(1, "excluded", None),
                    verdict(2, "reverted", Some(1)),
                ],
            )),
        );
        assert!(
            reverted.contains("finding 7 about record Q-17: open again, its verdict reverted"),
            "{reverted}"
        );
        assert!(!reverted.contains("caused by the record"), "{reverted}");
    }

    #[test]
    fn a_record_lists_each_version_in_its_state() {
        let version = |version: i64, status: &str, joined: Option<i64>| RecordVersion {
            version,
            status: RecordStatus::from_word(status).unwrap_or_else(|| panic!("{status}")),
            series: "MW-2/boron".into(),
            x_name: None,
            x_unit: None,
            x: 2025.5,
            y: 41.0,
            unit: Some("mg/L".into()),
            censored: false,
            in_fit: status == "current",
            excluded: false,
            sampled_at: None,
            note: None,
            file: "march.csv".into(),
            arrived_at: "2026-03-01T00:00:00Z".into(),
            line: 12,
            raw: "Q-17,MW-2/boron,2025.5,41,mg/L".into(),
            joined_fit: joined,
            leverage: None,
            studentized_residual: None,
            cooks_distance: None,
            dffits: None,
            dfbetas_slope: None,
            prediction_t: None,
            slope_without: None,
            slope_p_without: None,
        };
        let measured = RecordVersion {
            leverage: Some(0.52),
            cooks_distance: Some(3.1),
            ..version(1, "superseded", Some(4))
        };
        let text = describe_record(
            "Q-17",
            &[
                measured,
                version(2, "proposed", None),
                version(3, "current", Some(1)),
                RecordVersion {
                    excluded: true,
                    ..version(4, "current", None)
                },
            ],
            &[],
        );
        for want in [
            "record Q-17: 4 version(s), in MW-2/boron",
            "version 1  superseded  (no longer in use",
            "year = 2025.5  y = 41 mg/L",
            "on arrival (fit version 4): leverage 0.52, studentized residual -, Cook's distance 3.1",
            "version 2  proposed  (a resubmission kept aside, not in the fit)",
            "version 3  current  (in the fit)\n",
            "joined fit version 1; no diagnostics on arrival",
            "version 4  current  (excluded from the fit by a verdict)",
            "findings naming it\n  none",
        ] {
            assert!(text.contains(want), "missing `{want}` in:\n{text}");
        }
    }

    #[test]
    fn a_finding_without_a_record_offers_only_confirmed() {
        let text = describe_finding(
            &row("open", json!({"change": "the trend reversed"})),
            &[],
            None,
        );
        assert!(text.contains("--verdict confirmed"), "{text}");
        assert!(!text.contains("--verdict excluded"), "{text}");
    }
}
