//! [`parse_file`]: one delivered file's bytes -> records and per-row
//! errors.
//!
//! # A whole file, or one row
//!
//! A problem refuses the whole file ([`FileError`]) only when no row of it
//! can be trusted: the bytes are not UTF-8 text (a NUL byte anywhere, or
//! invalid UTF-8), there is no header, a required column is missing, a
//! mapped column is named twice, or a quote opened in the last row is never
//! closed (everything after it would be one field; a file cut off in
//! transfer looks exactly like this, so it is not half-ingested).
//!
//! Everything else refuses one row ([`RecordError`]) and the rest of the
//! file is read. A stray quote that is closed further down swallows the
//! lines between into one row; that row is refused (as ragged, or because
//! a field holds lines with a full row's worth of delimiters) and its raw
//! text holds all of those lines, so nothing disappears unreported. Rows
//! whose cells are all empty (blank lines, `,,,` left by spreadsheets) are
//! skipped.
//!
//! # Order of the checks in a row
//!
//! One error per row, the first found, in this order: field count; a
//! quoted field that swallowed what look like whole rows; record_id
//! (empty, repeated in the file); series key; x (a number, or a date that
//! exists and is not in the future; then the series' plausible range); y (a number or a non-detect; not negative unless allowed; a
//! non-detect's limit > 0); the unit conversion; sampled_at (only when it
//! reads as an ISO date: then it must exist and not be in the future; other
//! text is kept as written).
//!
//! A repeated record_id is counted from the first row that carries it, even
//! when that row was refused for another reason: which of the two is the
//! real record is for people to say.
//!
//! # Columns
//!
//! Header names are trimmed and matched exactly. Every column not mapped to
//! a field of [`Record`] is kept in `attributes`, including the qualifier
//! and detection-limit columns (a qualifier such as `J`, estimated, is
//! information the store keeps). Unnamed columns are kept as `column N`
//! when the cell is not empty.
//!
//! # Cost
//!
//! Column positions are resolved once from the header; rows are read into
//! one reused record; the caller's rules are asked once per series; record
//! ids are remembered in one growing string. The only allocations per row
//! are the strings a [`Record`] owns (six on the canonical layout), and
//! messages are formatted only for refused rows.

use std::collections::HashMap;
use std::collections::hash_map::RandomState;
use std::hash::{BuildHasher, BuildHasherDefault, Hasher};
use std::io::Read;
use std::rc::Rc;

use thiserror::Error;

use super::dates::{self, DateProblem, DateTime};
use super::layout::{DateFormat, Layout, SeriesKey, SeriesRules, Today, XSource};
use super::model::{Measure, Record, RecordError, SeriesId};
use super::numbers::{self, MeasureProblem, Written};
use super::rows::{Row, Rows, count_breaks};
use super::units;

/// What one file yielded: the rows that passed, and why the others did not,
/// both in file order.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct ParsedFile {
    /// Validated records.
    pub records: Vec<Record>,
    /// Refused rows, one error each.
    pub errors: Vec<RecordError>,
    /// The unit column, when the header has one: its 1-based position and
    /// its name (for a row refused over its unit after parsing).
    pub unit_column: Option<(usize, String)>,
}

/// Why a file cannot be read as records at all (it goes to quarantine).
#[derive(Debug, Clone, PartialEq, Eq, Error)]
pub enum FileError {
    /// Binary content, or text that is not UTF-8.
    #[error("the file is not UTF-8 text: {reason}")]
    NotText {
        /// What was found and where (byte offset, line), and what to do.
        reason: String,
    },
    /// The file is empty or holds only blank lines.
    #[error(
        "the file has no header line; its first line must name the columns (e.g. record_id,series,x,y)"
    )]
    NoHeader,
    /// Required columns are absent from the header.
    #[error(
        "required column(s) {} not in the header (it has: {}); {}",
        .missing.join(", "),
        header_names_for_people(.found),
        .delimiter.map_or_else(
            || "rename the columns, or set the feed's layout in the config".to_string(),
            delimiter_advice
        )
    )]
    MissingColumns {
        /// The required columns not found.
        missing: Vec<String>,
        /// The header's names, trimmed.
        found: Vec<String>,
        /// Another delimiter under which the header has every required
        /// column, when one does: the file is then well formed, only
        /// not in the layout expected.
        delimiter: Option<u8>,
    },
    /// The file could not be read to its end (an I/O error, or it changed
    /// while it was being read).
    #[error("{reason}; deliver the file again")]
    Read {
        /// Where reading stopped and why.
        reason: String,
    },
    /// The CSV structure is broken beyond one row.
    #[error("line {line}: {reason}")]
    Malformed {
        /// The line where the problem starts.
        line: u64,
        /// What is wrong and what to do.
        reason: String,
    },
}

/// Reads one delivered file: `layout` says where the fields are, `rules`
/// gives each series' checks (called once per series met), `today` dates
/// the check for future dates.
///
/// Never panics, whatever the bytes.
pub fn parse_file(
    bytes: &[u8],
    layout: &Layout,
    rules: &dyn Fn(&SeriesId) -> SeriesRules,
    today: Today,
) -> Result<ParsedFile, FileError> {
    let mut stream = RecordStream::new(bytes, layout, rules, today)?;
    let mut out = ParsedFile {
        records: Vec::with_capacity(stream.rows_expected),
        errors: Vec::new(),
        unit_column: stream.unit_column(),
    };
    while let Some(mut chunk) = stream.next_chunk(usize::MAX)? {
        out.records.append(&mut chunk.records);
        out.errors.append(&mut chunk.errors);
    }
    Ok(out)
}

