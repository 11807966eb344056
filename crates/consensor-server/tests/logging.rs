//! Structured logs from the real `consensor` binary, on a real SQLite file and a real PostgreSQL
//! database: with `[log] format = "json"` (here `CONSENSOR_LOG__FORMAT=json`) every line on standard
//! error is one JSON object, and no token ever reaches the output (CONVENTIONS.md: "never log
//! tokens"), not even at the most verbose level, whether the token is the admin token, a token
//! issued over the API, or one that is unknown.

mod common;

use std::io::Read;
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use common::{at, ADMIN};
use consensor_store::testing::TestDatabase;
use serde_json::{json, Value};

on_both_backends!(json_logs_never_hold_a_token);

/// Output of a child process read to the end on a thread of its own.
fn drain(mut source: impl Read + Send + 'static) -> std::thread::JoinHandle<String> {
    std::thread::spawn(move || {
        let mut bytes = Vec::new();
        let _ = source.read_to_end(&mut bytes);
        String::from_utf8_lossy(&bytes).into_owned()
    })
}

async fn json_logs_never_hold_a_token(database: TestDatabase) {
    let mut child = Command::new(env!("CARGO_BIN_EXE_consensor"))
        .arg("serve")
        .env("CONSENSOR_DATABASE_URL", &database.url)
        .env("CONSENSOR_LISTEN", "127.0.0.1:0")
        .env("CONSENSOR_ADMIN_TOKEN", ADMIN)
        .env("CONSENSOR_LOG__FORMAT", "json")
        // Everything every crate logs, down to trace, so that a leak anywhere would show.
        .env("RUST_LOG", "trace")
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("start consensor");
    let stderr = drain(child.stderr.take().expect("stderr"));
    // Standard output: send the address on as soon as it is printed, and keep reading to the end.
    let (address_tx, address_rx) = std::sync::mpsc::channel::<String>();
    let stdout_pipe = child.stdout.take().expect("stdout");
    let stdout = std::thread::spawn(move || {
        use std::io::BufRead;
        let mut all = String::new();
        for line in std::io::BufReader::new(stdout_pipe)
            .lines()
            .map_while(Result::ok)
        {
            if let Some(address) = line.split("listening on ").nth(1) {
                let _ = address_tx.send(address.trim().to_owned());
            }
            all.push_str(&line);
            all.push('\n');
        }
        all
    });
    let base = address_rx
        .recv_timeout(Duration::from_secs(30))
        .expect("the server did not print its address");

    let client = reqwest::Client::new();
    let call = |method: reqwest::Method, path: &str, token: &str, body: Option<Value>| {
        let mut request = client
            .request(method, format!("{base}{path}"))
            .bearer_auth(token);
        if let Some(body) = body {
            request = request.json(&body);
        }
        request.send()
    };
    // The admin token sets up a network and issues a station token.
    let response = call(
        reqwest::Method::PUT,
        "/v1/areas/velloran-basin",
        ADMIN,
        Some(json!({"name": "Velloran basin", "interval": "10m"})),
    )
    .await
    .unwrap();
    assert_eq!(response.status(), 201);
    let response = call(
        reqwest::Method::PUT,
        "/v1/stations/VB-01",
        ADMIN,
        Some(json!({"area": "velloran-basin", "name": "Mast 1"})),
    )
    .await
    .unwrap();
    assert_eq!(response.status(), 201);
    let issued: Value = call(
        reqwest::Method::POST,
        "/v1/tokens",
        ADMIN,
        Some(json!({"role": "station", "stations": ["VB-01"], "label": "mast 1"})),
    )
    .await
    .unwrap()
    .json()
    .await
    .unwrap();
    let station_token = issued["token"].as_str().expect("token").to_owned();
    let token_id = issued["id"].as_str().expect("id").to_owned();
    // The station token posts readings; a refused batch and reads go through the same code paths
    // that log.
    let response = call(
        reqwest::Method::POST,
        "/v1/readings",
        &station_token,
        Some(json!({"readings": [
            {"station": "VB-01", "quantity": "air_temperature", "value": 13.9, "observed_at": at(0)}
        ]})),
    )
    .await
    .unwrap();
    assert_eq!(response.status(), 200);
    let response = call(
        reqwest::Method::POST,
        "/v1/readings",
        &station_token,
        Some(json!({"readings": [
            {"station": "VB-02", "quantity": "air_temperature", "value": 13.9, "observed_at": at(0)}
        ]})),
    )
    .await
    .unwrap();
    assert_eq!(response.status(), 403);
    let response = call(reqwest::Method::GET, "/v1/status", &station_token, None)
        .await
        .unwrap();
    assert_eq!(response.status(), 403);
    // A token the server never issued: 401.
    let unknown = "cns_0f1e2d3c4b5a69788796a5b4c3d2e1f00f1e2d3c4b5a69788796a5b4c3d2e1f0";
    let response = call(reqwest::Method::GET, "/v1/areas", unknown, None)
        .await
        .unwrap();
    assert_eq!(response.status(), 401);
    // Revoking logs the token's id, never the token.
    let response = call(
        reqwest::Method::DELETE,
        &format!("/v1/tokens/{token_id}"),
        ADMIN,
        None,
    )
    .await
    .unwrap();
    assert_eq!(response.status(), 204);

    // Let the worker compute the interval, so that its log lines are checked too.
    let deadline = Instant::now() + Duration::from_secs(30);
    loop {
        let status: Value = call(reqwest::Method::GET, "/v1/status", ADMIN, None)
            .await
            .unwrap()
            .json()
            .await
            .unwrap();
        if status["pending_intervals"] == 0 {
            break;
        }
        assert!(Instant::now() < deadline, "the worker did not catch up");
        tokio::time::sleep(Duration::from_millis(50)).await;
    }

    // Stop with SIGTERM (a clean stop flushes everything) and collect both streams.
    let signalled = Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status()
        .expect("run kill");
    assert!(signalled.success());
    let deadline = Instant::now() + Duration::from_secs(30);
    loop {
        if child.try_wait().expect("poll child").is_some() {
            break;
        }
        if Instant::now() > deadline {
            let _ = child.kill();
            let _ = child.wait();
            panic!("the server did not stop after SIGTERM");
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    let stderr = stderr.join().expect("stderr reader");
    let stdout = stdout.join().expect("stdout reader");

    // JSON lines: every line of standard error is one JSON object with a level and fields.
    let lines: Vec<Value> = stderr
        .lines()
        .filter(|line| !line.trim().is_empty())
        .map(|line| serde_json::from_str(line).unwrap_or_else(|_| panic!("not JSON: {line}")))
        .collect();
    assert!(lines.iter().all(|line| line["level"].is_string()));
    // RUST_LOG=trace took effect: the request traces (DEBUG and below) are in the log too, so the
    // check below covers the most verbose output.
    assert!(
        lines
            .iter()
            .any(|line| line["level"] == "DEBUG" || line["level"] == "TRACE"),
        "no debug or trace line"
    );
    // The log has the events of this run: the listening line and the issued token, by its id.
    assert!(lines.iter().any(|line| line["fields"]["message"]
        .as_str()
        .is_some_and(|m| m.starts_with("listening on http://"))));
    assert!(
        lines
            .iter()
            .any(|line| line["fields"]["message"] == "token issued"
                && line["fields"]["token_id"] == token_id.as_str()),
        "no `token issued` line with the token id"
    );
    // The secrets themselves appear nowhere.
    for secret in [ADMIN, station_token.as_str(), unknown] {
        assert!(!stderr.contains(secret), "a token is in the log");
        assert!(!stdout.contains(secret), "a token is on standard output");
    }
    database.finish().await;
}
