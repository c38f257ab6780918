//! `/`: the overview page. Every series with its current slope, interval,
//! p and n, the open findings, and the scatter charts of the series that
//! most need a look, drawn by the report's own renderer. One
//! self-contained page: inline CSS and SVG, no scripts, every string from
//! the store escaped.
//!
//! Which series get a chart ([`choose_charts`]) and the page itself
//! ([`render`]) are pure; reading the store is `routes.rs`'s part.

use std::fmt::Write as _;

use crate::report::{
    STYLE, escape_html as html, glance_slope_unit, html_number, level_text, opt_p, sig,
};
use crate::store::{MetricsSnapshot, OpenFinding, SeriesGlance};

/// At most this many charts on the page: each reads its series' records.
pub const MAX_CHARTS: usize = 12;
/// A series with more current records than this gets no chart here (the
/// page would grow by megabytes); `slopewarden report` draws it.
pub const MAX_CHART_RECORDS: i64 = 2_000;
/// At most this many open findings are listed, newest first.
pub const MAX_OPEN_LISTED: usize = 50;

/// Significant digits of the numbers on the page (as in the report).
const DIGITS: usize = 4;

/// What the page adds to the report's stylesheet.
const EXTRA_STYLE: &str = r#"
nav.jump { font-size: .9rem; margin: .2rem 0 1rem; }
nav.jump a { margin-right: .8rem; }
section.chart { margin-top: 1.6rem; }
footer { margin-top: 2.5rem; border-top: 1px solid #d6d6d6; padding-top: .6rem; font-size: .85rem; color: #5a5a5a; }
"#;

/// Which series get a chart.
#[derive(Debug, Clone, PartialEq, Eq, Default)]
pub struct ChartChoice {
    /// Indexes into the series, in the order their charts appear: most
    /// open findings first, then by key.
    pub chosen: Vec<usize>,
    /// Series with records beyond [`MAX_CHART_RECORDS`].
    pub too_large: Vec<usize>,
    /// Series with records left out by [`MAX_CHARTS`].
    pub left_out: usize,
}

/// Picks the charts: series with records and at most
/// [`MAX_CHART_RECORDS`] of them, most open findings first, then by key,
/// at most [`MAX_CHARTS`].
pub fn choose_charts(series: &[SeriesGlance]) -> ChartChoice {
    let mut choice = ChartChoice::default();
    let mut candidates: Vec<usize> = Vec::new();
    for (i, s) in series.iter().enumerate() {
        if s.row.records == 0 {
            continue;
        }
        if s.row.records > MAX_CHART_RECORDS {
            choice.too_large.push(i);
        } else {
            candidates.push(i);
        }
    }
    candidates.sort_by(|&a, &b| {
        let (a, b) = (&series[a].row, &series[b].row);
        b.open_findings
            .cmp(&a.open_findings)
            .then_with(|| a.key.cmp(&b.key))
    });
    choice.left_out = candidates.len().saturating_sub(MAX_CHARTS);
    candidates.truncate(MAX_CHARTS);
    choice.chosen = candidates;
    choice
}

/// Everything the page shows.
#[derive(Debug, Clone, PartialEq)]
pub struct Overview {
    /// Every series, by key.
    pub series: Vec<SeriesGlance>,
    /// The newest open findings (at most [`MAX_OPEN_LISTED`]).
    pub open: Vec<OpenFinding>,
    /// Open findings in all.
    pub open_total: i64,
    /// Store counts.
    pub counts: MetricsSnapshot,
    /// Which series are drawn.
    pub choice: ChartChoice,
    /// The chart of each chosen series, in the same order: HTML from the
    /// report's renderer, which escapes everything from the store.
    pub charts: Vec<String>,
}

fn num(v: Option<f64>) -> String {
    v.map_or("—".into(), |v| html_number(&sig(v, DIGITS)))
}

fn interval(lo: Option<f64>, hi: Option<f64>, level: f64) -> String {
    match (lo, hi) {
        (Some(a), Some(b)) => format!(
            "[{}, {}] <span class=\"muted\">({})</span>",
            html_number(&sig(a, DIGITS)),
            html_number(&sig(b, DIGITS)),
            level_text(level)
        ),
        _ => "—".into(),
    }
}

fn plural(n: impl Into<i64>, one: &str, many: &str) -> String {
    let n = n.into();
    format!("{n} {}", if n == 1 { one } else { many })
}

/// The page, as of `generated_at` (RFC 3339, the caller's clock).
pub fn render(o: &Overview, generated_at: &str) -> String {
    let mut out =
        String::with_capacity(64 * 1024 + o.charts.iter().map(String::len).sum::<usize>());
    out.push_str("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n");
    // The response header says it too; the meta copy keeps a saved page
    // just as safe.
    out.push_str(
        "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; style-src 'unsafe-inline'; img-src data:\">\n",
    );
    out.push_str("<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n");
    let _ = writeln!(
        out,
        "<title>Overview · slopewarden</title>\n<style>{STYLE}{EXTRA_STYLE}</style>\n</head>\n<body>"
    );
    header(&mut out, o, generated_at);
    series_table(&mut out, o);
    findings_list(&mut out, o);
    charts(&mut out, o);
    out.push_str(
        "<footer>This page only reads the store. Verdicts on findings are given with <code>slopewarden review</code>; \
the full account of each trend, with every fit version, record and verdict, is in <code>slopewarden report</code>. \
Counters for monitoring systems: <a href=\"/metrics\">/metrics</a>.</footer>\n</body>\n</html>\n",
    );
    out
}

fn header(out: &mut String, o: &Overview, generated_at: &str) {
    let c = &o.counts;
    let last = c.last_arrival.as_deref().map_or_else(
        || "no file has arrived yet".to_string(),
        |t| {
            format!(
                "newest file arrived <time datetime=\"{t}\">{t}</time>",
                t = html(t)
            )
        },
    );
    let _ = write!(
        out,
        "<header>\n<p class=\"kicker\">slopewarden · read-only view</p>\n<h1>Monitoring overview</h1>\n\
<p class=\"meta\">As of <time datetime=\"{g}\">{g}</time> · {series} · {records} · {open} · {last}</p>\n",
        g = html(generated_at),
        series = plural(c.series, "series", "series"),
        records = plural(c.records_current, "record", "records"),
        open = plural(o.open_total, "open finding", "open findings"),
    );
    let mut set_aside = Vec::new();
    if c.files_quarantined > 0 {
        set_aside.push(plural(c.files_quarantined, "file", "files"));
    }
    if c.rows_quarantined > 0 {
        set_aside.push(plural(c.rows_quarantined, "row", "rows"));
    }
    if !set_aside.is_empty() {
        let _ = writeln!(
            out,
            "<p class=\"meta\">Set aside so far: {} (see <code>slopewarden findings</code> for the reasons).</p>",
            set_aside.join(" and ")
        );
    }
    let _ = write!(
        out,
        "<aside class=\"caution\" role=\"note\"><strong>Caution.</strong> {}</aside>\n</header>\n",
        html(crate::raise::CAUTION)
    );
    out.push_str(
        "<nav class=\"jump\"><a href=\"#series\">Series</a><a href=\"#open-findings\">Open findings</a><a href=\"#charts\">Charts</a></nav>\n",
    );
}

fn series_table(out: &mut String, o: &Overview) {
    out.push_str("<h2 id=\"series\">Series</h2>\n");
    if o.series.is_empty() {
        out.push_str("<p class=\"empty\">No series yet: records appear here once files arrive in the inbox.</p>\n");
        return;
    }
    out.push_str(
        "<table class=\"overview\">\n<thead><tr><th>Series</th><th class=\"num\">n</th><th class=\"num\">Slope</th><th>Slope unit</th><th class=\"num\">Confidence interval</th><th class=\"num\">p</th><th class=\"num\">Open findings</th><th>Last refit</th></tr></thead>\n<tbody>\n",
    );
    for (i, s) in o.series.iter().enumerate() {
        let key = html(&s.row.key);
        let key = if o.choice.chosen.contains(&i) {
            format!("<a href=\"#series-{}\" class=\"key\">{key}</a>", s.row.id.0)
        } else {
            format!("<span class=\"key\">{key}</span>")
        };
        let f = s.fit.as_ref();
        let _ = writeln!(
            out,
            "<tr><td class=\"text\">{key}</td><td class=\"num n\">{n}</td><td class=\"num slope\">{slope}</td><td>{unit}</td><td class=\"num ci\">{ci}</td><td class=\"num p\">{p}</td><td class=\"num open\">{open}</td><td class=\"when\">{at}</td></tr>",
            n = f.map_or(0, |f| f.n),
            slope = num(f.and_then(|f| f.slope)),
            unit = html(&glance_slope_unit(s)),
            ci = f.map_or("—".into(), |f| interval(
                f.slope_ci_low,
                f.slope_ci_high,
                f.level
            )),
            p = html_number(&opt_p(f.and_then(|f| f.slope_p))),
            open = s.row.open_findings,
            at = f.map_or("—".into(), |f| html(&f.created_at)),
        );
    }
    out.push_str("</tbody>\n</table>\n");
    out.push_str("<p class=\"muted\">Slopes and intervals are on each series' fitted scale (see the slope unit); p is two-sided, against a slope of zero; n counts the records in the current fit.</p>\n");
}

fn findings_list(out: &mut String, o: &Overview) {
    out.push_str("<h2 id=\"open-findings\">Open findings</h2>\n");
    if o.open.is_empty() {
        out.push_str("<p class=\"empty\">No finding awaits a verdict.</p>\n");
        return;
    }
    out.push_str(
        "<table class=\"findings\">\n<thead><tr><th class=\"num\">#</th><th>Raised</th><th>Severity</th><th>Series or file</th><th>Kinds</th><th>Records</th><th>Summary</th></tr></thead>\n<tbody>\n",
    );
    for f in &o.open {
        let kinds: Vec<String> = f.kinds.iter().map(|k| k.replace('_', " ")).collect();
        let _ = writeln!(
            out,
            "<tr id=\"finding-{id}\"><td class=\"num\">{id}</td><td class=\"when\">{at}</td><td class=\"sev-{sev}\">{sev}</td><td class=\"text\">{about}</td><td>{kinds}</td><td class=\"text\">{records}</td><td class=\"text\">{summary}</td></tr>",
            id = f.id,
            at = html(&f.created_at),
            sev = html(f.severity.as_str()),
            about = match (&f.series, &f.file) {
                (Some(s), _) => format!("<span class=\"key\">{}</span>", html(s)),
                (None, Some(file)) => format!("file {}", html(file)),
                (None, None) => "—".into(),
            },
            kinds = html(&kinds.join(", ")),
            records = if f.record_ids.is_empty() {
                "—".into()
            } else {
                html(&f.record_ids.join(", "))
            },
            summary = html(&f.summary),
        );
    }
    out.push_str("</tbody>\n</table>\n");
    let more = o.open_total - o.open.len() as i64;
    if more > 0 {
        let _ = writeln!(
            out,
            "<p class=\"muted\">The newest {} are listed; {} more await a verdict (<code>slopewarden findings</code> lists them all).</p>",
            o.open.len(),
            more
        );
    }
    out.push_str("<p class=\"muted\"><code>slopewarden show FINDING</code> gives a finding's numbers and candidate causes.</p>\n");
}

fn charts(out: &mut String, o: &Overview) {
    out.push_str("<h2 id=\"charts\">Charts</h2>\n");
    if o.choice.chosen.is_empty() {
        out.push_str("<p class=\"empty\">No series to draw.</p>\n");
    } else {
        out.push_str("<p class=\"muted\">Series with open findings first. Each chart shows the records on the fitted scale, the current least-squares line with its confidence band for the mean, and rings around the records findings concern.</p>\n");
    }
    for (&i, figure) in o.choice.chosen.iter().zip(&o.charts) {
        let s = &o.series[i];
        let _ = write!(
            out,
            "<section class=\"chart\" id=\"series-{id}\">\n<h3><span class=\"key\">{key}</span></h3>\n{figure}</section>\n",
            id = s.row.id.0,
            key = html(&s.row.key),
        );
    }
    if o.choice.left_out > 0 {
        let _ = writeln!(
            out,
            "<p class=\"muted\">{} not drawn here (at most {MAX_CHARTS} charts); <code>slopewarden report</code> draws every series.</p>",
            plural(
                o.choice.left_out as i64,
                "more series is",
                "more series are"
            ),
        );
    }
    if !o.choice.too_large.is_empty() {
        let names: Vec<String> = o
            .choice
            .too_large
            .iter()
            .map(|&i| format!("<span class=\"key\">{}</span>", html(&o.series[i].row.key)))
            .collect();
        let _ = writeln!(
            out,
            "<p class=\"muted\">Not drawn here, more than {MAX_CHART_RECORDS} records each: {}. <code>slopewarden report --series KEY</code> draws them.</p>",
            names.join(", ")
        );
    }
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;
    use crate::store::{GlanceFit, ReportSeriesRow, SeriesRowId};

    fn glance(id: i64, key: &str, records: i64, open: i64) -> SeriesGlance {
        SeriesGlance {
            row: ReportSeriesRow {
                id: SeriesRowId(id),
                key: key.into(),
                unit: None,
                record_unit: Some("mg/L".into()),
                transform: "none".into(),
                non_detects: "exclude".into(),
                latest_fit: Some(id),
                records,
                open_findings: open,
                x_name: None,
                x_unit: None,
            },
            fit: Some(GlanceFit {
                version: 2,
                created_at: "2026-03-01T10:00:00Z".into(),
                n: records,
                level: 0.95,
                slope: Some(0.2031),
                slope_ci_low: Some(0.18),
                slope_ci_high: Some(0.23),
                slope_p: Some(1.2e-9),
                x_min: Some(2010.0),
                x_max: Some(2017.25),
                transform: "none".into(),
            }),
        }
    }

    #[test]
    fn charts_go_to_series_with_open_findings_first_within_the_caps() {
        let mut series = vec![
            glance(1, "a", 10, 0),
            glance(2, "b", 10, 2),
            glance(3, "c", 0, 0),
            glance(4, "d", MAX_CHART_RECORDS + 1, 5),
            glance(5, "e", 10, 1),
        ];
        let c = choose_charts(&series);
        assert_eq!(c.chosen, vec![1, 4, 0]);
        assert_eq!(c.too_large, vec![3]);
        assert_eq!(c.left_out, 0);
        series = (0..MAX_CHARTS as i64 + 3)
            .map(|i| glance(i, &format!("s{i:02}"), 5, 0))
            .collect();
        let c = choose_charts(&series);
        assert_eq!(c.chosen.len(), MAX_CHARTS);
        assert_eq!(c.chosen[0], 0);
        assert_eq!(c.left_out, 3);
    }

    #[test]
    fn the_page_escapes_the_store_s_text_and_has_no_script() {
        let evil = "<script>alert(1)</script>";
        let series = vec![
            glance(7, evil, 20, 1),
            glance(8, "Fernhollow/MW-2/nitrate", 20, 0),
        ];
        let choice = choose_charts(&series);
        let o = Overview {
            open: vec![OpenFinding {
                id: 3,
                created_at: "2026-03-01T10:00:00Z".into(),
                series: Some(evil.into()),
                file: Some("b.csv".into()),
                kinds: vec!["influential".into(), "outlier".into()],
                severity: crate::findings::Severity::Alert,
                record_ids: vec!["<b>R-1</b>".into()],
                summary: "\"quoted\" & <i>odd</i>".into(),
            }],
            open_total: 1,
            counts: MetricsSnapshot {
                series: 2,
                records_current: 40,
                rows_quarantined: 1,
                last_arrival: Some("2026-03-01T10:00:00Z".into()),
                ..MetricsSnapshot::default()
            },
            charts: vec!["<figure><svg></svg></figure>\n".into(); choice.chosen.len()],
            choice,
            series,
        };
        let page = render(&o, "2026-03-02T08:00:00Z");
        assert!(!page.to_ascii_lowercase().contains("<script"));
        assert!(page.contains("&lt;script&gt;alert(1)&lt;/script&gt;"));
        assert!(page.contains("&lt;b&gt;R-1&lt;/b&gt;"));
        assert!(page.contains("&quot;quoted&quot; &amp; &lt;i&gt;odd&lt;/i&gt;"));
        assert!(page.contains(&html(crate::raise::CAUTION)));
        assert!(page.contains("influential, outlier"));
        assert!(page.contains("mg/L per year"));
        assert!(page.contains("<a href=\"#series-7\""));
        assert!(page.contains("<section class=\"chart\" id=\"series-7\">"));
        assert!(page.contains("1 row (see"));
        assert!(page.contains("2 series · 40 records · 1 open finding"));
    }

    #[test]
    fn an_empty_store_gives_a_page_that_says_so() {
        let o = Overview {
            series: Vec::new(),
            open: Vec::new(),
            open_total: 0,
            counts: MetricsSnapshot::default(),
            choice: ChartChoice::default(),
            charts: Vec::new(),
        };
        let page = render(&o, "2026-03-02T08:00:00Z");
        assert!(page.contains("No series yet"));
        assert!(page.contains("No finding awaits a verdict."));
        assert!(page.contains("no file has arrived yet"));
        assert!(page.ends_with("</html>\n"));
    }
}
