//! Record and fit rows queued by the computing thread and written in
//! multi-row INSERTs with their values bound in place, each encoded once
//! for its file's seal.

use super::*;

/// Columns of a record row, in the order [`record_columns`] gives them.
///
/// `OR FAIL` (here and in [`INSERT_FIT_HEAD`]): a multi-row INSERT that may
/// abort on a constraint makes SQLite copy every page it touches into a
/// statement journal first, to undo just that statement; with 16 KiB pages
/// that was some 2 % of a large ingest (perf: `subjournalPageIfRequired`,
/// `memjrnlWrite`). Nothing here undoes one statement and goes on: any
/// failed write poisons the file's transaction, which is rolled back whole
/// (`store::behind`), so the rows a failed statement leaves go with it.
pub(super) const INSERT_RECORD_HEAD: &str =
    "INSERT OR FAIL INTO records (id, record_id, version, status, series_id, x, y,
    censored, in_fit, fit_x, fit_y, unit, unit_as_written, sampled_at, note, attributes, file_id,
    line, raw, prev_in_series, joined_fit, leverage, standardized_residual, studentized_residual,
    cooks_distance, dffits, dfbetas_intercept, dfbetas_slope, covariance_ratio, prediction_t,
    slope_without, slope_p_without, undefined) VALUES ";
pub(super) const RECORD_COLUMNS: usize = 33;
/// Records per multi-row INSERT: per-statement overhead dominates small
/// inserts, and 32 × 33 parameters stay far below SQLite's limit.
pub(super) const RECORD_CHUNK: usize = 32;
/// Multi-row statements per batch handed to a writing thread.
pub(super) const HAND_STATEMENTS: usize = 8;

/// `head` followed by `rows` groups of `columns` placeholders.
pub(super) fn multi_row_insert(head: &str, columns: usize, rows: usize) -> String {
    let group = format!("({})", vec!["?"; columns].join(", "));
    format!("{head}{}", vec![group.as_str(); rows].join(", "))
}

/// The tables written with multi-row INSERTs bound in place.
#[derive(Debug, Clone, Copy)]
pub(super) enum BulkTable {
    Records,
    Fits,
}

impl BulkTable {
    /// Rows per multi-row statement, and columns per row.
    pub(super) fn shape(self) -> (usize, usize) {
        match self {
            BulkTable::Records => (RECORD_CHUNK, RECORD_COLUMNS),
            BulkTable::Fits => (FIT_CHUNK, FIT_COLUMNS),
        }
    }

    pub(super) fn head(self) -> &'static str {
        match self {
            BulkTable::Records => INSERT_RECORD_HEAD,
            BulkTable::Fits => INSERT_FIT_HEAD,
        }
    }
}

/// The ids SQLite gives the next record row and fit row inserted without
/// one: each table's highest id + 1.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub(super) struct NextRowIds {
    pub(super) records: i64,
    pub(super) fits: i64,
}

/// How a row's id reaches the table.
///
/// Rows are queued with the ids handed out by [`IdCounters`], which start
/// at the table's highest id + 1, so rows written in the order queued
/// usually continue the table's ids one by one: those go without their id
/// (`Given::BySqlite`), and SQLite gives each the next one, the same. An
/// INSERT naming the id makes SQLite check that no row has it (a b-tree
/// search per row), and, as the id could fail to be an integer part way
/// through a multi-row INSERT, keep a statement journal of every page the
/// statement touches: together 0.2-0.4 s of the writing thread's 3.1 s on
/// the 1,000,000-record backlog (`benches/threads.py`, three alternated
/// runs). Rows that do not continue the table's ids (after a proposed
/// version was written ahead of rows queued before it) name their ids.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(super) enum Given {
    /// The INSERT names the id.
    Named,
    /// The INSERT leaves the id to SQLite, which gives the next one.
    BySqlite,
}

/// A connection's prepared [`BulkTable`] statements: for each table and
/// way of giving ids, one of a whole chunk of rows and one of a single row,
/// prepared when first needed and finalized with the [`Store`].
#[derive(Debug, Default)]
pub(super) struct BulkStatements {
    pub(super) records: [Option<bulk::BulkStatement>; 4],
    pub(super) fits: [Option<bulk::BulkStatement>; 4],
}

