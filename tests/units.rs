//! A series with no unit configured keeps the unit of its first records:
//! a later record in another unit of the same kind is converted to it, one
//! that cannot be converted is set aside with its line, column and reason,
//! so that a series never mixes units unseen. Through the real pipeline,
//! real files and a real SQLite store, on both ingest paths (one file at a
//! time, and a backlog computed ahead of each commit) and for a file large
//! enough to be read in pieces.
//!
//! Data: NIST StRD Norris (tests/fixtures/nist/norris.csv, certified values
//! in norris.certified.json), part of it delivered in µg/L and ng/L; the
//! factors are the SI prefixes (1 mg = 1,000 µg = 1,000,000 ng). Delivered
//! so, the series' fit must still be NIST's.

#![allow(clippy::unwrap_used, clippy::expect_used)]

use std::path::Path;
use std::sync::atomic::AtomicBool;
use std::time::SystemTime;

use slopewarden::config::{BadRows, Config};
use slopewarden::inbox::ReadyFile;
use slopewarden::pipeline::{Flow, Outcome, SeriesCache, process_file, process_in_order};
use slopewarden::store::Store;

#[path = "support/norris.rs"]
mod norris;
#[path = "support/ready.rs"]
mod ready;
use ready::deliver;

/// `value` (a decimal as written) times 10^`places`, as written: the
/// decimal point moved, no floating point involved.
fn shifted(value: &str, places: usize) -> String {
    let (int, frac) = value.split_once('.').unwrap_or((value, ""));
    let mut frac = frac.to_string();
    while frac.len() < places {
        frac.push('0');
    }
    let (moved, rest) = frac.split_at(places);
    let digits = format!("{int}{moved}");
    let digits = digits.trim_start_matches('0');
    let digits = if digits.is_empty() { "0" } else { digits };
    if rest.is_empty() {
        digits.to_string()
    } else {
        format!("{digits}.{rest}")
    }
}

#[test]
fn shifting_a_decimal_moves_its_point() {
    assert_eq!(shifted("0.1", 3), "100");
    assert_eq!(shifted("888.0", 3), "888000");
    assert_eq!(shifted("12.25", 3), "12250");
    assert_eq!(shifted("0.1", 6), "100000");
    assert_eq!(shifted("1.23456", 3), "1234.56");
}

/// Norris in three files. The first twelve points in mg/L; of the next
/// twelve every other one in µg/L, with a soil value in mg/kg (line 8) that
/// no unit table can turn into mg/L; of the last twelve every third one in
/// ng/L and every other third written `MG/L`. The second file also starts
/// a series whose first record is in µg/L and whose next one is in mg/L.
fn deliveries() -> Vec<(String, String)> {
    let points = norris::points();
    let head = "record_id,series,x,y,unit\n";
    let mut files = Vec::new();
    let mut text = String::from(head);
    for (i, (x, y)) in points.iter().enumerate().take(12) {
        text.push_str(&format!("N{:02},norris/ozone,{x},{y},mg/L\n", i + 1));
    }
    files.push(("u00.csv".to_string(), text));
    let mut text = String::from(head);
    text.push_str("F01,fresh/nitrate,2020.5,4.2,µg/L\n");
    for (i, (x, y)) in points.iter().enumerate().skip(12).take(12) {
        if i == 17 {
            text.push_str("K01,norris/ozone,300.0,12.5,mg/kg\n");
        }
        if i % 2 == 0 {
            text.push_str(&format!(
                "N{:02},norris/ozone,{x},{},µg/L\n",
                i + 1,
                shifted(y, 3)
            ));
        } else {
            text.push_str(&format!("N{:02},norris/ozone,{x},{y},mg/L\n", i + 1));
        }
    }
    text.push_str("F02,fresh/nitrate,2021.5,0.0047,mg/L\n");
    files.push(("u01.csv".to_string(), text));
    let mut text = String::from(head);
    for (i, (x, y)) in points.iter().enumerate().skip(24) {
        let (y, unit) = match i % 3 {
            0 => (shifted(y, 6), "ng/L"),
            1 => (y.clone(), "MG/L"),
            _ => (y.clone(), "mg/L"),
        };
        text.push_str(&format!("N{:02},norris/ozone,{x},{y},{unit}\n", i + 1));
    }
    files.push(("u02.csv".to_string(), text));
    files
}

