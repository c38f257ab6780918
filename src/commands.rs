//! The daemon's commands: load the configuration, open the store, call
//! the library, print.

use std::io::{IsTerminal, Write};
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::sync::Arc;
use std::sync::atomic::AtomicBool;

use slopewarden::config::Config;
use slopewarden::daemon;
use slopewarden::fitreport::analyse;
use slopewarden::pipeline::Outcome;
use slopewarden::stats::Transform;
use slopewarden::store::Store;
use slopewarden::table::Columns;

use super::{EXIT_BAD_INPUT, EXIT_CONFIG, EXIT_INTERRUPTED, EXIT_IO, EXIT_STORE, EXIT_VERIFY};

fn load(config: Option<&Path>) -> Result<Config, ExitCode> {
    match config {
        Some(path) => Config::load(path).map_err(|problems| {
            eprintln!(
                "slopewarden: the configuration {} has {} problem(s):",
                path.display(),
                problems.len()
            );
            for p in problems {
                eprintln!("  {p}");
            }
            ExitCode::from(EXIT_CONFIG)
        }),
        None => Ok(Config::defaults_in(Path::new("."))),
    }
}

/// The configuration and its store, which must exist already (every
/// command but `run`, `ingest` and `demo`): a mistyped path must not
/// quietly create an empty database that then "verifies".
fn setup(config: Option<&Path>) -> Result<(Config, Store), ExitCode> {
    let config = load(config)?;
    if !config.database.exists() {
        eprintln!(
            "slopewarden: there is no database at {}; check [paths] database in the configuration, or start with `slopewarden run` or `ingest`",
            config.database.display()
        );
        return Err(ExitCode::from(EXIT_STORE));
    }
    let store = open(&config)?;
    Ok((config, store))
}

/// The configuration and its store, created when missing.
fn setup_creating(config: Option<&Path>) -> Result<(Config, Store), ExitCode> {
    let config = load(config)?;
    let store = open(&config)?;
    Ok((config, store))
}

fn open(config: &Config) -> Result<Store, ExitCode> {
    Store::open(&config.database).map_err(|e| {
        eprintln!("slopewarden: {e}");
        ExitCode::from(EXIT_STORE)
    })
}

fn init_logs(json: bool, to_stderr: bool) {
    let filter = tracing_subscriber::EnvFilter::try_from_env("SLOPEWARDEN_LOG")
        .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("info"));
    // Colours only for a person at a terminal, never into a journal or a file.
    let ansi = if to_stderr {
        std::io::stderr().is_terminal()
    } else {
        std::io::stdout().is_terminal()
    };
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_target(false)
        .with_ansi(ansi);
    let result = match (json, to_stderr) {
        (true, true) => builder.json().with_writer(std::io::stderr).try_init(),
        (true, false) => builder.json().try_init(),
        (false, true) => builder.with_writer(std::io::stderr).try_init(),
        (false, false) => builder.try_init(),
    };
    if let Err(e) = result {
        eprintln!("slopewarden: logging not set up: {e}");
    }
}

fn stop_flag() -> Arc<AtomicBool> {
    let stop = Arc::new(AtomicBool::new(false));
    for sig in [signal_hook::consts::SIGTERM, signal_hook::consts::SIGINT] {
        if let Err(e) = signal_hook::flag::register(sig, Arc::clone(&stop)) {
            eprintln!("slopewarden: cannot catch signal {sig}: {e}");
        }
    }
    stop
}

pub fn run(config: Option<&Path>, json_logs: bool) -> ExitCode {
    init_logs(json_logs, false);
    let (config, mut store) = match setup_creating(config) {
        Ok(v) => v,
        Err(code) => return code,
    };
    let stop = stop_flag();
    match daemon::run(&config, &mut store, &stop) {
        Ok(_) => ExitCode::SUCCESS,
        Err(daemon::DaemonError::Store(e)) => {
            eprintln!("slopewarden: {e}");
            ExitCode::from(EXIT_STORE)
        }
        Err(e) => {
            eprintln!("slopewarden: {e}");
            ExitCode::from(EXIT_IO)
        }
    }
}

