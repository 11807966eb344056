//! The PostgreSQL implementation, chosen by a `postgres://` or `postgresql://` URL.
//!
//! Batches travel as arrays: one `UNNEST` per statement carries every key or row of the batch, so a
//! batch of any size costs the same handful of round trips and never meets a parameter limit.

use std::collections::HashMap;
use std::hash::BuildHasher;
use std::str::FromStr;

use sqlx::postgres::{PgConnectOptions, PgPool, PgPoolOptions};
use sqlx::{Postgres, Row, Transaction};

use crate::batch::{
    distinct_sorted, insert_current, missing_keys, plan_batch, resolve, with_retries, AttemptError,
    CurrentValue, FastMap, KeyIds, ResolvedReading, CURRENT_VALUES_SELECT, MARK_FOLLOWING,
};
use crate::{
    Area, BatchOutcome, ClaimedBucket, NewArea, NewReading, NewStation, NewToken, ReadingKey,
    Station, StationRef, Store, StoreError, StoreOptions, StoredReading, Token, Upserted,
};

static MIGRATOR: sqlx::migrate::Migrator = sqlx::migrate!("../../migrations/postgres");

crate::sql::shared_queries!(sqlx::Postgres, sqlx::PgConnection);
crate::results_sql::result_queries!(sqlx::Postgres, sqlx::PgConnection);

/// A store backed by a PostgreSQL database.
#[derive(Debug, Clone)]
pub struct PostgresStore {
    pool: PgPool,
    /// The rules' history block, for the intervals a stored reading reaches (`batch::Following`).
    history_ms: i64,
}

impl PostgresStore {
    /// Connects to the database at `url` and applies pending migrations (sqlx holds an advisory
    /// lock while migrating, so several replicas starting at once do not collide).
    pub async fn connect(url: &str, options: &StoreOptions) -> Result<Self, StoreError> {
        let connect_options = PgConnectOptions::from_str(url)?;
        let pool = PgPoolOptions::new()
            .max_connections(options.max_connections)
            .acquire_timeout(options.acquire_timeout)
            // A connection whose ROLLBACK failed is still counted as inside a transaction and
            // would turn every later `begin` into a savepoint; it is closed instead of being
            // handed out (as on SQLite). A connection broken by a server restart fails the test
            // ping sqlx runs before each acquire (`test_before_acquire`, on by default) and is
            // replaced by a new one, so the pool reconnects by itself.
            .before_acquire(|connection, _| {
                Box::pin(async move {
                    use sqlx::Connection;
                    Ok(!connection.is_in_transaction())
                })
            })
            .connect_with(connect_options)
            .await?;
        MIGRATOR.run(&pool).await?;
        Ok(PostgresStore {
            pool,
            history_ms: options.history_ms,
        })
    }

    /// The underlying pool, for tests and the benchmark harness that need raw SQL. Application code
    /// uses [`Store`].
    pub fn pool(&self) -> &PgPool {
        &self.pool
    }

    /// PostgreSQL orders its writers itself: no gate (see `write_gate.rs` for SQLite's).
    async fn write_pass(&self, _rows: usize) -> Option<crate::write_gate::GatePass> {
        None
    }

