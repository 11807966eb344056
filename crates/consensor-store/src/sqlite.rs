//! The SQLite implementation: the embedded default.
//!
//! Every connection runs in WAL mode with `synchronous=FULL`, so a transaction that has committed is
//! on disk (the WAL is synced at each commit) and survives both a killed process and a power loss.
//! Writing transactions start with `BEGIN IMMEDIATE`: they take the write lock before reading, so a
//! batch never reads current values that another writer changes before it commits. Small batches
//! that arrive while another write is in hand are stored together, one commit for all
//! (`commit_group.rs`).

use std::collections::{BTreeSet, HashMap};
use std::str::FromStr;

use sqlx::sqlite::{
    SqliteConnectOptions, SqliteJournalMode, SqlitePool, SqlitePoolOptions, SqliteSynchronous,
};
use sqlx::{QueryBuilder, Row, Sqlite, Transaction};
use tokio::sync::oneshot;

use crate::batch::{
    coalesce_following, distinct_sorted, insert_current, missing_keys, plan_batch, resolve,
    settled_before, with_retries, AttemptError, CurrentValue, Following, KeyIds, ResolvedReading,
    CURRENT_VALUES_SELECT, MARK_FOLLOWING,
};
use crate::commit_group::{BatchAnswer, CommitQueue, WaitingBatch};
use crate::write_gate::LARGE_WRITE_ROWS;
use crate::{
    Area, BatchOutcome, ClaimedBucket, NewArea, NewReading, NewStation, NewToken, ReadingKey,
    Station, StationRef, Store, StoreError, StoreOptions, StoredReading, Token, Upserted,
};

/// SQLite's default limit on bound parameters in one statement (SQLITE_MAX_VARIABLE_NUMBER since
/// version 3.32); multi-row statements are cut into chunks that stay below it.
const SQLITE_MAX_PARAMETERS: usize = 32_766;

static MIGRATOR: sqlx::migrate::Migrator = sqlx::migrate!("../../migrations/sqlite");

crate::sql::shared_queries!(sqlx::Sqlite, sqlx::SqliteConnection);
crate::results_sql::result_queries!(sqlx::Sqlite, sqlx::SqliteConnection);

/// A store backed by one SQLite file.
#[derive(Debug, Clone)]
pub struct SqliteStore {
    pool: SqlitePool,
    /// The worker's bulk read (`None` for an in-memory database).
    direct: Option<std::sync::Arc<crate::sqlite_read::DirectReader>>,
    /// The order of this process's big writers (`write_gate.rs`).
    gate: std::sync::Arc<crate::write_gate::WriteGate>,
    /// Small batches waiting to be stored together (`commit_group.rs`).
    queue: std::sync::Arc<CommitQueue>,
    /// The rules' history block, for the intervals a stored reading reaches (`batch::Following`).
    history_ms: i64,
}

impl SqliteStore {
    /// Opens (creating it if missing) the SQLite database at `url` (`sqlite://path` or
    /// `sqlite:path`) and applies pending migrations.
    pub async fn connect(url: &str, options: &StoreOptions) -> Result<Self, StoreError> {
        let connect_options = SqliteConnectOptions::from_str(url)?
            .create_if_missing(true)
            .journal_mode(SqliteJournalMode::Wal)
            .synchronous(SqliteSynchronous::Full)
            .busy_timeout(options.sqlite_busy_timeout)
            .foreign_keys(true);
        let direct = crate::sqlite_read::DirectReader::for_file(
            connect_options.get_filename(),
            options.sqlite_busy_timeout,
        );
        let pool = SqlitePoolOptions::new()
            .max_connections(options.max_connections)
            .acquire_timeout(options.acquire_timeout)
            // SQLite rolls a transaction back by itself on some errors (a full disk, an I/O
            // error); the ROLLBACK that follows then fails and sqlx still counts the connection as
            // inside a transaction, so every later `BEGIN IMMEDIATE` on it would fail for good.
            // Such a connection is closed here instead of being handed out (the pool opens a
            // fresh one). The check runs at acquire, after the release ping, so a rollback queued
            // by a dropped transaction has been carried out by then.
            .before_acquire(|connection, _| {
                Box::pin(async move {
                    use sqlx::Connection;
                    Ok(!connection.is_in_transaction())
                })
            })
            .connect_with(connect_options)
            .await?;
        MIGRATOR.run(&pool).await?;
        Ok(SqliteStore {
            pool,
            direct,
            gate: Default::default(),
            queue: Default::default(),
            history_ms: options.history_ms,
        })
    }

