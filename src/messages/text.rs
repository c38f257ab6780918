//! Small text helpers shared by the renderer and the chart: making data from
//! files safe to show (in a header, a plain-text line or HTML), formatting
//! numbers for people, wrapping paragraphs, and deriving stable ids.
//!
//! Everything here is pure. Data strings (series names, record ids, file
//! names) arrive from files we do not control, so they pass through
//! [`header_safe`] or [`inline`] before they are placed anywhere.

use sha2::Digest as _;

/// Longest header value (in characters) that [`header_safe`] lets through.
pub const HEADER_MAX_CHARS: usize = 200;

/// True for characters that must never reach a header or a one-line field:
/// C0 and C1 controls (CR, LF, TAB, NUL, ESC...), DEL, the Unicode line and
/// paragraph separators, and the invisible characters that can reorder or
/// hide text (bidirectional overrides and isolates, zero-width marks, BOM).
fn is_unsafe_char(c: char) -> bool {
    c.is_control()
        || matches!(
            c,
            '\u{2028}' | '\u{2029}'
                | '\u{200B}'..='\u{200F}'
                | '\u{202A}'..='\u{202E}'
                | '\u{2066}'..='\u{2069}'
                | '\u{FEFF}'
        )
}

/// Makes a data string safe for one line: every unsafe character (see above)
/// becomes a space, runs of whitespace collapse to one space, the ends are
/// trimmed, and the result is cut to `max_chars` characters (the cut ends in
/// `…`). Non-ASCII text is kept: encoding it is the mail library's job.
pub fn inline(s: &str, max_chars: usize) -> String {
    let mut out = String::with_capacity(s.len().min(max_chars * 4));
    let mut pending_space = false;
    for c in s.chars() {
        if is_unsafe_char(c) || c.is_whitespace() {
            pending_space = !out.is_empty();
            continue;
        }
        if pending_space {
            out.push(' ');
            pending_space = false;
        }
        out.push(c);
    }
    truncate_chars(&out, max_chars)
}

/// Makes a data string safe for a header: control characters, line breaks
/// and invisible reordering marks become spaces, whitespace collapses, and the
/// result is cut to `max_chars` (at most 200) characters. A value
/// passed through this can neither start a new header line (no CR or LF
/// survives) nor grow without bound.
pub fn header_safe(s: &str, max_chars: usize) -> String {
    // `=?` opens an RFC 2047 encoded word, which a mail reader would decode
    // (to a line break, say): a space keeps data from being read as one.
    inline(&s.replace("=?", "= ?"), max_chars.min(HEADER_MAX_CHARS))
}

/// Cuts `s` to at most `max_chars` characters, marking a cut with `…`.
pub(crate) fn truncate_chars(s: &str, max_chars: usize) -> String {
    if s.chars().count() <= max_chars {
        return s.to_string();
    }
    if max_chars == 0 {
        return String::new();
    }
    let mut out: String = s.chars().take(max_chars - 1).collect();
    out.truncate(out.trim_end().len());
    out.push('…');
    out
}

/// Escapes text for HTML element content and attribute values.
pub(crate) fn html(s: &str) -> String {
    let mut out = String::with_capacity(s.len() + 16);
    for c in s.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            _ => out.push(c),
        }
    }
    out
}

/// A number for people: four significant digits in ordinary notation for
/// magnitudes from 0.001 to a million, scientific notation outside, trailing
/// zeros dropped; `n/a` for anything not finite.
pub(crate) fn num(v: f64) -> String {
    if !v.is_finite() {
        return "n/a".to_string();
    }
    if v == 0.0 {
        return "0".to_string();
    }
    let a = v.abs();
    if (1e-3..1e6).contains(&a) {
        // Four significant digits, but a value of a thousand or more keeps
        // one decimal: 2031.5 must not read as a whole year.
        let magnitude = a.log10().floor() as i32;
        let decimals = (3 - magnitude).max(1) as usize;
        trim_zeros(format!("{v:.decimals$}"))
    } else {
        let s = format!("{v:.3e}");
        match s.split_once('e') {
            Some((mantissa, exp)) => format!("{}e{exp}", trim_zeros(mantissa.to_string())),
            None => s,
        }
    }
}

/// A p-value for people: `< 0.0001` when tiny, otherwise three significant
/// digits.
pub(crate) fn pval(p: f64) -> String {
    if !p.is_finite() {
        return "n/a".to_string();
    }
    if p < 1e-4 {
        return "< 0.0001".to_string();
    }
    let magnitude = p.log10().floor() as i32;
    let decimals = (2 - magnitude).max(0) as usize;
    trim_zeros(format!("{p:.decimals$}"))
}

fn trim_zeros(s: String) -> String {
    if !s.contains('.') {
        return s;
    }
    let t = s.trim_end_matches('0').trim_end_matches('.');
    if t == "-0" {
        "0".to_string()
    } else {
        t.to_string()
    }
}

/// Word-wraps `text` to `width` columns, prefixing every line with `indent`.
/// Words longer than a line stay whole.
pub(crate) fn wrap(text: &str, width: usize, indent: &str) -> String {
    wrap_hanging(text, width, indent, indent)
}

