//! Storage for Consensor: readings (append-only, with revisions), the network description, tokens
//! and the queue of intervals whose consensus must be computed. Only this crate talks to a database;
//! every driver error is mapped into [`StoreError`] in one place (`error.rs`), so callers never see
//! one.
//!
//! # Backends
//! [`connect`] chooses by the URL's scheme: `sqlite://path` or `sqlite:path` opens (and creates if
//! missing) an SQLite file, the embedded default; `postgres://…` or `postgresql://…` connects to a
//! PostgreSQL server. Both apply their migrations (`migrations/sqlite`, `migrations/postgres`,
//! embedded at build time) before returning. [`AnyStore`] dispatches to the one chosen; all of them
//! implement [`Store`].
//!
//! # Schema
//! * `areas(id, key unique, name, interval_ms)`; `stations(id, key unique, area_id → areas, name,
//!   lat, lon, elevation_m)`; `quantities(id, key unique)`, filled on first use so that the
//!   readings' key is all integers.
//! * `tokens(id, hash unique, role, label, created_at_ms, revoked_at_ms)` and
//!   `token_stations(token_id, station_key)`. Only hashes are stored.
//! * `readings(id, observed_at_ms, station_id, quantity_id, revision, value, value_as_sent,
//!   unit_as_sent, received_at_ms)` with the unique key `(observed_at_ms, station_id, quantity_id,
//!   revision)`. Rows are only ever appended: a changed value for a key is a new row with the next
//!   revision, and the current value of a key is its highest revision.
//! * `pending_buckets(area_id, quantity_id, bucket_start_ms, marked_at_ms, mark_count, claimed_by,
//!   claimed_at_ms)`: the (area, quantity, interval) triples whose consensus must be (re)computed,
//!   marked in the same transaction as the readings that touch them.
//!
//! # Why the readings' key starts with time
//! Live readings arrive time-major: every station's reading for minute t, then every station's for
//! t + 1. With the observation time first in the unique index, each batch's new entries land at the
//! right-hand end of the B-tree, touching few pages; a key starting with the station would scatter
//! every batch over one region of the index per station, which costs a page read and write per
//! station and makes inserts several times slower on a large table. Integer times and ids also keep
//! index entries short and comparisons cheap.
//!
//! # Durability
//! An acknowledged batch is committed, and a committed transaction must survive a crash. SQLite runs
//! in WAL mode with `synchronous=FULL`: the WAL is synced to disk at every commit, so a committed
//! batch survives both a killed process (`kill -9`) and a power loss or OS crash. With
//! `synchronous=NORMAL` in WAL mode the WAL is synced only at checkpoints: a committed transaction
//! still survives a crash of the process (the data is in the OS's page cache), but after a power
//! loss the last transactions before it may be rolled back, so an acknowledged batch could vanish;
//! that is why Consensor pays for FULL. PostgreSQL keeps its defaults (`fsync=on`,
//! `synchronous_commit=on`), under which a commit returns only after its WAL record is flushed.

mod batch;
mod error;
mod model;
mod postgres;
mod sql;
mod sqlite;

use std::collections::HashMap;
use std::future::Future;

pub use batch::bucket_start_ms;
pub use error::StoreError;
pub use model::{
    Area, BatchOutcome, NewArea, NewReading, NewStation, NewToken, ReadingKey, Station, StationRef,
    StoreOptions, StoredReading, Token, Upserted,
};
pub use postgres::PostgresStore;
pub use sqlite::SqliteStore;

/// Everything the rest of Consensor asks of its storage. All times are milliseconds since the Unix
/// epoch (UTC). The futures are `Send` so that handlers can await them on a multi-threaded runtime.
pub trait Store: Send + Sync {
    /// Succeeds when the database answers and every embedded migration has been applied.
    fn ping(&self) -> impl Future<Output = Result<(), StoreError>> + Send;

    /// Creates the area or updates its name and interval; `created` tells which.
    fn upsert_area(
        &self,
        area: &NewArea,
    ) -> impl Future<Output = Result<Upserted, StoreError>> + Send;

    /// Every area, ordered by key.
    fn list_areas(&self) -> impl Future<Output = Result<Vec<Area>, StoreError>> + Send;

