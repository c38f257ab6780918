//! An operator's first month, with the real binary: a backup taken while
//! the daemon writes, a disk that runs short (files wait, one finding),
//! a configuration reloaded on SIGHUP (with restart-only keys named), an
//! interrupted `ingest` with its own exit code, an `ingest` that says what
//! to do next, `--version`, and read commands refusing a database that
//! does not exist.
//!
//! Series and record names are invented.

#![allow(clippy::unwrap_used, clippy::expect_used)]

use std::path::{Path, PathBuf};
use std::process::{Child, Command, Output};
use std::time::Duration;

#[path = "support/wait.rs"]
mod wait;
use wait::wait_for;

struct Site {
    dir: tempfile::TempDir,
}

impl Site {
    fn new(extra: &str) -> Site {
        let dir = tempfile::tempdir().unwrap();
        std::fs::create_dir_all(dir.path().join("inbox")).unwrap();
        let site = Site { dir };
        site.write_config(extra);
        site
    }

    fn write_config(&self, extra: &str) {
        std::fs::write(
            self.path("slopewarden.toml"),
            format!("[watch]\nsettle_seconds = 0.2\nrescan_seconds = 1\n{extra}\n"),
        )
        .unwrap();
    }

    fn path(&self, p: &str) -> PathBuf {
        self.dir.path().join(p)
    }

    fn cmd(&self, args: &[&str]) -> Output {
        Command::new(env!("CARGO_BIN_EXE_slopewarden"))
            .args(args)
            .arg("--config")
            .arg(self.path("slopewarden.toml"))
            .current_dir(self.dir.path())
            .output()
            .unwrap()
    }

    fn drop_file(&self, name: &str, text: &str) {
        let tmp = self.path(&format!("inbox/.{name}.part"));
        std::fs::write(&tmp, text).unwrap();
        std::fs::rename(&tmp, self.path(&format!("inbox/{name}"))).unwrap();
    }

    fn start(&self) -> Child {
        let log = self.path("daemon.log");
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
            || self.log().contains("watching"),
        );
        child
    }

    fn log(&self) -> String {
        std::fs::read_to_string(self.path("daemon.log")).unwrap_or_default()
    }

    fn count(&self, db: &Path, sql: &str) -> i64 {
        rusqlite::Connection::open_with_flags(db, rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY)
            .unwrap()
            .query_row(sql, [], |r| r.get(0))
            .unwrap()
    }
}

fn signal(child: &Child, sig: &str) {
    assert!(
        Command::new("kill")
            .args([sig, &child.id().to_string()])
            .status()
            .unwrap()
            .success()
    );
}

fn stop(mut child: Child) {
    signal(&child, "-TERM");
    assert_eq!(child.wait().unwrap().code(), Some(0));
}

/// A file of `n` quarterly readings of one well, on a gentle line.
fn well_file(prefix: &str, series: &str, n: usize) -> String {
    let mut s = String::from("record_id,series,x,y,unit\n");
    for i in 0..n {
        let x = 2000.0 + i as f64 * 0.25;
        let y = 12.0 - 0.1 * (x - 2000.0) + [0.3, -0.2, 0.1, -0.25, 0.15][i % 5];
        s.push_str(&format!("{prefix}-{i:04},{series},{x},{y:.3},mg/L\n"));
    }
    s
}

