//! Splitting checked text into CSV rows, each with its physical line and
//! its raw text.
//!
//! The csv crate does the quoting (RFC 4180). Three things it does not do
//! for us: it numbers lines by LF only and, with CRLF line ends, starts a
//! record on the LF that ends the previous line, so lines are counted here
//! from byte offsets; it gives no raw text, so each row's span is taken
//! from the reader's positions; and it accepts a quote left open at the end
//! of input, which is reported here as a whole-file error.
//!
//! A line break is LF, CRLF or a lone CR (the csv crate ends records on all
//! three, so line numbers count them the same way).

use super::parse::FileError;

/// The rows of one file's text, read one at a time into one reused record.
pub(super) struct Rows<'a> {
    text: &'a str,
    reader: csv::Reader<&'a [u8]>,
    record: csv::StringRecord,
    delimiter: u8,
    /// Bytes of `text` scanned for line breaks so far, and how many found
    /// (with those before `text` in its file).
    counted_to: usize,
    breaks: u64,
    /// `text` runs to the end of its file. When it does not (a window of a
    /// file read piece by piece), a row that reaches the end of `text` may
    /// go on in the next piece: it is held back, not returned.
    last: bool,
    /// The held-back row's start in `text` and its line.
    held: Option<(usize, u64)>,
}

/// One row: where it is, what it says, and its fields.
pub(super) struct Row<'r> {
    /// 1-based physical line the row starts on.
    pub line: u64,
    /// The row's text without its line end (may span lines when a quoted
    /// field holds a line break).
    pub raw: &'r str,
    /// The fields, unquoted, untrimmed.
    pub fields: &'r csv::StringRecord,
}

impl<'a> Rows<'a> {
    /// Rows of `text` (already known to be UTF-8, BOM removed).
    pub fn new(text: &'a str, delimiter: u8) -> Self {
        Self::window(text, delimiter, 0, true)
    }

    /// Rows of `text`, a piece of a file that starts where a row starts,
    /// after `breaks_before` line breaks, and ends just after a line break
    /// unless it is the `last` piece (which runs to the end of the file).
    pub fn window(text: &'a str, delimiter: u8, breaks_before: u64, last: bool) -> Self {
        let reader = csv::ReaderBuilder::new()
            .has_headers(false)
            .flexible(true)
            .delimiter(delimiter)
            .buffer_capacity(64 * 1024)
            .from_reader(text.as_bytes());
        Rows {
            text,
            reader,
            record: csv::StringRecord::new(),
            delimiter,
            counted_to: 0,
            breaks: breaks_before,
            last,
            held: None,
        }
    }

    /// Where the next piece of the file must start: the held-back row, or
    /// just after the last row read (all of `text` once the rows are done);
    /// with the line breaks before that point.
    pub fn resume(&mut self) -> (usize, u64) {
        if let Some((start, line)) = self.held {
            return (start, line - 1);
        }
        let bytes = self.text.as_bytes();
        let mut at = offset(self.reader.position().byte(), bytes.len());
        // After a CRLF the reader stops on the LF; the next row starts
        // after it.
        if at > 0 && bytes.get(at - 1) == Some(&b'\r') && bytes.get(at) == Some(&b'\n') {
            at += 1;
        }
        (at, self.line_of(at) - 1)
    }

    /// The next row, `None` at the end, or a whole-file error when the last
    /// row leaves a quote open.
    pub fn next_row(&mut self) -> Result<Option<Row<'_>>, FileError> {
        let bytes = self.text.as_bytes();
        let more = match self.reader.read_record(&mut self.record) {
            Ok(more) => more,
            Err(e) => {
                // Not expected from an in-memory UTF-8 reader with flexible
                // rows; reported rather than trusted never to happen.
                let at = offset(self.reader.position().byte(), bytes.len());
                return Err(FileError::Malformed {
                    line: self.line_of(at),
                    reason: format!("the CSV reader stopped here: {e}"),
                });
            }
        };
        if !more {
            return Ok(None);
        }
        // The reported start lies before any blank lines the reader skipped
        // and, after CRLF, on the LF: a record never starts with CR or LF.
        let mut start = self
            .record
            .position()
            .map_or(0, |p| offset(p.byte(), bytes.len()));
        while matches!(bytes.get(start), Some(b'\r' | b'\n')) {
            start += 1;
        }
        let consumed = offset(self.reader.position().byte(), bytes.len());
        let mut end = consumed.max(start);
        while end > start && matches!(bytes.get(end - 1), Some(b'\r' | b'\n')) {
            end -= 1;
        }
        let line = self.line_of(start);
        if !self.last && consumed >= bytes.len() {
            self.held = Some((start, line));
            return Ok(None);
        }
        let raw = self.text.get(start..end).unwrap_or_default();
        if consumed >= bytes.len()
            && let Some(quote) = open_quote(raw.as_bytes(), self.delimiter)
        {
            let quote_line = line + count_breaks(raw.as_bytes().get(..quote).unwrap_or_default());
            return Err(FileError::Malformed {
                line: quote_line,
                reason: format!(
                    "a quote opened on line {quote_line} is never closed, so everything after it would be one field; close the quote (a quote inside a quoted field is written twice, \"\"), or check whether the file was cut off"
                ),
            });
        }
        Ok(Some(Row {
            line,
            raw,
            fields: &self.record,
        }))
    }

    /// The 1-based line of byte `at`; calls must not go backwards.
    fn line_of(&mut self, at: usize) -> u64 {
        if at > self.counted_to {
            let bytes = self.text.as_bytes();
            // `at` is a row start, never between a CR and its LF, so a CR
            // ending the scanned part is a lone CR.
            self.breaks += count_breaks(bytes.get(self.counted_to..at).unwrap_or_default());
            self.counted_to = at;
        }
        self.breaks + 1
    }
}

