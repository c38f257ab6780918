//! `/metrics`: a [`MetricsSnapshot`] in the Prometheus text exposition
//! format 0.0.4 (`# HELP`, `# TYPE`, one sample per line, label values
//! escaped). Pure: the time comes from the caller.
//!
//! Every finding kind slopewarden raises has an `open` sample, zero
//! included, and every outbox status has a sample, so that an alert on
//! them never meets an absent series. The ingest age is left out until a
//! file has arrived.

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::time::{SystemTime, UNIX_EPOCH};

use crate::messages::FindingKind;
use crate::store::MetricsSnapshot;

/// The outbox statuses (the CHECK constraint of migration 0002).
const OUTBOX_STATUSES: [&str; 5] = ["pending", "held", "sent", "digested", "failed"];

/// A metric family's type.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Kind {
    Counter,
    Gauge,
}

/// Escapes a label value: backslash, double quote and line feed.
pub fn escape_label_value(v: &str) -> String {
    let mut out = String::with_capacity(v.len());
    for c in v.chars() {
        match c {
            '\\' => out.push_str("\\\\"),
            '"' => out.push_str("\\\""),
            '\n' => out.push_str("\\n"),
            c => out.push(c),
        }
    }
    out
}

/// Escapes HELP text: backslash and line feed.
fn escape_help(v: &str) -> String {
    v.replace('\\', "\\\\").replace('\n', "\\n")
}

/// A sample value as the format writes it (`NaN`, `+Inf`, `-Inf` for the
/// special values; integers without a decimal point).
pub fn value(v: f64) -> String {
    if v.is_nan() {
        "NaN".into()
    } else if v == f64::INFINITY {
        "+Inf".into()
    } else if v == f64::NEG_INFINITY {
        "-Inf".into()
    } else {
        format!("{v}")
    }
}

/// Writes one family: HELP, TYPE, then its samples.
fn family(
    out: &mut String,
    name: &str,
    kind: Kind,
    help: &str,
    samples: &[(Vec<(&str, &str)>, f64)],
) {
    let _ = writeln!(out, "# HELP {name} {}", escape_help(help));
    let _ = writeln!(
        out,
        "# TYPE {name} {}",
        match kind {
            Kind::Counter => "counter",
            Kind::Gauge => "gauge",
        }
    );
    for (labels, v) in samples {
        out.push_str(name);
        if !labels.is_empty() {
            out.push('{');
            for (i, (k, lv)) in labels.iter().enumerate() {
                if i > 0 {
                    out.push(',');
                }
                let _ = write!(out, "{k}=\"{}\"", escape_label_value(lv));
            }
            out.push('}');
        }
        let _ = writeln!(out, " {}", value(*v));
    }
}

/// One unlabelled sample.
fn single(out: &mut String, name: &str, kind: Kind, help: &str, v: i64) {
    family(out, name, kind, help, &[(Vec::new(), v as f64)]);
}