pub fn ingest(config: Option<&Path>, json_logs: bool, paths: &[PathBuf]) -> ExitCode {
    init_logs(json_logs, true);
    let with_config = config.map_or_else(String::new, |c| format!(" --config {}", c.display()));
    let (config, mut store) = match setup_creating(config) {
        Ok(v) => v,
        Err(code) => return code,
    };
    let stop = stop_flag();
    let tty = std::io::stderr().is_terminal();
    let result = daemon::ingest_paths(
        &config,
        &mut store,
        paths,
        &stop,
        |done, total, path, outcome| {
            if tty {
                let mark = match outcome {
                    Ok(Outcome::Quarantined { .. }) => "quarantined",
                    Ok(Outcome::Duplicate { .. }) => "already ingested",
                    Ok(_) => "ok",
                    Err(_) => "failed",
                };
                eprint!("\r\x1b[2K[{done}/{total}] {} ({mark})", path.display());
                if done == total {
                    eprintln!();
                }
            }
        },
    );
    match result {
        Ok(t) => {
            println!(
                "{} file(s) ingested, {} already ingested, {} quarantined, {} failed; {} new record(s)",
                t.ingested, t.duplicates, t.quarantined, t.failed, t.records
            );
            for line in ingest_next_steps(&t, &config, &store, &with_config) {
                println!("{line}");
            }
            if stop.load(std::sync::atomic::Ordering::SeqCst) {
                eprintln!(
                    "slopewarden ingest: interrupted; the files not yet taken stay where they are, run the same command again to go on"
                );
                ExitCode::from(EXIT_INTERRUPTED)
            } else if t.failed > 0 {
                ExitCode::from(EXIT_IO)
            } else {
                ExitCode::SUCCESS
            }
        }
        Err(e) => {
            eprintln!("slopewarden ingest: {e}");
            ExitCode::from(EXIT_BAD_INPUT)
        }
    }
}

/// What the person who ran `ingest` does next: the open findings to
/// check, the files set aside, the files to run again.
fn ingest_next_steps(
    t: &daemon::RunTotals,
    config: &Config,
    store: &Store,
    with_config: &str,
) -> Vec<String> {
    let mut lines = Vec::new();
    match store.open_findings(0) {
        Ok((_, open)) if open > 0 => lines.push(format!(
            "{open} open finding(s) await a check of their records: list them with \
             `slopewarden findings --open{with_config}`, read one with \
             `slopewarden show ID{with_config}`, then record a verdict with \
             `slopewarden review ID --verdict confirmed|corrected|excluded --note \"...\"{with_config}`"
        )),
        Ok(_) => {}
        Err(e) => lines.push(format!("(open findings not counted: {e})")),
    }
    if t.quarantined > 0 {
        lines.push(format!(
            "files set aside whole are in {}, each with a .reason.txt that says what to fix",
            config.quarantine.display()
        ));
    }
    if t.failed > 0 {
        lines.push(
            "files that failed stayed where they were; the log above says why; run the same command again once it is fixed"
                .to_string(),
        );
    }
    lines
}

pub fn check_config(file: Option<&Path>) -> ExitCode {
    match load(file) {
        Ok(c) => {
            println!("configuration is valid");
            println!("  inbox      {}", c.inbox.display());
            println!("  database   {}", c.database.display());
            println!("  archive    {}", c.archive.display());
            println!("  quarantine {}", c.quarantine.display());
            if let Some(h) = &c.http {
                println!("  http       {} (read-only pages)", h.listen);
            }
            for f in c.feeds() {
                println!("  feed {:<12} files {}", f.name, f.pattern);
            }
            ExitCode::SUCCESS
        }
        Err(code) => code,
    }
}

fn print_json(value: &impl serde::Serialize) -> ExitCode {
    let text = match serde_json::to_string_pretty(value) {
        Ok(t) => t,
        Err(e) => {
            eprintln!("slopewarden: cannot write the output: {e}");
            return ExitCode::from(EXIT_IO);
        }
    };
    let stdout = std::io::stdout();
    let mut out = stdout.lock();
    match writeln!(out, "{text}") {
        Ok(()) => ExitCode::SUCCESS,
        // A closed pipe (`| head`, `| grep -q`) is the reader's choice.
        Err(e) if e.kind() == std::io::ErrorKind::BrokenPipe => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("slopewarden: cannot write the output: {e}");
            ExitCode::from(EXIT_IO)
        }
    }
}

/// A number for a table: 5 significant digits, plain when readable.
fn num(v: f64) -> String {
    let a = v.abs();
    if v == 0.0 || (1e-3..1e5).contains(&a) {
        let places = if v == 0.0 {
            1
        } else {
            (4 - a.log10().floor() as i32).clamp(0, 8) as usize
        };
        format!("{v:.places$}")
    } else {
        format!("{v:.4e}")
    }
}

