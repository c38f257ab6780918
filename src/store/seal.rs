//! Seals: the SHA-256 of the rows an audit entry vouches for, written into
//! the entry's detail in the same transaction as the rows. The hash chain
//! protects the entries; a seal extends that protection to the rows
//! themselves, so that a record, fit, finding or verdict changed, added or
//! deleted behind the tool's back is caught by `slopewarden verify`.
//!
//! Columns that change by design later on (a record's `status` and
//! `excluded`, a finding's `status`, an outbox row's delivery state) are
//! left out of the seals; `verify` checks them against the verdict log.

use rusqlite::types::ValueRef;
use rusqlite::{Connection, ToSql};
use sha2::{Digest, Sha256};

/// A record's columns that never change after it is written.
pub(crate) const RECORD_COLUMNS: &str = "id, record_id, version, series_id, x, y, censored, in_fit, \
     fit_x, fit_y, unit, unit_as_written, sampled_at, note, attributes, file_id, line, raw, \
     prev_in_series, joined_fit, leverage, standardized_residual, studentized_residual, \
     cooks_distance, dffits, dfbetas_intercept, dfbetas_slope, covariance_ratio, prediction_t, \
     slope_without, slope_p_without, undefined";

/// A finding's columns that never change (all but `status`).
const FINDING_COLUMNS: &str = "id, created_at, series_id, file_id, record_row, record_ids, kinds, \
     severity, fit_version, fit_x, fit_y, summary, detail";

/// An outbox row's columns that never change (all but the delivery state).
const OUTBOX_COLUMNS: &str = "id, finding_id, recipient, message_id, subject, body_text, body_html, chart, chart_cid, date_unix";

/// What a seal covers, as written in an audit entry: `[seal file:12 <hex>]`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SealScope {
    /// A source file: its row, the records it brought, the fits it
    /// triggered and the rows refused from it.
    File(i64),
    /// A finding and its queued messages.
    Finding(i64),
    /// A verdict, the record version it stored and the fit it triggered.
    Verdict(i64),
    /// A change of a series' analysis window and the fit it triggered.
    Window(i64),
}

impl SealScope {
    fn label(self) -> String {
        match self {
            SealScope::File(id) => format!("file:{id}"),
            SealScope::Finding(id) => format!("finding:{id}"),
            SealScope::Verdict(id) => format!("verdict:{id}"),
            SealScope::Window(id) => format!("window:{id}"),
        }
    }

    fn parse(label: &str) -> Option<SealScope> {
        let (kind, id) = label.split_once(':')?;
        let id: i64 = id.parse().ok()?;
        match kind {
            "file" => Some(SealScope::File(id)),
            "finding" => Some(SealScope::Finding(id)),
            "verdict" => Some(SealScope::Verdict(id)),
            "window" => Some(SealScope::Window(id)),
            _ => None,
        }
    }
}

/// The text appended to an audit entry's detail.
pub fn seal_text(scope: SealScope, hash: &str) -> String {
    format!("[seal {} {hash}]", scope.label())
}

/// Every seal written in an audit entry's detail.
pub fn seals_in(detail: &str) -> Vec<(SealScope, String)> {
    let mut out = Vec::new();
    let mut rest = detail;
    while let Some(start) = rest.find("[seal ") {
        let after = &rest[start + 6..];
        let Some(end) = after.find(']') else {
            break;
        };
        let mut parts = after[..end].split(' ');
        if let (Some(label), Some(hash), None) = (parts.next(), parts.next(), parts.next())
            && let Some(scope) = SealScope::parse(label)
        {
            out.push((scope, hash.to_string()));
        }
        rest = &after[end..];
    }
    out
}

/// One part of a seal: the rows of one table that belong to a scope, in
/// row-id order. `one` selects them for a scope id (`?1`) among rows with
/// id ≥ `?2` (the first id of the transaction that wrote them, so that a
/// seal written at ingest reads a few rows, not the table); `all` selects
/// every row with the scope id first, for `verify`'s single pass.
struct Section {
    one: String,
    all: String,
    /// Which of the transaction's first ids bounds `one`.
    bound: Bound,
}

