//! `GET /metrics` through a real HTTP client against the real server on a random port, on a real
//! SQLite file and a real PostgreSQL database. Expected counts follow from the requests each test
//! makes (API.md "Ingest" for what counts as accepted, duplicate and revised); the output is checked
//! line by line against the Prometheus text exposition format (Prometheus documentation,
//! "Exposition formats", text-based format version 0.0.4).
//!
//! The counters are process-wide (one registry per process, see `consensor_server::metrics`), so
//! every test here holds [`SERIAL`] and compares counts before and after its own requests.

mod common;

use std::collections::BTreeMap;
use std::sync::Arc;

use common::{at, TestClock, TestServer, ADMIN, T0_MS};
use consensor_server::state::{AppState, Clock};
use consensor_store::testing::TestDatabase;
use consensor_store::Store;
use reqwest::Method;
use serde_json::{json, Value};

on_both_backends!(
    ingest_counters_follow_the_answers,
    latency_is_labelled_with_the_route_template,
    output_follows_the_exposition_format,
    worker_lag_queue_pool_and_compute_time,
    separate_listener_serves_metrics_without_a_token,
    main_listener_metrics_is_a_read_route,
);

/// Tests of this file run one at a time, since they compare process-wide counters.
static SERIAL: tokio::sync::Mutex<()> = tokio::sync::Mutex::const_new(());

/// One sample line: metric name, labels and value.
#[derive(Debug, Clone, PartialEq)]
struct Sample {
    name: String,
    labels: BTreeMap<String, String>,
    value: f64,
}

/// A parsed scrape.
#[derive(Debug)]
struct Scrape {
    samples: Vec<Sample>,
    /// Metric family name → its `# TYPE`.
    types: BTreeMap<String, String>,
}

impl Scrape {
    /// The value of the sample with exactly these labels, if there is one.
    fn value(&self, name: &str, labels: &[(&str, &str)]) -> Option<f64> {
        let wanted: BTreeMap<String, String> = labels
            .iter()
            .map(|(k, v)| ((*k).to_owned(), (*v).to_owned()))
            .collect();
        self.samples
            .iter()
            .find(|s| s.name == name && s.labels == wanted)
            .map(|s| s.value)
    }

    /// Like [`Scrape::value`], with 0 for a series that does not exist yet (a counter or histogram
    /// series appears with its first increment).
    fn count(&self, name: &str, labels: &[(&str, &str)]) -> f64 {
        self.value(name, labels).unwrap_or(0.0)
    }
}

/// Parses exposition text, failing on any line outside the grammar of the text format:
/// `# HELP name text`, `# TYPE name type`, other `#` comments, blank lines, and samples
/// `name{label="value",...} value [timestamp]`. Also checks that each family's TYPE comes before
/// its samples and appears once, and that every histogram's buckets are cumulative with the `+Inf`
/// bucket equal to `_count` (all from "Exposition formats", text format details).
fn parse_exposition(text: &str) -> Scrape {
    let mut samples = Vec::new();
    let mut types: BTreeMap<String, String> = BTreeMap::new();
    let mut seen_samples_of: Vec<String> = Vec::new();
    for (number, line) in text.lines().enumerate() {
        let context = || format!("line {}: {line:?}", number + 1);
        if line.trim().is_empty() {
            continue;
        }
        if let Some(comment) = line.strip_prefix('#') {
            let comment = comment.trim_start();
            if let Some(rest) = comment.strip_prefix("HELP ") {
                let name = rest.split(' ').next().unwrap_or("");
                assert!(is_metric_name(name), "bad HELP name, {}", context());
            } else if let Some(rest) = comment.strip_prefix("TYPE ") {
                let mut parts = rest.split(' ');
                let name = parts.next().unwrap_or("");
                let kind = parts.next().unwrap_or("");
                assert!(parts.next().is_none(), "extra TYPE tokens, {}", context());
                assert!(is_metric_name(name), "bad TYPE name, {}", context());
                assert!(
                    ["counter", "gauge", "histogram", "summary", "untyped"].contains(&kind),
                    "bad TYPE, {}",
                    context()
                );
                assert!(
                    types.insert(name.to_owned(), kind.to_owned()).is_none(),
                    "a second TYPE line for {name}, {}",
                    context()
                );
                assert!(
                    !seen_samples_of.contains(&name.to_owned()),
                    "TYPE after samples of {name}, {}",
                    context()
                );
            }
            continue;
        }
        let sample = parse_sample(line).unwrap_or_else(|| panic!("not a sample, {}", context()));
        seen_samples_of.push(family_of(&sample.name, &types));
        samples.push(sample);
    }
    let scrape = Scrape { samples, types };
    check_histograms(&scrape);
    scrape
}

