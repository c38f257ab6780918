//! The daemon as an operator runs it: the real binary, a temporary inbox of
//! real files, a real SQLite database. No mocks.
#![allow(clippy::unwrap_used)]

use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Output};
use std::time::{Duration, Instant};

#[path = "support/wait.rs"]
mod wait;
use wait::wait_for;

use serde_json::Value;

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
            "[watch]\nsettle_seconds = 0.3\nrescan_seconds = 1\n\n[[series]]\nmatch = \"MW-*\"\nunit = \"mg/L\"\nmatrix = \"water\"\nx_min = 1990\nx_max = 2100\n",
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
    fn config(&self) -> String {
        self.path("slopewarden.toml").to_string_lossy().into_owned()
    }
    fn drop_file(&self, name: &str, text: &str) {
        // Write under a temporary name, then rename into place.
        let tmp = self.path(&format!("inbox/{name}.part"));
        std::fs::write(&tmp, text).unwrap();
        std::fs::rename(&tmp, self.path(&format!("inbox/{name}"))).unwrap();
    }
    fn cmd(&self, args: &[&str]) -> Output {
        let mut all: Vec<&str> = args.to_vec();
        let config = self.config();
        all.push("--config");
        all.push(&config);
        Command::new(env!("CARGO_BIN_EXE_slopewarden"))
            .args(&all)
            .current_dir(self.dir.path())
            .output()
            .unwrap()
    }
    fn ingest_inbox(&self) -> Output {
        let inbox = self.path("inbox");
        let config = self.config();
        Command::new(env!("CARGO_BIN_EXE_slopewarden"))
            .args(["ingest", "--config", &config, inbox.to_str().unwrap()])
            .output()
            .unwrap()
    }
    fn status(&self) -> Vec<Value> {
        let out = self.cmd(&["status", "--json"]);
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        serde_json::from_slice::<Value>(&out.stdout)
            .unwrap()
            .as_array()
            .unwrap()
            .clone()
    }
    fn sql(&self, query: &str) -> i64 {
        rusqlite_count(&self.path("data/slopewarden.sqlite3"), query)
    }
    fn inbox_files(&self) -> Vec<String> {
        let mut v: Vec<String> = std::fs::read_dir(self.path("inbox"))
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        v.sort();
        v
    }
    /// Starts the daemon and returns once it logs that it is watching (its
    /// signal handlers are installed by then), so that a test's SIGTERM
    /// never races its start-up.
    fn start(&self) -> Child {
        let run = self.runs.get() + 1;
        self.runs.set(run);
        let log = self.path(&format!("daemon-{run}.log"));
        let out = std::fs::File::create(&log).unwrap();
        let child = Command::new(env!("CARGO_BIN_EXE_slopewarden"))
            .args(["run", "--config", &self.config()])
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

fn rusqlite_count(db: &Path, query: &str) -> i64 {
    // sqlite3 through the library the daemon uses, opened read-only.
    let conn =
        rusqlite::Connection::open_with_flags(db, rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY)
            .unwrap();
    conn.query_row(query, [], |r| r.get(0)).unwrap()
}

fn well_file(first_id: usize, rows: &[(f64, f64)]) -> String {
    let mut s = String::from("record_id,series,x,y,unit,sampled_at,note\n");
    for (i, (x, y)) in rows.iter().enumerate() {
        s.push_str(&format!(
            "R{:05},MW-01/nitrate,{x},{y},mg/L,,\n",
            first_id + i
        ));
    }
    s
}

fn quarterly(n: usize, start: usize) -> Vec<(f64, f64)> {
    (start..start + n)
        .map(|k| {
            let t = 2015.0 + 0.25 * k as f64;
            (
                t,
                12.0 - 0.4 * (t - 2015.0) + if k % 2 == 0 { 0.3 } else { -0.25 },
            )
        })
        .collect()
}

#[test]
fn ingests_a_file_once_and_moves_it_to_the_archive() {
    let site = Site::new();
    site.drop_file("batch-001.csv", &well_file(1, &quarterly(12, 0)));
    let out = site.ingest_inbox();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let status = site.status();
    assert_eq!(status.len(), 1);
    let s = &status[0];
    assert_eq!(s["series"], "MW-01/nitrate");
    assert_eq!(s["records"], 12);
    assert_eq!(s["n"], 12);
    assert!(s["slope"].as_f64().unwrap() < 0.0);
    for key in [
        "slope_ci_low",
        "slope_ci_high",
        "slope_p",
        "last_arrival",
        "open_findings",
    ] {
        assert!(s.get(key).is_some(), "status lacks {key}");
    }
    assert!(site.inbox_files().is_empty(), "{:?}", site.inbox_files());
    // The same content again (under another name) stores nothing twice.
    let archived: Vec<PathBuf> = walk(&site.path("data/archive"));
    assert_eq!(archived.len(), 1);
    let again = std::fs::read_to_string(&archived[0]).unwrap();
    site.drop_file("batch-001-copy.csv", &again);
    assert!(site.ingest_inbox().status.success());
    assert_eq!(site.sql("SELECT COUNT(*) FROM records"), 12);
    assert_eq!(site.sql("SELECT COUNT(*) FROM source_files"), 1);
    assert_eq!(
        site.sql("SELECT COUNT(*) FROM audit_log WHERE kind = 'file_duplicate'"),
        1
    );
    assert!(site.inbox_files().is_empty());
}

#[test]
fn a_resubmitted_record_with_other_values_is_kept_aside_not_overwritten() {
    let site = Site::new();
    site.drop_file("a.csv", &well_file(1, &quarterly(6, 0)));
    assert!(site.ingest_inbox().status.success());
    // Same ids: R00001 identical, R00002 with another value.
    let mut rows = quarterly(2, 0);
    rows[1].1 = 99.0;
    site.drop_file("b.csv", &well_file(1, &rows));
    assert!(site.ingest_inbox().status.success());
    assert_eq!(
        site.sql("SELECT COUNT(*) FROM records WHERE status = 'current'"),
        6
    );
    assert_eq!(
        site.sql("SELECT COUNT(*) FROM records WHERE status = 'proposed' AND record_id = 'R00002'"),
        1
    );
    assert_eq!(site.sql("SELECT COUNT(*) FROM records WHERE status = 'current' AND record_id = 'R00002' AND y = 99.0"), 0);
    assert_eq!(
        site.sql("SELECT records_same FROM source_files WHERE name = 'b.csv'"),
        1
    );
    assert_eq!(
        site.sql("SELECT records_conflict FROM source_files WHERE name = 'b.csv'"),
        1
    );
    assert_eq!(
        site.sql("SELECT COUNT(*) FROM audit_log WHERE kind = 'conflict'"),
        1
    );
}

#[test]
fn bad_rows_are_set_aside_with_line_and_reason_and_good_rows_kept() {
    let site = Site::new();
    let text = "record_id,series,x,y,unit\nR1,MW-01/nitrate,2020.0,5.1,mg/L\nR2,MW-01/nitrate,2020.25,NaN,mg/L\nR3,MW-01/nitrate,2020.5,1e400,mg/L\nR4,MW-01/nitrate,2020.75,=cmd|' /C calc'!A0,mg/L\nR5,MW-01/nitrate,2021.0,4.8,mg/L\n";
    site.drop_file("mixed.csv", text);
    assert!(site.ingest_inbox().status.success());
    assert_eq!(site.sql("SELECT COUNT(*) FROM records"), 2);
    assert_eq!(site.sql("SELECT COUNT(*) FROM quarantined_rows"), 3);
    assert_eq!(site.sql("SELECT MIN(line) FROM quarantined_rows"), 3);
    assert_eq!(
        site.sql("SELECT COUNT(*) FROM quarantined_rows WHERE col = 4"),
        3
    );
    assert_eq!(
        site.sql("SELECT COUNT(*) FROM source_files WHERE outcome = 'partial'"),
        1
    );
}

#[test]
fn an_unreadable_file_goes_to_quarantine_with_a_reason_beside_it() {
    let site = Site::new();
    let inbox = site.path("inbox");
    std::fs::write(
        inbox.join("scan 01 (ü).csv"),
        [0u8, 159, 146, 150, 0, 1, 2, 255],
    )
    .unwrap();
    site.drop_file("good.csv", &well_file(1, &quarterly(4, 0)));
    assert!(site.ingest_inbox().status.success());
    let q = walk(&site.path("data/quarantine"));
    assert!(
        q.iter()
            .any(|p| p.to_string_lossy().ends_with("scan 01 (ü).csv")),
        "{q:?}"
    );
    let reason = q
        .iter()
        .find(|p| p.to_string_lossy().ends_with(".reason.txt"))
        .unwrap();
    let text = std::fs::read_to_string(reason).unwrap();
    assert!(text.contains("What to do"), "{text}");
    assert_eq!(site.sql("SELECT COUNT(*) FROM records"), 4);
    assert_eq!(
        site.sql("SELECT COUNT(*) FROM source_files WHERE outcome = 'quarantined'"),
        1
    );
}

#[test]
fn history_has_one_fit_version_per_file_and_diagnostics_the_fit_shape() {
    let site = Site::new();
    site.drop_file("f1.csv", &well_file(1, &quarterly(8, 0)));
    assert!(site.ingest_inbox().status.success());
    site.drop_file("f2.csv", &well_file(9, &quarterly(4, 8)));
    assert!(site.ingest_inbox().status.success());
    let out = site.cmd(&["history", "MW-01/nitrate", "--json"]);
    let h: Value = serde_json::from_slice(&out.stdout).unwrap();
    let h = h.as_array().unwrap();
    assert_eq!(h.len(), 2);
    assert_eq!(h[0]["trigger_file"], "f1.csv");
    assert_eq!(h[1]["n"], 12);
    let out = site.cmd(&["diagnostics", "MW-01/nitrate", "--json"]);
    let d: Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(d["fit"]["n"], 12);
    assert_eq!(d["points"].as_array().unwrap().len(), 12);
    // The streamed fit equals a batch fit of the stored points.
    let status = site.status();
    let streamed = status[0]["slope"].as_f64().unwrap();
    let batch = d["fit"]["slope"].as_f64().unwrap();
    assert!((streamed - batch).abs() <= 1e-12 * batch.abs());
}

#[test]
fn the_daemon_takes_the_backlog_then_new_files_and_stops_cleanly_on_sigterm() {
    let site = Site::new();
    site.drop_file("backlog-1.csv", &well_file(1, &quarterly(5, 0)));
    site.drop_file("backlog-2.csv", &well_file(6, &quarterly(5, 5)));
    let mut child = site.start();
    wait_for("the backlog", Duration::from_secs(20), || {
        site.inbox_files().is_empty()
    });
    // A file written slowly in pieces is taken only when complete.
    let slow = site.path("inbox/slow.csv");
    let text = well_file(11, &quarterly(6, 10));
    let (head, tail) = text.split_at(text.len() / 2);
    let mut f = std::fs::File::create(&slow).unwrap();
    f.write_all(head.as_bytes()).unwrap();
    f.flush().unwrap();
    std::thread::sleep(Duration::from_millis(150));
    f.write_all(tail.as_bytes()).unwrap();
    drop(f);
    wait_for("the slow file", Duration::from_secs(20), || {
        site.inbox_files().is_empty()
    });
    let pid = child.id().to_string();
    assert!(
        Command::new("kill")
            .args(["-TERM", &pid])
            .status()
            .unwrap()
            .success()
    );
    let status = child.wait().unwrap();
    assert_eq!(status.code(), Some(0));
    assert_eq!(site.sql("SELECT COUNT(*) FROM records"), 16);
    assert_eq!(site.sql("SELECT COUNT(*) FROM quarantined_rows"), 0);
    assert_eq!(site.sql("SELECT COUNT(*) FROM fits"), 3);
}

#[test]
fn kill_9_during_a_large_ingest_then_restart_stores_every_record_exactly_once() {
    let site = Site::new();
    let files = 60;
    let per = 200;
    for f in 0..files {
        let rows: Vec<(f64, f64)> = (0..per)
            .map(|i| (1995.0 + (f * per + i) as f64 / 1000.0, 3.0 + (i % 7) as f64))
            .collect();
        let mut s = String::from("record_id,series,x,y\n");
        for (i, (x, y)) in rows.iter().enumerate() {
            s.push_str(&format!(
                "K{f:03}-{i:04},MW-{:02}/chloride,{x},{y}\n",
                i % 10
            ));
        }
        site.drop_file(&format!("big-{f:03}.csv"), &s);
    }
    // Kill at several moments, then let a last run finish. The first kill
    // comes 150 ms after the start (in start-up or the settle time); the
    // others come at moments after that run's first file has left the
    // inbox, so that they fall inside the ingest however fast the machine.
    let mut remaining = Vec::new();
    for delay_ms in [150u64, 0, 40, 120] {
        let before = site.inbox_files().len();
        let mut child = site.start();
        if !remaining.is_empty() {
            let since = Instant::now();
            while site.inbox_files().len() >= before
                && since.elapsed() < Duration::from_secs(60)
                && child.try_wait().unwrap().is_none()
            {
                std::thread::sleep(Duration::from_millis(1));
            }
        }
        std::thread::sleep(Duration::from_millis(delay_ms));
        child.kill().unwrap(); // SIGKILL
        child.wait().unwrap();
        remaining.push(site.inbox_files().len());
    }
    // At least one kill landed in the middle of the backlog.
    assert!(
        remaining.iter().any(|&r| r > 0 && r < files),
        "{remaining:?}"
    );
    let mut child = site.start();
    wait_for("the whole backlog", Duration::from_secs(60), || {
        site.inbox_files().is_empty()
    });
    Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status()
        .unwrap();
    assert_eq!(child.wait().unwrap().code(), Some(0));
    let total = (files * per) as i64;
    assert_eq!(site.sql("SELECT COUNT(*) FROM records"), total);
    assert_eq!(
        site.sql("SELECT COUNT(DISTINCT record_id) FROM records"),
        total
    );
    assert_eq!(site.sql("SELECT COUNT(*) FROM source_files"), files as i64);
    assert_eq!(
        site.sql("SELECT SUM(f.n) FROM series s JOIN fits f ON f.id = s.latest_fit"),
        total
    );
    // Every file's refits are there: one fit row per file per touched series.
    assert_eq!(site.sql("SELECT COUNT(*) FROM fits"), (files * 10) as i64);
    // And the store proves it: the audit chain holds across the kills, every
    // row is sealed by an entry, every fit recomputes from the records.
    let out = Command::new(env!("CARGO_BIN_EXE_slopewarden"))
        .args(["verify", "--config"])
        .arg(site.path("slopewarden.toml"))
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "verify after the kills: {}",
        String::from_utf8_lossy(&out.stdout)
    );
}

