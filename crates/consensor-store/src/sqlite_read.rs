//! The hot reads on SQLite, through read-only connections of their own: the worker's bulk read, and
//! the two lookups every batch of readings makes before it is stored (its token, its stations).
//!
//! sqlx runs each SQLite connection on a thread of its own and hands every row over to the caller
//! through a channel, copying each value: about 3 µs a row, where SQLite itself steps through the
//! worker's index at about 0.2 µs (BENCHMARKS.md, "Worker"). The worker reads hundreds of thousands of
//! rows per run of intervals, so this one read goes through rusqlite instead, on the blocking pool,
//! with the same SQL text and the same assembly of rows as the sqlx read (`results.rs`), and it
//! reads its three queries in one transaction, so they see one snapshot. A gateway's token and its
//! batch each name a hundred stations, read on every request; through the pool, queued behind
//! dashboards and the worker, the token read took 12 ms at the median over a load run's requests
//! (BENCHMARKS.md, "Load"), so they come here too. Each read is a transaction of its own, so
//! a revoked token is refused from the next request on. (Batches of readings are written through
//! a connection of their own too: `sqlite_write.rs`.)

use std::collections::HashMap;
use std::path::PathBuf;
use std::sync::{Arc, Mutex};
use std::time::Duration;

use rusqlite::{Connection, OpenFlags, OptionalExtension};
use tokio::sync::Semaphore;

use crate::results::{
    assemble_series, overturned_of, IntervalData, ReadingRow, LOAD_READINGS_SQL, LOAD_REVIEWS_SQL,
    LOAD_STATIONS_SQL,
};
use crate::{StationRef, StoreError, Token};

/// Reads in hand at once, each on a connection of its own; the connections are kept for the next
/// reads. A read takes microseconds to a few milliseconds, so a few connections serve a burst of
/// requests, and opening one per request would cost more than the read (SQLite parses the schema
/// on a connection's first statement).
const CONNECTIONS: usize = 6;

/// Read-only connections to one SQLite file.
#[derive(Debug)]
pub(crate) struct DirectReader {
    path: PathBuf,
    busy_timeout: Duration,
    idle: Mutex<Vec<Connection>>,
    /// One permit per connection: a read waits for one before it takes a blocking thread.
    permits: Semaphore,
}

impl DirectReader {
    /// A reader for the database file at `path`.
    pub(crate) fn for_file(path: &std::path::Path, busy_timeout: Duration) -> Arc<Self> {
        Arc::new(DirectReader {
            path: path.to_owned(),
            busy_timeout,
            idle: Mutex::new(Vec::new()),
            permits: Semaphore::new(CONNECTIONS),
        })
    }

    /// Runs `read` on one of the reader's connections, on the blocking pool. A connection is kept
    /// only after a clean read; one that failed is closed.
    async fn with_connection<T: Send + 'static>(
        self: &Arc<Self>,
        read: impl FnOnce(&mut Connection) -> Result<T, StoreError> + Send + 'static,
    ) -> Result<T, StoreError> {
        let _permit = self
            .permits
            .acquire()
            .await
            .map_err(|_| StoreError::Other("the direct reader is closed".to_owned()))?;
        let reader = Arc::clone(self);
        tokio::task::spawn_blocking(move || {
            let mut connection = reader.connection()?;
            let value = read(&mut connection)?;
            reader
                .idle
                .lock()
                .unwrap_or_else(|poison| poison.into_inner())
                .push(connection);
            Ok(value)
        })
        .await
        .map_err(|error| StoreError::Other(format!("the direct read panicked: {error}")))?
    }

    /// See `Store::load_interval`.
    pub(crate) async fn load_interval(
        self: &Arc<Self>,
        area_id: i64,
        quantity: &str,
        from_ms: i64,
        to_ms: i64,
    ) -> Result<IntervalData, StoreError> {
        let quantity = quantity.to_owned();
        self.with_connection(move |connection| read(connection, area_id, &quantity, from_ms, to_ms))
            .await
    }

    /// See `Store::find_token_by_hash`: the token and its stations in one read transaction.
    pub(crate) async fn find_token_by_hash(
        self: &Arc<Self>,
        hash: &[u8],
    ) -> Result<Option<Token>, StoreError> {
        let hash = hash.to_owned();
        self.with_connection(move |connection| {
            let transaction = connection.transaction()?;
            let token = transaction
                .prepare_cached(TOKEN_SQL)?
                .query_row([&hash], |row| {
                    Ok(Token {
                        id: row.get(0)?,
                        role: row.get(1)?,
                        label: row.get(2)?,
                        stations: Vec::new(),
                        created_at_ms: row.get(3)?,
                        revoked_at_ms: row.get(4)?,
                    })
                })
                .optional()?;
            let token = match token {
                Some(mut token) => {
                    token.stations = transaction
                        .prepare_cached(TOKEN_STATIONS_SQL)?
                        .query_map([&token.id], |row| row.get(0))?
                        .collect::<Result<_, _>>()?;
                    Some(token)
                }
                None => None,
            };
            transaction.commit()?;
            Ok(token)
        })
        .await
    }

    /// See `Store::station_keys_lookup`: one search of the stations' unique key per distinct key.
    pub(crate) async fn station_keys_lookup(
        self: &Arc<Self>,
        keys: Vec<String>,
    ) -> Result<HashMap<String, StationRef>, StoreError> {
        self.with_connection(move |connection| {
            let transaction = connection.transaction()?;
            let found = crate::sqlite_write::lookup_stations(&transaction, &keys)?;
            transaction.commit()?;
            Ok(found)
        })
        .await
    }

    fn connection(&self) -> Result<Connection, StoreError> {
        if let Some(connection) = self
            .idle
            .lock()
            .unwrap_or_else(|poison| poison.into_inner())
            .pop()
        {
            return Ok(connection);
        }
        let connection = Connection::open_with_flags(
            &self.path,
            OpenFlags::SQLITE_OPEN_READ_ONLY | OpenFlags::SQLITE_OPEN_NO_MUTEX,
        )?;
        connection.busy_timeout(self.busy_timeout)?;
        connection.pragma_update(None, "cache_size", READER_CACHE_KIB)?;
        Ok(connection)
    }
}