/// A file read in chunks of rows, for files too large to hold as records
/// all at once (a record costs several times its line in memory). The
/// chunks together are exactly what [`parse_file`] gives, in order: the
/// same records, the same errors, duplicates found across chunks.
///
/// [`RecordStream::from_reader`] reads the file itself piece by piece, so
/// that not even its bytes are held whole: memory stays at a few pieces
/// (and the longest row), whatever the file's size.
pub struct RecordStream<'a> {
    source: Source<'a>,
    checker: Checker<'a>,
    /// Lines in the file, capped: what to reserve for records.
    rows_expected: usize,
}

/// Where a [`RecordStream`]'s rows come from.
enum Source<'a> {
    /// The whole text, in memory.
    Whole(Rows<'a>),
    /// A reader, in pieces.
    Pieces(Pieces<'a>),
}

impl std::fmt::Debug for RecordStream<'_> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("RecordStream").finish_non_exhaustive()
    }
}

impl<'a> RecordStream<'a> {
    /// Checks the text and resolves the header; a whole-file problem found
    /// here (not text, no header, missing columns) is the error.
    pub fn new(
        bytes: &'a [u8],
        layout: &Layout,
        rules: &'a dyn Fn(&SeriesId) -> SeriesRules,
        today: Today,
    ) -> Result<Self, FileError> {
        let text = check_text(bytes)?;
        let mut rows = Rows::new(text, layout.delimiter);
        let (header_line, names) = loop {
            match rows.next_row()? {
                None => return Err(FileError::NoHeader),
                Some(row) if is_blank(&row) => continue,
                Some(row) => break (row.line, header_names(&row)),
            }
        };
        // One row per line is an upper bound; reserving it saves regrowing.
        // Capped, so that a file of empty lines cannot reserve gigabytes.
        let rows_expected = text.bytes().filter(|&b| b == b'\n').count().min(1 << 16);
        Ok(RecordStream {
            source: Source::Whole(rows),
            checker: Checker::new(layout, names, header_line, rules, today, rows_expected)?,
            rows_expected,
        })
    }

    /// As [`RecordStream::new`] for a file read from `reader` in pieces of
    /// about `piece_bytes` (a row longer than that is read whole), `size`
    /// bytes long as far as is known (only a hint for reserving memory).
    /// A whole-file problem further down the file (binary content, invalid
    /// UTF-8, a quote never closed, a read error) is an error at the chunk
    /// that reaches it; a NUL byte anywhere is found before an invalid
    /// UTF-8 sequence, as [`parse_file`] finds it.
    pub fn from_reader(
        reader: &'a mut dyn Read,
        piece_bytes: usize,
        size: u64,
        layout: &Layout,
        rules: &'a dyn Fn(&SeriesId) -> SeriesRules,
        today: Today,
    ) -> Result<Self, FileError> {
        let mut pieces = Pieces::start(reader, piece_bytes.max(1), layout.delimiter)?;
        let mut header = None;
        pieces.rows(&mut |row| {
            if is_blank(row) {
                return true;
            }
            header = Some((row.line, header_names(row)));
            false
        })?;
        let Some((header_line, names)) = header else {
            return Err(FileError::NoHeader);
        };
        let rows_expected = usize::try_from(size / 16)
            .unwrap_or(usize::MAX)
            .min(1 << 16);
        // Bytes that are not text refuse the file before its header does,
        // wherever they are (as when the file is read whole).
        let checker = match Checker::new(layout, names, header_line, rules, today, rows_expected) {
            Ok(checker) => checker,
            Err(e) => return Err(pieces.rest_not_text().unwrap_or(e)),
        };
        Ok(RecordStream {
            source: Source::Pieces(pieces),
            checker,
            rows_expected,
        })
    }

    /// The unit column's 1-based position and name, when the header has one.
    pub fn unit_column(&self) -> Option<(usize, String)> {
        let cols = &self.checker.cols;
        cols.unit.map(|c| (c + 1, cols.label(c)))
    }

    /// The next rows, at most `max_rows` of them (records and refused rows
    /// together; blank rows do not count); `None` once the file is done. A
    /// structural break further down the file (an unbalanced quote) is an
    /// error at the chunk that reaches it.
    pub fn next_chunk(&mut self, max_rows: usize) -> Result<Option<ParsedFile>, FileError> {
        let mut out = ParsedFile {
            records: Vec::with_capacity(max_rows.min(self.rows_expected)),
            errors: Vec::new(),
            unit_column: self.unit_column(),
        };
        let mut taken = 0usize;
        let checker = &mut self.checker;
        let mut each = |row: &Row<'_>| {
            if is_blank(row) {
                return true;
            }
            taken += 1;
            match checker.check(row) {
                Ok(record) => out.records.push(record),
                Err(fault) => out.errors.push(checker.error(row, fault)),
            }
            taken < max_rows
        };
        match &mut self.source {
            Source::Whole(rows) => {
                if max_rows > 0 {
                    while let Some(row) = rows.next_row()? {
                        if !each(&row) {
                            break;
                        }
                    }
                }
            }
            Source::Pieces(pieces) => {
                if max_rows > 0 {
                    pieces.rows(&mut each)?;
                }
            }
        }
        Ok((taken > 0).then_some(out))
    }
}

/// A header row's names, trimmed.
fn header_names(row: &Row<'_>) -> Vec<String> {
    row.fields.iter().map(|f| f.trim().to_string()).collect()
}

/// A file read from a reader piece by piece: `buf` holds the bytes from
/// file offset `offset` on, of which those before `pos` are done with.
/// Each piece given to [`Rows`] starts where a row starts and ends just
/// after a line break (or at the end of the file); a row that reaches the
/// end of a piece is read again at the start of the next one, with more
/// bytes behind it.
struct Pieces<'a> {
    reader: &'a mut dyn Read,
    delimiter: u8,
    piece_bytes: usize,
    buf: Vec<u8>,
    pos: usize,
    /// File offset of `buf[0]`.
    offset: u64,
    /// Line breaks before `buf[pos]`.
    breaks: u64,
    /// The reader has no more bytes.
    eof: bool,
    /// The rows are done.
    done: bool,
    /// Where the text starts: after the file's byte-order mark, if any.
    text_start: u64,
}

