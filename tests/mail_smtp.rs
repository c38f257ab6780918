//! Delivery of rendered finding messages to a real SMTP server (Debian's
//! aiosmtpd, started per test with STARTTLS or implicit TLS and AUTH
//! required; see `support/smtp.rs`), and to the outbox folder.
//!
//! Needs Debian's `python3-aiosmtpd`.

#![allow(clippy::unwrap_used, clippy::expect_used)]

#[path = "support/smtp.rs"]
mod smtp;

use std::time::{Duration, SystemTime};

use mailparse::{MailHeaderMap, ParsedMail, parse_mail};
use slopewarden::messages::chart::straight_line;
use slopewarden::messages::{
    Cause, ChartPoint, FindingKind, FitSummary, Flag, Mailer, Notice, OutboxDir, Outgoing,
    PointRole, RecordInfo, Rendered, RobustSlope, Secret, SendError, Severity, Smtp, TlsMode,
    render_notice, send_test_email,
};
use smtp::{Options, PASSWORD, Security, TestSmtp};

const FROM: &str = "slopewarden <alerts@lab-north.example.net>";
const TO: &str = "analyst@lab-north.example.net";

/// 1_950_000_000 s after the epoch: Fri, 17 Oct 2031 10:40:00 +0000
/// (GNU date -u -d @1950000000).
fn date() -> SystemTime {
    SystemTime::UNIX_EPOCH + Duration::from_secs(1_950_000_000)
}

fn notice(finding_id: i64) -> Notice {
    let mut points: Vec<ChartPoint> = (0..12)
        .map(|i| ChartPoint {
            x: 2019.0 + i as f64,
            y: 3.8 + 0.12 * i as f64 + if i % 2 == 0 { 0.25 } else { -0.2 },
            role: PointRole::Fitted,
            non_detect: i == 3,
        })
        .collect();
    points[9].role = PointRole::AwaitingReview;
    points.push(ChartPoint {
        x: 2031.5,
        y: 11.6,
        role: PointRole::ThisRecord,
        non_detect: false,
    });
    Notice {
        finding_id,
        instance: "lab-north.example.net".into(),
        series: "alder-brook/nitrate".into(),
        record: Some(RecordInfo {
            id: "MW-3/2031-07".into(),
            file: "field-2031-07.csv".into(),
            line: 14,
            x: "2031-07-02".into(),
            y: "11.6".into(),
        }),
        trend_record: None,
        unit: "mg/L".into(),
        x_label: "year".into(),
        x_unit: String::new(),
        severity: Severity::Alert,
        kinds: Vec::new(),
        flags: vec![
            Flag {
                kind: FindingKind::HighLeverage,
                measure: "leverage h".into(),
                value: Some(0.41),
                cutoff: Some(0.31),
                cutoff_source: "2p/n rule of thumb".into(),
            },
            Flag {
                kind: FindingKind::Influential,
                measure: "Cook's distance".into(),
                value: Some(2.7),
                cutoff: Some(0.72),
                cutoff_source: "median of F(2, n-2)".into(),
            },
        ],
        fit_with: Some(FitSummary {
            n: 12,
            slope: 0.47,
            slope_ci: Some((0.2, 0.74)),
            slope_p: Some(0.0027),
            intercept: -946.1,
        }),
        fit_without: Some(FitSummary {
            n: 11,
            slope: 0.12,
            slope_ci: Some((0.05, 0.19)),
            slope_p: Some(0.004),
            intercept: -238.5,
        }),
        ci_level: 0.95,
        scale_note: None,
        robust: Some(RobustSlope {
            slope: 0.13,
            ci: Some((0.04, 0.21)),
        }),
        judged_against: "the fit without 1 record awaiting review".into(),
        causes: vec![Cause {
            label: "decimal point slipped 1 place: 1.16 mg/L instead of 11.6 mg/L".into(),
            other_series: false,
            score_p: 0.02,
        }],
        no_cause: None,
        sampling_advice: Some("A sample between 2029 and 2031 would test the rise.".into()),
        nondetect_policy: "non-detects enter the fit at their reporting limit".into(),
        points,
        line_with: straight_line(-946.1, 0.47, 2018.5, 2032.0),
        line_without: straight_line(-238.5, 0.12, 2018.5, 2032.0),
        verdict_commands: vec![
            format!("slopewarden verdict {finding_id} confirmed"),
            format!("slopewarden verdict {finding_id} rejected"),
        ],
        created_at: "2031-10-17T10:39:58Z".into(),
    }
}

