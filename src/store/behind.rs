//! Writing transactions' rows on a second thread while the first goes on
//! computing ("write-behind").
//!
//! A file's transaction stays one transaction on one connection; only who
//! executes its statements changes. [`write_behind`] starts a writing
//! thread that keeps the connection for a run of transactions, one after
//! the other. The computing thread hands it write jobs ([`Behind::later`]:
//! owned rows, a closure over the [`Tx`]), which it runs in the order
//! given, and takes the transaction back whenever it must read or write
//! itself ([`Behind::tx`]): that call waits until every job handed over
//! before it has run, so each statement sees exactly what it would have
//! seen had everything run on one thread.
//!
//! [`Behind::end`] ends the current transaction once the jobs before it
//! have run (commit, or rollback) without waiting for it; its outcome is
//! taken later, in order, with [`Behind::outcome`]. The first job or read
//! after an end begins the next transaction. So the computing thread can
//! go on with the next file while the previous one commits.
//!
//! A failed job poisons its transaction: the jobs after it in the same
//! transaction are dropped, [`Behind::tx`] returns the error, and the end
//! rolls the transaction back and reports an error as its outcome. No
//! commit can happen with a job lost. The transaction after it starts
//! clean. When no thread can be started (out of threads or memory), the
//! jobs run at once on the calling thread under the same rules.
//!
//! Given a [`WalSync`] (the connection then commits without waiting for
//! the disk), a third thread makes each commit durable while the writer
//! goes on with the next transaction; a commit's outcome is `Ok` only once
//! it is on disk.

use std::collections::VecDeque;
use std::sync::mpsc::{Receiver, Sender, channel};

use super::{Result, StoreError, Tx, WalSync};

/// A write to run on the writing thread, in order.
pub type Job<'t> = Box<dyn FnOnce(&Tx<'t>) -> Result<()> + Send + 't>;

/// The connection with the state of its current transaction; it moves
/// between the two threads as a whole.
struct Slot<'t> {
    tx: Tx<'t>,
    /// Whether a transaction is open (after an end, the next use begins one).
    open: bool,
    health: Health,
}

enum Health {
    Fine,
    /// A job failed; its error not reported yet.
    Failed(StoreError),
    /// A job failed and its error was reported.
    Reported,
}

impl<'t> Slot<'t> {
    /// Begins the next transaction when the last one ended.
    fn ready(&mut self) {
        if !self.open && matches!(self.health, Health::Fine) {
            match self.tx.renew() {
                Ok(()) => self.open = true,
                Err(e) => self.health = Health::Failed(e),
            }
        }
    }

    fn run(&mut self, job: Job<'t>) {
        self.ready();
        if matches!(self.health, Health::Fine)
            && let Err(e) = job(&self.tx)
        {
            self.health = Health::Failed(e);
        }
    }

    /// Whether the transaction is sound; a failure's error is returned
    /// once, then [`StoreError::Abandoned`].
    fn check(&mut self) -> Result<()> {
        self.ready();
        match std::mem::replace(&mut self.health, Health::Reported) {
            Health::Fine => {
                self.health = Health::Fine;
                Ok(())
            }
            Health::Failed(e) => Err(e),
            Health::Reported => Err(StoreError::Abandoned),
        }
    }

    fn end(&mut self, commit: bool) -> Result<()> {
        let health = std::mem::replace(&mut self.health, Health::Fine);
        let open = std::mem::replace(&mut self.open, false);
        let failed = match health {
            Health::Fine => None,
            Health::Failed(e) => Some(e),
            Health::Reported => Some(StoreError::Abandoned),
        };
        match failed {
            None if open => self.tx.end(commit),
            // Nothing was begun: nothing to end.
            None => Ok(()),
            Some(e) => {
                if open {
                    let _ = self.tx.end(false);
                }
                Err(e)
            }
        }
    }
}

enum ToWriter<'t> {
    /// The transaction, to run the jobs that follow on.
    Hand(Box<Slot<'t>>),
    /// A job.
    Run(Job<'t>),
    /// Send the transaction back (after the jobs before this).
    Return,
    /// End the transaction (after the jobs before this); the outcome goes
    /// back on the outcome channel.
    End { commit: bool },
}

/// The computing thread's side of [`write_behind`].
pub struct Behind<'t> {
    /// The transaction, while this thread holds it.
    held: Option<Slot<'t>>,
    /// The writing thread's channels; `None` when it could not be started,
    /// and jobs run at once on this thread instead.
    writer: Option<Channels<'t>>,
    /// Without a writing thread: the outcomes of the ends not yet taken.
    ended: VecDeque<Ended>,
    /// Commits to be made durable as their outcomes are taken (when no
    /// thread could be started to do it sooner).
    sync_here: Option<WalSync>,
}

