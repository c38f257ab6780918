//! Commits made durable off the writing thread.
//!
//! With `synchronous = FULL`, every COMMIT waits for an fsync of the
//! write-ahead log on the thread that writes the rows: for a backlog of
//! small files, one fsync per file on the busier thread (about 1.3 s of a
//! 12 s million-record backlog, measured side by side with the same build
//! at `NORMAL`). For a run of files computed ahead the ingesting connection
//! commits at `NORMAL` instead (SQLite then appends the transaction to the
//! log without waiting for the disk; the log stays consistent, only the
//! newest transactions can be lost to a power cut or a system crash, never
//! to a crash of this process), and a thread of its own (`store-sync`, in
//! `behind.rs`) fsyncs the log after each commit, while the writer goes on
//! with the next file.
//!
//! The rule that keeps a record from being lost or counted twice is
//! unchanged: a file leaves the inbox only after its commit is on disk.
//! [`WalSync::sync`] returns once everything committed before the call is
//! (fdatasync of the log covers every frame written before it), and the
//! file is moved after it. A power cut before that leaves the file in the
//! inbox, and either its transaction (taken again: the same content is
//! then skipped) or nothing of it in the store (ingested again).

use std::fs::File;
use std::path::{Path, PathBuf};

use super::{Store, StoreError};

/// Makes the commits of the ingesting connection durable (see the module
/// documentation). Made by [`Store::commit_without_sync`].
#[derive(Debug, Clone)]
pub struct WalSync {
    database: PathBuf,
    wal: PathBuf,
    /// The folder holding the log, fsynced once so that the log's own
    /// name survives a power cut as well (SQLite does the same when it
    /// creates the log).
    folder_synced: bool,
}

impl WalSync {
    /// For the log of the database at `database` (tests point it at
    /// files that cannot be synced).
    #[cfg(test)]
    pub(crate) fn at(database: &Path) -> WalSync {
        let mut wal = database.as_os_str().to_owned();
        wal.push("-wal");
        WalSync {
            database: database.to_owned(),
            wal: PathBuf::from(wal),
            folder_synced: false,
        }
    }

    /// Returns once every transaction committed before the call is on
    /// disk. When the log is gone (every connection closed, the log folded
    /// into the database and removed), the database file itself is synced.
    pub fn sync(&mut self) -> Result<(), StoreError> {
        let fail = |source| StoreError::Durability {
            path: self.database.clone(),
            source,
        };
        let log = match File::open(&self.wal) {
            Ok(f) => f,
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
                File::open(&self.database).map_err(fail)?
            }
            Err(e) => return Err(fail(e)),
        };
        log.sync_data().map_err(fail)?;
        if !self.folder_synced {
            let folder = self
                .wal
                .parent()
                .filter(|p| !p.as_os_str().is_empty())
                .unwrap_or(Path::new("."));
            File::open(folder)
                .and_then(|f| f.sync_all())
                .map_err(fail)?;
            self.folder_synced = true;
        }
        Ok(())
    }
}

impl Store {
    /// Lets this connection's commits return before they reach the disk;
    /// the caller makes each durable with the [`WalSync`] before it acts
    /// on it, and calls [`Store::commit_with_sync`] when done.
    pub fn commit_without_sync(&mut self) -> Result<WalSync, StoreError> {
        self.conn
            .pragma_update(None, "synchronous", "NORMAL")
            .map_err(self.wrap())?;
        let mut wal = self.path.clone().into_os_string();
        wal.push("-wal");
        Ok(WalSync {
            database: self.path.clone(),
            wal: PathBuf::from(wal),
            folder_synced: false,
        })
    }

    /// Back to commits that return once on disk (the default).
    pub fn commit_with_sync(&mut self) -> Result<(), StoreError> {
        self.conn
            .pragma_update(None, "synchronous", "FULL")
            .map_err(self.wrap())
    }

    /// The connection's `synchronous` setting (2 is FULL, 1 NORMAL).
    pub fn synchronous(&self) -> Result<i64, StoreError> {
        self.conn
            .pragma_query_value(None, "synchronous", |r| r.get(0))
            .map_err(self.wrap())
    }
}
