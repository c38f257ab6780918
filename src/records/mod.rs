//! Bytes of a delivered file -> validated records, or per-line errors.
//!
//! Invariant: no filesystem, no database, no clock (today's date is passed
//! in). Everything is testable from a byte string.

mod model;

pub use model::{Measure, Record, RecordError, SeriesId};
