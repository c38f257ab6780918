//! Deciding when a file is complete: unchanged across listings for the
//! settle time.
//!
//! Nothing in a file says it is complete, and writers differ: some write in
//! place for minutes, some copy over a slow link, some preserve the source's
//! old modification time. So completeness is judged only from what this
//! process has seen: the same size and modification time in listings at
//! least `settle` apart. A file's own modification time is never compared
//! with the clock (a network share's clock may disagree with ours, and a
//! preserved old time says nothing about the copy in progress), which is
//! also why a backlog found at startup waits one settle time.

use std::collections::hash_map::Entry;
use std::collections::{HashMap, HashSet};
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant, SystemTime};

use super::Candidate;

/// A file that looks complete: its size and modification time have stayed
/// the same for the settle time.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ReadyFile {
    /// The path to open.
    pub path: PathBuf,
    /// The path below the inbox folder.
    pub relative: PathBuf,
    /// Size in bytes when it settled.
    pub size: u64,
    /// Modification time when it settled.
    pub modified: SystemTime,
}

/// What was last seen of one path.
#[derive(Debug)]
struct Seen {
    size: u64,
    modified: SystemTime,
    /// When this size and modification time were first seen.
    since: Instant,
    /// Whether it has been reported ready with this size and time.
    reported: bool,
}

/// Remembers size and modification time per path across listings and
/// reports each file once, when it has been unchanged for the settle time.
///
/// A reported file is not reported again unless it changes, or unless the
/// caller [`forget`](Settler::forget)s it (to retry after a failed attempt
/// that left the file in place). Paths missing from a listing are dropped,
/// so a file that is moved away and later reappears counts as new.
#[derive(Debug)]
pub struct Settler {
    settle: Duration,
    seen: HashMap<PathBuf, Seen>,
}

impl Settler {
    /// A settler requiring `settle` of stability. With zero, a file is ready
    /// the first time it is seen.
    pub fn new(settle: Duration) -> Self {
        Self {
            settle,
            seen: HashMap::new(),
        }
    }

    /// Takes a full listing (from [`list_candidates`](super::list_candidates))
    /// made at `now` and returns the files that became ready, in listing
    /// order.
    pub fn observe(&mut self, scan: Vec<Candidate>, now: Instant) -> Vec<ReadyFile> {
        let mut ready = Vec::new();
        let mut listed = HashSet::with_capacity(scan.len());
        for candidate in scan {
            let seen = match self.seen.entry(candidate.path.clone()) {
                Entry::Vacant(slot) => slot.insert(Seen {
                    size: candidate.size,
                    modified: candidate.modified,
                    since: now,
                    reported: false,
                }),
                Entry::Occupied(slot) => {
                    let seen = slot.into_mut();
                    if seen.size != candidate.size || seen.modified != candidate.modified {
                        *seen = Seen {
                            size: candidate.size,
                            modified: candidate.modified,
                            since: now,
                            reported: false,
                        };
                    }
                    seen
                }
            };
            if !seen.reported && now.saturating_duration_since(seen.since) >= self.settle {
                seen.reported = true;
                ready.push(ReadyFile {
                    path: candidate.path.clone(),
                    relative: candidate.relative,
                    size: candidate.size,
                    modified: candidate.modified,
                });
            }
            listed.insert(candidate.path);
        }
        self.seen.retain(|path, _| listed.contains(path));
        ready
    }

    /// Forgets `path`: the next listing that contains it treats it as new,
    /// so it is reported again once it has been stable for the settle time.
    pub fn forget(&mut self, path: &Path) {
        self.seen.remove(path);
    }

