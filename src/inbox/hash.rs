//! Reading a ready file once: its content hash and its bytes.

use std::fs::File;
use std::io::Read;
use std::path::Path;

use sha2::{Digest, Sha256};

use super::InboxError;

/// Reads the whole file at `path` once and returns its SHA-256 (lower-case
/// hex), its size in bytes and its bytes.
///
/// The bytes are held in memory: inbox files are at most a few hundred MB,
/// and the records stage needs all of them anyway. Anything larger than
/// `max_bytes` is refused with [`InboxError::TooLarge`] before a byte is
/// read, and a file that grows past the limit while being read is refused
/// too, so memory stays bounded whatever lands in the inbox.
///
/// A file that no longer exists is [`InboxError::Vanished`].
pub fn sha256_file(path: &Path, max_bytes: u64) -> Result<(String, u64, Vec<u8>), InboxError> {
    let file = File::open(path).map_err(|err| InboxError::read(path, err))?;
    hash_open(path, file, max_bytes)
}

/// As [`sha256_file`] for a file listed below `root` (the inbox, or a
/// folder given to `ingest`): the path is opened without following a
/// symlink (O_NOFOLLOW), and a path that is a symlink is opened at its
/// resolved target only when that lies below `root`. A file swapped for a
/// link to somewhere else after it was listed is never read.
pub fn read_below(
    path: &Path,
    root: &Path,
    max_bytes: u64,
) -> Result<(String, u64, Vec<u8>), InboxError> {
    use std::os::unix::fs::OpenOptionsExt;
    let open_nofollow = |p: &Path| {
        std::fs::OpenOptions::new()
            .read(true)
            .custom_flags(libc::O_NOFOLLOW)
            .open(p)
    };
    let link = std::fs::symlink_metadata(path)
        .map(|m| m.file_type().is_symlink())
        .map_err(|err| InboxError::read(path, err))?;
    let file = if link {
        let target = std::fs::canonicalize(path).map_err(|err| InboxError::read(path, err))?;
        let inside = std::fs::canonicalize(root).is_ok_and(|r| target.starts_with(r));
        if !inside {
            let err = std::io::Error::new(
                std::io::ErrorKind::PermissionDenied,
                "it is a link that leads outside the inbox; only links to files inside are followed",
            );
            return Err(InboxError::read(path, err));
        }
        open_nofollow(&target)
    } else {
        open_nofollow(path)
    }
    .map_err(|err| InboxError::read(path, err))?;
    hash_open(path, file, max_bytes)
}

fn hash_open(
    path: &Path,
    file: File,
    max_bytes: u64,
) -> Result<(String, u64, Vec<u8>), InboxError> {
    let meta = file.metadata().map_err(|err| InboxError::read(path, err))?;
    if !meta.is_file() {
        let err = std::io::Error::new(std::io::ErrorKind::InvalidInput, "not a regular file");
        return Err(InboxError::read(path, err));
    }
    let declared = meta.len();
    let too_large = |size| InboxError::TooLarge {
        path: path.to_owned(),
        size,
        max: max_bytes,
    };
    if declared > max_bytes {
        return Err(too_large(declared));
    }
    // A capacity hint only: a size that does not fit in memory fails at read.
    let mut bytes = Vec::with_capacity(usize::try_from(declared).unwrap_or(0));
    file.take(max_bytes.saturating_add(1))
        .read_to_end(&mut bytes)
        .map_err(|err| InboxError::read(path, err))?;
    let size = bytes.len() as u64;
    if size > max_bytes {
        return Err(too_large(size));
    }
    let digest = Sha256::digest(&bytes);
    Ok((hex::encode(digest), size, bytes))
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]

    use super::*;
    use std::fs;

    #[test]
    fn hashes_and_returns_the_bytes() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("a b;$(x).csv");
        fs::write(&path, "abc").unwrap();
        let (hash, size, bytes) = sha256_file(&path, 1024).unwrap();
        // FIPS 180-2, appendix B.1: SHA-256("abc").
        assert_eq!(
            hash,
            "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
        );
        assert_eq!(size, 3);
        assert_eq!(bytes, b"abc");
    }

    #[test]
    fn an_empty_file_hashes_to_the_empty_digest() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("empty.csv");
        fs::write(&path, "").unwrap();
        let (hash, size, bytes) = sha256_file(&path, 0).unwrap();
        assert_eq!(
            hash,
            "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"
        );
        assert_eq!((size, bytes.len()), (0, 0));
    }

    #[test]
    fn a_file_above_the_limit_is_refused_naming_size_and_limit() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("big.csv");
        fs::write(&path, "0123456789").unwrap();
        let err = sha256_file(&path, 9).unwrap_err();
        assert!(
            matches!(&err, InboxError::TooLarge { size: 10, max: 9, path: p } if *p == path),
            "{err:?}"
        );
        assert!(err.to_string().contains("10 bytes"), "{err}");
        assert_eq!(
            sha256_file(&path, 10).unwrap().1,
            10,
            "the limit itself is allowed"
        );
    }

    #[test]
    fn a_file_deleted_before_hashing_has_vanished() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("x.csv");
        fs::write(&path, "a").unwrap();
        let listed =
            crate::inbox::list_candidates(&crate::inbox::InboxConfig::new(dir.path())).unwrap();
        assert_eq!(listed.len(), 1);
        fs::remove_file(&path).unwrap();
        let err = sha256_file(&listed[0].path, 1024).unwrap_err();
        assert!(err.is_vanished(), "{err:?}");
    }

    #[test]
    fn a_folder_is_a_read_error_not_a_vanished_file() {
        let dir = tempfile::tempdir().unwrap();
        let err = sha256_file(dir.path(), 1024).unwrap_err();
        assert!(matches!(err, InboxError::Read { .. }), "{err:?}");
    }
}