    /// The underlying pool, for tests and the benchmark harness that need raw SQL (checking a
    /// pragma, injecting a failure, a bulk-insert baseline). Application code uses [`Store`].
    pub fn pool(&self) -> &SqlitePool {
        &self.pool
    }

    async fn begin_immediate(&self) -> Result<Transaction<'static, Sqlite>, sqlx::Error> {
        self.pool.begin_with("BEGIN IMMEDIATE").await
    }

    /// Waits for a write of `rows` rows to take its turn at the write lock (`write_gate.rs`); the
    /// shared result methods call it by this name on both backends.
    async fn write_pass(&self, rows: usize) -> Option<crate::write_gate::GatePass> {
        Some(self.gate.enter(rows).await)
    }

    /// The transaction every writing method starts with (the shared result methods call it by this
    /// name on both backends).
    async fn begin_write(&self) -> Result<Transaction<'static, Sqlite>, sqlx::Error> {
        self.begin_immediate().await
    }

    /// Claims buckets inside one `BEGIN IMMEDIATE` transaction: it holds SQLite's write lock from
    /// its first statement, so no other claimer can read the same candidates before this one has
    /// marked them.
    async fn try_claim_buckets(
        &self,
        worker: &str,
        now_ms: i64,
        limit: usize,
        stale_after_ms: i64,
        open_refresh_ms: i64,
        settle_ms: i64,
    ) -> Result<Vec<ClaimedBucket>, sqlx::Error> {
        let mut tx = self.begin_immediate().await?;
        let rows = sqlx::query(
            "SELECT p.rowid, p.area_id, a.key, p.quantity_id, q.key, p.bucket_start_ms, \
             a.interval_ms, p.mark_count \
             FROM pending_buckets p JOIN areas a ON a.id = p.area_id \
             JOIN quantities q ON q.id = p.quantity_id \
             WHERE (p.claimed_at_ms IS NULL OR p.claimed_at_ms < $1) \
             AND ((p.bucket_start_ms + a.interval_ms <= $3 AND p.marked_at_ms <= $5) \
             OR p.first_marked_at_ms <= $4) \
             ORDER BY p.marked_at_ms / 60000, p.area_id, p.quantity_id, p.bucket_start_ms LIMIT $2",
        )
        .bind(now_ms.saturating_sub(stale_after_ms))
        .bind(i64::try_from(limit).unwrap_or(i64::MAX))
        .bind(now_ms)
        .bind(now_ms.saturating_sub(open_refresh_ms))
        .bind(settled_before(now_ms, settle_ms))
        .fetch_all(&mut *tx)
        .await?;
        let mut row_ids = Vec::with_capacity(rows.len());
        let mut claimed = Vec::with_capacity(rows.len());
        for row in &rows {
            row_ids.push(row.try_get::<i64, _>(0)?);
            claimed.push(ClaimedBucket {
                area_id: row.try_get(1)?,
                area_key: row.try_get(2)?,
                quantity_id: row.try_get(3)?,
                quantity: row.try_get(4)?,
                bucket_start_ms: row.try_get(5)?,
                interval_ms: row.try_get(6)?,
                mark_count: row.try_get(7)?,
                claimed_by: worker.to_owned(),
            });
        }
        for chunk in row_ids.chunks(SQLITE_MAX_PARAMETERS - 2) {
            let mut update =
                QueryBuilder::<Sqlite>::new("UPDATE pending_buckets SET claimed_by = ");
            update
                .push_bind(worker)
                .push(", claimed_at_ms = ")
                .push_bind(now_ms)
                .push(" WHERE rowid IN (");
            let mut separated = update.separated(", ");
            for row_id in chunk {
                separated.push_bind(*row_id);
            }
            update.push(")");
            update.build().execute(&mut *tx).await?;
        }
        tx.commit().await?;
        Ok(claimed)
    }

    /// Stores a batch of at most [`LARGE_WRITE_ROWS`] readings with the others waiting then
    /// (`commit_group.rs`).
    async fn insert_grouped(&self, readings: &[NewReading], now_ms: i64) -> BatchAnswer {
        let (answer, answered) = oneshot::channel();
        let start_turn = self.queue.push(WaitingBatch {
            readings: readings.to_vec(),
            now_ms,
            answer,
        });
        if start_turn {
            self.start_turn();
        }
        answered.await.unwrap_or_else(|_| {
            Err(StoreError::Other(
                "the batch's group commit ended without an answer".to_owned(),
            ))
        })
    }

    /// Starts a turn at the write lock for the batches waiting. It runs as a task of its own: a
    /// request that its client gives up on is dropped at its next await, and must not take the
    /// batches of the others down with it.
    fn start_turn(&self) {
        let store = self.clone();
        tokio::spawn(async move { store.commit_waiting().await });
    }

    /// Waits for a turn at the write lock, then stores the batches waiting then (starting the next
    /// turn first if some must wait for another group).
    async fn commit_waiting(&self) {
        let _pass = self.write_pass(0).await;
        let (group, more) = self.queue.take_group();
        if more {
            self.start_turn();
        }
        if group.is_empty() {
            return;
        }
        let batches: Vec<(&[NewReading], i64)> = group
            .iter()
            .map(|waiting| (waiting.readings.as_slice(), waiting.now_ms))
            .collect();
        let answers = self.store_batches(&batches).await;
        for (waiting, answer) in group.into_iter().zip(answers) {
            // A requester that has gone away needs no answer; its batch is stored all the same.
            let _ = waiting.answer.send(answer);
        }
    }

    /// Stores `batches` in one transaction, one answer per batch. A statement error that no retry
    /// cures and that is not the database's state (read-only, full, gone) may be one batch's own
    /// doing: the batches are then stored one by one, so that it fails only its own batch.
    async fn store_batches(&self, batches: &[(&[NewReading], i64)]) -> Vec<BatchAnswer> {
        match with_retries(|| self.try_store_batches(batches)).await {
            Ok(answers) => answers,
            Err(StoreError::Other(_)) if batches.len() > 1 => {
                let mut answers = Vec::with_capacity(batches.len());
                for batch in batches {
                    let alone = std::slice::from_ref(batch);
                    answers.push(match with_retries(|| self.try_store_batches(alone)).await {
                        Ok(mut answer) => answer.remove(0),
                        Err(error) => Err(error),
                    });
                }
                answers
            }
            Err(error) => vec![Err(error); batches.len()],
        }
    }

    /// One attempt at storing `batches` (each with the time it arrived) as if one after the other:
    /// a batch naming an unknown station is refused whole and writes nothing, the others are
    /// classified in order against what is stored and what the batches before them stored.
    async fn try_store_batches(
        &self,
        batches: &[(&[NewReading], i64)],
    ) -> Result<Vec<BatchAnswer>, AttemptError> {
        let mut tx = self.begin_immediate().await?;

        let all_readings = || batches.iter().flat_map(|(readings, _)| readings.iter());
        let station_keys = distinct_sorted(all_readings().map(|reading| &reading.station));
        let stations = lookup_stations(&mut tx, &station_keys).await?;
        let mut answers: Vec<BatchAnswer> = Vec::with_capacity(batches.len());
        for (readings, _) in batches {
            let unknown = missing_keys(readings.iter().map(|reading| &reading.station), &stations);
            answers.push(if unknown.is_empty() {
                Ok(BatchOutcome::default())
            } else {
                Err(StoreError::NotFound(format!(
                    "unknown stations: {}",
                    unknown.join(", ")
                )))
            });
        }
        let stored = || {
            batches
                .iter()
                .zip(&answers)
                .filter(|(_, answer)| answer.is_ok())
                .map(|(batch, _)| batch)
        };
        let quantity_keys = distinct_sorted(
            stored()
                .flat_map(|(readings, _)| readings.iter())
                .map(|reading| &reading.quantity),
        );
        let quantities = ensure_quantities(&mut tx, &quantity_keys).await?;

        let resolved: Vec<(Vec<ResolvedReading<'_>>, i64)> = stored()
            .map(|(readings, now_ms)| (resolve(readings, &stations, &quantities), *now_ms))
            .collect();
        let mut keys: Vec<KeyIds> = resolved
            .iter()
            .flat_map(|(batch, _)| batch.iter().map(ResolvedReading::key))
            .collect();
        keys.sort_unstable();
        keys.dedup();
        let mut current = current_values(&mut tx, &keys).await?;

        let mut rows = Vec::new();
        let mut buckets = BTreeSet::new();
        let mut following = Following::new();
        let mut marked_at_ms = i64::MIN;
        let stored_answers = answers.iter_mut().filter(|answer| answer.is_ok());
        for ((batch, now_ms), answer) in resolved.iter().zip(stored_answers) {
            let plan = plan_batch(batch, &mut current, self.history_ms);
            *answer = Ok(plan.outcome);
            rows.extend(plan.rows.into_iter().map(|row| (row, *now_ms)));
            buckets.extend(plan.buckets);
            following.extend(plan.following);
            marked_at_ms = marked_at_ms.max(*now_ms);
        }

        for chunk in rows.chunks(SQLITE_MAX_PARAMETERS / 8) {
            let mut insert = QueryBuilder::<Sqlite>::new(
                "INSERT INTO readings (observed_at_ms, station_id, quantity_id, revision, value, \
                 value_as_sent, unit_as_sent, received_at_ms) ",
            );
            insert.push_values(chunk, |mut values, (row, received_at_ms)| {
                values
                    .push_bind(row.observed_at_ms)
                    .push_bind(row.station_id)
                    .push_bind(row.quantity_id)
                    .push_bind(row.revision)
                    .push_bind(row.value)
                    .push_bind(row.value_as_sent)
                    .push_bind(row.unit_as_sent.as_deref())
                    .push_bind(*received_at_ms);
            });
            insert.build().execute(&mut *tx).await?;
        }

        let buckets: Vec<KeyIds> = buckets.into_iter().collect();
        for chunk in buckets.chunks(SQLITE_MAX_PARAMETERS / 5) {
            let mut upsert = QueryBuilder::<Sqlite>::new(
                "INSERT INTO pending_buckets (area_id, quantity_id, bucket_start_ms, marked_at_ms, \
                 first_marked_at_ms) ",
            );
            upsert.push_values(
                chunk,
                |mut values, &(area_id, quantity_id, bucket_start_ms)| {
                    values
                        .push_bind(area_id)
                        .push_bind(quantity_id)
                        .push_bind(bucket_start_ms)
                        .push_bind(marked_at_ms)
                        .push_bind(marked_at_ms);
                },
            );
            upsert.push(
                " ON CONFLICT (area_id, quantity_id, bucket_start_ms) DO UPDATE SET \
                 marked_at_ms = excluded.marked_at_ms, \
                 mark_count = pending_buckets.mark_count + 1",
            );
            upsert.build().execute(&mut *tx).await?;
        }

        coalesce_following(&mut following);
        for chunk in following.chunks(SQLITE_MAX_PARAMETERS / 5) {
            let mut mark = QueryBuilder::<Sqlite>::new(
                "WITH following (area_id, quantity_id, after_ms, until_ms, marked_at_ms) AS (",
            );
            mark.push_values(
                chunk,
                |mut values, &(area_id, quantity_id, after_ms, until_ms)| {
                    values
                        .push_bind(area_id)
                        .push_bind(quantity_id)
                        .push_bind(after_ms)
                        .push_bind(until_ms)
                        .push_bind(marked_at_ms);
                },
            );
            mark.push(") ").push(MARK_FOLLOWING);
            mark.build().execute(&mut *tx).await?;
        }

        tx.commit().await?;
        Ok(answers)
    }
}

