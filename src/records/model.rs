//! The domain types every later stage shares: a validated record, its
//! series, its value (detected or censored), and why a record was refused.

use std::fmt;

/// A series key, such as `MW-03/nitrate` or `NE-transect/lead`.
///
/// Any text is allowed (it comes from files); it is escaped wherever it is
/// shown (HTML, mail headers, spreadsheets) and never used as a path.
#[derive(Debug, Clone, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct SeriesId(pub String);

impl SeriesId {
    /// The key as text.
    pub fn as_str(&self) -> &str {
        &self.0
    }
}

impl fmt::Display for SeriesId {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.0)
    }
}

/// A measured value: detected, or below a reporting limit.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Measure {
    /// A detected value, in the series' unit.
    Detected(f64),
    /// Not detected: below `limit` (the detection or reporting limit, in the
    /// series' unit). Never silently replaced by a number; the series'
    /// censoring policy decides what enters a fit.
    NonDetect {
        /// The reporting limit.
        limit: f64,
    },
}

impl Measure {
    /// The number written for this measure in the store and in messages:
    /// the value, or the limit of a non-detect.
    pub fn number(&self) -> f64 {
        match *self {
            Measure::Detected(v) => v,
            Measure::NonDetect { limit } => limit,
        }
    }

    /// Whether the value is censored.
    pub fn is_censored(&self) -> bool {
        matches!(self, Measure::NonDetect { .. })
    }
}

/// One validated record, ready to store.
#[derive(Debug, Clone, PartialEq)]
pub struct Record {
    /// The record's id as delivered (unique per source of truth).
    pub record_id: String,
    /// The series it belongs to.
    pub series: SeriesId,
    /// x: distance, or time in decimal years.
    pub x: f64,
    /// y, converted to the series' unit.
    pub y: Measure,
    /// The unit the value is now expressed in (the series' unit), if known.
    pub unit: Option<String>,
    /// The unit as written in the file, if any.
    pub unit_as_written: Option<String>,
    /// Sampling date or time as written, if any.
    pub sampled_at: Option<String>,
    /// Free-text note, if any.
    pub note: Option<String>,
    /// Other columns of the row, kept as attributes (name, value).
    pub attributes: Vec<(String, String)>,
    /// 1-based line of the record in its file.
    pub line: u64,
    /// The row's raw text (for provenance), lossily decoded as UTF-8.
    pub raw: String,
}

/// Why one row was refused. The rest of the file is still ingested (unless
/// the configuration says to reject whole files).
#[derive(Debug, Clone, PartialEq)]
pub struct RecordError {
    /// 1-based line in the file.
    pub line: u64,
    /// 1-based column, when one column is at fault.
    pub column: Option<usize>,
    /// The column's name, when one column is at fault.
    pub field: Option<String>,
    /// The record id, when it could be read.
    pub record_id: Option<String>,
    /// What is wrong and what to do, for people.
    pub reason: String,
    /// The row's raw text.
    pub raw: String,
}

impl fmt::Display for RecordError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "line {}", self.line)?;
        if let Some(c) = self.column {
            write!(f, ", column {c}")?;
        }
        if let Some(name) = &self.field {
            write!(f, " ({name})")?;
        }
        write!(f, ": {}", self.reason)
    }
}
