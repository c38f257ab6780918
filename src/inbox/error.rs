//! What can go wrong in the inbox, and what to do about it.

use std::io;
use std::path::{Path, PathBuf};
use std::time::Duration;

use thiserror::Error;

/// Why an inbox operation failed.
///
/// [`InboxError::Vanished`] is not a failure for the caller: the file was
/// taken away (or renamed) by someone else, so there is nothing to do. The
/// watcher variants are setup errors that stop the daemon; the rest concern
/// one file, which stays in the inbox to be tried again.
#[derive(Debug, Error)]
pub enum InboxError {
    /// The inbox folder is missing or is not a folder.
    #[error(
        "{path}: the inbox folder does not exist or is not a folder; create it, mount the share, or fix the inbox path in the configuration",
        path = path.display()
    )]
    InboxMissing {
        /// The configured inbox folder.
        path: PathBuf,
    },
    /// The inbox folder exists but cannot be listed.
    #[error(
        "{path}: cannot list the inbox folder: {source}; check its permissions and that the share is reachable",
        path = path.display()
    )]
    Scan {
        /// The folder.
        path: PathBuf,
        /// The operating system's reason.
        source: io::Error,
    },
    /// Another file operation on or in the inbox failed (creating the
    /// folder, inspecting a path given on the command line).
    #[error(
        "{path}: {source}; check that it exists and that the daemon's user may read and write it",
        path = path.display()
    )]
    Io {
        /// The path.
        path: PathBuf,
        /// The operating system's reason.
        source: io::Error,
    },
    /// The file disappeared before it could be read or moved. Nothing to do.
    #[error("{path}: the file vanished before it could be handled; nothing to do", path = path.display())]
    Vanished {
        /// The file.
        path: PathBuf,
    },
    /// The file is larger than the configured limit.
    #[error(
        "{path}: the file is {size} bytes, above the limit of {max} bytes; split it into smaller files or raise the file size limit in the configuration",
        path = path.display()
    )]
    TooLarge {
        /// The file.
        path: PathBuf,
        /// Its size in bytes (when it grew while being read: the bytes read
        /// before giving up).
        size: u64,
        /// The limit in bytes.
        max: u64,
    },
    /// The file could not be read.
    #[error("{path}: cannot read the file: {source}; check its permissions", path = path.display())]
    Read {
        /// The file.
        path: PathBuf,
        /// The operating system's reason.
        source: io::Error,
    },
    /// The file could not be moved to the archive or to quarantine.
    #[error(
        "{path}: cannot move the file to {dest}: {source}; check that the destination is writable and has free space (the file stays in the inbox and is tried again)",
        path = path.display(),
        dest = dest.display()
    )]
    Move {
        /// The file.
        path: PathBuf,
        /// Where it was going (a folder, or the final name once reserved).
        dest: PathBuf,
        /// The operating system's reason.
        source: io::Error,
    },
    /// Every numbered variant of the name is already taken.
    #[error(
        "{dir}: no free name for `{name}` after {tries} numbered tries; clear old files out of that folder",
        dir = dir.display()
    )]
    NoFreeName {
        /// The destination folder.
        dir: PathBuf,
        /// The file name wanted.
        name: String,
        /// How many names were tried.
        tries: u32,
    },
    /// The quarantine reason file could not be written.
    #[error(
        "{path}: cannot write the quarantine reason: {source}; check that the quarantine folder is writable and has free space",
        path = path.display()
    )]
    Reason {
        /// The reason file.
        path: PathBuf,
        /// The operating system's reason.
        source: io::Error,
    },
    /// The kernel's limit on inotify watches was reached.
    #[error(
        "{path}: inotify watch limit reached; raise fs.inotify.max_user_watches (sysctl) or use watch mode = \"poll\"",
        path = path.display()
    )]
    WatchLimit {
        /// The folder being watched.
        path: PathBuf,
    },
    /// No more inotify instances or open files for this user or process.
    #[error(
        "{path}: too many inotify instances or open files; raise fs.inotify.max_user_instances (sysctl) or the open-file limit (ulimit -n), or use watch mode = \"poll\"",
        path = path.display()
    )]
    WatcherLimit {
        /// The folder being watched.
        path: PathBuf,
    },
    /// The poll interval is zero, which would rescan in a busy loop.
    #[error(
        "poll interval {interval:?} would rescan in a busy loop; set the watch poll interval above zero, e.g. to a few seconds"
    )]
    PollInterval {
        /// The interval given.
        interval: Duration,
    },
    /// Watching failed for another reason.
    #[error(
        "{path}: cannot watch the folder: {source}; if it is on a network share, use watch mode = \"poll\"",
        path = path.display()
    )]
    Watch {
        /// The folder being watched.
        path: PathBuf,
        /// What the watcher reported.
        source: notify::Error,
    },
}