/// The records as stored: (record id, y, unit, unit as written).
fn records(db: &Path) -> Vec<(String, f64, Option<String>, Option<String>)> {
    let conn = rusqlite::Connection::open(db).unwrap();
    let mut stmt = conn
        .prepare("SELECT record_id, y, unit, unit_as_written FROM records ORDER BY id")
        .unwrap();
    stmt.query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?)))
        .unwrap()
        .collect::<Result<_, _>>()
        .unwrap()
}

/// A row set aside: (record id, line, column, field, reason).
type SetAside = (Option<String>, i64, Option<i64>, Option<String>, String);

/// The rows set aside, in order.
fn set_aside(db: &Path) -> Vec<SetAside> {
    let conn = rusqlite::Connection::open(db).unwrap();
    let mut stmt = conn
        .prepare("SELECT record_id, line, col, field, reason FROM quarantined_rows ORDER BY id")
        .unwrap();
    stmt.query_map([], |r| {
        Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?, r.get(4)?))
    })
    .unwrap()
    .collect::<Result<_, _>>()
    .unwrap()
}

fn assert_close(got: f64, want: f64, what: &str) {
    let rel = ((got - want) / want).abs();
    assert!(
        rel < 1e-9,
        "{what}: {got} against {want} (relative {rel:e})"
    );
}

