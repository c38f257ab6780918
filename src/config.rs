//! Configuration: TOML text -> a validated [`Config`].
//!
//! Every key is optional and has a default, so `slopewarden run` with no
//! file works in the current directory. [`Config::from_toml`] reports every
//! problem at once, each with its key path and what to write instead; the
//! daemon refuses to start on any of them.
//!
//! Secrets never live in this text: a password is named by an environment
//! variable or a file (`password_env`, `password_file`), and a literal
//! `password` key is itself a problem.
//!
//! Invariant: no database, no watching, no reading of data files.

use std::fmt;
use std::path::{Path, PathBuf};
use std::time::Duration;

use globset::{Glob, GlobMatcher};
use toml::{Table, Value};

use crate::findings::Severity;
use crate::findings::rules::{CooksRule, Thresholds};
use crate::records::SeriesId;
use crate::records::{DateFormat, Layout, Matrix, SeriesKey, SeriesRules, XSource};
use crate::stats::Transform;

/// One problem in a configuration file.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ConfigProblem {
    /// Dotted key path, such as `watch.settle_seconds` or `series[2].x_min`.
    pub key: String,
    /// What is wrong and what to write instead.
    pub message: String,
}

impl fmt::Display for ConfigProblem {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}: {}", self.key, self.message)
    }
}

/// How the inbox is watched.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum WatchModeSetting {
    /// Operating-system change events (inotify), plus the periodic rescan.
    Native,
    /// Periodic listing only, for shares where events never arrive.
    Poll,
}

/// What to do with a file some of whose rows are refused.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum BadRows {
    /// Store the good rows, set the bad ones aside with their reasons.
    SetAside,
    /// Set the whole file aside.
    RejectFile,
}

/// How non-detects enter a fit. Every output states which was used.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum NonDetectPolicy {
    /// Left out of the fit (the default): no value is invented.
    Exclude,
    /// Entered at `fraction` × the reporting limit.
    Substitute {
        /// Fraction of the limit, in (0, 1].
        fraction: f64,
    },
}

impl NonDetectPolicy {
    /// The stored name: `exclude` or `substitute:<fraction>`.
    pub fn name(&self) -> String {
        match self {
            NonDetectPolicy::Exclude => "exclude".into(),
            NonDetectPolicy::Substitute { fraction } => format!("substitute:{fraction}"),
        }
    }

    /// Reads a stored name back (see [`NonDetectPolicy::name`]).
    pub fn from_name(name: &str) -> Option<NonDetectPolicy> {
        match name.split_once(':') {
            None if name == "exclude" => Some(NonDetectPolicy::Exclude),
            Some(("substitute", f)) => f
                .parse::<f64>()
                .ok()
                .filter(|f| *f > 0.0 && *f <= 1.0)
                .map(|fraction| NonDetectPolicy::Substitute { fraction }),
            _ => None,
        }
    }
}

/// Settings of one series.
#[derive(Debug, Clone, PartialEq)]
pub struct SeriesSettings {
    /// The unit values are converted to, if set.
    pub unit: Option<String>,
    /// Soil or water: makes ppm/ppb unambiguous.
    pub matrix: Matrix,
    /// Scale of the fit.
    pub transform: Transform,
    /// Plausible x range, inclusive.
    pub x_range: Option<(f64, f64)>,
    /// Whether negative values are plausible (false for concentrations).
    pub allow_negative: bool,
    /// Non-detect handling.
    pub non_detects: NonDetectPolicy,
    /// Thresholds of the finding rules for this series.
    pub findings: Thresholds,
    /// The analysis window of the fit (None: all points). A window set
    /// with the `window` command overrides this one.
    pub window: Option<crate::window::Window>,
    /// What x measures, such as "distance from the source" (labels only).
    pub x_name: Option<String>,
    /// The unit x is recorded in, such as "m": slopes read "mg/kg per m".
    pub x_unit: Option<String>,
}

/// Whether a configured `x_unit` names years ("year", "years", "yr", "a"):
/// x is then read as decimal years.
pub fn unit_is_year(unit: &str) -> bool {
    ["year", "years", "yr", "a"]
        .iter()
        .any(|y| unit.trim().eq_ignore_ascii_case(y))
}

impl SeriesSettings {
    /// The validation rules the record parser needs.
    pub fn rules(&self) -> SeriesRules {
        SeriesRules {
            unit: self.unit.clone(),
            matrix: self.matrix,
            x_range: self.x_range,
            allow_negative: self.allow_negative,
        }
    }
}

/// A feed: which files it covers and how they are laid out.
#[derive(Debug, Clone)]
pub struct Feed {
    /// Its name, recorded with each file.
    pub name: String,
    /// The glob as written.
    pub pattern: String,
    matcher: GlobMatcher,
    /// The layout of its files.
    pub layout: Layout,
    /// How often files of this feed are expected; longer silence raises a
    /// `silent_feed` finding.
    pub expected_every: Option<Duration>,
}

/// A validated configuration.
#[derive(Debug, Clone)]
pub struct Config {
    /// Folder watched for new files.
    pub inbox: PathBuf,
    /// SQLite database file.
    pub database: PathBuf,
    /// Where ingested files go (archive/YYYY/MM/).
    pub archive: PathBuf,
    /// Where unreadable files go, with a `.reason.txt` beside each.
    pub quarantine: PathBuf,
    /// Native events or polling.
    pub watch_mode: WatchModeSetting,
    /// A file must keep its size and mtime this long before it is taken.
    pub settle: Duration,
    /// Full rescans of the inbox (catches missed events).
    pub rescan: Duration,
    /// Polling interval in poll mode.
    pub poll: Duration,
    /// Whether subfolders of the inbox are watched.
    pub subfolders: bool,
    /// Leave files in the inbox after ingest (read-only inbox).
    pub keep_files: bool,
    /// Files larger than this are quarantined unread.
    pub max_file_bytes: u64,
    /// No file is taken while the disk of the store (or of the archive)
    /// has less free space than this; files wait in the inbox.
    pub min_free_bytes: u64,
    /// Per-file policy for refused rows.
    pub bad_rows: BadRows,
    /// Confidence level of intervals and significance.
    pub level: f64,
    defaults: SeriesSettings,
    series: Vec<(GlobMatcher, SeriesOverrides)>,
    feeds: Vec<Feed>,
    canonical: Layout,
    /// Who hears of findings, and how messages leave.
    pub mail: MailSettings,
    /// Thresholds of the finding rules.
    pub findings: Thresholds,
    /// Where the settings came from (None: built-in defaults) and the
    /// SHA-256 of the text, so that a change is recorded in the audit
    /// trail when `run` or `ingest` starts.
    pub origin: (Option<PathBuf>, String),
    /// The local read-only HTTP surface, when `[http] listen` is set.
    pub http: Option<HttpSettings>,
}

