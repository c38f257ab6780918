//! The states stored rows hold, as enums: what happened to a file, where a
//! record version stands, where a finding stands and how urgent it is, what
//! a verdict said. Each
//! is written to and read from its TEXT column here only, as the word the
//! migrations' CHECK constraints list; the same word is what commands,
//! JSON and reports show.

use rusqlite::types::{FromSql, FromSqlError, FromSqlResult, ToSql, ToSqlOutput, ValueRef};

use crate::findings::Severity;

/// Gives an enum its stored words: `as_str`, `from_word`, and the
/// conversions to and from SQLite TEXT, `Display` (padded, so widths in
/// tables work) and serde (as the word).
macro_rules! stored_words {
    ($name:ident { $($variant:ident => $word:literal),+ $(,)? }) => {
        impl $name {
            /// Every value, in the order of the migrations' CHECK list.
            pub const ALL: &'static [$name] = &[$($name::$variant),+];

            /// The word stored and shown.
            pub fn as_str(self) -> &'static str {
                match self {
                    $($name::$variant => $word,)+
                }
            }

            /// The value a stored word names.
            pub fn from_word(word: &str) -> Option<$name> {
                match word {
                    $($word => Some($name::$variant),)+
                    _ => None,
                }
            }
        }

        impl std::fmt::Display for $name {
            fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
                f.pad(self.as_str())
            }
        }

        impl serde::Serialize for $name {
            fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
                s.serialize_str(self.as_str())
            }
        }

        impl ToSql for $name {
            fn to_sql(&self) -> rusqlite::Result<ToSqlOutput<'_>> {
                Ok(ToSqlOutput::Borrowed(ValueRef::Text(self.as_str().as_bytes())))
            }
        }

        impl FromSql for $name {
            fn column_result(value: ValueRef<'_>) -> FromSqlResult<Self> {
                let word = value.as_str()?;
                $name::from_word(word).ok_or_else(|| {
                    FromSqlError::Other(
                        format!(concat!("not a ", stringify!($name), ": `{}`"), word).into(),
                    )
                })
            }
        }
    };
}

/// What happened to a file.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum FileOutcome {
    /// Every row stored (or already stored).
    Ingested,
    /// Some rows refused and quarantined, the rest stored.
    Partial,
    /// The whole file set aside.
    Quarantined,
}

stored_words!(FileOutcome {
    Ingested => "ingested",
    Partial => "partial",
    Quarantined => "quarantined",
});

/// Where a version of a record stands.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum RecordStatus {
    /// The version the series uses.
    Current,
    /// A resubmission with other values, kept aside until a verdict.
    Proposed,
    /// Replaced by a later version (a correction, or a proposal taken up).
    Superseded,
}

stored_words!(RecordStatus {
    Current => "current",
    Proposed => "proposed",
    Superseded => "superseded",
});

/// Where a finding stands: open until a verdict, then what the verdict
/// said (`closed` for findings about something other than one record).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum FindingStatus {
    /// Awaiting a verdict.
    Open,
    /// The record was checked and is right.
    Confirmed,
    /// The record was wrong and a corrected version is stored.
    Corrected,
    /// The record is left out of the fit.
    Excluded,
    /// Settled without a verdict on a record.
    Closed,
}

stored_words!(FindingStatus {
    Open => "open",
    Confirmed => "confirmed",
    Corrected => "corrected",
    Excluded => "excluded",
    Closed => "closed",
});

impl FindingStatus {
    /// Whether the finding still awaits a verdict.
    pub fn is_open(self) -> bool {
        self == FindingStatus::Open
    }
}

/// What a verdict said.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum VerdictKind {
    /// The record is right as it is.
    Confirmed,
    /// The record was wrong; a corrected version is stored.
    Corrected,
    /// The record is left out of the fit.
    Excluded,
    /// The verdict before was undone and the finding reopened.
    Reverted,
}

stored_words!(VerdictKind {
    Confirmed => "confirmed",
    Corrected => "corrected",
    Excluded => "excluded",
    Reverted => "reverted",
});

impl VerdictKind {
    /// The finding's status after this verdict (a revert reopens it).
    pub fn finding_status(self) -> FindingStatus {
        match self {
            VerdictKind::Confirmed => FindingStatus::Confirmed,
            VerdictKind::Corrected => FindingStatus::Corrected,
            VerdictKind::Excluded => FindingStatus::Excluded,
            VerdictKind::Reverted => FindingStatus::Open,
        }
    }
}