async fn lookup_stations(
    tx: &mut Transaction<'static, Sqlite>,
    keys: &[String],
) -> Result<HashMap<String, StationRef>, sqlx::Error> {
    let mut found = HashMap::with_capacity(keys.len());
    for chunk in keys.chunks(SQLITE_MAX_PARAMETERS) {
        let mut query = QueryBuilder::<Sqlite>::new(
            "SELECT s.key, s.id, s.area_id, a.interval_ms FROM stations s \
             JOIN areas a ON a.id = s.area_id WHERE s.key IN (",
        );
        let mut separated = query.separated(", ");
        for key in chunk {
            separated.push_bind(key.as_str());
        }
        query.push(")");
        for row in query.build().fetch_all(&mut **tx).await? {
            found.insert(
                row.try_get::<String, _>(0)?,
                StationRef {
                    station_id: row.try_get(1)?,
                    area_id: row.try_get(2)?,
                    interval_ms: row.try_get(3)?,
                },
            );
        }
    }
    Ok(found)
}

/// Returns the ids of the given quantity keys, adding the keys that have none yet.
async fn ensure_quantities(
    tx: &mut Transaction<'static, Sqlite>,
    keys: &[String],
) -> Result<HashMap<String, i64>, sqlx::Error> {
    let mut found = lookup_quantities(tx, keys).await?;
    let missing = missing_keys(keys, &found);
    if !missing.is_empty() {
        for chunk in missing.chunks(SQLITE_MAX_PARAMETERS) {
            let mut insert = QueryBuilder::<Sqlite>::new("INSERT INTO quantities (key) ");
            insert.push_values(chunk, |mut values, key| {
                values.push_bind(key.as_str());
            });
            insert.push(" ON CONFLICT (key) DO NOTHING");
            insert.build().execute(&mut **tx).await?;
        }
        found.extend(lookup_quantities(tx, &missing).await?);
    }
    Ok(found)
}

