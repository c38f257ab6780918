//! Verdicts and tamper evidence end to end: the real binary, real files in
//! a temporary inbox, a real SQLite database, tampering through Debian's
//! `sqlite3` command-line shell.
//!
//! The series is NIST StRD "Norris" (public-domain reference data with
//! certified values, tests/fixtures/nist/), delivered as one file, followed
//! by one record whose value is typed ten times too large. Excluding that
//! record must give back NIST's certified fit of the 36 points to at least
//! 9 significant digits, and bit for bit what the statistics engine
//! (`slopewarden::stats::fit_line`) gives on the remaining points; a
//! revert and a correction must do the same on their point sets.
//!
//! The series name, record ids and file names are invented.

#![allow(clippy::unwrap_used, clippy::expect_used)]

use std::path::{Path, PathBuf};
use std::process::{Child, Command, Output};
use std::time::Duration;

#[path = "support/wait.rs"]
mod wait;
use wait::wait_for;

use serde_json::Value;
use slopewarden::stats::{LineFit, fit_line};

const SERIES: &str = "larchmoor-bench/ozone";
/// The record typed ten times too large: the true value near 500.7 at
/// x = 500 (on the Norris line) entered as 5007.
const TYPO_ID: &str = "LB-037";
const TYPO_X: f64 = 500.0;
const TYPO_Y: f64 = 5007.0;
const TRUE_Y: f64 = 500.7;

struct Site {
    dir: tempfile::TempDir,
    runs: std::cell::Cell<usize>,
}

impl Site {
    fn new() -> Site {
        let dir = tempfile::tempdir().unwrap();
        std::fs::create_dir_all(dir.path().join("inbox")).unwrap();
        std::fs::write(
            dir.path().join("slopewarden.toml"),
            "[watch]\nsettle_seconds = 0.3\nrescan_seconds = 1\n\n\
             [mail]\nto = [\"analyst@monitoring.example.net\"]\n",
        )
        .unwrap();
        Site {
            dir,
            runs: std::cell::Cell::new(0),
        }
    }

    fn path(&self, p: &str) -> PathBuf {
        self.dir.path().join(p)
    }

    fn db_path(&self) -> PathBuf {
        self.path("data/slopewarden.sqlite3")
    }

    fn run(&self, args: &[&str]) -> Output {
        Command::new(env!("CARGO_BIN_EXE_slopewarden"))
            .args(args)
            .arg("--config")
            .arg(self.path("slopewarden.toml"))
            .current_dir(self.dir.path())
            .output()
            .unwrap()
    }

    fn ok(&self, args: &[&str]) -> String {
        let out = self.run(args);
        assert!(
            out.status.success(),
            "{args:?} failed: {}{}",
            String::from_utf8_lossy(&out.stdout),
            String::from_utf8_lossy(&out.stderr)
        );
        String::from_utf8(out.stdout).unwrap()
    }

    fn drop_file(&self, name: &str, text: &str) {
        let tmp = self.path(&format!("inbox/{name}.part"));
        std::fs::write(&tmp, text).unwrap();
        std::fs::rename(&tmp, self.path(&format!("inbox/{name}"))).unwrap();
    }

    fn deliver(&self, name: &str, text: &str) {
        self.drop_file(name, text);
        let inbox = self.path("inbox");
        let out = Command::new(env!("CARGO_BIN_EXE_slopewarden"))
            .args(["ingest", "--config"])
            .arg(self.path("slopewarden.toml"))
            .arg(&inbox)
            .output()
            .unwrap();
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
    }

    fn db(&self) -> rusqlite::Connection {
        rusqlite::Connection::open_with_flags(
            self.db_path(),
            rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY,
        )
        .unwrap()
    }

    /// The open finding about the typo record.
    fn typo_finding(&self) -> Option<i64> {
        let out = self.run(&["findings", "--json"]);
        if !out.status.success() {
            return None;
        }
        let list: Value = serde_json::from_slice(&out.stdout).ok()?;
        list.as_array()?
            .iter()
            .find(|f| {
                f["record_ids"]
                    .as_array()
                    .is_some_and(|ids| ids.iter().any(|i| i == TYPO_ID))
            })
            .and_then(|f| f["id"].as_i64())
    }

