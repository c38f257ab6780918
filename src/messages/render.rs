//! Rendering: plain data about a finding in, a finished message out.
//!
//! The pipeline fills a [`Notice`] (one finding) or a [`Digest`] (several
//! findings held back by a recipient's rate limit) and calls
//! [`render_notice`] or [`render_digest`]. The result, [`Rendered`], holds
//! the subject, a plain-text part, an HTML part, the chart as PNG and a
//! Message-ID derived from the finding, so a retried send is recognisably the
//! same message.
//!
//! **Invariant:** pure. No I/O, no clock (`created_at` is passed in), no
//! sending. The only effect is the chart's one-time font registration, which
//! changes nothing observable.
//!
//! **Invariant:** every string that came from a data file (series, record id,
//! file name, values as written) passes through [`header_safe`] before it
//! reaches the subject, and through `inline` plus HTML escaping before it
//! reaches a body.

use super::chart::{self, ChartPoint, ChartSpec};
use super::text::{self, html, inline, num, pval, wrap, wrap_hanging};

pub use super::text::header_safe;

/// Appends formatted text to a `String`. Writing into a `String` cannot fail,
/// so this avoids `write!` and the `Result` it would leave to discard.
macro_rules! put {
    ($dst:expr, $($arg:tt)*) => {
        $dst.push_str(&format!($($arg)*))
    };
}

/// [`put!`] followed by a newline.
macro_rules! putln {
    ($dst:expr, $($arg:tt)*) => {{
        $dst.push_str(&format!($($arg)*));
        $dst.push('\n');
    }};
}

/// Width of the plain-text part.
const TEXT_WIDTH: usize = 76;
/// How long a series name or record id may be in a subject.
const SUBJECT_NAME_CHARS: usize = 60;
/// How long a data field may be in a body line.
const FIELD_CHARS: usize = 200;
/// How long a free-text sentence (advice, policy) may be.
const SENTENCE_CHARS: usize = 2000;

pub use crate::findings::Severity;

/// What kind of thing was found.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum FindingKind {
    /// The record's x is far from the others, so it can steer the line.
    HighLeverage,
    /// Removing the record moves the fit noticeably.
    Influential,
    /// The record's y is far from the line.
    Outlier,
    /// The slope's sign differs with and without the record.
    SignReversal,
    /// The slope is significant with the record and not without, or the
    /// reverse.
    SignificanceChange,
    /// A record id arrived again with different values.
    Conflict,
    /// The record is held out of the fit until an analyst decides.
    Quarantined,
    /// A feed stopped delivering records.
    SilentFeed,
    /// The disk holding the store is nearly full; files wait in the inbox.
    DiskSpace,
    /// A new series is named like an existing one (letter case, spaces,
    /// hyphens or underscores apart).
    SimilarSeries,
}

impl FindingKind {
    /// Every kind, in the order messages list them.
    pub const ALL: [FindingKind; 10] = [
        FindingKind::HighLeverage,
        FindingKind::Influential,
        FindingKind::Outlier,
        FindingKind::SignReversal,
        FindingKind::SignificanceChange,
        FindingKind::Conflict,
        FindingKind::Quarantined,
        FindingKind::SilentFeed,
        FindingKind::DiskSpace,
        FindingKind::SimilarSeries,
    ];

    /// The stable machine name, e.g. `high_leverage`.
    pub fn name(self) -> &'static str {
        match self {
            FindingKind::HighLeverage => "high_leverage",
            FindingKind::Influential => "influential",
            FindingKind::Outlier => "outlier",
            FindingKind::SignReversal => "sign_reversal",
            FindingKind::SignificanceChange => "significance_change",
            FindingKind::Conflict => "conflict",
            FindingKind::Quarantined => "quarantined",
            FindingKind::SilentFeed => "silent_feed",
            FindingKind::DiskSpace => "disk_space",
            FindingKind::SimilarSeries => "similar_series",
        }
    }

    /// The kind for a machine name, if it is one.
    pub fn from_name(name: &str) -> Option<FindingKind> {
        FindingKind::ALL.into_iter().find(|k| k.name() == name)
    }

    /// Words for people, e.g. `high leverage`.
    pub fn label(self) -> &'static str {
        match self {
            FindingKind::HighLeverage => "high leverage",
            FindingKind::Influential => "influential",
            FindingKind::Outlier => "outlier",
            FindingKind::SignReversal => "slope changes sign",
            FindingKind::SignificanceChange => "significance changes",
            FindingKind::Conflict => "conflicting versions",
            FindingKind::Quarantined => "held for review",
            FindingKind::SilentFeed => "feed gone quiet",
            FindingKind::DiskSpace => "disk nearly full",
            FindingKind::SimilarSeries => "series named like another",
        }
    }
}

/// One reason a finding was raised: a measure, its value and the cutoff it
/// crossed, with where that cutoff comes from.
#[derive(Debug, Clone, PartialEq)]
pub struct Flag {
    /// Which kind of finding this reason supports.
    pub kind: FindingKind,
    /// The measure in words, e.g. `leverage h` or `days since the last record`.
    pub measure: String,
    /// The measure's value, when it has one.
    pub value: Option<f64>,
    /// The cutoff the value crossed, when there is one.
    pub cutoff: Option<f64>,
    /// Where the cutoff comes from, e.g. `2p/n rule of thumb` or a config key.
    pub cutoff_source: String,
}

/// A least-squares fit as the message reports it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FitSummary {
    /// Number of records in the fit.
    pub n: u64,
    /// Slope, in the series' unit per unit of x (or on the transformed scale;
    /// see [`Notice::scale_note`]).
    pub slope: f64,
    /// Confidence interval of the slope at [`Notice::ci_level`], if defined.
    pub slope_ci: Option<(f64, f64)>,
    /// Two-sided p-value for "slope = 0", if defined.
    pub slope_p: Option<f64>,
    /// Intercept at x = 0.
    pub intercept: f64,
}

/// The robust (Theil–Sen) slope of the series.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RobustSlope {
    /// Median of pairwise slopes.
    pub slope: f64,
    /// Its confidence interval, if defined.
    pub ci: Option<(f64, f64)>,
}

/// A possible cause of a suspicious value.
#[derive(Debug, Clone, PartialEq)]
pub struct Cause {
    /// What may have happened and the value it implies, e.g. `decimal
    /// point slipped 1 place: 4.12 mg/L instead of 41.2 mg/L`.
    pub label: String,
    /// The record may belong to another series, judged against that
    /// series' trend with its value unchanged.
    pub other_series: bool,
    /// How well the corrected value fits the trend (a p-value; higher is a
    /// better fit).
    pub score_p: f64,
}

/// The record a finding is about, as it was written in its file.
#[derive(Debug, Clone, PartialEq)]
pub struct RecordInfo {
    /// The record's id.
    pub id: String,
    /// The file it came from (name only, or a path relative to the inbox).
    pub file: String,
    /// Its line in that file (1-based).
    pub line: u64,
    /// x as written, e.g. `2031-07-14` or `350`.
    pub x: String,
    /// y as written, e.g. `41.2` or `<0.5`.
    pub y: String,
}

