//! Multi-row INSERTs of record and fit rows with their values bound in
//! place.
//!
//! rusqlite binds every text as `SQLITE_TRANSIENT`, so SQLite copies it
//! (a malloc and a memcpy) before the statement runs; with seven texts a
//! record that was about a sixth of the writing thread's time in a backlog
//! (perf). Here a statement's values are borrowed for exactly one call:
//! [`BulkStatement::run`] binds them `SQLITE_STATIC`, steps the statement
//! to completion and clears the bindings before it returns, so SQLite
//! never holds a pointer past the borrow. Values carry their lifetime in
//! their type ([`Val`], [`ToVal`]), so the borrow checker sees to the rest.

use std::ffi::{CStr, c_int};
use std::ptr::NonNull;

use rusqlite::{Connection, ffi};

/// A value to bind, texts borrowed.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) enum Val<'a> {
    Null,
    Int(i64),
    Real(f64),
    Text(&'a str),
}

/// What a column's value binds as: the same SQLite types rusqlite's
/// `ToSql` gives these Rust types (a bool is the integer 0 or 1, `None`
/// is NULL), so that a row reads back the same either way.
pub(crate) trait ToVal<'a> {
    fn to_val(&self) -> Val<'a>;
}

impl<'a> ToVal<'a> for i64 {
    fn to_val(&self) -> Val<'a> {
        Val::Int(*self)
    }
}

impl<'a> ToVal<'a> for bool {
    fn to_val(&self) -> Val<'a> {
        Val::Int(i64::from(*self))
    }
}

impl<'a> ToVal<'a> for f64 {
    fn to_val(&self) -> Val<'a> {
        Val::Real(*self)
    }
}

impl<'a> ToVal<'a> for &'a str {
    fn to_val(&self) -> Val<'a> {
        Val::Text(self)
    }
}

impl<'a> ToVal<'a> for &'a String {
    fn to_val(&self) -> Val<'a> {
        Val::Text(self.as_str())
    }
}

impl<'a> ToVal<'a> for &'a Option<String> {
    fn to_val(&self) -> Val<'a> {
        match self {
            Some(s) => Val::Text(s.as_str()),
            None => Val::Null,
        }
    }
}

impl<'a, T: ToVal<'a>> ToVal<'a> for Option<T> {
    fn to_val(&self) -> Val<'a> {
        match self {
            Some(v) => v.to_val(),
            None => Val::Null,
        }
    }
}

/// A prepared statement owned outside rusqlite's cache, finalized on drop.
/// It must be dropped before its connection is closed: [`super::Tx`] holds
/// its statements and borrows the connection for longer.
#[derive(Debug)]
pub(crate) struct BulkStatement {
    stmt: NonNull<ffi::sqlite3_stmt>,
    db: NonNull<ffi::sqlite3>,
    params: usize,
}

// SAFETY: a statement belongs to its connection, which is `Send`; the
// statement is only used through the transaction that borrows that
// connection mutably, so both move between threads together and are never
// used from two threads at once.
unsafe impl Send for BulkStatement {}

impl BulkStatement {
    /// Prepares `sql` (one statement) on `conn`, to be kept and run many
    /// times.
    pub(crate) fn prepare(conn: &Connection, sql: &str) -> rusqlite::Result<BulkStatement> {
        let Ok(len) = c_int::try_from(sql.len()) else {
            return Err(rusqlite::Error::SqliteFailure(
                ffi::Error::new(ffi::SQLITE_TOOBIG),
                Some("statement text too long".into()),
            ));
        };
        // SAFETY: the handle is valid while `conn` is borrowed; prepare
        // reads `len` bytes of `sql` and writes the statement pointer.
        unsafe {
            let db = conn.handle();
            let mut stmt = std::ptr::null_mut();
            let rc = ffi::sqlite3_prepare_v3(
                db,
                sql.as_ptr().cast(),
                len,
                ffi::SQLITE_PREPARE_PERSISTENT,
                &mut stmt,
                std::ptr::null_mut(),
            );
            let (Some(db), true) = (NonNull::new(db), rc == ffi::SQLITE_OK) else {
                ffi::sqlite3_finalize(stmt);
                return Err(error(db, rc));
            };
            let Some(stmt) = NonNull::new(stmt) else {
                return Err(rusqlite::Error::SqliteFailure(
                    ffi::Error::new(ffi::SQLITE_MISUSE),
                    Some("no statement in the text".into()),
                ));
            };
            let params = usize::try_from(ffi::sqlite3_bind_parameter_count(stmt.as_ptr()))
                .unwrap_or_default();
            Ok(BulkStatement { stmt, db, params })
        }
    }

