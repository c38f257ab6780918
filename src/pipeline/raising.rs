//! A file's findings: the likely causes of its flagged records, ranked
//! while its rows are written, then raised on the writing thread.

use super::*;

/// A series' fit with a record and without it (the fit before it arrived).
pub(super) type WithWithout = (Option<LineFit>, Option<LineFit>);

/// A finding without a record under judgement, waiting for the file's fits.
pub(super) struct PlainFinding {
    pub(super) kind: &'static str,
    pub(super) series: String,
    pub(super) record_ids: Vec<String>,
    pub(super) summary: String,
    /// What the finding compared the file with, as its detail says.
    pub(super) judged_against: &'static str,
    /// A conflict that only changes y within the same series: the stored
    /// record's row and the resubmitted y, so that a verdict can take the
    /// new value (or exclude the record) as for a flagged record.
    pub(super) answerable: Option<(i64, f64)>,
}

/// The series a flagged record could belong to instead: those of the file
/// and those met earlier, indexed by site and by parameter (the key's parts
/// before and after the first '/'), with their fits computed when first
/// asked for. Built once per file: scanning every series for every flagged
/// record cost O(series) each.
pub(super) struct Neighbours<'a> {
    /// Key, scale (transform name) and moments (lent, not copied: a file
    /// with a flagged record builds this over every series met).
    pub(super) series: Vec<(&'a str, &'a str, &'a Moments)>,
    /// Where the fit of each of `series` is in `fits` once asked for
    /// (`u32::MAX`: not yet).
    pub(super) fit_at: Vec<u32>,
    /// The fits asked for so far (None: the series has none).
    pub(super) fits: Vec<Option<LineFit>>,
    pub(super) by_site: HashMap<&'a str, Vec<usize>>,
    pub(super) by_parameter: HashMap<&'a str, Vec<usize>>,
}

impl<'a> Neighbours<'a> {
    pub(super) fn of(
        touched: &'a HashMap<String, Touched>,
        earlier: &'a HashMap<String, SeriesRow>,
    ) -> Self {
        let series: Vec<(&str, &str, &Moments)> = touched
            .iter()
            .map(|(k, o)| (k.as_str(), o.settings.transform.name(), o.state.moments()))
            .chain(
                earlier
                    .iter()
                    .filter(|(k, _)| !touched.contains_key(*k))
                    .map(|(k, r)| (k.as_str(), r.transform.as_str(), &r.moments)),
            )
            .collect();
        let mut by_site: HashMap<&str, Vec<usize>> = HashMap::default();
        let mut by_parameter: HashMap<&str, Vec<usize>> = HashMap::default();
        for (i, (k, _, _)) in series.iter().enumerate() {
            let (site, parameter) = k.split_once('/').unwrap_or((k, ""));
            by_site.entry(site).or_default().push(i);
            if !parameter.is_empty() {
                by_parameter.entry(parameter).or_default().push(i);
            }
        }
        Neighbours {
            fit_at: vec![u32::MAX; series.len()],
            fits: Vec::new(),
            series,
            by_site,
            by_parameter,
        }
    }
}

/// The likely entry errors of each flagged record (in `flagged` order):
/// pure, so worked out while the file's rows are still being written.
pub(super) fn rank_flagged(
    config: &Config,
    cache: &mut SeriesCache,
    touched: &HashMap<String, Touched>,
    (flagged, fits): (&[Flagged], &[WithWithout]),
    file_name: &str,
) -> Vec<Vec<Candidate>> {
    if flagged.is_empty() {
        return Vec::new();
    }
    let quantiles = cache.quantiles(config.level);
    let mut quantiles = std::mem::replace(quantiles, TQuantiles::new(config.level));
    let mut neighbours = Neighbours::of(touched, &cache.rows);
    let ranked = flagged
        .iter()
        .zip(fits)
        .map(|(f, (_, without))| {
            let key = f.record.series.as_str();
            let Some(t) = touched.get(key) else {
                return Vec::new();
            };
            // "Belongs to another series": the series that share its site or
            // its parameter (the key's part before or after the first '/')
            // and its scale: those of this file, and those met earlier.
            let (site, parameter) = key.split_once('/').unwrap_or((key, ""));
            let scale = t.settings.transform.name();
            let related = neighbours
                .by_site
                .get(site)
                .into_iter()
                .chain(
                    (!parameter.is_empty())
                        .then(|| neighbours.by_parameter.get(parameter))
                        .flatten(),
                )
                .flatten()
                .copied();
            // Their fits, computed once per file; then lent, not copied
            // (a record can have a hundred related series).
            let mut related_here: Vec<usize> = Vec::new();
            for i in related {
                let Some(&(k, other_scale, m)) = neighbours.series.get(i) else {
                    continue;
                };
                if k == key || other_scale != scale {
                    continue;
                }
                if neighbours.fit_at.get(i) == Some(&u32::MAX) {
                    let fit = cache.known_fit(k, m, config.level).or_else(|| {
                        LineFit::from_moments_with(m, config.level, |df| quantiles.get(df)).ok()
                    });
                    neighbours.fit_at[i] = neighbours.fits.len() as u32;
                    neighbours.fits.push(fit);
                }
                related_here.push(i);
            }
            let mine: Vec<(&str, &LineFit)> = related_here
                .iter()
                .filter_map(|&i| {
                    let at = *neighbours.fit_at.get(i)? as usize;
                    let fit = neighbours.fits.get(at)?.as_ref()?;
                    Some((neighbours.series.get(i)?.0, fit))
                })
                .collect();
            raise::likely_causes(
                config,
                &f.record,
                without.as_ref(),
                t.settings.transform,
                Some(f.span_before),
                &mine,
                file_name,
            )
        })
        .collect();
    *cache.quantiles(config.level) = quantiles;
    ranked
}