impl<'a> Pieces<'a> {
    /// Reads the first piece and checks how the file starts (a UTF-16
    /// byte-order mark refuses it; a UTF-8 one is skipped).
    fn start(
        reader: &'a mut dyn Read,
        piece_bytes: usize,
        delimiter: u8,
    ) -> Result<Self, FileError> {
        let mut p = Pieces {
            reader,
            delimiter,
            piece_bytes,
            buf: Vec::new(),
            pos: 0,
            offset: 0,
            breaks: 0,
            eof: false,
            done: false,
            text_start: 0,
        };
        // Enough bytes to see any byte-order mark; the rest is checked
        // piece by piece as it comes.
        p.fill(BOM.len())?;
        if let Some(e) = utf16_marked(&p.buf) {
            return Err(e);
        }
        if p.buf.starts_with(BOM) {
            p.pos = BOM.len();
            p.text_start = BOM.len() as u64;
        }
        Ok(p)
    }

    /// Reads until at least `want` bytes lie after `pos`, or the end.
    fn fill(&mut self, want: usize) -> Result<(), FileError> {
        if self.pos >= self.piece_bytes || (self.pos > 0 && self.pos == self.buf.len()) {
            self.offset += self.pos as u64;
            self.buf.drain(..self.pos);
            self.pos = 0;
        }
        while !self.eof && self.buf.len() - self.pos < want {
            let need = (want - (self.buf.len() - self.pos)).max(self.piece_bytes);
            match (&mut *self.reader)
                .take(need as u64)
                .read_to_end(&mut self.buf)
            {
                Ok(0) => self.eof = true,
                Ok(_) => {}
                Err(e) => {
                    self.done = true;
                    return Err(FileError::Read {
                        reason: format!(
                            "reading the file stopped after byte offset {}: {e}",
                            self.offset + self.buf.len() as u64
                        ),
                    });
                }
            }
        }
        Ok(())
    }

    /// The end of the next piece (`pos` + the result): after its last line
    /// break (not after a CR that may be half of a CRLF still to come), or
    /// the end of the file; 0 when more bytes are needed for one.
    fn piece_end(&self) -> usize {
        let rest = self.buf.get(self.pos..).unwrap_or_default();
        if self.eof {
            return rest.len();
        }
        let known = rest.len() - usize::from(rest.last() == Some(&b'\r'));
        rest.get(..known)
            .unwrap_or_default()
            .iter()
            .rposition(|&b| b == b'\n' || b == b'\r')
            .map_or(0, |i| i + 1)
    }

    /// Reads until a piece lies after `pos`, starting with `want` bytes and
    /// reading more while no line break ends one; returns its end (from
    /// `pos`). At the end of the file the piece is the rest.
    fn next_piece(&mut self, mut want: usize) -> Result<usize, FileError> {
        loop {
            self.fill(want)?;
            let end = self.piece_end();
            if self.eof || end > 0 {
                return Ok(end);
            }
            want = more_than(self.buf.len() - self.pos, self.piece_bytes);
        }
    }

    /// Reads the rest of the file for bytes that are not text: the error
    /// they make, if any.
    fn rest_not_text(&mut self) -> Option<FileError> {
        loop {
            let end = match self.next_piece(self.piece_bytes) {
                Ok(end) => end,
                Err(e) => return Some(e),
            };
            let bytes = self.buf.get(self.pos..self.pos + end).unwrap_or_default();
            if let Err(at) = Self::check_piece(bytes) {
                return Some(self.not_text(end, at));
            }
            self.breaks += count_breaks(bytes);
            self.pos += end;
            if self.eof && self.pos == self.buf.len() {
                self.done = true;
                return None;
            }
        }
    }

