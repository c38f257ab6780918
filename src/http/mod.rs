//! The local read-only HTTP surface (`[http] listen`): `/healthz`,
//! `/metrics` (Prometheus text exposition format) and `/` (an overview
//! page). It opens its own read-only connection to the store for each
//! request and never writes.
//!
//! Plain `std::net` (and poll(2) through `libc`), no async runtime, no
//! HTTP library: the surface needs GET and HEAD on three paths, one
//! request per connection (`Connection: close`), so a small strict parser
//! is less code to trust than a general server.
//!
//! Layout:
//! - `request` and `response`: pure parsing of the head and the bytes of
//!   an answer.
//! - `exposition` and `overview`: pure renderers of `/metrics` and `/`.
//! - `routes`: what each path reads from the store and answers.
//! - `conn`: one connection, with size and time limits.
//! - here: the listener, waited on with poll(2) for at most 0.1 s at a
//!   time (a connection is taken at once, and [`serve`] returns within a
//!   fraction of a second of `stop`), and [`WORKERS`] threads that take
//!   connections from a short queue (a full queue is answered 503 at once).
//!
//! Limits: the request head at most 8 KiB and within 5 s, the answer
//! taken within 10 s; a request body is never read. Bound to a loopback
//! address, the surface answers only requests addressed to localhost or a
//! loopback address (a web page elsewhere cannot read it by re-pointing a
//! name of its own at 127.0.0.1).

mod conn;
mod exposition;
mod overview;
mod request;
mod response;
mod routes;

use std::net::{SocketAddr, TcpListener, TcpStream};
use std::path::Path;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::mpsc::{Receiver, RecvTimeoutError, TrySendError, sync_channel};
use std::sync::{Mutex, PoisonError};
use std::time::{Duration, SystemTime};

use tracing::{error, info, warn};

use crate::config::HttpSettings;

/// Connections served at once.
pub const WORKERS: usize = 2;
/// Connections accepted and waiting for a worker; beyond, 503.
const QUEUE: usize = 16;

/// Why the HTTP surface could not serve.
#[derive(Debug, thiserror::Error)]
pub enum HttpError {
    /// The address cannot be bound.
    #[error("cannot listen on {addr}: {source}; choose another port in [http] listen")]
    Bind {
        /// The address.
        addr: std::net::SocketAddr,
        /// Why.
        source: std::io::Error,
    },
}

/// Serves until `stop` is set, then returns within about 0.1 s (a page
/// being rendered is finished first). `database` is the store's file.
pub fn serve(settings: &HttpSettings, database: &Path, stop: &AtomicBool) -> Result<(), HttpError> {
    let addr = settings.listen;
    let bind_error = |source| HttpError::Bind { addr, source };
    let listener = TcpListener::bind(addr).map_err(bind_error)?;
    listener.set_nonblocking(true).map_err(bind_error)?;
    let local = listener.local_addr().map_err(bind_error)?;
    info!(
        address = %local,
        "HTTP surface listening (read-only): /, /metrics, /healthz"
    );
    serve_on(&listener, local, database, stop);
    info!("HTTP surface stopped");
    Ok(())
}

/// The accept loop over a bound, non-blocking listener, with its workers.
fn serve_on(listener: &TcpListener, local: SocketAddr, database: &Path, stop: &AtomicBool) {
    let loopback = local.ip().is_loopback();
    let (queue, waiting) = sync_channel::<TcpStream>(QUEUE);
    let waiting = Mutex::new(waiting);
    std::thread::scope(|scope| {
        for _ in 0..WORKERS {
            scope.spawn(|| work(&waiting, database, loopback, stop));
        }
        while !stop.load(Ordering::SeqCst) {
            match listener.accept() {
                Ok((stream, _)) => match queue.try_send(stream) {
                    Ok(()) => {}
                    Err(TrySendError::Full(stream)) => busy(stream),
                    // The workers are gone (they only leave on stop).
                    Err(TrySendError::Disconnected(_)) => break,
                },
                Err(e) if e.kind() == std::io::ErrorKind::WouldBlock => {
                    if let Err(e) = wait_for_connection(listener, conn::SLICE) {
                        warn!(error = %e, "HTTP surface: waiting for connections failed");
                        std::thread::sleep(conn::SLICE);
                    }
                }
                Err(e) => {
                    // Out of file descriptors and the like: wait, retry.
                    warn!(error = %e, "HTTP surface: accepting a connection failed");
                    std::thread::sleep(conn::SLICE);
                }
            }
        }
        drop(queue);
    });
}

/// Waits until a connection is pending on `listener` or `timeout` has
/// passed (poll(2)), so that a connection is taken at once and `stop` is
/// still looked at every `timeout`.
fn wait_for_connection(listener: &TcpListener, timeout: Duration) -> std::io::Result<()> {
    use std::os::fd::AsRawFd as _;
    let mut fd = libc::pollfd {
        fd: listener.as_raw_fd(),
        events: libc::POLLIN,
        revents: 0,
    };
    let ms = libc::c_int::try_from(timeout.as_millis()).unwrap_or(libc::c_int::MAX);
    // SAFETY: one valid, initialised pollfd, for a descriptor that
    // `listener` keeps open for the duration of the call.
    let rc = unsafe { libc::poll(&mut fd, 1, ms) };
    if rc < 0 {
        let e = std::io::Error::last_os_error();
        if e.kind() != std::io::ErrorKind::Interrupted {
            return Err(e);
        }
    }
    Ok(())
}

