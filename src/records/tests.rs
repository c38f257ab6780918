//! `parse_file` on real byte strings, plus properties on arbitrary and
//! mutated input.

#![allow(clippy::unwrap_used)]

use std::cell::Cell;

use proptest::prelude::*;

use std::hash::BuildHasher;

use super::parse::SeenIds;
use super::*;

const TODAY: Today = Today {
    year: 2024,
    month: 7,
    day: 2,
};

fn no_rules(_: &SeriesId) -> SeriesRules {
    SeriesRules::default()
}

fn parse_with(text: &str, layout: &Layout, rules: &dyn Fn(&SeriesId) -> SeriesRules) -> ParsedFile {
    parse_file(text.as_bytes(), layout, rules, TODAY).unwrap()
}

fn parse(text: &str) -> ParsedFile {
    parse_with(text, &Layout::default(), &no_rules)
}

/// The one error of a file whose only data row is refused.
fn only_error(out: &ParsedFile) -> &RecordError {
    assert!(out.records.is_empty(), "{:?}", out.records);
    assert_eq!(out.errors.len(), 1, "{:?}", out.errors);
    &out.errors[0]
}

fn reasons(out: &ParsedFile) -> Vec<(u64, &str)> {
    out.errors
        .iter()
        .map(|e| (e.line, e.reason.as_str()))
        .collect()
}

fn record<'a>(out: &'a ParsedFile, id: &str) -> &'a Record {
    out.records
        .iter()
        .find(|r| r.record_id == id)
        .unwrap_or_else(|| panic!("no record {id}; errors: {:?}", out.errors))
}

fn error_of<'a>(out: &'a ParsedFile, id: &str) -> &'a RecordError {
    out.errors
        .iter()
        .find(|e| e.record_id.as_deref() == Some(id))
        .unwrap_or_else(|| panic!("no error for {id}; records: {:?}", out.records))
}

#[test]
fn reads_canonical_file_keeping_extra_columns_as_attributes() {
    let out = parse(
        "record_id,series,x,y,unit,sampled_at,note,lab,batch\n\
         R1,NE/lead,10,12.5,mg/kg,2024-05-01,,ALS,B7\n\
         R2,NE/lead,20,8.25,mg/kg,2024-05-01,resampled,ALS,\n",
    );
    assert!(out.errors.is_empty(), "{:?}", out.errors);
    assert_eq!(
        out.records[0],
        Record {
            record_id: "R1".into(),
            series: SeriesId("NE/lead".into()),
            x: 10.0,
            y: Measure::Detected(12.5),
            unit: Some("mg/kg".into()),
            unit_as_written: Some("mg/kg".into()),
            sampled_at: Some("2024-05-01".into()),
            note: None,
            attributes: vec![("lab".into(), "ALS".into()), ("batch".into(), "B7".into())],
            line: 2,
            raw: "R1,NE/lead,10,12.5,mg/kg,2024-05-01,,ALS,B7".into(),
        }
    );
    let r2 = &out.records[1];
    assert_eq!((r2.line, r2.note.as_deref()), (3, Some("resampled")));
    assert_eq!(
        r2.attributes,
        vec![
            ("lab".into(), "ALS".into()),
            ("batch".into(), String::new())
        ]
    );
}

#[test]
fn finds_columns_in_any_order_and_optional_ones_may_be_absent() {
    let out = parse("note,y,series,x,record_id\nok,3.5,S,100,R1\n");
    let r = record(&out, "R1");
    assert_eq!((r.x, r.y), (100.0, Measure::Detected(3.5)));
    assert_eq!(r.series.as_str(), "S");
    assert_eq!(r.note.as_deref(), Some("ok"));
    assert_eq!((r.unit.as_ref(), r.sampled_at.as_ref()), (None, None));
    assert!(r.attributes.is_empty());
}

#[test]
fn header_names_are_trimmed_and_blank_rows_skipped() {
    let out = parse(" record_id , series,x ,y\n\n,,,\n  \nR1,S,1,2\n");
    assert_eq!(record(&out, "R1").line, 5);
    assert!(out.errors.is_empty());
}

#[test]
fn bom_and_crlf_keep_physical_line_numbers() {
    let out = parse("\u{feff}record_id,series,x,y\r\nR1,S,1,2\r\n\r\nR2,S,2,3\r\nR3,S,abc,4\r\n");
    assert_eq!(
        out.records.iter().map(|r| r.line).collect::<Vec<_>>(),
        vec![2, 4]
    );
    assert_eq!(out.records[1].raw, "R2,S,2,3");
    assert_eq!(
        out.errors,
        vec![RecordError {
            line: 5,
            column: Some(3),
            field: Some("x".into()),
            record_id: Some("R3".into()),
            reason: "x = abc is not a number; write the x value as a plain number".into(),
            raw: "R3,S,abc,4".into(),
        }]
    );
}

#[test]
fn quoted_note_with_comma_quotes_and_line_break_is_one_field() {
    let out = parse(
        "record_id,series,x,y,note\r\n\
         R1,S,1,2,\"cold, windy\r\nsaid \"\"ok\"\"\"\r\n\
         R2,S,2,3,\r\n",
    );
    let r1 = record(&out, "R1");
    assert_eq!(r1.note.as_deref(), Some("cold, windy\r\nsaid \"ok\""));
    assert_eq!(r1.line, 2);
    assert_eq!(r1.raw, "R1,S,1,2,\"cold, windy\r\nsaid \"\"ok\"\"\"");
    assert_eq!(record(&out, "R2").line, 4);
}

