//! Responses and their bytes: status line, the headers every response
//! carries (length, type with charset, `Connection: close`, `nosniff`,
//! `no-store`, a Date), then the body unless the request was HEAD. Pure.

use std::fmt::Write as _;
use std::time::SystemTime;

/// Content-Type of plain text answers.
pub const TEXT: &str = "text/plain; charset=utf-8";
/// Content-Type of the overview page.
pub const HTML: &str = "text/html; charset=utf-8";
/// Content-Type of the Prometheus text exposition format 0.0.4.
pub const EXPOSITION: &str = "text/plain; version=0.0.4; charset=utf-8";

/// The page's Content-Security-Policy: nothing may load or run but inline
/// styles and data: images; no forms, no framing, no base URL.
pub const PAGE_POLICY: &str = "default-src 'none'; style-src 'unsafe-inline'; img-src data:; base-uri 'none'; form-action 'none'; frame-ancestors 'none'";

/// A response about to be written.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Response {
    /// Status code.
    pub status: u16,
    /// Content-Type, charset included.
    pub content_type: &'static str,
    /// Headers beyond those every response carries.
    pub headers: Vec<(&'static str, String)>,
    /// The body (also when answering HEAD: its length is announced).
    pub body: Vec<u8>,
}

impl Response {
    /// A plain-text response.
    pub fn text(status: u16, body: impl Into<String>) -> Response {
        Response {
            status,
            content_type: TEXT,
            headers: Vec::new(),
            body: body.into().into_bytes(),
        }
    }

    /// Adds a header.
    pub fn with(mut self, name: &'static str, value: impl Into<String>) -> Response {
        self.headers.push((name, value.into()));
        self
    }

    /// The bytes to send: status line, headers, and the body unless
    /// `head_only` (a HEAD request). `now` dates the response.
    pub fn to_bytes(&self, head_only: bool, now: SystemTime) -> Vec<u8> {
        let mut head = String::with_capacity(256);
        let _ = write!(
            head,
            "HTTP/1.1 {} {}\r\nDate: {}\r\nContent-Type: {}\r\nContent-Length: {}\r\nConnection: close\r\nX-Content-Type-Options: nosniff\r\nCache-Control: no-store\r\nReferrer-Policy: no-referrer\r\n",
            self.status,
            reason(self.status),
            http_date(now),
            self.content_type,
            self.body.len()
        );
        for (name, value) in &self.headers {
            // Values are fixed text or built from numbers; a line break
            // would split the header, so none survives.
            let value: String = value.chars().filter(|c| !c.is_control()).collect();
            let _ = write!(head, "{name}: {value}\r\n");
        }
        head.push_str("\r\n");
        let mut bytes = head.into_bytes();
        if !head_only {
            bytes.extend_from_slice(&self.body);
        }
        bytes
    }
}

/// The reason phrase of the status codes this surface sends.
pub fn reason(status: u16) -> &'static str {
    match status {
        200 => "OK",
        400 => "Bad Request",
        404 => "Not Found",
        405 => "Method Not Allowed",
        408 => "Request Timeout",
        421 => "Misdirected Request",
        431 => "Request Header Fields Too Large",
        500 => "Internal Server Error",
        503 => "Service Unavailable",
        505 => "HTTP Version Not Supported",
        _ => "Unknown",
    }
}

/// An HTTP date (IMF-fixdate, RFC 9110 §5.6.7), e.g.
/// `Sun, 06 Nov 1994 08:49:37 GMT`.
pub fn http_date(t: SystemTime) -> String {
    const DAYS: [&str; 7] = ["Thu", "Fri", "Sat", "Sun", "Mon", "Tue", "Wed"];
    const MONTHS: [&str; 12] = [
        "Jan", "Feb", "Mar", "Apr", "May", "Jun", "Jul", "Aug", "Sep", "Oct", "Nov", "Dec",
    ];
    let (y, m, d, sod) = crate::clock::civil(t);
    // 1970-01-01 was a Thursday.
    let days = crate::clock::unix_seconds(t).div_euclid(86_400);
    format!(
        "{}, {d:02} {} {y:04} {:02}:{:02}:{:02} GMT",
        DAYS[days.rem_euclid(7) as usize],
        MONTHS[(m as usize).clamp(1, 12) - 1],
        sod / 3600,
        sod / 60 % 60,
        sod % 60
    )
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;
    use std::time::{Duration, UNIX_EPOCH};

    #[test]
    fn dates_are_imf_fixdates() {
        // RFC 9110's own example.
        let t = UNIX_EPOCH + Duration::from_secs(784_111_777);
        assert_eq!(http_date(t), "Sun, 06 Nov 1994 08:49:37 GMT");
        assert_eq!(http_date(UNIX_EPOCH), "Thu, 01 Jan 1970 00:00:00 GMT");
        // 2024-02-29 was a Thursday (a leap day).
        let t = UNIX_EPOCH + Duration::from_secs(1_709_164_800);
        assert_eq!(http_date(t), "Thu, 29 Feb 2024 00:00:00 GMT");
    }

    #[test]
    fn every_response_carries_length_type_and_the_safety_headers() {
        let r = Response::text(404, "no such page\n").with("Allow", "GET, HEAD");
        let text = String::from_utf8(r.to_bytes(false, UNIX_EPOCH)).unwrap();
        let (head, body) = text.split_once("\r\n\r\n").unwrap();
        assert_eq!(body, "no such page\n");
        let lines: Vec<&str> = head.split("\r\n").collect();
        assert_eq!(lines[0], "HTTP/1.1 404 Not Found");
        for want in [
            "Content-Type: text/plain; charset=utf-8",
            "Content-Length: 13",
            "Connection: close",
            "X-Content-Type-Options: nosniff",
            "Cache-Control: no-store",
            "Allow: GET, HEAD",
            "Date: Thu, 01 Jan 1970 00:00:00 GMT",
        ] {
            assert!(lines.contains(&want), "{want} missing from {lines:?}");
        }
    }

    #[test]
    fn head_announces_the_length_without_the_body() {
        let r = Response::text(200, "ok\n");
        let text = String::from_utf8(r.to_bytes(true, UNIX_EPOCH)).unwrap();
        assert!(text.ends_with("\r\n\r\n"));
        assert!(text.contains("Content-Length: 3\r\n"));
    }

    #[test]
    fn header_values_cannot_break_lines() {
        let r = Response::text(200, "").with("X-Test", "a\r\nSet-Cookie: b");
        let text = String::from_utf8(r.to_bytes(true, UNIX_EPOCH)).unwrap();
        assert!(text.contains("X-Test: aSet-Cookie: b\r\n"));
        assert!(!text.contains("\r\nSet-Cookie"));
    }
}
