//! Possible entry errors behind a suspicious record, ranked.
//!
//! When a record is flagged, the first thing to check is whether it was
//! typed wrong. This module proposes concrete corrected values for the
//! record (METHODS.md §8) and scores each one by how well it would fit the
//! series' trend *without* the record. It never corrects anything: it only
//! proposes, and the wording says "consistent with", never "caused by".
//!
//! # Candidates, in the order they are tried
//!
//! - decimal slip in y: y × 10^k, k = ±1, ±2 and ±3, except the factors the
//!   unit candidates cover;
//! - unit mix-up: y × 1000 or y / 1000 (µg/L written as mg/L and the like,
//!   numerically identical to a 3-place decimal slip, which the label says),
//!   and y × 10⁶ or y / 10⁶ when the series' unit has such a neighbour
//!   (mg/L and ng/L, g/L and µg/L, ppm and ppt). Neighbours come from the
//!   unit table in [`crate::records::units`]; with an unknown unit only the
//!   factor 1000 is tried, worded generically;
//! - sign: −y;
//! - transposed adjacent digits of y as written (`"4.71"` gives `"7.41"` and
//!   `"4.17"`): see [`digit_swaps`];
//! - transposed adjacent digits of x as written, when the text spells x as a
//!   plain number (a date such as `2024-03-15` is not swapped);
//! - for a distance or other x: x × 10 and x / 10; for decimal years: the
//!   year off by ±1 and ±10 (a day/month swap is not tried);
//! - another series: the record as written, judged against each other
//!   series' fit.
//!
//! A candidate equal to the record as written is dropped.
//!
//! # Score
//!
//! On the fitted scale (after the series' [`Transform`]), for a candidate
//! (x', y') and a fit without the record (n points, residual SD s,
//! df = n − 2):
//!
//! t = (y' − ŷ(x')) / se_pred(x'), se_pred = s·√(1 + v), v = 1/n + (x' − x̄)²/Sxx,
//!
//! and p is the two-sided tail of Student t with df degrees of freedom
//! ([`t_two_sided_p`]). The record as written gets the same score. A
//! candidate that cannot be put on the fitted scale (zero or negative under
//! a log) is not plausible and is only counted.
//!
//! # Which candidates are listed
//!
//! A candidate is listed when it fits markedly better than the record as
//! written:
//!
//! - p' ≥ max([`MIN_P`], [`BETTER_BY`] × p), where p is the record's own
//!   p-value (just p' ≥ [`MIN_P`] when the record as written cannot be put
//!   on the fitted scale). A record that fits (p ≥ 0.05) would need
//!   p' ≥ 1, a candidate exactly on the line, so in practice gets none;
//! - a candidate judged at another x or against another series' fit also
//!   needs v ≤ [`MAX_LEVERAGE_FACTOR`]: far outside the data the prediction
//!   interval is so wide that any value "fits", which says nothing. So a
//!   moved x must stay where the line is known at least as well as a single
//!   observation.
//!
//! Listed candidates are sorted by p, best first (ties keep the order
//! above), and cut to the number asked for. Two candidates proposing the
//! same corrected values (`"40"` read as `"04"`, and 40 / 10) are both
//! marked [`Candidate::tied`]: the data cannot tell them apart.
//!
//! Invariant: pure. No I/O, no clock, no globals; no NaN or infinity is
//! returned.

use crate::records::units::{Matrix, convert};
use crate::stats::dist::{t_beyond_p_bound, t_two_sided_p};
use crate::stats::{LineFit, Transform};

/// The p-value a candidate needs at least, however badly the record fits.
/// 0.05: the corrected value lies inside the 95 % prediction interval.
pub const MIN_P: f64 = 0.05;

/// How many times larger than the record's own p-value a candidate's
/// p-value must be to count as fitting markedly better.
pub const BETTER_BY: f64 = 20.0;

/// The largest v = 1/n + (x' − x̄)²/Sxx allowed for a candidate judged at a
/// moved x or against another series: 1 means the fitted line at x' is
/// known at least as well as one new observation would be.
pub const MAX_LEVERAGE_FACTOR: f64 = 1.0;

/// A sensible number of candidates to list in a message.
pub const DEFAULT_MAX: usize = 3;

/// Powers of ten tried for a decimal slip in y.
const DECIMAL_SLIPS: [i32; 6] = [1, -1, 2, -2, 3, -3];

/// Powers of ten tried for a unit mix-up: y / 1000, y × 1000, y / 10⁶, y × 10⁶.
const UNIT_STEPS: [i32; 4] = [-3, 3, -6, 6];

/// Units offered as the unit a record may have been written in, spelled
/// for people. Each is in the table of [`crate::records::units`].
const UNIT_SPELLINGS: [&str; 11] = [
    "g/kg", "mg/kg", "µg/kg", "ng/kg", "g/L", "mg/L", "µg/L", "ng/L", "ppm", "ppb", "ppt",
];

/// At most this many digits are swapped in a field as written; longer
/// texts are not plain entries.
const MAX_DIGITS: usize = 30;

/// Significant digits shown for values in labels.
const LABEL_DIGITS: usize = 12;

/// What x measures, which decides the x typos tried and the wording.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum XKind {
    /// Sampling date as a decimal year (2024.5): a wrong year is tried.
    DecimalYear,
    /// Distance from a source: a decimal slip in x is tried.
    Distance,
    /// Anything else measured on a plain number line: as a distance.
    Other,
}

impl XKind {
    /// What to call x in a label.
    pub fn word(self) -> &'static str {
        match self {
            XKind::DecimalYear => "date",
            XKind::Distance => "distance",
            XKind::Other => "x",
        }
    }
}

