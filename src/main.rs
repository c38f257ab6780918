//! The `slopewarden` command line: argument parsing and exit codes only;
//! each command is a function of `commands`, and the work is in the library.

use std::io::{self, BufWriter, Write};
use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Parser, Subcommand, ValueEnum};
use slopewarden::fitreport::analyse;
use slopewarden::review::{Action, Verdict};
use slopewarden::stats::Transform;
use slopewarden::table::read_xy_file;

/// The ingest makes and drops many small strings per record on two
/// threads; mimalloc's per-thread free lists cut the allocator's share of
/// that work (benches/ingest.sh measures it).
#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

/// Exit code for input the user must fix (a bad file, a bad argument value).
const EXIT_BAD_INPUT: u8 = 2;
/// Exit code when the output could not be written, or the inbox failed.
const EXIT_IO: u8 = 1;
/// Exit code for an invalid configuration.
const EXIT_CONFIG: u8 = 3;
/// Exit code when the database cannot be opened or written.
const EXIT_STORE: u8 = 4;
/// Exit code when `verify` finds the audit chain, a seal or a fit broken.
const EXIT_VERIFY: u8 = 5;
/// Exit code when `ingest` was interrupted (SIGINT or SIGTERM) before it
/// had taken every file (128 + SIGINT, as shells report it). `run` exits 0
/// on SIGTERM: stopping is how a service ends.
const EXIT_INTERRUPTED: u8 = 130;