/// What a file's findings need of its series, taken out of the computing
/// state so that they can be raised on the writing thread while the
/// computing one goes on with the next file.
pub(super) struct SeriesView {
    pub(super) row: SeriesRow,
    pub(super) transform: Transform,
    pub(super) awaiting: Vec<(f64, f64)>,
    /// The series' fit points when kept in memory, shared with the cache
    /// (else walked from the store when a chart or the sampling advice
    /// needs them).
    pub(super) points: Option<Arc<Vec<(f64, f64)>>>,
    pub(super) robust: Option<(f64, f64, f64)>,
    /// The id of the file's last record of the series.
    pub(super) last_id: Option<String>,
    /// The unit of the series' values in this file.
    pub(super) unit: Option<String>,
}

/// A file's findings, owned: raised by [`raise_findings`] inside the
/// file's transaction.
pub(super) struct FindingsWork {
    pub(super) series: HashMap<String, SeriesView>,
    pub(super) flagged: Vec<Flagged>,
    pub(super) causes: Vec<Vec<Candidate>>,
    /// Each flagged record's series fit with it and without it.
    pub(super) fits: Vec<WithWithout>,
    pub(super) plain: Vec<PlainFinding>,
    pub(super) trends: Vec<(String, TrendChange, Option<LineFit>, LineFit)>,
    pub(super) errors: usize,
    pub(super) first_errors: Vec<RecordError>,
}

impl FindingsWork {
    pub(super) fn gather(
        cache: &SeriesCache,
        touched: &HashMap<String, Touched>,
        (errors, first_errors): (usize, Vec<RecordError>),
        (flagged, causes, fits): (Vec<Flagged>, Vec<Vec<Candidate>>, Vec<WithWithout>),
        plain: Vec<PlainFinding>,
        trends: Vec<(String, TrendChange, Option<LineFit>, LineFit)>,
    ) -> FindingsWork {
        let mut series: HashMap<String, SeriesView> = HashMap::default();
        let keys = flagged
            .iter()
            .map(|f| f.record.series.as_str())
            .chain(plain.iter().map(|p| p.series.as_str()))
            .chain(trends.iter().map(|t| t.0.as_str()));
        for key in keys {
            if series.contains_key(key) {
                continue;
            }
            let Some(t) = touched.get(key) else {
                continue;
            };
            // The series' points when kept (this file's among them).
            let points = cache.points.get(key).map(Arc::clone);
            series.insert(
                key.to_string(),
                SeriesView {
                    row: t.row.clone(),
                    transform: t.settings.transform,
                    awaiting: t.awaiting.clone(),
                    points,
                    robust: cache.robust.get(key).copied(),
                    last_id: t.last.as_ref().map(|(_, id)| id.clone()),
                    unit: t.unit.clone(),
                },
            );
        }
        FindingsWork {
            series,
            flagged,
            causes,
            fits,
            plain,
            trends,
            errors,
            first_errors,
        }
    }

    pub(super) fn is_empty(&self) -> bool {
        self.flagged.is_empty()
            && self.plain.is_empty()
            && self.trends.is_empty()
            && self.errors == 0
    }
}