async fn lookup_quantities(
    tx: &mut Transaction<'static, Sqlite>,
    keys: &[String],
) -> Result<HashMap<String, i64>, sqlx::Error> {
    let mut found = HashMap::with_capacity(keys.len());
    for chunk in keys.chunks(SQLITE_MAX_PARAMETERS) {
        let mut query =
            QueryBuilder::<Sqlite>::new("SELECT key, id FROM quantities WHERE key IN (");
        let mut separated = query.separated(", ");
        for key in chunk {
            separated.push_bind(key.as_str());
        }
        query.push(")");
        for row in query.build().fetch_all(&mut **tx).await? {
            found.insert(row.try_get::<String, _>(0)?, row.try_get::<i64, _>(1)?);
        }
    }
    Ok(found)
}

/// Loads the current revision of every key of the batch with one set-based query per chunk: the
/// keys travel as a VALUES list joined to the readings' unique index.
async fn current_values(
    tx: &mut Transaction<'static, Sqlite>,
    keys: &[KeyIds],
) -> Result<HashMap<KeyIds, CurrentValue>, sqlx::Error> {
    let mut current = HashMap::new();
    for chunk in keys.chunks(SQLITE_MAX_PARAMETERS / 3) {
        let mut query = QueryBuilder::<Sqlite>::new(
            "WITH batch_keys (observed_at_ms, station_id, quantity_id) AS (",
        );
        query.push_values(
            chunk,
            |mut values, &(observed_at_ms, station_id, quantity_id)| {
                values
                    .push_bind(observed_at_ms)
                    .push_bind(station_id)
                    .push_bind(quantity_id);
            },
        );
        query.push(") ");
        query.push(CURRENT_VALUES_SELECT);
        for row in query.build().fetch_all(&mut **tx).await? {
            insert_current(&mut current, &row)?;
        }
    }
    Ok(current)
}

