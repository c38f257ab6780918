//! `slopewarden report` end to end, as an analyst meets it: the real
//! binary ingests small CSV files from a temporary inbox into a real
//! SQLite store, then writes the HTML report or the CSV exports, which are
//! parsed back (HTML with an HTML5 parser, CSV with the `csv` crate). No
//! mocks.
//!
//! - The HTML report is one self-contained file: inline SVG and CSS, no
//!   script element, no reference to anything outside the file, a print
//!   stylesheet; data from the files (a series named like a script tag,
//!   record notes and verdict notes with markup) shows as text; the
//!   flagged record is labelled on its chart; the slope shown for each
//!   series is the one `slopewarden status --json` reports, to the
//!   displayed precision; a refit triggered by a verdict is marked.
//! - The CSV exports neutralise text cells that a spreadsheet would run as
//!   formulas and keep numbers numeric.
//! - A series pattern filters; an invalid one is refused.
//! - Records outside the fit's analysis window are drawn and counted
//!   apart from the fitted ones.
//!
//! ALL DATA IS INVENTED: a stated line plus a fixed deterministic wiggle;
//! place names, series keys, record ids and people are made up.

#![allow(clippy::unwrap_used, clippy::expect_used)]

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use scraper::{ElementRef, Html, Selector};
use serde_json::Value;

/// The invented series.
const QUARRY: &str = "Quarry Lane/MW-3/nitrate";
const SCRIPTED: &str = "<script>alert(1)</script>";
const FORMULA: &str = "=SUM(1+1)";
/// The record entered ten times too large.
const SLIPPED: &str = "QL-021";

// ---------------------------------------------------------------------------
// A site: a temporary folder with an inbox, a configuration and a store.

struct Site {
    dir: tempfile::TempDir,
}

impl Site {
    fn new() -> Site {
        let dir = tempfile::tempdir().unwrap();
        std::fs::create_dir_all(dir.path().join("inbox")).unwrap();
        std::fs::write(
            dir.path().join("slopewarden.toml"),
            "[paths]\ninbox = \"inbox\"\ndatabase = \"data/slopewarden.sqlite3\"\n\n[watch]\nkeep_files = true\n",
        )
        .unwrap();
        Site { dir }
    }

    fn path(&self, p: &str) -> PathBuf {
        self.dir.path().join(p)
    }

    fn config(&self) -> String {
        self.path("slopewarden.toml").to_string_lossy().into_owned()
    }

    /// `slopewarden ARGS --config FILE` in the site's folder.
    fn run(&self, args: &[&str]) -> Output {
        Command::new(env!("CARGO_BIN_EXE_slopewarden"))
            .args(args)
            .arg("--config")
            .arg(self.config())
            .current_dir(self.dir.path())
            .output()
            .unwrap()
    }