/// The read-only HTTP surface (`[http]`).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct HttpSettings {
    /// Address and port to listen on; loopback unless `allow_remote`.
    pub listen: std::net::SocketAddr,
}

fn text_sha256(text: &str) -> String {
    use sha2::Digest;
    hex::encode(sha2::Sha256::digest(text.as_bytes()))
}

/// How findings reach people.
#[derive(Debug, Clone)]
pub struct MailSettings {
    /// Sender address.
    pub from: String,
    /// Recipients of series no route matches.
    pub to: Vec<String>,
    /// Routes: series pattern -> recipients (every matching route adds its
    /// recipients; none matching means `to`).
    pub routes: Vec<(GlobMatcher, Vec<String>)>,
    /// Name of this installation (the Message-ID's domain).
    pub instance: String,
    /// At most this many messages per recipient per hour; the rest wait
    /// for a digest.
    pub max_per_hour: u32,
    /// Where messages are written as .eml files when no SMTP server is set.
    pub outbox_dir: PathBuf,
    /// The SMTP server, when configured.
    pub smtp: Option<SmtpConfig>,
    /// Severity per finding kind (kind name -> severity).
    pub severity: Vec<(String, Severity)>,
    /// First wait before retrying a failed delivery; it doubles per
    /// attempt, up to an hour.
    pub retry_first: Duration,
}

impl MailSettings {
    /// Recipients of a series' findings.
    pub fn recipients(&self, series: Option<&str>) -> Vec<String> {
        let mut out: Vec<String> = Vec::new();
        if let Some(key) = series {
            for (glob, to) in &self.routes {
                if glob.is_match(key) {
                    for r in to {
                        if !out.contains(r) {
                            out.push(r.clone());
                        }
                    }
                }
            }
        }
        if out.is_empty() {
            out = self.to.clone();
        }
        out
    }

    /// The configured severity of a finding kind.
    pub fn severity_of(&self, kind: &str) -> Severity {
        self.severity
            .iter()
            .find(|(k, _)| k == kind)
            .map_or(Severity::Warning, |(_, v)| *v)
    }
}

/// SMTP settings as written (the password is named, never given).
#[derive(Debug, Clone, PartialEq)]
pub struct SmtpConfig {
    /// Host name.
    pub host: String,
    /// Port (default by TLS mode: 587 STARTTLS, 465 implicit, 25 none).
    pub port: Option<u16>,
    /// `starttls`, `implicit` or `none`.
    pub tls: String,
    /// Login name.
    pub username: Option<String>,
    /// Environment variable holding the password.
    pub password_env: Option<String>,
    /// File holding the password.
    pub password_file: Option<PathBuf>,
    /// Extra trusted root certificate (PEM), for a private CA.
    pub ca_file: Option<PathBuf>,
    /// Connection timeout.
    pub timeout: Duration,
}

/// Threshold keys as written in one `[findings]` table.
#[derive(Debug, Clone, Default, PartialEq)]
struct ThresholdPatch {
    values: Vec<(&'static str, f64)>,
    cooks: Option<CooksRule>,
}

impl ThresholdPatch {
    fn apply(&self, t: &mut Thresholds) {
        for &(key, v) in &self.values {
            match key {
                "leverage_multiplier" => t.leverage_multiplier = v,
                "unexpected_leverage_factor" => t.unexpected_factor = v,
                "outlier_alpha" => t.outlier_alpha = v,
                "significance_alpha" => t.significance_alpha = v,
                "release_alpha" => t.release_alpha = v,
                "min_points" => t.min_n_record = v as usize,
                "min_points_trend" => t.min_n_trend = v as usize,
                _ => {}
            }
        }
        if let Some(c) = self.cooks {
            t.cooks = c;
        }
    }
}

#[derive(Debug, Clone, Default)]
struct SeriesOverrides {
    findings: Option<ThresholdPatch>,
    unit: Option<String>,
    matrix: Option<Matrix>,
    transform: Option<Transform>,
    x_min: Option<f64>,
    x_max: Option<f64>,
    allow_negative: Option<bool>,
    non_detects: Option<NonDetectPolicy>,
    /// Some(None): `window = "all"`.
    window: Option<Option<crate::window::Window>>,
    x_name: Option<String>,
    x_unit: Option<String>,
}

impl Config {
    /// The defaults, with paths relative to `base`.
    pub fn defaults_in(base: &Path) -> Config {
        // BUG-proof: an empty table has no problems.
        match Config::from_table(&Table::new(), base) {
            Ok(c) => c,
            Err(p) => unreachable!("BUG: the empty configuration is valid, got {p:?}"),
        }
    }

    /// Reads and validates a file; paths in it are relative to its folder.
    pub fn load(path: &Path) -> Result<Config, Vec<ConfigProblem>> {
        let text = std::fs::read_to_string(path).map_err(|e| {
            vec![ConfigProblem {
                key: path.display().to_string(),
                message: format!("cannot read the file: {e}"),
            }]
        })?;
        let base = path
            .parent()
            .filter(|p| !p.as_os_str().is_empty())
            .unwrap_or(Path::new("."));
        let mut config = Config::from_toml(&text, base)?;
        config.origin.0 = Some(path.to_path_buf());
        Ok(config)
    }

    /// Validates TOML text; relative paths are taken from `base`.
    pub fn from_toml(text: &str, base: &Path) -> Result<Config, Vec<ConfigProblem>> {
        let table: Table = text.parse().map_err(|e: toml::de::Error| {
            let at = e
                .span()
                .map(|s| {
                    let line = text[..s.start.min(text.len())].matches('\n').count() + 1;
                    format!("line {line}")
                })
                .unwrap_or_else(|| "file".into());
            vec![ConfigProblem {
                key: at,
                message: format!("not valid TOML: {}", e.message()),
            }]
        })?;
        let mut config = Config::from_table(&table, base)?;
        config.origin.1 = text_sha256(text);
        Ok(config)
    }