    /// How many values [`BulkStatement::run`] takes.
    #[cfg(test)]
    pub(crate) fn params(&self) -> usize {
        self.params
    }

    /// Binds `values` to the parameters in order, runs the statement to
    /// completion and clears the bindings: nothing of `values` is used
    /// after this returns.
    pub(crate) fn run(&mut self, values: &[Val<'_>]) -> rusqlite::Result<()> {
        if values.len() != self.params {
            return Err(rusqlite::Error::InvalidParameterCount(
                values.len(),
                self.params,
            ));
        }
        let stmt = self.stmt.as_ptr();
        // SAFETY: `stmt` is a live statement of this connection. Texts are
        // bound SQLITE_STATIC: SQLite reads them during `sqlite3_step`, and
        // `sqlite3_clear_bindings` drops every pointer to them before this
        // function returns, while `values` is still borrowed. Lengths are
        // those of the `&str`s (UTF-8, as declared).
        unsafe {
            let mut rc = ffi::SQLITE_OK;
            for (i, v) in values.iter().enumerate() {
                let at = (i + 1) as c_int;
                rc = match *v {
                    Val::Null => ffi::sqlite3_bind_null(stmt, at),
                    Val::Int(n) => ffi::sqlite3_bind_int64(stmt, at, n),
                    Val::Real(r) => ffi::sqlite3_bind_double(stmt, at, r),
                    Val::Text(s) => ffi::sqlite3_bind_text64(
                        stmt,
                        at,
                        // An empty text points at a real byte, never at
                        // the dangling address an empty `&str` may have.
                        if s.is_empty() {
                            c"".as_ptr()
                        } else {
                            s.as_ptr().cast()
                        },
                        s.len() as ffi::sqlite3_uint64,
                        ffi::SQLITE_STATIC(),
                        ffi::SQLITE_UTF8 as u8,
                    ),
                };
                if rc != ffi::SQLITE_OK {
                    break;
                }
            }
            if rc == ffi::SQLITE_OK {
                rc = ffi::sqlite3_step(stmt);
                if rc == ffi::SQLITE_DONE {
                    rc = ffi::SQLITE_OK;
                }
            }
            let result = if rc == ffi::SQLITE_OK {
                Ok(())
            } else {
                Err(error(self.db.as_ptr(), rc))
            };
            ffi::sqlite3_reset(stmt);
            ffi::sqlite3_clear_bindings(stmt);
            result
        }
    }
}

impl Drop for BulkStatement {
    fn drop(&mut self) {
        // SAFETY: the statement is live and dropped once; its connection is
        // still open (see the type's documentation).
        unsafe {
            ffi::sqlite3_finalize(self.stmt.as_ptr());
        }
    }
}

/// The error SQLite reports for `rc` on `db`, as rusqlite gives it.
///
/// # Safety
/// `db` is null or a live connection handle.
unsafe fn error(db: *mut ffi::sqlite3, rc: c_int) -> rusqlite::Error {
    // SAFETY: as documented for this function; the message is copied out
    // before anything else touches the connection.
    let (code, message) = unsafe {
        if db.is_null() {
            (rc, None)
        } else {
            let m = ffi::sqlite3_errmsg(db);
            let message = (!m.is_null()).then(|| CStr::from_ptr(m).to_string_lossy().into_owned());
            (ffi::sqlite3_extended_errcode(db), message)
        }
    };
    rusqlite::Error::SqliteFailure(ffi::Error::new(code), message)
}

#[cfg(test)]
mod tests {
    #![allow(clippy::unwrap_used)]
    use super::*;