#[derive(Clone, Copy)]
enum Bound {
    None,
    Records,
    Fits,
    Outbox,
    Quarantined,
}

/// The first row ids a transaction can have written, per table.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct FirstIds {
    /// records.
    pub records: i64,
    /// fits.
    pub fits: i64,
    /// outbox.
    pub outbox: i64,
    /// quarantined_rows.
    pub quarantined: i64,
}

impl FirstIds {
    /// No bound: every row.
    pub const ALL: FirstIds = FirstIds {
        records: 0,
        fits: 0,
        outbox: 0,
        quarantined: 0,
    };

    /// The next ids of each table now (read at the start of a write
    /// transaction).
    pub fn next(conn: &Connection) -> rusqlite::Result<FirstIds> {
        conn.query_row(
            "SELECT (SELECT COALESCE(MAX(id), 0) + 1 FROM records),
                    (SELECT COALESCE(MAX(id), 0) + 1 FROM fits),
                    (SELECT COALESCE(MAX(id), 0) + 1 FROM outbox),
                    (SELECT COALESCE(MAX(id), 0) + 1 FROM quarantined_rows)",
            [],
            |r| {
                Ok(FirstIds {
                    records: r.get(0)?,
                    fits: r.get(1)?,
                    outbox: r.get(2)?,
                    quarantined: r.get(3)?,
                })
            },
        )
    }

    fn get(&self, b: Bound) -> i64 {
        match b {
            Bound::None => 0,
            Bound::Records => self.records,
            Bound::Fits => self.fits,
            Bound::Outbox => self.outbox,
            Bound::Quarantined => self.quarantined,
        }
    }
}

fn section(table: &str, columns: &str, key: &str, bound: Bound) -> Section {
    Section {
        one: format!("SELECT {columns} FROM {table} WHERE {key} = ?1 AND id >= ?2 ORDER BY id"),
        all: format!("SELECT {key}, {columns} FROM {table} WHERE {key} IS NOT NULL ORDER BY id"),
        bound,
    }
}

fn sections(kind: SealKind) -> Vec<Section> {
    match kind {
        SealKind::File => vec![
            section("source_files", "*", "id", Bound::None),
            Section {
                one: format!(
                    "SELECT {RECORD_COLUMNS} FROM records r WHERE file_id = ?1 AND id >= ?2
                     AND NOT EXISTS (SELECT 1 FROM verdicts v WHERE v.new_record_row = r.id)
                     ORDER BY id"
                ),
                all: format!(
                    "SELECT file_id, {RECORD_COLUMNS} FROM records r
                     WHERE NOT EXISTS (SELECT 1 FROM verdicts v WHERE v.new_record_row = r.id)
                     ORDER BY id"
                ),
                bound: Bound::Records,
            },
            section("fits", "*", "trigger_file", Bound::Fits),
            section("quarantined_rows", "*", "file_id", Bound::Quarantined),
        ],
        SealKind::Finding => vec![
            section("findings", FINDING_COLUMNS, "id", Bound::None),
            section("outbox", OUTBOX_COLUMNS, "finding_id", Bound::Outbox),
        ],
        SealKind::Verdict => vec![
            section("verdicts", "*", "id", Bound::None),
            Section {
                one: format!(
                    "SELECT {RECORD_COLUMNS} FROM records
                     WHERE id = (SELECT new_record_row FROM verdicts WHERE id = ?1) AND id >= ?2"
                ),
                all: format!(
                    "SELECT v.id, {} FROM records r JOIN verdicts v ON v.new_record_row = r.id ORDER BY r.id",
                    RECORD_COLUMNS
                        .split(", ")
                        .map(|c| format!("r.{}", c.trim()))
                        .collect::<Vec<_>>()
                        .join(", ")
                ),
                bound: Bound::Records,
            },
            section("fits", "*", "trigger_verdict", Bound::Fits),
        ],
        SealKind::Window => vec![
            section("series_windows", "*", "id", Bound::None),
            section("fits", "*", "trigger_window", Bound::Fits),
        ],
    }
}

/// The kinds of scope, for [`compute_all`].
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum SealKind {
    /// [`SealScope::File`].
    File,
    /// [`SealScope::Finding`].
    Finding,
    /// [`SealScope::Verdict`].
    Verdict,
    /// [`SealScope::Window`].
    Window,
}