#[test]
fn malformed_files_are_set_aside_while_the_daemon_stays_up_and_good_files_are_stored() {
    let site = Site::new();
    let mut child = site.start();
    let inbox = site.path("inbox");
    // Whole files that cannot be read as records.
    std::fs::write(
        inbox.join("binary.csv"),
        [0x89, b'P', b'N', b'G', 0, 0, 0, 13, 0xff, 0xfe],
    )
    .unwrap();
    let mut latin1 = b"record_id,series,x,y\nR1,MW-01/nitrate,2020.1,".to_vec();
    latin1.extend_from_slice(&[0xB5, b'4', b'\n']);
    std::fs::write(inbox.join("latin-1.csv"), latin1).unwrap();
    std::fs::write(inbox.join("one line.csv"), "x".repeat(10 * 1024 * 1024)).unwrap();
    std::fs::write(inbox.join("empty.csv"), "").unwrap();
    // Files with some bad rows beside good ones.
    site.drop_file(
        "ragged and hostile.csv",
        "record_id,series,x,y\nG1,MW-02/boron,2020.0,0.5\nG2,MW-02/boron,2020.25\nG3,MW-02/boron,2020.5,inf\nG4,MW-02/boron,2020.75,@SUM(A1)\nG5,MW-02/boron,2021.0,0.6\n",
    );
    site.drop_file("Brunnen ü 3 $(date).csv", &well_file(100, &quarterly(5, 0)));
    wait_for("every file handled", Duration::from_secs(30), || {
        site.inbox_files().is_empty()
    });
    // The daemon is still running.
    assert!(child.try_wait().unwrap().is_none(), "the daemon exited");
    Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status()
        .unwrap();
    assert_eq!(child.wait().unwrap().code(), Some(0));
    assert_eq!(site.sql("SELECT COUNT(*) FROM records"), 7);
    assert_eq!(site.sql("SELECT COUNT(*) FROM quarantined_rows"), 3);
    assert_eq!(
        site.sql("SELECT COUNT(*) FROM source_files WHERE outcome = 'quarantined'"),
        4
    );
    let reasons: Vec<PathBuf> = walk(&site.path("data/quarantine"))
        .into_iter()
        .filter(|p| p.to_string_lossy().ends_with(".reason.txt"))
        .collect();
    assert_eq!(reasons.len(), 4, "{reasons:?}");
    let archived = walk(&site.path("data/archive"));
    assert!(
        archived
            .iter()
            .any(|p| p.to_string_lossy().ends_with("Brunnen ü 3 $(date).csv")),
        "{archived:?}"
    );
}