#[test]
fn reads_semicolon_decimal_comma_feed_with_template_series_and_dates() {
    let layout = Layout {
        delimiter: b';',
        decimal_comma: true,
        record_id: "Probe".into(),
        series: SeriesKey::Template("{Messstelle}/{Parameter}".into()),
        x: XSource::Date {
            column: "Datum".into(),
            format: DateFormat::DayMonthYear,
        },
        y: "Wert".into(),
        unit: Some("Einheit".into()),
        sampled_at: None,
        note: None,
        ..Layout::default()
    };
    let rules = |_: &SeriesId| SeriesRules {
        unit: Some("µg/L".into()),
        matrix: Matrix::Water,
        ..SeriesRules::default()
    };
    let out = parse_with(
        "Probe;Messstelle;Parameter;Datum;Wert;Einheit;Labor\n\
         P1;GW-03;Nitrat;02.07.2024;0,5;mg/l;Nord\n\
         P2;GW-03;Nitrat;1.7.2024;1.234,5;mg/l;Nord\n\
         P3; GW-04 ;Nitrat;03/07/2024 08:00;12;µg/l;Nord\n\
         P4;GW-04;Nitrat;04.07.2024;12;µg/l;Nord\n\
         P5;;Nitrat;01.07.2024;12;µg/l;Nord\n",
        &layout,
        &rules,
    );
    let p1 = record(&out, "P1");
    assert_eq!(p1.series.as_str(), "GW-03/Nitrat");
    // By hand: 2024 is a leap year; January to June hold 31+29+31+30+31+30
    // = 182 days, so 2 July is day 184 and 183 days have passed at 00:00.
    assert_eq!(p1.x, 2024.0 + 183.0 / 366.0);
    assert_eq!(p1.y, Measure::Detected(500.0));
    assert_eq!(p1.unit.as_deref(), Some("µg/L"));
    assert_eq!(p1.unit_as_written.as_deref(), Some("mg/l"));
    assert_eq!(p1.sampled_at.as_deref(), Some("02.07.2024"));
    assert_eq!(p1.attributes, vec![("Labor".into(), "Nord".into())]);

    let p3 = record(&out, "P3"); // tomorrow: within the allowed skew
    assert_eq!(p3.series.as_str(), "GW-04/Nitrat");
    assert_eq!(p3.x, 2024.0 + (184.0 + 8.0 / 24.0) / 366.0);

    let p2 = error_of(&out, "P2");
    assert_eq!((p2.line, p2.field.as_deref()), (3, Some("Wert")));
    assert!(p2.reason.contains("thousands separator"), "{}", p2.reason);
    let p4 = error_of(&out, "P4");
    assert_eq!(
        p4.reason,
        "Datum 04.07.2024 is in the future (today is 2024-07-02); check the year, and the order of day and month"
    );
    let p5 = error_of(&out, "P5");
    assert_eq!(p5.column, Some(2));
    assert_eq!(
        p5.reason,
        "Messstelle is empty; the series key {Messstelle}/{Parameter} needs it: fill it in"
    );
}

#[test]
fn reads_every_censored_form() {
    let layout = Layout {
        detection_limit: Some("dl".into()),
        qualifier: Some("q".into()),
        ..Layout::default()
    };
    let out = parse_with(
        "record_id,series,x,y,dl,q\n\
         R1,S,1,<0.5,,\n\
         R2,S,2,< 0.5,,\n\
         R3,S,3,ND,0.2,\n\
         R4,S,4,n.d.,0.2,\n\
         R5,S,5,BDL,0.2,\n\
         R6,S,6,0.5 U,,\n\
         R7,S,7,0.5U,,\n\
         R8,S,8,0.5,,U\n\
         R9,S,9,0.5,,<\n\
         R10,S,10,0.5,,ND\n\
         R11,S,11,,0.3,U\n\
         R12,S,12,<DL,0.3,\n\
         R13,S,13,0.7,,J\n\
         R14,S,14,ND,,\n\
         R15,S,15,<0,,\n\
         R16,S,16,<abc,,\n",
        &layout,
        &no_rules,
    );
    for (id, limit) in [
        ("R1", 0.5),
        ("R2", 0.5),
        ("R3", 0.2),
        ("R4", 0.2),
        ("R5", 0.2),
        ("R6", 0.5),
        ("R7", 0.5),
        ("R8", 0.5),
        ("R9", 0.5),
        ("R10", 0.5),
        ("R11", 0.3),
        ("R12", 0.3),
    ] {
        assert_eq!(record(&out, id).y, Measure::NonDetect { limit }, "{id}");
    }
    let r13 = record(&out, "R13");
    assert_eq!(r13.y, Measure::Detected(0.7));
    assert_eq!(
        r13.attributes,
        vec![("dl".into(), String::new()), ("q".into(), "J".into())]
    );
    assert_eq!(
        error_of(&out, "R14").reason,
        "y = ND: ND without a detection limit; add the limit column to the feed, or write `<` and the limit, e.g. <0.5"
    );
    assert!(
        error_of(&out, "R15")
            .reason
            .contains("a non-detect's limit must be greater than 0")
    );
    assert!(
        error_of(&out, "R16")
            .reason
            .contains("after `<` write the detection limit as a number")
    );
    assert_eq!(out.records.len() + out.errors.len(), 16);
}

#[test]
fn nd_without_a_limit_column_in_the_layout_is_refused() {
    let err = only_error(&parse("record_id,series,x,y\nR1,S,1,ND\n")).clone();
    assert!(
        err.reason.contains("ND without a detection limit"),
        "{}",
        err.reason
    );
}

#[test]
fn non_detect_limit_is_converted_like_a_value() {
    let rules = |_: &SeriesId| SeriesRules {
        unit: Some("µg/kg".into()),
        matrix: Matrix::Soil,
        ..SeriesRules::default()
    };
    let out = parse_with(
        "record_id,series,x,y,unit\nR1,S,1,<0.5,mg/kg\n",
        &Layout::default(),
        &rules,
    );
    assert_eq!(record(&out, "R1").y, Measure::NonDetect { limit: 500.0 });
}