stored_words!(Severity {
    Notice => "notice",
    Warning => "warning",
    Alert => "alert",
});

#[cfg(test)]
mod tests {
    use super::*;

    /// The words of `states`, as the migration's CHECK constraint on
    /// `column` lists them.
    fn check_list(sql: &str, column: &str) -> Vec<String> {
        let start = format!("CHECK ({column} IN (");
        let at = sql
            .find(&start)
            .unwrap_or_else(|| panic!("no CHECK on {column}"));
        let rest = &sql[at + start.len()..];
        let end = rest
            .find(')')
            .unwrap_or_else(|| panic!("unclosed CHECK on {column}"));
        rest[..end]
            .split(',')
            .map(|w| w.trim().trim_matches('\'').to_string())
            .collect()
    }

    fn words<T: Copy>(all: &[T], word: fn(T) -> &'static str) -> Vec<String> {
        all.iter().map(|&v| word(v).to_string()).collect()
    }

    /// The enums name exactly the words the schema accepts: a variant the
    /// CHECK constraint does not list would fail every insert of it.
    #[test]
    fn each_state_has_exactly_the_words_the_schema_accepts() {
        let initial = include_str!("../../migrations/0001_initial.sql");
        let findings = include_str!("../../migrations/0002_findings.sql");
        let verdicts = include_str!("../../migrations/0003_verdicts.sql");
        assert_eq!(
            words(FileOutcome::ALL, FileOutcome::as_str),
            check_list(initial, "outcome")
        );
        assert_eq!(
            words(RecordStatus::ALL, RecordStatus::as_str),
            check_list(initial, "status")
        );
        assert_eq!(
            words(Severity::ALL, Severity::as_str),
            check_list(findings, "severity")
        );
        assert_eq!(
            words(FindingStatus::ALL, FindingStatus::as_str),
            check_list(findings, "status")
        );
        assert_eq!(
            words(VerdictKind::ALL, VerdictKind::as_str),
            check_list(verdicts, "verdict")
        );
    }

    /// Each of `all` is bound as its word and read back as itself.
    fn round_trip<T>(
        conn: &rusqlite::Connection,
        all: &[T],
        word: fn(T) -> &'static str,
    ) -> rusqlite::Result<()>
    where
        T: ToSql + FromSql + Copy + PartialEq + std::fmt::Debug,
    {
        for &v in all {
            let text: String = conn.query_row("SELECT ?1", [v], |r| r.get(0))?;
            assert_eq!(text, word(v));
            assert_eq!(conn.query_row("SELECT ?1", [v], |r| r.get::<_, T>(0))?, v);
        }
        Ok(())
    }

    #[test]
    fn each_state_is_read_back_from_sqlite_as_written() -> rusqlite::Result<()> {
        let conn = rusqlite::Connection::open_in_memory()?;
        round_trip(&conn, FileOutcome::ALL, FileOutcome::as_str)?;
        round_trip(&conn, RecordStatus::ALL, RecordStatus::as_str)?;
        round_trip(&conn, FindingStatus::ALL, FindingStatus::as_str)?;
        round_trip(&conn, VerdictKind::ALL, VerdictKind::as_str)?;
        round_trip(&conn, Severity::ALL, Severity::as_str)
    }

    #[test]
    fn an_unknown_word_is_an_error_naming_it() -> rusqlite::Result<()> {
        let conn = rusqlite::Connection::open_in_memory()?;
        let got = conn.query_row("SELECT 'pending'", [], |r| r.get::<_, FindingStatus>(0));
        let Err(err) = got else {
            panic!("`pending` read as a finding status");
        };
        assert!(
            err.to_string().contains("not a FindingStatus: `pending`"),
            "{err}"
        );
        Ok(())
    }

    #[test]
    fn display_pads_and_json_writes_the_word() {
        assert_eq!(format!("{:<9}|", FindingStatus::Open), "open     |");
        assert_eq!(format!("{:>8}", Severity::Alert), "   alert");
        assert_eq!(
            serde_json::to_string(&VerdictKind::Corrected)
                .ok()
                .as_deref(),
            Some("\"corrected\"")
        );
    }
}
