//! Reading two numeric columns (x and y) from a CSV file for ad-hoc fits.
//!
//! Tolerant of what spreadsheets write (a UTF-8 byte-order mark, CRLF line
//! ends, quoted fields, extra columns), strict about values: every cell used
//! must be a finite number, and every problem names the line, the column and
//! what to do about it.

use std::fmt;
use std::path::{Path, PathBuf};

use thiserror::Error;

/// The x and y columns of a table, with the line each point came from.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Columns {
    /// x values in file order.
    pub x: Vec<f64>,
    /// y values in file order.
    pub y: Vec<f64>,
    /// 1-based line number of each point in the file.
    pub lines: Vec<u64>,
    /// 1-based column number of x.
    pub x_column: usize,
    /// 1-based column number of y.
    pub y_column: usize,
}

/// Where in a file a problem sits.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Place {
    /// The file.
    pub path: PathBuf,
    /// 1-based line.
    pub line: u64,
    /// 1-based column, when one column is at fault.
    pub column: Option<usize>,
}

impl fmt::Display for Place {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}:{}", self.path.display(), self.line)?;
        if let Some(c) = self.column {
            write!(f, ":{c}")?;
        }
        Ok(())
    }
}

/// Why a table could not be read.
#[derive(Debug, Error)]
pub enum TableError {
    /// The file could not be opened or read.
    #[error("{path}: cannot read the file: {source}", path = path.display())]
    Io {
        /// The file.
        path: PathBuf,
        /// The operating system's reason.
        source: std::io::Error,
    },
    /// The file has no header row.
    #[error("{path}: the file is empty; it needs a header row naming the columns, e.g. `x,y`", path = path.display())]
    Empty {
        /// The file.
        path: PathBuf,
    },
    /// A requested column is not in the header.
    #[error(
        "{place}: no column named `{name}` in the header (it has: {available}); name the columns with --x and --y"
    )]
    MissingColumn {
        /// The header line.
        place: Place,
        /// The column asked for.
        name: String,
        /// The header's names, comma-separated.
        available: String,
    },
    /// A row has a different number of fields from the header.
    #[error(
        "{place}: this row has {found} field(s) but the header has {expected}; check for a stray delimiter or a missing quote"
    )]
    Ragged {
        /// The row.
        place: Place,
        /// Fields in the header.
        expected: usize,
        /// Fields in the row.
        found: usize,
    },
    /// A cell is not a usable number.
    #[error("{place}: column `{name}` holds `{value}`, {reason}")]
    BadValue {
        /// The cell.
        place: Place,
        /// The column's name.
        name: String,
        /// The cell as written (shortened when long).
        value: String,
        /// What is wrong and what to do.
        reason: &'static str,
    },
    /// The CSV structure itself is broken (for example an unclosed quote).
    #[error(
        "{place}: the file is not valid CSV here ({message}); fix the quoting or the delimiter"
    )]
    Malformed {
        /// Where the reader stopped.
        place: Place,
        /// The CSV reader's explanation.
        message: String,
    },
}

impl TableError {
    /// The place of the problem, when it has one.
    pub fn place(&self) -> Option<&Place> {
        match self {
            TableError::MissingColumn { place, .. }
            | TableError::Ragged { place, .. }
            | TableError::BadValue { place, .. }
            | TableError::Malformed { place, .. } => Some(place),
            TableError::Io { .. } | TableError::Empty { .. } => None,
        }
    }
}

