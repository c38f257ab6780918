//! WAL checkpoints on a thread of their own.
//!
//! In WAL mode every committed page is written twice: appended to the
//! write-ahead log at commit, then copied into the database file by a
//! checkpoint. SQLite runs that checkpoint on the committing connection once
//! the log passes `wal_autocheckpoint` pages, so the writer stopped for the
//! copy and its fsync (about a tenth of a large backlog's ingest, measured).
//! While the writer is busy, a [`Checkpointer`] does the copying beside it
//! from its own connection, with PASSIVE checkpoints, which never block the
//! writer or the readers. The writer keeps a high automatic threshold as a
//! backstop, should the checkpointer ever fall behind.
//!
//! A passive checkpoint copies the log but cannot start it over while the
//! writer keeps appending, so over a long backlog the log grew to the size
//! of everything written (1.1 GB for a million records, for a 483 MB
//! database): every commit appended to fresh blocks, and deleting the log
//! when the store closed took 0.29 s on its own (strace). So once the log
//! passes [`RESTART_FRAMES`], the checkpointer asks the writer to finish
//! the job: right after a pass, the writer copies the frames committed
//! meanwhile (a few commits' worth) between two transactions, and its next
//! transaction starts the log over (SQLite restarts a fully copied log
//! when no reader still needs it). The log then stays near that size.
//!
//! Durability is SQLite's: a checkpoint syncs the log before copying and the
//! database after (this connection runs with `synchronous = FULL` too), and
//! the log is only reused once its frames are in the database file.

use std::path::Path;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::mpsc::{Receiver, RecvTimeoutError, Sender, channel};
use std::thread::JoinHandle;
use std::time::Duration;

use rusqlite::Connection;
use tracing::{debug, warn};

use super::{Result, Store, StoreError};

/// How often the checkpointer copies what the writer committed meanwhile.
const EVERY: Duration = Duration::from_millis(200);

/// Frames in the log (16 KiB pages: 128 MiB) from which the writer is
/// asked to finish a checkpoint, so that the log starts over.
const RESTART_FRAMES: i64 = 8_192;

/// The writer's own automatic threshold while a checkpointer runs (pages of
/// 16 KiB: 1 GiB of log), reached only if the checkpointer falls behind.
const BACKSTOP_PAGES: i64 = 65_536;

/// The background checkpointer; stops (after one last checkpoint) when
/// dropped.
#[derive(Debug)]
pub struct Checkpointer {
    stop: Option<Sender<()>>,
    thread: Option<JoinHandle<()>>,
}

impl Store {
    /// Starts checkpointing this database on a thread of its own, and
    /// raises this connection's automatic threshold to a backstop. Meant
    /// for the one writer (the daemon, `ingest`).
    pub fn checkpoint_in_background(&self) -> Result<Checkpointer> {
        self.checkpoint_every(EVERY, RESTART_FRAMES)
    }

    fn checkpoint_every(&self, every: Duration, restart_frames: i64) -> Result<Checkpointer> {
        let wrap = |source| StoreError::Sqlite {
            path: self.path.clone(),
            source,
        };
        let conn = Connection::open(&self.path).map_err(wrap)?;
        conn.busy_timeout(Duration::from_secs(30)).map_err(wrap)?;
        conn.pragma_update(None, "synchronous", "FULL")
            .map_err(wrap)?;
        let (stop, stopped) = channel::<()>();
        let path = self.path.clone();
        let catch_up = Arc::clone(&self.catch_up);
        let thread = match std::thread::Builder::new()
            .name("checkpoint".into())
            .spawn(move || run(&conn, &path, &stopped, every, (restart_frames, &catch_up)))
        {
            Ok(t) => t,
            Err(e) => {
                // The writer keeps checkpointing itself.
                warn!(error = %e, "cannot start the checkpoint thread; the writer checkpoints");
                return Ok(Checkpointer {
                    stop: None,
                    thread: None,
                });
            }
        };
        self.conn
            .pragma_update(None, "wal_autocheckpoint", BACKSTOP_PAGES)
            .map_err(wrap)?;
        Ok(Checkpointer {
            stop: Some(stop),
            thread: Some(thread),
        })
    }
}

