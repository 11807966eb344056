//! The SQLite implementation: the embedded default.
//!
//! Every connection runs in WAL mode with `synchronous=FULL`, so a transaction that has committed is
//! on disk (the WAL is synced at each commit) and survives both a killed process and a power loss.
//! Writing transactions start with `BEGIN IMMEDIATE`: they take the write lock before reading, so a
//! batch never reads current values that another writer changes before it commits. Batches of
//! readings are stored by one writer thread with a connection of its own (`sqlite_write.rs`); the
//! small ones that arrive while another write is in hand are stored together, one commit for all
//! (`commit_group.rs`). Everything else goes through the sqlx pool. A database that lives only in
//! memory is refused: the writer and the worker's reader open the file a second time.

use std::collections::HashMap;
use std::str::FromStr;

use sqlx::sqlite::{
    SqliteConnectOptions, SqliteJournalMode, SqlitePool, SqlitePoolOptions, SqliteSynchronous,
};
use sqlx::{QueryBuilder, Row, Sqlite, Transaction};

use crate::batch::{distinct_sorted, settled_before};
use crate::sqlite_write::{database_file, url_is_read_only, DirectWriter};
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
    /// The worker's bulk read (`sqlite_read.rs`).
    direct: std::sync::Arc<crate::sqlite_read::DirectReader>,
    /// The order of this process's big writers (`write_gate.rs`).
    gate: std::sync::Arc<crate::write_gate::WriteGate>,
    /// The connection batches of readings are written through (`sqlite_write.rs`).
    writer: std::sync::Arc<DirectWriter>,
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
        let Some(file) = database_file(url, connect_options.get_filename()) else {
            return Err(StoreError::Other(format!(
                "{url}: an in-memory SQLite database cannot be used; Consensor keeps every \
                 reading, so give the path of a database file"
            )));
        };
        let gate = std::sync::Arc::new(crate::write_gate::WriteGate::default());
        let direct = crate::sqlite_read::DirectReader::for_file(&file, options.sqlite_busy_timeout);
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
        // Started after the migrations: the writer's connection opens an existing, current file.
        let writer = std::sync::Arc::new(DirectWriter::start(
            &file,
            url_is_read_only(url),
            options.sqlite_busy_timeout,
            options.history_ms,
            std::sync::Arc::clone(&gate),
        )?);
        Ok(SqliteStore {
            pool,
            direct,
            writer,
            gate,
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
        self.direct.station_keys_lookup(distinct_sorted(keys)).await
    }

    async fn insert_token(&self, token: &NewToken) -> Result<(), StoreError> {
        let mut tx = self.begin_immediate().await?;
        shared::insert_token(&mut tx, token).await?;
        tx.commit().await?;
        Ok(())
    }

    /// Through the direct reader (`sqlite_read.rs`), as every request's token is.
    async fn find_token_by_hash(&self, hash: &[u8]) -> Result<Option<Token>, StoreError> {
        self.direct.find_token_by_hash(hash).await
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
        self.writer.store(readings.to_vec(), now_ms).await
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

    /// Through the direct reader (`sqlite_read.rs`).
    async fn load_interval(
        &self,
        area_id: i64,
        quantity: &str,
        from_ms: i64,
        to_ms: i64,
    ) -> Result<crate::IntervalData, StoreError> {
        self.direct
            .load_interval(area_id, quantity, from_ms, to_ms)
            .await
    }

    crate::results_sql::result_store_methods!();

    async fn close(&self) {
        self.writer.close().await;
        self.pool.close().await;
    }
}

/// `Store::load_interval` through the sqlx pool, the reference the direct read is tested against
/// (`direct_read_equals_the_pool_read`). The area's stations drive the loop (`CROSS JOIN` keeps
/// that order on SQLite) and each
/// station's readings are one range of the station-first index (migration 0003), read
/// in (time, revision) order; of several revisions of one reading the last one read is
/// kept, so "current" costs no probe per row. Reviews are few: one more query finds the
/// overturned ones among the range's readings.
#[cfg(test)]
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

    /// `EXPLAIN QUERY PLAN` of a station's newest observation (`last_seen`; the areas' newest
    /// uses the same probe): per quantity, one `SEARCH` of the key `readings_key` on the station and
    /// the quantity, and no `SCAN` of the readings. The vocabulary is SQLite's (sqlite.org,
    /// "EXPLAIN QUERY PLAN").
    #[tokio::test]
    async fn the_newest_observation_is_a_probe_of_the_key() {
        let (database, store) = store_with(&[("north", "ST-1")]).await;
        let sql = format!(
            "EXPLAIN QUERY PLAN SELECT {} FROM stations s CROSS JOIN quantities q WHERE s.key = ?1",
            crate::results_sql::NEWEST_OF_STATION_AND_QUANTITY
        );
        let plan: Vec<String> = sqlx::query(&sql)
            .bind("ST-1")
            .fetch_all(&store.pool)
            .await
            .expect("plan")
            .iter()
            .map(|row| row.get::<String, _>(3))
            .collect();
        let readings: Vec<&String> = plan.iter().filter(|line| line.contains(" r ")).collect();
        assert_eq!(readings.len(), 1, "{plan:?}");
        assert!(
            readings[0].starts_with("SEARCH r USING COVERING INDEX readings_key")
                && readings[0].contains("station_id=? AND quantity_id=?"),
            "{plan:?}"
        );
        store.close().await;
        database.finish().await;
    }

    /// A database only in memory is refused with the reason: the writer thread and the worker's
    /// reader open the database a second time, which would give each an empty database of its own.
    #[tokio::test]
    async fn an_in_memory_database_is_refused() {
        for url in ["sqlite::memory:", "sqlite://consensor.db?mode=memory"] {
            let error = SqliteStore::connect(url, &StoreOptions::default())
                .await
                .expect_err(url);
            assert!(
                matches!(&error, StoreError::Other(m) if m.contains("in-memory")),
                "{url}: {error}"
            );
        }
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
        while store.writer.queue().waiting() < count {
            tokio::time::sleep(std::time::Duration::from_millis(5)).await;
        }
        drop(held);
        let mut answers = Vec::new();
        for task in tasks {
            answers.push(task.await.expect("task"));
        }
        assert_eq!(store.writer.queue().turns_taken(), 1, "one group for all");
        for answer in &answers[..30] {
            assert_eq!(answer.as_ref().expect("stored").accepted, 1);
        }
        assert!(matches!(&answers[30], Err(StoreError::NotFound(m)) if m.contains("ST-404")));
        assert!(matches!(&answers[31], Err(StoreError::Other(m)) if m.contains("injected")));
        assert_eq!(store.count_readings().await.expect("count"), 30);
        store.close().await;
        database.finish().await;
    }

    /// The writer's own commits never checkpoint (its automatic checkpoint is off); the checkpoint
    /// thread does, so the WAL is reused from its start instead of growing with every batch. SQLite
    /// restarts the WAL once a checkpoint has copied all of it and no reader needs it (sqlite.org,
    /// "Write-Ahead Logging": "checkpoint starvation" is the case where it cannot).
    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn the_checkpoint_thread_keeps_the_wal_from_growing() {
        let (database, store) = store_with(&[("north", "ST-1")]).await;
        const BASE: i64 = 1_780_000_200_000;
        let wal = database
            .directory()
            .expect("a file database")
            .join("consensor.db-wal");
        // 40 batches of 2,000 readings, each a distinct second: about 80,000 rows in all.
        let mut largest_wal = 0;
        for batch in 0..40i64 {
            let readings: Vec<NewReading> = (0..2_000i64)
                .map(|i| NewReading {
                    station: "ST-1".to_owned(),
                    quantity: "air_temperature".to_owned(),
                    observed_at_ms: BASE + (batch * 2_000 + i) * 1_000,
                    value: Some(10.0 + (i % 7) as f64),
                    value_as_sent: Some(10.0 + (i % 7) as f64),
                    unit_as_sent: None,
                })
                .collect();
            store.insert_batch(&readings, BASE).await.expect("stored");
            // Give the checkpoint thread a moment between batches, as a live feed would.
            tokio::time::sleep(std::time::Duration::from_millis(20)).await;
            largest_wal = largest_wal.max(std::fs::metadata(&wal).map_or(0, |m| m.len()));
        }
        let database_file = database.sqlite_file().unwrap();
        let stored_bytes = std::fs::metadata(&database_file).expect("file").len();
        // All 80,000 rows were written through the WAL; had nothing been checkpointed, it would
        // hold all of them, and the database file would still be nearly empty.
        assert_eq!(store.count_readings().await.expect("count"), 80_000);
        assert!(
            largest_wal < stored_bytes / 2,
            "the WAL grew to {largest_wal} bytes against a database file of {stored_bytes}"
        );
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
        let reader = store.direct.clone();
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