    fn from_table(t: &Table, base: &Path) -> Result<Config, Vec<ConfigProblem>> {
        let mut w = Walker::default();
        w.known(
            t,
            "",
            &[
                "paths",
                "watch",
                "ingest",
                "series_defaults",
                "series",
                "feed",
                "smtp",
                "mail",
                "findings",
                "http",
            ],
        );
        let empty = Table::new();
        let paths = w.table(t, "paths").unwrap_or(&empty);
        w.known(
            paths,
            "paths",
            &["inbox", "database", "archive", "quarantine"],
        );
        let resolve = |p: String| {
            let p = PathBuf::from(p);
            if p.is_absolute() { p } else { base.join(p) }
        };
        let inbox = resolve(
            w.string(paths, "paths", "inbox")
                .unwrap_or_else(|| "inbox".into()),
        );
        let database = resolve(
            w.string(paths, "paths", "database")
                .unwrap_or_else(|| "data/slopewarden.sqlite3".into()),
        );
        let archive = resolve(
            w.string(paths, "paths", "archive")
                .unwrap_or_else(|| "data/archive".into()),
        );
        let quarantine = resolve(
            w.string(paths, "paths", "quarantine")
                .unwrap_or_else(|| "data/quarantine".into()),
        );

        let watch = w.table(t, "watch").unwrap_or(&empty);
        w.known(
            watch,
            "watch",
            &[
                "mode",
                "settle_seconds",
                "rescan_seconds",
                "poll_seconds",
                "subfolders",
                "keep_files",
                "max_file_mb",
                "min_free_mb",
            ],
        );
        let watch_mode = match w.string(watch, "watch", "mode").as_deref() {
            None | Some("native") => WatchModeSetting::Native,
            Some("poll") => WatchModeSetting::Poll,
            Some(other) => {
                w.problem("watch.mode", format!("`{other}` is not a mode; write \"native\" (change events) or \"poll\" (for network shares)"));
                WatchModeSetting::Native
            }
        };
        let settle = w.seconds(watch, "watch", "settle_seconds", 2.0, 0.0, 3600.0);
        let rescan = w.seconds(watch, "watch", "rescan_seconds", 60.0, 1.0, 86_400.0);
        let poll = w.seconds(watch, "watch", "poll_seconds", 10.0, 0.1, 86_400.0);
        let subfolders = w.boolean(watch, "watch", "subfolders").unwrap_or(false);
        let keep_files = w.boolean(watch, "watch", "keep_files").unwrap_or(false);
        let max_file_mb = w
            .number(watch, "watch", "max_file_mb", Some((1.0, 1_000_000.0)))
            .unwrap_or(512.0);
        let min_free_mb = w
            .number(watch, "watch", "min_free_mb", Some((0.0, 1_000_000_000.0)))
            .unwrap_or(256.0);

        let ingest = w.table(t, "ingest").unwrap_or(&empty);
        w.known(ingest, "ingest", &["bad_rows", "confidence_level"]);
        let bad_rows = match w.string(ingest, "ingest", "bad_rows").as_deref() {
            None | Some("set-aside") => BadRows::SetAside,
            Some("reject-file") => BadRows::RejectFile,
            Some(other) => {
                w.problem("ingest.bad_rows", format!("`{other}` is not a policy; write \"set-aside\" (keep the good rows) or \"reject-file\""));
                BadRows::SetAside
            }
        };
        let level = w
            .number(ingest, "ingest", "confidence_level", Some((0.5, 0.9999)))
            .unwrap_or(0.95);
        if level >= 1.0 || level <= 0.0 {
            w.problem(
                "ingest.confidence_level",
                "write a level between 0.5 and 0.9999, such as 0.95".into(),
            );
        }

        let defaults_table = w.table(t, "series_defaults").unwrap_or(&empty);
        let d = w.series_overrides(defaults_table, "series_defaults", false);
        let defaults = SeriesSettings {
            unit: d.unit.clone(),
            matrix: d.matrix.unwrap_or(Matrix::Unknown),
            transform: d.transform.unwrap_or(Transform::None),
            x_range: range_of(d.x_min, d.x_max),
            allow_negative: d.allow_negative.unwrap_or(false),
            non_detects: d.non_detects.unwrap_or(NonDetectPolicy::Exclude),
            findings: Thresholds::default(),
            window: d.window.flatten(),
            x_name: d.x_name.clone(),
            x_unit: d.x_unit.clone(),
        };
        let mut series = Vec::new();
        for (i, entry) in w.array_of_tables(t, "series").into_iter().enumerate() {
            let at = format!("series[{i}]");
            let pattern = w.string(entry, &at, "match");
            let o = w.series_overrides(entry, &at, true);
            match pattern {
                None => w.problem(
                    &format!("{at}.match"),
                    "missing; write a pattern of series keys, e.g. \"MW-*/nitrate\"".into(),
                ),
                Some(p) => match Glob::new(&p) {
                    Ok(g) => series.push((g.compile_matcher(), o)),
                    Err(e) => w.problem(
                        &format!("{at}.match"),
                        format!("`{p}` is not a valid pattern: {e}"),
                    ),
                },
            }
        }

        let mut feeds = Vec::new();
        for (i, entry) in w.array_of_tables(t, "feed").into_iter().enumerate() {
            let at = format!("feed[{i}]");
            if let Some(feed) = w.feed(entry, &at) {
                feeds.push(feed);
            }
        }
        let mail = w.mail(t, &resolve);
        let findings = w.findings(t);
        let http = w.table(t, "http").and_then(|h| {
            w.known(h, "http", &["listen", "allow_remote"]);
            let allow_remote = w.boolean(h, "http", "allow_remote").unwrap_or(false);
            let listen = w.string(h, "http", "listen")?;
            match listen.parse::<std::net::SocketAddr>() {
                Ok(a) if a.ip().is_loopback() || allow_remote => Some(HttpSettings { listen: a }),
                Ok(a) => {
                    w.problem(
                        "http.listen",
                        format!("{a} is not a loopback address; the page shows monitoring data, so write 127.0.0.1:PORT, or set allow_remote = true if it must be reachable from other machines"),
                    );
                    None
                }
                Err(_) => {
                    w.problem(
                        "http.listen",
                        format!("`{listen}` is not an IP address and port (a host name such as localhost is not accepted); write for example \"127.0.0.1:8787\""),
                    );
                    None
                }
            }
        });
        let mut defaults = defaults;
        defaults.findings = findings;

        for (key, dir) in [
            ("paths.archive", &archive),
            ("paths.quarantine", &quarantine),
        ] {
            if dir.starts_with(&inbox) {
                w.problem(
                    key,
                    format!(
                        "{} lies inside the inbox {}; files moved there would be taken again. Put it beside the inbox",
                        dir.display(),
                        inbox.display()
                    ),
                );
            }
        }
        if !w.problems.is_empty() {
            return Err(w.problems);
        }
        Ok(Config {
            inbox,
            database,
            archive,
            quarantine,
            watch_mode,
            settle,
            rescan,
            poll,
            subfolders,
            keep_files,
            max_file_bytes: (max_file_mb * 1024.0 * 1024.0) as u64,
            min_free_bytes: (min_free_mb * 1024.0 * 1024.0) as u64,
            bad_rows,
            level,
            defaults,
            series,
            feeds,
            canonical: Layout::default(),
            mail,
            findings,
            origin: (None, text_sha256("")),
            http,
        })
    }

