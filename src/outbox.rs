//! The sender: drains pending outbox rows through a [`Mailer`], retries
//! with backoff, marks each row sent exactly once, and folds messages held
//! back by a recipient's rate limit into a digest. Never judges or renders
//! findings (the digest's wording is `messages::render_digest`).
//!
//! Exactly once: a row is marked sent in its own transaction right after
//! the server accepted it. A crash between acceptance and marking resends
//! the same message with the same Message-ID, which mail systems and
//! people recognise as a duplicate; nothing is ever sent that has no row.

use std::time::{Duration, SystemTime};

use thiserror::Error;
use tracing::{info, warn};

use crate::clock;
use crate::config::{Config, SmtpConfig};
use crate::messages::{
    Digest, DigestLine, InlineImage, Mailer, OutboxDir, Outgoing, Rendered, Secret, SendError,
    Severity, Smtp, SmtpSettings, TlsMode, render_digest,
};
use crate::store::{NewMessage, Store, StoreError};

/// Attempts before a message is given up on (its row stays, `failed`).
pub const MAX_ATTEMPTS: i64 = 12;

/// Why the mailer could not be set up.
#[derive(Debug, Error)]
pub enum MailerError {
    /// The SMTP settings are unusable (password variable unset, bad CA file…).
    #[error("mail settings: {0}")]
    Settings(String),
}

/// The mailer the configuration asks for: SMTP when `[smtp]` is set,
/// otherwise `.eml` files in the outbox folder.
pub fn mailer(config: &Config) -> Result<Box<dyn Mailer>, MailerError> {
    match &config.mail.smtp {
        None => Ok(Box::new(OutboxDir::new(config.mail.outbox_dir.clone()))),
        Some(s) => Ok(Box::new(smtp(s)?)),
    }
}

fn smtp(s: &SmtpConfig) -> Result<Smtp, MailerError> {
    let tls = match s.tls.as_str() {
        "implicit" => TlsMode::Implicit,
        "none" => TlsMode::None,
        _ => TlsMode::StartTls,
    };
    let mut settings = SmtpSettings::new(s.host.clone(), tls);
    if let Some(p) = s.port {
        settings.port = p;
    }
    settings.username = s.username.clone();
    settings.password = match (&s.password_env, &s.password_file) {
        (Some(var), _) => {
            Some(Secret::from_env(var).map_err(|e| MailerError::Settings(e.to_string()))?)
        }
        (None, Some(path)) => {
            Some(Secret::from_file(path).map_err(|e| MailerError::Settings(e.to_string()))?)
        }
        (None, None) => None,
    };
    settings.ca_file = s.ca_file.clone();
    settings.timeout = s.timeout;
    Smtp::new(&settings).map_err(|e| MailerError::Settings(e.to_string()))
}

/// What one pass of the sender did.
#[derive(Debug, Default, Clone, Copy, PartialEq, Eq)]
pub struct Pass {
    /// Delivered.
    pub sent: usize,
    /// Failed, to be retried.
    pub deferred: usize,
    /// Given up on.
    pub failed: usize,
    /// Digests queued.
    pub digests: usize,
}

/// Backoff before attempt `attempts + 1`: `first` doubling, at most 1 hour.
pub fn backoff(first: Duration, attempts: i64) -> Duration {
    first
        .saturating_mul(1u32 << attempts.clamp(0, 16))
        .min(Duration::from_secs(3600))
}

