//! Test support: the real server on `127.0.0.1:0` over a real database, and a real HTTP client.
#![allow(dead_code)]

use std::sync::atomic::{AtomicI64, Ordering};
use std::sync::Arc;

use consensor_server::config::Config;
use consensor_server::state::{AppState, Clock};
use consensor_store::testing::TestDatabase;
use serde_json::{json, Value};

/// The admin token the test servers accept (given as `admin_token`, as CONSENSOR_ADMIN_TOKEN would).
pub const ADMIN: &str = "test-admin-token-0123456789";

/// 2026-06-01T07:00:00Z in epoch milliseconds.
pub const T0_MS: i64 = 1_780_297_200_000;

/// The worker setting of the tests that wait for it: it polls often, so that they wait
/// milliseconds, not half-seconds.
pub const FAST_WORKER: (&str, &str) = ("CONSENSOR_WORKER__POLL_INTERVAL_SECONDS", "0.05");

/// The worked example of Leys et al. (2013), J. Exp. Soc. Psychol. 49(4), 764–766: of these eight
/// values only 1000 is set aside (modified z-score 191.36 > 3.5), and the median of the seven kept
/// is 6 (numpy 2.4 `np.median`; the figures of consensor-core's `tests/interval.rs`).
pub const LEYS: [f64; 8] = [1.0, 3.0, 3.0, 6.0, 8.0, 10.0, 10.0, 1000.0];

/// A clock the test sets; it starts at T0 + 1 h.
#[derive(Debug)]
pub struct TestClock(AtomicI64);

impl TestClock {
    pub fn at(ms: i64) -> TestClock {
        TestClock(AtomicI64::new(ms))
    }

    pub fn set_ms(&self, ms: i64) {
        self.0.store(ms, Ordering::SeqCst);
    }
}

impl Clock for TestClock {
    fn now_ms(&self) -> i64 {
        self.0.load(Ordering::SeqCst)
    }
}

/// A running server on a fresh database.
pub struct TestServer {
    pub base: String,
    pub client: reqwest::Client,
    pub clock: Arc<TestClock>,
    pub database: TestDatabase,
    shutdown: Option<tokio::sync::oneshot::Sender<()>>,
    task: Option<tokio::task::JoinHandle<anyhow::Result<()>>>,
}

impl TestServer {
    /// Starts the server on `database` with the default configuration plus `settings`
    /// (environment-style pairs such as `("CONSENSOR_BODY_LIMIT_BYTES", "2048")`).
    pub async fn start(database: TestDatabase, settings: &[(&str, &str)]) -> TestServer {
        let (state, clock) = open_state(&database, settings).await;
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
        let base = format!("http://{}", listener.local_addr().unwrap());
        let (shutdown, stop) = tokio::sync::oneshot::channel::<()>();
        let task = tokio::spawn(consensor_server::serve::run(listener, state, async move {
            let _ = stop.await;
        }));
        TestServer {
            base,
            client: reqwest::Client::new(),
            clock,
            database,
            shutdown: Some(shutdown),
            task: Some(task),
        }
    }

    pub fn url(&self, path: &str) -> String {
        format!("{}{path}", self.base)
    }

    /// Stops the server and removes its database.
    pub async fn stop(mut self) {
        if let Some(shutdown) = self.shutdown.take() {
            let _ = shutdown.send(());
        }
        if let Some(task) = self.task.take() {
            task.await.expect("server task").expect("server run");
        }
        self.database.finish().await;
    }

    /// Sends a request with an optional bearer token and a JSON body; returns status and JSON body
    /// (`Value::Null` for an empty body).
    pub async fn call(
        &self,
        method: reqwest::Method,
        path: &str,
        token: Option<&str>,
        body: Option<Value>,
    ) -> (u16, Value) {
        let mut request = self.client.request(method, self.url(path));
        if let Some(token) = token {
            request = request.bearer_auth(token);
        }
        if let Some(body) = body {
            request = request.json(&body);
        }
        let response = request.send().await.expect("request");
        read(response).await
    }

