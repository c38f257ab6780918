//! Findings and the outbox: the SQL behind raising a finding, queueing its
//! messages in the same transaction, and the sender's bookkeeping.

use rusqlite::{OptionalExtension, params};

use super::{FileId, FindingStatus, RecordStatus, Result, SeriesRowId, Store, Tx, seal};
use crate::findings::Severity;

/// A finding about to be stored.
#[derive(Debug, Clone, PartialEq)]
pub struct NewFinding<'a> {
    /// RFC 3339 UTC.
    pub created_at: &'a str,
    /// The series concerned, if any.
    pub series: Option<SeriesRowId>,
    /// The file that brought it, if any.
    pub file: Option<FileId>,
    /// The record's row, for a record-level finding.
    pub record_row: Option<i64>,
    /// Record ids concerned.
    pub record_ids: &'a [String],
    /// Kind names.
    pub kinds: &'a [String],
    /// How urgent.
    pub severity: Severity,
    /// The fit version the finding was made on.
    pub fit_version: Option<i64>,
    /// The record's point on the fitted scale, kept out of judging later
    /// records while the finding is open.
    pub fit_point: Option<(f64, f64)>,
    /// One line for lists.
    pub summary: &'a str,
    /// The numbers, as the text of a JSON document.
    pub detail: &'a str,
}

/// A finding as stored.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct FindingRow {
    /// Finding id.
    pub id: i64,
    /// Series key, if any.
    pub series: Option<String>,
    /// Record ids concerned.
    pub record_ids: Vec<String>,
    /// Kind names.
    pub kinds: Vec<String>,
    /// How urgent.
    pub severity: Severity,
    /// Open until a verdict.
    pub status: FindingStatus,
    /// RFC 3339 UTC.
    pub created_at: String,
    /// The file that brought it, if any.
    pub file: Option<String>,
    /// Fit version it was made on.
    pub fit_version: Option<i64>,
    /// One line for lists.
    pub summary: String,
    /// The numbers.
    pub detail: serde_json::Value,
}

/// A message about to be queued.
#[derive(Debug, Clone, PartialEq)]
pub struct NewMessage<'a> {
    /// The finding (None for a digest).
    pub finding: Option<i64>,
    /// One recipient.
    pub recipient: &'a str,
    /// Message-ID with angle brackets.
    pub message_id: &'a str,
    /// Subject.
    pub subject: &'a str,
    /// Plain-text part.
    pub text: &'a str,
    /// HTML part.
    pub html: &'a str,
    /// Inline chart and its Content-ID.
    pub chart: Option<(&'a str, &'a [u8])>,
    /// Date of the message, seconds since the epoch.
    pub date_unix: i64,
    /// Held back by the recipient's rate limit (goes into a digest).
    pub held: bool,
}

/// A message held back by a rate limit: (outbox row, finding, recipient,
/// subject).
pub type HeldMessage = (i64, Option<i64>, String, String);

/// A queued message as the sender reads it.
#[derive(Debug, Clone, PartialEq)]
pub struct OutboxMessage {
    /// Outbox row.
    pub id: i64,
    /// The finding, if any.
    pub finding: Option<i64>,
    /// Recipient.
    pub recipient: String,
    /// Message-ID.
    pub message_id: String,
    /// Subject.
    pub subject: String,
    /// Plain text.
    pub text: String,
    /// HTML.
    pub html: String,
    /// Chart Content-ID and PNG.
    pub chart: Option<(String, Vec<u8>)>,
    /// Date, seconds since the epoch.
    pub date_unix: i64,
    /// Attempts so far.
    pub attempts: i64,
}

