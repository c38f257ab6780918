//! The unit of a series without a configured one, and the records that
//! must be converted to it or set aside.

use super::*;

/// The unit of each series without a configured one: that of its
/// records, `None` while none of them names a unit.
pub(super) type RecordUnits = HashMap<String, Option<String>>;

/// Puts a chunk's records of series without a configured unit in the unit
/// their series' records are in (the first unit of the unit table such a
/// series met, stored or earlier in the chunk): a record naming another
/// unit is converted
/// when the unit table can (a laboratory reporting in µg/L what it used to
/// report in mg/L), and set aside with the reason when it cannot (a soil
/// value in mg/kg filed in a water series), so that no series mixes units
/// unseen. The refused rows join the chunk's errors in line order. `known`
/// holds what is settled so far and learns; `stored` asks the store about
/// a series it does not hold. A chunk put in its units already is left as
/// it is.
pub(super) fn reconcile_units(
    chunk: &mut records::ParsedFile,
    config: &Config,
    known: &mut RecordUnits,
    stored: &mut dyn FnMut(&str) -> Result<Option<String>, PipelineError>,
) -> Result<(), PipelineError> {
    /// What one series' records are put in.
    enum Target {
        /// Its configured unit: the parser converted them already.
        Configured,
        /// No unit yet: the next record naming one sets it.
        Open(Matrix),
        /// This unit.
        Unit(String, Matrix),
    }
    let mut targets: HashMap<String, Target> = HashMap::default();
    let mut refused = Vec::new();
    // Records are converted where they lie and only the refused ones are
    // taken out: moving every record (about 480 bytes each) into a new
    // vector cost the computing thread a copy of the whole chunk.
    let mut refused_at: Vec<usize> = Vec::new();
    for (index, record) in chunk.records.iter_mut().enumerate() {
        let key = record.series.as_str();
        let target = match targets.get_mut(key) {
            Some(t) => t,
            None => {
                let settings = config.series_settings(&record.series);
                let t = if settings.unit.is_some() {
                    Target::Configured
                } else {
                    let unit = match known.get(key) {
                        Some(u) => u.clone(),
                        None => {
                            let u = stored(key)?;
                            known.insert(key.to_string(), u.clone());
                            u
                        }
                    };
                    match unit {
                        Some(u) => Target::Unit(u, settings.matrix),
                        None => Target::Open(settings.matrix),
                    }
                };
                targets.entry(key.to_string()).or_insert(t)
            }
        };
        let converted = match (&*target, record.unit.as_deref()) {
            (Target::Configured, _) | (_, None) => None,
            // A unit the table does not know (a typing slip, or a unit such
            // as pCi/L it has no conversions for) sets nothing: the
            // records after it are not refused over a slip in one cell.
            (Target::Open(_), Some(written)) if !units::is_known(written) => None,
            (Target::Open(matrix), Some(written)) => {
                let unit = written.to_string();
                known.insert(key.to_string(), Some(unit.clone()));
                *target = Target::Unit(unit, *matrix);
                None
            }
            (Target::Unit(unit, _), Some(written)) if unit == written => None,
            (Target::Unit(unit, matrix), Some(written)) => Some(
                units::convert_measure(record.y, written, unit, *matrix)
                    .map(|y| (y, unit.clone()))
                    .map_err(|why| {
                        format!(
                            "{why} (series {key} has no unit configured; its records so far are in {unit})"
                        )
                    }),
            ),
        };
        match converted {
            None => {}
            Some(Ok((y, unit))) => {
                record.y = y;
                record.unit = Some(unit);
            }
            Some(Err(reason)) => {
                refused_at.push(index);
                refused.push(RecordError {
                    line: record.line,
                    column: chunk.unit_column.as_ref().map(|c| c.0),
                    field: chunk.unit_column.as_ref().map(|c| c.1.clone()),
                    record_id: Some(std::mem::take(&mut record.record_id)),
                    reason,
                    raw: std::mem::take(&mut record.raw),
                });
            }
        }
    }
    if !refused_at.is_empty() {
        let mut index = 0;
        let mut next = refused_at.iter().peekable();
        chunk.records.retain(|_| {
            let keep = next.next_if_eq(&&index).is_none();
            index += 1;
            keep
        });
    }
    if !refused.is_empty() {
        chunk.errors.append(&mut refused);
        chunk.errors.sort_by_key(|e| e.line);
    }
    Ok(())
}

/// A stored-side refusal of a parsed record, in the parser's error shape.
pub(super) fn refused(record: &Record, reason: String) -> RecordError {
    RecordError {
        line: record.line,
        column: None,
        field: None,
        record_id: Some(record.record_id.clone()),
        reason,
        raw: record.raw.clone(),
    }
}
