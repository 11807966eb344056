//! `consensor import` (API.md "Command line"): the real binary loads a station file and CSV and
//! NDJSON readings into a real database, through the checks of `POST /v1/readings`; a re-import adds
//! nothing; a bad line stops it with the file, line and field named, and the batches committed before
//! it stay stored.

mod common;

use std::path::{Path, PathBuf};

use common::{ADMIN, T0_MS};
use consensor_store::testing::TestDatabase;
use consensor_store::Store;

on_both_backends!(
    csv_and_ndjson_readings_are_imported_once_and_computed_by_serve,
    a_bad_line_stops_the_import_and_keeps_the_earlier_batches,
);

/// The outcome of one run of the binary.
struct Run {
    success: bool,
    stdout: String,
    stderr: String,
}

impl Run {
    /// The run succeeded and printed `expected`.
    fn assert_printed(&self, expected: &str) {
        assert!(self.success, "{}", self.stderr);
        assert!(self.stdout.contains(expected), "{}", self.stdout);
    }

    /// The run failed and said `expected` on stderr.
    fn assert_failed_with(&self, expected: &str) {
        assert!(!self.success, "{}", self.stdout);
        assert!(self.stderr.contains(expected), "{}", self.stderr);
    }
}

/// Runs `consensor import --station-file STATIONS OPTIONS --format FORMAT FILE` on
/// `database_url` given by `--database`.
async fn import(
    database_url: &str,
    stations: &str,
    options: &[&str],
    format: &str,
    file: &str,
) -> Run {
    let output = tokio::process::Command::new(env!("CARGO_BIN_EXE_consensor"))
        .arg("import")
        .args(["--database", database_url, "--station-file", stations])
        .args(options)
        .args(["--format", format, file])
        .env_remove("CONSENSOR_DATABASE_URL")
        .env("RUST_LOG", "warn")
        .output()
        .await
        .expect("run consensor import");
    Run {
        success: output.status.success(),
        stdout: String::from_utf8_lossy(&output.stdout).into_owned(),
        stderr: String::from_utf8_lossy(&output.stderr).into_owned(),
    }
}

/// A directory for the input files: the SQLite database's own, or a fresh one for PostgreSQL.
fn input_directory(database: &TestDatabase) -> (PathBuf, Option<tempfile::TempDir>) {
    match database.directory() {
        Some(directory) => (directory.to_owned(), None),
        None => {
            let directory = tempfile::tempdir().expect("temporary directory");
            (directory.path().to_owned(), Some(directory))
        }
    }
}

fn write(directory: &Path, name: &str, text: &str) -> String {
    let path = directory.join(name);
    std::fs::write(&path, text).expect("write input file");
    path.display().to_string()
}

/// Options that create the missing areas (10-minute intervals) and store two readings per
/// transaction, so that a file spans several.
const NEW_AREAS_BATCHES_OF_2: &[&str] = &["--area-interval", "10m", "--batch-size", "2"];

/// The station file: three stations in two areas of the invented scenario, with and without
/// coordinates, and a quoted name holding a comma (RFC 4180 §2.6).
const STATIONS: &str = "\
station,area,name,lat,lon,elevation_m
VB-01,velloran-basin,Velloran mast 1,,,
VB-02,velloran-basin,Velloran mast 2,,,
TH-01,tarnwhistle-heights,\"Tarnwhistle ridge, north mast\",,,
";

/// The value stored for one reading, in the canonical unit, and the value and unit as sent.
async fn stored(
    store: &impl Store,
    station: &str,
    quantity: &str,
    minute: i64,
) -> (Option<f64>, Option<f64>, Option<String>) {
    let at_ms = T0_MS + minute * 60_000;
    let rows = store
        .readings_history(station, quantity, at_ms, at_ms + 1)
        .await
        .unwrap();
    assert_eq!(rows.len(), 1, "{station} {quantity} {minute}: {rows:?}");
    let row = &rows[0];
    (row.value, row.value_as_sent, row.unit_as_sent.clone())
}

