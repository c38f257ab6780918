//! Bytes of a delivered file -> validated records, or per-line errors.
//!
//! [`parse_file`] reads one file laid out as its feed's [`Layout`] says,
//! checks every row against its series' [`SeriesRules`], and returns the
//! records that pass and one [`RecordError`] per row that does not; a
//! [`FileError`] only when the file cannot be read as records at all (see
//! the `parse` module for where that line is drawn). [`units`] converts
//! concentrations between units; [`decimal_year`] turns dates into x.
//!
//! Invariant: no filesystem, no database, no clock (today's date is passed
//! in), no globals. Everything is testable from a byte string, and no input
//! makes it panic.

pub(crate) mod dates;
mod layout;
mod model;
mod numbers;
mod parse;
mod rows;
pub mod units;

#[cfg(test)]
mod tests;

pub use dates::decimal_year;
pub use layout::{DateFormat, Layout, SeriesKey, SeriesRules, Today, XSource};
pub use model::{Measure, Record, RecordError, SeriesId};
pub use parse::{FileError, ParsedFile, RecordStream, parse_file};
pub use units::{Matrix, UnitError};