    /// The series' current fit row: (n, slope, intercept, slope_se,
    /// intercept_se, residual_sd, r_squared, trigger_verdict).
    fn current_fit(&self) -> (i64, [f64; 6], Option<i64>) {
        self.current_fit_or_none()
            .expect("the series has a current fit")
    }

    fn start(&self) -> Child {
        let run = self.runs.get() + 1;
        self.runs.set(run);
        let log = self.path(&format!("daemon-{run}.log"));
        let out = std::fs::File::create(&log).unwrap();
        let child = Command::new(env!("CARGO_BIN_EXE_slopewarden"))
            .args(["run", "--config"])
            .arg(self.path("slopewarden.toml"))
            .current_dir(self.dir.path())
            .stdout(out.try_clone().unwrap())
            .stderr(out)
            .spawn()
            .unwrap();
        wait_for(
            "the daemon to start watching",
            Duration::from_secs(20),
            || std::fs::read_to_string(&log).is_ok_and(|t| t.contains("watching")),
        );
        child
    }
}

fn stop(mut child: Child) {
    let pid = child.id().to_string();
    assert!(
        Command::new("kill")
            .args(["-TERM", &pid])
            .status()
            .unwrap()
            .success()
    );
    assert_eq!(child.wait().unwrap().code(), Some(0));
}

fn norris() -> (Vec<f64>, Vec<f64>) {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/nist");
    let mut rdr = csv::Reader::from_path(dir.join("norris.csv")).unwrap();
    let (mut x, mut y) = (Vec::new(), Vec::new());
    for rec in rdr.records() {
        let rec = rec.unwrap();
        x.push(rec[0].parse::<f64>().unwrap());
        y.push(rec[1].parse::<f64>().unwrap());
    }
    (x, y)
}

fn certified() -> Value {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/nist");
    serde_json::from_str(&std::fs::read_to_string(dir.join("norris.certified.json")).unwrap())
        .unwrap()
}

/// The Norris points as a canonical record file.
fn norris_file() -> String {
    let (x, y) = norris();
    let mut s = String::from("record_id,series,x,y,unit\n");
    for (i, (x, y)) in x.iter().zip(&y).enumerate() {
        s.push_str(&format!("LB-{:03},{SERIES},{x},{y},ppb\n", i + 1));
    }
    s
}

fn typo_file() -> String {
    format!("record_id,series,x,y,unit\n{TYPO_ID},{SERIES},{TYPO_X},{TYPO_Y},ppb\n")
}

/// The figures of an engine fit, in the order of [`Site::current_fit`].
fn figures(f: &LineFit) -> [f64; 6] {
    [
        f.slope,
        f.intercept,
        f.slope_se,
        f.intercept_se,
        f.residual_sd,
        f.r_squared.unwrap(),
    ]
}

/// Log relative error: the number of agreeing significant digits.
fn lre(got: f64, want: f64) -> f64 {
    if got == want {
        return 15.0;
    }
    (-((got - want) / want).abs().log10()).min(15.0)
}

/// Norris plus the typo record, ingested; returns the site and the typo
/// record's finding.
fn site_with_typo() -> (Site, i64) {
    let site = Site::new();
    site.deliver("2026-03-bench.csv", &norris_file());
    site.deliver("2026-04-bench.csv", &typo_file());
    let finding = site
        .typo_finding()
        .expect("the record typed ten times too large raises a finding");
    (site, finding)
}