async fn csv_and_ndjson_readings_are_imported_once_and_computed_by_serve(database: TestDatabase) {
    let (directory, _keep) = input_directory(&database);
    let stations = write(&directory, "stations.csv", STATIONS);
    // Temperatures in degrees Fahrenheit, converted by the exact definition
    // t/°C = (t/°F − 32)/1.8 (NIST SP 811 (2008) §B.9; section numbers from memory, the
    // definition as crates/consensor-core/src/units.rs quotes it): 59 °F = 15 °C, 212 °F = 100 °C,
    // −40 °F = −40 °C. The unit column may be empty (canonical unit) and so may the value (no value).
    let csv = write(
        &directory,
        "readings.csv",
        "station,quantity,observed_at,value,unit
VB-01,air_temperature,2026-06-01T07:00:00Z,59,[degF]
VB-01,air_temperature,2026-06-01T07:01:00Z,212,[degF]
VB-01,air_temperature,2026-06-01T07:02:00Z,-40,[degF]
VB-02,air_temperature,2026-06-01T07:00:00Z,14.5,
VB-02,air_temperature,2026-06-01T07:01:00Z,,
",
    );
    // NDJSON: the same objects as the HTTP NDJSON body, a blank line and an offset time included.
    // 101.325 kPa = 1013.25 hPa (the standard atmosphere, 101 325 Pa exactly; NIST SP 811 §B.8).
    let ndjson = write(
        &directory,
        "readings.ndjson",
        r#"{"station": "TH-01", "quantity": "air_pressure", "value": 101.325, "unit": "kPa", "observed_at": "2026-06-01T07:00:00Z"}

{"station": "TH-01", "quantity": "air_pressure", "value": 1013.0, "observed_at": "2026-06-01T09:01:00+02:00"}
{"station": "TH-01", "quantity": "air_temperature", "value": null, "observed_at": "2026-06-01T07:00:00Z"}
"#,
    );

    // Without --area-interval the areas must exist: nothing is imported and the station file's
    // line and the field are named.
    let run = import(&database.url, &stations, &[], "csv", &csv).await;
    run.assert_failed_with(&format!(
        "{stations}:2: field area: area \"velloran-basin\" does not exist"
    ));

    // Batches of 2, so both files span several transactions.
    let run = import(
        &database.url,
        &stations,
        NEW_AREAS_BATCHES_OF_2,
        "csv",
        &csv,
    )
    .await;
    run.assert_printed(
        "imported 5 readings from 1 file(s): accepted 5, duplicates 0, revised 0; \
             stations created 3, updated 0; areas created 2",
    );
    let run = import(&database.url, &stations, &[], "ndjson", &ndjson).await;
    run.assert_printed(
        "imported 3 readings from 1 file(s): accepted 3, duplicates 0, revised 0; \
             stations created 0, updated 3; areas created 0",
    );

    let store = database.open().await;
    assert_eq!(store.count_readings().await.unwrap(), 8);
    // Stored readings mark their intervals pending for the worker (Store::insert_batch).
    assert!(store.count_pending_buckets().await.unwrap() > 0);
    // NIST SP 811 §B.9: these three conversions are exact in binary floating point too, since
    // (59 − 32)·5 = 135, (212 − 32)·5 = 900 and (−40 − 32)·5 = −360 divide by 9 exactly.
    let degf = Some("[degF]".to_owned());
    assert_eq!(
        stored(&store, "VB-01", "air_temperature", 0).await,
        (Some(15.0), Some(59.0), degf.clone())
    );
    assert_eq!(
        stored(&store, "VB-01", "air_temperature", 1).await,
        (Some(100.0), Some(212.0), degf.clone())
    );
    assert_eq!(
        stored(&store, "VB-01", "air_temperature", 2).await,
        (Some(-40.0), Some(-40.0), degf)
    );
    assert_eq!(
        stored(&store, "VB-02", "air_temperature", 0).await,
        (Some(14.5), Some(14.5), None)
    );
    // API.md: an empty value is "no value", stored as such.
    assert_eq!(
        stored(&store, "VB-02", "air_temperature", 1).await,
        (None, None, None)
    );
    // 101.325 kPa × 10 hPa/kPa = 1013.25 hPa (NIST SP 811 §B.8); one rounding of the product, so
    // compared within 1e-9 hPa.
    let (value, as_sent, unit) = stored(&store, "TH-01", "air_pressure", 0).await;
    assert!((value.unwrap() - 1013.25).abs() < 1e-9, "{value:?}");
    assert_eq!((as_sent, unit.as_deref()), (Some(101.325), Some("kPa")));
    // 09:01+02:00 is 07:01 UTC (RFC 3339 §4.2).
    assert_eq!(
        stored(&store, "TH-01", "air_pressure", 1).await,
        (Some(1013.0), Some(1013.0), None)
    );
    let areas = store.list_areas().await.unwrap();
    assert_eq!(
        areas
            .iter()
            .map(|a| (a.key.as_str(), a.interval_ms))
            .collect::<Vec<_>>(),
        [
            ("tarnwhistle-heights", 600_000),
            ("velloran-basin", 600_000)
        ]
    );
    let names: Vec<String> = store
        .list_stations()
        .await
        .unwrap()
        .into_iter()
        .map(|s| s.name)
        .collect();
    assert!(
        names.contains(&"Tarnwhistle ridge, north mast".to_owned()),
        "{names:?}"
    );
    store.close().await;

    // Importing both files again adds nothing: every reading is a duplicate (API.md "Ingest").
    let run = import(&database.url, &stations, &[], "csv", &csv).await;
    run.assert_printed("imported 5 readings from 1 file(s): accepted 0, duplicates 5, revised 0");
    let run = import(&database.url, &stations, &[], "ndjson", &ndjson).await;
    run.assert_printed("imported 3 readings from 1 file(s): accepted 0, duplicates 3, revised 0");

    // A later `consensor serve` computes the imported intervals: its status reports every stored
    // reading and, once the worker has caught up, nothing pending (API.md "Operations").
    let (mut child, base) = common::start_binary(&database.url, &[]);
    let client = reqwest::Client::new();
    let deadline = std::time::Instant::now() + std::time::Duration::from_secs(30);
    let status = loop {
        let status: serde_json::Value = client
            .get(format!("{base}/v1/status"))
            .bearer_auth(ADMIN)
            .send()
            .await
            .expect("status request")
            .json()
            .await
            .expect("status body");
        if status["pending_intervals"] == 0 {
            break status;
        }
        assert!(
            std::time::Instant::now() < deadline,
            "the worker did not catch up: {status}"
        );
        tokio::time::sleep(std::time::Duration::from_millis(50)).await;
    };
    child.kill().expect("stop the server");
    child.wait().expect("reap the server");
    assert_eq!(status["readings"], 8, "{status}");
    assert!(!status["last_computed_at"].is_null(), "{status}");
    database.finish().await;
}