    /// Calls `each` on the rows from where the last call stopped, until it
    /// returns false (after taking that row) or the rows are done.
    fn rows(&mut self, each: &mut dyn FnMut(&Row<'_>) -> bool) -> Result<(), FileError> {
        let mut want = self.piece_bytes;
        while !self.done {
            let end = self.next_piece(want)?;
            let last = self.eof;
            let bytes = self.buf.get(self.pos..self.pos + end).unwrap_or_default();
            let text = match Self::check_piece(bytes) {
                Ok(text) => text,
                Err(at_utf8) => return Err(self.not_text(end, at_utf8)),
            };
            // A csv reader drops a byte-order mark that starts its input:
            // right at the file's start, as when the file is read whole,
            // but a row further on that starts with one (a stray mark) is
            // given the line break before it, so that it is read as is.
            let marked;
            let (text, shift) = if self.offset + self.pos as u64 > self.text_start
                && text.starts_with('\u{feff}')
            {
                marked = format!("\n{text}");
                (marked.as_str(), 1)
            } else {
                (text, 0)
            };
            let mut rows = Rows::window(
                text,
                self.delimiter,
                self.breaks.saturating_sub(shift as u64),
                last,
            );
            let mut go_on = true;
            while go_on {
                match rows.next_row()? {
                    Some(row) => go_on = each(&row),
                    None => break,
                }
            }
            let (at, breaks) = rows.resume();
            let at = at.saturating_sub(shift);
            self.pos += at;
            self.breaks = breaks;
            if last && go_on {
                self.done = true;
            }
            if !go_on {
                return Ok(());
            }
            // Nothing read from this piece: its first row needs more bytes.
            want = if at == 0 {
                more_than(self.buf.len() - self.pos, self.piece_bytes)
            } else {
                self.piece_bytes
            };
        }
        Ok(())
    }

    /// The piece as text, or the offset in it of a NUL byte (the first, if
    /// any) or else of its first invalid UTF-8 byte.
    fn check_piece(bytes: &[u8]) -> Result<&str, usize> {
        if let Some(at) = bytes.iter().position(|&b| b == 0) {
            return Err(at);
        }
        std::str::from_utf8(bytes).map_err(|e| e.valid_up_to())
    }

    /// The whole-file error for the piece of `end` bytes from `pos` that is
    /// not text at `at`: a NUL byte there, or one anywhere further on (the
    /// rest of the file is read to know), else the invalid UTF-8 at `at`.
    fn not_text(&mut self, end: usize, at: usize) -> FileError {
        self.done = true;
        let piece = self.buf.get(self.pos..self.pos + end).unwrap_or_default();
        let before = |n: usize| count_breaks(piece.get(..n).unwrap_or_default());
        let at_file = self.offset + (self.pos + at) as u64;
        if piece.get(at) == Some(&0) {
            return nul_error(at_file, self.breaks + before(at) + 1);
        }
        let utf8_line = self.breaks + before(at) + 1;
        let mut breaks = self.breaks + before(end);
        let mut from = self.pos + end;
        loop {
            let rest = self.buf.get(from..).unwrap_or_default();
            if let Some(i) = rest.iter().position(|&b| b == 0) {
                breaks += count_breaks(rest.get(..i).unwrap_or_default());
                return nul_error(self.offset + (from + i) as u64, breaks + 1);
            }
            // A CR at the end waits for the next byte (it may be a CRLF).
            let keep = usize::from(!self.eof && rest.last() == Some(&b'\r'));
            breaks += count_breaks(rest.get(..rest.len() - keep).unwrap_or_default());
            from += rest.len() - keep;
            if self.eof {
                break;
            }
            // What is scanned is let go of, so memory stays at a piece.
            self.offset += from as u64;
            self.buf.drain(..from);
            self.pos = 0;
            from = 0;
            if let Err(e) = self.fill(self.buf.len() + self.piece_bytes) {
                return e;
            }
        }
        utf8_error(at_file, utf8_line)
    }
}

/// What to read up to when the `held` bytes are not enough for a row:
/// twice as much, and at least a piece more.
fn more_than(held: usize, piece_bytes: usize) -> usize {
    held.saturating_mul(2).max(held.saturating_add(piece_bytes))
}

fn nul_error(at: u64, line: u64) -> FileError {
    FileError::NotText {
        reason: format!(
            "a NUL byte at byte offset {at} (line {line}) shows binary content (a spreadsheet workbook, an archive, a damaged transfer); export the data as CSV in UTF-8"
        ),
    }
}

fn utf8_error(at: u64, line: u64) -> FileError {
    FileError::NotText {
        reason: format!(
            "invalid UTF-8 at byte offset {at} (line {line}); the file may be in Latin-1 or Windows-1252: save it as UTF-8"
        ),
    }
}

const BOM: &[u8] = b"\xEF\xBB\xBF";

/// The error for a file that starts with a UTF-16 byte-order mark.
fn utf16_marked(bytes: &[u8]) -> Option<FileError> {
    (bytes.starts_with(b"\xFF\xFE") || bytes.starts_with(b"\xFE\xFF")).then(|| FileError::NotText {
        reason: "it starts with a UTF-16 byte-order mark; export or save it as UTF-8".into(),
    })
}

/// The file's text without its BOM, or why it is not text.
fn check_text(bytes: &[u8]) -> Result<&str, FileError> {
    if let Some(e) = utf16_marked(bytes) {
        return Err(e);
    }
    if let Some(at) = bytes.iter().position(|&b| b == 0) {
        let line = 1 + count_breaks(bytes.get(..at).unwrap_or_default());
        return Err(nul_error(at as u64, line));
    }
    let body = bytes.strip_prefix(BOM).unwrap_or(bytes);
    std::str::from_utf8(body).map_err(|e| {
        let at = e.valid_up_to();
        let line = 1 + count_breaks(body.get(..at).unwrap_or_default());
        utf8_error((at + (bytes.len() - body.len())) as u64, line)
    })
}

/// A header's names for a message: at most 12, each cut at 40 characters,
/// with the count of the rest (a 10 MB header must not become a 10 MB
/// reason, log line and finding).
/// The delimiter, other than the layout's, under which the header would
/// name every missing column: a semicolon-separated export (usual where a
/// decimal comma is written) read with the canonical comma, say.
fn other_delimiter(names: &[String], layout: &Layout, missing: &[String]) -> Option<u8> {
    let header = names.join(std::str::from_utf8(&[layout.delimiter]).unwrap_or(","));
    [b';', b'\t', b',']
        .into_iter()
        .filter(|&d| d != layout.delimiter)
        .find(|&d| {
            let split: Vec<&str> = header.split(char::from(d)).map(str::trim).collect();
            missing.iter().all(|m| split.iter().any(|n| n == m))
        })
}

/// What to write in the configuration for a file separated by `delimiter`.
fn delimiter_advice(delimiter: u8) -> String {
    let (shown, key) = match delimiter {
        b';' => ("semicolons", "\";\""),
        b'\t' => ("tabs", "\"tab\""),
        _ => ("commas", "\",\""),
    };
    let comma = if delimiter == b',' {
        ""
    } else {
        ", and decimal_comma = true if numbers are written like 0,5"
    };
    format!(
        "the header is separated by {shown}: add a [[feed]] for these files in the config with files = a pattern matching their names and delimiter = {key}{comma}"
    )
}

fn header_names_for_people(found: &[String]) -> String {
    const NAMES: usize = 12;
    const CHARS: usize = 40;
    let mut shown: Vec<String> = found
        .iter()
        .take(NAMES)
        .map(|n| {
            if n.chars().count() > CHARS {
                let cut: String = n.chars().take(CHARS - 1).collect();
                format!("{cut}…")
            } else {
                n.clone()
            }
        })
        .collect();
    if found.len() > NAMES {
        shown.push(format!("and {} more", found.len() - NAMES));
    }
    shown.join(", ")
}

/// A row of nothing but white space, or stray byte-order marks (U+FEFF,
/// which some tools write once per exported chunk), is skipped.
fn is_blank(row: &Row<'_>) -> bool {
    row.fields.iter().all(|f| {
        f.trim_matches(|c: char| c.is_whitespace() || c == '\u{feff}')
            .is_empty()
    })
}

/// Where each field is, resolved once from the header (0-based indices).
struct Columns {
    names: Vec<String>,
    record_id: usize,
    series: SeriesColumns,
    x: usize,
    x_date: Option<DateFormat>,
    y: usize,
    unit: Option<usize>,
    sampled_at: Option<usize>,
    note: Option<usize>,
    detection_limit: Option<usize>,
    qualifier: Option<usize>,
    /// (index, name, keep when empty).
    attributes: Vec<(usize, String, bool)>,
}

enum SeriesColumns {
    Column(usize),
    Template { pieces: Vec<Piece>, text: String },
}

enum Piece {
    Text(String),
    Column(usize),
}

impl Columns {
    fn resolve(names: Vec<String>, layout: &Layout, header_line: u64) -> Result<Self, FileError> {
        let mut missing: Vec<String> = Vec::new();
        let find = |name: &str| -> Result<Option<usize>, FileError> {
            let mut hits = names.iter().enumerate().filter(|(_, n)| *n == name);
            match (hits.next(), hits.next()) {
                (None, _) => Ok(None),
                (Some((i, _)), None) => Ok(Some(i)),
                (Some((i, _)), Some((j, _))) => Err(FileError::Malformed {
                    line: header_line,
                    reason: format!(
                        "column `{name}` appears twice in the header (columns {} and {}); rename one of them",
                        i + 1,
                        j + 1
                    ),
                }),
            }
        };
        let mut required = |name: &str| -> Result<usize, FileError> {
            match find(name)? {
                Some(i) => Ok(i),
                None => {
                    if !missing.iter().any(|m| m == name) {
                        missing.push(name.to_string());
                    }
                    Ok(0)
                }
            }
        };
        let record_id = required(&layout.record_id)?;
        let series = match &layout.series {
            SeriesKey::Column(name) => SeriesColumns::Column(required(name)?),
            SeriesKey::Template(text) => {
                let mut pieces = Vec::new();
                for piece in template_pieces(text) {
                    pieces.push(match piece {
                        TemplatePiece::Text(t) => Piece::Text(t.to_string()),
                        TemplatePiece::Field(name) => Piece::Column(required(name)?),
                    });
                }
                SeriesColumns::Template {
                    pieces,
                    text: text.clone(),
                }
            }
        };
        let (x, x_date) = match &layout.x {
            XSource::Column(name) => (required(name)?, None),
            XSource::Date { column, format } => (required(column)?, Some(*format)),
        };
        let y = required(&layout.y)?;
        if !missing.is_empty() {
            let delimiter = other_delimiter(&names, layout, &missing);
            return Err(FileError::MissingColumns {
                missing,
                found: names,
                delimiter,
            });
        }
        let optional = |name: &Option<String>| -> Result<Option<usize>, FileError> {
            match name {
                Some(name) => find(name),
                None => Ok(None),
            }
        };
        let unit = optional(&layout.unit)?;
        let sampled_at = optional(&layout.sampled_at)?;
        let note = optional(&layout.note)?;
        let detection_limit = optional(&layout.detection_limit)?;
        let qualifier = optional(&layout.qualifier)?;

        let mut mapped = vec![record_id, x, y];
        mapped.extend([unit, sampled_at, note].into_iter().flatten());
        match &series {
            SeriesColumns::Column(i) => mapped.push(*i),
            SeriesColumns::Template { pieces, .. } => {
                mapped.extend(pieces.iter().filter_map(|p| match p {
                    Piece::Column(i) => Some(*i),
                    Piece::Text(_) => None,
                }));
            }
        }
        let attributes = names
            .iter()
            .enumerate()
            .filter(|(i, _)| !mapped.contains(i))
            .map(|(i, name)| {
                if name.is_empty() {
                    (i, format!("column {}", i + 1), false)
                } else {
                    (i, name.clone(), true)
                }
            })
            .collect();
        Ok(Columns {
            names,
            record_id,
            series,
            x,
            x_date,
            y,
            unit,
            sampled_at,
            note,
            detection_limit,
            qualifier,
            attributes,
        })
    }

