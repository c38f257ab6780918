//! Latency of one small file arriving for a long series: a 100-record file
//! for a series that already holds 100,000 points, from being taken (read,
//! hash, parse, refit, one transaction, archive move) to done.
//! Target (issue: watching daemon): median within 20 ms.
//!
//! Run: `cargo bench --bench append`. Prints the median and the spread.

use std::path::Path;
use std::time::{Duration, Instant, SystemTime};

use slopewarden::config::Config;
use slopewarden::inbox::ReadyFile;
use slopewarden::pipeline::{SeriesCache, process_file};
use slopewarden::store::Store;

fn write_file(dir: &Path, name: &str, first: usize, count: usize) -> ReadyFile {
    let mut s = String::from("record_id,series,x,y\n");
    for i in first..first + count {
        let x = 1990.0 + i as f64 / 3000.0;
        let y = 50.0 - 0.2 * (x - 1990.0) + ((i * 7919) % 101) as f64 / 50.0;
        s.push_str(&format!("R{i:08},MW-07/sulfate,{x:.6},{y:.4}\n"));
    }
    let path = dir.join(name);
    std::fs::write(&path, s).unwrap_or_else(|e| panic!("{e}"));
    let meta = std::fs::metadata(&path).unwrap_or_else(|e| panic!("{e}"));
    ReadyFile {
        path,
        relative: name.into(),
        size: meta.len(),
        modified: meta.modified().unwrap_or(SystemTime::UNIX_EPOCH),
    }
}

fn main() {
    let dir = tempfile::tempdir().unwrap_or_else(|e| panic!("{e}"));
    let config = Config::defaults_in(dir.path());
    std::fs::create_dir_all(&config.inbox).unwrap_or_else(|e| panic!("{e}"));
    let mut store = Store::open(&config.database).unwrap_or_else(|e| panic!("{e}"));
    let mut cache = SeriesCache::new();
    // Build the long series: 100 files of 1,000 records.
    for f in 0..100 {
        let file = write_file(&config.inbox, &format!("seed-{f:03}.csv"), f * 1000, 1000);
        process_file(&config, &mut store, &mut cache, &file, SystemTime::now())
            .unwrap_or_else(|e| panic!("{e}"));
    }
    // One 100-record file, from being taken to done.
    let timed = |store: &mut Store, cache: &mut SeriesCache, name: String, first: usize| {
        let file = write_file(&config.inbox, &name, first, 100);
        let t0 = Instant::now();
        process_file(&config, store, cache, &file, SystemTime::now())
            .unwrap_or_else(|e| panic!("{e}"));
        t0.elapsed()
    };
    let mut times: Vec<Duration> = (0..41)
        .map(|k| {
            timed(
                &mut store,
                &mut cache,
                format!("new-{k:03}.csv"),
                100_000 + k * 100,
            )
        })
        .collect();
    // The same right after a restart: a fresh cache, so the series' state
    // comes from the store.
    let mut cold: Vec<Duration> = (0..11)
        .map(|k| {
            let mut fresh = SeriesCache::new();
            let name = format!("restart-{k:03}.csv");
            timed(&mut store, &mut fresh, name, 200_000 + k * 100)
        })
        .collect();
    cold.sort();
    times.sort();
    let ms = |d: Duration| d.as_secs_f64() * 1e3;
    println!(
        "the same, first file after a restart (empty cache): median {:.2} ms (min {:.2}, max {:.2}) over {} files",
        ms(cold[cold.len() / 2]),
        ms(cold[0]),
        ms(cold[cold.len() - 1]),
        cold.len()
    );
    println!(
        "100-record file onto a 100,000-point series: median {:.2} ms (min {:.2}, p90 {:.2}, max {:.2}) over {} files",
        ms(times[times.len() / 2]),
        ms(times[0]),
        ms(times[times.len() * 9 / 10]),
        ms(times[times.len() - 1]),
        times.len()
    );
}
