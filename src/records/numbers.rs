//! Reading numbers and measured values from cells, strictly: a cell is a
//! finite decimal number, a non-detect in one of the forms labs write, or
//! an error that says what to write instead. Nothing is guessed and nothing
//! is evaluated.

/// Why a cell is not a number.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(super) enum NumberProblem {
    /// Nothing written.
    Empty,
    /// NaN, infinity, or beyond the range of a double (1e400).
    NotFinite,
    /// Starts like a spreadsheet formula (`=`, `+`, `@`, `-` then a
    /// non-digit).
    Formula,
    /// A spreadsheet error value such as `#N/A` or `#DIV/0!`.
    SpreadsheetError,
    /// A comma in a feed that writes decimal points.
    Comma,
    /// A point in a feed that writes decimal commas.
    Point,
    /// More than one separator: thousands grouping.
    Grouping,
    /// Anything else.
    NotNumber,
}

impl NumberProblem {
    /// The reason for people. `name` is the column, `value` the cell as
    /// shown, `what` what belongs in the cell ("the measured value").
    pub fn reason(self, name: &str, value: &str, what: &str) -> String {
        match self {
            NumberProblem::Empty => {
                format!("{name} is empty; fill in {what} or remove the row")
            }
            NumberProblem::NotFinite => format!(
                "{name} = {value} is not a finite number; write {what} (numbers beyond ±1.8e308 cannot be stored)"
            ),
            NumberProblem::Formula => format!(
                "{name} = {value} looks like a spreadsheet formula, not a number; write {what} itself (formulas are never evaluated)"
            ),
            NumberProblem::SpreadsheetError => format!(
                "{name} = {value} is a spreadsheet error, not a number; fix the sheet and export {what}"
            ),
            NumberProblem::Comma => format!(
                "{name} = {value} has a comma, but this feed writes decimal points and no thousands separators; write e.g. 0.5 or 1234.5 (or set decimal_comma for the feed)"
            ),
            NumberProblem::Point => format!(
                "{name} = {value} has a point, but this feed writes decimal commas and no thousands separators; write e.g. 0,5 or 1234,5"
            ),
            NumberProblem::Grouping => format!(
                "{name} = {value} has a thousands separator; write the number without it, e.g. 1234.5"
            ),
            NumberProblem::NotNumber => {
                format!("{name} = {value} is not a number; write {what} as a plain number")
            }
        }
    }
}

/// Reads a trimmed cell as a finite number. With `decimal_comma`, `0,5` is
/// one half and a point is refused; without, the reverse. Exponents
/// (`1.2E-3`) are accepted; a leading `+` is not (formula).
pub(super) fn parse_number(text: &str, decimal_comma: bool) -> Result<f64, NumberProblem> {
    let bytes = text.as_bytes();
    let Some(&first) = bytes.first() else {
        return Err(NumberProblem::Empty);
    };
    if is_non_finite_word(text) {
        return Err(NumberProblem::NotFinite);
    }
    match first {
        b'=' | b'+' | b'@' => return Err(NumberProblem::Formula),
        b'-' if bytes
            .get(1)
            .is_some_and(|b| !b.is_ascii_digit() && *b != b'.' && *b != b',') =>
        {
            return Err(NumberProblem::Formula);
        }
        b'#' => return Err(NumberProblem::SpreadsheetError),
        _ => {}
    }
    let (decimal, other) = if decimal_comma {
        (b',', b'.')
    } else {
        (b'.', b',')
    };
    // Check the shape ourselves: Rust's float parser also takes "inf",
    // "NaN" and a leading "+", which are refused here.
    let (mut decimals, mut others, mut mantissa_digits) = (0, 0, 0);
    let mut i = usize::from(first == b'-');
    while let Some(&b) = bytes.get(i) {
        match b {
            b'0'..=b'9' => mantissa_digits += 1,
            b if b == decimal => decimals += 1,
            b if b == other => others += 1,
            b'e' | b'E' => break,
            _ => return Err(NumberProblem::NotNumber),
        }
        i += 1;
    }
    if i < bytes.len() {
        // An exponent: e, an optional sign, at least one digit.
        i += 1;
        if matches!(bytes.get(i), Some(b'+' | b'-')) {
            i += 1;
        }
        let digits = bytes.get(i..).unwrap_or_default();
        if digits.is_empty() || !digits.iter().all(u8::is_ascii_digit) {
            return Err(NumberProblem::NotNumber);
        }
    }
    if decimals + others > 1 {
        return Err(NumberProblem::Grouping);
    }
    if others == 1 {
        return Err(if decimal_comma {
            NumberProblem::Point
        } else {
            NumberProblem::Comma
        });
    }
    if mantissa_digits == 0 {
        return Err(NumberProblem::NotNumber);
    }
    let value = if decimal_comma && decimals == 1 {
        text.replacen(',', ".", 1).parse::<f64>()
    } else {
        text.parse::<f64>()
    };
    match value {
        Ok(v) if v.is_finite() => Ok(v),
        Ok(_) => Err(NumberProblem::NotFinite),
        Err(_) => Err(NumberProblem::NotNumber),
    }
}