fn unit_rules(series: &SeriesId) -> SeriesRules {
    let (unit, matrix) = match series.as_str() {
        "soil" => (Some("mg/kg"), Matrix::Soil),
        "water" => (Some("µg/L"), Matrix::Water),
        "unknown" => (Some("mg/kg"), Matrix::Unknown),
        _ => (None, Matrix::Unknown),
    };
    SeriesRules {
        unit: unit.map(str::to_string),
        matrix,
        ..SeriesRules::default()
    }
}

#[test]
fn converts_units_for_soil_and_water_series() {
    let out = parse_with(
        "record_id,series,x,y,unit\n\
         A1,soil,1,2,ppm\n\
         A2,soil,2,500,µg/kg\n\
         A3,soil,3,2,%\n\
         A5,water,5,0.5,mg/L\n\
         A6,water,6,3,ppb\n\
         A7,water,7,3,ppm\n\
         A8,water,8,250,ng/l\n",
        &Layout::default(),
        &unit_rules,
    );
    assert!(out.errors.is_empty(), "{:?}", out.errors);
    for (id, y, unit) in [
        ("A1", 2.0, "mg/kg"),
        ("A2", 0.5, "mg/kg"),
        ("A3", 20_000.0, "mg/kg"),
        ("A5", 500.0, "µg/L"),
        ("A6", 3.0, "µg/L"),
        ("A7", 3000.0, "µg/L"),
        ("A8", 0.25, "µg/L"),
    ] {
        let r = record(&out, id);
        assert_eq!(
            (r.y, r.unit.as_deref()),
            (Measure::Detected(y), Some(unit)),
            "{id}"
        );
    }
    assert_eq!(record(&out, "A1").unit_as_written.as_deref(), Some("ppm"));
}

#[test]
fn same_unit_missing_unit_and_unconfigured_series_keep_the_value() {
    let out = parse_with(
        "record_id,series,x,y,unit\n\
         B1,soil,1,0.30000000000000004,mg/kg\n\
         B2,soil,2,0.30000000000000004,\n\
         B3,free,3,1.25,ppm\n\
         B4,free,4,1.25,\n",
        &Layout::default(),
        &unit_rules,
    );
    let b1 = record(&out, "B1");
    assert_eq!(b1.y, Measure::Detected(0.1 + 0.2));
    let b2 = record(&out, "B2");
    assert_eq!(b2.y, Measure::Detected(0.1 + 0.2));
    assert_eq!(
        (b2.unit.as_deref(), b2.unit_as_written.as_deref()),
        (Some("mg/kg"), None)
    );
    let b3 = record(&out, "B3");
    assert_eq!(
        (b3.y, b3.unit.as_deref()),
        (Measure::Detected(1.25), Some("ppm"))
    );
    assert_eq!(record(&out, "B4").unit, None);
}

#[test]
fn refuses_unconvertible_ambiguous_and_unknown_units() {
    let out = parse_with(
        "record_id,series,x,y,unit\n\
         C1,soil,1,2,ppm\n\
         C2,soil,2,2,mg/L\n\
         C3,water,3,1,mg/kg\n\
         C4,unknown,4,1,ppm\n\
         C5,soil,5,1,furlongs\n",
        &Layout::default(),
        &unit_rules,
    );
    assert_eq!(out.records.len(), 1);
    assert_eq!(
        error_of(&out, "C2").reason,
        "unit `mg/L` cannot be converted to mg/kg for a soil series; check the unit, or the series' matrix and unit in the config"
    );
    assert_eq!(error_of(&out, "C2").field.as_deref(), Some("unit"));
    assert!(
        error_of(&out, "C3")
            .reason
            .starts_with("unit `mg/kg` cannot be converted to µg/L for a water series")
    );
    assert!(error_of(&out, "C4").reason.starts_with("ppm is ambiguous"));
    assert!(
        error_of(&out, "C5")
            .reason
            .starts_with("unit `furlongs` is not known")
    );
}

#[test]
fn rejects_nan_infinity_and_overflow() {
    let out = parse(
        "record_id,series,x,y\n\
         R1,S,NaN,1\n\
         R2,S,inf,1\n\
         R3,S,1e400,1\n\
         R4,S,1,nan\n\
         R5,S,1,-Infinity\n\
         R6,S,1,1e400\n\
         R7,S,1,<1e400\n",
    );
    assert!(out.records.is_empty());
    assert_eq!(out.errors.len(), 7);
    assert!(
        error_of(&out, "R3")
            .reason
            .starts_with("x = 1e400 is not a finite number;")
    );
    for id in ["R1", "R2", "R4", "R5", "R6"] {
        assert!(
            error_of(&out, id).reason.contains("is not a finite number"),
            "{id}"
        );
    }
}

#[test]
fn formula_cells_are_refused_not_evaluated() {
    let out = parse(
        "record_id,series,x,y\n\
         R1,S,1,=cmd|' /C calc'!A0\n\
         R2,S,1,+1\n\
         R3,S,@SUM(A1:A3),1\n\
         R4,S,1,\"=HYPERLINK(\"\"http://x\"\",\"\"y\"\")\"\n",
    );
    assert!(out.records.is_empty());
    assert_eq!(
        error_of(&out, "R1").reason,
        "y = =cmd|' /C calc'!A0 looks like a spreadsheet formula, not a number; write the measured value itself (formulas are never evaluated)"
    );
    for id in ["R2", "R3", "R4"] {
        assert!(
            error_of(&out, id).reason.contains("spreadsheet formula"),
            "{id}"
        );
    }
}