fn opt(v: Option<f64>) -> String {
    v.map_or("-".into(), num)
}

fn interval(low: Option<f64>, high: Option<f64>) -> String {
    match (low, high) {
        (Some(a), Some(b)) => format!("[{}, {}]", num(a), num(b)),
        _ => "-".into(),
    }
}

pub fn status(config: Option<&Path>, json: bool) -> ExitCode {
    let (config, store) = match setup(config) {
        Ok(v) => v,
        Err(code) => return code,
    };
    let mut rows = match store.status() {
        Ok(r) => r,
        Err(e) => {
            eprintln!("slopewarden: {e}");
            return ExitCode::from(EXIT_STORE);
        }
    };
    // What each slope is in, as the report and the overview say it, and
    // the unit of the newest record where none is configured.
    type Units = (String, Option<String>);
    let mut units: std::collections::HashMap<String, Units> = match store.series_glance() {
        Ok(glances) => glances
            .iter()
            .map(|g| {
                let slope = slopewarden::report::glance_slope_unit(g);
                (g.row.key.clone(), (slope, g.row.record_unit.clone()))
            })
            .collect(),
        Err(e) => {
            eprintln!("slopewarden: {e}");
            return ExitCode::from(EXIT_STORE);
        }
    };
    for r in &mut rows {
        if let Some((slope, record_unit)) = units.remove(&r.series) {
            r.slope_unit = Some(slope);
            r.unit = r.unit.take().or(record_unit);
        }
        r.min_detectable_relative_error = match (r.residual_sd, r.level) {
            (Some(sd), Some(level)) => slopewarden::findings::rules::smallest_detectable_error(
                r.n.max(0) as usize,
                sd,
                level,
                matches!(r.transform.as_str(), "log-y" | "log-log"),
                &config.findings,
            ),
            _ => None,
        };
    }
    if json {
        return print_json(&rows);
    }
    if rows.is_empty() {
        println!(
            "No series yet: drop record files into {}",
            config.inbox.display()
        );
        return ExitCode::SUCCESS;
    }
    let unit_width = rows
        .iter()
        .filter_map(|r| r.slope_unit.as_ref())
        .map(|u| u.chars().count())
        .max()
        .unwrap_or(0)
        .max("slope in".len());
    println!(
        "{:<32} {:>8} {:>4} {:>6} {:>12} {:>26}  {:<unit_width$} {:>9} {:>5} {:>8}  {:<22}  non-detects",
        "series",
        "records",
        "ND",
        "n",
        "slope",
        "CI",
        "slope in",
        "p",
        "open",
        "catches",
        "last arrival"
    );
    for r in rows {
        println!(
            "{:<32} {:>8} {:>4} {:>6} {:>12} {:>26}  {:<unit_width$} {:>9} {:>5} {:>8}  {:<22}  {}",
            r.series,
            r.records,
            r.censored,
            r.n,
            opt(r.slope),
            interval(r.slope_ci_low, r.slope_ci_high),
            r.slope_unit.as_deref().unwrap_or("-"),
            r.slope_p.map_or("-".into(), |p| format!("{p:.2e}")),
            r.open_findings,
            r.min_detectable_relative_error.map_or("-".into(), |e| {
                slopewarden::findings::rules::detectable_text(
                    e,
                    matches!(r.transform.as_str(), "log-y" | "log-log"),
                )
            }),
            r.last_arrival.unwrap_or_default(),
            r.non_detects
        );
    }
    println!(
        "(ND: non-detects stored; n: points in the fit; p is '-' with no scatter or fewer than 3 points;\n catches: the smallest error in y the outlier test flags at the current scatter, a share of the level,\n or on a ln(y) scale a factor too high or too low)"
    );
    ExitCode::SUCCESS
}