/// The kind of entry error a candidate stands for.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum CauseKind {
    /// Decimal point slipped in y.
    DecimalSlip,
    /// Value written in a unit 1000 or a million times larger or smaller.
    UnitMixUp,
    /// Sign typed wrong.
    Sign,
    /// Adjacent digits of y transposed.
    SwappedDigitsY,
    /// Adjacent digits of x transposed.
    SwappedDigitsX,
    /// Decimal point slipped in x (distance or other x).
    DecimalSlipX,
    /// Year off by 1 or 10 (decimal-year x).
    WrongYear,
    /// The record belongs to another series.
    OtherSeries,
}

impl CauseKind {
    /// Whether the candidate is judged at another x or against another
    /// fit, so that [`MAX_LEVERAGE_FACTOR`] applies.
    pub fn moves_x(self) -> bool {
        matches!(
            self,
            CauseKind::SwappedDigitsX
                | CauseKind::DecimalSlipX
                | CauseKind::WrongYear
                | CauseKind::OtherSeries
        )
    }
}

/// What a candidate changed in the record.
#[derive(Debug, Clone, PartialEq)]
pub enum Change {
    /// y multiplied by 10^k (k negative: divided by 10^−k).
    ScaleY {
        /// The power of ten.
        power: i32,
    },
    /// y negated.
    NegateY,
    /// Two adjacent digits of y swapped in the text as written.
    SwapY {
        /// y as written.
        written: String,
        /// y with the two digits swapped.
        proposed: String,
    },
    /// Two adjacent digits of x swapped in the text as written.
    SwapX {
        /// x as written.
        written: String,
        /// x with the two digits swapped.
        proposed: String,
    },
    /// x multiplied by 10^k (k negative: divided by 10^−k).
    ScaleX {
        /// The power of ten.
        power: i32,
    },
    /// Years added to a decimal-year x (±1, ±10).
    ShiftYears {
        /// Years added.
        years: i32,
    },
    /// Nothing changed; judged against another series' fit.
    OtherSeries {
        /// That series' name.
        series: String,
    },
}

/// How well a value fits a trend: the prediction t statistic and its
/// two-sided p-value, on the fitted scale.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Score {
    /// t = (y − ŷ(x)) / se_pred(x).
    pub t: f64,
    /// Two-sided p-value of t with the fit's residual degrees of freedom.
    pub p: f64,
    /// v = 1/n + (x − x̄)²/Sxx at this x in the fit judged against.
    pub leverage_factor: f64,
    /// Degrees of freedom of t.
    pub df: usize,
}

/// One proposed correction of the record, with its score.
#[derive(Debug, Clone, PartialEq)]
pub struct Candidate {
    /// The kind of entry error.
    pub kind: CauseKind,
    /// A short line for people, e.g. "decimal point slipped 1 place: 4.73
    /// mg/L instead of 47.3 mg/L".
    pub label: String,
    /// Corrected x, original units.
    pub x: f64,
    /// Corrected y, original units.
    pub y: f64,
    /// How well (x, y) fits the series without the record (or the other
    /// series, for [`CauseKind::OtherSeries`]).
    pub score: Score,
    /// The factor, swap or shift applied.
    pub change: Change,
    /// Another listed candidate proposes the same x and y.
    pub tied: bool,
}

/// Everything [`rank_causes`] needs: plain data, original units for the
/// record, fitted scale for the fits.
#[derive(Debug, Clone, Copy)]
pub struct CauseInput<'a> {
    /// The series' fit without the record, on the fitted scale.
    pub fit_without: &'a LineFit,
    /// The series' transform (the scale of `fit_without`).
    pub transform: Transform,
    /// The record's x as parsed, original units.
    pub x: f64,
    /// The record's y as parsed, original units.
    pub y: f64,
    /// The x field exactly as written in the file.
    pub x_raw: &'a str,
    /// The y field exactly as written in the file.
    pub y_raw: &'a str,
    /// What x measures.
    pub x_kind: XKind,
    /// The series' unit as configured, e.g. "mg/L".
    pub unit: Option<&'a str>,
    /// x's unit as configured (`x_unit`), e.g. "m"; shown after a
    /// corrected x that is not a year.
    pub x_unit: Option<&'a str>,
    /// Other series (name, fit) on the same unit and fitted scale.
    pub others: &'a [(&'a str, &'a LineFit)],
    /// At most this many candidates are listed.
    pub max: usize,
}

/// Why no candidates could be scored at all.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Unavailable {
    /// The fit without the record has fewer than 3 points (no residual
    /// degrees of freedom).
    TooFewPoints {
        /// Points in the fit without the record.
        n: usize,
    },
    /// The fit without the record has no scatter (the points lie exactly
    /// on a line), so no prediction interval exists.
    NoScatter,
    /// The record's x or y is not a finite number.
    RecordNotFinite,
}

impl Unavailable {
    /// A sentence for people.
    pub fn explain(self) -> &'static str {
        match self {
            Unavailable::TooFewPoints { .. } => {
                "too few other points to judge corrections against (need at least 3)"
            }
            Unavailable::NoScatter => {
                "the other points lie exactly on a line, so no correction can be judged"
            }
            Unavailable::RecordNotFinite => "the record's value is not a finite number",
        }
    }
}

/// Every candidate that could be put on the fitted scale, scored, in the
/// order tried.
#[derive(Debug, Clone, PartialEq)]
pub struct Scored {
    /// The record as written; `None` when it cannot be put on the fitted
    /// scale (e.g. a negative value under a log).
    pub as_written: Option<Score>,
    /// Scored candidates, in the order tried, `tied` not yet set.
    pub candidates: Vec<Candidate>,
    /// Candidates that could not be put on the fitted scale (or whose
    /// score overflowed), so were not plausible.
    pub off_scale: usize,
}