#[test]
fn the_robust_slope_kept_between_files_equals_one_computed_from_the_store() {
    let site = Site::new();
    // One ingest run over three files, so the writer's cached points are
    // used at the second and third refits (a series this short has its
    // robust slope recomputed at every refit).
    site.drop_file("f1.csv", &well_file(1, &quarterly(8, 0)));
    site.drop_file("f2.csv", &well_file(9, &quarterly(4, 8)));
    site.drop_file("f3.csv", &well_file(13, &quarterly(6, 12)));
    assert!(site.ingest_inbox().status.success());
    let out = site.cmd(&["history", "MW-01/nitrate", "--json"]);
    let h: Value = serde_json::from_slice(&out.stdout).unwrap();
    let versions = h.as_array().unwrap();
    for v in versions {
        assert!(v["theil_sen_slope"].is_number(), "{v:?}");
    }
    let last = versions.last().unwrap().clone();
    assert_eq!(last["n"], 18);
    let kept = last["theil_sen_slope"]
        .as_f64()
        .expect("robust slope computed at n = 18");
    let out = site.cmd(&["diagnostics", "MW-01/nitrate", "--json"]);
    let d: Value = serde_json::from_slice(&out.stdout).unwrap();
    let fresh = d["robust"]["theil_sen_slope"].as_f64().unwrap();
    assert_eq!(kept, fresh);
}