/// Reads columns `x_name` and `y_name` of the CSV file at `path`.
pub fn read_xy_file(path: &Path, x_name: &str, y_name: &str) -> Result<Columns, TableError> {
    let data = std::fs::read(path).map_err(|source| TableError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    read_xy(&data, path, x_name, y_name)
}

/// Reads columns `x_name` and `y_name` of CSV text; `path` names the source
/// in errors.
pub fn read_xy(
    data: &[u8],
    path: &Path,
    x_name: &str,
    y_name: &str,
) -> Result<Columns, TableError> {
    let place = |line: u64, column: Option<usize>| Place {
        path: path.to_path_buf(),
        line,
        column,
    };
    let mut rdr = csv::ReaderBuilder::new()
        .has_headers(false)
        .flexible(true)
        .buffer_capacity(1 << 20)
        .from_reader(data);
    // The CSV reader counts lines by LF only and, with CRLF line ends, puts
    // a record's start on the LF before it; count lines from byte offsets.
    let mut lines = LineCounter::new(data);
    let mut record = csv::ByteRecord::new();
    let read =
        |rdr: &mut csv::Reader<_>, record: &mut csv::ByteRecord| -> Result<bool, TableError> {
            rdr.read_byte_record(record).map_err(|e| {
                let line = e.position().map_or(0, |p| p.line()); // best effort for broken files
                match e.into_kind() {
                    csv::ErrorKind::Io(source) => TableError::Io {
                        path: path.to_path_buf(),
                        source,
                    },
                    other => TableError::Malformed {
                        place: place(line, None),
                        message: format!("{other:?}"),
                    },
                }
            })
        };
    if !read(&mut rdr, &mut record)? {
        return Err(TableError::Empty {
            path: path.to_path_buf(),
        });
    }
    let header_line = lines.line_of(&record);
    let names: Vec<String> = record
        .iter()
        .enumerate()
        .map(|(i, field)| {
            let field = if i == 0 {
                field.strip_prefix(b"\xEF\xBB\xBF").unwrap_or(field)
            } else {
                field
            };
            String::from_utf8_lossy(field).trim().to_string()
        })
        .collect();
    let find = |name: &str| -> Result<usize, TableError> {
        names
            .iter()
            .position(|h| h == name)
            .ok_or_else(|| TableError::MissingColumn {
                place: place(header_line, None),
                name: name.to_string(),
                available: names.join(", "),
            })
    };
    let (xi, yi) = (find(x_name)?, find(y_name)?);
    let width = names.len();
    let mut out = Columns {
        x_column: xi + 1,
        y_column: yi + 1,
        ..Columns::default()
    };
    while read(&mut rdr, &mut record)? {
        let line = lines.line_of(&record);
        if record.len() == 1
            && record
                .get(0)
                .is_some_and(|f| f.iter().all(u8::is_ascii_whitespace))
        {
            continue; // a blank line
        }
        if record.len() != width {
            return Err(TableError::Ragged {
                place: place(line, None),
                expected: width,
                found: record.len(),
            });
        }
        let cell = |i: usize, name: &str| -> Result<f64, TableError> {
            parse_number(record.get(i).unwrap_or_default()).map_err(|reason| TableError::BadValue {
                place: place(line, Some(i + 1)),
                name: name.to_string(),
                value: shorten(record.get(i).unwrap_or_default()),
                reason,
            })
        };
        out.x.push(cell(xi, x_name)?);
        out.y.push(cell(yi, y_name)?);
        out.lines.push(line);
    }
    Ok(out)
}

/// Turns record byte offsets into 1-based line numbers in one forward pass.
struct LineCounter<'a> {
    data: &'a [u8],
    scanned: usize,
    newlines: u64,
}

impl<'a> LineCounter<'a> {
    fn new(data: &'a [u8]) -> Self {
        LineCounter {
            data,
            scanned: 0,
            newlines: 0,
        }
    }

    fn line_of(&mut self, record: &csv::ByteRecord) -> u64 {
        let Some(pos) = record.position() else {
            return 0;
        };
        let at = usize::try_from(pos.byte())
            .unwrap_or(usize::MAX)
            .min(self.data.len());
        if at > self.scanned {
            self.newlines += memchr_count(&self.data[self.scanned..at]);
            self.scanned = at;
        }
        let starts_on_lf = self.data.get(at) == Some(&b'\n');
        self.newlines + 1 + u64::from(starts_on_lf)
    }
}