/// The ranked candidates for one record.
#[derive(Debug, Clone, PartialEq)]
pub struct Ranked {
    /// The record as written; `None` when unavailable or off the fitted
    /// scale.
    pub as_written: Option<Score>,
    /// The p-value a candidate needed (see the module documentation).
    pub needed_p: f64,
    /// Listed candidates, best first, at most `max`.
    pub candidates: Vec<Candidate>,
    /// How many candidates were scored.
    pub scored: usize,
    /// How many candidates were tried but could not be put on the fitted
    /// scale.
    pub off_scale: usize,
    /// Why nothing could be scored, if so; then `candidates` is empty.
    pub unavailable: Option<Unavailable>,
}

/// The p-value a candidate needs to be listed, given the record's own
/// score: max([`MIN_P`], [`BETTER_BY`] × p), or [`MIN_P`] when the record
/// as written is off the fitted scale.
pub fn needed_p(as_written: Option<&Score>) -> f64 {
    match as_written {
        Some(s) => MIN_P.max(BETTER_BY * s.p),
        None => MIN_P,
    }
}

/// Ranks the possible entry errors behind a record: the candidates that fit
/// the series without the record markedly better than the record as
/// written, best first, at most `input.max`.
pub fn rank_causes(input: &CauseInput<'_>) -> Ranked {
    let (scored, settled) = match score_with(input, Tail::Later) {
        Ok(s) => s,
        Err(reason) => {
            return Ranked {
                as_written: None,
                needed_p: MIN_P,
                candidates: Vec::new(),
                scored: 0,
                off_scale: 0,
                unavailable: Some(reason),
            };
        }
    };
    let needed = needed_p(scored.as_written.as_ref());
    let count = scored.candidates.len() + settled;
    let passes_leverage =
        |c: &Candidate| !c.kind.moves_x() || c.score.leverage_factor <= MAX_LEVERAGE_FACTOR;
    // The p-value (an incomplete beta function, most of the cost of
    // ranking) is computed only where it can matter. Against the fit without
    // the record, p falls as |t| grows, so those candidates are visited by
    // |t|: the first below the needed p ends the visit, and after `max`
    // listed ones only exact ties of the last |t| are still visited (a tie
    // keeps the order tried and marks `tied`, as if every p were known).
    // Candidates scored against other series' fits get their p: those that
    // the t tail's upper bound already put below the needed p, or that lie
    // too far out in x, were settled in `score_with` and are not here.
    let mut own: Vec<(usize, Candidate)> = Vec::new();
    let mut listed: Vec<(usize, Candidate)> = Vec::new();
    for (i, mut c) in scored.candidates.into_iter().enumerate() {
        if c.kind == CauseKind::OtherSeries {
            c.score.p = t_two_sided_p(c.score.t, c.score.df as f64);
            if c.score.p >= needed {
                listed.push((i, c));
            }
        } else if passes_leverage(&c) {
            own.push((i, c));
        }
    }
    own.sort_by(|a, b| {
        a.1.score
            .t
            .abs()
            .total_cmp(&b.1.score.t.abs())
            .then(a.0.cmp(&b.0))
    });
    let mut taken = 0;
    let mut last_t: Option<f64> = None;
    for (i, mut c) in own {
        if let Some(t) = last_t
            && c.score.t.abs() != t
        {
            break;
        }
        c.score.p = t_two_sided_p(c.score.t, c.score.df as f64);
        if c.score.p < needed {
            break;
        }
        taken += 1;
        if taken >= input.max && last_t.is_none() {
            last_t = Some(c.score.t.abs());
        }
        listed.push((i, c));
    }
    // Stable: equal p keeps the order tried.
    listed.sort_by_key(|(i, _)| *i);
    let mut listed: Vec<Candidate> = listed.into_iter().map(|(_, c)| c).collect();
    listed.sort_by(|a, b| b.score.p.total_cmp(&a.score.p));
    let same: Vec<bool> = (0..listed.len())
        .map(|i| {
            listed.iter().enumerate().any(|(j, o)| {
                j != i && same_value(o.x, listed[i].x) && same_value(o.y, listed[i].y)
            })
        })
        .collect();
    for (c, tied) in listed.iter_mut().zip(same) {
        c.tied = tied;
    }
    listed.truncate(input.max);
    for c in &mut listed {
        c.label = label_of(input, c.kind, &c.change, c.x, c.y);
    }
    Ranked {
        as_written: scored.as_written,
        needed_p: needed,
        candidates: listed,
        scored: count,
        off_scale: scored.off_scale,
        unavailable: None,
    }
}

/// Whether [`score_with`] computes the candidates' p-values.
#[derive(Clone, Copy, PartialEq, Eq)]
enum Tail {
    Now,
    /// Left NaN for the caller to compute where needed.
    Later,
}

/// Scores the record as written and every candidate, without filtering or
/// sorting (for reports that show everything tried, and for tests).
pub fn score_candidates(input: &CauseInput<'_>) -> Result<Scored, Unavailable> {
    let (mut scored, _) = score_with(input, Tail::Now)?;
    for c in &mut scored.candidates {
        c.label = label_of(input, c.kind, &c.change, c.x, c.y);
    }
    Ok(scored)
}

