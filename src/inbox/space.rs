//! Free space on the filesystem that holds a path.

use std::ffi::CString;
use std::io;
use std::os::unix::ffi::OsStrExt;
use std::path::Path;

/// Bytes available to an unprivileged writer on the filesystem holding
/// `path` (statvfs: f_bavail × f_frsize).
pub fn free_bytes(path: &Path) -> io::Result<u64> {
    let c = CString::new(path.as_os_str().as_bytes())
        .map_err(|_| io::Error::new(io::ErrorKind::InvalidInput, "a NUL byte in the path"))?;
    // SAFETY: `c` is a valid NUL-terminated string and `st` a properly
    // sized, zero-initialised out-parameter that statvfs fills in.
    let mut st: libc::statvfs = unsafe { std::mem::zeroed() };
    let rc = unsafe { libc::statvfs(c.as_ptr(), &mut st) };
    if rc != 0 {
        return Err(io::Error::last_os_error());
    }
    Ok((st.f_bavail as u64).saturating_mul(st.f_frsize as u64))
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    #[test]
    fn a_real_folder_has_some_free_space_and_a_missing_one_is_an_error() {
        let dir = std::env::temp_dir();
        assert!(free_bytes(&dir).unwrap() > 0);
        assert!(free_bytes(Path::new("/no/such/folder/for/slopewarden")).is_err());
    }
}
