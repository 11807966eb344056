//! One suite of storage behaviours, run against both backends: a real SQLite file in a temporary
//! directory, and a real PostgreSQL server when `CONSENSOR_TEST_POSTGRES_URL` is set (each test gets
//! a fresh database on that server, dropped at the end). Every expected value follows from the
//! test's own setup; the comments say how.

use std::collections::{BTreeSet, HashMap};

use consensor_core::checks::{
    screen_interval, IntervalInput, IntervalOutcome, Point, Rule, Rules, SetAside, StationReadings,
    StationValue, Status,
};
use consensor_store::testing::{revisions_of, TestDatabase};
use consensor_store::{
    AnyStore, AuditFilter, BatchOutcome, ClaimedBucket, NewArea, NewReading, NewStation, NewToken,
    ReadingKey, ResultToStore, ReviewDecision, ReviewState, SetAsideCursor, SetAsideFilter,
    SetAsideRow, Store, StoreError, StoredReading,
};

/// Ten minutes, the interval of the test area.
const INTERVAL_MS: i64 = 600_000;
/// 2026-05-28T20:30:00Z, a multiple of INTERVAL_MS (1_780_000_200_000 = 2_966_667 × 600_000), so
/// it starts a bucket.
const BASE_MS: i64 = 1_780_000_200_000;
/// The ingest time the tests pass as `now_ms`.
const NOW_MS: i64 = BASE_MS + 3_600_000;

/// Runs raw SQL (which may hold several statements) on whichever backend the store uses.
async fn execute_raw(store: &AnyStore, sqlite_sql: &str, postgres_sql: &str) {
    try_execute_raw(store, sqlite_sql, postgres_sql)
        .await
        .expect("raw SQL");
}

/// [`execute_raw`], giving back the database's error instead of failing the test.
async fn try_execute_raw(
    store: &AnyStore,
    sqlite_sql: &str,
    postgres_sql: &str,
) -> Result<(), sqlx::Error> {
    match store {
        AnyStore::Sqlite(sqlite) => sqlx::raw_sql(sqlite_sql)
            .execute(sqlite.pool())
            .await
            .map(|_| ()),
        AnyStore::Postgres(postgres) => sqlx::raw_sql(postgres_sql)
            .execute(postgres.pool())
            .await
            .map(|_| ()),
    }
}

/// Runs the same `query_as` on either backend's pool.
macro_rules! fetch_all_raw {
    ($store:expr, $row:ty, $sql:expr) => {
        match $store {
            AnyStore::Sqlite(sqlite) => sqlx::query_as::<_, $row>($sql)
                .fetch_all(sqlite.pool())
                .await
                .expect("query"),
            AnyStore::Postgres(postgres) => sqlx::query_as::<_, $row>($sql)
                .fetch_all(postgres.pool())
                .await
                .expect("query"),
        }
    };
}

/// Generates one test per backend for each named case. Every case gets a store on a fresh
/// database (an SQLite file that does not exist yet, or a new database on the PostgreSQL server) and
/// the database itself, for cases that open a second store on it. The runtime has two worker
/// threads so that the concurrency cases really run their tasks in parallel.
macro_rules! on_both_backends {
    ($($case:ident),* $(,)?) => {
        mod sqlite_backend {
            use super::Store;
            $(
                #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
                async fn $case() {
                    let database = super::TestDatabase::sqlite();
                    let store = database.open().await;
                    super::$case(&store, &database).await;
                    store.close().await;
                    database.finish().await;
                }
            )*
        }
        mod postgres_backend {
            use super::Store;
            $(
                #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
                async fn $case() {
                    let Some(database) = super::TestDatabase::postgres().await else {
                        return;
                    };
                    let store = database.open().await;
                    super::$case(&store, &database).await;
                    store.close().await;
                    database.finish().await;
                }
            )*
        }
    };
}

on_both_backends!(
    ping_reports_ready,
    durability_settings_are_in_force,
    area_and_station_upserts_report_creation,
    station_keys_lookup_resolves_a_batch,
    same_batch_twice_is_stored_once,
    a_large_interleaved_batch_keeps_every_column_of_every_reading,
    changed_value_is_a_revision_and_the_old_one_stays_readable,
    repeated_key_within_one_batch,
    each_key_of_a_resent_batch_meets_its_own_current_revision,
    unknown_station_refuses_the_whole_batch,
    failure_midway_through_a_batch_stores_nothing,
    pending_buckets_are_marked_with_interval_starts,
    a_batch_after_a_change_of_the_network_marks_the_intervals_of_the_new_network,
    concurrent_identical_batches_store_each_reading_once,
    concurrent_small_batches_are_answered_each_on_its_own,
    tokens_insert_find_and_revoke,
    claim_then_store_result_removes_the_bucket,
    a_late_reading_marks_again_the_computed_intervals_it_reaches,
    bucket_marked_again_during_computation_stays_pending,
    a_batch_of_results_gives_each_interval_its_own_revision_records_and_values,
    stale_claim_is_taken_over_and_fresh_one_is_not,
    concurrent_claimers_never_share_a_bucket,
    load_interval_returns_current_readings_by_station,
    result_revisions_grow_and_earlier_ones_stay_readable,
    series_latest_and_result_revision,
    set_aside_listing_filters_and_pages,
    reviews_are_audited_and_mark_the_interval_again,
    mark_for_recompute_counts_intervals_with_readings,
    station_health_figures,
    real_interval_decision_round_trip,
    oldest_pending_mark_gives_the_worker_lag,
    pool_status_counts_open_idle_and_max,
    open_intervals_wait_for_their_refresh_and_released_claims_return,
    ended_intervals_wait_until_their_marks_settle,
    newest_observation_of_each_area_across_stations_and_quantities,
    the_readings_key_is_station_first_and_unique,
);

/// Migrations 0005 (SQLite) and 0006 (PostgreSQL): the readings' one unique key is
/// (station, quantity, observed_at, revision). It refuses a second row of a key whichever
/// connection writes it, and a station's newest reading is found across its quantities.
async fn the_readings_key_is_station_first_and_unique(store: &AnyStore, _database: &TestDatabase) {
    network_of(store, 3).await;
    // ST-1: air temperature at minutes 0 and 1, humidity at minute 5 (its newest, in its second
    // quantity); ST-2: air temperature at minute 2; ST-3 is known but has sent nothing.
    let batch = [
        reading("ST-1", "air_temperature", BASE_MS, 14.0),
        reading("ST-1", "air_temperature", BASE_MS + 60_000, 14.1),
        reading("ST-1", "relative_humidity", BASE_MS + 300_000, 71.0),
        reading("ST-2", "air_temperature", BASE_MS + 120_000, 13.9),
    ];
    store.insert_batch(&batch, NOW_MS).await.expect("batch");
    assert_eq!(
        store.last_seen("ST-1").await.expect("last seen"),
        Some(BASE_MS + 300_000)
    );
    assert_eq!(
        store.last_seen("ST-2").await.expect("last seen"),
        Some(BASE_MS + 120_000)
    );
    assert_eq!(store.last_seen("ST-3").await.expect("last seen"), None);

    // A copy of ST-1's first reading with another value but the same key, written past the store:
    // the key itself refuses it. The same copy as revision 1 is another key and is taken.
    let copy = |revision: &str| {
        format!(
            "INSERT INTO readings (observed_at_ms, station_id, quantity_id, revision, value, \
             value_as_sent, unit_as_sent, received_at_ms) \
             SELECT observed_at_ms, station_id, quantity_id, {revision}, value + 1, \
             value_as_sent, unit_as_sent, received_at_ms FROM readings \
             WHERE observed_at_ms = {BASE_MS} AND revision = 0"
        )
    };
    let refused = try_execute_raw(store, &copy("revision"), &copy("revision"))
        .await
        .expect_err("a second row of the same key");
    let refused = refused
        .as_database_error()
        .expect("the database's own error");
    assert!(refused.is_unique_violation(), "{refused}");
    try_execute_raw(store, &copy("1"), &copy("1"))
        .await
        .expect("another revision is another key");
    let revisions = revisions_of(store, "ST-1", "air_temperature", BASE_MS).await;
    let values: Vec<(i64, Option<f64>)> = revisions
        .iter()
        .map(|stored| (stored.revision, stored.value))
        .collect();
    assert_eq!(values, vec![(0, Some(14.0)), (1, Some(15.0))]);
}

/// The oldest mark among the pending buckets, which the metrics endpoint turns into the worker's
/// lag. Every expected time is one of the `now_ms` values the test passes.
async fn oldest_pending_mark_gives_the_worker_lag(store: &AnyStore, _database: &TestDatabase) {
    network(store).await;
    // Nothing pending: no lag to report.
    assert_eq!(store.oldest_pending_marked_at().await.expect("empty"), None);
    // Two buckets marked 5 s apart: the older mark is the oldest.
    store
        .insert_batch(&[reading("ST-1", "air_temperature", BASE_MS, 10.0)], NOW_MS)
        .await
        .expect("first bucket");
    store
        .insert_batch(
            &[reading(
                "ST-1",
                "air_temperature",
                BASE_MS + INTERVAL_MS,
                10.0,
            )],
            NOW_MS + 5_000,
        )
        .await
        .expect("second bucket");
    assert_eq!(
        store.oldest_pending_marked_at().await.expect("two"),
        Some(NOW_MS)
    );
    // A duplicate marks nothing, so the oldest mark stays.
    store
        .insert_batch(
            &[reading("ST-1", "air_temperature", BASE_MS, 10.0)],
            NOW_MS + 7_000,
        )
        .await
        .expect("duplicate");
    assert_eq!(
        store
            .oldest_pending_marked_at()
            .await
            .expect("after duplicate"),
        Some(NOW_MS)
    );
    // A revision marks the first bucket again with its own time, so the second bucket now holds
    // the oldest change still waiting.
    store
        .insert_batch(
            &[reading("ST-1", "air_temperature", BASE_MS, 11.0)],
            NOW_MS + 9_000,
        )
        .await
        .expect("revision");
    assert_eq!(
        store
            .oldest_pending_marked_at()
            .await
            .expect("after revision"),
        Some(NOW_MS + 5_000)
    );
    // A claim does not change the marks: a bucket being computed is still waiting.
    let claimed = claim_all(store, NOW_MS + 10_000).await;
    assert_eq!(claimed.len(), 2);
    assert_eq!(
        store.oldest_pending_marked_at().await.expect("claimed"),
        Some(NOW_MS + 5_000)
    );
    // Storing the older bucket's result removes it; the other one's mark is then the oldest.
    let ids = station_ids(store).await;
    let second = &claimed[&(
        "north-basin".to_owned(),
        "air_temperature".to_owned(),
        BASE_MS + INTERVAL_MS,
    )];
    let done = store_outcome(
        store,
        second,
        &outcome(point(Some(10.0), 1, 0), Vec::new(), Vec::new()),
        &[ids["ST-1"], ids["ST-2"]],
        NOW_MS + 11_000,
    )
    .await;
    assert!(done.bucket_done);
    assert_eq!(
        store.oldest_pending_marked_at().await.expect("one left"),
        Some(NOW_MS + 9_000)
    );
}

/// The pool snapshot behind the metrics endpoint's pool gauges.
async fn pool_status_counts_open_idle_and_max(store: &AnyStore, _database: &TestDatabase) {
    // The test databases open with the default options (testing.rs): at most 8 connections.
    let max = consensor_store::StoreOptions::default().max_connections;
    store.ping().await.expect("ping");
    let status = store.pool_status();
    assert_eq!(status.max, max);
    assert!(status.open >= 1 && status.open <= max, "{status:?}");
    assert!(status.idle <= status.open, "{status:?}");
    // A connection held outside the pool is open and not idle.
    let held = match store {
        AnyStore::Sqlite(sqlite) => {
            let connection = sqlite.pool().acquire().await.expect("acquire");
            let status = store.pool_status();
            drop(connection);
            status
        }
        AnyStore::Postgres(postgres) => {
            let connection = postgres.pool().acquire().await.expect("acquire");
            let status = store.pool_status();
            drop(connection);
            status
        }
    };
    assert!(held.open >= 1, "{held:?}");
    assert!(held.open - held.idle >= 1, "{held:?}");
}

/// Creates area `north-basin` (10-minute intervals) with stations ST-1 and ST-2.
async fn network(store: &AnyStore) {
    store
        .upsert_area(&NewArea {
            key: "north-basin".to_owned(),
            name: "North basin".to_owned(),
            interval_ms: INTERVAL_MS,
        })
        .await
        .expect("area");
    for key in ["ST-1", "ST-2"] {
        store
            .upsert_station(&station(key, "north-basin"))
            .await
            .expect("station");
    }
}

/// A second area, east-rise, with one station, ST-9.
async fn east_rise_with_st9(store: &AnyStore) {
    store
        .upsert_area(&NewArea {
            key: "east-rise".to_owned(),
            name: "East rise".to_owned(),
            interval_ms: INTERVAL_MS,
        })
        .await
        .expect("area");
    store
        .upsert_station(&station("ST-9", "east-rise"))
        .await
        .expect("station");
}

fn station(key: &str, area: &str) -> NewStation {
    NewStation {
        key: key.to_owned(),
        area_key: area.to_owned(),
        name: format!("mast {key}"),
        lat: Some(52.1),
        lon: Some(4.3),
        elevation_m: None,
    }
}

fn reading(station: &str, quantity: &str, observed_at_ms: i64, value: f64) -> NewReading {
    NewReading {
        station: station.to_owned(),
        quantity: quantity.to_owned(),
        observed_at_ms,
        value: Some(value),
        value_as_sent: Some(value),
        unit_as_sent: Some("Cel".to_owned()),
    }
}

/// Two stations × three consecutive minutes of air temperature: six distinct keys.
fn six_readings() -> Vec<NewReading> {
    let mut readings = Vec::new();
    for minute in 0..3 {
        for (index, station) in ["ST-1", "ST-2"].into_iter().enumerate() {
            readings.push(reading(
                station,
                "air_temperature",
                BASE_MS + minute * 60_000,
                13.0 + minute as f64 + index as f64 / 10.0,
            ));
        }
    }
    readings
}

async fn ping_reports_ready(store: &AnyStore, _database: &TestDatabase) {
    // connect() ran the migrations, so the readiness check must pass.
    store.ping().await.expect("ping");
}

