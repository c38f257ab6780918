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
//! `-- INBOX DB lean` writes them in a hypothetical narrow shape (16 columns:
//! no diagnostics, no raw line, the same unique index): what a record would
//! cost if its diagnostics were recomputed from the fit it joined.

use std::path::PathBuf;
use std::time::Instant;

fn main() {
    let args: Vec<String> = std::env::args()
        .skip(1)
        .filter(|a| a != "--bench")
        .collect();
    let (Some(inbox), Some(db)) = (args.first(), args.get(1)) else {
        eprintln!("usage: bare_insert INBOX DB [records|lean] (run through benches/ingest.sh)");
        return;
    };
    let shape = args.get(2).map(String::as_str);
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
    if let Some(shape @ ("records" | "lean")) = shape {
        return records(&mut conn, &files, shape == "lean");
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
const RECORD_COLUMNS: [&str; 33] = [
    "id",
    "record_id",
    "version",
    "status",
    "series_id",
    "x",
    "y",
    "censored",
    "in_fit",
    "fit_x",
    "fit_y",
    "unit",
    "unit_as_written",
    "sampled_at",
    "note",
    "attributes",
    "file_id",
    "line",
    "raw",
    "prev_in_series",
    "joined_fit",
    "leverage",
    "standardized_residual",
    "studentized_residual",
    "cooks_distance",
    "dffits",
    "dfbetas_intercept",
    "dfbetas_slope",
    "covariance_ratio",
    "prediction_t",
    "slope_without",
    "slope_p_without",
    "undefined",
];

/// A hypothetical narrow record row (not the store's schema): what a record
/// would cost if its diagnostics were recomputed from the fit it joined and
/// its raw line were not kept, with the same unique index on the record id.
const LEAN_COLUMNS: [&str; 16] = [
    "id",
    "record_id",
    "version",
    "status",
    "series_id",
    "x",
    "y",
    "censored",
    "in_fit",
    "unit",
    "sampled_at",
    "note",
    "file_id",
    "line",
    "prev_in_series",
    "joined_fit",
];
const CHUNK: usize = 32;

/// The same rows as `records` rows, ids assigned here, x and y parsed, the
/// raw line kept, eleven placeholder diagnostics, references not checked (as
/// in a release build of slopewarden). `lean`: the same rows with only
/// [`LEAN_COLUMNS`] kept, in a table of that shape.
fn records(conn: &mut rusqlite::Connection, files: &[PathBuf], lean: bool) {
    use rusqlite::types::{ToSqlOutput, ValueRef};
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
    let (table, columns): (&str, &[&str]) = if lean {
        conn.execute_batch(
            "CREATE TABLE records_lean (id INTEGER PRIMARY KEY, record_id TEXT NOT NULL,
                version INTEGER NOT NULL, status TEXT NOT NULL, series_id INTEGER NOT NULL,
                x REAL NOT NULL, y REAL NOT NULL, censored INTEGER NOT NULL, in_fit INTEGER NOT NULL,
                unit TEXT, sampled_at TEXT, note TEXT, file_id INTEGER NOT NULL,
                line INTEGER NOT NULL, prev_in_series INTEGER, joined_fit INTEGER,
                UNIQUE (record_id, version))",
        )
        .unwrap_or_else(|e| panic!("{e}"));
        ("records_lean", &LEAN_COLUMNS)
    } else {
        ("records", &RECORD_COLUMNS)
    };
    // Where each kept column sits among the store's 33.
    let at_full: Vec<usize> = columns
        .iter()
        .map(|c| {
            RECORD_COLUMNS
                .iter()
                .position(|f| f == c)
                .unwrap_or_else(|| panic!("{c}"))
        })
        .collect();
    let group = format!("({})", vec!["?"; columns.len()].join(", "));
    let head = format!("INSERT INTO {table} ({}) VALUES ", columns.join(", "));
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
                let field = |i: usize| g.get(i).copied().unwrap_or("").as_bytes();
                let next = series.len() as i64 + 1;
                let key = String::from_utf8_lossy(field(1)).into_owned();
                let series_id = *series.entry(key).or_insert(next);
                id += 1;
                let number = |i: usize| {
                    std::str::from_utf8(field(i))
                        .ok()
                        .and_then(|v| v.parse().ok())
                        .unwrap_or(0.0)
                };
                let (x, y): (f64, f64) = (number(2), number(3));
                let d = id as f64 * 1e-7;
                let mut values = [ValueRef::Null; 33];
                values[..21].copy_from_slice(&[
                    ValueRef::Integer(id),
                    ValueRef::Text(field(0)),
                    ValueRef::Integer(1),
                    ValueRef::Text(b"current"),
                    ValueRef::Integer(series_id),
                    ValueRef::Real(x),
                    ValueRef::Real(y),
                    ValueRef::Integer(0),
                    ValueRef::Integer(1),
                    ValueRef::Real(x),
                    ValueRef::Real(y),
                    ValueRef::Text(field(4)),
                    ValueRef::Text(field(4)),
                    ValueRef::Text(field(5)),
                    ValueRef::Null,
                    ValueRef::Null,
                    ValueRef::Integer(file_no as i64 + 1),
                    ValueRef::Integer(line_no as i64 + 1),
                    ValueRef::Text(line.as_bytes()),
                    ValueRef::Integer(id - 1),
                    ValueRef::Integer(2),
                ]);
                for (c, v) in values.iter_mut().enumerate().take(32).skip(21) {
                    *v = ValueRef::Real(d * c as f64);
                }
                let (stmt, at) = if k < full {
                    (&mut stmt_many, (k % CHUNK) * columns.len())
                } else {
                    (&mut stmt_one, 0)
                };
                let bound = (|| -> rusqlite::Result<()> {
                    for (c, &f) in at_full.iter().enumerate() {
                        stmt.raw_bind_parameter(at + c + 1, ToSqlOutput::Borrowed(values[f]))?;
                    }
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
    print_rate(
        if lean {
            "records_lean"
        } else {
            "records_shape"
        },
        files.len(),
        id as u64,
        start,
    );
}