impl SealScope {
    /// Its kind and id.
    pub fn parts(self) -> (SealKind, i64) {
        match self {
            SealScope::File(id) => (SealKind::File, id),
            SealScope::Finding(id) => (SealKind::Finding, id),
            SealScope::Verdict(id) => (SealKind::Verdict, id),
            SealScope::Window(id) => (SealKind::Window, id),
        }
    }
}

/// The seal of `scope` from the rows as they are now, reading only rows
/// with ids from `first` on (pass [`FirstIds::ALL`] outside the
/// transaction that wrote them).
pub fn compute(conn: &Connection, scope: SealScope, first: FirstIds) -> rusqlite::Result<String> {
    let (kind, id) = scope.parts();
    let mut h = Sha256::new();
    for s in sections(kind) {
        rows(&mut h, conn, &s.one, id, first.get(s.bound))?;
    }
    Ok(hex::encode(h.finalize()))
}

/// The seals of every scope of `kind` in `ids`, in one pass over each
/// table (what `verify` needs for a whole store).
pub fn compute_all(
    conn: &Connection,
    kind: SealKind,
    ids: &[i64],
) -> rusqlite::Result<std::collections::HashMap<i64, String>> {
    let mut hashers: std::collections::HashMap<i64, Sha256> =
        ids.iter().map(|&id| (id, Sha256::new())).collect();
    for s in sections(kind) {
        for h in hashers.values_mut() {
            h.update(b"Q");
        }
        let mut stmt = conn.prepare(&s.all)?;
        let columns = stmt.column_count();
        let mut q = stmt.query([])?;
        while let Some(row) = q.next()? {
            let key: i64 = row.get(0)?;
            if let Some(h) = hashers.get_mut(&key) {
                feed_row(h, row, 1, columns)?;
            }
        }
    }
    Ok(hashers
        .into_iter()
        .map(|(id, h)| (id, hex::encode(h.finalize())))
        .collect())
}

/// Feeds every row of a query to the hash: a tag and the value of each
/// column, lengths before text, so that no two different row sets hash
/// alike.
fn rows(h: &mut Sha256, conn: &Connection, sql: &str, id: i64, from: i64) -> rusqlite::Result<()> {
    let mut stmt = conn.prepare_cached(sql)?;
    let columns = stmt.column_count();
    let params: [&dyn ToSql; 2] = [&id, &from];
    let mut q = stmt.query(&params[..])?;
    h.update(b"Q");
    while let Some(row) = q.next()? {
        feed_row(h, row, 0, columns)?;
    }
    Ok(())
}

fn feed_row(
    h: &mut Sha256,
    row: &rusqlite::Row<'_>,
    from: usize,
    columns: usize,
) -> rusqlite::Result<()> {
    // One update per row: the hash's per-call overhead dominated when
    // each column was fed on its own.
    let mut buf: Vec<u8> = Vec::with_capacity(512);
    buf.push(ROW_TAG);
    for i in from..columns {
        encode_stored(&mut buf, row.get_ref(i)?);
    }
    h.update(&buf);
    Ok(())
}

/// What starts each row's bytes.
const ROW_TAG: u8 = b'R';
/// What starts each section (one table's rows) of a seal.
const SECTION_TAG: &[u8] = b"Q";

/// A value as SQLite gives it back, as a seal encodes it: a type tag, then
/// the integer or the double's bits (little-endian), or the length and the
/// bytes of a text or blob.
fn encode_stored(buf: &mut Vec<u8>, v: ValueRef<'_>) {
    match v {
        ValueRef::Null => buf.push(b'N'),
        ValueRef::Integer(v) => {
            buf.push(b'I');
            buf.extend_from_slice(&v.to_le_bytes());
        }
        ValueRef::Real(v) => {
            buf.push(b'F');
            buf.extend_from_slice(&v.to_bits().to_le_bytes());
        }
        ValueRef::Text(t) => {
            buf.push(b'T');
            buf.extend_from_slice(&(t.len() as u64).to_le_bytes());
            buf.extend_from_slice(t);
        }
        ValueRef::Blob(b) => {
            buf.push(b'B');
            buf.extend_from_slice(&(b.len() as u64).to_le_bytes());
            buf.extend_from_slice(b);
        }
    }
}

