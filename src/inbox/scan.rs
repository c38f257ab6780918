//! Listing the inbox: which names count, which files are candidates.

use std::ffi::OsStr;
use std::fs::{self, ReadDir};
use std::io;
use std::path::{Path, PathBuf};
use std::time::SystemTime;

use tracing::{debug, warn};

use super::{InboxConfig, InboxError};
use crate::inbox::moves::REASON_SUFFIX;

/// A regular file found in the inbox, with what the settle logic compares.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Candidate {
    /// The path to open: the inbox folder joined with `relative`.
    pub path: PathBuf,
    /// The path below the inbox folder, as listed (a symlink keeps its own
    /// name, not its target's).
    pub relative: PathBuf,
    /// Size in bytes (of the target, for a symlink).
    pub size: u64,
    /// Last modification time (of the target, for a symlink).
    pub modified: SystemTime,
}

/// Name endings that mark a file still being written, or our own output.
/// `.filepart` is what WinSCP uploads into before renaming: a stalled upload
/// leaves one behind that is stable but truncated.
const IGNORED_SUFFIXES: [&[u8]; 4] = [b".part", b".filepart", b".tmp", REASON_SUFFIX.as_bytes()];

/// Whether a file or folder name is never a candidate: temporary names that
/// copy and upload tools write into before renaming (`*.part`,
/// `*.filepart`, `*.tmp`, `~*`), hidden names (`.*`, files and folders
/// alike, which covers rsync's `.name.XXXXXX` and editors' lock files), and
/// our own quarantine notes (`*.reason.txt`). Endings are matched without
/// regard to ASCII case, since Windows tools write `.TMP`.
pub fn is_ignored_name(name: &OsStr) -> bool {
    let bytes = name.as_encoded_bytes();
    match bytes.first() {
        None | Some(b'.') | Some(b'~') => true,
        Some(_) => IGNORED_SUFFIXES.iter().any(|suffix| {
            bytes.len() >= suffix.len()
                && bytes[bytes.len() - suffix.len()..].eq_ignore_ascii_case(suffix)
        }),
    }
}

/// Lists the candidate files in the inbox: regular files whose names are
/// not ignored, in subfolders too when `cfg.recursive`, and symlinks to
/// files that resolve inside the inbox when `cfg.follow_symlinks_inside`
/// (symlinks to folders are never entered: a folder inside the inbox is
/// listed under its real path anyway). Sorted by
/// relative path in byte order, so a backlog replays in the order a
/// date-stamped naming scheme wrote it.
///
/// Only an unreadable inbox folder is an error. A file or subfolder that
/// vanishes mid-listing is skipped silently (it is gone); one that cannot be
/// read is skipped with a warning and tried again on the next listing.
pub fn list_candidates(cfg: &InboxConfig) -> Result<Vec<Candidate>, InboxError> {
    list_candidates_noting(cfg, &mut Reported::default())
}

/// [`list_candidates`] for repeated listings: problems already in
/// `reported` are logged at debug level only.
pub fn list_candidates_noting(
    cfg: &InboxConfig,
    reported: &mut Reported,
) -> Result<Vec<Candidate>, InboxError> {
    let missing = || InboxError::InboxMissing {
        path: cfg.dir.clone(),
    };
    let root = fs::canonicalize(&cfg.dir).map_err(|source| match source.kind() {
        io::ErrorKind::NotFound | io::ErrorKind::NotADirectory => missing(),
        _ => InboxError::Scan {
            path: cfg.dir.clone(),
            source,
        },
    })?;
    let top = fs::read_dir(&cfg.dir).map_err(|source| match source.kind() {
        io::ErrorKind::NotFound | io::ErrorKind::NotADirectory => missing(),
        _ => InboxError::Scan {
            path: cfg.dir.clone(),
            source,
        },
    })?;

    let mut walk = Walk {
        cfg,
        reported,
        root,
        found: Vec::new(),
        pending: Vec::new(),
    };
    walk.entries(top, &cfg.dir, Path::new(""));
    while let Some((dir, relative)) = walk.pending.pop() {
        match fs::read_dir(&dir) {
            Ok(entries) => walk.entries(entries, &dir, &relative),
            Err(err) if err.kind() == io::ErrorKind::NotFound => {}
            Err(err) => {
                warn!(folder = %dir.display(), error = %err, "cannot list inbox subfolder; skipped until the next scan")
            }
        }
    }

    let mut found = walk.found;
    found.sort_by(|a, b| {
        a.relative
            .as_os_str()
            .as_encoded_bytes()
            .cmp(b.relative.as_os_str().as_encoded_bytes())
    });
    Ok(found)
}