#[test]
fn rejects_negative_concentration_with_non_detect_hint() {
    let rules = |s: &SeriesId| SeriesRules {
        allow_negative: s.as_str() == "elevation",
        ..SeriesRules::default()
    };
    let out = parse_with(
        "record_id,series,x,y\nR1,S,1,-0.5\nR2,elevation,1,-0.5\nR3,S,1,-0\n",
        &Layout::default(),
        &rules,
    );
    assert_eq!(
        error_of(&out, "R1").reason,
        "negative concentration -0.5; some exports write <0.5 as -0.5: write it as <0.5 if it is a non-detect (or set allow_negative for series S if negative values are real)"
    );
    assert_eq!(record(&out, "R2").y, Measure::Detected(-0.5));
    assert_eq!(out.records.len(), 2, "-0 is not negative");
}

#[test]
fn rejects_x_outside_the_plausible_range() {
    let layout = Layout {
        x: XSource::Column("distance".into()),
        ..Layout::default()
    };
    let rules = |_: &SeriesId| SeriesRules {
        x_range: Some((0.0, 2000.0)),
        ..SeriesRules::default()
    };
    let out = parse_with(
        "record_id,series,distance,y\nR1,X,18500,1\nR2,X,0,1\nR3,X,2000,1\nR4,X,-1,1\n",
        &layout,
        &rules,
    );
    assert_eq!(
        reasons(&out),
        vec![
            (
                2,
                "distance 18500 is outside the plausible range 0..2000 set for series X; check for a typo or widen the range in the config"
            ),
            (
                5,
                "distance -1 is outside the plausible range 0..2000 set for series X; check for a typo or widen the range in the config"
            ),
        ]
    );
    assert_eq!(out.records.len(), 2, "the range is inclusive");
}

#[test]
fn checks_sampled_at_only_when_it_reads_as_an_iso_date() {
    let out = parse(
        "record_id,series,x,y,sampled_at\n\
         R1,S,1,2,2031-01-05\n\
         R2,S,1,2,2024-07-03\n\
         R3,S,1,2,2024-07-04T00:00\n\
         R4,S,1,2,spring 2024\n\
         R5,S,1,2,2023-02-30\n\
         R6,S,1,2,05/01/2031\n",
    );
    assert_eq!(
        error_of(&out, "R1").reason,
        "sampled_at 2031-01-05 is in the future (today is 2024-07-02); check the year"
    );
    assert_eq!(error_of(&out, "R1").column, Some(5));
    assert!(error_of(&out, "R3").reason.contains("in the future"));
    assert_eq!(
        error_of(&out, "R5").reason,
        "sampled_at 2023-02-30 is not a real date (February 2023 has 28 days); check for a typo"
    );
    assert_eq!(record(&out, "R2").sampled_at.as_deref(), Some("2024-07-03"));
    assert_eq!(
        record(&out, "R4").sampled_at.as_deref(),
        Some("spring 2024")
    );
    assert_eq!(record(&out, "R6").sampled_at.as_deref(), Some("05/01/2031"));
}

#[test]
fn date_x_must_exist_and_not_be_in_the_future() {
    let layout = Layout {
        x: XSource::Date {
            column: "date".into(),
            format: DateFormat::Iso,
        },
        ..Layout::default()
    };
    let out = parse_with(
        "record_id,series,date,y\n\
         R1,S,2023-02-30,1\n\
         R2,S,2024-12-01,1\n\
         R3,S,30.01.2023,1\n\
         R4,S,,1\n\
         R5,S,2023-01-01T12:00:00Z,1\n",
        &layout,
        &no_rules,
    );
    assert_eq!(
        error_of(&out, "R1").reason,
        "date 2023-02-30 is not a real date (February 2023 has 28 days; this feed's dates are YYYY-MM-DD); check for a typo"
    );
    assert!(
        error_of(&out, "R2")
            .reason
            .ends_with("is in the future (today is 2024-07-02); check the year")
    );
    assert!(
        error_of(&out, "R3")
            .reason
            .starts_with("date = 30.01.2023 is not a date written YYYY-MM-DD")
    );
    assert!(error_of(&out, "R4").reason.starts_with("date is empty"));
    assert_eq!(record(&out, "R5").x, 2023.0 + 0.5 / 365.0);
}

#[test]
fn repeated_record_id_is_refused_naming_the_first_line() {
    let out = parse("record_id,series,x,y\nR12,S,1,2\nR13,S,1,2\n\nR12,S,2,3\nR12,S,3,4\n");
    assert_eq!(out.records.len(), 2);
    assert_eq!(
        reasons(&out),
        vec![
            (
                5,
                "record_id R12 appears twice in this file (first on line 2); give each record its own id, or remove the repeated row"
            ),
            (
                6,
                "record_id R12 appears twice in this file (first on line 2); give each record its own id, or remove the repeated row"
            ),
        ]
    );
}

#[test]
fn rejects_row_without_record_id() {
    let err = only_error(&parse("record_id,series,x,y\n ,S,1,2\n")).clone();
    assert_eq!((err.column, err.record_id), (Some(1), None));
    assert!(err.reason.starts_with("record_id is empty"));
}

#[test]
fn rejects_row_without_y() {
    let err = only_error(&parse("record_id,series,x,y\nR1,S,1,\n")).clone();
    assert_eq!(
        err.reason,
        "y is empty; fill in the measured value or remove the row"
    );
}

