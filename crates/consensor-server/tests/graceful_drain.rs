//! A graceful stop under load, against the real `consensor` binary (API.md "Command line": it stops
//! cleanly on SIGINT/SIGTERM; "Ingest": a batch is atomic, and a 200 means it is stored).
//!
//! Several clients keep posting batches over their own connections while one more client holds a
//! request in flight by trickling its body. The process is sent SIGTERM; then:
//! - while it drains (the trickled request keeps it busy until the grace period ends), a new
//!   connection is refused: the listener closed at once;
//! - it exits, with status 0, no sooner than the grace period (it waited for the request in
//!   flight) and within the grace period plus a small margin (it did not wait for ever);
//! - every batch answered 200 is stored whole, and no batch at all is stored in part: each is
//!   stored whole or not at all (a batch whose answer was lost may have committed);
//! - the database holds exactly the readings of the batches stored, nothing else;
//! - after the exit, a request gets "connection refused".

mod common;

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use common::ADMIN;
use consensor_store::testing::TestDatabase;
use consensor_store::Store;
use serde_json::{json, Value};
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::TcpStream;

on_both_backends!(sigterm_under_load_drains_within_the_grace_period);

const MINUTE_MS: i64 = 60_000;
const QUANTITY: &str = "air_temperature";
/// `shutdown_grace_seconds` of the server under test.
const GRACE: Duration = Duration::from_secs(3);
/// What the exit may take beyond the grace period: stopping the worker, closing the database
/// pool and the process's own exit, on a loaded test machine.
const EXIT_MARGIN: Duration = Duration::from_secs(3);
/// Concurrent clients posting batches.
const CLIENTS: i64 = 6;
/// Each batch: every station at each of this many minutes of its own.
const MINUTES_PER_BATCH: i64 = 10;
/// Far more batches than a client can post before the stop; each has minutes of its own.
const MAX_BATCHES_PER_CLIENT: i64 = 10_000;

/// What became of one batch.
#[derive(Debug, Clone)]
enum Outcome {
    /// An HTTP answer: status and body.
    Answered(u16, Value),
    /// No answer: the connection could not be made (`refused`) or broke before an answer came.
    NoAnswer { refused: bool, error: String },
}

/// The first minute of batch `batch` of client `client`.
fn first_minute(start_minute: i64, client: i64, batch: i64) -> i64 {
    start_minute + (client * MAX_BATCHES_PER_CLIENT + batch) * MINUTES_PER_BATCH
}

fn batch_body(stations: &[String], first: i64) -> Value {
    common::minutely_batch_json(stations, QUANTITY, first, MINUTES_PER_BATCH, |s, minute| {
        12.0 + s as f64 * 0.1 + (minute % 3) as f64 * 0.05
    })
}

/// How many readings of the batch starting at minute `first` are stored.
async fn stored_of_batch(store: &impl Store, stations: &[String], first: i64) -> usize {
    let (from_ms, to_ms) = (first * MINUTE_MS, (first + MINUTES_PER_BATCH) * MINUTE_MS);
    common::stored_between(store, stations, QUANTITY, from_ms, to_ms).await
}

/// Whether a request error is a refused connection (nothing listens on the port).
fn is_refused(error: &reqwest::Error) -> bool {
    let mut source: Option<&dyn std::error::Error> = Some(error);
    while let Some(current) = source {
        if let Some(io) = current.downcast_ref::<std::io::Error>() {
            if io.kind() == std::io::ErrorKind::ConnectionRefused {
                return true;
            }
        }
        source = current.source();
    }
    false
}

/// One client: posts its batches one after another until its requests are refused (or `give_up`
/// is set), recording every outcome by batch number.
async fn post_until_refused(
    base: String,
    stations: Vec<String>,
    start_minute: i64,
    client_index: i64,
    outcomes: Arc<Mutex<Vec<(i64, i64, Outcome)>>>,
    give_up: Arc<AtomicBool>,
) {
    // A client of its own: its own connections, kept alive between batches as stations do.
    let client = reqwest::Client::builder()
        .timeout(Duration::from_secs(30))
        .build()
        .expect("HTTP client");
    for batch in 0..MAX_BATCHES_PER_CLIENT {
        if give_up.load(Ordering::SeqCst) {
            return;
        }
        let body = batch_body(&stations, first_minute(start_minute, client_index, batch));
        let sent = client
            .post(format!("{base}/v1/readings"))
            .bearer_auth(ADMIN)
            .json(&body)
            .send()
            .await;
        let outcome = match sent {
            Ok(response) => {
                let status = response.status().as_u16();
                Outcome::Answered(status, response.json().await.unwrap_or(Value::Null))
            }
            Err(error) => Outcome::NoAnswer {
                refused: is_refused(&error),
                error: format!("{error:?}"),
            },
        };
        let refused = matches!(outcome, Outcome::NoAnswer { refused: true, .. });
        outcomes
            .lock()
            .unwrap()
            .push((client_index, batch, outcome));
        if refused {
            return;
        }
    }
}

