//! A backlog stores each file in its own transaction while the next file is
//! computed ahead of that commit. These tests hold that path to the plain
//! one (every file read, computed and committed in turn), including the
//! files whose assumptions fail: a resubmission right behind its first
//! delivery, the same content twice in one backlog.
//!
//! Data: NIST StRD Norris (tests/fixtures/nist/norris.csv, certified values
//! in norris.certified.json), delivered in six files of six records, with a
//! resubmission and a repeated file added.

#![allow(clippy::unwrap_used, clippy::expect_used)]

use std::path::Path;
use std::sync::atomic::AtomicBool;
use std::time::SystemTime;

use slopewarden::config::Config;
use slopewarden::inbox::ReadyFile;
use slopewarden::pipeline::{Flow, Outcome, SeriesCache, process_file, process_in_order};
use slopewarden::store::Store;

#[path = "support/norris.rs"]
mod norris;
#[path = "support/ready.rs"]
mod ready;
use ready::deliver;

/// The backlog's files, in name order: Norris in six files; after the
/// second, a resubmission of two of its records (one unchanged, one with
/// another value); after the fourth, the first file's bytes again under
/// another name.
fn backlog() -> Vec<(String, String)> {
    let points = norris::points();
    let file = |k: usize, ids: std::ops::Range<usize>, y_of: &dyn Fn(usize) -> String| {
        let mut text = String::from("record_id,series,x,y\n");
        for i in ids {
            text.push_str(&format!(
                "N{:02},norris/ozone,{},{}\n",
                i + 1,
                points[i].0,
                y_of(i)
            ));
        }
        (format!("b{k:02}.csv"), text)
    };
    let y = |i: usize| points[i].1.clone();
    let mut files = Vec::new();
    for k in 0..6 {
        files.push(file(k * 2, k * 6..k * 6 + 6, &y));
    }
    // b03: N07 as delivered, N08 with another value (a conflict).
    let changed = |i: usize| if i == 7 { "999.5".into() } else { y(i) };
    files.push(file(3, 6..8, &changed));
    // b07: b00's bytes.
    let first = files[0].1.clone();
    files.push(("b07.csv".into(), first));
    files.sort();
    files
}

/// Outcomes as (file, kind, new, same, conflict), timestamps and paths left out.
fn summary(name: &str, o: &Outcome) -> (String, &'static str, u64, u64, u64) {
    match o {
        Outcome::Ingested { counts, .. } => (
            name.into(),
            "ingested",
            counts.new,
            counts.same,
            counts.conflict,
        ),
        Outcome::Duplicate { .. } => (name.into(), "duplicate", 0, 0, 0),
        Outcome::Quarantined { .. } => (name.into(), "quarantined", 0, 0, 0),
        Outcome::Vanished => (name.into(), "vanished", 0, 0, 0),
    }
}

/// The store's rows that the two paths must agree on, as text: every
/// column but the clock's.
fn rows(db: &Path) -> Vec<String> {
    let conn = rusqlite::Connection::open(db).unwrap();
    let queries = [
        "SELECT id, record_id, version, status, series_id, x, y, censored, in_fit, file_id, line, raw,
                prev_in_series, joined_fit, leverage, studentized_residual, cooks_distance, dffits,
                dfbetas_slope, slope_without, slope_p_without FROM records ORDER BY id",
        "SELECT id, series_id, version, trigger_file, n, slope, intercept, slope_se, slope_p,
                theil_sen_slope, mann_kendall_s, records, robust_n, prev_fit FROM fits ORDER BY id",
        "SELECT id, name, sha256, outcome, records_new, records_same, records_conflict, records_bad
                FROM source_files ORDER BY id",
        "SELECT kind, subject FROM audit_log ORDER BY id",
        "SELECT id, series_id FROM findings ORDER BY id",
    ];
    let mut out = Vec::new();
    for q in queries {
        let mut stmt = conn.prepare(q).unwrap();
        let n = stmt.column_count();
        let mut r = stmt.query([]).unwrap();
        while let Some(row) = r.next().unwrap() {
            let cells: Vec<String> = (0..n)
                .map(|i| format!("{:?}", row.get_ref(i).unwrap()))
                .collect();
            out.push(cells.join("|"));
        }
    }
    out
}

