//! The chart in a finding message: the series' points, the fitted line with
//! and without the record under check, and that record ringed and labelled,
//! drawn into memory and encoded as PNG.
//!
//! Text is drawn with DejaVu Sans compiled into the binary
//! (`assets/DejaVuSans.ttf`, licence beside it), so the chart looks the same
//! on any machine and never depends on the system's fonts.
//!
//! **Invariant:** no files and no clock: pixels in memory, PNG bytes out.

use std::sync::OnceLock;

use plotters::coord::Shift;
use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};

use super::text;

/// Width of the chart in pixels.
pub const WIDTH: u32 = 720;
/// Height of the chart in pixels.
pub const HEIGHT: u32 = 420;

/// The font every label is drawn with, embedded at build time.
static FONT_BYTES: &[u8] = include_bytes!("../../assets/DejaVuSans.ttf");
/// The family name the font is registered under; plotters' default styles
/// ask for this one.
const FONT: &str = "sans-serif";

const WITH_COLOUR: RGBColor = RGBColor(31, 78, 140);
const WITHOUT_COLOUR: RGBColor = RGBColor(214, 110, 0);
const POINT_COLOUR: RGBColor = RGBColor(85, 85, 85);
const REVIEW_COLOUR: RGBColor = RGBColor(128, 60, 160);
/// The colour of the record under check. Tests look for it in the pixels.
pub const RECORD_COLOUR: RGBColor = RGBColor(200, 30, 30);

/// What a plotted point stands for.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum PointRole {
    /// An ordinary record of the series, part of the fit.
    Fitted,
    /// The record this message is about.
    ThisRecord,
    /// A record held back while it awaits the analyst's verdict.
    AwaitingReview,
}

/// One point of the series, on the original scale of x and y.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ChartPoint {
    /// Position along x (e.g. a decimal year or a distance).
    pub x: f64,
    /// The measured value, or where the caller places a non-detect (its
    /// limit, say); the non-detect policy is stated in the message text.
    pub y: f64,
    /// What the point stands for.
    pub role: PointRole,
    /// Drawn as an open marker when true.
    pub non_detect: bool,
}

/// Everything the chart shows. Lines are polylines in data coordinates, so
/// a fit on a transformed scale arrives already sampled as a curve.
#[derive(Debug, Clone, Copy)]
pub struct ChartSpec<'a> {
    /// The series' points.
    pub points: &'a [ChartPoint],
    /// The fit including the record under check (drawn solid).
    pub line_with: &'a [(f64, f64)],
    /// The fit without it (drawn dashed, in another colour).
    pub line_without: &'a [(f64, f64)],
    /// Axis title along x, e.g. `year` or `distance (m)`.
    pub x_label: &'a str,
    /// Axis title along y, e.g. `nitrate (mg/L)`.
    pub y_label: &'a str,
    /// Text placed beside the ringed record (its id).
    pub record_label: Option<&'a str>,
    /// Legend text of `line_with`.
    pub with_legend: &'a str,
    /// Legend text of `line_without`.
    pub without_legend: &'a str,
}

/// Why no chart came out.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ChartError {
    /// The embedded font was rejected by the font library.
    #[error("the embedded chart font could not be loaded")]
    Font,
    /// There was no finite point or line vertex to draw.
    #[error("nothing to draw: no finite points or line vertices")]
    Empty,
    /// The drawing library failed.
    #[error("drawing the chart failed: {0}")]
    Draw(String),
    /// The PNG encoder failed.
    #[error("encoding the chart as PNG failed: {0}")]
    Encode(String),
}

/// Sample points of the straight line `y = intercept + slope * x` between
/// `x_from` and `x_to`: the two ends suffice for a line on the original scale.
pub fn straight_line(intercept: f64, slope: f64, x_from: f64, x_to: f64) -> Vec<(f64, f64)> {
    vec![
        (x_from, intercept + slope * x_from),
        (x_to, intercept + slope * x_to),
    ]
}

/// Registers the embedded font with plotters once per process. plotters keeps
/// its fonts in a process-wide table, so this is the one piece of global
/// state here; registering the same bytes again would change nothing.
fn ensure_font() -> Result<(), ChartError> {
    static REGISTERED: OnceLock<bool> = OnceLock::new();
    let ok = *REGISTERED.get_or_init(|| {
        plotters::style::register_font(FONT, FontStyle::Normal, FONT_BYTES).is_ok()
    });
    if ok { Ok(()) } else { Err(ChartError::Font) }
}