/// The exposition of `s` at time `now`.
pub fn render(s: &MetricsSnapshot, now: SystemTime) -> String {
    let mut out = String::with_capacity(4096);
    family(
        &mut out,
        "slopewarden_build_info",
        Kind::Gauge,
        "Always 1; the version label names the running slopewarden.",
        &[(vec![("version", env!("CARGO_PKG_VERSION"))], 1.0)],
    );
    single(
        &mut out,
        "slopewarden_files_ingested_total",
        Kind::Counter,
        "Files taken from the inbox whose records were stored (some rows may have been refused).",
        s.files_ingested,
    );
    single(
        &mut out,
        "slopewarden_files_quarantined_total",
        Kind::Counter,
        "Files set aside whole (unreadable, or every row refused).",
        s.files_quarantined,
    );
    single(
        &mut out,
        "slopewarden_records_stored",
        Kind::Gauge,
        "Records stored, current versions only.",
        s.records_current,
    );
    single(
        &mut out,
        "slopewarden_rows_quarantined_total",
        Kind::Counter,
        "Rows refused by validation and set aside with their reason.",
        s.rows_quarantined,
    );
    single(
        &mut out,
        "slopewarden_series",
        Kind::Gauge,
        "Series (site and parameter) known to the store.",
        s.series,
    );
    single(
        &mut out,
        "slopewarden_fit_versions_total",
        Kind::Counter,
        "Trend fit versions stored (refits after files, verdicts and window changes).",
        s.fit_versions,
    );

    let mut findings: BTreeMap<(&str, &str), i64> = FindingKind::ALL
        .iter()
        .map(|k| ((k.name(), "open"), 0))
        .collect();
    for (kind, status, n) in &s.findings {
        *findings
            .entry((kind.as_str(), status.as_str()))
            .or_default() += n;
    }
    let samples: Vec<_> = findings
        .iter()
        .map(|((kind, status), n)| (vec![("kind", *kind), ("status", *status)], *n as f64))
        .collect();
    family(
        &mut out,
        "slopewarden_findings",
        Kind::Gauge,
        "Findings by kind and status (open until a verdict); a finding of several kinds counts under each.",
        &samples,
    );

    let mut outbox: BTreeMap<&str, i64> = OUTBOX_STATUSES.iter().map(|s| (*s, 0)).collect();
    for (status, n) in &s.outbox {
        *outbox.entry(status.as_str()).or_default() += n;
    }
    let samples: Vec<_> = outbox
        .iter()
        .map(|(status, n)| (vec![("status", *status)], *n as f64))
        .collect();
    family(
        &mut out,
        "slopewarden_outbox_messages",
        Kind::Gauge,
        "Messages to the analyst by delivery status (pending and held are still to go out).",
        &samples,
    );

    if let Some(last) = s.last_arrival_unix {
        let now = now
            .duration_since(UNIX_EPOCH)
            .map_or(0.0, |d| d.as_secs_f64());
        family(
            &mut out,
            "slopewarden_last_ingest_timestamp_seconds",
            Kind::Gauge,
            "When the newest file arrived, in seconds since the Unix epoch.",
            &[(Vec::new(), last as f64)],
        );
        // Whole seconds: the stored stamps have second precision. A clock
        // set back reads as zero rather than as a negative age.
        family(
            &mut out,
            "slopewarden_seconds_since_last_ingest",
            Kind::Gauge,
            "Seconds since the newest file arrived.",
            &[(Vec::new(), (now - last as f64).max(0.0).floor())],
        );
    }
    out
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;
    use std::time::Duration;

    fn snapshot() -> MetricsSnapshot {
        MetricsSnapshot {
            files_ingested: 3,
            files_quarantined: 1,
            records_current: 41,
            rows_quarantined: 5,
            series: 2,
            fit_versions: 4,
            findings: vec![
                ("influential".into(), "open".into(), 1),
                ("outlier".into(), "confirmed".into(), 2),
                ("outlier".into(), "open".into(), 1),
            ],
            outbox: vec![("pending".into(), 2), ("sent".into(), 7)],
            last_arrival: Some("2026-03-01T10:00:00Z".into()),
            last_arrival_unix: Some(1_772_359_200),
        }
    }

    /// Every line is a comment of the two known forms or a sample
    /// `name{labels} value` whose family was declared before it.
    fn check_syntax(text: &str) {
        let mut declared = std::collections::HashSet::new();
        assert!(text.ends_with('\n'));
        for line in text.lines() {
            if let Some(rest) = line.strip_prefix("# TYPE ") {
                let (name, kind) = rest.split_once(' ').unwrap();
                assert!(["counter", "gauge"].contains(&kind), "{line}");
                assert!(declared.insert(name.to_string()), "{name} declared twice");
            } else if line.starts_with("# HELP ") {
                continue;
            } else {
                let (series, v) = line.rsplit_once(' ').unwrap();
                v.parse::<f64>().unwrap();
                let name = series.split('{').next().unwrap();
                assert!(name.starts_with("slopewarden_"), "{line}");
                assert!(declared.contains(name), "{name} sampled before its TYPE");
            }
        }
    }

    #[test]
    fn a_snapshot_becomes_an_exposition() {
        let now = UNIX_EPOCH + Duration::from_secs(1_772_359_200 + 90);
        let text = render(&snapshot(), now);
        check_syntax(&text);
        for want in [
            "# TYPE slopewarden_files_ingested_total counter\nslopewarden_files_ingested_total 3\n",
            "slopewarden_files_quarantined_total 1\n",
            "# TYPE slopewarden_records_stored gauge\nslopewarden_records_stored 41\n",
            "slopewarden_rows_quarantined_total 5\n",
            "slopewarden_series 2\n",
            "slopewarden_fit_versions_total 4\n",
            "slopewarden_findings{kind=\"outlier\",status=\"open\"} 1\n",
            "slopewarden_findings{kind=\"outlier\",status=\"confirmed\"} 2\n",
            "slopewarden_findings{kind=\"influential\",status=\"open\"} 1\n",
            // Kinds without findings still have an open sample.
            "slopewarden_findings{kind=\"sign_reversal\",status=\"open\"} 0\n",
            "slopewarden_outbox_messages{status=\"pending\"} 2\n",
            "slopewarden_outbox_messages{status=\"failed\"} 0\n",
            "slopewarden_last_ingest_timestamp_seconds 1772359200\n",
            "slopewarden_seconds_since_last_ingest 90\n",
            "slopewarden_build_info{version=\"",
        ] {
            assert!(text.contains(want), "{want:?} missing from\n{text}");
        }
    }

    #[test]
    fn the_ingest_age_is_left_out_before_the_first_file() {
        let text = render(&MetricsSnapshot::default(), UNIX_EPOCH);
        check_syntax(&text);
        assert!(!text.contains("last_ingest"));
        assert!(text.contains("slopewarden_files_ingested_total 0\n"));
        assert!(!text.contains("NaN"));
    }

    #[test]
    fn a_clock_behind_the_last_arrival_reads_as_zero_age() {
        let now = UNIX_EPOCH + Duration::from_secs(1_772_359_200 - 30);
        let text = render(&snapshot(), now);
        assert!(text.contains("slopewarden_seconds_since_last_ingest 0\n"));
    }

    #[test]
    fn label_values_and_help_are_escaped() {
        assert_eq!(escape_label_value(r#"a\b"c"#), r#"a\\b\"c"#);
        assert_eq!(escape_label_value("line\nbreak"), "line\\nbreak");
        assert_eq!(escape_label_value("µg/L"), "µg/L");
        assert_eq!(escape_help("a\\b\nc"), "a\\\\b\\nc");
        let s = MetricsSnapshot {
            findings: vec![("odd\"kind\n".into(), "open".into(), 1)],
            ..MetricsSnapshot::default()
        };
        let text = render(&s, UNIX_EPOCH);
        check_syntax(&text);
        assert!(text.contains("slopewarden_findings{kind=\"odd\\\"kind\\n\",status=\"open\"} 1\n"));
    }

    #[test]
    fn values_use_the_format_s_spelling() {
        assert_eq!(value(3.0), "3");
        assert_eq!(value(0.25), "0.25");
        assert_eq!(value(f64::NAN), "NaN");
        assert_eq!(value(f64::INFINITY), "+Inf");
        assert_eq!(value(f64::NEG_INFINITY), "-Inf");
    }
}