/// The family a sample belongs to: histogram and summary samples carry a suffix.
fn family_of(name: &str, types: &BTreeMap<String, String>) -> String {
    for suffix in ["_bucket", "_sum", "_count"] {
        if let Some(base) = name.strip_suffix(suffix) {
            if matches!(
                types.get(base).map(String::as_str),
                Some("histogram" | "summary")
            ) {
                return base.to_owned();
            }
        }
    }
    name.to_owned()
}

fn check_histograms(scrape: &Scrape) {
    for (family, kind) in &scrape.types {
        if kind != "histogram" {
            continue;
        }
        // Group the buckets by their labels without `le`.
        let mut series: BTreeMap<BTreeMap<String, String>, Vec<(f64, f64)>> = BTreeMap::new();
        for sample in scrape
            .samples
            .iter()
            .filter(|s| s.name == format!("{family}_bucket"))
        {
            let mut labels = sample.labels.clone();
            let le = labels.remove("le").expect("a bucket without le");
            let bound = parse_value(&le).expect("le is a number");
            series
                .entry(labels)
                .or_default()
                .push((bound, sample.value));
        }
        for (labels, mut buckets) in series {
            buckets.sort_by(|a, b| a.0.total_cmp(&b.0));
            assert!(
                buckets.windows(2).all(|w| w[0].1 <= w[1].1),
                "{family} {labels:?}: buckets are not cumulative: {buckets:?}"
            );
            let last = buckets.last().expect("one bucket");
            assert_eq!(last.0, f64::INFINITY, "{family} {labels:?}: no +Inf bucket");
            let pairs: Vec<(&str, &str)> = labels
                .iter()
                .map(|(k, v)| (k.as_str(), v.as_str()))
                .collect();
            assert_eq!(
                scrape.value(&format!("{family}_count"), &pairs),
                Some(last.1),
                "{family} {labels:?}: the +Inf bucket differs from _count"
            );
            assert!(
                scrape.value(&format!("{family}_sum"), &pairs).is_some(),
                "{family} {labels:?}: no _sum"
            );
        }
    }
}

fn is_metric_name(name: &str) -> bool {
    let mut chars = name.chars();
    matches!(chars.next(), Some(c) if c.is_ascii_alphabetic() || c == '_' || c == ':')
        && chars.all(|c| c.is_ascii_alphanumeric() || c == '_' || c == ':')
}

fn is_label_name(name: &str) -> bool {
    let mut chars = name.chars();
    matches!(chars.next(), Some(c) if c.is_ascii_alphabetic() || c == '_')
        && chars.all(|c| c.is_ascii_alphanumeric() || c == '_')
}

/// A sample value: a Go `ParseFloat` number, or `NaN`, `+Inf`, `-Inf`.
fn parse_value(text: &str) -> Option<f64> {
    match text {
        "NaN" => Some(f64::NAN),
        "+Inf" => Some(f64::INFINITY),
        "-Inf" => Some(f64::NEG_INFINITY),
        _ => text.parse::<f64>().ok(),
    }
}

