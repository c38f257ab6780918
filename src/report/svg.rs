//! Inline SVG charts: the scatter of a series with its fit line and
//! confidence band, and the slope history. Plain strings, no scripts, no
//! external references; every piece of text from the data is escaped.
//!
//! Shapes as well as colours tell the markers apart, so the charts read in
//! grey print too.

use std::fmt::Write as _;

use super::band::BandPoint;
use super::escape::html;
use super::format::{level as level_text, nice_ticks, tick_label};

const INK: &str = "#1a1a1a";
const GRID: &str = "#e3e3e3";
const AXIS: &str = "#8c8c8c";
const POINT: &str = "#1f4e79";
const MUTED: &str = "#707070";
const FLAG_OPEN: &str = "#b4380c";
const FLAG_DONE: &str = "#707070";
const BAND: &str = "#c6dbef";
const VERDICT: &str = "#6a3d9a";

/// How a record is drawn.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Marker {
    /// In the current fit.
    InFit,
    /// A non-detect entered in the fit at a substituted value.
    InFitNonDetect,
    /// A non-detect left out of the fit (drawn at its limit).
    NonDetectOut,
    /// Eligible, but outside the fit's analysis window.
    OutsideWindow,
    /// A current record out of the fit for another reason.
    OutOfFit,
    /// Excluded from the fit by a verdict.
    Excluded,
    /// An earlier version, replaced by a correction.
    Superseded,
    /// A resubmitted version awaiting review.
    Proposed,
}

impl Marker {
    fn legend(self) -> &'static str {
        match self {
            Marker::InFit => "record in the fit",
            Marker::InFitNonDetect => "non-detect in the fit (substituted value)",
            Marker::NonDetectOut => "non-detect, not in the fit (at its limit)",
            Marker::OutsideWindow => "outside the analysis window (not in the fit)",
            Marker::OutOfFit => "record not in the fit",
            Marker::Excluded => "excluded by a verdict (not in the fit)",
            Marker::Superseded => "earlier version, replaced (not in the fit)",
            Marker::Proposed => "resubmitted version awaiting review (not in the fit)",
        }
    }

    fn draw(self, cx: f64, cy: f64) -> String {
        let tri = |fill: &str| {
            format!(
                r#"<path d="M{:.1},{:.1}L{:.1},{:.1}L{:.1},{:.1}Z" fill="{fill}" stroke="{POINT}" stroke-width="1.2"/>"#,
                cx - 4.2,
                cy - 3.2,
                cx + 4.2,
                cy - 3.2,
                cx,
                cy + 4.0
            )
        };
        match self {
            Marker::InFit => format!(
                r##"<circle cx="{cx:.1}" cy="{cy:.1}" r="3.6" fill="{POINT}" stroke="#ffffff" stroke-width="0.6"/>"##
            ),
            Marker::InFitNonDetect => tri(POINT),
            Marker::NonDetectOut => tri("#ffffff"),
            Marker::OutsideWindow => format!(
                r##"<circle cx="{cx:.1}" cy="{cy:.1}" r="3.4" fill="#d5e2ef" stroke="{POINT}" stroke-width="1"/>"##
            ),
            Marker::OutOfFit => format!(
                r##"<circle cx="{cx:.1}" cy="{cy:.1}" r="3.4" fill="#ffffff" stroke="{POINT}" stroke-width="1.2"/>"##
            ),
            Marker::Excluded => format!(
                r##"<rect x="{:.1}" y="{:.1}" width="7" height="7" fill="#ffffff" stroke="{INK}" stroke-width="1.2"/><path d="M{:.1},{:.1}l7,7" stroke="{INK}" stroke-width="1"/>"##,
                cx - 3.5,
                cy - 3.5,
                cx - 3.5,
                cy - 3.5
            ),
            Marker::Superseded => format!(
                r##"<circle cx="{cx:.1}" cy="{cy:.1}" r="3.2" fill="#ffffff" stroke="{MUTED}" stroke-width="1" stroke-dasharray="2 1.5"/>"##
            ),
            Marker::Proposed => format!(
                r##"<path d="M{cx:.1},{:.1}l4.2,4.2l-4.2,4.2l-4.2,-4.2Z" fill="#ffffff" stroke="{MUTED}" stroke-width="1.2"/>"##,
                cy - 4.2
            ),
        }
    }
}

