//! The watching loop: list the inbox, let files settle, process each ready
//! file in name order, sleep until a change event, a rescan or a poll.
//!
//! Shutdown: SIGTERM and SIGINT set a flag that the loop checks between
//! files, so the current file finishes (commit, then move) and an unfinished
//! one stays in the inbox for the next start. The flag is the only shared
//! state; it is passed in, so tests can set it.
//!
//! Invariant: no parsing, statistics or SQL here; this module only decides
//! when to call [`pipeline::process_file`].

use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::mpsc::{RecvTimeoutError, sync_channel};
use std::time::{Duration, Instant, SystemTime};

use thiserror::Error;
use tracing::{error, info, warn};

use crate::config::{Config, WatchModeSetting};
use crate::inbox::{
    self, Candidate, InboxConfig, InboxError, ReadyFile, Settler, Wake, WatchMode, Watcher,
};
use crate::pipeline::{self, Flow, Outcome, PipelineError, SeriesCache};
use crate::store::{AuditKind, Store};

/// Longest sleep between checks of the shutdown flag.
const TICK: Duration = Duration::from_millis(250);
/// Wait after the store fails before trying again.
const STORE_BACKOFF: Duration = Duration::from_secs(5);

/// Errors that stop the daemon.
#[derive(Debug, Error)]
pub enum DaemonError {
    /// The inbox cannot be watched or listed.
    #[error(transparent)]
    Inbox(#[from] InboxError),
    /// The store failed at start-up.
    #[error(transparent)]
    Store(#[from] crate::store::StoreError),
    /// Messages cannot be sent with these settings.
    #[error(transparent)]
    Mail(#[from] crate::outbox::MailerError),
    /// A folder or file given cannot be used.
    #[error("{path}: {source}; check that it exists and is readable", path = path.display())]
    Path {
        /// The path.
        path: PathBuf,
        /// The operating system's reason.
        source: std::io::Error,
    },
}

/// Totals over a run.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct RunTotals {
    /// Files stored.
    pub ingested: u64,
    /// Files skipped as already ingested.
    pub duplicates: u64,
    /// Files set aside whole.
    pub quarantined: u64,
    /// Records stored for the first time.
    pub records: u64,
    /// Files that failed and stayed in the inbox.
    pub failed: u64,
}

impl RunTotals {
    fn count(&mut self, outcome: &Outcome) {
        match outcome {
            Outcome::Ingested { counts, .. } => {
                self.ingested += 1;
                self.records += counts.new;
            }
            Outcome::Duplicate { .. } => self.duplicates += 1,
            Outcome::Quarantined { .. } => self.quarantined += 1,
            Outcome::Vanished => {}
        }
    }
}

fn inbox_config(config: &Config) -> InboxConfig {
    InboxConfig {
        dir: config.inbox.clone(),
        recursive: config.subfolders,
        settle: config.settle,
        follow_symlinks_inside: true,
    }
}

/// Watches the inbox until `stop` is set. The backlog already in the inbox
/// is taken first (after it settles).
pub fn run(
    config: &Config,
    store: &mut Store,
    stop: &AtomicBool,
) -> Result<RunTotals, DaemonError> {
    // The sender works beside the watcher on its own connection, so that a
    // slow or absent mail server never holds up ingestion.
    let mailer = crate::outbox::mailer(config)?;
    let mut sender_store = Store::open(store.path())?;
    let _checkpoints = store.checkpoint_in_background()?;
    std::thread::scope(|scope| {
        scope.spawn(|| send_until_stopped(config, &mut sender_store, mailer.as_ref(), stop));
        if let Some(http) = &config.http {
            let database = store.path().to_path_buf();
            scope.spawn(move || {
                if let Err(e) = crate::http::serve(http, &database, stop) {
                    error!(error = %e, "the HTTP surface is not available");
                }
            });
        }
        let result = watch(config, store, stop);
        // Make sure the sender stops even when watching failed.
        stop.store(true, Ordering::SeqCst);
        result
    })
}

/// A flag set by SIGHUP: reload the configuration.
fn reload_flag() -> Arc<AtomicBool> {
    let flag = Arc::new(AtomicBool::new(false));
    if let Err(e) = signal_hook::flag::register(signal_hook::consts::SIGHUP, Arc::clone(&flag)) {
        warn!(error = %e, "cannot catch SIGHUP; configuration changes need a restart");
    }
    flag
}

/// The configuration read again from its file, with the keys that only a
/// restart can change kept at their running values (each named in a
/// warning); None (and an error naming every problem) when the file is
/// invalid or there is no file.
fn reloaded(running: &Config) -> Option<Config> {
    let Some(path) = running.origin.0.clone() else {
        warn!("SIGHUP: running on built-in defaults, there is no configuration file to reload");
        return None;
    };
    let mut new = match Config::load(&path) {
        Ok(c) => c,
        Err(problems) => {
            for p in &problems {
                error!(problem = %p, "SIGHUP: the configuration is invalid; keeping the running one");
            }
            return None;
        }
    };
    let keep = |key: &str, changed: bool| {
        if changed {
            warn!(
                key,
                "SIGHUP: this setting takes effect only after a restart; the running value stays"
            );
        }
    };
    keep("paths.inbox", new.inbox != running.inbox);
    keep("paths.database", new.database != running.database);
    keep(
        "watch.mode",
        new.watch_mode != running.watch_mode || new.poll != running.poll,
    );
    keep("watch.subfolders", new.subfolders != running.subfolders);
    keep("http", new.http != running.http);
    keep(
        "mail / smtp",
        format!("{:?}", new.mail) != format!("{:?}", running.mail),
    );
    new.inbox = running.inbox.clone();
    new.database = running.database.clone();
    new.watch_mode = running.watch_mode;
    new.poll = running.poll;
    new.subfolders = running.subfolders;
    new.http = running.http.clone();
    new.mail = running.mail.clone();
    Some(new)
}

/// The folder and its free bytes when the disk of the store or of the
/// archive has less room than `watch.min_free_mb`; None when both have room.
fn short_of_space(config: &Config, store_dir: &Path) -> Option<(PathBuf, u64)> {
    for f in [store_dir, config.archive.as_path()] {
        // The archive folder may not exist yet: its parent's disk counts.
        let probe = f.ancestors().find(|a| a.exists()).unwrap_or(Path::new("."));
        match crate::inbox::space::free_bytes(probe) {
            Ok(free) if free < config.min_free_bytes => return Some((probe.to_path_buf(), free)),
            Ok(_) => {}
            Err(e) => warn!(folder = %probe.display(), error = %e, "cannot read the free space"),
        }
    }
    None
}

/// Logs a disk running low and raises a `disk_space` finding (once per
/// episode: the caller remembers that it did).
fn report_short_of_space(config: &Config, store: &mut Store, folder: &Path, free: u64) {
    let mb = |b: u64| b as f64 / (1024.0 * 1024.0);
    let summary = format!(
        "only {:.0} MB free on the disk of {} (at least {:.0} MB wanted, watch.min_free_mb); files wait in the inbox, nothing is lost; free some space",
        mb(free),
        folder.display(),
        mb(config.min_free_bytes)
    );
    error!(folder = %folder.display(), free_mb = mb(free), "disk nearly full; files wait in the inbox");
    let now = SystemTime::now();
    let at = crate::clock::rfc3339(now);
    let raised = store.begin().and_then(|tx| {
        crate::raise::plain_finding(
            &tx,
            config,
            "disk_space",
            None,
            None,
            &[],
            &summary,
            serde_json::json!({
                "folder": folder.display().to_string(),
                "free_bytes": free,
                "min_free_bytes": config.min_free_bytes,
                "rule": "free space below watch.min_free_mb (configuration)",
                "judged_against": "the free space wanted before a file is taken",
            }),
            (None, None),
            None,
            None,
            &at,
            crate::clock::unix_seconds(now),
        )?;
        tx.commit()
    });
    if let Err(e) = raised {
        error!(error = %e, "the disk_space finding could not be stored");
    }
}

/// Records the settings in force in the audit trail when they differ from
/// the last recorded (a first start, or an edited configuration file).
fn record_config(config: &Config, store: &mut Store) -> Result<(), DaemonError> {
    let (file, hash) = &config.origin;
    let last = store.last_audit_detail(AuditKind::Config)?;
    if last
        .as_deref()
        .and_then(|d| d.strip_prefix("sha256 "))
        .and_then(|d| d.get(..64))
        == Some(hash.as_str())
    {
        return Ok(());
    }
    let from = file.as_ref().map_or_else(
        || "the built-in defaults".to_string(),
        |p| p.display().to_string(),
    );
    store.audit(
        &crate::clock::rfc3339(SystemTime::now()),
        AuditKind::Config,
        &from,
        &format!(
            "sha256 {hash}; settings in force from now on: {from}{}",
            if last.is_some() { " (changed)" } else { "" }
        ),
    )?;
    info!(config = %from, "settings recorded in the audit trail");
    Ok(())
}

/// Keeps each series' stored x name and unit equal to the configuration's
/// (at start-up and reload): the report and the HTTP overview read their
/// axis and slope labels from the store alone.
fn apply_config_axes(config: &Config, store: &mut Store) -> Result<(), DaemonError> {
    let tx = store.begin()?;
    let mut changed = 0usize;
    for a in tx.series_axes()? {
        let s = config.series_settings(&crate::records::SeriesId(a.key));
        if s.x_name != a.name || s.x_unit != a.unit {
            tx.set_series_axis(a.id, s.x_name.as_deref(), s.x_unit.as_deref())?;
            changed += 1;
        }
    }
    if changed > 0 {
        tx.commit()?;
        info!(
            series = changed,
            "x names and units taken from the configuration"
        );
    }
    Ok(())
}

/// Records and refits the series whose configured analysis window changed
/// since their last fit (a changed configuration takes effect at start-up).
fn apply_config_windows(config: &Config, store: &mut Store) -> Result<(), DaemonError> {
    let at = crate::clock::rfc3339(SystemTime::now());
    match crate::review::apply_config_windows(store, config, &at) {
        Ok(changed) => {
            for c in changed {
                info!(
                    series = %c.series,
                    window = c.window.as_deref().unwrap_or("all points"),
                    version = c.fit_version,
                    "analysis window changed in the configuration; refitted"
                );
            }
            Ok(())
        }
        Err(crate::review::ReviewError::Store(e)) => Err(e.into()),
        Err(e) => {
            error!(error = %e, "analysis windows not applied");
            Ok(())
        }
    }
}

/// How often the sender looks for due messages.
const SEND_EVERY: Duration = Duration::from_secs(2);

fn send_until_stopped(
    config: &Config,
    store: &mut Store,
    mailer: &dyn crate::messages::Mailer,
    stop: &AtomicBool,
) {
    loop {
        match crate::outbox::send_due(config, store, mailer, SystemTime::now()) {
            Ok(pass) if pass != crate::outbox::Pass::default() => {
                info!(
                    sent = pass.sent,
                    deferred = pass.deferred,
                    failed = pass.failed,
                    digests = pass.digests,
                    "outbox pass"
                );
            }
            Ok(_) => {}
            Err(e) => error!(error = %e, "outbox pass failed; will retry"),
        }
        if stop.load(Ordering::SeqCst) {
            return;
        }
        sleep_unless_stopped(SEND_EVERY, stop);
        if stop.load(Ordering::SeqCst) {
            // One last pass so that findings of the last file go out;
            // what it cannot send stays pending for the next start.
            if let Err(e) = crate::outbox::send_due(config, store, mailer, SystemTime::now()) {
                error!(error = %e, "last outbox pass failed; pending messages go out at the next start");
            }
            return;
        }
    }
}

fn watch(config: &Config, store: &mut Store, stop: &AtomicBool) -> Result<RunTotals, DaemonError> {
    std::fs::create_dir_all(&config.inbox).map_err(|source| DaemonError::Path {
        path: config.inbox.clone(),
        source,
    })?;
    let cfg = inbox_config(config);
    let (tx, rx) = sync_channel::<Wake>(1);
    let mode = match config.watch_mode {
        WatchModeSetting::Native => WatchMode::Native,
        WatchModeSetting::Poll => WatchMode::Poll {
            interval: config.poll,
        },
    };
    let _watcher = Watcher::start(&cfg, mode, tx)?;
    let started = SystemTime::now();
    store.audit(
        &crate::clock::rfc3339(started),
        AuditKind::Lifecycle,
        "daemon",
        &format!("started; watching {}", config.inbox.display()),
    )?;
    record_config(config, store)?;
    apply_config_axes(config, store)?;
    apply_config_windows(config, store)?;
    info!(inbox = %config.inbox.display(), database = %store.path().display(), "watching");
    let mut current = config.clone();
    let mut settler = Settler::new(current.settle);
    let mut cache = SeriesCache::new();
    let mut totals = RunTotals::default();
    let mut next_scan = Instant::now();
    let mut reported = inbox::Reported::default();
    let mut dirty = true;
    let mut disk_low = false;
    let store_dir = store
        .path()
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."))
        .to_path_buf();
    let reload = reload_flag();
    while !stop.load(Ordering::SeqCst) {
        if reload.swap(false, Ordering::SeqCst)
            && let Some(new) = reloaded(&current)
        {
            current = new;
            settler = Settler::new(current.settle);
            cache.clear();
            record_config(&current, store)?;
            apply_config_axes(&current, store)?;
            apply_config_windows(&current, store)?;
            dirty = true;
            info!("configuration reloaded");
        }
        let config = &current;
        let now = Instant::now();
        if dirty || now >= next_scan || settler.pending() > 0 {
            dirty = false;
            next_scan = now + config.rescan;
            let listed = match inbox::list_candidates_noting(&cfg, &mut reported) {
                Ok(l) => l,
                Err(e) => {
                    error!(error = %e, "cannot list the inbox; retrying");
                    Vec::new()
                }
            };
            if let Err(e) = check_silent_feeds(config, store, started, SystemTime::now()) {
                error!(error = %e, "cannot check for silent feeds; will retry");
            }
            let ready: Vec<(&Config, ReadyFile)> = settler
                .observe(listed, Instant::now())
                .into_iter()
                .map(|f| (config, f))
                .collect();
            if !ready.is_empty() {
                let short = short_of_space(config, &store_dir);
                match (&short, disk_low) {
                    (Some((folder, free)), false) => {
                        report_short_of_space(config, store, folder, *free)
                    }
                    (None, true) => info!("disk space is back; taking files again"),
                    _ => {}
                }
                disk_low = short.is_some();
            }
            if !disk_low {
                let mut ran_low = None;
                pipeline::process_in_order(store, &mut cache, &ready, stop, |_, file, result| {
                    match result {
                        Ok(outcome) => totals.count(&outcome),
                        Err(e) => {
                            totals.failed += 1;
                            // The file stays; forget it so it is tried again.
                            settler.forget(&file.path);
                            error!(file = %file.relative.display(), error = %e, "file left in the inbox; will retry");
                            if matches!(e, PipelineError::Store(_)) {
                                sleep_unless_stopped(STORE_BACKOFF, stop);
                            }
                        }
                    }
                    // The free-space check before each next file.
                    ran_low = short_of_space(config, &store_dir);
                    if ran_low.is_some() {
                        Flow::Stop
                    } else {
                        Flow::Continue
                    }
                });
                if let Some((folder, free)) = ran_low {
                    report_short_of_space(config, store, &folder, free);
                    disk_low = true;
                }
            }
            // Files not taken (the disk ran low, or a stop) are looked at
            // again at the next scan.
            for (_, f) in &ready {
                if f.path.exists() {
                    settler.forget(&f.path);
                }
            }
        }
        let wait = if settler.pending() > 0 {
            TICK.min(config.settle)
        } else {
            TICK
        };
        match rx.recv_timeout(wait) {
            Ok(Wake::Changed) => dirty = true,
            Ok(Wake::Error(e)) => {
                warn!(error = %e, "watch error; the periodic rescan continues");
                dirty = true;
            }
            Err(RecvTimeoutError::Timeout) => {}
            Err(RecvTimeoutError::Disconnected) => {
                warn!("the watcher stopped; falling back to rescans");
                std::thread::sleep(TICK);
            }
        }
    }
    info!(?totals, "stopping: the current file was finished");
    store.audit(
        &crate::clock::rfc3339(SystemTime::now()),
        AuditKind::Lifecycle,
        "daemon",
        &format!(
            "stopped; this run: {} files ingested, {} duplicates, {} quarantined, {} new records",
            totals.ingested, totals.duplicates, totals.quarantined, totals.records
        ),
    )?;
    Ok(totals)
}

/// Raises a `silent_feed` finding for each feed with an expected interval
/// whose newest file (or, before any, the daemon's start) is older than
/// that interval, once per silence.
pub fn check_silent_feeds(
    config: &Config,
    store: &mut Store,
    started: SystemTime,
    now: SystemTime,
) -> Result<usize, crate::store::StoreError> {
    let mut raised = 0;
    for feed in config.feeds() {
        let Some(every) = feed.expected_every else {
            continue;
        };
        let last = store.last_arrival_of_feed(&feed.name)?;
        let since = last
            .clone()
            .unwrap_or_else(|| crate::clock::rfc3339(started));
        let due = crate::clock::rfc3339(now.checked_sub(every).unwrap_or(SystemTime::UNIX_EPOCH));
        if since.as_str() >= due.as_str() || store.silence_reported(&feed.name, &since)? {
            continue;
        }
        let at = crate::clock::rfc3339(now);
        let summary = format!(
            "feed {} has delivered no file since {} (expected every {:.1} days); check the lab's or the field crew's deliveries",
            feed.name,
            last.as_deref()
                .unwrap_or("this daemon started, and never before"),
            every.as_secs_f64() / 86_400.0
        );
        let tx = store.begin()?;
        crate::raise::plain_finding(
            &tx,
            config,
            "silent_feed",
            None,
            None,
            &[],
            &summary,
            serde_json::json!({ "feed": feed.name, "last_file_at": last,
                "expected_every_days": every.as_secs_f64() / 86_400.0,
                "rule": "no file for longer than the feed's expected_every_days (configuration)",
                "judged_against": "the feed's expected delivery interval" }),
            (None, None),
            None,
            None,
            &at,
            crate::clock::unix_seconds(now),
        )?;
        tx.commit()?;
        warn!(feed = %feed.name, "feed silent longer than expected; finding raised");
        raised += 1;
    }
    Ok(raised)
}

fn sleep_unless_stopped(total: Duration, stop: &AtomicBool) {
    let until = Instant::now() + total;
    while Instant::now() < until && !stop.load(Ordering::SeqCst) {
        std::thread::sleep(TICK);
    }
}

/// Runs the pipeline once over the given files and folders (a folder's
/// files in name order, subfolders when configured), then returns. Files
/// inside the configured inbox move to the archive as usual; files
/// elsewhere stay where they are. `progress` is called after each file.
pub fn ingest_paths(
    config: &Config,
    store: &mut Store,
    paths: &[PathBuf],
    stop: &AtomicBool,
    mut progress: impl FnMut(usize, usize, &Path, &Result<Outcome, PipelineError>),
) -> Result<RunTotals, DaemonError> {
    record_config(config, store)?;
    apply_config_axes(config, store)?;
    apply_config_windows(config, store)?;
    let _checkpoints = store.checkpoint_in_background()?;
    let mut files: Vec<(Candidate, bool)> = Vec::new();
    for p in paths {
        let meta = std::fs::metadata(p).map_err(|source| DaemonError::Path {
            path: p.clone(),
            source,
        })?;
        if meta.is_dir() {
            let cfg = InboxConfig {
                dir: p.clone(),
                recursive: config.subfolders,
                settle: Duration::ZERO,
                follow_symlinks_inside: true,
            };
            let inside = same_folder(p, &config.inbox);
            files.extend(
                inbox::list_candidates(&cfg)?
                    .into_iter()
                    .map(|c| (c, inside)),
            );
        } else {
            let inside = p.parent().is_some_and(|d| same_folder(d, &config.inbox));
            let relative = PathBuf::from(p.file_name().unwrap_or(p.as_os_str()));
            files.push((
                Candidate {
                    path: p.clone(),
                    relative,
                    size: meta.len(),
                    modified: meta.modified().unwrap_or(SystemTime::UNIX_EPOCH),
                },
                inside,
            ));
        }
    }
    let mut totals = RunTotals::default();
    let mut cache = SeriesCache::new();
    let total = files.len();
    let mut keep_config = config.clone();
    keep_config.keep_files = true;
    let jobs: Vec<(&Config, ReadyFile)> = files
        .into_iter()
        .map(|(c, inside)| {
            let cfg = if inside { config } else { &keep_config };
            let file = ReadyFile {
                path: c.path,
                relative: c.relative,
                size: c.size,
                modified: c.modified,
            };
            (cfg, file)
        })
        .collect();
    pipeline::process_in_order(store, &mut cache, &jobs, stop, |i, file, result| {
        match &result {
            Ok(o) => totals.count(o),
            Err(e) => {
                totals.failed += 1;
                error!(file = %file.path.display(), error = %e, "file not ingested");
            }
        }
        progress(i + 1, total, &file.path, &result);
        Flow::Continue
    });
    // Deliver (or write to the outbox folder) what the files raised.
    let mailer = crate::outbox::mailer(config)?;
    let pass = crate::outbox::send_due(config, store, mailer.as_ref(), SystemTime::now())?;
    if pass.sent + pass.deferred + pass.failed > 0 {
        info!(sent = pass.sent, deferred = pass.deferred, failed = pass.failed, via = %mailer.describe(), "messages");
    }
    Ok(totals)
}

fn same_folder(a: &Path, b: &Path) -> bool {
    match (a.canonicalize(), b.canonicalize()) {
        (Ok(x), Ok(y)) => x == y,
        _ => false,
    }
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    #[test]
    fn a_silent_feed_is_reported_once_per_silence() {
        let dir = tempfile::tempdir().unwrap();
        let config = Config::from_toml(
            "[[feed]]\nname = \"ridge-lab\"\nfiles = \"ridge_*.csv\"\nexpected_every_days = 7\n",
            dir.path(),
        )
        .unwrap();
        let mut store = Store::open(&dir.path().join("db.sqlite3")).unwrap();
        let started = SystemTime::UNIX_EPOCH + Duration::from_secs(1_700_000_000);
        let day = Duration::from_secs(86_400);
        // Six days of silence: within the expected interval.
        assert_eq!(
            check_silent_feeds(&config, &mut store, started, started + 6 * day).unwrap(),
            0
        );
        // Eight days: one finding, and only one however often it is checked.
        assert_eq!(
            check_silent_feeds(&config, &mut store, started, started + 8 * day).unwrap(),
            1
        );
        assert_eq!(
            check_silent_feeds(&config, &mut store, started, started + 9 * day).unwrap(),
            0
        );
        let f = store.findings(true).unwrap();
        assert_eq!(f.len(), 1);
        assert_eq!(f[0].kinds, vec!["silent_feed".to_string()]);
        assert_eq!(f[0].detail["feed"], "ridge-lab");
        assert_eq!(f[0].severity, crate::findings::Severity::Notice);
    }
}