impl BulkStatements {
    /// `table`'s statement for a whole chunk of rows (`whole_chunk`) or
    /// for one row, with ids `given` as said.
    pub(super) fn get(
        &mut self,
        conn: &Connection,
        table: BulkTable,
        given: Given,
        whole_chunk: bool,
    ) -> rusqlite::Result<&mut bulk::BulkStatement> {
        let (chunk, columns) = table.shape();
        let slots = match table {
            BulkTable::Records => &mut self.records,
            BulkTable::Fits => &mut self.fits,
        };
        let at = usize::from(whole_chunk) + 2 * usize::from(given == Given::BySqlite);
        let slot = &mut slots[at];
        let rows = if whole_chunk { chunk } else { 1 };
        if slot.is_none() {
            let sql = match given {
                Given::Named => multi_row_insert(table.head(), columns, rows),
                Given::BySqlite => {
                    multi_row_insert(&table.head().replacen("(id, ", "(", 1), columns - 1, rows)
                }
            };
            *slot = Some(bulk::BulkStatement::prepare(conn, &sql)?);
        }
        match slot {
            Some(stmt) => Ok(stmt),
            None => unreachable!("BUG: prepared just above"),
        }
    }
}

/// A record's own diagnostics in the fit it joined, as stored.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(super) struct DiagnosticsRow {
    pub(super) joined_fit: i64,
    pub(super) leverage: Option<f64>,
    pub(super) standardized: Option<f64>,
    pub(super) studentized: Option<f64>,
    pub(super) cooks: Option<f64>,
    pub(super) dffits: Option<f64>,
    pub(super) dfbetas_intercept: Option<f64>,
    pub(super) dfbetas_slope: Option<f64>,
    pub(super) covariance_ratio: Option<f64>,
    pub(super) prediction_t: Option<f64>,
    pub(super) slope_without: Option<f64>,
    pub(super) slope_p_without: Option<f64>,
    pub(super) undefined: Option<&'static str>,
}

impl DiagnosticsRow {
    pub(super) fn of(joined: Joined<'_>) -> Self {
        let Joined {
            arrival: a,
            fit_version: joined_fit,
            slope_p_without,
        } = joined;
        let inf = a.influence.as_ref();
        DiagnosticsRow {
            joined_fit,
            leverage: inf.map(|p| p.leverage()),
            standardized: inf.and_then(|p| p.standardized_residual()),
            studentized: inf.and_then(|p| p.studentized_residual()),
            cooks: inf.and_then(|p| p.cooks_distance()),
            dffits: inf.and_then(|p| p.dffits()),
            dfbetas_intercept: inf.and_then(|p| p.dfbetas_intercept()),
            dfbetas_slope: inf.and_then(|p| p.dfbetas_slope()),
            covariance_ratio: inf.and_then(|p| p.covariance_ratio()),
            prediction_t: a.prediction.and_then(|p| p.t),
            slope_without: a.slope_without(),
            slope_p_without: slope_p_without.unwrap_or_else(|| a.slope_p_without()),
            undefined: inf.and_then(|p| p.undefined()).map(|u| u.explain()),
        }
    }
}

/// A record row waiting in a [`RecordBatch`]: the record is its batch's
/// `source[index]`.
#[derive(Debug)]
pub(super) struct PendingRecord {
    pub(super) id: i64,
    pub(super) index: usize,
    pub(super) version: i64,
    pub(super) status: RecordStatus,
    pub(super) series: i64,
    pub(super) file: i64,
    pub(super) fit_point: Option<(f64, f64)>,
    pub(super) diagnostics: Option<DiagnosticsRow>,
    pub(super) prev_in_series: Option<i64>,
    /// The record's attributes as the JSON text stored (None: none).
    pub(super) attributes: Option<String>,
}

/// The row ids a writer hands out for records and fits, shared by a
/// transaction and whoever queues its rows: the ids are taken in the order
/// rows are queued, whichever thread writes them.
#[derive(Debug, Default)]
pub struct IdCounters {
    pub(super) records: AtomicI64,
    pub(super) fits: AtomicI64,
}

impl IdCounters {
    /// The next record row id, taken.
    pub fn record(&self) -> i64 {
        self.records.fetch_add(1, Ordering::Relaxed)
    }

    /// The next fit row id, taken.
    pub fn fit(&self) -> i64 {
        self.fits.fetch_add(1, Ordering::Relaxed)
    }

    /// The next record and fit row ids, not taken.
    pub fn next(&self) -> (i64, i64) {
        (
            self.records.load(Ordering::Relaxed),
            self.fits.load(Ordering::Relaxed),
        )
    }

