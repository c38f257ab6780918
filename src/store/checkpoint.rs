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
//! Durability is SQLite's: a checkpoint syncs the log before copying and the
//! database after (this connection runs with `synchronous = FULL` too), and
//! the log is only reused once its frames are in the database file.

use std::path::Path;
use std::sync::mpsc::{Receiver, RecvTimeoutError, Sender, channel};
use std::thread::JoinHandle;
use std::time::Duration;

use rusqlite::Connection;
use tracing::{debug, warn};

use super::{Result, Store, StoreError};

/// How often the checkpointer copies what the writer committed meanwhile.
const EVERY: Duration = Duration::from_millis(200);

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
        let thread = match std::thread::Builder::new()
            .name("checkpoint".into())
            .spawn(move || run(&conn, &path, &stopped))
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

fn run(conn: &Connection, path: &Path, stopped: &Receiver<()>) {
    loop {
        let last = match stopped.recv_timeout(EVERY) {
            Err(RecvTimeoutError::Timeout) => false,
            Ok(()) | Err(RecvTimeoutError::Disconnected) => true,
        };
        match conn.query_row("PRAGMA wal_checkpoint(PASSIVE)", [], |r| {
            Ok((r.get::<_, i64>(1)?, r.get::<_, i64>(2)?))
        }) {
            Ok((frames, copied)) => debug!(frames, copied, "checkpoint"),
            // Never fatal: the writer's own threshold still applies.
            Err(e) => warn!(database = %path.display(), error = %e, "background checkpoint failed"),
        }
        if last {
            return;
        }
    }
}

impl Drop for Checkpointer {
    fn drop(&mut self) {
        drop(self.stop.take());
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
}