/// Everything one finding message says. Plain data: the pipeline fills it
/// from a finding, its fits and the series' points.
#[derive(Debug, Clone, PartialEq)]
pub struct Notice {
    /// The finding's id in the store; the Message-ID derives from it.
    pub finding_id: i64,
    /// This installation's name, used as the Message-ID's domain (e.g.
    /// `lab-north.example.net`).
    pub instance: String,
    /// The series key, e.g. `alder-brook/nitrate`.
    pub series: String,
    /// The record under check; `None` for trend-level findings (a feed gone
    /// quiet, a sign change over several files).
    pub record: Option<RecordInfo>,
    /// For a trend change that the newest record alone causes, that
    /// record's id: what to check first.
    pub trend_record: Option<String>,
    /// The unit of y, e.g. `mg/L`.
    pub unit: String,
    /// What x is, e.g. `year` or `distance from the source`.
    pub x_label: String,
    /// The unit of x, e.g. `m`; empty when not configured, and for years
    /// (which `x_label` names).
    pub x_unit: String,
    /// How urgent the finding is.
    pub severity: Severity,
    /// The kinds the finding was raised for, which the subject names (a
    /// measure reported beside them, such as |DFFITS|, is not one); empty:
    /// the kinds of the flags.
    pub kinds: Vec<FindingKind>,
    /// Why it was raised, and what else crossed a cutoff; at least one
    /// entry in practice.
    pub flags: Vec<Flag>,
    /// The fit including the record (or the current fit).
    pub fit_with: Option<FitSummary>,
    /// The fit without the record (or the fit it is compared with).
    pub fit_without: Option<FitSummary>,
    /// Level of the confidence intervals, e.g. 0.95.
    pub ci_level: f64,
    /// Set when the fit is on a transformed scale, e.g. `fitted on log10(y);
    /// slopes are in log10 units per year`.
    pub scale_note: Option<String>,
    /// The robust slope, when computed.
    pub robust: Option<RobustSlope>,
    /// What the record was judged against, e.g. `the fit without 2 records
    /// awaiting review`.
    pub judged_against: String,
    /// Possible causes, most likely first.
    pub causes: Vec<Cause>,
    /// Why no possible cause is listed, when the likely entry errors were
    /// tried and none fitted.
    pub no_cause: Option<String>,
    /// A sentence of sampling advice, when there is one.
    pub sampling_advice: Option<String>,
    /// How non-detects were treated, e.g. `non-detects enter the fit at half
    /// their reporting limit`.
    pub nondetect_policy: String,
    /// The series' points for the chart.
    pub points: Vec<ChartPoint>,
    /// The fit with the record, as a polyline on the original scale.
    pub line_with: Vec<(f64, f64)>,
    /// The fit without it, as a polyline on the original scale.
    pub line_without: Vec<(f64, f64)>,
    /// Commands that record the analyst's verdict, exactly as to be typed.
    pub verdict_commands: Vec<String>,
    /// When the finding was made, RFC 3339.
    pub created_at: String,
}

/// An image carried inside the message and shown by the HTML part.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct InlineImage {
    /// Content-ID without angle brackets; the HTML refers to `cid:` + this.
    pub content_id: String,
    /// PNG bytes.
    pub png: Vec<u8>,
}

/// A finished message, ready to be addressed and sent.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Rendered {
    /// Message-ID with angle brackets, e.g. `<finding-17.3f2a…@lab.example.net>`.
    pub message_id: String,
    /// Subject line, already header-safe.
    pub subject: String,
    /// The plain-text part.
    pub text: String,
    /// The HTML part.
    pub html: String,
    /// The chart, when one was drawn.
    pub chart: Option<InlineImage>,
    /// Why no chart was drawn, when one was expected; for the caller's log.
    pub chart_problem: Option<String>,
}

/// One line of a digest.
#[derive(Debug, Clone, PartialEq)]
pub struct DigestLine {
    /// The finding's id.
    pub finding_id: i64,
    /// Its series.
    pub series: String,
    /// Its record, if it concerns one.
    pub record_id: Option<String>,
    /// What was found.
    pub kinds: Vec<FindingKind>,
    /// How urgent.
    pub severity: Severity,
}

/// Findings that were not sent one by one because the recipient's rate limit
/// was reached, gathered in one message.
#[derive(Debug, Clone, PartialEq)]
pub struct Digest {
    /// This installation's name (the Message-ID's domain).
    pub instance: String,
    /// When the digest was made, RFC 3339.
    pub created_at: String,
    /// The period the digest covers, in words, e.g. `since 2031-07-14T06:00:00Z`.
    pub period: String,
    /// The findings.
    pub lines: Vec<DigestLine>,
    /// How to see the details, e.g. a command; shown as written.
    pub review_hint: Option<String>,
}

/// The Message-ID of a finding's message: `<finding-ID.HASH@INSTANCE>`,
/// where HASH is derived from the instance name and the finding id. The same
/// finding on the same instance always gets the same id, so a resent message
/// is recognisable as a duplicate. (A store rebuilt from scratch reuses
/// finding ids, and with them Message-IDs: keep the instance name distinct
/// if that matters.)
pub fn finding_message_id(instance: &str, finding_id: i64) -> String {
    let id = finding_id.to_string();
    format!(
        "<finding-{id}.{}@{}>",
        text::short_hash(&["finding", instance, &id]),
        text::id_domain(instance)
    )
}

fn digest_message_id(instance: &str, lines: &[DigestLine], created_at: &str) -> String {
    let mut ids: Vec<i64> = lines.iter().map(|l| l.finding_id).collect();
    ids.sort_unstable();
    ids.dedup();
    let joined = ids.iter().map(i64::to_string).collect::<Vec<_>>().join(",");
    let domain = text::id_domain(instance);
    match (ids.first(), ids.last()) {
        (Some(first), Some(last)) => format!(
            "<digest-{first}-{last}.{}@{domain}>",
            text::short_hash(&["digest", instance, &joined])
        ),
        _ => format!(
            "<digest-empty.{}@{domain}>",
            text::short_hash(&["digest", instance, created_at])
        ),
    }
}

fn chart_content_id(message_id: &str) -> String {
    let bare = message_id.trim_start_matches('<').trim_end_matches('>');
    format!("chart.{bare}")
}

fn kinds_text(kinds: impl Iterator<Item = FindingKind>) -> String {
    let mut seen: Vec<FindingKind> = Vec::new();
    for k in kinds {
        if !seen.contains(&k) {
            seen.push(k);
        }
    }
    if seen.is_empty() {
        return "finding".to_string();
    }
    seen.iter()
        .map(|k| k.label())
        .collect::<Vec<_>>()
        .join(", ")
}

/// What a finding is about, which decides its title, its first lines and
/// what the reader is asked to check.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum About {
    /// One record ([`Notice::record`]).
    Record,
    /// A series' trend (a sign or significance change).
    Trend,
    /// A file, or rows of it, set aside by validation.
    File,
    /// A record id resubmitted with other values.
    Conflict,
    /// A feed that stopped delivering.
    Feed,
    /// The disk the store or the archive lives on.
    Disk,
    /// A series' name, like another's.
    Name,
}

fn about(n: &Notice) -> About {
    if n.record.is_some() {
        return About::Record;
    }
    match n.flags.first().map(|f| f.kind) {
        Some(FindingKind::Quarantined) => About::File,
        Some(FindingKind::Conflict) => About::Conflict,
        Some(FindingKind::SilentFeed) => About::Feed,
        Some(FindingKind::DiskSpace) => About::Disk,
        Some(FindingKind::SimilarSeries) => About::Name,
        _ => About::Trend,
    }
}

