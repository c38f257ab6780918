//! Pure rules that judge each new record and each refit: which findings
//! deserve the analyst's attention, why, and what to check first.
//! Never stores or sends.

pub mod advice;
pub mod causes;
pub mod rules;