pub fn diagnostics(config: Option<&Path>, series: &str, json: bool) -> ExitCode {
    let (config, store) = match setup(config) {
        Ok(v) => v,
        Err(code) => return code,
    };
    let (row, points) = match (store.series(series), store.fit_points(series)) {
        (Ok(Some(row)), Ok(Some(points))) => (row, points),
        (Ok(None), _) | (_, Ok(None)) => {
            eprintln!("slopewarden: no series `{series}`; `slopewarden status` lists them");
            return ExitCode::from(EXIT_BAD_INPUT);
        }
        (Err(e), _) | (_, Err(e)) => {
            eprintln!("slopewarden: {e}");
            return ExitCode::from(EXIT_STORE);
        }
    };
    let columns = Columns {
        x: points.iter().map(|p| p.x).collect(),
        y: points.iter().map(|p| p.y).collect(),
        lines: (1..=points.len() as u64).collect(),
        x_column: 1,
        y_column: 2,
    };
    let scale = Transform::from_name(&row.transform).unwrap_or_default();
    let fitted = match scale {
        Transform::None => "y on x, no transform",
        Transform::LogY => "ln y on x",
        Transform::LogX => "y on ln x",
        Transform::LogLog => "ln y on ln x",
    };
    let slope_unit = match slope_unit_of(&store, series) {
        Ok(u) => u,
        Err(code) => return code,
    };
    let source = format!(
        "series {series} (fitted: {fitted}{}; non-detects: {})",
        slope_unit.map_or(String::new(), |u| format!("; slope in {u}")),
        row.non_detects
    );
    let report = match analyse(&source, "x", "y", columns, Transform::None, config.level) {
        Ok(r) => slopewarden::fitreport::FitReport {
            record_ids: Some(points.iter().map(|p| p.record_id.clone()).collect()),
            ..r
        },
        Err(e) => {
            eprintln!("slopewarden: {e}");
            return ExitCode::from(EXIT_BAD_INPUT);
        }
    };
    let stdout = std::io::stdout();
    let mut out = stdout.lock();
    let written = if json {
        report.write_json(&mut out)
    } else {
        report.write_text(&mut out)
    };
    match written {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("slopewarden: cannot write the output: {e}");
            ExitCode::from(EXIT_IO)
        }
    }
}

pub fn findings(config: Option<&Path>, open: bool, series: Option<&str>, json: bool) -> ExitCode {
    let matcher = match series.map(globset::Glob::new) {
        None => None,
        Some(Ok(g)) => Some(g.compile_matcher()),
        Some(Err(e)) => {
            eprintln!(
                "slopewarden: --series {}: {}; write a series key or a glob such as `MW-*/*`",
                series.unwrap_or_default(),
                e.kind()
            );
            return ExitCode::from(EXIT_BAD_INPUT);
        }
    };
    let (_, store) = match setup(config) {
        Ok(v) => v,
        Err(code) => return code,
    };
    // Findings about a file or a feed have no series; a pattern leaves
    // them out.
    let wanted = |r: &slopewarden::store::FindingRow| match (&matcher, &r.series) {
        (None, _) => true,
        (Some(m), Some(key)) => m.is_match(key),
        (Some(_), None) => false,
    };
    // Written as they are read: a store may hold tens of thousands.
    let stdout = std::io::stdout();
    let mut out = std::io::BufWriter::new(stdout.lock());
    let mut listed = 0usize;
    let written = if json {
        use serde::ser::{SerializeSeq, Serializer};
        let mut ser = serde_json::Serializer::pretty(&mut out);
        let seq = ser.serialize_seq(None);
        seq.and_then(|mut seq| {
            let each = store.each_finding(open, |r| match wanted(&r) {
                true => seq.serialize_element(&r),
                false => Ok(()),
            });
            match each {
                Ok(Ok(())) => seq.end().map(|()| Ok(())),
                Ok(Err(e)) => Err(e),
                Err(e) => Ok(Err(e)),
            }
        })
        .map_err(std::io::Error::from)
        .and_then(|stored| writeln!(out).map(|()| stored))
    } else {
        let each = store.each_finding(open, |r| {
            if !wanted(&r) {
                return Ok(());
            }
            if listed == 0 {
                writeln!(
                    out,
                    "{:>6}  {:<8} {:<9} {:<20}  summary",
                    "id", "severity", "status", "created"
                )?;
            }
            listed += 1;
            writeln!(
                out,
                "{:>6}  {:<8} {:<9} {:<20}  {}",
                r.id, r.severity, r.status, r.created_at, r.summary
            )
        });
        match each {
            // A pattern that matches nothing must not read like a clean site.
            Ok(Ok(())) if listed == 0 => match series {
                Some(p) => writeln!(
                    out,
                    "no {}findings in series matching `{p}` (`slopewarden status` lists the series)",
                    if open { "open " } else { "" }
                ),
                None => writeln!(out, "no {}findings", if open { "open " } else { "" }),
            }
            .map(Ok),
            Ok(Ok(())) => writeln!(
                out,
                "\nA flag is a prompt to verify a record, not a compliance determination. Check the record, then record a verdict with `slopewarden review ID --verdict confirmed|corrected|excluded --note TEXT`."
            )
            .map(Ok),
            Ok(Err(e)) => Err(e),
            Err(e) => Ok(Err(e)),
        }
    };
    match written.and_then(|stored| out.flush().map(|()| stored)) {
        Ok(Ok(())) => ExitCode::SUCCESS,
        Ok(Err(e)) => {
            eprintln!("slopewarden: {e}");
            ExitCode::from(EXIT_STORE)
        }
        // A closed pipe (`| head`, `| grep -q`) is the reader's choice.
        Err(e) if e.kind() == std::io::ErrorKind::BrokenPipe => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("slopewarden: cannot write the output: {e}");
            ExitCode::from(EXIT_IO)
        }
    }
}

