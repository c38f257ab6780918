//! Writing a transaction's rows on a second thread while the first goes on
//! computing ("write-behind").
//!
//! A file's transaction stays one transaction on one connection; only who
//! executes its statements changes. [`write_behind`] starts a writing
//! thread for the span of one transaction. The computing thread hands it
//! write jobs ([`Behind::later`]: owned rows, a closure over the [`Tx`]),
//! which it runs in the order given, and takes the transaction back
//! whenever it must read or write itself ([`Behind::tx`]): that call waits
//! until every job handed over before it has run, so each statement sees
//! exactly what it would have seen had everything run on one thread.
//!
//! A failed job poisons the transaction: the jobs after it are dropped, and
//! the next [`Behind::tx`] (at the latest the one before commit) returns
//! its error, so the caller returns and the transaction rolls back. No
//! commit can happen with a job lost. When no thread can be started (out
//! of threads or memory), the jobs run at once on the calling thread under
//! the same rules.

use std::sync::mpsc::{Receiver, Sender, channel};

use super::{Result, StoreError, Tx};

/// A write to run on the writing thread, in order.
pub type Job<'t> = Box<dyn FnOnce(&Tx<'t>) -> Result<()> + Send + 't>;

enum ToWriter<'t> {
    /// The transaction, to run the jobs that follow on.
    Hand(Tx<'t>),
    /// A job.
    Run(Job<'t>),
    /// Send the transaction back (after the jobs before this).
    Return,
}

/// The computing thread's side of [`write_behind`].
pub struct Behind<'t> {
    /// The transaction, while this thread holds it.
    held: Option<Tx<'t>>,
    /// The writing thread's channels; `None` when it could not be started,
    /// and jobs run at once on this thread instead.
    writer: Option<Channels<'t>>,
    /// Without a writing thread: the error of the first job that failed.
    failed: Option<StoreError>,
}

