//! The read-only HTTP surface end to end: the real daemon binary with
//! `[http] listen` on a free loopback port, real record files dropped in
//! its inbox, real HTTP/1.1 requests over TCP from the small client below
//! (std::net, no HTTP library), the answers checked against what the store
//! holds (`slopewarden status --json` and a read-only SQLite connection).
//!
//! ALL DATA IS INVENTED: a stated line plus a fixed deterministic wiggle,
//! one record entered ten times too large, a series named like a script
//! tag, a bad row and a file that is not text. Names are made up.

#![allow(clippy::unwrap_used, clippy::expect_used)]

use std::collections::{BTreeMap, HashSet};
use std::io::{Read, Write};
use std::net::{TcpListener, TcpStream};
use std::path::PathBuf;
use std::process::{Child, Command, Output};
use std::time::{Duration, Instant};

#[path = "support/wait.rs"]
mod wait;
use wait::wait_for;

use scraper::{Html, Selector};
use serde_json::Value;

const SERIES: &str = "Fernhollow Spring/MW-4/nitrate";
const SCRIPTED: &str = "<script>alert(1)</script>";
/// The record entered ten times too large.
const SLIP_ID: &str = "FH-021";

// ---------------------------------------------------------------------------
// A site: a temporary folder, a configuration with [http], the daemon.

struct Site {
    dir: tempfile::TempDir,
    port: u16,
    runs: std::cell::Cell<usize>,
}

/// A port that was free a moment ago: bound on port 0, then released.
fn free_port() -> u16 {
    TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}

impl Site {
    fn new(port: u16) -> Site {
        let dir = tempfile::tempdir().unwrap();
        std::fs::create_dir_all(dir.path().join("inbox")).unwrap();
        std::fs::write(
            dir.path().join("slopewarden.toml"),
            format!(
                "[watch]\nsettle_seconds = 0.3\nrescan_seconds = 1\n\n\
                 [mail]\nto = [\"analyst@monitoring.example.net\"]\n\n\
                 [http]\nlisten = \"127.0.0.1:{port}\"\n"
            ),
        )
        .unwrap();
        Site {
            dir,
            port,
            runs: std::cell::Cell::new(0),
        }
    }

    fn path(&self, p: &str) -> PathBuf {
        self.dir.path().join(p)
    }

    fn run(&self, args: &[&str]) -> Output {
        Command::new(env!("CARGO_BIN_EXE_slopewarden"))
            .args(args)
            .arg("--config")
            .arg(self.path("slopewarden.toml"))
            .current_dir(self.dir.path())
            .output()
            .unwrap()
    }

    fn drop_file(&self, name: &str, bytes: &[u8]) {
        let tmp = self.path(&format!("inbox/{name}.part"));
        std::fs::write(&tmp, bytes).unwrap();
        std::fs::rename(&tmp, self.path(&format!("inbox/{name}"))).unwrap();
    }

    fn db(&self) -> rusqlite::Connection {
        rusqlite::Connection::open_with_flags(
            self.path("data/slopewarden.sqlite3"),
            rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY,
        )
        .unwrap()
    }

    fn count(&self, sql: &str) -> i64 {
        self.db().query_row(sql, [], |r| r.get(0)).unwrap()
    }

    /// Drops a file and waits until the daemon has recorded it.
    fn deliver(&self, name: &str, bytes: &[u8]) {
        let before = self.count("SELECT COUNT(*) FROM source_files");
        self.drop_file(name, bytes);
        wait_for(
            &format!("the daemon to take {name}"),
            Duration::from_secs(30),
            || self.count("SELECT COUNT(*) FROM source_files") > before,
        );
    }

    fn log(&self, run: usize) -> String {
        std::fs::read_to_string(self.path(&format!("daemon-{run}.log"))).unwrap_or_default()
    }

    /// Starts `slopewarden run`; returns once it watches and serves.
    fn start(&self) -> Daemon {
        let run = self.runs.get() + 1;
        self.runs.set(run);
        let out = std::fs::File::create(self.path(&format!("daemon-{run}.log"))).unwrap();
        let daemon = Daemon(Some(
            Command::new(env!("CARGO_BIN_EXE_slopewarden"))
                .args(["run", "--config"])
                .arg(self.path("slopewarden.toml"))
                .current_dir(self.dir.path())
                .stdout(out.try_clone().unwrap())
                .stderr(out)
                .spawn()
                .unwrap(),
        ));
        wait_for(
            "the daemon to watch and serve",
            Duration::from_secs(20),
            || {
                let log = self.log(run);
                log.contains("watching")
                    && (log.contains("HTTP surface listening")
                        || log.contains("HTTP surface is not"))
            },
        );
        daemon
    }