/// One listing in progress.
struct Walk<'a> {
    cfg: &'a InboxConfig,
    reported: &'a mut Reported,
    /// The inbox folder with every symlink resolved.
    root: PathBuf,
    found: Vec<Candidate>,
    /// Folders still to list: (path, path below the inbox).
    pending: Vec<(PathBuf, PathBuf)>,
}

impl Walk<'_> {
    fn entries(&mut self, entries: ReadDir, dir: &Path, relative: &Path) {
        for entry in entries {
            let entry = match entry {
                Ok(entry) => entry,
                Err(err) => {
                    warn!(folder = %dir.display(), error = %err, "cannot read an inbox folder entry; skipped until the next scan");
                    continue;
                }
            };
            let name = entry.file_name();
            if is_ignored_name(&name) {
                continue;
            }
            let path = dir.join(&name);
            let relative = relative.join(&name);
            // `DirEntry::file_type` does not follow symlinks.
            let file_type = match entry.file_type() {
                Ok(file_type) => file_type,
                Err(err) => {
                    skip_unreadable(&path, &err);
                    continue;
                }
            };
            if file_type.is_symlink() {
                self.symlink(path, relative);
            } else if file_type.is_dir() {
                if self.cfg.recursive {
                    self.pending.push((path, relative));
                }
            } else if file_type.is_file() {
                match entry.metadata() {
                    Ok(meta) => self.push(path, relative, &meta),
                    Err(err) => skip_unreadable(&path, &err),
                }
            } else {
                debug!(path = %path.display(), "not a regular file (socket, FIFO or device); skipped");
            }
        }
    }

    fn symlink(&mut self, path: PathBuf, relative: PathBuf) {
        if !self.cfg.follow_symlinks_inside {
            debug!(path = %path.display(), "symlink skipped: following symlinks is turned off");
            return;
        }
        let target = match fs::canonicalize(&path) {
            Ok(target) => target,
            Err(err) => {
                warn!(path = %path.display(), error = %err, "symlink leads nowhere; skipped");
                return;
            }
        };
        if !target.starts_with(&self.root) {
            if self.reported.first(&path) {
                warn!(path = %path.display(), target = %target.display(), "symlink leads outside the inbox; skipped, and not reported again while it stays (copy the file into the inbox instead)");
            } else {
                debug!(path = %path.display(), "symlink leads outside the inbox; skipped");
            }
            return;
        }
        match fs::metadata(&target) {
            Ok(meta) if meta.is_file() => self.push(path, relative, &meta),
            // A folder inside the inbox is listed under its real path already;
            // entering it again would list its files twice, in an order that
            // depends on the directory's hash order, and could loop.
            Ok(meta) if meta.is_dir() => {
                debug!(path = %path.display(), "symlink to a folder inside the inbox; its files are listed under their real path")
            }
            Ok(_) => {
                debug!(path = %path.display(), "symlink to something other than a file; skipped")
            }
            Err(err) => skip_unreadable(&path, &err),
        }
    }

    fn push(&mut self, path: PathBuf, relative: PathBuf, meta: &fs::Metadata) {
        match meta.modified() {
            Ok(modified) => self.found.push(Candidate {
                path,
                relative,
                size: meta.len(),
                modified,
            }),
            // Without a modification time, completeness cannot be judged.
            Err(err) => {
                warn!(path = %path.display(), error = %err, "no modification time on this filesystem; skipped")
            }
        }
    }
}

/// A file that vanished mid-listing is gone, not a problem; anything else is
/// worth a warning, and the next listing tries again.
fn skip_unreadable(path: &Path, err: &io::Error) {
    if err.kind() != io::ErrorKind::NotFound {
        warn!(path = %path.display(), error = %err, "cannot inspect inbox entry; skipped until the next scan");
    }
}

/// Links already reported as leading outside the inbox, kept by a caller
/// that lists the same inbox again and again (the daemon), so that a link
/// left in place is logged once, not at every rescan for months. Bounded:
/// past 10,000 paths it starts afresh (each is then reported once more).
#[derive(Debug, Default)]
pub struct Reported {
    links_outside: std::collections::HashSet<PathBuf>,
}