#[test]
fn a_series_without_a_configured_unit_keeps_the_unit_of_its_first_records() {
    let files = deliveries();
    // One file at a time.
    let plain_dir = tempfile::tempdir().unwrap();
    let config = Config::defaults_in(plain_dir.path());
    std::fs::create_dir_all(&config.inbox).unwrap();
    let mut store = Store::open(&config.database).unwrap();
    let mut cache = SeriesCache::new();
    for f in deliver(&config.inbox, &files) {
        let o = process_file(&config, &mut store, &mut cache, &f, SystemTime::now()).unwrap();
        assert!(matches!(o, Outcome::Ingested { .. }), "{o:?}");
    }
    drop(store);
    // A backlog, each file computed while the one before commits.
    let ahead_dir = tempfile::tempdir().unwrap();
    let config_b = Config::defaults_in(ahead_dir.path());
    std::fs::create_dir_all(&config_b.inbox).unwrap();
    let jobs: Vec<(&Config, ReadyFile)> = deliver(&config_b.inbox, &files)
        .into_iter()
        .map(|f| (&config_b, f))
        .collect();
    let mut store_b = Store::open(&config_b.database).unwrap();
    process_in_order(
        &mut store_b,
        &mut SeriesCache::new(),
        &jobs,
        &AtomicBool::new(false),
        |_, _, result| {
            assert!(matches!(result, Ok(Outcome::Ingested { .. })), "{result:?}");
            Flow::Continue
        },
    );
    let stored = records(&config_b.database);
    assert_eq!(stored, records(&config.database), "the two paths agree");
    assert_eq!(
        set_aside(&config_b.database),
        set_aside(&config.database),
        "the two paths agree"
    );

    // Every Norris value is stored in mg/L, equal to the double its mg/L
    // text reads as (a power-of-ten factor applied once, correctly
    // rounded), with the unit as written kept beside it.
    let points = norris::points();
    for (i, (_, y)) in points.iter().enumerate() {
        let id = format!("N{:02}", i + 1);
        let (_, got, unit, written) = stored.iter().find(|r| r.0 == id).unwrap();
        assert_eq!(*got, y.parse::<f64>().unwrap(), "{id}");
        assert_eq!(unit.as_deref(), Some("mg/L"), "{id}");
        let want_written = match i {
            12..24 if i % 2 == 0 => "µg/L",
            24.. if i % 3 == 0 => "ng/L",
            24.. if i % 3 == 1 => "MG/L",
            _ => "mg/L",
        };
        assert_eq!(written.as_deref(), Some(want_written), "{id}");
    }
    // A new series takes the unit of its first record, here µg/L.
    let f02 = stored.iter().find(|r| r.0 == "F02").unwrap();
    assert_close(f02.1, 4.7, "F02 in µg/L");
    assert_eq!(f02.2.as_deref(), Some("µg/L"));
    assert_eq!(f02.3.as_deref(), Some("mg/L"));

    // The soil value is set aside where it stands: line 8 of u01.csv (the
    // header, F01 and five Norris rows before it), column 5, the unit.
    let aside = set_aside(&config_b.database);
    assert_eq!(aside.len(), 1, "{aside:?}");
    let (id, line, col, field, reason) = &aside[0];
    assert_eq!(
        (id.as_deref(), *line, *col, field.as_deref()),
        (Some("K01"), 8, Some(5), Some("unit"))
    );
    assert!(
        reason.contains("`mg/kg` cannot be converted to mg/L")
            && reason.contains("series norris/ozone has no unit configured")
            && reason.contains("its records so far are in mg/L"),
        "{reason}"
    );

    // All 36 Norris points are in the fit, which is NIST's (certified
    // values, 1e-9 relative).
    let conn = rusqlite::Connection::open(&config_b.database).unwrap();
    let (n, slope, intercept): (i64, f64, f64) = conn
        .query_row(
            "SELECT f.n, f.slope, f.intercept FROM fits f JOIN series s ON f.id = s.latest_fit
             WHERE s.key = 'norris/ozone'",
            [],
            |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)),
        )
        .unwrap();
    assert_eq!(n, 36);
    assert_close(slope, norris::certified("B1"), "slope");
    assert_close(intercept, norris::certified("B0"), "intercept");
    // The file row counts the row set aside, and a finding says so.
    let (bad, summary): (i64, String) = conn
        .query_row(
            "SELECT f.records_bad, g.summary FROM source_files f JOIN findings g ON g.file_id = f.id
             WHERE f.name = 'u01.csv' AND g.kinds LIKE '%quarantined%'",
            [],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .unwrap();
    assert_eq!(bad, 1);
    assert!(summary.contains("line 8, column 5 (unit)"), "{summary}");
    let report = slopewarden::verify::verify(&store_b).unwrap();
    assert!(report.ok(), "{:?}", report.problems);
}