    /// The settings of a series: the defaults, overridden by every
    /// matching `[[series]]` entry in file order.
    pub fn series_settings(&self, id: &SeriesId) -> SeriesSettings {
        let mut s = self.defaults.clone();
        let (mut lo, mut hi) = s.x_range.map_or((None, None), |(a, b)| (Some(a), Some(b)));
        for (m, o) in &self.series {
            if !m.is_match(id.as_str()) {
                continue;
            }
            if o.unit.is_some() {
                s.unit.clone_from(&o.unit);
            }
            if let Some(v) = o.matrix {
                s.matrix = v;
            }
            if let Some(v) = o.transform {
                s.transform = v;
            }
            if o.x_min.is_some() {
                lo = o.x_min;
            }
            if o.x_max.is_some() {
                hi = o.x_max;
            }
            if let Some(v) = o.allow_negative {
                s.allow_negative = v;
            }
            if let Some(v) = o.non_detects {
                s.non_detects = v;
            }
            if let Some(p) = &o.findings {
                p.apply(&mut s.findings);
            }
            if let Some(w) = o.window {
                s.window = w;
            }
            if o.x_name.is_some() {
                s.x_name.clone_from(&o.x_name);
            }
            if o.x_unit.is_some() {
                s.x_unit.clone_from(&o.x_unit);
            }
        }
        s.x_range = range_of(lo, hi);
        s
    }

    /// The feed whose pattern matches a file (its path relative to the
    /// inbox), first match wins; the canonical layout otherwise.
    pub fn feed_for(&self, relative: &Path) -> (&str, &Layout) {
        let name = relative.file_name().map(Path::new).unwrap_or(relative);
        for f in &self.feeds {
            if f.matcher.is_match(relative) || f.matcher.is_match(name) {
                return (&f.name, &f.layout);
            }
        }
        ("canonical", &self.canonical)
    }

    /// The configured feeds.
    pub fn feeds(&self) -> &[Feed] {
        &self.feeds
    }
}

fn range_of(lo: Option<f64>, hi: Option<f64>) -> Option<(f64, f64)> {
    match (lo, hi) {
        (None, None) => None,
        (a, b) => Some((a.unwrap_or(f64::MIN), b.unwrap_or(f64::MAX))),
    }
}

/// Walks a TOML table, collecting every problem instead of stopping at the first.
#[derive(Default)]
struct Walker {
    problems: Vec<ConfigProblem>,
}

fn join(at: &str, key: &str) -> String {
    if at.is_empty() {
        key.to_string()
    } else {
        format!("{at}.{key}")
    }
}

fn type_name(v: &Value) -> &'static str {
    match v {
        Value::String(_) => "text",
        Value::Integer(_) | Value::Float(_) => "a number",
        Value::Boolean(_) => "true/false",
        Value::Datetime(_) => "a date",
        Value::Array(_) => "a list",
        Value::Table(_) => "a table",
    }
}

impl Walker {
    fn problem(&mut self, key: &str, message: String) {
        self.problems.push(ConfigProblem {
            key: key.to_string(),
            message,
        });
    }

    fn known(&mut self, t: &Table, at: &str, keys: &[&str]) {
        for k in t.keys() {
            if !keys.contains(&k.as_str()) {
                let hint = keys
                    .iter()
                    .min_by_key(|c| edit_distance(c, k))
                    .filter(|c| edit_distance(c, k) <= 3)
                    .map(|c| format!("; did you mean `{}`?", join(at, c)))
                    .unwrap_or_else(|| format!("; known keys here: {}", keys.join(", ")));
                self.problem(&join(at, k), format!("unknown key{hint}"));
            }
        }
    }

