//! Moving a handled file out of the inbox: to the archive, or to quarantine
//! with a note saying why.
//!
//! # Never overwriting
//!
//! A destination name is reserved before the move by creating an empty
//! file with `create_new` (atomic on local filesystems and on NFS and SMB),
//! trying `name`, `name-2`, `name-3`... The move then replaces that empty
//! placeholder, never anything else, even if two daemons share a folder.
//!
//! # Crash safety
//!
//! The file stays in the inbox until its move is complete. A rename is
//! atomic; across filesystems the copy is written and fsynced, and its
//! folder fsynced, before the original is removed. A crash can leave an
//! empty placeholder (or, in quarantine, a placeholder with its reason)
//! beside the folder's real files, and the file in the inbox, which is then
//! handled again on restart: harmless, since its content hash is stored.

use std::ffi::{OsStr, OsString};
use std::fs::{self, File, OpenOptions};
use std::io::{self, Write};
use std::path::{Path, PathBuf};
use std::time::{SystemTime, UNIX_EPOCH};

use tracing::{debug, warn};

use super::InboxError;

/// The ending of the note written beside a quarantined file:
/// `x.csv` gets `x.csv.reason.txt`.
pub const REASON_SUFFIX: &str = ".reason.txt";

/// How many numbered names to try before giving up on a folder.
const MAX_TRIES: u32 = 10_000;

/// Moves `path`, whose records are durably committed, to
/// `archive_root/YYYY/MM/<name>` where YYYY and MM are `arrival`'s UTC year
/// and month. Never overwrites: on a clash the name gets `-2`, `-3`...
/// before its extension. Works across filesystems. Returns the final path.
///
/// A symlink (allowed only when it resolves inside the inbox) is archived as
/// a copy of its target's content, and the link is removed: the archive
/// holds data, never links.
pub fn move_to_archive(
    path: &Path,
    archive_root: &Path,
    arrival: SystemTime,
) -> Result<PathBuf, InboxError> {
    let (name, dir) = prepare(path, archive_root, arrival)?;
    let dest = reserve(path, &dir, name)?;
    transfer(path, &dest)?;
    Ok(dest)
}

/// As [`move_to_archive`], for a file listed below `inbox` whose content,
/// as read and stored, is `content`: a path that has become a link to
/// somewhere outside `inbox` since it was read is archived from `content`
/// (the link's target is never read or copied) and the link removed.
pub fn archive_from_inbox(
    path: &Path,
    inbox: &Path,
    archive_root: &Path,
    arrival: SystemTime,
    content: Option<&mut dyn io::Read>,
) -> Result<PathBuf, InboxError> {
    let (name, dir) = prepare(path, archive_root, arrival)?;
    let dest = reserve(path, &dir, name)?;
    if leads_outside(path, inbox) {
        warn!(path = %path.display(), "the file became a link leading outside the inbox after it was read; the content as read is archived, the link's target is not read");
        let moved = match content {
            Some(content) => write_then_remove(content, path, &dest),
            None => fs::rename(path, &dest),
        };
        return match moved {
            Ok(()) => {
                if let Some(folder) = dest.parent() {
                    sync_dir_after_move(folder);
                }
                Ok(dest)
            }
            Err(source) => {
                remove_ours(&dest);
                Err(InboxError::Move {
                    path: path.to_owned(),
                    dest,
                    source,
                })
            }
        };
    }
    transfer(path, &dest)?;
    Ok(dest)
}

/// Writes `content` to `dest` durably, then removes `path` (a link).
fn write_then_remove(content: &mut dyn io::Read, path: &Path, dest: &Path) -> io::Result<()> {
    let mut to = OpenOptions::new().write(true).truncate(true).open(dest)?;
    io::copy(content, &mut to)?;
    to.sync_all()?;
    drop(to);
    if let Some(folder) = dest.parent() {
        sync_dir(folder)?;
    }
    match fs::remove_file(path) {
        Err(err) if err.kind() == io::ErrorKind::NotFound => Ok(()),
        other => other,
    }
}