    /// Counters whose next ids are `next` (records, fits): for the rows of
    /// a transaction that is to follow the current one.
    pub fn starting_at(next: (i64, i64)) -> Arc<IdCounters> {
        Arc::new(IdCounters {
            records: AtomicI64::new(next.0),
            fits: AtomicI64::new(next.1),
        })
    }
}

/// A record's attributes as the JSON object stored in `attributes`.
pub(super) fn attributes_json(r: &Record) -> Option<String> {
    if r.attributes.is_empty() {
        return None;
    }
    let map: serde_json::Map<String, serde_json::Value> = r
        .attributes
        .iter()
        .map(|(k, v)| (k.clone(), serde_json::Value::String(v.clone())))
        .collect();
    Some(serde_json::Value::Object(map).to_string())
}

/// Records queued for multi-row inserts within one transaction, taken
/// from `source` (shared, so that a batch can be written on another
/// thread). Dropping a batch with rows still queued loses them, so the
/// file's transaction flushes it before commit ([`Tx::flush_records`]).
#[derive(Debug)]
pub struct RecordBatch {
    pub(super) source: Arc<Vec<Record>>,
    pub(super) rows: Vec<PendingRecord>,
    /// The rows encoded for their file's seal ahead of the write
    /// ([`RecordBatch::encode_seal`]), with the file they belong to.
    pub(super) encoded: Option<(i64, seal::SealRows)>,
}

impl RecordBatch {
    /// An empty batch of records from `source`.
    pub fn new(source: Arc<Vec<Record>>) -> Self {
        RecordBatch {
            source,
            rows: Vec::with_capacity(HAND_STATEMENTS * RECORD_CHUNK),
            encoded: None,
        }
    }

    /// Rows still queued.
    pub fn len(&self) -> usize {
        self.rows.len()
    }

    /// Whether nothing is queued.
    pub fn is_empty(&self) -> bool {
        self.rows.is_empty()
    }

    /// Whether a multi-row statement's worth is queued (time to write).
    pub fn is_full(&self) -> bool {
        self.rows.len() >= RECORD_CHUNK
    }

    /// Whether enough is queued to hand to a writing thread: several whole
    /// statements (each hand-over wakes the thread, which costs more than
    /// a statement on a virtual machine), and no short remainder.
    pub fn is_worth_handing(&self) -> bool {
        self.rows.len() >= HAND_STATEMENTS * RECORD_CHUNK
    }

    /// The rows queued so far, leaving an empty batch of the same source.
    pub fn take(&mut self) -> RecordBatch {
        RecordBatch {
            source: Arc::clone(&self.source),
            // Sized for what is handed at once: growing a row at a time
            // moved the queued rows several times over (callgrind).
            rows: std::mem::replace(
                &mut self.rows,
                Vec::with_capacity(HAND_STATEMENTS * RECORD_CHUNK),
            ),
            encoded: None,
        }
    }

    /// Encodes the queued rows for their file's seal now, on the thread
    /// that queued them, so that the writing thread only binds them: the
    /// same bytes [`Tx::flush_records`] would encode (the same columns of
    /// the same values), appended to the file's by it. Rows of more than
    /// one file are left to the write. For a file small enough for its
    /// rows to be kept for its seal: a large one's are dropped past the
    /// budget, and encoded batches waiting for the writer would only add
    /// to its memory.
    pub fn encode_seal(&mut self) {
        let Some(file) = self.rows.first().map(|r| r.file) else {
            return;
        };
        if self.encoded.is_some() || self.rows.iter().any(|r| r.file != file) {
            return;
        }
        let mut out = seal::SealRows::with_rows(self.rows.len());
        for r in &self.rows {
            seal_columns(&mut out, r.id, |put| {
                record_columns(&self.source[r.index], r, put)
            });
            out.expect_like_first();
        }
        self.encoded = Some((file, out));
    }