impl Reported {
    /// Whether `path` is reported for the first time.
    fn first(&mut self, path: &Path) -> bool {
        if self.links_outside.len() >= 10_000 {
            self.links_outside.clear();
        }
        self.links_outside.insert(path.to_path_buf())
    }
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]

    use super::*;
    use std::ffi::OsString;

    fn relatives(cfg: &InboxConfig) -> Vec<String> {
        list_candidates(cfg)
            .unwrap()
            .into_iter()
            .map(|c| c.relative.to_string_lossy().into_owned())
            .collect()
    }

    #[test]
    fn temp_hidden_and_reason_names_are_ignored() {
        for name in [
            "x.part",
            "x.csv.part",
            "x.PART",
            "x.tmp",
            "x.TMP",
            "x.csv.filepart",
            "~x.csv",
            "~$report.csv",
            ".x.csv",
            ".x.csv.Ab12Cd",
            ".~lock.x.csv#",
            ".git",
            "x.csv.reason.txt",
            "",
        ] {
            assert!(
                is_ignored_name(OsStr::new(name)),
                "{name:?} should be ignored"
            );
        }
        for name in [
            "x.csv",
            "part",
            "x.partial.csv",
            "tmp.csv",
            "reason.txt",
            "a b;$(x).csv",
            "données été.csv",
        ] {
            assert!(!is_ignored_name(OsStr::new(name)), "{name:?} should count");
        }
    }

    #[cfg(unix)]
    #[test]
    fn non_utf8_names_are_judged_by_their_bytes() {
        use std::os::unix::ffi::OsStringExt;
        assert!(!is_ignored_name(&OsString::from_vec(
            b"caf\xe9.csv".to_vec()
        )));
        assert!(is_ignored_name(&OsString::from_vec(
            b"caf\xe9.part".to_vec()
        )));
    }

    #[test]
    fn lists_files_with_size_and_relative_path_skipping_ignored_ones() {
        let dir = tempfile::tempdir().unwrap();
        fs::write(dir.path().join("b.csv"), "12345").unwrap();
        fs::write(dir.path().join("a.csv.part"), "1").unwrap();
        fs::write(dir.path().join(".hidden.csv"), "1").unwrap();
        let found = list_candidates(&InboxConfig::new(dir.path())).unwrap();
        assert_eq!(found.len(), 1);
        assert_eq!(found[0].relative, Path::new("b.csv"));
        assert_eq!(found[0].path, dir.path().join("b.csv"));
        assert_eq!(found[0].size, 5);
    }

    #[test]
    fn subfolders_are_listed_only_when_recursive() {
        let dir = tempfile::tempdir().unwrap();
        fs::create_dir_all(dir.path().join("lab/2024")).unwrap();
        fs::create_dir(dir.path().join(".sync")).unwrap();
        fs::write(dir.path().join("top.csv"), "1").unwrap();
        fs::write(dir.path().join("lab/2024/deep.csv"), "1").unwrap();
        fs::write(dir.path().join(".sync/hidden.csv"), "1").unwrap();

        let mut cfg = InboxConfig::new(dir.path());
        assert_eq!(relatives(&cfg), ["top.csv"]);
        cfg.recursive = true;
        assert_eq!(relatives(&cfg), ["lab/2024/deep.csv", "top.csv"]);
    }

    #[test]
    fn candidates_are_sorted_by_relative_path_bytes() {
        let dir = tempfile::tempdir().unwrap();
        fs::create_dir(dir.path().join("a")).unwrap();
        for name in [
            "b.csv",
            "a-c.csv",
            "a/b.csv",
            "B.csv",
            "2024-01-02.csv",
            "2024-01-10.csv",
        ] {
            fs::write(dir.path().join(name), "1").unwrap();
        }
        let mut cfg = InboxConfig::new(dir.path());
        cfg.recursive = true;
        // '-' (0x2d) sorts before '/' (0x2f): byte order, not path-component order.
        assert_eq!(
            relatives(&cfg),
            [
                "2024-01-02.csv",
                "2024-01-10.csv",
                "B.csv",
                "a-c.csv",
                "a/b.csv",
                "b.csv"
            ]
        );
    }

    #[test]
    fn names_with_spaces_non_ascii_and_shell_metacharacters_are_listed() {
        let dir = tempfile::tempdir().unwrap();
        let names = ["a b;$(x).csv", "données été.csv", "井戸 `rm -rf` & 'q'.csv"];
        for name in names {
            fs::write(dir.path().join(name), name).unwrap();
        }
        let found = list_candidates(&InboxConfig::new(dir.path())).unwrap();
        assert_eq!(found.len(), 3);
        for c in &found {
            let name = c.relative.to_str().unwrap();
            assert!(names.contains(&name), "{name}");
            assert_eq!(fs::read_to_string(&c.path).unwrap(), name);
        }
    }

    #[test]
    fn a_missing_inbox_is_an_error_saying_what_to_do() {
        let dir = tempfile::tempdir().unwrap();
        let err = list_candidates(&InboxConfig::new(dir.path().join("nope"))).unwrap_err();
        assert!(matches!(err, InboxError::InboxMissing { .. }), "{err:?}");
        assert!(err.to_string().contains("create it"), "{err}");
    }

    #[test]
    fn an_inbox_path_that_is_a_file_is_reported_missing() {
        let dir = tempfile::tempdir().unwrap();
        let file = dir.path().join("inbox");
        fs::write(&file, "").unwrap();
        let err = list_candidates(&InboxConfig::new(file)).unwrap_err();
        assert!(matches!(err, InboxError::InboxMissing { .. }), "{err:?}");
    }

    #[cfg(unix)]
    mod unix {
        use super::*;
        use std::os::unix::fs::symlink;

        #[test]
        fn a_link_leading_outside_is_reported_once_per_path() {
            let dir = tempfile::tempdir().unwrap();
            let a = dir.path().join("first-link.csv");
            let b = dir.path().join("second-link.csv");
            let mut reported = Reported::default();
            assert!(reported.first(&a));
            assert!(!reported.first(&a));
            assert!(reported.first(&b));
            assert!(!reported.first(&a) && !reported.first(&b));
        }

        #[test]
        fn symlink_to_a_file_outside_the_inbox_is_skipped() {
            let outside = tempfile::tempdir().unwrap();
            let inbox = tempfile::tempdir().unwrap();
            fs::write(outside.path().join("secret.csv"), "1").unwrap();
            symlink(
                outside.path().join("secret.csv"),
                inbox.path().join("link.csv"),
            )
            .unwrap();
            // A relative link climbing out counts as outside too.
            symlink(
                "../../../../../etc/hostname",
                inbox.path().join("climb.csv"),
            )
            .unwrap();
            assert!(relatives(&InboxConfig::new(inbox.path())).is_empty());
        }

        #[test]
        fn symlink_to_a_file_inside_is_followed_only_when_allowed() {
            let inbox = tempfile::tempdir().unwrap();
            fs::create_dir(inbox.path().join(".store")).unwrap();
            fs::write(inbox.path().join(".store/real.csv"), "123").unwrap();
            symlink(".store/real.csv", inbox.path().join("link.csv")).unwrap();

            let mut cfg = InboxConfig::new(inbox.path());
            let found = list_candidates(&cfg).unwrap();
            assert_eq!(found.len(), 1);
            assert_eq!(found[0].relative, Path::new("link.csv"));
            assert_eq!(found[0].size, 3, "size is the target's");

            cfg.follow_symlinks_inside = false;
            assert!(relatives(&cfg).is_empty());
        }

        #[test]
        fn an_inbox_reached_through_a_symlink_still_follows_links_inside() {
            let real = tempfile::tempdir().unwrap();
            let elsewhere = tempfile::tempdir().unwrap();
            let inbox = elsewhere.path().join("inbox");
            symlink(real.path(), &inbox).unwrap();
            fs::write(real.path().join("a.csv"), "1").unwrap();
            symlink(real.path().join("a.csv"), real.path().join("b.csv")).unwrap();
            assert_eq!(relatives(&InboxConfig::new(&inbox)), ["a.csv", "b.csv"]);
        }

        #[test]
        fn dangling_symlinks_are_skipped() {
            let inbox = tempfile::tempdir().unwrap();
            symlink("gone.txt", inbox.path().join("x.csv")).unwrap();
            assert!(relatives(&InboxConfig::new(inbox.path())).is_empty());
        }

        #[test]
        fn folder_symlinks_are_not_entered_so_loops_and_duplicates_cannot_happen() {
            let inbox = tempfile::tempdir().unwrap();
            fs::create_dir(inbox.path().join("sub")).unwrap();
            fs::write(inbox.path().join("sub/x.csv"), "1").unwrap();
            symlink("..", inbox.path().join("sub/up")).unwrap();
            symlink("sub", inbox.path().join("again")).unwrap();
            let mut cfg = InboxConfig::new(inbox.path());
            cfg.recursive = true;
            assert_eq!(relatives(&cfg), ["sub/x.csv"]);
        }

        #[test]
        fn sockets_and_other_special_files_are_skipped() {
            let inbox = tempfile::tempdir().unwrap();
            let _listener =
                std::os::unix::net::UnixListener::bind(inbox.path().join("sock.csv")).unwrap();
            fs::write(inbox.path().join("x.csv"), "1").unwrap();
            assert_eq!(relatives(&InboxConfig::new(inbox.path())), ["x.csv"]);
        }
    }
}
