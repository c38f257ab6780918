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
    buf.push(b'R');
    for i in from..columns {
        match row.get_ref(i)? {
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
    h.update(&buf);
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

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