/// The message's title after "Finding N (severity)".
fn title_place(n: &Notice) -> String {
    let name = inline(&n.series, FIELD_CHARS);
    match about(n) {
        About::Record | About::Trend | About::Conflict | About::Name => {
            format!("in series {name}")
        }
        About::File => format!("about file {name}"),
        About::Feed => format!("about {name}"),
        About::Disk => "about free disk space".to_string(),
    }
}

/// The line under the title of a finding without a record.
fn scope_line(a: About) -> &'static str {
    match a {
        About::Record | About::Trend => "This finding concerns the trend, not a single record.",
        About::File => {
            "Rows of this file, or the whole file, were set aside by validation: nothing set aside entered any fit."
        }
        About::Conflict => {
            "A record arrived again with other values. The stored version is unchanged; the new one waits as a proposed version, outside the fit."
        }
        About::Feed => "A feed stopped delivering files as often as configured.",
        About::Disk => "The disk is nearly full: files wait in the inbox and nothing is lost.",
        About::Name => {
            "A new series began under a name that differs from an existing series' only in letter case, spaces, hyphens or underscores. Its records are stored and fitted under the new name, outside the existing series' trend."
        }
    }
}

/// What to look at for findings that are not about one record's values.
fn other_checks(n: &Notice, a: About) -> Option<(&'static str, Vec<String>)> {
    let owned = |v: &[&str]| v.iter().map(|s| s.to_string()).collect::<Vec<_>>();
    match a {
        About::File => Some((
            "For the file named above, look at:",
            vec![
                format!(
                    "the rows set aside: `slopewarden show {}` lists each with its line, column and reason",
                    n.finding_id
                ),
                "the file's layout against what its feed expects (columns, delimiter, decimal mark, units)".to_string(),
                "where the file came from: the laboratory's or the field crew's export; a corrected file goes into the inbox under a new name".to_string(),
            ],
        )),
        About::Feed => Some((
            "For the feed named above, look at:",
            owned(&[
                "the delivery schedule agreed with the laboratory or the field crew",
                "where the files are dropped: the share, the path and its permissions",
                "the feed's expected_every_days in the configuration",
            ]),
        )),
        About::Disk => Some((
            "On the machine running slopewarden, look at:",
            owned(&[
                "the free space on the disk named above (df)",
                "what else fills it: old archives, backups, logs",
                "watch.min_free_mb in the configuration",
            ]),
        )),
        About::Name => Some((
            "For the two series named above, look at:",
            owned(&[
                "the location and parameter names in the file, against the site's sampling plan",
                "the export or template the file was made from: a renamed location or a retyped name",
                "if both names mean one series: correct the name where the files are made, and bring the records stored under the new name into the right series by your data-management procedure",
            ]),
        )),
        About::Record | About::Trend | About::Conflict => None,
    }
}

fn notice_subject(n: &Notice) -> String {
    let series = header_safe(&n.series, SUBJECT_NAME_CHARS);
    let kinds = if n.kinds.is_empty() {
        kinds_text(n.flags.iter().map(|f| f.kind))
    } else {
        kinds_text(n.kinds.iter().copied())
    };
    let what = match &n.record {
        Some(r) => format!(
            "check record {} in series {series}",
            header_safe(&r.id, SUBJECT_NAME_CHARS)
        ),
        None => match about(n) {
            About::File => format!("check file {series}"),
            About::Conflict => format!("check a resubmitted record in series {series}"),
            About::Feed => format!("check the deliveries of {series}"),
            About::Disk => "free some disk space".to_string(),
            About::Name => format!("check the name of series {series}"),
            About::Record | About::Trend => format!("review the trend of series {series}"),
        },
    };
    header_safe(
        &format!("[slopewarden] {}: {what}: {kinds}", n.severity.as_str()),
        text::HEADER_MAX_CHARS,
    )
}

fn flag_sentence(f: &Flag) -> String {
    let mut s = format!("{}: {}", f.kind.label(), inline(&f.measure, FIELD_CHARS));
    if let Some(v) = f.value {
        put!(s, " = {}", num(v));
    }
    match (f.cutoff, f.cutoff_source.trim().is_empty()) {
        (Some(c), false) => {
            put!(
                s,
                "; cutoff {}: {}",
                num(c),
                inline(&f.cutoff_source, FIELD_CHARS)
            );
        }
        (Some(c), true) => {
            put!(s, "; cutoff {}", num(c));
        }
        (None, false) => {
            put!(s, " ({})", inline(&f.cutoff_source, FIELD_CHARS));
        }
        (None, true) => {}
    }
    s
}

fn ci_text(ci: Option<(f64, f64)>) -> String {
    match ci {
        Some((lo, hi)) => format!("[{}, {}]", num(lo), num(hi)),
        None => "n/a".to_string(),
    }
}

/// The comparison table's rows: (label, with, without).
fn comparison_rows(n: &Notice) -> Vec<(String, String, String)> {
    let cell = |f: Option<&FitSummary>, pick: &dyn Fn(&FitSummary) -> String| {
        f.map(pick).unwrap_or_else(|| "—".to_string())
    };
    let w = n.fit_with.as_ref();
    let wo = n.fit_without.as_ref();
    let level = if n.ci_level.is_finite() && n.ci_level > 0.0 && n.ci_level < 1.0 {
        format!("{}% CI of slope", num(n.ci_level * 100.0))
    } else {
        "CI of slope".to_string()
    };
    let mut rows = vec![
        (
            "slope".to_string(),
            cell(w, &|f| num(f.slope)),
            cell(wo, &|f| num(f.slope)),
        ),
        (
            level,
            cell(w, &|f| ci_text(f.slope_ci)),
            cell(wo, &|f| ci_text(f.slope_ci)),
        ),
        (
            "p (slope = 0)".to_string(),
            cell(w, &|f| f.slope_p.map(pval).unwrap_or_else(|| "n/a".into())),
            cell(wo, &|f| f.slope_p.map(pval).unwrap_or_else(|| "n/a".into())),
        ),
        (
            "n".to_string(),
            cell(w, &|f| f.n.to_string()),
            cell(wo, &|f| f.n.to_string()),
        ),
    ];
    // At year 0 the intercept is far outside any record and means nothing
    // to a reader; elsewhere x = 0 may be the source itself.
    if n.x_label != "year" {
        rows.push((
            if n.x_unit.is_empty() {
                "intercept (x = 0)".to_string()
            } else {
                format!("intercept (x = 0 {})", inline(&n.x_unit, FIELD_CHARS))
            },
            cell(w, &|f| num(f.intercept)),
            cell(wo, &|f| num(f.intercept)),
        ));
    }
    rows
}

fn column_titles(n: &Notice) -> (&'static str, &'static str) {
    if n.record.is_some() {
        ("with the record", "without it")
    } else {
        ("current fit", "compared fit")
    }
}

/// The heading over the comparison table.
fn comparison_heading(n: &Notice) -> &'static str {
    if n.record.is_some() {
        "The trend with the record and without it"
    } else {
        "The trend now and in the fit it is compared with"
    }
}

/// A likely cause in words: its label (which says what the record would
/// become) and how well that fits the trend (another series' trend for a
/// record that may belong there).
fn cause_text(c: &Cause, inline: fn(&str, usize) -> String) -> String {
    format!(
        "{} (fit to {} trend: p = {})",
        inline(&c.label, FIELD_CHARS),
        if c.other_series {
            "that series'"
        } else {
            "the"
        },
        pval(c.score_p)
    )
}

/// " m" after a value of x when its unit is known; empty otherwise.
fn x_unit_suffix(n: &Notice) -> String {
    if n.x_unit.is_empty() {
        String::new()
    } else {
        format!(" {}", inline(&n.x_unit, FIELD_CHARS))
    }
}

