//! The one error type that leaves the storage layer, and the one place where driver errors are
//! translated into it.

/// The one error type that leaves the storage layer.
#[derive(Debug, Clone, thiserror::Error)]
pub enum StoreError {
    #[error("not found: {0}")]
    NotFound(String),
    #[error("conflict: {0}")]
    Conflict(String),
    #[error("database unavailable: {0}")]
    Unavailable(String),
    #[error("storage error: {0}")]
    Other(String),
}

/// SQLite's primary result codes that mean "the database cannot be used right now" rather than "this
/// statement is wrong": busy (5), locked (6), read-only (8: the file or its directory lost write
/// permission, or the database was opened read-only), I/O error (10), disk full (13) and cannot
/// open (14). Each is an operator's matter that passes; none is a bug in the statement.
const SQLITE_UNAVAILABLE_CODES: [i64; 6] = [5, 6, 8, 10, 13, 14];

/// PostgreSQL error classes (the first two characters of SQLSTATE) that mean the server cannot serve
/// the request right now: connection exceptions (08), insufficient resources (53), operator
/// intervention such as a shutdown (57) and system errors (58).
const POSTGRES_UNAVAILABLE_CLASSES: [&str; 4] = ["08", "53", "57", "58"];

impl From<sqlx::Error> for StoreError {
    fn from(error: sqlx::Error) -> Self {
        use sqlx::error::ErrorKind;
        match error {
            sqlx::Error::RowNotFound => StoreError::NotFound("no such row".to_owned()),
            sqlx::Error::Io(_)
            | sqlx::Error::Tls(_)
            | sqlx::Error::Protocol(_)
            | sqlx::Error::PoolTimedOut
            | sqlx::Error::PoolClosed
            | sqlx::Error::WorkerCrashed => StoreError::Unavailable(error.to_string()),
            sqlx::Error::Database(ref database_error) => {
                let message = database_error.message().to_owned();
                match database_error.kind() {
                    ErrorKind::UniqueViolation | ErrorKind::ForeignKeyViolation => {
                        return StoreError::Conflict(message);
                    }
                    ErrorKind::NotNullViolation | ErrorKind::CheckViolation => {
                        return StoreError::Other(message);
                    }
                    _ => {}
                }
                let code = database_error.code();
                let unavailable = if database_error
                    .try_downcast_ref::<sqlx::sqlite::SqliteError>()
                    .is_some()
                {
                    code.and_then(|code| code.parse::<i64>().ok())
                        .is_some_and(is_unavailable_sqlite_code)
                } else {
                    code.is_some_and(|code| is_unavailable_postgres_sqlstate(&code))
                };
                if unavailable {
                    StoreError::Unavailable(message)
                } else {
                    StoreError::Other(message)
                }
            }
            other => StoreError::Other(other.to_string()),
        }
    }
}

/// Errors of the worker's direct SQLite read (`sqlite_read.rs`), classified like sqlx's.
impl From<rusqlite::Error> for StoreError {
    fn from(error: rusqlite::Error) -> Self {
        match error {
            rusqlite::Error::SqliteFailure(ref failure, _)
                if is_unavailable_sqlite_code(i64::from(failure.extended_code)) =>
            {
                StoreError::Unavailable(error.to_string())
            }
            other => StoreError::Other(other.to_string()),
        }
    }
}

impl From<sqlx::migrate::MigrateError> for StoreError {
    fn from(error: sqlx::migrate::MigrateError) -> Self {
        match error {
            // A migration that fails because the connection broke is an availability problem; every
            // other migration failure (a changed or missing migration, a failing statement) needs an
            // operator and is reported as such.
            sqlx::migrate::MigrateError::Execute(inner) => match StoreError::from(inner) {
                StoreError::Unavailable(message) => StoreError::Unavailable(message),
                other => StoreError::Other(format!("migration failed: {other}")),
            },
            other => StoreError::Other(format!("migration failed: {other}")),
        }
    }
}

/// Whether an SQLite (extended) result code says the database cannot be used right now. Extended
/// codes carry the primary code in their low byte.
fn is_unavailable_sqlite_code(code: i64) -> bool {
    SQLITE_UNAVAILABLE_CODES.contains(&(code & 0xff))
}

/// Whether a PostgreSQL SQLSTATE says the server cannot serve the request right now.
fn is_unavailable_postgres_sqlstate(sqlstate: &str) -> bool {
    POSTGRES_UNAVAILABLE_CLASSES
        .iter()
        .any(|class| sqlstate.starts_with(class))
}

/// Whether a failed batch transaction may succeed if it is simply run again: a concurrent batch
/// inserted the same reading key first (unique violation), or PostgreSQL aborted the transaction to
/// break a deadlock or a serialization conflict.
pub(crate) fn is_retryable(error: &sqlx::Error) -> bool {
    match error {
        sqlx::Error::Database(database_error) => {
            matches!(
                database_error.kind(),
                sqlx::error::ErrorKind::UniqueViolation
            ) || matches!(database_error.code().as_deref(), Some("40001" | "40P01"))
        }
        _ => false,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn classifies_sqlite_and_postgres_codes() {
        // SQLITE_BUSY is 5 and SQLITE_BUSY_SNAPSHOT is 517 (5 | 2 << 8), from SQLite's result-code
        // list; both mean another connection holds the database.
        assert!(is_unavailable_sqlite_code(5));
        assert!(is_unavailable_sqlite_code(517));
        // SQLITE_READONLY (8), SQLITE_READONLY_DBMOVED (1032 = 8 | 4 << 8) and SQLITE_FULL (13),
        // from SQLite's result-code list: a read-only file or a full disk passes once an operator
        // acts, so the client is told to retry.
        assert!(is_unavailable_sqlite_code(8));
        assert!(is_unavailable_sqlite_code(1032));
        assert!(is_unavailable_sqlite_code(13));
        // SQLITE_CONSTRAINT (19) is a statement problem, not an availability one.
        assert!(!is_unavailable_sqlite_code(19));
        // 08006 is PostgreSQL's connection_failure and 57P01 its admin_shutdown (SQLSTATE appendix).
        assert!(is_unavailable_postgres_sqlstate("08006"));
        assert!(is_unavailable_postgres_sqlstate("57P01"));
        // 42P01 is undefined_table: a bug or a missing migration, not an outage.
        assert!(!is_unavailable_postgres_sqlstate("42P01"));
    }

    #[test]
    fn pool_and_io_errors_are_unavailable() {
        // These variants never carry a statement problem: the database could not be reached.
        assert!(matches!(
            StoreError::from(sqlx::Error::PoolTimedOut),
            StoreError::Unavailable(_)
        ));
        let io = std::io::Error::new(std::io::ErrorKind::ConnectionRefused, "refused");
        assert!(matches!(
            StoreError::from(sqlx::Error::Io(io)),
            StoreError::Unavailable(_)
        ));
        assert!(matches!(
            StoreError::from(sqlx::Error::RowNotFound),
            StoreError::NotFound(_)
        ));
    }
}