pub fn demo(dir: Option<PathBuf>) -> ExitCode {
    let dir = dir.unwrap_or_else(slopewarden::demo::fresh_dir);
    if dir.join("data").exists() {
        eprintln!(
            "slopewarden: {} already holds a demo; give another --dir or remove it",
            dir.display()
        );
        return ExitCode::from(EXIT_BAD_INPUT);
    }
    println!(
        "slopewarden demo: Alder Brook, an invented former pottery works with three soil\ntransects around its kiln stack and four monitoring wells. Six deliveries go,\none by one, into {} where the real daemon takes them.",
        dir.join("inbox").display()
    );
    let start = std::time::Instant::now();
    let mut stdout = std::io::stdout();
    let done = match slopewarden::demo::run(&dir, &mut stdout) {
        Ok(d) => d,
        Err(e) => {
            eprintln!("slopewarden demo: {e}");
            return ExitCode::from(EXIT_IO);
        }
    };
    println!(
        "\n{} finding(s) in {:.1} s:",
        done.findings.len(),
        start.elapsed().as_secs_f64()
    );
    let mut shown = done.findings.clone();
    shown.sort_by_key(|f| f.id);
    for f in &shown {
        let outlier = f.kinds.iter().any(|k| k == "outlier");
        let cause = match (f.detail["causes"][0]["label"].as_str(), outlier) {
            (Some(c), _) => format!("\n         first cause to check: {c}"),
            // Far off the trend, and no entry error explains it.
            (None, true) if f.detail["no_cause"].is_string() => format!(
                "\n         no entry error explains it: check the sample itself (`show {}`)",
                f.id
            ),
            _ => String::new(),
        };
        println!("  {:>3}  {:<7} {}{cause}", f.id, f.severity, f.summary);
    }
    let config = dir.join("slopewarden.toml");
    println!(
        "\nmessages: {} .eml file(s) in {}",
        done.messages.len(),
        dir.join("data/outbox").display()
    );
    println!("report:   {}", done.report.display());
    if let Some(f) = shown
        .iter()
        .find(|f| f.detail["causes"].as_array().is_some_and(|c| !c.is_empty()))
    {
        println!(
            "\nnext, as the analyst (with the binary installed by `cargo install --path .`,\nor put `cargo run --release --` in front of each):\n  slopewarden show {id} --config {c}\n  slopewarden review {id} --verdict corrected --value V --note \"lab report says ...\" --config {c}\n  slopewarden verify --config {c}",
            id = f.id,
            c = config.display()
        );
    }
    println!(
        "\nAll names, places and numbers in the demo are invented. A flag is a prompt to\nverify a record, not a compliance determination."
    );
    ExitCode::SUCCESS
}