async fn durability_settings_are_in_force(store: &AnyStore, _database: &TestDatabase) {
    match store {
        AnyStore::Sqlite(sqlite) => {
            let mut connection = sqlite.pool().acquire().await.expect("connection");
            let (synchronous,): (i64,) = sqlx::query_as("PRAGMA synchronous")
                .fetch_one(&mut *connection)
                .await
                .expect("pragma");
            // SQLite reports synchronous as a number: 2 is FULL (sqlite.org/pragma.html).
            assert_eq!(synchronous, 2);
            let (journal_mode,): (String,) = sqlx::query_as("PRAGMA journal_mode")
                .fetch_one(&mut *connection)
                .await
                .expect("pragma");
            assert_eq!(journal_mode, "wal");
            let (foreign_keys,): (i64,) = sqlx::query_as("PRAGMA foreign_keys")
                .fetch_one(&mut *connection)
                .await
                .expect("pragma");
            assert_eq!(foreign_keys, 1);
            let (busy_timeout,): (i64,) = sqlx::query_as("PRAGMA busy_timeout")
                .fetch_one(&mut *connection)
                .await
                .expect("pragma");
            // StoreOptions::default() sets a 5-second busy timeout; the pragma reports milliseconds.
            assert_eq!(busy_timeout, 5_000);
        }
        AnyStore::Postgres(postgres) => {
            // A commit is durable only if it waits for its WAL flush and the server really syncs.
            for (setting, expected) in [("synchronous_commit", "on"), ("fsync", "on")] {
                let (value,): (String,) = sqlx::query_as(&format!("SHOW {setting}"))
                    .fetch_one(postgres.pool())
                    .await
                    .expect("show");
                assert_eq!(value, expected, "{setting}");
            }
        }
    }
}

async fn area_and_station_upserts_report_creation(store: &AnyStore, _database: &TestDatabase) {
    let area = NewArea {
        key: "north-basin".to_owned(),
        name: "North basin".to_owned(),
        interval_ms: INTERVAL_MS,
    };
    let first = store.upsert_area(&area).await.expect("create area");
    // The key was unknown, so this call created the area.
    assert!(first.created);
    let renamed = NewArea {
        name: "Northern basin".to_owned(),
        interval_ms: 2 * INTERVAL_MS,
        ..area
    };
    let second = store.upsert_area(&renamed).await.expect("update area");
    // Same key again: an update of the same row.
    assert!(!second.created);
    assert_eq!(second.id, first.id);
    let areas = store.list_areas().await.expect("list areas");
    assert_eq!(areas.len(), 1);
    assert_eq!(areas[0].name, "Northern basin");
    assert_eq!(areas[0].interval_ms, 2 * INTERVAL_MS);

    let created = store
        .upsert_station(&station("ST-1", "north-basin"))
        .await
        .expect("create station");
    assert!(created.created);
    let moved = NewStation {
        elevation_m: Some(12.0),
        ..station("ST-1", "north-basin")
    };
    let updated = store.upsert_station(&moved).await.expect("update station");
    assert!(!updated.created);
    assert_eq!(updated.id, created.id);
    let stations = store.list_stations().await.expect("list stations");
    assert_eq!(stations.len(), 1);
    assert_eq!(stations[0].area_key, "north-basin");
    assert_eq!(stations[0].area_id, first.id);
    assert_eq!(stations[0].elevation_m, Some(12.0));
    assert_eq!(stations[0].lat, Some(52.1));

    // No area "south" was created, so the station cannot be placed in it.
    let error = store
        .upsert_station(&station("ST-9", "south"))
        .await
        .expect_err("unknown area");
    assert!(matches!(error, StoreError::NotFound(_)), "{error:?}");
}

async fn station_keys_lookup_resolves_a_batch(store: &AnyStore, _database: &TestDatabase) {
    network(store).await;
    let stations = store.list_stations().await.expect("stations");
    let keys = vec!["ST-2".to_owned(), "ST-404".to_owned(), "ST-1".to_owned()];
    let found = store.station_keys_lookup(&keys).await.expect("lookup");
    // Two of the three keys were created by network(); ST-404 never was.
    assert_eq!(found.len(), 2);
    assert!(!found.contains_key("ST-404"));
    for stored in &stations {
        let resolved = found[&stored.key];
        assert_eq!(resolved.station_id, stored.id);
        assert_eq!(resolved.area_id, stored.area_id);
        assert_eq!(resolved.interval_ms, INTERVAL_MS);
    }
}

async fn same_batch_twice_is_stored_once(store: &AnyStore, _database: &TestDatabase) {
    network(store).await;
    let batch = six_readings();
    let first = store.insert_batch(&batch, NOW_MS).await.expect("first");
    // Six distinct keys, none stored before.
    assert_eq!(
        first,
        BatchOutcome {
            accepted: 6,
            duplicates: 0,
            revised: 0
        }
    );
    let second = store
        .insert_batch(&batch, NOW_MS + 1)
        .await
        .expect("second");
    // Every reading repeats a stored one exactly.
    assert_eq!(
        second,
        BatchOutcome {
            accepted: 0,
            duplicates: 6,
            revised: 0
        }
    );
    assert_eq!(store.count_readings().await.expect("count"), 6);
    let history = store
        .readings_history("ST-1", "air_temperature", BASE_MS, BASE_MS + 3 * 60_000)
        .await
        .expect("history");
    // ST-1 has one reading per minute for minutes 0, 1 and 2, stored with the first batch's time.
    let times: Vec<i64> = history.iter().map(|r| r.observed_at_ms).collect();
    assert_eq!(times, vec![BASE_MS, BASE_MS + 60_000, BASE_MS + 120_000]);
    assert!(history.iter().all(|r| r.revision == 0));
    assert!(history.iter().all(|r| r.received_at_ms == NOW_MS));
    assert_eq!(history[1].value, Some(14.0));
    // `to` is exclusive: a window ending at minute 2 leaves minute 2 out.
    let window = store
        .readings_history("ST-1", "air_temperature", BASE_MS, BASE_MS + 120_000)
        .await
        .expect("window");
    assert_eq!(window.len(), 2);
}

/// A batch of 151 readings, three stations interleaved minute by minute as a gateway sends them:
/// more than two of the SQLite writer's 64-row statements and a remainder inserted row by row
/// (`sqlite_write.rs`, `insert_rows`). Every reading comes back from the store with every column
/// as sent, missing values and units included, and the last reading, which changes a key sent
/// earlier in the same batch, is its revision 1.
async fn a_large_interleaved_batch_keeps_every_column_of_every_reading(
    store: &AnyStore,
    _database: &TestDatabase,
) {
    network_of(store, 3).await;
    let mut batch = Vec::new();
    for minute in 0..50_i64 {
        for index in 1..=3_i64 {
            // Every seventh reading has no value (a station's missing-data code converted to
            // null), every fifth has no unit; the value as sent is in kelvin where the unit says so.
            let n = minute * 3 + index;
            let celsius = 10.0 + n as f64 / 8.0;
            let (value, value_as_sent, unit) = match (n % 7 == 0, n % 5 == 0) {
                (true, _) => (None, Some(-999.0), Some("Cel")),
                (false, true) => (Some(celsius), Some(celsius), None),
                (false, false) if n % 2 == 0 => (Some(celsius), Some(celsius + 273.15), Some("K")),
                (false, false) => (Some(celsius), Some(celsius), Some("Cel")),
            };
            batch.push(NewReading {
                station: format!("ST-{index}"),
                quantity: "air_temperature".to_owned(),
                observed_at_ms: BASE_MS + minute * 60_000,
                value,
                value_as_sent,
                unit_as_sent: unit.map(str::to_owned),
            });
        }
    }
    let changed = NewReading {
        value: Some(99.5),
        value_as_sent: Some(99.5),
        ..batch[4].clone()
    };
    batch.push(changed.clone());
    let outcome = store.insert_batch(&batch, NOW_MS).await.expect("batch");
    assert_eq!(
        outcome,
        BatchOutcome {
            accepted: 151,
            duplicates: 0,
            revised: 1
        }
    );
    assert_eq!(store.count_readings().await.expect("count"), 151);
    for index in 1..=3 {
        let station = format!("ST-{index}");
        let history = store
            .readings_history(&station, "air_temperature", BASE_MS, BASE_MS + 50 * 60_000)
            .await
            .expect("history");
        // The current reading of each key: the last one sent for it.
        let current: std::collections::BTreeMap<i64, &NewReading> = batch
            .iter()
            .filter(|r| r.station == station)
            .map(|r| (r.observed_at_ms, r))
            .collect();
        assert_eq!(history.len(), 50, "{station}");
        for (stored, sent) in history.iter().zip(current.values()) {
            assert_eq!(
                (
                    stored.observed_at_ms,
                    stored.value,
                    stored.value_as_sent,
                    stored.unit_as_sent.as_deref(),
                    stored.received_at_ms,
                ),
                (
                    sent.observed_at_ms,
                    sent.value,
                    sent.value_as_sent,
                    sent.unit_as_sent.as_deref(),
                    NOW_MS,
                ),
                "{station}"
            );
        }
    }
    let revisions = revisions_of(store, "ST-2", "air_temperature", changed.observed_at_ms).await;
    let values: Vec<(i64, Option<f64>)> = revisions
        .iter()
        .map(|stored| (stored.revision, stored.value))
        .collect();
    assert_eq!(values, vec![(0, batch[4].value), (1, Some(99.5))]);
}

async fn changed_value_is_a_revision_and_the_old_one_stays_readable(
    store: &AnyStore,
    _database: &TestDatabase,
) {
    network(store).await;
    let original = reading("ST-1", "air_temperature", BASE_MS, 13.9);
    store
        .insert_batch(std::slice::from_ref(&original), NOW_MS)
        .await
        .expect("original");
    let corrected = NewReading {
        value: Some(14.2),
        value_as_sent: Some(14.2),
        ..original.clone()
    };
    let outcome = store
        .insert_batch(std::slice::from_ref(&corrected), NOW_MS + 1_000)
        .await
        .expect("correction");
    // Same key, different value: one new row, which is a revision.
    assert_eq!(
        outcome,
        BatchOutcome {
            accepted: 1,
            duplicates: 0,
            revised: 1
        }
    );
    let key = ReadingKey {
        station: "ST-1".to_owned(),
        quantity: "air_temperature".to_owned(),
        observed_at_ms: BASE_MS,
    };
    let revisions = store.reading_revisions(&key).await.expect("revisions");
    let values: Vec<(i64, Option<f64>, i64)> = revisions
        .iter()
        .map(|r| (r.revision, r.value, r.received_at_ms))
        .collect();
    // Nothing was overwritten: revision 0 keeps the first value and its arrival time.
    assert_eq!(
        values,
        vec![(0, Some(13.9), NOW_MS), (1, Some(14.2), NOW_MS + 1_000)]
    );
    let history = store
        .readings_history("ST-1", "air_temperature", BASE_MS, BASE_MS + 1)
        .await
        .expect("history");
    // The current value of the key is its highest revision.
    assert_eq!(history.len(), 1);
    assert_eq!(history[0].revision, 1);
    assert_eq!(history[0].value, Some(14.2));

    // A unit now given where none was is a change of what was sent, hence another revision.
    let with_other_unit = NewReading {
        unit_as_sent: None,
        ..corrected.clone()
    };
    let outcome = store
        .insert_batch(&[with_other_unit.clone(), with_other_unit], NOW_MS + 2_000)
        .await
        .expect("unit change");
    // The first copy is revision 2; the second repeats it within the batch and is a duplicate.
    assert_eq!(
        outcome,
        BatchOutcome {
            accepted: 1,
            duplicates: 1,
            revised: 1
        }
    );
    // Three revisions of one key are three stored rows.
    assert_eq!(store.count_readings().await.expect("count"), 3);
}

async fn repeated_key_within_one_batch(store: &AnyStore, _database: &TestDatabase) {
    network(store).await;
    let first = reading("ST-2", "dew_point", BASE_MS, 5.0);
    let changed = reading("ST-2", "dew_point", BASE_MS, 5.5);
    let missing = NewReading {
        value: None,
        value_as_sent: None,
        unit_as_sent: None,
        ..reading("ST-2", "dew_point", BASE_MS + 60_000, 0.0)
    };
    let batch = vec![
        first.clone(),
        first,
        changed,
        missing.clone(),
        missing.clone(),
    ];
    let outcome = store.insert_batch(&batch, NOW_MS).await.expect("batch");
    // Key 1: new, then an identical copy (duplicate), then a change (revision 1). Key 2 has no
    // value at all, twice: null equals null, so the second copy is a duplicate.
    assert_eq!(
        outcome,
        BatchOutcome {
            accepted: 3,
            duplicates: 2,
            revised: 1
        }
    );
    let revisions = revisions_of(store, "ST-2", "dew_point", BASE_MS).await;
    assert_eq!(revisions.len(), 2);
    assert_eq!(revisions[1].value, Some(5.5));
    let again = store
        .insert_batch(&[missing], NOW_MS + 1)
        .await
        .expect("again");
    // The null reading is stored already, so resending it is a duplicate.
    assert_eq!(again.duplicates, 1);
}