/// Draws the chart and returns PNG bytes ([`WIDTH`] × [`HEIGHT`], 8-bit RGB).
pub fn draw_png(spec: &ChartSpec<'_>) -> Result<Vec<u8>, ChartError> {
    ensure_font()?;
    let (x_range, y_range) = ranges(spec).ok_or(ChartError::Empty)?;
    let mut pixels = vec![0u8; WIDTH as usize * HEIGHT as usize * 3];
    {
        let root = BitMapBackend::with_buffer(&mut pixels, (WIDTH, HEIGHT)).into_drawing_area();
        draw_into(&root, spec, x_range, y_range).map_err(ChartError::Draw)?;
        root.present()
            .map_err(|e| ChartError::Draw(e.to_string()))?;
    }
    encode_png(&pixels)
}

fn encode_png(rgb: &[u8]) -> Result<Vec<u8>, ChartError> {
    let mut out = Vec::with_capacity(64 * 1024);
    let mut encoder = png::Encoder::new(&mut out, WIDTH, HEIGHT);
    encoder.set_color(png::ColorType::Rgb);
    encoder.set_depth(png::BitDepth::Eight);
    encoder.set_compression(png::Compression::Balanced);
    let mut writer = encoder
        .write_header()
        .map_err(|e| ChartError::Encode(e.to_string()))?;
    writer
        .write_image_data(rgb)
        .map_err(|e| ChartError::Encode(e.to_string()))?;
    writer
        .finish()
        .map_err(|e| ChartError::Encode(e.to_string()))?;
    Ok(out)
}

/// Padded x and y ranges covering every finite point and line vertex.
fn ranges(spec: &ChartSpec<'_>) -> Option<((f64, f64), (f64, f64))> {
    let all = spec
        .points
        .iter()
        .map(|p| (p.x, p.y))
        .chain(spec.line_with.iter().copied())
        .chain(spec.line_without.iter().copied())
        .filter(|(x, y)| x.is_finite() && y.is_finite());
    let mut bounds: Option<(f64, f64, f64, f64)> = None;
    for (x, y) in all {
        bounds = Some(match bounds {
            None => (x, x, y, y),
            Some((x0, x1, y0, y1)) => (x0.min(x), x1.max(x), y0.min(y), y1.max(y)),
        });
    }
    let (x0, x1, y0, y1) = bounds?;
    Some((pad(x0, x1), pad(y0, y1)))
}

/// The corner of the plot whose legend-sized area covers the fewest
/// points and line vertices (the upper left on a tie): a falling transect
/// has its highest values in the upper left, a rising series in the upper
/// right, and a legend there would hide them.
fn legend_corner(
    spec: &ChartSpec<'_>,
    x_range: (f64, f64),
    y_range: (f64, f64),
) -> SeriesLabelPosition {
    // About the legend's share of the plot: four rows of text, 170 px of
    // a 640 px wide area.
    const WIDTH: f64 = 0.32;
    const HEIGHT: f64 = 0.30;
    let (xs, ys) = (x_range.1 - x_range.0, y_range.1 - y_range.0);
    let at = |(x, y): (f64, f64)| ((x - x_range.0) / xs, (y - y_range.0) / ys);
    let marks: Vec<(f64, f64)> = spec
        .points
        .iter()
        .map(|p| (p.x, p.y))
        .chain(spec.line_with.iter().copied())
        .chain(spec.line_without.iter().copied())
        .filter(|(x, y)| x.is_finite() && y.is_finite())
        .map(at)
        .collect();
    // Points count for more than line vertices: hiding a record is worse.
    let weight = |i: usize| if i < spec.points.len() { 4 } else { 1 };
    let covered = |left: bool, upper: bool| -> usize {
        marks
            .iter()
            .enumerate()
            .filter(|(_, (u, v))| {
                let in_x = if left { *u <= WIDTH } else { *u >= 1.0 - WIDTH };
                let in_y = if upper {
                    *v >= 1.0 - HEIGHT
                } else {
                    *v <= HEIGHT
                };
                in_x && in_y
            })
            .map(|(i, _)| weight(i))
            .sum()
    };
    [
        (SeriesLabelPosition::UpperLeft, covered(true, true)),
        (SeriesLabelPosition::UpperRight, covered(false, true)),
        (SeriesLabelPosition::LowerLeft, covered(true, false)),
        (SeriesLabelPosition::LowerRight, covered(false, false)),
    ]
    .into_iter()
    .min_by_key(|(_, c)| *c)
    .map_or(SeriesLabelPosition::UpperLeft, |(p, _)| p)
}

