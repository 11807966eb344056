//! One suite of storage behaviours, run against both backends: a real SQLite file in a temporary
//! directory, and a real PostgreSQL server when `CONSENSOR_TEST_POSTGRES_URL` is set (each test gets
//! a fresh database on that server, dropped at the end). Every expected value follows from the
//! test's own setup; the comments say how.

use std::collections::BTreeSet;
use std::sync::atomic::{AtomicU64, Ordering};

use consensor_store::{
    AnyStore, BatchOutcome, NewArea, NewReading, NewStation, NewToken, ReadingKey, Store,
    StoreError,
};

/// Ten minutes, the interval of the test area.
const INTERVAL_MS: i64 = 600_000;
/// 2026-05-28T20:30:00Z, a multiple of INTERVAL_MS (1_780_000_200_000 = 2_966_667 × 600_000), so
/// it starts a bucket.
const BASE_MS: i64 = 1_780_000_200_000;
/// The ingest time the tests pass as `now_ms`.
const NOW_MS: i64 = BASE_MS + 3_600_000;

/// A store on a fresh database that is removed when the test finishes.
struct TestDatabase {
    store: AnyStore,
    _directory: Option<tempfile::TempDir>,
    postgres_cleanup: Option<(String, String)>,
}

impl TestDatabase {
    async fn sqlite() -> TestDatabase {
        let directory = tempfile::tempdir().expect("temporary directory");
        // The file does not exist yet: connecting must create it.
        let path = directory.path().join("consensor.db");
        let store = consensor_store::connect(&format!("sqlite://{}", path.display()))
            .await
            .expect("open sqlite store");
        TestDatabase {
            store,
            _directory: Some(directory),
            postgres_cleanup: None,
        }
    }

    /// `None`, after a loud notice, when no PostgreSQL server is configured for the tests.
    async fn postgres() -> Option<TestDatabase> {
        let Ok(server_url) = std::env::var("CONSENSOR_TEST_POSTGRES_URL") else {
            announce_postgres_skipped();
            return None;
        };
        static NEXT: AtomicU64 = AtomicU64::new(0);
        let nanos = std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .expect("clock after 1970")
            .subsec_nanos();
        let name = format!(
            "consensor_test_{}_{}_{}",
            std::process::id(),
            nanos,
            NEXT.fetch_add(1, Ordering::Relaxed)
        );
        run_on_server(&server_url, &format!("CREATE DATABASE {name}")).await;
        let store = consensor_store::connect(&database_url(&server_url, &name))
            .await
            .expect("open postgres store");
        Some(TestDatabase {
            store,
            _directory: None,
            postgres_cleanup: Some((server_url, name)),
        })
    }

    async fn finish(self) {
        self.store.close().await;
        if let Some((server_url, name)) = self.postgres_cleanup {
            run_on_server(&server_url, &format!("DROP DATABASE {name} WITH (FORCE)")).await;
        }
    }
}

/// Says loudly, once per test process, that the PostgreSQL variants are skipped. It writes to the
/// stderr handle itself because libtest captures `eprintln!` of passing tests, which would hide it.
fn announce_postgres_skipped() {
    use std::io::Write;
    static ONCE: std::sync::Once = std::sync::Once::new();
    ONCE.call_once(|| {
        let _ = writeln!(
            std::io::stderr(),
            "\n!!! CONSENSOR_TEST_POSTGRES_URL is not set: SKIPPING every PostgreSQL variant of \
             the storage suite. Set it (e.g. postgres://postgres@127.0.0.1:5432/test) to run \
             them. !!!\n"
        );
    });
}

/// The URL of database `name` on the server of `server_url` (same user, host and options).
fn database_url(server_url: &str, name: &str) -> String {
    let (without_query, query) = match server_url.split_once('?') {
        Some((base, query)) => (base, format!("?{query}")),
        None => (server_url, String::new()),
    };
    let scheme_end = without_query.find("://").expect("URL with a scheme") + 3;
    let authority_end = without_query[scheme_end..]
        .find('/')
        .map_or(without_query.len(), |slash| scheme_end + slash);
    format!("{}/{name}{query}", &without_query[..authority_end])
}