/// A resent batch whose keys of one station lie close together (one span of time) and far apart
/// (several spans), with stored readings between them that the batch does not name: each key is
/// judged against its own highest revision, and a stored key the batch leaves out counts for
/// nothing. (The rule is the contract's: same key and same value is a duplicate, a changed value a
/// new revision; API.md, "Ingest".)
async fn each_key_of_a_resent_batch_meets_its_own_current_revision(
    store: &AnyStore,
    _database: &TestDatabase,
) {
    network(store).await;
    const SECOND: i64 = 1_000;
    const MINUTE: i64 = 60 * SECOND;
    let stored = [
        reading("ST-1", "air_temperature", BASE_MS, 13.0),
        reading("ST-1", "air_temperature", BASE_MS + 30 * SECOND, 13.5),
        reading("ST-1", "air_temperature", BASE_MS + 35 * SECOND, 13.7),
        reading("ST-1", "air_temperature", BASE_MS + 10 * MINUTE, 14.0),
        reading("ST-1", "air_temperature", BASE_MS + 20 * MINUTE, 15.0),
        reading("ST-2", "air_temperature", BASE_MS, 20.0),
    ];
    store.insert_batch(&stored, NOW_MS).await.expect("first");
    // A second revision of the key at 30 s.
    let corrected = reading("ST-1", "air_temperature", BASE_MS + 30 * SECOND, 13.6);
    store
        .insert_batch(std::slice::from_ref(&corrected), NOW_MS + 1)
        .await
        .expect("correction");

    let resent = vec![
        // Near one another: 0 s, 30 s and 40 s. The stored key at 35 s is not resent.
        reading("ST-1", "air_temperature", BASE_MS, 13.0),
        corrected.clone(),
        reading("ST-1", "air_temperature", BASE_MS + 40 * SECOND, 13.8),
        // Ten minutes later: a changed value and a new key a second after it.
        reading("ST-1", "air_temperature", BASE_MS + 10 * MINUTE, 14.5),
        reading(
            "ST-1",
            "air_temperature",
            BASE_MS + 10 * MINUTE + SECOND,
            14.1,
        ),
        // Twenty-two minutes: new; the stored key at twenty is not resent.
        reading("ST-1", "air_temperature", BASE_MS + 22 * MINUTE, 15.2),
        // Another station at the same time as the first key.
        reading("ST-2", "air_temperature", BASE_MS, 20.0),
    ];
    let outcome = store
        .insert_batch(&resent, NOW_MS + 2)
        .await
        .expect("resent");
    // Duplicates: 0 s (revision 0), 30 s (its current revision 1, not revision 0) and ST-2.
    // New: 40 s, 10 min + 1 s, 22 min; and 10 min is revised.
    assert_eq!(
        outcome,
        BatchOutcome {
            accepted: 4,
            duplicates: 3,
            revised: 1
        }
    );
    for (at_ms, expected) in [
        (
            BASE_MS + 30 * SECOND,
            vec![(0, Some(13.5)), (1, Some(13.6))],
        ),
        (
            BASE_MS + 10 * MINUTE,
            vec![(0, Some(14.0)), (1, Some(14.5))],
        ),
        (BASE_MS + 35 * SECOND, vec![(0, Some(13.7))]),
    ] {
        let key = ReadingKey {
            station: "ST-1".to_owned(),
            quantity: "air_temperature".to_owned(),
            observed_at_ms: at_ms,
        };
        let revisions = store.reading_revisions(&key).await.expect("revisions");
        let found: Vec<(i64, Option<f64>)> =
            revisions.iter().map(|r| (r.revision, r.value)).collect();
        assert_eq!(found, expected, "{key:?}");
    }
    // 6 + 1 stored before, 4 now.
    assert_eq!(store.count_readings().await.expect("count"), 11);
}

async fn unknown_station_refuses_the_whole_batch(store: &AnyStore, _database: &TestDatabase) {
    network(store).await;
    let batch = vec![
        reading("ST-1", "air_temperature", BASE_MS, 13.0),
        reading("ST-404", "air_temperature", BASE_MS, 13.0),
    ];
    let error = store
        .insert_batch(&batch, NOW_MS)
        .await
        .expect_err("unknown station");
    assert!(matches!(error, StoreError::NotFound(ref message) if message.contains("ST-404")));
    // The batch is atomic: the valid first reading was not stored either.
    assert_eq!(store.count_readings().await.expect("count"), 0);
    assert_eq!(store.count_pending_buckets().await.expect("pending"), 0);
}

/// The value the injected trigger rejects; no other reading of the test carries it.
const POISON: f64 = -12_345.0;

/// Makes the database itself fail on any reading of value [`POISON`], as a constraint or I/O
/// failure would.
async fn inject_failure_trigger(store: &AnyStore) {
    execute_raw(
        store,
        "CREATE TRIGGER inject_failure BEFORE INSERT ON readings WHEN NEW.value = -12345.0 \
         BEGIN SELECT RAISE(ABORT, 'injected failure'); END;",
        "CREATE FUNCTION inject_failure() RETURNS trigger LANGUAGE plpgsql AS $$ \
         BEGIN IF NEW.value = -12345.0 THEN RAISE EXCEPTION 'injected failure'; END IF; \
         RETURN NEW; END $$; \
         CREATE TRIGGER inject_failure BEFORE INSERT ON readings \
         FOR EACH ROW EXECUTE FUNCTION inject_failure();",
    )
    .await;
}

async fn failure_midway_through_a_batch_stores_nothing(store: &AnyStore, _database: &TestDatabase) {
    network(store).await;
    inject_failure_trigger(store).await;
    // 5 000 readings need two INSERT chunks on SQLite (at most 4 095 rows of 8 parameters each fit
    // below its 32 766-parameter limit), so the first chunk is written before the poisoned last
    // reading fails; a new quantity is also added to the quantity table on the way.
    let mut batch: Vec<NewReading> = (0..5_000)
        .map(|i| reading("ST-1", "pm10", BASE_MS + i * 1_000, 20.0))
        .collect();
    batch.push(reading("ST-2", "pm10", BASE_MS, POISON));
    let error = store
        .insert_batch(&batch, NOW_MS)
        .await
        .expect_err("injected failure");
    assert!(
        matches!(error, StoreError::Other(ref message) if message.contains("injected failure")),
        "{error:?}"
    );
    // Nothing of the batch survives: no reading, no pending bucket, no quantity row.
    assert_eq!(store.count_readings().await.expect("count"), 0);
    assert_eq!(store.count_pending_buckets().await.expect("pending"), 0);
    let quantities = fetch_all_raw!(store, (String,), "SELECT key FROM quantities");
    assert!(quantities.is_empty(), "{quantities:?}");

    // Without the poisoned reading the same readings go in, in the same multi-chunk way.
    batch.pop();
    let outcome = store.insert_batch(&batch, NOW_MS).await.expect("clean");
    assert_eq!(outcome.accepted, 5_000);
    assert_eq!(store.count_readings().await.expect("count"), 5_000);
}

/// Many small batches at once (on SQLite they are stored in groups, `commit_group.rs`): each is
/// answered as if it had been stored alone. A batch naming an unknown station and one that the
/// database itself refuses fail on their own; two batches sending the same key count one
/// acceptance and one duplicate, two sending different values for one key one acceptance and one
/// revision, whichever goes first.
async fn concurrent_small_batches_are_answered_each_on_its_own(
    store: &AnyStore,
    _database: &TestDatabase,
) {
    network(store).await;
    inject_failure_trigger(store).await;
    let mut batches: Vec<Vec<NewReading>> = (0..40)
        .map(|minute| {
            let station = if minute % 2 == 0 { "ST-1" } else { "ST-2" };
            vec![reading(
                station,
                "air_temperature",
                BASE_MS + minute * 60_000,
                10.0 + minute as f64,
            )]
        })
        .collect();
    let unknown = batches.len();
    batches.push(vec![reading("ST-404", "air_temperature", BASE_MS, 13.0)]);
    let poisoned = batches.len();
    batches.push(vec![reading("ST-2", "pm10", BASE_MS, POISON)]);
    let same = reading("ST-1", "relative_humidity", BASE_MS, 80.0);
    let shared = batches.len();
    batches.push(vec![same.clone()]);
    batches.push(vec![same]);
    let revised = batches.len();
    batches.push(vec![reading("ST-2", "relative_humidity", BASE_MS, 70.0)]);
    batches.push(vec![reading("ST-2", "relative_humidity", BASE_MS, 71.0)]);

    let tasks: Vec<_> = batches
        .into_iter()
        .enumerate()
        .map(|(index, batch)| {
            let store = store.clone();
            tokio::spawn(async move { store.insert_batch(&batch, NOW_MS + index as i64).await })
        })
        .collect();
    let mut answers = Vec::new();
    for task in tasks {
        answers.push(task.await.expect("task"));
    }

    let one_new = BatchOutcome {
        accepted: 1,
        duplicates: 0,
        revised: 0,
    };
    for answer in &answers[..unknown] {
        assert_eq!(answer.as_ref().expect("a good batch"), &one_new);
    }
    assert!(
        matches!(&answers[unknown], Err(StoreError::NotFound(message)) if message.contains("ST-404")),
        "{:?}",
        answers[unknown]
    );
    assert!(
        matches!(&answers[poisoned], Err(StoreError::Other(message)) if message.contains("injected failure")),
        "{:?}",
        answers[poisoned]
    );
    let sum = |answers: &[Result<BatchOutcome, StoreError>]| {
        answers
            .iter()
            .fold(BatchOutcome::default(), |mut total, answer| {
                let outcome = answer.as_ref().expect("stored");
                total.accepted += outcome.accepted;
                total.duplicates += outcome.duplicates;
                total.revised += outcome.revised;
                total
            })
    };
    assert_eq!(
        sum(&answers[shared..shared + 2]),
        BatchOutcome {
            accepted: 1,
            duplicates: 1,
            revised: 0
        }
    );
    assert_eq!(
        sum(&answers[revised..revised + 2]),
        BatchOutcome {
            accepted: 2,
            duplicates: 0,
            revised: 1
        }
    );
    // 40 readings, one shared key stored once, one key in two revisions.
    assert_eq!(store.count_readings().await.expect("count"), 43);
    // Each reading keeps the arrival time of its own batch.
    let received = fetch_all_raw!(
        store,
        (i64, i64),
        "SELECT observed_at_ms, received_at_ms FROM readings r \
         JOIN quantities q ON q.id = r.quantity_id WHERE q.key = 'air_temperature'"
    );
    assert_eq!(received.len(), 40);
    for (observed_at_ms, received_at_ms) in received {
        assert_eq!(received_at_ms, NOW_MS + (observed_at_ms - BASE_MS) / 60_000);
    }
    // The refused batch left nothing behind, not even its new quantity.
    let quantities = fetch_all_raw!(store, (String,), "SELECT key FROM quantities");
    assert!(
        !quantities.iter().any(|(key,)| key == "pm10"),
        "{quantities:?}"
    );
}

/// A station moved to another area, and an area given another interval, between two batches: the
/// second batch marks the intervals of the network as it is then (the SQLite writer keeps the
/// stations it looked up between transactions and must notice both changes).
async fn a_batch_after_a_change_of_the_network_marks_the_intervals_of_the_new_network(
    store: &AnyStore,
    _database: &TestDatabase,
) {
    network(store).await;
    east_rise_with_st9(store).await;
    const PENDING: &str = "SELECT a.key, p.bucket_start_ms FROM pending_buckets p \
        JOIN areas a ON a.id = p.area_id ORDER BY a.key, p.bucket_start_ms";
    let first = [
        reading("ST-1", "air_temperature", BASE_MS, 10.0),
        reading("ST-9", "air_temperature", BASE_MS, 11.0),
    ];
    store.insert_batch(&first, NOW_MS).await.expect("first");
    assert_eq!(
        fetch_all_raw!(store, (String, i64), PENDING),
        vec![
            ("east-rise".to_owned(), BASE_MS),
            ("north-basin".to_owned(), BASE_MS),
        ]
    );

    // ST-1 moves to east-rise; east-rise's intervals become 5 minutes.
    store
        .upsert_station(&station("ST-1", "east-rise"))
        .await
        .expect("move");
    store
        .upsert_area(&NewArea {
            key: "east-rise".to_owned(),
            name: "East rise".to_owned(),
            interval_ms: 300_000,
        })
        .await
        .expect("interval");
    // 2 h after BASE_MS (a whole number of both intervals) plus 7 minutes: the 5-minute interval
    // that starts at +2 h 5 min, where the 10-minute one would start at +2 h.
    let later = BASE_MS + 2 * 3_600_000 + 7 * 60_000;
    let second = [
        reading("ST-1", "air_temperature", later, 10.5),
        reading("ST-9", "air_temperature", later, 11.5),
    ];
    store
        .insert_batch(&second, NOW_MS + 1)
        .await
        .expect("second");
    assert_eq!(
        fetch_all_raw!(store, (String, i64), PENDING),
        vec![
            ("east-rise".to_owned(), BASE_MS),
            ("east-rise".to_owned(), later - 2 * 60_000),
            ("north-basin".to_owned(), BASE_MS),
        ]
    );
}

async fn pending_buckets_are_marked_with_interval_starts(
    store: &AnyStore,
    _database: &TestDatabase,
) {
    network(store).await;
    let batch = vec![
        // BASE_MS starts a 10-minute bucket; BASE_MS + 599 999 ms is its last millisecond.
        reading("ST-1", "air_temperature", BASE_MS, 10.0),
        reading("ST-2", "air_temperature", BASE_MS + 599_999, 10.0),
        // The next millisecond starts the following bucket.
        reading("ST-1", "air_temperature", BASE_MS + 600_000, 10.0),
        // Another quantity in the first bucket is a bucket of its own.
        reading("ST-1", "relative_humidity", BASE_MS + 30_000, 80.0),
    ];
    store.insert_batch(&batch, NOW_MS).await.expect("batch");
    const PENDING: &str = "SELECT a.key, q.key, p.bucket_start_ms, p.marked_at_ms, p.mark_count \
        FROM pending_buckets p JOIN areas a ON a.id = p.area_id \
        JOIN quantities q ON q.id = p.quantity_id \
        ORDER BY q.key, p.bucket_start_ms";
    type PendingRow = (String, String, i64, i64, i64);
    let pending = fetch_all_raw!(store, PendingRow, PENDING);
    let row = |quantity: &str, start: i64, marked: i64, count: i64| -> PendingRow {
        (
            "north-basin".to_owned(),
            quantity.to_owned(),
            start,
            marked,
            count,
        )
    };
    assert_eq!(
        pending,
        vec![
            row("air_temperature", BASE_MS, NOW_MS, 1),
            row("air_temperature", BASE_MS + INTERVAL_MS, NOW_MS, 1),
            row("relative_humidity", BASE_MS, NOW_MS, 1),
        ]
    );
    assert_eq!(store.count_pending_buckets().await.expect("count"), 3);
    // Claim columns start empty for the worker.
    let claims = fetch_all_raw!(
        store,
        (Option<String>, Option<i64>),
        "SELECT claimed_by, claimed_at_ms FROM pending_buckets"
    );
    assert!(claims.iter().all(|claim| *claim == (None, None)));

    // Resending the batch changes nothing, so no bucket is marked again.
    store
        .insert_batch(&batch, NOW_MS + 5_000)
        .await
        .expect("duplicates");
    assert_eq!(fetch_all_raw!(store, PendingRow, PENDING), pending);

    // A revision in the second bucket marks that bucket again, with the new time.
    let revision = reading("ST-1", "air_temperature", BASE_MS + 600_000, 11.0);
    store
        .insert_batch(&[revision], NOW_MS + 9_000)
        .await
        .expect("revision");
    assert_eq!(
        fetch_all_raw!(store, PendingRow, PENDING),
        vec![
            row("air_temperature", BASE_MS, NOW_MS, 1),
            row("air_temperature", BASE_MS + INTERVAL_MS, NOW_MS + 9_000, 2),
            row("relative_humidity", BASE_MS, NOW_MS, 1),
        ]
    );
}