impl Tx<'_> {
    /// This database's random token (see migration 0002).
    pub fn store_token(&self) -> Result<String> {
        self.tx
            .prepare_cached("SELECT token FROM store_identity LIMIT 1")
            .and_then(|mut s| s.query_row([], |r| r.get(0)))
            .map_err(self.wrap())
    }

    /// Stores a finding and returns its id.
    pub fn insert_finding(&self, f: &NewFinding<'_>) -> Result<i64> {
        let ids = serde_json::to_string(f.record_ids).unwrap_or_else(|_| "[]".into());
        let kinds = serde_json::to_string(f.kinds).unwrap_or_else(|_| "[]".into());
        let detail = f.detail;
        self.tx
            .prepare_cached(
                "INSERT INTO findings (created_at, series_id, file_id, record_row, record_ids, kinds,
                    severity, status, fit_version, fit_x, fit_y, summary, detail)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, 'open', ?8, ?9, ?10, ?11, ?12)",
            )
            .and_then(|mut s| {
                s.execute(params![
                    f.created_at,
                    f.series.map(|s| s.0),
                    f.file.map(|s| s.0),
                    f.record_row,
                    ids,
                    kinds,
                    f.severity,
                    f.fit_version,
                    f.fit_point.map(|p| p.0),
                    f.fit_point.map(|p| p.1),
                    f.summary,
                    detail
                ])
            })
            .map_err(self.wrap())?;
        let id = self.tx.last_insert_rowid();
        // Its seal is hashed from these values (see `Tx::seal`).
        let mut rows = seal::FindingRows::default();
        rows.finding
            .row(id)
            .put(&id)
            .put(f.created_at)
            .put(&f.series.map(|s| s.0))
            .put(&f.file.map(|s| s.0))
            .put(&f.record_row)
            .put(&ids)
            .put(&kinds)
            .put(f.severity.as_str())
            .put(&f.fit_version)
            .put(&f.fit_point.map(|p| p.0))
            .put(&f.fit_point.map(|p| p.1))
            .put(f.summary)
            .put(&detail);
        self.findings_written.borrow_mut().push((id, rows));
        Ok(id)
    }

    /// Points (fitted scale) of the series' records whose findings are still
    /// open: they stay in the fit but out of the fit that judges newcomers.
    pub fn awaiting_review(&self, series: SeriesRowId) -> Result<Vec<(f64, f64)>> {
        let mut stmt = self
            .tx
            .prepare_cached(
                "SELECT fit_x, fit_y FROM findings
                 WHERE series_id = ?1 AND status = 'open' AND fit_x IS NOT NULL AND fit_y IS NOT NULL",
            )
            .map_err(self.wrap())?;
        let rows = stmt
            .query_map([series.0], |r| Ok((r.get(0)?, r.get(1)?)))
            .map_err(self.wrap())?;
        rows.collect::<std::result::Result<Vec<_>, _>>()
            .map_err(self.wrap())
    }

    /// Messages queued or sent to `recipient` dated at or after `since`
    /// (for the rate limit).
    pub fn messages_since(&self, recipient: &str, since_unix: i64) -> Result<i64> {
        // Asked for every finding (and twice for a record's); a backlog
        // file raising dozens of findings counted the same rows again each
        // time.
        if let Some(&(_, _, n)) = self
            .recent
            .borrow()
            .iter()
            .find(|(to, since, _)| to == recipient && *since == since_unix)
        {
            return Ok(n);
        }
        let n: i64 = self
            .tx
            .prepare_cached(
                "SELECT COUNT(*) FROM outbox WHERE recipient = ?1 AND date_unix >= ?2
                 AND status IN ('pending', 'sent', 'failed')",
            )
            .and_then(|mut s| s.query_row(params![recipient, since_unix], |r| r.get(0)))
            .map_err(self.wrap())?;
        self.recent
            .borrow_mut()
            .push((recipient.to_string(), since_unix, n));
        Ok(n)
    }

    /// Queues a message (pending, or held for a digest).
    pub fn queue_message(&self, m: &NewMessage<'_>) -> Result<()> {
        let inserted = self
            .tx
            .prepare_cached(
                "INSERT OR IGNORE INTO outbox (finding_id, recipient, message_id, subject, body_text,
                    body_html, chart_cid, chart, date_unix, status, next_attempt_unix)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?9)",
            )
            .and_then(|mut s| {
                s.execute(params![
                    m.finding,
                    m.recipient,
                    m.message_id,
                    m.subject,
                    m.text,
                    m.html,
                    m.chart.map(|c| c.0),
                    m.chart.map(|c| c.1),
                    m.date_unix,
                    if m.held { "held" } else { "pending" }
                ])
            })
            .map_err(self.wrap())?;
        if inserted == 1
            && let Some(finding) = m.finding
            && let Some((_, rows)) = self
                .findings_written
                .borrow_mut()
                .iter_mut()
                .find(|w| w.0 == finding)
        {
            let id = self.tx.last_insert_rowid();
            rows.outbox
                .row(id)
                .put(&id)
                .put(&finding)
                .put(m.recipient)
                .put(m.message_id)
                .put(m.subject)
                .put(m.text)
                .put(m.html)
                .put(&m.chart.map(|c| c.1))
                .put(&m.chart.map(|c| c.0))
                .put(&m.date_unix);
        }
        if inserted == 1 && !m.held {
            for (to, since, n) in self.recent.borrow_mut().iter_mut() {
                if to == m.recipient && m.date_unix >= *since {
                    *n += 1;
                }
            }
        }
        Ok(())
    }

    /// Marks held messages as folded into a digest.
    pub fn mark_digested(&self, ids: &[i64]) -> Result<()> {
        let mut stmt = self
            .tx
            .prepare_cached(
                "UPDATE outbox SET status = 'digested' WHERE id = ?1 AND status = 'held'",
            )
            .map_err(self.wrap())?;
        for id in ids {
            stmt.execute([id]).map_err(self.wrap())?;
        }
        Ok(())
    }
}

