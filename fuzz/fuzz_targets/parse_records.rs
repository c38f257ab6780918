//! Fuzz target for the record parser, `slopewarden::records::parse_file`.
//!
//! Input: the first byte chooses the layout (delimiter, decimal comma, a
//! canonical file or a feed with a series template and a date column), the
//! second byte the per-series rules (unit to convert to, matrix, plausible x
//! range, negatives allowed); the rest is the file's bytes.
//!
//! Besides "never panics", it checks that reading the file in chunks
//! (`RecordStream`, as large deliveries are read, from memory or from a
//! reader in pieces) gives exactly what
//! reading it whole gives, and what the parser promises about what it
//! returns: every number finite, a non-detect's limit above zero, no
//! negative value unless allowed, lines counted from 1 in file order, no
//! empty record id or series, and never more rows out than rows in.
//!
//! Run from the repository root (see DEVELOPERS.md):
//! `mkdir -p fuzz/corpus/parse_records && RUSTC_BOOTSTRAP=1 cargo fuzz run parse_records -s none fuzz/corpus/parse_records fuzz/seeds/parse_records -- -dict=fuzz/parse_records.dict -max_total_time=600`
//! (`-s none`: no sanitizer, so stable Rust will do; RUSTC_BOOTSTRAP lets it
//! take the unstable flags cargo-fuzz passes.) Known failing inputs are kept
//! in fuzz/reproducers/; replay one with `cargo fuzz run ... FILE`.
#![no_main]

use libfuzzer_sys::fuzz_target;
use slopewarden::records::{
    DateFormat, Layout, Matrix, Measure, ParsedFile, RecordStream, SeriesId, SeriesKey,
    SeriesRules, Today, XSource, parse_file,
};

fn layout(selector: u8) -> Layout {
    let delimiter = match selector & 0b11 {
        0 | 3 => b',',
        1 => b';',
        _ => b'\t',
    };
    let decimal_comma = selector & 0b100 != 0;
    let format = match (selector >> 5) & 0b11 {
        0 | 3 => DateFormat::Iso,
        1 => DateFormat::DayMonthYear,
        _ => DateFormat::MonthDayYear,
    };
    let base = Layout {
        delimiter,
        decimal_comma,
        ..Layout::default()
    };
    match (selector >> 3) & 0b11 {
        // The canonical layout.
        0 => base,
        // A lab feed: series from a template, x from a date column,
        // non-detects through a qualifier or a detection-limit column.
        1 => Layout {
            record_id: "SampleID".into(),
            series: SeriesKey::Template("{Well}/{Analyte}".into()),
            x: XSource::Date {
                column: "Sampled".into(),
                format,
            },
            y: "Result".into(),
            unit: Some("Unit".into()),
            sampled_at: Some("Sampled".into()),
            note: Some("Remark".into()),
            detection_limit: Some("RL".into()),
            qualifier: Some("Qual".into()),
            ..base
        },
        // The canonical names with x read as a date.
        2 => Layout {
            x: XSource::Date {
                column: "x".into(),
                format,
            },
            detection_limit: Some("dl".into()),
            qualifier: Some("q".into()),
            ..base
        },
        // Odd templates: literal braces, one column used twice, an empty
        // `{}`, and a sampled_at column that is also the x column.
        _ => Layout {
            series: SeriesKey::Template("{site}{/{site}-{}{analyte".into()),
            sampled_at: Some("x".into()),
            note: None,
            unit: None,
            ..base
        },
    }
}

fn series_rules(selector: u8, series: &SeriesId) -> SeriesRules {
    // Vary by series too, so one file meets several rule sets.
    let s = selector ^ (series.as_str().len() as u8);
    SeriesRules {
        unit: match s & 0b11 {
            0 => None,
            1 => Some("mg/L".into()),
            2 => Some("µg/kg".into()),
            _ => Some("ppb".into()),
        },
        matrix: match (s >> 2) & 0b11 {
            0 => Matrix::Unknown,
            1 => Matrix::Water,
            _ => Matrix::Soil,
        },
        x_range: match (s >> 4) & 0b11 {
            0 => None,
            1 => Some((1990.0, 2100.0)),
            2 => Some((0.0, 2500.0)),
            _ => Some((-1e300, 1e300)),
        },
        allow_negative: s & 0b0100_0000 != 0,
    }
}