    /// As [`Site::run`]; fails the test on a non-zero exit.
    fn ok(&self, args: &[&str]) -> Output {
        let out = self.run(args);
        assert!(
            out.status.success(),
            "slopewarden {args:?} failed: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        out
    }

    /// Writes a file into the inbox and ingests it.
    fn deliver(&self, name: &str, text: &str) {
        let path = self.path(&format!("inbox/{name}"));
        std::fs::write(&path, text).unwrap();
        let out = Command::new(env!("CARGO_BIN_EXE_slopewarden"))
            .args(["ingest", "--config", &self.config(), path.to_str().unwrap()])
            .current_dir(self.dir.path())
            .output()
            .unwrap();
        assert!(
            out.status.success(),
            "ingest failed: {}",
            String::from_utf8_lossy(&out.stderr)
        );
    }

    fn json(&self, args: &[&str]) -> Vec<Value> {
        let out = self.ok(args);
        serde_json::from_slice::<Value>(&out.stdout)
            .unwrap()
            .as_array()
            .unwrap()
            .clone()
    }

    fn db(&self) -> rusqlite::Connection {
        rusqlite::Connection::open(self.path("data/slopewarden.sqlite3")).unwrap()
    }

    fn report_html(&self, extra: &[&str]) -> String {
        let out = self.path("report.html");
        let mut args = vec!["report", "--out", out.to_str().unwrap()];
        args.extend_from_slice(extra);
        self.ok(&args);
        std::fs::read_to_string(out).unwrap()
    }
}

// ---------------------------------------------------------------------------
// Invented data.

/// -0.3, -0.15, 0, 0.15 or 0.3, cycling with period 5.
fn wiggle(i: usize) -> f64 {
    0.3 * ((i * 7 % 5) as f64 - 2.0) / 2.0
}

/// 0.2 mg/L a year from 5.0 at 2010.
fn line(x: f64) -> f64 {
    5.0 + 0.2 * (x - 2010.0)
}

const HEADER: &str = "record_id,series,x,y,unit,sampled_at,note\n";

/// The first delivery: 20 quarterly records of Quarry Lane on the line,
/// and 8 half-yearly records each of the two oddly named series, one
/// rising and one falling. Notes carry markup and a formula.
fn first_file() -> String {
    let mut s = String::from(HEADER);
    for i in 0..20 {
        let x = 2010.0 + 0.25 * i as f64;
        s.push_str(&format!(
            "QL-{:03},{QUARRY},{x},{:.3},mg/L,,\n",
            i + 1,
            line(x) + wiggle(i)
        ));
    }
    for i in 0..8 {
        let x = 2012.0 + 0.5 * i as f64;
        s.push_str(&format!(
            "SC-{:02},{SCRIPTED},{x},{:.3},mg/L,,\"<img src=x onerror=alert(2)>\"\n",
            i + 1,
            2.0 + 0.1 * i as f64 + 0.1 * wiggle(i)
        ));
    }
    for i in 0..8 {
        let x = 2012.0 + 0.5 * i as f64;
        s.push_str(&format!(
            "FX-{:02},{FORMULA},{x},{:.3},mg/L,,\"=HYPERLINK(\"\"http://example.invalid\"\")\"\n",
            i + 1,
            7.0 - 0.1 * i as f64 + 0.1 * wiggle(i)
        ));
    }
    s
}

/// The next quarter of Quarry Lane, entered ten times too large.
fn slipped_file() -> String {
    format!(
        "{HEADER}{SLIPPED},{QUARRY},2015,{},mg/L,2015-01-02,\"decimal <b>slip</b>?\"\n",
        10.0 * line(2015.0)
    )
}

/// A site holding the three series and the finding on the slipped record.
fn site() -> Site {
    let site = Site::new();
    site.deliver("a.csv", &first_file());
    site.deliver("b.csv", &slipped_file());
    site
}

/// The finding on the slipped record, from `findings --json`.
fn slip_finding(site: &Site) -> Value {
    let found = site.json(&["findings", "--json"]);
    found
        .into_iter()
        .find(|f| f["record_ids"] == serde_json::json!([SLIPPED]))
        .expect("the slipped record raises a finding")
}

/// Records a verdict on `finding` directly in the store (the way a review
/// would leave it: the verdict row, the finding's status, and a fit
/// version citing the verdict) so that the report has a verdict log and a
/// verdict-triggered refit to show.
fn record_verdict(site: &Site, finding: i64, note: &str) -> i64 {
    let conn = site.db();
    let (record_row, series): (i64, i64) = conn
        .query_row(
            "SELECT record_row, series_id FROM findings WHERE id = ?1",
            [finding],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .unwrap();
    conn.execute(
        "INSERT INTO verdicts (finding_id, verdict, record_row, note, by_whom, at)
         VALUES (?1, 'confirmed', ?2, ?3, 'R. Example', '2026-01-05T10:00:00Z')",
        rusqlite::params![finding, record_row, note],
    )
    .unwrap();
    let verdict = conn.last_insert_rowid();
    conn.execute(
        "UPDATE findings SET status = 'confirmed' WHERE id = ?1",
        [finding],
    )
    .unwrap();
    // A confirmed record keeps its place: the refit has the same figures
    // under the next version number, citing the verdict.
    conn.execute_batch(&format!(
        "CREATE TEMP TABLE refit AS SELECT * FROM fits WHERE id = (SELECT latest_fit FROM series WHERE id = {series});
         UPDATE refit SET prev_fit = id, id = (SELECT MAX(id) + 1 FROM fits), version = version + 1,
                          trigger_file = NULL, trigger_verdict = {verdict}, created_at = '2026-01-05T10:00:00Z';
         INSERT INTO fits SELECT * FROM refit;
         UPDATE series SET latest_fit = (SELECT id FROM refit) WHERE id = {series};
         DROP TABLE refit;"
    ))
    .unwrap();
    verdict
}

// ---------------------------------------------------------------------------
// Reading the page.

fn sel(s: &str) -> Selector {
    Selector::parse(s).unwrap()
}

fn text(e: ElementRef<'_>) -> String {
    e.text().collect::<String>().trim().to_string()
}

/// The section of a series, found by its heading's text.
fn section<'a>(doc: &'a Html, key: &str) -> ElementRef<'a> {
    doc.select(&sel("section.series"))
        .find(|s| s.select(&sel("h2")).next().is_some_and(|h| text(h) == key))
        .unwrap_or_else(|| panic!("no section headed {key:?}"))
}