    /// The column's name for messages.
    fn label(&self, i: usize) -> String {
        match self.names.get(i) {
            Some(name) if !name.is_empty() => name.clone(),
            _ => format!("column {}", i + 1),
        }
    }
}

enum TemplatePiece<'a> {
    Text(&'a str),
    Field(&'a str),
}

/// `{site}/{analyte}` -> [Field(site), Text(/), Field(analyte)]. A `{`
/// with no `}` after it, or `{}`, is text.
fn template_pieces(template: &str) -> Vec<TemplatePiece<'_>> {
    let mut pieces = Vec::new();
    let mut rest = template;
    while let Some(open) = rest.find('{') {
        let (before, from_brace) = rest.split_at(open);
        let after = from_brace.get(1..).unwrap_or_default();
        let name = after
            .find('}')
            .and_then(|close| after.get(..close))
            .filter(|name| !name.is_empty() && !name.contains('{'));
        if !before.is_empty() {
            pieces.push(TemplatePiece::Text(before));
        }
        match name {
            Some(name) => {
                pieces.push(TemplatePiece::Field(name));
                rest = after.get(name.len() + 1..).unwrap_or_default();
            }
            None => {
                pieces.push(TemplatePiece::Text("{"));
                rest = after;
            }
        }
    }
    if !rest.is_empty() {
        pieces.push(TemplatePiece::Text(rest));
    }
    pieces
}

/// A refused row: the column at fault (0-based) and the reason.
struct Fault {
    column: Option<usize>,
    reason: String,
}

impl Fault {
    fn at(column: usize, reason: String) -> Self {
        Fault {
            column: Some(column),
            reason,
        }
    }
}

/// Checks rows against the columns and the series' rules, remembering the
/// ids seen and the rules asked for.
struct Checker<'l> {
    cols: Columns,
    delimiter: u8,
    decimal_comma: bool,
    rules: &'l dyn Fn(&SeriesId) -> SeriesRules,
    today: Today,
    last_allowed_day: i64,
    seen: SeenIds,
    series_rules: RulesCache,
}