/// The chart's x-axis title: what x is, with its unit when known.
fn x_axis_title(n: &Notice) -> String {
    if n.x_unit.is_empty() {
        n.x_label.clone()
    } else {
        format!("{} ({})", n.x_label, n.x_unit)
    }
}

fn slope_unit_sentence(n: &Notice) -> String {
    match &n.scale_note {
        Some(note) => inline(note, SENTENCE_CHARS),
        None if n.x_label == "year" => {
            format!("Slopes are in {} per year.", inline(&n.unit, FIELD_CHARS))
        }
        None if !n.x_unit.is_empty() => format!(
            "Slopes are in {} per {}.",
            inline(&n.unit, FIELD_CHARS),
            inline(&n.x_unit, FIELD_CHARS)
        ),
        None => format!(
            "Slopes are in {} per unit of {}.",
            inline(&n.unit, FIELD_CHARS),
            inline(&n.x_label, FIELD_CHARS)
        ),
    }
}

/// A sentence when the robust slope and the least-squares slope (with the
/// record, or now) point in opposite directions: the least-squares trend
/// then rests on a few records.
fn robust_disagrees(n: &Notice) -> Option<&'static str> {
    let (r, f) = (n.robust.as_ref()?, n.fit_with.as_ref()?);
    (r.slope * f.slope < 0.0).then_some(
        "The robust slope and the least-squares slope point in opposite directions: the least-squares trend rests on a few records.",
    )
}

fn robust_sentence(r: &RobustSlope) -> String {
    match r.ci {
        Some(ci) => format!(
            "Robust slope (Theil–Sen, median of pairwise slopes): {}, interval {}.",
            num(r.slope),
            ci_text(Some(ci))
        ),
        None => format!(
            "Robust slope (Theil–Sen, median of pairwise slopes): {}.",
            num(r.slope)
        ),
    }
}

/// The line before the verdict commands.
fn verdict_lead(n: &Notice) -> &'static str {
    if n.record.is_some() {
        "Run one of these once the record is checked:"
    } else if about(n) == About::Conflict && n.verdict_commands.len() > 1 {
        "Once both versions are checked, run one of these: confirmed keeps the stored value; corrected takes the resubmitted value (or the one you found) as a new version and refits the series; excluded leaves the record out of the fit."
    } else {
        "This finding concerns no single record; once it has been looked into, close it with:"
    }
}

/// Where to look, as (what, why) pairs.
const CHECKS: [(&str, &str); 4] = [
    (
        "the field sheet of that visit",
        "location, depth or distance, date and time, sample id, anything unusual noted",
    ),
    (
        "the chain-of-custody form",
        "that the sample id, times and preservation match this record",
    ),
    (
        "the laboratory report",
        "the reported value, its unit, any dilution factor, the reporting limit and qualifiers",
    ),
    (
        "the instrument's calibration log",
        "calibration and checks on or near the sampling date",
    ),
];

const CAUTION: &str = "This message is a statistical prompt to verify a record. It is not a \
compliance determination and does not say that a limit was exceeded or met. The applicable \
regulations, the site's approved sampling and analysis plan, and the judgement of the licensed \
professionals responsible for the site take precedence over anything written here.";

/// A notice held back for a digest: its Message-ID and subject only, the
/// two things a digest line needs. No bodies and no chart.
pub fn render_notice_heading(n: &Notice) -> Rendered {
    Rendered {
        message_id: finding_message_id(&n.instance, n.finding_id),
        subject: notice_subject(n),
        text: String::new(),
        html: String::new(),
        chart: None,
        chart_problem: None,
    }
}

/// Renders one finding's message. Never fails: when the chart cannot be
/// drawn the message goes out without it, says so, and
/// [`Rendered::chart_problem`] tells the caller why.
pub fn render_notice(n: &Notice) -> Rendered {
    let message_id = finding_message_id(&n.instance, n.finding_id);
    let subject = notice_subject(n);

    let y_label = if n.unit.trim().is_empty() {
        inline(&n.series, 60)
    } else {
        format!("{} ({})", inline(&n.series, 48), inline(&n.unit, 12))
    };
    let (with_legend, without_legend) = if n.record.is_some() {
        ("fit with the record", "fit without it")
    } else {
        ("current fit", "compared fit")
    };
    let record_label = n.record.as_ref().map(|r| inline(&r.id, 32));
    let x_title = x_axis_title(n);
    let (chart, chart_problem) = if n.points.is_empty() {
        (None, None)
    } else {
        let spec = ChartSpec {
            points: &n.points,
            line_with: &n.line_with,
            line_without: &n.line_without,
            x_label: &x_title,
            y_label: &y_label,
            record_label: record_label.as_deref(),
            with_legend,
            without_legend,
        };
        match chart::draw_png(&spec) {
            Ok(png) => (
                Some(InlineImage {
                    content_id: chart_content_id(&message_id),
                    png,
                }),
                None,
            ),
            Err(e) => (None, Some(e.to_string())),
        }
    };

    let text = notice_text(n, &message_id, chart_problem.as_deref());
    let html = notice_html(n, chart.as_ref(), chart_problem.as_deref());
    Rendered {
        message_id,
        subject,
        text,
        html,
        chart,
        chart_problem,
    }
}

fn bullet(s: &str) -> String {
    wrap_hanging(s, TEXT_WIDTH, "  - ", "    ")
}

fn heading(out: &mut String, title: &str) {
    out.push('\n');
    out.push_str(title);
    out.push('\n');
    out.push_str(&"-".repeat(title.chars().count()));
    out.push('\n');
}

