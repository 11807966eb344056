//! Per-caller rate limits (`[rate_limit]`) on the real server: a token over its budget gets 429 with
//! `Retry-After` in seconds and the contract's error body; budgets are per token id, and anonymous
//! public reads are limited per peer address.

mod common;

use std::sync::Arc;

use common::{TestClock, TestServer, ADMIN, T0_MS};
use consensor_server::config::Config;
use consensor_store::testing::TestDatabase;
use serde_json::{json, Value};

/// A budget of 5 requests, refilling at one per 10 s: a test's quick requests never see a refill
/// worth a whole request.
const LIMITS: [(&str, &str); 2] = [
    ("CONSENSOR_RATE_LIMIT__REQUESTS_PER_SECOND", "0.1"),
    ("CONSENSOR_RATE_LIMIT__BURST", "5"),
];

/// Sends a GET and returns status, `Retry-After` and the JSON body.
async fn get(
    client: &reqwest::Client,
    url: &str,
    token: Option<&str>,
) -> (u16, Option<String>, Value) {
    let mut request = client.get(url);
    if let Some(token) = token {
        request = request.bearer_auth(token);
    }
    let response = request.send().await.unwrap();
    let status = response.status().as_u16();
    let retry_after = response
        .headers()
        .get("retry-after")
        .map(|v| v.to_str().unwrap().to_owned());
    let body = response.json().await.unwrap_or(Value::Null);
    (status, retry_after, body)
}

/// A 429 as API.md's error format and RFC 9110 §10.2.3 (`Retry-After: <delay-seconds>`) say.
#[track_caller]
fn assert_limited(status: u16, retry_after: Option<String>, body: &Value) {
    assert_eq!(status, 429, "{body}");
    assert_eq!(body["error"], "rate_limited", "{body}");
    assert!(
        body["message"].as_str().is_some_and(|m| !m.is_empty()),
        "{body}"
    );
    // One request's worth refills in 10 s at 0.1 per second; whole seconds, rounded up.
    let seconds: u64 = retry_after
        .expect("Retry-After")
        .parse()
        .expect("Retry-After in whole seconds");
    assert!((1..=10).contains(&seconds), "Retry-After {seconds}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_token_over_its_budget_gets_429_with_retry_after() {
    let server = TestServer::start(TestDatabase::sqlite(), &LIMITS).await;
    // Four admin requests of the admin's five: an area, a station and two tokens.
    server.network("velloran-basin", &["ST-1"]).await;
    let (_, reader_a) = server.token("reader", &[]).await;
    let (_, station) = server.token("station", &["ST-1"]).await;
    let url = server.url("/v1/areas");

    // Reader A: five requests pass, the sixth is refused, and stays refused while it retries.
    for n in 0..5 {
        let (status, _, body) = get(&server.client, &url, Some(&reader_a)).await;
        assert_eq!(status, 200, "request {n}: {body}");
    }
    for _ in 0..3 {
        let (status, retry_after, body) = get(&server.client, &url, Some(&reader_a)).await;
        assert_limited(status, retry_after, &body);
    }

    // Budgets are per token: the station token has its own, for posting readings.
    let reading = json!({"readings": [{"station": "ST-1", "quantity": "air_temperature",
        "value": 13.9, "observed_at": common::at(0)}]});
    for n in 0..5 {
        let (status, body) = server
            .call(
                reqwest::Method::POST,
                "/v1/readings",
                Some(&station),
                Some(reading.clone()),
            )
            .await;
        assert_eq!(status, 200, "post {n}: {body}");
    }
    let response = server
        .client
        .post(server.url("/v1/readings"))
        .bearer_auth(&station)
        .json(&reading)
        .send()
        .await
        .unwrap();
    let status = response.status().as_u16();
    let retry_after = response
        .headers()
        .get("retry-after")
        .map(|v| v.to_str().unwrap().to_owned());
    let body: Value = response.json().await.unwrap();
    assert_limited(status, retry_after, &body);

    // The admin still has one request left, then is limited too.
    let (status, _, body) = get(&server.client, &url, Some(ADMIN)).await;
    assert_eq!(status, 200, "{body}");
    let (status, retry_after, body) = get(&server.client, &url, Some(ADMIN)).await;
    assert_limited(status, retry_after, &body);

    // A token that is not valid is a 401, whatever the budgets.
    let (status, retry_after, body) = get(&server.client, &url, Some("cns_not-a-token")).await;
    assert_eq!(status, 401, "{body}");
    assert_eq!(retry_after, None);
    // Liveness needs no token and has no budget.
    for _ in 0..10 {
        let (status, _, body) = get(&server.client, &server.url("/healthz"), None).await;
        assert_eq!(status, 200, "{body}");
    }
    server.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn without_a_configured_rate_there_is_no_limit() {
    let server = TestServer::start(TestDatabase::sqlite(), &[]).await;
    let url = server.url("/v1/areas");
    for n in 0..200 {
        let (status, _, body) = get(&server.client, &url, Some(ADMIN)).await;
        assert_eq!(status, 200, "request {n}: {body}");
    }
    server.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn anonymous_public_reads_are_limited_per_peer_address() {
    // The real server on a random port (`serve::run`, which gives each request its peer address).
    let database = TestDatabase::sqlite();
    let mut env: Vec<(String, String)> = vec![
        ("CONSENSOR_DATABASE_URL".into(), database.url.clone()),
        ("CONSENSOR_ADMIN_TOKEN".into(), ADMIN.into()),
        ("CONSENSOR_PUBLIC_READ".into(), "true".into()),
    ];
    env.extend(
        LIMITS
            .iter()
            .map(|(k, v)| ((*k).to_owned(), (*v).to_owned())),
    );
    let config = Config::load(None, env, &[]).unwrap();
    let state =
        consensor_server::serve::open_state(config, Arc::new(TestClock::at(T0_MS + 3_600_000)))
            .await
            .unwrap();
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let base = format!("http://{}", listener.local_addr().unwrap());
    let (stop, stopped) = tokio::sync::oneshot::channel::<()>();
    let server = tokio::spawn(consensor_server::serve::run(listener, state, async move {
        let _ = stopped.await;
    }));
    let client = reqwest::Client::new();
    let url = format!("{base}/v1/areas");

    for n in 0..5 {
        let (status, _, body) = get(&client, &url, None).await;
        assert_eq!(status, 200, "anonymous request {n}: {body}");
    }
    let (status, retry_after, body) = get(&client, &url, None).await;
    assert_limited(status, retry_after, &body);
    // A caller with a token is judged by its token's budget, not by the address it shares.
    let (status, _, body) = get(&client, &url, Some(ADMIN)).await;
    assert_eq!(status, 200, "{body}");

    let _ = stop.send(());
    server.await.unwrap().unwrap();
    database.finish().await;
}
