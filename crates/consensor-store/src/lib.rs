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
//!   unit_as_sent, received_at_ms)` with the unique key `(station_id, quantity_id, observed_at_ms,
//!   revision)`. Rows are only ever appended: a changed value for a key is a new row with the next
//!   revision, and the current value of a key is its highest revision.
//! * `pending_buckets(area_id, quantity_id, bucket_start_ms, marked_at_ms, mark_count, claimed_by,
//!   claimed_at_ms)`: the (area, quantity, interval) triples whose consensus must be (re)computed,
//!   marked in the same transaction as the readings that touch them.
//! * Migration 0002: `interval_results` (one row per computation of an interval: revision 1, 2, …,
//!   every `Point` field; append-only), `interval_latest` (the latest revision of each interval),
//!   `set_aside` and `interval_station_values` (per result), and `reviews` (the append-only audit
//!   log of review decisions). See the crate's README for claims, revisions and the listing rules.
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

pub mod backup;
mod batch;
mod commit_group;
mod error;
mod model;
mod postgres;
mod results;
mod results_sql;
mod sql;
mod sqlite;
mod sqlite_read;
mod sqlite_write;
#[cfg(feature = "testing")]
pub mod testing;
mod write_gate;

use std::collections::HashMap;
use std::future::Future;

use consensor_core::checks::IntervalOutcome;

