//! Resuming a series after a restart: the second (ln y) outlier screen
//! continues from the state kept with the series' heads instead of walking
//! all its points back from the store, and ends exactly where a daemon that
//! never stopped ends.
//!
//! Data: NIST StRD Norris (tests/fixtures/nist/norris.csv), delivered in six
//! files of six records.

#![allow(clippy::unwrap_used, clippy::expect_used)]

use std::path::Path;
use std::time::SystemTime;

use slopewarden::config::Config;
use slopewarden::inbox::ReadyFile;
use slopewarden::pipeline::{SeriesCache, process_file};
use slopewarden::store::Store;

#[path = "support/norris.rs"]
mod norris;

fn deliver(inbox: &Path, k: usize, rows: &[(String, String)]) -> ReadyFile {
    let mut text = String::from("record_id,series,x,y\n");
    for (i, (x, y)) in rows.iter().enumerate() {
        text.push_str(&format!("N{:02},norris/ozone,{x},{y}\n", k * 6 + i + 1));
    }
    let name = format!("norris-{k}.csv");
    let path = inbox.join(&name);
    std::fs::write(&path, text).unwrap();
    ReadyFile {
        size: std::fs::metadata(&path).unwrap().len(),
        path,
        relative: name.into(),
        modified: SystemTime::UNIX_EPOCH,
    }
}

/// Ingests Norris in six files; `restart` drops the cache and reopens the
/// store before every file. Returns the store's folder and the kept state.
fn ingest(restart: bool) -> (tempfile::TempDir, Vec<u8>) {
    let dir = tempfile::tempdir().unwrap();
    let config = Config::defaults_in(dir.path());
    std::fs::create_dir_all(&config.inbox).unwrap();
    let points = norris::points();
    assert_eq!(points.len(), 36);
    let mut store = Store::open(&config.database).unwrap();
    let mut cache = SeriesCache::new();
    for (k, rows) in points.chunks(6).enumerate() {
        if restart {
            drop(store);
            store = Store::open(&config.database).unwrap();
            cache = SeriesCache::new();
        }
        let file = deliver(&config.inbox, k, rows);
        process_file(&config, &mut store, &mut cache, &file, SystemTime::now()).unwrap();
    }
    drop(store);
    let conn = rusqlite::Connection::open(&config.database).unwrap();
    let kept: Option<Vec<u8>> = conn
        .query_row("SELECT log_screen FROM series", [], |r| r.get(0))
        .unwrap();
    (dir, kept.expect("the ln(y) screen state is kept"))
}

#[test]
fn a_series_resumed_after_each_restart_keeps_the_screen_state_of_one_that_never_stopped() {
    let (_a, continuous) = ingest(false);
    let (b, restarted) = ingest(true);
    // n (36) and seven moments, bit for bit.
    assert_eq!(continuous.len(), 64);
    assert_eq!(u64::from_le_bytes(continuous[..8].try_into().unwrap()), 36);
    assert_eq!(restarted, continuous);
    // And verify recomputes it from the stored records.
    let config = b.path().join("c.toml");
    std::fs::write(
        &config,
        format!(
            "[paths]\ndatabase = \"{}\"\n",
            Config::defaults_in(b.path()).database.display()
        ),
    )
    .unwrap();
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_slopewarden"))
        .args(["verify", "--config"])
        .arg(&config)
        .output()
        .unwrap();
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stdout)
    );
}
