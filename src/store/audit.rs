//! The append-only audit trail: each entry carries the SHA-256 of the one
//! before it, so a changed, removed or inserted row breaks the chain.

use rusqlite::{Connection, OptionalExtension, params};
use sha2::{Digest, Sha256};

/// The hash the first entry chains to.
const GENESIS: &str = "0000000000000000000000000000000000000000000000000000000000000000";

/// What an audit entry records.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum AuditKind {
    /// A file's records were stored (some rows may have been refused).
    FileIngested,
    /// A whole file was set aside.
    FileQuarantined,
    /// A file with content already ingested was skipped.
    FileDuplicate,
    /// A series was refitted.
    Refit,
    /// A record id was resubmitted with other values.
    Conflict,
    /// The daemon started or stopped.
    Lifecycle,
    /// A finding was raised.
    Finding,
    /// A message was delivered, or given up on.
    Message,
    /// An analyst's verdict on a finding, or its revert.
    Verdict,
    /// A series' analysis window changed.
    Window,
    /// The settings in force changed (recorded at start-up).
    Config,
}

impl AuditKind {
    /// The stored name.
    pub fn as_str(self) -> &'static str {
        match self {
            AuditKind::FileIngested => "file_ingested",
            AuditKind::FileQuarantined => "file_quarantined",
            AuditKind::FileDuplicate => "file_duplicate",
            AuditKind::Refit => "refit",
            AuditKind::Conflict => "conflict",
            AuditKind::Lifecycle => "lifecycle",
            AuditKind::Finding => "finding",
            AuditKind::Message => "message",
            AuditKind::Verdict => "verdict",
            AuditKind::Window => "window",
            AuditKind::Config => "config",
        }
    }
}

/// One stored audit entry.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct AuditEntry {
    /// Row id.
    pub id: i64,
    /// When (RFC 3339 UTC).
    pub at: String,
    /// Kind name.
    pub kind: String,
    /// What it concerns (a file name, a series key).
    pub subject: String,
    /// Details.
    pub detail: String,
    /// Hash of the previous entry.
    pub prev_hash: String,
    /// This entry's hash.
    pub hash: String,
}

/// Where the chain fails.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ChainBreak {
    /// The entry whose stored hashes do not match.
    pub id: i64,
    /// What does not match.
    pub reason: String,
}

fn entry_hash(prev: &str, at: &str, kind: &str, subject: &str, detail: &str) -> String {
    let mut h = Sha256::new();
    // Length-prefixed fields: no two different entries hash the same text.
    for part in [prev, at, kind, subject, detail] {
        h.update((part.len() as u64).to_le_bytes());
        h.update(part.as_bytes());
    }
    hex::encode(h.finalize())
}

/// The newest entry's hash, if any.
pub(super) fn last_hash(conn: &Connection) -> rusqlite::Result<Option<String>> {
    conn.prepare_cached("SELECT hash FROM audit_log ORDER BY id DESC LIMIT 1")?
        .query_row([], |r| r.get(0))
        .optional()
}

/// Appends an entry after `prev` (the newest hash, `None` for the first
/// entry) and returns the new entry's hash.
pub(super) fn append(
    conn: &Connection,
    prev: Option<&str>,
    at: &str,
    kind: AuditKind,
    subject: &str,
    detail: &str,
) -> rusqlite::Result<String> {
    let prev = prev.unwrap_or(GENESIS);
    let hash = entry_hash(prev, at, kind.as_str(), subject, detail);
    conn.prepare_cached(
        "INSERT INTO audit_log (at, kind, subject, detail, prev_hash, hash) VALUES (?1, ?2, ?3, ?4, ?5, ?6)",
    )?
    .execute(params![at, kind.as_str(), subject, detail, prev, hash])?;
    Ok(hash)
}

/// The detail of the newest entry of a kind.
pub(super) fn last_detail_of(
    conn: &Connection,
    kind: AuditKind,
) -> rusqlite::Result<Option<String>> {
    conn.prepare_cached("SELECT detail FROM audit_log WHERE kind = ?1 ORDER BY id DESC LIMIT 1")?
        .query_row([kind.as_str()], |r| r.get(0))
        .optional()
}

pub(super) fn entries(conn: &Connection) -> rusqlite::Result<Vec<AuditEntry>> {
    let mut stmt = conn.prepare(
        "SELECT id, at, kind, subject, detail, prev_hash, hash FROM audit_log ORDER BY id",
    )?;
    let rows = stmt.query_map([], |r| {
        Ok(AuditEntry {
            id: r.get(0)?,
            at: r.get(1)?,
            kind: r.get(2)?,
            subject: r.get(3)?,
            detail: r.get(4)?,
            prev_hash: r.get(5)?,
            hash: r.get(6)?,
        })
    })?;
    rows.collect()
}

/// Walks the chain; the first entry that does not fit is reported.
pub fn verify_chain(entries: &[AuditEntry]) -> Result<(), ChainBreak> {
    let mut prev = GENESIS.to_string();
    for e in entries {
        if e.prev_hash != prev {
            return Err(ChainBreak {
                id: e.id,
                reason: "its previous-hash does not match the entry before it (an entry was removed, inserted or changed)".into(),
            });
        }
        let want = entry_hash(&e.prev_hash, &e.at, &e.kind, &e.subject, &e.detail);
        if e.hash != want {
            return Err(ChainBreak {
                id: e.id,
                reason: "its content does not match its hash (the entry was changed)".into(),
            });
        }
        prev = e.hash.clone();
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::super::Store;
    use super::*;

    #[test]
    fn a_changed_entry_breaks_the_chain_at_that_entry() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("db.sqlite3");
        let mut store = Store::open(&path).unwrap();
        for i in 0..3 {
            store
                .audit(
                    "2026-12-02T00:00:00Z",
                    AuditKind::FileIngested,
                    &format!("f{i}.csv"),
                    "3 records",
                )
                .unwrap();
        }
        assert_eq!(verify_chain(&store.audit_entries().unwrap()), Ok(()));
        drop(store);
        let conn = Connection::open(&path).unwrap();
        conn.execute("UPDATE audit_log SET detail = '4 records' WHERE id = 2", [])
            .unwrap();
        drop(conn);
        let store = Store::open(&path).unwrap();
        let err = verify_chain(&store.audit_entries().unwrap()).unwrap_err();
        assert_eq!(err.id, 2);
    }
}