pub use batch::bucket_start_ms;
pub use error::StoreError;
pub use model::{
    Area, BatchOutcome, NewArea, NewReading, NewStation, NewToken, ReadingKey, Station, StationRef,
    StoreOptions, StoredReading, Token, Upserted,
};
pub use postgres::PostgresStore;
pub use results::{
    AuditFilter, BadCursor, ClaimedBucket, IntervalClaim, IntervalData, Page, ReadingCounts,
    ResultRow, ResultToStore, ReviewDecision, ReviewRecord, ReviewState, ReviewSummary,
    SetAsideCursor, SetAsideFilter, SetAsideRow, StationResidual, StationSeries, StoredResult,
};
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

    /// The oldest `marked_at_ms` among the pending buckets (claimed ones included), or `None` when
    /// nothing is pending. A bucket marked again takes the newer time, so `now − this` is how long
    /// the oldest change still waiting for the worker has waited: the worker's lag.
    fn oldest_pending_marked_at(
        &self,
    ) -> impl Future<Output = Result<Option<i64>, StoreError>> + Send;

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

    /// Claims up to `limit` pending buckets for `worker`, oldest marking first to the minute
    /// (`marked_at_ms / 60 000`), and within one such minute area by area, quantity by quantity and
    /// in time order, and returns them in that order: a backlog then comes in runs of neighbouring
    /// intervals of one area, which the worker loads with one query. A bucket can be claimed when it is unclaimed or when its claim is older
    /// than `stale_after_ms` (`claimed_at_ms < now_ms - stale_after_ms`): the worker that held it is
    /// taken to have crashed. An interval still open at `now_ms` (its end is later) is held back
    /// until `open_refresh_ms` have passed since it was first marked after its last computation,
    /// so that readings streaming into the current interval are computed about once per period
    /// (0: never held back). An interval that has ended is held back until no reading has marked it
    /// for `settle_ms` (`marked_at_ms <= now_ms - settle_ms`), so that a burst of batches re-marking
    /// the same intervals is computed once it has passed rather than after every batch; but never
    /// longer than `open_refresh_ms` after its first mark (0: never held back). The claim records
    /// `worker` and `now_ms`. On PostgreSQL the candidates
    /// are locked with `FOR UPDATE SKIP LOCKED`, so concurrent claimers in several processes never
    /// receive the same bucket; on SQLite the claim is one `BEGIN IMMEDIATE` transaction, which
    /// serialises claimers.
    fn claim_buckets(
        &self,
        worker: &str,
        now_ms: i64,
        limit: usize,
        stale_after_ms: i64,
        open_refresh_ms: i64,
        settle_ms: i64,
    ) -> impl Future<Output = Result<Vec<ClaimedBucket>, StoreError>> + Send;

    /// The current revision of every reading of the quantity from the area's stations observed in
    /// `[from_ms, to_ms)`, grouped by station (ordered by station key) and ordered by time, plus the
    /// ids among them whose latest review is an overturn. The worker passes a range that starts
    /// before the interval so the step and flat-line tests see the history they look back on. An
    /// unknown quantity has no readings.
    fn load_interval(
        &self,
        area_id: i64,
        quantity: &str,
        from_ms: i64,
        to_ms: i64,
    ) -> impl Future<Output = Result<IntervalData, StoreError>> + Send;

    /// Stores the decision of a claimed bucket in one transaction: a new `interval_results` row with
    /// the next revision (1 for the first) and every `Point` field, its set-aside records (with
    /// `reasons[i]` as the reason of `outcome.set_aside[i]`) and station values, and the interval's
    /// latest-revision pointer. `station_ids[h]` is the row id of the station the outcome calls
    /// `h` (`StationReadings::station`). The same transaction removes the pending bucket if its
    /// `mark_count` is still the claimed one, and otherwise releases the claim so that the newer
    /// readings are computed into yet another revision. Earlier revisions are never changed.
    /// `Other` when the outcome names a station handle outside `station_ids` or the reasons do not
    /// match the records one to one.
    fn store_result(
        &self,
        bucket: &ClaimedBucket,
        outcome: &IntervalOutcome,
        station_ids: &[i64],
        reasons: &[String],
        now_ms: i64,
    ) -> impl Future<Output = Result<StoredResult, StoreError>> + Send;

    /// Releases every claim `worker` holds, so that its buckets can be claimed again at once
    /// (after a failed step, instead of waiting for the stale-claim time); returns how many.
    fn release_claims(&self, worker: &str) -> impl Future<Output = Result<u64, StoreError>> + Send;

    /// Claims, for `worker`, the pending interval in which the reading was last set aside (the
    /// one a review of it marks), as [`Store::claim_buckets`] would claim it: only when it is
    /// unclaimed or its claim is older than `stale_after_ms`. Lets a review's recomputation happen
    /// in the request instead of waiting for the worker's next poll.
    fn claim_interval_of_reading(
        &self,
        reading_id: i64,
        worker: &str,
        now_ms: i64,
        stale_after_ms: i64,
    ) -> impl Future<Output = Result<IntervalClaim, StoreError>> + Send;

    /// Stores several decided buckets as [`Store::store_result`] does for one, all in one
    /// transaction (one commit, so one flush to disk on SQLite, for the whole batch); returns what
    /// was written for each, in order. Nothing is written when any of them is refused.
    fn store_results(
        &self,
        results: &[ResultToStore<'_>],
        now_ms: i64,
    ) -> impl Future<Output = Result<Vec<StoredResult>, StoreError>> + Send;

    /// The latest revision of every interval of the area and quantity with a result and a start in
    /// `[from_ms, to_ms)`, ordered by start. Empty for an unknown area or quantity.
    fn series(
        &self,
        area: &str,
        quantity: &str,
        from_ms: i64,
        to_ms: i64,
    ) -> impl Future<Output = Result<Vec<ResultRow>, StoreError>> + Send;

    /// The latest revision of the newest interval of the area and quantity that has a result.
    fn latest(
        &self,
        area: &str,
        quantity: &str,
    ) -> impl Future<Output = Result<Option<ResultRow>, StoreError>> + Send;

    /// [`Store::latest`] of every area and quantity that has a result, as (area key, quantity
    /// key, result), ordered by area key and quantity key: one query for the overview.
    fn latest_of_every_area(
        &self,
    ) -> impl Future<Output = Result<Vec<(String, String, ResultRow)>, StoreError>> + Send;

    /// One interval's result: revision `revision`, or the latest when it is `None`.
    fn result_revision(
        &self,
        area: &str,
        quantity: &str,
        start_ms: i64,
        revision: Option<i64>,
    ) -> impl Future<Output = Result<Option<ResultRow>, StoreError>> + Send;

    /// One page of at most `limit` set-aside readings matching `filter`, ordered by
    /// (observed_at_ms, reading_id, result_id), starting after `after`. Listed are the records of the
    /// latest revision of each interval; in addition, a reading whose latest review is an overturn
    /// is listed with its newest record even when the newer revision (which uses it again) no longer
    /// sets it aside, so that `review = Overturned` finds every overturned reading. A record of an
    /// older revision that the latest one dropped for any other reason is not listed.
    fn list_set_aside(
        &self,
        filter: &SetAsideFilter,
        limit: usize,
        after: Option<SetAsideCursor>,
    ) -> impl Future<Output = Result<Page<SetAsideRow, SetAsideCursor>, StoreError>> + Send;

    /// Appends a review decision to the audit log and, in the same transaction, marks the interval
    /// in which the reading was last set aside pending, so that the worker computes a new revision
    /// that applies the decision. `by` is the deciding token's id. `NotFound` when no result ever
    /// set the reading aside.
    fn review_reading(
        &self,
        reading_id: i64,
        decision: ReviewDecision,
        note: Option<&str>,
        by: &str,
        now_ms: i64,
    ) -> impl Future<Output = Result<ReviewRecord, StoreError>> + Send;

    /// One page of at most `limit` review log entries matching `filter`, newest first, starting
    /// below review id `before_id` (the previous page's `next_cursor`).
    fn audit(
        &self,
        filter: &AuditFilter,
        limit: usize,
        before_id: Option<i64>,
    ) -> impl Future<Output = Result<Page<ReviewRecord, i64>, StoreError>> + Send;

    /// Marks pending every interval of the area — of one quantity, or of all when `quantity` is
    /// `None` — whose start lies in `[from_ms, to_ms)` and which holds at least one reading, and
    /// returns how many were marked. Each will get a new revision. `NotFound` for an unknown area.
    fn mark_for_recompute(
        &self,
        area: &str,
        quantity: Option<&str>,
        from_ms: i64,
        to_ms: i64,
        now_ms: i64,
    ) -> impl Future<Output = Result<u64, StoreError>> + Send;

    /// The most recent `computed_at_ms` of any result; `None` before the first.
    fn last_computed_at(&self) -> impl Future<Output = Result<Option<i64>, StoreError>> + Send;

    /// For each interval of the station's current area with a start in `[from_ms, to_ms)` whose
    /// latest result has both a value for the station and an area median: the two, oldest first.
    /// Station values that were set aside as far from the consensus are included (`used` false),
    /// since a drifting station is exactly what the health report must show.
    fn station_residuals(
        &self,
        station: &str,
        quantity: &str,
        from_ms: i64,
        to_ms: i64,
    ) -> impl Future<Output = Result<Vec<StationResidual>, StoreError>> + Send;

    /// How many current readings of the station and quantity were observed in `[from_ms, to_ms)`,
    /// and how many of those the latest results set aside.
    fn station_reading_counts(
        &self,
        station: &str,
        quantity: &str,
        from_ms: i64,
        to_ms: i64,
    ) -> impl Future<Output = Result<ReadingCounts, StoreError>> + Send;

    /// The observation time of the newest reading of each area that has any, by area key, in one
    /// query: one index probe per station and quantity, whatever the number of readings.
    fn newest_observation_by_area(
        &self,
    ) -> impl Future<Output = Result<Vec<(String, i64)>, StoreError>> + Send;

    /// The observation time of the station's newest reading of any quantity; `None` when it has
    /// none or the key is unknown.
    fn last_seen(
        &self,
        station: &str,
    ) -> impl Future<Output = Result<Option<i64>, StoreError>> + Send;

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

    /// How the connection pool is used right now (for the metrics endpoint). Reading it costs no
    /// query and takes no connection.
    pub fn pool_status(&self) -> PoolStatus {
        match self {
            AnyStore::Sqlite(store) => PoolStatus::of(store.pool()),
            AnyStore::Postgres(store) => PoolStatus::of(store.pool()),
        }
    }
}