#[derive(Parser)]
#[command(
    name = "slopewarden",
    version,
    about = "Trend refits and influence diagnostics for environmental monitoring series"
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Fit a straight line to two columns of a CSV file and show every
    /// point's leverage and influence.
    Fit {
        /// The CSV file (header row required).
        file: PathBuf,
        /// Column holding x (distance, decimal year, ...).
        #[arg(long, default_value = "x")]
        x: String,
        /// Column holding y (the measured value).
        #[arg(long, default_value = "y")]
        y: String,
        /// Scale of the fit.
        #[arg(long, value_enum, default_value_t = TransformArg::None)]
        transform: TransformArg,
        /// Confidence level of the intervals.
        #[arg(long, default_value_t = 0.95, value_parser = parse_level)]
        level: f64,
        /// Print one JSON object instead of the summary.
        #[arg(long)]
        json: bool,
    },
    /// Replay an invented site's deliveries through the real daemon into a
    /// fresh folder: findings, .eml messages and an HTML report.
    Demo {
        /// Folder for the demo (default: a new one under the temporary folder).
        #[arg(long)]
        dir: Option<PathBuf>,
    },
    /// Watch the inbox and keep every series' trend current (foreground;
    /// SIGTERM or Ctrl-C finishes the current file and exits 0).
    Run {
        /// Configuration file (TOML); without it, defaults in the current folder.
        #[arg(long)]
        config: Option<PathBuf>,
        /// Log format on standard output.
        #[arg(long, value_enum, default_value_t = LogFormat::Text)]
        log_format: LogFormat,
    },
    /// Run the same pipeline once over files or folders, then exit.
    Ingest {
        /// Configuration file (TOML).
        #[arg(long)]
        config: Option<PathBuf>,
        /// Log format on standard error.
        #[arg(long, value_enum, default_value_t = LogFormat::Text)]
        log_format: LogFormat,
        /// Files or folders to ingest.
        #[arg(required = true)]
        paths: Vec<PathBuf>,
    },
    /// Check a configuration file and list every problem in it.
    CheckConfig {
        /// The file (default: built-in defaults only).
        file: Option<PathBuf>,
    },
    /// Every series with its current trend.
    Status {
        /// Configuration file (TOML).
        #[arg(long)]
        config: Option<PathBuf>,
        /// One JSON list instead of the table.
        #[arg(long)]
        json: bool,
    },
    /// The current fit of one series with every point's diagnostics.
    Diagnostics {
        /// The series key.
        series: String,
        /// Configuration file (TOML).
        #[arg(long)]
        config: Option<PathBuf>,
        /// The same JSON as `fit --json`.
        #[arg(long)]
        json: bool,
    },
    /// Findings: records and trend changes that deserve a check.
    Findings {
        /// Only those still awaiting a verdict.
        #[arg(long)]
        open: bool,
        /// Only findings about series whose key matches this glob (e.g.
        /// `MW-*/*`, or one series' key).
        #[arg(long)]
        series: Option<String>,
        /// Configuration file (TOML).
        #[arg(long)]
        config: Option<PathBuf>,
        /// One JSON list instead of the table.
        #[arg(long)]
        json: bool,
    },
    /// Everything about one finding: its numbers and cutoffs, the fit with
    /// and without the record, the likely causes, its verdicts.
    Show {
        /// The finding id (from `findings` or the email).
        finding: i64,
        /// Configuration file (TOML).
        #[arg(long)]
        config: Option<PathBuf>,
        /// One JSON object instead of the text.
        #[arg(long)]
        json: bool,
    },
    /// Everything stored about one record: each version with its file,
    /// line and the line as written, its diagnostics on arrival, and the
    /// findings that name it with their verdicts.
    Record {
        /// The record id, as delivered.
        record_id: String,
        /// Configuration file (TOML).
        #[arg(long)]
        config: Option<PathBuf>,
        /// One JSON object instead of the text.
        #[arg(long)]
        json: bool,
    },
    /// Record a verdict on a finding after checking the record (field
    /// sheet, chain of custody, lab report); the series refits.
    Review {
        /// The finding id.
        finding: i64,
        /// What the check showed.
        #[arg(
            long,
            value_enum,
            required_unless_present = "revert",
            conflicts_with = "revert"
        )]
        verdict: Option<VerdictArg>,
        /// The corrected value (with `--verdict corrected`), in the unit stored.
        #[arg(
            long,
            required_if_eq("verdict", "corrected"),
            allow_hyphen_values = true
        )]
        value: Option<f64>,
        /// Undo the finding's latest verdict and reopen the finding.
        #[arg(long)]
        revert: bool,
        /// What was checked and what it showed (kept in the audit trail).
        #[arg(long)]
        note: String,
        /// Who gives the verdict (default: the login name).
        #[arg(long)]
        by: Option<String>,
        /// Configuration file (TOML).
        #[arg(long)]
        config: Option<PathBuf>,
    },
    /// Set the analysis window of a series (audited; the series refits):
    /// `x:LO..HI` (either side may be empty), `last:N`, `since:YYYY-MM-DD`,
    /// `all` for every point, or `config` to follow the configuration again.
    Window {
        /// The series key.
        series: String,
        /// The window.
        window: String,
        /// Why (kept in the audit trail).
        #[arg(long)]
        note: String,
        /// Who changes it (default: the login name).
        #[arg(long)]
        by: Option<String>,
        /// Configuration file (TOML).
        #[arg(long)]
        config: Option<PathBuf>,
    },
    /// Copy the database while the daemon runs (SQLite's online backup),
    /// checked and written in full before it takes FILE's name.
    Backup {
        /// The copy to write (must not exist).
        file: PathBuf,
        /// Configuration file (TOML).
        #[arg(long)]
        config: Option<PathBuf>,
    },
    /// Check the audit chain, the seals on every row, and recompute every
    /// stored fit from the stored records; exits 5 on any failure.
    Verify {
        /// Configuration file (TOML).
        #[arg(long)]
        config: Option<PathBuf>,
        /// One JSON object instead of the text.
        #[arg(long)]
        json: bool,
    },
    /// Send a short test message with the configured mail settings (or
    /// write it to the outbox folder when no server is configured).
    SendTestEmail {
        /// Configuration file (TOML).
        #[arg(long)]
        config: Option<PathBuf>,
        /// Recipient (default: the configured `mail.to`).
        #[arg(long)]
        to: Option<String>,
    },
    /// Write a report of how each trend came to be: one self-contained
    /// HTML file, or CSV exports of fits, findings and verdicts.
    Report {
        /// Only series whose key matches this glob (e.g. `MW-*/*`).
        #[arg(long)]
        series: Option<String>,
        /// The output file (HTML); with `--format csv`, `trend.csv` writes
        /// trend-fits.csv, trend-findings.csv and trend-verdicts.csv beside it.
        #[arg(long)]
        out: PathBuf,
        /// Output format.
        #[arg(long, value_enum, default_value_t = ReportFormatArg::Html)]
        format: ReportFormatArg,
        /// Configuration file (TOML).
        #[arg(long)]
        config: Option<PathBuf>,
    },
    /// Every fit version of one series, with what triggered it.
    History {
        /// The series key.
        series: String,
        /// Configuration file (TOML).
        #[arg(long)]
        config: Option<PathBuf>,
        /// One JSON list instead of the table.
        #[arg(long)]
        json: bool,
    },
}