fn notice_text(n: &Notice, message_id: &str, chart_problem: Option<&str>) -> String {
    let mut t = String::new();
    let scope = about(n);
    putln!(
        t,
        "Finding {} ({}) {}",
        n.finding_id,
        n.severity.as_str(),
        title_place(n)
    );
    match &n.record {
        Some(r) => {
            putln!(
                t,
                "Record {} from {}, line {}",
                inline(&r.id, FIELD_CHARS),
                inline(&r.file, FIELD_CHARS),
                r.line
            );
            putln!(
                t,
                "  {} = {}{}    value = {} {}",
                inline(&n.x_label, FIELD_CHARS),
                inline(&r.x, FIELD_CHARS),
                x_unit_suffix(n),
                inline(&r.y, FIELD_CHARS),
                inline(&n.unit, FIELD_CHARS)
            );
        }
        None => t.push_str(&wrap(scope_line(scope), TEXT_WIDTH, "")),
    }

    heading(&mut t, "What was found");
    for f in &n.flags {
        t.push_str(&bullet(&flag_sentence(f)));
    }
    let judged = format!(
        "Judged against {}.",
        inline(&n.judged_against, SENTENCE_CHARS)
    );
    t.push_str(&wrap(&judged, TEXT_WIDTH, ""));

    let compared = n.fit_with.is_some() || n.fit_without.is_some();
    let (wt, wot) = column_titles(n);
    if compared {
        heading(&mut t, comparison_heading(n));
        let rows = comparison_rows(n);
        let w0 = rows
            .iter()
            .map(|r| r.0.chars().count())
            .max()
            .unwrap_or(0)
            .max(4);
        let w1 = rows
            .iter()
            .map(|r| r.1.chars().count())
            .chain([wt.chars().count()])
            .max()
            .unwrap_or(0);
        putln!(t, "  {:<w0$}  {:<w1$}  {}", "", wt, wot);
        for (label, a, b) in &rows {
            putln!(t, "  {label:<w0$}  {a:<w1$}  {b}");
        }
        t.push_str(&wrap(&slope_unit_sentence(n), TEXT_WIDTH, ""));
        if let Some(r) = &n.robust {
            t.push_str(&wrap(&robust_sentence(r), TEXT_WIDTH, ""));
        }
        if let Some(note) = robust_disagrees(n) {
            t.push_str(&wrap(note, TEXT_WIDTH, ""));
        }
    }
    if let Some(problem) = chart_problem {
        t.push_str(&wrap(
            &format!("(No chart this time: {problem}.)"),
            TEXT_WIDTH,
            "",
        ));
    }

    if !n.causes.is_empty() {
        heading(&mut t, "Possible causes, most likely first");
        for (i, c) in n.causes.iter().enumerate() {
            let line = format!("{}. {}", i + 1, cause_text(c, inline));
            t.push_str(&wrap_hanging(&line, TEXT_WIDTH, "  ", "     "));
        }
    } else if let Some(note) = &n.no_cause {
        heading(&mut t, "Possible causes");
        t.push_str(&wrap(&inline(note, SENTENCE_CHARS), TEXT_WIDTH, ""));
    }

    if let Some(advice) = &n.sampling_advice {
        heading(&mut t, "Sampling advice");
        t.push_str(&wrap(&inline(advice, SENTENCE_CHARS), TEXT_WIDTH, ""));
    }

    heading(&mut t, "What to check");
    if let Some((lead, checks)) = other_checks(n, scope) {
        t.push_str(&wrap(lead, TEXT_WIDTH, ""));
        for c in &checks {
            t.push_str(&bullet(c));
        }
    } else {
        if let Some(r) = &n.record {
            t.push_str(&wrap(
                &format!(
                    "For record {} (from {}, line {}), look at:",
                    inline(&r.id, FIELD_CHARS),
                    inline(&r.file, FIELD_CHARS),
                    r.line
                ),
                TEXT_WIDTH,
                "",
            ));
        } else if scope == About::Conflict {
            t.push_str("For the record named above, both versions, look at:\n");
        } else if let Some(id) = &n.trend_record {
            t.push_str(&wrap(
                &format!(
                    "For record {}, the newest, which alone causes this change (if it has a finding of its own, give the record's verdict there), look at:",
                    inline(id, FIELD_CHARS)
                ),
                TEXT_WIDTH,
                "",
            ));
        } else {
            t.push_str("For the latest records of this series, look at:\n");
        }
        for (what, why) in CHECKS {
            t.push_str(&bullet(&format!("{what}: {why}")));
        }
        if !n.nondetect_policy.trim().is_empty() {
            t.push_str(&wrap(
                &format!(
                    "How non-detects were treated: {}.",
                    inline(&n.nondetect_policy, SENTENCE_CHARS).trim_end_matches('.')
                ),
                TEXT_WIDTH,
                "",
            ));
        }
    }

    if !n.verdict_commands.is_empty() {
        heading(&mut t, "Record your verdict");
        t.push_str(&wrap(verdict_lead(n), TEXT_WIDTH, ""));
        for c in &n.verdict_commands {
            putln!(t, "  {}", inline(c, FIELD_CHARS));
        }
    }

    heading(&mut t, "Please note");
    t.push_str(&wrap(CAUTION, TEXT_WIDTH, ""));

    put!(
        t,
        "\n-- \nslopewarden on {}, {}\n{}\n",
        inline(&n.instance, FIELD_CHARS),
        inline(&n.created_at, 40),
        message_id
    );
    t
}

const HTML_HEAD: &str = "<!DOCTYPE html>\n<html><head><meta charset=\"utf-8\">\
<meta name=\"viewport\" content=\"width=device-width\"></head>\n\
<body style=\"font-family:sans-serif;font-size:14px;line-height:1.45;color:#1a1a1a;max-width:760px\">\n";
const TD: &str = "style=\"padding:3px 10px;border-bottom:1px solid #ddd;text-align:left\"";

fn notice_html(n: &Notice, chart: Option<&InlineImage>, chart_problem: Option<&str>) -> String {
    let e = |s: &str, max: usize| html(&inline(s, max));
    let mut h = String::from(HTML_HEAD);
    let scope = about(n);
    putln!(
        h,
        "<h2 style=\"font-size:18px\">Finding {} ({}) {}</h2>",
        n.finding_id,
        n.severity.as_str(),
        html(&title_place(n))
    );
    match &n.record {
        Some(r) => {
            putln!(
                h,
                "<p>Record <b>{}</b> from <code>{}</code>, line {}: {} = {}{}, value = {} {}</p>",
                e(&r.id, FIELD_CHARS),
                e(&r.file, FIELD_CHARS),
                r.line,
                e(&n.x_label, FIELD_CHARS),
                e(&r.x, FIELD_CHARS),
                html(&x_unit_suffix(n)),
                e(&r.y, FIELD_CHARS),
                e(&n.unit, FIELD_CHARS)
            );
        }
        None => putln!(h, "<p>{}</p>", html(scope_line(scope))),
    }

    h.push_str("<h3>What was found</h3>\n<ul>\n");
    for f in &n.flags {
        putln!(h, "<li>{}</li>", html(&flag_sentence(f)));
    }
    putln!(
        h,
        "</ul>\n<p>Judged against {}.</p>",
        e(&n.judged_against, SENTENCE_CHARS)
    );

    if let Some(img) = chart {
        putln!(
            h,
            "<p><img src=\"cid:{}\" width=\"{}\" height=\"{}\" alt=\"Chart of series {} with the fit with and without the record\"></p>",
            html(&img.content_id),
            chart::WIDTH,
            chart::HEIGHT,
            e(&n.series, FIELD_CHARS)
        );
    } else if let Some(problem) = chart_problem {
        putln!(h, "<p><i>No chart this time: {}.</i></p>", html(problem));
    }

    if n.fit_with.is_some() || n.fit_without.is_some() {
        let (wt, wot) = column_titles(n);
        putln!(h, "<h3>{}</h3>", comparison_heading(n));
        putln!(
            h,
            "<table style=\"border-collapse:collapse\">\n<tr><th {TD}></th><th {TD}>{wt}</th><th {TD}>{wot}</th></tr>"
        );
        for (label, a, b) in comparison_rows(n) {
            putln!(
                h,
                "<tr><td {TD}>{}</td><td {TD}>{}</td><td {TD}>{}</td></tr>",
                html(&label),
                html(&a),
                html(&b)
            );
        }
        h.push_str("</table>\n");
        putln!(h, "<p>{}</p>", html(&slope_unit_sentence(n)));
        if let Some(r) = &n.robust {
            putln!(h, "<p>{}</p>", html(&robust_sentence(r)));
        }
        if let Some(note) = robust_disagrees(n) {
            putln!(h, "<p>{}</p>", html(note));
        }
    }

    if !n.causes.is_empty() {
        h.push_str("<h3>Possible causes, most likely first</h3>\n<ol>\n");
        for c in &n.causes {
            putln!(h, "<li>{}</li>", html(&cause_text(c, inline)));
        }
        h.push_str("</ol>\n");
    } else if let Some(note) = &n.no_cause {
        putln!(
            h,
            "<h3>Possible causes</h3>\n<p>{}</p>",
            e(note, SENTENCE_CHARS)
        );
    }

    if let Some(advice) = &n.sampling_advice {
        putln!(
            h,
            "<h3>Sampling advice</h3>\n<p>{}</p>",
            e(advice, SENTENCE_CHARS)
        );
    }

    h.push_str("<h3>What to check</h3>\n");
    if let Some((lead, checks)) = other_checks(n, scope) {
        putln!(h, "<p>{}</p>\n<ul>", html(lead));
        for c in &checks {
            putln!(h, "<li>{}</li>", html(c));
        }
        h.push_str("</ul>\n");
    } else {
        if let Some(r) = &n.record {
            putln!(
                h,
                "<p>For record <b>{}</b> (from <code>{}</code>, line {}), look at:</p>",
                e(&r.id, FIELD_CHARS),
                e(&r.file, FIELD_CHARS),
                r.line
            );
        } else if scope == About::Conflict {
            h.push_str("<p>For the record named above, both versions, look at:</p>\n");
        } else if let Some(id) = &n.trend_record {
            putln!(
                h,
                "<p>For record <b>{}</b>, the newest, which alone causes this change (if it has a finding of its own, give the record's verdict there), look at:</p>",
                e(id, FIELD_CHARS)
            );
        } else {
            h.push_str("<p>For the latest records of this series, look at:</p>\n");
        }
        h.push_str("<ul>\n");
        for (what, why) in CHECKS {
            putln!(h, "<li><b>{}</b>: {}</li>", html(what), html(why));
        }
        h.push_str("</ul>\n");
        if !n.nondetect_policy.trim().is_empty() {
            putln!(
                h,
                "<p>How non-detects were treated: {}.</p>",
                html(inline(&n.nondetect_policy, SENTENCE_CHARS).trim_end_matches('.'))
            );
        }
    }

    if !n.verdict_commands.is_empty() {
        putln!(
            h,
            "<h3>Record your verdict</h3>\n<p>{}</p>\n<pre style=\"background:#f4f4f4;padding:8px\">",
            html(verdict_lead(n))
        );
        for c in &n.verdict_commands {
            putln!(h, "{}", e(c, FIELD_CHARS));
        }
        h.push_str("</pre>\n");
    }

    putln!(
        h,
        "<h3>Please note</h3>\n<p style=\"color:#444\">{}</p>",
        html(CAUTION)
    );
    putln!(
        h,
        "<p style=\"color:#777;font-size:12px\">slopewarden on {}, {}</p>\n</body></html>",
        e(&n.instance, FIELD_CHARS),
        e(&n.created_at, 40)
    );
    h
}

