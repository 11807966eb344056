//! Storage faults against the real `consensor` binary and a real HTTP client (issue 7, "Faults";
//! API.md "Ingest" and "Operations"):
//!
//! - a private PostgreSQL server, started by the test, is stopped with `pg_ctl stop -m immediate`
//!   while batches are being posted (one of them certainly in the middle of its transaction) and
//!   then started again: every answer is 200 or 503 with `Retry-After` and the contract's error
//!   body, no batch is stored in part, a batch sent while the server is unreachable is refused
//!   within `database_acquire_timeout_seconds` (set to 2 s) plus a margin,
//!   `/readyz` says 503 while the server is down and 200 once it is back, the process reconnects by
//!   itself and its worker catches up;
//! - an SQLite database opened read-only, and one on a full (loop-mounted, 16 MiB) file system: 503
//!   with `Retry-After`, then `PRAGMA integrity_check` is `ok` and every acknowledged reading is there;
//! - the worker of a single SQLite process killed with SIGKILL while it computes: after a restart
//!   every interval has exactly one result, revision 1 (none lost, none computed twice).
//!
//! The shared PostgreSQL server of CONSENSOR_TEST_POSTGRES_URL is never stopped here: other tests use
//! it at the same time.

mod common;

use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use common::{send_as_admin as send, Answer};
use consensor_store::testing::TestDatabase;
use consensor_store::Store;
use serde_json::{json, Value};

const MINUTE_MS: i64 = 60_000;
const QUANTITY: &str = "air_temperature";

/// A real HTTP client with a bound on every request, so that a server that stops answering fails
/// the test instead of hanging it.
fn client() -> reqwest::Client {
    reqwest::Client::builder()
        .timeout(Duration::from_secs(30))
        .build()
        .expect("HTTP client")
}

/// Creates the area (10-minute intervals) and its stations through the API.
async fn network(client: &reqwest::Client, base: &str, area: &str, stations: &[String]) {
    let answer = send(
        client,
        base,
        reqwest::Method::PUT,
        &format!("/v1/areas/{area}"),
        Some(json!({"name": format!("Area {area}"), "interval": "10m"})),
    )
    .await;
    assert_eq!(answer.status, 201, "{:?}", answer.body);
    for station in stations {
        let answer = send(
            client,
            base,
            reqwest::Method::PUT,
            &format!("/v1/stations/{station}"),
            Some(json!({"area": area, "name": station})),
        )
        .await;
        assert_eq!(answer.status, 201, "{:?}", answer.body);
    }
}

/// The readings of batch `index`: every station at each of `minutes` minutes of its own, starting
/// at `first_minute + index * minutes`, so batches never share a reading key.
/// Posts batch `index` (see [`batch`]) with the admin token.
async fn post_batch(
    client: &reqwest::Client,
    base: &str,
    stations: &[String],
    first_minute: i64,
    minutes: i64,
    index: i64,
) -> Answer {
    let body = batch(stations, first_minute, minutes, index);
    send(
        client,
        base,
        reqwest::Method::POST,
        "/v1/readings",
        Some(body),
    )
    .await
}

fn batch(stations: &[String], first_minute: i64, minutes: i64, index: i64) -> Value {
    common::minutely_batch_json(
        stations,
        QUANTITY,
        first_minute + index * minutes,
        minutes,
        |s, minute| 11.0 + s as f64 * 0.1 + (minute % 5) as f64 * 0.05,
    )
}

/// How many readings of batch `index` are stored (every station's, in the batch's minutes).
async fn stored_of_batch(
    store: &impl Store,
    stations: &[String],
    first_minute: i64,
    minutes: i64,
    index: i64,
) -> usize {
    let from_ms = (first_minute + index * minutes) * MINUTE_MS;
    common::stored_between(
        store,
        stations,
        QUANTITY,
        from_ms,
        from_ms + minutes * MINUTE_MS,
    )
    .await
}