/// A value about to be bound, encoded as [`feed_row`] will see it once
/// SQLite has stored it, so that a seal can be computed from the values a
/// transaction writes instead of reading its rows back.
///
/// Each implementation holds for the column affinity its Rust type is
/// bound into here: integers and booleans into INTEGER columns, `f64` into
/// REAL columns, strings into TEXT columns. SQLite's storage rules that
/// matter (pinned by the tests below):
/// - a NaN binds as NULL;
/// - a REAL column keeps an integral double as a compact integer and gives
///   it back as REAL, so -0.0 comes back as +0.0 (every other double comes
///   back bit for bit);
/// - a boolean binds as the integer 0 or 1;
/// - `None` is NULL, and an empty text stays an empty text.
pub(crate) trait SealValue {
    /// Appends the encoding of the value as it will be read back.
    fn encode(&self, buf: &mut Vec<u8>);
}

impl SealValue for i64 {
    fn encode(&self, buf: &mut Vec<u8>) {
        encode_stored(buf, ValueRef::Integer(*self));
    }
}

impl SealValue for bool {
    fn encode(&self, buf: &mut Vec<u8>) {
        encode_stored(buf, ValueRef::Integer(i64::from(*self)));
    }
}

impl SealValue for f64 {
    fn encode(&self, buf: &mut Vec<u8>) {
        if self.is_nan() {
            encode_stored(buf, ValueRef::Null);
        } else if *self == 0.0 {
            // Both zeros are stored as the integer 0 and read back as +0.0.
            encode_stored(buf, ValueRef::Real(0.0));
        } else {
            encode_stored(buf, ValueRef::Real(*self));
        }
    }
}

impl SealValue for str {
    fn encode(&self, buf: &mut Vec<u8>) {
        encode_stored(buf, ValueRef::Text(self.as_bytes()));
    }
}

impl SealValue for [u8] {
    fn encode(&self, buf: &mut Vec<u8>) {
        encode_stored(buf, ValueRef::Blob(self));
    }
}

impl SealValue for String {
    fn encode(&self, buf: &mut Vec<u8>) {
        self.as_str().encode(buf);
    }
}

impl<T: SealValue + ?Sized> SealValue for &T {
    fn encode(&self, buf: &mut Vec<u8>) {
        (**self).encode(buf);
    }
}

impl<T: SealValue> SealValue for Option<T> {
    fn encode(&self, buf: &mut Vec<u8>) {
        match self {
            Some(v) => v.encode(buf),
            None => encode_stored(buf, ValueRef::Null),
        }
    }
}

/// The rows of one section of a seal, encoded from their values as they
/// were written (in any order), each with its row id.
#[derive(Debug, Default)]
pub(crate) struct SealRows {
    bytes: Vec<u8>,
    /// Row id and where its bytes start in `bytes`, in the order written
    /// (a row's bytes end where the next row's start).
    rows: Vec<(i64, usize)>,
    /// Rows appended after these, kept as they came ([`SealRows::append`]):
    /// copying them into `bytes` moved every batch of a file's rows once
    /// more, on the writing thread.
    more: Vec<SealRows>,
}

/// One row being added to a [`SealRows`]: its columns are put in the
/// table's order, as the section's SELECT gives them.
pub(crate) struct SealRow<'a> {
    bytes: &'a mut Vec<u8>,
}

impl SealRow<'_> {
    /// Appends the next column's value.
    pub(crate) fn put<V: SealValue + ?Sized>(&mut self, v: &V) -> &mut Self {
        v.encode(self.bytes);
        self
    }
}

impl SealRows {
    /// Empty, with room for the ids of `rows` rows.
    pub(crate) fn with_rows(rows: usize) -> Self {
        SealRows {
            rows: Vec::with_capacity(rows),
            ..SealRows::default()
        }
    }