#[test]
fn a_verdict_round_trip_refits_to_exactly_the_engine_fit_of_the_remaining_records() {
    let (site, finding) = site_with_typo();
    let (x, y) = norris();
    let before = site.current_fit();
    assert_eq!(before.0, 37);

    // `show` carries the with/without fits and the ranked causes.
    let shown: Value =
        serde_json::from_str(&site.ok(&["show", &finding.to_string(), "--json"])).unwrap();
    let detail = &shown["finding"]["detail"];
    assert!(detail["fit_with"]["slope"].is_number());
    assert!(detail["fit_without"]["slope"].is_number());
    let causes = detail["causes"].as_array().unwrap();
    assert!(
        causes
            .iter()
            .any(|c| (c["y"].as_f64().unwrap() - TRUE_Y).abs() < 1e-9),
        "a decimal slip back to {TRUE_Y} is among the causes: {causes:?}"
    );
    let text = site.ok(&["show", &finding.to_string()]);
    assert!(text.contains("not a compliance determination"), "{text}");

    // Excluded: the fit of the 36 Norris points.
    let out = site.ok(&[
        "review",
        &finding.to_string(),
        "--verdict",
        "excluded",
        "--note",
        "bench log: reading transcribed with the decimal point shifted",
        "--by",
        "T. Ferreira",
    ]);
    assert!(out.contains("refitted"), "{out}");
    let (n, got, verdict) = site.current_fit();
    assert_eq!(n, 36);
    assert!(verdict.is_some(), "the new fit version cites the verdict");
    let engine = fit_line(&x, &y, 0.95).unwrap();
    assert_eq!(got, figures(&engine), "bit for bit the engine's fit");
    // NIST StRD Norris certified values, to NIST's 9-digit yardstick.
    let cert = certified();
    let p = &cert["parameters"];
    for (name, g, want) in [
        ("B1", got[0], p["B1"]["estimate"].as_f64().unwrap()),
        ("B0", got[1], p["B0"]["estimate"].as_f64().unwrap()),
        (
            "sd(B1)",
            got[2],
            p["B1"]["standard_deviation"].as_f64().unwrap(),
        ),
        (
            "sd(B0)",
            got[3],
            p["B0"]["standard_deviation"].as_f64().unwrap(),
        ),
        (
            "residual sd",
            got[4],
            cert["residual_standard_deviation"].as_f64().unwrap(),
        ),
        ("R²", got[5], cert["r_squared"].as_f64().unwrap()),
    ] {
        assert!(lre(g, want) >= 9.0, "{name}: {g} vs certified {want}");
    }
    let (status, excluded): (String, bool) = site
        .db()
        .query_row(
            "SELECT status, excluded FROM records WHERE record_id = ?1",
            [TYPO_ID],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .unwrap();
    assert_eq!(
        (status.as_str(), excluded),
        ("current", true),
        "kept, out of the fit"
    );

    // A second verdict is refused until the first is reverted.
    let again = site.run(&[
        "review",
        &finding.to_string(),
        "--verdict",
        "confirmed",
        "--note",
        "second thoughts",
    ]);
    assert_eq!(again.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&again.stderr).contains("--revert"));

    // Reverted: all 37 points again, refitted from scratch.
    site.ok(&[
        "review",
        &finding.to_string(),
        "--revert",
        "--note",
        "wrong finding",
    ]);
    let (n, got, _) = site.current_fit();
    assert_eq!(n, 37);
    let mut x37 = x.clone();
    let mut y37 = y.clone();
    x37.push(TYPO_X);
    y37.push(TYPO_Y);
    assert_eq!(got, figures(&fit_line(&x37, &y37, 0.95).unwrap()));
    for (g, b) in got.iter().zip(before.1) {
        assert!(
            (g - b).abs() <= 1e-12 * b.abs(),
            "back to the fit before the verdict"
        );
    }

    // Corrected: the new version enters the fit, the original is kept.
    site.ok(&[
        "review",
        &finding.to_string(),
        "--verdict",
        "corrected",
        "--value",
        &TRUE_Y.to_string(),
        "--note",
        "bench log reads 500.7",
    ]);
    let (n, got, _) = site.current_fit();
    assert_eq!(n, 37);
    let mut yc = y.clone();
    yc.push(TRUE_Y);
    assert_eq!(got, figures(&fit_line(&x37, &yc, 0.95).unwrap()));
    let versions: Vec<(i64, String, f64)> = site
        .db()
        .prepare("SELECT version, status, y FROM records WHERE record_id = ?1 ORDER BY version")
        .unwrap()
        .query_map([TYPO_ID], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))
        .unwrap()
        .collect::<Result<_, _>>()
        .unwrap();
    assert_eq!(
        versions,
        vec![
            (1, "superseded".into(), TYPO_Y),
            (2, "current".into(), TRUE_Y)
        ]
    );

    // Every step is in the audit trail, and the store verifies.
    let verdict_entries: i64 = site
        .db()
        .query_row(
            "SELECT COUNT(*) FROM audit_log WHERE kind = 'verdict'",
            [],
            |r| r.get(0),
        )
        .unwrap();
    assert_eq!(verdict_entries, 3);
    let out = site.ok(&["verify"]);
    assert!(out.contains("intact"), "{out}");
}