impl<'l> Checker<'l> {
    fn new(
        layout: &Layout,
        names: Vec<String>,
        header_line: u64,
        rules: &'l dyn Fn(&SeriesId) -> SeriesRules,
        today: Today,
        rows_expected: usize,
    ) -> Result<Self, FileError> {
        Ok(Checker {
            cols: Columns::resolve(names, layout, header_line)?,
            delimiter: layout.delimiter,
            decimal_comma: layout.decimal_comma,
            rules,
            today,
            last_allowed_day: dates::last_allowed_day(today),
            seen: SeenIds::with_capacity(rows_expected),
            series_rules: RulesCache::default(),
        })
    }

    fn check(&mut self, row: &Row<'_>) -> Result<Record, Fault> {
        let c = &self.cols;
        let fields = row.fields;
        if fields.len() != c.names.len() {
            return Err(Fault {
                column: None,
                reason: format!(
                    "ragged row: {} {}, header has {}; check for a stray delimiter or an unbalanced quote",
                    fields.len(),
                    if fields.len() == 1 { "field" } else { "fields" },
                    c.names.len()
                ),
            });
        }
        let raw = row.raw.as_bytes();
        if (raw.contains(&b'\n') || raw.contains(&b'\r'))
            && let Some(fault) = swallowed_rows(fields, self.delimiter, c)
        {
            return Err(fault);
        }
        let cell = |i: usize| fields.get(i).unwrap_or_default().trim();
        let example = if self.decimal_comma { "0,5" } else { "0.5" };

        let id = cell(c.record_id);
        if id.is_empty() {
            return Err(Fault::at(
                c.record_id,
                format!(
                    "{} is empty; give the row an id, unique in the file",
                    c.label(c.record_id)
                ),
            ));
        }
        if let Some(first) = self.seen.first_line(id, row.line) {
            return Err(Fault::at(
                c.record_id,
                format!(
                    "{} {} appears twice in this file (first on line {first}); give each record its own id, or remove the repeated row",
                    c.label(c.record_id),
                    show(id)
                ),
            ));
        }

        let series = match &c.series {
            SeriesColumns::Column(i) => {
                let key = cell(*i);
                if key.is_empty() {
                    return Err(Fault::at(
                        *i,
                        format!(
                            "{} is empty; fill in the series the record belongs to",
                            c.label(*i)
                        ),
                    ));
                }
                key.to_string()
            }
            SeriesColumns::Template { pieces, text } => {
                let mut key = String::new();
                for piece in pieces {
                    match piece {
                        Piece::Text(t) => key.push_str(t),
                        Piece::Column(i) => {
                            let value = cell(*i);
                            if value.is_empty() {
                                return Err(Fault::at(
                                    *i,
                                    format!(
                                        "{} is empty; the series key {text} needs it: fill it in",
                                        c.label(*i)
                                    ),
                                ));
                            }
                            key.push_str(value);
                        }
                    }
                }
                key
            }
        };
        let rules = self.series_rules.get(&series, self.rules);

        let x_text = cell(c.x);
        let x = match c.x_date {
            None => numbers::parse_number(x_text, self.decimal_comma).map_err(|p| {
                Fault::at(c.x, p.reason(&c.label(c.x), &show(x_text), "the x value"))
            })?,
            Some(format) => self.date(c.x, x_text, format)?.decimal_year(),
        };
        if let Some((low, high)) = rules.x_range
            && !(low <= x && x <= high)
        {
            let as_year = if c.x_date.is_some() {
                format!(" (decimal year {x:.3})")
            } else {
                String::new()
            };
            return Err(Fault::at(
                c.x,
                format!(
                    "{} {}{as_year} is outside the plausible range {low}..{high} set for series {series}; check for a typo or widen the range in the config",
                    c.label(c.x),
                    show(x_text)
                ),
            ));
        }

        let y_text = cell(c.y);
        let qualifier = c.qualifier.map(cell).unwrap_or_default();
        let qualified_nd = numbers::is_non_detect_qualifier(qualifier);
        let written = if y_text.is_empty() && qualified_nd {
            Written::NotDetected
        } else {
            numbers::parse_measure(y_text, self.decimal_comma).map_err(|p| match p {
                MeasureProblem::Number(p) => Fault::at(
                    c.y,
                    p.reason(&c.label(c.y), &show(y_text), "the measured value"),
                ),
                MeasureProblem::BadLimit(_) => Fault::at(
                    c.y,
                    format!(
                        "{} = {}: after `<` write the detection limit as a number, e.g. <{example}",
                        c.label(c.y),
                        show(y_text)
                    ),
                ),
            })?
        };
        let (y, y_column) = match written {
            Written::Value(v) if qualified_nd => (Measure::NonDetect { limit: v }, c.y),
            Written::Value(v) => (Measure::Detected(v), c.y),
            Written::LessThan(limit) | Written::Qualified(limit) => {
                (Measure::NonDetect { limit }, c.y)
            }
            Written::NotDetected => {
                let Some(i) = c.detection_limit.filter(|&i| !cell(i).is_empty()) else {
                    let what = if y_text.is_empty() {
                        format!(
                            "{} is empty and the qualifier is {}",
                            c.label(c.y),
                            show(qualifier)
                        )
                    } else {
                        format!("{} = {}", c.label(c.y), show(y_text))
                    };
                    return Err(Fault::at(
                        c.y,
                        format!(
                            "{what}: ND without a detection limit; add the limit column to the feed, or write `<` and the limit, e.g. <{example}"
                        ),
                    ));
                };
                let limit = numbers::parse_number(cell(i), self.decimal_comma).map_err(|p| {
                    Fault::at(
                        i,
                        p.reason(&c.label(i), &show(cell(i)), "the detection limit"),
                    )
                })?;
                (Measure::NonDetect { limit }, i)
            }
        };
        match y {
            Measure::Detected(v) if v < 0.0 && !rules.allow_negative => {
                let positive = y_text.strip_prefix('-').unwrap_or(y_text);
                return Err(Fault::at(
                    c.y,
                    format!(
                        "negative concentration {y_text}; some exports write <{positive} as {y_text}: write it as <{positive} if it is a non-detect (or set allow_negative for series {series} if negative values are real)"
                    ),
                ));
            }
            Measure::NonDetect { limit } if limit <= 0.0 => {
                return Err(Fault::at(
                    y_column,
                    format!(
                        "{} = {}: a non-detect's limit must be greater than 0; write the reporting limit, e.g. <{example}",
                        c.label(y_column),
                        show(cell(y_column))
                    ),
                ));
            }
            _ => {}
        }

        let unit_as_written = c.unit.map(cell).filter(|u| !u.is_empty());
        let (y, unit) = match (&rules.unit, unit_as_written, c.unit) {
            (Some(target), Some(written), Some(unit_column)) => {
                let y = units::convert_measure(y, written, target, rules.matrix)
                    .map_err(|reason| Fault::at(unit_column, reason))?;
                (y, Some(target.clone()))
            }
            (Some(target), _, _) => (y, Some(target.clone())),
            (None, written, _) => (y, written.map(str::to_string)),
        };

        let mut sampled_at = None;
        if let Some(i) = c.sampled_at {
            let text = cell(i);
            if !text.is_empty() {
                if c.x_date.is_none() || i != c.x {
                    match dates::parse_date(text, DateFormat::Iso) {
                        Ok(date) => self.not_in_future(i, text, &date, DateFormat::Iso)?,
                        Err(DateProblem::Impossible(why)) => {
                            return Err(Fault::at(
                                i,
                                format!(
                                    "{} {} is not a real date ({why}); check for a typo",
                                    c.label(i),
                                    show(text)
                                ),
                            ));
                        }
                        Err(DateProblem::Shape) => {}
                    }
                }
                sampled_at = Some(text.to_string());
            }
        }
        if sampled_at.is_none() && c.x_date.is_some() {
            sampled_at = Some(x_text.to_string());
        }

        let note = c
            .note
            .map(cell)
            .filter(|n| !n.is_empty())
            .map(str::to_string);
        let attributes = c
            .attributes
            .iter()
            .filter_map(|(i, name, keep_empty)| {
                let value = cell(*i);
                (*keep_empty || !value.is_empty()).then(|| (name.clone(), value.to_string()))
            })
            .collect();
        Ok(Record {
            record_id: id.to_string(),
            series: SeriesId(series),
            x,
            y,
            unit,
            unit_as_written: unit_as_written.map(str::to_string),
            sampled_at,
            note,
            attributes,
            line: row.line,
            raw: row.raw.to_string(),
        })
    }

