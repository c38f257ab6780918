//! Messages to the analyst: what a finding says, and how it leaves.
//!
//! - [`render`]: pure. A [`Notice`] (plain data the pipeline fills from one
//!   finding) or a [`Digest`] (findings held back by a rate limit) becomes a
//!   [`Rendered`] message: subject, plain text, HTML, the chart and a
//!   Message-ID derived from the finding.
//! - [`chart`]: the PNG in a finding message, drawn in memory with a font
//!   embedded in the binary.
//! - [`send`]: the [`Mailer`] trait and its implementations: [`Smtp`]
//!   (lettre over rustls), [`OutboxDir`] (`.eml` files, written atomically)
//!   and [`Recording`] (in memory, for tests and the demo). A send error says
//!   whether to retry ([`SendError::is_transient`]).
//!
//! **Invariant:** render never sends and send never formats content: send
//! only assembles the rendered parts into MIME, adds From, To and Date, and
//! delivers. Data from files reaches a header only through
//! [`render::header_safe`].

pub mod chart;
pub mod render;
pub mod send;
mod text;

pub use chart::{ChartPoint, PointRole};
pub use render::{
    Cause, Digest, DigestLine, FindingKind, FitSummary, Flag, InlineImage, Notice, RecordInfo,
    Rendered, RobustSlope, Severity, finding_message_id, render_digest, render_notice,
    render_notice_heading, render_test_message,
};
pub use send::{
    Mailer, OutboxDir, Outgoing, Recording, Secret, SecretError, SendError, Smtp, SmtpSettings,
    TestEmailReport, TlsMode, send_test_email,
};