    fn table() -> Connection {
        let conn = Connection::open_in_memory().unwrap();
        conn.execute_batch(
            "CREATE TABLE t (id INTEGER PRIMARY KEY, i INTEGER NOT NULL, r REAL, s TEXT, u TEXT UNIQUE)",
        )
        .unwrap();
        conn
    }

    /// Rows bound in place read back as rusqlite's own binding writes them:
    /// same types, same values (NaN stored as NULL, as SQLite does), texts
    /// intact after the strings they came from are gone.
    #[test]
    fn rows_bound_in_place_read_back_as_rusqlites_binding_writes_them() {
        let conn = table();
        let mut stmt = BulkStatement::prepare(
            &conn,
            "INSERT INTO t (id, i, r, s, u) VALUES (?, ?, ?, ?, ?), (?, ?, ?, ?, ?)",
        )
        .unwrap();
        assert_eq!(stmt.params(), 10);
        {
            let texts = [String::from("ü 'x' \u{1F600}"), String::from("")];
            let none: Option<String> = None;
            let values = [
                1_i64.to_val(),
                true.to_val(),
                0.1_f64.to_val(),
                (&texts[0]).to_val(),
                (&none).to_val(),
                2_i64.to_val(),
                i64::MIN.to_val(),
                f64::NAN.to_val(),
                (&texts[1]).to_val(),
                Some("b").to_val(),
            ];
            stmt.run(&values).unwrap();
        }
        conn.execute(
            "INSERT INTO t (id, i, r, s, u) VALUES (?1, ?2, ?3, ?4, ?5)",
            rusqlite::params![3_i64, true, 0.1_f64, "ü 'x' \u{1F600}", None::<String>],
        )
        .unwrap();
        let row = |id: i64| {
            conn.query_row(
                "SELECT typeof(i), i, typeof(r), r, typeof(s), s, typeof(u), u FROM t WHERE id = ?1",
                [id],
                |r| {
                    Ok((
                        r.get::<_, String>(0)?,
                        r.get::<_, i64>(1)?,
                        r.get::<_, String>(2)?,
                        r.get::<_, Option<f64>>(3)?,
                        r.get::<_, String>(4)?,
                        r.get::<_, Option<String>>(5)?,
                        r.get::<_, String>(6)?,
                        r.get::<_, Option<String>>(7)?,
                    ))
                },
            )
            .unwrap()
        };
        assert_eq!(row(1), row(3));
        let second = row(2);
        assert_eq!(second.1, i64::MIN);
        assert_eq!((second.2.as_str(), second.3), ("null", None));
        assert_eq!(second.5.as_deref(), Some(""));
        assert_eq!(second.7.as_deref(), Some("b"));
    }

    /// A failed run reports SQLite's error, leaves the statement usable, and
    /// a wrong number of values is refused before anything is bound.
    #[test]
    fn a_failed_run_reports_the_error_and_the_statement_goes_on() {
        let conn = table();
        let mut stmt =
            BulkStatement::prepare(&conn, "INSERT INTO t (id, i, u) VALUES (?, ?, ?)").unwrap();
        stmt.run(&[Val::Int(1), Val::Int(1), Val::Text("same")])
            .unwrap();
        let e = stmt
            .run(&[Val::Int(2), Val::Int(1), Val::Text("same")])
            .unwrap_err();
        assert!(
            e.to_string().contains("UNIQUE constraint failed: t.u"),
            "{e}"
        );
        assert_eq!(
            e.sqlite_error_code(),
            Some(rusqlite::ErrorCode::ConstraintViolation)
        );
        let e = stmt.run(&[Val::Int(2), Val::Null, Val::Null]).unwrap_err();
        assert!(e.to_string().contains("NOT NULL"), "{e}");
        assert!(matches!(
            stmt.run(&[Val::Int(2)]),
            Err(rusqlite::Error::InvalidParameterCount(1, 3))
        ));
        stmt.run(&[Val::Int(2), Val::Int(5), Val::Text("other")])
            .unwrap();
        let n: i64 = conn
            .query_row("SELECT count(*) FROM t", [], |r| r.get(0))
            .unwrap();
        assert_eq!(n, 2);
        assert!(BulkStatement::prepare(&conn, "INSERT INTO nowhere VALUES (?)").is_err());
    }
}
