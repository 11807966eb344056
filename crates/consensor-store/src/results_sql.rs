//! The consensus side's queries whose SQL text is the same on both backends: storing results with
//! their set-aside records, the result and set-aside reads of the API,
//! reviews, recompute requests and the station health figures. Like `sql.rs`, a macro stamps them
//! out once per backend. What differs between the backends — how buckets are claimed, how a
//! writing transaction starts, and how the worker reads an area's readings — lives in `sqlite.rs`
//! (and `sqlite_read.rs`) and `postgres.rs`.

/// Rows per multi-row INSERT of set-aside records or station values. 1 000 rows of at most 13
/// columns stay well below SQLite's 32 766 bound parameters and PostgreSQL's 65 535.
pub(crate) const ROWS_PER_INSERT: usize = 1_000;

/// The newest observation time of station `s` in quantity `q`, for a query over
/// `stations s CROSS JOIN quantities q`: one probe at the end of a range of the station-first key
/// `readings_key` (migrations 0005 and 0006), not a scan. A station's or an area's newest is the
/// largest of these, whether it reports or went silent long ago.
pub(crate) const NEWEST_OF_STATION_AND_QUANTITY: &str = "(SELECT MAX(r.observed_at_ms) \
     FROM readings r WHERE r.station_id = s.id AND r.quantity_id = q.id)";