/// A copy of the site's store changed by `sql` through Debian's sqlite3
/// shell, and a configuration naming it.
fn tampered_copy(site: &Site, sql: &str) -> (tempfile::TempDir, PathBuf) {
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("store.sqlite3");
    std::fs::copy(site.db_path(), &db).unwrap();
    let wal = PathBuf::from(format!("{}-wal", site.db_path().display()));
    if wal.exists() {
        std::fs::copy(&wal, dir.path().join("store.sqlite3-wal")).unwrap();
    }
    let config = dir.path().join("c.toml");
    std::fs::write(
        &config,
        format!("[paths]\ndatabase = \"{}\"\n", db.display()),
    )
    .unwrap();
    let shell = Command::new("sqlite3")
        .arg(&db)
        .arg(format!("PRAGMA foreign_keys = OFF; {sql}"))
        .output()
        .expect("Debian's sqlite3 shell (apt-get install sqlite3)");
    assert!(
        shell.status.success(),
        "{sql}: {}",
        String::from_utf8_lossy(&shell.stderr)
    );
    (dir, config)
}

/// `verify` on a copy of the site's store changed by `sql`: its exit code
/// and report.
fn tampered(site: &Site, sql: &str) -> (Option<i32>, String) {
    let (_dir, config) = tampered_copy(site, sql);
    let out = Command::new(env!("CARGO_BIN_EXE_slopewarden"))
        .args(["verify", "--config"])
        .arg(&config)
        .output()
        .unwrap();
    (out.status.code(), String::from_utf8(out.stdout).unwrap())
}

/// A state word no command writes, stored past the CHECK constraint, stops
/// a reading command with a database error that says what to run, rather
/// than a bare conversion error.
#[test]
fn a_command_meeting_a_word_no_command_writes_points_to_verify() {
    let (site, finding) = site_with_typo();
    let (_dir, config) = tampered_copy(
        &site,
        &format!(
            "PRAGMA ignore_check_constraints = ON; UPDATE findings SET severity = 'urgent' WHERE id = {finding}"
        ),
    );
    let out = Command::new(env!("CARGO_BIN_EXE_slopewarden"))
        .args(["findings", "--config"])
        .arg(&config)
        .output()
        .unwrap();
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(4), "{err}");
    assert!(
        err.contains("not a Severity: `urgent`")
            && err.contains("changed outside slopewarden: run `slopewarden verify`"),
        "{err}"
    );
}