/// A number as the report prints it: `0.2048`, `-433.3`, `5.7×10−6`
/// (the exponent a superscript with a minus sign).
fn shown_number(s: &str) -> f64 {
    let s = s.trim().replace('\u{2212}', "-");
    match s.split_once("×10") {
        Some((m, e)) => m.parse::<f64>().unwrap() * 10f64.powi(e.parse::<i32>().unwrap()),
        None => s
            .parse()
            .unwrap_or_else(|_| panic!("`{s}` is not a number")),
    }
}

/// Whether `shown` is `want` rounded to four significant digits.
fn agrees_to_4_digits(shown: f64, want: f64) -> bool {
    let unit = 10f64.powf(want.abs().log10().floor() - 3.0);
    (shown - want).abs() <= 0.5 * unit * (1.0 + 1e-9)
}

// ---------------------------------------------------------------------------

#[test]
fn the_html_report_is_self_contained_escapes_the_data_and_agrees_with_status() {
    let site = site();
    let finding = slip_finding(&site);
    let verdict = record_verdict(
        &site,
        finding["id"].as_i64().unwrap(),
        "lab sheet <i>checked</i>; value stands",
    );
    let raw = site.report_html(&[]);
    let doc = Html::parse_document(&raw);

    // No script anywhere: not as an element, not as markup in the source.
    assert_eq!(doc.select(&sel("script")).count(), 0);
    assert!(!raw.to_ascii_lowercase().contains("<script"), "raw <script");
    // The notes' markup is text too.
    for tag in ["img", "b", "i", "iframe", "object", "embed", "link"] {
        assert_eq!(doc.select(&sel(tag)).count(), 0, "a <{tag}> element");
    }
    // The series named like a script tag shows as text, in its heading and
    // in the overview.
    let scripted = section(&doc, SCRIPTED);
    assert!(
        doc.select(&sel("table.overview td a"))
            .any(|a| text(a) == SCRIPTED)
    );
    // Its chart's title (inside the SVG) carries the name as text.
    let title = scripted.select(&sel("svg title")).next().unwrap();
    assert_eq!(
        text(title),
        format!("Records of {SCRIPTED} with the current fit")
    );

    // Self-contained: inline SVG charts (a scatter and a slope history per
    // series), inline CSS, and every reference points inside the file.
    assert!(doc.select(&sel("svg")).count() >= 6);
    assert_eq!(doc.select(&sel("section.series svg.chart")).count(), 6);
    for e in doc
        .root_element()
        .descendants()
        .filter_map(ElementRef::wrap)
    {
        for (name, value) in e.value().attrs() {
            let name = name.to_ascii_lowercase();
            assert!(!name.starts_with("on"), "event handler {name}={value}");
            if [
                "src",
                "href",
                "xlink:href",
                "action",
                "srcset",
                "poster",
                "data",
            ]
            .contains(&name.as_str())
            {
                assert!(value.starts_with('#'), "external reference {name}={value}");
            }
            if value.contains("url(") {
                assert!(value.contains("url(#"), "external url in {name}={value}");
            }
        }
    }
    let style: String = doc.select(&sel("style")).map(text).collect();
    assert!(!style.contains("url(") && !style.contains("@import"));
    assert!(style.contains("@media print") && style.contains("break-before: page"));

    // The caution, as the findings carry it.
    assert!(
        doc.select(&sel(".caution"))
            .any(|c| text(c).contains(slopewarden::raise::CAUTION))
    );

    // The slope shown for each series is the one `status --json` reports.
    let status = site.json(&["status", "--json"]);
    assert_eq!(status.len(), 3);
    let rows: Vec<ElementRef<'_>> = doc.select(&sel("table.overview tbody tr")).collect();
    assert_eq!(rows.len(), 3);
    for s in &status {
        let key = s["series"].as_str().unwrap();
        let row = rows
            .iter()
            .find(|r| text(r.select(&sel("td")).next().unwrap()) == key)
            .unwrap_or_else(|| panic!("no overview row for {key:?}"));
        let shown = shown_number(&text(row.select(&sel("td.slope")).next().unwrap()));
        let want = s["slope"].as_f64().unwrap();
        assert!(
            agrees_to_4_digits(shown, want),
            "{key}: shown {shown}, status {want}"
        );
        let n: i64 = text(row.select(&sel("td.n")).next().unwrap())
            .parse()
            .unwrap();
        assert_eq!(n, s["n"].as_i64().unwrap(), "{key}");
        // And in the series' own figures.
        let own = section(&doc, key)
            .select(&sel(".current-slope"))
            .next()
            .map(text)
            .unwrap();
        assert!(agrees_to_4_digits(shown_number(&own), want), "{key}: {own}");
    }

    // The flagged record is labelled on Quarry Lane's scatter, and only
    // there.
    let quarry = section(&doc, QUARRY);
    // A series this short has its robust slope recomputed at every refit,
    // so the current version (after the slip and the verdict) shows its
    // own, with no "as of" (tests/daemon.rs checks the longer case).
    let figure = |label: &str| -> String {
        let th = quarry
            .select(&sel("table.figures th"))
            .find(|th| text(*th) == label)
            .unwrap_or_else(|| panic!("no {label:?} in the figures"));
        let td = th
            .next_siblings()
            .filter_map(ElementRef::wrap)
            .next()
            .unwrap();
        text(td)
    };
    let theil_sen = figure("Theil-Sen slope (robust)");
    let first = theil_sen.split_whitespace().next().unwrap();
    assert!(shown_number(first).is_finite(), "{theil_sen}");
    assert!(!theil_sen.contains("as of"), "{theil_sen}");
    let mann_kendall = figure("Mann-Kendall p");
    assert!(!mann_kendall.contains("as of"), "{mann_kendall}");
    let labels: Vec<String> = quarry
        .select(&sel("svg text.flag-label"))
        .map(text)
        .collect();
    assert_eq!(labels, [SLIPPED]);
    assert_eq!(doc.select(&sel("svg text.flag-label")).count(), 1);

    // The fit with and without it, as the finding recorded them.
    let with = quarry
        .select(&sel("table.with-without td.slope.with"))
        .next()
        .unwrap();
    let without = quarry
        .select(&sel("table.with-without td.slope.without"))
        .next()
        .unwrap();
    let detail = &finding["detail"];
    assert!(agrees_to_4_digits(
        shown_number(&text(with)),
        detail["fit_with"]["slope"].as_f64().unwrap()
    ));
    assert!(agrees_to_4_digits(
        shown_number(&text(without)),
        detail["fit_without"]["slope"].as_f64().unwrap()
    ));
    // Ten times too large drags the slope far up: the two must differ.
    assert!(
        (shown_number(&text(with)) - shown_number(&text(without))).abs() > 1.0,
        "with {} vs without {}",
        text(with),
        text(without)
    );

    // The slope history has every fit version (a.csv, b.csv, the verdict)
    // and marks the refit the verdict triggered.
    let history: Vec<ElementRef<'_>> = quarry.select(&sel("table.history tbody tr")).collect();
    assert_eq!(history.len(), 3);
    // Each version gives its Theil-Sen slope beside least squares (a series
    // this short has it recomputed at every refit). The slip moved the
    // least-squares slope far more than the median of pairwise slopes,
    // which one point among many cannot drag.
    let cells =
        |row: &ElementRef<'_>| -> Vec<String> { row.select(&sel("td")).map(text).collect() };
    let (first, second) = (cells(&history[0]), cells(&history[1]));
    let slope = |c: &[String]| shown_number(&c[4]);
    let robust = |c: &[String]| shown_number(&c[7]);
    assert!(
        robust(&first).is_finite() && robust(&second).is_finite(),
        "{first:?} {second:?}"
    );
    assert!(
        (robust(&second) - robust(&first)).abs() < (slope(&second) - slope(&first)).abs(),
        "{first:?} {second:?}"
    );
    assert_eq!(
        quarry
            .select(&sel("table.history tr.verdict-refit"))
            .count(),
        1
    );
    let marks: Vec<String> = quarry
        .select(&sel("svg text.verdict-label"))
        .map(text)
        .collect();
    assert_eq!(marks, [format!("verdict {verdict}: confirmed")]);

    // The verdict log shows the note as text; a series without verdicts
    // says so.
    let log = quarry.select(&sel("table.verdicts")).next().unwrap();
    assert!(text(log).contains("lab sheet <i>checked</i>; value stands"));
    assert!(text(log).contains("R. Example"));
    assert!(text(scripted).contains("No verdicts recorded for this series."));
    // The record's note is text in the diagnostics table.
    let diagnostics = quarry.select(&sel("table.diagnostics")).next().unwrap();
    assert!(text(diagnostics).contains("decimal <b>slip</b>?"));
}