#[derive(Clone, Copy, PartialEq, Eq, ValueEnum)]
enum LogFormat {
    /// Human-readable lines.
    Text,
    /// One JSON object per line.
    Json,
}

#[derive(Clone, Copy, PartialEq, Eq, ValueEnum)]
enum VerdictArg {
    /// The record is right as it is.
    Confirmed,
    /// The record was wrong: store the value given with --value.
    Corrected,
    /// Leave the record out of the fit (it stays stored).
    Excluded,
}

#[derive(Clone, Copy, PartialEq, Eq, ValueEnum)]
enum ReportFormatArg {
    /// One self-contained HTML file.
    Html,
    /// CSV files: fits, findings and verdicts.
    Csv,
}

#[derive(Clone, Copy, ValueEnum)]
enum TransformArg {
    /// y on x.
    None,
    /// ln y on x.
    LogY,
    /// y on ln x.
    LogX,
    /// ln y on ln x.
    LogLog,
}

impl From<TransformArg> for Transform {
    fn from(t: TransformArg) -> Self {
        match t {
            TransformArg::None => Transform::None,
            TransformArg::LogY => Transform::LogY,
            TransformArg::LogX => Transform::LogX,
            TransformArg::LogLog => Transform::LogLog,
        }
    }
}

fn parse_level(s: &str) -> Result<f64, String> {
    match s.parse::<f64>() {
        Ok(v) if v > 0.0 && v < 1.0 => Ok(v),
        _ => Err(format!(
            "`{s}` is not a confidence level; write a number between 0 and 1, e.g. 0.95"
        )),
    }
}