/// Whether `path` is a symlink whose target is not below `inbox`.
fn leads_outside(path: &Path, inbox: &Path) -> bool {
    let is_link = fs::symlink_metadata(path).is_ok_and(|m| m.file_type().is_symlink());
    if !is_link {
        return false;
    }
    match (fs::canonicalize(path), fs::canonicalize(inbox)) {
        (Ok(target), Ok(root)) => !target.starts_with(root),
        _ => true,
    }
}

fn rename_link(path: &Path, dest: &Path) -> Result<(), InboxError> {
    // `reserve` left an empty placeholder at `dest`; rename replaces it.
    fs::rename(path, dest).map_err(|source| {
        remove_ours(dest);
        InboxError::Move {
            path: path.to_owned(),
            dest: dest.to_owned(),
            source,
        }
    })?;
    if let Some(folder) = dest.parent() {
        sync_dir_after_move(folder);
    }
    Ok(())
}

/// Moves an unreadable `path` to `quarantine_root/YYYY/MM/<name>` (same
/// naming and no-overwrite rule as [`move_to_archive`]) and writes `reason`
/// to `<final name>.reason.txt` beside it. The reason file is written and
/// fsynced before the data file moves, so a quarantined file never lacks
/// its reason. Returns the data file's final path.
pub fn move_to_quarantine(
    path: &Path,
    quarantine_root: &Path,
    arrival: SystemTime,
    reason: &str,
) -> Result<PathBuf, InboxError> {
    let (name, dir) = prepare(path, quarantine_root, arrival)?;
    let (dest, reason_path) = reserve_with_reason(path, &dir, name)?;
    let written = write_reason(&reason_path, reason).and_then(|()| sync_dir(&dir));
    if let Err(source) = written {
        remove_ours(&reason_path);
        remove_ours(&dest);
        return Err(InboxError::Reason {
            path: reason_path,
            source,
        });
    }
    let moved = if fs::symlink_metadata(path).is_ok_and(|m| m.file_type().is_symlink()) {
        // A link is quarantined as a link: its target is never read.
        rename_link(path, &dest)
    } else {
        transfer(path, &dest)
    };
    if let Err(err) = moved {
        remove_ours(&reason_path);
        return Err(err);
    }
    Ok(dest)
}

/// Checks the source is there and creates the month folder. Returns the
/// file name and the folder.
fn prepare<'a>(
    path: &'a Path,
    root: &Path,
    arrival: SystemTime,
) -> Result<(&'a OsStr, PathBuf), InboxError> {
    let (year, month) = utc_year_month(arrival);
    let dir = root.join(format!("{year:04}")).join(format!("{month:02}"));
    let move_error = |source| InboxError::Move {
        path: path.to_owned(),
        dest: dir.clone(),
        source,
    };
    let name = path.file_name().ok_or_else(|| {
        move_error(io::Error::new(
            io::ErrorKind::InvalidInput,
            "the path has no file name",
        ))
    })?;
    // Checked before touching the destination, so a vanished file leaves no
    // placeholder behind.
    fs::symlink_metadata(path).map_err(|err| InboxError::read(path, err))?;
    let existed = dir.is_dir();
    fs::create_dir_all(&dir).map_err(move_error)?;
    if !existed {
        // New folders must be durable too, or a crash could lose the entry
        // of the folder that holds the file.
        for folder in dir.ancestors().skip(1).take(2) {
            sync_dir_after_move(folder);
        }
    }
    Ok((name, dir))
}

/// Reserves the first free numbered name for `name` in `dir` by creating
/// an empty file there.
fn reserve(path: &Path, dir: &Path, name: &OsStr) -> Result<PathBuf, InboxError> {
    for n in 1..=MAX_TRIES {
        let dest = dir.join(numbered(name, n));
        if create_new(path, &dest)? {
            return Ok(dest);
        }
    }
    Err(no_free_name(dir, name))
}