/// Defines the shared result queries inside the invoking module for one sqlx database type.
macro_rules! result_queries {
    ($database:ty, $connection:ty) => {
        pub(crate) mod results_shared {
            use consensor_core::checks::{IntervalOutcome, Point, Rule, Status};
            use sqlx::{Pool, QueryBuilder, Row};

            use crate::batch::AttemptError;
            use crate::results_sql::ROWS_PER_INSERT;
            use crate::{
                AuditFilter, ClaimedBucket, Page, ReadingCounts, ResultRow,
                ReviewDecision, ReviewRecord, ReviewState, ReviewSummary, SetAsideCursor,
                SetAsideFilter, SetAsideRow, StationResidual, StoreError,
                StoredResult,
            };

            type DatabaseRow = <$database as sqlx::Database>::Row;

            /// See `Store::claim_interval_of_reading`. The claim is one UPDATE of the pending row
            /// with the claimability test in its WHERE clause, so of two concurrent claimers (a
            /// request and a worker, or two replicas) at most one sees it succeed.
            pub(crate) async fn claim_interval_of_reading(
                pool: &Pool<$database>,
                reading_id: i64,
                worker: &str,
                now_ms: i64,
                stale_after_ms: i64,
            ) -> Result<crate::IntervalClaim, StoreError> {
                let found: Option<(i64, String, i64, String, i64, i64)> = sqlx::query_as(
                    "SELECT a.id, a.key, q.id, q.key, ir.bucket_start_ms, a.interval_ms \
                     FROM set_aside sa JOIN interval_results ir ON ir.id = sa.result_id \
                     JOIN areas a ON a.id = ir.area_id \
                     JOIN quantities q ON q.id = ir.quantity_id \
                     WHERE sa.reading_id = $1 ORDER BY sa.result_id DESC LIMIT 1",
                )
                .bind(reading_id)
                .fetch_optional(pool)
                .await?;
                let Some((area_id, area_key, quantity_id, quantity, bucket_start_ms, interval_ms)) =
                    found
                else {
                    return Ok(crate::IntervalClaim::NotPending);
                };
                let claimed: Option<(i64,)> = sqlx::query_as(
                    "UPDATE pending_buckets SET claimed_by = $1, claimed_at_ms = $2 \
                     WHERE area_id = $3 AND quantity_id = $4 AND bucket_start_ms = $5 \
                     AND (claimed_at_ms IS NULL OR claimed_at_ms < $6) RETURNING mark_count",
                )
                .bind(worker)
                .bind(now_ms)
                .bind(area_id)
                .bind(quantity_id)
                .bind(bucket_start_ms)
                .bind(now_ms.saturating_sub(stale_after_ms))
                .fetch_optional(pool)
                .await?;
                if let Some((mark_count,)) = claimed {
                    return Ok(crate::IntervalClaim::Claimed(ClaimedBucket {
                        area_id,
                        area_key,
                        quantity_id,
                        quantity,
                        bucket_start_ms,
                        interval_ms,
                        mark_count,
                        claimed_by: worker.to_owned(),
                    }));
                }
                let pending: Option<(i64,)> = sqlx::query_as(
                    "SELECT mark_count FROM pending_buckets \
                     WHERE area_id = $1 AND quantity_id = $2 AND bucket_start_ms = $3",
                )
                .bind(area_id)
                .bind(quantity_id)
                .bind(bucket_start_ms)
                .fetch_optional(pool)
                .await?;
                Ok(match pending {
                    Some(_) => crate::IntervalClaim::Busy,
                    None => crate::IntervalClaim::NotPending,
                })
            }

            /// Writes a batch of results (at most a few dozen, of distinct intervals), each with its
            /// set-aside records and station values, moves each interval's latest-revision pointer,
            /// and removes (or releases) each pending bucket: a handful of multi-row statements for
            /// the whole batch, not a handful per result. Runs inside the caller's transaction; a
            /// unique violation on a revision means another writer stored the same revision first,
            /// and the caller retries the whole transaction.
            pub(crate) async fn store_results(
                connection: &mut $connection,
                results: &[crate::ResultToStore<'_>],
                now_ms: i64,
            ) -> Result<Vec<StoredResult>, AttemptError> {
                let mut keys = std::collections::HashSet::with_capacity(results.len());
                for result in results {
                    check_outcome(result.outcome, result.station_ids, result.reasons)?;
                    let bucket = result.bucket;
                    if !keys.insert((bucket.area_id, bucket.quantity_id, bucket.bucket_start_ms)) {
                        return Err(AttemptError::Refused(StoreError::Other(format!(
                            "interval {} of area {} is twice in one batch of results",
                            bucket.bucket_start_ms, bucket.area_key
                        ))));
                    }
                }
                if results.is_empty() {
                    return Ok(Vec::new());
                }

                // The results, each with the next revision of its interval. RETURNING names the
                // interval of each row, since a multi-row INSERT promises no order for it.
                let mut insert = QueryBuilder::<$database>::new(
                    "INSERT INTO interval_results (area_id, quantity_id, bucket_start_ms, \
                     interval_ms, revision, median, median_low, median_high, mean, mean_all, mad, \
                     spread, ci95_low, ci95_high, huber, stations_used, stations_set_aside, \
                     status, computed_at_ms) ",
                );
                insert.push_values(results, |mut values, result| {
                    let (bucket, point) = (result.bucket, &result.outcome.point);
                    values
                        .push_bind(bucket.area_id)
                        .push_bind(bucket.quantity_id)
                        .push_bind(bucket.bucket_start_ms)
                        .push_bind(bucket.interval_ms)
                        .push_unseparated(
                            ", (SELECT COALESCE(MAX(revision), 0) + 1 FROM interval_results \
                             WHERE area_id = ",
                        )
                        .push_bind_unseparated(bucket.area_id)
                        .push_unseparated(" AND quantity_id = ")
                        .push_bind_unseparated(bucket.quantity_id)
                        .push_unseparated(" AND bucket_start_ms = ")
                        .push_bind_unseparated(bucket.bucket_start_ms)
                        .push_unseparated(")")
                        .push_bind(point.median)
                        .push_bind(point.median_low)
                        .push_bind(point.median_high)
                        .push_bind(point.mean)
                        .push_bind(point.mean_all)
                        .push_bind(point.mad)
                        .push_bind(point.spread)
                        .push_bind(point.ci95_low)
                        .push_bind(point.ci95_high)
                        .push_bind(point.huber)
                        .push_bind(i64::from(point.stations_used))
                        .push_bind(i64::from(point.stations_set_aside))
                        .push_bind(point.status.as_str())
                        .push_bind(now_ms);
                });
                insert.push(" RETURNING id, revision, area_id, quantity_id, bucket_start_ms");
                let returned: Vec<(i64, i64, i64, i64, i64)> =
                    insert.build_query_as().fetch_all(&mut *connection).await?;
                let by_interval: std::collections::HashMap<(i64, i64, i64), (i64, i64)> = returned
                    .into_iter()
                    .map(|(id, revision, area, quantity, start)| ((area, quantity, start), (id, revision)))
                    .collect();
                let mut stored_ids = Vec::with_capacity(results.len());
                for result in results {
                    let bucket = result.bucket;
                    let key = (bucket.area_id, bucket.quantity_id, bucket.bucket_start_ms);
                    let &(result_id, revision) = by_interval.get(&key).ok_or_else(|| {
                        AttemptError::Refused(StoreError::Other(format!(
                            "the result of interval {} of area {} was not returned by its insert",
                            bucket.bucket_start_ms, bucket.area_key
                        )))
                    })?;
                    stored_ids.push((result_id, revision));
                }

                let mut latest = QueryBuilder::<$database>::new(
                    "INSERT INTO interval_latest (area_id, quantity_id, bucket_start_ms, \
                     revision, result_id) ",
                );
                latest.push_values(results.iter().zip(&stored_ids), |mut values, (result, &(result_id, revision))| {
                    values
                        .push_bind(result.bucket.area_id)
                        .push_bind(result.bucket.quantity_id)
                        .push_bind(result.bucket.bucket_start_ms)
                        .push_bind(revision)
                        .push_bind(result_id);
                });
                latest.push(
                    " ON CONFLICT (area_id, quantity_id, bucket_start_ms) DO UPDATE SET \
                     revision = excluded.revision, result_id = excluded.result_id \
                     WHERE interval_latest.revision < excluded.revision",
                );
                latest.build().execute(&mut *connection).await?;

                let records: Vec<(i64, &[i64], &String, &consensor_core::checks::SetAside)> = results
                    .iter()
                    .zip(&stored_ids)
                    .flat_map(|(result, &(result_id, _))| {
                        result
                            .outcome
                            .set_aside
                            .iter()
                            .zip(result.reasons)
                            .map(move |(record, reason)| (result_id, result.station_ids, reason, record))
                    })
                    .collect();
                for chunk in records.chunks(ROWS_PER_INSERT) {
                    let mut insert = QueryBuilder::<$database>::new(
                        "INSERT INTO set_aside (result_id, reading_id, station_id, \
                         observed_at_ms, rule, reason, score, threshold, consensus_median, \
                         consensus_spread, gap_ms, window_readings, station_value) ",
                    );
                    insert.push_values(chunk, |mut values, &(result_id, station_ids, reason, record)| {
                        // check_outcome has verified the handle and that the id fits an i64.
                        values
                            .push_bind(result_id)
                            .push_bind(record.reading_id as i64)
                            .push_bind(station_ids[record.station as usize])
                            .push_bind(record.observed_at_ms)
                            .push_bind(record.rule.as_str())
                            .push_bind(reason.clone())
                            .push_bind(record.score)
                            .push_bind(record.threshold)
                            .push_bind(record.consensus_median)
                            .push_bind(record.consensus_spread)
                            .push_bind(record.gap_ms)
                            .push_bind(record.window_readings.map(i64::from))
                            .push_bind(record.station_value);
                    });
                    insert.build().execute(&mut *connection).await?;
                }

                let station_values: Vec<(i64, i64, &consensor_core::checks::StationValue)> = results
                    .iter()
                    .zip(&stored_ids)
                    .flat_map(|(result, &(result_id, _))| {
                        result.outcome.station_values.iter().map(move |value| {
                            (result_id, result.station_ids[value.station as usize], value)
                        })
                    })
                    .collect();
                for chunk in station_values.chunks(ROWS_PER_INSERT) {
                    let mut insert = QueryBuilder::<$database>::new(
                        "INSERT INTO interval_station_values (result_id, station_id, value, \
                         used, score) ",
                    );
                    insert.push_values(chunk, |mut values, &(result_id, station_id, value)| {
                        values
                            .push_bind(result_id)
                            .push_bind(station_id)
                            .push_bind(value.value)
                            .push_bind(value.used)
                            .push_bind(value.score);
                    });
                    insert.build().execute(&mut *connection).await?;
                }

                // A bucket is done only if no reading marked it since the claim; otherwise the
                // result just stored is already out of date, and releasing the claim lets the
                // next claim compute it again from the newer readings.
                let mut delete = QueryBuilder::<$database>::new("DELETE FROM pending_buckets WHERE ");
                for (index, result) in results.iter().enumerate() {
                    push_bucket_match(&mut delete, index, result.bucket);
                    delete
                        .push(" AND mark_count = ")
                        .push_bind(result.bucket.mark_count)
                        .push(")");
                }
                delete.push(" RETURNING area_id, quantity_id, bucket_start_ms");
                let removed: std::collections::HashSet<(i64, i64, i64)> = delete
                    .build_query_as::<(i64, i64, i64)>()
                    .fetch_all(&mut *connection)
                    .await?
                    .into_iter()
                    .collect();
                let marked_again: Vec<&ClaimedBucket> = results
                    .iter()
                    .map(|result| result.bucket)
                    .filter(|b| !removed.contains(&(b.area_id, b.quantity_id, b.bucket_start_ms)))
                    .collect();
                if !marked_again.is_empty() {
                    let mut release = QueryBuilder::<$database>::new(
                        "UPDATE pending_buckets SET claimed_by = NULL, claimed_at_ms = NULL WHERE ",
                    );
                    for (index, bucket) in marked_again.iter().enumerate() {
                        push_bucket_match(&mut release, index, bucket);
                        release
                            .push(" AND claimed_by = ")
                            .push_bind(bucket.claimed_by.clone())
                            .push(")");
                    }
                    release.build().execute(&mut *connection).await?;
                }
                Ok(results
                    .iter()
                    .zip(stored_ids)
                    .map(|(result, (result_id, revision))| StoredResult {
                        result_id,
                        revision,
                        bucket_done: removed.contains(&(
                            result.bucket.area_id,
                            result.bucket.quantity_id,
                            result.bucket.bucket_start_ms,
                        )),
                    })
                    .collect())
            }

            /// Appends `[OR ](area_id = … AND quantity_id = … AND bucket_start_ms = …` for the
            /// `index`-th bucket of a WHERE clause; the caller adds its last condition and `)`.
            fn push_bucket_match(
                builder: &mut QueryBuilder<'_, $database>,
                index: usize,
                bucket: &ClaimedBucket,
            ) {
                if index > 0 {
                    builder.push(" OR ");
                }
                builder
                    .push("(area_id = ")
                    .push_bind(bucket.area_id)
                    .push(" AND quantity_id = ")
                    .push_bind(bucket.quantity_id)
                    .push(" AND bucket_start_ms = ")
                    .push_bind(bucket.bucket_start_ms);
            }

            /// Refuses, before anything is written, an outcome that does not fit the arguments
            /// given with it: every station handle must index `station_ids`, every set-aside
            /// record needs its reason, and every reading id must fit the store's integer ids.
            /// These are caller bugs, so no retry is attempted.
            fn check_outcome(
                outcome: &IntervalOutcome,
                station_ids: &[i64],
                reasons: &[String],
            ) -> Result<(), AttemptError> {
                let refuse =
                    |message: String| Err(AttemptError::Refused(StoreError::Other(message)));
                if reasons.len() != outcome.set_aside.len() {
                    return refuse(format!(
                        "{} reasons for {} set-aside records",
                        reasons.len(),
                        outcome.set_aside.len()
                    ));
                }
                let handles = outcome
                    .set_aside
                    .iter()
                    .map(|record| record.station)
                    .chain(outcome.station_values.iter().map(|value| value.station));
                for handle in handles {
                    if handle as usize >= station_ids.len() {
                        return refuse(format!(
                            "the outcome names station handle {handle}, but only {} station ids \
                             were given",
                            station_ids.len()
                        ));
                    }
                }
                if let Some(record) = outcome
                    .set_aside
                    .iter()
                    .find(|record| i64::try_from(record.reading_id).is_err())
                {
                    return refuse(format!("reading id {} is out of range", record.reading_id));
                }
                Ok(())
            }

            const RESULT_COLUMNS: &str = "ir.bucket_start_ms, ir.interval_ms, ir.revision, \
                ir.computed_at_ms, ir.median, ir.median_low, ir.median_high, ir.mean, \
                ir.mean_all, ir.mad, ir.spread, ir.ci95_low, ir.ci95_high, ir.huber, \
                ir.stations_used, ir.stations_set_aside, ir.status";

            /// The latest results of one area and quantity with `from_ms <= start < to_ms`.
            pub(crate) async fn series(
                pool: &Pool<$database>,
                area: &str,
                quantity: &str,
                from_ms: i64,
                to_ms: i64,
            ) -> Result<Vec<ResultRow>, StoreError> {
                let statement = format!(
                    "SELECT {RESULT_COLUMNS} FROM interval_latest l \
                     JOIN interval_results ir ON ir.id = l.result_id \
                     WHERE l.area_id = (SELECT id FROM areas WHERE key = $1) \
                     AND l.quantity_id = (SELECT id FROM quantities WHERE key = $2) \
                     AND l.bucket_start_ms >= $3 AND l.bucket_start_ms < $4 \
                     ORDER BY l.bucket_start_ms"
                );
                let rows = sqlx::query(&statement)
                    .bind(area)
                    .bind(quantity)
                    .bind(from_ms)
                    .bind(to_ms)
                    .fetch_all(pool)
                    .await?;
                rows.iter().map(result_row).collect()
            }

            /// The latest result of the newest interval of one area and quantity.
            pub(crate) async fn latest(
                pool: &Pool<$database>,
                area: &str,
                quantity: &str,
            ) -> Result<Option<ResultRow>, StoreError> {
                let statement = format!(
                    "SELECT {RESULT_COLUMNS} FROM interval_latest l \
                     JOIN interval_results ir ON ir.id = l.result_id \
                     WHERE l.area_id = (SELECT id FROM areas WHERE key = $1) \
                     AND l.quantity_id = (SELECT id FROM quantities WHERE key = $2) \
                     ORDER BY l.bucket_start_ms DESC LIMIT 1"
                );
                let row = sqlx::query(&statement)
                    .bind(area)
                    .bind(quantity)
                    .fetch_optional(pool)
                    .await?;
                row.as_ref().map(result_row).transpose()
            }

            /// [`latest`] of every area and quantity that has a result, in one query: each
            /// pair's newest interval is one backward probe of `interval_latest`'s primary key,
            /// written as a scalar subquery so that neither planner scans that table (a join
            /// with a `MAX` subquery made SQLite scan every row of it; the plans were read with
            /// `EXPLAIN QUERY PLAN`, and on PostgreSQL with `EXPLAIN ANALYZE` on 2 million
            /// results: one backward index probe per pair).
            pub(crate) async fn latest_of_every_area(
                pool: &Pool<$database>,
            ) -> Result<Vec<(String, String, ResultRow)>, StoreError> {
                let statement = format!(
                    "SELECT {RESULT_COLUMNS}, p.area_key, p.quantity_key \
                     FROM (SELECT a.key AS area_key, q.key AS quantity_key, \
                     (SELECT l.result_id FROM interval_latest l \
                     WHERE l.area_id = a.id AND l.quantity_id = q.id \
                     ORDER BY l.bucket_start_ms DESC LIMIT 1) AS result_id \
                     FROM areas a CROSS JOIN quantities q) p \
                     JOIN interval_results ir ON ir.id = p.result_id \
                     ORDER BY p.area_key, p.quantity_key"
                );
                let rows = sqlx::query(&statement).fetch_all(pool).await?;
                rows.iter()
                    .map(|row| Ok((row.try_get(17)?, row.try_get(18)?, result_row(row)?)))
                    .collect()
            }

            /// One revision of one interval's result (the latest when `revision` is `None`).
            pub(crate) async fn result_revision(
                pool: &Pool<$database>,
                area: &str,
                quantity: &str,
                start_ms: i64,
                revision: Option<i64>,
            ) -> Result<Option<ResultRow>, StoreError> {
                let row = match revision {
                    None => {
                        let statement = format!(
                            "SELECT {RESULT_COLUMNS} FROM interval_latest l \
                             JOIN interval_results ir ON ir.id = l.result_id \
                             WHERE l.area_id = (SELECT id FROM areas WHERE key = $1) \
                             AND l.quantity_id = (SELECT id FROM quantities WHERE key = $2) \
                             AND l.bucket_start_ms = $3"
                        );
                        sqlx::query(&statement)
                            .bind(area)
                            .bind(quantity)
                            .bind(start_ms)
                            .fetch_optional(pool)
                            .await?
                    }
                    Some(revision) => {
                        let statement = format!(
                            "SELECT {RESULT_COLUMNS} FROM interval_results ir \
                             WHERE ir.area_id = (SELECT id FROM areas WHERE key = $1) \
                             AND ir.quantity_id = (SELECT id FROM quantities WHERE key = $2) \
                             AND ir.bucket_start_ms = $3 AND ir.revision = $4"
                        );
                        sqlx::query(&statement)
                            .bind(area)
                            .bind(quantity)
                            .bind(start_ms)
                            .bind(revision)
                            .fetch_optional(pool)
                            .await?
                    }
                };
                row.as_ref().map(result_row).transpose()
            }

            fn result_row(row: &DatabaseRow) -> Result<ResultRow, StoreError> {
                let status: String = row.try_get(16)?;
                Ok(ResultRow {
                    start_ms: row.try_get(0)?,
                    interval_ms: row.try_get(1)?,
                    revision: row.try_get(2)?,
                    computed_at_ms: row.try_get(3)?,
                    point: Point {
                        median: row.try_get(4)?,
                        median_low: row.try_get(5)?,
                        median_high: row.try_get(6)?,
                        mean: row.try_get(7)?,
                        mean_all: row.try_get(8)?,
                        mad: row.try_get(9)?,
                        spread: row.try_get(10)?,
                        ci95_low: row.try_get(11)?,
                        ci95_high: row.try_get(12)?,
                        huber: row.try_get(13)?,
                        stations_used: count_u32(row.try_get(14)?)?,
                        stations_set_aside: count_u32(row.try_get(15)?)?,
                        status: parse_status(&status)?,
                    },
                })
            }

            /// One page of set-aside records. A record is listed when it belongs to the latest
            /// revision of its interval, or when it is the newest record of a reading whose latest
            /// review is an overturn: such a reading is used again and so is no longer set aside by
            /// the newer revision, but an operator must still find it under `overturned`.
            pub(crate) async fn list_set_aside(
                pool: &Pool<$database>,
                filter: &SetAsideFilter,
                limit: usize,
                after: Option<SetAsideCursor>,
            ) -> Result<Page<SetAsideRow, SetAsideCursor>, StoreError> {
                let mut query = QueryBuilder::<$database>::new(
                    "SELECT sa.reading_id, s.key, a.key, q.key, r.value, r.value_as_sent, \
                     r.unit_as_sent, sa.observed_at_ms, sa.rule, sa.reason, sa.score, \
                     sa.threshold, sa.consensus_median, sa.consensus_spread, sa.gap_ms, \
                     sa.window_readings, sa.station_value, ir.bucket_start_ms, ir.revision, \
                     sa.result_id, rv.decision, rv.by_token, rv.at_ms, rv.note \
                     FROM set_aside sa \
                     JOIN interval_results ir ON ir.id = sa.result_id \
                     JOIN readings r ON r.id = sa.reading_id \
                     JOIN stations s ON s.id = sa.station_id \
                     JOIN areas a ON a.id = ir.area_id \
                     JOIN quantities q ON q.id = ir.quantity_id \
                     LEFT JOIN reviews rv ON rv.id = \
                     (SELECT MAX(latest.id) FROM reviews latest \
                      WHERE latest.reading_id = sa.reading_id) \
                     WHERE (EXISTS (SELECT 1 FROM interval_latest l \
                     WHERE l.result_id = sa.result_id) \
                     OR (rv.decision = 'overturn' AND NOT EXISTS (SELECT 1 FROM set_aside later \
                     WHERE later.reading_id = sa.reading_id AND later.result_id > sa.result_id)))",
                );
                if let Some(area) = &filter.area {
                    query.push(" AND a.key = ").push_bind(area.clone());
                }
                if let Some(station) = &filter.station {
                    query.push(" AND s.key = ").push_bind(station.clone());
                }
                if let Some(quantity) = &filter.quantity {
                    query.push(" AND q.key = ").push_bind(quantity.clone());
                }
                if let Some(from_ms) = filter.from_ms {
                    query.push(" AND sa.observed_at_ms >= ").push_bind(from_ms);
                }
                if let Some(to_ms) = filter.to_ms {
                    query.push(" AND sa.observed_at_ms < ").push_bind(to_ms);
                }
                match filter.review {
                    None => {}
                    Some(ReviewState::Pending) => {
                        query.push(" AND rv.id IS NULL");
                    }
                    Some(ReviewState::Upheld) => {
                        query
                            .push(" AND rv.decision = ")
                            .push_bind(ReviewDecision::Uphold.as_str());
                    }
                    Some(ReviewState::Overturned) => {
                        query
                            .push(" AND rv.decision = ")
                            .push_bind(ReviewDecision::Overturn.as_str());
                    }
                }
                if let Some(cursor) = after {
                    // The plain bound on the first column lets both planners start the index
                    // scan at the cursor; the row comparison then skips the rows of the same
                    // millisecond that the previous page already returned.
                    query
                        .push(" AND sa.observed_at_ms >= ")
                        .push_bind(cursor.observed_at_ms)
                        .push(" AND (sa.observed_at_ms, sa.reading_id, sa.result_id) > (")
                        .push_bind(cursor.observed_at_ms)
                        .push(", ")
                        .push_bind(cursor.reading_id)
                        .push(", ")
                        .push_bind(cursor.result_id)
                        .push(")");
                }
                // One row more than asked tells whether another page follows.
                query
                    .push(" ORDER BY sa.observed_at_ms, sa.reading_id, sa.result_id LIMIT ")
                    .push_bind(limit_plus_one(limit));
                let rows = query.build().fetch_all(pool).await?;
                let mut items = Vec::with_capacity(rows.len().min(limit));
                for row in rows.iter().take(limit) {
                    items.push(set_aside_row(row)?);
                }
                let next_cursor = if rows.len() > limit {
                    items.last().map(|last| SetAsideCursor {
                        observed_at_ms: last.observed_at_ms,
                        reading_id: last.reading_id,
                        result_id: last.result_id,
                    })
                } else {
                    None
                };
                Ok(Page { items, next_cursor })
            }

            fn set_aside_row(row: &DatabaseRow) -> Result<SetAsideRow, StoreError> {
                let rule: String = row.try_get(8)?;
                let decision: Option<String> = row.try_get(20)?;
                let state = match decision.as_deref() {
                    None => ReviewState::Pending,
                    Some(text) => parse_decision(text)?.state(),
                };
                Ok(SetAsideRow {
                    reading_id: row.try_get(0)?,
                    station: row.try_get(1)?,
                    area: row.try_get(2)?,
                    quantity: row.try_get(3)?,
                    value: row.try_get(4)?,
                    value_as_sent: row.try_get(5)?,
                    unit_as_sent: row.try_get(6)?,
                    observed_at_ms: row.try_get(7)?,
                    rule: Rule::parse(&rule)
                        .ok_or_else(|| StoreError::Other(format!("unknown rule {rule}")))?,
                    reason: row.try_get(9)?,
                    score: row.try_get(10)?,
                    threshold: row.try_get(11)?,
                    consensus_median: row.try_get(12)?,
                    consensus_spread: row.try_get(13)?,
                    gap_ms: row.try_get(14)?,
                    window_readings: row.try_get(15)?,
                    station_value: row.try_get(16)?,
                    bucket_start_ms: row.try_get(17)?,
                    result_revision: row.try_get(18)?,
                    result_id: row.try_get(19)?,
                    review: ReviewSummary {
                        state,
                        by: row.try_get(21)?,
                        at_ms: row.try_get(22)?,
                        note: row.try_get(23)?,
                    },
                })
            }

            /// Appends a review of a reading that some result set aside and marks that result's
            /// interval pending, inside the caller's transaction, so the decision and the
            /// recomputation it calls for are committed together.
            pub(crate) async fn review_reading(
                connection: &mut $connection,
                reading_id: i64,
                decision: ReviewDecision,
                note: Option<&str>,
                by: &str,
                now_ms: i64,
            ) -> Result<ReviewRecord, StoreError> {
                // The newest record of the reading names the interval it was judged in.
                let found = sqlx::query(
                    "SELECT ir.area_id, ir.quantity_id, ir.bucket_start_ms, s.key, q.key, \
                     r.observed_at_ms \
                     FROM set_aside sa JOIN interval_results ir ON ir.id = sa.result_id \
                     JOIN readings r ON r.id = sa.reading_id \
                     JOIN stations s ON s.id = r.station_id \
                     JOIN quantities q ON q.id = r.quantity_id \
                     WHERE sa.reading_id = $1 ORDER BY sa.result_id DESC LIMIT 1",
                )
                .bind(reading_id)
                .fetch_optional(&mut *connection)
                .await?;
                let Some(found) = found else {
                    return Err(StoreError::NotFound(format!(
                        "reading {reading_id} was never set aside"
                    )));
                };
                let area_id: i64 = found.try_get(0)?;
                let quantity_id: i64 = found.try_get(1)?;
                let bucket_start_ms: i64 = found.try_get(2)?;
                let (id,): (i64,) = sqlx::query_as(
                    "INSERT INTO reviews (reading_id, decision, note, by_token, at_ms) \
                     VALUES ($1, $2, $3, $4, $5) RETURNING id",
                )
                .bind(reading_id)
                .bind(decision.as_str())
                .bind(note)
                .bind(by)
                .bind(now_ms)
                .fetch_one(&mut *connection)
                .await?;
                sqlx::query(
                    "INSERT INTO pending_buckets (area_id, quantity_id, bucket_start_ms, \
                     marked_at_ms, first_marked_at_ms) VALUES ($1, $2, $3, $4, $4) \
                     ON CONFLICT (area_id, quantity_id, bucket_start_ms) DO UPDATE SET \
                     marked_at_ms = excluded.marked_at_ms, \
                     mark_count = pending_buckets.mark_count + 1",
                )
                .bind(area_id)
                .bind(quantity_id)
                .bind(bucket_start_ms)
                .bind(now_ms)
                .execute(&mut *connection)
                .await?;
                Ok(ReviewRecord {
                    id,
                    reading_id,
                    station: found.try_get(3)?,
                    quantity: found.try_get(4)?,
                    observed_at_ms: found.try_get(5)?,
                    decision,
                    note: note.map(str::to_owned),
                    by: by.to_owned(),
                    at_ms: now_ms,
                })
            }

            /// One page of the review log, newest first; the cursor is the last review id shown.
            pub(crate) async fn audit(
                pool: &Pool<$database>,
                filter: &AuditFilter,
                limit: usize,
                before_id: Option<i64>,
            ) -> Result<Page<ReviewRecord, i64>, StoreError> {
                let mut query = QueryBuilder::<$database>::new(
                    "SELECT v.id, v.reading_id, s.key, q.key, r.observed_at_ms, v.decision, \
                     v.note, v.by_token, v.at_ms \
                     FROM reviews v JOIN readings r ON r.id = v.reading_id \
                     JOIN stations s ON s.id = r.station_id \
                     JOIN quantities q ON q.id = r.quantity_id WHERE 1 = 1",
                );
                if let Some(reading_id) = filter.reading_id {
                    query.push(" AND v.reading_id = ").push_bind(reading_id);
                }
                if let Some(station) = &filter.station {
                    query.push(" AND s.key = ").push_bind(station.clone());
                }
                if let Some(from_ms) = filter.from_ms {
                    query.push(" AND v.at_ms >= ").push_bind(from_ms);
                }
                if let Some(to_ms) = filter.to_ms {
                    query.push(" AND v.at_ms < ").push_bind(to_ms);
                }
                if let Some(before_id) = before_id {
                    query.push(" AND v.id < ").push_bind(before_id);
                }
                query
                    .push(" ORDER BY v.id DESC LIMIT ")
                    .push_bind(limit_plus_one(limit));
                let rows = query.build().fetch_all(pool).await?;
                let mut items = Vec::with_capacity(rows.len().min(limit));
                for row in rows.iter().take(limit) {
                    let decision: String = row.try_get(5)?;
                    items.push(ReviewRecord {
                        id: row.try_get(0)?,
                        reading_id: row.try_get(1)?,
                        station: row.try_get(2)?,
                        quantity: row.try_get(3)?,
                        observed_at_ms: row.try_get(4)?,
                        decision: parse_decision(&decision)?,
                        note: row.try_get(6)?,
                        by: row.try_get(7)?,
                        at_ms: row.try_get(8)?,
                    });
                }
                let next_cursor = if rows.len() > limit {
                    items.last().map(|last| last.id)
                } else {
                    None
                };
                Ok(Page { items, next_cursor })
            }

            /// Marks pending every interval of one area (and one quantity, or all) whose start
            /// lies in `[from_ms, to_ms)` and which holds readings, in the caller's transaction.
            pub(crate) async fn mark_for_recompute(
                connection: &mut $connection,
                area: &str,
                quantity: Option<&str>,
                from_ms: i64,
                to_ms: i64,
                now_ms: i64,
            ) -> Result<u64, AttemptError> {
                let found: Option<(i64, i64)> =
                    sqlx::query_as("SELECT id, interval_ms FROM areas WHERE key = $1")
                        .bind(area)
                        .fetch_optional(&mut *connection)
                        .await?;
                let Some((area_id, interval_ms)) = found else {
                    return Err(StoreError::NotFound(format!("unknown area {area}")).into());
                };
                // An interval starting at s holds the readings of [s, s + interval); those whose
                // start lies in [from, to) hold exactly the readings of [first start at or after
                // from, first start at or after to).
                let first_ms = first_bucket_at_or_after(from_ms, interval_ms);
                let end_ms = first_bucket_at_or_after(to_ms, interval_ms);
                if first_ms >= end_ms {
                    return Ok(0);
                }
                // The Euclidean remainder (`%` truncates towards zero in both dialects) keeps the
                // starts of intervals before 1970 aligned exactly as `bucket_start_ms` aligns them.
                let mut statement = QueryBuilder::<$database>::new(
                    "INSERT INTO pending_buckets (area_id, quantity_id, bucket_start_ms, \
                     marked_at_ms, first_marked_at_ms) SELECT DISTINCT s.area_id, r.quantity_id, \
                     r.observed_at_ms - \
                     ((r.observed_at_ms % ",
                );
                statement
                    .push_bind(interval_ms)
                    .push(") + ")
                    .push_bind(interval_ms)
                    .push(") % ")
                    .push_bind(interval_ms)
                    .push(", ")
                    .push_bind(now_ms)
                    .push(", ")
                    .push_bind(now_ms)
                    .push(" FROM readings r JOIN stations s ON s.id = r.station_id")
                    .push(" WHERE s.area_id = ")
                    .push_bind(area_id)
                    .push(" AND r.observed_at_ms >= ")
                    .push_bind(first_ms)
                    .push(" AND r.observed_at_ms < ")
                    .push_bind(end_ms);
                if let Some(quantity) = quantity {
                    statement
                        .push(" AND r.quantity_id = (SELECT id FROM quantities WHERE key = ")
                        .push_bind(quantity.to_owned())
                        .push(")");
                }
                // Sorted like the batches' bucket upserts, so that concurrent writers lock
                // pending rows in the same order.
                statement.push(
                    " ORDER BY 1, 2, 3 \
                     ON CONFLICT (area_id, quantity_id, bucket_start_ms) DO UPDATE SET \
                     marked_at_ms = excluded.marked_at_ms, \
                     mark_count = pending_buckets.mark_count + 1",
                );
                let marked = statement
                    .build()
                    .execute(&mut *connection)
                    .await?
                    .rows_affected();
                Ok(marked)
            }

            /// The time of the most recent computation of any interval.
            pub(crate) async fn last_computed_at(
                pool: &Pool<$database>,
            ) -> Result<Option<i64>, StoreError> {
                let (latest,): (Option<i64>,) =
                    sqlx::query_as("SELECT MAX(computed_at_ms) FROM interval_results")
                        .fetch_one(pool)
                        .await?;
                Ok(latest)
            }

            /// The station's value and its area's median in the latest result of each interval
            /// with a start in `[from_ms, to_ms)` where both exist, oldest first. The intervals
            /// are those of the station's current area.
            pub(crate) async fn station_residuals(
                pool: &Pool<$database>,
                station: &str,
                quantity: &str,
                from_ms: i64,
                to_ms: i64,
            ) -> Result<Vec<StationResidual>, StoreError> {
                let rows = sqlx::query(
                    "SELECT l.bucket_start_ms, v.value, ir.median, v.used \
                     FROM stations s \
                     JOIN interval_latest l ON l.area_id = s.area_id \
                     JOIN interval_results ir ON ir.id = l.result_id \
                     JOIN interval_station_values v ON v.result_id = l.result_id \
                     AND v.station_id = s.id \
                     WHERE s.key = $1 \
                     AND l.quantity_id = (SELECT id FROM quantities WHERE key = $2) \
                     AND l.bucket_start_ms >= $3 AND l.bucket_start_ms < $4 \
                     AND ir.median IS NOT NULL \
                     ORDER BY l.bucket_start_ms",
                )
                .bind(station)
                .bind(quantity)
                .bind(from_ms)
                .bind(to_ms)
                .fetch_all(pool)
                .await?;
                let mut residuals = Vec::with_capacity(rows.len());
                for row in &rows {
                    residuals.push(StationResidual {
                        bucket_start_ms: row.try_get(0)?,
                        station_value: row.try_get(1)?,
                        area_median: row.try_get(2)?,
                        used: row.try_get(3)?,
                    });
                }
                Ok(residuals)
            }

            /// How many current readings of one station and quantity were observed in
            /// `[from_ms, to_ms)`, and how many of them the latest results set aside.
            pub(crate) async fn station_reading_counts(
                pool: &Pool<$database>,
                station: &str,
                quantity: &str,
                from_ms: i64,
                to_ms: i64,
            ) -> Result<ReadingCounts, StoreError> {
                let (readings,): (i64,) = sqlx::query_as(
                    "SELECT COUNT(*) FROM readings r \
                     WHERE r.station_id = (SELECT id FROM stations WHERE key = $1) \
                     AND r.quantity_id = (SELECT id FROM quantities WHERE key = $2) \
                     AND r.observed_at_ms >= $3 AND r.observed_at_ms < $4 \
                     AND NOT EXISTS (SELECT 1 FROM readings newer \
                     WHERE newer.observed_at_ms = r.observed_at_ms \
                     AND newer.station_id = r.station_id \
                     AND newer.quantity_id = r.quantity_id AND newer.revision > r.revision)",
                )
                .bind(station)
                .bind(quantity)
                .bind(from_ms)
                .bind(to_ms)
                .fetch_one(pool)
                .await?;
                let (set_aside,): (i64,) = sqlx::query_as(
                    "SELECT COUNT(*) FROM set_aside sa \
                     JOIN interval_latest l ON l.result_id = sa.result_id \
                     WHERE sa.station_id = (SELECT id FROM stations WHERE key = $1) \
                     AND l.quantity_id = (SELECT id FROM quantities WHERE key = $2) \
                     AND sa.observed_at_ms >= $3 AND sa.observed_at_ms < $4",
                )
                .bind(station)
                .bind(quantity)
                .bind(from_ms)
                .bind(to_ms)
                .fetch_one(pool)
                .await?;
                Ok(ReadingCounts {
                    readings: count_u64(readings)?,
                    set_aside: count_u64(set_aside)?,
                })
            }

            /// The observation time of the station's newest reading: the newest of its quantities
            /// ([`crate::results_sql::NEWEST_OF_STATION_AND_QUANTITY`]).
            pub(crate) async fn last_seen(
                pool: &Pool<$database>,
                station: &str,
            ) -> Result<Option<i64>, StoreError> {
                let sql = format!(
                    "SELECT MAX(newest) FROM (SELECT {} AS newest \
                     FROM stations s CROSS JOIN quantities q WHERE s.key = $1) AS per_quantity",
                    crate::results_sql::NEWEST_OF_STATION_AND_QUANTITY
                );
                let (newest,): (Option<i64>,) = sqlx::query_as(&sql)
                .bind(station)
                .fetch_one(pool)
                .await?;
                Ok(newest)
            }

            /// The start of the first interval that begins at or after `time_ms`.
            fn first_bucket_at_or_after(time_ms: i64, interval_ms: i64) -> i64 {
                let start = crate::bucket_start_ms(time_ms, interval_ms);
                if start == time_ms {
                    start
                } else {
                    start.saturating_add(interval_ms)
                }
            }

            fn limit_plus_one(limit: usize) -> i64 {
                i64::try_from(limit).unwrap_or(i64::MAX - 1) + 1
            }

            fn count_u32(count: i64) -> Result<u32, StoreError> {
                u32::try_from(count).map_err(|_| StoreError::Other(format!("bad count {count}")))
            }

            fn count_u64(count: i64) -> Result<u64, StoreError> {
                u64::try_from(count).map_err(|_| StoreError::Other(format!("bad count {count}")))
            }

            fn parse_status(text: &str) -> Result<Status, StoreError> {
                [Status::NoData, Status::FewStations, Status::Ok]
                    .into_iter()
                    .find(|status| status.as_str() == text)
                    .ok_or_else(|| StoreError::Other(format!("unknown status {text}")))
            }

            fn parse_decision(text: &str) -> Result<ReviewDecision, StoreError> {
                ReviewDecision::parse(text)
                    .ok_or_else(|| StoreError::Other(format!("unknown decision {text}")))
            }
        }
    };
}

pub(crate) use result_queries;

/// The `Store` methods of the consensus side that only open a transaction (with the backend's
/// `begin_write`) or take the pool and call the shared queries; expanded inside each backend's
/// `impl Store`, next to its own `claim_buckets`.
macro_rules! result_store_methods {
    () => {
        async fn store_result(
            &self,
            bucket: &crate::ClaimedBucket,
            outcome: &consensor_core::checks::IntervalOutcome,
            station_ids: &[i64],
            reasons: &[String],
            now_ms: i64,
        ) -> Result<crate::StoredResult, StoreError> {
            let one = [crate::ResultToStore {
                bucket,
                outcome,
                station_ids,
                reasons,
            }];
            let mut stored = self.store_results(&one, now_ms).await?;
            stored
                .pop()
                .ok_or_else(|| StoreError::Other("no result stored".to_owned()))
        }

        async fn release_claims(&self, worker: &str) -> Result<u64, StoreError> {
            Ok(sqlx::query(
                "UPDATE pending_buckets SET claimed_by = NULL, claimed_at_ms = NULL \
                 WHERE claimed_by = $1",
            )
            .bind(worker)
            .execute(&self.pool)
            .await?
            .rows_affected())
        }

        async fn claim_interval_of_reading(
            &self,
            reading_id: i64,
            worker: &str,
            now_ms: i64,
            stale_after_ms: i64,
        ) -> Result<crate::IntervalClaim, StoreError> {
            results_shared::claim_interval_of_reading(
                &self.pool,
                reading_id,
                worker,
                now_ms,
                stale_after_ms,
            )
            .await
        }

        async fn store_results(
            &self,
            results: &[crate::ResultToStore<'_>],
            now_ms: i64,
        ) -> Result<Vec<crate::StoredResult>, StoreError> {
            if results.is_empty() {
                return Ok(Vec::new());
            }
            let rows: usize = results
                .iter()
                .map(|r| 1 + r.outcome.set_aside.len() + r.outcome.station_values.len())
                .sum();
            let _pass = self.write_pass(rows).await;
            crate::batch::with_retries(|| async {
                let mut tx = self.begin_write().await?;
                let stored = results_shared::store_results(&mut tx, results, now_ms).await?;
                tx.commit().await?;
                Ok(stored)
            })
            .await
        }

        async fn series(
            &self,
            area: &str,
            quantity: &str,
            from_ms: i64,
            to_ms: i64,
        ) -> Result<Vec<crate::ResultRow>, StoreError> {
            results_shared::series(&self.pool, area, quantity, from_ms, to_ms).await
        }

        async fn latest(
            &self,
            area: &str,
            quantity: &str,
        ) -> Result<Option<crate::ResultRow>, StoreError> {
            results_shared::latest(&self.pool, area, quantity).await
        }

        async fn latest_of_every_area(
            &self,
        ) -> Result<Vec<(String, String, crate::ResultRow)>, StoreError> {
            results_shared::latest_of_every_area(&self.pool).await
        }

        async fn result_revision(
            &self,
            area: &str,
            quantity: &str,
            start_ms: i64,
            revision: Option<i64>,
        ) -> Result<Option<crate::ResultRow>, StoreError> {
            results_shared::result_revision(&self.pool, area, quantity, start_ms, revision).await
        }

        async fn list_set_aside(
            &self,
            filter: &crate::SetAsideFilter,
            limit: usize,
            after: Option<crate::SetAsideCursor>,
        ) -> Result<crate::Page<crate::SetAsideRow, crate::SetAsideCursor>, StoreError> {
            results_shared::list_set_aside(&self.pool, filter, limit, after).await
        }

        async fn review_reading(
            &self,
            reading_id: i64,
            decision: crate::ReviewDecision,
            note: Option<&str>,
            by: &str,
            now_ms: i64,
        ) -> Result<crate::ReviewRecord, StoreError> {
            let mut tx = self.begin_write().await?;
            let record =
                results_shared::review_reading(&mut tx, reading_id, decision, note, by, now_ms)
                    .await?;
            tx.commit().await?;
            Ok(record)
        }

        async fn audit(
            &self,
            filter: &crate::AuditFilter,
            limit: usize,
            before_id: Option<i64>,
        ) -> Result<crate::Page<crate::ReviewRecord, i64>, StoreError> {
            results_shared::audit(&self.pool, filter, limit, before_id).await
        }

        async fn mark_for_recompute(
            &self,
            area: &str,
            quantity: Option<&str>,
            from_ms: i64,
            to_ms: i64,
            now_ms: i64,
        ) -> Result<u64, StoreError> {
            // Retried like a batch: on PostgreSQL the upsert can meet a concurrent batch's locks
            // on the same pending rows and lose a deadlock, which another attempt cures.
            crate::batch::with_retries(|| async {
                let mut tx = self.begin_write().await?;
                let marked = results_shared::mark_for_recompute(
                    &mut tx, area, quantity, from_ms, to_ms, now_ms,
                )
                .await?;
                tx.commit().await?;
                Ok(marked)
            })
            .await
        }

        async fn last_computed_at(&self) -> Result<Option<i64>, StoreError> {
            results_shared::last_computed_at(&self.pool).await
        }

        async fn station_residuals(
            &self,
            station: &str,
            quantity: &str,
            from_ms: i64,
            to_ms: i64,
        ) -> Result<Vec<crate::StationResidual>, StoreError> {
            results_shared::station_residuals(&self.pool, station, quantity, from_ms, to_ms).await
        }

        async fn station_reading_counts(
            &self,
            station: &str,
            quantity: &str,
            from_ms: i64,
            to_ms: i64,
        ) -> Result<crate::ReadingCounts, StoreError> {
            results_shared::station_reading_counts(&self.pool, station, quantity, from_ms, to_ms)
                .await
        }

        async fn last_seen(&self, station: &str) -> Result<Option<i64>, StoreError> {
            results_shared::last_seen(&self.pool, station).await
        }

        async fn newest_observation_by_area(&self) -> Result<Vec<(String, i64)>, StoreError> {
            // The newest of each area's stations and quantities
            // (`results_sql::NEWEST_OF_STATION_AND_QUANTITY`).
            let sql = format!(
                "SELECT a.key, MAX(x.newest) FROM areas a JOIN ( \
                   SELECT s.area_id AS area_id, {} AS newest \
                   FROM stations s CROSS JOIN quantities q) x ON x.area_id = a.id \
                 GROUP BY a.key HAVING MAX(x.newest) IS NOT NULL ORDER BY a.key",
                crate::results_sql::NEWEST_OF_STATION_AND_QUANTITY
            );
            Ok(sqlx::query_as(&sql).fetch_all(&self.pool).await?)
        }
    };
}

pub(crate) use result_store_methods;