async fn concurrent_identical_batches_store_each_reading_once(
    store: &AnyStore,
    _database: &TestDatabase,
) {
    network(store).await;
    let batch = six_readings();
    let mut tasks = Vec::new();
    for attempt in 0..4 {
        let store = store.clone();
        let batch = batch.clone();
        tasks.push(tokio::spawn(async move {
            store.insert_batch(&batch, NOW_MS + attempt).await
        }));
    }
    let mut total = BatchOutcome::default();
    for task in tasks {
        let outcome = task.await.expect("task").expect("batch");
        total.accepted += outcome.accepted;
        total.duplicates += outcome.duplicates;
        total.revised += outcome.revised;
    }
    // Four writers race on the same six new keys: whichever order they commit in, each key is
    // stored once and the other three copies of it are duplicates.
    assert_eq!(
        total,
        BatchOutcome {
            accepted: 6,
            duplicates: 18,
            revised: 0
        }
    );
    assert_eq!(store.count_readings().await.expect("count"), 6);
}

async fn tokens_insert_find_and_revoke(store: &AnyStore, _database: &TestDatabase) {
    let token = NewToken {
        id: "tok_1".to_owned(),
        hash: vec![0xAB; 32],
        role: "station".to_owned(),
        label: Some("mast 14".to_owned()),
        stations: vec!["ST-2".to_owned(), "ST-1".to_owned()],
        created_at_ms: NOW_MS,
    };
    store.insert_token(&token).await.expect("insert token");
    let found = store
        .find_token_by_hash(&token.hash)
        .await
        .expect("find")
        .expect("token present");
    assert_eq!(found.id, "tok_1");
    assert_eq!(found.role, "station");
    assert_eq!(found.label.as_deref(), Some("mast 14"));
    // Bindings come back sorted, whatever order they were given in.
    assert_eq!(found.stations, vec!["ST-1".to_owned(), "ST-2".to_owned()]);
    assert_eq!(found.created_at_ms, NOW_MS);
    assert_eq!(found.revoked_at_ms, None);
    // A hash that was never stored finds nothing.
    assert!(store
        .find_token_by_hash(&[0xCD; 32])
        .await
        .expect("find")
        .is_none());

    let same_hash = NewToken {
        id: "tok_2".to_owned(),
        stations: Vec::new(),
        ..token.clone()
    };
    let error = store
        .insert_token(&same_hash)
        .await
        .expect_err("duplicate hash");
    assert!(matches!(error, StoreError::Conflict(_)), "{error:?}");
    let bad_role = NewToken {
        id: "tok_3".to_owned(),
        hash: vec![0x01; 32],
        role: "superuser".to_owned(),
        ..token.clone()
    };
    // The schema allows only the four roles of the HTTP contract.
    assert!(store.insert_token(&bad_role).await.is_err());

    store
        .revoke_token("tok_1", NOW_MS + 1)
        .await
        .expect("revoke");
    // A revoked token stops working at once.
    assert!(store
        .find_token_by_hash(&token.hash)
        .await
        .expect("find")
        .is_none());
    // Revoking twice is harmless; an unknown id is NotFound.
    store
        .revoke_token("tok_1", NOW_MS + 2)
        .await
        .expect("revoke again");
    let error = store
        .revoke_token("tok_unknown", NOW_MS)
        .await
        .expect_err("unknown token");
    assert!(matches!(error, StoreError::NotFound(_)), "{error:?}");
    let revoked_at = fetch_all_raw!(
        store,
        (Option<i64>,),
        "SELECT revoked_at_ms FROM tokens WHERE id = 'tok_1'"
    );
    // The first revocation time is kept.
    assert_eq!(revoked_at, vec![(Some(NOW_MS + 1),)]);
    // Distinct keys everywhere, so a BTreeSet of stations equals the list.
    let bindings = fetch_all_raw!(
        store,
        (String, String),
        "SELECT token_id, station_key FROM token_stations"
    );
    let bound: BTreeSet<String> = bindings.into_iter().map(|(_, key)| key).collect();
    assert_eq!(bound.len(), 2);
}

// ---------------------------------------------------------------------------------------------
// The consensus side: claims, results and their revisions, set-aside records, reviews, recompute
// requests and the station health figures.
// ---------------------------------------------------------------------------------------------

/// How long a claim stays valid in these tests before another worker may take it over.
const STALE_MS: i64 = 60_000;

/// Creates area `north-basin` with stations ST-1 … ST-`count` (10-minute intervals).
async fn network_of(store: &AnyStore, count: usize) {
    store
        .upsert_area(&NewArea {
            key: "north-basin".to_owned(),
            name: "North basin".to_owned(),
            interval_ms: INTERVAL_MS,
        })
        .await
        .expect("area");
    for index in 1..=count {
        store
            .upsert_station(&station(&format!("ST-{index}"), "north-basin"))
            .await
            .expect("station");
    }
}

/// The row ids of the stations by key.
async fn station_ids(store: &AnyStore) -> HashMap<String, i64> {
    store
        .list_stations()
        .await
        .expect("stations")
        .into_iter()
        .map(|station| (station.key, station.id))
        .collect()
}

/// The stored (current) reading of one key.
async fn stored(store: &AnyStore, station: &str, quantity: &str, at_ms: i64) -> StoredReading {
    let mut history = store
        .readings_history(station, quantity, at_ms, at_ms + 1)
        .await
        .expect("history");
    assert_eq!(history.len(), 1, "{station} {quantity} {at_ms}");
    history.remove(0)
}

/// Claims every pending bucket (as worker `w`) and indexes them by (area, quantity, start).
async fn claim_all(store: &AnyStore, now_ms: i64) -> HashMap<(String, String, i64), ClaimedBucket> {
    store
        .claim_buckets("w", now_ms, 1_000, STALE_MS, 0, 0)
        .await
        .expect("claim")
        .into_iter()
        .map(|bucket| {
            (
                (
                    bucket.area_key.clone(),
                    bucket.quantity.clone(),
                    bucket.bucket_start_ms,
                ),
                bucket,
            )
        })
        .collect()
}

/// A `Point` with the given median (and every other estimate derived from it by a fixed offset, so
/// that a test can tell the fields apart after the round trip through the database).
fn point(median: Option<f64>, stations_used: u32, stations_set_aside: u32) -> Point {
    let shifted = |offset: f64| median.map(|m| m + offset);
    Point {
        median,
        median_low: shifted(-0.05),
        median_high: shifted(0.05),
        mean: shifted(0.01),
        mean_all: shifted(2.5),
        mad: median.map(|_| 0.1),
        spread: median.map(|_| 0.148_260_221_850_560_2),
        ci95_low: None,
        ci95_high: None,
        huber: shifted(0.02),
        stations_used,
        stations_set_aside,
        status: if median.is_some() {
            Status::Ok
        } else {
            Status::NoData
        },
    }
}

/// A `far_from_consensus` record for a stored reading of the station with handle `station`.
fn far_record(station: u32, reading: &StoredReading, score: f64) -> SetAside {
    SetAside {
        reading_id: reading.id as u64,
        station,
        observed_at_ms: reading.observed_at_ms,
        value: reading.value,
        value_as_sent: reading.value_as_sent,
        rule: Rule::FarFromConsensus,
        score: Some(score),
        threshold: Some(3.5),
        consensus_median: Some(13.8),
        consensus_spread: Some(0.5),
        gap_ms: None,
        window_readings: None,
        station_value: reading.value,
    }
}

fn outcome(
    point: Point,
    set_aside: Vec<SetAside>,
    station_values: Vec<StationValue>,
) -> IntervalOutcome {
    IntervalOutcome {
        point,
        set_aside,
        station_values,
    }
}

/// One reason per record, numbered so that a test can check which reason went with which record.
fn reasons_for(outcome: &IntervalOutcome) -> Vec<String> {
    outcome
        .set_aside
        .iter()
        .map(|record| format!("reason for reading {}", record.reading_id))
        .collect()
}

async fn store_outcome(
    store: &AnyStore,
    bucket: &ClaimedBucket,
    outcome: &IntervalOutcome,
    station_ids: &[i64],
    now_ms: i64,
) -> consensor_store::StoredResult {
    store
        .store_result(bucket, outcome, station_ids, &reasons_for(outcome), now_ms)
        .await
        .expect("store result")
}

/// A reading stored after the intervals following it were computed may change them: a reading is
/// judged on its station's readings from the start of the history block before its own (three
/// hours, aligned on the epoch, by default), so a late reading marks again every computed interval
/// after its own up to the end of the history block after its own, and none beyond.
async fn a_late_reading_marks_again_the_computed_intervals_it_reaches(
    store: &AnyStore,
    _database: &TestDatabase,
) {
    network(store).await;
    // One reading a minute into each of 25 intervals: BASE_MS (20:30Z) to 00:30Z the next day.
    let batch: Vec<NewReading> = (0..25)
        .map(|k| {
            reading(
                "ST-1",
                "air_temperature",
                BASE_MS + k * INTERVAL_MS + 60_000,
                13.0,
            )
        })
        .collect();
    store.insert_batch(&batch, NOW_MS).await.expect("batch");
    let claimed = claim_all(store, NOW_MS + 1).await;
    assert_eq!(claimed.len(), 25);
    let computed = outcome(point(Some(13.0), 1, 0), Vec::new(), Vec::new());
    for bucket in claimed.values() {
        store_outcome(store, bucket, &computed, &[], NOW_MS + 2).await;
    }
    assert_eq!(store.count_pending_buckets().await.expect("pending"), 0);

    // ST-2's reading of 20:35Z comes late. 20:35Z lies in the block [18:00Z, 21:00Z); the block
    // after it ends at 00:00Z = BASE_MS + 21 intervals. So its own interval and the 20 computed
    // ones after it (20:40Z to 23:50Z) are marked, those from 00:00Z on are not.
    store
        .insert_batch(
            &[reading("ST-2", "air_temperature", BASE_MS + 300_000, 13.4)],
            NOW_MS + 3,
        )
        .await
        .expect("late reading");
    let pending = fetch_all_raw!(
        store,
        (i64, i64),
        "SELECT bucket_start_ms, marked_at_ms FROM pending_buckets ORDER BY bucket_start_ms"
    );
    let expected: Vec<(i64, i64)> = (0..21)
        .map(|k| (BASE_MS + k * INTERVAL_MS, NOW_MS + 3))
        .collect();
    assert_eq!(pending, expected);

    // A reading of the last computed interval reaches no computed interval after it.
    let reclaimed = claim_all(store, NOW_MS + 4).await;
    for bucket in reclaimed.values() {
        store_outcome(store, bucket, &computed, &[], NOW_MS + 5).await;
    }
    store
        .insert_batch(
            &[reading(
                "ST-2",
                "air_temperature",
                BASE_MS + 24 * INTERVAL_MS + 60_000,
                13.4,
            )],
            NOW_MS + 6,
        )
        .await
        .expect("reading of the last interval");
    let pending = fetch_all_raw!(
        store,
        (i64,),
        "SELECT bucket_start_ms FROM pending_buckets ORDER BY bucket_start_ms"
    );
    assert_eq!(pending, vec![(BASE_MS + 24 * INTERVAL_MS,)]);

    // One batch with a late reading of 20:36Z and one of 00:31Z: each marks its own reach, 20:30Z
    // to 23:50Z and 00:30Z; the intervals between the two reaches (00:00Z to 00:20Z) stay as
    // they are, although they lie between the batch's earliest and latest readings.
    let reclaimed = claim_all(store, NOW_MS + 7).await;
    for bucket in reclaimed.values() {
        store_outcome(store, bucket, &computed, &[], NOW_MS + 8).await;
    }
    store
        .insert_batch(
            &[
                reading("ST-2", "air_temperature", BASE_MS + 360_000, 13.5),
                reading(
                    "ST-2",
                    "air_temperature",
                    BASE_MS + 24 * INTERVAL_MS + 60_000,
                    13.6,
                ),
            ],
            NOW_MS + 9,
        )
        .await
        .expect("two late readings");
    let pending = fetch_all_raw!(
        store,
        (i64,),
        "SELECT bucket_start_ms FROM pending_buckets ORDER BY bucket_start_ms"
    );
    let mut expected: Vec<(i64,)> = (0..21).map(|k| (BASE_MS + k * INTERVAL_MS,)).collect();
    expected.push((BASE_MS + 24 * INTERVAL_MS,));
    assert_eq!(pending, expected);
}

async fn claim_then_store_result_removes_the_bucket(store: &AnyStore, _database: &TestDatabase) {
    network_of(store, 2).await;
    // Two buckets, marked at different times: the second batch's bucket is the younger one.
    store
        .insert_batch(&[reading("ST-1", "air_temperature", BASE_MS, 13.0)], NOW_MS)
        .await
        .expect("first batch");
    store
        .insert_batch(
            &[reading(
                "ST-1",
                "air_temperature",
                BASE_MS + INTERVAL_MS,
                13.5,
            )],
            NOW_MS + 10,
        )
        .await
        .expect("second batch");

    let first = store
        .claim_buckets("w1", NOW_MS + 100, 1, STALE_MS, 0, 0)
        .await
        .expect("claim");
    // Oldest mark first, and only as many as asked for.
    assert_eq!(first.len(), 1);
    let bucket = &first[0];
    assert_eq!(bucket.area_key, "north-basin");
    assert_eq!(bucket.quantity, "air_temperature");
    assert_eq!(bucket.bucket_start_ms, BASE_MS);
    assert_eq!(bucket.interval_ms, INTERVAL_MS);
    assert_eq!(bucket.mark_count, 1);
    assert_eq!(bucket.claimed_by, "w1");

    let rest = store
        .claim_buckets("w2", NOW_MS + 100, 10, STALE_MS, 0, 0)
        .await
        .expect("claim the rest");
    // The first bucket's claim is fresh, so only the second bucket is left to claim.
    assert_eq!(rest.len(), 1);
    assert_eq!(rest[0].bucket_start_ms, BASE_MS + INTERVAL_MS);
    assert!(store
        .claim_buckets("w3", NOW_MS + 100, 10, STALE_MS, 0, 0)
        .await
        .expect("nothing left")
        .is_empty());

    assert_eq!(store.last_computed_at().await.expect("status"), None);
    let ids = station_ids(store).await;
    let decided = outcome(
        point(Some(13.0), 1, 0),
        Vec::new(),
        vec![StationValue {
            station: 0,
            value: 13.0,
            used: true,
            score: None,
        }],
    );
    let stored = store_outcome(store, bucket, &decided, &[ids["ST-1"]], NOW_MS + 200).await;
    // The interval's first result is revision 1, and nothing marked the bucket since the claim.
    assert_eq!(stored.revision, 1);
    assert!(stored.bucket_done);
    assert_eq!(store.count_pending_buckets().await.expect("pending"), 1);
    assert_eq!(
        store.last_computed_at().await.expect("status"),
        Some(NOW_MS + 200)
    );
}