    /// SIGTERM; the exit code must be 0. Returns how long the exit took.
    fn stop(&self, mut daemon: Daemon) -> Duration {
        let mut child = daemon.0.take().unwrap();
        let pid = child.id().to_string();
        let asked = Instant::now();
        assert!(
            Command::new("kill")
                .args(["-TERM", &pid])
                .status()
                .unwrap()
                .success()
        );
        let until = asked + Duration::from_secs(10);
        loop {
            if let Some(status) = child.try_wait().unwrap() {
                assert_eq!(
                    status.code(),
                    Some(0),
                    "logs:\n{}",
                    self.log(self.runs.get())
                );
                return asked.elapsed();
            }
            assert!(
                Instant::now() < until,
                "the daemon did not exit within 10 s of SIGTERM; logs:\n{}",
                self.log(self.runs.get())
            );
            std::thread::sleep(Duration::from_millis(20));
        }
    }
}

/// A running daemon; killed if a failing test drops it before
/// [`Site::stop`], so that no daemon outlives its test.
struct Daemon(Option<Child>);

impl Drop for Daemon {
    fn drop(&mut self) {
        if let Some(mut child) = self.0.take() {
            child.kill().ok();
            child.wait().ok();
        }
    }
}

// ---------------------------------------------------------------------------
// A small HTTP/1.1 client over TcpStream.

#[derive(Debug)]
struct Reply {
    status: u16,
    headers: Vec<(String, String)>,
    body: Vec<u8>,
}

impl Reply {
    fn header(&self, name: &str) -> Option<&str> {
        let mut found = self
            .headers
            .iter()
            .filter(|(k, _)| k.eq_ignore_ascii_case(name));
        let first = found.next().map(|(_, v)| v.as_str());
        assert!(found.next().is_none(), "{name} sent twice");
        first
    }

    fn text(&self) -> String {
        String::from_utf8(self.body.clone()).unwrap()
    }
}

/// Sends `raw` as is, reads until the server closes, and parses the reply.
/// A body must have exactly the announced length (none after HEAD).
fn send(port: u16, raw: &[u8], head: bool) -> Reply {
    let mut s = TcpStream::connect(("127.0.0.1", port)).unwrap();
    s.set_read_timeout(Some(Duration::from_secs(20))).unwrap();
    s.set_write_timeout(Some(Duration::from_secs(20))).unwrap();
    // The server may answer and stop reading before all of an oversized
    // request is written; what counts is its answer.
    let _ = s.write_all(raw);
    let mut bytes = Vec::new();
    s.read_to_end(&mut bytes).unwrap();
    let split = bytes
        .windows(4)
        .position(|w| w == b"\r\n\r\n")
        .expect("a complete response head");
    let head_text = std::str::from_utf8(&bytes[..split]).unwrap();
    let mut lines = head_text.split("\r\n");
    let status_line = lines.next().unwrap();
    let mut parts = status_line.splitn(3, ' ');
    assert_eq!(parts.next(), Some("HTTP/1.1"), "{status_line}");
    let status: u16 = parts.next().unwrap().parse().unwrap();
    assert!(!parts.next().unwrap_or("").is_empty(), "no reason phrase");
    let headers: Vec<(String, String)> = lines
        .map(|l| {
            let (k, v) = l.split_once(": ").expect("name: value");
            (k.to_string(), v.to_string())
        })
        .collect();
    let reply = Reply {
        status,
        headers,
        body: bytes[split + 4..].to_vec(),
    };
    let length: usize = reply
        .header("Content-Length")
        .expect("Content-Length")
        .parse()
        .unwrap();
    if head {
        assert!(reply.body.is_empty(), "a body after HEAD");
    } else {
        assert_eq!(reply.body.len(), length, "Content-Length is wrong");
    }
    assert_eq!(reply.header("Connection"), Some("close"));
    assert_eq!(reply.header("X-Content-Type-Options"), Some("nosniff"));
    assert_eq!(reply.header("Cache-Control"), Some("no-store"));
    assert!(
        reply
            .header("Content-Type")
            .unwrap()
            .contains("charset=utf-8"),
        "{:?}",
        reply.header("Content-Type")
    );
    reply
}

