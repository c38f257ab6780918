//! The request head: where it ends in the bytes read so far, and what it
//! says (method, path, version, Host, whether a body follows). Pure
//! functions over bytes; the socket work is in `conn.rs`.
//!
//! Only what a read-only surface needs is parsed, strictly (RFC 9112):
//! one space between the three parts of the request line, a token for the
//! method, an origin-form (`/path?query`) or absolute-form
//! (`http://host/path`) target of visible ASCII, `HTTP/1.0` or
//! `HTTP/1.1`, header names that are tokens with the colon right after,
//! no line folding, at most one Host (required by HTTP/1.1).

/// The request method.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Method {
    /// `GET`.
    Get,
    /// `HEAD`: the GET response without its body.
    Head,
    /// Any other method (answered 405).
    Other(String),
}

/// What the request head says.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct RequestHead {
    /// The method.
    pub method: Method,
    /// The path, without query or fragment, not percent-decoded.
    pub path: String,
    /// The Host header, or the authority of an absolute-form target.
    pub host: Option<String>,
    /// Whether a body follows the head (Content-Length above zero, or a
    /// Transfer-Encoding); it is never read, only drained before closing.
    pub has_body: bool,
}

/// Why a request head is refused.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum BadRequest {
    /// Malformed: answered 400 with this reason.
    Malformed(&'static str),
    /// A version other than HTTP/1.0 and HTTP/1.1: answered 505.
    Version,
}

impl BadRequest {
    /// The reason, for the response body.
    pub fn reason(self) -> &'static str {
        match self {
            BadRequest::Malformed(why) => why,
            BadRequest::Version => "only HTTP/1.0 and HTTP/1.1 are served",
        }
    }
}

/// The length of the head in `buf` (up to and including the empty line
/// that ends it), when `buf` holds all of it. Lines end in CRLF; a bare
/// LF is accepted too (RFC 9112 §2.2 allows it).
pub fn head_len(buf: &[u8]) -> Option<usize> {
    let mut i = 0;
    while let Some(off) = buf[i..].iter().position(|&b| b == b'\n') {
        let nl = i + off;
        // The line just ended by `nl` is empty if the previous line
        // ending sits right before it (with an optional CR).
        let before = &buf[..nl];
        let before = before.strip_suffix(b"\r").unwrap_or(before);
        if before.ends_with(b"\n") {
            return Some(nl + 1);
        }
        i = nl + 1;
    }
    None
}

/// `tchar` of RFC 9110 §5.6.2.
fn is_tchar(b: u8) -> bool {
    b.is_ascii_alphanumeric() || b"!#$%&'*+-.^_`|~".contains(&b)
}

fn is_token(s: &str) -> bool {
    !s.is_empty() && s.bytes().all(is_tchar)
}

/// Parses a complete head (as delimited by [`head_len`]).
pub fn parse_head(head: &[u8]) -> Result<RequestHead, BadRequest> {
    let text = std::str::from_utf8(head)
        .map_err(|_| BadRequest::Malformed("the request head is not UTF-8 text"))?;
    let mut lines = text
        .split('\n')
        .map(|l| l.strip_suffix('\r').unwrap_or(l))
        // A client may send an empty line before the request line.
        .skip_while(|l| l.is_empty());
    let request_line = lines
        .next()
        .ok_or(BadRequest::Malformed("the request line is missing"))?;
    let mut parts = request_line.split(' ');
    let (Some(method), Some(target), Some(version), None) =
        (parts.next(), parts.next(), parts.next(), parts.next())
    else {
        return Err(BadRequest::Malformed(
            "the request line must be METHOD SP TARGET SP VERSION",
        ));
    };
    if !is_token(method) {
        return Err(BadRequest::Malformed("the method is not a token"));
    }
    let version_1_1 = match version {
        "HTTP/1.1" => true,
        "HTTP/1.0" => false,
        v if v.starts_with("HTTP/") => return Err(BadRequest::Version),
        _ => return Err(BadRequest::Malformed("the version is not HTTP/x.y")),
    };
    if target.is_empty() || !target.bytes().all(|b| b.is_ascii_graphic()) {
        return Err(BadRequest::Malformed(
            "the target must be visible ASCII without spaces",
        ));
    }
    let (path, authority) = split_target(target)?;

    let mut host: Option<String> = None;
    let mut has_body = false;
    for line in lines {
        if line.is_empty() {
            break;
        }
        if line.starts_with([' ', '\t']) {
            return Err(BadRequest::Malformed(
                "folded header lines are not accepted",
            ));
        }
        let Some((name, value)) = line.split_once(':') else {
            return Err(BadRequest::Malformed("a header line has no colon"));
        };
        if !is_token(name) {
            return Err(BadRequest::Malformed(
                "a header name is not a token (no space before the colon)",
            ));
        }
        let value = value.trim_matches([' ', '\t']);
        if name.eq_ignore_ascii_case("host") {
            if host.is_some() {
                return Err(BadRequest::Malformed("more than one Host header"));
            }
            host = Some(value.to_string());
        } else if name.eq_ignore_ascii_case("content-length") {
            let n: u64 = value
                .parse()
                .map_err(|_| BadRequest::Malformed("Content-Length is not a number"))?;
            has_body |= n > 0;
        } else if name.eq_ignore_ascii_case("transfer-encoding") {
            has_body = true;
        }
    }
    if version_1_1 && host.is_none() {
        return Err(BadRequest::Malformed("HTTP/1.1 requires a Host header"));
    }
    Ok(RequestHead {
        method: match method {
            "GET" => Method::Get,
            "HEAD" => Method::Head,
            other => Method::Other(other.to_string()),
        },
        path,
        // An absolute-form target's authority takes the place of Host
        // (RFC 9112 §3.2.2).
        host: authority.or(host),
        has_body,
    })
}