    /// Queues `source[index]` as version 1, the current version, of its id
    /// (the caller has checked with [`Tx::stored_ids`] that the id is new),
    /// and returns the row id it will have. Written by
    /// [`Tx::flush_records`].
    pub fn queue_current(
        &mut self,
        ids: &IdCounters,
        index: usize,
        series: SeriesRowId,
        file: FileId,
        placement: RecordPlacement<'_>,
        prev_in_series: Option<i64>,
    ) -> i64 {
        debug_assert!(
            index < self.source.len(),
            "BUG: record {index} is not in the batch's source"
        );
        let id = ids.record();
        // Worked out here, on the thread that queues: the writing thread is
        // the busier one while a file's rows are written.
        let attributes = attributes_json(&self.source[index]);
        self.rows.push(PendingRecord {
            id,
            index,
            version: 1,
            status: RecordStatus::Current,
            series: series.0,
            file: file.0,
            fit_point: placement.fit_point,
            diagnostics: placement.arrival.map(DiagnosticsRow::of),
            prev_in_series,
            attributes,
        });
        id
    }
}

pub(super) const INSERT_FIT_HEAD: &str = "INSERT OR FAIL INTO fits (id, series_id, version, trigger_file, created_at,
    transform, non_detects, n, n_censored, level, slope, intercept, slope_se, intercept_se, slope_t,
    slope_p, slope_ci_low, slope_ci_high, r_squared, residual_sd, df, theil_sen_slope,
    theil_sen_ci_low, theil_sen_ci_high, mann_kendall_s, mann_kendall_p, note, records, robust_n,
    origin, mean_x, mean_y, sxx, sxy, syy, sse, prev_fit, x_min, x_max, significant, window) VALUES ";
pub(super) const FIT_COLUMNS: usize = 41;
pub(super) const FIT_CHUNK: usize = 16;

/// A fit row waiting in a [`FitBatch`].
#[derive(Debug)]
pub(super) struct PendingFit {
    pub(super) id: i64,
    pub(super) series: i64,
    pub(super) version: i64,
    pub(super) trigger_file: Option<i64>,
    pub(super) created_at: String,
    pub(super) transform: String,
    pub(super) non_detects: String,
    pub(super) moments: MomentsParts,
    pub(super) censored: i64,
    pub(super) level: f64,
    pub(super) fit: Option<LineFit>,
    pub(super) robust: Option<RobustRow>,
    pub(super) note: Option<String>,
    pub(super) records: i64,
    pub(super) robust_n: i64,
    pub(super) prev_fit: Option<i64>,
    pub(super) x_span: Option<(f64, f64)>,
    pub(super) significant: bool,
    pub(super) window: Option<String>,
}

/// Fit rows queued for multi-row inserts within one transaction; flushed
/// before commit ([`Tx::flush_fits`]).
#[derive(Debug, Default)]
pub struct FitBatch {
    pub(super) rows: Vec<PendingFit>,
    /// The rows encoded for their file's seal ahead of the write.
    pub(super) encoded: Option<(i64, seal::SealRows)>,
}

impl FitBatch {
    /// An empty batch, with room for what is handed at once.
    pub fn new() -> Self {
        FitBatch {
            rows: Vec::with_capacity(HAND_STATEMENTS * FIT_CHUNK),
            encoded: None,
        }
    }

    /// Whether nothing is queued.
    pub fn is_empty(&self) -> bool {
        self.rows.is_empty()
    }

    /// Whether a multi-row statement's worth is queued (time to write).
    pub fn is_full(&self) -> bool {
        self.rows.len() >= FIT_CHUNK
    }

    /// As [`RecordBatch::is_worth_handing`].
    pub fn is_worth_handing(&self) -> bool {
        self.rows.len() >= HAND_STATEMENTS * FIT_CHUNK
    }

    /// The rows queued so far, leaving an empty batch.
    pub fn take(&mut self) -> FitBatch {
        std::mem::replace(self, FitBatch::new())
    }

    /// Encodes the queued rows for their file's seal now, on the thread
    /// that queued them (as [`RecordBatch::encode_seal`]). Rows of more
    /// than one file, or of none, are left to the write.
    pub fn encode_seal(&mut self) {
        let Some(Some(file)) = self.rows.first().map(|f| f.trigger_file) else {
            return;
        };
        if self.encoded.is_some() || self.rows.iter().any(|f| f.trigger_file != Some(file)) {
            return;
        }
        let mut out = seal::SealRows::with_rows(self.rows.len());
        for f in &self.rows {
            seal_columns(&mut out, f.id, |put| fit_columns(f, put));
            out.expect_like_first();
        }
        self.encoded = Some((file, out));
    }