/// Checkpoints every `every` until stopped; asks for the writer's catch-up
/// when the log holds at least `restart.0` frames.
fn run(
    conn: &Connection,
    path: &Path,
    stopped: &Receiver<()>,
    every: Duration,
    restart: (i64, &AtomicBool),
) {
    let (restart_frames, catch_up) = restart;
    loop {
        let last = match stopped.recv_timeout(every) {
            Err(RecvTimeoutError::Timeout) => false,
            Ok(()) | Err(RecvTimeoutError::Disconnected) => true,
        };
        match passive(conn) {
            Ok((frames, copied)) => {
                debug!(frames, copied, "checkpoint");
                if frames >= restart_frames {
                    catch_up.store(true, Ordering::Relaxed);
                }
            }
            // Never fatal: the writer's own threshold still applies.
            Err(e) => warn!(database = %path.display(), error = %e, "background checkpoint failed"),
        }
        if last {
            return;
        }
    }
}

/// The writer's part, between two transactions: copies what the last
/// pass left, so that the next transaction can start the log over. Never
/// fatal: the log only stays longer.
pub(super) fn catch_up(conn: &Connection, path: &Path) {
    match passive(conn) {
        Ok((frames, copied)) => debug!(frames, copied, "checkpoint caught up by the writer"),
        // Another checkpoint is running (a reader's, or the checkpointer's
        // next pass): the next request will do.
        Err(rusqlite::Error::SqliteFailure(e, _))
            if e.code == rusqlite::ErrorCode::DatabaseBusy =>
        {
            debug!("the writer's checkpoint found another running");
        }
        Err(e) => warn!(database = %path.display(), error = %e, "the writer's checkpoint failed"),
    }
}

/// A PASSIVE checkpoint: (frames in the log, frames copied).
fn passive(conn: &Connection) -> rusqlite::Result<(i64, i64)> {
    conn.query_row("PRAGMA wal_checkpoint(PASSIVE)", [], |r| {
        Ok((r.get(1)?, r.get(2)?))
    })
}

impl Drop for Checkpointer {
    fn drop(&mut self) {
        drop(self.stop.take());
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]

    use super::*;

    /// The largest the log grew over 150 commits of about 17 pages each,
    /// with a checkpointer asking for the catch-up from `restart_frames`.
    fn largest_log(restart_frames: i64) -> u64 {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("s.sqlite3");
        let wal = dir.path().join("s.sqlite3-wal");
        let mut store = Store::open(&db).unwrap();
        store
            .conn
            .execute_batch("CREATE TABLE scratch (b BLOB)")
            .unwrap();
        let checkpoints = store
            .checkpoint_every(Duration::from_millis(5), restart_frames)
            .unwrap();
        let mut largest = 0;
        for _ in 0..150 {
            let tx = store.begin().unwrap();
            for _ in 0..4 {
                tx.tx
                    .execute("INSERT INTO scratch VALUES (zeroblob(65536))", [])
                    .unwrap();
            }
            tx.commit().unwrap();
            largest = largest.max(std::fs::metadata(&wal).map(|m| m.len()).unwrap_or(0));
        }
        drop(checkpoints);
        let rows: i64 = store
            .conn
            .query_row("SELECT count(*) FROM scratch", [], |r| r.get(0))
            .unwrap();
        assert_eq!(rows, 600, "every committed row is there");
        largest
    }

    #[test]
    fn a_long_run_of_commits_keeps_the_log_short() {
        // 150 commits write about 40 MB of log. Caught up from 64 frames
        // (1 MiB), the log starts over and stays a few MiB long; without
        // the writer's catch-up it grew to the full 40 MB (checked by
        // hand with the flag never set).
        let largest = largest_log(64);
        assert!(
            largest < 16 << 20,
            "the log grew to {largest} bytes; it should have started over"
        );
    }
}
