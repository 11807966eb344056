//! A 200 on ingest means the readings survive a crash of the process (API.md "Ingest"). The real
//! `consensor` binary is sent concurrent batches, killed with SIGKILL right after its last 200,
//! restarted on the same database, and every acknowledged reading is found, none doubled.

mod common;

use common::ADMIN;
use consensor_store::testing::TestDatabase;
use serde_json::{json, Value};

on_both_backends!(acknowledged_batches_survive_sigkill);

async fn send(
    client: &reqwest::Client,
    base: &str,
    method: reqwest::Method,
    path: &str,
    body: Value,
) -> (u16, Value) {
    let response = client
        .request(method, format!("{base}{path}"))
        .bearer_auth(ADMIN)
        .json(&body)
        .send()
        .await
        .expect("request");
    let status = response.status().as_u16();
    (status, response.json().await.unwrap_or(Value::Null))
}

async fn acknowledged_batches_survive_sigkill(database: TestDatabase) {
    let (mut child, base) = common::start_binary(&database.url, &[]);
    let client = reqwest::Client::new();
    let (status, _) = send(
        &client,
        &base,
        reqwest::Method::PUT,
        "/v1/areas/crash-test",
        json!({"name": "Crash test", "interval": "10m"}),
    )
    .await;
    assert_eq!(status, 201);
    let stations: Vec<String> = (0..20).map(|i| format!("K-{i:02}")).collect();
    for station in &stations {
        let (status, _) = send(
            &client,
            &base,
            reqwest::Method::PUT,
            &format!("/v1/stations/{station}"),
            json!({"area": "crash-test", "name": station}),
        )
        .await;
        assert_eq!(status, 201);
    }
    // Four concurrent writers, each with its own minutes, 20 batches of 20 stations × 10 minutes.
    let now_ms = chrono::Utc::now().timestamp_millis();
    let start_minute = now_ms / 60_000 - 24 * 60;
    let mut writers = Vec::new();
    for writer in 0..4i64 {
        let client = client.clone();
        let base = base.clone();
        let stations = stations.clone();
        writers.push(tokio::spawn(async move {
            let mut acknowledged = 0u64;
            for batch in 0..20i64 {
                let mut readings = Vec::new();
                for minute in 0..10i64 {
                    let minute_index = start_minute + (writer * 20 + batch) * 10 + minute;
                    let observed = consensor_server::http::rfc3339(minute_index * 60_000);
                    for (s, station) in stations.iter().enumerate() {
                        readings.push(json!({"station": station, "quantity": "air_temperature", "value": 10.0 + s as f64 / 10.0, "observed_at": observed}));
                    }
                }
                let (status, body) = send(&client, &base, reqwest::Method::POST, "/v1/readings", json!({"readings": readings})).await;
                assert_eq!(status, 200, "{body}");
                acknowledged += body["accepted"].as_u64().unwrap();
            }
            acknowledged
        }));
    }
    let mut acknowledged = 0;
    for writer in writers {
        acknowledged += writer.await.unwrap();
    }
    // SIGKILL right after the last 200: no chance to flush or shut down cleanly.
    child.kill().expect("kill -9");
    child.wait().expect("reap");
    assert_eq!(acknowledged, 4 * 20 * 10 * 20);

    let (mut child, base) = common::start_binary(&database.url, &[]);
    let (status, body) = send(
        &client,
        &base,
        reqwest::Method::GET,
        "/v1/status",
        Value::Null,
    )
    .await;
    assert_eq!(status, 200);
    assert_eq!(
        body["readings"].as_u64(),
        Some(acknowledged),
        "every acknowledged reading is found"
    );
    // None doubled: sending one writer's first batch again is all duplicates.
    let mut again = Vec::new();
    for minute in 0..10i64 {
        let observed = consensor_server::http::rfc3339((start_minute + minute) * 60_000);
        for (s, station) in stations.iter().enumerate() {
            again.push(json!({"station": station, "quantity": "air_temperature", "value": 10.0 + s as f64 / 10.0, "observed_at": observed}));
        }
    }
    let (status, body) = send(
        &client,
        &base,
        reqwest::Method::POST,
        "/v1/readings",
        json!({"readings": again}),
    )
    .await;
    assert_eq!(
        (status, body),
        (200, json!({"accepted": 0, "duplicates": 200, "revised": 0}))
    );
    child.kill().expect("kill");
    child.wait().expect("reap");
    database.finish().await;
}

on_both_backends!(sigterm_stops_cleanly_and_keeps_every_acknowledged_reading);

/// API.md "Command line": the server stops cleanly on SIGTERM (and SIGINT). Batches answered before
/// the signal are kept; the process exits with status 0 within the grace period.
async fn sigterm_stops_cleanly_and_keeps_every_acknowledged_reading(database: TestDatabase) {
    let (mut child, base) =
        common::start_binary(&database.url, &[("CONSENSOR_SHUTDOWN_GRACE_SECONDS", "5")]);
    let client = reqwest::Client::new();
    let (status, _) = send(
        &client,
        &base,
        reqwest::Method::PUT,
        "/v1/areas/calm",
        json!({"name": "Calm", "interval": "10m"}),
    )
    .await;
    assert_eq!(status, 201);
    let (status, _) = send(
        &client,
        &base,
        reqwest::Method::PUT,
        "/v1/stations/C-1",
        json!({"area": "calm", "name": "C-1"}),
    )
    .await;
    assert_eq!(status, 201);
    let observed = consensor_server::http::rfc3339(
        chrono::Utc::now().timestamp_millis() / 60_000 * 60_000 - 3_600_000,
    );
    let (status, _) = send(&client, &base, reqwest::Method::POST, "/v1/readings", json!({"readings": [{"station": "C-1", "quantity": "air_temperature", "value": 11.5, "observed_at": observed}]})).await;
    assert_eq!(status, 200);
    let signalled = std::process::Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status()
        .expect("run kill");
    assert!(signalled.success());
    let deadline = std::time::Instant::now() + std::time::Duration::from_secs(15);
    let exit = loop {
        if let Some(exit) = child.try_wait().expect("poll child") {
            break exit;
        }
        assert!(
            std::time::Instant::now() < deadline,
            "the server did not stop after SIGTERM"
        );
        tokio::time::sleep(std::time::Duration::from_millis(50)).await;
    };
    assert!(exit.success(), "exit status {exit:?}");
    let (mut child, base) = common::start_binary(&database.url, &[]);
    let (status, body) = send(
        &client,
        &base,
        reqwest::Method::GET,
        "/v1/status",
        Value::Null,
    )
    .await;
    assert_eq!((status, body["readings"].as_u64()), (200, Some(1)));
    child.kill().expect("kill");
    child.wait().expect("reap");
    database.finish().await;
}
