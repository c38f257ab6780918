//! What each new record is judged against: the series' fit without the
//! records still awaiting review, and the low end of its x range.

use super::*;

/// The smallest x among a series' fit points other than its suspects
/// `awaiting[start..]` (those left out of the judging fit), kept from
/// record to record and from file to file.
#[derive(Debug, Clone, Copy)]
pub(super) struct JudgedLow {
    pub(super) start: usize,
    pub(super) low: f64,
}

/// The smallest x of `points` (stored before the file) and `new` (the
/// file's so far) once each of `left_out` is taken away (as a multiset:
/// a suspect repeated is left out as often as it is listed).
pub(super) fn low_without(
    points: &[(f64, f64)],
    new: &[(f64, f64)],
    left_out: &[(f64, f64)],
) -> f64 {
    let mut skip: HashMap<(u64, u64), usize> = HashMap::default();
    for p in left_out {
        *skip.entry((p.0.to_bits(), p.1.to_bits())).or_default() += 1;
    }
    let mut low = f64::INFINITY;
    for p in points.iter().chain(new) {
        if let Some(c) = skip.get_mut(&(p.0.to_bits(), p.1.to_bits()))
            && *c > 0
        {
            *c -= 1;
            continue;
        }
        low = low.min(p.0);
    }
    low
}

/// A series' fits (both scales) without the suspects awaiting review from
/// index `from` to `len` of its awaiting list.
#[derive(Debug, Clone, Copy)]
pub(super) struct JudgingBase {
    pub(super) from: usize,
    pub(super) len: usize,
    pub(super) state: Option<SeriesState>,
    pub(super) log: Option<SeriesState>,
}

impl JudgingBase {
    pub(super) fn take(&mut self, p: (f64, f64)) {
        if let Some(s) = self.state.as_mut()
            && s.add(p.0, p.1).is_err()
        {
            self.state = None;
        }
        if let Some(l) = self.log.as_mut()
            && (p.1 <= 0.0 || l.add(p.0, p.1.ln()).is_err())
        {
            self.log = None;
        }
    }
}

/// The judging base for `awaiting[start..]` left out of `state` and `log`:
/// the kept one when it still fits, extended when the share left out grew,
/// rebuilt when the suspects changed.
pub(super) fn judging_base(
    slot: &mut Option<JudgingBase>,
    state: SeriesState,
    log: Option<SeriesState>,
    awaiting: &[(f64, f64)],
    start: usize,
) -> JudgingBase {
    let remove = |b: &mut JudgingBase, points: &[(f64, f64)]| {
        for &(x, y) in points {
            if let Some(s) = b.state.as_mut()
                && s.remove(x, y).is_err()
            {
                b.state = None;
            }
            if let Some(l) = b.log.as_mut()
                && (y <= 0.0 || l.remove(x, y.ln()).is_err())
            {
                b.log = None;
            }
        }
    };
    match slot {
        Some(b) if b.len == awaiting.len() && b.from == start => {}
        Some(b) if b.len == awaiting.len() && b.from > start => {
            let extra = &awaiting[start..b.from];
            remove(b, extra);
            b.from = start;
        }
        _ => {
            let mut b = JudgingBase {
                from: start,
                len: awaiting.len(),
                state: Some(state),
                log,
            };
            remove(&mut b, &awaiting[start..]);
            *slot = Some(b);
        }
    }
    slot.unwrap_or(JudgingBase {
        from: start,
        len: awaiting.len(),
        state: None,
        log: None,
    })
}

/// A record the rules flagged, waiting for the file's fits.
pub(super) struct Flagged {
    pub(super) record: Record,
    pub(super) row_id: i64,
    pub(super) arrival: Arrival,
    pub(super) judgement: RecordJudgement,
    pub(super) fit_point: (f64, f64),
    pub(super) left_out: usize,
    pub(super) span_before: (f64, f64),
}

/// What the rules need of a whole file before any of its records is
/// stored: how many records each series gets (the outlier test corrects
/// for them), and the refused rows (the reject-file rule).
#[derive(Debug, Default)]
pub(super) struct Survey {
    pub(super) per_series: HashMap<String, usize>,
    pub(super) errors: usize,
    /// The first [`LISTED_ERRORS`] refused rows.
    pub(super) first_errors: Vec<RecordError>,
}

impl Survey {
    pub(super) fn of(p: &records::ParsedFile) -> Survey {
        let mut s = Survey::default();
        s.add(p);
        s
    }

    /// A large file's survey, from a first pass in chunks.
    pub(super) fn stream(
        reader: &mut dyn std::io::Read,
        size: u64,
        layout: &records::Layout,
        rules: &dyn Fn(&SeriesId) -> records::SeriesRules,
        today: Today,
    ) -> Result<Survey, records::FileError> {
        let mut s = Survey::default();
        let mut stream =
            records::RecordStream::from_reader(reader, PIECE_BYTES, size, layout, rules, today)?;
        while let Some(chunk) = stream.next_chunk(CHUNK_ROWS)? {
            s.add(&chunk);
        }
        Ok(s)
    }

    pub(super) fn add(&mut self, p: &records::ParsedFile) {
        for r in &p.records {
            match self.per_series.get_mut(r.series.as_str()) {
                Some(n) => *n += 1,
                None => {
                    self.per_series.insert(r.series.as_str().to_string(), 1);
                }
            }
        }
        self.add_errors(&p.errors);
    }

    pub(super) fn add_errors(&mut self, errors: &[RecordError]) {
        self.errors += errors.len();
        let room = LISTED_ERRORS.saturating_sub(self.first_errors.len());
        self.first_errors.extend(errors.iter().take(room).cloned());
    }

    /// The refused rows of the whole file: those found by the survey and
    /// `late`, those found after it, the first ones listed in line order.
    pub(super) fn refused_with(&self, late: Survey) -> (usize, Vec<RecordError>) {
        let mut first = self.first_errors.clone();
        if late.errors > 0 {
            first.extend(late.first_errors);
            first.sort_by_key(|e| e.line);
            first.truncate(LISTED_ERRORS);
        }
        (self.errors + late.errors, first)
    }
}