    /// Starts the row with id `id`; put its columns in the returned row.
    pub(crate) fn row(&mut self, id: i64) -> SealRow<'_> {
        if !self.more.is_empty() {
            // Rows written here after appended ones (not the usual order):
            // one run of bytes again.
            self.gather();
        }
        self.rows.push((id, self.bytes.len()));
        self.bytes.push(ROW_TAG);
        SealRow {
            bytes: &mut self.bytes,
        }
    }

    /// Once the first row is in: room for the rest of those announced to
    /// [`SealRows::with_rows`] at its size and a quarter more, so that the
    /// bytes are not moved as they grow.
    pub(crate) fn expect_like_first(&mut self) {
        if self.rows.len() == 1 {
            let first = self.bytes.len();
            let want = first.saturating_mul(self.rows.capacity()) / 4 * 5;
            self.bytes.reserve(want.saturating_sub(first));
        }
    }

    /// Rows added.
    pub(crate) fn len(&self) -> usize {
        self.rows.len() + self.more.iter().map(|m| m.rows.len()).sum::<usize>()
    }

    /// Bytes held.
    pub(crate) fn byte_len(&self) -> usize {
        self.bytes.len() + self.more.iter().map(|m| m.bytes.len()).sum::<usize>()
    }

    /// Appends `other`'s rows after these, without copying them.
    pub(crate) fn append(&mut self, mut other: SealRows) {
        if self.rows.is_empty() && self.more.is_empty() {
            *self = other;
            return;
        }
        let nested = std::mem::take(&mut other.more);
        if !other.rows.is_empty() {
            self.more.push(other);
        }
        self.more
            .extend(nested.into_iter().filter(|m| !m.rows.is_empty()));
    }

    /// The appended rows copied into `bytes`, after these.
    fn gather(&mut self) {
        for m in std::mem::take(&mut self.more) {
            let shift = self.bytes.len();
            self.rows
                .extend(m.rows.into_iter().map(|(id, at)| (id, at + shift)));
            self.bytes.extend_from_slice(&m.bytes);
        }
    }

    /// Each part's bytes and row starts, in the order added.
    fn parts(&self) -> impl Iterator<Item = &SealRows> {
        std::iter::once(self).chain(self.more.iter())
    }

    /// Feeds the section to the hash, rows in id order (as the section's
    /// `ORDER BY id`), and empties it.
    fn feed(&mut self, h: &mut Sha256) {
        h.update(SECTION_TAG);
        let ids = || self.parts().flat_map(|p| p.rows.iter().map(|r| r.0));
        if ids().is_sorted() {
            // Written in id order (the usual case): the bytes follow each
            // other already.
            for p in self.parts() {
                h.update(&p.bytes);
            }
        } else {
            let mut spans: Vec<(i64, &[u8])> = self
                .parts()
                .flat_map(|p| {
                    let ends = p.rows.iter().skip(1).map(|r| r.1);
                    p.rows
                        .iter()
                        .zip(ends.chain([p.bytes.len()]))
                        .map(|(&(id, start), end)| (id, &p.bytes[start..end]))
                })
                .collect();
            spans.sort_by_key(|r| r.0);
            for (_, bytes) in spans {
                h.update(bytes);
            }
        }
        *self = SealRows::default();
    }
}

/// A source file's rows as the transaction that stored the file wrote
/// them, kept so that its seal needs no read-back (see [`SealValue`]).
#[derive(Debug, Default)]
pub(crate) struct FileRows {
    /// `records` rows of the file, in [`RECORD_COLUMNS`] order.
    pub(crate) records: SealRows,
    /// `fits` rows whose `trigger_file` is the file, all columns.
    pub(crate) fits: SealRows,
    /// `quarantined_rows` rows of the file, all columns.
    pub(crate) quarantined: SealRows,
    /// The buffers grew past [`FileRows::BUDGET`] and were dropped: this
    /// file's seal reads its rows back (streaming, in constant memory).
    pub(crate) read_back: bool,
}

impl FileRows {
    /// Bytes of encoded rows kept per file (about 30,000 records). A
    /// delivery of a million records encodes to a few hundred megabytes;
    /// past this budget its seal is computed the old way, from the rows
    /// read back, which costs time (about a tenth of its ingest) instead
    /// of memory.
    pub(crate) const BUDGET: usize = if cfg!(test) { 64 << 10 } else { 8 << 20 };