pub fn show(config: Option<&Path>, id: i64, json: bool) -> ExitCode {
    let (_, store) = match setup(config) {
        Ok(v) => v,
        Err(code) => return code,
    };
    let (row, verdicts) = match (store.finding(id), store.verdicts(Some(id))) {
        (Ok(Some(r)), Ok(v)) => (r, v),
        (Ok(None), _) => {
            eprintln!("slopewarden: there is no finding {id}; `slopewarden findings` lists them");
            return ExitCode::from(EXIT_BAD_INPUT);
        }
        (Err(e), _) | (_, Err(e)) => {
            eprintln!("slopewarden: {e}");
            return ExitCode::from(EXIT_STORE);
        }
    };
    // A trend change one record caused: what became of that record.
    let since = match (
        row.series.as_deref(),
        row.detail["newest_record"].as_str(),
        row.detail["caused_by_newest_record"].as_bool(),
    ) {
        (Some(series), Some(record), Some(true)) => {
            let read = || -> Result<slopewarden::show::Since, slopewarden::store::StoreError> {
                let mut about_record = Vec::new();
                for g in store.record_findings_of(series, record)? {
                    let vs = store.verdicts(Some(g.id))?;
                    about_record.push((g, vs));
                }
                let current = store.history(series)?.and_then(|mut h| h.pop());
                Ok(slopewarden::show::Since {
                    about_record,
                    current,
                })
            };
            match read() {
                Ok(s) => Some(s),
                Err(e) => {
                    eprintln!("slopewarden: {e}");
                    return ExitCode::from(EXIT_STORE);
                }
            }
        }
        _ => None,
    };
    if json {
        // `since` only for a trend change one record caused, as in the text.
        let mut doc = serde_json::json!({
            "finding": row,
            "verdicts": verdicts,
        });
        if let Some(s) = &since {
            doc["since"] = serde_json::json!({
                "record_findings": s
                    .about_record
                    .iter()
                    .map(|(f, vs)| serde_json::json!({ "finding": f, "verdicts": vs }))
                    .collect::<Vec<_>>(),
                "current_fit": s.current,
            });
        }
        return print_json(&doc);
    }
    print!(
        "{}",
        slopewarden::show::describe_finding(&row, &verdicts, since.as_ref())
    );
    ExitCode::SUCCESS
}

pub fn record(config: Option<&Path>, record_id: &str, json: bool) -> ExitCode {
    let (_, store) = match setup(config) {
        Ok(v) => v,
        Err(code) => return code,
    };
    let read = || -> Result<_, slopewarden::store::StoreError> {
        let versions = store.record_versions(record_id)?;
        let mut findings = Vec::new();
        for f in store.findings_naming(record_id)? {
            let vs = store.verdicts(Some(f.id))?;
            findings.push((f, vs));
        }
        Ok((versions, findings))
    };
    let (versions, findings) = match read() {
        Ok(v) => v,
        Err(e) => {
            eprintln!("slopewarden: {e}");
            return ExitCode::from(EXIT_STORE);
        }
    };
    if versions.is_empty() && findings.is_empty() {
        eprintln!(
            "slopewarden: no record `{record_id}` is stored, and no finding names it; `slopewarden findings` lists the findings"
        );
        return ExitCode::from(EXIT_BAD_INPUT);
    }
    if json {
        return print_json(&serde_json::json!({
            "record_id": record_id,
            "versions": versions,
            "findings": findings
                .iter()
                .map(|(f, vs)| serde_json::json!({ "finding": f, "verdicts": vs }))
                .collect::<Vec<_>>(),
        }));
    }
    print!(
        "{}",
        slopewarden::show::describe_record(record_id, &versions, &findings)
    );
    ExitCode::SUCCESS
}

pub fn review(
    config: Option<&Path>,
    finding: i64,
    action: slopewarden::review::Action,
    note: &str,
    by: Option<&str>,
) -> ExitCode {
    use slopewarden::review::{Review, review};
    let config_path = config;
    let (config, mut store) = match setup(config) {
        Ok(v) => v,
        Err(code) => return code,
    };
    let login = login();
    let at = slopewarden::clock::rfc3339(std::time::SystemTime::now());
    let request = Review {
        finding,
        action,
        note,
        by: by.unwrap_or(&login),
        at: &at,
    };
    match review(&mut store, &config, &request) {
        Ok(done) => {
            println!(
                "finding {finding}: {} (verdict {}); the finding is now {}",
                done.verdict, done.verdict_id, done.finding_status
            );
            if let (Some(series), Some(v)) = (&done.series, done.fit_version) {
                println!("series {series} refitted as version {v}");
                println!("  before: {}", fit_summary(&done.before));
                println!("  after:  {}", fit_summary(&done.after));
            }
            if !done.caused_trends.is_empty() {
                println!(
                    "this record alone caused these open trend findings; compare them with the refit above, then close each with a verdict:"
                );
                let with_config =
                    config_path.map_or(String::new(), |p| format!(" --config {}", p.display()));
                for (id, summary) in &done.caused_trends {
                    println!("  {id}: {summary}");
                    println!(
                        "      {}{with_config}",
                        slopewarden::review::close_trend_command(
                            *id,
                            finding,
                            done.verdict,
                            done.verdict_id
                        )
                    );
                }
            }
            ExitCode::SUCCESS
        }
        Err(e) => review_failed(e),
    }
}