fn get(port: u16, path: &str) -> Reply {
    send(
        port,
        format!("GET {path} HTTP/1.1\r\nHost: 127.0.0.1:{port}\r\nUser-Agent: http-test\r\n\r\n")
            .as_bytes(),
        false,
    )
}

// ---------------------------------------------------------------------------
// The exposition format, read line by line.

#[derive(Debug, Clone, PartialEq)]
struct Sample {
    name: String,
    labels: BTreeMap<String, String>,
    value: f64,
}

fn is_name(s: &str, colon: bool) -> bool {
    let mut chars = s.chars();
    chars
        .next()
        .is_some_and(|c| c.is_ascii_alphabetic() || c == '_' || (colon && c == ':'))
        && chars.all(|c| c.is_ascii_alphanumeric() || c == '_' || (colon && c == ':'))
}

/// Parses the Prometheus text format 0.0.4 strictly: HELP and TYPE
/// comments, each family declared once and before its samples, label
/// values with only the three escapes, values as Go's ParseFloat reads
/// them. Panics naming the line on anything else.
fn parse_exposition(text: &str) -> Vec<Sample> {
    assert!(
        text.ends_with('\n'),
        "the exposition must end with a line feed"
    );
    let mut types: BTreeMap<String, String> = BTreeMap::new();
    let mut helps: HashSet<String> = HashSet::new();
    let mut seen: HashSet<(String, Vec<(String, String)>)> = HashSet::new();
    let mut samples = Vec::new();
    for (i, line) in text.lines().enumerate() {
        let at = format!("line {}: {line:?}", i + 1);
        if let Some(rest) = line.strip_prefix("# HELP ") {
            let (name, help) = rest.split_once(' ').expect(&at);
            assert!(is_name(name, true), "{at}");
            assert!(!help.is_empty(), "{at}");
            assert!(helps.insert(name.to_string()), "HELP twice, {at}");
            continue;
        }
        if let Some(rest) = line.strip_prefix("# TYPE ") {
            let (name, kind) = rest.split_once(' ').expect(&at);
            assert!(is_name(name, true), "{at}");
            assert!(
                ["counter", "gauge", "histogram", "summary", "untyped"].contains(&kind),
                "{at}"
            );
            assert!(
                kind != "counter" || name.ends_with("_total"),
                "a counter's name ends in _total, {at}"
            );
            assert!(
                types.insert(name.to_string(), kind.to_string()).is_none(),
                "TYPE twice, {at}"
            );
            continue;
        }
        assert!(!line.starts_with('#') && !line.is_empty(), "{at}");
        let name_end = line.find(['{', ' ']).expect(&at);
        let name = &line[..name_end];
        assert!(is_name(name, true), "{at}");
        assert!(types.contains_key(name), "sample before its TYPE, {at}");
        let (labels, rest) = match line[name_end..].strip_prefix('{') {
            Some(inner) => parse_labels(inner, &at),
            None => (BTreeMap::new(), &line[name_end..]),
        };
        let rest = rest.strip_prefix(' ').expect(&at);
        let mut fields = rest.split(' ');
        let value = fields.next().expect(&at);
        let value: f64 = match value {
            "NaN" => f64::NAN,
            "+Inf" => f64::INFINITY,
            "-Inf" => f64::NEG_INFINITY,
            v => v.parse().expect(&at),
        };
        if let Some(ts) = fields.next() {
            ts.parse::<i64>().expect(&at);
        }
        assert!(fields.next().is_none(), "{at}");
        let key = (
            name.to_string(),
            labels
                .iter()
                .map(|(k, v)| (k.clone(), v.clone()))
                .collect::<Vec<_>>(),
        );
        assert!(seen.insert(key), "a sample twice, {at}");
        samples.push(Sample {
            name: name.to_string(),
            labels,
            value,
        });
    }
    for name in types.keys() {
        assert!(helps.contains(name), "{name} has no HELP");
    }
    samples
}