    /// Queues a fit-history row with an id from `ids` and returns the id;
    /// written by [`Tx::flush_fits`].
    pub fn queue(&mut self, ids: &IdCounters, f: &NewFit<'_>) -> i64 {
        let id = ids.fit();
        let st = f.state;
        self.rows.push(PendingFit {
            id,
            series: st.id.0,
            version: st.fit_version,
            trigger_file: f.trigger_file.map(|id| id.0),
            created_at: f.created_at.to_string(),
            transform: f.transform.to_string(),
            non_detects: f.non_detects.to_string(),
            moments: st.moments.to_parts(),
            censored: st.censored,
            level: f.level,
            fit: f.fit.copied(),
            robust: f.robust,
            note: f.note.clone(),
            records: st.records,
            robust_n: st.robust_n,
            prev_fit: st.latest_fit,
            x_span: st.x_span,
            significant: st.significant,
            window: st.window.clone(),
        });
        id
    }
}

/// Where a row's columns go, one by one in the table's order: bound for
/// an insert ([`Values`]) or encoded for a seal ([`SealSink`]). The same
/// function gives both, so a seal encodes what was bound. Values borrow
/// from the row for `'a` ([`bulk::ToVal`]), and are bound in place.
pub(super) trait Sink<'a> {
    fn put<V: bulk::ToVal<'a> + seal::SealValue>(&mut self, v: V, goes: Goes);
}

/// Collects a row's values for an insert.
pub(super) struct Values<'a, 'v> {
    pub(super) out: &'v mut Vec<bulk::Val<'a>>,
    /// Whether the row's first column, its id, is left out (see [`Given`]).
    pub(super) without_id: bool,
}

impl<'a> Sink<'a> for Values<'a, '_> {
    fn put<V: bulk::ToVal<'a> + seal::SealValue>(&mut self, v: V, goes: Goes) {
        if std::mem::take(&mut self.without_id) {
            return;
        }
        if goes != Goes::Seal {
            self.out.push(v.to_val());
        }
    }
}

/// Encodes a row's columns for its seal.
pub(super) struct SealSink<'r> {
    pub(super) row: seal::SealRow<'r>,
}

impl<'a> Sink<'a> for SealSink<'_> {
    fn put<V: bulk::ToVal<'a> + seal::SealValue>(&mut self, v: V, goes: Goes) {
        if goes != Goes::Insert {
            self.row.put(&v);
        }
    }
}

/// Where a column's value goes.
#[derive(Clone, Copy, PartialEq, Eq)]
pub(super) enum Goes {
    /// Bound at insert and covered by the seal.
    Both,
    /// Bound at insert, left out of the seal (it changes by design later).
    Insert,
    /// Not bound at insert (NULL until something else sets it), but read
    /// by the seal's `SELECT *`.
    Seal,
}

/// Every column of a fit row once, in the table's order (what the seal's
/// `SELECT *` reads), with the columns the later migrations appended at
/// the end (`x_min`, `x_max`, `significant`, then `trigger_verdict`, then
/// `window`, `trigger_window`). `trigger_verdict` and `trigger_window` are
/// NULL at insert; only a verdict's or a window change's fit (which has no
/// trigger file) gets them set.
pub(super) fn fit_columns<'a>(row: &'a PendingFit, s: &mut impl Sink<'a>) {
    use Goes::{Both, Seal};
    let fit = row.fit.as_ref();
    let robust = row.robust;
    let m = &row.moments;
    let null: Option<i64> = None;
    s.put(row.id, Both);
    s.put(row.series, Both);
    s.put(row.version, Both);
    s.put(row.trigger_file, Both);
    s.put(&row.created_at, Both);
    s.put(&row.transform, Both);
    s.put(&row.non_detects, Both);
    s.put(m.n as i64, Both);
    s.put(row.censored, Both);
    s.put(row.level, Both);
    s.put(fit.map(|v| v.slope), Both);
    s.put(fit.map(|v| v.intercept), Both);
    s.put(fit.map(|v| v.slope_se), Both);
    s.put(fit.map(|v| v.intercept_se), Both);
    s.put(fit.and_then(|v| v.slope_t), Both);
    s.put(fit.and_then(|v| v.slope_p), Both);
    s.put(fit.map(|v| v.slope_ci_low), Both);
    s.put(fit.map(|v| v.slope_ci_high), Both);
    s.put(fit.and_then(|v| v.r_squared), Both);
    s.put(fit.map(|v| v.residual_sd), Both);
    s.put(fit.map(|v| v.df as i64), Both);
    s.put(robust.map(|r| r.slope), Both);
    s.put(robust.map(|r| r.ci_low), Both);
    s.put(robust.map(|r| r.ci_high), Both);
    s.put(robust.map(|r| r.mk_s), Both);
    s.put(robust.map(|r| r.mk_p), Both);
    s.put(&row.note, Both);
    s.put(row.records, Both);
    s.put(row.robust_n, Both);
    s.put(m.origin, Both);
    s.put(m.mean_x, Both);
    s.put(m.mean_y, Both);
    s.put(m.sxx, Both);
    s.put(m.sxy, Both);
    s.put(m.syy, Both);
    s.put(m.sse, Both);
    s.put(row.prev_fit, Both);
    s.put(row.x_span.map(|s| s.0), Both);
    s.put(row.x_span.map(|s| s.1), Both);
    s.put(row.significant, Both);
    s.put(null, Seal);
    s.put(&row.window, Both);
    s.put(null, Seal);
}