    fn table<'a>(&mut self, t: &'a Table, key: &str) -> Option<&'a Table> {
        match t.get(key)? {
            Value::Table(inner) => Some(inner),
            other => {
                self.problem(
                    key,
                    format!("expected a table `[{key}]`, found {}", type_name(other)),
                );
                None
            }
        }
    }

    fn array_of_tables<'a>(&mut self, t: &'a Table, key: &str) -> Vec<&'a Table> {
        match t.get(key) {
            None => Vec::new(),
            Some(Value::Array(items)) => items
                .iter()
                .enumerate()
                .filter_map(|(i, v)| match v {
                    Value::Table(inner) => Some(inner),
                    other => {
                        self.problem(
                            &format!("{key}[{i}]"),
                            format!("expected a table `[[{key}]]`, found {}", type_name(other)),
                        );
                        None
                    }
                })
                .collect(),
            Some(other) => {
                self.problem(
                    key,
                    format!(
                        "expected tables written `[[{key}]]`, found {}",
                        type_name(other)
                    ),
                );
                Vec::new()
            }
        }
    }

    fn string(&mut self, t: &Table, at: &str, key: &str) -> Option<String> {
        match t.get(key)? {
            Value::String(s) => Some(s.clone()),
            other => {
                self.problem(
                    &join(at, key),
                    format!("expected text in quotes, found {}", type_name(other)),
                );
                None
            }
        }
    }

    fn boolean(&mut self, t: &Table, at: &str, key: &str) -> Option<bool> {
        match t.get(key)? {
            Value::Boolean(b) => Some(*b),
            other => {
                self.problem(
                    &join(at, key),
                    format!("expected true or false, found {}", type_name(other)),
                );
                None
            }
        }
    }

    fn number(&mut self, t: &Table, at: &str, key: &str, range: Option<(f64, f64)>) -> Option<f64> {
        let v = match t.get(key)? {
            Value::Integer(i) => *i as f64,
            Value::Float(f) => *f,
            other => {
                self.problem(
                    &join(at, key),
                    format!("expected a number, found {}", type_name(other)),
                );
                return None;
            }
        };
        if !v.is_finite() {
            self.problem(&join(at, key), "expected a finite number".into());
            return None;
        }
        if let Some((lo, hi)) = range
            && !(lo..=hi).contains(&v)
        {
            self.problem(&join(at, key), format!("{v} is outside {lo}..{hi}"));
            return None;
        }
        Some(v)
    }

    fn seconds(
        &mut self,
        t: &Table,
        at: &str,
        key: &str,
        default: f64,
        lo: f64,
        hi: f64,
    ) -> Duration {
        Duration::from_secs_f64(self.number(t, at, key, Some((lo, hi))).unwrap_or(default))
    }

    fn string_list(&mut self, t: &Table, at: &str, key: &str) -> Option<Vec<String>> {
        let v = t.get(key)?;
        match v.as_array() {
            Some(a) if a.iter().all(|x| x.is_str()) => Some(
                a.iter()
                    .filter_map(|x| x.as_str().map(str::to_string))
                    .collect(),
            ),
            _ => {
                self.problem(
                    &join(at, key),
                    format!(
                        "expected a list of addresses such as [\"analyst@example.org\"], found {}",
                        type_name(v)
                    ),
                );
                None
            }
        }
    }

    fn mail(&mut self, t: &Table, resolve: &dyn Fn(String) -> PathBuf) -> MailSettings {
        let empty = Table::new();
        let m = self.table(t, "mail").unwrap_or(&empty);
        self.known(
            m,
            "mail",
            &[
                "from",
                "to",
                "instance",
                "max_per_hour",
                "outbox_dir",
                "route",
                "severity",
                "retry_seconds",
            ],
        );
        let from = self
            .string(m, "mail", "from")
            .unwrap_or_else(|| "slopewarden@localhost".into());
        let to = self
            .string_list(m, "mail", "to")
            .unwrap_or_else(|| vec!["analyst@localhost".into()]);
        let instance = self
            .string(m, "mail", "instance")
            .unwrap_or_else(|| "slopewarden.localhost".into());
        let max_per_hour = self
            .number(m, "mail", "max_per_hour", Some((1.0, 10_000.0)))
            .unwrap_or(6.0) as u32;
        let outbox_dir = self
            .string(m, "mail", "outbox_dir")
            .map_or_else(|| resolve("data/outbox".into()), resolve);
        let mut routes = Vec::new();
        for (i, r) in self.array_of_tables(m, "route").into_iter().enumerate() {
            let at = format!("mail.route[{i}]");
            self.known(r, &at, &["series", "to"]);
            let pattern = self.string(r, &at, "series");
            let to = self.string_list(r, &at, "to").unwrap_or_default();
            match pattern.map(|p| Glob::new(&p)) {
                Some(Ok(g)) => routes.push((g.compile_matcher(), to)),
                Some(Err(e)) => {
                    self.problem(&format!("{at}.series"), format!("not a valid pattern: {e}"))
                }
                None => self.problem(
                    &format!("{at}.series"),
                    "missing; write a pattern of series keys, e.g. \"MW-*/*\"".into(),
                ),
            }
        }
        let mut severity: Vec<(String, Severity)> = [
            ("high_leverage", Severity::Warning),
            ("influential", Severity::Warning),
            ("outlier", Severity::Warning),
            ("sign_reversal", Severity::Alert),
            ("significance_change", Severity::Warning),
            ("conflict", Severity::Warning),
            ("quarantined", Severity::Warning),
            ("silent_feed", Severity::Notice),
            ("disk_space", Severity::Alert),
            ("similar_series", Severity::Warning),
        ]
        .iter()
        .map(|&(k, v)| (k.to_string(), v))
        .collect();
        if let Some(sev) = self.table(m, "severity") {
            for (k, v) in sev {
                let at = format!("mail.severity.{k}");
                match (
                    severity.iter_mut().find(|(kk, _)| kk == k),
                    v.as_str().and_then(Severity::from_word),
                ) {
                    (Some(slot), Some(level)) => slot.1 = level,
                    (None, _) => self.problem(
                        &at,
                        "unknown finding kind; use high_leverage, influential, outlier, sign_reversal, significance_change, conflict, quarantined, silent_feed, disk_space or similar_series".into(),
                    ),
                    (Some(_), _) => {
                        self.problem(&at, "write \"notice\", \"warning\" or \"alert\"".into())
                    }
                }
            }
        }
        let smtp = self.table(t, "smtp").map(|st| {
            self.known(
                st,
                "smtp",
                &[
                    "host",
                    "port",
                    "tls",
                    "username",
                    "password",
                    "password_env",
                    "password_file",
                    "ca_file",
                    "timeout_seconds",
                ],
            );
            if st.contains_key("password") {
                self.problem("smtp.password", "passwords never go in the configuration text; set password_env = \"NAME\" (an environment variable) or password_file = \"/path\"".into());
            }
            let host = self.string(st, "smtp", "host").unwrap_or_default();
            if host.is_empty() {
                self.problem("smtp.host", "missing; write the mail server's name, e.g. \"mail.example.org\", or remove [smtp] to write messages to the outbox folder".into());
            }
            let tls = self
                .string(st, "smtp", "tls")
                .unwrap_or_else(|| "starttls".into());
            if !matches!(tls.as_str(), "starttls" | "implicit" | "none") {
                self.problem("smtp.tls", "write \"starttls\", \"implicit\" or \"none\"".into());
            }
            SmtpConfig {
                host,
                port: self
                    .number(st, "smtp", "port", Some((1.0, 65535.0)))
                    .map(|p| p as u16),
                tls,
                username: self.string(st, "smtp", "username"),
                password_env: self.string(st, "smtp", "password_env"),
                password_file: self.string(st, "smtp", "password_file").map(resolve),
                ca_file: self.string(st, "smtp", "ca_file").map(resolve),
                timeout: self.seconds(st, "smtp", "timeout_seconds", 30.0, 1.0, 600.0),
            }
        });
        let retry_first = self.seconds(m, "mail", "retry_seconds", 30.0, 0.1, 3600.0);
        MailSettings {
            retry_first,
            from,
            to,
            routes,
            instance,
            max_per_hour,
            outbox_dir,
            smtp,
            severity,
        }
    }

    fn findings(&mut self, t: &Table) -> Thresholds {
        let mut d = Thresholds::default();
        let Some(f) = self.table(t, "findings") else {
            return d;
        };
        self.threshold_patch(f, "findings").apply(&mut d);
        if d.release_alpha < d.significance_alpha {
            self.problem(
                "findings.release_alpha",
                format!(
                    "must be at least significance_alpha ({}); it is the wider band a significant trend must leave to stop being so",
                    d.significance_alpha
                ),
            );
        }
        d
    }

    /// The threshold keys written in a `[findings]` table (global, or of a
    /// `[[series]]` entry).
    fn threshold_patch(&mut self, f: &Table, at: &str) -> ThresholdPatch {
        const KEYS: [(&str, (f64, f64)); 7] = [
            ("leverage_multiplier", (1.0, 10.0)),
            ("unexpected_leverage_factor", (1.0, 100.0)),
            ("outlier_alpha", (1e-9, 0.2)),
            ("significance_alpha", (1e-6, 0.5)),
            ("release_alpha", (1e-6, 0.5)),
            ("min_points", (4.0, 1e6)),
            ("min_points_trend", (4.0, 1e6)),
        ];
        let mut known: Vec<&str> = KEYS.iter().map(|k| k.0).collect();
        known.push("cooks_distance");
        self.known(f, at, &known);
        let mut patch = ThresholdPatch::default();
        for (key, range) in KEYS {
            if let Some(v) = self.number(f, at, key, Some(range)) {
                patch.values.push((key, v));
            }
        }
        patch.cooks = match self.string(f, at, "cooks_distance").as_deref() {
            None => None,
            Some("median-f") => Some(CooksRule::MedianF),
            Some("4/n") => Some(CooksRule::FourOverN),
            Some(_) => {
                self.problem(
                    &join(at, "cooks_distance"),
                    "write \"median-f\" (median of F(p, n-p)) or \"4/n\"".into(),
                );
                None
            }
        };
        patch
    }

    fn series_overrides(&mut self, t: &Table, at: &str, with_match: bool) -> SeriesOverrides {
        let mut keys = vec![
            "unit",
            "matrix",
            "transform",
            "x_min",
            "x_max",
            "allow_negative",
            "non_detects",
            "substitute_fraction",
            "window",
            "x_name",
            "x_unit",
        ];
        if with_match {
            keys.push("match");
            keys.push("findings");
        }
        self.known(t, at, &keys);
        let findings = if with_match {
            self.table(t, "findings")
                .map(|f| self.threshold_patch(f, &join(at, "findings")))
        } else {
            None
        };
        let matrix = match self.string(t, at, "matrix").as_deref() {
            None => None,
            Some("soil") => Some(Matrix::Soil),
            Some("water") => Some(Matrix::Water),
            Some("unknown") => Some(Matrix::Unknown),
            Some(other) => {
                self.problem(
                    &join(at, "matrix"),
                    format!("`{other}` is not a matrix; write \"soil\", \"water\" or \"unknown\""),
                );
                None
            }
        };
        let transform = match self.string(t, at, "transform") {
            None => None,
            Some(name) => match Transform::from_name(&name) {
                Some(tr) => Some(tr),
                None => {
                    self.problem(&join(at, "transform"), format!("`{name}` is not a transform; write \"none\", \"log-y\", \"log-x\" or \"log-log\""));
                    None
                }
            },
        };
        let window = match self.string(t, at, "window").as_deref() {
            None => None,
            Some("all") => Some(None),
            Some(text) => match crate::window::Window::parse(text) {
                Ok(w) => Some(Some(w)),
                Err(e) => {
                    self.problem(
                        &join(at, "window"),
                        format!("{e}; or \"all\" for every point"),
                    );
                    None
                }
            },
        };
        let fraction = self.number(t, at, "substitute_fraction", Some((0.0, 1.0)));
        let non_detects = match self.string(t, at, "non_detects").as_deref() {
            None => {
                if fraction.is_some() {
                    self.problem(&join(at, "substitute_fraction"), "has no effect unless non_detects = \"substitute\"; add that or remove the fraction".into());
                }
                None
            }
            Some("exclude") => Some(NonDetectPolicy::Exclude),
            Some("substitute") => match fraction {
                Some(f) if f > 0.0 => Some(NonDetectPolicy::Substitute { fraction: f }),
                _ => {
                    self.problem(&join(at, "substitute_fraction"), "with non_detects = \"substitute\", state the fraction of the limit, e.g. substitute_fraction = 0.5".into());
                    None
                }
            },
            Some(other) => {
                self.problem(&join(at, "non_detects"), format!("`{other}` is not a policy; write \"exclude\" (the default) or \"substitute\" with substitute_fraction"));
                None
            }
        };
        let x_min = self.number(t, at, "x_min", None);
        let x_max = self.number(t, at, "x_max", None);
        if let (Some(a), Some(b)) = (x_min, x_max)
            && a > b
        {
            self.problem(&join(at, "x_max"), format!("x_max {b} is below x_min {a}"));
        }
        SeriesOverrides {
            unit: self.string(t, at, "unit"),
            matrix,
            transform,
            x_min,
            x_max,
            allow_negative: self.boolean(t, at, "allow_negative"),
            non_detects,
            window,
            findings,
            x_name: self.label(t, at, "x_name", 60, "distance from the source"),
            x_unit: self.label(t, at, "x_unit", 16, "m"),
        }
    }

    /// A short label shown in messages and reports: one line of printable
    /// text, at most `max` characters.
    fn label(
        &mut self,
        t: &Table,
        at: &str,
        key: &str,
        max: usize,
        example: &str,
    ) -> Option<String> {
        let text = self.string(t, at, key)?;
        let trimmed = text.trim();
        if trimmed.is_empty()
            || trimmed.chars().count() > max
            || trimmed.chars().any(char::is_control)
        {
            self.problem(
                &join(at, key),
                format!(
                    "write one line of at most {max} characters without control characters, such as \"{example}\""
                ),
            );
            return None;
        }
        Some(trimmed.to_string())
    }

    fn feed(&mut self, t: &Table, at: &str) -> Option<Feed> {
        self.known(
            t,
            at,
            &[
                "name",
                "files",
                "delimiter",
                "decimal_comma",
                "record_id",
                "series",
                "x",
                "x_date",
                "date_format",
                "y",
                "unit",
                "sampled_at",
                "note",
                "detection_limit",
                "qualifier",
                "expected_every_days",
            ],
        );
        let name = self.string(t, at, "name");
        let expected_every = self
            .number(t, at, "expected_every_days", Some((0.0001, 3650.0)))
            .map(|d| Duration::from_secs_f64(d * 86_400.0));
        let pattern = self.string(t, at, "files");
        let mut layout = Layout::default();
        match self.string(t, at, "delimiter").as_deref() {
            None | Some(",") => {}
            Some(";") => layout.delimiter = b';',
            Some("\t") | Some("tab") => layout.delimiter = b'\t',
            Some(other) => self.problem(
                &join(at, "delimiter"),
                format!("`{other}` is not supported; write \",\", \";\" or \"tab\""),
            ),
        }
        layout.decimal_comma = self.boolean(t, at, "decimal_comma").unwrap_or(false);
        if layout.decimal_comma && layout.delimiter == b',' {
            self.problem(
                &join(at, "decimal_comma"),
                "a decimal comma needs another delimiter; set delimiter = \";\" or \"tab\"".into(),
            );
        }
        if let Some(v) = self.string(t, at, "record_id") {
            layout.record_id = v;
        }
        if let Some(v) = self.string(t, at, "series") {
            layout.series = if v.contains('{') {
                SeriesKey::Template(v)
            } else {
                SeriesKey::Column(v)
            };
        }
        let x = self.string(t, at, "x");
        let x_date = self.string(t, at, "x_date");
        let format = match self.string(t, at, "date_format").as_deref() {
            None | Some("iso") => DateFormat::Iso,
            Some("dd.mm.yyyy") | Some("dd/mm/yyyy") => DateFormat::DayMonthYear,
            Some("mm/dd/yyyy") => DateFormat::MonthDayYear,
            Some(other) => {
                self.problem(&join(at, "date_format"), format!("`{other}` is not supported; write \"iso\" (2024-07-02), \"dd.mm.yyyy\" or \"mm/dd/yyyy\""));
                DateFormat::Iso
            }
        };
        match (x, x_date) {
            (Some(_), Some(_)) => self.problem(
                &join(at, "x_date"),
                "give either x (a numeric column) or x_date (a date column), not both".into(),
            ),
            (Some(col), None) => layout.x = XSource::Column(col),
            (None, Some(col)) => {
                layout.x = XSource::Date {
                    column: col,
                    format,
                }
            }
            (None, None) => {}
        }
        if let Some(v) = self.string(t, at, "y") {
            layout.y = v;
        }
        for (key, slot) in [
            ("unit", &mut layout.unit),
            ("sampled_at", &mut layout.sampled_at),
            ("note", &mut layout.note),
            ("detection_limit", &mut layout.detection_limit),
            ("qualifier", &mut layout.qualifier),
        ] {
            if let Some(v) = self.string(t, at, key) {
                *slot = Some(v);
            }
        }
        let Some(pattern) = pattern else {
            self.problem(
                &join(at, "files"),
                "missing; write a file-name pattern, e.g. \"lab-b_*.csv\"".into(),
            );
            return None;
        };
        let matcher = match Glob::new(&pattern) {
            Ok(g) => g.compile_matcher(),
            Err(e) => {
                self.problem(
                    &join(at, "files"),
                    format!("`{pattern}` is not a valid pattern: {e}"),
                );
                return None;
            }
        };
        Some(Feed {
            name: name.unwrap_or_else(|| pattern.clone()),
            pattern,
            matcher,
            layout,
            expected_every,
        })
    }
}