fn pad(lo: f64, hi: f64) -> (f64, f64) {
    let span = hi - lo;
    if span > 0.0 && span.is_finite() {
        (lo - 0.06 * span, hi + 0.06 * span)
    } else {
        let half = if lo == 0.0 { 1.0 } else { lo.abs() * 0.1 };
        (lo - half, hi + half)
    }
}

fn finite(points: &[(f64, f64)]) -> Vec<(f64, f64)> {
    points
        .iter()
        .copied()
        .filter(|(x, y)| x.is_finite() && y.is_finite())
        .collect()
}

fn draw_into(
    root: &DrawingArea<BitMapBackend<'_>, Shift>,
    spec: &ChartSpec<'_>,
    x_range: (f64, f64),
    y_range: (f64, f64),
) -> Result<(), String> {
    let e = |err: &dyn std::fmt::Display| err.to_string();
    root.fill(&WHITE).map_err(|x| e(&x))?;
    let mut chart = ChartBuilder::on(root)
        .margin(14)
        .x_label_area_size(46)
        .y_label_area_size(70)
        .build_cartesian_2d(x_range.0..x_range.1, y_range.0..y_range.1)
        .map_err(|x| e(&x))?;

    let axis_style = (FONT, 13).into_font().color(&BLACK);
    let tick_style = (FONT, 12).into_font().color(&BLACK);
    chart
        .configure_mesh()
        .x_desc(text::inline(spec.x_label, 60))
        .y_desc(text::inline(spec.y_label, 60))
        .axis_desc_style(axis_style)
        .label_style(tick_style)
        .x_labels(8)
        .y_labels(7)
        .x_label_formatter(&|v| text::num(*v))
        .y_label_formatter(&|v| text::num(*v))
        .light_line_style(RGBColor(236, 236, 236))
        .bold_line_style(RGBColor(215, 215, 215))
        .draw()
        .map_err(|x| e(&x))?;

    let with = finite(spec.line_with);
    if with.len() >= 2 {
        chart
            .draw_series(LineSeries::new(with, WITH_COLOUR.stroke_width(2)))
            .map_err(|x| e(&x))?
            .label(text::inline(spec.with_legend, 50))
            .legend(|(x, y)| {
                PathElement::new(vec![(x, y), (x + 22, y)], WITH_COLOUR.stroke_width(2))
            });
    }
    let without = finite(spec.line_without);
    if without.len() >= 2 {
        chart
            .draw_series(DashedLineSeries::new(
                without,
                7,
                5,
                WITHOUT_COLOUR.stroke_width(2),
            ))
            .map_err(|x| e(&x))?
            .label(text::inline(spec.without_legend, 50))
            .legend(|(x, y)| {
                PathElement::new(vec![(x, y), (x + 8, y)], WITHOUT_COLOUR.stroke_width(2))
            });
    }

    let pick = |role: PointRole, nd: bool| -> Vec<(f64, f64)> {
        spec.points
            .iter()
            .filter(|p| p.role == role && p.non_detect == nd && p.x.is_finite() && p.y.is_finite())
            .map(|p| (p.x, p.y))
            .collect()
    };

    // Ordinary points: filled discs; non-detects: open circles.
    let fitted = pick(PointRole::Fitted, false);
    let fitted_nd = pick(PointRole::Fitted, true);
    if !fitted.is_empty() {
        chart
            .draw_series(
                fitted
                    .iter()
                    .map(|&c| Circle::new(c, 3, POINT_COLOUR.filled())),
            )
            .map_err(|x| e(&x))?
            .label("record in the fit")
            .legend(|(x, y)| Circle::new((x + 11, y), 3, POINT_COLOUR.filled()));
    }
    if !fitted_nd.is_empty() {
        chart
            .draw_series(
                fitted_nd
                    .iter()
                    .map(|&c| Circle::new(c, 4, POINT_COLOUR.stroke_width(1))),
            )
            .map_err(|x| e(&x))?
            .label("non-detect (open marker)")
            .legend(|(x, y)| Circle::new((x + 11, y), 4, POINT_COLOUR.stroke_width(1)));
    }

    // Records awaiting review: triangles, open when a non-detect.
    let review = pick(PointRole::AwaitingReview, false);
    let review_nd = pick(PointRole::AwaitingReview, true);
    if !review.is_empty() || !review_nd.is_empty() {
        let mut shapes: Vec<TriangleMarker<(f64, f64), i32>> = review
            .iter()
            .map(|&c| TriangleMarker::new(c, 6, REVIEW_COLOUR.filled()))
            .collect();
        shapes.extend(
            review_nd
                .iter()
                .map(|&c| TriangleMarker::new(c, 6, REVIEW_COLOUR.stroke_width(1))),
        );
        chart
            .draw_series(shapes)
            .map_err(|x| e(&x))?
            .label("awaiting review")
            .legend(|(x, y)| TriangleMarker::new((x + 11, y), 6, REVIEW_COLOUR.filled()));
    }

    // The record under check: marker, ring and label.
    let this: Vec<&ChartPoint> = spec
        .points
        .iter()
        .filter(|p| p.role == PointRole::ThisRecord && p.x.is_finite() && p.y.is_finite())
        .collect();
    if !this.is_empty() {
        let label = spec
            .record_label
            .map(|l| text::inline(l, 32))
            .unwrap_or_default();
        let x_mid = (x_range.0 + x_range.1) / 2.0;
        let y_mid = (y_range.0 + y_range.1) / 2.0;
        chart
            .draw_series(this.iter().map(|p| {
                // Put the label on the side facing the middle of the plot so
                // that it is never cut off at an edge.
                let h = if p.x > x_mid { HPos::Right } else { HPos::Left };
                let v = if p.y > y_mid { VPos::Top } else { VPos::Bottom };
                let dx = if p.x > x_mid { -14 } else { 14 };
                let dy = if p.y > y_mid { 12 } else { -12 };
                let label_style = (FONT, 13)
                    .into_font()
                    .color(&RECORD_COLOUR)
                    .pos(Pos::new(h, v));
                let marker = if p.non_detect {
                    Circle::new((0, 0), 4, RECORD_COLOUR.stroke_width(2))
                } else {
                    Circle::new((0, 0), 4, RECORD_COLOUR.filled())
                };
                EmptyElement::at((p.x, p.y))
                    + marker
                    + Circle::new((0, 0), 11, RECORD_COLOUR.stroke_width(2))
                    + Text::new(label.clone(), (dx, dy), label_style)
            }))
            .map_err(|x| e(&x))?
            .label("record under check")
            .legend(|(x, y)| {
                EmptyElement::at((x + 11, y))
                    + Circle::new((0, 0), 3, RECORD_COLOUR.filled())
                    + Circle::new((0, 0), 7, RECORD_COLOUR.stroke_width(2))
            });
    }

    chart
        .configure_series_labels()
        .position(legend_corner(spec, x_range, y_range))
        .label_font((FONT, 12).into_font())
        .background_style(WHITE.mix(0.85))
        .border_style(RGBColor(160, 160, 160))
        .margin(8)
        .draw()
        .map_err(|x| e(&x))?;
    Ok(())
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    fn points(highlight: usize) -> Vec<ChartPoint> {
        (0..12)
            .map(|i| ChartPoint {
                x: 2020.0 + i as f64,
                y: 3.0 + 0.4 * i as f64 + if i % 3 == 0 { 0.3 } else { -0.2 },
                role: if i == highlight {
                    PointRole::ThisRecord
                } else if i == 4 {
                    PointRole::AwaitingReview
                } else {
                    PointRole::Fitted
                },
                non_detect: i == 1,
            })
            .collect()
    }

    fn png_for(pts: &[ChartPoint]) -> Vec<u8> {
        let with = straight_line(-805.0, 0.4, 2019.5, 2031.5);
        let without = straight_line(-600.0, 0.3, 2019.5, 2031.5);
        draw_png(&ChartSpec {
            points: pts,
            line_with: &with,
            line_without: &without,
            x_label: "year",
            y_label: "nitrate (mg/L)",
            record_label: Some("MW-3/2031-07"),
            with_legend: "fit with this record",
            without_legend: "fit without it",
        })
        .unwrap()
    }

    /// Decodes a PNG and returns (width, height, RGB pixels).
    fn decode(bytes: &[u8]) -> (u32, u32, Vec<u8>) {
        let decoder = png::Decoder::new(std::io::Cursor::new(bytes));
        let mut reader = decoder.read_info().unwrap();
        let mut buf = vec![0; reader.output_buffer_size().unwrap()];
        let info = reader.next_frame(&mut buf).unwrap();
        assert_eq!(info.color_type, png::ColorType::Rgb);
        buf.truncate(info.buffer_size());
        (info.width, info.height, buf)
    }

    fn count_colour(rgb: &[u8], c: RGBColor) -> usize {
        rgb.chunks_exact(3)
            .filter(|px| px[0] == c.0 && px[1] == c.1 && px[2] == c.2)
            .count()
    }

    #[test]
    fn chart_is_a_png_of_the_promised_size_with_every_layer() {
        let bytes = png_for(&points(11));
        assert_eq!(&bytes[..8], b"\x89PNG\r\n\x1a\n");
        let (w, h, rgb) = decode(&bytes);
        assert_eq!((w, h), (WIDTH, HEIGHT));
        // Both lines, the review marker and the ringed record leave pixels of
        // their exact colours; text antialiasing cannot fake a solid run.
        assert!(
            count_colour(&rgb, WITH_COLOUR) > 200,
            "solid fit line missing"
        );
        assert!(
            count_colour(&rgb, WITHOUT_COLOUR) > 100,
            "dashed fit line missing"
        );
        assert!(
            count_colour(&rgb, REVIEW_COLOUR) > 20,
            "review marker missing"
        );
        assert!(
            count_colour(&rgb, RECORD_COLOUR) > 60,
            "record ring missing"
        );
    }

    #[test]
    fn the_legend_goes_where_it_hides_the_fewest_records() {
        let spec = |pts: &[ChartPoint]| {
            let spec = ChartSpec {
                points: pts,
                line_with: &[],
                line_without: &[],
                x_label: "",
                y_label: "",
                record_label: None,
                with_legend: "",
                without_legend: "",
            };
            let (xr, yr) = ranges(&spec).unwrap();
            legend_corner(&spec, xr, yr)
        };
        // Rising: the upper left is empty.
        assert!(matches!(spec(&points(11)), SeriesLabelPosition::UpperLeft));
        // Falling, as along a transect from its source: the upper right.
        let falling: Vec<ChartPoint> = points(11)
            .into_iter()
            .map(|p| ChartPoint { y: 10.0 - p.y, ..p })
            .collect();
        assert!(matches!(spec(&falling), SeriesLabelPosition::UpperRight));
    }

    #[test]
    fn chart_changes_when_the_highlighted_record_moves() {
        let a = png_for(&points(11));
        let b = png_for(&points(7));
        assert_ne!(a, b);
        let (_, _, pa) = decode(&a);
        let (_, _, pb) = decode(&b);
        let differing = pa
            .chunks_exact(3)
            .zip(pb.chunks_exact(3))
            .filter(|(p, q)| p != q)
            .count();
        assert!(differing > 100, "only {differing} pixels differ");
    }

    #[test]
    fn text_is_drawn_with_the_embedded_font() {
        // The same chart with and without axis titles: glyphs must add dark
        // pixels, which proves the embedded font rendered text.
        let pts = points(11);
        let with_titles = png_for(&pts);
        let without_titles = draw_png(&ChartSpec {
            points: &pts,
            line_with: &straight_line(-805.0, 0.4, 2019.5, 2031.5),
            line_without: &straight_line(-600.0, 0.3, 2019.5, 2031.5),
            x_label: "",
            y_label: "",
            record_label: Some("MW-3/2031-07"),
            with_legend: "fit with this record",
            without_legend: "fit without it",
        })
        .unwrap();
        let dark = |b: &[u8]| {
            let (_, _, rgb) = decode(b);
            rgb.chunks_exact(3)
                .filter(|p| p[0] < 100 && p[1] < 100 && p[2] < 100)
                .count()
        };
        assert!(dark(&with_titles) > dark(&without_titles) + 100);
    }

    #[test]
    fn nothing_finite_is_an_error_not_a_blank_picture() {
        let pts = [ChartPoint {
            x: f64::NAN,
            y: 1.0,
            role: PointRole::Fitted,
            non_detect: false,
        }];
        let err = draw_png(&ChartSpec {
            points: &pts,
            line_with: &[],
            line_without: &[],
            x_label: "year",
            y_label: "y",
            record_label: None,
            with_legend: "",
            without_legend: "",
        })
        .unwrap_err();
        assert_eq!(err, ChartError::Empty);
    }

    #[test]
    fn a_single_point_still_gets_a_chart() {
        let pts = [ChartPoint {
            x: 5.0,
            y: 5.0,
            role: PointRole::ThisRecord,
            non_detect: false,
        }];
        let bytes = draw_png(&ChartSpec {
            points: &pts,
            line_with: &[],
            line_without: &[],
            x_label: "distance (m)",
            y_label: "lead (µg/L)",
            record_label: Some("B-7"),
            with_legend: "",
            without_legend: "",
        })
        .unwrap();
        let (w, h, _) = decode(&bytes);
        assert_eq!((w, h), (WIDTH, HEIGHT));
    }
}
