//! Wake-ups from the operating system (or a poller) when the inbox changes.
//!
//! A wake names no file. It only tells the daemon to list the inbox soon, so
//! wakes can be coalesced and dropped freely: one queued wake stands for any
//! number of changes, and the daemon's periodic rescan covers whatever
//! notifications never came (changes made by other machines on a network
//! share, a kernel queue overflow).
//!
//! The callback runs on the watcher's own thread. It only converts and
//! `try_send`s on the bounded channel, and never blocks: a full channel
//! drops the wake (logged at debug level, naming why that is fine).

use std::path::{Path, PathBuf};
use std::sync::mpsc::{SyncSender, TrySendError};
use std::time::Duration;

use notify::event::{AccessKind, AccessMode, EventKind, ModifyKind, RenameMode};
use notify::{PollWatcher, RecommendedWatcher, RecursiveMode, Watcher as _};
use tracing::{debug, warn};

use super::{InboxConfig, InboxError, is_ignored_name};

/// How changes are noticed.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum WatchMode {
    /// The operating system's notifications (inotify, FSEvents,
    /// ReadDirectoryChanges). Cheap and immediate, but blind to changes made
    /// by other machines on a network share.
    Native,
    /// List the tree every `interval` and compare. Works everywhere,
    /// including network shares; costs one listing per interval.
    Poll {
        /// Time between listings; must be above zero.
        interval: Duration,
    },
}

/// A wake-up for the daemon.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Wake {
    /// Something in the inbox changed: list it soon.
    Changed,
    /// The watcher reported a problem (already phrased with what to do);
    /// watching may have stopped for part of the tree, so log it loudly and
    /// keep rescanning periodically.
    Error(String),
}

/// Watches the inbox and sends [`Wake`]s. Dropping it stops watching; the
/// watcher's thread then drops its clone of the sender.
#[derive(Debug)]
pub struct Watcher {
    _backend: Backend,
}

/// The notify watcher, kept alive: each stops its thread when dropped.
#[derive(Debug)]
enum Backend {
    Native { _watcher: RecommendedWatcher },
    Poll { _watcher: PollWatcher },
}

impl Watcher {
    /// Starts watching `cfg.dir` (its subfolders too when `cfg.recursive`),
    /// sending wakes on `tx`. Give `tx` a small capacity: one queued wake is
    /// as good as many.
    ///
    /// Symlinked folders are not watched, so a watch never reaches outside
    /// the inbox; the periodic rescan lists files reached through symlinks.
    pub fn start(
        cfg: &InboxConfig,
        mode: WatchMode,
        tx: SyncSender<Wake>,
    ) -> Result<Watcher, InboxError> {
        match std::fs::metadata(&cfg.dir) {
            Ok(meta) if meta.is_dir() => {}
            Ok(_) => {
                return Err(InboxError::InboxMissing {
                    path: cfg.dir.clone(),
                });
            }
            Err(err) if err.kind() == std::io::ErrorKind::NotFound => {
                return Err(InboxError::InboxMissing {
                    path: cfg.dir.clone(),
                });
            }
            Err(source) => {
                return Err(InboxError::Scan {
                    path: cfg.dir.clone(),
                    source,
                });
            }
        }
        let recursive = if cfg.recursive {
            RecursiveMode::Recursive
        } else {
            RecursiveMode::NonRecursive
        };
        let handler = WakeSender::new(tx, cfg.dir.clone());
        let config = notify::Config::default().with_follow_symlinks(false);
        let failed = |err| InboxError::from_notify(&cfg.dir, err);
        let backend = match mode {
            WatchMode::Native => {
                let mut watcher = RecommendedWatcher::new(handler, config).map_err(failed)?;
                watcher.watch(&cfg.dir, recursive).map_err(failed)?;
                Backend::Native { _watcher: watcher }
            }
            WatchMode::Poll { interval } => {
                if interval.is_zero() {
                    return Err(InboxError::PollInterval { interval });
                }
                let mut watcher = PollWatcher::new(handler, config.with_poll_interval(interval))
                    .map_err(failed)?;
                watcher.watch(&cfg.dir, recursive).map_err(failed)?;
                Backend::Poll { _watcher: watcher }
            }
        };
        Ok(Watcher { _backend: backend })
    }
}

/// What became of one notification.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Delivery {
    /// Queued.
    Sent,
    /// Not worth a wake (a read, a removal, a temporary file).
    Ignored,
    /// The channel was full, so a wake is queued already.
    DroppedFull,
    /// The receiver is gone: the daemon is shutting down.
    Closed,
}

/// The watcher callback: converts and `try_send`s, never blocks.
pub(crate) struct WakeSender {
    tx: SyncSender<Wake>,
    /// The inbox folder, for errors that name no path.
    dir: PathBuf,
    closed_logged: bool,
}

impl WakeSender {
    pub(crate) fn new(tx: SyncSender<Wake>, dir: PathBuf) -> Self {
        Self {
            tx,
            dir,
            closed_logged: false,
        }
    }