async fn bucket_marked_again_during_computation_stays_pending(
    store: &AnyStore,
    _database: &TestDatabase,
) {
    network_of(store, 2).await;
    store
        .insert_batch(&[reading("ST-1", "air_temperature", BASE_MS, 13.0)], NOW_MS)
        .await
        .expect("batch");
    let claimed = store
        .claim_buckets("w1", NOW_MS, 10, STALE_MS, 0, 0)
        .await
        .expect("claim");
    assert_eq!(claimed.len(), 1);
    // A late reading for the same interval arrives while the worker computes it.
    store
        .insert_batch(
            &[reading("ST-2", "air_temperature", BASE_MS + 60_000, 13.4)],
            NOW_MS + 1,
        )
        .await
        .expect("late reading");
    let ids = station_ids(store).await;
    let decided = outcome(point(Some(13.0), 1, 0), Vec::new(), Vec::new());
    let stored = store_outcome(store, &claimed[0], &decided, &[ids["ST-1"]], NOW_MS + 2).await;
    // The result is stored, but the bucket's mark count went from 1 to 2 meanwhile: it stays.
    assert_eq!(stored.revision, 1);
    assert!(!stored.bucket_done);
    assert_eq!(store.count_pending_buckets().await.expect("pending"), 1);

    // The claim was released, so it can be claimed again at once, well inside STALE_MS.
    let again = store
        .claim_buckets("w2", NOW_MS + 3, 10, STALE_MS, 0, 0)
        .await
        .expect("claim again");
    assert_eq!(again.len(), 1);
    assert_eq!(again[0].mark_count, 2);
    let stored = store_outcome(store, &again[0], &decided, &[ids["ST-1"]], NOW_MS + 4).await;
    // The recomputation is the interval's second revision, and this time nothing interfered.
    assert_eq!(stored.revision, 2);
    assert!(stored.bucket_done);
    assert_eq!(store.count_pending_buckets().await.expect("pending"), 0);
}

/// `store_results` writes a batch in a few multi-row statements: each interval must still get its
/// own revision, its own set-aside records and station values, and its own pending-bucket outcome
/// (done, or released when a reading marked it again during the computation). The expectations
/// are API.md's revision and pending rules; the data are this test's own.
async fn a_batch_of_results_gives_each_interval_its_own_revision_records_and_values(
    store: &AnyStore,
    _database: &TestDatabase,
) {
    network_of(store, 2).await;
    let mut batch = Vec::new();
    for k in 0..3 {
        let start = BASE_MS + k * INTERVAL_MS;
        batch.push(reading("ST-1", "air_temperature", start, 13.0 + k as f64));
        batch.push(reading("ST-2", "air_temperature", start, 19.0 + k as f64));
    }
    store.insert_batch(&batch, NOW_MS).await.expect("batch");
    let claimed = store
        .claim_buckets("w1", NOW_MS + 100, 10, STALE_MS, 0, 0)
        .await
        .expect("claim");
    assert_eq!(claimed.len(), 3);
    // A late reading marks the middle interval again while the worker computes.
    store
        .insert_batch(
            &[reading(
                "ST-1",
                "air_temperature",
                BASE_MS + INTERVAL_MS + 60_000,
                14.2,
            )],
            NOW_MS + 150,
        )
        .await
        .expect("late reading");
    let ids = station_ids(store).await;
    let station_ids = [ids["ST-1"], ids["ST-2"]];
    let mut outcomes = Vec::new();
    for bucket in &claimed {
        let k = (bucket.bucket_start_ms - BASE_MS) / INTERVAL_MS;
        let far = stored(store, "ST-2", "air_temperature", bucket.bucket_start_ms).await;
        outcomes.push(outcome(
            point(Some(13.0 + k as f64), 1, 1),
            vec![far_record(1, &far, 4.0 + k as f64)],
            vec![
                StationValue {
                    station: 0,
                    value: 13.0 + k as f64,
                    used: true,
                    score: Some(0.0),
                },
                StationValue {
                    station: 1,
                    value: 19.0 + k as f64,
                    used: false,
                    score: Some(4.0 + k as f64),
                },
            ],
        ));
    }
    let reasons: Vec<Vec<String>> = outcomes.iter().map(reasons_for).collect();
    let to_store: Vec<ResultToStore<'_>> = claimed
        .iter()
        .zip(&outcomes)
        .zip(&reasons)
        .map(|((bucket, outcome), reasons)| ResultToStore {
            bucket,
            outcome,
            station_ids: &station_ids,
            reasons,
        })
        .collect();
    let stored_results = store
        .store_results(&to_store, NOW_MS + 200)
        .await
        .expect("store the batch");
    let done: Vec<(i64, bool)> = stored_results
        .iter()
        .map(|stored| (stored.revision, stored.bucket_done))
        .collect();
    assert_eq!(done, vec![(1, true), (1, false), (1, true)]);
    let distinct: BTreeSet<i64> = stored_results.iter().map(|s| s.result_id).collect();
    assert_eq!(distinct.len(), 3, "one result row per interval");
    // Only the interval marked again is pending, and its claim was released at once.
    assert_eq!(store.count_pending_buckets().await.expect("pending"), 1);
    let again = store
        .claim_buckets("w2", NOW_MS + 300, 10, STALE_MS, 0, 0)
        .await
        .expect("claim again");
    assert_eq!(again.len(), 1);
    assert_eq!(again[0].bucket_start_ms, BASE_MS + INTERVAL_MS);
    assert_eq!(again[0].mark_count, 2);
    // Each interval's latest result is its own, in time order.
    let series = store
        .series(
            "north-basin",
            "air_temperature",
            BASE_MS,
            BASE_MS + 3 * INTERVAL_MS,
        )
        .await
        .expect("series");
    let medians: Vec<(i64, Option<f64>, i64)> = series
        .iter()
        .map(|row| (row.start_ms, row.point.median, row.revision))
        .collect();
    assert_eq!(
        medians,
        vec![
            (BASE_MS, Some(13.0), 1),
            (BASE_MS + INTERVAL_MS, Some(14.0), 1),
            (BASE_MS + 2 * INTERVAL_MS, Some(15.0), 1),
        ]
    );
    // Each record went with its own result, with its own reason and score.
    let page = store
        .list_set_aside(&SetAsideFilter::default(), 10, None)
        .await
        .expect("set-aside");
    let mut records: Vec<(i64, i64, Option<f64>, String)> = page
        .items
        .iter()
        .map(|row| {
            (
                row.bucket_start_ms,
                row.result_id,
                row.score,
                row.reason.clone(),
            )
        })
        .collect();
    records.sort_by_key(|record| record.0);
    let expected: Vec<(i64, i64, Option<f64>, String)> = (0..3)
        .map(|k| {
            (
                BASE_MS + k * INTERVAL_MS,
                stored_results[k as usize].result_id,
                Some(4.0 + k as f64),
                reasons[k as usize][0].clone(),
            )
        })
        .collect();
    assert_eq!(records, expected);
    // Storing the next computation of all three gives each its second revision.
    let second = store
        .store_results(&to_store, NOW_MS + 400)
        .await
        .expect("store again");
    assert!(second.iter().all(|stored| stored.revision == 2));
}

async fn stale_claim_is_taken_over_and_fresh_one_is_not(
    store: &AnyStore,
    _database: &TestDatabase,
) {
    network_of(store, 1).await;
    store
        .insert_batch(&[reading("ST-1", "air_temperature", BASE_MS, 13.0)], NOW_MS)
        .await
        .expect("batch");
    let claimed_at = NOW_MS + 1_000;
    let first = store
        .claim_buckets("crashed", claimed_at, 10, STALE_MS, 0, 0)
        .await
        .expect("claim");
    assert_eq!(first.len(), 1);
    // A claim is stale when it is older than STALE_MS. At exactly STALE_MS it is not yet.
    for now_ms in [claimed_at + 1, claimed_at + STALE_MS] {
        let taken = store
            .claim_buckets("rescuer", now_ms, 10, STALE_MS, 0, 0)
            .await
            .expect("claim");
        assert!(taken.is_empty(), "claim taken over at {now_ms}");
    }
    let taken = store
        .claim_buckets("rescuer", claimed_at + STALE_MS + 1, 10, STALE_MS, 0, 0)
        .await
        .expect("claim");
    assert_eq!(taken.len(), 1);
    assert_eq!(taken[0].claimed_by, "rescuer");
    assert_eq!(taken[0].bucket_start_ms, BASE_MS);
    let claims = fetch_all_raw!(
        store,
        (Option<String>, Option<i64>),
        "SELECT claimed_by, claimed_at_ms FROM pending_buckets"
    );
    // The takeover rewrote the claim, which starts a new staleness period.
    assert_eq!(
        claims,
        vec![(Some("rescuer".to_owned()), Some(claimed_at + STALE_MS + 1))]
    );
}

async fn concurrent_claimers_never_share_a_bucket(_store: &AnyStore, database: &TestDatabase) {
    // Two separate stores (two pools) on the same database, as two replica processes would be.
    let first = database.open().await;
    let second = database.open().await;
    network_of(&first, 1).await;
    // One reading in each of 200 consecutive intervals: 200 pending buckets.
    let batch: Vec<NewReading> = (0..200)
        .map(|index| {
            reading(
                "ST-1",
                "air_temperature",
                BASE_MS + index * INTERVAL_MS,
                13.0,
            )
        })
        .collect();
    first.insert_batch(&batch, NOW_MS).await.expect("batch");

    let claimer = |store: AnyStore, worker: &'static str| {
        tokio::spawn(async move {
            let mut mine = Vec::new();
            loop {
                let claimed = store
                    .claim_buckets(worker, NOW_MS + 1, 7, STALE_MS, 0, 0)
                    .await
                    .expect("claim");
                if claimed.is_empty() {
                    return mine;
                }
                mine.extend(claimed.into_iter().map(|bucket| bucket.bucket_start_ms));
            }
        })
    };
    let a = claimer(first.clone(), "a");
    let b = claimer(second.clone(), "b");
    let a = a.await.expect("task a");
    let b = b.await.expect("task b");
    let a_set: BTreeSet<i64> = a.iter().copied().collect();
    let b_set: BTreeSet<i64> = b.iter().copied().collect();
    // No claimer got a bucket twice, no bucket went to both, and together they got all 200.
    assert_eq!(a_set.len(), a.len());
    assert_eq!(b_set.len(), b.len());
    assert!(
        a_set.is_disjoint(&b_set),
        "{:?}",
        a_set.intersection(&b_set)
    );
    let all: BTreeSet<i64> = a_set.union(&b_set).copied().collect();
    let expected: BTreeSet<i64> = (0..200)
        .map(|index| BASE_MS + index * INTERVAL_MS)
        .collect();
    assert_eq!(all, expected);
    // Each claim row names the worker that returned it.
    let by_worker = fetch_all_raw!(
        &first,
        (String, i64),
        "SELECT claimed_by, COUNT(*) FROM pending_buckets GROUP BY claimed_by ORDER BY claimed_by"
    );
    let counts: Vec<(String, i64)> = [("a", a.len()), ("b", b.len())]
        .into_iter()
        .filter(|(_, count)| *count > 0)
        .map(|(worker, count)| (worker.to_owned(), count as i64))
        .collect();
    assert_eq!(by_worker, counts);
    first.close().await;
    second.close().await;
}

async fn load_interval_returns_current_readings_by_station(
    store: &AnyStore,
    _database: &TestDatabase,
) {
    network_of(store, 2).await;
    store
        .upsert_area(&NewArea {
            key: "south".to_owned(),
            name: "South".to_owned(),
            interval_ms: INTERVAL_MS,
        })
        .await
        .expect("area");
    store
        .upsert_station(&station("ST-9", "south"))
        .await
        .expect("station");
    let batch = vec![
        // Inserted out of station order: the result is ordered by station key, then time.
        reading("ST-2", "air_temperature", BASE_MS + 60_000, 14.0),
        reading("ST-2", "air_temperature", BASE_MS, 13.9),
        reading("ST-1", "air_temperature", BASE_MS, 13.0),
        NewReading {
            value: None,
            value_as_sent: None,
            unit_as_sent: None,
            ..reading("ST-1", "air_temperature", BASE_MS + 60_000, 0.0)
        },
        // Outside the range ([BASE_MS, BASE_MS + 10 min)), another quantity, another area.
        reading("ST-1", "air_temperature", BASE_MS + INTERVAL_MS, 13.0),
        reading("ST-1", "air_temperature", BASE_MS - 1, 13.0),
        reading("ST-1", "relative_humidity", BASE_MS, 80.0),
        reading("ST-9", "air_temperature", BASE_MS, 25.0),
    ];
    store.insert_batch(&batch, NOW_MS).await.expect("batch");
    // A corrected value for ST-2 at BASE_MS: only the new revision is current.
    store
        .insert_batch(
            &[NewReading {
                value_as_sent: Some(57.2),
                unit_as_sent: Some("[degF]".to_owned()),
                ..reading("ST-2", "air_temperature", BASE_MS, 14.0)
            }],
            NOW_MS + 1,
        )
        .await
        .expect("revision");
    let area_id = store.list_areas().await.expect("areas")[0].id;
    let data = store
        .load_interval(area_id, "air_temperature", BASE_MS, BASE_MS + INTERVAL_MS)
        .await
        .expect("load");
    let ids = station_ids(store).await;
    /// A station's key and id with its readings' (time, value, value as sent).
    type StationSummary = (String, i64, Vec<(i64, Option<f64>, Option<f64>)>);
    let summary: Vec<StationSummary> = data
        .stations
        .iter()
        .map(|series| {
            (
                series.station_key.clone(),
                series.station_id,
                series
                    .readings
                    .iter()
                    .map(|r| (r.observed_at_ms, r.value, r.value_as_sent))
                    .collect(),
            )
        })
        .collect();
    assert_eq!(
        summary,
        vec![
            (
                "ST-1".to_owned(),
                ids["ST-1"],
                vec![
                    (BASE_MS, Some(13.0), Some(13.0)),
                    (BASE_MS + 60_000, None, None)
                ]
            ),
            (
                "ST-2".to_owned(),
                ids["ST-2"],
                vec![
                    (BASE_MS, Some(14.0), Some(57.2)),
                    (BASE_MS + 60_000, Some(14.0), Some(14.0))
                ]
            ),
        ]
    );
    // The reading ids handed to the core are the current revisions' row ids.
    let current = stored(store, "ST-2", "air_temperature", BASE_MS).await;
    assert_eq!(current.revision, 1);
    assert_eq!(data.stations[1].readings[0].id, current.id as u64);
    assert!(data.overturned.is_empty());
    // A quantity nobody sent has no readings.
    let none = store
        .load_interval(area_id, "pm10", BASE_MS, BASE_MS + INTERVAL_MS)
        .await
        .expect("load");
    assert!(none.stations.is_empty());
}