#[test]
fn a_later_delivery_is_held_to_the_unit_already_stored_after_a_restart() {
    let dir = tempfile::tempdir().unwrap();
    let config = Config::defaults_in(dir.path());
    std::fs::create_dir_all(&config.inbox).unwrap();
    let first = deliver(
        &config.inbox,
        &[(
            "a.csv".into(),
            "record_id,series,x,y,unit\nA1,w/zinc,2020.1,12,µg/L\nA2,w/zinc,2020.6,14,µg/L\n\
             T1,w/iron,2020.1,0.2,mg/Ll\nT2,w/iron,2020.6,0.3,mg/L\n"
                .into(),
        )],
    );
    {
        let mut store = Store::open(&config.database).unwrap();
        process_file(
            &config,
            &mut store,
            &mut SeriesCache::new(),
            &first[0],
            SystemTime::now(),
        )
        .unwrap();
    }
    // As a store written before series kept their unit could hold: the
    // newest record naming a unit the table does not know. The series'
    // unit is looked up past it.
    rusqlite::Connection::open(&config.database)
        .unwrap()
        .execute(
            "UPDATE records SET unit = 'pCi/L' WHERE record_id = 'A2'",
            [],
        )
        .unwrap();
    // A new process (a fresh cache) and a file with no unit column, then
    // one in mg/L and one in a unit the table does not know.
    let later = deliver(
        &config.inbox,
        &[
            (
                "b.csv".into(),
                "record_id,series,x,y\nB1,w/zinc,2021.1,15\n".into(),
            ),
            (
                "c.csv".into(),
                "record_id,series,x,y,unit\nC1,w/zinc,2021.6,0.016,mg/L\nC2,w/zinc,2022.1,17,ug/l\nC3,w/zinc,2022.6,18,pCi/L\n\
                 T3,w/iron,2021.1,250,µg/L\nC4,w/zinc,2023.1,<0.02,mg/L\n"
                    .into(),
            ),
        ],
    );
    let mut store = Store::open(&config.database).unwrap();
    let mut cache = SeriesCache::new();
    for f in &later {
        process_file(&config, &mut store, &mut cache, f, SystemTime::now()).unwrap();
    }
    let stored = records(&config.database);
    let unit_of = |id: &str| stored.iter().find(|r| r.0 == id).unwrap().clone();
    // No unit written: taken as written, claiming none.
    assert_eq!(unit_of("B1").2, None);
    // mg/L to µg/L: 0.016 x 1,000.
    let c1 = unit_of("C1");
    assert_close(c1.1, 16.0, "C1 in µg/L");
    assert_eq!(
        (c1.2.as_deref(), c1.3.as_deref()),
        (Some("µg/L"), Some("mg/L"))
    );
    // Another spelling of the same unit: the value as written.
    let c2 = unit_of("C2");
    assert_eq!((c2.1, c2.2.as_deref()), (17.0, Some("µg/L")));
    // A non-detect's limit is converted like a value: <0.02 mg/L is
    // below 20 µg/L, and stays censored.
    let (limit, censored): (f64, bool) = rusqlite::Connection::open(&config.database)
        .unwrap()
        .query_row(
            "SELECT y, censored FROM records WHERE record_id = 'C4'",
            [],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .unwrap();
    assert_close(limit, 20.0, "C4's limit in µg/L");
    assert!(censored);
    // A first unit the table does not know (a slip) sets nothing and
    // stays as written; the next, mg/L, is the series' unit.
    assert_eq!(unit_of("T1").2.as_deref(), Some("mg/Ll"));
    let t3 = unit_of("T3");
    assert_close(t3.1, 0.25, "T3 in mg/L");
    assert_eq!(t3.2.as_deref(), Some("mg/L"));
    // A unit the table does not know cannot be held to µg/L.
    let aside = set_aside(&config.database);
    assert_eq!(aside.len(), 1, "{aside:?}");
    assert_eq!(aside[0].0.as_deref(), Some("C3"));
    assert!(
        aside[0].4.contains("unit `pCi/L` is not known")
            && aside[0].4.contains("its records so far are in µg/L"),
        "{}",
        aside[0].4
    );
}

/// A file past the size read in pieces (4 MiB): many rows of one series in
/// mg/L with a long note each, one row in µg/L and one in mg/kg.
fn large_file() -> String {
    let mut text = String::from("record_id,series,x,y,unit,sampled_at,note\n");
    let note = "n".repeat(120);
    for i in 0..36_000u32 {
        let (y, unit) = match i {
            20_000 => ("5000".to_string(), "µg/L"),
            30_000 => ("5.5".to_string(), "mg/kg"),
            _ => (format!("{}.{}", 4 + i % 3, i % 10), "mg/L"),
        };
        let x = 1990.0 + f64::from(i) / 1000.0;
        text.push_str(&format!("L{i:06},big/chloride,{x},{y},{unit},,{note}\n"));
    }
    assert!(text.len() > 4 << 20, "large enough to be read in pieces");
    text
}

/// One file through the plain path into a new store, its outcome.
fn ingest_alone(config: &Config, name: &str, text: String) -> Outcome {
    std::fs::create_dir_all(&config.inbox).unwrap();
    let ready = deliver(&config.inbox, &[(name.into(), text)]);
    let mut store = Store::open(&config.database).unwrap();
    process_file(
        config,
        &mut store,
        &mut SeriesCache::new(),
        &ready[0],
        SystemTime::now(),
    )
    .unwrap()
}

#[test]
fn a_large_file_read_in_pieces_is_held_to_its_series_unit_too() {
    let dir = tempfile::tempdir().unwrap();
    let config = Config::defaults_in(dir.path());
    let o = ingest_alone(&config, "big.csv", large_file());
    let Outcome::Ingested { counts, .. } = o else {
        panic!("{o:?}");
    };
    assert_eq!((counts.new, counts.bad), (35_999, 1));
    let conn = rusqlite::Connection::open(&config.database).unwrap();
    let (y, unit): (f64, String) = conn
        .query_row(
            "SELECT y, unit FROM records WHERE record_id = 'L020000'",
            [],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .unwrap();
    assert_eq!((y, unit.as_str()), (5.0, "mg/L"));
    let aside = set_aside(&config.database);
    assert_eq!(aside.len(), 1);
    assert_eq!(
        (aside[0].0.as_deref(), aside[0].1, aside[0].2),
        (Some("L030000"), 30_002, Some(5))
    );
    // The finding counts and lists it, though the survey before the
    // storing read could not.
    let summary: String = conn
        .query_row(
            "SELECT summary FROM findings WHERE kinds LIKE '%quarantined%'",
            [],
            |r| r.get(0),
        )
        .unwrap();
    assert!(
        summary.starts_with("1 row(s) of big.csv set aside")
            && summary.contains("line 30002, column 5 (unit)"),
        "{summary}"
    );

    // With bad rows rejecting the whole file, the same file is set aside
    // whole, and nothing of it is stored.
    let dir = tempfile::tempdir().unwrap();
    let mut config = Config::defaults_in(dir.path());
    config.bad_rows = BadRows::RejectFile;
    let o = ingest_alone(&config, "big.csv", large_file());
    let Outcome::Quarantined { reason, .. } = o else {
        panic!("{o:?}");
    };
    assert!(
        reason.contains("line 30002") && reason.contains("`mg/kg` cannot be converted to mg/L"),
        "{reason}"
    );
    assert!(records(&config.database).is_empty());
}

#[test]
fn a_small_file_with_a_unit_refused_is_rejected_whole_when_so_configured() {
    let dir = tempfile::tempdir().unwrap();
    let mut config = Config::defaults_in(dir.path());
    config.bad_rows = BadRows::RejectFile;
    std::fs::create_dir_all(&config.inbox).unwrap();
    let files = [
        (
            "a.csv".to_string(),
            "record_id,series,x,y,unit\nA1,w/lead,2020.1,12,mg/L\n".to_string(),
        ),
        (
            "b.csv".to_string(),
            "record_id,series,x,y,unit\nB1,w/lead,2020.6,14,mg/L\nB2,w/lead,2021.1,3,mg/kg\n"
                .to_string(),
        ),
    ];
    let jobs_files = deliver(&config.inbox, &files);
    let jobs: Vec<(&Config, ReadyFile)> = jobs_files.into_iter().map(|f| (&config, f)).collect();
    let mut store = Store::open(&config.database).unwrap();
    let mut outcomes = Vec::new();
    process_in_order(
        &mut store,
        &mut SeriesCache::new(),
        &jobs,
        &AtomicBool::new(false),
        |_, _, result| {
            outcomes.push(result.unwrap());
            Flow::Continue
        },
    );
    assert!(matches!(outcomes[0], Outcome::Ingested { .. }));
    let Outcome::Quarantined { reason, .. } = &outcomes[1] else {
        panic!("{:?}", outcomes[1]);
    };
    assert!(
        reason.contains("reject-file") && reason.contains("line 3, column 5 (unit)"),
        "{reason}"
    );
    let ids: Vec<String> = records(&config.database).into_iter().map(|r| r.0).collect();
    assert_eq!(ids, ["A1"]);
}