/// Renders a digest of held-back findings, most severe first. No chart.
pub fn render_digest(d: &Digest) -> Rendered {
    let message_id = digest_message_id(&d.instance, &d.lines, &d.created_at);
    let mut lines: Vec<&DigestLine> = d.lines.iter().collect();
    lines.sort_by(|a, b| {
        b.severity
            .cmp(&a.severity)
            .then(a.finding_id.cmp(&b.finding_id))
    });
    let count = |s: Severity| lines.iter().filter(|l| l.severity == s).count();
    let mut tally = Vec::new();
    for s in [Severity::Alert, Severity::Warning, Severity::Notice] {
        let c = count(s);
        if c > 0 {
            tally.push(format!("{c} {}", s.as_str()));
        }
    }
    let noun = if lines.len() == 1 {
        "finding"
    } else {
        "findings"
    };
    let subject = header_safe(
        &format!(
            "[slopewarden] digest: {} {noun} held back ({})",
            lines.len(),
            if tally.is_empty() {
                "none".to_string()
            } else {
                tally.join(", ")
            }
        ),
        text::HEADER_MAX_CHARS,
    );

    let intro = format!(
        "These findings arrived {} while messages to you were rate-limited, so they are \
         listed here together instead of one message each.",
        inline(&d.period, FIELD_CHARS)
    );
    let describe = |l: &DigestLine| -> String {
        // What the finding is about, as its own message's title says it.
        let name = inline(&l.series, FIELD_CHARS);
        let place = match l.kinds.first() {
            Some(FindingKind::Quarantined) if l.record_id.is_none() => format!("file {name}"),
            Some(FindingKind::SilentFeed) => name,
            Some(FindingKind::DiskSpace) => "free disk space".to_string(),
            _ => format!("series {name}"),
        };
        let mut s = format!("#{} {} - {place}", l.finding_id, l.severity.as_str());
        if let Some(r) = &l.record_id {
            put!(s, ", record {}", inline(r, FIELD_CHARS));
        }
        put!(s, ": {}", kinds_text(l.kinds.iter().copied()));
        s
    };

    let mut t = wrap(&intro, TEXT_WIDTH, "");
    t.push('\n');
    for l in &lines {
        t.push_str(&wrap(&describe(l), TEXT_WIDTH, "  "));
    }
    if let Some(hint) = &d.review_hint {
        t.push('\n');
        t.push_str(&wrap(&inline(hint, SENTENCE_CHARS), TEXT_WIDTH, ""));
    }
    heading(&mut t, "Please note");
    t.push_str(&wrap(CAUTION, TEXT_WIDTH, ""));
    put!(
        t,
        "\n-- \nslopewarden on {}, {}\n{}\n",
        inline(&d.instance, FIELD_CHARS),
        inline(&d.created_at, 40),
        message_id
    );

    let mut h = String::from(HTML_HEAD);
    putln!(
        h,
        "<h2 style=\"font-size:18px\">{} {noun} held back</h2>\n<p>{}</p>\n<ul>",
        lines.len(),
        html(&intro)
    );
    for l in &lines {
        putln!(h, "<li>{}</li>", html(&describe(l)));
    }
    h.push_str("</ul>\n");
    if let Some(hint) = &d.review_hint {
        putln!(h, "<p>{}</p>", html(&inline(hint, SENTENCE_CHARS)));
    }
    putln!(
        h,
        "<h3>Please note</h3>\n<p style=\"color:#444\">{}</p>\n<p style=\"color:#777;font-size:12px\">slopewarden on {}, {}</p>\n</body></html>",
        html(CAUTION),
        html(&inline(&d.instance, FIELD_CHARS)),
        html(&inline(&d.created_at, 40))
    );

    Rendered {
        message_id,
        subject,
        text: t,
        html: h,
        chart: None,
        chart_problem: None,
    }
}

/// Renders the short message that `slopewarden send-test-email` sends: it
/// says where it came from and that nothing needs doing.
pub fn render_test_message(instance: &str, created_at: &str) -> Rendered {
    let domain = text::id_domain(instance);
    let message_id = format!(
        "<test.{}@{domain}>",
        text::short_hash(&["test", instance, created_at])
    );
    let who = inline(instance, FIELD_CHARS);
    let when = inline(created_at, 40);
    let subject = header_safe(
        &format!("[slopewarden] test message from {who}"),
        text::HEADER_MAX_CHARS,
    );
    let body = format!(
        "This is a test message from slopewarden on {who}, sent at {when}. If you can \
         read it, messages about findings will reach this address. Nothing needs doing."
    );
    let text = format!("{}\n-- \n{message_id}\n", wrap(&body, TEXT_WIDTH, ""));
    let html = format!("{HTML_HEAD}<p>{}</p>\n</body></html>\n", html(&body));
    Rendered {
        message_id,
        subject,
        text,
        html,
        chart: None,
        chart_problem: None,
    }
}