/// Raises a file's findings inside its transaction; returns how many.
pub(super) fn raise_findings(
    tx: &crate::store::Tx<'_>,
    config: &Config,
    work: &FindingsWork,
    file: (crate::store::FileId, &str),
    at: &str,
    now_unix: i64,
) -> Result<usize, StoreError> {
    let mut raised = 0;
    let mut series_points: HashMap<&str, Arc<Vec<(f64, f64)>>> = HashMap::default();
    for ((f, causes), fits) in work.flagged.iter().zip(&work.causes).zip(&work.fits) {
        let record = &f.record;
        let key = record.series.as_str();
        let Some(t) = work.series.get(key) else {
            continue;
        };
        // Points feed the chart and the sampling advice; a message held
        // for a digest has no chart.
        let high_leverage = f.judgement.kinds.contains(&RecordKind::HighLeverage);
        let draw_chart = !raise::all_held(tx, config, Some(key), now_unix)?;
        // Read once per series and file: a backlog file can flag dozens
        // of records of one long series.
        let points: &[(f64, f64)] = if high_leverage || draw_chart {
            if !series_points.contains_key(key) {
                let points = match &t.points {
                    Some(all) => {
                        #[cfg(debug_assertions)]
                        {
                            let stored = tx.fit_points(&t.row)?;
                            debug_assert_eq!(**all, stored, "kept points of {key}");
                        }
                        Arc::clone(all)
                    }
                    None => Arc::new(tx.fit_points(&t.row)?),
                };
                series_points.insert(key, points);
            }
            series_points.get(key).map_or(&[], |p| p.as_slice())
        } else {
            &[]
        };
        raise::record_finding(
            tx,
            config,
            &raise::RecordCase {
                record,
                row_id: f.row_id,
                series: &t.row,
                transform: t.transform,
                fits: *fits,
                judgement: &f.judgement,
                left_out: f.left_out,
                fit_point: f.fit_point,
                points,
                awaiting: &t.awaiting,
                causes,
                robust: t.robust,
                draw_chart,
                span_before: Some(f.span_before),
            },
            file,
            at,
            now_unix,
        )?;
        raised += 1;
    }
    for p in &work.plain {
        let series = work.series.get(&p.series).map(|t| &t.row);
        raise::plain_finding(
            tx,
            config,
            p.kind,
            series,
            Some(file),
            &p.record_ids,
            &p.summary,
            match p.answerable {
                Some((_, y)) => {
                    serde_json::json!({ "summary": p.summary, "caution": raise::CAUTION,
                    "judged_against": p.judged_against, "proposed_y": y })
                }
                None => serde_json::json!({ "summary": p.summary, "caution": raise::CAUTION,
                    "judged_against": p.judged_against }),
            },
            (None, None),
            None,
            p.answerable.map(|(row, _)| row),
            at,
            now_unix,
        )?;
        raised += 1;
    }
    if work.errors > 0 {
        let listed = &work.first_errors;
        let ids: Vec<String> = listed.iter().filter_map(|e| e.record_id.clone()).collect();
        let rows: Vec<serde_json::Value> = listed
            .iter()
            .map(|e| {
                serde_json::json!({"line": e.line, "column": e.column, "field": e.field,
                "record_id": e.record_id, "reason": e.reason})
            })
            .collect();
        let first = listed.first().map(|e| e.to_string()).unwrap_or_default();
        let more = if work.errors > listed.len() {
            format!(
                " ({} listed here; all are in the store's quarantined rows)",
                listed.len()
            )
        } else {
            String::new()
        };
        let summary = format!(
            "{} row(s) of {} set aside by validation; the rest of the file was stored{more}. First: {first}",
            work.errors, file.1
        );
        raise::plain_finding(
            tx,
            config,
            "quarantined",
            None,
            Some(file),
            &ids,
            &summary,
            serde_json::json!({ "rows": rows, "caution": raise::CAUTION,
                "judged_against": "the validation rules of the series (see the configuration)" }),
            (None, None),
            None,
            None,
            at,
            now_unix,
        )?;
        raised += 1;
    }
    for (key, change, before, after) in &work.trends {
        let Some(t) = work.series.get(key) else {
            continue;
        };
        raise::trend_finding(
            tx,
            config,
            change,
            &t.row,
            file,
            before.as_ref(),
            after,
            (t.last_id.as_deref(), t.unit.as_deref()),
            t.robust,
            at,
            now_unix,
        )?;
        raised += 1;
    }
    Ok(raised)
}

/// A series key as people would read it aloud: letter case, white space,
/// hyphens and underscores left out (`MW-1/Nitrate`, `mw1 / nitrate` and
/// `MW_1/nitrate` are one form).
pub(super) fn name_form(key: &str) -> String {
    key.chars()
        .filter(|c| !c.is_whitespace() && *c != '-' && *c != '_')
        .flat_map(char::to_lowercase)
        .collect()
}

/// The existing series whose key has the same [`name_form`] as `key`, a
/// series about to be created; `key` is remembered either way.
pub(super) fn named_alike(
    cache: &mut SeriesCache,
    b: &mut Behind<'_>,
    key: &str,
) -> Result<Option<String>, PipelineError> {
    if cache.names.is_none() {
        let keys = b.tx()?.series_keys()?;
        cache.names = Some(keys.into_iter().map(|k| (name_form(&k), k)).collect());
    }
    let names = cache.names.get_or_insert_with(HashMap::default);
    Ok(match names.entry(name_form(key)) {
        std::collections::hash_map::Entry::Occupied(e) if e.get() != key => Some(e.get().clone()),
        std::collections::hash_map::Entry::Occupied(_) => None,
        std::collections::hash_map::Entry::Vacant(e) => {
            e.insert(key.to_string());
            None
        }
    })
}

/// The finding on a new series named like an existing one: most likely
/// the same location and parameter typed another way, whose records then
/// miss that series' trend and its checks.
pub(super) fn similar_series(
    key: &str,
    other: &str,
    first: &Record,
    in_file: usize,
    file: &str,
) -> PlainFinding {
    PlainFinding {
        kind: "similar_series",
        series: key.to_string(),
        record_ids: vec![first.record_id.clone()],
        judged_against: "the names of the series stored before this file",
        answerable: None,
        summary: format!(
            "new series {key} is named like the existing series {other}: {in_file} record(s) of {file} (first {}, line {}) went to the new series, outside {other}'s trend",
            first.record_id, first.line
        ),
    }
}