    /// Whether rows are still to be encoded.
    pub(crate) fn keeping(&self) -> bool {
        !self.read_back
    }

    /// Drops the buffers once they pass the budget.
    pub(crate) fn check_budget(&mut self) {
        let held = self.records.byte_len() + self.fits.byte_len() + self.quarantined.byte_len();
        if held > Self::BUDGET {
            *self = FileRows {
                read_back: true,
                ..FileRows::default()
            };
        }
    }

    /// The seal of [`SealScope::File`] of the file whose own
    /// `source_files` row (all columns) is `file_row`: the same hash as
    /// [`compute`] over the stored rows, sections in the order of
    /// `sections(SealKind::File)`. Empties the buffers.
    pub(crate) fn seal(&mut self, file_row: &mut SealRows) -> String {
        debug_assert_eq!(file_row.len(), 1, "BUG: a file has one source_files row");
        let mut h = Sha256::new();
        file_row.feed(&mut h);
        self.records.feed(&mut h);
        self.fits.feed(&mut h);
        self.quarantined.feed(&mut h);
        hex::encode(h.finalize())
    }
}

/// A finding's row and its outbox rows as this transaction wrote them,
/// for [`SealScope::Finding`] without reading them back.
#[derive(Debug, Default)]
pub(crate) struct FindingRows {
    /// Its `findings` row, in `FINDING_COLUMNS` order.
    pub(crate) finding: SealRows,
    /// Its `outbox` rows, in `OUTBOX_COLUMNS` order.
    pub(crate) outbox: SealRows,
}

impl FindingRows {
    /// The seal: the same hash as [`compute`] over the stored rows,
    /// sections in the order of `sections(SealKind::Finding)`.
    pub(crate) fn seal(&mut self) -> String {
        let mut h = Sha256::new();
        self.finding.feed(&mut h);
        self.outbox.feed(&mut h);
        hex::encode(h.finalize())
    }
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    /// Binds `value` into column `column` of a fresh row of `t` and gives
    /// back the bytes a seal reads for it (`feed_row`'s encoding) and those
    /// [`SealValue`] predicts, read both inside the writing transaction and
    /// after its commit.
    fn stored_and_predicted<V: SealValue + ToSql>(
        conn: &mut Connection,
        column: &str,
        value: V,
    ) -> (Vec<u8>, Vec<u8>, Vec<u8>) {
        let read = |c: &Connection, id: i64| {
            c.query_row(
                &format!("SELECT {column} FROM t WHERE id = ?1"),
                [id],
                |r| {
                    let mut buf = Vec::new();
                    encode_stored(&mut buf, r.get_ref(0)?);
                    Ok(buf)
                },
            )
            .unwrap()
        };
        let tx = conn.transaction().unwrap();
        tx.execute(&format!("INSERT INTO t ({column}) VALUES (?1)"), [&value])
            .unwrap();
        let id = tx.last_insert_rowid();
        let inside = read(&tx, id);
        tx.commit().unwrap();
        let after = read(conn, id);
        let mut predicted = Vec::new();
        value.encode(&mut predicted);
        (inside, after, predicted)
    }

    /// Rows appended in parts hash as the same rows written in one run in
    /// id order, whatever order the parts came in and whether rows were
    /// written after them.
    #[test]
    fn appended_parts_hash_as_one_run_in_id_order() {
        let part = |ids: &[i64]| {
            let mut p = SealRows::with_rows(ids.len());
            for &id in ids {
                p.row(id)
                    .put(&id)
                    .put(&format!("row {id}"))
                    .put(&(id as f64 / 3.0));
                p.expect_like_first();
            }
            p
        };
        let hash = |mut rows: SealRows| {
            let mut h = Sha256::new();
            rows.feed(&mut h);
            hex::encode(h.finalize())
        };
        let want = hash(part(&[1, 2, 3, 4, 5, 6, 7]));
        // In order, the first part moved in, the others kept as parts.
        let mut in_order = SealRows::default();
        for ids in [&[1, 2][..], &[3, 4, 5], &[6, 7]] {
            in_order.append(part(ids));
        }
        assert_eq!(in_order.len(), 7);
        assert_eq!(in_order.more.len(), 2);
        assert_eq!(hash(in_order), want);
        // Out of order across parts.
        let mut shuffled = part(&[6, 7]);
        shuffled.append(part(&[1, 2]));
        shuffled.append(part(&[3, 5, 4]));
        assert_eq!(hash(shuffled), want);
        // A part holding parts of its own, then a row written after them.
        let mut nested = part(&[2]);
        nested.append(part(&[3]));
        let mut outer = part(&[1]);
        outer.append(nested);
        outer.append(part(&[4, 5, 6]));
        outer.row(7).put(&7_i64).put("row 7").put(&(7.0 / 3.0));
        assert!(outer.more.is_empty(), "gathered before the new row");
        assert_eq!(outer.byte_len(), part(&[1, 2, 3, 4, 5, 6, 7]).byte_len());
        assert_eq!(hash(outer), want);
        // Appending nothing keeps nothing.
        let mut empty = SealRows::default();
        empty.append(SealRows::default());
        assert_eq!((empty.len(), empty.byte_len()), (0, 0));
    }