#[test]
fn the_robust_slope_is_recomputed_at_every_refit_up_to_100_points_then_as_the_series_doubles() {
    let site = Site::new();
    // Monthly from 1990, falling gently (quarterly readings would run into
    // the future and below zero): 60, 90, 110, 180 and 190 points after
    // each file.
    let monthly = |n: usize, start: usize| -> Vec<(f64, f64)> {
        (start..start + n)
            .map(|k| {
                let t = 1990.0 + k as f64 / 12.0;
                (
                    t,
                    12.0 - 0.2 * (t - 1990.0) + if k % 2 == 0 { 0.3 } else { -0.25 },
                )
            })
            .collect()
    };
    site.drop_file("f1.csv", &well_file(1, &monthly(60, 0)));
    site.drop_file("f2.csv", &well_file(61, &monthly(30, 60)));
    site.drop_file("f3.csv", &well_file(91, &monthly(20, 90)));
    site.drop_file("f4.csv", &well_file(111, &monthly(70, 110)));
    site.drop_file("f5.csv", &well_file(181, &monthly(10, 180)));
    assert!(site.ingest_inbox().status.success());
    let out = site.cmd(&["history", "MW-01/nitrate", "--json"]);
    let h: Value = serde_json::from_slice(&out.stdout).unwrap();
    let versions = h.as_array().unwrap();
    let computed: Vec<(i64, bool)> = versions
        .iter()
        .map(|v| (v["n"].as_i64().unwrap(), v["theil_sen_slope"].is_number()))
        .collect();
    // At 110 points the series has not doubled since 90: the robust slope
    // waits, and the version says so; at 180 it has; at 190 it waits.
    assert_eq!(
        computed,
        [
            (60, true),
            (90, true),
            (110, false),
            (180, true),
            (190, false)
        ]
    );
    assert_eq!(
        versions[2]["note"],
        "robust slope not recomputed at this version (last at n = 90)"
    );
    // The report shows the one computed at 180 points, and says so.
    let report = site.path("report.html");
    let out = site.cmd(&["report", "--out", report.to_str().unwrap()]);
    assert!(out.status.success());
    let html = std::fs::read_to_string(&report).unwrap();
    assert!(
        html.contains(
            "(as of version 4, n = 180; past 100 points, recomputed each time the series doubles)"
        ),
        "{html}"
    );
}