    /// `GET path` with an optional bearer token.
    pub async fn get(&self, path: &str, token: Option<&str>) -> (u16, Value) {
        self.call(reqwest::Method::GET, path, token, None).await
    }

    /// Posts `readings` as one JSON batch with the admin token; asserts 200 and returns the body.
    pub async fn post_readings(&self, readings: Vec<Value>) -> Value {
        let (status, body) = self
            .call(
                reqwest::Method::POST,
                "/v1/readings",
                Some(ADMIN),
                Some(json!({ "readings": readings })),
            )
            .await;
        assert_eq!(status, 200, "{body}");
        body
    }

    /// Posts a raw body with a content type.
    pub async fn post_raw(
        &self,
        path: &str,
        token: Option<&str>,
        content_type: &str,
        body: impl Into<reqwest::Body>,
    ) -> (u16, Value) {
        let mut request = self
            .client
            .post(self.url(path))
            .header("content-type", content_type)
            .body(body);
        if let Some(token) = token {
            request = request.bearer_auth(token);
        }
        read(request.send().await.expect("request")).await
    }

    /// Creates area `area` (10-minute intervals) and the given stations in it.
    pub async fn network(&self, area: &str, stations: &[&str]) {
        let (status, body) = self
            .call(
                reqwest::Method::PUT,
                &format!("/v1/areas/{area}"),
                Some(ADMIN),
                Some(json!({"name": format!("Area {area}"), "interval": "10m"})),
            )
            .await;
        assert!(status == 201 || status == 200, "{status} {body}");
        for station in stations {
            let (status, body) = self
                .call(
                    reqwest::Method::PUT,
                    &format!("/v1/stations/{station}"),
                    Some(ADMIN),
                    Some(json!({"area": area, "name": format!("Station {station}")})),
                )
                .await;
            assert!(status == 201 || status == 200, "{status} {body}");
        }
    }

    /// A new token with `role` (and stations for a station token).
    pub async fn token(&self, role: &str, stations: &[&str]) -> (String, String) {
        let (status, body) = self
            .call(
                reqwest::Method::POST,
                "/v1/tokens",
                Some(ADMIN),
                Some(json!({"role": role, "stations": stations, "label": "test"})),
            )
            .await;
        assert_eq!(status, 201, "{body}");
        (
            body["id"].as_str().unwrap().to_owned(),
            body["token"].as_str().unwrap().to_owned(),
        )
    }

    /// `GET /v1/status` → readings count.
    pub async fn stored_readings(&self) -> u64 {
        let (status, body) = self
            .call(reqwest::Method::GET, "/v1/status", Some(ADMIN), None)
            .await;
        assert_eq!(status, 200, "{body}");
        body["readings"].as_u64().unwrap()
    }
}

/// The server's state (no listener, no worker yet) on `database`, with the admin token and the
/// default configuration plus `settings` (environment-style pairs); its clock starts at T0 + 1 h.
/// The clock stands still unless a test moves it, so the worker computes an ended interval as soon
/// as it is marked (`worker.settle_seconds = 0`; a test may set it again).
pub async fn open_state(
    database: &TestDatabase,
    settings: &[(&str, &str)],
) -> (AppState, Arc<TestClock>) {
    let mut env: Vec<(String, String)> = vec![
        ("CONSENSOR_DATABASE_URL".into(), database.url.clone()),
        ("CONSENSOR_ADMIN_TOKEN".into(), ADMIN.into()),
        ("CONSENSOR_WORKER__SETTLE_SECONDS".into(), "0".into()),
    ];
    env.extend(
        settings
            .iter()
            .map(|(k, v)| ((*k).to_owned(), (*v).to_owned())),
    );
    let config = Config::load(None, env, &[]).expect("test configuration");
    let clock = Arc::new(TestClock::at(T0_MS + 3_600_000));
    let state = consensor_server::serve::open_state(config, clock.clone())
        .await
        .expect("open state");
    (state, clock)
}