async fn result_revisions_grow_and_earlier_ones_stay_readable(
    store: &AnyStore,
    _database: &TestDatabase,
) {
    network_of(store, 1).await;
    store
        .insert_batch(&[reading("ST-1", "air_temperature", BASE_MS, 13.0)], NOW_MS)
        .await
        .expect("batch");
    let bucket = store
        .claim_buckets("w", NOW_MS, 1, STALE_MS, 0, 0)
        .await
        .expect("claim")
        .remove(0);
    let ids = station_ids(store).await;
    // Three computations of the same interval, each with a different median.
    for (index, median) in [13.0, 13.5, 14.0].into_iter().enumerate() {
        let decided = outcome(point(Some(median), 1, 0), Vec::new(), Vec::new());
        let stored = store_outcome(
            store,
            &bucket,
            &decided,
            &[ids["ST-1"]],
            NOW_MS + index as i64,
        )
        .await;
        assert_eq!(stored.revision, index as i64 + 1);
    }
    let latest = store
        .result_revision("north-basin", "air_temperature", BASE_MS, None)
        .await
        .expect("latest revision")
        .expect("present");
    assert_eq!(latest.revision, 3);
    assert_eq!(latest.point.median, Some(14.0));
    for (revision, median, computed_at_ms) in [(1, 13.0, NOW_MS), (2, 13.5, NOW_MS + 1)] {
        let earlier = store
            .result_revision("north-basin", "air_temperature", BASE_MS, Some(revision))
            .await
            .expect("earlier revision")
            .expect("present");
        // Each earlier revision keeps its own median and computation time.
        assert_eq!(earlier.revision, revision);
        assert_eq!(earlier.point.median, Some(median));
        assert_eq!(earlier.computed_at_ms, computed_at_ms);
    }
    assert!(store
        .result_revision("north-basin", "air_temperature", BASE_MS, Some(4))
        .await
        .expect("no fourth revision")
        .is_none());
    // The schema itself refuses to change a stored result.
    let change = match store {
        AnyStore::Sqlite(sqlite) => sqlx::query("UPDATE interval_results SET median = 0")
            .execute(sqlite.pool())
            .await
            .map(|_| ()),
        AnyStore::Postgres(postgres) => sqlx::query("UPDATE interval_results SET median = 0")
            .execute(postgres.pool())
            .await
            .map(|_| ()),
    };
    let error = change.expect_err("results are append-only");
    assert!(error.to_string().contains("append-only"), "{error}");
}

async fn series_latest_and_result_revision(store: &AnyStore, _database: &TestDatabase) {
    network_of(store, 1).await;
    let batch: Vec<NewReading> = (0..3)
        .map(|index| {
            reading(
                "ST-1",
                "air_temperature",
                BASE_MS + index * INTERVAL_MS,
                13.0,
            )
        })
        .collect();
    store.insert_batch(&batch, NOW_MS).await.expect("batch");
    let buckets = claim_all(store, NOW_MS).await;
    let ids = [station_ids(store).await["ST-1"]];
    // Interval k gets median 10 + k; interval 1 is then recomputed with median 21.
    for index in 0..3 {
        let bucket = &buckets[&(
            "north-basin".to_owned(),
            "air_temperature".to_owned(),
            BASE_MS + index * INTERVAL_MS,
        )];
        let decided = outcome(
            point(Some(10.0 + index as f64), 1, 0),
            Vec::new(),
            Vec::new(),
        );
        store_outcome(store, bucket, &decided, &ids, NOW_MS).await;
    }
    let second = &buckets[&(
        "north-basin".to_owned(),
        "air_temperature".to_owned(),
        BASE_MS + INTERVAL_MS,
    )];
    let redone = outcome(point(Some(21.0), 1, 0), Vec::new(), Vec::new());
    store_outcome(store, second, &redone, &ids, NOW_MS + 5).await;

    // [BASE, BASE + 2 intervals) holds the first two starts; `to` is exclusive.
    let series = store
        .series(
            "north-basin",
            "air_temperature",
            BASE_MS,
            BASE_MS + 2 * INTERVAL_MS,
        )
        .await
        .expect("series");
    let summary: Vec<(i64, i64, Option<f64>)> = series
        .iter()
        .map(|row| (row.start_ms, row.revision, row.point.median))
        .collect();
    assert_eq!(
        summary,
        vec![
            (BASE_MS, 1, Some(10.0)),
            (BASE_MS + INTERVAL_MS, 2, Some(21.0))
        ]
    );
    // Every Point field survives the round trip.
    assert_eq!(series[0].point, point(Some(10.0), 1, 0));
    assert_eq!(series[0].interval_ms, INTERVAL_MS);

    let latest = store
        .latest("north-basin", "air_temperature")
        .await
        .expect("latest")
        .expect("present");
    // The newest interval start with a result is the third one, computed once.
    assert_eq!(
        (latest.start_ms, latest.revision, latest.point.median),
        (BASE_MS + 2 * INTERVAL_MS, 1, Some(12.0))
    );
    let one = store
        .result_revision(
            "north-basin",
            "air_temperature",
            BASE_MS + INTERVAL_MS,
            Some(1),
        )
        .await
        .expect("revision 1")
        .expect("present");
    assert_eq!(one.point.median, Some(11.0));
    // Unknown area or quantity: nothing, not an error.
    assert!(store
        .series("south", "air_temperature", BASE_MS, BASE_MS + INTERVAL_MS)
        .await
        .expect("series")
        .is_empty());
    assert!(store
        .latest("north-basin", "dew_point")
        .await
        .expect("latest")
        .is_none());

    // The overview's one query: the same newest result of every area and quantity as `latest`.
    east_rise_with_st9(store).await;
    let more = [
        reading("ST-9", "air_temperature", BASE_MS, 30.0),
        reading("ST-1", "relative_humidity", BASE_MS + INTERVAL_MS, 55.0),
    ];
    store.insert_batch(&more, NOW_MS).await.expect("batch");
    let ids = station_ids(store).await;
    for ((area, quantity, start), bucket) in claim_all(store, NOW_MS).await {
        let station = if area == "east-rise" { "ST-9" } else { "ST-1" };
        let median = if quantity == "relative_humidity" {
            55.0
        } else {
            30.0
        };
        let decided = outcome(point(Some(median), 1, 0), Vec::new(), Vec::new());
        assert!(start == BASE_MS || start == BASE_MS + INTERVAL_MS);
        store_outcome(store, &bucket, &decided, &[ids[station]], NOW_MS).await;
    }
    let every = store.latest_of_every_area().await.expect("every latest");
    let summary: Vec<(&str, &str, i64, i64, Option<f64>)> = every
        .iter()
        .map(|(area, quantity, row)| {
            (
                area.as_str(),
                quantity.as_str(),
                row.start_ms,
                row.revision,
                row.point.median,
            )
        })
        .collect();
    assert_eq!(
        summary,
        vec![
            ("east-rise", "air_temperature", BASE_MS, 1, Some(30.0)),
            (
                "north-basin",
                "air_temperature",
                BASE_MS + 2 * INTERVAL_MS,
                1,
                Some(12.0)
            ),
            (
                "north-basin",
                "relative_humidity",
                BASE_MS + INTERVAL_MS,
                1,
                Some(55.0)
            ),
        ]
    );
    for (area, quantity, row) in &every {
        let one = store.latest(area, quantity).await.expect("latest");
        assert_eq!(one.as_ref(), Some(row), "{area} {quantity}");
    }
}

/// The set-aside listing's fixture: area north-basin (ST-1, ST-2) and area south (ST-3), readings
/// of two quantities, and results that set some of them aside. Returns the ids of the readings that
/// the latest revisions set aside, in listing order (observed_at_ms, reading_id).
async fn set_aside_fixture(store: &AnyStore) -> Vec<i64> {
    network_of(store, 2).await;
    store
        .upsert_area(&NewArea {
            key: "south".to_owned(),
            name: "South".to_owned(),
            interval_ms: INTERVAL_MS,
        })
        .await
        .expect("area");
    store
        .upsert_station(&station("ST-3", "south"))
        .await
        .expect("station");
    let mut batch = Vec::new();
    for minute in 0..5 {
        batch.push(reading(
            "ST-1",
            "air_temperature",
            BASE_MS + minute * 60_000,
            30.0,
        ));
    }
    batch.push(reading("ST-2", "air_temperature", BASE_MS, 13.0));
    batch.push(reading("ST-2", "relative_humidity", BASE_MS + 60_000, 80.0));
    batch.push(reading("ST-3", "air_temperature", BASE_MS + 120_000, 31.0));
    batch.push(reading(
        "ST-1",
        "air_temperature",
        BASE_MS + INTERVAL_MS,
        30.0,
    ));
    store.insert_batch(&batch, NOW_MS).await.expect("batch");
    let buckets = claim_all(store, NOW_MS).await;
    let ids = station_ids(store).await;
    let handles = [ids["ST-1"], ids["ST-2"], ids["ST-3"]];
    let bucket = |area: &str, quantity: &str, start: i64| {
        buckets[&(area.to_owned(), quantity.to_owned(), start)].clone()
    };

    let mut st1 = Vec::new();
    for minute in 0..5 {
        st1.push(stored(store, "ST-1", "air_temperature", BASE_MS + minute * 60_000).await);
    }
    let st2_air = stored(store, "ST-2", "air_temperature", BASE_MS).await;
    let st2_rh = stored(store, "ST-2", "relative_humidity", BASE_MS + 60_000).await;
    let st3 = stored(store, "ST-3", "air_temperature", BASE_MS + 120_000).await;
    let st1_later = stored(store, "ST-1", "air_temperature", BASE_MS + INTERVAL_MS).await;

    // north-basin, air temperature, first interval. Revision 1 sets aside ST-1's five readings and
    // ST-2's; revision 2 only ST-1's, so ST-2's record belongs to a superseded revision.
    let air = bucket("north-basin", "air_temperature", BASE_MS);
    let mut records: Vec<SetAside> = st1.iter().map(|r| far_record(0, r, 33.7)).collect();
    records.push(far_record(1, &st2_air, -4.0));
    store_outcome(
        store,
        &air,
        &outcome(point(Some(13.8), 0, 2), records, Vec::new()),
        &handles,
        NOW_MS,
    )
    .await;
    let records: Vec<SetAside> = st1.iter().map(|r| far_record(0, r, 33.7)).collect();
    store_outcome(
        store,
        &air,
        &outcome(point(Some(13.8), 1, 1), records, Vec::new()),
        &handles,
        NOW_MS + 1,
    )
    .await;
    // The other intervals: one record each.
    let rh = bucket("north-basin", "relative_humidity", BASE_MS);
    store_outcome(
        store,
        &rh,
        &outcome(
            point(None, 0, 1),
            vec![far_record(1, &st2_rh, 5.0)],
            Vec::new(),
        ),
        &handles,
        NOW_MS,
    )
    .await;
    let south = bucket("south", "air_temperature", BASE_MS);
    store_outcome(
        store,
        &south,
        &outcome(
            point(None, 0, 1),
            vec![far_record(2, &st3, 6.0)],
            Vec::new(),
        ),
        &handles,
        NOW_MS,
    )
    .await;
    let later = bucket("north-basin", "air_temperature", BASE_MS + INTERVAL_MS);
    store_outcome(
        store,
        &later,
        &outcome(
            point(None, 0, 1),
            vec![far_record(0, &st1_later, 7.0)],
            Vec::new(),
        ),
        &handles,
        NOW_MS,
    )
    .await;

    // Listing order is by observation time: ST-1 minute 0, ST-1 minute 1, ST-2 rh minute 1 (its
    // id is larger, having been inserted later in the batch), ST-1 minute 2, ST-3 minute 2, ST-1
    // minutes 3 and 4, then ST-1 in the next interval.
    vec![
        st1[0].id,
        st1[1].id,
        st2_rh.id,
        st1[2].id,
        st3.id,
        st1[3].id,
        st1[4].id,
        st1_later.id,
    ]
}

/// Lists every page with the given page size and returns all rows, checking that only the last
/// page has no next cursor.
async fn list_all(store: &AnyStore, filter: &SetAsideFilter, page_size: usize) -> Vec<SetAsideRow> {
    let mut rows = Vec::new();
    let mut after: Option<SetAsideCursor> = None;
    loop {
        let page = store
            .list_set_aside(filter, page_size, after)
            .await
            .expect("list");
        assert!(page.items.len() <= page_size);
        rows.extend(page.items);
        match page.next_cursor {
            // The cursor goes through its text form, as it does through the HTTP API.
            Some(cursor) => after = Some(cursor.to_string().parse().expect("cursor")),
            None => return rows,
        }
    }
}

fn reading_ids(rows: &[SetAsideRow]) -> Vec<i64> {
    rows.iter().map(|row| row.reading_id).collect()
}