#[test]
fn tampering_with_any_row_through_sqlite3_is_caught_by_verify() {
    let (site, finding) = site_with_typo();
    site.ok(&[
        "review",
        &finding.to_string(),
        "--verdict",
        "corrected",
        "--value",
        &TRUE_Y.to_string(),
        "--note",
        "bench log reads 500.7",
    ]);
    // Untouched, the copy verifies (the harness itself changes nothing).
    let (code, out) = tampered(&site, "SELECT 1;");
    assert_eq!(code, Some(0), "{out}");

    let typo_row =
        format!("(SELECT id FROM records WHERE record_id = '{TYPO_ID}' AND version = 1)");
    for (sql, location) in [
        ("UPDATE records SET y = 101.0 WHERE id = 3".to_string(), "records 3"),
        ("UPDATE records SET x = x + 1 WHERE id = 5".to_string(), "records 5"),
        ("UPDATE records SET note = 'edited' WHERE id = 7".to_string(), "file 1"),
        (format!("UPDATE records SET excluded = 1 WHERE id = {typo_row}"), "records"),
        (format!("UPDATE records SET status = 'current' WHERE id = {typo_row}"), "records"),
        ("DELETE FROM records WHERE id = 12".to_string(), "file 1"),
        (
            "INSERT INTO records (record_id, version, status, series_id, x, y, censored, in_fit, file_id, line, raw)
             VALUES ('LB-999', 1, 'current', 1, 1.0, 1.0, 0, 0, 1, 99, 'x')"
                .to_string(),
            "file 1",
        ),
        (
            "UPDATE fits SET slope = slope * (1 + 1e-12) WHERE version = 1".to_string(),
            "file 1",
        ),
        (
            "UPDATE fits SET slope = slope * 1.01 WHERE version = 1".to_string(),
            "fits",
        ),
        ("UPDATE fits SET n = n - 1 WHERE id = (SELECT MAX(id) FROM fits)".to_string(), "fits"),
        // References: the release writer leaves them to verify.
        ("UPDATE records SET series_id = 999 WHERE id = 4".to_string(), "a row of series"),
        ("DELETE FROM series WHERE id = 1".to_string(), "a row of series"),
        ("DELETE FROM fits WHERE version = 2".to_string(), "fits"),
        (format!("UPDATE findings SET summary = 'nothing to see' WHERE id = {finding}"), "finding"),
        (format!("UPDATE findings SET status = 'open' WHERE id = {finding}"), "findings"),
        ("UPDATE verdicts SET note = 'never mind' WHERE id = 1".to_string(), "verdict 1"),
        ("UPDATE verdicts SET value = 50.07 WHERE id = 1".to_string(), "verdict 1"),
        // Words no command writes, past the CHECK constraints: reported,
        // not a failure to read the store.
        (
            "PRAGMA ignore_check_constraints = ON; UPDATE verdicts SET verdict = 'overruled' WHERE id = 1"
                .to_string(),
            "verdicts 1: verdict `overruled` is none that slopewarden writes",
        ),
        (
            format!("PRAGMA ignore_check_constraints = ON; UPDATE records SET status = 'draft' WHERE id = {typo_row}"),
            "status `draft`",
        ),
        (
            format!("PRAGMA ignore_check_constraints = ON; UPDATE findings SET status = 'parked' WHERE id = {finding}"),
            "status `parked`",
        ),
        (
            format!("PRAGMA ignore_check_constraints = ON; UPDATE findings SET severity = 'urgent' WHERE id = {finding}"),
            "finding",
        ),
        ("UPDATE outbox SET subject = 'hello' WHERE id = 1".to_string(), "finding"),
        // A state no seal covers (a message's delivery state changes after
        // its finding is sealed), past its CHECK constraint, as a release
        // writer (which leaves CHECKs to verify) could store it: SQLite's
        // integrity check names it.
        (
            "PRAGMA ignore_check_constraints = ON; UPDATE outbox SET status = 'lost' WHERE id = 1"
                .to_string(),
            "CHECK constraint failed in outbox",
        ),
        ("UPDATE source_files SET name = 'other.csv' WHERE id = 2".to_string(), "file 2"),
        ("UPDATE audit_log SET detail = detail || '.' WHERE id = 2".to_string(), "audit_log 2"),
        ("DELETE FROM audit_log WHERE id = 1".to_string(), "audit_log"),
        (
            "DELETE FROM audit_log WHERE id = (SELECT MAX(id) FROM audit_log)".to_string(),
            "verdicts 1",
        ),
    ] {
        let (code, out) = tampered(&site, &sql);
        assert_eq!(code, Some(5), "verify must fail after: {sql}\n{out}");
        assert!(
            out.lines().any(|l| l.starts_with("FAILED") && l.contains(location)),
            "after `{sql}` verify names `{location}`:\n{out}"
        );
    }
}

#[test]
fn a_verdict_given_while_the_daemon_runs_is_taken_up_by_its_next_file() {
    let site = Site::new();
    let daemon = site.start();
    site.drop_file("2026-03-bench.csv", &norris_file());
    wait_for("the Norris file", Duration::from_secs(30), || {
        site.path("data/slopewarden.sqlite3").exists() && site.current_fit_or_none().is_some()
    });
    site.drop_file("2026-04-bench.csv", &typo_file());
    let mut finding = None;
    wait_for("the typo record's finding", Duration::from_secs(30), || {
        finding = site.typo_finding();
        finding.is_some()
    });
    let finding = finding.unwrap();
    site.ok(&[
        "review",
        &finding.to_string(),
        "--verdict",
        "excluded",
        "--note",
        "bench log: decimal point shifted",
    ]);
    // One more clean reading arrives after the verdict.
    site.drop_file(
        "2026-05-bench.csv",
        &format!("record_id,series,x,y,unit\nLB-038,{SERIES},600,600.4,ppb\n"),
    );
    wait_for(
        "the file after the verdict",
        Duration::from_secs(30),
        || {
            site.current_fit_or_none()
                .is_some_and(|(n, _, v)| n == 37 && v.is_none())
        },
    );
    stop(daemon);
    let (x, y) = norris();
    let (mut x, mut y) = (x, y);
    x.push(600.0);
    y.push(600.4);
    let engine = figures(&fit_line(&x, &y, 0.95).unwrap());
    let (_, got, _) = site.current_fit();
    for (g, e) in got.iter().zip(engine) {
        assert!(
            (g - e).abs() <= 1e-12 * e.abs(),
            "the daemon continued from the verdict's fit, without the excluded record: {got:?} vs {engine:?}"
        );
    }
    // The daemon, its sender thread and the review command all appended
    // to one unbroken chain.
    let out = site.ok(&["verify"]);
    assert!(out.contains("intact"), "{out}");
}