/// Like [`reserve`], for a name whose reason file name is free too.
/// Returns the data and reason paths; both files exist, empty.
fn reserve_with_reason(
    path: &Path,
    dir: &Path,
    name: &OsStr,
) -> Result<(PathBuf, PathBuf), InboxError> {
    for n in 1..=MAX_TRIES {
        let dest = dir.join(numbered(name, n));
        let reason = reason_path(&dest);
        if exists(&reason) || !create_new(path, &dest)? {
            continue;
        }
        match create_new(path, &reason) {
            Ok(true) => return Ok((dest, reason)),
            // Someone else took the reason name meanwhile: move on.
            Ok(false) => remove_ours(&dest),
            Err(err) => {
                remove_ours(&dest);
                return Err(err);
            }
        }
    }
    Err(no_free_name(dir, name))
}

/// Creates an empty file at `dest` unless something is there already:
/// `Ok(false)` when the name is taken.
fn create_new(path: &Path, dest: &Path) -> Result<bool, InboxError> {
    match OpenOptions::new().write(true).create_new(true).open(dest) {
        Ok(_) => Ok(true),
        Err(err) if err.kind() == io::ErrorKind::AlreadyExists => Ok(false),
        Err(source) => Err(InboxError::Move {
            path: path.to_owned(),
            dest: dest.to_owned(),
            source,
        }),
    }
}

fn no_free_name(dir: &Path, name: &OsStr) -> InboxError {
    InboxError::NoFreeName {
        dir: dir.to_owned(),
        name: name.to_string_lossy().into_owned(),
        tries: MAX_TRIES,
    }
}

/// Whether anything (even a dangling symlink) has this name. An error other
/// than "not found" counts as taken, to stay on the safe side.
fn exists(path: &Path) -> bool {
    !matches!(fs::symlink_metadata(path), Err(err) if err.kind() == io::ErrorKind::NotFound)
}

/// `name` for the first try, then `stem-n.ext` (or `name-n` without an
/// extension): `a.b.csv` becomes `a.b-2.csv`.
fn numbered(name: &OsStr, n: u32) -> OsString {
    if n <= 1 {
        return name.to_owned();
    }
    let as_path = Path::new(name);
    let mut out = OsString::new();
    match (as_path.file_stem(), as_path.extension()) {
        (Some(stem), Some(ext)) => {
            out.push(stem);
            out.push(format!("-{n}."));
            out.push(ext);
        }
        _ => {
            out.push(name);
            out.push(format!("-{n}"));
        }
    }
    out
}

/// `x.csv` -> `x.csv.reason.txt`, beside it.
fn reason_path(dest: &Path) -> PathBuf {
    let mut name = dest.as_os_str().to_owned();
    name.push(REASON_SUFFIX);
    PathBuf::from(name)
}

fn write_reason(reason_path: &Path, reason: &str) -> io::Result<()> {
    let mut file = OpenOptions::new().write(true).open(reason_path)?;
    file.write_all(reason.as_bytes())?;
    if !reason.ends_with('\n') {
        file.write_all(b"\n")?;
    }
    file.sync_all()
}

/// Moves `path` onto the reserved placeholder `dest`. On failure the
/// placeholder is removed and `path` is left where it was.
fn transfer(path: &Path, dest: &Path) -> Result<(), InboxError> {
    let outcome = fs::symlink_metadata(path).and_then(|meta| {
        if meta.file_type().is_symlink() {
            return copy_then_remove(path, dest);
        }
        sync_source(path);
        match fs::rename(path, dest) {
            Ok(()) => {
                if let Some(folder) = dest.parent() {
                    sync_dir_after_move(folder);
                }
                Ok(())
            }
            Err(err) if err.kind() == io::ErrorKind::CrossesDevices => copy_then_remove(path, dest),
            Err(err) => Err(err),
        }
    });
    match outcome {
        Ok(()) => {
            if let Some(folder) = path.parent() {
                sync_dir_after_move(folder);
            }
            Ok(())
        }
        Err(source) => {
            remove_ours(dest);
            if exists(path) {
                Err(InboxError::Move {
                    path: path.to_owned(),
                    dest: dest.to_owned(),
                    source,
                })
            } else {
                Err(InboxError::Vanished {
                    path: path.to_owned(),
                })
            }
        }
    }
}