/// A flag drawn around a record, with its label.
#[derive(Debug, Clone, PartialEq)]
pub struct Flag {
    /// The label (the record id).
    pub label: String,
    /// Whether a finding on it is still open.
    pub open: bool,
}

/// A record on the scatter (fitted scale).
#[derive(Debug, Clone, PartialEq)]
pub struct PlotPoint {
    /// x.
    pub x: f64,
    /// y.
    pub y: f64,
    /// How it is drawn.
    pub marker: Marker,
    /// Its flag, if a finding concerns it.
    pub flag: Option<Flag>,
    /// The tooltip: record id, values, status.
    pub tip: String,
}

/// The scatter of one series.
#[derive(Debug, Clone, PartialEq)]
pub struct Scatter {
    /// Prefix for element ids (made of digits and letters only).
    pub id: String,
    /// Accessible title.
    pub title: String,
    /// Accessible description.
    pub description: String,
    /// The records.
    pub points: Vec<PlotPoint>,
    /// The fit line and its band, over the fit's x range.
    pub band: Option<Vec<BandPoint>>,
    /// The band's confidence level.
    pub level: f64,
    /// x axis label.
    pub x_label: String,
    /// y axis label.
    pub y_label: String,
}

/// A plot area and its data ranges.
struct Frame {
    left: f64,
    right: f64,
    top: f64,
    bottom: f64,
    x: (f64, f64),
    y: (f64, f64),
}

impl Frame {
    fn px(&self, x: f64) -> f64 {
        self.left + (x - self.x.0) / (self.x.1 - self.x.0) * (self.right - self.left)
    }

    fn py(&self, y: f64) -> f64 {
        self.bottom - (y - self.y.0) / (self.y.1 - self.y.0) * (self.bottom - self.top)
    }
}

/// `[lo, hi]` padded by `pad` of its span; a single value gets a span.
fn padded(lo: f64, hi: f64, pad: f64) -> (f64, f64) {
    if !(lo.is_finite() && hi.is_finite()) {
        return (0.0, 1.0);
    }
    let span = hi - lo;
    if span > 0.0 {
        (lo - pad * span, hi + pad * span)
    } else {
        let half = (lo.abs() * 0.05).max(0.5);
        (lo - half, hi + half)
    }
}

fn extent(values: impl Iterator<Item = f64>) -> (f64, f64) {
    values
        .filter(|v| v.is_finite())
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), v| {
            (a.min(v), b.max(v))
        })
}