fn edit_distance(a: &str, b: &str) -> usize {
    let b: Vec<char> = b.chars().collect();
    let mut prev: Vec<usize> = (0..=b.len()).collect();
    for (i, ca) in a.chars().enumerate() {
        let mut cur = vec![i + 1; b.len() + 1];
        for (j, cb) in b.iter().enumerate() {
            cur[j + 1] = (prev[j] + usize::from(ca != *cb))
                .min(prev[j + 1] + 1)
                .min(cur[j] + 1);
        }
        prev = cur;
    }
    prev[b.len()]
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    #[test]
    fn empty_text_gives_the_documented_defaults() {
        let c = Config::from_toml("", Path::new("/srv/sw")).unwrap();
        assert_eq!(c.inbox, Path::new("/srv/sw/inbox"));
        assert_eq!(c.database, Path::new("/srv/sw/data/slopewarden.sqlite3"));
        assert_eq!(c.archive, Path::new("/srv/sw/data/archive"));
        assert_eq!(c.quarantine, Path::new("/srv/sw/data/quarantine"));
        assert_eq!(c.level, 0.95);
        assert_eq!(c.bad_rows, BadRows::SetAside);
        let s = c.series_settings(&SeriesId("MW-1/nitrate".into()));
        assert_eq!(s.non_detects, NonDetectPolicy::Exclude);
        assert_eq!(s.transform, Transform::None);
    }

    #[test]
    fn reports_every_problem_at_once_with_its_key() {
        let text = r#"
            [watch]
            mode = "sometimes"
            settle_secnds = 3
            [ingest]
            confidence_level = 2
            [[series]]
            match = "MW-*"
            transform = "sqrt"
            [smtp]
            password = "hunter2"
        "#;
        let problems = Config::from_toml(text, Path::new(".")).unwrap_err();
        let keys: Vec<&str> = problems.iter().map(|p| p.key.as_str()).collect();
        assert!(keys.contains(&"watch.mode"), "{keys:?}");
        assert!(keys.contains(&"watch.settle_secnds"), "{keys:?}");
        assert!(keys.contains(&"ingest.confidence_level"), "{keys:?}");
        assert!(keys.contains(&"series[0].transform"), "{keys:?}");
        assert!(keys.contains(&"smtp.password"), "{keys:?}");
        let typo = problems
            .iter()
            .find(|p| p.key == "watch.settle_secnds")
            .unwrap();
        assert!(
            typo.message.contains("did you mean `watch.settle_seconds`"),
            "{}",
            typo.message
        );
        // The secret itself never appears in a message.
        assert!(problems.iter().all(|p| !p.message.contains("hunter2")));
    }

    #[test]
    fn x_name_and_unit_come_from_the_defaults_and_the_matching_entries() {
        let text = r#"
            [series_defaults]
            x_unit = "year"
            [[series]]
            match = "*-transect/*"
            x_name = "  distance from the source "
            x_unit = "m"
        "#;
        let c = Config::from_toml(text, Path::new(".")).unwrap();
        let t = c.series_settings(&SeriesId("SP-transect/lead".into()));
        assert_eq!(t.x_name.as_deref(), Some("distance from the source"));
        assert_eq!(t.x_unit.as_deref(), Some("m"));
        let w = c.series_settings(&SeriesId("MW-1/nitrate".into()));
        assert_eq!(w.x_name, None);
        assert_eq!(w.x_unit.as_deref(), Some("year"));
        assert!(unit_is_year("Year") && unit_is_year("yr") && !unit_is_year("m"));
    }

    #[test]
    fn an_x_label_that_would_break_a_line_or_a_layout_is_refused() {
        let text =
            "[[series]]\nmatch = \"*\"\nx_unit = \"m\\r\\nBcc: all@example.net\"\nx_name = \"\"\n";
        let problems = Config::from_toml(text, Path::new(".")).unwrap_err();
        let keys: Vec<&str> = problems.iter().map(|p| p.key.as_str()).collect();
        assert_eq!(
            keys,
            ["series[0].x_name", "series[0].x_unit"],
            "{problems:?}"
        );
        assert!(problems[1].message.contains("at most 16 characters"));
        let long = format!("[series_defaults]\nx_name = \"{}\"\n", "d".repeat(61));
        let problems = Config::from_toml(&long, Path::new(".")).unwrap_err();
        assert_eq!(problems[0].key, "series_defaults.x_name");
    }

    #[test]
    fn a_series_entry_can_tighten_the_finding_thresholds() {
        let c = Config::from_toml(
            "[findings]\noutlier_alpha = 0.002\n\n[[series]]\nmatch = \"MW-*\"\n[series.findings]\noutlier_alpha = 0.01\ncooks_distance = \"4/n\"\n",
            Path::new("/srv"),
        )
        .unwrap();
        let well = c.series_settings(&SeriesId("MW-3/nitrate".into()));
        assert_eq!(well.findings.outlier_alpha, 0.01);
        assert_eq!(well.findings.cooks, CooksRule::FourOverN);
        assert_eq!(
            well.findings.min_n_record,
            Thresholds::default().min_n_record
        );
        let other = c.series_settings(&SeriesId("T1/lead".into()));
        assert_eq!(other.findings.outlier_alpha, 0.002);
        let bad = Config::from_toml(
            "[[series]]\nmatch = \"MW-*\"\n[series.findings]\ncooks_distance = \"huge\"\n",
            Path::new("/srv"),
        )
        .unwrap_err();
        assert!(
            bad.iter()
                .any(|p| p.key == "series[0].findings.cooks_distance"),
            "{bad:?}"
        );
    }

    #[test]
    fn later_series_entries_override_earlier_ones() {
        let text = r#"
            [series_defaults]
            unit = "mg/L"
            [[series]]
            match = "*-transect/*"
            transform = "log-y"
            unit = "mg/kg"
            matrix = "soil"
            x_min = 0
            x_max = 2000
            [[series]]
            match = "NE-transect/*"
            non_detects = "substitute"
            substitute_fraction = 0.5
        "#;
        let c = Config::from_toml(text, Path::new(".")).unwrap();
        let s = c.series_settings(&SeriesId("NE-transect/lead".into()));
        assert_eq!(s.transform, Transform::LogY);
        assert_eq!(s.unit.as_deref(), Some("mg/kg"));
        assert_eq!(s.x_range, Some((0.0, 2000.0)));
        assert_eq!(s.non_detects, NonDetectPolicy::Substitute { fraction: 0.5 });
        let w = c.series_settings(&SeriesId("MW-2/boron".into()));
        assert_eq!(w.unit.as_deref(), Some("mg/L"));
        assert_eq!(w.transform, Transform::None);
    }

    #[test]
    fn feeds_map_file_names_to_layouts() {
        let text = r#"
            [[feed]]
            name = "lab-b"
            files = "lab-b_*.csv"
            delimiter = ";"
            decimal_comma = true
            record_id = "SampleID"
            series = "{site}/{analyte}"
            x_date = "Date"
            date_format = "dd.mm.yyyy"
            y = "Result"
        "#;
        let c = Config::from_toml(text, Path::new(".")).unwrap();
        let (name, layout) = c.feed_for(Path::new("lab-b_2024-07.csv"));
        assert_eq!(name, "lab-b");
        assert_eq!(layout.delimiter, b';');
        assert!(matches!(layout.series, SeriesKey::Template(_)));
        assert!(matches!(
            layout.x,
            XSource::Date {
                format: DateFormat::DayMonthYear,
                ..
            }
        ));
        assert_eq!(c.feed_for(Path::new("other.csv")).0, "canonical");
    }

    #[test]
    fn refuses_an_archive_inside_the_inbox() {
        let problems = Config::from_toml(
            "[paths]\ninbox = \"in\"\narchive = \"in/done\"\n",
            Path::new("/x"),
        )
        .unwrap_err();
        assert_eq!(problems[0].key, "paths.archive");
    }

    #[test]
    fn invalid_toml_names_the_line() {
        let problems = Config::from_toml("[watch]\nmode = \n", Path::new(".")).unwrap_err();
        assert_eq!(problems.len(), 1);
        assert!(problems[0].key.starts_with("line 2"), "{:?}", problems[0]);
    }
}