    /// The transaction every writing method starts with (the shared result methods call it by this
    /// name on both backends). PostgreSQL's default READ COMMITTED suffices: the writes rely on row
    /// locks and unique keys, not on snapshots.
    async fn begin_write(&self) -> Result<Transaction<'static, Postgres>, sqlx::Error> {
        self.pool.begin().await
    }

    async fn try_insert_batch(
        &self,
        readings: &[NewReading],
        now_ms: i64,
    ) -> Result<BatchOutcome, AttemptError> {
        let mut tx = self.pool.begin().await?;

        let station_keys = distinct_sorted(readings.iter().map(|reading| &reading.station));
        let stations = lookup_stations(&mut tx, &station_keys).await?;
        let unknown = missing_keys(&station_keys, &stations);
        if !unknown.is_empty() {
            return Err(AttemptError::Refused(StoreError::NotFound(format!(
                "unknown stations: {}",
                unknown.join(", ")
            ))));
        }
        let quantity_keys = distinct_sorted(readings.iter().map(|reading| &reading.quantity));
        let quantities = ensure_quantities(&mut tx, &quantity_keys).await?;

        let resolved = resolve(readings, &stations, &quantities);
        let mut keys: Vec<KeyIds> = resolved.iter().map(ResolvedReading::key).collect();
        keys.sort_unstable();
        keys.dedup();
        let mut current = current_values(&mut tx, &keys).await?;
        let plan = plan_batch(&resolved, &mut current, self.history_ms);

        if !plan.rows.is_empty() {
            let rows = &plan.rows;
            sqlx::query(
                "INSERT INTO readings (observed_at_ms, station_id, quantity_id, revision, value, \
                 value_as_sent, unit_as_sent, received_at_ms) \
                 SELECT k.observed_at_ms, k.station_id, k.quantity_id, k.revision, k.value, \
                 k.value_as_sent, k.unit_as_sent, $8 \
                 FROM UNNEST($1::bigint[], $2::bigint[], $3::bigint[], $4::bigint[], \
                 $5::float8[], $6::float8[], $7::text[]) \
                 AS k(observed_at_ms, station_id, quantity_id, revision, value, value_as_sent, \
                 unit_as_sent)",
            )
            .bind(
                rows.iter()
                    .map(|row| row.observed_at_ms)
                    .collect::<Vec<_>>(),
            )
            .bind(rows.iter().map(|row| row.station_id).collect::<Vec<_>>())
            .bind(rows.iter().map(|row| row.quantity_id).collect::<Vec<_>>())
            .bind(rows.iter().map(|row| row.revision).collect::<Vec<_>>())
            .bind(rows.iter().map(|row| row.value).collect::<Vec<_>>())
            .bind(rows.iter().map(|row| row.value_as_sent).collect::<Vec<_>>())
            .bind(
                rows.iter()
                    .map(|row| row.unit_as_sent.clone())
                    .collect::<Vec<_>>(),
            )
            .bind(now_ms)
            .execute(&mut *tx)
            .await?;
        }

        if !plan.buckets.is_empty() {
            let buckets = &plan.buckets;
            sqlx::query(
                "INSERT INTO pending_buckets (area_id, quantity_id, bucket_start_ms, marked_at_ms, \
                 first_marked_at_ms) \
                 SELECT k.area_id, k.quantity_id, k.bucket_start_ms, $4, $4 \
                 FROM UNNEST($1::bigint[], $2::bigint[], $3::bigint[]) \
                 AS k(area_id, quantity_id, bucket_start_ms) \
                 ON CONFLICT (area_id, quantity_id, bucket_start_ms) DO UPDATE SET \
                 marked_at_ms = excluded.marked_at_ms, \
                 mark_count = pending_buckets.mark_count + 1",
            )
            .bind(buckets.iter().map(|bucket| bucket.0).collect::<Vec<_>>())
            .bind(buckets.iter().map(|bucket| bucket.1).collect::<Vec<_>>())
            .bind(buckets.iter().map(|bucket| bucket.2).collect::<Vec<_>>())
            .bind(now_ms)
            .execute(&mut *tx)
            .await?;
        }

        if !plan.following.is_empty() {
            let following = &plan.following;
            sqlx::query(&format!(
                "WITH following AS (SELECT k.*, $5::bigint AS marked_at_ms \
                 FROM UNNEST($1::bigint[], $2::bigint[], $3::bigint[], $4::bigint[]) \
                 AS k(area_id, quantity_id, after_ms, until_ms)) {MARK_FOLLOWING}"
            ))
            .bind(following.iter().map(|range| range.0).collect::<Vec<_>>())
            .bind(following.iter().map(|range| range.1).collect::<Vec<_>>())
            .bind(following.iter().map(|range| range.2).collect::<Vec<_>>())
            .bind(following.iter().map(|range| range.3).collect::<Vec<_>>())
            .bind(now_ms)
            .execute(&mut *tx)
            .await?;
        }

        tx.commit().await?;
        Ok(plan.outcome)
    }
}