fn is_non_finite_word(text: &str) -> bool {
    let word = text.strip_prefix(['+', '-']).unwrap_or(text);
    ["nan", "inf", "infinity"]
        .iter()
        .any(|w| word.eq_ignore_ascii_case(w))
}

/// A y cell as written, before the row's other columns are consulted.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(super) enum Written {
    /// A plain number.
    Value(f64),
    /// `<0.5`: below the limit 0.5.
    LessThan(f64),
    /// `0.5 U` or `0.5U`: not detected at 0.5 (lab qualifier in the cell).
    Qualified(f64),
    /// `ND`, `n.d.`, `BDL`, `<DL`...: not detected, limit elsewhere.
    NotDetected,
}

/// Why a y cell is not a measured value.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(super) enum MeasureProblem {
    /// The cell, or the number after `<` or before `U`, is not a number.
    Number(NumberProblem),
    /// `<` followed by something that is not a limit.
    BadLimit(NumberProblem),
}

/// Reads a trimmed y cell.
pub(super) fn parse_measure(text: &str, decimal_comma: bool) -> Result<Written, MeasureProblem> {
    if let Some(rest) = text.strip_prefix('<') {
        let rest = rest.trim_start();
        if is_limit_name(rest) {
            return Ok(Written::NotDetected);
        }
        return parse_number(rest, decimal_comma)
            .map(Written::LessThan)
            .map_err(MeasureProblem::BadLimit);
    }
    if is_not_detected_word(text) {
        return Ok(Written::NotDetected);
    }
    let unqualified = strip_suffix_ignore_case(text, "UJ")
        .or_else(|| strip_suffix_ignore_case(text, "U"))
        .map(str::trim_end);
    if let Some(number) = unqualified.filter(|n| !n.is_empty()) {
        return parse_number(number, decimal_comma)
            .map(Written::Qualified)
            .map_err(MeasureProblem::Number);
    }
    parse_number(text, decimal_comma)
        .map(Written::Value)
        .map_err(MeasureProblem::Number)
}

/// Whether a qualifier cell marks a non-detect.
pub(super) fn is_non_detect_qualifier(text: &str) -> bool {
    text == "<"
        || text.eq_ignore_ascii_case("U")
        || text.eq_ignore_ascii_case("UJ")
        || is_not_detected_word(text)
}

fn is_not_detected_word(text: &str) -> bool {
    ["nd", "n.d.", "n.d", "bdl", "not detected"]
        .iter()
        .any(|w| text.eq_ignore_ascii_case(w))
}

/// `DL`, `LOD`... as in `<DL`: a named limit whose value is elsewhere.
fn is_limit_name(text: &str) -> bool {
    ["dl", "mdl", "rdl", "lod", "loq", "rl", "pql"]
        .iter()
        .any(|w| text.eq_ignore_ascii_case(w))
}