#[test]
fn the_csv_exports_neutralise_formulas_and_keep_numbers_numeric() {
    let site = site();
    let finding = slip_finding(&site);
    record_verdict(
        &site,
        finding["id"].as_i64().unwrap(),
        "=HYPERLINK(\"http://example.invalid\") checked",
    );
    let out = site.path("exports/trend.csv");
    std::fs::create_dir_all(out.parent().unwrap()).unwrap();
    let printed = site.ok(&["report", "--format", "csv", "--out", out.to_str().unwrap()]);
    let printed = String::from_utf8_lossy(&printed.stdout).into_owned();

    let read = |name: &str| -> (csv::StringRecord, Vec<csv::StringRecord>) {
        let path = site.path(&format!("exports/{name}"));
        assert!(printed.contains(path.to_str().unwrap()), "{printed}");
        let mut r = csv::Reader::from_path(path).unwrap();
        let header = r.headers().unwrap().clone();
        (header, r.records().map(Result::unwrap).collect())
    };
    let col =
        |header: &csv::StringRecord, name: &str| header.iter().position(|h| h == name).unwrap();

    // Fits: the formula-named series is neutralised with a leading quote
    // (OWASP's CSV injection guidance, as commonly applied: cells starting
    // with = + - @ tab or CR; recalled from memory); slopes stay numeric,
    // the negative one included, and are the ones `status --json` reports.
    let (header, fits) = read("trend-fits.csv");
    let series = col(&header, "series");
    let slope = col(&header, "slope");
    let current = col(&header, "current");
    for row in &fits {
        let first = row[series].chars().next().unwrap();
        assert!(
            !"=+-@\t\r".contains(first),
            "unneutralised {:?}",
            &row[series]
        );
    }
    let status = site.json(&["status", "--json"]);
    for s in &status {
        let key = s["series"].as_str().unwrap();
        let shown_key = if key.starts_with('=') {
            format!("'{key}")
        } else {
            key.to_string()
        };
        let row = fits
            .iter()
            .find(|r| r[series] == *shown_key && &r[current] == "1")
            .unwrap_or_else(|| panic!("no current fit row for {shown_key:?}"));
        let v: f64 = row[slope].parse().unwrap();
        // Written in full (shortest round-trip digits); serde_json's
        // default float parsing may land one ulp off, hence the 1e-15.
        let want = s["slope"].as_f64().unwrap();
        assert!(
            (v - want).abs() <= 1e-15 * want.abs(),
            "{key}: {v} vs {want}"
        );
    }
    let falling = fits.iter().find(|r| &r[series] == "'=SUM(1+1)").unwrap();
    assert!(falling[slope].starts_with('-'));
    assert!(falling[slope].parse::<f64>().unwrap() < 0.0);
    // Every fit version of every series: 1 + 1 + 3 (a.csv, b.csv, verdict).
    assert_eq!(fits.len(), 5);

    // Findings: the fits with and without the record are numbers.
    let (header, findings) = read("trend-findings.csv");
    assert_eq!(findings.len(), 1);
    let with: f64 = findings[0][col(&header, "with_slope")].parse().unwrap();
    let without: f64 = findings[0][col(&header, "without_slope")].parse().unwrap();
    for (got, key) in [(with, "fit_with"), (without, "fit_without")] {
        let want = finding["detail"][key]["slope"].as_f64().unwrap();
        assert!(
            (got - want).abs() <= 1e-15 * want.abs(),
            "{key}: {got} vs {want}"
        );
    }

    // Verdicts: the note that starts with = is neutralised, nothing else
    // is touched.
    let (header, verdicts) = read("trend-verdicts.csv");
    assert_eq!(verdicts.len(), 1);
    assert_eq!(
        &verdicts[0][col(&header, "note")],
        "'=HYPERLINK(\"http://example.invalid\") checked"
    );
    assert_eq!(&verdicts[0][col(&header, "record_id")], SLIPPED);
    assert_eq!(&verdicts[0][col(&header, "series")], QUARRY);
}