/// The path of a target (query and fragment dropped) and, for the
/// absolute form, its authority.
fn split_target(target: &str) -> Result<(String, Option<String>), BadRequest> {
    let strip = |p: &str| {
        let end = p.find(['?', '#']).unwrap_or(p.len());
        p[..end].to_string()
    };
    if target.starts_with('/') || target == "*" {
        return Ok((strip(target), None));
    }
    let lower = target.to_ascii_lowercase();
    let Some(rest) = lower
        .strip_prefix("http://")
        .or_else(|| lower.strip_prefix("https://"))
        .map(|r| &target[target.len() - r.len()..])
    else {
        return Err(BadRequest::Malformed(
            "the target must be a path (/...) or an http:// URL",
        ));
    };
    let end = rest.find(['/', '?', '#']).unwrap_or(rest.len());
    let (authority, path) = rest.split_at(end);
    if authority.is_empty() {
        return Err(BadRequest::Malformed("the URL names no host"));
    }
    let path = if path.starts_with('/') {
        strip(path)
    } else {
        "/".to_string()
    };
    Ok((path, Some(authority.to_string())))
}

/// Whether a Host value names this machine: `localhost` (or a name under
/// `.localhost`), or a loopback IP address, with or without a port. A
/// surface bound to loopback answers only such requests, so that a web
/// page elsewhere cannot read it through a name it re-points at 127.0.0.1
/// (DNS rebinding).
pub fn host_is_local(host: &str) -> bool {
    let name = if let Some(rest) = host.strip_prefix('[') {
        // [v6]:port or [v6]
        match rest.split_once(']') {
            Some((v6, tail)) if tail.is_empty() || tail.starts_with(':') => v6,
            _ => return false,
        }
    } else {
        match host.rsplit_once(':') {
            Some((name, port)) if port.bytes().all(|b| b.is_ascii_digit()) => name,
            Some(_) => return false,
            None => host,
        }
    };
    let name = name.strip_suffix('.').unwrap_or(name);
    let lower = name.to_ascii_lowercase();
    lower == "localhost"
        || lower.ends_with(".localhost")
        || name
            .parse::<std::net::IpAddr>()
            .is_ok_and(|ip| ip.is_loopback())
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    fn parse(text: &str) -> Result<RequestHead, BadRequest> {
        let bytes = text.as_bytes();
        let len = head_len(bytes).expect("a complete head");
        parse_head(&bytes[..len])
    }

    #[test]
    fn the_head_ends_at_the_first_empty_line() {
        assert_eq!(head_len(b"GET / HTTP/1.1\r\nHost: a\r\n\r\nbody"), Some(27));
        assert_eq!(head_len(b"GET / HTTP/1.1\nHost: a\n\nbody"), Some(24));
        assert_eq!(head_len(b"GET / HTTP/1.1\r\nHost: a\r\n"), None);
        assert_eq!(head_len(b"GET / HTTP/1.1\r\nHost: a\r\n\r"), None);
        assert_eq!(head_len(b""), None);
        assert_eq!(head_len(b"\r\n\r\n"), Some(4));
    }

    #[test]
    fn a_plain_get_is_read() {
        let r = parse("GET /metrics?x=1 HTTP/1.1\r\nHost: 127.0.0.1:8787\r\nAccept: */*\r\n\r\n")
            .unwrap();
        assert_eq!(r.method, Method::Get);
        assert_eq!(r.path, "/metrics");
        assert_eq!(r.host.as_deref(), Some("127.0.0.1:8787"));
        assert!(!r.has_body);
    }

    #[test]
    fn head_other_methods_http_1_0_and_bodies() {
        let r = parse("HEAD / HTTP/1.0\r\n\r\n").unwrap();
        assert_eq!(r.method, Method::Head);
        assert_eq!(r.host, None);
        let r = parse("POST / HTTP/1.1\r\nHost: localhost\r\nContent-Length: 5\r\n\r\n").unwrap();
        assert_eq!(r.method, Method::Other("POST".into()));
        assert!(r.has_body);
        let r = parse("PUT /x HTTP/1.1\r\nHost: localhost\r\nTransfer-Encoding: chunked\r\n\r\n")
            .unwrap();
        assert!(r.has_body);
        // Method names are case-sensitive: `get` is another method.
        let r = parse("get / HTTP/1.1\r\nHost: localhost\r\n\r\n").unwrap();
        assert_eq!(r.method, Method::Other("get".into()));
    }

    #[test]
    fn leading_empty_lines_and_bare_line_feeds_are_tolerated() {
        let r = parse("\r\nGET /healthz HTTP/1.1\nHost: localhost\n\n").unwrap();
        assert_eq!(r.path, "/healthz");
    }

    #[test]
    fn absolute_form_targets_give_path_and_host() {
        let r =
            parse("GET http://LOCALHOST:8787/metrics?q HTTP/1.1\r\nHost: other\r\n\r\n").unwrap();
        assert_eq!(r.path, "/metrics");
        assert_eq!(r.host.as_deref(), Some("LOCALHOST:8787"));
        let r = parse("GET http://localhost HTTP/1.1\r\nHost: x\r\n\r\n").unwrap();
        assert_eq!(r.path, "/");
    }

    #[test]
    fn malformed_heads_are_refused_with_a_reason() {
        let bad = [
            "GET  / HTTP/1.1\r\nHost: a\r\n\r\n",
            "GET / HTTP/1.1 extra\r\nHost: a\r\n\r\n",
            "GET /\r\n\r\n",
            "G(T / HTTP/1.1\r\nHost: a\r\n\r\n",
            "GET nopath HTTP/1.1\r\nHost: a\r\n\r\n",
            "GET http:///x HTTP/1.1\r\nHost: a\r\n\r\n",
            "GET / HTTP/1.1\r\n\r\n",
            "GET / HTTP/1.1\r\nHost: a\r\nHost: b\r\n\r\n",
            "GET / HTTP/1.1\r\nHost : a\r\n\r\n",
            "GET / HTTP/1.1\r\nHost: a\r\n folded\r\n\r\n",
            "GET / HTTP/1.1\r\nHost: a\r\nno colon\r\n\r\n",
            "GET / HTTP/1.1\r\nHost: a\r\nContent-Length: -1\r\n\r\n",
            "GET / FTP/1.1\r\nHost: a\r\n\r\n",
            "\r\n\r\n",
        ];
        for text in bad {
            assert!(
                matches!(parse(text), Err(BadRequest::Malformed(_))),
                "{text:?} was accepted"
            );
        }
        assert_eq!(
            parse("GET / HTTP/2.0\r\nHost: a\r\n\r\n"),
            Err(BadRequest::Version)
        );
        assert!(parse_head(b"GET /\xff HTTP/1.1\r\nHost: a\r\n\r\n").is_err());
        assert!(parse_head("GET /é HTTP/1.1\r\nHost: a\r\n\r\n".as_bytes()).is_err());
    }

    #[test]
    fn only_local_hosts_are_local() {
        for ok in [
            "localhost",
            "localhost:8787",
            "LocalHost.:1",
            "app.localhost",
            "127.0.0.1",
            "127.0.0.1:8787",
            "127.1.2.3:80",
            "[::1]",
            "[::1]:8787",
        ] {
            assert!(host_is_local(ok), "{ok}");
        }
        for bad in [
            "",
            "example.net",
            "localhost.example.net",
            "127.0.0.1.example.net",
            "10.0.0.1:8787",
            "[::2]:8787",
            "[::1]x",
            "localhost:80x",
            "::1",
        ] {
            assert!(!host_is_local(bad), "{bad}");
        }
    }
}