fn parse_sample(line: &str) -> Option<Sample> {
    let name_end = line.find(['{', ' ']).unwrap_or(line.len());
    let name = &line[..name_end];
    if !is_metric_name(name) {
        return None;
    }
    let mut rest = &line[name_end..];
    let mut labels = BTreeMap::new();
    if let Some(after_brace) = rest.strip_prefix('{') {
        let mut chars = after_brace.char_indices().peekable();
        loop {
            // A label name, `=`, and a quoted value with `\\`, `\"` and `\n` escapes.
            let (start, first) = *chars.peek()?;
            if first == '}' {
                chars.next();
                rest = &after_brace[start + 1..];
                break;
            }
            let equals = after_brace[start..].find('=')? + start;
            let label = &after_brace[start..equals];
            if !is_label_name(label) {
                return None;
            }
            while chars.peek()?.0 <= equals {
                chars.next();
            }
            if chars.next()?.1 != '"' {
                return None;
            }
            let mut value = String::new();
            loop {
                match chars.next()?.1 {
                    '"' => break,
                    '\\' => match chars.next()?.1 {
                        '\\' => value.push('\\'),
                        '"' => value.push('"'),
                        'n' => value.push('\n'),
                        _ => return None,
                    },
                    '\n' => return None,
                    c => value.push(c),
                }
            }
            if labels.insert(label.to_owned(), value).is_some() {
                return None;
            }
            match chars.peek()?.1 {
                ',' => {
                    chars.next();
                }
                '}' => {}
                _ => return None,
            }
        }
    }
    let mut fields = rest.strip_prefix(' ')?.split(' ');
    let value = parse_value(fields.next()?)?;
    if let Some(timestamp) = fields.next() {
        timestamp.parse::<i64>().ok()?;
    }
    if fields.next().is_some() {
        return None;
    }
    Some(Sample {
        name: name.to_owned(),
        labels,
        value,
    })
}

/// `GET /metrics` with `token`; asserts 200 and the exposition content type.
async fn scrape(client: &reqwest::Client, base: &str, token: Option<&str>) -> Scrape {
    let mut request = client.get(format!("{base}/metrics"));
    if let Some(token) = token {
        request = request.bearer_auth(token);
    }
    let response = request.send().await.expect("scrape");
    assert_eq!(response.status(), 200);
    // Prometheus "Exposition formats": the text format's content type.
    assert_eq!(
        response.headers()["content-type"],
        "text/plain; version=0.0.4; charset=utf-8"
    );
    parse_exposition(&response.text().await.expect("body"))
}

fn reading(station: &str, value: f64, minute: i64) -> Value {
    json!({"station": station, "quantity": "air_temperature", "value": value, "observed_at": at(minute)})
}

const LATENCY: &str = "consensor_http_request_duration_seconds_count";

