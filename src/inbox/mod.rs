//! The inbox: finds complete files that field crews and labs drop into a
//! folder, wakes the pipeline when something changes there, and moves each
//! file to the archive or to quarantine once it has been dealt with.
//!
//! # How a file travels
//!
//! 1. A [`Watcher`] turns the operating system's notifications (or a
//!    poller's) into [`Wake`]s on a bounded channel. A wake names no file: it
//!    only says "rescan soon". Its callback never blocks; when the channel is
//!    full the wake is dropped, because the one already queued (or the
//!    daemon's periodic rescan) leads to the same rescan.
//! 2. [`list_candidates`] lists the inbox. The listing, not the events, is
//!    the source of truth: events get lost (queue overflow, changes made by
//!    other machines on a network share, a full channel), a listing does not.
//! 3. A [`Settler`] remembers size and modification time per path across
//!    listings and reports a [`ReadyFile`] once both have stayed unchanged
//!    for the settle time, so a file still being written or copied is left
//!    alone. It never reads the clock: the caller passes `now`.
//! 4. [`sha256_file`] (or [`read_below`]) reads a ready file once,
//!    returning its hash and bytes; a large one is opened with
//!    [`open_below`] and read in pieces through a [`HashingReader`], which
//!    hashes what passes and, read a second time, fails at the end if the
//!    content is not what was hashed the first time.
//! 5. After the file's records are committed, [`move_to_archive`]; when the
//!    file cannot be read as records, [`move_to_quarantine`] with a reason.
//!
//! # Invariants
//!
//! - **Never interprets contents.** Bytes are read only by [`sha256_file`]
//!   and its siblings, and by a [`HashingReader`]; both hand them on
//!   untouched.
//! - **Never overwrites** anything in the archive or quarantine: a clash gets
//!   a numbered name, reserved atomically before the move.
//! - **Never follows a symlink out of the inbox**, and never reads anything
//!   but regular files (a FIFO would block the daemon forever).
//! - **No clock reads in the settle logic**, and no global state.
//! - **A crash at any point loses nothing**: a file is in the inbox until its
//!   move is complete, so the worst case is processing it again, which the
//!   stored content hash makes harmless.
//!
//! # Configuration notes
//!
//! The archive and quarantine folders must not lie inside a recursively
//! listed inbox, or archived files would be listed again; configuration
//! validation has to reject that, this module cannot tell. On a network share, native notifications only report changes made
//! by this machine: use [`WatchMode::Poll`] there, or rely on the periodic
//! rescan.

mod error;
mod hash;
mod moves;
mod scan;
mod settle;
pub mod space;
mod watch;

use std::path::PathBuf;
use std::time::Duration;

pub use error::InboxError;
pub use hash::{HashingReader, open_below, read_below, read_opened, sha256_file, size_within};
pub use moves::{REASON_SUFFIX, archive_from_inbox, move_to_archive, move_to_quarantine};
pub use scan::{Candidate, Reported, is_ignored_name, list_candidates, list_candidates_noting};
pub use settle::{ReadyFile, Settler};
pub use watch::{Wake, WatchMode, Watcher};

/// Where the inbox is and how to read it.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct InboxConfig {
    /// The folder files are dropped into.
    pub dir: PathBuf,
    /// Whether files in subfolders count too (dot-folders never do).
    pub recursive: bool,
    /// How long a file's size and modification time must stay unchanged
    /// before it is taken to be complete.
    pub settle: Duration,
    /// Whether symlinks that resolve inside `dir` are followed. Symlinks
    /// that lead outside are never followed.
    pub follow_symlinks_inside: bool,
}

impl InboxConfig {
    /// The settle time used by [`InboxConfig::new`]. Generous, because a
    /// network client may flush a copy in bursts seconds apart, and nobody
    /// waits on a monitoring record by the second.
    pub const DEFAULT_SETTLE: Duration = Duration::from_secs(10);

    /// A non-recursive inbox at `dir` with the default settle time that
    /// follows symlinks resolving inside it.
    pub fn new(dir: impl Into<PathBuf>) -> Self {
        Self {
            dir: dir.into(),
            recursive: false,
            settle: Self::DEFAULT_SETTLE,
            follow_symlinks_inside: true,
        }
    }
}