#[test]
fn ragged_row_is_refused_and_the_rest_is_read() {
    let out = parse("record_id,series,x,y,note\nR1,S,1\nR2,S,2,3,\nR3,S,1,2,a,b\n");
    assert_eq!(out.records.len(), 1);
    assert_eq!(
        reasons(&out),
        vec![
            (
                2,
                "ragged row: 3 fields, header has 5; check for a stray delimiter or an unbalanced quote"
            ),
            (
                4,
                "ragged row: 6 fields, header has 5; check for a stray delimiter or an unbalanced quote"
            ),
        ]
    );
    assert_eq!(out.errors[0].record_id.as_deref(), Some("R1"));
    assert_eq!(out.errors[0].column, None);
}

#[test]
fn stray_quote_closed_later_refuses_one_row_holding_every_line() {
    let out =
        parse("record_id,series,x,y,note\nR1,S,1,2,\"oops\nR2,S,2,3,\nR3,S,3,4,\"\nR4,S,4,5,\n");
    assert_eq!(out.records.len(), 1);
    assert_eq!(record(&out, "R4").line, 5);
    let err = error_of(&out, "R1");
    assert_eq!((err.line, err.column), (2, Some(5)));
    assert_eq!(
        err.reason,
        "note holds 2 line(s) that look like whole rows of this file; a quote is probably missing or stray: check the quotes in this row"
    );
    assert_eq!(err.raw, "R1,S,1,2,\"oops\nR2,S,2,3,\nR3,S,3,4,\"");
}

#[test]
fn stray_quote_that_unbalances_fields_is_a_ragged_row() {
    let out = parse("record_id,series,x,y,note\nR1,S,1,\"2\nR2\",S,2,3,\nR3,S,3,4,\n");
    assert_eq!(record(&out, "R3").line, 4);
    let err = error_of(&out, "R1");
    assert_eq!(err.line, 2);
    assert!(
        err.reason.starts_with("ragged row: 8 fields, header has 5"),
        "{}",
        err.reason
    );
}

#[test]
fn unclosed_quote_at_end_of_file_refuses_the_file() {
    let err = parse_file(
        b"record_id,series,x,y,note\nR1,S,1,2,ok\nR2,S,2,3,\"cut off\nR3,S,3",
        &Layout::default(),
        &no_rules,
        TODAY,
    )
    .unwrap_err();
    assert!(
        matches!(&err, FileError::Malformed { line: 3, reason } if reason.contains("never closed")),
        "{err}"
    );
}

#[test]
fn binary_content_is_not_text() {
    let err = parse_file(
        b"record_id,series\nPK\x03\x04\x00\x00",
        &Layout::default(),
        &no_rules,
        TODAY,
    )
    .unwrap_err();
    assert!(
        matches!(&err, FileError::NotText { reason } if reason.starts_with("a NUL byte at byte offset 21 (line 2)")),
        "{err}"
    );
    let utf16 = parse_file(b"\xFF\xFEr\x00", &Layout::default(), &no_rules, TODAY).unwrap_err();
    assert!(utf16.to_string().contains("UTF-16"), "{utf16}");
}

#[test]
fn invalid_utf8_names_byte_offset_and_line() {
    let err = parse_file(
        b"\xEF\xBB\xBFrecord_id,series,x,y\nR1,S,1,2\nR2,Stra\xDFe,1,2\n",
        &Layout::default(),
        &no_rules,
        TODAY,
    )
    .unwrap_err();
    assert_eq!(
        err,
        FileError::NotText {
            reason: "invalid UTF-8 at byte offset 40 (line 3); the file may be in Latin-1 or Windows-1252: save it as UTF-8".into()
        }
    );
}

#[test]
fn missing_required_columns_are_listed_with_what_was_found() {
    let err = parse_file(
        b"record_id,site,x\nR1,A,1\n",
        &Layout::default(),
        &no_rules,
        TODAY,
    )
    .unwrap_err();
    assert_eq!(
        err,
        FileError::MissingColumns {
            missing: vec!["series".into(), "y".into()],
            found: vec!["record_id".into(), "site".into(), "x".into()],
            delimiter: None,
        }
    );
    let template = Layout {
        series: SeriesKey::Template("{site}/{analyte}".into()),
        ..Layout::default()
    };
    let err = parse_file(b"record_id,site,x,y\n", &template, &no_rules, TODAY).unwrap_err();
    assert!(matches!(err, FileError::MissingColumns { missing, .. } if missing == ["analyte"]));
}

#[test]
fn header_under_another_delimiter_is_named_with_the_feed_to_write() {
    // A semicolon export (the usual one where numbers take a decimal
    // comma) read with the canonical comma: one header name, none missing
    // once split on semicolons.
    let err = parse_file(
        b"record_id;series;x;y;unit\nA1;W1/nitrate;2020,5;4,2;mg/L\n",
        &Layout::default(),
        &no_rules,
        TODAY,
    )
    .unwrap_err();
    assert!(
        matches!(
            &err,
            FileError::MissingColumns {
                delimiter: Some(b';'),
                ..
            }
        ),
        "{err:?}"
    );
    let text = err.to_string();
    assert!(
        text.contains("the header is separated by semicolons: add a [[feed]]")
            && text.contains("delimiter = \";\", and decimal_comma = true"),
        "{text}"
    );
    // Tabs, and a feed expecting semicolons given a comma file.
    let err = parse_file(
        b"record_id\tseries\tx\ty\n",
        &Layout::default(),
        &no_rules,
        TODAY,
    )
    .unwrap_err();
    assert!(err.to_string().contains("delimiter = \"tab\""), "{err}");
    let semicolons = Layout {
        delimiter: b';',
        ..Layout::default()
    };
    let err = parse_file(b"record_id,series,x,y\n", &semicolons, &no_rules, TODAY).unwrap_err();
    let text = err.to_string();
    assert!(
        text.contains("separated by commas") && !text.contains("decimal_comma"),
        "{text}"
    );
    // Names that are missing under every delimiter get the general advice.
    let err = parse_file(b"id;site;x;y\n", &Layout::default(), &no_rules, TODAY).unwrap_err();
    assert!(
        matches!(
            &err,
            FileError::MissingColumns {
                delimiter: None,
                ..
            }
        ) && err.to_string().contains("rename the columns"),
        "{err}"
    );
}

