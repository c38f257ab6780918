//! Making data from files safe where it lands: HTML text and attributes
//! (inline SVG included), and spreadsheet cells. Pure functions.

/// Escapes text for HTML text nodes and quoted attribute values, also
/// inside inline SVG (`<text>`, `<title>`): `& < > " '` become character
/// references, and control characters other than tab, line feed and
/// carriage return are dropped (they have no business in a report and
/// some are parse errors).
pub fn html(s: &str) -> String {
    let mut out = String::with_capacity(s.len() + s.len() / 8);
    for c in s.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            '\t' | '\n' | '\r' => out.push(c),
            c if c.is_control() => {}
            c => out.push(c),
        }
    }
    out
}

/// A text cell for a spreadsheet: one that a spreadsheet program would
/// take for a formula (it starts with `=`, `+`, `-`, `@`, a tab or a
/// carriage return; the characters OWASP's "CSV Injection" page lists, as
/// commonly applied, from memory) gets a leading single quote, which
/// makes the program show it as text. The full-width forms of `= + - @`
/// are treated the same way (some programs fold them to ASCII).
///
/// Only for text: numbers written by the report come from `f64` and are
/// written as numbers, so `-1.5` stays numeric.
pub fn spreadsheet_text(s: &str) -> String {
    match s.chars().next() {
        Some(
            '=' | '+' | '-' | '@' | '\t' | '\r' | '\u{FF1D}' | '\u{FF0B}' | '\u{FF0D}' | '\u{FF20}',
        ) => format!("'{s}"),
        _ => s.to_string(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn markup_becomes_text() {
        assert_eq!(
            html("<script>alert(1)</script>"),
            "&lt;script&gt;alert(1)&lt;/script&gt;"
        );
        assert_eq!(html(r#"a "b" & 'c'"#), "a &quot;b&quot; &amp; &#39;c&#39;");
        assert_eq!(html("MW-3/nitrate\u{0}\u{7}"), "MW-3/nitrate");
        assert_eq!(html("µg/L – ≥"), "µg/L – ≥");
    }

    #[test]
    fn formula_starts_are_neutralised_and_other_text_is_not() {
        for bad in ["=SUM(A1)", "+1", "-2+3", "@cmd", "\tx", "\rx", "＝1"] {
            assert_eq!(spreadsheet_text(bad), format!("'{bad}"), "{bad:?}");
        }
        for fine in ["MW-3/nitrate", "Quarry Lane", "", "'quoted", " =1"] {
            assert_eq!(spreadsheet_text(fine), fine);
        }
    }
}