#[test]
fn a_backlog_computed_ahead_of_each_commit_stores_what_one_file_at_a_time_stores() {
    let files = backlog();
    // The plain path: one file read, computed and committed at a time.
    let plain_dir = tempfile::tempdir().unwrap();
    let config = Config::defaults_in(plain_dir.path());
    std::fs::create_dir_all(&config.inbox).unwrap();
    let ready = deliver(&config.inbox, &files);
    let mut store = Store::open(&config.database).unwrap();
    let mut cache = SeriesCache::new();
    let mut plain = Vec::new();
    for f in &ready {
        let o = process_file(&config, &mut store, &mut cache, f, SystemTime::now()).unwrap();
        plain.push(summary(&f.relative.to_string_lossy(), &o));
    }
    drop(store);

    // The backlog path, files computed while the one before commits.
    let ahead_dir = tempfile::tempdir().unwrap();
    let config_b = Config::defaults_in(ahead_dir.path());
    std::fs::create_dir_all(&config_b.inbox).unwrap();
    let ready_b = deliver(&config_b.inbox, &files);
    let jobs: Vec<(&Config, ReadyFile)> = ready_b.into_iter().map(|f| (&config_b, f)).collect();
    let mut store_b = Store::open(&config_b.database).unwrap();
    let mut cache_b = SeriesCache::new();
    let mut ahead = Vec::new();
    let mut order = Vec::new();
    process_in_order(
        &mut store_b,
        &mut cache_b,
        &jobs,
        &AtomicBool::new(false),
        |i, file, result| {
            order.push(i);
            ahead.push(summary(&file.relative.to_string_lossy(), &result.unwrap()));
            Flow::Continue
        },
    );
    assert_eq!(
        order,
        (0..files.len()).collect::<Vec<_>>(),
        "each file reported once, in order"
    );
    // The run's commits were made durable off the writing thread (SQLite's
    // synchronous = NORMAL, 1); after it, commits wait for the disk again
    // (FULL, 2) for everything else this connection writes.
    assert_eq!(store_b.synchronous().unwrap(), 2);
    assert_eq!(ahead, plain);
    // The resubmission and the repeated file were caught, not stored again.
    assert!(
        ahead.contains(&("b03.csv".into(), "ingested", 0, 1, 1)),
        "{ahead:?}"
    );
    assert!(
        ahead.contains(&("b07.csv".into(), "duplicate", 0, 0, 0)),
        "{ahead:?}"
    );
    assert_eq!(rows(&config_b.database), rows(&config.database));
    let report = slopewarden::verify::verify(&store_b).unwrap();
    assert!(report.ok(), "{:?}", report.problems);

    // Every Norris record stored once and current, the changed one kept
    // aside: the series' fit is NIST's (certified values, 1e-9 relative).
    let conn = rusqlite::Connection::open(&config_b.database).unwrap();
    let (current, proposed): (i64, i64) = conn
        .query_row(
            "SELECT SUM(status = 'current'), SUM(status = 'proposed') FROM records",
            [],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .unwrap();
    assert_eq!((current, proposed), (36, 1));
    let (slope, intercept): (f64, f64) = conn
        .query_row(
            "SELECT f.slope, f.intercept FROM fits f JOIN series s ON f.id = s.latest_fit",
            [],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .unwrap();
    for (got, want) in [
        (slope, norris::certified("B1")),
        (intercept, norris::certified("B0")),
    ] {
        assert!(((got - want) / want).abs() < 1e-9, "{got} vs NIST {want}");
    }
    // All files left the inbox.
    assert_eq!(std::fs::read_dir(&config_b.inbox).unwrap().count(), 0);
}

#[test]
fn a_stop_asked_after_a_file_leaves_the_file_computed_ahead_in_the_inbox_untouched() {
    // Two files are in flight while the next is computed: when the first
    // is reported, the second's commit is already queued (it commits and is
    // reported too) and the third is computed but not ended (rolled back,
    // left in the inbox untouched).
    let files = backlog();
    let dir = tempfile::tempdir().unwrap();
    let config = Config::defaults_in(dir.path());
    std::fs::create_dir_all(&config.inbox).unwrap();
    let ready = deliver(&config.inbox, &files);
    let jobs: Vec<(&Config, ReadyFile)> = ready.into_iter().map(|f| (&config, f)).collect();
    let mut store = Store::open(&config.database).unwrap();
    let mut cache = SeriesCache::new();
    let mut reported = Vec::new();
    process_in_order(
        &mut store,
        &mut cache,
        &jobs,
        &AtomicBool::new(false),
        |i, _, result| {
            assert!(result.is_ok());
            reported.push(i);
            // As the daemon does when the disk runs low.
            if i == 0 { Flow::Stop } else { Flow::Continue }
        },
    );
    assert_eq!(
        reported,
        vec![0, 1],
        "the file already committing is reported"
    );
    let conn = rusqlite::Connection::open(&config.database).unwrap();
    let stored: i64 = conn
        .query_row("SELECT COUNT(*) FROM source_files", [], |r| r.get(0))
        .unwrap();
    assert_eq!(
        stored, 2,
        "the third file, computed meanwhile, was rolled back"
    );
    let mut left: Vec<String> = std::fs::read_dir(&config.inbox)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    left.sort();
    assert_eq!(left.first().map(String::as_str), Some("b03.csv"));
    assert_eq!(left.len(), files.len() - 2);
    assert!(slopewarden::verify::verify(&store).unwrap().ok());
}
