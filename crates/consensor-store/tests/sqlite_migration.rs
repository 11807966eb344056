//! An SQLite file written by an earlier build, opened by this one: the migrations it lacks run on it
//! and every reading stays, with its id. The file here stops at migration 0004, when every reading
//! was kept in three B-trees (the table, the time-first key and the station-first covering index);
//! this build's 0005 replaces the two indexes with one station-first unique key.

use std::path::Path;
use std::str::FromStr;

use consensor_store::testing::revisions_of;
use consensor_store::{connect, AnyStore, Store};
use sqlx::sqlite::{SqliteConnectOptions, SqlitePoolOptions};

/// 2026-05-28T20:30:00Z.
const BASE_MS: i64 = 1_780_000_200_000;

/// Writes `file` with the migrations up to and including `last` (by number), and `rows` of raw SQL.
async fn database_at_migration(file: &Path, last: u32, rows: &str) {
    let migrations = file.with_file_name("earlier-migrations");
    std::fs::create_dir(&migrations).expect("migrations directory");
    let all = Path::new(env!("CARGO_MANIFEST_DIR")).join("../../migrations/sqlite");
    for entry in std::fs::read_dir(&all).expect("the SQLite migrations") {
        let path = entry.expect("entry").path();
        let name = path
            .file_name()
            .expect("name")
            .to_string_lossy()
            .into_owned();
        let number: u32 = name[..4].parse().expect("a numbered migration");
        if number <= last {
            std::fs::copy(&path, migrations.join(&name)).expect("copy");
        }
    }
    let options = SqliteConnectOptions::from_str(&format!("sqlite://{}", file.display()))
        .expect("url")
        .create_if_missing(true)
        .foreign_keys(true);
    let pool = SqlitePoolOptions::new()
        .max_connections(1)
        .connect_with(options)
        .await
        .expect("pool");
    sqlx::migrate::Migrator::new(migrations.as_path())
        .await
        .expect("migrator")
        .run(&pool)
        .await
        .expect("the earlier migrations");
    sqlx::raw_sql(rows).execute(&pool).await.expect("rows");
    pool.close().await;
}

#[tokio::test]
async fn a_file_from_before_the_station_first_key_keeps_its_readings_and_ids() {
    let directory = tempfile::tempdir().expect("temporary directory");
    let file = directory.path().join("consensor.db");
    // ST-A: a reading and its revision at BASE_MS (ids 7 and 8); ST-B: one reading a minute later
    // (id 9). The ids are given, as an earlier build's rows had them, so that the test can see they
    // are kept.
    let rows = format!(
        "INSERT INTO areas (id, key, name, interval_ms) VALUES (1, 'harbour', 'Harbour', 600000);
         INSERT INTO stations (id, key, area_id, name) VALUES (1, 'ST-A', 1, 'A'), (2, 'ST-B', 1, 'B');
         INSERT INTO quantities (id, key) VALUES (1, 'air_temperature');
         INSERT INTO readings (id, observed_at_ms, station_id, quantity_id, revision, value,
             value_as_sent, unit_as_sent, received_at_ms) VALUES
             (7, {BASE_MS}, 1, 1, 0, 14.0, 14.0, 'Cel', {BASE_MS}),
             (8, {BASE_MS}, 1, 1, 1, 14.5, 14.5, 'Cel', {BASE_MS} + 5000),
             (9, {BASE_MS} + 60000, 2, 1, 0, 13.0, 13.0, 'Cel', {BASE_MS} + 60000);"
    );
    database_at_migration(&file, 4, &rows).await;

    let store = connect(&format!("sqlite://{}", file.display()))
        .await
        .expect("open with this build's migrations");
    let revisions = revisions_of(&store, "ST-A", "air_temperature", BASE_MS).await;
    let kept: Vec<(i64, i64, Option<f64>)> = revisions
        .iter()
        .map(|stored| (stored.id, stored.revision, stored.value))
        .collect();
    assert_eq!(kept, vec![(7, 0, Some(14.0)), (8, 1, Some(14.5))]);
    assert_eq!(
        store.last_seen("ST-B").await.expect("last seen"),
        Some(BASE_MS + 60_000)
    );

    let AnyStore::Sqlite(sqlite) = &store else {
        panic!("an SQLite URL opens an SQLite store");
    };
    let indexes: Vec<(String, String)> = sqlx::query_as(
        "SELECT name, sql FROM sqlite_master WHERE type = 'index' AND tbl_name = 'readings' \
         AND sql IS NOT NULL ORDER BY name",
    )
    .fetch_all(sqlite.pool())
    .await
    .expect("indexes");
    let names: Vec<&str> = indexes.iter().map(|(name, _)| name.as_str()).collect();
    assert_eq!(names, vec!["readings_key"]);
    assert!(
        indexes[0]
            .1
            .contains("UNIQUE INDEX readings_key ON readings (station_id, quantity_id, observed_at_ms, revision)"),
        "{}",
        indexes[0].1
    );

    // A new batch goes on from the kept rows: its reading is the next id, and an identical resend
    // of ST-B's reading is a duplicate.
    let outcome = store
        .insert_batch(
            &[
                consensor_store::NewReading {
                    station: "ST-B".to_owned(),
                    quantity: "air_temperature".to_owned(),
                    observed_at_ms: BASE_MS + 60_000,
                    value: Some(13.0),
                    value_as_sent: Some(13.0),
                    unit_as_sent: Some("Cel".to_owned()),
                },
                consensor_store::NewReading {
                    station: "ST-B".to_owned(),
                    quantity: "air_temperature".to_owned(),
                    observed_at_ms: BASE_MS + 120_000,
                    value: Some(13.2),
                    value_as_sent: Some(13.2),
                    unit_as_sent: Some("Cel".to_owned()),
                },
            ],
            BASE_MS + 180_000,
        )
        .await
        .expect("batch");
    assert_eq!((outcome.accepted, outcome.duplicates), (1, 1));
    let newest = revisions_of(&store, "ST-B", "air_temperature", BASE_MS + 120_000).await;
    assert_eq!(
        newest.iter().map(|stored| stored.id).collect::<Vec<_>>(),
        vec![10]
    );
    store.close().await;
}