/// The move across filesystems (or out of a symlink): copy into the
/// placeholder, make the copy durable, then remove the original.
fn copy_then_remove(path: &Path, dest: &Path) -> io::Result<()> {
    let mut from = File::open(path)?;
    let mut to = OpenOptions::new().write(true).truncate(true).open(dest)?;
    io::copy(&mut from, &mut to)?;
    // Keep the original's modification time, as a rename would.
    if let Err(err) = from
        .metadata()
        .and_then(|meta| meta.modified())
        .and_then(|modified| to.set_modified(modified))
    {
        debug!(path = %dest.display(), error = %err, "could not keep the modification time of the copy");
    }
    to.sync_all()?;
    drop(to);
    // The copy's folder entry must be durable before the original goes.
    if let Some(folder) = dest.parent() {
        sync_dir(folder)?;
    }
    match fs::remove_file(path) {
        // Gone already: the copy is all there is, which is what we wanted.
        Err(err) if err.kind() == io::ErrorKind::NotFound => Ok(()),
        other => other,
    }
}

/// Flushes the source's data before it is renamed, so the archived copy
/// survives a power cut (its writer may never have fsynced it). Best effort:
/// some filesystems refuse fsync on a file opened for reading.
fn sync_source(path: &Path) {
    if let Err(err) = File::open(path).and_then(|file| file.sync_all()) {
        debug!(path = %path.display(), error = %err, "could not fsync the file before moving it");
    }
}

/// Makes a folder's entries durable. A filesystem that cannot fsync a
/// folder (some network and FUSE filesystems answer "invalid argument")
/// gives nothing better to do, so that counts as done.
fn sync_dir(dir: &Path) -> io::Result<()> {
    #[cfg(unix)]
    {
        match File::open(dir).and_then(|folder| folder.sync_all()) {
            Err(err)
                if matches!(
                    err.kind(),
                    io::ErrorKind::InvalidInput | io::ErrorKind::Unsupported
                ) =>
            {
                debug!(folder = %dir.display(), error = %err, "this filesystem cannot fsync a folder");
                Ok(())
            }
            other => other,
        }
    }
    // Windows has no portable way to open a folder for flushing; NTFS
    // journals its metadata.
    #[cfg(not(unix))]
    {
        let _ = dir;
        Ok(())
    }
}

/// [`sync_dir`] once the move has happened: failing it cannot undo the
/// move, and the caller needs the final path, so it is logged, not returned.
fn sync_dir_after_move(dir: &Path) {
    if let Err(err) = sync_dir(dir) {
        warn!(folder = %dir.display(), error = %err, "file moved, but the folder could not be flushed; the move may not survive a power cut");
    }
}

/// Removes a file this module created (a placeholder or a reason note) after
/// a failure. Failing that leaves an empty file, which is logged.
fn remove_ours(path: &Path) {
    match fs::remove_file(path) {
        Ok(()) => {}
        Err(err) if err.kind() == io::ErrorKind::NotFound => {}
        Err(err) => {
            warn!(path = %path.display(), error = %err, "could not remove a leftover placeholder; delete it by hand")
        }
    }
}