/// Every column of a record row once, in [`INSERT_RECORD_HEAD`] order,
/// which is [`seal::RECORD_COLUMNS`] order with `status` (left out of the
/// seal: a verdict changes it) in its place.
pub(super) fn record_columns<'a>(r: &'a Record, row: &'a PendingRecord, s: &mut impl Sink<'a>) {
    use Goes::{Both, Insert};
    let (fx, fy) = row.fit_point.unzip();
    let d = row.diagnostics.as_ref();
    s.put(row.id, Both);
    s.put(&r.record_id, Both);
    s.put(row.version, Both);
    s.put(row.status.as_str(), Insert);
    s.put(row.series, Both);
    s.put(r.x, Both);
    s.put(r.y.number(), Both);
    s.put(r.y.is_censored(), Both);
    s.put(row.fit_point.is_some(), Both);
    s.put(fx, Both);
    s.put(fy, Both);
    s.put(&r.unit, Both);
    s.put(&r.unit_as_written, Both);
    s.put(&r.sampled_at, Both);
    s.put(&r.note, Both);
    s.put(&row.attributes, Both);
    s.put(row.file, Both);
    s.put(r.line as i64, Both);
    s.put(&r.raw, Both);
    s.put(row.prev_in_series, Both);
    s.put(d.map(|d| d.joined_fit), Both);
    s.put(d.and_then(|d| d.leverage), Both);
    s.put(d.and_then(|d| d.standardized), Both);
    s.put(d.and_then(|d| d.studentized), Both);
    s.put(d.and_then(|d| d.cooks), Both);
    s.put(d.and_then(|d| d.dffits), Both);
    s.put(d.and_then(|d| d.dfbetas_intercept), Both);
    s.put(d.and_then(|d| d.dfbetas_slope), Both);
    s.put(d.and_then(|d| d.covariance_ratio), Both);
    s.put(d.and_then(|d| d.prediction_t), Both);
    s.put(d.and_then(|d| d.slope_without), Both);
    s.put(d.and_then(|d| d.slope_p_without), Both);
    s.put(d.and_then(|d| d.undefined), Both);
}

/// Encodes the columns `columns` gives for the seal, as row `id`.
pub(super) fn seal_columns(
    out: &mut seal::SealRows,
    id: i64,
    columns: impl FnOnce(&mut SealSink<'_>),
) {
    columns(&mut SealSink { row: out.row(id) });
}

/// A `source_files` row written by this transaction, as its columns stand
/// (`insert_file`, then `finish_file`), with the rows written for the file:
/// what its seal is computed from without reading the rows back.
#[derive(Debug)]
pub(super) struct WrittenFile {
    pub(super) id: i64,
    pub(super) name: String,
    pub(super) sha256: String,
    pub(super) size: i64,
    pub(super) arrived_at: String,
    pub(super) feed: String,
    pub(super) outcome: &'static str,
    pub(super) counts: [i64; 4],
    pub(super) detail: Option<String>,
    pub(super) rows: seal::FileRows,
}

impl WrittenFile {
    /// Its `source_files` row as a seal reads it back (`SELECT *`).
    pub(super) fn own_row(&self) -> seal::SealRows {
        let mut out = seal::SealRows::default();
        let [new, same, conflict, bad] = &self.counts;
        out.row(self.id)
            .put(&self.id)
            .put(&self.name)
            .put(&self.sha256)
            .put(&self.size)
            .put(&self.arrived_at)
            .put(&self.feed)
            .put(&self.outcome)
            .put(new)
            .put(same)
            .put(conflict)
            .put(bad)
            .put(&self.detail);
        out
    }
}
