//! Polling helper shared by the tests that drive the real daemon.

use std::time::{Duration, Instant};

/// Polls `ok` every 50 ms until it holds; panics naming `what` after `timeout`.
pub fn wait_for(what: &str, timeout: Duration, mut ok: impl FnMut() -> bool) {
    let until = Instant::now() + timeout;
    while Instant::now() < until {
        if ok() {
            return;
        }
        std::thread::sleep(Duration::from_millis(50));
    }
    panic!("timed out after {timeout:?} waiting for {what}");
}