impl Store for SqliteStore {
    async fn ping(&self) -> Result<(), StoreError> {
        shared::ping(&self.pool, &MIGRATOR).await
    }

    async fn upsert_area(&self, area: &NewArea) -> Result<Upserted, StoreError> {
        let mut tx = self.begin_immediate().await?;
        let upserted = shared::upsert_area(&mut tx, area).await?;
        tx.commit().await?;
        Ok(upserted)
    }

    async fn list_areas(&self) -> Result<Vec<Area>, StoreError> {
        shared::list_areas(&self.pool).await
    }

    async fn upsert_station(&self, station: &NewStation) -> Result<Upserted, StoreError> {
        let mut tx = self.begin_immediate().await?;
        let upserted = shared::upsert_station(&mut tx, station).await?;
        tx.commit().await?;
        Ok(upserted)
    }

    async fn list_stations(&self) -> Result<Vec<Station>, StoreError> {
        shared::list_stations(&self.pool).await
    }

    async fn station_keys_lookup(
        &self,
        keys: &[String],
    ) -> Result<HashMap<String, StationRef>, StoreError> {
        let mut tx = self.pool.begin().await?;
        let found = lookup_stations(&mut tx, &distinct_sorted(keys)).await?;
        tx.commit().await?;
        Ok(found)
    }