#[test]
fn mapped_column_named_twice_refuses_the_file() {
    let err = parse_file(
        b"record_id,series,x,y,y\n",
        &Layout::default(),
        &no_rules,
        TODAY,
    )
    .unwrap_err();
    assert_eq!(
        err,
        FileError::Malformed {
            line: 1,
            reason: "column `y` appears twice in the header (columns 4 and 5); rename one of them"
                .into()
        }
    );
}

#[test]
fn empty_or_blank_file_has_no_header() {
    for text in ["", "\n\r\n", "  \n,,\n", "\u{feff}"] {
        assert_eq!(
            parse_file(text.as_bytes(), &Layout::default(), &no_rules, TODAY),
            Err(FileError::NoHeader),
            "{text:?}"
        );
    }
}

#[test]
fn header_only_file_has_no_records() {
    assert_eq!(parse("record_id,series,x,y\n"), ParsedFile::default());
}

#[test]
fn asks_for_each_series_rules_once() {
    let calls = Cell::new(0);
    let rules = |_: &SeriesId| {
        calls.set(calls.get() + 1);
        SeriesRules::default()
    };
    let out = parse_with(
        "record_id,series,x,y\nR1,A,1,2\nR2,B,1,2\nR3,A,2,3\nR4,B,2,3\n",
        &Layout::default(),
        &rules,
    );
    assert_eq!(out.records.len(), 4);
    assert_eq!(calls.get(), 2);
}

#[test]
fn unnamed_columns_are_kept_only_when_filled() {
    let out = parse("record_id,series,x,y,\nR1,S,1,2,\nR2,S,1,2,extra\n");
    assert!(record(&out, "R1").attributes.is_empty());
    assert_eq!(
        record(&out, "R2").attributes,
        vec![("column 5".into(), "extra".into())]
    );
}

// ---- properties ------------------------------------------------------

/// A row as an independent RFC 4180 reading sees it: the physical lines
/// it spans and whether every cell is blank.
#[derive(Debug)]
struct ExpectedRow {
    first: u64,
    last: u64,
    blank: bool,
}

/// Splits text into rows the way the csv crate quotes (a quote opens a
/// field only at its start; `""` inside is a quote); returns the rows and
/// whether a quote is left open at the end.
fn expected_rows(text: &str, delimiter: char) -> (Vec<ExpectedRow>, bool) {
    let chars: Vec<char> = text.chars().collect();
    let (mut rows, mut line, mut i) = (Vec::new(), 1u64, 0);
    let (mut in_row, mut first, mut blank) = (false, 0, true);
    let (mut field_start, mut quoted) = (true, false);
    while let Some(&ch) = chars.get(i) {
        let crlf = ch == '\r' && chars.get(i + 1) == Some(&'\n');
        let is_break = ch == '\n' || ch == '\r';
        i += 1 + usize::from(crlf);
        if quoted {
            if ch == '"' {
                if chars.get(i) == Some(&'"') {
                    blank = false;
                    i += 1;
                } else {
                    quoted = false;
                }
            } else if is_break {
                line += 1;
            } else if !ch.is_whitespace() && ch != '\u{feff}' {
                blank = false;
            }
            continue;
        }
        if is_break {
            if in_row {
                rows.push(ExpectedRow {
                    first,
                    last: line,
                    blank,
                });
                in_row = false;
            }
            line += 1;
            continue;
        }
        if !in_row {
            (in_row, first, blank, field_start) = (true, line, true, true);
        }
        if ch == delimiter {
            field_start = true;
        } else if ch == '"' && field_start {
            quoted = true;
            field_start = false;
        } else {
            field_start = false;
            // A stray byte-order mark (U+FEFF) inside the text counts as blank,
            // as the parser treats it.
            blank &= ch.is_whitespace() || ch == '\u{feff}';
        }
    }
    if in_row {
        rows.push(ExpectedRow {
            first,
            last: line,
            blank,
        });
    }
    (rows, quoted)
}

fn breaks(raw: &str) -> u64 {
    raw.matches('\n').count() as u64 + raw.matches('\r').count() as u64
        - raw.matches("\r\n").count() as u64
}

/// A file read through [`RecordStream`] in chunks of `rows`, put together.
fn chunked(
    bytes: &[u8],
    layout: &Layout,
    rules: &dyn Fn(&SeriesId) -> SeriesRules,
    rows: usize,
) -> Result<ParsedFile, FileError> {
    all_chunks(RecordStream::new(bytes, layout, rules, TODAY)?, rows)
}

/// A file read through [`RecordStream::from_reader`] in pieces of `piece`
/// bytes and chunks of `rows` rows, put together.
fn in_pieces(
    bytes: &[u8],
    layout: &Layout,
    rules: &dyn Fn(&SeriesId) -> SeriesRules,
    rows: usize,
    piece: usize,
) -> Result<ParsedFile, FileError> {
    let mut reader = bytes;
    let size = bytes.len() as u64;
    let stream = RecordStream::from_reader(&mut reader, piece, size, layout, rules, TODAY)?;
    all_chunks(stream, rows)
}