fn memchr_count(bytes: &[u8]) -> u64 {
    bytes.iter().filter(|&&b| b == b'\n').count() as u64
}

/// Parses one cell as a finite number, or says why it is not one.
pub fn parse_number(raw: &[u8]) -> Result<f64, &'static str> {
    let Ok(text) = std::str::from_utf8(raw) else {
        return Err("which is not valid UTF-8 text; save the file as UTF-8");
    };
    let text = text.trim();
    if text.is_empty() {
        return Err("an empty cell; fill in the value or remove the row");
    }
    match text.parse::<f64>() {
        Ok(v) if v.is_finite() => Ok(v),
        Ok(v) if v.is_nan() => {
            Err("which is not a number; write the measured value or remove the row")
        }
        Ok(_) => {
            Err("which is infinite or too large for a double (|v| > 1.8e308); check the value")
        }
        Err(_) if text.starts_with('<') || text.eq_ignore_ascii_case("nd") => Err(
            "a non-detect; an ad-hoc fit needs numbers (the daemon handles non-detects by policy)",
        ),
        Err(_) if text.contains(',') && !text.contains('.') => {
            Err("which uses a decimal comma; write a decimal point (e.g. 0.5)")
        }
        Err(_) => Err("which is not a number; write it with a decimal point and no units"),
    }
}

fn shorten(raw: &[u8]) -> String {
    let text = String::from_utf8_lossy(raw);
    let clean: String = text
        .chars()
        .map(|c| if c.is_control() { '?' } else { c })
        .collect();
    if clean.chars().count() > 40 {
        let head: String = clean.chars().take(37).collect();
        format!("{head}...")
    } else {
        clean
    }
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    fn read(text: &str) -> Result<Columns, TableError> {
        read_xy(text.as_bytes(), Path::new("in.csv"), "x", "y")
    }

    #[test]
    fn reads_named_columns_in_any_order_with_bom_and_crlf() {
        let cols = read("\u{feff}y,site,x\r\n1.5,A,10\r\n2.5,\"B, east\",20\r\n").unwrap();
        assert_eq!(cols.x, vec![10.0, 20.0]);
        assert_eq!(cols.y, vec![1.5, 2.5]);
        assert_eq!(cols.lines, vec![2, 3]);
    }

    #[test]
    fn bad_cell_names_line_and_column() {
        let err = read("x,y\n1,2\n2,abc\n").unwrap_err();
        let msg = err.to_string();
        assert!(
            msg.starts_with("in.csv:3:2: column `y` holds `abc`"),
            "{msg}"
        );
    }

    #[test]
    fn rejects_nan_infinity_and_overflow() {
        for bad in ["NaN", "inf", "-Infinity", "1e400"] {
            let err = read(&format!("x,y\n1,{bad}\n")).unwrap_err();
            assert!(matches!(err, TableError::BadValue { .. }), "{bad}: {err}");
        }
    }

    #[test]
    fn missing_column_lists_what_is_there() {
        let err = read("a,b\n1,2\n").unwrap_err();
        assert!(
            err.to_string()
                .contains("no column named `x` in the header (it has: a, b)")
        );
    }

    #[test]
    fn ragged_row_is_reported() {
        let err = read("x,y\n1,2\n3\n").unwrap_err();
        assert!(
            matches!(
                err,
                TableError::Ragged {
                    expected: 2,
                    found: 1,
                    ..
                }
            ),
            "{err}"
        );
    }

    #[test]
    fn empty_file_is_reported() {
        assert!(matches!(read("").unwrap_err(), TableError::Empty { .. }));
    }

    #[test]
    fn formula_looking_cell_is_not_a_number() {
        let err = read("x,y\n1,=cmd|' /C calc'!A0\n").unwrap_err();
        assert!(matches!(err, TableError::BadValue { .. }));
    }
}