/// Polls `GET /v1/status` until `pending_intervals` is 0 (at most 30 s, every 50 ms); returns the
/// last status body.
pub async fn wait_until_computed(server: &TestServer) -> Value {
    let deadline = std::time::Instant::now() + std::time::Duration::from_secs(30);
    loop {
        let (status, body) = server
            .call(reqwest::Method::GET, "/v1/status", Some(ADMIN), None)
            .await;
        assert_eq!(status, 200, "{body}");
        if body["pending_intervals"] == 0 {
            return body;
        }
        assert!(
            std::time::Instant::now() < deadline,
            "the worker did not catch up: {body}"
        );
        tokio::time::sleep(std::time::Duration::from_millis(50)).await;
    }
}

async fn read(response: reqwest::Response) -> (u16, Value) {
    let status = response.status().as_u16();
    let text = response.text().await.expect("body");
    let value = if text.is_empty() {
        Value::Null
    } else {
        serde_json::from_str(&text).unwrap_or(Value::String(text))
    };
    (status, value)
}

/// Readings of `quantity`, `values[i]` from `stations[i]`, all observed at `T0 + minute`.
pub fn readings_at(quantity: &str, stations: &[String], values: &[f64], minute: i64) -> Vec<Value> {
    stations
        .iter()
        .zip(values)
        .map(|(station, value)| {
            json!({"station": station, "quantity": quantity, "value": value,
                   "observed_at": at(minute)})
        })
        .collect()
}

/// RFC 3339 text for `T0 + minutes`.
pub fn at(minutes: i64) -> String {
    consensor_server::http::rfc3339(T0_MS + minutes * 60_000)
}

/// Runs an async test body on both backends: a real SQLite file, and a fresh database on the
/// PostgreSQL server of CONSENSOR_TEST_POSTGRES_URL (skipped loudly when it is unset).
#[macro_export]
macro_rules! on_both_backends {
    ($($name:ident),* $(,)?) => {
        $(
            mod $name {
                #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
                async fn sqlite() {
                    super::$name(consensor_store::testing::TestDatabase::sqlite()).await;
                }

                #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
                async fn postgres() {
                    if let Some(database) = consensor_store::testing::TestDatabase::postgres().await {
                        super::$name(database).await;
                    }
                }
            }
        )*
    };
}

/// The real `consensor` binary serving `database_url` on a random port, with extra environment
/// `settings`; returns the child and its base URL once it has printed `listening on http://ADDR`
/// (the line API.md promises).
// The caller owns the child and kills and reaps it; a panic here fails the test, whose process
// exit then takes the child with it.
#[allow(clippy::zombie_processes)]
pub fn start_binary(
    database_url: &str,
    settings: &[(&str, &str)],
) -> (std::process::Child, String) {
    use std::io::{BufRead, BufReader};
    let mut command = std::process::Command::new(env!("CARGO_BIN_EXE_consensor"));
    command
        .arg("serve")
        .env("CONSENSOR_DATABASE_URL", database_url)
        .env("CONSENSOR_LISTEN", "127.0.0.1:0")
        .env("CONSENSOR_ADMIN_TOKEN", ADMIN)
        .env("RUST_LOG", "warn")
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::inherit());
    for (key, value) in settings {
        command.env(key, value);
    }
    let mut child = command.spawn().expect("start consensor");
    let stdout = child.stdout.take().expect("stdout");
    let mut lines = BufReader::new(stdout).lines();
    let deadline = std::time::Instant::now() + std::time::Duration::from_secs(30);
    loop {
        assert!(
            std::time::Instant::now() < deadline,
            "the server did not start in time"
        );
        let line = lines
            .next()
            .expect("server exited before listening")
            .expect("read stdout");
        if let Some(address) = line.split("listening on ").nth(1) {
            // Keep draining stdout so the server never blocks on a full pipe.
            std::thread::spawn(move || for _ in lines {});
            return (child, address.trim().to_owned());
        }
    }
}