/// How a transaction ended: whether a commit was asked, and the outcome.
type Ended = (bool, Result<()>);

struct Channels<'t> {
    to_writer: Sender<ToWriter<'t>>,
    back: Receiver<Slot<'t>>,
    outcomes: Receiver<Ended>,
}

/// Runs `body` with `tx` (begun) and a writing thread for it and the
/// transactions after it. What `body` leaves unended when it returns is
/// rolled back. With `durable`, the connection's commits do not wait for
/// the disk (see [`Store::commit_without_sync`](super::Store::commit_without_sync)):
/// each is made durable by a thread of its own before its outcome is given.
pub fn write_behind<'t, R>(
    tx: Tx<'t>,
    durable: Option<WalSync>,
    body: impl FnOnce(&mut Behind<'t>) -> R,
) -> R {
    std::thread::scope(|scope| {
        let (to_writer, jobs) = channel::<ToWriter<'t>>();
        let (back_tx, back) = channel();
        let (outcome_tx, mut outcomes) = channel();
        let mut sync_here = None;
        // The writer's outcomes go through the syncing thread, when there
        // is one to make commits durable.
        let writer_outcomes = match durable.clone() {
            None => outcome_tx,
            Some(wal) => {
                let (ended_tx, ended) = channel::<Ended>();
                let spawned = std::thread::Builder::new()
                    .name("store-sync".into())
                    .spawn_scoped(scope, move || sync_commits(wal, ended, outcome_tx));
                match spawned {
                    Ok(_) => ended_tx,
                    Err(e) => {
                        // Its channel end went with it: outcomes come
                        // straight from the writer, synced as taken.
                        tracing::warn!(error = %e, "cannot start the store's syncing thread; syncing as outcomes are taken");
                        sync_here.clone_from(&durable);
                        let (direct_tx, direct) = channel();
                        outcomes = direct;
                        direct_tx
                    }
                }
            }
        };
        let writer = match std::thread::Builder::new()
            .name("store-writer".into())
            .spawn_scoped(scope, move || writer(jobs, back_tx, writer_outcomes))
        {
            Ok(_) => Some(Channels {
                to_writer,
                back,
                outcomes,
            }),
            Err(e) => {
                // Out of threads or memory: the same jobs, on this thread,
                // whose outcomes never pass the syncing thread.
                tracing::warn!(error = %e, "cannot start the store's writing thread; writing on this one");
                sync_here = durable;
                None
            }
        };
        let mut behind = Behind {
            held: Some(Slot {
                tx,
                open: true,
                health: Health::Fine,
            }),
            writer,
            ended: VecDeque::new(),
            sync_here,
        };
        body(&mut behind)
        // Dropping `behind` ends the writer (dropping the transaction it
        // holds: an open one rolls back); the scope waits for it.
    })
}

/// Makes each commit durable before passing its outcome on, in order;
/// other outcomes pass as they are.
fn sync_commits(mut wal: WalSync, ended: Receiver<Ended>, outcomes: Sender<Ended>) {
    for (commit, outcome) in ended {
        let outcome = durable(&mut wal, commit, outcome);
        if outcomes.send((commit, outcome)).is_err() {
            return;
        }
    }
}

/// A transaction's outcome once a commit is on disk: a commit's `Ok` becomes
/// the sync's result; anything else is as it was.
fn durable(wal: &mut WalSync, commit: bool, outcome: Result<()>) -> Result<()> {
    match outcome {
        Ok(()) if commit => wal.sync(),
        other => other,
    }
}

fn writer<'t>(jobs: Receiver<ToWriter<'t>>, back: Sender<Slot<'t>>, outcomes: Sender<Ended>) {
    let mut held: Option<Slot<'t>> = None;
    for message in jobs {
        match message {
            ToWriter::Hand(slot) => held = Some(*slot),
            ToWriter::Run(job) => {
                if let Some(slot) = held.as_mut() {
                    slot.run(job);
                }
            }
            ToWriter::Return => {
                if let Some(slot) = held.take() {
                    // The computing thread waits for this; if it is gone,
                    // the transaction drops here and rolls back.
                    let _ = back.send(slot);
                }
            }
            ToWriter::End { commit } => {
                let outcome = match held.as_mut() {
                    Some(slot) => slot.end(commit),
                    None => Err(StoreError::WriterLost),
                };
                let _ = outcomes.send((commit, outcome));
            }
        }
    }
}

