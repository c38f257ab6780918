//! slopewarden: trend refits and influence diagnostics for monitoring series.
//!
//! Layout (a one-way pipeline; see DEVELOPERS.md for the full map):
//! - [`stats`]: pure statistics: least squares with inference, influence
//!   diagnostics, streaming per-series state, Theil-Sen and Mann-Kendall,
//!   transforms, Durbin-Watson. No I/O, no clock.
//! - [`table`]: reads two numeric columns from a CSV for ad-hoc fits, with
//!   errors that name line and column.
//! - [`fitreport`]: turns a fit and its diagnostics into the human summary
//!   and the JSON contract of `slopewarden fit`.

#![warn(clippy::unwrap_used)]
#![warn(missing_docs)]

pub mod clock;
pub mod config;
pub mod daemon;
pub mod demo;
pub mod findings;
pub mod fitreport;
pub mod http;
pub mod inbox;
pub mod messages;
pub mod outbox;
pub mod pipeline;
pub mod raise;
pub mod records;
pub mod report;
pub mod review;
pub mod show;
pub mod stats;
pub mod store;
pub mod table;
pub mod verify;
pub mod window;