fn outgoing(rendered: Rendered, to: &str) -> Outgoing {
    Outgoing {
        from: FROM.into(),
        to: vec![to.into()],
        date: date(),
        rendered,
    }
}

fn header(mail: &ParsedMail<'_>, name: &str) -> Option<String> {
    mail.headers.get_first_value(name)
}

/// Checks the structure of a finding message as received and returns it
/// parsed: alternative(text, related(html, png)), with the chart's bytes and
/// Content-ID matching the rendered ones.
fn assert_finding_message(raw: &[u8], rendered: &Rendered) {
    let mail = parse_mail(raw).unwrap();
    assert_eq!(
        header(&mail, "Subject").as_deref(),
        Some(rendered.subject.as_str())
    );
    assert_eq!(
        header(&mail, "Message-ID").as_deref(),
        Some(rendered.message_id.as_str())
    );
    assert_eq!(
        header(&mail, "Date").as_deref(),
        Some("Fri, 17 Oct 2031 10:40:00 +0000")
    );
    assert_eq!(header(&mail, "To").as_deref(), Some(TO));
    assert_eq!(
        header(&mail, "Auto-Submitted").as_deref(),
        Some("auto-generated")
    );
    assert_eq!(mail.ctype.mimetype, "multipart/alternative");
    assert_eq!(mail.subparts.len(), 2);

    let text = &mail.subparts[0];
    assert_eq!(text.ctype.mimetype, "text/plain");
    assert_eq!(
        text.get_body().unwrap().replace("\r\n", "\n"),
        rendered.text
    );

    let related = &mail.subparts[1];
    assert_eq!(related.ctype.mimetype, "multipart/related");
    assert_eq!(related.subparts.len(), 2);
    let html = &related.subparts[0];
    assert_eq!(html.ctype.mimetype, "text/html");
    let chart = rendered
        .chart
        .as_ref()
        .expect("the rendered message has a chart");
    let html_body = html.get_body().unwrap();
    assert!(html_body.contains(&format!("src=\"cid:{}\"", chart.content_id)));

    let png = &related.subparts[1];
    assert_eq!(png.ctype.mimetype, "image/png");
    assert_eq!(
        header(png, "Content-ID").as_deref(),
        Some(format!("<{}>", chart.content_id).as_str())
    );
    let disposition = png.get_content_disposition();
    assert_eq!(disposition.disposition, mailparse::DispositionType::Inline);
    let bytes = png.get_body_raw().unwrap();
    assert!(bytes.starts_with(b"\x89PNG\r\n\x1a\n"));
    assert_eq!(bytes, chart.png);
}

#[test]
fn delivers_a_finding_message_over_starttls_with_auth() {
    let server = TestSmtp::start(Security::StartTls);
    let rendered = render_notice(&notice(17));
    let mailer = Smtp::new(&server.settings()).unwrap();
    mailer.send(&outgoing(rendered.clone(), TO)).unwrap();

    let got = server.received();
    assert_eq!(got.len(), 1, "server log:\n{}", server.log());
    assert!(got[0].tls, "the message must travel encrypted");
    assert_eq!(got[0].login.as_deref(), Some(smtp::USERNAME));
    assert_eq!(got[0].mail_from, "alerts@lab-north.example.net");
    assert_eq!(got[0].rcpt_to, vec![TO.to_string()]);
    assert_finding_message(&got[0].raw, &rendered);
    assert!(rendered.subject.starts_with(
        "[slopewarden] alert: check record MW-3/2031-07 in series alder-brook/nitrate"
    ));
}

