//! Files written into an inbox and handed to the pipeline as settled, as
//! the tests that call the pipeline directly (without the watcher) deliver
//! them.

use std::path::Path;
use std::time::SystemTime;

use slopewarden::inbox::ReadyFile;

/// Writes each (name, text) into `inbox` and returns them as ready files.
pub fn deliver(inbox: &Path, files: &[(String, String)]) -> Vec<ReadyFile> {
    files
        .iter()
        .map(|(name, text)| {
            let path = inbox.join(name);
            std::fs::write(&path, text).unwrap();
            ReadyFile {
                size: text.len() as u64,
                path,
                relative: name.into(),
                modified: SystemTime::UNIX_EPOCH,
            }
        })
        .collect()
}