fn finding_row(r: &rusqlite::Row<'_>) -> rusqlite::Result<FindingRow> {
    let ids: String = r.get(2)?;
    let kinds: String = r.get(3)?;
    let detail: String = r.get(10)?;
    Ok(FindingRow {
        id: r.get(0)?,
        series: r.get(1)?,
        record_ids: serde_json::from_str(&ids).unwrap_or_default(),
        kinds: serde_json::from_str(&kinds).unwrap_or_default(),
        severity: r.get(4)?,
        status: r.get(5)?,
        created_at: r.get(6)?,
        file: r.get(7)?,
        fit_version: r.get(8)?,
        summary: r.get(9)?,
        detail: serde_json::from_str(&detail).unwrap_or(serde_json::Value::Null),
    })
}

/// One stored version of a record: its values, where it came from, and its
/// own diagnostics in the fit it joined on arrival.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct RecordVersion {
    /// Version number (1 as delivered first).
    pub version: i64,
    /// Where this version stands.
    pub status: RecordStatus,
    /// Series key.
    pub series: String,
    /// What x measures and its unit, when the series' configuration says.
    pub x_name: Option<String>,
    /// See `x_name`.
    pub x_unit: Option<String>,
    /// x as stored.
    pub x: f64,
    /// y as stored (a non-detect's reporting limit).
    pub y: f64,
    /// Unit of y.
    pub unit: Option<String>,
    /// A non-detect.
    pub censored: bool,
    /// Whether it entered the series' fit.
    pub in_fit: bool,
    /// Left out of the fit by a verdict.
    pub excluded: bool,
    /// Sampling date as written, if given.
    pub sampled_at: Option<String>,
    /// Note (a corrected version says from what value and why).
    pub note: Option<String>,
    /// The file it came in.
    pub file: String,
    /// When that file arrived (RFC 3339).
    pub arrived_at: String,
    /// Line in that file.
    pub line: i64,
    /// The line as written.
    pub raw: String,
    /// Fit version it joined, when it entered a fit on arrival.
    pub joined_fit: Option<i64>,
    /// Leverage on arrival.
    pub leverage: Option<f64>,
    /// Externally studentized residual on arrival.
    pub studentized_residual: Option<f64>,
    /// Cook's distance on arrival.
    pub cooks_distance: Option<f64>,
    /// DFFITS on arrival.
    pub dffits: Option<f64>,
    /// DFBETAS of the slope on arrival.
    pub dfbetas_slope: Option<f64>,
    /// Prediction t against the fit before it arrived.
    pub prediction_t: Option<f64>,
    /// That fit's slope (the slope without the record).
    pub slope_without: Option<f64>,
    /// Its p-value.
    pub slope_p_without: Option<f64>,
}