impl Site {
    fn current_fit_or_none(&self) -> Option<(i64, [f64; 6], Option<i64>)> {
        let conn = rusqlite::Connection::open_with_flags(
            self.db_path(),
            rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY,
        )
        .ok()?;
        conn.query_row(
            "SELECT f.n, f.slope, f.intercept, f.slope_se, f.intercept_se, f.residual_sd,
                    f.r_squared, f.trigger_verdict
             FROM series s JOIN fits f ON f.id = s.latest_fit WHERE s.key = ?1",
            [SERIES],
            |r| {
                Ok((
                    r.get(0)?,
                    [
                        r.get(1)?,
                        r.get(2)?,
                        r.get(3)?,
                        r.get(4)?,
                        r.get(5)?,
                        r.get::<_, Option<f64>>(6)?.unwrap_or(f64::NAN),
                    ],
                    r.get(7)?,
                ))
            },
        )
        .ok()
    }
}

#[test]
fn an_analysis_window_set_by_command_or_in_the_configuration_is_audited_and_refits() {
    let site = Site::new();
    site.deliver("2026-03-bench.csv", &norris_file());
    let (x, y) = norris();

    // By command: the last 10 records, then an x range.
    site.ok(&[
        "window",
        SERIES,
        "last:10",
        "--note",
        "recent bench runs only",
    ]);
    let (n, got, _) = site.current_fit();
    assert_eq!(n, 10);
    assert_eq!(got, figures(&fit_line(&x[26..], &y[26..], 0.95).unwrap()));
    site.ok(&["window", SERIES, "x:200..800", "--note", "calibrated range"]);
    let (xs, ys): (Vec<f64>, Vec<f64>) = x
        .iter()
        .zip(&y)
        .filter(|(x, _)| (200.0..=800.0).contains(*x))
        .map(|(x, y)| (*x, *y))
        .unzip();
    let (n, got, _) = site.current_fit();
    assert_eq!(n as usize, xs.len());
    assert_eq!(got, figures(&fit_line(&xs, &ys, 0.95).unwrap()));
    // A record outside the range is stored but stays out of the fit.
    site.deliver(
        "2026-04-bench.csv",
        &format!("record_id,series,x,y,unit\nLB-040,{SERIES},950,951.2,ppb\n"),
    );
    assert_eq!(site.current_fit().0 as usize, xs.len());
    let refused = site.run(&["window", SERIES, "x:9..1", "--note", "typo"]);
    assert_eq!(refused.status.code(), Some(2));

    // Back to the configuration, which now asks for the last 12 records:
    // the change is taken up when ingest starts, audited, and refits.
    site.ok(&["window", SERIES, "config", "--note", "follow the site plan"]);
    let (n, _, _) = site.current_fit();
    assert_eq!(n, 37, "no configured window yet: all points");
    let config = site.path("slopewarden.toml");
    let mut text = std::fs::read_to_string(&config).unwrap();
    text.push_str(&format!(
        "\n[[series]]\nmatch = \"{SERIES}\"\nwindow = \"last:12\"\n"
    ));
    std::fs::write(&config, text).unwrap();
    site.deliver(
        "2026-05-bench.csv",
        &format!("record_id,series,x,y,unit\nLB-041,{SERIES},610,610.9,ppb\n"),
    );
    let mut x_all = x.clone();
    let mut y_all = y.clone();
    x_all.extend([950.0, 610.0]);
    y_all.extend([951.2, 610.9]);
    let (n, got, _) = site.current_fit();
    assert_eq!(n, 12);
    assert_eq!(
        got,
        figures(&fit_line(&x_all[26..], &y_all[26..], 0.95).unwrap())
    );
    let changes: Vec<(String, Option<String>)> = site
        .db()
        .prepare("SELECT source, window FROM series_windows ORDER BY id")
        .unwrap()
        .query_map([], |r| Ok((r.get(0)?, r.get(1)?)))
        .unwrap()
        .collect::<Result<_, _>>()
        .unwrap();
    assert_eq!(
        changes,
        vec![
            ("command".into(), Some("last:10".into())),
            ("command".into(), Some("x:200..800".into())),
            ("command".into(), None),
            ("config".into(), Some("last:12".into())),
        ]
    );
    let history = site.ok(&["history", SERIES]);
    assert!(
        history.contains("window change (config): last:12"),
        "{history}"
    );
    let out = site.ok(&["verify"]);
    assert!(out.contains("intact"), "{out}");
    let (code, out) = tampered(
        &site,
        "UPDATE series_windows SET window = 'last:11' WHERE id = 4",
    );
    assert_eq!(code, Some(5), "{out}");
    let (code, out) = tampered(
        &site,
        "UPDATE fits SET window = NULL WHERE id = (SELECT MAX(id) FROM fits)",
    );
    assert_eq!(code, Some(5), "{out}");
}

