//! The practical floor for ingest: a bare SQLite insert of the same rows,
//! with the same durability (WAL, synchronous = FULL) and one transaction
//! per file, and nothing else (no validation, no refit, no audit).
//!
//! Run by benches/ingest.sh: `cargo bench --bench bare_insert -- INBOX DB`.
//!
//! `-- INBOX DB records` writes the same rows in the shape of slopewarden's
//! `records` table instead (33 columns, the unique index on the record id,
//! 32 rows a statement, as the store writes them), with placeholder
//! diagnostics and nothing computed: what the row shape alone costs.

use std::path::PathBuf;
use std::time::Instant;

fn main() {
    let args: Vec<String> = std::env::args()
        .skip(1)
        .filter(|a| a != "--bench")
        .collect();
    let (Some(inbox), Some(db)) = (args.first(), args.get(1)) else {
        eprintln!("usage: bare_insert INBOX DB [records] (run through benches/ingest.sh)");
        return;
    };
    let records_shape = args.get(2).is_some_and(|a| a == "records");
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
    if records_shape {
        return records(&mut conn, &files);
    }
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
    print_rate("bare_insert", files.len(), rows, start);
}

/// The line benches/ingest.sh reads.
fn print_rate(what: &str, files: usize, rows: u64, start: Instant) {
    let secs = start.elapsed().as_secs_f64();
    println!(
        "{what} files={files} rows={rows} seconds={secs:.3} rows_per_s={:.0}",
        rows as f64 / secs
    );
}

/// The columns of slopewarden's `records` table as its store inserts them.
const RECORD_COLUMNS: usize = 33;
const CHUNK: usize = 32;

/// The same rows as `records` rows of a store created by slopewarden's
/// migrations: ids assigned here, x and y parsed, the raw line kept, eleven
/// placeholder diagnostics; references are not checked (as in a release
/// build of slopewarden).
fn records(conn: &mut rusqlite::Connection, files: &[PathBuf]) {
    // References unchecked, as a release build of slopewarden writes them
    // (rusqlite's bundled SQLite checks them by default).
    conn.pragma_update(None, "foreign_keys", "OFF")
        .unwrap_or_else(|e| panic!("{e}"));
    // The store's own schema, so that the shape follows its migrations.
    for sql in [
        include_str!("../migrations/0001_initial.sql"),
        include_str!("../migrations/0002_findings.sql"),
        include_str!("../migrations/0003_verdicts.sql"),
    ] {
        conn.execute_batch(sql).unwrap_or_else(|e| panic!("{e}"));
    }
    let group = format!("({})", vec!["?"; RECORD_COLUMNS].join(", "));
    let head = "INSERT INTO records (id, record_id, version, status, series_id, x, y,
        censored, in_fit, fit_x, fit_y, unit, unit_as_written, sampled_at, note, attributes,
        file_id, line, raw, prev_in_series, joined_fit, leverage, standardized_residual,
        studentized_residual, cooks_distance, dffits, dfbetas_intercept, dfbetas_slope,
        covariance_ratio, prediction_t, slope_without, slope_p_without, undefined) VALUES ";
    let many = format!("{head}{}", vec![group.as_str(); CHUNK].join(", "));
    let one = format!("{head}{group}");
    let start = Instant::now();
    let mut id = 0i64;
    let mut series: std::collections::HashMap<String, i64> = std::collections::HashMap::new();
    for (file_no, f) in files.iter().enumerate() {
        let text = std::fs::read_to_string(f).unwrap_or_else(|e| panic!("{e}"));
        let tx = conn.transaction().unwrap_or_else(|e| panic!("{e}"));
        {
            let mut stmt_many = tx.prepare_cached(&many).unwrap_or_else(|e| panic!("{e}"));
            let mut stmt_one = tx.prepare_cached(&one).unwrap_or_else(|e| panic!("{e}"));
            let lines: Vec<(usize, &str)> = text.lines().enumerate().skip(1).collect();
            let full = lines.len() / CHUNK * CHUNK;
            for (k, &(line_no, line)) in lines.iter().enumerate() {
                let g: Vec<&str> = line.split(',').collect();
                let field = |i: usize| g.get(i).copied().unwrap_or("");
                let next = series.len() as i64 + 1;
                let series_id = *series.entry(field(1).to_string()).or_insert(next);
                id += 1;
                let x: f64 = field(2).parse().unwrap_or(0.0);
                let y: f64 = field(3).parse().unwrap_or(0.0);
                let d = id as f64 * 1e-7;
                let (stmt, at) = if k < full {
                    (&mut stmt_many, (k % CHUNK) * RECORD_COLUMNS)
                } else {
                    (&mut stmt_one, 0)
                };
                let t = |c: usize| at + c;
                let bound = (|| -> rusqlite::Result<()> {
                    stmt.raw_bind_parameter(t(1), id)?;
                    stmt.raw_bind_parameter(t(2), field(0))?;
                    stmt.raw_bind_parameter(t(3), 1)?;
                    stmt.raw_bind_parameter(t(4), "current")?;
                    stmt.raw_bind_parameter(t(5), series_id)?;
                    stmt.raw_bind_parameter(t(6), x)?;
                    stmt.raw_bind_parameter(t(7), y)?;
                    stmt.raw_bind_parameter(t(8), 0)?;
                    stmt.raw_bind_parameter(t(9), 1)?;
                    stmt.raw_bind_parameter(t(10), x)?;
                    stmt.raw_bind_parameter(t(11), y)?;
                    stmt.raw_bind_parameter(t(12), field(4))?;
                    stmt.raw_bind_parameter(t(13), field(4))?;
                    stmt.raw_bind_parameter(t(14), field(5))?;
                    stmt.raw_bind_parameter(t(15), Option::<&str>::None)?;
                    stmt.raw_bind_parameter(t(16), Option::<&str>::None)?;
                    stmt.raw_bind_parameter(t(17), file_no as i64 + 1)?;
                    stmt.raw_bind_parameter(t(18), line_no as i64 + 1)?;
                    stmt.raw_bind_parameter(t(19), line)?;
                    stmt.raw_bind_parameter(t(20), id - 1)?;
                    stmt.raw_bind_parameter(t(21), 2)?;
                    for c in 22..=32 {
                        stmt.raw_bind_parameter(t(c), d * c as f64)?;
                    }
                    stmt.raw_bind_parameter(t(33), Option::<&str>::None)?;
                    if k >= full || k % CHUNK == CHUNK - 1 {
                        stmt.raw_execute()?;
                    }
                    Ok(())
                })();
                bound.unwrap_or_else(|e| panic!("{e}"));
            }
        }
        tx.commit().unwrap_or_else(|e| panic!("{e}"));
    }
    print_rate("records_shape", files.len(), id as u64, start);
}
