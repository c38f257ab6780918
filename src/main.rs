//! The `slopewarden` command line: argument parsing and exit codes only;
//! the work is in the library.

use std::io::{self, BufWriter, Write};
use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Parser, Subcommand, ValueEnum};
use slopewarden::fitreport::analyse;
use slopewarden::stats::Transform;
use slopewarden::table::read_xy_file;

/// Exit code for input the user must fix (a bad file, a bad argument value).
const EXIT_BAD_INPUT: u8 = 2;
/// Exit code when the output could not be written.
const EXIT_IO: u8 = 1;

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
    let cli = Cli::parse();
    match cli.command {
        Command::Fit {
            file,
            x,
            y,
            transform,
            level,
            json,
        } => fit(&file, &x, &y, transform.into(), level, json),
    }
}

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