/// The UTC civil year and month of `time`, valid for any `SystemTime`.
/// (Days to civil date after Howard Hinnant's `civil_from_days`.)
fn utc_year_month(time: SystemTime) -> (i64, u32) {
    let seconds = match time.duration_since(UNIX_EPOCH) {
        Ok(after) => i64::try_from(after.as_secs()).unwrap_or(i64::MAX),
        Err(before) => {
            let before = before.duration();
            let whole = i64::try_from(before.as_secs()).unwrap_or(i64::MAX);
            // -0.5 s is in the second before the epoch, not the epoch's.
            -whole.saturating_add(i64::from(before.subsec_nanos() > 0))
        }
    };
    let days = seconds.div_euclid(86_400);
    // Shift to an era starting on 0000-03-01 so leap days end each year.
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let day_of_era = z.rem_euclid(146_097);
    let year_of_era =
        (day_of_era - day_of_era / 1_460 + day_of_era / 36_524 - day_of_era / 146_096) / 365;
    let day_of_year = day_of_era - (365 * year_of_era + year_of_era / 4 - year_of_era / 100);
    let march_based_month = (5 * day_of_year + 2) / 153;
    let month = if march_based_month < 10 {
        march_based_month + 3
    } else {
        march_based_month - 9
    };
    let year = year_of_era + era * 400 + i64::from(month <= 2);
    let month = u32::try_from(month).expect("BUG: the civil month is computed in 1..=12");
    (year, month)
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]

    use super::*;
    use std::time::Duration;

    fn at(seconds: u64) -> SystemTime {
        UNIX_EPOCH + Duration::from_secs(seconds)
    }

    /// 2024-05-17T12:00:00Z.
    fn may_2024() -> SystemTime {
        at(1_715_947_200)
    }

    fn names_in(dir: &Path) -> Vec<String> {
        let mut names: Vec<_> = fs::read_dir(dir)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        names.sort();
        names
    }

    #[test]
    fn utc_year_and_month_match_known_dates() {
        assert_eq!(utc_year_month(UNIX_EPOCH), (1970, 1));
        assert_eq!(utc_year_month(at(951_782_400)), (2000, 2), "2000-02-29");
        assert_eq!(utc_year_month(at(951_868_800)), (2000, 3), "2000-03-01");
        assert_eq!(utc_year_month(at(1_704_067_199)), (2023, 12));
        assert_eq!(utc_year_month(at(1_704_067_200)), (2024, 1));
        assert_eq!(utc_year_month(at(4_107_542_400)), (2100, 3), "2100-03-01");
        assert_eq!(
            utc_year_month(UNIX_EPOCH - Duration::from_millis(500)),
            (1969, 12)
        );
        assert_eq!(
            utc_year_month(UNIX_EPOCH - Duration::from_secs(86_400 * 365)),
            (1969, 1)
        );
    }

    #[test]
    fn utc_month_changes_exactly_at_each_month_start_over_four_centuries() {
        // Walks every day from 1900 to 2300 against a calendar kept by hand.
        let days_in = |y: i64, m: u32| match m {
            2 if (y % 4 == 0 && y % 100 != 0) || y % 400 == 0 => 29,
            2 => 28,
            4 | 6 | 9 | 11 => 30,
            _ => 31,
        };
        let mut seconds: i64 = -2_208_988_800; // 1900-01-01
        for year in 1900..2300 {
            for month in 1..=12 {
                let start = if seconds >= 0 {
                    UNIX_EPOCH + Duration::from_secs(seconds.unsigned_abs())
                } else {
                    UNIX_EPOCH - Duration::from_secs(seconds.unsigned_abs())
                };
                assert_eq!(utc_year_month(start), (year, month));
                let last = start - Duration::from_secs(1);
                assert_ne!(utc_year_month(last), (year, month));
                seconds += days_in(year, month) * 86_400;
            }
        }
    }

    #[test]
    fn numbered_names_keep_the_extension_last() {
        let n = |name: &str, k| numbered(OsStr::new(name), k).into_string().unwrap();
        assert_eq!(n("x.csv", 1), "x.csv");
        assert_eq!(n("x.csv", 2), "x-2.csv");
        assert_eq!(n("a.b.csv", 3), "a.b-3.csv");
        assert_eq!(n("README", 2), "README-2");
        assert_eq!(n("a b;$(x).csv", 2), "a b;$(x)-2.csv");
    }

    #[test]
    fn archiving_moves_the_file_into_year_and_month_keeping_its_content() {
        let inbox = tempfile::tempdir().unwrap();
        let archive = tempfile::tempdir().unwrap();
        let src = inbox.path().join("wells.csv");
        fs::write(&src, "site,value\nA,1\n").unwrap();

        let dest = move_to_archive(&src, archive.path(), may_2024()).unwrap();

        assert_eq!(dest, archive.path().join("2024/05/wells.csv"));
        assert_eq!(fs::read_to_string(&dest).unwrap(), "site,value\nA,1\n");
        assert!(!src.exists());
        assert_eq!(names_in(&archive.path().join("2024/05")), ["wells.csv"]);
    }

    #[test]
    fn an_archive_name_clash_gets_a_numbered_name_and_overwrites_nothing() {
        let inbox = tempfile::tempdir().unwrap();
        let archive = tempfile::tempdir().unwrap();
        let src = inbox.path().join("wells.csv");
        let mut dests = Vec::new();
        for content in ["first", "second", "third"] {
            fs::write(&src, content).unwrap();
            dests.push(move_to_archive(&src, archive.path(), may_2024()).unwrap());
        }
        let month = archive.path().join("2024/05");
        assert_eq!(
            dests,
            [
                month.join("wells.csv"),
                month.join("wells-2.csv"),
                month.join("wells-3.csv")
            ]
        );
        for (dest, content) in dests.iter().zip(["first", "second", "third"]) {
            assert_eq!(fs::read_to_string(dest).unwrap(), content);
        }
    }

    #[test]
    fn names_with_spaces_non_ascii_and_shell_metacharacters_are_archived_as_is() {
        let inbox = tempfile::tempdir().unwrap();
        let archive = tempfile::tempdir().unwrap();
        for name in ["a b;$(x).csv", "données été.csv", "井戸 `rm -rf` & 'q'.csv"] {
            let src = inbox.path().join(name);
            fs::write(&src, name).unwrap();
            let dest = move_to_archive(&src, archive.path(), may_2024()).unwrap();
            assert_eq!(dest.file_name().unwrap(), name);
            assert_eq!(fs::read_to_string(&dest).unwrap(), name);
        }
    }

    #[test]
    fn a_file_gone_before_archiving_has_vanished_and_leaves_nothing_behind() {
        let inbox = tempfile::tempdir().unwrap();
        let archive = tempfile::tempdir().unwrap();
        let err = move_to_archive(&inbox.path().join("gone.csv"), archive.path(), may_2024())
            .unwrap_err();
        assert!(err.is_vanished(), "{err:?}");
        assert!(names_in(archive.path()).is_empty());
    }

    #[test]
    fn a_failed_move_removes_its_placeholder_and_leaves_the_file_in_the_inbox() {
        let inbox = tempfile::tempdir().unwrap();
        let archive = tempfile::tempdir().unwrap();
        // A folder in the inbox cannot be renamed onto a file placeholder.
        let src = inbox.path().join("odd.csv");
        fs::create_dir(&src).unwrap();
        let err = move_to_archive(&src, archive.path(), may_2024()).unwrap_err();
        assert!(matches!(err, InboxError::Move { .. }), "{err:?}");
        assert!(err.to_string().contains("tried again"), "{err}");
        assert!(src.is_dir());
        assert!(names_in(&archive.path().join("2024/05")).is_empty());
    }

    #[test]
    fn the_copy_path_used_across_filesystems_preserves_content_and_time() {
        let inbox = tempfile::tempdir().unwrap();
        let archive = tempfile::tempdir().unwrap();
        let src = inbox.path().join("x.csv");
        fs::write(&src, "site,value\nA,1\n").unwrap();
        let old = at(1_600_000_000);
        File::options()
            .write(true)
            .open(&src)
            .unwrap()
            .set_modified(old)
            .unwrap();
        let dest = archive.path().join("x.csv");
        assert!(create_new(&src, &dest).unwrap());

        copy_then_remove(&src, &dest).unwrap();

        assert_eq!(fs::read_to_string(&dest).unwrap(), "site,value\nA,1\n");
        assert_eq!(fs::metadata(&dest).unwrap().modified().unwrap(), old);
        assert!(!src.exists());
    }

    #[test]
    fn quarantine_writes_the_reason_beside_the_file() {
        let inbox = tempfile::tempdir().unwrap();
        let quarantine = tempfile::tempdir().unwrap();
        let src = inbox.path().join("bad.csv");
        fs::write(&src, "\u{0}\u{1}").unwrap();

        let dest = move_to_quarantine(&src, quarantine.path(), may_2024(), "not UTF-8").unwrap();

        assert_eq!(dest, quarantine.path().join("2024/05/bad.csv"));
        assert_eq!(fs::read(&dest).unwrap(), b"\0\x01");
        let reason = quarantine.path().join("2024/05/bad.csv.reason.txt");
        assert_eq!(fs::read_to_string(reason).unwrap(), "not UTF-8\n");
        assert!(!src.exists());
    }

    #[test]
    fn a_quarantine_clash_numbers_both_the_file_and_its_reason() {
        let inbox = tempfile::tempdir().unwrap();
        let quarantine = tempfile::tempdir().unwrap();
        let src = inbox.path().join("bad.csv");
        for reason in ["first", "second"] {
            fs::write(&src, reason).unwrap();
            move_to_quarantine(&src, quarantine.path(), may_2024(), reason).unwrap();
        }
        let month = quarantine.path().join("2024/05");
        assert_eq!(
            names_in(&month),
            [
                "bad-2.csv",
                "bad-2.csv.reason.txt",
                "bad.csv",
                "bad.csv.reason.txt"
            ]
        );
        assert_eq!(
            fs::read_to_string(month.join("bad-2.csv.reason.txt")).unwrap(),
            "second\n"
        );
        assert_eq!(
            fs::read_to_string(month.join("bad-2.csv")).unwrap(),
            "second"
        );
    }

    #[test]
    fn an_orphan_reason_note_is_never_overwritten() {
        let inbox = tempfile::tempdir().unwrap();
        let quarantine = tempfile::tempdir().unwrap();
        let month = quarantine.path().join("2024/05");
        fs::create_dir_all(&month).unwrap();
        fs::write(month.join("bad.csv.reason.txt"), "older note\n").unwrap();
        let src = inbox.path().join("bad.csv");
        fs::write(&src, "x").unwrap();

        let dest = move_to_quarantine(&src, quarantine.path(), may_2024(), "new").unwrap();

        assert_eq!(dest, month.join("bad-2.csv"));
        assert_eq!(
            fs::read_to_string(month.join("bad.csv.reason.txt")).unwrap(),
            "older note\n"
        );
        assert!(!month.join("bad.csv").exists());
    }

    #[test]
    fn a_file_gone_before_quarantine_has_vanished_and_leaves_no_reason() {
        let inbox = tempfile::tempdir().unwrap();
        let quarantine = tempfile::tempdir().unwrap();
        let err = move_to_quarantine(
            &inbox.path().join("gone.csv"),
            quarantine.path(),
            may_2024(),
            "r",
        )
        .unwrap_err();
        assert!(err.is_vanished(), "{err:?}");
        assert!(names_in(quarantine.path()).is_empty());
    }

    #[cfg(unix)]
    #[test]
    fn an_archived_symlink_becomes_a_copy_and_its_target_stays() {
        let inbox = tempfile::tempdir().unwrap();
        let archive = tempfile::tempdir().unwrap();
        let target = inbox.path().join("real.csv");
        fs::write(&target, "site,value\n").unwrap();
        let link = inbox.path().join("link.csv");
        std::os::unix::fs::symlink("real.csv", &link).unwrap();

        let dest = move_to_archive(&link, archive.path(), may_2024()).unwrap();

        assert!(
            !fs::symlink_metadata(&dest)
                .unwrap()
                .file_type()
                .is_symlink()
        );
        assert_eq!(fs::read_to_string(&dest).unwrap(), "site,value\n");
        assert!(fs::symlink_metadata(&link).is_err(), "the link is gone");
        assert_eq!(fs::read_to_string(&target).unwrap(), "site,value\n");
    }
}