#[test]
fn the_settings_in_force_are_recorded_in_the_audit_trail_when_they_change() {
    let site = Site::new();
    site.deliver("2026-03-bench.csv", &norris_file());
    site.deliver("2026-04-bench.csv", &typo_file());
    let config_entries = || -> Vec<String> {
        site.db()
            .prepare("SELECT detail FROM audit_log WHERE kind = 'config' ORDER BY id")
            .unwrap()
            .query_map([], |r| r.get(0))
            .unwrap()
            .collect::<Result<_, _>>()
            .unwrap()
    };
    // Two runs with the same file: recorded once.
    assert_eq!(config_entries().len(), 1);
    let config = site.path("slopewarden.toml");
    let mut text = std::fs::read_to_string(&config).unwrap();
    text.push_str("\n[findings]\noutlier_alpha = 0.0005\n");
    std::fs::write(&config, &text).unwrap();
    site.deliver(
        "2026-05-bench.csv",
        &format!("record_id,series,x,y,unit\nLB-050,{SERIES},300,300.2,ppb\n"),
    );
    let entries = config_entries();
    assert_eq!(entries.len(), 2, "{entries:?}");
    assert!(entries[1].contains("(changed)"), "{entries:?}");
    assert!(site.ok(&["verify"]).contains("intact"));
}

/// The ln(y) screen state kept with a series' heads (so that ingest resumes
/// it after a restart without walking the points) is checked by verify
/// against the stored records; NULL (not kept) is legal.
#[test]
fn a_kept_ln_y_screen_state_that_does_not_match_the_records_is_caught_by_verify() {
    let (site, _finding) = site_with_typo();
    let (code, out) = tampered(&site, "SELECT 1;");
    assert_eq!(code, Some(0), "{out}");
    let (code, out) = tampered(&site, "UPDATE series SET log_screen = NULL;");
    assert_eq!(code, Some(0), "not kept is legal: {out}");
    // Bytes 33..40 (1-based) are Sxx on the ln scale; 1..8 are n.
    for (sql, says) in [
        (
            "UPDATE series SET log_screen = substr(log_screen, 1, 63);",
            "cannot be read (63 bytes)",
        ),
        ("UPDATE series SET log_screen = x'';", "kept as off"),
        (
            "UPDATE series SET log_screen = 'off';",
            "a text value, not a blob",
        ),
        (
            "UPDATE series SET log_screen = CAST(x'2000000000000000' || substr(log_screen, 9) AS BLOB);",
            "n = 32, its records give 37",
        ),
        (
            "UPDATE series SET log_screen = CAST(substr(log_screen, 1, 32) || x'000000000000F03F' || substr(log_screen, 41) AS BLOB);",
            "Sxx = 1e0",
        ),
    ] {
        let (code, out) = tampered(&site, sql);
        assert_eq!(code, Some(5), "{sql}: {out}");
        assert!(out.contains("series") && out.contains(says), "{sql}: {out}");
    }
}