/// Each reader connection's page cache, as SQLite's `cache_size` takes it (negative: KiB), instead
/// of SQLite's 2 MiB. Since migration 0005 the worker's read finds a reading's values in the table,
/// where one station's readings lie far apart (rows are in arrival order, batch after batch), and each visit read its
/// page anew through the small cache: a full recompute of ten million readings took 26.3 s with
/// 2 MiB and 16.1 s with this (BENCHMARKS.md, "Worker"). Pages are taken only as they are used, and
/// there are at most `CONNECTIONS` of them; the benchmark's peak RSS was 411 MiB against 371 MiB.
const READER_CACHE_KIB: i64 = -32 * 1024;

/// The token with this hash, unless it has been revoked (as `sql.rs` has it for PostgreSQL).
const TOKEN_SQL: &str = "SELECT id, role, label, created_at_ms, revoked_at_ms FROM tokens \
     WHERE hash = ?1 AND revoked_at_ms IS NULL";
/// A token's stations, sorted.
const TOKEN_STATIONS_SQL: &str =
    "SELECT station_key FROM token_stations WHERE token_id = ?1 ORDER BY station_key";

/// The three queries of the worker's read, in one read transaction.
fn read(
    connection: &mut Connection,
    area_id: i64,
    quantity: &str,
    from_ms: i64,
    to_ms: i64,
) -> Result<IntervalData, StoreError> {
    let transaction = connection.transaction()?;
    let data = {
        let stations = transaction
            .prepare_cached(LOAD_STATIONS_SQL)?
            .query_map([area_id], |row| Ok((row.get(0)?, row.get(1)?)))?
            .collect::<Result<Vec<(i64, String)>, _>>()?;
        let parameters = rusqlite::params![area_id, quantity, from_ms, to_ms];
        let mut readings = transaction.prepare_cached(LOAD_READINGS_SQL)?;
        let rows = readings.query_map(parameters, |row| -> rusqlite::Result<ReadingRow> {
            Ok((
                row.get(0)?,
                row.get(1)?,
                row.get(2)?,
                row.get(3)?,
                row.get(4)?,
            ))
        })?;
        let stations = assemble_series(stations, rows)?;
        let reviews = transaction
            .prepare_cached(LOAD_REVIEWS_SQL)?
            .query_map(parameters, |row| Ok((row.get(0)?, row.get(1)?)))?
            .collect::<Result<Vec<(i64, String)>, _>>()?;
        IntervalData {
            stations,
            overturned: overturned_of(reviews)?,
        }
    };
    transaction.commit()?;
    Ok(data)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A reader connection has the larger page cache; `PRAGMA cache_size` reads back what was set,
    /// negative for KiB (sqlite.org, "PRAGMA cache_size").
    #[test]
    fn reader_connections_have_the_larger_page_cache() {
        let directory = tempfile::tempdir().expect("temporary directory");
        let file = directory.path().join("empty.db");
        Connection::open(&file).expect("create the file");
        let reader = DirectReader::for_file(&file, Duration::from_secs(1));
        let cache: i64 = reader
            .connection()
            .expect("a reader connection")
            .query_row("PRAGMA cache_size", [], |row| row.get(0))
            .expect("cache size");
        assert_eq!(cache, READER_CACHE_KIB);
    }
}