/// The stations of the given keys, with their area and its interval; a key with no station is left
/// out. The map's hasher is the caller's (the batch's [`FastMap`], or std's for
/// `Store::station_keys_lookup`), so that neither copies the map into the other.
async fn lookup_stations<S: BuildHasher + Default>(
    tx: &mut Transaction<'static, Postgres>,
    keys: &[String],
) -> Result<HashMap<String, StationRef, S>, sqlx::Error> {
    let rows = sqlx::query(
        "SELECT s.key, s.id, s.area_id, a.interval_ms FROM stations s \
         JOIN areas a ON a.id = s.area_id WHERE s.key = ANY($1)",
    )
    .bind(keys)
    .fetch_all(&mut **tx)
    .await?;
    let mut found = HashMap::with_capacity_and_hasher(rows.len(), S::default());
    for row in rows {
        found.insert(
            row.try_get::<String, _>(0)?,
            StationRef {
                station_id: row.try_get(1)?,
                area_id: row.try_get(2)?,
                interval_ms: row.try_get(3)?,
            },
        );
    }
    Ok(found)
}

/// Returns the ids of the given quantity keys, adding the keys that have none yet. The keys arrive
/// sorted, so concurrent batches adding the same new keys lock them in the same order.
async fn ensure_quantities(
    tx: &mut Transaction<'static, Postgres>,
    keys: &[String],
) -> Result<FastMap<String, i64>, sqlx::Error> {
    let mut found = lookup_quantities(tx, keys).await?;
    let missing = missing_keys(keys, &found);
    if !missing.is_empty() {
        sqlx::query(
            "INSERT INTO quantities (key) SELECT * FROM UNNEST($1::text[]) \
             ON CONFLICT (key) DO NOTHING",
        )
        .bind(&missing)
        .execute(&mut **tx)
        .await?;
        found.extend(lookup_quantities(tx, &missing).await?);
    }
    Ok(found)
}

async fn lookup_quantities(
    tx: &mut Transaction<'static, Postgres>,
    keys: &[String],
) -> Result<FastMap<String, i64>, sqlx::Error> {
    let rows: Vec<(String, i64)> =
        sqlx::query_as("SELECT key, id FROM quantities WHERE key = ANY($1)")
            .bind(keys)
            .fetch_all(&mut **tx)
            .await?;
    Ok(rows.into_iter().collect())
}

/// Loads the current revision of every key of the batch with one query: the keys travel as three
/// arrays unnested into `batch_keys` and joined to the readings' unique index.
async fn current_values(
    tx: &mut Transaction<'static, Postgres>,
    keys: &[KeyIds],
) -> Result<FastMap<KeyIds, CurrentValue>, sqlx::Error> {
    let statement = format!(
        "WITH batch_keys (observed_at_ms, station_id, quantity_id) AS \
         (SELECT * FROM UNNEST($1::bigint[], $2::bigint[], $3::bigint[])) {CURRENT_VALUES_SELECT}"
    );
    let rows = sqlx::query(&statement)
        .bind(keys.iter().map(|key| key.0).collect::<Vec<_>>())
        .bind(keys.iter().map(|key| key.1).collect::<Vec<_>>())
        .bind(keys.iter().map(|key| key.2).collect::<Vec<_>>())
        .fetch_all(&mut **tx)
        .await?;
    let mut current = FastMap::with_capacity_and_hasher(rows.len(), Default::default());
    for row in &rows {
        insert_current(&mut current, row)?;
    }
    Ok(current)
}