/// A worker: takes connections until the queue closes or `stop` is set.
/// A panic while serving one connection is logged and does not end the
/// worker (nor, through the scope, the daemon).
fn work(waiting: &Mutex<Receiver<TcpStream>>, database: &Path, loopback: bool, stop: &AtomicBool) {
    loop {
        if stop.load(Ordering::SeqCst) {
            return;
        }
        let next = waiting
            .lock()
            .unwrap_or_else(PoisonError::into_inner)
            .recv_timeout(conn::SLICE);
        match next {
            Ok(stream) => {
                let served = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
                    conn::handle(stream, database, loopback, stop);
                }));
                if served.is_err() {
                    error!(
                        "BUG: the HTTP surface panicked while answering a request; it goes on serving"
                    );
                }
            }
            Err(RecvTimeoutError::Timeout) => {}
            Err(RecvTimeoutError::Disconnected) => return,
        }
    }
}

/// Answers 503 at once when every worker is busy and the queue is full.
fn busy(mut stream: TcpStream) {
    use std::io::Write as _;
    let _ = stream.set_nonblocking(false);
    let _ = stream.set_write_timeout(Some(conn::SLICE));
    let r =
        response::Response::text(503, "Busy; try again in a moment.\n").with("Retry-After", "1");
    let _ = stream.write_all(&r.to_bytes(false, SystemTime::now()));
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;
    use std::io::{Read, Write};
    use std::time::{Duration, Instant};

    /// A served store on an ephemeral port; the server thread, stopped
    /// and joined by the closure's end.
    fn with_server(f: impl FnOnce(SocketAddr, &AtomicBool)) {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("s.sqlite3");
        drop(crate::store::Store::open(&db).unwrap());
        let listener = TcpListener::bind("127.0.0.1:0").unwrap();
        listener.set_nonblocking(true).unwrap();
        let addr = listener.local_addr().unwrap();
        let stop = AtomicBool::new(false);
        /// Sets the flag when dropped, also while a failed assertion
        /// unwinds, so that the scope can join the server and report it.
        struct StopOnDrop<'a>(&'a AtomicBool);
        impl Drop for StopOnDrop<'_> {
            fn drop(&mut self) {
                self.0.store(true, Ordering::SeqCst);
            }
        }
        std::thread::scope(|scope| {
            let server = scope.spawn(|| serve_on(&listener, addr, &db, &stop));
            let guard = StopOnDrop(&stop);
            f(addr, &stop);
            drop(guard);
            let asked = Instant::now();
            server.join().unwrap();
            assert!(
                asked.elapsed() < Duration::from_secs(1),
                "the server took {:?} to stop",
                asked.elapsed()
            );
        });
    }

    fn exchange(addr: SocketAddr, request: &[u8]) -> String {
        let mut s = TcpStream::connect(addr).unwrap();
        s.set_read_timeout(Some(Duration::from_secs(10))).unwrap();
        s.write_all(request).unwrap();
        let mut out = Vec::new();
        s.read_to_end(&mut out).unwrap();
        String::from_utf8(out).unwrap()
    }

    #[test]
    fn it_answers_over_tcp_and_stops_promptly() {
        with_server(|addr, _| {
            let r = exchange(addr, b"GET /healthz HTTP/1.1\r\nHost: localhost\r\n\r\n");
            assert!(r.starts_with("HTTP/1.1 200 OK\r\n"), "{r}");
            assert!(r.ends_with("\r\n\r\nok\n"));
            let r = exchange(addr, b"HEAD /metrics HTTP/1.0\r\n\r\n");
            assert!(r.starts_with("HTTP/1.1 200 OK\r\n"), "{r}");
            assert!(r.ends_with("\r\n\r\n"));
            let r = exchange(addr, b"BREW / HTTP/1.1\r\nHost: localhost\r\n\r\n");
            assert!(r.starts_with("HTTP/1.1 405 "), "{r}");
            let r = exchange(addr, b"garbage\r\n\r\n");
            assert!(r.starts_with("HTTP/1.1 400 "), "{r}");
        });
    }

    #[test]
    fn a_silent_client_is_dropped_and_does_not_hold_up_others_or_the_stop() {
        with_server(|addr, _| {
            // Two silent clients occupy both workers for up to 5 s...
            let mut idle: Vec<TcpStream> = (0..WORKERS)
                .map(|_| TcpStream::connect(addr).unwrap())
                .collect();
            let t = Instant::now();
            let mut half = TcpStream::connect(addr).unwrap();
            half.write_all(b"GET /healthz HTTP/1.1\r\nHost: loc")
                .unwrap();
            // ...and are answered 408 at their deadline.
            let mut out = String::new();
            idle[0]
                .set_read_timeout(Some(Duration::from_secs(10)))
                .unwrap();
            idle[0].read_to_string(&mut out).unwrap();
            assert!(out.starts_with("HTTP/1.1 408 "), "{out}");
            assert!(t.elapsed() < Duration::from_secs(8));
            idle.clear();
            drop(half);
            let r = exchange(addr, b"GET /healthz HTTP/1.1\r\nHost: localhost\r\n\r\n");
            assert!(r.starts_with("HTTP/1.1 200 "), "{r}");
        });
        // Stopping while a client is silent is still prompt (checked by
        // `with_server`).
        with_server(|addr, _| {
            let _idle = TcpStream::connect(addr).unwrap();
            std::thread::sleep(Duration::from_millis(300));
        });
    }

    #[test]
    fn an_oversized_head_is_refused_with_431() {
        with_server(|addr, _| {
            let mut req = b"GET / HTTP/1.1\r\nHost: localhost\r\nX-Padding: ".to_vec();
            req.extend(std::iter::repeat_n(b'a', 64 * 1024));
            req.extend_from_slice(b"\r\n\r\n");
            let r = exchange(addr, &req);
            assert!(r.starts_with("HTTP/1.1 431 "), "{r}");
        });
    }
}
