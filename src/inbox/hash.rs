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
    read_opened(path, file, max_bytes)
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
    let file = open_below(path, root)?;
    read_opened(path, file, max_bytes)
}

/// Opens a file listed below `root` as [`read_below`] does, without
/// reading it.
pub fn open_below(path: &Path, root: &Path) -> Result<File, InboxError> {
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
    if link {
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
    .map_err(|err| InboxError::read(path, err))
}

/// The size of an opened file, which must be a regular file no larger
/// than `max_bytes`.
pub fn size_within(path: &Path, file: &File, max_bytes: u64) -> Result<u64, InboxError> {
    let meta = file.metadata().map_err(|err| InboxError::read(path, err))?;
    if !meta.is_file() {
        let err = std::io::Error::new(std::io::ErrorKind::InvalidInput, "not a regular file");
        return Err(InboxError::read(path, err));
    }
    let declared = meta.len();
    if declared > max_bytes {
        return Err(InboxError::TooLarge {
            path: path.to_owned(),
            size: declared,
            max: max_bytes,
        });
    }
    Ok(declared)
}

/// Reads a file opened with [`open_below`] whole: as [`read_below`].
pub fn read_opened(
    path: &Path,
    file: File,
    max_bytes: u64,
) -> Result<(String, u64, Vec<u8>), InboxError> {
    let declared = size_within(path, &file, max_bytes)?;
    // A capacity hint only: a size that does not fit in memory fails at read.
    let mut bytes = Vec::with_capacity(usize::try_from(declared).unwrap_or(0));
    let mut reader = HashingReader::new(file, max_bytes, None);
    reader
        .read_to_end(&mut bytes)
        .map_err(|err| InboxError::read(path, err))?;
    let (sha, _) = reader.finish_within(path, max_bytes)?;
    Ok((sha, bytes.len() as u64, bytes))
}

/// Reads a file from its start while hashing what it reads, never more
/// than one byte past `max_bytes` (so that a file growing while it is
/// read is noticed, not read without end). With an expected hash, reaching
/// the end with a different content is a read error: the file changed
/// since it was hashed.
pub struct HashingReader<R> {
    inner: std::io::Take<R>,
    hasher: Sha256,
    read: u64,
    expect: Option<String>,
}

impl<R: Read> HashingReader<R> {
    /// Reads `inner` from where it stands.
    pub fn new(inner: R, max_bytes: u64, expect: Option<String>) -> Self {
        HashingReader {
            inner: inner.take(max_bytes.saturating_add(1)),
            hasher: Sha256::new(),
            read: 0,
            expect,
        }
    }

    /// Reads the rest, then the SHA-256 (lower-case hex) and the size of
    /// all that was read.
    pub fn finish(mut self) -> std::io::Result<(String, u64)> {
        std::io::copy(&mut self, &mut std::io::sink())?;
        Ok((hex::encode(self.hasher.finalize()), self.read))
    }

    /// [`HashingReader::finish`] for the file at `path`, which must not
    /// have grown past `max_bytes` while it was read.
    pub fn finish_within(self, path: &Path, max_bytes: u64) -> Result<(String, u64), InboxError> {
        let (sha, size) = self.finish().map_err(|err| InboxError::read(path, err))?;
        if size > max_bytes {
            return Err(InboxError::TooLarge {
                path: path.to_owned(),
                size,
                max: max_bytes,
            });
        }
        Ok((sha, size))
    }
}

impl<R: Read> Read for HashingReader<R> {
    fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
        let n = self.inner.read(buf)?;
        if n == 0 {
            if let Some(expect) = self.expect.take()
                && hex::encode(self.hasher.clone().finalize()) != expect
            {
                return Err(std::io::Error::other(
                    "its content changed while it was being read (two reads gave different SHA-256 hashes)",
                ));
            }
            return Ok(0);
        }
        self.hasher.update(buf.get(..n).unwrap_or_default());
        self.read += n as u64;
        Ok(n)
    }
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

    #[test]
    fn a_hashing_reader_hashes_what_it_reads_and_notices_a_change() {
        // FIPS 180-2, appendix B.1: SHA-256("abc").
        let abc = "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad";
        let mut first = HashingReader::new(&b"abc"[..], 1024, None);
        let mut one = [0u8; 1];
        assert_eq!(first.read(&mut one).unwrap(), 1);
        // The rest is read by finish.
        assert_eq!(first.finish().unwrap(), (abc.to_string(), 3));
        // Read again with the hash expected: the same bytes pass ...
        let mut same = Vec::new();
        HashingReader::new(&b"abc"[..], 1024, Some(abc.to_string()))
            .read_to_end(&mut same)
            .unwrap();
        assert_eq!(same, b"abc");
        // ... other bytes fail at the end, before the reader says it is done.
        let err = HashingReader::new(&b"abd"[..], 1024, Some(abc.to_string()))
            .read_to_end(&mut Vec::new())
            .unwrap_err();
        assert!(
            err.to_string().contains("changed while it was being read"),
            "{err}"
        );
        // Never more than one byte past the limit is read.
        let (_, read) = HashingReader::new(&b"abcdef"[..], 2, None)
            .finish()
            .unwrap();
        assert_eq!(read, 3);
    }
}