/// Grid lines, ticks, tick labels and axis labels.
fn axes(out: &mut String, f: &Frame, x_label: &str, y_label: &str, integer_x: bool) {
    let (xt, xs) = nice_ticks(f.x.0, f.x.1, 7, if integer_x { 1.0 } else { 0.0 });
    let (yt, ys) = nice_ticks(f.y.0, f.y.1, 6, 0.0);
    let _ = write!(out, r#"<g class="grid" stroke="{GRID}" stroke-width="1">"#);
    for v in &yt {
        let y = f.py(*v);
        let _ = write!(
            out,
            r#"<line x1="{:.1}" y1="{y:.1}" x2="{:.1}" y2="{y:.1}"/>"#,
            f.left, f.right
        );
    }
    for v in &xt {
        let x = f.px(*v);
        let _ = write!(
            out,
            r#"<line x1="{x:.1}" y1="{:.1}" x2="{x:.1}" y2="{:.1}"/>"#,
            f.top, f.bottom
        );
    }
    out.push_str("</g>");
    let _ = write!(
        out,
        r#"<rect x="{:.1}" y="{:.1}" width="{:.1}" height="{:.1}" fill="none" stroke="{AXIS}" stroke-width="1"/>"#,
        f.left,
        f.top,
        f.right - f.left,
        f.bottom - f.top
    );
    let _ = write!(
        out,
        r#"<g class="ticks" font-size="11" fill="{INK}" text-anchor="end">"#
    );
    for v in &yt {
        let _ = write!(
            out,
            r#"<text x="{:.1}" y="{:.1}">{}</text>"#,
            f.left - 6.0,
            f.py(*v) + 3.8,
            html(&tick_label(*v, ys))
        );
    }
    out.push_str(r#"</g><g class="ticks" font-size="11" text-anchor="middle">"#);
    for v in &xt {
        let _ = write!(
            out,
            r#"<text x="{:.1}" y="{:.1}" fill="{INK}">{}</text>"#,
            f.px(*v),
            f.bottom + 15.0,
            html(&tick_label(*v, xs))
        );
    }
    out.push_str("</g>");
    let _ = write!(
        out,
        r#"<text class="axis-label" x="{:.1}" y="{:.1}" font-size="12" text-anchor="middle" fill="{INK}">{}</text>"#,
        (f.left + f.right) / 2.0,
        f.bottom + 33.0,
        html(x_label)
    );
    let cy = (f.top + f.bottom) / 2.0;
    let _ = write!(
        out,
        r#"<text class="axis-label" x="14" y="{cy:.1}" font-size="12" text-anchor="middle" fill="{INK}" transform="rotate(-90 14 {cy:.1})">{}</text>"#,
        html(y_label)
    );
}

/// Legend entries laid out in rows from (`x`, `y`) within `width`;
/// returns the markup and the height used.
fn legend(items: &[(String, String)], x: f64, y: f64, width: f64) -> (String, f64) {
    let mut out = String::from(r#"<g class="legend" font-size="11">"#);
    let (mut cx, mut cy) = (x, y);
    let row = 16.0;
    for (sample, label) in items {
        // About 6 px a character at 11 px in a sans-serif face.
        let w = 22.0 + 6.0 * label.chars().count() as f64 + 16.0;
        if cx > x && cx + w > x + width {
            cx = x;
            cy += row;
        }
        let _ = write!(
            out,
            r#"<g transform="translate({:.1} {:.1})">{sample}<text x="14" y="4" fill="{INK}">{}</text></g>"#,
            cx + 6.0,
            cy,
            html(label)
        );
        cx += w;
    }
    out.push_str("</g>");
    (out, cy - y + row)
}

fn svg_open(id: &str, w: f64, h: f64, title: &str, description: &str) -> String {
    format!(
        r##"<svg class="chart" viewBox="0 0 {w:.0} {h:.0}" width="{w:.0}" height="{h:.0}" role="img" aria-labelledby="{id}-title {id}-desc"><title id="{id}-title">{}</title><desc id="{id}-desc">{}</desc><rect width="{w:.0}" height="{h:.0}" fill="#ffffff"/>"##,
        html(title),
        html(description)
    )
}

/// The scatter with the fit line, its confidence band for the mean,
/// flagged records ringed and labelled, and a legend.
pub fn scatter(s: &Scatter) -> String {
    const W: f64 = 760.0;
    let band = s.band.as_deref().unwrap_or(&[]);
    let (x_lo, x_hi) = extent(s.points.iter().map(|p| p.x).chain(band.iter().map(|b| b.x)));
    // The y range follows the fit: its records and band, plus records
    // outside the fit within reach of them. A record outside the fit far
    // beyond (an excluded value ten times too large) would squash the fit
    // into a strip: it is pinned to the edge instead, marked as off scale.
    let reach = y_reach(s, band);
    let (y_lo, y_hi) = extent(
        s.points
            .iter()
            .map(|p| p.y)
            .filter(|y| reach.is_none_or(|(lo, hi)| (lo..=hi).contains(y)))
            .chain(band.iter().flat_map(|b| [b.low, b.high])),
    );
    let off_scale = |p: &PlotPoint| reach.is_some_and(|(lo, hi)| !(lo..=hi).contains(&p.y));
    // The legend: what is drawn, in a fixed order.
    let mut kinds: Vec<Marker> = s
        .points
        .iter()
        .filter(|p| !off_scale(p))
        .map(|p| p.marker)
        .collect();
    kinds.sort();
    kinds.dedup();
    let mut items: Vec<(String, String)> = Vec::new();
    if !band.is_empty() {
        items.push((
            format!(r#"<line x1="-6" y1="0" x2="8" y2="0" stroke="{INK}" stroke-width="1.8"/>"#),
            "least-squares fit".into(),
        ));
        items.push((
            format!(r#"<rect x="-6" y="-5" width="14" height="10" fill="{BAND}"/>"#),
            format!(
                "{} confidence band for the mean",
                level_text(s.level).replace('\u{a0}', " ")
            ),
        ));
    }
    for k in &kinds {
        items.push((k.draw(1.0, 0.0), k.legend().into()));
    }
    if s.points.iter().any(off_scale) {
        items.push((
            format!(r#"<path d="M1,-5l5,8h-10Z" fill="{MUTED}"/>"#),
            "outside the fit and beyond the plotted range: pinned to the edge".into(),
        ));
    }
    if s.points
        .iter()
        .any(|p| p.flag.as_ref().is_some_and(|f| f.open))
    {
        items.push((
            format!(r#"<circle cx="1" cy="0" r="6.5" fill="none" stroke="{FLAG_OPEN}" stroke-width="1.6"/>"#),
            "flagged, finding open (labelled by record id)".into(),
        ));
    }
    if s.points
        .iter()
        .any(|p| p.flag.as_ref().is_some_and(|f| !f.open))
    {
        items.push((
            format!(r#"<circle cx="1" cy="0" r="6.5" fill="none" stroke="{FLAG_DONE}" stroke-width="1.4" stroke-dasharray="3 2"/>"#),
            "flagged, finding resolved".into(),
        ));
    }
    let plot_bottom = 330.0;
    let (legend_svg, legend_h) = legend(&items, 72.0, plot_bottom + 52.0, W - 90.0);
    let h = plot_bottom + 52.0 + legend_h + 4.0;
    let f = Frame {
        left: 72.0,
        right: W - 18.0,
        top: 14.0,
        bottom: plot_bottom,
        x: padded(x_lo, x_hi, 0.04),
        y: padded(y_lo, y_hi, 0.06),
    };
    let mut out = svg_open(&s.id, W, h, &s.title, &s.description);
    let _ = write!(
        out,
        r#"<defs><clipPath id="{}-clip"><rect x="{:.1}" y="{:.1}" width="{:.1}" height="{:.1}"/></clipPath></defs>"#,
        s.id,
        f.left,
        f.top,
        f.right - f.left,
        f.bottom - f.top
    );
    axes(&mut out, &f, &s.x_label, &s.y_label, false);
    let _ = write!(out, r#"<g clip-path="url(#{}-clip)">"#, s.id);
    if band.len() >= 2 {
        let mut d = String::new();
        for (i, b) in band.iter().enumerate() {
            let _ = write!(
                d,
                "{}{:.1},{:.1}",
                if i == 0 { "M" } else { "L" },
                f.px(b.x),
                f.py(b.high)
            );
        }
        for b in band.iter().rev() {
            let _ = write!(d, "L{:.1},{:.1}", f.px(b.x), f.py(b.low));
        }
        d.push('Z');
        let _ = write!(
            out,
            r#"<path class="band" d="{d}" fill="{BAND}" fill-opacity="0.85" stroke="none"/>"#
        );
        let mut line = String::new();
        for (i, b) in band.iter().enumerate() {
            let _ = write!(
                line,
                "{}{:.1},{:.1}",
                if i == 0 { "M" } else { "L" },
                f.px(b.x),
                f.py(b.fit)
            );
        }
        let _ = write!(
            out,
            r#"<path class="fit-line" d="{line}" fill="none" stroke="{INK}" stroke-width="1.8"/>"#
        );
    }
    // Records out of the fit first, so that fitted points stay on top.
    let mut order: Vec<&PlotPoint> = s.points.iter().collect();
    order.sort_by_key(|p| std::cmp::Reverse(p.marker));
    for p in &order {
        let (cx, cy) = (f.px(p.x), pinned_y(&f, p, off_scale(p)));
        let shape = if off_scale(p) {
            // An arrow at the edge, pointing the way the value lies.
            let dir = if cy <= f.top + 10.0 { -1.0 } else { 1.0 };
            format!(
                r#"<path class="off-scale" d="M{cx:.1},{:.1}l5,{:.1}h-10Z" fill="{MUTED}"/>"#,
                cy + dir * 4.0,
                -dir * 8.0
            )
        } else {
            p.marker.draw(cx, cy)
        };
        let _ = write!(
            out,
            r#"<g class="point"><title>{}{}</title>{shape}</g>"#,
            html(&p.tip),
            if off_scale(p) {
                " (beyond the plotted range)"
            } else {
                ""
            }
        );
    }
    out.push_str("</g>");
    // Label boxes placed so far (left, top, right, bottom).
    let mut placed: Vec<(f64, f64, f64, f64)> = Vec::new();
    for p in s.points.iter().filter(|p| p.flag.is_some()) {
        let Some(flag) = &p.flag else { continue };
        let (cx, cy) = (f.px(p.x), pinned_y(&f, p, off_scale(p)));
        let (stroke, dash, fill) = if flag.open {
            (FLAG_OPEN, "", "#7a2406")
        } else {
            (FLAG_DONE, r#" stroke-dasharray="3 2""#, "#4a4a4a")
        };
        let _ = write!(
            out,
            r#"<circle class="flag-ring" cx="{cx:.1}" cy="{cy:.1}" r="7.5" fill="none" stroke="{stroke}" stroke-width="1.6"{dash}/>"#
        );
        let width = 7.0 * flag.label.chars().count() as f64 + 4.0;
        let (lx, ly, anchor) = place_label(cx, cy, width, &f, &placed);
        let left = if anchor == "end" { lx - width } else { lx };
        placed.push((left, ly - 10.0, left + width, ly + 2.0));
        let _ = write!(
            out,
            r##"<text class="flag-label" x="{lx:.1}" y="{ly:.1}" font-size="11" font-weight="600" text-anchor="{anchor}" fill="{fill}" stroke="#ffffff" stroke-width="3" paint-order="stroke">{}</text>"##,
            html(&flag.label)
        );
    }
    out.push_str(&legend_svg);
    out.push_str("</svg>");
    out
}

/// The y range within which records outside the fit are drawn where they
/// lie: the range of the fitted records and the band, widened by that
/// range on either side. `None` when nothing is fitted (all is drawn).
fn y_reach(s: &Scatter, band: &[BandPoint]) -> Option<(f64, f64)> {
    let fitted = s
        .points
        .iter()
        .filter(|p| matches!(p.marker, Marker::InFit | Marker::InFitNonDetect))
        .map(|p| p.y);
    let (lo, hi) = extent(fitted.chain(band.iter().flat_map(|b| [b.low, b.high])));
    if !(lo.is_finite() && hi.is_finite()) {
        return None;
    }
    let span = (hi - lo).max(lo.abs().max(hi.abs()) * 0.05).max(1e-12);
    Some((lo - span, hi + span))
}

/// A record's y on the chart: where it lies, or at the edge it lies
/// beyond.
fn pinned_y(f: &Frame, p: &PlotPoint, off_scale: bool) -> f64 {
    let y = f.py(p.y);
    if !off_scale {
        y
    } else if y < f.top {
        f.top + 6.0
    } else {
        f.bottom - 6.0
    }
}

/// Where a flag's label goes: beside its point, on the first side (upper
/// right, upper left, lower right, lower left, then further up or down)
/// that stays inside the plot and clear of labels already placed; the
/// first side inside the plot when none is clear. Returns x, baseline y
/// and the text anchor.
fn place_label(
    cx: f64,
    cy: f64,
    width: f64,
    f: &Frame,
    placed: &[(f64, f64, f64, f64)],
) -> (f64, f64, &'static str) {
    let candidates = [
        (10.0, -9.0, "start"),
        (-10.0, -9.0, "end"),
        (10.0, 18.0, "start"),
        (-10.0, 18.0, "end"),
        (10.0, -22.0, "start"),
        (-10.0, -22.0, "end"),
        (10.0, 31.0, "start"),
        (-10.0, 31.0, "end"),
    ];
    let boxed = |(dx, dy, anchor): (f64, f64, &'static str)| {
        let (x, y) = (cx + dx, cy + dy);
        let left = if anchor == "end" { x - width } else { x };
        ((x, y, anchor), (left, y - 10.0, left + width, y + 2.0))
    };
    let inside = |b: &(f64, f64, f64, f64)| {
        b.0 >= f.left + 2.0 && b.2 <= f.right - 2.0 && b.1 >= f.top + 2.0 && b.3 <= f.bottom - 2.0
    };
    let clear = |b: &(f64, f64, f64, f64)| {
        placed
            .iter()
            .all(|p| b.2 + 4.0 <= p.0 || b.0 >= p.2 + 4.0 || b.3 <= p.1 || b.1 >= p.3)
    };
    let all = candidates.map(boxed);
    all.iter()
        .find(|(_, b)| inside(b) && clear(b))
        .or_else(|| all.iter().find(|(_, b)| inside(b)))
        .unwrap_or(&all[0])
        .0
}

/// A fit version on the slope history chart.
#[derive(Debug, Clone, PartialEq)]
pub struct HistoryPoint {
    /// Version number.
    pub version: i64,
    /// Slope.
    pub slope: f64,
    /// Interval, when defined.
    pub ci: Option<(f64, f64)>,
    /// The verdict that triggered it, as a short label.
    pub verdict: Option<String>,
    /// Tooltip.
    pub tip: String,
}

/// The slope history: the estimate and its interval for every fit
/// version, refits triggered by a verdict marked, zero drawn.
pub fn history(
    id: &str,
    title: &str,
    description: &str,
    points: &[HistoryPoint],
    y_label: &str,
    level: f64,
) -> String {
    const W: f64 = 760.0;
    let (v_lo, v_hi) = extent(points.iter().map(|p| p.version as f64));
    let (y_lo, y_hi) = extent(
        points
            .iter()
            .flat_map(|p| {
                let (a, b) = p.ci.unwrap_or((p.slope, p.slope));
                [p.slope, a, b]
            })
            .chain(std::iter::once(0.0)),
    );
    let mut items = vec![
        (
            format!(r#"<circle cx="1" cy="0" r="3.4" fill="{POINT}"/>"#),
            "slope after a file (or a window change)".to_string(),
        ),
        (
            format!(r#"<line x1="1" y1="-6" x2="1" y2="6" stroke="{POINT}" stroke-width="1.4"/>"#),
            format!(
                "{} confidence interval",
                level_text(level).replace('\u{a0}', " ")
            ),
        ),
        (
            format!(
                r#"<line x1="-6" y1="0" x2="8" y2="0" stroke="{INK}" stroke-width="1" stroke-dasharray="5 3"/>"#
            ),
            "zero slope".to_string(),
        ),
    ];
    if points.iter().any(|p| p.verdict.is_some()) {
        items.insert(
            1,
            (
                format!(r#"<path d="M1,-5l5,5l-5,5l-5,-5Z" fill="{VERDICT}"/>"#),
                "slope after a verdict (refit)".to_string(),
            ),
        );
    }
    let plot_bottom = 230.0;
    let (legend_svg, legend_h) = legend(&items, 72.0, plot_bottom + 52.0, W - 90.0);
    let h = plot_bottom + 52.0 + legend_h + 4.0;
    let f = Frame {
        left: 72.0,
        right: W - 18.0,
        top: 30.0,
        bottom: plot_bottom,
        x: (v_lo - 0.6, v_hi + 0.6),
        y: padded(y_lo, y_hi, 0.08),
    };
    let mut out = svg_open(id, W, h, title, description);
    axes(&mut out, &f, "Fit version", y_label, true);
    let zero = f.py(0.0);
    let _ = write!(
        out,
        r#"<line class="zero" x1="{:.1}" y1="{zero:.1}" x2="{:.1}" y2="{zero:.1}" stroke="{INK}" stroke-width="1" stroke-dasharray="5 3"/>"#,
        f.left, f.right
    );
    let many = points.len() > 60;
    let mut verdicts = 0usize;
    for p in points {
        let cx = f.px(p.version as f64);
        let cy = f.py(p.slope);
        let colour = if p.verdict.is_some() { VERDICT } else { POINT };
        let _ = write!(out, r#"<g class="version"><title>{}</title>"#, html(&p.tip));
        if let Some((lo, hi)) = p.ci {
            let cap = if many { 0.0 } else { 4.0 };
            let _ = write!(
                out,
                r#"<path d="M{cx:.1},{:.1}V{:.1}M{:.1},{:.1}h{:.1}M{:.1},{:.1}h{:.1}" stroke="{colour}" stroke-width="1.4" fill="none"/>"#,
                f.py(lo),
                f.py(hi),
                cx - cap,
                f.py(lo),
                2.0 * cap,
                cx - cap,
                f.py(hi),
                2.0 * cap
            );
        }
        if p.verdict.is_some() {
            let _ = write!(
                out,
                r#"<path d="M{cx:.1},{:.1}l5,5l-5,5l-5,-5Z" fill="{VERDICT}"/>"#,
                cy - 5.0
            );
        } else {
            let _ = write!(
                out,
                r#"<circle cx="{cx:.1}" cy="{cy:.1}" r="{}" fill="{POINT}"/>"#,
                if many { 2.2 } else { 3.4 }
            );
        }
        out.push_str("</g>");
        if let Some(label) = &p.verdict {
            // Labels of neighbouring verdicts alternate between two rows;
            // near an edge a label runs inwards.
            let half = 2.9 * label.chars().count() as f64;
            let anchor = if cx + half > W - 4.0 {
                "end"
            } else if cx - half < 4.0 {
                "start"
            } else {
                "middle"
            };
            let y = f.top - 5.0 - 10.0 * (verdicts % 2) as f64;
            verdicts += 1;
            let _ = write!(
                out,
                r#"<line x1="{cx:.1}" y1="{:.1}" x2="{cx:.1}" y2="{:.1}" stroke="{VERDICT}" stroke-width="1" stroke-dasharray="2 2"/><text class="verdict-label" x="{cx:.1}" y="{y:.1}" font-size="10" text-anchor="{anchor}" fill="{VERDICT}">{}</text>"#,
                f.top,
                f.bottom,
                html(label)
            );
        }
    }
    out.push_str(&legend_svg);
    out.push_str("</svg>");
    out
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    fn point(x: f64, y: f64, marker: Marker, flag: Option<&str>) -> PlotPoint {
        PlotPoint {
            x,
            y,
            marker,
            flag: flag.map(|l| Flag {
                label: l.into(),
                open: true,
            }),
            tip: format!("tip <{x}>"),
        }
    }

    #[test]
    fn scatter_escapes_every_text_and_labels_flags() {
        let s = Scatter {
            id: "s1-scatter".into(),
            title: "<script>alert(1)</script>".into(),
            description: "a & b".into(),
            points: vec![
                point(1.0, 1.0, Marker::InFit, None),
                point(2.0, 2.2, Marker::InFit, Some("<b>Q7</b>")),
                point(3.0, 2.9, Marker::Excluded, None),
            ],
            band: Some(vec![
                BandPoint {
                    x: 1.0,
                    fit: 1.0,
                    low: 0.8,
                    high: 1.2,
                },
                BandPoint {
                    x: 3.0,
                    fit: 3.0,
                    low: 2.7,
                    high: 3.3,
                },
            ]),
            level: 0.95,
            x_label: "x <m>".into(),
            y_label: "y (µg/L)".into(),
        };
        let svg = scatter(&s);
        assert!(!svg.contains("<script"), "{svg}");
        assert!(!svg.contains("<b>"), "{svg}");
        assert!(svg.contains("&lt;script&gt;alert(1)&lt;/script&gt;"));
        assert!(svg.contains("&lt;b&gt;Q7&lt;/b&gt;</text>"));
        assert!(svg.contains("x &lt;m&gt;"));
        assert!(svg.contains("tip &lt;2&gt;"));
        assert!(svg.contains("95 % confidence band for the mean"));
        assert!(svg.contains(Marker::Excluded.legend()));
        assert!(!svg.contains(Marker::Proposed.legend()));
        assert!(!svg.contains("NaN") && !svg.contains("inf"));
    }

    #[test]
    fn a_record_out_of_the_fit_far_away_is_pinned_to_the_edge() {
        let mut points: Vec<PlotPoint> = (0..10)
            .map(|i| point(i as f64, 5.0 + 0.1 * i as f64, Marker::InFit, None))
            .collect();
        points.push(point(10.0, 60.0, Marker::Excluded, Some("QL-021")));
        let s = Scatter {
            id: "s3".into(),
            title: "t".into(),
            description: "d".into(),
            points,
            band: None,
            level: 0.95,
            x_label: "x".into(),
            y_label: "y".into(),
        };
        let svg = scatter(&s);
        assert_eq!(svg.matches("class=\"off-scale\"").count(), 1);
        assert!(svg.contains("beyond the plotted range"));
        // The y ticks stay near the fitted records (no tick at 60 or 50).
        assert!(
            !svg.contains(">60</text>") && !svg.contains(">50</text>"),
            "{svg}"
        );
        // Its label is still drawn.
        assert!(svg.contains(">QL-021</text>"));
        // A record in the fit is never pinned, however far.
        let mut s = s;
        s.points.last_mut().unwrap().marker = Marker::InFit;
        let svg = scatter(&s);
        assert!(!svg.contains("class=\"off-scale\""));
        assert!(svg.contains(">60</text>"));
    }

    #[test]
    fn a_single_point_and_no_band_still_draw() {
        let s = Scatter {
            id: "s2".into(),
            title: "t".into(),
            description: "d".into(),
            points: vec![point(2012.0, 5.0, Marker::InFit, None)],
            band: None,
            level: 0.95,
            x_label: "x".into(),
            y_label: "y".into(),
        };
        let svg = scatter(&s);
        assert!(svg.starts_with("<svg") && svg.ends_with("</svg>"));
        assert!(!svg.contains("NaN"));
        assert!(!svg.contains("fit-line"));
    }

    #[test]
    fn labels_of_neighbouring_flags_do_not_overlap() {
        let f = Frame {
            left: 72.0,
            right: 742.0,
            top: 14.0,
            bottom: 330.0,
            x: (0.0, 1.0),
            y: (0.0, 1.0),
        };
        let mut placed = Vec::new();
        let mut boxes = Vec::new();
        // Three flagged records a few pixels apart near the right edge.
        for cx in [700.0, 706.0, 712.0] {
            let (x, y, anchor) = place_label(cx, 200.0, 39.0, &f, &placed);
            let left = if anchor == "end" { x - 39.0 } else { x };
            let b = (left, y - 10.0, left + 39.0, y + 2.0);
            assert!(b.0 >= f.left && b.2 <= f.right, "{b:?} leaves the plot");
            placed.push(b);
            boxes.push(b);
        }
        for (i, a) in boxes.iter().enumerate() {
            for b in &boxes[i + 1..] {
                let apart = a.2 <= b.0 || a.0 >= b.2 || a.3 <= b.1 || a.1 >= b.3;
                assert!(apart, "{a:?} overlaps {b:?}");
            }
        }
    }

    #[test]
    fn history_marks_verdict_refits() {
        let pts = vec![
            HistoryPoint {
                version: 1,
                slope: 0.2,
                ci: Some((0.1, 0.3)),
                verdict: None,
                tip: "v1".into(),
            },
            HistoryPoint {
                version: 2,
                slope: 3.0,
                ci: Some((-0.4, 6.4)),
                verdict: None,
                tip: "v2".into(),
            },
            HistoryPoint {
                version: 3,
                slope: 0.21,
                ci: Some((0.15, 0.28)),
                verdict: Some("verdict 4: excluded".into()),
                tip: "v3".into(),
            },
        ];
        let svg = history("h1", "History", "d", &pts, "slope", 0.95);
        assert_eq!(svg.matches("class=\"verdict-label\"").count(), 1);
        assert!(svg.contains("verdict 4: excluded"));
        assert!(svg.contains("slope after a verdict"));
        assert!(svg.contains("class=\"zero\""));
        let none = history("h2", "History", "d", &pts[..2], "slope", 0.95);
        assert!(!none.contains("slope after a verdict"));
    }
}
