//! The practical floor for ingest: a bare SQLite insert of the same rows,
//! with the same durability (WAL, synchronous = FULL) and one transaction
//! per file, and nothing else (no validation, no refit, no audit).
//!
//! Run by benches/ingest.sh: `cargo bench --bench bare_insert -- INBOX DB`.

use std::path::PathBuf;
use std::time::Instant;

fn main() {
    let args: Vec<String> = std::env::args()
        .skip(1)
        .filter(|a| a != "--bench")
        .collect();
    let (Some(inbox), Some(db)) = (args.first(), args.get(1)) else {
        eprintln!("usage: bare_insert INBOX DB (run through benches/ingest.sh)");
        return;
    };
    let mut files: Vec<PathBuf> = std::fs::read_dir(inbox)
        .unwrap_or_else(|e| panic!("cannot read {inbox}: {e}"))
        .filter_map(|e| e.ok().map(|e| e.path()))
        .collect();
    files.sort();
    let _ = std::fs::remove_file(db);
    let mut conn = rusqlite::Connection::open(db).unwrap_or_else(|e| panic!("{e}"));
    // The same page size as slopewarden's store, so that the comparison is
    // of the work done, not of the settings.
    conn.pragma_update(None, "page_size", 16_384)
        .unwrap_or_else(|e| panic!("{e}"));
    conn.pragma_update(None, "journal_mode", "WAL")
        .unwrap_or_else(|e| panic!("{e}"));
    conn.pragma_update(None, "synchronous", "FULL")
        .unwrap_or_else(|e| panic!("{e}"));
    conn.execute_batch(
        "CREATE TABLE rows (record_id TEXT, series TEXT, x TEXT, y TEXT, unit TEXT, sampled_at TEXT, note TEXT)",
    )
    .unwrap_or_else(|e| panic!("{e}"));
    let start = Instant::now();
    let mut rows = 0u64;
    for f in &files {
        let bytes = std::fs::read(f).unwrap_or_else(|e| panic!("{e}"));
        let mut rdr = csv::ReaderBuilder::new()
            .flexible(true)
            .from_reader(&bytes[..]);
        let tx = conn.transaction().unwrap_or_else(|e| panic!("{e}"));
        {
            let mut stmt = tx
                .prepare_cached("INSERT INTO rows VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7)")
                .unwrap_or_else(|e| panic!("{e}"));
            let mut rec = csv::StringRecord::new();
            while rdr.read_record(&mut rec).unwrap_or(false) {
                let g = |i: usize| rec.get(i).unwrap_or("");
                stmt.execute([g(0), g(1), g(2), g(3), g(4), g(5), g(6)])
                    .unwrap_or_else(|e| panic!("{e}"));
                rows += 1;
            }
        }
        tx.commit().unwrap_or_else(|e| panic!("{e}"));
    }
    let secs = start.elapsed().as_secs_f64();
    println!(
        "bare_insert files={} rows={rows} seconds={secs:.3} rows_per_s={:.0}",
        files.len(),
        rows as f64 / secs
    );
}