#[test]
fn delivers_over_implicit_tls() {
    let server = TestSmtp::start(Security::Implicit);
    let rendered = render_notice(&notice(18));
    let settings = server.settings();
    assert_eq!(settings.tls, TlsMode::Implicit);
    Smtp::new(&settings)
        .unwrap()
        .send(&outgoing(rendered.clone(), TO))
        .unwrap();
    let got = server.received();
    assert_eq!(got.len(), 1, "server log:\n{}", server.log());
    assert!(got[0].tls);
    assert_eq!(got[0].login.as_deref(), Some(smtp::USERNAME));
    assert_finding_message(&got[0].raw, &rendered);
}

#[test]
fn logs_in_with_login_when_plain_is_not_offered() {
    for only in ["LOGIN", "PLAIN"] {
        let server = TestSmtp::start_with(Options {
            security: Security::StartTls,
            mechanisms: vec![only],
        });
        let rendered = render_notice(&notice(19));
        Smtp::new(&server.settings())
            .unwrap()
            .send(&outgoing(rendered, TO))
            .unwrap_or_else(|e| panic!("with only {only}: {e}\n{}", server.log()));
        let got = server.received();
        assert_eq!(got.len(), 1, "with only {only}");
        assert_eq!(got[0].login.as_deref(), Some(smtp::USERNAME));
    }
}

#[test]
fn wrong_password_is_permanent_and_never_printed() {
    let server = TestSmtp::start(Security::StartTls);
    let mut settings = server.settings();
    let wrong = "gravel-quartz-WRONG-5";
    settings.password = Some(Secret::new(wrong));
    let err = Smtp::new(&settings)
        .unwrap()
        .send(&outgoing(render_notice(&notice(20)), TO))
        .unwrap_err();
    assert!(
        matches!(err, SendError::AuthRejected { ref code, .. } if code == "535"),
        "{err:?}"
    );
    assert!(err.is_permanent());
    let shown = format!("{err} {err:?} {settings:?}");
    assert!(!shown.contains(wrong), "{shown}");
    assert!(!shown.contains(PASSWORD), "{shown}");
    assert!(server.received().is_empty());
}

#[test]
fn server_without_tls_or_login_is_refused_mail() {
    // A client that neither upgrades nor logs in must not get mail through:
    // this proves the server used by the other tests enforces both.
    let server = TestSmtp::start(Security::StartTls);
    let mut settings = server.settings();
    settings.tls = TlsMode::None;
    settings.username = None;
    settings.password = None;
    let err = Smtp::new(&settings)
        .unwrap()
        .send(&outgoing(render_notice(&notice(21)), TO))
        .unwrap_err();
    assert!(
        matches!(err, SendError::Rejected { ref code, .. } if code == "530"),
        "{err:?}"
    );
    assert!(err.is_permanent());
    assert!(server.received().is_empty());
}

#[test]
fn untrusted_certificate_is_a_permanent_tls_error() {
    let server = TestSmtp::start(Security::StartTls);
    let mut settings = server.settings();
    settings.ca_file = None; // the test CA is in no system store
    let err = Smtp::new(&settings)
        .unwrap()
        .send(&outgoing(render_notice(&notice(22)), TO))
        .unwrap_err();
    assert!(matches!(err, SendError::Tls { .. }), "{err:?}");
    assert!(err.is_permanent());
    assert!(server.received().is_empty());
}

#[test]
fn implicit_tls_client_against_a_plain_greeting_is_a_permanent_tls_error() {
    let server = TestSmtp::start(Security::StartTls);
    let mut settings = server.settings();
    settings.tls = TlsMode::Implicit;
    let err = Smtp::new(&settings)
        .unwrap()
        .send(&outgoing(render_notice(&notice(23)), TO))
        .unwrap_err();
    assert!(matches!(err, SendError::Tls { .. }), "{err:?}");
    assert!(err.is_permanent());
}

