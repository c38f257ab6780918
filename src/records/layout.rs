//! How a feed's files are laid out, and the per-series rules rows are
//! checked against. Plain data: the configuration builds these, the parser
//! reads them.

use super::units::Matrix;

/// How a feed's files are laid out. The default is the canonical record
/// CSV: `record_id,series,x,y[,unit][,sampled_at][,note]`, comma-separated,
/// decimal points.
#[derive(Debug, Clone, PartialEq)]
pub struct Layout {
    /// Field delimiter: `b','` (default), `b';'` or `b'\t'`.
    pub delimiter: u8,
    /// Whether numbers are written with a decimal comma (`0,5` is one half).
    /// Only sensible with a `;` or tab delimiter. Thousands separators are
    /// never accepted, in either convention.
    pub decimal_comma: bool,
    /// The record id column (required).
    pub record_id: String,
    /// Where the series key comes from (required).
    pub series: SeriesKey,
    /// Where x comes from (required).
    pub x: XSource,
    /// The measured value column (required).
    pub y: String,
    /// The unit column, if the feed has one. Absent from a file is fine.
    pub unit: Option<String>,
    /// The sampling date or time column. Absent from a file is fine.
    pub sampled_at: Option<String>,
    /// The free-text note column. Absent from a file is fine.
    pub note: Option<String>,
    /// The column holding the detection limit of rows whose value is `ND`.
    pub detection_limit: Option<String>,
    /// The lab qualifier column; `U`, `UJ`, `<` and `ND` mark a non-detect
    /// whose limit is the value written in y.
    pub qualifier: Option<String>,
}

impl Default for Layout {
    fn default() -> Self {
        Layout {
            delimiter: b',',
            decimal_comma: false,
            record_id: "record_id".to_string(),
            series: SeriesKey::Column("series".to_string()),
            x: XSource::Column("x".to_string()),
            y: "y".to_string(),
            unit: Some("unit".to_string()),
            sampled_at: Some("sampled_at".to_string()),
            note: Some("note".to_string()),
            detection_limit: None,
            qualifier: None,
        }
    }
}

/// Where a row's series key comes from.
#[derive(Debug, Clone, PartialEq)]
pub enum SeriesKey {
    /// One column holds the key.
    Column(String),
    /// A template such as `{site}/{analyte}`: each `{name}` is replaced by
    /// that column's trimmed cell, other text is kept as is. A `{` without
    /// a closing `}`, or an empty `{}`, is literal text.
    Template(String),
}

/// Where a row's x comes from.
#[derive(Debug, Clone, PartialEq)]
pub enum XSource {
    /// A numeric column (a distance, a depth, or already a decimal year).
    Column(String),
    /// A date column, converted to decimal years with
    /// [`decimal_year`](super::decimal_year).
    Date {
        /// The column's name.
        column: String,
        /// How the dates are written.
        format: DateFormat,
    },
}

/// How dates are written in a feed. Every format takes an optional time
/// after the date, `HH:MM[:SS[.fff]]` (fractions of a second are ignored).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum DateFormat {
    /// `2024-12-31`, optionally followed by `T` or a space, the time, and
    /// `Z`. Offsets such as `+01:00` are refused (write the local date).
    Iso,
    /// `31.12.2024` or `31/12/2024` (day and month may have one digit).
    DayMonthYear,
    /// `12/31/2024` (month and day may have one digit).
    MonthDayYear,
}

/// Per-series rules a row is checked against, supplied by the caller for
/// each series key met in a file (asked once per series per file).
#[derive(Debug, Clone, PartialEq, Default)]
pub struct SeriesRules {
    /// The series' unit; values are converted to it. `None`: values keep
    /// the unit they are written in.
    pub unit: Option<String>,
    /// What was sampled; makes ppm, ppb and ppt unambiguous.
    pub matrix: Matrix,
    /// The plausible range of x, inclusive.
    pub x_range: Option<(f64, f64)>,
    /// Whether y may be negative (default: no, concentrations are >= 0).
    pub allow_negative: bool,
}

/// Today's date, injected, for refusing dates in the future. One day of
/// clock skew is allowed: a date is in the future when it is after
/// tomorrow.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Today {
    /// Year, e.g. 2024.
    pub year: i32,
    /// Month, 1 to 12.
    pub month: u32,
    /// Day of the month, 1 to 31.
    pub day: u32,
}
