//! The worker's bulk read on SQLite, through read-only connections of its own.
//!
//! sqlx runs each SQLite connection on a thread of its own and hands every row over to the caller
//! through a channel, copying each value: about 3 µs a row, where SQLite itself steps through the
//! worker's index at about 0.2 µs (BENCHMARKS.md, "Worker"). The worker reads hundreds of thousands of
//! rows per run of intervals, so this one read goes through rusqlite instead, on the blocking pool,
//! with the same SQL text and the same assembly of rows as the sqlx read (`results.rs`), and it
//! reads its three queries in one transaction, so they see one snapshot. (Batches of readings are
//! written through a connection of their own too: `sqlite_write.rs`.)

use std::path::PathBuf;
use std::sync::{Arc, Mutex};
use std::time::Duration;

use rusqlite::{Connection, OpenFlags};

use crate::results::{
    assemble_series, overturned_of, IntervalData, ReadingRow, LOAD_READINGS_SQL, LOAD_REVIEWS_SQL,
    LOAD_STATIONS_SQL,
};
use crate::StoreError;

/// Idle connections kept for the next read: one per worker step in flight is enough.
const IDLE_CONNECTIONS: usize = 4;

/// Read-only connections to one SQLite file.
#[derive(Debug)]
pub(crate) struct DirectReader {
    path: PathBuf,
    busy_timeout: Duration,
    idle: Mutex<Vec<Connection>>,
}

impl DirectReader {
    /// A reader for the database file at `path`.
    pub(crate) fn for_file(path: &std::path::Path, busy_timeout: Duration) -> Arc<Self> {
        Arc::new(DirectReader {
            path: path.to_owned(),
            busy_timeout,
            idle: Mutex::new(Vec::new()),
        })
    }

    /// See `Store::load_interval`.
    pub(crate) async fn load_interval(
        self: &Arc<Self>,
        area_id: i64,
        quantity: &str,
        from_ms: i64,
        to_ms: i64,
    ) -> Result<IntervalData, StoreError> {
        let reader = Arc::clone(self);
        let quantity = quantity.to_owned();
        tokio::task::spawn_blocking(move || {
            let mut connection = reader.connection()?;
            let data = read(&mut connection, area_id, &quantity, from_ms, to_ms)?;
            // A connection is kept only after a clean read; one that failed is closed.
            let mut idle = reader
                .idle
                .lock()
                .unwrap_or_else(|poison| poison.into_inner());
            if idle.len() < IDLE_CONNECTIONS {
                idle.push(connection);
            }
            Ok(data)
        })
        .await
        .map_err(|error| StoreError::Other(format!("the direct read panicked: {error}")))?
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
        Ok(connection)
    }
}

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