    /// Creates the station or updates it; `NotFound` when its area does not exist.
    fn upsert_station(
        &self,
        station: &NewStation,
    ) -> impl Future<Output = Result<Upserted, StoreError>> + Send;

    /// Every station with its area's key, ordered by key.
    fn list_stations(&self) -> impl Future<Output = Result<Vec<Station>, StoreError>> + Send;

    /// Resolves many station keys in one query so that the HTTP layer can validate a whole batch;
    /// unknown keys are simply absent from the map.
    fn station_keys_lookup(
        &self,
        keys: &[String],
    ) -> impl Future<Output = Result<HashMap<String, StationRef>, StoreError>> + Send;

    /// Stores a token by its hash; `Conflict` when the id or the hash exists already.
    fn insert_token(&self, token: &NewToken)
        -> impl Future<Output = Result<(), StoreError>> + Send;

    /// The token with this hash, or `None` when there is none or it has been revoked.
    fn find_token_by_hash(
        &self,
        hash: &[u8],
    ) -> impl Future<Output = Result<Option<Token>, StoreError>> + Send;

    /// Revokes a token at once; `NotFound` when the id is unknown. Revoking twice is not an error.
    fn revoke_token(
        &self,
        id: &str,
        now_ms: i64,
    ) -> impl Future<Output = Result<(), StoreError>> + Send;

    /// Stores a batch in one transaction: every reading or none. Each reading is new (revision 0), a
    /// duplicate of its key's current value (nothing stored) or a revision (a new row with the next
    /// revision); see [`BatchOutcome`] for the counts. The same transaction marks the pending bucket
    /// of every stored reading (duplicates change nothing, so they mark nothing). `NotFound` when a
    /// station key is unknown; unknown quantity keys are added to the quantity table.
    fn insert_batch(
        &self,
        readings: &[NewReading],
        now_ms: i64,
    ) -> impl Future<Output = Result<BatchOutcome, StoreError>> + Send;

    /// The number of stored reading rows, revisions included (the sum of every batch's
    /// `accepted`).
    fn count_readings(&self) -> impl Future<Output = Result<u64, StoreError>> + Send;

    /// The number of (area, quantity, interval) triples waiting for the consensus worker.
    fn count_pending_buckets(&self) -> impl Future<Output = Result<u64, StoreError>> + Send;

    /// The current revision of each reading of one station and quantity with
    /// `from_ms <= observed_at_ms < to_ms`, oldest first; empty for unknown keys.
    fn readings_history(
        &self,
        station: &str,
        quantity: &str,
        from_ms: i64,
        to_ms: i64,
    ) -> impl Future<Output = Result<Vec<StoredReading>, StoreError>> + Send;

    /// Every stored revision of one reading, revision 0 first; empty for an unknown key.
    fn reading_revisions(
        &self,
        key: &ReadingKey,
    ) -> impl Future<Output = Result<Vec<StoredReading>, StoreError>> + Send;

    /// Closes the pool, waiting for connections in use to be returned.
    fn close(&self) -> impl Future<Output = ()> + Send;
}

/// The store chosen at start-up by the database URL.
#[derive(Debug, Clone)]
pub enum AnyStore {
    Sqlite(SqliteStore),
    Postgres(PostgresStore),
}

/// Which backend a database URL selects.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Backend {
    Sqlite,
    Postgres,
}

impl Backend {
    /// The backend for a database URL, by its scheme; `None` for any other scheme.
    pub fn from_url(url: &str) -> Option<Backend> {
        if url.starts_with("sqlite:") {
            Some(Backend::Sqlite)
        } else if url.starts_with("postgres://") || url.starts_with("postgresql://") {
            Some(Backend::Postgres)
        } else {
            None
        }
    }
}

/// Opens the store named by `url` with default options; see [`connect_with`].
pub async fn connect(url: &str) -> Result<AnyStore, StoreError> {
    connect_with(url, &StoreOptions::default()).await
}