/// Parses the labels after a `{`, up to and including the `}`: `name="value"`
/// pairs separated by commas, values with only the escapes `\\`, `\"` and
/// `\n`. Returns them and what follows the `}`.
fn parse_labels<'a>(mut rest: &'a str, at: &str) -> (BTreeMap<String, String>, &'a str) {
    let mut labels = BTreeMap::new();
    if let Some(after) = rest.strip_prefix('}') {
        return (labels, after);
    }
    loop {
        let eq = rest.find('=').expect(at);
        let name = &rest[..eq];
        assert!(is_name(name, false), "label name {name:?}, {at}");
        let mut chars = rest[eq + 1..].char_indices();
        assert_eq!(chars.next().map(|c| c.1), Some('"'), "{at}");
        let mut value = String::new();
        let end = loop {
            match chars.next().expect(at) {
                (_, '\\') => value.push(match chars.next().expect(at).1 {
                    '\\' => '\\',
                    '"' => '"',
                    'n' => '\n',
                    other => panic!("escape \\{other}, {at}"),
                }),
                (i, '"') => break eq + 1 + i + 1,
                (_, c) => value.push(c),
            }
        };
        assert!(labels.insert(name.to_string(), value).is_none(), "{at}");
        rest = &rest[end..];
        if let Some(r) = rest.strip_prefix('}') {
            return (labels, r);
        }
        rest = rest.strip_prefix(',').expect(at);
    }
}

fn metric(samples: &[Sample], name: &str, labels: &[(&str, &str)]) -> Option<f64> {
    samples
        .iter()
        .find(|s| {
            s.name == name
                && s.labels.len() == labels.len()
                && labels
                    .iter()
                    .all(|(k, v)| s.labels.get(*k).map(String::as_str) == Some(*v))
        })
        .map(|s| s.value)
}

// ---------------------------------------------------------------------------
// Invented data.

/// -0.05 .. 0.05, cycling with period 5 (deterministic).
fn wiggle(i: usize) -> f64 {
    0.05 * ((i * 3 % 5) as f64 - 2.0) / 2.0
}

/// The trend of the invented series: 0.15 mg/L a year from 3.0 at 2012.
fn line(x: f64) -> f64 {
    3.0 + 0.15 * (x - 2012.0)
}

const HEADER: &str = "record_id,series,x,y,unit,sampled_at,note\n";

/// 20 quarterly records of [`SERIES`], 8 half-yearly ones of the
/// script-named series, and one row whose value is not a number.
fn first_file() -> String {
    let mut s = String::from(HEADER);
    for i in 0..20 {
        let x = 2012.0 + 0.25 * i as f64;
        s.push_str(&format!(
            "FH-{:03},{SERIES},{x},{:.3},mg/L,,\n",
            i + 1,
            line(x) + wiggle(i)
        ));
    }
    for i in 0..8 {
        let x = 2014.0 + 0.5 * i as f64;
        s.push_str(&format!(
            "SC-{:02},{SCRIPTED},{x},{:.3},mg/L,,\n",
            i + 1,
            1.2 + 0.05 * i as f64 + wiggle(i) / 5.0
        ));
    }
    s.push_str(&format!("FH-BAD,{SERIES},2016.1,abc,mg/L,,\n"));
    s
}

/// The next quarter, entered ten times too large.
fn slip_file() -> String {
    format!(
        "{HEADER}{SLIP_ID},{SERIES},2017,{},mg/L,2017-01-03,decimal slip\n",
        10.0 * line(2017.0)
    )
}

/// Not text at all: a PNG signature under a .csv name.
const NOT_TEXT: &[u8] = &[
    0x89, b'P', b'N', b'G', b'\r', b'\n', 0x1a, b'\n', 0, 0, 0, 13, 0xff, 0xfe,
];

// ---------------------------------------------------------------------------