#[cfg(test)]
pub(crate) mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;
    use crate::messages::chart::{PointRole, straight_line};

    pub(crate) fn sample_notice() -> Notice {
        let mut points: Vec<ChartPoint> = (0..10)
            .map(|i| ChartPoint {
                x: 2022.0 + i as f64,
                y: 4.0 + 0.1 * i as f64,
                role: PointRole::Fitted,
                non_detect: i == 2,
            })
            .collect();
        points[8].role = PointRole::AwaitingReview;
        points.push(ChartPoint {
            x: 2031.5,
            y: 41.2,
            role: PointRole::ThisRecord,
            non_detect: false,
        });
        Notice {
            finding_id: 17,
            instance: "lab-north.example.net".into(),
            series: "alder-brook/nitrate".into(),
            record: Some(RecordInfo {
                id: "MW-3/2031-07".into(),
                file: "field-2031-07.csv".into(),
                line: 14,
                x: "2031-07-02".into(),
                y: "41.2".into(),
            }),
            trend_record: None,
            unit: "mg/L".into(),
            x_label: "year".into(),
            x_unit: String::new(),
            severity: Severity::Warning,
            kinds: Vec::new(),
            flags: vec![
                Flag {
                    kind: FindingKind::HighLeverage,
                    measure: "leverage h".into(),
                    value: Some(0.412),
                    cutoff: Some(0.25),
                    cutoff_source: "2p/n rule of thumb".into(),
                },
                Flag {
                    kind: FindingKind::Influential,
                    measure: "Cook's distance".into(),
                    value: Some(1.31),
                    cutoff: Some(0.8),
                    cutoff_source: "median of F(2, n-2)".into(),
                },
            ],
            fit_with: Some(FitSummary {
                n: 11,
                slope: 1.84,
                slope_ci: Some((0.91, 2.77)),
                slope_p: Some(0.0021),
                intercept: -3713.2,
            }),
            fit_without: Some(FitSummary {
                n: 9,
                slope: 0.1,
                slope_ci: Some((0.07, 0.13)),
                slope_p: Some(0.00000003),
                intercept: -198.2,
            }),
            ci_level: 0.95,
            scale_note: None,
            robust: Some(RobustSlope {
                slope: 0.11,
                ci: Some((0.06, 0.2)),
            }),
            judged_against: "the fit without 1 record awaiting review".into(),
            causes: vec![Cause {
                label: "decimal point slipped 1 place: 4.12 mg/L instead of 41.2 mg/L".into(),
                other_series: false,
                score_p: 0.61,
            }],
            no_cause: None,
            sampling_advice: Some(
                "A record between 2028 and 2031 would show whether the rise is real.".into(),
            ),
            nondetect_policy: "non-detects enter the fit at half their reporting limit".into(),
            points,
            line_with: straight_line(-3713.2, 1.84, 2021.5, 2032.0),
            line_without: straight_line(-198.2, 0.1, 2021.5, 2032.0),
            verdict_commands: vec![
                "slopewarden verdict 17 confirmed".into(),
                "slopewarden verdict 17 corrected --value 4.12".into(),
                "slopewarden verdict 17 rejected".into(),
            ],
            created_at: "2031-07-14T06:02:11Z".into(),
        }
    }

    #[test]
    fn message_id_is_stable_and_distinct_per_finding_and_instance() {
        let a = finding_message_id("lab-north.example.net", 17);
        assert_eq!(a, finding_message_id("lab-north.example.net", 17));
        assert!(a.starts_with("<finding-17."), "{a}");
        assert!(a.ends_with("@lab-north.example.net>"), "{a}");
        assert_ne!(a, finding_message_id("lab-north.example.net", 18));
        assert_ne!(a, finding_message_id("lab-south.example.net", 17));
        let odd = finding_message_id("bad host\r\nX: y", 3);
        assert!(!odd.contains(['\r', '\n', ' ', ':']), "{odd}");
    }

    #[test]
    fn rendering_twice_gives_the_same_message() {
        let n = sample_notice();
        assert_eq!(render_notice(&n), render_notice(&n));
    }

    #[test]
    fn subject_names_series_record_and_kinds() {
        let r = render_notice(&sample_notice());
        assert_eq!(
            r.subject,
            "[slopewarden] warning: check record MW-3/2031-07 in series alder-brook/nitrate: high leverage, influential"
        );
    }

    /// A measure reported beside the finding (|DFFITS| crossing its cutoff
    /// while Cook's distance does not) stays in the body, but the subject
    /// names only the kinds the finding was raised for.
    #[test]
    fn subject_names_only_the_kinds_raised() {
        let mut n = sample_notice();
        n.kinds = vec![FindingKind::Outlier];
        n.flags = vec![
            Flag {
                kind: FindingKind::Outlier,
                measure: "prediction t (externally studentized residual)".into(),
                value: Some(-6.722),
                cutoff: Some(4.539),
                cutoff_source: "t(1 - 0.001/(2*5), 20)".into(),
            },
            Flag {
                kind: FindingKind::Influential,
                measure: "|DFFITS| (reported, not raised alone)".into(),
                value: Some(1.457),
                cutoff: Some(0.5898),
                cutoff_source: "2*sqrt(p/n)".into(),
            },
        ];
        let r = render_notice(&n);
        assert!(
            r.subject.ends_with("alder-brook/nitrate: outlier"),
            "{}",
            r.subject
        );
        assert!(
            r.text
                .contains("|DFFITS| (reported, not raised alone) = 1.457"),
            "{}",
            r.text
        );
    }

    #[test]
    fn text_part_carries_numbers_cutoffs_table_and_commands() {
        let r = render_notice(&sample_notice());
        let t = &r.text;
        // Wrapping may break a sentence anywhere: search the flattened text.
        let flat = t.split_whitespace().collect::<Vec<_>>().join(" ");
        for needle in [
            "leverage h = 0.412; cutoff 0.25: 2p/n rule of thumb",
            "Cook's distance = 1.31; cutoff 0.8: median of F(2, n-2)",
            "Judged against the fit without 1 record awaiting review.",
            "field-2031-07.csv, line 14",
            "95% CI of slope",
            "[0.91, 2.77]",
            "< 0.0001",
            "Theil–Sen",
            "decimal point slipped 1 place: 4.12 mg/L instead of 41.2 mg/L (fit to the trend: p = 0.61)",
            "A record between 2028 and 2031",
            "chain-of-custody",
            "calibration log",
            "not a compliance determination",
            "Slopes are in mg/L per year.",
            "half their reporting limit",
        ] {
            assert!(flat.contains(needle), "missing {needle:?} in:\n{t}");
        }
        // Each command stands alone on its line, ready to copy.
        assert!(t.lines().any(|l| l == "  slopewarden verdict 17 confirmed"));
        let slope_row = t
            .lines()
            .find(|l| l.trim_start().starts_with("slope "))
            .unwrap();
        assert!(
            slope_row.contains("1.84") && slope_row.contains("0.1"),
            "{slope_row}"
        );
        let n_row = t
            .lines()
            .find(|l| l.trim_start().starts_with("n "))
            .unwrap();
        assert!(n_row.contains("11") && n_row.contains('9'), "{n_row}");
        assert!(t.lines().all(|l| l.chars().count() <= 100), "{t}");
    }

    #[test]
    fn html_part_references_the_chart_by_content_id() {
        let r = render_notice(&sample_notice());
        let img = r.chart.as_ref().unwrap();
        assert!(img.png.starts_with(b"\x89PNG"));
        assert!(r.html.contains(&format!("src=\"cid:{}\"", img.content_id)));
        assert!(r.chart_problem.is_none());
        assert!(r.html.contains("<table"));
        assert!(
            r.html
                .contains("slopewarden verdict 17 corrected --value 4.12")
        );
    }

    #[test]
    fn data_is_escaped_in_html_and_flattened_in_text() {
        let mut n = sample_notice();
        n.series = "<script>alert(1)</script>\r\nBcc: victim@example.org".into();
        n.record.as_mut().unwrap().id = "id\"><img src=x onerror=y>".into();
        n.record.as_mut().unwrap().file = "a&b.csv".into();
        let r = render_notice(&n);
        assert!(!r.html.contains("<script>"));
        assert!(
            r.html
                .contains("&lt;script&gt;alert(1)&lt;/script&gt; Bcc: victim@example.org")
        );
        assert!(!r.html.contains("<img src=x"));
        assert!(r.html.contains("a&amp;b.csv"));
        assert!(!r.subject.contains(['\r', '\n']));
        assert!(!r.text.lines().any(|l| l.starts_with("Bcc:")), "{}", r.text);
    }

    #[test]
    fn long_and_non_ascii_names_are_bounded_in_the_subject() {
        let mut n = sample_notice();
        n.series = "Rivière-Süd/".to_string() + &"x".repeat(5000);
        n.record.as_mut().unwrap().id = "y".repeat(5000);
        let r = render_notice(&n);
        assert!(r.subject.chars().count() <= text::HEADER_MAX_CHARS);
        assert!(r.subject.contains("Rivière-Süd/"));
        assert!(r.subject.contains('…'));
    }

    #[test]
    fn trend_level_finding_renders_without_record_or_points() {
        let mut n = sample_notice();
        n.record = None;
        n.kinds = vec![FindingKind::SignReversal];
        n.flags = vec![Flag {
            kind: FindingKind::SignReversal,
            measure: "the slope changed sign: 0.1 before, -0.2 now (p = 0.03).".into(),
            value: None,
            cutoff: None,
            cutoff_source: "raised when a significant trend's slope changes sign".into(),
        }];
        n.points.clear();
        n.causes.clear();
        n.verdict_commands =
            vec!["slopewarden review 17 --verdict confirmed --note \"...\"".into()];
        let r = render_notice(&n);
        assert_eq!(
            r.subject,
            "[slopewarden] warning: review the trend of series alder-brook/nitrate: slope changes sign"
        );
        assert!(r.chart.is_none() && r.chart_problem.is_none());
        assert!(r.text.contains("not a single record"));
        assert!(
            r.text
                .contains("The trend now and in the fit it is compared with")
        );
        assert!(r.text.contains("For the latest records of this series"));
        assert!(!r.html.contains("cid:"));
    }

    #[test]
    fn a_silent_feed_reads_as_one_not_as_a_trend() {
        let mut n = sample_notice();
        n.series = "feed alder-lab".into();
        n.record = None;
        n.kinds = vec![];
        n.flags = vec![Flag {
            kind: FindingKind::SilentFeed,
            measure: "days since the last record".into(),
            value: Some(45.0),
            cutoff: Some(30.0),
            cutoff_source: "feeds.alder.max_gap_days".into(),
        }];
        n.points.clear();
        n.fit_with = None;
        n.fit_without = None;
        n.robust = None;
        n.causes.clear();
        n.nondetect_policy.clear();
        let r = render_notice(&n);
        assert_eq!(
            r.subject,
            "[slopewarden] warning: check the deliveries of feed alder-lab: feed gone quiet"
        );
        assert!(
            r.text
                .starts_with("Finding 17 (warning) about feed alder-lab\n"),
            "{}",
            r.text
        );
        assert!(
            r.text
                .contains("days since the last record = 45; cutoff 30")
        );
        for absent in [
            "not a single record",
            "The trend now",
            "non-detects",
            "field sheet",
        ] {
            assert!(!r.text.contains(absent), "{absent}: {}", r.text);
            assert!(!r.html.contains(absent), "{absent}: {}", r.html);
        }
        assert!(
            r.text.contains("the delivery schedule agreed"),
            "{}",
            r.text
        );
    }

    #[test]
    fn chart_failure_is_reported_not_hidden() {
        let mut n = sample_notice();
        for p in &mut n.points {
            p.x = f64::NAN;
        }
        n.line_with.clear();
        n.line_without.clear();
        let r = render_notice(&n);
        assert!(r.chart.is_none());
        let problem = r.chart_problem.unwrap();
        assert!(r.text.contains(&problem));
        assert!(r.html.contains("No chart this time"));
    }

    #[test]
    fn kind_names_round_trip() {
        for k in FindingKind::ALL {
            assert_eq!(FindingKind::from_name(k.name()), Some(k));
        }
        assert_eq!(FindingKind::from_name("nope"), None);
    }

    #[test]
    fn digest_lists_findings_most_severe_first_with_stable_id() {
        let d = Digest {
            instance: "lab-north.example.net".into(),
            created_at: "2031-07-15T06:00:00Z".into(),
            period: "since 2031-07-14T06:00:00Z".into(),
            lines: vec![
                DigestLine {
                    finding_id: 21,
                    series: "alder-brook/nitrate".into(),
                    record_id: Some("MW-3/2031-08".into()),
                    kinds: vec![FindingKind::Outlier],
                    severity: Severity::Notice,
                },
                DigestLine {
                    finding_id: 22,
                    series: "fen-well/lead\nBcc: x@example.org".into(),
                    record_id: None,
                    kinds: vec![FindingKind::SignReversal, FindingKind::SignificanceChange],
                    severity: Severity::Alert,
                },
            ],
            review_hint: Some("Details: slopewarden findings --open".into()),
        };
        let r = render_digest(&d);
        assert_eq!(
            r.subject,
            "[slopewarden] digest: 2 findings held back (1 alert, 1 notice)"
        );
        let first = r.text.find("#22 alert").unwrap();
        let second = r.text.find("#21 notice").unwrap();
        assert!(first < second);
        let flat = r.text.split_whitespace().collect::<Vec<_>>().join(" ");
        assert!(
            flat.contains("slope changes sign, significance changes"),
            "{flat}"
        );
        assert!(r.text.contains("record MW-3/2031-08"));
        assert!(!r.text.lines().any(|l| l.starts_with("Bcc:")));
        // A file set aside is named as a file, not as a series.
        let mut with_file = d.clone();
        with_file.lines.push(DigestLine {
            finding_id: 23,
            series: "2031-07-14_batch.csv".into(),
            record_id: None,
            kinds: vec![FindingKind::Quarantined],
            severity: Severity::Warning,
        });
        assert!(
            render_digest(&with_file)
                .text
                .contains("#23 warning - file 2031-07-14_batch.csv: held for review"),
            "{}",
            render_digest(&with_file).text
        );
        assert!(r.chart.is_none());
        let mut reordered = d.clone();
        reordered.lines.reverse();
        assert_eq!(render_digest(&reordered).message_id, r.message_id);
        assert!(
            r.message_id.starts_with("<digest-21-22."),
            "{}",
            r.message_id
        );
    }

    #[test]
    fn test_message_says_what_it_is() {
        let r = render_test_message("lab-north.example.net", "2031-07-14T06:00:00Z");
        assert_eq!(
            r.subject,
            "[slopewarden] test message from lab-north.example.net"
        );
        assert!(r.text.contains("Nothing needs doing"));
        assert!(r.message_id.ends_with("@lab-north.example.net>"));
    }
}
