//! An acknowledged batch survives `kill -9` of the process that stored it.
//!
//! The test starts itself again as a writer process, which opens a fresh SQLite file, stores a
//! batch, reports the acknowledgement on stdout and then blocks. The parent kills it with SIGKILL
//! (no destructor runs, the pool is never closed and the WAL is never checkpointed), reopens the
//! file and checks that every acknowledged reading is there. A power loss cannot be simulated here;
//! for that the test relies on `synchronous=FULL`, which `store_suite` checks is in force.

use std::io::{BufRead, BufReader, Read};
use std::process::{Command, Stdio};

use consensor_store::{NewArea, NewReading, NewStation, Store};

/// Set only in the writer process: the path of the database file to write.
const WRITER_DATABASE_VARIABLE: &str = "CONSENSOR_STORE_CRASH_WRITER_DB";
const ACKNOWLEDGED: &str = "ACKNOWLEDGED";
/// 2026-05-28T20:30:00Z.
const BASE_MS: i64 = 1_780_000_200_000;
/// How many readings the writer stores: two batches of 500 one-second readings.
const READINGS: i64 = 1_000;

fn main() {
    let runtime = tokio::runtime::Runtime::new().expect("tokio runtime");
    match std::env::var(WRITER_DATABASE_VARIABLE) {
        Ok(path) => runtime.block_on(writer(&path)),
        Err(_) => {
            runtime.block_on(acknowledged_batch_survives_kill_9());
            println!("acknowledged_batch_survives_kill_9 ... ok");
        }
    }
}

async fn acknowledged_batch_survives_kill_9() {
    let directory = tempfile::tempdir().expect("temporary directory");
    let path = directory.path().join("crash.db");
    let mut writer = Command::new(std::env::current_exe().expect("own executable"))
        .env(WRITER_DATABASE_VARIABLE, &path)
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .spawn()
        .expect("start writer process");
    let mut lines = BufReader::new(writer.stdout.take().expect("writer stdout")).lines();
    let acknowledged: u64 = loop {
        let line = lines
            .next()
            .expect("writer ended before acknowledging")
            .expect("read writer stdout");
        if let Some(count) = line.strip_prefix(ACKNOWLEDGED) {
            break count.trim().parse().expect("acknowledged count");
        }
    };
    // Child::kill sends SIGKILL on Unix: the writer gets no chance to flush or close anything.
    writer.kill().expect("kill writer");
    let status = writer.wait().expect("wait for writer");
    assert!(!status.success(), "the writer must have been killed");

    // The writer stored two batches of READINGS / 2 new keys each, and acknowledged both.
    assert_eq!(acknowledged, READINGS as u64);
    let store = consensor_store::connect(&format!("sqlite://{}", path.display()))
        .await
        .expect("reopen after the crash");
    assert_eq!(
        store.count_readings().await.expect("count"),
        acknowledged,
        "every acknowledged reading survives the kill"
    );
    let history = store
        .readings_history(
            "ST-1",
            "air_temperature",
            BASE_MS,
            BASE_MS + READINGS * 1_000,
        )
        .await
        .expect("history");
    // The last acknowledged reading is the one at second READINGS - 1, with value READINGS - 1.
    let last = history.last().expect("readings");
    assert_eq!(last.observed_at_ms, BASE_MS + (READINGS - 1) * 1_000);
    assert_eq!(last.value, Some((READINGS - 1) as f64));
    store.close().await;
}

/// The writer role: store, acknowledge, then wait to be killed.
async fn writer(path: &str) {
    let store = consensor_store::connect(&format!("sqlite://{path}"))
        .await
        .expect("open store");
    store
        .upsert_area(&NewArea {
            key: "north-basin".to_owned(),
            name: "North basin".to_owned(),
            interval_ms: 600_000,
        })
        .await
        .expect("area");
    store
        .upsert_station(&NewStation {
            key: "ST-1".to_owned(),
            area_key: "north-basin".to_owned(),
            name: "mast 1".to_owned(),
            lat: None,
            lon: None,
            elevation_m: None,
        })
        .await
        .expect("station");
    let readings: Vec<NewReading> = (0..READINGS)
        .map(|second| NewReading {
            station: "ST-1".to_owned(),
            quantity: "air_temperature".to_owned(),
            observed_at_ms: BASE_MS + second * 1_000,
            value: Some(second as f64),
            value_as_sent: Some(second as f64),
            unit_as_sent: None,
        })
        .collect();
    let mut acknowledged = 0;
    for batch in readings.chunks((READINGS / 2) as usize) {
        acknowledged += store
            .insert_batch(batch, BASE_MS + READINGS * 1_000)
            .await
            .expect("batch")
            .accepted;
    }
    println!("{ACKNOWLEDGED} {acknowledged}");
    // Block on stdin, which the parent keeps open, until the parent kills this process; if the
    // parent goes away instead, stdin closes and the writer ends.
    let mut sink = Vec::new();
    let _ = std::io::stdin().read_to_end(&mut sink);
}