#[test]
fn the_surface_answers_from_the_store_refuses_what_it_does_not_serve_and_stops_with_the_daemon() {
    let site = Site::new(free_port());
    let port = site.port;
    let daemon = site.start();

    // Before any file: healthy, zero counts, no ingest age.
    let r = get(port, "/healthz");
    assert_eq!((r.status, r.text().as_str()), (200, "ok\n"));
    assert_eq!(r.header("Content-Type"), Some("text/plain; charset=utf-8"));
    let samples = parse_exposition(&get(port, "/metrics").text());
    assert_eq!(
        metric(&samples, "slopewarden_files_ingested_total", &[]),
        Some(0.0)
    );
    assert_eq!(
        metric(&samples, "slopewarden_seconds_since_last_ingest", &[]),
        None
    );

    site.deliver("a.csv", first_file().as_bytes());
    site.deliver("b.csv", slip_file().as_bytes());
    site.deliver("scan.csv", NOT_TEXT);
    // Let the sender take the queued messages, so that the outbox counts
    // hold still while they are compared.
    wait_for("the outbox to drain", Duration::from_secs(30), || {
        site.count("SELECT COUNT(*) FROM outbox WHERE status = 'pending'") == 0
    });

    // /metrics: the exposition format, with the store's counts.
    let r = get(port, "/metrics");
    assert_eq!(r.status, 200);
    assert_eq!(
        r.header("Content-Type"),
        Some("text/plain; version=0.0.4; charset=utf-8")
    );
    let samples = parse_exposition(&r.text());
    let status: Vec<Value> =
        serde_json::from_slice(&site.run(&["status", "--json"]).stdout).unwrap();
    assert_eq!(status.len(), 2);
    let records: i64 = status.iter().map(|s| s["records"].as_i64().unwrap()).sum();
    assert_eq!(records, 29);
    let m = |name: &str| metric(&samples, name, &[]).unwrap_or_else(|| panic!("{name} missing"));
    assert_eq!(m("slopewarden_series"), status.len() as f64);
    assert_eq!(m("slopewarden_records_stored"), records as f64);
    assert_eq!(
        m("slopewarden_records_stored"),
        site.count("SELECT COUNT(*) FROM records WHERE status = 'current'") as f64
    );
    assert_eq!(m("slopewarden_files_ingested_total"), 2.0);
    assert_eq!(m("slopewarden_files_quarantined_total"), 1.0);
    assert_eq!(
        m("slopewarden_files_ingested_total") + m("slopewarden_files_quarantined_total"),
        site.count("SELECT COUNT(*) FROM source_files") as f64
    );
    assert_eq!(m("slopewarden_rows_quarantined_total"), 1.0);
    assert_eq!(
        m("slopewarden_rows_quarantined_total"),
        site.count("SELECT COUNT(*) FROM quarantined_rows") as f64
    );
    assert_eq!(
        m("slopewarden_fit_versions_total"),
        site.count("SELECT COUNT(*) FROM fits") as f64
    );
    // The slip raised an open outlier finding, and every (kind, status)
    // the store holds has its sample.
    assert_eq!(
        metric(
            &samples,
            "slopewarden_findings",
            &[("kind", "outlier"), ("status", "open")]
        ),
        Some(1.0)
    );
    let db = site.db();
    let mut stmt = db
        .prepare(
            "SELECT k.value, g.status, COUNT(*) FROM findings g, json_each(g.kinds) k GROUP BY 1, 2",
        )
        .unwrap();
    let stored: Vec<(String, String, i64)> = stmt
        .query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))
        .unwrap()
        .map(Result::unwrap)
        .collect();
    assert!(stored.len() >= 2, "{stored:?}");
    for (kind, st, n) in &stored {
        assert_eq!(
            metric(
                &samples,
                "slopewarden_findings",
                &[("kind", kind), ("status", st)]
            ),
            Some(*n as f64),
            "{kind} {st}"
        );
    }
    let open_in_metrics: f64 = samples
        .iter()
        .filter(|s| s.name == "slopewarden_findings" && s.labels["status"] == "open")
        .map(|s| s.value)
        .sum();
    assert_eq!(
        open_in_metrics,
        stored
            .iter()
            .filter(|s| s.1 == "open")
            .map(|s| s.2)
            .sum::<i64>() as f64
    );
    for st in ["pending", "held", "sent", "digested", "failed"] {
        assert_eq!(
            metric(&samples, "slopewarden_outbox_messages", &[("status", st)]),
            Some(site.count(&format!(
                "SELECT COUNT(*) FROM outbox WHERE status = '{st}'"
            )) as f64),
            "{st}"
        );
    }
    let age = m("slopewarden_seconds_since_last_ingest");
    assert!((0.0..120.0).contains(&age), "{age}");
    let last: i64 = db
        .query_row(
            "SELECT CAST(strftime('%s', MAX(arrived_at)) AS INTEGER) FROM source_files",
            [],
            |r| r.get(0),
        )
        .unwrap();
    assert_eq!(m("slopewarden_last_ingest_timestamp_seconds"), last as f64);

    // /: the overview page, self-contained, the store's text escaped.
    let r = get(port, "/");
    assert_eq!(r.status, 200);
    assert_eq!(r.header("Content-Type"), Some("text/html; charset=utf-8"));
    let csp = r.header("Content-Security-Policy").expect("a CSP header");
    assert!(
        csp.contains("default-src 'none'") && !csp.contains("script-src"),
        "{csp}"
    );
    let page = r.text();
    assert!(page.contains("&lt;script&gt;alert(1)&lt;/script&gt;"));
    assert!(
        !page.to_ascii_lowercase().contains("<script"),
        "a script tag in the page"
    );
    assert!(
        !page.contains("src=\"http") && !page.contains("href=\"http"),
        "an external reference"
    );
    assert!(page.contains(&slopewarden::report::escape_html(
        slopewarden::raise::CAUTION
    )));
    let doc = Html::parse_document(&page);
    let sel = |s: &str| Selector::parse(s).unwrap();
    assert_eq!(doc.select(&sel("script")).count(), 0);
    // Each series' row: its key as text, its slope and n as in `status`.
    let mut rows = 0;
    for row in doc.select(&sel("table.overview tbody tr")) {
        let key: String = row.select(&sel("td .key")).next().unwrap().text().collect();
        let s = status
            .iter()
            .find(|s| s["series"] == key.as_str())
            .expect(&key);
        let shown: f64 = row
            .select(&sel("td.slope"))
            .next()
            .unwrap()
            .text()
            .collect::<String>()
            .replace('−', "-")
            .parse()
            .unwrap();
        let slope = s["slope"].as_f64().unwrap();
        assert!(
            (shown - slope).abs() <= 5e-4 * slope.abs(),
            "{key}: {shown} vs {slope}"
        );
        let n: i64 = row
            .select(&sel("td.n"))
            .next()
            .unwrap()
            .text()
            .collect::<String>()
            .parse()
            .unwrap();
        assert_eq!(n, s["n"].as_i64().unwrap());
        let open: i64 = row
            .select(&sel("td.open"))
            .next()
            .unwrap()
            .text()
            .collect::<String>()
            .parse()
            .unwrap();
        assert_eq!(open, s["open_findings"].as_i64().unwrap());
        rows += 1;
    }
    assert_eq!(rows, 2);
    assert!(
        doc.select(&sel(".key"))
            .any(|e| e.text().collect::<String>() == SCRIPTED),
        "the script-named series is not shown as text"
    );
    // The charts: inline SVG, the slipped record ringed and labelled.
    assert!(doc.select(&sel("section.chart svg")).count() >= 2);
    assert!(
        doc.select(&sel("text.flag-label"))
            .any(|e| e.text().collect::<String>() == SLIP_ID),
        "the slipped record is not labelled on its chart"
    );
    // The open finding about it is listed.
    assert!(
        doc.select(&sel("table.findings td"))
            .any(|e| e.text().collect::<String>().contains(SLIP_ID))
    );

    // HEAD: the same head, no body.
    let h = send(
        port,
        format!("HEAD / HTTP/1.1\r\nHost: localhost:{port}\r\n\r\n").as_bytes(),
        true,
    );
    assert_eq!(h.status, 200);
    assert_eq!(h.header("Content-Type"), r.header("Content-Type"));
    let length: usize = h.header("Content-Length").unwrap().parse().unwrap();
    // The page carries a time stamp of the same length each second.
    assert!(
        length.abs_diff(r.body.len()) < 64,
        "{length} vs {}",
        r.body.len()
    );

    // What is not served.
    let audit_before = site.count("SELECT COUNT(*) FROM audit_log");
    let p = send(
        port,
        format!(
            "POST / HTTP/1.1\r\nHost: localhost:{port}\r\nContent-Type: application/x-www-form-urlencoded\r\nContent-Length: 15\r\n\r\nverdict=exclude"
        )
        .as_bytes(),
        false,
    );
    assert_eq!(p.status, 405);
    assert_eq!(p.header("Allow"), Some("GET, HEAD"));
    for method in ["PUT", "DELETE", "PATCH"] {
        let p = send(
            port,
            format!("{method} /metrics HTTP/1.1\r\nHost: localhost\r\n\r\n").as_bytes(),
            false,
        );
        assert_eq!(p.status, 405, "{method}");
    }
    let n = get(port, "/does-not-exist-%3Cb%3E");
    assert_eq!(n.status, 404);
    assert!(!n.text().contains("does-not-exist"), "the path is echoed");
    let b = send(port, b"GET /metrics\r\n\r\n", false);
    assert_eq!(b.status, 400);
    let rebound = send(
        port,
        b"GET / HTTP/1.1\r\nHost: rebound.example.net\r\n\r\n",
        false,
    );
    assert_eq!(rebound.status, 421);
    assert!(!rebound.text().contains("rebound"));

    // A huge header is refused, promptly.
    let t = Instant::now();
    let mut huge = format!("GET / HTTP/1.1\r\nHost: localhost:{port}\r\nX-Filler: ").into_bytes();
    huge.extend(std::iter::repeat_n(b'x', 256 * 1024));
    huge.extend_from_slice(b"\r\n\r\n");
    let refused = send(port, &huge, false);
    assert_eq!(refused.status, 431);
    assert!(t.elapsed() < Duration::from_secs(5), "{:?}", t.elapsed());

    // Nothing was written by any of it.
    assert_eq!(site.count("SELECT COUNT(*) FROM audit_log"), audit_before);
    assert_eq!(site.count("SELECT COUNT(*) FROM verdicts"), 0);

    // A client that connects and says nothing holds neither the others
    // nor the shutdown.
    let _silent = TcpStream::connect(("127.0.0.1", port)).unwrap();
    let _half = {
        let mut s = TcpStream::connect(("127.0.0.1", port)).unwrap();
        s.write_all(b"GET /healthz HTTP/1.1\r\nHo").unwrap();
        s
    };
    std::thread::sleep(Duration::from_millis(200));
    let took = site.stop(daemon);
    assert!(
        took < Duration::from_secs(5),
        "the daemon took {took:?} to stop"
    );
    assert!(
        TcpStream::connect(("127.0.0.1", port)).is_err(),
        "the port still answers after the daemon exited"
    );
}