/// Opens the store named by `url` (`sqlite://path`, `sqlite:path`, `postgres://…`,
/// `postgresql://…`) and applies its migrations.
pub async fn connect_with(url: &str, options: &StoreOptions) -> Result<AnyStore, StoreError> {
    match Backend::from_url(url) {
        Some(Backend::Sqlite) => Ok(AnyStore::Sqlite(SqliteStore::connect(url, options).await?)),
        Some(Backend::Postgres) => Ok(AnyStore::Postgres(
            PostgresStore::connect(url, options).await?,
        )),
        None => Err(StoreError::Other(
            "unsupported database URL: expected sqlite:, postgres:// or postgresql://".to_owned(),
        )),
    }
}

impl AnyStore {
    pub fn backend(&self) -> Backend {
        match self {
            AnyStore::Sqlite(_) => Backend::Sqlite,
            AnyStore::Postgres(_) => Backend::Postgres,
        }
    }
}

/// Forwards one [`Store`] method to whichever backend the [`AnyStore`] holds.
macro_rules! dispatch {
    ($self:ident, $store:ident => $call:expr) => {
        match $self {
            AnyStore::Sqlite($store) => $call.await,
            AnyStore::Postgres($store) => $call.await,
        }
    };
}

impl Store for AnyStore {
    async fn ping(&self) -> Result<(), StoreError> {
        dispatch!(self, store => store.ping())
    }

    async fn upsert_area(&self, area: &NewArea) -> Result<Upserted, StoreError> {
        dispatch!(self, store => store.upsert_area(area))
    }

    async fn list_areas(&self) -> Result<Vec<Area>, StoreError> {
        dispatch!(self, store => store.list_areas())
    }

    async fn upsert_station(&self, station: &NewStation) -> Result<Upserted, StoreError> {
        dispatch!(self, store => store.upsert_station(station))
    }

    async fn list_stations(&self) -> Result<Vec<Station>, StoreError> {
        dispatch!(self, store => store.list_stations())
    }

    async fn station_keys_lookup(
        &self,
        keys: &[String],
    ) -> Result<HashMap<String, StationRef>, StoreError> {
        dispatch!(self, store => store.station_keys_lookup(keys))
    }

    async fn insert_token(&self, token: &NewToken) -> Result<(), StoreError> {
        dispatch!(self, store => store.insert_token(token))
    }

    async fn find_token_by_hash(&self, hash: &[u8]) -> Result<Option<Token>, StoreError> {
        dispatch!(self, store => store.find_token_by_hash(hash))
    }

    async fn revoke_token(&self, id: &str, now_ms: i64) -> Result<(), StoreError> {
        dispatch!(self, store => store.revoke_token(id, now_ms))
    }

    async fn insert_batch(
        &self,
        readings: &[NewReading],
        now_ms: i64,
    ) -> Result<BatchOutcome, StoreError> {
        dispatch!(self, store => store.insert_batch(readings, now_ms))
    }

    async fn count_readings(&self) -> Result<u64, StoreError> {
        dispatch!(self, store => store.count_readings())
    }

    async fn count_pending_buckets(&self) -> Result<u64, StoreError> {
        dispatch!(self, store => store.count_pending_buckets())
    }

    async fn readings_history(
        &self,
        station: &str,
        quantity: &str,
        from_ms: i64,
        to_ms: i64,
    ) -> Result<Vec<StoredReading>, StoreError> {
        dispatch!(self, store => store.readings_history(station, quantity, from_ms, to_ms))
    }

    async fn reading_revisions(&self, key: &ReadingKey) -> Result<Vec<StoredReading>, StoreError> {
        dispatch!(self, store => store.reading_revisions(key))
    }

    async fn close(&self) {
        dispatch!(self, store => store.close())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn backend_follows_the_url_scheme() {
        // The schemes are the ones the HTTP contract names for CONSENSOR_DATABASE_URL.
        assert_eq!(
            Backend::from_url("sqlite://consensor.db"),
            Some(Backend::Sqlite)
        );
        assert_eq!(Backend::from_url("sqlite:data.db"), Some(Backend::Sqlite));
        assert_eq!(
            Backend::from_url("postgres://u@h/db"),
            Some(Backend::Postgres)
        );
        assert_eq!(
            Backend::from_url("postgresql://u@h/db"),
            Some(Backend::Postgres)
        );
        assert_eq!(Backend::from_url("mysql://u@h/db"), None);
    }
}