/// The record as written and its candidates scored, and (with
/// [`Tail::Later`]) how many candidates against other series were settled
/// unlisted and left out: a prediction interval that the record's value
/// misses by far (the t tail's upper bound is below the p needed), or an x
/// beyond [`MAX_LEVERAGE_FACTOR`] of that series. A record has a candidate
/// per related series, often a hundred, nearly all settled so, and none
/// of those is built (each copied its series' name for nothing).
fn score_with(input: &CauseInput<'_>, tail: Tail) -> Result<(Scored, usize), Unavailable> {
    usable(input.fit_without)?;
    if !(input.x.is_finite() && input.y.is_finite()) {
        return Err(Unavailable::RecordNotFinite);
    }
    let as_written = score(input.fit_without, input.transform, input.x, input.y);
    let proposals = proposals(input);
    let mut candidates = Vec::with_capacity(proposals.len());
    let mut off_scale = 0;
    let mut settled = 0;
    let needed = needed_p(as_written.as_ref());
    // The |t| beyond which the t tail's upper bound is below the p needed
    // (with a margin that keeps round-off out of the decision): a
    // candidate there cannot be listed.
    let settled_beyond = t_beyond_p_bound(needed * 0.999);
    let others = input.others.iter().map(|&(series, fit)| Proposal {
        kind: CauseKind::OtherSeries,
        change: Change::OtherSeries {
            series: String::new(),
        },
        x: input.x,
        y: input.y,
        against: Some((series, fit)),
    });
    for proposal in proposals.into_iter().chain(others) {
        if same_value(proposal.x, input.x)
            && same_value(proposal.y, input.y)
            && proposal.kind != CauseKind::OtherSeries
        {
            continue;
        }
        let fit = match &proposal.against {
            Some((_, fit)) => *fit,
            None => input.fit_without,
        };
        let scored = score_t(fit, input.transform, proposal.x, proposal.y);
        if let (Some(s), Some(_), Tail::Later) = (&scored, proposal.against, tail)
            && (s.leverage_factor > MAX_LEVERAGE_FACTOR || s.t.abs() > settled_beyond)
        {
            settled += 1;
            continue;
        }
        let change = match (proposal.kind, proposal.against) {
            (CauseKind::OtherSeries, Some((series, _))) => Change::OtherSeries {
                series: series.to_string(),
            },
            _ => proposal.change,
        };
        match scored {
            Some(mut s) => candidates.push(Candidate {
                score: {
                    if tail == Tail::Now {
                        s.p = t_two_sided_p(s.t, s.df as f64);
                    }
                    s
                },
                kind: proposal.kind,
                // Written by the caller for the candidates it keeps.
                label: String::new(),
                x: proposal.x,
                y: proposal.y,
                change,
                tied: false,
            }),
            None => off_scale += 1,
        }
    }
    Ok((
        Scored {
            as_written,
            candidates,
            off_scale,
        },
        settled,
    ))
}

/// Scores (x, y), original units, against `fit` on the scale of
/// `transform`. `None` when the point cannot be put on that scale or the
/// fit cannot judge it.
pub fn score(fit: &LineFit, transform: Transform, x: f64, y: f64) -> Option<Score> {
    score_t(fit, transform, x, y).map(|s| Score {
        p: t_two_sided_p(s.t, s.df as f64),
        ..s
    })
}

/// [`score`] without its p-value (NaN).
fn score_t(fit: &LineFit, transform: Transform, x: f64, y: f64) -> Option<Score> {
    if usable(fit).is_err() {
        return None;
    }
    let (tx, ty) = transform.apply(0, x, y).ok()?;
    let se = fit.se_prediction_at(tx);
    let t = (ty - fit.predict(tx)) / se;
    let v = fit.moments.leverage_factor(tx)?;
    if !(se > 0.0 && t.is_finite() && v.is_finite()) {
        return None;
    }
    Some(Score {
        t,
        p: f64::NAN,
        leverage_factor: v,
        df: fit.df,
    })
}

fn usable(fit: &LineFit) -> Result<(), Unavailable> {
    if fit.n < 3 || fit.df < 1 {
        return Err(Unavailable::TooFewPoints { n: fit.n });
    }
    if fit.exact || !(fit.residual_sd > 0.0 && fit.residual_sd.is_finite()) {
        return Err(Unavailable::NoScatter);
    }
    Ok(())
}

/// A candidate before scoring.
struct Proposal<'a> {
    kind: CauseKind,
    /// For another series, left blank until the candidate is built.
    change: Change,
    x: f64,
    y: f64,
    /// Another series (name, fit) judged against instead of the record's.
    against: Option<(&'a str, &'a LineFit)>,
}

fn proposals<'a>(input: &CauseInput<'a>) -> Vec<Proposal<'a>> {
    let (x, y) = (input.x, input.y);
    let unit = label_unit(input);
    let mut out = Vec::new();
    let push_y = |kind, change, new_y: f64, out: &mut Vec<Proposal<'a>>| {
        out.push(Proposal {
            kind,
            change,
            x,
            y: new_y,
            against: None,
        });
    };

    // Unit mix-ups first decide which decimal slips they cover.
    let units: Vec<i32> = UNIT_STEPS
        .iter()
        .copied()
        .filter(|&k| unit_wording(unit, k).is_some())
        .collect();
    for &k in &DECIMAL_SLIPS {
        if units.contains(&k) {
            continue;
        }
        push_y(
            CauseKind::DecimalSlip,
            Change::ScaleY { power: k },
            scale10(y, k),
            &mut out,
        );
    }
    for k in units {
        push_y(
            CauseKind::UnitMixUp,
            Change::ScaleY { power: k },
            scale10(y, k),
            &mut out,
        );
    }
    push_y(CauseKind::Sign, Change::NegateY, -y, &mut out);
    for s in digit_swaps(input.y_raw, y) {
        push_y(
            CauseKind::SwappedDigitsY,
            Change::SwapY {
                written: input.y_raw.trim().to_string(),
                proposed: s.text,
            },
            s.value,
            &mut out,
        );
    }

    let push_x = |kind, change, new_x: f64, out: &mut Vec<Proposal<'a>>| {
        out.push(Proposal {
            kind,
            change,
            x: new_x,
            y,
            against: None,
        });
    };
    for s in digit_swaps(input.x_raw, x) {
        push_x(
            CauseKind::SwappedDigitsX,
            Change::SwapX {
                written: input.x_raw.trim().to_string(),
                proposed: s.text,
            },
            s.value,
            &mut out,
        );
    }
    match input.x_kind {
        XKind::DecimalYear => {
            for years in [-1, 1, -10, 10] {
                push_x(
                    CauseKind::WrongYear,
                    Change::ShiftYears { years },
                    x + f64::from(years),
                    &mut out,
                );
            }
        }
        XKind::Distance | XKind::Other => {
            for k in [1, -1] {
                push_x(
                    CauseKind::DecimalSlipX,
                    Change::ScaleX { power: k },
                    scale10(x, k),
                    &mut out,
                );
            }
        }
    }
    // Other series follow, in `score_with`.
    out
}