type Channels<'t> = (Sender<ToWriter<'t>>, Receiver<(Tx<'t>, Option<StoreError>)>);

/// Runs `body` with `tx` and a writing thread for it. `body` must take the
/// transaction back with [`Behind::finish`] to commit it; otherwise it is
/// dropped (rolled back) when `body` returns.
pub fn write_behind<'t, R>(tx: Tx<'t>, body: impl FnOnce(&mut Behind<'t>) -> R) -> R {
    std::thread::scope(|scope| {
        let (to_writer, jobs) = channel::<ToWriter<'t>>();
        let (back, from_writer) = channel();
        let writer = match std::thread::Builder::new()
            .name("store-writer".into())
            .spawn_scoped(scope, move || writer(jobs, back))
        {
            Ok(_) => Some((to_writer, from_writer)),
            Err(e) => {
                // Out of threads or memory: the same jobs, on this thread.
                tracing::warn!(error = %e, "cannot start the store's writing thread; writing on this one");
                None
            }
        };
        let mut behind = Behind {
            held: Some(tx),
            writer,
            failed: None,
        };
        body(&mut behind)
        // Dropping `behind` ends the writer (dropping any transaction it
        // holds: rolled back); the scope waits for it.
    })
}

fn writer<'t>(jobs: Receiver<ToWriter<'t>>, back: Sender<(Tx<'t>, Option<StoreError>)>) {
    let mut held: Option<Tx<'t>> = None;
    let mut failed: Option<StoreError> = None;
    for message in jobs {
        match message {
            ToWriter::Hand(tx) => held = Some(tx),
            ToWriter::Run(job) => {
                if failed.is_none()
                    && let Some(tx) = held.as_ref()
                    && let Err(e) = job(tx)
                {
                    failed = Some(e);
                }
            }
            ToWriter::Return => {
                if let Some(tx) = held.take() {
                    // The computing thread waits for this; if it is gone,
                    // the transaction drops here and rolls back.
                    let _ = back.send((tx, failed.take()));
                }
            }
        }
    }
}

impl<'t> Behind<'t> {
    /// Runs `job` on the writing thread after the jobs before it; the
    /// computing thread goes on at once.
    pub fn later(&mut self, job: impl FnOnce(&Tx<'t>) -> Result<()> + Send + 't) {
        let Some((to_writer, _)) = &self.writer else {
            if self.failed.is_none()
                && let Some(tx) = &self.held
                && let Err(e) = job(tx)
            {
                self.failed = Some(e);
            }
            return;
        };
        if let Some(tx) = self.held.take() {
            // A send fails only when the writer is gone (it panicked); the
            // next `tx` reports that.
            let _ = to_writer.send(ToWriter::Hand(tx));
        }
        let _ = to_writer.send(ToWriter::Run(Box::new(job)));
    }

    /// The transaction, once every job handed over has run; the error of
    /// the first job that failed, if one did (the transaction must then be
    /// given up).
    pub fn tx(&mut self) -> Result<&Tx<'t>> {
        if let Some(e) = self.failed.take() {
            // Dropped here: rolled back.
            self.held = None;
            return Err(e);
        }
        if self.held.is_none() {
            let lost = || StoreError::WriterLost;
            let (to_writer, from_writer) = self.writer.as_ref().ok_or_else(lost)?;
            to_writer.send(ToWriter::Return).map_err(|_| lost())?;
            let (tx, failed) = from_writer.recv().map_err(|_| lost())?;
            if let Some(e) = failed {
                // Dropped here: rolled back.
                drop(tx);
                return Err(e);
            }
            self.held = Some(tx);
        }
        match self.held.as_ref() {
            Some(tx) => Ok(tx),
            None => unreachable!("BUG: the transaction was taken back just above"),
        }
    }

    /// The transaction back, every job run, to commit.
    pub fn finish(&mut self) -> Result<Tx<'t>> {
        self.tx()?;
        self.held.take().ok_or(StoreError::WriterLost)
    }
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;
    use crate::store::{AuditKind, Store};

    /// A job appending an audit entry about `subject`.
    fn entry<'t>(subject: String) -> impl FnOnce(&Tx<'t>) -> Result<()> + Send + 't {
        move |tx| tx.append_audit("2026-01-01T00:00:00Z", AuditKind::Conflict, &subject, "d")
    }

    /// A job SQLite refuses.
    fn failing<'t>() -> impl FnOnce(&Tx<'t>) -> Result<()> + Send + 't {
        |tx| {
            tx.tx
                .execute_batch("INSERT INTO no_such_table VALUES (1)")
                .map_err(tx.wrap())
        }
    }

    /// Audit entries as the transaction sees them.
    fn entries_in(tx: &Tx<'_>) -> i64 {
        tx.tx
            .query_row("SELECT count(*) FROM audit_log", [], |r| r.get(0))
            .unwrap()
    }

    /// Audit entries committed.
    fn audit_count(store: &Store) -> i64 {
        store
            .conn
            .query_row("SELECT count(*) FROM audit_log", [], |r| r.get(0))
            .unwrap()
    }

    #[test]
    fn jobs_run_in_order_and_reads_after_them_see_their_writes() {
        let mut store = Store::open_in_memory().unwrap();
        let tx = store.begin().unwrap();
        let seen = write_behind(tx, |b| {
            for i in 0..50 {
                b.later(entry(format!("r{i}")));
            }
            let n = entries_in(b.tx().unwrap());
            let subjects: Vec<String> = {
                let tx = b.tx().unwrap();
                let mut stmt = tx
                    .tx
                    .prepare("SELECT subject FROM audit_log ORDER BY id")
                    .unwrap();
                stmt.query_map([], |r| r.get(0))
                    .unwrap()
                    .map(|r| r.unwrap())
                    .collect()
            };
            b.finish().unwrap().commit().unwrap();
            (n, subjects)
        });
        assert_eq!(seen.0, 50);
        let want: Vec<String> = (0..50).map(|i| format!("r{i}")).collect();
        assert_eq!(seen.1, want);
        assert_eq!(audit_count(&store), 50);
        // The chain the writing thread built is the chain a reader verifies.
        let entries = store.audit_entries().unwrap();
        assert!(crate::store::verify_chain(&entries).is_ok());
    }

    #[test]
    fn a_failed_job_drops_the_rest_and_the_transaction_rolls_back() {
        let mut store = Store::open_in_memory().unwrap();
        let tx = store.begin().unwrap();
        let result = write_behind(tx, |b| {
            b.later(entry("kept?".into()));
            b.later(failing());
            b.later(|_| panic!("a job after a failed one must not run"));
            b.finish().and_then(|tx| tx.commit())
        });
        let err = result.expect_err("the failed job must surface");
        assert!(err.to_string().contains("no_such_table"), "{err}");
        assert_eq!(audit_count(&store), 0, "nothing of the transaction is kept");
        // The store takes the next transaction normally.
        let tx = store.begin().unwrap();
        entry("next".into())(&tx).unwrap();
        tx.commit().unwrap();
        assert_eq!(audit_count(&store), 1);
    }

    #[test]
    fn without_a_writing_thread_jobs_run_at_once_with_the_same_failure_rule() {
        let mut store = Store::open_in_memory().unwrap();
        let tx = store.begin().unwrap();
        let mut b = Behind {
            held: Some(tx),
            writer: None,
            failed: None,
        };
        b.later(entry("a".into()));
        assert_eq!(entries_in(b.tx().unwrap()), 1);
        b.later(failing());
        b.later(|_| panic!("a job after a failed one must not run"));
        let err = b.finish().err().expect("the failed job must surface");
        assert!(err.to_string().contains("no_such_table"), "{err}");
        drop(b);
        assert_eq!(audit_count(&store), 0, "nothing of the transaction is kept");
    }

    #[test]
    fn a_transaction_left_with_the_writer_rolls_back() {
        let mut store = Store::open_in_memory().unwrap();
        let tx = store.begin().unwrap();
        write_behind(tx, |b| {
            b.later(entry("lost".into()));
            // The body returns without finishing (an early error return).
        });
        assert_eq!(audit_count(&store), 0);
        assert!(store.conn.is_autocommit());
    }
}