    async fn insert_token(&self, token: &NewToken) -> Result<(), StoreError> {
        let mut tx = self.begin_immediate().await?;
        shared::insert_token(&mut tx, token).await?;
        tx.commit().await?;
        Ok(())
    }

    async fn find_token_by_hash(&self, hash: &[u8]) -> Result<Option<Token>, StoreError> {
        shared::find_token_by_hash(&self.pool, hash).await
    }

    async fn revoke_token(&self, id: &str, now_ms: i64) -> Result<(), StoreError> {
        shared::revoke_token(&self.pool, id, now_ms).await
    }

    async fn insert_batch(
        &self,
        readings: &[NewReading],
        now_ms: i64,
    ) -> Result<BatchOutcome, StoreError> {
        if readings.is_empty() {
            return Ok(BatchOutcome::default());
        }
        if readings.len() <= LARGE_WRITE_ROWS {
            return self.insert_grouped(readings, now_ms).await;
        }
        let _pass = self.write_pass(readings.len()).await;
        let mut answers = self.store_batches(&[(readings, now_ms)]).await;
        answers.remove(0)
    }

    async fn count_readings(&self) -> Result<u64, StoreError> {
        shared::count(&self.pool, "SELECT COUNT(*) FROM readings").await
    }

    async fn count_pending_buckets(&self) -> Result<u64, StoreError> {
        shared::count(&self.pool, "SELECT COUNT(*) FROM pending_buckets").await
    }

    async fn oldest_pending_marked_at(&self) -> Result<Option<i64>, StoreError> {
        // MIN over the index pending_buckets_marked: one index probe, not a scan.
        let (oldest,): (Option<i64>,) =
            sqlx::query_as("SELECT MIN(marked_at_ms) FROM pending_buckets")
                .fetch_one(&self.pool)
                .await?;
        Ok(oldest)
    }

    async fn readings_history(
        &self,
        station: &str,
        quantity: &str,
        from_ms: i64,
        to_ms: i64,
    ) -> Result<Vec<StoredReading>, StoreError> {
        shared::readings_history(&self.pool, station, quantity, from_ms, to_ms).await
    }

    async fn reading_revisions(&self, key: &ReadingKey) -> Result<Vec<StoredReading>, StoreError> {
        shared::reading_revisions(&self.pool, key).await
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
        if limit == 0 {
            return Ok(Vec::new());
        }
        let _pass = self.write_pass(0).await;
        Ok(self
            .try_claim_buckets(
                worker,
                now_ms,
                limit,
                stale_after_ms,
                open_refresh_ms,
                settle_ms,
            )
            .await?)
    }

    /// Through the direct reader (`sqlite_read.rs`) for a database file, through the pool for an
    /// in-memory database.
    async fn load_interval(
        &self,
        area_id: i64,
        quantity: &str,
        from_ms: i64,
        to_ms: i64,
    ) -> Result<crate::IntervalData, StoreError> {
        match &self.direct {
            Some(reader) => {
                reader
                    .load_interval(area_id, quantity, from_ms, to_ms)
                    .await
            }
            None => load_interval_through_pool(&self.pool, area_id, quantity, from_ms, to_ms).await,
        }
    }

    crate::results_sql::result_store_methods!();

    async fn close(&self) {
        self.pool.close().await;
    }
}