#[test]
fn a_port_in_use_is_reported_and_the_daemon_goes_on_watching() {
    let taken = TcpListener::bind("127.0.0.1:0").unwrap();
    let site = Site::new(taken.local_addr().unwrap().port());
    let daemon = site.start();
    let log = site.log(1);
    assert!(
        log.contains("cannot listen on") && log.contains("choose another port"),
        "{log}"
    );
    site.deliver("a.csv", first_file().as_bytes());
    let took = site.stop(daemon);
    assert!(took < Duration::from_secs(5), "{took:?}");
}

#[test]
fn check_config_refuses_a_non_loopback_listen_unless_allowed() {
    let dir = tempfile::tempdir().unwrap();
    let check = |http: &str| {
        let file = dir.path().join("c.toml");
        std::fs::write(&file, format!("[http]\n{http}\n")).unwrap();
        Command::new(env!("CARGO_BIN_EXE_slopewarden"))
            .args(["check-config"])
            .arg(&file)
            .current_dir(dir.path())
            .output()
            .unwrap()
    };
    let out = check("listen = \"0.0.0.0:8787\"");
    assert_eq!(
        out.status.code(),
        Some(3),
        "exit code 3: invalid configuration"
    );
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("http.listen") && err.contains("loopback"),
        "{err}"
    );
    let out = check("listen = \"192.0.2.10:8787\"\nallow_remote = false");
    assert_eq!(out.status.code(), Some(3));
    let out = check("listen = \"localhost:8787\"");
    assert_eq!(out.status.code(), Some(3), "a name is not an address");
    for fine in [
        "listen = \"127.0.0.1:8787\"",
        "listen = \"[::1]:8787\"",
        "listen = \"0.0.0.0:8787\"\nallow_remote = true",
    ] {
        let out = check(fine);
        assert!(
            out.status.success(),
            "{fine}: {}",
            String::from_utf8_lossy(&out.stderr)
        );
    }
    // The example configuration's [http] section, uncommented, is valid.
    let example = std::fs::read_to_string(
        std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("config/slopewarden.example.toml"),
    )
    .unwrap();
    let section: Vec<&str> = example
        .lines()
        .skip_while(|l| *l != "# [http]")
        .filter_map(|l| l.strip_prefix("# "))
        .filter(|l| l.starts_with('[') || l.contains(" = "))
        .collect();
    assert_eq!(
        section,
        [
            "[http]",
            "listen = \"127.0.0.1:8787\"",
            "allow_remote = false"
        ]
    );
    let out = check(&section[1..].join("\n"));
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
}