/// The record's unit as labels name it (none when blank).
fn label_unit<'a>(input: &CauseInput<'a>) -> Option<&'a str> {
    input.unit.map(str::trim).filter(|u| !u.is_empty())
}

/// The line for people that says what a candidate changes, e.g. "decimal
/// point slipped 1 place: 4.73 mg/L instead of 47.3 mg/L". Written only
/// for the candidates listed: most candidates tried are never shown, and
/// their text was most of the cost of ranking after the p-values.
fn label_of(input: &CauseInput<'_>, kind: CauseKind, change: &Change, x: f64, y: f64) -> String {
    let unit = label_unit(input);
    let shown = |v: f64| match unit {
        Some(u) => format!("{} {u}", show(v)),
        None => show(v),
    };
    let of_y = |what: String| format!("{what}: {} instead of {}", shown(y), shown(input.y));
    let shown_x = |v: f64| match input.x_unit.filter(|_| input.x_kind != XKind::DecimalYear) {
        Some(u) => format!("{} {u}", show(v)),
        None => show(v),
    };
    let of_x = |what: String| format!("{what}: {} instead of {}", shown_x(x), shown_x(input.x));
    let xword = input.x_kind.word();
    match (kind, change) {
        (CauseKind::UnitMixUp, Change::ScaleY { power }) => {
            of_y(unit_wording(unit, *power).unwrap_or_default())
        }
        (_, Change::ScaleY { power }) => {
            let places = power.unsigned_abs();
            of_y(format!(
                "decimal point slipped {places} place{}",
                if places == 1 { "" } else { "s" }
            ))
        }
        (_, Change::NegateY) => of_y("sign typed wrong".to_string()),
        (_, Change::SwapY { written, proposed }) => of_y(format!(
            "adjacent digits transposed (\"{proposed}\" typed as \"{written}\")"
        )),
        (_, Change::SwapX { written, proposed }) => of_x(format!(
            "adjacent digits transposed in the {xword} (\"{proposed}\" typed as \"{written}\")"
        )),
        (_, Change::ShiftYears { years }) => of_x(format!("year off by {}", years.unsigned_abs())),
        (_, Change::ScaleX { .. }) => of_x(format!("decimal point slipped in the {xword}")),
        (_, Change::OtherSeries { series }) => format!(
            "may belong to series {series}: the value as written is consistent with its trend"
        ),
    }
}

/// The label for y × 10^k read as a unit mix-up, or `None` when the unit
/// has no neighbour at that factor (then k = ±3 is tried as a decimal
/// slip instead). An unknown or missing unit gets the generic wording for
/// k = ±3 only.
fn unit_wording(unit: Option<&str>, k: i32) -> Option<String> {
    let factor = scale10(1.0, k);
    let known = unit.filter(|u| crate::records::units::is_known(u));
    let slip = if k.abs() == 3 {
        ", or decimal point slipped 3 places"
    } else {
        ""
    };
    match known {
        Some(u) => {
            // The unit V such that a value written in V converts to the
            // series' unit by this factor, in both matrices (so that ppm
            // only neighbours ppb and ppt, and mg/L only mass per volume).
            let written_in = UNIT_SPELLINGS.iter().find(|v| {
                [Matrix::Soil, Matrix::Water]
                    .iter()
                    .all(|&m| convert(1.0, v, u, m) == Ok(factor))
            })?;
            Some(format!("entered in {written_in} instead of {u}{slip}"))
        }
        None if k.abs() == 3 => {
            let (size, example) = if k < 0 {
                ("smaller", "µg for mg")
            } else {
                ("larger", "mg for µg")
            };
            Some(format!(
                "entered in a unit 1000 times {size} than the series' (e.g. {example}){slip}"
            ))
        }
        None => None,
    }
}

/// `v × 10^k`, as one multiplication by an exact power of ten or one
/// division by it (so y / 10 is correctly rounded, as a person computes it).
fn scale10(v: f64, k: i32) -> f64 {
    let power = 10f64.powi(k.abs());
    if k >= 0 { v * power } else { v / power }
}

/// Equal as values, allowing for the last digit of decimal parsing.
fn same_value(a: f64, b: f64) -> bool {
    a == b || (a - b).abs() <= 1e-12 * a.abs().max(b.abs())
}

/// One transposition of adjacent digits of a number as written.
#[derive(Debug, Clone, PartialEq)]
pub struct DigitSwap {
    /// The text with the two digits swapped, everything else in place.
    pub text: String,
    /// Its value.
    pub value: f64,
}

