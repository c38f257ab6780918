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
    Smtp, SmtpSettings, TlsMode, render_digest,
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
                    // The server, not this message, is the problem: every
                    // waiting message waits as long, so that after the
                    // outage they go out in the order they were written.
                    store.defer_pending(next)?;
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
                    severity: f.severity,
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
            review_hint: Some(
                "Each one in full (its numbers, the fit with and without the record, the likely entry errors, the verdict commands): slopewarden show N. The open ones: slopewarden findings --open."
                    .into(),
            ),
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

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;
    use crate::messages::Recording;
    use crate::store::NewFinding;

    /// Raises `count` findings for one recipient at `at_unix`, queued as the
    /// pipeline does (held beyond the hourly limit).
    fn raise(config: &Config, store: &mut Store, count: usize, at_unix: i64) {
        for i in 0..count {
            let tx = store.begin().unwrap();
            let ids = vec![format!("R{i}")];
            let kinds = vec!["outlier".to_string()];
            let id = tx
                .insert_finding(&NewFinding {
                    created_at: "2026-01-01T00:00:00Z",
                    series: None,
                    file: None,
                    record_row: None,
                    record_ids: &ids,
                    kinds: &kinds,
                    severity: crate::findings::Severity::Warning,
                    fit_version: None,
                    fit_point: None,
                    summary: "test",
                    detail: "{}",
                })
                .unwrap();
            let to = &config.mail.to[0];
            let recent = tx.messages_since(to, at_unix - 3600).unwrap();
            let mid = format!("<finding-{id}@test>");
            tx.queue_message(&NewMessage {
                finding: Some(id),
                recipient: to,
                message_id: &mid,
                subject: "s",
                text: "t",
                html: "h",
                chart: None,
                date_unix: at_unix,
                held: recent >= i64::from(config.mail.max_per_hour),
            })
            .unwrap();
            tx.commit().unwrap();
        }
    }

    #[test]
    fn messages_beyond_the_hourly_limit_go_out_once_as_one_digest() {
        let dir = tempfile::tempdir().unwrap();
        let config = Config::from_toml(
            "[mail]\nto = [\"a@example.org\"]\nmax_per_hour = 2\n",
            dir.path(),
        )
        .unwrap();
        let mut store = Store::open(&dir.path().join("db.sqlite3")).unwrap();
        let t0 = SystemTime::UNIX_EPOCH + Duration::from_secs(1_800_000_000);
        raise(&config, &mut store, 5, clock::unix_seconds(t0));
        let mailer = Recording::new();
        // Now: the first two go out, three are held.
        let pass = send_due(&config, &mut store, &mailer, t0).unwrap();
        assert_eq!((pass.sent, pass.digests), (2, 0));
        // Within the hour nothing more goes out.
        let pass = send_due(&config, &mut store, &mailer, t0 + Duration::from_secs(1800)).unwrap();
        assert_eq!((pass.sent, pass.digests), (0, 0));
        // After the hour: one digest listing the three held findings.
        let later = t0 + Duration::from_secs(3700);
        let pass = send_due(&config, &mut store, &mailer, later).unwrap();
        assert_eq!((pass.sent, pass.digests), (1, 1));
        let sent = mailer.sent();
        assert_eq!(sent.len(), 3);
        let digest = &sent[2].rendered.text;
        // Held rows carry no bodies: the digest says where each is in full.
        assert!(digest.contains("slopewarden show N"), "{digest}");
        for id in ["3", "4", "5"] {
            assert!(
                digest.contains(&format!("#{id}")) || digest.contains(id),
                "{digest}"
            );
        }
        // And never again.
        let pass = send_due(
            &config,
            &mut store,
            &mailer,
            later + Duration::from_secs(7200),
        )
        .unwrap();
        assert_eq!((pass.sent, pass.digests), (0, 0));
        let counts = store.outbox_counts().unwrap();
        assert!(counts.contains(&("digested".to_string(), 3)), "{counts:?}");
        assert!(counts.contains(&("sent".to_string(), 3)), "{counts:?}");
    }
}