impl<'t> Behind<'t> {
    /// Runs `job` on the writing thread after the jobs before it; the
    /// computing thread goes on at once.
    pub fn later(&mut self, job: impl FnOnce(&Tx<'t>) -> Result<()> + Send + 't) {
        match &self.writer {
            None => {
                if let Some(slot) = self.held.as_mut() {
                    slot.run(Box::new(job));
                }
            }
            Some(w) => {
                if let Some(slot) = self.held.take() {
                    // A send fails only when the writer is gone (it
                    // panicked); the next `tx` or `outcome` reports that.
                    let _ = w.to_writer.send(ToWriter::Hand(Box::new(slot)));
                }
                let _ = w.to_writer.send(ToWriter::Run(Box::new(job)));
            }
        }
    }

    /// The transaction, once every job handed over has run; the error of
    /// the first job that failed, if one did (the transaction must then be
    /// given up: its end rolls it back).
    pub fn tx(&mut self) -> Result<&Tx<'t>> {
        if self.held.is_none() {
            let w = self.writer.as_ref().ok_or(StoreError::WriterLost)?;
            w.to_writer
                .send(ToWriter::Return)
                .map_err(|_| StoreError::WriterLost)?;
            let slot = w.back.recv().map_err(|_| StoreError::WriterLost)?;
            self.held = Some(slot);
        }
        let slot = self.held.as_mut().ok_or(StoreError::WriterLost)?;
        slot.check()?;
        Ok(&slot.tx)
    }

    /// Ends the current transaction once every job handed over before has
    /// run: commits it, or rolls it back when `commit` is false or a job
    /// failed. Does not wait; [`Behind::outcome`] gives the result.
    pub fn end(&mut self, commit: bool) {
        match &self.writer {
            None => {
                let outcome = match self.held.as_mut() {
                    Some(slot) => slot.end(commit),
                    None => Err(StoreError::WriterLost),
                };
                self.ended.push_back((commit, outcome));
            }
            Some(w) => {
                if let Some(slot) = self.held.take() {
                    let _ = w.to_writer.send(ToWriter::Hand(Box::new(slot)));
                }
                // A failed send shows as a lost writer in `outcome`.
                let _ = w.to_writer.send(ToWriter::End { commit });
            }
        }
    }

    /// The outcome of the oldest end not yet taken (waits for it): `Ok`
    /// when it committed (or rolled back as asked).
    pub fn outcome(&mut self) -> Result<()> {
        let lost = (false, Err(StoreError::WriterLost));
        let (commit, outcome) = match &self.writer {
            None => self.ended.pop_front().unwrap_or(lost),
            Some(w) => w.outcomes.recv().unwrap_or(lost),
        };
        match self.sync_here.as_mut() {
            Some(wal) => durable(wal, commit, outcome),
            None => outcome,
        }
    }

    /// Rolls the current transaction back and waits for it (its outcome
    /// is of no interest: nothing of it is kept either way).
    pub fn roll_back(&mut self) {
        self.end(false);
        let _ = self.outcome();
    }