/// `Store::load_interval` through the sqlx pool: for an in-memory database, which the direct
/// reader cannot open a second time. The area's stations drive the loop (`CROSS JOIN` keeps that order on SQLite) and each
/// station's readings are one range of the station-first index (migration 0003), read
/// in (time, revision) order; of several revisions of one reading the last one read is
/// kept, so "current" costs no probe per row. Reviews are few: one more query finds the
/// overturned ones among the range's readings.
async fn load_interval_through_pool(
    pool: &SqlitePool,
    area_id: i64,
    quantity: &str,
    from_ms: i64,
    to_ms: i64,
) -> Result<crate::IntervalData, StoreError> {
    let stations: Vec<(i64, String)> = sqlx::query_as(crate::results::LOAD_STATIONS_SQL)
        .bind(area_id)
        .fetch_all(pool)
        .await?;
    let rows: Vec<crate::results::ReadingRow> = sqlx::query_as(crate::results::LOAD_READINGS_SQL)
        .bind(area_id)
        .bind(quantity)
        .bind(from_ms)
        .bind(to_ms)
        .fetch_all(pool)
        .await?;
    let series =
        crate::results::assemble_series(stations, rows.into_iter().map(Ok::<_, StoreError>))?;
    let reviews: Vec<(i64, String)> = sqlx::query_as(crate::results::LOAD_REVIEWS_SQL)
        .bind(area_id)
        .bind(quantity)
        .bind(from_ms)
        .bind(to_ms)
        .fetch_all(pool)
        .await?;
    Ok(crate::IntervalData {
        stations: series,
        overturned: crate::results::overturned_of(reviews)?,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::testing::TestDatabase;

    /// A store on a fresh file with the given (area, station) pairs, 10-minute intervals.
    async fn store_with(network: &[(&str, &str)]) -> (TestDatabase, SqliteStore) {
        let database = TestDatabase::sqlite();
        let store = SqliteStore::connect(&database.url, &StoreOptions::default())
            .await
            .expect("open");
        for &(area, station) in network {
            store
                .upsert_area(&NewArea {
                    key: area.to_owned(),
                    name: area.to_owned(),
                    interval_ms: 600_000,
                })
                .await
                .expect("area");
            store
                .upsert_station(&NewStation {
                    key: station.to_owned(),
                    area_key: area.to_owned(),
                    name: station.to_owned(),
                    lat: None,
                    lon: None,
                    elevation_m: None,
                })
                .await
                .expect("station");
        }
        (database, store)
    }

    /// Small batches that arrive while the write lock is held elsewhere are stored as one group
    /// once it is free, and answered each on its own: the good ones with their outcome, one naming
    /// an unknown station and one that the database refuses (a trigger) with their own errors, the
    /// latter after the group has been stored again batch by batch (`store_batches`).
    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn small_batches_waiting_for_the_write_lock_are_stored_as_one_group() {
        let (database, store) = store_with(&[("north", "ST-1")]).await;
        sqlx::query(
            "CREATE TRIGGER inject_failure BEFORE INSERT ON readings WHEN NEW.value = -1.5 \
             BEGIN SELECT RAISE(ABORT, 'injected failure'); END;",
        )
        .execute(&store.pool)
        .await
        .expect("trigger");
        const BASE: i64 = 1_780_000_200_000;
        let reading = |station: &str, minute: i64, value: f64| NewReading {
            station: station.to_owned(),
            quantity: "air_temperature".to_owned(),
            observed_at_ms: BASE + minute * 60_000,
            value: Some(value),
            value_as_sent: Some(value),
            unit_as_sent: None,
        };
        let mut batches: Vec<Vec<NewReading>> = (0..30)
            .map(|minute| vec![reading("ST-1", minute, 10.0)])
            .collect();
        batches.push(vec![reading("ST-404", 0, 10.0)]);
        batches.push(vec![reading("ST-1", 99, -1.5)]);
        let count = batches.len();

        let held = store.gate.enter(0).await;
        let tasks: Vec<_> = batches
            .into_iter()
            .map(|batch| {
                let store = store.clone();
                tokio::spawn(async move { store.insert_batch(&batch, BASE).await })
            })
            .collect();
        while store.queue.waiting() < count {
            tokio::time::sleep(std::time::Duration::from_millis(5)).await;
        }
        drop(held);
        let mut answers = Vec::new();
        for task in tasks {
            answers.push(task.await.expect("task"));
        }
        assert_eq!(store.queue.groups_taken(), 1, "one group for all");
        for answer in &answers[..30] {
            assert_eq!(answer.as_ref().expect("stored").accepted, 1);
        }
        assert!(matches!(&answers[30], Err(StoreError::NotFound(m)) if m.contains("ST-404")));
        assert!(matches!(&answers[31], Err(StoreError::Other(m)) if m.contains("injected")));
        assert_eq!(store.count_readings().await.expect("count"), 30);
        store.close().await;
        database.finish().await;
    }

    /// The direct read and the pool's read give the same `IntervalData`: current revisions only,
    /// stations in key order, a reading whose latest review is an overturn (and not one whose
    /// overturn was later upheld). Both reads are this crate's own; the expected facts are API.md's
    /// ("nothing is overwritten"; the latest decision counts).
    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn direct_read_equals_the_pool_read() {
        let (database, store) =
            store_with(&[("north", "ST-2"), ("north", "ST-1"), ("south", "ST-9")]).await;
        assert!(
            store.direct.is_some(),
            "a database file gets the direct reader"
        );
        const BASE: i64 = 1_780_000_200_000;
        let reading = |station: &str, minute: i64, value: Option<f64>| NewReading {
            station: station.to_owned(),
            quantity: "air_temperature".to_owned(),
            observed_at_ms: BASE + minute * 60_000,
            value,
            value_as_sent: value,
            unit_as_sent: None,
        };
        let mut batch = Vec::new();
        for minute in -5..25 {
            batch.push(reading("ST-1", minute, Some(10.0 + minute as f64 / 10.0)));
            batch.push(reading("ST-2", minute, (minute % 7 != 3).then_some(11.0)));
            batch.push(reading("ST-9", minute, Some(30.0)));
        }
        store.insert_batch(&batch, BASE).await.expect("batch");
        // Revisions of two readings: only the newest is current.
        store
            .insert_batch(&[reading("ST-1", 4, Some(99.0))], BASE + 1)
            .await
            .expect("revision");
        store
            .insert_batch(&[reading("ST-1", 4, Some(12.5))], BASE + 2)
            .await
            .expect("second revision");
        let pool = &store.pool;
        let id_of = |minute: i64| async move {
            sqlx::query_scalar::<_, i64>(
                "SELECT r.id FROM readings r JOIN stations s ON s.id = r.station_id \
                 WHERE s.key = 'ST-2' AND r.observed_at_ms = $1",
            )
            .bind(BASE + minute * 60_000)
            .fetch_one(pool)
            .await
            .expect("reading id")
        };
        let (kept, reversed) = (id_of(6).await, id_of(8).await);
        for (reading_id, decision) in [
            (kept, "uphold"),
            (kept, "overturn"),
            (reversed, "overturn"),
            (reversed, "uphold"),
        ] {
            sqlx::query(
                "INSERT INTO reviews (reading_id, decision, by_token, at_ms) \
                 VALUES ($1, $2, 'tok_test', $3)",
            )
            .bind(reading_id)
            .bind(decision)
            .bind(BASE)
            .execute(&store.pool)
            .await
            .expect("review");
        }
        let area_id = store.list_areas().await.expect("areas")[0].id;
        let reader = store.direct.clone().expect("direct reader");
        for (from, to) in [(BASE, BASE + 600_000), (BASE - 600_000, BASE + 3_600_000)] {
            let direct = reader
                .load_interval(area_id, "air_temperature", from, to)
                .await
                .expect("direct read");
            let pooled =
                load_interval_through_pool(&store.pool, area_id, "air_temperature", from, to)
                    .await
                    .expect("pool read");
            assert_eq!(direct, pooled);
            assert_eq!(
                direct.stations.len(),
                2,
                "the other area's station is not read"
            );
            assert_eq!(direct.stations[0].station_key, "ST-1");
            assert!(direct.overturned.contains(&(kept as u64)));
            assert!(!direct.overturned.contains(&(reversed as u64)));
            let fourth = direct.stations[0]
                .readings
                .iter()
                .find(|r| r.observed_at_ms == BASE + 4 * 60_000)
                .expect("minute 4");
            assert_eq!(fourth.value, Some(12.5));
        }
        store.close().await;
        database.finish().await;
    }
}
