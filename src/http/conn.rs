//! One connection: read the request head within a size and time limit,
//! answer, close. Every socket read and write waits at most [`SLICE`], so
//! a stalled client is dropped at its deadline and a shutdown is noticed
//! within a slice.

use std::io::{ErrorKind, Read, Write};
use std::net::{Shutdown, TcpStream};
use std::path::Path;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant, SystemTime};

use tracing::debug;

use super::request::{BadRequest, Method, head_len, parse_head};
use super::response::Response;

/// The longest request head accepted (request line and headers).
pub const MAX_HEAD: usize = 8 * 1024;
/// The whole head must arrive within this.
pub const HEAD_DEADLINE: Duration = Duration::from_secs(5);
/// The whole response must be taken within this.
pub const WRITE_DEADLINE: Duration = Duration::from_secs(10);
/// Unread request bytes are drained for at most this long before closing,
/// so that the client reads the answer instead of a reset.
const DRAIN_DEADLINE: Duration = Duration::from_millis(500);
/// At most this much is drained.
const DRAIN_LIMIT: usize = 1 << 20;
/// The longest single wait on the socket.
pub const SLICE: Duration = Duration::from_millis(100);

/// How reading a head ended without one.
#[derive(Debug)]
enum HeadError {
    /// More than [`MAX_HEAD`] bytes without the end of the head.
    TooLarge,
    /// The deadline passed.
    TimedOut,
    /// The client closed, the daemon is stopping, or the socket failed:
    /// nothing to answer.
    Gone,
}

/// Serves one connection to its end. `loopback`: see
/// [`super::routes::respond`].
pub fn handle(mut stream: TcpStream, database: &Path, loopback: bool, stop: &AtomicBool) {
    if stream.set_nonblocking(false).is_err()
        || stream.set_read_timeout(Some(SLICE)).is_err()
        || stream.set_write_timeout(Some(SLICE)).is_err()
    {
        return;
    }
    let (response, head_only, drain) = match read_head(&mut stream, stop) {
        Ok(head) => match parse_head(&head) {
            Ok(req) => {
                let response = super::routes::respond(&req, database, SystemTime::now(), loopback);
                debug!(path = %route_name(&req.path), status = response.status, "HTTP request");
                (response, req.method == Method::Head, req.has_body)
            }
            Err(e) => (
                Response::text(
                    match e {
                        BadRequest::Version => 505,
                        BadRequest::Malformed(_) => 400,
                    },
                    format!("Bad request: {}.\n", e.reason()),
                ),
                false,
                true,
            ),
        },
        Err(HeadError::TooLarge) => (
            Response::text(
                431,
                format!("The request head is longer than {MAX_HEAD} bytes.\n"),
            ),
            false,
            true,
        ),
        Err(HeadError::TimedOut) => (
            Response::text(
                408,
                format!(
                    "The request head did not arrive within {} seconds.\n",
                    HEAD_DEADLINE.as_secs()
                ),
            ),
            false,
            true,
        ),
        Err(HeadError::Gone) => return,
    };
    let bytes = response.to_bytes(head_only, SystemTime::now());
    if write_all(&mut stream, &bytes, stop).is_err() {
        return;
    }
    let _ = stream.shutdown(Shutdown::Write);
    if drain {
        drain_input(&mut stream, stop);
    }
}

/// The route for logs: a served path, or `other` (a request path is never
/// logged as sent).
fn route_name(path: &str) -> &'static str {
    match path {
        "/" => "/",
        "/healthz" => "/healthz",
        "/metrics" => "/metrics",
        _ => "other",
    }
}

/// Reads until the end of the head; returns the head (bytes after it, a
/// body, are left unread).
fn read_head(stream: &mut TcpStream, stop: &AtomicBool) -> Result<Vec<u8>, HeadError> {
    let deadline = Instant::now() + HEAD_DEADLINE;
    let mut buf: Vec<u8> = Vec::with_capacity(1024);
    let mut chunk = [0u8; 2048];
    loop {
        if stop.load(Ordering::SeqCst) {
            return Err(HeadError::Gone);
        }
        if Instant::now() >= deadline {
            return Err(HeadError::TimedOut);
        }
        match stream.read(&mut chunk) {
            Ok(0) => return Err(HeadError::Gone),
            Ok(n) => {
                buf.extend_from_slice(&chunk[..n]);
                match head_len(&buf) {
                    Some(len) if len <= MAX_HEAD => {
                        buf.truncate(len);
                        return Ok(buf);
                    }
                    Some(_) => return Err(HeadError::TooLarge),
                    None if buf.len() >= MAX_HEAD => return Err(HeadError::TooLarge),
                    None => {}
                }
            }
            Err(e) if is_wait(&e) => {}
            Err(_) => return Err(HeadError::Gone),
        }
    }
}

fn is_wait(e: &std::io::Error) -> bool {
    matches!(
        e.kind(),
        ErrorKind::WouldBlock | ErrorKind::TimedOut | ErrorKind::Interrupted
    )
}

/// Writes all of `bytes` within [`WRITE_DEADLINE`].
fn write_all(stream: &mut TcpStream, mut bytes: &[u8], stop: &AtomicBool) -> std::io::Result<()> {
    let deadline = Instant::now() + WRITE_DEADLINE;
    while !bytes.is_empty() {
        if stop.load(Ordering::SeqCst) || Instant::now() >= deadline {
            return Err(ErrorKind::TimedOut.into());
        }
        match stream.write(bytes) {
            Ok(0) => return Err(ErrorKind::WriteZero.into()),
            Ok(n) => bytes = &bytes[n..],
            Err(e) if is_wait(&e) => {}
            Err(e) => return Err(e),
        }
    }
    stream.flush()
}

/// Reads and discards what the client still sends, briefly: closing a
/// socket with unread input makes the kernel reset the connection, and
/// the client may then lose the answer it has not read yet.
fn drain_input(stream: &mut TcpStream, stop: &AtomicBool) {
    let deadline = Instant::now() + DRAIN_DEADLINE;
    let mut chunk = [0u8; 8192];
    let mut total = 0usize;
    while total < DRAIN_LIMIT && Instant::now() < deadline && !stop.load(Ordering::SeqCst) {
        match stream.read(&mut chunk) {
            Ok(0) => return,
            Ok(n) => total += n,
            Err(e) if is_wait(&e) => {}
            Err(_) => return,
        }
    }
}