/// One pass: digests for held messages whose hour has passed, then every
/// due message. Stops early at the first unreachable server (the rest
/// would fail the same way).
pub fn send_due(
    config: &Config,
    store: &mut Store,
    mailer: &dyn Mailer,
    now: SystemTime,
) -> Result<Pass, StoreError> {
    let mut pass = Pass::default();
    let now_unix = clock::unix_seconds(now);
    pass.digests = queue_digests(config, store, now)?;
    for m in store.due_messages(now_unix, 100)? {
        let rendered = Rendered {
            message_id: m.message_id.clone(),
            subject: m.subject.clone(),
            text: m.text.clone(),
            html: m.html.clone(),
            chart: m
                .chart
                .clone()
                .map(|(content_id, png)| InlineImage { content_id, png }),
            chart_problem: None,
        };
        let out = Outgoing {
            from: config.mail.from.clone(),
            to: vec![m.recipient.clone()],
            date: SystemTime::UNIX_EPOCH + Duration::from_secs(m.date_unix.max(0) as u64),
            rendered,
        };
        let at = clock::rfc3339(SystemTime::now());
        match mailer.send(&out) {
            Ok(()) => {
                store.mark_sent(
                    m.id,
                    &m.message_id,
                    &m.recipient,
                    clock::unix_seconds(SystemTime::now()),
                    &at,
                )?;
                info!(message = %m.message_id, to = %m.recipient, via = %mailer.describe(), "message delivered");
                pass.sent += 1;
            }
            Err(e) if e.is_transient() && m.attempts + 1 < MAX_ATTEMPTS => {
                let next = now_unix
                    + backoff(config.mail.retry_first, m.attempts)
                        .as_secs()
                        .max(1) as i64;
                store.mark_attempt_failed(m.id, &e.to_string(), Some(next), &at)?;
                warn!(message = %m.message_id, error = %e, retry_in_s = next - now_unix, "message not delivered; will retry");
                pass.deferred += 1;
                if matches!(
                    e,
                    SendError::Unreachable { .. } | SendError::TimedOut { .. }
                ) {
                    break;
                }
            }
            Err(e) => {
                store.mark_attempt_failed(m.id, &e.to_string(), None, &at)?;
                warn!(message = %m.message_id, error = %e, "message given up; its row stays in the outbox as failed");
                pass.failed += 1;
            }
        }
    }
    Ok(pass)
}

/// Folds messages held for an hour or more into one digest per recipient.
fn queue_digests(config: &Config, store: &mut Store, now: SystemTime) -> Result<usize, StoreError> {
    let now_unix = clock::unix_seconds(now);
    let held = store.held_messages(now_unix - 3600)?;
    if held.is_empty() {
        return Ok(0);
    }
    type Held = (i64, Option<i64>, String);
    let mut by_recipient: Vec<(String, Vec<Held>)> = Vec::new();
    for (id, finding, to, subject) in held {
        match by_recipient.iter_mut().find(|(r, _)| *r == to) {
            Some((_, v)) => v.push((id, finding, subject)),
            None => by_recipient.push((to, vec![(id, finding, subject)])),
        }
    }
    let at = clock::rfc3339(now);
    let mut queued = 0;
    for (to, rows) in by_recipient {
        let mut lines = Vec::new();
        for (_, finding, _) in &rows {
            if let Some(f) = finding.and_then(|id| store.finding(id).ok().flatten()) {
                lines.push(DigestLine {
                    finding_id: f.id,
                    series: f.series.clone().unwrap_or_default(),
                    record_id: f.record_ids.first().cloned(),
                    kinds: f
                        .kinds
                        .iter()
                        .filter_map(|k| crate::messages::FindingKind::from_name(k))
                        .collect(),
                    severity: match f.severity.as_str() {
                        "alert" => Severity::Alert,
                        "notice" => Severity::Notice,
                        _ => Severity::Warning,
                    },
                });
            }
        }
        let rendered = render_digest(&Digest {
            instance: config.mail.instance.clone(),
            created_at: at.clone(),
            period: format!(
                "messages held back by the limit of {} per hour",
                config.mail.max_per_hour
            ),
            lines,
            review_hint: Some("slopewarden findings --open".into()),
        });
        let ids: Vec<i64> = rows.iter().map(|r| r.0).collect();
        let tx = store.begin()?;
        tx.queue_message(&NewMessage {
            finding: None,
            recipient: &to,
            message_id: &rendered.message_id,
            subject: &rendered.subject,
            text: &rendered.text,
            html: &rendered.html,
            chart: None,
            date_unix: now_unix,
            held: false,
        })?;
        tx.mark_digested(&ids)?;
        tx.commit()?;
        queued += 1;
    }
    Ok(queued)
}
