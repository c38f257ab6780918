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
//! `-- INBOX DB floor` writes the fewest rows the store's requirements
//! allow, with placeholder values and nothing computed: per file, a source
//! file row, one audit entry, each record with its provenance (file, line,
//! raw text), version, censoring flag and its own diagnostics on arrival
//! (leverage, studentized residual, Cook's distance, DFFITS, both DFBETAS,
//! the slope without it), and one fit row per touched series (n, the fit's
//! statistics, the robust slope with its interval, Mann-Kendall). Whatever
//! this takes is spent before anything is parsed, validated or computed.
//! `-- INBOX DB packed` writes the same content as `floor` in a
//! hypothetical packed layout: a file's records of one series in one row,
//! their columns as arrays, and a narrow row per record id under the
//! unique key, to find a record by its id: what storing records in batches
//! would save.

use std::path::{Path, PathBuf};
use std::time::Instant;

fn main() {
    let args: Vec<String> = std::env::args()
        .skip(1)
        .filter(|a| a != "--bench")
        .collect();
    let (Some(inbox), Some(db)) = (args.first(), args.get(1)) else {
        eprintln!(
            "usage: bare_insert INBOX DB [records|lean|floor|packed] (run through benches/ingest.sh)"
        );
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
    if shape == Some("floor") {
        return floor(&mut conn, &files);
    }
    if shape == Some("packed") {
        return packed(&mut conn, &files);
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
    use rusqlite::types::ValueRef;
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
    let rows_of = Chunked::new(table, columns);
    let start = Instant::now();
    let mut id = 0i64;
    let mut series: std::collections::HashMap<String, i64> = std::collections::HashMap::new();
    for (file_no, f) in files.iter().enumerate() {
        let text = std::fs::read_to_string(f).unwrap_or_else(|e| panic!("{e}"));
        let tx = conn.transaction().unwrap_or_else(|e| panic!("{e}"));
        let mut rows: Vec<ValueRef<'_>> = Vec::new();
        for (line_no, line) in text.lines().enumerate().skip(1) {
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
            rows.extend(at_full.iter().map(|&f| values[f]));
        }
        rows_of.insert(&tx, &rows);
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

/// Rows of one table written `CHUNK` to a statement, as the store writes them
/// (`OR FAIL`, so SQLite keeps no statement journal; see the store's
/// `INSERT_RECORD_HEAD`).
struct Chunked {
    many: String,
    one: String,
    columns: usize,
}

impl Chunked {
    fn new(table: &str, columns: &[&str]) -> Chunked {
        let group = format!("({})", vec!["?"; columns.len()].join(", "));
        let head = format!(
            "INSERT OR FAIL INTO {table} ({}) VALUES ",
            columns.join(", ")
        );
        Chunked {
            many: format!("{head}{}", vec![group.as_str(); CHUNK].join(", ")),
            one: format!("{head}{group}"),
            columns: columns.len(),
        }
    }

    /// Inserts `rows` (each `columns` values long) in chunks, then singly.
    fn insert(&self, tx: &rusqlite::Transaction<'_>, rows: &[rusqlite::types::ValueRef<'_>]) {
        use rusqlite::types::ToSqlOutput;
        let n = rows.len() / self.columns;
        let full = n / CHUNK * CHUNK;
        let run = || -> rusqlite::Result<()> {
            let mut many = tx.prepare_cached(&self.many)?;
            for chunk in rows[..full * self.columns].chunks(CHUNK * self.columns) {
                for (i, v) in chunk.iter().enumerate() {
                    many.raw_bind_parameter(i + 1, ToSqlOutput::Borrowed(*v))?;
                }
                many.raw_execute()?;
            }
            let mut one = tx.prepare_cached(&self.one)?;
            for row in rows[full * self.columns..].chunks(self.columns) {
                for (i, v) in row.iter().enumerate() {
                    one.raw_bind_parameter(i + 1, ToSqlOutput::Borrowed(*v))?;
                }
                one.raw_execute()?;
            }
            Ok(())
        };
        run().unwrap_or_else(|e| panic!("{e}"));
    }
}

/// The per-file and per-series rows both `floor` and `packed` write: a
/// source file row, one fit row per touched series, one audit entry.
const FILE_FIT_AUDIT_TABLES: &str =
    "CREATE TABLE source_files (id INTEGER PRIMARY KEY, name TEXT NOT NULL,
        sha256 TEXT NOT NULL UNIQUE, size INTEGER NOT NULL, arrived_at TEXT NOT NULL,
        outcome TEXT NOT NULL);
     CREATE TABLE fits (id INTEGER PRIMARY KEY, series_id INTEGER NOT NULL,
        version INTEGER NOT NULL, trigger_file INTEGER NOT NULL, n INTEGER NOT NULL,
        slope REAL, intercept REAL, slope_se REAL, slope_p REAL, slope_ci_low REAL,
        slope_ci_high REAL, r_squared REAL, residual_sd REAL, theil_sen_slope REAL,
        theil_sen_ci_low REAL, theil_sen_ci_high REAL, mann_kendall_s INTEGER,
        mann_kendall_p REAL);
     CREATE TABLE audit_log (id INTEGER PRIMARY KEY, at TEXT NOT NULL, kind TEXT NOT NULL,
        subject TEXT NOT NULL, detail TEXT NOT NULL, prev_hash TEXT NOT NULL,
        hash TEXT NOT NULL);";

/// Writes a file's source file row, fit rows (placeholders, one per series
/// in `touched`) and audit entry into `tx`.
struct FileFitAudit {
    fits: Chunked,
    hash: String,
}

impl FileFitAudit {
    fn new() -> FileFitAudit {
        FileFitAudit {
            fits: Chunked::new(
                "fits",
                &[
                    "series_id",
                    "version",
                    "trigger_file",
                    "n",
                    "slope",
                    "intercept",
                    "slope_se",
                    "slope_p",
                    "slope_ci_low",
                    "slope_ci_high",
                    "r_squared",
                    "residual_sd",
                    "theil_sen_slope",
                    "theil_sen_ci_low",
                    "theil_sen_ci_high",
                    "mann_kendall_s",
                    "mann_kendall_p",
                ],
            ),
            hash: "0123456789abcdef".repeat(4),
        }
    }

    fn source_file(&self, tx: &rusqlite::Transaction<'_>, file_id: i64, f: &Path, size: usize) {
        tx.execute(
            "INSERT INTO source_files (id, name, sha256, size, arrived_at, outcome) \
             VALUES (?1, ?2, ?3, ?4, '2026-12-04T19:00:00Z', 'ingested')",
            rusqlite::params![
                file_id,
                f.to_string_lossy(),
                format!("{file_id:064}"),
                size as i64
            ],
        )
        .unwrap_or_else(|e| panic!("{e}"));
    }

    fn fits_and_audit(
        &self,
        tx: &rusqlite::Transaction<'_>,
        file_id: i64,
        f: &Path,
        touched: &[i64],
    ) {
        use rusqlite::types::ValueRef;
        let mut fits: Vec<ValueRef<'_>> = Vec::new();
        for &s in touched {
            let d = s as f64 * 1e-3 + file_id as f64;
            fits.extend_from_slice(&[
                ValueRef::Integer(s),
                ValueRef::Integer(file_id),
                ValueRef::Integer(file_id),
                ValueRef::Integer(file_id),
            ]);
            fits.extend((1..=11).map(|c| ValueRef::Real(d * c as f64)));
            fits.extend_from_slice(&[ValueRef::Integer(s), ValueRef::Real(d)]);
        }
        self.fits.insert(tx, &fits);
        tx.execute(
            "INSERT INTO audit_log (at, kind, subject, detail, prev_hash, hash) \
             VALUES ('2026-12-04T19:00:00Z', 'file_ingested', ?1, ?2, ?3, ?3)",
            rusqlite::params![f.to_string_lossy(), "ingested", self.hash],
        )
        .unwrap_or_else(|e| panic!("{e}"));
    }
}

/// A series id for each key, and the series a file touched, in order.
#[derive(Default)]
struct SeriesIds {
    ids: std::collections::HashMap<String, (i64, i64)>,
}

impl SeriesIds {
    /// The series id of `key`, noting it in `touched` the first time
    /// `file_id` meets it.
    fn of(&mut self, key: &str, file_id: i64, touched: &mut Vec<i64>) -> i64 {
        let next = self.ids.len() as i64 + 1;
        let entry = self
            .ids
            .entry(key.to_string())
            .or_insert((next, file_id - 1));
        if entry.1 != file_id {
            entry.1 = file_id;
            touched.push(entry.0);
        }
        entry.0
    }
}

/// The fewest rows the store's requirements allow (see the module notes),
/// placeholders for everything computed.
fn floor(conn: &mut rusqlite::Connection, files: &[PathBuf]) {
    use rusqlite::types::ValueRef;
    conn.execute_batch(FILE_FIT_AUDIT_TABLES)
        .unwrap_or_else(|e| panic!("{e}"));
    conn.execute_batch(
        "CREATE TABLE records (id INTEGER PRIMARY KEY, record_id TEXT NOT NULL,
            version INTEGER NOT NULL, series_id INTEGER NOT NULL, x REAL NOT NULL,
            y REAL NOT NULL, censored INTEGER NOT NULL, file_id INTEGER NOT NULL,
            line INTEGER NOT NULL, raw TEXT NOT NULL, leverage REAL,
            studentized_residual REAL, cooks_distance REAL, dffits REAL,
            dfbetas_intercept REAL, dfbetas_slope REAL, slope_without REAL,
            UNIQUE (record_id, version));",
    )
    .unwrap_or_else(|e| panic!("{e}"));
    let record_rows = Chunked::new(
        "records",
        &[
            "id",
            "record_id",
            "version",
            "series_id",
            "x",
            "y",
            "censored",
            "file_id",
            "line",
            "raw",
            "leverage",
            "studentized_residual",
            "cooks_distance",
            "dffits",
            "dfbetas_intercept",
            "dfbetas_slope",
            "slope_without",
        ],
    );
    let rest = FileFitAudit::new();
    let start = Instant::now();
    let mut id = 0i64;
    let mut series = SeriesIds::default();
    for (file_no, f) in files.iter().enumerate() {
        let text = std::fs::read_to_string(f).unwrap_or_else(|e| panic!("{e}"));
        let file_id = file_no as i64 + 1;
        let tx = conn.transaction().unwrap_or_else(|e| panic!("{e}"));
        rest.source_file(&tx, file_id, f, text.len());
        let mut rows: Vec<ValueRef<'_>> = Vec::new();
        let mut touched: Vec<i64> = Vec::new();
        for (line_no, line) in text.lines().enumerate().skip(1) {
            let g: Vec<&str> = line.split(',').collect();
            let field = |i: usize| g.get(i).copied().unwrap_or("");
            let series_id = series.of(field(1), file_id, &mut touched);
            id += 1;
            let number = |i: usize| field(i).parse().unwrap_or(0.0);
            let d = id as f64 * 1e-7;
            rows.extend_from_slice(&[
                ValueRef::Integer(id),
                ValueRef::Text(field(0).as_bytes()),
                ValueRef::Integer(1),
                ValueRef::Integer(series_id),
                ValueRef::Real(number(2)),
                ValueRef::Real(number(3)),
                ValueRef::Integer(0),
                ValueRef::Integer(file_id),
                ValueRef::Integer(line_no as i64 + 1),
                ValueRef::Text(line.as_bytes()),
            ]);
            rows.extend((1..=7).map(|c| ValueRef::Real(d * c as f64)));
        }
        record_rows.insert(&tx, &rows);
        rest.fits_and_audit(&tx, file_id, f, &touched);
        tx.commit().unwrap_or_else(|e| panic!("{e}"));
    }
    print_rate("required_floor", files.len(), id as u64, start);
}

/// The same content as `floor` in a hypothetical packed layout (not the
/// store's schema): a file's records of one series in one row, their
/// columns as arrays (ids and raw lines as newline-joined text; lines,
/// x, y, censoring and the seven diagnostics as little-endian blobs),
/// and one narrow row per record id, under the unique key (record id,
/// version), to find a record by its id. What a record would cost if it
/// were stored in batches.
fn packed(conn: &mut rusqlite::Connection, files: &[PathBuf]) {
    conn.execute_batch(FILE_FIT_AUDIT_TABLES)
        .unwrap_or_else(|e| panic!("{e}"));
    conn.execute_batch(
        "CREATE TABLE record_batches (id INTEGER PRIMARY KEY, file_id INTEGER NOT NULL,
            series_id INTEGER NOT NULL, count INTEGER NOT NULL, record_ids TEXT NOT NULL,
            lines BLOB NOT NULL, x BLOB NOT NULL, y BLOB NOT NULL, censored BLOB NOT NULL,
            raw TEXT NOT NULL, diagnostics BLOB NOT NULL);
         CREATE TABLE record_keys (record_id TEXT NOT NULL, version INTEGER NOT NULL,
            batch INTEGER NOT NULL, slot INTEGER NOT NULL,
            PRIMARY KEY (record_id, version)) WITHOUT ROWID;",
    )
    .unwrap_or_else(|e| panic!("{e}"));
    let keys = Chunked::new("record_keys", &["record_id", "version", "batch", "slot"]);
    #[derive(Default)]
    struct Batch {
        series_id: i64,
        ids: String,
        lines: Vec<u8>,
        x: Vec<u8>,
        y: Vec<u8>,
        censored: Vec<u8>,
        raw: String,
        diagnostics: Vec<u8>,
        count: i64,
    }
    let rest = FileFitAudit::new();
    let start = Instant::now();
    let mut id = 0i64;
    let mut batch_id = 0i64;
    let mut series = SeriesIds::default();
    for (file_no, f) in files.iter().enumerate() {
        use rusqlite::types::ValueRef;
        let text = std::fs::read_to_string(f).unwrap_or_else(|e| panic!("{e}"));
        let file_id = file_no as i64 + 1;
        let tx = conn.transaction().unwrap_or_else(|e| panic!("{e}"));
        rest.source_file(&tx, file_id, f, text.len());
        let mut touched: Vec<i64> = Vec::new();
        let mut batches: Vec<Batch> = Vec::new();
        let mut slot_of: std::collections::HashMap<i64, usize> = Default::default();
        let mut key_rows: Vec<ValueRef<'_>> = Vec::new();
        for (line_no, line) in text.lines().enumerate().skip(1) {
            let g: Vec<&str> = line.split(',').collect();
            let field = |i: usize| g.get(i).copied().unwrap_or("");
            let series_id = series.of(field(1), file_id, &mut touched);
            id += 1;
            let number = |i: usize| field(i).parse::<f64>().unwrap_or(0.0);
            let d = id as f64 * 1e-7;
            let at = *slot_of.entry(series_id).or_insert_with(|| {
                batches.push(Batch {
                    series_id,
                    ..Batch::default()
                });
                batches.len() - 1
            });
            let b = &mut batches[at];
            b.ids.push_str(field(0));
            b.ids.push('\n');
            b.lines
                .extend_from_slice(&(line_no as u32 + 1).to_le_bytes());
            b.x.extend_from_slice(&number(2).to_le_bytes());
            b.y.extend_from_slice(&number(3).to_le_bytes());
            b.censored.push(0);
            b.raw.push_str(line);
            b.raw.push('\n');
            for c in 1..=7 {
                b.diagnostics
                    .extend_from_slice(&(d * c as f64).to_le_bytes());
            }
            key_rows.extend_from_slice(&[
                ValueRef::Text(field(0).as_bytes()),
                ValueRef::Integer(1),
                ValueRef::Integer(batch_id + 1 + at as i64),
                ValueRef::Integer(b.count),
            ]);
            b.count += 1;
        }
        {
            let mut insert = tx
                .prepare_cached(
                    "INSERT INTO record_batches (id, file_id, series_id, count, record_ids, \
                     lines, x, y, censored, raw, diagnostics) \
                     VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11)",
                )
                .unwrap_or_else(|e| panic!("{e}"));
            for b in &batches {
                batch_id += 1;
                insert
                    .execute(rusqlite::params![
                        batch_id,
                        file_id,
                        b.series_id,
                        b.count,
                        b.ids,
                        b.lines,
                        b.x,
                        b.y,
                        b.censored,
                        b.raw,
                        b.diagnostics
                    ])
                    .unwrap_or_else(|e| panic!("{e}"));
            }
        }
        keys.insert(&tx, &key_rows);
        rest.fits_and_audit(&tx, file_id, f, &touched);
        tx.commit().unwrap_or_else(|e| panic!("{e}"));
    }
    print_rate("packed_floor", files.len(), id as u64, start);
}