#[test]
fn a_backup_taken_while_the_daemon_writes_is_a_consistent_store_that_verifies() {
    let site = Site::new("");
    let daemon = site.start();
    for f in 0..12 {
        site.drop_file(
            &format!("batch-{f:02}.csv"),
            &well_file(
                &format!("B{f:02}"),
                &format!("QW-{:02}/chloride", f % 4),
                300,
            ),
        );
    }
    // Back up while files are still arriving and being written.
    std::thread::sleep(Duration::from_millis(300));
    let copy = site.path("copy-1.sqlite3");
    let out = site.cmd(&["backup", copy.to_str().unwrap()]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    // A second backup to the same name is refused, never overwritten.
    assert_eq!(
        site.cmd(&["backup", copy.to_str().unwrap()]).status.code(),
        Some(2)
    );
    wait_for("the backlog", Duration::from_secs(60), || {
        std::fs::read_dir(site.path("inbox")).unwrap().count() == 0
    });
    stop(daemon);
    // The copy is a consistent snapshot: every file in it has all its
    // records and fits, and it verifies on its own.
    let copy_config = site.path("copy.toml");
    std::fs::write(
        &copy_config,
        format!("[paths]\ndatabase = \"{}\"\n", copy.display()),
    )
    .unwrap();
    let verify = Command::new(env!("CARGO_BIN_EXE_slopewarden"))
        .args(["verify", "--config"])
        .arg(&copy_config)
        .output()
        .unwrap();
    assert!(
        verify.status.success(),
        "{}",
        String::from_utf8_lossy(&verify.stdout)
    );
    let files = site.count(&copy, "SELECT COUNT(*) FROM source_files");
    assert_eq!(
        site.count(&copy, "SELECT COUNT(*) FROM records"),
        files * 300
    );
    let live = site.path("data/slopewarden.sqlite3");
    assert_eq!(site.count(&live, "SELECT COUNT(*) FROM records"), 12 * 300);
}

#[test]
fn a_short_disk_holds_files_in_the_inbox_with_one_finding_and_sighup_applies_the_new_limit() {
    // More free space wanted than any test machine has: the disk is "short".
    let site = Site::new("min_free_mb = 900000000");
    let daemon = site.start();
    site.drop_file("q1.csv", &well_file("D", "QW-9/nitrate", 20));
    wait_for("the disk_space finding", Duration::from_secs(20), || {
        let out = site.cmd(&["findings", "--json"]);
        String::from_utf8_lossy(&out.stdout).contains("disk_space")
    });
    // Several scans later: still waiting, still one finding, nothing stored.
    std::thread::sleep(Duration::from_millis(2500));
    assert!(
        site.path("inbox/q1.csv").exists(),
        "the file waits in the inbox"
    );
    let db = site.path("data/slopewarden.sqlite3");
    assert_eq!(
        site.count(
            &db,
            "SELECT COUNT(*) FROM findings WHERE kinds LIKE '%disk_space%'"
        ),
        1
    );
    assert_eq!(site.count(&db, "SELECT COUNT(*) FROM records"), 0);

    // The operator frees space (here: lowers the limit) and reloads; a key
    // that needs a restart is named and keeps its running value.
    std::fs::write(
        site.path("slopewarden.toml"),
        "[paths]\ninbox = \"elsewhere\"\n[watch]\nsettle_seconds = 0.2\nrescan_seconds = 1\nmin_free_mb = 0\n",
    )
    .unwrap();
    signal(&daemon, "-HUP");
    wait_for(
        "the file to be taken after SIGHUP",
        Duration::from_secs(20),
        || !site.path("inbox/q1.csv").exists(),
    );
    let log = site.log();
    assert!(log.contains("configuration reloaded"), "{log}");
    assert!(log.contains("paths.inbox"), "{log}");
    stop(daemon);
    assert_eq!(site.count(&db, "SELECT COUNT(*) FROM records"), 20);
    assert_eq!(
        site.count(&db, "SELECT COUNT(*) FROM audit_log WHERE kind = 'config'"),
        2
    );
}

#[test]
fn an_interrupted_ingest_exits_130_and_a_second_run_finishes_the_job() {
    let site = Site::new("");
    let backlog = site.path("backlog");
    std::fs::create_dir_all(&backlog).unwrap();
    for f in 0..150 {
        std::fs::write(
            backlog.join(format!("b-{f:03}.csv")),
            well_file(&format!("I{f:03}"), &format!("QW-{:02}/boron", f % 8), 400),
        )
        .unwrap();
    }
    let child = Command::new(env!("CARGO_BIN_EXE_slopewarden"))
        .args(["ingest", "--config"])
        .arg(site.path("slopewarden.toml"))
        .arg(&backlog)
        .current_dir(site.dir.path())
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    let db = site.path("data/slopewarden.sqlite3");
    wait_for("the first file", Duration::from_secs(30), || {
        db.exists()
            && rusqlite::Connection::open_with_flags(
                &db,
                rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY,
            )
            .and_then(|c| {
                c.query_row("SELECT COUNT(*) FROM source_files", [], |r| {
                    r.get::<_, i64>(0)
                })
            })
            .is_ok_and(|n| n > 0)
    });
    signal(&child, "-INT");
    let out = child.wait_with_output().unwrap();
    let taken = site.count(&db, "SELECT COUNT(*) FROM source_files");
    if taken < 40 {
        assert_eq!(
            out.status.code(),
            Some(130),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        assert!(String::from_utf8_lossy(&out.stderr).contains("interrupted"));
    }
    let again = Command::new(env!("CARGO_BIN_EXE_slopewarden"))
        .args(["ingest", "--config"])
        .arg(site.path("slopewarden.toml"))
        .arg(&backlog)
        .output()
        .unwrap();
    assert!(again.status.success());
    assert_eq!(site.count(&db, "SELECT COUNT(*) FROM records"), 150 * 400);
}

#[test]
fn an_ingest_says_what_to_do_next_about_findings_and_files_set_aside() {
    let site = Site::new("");
    // Twenty quiet readings, then one a hundred times too large, and a
    // file that is not records at all.
    let mut text = well_file("OP-NX", "op-well-9/nitrate", 20);
    text.push_str("OP-NX-slip,op-well-9/nitrate,2005.25,1150,mg/L\n");
    std::fs::write(site.path("inbox/a.csv"), text).unwrap();
    std::fs::write(site.path("inbox/b.csv"), [0u8, 159, 146, 150, 0, 1, 2]).unwrap();
    let out = site.cmd(&["ingest", "inbox"]);
    let said = String::from_utf8_lossy(&out.stdout);
    assert!(said.contains("1 file(s) ingested"), "{said}");
    assert!(said.contains("1 quarantined"), "{said}");
    let config = format!("--config {}", site.path("slopewarden.toml").display());
    assert!(said.contains("open finding(s) await a check"), "{said}");
    assert!(
        said.contains(&format!("slopewarden findings --open {config}")),
        "{said}"
    );
    assert!(said.contains("slopewarden review ID --verdict"), "{said}");
    assert!(said.contains(".reason.txt that says what to fix"), "{said}");
}

#[test]
fn version_and_a_missing_database_are_reported_plainly() {
    let out = Command::new(env!("CARGO_BIN_EXE_slopewarden"))
        .arg("--version")
        .output()
        .unwrap();
    assert!(out.status.success());
    assert!(String::from_utf8_lossy(&out.stdout).starts_with("slopewarden "));
    let site = Site::new("");
    for args in [
        &["status"][..],
        &["verify"],
        &["findings"],
        &["report", "--out", "r.html"],
    ] {
        let out = site.cmd(args);
        assert_eq!(out.status.code(), Some(4), "{args:?}");
        assert!(String::from_utf8_lossy(&out.stderr).contains("there is no database"));
        assert!(
            !site.path("data/slopewarden.sqlite3").exists(),
            "{args:?} created a database"
        );
    }
}
