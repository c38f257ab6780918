//! What each path answers. Each request opens the store read-only, reads
//! what it shows, and closes it again.

use std::path::Path;
use std::time::SystemTime;

use crate::store::Store;

use super::overview::{self, MAX_OPEN_LISTED, Overview};
use super::request::{Method, RequestHead, host_is_local};
use super::response::{EXPOSITION, HTML, PAGE_POLICY, Response};

/// Paths served.
const ROUTES: [&str; 3] = ["/", "/healthz", "/metrics"];

/// The response to a parsed request. `loopback`: the surface listens on a
/// loopback address, so it answers only requests addressed to this
/// machine by name or address (see [`host_is_local`]).
pub fn respond(req: &RequestHead, database: &Path, now: SystemTime, loopback: bool) -> Response {
    if loopback && req.host.as_deref().is_some_and(|h| !host_is_local(h)) {
        return Response::text(
            421,
            "This surface listens on a loopback address and answers only to localhost, 127.0.0.1 or [::1].\n",
        );
    }
    if !ROUTES.contains(&req.path.as_str()) {
        // The path is not echoed back.
        return Response::text(
            404,
            "No such page. Served here: / (overview), /metrics, /healthz.\n",
        );
    }
    if let Method::Other(_) = req.method {
        return Response::text(
            405,
            "Only GET and HEAD are served; this surface never writes.\n",
        )
        .with("Allow", "GET, HEAD");
    }
    match req.path.as_str() {
        "/healthz" => healthz(database),
        "/metrics" => metrics(database, now),
        _ => page(database, now),
    }
}

fn unavailable(what: &str, e: &dyn std::fmt::Display) -> Response {
    Response::text(
        503,
        format!(
            "{what}: the store cannot be read: {e}\nCheck that the database exists and is readable by this user; `slopewarden status` reads it the same way.\n"
        ),
    )
}

fn healthz(database: &Path) -> Response {
    match Store::open_read_only(database).and_then(|s| s.readable()) {
        Ok(()) => Response::text(200, "ok\n"),
        Err(e) => unavailable("not ready", &e),
    }
}

fn metrics(database: &Path, now: SystemTime) -> Response {
    match Store::open_read_only(database).and_then(|s| s.metrics_snapshot()) {
        Ok(snapshot) => Response {
            content_type: EXPOSITION,
            ..Response::text(200, super::exposition::render(&snapshot, now))
        },
        Err(e) => unavailable("no metrics", &e),
    }
}

fn page(database: &Path, now: SystemTime) -> Response {
    match gather(database) {
        Ok(o) => Response {
            content_type: HTML,
            ..Response::text(200, overview::render(&o, &crate::clock::rfc3339(now)))
        }
        .with("Content-Security-Policy", PAGE_POLICY),
        Err(e) => unavailable("no overview", &e),
    }
}

/// Reads what the overview shows.
fn gather(database: &Path) -> Result<Overview, crate::report::ReportError> {
    let store = Store::open_read_only(database)?;
    let counts = store.metrics_snapshot()?;
    let series = store.series_glance()?;
    let (open, open_total) = store.open_findings(MAX_OPEN_LISTED)?;
    let choice = overview::choose_charts(&series);
    let rows = choice
        .chosen
        .iter()
        .map(|&i| series[i].row.clone())
        .collect();
    let charts = crate::report::scatter_figures(&store, rows)?;
    Ok(Overview {
        series,
        open,
        open_total,
        counts,
        choice,
        charts,
    })
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    fn get(path: &str, host: Option<&str>) -> RequestHead {
        RequestHead {
            method: Method::Get,
            path: path.into(),
            host: host.map(str::to_string),
            has_body: false,
        }
    }

    fn store() -> (tempfile::TempDir, std::path::PathBuf) {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("s.sqlite3");
        drop(Store::open(&path).unwrap());
        (dir, path)
    }

    #[test]
    fn each_path_answers_with_its_type() {
        let (_dir, db) = store();
        let now = SystemTime::now();
        let r = respond(&get("/healthz", Some("127.0.0.1:1")), &db, now, true);
        assert_eq!((r.status, r.body.as_slice()), (200, b"ok\n".as_slice()));
        let r = respond(&get("/metrics", Some("localhost")), &db, now, true);
        assert_eq!(r.status, 200);
        assert_eq!(r.content_type, EXPOSITION);
        let r = respond(&get("/", None), &db, now, true);
        assert_eq!(r.status, 200);
        assert_eq!(r.content_type, HTML);
        assert!(
            r.headers
                .iter()
                .any(|(k, v)| *k == "Content-Security-Policy" && v.contains("default-src 'none'"))
        );
    }

    #[test]
    fn refusals_say_why_without_echoing_the_request() {
        let (_dir, db) = store();
        let now = SystemTime::now();
        let r = respond(&get("/<b>x</b>", Some("localhost")), &db, now, true);
        assert_eq!(r.status, 404);
        assert!(!String::from_utf8(r.body).unwrap().contains("<b>"));
        let post = RequestHead {
            method: Method::Other("POST".into()),
            ..get("/", Some("localhost"))
        };
        let r = respond(&post, &db, now, true);
        assert_eq!(r.status, 405);
        assert!(r.headers.contains(&("Allow", "GET, HEAD".to_string())));
        let r = respond(&get("/", Some("rebound.example.net")), &db, now, true);
        assert_eq!(r.status, 421);
        // Listening on purpose beyond loopback, any name is fine.
        let r = respond(
            &get("/healthz", Some("monitor.example.net")),
            &db,
            now,
            false,
        );
        assert_eq!(r.status, 200);
    }

    #[test]
    fn an_unreadable_store_is_503_with_the_reason() {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("absent.sqlite3");
        for path in ["/healthz", "/metrics", "/"] {
            let r = respond(&get(path, None), &db, SystemTime::now(), true);
            assert_eq!(r.status, 503, "{path}");
            let body = String::from_utf8(r.body).unwrap();
            assert!(body.contains("cannot be read"), "{body}");
        }
        assert!(!db.exists());
    }
}