#[test]
fn outage_is_transient_and_the_message_arrives_once_after_restart() {
    let mut server = TestSmtp::start(Security::StartTls);
    let port = server.port();
    let mailer = Smtp::new(&server.settings()).unwrap();
    let msg = outgoing(render_notice(&notice(24)), TO);

    server.stop();
    assert!(!server.is_running());
    let err = mailer.send(&msg).unwrap_err();
    assert!(matches!(err, SendError::Unreachable { .. }), "{err:?}");
    assert!(err.is_transient());

    server.restart();
    assert_eq!(server.port(), port);
    mailer.send(&msg).unwrap();
    let got = server.received();
    assert_eq!(got.len(), 1);
    let mail = parse_mail(&got[0].raw).unwrap();
    assert_eq!(
        header(&mail, "Message-ID"),
        Some(msg.rendered.message_id.clone())
    );
}

#[test]
fn silent_server_times_out_as_transient() {
    let (_listener, port) = smtp::silent_listener();
    let mut settings = slopewarden::messages::SmtpSettings::new("127.0.0.1", TlsMode::StartTls);
    settings.port = port;
    settings.timeout = Duration::from_millis(700);
    let err = Smtp::new(&settings)
        .unwrap()
        .send(&outgoing(render_notice(&notice(25)), TO))
        .unwrap_err();
    assert!(matches!(err, SendError::TimedOut { .. }), "{err:?}");
    assert!(err.is_transient());
}

#[test]
fn deferred_recipient_is_transient_and_unknown_recipient_is_permanent() {
    let server = TestSmtp::start(Security::StartTls);
    let mailer = Smtp::new(&server.settings()).unwrap();

    let err = mailer
        .send(&outgoing(
            render_notice(&notice(26)),
            "defer-me@lab-north.example.net",
        ))
        .unwrap_err();
    assert!(
        matches!(err, SendError::Deferred { ref code, .. } if code == "451"),
        "{err:?}"
    );
    assert!(err.is_transient());

    let err = mailer
        .send(&outgoing(
            render_notice(&notice(27)),
            "reject-me@lab-north.example.net",
        ))
        .unwrap_err();
    assert!(
        matches!(err, SendError::Rejected { ref code, .. } if code == "550"),
        "{err:?}"
    );
    assert!(err.is_permanent());
    assert!(server.received().is_empty());
}

/// Header lines of a raw message, unfolded (continuation lines joined).
fn header_lines(raw: &[u8]) -> Vec<String> {
    let text = String::from_utf8_lossy(raw);
    let head = &text[..text.find("\r\n\r\n").expect("header/body separator")];
    let mut lines: Vec<String> = Vec::new();
    for line in head.split("\r\n") {
        if line.starts_with([' ', '\t']) {
            if let Some(last) = lines.last_mut() {
                last.push_str(line);
            }
        } else {
            lines.push(line.to_string());
        }
    }
    lines
}