/// [`wrap`] with a different prefix on the first line (a bullet, say).
pub(crate) fn wrap_hanging(text: &str, width: usize, first: &str, rest: &str) -> String {
    let mut out = String::new();
    let mut indent = first;
    let mut line = String::new();
    for word in text.split_whitespace() {
        let needed = if line.is_empty() {
            word.chars().count()
        } else {
            line.chars().count() + 1 + word.chars().count()
        };
        if !line.is_empty() && indent.len() + needed > width {
            out.push_str(indent);
            out.push_str(&line);
            out.push('\n');
            line.clear();
            indent = rest;
        }
        if !line.is_empty() {
            line.push(' ');
        }
        line.push_str(word);
    }
    if !line.is_empty() {
        out.push_str(indent);
        out.push_str(&line);
        out.push('\n');
    }
    out
}

/// The right-hand side of a Message-ID or Content-ID for an instance name:
/// lower-case letters, digits, dots and hyphens only, no empty labels.
/// An instance name with nothing usable becomes `slopewarden.invalid`.
pub(crate) fn id_domain(instance: &str) -> String {
    let lowered: String = instance
        .chars()
        .map(|c| c.to_ascii_lowercase())
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '.' || c == '-' {
                c
            } else {
                '-'
            }
        })
        .collect();
    let labels: Vec<&str> = lowered
        .split('.')
        .map(|l| l.trim_matches('-'))
        .filter(|l| !l.is_empty())
        .collect();
    let joined = labels.join(".");
    let cut: String = joined.chars().take(100).collect();
    let cut = cut.trim_end_matches(['.', '-']).to_string();
    if cut.is_empty() {
        "slopewarden.invalid".to_string()
    } else {
        cut
    }
}

/// First 16 hex digits of SHA-256 over the parts, each followed by a NUL so
/// that ("ab", "c") and ("a", "bc") differ.
pub(crate) fn short_hash(parts: &[&str]) -> String {
    let mut h = sha2::Sha256::new();
    for p in parts {
        h.update(p.as_bytes());
        h.update([0u8]);
    }
    let digest = h.finalize();
    hex::encode(&digest[..8])
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn inline_removes_line_breaks_and_controls() {
        assert_eq!(
            inline("x\r\nBcc: victim@example.org", 100),
            "x Bcc: victim@example.org"
        );
        assert_eq!(inline("a\u{0}b\u{1b}[31mc\u{7f}d", 100), "a b [31mc d");
        assert_eq!(inline("  spaced \t out  ", 100), "spaced out");
        assert_eq!(inline("left\u{202E}txt.exe", 100), "left txt.exe");
        assert_eq!(inline("line\u{2028}sep", 100), "line sep");
    }

    #[test]
    fn inline_keeps_non_ascii_and_cuts_long_text() {
        assert_eq!(
            inline("Rivière-Haute/nitrate", 100),
            "Rivière-Haute/nitrate"
        );
        let long = "é".repeat(500);
        let cut = inline(&long, 10);
        assert_eq!(cut.chars().count(), 10);
        assert!(cut.ends_with('…'));
    }

    #[test]
    fn header_safe_leaves_no_encoded_word_for_a_reader_to_decode() {
        let s = header_safe("INJ =?utf-8?q?=0D=0ABcc:_x@example.net?= MW-8", 200);
        assert!(!s.contains("=?"), "{s}");
    }

    #[test]
    fn header_safe_never_exceeds_the_header_limit() {
        let long = "w".repeat(5000);
        assert_eq!(header_safe(&long, 10_000).chars().count(), HEADER_MAX_CHARS);
    }

    #[test]
    fn html_escapes_markup_and_quotes() {
        assert_eq!(
            html(r#"<b onclick="x">&'</b>"#),
            "&lt;b onclick=&quot;x&quot;&gt;&amp;&#39;&lt;/b&gt;"
        );
    }

    #[test]
    fn numbers_read_well() {
        assert_eq!(num(0.84), "0.84");
        assert_eq!(num(-0.123456), "-0.1235");
        assert_eq!(num(2031.5), "2031.5");
        assert_eq!(num(123456.0), "123456");
        assert_eq!(num(-3713.24), "-3713.2");
        assert_eq!(num(2030.0), "2030");
        assert_eq!(num(0.0000123), "1.23e-5");
        assert_eq!(num(2.5e7), "2.5e7");
        assert_eq!(num(f64::NAN), "n/a");
        assert_eq!(num(-0.00001), "-1e-5");
        assert_eq!(num(9.99996), "10");
        assert_eq!(pval(0.04567), "0.0457");
        assert_eq!(pval(0.5), "0.5");
        assert_eq!(pval(1e-9), "< 0.0001");
    }

    #[test]
    fn wrap_breaks_at_word_boundaries() {
        let w = wrap("one two three four five", 12, "  ");
        assert_eq!(w, "  one two\n  three four\n  five\n");
        let b = wrap_hanging("one two three four", 12, "- ", "  ");
        assert_eq!(b, "- one two\n  three four\n");
    }

    #[test]
    fn id_domain_keeps_a_valid_dot_atom() {
        assert_eq!(id_domain("Lab-North.example.net"), "lab-north.example.net");
        assert_eq!(id_domain("my host@x\r\n"), "my-host-x");
        assert_eq!(id_domain("..."), "slopewarden.invalid");
        assert_eq!(id_domain("ünï"), "n");
    }

    #[test]
    fn short_hash_separates_parts() {
        assert_ne!(short_hash(&["ab", "c"]), short_hash(&["a", "bc"]));
        assert_eq!(short_hash(&["x"]).len(), 16);
    }
}