async fn ingest_counters_follow_the_answers(database: TestDatabase) {
    let _serial = SERIAL.lock().await;
    let server = TestServer::start(database, &[]).await;
    server
        .network("velloran-basin", &["VB-01", "VB-02", "VB-03"])
        .await;
    let before = scrape(&server.client, &server.base, Some(ADMIN)).await;

    let post = |readings: Vec<Value>, token: Option<&'static str>| {
        let server = &server;
        async move {
            server
                .call(
                    Method::POST,
                    "/v1/readings",
                    token,
                    Some(json!({ "readings": readings })),
                )
                .await
        }
    };
    // Three new readings.
    let first = vec![
        reading("VB-01", 13.9, 0),
        reading("VB-02", 14.1, 0),
        reading("VB-03", 13.7, 0),
    ];
    let (status, body) = post(first.clone(), Some(ADMIN)).await;
    assert_eq!(
        (status, &body),
        (200, &json!({"accepted": 3, "duplicates": 0, "revised": 0}))
    );
    // One sent again unchanged (a duplicate), one changed (a revision), one new.
    let second = vec![
        first[0].clone(),
        reading("VB-02", 14.4, 0),
        reading("VB-01", 14.0, 1),
    ];
    let (status, body) = post(second, Some(ADMIN)).await;
    assert_eq!(
        (status, &body),
        (200, &json!({"accepted": 2, "duplicates": 1, "revised": 1}))
    );
    // A batch with an unknown station (index 1) and a reading with an unknown station and a time
    // that is not RFC 3339 (index 2): 422, nothing stored.
    let bad = vec![
        reading("VB-01", 14.2, 2),
        reading("VB-99", 14.2, 2),
        json!({"station": "VB-98", "quantity": "air_temperature", "value": 1.0, "observed_at": "yesterday"}),
    ];
    let (status, body) = post(bad, Some(ADMIN)).await;
    assert_eq!(status, 422, "{body}");
    let fields: Vec<(u64, &str)> = body["details"]
        .as_array()
        .expect("details")
        .iter()
        .map(|d| (d["index"].as_u64().unwrap(), d["field"].as_str().unwrap()))
        .collect();
    // The time is refused while decoding, before stations are looked up, so reading 2 is
    // reported for its time only.
    assert_eq!(fields, vec![(1, "station"), (2, "observed_at")]);
    // A body that is not JSON: 400. No token: 401.
    let (status, _) = server
        .post_raw("/v1/readings", Some(ADMIN), "application/json", "{not json")
        .await;
    assert_eq!(status, 400);
    let (status, _) = post(vec![reading("VB-01", 14.2, 3)], None).await;
    assert_eq!(status, 401);

    let after = scrape(&server.client, &server.base, Some(ADMIN)).await;
    let delta = |name: &str, labels: &[(&str, &str)]| {
        after.count(name, labels) - before.count(name, labels)
    };
    // API.md: accepted counts newly stored readings (revisions included), not duplicates.
    assert_eq!(delta("consensor_readings_accepted_total", &[]), 5.0);
    assert_eq!(delta("consensor_readings_duplicates_total", &[]), 1.0);
    assert_eq!(delta("consensor_readings_revised_total", &[]), 1.0);
    // Refused batches by the error code of the answer.
    for (reason, expected) in [
        ("invalid_input", 1.0),
        ("malformed_body", 1.0),
        ("unauthenticated", 1.0),
        ("forbidden", 0.0),
    ] {
        assert_eq!(
            delta(
                "consensor_ingest_batches_rejected_total",
                &[("reason", reason)]
            ),
            expected,
            "{reason}"
        );
    }
    // Two invalid readings, each counted once, by the first field the answer names for it.
    assert_eq!(
        delta("consensor_readings_rejected_total", &[("field", "station")]),
        1.0
    );
    assert_eq!(
        delta(
            "consensor_readings_rejected_total",
            &[("field", "observed_at")]
        ),
        1.0
    );
    assert_eq!(
        delta("consensor_readings_rejected_total", &[("field", "value")]),
        0.0
    );
    // One latency sample per request, by status.
    let route = |status: &'static str| {
        [
            ("route", "/v1/readings"),
            ("method", "POST"),
            ("status", status),
        ]
    };
    assert_eq!(delta(LATENCY, &route("200")), 2.0);
    assert_eq!(delta(LATENCY, &route("422")), 1.0);
    assert_eq!(delta(LATENCY, &route("400")), 1.0);
    assert_eq!(delta(LATENCY, &route("401")), 1.0);
    server.stop().await;
}

async fn latency_is_labelled_with_the_route_template(database: TestDatabase) {
    let _serial = SERIAL.lock().await;
    let server = TestServer::start(database, &[]).await;
    server.network("tarnwhistle-heights", &["TH-01"]).await;
    let before = scrape(&server.client, &server.base, Some(ADMIN)).await;
    // No interval computed yet: 404 from the handler.
    let (status, _) = server
        .call(
            Method::GET,
            "/v1/areas/tarnwhistle-heights/latest?quantity=air_temperature",
            Some(ADMIN),
            None,
        )
        .await;
    assert_eq!(status, 404);
    let (status, _) = server
        .call(Method::GET, "/v1/stations", Some(ADMIN), None)
        .await;
    assert_eq!(status, 200);
    // No route at all.
    let (status, _) = server
        .call(
            Method::GET,
            "/tarnwhistle-heights/nowhere",
            Some(ADMIN),
            None,
        )
        .await;
    assert_eq!(status, 404);
    let after = scrape(&server.client, &server.base, Some(ADMIN)).await;
    let delta =
        |labels: &[(&str, &str)]| after.count(LATENCY, labels) - before.count(LATENCY, labels);
    assert_eq!(
        delta(&[
            ("route", "/v1/areas/{area}/latest"),
            ("method", "GET"),
            ("status", "404"),
        ]),
        1.0
    );
    assert_eq!(
        delta(&[
            ("route", "/v1/stations"),
            ("method", "GET"),
            ("status", "200")
        ]),
        1.0
    );
    assert_eq!(
        delta(&[("route", "unmatched"), ("method", "GET"), ("status", "404")]),
        1.0
    );
    // The histogram has its buckets for that series, and the raw path never becomes a label.
    assert!(after.samples.iter().any(|s| {
        s.name == "consensor_http_request_duration_seconds_bucket"
            && s.labels.get("route").map(String::as_str) == Some("/v1/areas/{area}/latest")
            && s.labels.get("le").map(String::as_str) == Some("+Inf")
    }));
    assert!(
        !after
            .samples
            .iter()
            .any(|s| s.labels.values().any(|v| v.contains("tarnwhistle"))),
        "a raw path leaked into a label"
    );
    server.stop().await;
}