/// Every chunk of `rows` rows, put together; each chunk is checked to
/// hold at least one row and at most `rows`.
fn all_chunks(mut stream: RecordStream<'_>, rows: usize) -> Result<ParsedFile, FileError> {
    let mut all = ParsedFile {
        unit_column: stream.unit_column(),
        ..ParsedFile::default()
    };
    while let Some(mut chunk) = stream.next_chunk(rows)? {
        assert!(chunk.records.len() + chunk.errors.len() <= rows);
        assert!(chunk.records.len() + chunk.errors.len() > 0);
        assert_eq!(chunk.unit_column, all.unit_column);
        all.records.append(&mut chunk.records);
        all.errors.append(&mut chunk.errors);
    }
    Ok(all)
}

#[test]
fn a_repeated_id_is_found_across_chunks_and_a_late_break_stops_the_chunk_that_meets_it() {
    let text = "record_id,series,x,y\nA,s,1,2\nB,s,2,3\nA,s,3,4\nC,s,4,\"5\n";
    let mut stream =
        RecordStream::new(text.as_bytes(), &Layout::default(), &no_rules, TODAY).unwrap();
    let first = stream.next_chunk(2).unwrap().unwrap();
    assert_eq!(first.records.len(), 2);
    let second = stream.next_chunk(1).unwrap().unwrap();
    assert!(second.records.is_empty());
    assert!(
        second.errors[0].reason.contains("first on line 2"),
        "{:?}",
        second.errors
    );
    assert!(matches!(
        stream.next_chunk(2),
        Err(FileError::Malformed { line: 5, .. })
    ));
}

#[test]
fn ids_are_told_apart_when_their_hashes_collide_and_far_lines_are_kept() {
    let mut seen = SeenIds::with_capacity(4);
    assert_eq!(seen.first_line("A-1", 2), None);
    // Make "B-2" collide with "A-1", as two ids with one 64-bit hash would.
    let a = seen.hasher.hash_one("A-1");
    let b = seen.hasher.hash_one("B-2");
    let entry = seen.first[&a];
    seen.first.insert(b, entry);
    assert_eq!(
        seen.first_line("B-2", 3),
        None,
        "a different id, not a repeat"
    );
    assert_eq!(seen.first_line("B-2", 9), Some(3));
    assert_eq!(seen.first_line("A-1", 10), Some(2));
    // A line beyond u32 (a file of many gigabytes) is kept whole.
    let far = u64::from(u32::MAX) + 7;
    assert_eq!(seen.first_line("Z-9", far), None);
    assert_eq!(seen.first_line("Z-9", far + 1), Some(far));
}

/// Parses `bytes` (must not panic) and, when they are text, checks the
/// outcome against the independent row split: every data row is a record
/// or an error, on the right lines, in order, and nothing else.
fn check_every_row_accounted_for(bytes: &[u8]) {
    check_rows_with(bytes, &Layout::default());
}

fn check_rows_with(bytes: &[u8], layout: &Layout) {
    let rules = |s: &SeriesId| SeriesRules {
        unit: s
            .as_str()
            .len()
            .is_multiple_of(2)
            .then(|| "mg/kg".to_string()),
        matrix: Matrix::Soil,
        x_range: Some((0.0, 1e6)),
        allow_negative: false,
    };
    let result = parse_file(bytes, layout, &rules, TODAY);
    // Read in chunks, the file gives exactly the same rows and errors.
    for rows in [1, 2, 3, 7] {
        assert_eq!(
            chunked(bytes, layout, &rules, rows),
            result,
            "chunks of {rows}"
        );
    }
    // Read from a reader in pieces of any size, it gives them too.
    for (rows, piece) in [
        (1, 1),
        (2, 2),
        (3, 5),
        (usize::MAX, 7),
        (4, 64),
        (1000, 1 << 20),
    ] {
        assert_eq!(
            in_pieces(bytes, layout, &rules, rows, piece),
            result,
            "chunks of {rows}, pieces of {piece} bytes"
        );
    }
    let body = bytes.strip_prefix(b"\xEF\xBB\xBF").unwrap_or(bytes);
    let Ok(text) = std::str::from_utf8(body) else {
        assert!(
            matches!(result, Err(FileError::NotText { .. })),
            "{result:?}"
        );
        return;
    };
    if text.contains('\0') || bytes.starts_with(b"\xFF\xFE") || bytes.starts_with(b"\xFE\xFF") {
        assert!(
            matches!(result, Err(FileError::NotText { .. })),
            "{result:?}"
        );
        return;
    }
    // The csv crate under the parser drops one more byte-order mark when
    // the text it reads starts with one (a file saved with two).
    let text = text.strip_prefix('\u{feff}').unwrap_or(text);
    let (rows, open_at_end) = expected_rows(text, char::from(layout.delimiter));
    let mut rows = rows.into_iter().filter(|r| !r.blank);
    let Some(header) = rows.next() else {
        assert!(
            matches!(
                result,
                Err(FileError::NoHeader | FileError::Malformed { .. })
            ),
            "{result:?}"
        );
        return;
    };
    let out = match result {
        Ok(out) => out,
        Err(FileError::MissingColumns { .. } | FileError::Malformed { .. }) => return,
        Err(e) => panic!("unexpected {e:?}"),
    };
    assert!(
        !open_at_end,
        "an open quote at the end must refuse the file"
    );
    let expected: Vec<(u64, u64)> = rows.map(|r| (r.first, r.last)).collect();
    let mut got: Vec<(u64, u64)> = out
        .records
        .iter()
        .map(|r| (r.line, r.line + breaks(&r.raw)))
        .chain(out.errors.iter().map(|e| (e.line, e.line + breaks(&e.raw))))
        .collect();
    got.sort_unstable();
    assert!(header.last < got.first().map_or(u64::MAX, |g| g.0));
    assert_eq!(got, expected, "\n{text:?}\n{out:#?}");
    for r in &out.records {
        assert!(r.x.is_finite() && r.y.number().is_finite(), "{r:?}");
    }
}