    /// How many files have been seen but are not yet settled: a gauge for
    /// "something is arriving".
    pub fn pending(&self) -> usize {
        self.seen.values().filter(|seen| !seen.reported).count()
    }
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]

    use super::*;
    use crate::inbox::{InboxConfig, list_candidates};
    use std::fs::{self, OpenOptions};
    use std::io::Write;

    const SETTLE: Duration = Duration::from_secs(5);

    struct Inbox {
        dir: tempfile::TempDir,
        cfg: InboxConfig,
        settler: Settler,
        start: Instant,
    }

    impl Inbox {
        fn new() -> Self {
            let dir = tempfile::tempdir().unwrap();
            let mut cfg = InboxConfig::new(dir.path());
            cfg.settle = SETTLE;
            Self {
                dir,
                cfg,
                settler: Settler::new(SETTLE),
                start: Instant::now(),
            }
        }

        fn append(&self, name: &str, text: &str) {
            let mut file = OpenOptions::new()
                .create(true)
                .append(true)
                .open(self.dir.path().join(name))
                .unwrap();
            file.write_all(text.as_bytes()).unwrap();
        }

        /// Lists the inbox and observes the listing `secs` after the start.
        fn ready_at(&mut self, secs: u64) -> Vec<String> {
            let scan = list_candidates(&self.cfg).unwrap();
            let now = self.start + Duration::from_secs(secs);
            self.settler
                .observe(scan, now)
                .into_iter()
                .map(|r| r.relative.to_string_lossy().into_owned())
                .collect()
        }
    }

    #[test]
    fn a_file_is_ready_once_unchanged_for_the_settle_time() {
        let mut inbox = Inbox::new();
        inbox.append("x.csv", "site,value\n");
        assert!(inbox.ready_at(0).is_empty());
        assert_eq!(inbox.settler.pending(), 1);
        assert!(inbox.ready_at(4).is_empty(), "not yet settled");
        assert_eq!(inbox.ready_at(5), ["x.csv"]);
        assert_eq!(inbox.settler.pending(), 0);
    }

    #[test]
    fn a_file_written_slowly_in_pieces_waits_until_the_last_piece_settles() {
        let mut inbox = Inbox::new();
        inbox.append("slow.csv", "site,value\n");
        assert!(inbox.ready_at(0).is_empty());
        inbox.append("slow.csv", "A,1\n");
        assert!(
            inbox.ready_at(5).is_empty(),
            "it grew, so the clock restarts"
        );
        inbox.append("slow.csv", "B,2\n");
        assert!(inbox.ready_at(10).is_empty());
        assert!(inbox.ready_at(14).is_empty());
        assert_eq!(inbox.ready_at(15), ["slow.csv"]);
    }

    #[test]
    fn a_ready_file_is_reported_once() {
        let mut inbox = Inbox::new();
        inbox.append("x.csv", "a\n");
        inbox.ready_at(0);
        assert_eq!(inbox.ready_at(5), ["x.csv"]);
        assert!(inbox.ready_at(10).is_empty());
        assert!(inbox.ready_at(100).is_empty());
    }

    #[test]
    fn a_forgotten_file_is_reported_again_after_settling_again() {
        let mut inbox = Inbox::new();
        inbox.append("x.csv", "a\n");
        inbox.ready_at(0);
        assert_eq!(inbox.ready_at(5), ["x.csv"]);
        inbox.settler.forget(&inbox.dir.path().join("x.csv"));
        assert!(inbox.ready_at(6).is_empty());
        assert_eq!(inbox.ready_at(11), ["x.csv"]);
    }

    #[test]
    fn a_reported_file_that_changes_is_reported_again_once_settled() {
        let mut inbox = Inbox::new();
        inbox.append("x.csv", "a\n");
        inbox.ready_at(0);
        assert_eq!(inbox.ready_at(5), ["x.csv"]);
        inbox.append("x.csv", "b\n");
        assert!(inbox.ready_at(6).is_empty());
        assert_eq!(inbox.ready_at(11), ["x.csv"]);
    }

    #[test]
    fn rename_into_place_is_picked_up_under_the_final_name() {
        let mut inbox = Inbox::new();
        inbox.append("x.csv.part", "site,value\nA,1\n");
        assert!(inbox.ready_at(0).is_empty());
        assert_eq!(
            inbox.settler.pending(),
            0,
            "temp names are not even pending"
        );
        fs::rename(
            inbox.dir.path().join("x.csv.part"),
            inbox.dir.path().join("x.csv"),
        )
        .unwrap();
        assert!(inbox.ready_at(1).is_empty());
        assert_eq!(inbox.ready_at(6), ["x.csv"]);
    }

    #[test]
    fn ready_files_come_in_listing_order_with_their_size() {
        let mut inbox = Inbox::new();
        for name in ["b.csv", "a.csv", "c.csv"] {
            inbox.append(name, name);
        }
        inbox.ready_at(0);
        let scan = list_candidates(&inbox.cfg).unwrap();
        let ready = inbox.settler.observe(scan, inbox.start + SETTLE);
        let names: Vec<_> = ready.iter().map(|r| r.relative.clone()).collect();
        assert_eq!(names, ["a.csv", "b.csv", "c.csv"].map(PathBuf::from));
        assert_eq!(ready[0].size, 5);
        assert_eq!(ready[0].path, inbox.dir.path().join("a.csv"));
    }

    #[test]
    fn a_file_that_vanishes_and_reappears_counts_as_new() {
        let mut inbox = Inbox::new();
        inbox.append("x.csv", "a\n");
        inbox.ready_at(0);
        fs::remove_file(inbox.dir.path().join("x.csv")).unwrap();
        assert!(inbox.ready_at(3).is_empty());
        assert_eq!(inbox.settler.pending(), 0);
        inbox.append("x.csv", "a\n");
        assert!(inbox.ready_at(5).is_empty(), "seen anew at 5 s");
        assert_eq!(inbox.ready_at(10), ["x.csv"]);
    }

    #[test]
    fn zero_settle_reports_on_first_sight() {
        let mut inbox = Inbox::new();
        inbox.settler = Settler::new(Duration::ZERO);
        inbox.append("x.csv", "a\n");
        assert_eq!(inbox.ready_at(0), ["x.csv"]);
    }

    #[test]
    fn a_clock_that_goes_backwards_never_settles_early() {
        let mut inbox = Inbox::new();
        inbox.append("x.csv", "a\n");
        inbox.ready_at(10);
        assert!(inbox.ready_at(0).is_empty());
        assert_eq!(inbox.ready_at(15), ["x.csv"]);
    }
}