fn main() -> ExitCode {
    // Blocks of 1 MiB and more are mapped and handed back to the system
    // when freed. glibc's default threshold rises after each such free, so
    // the buffers of one large delivery stayed in the daemon's heap after
    // it was stored (measured on a 100 MB delivery: 258 MB peak RSS
    // before, 238 MB with these settings).
    #[cfg(all(target_os = "linux", target_env = "gnu"))]
    // SAFETY: called before any thread starts and before any allocation
    // that depends on the setting; mallopt only changes a tuning value.
    unsafe {
        libc::mallopt(libc::M_MMAP_THRESHOLD, 1 << 20);
        // Fixing one threshold fixes the other at 128 KiB too, and then
        // every file's frees gave the top of the heap back only to take
        // it again (sys time up by half); 32 MiB keeps it.
        libc::mallopt(libc::M_TRIM_THRESHOLD, 32 << 20);
    }
    let cli = Cli::parse();
    if matches!(
        cli.command,
        Command::Status { .. }
            | Command::Diagnostics { .. }
            | Command::History { .. }
            | Command::Findings { .. }
            | Command::Show { .. }
            | Command::Record { .. }
            | Command::Verify { .. }
    ) {
        // Commands that only print: a closed pipe (`| head`) ends them
        // quietly, as it does any Unix filter. (Not for the daemon, whose
        // sockets must never kill it.)
        // SAFETY: setting a signal's disposition to the default before any
        // thread is started.
        unsafe {
            libc::signal(libc::SIGPIPE, libc::SIG_DFL);
        }
    }
    match cli.command {
        Command::Fit {
            file,
            x,
            y,
            transform,
            level,
            json,
        } => fit(&file, &x, &y, transform.into(), level, json),
        Command::Demo { dir } => commands::demo(dir),
        Command::Run { config, log_format } => {
            commands::run(config.as_deref(), log_format == LogFormat::Json)
        }
        Command::Ingest {
            config,
            log_format,
            paths,
        } => commands::ingest(config.as_deref(), log_format == LogFormat::Json, &paths),
        Command::CheckConfig { file } => commands::check_config(file.as_deref()),
        Command::Status { config, json } => commands::status(config.as_deref(), json),
        Command::Diagnostics {
            series,
            config,
            json,
        } => commands::diagnostics(config.as_deref(), &series, json),
        Command::History {
            series,
            config,
            json,
        } => commands::history(config.as_deref(), &series, json),
        Command::Findings {
            open,
            series,
            config,
            json,
        } => commands::findings(config.as_deref(), open, series.as_deref(), json),
        Command::Record {
            record_id,
            config,
            json,
        } => commands::record(config.as_deref(), &record_id, json),
        Command::Show {
            finding,
            config,
            json,
        } => commands::show(config.as_deref(), finding, json),
        Command::Review {
            finding,
            verdict,
            value,
            revert,
            note,
            by,
            config,
        } => {
            let action = match (revert, verdict, value) {
                (true, _, _) => Action::Revert,
                (false, Some(VerdictArg::Corrected), Some(value)) => {
                    Action::Verdict(Verdict::Corrected { value })
                }
                (false, Some(VerdictArg::Confirmed), _) => Action::Verdict(Verdict::Confirmed),
                (false, Some(VerdictArg::Excluded), _) => Action::Verdict(Verdict::Excluded),
                _ => {
                    eprintln!(
                        "slopewarden: give --verdict confirmed|excluded, --verdict corrected --value V, or --revert"
                    );
                    return ExitCode::from(EXIT_BAD_INPUT);
                }
            };
            if value.is_some() && !matches!(action, Action::Verdict(Verdict::Corrected { .. })) {
                eprintln!("slopewarden: --value goes only with --verdict corrected");
                return ExitCode::from(EXIT_BAD_INPUT);
            }
            commands::review(config.as_deref(), finding, action, &note, by.as_deref())
        }
        Command::Verify { config, json } => commands::verify(config.as_deref(), json),
        Command::Backup { file, config } => commands::backup(config.as_deref(), &file),
        Command::Window {
            series,
            window,
            note,
            by,
            config,
        } => commands::window(config.as_deref(), &series, &window, &note, by.as_deref()),
        Command::Report {
            series,
            out,
            format,
            config,
        } => commands::report(
            config.as_deref(),
            series.as_deref(),
            &out,
            format == ReportFormatArg::Csv,
        ),
        Command::SendTestEmail { config, to } => {
            commands::send_test_email(config.as_deref(), to.as_deref())
        }
    }
}

mod commands;

fn fit(
    file: &std::path::Path,
    x: &str,
    y: &str,
    transform: Transform,
    level: f64,
    json: bool,
) -> ExitCode {
    let columns = match read_xy_file(file, x, y) {
        Ok(c) => c,
        Err(e) => {
            eprintln!("slopewarden fit: {e}");
            return ExitCode::from(EXIT_BAD_INPUT);
        }
    };
    let source = file.display().to_string();
    let report = match analyse(&source, x, y, columns, transform, level) {
        Ok(r) => r,
        Err(e) => {
            eprintln!("slopewarden fit: {e}");
            return ExitCode::from(EXIT_BAD_INPUT);
        }
    };
    let stdout = io::stdout();
    let mut out = BufWriter::with_capacity(1 << 16, stdout.lock());
    let written = if json {
        report.write_json(&mut out)
    } else {
        report.write_text(&mut out)
    };
    match written.and_then(|()| out.flush()) {
        Ok(()) => ExitCode::SUCCESS,
        // A closed pipe (`| head`) is the reader's choice, not a failure.
        Err(e) if e.kind() == io::ErrorKind::BrokenPipe => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("slopewarden fit: cannot write the output: {e}");
            ExitCode::from(EXIT_IO)
        }
    }
}