    fn test_table() -> Connection {
        let conn = Connection::open_in_memory().unwrap();
        conn.execute_batch(
            "CREATE TABLE t (id INTEGER PRIMARY KEY, r REAL, i INTEGER, s TEXT, plain)",
        )
        .unwrap();
        conn
    }

    fn real(v: f64) -> Vec<u8> {
        let mut b = vec![b'F'];
        b.extend_from_slice(&v.to_bits().to_le_bytes());
        b
    }

    fn integer(v: i64) -> Vec<u8> {
        let mut b = vec![b'I'];
        b.extend_from_slice(&v.to_le_bytes());
        b
    }

    fn text(v: &str) -> Vec<u8> {
        let mut b = vec![b'T'];
        b.extend_from_slice(&(v.len() as u64).to_le_bytes());
        b.extend_from_slice(v.as_bytes());
        b
    }

    #[test]
    fn sqlite_storage_rules_are_what_seal_values_predict() {
        let mut conn = test_table();
        // Each rule, pinned against what the bundled SQLite gives back.
        let pinned: [(f64, Vec<u8>); 6] = [
            // A NaN binds as NULL.
            (f64::NAN, vec![b'N']),
            // -0.0 is kept as the integer 0 in a REAL column: +0.0 back.
            (-0.0, real(0.0)),
            // Integral doubles come back as REAL, not as integers.
            (3.0, real(3.0)),
            (-2.0f64.powi(53), real(-(2.0f64.powi(53)))),
            // Large doubles, integral or not, come back bit for bit.
            (1e300, real(1e300)),
            (2.0f64.powi(63), real(2.0f64.powi(63))),
        ];
        for (v, want) in pinned {
            let (inside, after, predicted) = stored_and_predicted(&mut conn, "r", v);
            assert_eq!(inside, want, "{v:?} read back inside the transaction");
            assert_eq!(after, want, "{v:?} read back after commit");
            assert_eq!(predicted, want, "{v:?} predicted");
        }
        // A column without affinity keeps -0.0: the sign is lost by the
        // REAL column's compact storage of integral values, not by binding.
        let (inside, _, _) = stored_and_predicted(&mut conn, "plain", -0.0f64);
        assert_eq!(inside, real(-0.0));
        // Many more doubles, including the edges of i64 and of the double
        // range, subnormals, infinities and NaNs with other payloads.
        let more = [
            0.0,
            1.0,
            -1.0,
            0.1,
            -2.5,
            1e18,
            -1e18,
            2.0f64.powi(53) + 2.0,
            -(2.0f64.powi(63)),
            9_223_372_036_854_774_784.0,
            1.5e19,
            f64::MAX,
            f64::MIN,
            f64::MIN_POSITIVE,
            -f64::MIN_POSITIVE,
            5e-324,
            -5e-324,
            f64::EPSILON,
            f64::INFINITY,
            f64::NEG_INFINITY,
            -f64::NAN,
            f64::from_bits(0x7ff0_0000_0000_0001),
            2_024.123_456_789,
            -1e-300,
        ];
        for v in more {
            let (inside, after, predicted) = stored_and_predicted(&mut conn, "r", v);
            assert_eq!(inside, predicted, "{v:?} inside the transaction");
            assert_eq!(after, predicted, "{v:?} after commit");
        }
        for v in [true, false] {
            let (inside, after, predicted) = stored_and_predicted(&mut conn, "i", v);
            assert_eq!(inside, integer(i64::from(v)), "{v}");
            assert_eq!(after, integer(i64::from(v)), "{v}");
            assert_eq!(predicted, integer(i64::from(v)), "{v}");
        }
        for v in [0, 1, -1, i64::MAX, i64::MIN, 1 << 53] {
            let (inside, after, predicted) = stored_and_predicted(&mut conn, "i", v);
            assert_eq!((&inside, &after), (&integer(v), &integer(v)), "{v}");
            assert_eq!(predicted, integer(v), "{v}");
        }
        for v in [
            "",
            "plain",
            "Grundwasser Ü-7 µg/L — 3 °C",
            "日本語",
            "a\u{0}b",
            "12",
            "1.5",
        ] {
            let (inside, after, predicted) = stored_and_predicted(&mut conn, "s", v);
            assert_eq!((&inside, &after), (&text(v), &text(v)), "{v:?}");
            assert_eq!(predicted, text(v), "{v:?}");
        }
        let (inside, after, predicted) = stored_and_predicted(&mut conn, "s", String::new());
        assert_eq!(
            (&inside, &after, &predicted),
            (&text(""), &text(""), &text(""))
        );
        // None is NULL whatever the column.
        for column in ["r", "i", "s"] {
            let (inside, after, predicted) = stored_and_predicted(&mut conn, column, None::<f64>);
            assert_eq!(
                (&inside, &after, &predicted),
                (&vec![b'N'], &vec![b'N'], &vec![b'N'])
            );
            let (inside, after, predicted) =
                stored_and_predicted(&mut conn, column, None::<String>);
            assert_eq!(
                (&inside, &after, &predicted),
                (&vec![b'N'], &vec![b'N'], &vec![b'N'])
            );
        }
        let (inside, _, predicted) = stored_and_predicted(&mut conn, "r", Some(-0.0f64));
        assert_eq!((&inside, &predicted), (&real(0.0), &real(0.0)));
        let (inside, _, predicted) = stored_and_predicted(&mut conn, "r", Some(f64::NAN));
        assert_eq!((&inside, &predicted), (&vec![b'N'], &vec![b'N']));
    }