async fn output_follows_the_exposition_format(database: TestDatabase) {
    let _serial = SERIAL.lock().await;
    let server = TestServer::start(database, &[]).await;
    server.network("ostmarrow-flats", &["OF-01"]).await;
    let (status, _) = server
        .call(
            Method::POST,
            "/v1/readings",
            Some(ADMIN),
            Some(json!({"readings": [reading("OF-01", 9.5, 0)]})),
        )
        .await;
    assert_eq!(status, 200);
    // A label value that needs escaping in the text format cannot come from a client (routes are
    // templates), but the parser is exercised on one here so that its escape handling is checked.
    let escaped = parse_sample(r#"x_total{a="q\"u\\o\nte",b="2"} 3"#).expect("escaped sample");
    assert_eq!(escaped.labels["a"], "q\"u\\o\nte");
    assert!(parse_sample("x_total{a=unquoted} 1").is_none());
    assert!(parse_sample("9bad 1").is_none());

    let scrape = scrape(&server.client, &server.base, Some(ADMIN)).await;
    // Every family the server documents is there with its type.
    for (family, kind) in [
        ("consensor_readings_accepted_total", "counter"),
        ("consensor_readings_duplicates_total", "counter"),
        ("consensor_readings_revised_total", "counter"),
        ("consensor_set_aside_total", "counter"),
        ("consensor_worker_ingest_yields_total", "counter"),
        ("consensor_http_request_duration_seconds", "histogram"),
        ("consensor_db_pool_connections", "gauge"),
        ("consensor_db_pool_max_connections", "gauge"),
        ("consensor_pending_intervals", "gauge"),
        ("consensor_worker_lag_seconds", "gauge"),
        ("consensor_database_up", "gauge"),
    ] {
        assert_eq!(
            scrape.types.get(family).map(String::as_str),
            Some(kind),
            "{family}"
        );
    }
    // Every name carries our prefix.
    for sample in &scrape.samples {
        assert!(sample.name.starts_with("consensor_"), "{}", sample.name);
    }
    // Each of the six rules of API.md has a set-aside series from the start.
    for rule in [
        "missing_value",
        "missing_code",
        "out_of_range",
        "step",
        "flat_line",
        "far_from_consensus",
    ] {
        assert!(
            scrape
                .value("consensor_set_aside_total", &[("rule", rule)])
                .is_some(),
            "{rule}"
        );
    }
    assert_eq!(scrape.value("consensor_database_up", &[]), Some(1.0));
    server.stop().await;
}

/// `GET url` with the admin token: the status and the JSON body.
async fn get_as_admin(client: &reqwest::Client, url: &str) -> (u16, Value) {
    let response = client.get(url).bearer_auth(ADMIN).send().await.unwrap();
    let status = response.status().as_u16();
    (status, response.json().await.unwrap())
}

/// A server without the consensus worker, so that the pending queue stays as the test leaves it.
struct QuietServer {
    base: String,
    client: reqwest::Client,
    clock: Arc<TestClock>,
    state: AppState,
    shutdown: tokio::sync::oneshot::Sender<()>,
    task: tokio::task::JoinHandle<()>,
}

impl QuietServer {
    async fn start(database: &TestDatabase) -> QuietServer {
        let (state, clock) = common::open_state(database, &[]).await;
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
            .await
            .expect("bind");
        let base = format!("http://{}", listener.local_addr().expect("address"));
        let app = consensor_server::http::app(state.clone());
        let (shutdown, stop) = tokio::sync::oneshot::channel::<()>();
        let task = tokio::spawn(async move {
            axum::serve(listener, app)
                .with_graceful_shutdown(async move {
                    let _ = stop.await;
                })
                .await
                .expect("serve");
        });
        QuietServer {
            base,
            client: reqwest::Client::new(),
            clock,
            state,
            shutdown,
            task,
        }
    }

    async fn send(&self, method: Method, path: &str, body: Value) -> u16 {
        self.client
            .request(method, format!("{}{path}", self.base))
            .bearer_auth(ADMIN)
            .json(&body)
            .send()
            .await
            .expect("request")
            .status()
            .as_u16()
    }

    async fn stop(self) {
        let _ = self.shutdown.send(());
        self.task.await.expect("server task");
        self.state.store.close().await;
    }
}

async fn worker_lag_queue_pool_and_compute_time(database: TestDatabase) {
    let _serial = SERIAL.lock().await;
    let server = QuietServer::start(&database).await;
    let status = server
        .send(
            Method::PUT,
            "/v1/areas/velloran-basin",
            json!({"name": "Velloran basin", "interval": "10m"}),
        )
        .await;
    assert_eq!(status, 201);
    for station in ["VB-01", "VB-02"] {
        let status = server
            .send(
                Method::PUT,
                &format!("/v1/stations/{station}"),
                json!({"area": "velloran-basin", "name": station}),
            )
            .await;
        assert_eq!(status, 201);
    }
    // Nothing pending yet: no lag.
    let idle = scrape(&server.client, &server.base, Some(ADMIN)).await;
    assert_eq!(idle.value("consensor_worker_lag_seconds", &[]), Some(0.0));
    assert_eq!(idle.value("consensor_pending_intervals", &[]), Some(0.0));

    // Readings in two 10-minute intervals are marked pending at the clock's time; 90 s later the
    // oldest mark is 90 s old (the clock is injected, so the figure is exact).
    let status = server
        .send(
            Method::POST,
            "/v1/readings",
            json!({"readings": [reading("VB-01", 13.0, 0), reading("VB-02", 13.2, 10)]}),
        )
        .await;
    assert_eq!(status, 200);
    server.clock.set_ms(T0_MS + 3_600_000 + 90_000);
    let waiting = scrape(&server.client, &server.base, Some(ADMIN)).await;
    assert_eq!(waiting.value("consensor_pending_intervals", &[]), Some(2.0));
    assert_eq!(
        waiting.value("consensor_worker_lag_seconds", &[]),
        Some(90.0)
    );

    // The pool: default size 8 (config.rs `database_max_connections`); open ones are idle or in use.
    assert_eq!(
        waiting.value("consensor_db_pool_max_connections", &[]),
        Some(8.0)
    );
    let idle_connections = waiting
        .value("consensor_db_pool_connections", &[("state", "idle")])
        .expect("idle");
    let in_use = waiting
        .value("consensor_db_pool_connections", &[("state", "in_use")])
        .expect("in use");
    assert!(idle_connections + in_use >= 1.0 && idle_connections + in_use <= 8.0);

    // The worker's step empties the queue, and the lag falls back to 0.
    let now = server.clock.now_ms();
    let computed = consensor_server::worker::run_until_idle(
        &server.state,
        &consensor_server::worker::WorkerSettings {
            settle: std::time::Duration::ZERO,
            ..consensor_server::worker::WorkerSettings::default()
        },
        now,
    )
    .await
    .expect("worker");
    assert_eq!(computed, 2);
    let caught_up = scrape(&server.client, &server.base, Some(ADMIN)).await;
    assert_eq!(
        caught_up.value("consensor_pending_intervals", &[]),
        Some(0.0)
    );
    assert_eq!(
        caught_up.value("consensor_worker_lag_seconds", &[]),
        Some(0.0)
    );

    // What the worker reports for one interval shows in the counters and the histogram: 0.25 s
    // falls in the bucket with upper bound 0.25 and not in the one with bound 0.1 (buckets are
    // "less than or equal", per the exposition format).
    let before = scrape(&server.client, &server.base, Some(ADMIN)).await;
    consensor_server::metrics::record_bucket_computed(
        0.25,
        &[("step", 2), ("far_from_consensus", 1), ("not_a_rule", 4)],
    );
    let after = scrape(&server.client, &server.base, Some(ADMIN)).await;
    let delta = |name: &str, labels: &[(&str, &str)]| {
        after.count(name, labels) - before.count(name, labels)
    };
    assert_eq!(delta("consensor_set_aside_total", &[("rule", "step")]), 2.0);
    assert_eq!(
        delta(
            "consensor_set_aside_total",
            &[("rule", "far_from_consensus")]
        ),
        1.0
    );
    assert_eq!(
        delta("consensor_set_aside_total", &[("rule", "other")]),
        4.0
    );
    assert_eq!(
        delta("consensor_set_aside_total", &[("rule", "flat_line")]),
        0.0
    );
    assert_eq!(delta("consensor_interval_compute_seconds_count", &[]), 1.0);
    assert!((delta("consensor_interval_compute_seconds_sum", &[]) - 0.25).abs() < 1e-9);
    assert_eq!(
        delta(
            "consensor_interval_compute_seconds_bucket",
            &[("le", "0.25")]
        ),
        1.0
    );
    assert_eq!(
        delta(
            "consensor_interval_compute_seconds_bucket",
            &[("le", "0.1")]
        ),
        0.0
    );
    consensor_server::metrics::record_worker_step_failed();
    let failed = scrape(&server.client, &server.base, Some(ADMIN)).await;
    assert_eq!(
        failed.count("consensor_worker_step_failures_total", &[])
            - after.count("consensor_worker_step_failures_total", &[]),
        1.0
    );
    server.stop().await;
    database.finish().await;
}

async fn separate_listener_serves_metrics_without_a_token(database: TestDatabase) {
    let _serial = SERIAL.lock().await;
    // Set, so that the main listener leaves /metrics out; the test binds the real listener itself
    // on a random port.
    let (state, _clock) =
        common::open_state(&database, &[("CONSENSOR_METRICS__LISTEN", "127.0.0.1:0")]).await;
    let main = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let metrics = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let main_base = format!("http://{}", main.local_addr().unwrap());
    let metrics_base = format!("http://{}", metrics.local_addr().unwrap());
    let (shutdown, stop) = tokio::sync::oneshot::channel::<()>();
    let task = tokio::spawn(consensor_server::serve::run_with_metrics_listener(
        main,
        Some(metrics),
        state,
        async move {
            let _ = stop.await;
        },
    ));
    let client = reqwest::Client::new();
    // The metrics listener needs no token.
    let scraped = scrape(&client, &metrics_base, None).await;
    assert_eq!(scraped.value("consensor_database_up", &[]), Some(1.0));
    // Nothing else is served there.
    let (status, body) = get_as_admin(&client, &format!("{metrics_base}/v1/status")).await;
    assert_eq!(status, 404);
    assert_eq!(body["error"], "not_found");
    // The main listener has no /metrics route, even for an admin.
    let (status, body) = get_as_admin(&client, &format!("{main_base}/metrics")).await;
    assert_eq!(status, 404);
    assert_eq!(body["message"], "no such route");
    // The main listener still serves everything else.
    let response = client
        .get(format!("{main_base}/healthz"))
        .send()
        .await
        .unwrap();
    assert_eq!(response.status(), 200);
    let _ = shutdown.send(());
    task.await.expect("server task").expect("server run");
    database.finish().await;
}

async fn main_listener_metrics_is_a_read_route(database: TestDatabase) {
    let _serial = SERIAL.lock().await;
    let server = TestServer::start(database, &[]).await;
    server.network("ostmarrow-flats", &["OF-02"]).await;
    let status_of = |token: Option<String>| {
        let server = &server;
        async move {
            let mut request = server.client.get(server.url("/metrics"));
            if let Some(token) = token {
                request = request.bearer_auth(token);
            }
            request.send().await.unwrap().status().as_u16()
        }
    };
    // API.md "Roles and tokens": no token 401; a station token may only post readings: 403;
    // reader, operator and admin may read.
    assert_eq!(status_of(None).await, 401);
    let (_, station) = server.token("station", &["OF-02"]).await;
    assert_eq!(status_of(Some(station)).await, 403);
    for role in ["reader", "operator"] {
        let (_, token) = server.token(role, &[]).await;
        assert_eq!(status_of(Some(token)).await, 200, "{role}");
    }
    assert_eq!(status_of(Some(ADMIN.to_owned())).await, 200);
    server.stop().await;

    // With public_read, no token is needed, as for every read route.
    let open =
        TestServer::start(TestDatabase::sqlite(), &[("CONSENSOR_PUBLIC_READ", "true")]).await;
    let response = open.client.get(open.url("/metrics")).send().await.unwrap();
    assert_eq!(response.status(), 200);
    open.stop().await;
}