    /// Reads a date cell of the x column.
    fn date(&self, column: usize, text: &str, format: DateFormat) -> Result<DateTime, Fault> {
        let c = &self.cols;
        let written_as = match format {
            DateFormat::Iso => "YYYY-MM-DD",
            DateFormat::DayMonthYear => "DD.MM.YYYY or DD/MM/YYYY",
            DateFormat::MonthDayYear => "MM/DD/YYYY",
        };
        let date = dates::parse_date(text, format).map_err(|problem| {
            let reason = match problem {
                _ if text.is_empty() => format!(
                    "{} is empty; fill in the sampling date or remove the row",
                    c.label(column)
                ),
                DateProblem::Shape => format!(
                    "{} = {} is not a date written {written_as} (optionally with a time HH:MM[:SS]), as set for this feed",
                    c.label(column),
                    show(text)
                ),
                DateProblem::Impossible(why) => format!(
                    "{} {} is not a real date ({why}; this feed's dates are {written_as}); check for a typo",
                    c.label(column),
                    show(text)
                ),
            };
            Fault::at(column, reason)
        })?;
        self.not_in_future(column, text, &date, format)?;
        Ok(date)
    }

    fn not_in_future(
        &self,
        column: usize,
        text: &str,
        date: &DateTime,
        format: DateFormat,
    ) -> Result<(), Fault> {
        if date.day_number() <= self.last_allowed_day {
            return Ok(());
        }
        let t = self.today;
        let order = if format == DateFormat::Iso {
            ""
        } else {
            ", and the order of day and month"
        };
        Err(Fault::at(
            column,
            format!(
                "{} {} is in the future (today is {:04}-{:02}-{:02}); check the year{order}",
                self.cols.label(column),
                show(text),
                t.year,
                t.month,
                t.day
            ),
        ))
    }

    fn error(&self, row: &Row<'_>, fault: Fault) -> RecordError {
        let record_id = row
            .fields
            .get(self.cols.record_id)
            .map(str::trim)
            .filter(|id| !id.is_empty())
            .map(str::to_string);
        RecordError {
            line: row.line,
            column: fault.column.map(|c| c + 1),
            field: fault.column.map(|c| self.cols.label(c)),
            record_id,
            reason: fault.reason,
            raw: row.raw.to_string(),
        }
    }
}