async fn a_bad_line_stops_the_import_and_keeps_the_earlier_batches(database: TestDatabase) {
    let (directory, _keep) = input_directory(&database);
    let stations = write(&directory, "stations.csv", STATIONS);
    let good_lines = "station,quantity,observed_at,value,unit
VB-01,air_temperature,2026-06-01T07:00:00Z,12.5,
VB-01,air_temperature,2026-06-01T07:01:00Z,12.6,
VB-01,air_temperature,2026-06-01T07:02:00Z,12.7,
VB-01,air_temperature,2026-06-01T07:03:00Z,12.8,
VB-01,air_temperature,2026-06-01T07:04:00Z,12.9,
";
    // Line 7 holds a value that is not a number: found while reading, so the two batches of two
    // before it are committed and line 6, read since, is not.
    let csv = write(
        &directory,
        "history.csv",
        &format!("{good_lines}VB-01,air_temperature,2026-06-01T07:05:00Z,warm,\n"),
    );
    let run = import(
        &database.url,
        &stations,
        NEW_AREAS_BATCHES_OF_2,
        "csv",
        &csv,
    )
    .await;
    run.assert_failed_with(&format!("{csv}:7: field value: \"warm\" is not a number"));
    run.assert_failed_with("4 readings of earlier batches were stored before the error");
    let store = database.open().await;
    assert_eq!(store.count_readings().await.unwrap(), 4);

    // An unconvertible unit is found when the batch is resolved against the quantity table, as
    // the HTTP ingest finds it: NDJSON line 3 of the second batch; only the first batch stays.
    let ndjson = write(
        &directory,
        "history.ndjson",
        r#"{"station": "VB-02", "quantity": "air_temperature", "value": 11.0, "observed_at": "2026-06-01T07:00:00Z"}
{"station": "VB-02", "quantity": "air_temperature", "value": 11.1, "observed_at": "2026-06-01T07:01:00Z"}
{"station": "VB-02", "quantity": "air_temperature", "value": 11.2, "unit": "hPa", "observed_at": "2026-06-01T07:02:00Z"}
{"station": "VB-02", "quantity": "air_temperature", "value": 11.3, "observed_at": "2026-06-01T07:03:00Z"}
"#,
    );
    let run = import(
        &database.url,
        &stations,
        &["--batch-size", "2"],
        "ndjson",
        &ndjson,
    )
    .await;
    run.assert_failed_with(&format!("{ndjson}:3: field unit:"));
    run.assert_failed_with("2 readings of earlier batches were stored before the error");
    assert_eq!(store.count_readings().await.unwrap(), 6);

    // An unknown station is named by line and field too (the HTTP ingest's "unknown station").
    let unknown = write(
        &directory,
        "unknown.csv",
        "station,quantity,observed_at,value\nZZ-99,air_temperature,2026-06-01T07:00:00Z,1\n",
    );
    let run = import(&database.url, &stations, &[], "csv", &unknown).await;
    run.assert_failed_with(&format!(
        "{unknown}:2: field station: unknown station \"ZZ-99\""
    ));

    // Fixed, the same file imports again: the four stored readings are duplicates, the rest new.
    let csv = write(
        &directory,
        "history.csv",
        &format!("{good_lines}VB-01,air_temperature,2026-06-01T07:05:00Z,13.0,\n"),
    );
    let run = import(&database.url, &stations, &[], "csv", &csv).await;
    run.assert_printed("imported 6 readings from 1 file(s): accepted 2, duplicates 4, revised 0");
    assert_eq!(store.count_readings().await.unwrap(), 8);
    store.close().await;
    database.finish().await;
}
