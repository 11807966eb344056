//! Several replicas on one PostgreSQL database (API.md "Operations"; the worker's claims): two real
//! `consensor` processes share 1000 pending intervals; one is killed with SIGKILL part-way; every
//! interval ends computed exactly once (revision 1), none lost.

mod common;

use std::time::{Duration, Instant};

use consensor_store::testing::TestDatabase;
use consensor_store::Store;

const MINUTE: i64 = 60_000;

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn two_processes_compute_each_interval_once_even_when_one_dies() {
    let Some(database) = TestDatabase::postgres().await else {
        return;
    };
    let store = database.open().await;
    let stations: Vec<String> = (0..5).map(|i| format!("R-{i}")).collect();
    common::add_area(&store, "shared", MINUTE, &stations).await;
    // 1000 one-minute intervals, each with a reading from every station: 1000 pending buckets.
    let start_ms = (chrono::Utc::now().timestamp_millis() / MINUTE - 2000) * MINUTE;
    let readings = common::minutely_readings(&stations, "air_temperature", start_ms, 1000, 10.0);
    store
        .insert_batch(&readings, start_ms + 2000 * MINUTE)
        .await
        .unwrap();
    assert_eq!(store.count_pending_buckets().await.unwrap(), 1000);

    // Small claims so both processes take part; a short stale time so the survivor takes over the
    // claims the killed one held.
    let settings = [
        ("CONSENSOR_WORKER__CLAIM_BATCH", "4"),
        ("CONSENSOR_WORKER__STALE_CLAIM_SECONDS", "2"),
        ("CONSENSOR_WORKER__POLL_INTERVAL_SECONDS", "0.05"),
    ];
    let (mut first, _) = common::start_binary(&database.url, &settings);
    let (mut second, _) = common::start_binary(&database.url, &settings);
    let deadline = Instant::now() + Duration::from_secs(120);
    // Kill the first process part-way through.
    while store.count_pending_buckets().await.unwrap() > 700 {
        assert!(Instant::now() < deadline, "no progress");
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    first.kill().expect("kill -9");
    first.wait().expect("reap");
    while store.count_pending_buckets().await.unwrap() > 0 {
        assert!(
            Instant::now() < deadline,
            "the surviving replica did not finish"
        );
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    second.kill().expect("kill");
    second.wait().expect("reap");

    // Every interval has a result, and each was computed exactly once: its latest revision is 1.
    let series = store
        .series(
            "shared",
            "air_temperature",
            start_ms,
            start_ms + 1000 * MINUTE,
        )
        .await
        .unwrap();
    assert_eq!(series.len(), 1000, "no interval lost");
    let recomputed: Vec<i64> = series
        .iter()
        .filter(|row| row.revision != 1)
        .map(|row| row.start_ms)
        .collect();
    assert!(
        recomputed.is_empty(),
        "intervals computed more than once: {recomputed:?}"
    );
    assert!(series.iter().all(|row| row.point.stations_used == 5));
    store.close().await;
    database.finish().await;
}
