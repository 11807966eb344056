//! Hostile requests against the real server on a random port: deep nesting, very long strings and
//! ids, oversized headers, and clients that send their request head slowly or trickle their body.
//! Each must get a clean answer in the contract's error format (or have its connection closed),
//! never crash the server; after each, the server still answers.

mod common;

use std::time::{Duration, Instant};

use common::{TestServer, ADMIN};
use consensor_store::testing::TestDatabase;
use serde_json::{json, Value};
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::TcpStream;

/// The server still serves after a hostile request.
async fn assert_still_serving(server: &TestServer) {
    let (status, body) = server
        .call(reqwest::Method::GET, "/healthz", None, None)
        .await;
    assert_eq!(status, 200, "{body}");
}

/// API.md: every error body is `{"error": code, "message": sentence, "details"?}`.
#[track_caller]
fn assert_error_body(body: &Value, code: &str) {
    assert_eq!(body["error"], code, "{body}");
    assert!(
        body["message"].as_str().is_some_and(|m| !m.is_empty()),
        "{body}"
    );
}

/// The `details[].field` values of an error body.
fn fields(body: &Value) -> Vec<String> {
    body["details"]
        .as_array()
        .map(|details| {
            details
                .iter()
                .map(|d| d["field"].as_str().unwrap_or_default().to_owned())
                .collect()
        })
        .unwrap_or_default()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn deeply_nested_bodies_are_400_not_a_crash() {
    let server = TestServer::start(TestDatabase::sqlite(), &[]).await;
    // 100 000 nested arrays: far past serde_json's default recursion limit of 128 (serde_json 1.x
    // documentation) and the decoders' own limit of 64. API.md: a body that is not well-formed is a
    // 400.
    let deep = "[".repeat(100_000);
    for content_type in [
        "application/json",
        "application/x-ndjson",
        "application/senml+json",
    ] {
        let (status, body) = server
            .post_raw("/v1/readings", Some(ADMIN), content_type, deep.clone())
            .await;
        assert_eq!(status, 400, "{content_type}: {body}");
        assert_error_body(&body, "malformed_body");
        assert!(
            body["message"]
                .as_str()
                .unwrap()
                .contains("nested deeper than 64"),
            "{body}"
        );
    }
    // The same on a route that reads JSON with serde_json's own recursion limit.
    let (status, body) = server
        .post_raw(
            "/v1/tokens",
            Some(ADMIN),
            "application/json",
            format!("{{\"label\": {deep}"),
        )
        .await;
    // The typed body refuses the first value of the wrong type (`label` is a string), a 422 of the
    // wrong shape, before nesting depth matters; serde_json's recursion limit of 128 bounds the rest.
    assert_eq!(status, 422, "{body}");
    assert_error_body(&body, "invalid_input");
    let response = server
        .client
        .put(server.url("/v1/areas/velloran-basin"))
        .bearer_auth(ADMIN)
        .header("content-type", "application/json")
        .body(format!("{{\"name\": {}", "{\"a\":".repeat(100_000)))
        .send()
        .await
        .unwrap();
    let status = response.status().as_u16();
    let body: Value = response.json().await.unwrap();
    assert_eq!(status, 422, "{body}");
    assert_error_body(&body, "invalid_input");
    // A deep array where the body itself belongs: the same, the first element is of the wrong type.
    let (status, body) = server
        .post_raw("/v1/tokens", Some(ADMIN), "application/json", deep.clone())
        .await;
    assert!(status == 400 || status == 422, "{status} {body}");
    assert!(body["error"].is_string(), "{body}");
    assert_still_serving(&server).await;
    server.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn very_long_ids_and_strings_name_their_field() {
    let server = TestServer::start(TestDatabase::sqlite(), &[]).await;
    server.network("velloran-basin", &["ST-1"]).await;
    // API.md: ids are 1–64 characters of [A-Za-z0-9._-]; 65 is one too many.
    let long_id = "S".repeat(65);
    let (status, body) = server
        .call(
            reqwest::Method::PUT,
            &format!("/v1/stations/{long_id}"),
            Some(ADMIN),
            Some(json!({"area": "velloran-basin", "name": "Too long"})),
        )
        .await;
    assert_eq!(status, 422, "{body}");
    assert_error_body(&body, "invalid_input");
    assert_eq!(fields(&body), ["station"], "{body}");
    let (status, body) = server
        .call(
            reqwest::Method::PUT,
            &format!("/v1/areas/{}", "a".repeat(10_000)),
            Some(ADMIN),
            Some(json!({"name": "Too long", "interval": "10m"})),
        )
        .await;
    assert_eq!(status, 422, "{body}");
    assert_eq!(fields(&body), ["area"], "{body}");

    // In a batch: a megabyte-long station id and a long quantity name, each named by index and
    // field.
    let batch = json!({"readings": [
        {"station": "S".repeat(1 << 20), "quantity": "air_temperature", "value": 1.0,
         "observed_at": common::at(0)},
        {"station": "ST-1", "quantity": "q".repeat(65), "value": 1.0,
         "observed_at": common::at(0)},
    ]});
    let (status, body) = server
        .call(
            reqwest::Method::POST,
            "/v1/readings",
            Some(ADMIN),
            Some(batch),
        )
        .await;
    assert_eq!(status, 422, "{body}");
    assert_error_body(&body, "invalid_input");
    let details: Vec<(u64, &str)> = body["details"]
        .as_array()
        .unwrap()
        .iter()
        .map(|d| (d["index"].as_u64().unwrap(), d["field"].as_str().unwrap()))
        .collect();
    assert_eq!(details, [(0, "station"), (1, "quantity")], "{body}");

    // A very long display name is refused by name (our own limit of 200 characters).
    let (status, body) = server
        .call(
            reqwest::Method::PUT,
            "/v1/areas/velloran-basin",
            Some(ADMIN),
            Some(json!({"name": "N".repeat(1 << 20), "interval": "10m"})),
        )
        .await;
    assert_eq!(status, 422, "{body}");
    assert_eq!(fields(&body), ["name"], "{body}");
    assert_still_serving(&server).await;
    server.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_body_over_the_limit_is_413() {
    let server = TestServer::start(
        TestDatabase::sqlite(),
        &[("CONSENSOR_BODY_LIMIT_BYTES", "4096")],
    )
    .await;
    let (status, body) = server
        .post_raw(
            "/v1/readings",
            Some(ADMIN),
            "application/json",
            format!("{{\"readings\": [\"{}\"]}}", "x".repeat(10_000)),
        )
        .await;
    assert_eq!(status, 413, "{body}");
    assert_error_body(&body, "payload_too_large");
    assert_still_serving(&server).await;
    server.stop().await;
}

/// Sends raw bytes on a fresh connection and reads until the server closes it or `bound` passes;
/// returns what was read.
async fn raw_exchange(address: &str, request: &[u8], bound: Duration) -> String {
    let mut stream = TcpStream::connect(address).await.unwrap();
    // The server may answer and close before the whole request is written; that is fine.
    let _ = stream.write_all(request).await;
    let mut response = Vec::new();
    let _ = tokio::time::timeout(bound, stream.read_to_end(&mut response)).await;
    String::from_utf8_lossy(&response).into_owned()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_huge_header_is_431_or_a_closed_connection() {
    let server = TestServer::start(TestDatabase::sqlite(), &[]).await;
    let address = server.base.trim_start_matches("http://").to_owned();
    let padded = |padding: usize| {
        format!(
            "GET /healthz HTTP/1.1\r\nHost: {address}\r\nX-Padding: {}\r\nConnection: close\r\n\r\n",
            "a".repeat(padding)
        )
    };
    // 100 KiB in one header line: hyper would buffer it (its head buffer holds about 400 KiB), so
    // our own limit (`header_limit_bytes`, default 32 KiB) answers: RFC 6585 §5, 431 Request Header
    // Fields Too Large, with the contract's error body.
    let response = raw_exchange(
        &address,
        padded(100 * 1024).as_bytes(),
        Duration::from_secs(20),
    )
    .await;
    assert!(
        response.starts_with("HTTP/1.1 431") && response.contains("\"header_fields_too_large\""),
        "{}",
        &response[..response.len().min(300)]
    );
    // 20 KiB of header is within the limit.
    let response = raw_exchange(
        &address,
        padded(20 * 1024).as_bytes(),
        Duration::from_secs(20),
    )
    .await;
    assert!(
        response.starts_with("HTTP/1.1 200"),
        "{}",
        &response[..response.len().min(300)]
    );
    // Many headers of ordinary size, 100 KiB in all: more than hyper's 100 header fields, which
    // hyper refuses itself with a 431 or a closed connection.
    let mut request = format!("GET /healthz HTTP/1.1\r\nHost: {address}\r\n");
    for n in 0..100 {
        request.push_str(&format!("X-Pad-{n}: {}\r\n", "b".repeat(1000)));
    }
    request.push_str("Connection: close\r\n\r\n");
    let response = raw_exchange(&address, request.as_bytes(), Duration::from_secs(20)).await;
    assert!(
        response.is_empty() || response.starts_with("HTTP/1.1 431"),
        "{}",
        &response[..response.len().min(300)]
    );
    assert_still_serving(&server).await;
    server.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_client_trickling_its_body_is_cut_off_by_the_request_timeout() {
    // A one-second request timeout (`request_timeout_seconds`), so the test is short.
    let server = TestServer::start(
        TestDatabase::sqlite(),
        &[("CONSENSOR_REQUEST_TIMEOUT_SECONDS", "1")],
    )
    .await;
    let address = server.base.trim_start_matches("http://").to_owned();
    let mut stream = TcpStream::connect(&address).await.unwrap();
    let head = format!(
        "POST /v1/readings HTTP/1.1\r\nHost: {address}\r\nAuthorization: Bearer {ADMIN}\r\n\
         Content-Type: application/json\r\nContent-Length: 100000\r\n\r\n{{\"readings\": ["
    );
    stream.write_all(head.as_bytes()).await.unwrap();
    // Trickle one byte every 100 ms while watching for the server's answer. The loop is bounded
    // (at most 30 s, far beyond the 1 s timeout) so a server that never cuts the client off fails
    // the test instead of hanging it.
    let mut response = Vec::new();
    let mut buffer = [0u8; 4096];
    let mut closed = false;
    for _ in 0..300 {
        if stream.write_all(b" ").await.is_err() {
            closed = true;
        }
        match tokio::time::timeout(Duration::from_millis(100), stream.read(&mut buffer)).await {
            Ok(Ok(0)) | Ok(Err(_)) => {
                closed = true;
                break;
            }
            Ok(Ok(n)) => response.extend_from_slice(&buffer[..n]),
            Err(_) => {}
        }
        if closed {
            break;
        }
    }
    let response = String::from_utf8_lossy(&response).into_owned();
    assert!(
        closed,
        "the server kept the trickling connection open: {response}"
    );
    // tower-http's TimeoutLayer answers 408 Request Timeout (RFC 9110 §15.5.9), with the
    // contract's error body.
    assert!(response.starts_with("HTTP/1.1 408"), "{response}");
    assert!(
        response.contains("\"error\":\"request_timeout\""),
        "{response}"
    );
    assert_still_serving(&server).await;
    server.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn answers_made_outside_the_handlers_carry_the_contract_error_body() {
    let server = TestServer::start(TestDatabase::sqlite(), &[]).await;
    // A path segment that is not UTF-8 once percent-decoded (%AA alone is not a UTF-8 sequence,
    // RFC 3629 §3): axum's own Path rejection, a plain-text 400 before it was wrapped. Found by
    // `fuzz_decoders::random_query_strings_get_contract_answers`.
    let (status, body) = server
        .call(
            reqwest::Method::GET,
            "/v1/areas/%aA/series",
            Some(ADMIN),
            None,
        )
        .await;
    assert_eq!(status, 400, "{body}");
    assert_error_body(&body, "bad_request");
    // axum's router answers a known path with the wrong method 405, with `Allow` (RFC 9110
    // §15.5.6), which is kept.
    let response = server
        .client
        .delete(server.url("/v1/areas"))
        .bearer_auth(ADMIN)
        .send()
        .await
        .unwrap();
    assert_eq!(response.status().as_u16(), 405);
    assert!(response.headers().contains_key("allow"));
    let body: Value = response.json().await.unwrap();
    assert_error_body(&body, "method_not_allowed");
    server.stop().await;
}

/// Reads from `stream` until the server closes the connection or `bound` passes; returns what was
/// read and whether the connection was closed (end of stream or a reset) within the bound.
async fn read_until_closed(stream: &mut TcpStream, bound: Duration) -> (String, bool) {
    let mut response = Vec::new();
    let mut buffer = [0u8; 4096];
    let closed = tokio::time::timeout(bound, async {
        loop {
            match stream.read(&mut buffer).await {
                Ok(0) | Err(_) => break,
                Ok(n) => response.extend_from_slice(&buffer[..n]),
            }
        }
    })
    .await
    .is_ok();
    (String::from_utf8_lossy(&response).into_owned(), closed)
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_client_sending_its_request_head_slowly_is_cut_off() {
    // A one-second head timeout (`request_head_timeout_seconds`), so the test is short; the
    // connection must be closed within it plus a margin for a loaded test machine.
    const HEAD_TIMEOUT: Duration = Duration::from_secs(1);
    const MARGIN: Duration = Duration::from_secs(4);
    let server = TestServer::start(
        TestDatabase::sqlite(),
        &[("CONSENSOR_REQUEST_HEAD_TIMEOUT_SECONDS", "1")],
    )
    .await;
    let address = server.base.trim_start_matches("http://").to_owned();

    // Half a request head, then nothing: before, such a connection stayed open for ever (the
    // request timeout starts only once the head has arrived). The bound on the read is far
    // beyond the head timeout, so a server that never closes fails the test instead of hanging it.
    let mut stream = TcpStream::connect(&address).await.unwrap();
    let started = Instant::now();
    stream
        .write_all(format!("GET /healthz HTTP/1.1\r\nHost: {address}\r\nX-Half: ").as_bytes())
        .await
        .unwrap();
    let (response, closed) = read_until_closed(&mut stream, Duration::from_secs(30)).await;
    let elapsed = started.elapsed();
    assert!(
        closed,
        "the half-sent head kept its connection open: {response}"
    );
    assert!(
        elapsed < HEAD_TIMEOUT + MARGIN,
        "closed only after {elapsed:?}"
    );
    // hyper closes such a connection without an answer; a 408 (RFC 9110 §15.5.9) would do too.
    assert!(
        response.is_empty() || response.starts_with("HTTP/1.1 408"),
        "{response}"
    );

    // A head trickled one byte every 200 ms is never idle for a whole second, and is cut off all
    // the same: the bound is on the whole head, not on the pause between bytes.
    let mut stream = TcpStream::connect(&address).await.unwrap();
    let started = Instant::now();
    let head = format!(
        "GET /healthz HTTP/1.1\r\nHost: {address}\r\nX-Slow: {}",
        "s".repeat(200)
    );
    let mut closed = false;
    for byte in head.as_bytes() {
        if stream.write_all(&[*byte]).await.is_err() {
            closed = true;
            break;
        }
        let mut probe = [0u8; 1];
        match tokio::time::timeout(Duration::from_millis(200), stream.read(&mut probe)).await {
            Ok(Ok(0)) | Ok(Err(_)) => {
                closed = true;
                break;
            }
            Ok(Ok(_)) => panic!("an answer to a head that was never completed"),
            Err(_) => {}
        }
    }
    let elapsed = started.elapsed();
    assert!(closed, "the trickled head kept its connection open");
    assert!(
        elapsed < HEAD_TIMEOUT + MARGIN,
        "closed only after {elapsed:?}"
    );

    // A whole head sent at once is answered as usual, on a fresh connection ...
    let response = raw_exchange(
        &address,
        format!("GET /healthz HTTP/1.1\r\nHost: {address}\r\nConnection: close\r\n\r\n").as_bytes(),
        Duration::from_secs(20),
    )
    .await;
    assert!(response.starts_with("HTTP/1.1 200"), "{response}");
    // ... and on a keep-alive connection, twice, with a pause shorter than the timeout between
    // them.
    let mut stream = TcpStream::connect(&address).await.unwrap();
    for round in 0..2 {
        stream
            .write_all(format!("GET /healthz HTTP/1.1\r\nHost: {address}\r\n\r\n").as_bytes())
            .await
            .unwrap();
        let mut answer = Vec::new();
        let mut buffer = [0u8; 1024];
        // `/healthz` answers `{"status":"ok"}`: read until the whole body is in.
        while !String::from_utf8_lossy(&answer).contains("\"ok\"}") {
            let n = tokio::time::timeout(Duration::from_secs(10), stream.read(&mut buffer))
                .await
                .expect("an answer in time")
                .expect("read");
            assert!(n > 0, "round {round}: closed before the answer");
            answer.extend_from_slice(&buffer[..n]);
        }
        assert!(answer.starts_with(b"HTTP/1.1 200"), "round {round}");
        tokio::time::sleep(Duration::from_millis(300)).await;
    }
    // An idle keep-alive connection is closed after the same time: it is waiting for a head.
    let (_, closed) = read_until_closed(&mut stream, HEAD_TIMEOUT + MARGIN).await;
    assert!(closed, "an idle keep-alive connection stayed open");

    // A real client with a fresh connection pool (none of its connections closed under it).
    let client = reqwest::Client::builder()
        .pool_max_idle_per_host(0)
        .build()
        .unwrap();
    let response = client.get(server.url("/healthz")).send().await.unwrap();
    assert_eq!(response.status(), 200);
    server.stop().await;
}