/// Every transposition of two adjacent, different digits in `raw`, the
/// number as written, whose parsed value is `parsed`.
///
/// Digits are adjacent when no other digit lies between them: the decimal
/// point, a thousands separator or a space stays where it is (`"4.71"`
/// gives `"7.41"` and `"4.17"`). A leading sign and an exponent
/// (`"4.71e-3"`) are kept; only the digits before the exponent are swapped.
/// The value follows from the digits and the place of the last one, which
/// is found from `parsed`, so a decimal comma (`"4,71"` parsed as 4.71)
/// works too. When the digits of `raw` do not spell `parsed` (a date such as
/// `"2024-03-15"` against 2024.2, or a zero value), nothing is returned.
pub fn digit_swaps(raw: &str, parsed: f64) -> Vec<DigitSwap> {
    let raw = raw.trim();
    if !parsed.is_finite() || parsed == 0.0 {
        return Vec::new();
    }
    let mantissa_end = exponent_start(raw).unwrap_or(raw.len());
    let positions: Vec<usize> = raw[..mantissa_end]
        .char_indices()
        .filter(|(_, c)| c.is_ascii_digit())
        .map(|(i, _)| i)
        .collect();
    if positions.is_empty() || positions.len() > MAX_DIGITS {
        return Vec::new();
    }
    let digits: Vec<u8> = positions.iter().map(|&i| raw.as_bytes()[i]).collect();
    let Some(place) = place_of_last_digit(&digits, parsed.abs()) else {
        return Vec::new();
    };
    let mut out = Vec::new();
    for w in 0..digits.len() - 1 {
        if digits[w] == digits[w + 1] {
            continue;
        }
        let mut swapped = digits.clone();
        swapped.swap(w, w + 1);
        let Some(value) = digits_value(&swapped, place) else {
            continue;
        };
        let mut bytes = raw.as_bytes().to_vec();
        bytes.swap(positions[w], positions[w + 1]);
        // Only two ASCII digits moved, so the text is still UTF-8.
        let Ok(text) = String::from_utf8(bytes) else {
            continue;
        };
        out.push(DigitSwap {
            text,
            value: value.copysign(parsed),
        });
    }
    out
}

/// Byte index of an exponent marker `e`/`E` followed by an optionally
/// signed integer that ends the text, with a digit before it.
fn exponent_start(raw: &str) -> Option<usize> {
    let i = raw.rfind(['e', 'E'])?;
    let rest = raw[i + 1..]
        .strip_prefix(['+', '-'])
        .unwrap_or(&raw[i + 1..]);
    let ok = !rest.is_empty()
        && rest.bytes().all(|b| b.is_ascii_digit())
        && raw[..i].bytes().any(|b| b.is_ascii_digit());
    ok.then_some(i)
}

/// The power of ten q with digits × 10^q = value, if there is one.
fn place_of_last_digit(digits: &[u8], value: f64) -> Option<i32> {
    let first_nonzero = digits.iter().position(|&d| d != b'0')?;
    let significant = (digits.len() - first_nonzero) as i32;
    // value ≈ 0.d… × 10^(e10 + 1), so the last digit sits at e10 + 1 − significant.
    let e10 = value.log10().floor() as i32;
    [0, -1, 1].iter().find_map(|&adj| {
        let q = e10 + 1 - significant + adj;
        let v = digits_value(digits, q)?;
        same_value(v, value).then_some(q)
    })
}

/// The decimal number with these digits and the last at 10^q, correctly
/// rounded.
fn digits_value(digits: &[u8], q: i32) -> Option<f64> {
    let text: String = digits.iter().map(|&d| d as char).collect();
    let v: f64 = format!("{text}e{q}").parse().ok()?;
    v.is_finite().then_some(v)
}

/// A value for a label: at most [`LABEL_DIGITS`] significant digits, no
/// trailing zeros.
pub(crate) fn show(v: f64) -> String {
    show_digits(v, LABEL_DIGITS)
}