/// A report with open findings tells its reader what to do next (check
/// the records, then give a verdict); one without says nothing of the kind.
#[test]
fn open_findings_come_with_what_to_do_next() {
    let site = site();
    slip_finding(&site);
    let next = |raw: &str| -> Option<String> {
        let doc = Html::parse_document(raw);
        doc.select(&sel("header p.next")).next().map(text)
    };
    assert!(!site.json(&["findings", "--open", "--json"]).is_empty());
    let said = next(&site.report_html(&[])).expect("a next step with open findings");
    assert!(said.contains("slopewarden review ID --verdict"), "{said}");
    assert!(said.contains("do not act on the trends"), "{said}");

    // Every open finding given a verdict: no next step is left to ask for.
    for f in site.json(&["findings", "--open", "--json"]) {
        record_verdict(&site, f["id"].as_i64().unwrap(), "checked");
    }
    assert!(site.json(&["findings", "--open", "--json"]).is_empty());
    assert_eq!(next(&site.report_html(&[])), None);
}

#[test]
fn a_series_pattern_filters_and_an_invalid_one_is_refused() {
    let site = site();
    let raw = site.report_html(&["--series", "Quarry*"]);
    let doc = Html::parse_document(&raw);
    let keys: Vec<String> = doc.select(&sel("section.series h2")).map(text).collect();
    assert_eq!(keys, [QUARRY]);
    assert!(!raw.contains("alert(1)"));

    // Nothing matches: a report that says so, not an error.
    let raw = site.report_html(&["--series", "Birch Hollow/*"]);
    let doc = Html::parse_document(&raw);
    assert_eq!(doc.select(&sel("section.series")).count(), 0);
    assert!(raw.contains("No series match."));

    // An invalid glob: refused with the pattern named, nothing written.
    let out = site.path("bad.html");
    let refused = site.run(&["report", "--series", "[MW", "--out", out.to_str().unwrap()]);
    assert_eq!(refused.status.code(), Some(2));
    let err = String::from_utf8_lossy(&refused.stderr);
    assert!(err.contains("`[MW` is not a valid series pattern"), "{err}");
    assert!(!Path::new(&out).exists());
}