/// Starts a batch request whose body never finishes: its head and the first bytes of its body,
/// then one more byte every 100 ms until the server closes the connection. Returns when it did.
async fn trickle_until_closed(address: String, started: Arc<AtomicBool>) -> Instant {
    let mut stream = TcpStream::connect(&address).await.expect("connect");
    let head = format!(
        "POST /v1/readings HTTP/1.1\r\nHost: {address}\r\nAuthorization: Bearer {ADMIN}\r\n\
         Content-Type: application/json\r\nContent-Length: 100000\r\n\r\n{{\"readings\": ["
    );
    stream.write_all(head.as_bytes()).await.expect("write");
    started.store(true, Ordering::SeqCst);
    let mut buffer = [0u8; 1024];
    // Bounded (60 s) so that a server that never closes fails the test instead of hanging it.
    for _ in 0..600 {
        if stream.write_all(b" ").await.is_err() {
            return Instant::now();
        }
        match tokio::time::timeout(Duration::from_millis(100), stream.read(&mut buffer)).await {
            Ok(Ok(0)) | Ok(Err(_)) => return Instant::now(),
            Ok(Ok(_)) | Err(_) => {}
        }
    }
    panic!("the trickled request was never cut off");
}

async fn wait_for(limit: Duration, what: &str, mut condition: impl FnMut() -> bool) {
    let deadline = Instant::now() + limit;
    while !condition() {
        assert!(Instant::now() < deadline, "timed out waiting for {what}");
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
}

async fn sigterm_under_load_drains_within_the_grace_period(database: TestDatabase) {
    let grace = GRACE.as_secs().to_string();
    let (mut child, base) = common::start_binary(
        &database.url,
        &[("CONSENSOR_SHUTDOWN_GRACE_SECONDS", &grace)],
    );
    let address = base.trim_start_matches("http://").to_owned();
    let setup = reqwest::Client::new();
    let stations: Vec<String> = (0..5).map(|i| format!("GD-{i}")).collect();
    let answer = common::send_as_admin(
        &setup,
        &base,
        reqwest::Method::PUT,
        "/v1/areas/drain-test",
        Some(json!({"name": "Drain test", "interval": "10m"})),
    )
    .await;
    assert_eq!(answer.status, 201, "{:?}", answer.body);
    for station in &stations {
        let answer = common::send_as_admin(
            &setup,
            &base,
            reqwest::Method::PUT,
            &format!("/v1/stations/{station}"),
            Some(json!({"area": "drain-test", "name": station})),
        )
        .await;
        assert_eq!(answer.status, 201, "{:?}", answer.body);
    }
    drop(setup);

    // Far enough in the past that every batch of every client is older than now.
    let start_minute = chrono::Utc::now().timestamp_millis() / MINUTE_MS
        - CLIENTS * MAX_BATCHES_PER_CLIENT * MINUTES_PER_BATCH
        - 60;
    let outcomes: Arc<Mutex<Vec<(i64, i64, Outcome)>>> = Arc::default();
    let give_up = Arc::new(AtomicBool::new(false));
    let mut clients = Vec::new();
    for client_index in 0..CLIENTS {
        clients.push(tokio::spawn(post_until_refused(
            base.clone(),
            stations.clone(),
            start_minute,
            client_index,
            outcomes.clone(),
            give_up.clone(),
        )));
    }
    let trickle_started = Arc::new(AtomicBool::new(false));
    let trickler = tokio::spawn(trickle_until_closed(
        address.clone(),
        trickle_started.clone(),
    ));
    // Load first: every client has had batches stored, and the trickled request is in flight.
    let acknowledged_per_client = |outcomes: &[(i64, i64, Outcome)], client: i64| {
        outcomes
            .iter()
            .filter(|(c, _, o)| *c == client && matches!(o, Outcome::Answered(200, _)))
            .count()
    };
    wait_for(
        Duration::from_secs(60),
        "two stored batches per client",
        || {
            let outcomes = outcomes.lock().unwrap();
            (0..CLIENTS).all(|c| acknowledged_per_client(&outcomes, c) >= 2)
                && trickle_started.load(Ordering::SeqCst)
        },
    )
    .await;

    let signalled = std::process::Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status()
        .expect("run kill");
    assert!(signalled.success());
    let signalled_at = Instant::now();

    // While the process drains (the trickled request keeps it alive until the grace period ends),
    // new connections are refused: poll until one is, and check the process was still running.
    let refused_while_draining = loop {
        let exited = child.try_wait().expect("poll child").is_some();
        match TcpStream::connect(&address).await {
            Err(error) if error.kind() == std::io::ErrorKind::ConnectionRefused => {
                break !exited;
            }
            // Accepted before the listener closed, or some other failure: try again.
            _ => {}
        }
        assert!(
            signalled_at.elapsed() < GRACE + EXIT_MARGIN,
            "connections were still accepted {:?} after SIGTERM",
            signalled_at.elapsed()
        );
        tokio::time::sleep(Duration::from_millis(20)).await;
    };
    assert!(
        refused_while_draining,
        "the process exited before a refused connection could be seen while it drained"
    );

    let exit = loop {
        if let Some(exit) = child.try_wait().expect("poll child") {
            break exit;
        }
        assert!(
            signalled_at.elapsed() < GRACE + EXIT_MARGIN,
            "still running {:?} after SIGTERM (grace period {GRACE:?})",
            signalled_at.elapsed()
        );
        tokio::time::sleep(Duration::from_millis(20)).await;
    };
    let exited_after = signalled_at.elapsed();
    assert!(exit.success(), "exit status {exit:?}");
    // It waited for the request in flight, up to the grace period (a little tolerance for the
    // signal's own delivery), and then cut it off.
    assert!(
        exited_after + Duration::from_millis(300) >= GRACE,
        "exited {exited_after:?} after SIGTERM: it did not wait for the request in flight"
    );
    let cut_off_at = tokio::time::timeout(Duration::from_secs(10), trickler)
        .await
        .expect("the trickled request ended with the process")
        .expect("trickler");
    assert!(cut_off_at.duration_since(signalled_at) + Duration::from_millis(300) >= GRACE);

    // After the exit a request is refused (nothing listens any more).
    let error = TcpStream::connect(&address)
        .await
        .expect_err("something still listens after the exit");
    assert_eq!(error.kind(), std::io::ErrorKind::ConnectionRefused);
    // Every client ends on a refused connection.
    wait_for(Duration::from_secs(30), "every client refused", || {
        clients.iter().all(|c| c.is_finished())
    })
    .await;
    give_up.store(true, Ordering::SeqCst);
    for client in clients {
        client.await.expect("client");
    }
    let outcomes = outcomes.lock().unwrap().clone();
    for client_index in 0..CLIENTS {
        let last = outcomes
            .iter()
            .rfind(|(c, _, _)| *c == client_index)
            .map(|(_, _, o)| o.clone());
        assert!(
            matches!(last, Some(Outcome::NoAnswer { refused: true, .. })),
            "client {client_index} ended with {last:?}"
        );
    }

    // Every batch is stored whole or not at all; every batch answered 200 is stored whole; and the
    // database holds nothing but those batches' readings.
    let store = database.open().await;
    let size = stations.len() * MINUTES_PER_BATCH as usize;
    let (mut acknowledged, mut stored_total, mut unanswered) = (0, 0u64, 0);
    for (client_index, batch, outcome) in &outcomes {
        let first = first_minute(start_minute, *client_index, *batch);
        let stored = stored_of_batch(&store, &stations, first).await;
        match outcome {
            Outcome::Answered(200, body) => {
                assert_eq!(
                    body["accepted"], size,
                    "client {client_index} batch {batch}"
                );
                assert_eq!(
                    stored, size,
                    "client {client_index} batch {batch} was acknowledged but not stored whole"
                );
                acknowledged += 1;
            }
            Outcome::Answered(status, body) => {
                panic!("client {client_index} batch {batch}: {status} {body}")
            }
            Outcome::NoAnswer { refused, error } => {
                assert!(
                    stored == 0 || stored == size,
                    "client {client_index} batch {batch} is stored in part ({stored} of {size}): \
                     {error}"
                );
                if *refused {
                    assert_eq!(stored, 0, "a refused request stored readings");
                }
                unanswered += 1;
            }
        }
        stored_total += stored as u64;
    }
    assert!(
        acknowledged >= 2 * CLIENTS as usize,
        "{acknowledged} batches acknowledged"
    );
    assert!(
        unanswered >= CLIENTS as usize,
        "{unanswered} batches unanswered"
    );
    assert_eq!(store.count_readings().await.unwrap(), stored_total);
    store.close().await;
    database.finish().await;
}