#[test]
fn status_reads_while_a_writer_holds_the_database() {
    let site = Site::new();
    site.drop_file("a.csv", &well_file(1, &quarterly(6, 0)));
    assert!(site.ingest_inbox().status.success());
    // A writer in the middle of a long transaction.
    let mut conn = rusqlite::Connection::open(site.path("data/slopewarden.sqlite3")).unwrap();
    let tx = conn
        .transaction_with_behavior(rusqlite::TransactionBehavior::Immediate)
        .unwrap();
    tx.execute(
        "INSERT INTO series (key, transform, non_detects) VALUES ('held', 'none', 'exclude')",
        [],
    )
    .unwrap();
    let started = Instant::now();
    let status = site.status();
    assert!(
        started.elapsed() < Duration::from_secs(5),
        "status waited {:?}",
        started.elapsed()
    );
    assert_eq!(status.len(), 1, "the uncommitted series is not visible");
    tx.rollback().unwrap();
}

fn walk(dir: &Path) -> Vec<PathBuf> {
    let mut out = Vec::new();
    if let Ok(rd) = std::fs::read_dir(dir) {
        for e in rd.flatten() {
            let p = e.path();
            if p.is_dir() {
                out.extend(walk(&p));
            } else {
                out.push(p);
            }
        }
    }
    out.sort();
    out
}