const FINDING_SELECT: &str = "SELECT g.id, s.key, g.record_ids, g.kinds, g.severity, g.status,
        g.created_at, f.name, g.fit_version, g.summary, g.detail
     FROM findings g LEFT JOIN series s ON s.id = g.series_id
     LEFT JOIN source_files f ON f.id = g.file_id";

impl Store {
    /// When the feed's newest file arrived (RFC 3339), if ever.
    pub fn last_arrival_of_feed(&self, feed: &str) -> Result<Option<String>> {
        self.conn
            .query_row(
                "SELECT MAX(arrived_at) FROM source_files WHERE feed = ?1",
                [feed],
                |r| r.get(0),
            )
            .map_err(self.wrap())
    }

    /// Whether a `silent_feed` finding about `feed` was raised at or after
    /// `since` (RFC 3339), so that one silence is reported once.
    pub fn silence_reported(&self, feed: &str, since: &str) -> Result<bool> {
        self.conn
            .query_row(
                "SELECT EXISTS (SELECT 1 FROM findings WHERE kinds = '[\"silent_feed\"]'
                   AND json_extract(detail, '$.feed') = ?1 AND created_at >= ?2)",
                params![feed, since],
                |r| r.get(0),
            )
            .map_err(self.wrap())
    }

    /// Findings, newest first; only open ones when `open_only`.
    pub fn findings(&self, open_only: bool) -> Result<Vec<FindingRow>> {
        let mut all = Vec::new();
        self.each_finding(open_only, |f| {
            all.push(f);
            Ok::<(), std::convert::Infallible>(())
        })?
        .unwrap_or_else(|never| match never {});
        Ok(all)
    }

    /// The same findings handed to `each` one at a time, as they are read:
    /// a store with tens of thousands need not hold them all (their details
    /// as JSON trees took 580 MB for 29,000). Stops at `each`'s first error,
    /// which it returns.
    pub fn each_finding<E>(
        &self,
        open_only: bool,
        mut each: impl FnMut(FindingRow) -> std::result::Result<(), E>,
    ) -> Result<std::result::Result<(), E>> {
        let sql = if open_only {
            format!("{FINDING_SELECT} WHERE g.status = 'open' ORDER BY g.id DESC")
        } else {
            format!("{FINDING_SELECT} ORDER BY g.id DESC")
        };
        let mut stmt = self.conn.prepare(&sql).map_err(self.wrap())?;
        let mut rows = stmt.query([]).map_err(self.wrap())?;
        while let Some(r) = rows.next().map_err(self.wrap())? {
            if let Err(e) = each(finding_row(r).map_err(self.wrap())?) {
                return Ok(Err(e));
            }
        }
        Ok(Ok(()))
    }

    /// One finding.
    pub fn finding(&self, id: i64) -> Result<Option<FindingRow>> {
        self.conn
            .query_row(
                &format!("{FINDING_SELECT} WHERE g.id = ?1"),
                [id],
                finding_row,
            )
            .optional()
            .map_err(self.wrap())
    }

    /// The record findings about `record_id` in `series` (any version of
    /// the record), oldest first: what `show` reports of the record a trend
    /// finding hinged on.
    pub fn record_findings_of(&self, series: &str, record_id: &str) -> Result<Vec<FindingRow>> {
        let mut stmt = self
            .conn
            .prepare(&format!(
                "{FINDING_SELECT} WHERE s.key = ?1 AND g.record_row IS NOT NULL
                   AND EXISTS (SELECT 1 FROM json_each(g.record_ids) WHERE value = ?2)
                 ORDER BY g.id"
            ))
            .map_err(self.wrap())?;
        let rows = stmt
            .query_map(params![series, record_id], finding_row)
            .map_err(self.wrap())?;
        rows.collect::<rusqlite::Result<_>>().map_err(self.wrap())
    }

    /// Every stored version of a record, oldest first.
    pub fn record_versions(&self, record_id: &str) -> Result<Vec<RecordVersion>> {
        let mut stmt = self
            .conn
            .prepare(
                "SELECT r.version, r.status, s.key, s.x_name, s.x_unit, r.x, r.y, r.unit,
                        r.censored, r.in_fit, r.excluded, r.sampled_at, r.note, f.name,
                        f.arrived_at, r.line, r.raw, r.joined_fit, r.leverage,
                        r.studentized_residual, r.cooks_distance, r.dffits, r.dfbetas_slope,
                        r.prediction_t, r.slope_without, r.slope_p_without
                 FROM records r JOIN series s ON s.id = r.series_id
                 JOIN source_files f ON f.id = r.file_id
                 WHERE r.record_id = ?1 ORDER BY r.version",
            )
            .map_err(self.wrap())?;
        let rows = stmt
            .query_map([record_id], |r| {
                Ok(RecordVersion {
                    version: r.get(0)?,
                    status: r.get(1)?,
                    series: r.get(2)?,
                    x_name: r.get(3)?,
                    x_unit: r.get(4)?,
                    x: r.get(5)?,
                    y: r.get(6)?,
                    unit: r.get(7)?,
                    censored: r.get(8)?,
                    in_fit: r.get(9)?,
                    excluded: r.get(10)?,
                    sampled_at: r.get(11)?,
                    note: r.get(12)?,
                    file: r.get(13)?,
                    arrived_at: r.get(14)?,
                    line: r.get(15)?,
                    raw: r.get(16)?,
                    joined_fit: r.get(17)?,
                    leverage: r.get(18)?,
                    studentized_residual: r.get(19)?,
                    cooks_distance: r.get(20)?,
                    dffits: r.get(21)?,
                    dfbetas_slope: r.get(22)?,
                    prediction_t: r.get(23)?,
                    slope_without: r.get(24)?,
                    slope_p_without: r.get(25)?,
                })
            })
            .map_err(self.wrap())?;
        rows.collect::<rusqlite::Result<_>>().map_err(self.wrap())
    }

    /// Every finding that names `record_id` (about the record itself, a
    /// resubmission of it, or a trend change it caused), oldest first.
    pub fn findings_naming(&self, record_id: &str) -> Result<Vec<FindingRow>> {
        let mut stmt = self
            .conn
            .prepare(&format!(
                "{FINDING_SELECT} WHERE EXISTS (SELECT 1 FROM json_each(g.record_ids) WHERE value = ?1)
                 ORDER BY g.id"
            ))
            .map_err(self.wrap())?;
        let rows = stmt
            .query_map([record_id], finding_row)
            .map_err(self.wrap())?;
        rows.collect::<rusqlite::Result<_>>().map_err(self.wrap())
    }

    /// Pending messages due at `now_unix`, oldest first.
    pub fn due_messages(&self, now_unix: i64, limit: usize) -> Result<Vec<OutboxMessage>> {
        let mut stmt = self
            .conn
            .prepare_cached(
                "SELECT id, finding_id, recipient, message_id, subject, body_text, body_html,
                        chart_cid, chart, date_unix, attempts
                 FROM outbox WHERE status = 'pending' AND next_attempt_unix <= ?1
                 ORDER BY id LIMIT ?2",
            )
            .map_err(self.wrap())?;
        let rows = stmt
            .query_map(params![now_unix, limit as i64], |r| {
                let cid: Option<String> = r.get(7)?;
                let png: Option<Vec<u8>> = r.get(8)?;
                Ok(OutboxMessage {
                    id: r.get(0)?,
                    finding: r.get(1)?,
                    recipient: r.get(2)?,
                    message_id: r.get(3)?,
                    subject: r.get(4)?,
                    text: r.get(5)?,
                    html: r.get(6)?,
                    chart: cid.zip(png),
                    date_unix: r.get(9)?,
                    attempts: r.get(10)?,
                })
            })
            .map_err(self.wrap())?;
        rows.collect::<std::result::Result<Vec<_>, _>>()
            .map_err(self.wrap())
    }

    /// Held messages whose recipient's window has passed: (row, finding,
    /// recipient, subject), oldest first.
    pub fn held_messages(&self, older_than_unix: i64) -> Result<Vec<HeldMessage>> {
        let mut stmt = self
            .conn
            .prepare_cached(
                "SELECT id, finding_id, recipient, subject FROM outbox
                 WHERE status = 'held' AND date_unix <= ?1 ORDER BY recipient, id",
            )
            .map_err(self.wrap())?;
        let rows = stmt
            .query_map([older_than_unix], |r| {
                Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?))
            })
            .map_err(self.wrap())?;
        rows.collect::<std::result::Result<Vec<_>, _>>()
            .map_err(self.wrap())
    }

    /// Records a delivery, with its audit entry, in one transaction.
    pub fn mark_sent(
        &mut self,
        id: i64,
        message_id: &str,
        recipient: &str,
        now_unix: i64,
        at: &str,
    ) -> Result<()> {
        let tx = self.begin()?;
        let changed = tx
            .tx
            .execute(
                "UPDATE outbox SET status = 'sent', sent_unix = ?2, attempts = attempts + 1, last_error = NULL
                 WHERE id = ?1 AND status = 'pending'",
                params![id, now_unix],
            )
            .map_err(tx.wrap())?;
        if changed == 1 {
            tx.append_audit(
                at,
                super::AuditKind::Message,
                message_id,
                &format!("delivered to {recipient}"),
            )?;
        }
        tx.commit()
    }

    /// Holds every pending message until at least `next_unix` (the mail
    /// server is unreachable: nothing should overtake what waits longest).
    pub fn defer_pending(&mut self, next_unix: i64) -> Result<()> {
        let tx = self.begin()?;
        tx.tx
            .execute(
                "UPDATE outbox SET next_attempt_unix = MAX(next_attempt_unix, ?1) WHERE status = 'pending'",
                [next_unix],
            )
            .map_err(tx.wrap())?;
        tx.commit()
    }

    /// Records a failed attempt: retried at `next_unix`, or given up on
    /// (`next_unix` None) with an audit entry.
    pub fn mark_attempt_failed(
        &mut self,
        id: i64,
        error: &str,
        next_unix: Option<i64>,
        at: &str,
    ) -> Result<()> {
        let tx = self.begin()?;
        match next_unix {
            Some(next) => {
                tx.tx
                    .execute(
                        "UPDATE outbox SET attempts = attempts + 1, last_error = ?2, next_attempt_unix = ?3
                         WHERE id = ?1 AND status = 'pending'",
                        params![id, error, next],
                    )
                    .map_err(tx.wrap())?;
            }
            None => {
                let changed = tx
                    .tx
                    .execute(
                        "UPDATE outbox SET status = 'failed', attempts = attempts + 1, last_error = ?2
                         WHERE id = ?1 AND status = 'pending'",
                        params![id, error],
                    )
                    .map_err(tx.wrap())?;
                if changed == 1 {
                    tx.append_audit(
                        at,
                        super::AuditKind::Message,
                        &format!("outbox {id}"),
                        &format!("not delivered, given up: {error}"),
                    )?;
                }
            }
        }
        tx.commit()
    }

    /// Counts of outbox rows by status.
    pub fn outbox_counts(&self) -> Result<Vec<(String, i64)>> {
        let mut stmt = self
            .conn
            .prepare("SELECT status, COUNT(*) FROM outbox GROUP BY status ORDER BY status")
            .map_err(self.wrap())?;
        let rows = stmt
            .query_map([], |r| Ok((r.get(0)?, r.get(1)?)))
            .map_err(self.wrap())?;
        rows.collect::<std::result::Result<Vec<_>, _>>()
            .map_err(self.wrap())
    }
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;
    use crate::store::Store;

    fn message<'a>(to: &'a str, id: &'a str, date_unix: i64, held: bool) -> NewMessage<'a> {
        NewMessage {
            finding: None,
            recipient: to,
            message_id: id,
            subject: "s",
            text: "",
            html: "",
            chart: None,
            date_unix,
            held,
        }
    }

    /// A finding's seal hashed from the values written is the seal of its
    /// rows read back, with a chart, a held message, NaN and -0.0 points
    /// and an ignored duplicate message among them.
    #[test]
    fn a_finding_sealed_from_its_written_values_matches_its_rows_read_back() {
        use crate::store::seal::{self, SealKind, SealScope};
        let mut store = Store::open_in_memory().unwrap();
        let tx = store.begin().unwrap();
        let ids = vec!["R-1".to_string()];
        let kinds = vec!["outlier".to_string(), "influential".to_string()];
        let detail = serde_json::json!({"summary": "ü <b>", "n": 12});
        let mut found = Vec::new();
        for (k, point) in [(f64::NAN, -0.0), (2024.5, 3.0)].into_iter().enumerate() {
            let id = tx
                .insert_finding(&NewFinding {
                    created_at: "2026-12-02T10:00:00Z",
                    series: None,
                    file: None,
                    record_row: None,
                    record_ids: &ids,
                    kinds: &kinds,
                    severity: Severity::Alert,
                    fit_version: Some(3),
                    fit_point: Some(point),
                    summary: "a summary",
                    detail: &detail.to_string(),
                })
                .unwrap();
            let mid = format!("<finding-{id}@t>");
            let png = [0x89u8, b'P', b'N', b'G', 0, 1, 2];
            let mut with_chart = message("a@x", &mid, 1_500, false);
            with_chart.chart = Some(("cid-1", &png[..]));
            with_chart.finding = Some(id);
            tx.queue_message(&with_chart).unwrap();
            let mut held = message("b@x", &mid, 1_500, k == 0);
            held.finding = Some(id);
            tx.queue_message(&held).unwrap();
            // Ignored: the same message to the same recipient.
            tx.queue_message(&with_chart).unwrap();
            let scope = SealScope::Finding(id);
            let read_back = seal::compute(tx.tx, scope, tx.first).unwrap();
            assert_eq!(tx.seal(scope).unwrap(), seal::seal_text(scope, &read_back));
            found.push((id, read_back));
        }
        assert!(tx.findings_written.borrow().is_empty());
        tx.commit().unwrap();
        let ids: Vec<i64> = found.iter().map(|f| f.0).collect();
        let again = store.recompute_seals(SealKind::Finding, &ids).unwrap();
        for (id, hash) in found {
            assert_eq!(again[&id], hash);
        }
    }

    /// The count kept in the transaction is the count SQLite gives, after
    /// every kind of message queued in it.
    #[test]
    fn the_hourly_count_kept_in_a_transaction_follows_what_it_queues() {
        let mut store = Store::open_in_memory().unwrap();
        let tx = store.begin().unwrap();
        let since = 1_000;
        let truth = |to: &str| -> i64 {
            tx.tx
                .query_row(
                    "SELECT COUNT(*) FROM outbox WHERE recipient = ?1 AND date_unix >= ?2
                     AND status IN ('pending', 'sent', 'failed')",
                    params![to, since],
                    |r| r.get(0),
                )
                .unwrap()
        };
        let steps = [
            message("a@x", "<1@t>", 1_500, false),
            message("a@x", "<2@t>", 1_600, true),
            message("b@x", "<3@t>", 1_700, false),
            message("a@x", "<4@t>", 900, false),
            // The same message again is ignored.
            message("a@x", "<1@t>", 1_500, false),
            message("a@x", "<5@t>", 1_800, false),
        ];
        assert_eq!(tx.messages_since("a@x", since).unwrap(), 0);
        for m in &steps {
            tx.queue_message(m).unwrap();
            for to in ["a@x", "b@x"] {
                assert_eq!(tx.messages_since(to, since).unwrap(), truth(to), "{to}");
            }
        }
        assert_eq!(tx.messages_since("a@x", since).unwrap(), 2);
    }
}