/// A refusal because the database cannot be used must be a 503 with a whole number of seconds in
/// `Retry-After` (RFC 9110 §10.2.3, delay-seconds) and API.md's error body.
fn assert_unavailable(answer: &Answer, what: &str) {
    assert_eq!(answer.status, 503, "{what}: {:?}", answer.body);
    let seconds: u64 = answer
        .retry_after
        .as_deref()
        .unwrap_or_else(|| panic!("{what}: a 503 without Retry-After"))
        .parse()
        .unwrap_or_else(|_| panic!("{what}: Retry-After is not delay-seconds"));
    assert!(seconds >= 1, "{what}: Retry-After {seconds}");
    assert_eq!(
        answer.body["error"], "unavailable",
        "{what}: {:?}",
        answer.body
    );
    assert!(
        answer.body["message"]
            .as_str()
            .is_some_and(|m| !m.is_empty()),
        "{what}: {:?}",
        answer.body
    );
}

/// Polls until `condition` holds, at most `limit`, every 50 ms.
async fn wait_for(limit: Duration, what: &str, mut condition: impl FnMut() -> bool) {
    let deadline = Instant::now() + limit;
    while !condition() {
        assert!(Instant::now() < deadline, "timed out waiting for {what}");
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
}

/// Polls `GET /v1/status` of the binary until `pending_intervals` is 0.
async fn wait_until_computed(client: &reqwest::Client, base: &str, limit: Duration) -> Value {
    let deadline = Instant::now() + limit;
    loop {
        let answer = send(client, base, reqwest::Method::GET, "/v1/status", None).await;
        assert_eq!(answer.status, 200, "{:?}", answer.body);
        if answer.body["pending_intervals"] == 0 {
            return answer.body;
        }
        assert!(
            Instant::now() < deadline,
            "the worker did not catch up: {:?}",
            answer.body
        );
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
}

/// `PRAGMA integrity_check` of an SQLite file, on a connection of its own.
async fn integrity_check(path: &Path) -> Vec<String> {
    use sqlx::sqlite::SqliteConnectOptions;
    use sqlx::{ConnectOptions, Connection};
    let mut connection = SqliteConnectOptions::new()
        .filename(path)
        .connect()
        .await
        .expect("open the SQLite file");
    let rows: Vec<String> = sqlx::query_scalar("PRAGMA integrity_check")
        .fetch_all(&mut connection)
        .await
        .expect("integrity_check");
    connection.close().await.expect("close");
    rows
}

/// The real binary, killed with SIGKILL when dropped (also when an assertion fails, so no server
/// outlives its test and keeps a mounted file system busy).
struct Server(std::process::Child);

impl Drop for Server {
    fn drop(&mut self) {
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}

fn start(database_url: &str, settings: &[(&str, &str)]) -> (Server, String) {
    let (child, base) = common::start_binary(database_url, settings);
    (Server(child), base)
}

/// kill -9 of the server, then reaping it.
fn kill(server: Server) {
    drop(server);
}

/// The current minute, counted from the Unix epoch.
fn now_minute() -> i64 {
    chrono::Utc::now().timestamp_millis() / MINUTE_MS
}

fn is_root() -> bool {
    Command::new("id")
        .arg("-u")
        .output()
        .map(|output| String::from_utf8_lossy(&output.stdout).trim() == "0")
        .unwrap_or(false)
}

/// Says `message` on the test's stderr even when libtest captures output of passing tests.
fn announce(message: &str) {
    use std::io::Write;
    let _ = writeln!(std::io::stderr(), "\n!!! {message} !!!\n");
}

// ---------------------------------------------------------------------------------------------
// PostgreSQL stopped and restarted during ingest.
// ---------------------------------------------------------------------------------------------

/// A PostgreSQL server of the test's own: a fresh cluster in a temporary directory, on a free port,
/// listening on 127.0.0.1 and on a socket in that directory. Stopped (immediately) when dropped.
struct PrivatePostgres {
    bin: PathBuf,
    directory: tempfile::TempDir,
    port: u16,
    /// initdb refuses to run as root, so as root every server command runs as `postgres`.
    as_postgres_user: bool,
}

impl PrivatePostgres {
    /// The newest `/usr/lib/postgresql/<version>/bin` that has `initdb` and `pg_ctl`.
    fn binaries() -> Option<PathBuf> {
        let mut versions: Vec<(u32, PathBuf)> = std::fs::read_dir("/usr/lib/postgresql")
            .ok()?
            .filter_map(|entry| {
                let entry = entry.ok()?;
                let version: u32 = entry.file_name().to_str()?.parse().ok()?;
                let bin = entry.path().join("bin");
                (bin.join("initdb").exists() && bin.join("pg_ctl").exists())
                    .then_some((version, bin))
            })
            .collect();
        versions.sort();
        versions.pop().map(|(_, bin)| bin)
    }

    /// Creates and starts the cluster; `None` (after a loud notice) when PostgreSQL's server
    /// binaries are not installed and CONSENSOR_TEST_POSTGRES_URL is unset; a failure when it is set,
    /// since then PostgreSQL is meant to be tested (scripts/test installs the server).
    fn start_new() -> Option<PrivatePostgres> {
        let Some(bin) = Self::binaries() else {
            let message = "no PostgreSQL server binaries under /usr/lib/postgresql/*/bin: the \
                           PostgreSQL outage test cannot start its own server";
            if std::env::var_os("CONSENSOR_TEST_POSTGRES_URL").is_some() {
                panic!("{message} (CONSENSOR_TEST_POSTGRES_URL is set, so this is a failure)");
            }
            announce(&format!("{message}; SKIPPED"));
            return None;
        };
        let directory = tempfile::tempdir().expect("temporary directory");
        let as_postgres_user = is_root();
        if as_postgres_user {
            let status = Command::new("chown")
                .args(["postgres:postgres"])
                .arg(directory.path())
                .status()
                .expect("run chown");
            assert!(status.success(), "chown of the cluster directory failed");
        }
        let port = std::net::TcpListener::bind("127.0.0.1:0")
            .expect("free port")
            .local_addr()
            .unwrap()
            .port();
        let server = PrivatePostgres {
            bin,
            directory,
            port,
            as_postgres_user,
        };
        let data = server.data();
        server.run(
            "initdb",
            &[
                "-D",
                data.to_str().unwrap(),
                "-U",
                "postgres",
                "-A",
                "trust",
                "-E",
                "UTF8",
                "--no-sync",
            ],
        );
        server.start();
        Some(server)
    }

    fn data(&self) -> PathBuf {
        self.directory.path().join("data")
    }

    fn url(&self) -> String {
        format!("postgres://postgres@127.0.0.1:{}/postgres", self.port)
    }

    /// Runs one of the server's programs (as `postgres` when we are root) and checks it succeeded.
    fn run(&self, program: &str, args: &[&str]) {
        let program = self.bin.join(program);
        let mut command = if self.as_postgres_user {
            let mut command = Command::new("runuser");
            command.args(["-u", "postgres", "--"]).arg(&program);
            command
        } else {
            Command::new(&program)
        };
        let output = command
            .args(args)
            .stdin(Stdio::null())
            .output()
            .unwrap_or_else(|error| panic!("run {}: {error}", program.display()));
        assert!(
            output.status.success(),
            "{} {args:?} failed: {}{}",
            program.display(),
            String::from_utf8_lossy(&output.stdout),
            String::from_utf8_lossy(&output.stderr)
        );
    }

    /// Starts the server and waits until it accepts connections.
    fn start(&self) {
        let options = format!(
            "-p {} -k {} -c listen_addresses=127.0.0.1",
            self.port,
            self.directory.path().display()
        );
        let log = self.directory.path().join("server.log");
        self.run(
            "pg_ctl",
            &[
                "start",
                "-D",
                self.data().to_str().unwrap(),
                "-l",
                log.to_str().unwrap(),
                "-w",
                "-t",
                "30",
                "-o",
                &options,
            ],
        );
    }

    /// Stops the server the hard way: every backend is killed at once, in-flight transactions are
    /// cut off, and the next start runs crash recovery.
    fn stop_immediately(&self) {
        self.run(
            "pg_ctl",
            &[
                "stop",
                "-D",
                self.data().to_str().unwrap(),
                "-m",
                "immediate",
                "-w",
            ],
        );
    }
}

impl Drop for PrivatePostgres {
    fn drop(&mut self) {
        // Best effort: the server may already be stopped.
        let program = self.bin.join("pg_ctl");
        let mut command = if self.as_postgres_user {
            let mut command = Command::new("runuser");
            command.args(["-u", "postgres", "--"]).arg(&program);
            command
        } else {
            Command::new(&program)
        };
        let _ = command
            .args(["stop", "-m", "immediate", "-D"])
            .arg(self.data())
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .status();
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn postgres_stopped_mid_ingest_answers_503_stores_no_partial_batch_and_reconnects() {
    let Some(postgres) = PrivatePostgres::start_new() else {
        return;
    };
    let postgres = Arc::new(postgres);
    // A worker step cut off by the outage after it claimed intervals leaves those claims until
    // they are stale (300 s by default, also for the process's own worker); a short stale time lets
    // the worker take them up again within the test. A request waits at most
    // `database_acquire_timeout_seconds` for a connection while the server is unreachable; a
    // short one (the default is 10 s) is checked below.
    let acquire_timeout = Duration::from_secs(2);
    let (child, base) = start(
        &postgres.url(),
        &[
            ("CONSENSOR_WORKER__STALE_CLAIM_SECONDS", "2"),
            (
                "CONSENSOR_DATABASE_ACQUIRE_TIMEOUT_SECONDS",
                &acquire_timeout.as_secs().to_string(),
            ),
        ],
    );
    let client = client();
    let stations: Vec<String> = (0..10).map(|i| format!("OF-{i:02}")).collect();
    network(&client, &base, "ostmarrow-flats", &stations).await;
    let ready = send(&client, &base, reqwest::Method::GET, "/readyz", None).await;
    assert_eq!(ready.status, 200, "{:?}", ready.body);

    // One writer posts batches of 10 stations × 30 minutes (300 readings) one after another and
    // records every answer; the server is stopped and started under it.
    const MINUTES: i64 = 30;
    // Far above the writer's own batch numbers, still in the past.
    const UNREACHABLE_BATCH: i64 = 400;
    let first_minute = now_minute() - 10 * 24 * 60;
    let answers: Arc<Mutex<Vec<Answer>>> = Arc::default();
    let stop_writing = Arc::new(AtomicBool::new(false));
    let writer = {
        let (client, base, stations) = (client.clone(), base.clone(), stations.clone());
        let (answers, stop_writing) = (answers.clone(), stop_writing.clone());
        tokio::spawn(async move {
            let mut index = 0i64;
            while !stop_writing.load(Ordering::SeqCst) {
                let body = batch(&stations, first_minute, MINUTES, index);
                let answer = send(
                    &client,
                    &base,
                    reqwest::Method::POST,
                    "/v1/readings",
                    Some(body),
                )
                .await;
                answers.lock().unwrap().push(answer);
                index += 1;
                tokio::time::sleep(Duration::from_millis(20)).await;
            }
        })
    };
    let count = |from: usize, status: u16| {
        answers.lock().unwrap()[from..]
            .iter()
            .filter(|answer| answer.status == status)
            .count()
    };

    wait_for(Duration::from_secs(30), "three stored batches", || {
        count(0, 200) >= 3
    })
    .await;
    // So that the server is certainly stopped in the middle of a batch's transaction, another
    // session holds an exclusive lock on the readings table: the writer's next batch begins its
    // transaction and then waits for the lock until the server goes away under it.
    let mut locker = {
        use sqlx::Connection;
        sqlx::PgConnection::connect(&postgres.url())
            .await
            .expect("connect to the private server")
    };
    sqlx::raw_sql("BEGIN; LOCK TABLE readings IN ACCESS EXCLUSIVE MODE")
        .execute(&mut locker)
        .await
        .expect("lock the readings table");
    let blocked_batch = {
        let mut seen = answers.lock().unwrap().len();
        loop {
            tokio::time::sleep(Duration::from_millis(300)).await;
            let now = answers.lock().unwrap().len();
            if now == seen {
                break now;
            }
            seen = now;
        }
    };
    let stopping = postgres.clone();
    tokio::task::spawn_blocking(move || stopping.stop_immediately())
        .await
        .unwrap();
    drop(locker);
    // The blocked batch and every later one were answered after the stop.
    let stopped_at = blocked_batch;

    // While the server is down, readiness says so (within its own 2 s bound, not the pool's).
    let ready = send(&client, &base, reqwest::Method::GET, "/readyz", None).await;
    assert_unavailable(&ready, "/readyz while PostgreSQL is down");
    wait_for(
        Duration::from_secs(40),
        "the cut-off batch's answer",
        || count(stopped_at, 503) >= 1,
    )
    .await;
    // A batch sent while the server is unreachable is refused too, once the pool has tried to
    // connect for `database_acquire_timeout_seconds`: within that bound plus a margin for a loaded
    // test machine (and well before the 10 s default, so the setting is what bounds it).
    let sent_at = Instant::now();
    let unreachable = post_batch(
        &client,
        &base,
        &stations,
        first_minute,
        MINUTES,
        UNREACHABLE_BATCH,
    )
    .await;
    let waited = sent_at.elapsed();
    assert_unavailable(&unreachable, "a batch sent while PostgreSQL is down");
    assert!(
        waited < acquire_timeout + Duration::from_secs(3),
        "the 503 came {waited:?} after the batch was sent; the acquire timeout is \
         {acquire_timeout:?}"
    );

    let starting = postgres.clone();
    tokio::task::spawn_blocking(move || starting.start())
        .await
        .unwrap();
    let restarted_at = answers.lock().unwrap().len();
    // The process reconnects by itself: readiness turns 200, then batches are stored again.
    let deadline = Instant::now() + Duration::from_secs(30);
    loop {
        let ready = send(&client, &base, reqwest::Method::GET, "/readyz", None).await;
        if ready.status == 200 {
            break;
        }
        assert_unavailable(&ready, "/readyz while PostgreSQL starts");
        assert!(Instant::now() < deadline, "/readyz stayed 503");
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
    wait_for(
        Duration::from_secs(40),
        "two stored batches after the restart",
        || count(restarted_at, 200) >= 2,
    )
    .await;
    stop_writing.store(true, Ordering::SeqCst);
    writer.await.unwrap();

    // Every answer was a 200 or a 503 of the contract's shape (a 500 would be the bug this test is
    // for); at least one batch was refused.
    let answers = answers.lock().unwrap().clone();
    for (index, answer) in answers.iter().enumerate() {
        if answer.status != 200 {
            assert_unavailable(answer, &format!("batch {index}"));
        }
    }
    assert!(answers[stopped_at..]
        .iter()
        .any(|answer| answer.status == 503));
    // The batch cut off in the middle of its transaction is refused.
    assert_unavailable(&answers[blocked_batch], "the batch cut off mid-transaction");

    // Atomic batches (API.md "Ingest"): a batch answered 200 is stored whole; a refused one is
    // stored whole or not at all (its commit may have reached the server just before the connection
    // was cut, when the answer could no longer say so), never in part.
    let store = consensor_store::connect(&postgres.url())
        .await
        .expect("open the store");
    let mut stored_total = 0u64;
    for (index, answer) in answers.iter().enumerate() {
        let stored = stored_of_batch(&store, &stations, first_minute, MINUTES, index as i64).await;
        let size = stations.len() * MINUTES as usize;
        if index == blocked_batch {
            // Its transaction never reached COMMIT: the server died while it waited for the lock.
            assert_eq!(stored, 0, "the batch cut off mid-transaction left readings");
        }
        if answer.status == 200 {
            assert_eq!(answer.body["accepted"], size, "batch {index}");
            assert_eq!(stored, size, "batch {index} was acknowledged");
        } else {
            assert!(
                stored == 0 || stored == size,
                "batch {index} is stored in part: {stored} of {size}"
            );
        }
        stored_total += stored as u64;
    }
    assert!(answers.len() < UNREACHABLE_BATCH as usize);
    assert_eq!(
        stored_of_batch(&store, &stations, first_minute, MINUTES, UNREACHABLE_BATCH).await,
        0,
        "the batch refused while PostgreSQL was down was stored"
    );
    assert_eq!(store.count_readings().await.unwrap(), stored_total);
    store.close().await;

    // The worker, which failed its steps while the server was down, catches up.
    wait_until_computed(&client, &base, Duration::from_secs(30)).await;
    kill(child);
}

// ---------------------------------------------------------------------------------------------
// SQLite that cannot be written.
// ---------------------------------------------------------------------------------------------

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sqlite_opened_read_only_answers_503_and_stays_consistent() {
    let database = TestDatabase::sqlite();
    let file = database.sqlite_file().unwrap();
    let client = client();
    let stations: Vec<String> = (0..5).map(|i| format!("VB-{i:02}")).collect();
    let first_minute = now_minute() - 24 * 60;
    const MINUTES: i64 = 20;

    let (child, base) = start(&database.url, &[]);
    network(&client, &base, "velloran-basin", &stations).await;
    for index in 0..3 {
        let answer = post_batch(&client, &base, &stations, first_minute, MINUTES, index).await;
        assert_eq!(answer.status, 200, "{:?}", answer.body);
    }
    kill(child);
    let acknowledged = 3 * stations.len() as u64 * MINUTES as u64;

    // The same file opened read-only (SQLite's `mode=ro` URI parameter, as an operator's read-only
    // mount or a file whose write permission was taken away makes SQLite open it). Root ignores
    // file permissions, so a chmod would not stop a test that runs as root; `mode=ro` does.
    let (child, base) = start(&format!("{}?mode=ro", database.url), &[]);
    let refused = post_batch(&client, &base, &stations, first_minute, MINUTES, 3).await;
    assert_unavailable(&refused, "ingest into a read-only database");
    // Reading still works and shows exactly the acknowledged readings.
    let status = send(&client, &base, reqwest::Method::GET, "/v1/status", None).await;
    assert_eq!(status.status, 200, "{:?}", status.body);
    assert_eq!(status.body["readings"], acknowledged);
    kill(child);

    // Read-write again: the file is intact, nothing of the refused batch is there, and ingest works.
    assert_eq!(integrity_check(&file).await, vec!["ok".to_owned()]);
    let (child, base) = start(&database.url, &[]);
    let status = send(&client, &base, reqwest::Method::GET, "/v1/status", None).await;
    assert_eq!(status.body["readings"], acknowledged);
    let retried = post_batch(&client, &base, &stations, first_minute, MINUTES, 3).await;
    assert_eq!(retried.status, 200, "{:?}", retried.body);
    assert_eq!(retried.body["accepted"], stations.len() * MINUTES as usize);
    kill(child);
    database.finish().await;
}

/// A small ext4 file system in an image file, loop-mounted; unmounted when dropped.
struct SmallFileSystem {
    directory: tempfile::TempDir,
}

impl SmallFileSystem {
    /// `None` (with the reason) when it cannot be made: mounting needs root and a loop device.
    fn mount(size_mib: u64) -> Result<SmallFileSystem, String> {
        if !is_root() {
            return Err("mounting a file system needs root".into());
        }
        let directory = tempfile::tempdir().map_err(|e| e.to_string())?;
        let image = directory.path().join("image.ext4");
        std::fs::File::create(&image)
            .and_then(|file| file.set_len(size_mib * 1024 * 1024))
            .map_err(|e| e.to_string())?;
        let mount_point = directory.path().join("mnt");
        std::fs::create_dir(&mount_point).map_err(|e| e.to_string())?;
        let run = |program: &str, args: &[&Path]| -> Result<(), String> {
            let output = Command::new(program)
                .args(args)
                .output()
                .map_err(|e| format!("{program}: {e}"))?;
            if output.status.success() {
                Ok(())
            } else {
                Err(format!(
                    "{program} failed: {}",
                    String::from_utf8_lossy(&output.stderr).trim()
                ))
            }
        };
        run("mkfs.ext4", &[Path::new("-q"), &image])?;
        run(
            "mount",
            &[Path::new("-o"), Path::new("loop"), &image, &mount_point],
        )?;
        Ok(SmallFileSystem { directory })
    }

    fn path(&self) -> PathBuf {
        self.directory.path().join("mnt")
    }
}

impl Drop for SmallFileSystem {
    fn drop(&mut self) {
        let _ = Command::new("umount").arg(self.path()).status();
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sqlite_on_a_full_disk_answers_503_stays_consistent_and_recovers() {
    let file_system = match SmallFileSystem::mount(16) {
        Ok(file_system) => file_system,
        Err(reason) => {
            announce(&format!(
                "cannot mount a small file system ({reason}): the disk-full test is SKIPPED"
            ));
            return;
        }
    };
    // Ballast that is removed later to give space back.
    let ballast = file_system.path().join("ballast");
    std::fs::write(&ballast, vec![0x5a_u8; 6 * 1024 * 1024]).expect("write ballast");
    let file = file_system.path().join("consensor.db");
    let url = format!("sqlite://{}", file.display());
    // A worker step whose results met the full disk keeps its claims until they are stale; a short
    // stale time lets the worker take them up again within the test.
    let (child, base) = start(&url, &[("CONSENSOR_WORKER__STALE_CLAIM_SECONDS", "1")]);
    let client = client();
    let stations: Vec<String> = (0..20).map(|i| format!("TH-{i:02}")).collect();
    network(&client, &base, "tarnwhistle-heights", &stations).await;

    // Batches of 20 stations × 50 minutes until the file system is full.
    const MINUTES: i64 = 50;
    let first_minute = now_minute() - 20 * 24 * 60;
    let mut acknowledged = 0u64;
    let mut index = 0i64;
    let refused = loop {
        assert!(index < 400, "the file system never filled up");
        let answer = post_batch(&client, &base, &stations, first_minute, MINUTES, index).await;
        index += 1;
        if answer.status == 200 {
            acknowledged += answer.body["accepted"].as_u64().unwrap();
        } else {
            break answer;
        }
    };
    assert_unavailable(&refused, "ingest on a full disk");
    assert!(acknowledged > 0, "the first batch did not fit");
    let status = send(&client, &base, reqwest::Method::GET, "/v1/status", None).await;
    assert_eq!(status.status, 200, "{:?}", status.body);
    assert_eq!(status.body["readings"], acknowledged);

    // Space comes back: the same process stores the refused batch without a restart.
    std::fs::remove_file(&ballast).expect("remove ballast");
    let retried = post_batch(&client, &base, &stations, first_minute, MINUTES, index - 1).await;
    assert_eq!(retried.status, 200, "{:?}", retried.body);
    acknowledged += retried.body["accepted"].as_u64().unwrap();
    // More batches, and the worker (whose writes met the full disk too) catches up: no pooled
    // connection was left unusable by the failed transactions.
    for _ in 0..3 {
        let answer = post_batch(&client, &base, &stations, first_minute, MINUTES, index).await;
        assert_eq!(answer.status, 200, "{:?}", answer.body);
        acknowledged += answer.body["accepted"].as_u64().unwrap();
        index += 1;
    }
    wait_until_computed(&client, &base, Duration::from_secs(30)).await;
    kill(child);

    assert_eq!(integrity_check(&file).await, vec!["ok".to_owned()]);
    let store = consensor_store::connect(&url).await.expect("reopen");
    assert_eq!(store.count_readings().await.unwrap(), acknowledged);
    for batch_index in 0..index {
        assert_eq!(
            stored_of_batch(&store, &stations, first_minute, MINUTES, batch_index).await,
            stations.len() * MINUTES as usize,
            "batch {batch_index}"
        );
    }
    store.close().await;
    drop(file_system);
}

// ---------------------------------------------------------------------------------------------
// The worker of a single SQLite process killed mid-computation.
// ---------------------------------------------------------------------------------------------

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sqlite_worker_killed_mid_compute_resumes_without_loss_or_duplicates() {
    const INTERVALS: i64 = 400;
    let database = TestDatabase::sqlite();
    let store = database.open().await;
    let stations: Vec<String> = (0..5).map(|i| format!("VB-{i}")).collect();
    common::add_area(&store, "velloran-basin", MINUTE_MS, &stations).await;
    // 400 one-minute intervals with a reading of every station: 400 pending intervals.
    let start_ms = (now_minute() - 2 * INTERVALS) * MINUTE_MS;
    let readings = common::minutely_readings(&stations, QUANTITY, start_ms, INTERVALS, 9.0);
    store
        .insert_batch(&readings, start_ms + 2 * INTERVALS * MINUTE_MS)
        .await
        .unwrap();
    assert_eq!(
        store.count_pending_buckets().await.unwrap(),
        INTERVALS as u64
    );

    // Small claims so the work takes many steps; a short stale time so the restarted process takes
    // over the claims the killed one held.
    let settings = [
        ("CONSENSOR_WORKER__CLAIM_BATCH", "2"),
        ("CONSENSOR_WORKER__STALE_CLAIM_SECONDS", "1"),
        ("CONSENSOR_WORKER__POLL_INTERVAL_SECONDS", "0.05"),
    ];
    let (child, _) = start(&database.url, &settings);
    let deadline = Instant::now() + Duration::from_secs(30);
    while store.count_pending_buckets().await.unwrap() > (INTERVALS as u64) * 3 / 4 {
        assert!(Instant::now() < deadline, "the worker made no progress");
        tokio::time::sleep(Duration::from_millis(5)).await;
    }
    kill(child);
    let left = store.count_pending_buckets().await.unwrap();
    assert!(
        left > 0,
        "the worker finished before it was killed; the test did not kill it mid-computation"
    );

    let (child, base) = start(&database.url, &settings);
    let client = client();
    wait_until_computed(&client, &base, Duration::from_secs(30)).await;
    kill(child);

    // Every interval has a result, each computed exactly once (latest revision 1), from every
    // station.
    let series = store
        .series(
            "velloran-basin",
            QUANTITY,
            start_ms,
            start_ms + INTERVALS * MINUTE_MS,
        )
        .await
        .unwrap();
    assert_eq!(series.len(), INTERVALS as usize, "no interval lost");
    let twice: Vec<i64> = series
        .iter()
        .filter(|row| row.revision != 1)
        .map(|row| row.start_ms)
        .collect();
    assert!(
        twice.is_empty(),
        "intervals computed more than once: {twice:?}"
    );
    assert!(series.iter().all(|row| row.point.stations_used == 5));
    store.close().await;
    database.finish().await;
}