    #[test]
    fn rows_written_out_of_id_order_are_fed_in_id_order() {
        let mut conn = test_table();
        let tx = conn.transaction().unwrap();
        let mut rows = SealRows::default();
        for (id, r, s) in [
            (3, 1.5, "c"),
            (1, -0.0, "a"),
            (4, f64::NAN, ""),
            (2, 7.0, "b"),
        ] {
            tx.execute(
                "INSERT INTO t (id, r, s) VALUES (?1, ?2, ?3)",
                rusqlite::params![id, r, s],
            )
            .unwrap();
            rows.row(id).put(&id).put(&r).put(s);
        }
        let mut h = Sha256::new();
        rows.feed(&mut h);
        let mut want = Sha256::new();
        rows_of(
            &mut want,
            &tx,
            "SELECT id, r, s FROM t WHERE ?1 = ?1 AND id >= ?2 ORDER BY id",
        );
        assert_eq!(h.finalize(), want.finalize());
        assert_eq!(rows.len(), 0, "feeding empties the section");
    }

    fn rows_of(h: &mut Sha256, conn: &Connection, sql: &str) {
        rows(h, conn, sql, 0, 0).unwrap();
    }

    #[test]
    fn seals_are_found_in_a_detail_text_and_nothing_else_is() {
        let d = format!(
            "3 new; {} and {} [seal nonsense 1] [seal file:x ab]",
            seal_text(SealScope::File(12), "ab12"),
            seal_text(SealScope::Finding(7), "cd")
        );
        assert_eq!(
            seals_in(&d),
            vec![
                (SealScope::File(12), "ab12".to_string()),
                (SealScope::Finding(7), "cd".to_string())
            ]
        );
        assert!(seals_in("no seal here").is_empty());
    }
}