/// A quoted field holding lines that look like whole rows (as many
/// delimiters as the header) is most likely a stray or missing quote that
/// swallowed the rows after it; refuse the row rather than store the rows
/// as a note. One-column and two-column files are not checked.
fn swallowed_rows(fields: &csv::StringRecord, delimiter: u8, c: &Columns) -> Option<Fault> {
    let width = c.names.len();
    if width < 3 {
        return None;
    }
    fields.iter().enumerate().find_map(|(i, field)| {
        let rows = field
            .split(['\n', '\r'])
            .skip(1)
            .filter(|line| line.bytes().filter(|&b| b == delimiter).count() + 1 >= width)
            .count();
        (rows > 0).then(|| {
            Fault::at(
                i,
                format!(
                    "{} holds {rows} line(s) that look like whole rows of this file; a quote is probably missing or stray: check the quotes in this row",
                    c.label(i)
                ),
            )
        })
    })
}

/// The record ids met so far in the file, to find a repeated one.
///
/// The ids are kept end to end in one string, each ended by a NUL (which
/// checked text never contains), and found by their keyed (SipHash) hash,
/// so a row costs no allocation here. Two different ids with the same
/// 64-bit hash are told apart by comparing the text. An entry is 16 bytes
/// (hash, and where the id starts and its line, as u32): a file of 1.7
/// million records kept 70 MB of entries at 32 bytes each. Positions past
/// u32 (a file beyond 4 GiB) go to `wide`.
pub(super) struct SeenIds {
    text: String,
    pub(super) hasher: RandomState,
    /// hash -> (start in `text`, line).
    pub(super) first: HashMap<u64, (u32, u32), BuildHasherDefault<AlreadyHashed>>,
    /// Entries whose start or line does not fit in u32.
    wide: HashMap<u64, (usize, u64), BuildHasherDefault<AlreadyHashed>>,
    /// Ids whose hash another id already holds; practically always empty.
    collided: Vec<(usize, u64)>,
}

impl SeenIds {
    pub(super) fn with_capacity(ids: usize) -> Self {
        SeenIds {
            text: String::with_capacity(ids * 8),
            hasher: RandomState::new(),
            first: HashMap::with_capacity_and_hasher(ids, BuildHasherDefault::default()),
            wide: HashMap::default(),
            collided: Vec::new(),
        }
    }

    /// The id stored from `start` (up to its NUL).
    fn id_at(&self, start: usize) -> &str {
        let rest = self.text.get(start..).unwrap_or_default();
        rest.split('\0').next().unwrap_or_default()
    }

    /// Appends `id` and its end mark; returns where it starts.
    fn keep(&mut self, id: &str) -> usize {
        let start = self.text.len();
        self.text.push_str(id);
        self.text.push('\0');
        start
    }

    /// Notes `id` on `line`; if it was met before, the line of its first
    /// occurrence.
    pub(super) fn first_line(&mut self, id: &str, line: u64) -> Option<u64> {
        let hash = self.hasher.hash_one(id);
        let found = match (self.first.get(&hash), self.wide.get(&hash)) {
            (Some(&(start, first)), _) => Some((start as usize, u64::from(first))),
            (None, Some(&(start, first))) => Some((start, first)),
            (None, None) => None,
        };
        match found {
            None => {
                let start = self.keep(id);
                match (u32::try_from(start), u32::try_from(line)) {
                    (Ok(s), Ok(l)) => {
                        self.first.insert(hash, (s, l));
                    }
                    _ => {
                        self.wide.insert(hash, (start, line));
                    }
                }
                None
            }
            Some((start, first)) => {
                if self.id_at(start) == id {
                    return Some(first);
                }
                if let Some(&(_, first)) = self.collided.iter().find(|&&(s, _)| self.id_at(s) == id)
                {
                    return Some(first);
                }
                let start = self.keep(id);
                self.collided.push((start, line));
                None
            }
        }
    }
}

/// A hasher for keys that are already hashes.
#[derive(Default)]
pub(super) struct AlreadyHashed(u64);

impl Hasher for AlreadyHashed {
    fn finish(&self) -> u64 {
        self.0
    }

    fn write(&mut self, bytes: &[u8]) {
        // Only u64 keys are hashed here; this is for completeness.
        for &b in bytes {
            self.0 = self.0.rotate_left(8) ^ u64::from(b);
        }
    }

    fn write_u64(&mut self, value: u64) {
        self.0 = value;
    }
}

/// Each series' rules, asked of the caller once per file. Rows of one
/// series tend to come together, so the last one is checked first.
#[derive(Default)]
struct RulesCache {
    last_key: String,
    last: Option<Rc<SeriesRules>>,
    all: HashMap<String, Rc<SeriesRules>>,
}

impl RulesCache {
    fn get(&mut self, series: &str, rules: &dyn Fn(&SeriesId) -> SeriesRules) -> Rc<SeriesRules> {
        if let Some(last) = &self.last
            && self.last_key == series
        {
            return Rc::clone(last);
        }
        let found = match self.all.get(series) {
            Some(found) => Rc::clone(found),
            None => {
                let found = Rc::new(rules(&SeriesId(series.to_string())));
                self.all.insert(series.to_string(), Rc::clone(&found));
                found
            }
        };
        self.last_key.clear();
        self.last_key.push_str(series);
        self.last = Some(Rc::clone(&found));
        found
    }
}

/// A cell for a message: control characters shown as `?`, cut at 40
/// characters.
fn show(text: &str) -> String {
    const MAX: usize = 40;
    let mut out: String = text
        .chars()
        .take(MAX)
        .map(|c| if c.is_control() { '?' } else { c })
        .collect();
    if text.chars().nth(MAX).is_some() {
        out.push('…');
    }
    out
}