    pub(crate) fn deliver(&mut self, event: notify::Result<notify::Event>) -> Delivery {
        let Some(wake) = convert(&self.dir, event) else {
            return Delivery::Ignored;
        };
        match self.tx.try_send(wake) {
            Ok(()) => Delivery::Sent,
            Err(TrySendError::Full(Wake::Changed)) => {
                debug!(
                    "inbox wake dropped: the wake channel is full, so a rescan is already due (and the periodic rescan catches up regardless)"
                );
                Delivery::DroppedFull
            }
            Err(TrySendError::Full(Wake::Error(message))) => {
                // Never lost: logged here since it cannot be queued.
                warn!(error = %message, "inbox watcher error (wake channel full, so logged here)");
                Delivery::DroppedFull
            }
            Err(TrySendError::Disconnected(_)) => {
                if !self.closed_logged {
                    self.closed_logged = true;
                    debug!(
                        "inbox wake receiver is gone; ignoring further changes until the watcher is dropped"
                    );
                }
                Delivery::Closed
            }
        }
    }
}

impl notify::EventHandler for WakeSender {
    fn handle_event(&mut self, event: notify::Result<notify::Event>) {
        // The outcome is logged inside; the watcher's thread has no use for it.
        self.deliver(event);
    }
}

/// Turns a notification into a wake, or `None` when it cannot make a file
/// ready: reads (including our own, when hashing a file), removals and
/// renames away (including our own archive moves), and changes to
/// temporary names only. An event with no paths (such as a kernel queue
/// overflow, which asks for a rescan) always wakes.
pub(crate) fn convert(dir: &Path, event: notify::Result<notify::Event>) -> Option<Wake> {
    let event = match event {
        Ok(event) => event,
        Err(err) => return Some(Wake::Error(InboxError::from_notify(dir, err).to_string())),
    };
    match event.kind {
        // A writer closing the file is the best hint that it is complete.
        EventKind::Access(AccessKind::Close(AccessMode::Write)) => {}
        EventKind::Access(_) | EventKind::Remove(_) => return None,
        EventKind::Modify(ModifyKind::Name(RenameMode::From)) => return None,
        _ => {}
    }
    let all_ignored = !event.paths.is_empty()
        && event
            .paths
            .iter()
            .all(|path| path.file_name().is_some_and(is_ignored_name));
    (!all_ignored).then_some(Wake::Changed)
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]

    use super::*;
    use notify::event::{CreateKind, DataChange, RemoveKind};
    use std::sync::mpsc::{self, RecvTimeoutError};
    use std::time::Instant;

    fn event(kind: EventKind, paths: &[&str]) -> notify::Result<notify::Event> {
        let mut event = notify::Event::new(kind);
        for path in paths {
            event = event.add_path(PathBuf::from(path));
        }
        Ok(event)
    }

    fn created(path: &str) -> notify::Result<notify::Event> {
        event(EventKind::Create(CreateKind::File), &[path])
    }

    /// Waits at most `limit` for the next wake; a watcher error fails the
    /// test.
    fn wait_for_change(rx: &mpsc::Receiver<Wake>, limit: Duration) -> Option<Wake> {
        match rx.recv_timeout(limit) {
            Ok(Wake::Error(message)) => panic!("watcher error: {message}"),
            Ok(wake) => Some(wake),
            Err(_) => None,
        }
    }

    #[test]
    fn changes_to_data_files_wake() {
        let dir = Path::new("/inbox");
        for wakes in [
            created("/inbox/x.csv"),
            event(
                EventKind::Modify(ModifyKind::Data(DataChange::Any)),
                &["/inbox/x.csv"],
            ),
            event(
                EventKind::Access(AccessKind::Close(AccessMode::Write)),
                &["/inbox/x.csv"],
            ),
            event(
                EventKind::Modify(ModifyKind::Name(RenameMode::Both)),
                &["/inbox/x.csv.part", "/inbox/x.csv"],
            ),
            event(
                EventKind::Modify(ModifyKind::Name(RenameMode::To)),
                &["/inbox/x.csv"],
            ),
            event(EventKind::Other, &[]),
        ] {
            assert_eq!(convert(dir, wakes), Some(Wake::Changed));
        }
    }

    #[test]
    fn reads_removals_and_temporary_names_do_not_wake() {
        let dir = Path::new("/inbox");
        for quiet in [
            event(
                EventKind::Access(AccessKind::Open(AccessMode::Read)),
                &["/inbox/x.csv"],
            ),
            event(
                EventKind::Access(AccessKind::Close(AccessMode::Read)),
                &["/inbox/x.csv"],
            ),
            event(EventKind::Remove(RemoveKind::File), &["/inbox/x.csv"]),
            event(
                EventKind::Modify(ModifyKind::Name(RenameMode::From)),
                &["/inbox/x.csv"],
            ),
            created("/inbox/x.csv.part"),
            event(
                EventKind::Modify(ModifyKind::Any),
                &["/inbox/.x.csv.a1B2c3"],
            ),
        ] {
            assert_eq!(convert(dir, quiet), None);
        }
    }

    #[test]
    fn watcher_errors_wake_with_advice() {
        let wake = convert(
            Path::new("/inbox"),
            Err(notify::Error::new(notify::ErrorKind::MaxFilesWatch)),
        );
        let Some(Wake::Error(message)) = wake else {
            panic!("expected an error wake, got {wake:?}");
        };
        assert!(message.contains("fs.inotify.max_user_watches"), "{message}");
    }

    #[test]
    fn a_full_channel_drops_the_wake_without_blocking() {
        let (tx, rx) = mpsc::sync_channel(1);
        let (done_tx, done_rx) = mpsc::channel();
        // On its own thread, so a blocking send fails the test instead of
        // hanging it.
        std::thread::spawn(move || {
            let mut sender = WakeSender::new(tx, PathBuf::from("/inbox"));
            let outcomes = [
                sender.deliver(created("/inbox/a.csv")),
                sender.deliver(created("/inbox/b.csv")),
                sender.deliver(Err(notify::Error::generic("boom"))),
            ];
            done_tx.send(outcomes).unwrap();
        });
        let outcomes = done_rx.recv_timeout(Duration::from_secs(2)).unwrap();
        assert_eq!(
            outcomes,
            [Delivery::Sent, Delivery::DroppedFull, Delivery::DroppedFull]
        );
        assert_eq!(rx.try_recv(), Ok(Wake::Changed));
        assert!(rx.try_recv().is_err(), "only one wake was queued");
    }

    #[test]
    fn a_closed_channel_is_reported_not_a_panic() {
        let (tx, rx) = mpsc::sync_channel(1);
        drop(rx);
        let mut sender = WakeSender::new(tx, PathBuf::from("/inbox"));
        assert_eq!(sender.deliver(created("/inbox/a.csv")), Delivery::Closed);
        assert_eq!(sender.deliver(created("/inbox/b.csv")), Delivery::Closed);
    }

    #[test]
    fn ignored_events_do_not_fill_the_channel() {
        let (tx, rx) = mpsc::sync_channel(1);
        let mut sender = WakeSender::new(tx, PathBuf::from("/inbox"));
        assert_eq!(sender.deliver(created("/inbox/a.part")), Delivery::Ignored);
        assert!(rx.try_recv().is_err());
    }

    fn wakes_on_create(mode: WatchMode) {
        let dir = tempfile::tempdir().unwrap();
        let (tx, rx) = mpsc::sync_channel(4);
        let watcher = Watcher::start(&InboxConfig::new(dir.path()), mode, tx).unwrap();
        std::fs::write(dir.path().join("new.csv"), "site,value\n").unwrap();
        assert_eq!(
            wait_for_change(&rx, Duration::from_secs(3)),
            Some(Wake::Changed),
            "no wake within 3 s in {mode:?} mode"
        );
        drop(watcher);
        // Dropping stops the watcher's thread, which drops its sender.
        let deadline = Instant::now() + Duration::from_secs(3);
        loop {
            let left = deadline.saturating_duration_since(Instant::now());
            match rx.recv_timeout(left) {
                Ok(_) => continue,
                Err(RecvTimeoutError::Disconnected) => break,
                Err(RecvTimeoutError::Timeout) => {
                    panic!("{mode:?} watcher still running after drop")
                }
            }
        }
    }

    #[test]
    fn native_watcher_wakes_when_a_file_is_created_and_stops_when_dropped() {
        wakes_on_create(WatchMode::Native);
    }

    #[test]
    fn poll_watcher_wakes_when_a_file_is_created_and_stops_when_dropped() {
        wakes_on_create(WatchMode::Poll {
            interval: Duration::from_millis(50),
        });
    }

    #[test]
    fn native_watcher_wakes_for_files_in_subfolders_when_recursive() {
        let dir = tempfile::tempdir().unwrap();
        std::fs::create_dir(dir.path().join("lab")).unwrap();
        let mut cfg = InboxConfig::new(dir.path());
        cfg.recursive = true;
        let (tx, rx) = mpsc::sync_channel(4);
        let _watcher = Watcher::start(&cfg, WatchMode::Native, tx).unwrap();
        std::fs::write(dir.path().join("lab/new.csv"), "site,value\n").unwrap();
        assert_eq!(
            wait_for_change(&rx, Duration::from_secs(3)),
            Some(Wake::Changed)
        );
    }

    #[test]
    fn starting_on_a_missing_inbox_says_so() {
        let dir = tempfile::tempdir().unwrap();
        let (tx, _rx) = mpsc::sync_channel(1);
        let cfg = InboxConfig::new(dir.path().join("missing"));
        let err = Watcher::start(&cfg, WatchMode::Native, tx).unwrap_err();
        assert!(matches!(err, InboxError::InboxMissing { .. }), "{err:?}");
    }

    #[test]
    fn a_zero_poll_interval_is_refused() {
        let dir = tempfile::tempdir().unwrap();
        let (tx, _rx) = mpsc::sync_channel(1);
        let mode = WatchMode::Poll {
            interval: Duration::ZERO,
        };
        let err = Watcher::start(&InboxConfig::new(dir.path()), mode, tx).unwrap_err();
        assert!(matches!(err, InboxError::PollInterval { .. }), "{err:?}");
    }
}