async fn run_on_server(server_url: &str, statement: &str) {
    use sqlx::Connection;
    let mut connection = sqlx::PgConnection::connect(server_url)
        .await
        .expect("connect to the PostgreSQL test server");
    sqlx::raw_sql(statement)
        .execute(&mut connection)
        .await
        .unwrap_or_else(|error| panic!("{statement}: {error}"));
    connection.close().await.expect("close admin connection");
}

/// Runs raw SQL (which may hold several statements) on whichever backend the store uses.
async fn execute_raw(store: &AnyStore, sqlite_sql: &str, postgres_sql: &str) {
    match store {
        AnyStore::Sqlite(sqlite) => {
            sqlx::raw_sql(sqlite_sql)
                .execute(sqlite.pool())
                .await
                .expect("raw SQL on SQLite");
        }
        AnyStore::Postgres(postgres) => {
            sqlx::raw_sql(postgres_sql)
                .execute(postgres.pool())
                .await
                .expect("raw SQL on PostgreSQL");
        }
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

/// Generates one `#[tokio::test]` per backend for each named case.
macro_rules! on_both_backends {
    ($($case:ident),* $(,)?) => {
        mod sqlite_backend {
            $(
                #[tokio::test]
                async fn $case() {
                    let database = super::TestDatabase::sqlite().await;
                    super::$case(&database.store).await;
                    database.finish().await;
                }
            )*
        }
        mod postgres_backend {
            $(
                #[tokio::test]
                async fn $case() {
                    let Some(database) = super::TestDatabase::postgres().await else {
                        return;
                    };
                    super::$case(&database.store).await;
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
    changed_value_is_a_revision_and_the_old_one_stays_readable,
    repeated_key_within_one_batch,
    unknown_station_refuses_the_whole_batch,
    failure_midway_through_a_batch_stores_nothing,
    pending_buckets_are_marked_with_interval_starts,
    concurrent_identical_batches_store_each_reading_once,
    tokens_insert_find_and_revoke,
);

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

async fn ping_reports_ready(store: &AnyStore) {
    // connect() ran the migrations, so the readiness check must pass.
    store.ping().await.expect("ping");
}

async fn durability_settings_are_in_force(store: &AnyStore) {
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

async fn area_and_station_upserts_report_creation(store: &AnyStore) {
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

async fn station_keys_lookup_resolves_a_batch(store: &AnyStore) {
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

async fn same_batch_twice_is_stored_once(store: &AnyStore) {
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

async fn changed_value_is_a_revision_and_the_old_one_stays_readable(store: &AnyStore) {
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

async fn repeated_key_within_one_batch(store: &AnyStore) {
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
    let revisions = store
        .reading_revisions(&ReadingKey {
            station: "ST-2".to_owned(),
            quantity: "dew_point".to_owned(),
            observed_at_ms: BASE_MS,
        })
        .await
        .expect("revisions");
    assert_eq!(revisions.len(), 2);
    assert_eq!(revisions[1].value, Some(5.5));
    let again = store
        .insert_batch(&[missing], NOW_MS + 1)
        .await
        .expect("again");
    // The null reading is stored already, so resending it is a duplicate.
    assert_eq!(again.duplicates, 1);
}

async fn unknown_station_refuses_the_whole_batch(store: &AnyStore) {
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

async fn failure_midway_through_a_batch_stores_nothing(store: &AnyStore) {
    network(store).await;
    // A trigger makes the database itself fail on one row, as a constraint or I/O failure would.
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

async fn pending_buckets_are_marked_with_interval_starts(store: &AnyStore) {
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

async fn concurrent_identical_batches_store_each_reading_once(store: &AnyStore) {
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

async fn tokens_insert_find_and_revoke(store: &AnyStore) {
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