fn strip_suffix_ignore_case<'a>(text: &'a str, suffix: &str) -> Option<&'a str> {
    let cut = text.len().checked_sub(suffix.len())?;
    let (head, tail) = (text.get(..cut)?, text.get(cut..)?);
    tail.eq_ignore_ascii_case(suffix).then_some(head)
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    fn point(text: &str) -> Result<f64, NumberProblem> {
        parse_number(text, false)
    }

    fn comma(text: &str) -> Result<f64, NumberProblem> {
        parse_number(text, true)
    }

    #[test]
    fn reads_plain_and_exponent_numbers() {
        assert_eq!(point("0.5"), Ok(0.5));
        assert_eq!(point("-12"), Ok(-12.0));
        assert_eq!(point(".5"), Ok(0.5));
        assert_eq!(point("5."), Ok(5.0));
        assert_eq!(point("1.2E-3"), Ok(1.2e-3));
        assert_eq!(point("4e+2"), Ok(400.0));
    }

    #[test]
    fn rejects_nan_infinity_and_overflow() {
        for bad in ["NaN", "nan", "inf", "-Infinity", "+inf", "1e400", "-1e999"] {
            assert_eq!(point(bad), Err(NumberProblem::NotFinite), "{bad}");
        }
    }

    #[test]
    fn rejects_formula_looking_cells() {
        for bad in ["=cmd|' /C calc'!A0", "+1", "@SUM(A1:A2)", "-cmd|x", "=1+1"] {
            assert_eq!(point(bad), Err(NumberProblem::Formula), "{bad}");
        }
        assert_eq!(point("#N/A"), Err(NumberProblem::SpreadsheetError));
    }

    #[test]
    fn decimal_comma_reads_only_a_single_comma() {
        assert_eq!(comma("0,5"), Ok(0.5));
        assert_eq!(comma("-1,25e3"), Ok(-1250.0));
        assert_eq!(comma("12"), Ok(12.0));
        assert_eq!(comma("1.234,5"), Err(NumberProblem::Grouping));
        assert_eq!(comma("1,234,5"), Err(NumberProblem::Grouping));
        assert_eq!(comma("0.5"), Err(NumberProblem::Point));
    }

    #[test]
    fn decimal_point_feed_refuses_commas() {
        assert_eq!(point("0,5"), Err(NumberProblem::Comma));
        assert_eq!(point("1,234.5"), Err(NumberProblem::Grouping));
    }

    #[test]
    fn rejects_things_that_are_not_numbers() {
        for bad in [
            "abc", "-", ".", "1e", "1e+", "0x10", "1 234", "1'234", "5 mg", "--1", "1-",
        ] {
            assert!(point(bad).is_err(), "{bad}");
        }
        assert_eq!(point(""), Err(NumberProblem::Empty));
    }

    #[test]
    fn reads_every_censored_form() {
        let m = |t| parse_measure(t, false);
        assert_eq!(m("<0.5"), Ok(Written::LessThan(0.5)));
        assert_eq!(m("< 0.5"), Ok(Written::LessThan(0.5)));
        assert_eq!(m("0.5 U"), Ok(Written::Qualified(0.5)));
        assert_eq!(m("0.5U"), Ok(Written::Qualified(0.5)));
        assert_eq!(m("0.5 UJ"), Ok(Written::Qualified(0.5)));
        for nd in ["ND", "nd", "n.d.", "N.D.", "BDL", "<DL", "< LOD"] {
            assert_eq!(m(nd), Ok(Written::NotDetected), "{nd}");
        }
        assert_eq!(m("1.5"), Ok(Written::Value(1.5)));
        assert_eq!(parse_measure("<0,5", true), Ok(Written::LessThan(0.5)));
    }

    #[test]
    fn rejects_broken_censored_forms() {
        let m = |t| parse_measure(t, false);
        assert!(matches!(m("<abc"), Err(MeasureProblem::BadLimit(_))));
        assert!(matches!(
            m("<"),
            Err(MeasureProblem::BadLimit(NumberProblem::Empty))
        ));
        assert!(matches!(m("U"), Err(MeasureProblem::Number(_))));
        assert!(matches!(m("x U"), Err(MeasureProblem::Number(_))));
    }

    #[test]
    fn recognises_non_detect_qualifiers() {
        for q in ["U", "u", "UJ", "<", "ND", "n.d."] {
            assert!(is_non_detect_qualifier(q), "{q}");
        }
        for q in ["J", "B", "", "E"] {
            assert!(!is_non_detect_qualifier(q), "{q}");
        }
    }
}
