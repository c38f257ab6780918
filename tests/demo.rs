//! `slopewarden demo`, as a newcomer runs it: the real binary replays the
//! invented Alder Brook deliveries (demo-data/, see its README) through the
//! real daemon. The planted problems must each raise their finding, with
//! the right first cause to check; the correct extremes and the non-detect
//! must not; the messages, the report and a verifiable store are left
//! behind. (The data is invented for the demo; these checks are about the
//! demo itself, not about the statistics, which other tests check against
//! published references.)

#![allow(clippy::unwrap_used, clippy::expect_used)]

use std::process::Command;
use std::time::{Duration, Instant};

use serde_json::Value;

#[test]
fn the_demo_finds_each_planted_problem_and_leaves_messages_a_report_and_a_sound_store() {
    let dir = tempfile::tempdir().unwrap();
    let demo = dir.path().join("demo");
    let started = Instant::now();
    let out = Command::new(env!("CARGO_BIN_EXE_slopewarden"))
        .args(["demo", "--dir"])
        .arg(&demo)
        .output()
        .unwrap();
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "{stdout}{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(
        started.elapsed() < Duration::from_secs(60),
        "the demo took {:?}",
        started.elapsed()
    );
    assert!(stdout.contains("report:"), "{stdout}");
    // The sample far beyond the surveyed range is no entry error: the
    // summary says to check the sample itself rather than listing nothing.
    assert!(
        stdout
            .lines()
            .skip_while(|l| !l.contains("record ABN-transect-PB99"))
            .nth(1)
            .is_some_and(|l| l.contains("no entry error explains it: check the sample itself")),
        "{stdout}"
    );
    assert!(
        stdout.contains("not a compliance determination"),
        "{stdout}"
    );

    let config = demo.join("slopewarden.toml");
    let run = |args: &[&str]| -> String {
        let o = Command::new(env!("CARGO_BIN_EXE_slopewarden"))
            .args(args)
            .arg("--config")
            .arg(&config)
            .output()
            .unwrap();
        assert!(
            o.status.success(),
            "{args:?}: {}",
            String::from_utf8_lossy(&o.stderr)
        );
        String::from_utf8(o.stdout).unwrap()
    };
    let findings: Vec<Value> = serde_json::from_str(&run(&["findings", "--json"])).unwrap();
    let about = |record: &str| -> Option<&Value> {
        // Record findings only (a trend finding names its newest record too).
        findings
            .iter()
            .filter(|f| f["detail"]["record"].is_object())
            .find(|f| {
                f["record_ids"]
                    .as_array()
                    .unwrap()
                    .iter()
                    .any(|r| r == record)
            })
    };
    let first_cause = |f: &Value| -> String {
        f["detail"]["causes"][0]["label"]
            .as_str()
            .unwrap_or("")
            .to_string()
    };
    let kinds = |f: &Value| -> Vec<String> {
        f["kinds"]
            .as_array()
            .unwrap()
            .iter()
            .map(|k| k.as_str().unwrap().to_string())
            .collect()
    };

    // The decimal slip.
    let slip = about("AB-MW2-NIT-2024Q1").expect("the decimal slip is found");
    assert!(kinds(slip).contains(&"outlier".to_string()));
    assert!(
        first_cause(slip).contains("decimal point slipped 1 place"),
        "{}",
        first_cause(slip)
    );
    // The unit mix-up.
    let unit = about("AB-MW3-TRI-2024Q2").expect("the unit mix-up is found");
    assert!(
        first_cause(unit).contains("mg/L instead of µg/L"),
        "{}",
        first_cause(unit)
    );
    // The sample far beyond the surveyed range.
    let far = about("ABN-transect-PB99").expect("the far sample is found");
    assert!(
        kinds(far).contains(&"high_leverage".to_string()),
        "{:?}",
        kinds(far)
    );
    // The zinc value filed under lead.
    let filed = about("ABE-transect-PB30").expect("the misfiled value is found");
    assert!(
        first_cause(filed).contains("ABE-transect/zinc"),
        "{}",
        first_cause(filed)
    );
    // `status` says what error each series would catch: a share of the
    // level for a well fitted as it is, a factor for a transect fitted on
    // the ln(y) scale (a share above 100 % would read as impossible below).
    let status = run(&["status"]);
    let line_of = |key: &str| -> &str {
        status
            .lines()
            .find(|l| l.starts_with(key))
            .unwrap_or_else(|| panic!("{key} in {status}"))
    };
    assert!(line_of("AB-MW1/nitrate ").contains(" ±"), "{status}");
    assert!(line_of("ABN-transect/lead ").contains(" ×/÷"), "{status}");
    assert!(!line_of("ABN-transect/lead ").contains('±'), "{status}");
    // ... and what each slope is in: the records' unit per year for a
    // well, per metre of distance on the ln(y) scale for a transect.
    assert!(
        line_of("AB-MW1/nitrate ").contains(" mg/L per year "),
        "{status}"
    );
    assert!(
        line_of("ABN-transect/lead ").contains(" ln(mg/kg) per m "),
        "{status}"
    );
    let listed: Vec<Value> = serde_json::from_str(&run(&["status", "--json"])).unwrap();
    let unit_of = |key: &str| {
        listed
            .iter()
            .find(|s| s["series"] == key)
            .map(|s| s["slope_unit"].clone())
    };
    assert_eq!(
        unit_of("AB-MW3/trichloroethene"),
        Some(Value::from("µg/L per year"))
    );
    // The demo configures no unit for the wells: their records' unit is given.
    let y_unit = listed
        .iter()
        .find(|s| s["series"] == "AB-MW3/trichloroethene")
        .map(|s| s["unit"].clone());
    assert_eq!(y_unit, Some(Value::from("µg/L")));

    // `diagnostics` names a stored series' points by record id, on the
    // fitted scale (not by file line, as `fit` does for a file).
    let diagnostics = run(&["diagnostics", "ABN-transect/lead"]);
    assert!(
        diagnostics.contains("x and y on the series' fitted scale"),
        "{diagnostics}"
    );
    assert!(
        diagnostics
            .lines()
            .any(|l| l.trim_start().starts_with("ABN-transect-PB99 ")),
        "{diagnostics}"
    );
    assert!(
        diagnostics.starts_with(
            "series ABN-transect/lead (fitted: ln y on x; slope in ln(mg/kg) per m; non-detects: exclude)"
        ),
        "{diagnostics}"
    );

    // `history` gives every version's least-squares and robust slopes: the
    // decimal slip turned the least-squares slope of AB-MW2/nitrate
    // upwards at version 2, while the median of pairwise slopes, which one
    // point cannot drag far, kept falling.
    let history = run(&["history", "AB-MW2/nitrate"]);
    assert!(
        history.starts_with("series AB-MW2/nitrate: slopes in mg/L per year\n"),
        "{history}"
    );
    let second: Vec<&str> = history
        .lines()
        .find(|l| l.trim_start().starts_with("2 "))
        .unwrap_or_else(|| panic!("{history}"))
        .split_whitespace()
        .collect();
    let (slope, theil_sen): (f64, f64) = (second[2].parse().unwrap(), second[6].parse().unwrap());
    assert!(slope > 0.0 && theil_sen < 0.0, "{history}");

    // `findings --series` keeps the findings of the matching series.
    let east: Vec<Value> =
        serde_json::from_str(&run(&["findings", "--series", "ABE-*/*", "--json"])).unwrap();
    let expected = findings
        .iter()
        .filter(|f| f["series"].as_str().is_some_and(|s| s.starts_with("ABE-")))
        .count();
    assert!(expected > 0);
    assert_eq!(east.len(), expected);
    // A pattern that matches no series says so, rather than reading like a
    // site with nothing to check.
    let none = run(&["findings", "--series", "AB-MW9/*"]);
    assert_eq!(
        none.trim(),
        "no findings in series matching `AB-MW9/*` (`slopewarden status` lists the series)"
    );

    // `record` gathers what is stored about one record: its version with
    // the line as written and its diagnostics on arrival (the same Cook's
    // distance its finding gives), and the findings that name it.
    let slip = about("AB-MW2-NIT-2024Q1").expect("the decimal slip is found");
    let shown = run(&["record", "AB-MW2-NIT-2024Q1"]);
    for want in [
        "record AB-MW2-NIT-2024Q1: 1 version(s), in AB-MW2/nitrate",
        "version 1  current  (in the fit)",
        "year = 2024.123  y = 53 mg/L",
        "as written: AB-MW2-NIT-2024Q1,AB-MW2/nitrate,2024.123,53.0,",
        "[influential, outlier]  open",
        "[sign_reversal]  open",
    ] {
        assert!(shown.contains(want), "missing `{want}` in:\n{shown}");
    }
    let stored: Value =
        serde_json::from_str(&run(&["record", "AB-MW2-NIT-2024Q1", "--json"])).unwrap();
    let cooks = slip["detail"]["measures"]
        .as_array()
        .unwrap()
        .iter()
        .find(|m| m["measure"] == "Cook's distance")
        .unwrap()["value"]
        .as_f64()
        .unwrap();
    assert_eq!(
        stored["versions"][0]["cooks_distance"].as_f64(),
        Some(cooks)
    );

    // The correct extreme beside the kiln wall and the non-detect raise nothing.
    assert!(about("ABN-transect-LE01").is_none());
    assert!(about("ABS-transect-PB40").is_none());
    let db = rusqlite::Connection::open_with_flags(
        demo.join("data/slopewarden.sqlite3"),
        rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY,
    )
    .unwrap();
    let (censored, in_fit): (bool, bool) = db
        .query_row(
            "SELECT censored, in_fit FROM records WHERE record_id = 'ABS-transect-PB40'",
            [],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .unwrap();
    assert!(
        censored && !in_fit,
        "the non-detect is stored as censored, out of the fit"
    );

    // One .eml per finding, the report, and a store that verifies.
    let emls = std::fs::read_dir(demo.join("data/outbox"))
        .unwrap()
        .filter(|e| {
            e.as_ref()
                .unwrap()
                .path()
                .extension()
                .is_some_and(|x| x == "eml")
        })
        .count();
    assert_eq!(emls, findings.len());
    let report = std::fs::read_to_string(demo.join("report.html")).unwrap();
    assert!(report.contains("<svg") && report.contains("AB-MW2/nitrate"));
    assert!(run(&["verify"]).contains("intact"));
}