fuzz_target!(|data: &[u8]| {
    let (layout_byte, rules_byte, bytes) = match data {
        [a, b, rest @ ..] => (*a, *b, rest),
        _ => return,
    };
    let layout = layout(layout_byte);
    let rules = |id: &SeriesId| series_rules(rules_byte, id);
    let today = Today {
        year: 2026,
        month: 2,
        day: 28,
    };
    let whole = parse_file(bytes, &layout, &rules, today);
    // Read in chunks (as a large delivery is), the same rows and errors
    // come out, in the same order; the chunk size varies with the input.
    let rows = 1 + usize::from(rules_byte % 5);
    let all_chunks = |mut stream: RecordStream<'_>| {
        let mut all = ParsedFile {
            unit_column: stream.unit_column(),
            ..ParsedFile::default()
        };
        while let Some(mut chunk) = stream.next_chunk(rows)? {
            assert!(chunk.records.len() + chunk.errors.len() <= rows);
            assert_eq!(chunk.unit_column, all.unit_column);
            all.records.append(&mut chunk.records);
            all.errors.append(&mut chunk.errors);
        }
        Ok(all)
    };
    let chunked = RecordStream::new(bytes, &layout, &rules, today).and_then(all_chunks);
    assert_eq!(
        whole, chunked,
        "chunks of {rows} differ from the whole file"
    );
    // Read from a reader in pieces (as a large delivery is read from
    // disk), the same again; the piece size varies with the input too.
    let piece = 1 + usize::from(rules_byte % 13) * 3;
    let mut reader = bytes;
    let size = bytes.len() as u64;
    let pieces = RecordStream::from_reader(&mut reader, piece, size, &layout, &rules, today)
        .and_then(all_chunks);
    assert_eq!(
        whole, pieces,
        "pieces of {piece} bytes differ from the whole file"
    );
    let Ok(parsed) = whole else {
        return;
    };
    // A row is at least one line, so the lines bound what comes out.
    let lines = 1 + bytes
        .iter()
        .enumerate()
        .filter(|&(i, &b)| b == b'\n' || (b == b'\r' && bytes.get(i + 1) != Some(&b'\n')))
        .count();
    assert!(
        parsed.records.len() + parsed.errors.len() < lines.max(2),
        "{} records and {} errors from {lines} line(s)",
        parsed.records.len(),
        parsed.errors.len()
    );
    let mut last_line = 0;
    for r in &parsed.records {
        assert!(r.x.is_finite(), "x not finite: {r:?}");
        match r.y {
            Measure::Detected(v) => {
                assert!(v.is_finite(), "y not finite: {r:?}");
                if !rules(&r.series).allow_negative {
                    assert!(v >= 0.0, "negative y not allowed: {r:?}");
                }
            }
            Measure::NonDetect { limit } => {
                assert!(
                    limit.is_finite() && limit > 0.0,
                    "a non-detect's limit must be finite and > 0: {r:?}"
                );
            }
        }
        assert!(!r.record_id.is_empty(), "empty record id: {r:?}");
        assert!(!r.series.as_str().is_empty(), "empty series: {r:?}");
        assert!(r.line > last_line, "records out of file order: {r:?}");
        last_line = r.line;
        assert!(r.line as usize <= lines, "line beyond the file: {r:?}");
    }
    for e in &parsed.errors {
        assert!(e.line >= 1 && e.line as usize <= lines, "bad line: {e:?}");
        assert!(!e.reason.is_empty(), "an error without a reason: {e:?}");
    }
});