#[test]
fn records_outside_the_analysis_window_are_drawn_apart_from_the_fit() {
    let site = site();
    // The current fit of Quarry Lane as if it had been made on the window
    // x ≥ 2012 (only the window text changes: the report draws what the
    // fit version says it used).
    site.db()
        .execute(
            "UPDATE fits SET window = 'x:2012..'
             WHERE id = (SELECT latest_fit FROM series WHERE key = ?1)",
            [QUARRY],
        )
        .unwrap();
    let raw = site.report_html(&["--series", "Quarry*"]);
    let doc = Html::parse_document(&raw);
    let quarry = section(&doc, QUARRY);
    // The 8 quarterly records of 2010 and 2011 lie before the window.
    let tips: Vec<String> = quarry.select(&sel("svg g.point title")).map(text).collect();
    assert_eq!(tips.len(), 21);
    let outside: Vec<&String> = tips
        .iter()
        .filter(|t| t.contains("outside the analysis window"))
        .collect();
    assert_eq!(outside.len(), 8, "{outside:#?}");
    assert!(
        outside
            .iter()
            .all(|t| t.contains("x = 2010") || t.contains("x = 2011"))
    );
    let facts = text(quarry.select(&sel("dl.facts")).next().unwrap());
    assert!(
        facts.contains("13 in the fit, 8 outside the analysis window"),
        "{facts}"
    );
    assert!(facts.contains("x:2012.."), "{facts}");

    // Without the window every record is in the fit again.
    site.db()
        .execute("UPDATE fits SET window = NULL", [])
        .unwrap();
    let raw = site.report_html(&["--series", "Quarry*"]);
    assert!(!raw.contains("outside the analysis window"));
}