/// What a refused verdict or window change prints, and its exit code: a
/// refusal is input to fix; anything else is the store's.
fn review_failed(e: slopewarden::review::ReviewError) -> ExitCode {
    use slopewarden::review::ReviewError;
    eprintln!("slopewarden: {e}");
    match e {
        ReviewError::Refused(_) => ExitCode::from(EXIT_BAD_INPUT),
        ReviewError::Store(_) => ExitCode::from(EXIT_STORE),
    }
}

fn login() -> String {
    std::env::var("USER")
        .or_else(|_| std::env::var("LOGNAME"))
        .unwrap_or_else(|_| "unknown".into())
}

fn fit_summary(f: &Option<slopewarden::stats::LineFit>) -> String {
    match f {
        Some(f) => format!(
            "slope {} [{}, {}], p = {}, n = {}",
            num(f.slope),
            num(f.slope_ci_low),
            num(f.slope_ci_high),
            f.slope_p.map_or("undefined".into(), |p| format!("{p:.3e}")),
            f.n
        ),
        None => "no fit".into(),
    }
}

pub fn window(
    config: Option<&Path>,
    series: &str,
    window: &str,
    note: &str,
    by: Option<&str>,
) -> ExitCode {
    use slopewarden::review::set_window;
    let (config, mut store) = match setup(config) {
        Ok(v) => v,
        Err(code) => return code,
    };
    let at = slopewarden::clock::rfc3339(std::time::SystemTime::now());
    let by = by.map_or_else(login, str::to_string);
    match set_window(&mut store, &config, series, window, note, &by, &at) {
        Ok(c) => {
            println!(
                "series {}: window {}; refitted as version {}",
                c.series,
                c.window.as_deref().unwrap_or("all points"),
                c.fit_version
            );
            println!("  before: {}", fit_summary(&c.before));
            println!("  after:  {}", fit_summary(&c.after));
            ExitCode::SUCCESS
        }
        Err(e) => review_failed(e),
    }
}

pub fn backup(config: Option<&Path>, file: &Path) -> ExitCode {
    if file.exists() {
        eprintln!(
            "slopewarden: {} already exists; give a new file name (a backup never overwrites)",
            file.display()
        );
        return ExitCode::from(EXIT_BAD_INPUT);
    }
    let (_, store) = match setup(config) {
        Ok(v) => v,
        Err(code) => return code,
    };
    match store.backup_to(file) {
        Ok(bytes) => {
            println!(
                "backed up {} to {} ({:.1} MB; integrity_check ok)",
                store.path().display(),
                file.display(),
                bytes as f64 / (1024.0 * 1024.0)
            );
            println!(
                "to prove it, point a configuration's [paths] database at the copy and run slopewarden verify"
            );
            ExitCode::SUCCESS
        }
        Err(e) => {
            eprintln!(
                "slopewarden: the backup failed, nothing was written to {}: {e}",
                file.display()
            );
            ExitCode::from(EXIT_STORE)
        }
    }
}

pub fn verify(config: Option<&Path>, json: bool) -> ExitCode {
    let (_, store) = match setup(config) {
        Ok(v) => v,
        Err(code) => return code,
    };
    let report = match slopewarden::verify::verify(&store) {
        Ok(r) => r,
        Err(e) => {
            eprintln!("slopewarden: {e}");
            return ExitCode::from(EXIT_STORE);
        }
    };
    if json {
        let code = print_json(&report);
        return if report.ok() {
            code
        } else {
            ExitCode::from(EXIT_VERIFY)
        };
    }
    println!(
        "{} audit entries, {} seals, {} fit versions of {} series checked",
        report.audit_entries, report.seals, report.fits, report.series
    );
    if report.ok() {
        println!(
            "intact: the chain holds, every row is vouched for, SQLite finds the file sound, every fit recomputes from the stored records"
        );
        return ExitCode::SUCCESS;
    }
    for p in &report.problems {
        println!("FAILED  {}: {}", p.location, p.what);
    }
    println!("{} problem(s) found", report.problems.len());
    println!(
        "The store was changed outside slopewarden, or damaged. Do not rely on its trends until this is explained: keep a copy of this database as it is, compare it with your latest backup (slopewarden backup), and find out who or what wrote to it."
    );
    ExitCode::from(EXIT_VERIFY)
}

