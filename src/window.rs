//! Analysis windows: which of a series' points its fit uses. Pure: parsing,
//! the stored text form, and the selection of points.
//!
//! - `x:LO..HI`: points with LO ≤ x ≤ HI (either side may be empty: open);
//! - `last:N`: the N most recent records (by arrival);
//! - `since:YYYY-MM-DD`: points sampled on or after the date, for series
//!   whose x is the sampling date as a decimal year.
//!
//! Bounds are on the original x; [`Window::on_fit_scale`] carries them to
//! the fitted scale when the transform takes ln x.

use crate::records::dates::decimal_year;
use crate::stats::Transform;

/// A window.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Window {
    /// LO ≤ x ≤ HI; None is open.
    XRange {
        /// Lower bound.
        lo: Option<f64>,
        /// Upper bound.
        hi: Option<f64>,
    },
    /// The last N records.
    Last(usize),
    /// On or after a date (x as decimal year).
    Since {
        /// Year.
        year: i32,
        /// Month 1-12.
        month: u32,
        /// Day 1-31.
        day: u32,
    },
}

impl Window {
    /// Reads the stored text form (see the module docs); the error says
    /// what to write instead.
    pub fn parse(s: &str) -> Result<Window, String> {
        let bad = || {
            format!(
                "`{s}` is not a window; write `x:LO..HI` (either side may be left empty), `last:N` or `since:YYYY-MM-DD`"
            )
        };
        let (kind, rest) = s.trim().split_once(':').ok_or_else(bad)?;
        match kind {
            "x" => {
                let (lo, hi) = rest.split_once("..").ok_or_else(bad)?;
                let num = |t: &str| -> Result<Option<f64>, String> {
                    let t = t.trim();
                    if t.is_empty() {
                        return Ok(None);
                    }
                    match t.parse::<f64>() {
                        Ok(v) if v.is_finite() => Ok(Some(v)),
                        _ => Err(bad()),
                    }
                };
                let (lo, hi) = (num(lo)?, num(hi)?);
                if let (Some(a), Some(b)) = (lo, hi)
                    && a > b
                {
                    return Err(format!(
                        "`{s}`: the lower bound {a} is above the upper bound {b}"
                    ));
                }
                if lo.is_none() && hi.is_none() {
                    return Err(format!(
                        "`{s}` bounds nothing; leave the window out to use all points"
                    ));
                }
                Ok(Window::XRange { lo, hi })
            }
            "last" => match rest.trim().parse::<usize>() {
                Ok(n) if n >= 3 => Ok(Window::Last(n)),
                Ok(_) => Err(format!(
                    "`{s}`: a fit needs at least 3 points; write last:3 or more"
                )),
                Err(_) => Err(bad()),
            },
            "since" => {
                let parts: Vec<&str> = rest.trim().split('-').collect();
                let [y, m, d] = parts.as_slice() else {
                    return Err(bad());
                };
                let (Ok(year), Ok(month), Ok(day)) =
                    (y.parse::<i32>(), m.parse::<u32>(), d.parse::<u32>())
                else {
                    return Err(bad());
                };
                if !(1..=12).contains(&month) || !(1..=31).contains(&day) || y.len() != 4 {
                    return Err(bad());
                }
                Ok(Window::Since { year, month, day })
            }
            _ => Err(bad()),
        }
    }

    /// The stored text form; `Window::parse(&w.text()) == Ok(w)`.
    pub fn text(&self) -> String {
        match *self {
            Window::XRange { lo, hi } => format!(
                "x:{}..{}",
                lo.map_or(String::new(), |v| v.to_string()),
                hi.map_or(String::new(), |v| v.to_string())
            ),
            Window::Last(n) => format!("last:{n}"),
            Window::Since { year, month, day } => format!("since:{year:04}-{month:02}-{day:02}"),
        }
    }

    /// The same window with its x bounds on the fitted scale.
    pub fn on_fit_scale(&self, t: Transform) -> Window {
        match (*self, t) {
            (Window::XRange { lo, hi }, Transform::LogX | Transform::LogLog) => {
                let ln = |v: f64| if v > 0.0 { v.ln() } else { f64::NEG_INFINITY };
                Window::XRange {
                    lo: lo.map(ln),
                    hi: hi.map(ln),
                }
            }
            (w, _) => w,
        }
    }

    /// Whether a point at x (fitted scale) can be in the window, leaving
    /// `last:N` aside (it depends on the order, not on x).
    pub fn admits_x(&self, x: f64) -> bool {
        match *self {
            Window::XRange { lo, hi } => lo.is_none_or(|l| x >= l) && hi.is_none_or(|h| x <= h),
            Window::Last(_) => true,
            Window::Since { year, month, day } => x >= decimal_year(year, month, day, 0),
        }
    }

    /// The points of the window from a series' points in arrival order
    /// (fitted scale; pass the window through [`Window::on_fit_scale`]).
    pub fn select<T: Copy>(&self, points: &[T], x_of: impl Fn(&T) -> f64) -> Vec<T> {
        match *self {
            Window::Last(n) => points[points.len().saturating_sub(n)..].to_vec(),
            w => points
                .iter()
                .copied()
                .filter(|p| w.admits_x(x_of(p)))
                .collect(),
        }
    }
}

/// The window text of an optional window (None: all points).
pub fn text_of(w: Option<&Window>) -> Option<String> {
    w.map(Window::text)
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    #[test]
    fn every_form_reads_back_from_its_text() {
        for s in [
            "x:1.5..200",
            "x:..2020",
            "x:3..",
            "last:40",
            "since:2015-01-01",
        ] {
            let w = Window::parse(s).unwrap();
            assert_eq!(w.text(), s);
            assert_eq!(Window::parse(&w.text()).unwrap(), w);
        }
    }

    #[test]
    fn nonsense_is_refused_with_what_to_write() {
        for s in [
            "x:5..1",
            "x:..",
            "last:2",
            "last:many",
            "since:2015-13-01",
            "since:15-1-1",
            "y:1..2",
            "x:nan..1",
        ] {
            let e = Window::parse(s).unwrap_err();
            assert!(e.contains(s), "{e}");
        }
    }

    #[test]
    fn selection_keeps_the_window_in_arrival_order() {
        let pts = [(1.0, 10.0), (5.0, 11.0), (3.0, 12.0), (9.0, 13.0)];
        let x = |p: &(f64, f64)| p.0;
        assert_eq!(
            Window::parse("x:2..6").unwrap().select(&pts, x),
            vec![(5.0, 11.0), (3.0, 12.0)]
        );
        assert_eq!(
            Window::Last(2).select(&pts, x),
            vec![(3.0, 12.0), (9.0, 13.0)]
        );
        assert_eq!(Window::Last(10).select(&pts, x).len(), 4);
        let since = Window::parse("since:2020-07-01").unwrap();
        assert!(since.admits_x(2020.5));
        assert!(!since.admits_x(2020.49));
    }

    #[test]
    fn log_x_bounds_move_to_the_fitted_scale() {
        let w = Window::parse("x:1..100")
            .unwrap()
            .on_fit_scale(Transform::LogX);
        assert!(w.admits_x(100f64.ln()));
        assert!(!w.admits_x(101f64.ln()));
    }
}