const VALID: &str = "record_id,series,x,y,unit,sampled_at,note\r\n\
    R1,NE/lead,10,12.5,mg/kg,2024-05-01,\"cold, \"\"windy\"\"\"\r\n\
    R2,NE/lead,20,<0.5,ppm,2024-05-01,\r\n\
    \r\n\
    R3,SW/zinc,30,8.25,µg/kg,spring,\"two\nlines\"\r\n\
    R4,SW/zinc,40,-1,%,2024-06-30,\r\n";

/// Bytes that matter to CSV and to numbers, and some that break UTF-8.
fn interesting_byte() -> impl Strategy<Value = u8> {
    prop_oneof![
        4 => prop::sample::select(b",\"\r\n ;<-.eE0159ND\xC2\xB5U=+".to_vec()),
        1 => any::<u8>(),
    ]
}

#[derive(Debug, Clone)]
enum Edit {
    Replace(usize, u8),
    Insert(usize, u8),
    Delete(usize),
}

fn edit() -> impl Strategy<Value = Edit> {
    prop_oneof![
        (any::<usize>(), interesting_byte()).prop_map(|(i, b)| Edit::Replace(i, b)),
        (any::<usize>(), interesting_byte()).prop_map(|(i, b)| Edit::Insert(i, b)),
        any::<usize>().prop_map(Edit::Delete),
    ]
}

/// One generated data row: its text and the line it starts on is known
/// by construction.
fn cell() -> impl Strategy<Value = String> {
    prop_oneof![
        Just("1.5".to_string()),
        Just("<0.2".to_string()),
        Just("ND".to_string()),
        Just("-3".to_string()),
        Just("1e400".to_string()),
        Just("=1+1".to_string()),
        Just(String::new()),
        Just("\"a, \"\"b\"\"\nc\"".to_string()),
        Just("2031-01-01".to_string()),
        "[a-zA-Z0-9 .]{0,6}",
    ]
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(500))]

    #[test]
    fn never_panics_on_arbitrary_bytes(bytes in prop::collection::vec(any::<u8>(), 0..400)) {
        check_every_row_accounted_for(&bytes);
    }

    #[test]
    fn never_panics_on_csv_like_text(text in "[a-z0-9,\"\r\n <.eE+=;µ\u{feff}-]{0,300}") {
        let with_header = format!("record_id,series,x,y,unit,sampled_at,note\n{text}");
        check_every_row_accounted_for(text.as_bytes());
        check_every_row_accounted_for(with_header.as_bytes());
    }

    #[test]
    fn never_panics_on_a_semicolon_feed_with_every_option(
        text in "[a-zA-Z0-9;,\"\r\n <.:/=-]{0,300}",
        rows in prop::collection::vec("[0-9]{1,2}[./][0-9]{1,2}[./]20[0-9]{2};-?[0-9]{1,3}(,[0-9]{1,2})?( ?U)?;(U|J|ND|<)?;([0-9],[0-9])?", 0..20),
    ) {
        let layout = Layout {
            delimiter: b';',
            decimal_comma: true,
            series: SeriesKey::Template("{site}/{analyte}".into()),
            x: XSource::Date { column: "date".into(), format: DateFormat::DayMonthYear },
            detection_limit: Some("dl".into()),
            qualifier: Some("q".into()),
            ..Layout::default()
        };
        let mut file = String::from("record_id;site;analyte;date;y;q;dl\n");
        for (i, row) in rows.iter().enumerate() {
            file.push_str(&format!("R{i};MW-1;nitrate;{row}\n"));
        }
        file.push_str(&text);
        check_rows_with(file.as_bytes(), &layout);
    }

    #[test]
    fn every_row_of_a_mutated_file_is_a_record_or_an_error(
        edits in prop::collection::vec(edit(), 1..8),
        bom in any::<bool>(),
    ) {
        let mut bytes = if bom { b"\xEF\xBB\xBF".to_vec() } else { Vec::new() };
        bytes.extend_from_slice(VALID.as_bytes());
        for e in edits {
            let n = bytes.len();
            match e {
                Edit::Replace(i, b) if n > 0 => bytes[i % n] = b,
                Edit::Insert(i, b) => bytes.insert(i % (n + 1), b),
                Edit::Delete(i) if n > 0 => { bytes.remove(i % n); }
                _ => {}
            }
        }
        check_every_row_accounted_for(&bytes);
    }

    #[test]
    fn generated_rows_are_all_accounted_for_on_known_lines(
        rows in prop::collection::vec((cell(), cell(), cell(), 0usize..3), 0..40),
        crlf in any::<bool>(),
    ) {
        let eol = if crlf { "\r\n" } else { "\n" };
        let mut text = format!("record_id,series,x,y{eol}");
        let mut line = 2u64;
        let mut lines = Vec::new();
        for (n, (series, x, y, extra)) in rows.iter().enumerate() {
            if extra == &2 {
                text.push_str(eol); // a blank line
                line += 1;
            }
            let fields = if extra == &1 { format!(",{series},{x},{y},extra") } else { format!(",{series},{x},{y}") };
            text.push_str(&format!("R{n}{fields}{eol}"));
            lines.push(line);
            line += 1 + breaks(&fields);
        }
        let out = parse_file(text.as_bytes(), &Layout::default(), &no_rules, TODAY).unwrap();
        let mut got: Vec<u64> = out.records.iter().map(|r| r.line)
            .chain(out.errors.iter().map(|e| e.line)).collect();
        got.sort_unstable();
        prop_assert_eq!(got, lines);
        check_every_row_accounted_for(text.as_bytes());
    }
}