pub fn report(config: Option<&Path>, series: Option<&str>, out: &Path, csv: bool) -> ExitCode {
    use slopewarden::report::{ReportError, ReportFormat, write_report};
    let (_, store) = match setup(config) {
        Ok(v) => v,
        Err(code) => return code,
    };
    let format = if csv {
        ReportFormat::Csv
    } else {
        ReportFormat::Html
    };
    let now = slopewarden::clock::rfc3339(std::time::SystemTime::now());
    match write_report(&store, series, format, out, &now) {
        Ok(summary) => {
            for f in &summary.files {
                println!("wrote {}", f.display());
            }
            println!(
                "{} series, {} findings. A flag is a prompt to verify a record, not a compliance determination.",
                summary.series, summary.findings
            );
            if let Some(note) = &summary.size_note {
                println!("{note}");
            }
            ExitCode::SUCCESS
        }
        Err(e @ ReportError::Pattern { .. }) => {
            eprintln!("slopewarden: {e}");
            ExitCode::from(EXIT_BAD_INPUT)
        }
        Err(e @ ReportError::Store(_)) => {
            eprintln!("slopewarden: {e}");
            ExitCode::from(EXIT_STORE)
        }
        Err(e) => {
            eprintln!("slopewarden: {e}");
            ExitCode::from(EXIT_IO)
        }
    }
}

pub fn send_test_email(config: Option<&Path>, to: Option<&str>) -> ExitCode {
    let config = match load(config) {
        Ok(c) => c,
        Err(code) => return code,
    };
    let mailer = match slopewarden::outbox::mailer(&config) {
        Ok(m) => m,
        Err(e) => {
            eprintln!("slopewarden: {e}");
            return ExitCode::from(EXIT_CONFIG);
        }
    };
    let recipients: Vec<String> = match to {
        Some(t) => vec![t.to_string()],
        None => config.mail.to.clone(),
    };
    match slopewarden::messages::send_test_email(
        mailer.as_ref(),
        &config.mail.from,
        &recipients,
        &config.mail.instance,
        std::time::SystemTime::now(),
    ) {
        Ok(report) => {
            println!("{report}");
            ExitCode::SUCCESS
        }
        Err(e) => {
            eprintln!("slopewarden: the test message was not sent: {e}");
            ExitCode::from(EXIT_IO)
        }
    }
}

/// What a series' slope is in, as `status` and the report say it.
fn slope_unit_of(store: &Store, series: &str) -> Result<Option<String>, ExitCode> {
    match store.series_glance_of(series) {
        Ok(glance) => Ok(glance.as_ref().map(slopewarden::report::glance_slope_unit)),
        Err(e) => {
            eprintln!("slopewarden: {e}");
            Err(ExitCode::from(EXIT_STORE))
        }
    }
}

pub fn history(config: Option<&Path>, series: &str, json: bool) -> ExitCode {
    let (_, store) = match setup(config) {
        Ok(v) => v,
        Err(code) => return code,
    };
    let rows = match store.history(series) {
        Ok(Some(r)) => r,
        Ok(None) => {
            eprintln!("slopewarden: no series `{series}`; `slopewarden status` lists them");
            return ExitCode::from(EXIT_BAD_INPUT);
        }
        Err(e) => {
            eprintln!("slopewarden: {e}");
            return ExitCode::from(EXIT_STORE);
        }
    };
    if json {
        return print_json(&rows);
    }
    match slope_unit_of(&store, series) {
        Ok(Some(unit)) => println!("series {series}: slopes in {unit}"),
        Ok(None) => {}
        Err(code) => return code,
    }
    println!(
        "{:>7} {:>6} {:>12} {:>26} {:>9} {:>12}  {:<20}  trigger",
        "version", "n", "slope", "CI", "p", "Theil-Sen", "at"
    );
    for r in rows {
        println!(
            "{:>7} {:>6} {:>12} {:>26} {:>9} {:>12}  {:<20}  {}",
            r.version,
            r.n,
            opt(r.slope),
            interval(r.slope_ci_low, r.slope_ci_high),
            r.slope_p.map_or("-".into(), |p| format!("{p:.2e}")),
            // "-" where it was not recomputed at that version.
            opt(r.theil_sen_slope),
            r.created_at,
            match (&r.trigger_file, &r.trigger_verdict) {
                _ if r.trigger_window.is_some() => format!(
                    "window change ({}): {}",
                    r.trigger_window.as_ref().map_or("", |w| w.1.as_str()),
                    r.window.as_deref().unwrap_or("all points")
                ),
                (Some(f), _) => f.clone(),
                (None, Some(v)) =>
                    format!("verdict {} on finding {}: {}", v.id, v.finding, v.verdict),
                (None, None) => String::new(),
            }
        );
    }
    ExitCode::SUCCESS
}