async fn set_aside_listing_filters_and_pages(store: &AnyStore, _database: &TestDatabase) {
    let expected = set_aside_fixture(store).await;
    let everything = SetAsideFilter::default();
    let all = list_all(store, &everything, 100).await;
    // The superseded revision-1 record of ST-2's air temperature is not listed.
    assert_eq!(reading_ids(&all), expected);
    let first = &all[0];
    assert_eq!(
        (
            first.station.as_str(),
            first.area.as_str(),
            first.quantity.as_str()
        ),
        ("ST-1", "north-basin", "air_temperature")
    );
    assert_eq!(first.rule, Rule::FarFromConsensus);
    assert_eq!(first.value, Some(30.0));
    assert_eq!(first.unit_as_sent.as_deref(), Some("Cel"));
    assert_eq!(first.observed_at_ms, BASE_MS);
    assert_eq!(first.score, Some(33.7));
    assert_eq!(first.threshold, Some(3.5));
    assert_eq!(first.consensus_median, Some(13.8));
    assert_eq!(
        first.reason,
        format!("reason for reading {}", first.reading_id)
    );
    assert_eq!(first.result_revision, 2);
    assert_eq!(first.bucket_start_ms, BASE_MS);
    assert_eq!(first.review.state, ReviewState::Pending);
    assert_eq!(first.review.by, None);

    // Pages of 3 over 8 rows: 3 + 3 + 2, the same rows in the same order.
    assert_eq!(
        reading_ids(&list_all(store, &everything, 3).await),
        expected
    );
    assert_eq!(
        reading_ids(&list_all(store, &everything, 1).await),
        expected
    );
    let first_page = store
        .list_set_aside(&everything, 3, None)
        .await
        .expect("page");
    assert_eq!(reading_ids(&first_page.items), expected[..3].to_vec());
    assert!(first_page.next_cursor.is_some());
    let exact = store
        .list_set_aside(&everything, 8, None)
        .await
        .expect("page");
    // Exactly as many rows as asked for, and none beyond: no next page.
    assert_eq!(exact.items.len(), 8);
    assert_eq!(exact.next_cursor, None);

    let filtered =
        |filter: SetAsideFilter| async move { reading_ids(&list_all(store, &filter, 2).await) };
    let area = filtered(SetAsideFilter {
        area: Some("south".to_owned()),
        ..SetAsideFilter::default()
    })
    .await;
    assert_eq!(area, vec![expected[4]]);
    let station = filtered(SetAsideFilter {
        station: Some("ST-1".to_owned()),
        ..SetAsideFilter::default()
    })
    .await;
    assert_eq!(
        station,
        vec![
            expected[0],
            expected[1],
            expected[3],
            expected[5],
            expected[6],
            expected[7]
        ]
    );
    let quantity = filtered(SetAsideFilter {
        quantity: Some("relative_humidity".to_owned()),
        ..SetAsideFilter::default()
    })
    .await;
    assert_eq!(quantity, vec![expected[2]]);
    // [minute 1, minute 3): the three readings observed at minutes 1 and 2 and nothing else.
    let window = filtered(SetAsideFilter {
        from_ms: Some(BASE_MS + 60_000),
        to_ms: Some(BASE_MS + 180_000),
        ..SetAsideFilter::default()
    })
    .await;
    assert_eq!(window, expected[1..5].to_vec());
    let combined = filtered(SetAsideFilter {
        area: Some("north-basin".to_owned()),
        quantity: Some("air_temperature".to_owned()),
        from_ms: Some(BASE_MS + 60_000),
        to_ms: Some(BASE_MS + 180_000),
        ..SetAsideFilter::default()
    })
    .await;
    assert_eq!(combined, vec![expected[1], expected[3]]);

    // Review filters: uphold one reading, overturn another; the rest stay pending.
    store
        .review_reading(
            expected[0],
            ReviewDecision::Uphold,
            Some("sensor in the sun"),
            "tok_op",
            NOW_MS + 10,
        )
        .await
        .expect("uphold");
    store
        .review_reading(
            expected[4],
            ReviewDecision::Overturn,
            None,
            "tok_op",
            NOW_MS + 11,
        )
        .await
        .expect("overturn");
    let by_review = |state: ReviewState| {
        filtered(SetAsideFilter {
            review: Some(state),
            ..SetAsideFilter::default()
        })
    };
    assert_eq!(by_review(ReviewState::Upheld).await, vec![expected[0]]);
    assert_eq!(by_review(ReviewState::Overturned).await, vec![expected[4]]);
    let pending: Vec<i64> = expected
        .iter()
        .copied()
        .filter(|id| *id != expected[0] && *id != expected[4])
        .collect();
    assert_eq!(by_review(ReviewState::Pending).await, pending);
    let upheld = list_all(store, &everything, 100).await;
    let review = &upheld[0].review;
    assert_eq!(review.state, ReviewState::Upheld);
    assert_eq!(review.by.as_deref(), Some("tok_op"));
    assert_eq!(review.at_ms, Some(NOW_MS + 10));
    assert_eq!(review.note.as_deref(), Some("sensor in the sun"));
}

async fn reviews_are_audited_and_mark_the_interval_again(
    store: &AnyStore,
    _database: &TestDatabase,
) {
    let expected = set_aside_fixture(store).await;
    // The fixture stored every result, so nothing is pending before the reviews.
    assert_eq!(store.count_pending_buckets().await.expect("pending"), 0);
    // A reading that no result ever judged cannot be reviewed.
    store
        .insert_batch(&[reading("ST-2", "dew_point", BASE_MS, 5.0)], NOW_MS)
        .await
        .expect("unjudged reading");
    let never = stored(store, "ST-2", "dew_point", BASE_MS).await;
    let error = store
        .review_reading(never.id, ReviewDecision::Uphold, None, "tok_op", NOW_MS)
        .await
        .expect_err("never set aside");
    assert!(matches!(error, StoreError::NotFound(_)), "{error:?}");
    let dew_bucket = claim_all(store, NOW_MS).await;
    assert_eq!(
        dew_bucket.len(),
        1,
        "only the dew point reading's bucket is pending"
    );

    // ST-3 in the south area, air temperature, first interval (see set_aside_fixture).
    let target = expected[4];
    let upheld = store
        .review_reading(
            target,
            ReviewDecision::Uphold,
            Some("looks wrong"),
            "tok_a",
            NOW_MS + 10,
        )
        .await
        .expect("uphold");
    assert_eq!(upheld.reading_id, target);
    assert_eq!(upheld.station, "ST-3");
    assert_eq!(upheld.quantity, "air_temperature");
    assert_eq!(upheld.observed_at_ms, BASE_MS + 120_000);
    assert_eq!(upheld.decision, ReviewDecision::Uphold);
    // The review marked the reading's interval pending again, in the same transaction.
    let marked = claim_all(store, NOW_MS + 11).await;
    let south = marked
        .get(&("south".to_owned(), "air_temperature".to_owned(), BASE_MS))
        .expect("south interval pending again")
        .clone();
    assert_eq!(marked.len(), 1);

    let overturned = store
        .review_reading(
            target,
            ReviewDecision::Overturn,
            Some("checked on site"),
            "tok_b",
            NOW_MS + 20,
        )
        .await
        .expect("overturn");
    let area_id = store
        .list_areas()
        .await
        .expect("areas")
        .into_iter()
        .find(|area| area.key == "south")
        .expect("south")
        .id;
    let data = store
        .load_interval(area_id, "air_temperature", BASE_MS, BASE_MS + INTERVAL_MS)
        .await
        .expect("load");
    // The latest decision on the reading is the overturn, so the worker must keep it.
    assert_eq!(data.overturned, [target as u64].into_iter().collect());

    // The worker recomputes the interval and, keeping the reading, sets nothing aside.
    let ids = station_ids(store).await;
    let recomputed = outcome(
        point(Some(31.0), 1, 0),
        Vec::new(),
        vec![StationValue {
            station: 0,
            value: 31.0,
            used: true,
            score: None,
        }],
    );
    let stored_result =
        store_outcome(store, &south, &recomputed, &[ids["ST-3"]], NOW_MS + 30).await;
    assert_eq!(stored_result.revision, 2);
    // Its latest revision no longer sets it aside, but an overturned reading stays findable.
    let overturned_rows = list_all(
        store,
        &SetAsideFilter {
            review: Some(ReviewState::Overturned),
            ..SetAsideFilter::default()
        },
        10,
    )
    .await;
    assert_eq!(reading_ids(&overturned_rows), vec![target]);
    assert_eq!(overturned_rows[0].result_revision, 1);
    assert_eq!(overturned_rows[0].review.by.as_deref(), Some("tok_b"));

    // The audit log keeps both decisions, newest first.
    let log = store
        .audit(&AuditFilter::default(), 10, None)
        .await
        .expect("audit");
    let decisions: Vec<(i64, ReviewDecision, String)> = log
        .items
        .iter()
        .map(|entry| (entry.reading_id, entry.decision, entry.by.clone()))
        .collect();
    assert_eq!(
        decisions,
        vec![
            (target, ReviewDecision::Overturn, "tok_b".to_owned()),
            (target, ReviewDecision::Uphold, "tok_a".to_owned()),
        ]
    );
    assert_eq!(log.items[0].id, overturned.id);
    assert_eq!(log.items[1].note.as_deref(), Some("looks wrong"));
    assert_eq!(log.next_cursor, None);
    // One entry per page: the cursor walks from the newest to the oldest.
    let page = store
        .audit(&AuditFilter::default(), 1, None)
        .await
        .expect("page 1");
    assert_eq!(page.items[0].id, overturned.id);
    let page = store
        .audit(&AuditFilter::default(), 1, page.next_cursor)
        .await
        .expect("page 2");
    assert_eq!(page.items[0].id, upheld.id);
    assert_eq!(page.next_cursor, None);
    // Filters: by reading, by station, by time of the decision ([at 15, ...) holds only the second).
    let only = |filter: AuditFilter| async move {
        store
            .audit(&filter, 10, None)
            .await
            .expect("audit")
            .items
            .iter()
            .map(|entry| entry.id)
            .collect::<Vec<i64>>()
    };
    assert_eq!(
        only(AuditFilter {
            reading_id: Some(target),
            ..AuditFilter::default()
        })
        .await,
        vec![overturned.id, upheld.id]
    );
    assert!(only(AuditFilter {
        station: Some("ST-1".to_owned()),
        ..AuditFilter::default()
    })
    .await
    .is_empty());
    assert_eq!(
        only(AuditFilter {
            from_ms: Some(NOW_MS + 15),
            ..AuditFilter::default()
        })
        .await,
        vec![overturned.id]
    );
    assert_eq!(
        only(AuditFilter {
            to_ms: Some(NOW_MS + 20),
            ..AuditFilter::default()
        })
        .await,
        vec![upheld.id]
    );
}

async fn mark_for_recompute_counts_intervals_with_readings(
    store: &AnyStore,
    _database: &TestDatabase,
) {
    network_of(store, 2).await;
    let batch = vec![
        // Air temperature in intervals 0, 1 and 3 (two stations in interval 0); humidity in 0.
        reading("ST-1", "air_temperature", BASE_MS, 13.0),
        reading("ST-2", "air_temperature", BASE_MS + 30_000, 13.0),
        reading("ST-1", "air_temperature", BASE_MS + INTERVAL_MS + 1, 13.0),
        reading("ST-1", "air_temperature", BASE_MS + 3 * INTERVAL_MS, 13.0),
        reading("ST-1", "relative_humidity", BASE_MS, 80.0),
    ];
    store.insert_batch(&batch, NOW_MS).await.expect("batch");
    // Compute everything first, so that each recompute request shows in the pending count.
    let buckets = claim_all(store, NOW_MS).await;
    let ids = station_ids(store).await;
    for bucket in buckets.values() {
        let decided = outcome(point(Some(13.0), 1, 0), Vec::new(), Vec::new());
        store_outcome(store, bucket, &decided, &[ids["ST-1"]], NOW_MS).await;
    }
    assert_eq!(store.count_pending_buckets().await.expect("pending"), 0);

    let end = BASE_MS + 4 * INTERVAL_MS;
    let air = store
        .mark_for_recompute(
            "north-basin",
            Some("air_temperature"),
            BASE_MS,
            end,
            NOW_MS + 1,
        )
        .await
        .expect("recompute air");
    // Intervals 0, 1 and 3 hold air temperature readings; interval 2 holds none.
    assert_eq!(air, 3);
    assert_eq!(store.count_pending_buckets().await.expect("pending"), 3);
    let all = store
        .mark_for_recompute("north-basin", None, BASE_MS, end, NOW_MS + 2)
        .await
        .expect("recompute all");
    // All quantities: the three air temperature intervals again plus humidity's one.
    assert_eq!(all, 4);
    assert_eq!(store.count_pending_buckets().await.expect("pending"), 4);
    let counts = fetch_all_raw!(
        store,
        (i64, i64, i64),
        "SELECT bucket_start_ms, mark_count, marked_at_ms FROM pending_buckets p \
         JOIN quantities q ON q.id = p.quantity_id WHERE q.key = 'air_temperature' \
         ORDER BY bucket_start_ms"
    );
    // Each air temperature interval was marked by both requests: once new, then counted up.
    assert_eq!(
        counts,
        vec![
            (BASE_MS, 2, NOW_MS + 2),
            (BASE_MS + INTERVAL_MS, 2, NOW_MS + 2),
            (BASE_MS + 3 * INTERVAL_MS, 2, NOW_MS + 2),
        ]
    );
    // The range is on interval starts: [BASE + 1 ms, BASE + interval + 1 ms) contains only the
    // start of interval 1, although it overlaps interval 0's readings.
    let narrow = store
        .mark_for_recompute(
            "north-basin",
            Some("air_temperature"),
            BASE_MS + 1,
            BASE_MS + INTERVAL_MS + 1,
            NOW_MS + 3,
        )
        .await
        .expect("narrow");
    assert_eq!(narrow, 1);
    // An empty range, or a quantity without readings, marks nothing.
    let empty = store
        .mark_for_recompute("north-basin", None, BASE_MS + 1, BASE_MS + 2, NOW_MS)
        .await
        .expect("empty range");
    assert_eq!(empty, 0);
    let unknown_quantity = store
        .mark_for_recompute("north-basin", Some("pm10"), BASE_MS, end, NOW_MS)
        .await
        .expect("no such readings");
    assert_eq!(unknown_quantity, 0);
    let error = store
        .mark_for_recompute("nowhere", None, BASE_MS, end, NOW_MS)
        .await
        .expect_err("unknown area");
    assert!(matches!(error, StoreError::NotFound(_)), "{error:?}");
}