/// `EMFILE`: the same number on Linux, the BSDs and macOS. Not exposed by
/// `std`, and the crate does not depend on `libc` for one constant.
#[cfg(unix)]
const EMFILE: i32 = 24;

impl InboxError {
    /// Whether this error means "the file is gone, nothing to do".
    pub fn is_vanished(&self) -> bool {
        matches!(self, Self::Vanished { .. })
    }

    /// Converts a watcher error, naming the limit to raise when it is one.
    pub(crate) fn from_notify(path: &Path, err: notify::Error) -> Self {
        let path = err
            .paths
            .first()
            .map_or_else(|| path.to_owned(), Clone::clone);
        match &err.kind {
            notify::ErrorKind::MaxFilesWatch => Self::WatchLimit { path },
            #[cfg(unix)]
            notify::ErrorKind::Io(io) if io.raw_os_error() == Some(EMFILE) => {
                Self::WatcherLimit { path }
            }
            notify::ErrorKind::PathNotFound => Self::InboxMissing { path },
            _ => Self::Watch { path, source: err },
        }
    }

    /// Converts an error reading `path`: a missing file has vanished.
    pub(crate) fn read(path: &Path, source: io::Error) -> Self {
        if source.kind() == io::ErrorKind::NotFound {
            Self::Vanished {
                path: path.to_owned(),
            }
        } else {
            Self::Read {
                path: path.to_owned(),
                source,
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn watch_limit_error_says_which_sysctl_to_raise() {
        let err = InboxError::from_notify(
            Path::new("/srv/inbox"),
            notify::Error::new(notify::ErrorKind::MaxFilesWatch),
        );
        assert!(matches!(err, InboxError::WatchLimit { .. }));
        let text = err.to_string();
        assert!(text.contains("fs.inotify.max_user_watches"), "{text}");
        assert!(text.contains("watch mode = \"poll\""), "{text}");
        assert!(text.starts_with("/srv/inbox:"), "{text}");
    }

    #[cfg(unix)]
    #[test]
    fn too_many_open_files_error_names_the_instance_limit() {
        let err = InboxError::from_notify(
            Path::new("/srv/inbox"),
            notify::Error::io(io::Error::from_raw_os_error(EMFILE)),
        );
        assert!(matches!(err, InboxError::WatcherLimit { .. }));
        assert!(err.to_string().contains("fs.inotify.max_user_instances"));
    }

    #[test]
    fn watcher_error_prefers_the_path_it_reports() {
        let err = InboxError::from_notify(
            Path::new("/srv/inbox"),
            notify::Error::new(notify::ErrorKind::MaxFilesWatch)
                .add_path(PathBuf::from("/srv/inbox/deep")),
        );
        assert!(err.to_string().starts_with("/srv/inbox/deep:"));
    }

    #[test]
    fn missing_file_reads_as_vanished() {
        let err = InboxError::read(Path::new("x.csv"), io::ErrorKind::NotFound.into());
        assert!(err.is_vanished());
        let err = InboxError::read(Path::new("x.csv"), io::ErrorKind::PermissionDenied.into());
        assert!(!err.is_vanished());
        assert!(err.to_string().contains("permissions"));
    }
}