    /// Commits the current transaction and waits for it.
    pub fn commit(&mut self) -> Result<()> {
        self.end(true);
        self.outcome()
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
        let seen = write_behind(tx, None, |b| {
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
            b.commit().unwrap();
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
        let result = write_behind(tx, None, |b| {
            b.later(entry("kept?".into()));
            b.later(failing());
            b.later(|_| panic!("a job after a failed one must not run"));
            b.commit()
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
        let mut b = on_this_thread(tx, None);
        b.later(entry("a".into()));
        assert_eq!(entries_in(b.tx().unwrap()), 1);
        b.later(failing());
        b.later(|_| panic!("a job after a failed one must not run"));
        let err = b.commit().expect_err("the failed job must surface");
        assert!(err.to_string().contains("no_such_table"), "{err}");
        drop(b);
        assert_eq!(audit_count(&store), 0, "nothing of the transaction is kept");
    }

    #[test]
    fn transactions_follow_one_another_and_a_failed_one_takes_only_itself_down() {
        let mut store = Store::open_in_memory().unwrap();
        let tx = store.begin().unwrap();
        let (outcomes, seen) = write_behind(tx, None, |b| {
            b.later(entry("first".into()));
            b.end(true);
            // Queued before the first commit is known: a transaction of its own.
            b.later(entry("second".into()));
            b.later(failing());
            b.later(|_| panic!("a job after a failed one must not run"));
            b.end(true);
            b.later(entry("third".into()));
            // A read waits for the jobs before it: it sees the first and
            // the third entries, and none of the failed transaction's.
            let seen = entries_in(b.tx().unwrap());
            b.end(true);
            b.later(entry("rolled back on purpose".into()));
            b.end(false);
            let outcomes: Vec<bool> = (0..4).map(|_| b.outcome().is_ok()).collect();
            (outcomes, seen)
        });
        assert_eq!(outcomes, vec![true, false, true, true]);
        assert_eq!(seen, 2);
        assert_eq!(audit_count(&store), 2);
        let entries = store.audit_entries().unwrap();
        assert!(crate::store::verify_chain(&entries).is_ok());
        assert!(store.conn.is_autocommit());
    }

    #[test]
    fn a_transaction_left_with_the_writer_rolls_back() {
        let mut store = Store::open_in_memory().unwrap();
        let tx = store.begin().unwrap();
        write_behind(tx, None, |b| {
            b.later(entry("lost".into()));
            // The body returns without finishing (an early error return).
        });
        assert_eq!(audit_count(&store), 0);
        assert!(store.conn.is_autocommit());
    }

    /// A file-backed store in a fresh folder.
    fn on_disk() -> (tempfile::TempDir, Store) {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::open(&dir.path().join("s.sqlite3")).unwrap();
        (dir, store)
    }

    #[test]
    fn commits_made_durable_by_the_sync_thread_are_kept_and_sync_returns_to_full() {
        let (_dir, mut store) = on_disk();
        let wal = store.commit_without_sync().unwrap();
        // SQLite's numbering: 1 is NORMAL, 2 FULL.
        assert_eq!(store.synchronous().unwrap(), 1);
        let tx = store.begin().unwrap();
        let outcomes = write_behind(tx, Some(wal), |b| {
            let mut outcomes = Vec::new();
            for i in 0..5 {
                b.later(entry(format!("c{i}")));
                b.end(true);
            }
            b.later(entry("rolled back".into()));
            b.end(false);
            for _ in 0..6 {
                outcomes.push(b.outcome().is_ok());
            }
            outcomes
        });
        assert_eq!(outcomes, vec![true; 6]);
        store.commit_with_sync().unwrap();
        assert_eq!(store.synchronous().unwrap(), 2);
        assert_eq!(audit_count(&store), 5);
    }

    #[test]
    fn a_commit_that_cannot_be_made_durable_is_reported_as_failed() {
        let (dir, mut store) = on_disk();
        // A log and a database that do not exist: the fsync cannot happen.
        let wal = WalSync::at(&dir.path().join("gone").join("s.sqlite3"));
        let tx = store.begin().unwrap();
        let (committed, rolled_back) = write_behind(tx, Some(wal), |b| {
            b.later(entry("written".into()));
            let committed = b.commit();
            b.later(entry("undone".into()));
            b.end(false);
            (committed, b.outcome())
        });
        let err = committed.expect_err("an unsynced commit must not be reported done");
        assert!(matches!(err, StoreError::Durability { .. }), "{err}");
        assert!(err.to_string().contains("stays in the inbox"), "{err}");
        // A rollback has nothing to make durable.
        assert!(rolled_back.is_ok());
    }

    #[test]
    fn without_a_syncing_thread_commits_are_made_durable_as_outcomes_are_taken() {
        let (dir, mut store) = on_disk();
        let tx = store.begin().unwrap();
        let wal = WalSync::at(&dir.path().join("gone").join("s.sqlite3"));
        let mut b = on_this_thread(tx, Some(wal));
        b.later(entry("a".into()));
        let err = b
            .commit()
            .expect_err("the sync must run when the outcome is taken");
        assert!(matches!(err, StoreError::Durability { .. }), "{err}");
        b.sync_here = Some(store_wal(&dir));
        b.later(entry("b".into()));
        b.commit().unwrap();
        drop(b);
        assert_eq!(audit_count(&store), 2);
    }

    /// A `Behind` as [`write_behind`] makes it when no thread can be
    /// started.
    fn on_this_thread<'t>(tx: Tx<'t>, sync_here: Option<WalSync>) -> Behind<'t> {
        Behind {
            held: Some(Slot {
                tx,
                open: true,
                health: Health::Fine,
            }),
            writer: None,
            ended: VecDeque::new(),
            sync_here,
        }
    }

    /// A sync for the store of [`on_disk`].
    fn store_wal(dir: &tempfile::TempDir) -> WalSync {
        WalSync::at(&dir.path().join("s.sqlite3"))
    }
}
