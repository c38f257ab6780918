//! Pure rules that judge each new record and each refit: which findings
//! deserve the analyst's attention, why, and what to check first.
//! Never stores or sends.

pub mod advice;
pub mod causes;
pub mod rules;

/// How urgent a finding is, mildest first. Its word (`notice`, `warning`,
/// `alert`), used in subjects, bodies and the store, is given in
/// `store::states`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub enum Severity {
    /// Worth a look when convenient.
    Notice,
    /// Check before the trend is used.
    Warning,
    /// Check now: the record changes what the trend says.
    Alert,
}
