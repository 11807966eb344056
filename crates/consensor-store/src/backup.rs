//! The SQL of `consensor backup`: an online copy of a live SQLite database with `VACUUM INTO`, and
//! the work on the copy before it is published (releasing the claims a live worker held, the
//! integrity check). Each function opens a connection of its own, with no migrations, so a backup
//! never changes the live database's schema; the command in `consensor-server` handles the files.
//!
//! `VACUUM INTO` reads the whole database inside one read transaction and writes it, compacted, to
//! a new file. In WAL mode a reader never blocks writers, so the server keeps accepting readings
//! while the copy runs, and the copy holds exactly the transactions committed when the read began.

use std::path::Path;
use std::str::FromStr;
use std::time::Duration;

use sqlx::sqlite::SqliteConnectOptions;
use sqlx::{ConnectOptions, Connection, Row};

/// Why a backup step failed, as a sentence for the operator.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct BackupError(pub String);

/// Copies the SQLite database at `database_url` (`sqlite://path` or `sqlite:path`) into the new file
/// `target` with `VACUUM INTO`, after checking that the source exists and is a Consensor database.
/// `busy_timeout` bounds the wait for a lock held by the live server (`VACUUM INTO` only needs a
/// read lock, which in WAL mode is refused only while a checkpoint resets the log).
pub async fn vacuum_sqlite_into(
    database_url: &str,
    target: &Path,
    busy_timeout: Duration,
) -> Result<(), BackupError> {
    let options = SqliteConnectOptions::from_str(database_url)
        .map_err(|error| BackupError(format!("invalid SQLite database URL: {error}")))?
        .create_if_missing(false)
        .busy_timeout(busy_timeout);
    let source_file = options.get_filename().to_owned();
    if !source_file.is_file() {
        return Err(BackupError(format!(
            "the database file {} does not exist (check --database or CONSENSOR_DATABASE_URL)",
            source_file.display()
        )));
    }
    let mut source = options.connect().await.map_err(|error| {
        BackupError(format!(
            "could not open the database {}: {error}",
            source_file.display()
        ))
    })?;
    let copied = async {
        let has_readings: i64 = sqlx::query(
            "SELECT count(*) FROM sqlite_master WHERE type = 'table' AND name = 'readings'",
        )
        .fetch_one(&mut source)
        .await
        .and_then(|row| row.try_get(0))
        .map_err(|error| {
            BackupError(format!(
                "could not read the database {}: {error}",
                source_file.display()
            ))
        })?;
        if has_readings == 0 {
            return Err(BackupError(format!(
                "{} is not a Consensor database (it has no readings table)",
                source_file.display()
            )));
        }
        let target_text = target
            .to_str()
            .ok_or_else(|| BackupError("the backup path must be valid UTF-8".into()))?;
        sqlx::query("VACUUM INTO ?")
            .bind(target_text)
            .execute(&mut source)
            .await
            .map_err(|error| {
                BackupError(format!(
                    "could not copy the database into {target_text}: {error}"
                ))
            })?;
        Ok(())
    }
    .await;
    let _ = source.close().await;
    copied
}

/// Releases, in the copy, the claims the live worker held on pending intervals when the snapshot
/// was taken: no worker of a restored database holds them, and a claim is only taken over once it
/// is stale, so released they are computed as soon as a server runs on the restored file. Returns
/// how many there were. The copy is in rollback-journal mode (`VACUUM INTO` writes it so) and
/// nothing else has it open.
pub async fn release_claims_in_copy(copy_path: &Path) -> Result<u64, BackupError> {
    let failed = |what: &str, error: sqlx::Error| {
        BackupError(format!("could not {what} {}: {error}", copy_path.display()))
    };
    let mut copy = SqliteConnectOptions::new()
        .filename(copy_path)
        .connect()
        .await
        .map_err(|error| failed("open the copy", error))?;
    let result = sqlx::query(
        "UPDATE pending_buckets SET claimed_by = NULL, claimed_at_ms = NULL \
         WHERE claimed_by IS NOT NULL",
    )
    .execute(&mut copy)
    .await;
    let closed = copy.close().await;
    let released = result
        .map_err(|error| failed("release the claims in", error))?
        .rows_affected();
    closed.map_err(|error| failed("close the copy", error))?;
    Ok(released)
}

/// Opens the copy read-only and immutable (nothing else has it open), runs
/// `PRAGMA integrity_check` and counts its readings.
pub async fn check_copy(copy_path: &Path) -> Result<u64, BackupError> {
    let failed = |error: sqlx::Error| {
        BackupError(format!(
            "could not check the copy {}: {error}",
            copy_path.display()
        ))
    };
    let mut copy = SqliteConnectOptions::new()
        .filename(copy_path)
        .read_only(true)
        .immutable(true)
        .connect()
        .await
        .map_err(failed)?;
    let result = async {
        let rows = sqlx::query("PRAGMA integrity_check")
            .fetch_all(&mut copy)
            .await
            .map_err(failed)?;
        let messages: Vec<String> = rows
            .iter()
            .map(|row| row.try_get::<String, _>(0))
            .collect::<Result<_, _>>()
            .map_err(failed)?;
        if messages != ["ok"] {
            return Err(BackupError(format!(
                "the copy failed SQLite's integrity check: {}",
                messages.join("; ")
            )));
        }
        let readings: i64 = sqlx::query("SELECT count(*) FROM readings")
            .fetch_one(&mut copy)
            .await
            .and_then(|row| row.try_get(0))
            .map_err(failed)?;
        Ok(u64::try_from(readings).unwrap_or(0))
    }
    .await;
    let _ = copy.close().await;
    result
}