/// The token with this hash, unless it has been revoked (SQLite reads it through its direct
/// reader, `sqlite_read.rs`, with the same SQL).
async fn find_token_by_hash(pool: &PgPool, hash: &[u8]) -> Result<Option<Token>, StoreError> {
    let row = sqlx::query(
        "SELECT id, role, label, created_at_ms, revoked_at_ms FROM tokens \
         WHERE hash = $1 AND revoked_at_ms IS NULL",
    )
    .bind(hash)
    .fetch_optional(pool)
    .await?;
    let Some(row) = row else {
        return Ok(None);
    };
    let id: String = row.try_get(0)?;
    let stations: Vec<(String,)> = sqlx::query_as(
        "SELECT station_key FROM token_stations WHERE token_id = $1 \
         ORDER BY station_key",
    )
    .bind(&id)
    .fetch_all(pool)
    .await?;
    Ok(Some(Token {
        id,
        role: row.try_get(1)?,
        label: row.try_get(2)?,
        stations: stations.into_iter().map(|(key,)| key).collect(),
        created_at_ms: row.try_get(3)?,
        revoked_at_ms: row.try_get(4)?,
    }))
}

impl Store for PostgresStore {
    async fn ping(&self) -> Result<(), StoreError> {
        shared::ping(&self.pool, &MIGRATOR).await
    }

    async fn upsert_area(&self, area: &NewArea) -> Result<Upserted, StoreError> {
        let mut tx = self.pool.begin().await?;
        let upserted = shared::upsert_area(&mut tx, area).await?;
        tx.commit().await?;
        Ok(upserted)
    }

    async fn list_areas(&self) -> Result<Vec<Area>, StoreError> {
        shared::list_areas(&self.pool).await
    }

    async fn upsert_station(&self, station: &NewStation) -> Result<Upserted, StoreError> {
        let mut tx = self.pool.begin().await?;
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
        let mut tx = self.pool.begin().await?;
        shared::insert_token(&mut tx, token).await?;
        tx.commit().await?;
        Ok(())
    }

    async fn find_token_by_hash(&self, hash: &[u8]) -> Result<Option<Token>, StoreError> {
        find_token_by_hash(&self.pool, hash).await
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
        with_retries(|| self.try_insert_batch(readings, now_ms)).await
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

    /// One statement claims the buckets. The `MATERIALIZED` CTE picks the candidates and locks them
    /// with `FOR UPDATE SKIP LOCKED`, so a concurrent claimer skips every row this one is taking
    /// instead of waiting for it; a row that another claimer committed as claimed between this
    /// statement's snapshot and its lock is re-checked against the `WHERE` clause by PostgreSQL
    /// after locking, and left out. The UPDATE then marks exactly the locked rows.
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
        let rows = sqlx::query(
            "WITH candidates AS MATERIALIZED ( \
               SELECT area_id, quantity_id, bucket_start_ms FROM pending_buckets pb \
               WHERE (claimed_at_ms IS NULL OR claimed_at_ms < $3) \
               AND ((bucket_start_ms + (SELECT interval_ms FROM areas WHERE id = pb.area_id) <= $2 \
               AND marked_at_ms <= $6) OR first_marked_at_ms <= $5) \
               ORDER BY marked_at_ms / 60000, area_id, quantity_id, bucket_start_ms \
               LIMIT $4 FOR UPDATE OF pb SKIP LOCKED), \
             claimed AS ( \
               UPDATE pending_buckets p SET claimed_by = $1, claimed_at_ms = $2 \
               FROM candidates c WHERE p.area_id = c.area_id \
               AND p.quantity_id = c.quantity_id AND p.bucket_start_ms = c.bucket_start_ms \
               RETURNING p.area_id, p.quantity_id, p.bucket_start_ms, p.mark_count, \
               p.marked_at_ms) \
             SELECT c.area_id, a.key, c.quantity_id, q.key, c.bucket_start_ms, a.interval_ms, \
             c.mark_count \
             FROM claimed c JOIN areas a ON a.id = c.area_id \
             JOIN quantities q ON q.id = c.quantity_id \
             ORDER BY c.marked_at_ms / 60000, c.area_id, c.quantity_id, c.bucket_start_ms",
        )
        .bind(worker)
        .bind(now_ms)
        .bind(now_ms.saturating_sub(stale_after_ms))
        .bind(i64::try_from(limit).unwrap_or(i64::MAX))
        .bind(now_ms.saturating_sub(open_refresh_ms))
        .bind(crate::batch::settled_before(now_ms, settle_ms))
        .fetch_all(&self.pool)
        .await?;
        let mut claimed = Vec::with_capacity(rows.len());
        for row in &rows {
            claimed.push(ClaimedBucket {
                area_id: row.try_get(0)?,
                area_key: row.try_get(1)?,
                quantity_id: row.try_get(2)?,
                quantity: row.try_get(3)?,
                bucket_start_ms: row.try_get(4)?,
                interval_ms: row.try_get(5)?,
                mark_count: row.try_get(6)?,
                claimed_by: worker.to_owned(),
            });
        }
        Ok(claimed)
    }