/// Adds an area of `interval_ms` intervals (named after its id) with the given stations, directly
/// through the store.
pub async fn add_area<S: consensor_store::Store>(
    store: &S,
    area: &str,
    interval_ms: i64,
    stations: &[String],
) {
    store
        .upsert_area(&consensor_store::NewArea {
            key: area.into(),
            name: area.into(),
            interval_ms,
        })
        .await
        .unwrap();
    for station in stations {
        store
            .upsert_station(&consensor_store::NewStation {
                key: station.clone(),
                area_key: area.into(),
                name: station.clone(),
                lat: None,
                lon: None,
                elevation_m: None,
            })
            .await
            .unwrap();
    }
}

/// One reading a minute from every station for `minutes` minutes from `start_ms`, station `s` at
/// minute `m` reading `base + 0.2·s + 0.1·(m mod 7)`: values that agree, so nothing is set aside.
pub fn minutely_readings(
    stations: &[String],
    quantity: &str,
    start_ms: i64,
    minutes: i64,
    base: f64,
) -> Vec<consensor_store::NewReading> {
    (0..minutes)
        .flat_map(|minute| {
            stations
                .iter()
                .enumerate()
                .map(move |(s, station)| consensor_store::NewReading {
                    station: station.clone(),
                    quantity: quantity.into(),
                    observed_at_ms: start_ms + minute * 60_000,
                    value: Some(base + s as f64 * 0.2 + (minute % 7) as f64 * 0.1),
                    value_as_sent: None,
                    unit_as_sent: None,
                })
        })
        .collect()
}

/// A JSON ingest body with one reading a minute from every station for `minutes` minutes from
/// minute `first_minute` (minutes since the epoch), station `s` at minute `m` of the batch reading
/// `value(s, m)`.
pub fn minutely_batch_json(
    stations: &[String],
    quantity: &str,
    first_minute: i64,
    minutes: i64,
    value: impl Fn(usize, i64) -> f64,
) -> Value {
    let mut readings = Vec::new();
    for minute in 0..minutes {
        let observed = consensor_server::http::rfc3339((first_minute + minute) * 60_000);
        for (s, station) in stations.iter().enumerate() {
            readings.push(json!({
                "station": station,
                "quantity": quantity,
                "value": value(s, minute),
                "observed_at": observed,
            }));
        }
    }
    json!({ "readings": readings })
}

/// How many current readings of `quantity` the stations have in `[from_ms, to_ms)`.
pub async fn stored_between(
    store: &impl consensor_store::Store,
    stations: &[String],
    quantity: &str,
    from_ms: i64,
    to_ms: i64,
) -> usize {
    let mut stored = 0;
    for station in stations {
        stored += store
            .readings_history(station, quantity, from_ms, to_ms)
            .await
            .expect("read back")
            .len();
    }
    stored
}

/// An answer to [`send_as_admin`]: status, `Retry-After` if any, and the JSON body (`Null` when
/// the body is not JSON).
#[derive(Debug, Clone)]
pub struct Answer {
    pub status: u16,
    pub retry_after: Option<String>,
    pub body: Value,
}

/// Sends one request with the admin token to `base` (`http://ADDR`) with a real client.
pub async fn send_as_admin(
    client: &reqwest::Client,
    base: &str,
    method: reqwest::Method,
    path: &str,
    body: Option<Value>,
) -> Answer {
    let mut request = client
        .request(method, format!("{base}{path}"))
        .bearer_auth(ADMIN);
    if let Some(body) = body {
        request = request.json(&body);
    }
    let response = request.send().await.expect("request");
    let status = response.status().as_u16();
    let retry_after = response
        .headers()
        .get("retry-after")
        .map(|value| value.to_str().expect("ASCII Retry-After").to_owned());
    let body = response.json().await.unwrap_or(Value::Null);
    Answer {
        status,
        retry_after,
        body,
    }
}
