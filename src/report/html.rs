//! The HTML report: one self-contained file (inline CSS and SVG, no
//! scripts, no external references) that reads on screen and prints on
//! paper: a summary page, then one section per series, each starting on a
//! new page.
//!
//! Every string that comes from the store (keys, record ids, units, file
//! names, notes, summaries) goes through [`html`] before it lands in the
//! page, in text and in attributes alike.

use std::collections::{BTreeMap, HashMap, HashSet};
use std::fmt::Write as _;

use crate::stats::{LineFit, Moments, MomentsParts, Transform};
use crate::store::{
    RecordStatus, ReportFindingRow, ReportFitRow, ReportRecordRow, ReportVerdictRow,
};

use super::band::{grid, mean_band};
use super::data::{DetailFit, SeriesData, detail_fit, line_stats};
use super::escape::html;
use super::format::{html_number, level as level_text, opt, opt_p, sig, trimmed};
use super::svg::{Flag, HistoryPoint, Marker, PlotPoint, Scatter, history, scatter};

/// Significant digits of the numbers people read.
const DIGITS: usize = 4;

/// The report's stylesheet (also used by the HTTP overview page).
pub const STYLE: &str = r#"
:root { color-scheme: light; }
html { background: #ffffff; }
body { margin: 0 auto; max-width: 62rem; padding: 1.5rem 1.5rem 3rem; background: #ffffff; color: #1a1a1a;
  font-family: "Segoe UI", "Helvetica Neue", Helvetica, Arial, "Liberation Sans", "DejaVu Sans", sans-serif;
  font-size: 15px; line-height: 1.45; }
h1 { font-size: 1.75rem; margin: 0 0 .25rem; font-weight: 650; letter-spacing: -.01em; }
h2 { font-size: 1.3rem; margin: 2rem 0 .5rem; padding-bottom: .2rem; border-bottom: 2px solid #1a1a1a; }
h3 { font-size: 1.04rem; margin: 1.6rem 0 .35rem; }
p { margin: .35rem 0 .6rem; }
.kicker { text-transform: uppercase; letter-spacing: .08em; font-size: .75rem; color: #555555; margin: 0; }
.meta { color: #444444; }
.key { overflow-wrap: anywhere; font-weight: 650; }
.caution { border: 1px solid #b4380c; border-left-width: 5px; padding: .55rem .9rem; margin: 1rem 0 1.2rem; }
.caution strong { color: #8a2a09; }
table { border-collapse: collapse; width: 100%; margin: .35rem 0 .8rem; font-size: .86rem;
  font-variant-numeric: tabular-nums; }
caption { text-align: left; font-size: .85rem; color: #444444; padding-bottom: .2rem; }
th, td { border-bottom: 1px solid #d6d6d6; padding: .24rem .45rem; text-align: left; vertical-align: top; }
thead th { border-bottom: 1.5px solid #1a1a1a; font-weight: 600; background: #f3f3f3; }
th.num, td.num { text-align: right; white-space: nowrap; }
td.num .aside { display: block; white-space: normal; }
td.text { overflow-wrap: break-word; }
td.when { white-space: nowrap; }
sup { font-size: .72em; line-height: 0; vertical-align: .5em; }
tr.without td { color: #333333; }
tr.pair-start td { border-top: 1.5px solid #9a9a9a; }
table.figures th { font-weight: 500; color: #333333; background: none; border-bottom: 1px solid #d6d6d6; width: 30%; }
table.figures td { width: 20%; }
table.compact { font-size: .78rem; }
table.compact td, table.compact th { padding: .12rem .4rem; }
figure { margin: .6rem 0 1rem; break-inside: avoid; }
svg.chart { display: block; width: 100%; max-width: 760px; height: auto; }
figcaption { font-size: .84rem; color: #444444; margin-top: .3rem; max-width: 760px; }
.facts { display: grid; grid-template-columns: max-content 1fr; gap: .1rem 1rem; margin: .4rem 0 .8rem; font-size: .92rem; }
.facts dt { color: #555555; }
.facts dd { margin: 0; overflow-wrap: anywhere; }
.muted { color: #5a5a5a; }
.empty { color: #5a5a5a; font-style: italic; }
.sev-alert { color: #8a1c07; font-weight: 600; }
.sev-warning { color: #6b4400; font-weight: 600; }
.status-open { font-weight: 600; }
ul.measures { margin: .2rem 0 0; padding-left: 1.1rem; font-size: .8rem; color: #333333; }
ul.notes { padding-left: 1.2rem; }
ul.notes li { margin: .2rem 0; }
section.series { margin-top: 3.5rem; }
a { color: #1f4e79; }
@page { size: A4; margin: 14mm 12mm 16mm; }
@media print {
  body { max-width: none; padding: 0; font-size: 9.5pt; }
  a { color: inherit; text-decoration: none; }
  section.series { break-before: page; margin-top: 0; }
  h2, h3 { break-after: avoid; }
  tr, figure, .caution { break-inside: avoid; }
  thead { display: table-header-group; }
  svg.chart { max-width: 100%; }
}
"#;

/// The end of the page, after the last series.
pub const TAIL: &str = "</body>\n</html>\n";

/// What the summary page shows of one series (its row in the overview
/// table), kept while the series' own section is written and dropped.
#[derive(Debug, Clone)]
pub struct Glance {
    id: i64,
    key: String,
    open_findings: i64,
    fit: Option<ReportFitRow>,
    slope_unit: String,
}

impl Glance {
    /// The overview row of a series.
    pub fn of(s: &SeriesData) -> Glance {
        Glance {
            id: s.row.id.0,
            key: s.row.key.clone(),
            open_findings: s.row.open_findings,
            fit: s.current_fit().cloned(),
            slope_unit: s.labels().slope_unit,
        }
    }
}

/// The page up to the first series' section: the head, and the summary
/// page over `glances` (the series in report order) and `loose` (findings
/// about files and feeds).
pub fn head(
    glances: &[Glance],
    loose: &[ReportFindingRow],
    pattern: Option<&str>,
    generated_at: &str,
) -> String {
    let mut out = String::with_capacity(64 * 1024);
    out.push_str("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n");
    // No script may run, whatever the data holds: belt and braces beside
    // the escaping.
    out.push_str(
        "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; style-src 'unsafe-inline'; img-src data:\">\n",
    );
    out.push_str("<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n");
    let _ = writeln!(
        out,
        "<meta name=\"generator\" content=\"slopewarden {}\">",
        env!("CARGO_PKG_VERSION")
    );
    let _ = writeln!(
        out,
        "<title>Trend report, generated {}</title>",
        html(generated_at)
    );
    let _ = writeln!(out, "<style>{STYLE}</style>\n</head>\n<body>");
    summary_page(&mut out, glances, loose, pattern, generated_at);
    out
}

/// A number for HTML, at the report's precision.
fn num(v: Option<f64>) -> String {
    html_number(&opt(v, DIGITS))
}

fn p_html(p: Option<f64>) -> String {
    html_number(&opt_p(p))
}

fn interval(lo: Option<f64>, hi: Option<f64>) -> String {
    match (lo, hi) {
        (Some(a), Some(b)) => format!(
            "[{}, {}]",
            html_number(&sig(a, DIGITS)),
            html_number(&sig(b, DIGITS))
        ),
        _ => "—".into(),
    }
}

fn date_of(stamp: &str) -> String {
    html(stamp.split('T').next().unwrap_or(stamp))
}

fn words(kind: &str) -> String {
    kind.replace('_', " ")
}

fn non_detect_policy(policy: &str) -> String {
    match policy.strip_prefix("substitute:") {
        Some(fraction) => format!("entered at {fraction} × the reporting limit"),
        None if policy == "exclude" => "left out of the fit".into(),
        None => policy.to_string(),
    }
}

fn summary_page(
    out: &mut String,
    glances: &[Glance],
    loose: &[ReportFindingRow],
    pattern: Option<&str>,
    generated_at: &str,
) {
    let open: i64 = glances.iter().map(|s| s.open_findings).sum::<i64>()
        + loose.iter().filter(|f| f.status.is_open()).count() as i64;
    out.push_str(
        "<header class=\"summary\">\n<p class=\"kicker\">slopewarden</p>\n<h1>Trend report</h1>\n",
    );
    let _ = writeln!(
        out,
        "<p class=\"meta\">Generated <time datetime=\"{g}\">{g}</time> · {n} series{filter} · {open} open finding{s}</p>",
        g = html(generated_at),
        n = glances.len(),
        filter = pattern.map_or(String::new(), |p| format!(
            " matching <code>{}</code>",
            html(p)
        )),
        s = if open == 1 { "" } else { "s" },
    );
    if open > 0 {
        // What the reader does next: the open findings' records are
        // unverified, and the trends they touch wait on them.
        out.push_str(
            "<p class=\"next\">Open findings await a verdict. Check each record concerned \
             (field sheet, chain of custody, laboratory report), then record what it was with \
             <code>slopewarden review ID --verdict confirmed|corrected|excluded --note \"...\"</code>; \
             <code>slopewarden show ID</code> gives a finding in full. Until then, do not act on \
             the trends those records touch.</p>\n",
        );
    }
    let _ = write!(
        out,
        "<aside class=\"caution\" role=\"note\"><strong>Caution.</strong> {}</aside>\n</header>\n",
        html(crate::raise::CAUTION)
    );

    out.push_str("<h2>Series at a glance</h2>\n");
    if glances.is_empty() {
        out.push_str("<p class=\"empty\">No series match.</p>\n");
    } else {
        let levels: Vec<f64> = glances
            .iter()
            .filter_map(|s| s.fit.as_ref().map(|f| f.level))
            .collect();
        let common = levels
            .first()
            .copied()
            .filter(|l| levels.iter().all(|m| (m - l).abs() < 1e-12));
        let ci_head = common.map_or("Confidence interval".to_string(), |l| {
            format!("{} CI", level_text(l))
        });
        let _ = write!(
            out,
            "<table class=\"overview\">\n<thead><tr><th>Series</th><th class=\"num\">n</th><th class=\"num\">Slope</th><th>Slope unit</th><th class=\"num\">{ci_head}</th><th class=\"num\">p</th><th class=\"num\">Open findings</th><th>Last refit</th></tr></thead>\n<tbody>\n"
        );
        for s in glances {
            let f = s.fit.as_ref();
            let ci = match f {
                Some(f) if common.is_none() => format!(
                    "{} ({})",
                    interval(f.slope_ci_low, f.slope_ci_high),
                    level_text(f.level)
                ),
                Some(f) => interval(f.slope_ci_low, f.slope_ci_high),
                None => "—".into(),
            };
            let _ = writeln!(
                out,
                "<tr><td class=\"text\"><a href=\"#series-{id}\" class=\"key\">{key}</a></td><td class=\"num n\">{n}</td><td class=\"num slope\">{slope}</td><td>{unit}</td><td class=\"num ci\">{ci}</td><td class=\"num p\">{p}</td><td class=\"num\">{open}</td><td>{at}</td></tr>",
                id = s.id,
                key = html(&s.key),
                n = f.map_or(0, |f| f.n),
                slope = num(f.and_then(|f| f.slope)),
                unit = html(&s.slope_unit),
                p = p_html(f.and_then(|f| f.slope_p)),
                open = s.open_findings,
                at = f.map_or("—".into(), |f| date_of(&f.created_at)),
            );
        }
        out.push_str("</tbody>\n</table>\n");
        out.push_str("<p class=\"muted\">Slopes and intervals are on each series' fitted scale (see the slope unit); p is two-sided, against a slope of zero. n counts the records in the current fit.</p>\n");
    }

    if !loose.is_empty() {
        out.push_str("<h2>Findings about files and feeds</h2>\n<p class=\"muted\">Not tied to a series: files or rows set aside, feeds gone quiet.</p>\n");
        findings_table(out, loose, true);
    }

    out.push_str(
        "<h2>Reading this report</h2>\n<ul class=\"notes\">\n\
<li>Each series starts on a new page: its records with the current least-squares line, the fit's figures, every flagged record's effect on the slope, the slope across fit versions, its findings and the verdicts on them.</li>\n\
<li>The shaded band around the line is the confidence band for the mean at the fit's level: where the line itself may lie, not where single records are expected to fall.</li>\n\
<li>A ringed point carries its record id: a finding concerns it. Hollow and crossed markers are records outside the current fit: earlier versions, resubmissions awaiting review, records excluded by a verdict, non-detects left out.</li>\n\
<li>\"With and without\" tables show the fit as computed when a finding was raised, once including the record and once without it.</li>\n\
<li>Leverage, studentized residual, Cook's distance, DFFITS and DFBETAS are those computed when the record joined its fit.</li>\n\
<li>Numbers carry four significant digits; small p-values are in scientific notation; — marks a value that is not defined, for instance with fewer than three records.</li>\n\
</ul>\n",
    );
}

/// Which records findings concern: record row → (record id, any open).
fn flagged(s: &SeriesData) -> HashMap<i64, Flag> {
    let mut current: HashMap<&str, i64> = HashMap::new();
    for r in s
        .records
        .iter()
        .filter(|r| r.status == RecordStatus::Current)
    {
        current.insert(r.record_id.as_str(), r.row);
    }
    let mut map: HashMap<i64, Flag> = HashMap::new();
    for f in &s.findings {
        let rows: Vec<i64> = match f.record_row {
            Some(row) => vec![row],
            None if f.kinds.iter().any(|k| k == "conflict") => f
                .record_ids
                .iter()
                .filter_map(|id| current.get(id.as_str()).copied())
                .collect(),
            None => Vec::new(),
        };
        for row in rows {
            let Some(r) = s.records.iter().find(|r| r.row == row) else {
                continue;
            };
            let open = f.status.is_open();
            map.entry(row)
                .and_modify(|flag| flag.open |= open)
                .or_insert(Flag {
                    label: r.record_id.clone(),
                    open,
                });
        }
    }
    map
}

/// The record rows inside the current fit's analysis window, when it has
/// one: its eligible points (current, in the fit, not excluded) in arrival
/// order, selected as the fit selected them (`crate::window`). `None`:
/// no window, or one this report cannot read (then every eligible point
/// counts as in the fit).
fn window_rows(s: &SeriesData) -> Option<HashSet<i64>> {
    let text = s.current_fit()?.window.as_deref()?;
    let window = crate::window::Window::parse(text)
        .ok()?
        .on_fit_scale(s.transform());
    let eligible: Vec<(i64, f64)> = s
        .records
        .iter()
        .filter(|r| r.status == RecordStatus::Current && r.in_fit && !r.excluded)
        .filter_map(|r| r.fit_x.map(|x| (r.row, x)))
        .collect();
    Some(
        window
            .select(&eligible, |p| p.1)
            .into_iter()
            .map(|p| p.0)
            .collect(),
    )
}

fn marker_of(r: &ReportRecordRow, window: Option<&HashSet<i64>>) -> Marker {
    match r.status {
        RecordStatus::Superseded => Marker::Superseded,
        RecordStatus::Proposed => Marker::Proposed,
        _ if r.excluded => Marker::Excluded,
        _ if r.in_fit && window.is_some_and(|w| !w.contains(&r.row)) => Marker::OutsideWindow,
        _ if r.in_fit && r.censored => Marker::InFitNonDetect,
        _ if r.in_fit => Marker::InFit,
        _ if r.censored => Marker::NonDetectOut,
        _ => Marker::OutOfFit,
    }
}

fn record_state(r: &ReportRecordRow, window: Option<&HashSet<i64>>) -> &'static str {
    match marker_of(r, window) {
        Marker::OutsideWindow => "outside the analysis window",
        Marker::InFit => "in the fit",
        Marker::InFitNonDetect => "non-detect, in the fit at a substituted value",
        Marker::NonDetectOut => "non-detect, not in the fit",
        Marker::OutOfFit => "not in the fit",
        Marker::Excluded => "excluded by a verdict",
        Marker::Superseded => "earlier version, replaced",
        Marker::Proposed => "resubmitted version awaiting review",
    }
}

/// The record's point on the fitted scale: as stored when in the fit,
/// else transformed here (`None` when the scale cannot show it, e.g. a
/// zero on a log scale).
fn fitted_point(r: &ReportRecordRow, t: Transform) -> Option<(f64, f64)> {
    match (r.fit_x, r.fit_y) {
        (Some(x), Some(y)) => Some((x, y)),
        _ => t.apply(0, r.x, r.y).ok(),
    }
}

/// One series' section of the page.
pub fn series_section(out: &mut String, s: &SeriesData) {
    let id = s.row.id.0;
    let labels = s.labels();
    let transform = s.transform();
    let fit = s.current_fit();
    let unit = s.unit().unwrap_or("unit not stated");
    let _ = write!(
        out,
        "<section class=\"series\" id=\"series-{id}\" aria-labelledby=\"series-{id}-h\">\n<h2 id=\"series-{id}-h\"><span class=\"key\">{}</span></h2>\n",
        html(&s.row.key)
    );

    // Facts.
    let window = window_rows(s);
    let window = window.as_ref();
    let current: Vec<&ReportRecordRow> = s
        .records
        .iter()
        .filter(|r| r.status == RecordStatus::Current)
        .collect();
    let in_fit = current
        .iter()
        .filter(|r| matches!(marker_of(r, window), Marker::InFit | Marker::InFitNonDetect))
        .count();
    let outside = current
        .iter()
        .filter(|r| marker_of(r, window) == Marker::OutsideWindow)
        .count();
    let excluded = current.iter().filter(|r| r.excluded).count();
    let censored = current.iter().filter(|r| r.censored).count();
    let superseded = s
        .records
        .iter()
        .filter(|r| r.status == RecordStatus::Superseded)
        .count();
    let proposed = s
        .records
        .iter()
        .filter(|r| r.status == RecordStatus::Proposed)
        .count();
    out.push_str("<dl class=\"facts\">\n");
    let _ = writeln!(out, "<dt>Unit of y</dt><dd>{}</dd>", html(unit));
    // What x is: as configured, else as read from its range.
    let x_is = match (s.row.x_name.as_deref(), s.row.x_unit.as_deref()) {
        (Some(name), Some(u)) => format!("{name}, in {u}"),
        (Some(name), None) => format!("{name} (unit not stated)"),
        (None, Some(u)) => format!("in {u}"),
        (None, None) if s.x_is_year() => "the sampling date, as a decimal year".to_string(),
        (None, None) => {
            "as recorded (its name and unit are not configured: x_name, x_unit)".to_string()
        }
    };
    let _ = writeln!(out, "<dt>x</dt><dd>{}</dd>", html(&x_is));
    let _ = writeln!(
        out,
        "<dt>Fitted scale</dt><dd>{} (slope in {})</dd>",
        html(&labels.scale),
        html(&labels.slope_unit)
    );
    let _ = writeln!(
        out,
        "<dt>Non-detects</dt><dd>{}</dd>",
        html(&non_detect_policy(&s.row.non_detects))
    );
    let _ = writeln!(
        out,
        "<dt>Records</dt><dd>{} current: {in_fit} in the fit, {}{excluded} excluded by a verdict, {censored} non-detect{}; {superseded} earlier version{} replaced; {proposed} resubmission{} awaiting review</dd>",
        current.len(),
        if outside > 0 || window.is_some() {
            format!("{outside} outside the analysis window, ")
        } else {
            String::new()
        },
        if censored == 1 { "" } else { "s" },
        if superseded == 1 { "" } else { "s" },
        if proposed == 1 { "" } else { "s" },
    );
    if let Some(w) = fit.and_then(|f| f.window.as_deref()) {
        let _ = writeln!(
            out,
            "<dt>Analysis window</dt><dd><code>{}</code>: only records inside it enter the fit; the others stay stored and are drawn hollow</dd>",
            html(w)
        );
    }
    match fit {
        Some(f) => {
            let _ = writeln!(
                out,
                "<dt>Current fit</dt><dd>version {}, computed {}, {}</dd>",
                f.version,
                html(&f.created_at),
                trigger_text(f)
            );
        }
        None => out.push_str("<dt>Current fit</dt><dd>none yet</dd>\n"),
    }
    out.push_str("</dl>\n");

    if let Some(f) = fit {
        // Past ROBUST_EVERY_REFIT_UP_TO points the robust slope is
        // recomputed as a series doubles; between times, the newest
        // computed one is shown with its version.
        let robust = s
            .fits
            .iter()
            .filter(|r| r.version <= f.version && r.theil_sen_slope.is_some())
            .max_by_key(|r| r.version);
        figures_table(out, f, robust, transform, &labels);
    }

    // The scatter.
    let flags = flagged(s);
    out.push_str(&scatter_figure(s, &flags, window));

    with_without(out, s, &labels);
    diagnostics_table(out, s, &flags, window);
    slope_history(out, s, &labels.slope_unit);

    out.push_str("<h3>Findings</h3>\n");
    if s.findings.is_empty() {
        out.push_str("<p class=\"empty\">No findings for this series.</p>\n");
    } else {
        findings_table(out, &s.findings, false);
    }
    out.push_str("<h3>Verdict log</h3>\n");
    if s.verdicts.is_empty() {
        out.push_str("<p class=\"empty\">No verdicts recorded for this series.</p>\n");
    } else {
        verdict_table(out, &s.verdicts);
    }
    out.push_str("</section>\n");
}

/// The scatter of a series for the HTTP overview page: the same figure
/// as in the series' section of the report.
pub fn series_scatter(s: &SeriesData) -> String {
    let window = window_rows(s);
    scatter_figure(s, &flagged(s), window.as_ref())
}

/// A series' records on the fitted scale with the current line and its
/// confidence band, as a `<figure>` with its caption (a note when there
/// is nothing to draw).
fn scatter_figure(
    s: &SeriesData,
    flags: &HashMap<i64, Flag>,
    window: Option<&HashSet<i64>>,
) -> String {
    let mut out = String::new();
    let id = s.row.id.0;
    let labels = s.labels();
    let transform = s.transform();
    let fit = s.current_fit();
    let unit = s.unit().unwrap_or("unit not stated");
    // What x is called in a point's tip: its configured name and unit.
    let x_name = s.row.x_name.as_deref().unwrap_or("x");
    let x_unit = s
        .row
        .x_unit
        .as_deref()
        .map_or(String::new(), |u| format!(" {u}"));
    let mut unplottable = 0usize;
    let points: Vec<PlotPoint> = s
        .records
        .iter()
        .filter_map(|r| {
            let Some((x, y)) = fitted_point(r, transform) else {
                unplottable += 1;
                return None;
            };
            let flag = flags.get(&r.row).cloned();
            let tip = format!(
                "{} (version {}): {x_name} = {}{x_unit}, y = {}{} {}; {}{}{}{}",
                r.record_id,
                r.version,
                trimmed(r.x, 6),
                if r.censored { "<" } else { "" },
                trimmed(r.y, 6),
                r.unit.as_deref().unwrap_or(unit),
                record_state(r, window),
                r.file
                    .as_deref()
                    .map_or(String::new(), |f| format!("; {f}, line {}", r.line)),
                if flag.is_some() {
                    "; a finding concerns it"
                } else {
                    ""
                },
                r.note
                    .as_deref()
                    .filter(|n| !n.trim().is_empty())
                    .map_or(String::new(), |n| format!("; note: {n}")),
            );
            Some(PlotPoint {
                x,
                y,
                marker: marker_of(r, window),
                flag,
                tip,
            })
        })
        .collect();
    let band = fit.and_then(|f| {
        let stats = line_stats(f)?;
        let in_fit_x = s
            .records
            .iter()
            .filter(|r| matches!(marker_of(r, window), Marker::InFit | Marker::InFitNonDetect))
            .filter_map(|r| r.fit_x);
        let (lo, hi) = match (f.x_min, f.x_max) {
            (Some(a), Some(b)) => (a, b),
            _ => in_fit_x.fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), x| {
                (a.min(x), b.max(x))
            }),
        };
        if !(lo.is_finite() && hi.is_finite()) {
            return None;
        }
        mean_band(&stats, &grid(lo, hi, 80))
    });
    if points.is_empty() {
        out.push_str("<p class=\"empty\">No records to draw.</p>\n");
    } else {
        let level = fit.map_or(0.95, |f| f.level);
        let chart = Scatter {
            id: format!("series-{id}-scatter"),
            title: format!("Records of {} with the current fit", s.row.key),
            description: format!(
                "{} records on the {} scale; {} flagged. {}",
                points.len(),
                labels.scale,
                points.iter().filter(|p| p.flag.is_some()).count(),
                fit.and_then(|f| f.slope).map_or(
                    "No fit line: too few records or no spread in x.".to_string(),
                    |b| format!("Fitted slope {} {}.", sig(b, DIGITS), labels.slope_unit)
                )
            ),
            points,
            band,
            level,
            x_label: labels.x_axis.clone(),
            y_label: labels.y_axis.clone(),
        };
        let _ = write!(
            out,
            "<figure>\n{}\n<figcaption>Records of <span class=\"key\">{}</span> on the {} scale, the current least-squares line over the range of x it was fitted on, and its {} confidence band for the mean.{}</figcaption>\n</figure>\n",
            scatter(&chart),
            html(&s.row.key),
            html(&labels.scale),
            level_text(level),
            if unplottable > 0 {
                format!(
                    " {unplottable} record{} cannot be drawn on this scale (zero or negative under a logarithm).",
                    if unplottable == 1 { "" } else { "s" }
                )
            } else {
                String::new()
            }
        );
    }

    out
}

fn trigger_text(f: &ReportFitRow) -> String {
    if let (None, Some((id, source))) = (&f.trigger_verdict, &f.trigger_window) {
        return format!(
            "after analysis-window change {id} ({})",
            match source.as_str() {
                "command" => "by command".to_string(),
                "config" => "from the configuration".to_string(),
                other => html(other),
            }
        );
    }
    match (&f.trigger_verdict, &f.trigger_file) {
        (Some(v), _) => format!(
            "after verdict {v}{}{}",
            f.trigger_verdict_kind
                .map_or(String::new(), |k| format!(" ({})", html(k.as_str()))),
            f.trigger_finding
                .map_or(String::new(), |g| format!(" on finding {g}"))
        ),
        (None, Some(file)) => format!("after file {}", html(file)),
        (None, None) => "trigger not recorded".into(),
    }
}

/// Where the robust figures were last computed, when not at this version.
fn as_of(robust: &ReportFitRow, current: &ReportFitRow) -> String {
    if robust.version == current.version {
        String::new()
    } else {
        format!(
            " <span class=\"muted aside\">(as of version {}, n = {}; past {} points, recomputed each time the series doubles)</span>",
            robust.version,
            robust.n,
            crate::pipeline::ROBUST_EVERY_REFIT_UP_TO
        )
    }
}

fn figures_table(
    out: &mut String,
    f: &ReportFitRow,
    robust: Option<&ReportFitRow>,
    transform: Transform,
    labels: &super::data::Labels,
) {
    let (slope_unit, y_unit) = (labels.slope_unit.as_str(), labels.y_unit.as_str());
    let mean_x = f.origin + f.mean_x_shifted;
    let mut cells: Vec<(String, String)> = vec![
        (
            "Slope (least squares)".into(),
            format!(
                "<span class=\"current-slope\">{}</span> {}",
                num(f.slope),
                html(slope_unit)
            ),
        ),
        (
            format!("{} confidence interval", level_text(f.level)),
            interval(f.slope_ci_low, f.slope_ci_high),
        ),
        ("p, two-sided (slope = 0)".into(), p_html(f.slope_p)),
        ("Records in the fit (n)".into(), f.n.to_string()),
        (
            format!(
                "Fitted level at mean x ({})",
                html_number(&trimmed(mean_x, 6))
            ),
            format!("{} {}", html_number(&sig(f.mean_y, DIGITS)), html(y_unit)),
        ),
        (
            labels.intercept.clone(),
            format!("{} {}", num(f.intercept), html(y_unit)),
        ),
        ("R²".into(), num(f.r_squared)),
        (
            "Residual standard deviation".into(),
            format!("{} {}", num(f.residual_sd), html(y_unit)),
        ),
        (
            "Theil-Sen slope (robust)".into(),
            match robust {
                Some(r) => format!(
                    "{} {}{}",
                    html_number(&sig(r.theil_sen_slope.unwrap_or(f64::NAN), DIGITS)),
                    interval(r.theil_sen_ci_low, r.theil_sen_ci_high),
                    as_of(r, f)
                ),
                None => "not computed yet".into(),
            },
        ),
        (
            "Mann-Kendall p".into(),
            match robust {
                Some(r) => format!("{}{}", p_html(r.mann_kendall_p), as_of(r, f)),
                None => "not computed yet".into(),
            },
        ),
    ];
    // The slope in original units, where a transform makes that readable.
    if transform != Transform::None
        && let Ok(line) = LineFit::from_moments(
            &Moments::from_parts(MomentsParts {
                n: f.n.max(0) as u64,
                origin: f.origin,
                mean_x: f.mean_x_shifted,
                mean_y: f.mean_y,
                sxx: f.sxx,
                sxy: f.sxy,
                syy: f.syy,
                sse: f.sse,
            }),
            f.level,
        )
        && let Some(o) = transform.original_units(&line)
    {
        cells.push((
            format!("In original units: {}", html(o.what)),
            format!(
                "{} [{}, {}]",
                html_number(&sig(o.estimate, DIGITS)),
                html_number(&sig(o.low, DIGITS)),
                html_number(&sig(o.high, DIGITS))
            ),
        ));
    }
    out.push_str("<table class=\"figures\">\n<caption>The current fit</caption>\n<tbody>\n");
    for pair in cells.chunks(2) {
        out.push_str("<tr>");
        for (k, v) in pair {
            let _ = write!(out, "<th scope=\"row\">{k}</th><td class=\"num\">{v}</td>");
        }
        if pair.len() == 1 {
            out.push_str("<th></th><td></td>");
        }
        out.push_str("</tr>\n");
    }
    out.push_str("</tbody>\n</table>\n");
    if let Some(note) = &f.note {
        let _ = writeln!(out, "<p class=\"muted\">Note: {}</p>", html(note));
    }
}

fn with_without(out: &mut String, s: &SeriesData, labels: &super::data::Labels) {
    let rows: Vec<(&ReportFindingRow, Option<DetailFit>, Option<DetailFit>)> = s
        .findings
        .iter()
        .map(|f| {
            let detail = f.detail_value();
            (
                f,
                detail_fit(&detail, "fit_with"),
                detail_fit(&detail, "fit_without"),
            )
        })
        .filter(|(_, w, wo)| w.is_some() || wo.is_some())
        .collect();
    out.push_str("<h3>Flagged records: the fit with and without each</h3>\n");
    if rows.is_empty() {
        out.push_str("<p class=\"empty\">No flagged records in this series.</p>\n");
        return;
    }
    let _ = write!(
        out,
        "<table class=\"with-without\">\n<caption>As computed when each finding was raised. Slope in {}; {} in {}.</caption>\n<thead><tr><th>Finding</th><th>Record</th><th>Fit</th><th class=\"num\">n</th><th class=\"num\">Slope</th><th class=\"num\">Confidence interval</th><th class=\"num\">p</th><th class=\"num\">Intercept</th></tr></thead>\n<tbody>\n",
        html(&labels.slope_unit),
        html(&labels.intercept.replacen("Intercept", "intercept", 1)),
        html(&labels.y_unit)
    );
    for (f, with, without) in rows {
        let record = if f.record_ids.is_empty() {
            "—".to_string()
        } else {
            html(&f.record_ids.join(", "))
        };
        let change = match (with.and_then(|w| w.slope), without.and_then(|w| w.slope)) {
            (Some(a), Some(b)) => format!(
                "<br><span class=\"muted\">slope change without it: {}</span>",
                html_number(&sig(b - a, DIGITS))
            ),
            _ => String::new(),
        };
        let line = |label: &str, fit: Option<DetailFit>, class: &str| {
            let fit = fit.unwrap_or(DetailFit {
                n: None,
                slope: None,
                ci_low: None,
                ci_high: None,
                p: None,
                intercept: None,
            });
            format!(
                "<td>{label}</td><td class=\"num\">{}</td><td class=\"num slope {class}\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td>",
                fit.n.map_or("—".into(), |n| n.to_string()),
                num(fit.slope),
                interval(fit.ci_low, fit.ci_high),
                p_html(fit.p),
                num(fit.intercept)
            )
        };
        let _ = writeln!(
            out,
            "<tr class=\"pair-start\"><td rowspan=\"2\" class=\"num\">{}</td><td rowspan=\"2\" class=\"text record\">{record}{change}</td>{}</tr>\n<tr class=\"without\">{}</tr>",
            f.id,
            line("with the record", with, "with"),
            line("without it", without, "without"),
        );
    }
    out.push_str("</tbody>\n</table>\n");
}

fn diagnostics_table(
    out: &mut String,
    s: &SeriesData,
    flags: &HashMap<i64, Flag>,
    window: Option<&HashSet<i64>>,
) {
    let mut rows: Vec<&ReportRecordRow> = s
        .records
        .iter()
        .filter(|r| flags.contains_key(&r.row))
        .collect();
    if rows.is_empty() {
        return;
    }
    rows.sort_by_key(|r| r.row);
    let unit = s.unit().unwrap_or("unit not stated");
    let _ = write!(
        out,
        "<table class=\"diagnostics\">\n<caption>Influence diagnostics of the flagged records, as computed when each joined its fit (y in {}).</caption>\n<thead><tr><th>Record</th><th>State</th><th class=\"num\">x</th><th class=\"num\">y</th><th class=\"num\">Leverage</th><th class=\"num\">Studentized residual</th><th class=\"num\">Cook's distance</th><th class=\"num\">DFFITS</th><th class=\"num\">DFBETAS (slope)</th><th>Note</th></tr></thead>\n<tbody>\n",
        html(unit)
    );
    for r in rows {
        let _ = writeln!(
            out,
            "<tr><td class=\"text\">{}{}</td><td>{}</td><td class=\"num\">{}</td><td class=\"num\">{}{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"text\">{}</td></tr>",
            html(&r.record_id),
            if r.version > 1 {
                format!(" <span class=\"muted\">(version {})</span>", r.version)
            } else {
                String::new()
            },
            record_state(r, window),
            html_number(&trimmed(r.x, 6)),
            if r.censored { "&lt;" } else { "" },
            html_number(&trimmed(r.y, 6)),
            num(r.leverage),
            num(r.studentized_residual),
            num(r.cooks_distance),
            num(r.dffits),
            num(r.dfbetas_slope),
            r.note.as_deref().map_or(String::new(), html),
        );
    }
    out.push_str("</tbody>\n</table>\n");
}

fn slope_history(out: &mut String, s: &SeriesData, slope_unit: &str) {
    out.push_str("<h3>Slope history</h3>\n");
    if s.fits.is_empty() {
        out.push_str("<p class=\"empty\">No fit versions yet.</p>\n");
        return;
    }
    let id = s.row.id.0;
    let points: Vec<HistoryPoint> = s
        .fits
        .iter()
        .filter_map(|f| {
            let slope = f.slope?;
            Some(HistoryPoint {
                version: f.version,
                slope,
                ci: f.slope_ci_low.zip(f.slope_ci_high),
                verdict: f.trigger_verdict.map(|v| {
                    format!(
                        "verdict {v}{}",
                        f.trigger_verdict_kind
                            .map_or(String::new(), |k| format!(": {k}"))
                    )
                }),
                tip: format!(
                    "version {}: slope {} [{}, {}], n = {}",
                    f.version,
                    sig(slope, DIGITS),
                    opt(f.slope_ci_low, DIGITS),
                    opt(f.slope_ci_high, DIGITS),
                    f.n
                ),
            })
        })
        .collect();
    let level = s.current_fit().map_or(0.95, |f| f.level);
    if points.is_empty() {
        out.push_str("<p class=\"empty\">No version has a slope yet (fewer than three records, or no spread in x).</p>\n");
    } else {
        let chart = history(
            &format!("series-{id}-history"),
            &format!("Slope of {} across fit versions", s.row.key),
            &format!(
                "{} fit versions with a slope; {} refit after a verdict.",
                points.len(),
                points.iter().filter(|p| p.verdict.is_some()).count()
            ),
            &points,
            &format!("Slope ({slope_unit})"),
            level,
        );
        let _ = write!(
            out,
            "<figure>\n{chart}\n<figcaption>The least-squares slope of every fit version with its {} confidence interval. Diamonds mark refits that a verdict triggered.</figcaption>\n</figure>\n",
            level_text(level)
        );
    }
    let _ = write!(
        out,
        "<table class=\"compact history\">\n<thead><tr><th class=\"num\">Version</th><th>Computed</th><th>Triggered by</th><th class=\"num\">n</th><th class=\"num\">Slope ({})</th><th class=\"num\">Confidence interval</th><th class=\"num\">p</th><th class=\"num\">Theil-Sen</th><th>Note</th></tr></thead>\n<tbody>\n",
        html(slope_unit)
    );
    for f in &s.fits {
        let _ = writeln!(
            out,
            "<tr{}><td class=\"num\">{}</td><td class=\"when\">{}</td><td class=\"text\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"text\">{}</td></tr>",
            if f.trigger_verdict.is_some() {
                " class=\"verdict-refit\""
            } else {
                ""
            },
            f.version,
            html(&f.created_at),
            trigger_text(f),
            f.n,
            num(f.slope),
            interval(f.slope_ci_low, f.slope_ci_high),
            p_html(f.slope_p),
            // The robust slope where this version computed one (see the note).
            num(f.theil_sen_slope),
            [
                f.window
                    .as_deref()
                    .map(|w| format!("window <code>{}</code>", html(w))),
                f.note.as_deref().map(html),
            ]
            .into_iter()
            .flatten()
            .collect::<Vec<_>>()
            .join("; "),
        );
    }
    out.push_str("</tbody>\n</table>\n");
}

/// The measures that crossed their cutoff, from a finding's detail.
fn crossed_measures(detail: &serde_json::Value) -> Vec<String> {
    let Some(list) = detail.get("measures").and_then(|m| m.as_array()) else {
        return Vec::new();
    };
    list.iter()
        .filter(|m| m.get("crossed").and_then(|c| c.as_bool()) == Some(true))
        .filter_map(|m| {
            let name = m.get("measure")?.as_str()?;
            let value = m.get("value")?.as_f64()?;
            let cutoff = m.get("cutoff")?.as_f64()?;
            Some(format!(
                "{}: {} (cutoff {})",
                html(name),
                html_number(&sig(value, DIGITS)),
                html_number(&sig(cutoff, DIGITS))
            ))
        })
        .collect()
}

fn findings_table(out: &mut String, findings: &[ReportFindingRow], with_file: bool) {
    let _ = write!(
        out,
        "<table class=\"findings\">\n<thead><tr><th class=\"num\">#</th><th>Raised</th><th>Severity</th><th>Kinds</th><th>{}</th><th>Status</th><th>Summary</th></tr></thead>\n<tbody>\n",
        if with_file { "File" } else { "Records" }
    );
    for f in findings {
        let measures = crossed_measures(&f.detail_value());
        let measures = if measures.is_empty() {
            String::new()
        } else {
            format!(
                "<ul class=\"measures\">{}</ul>",
                measures
                    .iter()
                    .map(|m| format!("<li>{m}</li>"))
                    .collect::<String>()
            )
        };
        let concerns = if with_file {
            f.file.as_deref().map_or("—".into(), html)
        } else if f.record_ids.is_empty() {
            "—".into()
        } else {
            html(&f.record_ids.join(", "))
        };
        let _ = writeln!(
            out,
            "<tr id=\"finding-{id}\"><td class=\"num\">{id}</td><td>{}</td><td class=\"sev-{sev}\">{sev}</td><td>{}</td><td class=\"text\">{concerns}</td><td class=\"status-{status}\">{status}</td><td class=\"text\">{}{measures}</td></tr>",
            date_of(&f.created_at),
            html(
                &f.kinds
                    .iter()
                    .map(|k| words(k))
                    .collect::<Vec<_>>()
                    .join(", ")
            ),
            html(&f.summary),
            id = f.id,
            sev = html(f.severity.as_str()),
            status = html(f.status.as_str()),
        );
    }
    out.push_str("</tbody>\n</table>\n");
}

fn verdict_table(out: &mut String, verdicts: &[ReportVerdictRow]) {
    // Which verdicts a later row reverted.
    let reverted: BTreeMap<i64, i64> = verdicts
        .iter()
        .filter_map(|v| v.reverts.map(|r| (r, v.id)))
        .collect();
    out.push_str("<table class=\"verdicts\">\n<thead><tr><th>When</th><th class=\"num\">Verdict</th><th>Kind</th><th class=\"num\">Finding</th><th>Record</th><th class=\"num\">Value given</th><th>Note</th><th>By</th></tr></thead>\n<tbody>\n");
    for v in verdicts {
        let kind = match (v.verdict.as_str(), v.reverts) {
            ("reverted", Some(r)) => format!("reverted (undoes verdict {r})"),
            (k, _) => html(k),
        };
        let later = reverted.get(&v.id).map_or(String::new(), |by| {
            format!(" <span class=\"muted\">(reverted by verdict {by})</span>")
        });
        let _ = writeln!(
            out,
            "<tr><td class=\"when\">{}</td><td class=\"num\">{}</td><td>{kind}{later}</td><td class=\"num\">{}</td><td class=\"text\">{}</td><td class=\"num\">{}</td><td class=\"text\">{}</td><td class=\"text\">{}</td></tr>",
            html(&v.at),
            v.id,
            v.finding_id,
            v.record_id
                .as_deref()
                .map_or("—".into(), |r| match v.new_record_version {
                    Some(n) => format!("{} (now version {n})", html(r)),
                    None => html(r),
                }),
            num(v.value),
            html(&v.note),
            html(&v.by_whom),
        );
    }
    out.push_str("</tbody>\n</table>\n");
}