    /// The readings come as one row per station holding its readings in arrays, decoded from
    /// PostgreSQL's binary array format: a few dozen rows per run of intervals instead of hundreds
    /// of thousands, each of which costs the driver far more than an array element. The arrays are
    /// filled from a subquery ordered by (station, time, revision); PostgreSQL keeps that order in
    /// practice but does not promise it, so each station's readings are checked and, if need be,
    /// sorted here before the rows are assembled as every other read assembles them.
    async fn load_interval(
        &self,
        area_id: i64,
        quantity: &str,
        from_ms: i64,
        to_ms: i64,
    ) -> Result<crate::IntervalData, StoreError> {
        type StationArrays = (
            i64,
            Vec<i64>,
            Vec<i64>,
            Vec<i64>,
            Vec<Option<f64>>,
            Vec<Option<f64>>,
        );
        let mut connection = self.pool.acquire().await?;
        let stations: Vec<(i64, String)> = sqlx::query_as(crate::results::LOAD_STATIONS_SQL)
            .bind(area_id)
            .fetch_all(&mut *connection)
            .await?;
        let arrays: Vec<StationArrays> = sqlx::query_as(
            "SELECT station_id, array_agg(id), array_agg(observed_at_ms), array_agg(revision), \
             array_agg(value), array_agg(value_as_sent) \
             FROM (SELECT r.station_id, r.id, r.observed_at_ms, r.revision, r.value, \
             r.value_as_sent FROM stations s JOIN readings r ON r.station_id = s.id \
             WHERE s.area_id = $1 \
             AND r.quantity_id = (SELECT id FROM quantities WHERE key = $2) \
             AND r.observed_at_ms >= $3 AND r.observed_at_ms < $4 \
             ORDER BY r.station_id, r.observed_at_ms, r.revision) AS ordered \
             GROUP BY station_id ORDER BY station_id",
        )
        .bind(area_id)
        .bind(quantity)
        .bind(from_ms)
        .bind(to_ms)
        .fetch_all(&mut *connection)
        .await?;
        let mut rows: Vec<(i64, i64, crate::results::ReadingRow)> = Vec::new();
        for (station_id, ids, times, revisions, values, as_sent) in arrays {
            let count = ids.len();
            if [times.len(), revisions.len(), values.len(), as_sent.len()] != [count; 4] {
                return Err(StoreError::Other(format!(
                    "station {station_id}: reading arrays of different lengths"
                )));
            }
            let first = rows.len();
            rows.extend((0..count).map(|i| {
                (
                    times[i],
                    revisions[i],
                    (station_id, ids[i], times[i], values[i], as_sent[i]),
                )
            }));
            let station_rows = &mut rows[first..];
            if !station_rows.is_sorted_by_key(|&(time, revision, _)| (time, revision)) {
                station_rows.sort_unstable_by_key(|&(time, revision, _)| (time, revision));
            }
        }
        let stations = crate::results::assemble_series(
            stations,
            rows.into_iter().map(|(_, _, row)| Ok::<_, StoreError>(row)),
        )?;
        let reviews: Vec<(i64, String)> = sqlx::query_as(crate::results::LOAD_REVIEWS_SQL)
            .bind(area_id)
            .bind(quantity)
            .bind(from_ms)
            .bind(to_ms)
            .fetch_all(&mut *connection)
            .await?;
        Ok(crate::IntervalData {
            stations,
            overturned: crate::results::overturned_of(reviews)?,
        })
    }

    crate::results_sql::result_store_methods!();

    async fn close(&self) {
        self.pool.close().await;
    }
}