/// Line breaks in `bytes`: LF, CRLF and lone CR count one each. A CR at the
/// very end counts as a break (the next byte is not looked at).
pub(super) fn count_breaks(bytes: &[u8]) -> u64 {
    let lf = bytes.iter().filter(|&&b| b == b'\n').count();
    let lone_cr = if bytes.contains(&b'\r') {
        bytes
            .iter()
            .enumerate()
            .filter(|&(i, &b)| b == b'\r' && bytes.get(i + 1) != Some(&b'\n'))
            .count()
    } else {
        0
    };
    (lf + lone_cr) as u64
}

fn offset(byte: u64, len: usize) -> usize {
    usize::try_from(byte).unwrap_or(usize::MAX).min(len)
}

/// The offset of a quote still open at the end of `raw`, read the way the
/// csv crate reads it: a quote opens a field only at the field's start,
/// `""` inside is one quote, and after the closing quote the rest of the
/// field is taken literally.
fn open_quote(raw: &[u8], delimiter: u8) -> Option<usize> {
    let mut field_start = true;
    let mut open: Option<usize> = None;
    let mut i = 0;
    while let Some(&b) = raw.get(i) {
        if open.is_some() {
            if b == b'"' {
                if raw.get(i + 1) == Some(&b'"') {
                    i += 1;
                } else {
                    open = None;
                }
            }
        } else if field_start && b == b'"' {
            open = Some(i);
            field_start = false;
        } else {
            field_start = b == delimiter || b == b'\n' || b == b'\r';
        }
        i += 1;
    }
    open
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    fn lines_and_raw(text: &str) -> Vec<(u64, String)> {
        let mut rows = Rows::new(text, b',');
        let mut out = Vec::new();
        while let Some(row) = rows.next_row().unwrap() {
            out.push((row.line, row.raw.to_string()));
        }
        out
    }

    #[test]
    fn numbers_lines_with_crlf_and_blank_lines() {
        let text = "a,b\r\n\r\n1,2\r\n\"x\r\ny\",3\r\n4,5";
        assert_eq!(
            lines_and_raw(text),
            vec![
                (1, "a,b".to_string()),
                (3, "1,2".to_string()),
                (4, "\"x\r\ny\",3".to_string()),
                (6, "4,5".to_string()),
            ]
        );
    }

    #[test]
    fn numbers_lines_with_lf_and_lone_cr() {
        assert_eq!(
            lines_and_raw("a,b\n\n\n1,2\n"),
            vec![(1, "a,b".to_string()), (4, "1,2".to_string())]
        );
        assert_eq!(
            lines_and_raw("a,b\r1,2\r\r3,4"),
            vec![
                (1, "a,b".to_string()),
                (2, "1,2".to_string()),
                (4, "3,4".to_string())
            ]
        );
    }

    #[test]
    fn unclosed_quote_at_end_is_a_whole_file_error_naming_its_line() {
        let mut rows = Rows::new("a,b\n1,2\n3,\"open\n4,5\n", b',');
        assert!(rows.next_row().unwrap().is_some());
        assert!(rows.next_row().unwrap().is_some());
        match rows.next_row() {
            Err(FileError::Malformed { line, reason }) => {
                assert_eq!(line, 3);
                assert!(reason.starts_with("a quote opened on line 3 is never closed"));
            }
            _ => panic!("expected a malformed-file error"),
        }
    }

    #[test]
    fn closed_and_doubled_quotes_are_not_open() {
        assert_eq!(open_quote(b"1,\"a \"\"b\"\", c\"", b','), None);
        assert_eq!(open_quote(b"1,\"a\"x\"", b','), None); // literal after close
        assert_eq!(open_quote(b"1,a\"b", b','), None); // quote inside a field
        assert_eq!(open_quote(b"1;\"a", b';'), Some(2));
        assert_eq!(open_quote(b"1,\"a\"\"", b','), Some(2));
    }

    #[test]
    fn counts_each_kind_of_line_break_once() {
        assert_eq!(count_breaks(b"a\nb\r\nc\rd"), 3);
        assert_eq!(count_breaks(b"\r\n\r\n"), 2);
        assert_eq!(count_breaks(b"abc"), 0);
    }
}