/// A snapshot of a connection pool: `open` connections (idle or in use), how many of them are
/// `idle`, and the most the pool may open (`max`).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct PoolStatus {
    pub open: u32,
    pub idle: u32,
    pub max: u32,
}

impl PoolStatus {
    fn of<DB: sqlx::Database>(pool: &sqlx::Pool<DB>) -> PoolStatus {
        let open = pool.size();
        PoolStatus {
            open,
            // The two counts are read one after the other, so a connection returned in between
            // could make idle exceed open by one; clamp so that `open − idle` is never negative.
            idle: u32::try_from(pool.num_idle()).unwrap_or(u32::MAX).min(open),
            max: pool.options().get_max_connections(),
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

    async fn oldest_pending_marked_at(&self) -> Result<Option<i64>, StoreError> {
        dispatch!(self, store => store.oldest_pending_marked_at())
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

    async fn claim_buckets(
        &self,
        worker: &str,
        now_ms: i64,
        limit: usize,
        stale_after_ms: i64,
        open_refresh_ms: i64,
        settle_ms: i64,
    ) -> Result<Vec<ClaimedBucket>, StoreError> {
        dispatch!(self, store => store.claim_buckets(worker, now_ms, limit, stale_after_ms, open_refresh_ms, settle_ms))
    }

    async fn load_interval(
        &self,
        area_id: i64,
        quantity: &str,
        from_ms: i64,
        to_ms: i64,
    ) -> Result<IntervalData, StoreError> {
        dispatch!(self, store => store.load_interval(area_id, quantity, from_ms, to_ms))
    }

    async fn store_result(
        &self,
        bucket: &ClaimedBucket,
        outcome: &IntervalOutcome,
        station_ids: &[i64],
        reasons: &[String],
        now_ms: i64,
    ) -> Result<StoredResult, StoreError> {
        dispatch!(self, store => store.store_result(bucket, outcome, station_ids, reasons, now_ms))
    }

    async fn store_results(
        &self,
        results: &[ResultToStore<'_>],
        now_ms: i64,
    ) -> Result<Vec<StoredResult>, StoreError> {
        dispatch!(self, store => store.store_results(results, now_ms))
    }

    async fn release_claims(&self, worker: &str) -> Result<u64, StoreError> {
        dispatch!(self, store => store.release_claims(worker))
    }

    async fn claim_interval_of_reading(
        &self,
        reading_id: i64,
        worker: &str,
        now_ms: i64,
        stale_after_ms: i64,
    ) -> Result<IntervalClaim, StoreError> {
        dispatch!(self, store => store.claim_interval_of_reading(reading_id, worker, now_ms, stale_after_ms))
    }

    async fn series(
        &self,
        area: &str,
        quantity: &str,
        from_ms: i64,
        to_ms: i64,
    ) -> Result<Vec<ResultRow>, StoreError> {
        dispatch!(self, store => store.series(area, quantity, from_ms, to_ms))
    }

    async fn latest(&self, area: &str, quantity: &str) -> Result<Option<ResultRow>, StoreError> {
        dispatch!(self, store => store.latest(area, quantity))
    }

    async fn latest_of_every_area(&self) -> Result<Vec<(String, String, ResultRow)>, StoreError> {
        dispatch!(self, store => store.latest_of_every_area())
    }

    async fn result_revision(
        &self,
        area: &str,
        quantity: &str,
        start_ms: i64,
        revision: Option<i64>,
    ) -> Result<Option<ResultRow>, StoreError> {
        dispatch!(self, store => store.result_revision(area, quantity, start_ms, revision))
    }

    async fn list_set_aside(
        &self,
        filter: &SetAsideFilter,
        limit: usize,
        after: Option<SetAsideCursor>,
    ) -> Result<Page<SetAsideRow, SetAsideCursor>, StoreError> {
        dispatch!(self, store => store.list_set_aside(filter, limit, after))
    }

    async fn review_reading(
        &self,
        reading_id: i64,
        decision: ReviewDecision,
        note: Option<&str>,
        by: &str,
        now_ms: i64,
    ) -> Result<ReviewRecord, StoreError> {
        dispatch!(self, store => store.review_reading(reading_id, decision, note, by, now_ms))
    }

    async fn audit(
        &self,
        filter: &AuditFilter,
        limit: usize,
        before_id: Option<i64>,
    ) -> Result<Page<ReviewRecord, i64>, StoreError> {
        dispatch!(self, store => store.audit(filter, limit, before_id))
    }

    async fn mark_for_recompute(
        &self,
        area: &str,
        quantity: Option<&str>,
        from_ms: i64,
        to_ms: i64,
        now_ms: i64,
    ) -> Result<u64, StoreError> {
        dispatch!(self, store => store.mark_for_recompute(area, quantity, from_ms, to_ms, now_ms))
    }

    async fn last_computed_at(&self) -> Result<Option<i64>, StoreError> {
        dispatch!(self, store => store.last_computed_at())
    }

    async fn station_residuals(
        &self,
        station: &str,
        quantity: &str,
        from_ms: i64,
        to_ms: i64,
    ) -> Result<Vec<StationResidual>, StoreError> {
        dispatch!(self, store => store.station_residuals(station, quantity, from_ms, to_ms))
    }

    async fn station_reading_counts(
        &self,
        station: &str,
        quantity: &str,
        from_ms: i64,
        to_ms: i64,
    ) -> Result<ReadingCounts, StoreError> {
        dispatch!(self, store => store.station_reading_counts(station, quantity, from_ms, to_ms))
    }

    async fn newest_observation_by_area(&self) -> Result<Vec<(String, i64)>, StoreError> {
        dispatch!(self, store => store.newest_observation_by_area())
    }

    async fn last_seen(&self, station: &str) -> Result<Option<i64>, StoreError> {
        dispatch!(self, store => store.last_seen(station))
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