#[test]
fn injection_attempts_in_data_stay_harmless_on_the_wire() {
    let server = TestSmtp::start(Security::StartTls);
    let mailer = Smtp::new(&server.settings()).unwrap();

    let mut hostile = notice(28);
    hostile.series = "x\r\nBcc: victim@example.org".into();
    let record = hostile.record.as_mut().unwrap();
    record.id = "MW-3\nX-Injected: yes\r\n\r\nbody takeover".into();
    record.file = "evil\r\n.\r\nMAIL FROM:<x@example.org>.csv".into();
    let hostile_rendered = render_notice(&hostile);
    mailer
        .send(&outgoing(hostile_rendered.clone(), TO))
        .unwrap();

    let mut long = notice(29);
    long.series = format!("Rivière-Süd/{}", "nitrate-".repeat(700));
    long.record.as_mut().unwrap().id = "Ø".repeat(3000);
    let long_rendered = render_notice(&long);
    mailer.send(&outgoing(long_rendered.clone(), TO)).unwrap();

    let got = server.received();
    assert_eq!(got.len(), 2, "{}", server.log());
    for r in &got {
        // Only the intended recipient, in the envelope and the headers.
        assert_eq!(r.rcpt_to, vec![TO.to_string()]);
        let lines = header_lines(&r.raw);
        for l in &lines {
            let name = l.split(':').next().unwrap_or("").to_ascii_lowercase();
            assert!(
                !["bcc", "cc", "x-injected", "mail from"].contains(&name.as_str()),
                "injected header line: {l}"
            );
            // Headers go out ASCII (non-ASCII as encoded words), within
            // RFC 5322's line limit.
            assert!(l.is_ascii(), "{l}");
        }
        let head_end = r.raw.windows(4).position(|w| w == b"\r\n\r\n").unwrap();
        for raw_line in r.raw[..head_end].split(|b| *b == b'\n') {
            assert!(raw_line.len() <= 998);
        }
        let mail = parse_mail(&r.raw).unwrap();
        assert_eq!(mail.headers.get_all_values("Subject").len(), 1);
        assert!(mail.headers.get_first_value("Bcc").is_none());
        // The text part holds the data flattened to one line each.
        let text = mail.subparts[0].get_body().unwrap();
        assert!(
            !text
                .lines()
                .any(|l| l.starts_with("Bcc:") || l.starts_with("X-Injected:") || l == "."),
            "{text}"
        );
    }

    let hostile_mail = parse_mail(&got[0].raw).unwrap();
    let subject = header(&hostile_mail, "Subject").unwrap();
    assert_eq!(subject, hostile_rendered.subject);
    assert!(
        subject.contains("MW-3 X-Injected: yes body takeover in series x Bcc: victim@example.org"),
        "{subject}"
    );

    let long_mail = parse_mail(&got[1].raw).unwrap();
    let subject = header(&long_mail, "Subject").unwrap();
    assert_eq!(subject, long_rendered.subject);
    assert!(
        subject.chars().count() <= 200,
        "{}",
        subject.chars().count()
    );
    assert!(subject.contains("Rivière-Süd/nitrate-"), "{subject}");
    assert!(subject.contains("ØØØ"), "{subject}");
}

#[test]
fn test_email_goes_through_smtp_and_reports_the_route() {
    let server = TestSmtp::start(Security::StartTls);
    let mailer = Smtp::new(&server.settings()).unwrap();
    let report = send_test_email(
        &mailer,
        FROM,
        &[TO.to_string()],
        "lab-north.example.net",
        date(),
    )
    .unwrap();
    assert_eq!(
        report.via,
        format!("SMTP server 127.0.0.1:{} (STARTTLS)", server.port())
    );
    let got = server.received();
    assert_eq!(got.len(), 1);
    let mail = parse_mail(&got[0].raw).unwrap();
    assert_eq!(
        header(&mail, "Subject").as_deref(),
        Some("[slopewarden] test message from lab-north.example.net")
    );
    assert_eq!(header(&mail, "Message-ID"), Some(report.message_id));
}

#[test]
fn outbox_dir_keeps_one_file_per_message_id_that_parses_back() {
    let dir = tempfile::tempdir().unwrap();
    let outbox = OutboxDir::new(dir.path().join("outbox"));
    let first = outgoing(render_notice(&notice(30)), TO);
    let second = outgoing(render_notice(&notice(31)), TO);

    outbox.send(&first).unwrap();
    outbox.send(&first).unwrap(); // a retry of the same message
    outbox.send(&second).unwrap();

    let mut names: Vec<String> = std::fs::read_dir(outbox.dir())
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    names.sort();
    assert_eq!(names.len(), 2, "{names:?}");
    assert!(
        names
            .iter()
            .all(|n| n.ends_with(".eml") && !n.starts_with('.')),
        "{names:?}"
    );

    let path = outbox.path_for(&first.rendered.message_id);
    assert!(
        path.file_name()
            .unwrap()
            .to_string_lossy()
            .starts_with("finding-30.")
    );
    let raw = std::fs::read(&path).unwrap();
    // Serialization is deterministic, so a retry rewrote identical bytes.
    let expected = slopewarden::messages::send::to_rfc5322(&first).unwrap();
    assert!(
        raw == expected,
        "outbox file differs from the message's bytes"
    );
    assert_finding_message(&raw, &first.rendered);
}