async fn station_health_figures(store: &AnyStore, _database: &TestDatabase) {
    network_of(store, 2).await;
    // ST-1 reports in intervals 0, 1 and 2; ST-2 only in interval 0 and (revised) interval 1.
    let mut batch = Vec::new();
    for index in 0..3 {
        batch.push(reading(
            "ST-1",
            "air_temperature",
            BASE_MS + index * INTERVAL_MS,
            14.0,
        ));
        batch.push(reading(
            "ST-1",
            "air_temperature",
            BASE_MS + index * INTERVAL_MS + 60_000,
            14.2,
        ));
    }
    batch.push(reading("ST-2", "air_temperature", BASE_MS, 13.0));
    store.insert_batch(&batch, NOW_MS).await.expect("batch");
    // A revised value adds a row but not a reading: counts are of current readings.
    store
        .insert_batch(
            &[reading("ST-1", "air_temperature", BASE_MS, 14.1)],
            NOW_MS + 1,
        )
        .await
        .expect("revision");
    let buckets = claim_all(store, NOW_MS + 2).await;
    let ids = station_ids(store).await;
    let handles = [ids["ST-1"], ids["ST-2"]];
    let key = |index: i64| {
        (
            "north-basin".to_owned(),
            "air_temperature".to_owned(),
            BASE_MS + index * INTERVAL_MS,
        )
    };
    let value = |station: u32, value: f64, used: bool| StationValue {
        station,
        value,
        used,
        score: None,
    };
    // Interval 0: both stations used, area median 13.6; ST-1's second reading set aside.
    let set_aside_reading = stored(store, "ST-1", "air_temperature", BASE_MS + 60_000).await;
    store_outcome(
        store,
        &buckets[&key(0)],
        &outcome(
            point(Some(13.6), 2, 0),
            vec![far_record(0, &set_aside_reading, 4.0)],
            vec![value(0, 14.1, true), value(1, 13.0, true)],
        ),
        &handles,
        NOW_MS,
    )
    .await;
    // Interval 1: revision 1 says ST-1 = 14.0 against 13.0; revision 2 (the one that counts) says
    // ST-1 = 14.1, set aside as far from the area median 13.5.
    for (station_value, median) in [(14.0, 13.0), (14.1, 13.5)] {
        store_outcome(
            store,
            &buckets[&key(1)],
            &outcome(
                point(Some(median), 1, 1),
                Vec::new(),
                vec![value(0, station_value, false), value(1, 13.5, true)],
            ),
            &handles,
            NOW_MS,
        )
        .await;
    }
    // Interval 2: no area median (no station kept), so no residual.
    store_outcome(
        store,
        &buckets[&key(2)],
        &outcome(point(None, 0, 1), Vec::new(), vec![value(0, 14.1, false)]),
        &handles,
        NOW_MS,
    )
    .await;

    let residuals = store
        .station_residuals(
            "ST-1",
            "air_temperature",
            BASE_MS,
            BASE_MS + 3 * INTERVAL_MS,
        )
        .await
        .expect("residuals");
    let summary: Vec<(i64, f64, f64, bool)> = residuals
        .iter()
        .map(|r| (r.bucket_start_ms, r.station_value, r.area_median, r.used))
        .collect();
    assert_eq!(
        summary,
        vec![
            (BASE_MS, 14.1, 13.6, true),
            (BASE_MS + INTERVAL_MS, 14.1, 13.5, false)
        ]
    );
    // ST-2 had a value in intervals 0 and 1 only.
    let st2 = store
        .station_residuals(
            "ST-2",
            "air_temperature",
            BASE_MS,
            BASE_MS + 3 * INTERVAL_MS,
        )
        .await
        .expect("residuals");
    assert_eq!(st2.len(), 2);

    let counts = store
        .station_reading_counts(
            "ST-1",
            "air_temperature",
            BASE_MS,
            BASE_MS + 3 * INTERVAL_MS,
        )
        .await
        .expect("counts");
    // Six current readings (the revision replaced one, it did not add one), one set aside.
    assert_eq!((counts.readings, counts.set_aside), (6, 1));
    let narrow = store
        .station_reading_counts(
            "ST-1",
            "air_temperature",
            BASE_MS + INTERVAL_MS,
            BASE_MS + 3 * INTERVAL_MS,
        )
        .await
        .expect("counts");
    assert_eq!((narrow.readings, narrow.set_aside), (4, 0));

    // ST-1's newest observation is interval 2's second reading; ST-9 does not exist.
    assert_eq!(
        store.last_seen("ST-1").await.expect("last seen"),
        Some(BASE_MS + 2 * INTERVAL_MS + 60_000)
    );
    assert_eq!(
        store.last_seen("ST-2").await.expect("last seen"),
        Some(BASE_MS)
    );
    assert_eq!(store.last_seen("ST-9").await.expect("last seen"), None);
}

async fn real_interval_decision_round_trip(store: &AnyStore, _database: &TestDatabase) {
    // The whole path the worker takes, with the real core deciding: four stations report air
    // temperature every minute for one 10-minute interval. ST-1..ST-3 agree (about 13.9, 14.0 and
    // 14.1 °C); ST-4 reads about 30.9 °C; ST-1 sends the missing-data code -999 at minute 4.
    network_of(store, 4).await;
    let mut batch = Vec::new();
    for minute in 0..10 {
        let at = BASE_MS + minute * 60_000;
        for (index, station) in ["ST-1", "ST-2", "ST-3"].into_iter().enumerate() {
            let value = if station == "ST-1" && minute == 4 {
                -999.0
            } else {
                13.0 + 0.2 * minute as f64 + 0.1 * index as f64
            };
            batch.push(reading(station, "air_temperature", at, value));
        }
        batch.push(reading(
            "ST-4",
            "air_temperature",
            at,
            30.0 + 0.2 * minute as f64,
        ));
    }
    store.insert_batch(&batch, NOW_MS).await.expect("batch");
    let bucket = store
        .claim_buckets("w", NOW_MS, 10, STALE_MS, 0, 0)
        .await
        .expect("claim")
        .remove(0);
    let data = store
        .load_interval(
            bucket.area_id,
            &bucket.quantity,
            bucket.bucket_start_ms - 3 * 3_600_000,
            bucket.bucket_start_ms + bucket.interval_ms,
        )
        .await
        .expect("load");
    assert_eq!(data.stations.len(), 4);
    let station_ids: Vec<i64> = data
        .stations
        .iter()
        .map(|series| series.station_id)
        .collect();
    let inputs: Vec<StationReadings<'_>> = data
        .stations
        .iter()
        .enumerate()
        .map(|(handle, series)| StationReadings {
            station: handle as u32,
            readings: &series.readings,
        })
        .collect();
    let quantities = consensor_core::checks::default_quantities();
    let spec = quantities
        .iter()
        .find(|spec| spec.key == "air_temperature")
        .expect("air temperature spec");
    let rules = Rules::default();
    let decided = screen_interval(&IntervalInput {
        quantity: spec,
        rules: &rules,
        start_ms: bucket.bucket_start_ms,
        end_ms: bucket.bucket_start_ms + bucket.interval_ms,
        stations: &inputs,
        overturned: &[],
    });
    let reasons: Vec<String> = decided
        .set_aside
        .iter()
        .map(|record| record.reason(&spec.unit, &rules.missing_codes))
        .collect();
    let stored_result = store
        .store_result(&bucket, &decided, &station_ids, &reasons, NOW_MS + 1)
        .await
        .expect("store");
    assert!(stored_result.bucket_done);

    let listed = list_all(store, &SetAsideFilter::default(), 100).await;
    let mut by_rule: HashMap<(String, Rule), usize> = HashMap::new();
    for row in &listed {
        *by_rule.entry((row.station.clone(), row.rule)).or_default() += 1;
    }
    // API.md: the -999 is a missing-data code (the first rule that catches it), and ST-4's value
    // scores (30.9 − 14.05) / max(1.4826 × 0.1, 0.5) ≈ 33.7 > 3.5, so all ten of its readings are
    // set aside as far from the consensus; nothing else is.
    let expected: HashMap<(String, Rule), usize> = [
        (("ST-1".to_owned(), Rule::MissingCode), 1),
        (("ST-4".to_owned(), Rule::FarFromConsensus), 10),
    ]
    .into_iter()
    .collect();
    assert_eq!(by_rule, expected);
    // The stored reasons are the core's sentences, and the stored numbers are the core's.
    for (row, record) in listed.iter().zip(sorted_records(&decided)) {
        assert_eq!(row.reading_id, record.reading_id as i64);
        assert_eq!(row.reason, record.reason(&spec.unit, &rules.missing_codes));
        assert_eq!(row.score, record.score);
        assert_eq!(row.consensus_median, record.consensus_median);
        assert_eq!(row.consensus_spread, record.consensus_spread);
        assert_eq!(row.station_value, record.station_value);
    }
    let point_read = store
        .latest("north-basin", "air_temperature")
        .await
        .expect("latest")
        .expect("present");
    assert_eq!(point_read.point, decided.point);
    assert_eq!(point_read.point.stations_used, 3);
    assert_eq!(point_read.point.stations_set_aside, 1);
}

/// The outcome's records in the listing's order (observation time, then reading id).
fn sorted_records(outcome: &IntervalOutcome) -> Vec<SetAside> {
    let mut records = outcome.set_aside.clone();
    records.sort_by_key(|record| (record.observed_at_ms, record.reading_id));
    records
}

/// The worker's two claim policies of our own: an interval that has not ended yet is held back
/// until `open_refresh_ms` have passed since its first mark (re-marks do not restart that wait), and
/// `release_claims` hands a failed step's buckets back at once instead of after the stale time.
async fn open_intervals_wait_for_their_refresh_and_released_claims_return(
    store: &AnyStore,
    _database: &TestDatabase,
) {
    network_of(store, 2).await;
    const REFRESH_MS: i64 = 30_000;
    // The interval [BASE, BASE + 10 min) is open until BASE + 10 min; the one before has ended.
    let marked = BASE_MS + 60_000;
    store
        .insert_batch(
            &[
                reading("ST-1", "air_temperature", BASE_MS - INTERVAL_MS, 12.0),
                reading("ST-1", "air_temperature", BASE_MS, 13.0),
            ],
            marked,
        )
        .await
        .expect("first batch");
    // Marked again 20 s later: the wait still counts from the first mark.
    store
        .insert_batch(
            &[reading("ST-2", "air_temperature", BASE_MS + 60_000, 13.1)],
            marked + 20_000,
        )
        .await
        .expect("second batch");
    let early = store
        .claim_buckets("w1", marked + 25_000, 10, STALE_MS, REFRESH_MS, 0)
        .await
        .expect("early claim");
    let starts: Vec<i64> = early.iter().map(|bucket| bucket.bucket_start_ms).collect();
    assert_eq!(starts, [BASE_MS - INTERVAL_MS], "only the ended interval");
    let later = store
        .claim_buckets("w1", marked + REFRESH_MS, 10, STALE_MS, REFRESH_MS, 0)
        .await
        .expect("claim after the refresh");
    let starts: Vec<i64> = later.iter().map(|bucket| bucket.bucket_start_ms).collect();
    assert_eq!(
        starts,
        [BASE_MS],
        "the open interval, once its refresh period has passed"
    );

    // A failed step: w1 hands its two claims back and another worker takes them at once.
    assert_eq!(store.release_claims("w1").await.expect("release"), 2);
    assert_eq!(store.release_claims("w1").await.expect("release again"), 0);
    let taken = store
        .claim_buckets("w2", marked + REFRESH_MS + 1, 10, STALE_MS, REFRESH_MS, 0)
        .await
        .expect("claim released buckets");
    assert_eq!(taken.len(), 2);
}

/// The third claim policy of our own: an ended interval is claimed once no batch has marked it for
/// `settle_ms`, but never later than `open_refresh_ms` after its first mark, however often it is
/// marked again; with `settle_ms` 0 it is claimed at once.
async fn ended_intervals_wait_until_their_marks_settle(store: &AnyStore, _database: &TestDatabase) {
    network_of(store, 2).await;
    const REFRESH_MS: i64 = 30_000;
    const SETTLE_MS: i64 = 1_000;
    // Both intervals before BASE have ended by the time of every batch below.
    let (settling, busy) = (BASE_MS - INTERVAL_MS, BASE_MS - 2 * INTERVAL_MS);
    let marked = BASE_MS + 60_000;
    let mark = |station: &'static str, start: i64, offset_ms: i64, at_ms: i64| async move {
        store
            .insert_batch(
                &[reading(station, "air_temperature", start + offset_ms, 13.0)],
                at_ms,
            )
            .await
            .expect("batch");
    };
    let claim = |now_ms: i64, settle_ms: i64| async move {
        let claimed = store
            .claim_buckets("w", now_ms, 10, STALE_MS, REFRESH_MS, settle_ms)
            .await
            .expect("claim");
        let starts: Vec<i64> = claimed
            .iter()
            .map(|bucket| bucket.bucket_start_ms)
            .collect();
        assert_eq!(
            store.release_claims("w").await.expect("release"),
            starts.len() as u64
        );
        starts
    };
    mark("ST-1", settling, 0, marked).await;
    assert_eq!(
        claim(marked + 500, SETTLE_MS).await,
        [] as [i64; 0],
        "marked 0.5 s ago"
    );
    assert_eq!(claim(marked, 0).await, [settling], "no settling asked for");
    // A second mark 0.9 s later restarts the wait.
    mark("ST-2", settling, 0, marked + 900).await;
    assert_eq!(
        claim(marked + 1_500, SETTLE_MS).await,
        [] as [i64; 0],
        "re-marked 0.6 s ago"
    );
    assert_eq!(
        claim(marked + 1_900, SETTLE_MS).await,
        [settling],
        "quiet for 1 s"
    );

    // An interval marked every 0.8 s (a new reading each time: a duplicate marks nothing) for
    // longer than the refresh period is claimed once that
    // period has passed since its first mark.
    let first = marked + 2_000;
    for (index, at_ms) in (first..first + REFRESH_MS).step_by(800).enumerate() {
        let station = if index % 2 == 0 { "ST-1" } else { "ST-2" };
        mark(station, busy, 1_000 * index as i64, at_ms).await;
        if at_ms + 500 < first + REFRESH_MS {
            assert!(
                !claim(at_ms + 500, SETTLE_MS).await.contains(&busy),
                "still being marked, {} ms after its first mark",
                at_ms + 500 - first
            );
        }
    }
    assert!(claim(first + REFRESH_MS, SETTLE_MS).await.contains(&busy));
}

/// The overview's "newest reading" of an area: the latest observation of any of its stations in any
/// quantity; an area without readings is absent.
async fn newest_observation_of_each_area_across_stations_and_quantities(
    store: &AnyStore,
    _database: &TestDatabase,
) {
    network(store).await;
    east_rise_with_st9(store).await;
    store
        .upsert_area(&NewArea {
            key: "quiet-fen".to_owned(),
            name: "Quiet fen".to_owned(),
            interval_ms: INTERVAL_MS,
        })
        .await
        .expect("area without readings");
    assert!(store
        .newest_observation_by_area()
        .await
        .expect("none yet")
        .is_empty());
    store
        .insert_batch(
            &[
                reading("ST-1", "air_temperature", BASE_MS + 60_000, 12.0),
                reading("ST-2", "air_temperature", BASE_MS, 12.1),
                reading("ST-2", "relative_humidity", BASE_MS + 120_000, 80.0),
                reading("ST-9", "air_temperature", BASE_MS - 60_000, 11.0),
            ],
            NOW_MS,
        )
        .await
        .expect("batch");
    assert_eq!(
        store.newest_observation_by_area().await.expect("newest"),
        vec![
            ("east-rise".to_owned(), BASE_MS - 60_000),
            ("north-basin".to_owned(), BASE_MS + 120_000),
        ]
    );
}