/// A value with at most `digits` significant digits, no trailing zeros;
/// very large or small values in exponent form.
pub(crate) fn show_digits(v: f64, digits: usize) -> String {
    if v == 0.0 || !v.is_finite() {
        return format!("{v}");
    }
    let rounded = format!("{:.*e}", digits.saturating_sub(1), v);
    let Ok(r) = rounded.parse::<f64>() else {
        return rounded;
    };
    if r.abs() >= 1e9 || r.abs() < 1e-5 {
        format!("{r:e}")
    } else {
        format!("{r}")
    }
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;
    use crate::stats::fit_line;

    fn texts(raw: &str, v: f64) -> Vec<(String, f64)> {
        digit_swaps(raw, v)
            .into_iter()
            .map(|s| (s.text, s.value))
            .collect()
    }

    #[test]
    fn swaps_adjacent_digits_keeping_the_decimal_point() {
        assert_eq!(
            texts("4.71", 4.71),
            vec![("7.41".to_string(), 7.41), ("4.17".to_string(), 4.17)]
        );
    }

    #[test]
    fn skips_equal_digits_and_keeps_sign_and_exponent() {
        assert_eq!(texts("4.77", 4.77), vec![("7.47".to_string(), 7.47)]);
        assert_eq!(
            texts("-1.5e-3", -0.0015),
            vec![("-5.1e-3".to_string(), -0.0051)]
        );
        assert_eq!(
            texts(" 12E+2 ", 1200.0),
            vec![("21E+2".to_string(), 2100.0)]
        );
    }

    #[test]
    fn leading_zero_and_separators_stay_in_place() {
        assert_eq!(
            texts("0.41", 0.41),
            vec![("4.01".to_string(), 4.01), ("0.14".to_string(), 0.14)]
        );
        assert_eq!(texts("1,234.5", 1234.5)[0], ("2,134.5".to_string(), 2134.5));
        // A decimal comma, as parsed by a European-style reader.
        assert_eq!(
            texts("4,71", 4.71),
            vec![("7,41".to_string(), 7.41), ("4,17".to_string(), 4.17)]
        );
    }

    #[test]
    fn text_that_does_not_spell_the_value_gives_nothing() {
        assert!(texts("2024-03-15", 2024.2).is_empty());
        assert!(texts("4.71", 4.17).is_empty());
        assert!(texts("0.00", 0.0).is_empty());
        assert!(texts("n/a", 3.0).is_empty());
    }

    #[test]
    fn unit_neighbours_come_from_the_unit_table() {
        let w = unit_wording(Some("mg/L"), -3).unwrap();
        assert!(w.contains("entered in µg/L instead of mg/L"), "{w}");
        assert!(
            unit_wording(Some("mg/L"), 3)
                .unwrap()
                .contains("g/L instead")
        );
        assert!(unit_wording(Some("mg/L"), -6).unwrap().contains("ng/L"));
        // Nothing a million times larger than mg/L in the table.
        assert_eq!(unit_wording(Some("mg/L"), 6), None);
        assert!(unit_wording(Some("ppm"), -3).unwrap().contains("ppb"));
        assert!(unit_wording(Some("ug/kg"), 3).unwrap().contains("mg/kg"));
        // g/L has no neighbour 1000 times larger: that factor is a decimal slip.
        assert_eq!(unit_wording(Some("g/L"), 3), None);
        let generic = unit_wording(None, -3).unwrap();
        assert!(generic.contains("1000 times smaller"), "{generic}");
        assert_eq!(unit_wording(Some("NTU"), 6), None);
    }

    fn quarterly_fit() -> (Vec<f64>, LineFit) {
        // Invented: quarterly samples, 4.0 rising 0.15 per year, small scatter.
        let noise = [
            0.03, -0.02, 0.01, -0.04, 0.02, 0.0, -0.01, 0.03, -0.03, 0.02,
        ];
        let x: Vec<f64> = (0..10).map(|i| 2020.0 + 0.25 * f64::from(i)).collect();
        let y: Vec<f64> = x
            .iter()
            .zip(noise)
            .map(|(x, e)| 4.0 + 0.15 * (x - 2020.0) + e)
            .collect();
        let fit = fit_line(&x, &y, 0.95).unwrap();
        (x, fit)
    }

    fn input<'a>(fit: &'a LineFit, y: f64, y_raw: &'a str) -> CauseInput<'a> {
        CauseInput {
            fit_without: fit,
            transform: Transform::None,
            x: 2022.5,
            y,
            x_raw: "2022.5",
            y_raw,
            x_kind: XKind::DecimalYear,
            unit: Some("mg/L"),
            x_unit: None,
            others: &[],
            max: DEFAULT_MAX,
        }
    }

    #[test]
    fn value_entered_ten_times_too_large_ranks_the_decimal_slip_first() {
        let (_, fit) = quarterly_fit();
        let r = rank_causes(&input(&fit, 43.8, "43.8"));
        assert_eq!(r.unavailable, None);
        let first = &r.candidates[0];
        assert_eq!(first.kind, CauseKind::DecimalSlip);
        assert_eq!(first.change, Change::ScaleY { power: -1 });
        assert!(first.score.p >= r.needed_p);
        assert!(
            first
                .label
                .starts_with("decimal point slipped 1 place: 4.38 mg/L instead of 43.8"),
            "{}",
            first.label
        );
    }

    #[test]
    fn a_slip_in_a_distance_is_shown_in_the_distance_unit() {
        // Invented: a transect every 50 m, falling 0.01 per m, and a record
        // whose 200 m was written 2000.
        let x: Vec<f64> = (0..10).map(|i| 50.0 * f64::from(i)).collect();
        let noise = [0.3, -0.2, 0.1, -0.4, 0.2, 0.0, -0.1, 0.3, -0.3, 0.2];
        let y: Vec<f64> = x
            .iter()
            .zip(noise)
            .map(|(x, e)| 9.0 - 0.01 * x + e)
            .collect();
        let fit = fit_line(&x, &y, 0.95).unwrap();
        let r = rank_causes(&CauseInput {
            fit_without: &fit,
            transform: Transform::None,
            x: 2000.0,
            y: 7.0,
            x_raw: "2000",
            y_raw: "7.0",
            x_kind: XKind::Distance,
            unit: Some("mg/kg"),
            x_unit: Some("m"),
            others: &[],
            max: DEFAULT_MAX,
        });
        let slip = r
            .candidates
            .iter()
            .find(|c| c.change == Change::ScaleX { power: -1 })
            .unwrap_or_else(|| panic!("{:?}", r.candidates));
        assert_eq!(
            slip.label,
            "decimal point slipped in the distance: 200 m instead of 2000 m"
        );
    }

    #[test]
    fn clean_record_gets_no_candidates() {
        let (_, fit) = quarterly_fit();
        let r = rank_causes(&input(&fit, 4.37, "4.37"));
        assert!(r.as_written.unwrap().p > 0.05);
        assert!(r.candidates.is_empty());
        assert!(r.scored > 10);
    }

    #[test]
    fn exact_fit_is_unavailable_not_an_error() {
        let x = [1.0, 2.0, 3.0, 4.0];
        let y = [2.0, 4.0, 6.0, 8.0];
        let fit = fit_line(&x, &y, 0.95).unwrap();
        let r = rank_causes(&input(&fit, 5.0, "5"));
        assert_eq!(r.unavailable, Some(Unavailable::NoScatter));
        assert!(r.candidates.is_empty());
    }

    #[test]
    fn non_finite_record_is_unavailable() {
        let (_, fit) = quarterly_fit();
        let r = rank_causes(&input(&fit, f64::NAN, "x"));
        assert_eq!(r.unavailable, Some(Unavailable::RecordNotFinite));
    }

    #[test]
    fn ties_are_marked_and_max_limits_the_list() {
        // "40" for about 4.0: the swap "04" and 40 / 10 propose the same 4.
        let (_, fit) = quarterly_fit();
        let mut inp = input(&fit, 40.0, "40");
        inp.x = 2020.0;
        inp.x_raw = "2020";
        let r = rank_causes(&inp);
        assert_eq!(r.candidates.len(), 2, "{:#?}", r.candidates);
        assert!(r.candidates.iter().all(|c| c.tied && c.y == 4.0));
        // Equal p keeps the order tried: the decimal slip comes first.
        assert_eq!(r.candidates[0].kind, CauseKind::DecimalSlip);
        assert_eq!(r.candidates[1].kind, CauseKind::SwappedDigitsY);
        inp.max = 1;
        let r = rank_causes(&inp);
        assert_eq!(r.candidates.len(), 1);
        assert!(
            r.candidates[0].tied,
            "the tie is marked even when its partner is cut"
        );
    }

    #[test]
    fn show_trims_round_off() {
        assert_eq!(show(47.3 / 10.0 * 10.0), "47.3");
        assert_eq!(show(0.1 + 0.2), "0.3");
        assert_eq!(show(4.7e-12), "4.7e-12");
        assert_eq!(show(-12.6), "-12.6");
    }

    /// The ranking as it was before p-values became lazy: every candidate
    /// scored with its p, filtered, sorted, ties marked, cut to `max`.
    fn rank_eagerly(input: &CauseInput<'_>) -> Vec<Candidate> {
        let Ok(scored) = score_candidates(input) else {
            return Vec::new();
        };
        let needed = needed_p(scored.as_written.as_ref());
        let mut listed: Vec<Candidate> = scored
            .candidates
            .into_iter()
            .filter(|c| {
                c.score.p >= needed
                    && (!c.kind.moves_x() || c.score.leverage_factor <= MAX_LEVERAGE_FACTOR)
            })
            .collect();
        listed.sort_by(|a, b| b.score.p.total_cmp(&a.score.p));
        let same: Vec<bool> = (0..listed.len())
            .map(|i| {
                listed.iter().enumerate().any(|(j, o)| {
                    j != i && same_value(o.x, listed[i].x) && same_value(o.y, listed[i].y)
                })
            })
            .collect();
        for (c, tied) in listed.iter_mut().zip(same) {
            c.tied = tied;
        }
        listed.truncate(input.max);
        listed
    }

    /// The comparison above is not an empty one: on a series with some
    /// scatter, slips by 10, 100 and 1000 and a lost sign are listed, the
    /// true value first, exactly as the eager ranking lists them.
    #[test]
    fn lazy_p_values_list_the_slips_the_eager_ranking_lists() {
        let xs: Vec<f64> = (0..24).map(|i| 2000.0 + f64::from(i) * 0.25).collect();
        let ys: Vec<f64> = xs
            .iter()
            .enumerate()
            .map(|(i, x)| 40.0 + 0.8 * (x - 2000.0) + [0.6, -0.4, 0.1, -0.7, 0.5, -0.2][i % 6])
            .collect();
        let fit = fit_line(&xs, &ys, 0.95).unwrap();
        let truth = 40.0 + 0.8 * 6.0;
        for (written, max) in [
            (truth * 10.0, 4),
            (truth / 100.0, 2),
            (truth * 1000.0, 1),
            (-truth, 3),
        ] {
            let y_raw = format!("{written}");
            let input = CauseInput {
                fit_without: &fit,
                transform: Transform::None,
                x: 2006.0,
                y: written,
                x_raw: "2006",
                y_raw: &y_raw,
                x_kind: XKind::DecimalYear,
                unit: Some("mg/L"),
                x_unit: None,
                others: &[],
                max,
            };
            let lazy = rank_causes(&input).candidates;
            assert_eq!(lazy, rank_eagerly(&input), "written {written}");
            assert!(
                !lazy.is_empty() && lazy.len() <= max,
                "written {written}: {lazy:?}"
            );
            assert!(
                (lazy[0].y - truth).abs() < 1e-9 * truth,
                "written {written}: first {:?}",
                lazy[0]
            );
        }
    }

    proptest::proptest! {
        #![proptest_config(proptest::prelude::ProptestConfig::with_cases(300))]
        /// Computing p only where it matters lists exactly what computing
        /// every p lists (same candidates, order, p and ties).
        #[test]
        fn lazy_p_values_rank_as_eager_ones_do(
            n in 4usize..40,
            slope in -2.0f64..2.0,
            noise in proptest::collection::vec(-1.0f64..1.0, 40),
            x_pick in 0usize..40,
            y_factor in proptest::sample::select(vec![0.001, 0.01, 0.1, 1.0, 10.0, 100.0, 1000.0, -1.0]),
            y_places in 0u32..4,
            max in 1usize..6,
            other_slope in -2.0f64..2.0,
        ) {
            let xs: Vec<f64> = (0..n).map(|i| 2000.0 + i as f64 * 0.25).collect();
            let ys: Vec<f64> = xs
                .iter()
                .zip(&noise)
                .map(|(x, e)| 40.0 + slope * (x - 2000.0) + e)
                .collect();
            let fit = fit_line(&xs, &ys, 0.95).unwrap();
            let other_ys: Vec<f64> = xs
                .iter()
                .zip(noise.iter().rev())
                .map(|(x, e)| 400.0 + other_slope * (x - 2000.0) + 3.0 * e)
                .collect();
            let other = fit_line(&xs, &other_ys, 0.95).unwrap();
            let others = [("W-2/boron", &other), ("W-3/boron", &other)];
            // A value near the line, often with a decimal slip, a unit
            // mix-up or a lost sign, written with a few decimals.
            let x0 = xs[x_pick % n];
            let scale = 10f64.powi(y_places as i32);
            let y = ((40.0 + slope * (x0 - 2000.0)) * y_factor * scale).round() / scale;
            let y_raw = format!("{y}");
            let x = x0;
            let x_raw = format!("{x}");
            let input = CauseInput {
                fit_without: &fit,
                transform: Transform::None,
                x,
                y,
                x_raw: &x_raw,
                y_raw: &y_raw,
                x_kind: XKind::DecimalYear,
                unit: Some("mg/L"),
                x_unit: None,
                others: &others,
                max,
            };
            let lazy = rank_causes(&input).candidates;
            let eager = rank_eagerly(&input);
            proptest::prop_assert_eq!(&lazy, &eager);
        }
    }
}
