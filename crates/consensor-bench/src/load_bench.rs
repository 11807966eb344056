//! The load test: the real `consensor serve` binary (a separate process, as deployed) on a fresh
//! SQLite file, driven over loopback by an invented network of 1,000 stations behind 10 gateways,
//! with dashboards polling results, then an outage burst in which every station resends ten minutes
//! of backlog at once. Afterwards the server is stopped and its database file is compared, reading
//! by reading, with what the server acknowledged: every reading answered 200 must be stored exactly
//! once.
//!
//! `consensor-bench load [--quick] [--seconds N] [--burst-batch N]`; `tools/load/run.sh` builds
//! release and runs it.
//! The server binary is `consensor` next to this one (same target directory) or `CONSENSOR_BIN`.
//!
//! Phases (the clock is the real one; readings are stamped with the second they stand for):
//! 1. `batched`: each gateway posts its 100 stations' readings of the second as one batch, every
//!    second, for N seconds (60 by default, 15 with `--quick`).
//! 2. `single`: every station posts its own reading once a second as a one-reading request, through
//!    a pool of 64 concurrent connections, for N / 4 seconds (at least 5).
//! 3. `burst`: every gateway resends its stations' last ten minutes (600 readings per station) in
//!    batches of 5,000 (`--burst-batch N` for another size), all gateways at once, while live
//!    batched posting goes on.
//! 4. `drain`: live batched posting goes on until the worker is back to the intervals in progress
//!    (pending intervals at most the number of areas) plus 5 s, or for at most 90 s.
//!
//! Dashboards poll `/series` and `/latest` during all four phases; a monitor polls `/v1/status`,
//! `/metrics` and the server's `/proc/PID/status` each second.

use std::collections::{BTreeMap, HashMap, HashSet};
use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::atomic::{AtomicBool, AtomicU64, AtomicU8, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use anyhow::{bail, Context};
use serde_json::{json, Value};

use crate::machine;
use crate::synthetic::SplitMix;

const ADMIN: &str = "load-test-admin-token-5f1c0e9a7b";
const AREAS: usize = 20;
const STATIONS_PER_AREA: usize = 50;
const STATIONS: usize = AREAS * STATIONS_PER_AREA;
const GATEWAYS: usize = 10;
const STATIONS_PER_GATEWAY: usize = STATIONS / GATEWAYS;
const BACKLOG_SECONDS: i64 = 600;
const BURST_BATCH: usize = 5_000;
/// The sizes `--burst-batch` accepts: from a live batch's size to what fits the server's default
/// body limit.
const BURST_BATCH_RANGE: std::ops::RangeInclusive<usize> = 100..=50_000;
/// How long after the next whole second the burst starts: time to build the backlog bodies.
const BURST_LEAD: Duration = Duration::from_secs(3);
const DASHBOARDS: usize = 4;
const DASHBOARD_PERIOD: Duration = Duration::from_millis(250);
const SINGLE_CLIENTS: usize = 64;
const DRAIN_LIMIT: Duration = Duration::from_secs(90);
const QUANTITY: &str = "air_temperature";

/// Command-line options of `consensor-bench load`.
pub struct Options {
    pub quick: bool,
    pub seconds: u64,
    /// Readings per backlog batch in the burst.
    pub burst_batch: usize,
}

impl Options {
    pub fn from_args(args: &[String]) -> anyhow::Result<Options> {
        let quick = args.iter().any(|a| a == "--quick");
        let default_seconds = if quick { 15 } else { 60 };
        Ok(Options {
            quick,
            seconds: number_flag(args, "--seconds", default_seconds, 5..=3600)?,
            burst_batch: number_flag(args, "--burst-batch", BURST_BATCH, BURST_BATCH_RANGE)?,
        })
    }
}

/// The whole number after `flag` in `args`, which must lie in `range`; `default` without the flag.
fn number_flag<T>(
    args: &[String],
    flag: &str,
    default: T,
    range: std::ops::RangeInclusive<T>,
) -> anyhow::Result<T>
where
    T: std::str::FromStr + PartialOrd + std::fmt::Display,
{
    let Some(position) = args.iter().position(|a| a == flag) else {
        return Ok(default);
    };
    let text = args
        .get(position + 1)
        .with_context(|| format!("{flag} needs a whole number"))?;
    text.parse()
        .ok()
        .filter(|n| range.contains(n))
        .with_context(|| {
            format!(
                "{flag}: {text:?} is not a whole number from {} to {}",
                range.start(),
                range.end()
            )
        })
}

pub async fn run(options: Options) -> anyhow::Result<()> {
    let binary = server_binary()?;
    let directory = std::env::temp_dir().join(format!(
        "consensor-load-{}-{}",
        std::process::id(),
        chrono::Utc::now().timestamp_millis()
    ));
    std::fs::create_dir_all(&directory).context("could not create the load test's directory")?;
    let database_path = directory.join("load.db");
    println!("machine: {}", machine::describe());
    println!("server: {} (separate process)", binary.display());
    println!("database: sqlite file {}", database_path.display());
    let single_seconds = (options.seconds / 4).max(5);
    println!(
        "network: {AREAS} areas (1-minute intervals) x {STATIONS_PER_AREA} stations = {STATIONS} stations, one {QUANTITY} reading per station per second; \
         {GATEWAYS} gateways of {STATIONS_PER_GATEWAY} stations, one station token per gateway bound to its stations"
    );
    println!(
        "plan ({}): batched {} s, single-reading {} s, burst of {} s backlog per station in batches of {}, drain up to {} s; {} dashboards polling every {} ms",
        if options.quick { "--quick" } else { "full" },
        options.seconds,
        single_seconds,
        BACKLOG_SECONDS,
        options.burst_batch,
        DRAIN_LIMIT.as_secs(),
        DASHBOARDS,
        DASHBOARD_PERIOD.as_millis()
    );

    let server = Server::start(&binary, &directory, &database_path)?;
    let outcome = drive(&server, &options, single_seconds).await;
    let server_peak_rss = server.peak_rss_mib();
    let stopped = server.stop();
    let outcome = outcome?;
    let shutdown = stopped?;
    let verification = verify(&database_path, &outcome.acked).await?;
    report(&outcome, &verification, server_peak_rss, shutdown);
    let _ = std::fs::remove_dir_all(&directory);
    Ok(())
}

// ---------------------------------------------------------------------------------------------
// The server process

fn server_binary() -> anyhow::Result<PathBuf> {
    if let Some(path) = std::env::var_os("CONSENSOR_BIN") {
        return Ok(PathBuf::from(path));
    }
    let exe = std::env::current_exe().context("could not find this program's path")?;
    let path = exe
        .parent()
        .context("this program's path has no folder")?
        .join("consensor");
    if !path.exists() {
        bail!(
            "no server binary at {}: build it (cargo build --release -p consensor-server) or set CONSENSOR_BIN",
            path.display()
        );
    }
    Ok(path)
}

struct Server {
    child: Child,
    base: String,
}

impl Server {
    fn start(binary: &Path, directory: &Path, database: &Path) -> anyhow::Result<Server> {
        let log = std::fs::File::create(directory.join("server.log"))
            .context("could not create the server's log file")?;
        let mut child = Command::new(binary)
            .arg("serve")
            .env(
                "CONSENSOR_DATABASE_URL",
                format!("sqlite://{}", database.display()),
            )
            .env("CONSENSOR_ADMIN_TOKEN", ADMIN)
            .env("CONSENSOR_LISTEN", "127.0.0.1:0")
            .env_remove("CONSENSOR_CONFIG")
            // The harness's own setting: the server would read it as a configuration key
            // (`CONSENSOR_` prefix) and refuse to start on an unknown field.
            .env_remove("CONSENSOR_BIN")
            .stdout(Stdio::piped())
            .stderr(log)
            .spawn()
            .with_context(|| format!("could not start {}", binary.display()))?;
        let stdout = child.stdout.take().context("no stdout of the server")?;
        let (address_tx, address_rx) = std::sync::mpsc::channel();
        // Reads the server's standard output to the end so the pipe never fills.
        std::thread::spawn(move || {
            for line in BufReader::new(stdout).lines().map_while(Result::ok) {
                if let Some(rest) = line.split("listening on http://").nth(1) {
                    let _ = address_tx.send(rest.trim().to_owned());
                }
            }
        });
        let address = match address_rx.recv_timeout(Duration::from_secs(30)) {
            Ok(address) => address,
            Err(_) => {
                let _ = child.kill();
                bail!(
                    "the server did not report its address within 30 s; see {}",
                    directory.join("server.log").display()
                );
            }
        };
        Ok(Server {
            child,
            base: format!("http://{address}"),
        })
    }

    fn status_kib(&self, key: &str) -> Option<u64> {
        let text = std::fs::read_to_string(format!("/proc/{}/status", self.child.id())).ok()?;
        let line = text.lines().find(|line| line.starts_with(key))?;
        line[key.len()..].split_whitespace().next()?.parse().ok()
    }

    fn peak_rss_mib(&self) -> Option<f64> {
        self.status_kib("VmHWM:").map(|kib| kib as f64 / 1024.0)
    }

    /// Stops the server with SIGTERM (a clean stop, as an operator would) and returns how long it
    /// took; after 60 s it is killed and that is an error.
    fn stop(mut self) -> anyhow::Result<Duration> {
        let began = Instant::now();
        let signalled = Command::new("kill")
            .arg("-TERM")
            .arg(self.child.id().to_string())
            .status()
            .context("could not run kill")?;
        if !signalled.success() {
            bail!("kill -TERM failed");
        }
        loop {
            if let Some(status) = self.child.try_wait()? {
                if !status.success() {
                    bail!("the server exited with {status}");
                }
                return Ok(began.elapsed());
            }
            if began.elapsed() > Duration::from_secs(60) {
                let _ = self.child.kill();
                let _ = self.child.wait();
                bail!("the server did not stop within 60 s of SIGTERM and was killed");
            }
            std::thread::sleep(Duration::from_millis(20));
        }
    }
}

// ---------------------------------------------------------------------------------------------
// The invented network and its readings

fn area_key(area: usize) -> String {
    format!("a{area:02}")
}

fn station_key(station: usize) -> String {
    format!(
        "s{:02}-{:03}",
        station / STATIONS_PER_AREA,
        station % STATIONS_PER_AREA
    )
}

/// The value a station reports for one second: a slow swing shared by the area, an offset of the
/// station, and a little noise, all fixed by (station, second), so that a resend is the same
/// reading (a duplicate), never a revision. Rounded to hundredths, as sensors report.
fn value(station: usize, second: i64) -> f64 {
    let area = station / STATIONS_PER_AREA;
    let swing = 1.5 * ((second as f64) * std::f64::consts::TAU / 1800.0 + area as f64 * 0.3).sin();
    let offset = (station % STATIONS_PER_AREA) as f64 * 0.02;
    let mut rng = SplitMix::new(((station as u64) << 40) ^ (second as u64));
    let noise = (rng.unit() - 0.5) * 0.4;
    ((12.0 + swing + offset + noise) * 100.0).round() / 100.0
}

fn reading_json(station: usize, second: i64) -> Value {
    json!({
        "station": station_key(station),
        "quantity": QUANTITY,
        "value": value(station, second),
        "observed_at": consensor_server::http::rfc3339(second * 1000),
    })
}

/// A reading's key on the client side: (station index, epoch second).
type Key = (u32, i64);

fn batch_body(keys: &[Key]) -> String {
    let readings: Vec<Value> = keys
        .iter()
        .map(|&(station, second)| reading_json(station as usize, second))
        .collect();
    json!({ "readings": readings }).to_string()
}

fn gateway_stations(gateway: usize) -> std::ops::Range<usize> {
    gateway * STATIONS_PER_GATEWAY..(gateway + 1) * STATIONS_PER_GATEWAY
}

// ---------------------------------------------------------------------------------------------
// Recording

const PHASES: [&str; 4] = ["batched", "single", "burst", "drain"];

#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
enum Kind {
    LiveBatch,
    Single,
    Backlog,
    Series,
    Latest,
}

impl Kind {
    fn name(self) -> &'static str {
        match self {
            Kind::LiveBatch => "ingest, live batch of 100",
            Kind::Single => "ingest, single reading",
            Kind::Backlog => "ingest, backlog batch",
            Kind::Series => "dashboard GET series",
            Kind::Latest => "dashboard GET latest",
        }
    }
}

struct Sample {
    phase: u8,
    kind: Kind,
    /// HTTP status, or 0 when the request failed without an answer.
    status: u16,
    micros: u64,
    readings: u32,
}

struct MonitorRow {
    seconds: f64,
    phase: u8,
    pending: Option<u64>,
    stored: Option<u64>,
    lag_seconds: Option<f64>,
    rss_mib: Option<f64>,
}

struct LoadContext {
    client: reqwest::Client,
    base: String,
    phase: AtomicU8,
    samples: Mutex<Vec<Sample>>,
    acked: Mutex<Vec<Key>>,
    accepted: AtomicU64,
    duplicates: AtomicU64,
    revised: AtomicU64,
}

impl LoadContext {
    fn phase(&self) -> u8 {
        self.phase.load(Ordering::Relaxed)
    }

    fn record(&self, phase: u8, kind: Kind, status: u16, micros: u64, readings: u32) {
        self.samples.lock().unwrap().push(Sample {
            phase,
            kind,
            status,
            micros,
            readings,
        });
    }

    /// Posts one batch; latency is counted from `scheduled` (when the readings were due), so a
    /// client held up by a slow server shows that delay instead of hiding it.
    async fn post_readings(
        &self,
        token: &str,
        body: String,
        keys: Vec<Key>,
        kind: Kind,
        scheduled: Instant,
    ) {
        let phase = self.phase();
        let result = self
            .client
            .post(format!("{}/v1/readings", self.base))
            .bearer_auth(token)
            .header("content-type", "application/json")
            .body(body)
            .send()
            .await;
        let (status, answer) = match result {
            Ok(response) => {
                let status = response.status().as_u16();
                (status, response.json::<Value>().await.ok())
            }
            Err(_) => (0, None),
        };
        let micros = scheduled.elapsed().as_micros() as u64;
        let count = keys.len() as u32;
        if status == 200 {
            if let Some(answer) = answer {
                let field = |name: &str| answer[name].as_u64().unwrap_or(0);
                self.accepted
                    .fetch_add(field("accepted"), Ordering::Relaxed);
                self.duplicates
                    .fetch_add(field("duplicates"), Ordering::Relaxed);
                self.revised.fetch_add(field("revised"), Ordering::Relaxed);
            }
            self.acked.lock().unwrap().extend(keys);
        }
        self.record(phase, kind, status, micros, count);
    }

    async fn admin_put(&self, path: &str, body: Value) -> anyhow::Result<()> {
        let response = self
            .client
            .put(format!("{}{path}", self.base))
            .bearer_auth(ADMIN)
            .json(&body)
            .send()
            .await?;
        let status = response.status();
        if !status.is_success() {
            bail!(
                "PUT {path}: {status} {}",
                response.text().await.unwrap_or_default()
            );
        }
        Ok(())
    }

    async fn create_token(&self, body: Value) -> anyhow::Result<String> {
        let response = self
            .client
            .post(format!("{}/v1/tokens", self.base))
            .bearer_auth(ADMIN)
            .json(&body)
            .send()
            .await?;
        let status = response.status();
        let answer: Value = response.json().await?;
        if status.as_u16() != 201 {
            bail!("POST /v1/tokens: {status} {answer}");
        }
        answer["token"]
            .as_str()
            .map(str::to_owned)
            .context("no token in the answer")
    }
}

struct Outcome {
    samples: Vec<Sample>,
    monitor: Vec<MonitorRow>,
    acked: Vec<Key>,
    accepted: u64,
    duplicates: u64,
    revised: u64,
    phase_seconds: [f64; 4],
    burst_readings: usize,
    /// Seconds from the end of the burst until pending intervals were at most the open ones.
    recovery: Option<f64>,
    setup_seconds: f64,
}

// ---------------------------------------------------------------------------------------------
// Driving the load

async fn drive(server: &Server, options: &Options, single_seconds: u64) -> anyhow::Result<Outcome> {
    let client = reqwest::Client::builder()
        .timeout(Duration::from_secs(120))
        .pool_max_idle_per_host(256)
        .build()?;
    let context = Arc::new(LoadContext {
        client,
        base: server.base.clone(),
        phase: AtomicU8::new(0),
        samples: Mutex::new(Vec::new()),
        acked: Mutex::new(Vec::new()),
        accepted: AtomicU64::new(0),
        duplicates: AtomicU64::new(0),
        revised: AtomicU64::new(0),
    });

    // Set-up: areas, stations, one station token per gateway and one reader token.
    let began = Instant::now();
    for area in 0..AREAS {
        context
            .admin_put(
                &format!("/v1/areas/{}", area_key(area)),
                json!({"name": format!("Load area {area:02}"), "interval": "1m"}),
            )
            .await?;
    }
    let mut creators = tokio::task::JoinSet::new();
    for worker in 0..8 {
        let context = context.clone();
        creators.spawn(async move {
            for station in (worker..STATIONS).step_by(8) {
                context
                    .admin_put(
                        &format!("/v1/stations/{}", station_key(station)),
                        json!({
                            "area": area_key(station / STATIONS_PER_AREA),
                            "name": format!("Load station {}", station_key(station)),
                        }),
                    )
                    .await?;
            }
            anyhow::Ok(())
        });
    }
    while let Some(result) = creators.join_next().await {
        result??;
    }
    let mut gateway_tokens = Vec::new();
    for gateway in 0..GATEWAYS {
        let stations: Vec<String> = gateway_stations(gateway).map(station_key).collect();
        gateway_tokens.push(
            context
                .create_token(json!({
                    "role": "station",
                    "stations": stations,
                    "label": format!("load gateway {gateway:02}"),
                }))
                .await?,
        );
    }
    let gateway_tokens = Arc::new(gateway_tokens);
    let reader = Arc::new(
        context
            .create_token(json!({"role": "reader", "label": "load dashboards"}))
            .await?,
    );
    let setup_seconds = began.elapsed().as_secs_f64();

    let stop_background = Arc::new(AtomicBool::new(false));
    let test_began = Instant::now();
    let monitor_rows = Arc::new(Mutex::new(Vec::new()));
    let monitor = tokio::spawn(monitor(
        context.clone(),
        reader.clone(),
        server.child.id(),
        test_began,
        stop_background.clone(),
        monitor_rows.clone(),
    ));
    let mut dashboards = Vec::new();
    for dashboard in 0..DASHBOARDS {
        dashboards.push(tokio::spawn(dashboard_loop(
            context.clone(),
            reader.clone(),
            dashboard,
            stop_background.clone(),
        )));
    }
    let mut phase_seconds = [0.0; 4];

    // Phase 1: batched live posting.
    context.phase.store(0, Ordering::Relaxed);
    let phase_began = Instant::now();
    let (start_instant, start_second) = next_whole_second();
    let live_stop = Arc::new(AtomicBool::new(false));
    let live = spawn_live_gateways(
        &context,
        &gateway_tokens,
        start_instant,
        start_second,
        Some(options.seconds as i64),
        &live_stop,
    );
    for task in live {
        task.await?;
    }
    phase_seconds[0] = phase_began.elapsed().as_secs_f64();

    // Phase 2: one request per reading.
    context.phase.store(1, Ordering::Relaxed);
    let phase_began = Instant::now();
    let (single_instant, single_second) = next_whole_second();
    let permits = Arc::new(tokio::sync::Semaphore::new(SINGLE_CLIENTS));
    let mut singles = tokio::task::JoinSet::new();
    for tick in 0..single_seconds as i64 {
        let scheduled = single_instant + Duration::from_secs(tick as u64);
        tokio::time::sleep_until(scheduled.into()).await;
        for station in 0..STATIONS {
            let context = context.clone();
            let permits = permits.clone();
            let token = gateway_tokens[station / STATIONS_PER_GATEWAY].clone();
            let key = (station as u32, single_second + tick);
            singles.spawn(async move {
                let _permit = permits.acquire_owned().await;
                let body = batch_body(&[key]);
                context
                    .post_readings(&token, body, vec![key], Kind::Single, scheduled)
                    .await;
            });
        }
    }
    while singles.join_next().await.is_some() {}
    phase_seconds[1] = phase_began.elapsed().as_secs_f64();

    // Phase 3: the outage burst. The backlog is the ten minutes before the burst's first second
    // (so it repeats everything sent in phases 1 and 2, which must count as duplicates); live
    // batched posting resumes from that second on. Bodies are built before the clock starts,
    // which takes most of a second here: the burst starts BURST_LEAD after the next whole second
    // so that the first live batch is not counted as late by the time the harness itself spent
    // building (an earlier version started at the next whole second and so charged every first
    // live batch of the burst about 650 ms of the client's own work).
    let (next_instant, next_second) = next_whole_second();
    let (burst_instant, burst_second) = (
        next_instant + BURST_LEAD,
        next_second + BURST_LEAD.as_secs() as i64,
    );
    let mut backlog_bodies: Vec<Vec<(String, Vec<Key>)>> = Vec::new();
    let mut burst_readings = 0;
    for gateway in 0..GATEWAYS {
        let mut keys = Vec::new();
        for second in burst_second - BACKLOG_SECONDS..burst_second {
            for station in gateway_stations(gateway) {
                keys.push((station as u32, second));
            }
        }
        burst_readings += keys.len();
        backlog_bodies.push(
            keys.chunks(options.burst_batch)
                .map(|chunk| (batch_body(chunk), chunk.to_vec()))
                .collect(),
        );
    }
    anyhow::ensure!(
        Instant::now() < burst_instant,
        "building the backlog bodies took longer than the burst's lead of {BURST_LEAD:?}"
    );
    tokio::time::sleep_until(burst_instant.into()).await;
    context.phase.store(2, Ordering::Relaxed);
    let phase_began = Instant::now();
    let live = spawn_live_gateways(
        &context,
        &gateway_tokens,
        burst_instant,
        burst_second,
        None,
        &live_stop,
    );
    let mut senders = Vec::new();
    for (gateway, bodies) in backlog_bodies.into_iter().enumerate() {
        let context = context.clone();
        let token = gateway_tokens[gateway].clone();
        senders.push(tokio::spawn(async move {
            for (body, keys) in bodies {
                let scheduled = Instant::now();
                context
                    .post_readings(&token, body, keys, Kind::Backlog, scheduled)
                    .await;
            }
        }));
    }
    for sender in senders {
        sender.await?;
    }
    phase_seconds[2] = phase_began.elapsed().as_secs_f64();
    let burst_end = test_began.elapsed().as_secs_f64();

    // Phase 4: drain, until the worker is back to the intervals in progress.
    context.phase.store(3, Ordering::Relaxed);
    let phase_began = Instant::now();
    let mut recovery = None;
    while phase_began.elapsed() < DRAIN_LIMIT {
        tokio::time::sleep(Duration::from_millis(500)).await;
        if recovery.is_none() {
            let rows = monitor_rows.lock().unwrap();
            recovery = rows
                .iter()
                .filter(|row: &&MonitorRow| row.seconds >= burst_end)
                .find(|row| row.pending.is_some_and(|p| p <= AREAS as u64))
                .map(|row| row.seconds - burst_end);
        }
        if let Some(after) = recovery {
            if test_began.elapsed().as_secs_f64() > burst_end + after + 5.0 {
                break;
            }
        }
    }
    live_stop.store(true, Ordering::Relaxed);
    for task in live {
        task.await?;
    }
    phase_seconds[3] = phase_began.elapsed().as_secs_f64();
    stop_background.store(true, Ordering::Relaxed);
    monitor.await?;
    for dashboard in dashboards {
        dashboard.await?;
    }

    let monitor = std::mem::take(&mut *monitor_rows.lock().unwrap());
    let samples = std::mem::take(&mut *context.samples.lock().unwrap());
    let acked = std::mem::take(&mut *context.acked.lock().unwrap());
    Ok(Outcome {
        samples,
        monitor,
        acked,
        accepted: context.accepted.load(Ordering::Relaxed),
        duplicates: context.duplicates.load(Ordering::Relaxed),
        revised: context.revised.load(Ordering::Relaxed),
        phase_seconds,
        burst_readings,
        recovery,
        setup_seconds,
    })
}

/// The next whole second of the real clock, as an `Instant` and as epoch seconds.
fn next_whole_second() -> (Instant, i64) {
    let now_ms = chrono::Utc::now().timestamp_millis();
    let second = now_ms / 1000 + 1;
    let wait = Duration::from_millis((second * 1000 - now_ms) as u64);
    (Instant::now() + wait, second)
}

/// One task per gateway posting its stations' readings of each second as one batch, from
/// `first_second` on, for `seconds` seconds or until `stop` is set.
fn spawn_live_gateways(
    context: &Arc<LoadContext>,
    tokens: &Arc<Vec<String>>,
    first_instant: Instant,
    first_second: i64,
    seconds: Option<i64>,
    stop: &Arc<AtomicBool>,
) -> Vec<tokio::task::JoinHandle<()>> {
    (0..GATEWAYS)
        .map(|gateway| {
            let context = context.clone();
            let tokens = tokens.clone();
            let stop = stop.clone();
            tokio::spawn(async move {
                let mut tick = 0i64;
                while seconds.is_none_or(|limit| tick < limit) && !stop.load(Ordering::Relaxed) {
                    let scheduled = first_instant + Duration::from_secs(tick as u64);
                    tokio::time::sleep_until(scheduled.into()).await;
                    let keys: Vec<Key> = gateway_stations(gateway)
                        .map(|station| (station as u32, first_second + tick))
                        .collect();
                    let body = batch_body(&keys);
                    context
                        .post_readings(&tokens[gateway], body, keys, Kind::LiveBatch, scheduled)
                        .await;
                    tick += 1;
                }
            })
        })
        .collect()
}

/// A dashboard: every 250 ms, alternately the last 15 minutes of one area's series and its latest
/// point, going round the areas.
async fn dashboard_loop(
    context: Arc<LoadContext>,
    reader: Arc<String>,
    dashboard: usize,
    stop: Arc<AtomicBool>,
) {
    let mut poll = 0usize;
    let mut ticks = tokio::time::interval(DASHBOARD_PERIOD);
    while !stop.load(Ordering::Relaxed) {
        ticks.tick().await;
        let area = area_key((dashboard * 5 + poll / 2) % AREAS);
        let now_ms = chrono::Utc::now().timestamp_millis();
        let (kind, url) = if (poll & 1) == 0 {
            (
                Kind::Series,
                format!(
                    "{}/v1/areas/{area}/series?quantity={QUANTITY}&from={}&to={}",
                    context.base,
                    consensor_server::http::rfc3339(now_ms - 15 * 60_000),
                    consensor_server::http::rfc3339(now_ms + 60_000),
                ),
            )
        } else {
            (
                Kind::Latest,
                format!(
                    "{}/v1/areas/{area}/latest?quantity={QUANTITY}",
                    context.base
                ),
            )
        };
        poll += 1;
        let phase = context.phase();
        let began = Instant::now();
        let status = match context.client.get(&url).bearer_auth(&*reader).send().await {
            Ok(response) => {
                let status = response.status().as_u16();
                // The body is read in full: a dashboard waits for all of it.
                match response.bytes().await {
                    Ok(_) => status,
                    Err(_) => 0,
                }
            }
            Err(_) => 0,
        };
        context.record(phase, kind, status, began.elapsed().as_micros() as u64, 0);
    }
}

/// Each second: pending intervals and stored readings from `/v1/status`, the worker lag from
/// `/metrics`, and the server's resident memory.
async fn monitor(
    context: Arc<LoadContext>,
    reader: Arc<String>,
    pid: u32,
    began: Instant,
    stop: Arc<AtomicBool>,
    rows: Arc<Mutex<Vec<MonitorRow>>>,
) {
    let mut ticks = tokio::time::interval(Duration::from_secs(1));
    while !stop.load(Ordering::Relaxed) {
        ticks.tick().await;
        let seconds = began.elapsed().as_secs_f64();
        let phase = context.phase();
        let status: Option<Value> = async {
            context
                .client
                .get(format!("{}/v1/status", context.base))
                .bearer_auth(&*reader)
                .send()
                .await
                .ok()?
                .json::<Value>()
                .await
                .ok()
        }
        .await;
        let metrics: Option<String> = async {
            context
                .client
                .get(format!("{}/metrics", context.base))
                .bearer_auth(&*reader)
                .send()
                .await
                .ok()?
                .text()
                .await
                .ok()
        }
        .await;
        let lag_seconds = metrics.as_deref().and_then(|text| {
            text.lines()
                .find_map(|line| line.strip_prefix("consensor_worker_lag_seconds "))
                .and_then(|value| value.trim().parse().ok())
        });
        let rss_mib = std::fs::read_to_string(format!("/proc/{pid}/status"))
            .ok()
            .and_then(|text| {
                let line = text
                    .lines()
                    .find(|line| line.starts_with("VmRSS:"))?
                    .to_owned();
                line["VmRSS:".len()..]
                    .split_whitespace()
                    .next()?
                    .parse::<f64>()
                    .ok()
            })
            .map(|kib| kib / 1024.0);
        rows.lock().unwrap().push(MonitorRow {
            seconds,
            phase,
            pending: status
                .as_ref()
                .and_then(|s| s["pending_intervals"].as_u64()),
            stored: status.as_ref().and_then(|s| s["readings"].as_u64()),
            lag_seconds,
            rss_mib,
        });
    }
}

// ---------------------------------------------------------------------------------------------
// Verification against the database file

struct Verification {
    acknowledged: usize,
    stored_keys: usize,
    stored_rows: u64,
    missing: usize,
    doubled: usize,
    stored_not_acknowledged: usize,
    seconds: f64,
}

/// Opens the stopped server's SQLite file and counts the rows of each (station, quantity,
/// observed_at), then compares with the set of readings the server answered 200 for.
async fn verify(database: &Path, acked: &[Key]) -> anyhow::Result<Verification> {
    let began = Instant::now();
    let options = sqlx::sqlite::SqliteConnectOptions::new()
        .filename(database)
        .read_only(true);
    let pool = sqlx::sqlite::SqlitePoolOptions::new()
        .max_connections(1)
        .connect_with(options)
        .await
        .context("could not open the server's database file")?;
    let rows: Vec<(String, String, i64, i64)> = sqlx::query_as(
        "SELECT s.key, q.key, r.observed_at_ms, COUNT(*) FROM readings r \
         JOIN stations s ON s.id = r.station_id JOIN quantities q ON q.id = r.quantity_id \
         GROUP BY r.station_id, r.quantity_id, r.observed_at_ms",
    )
    .fetch_all(&pool)
    .await
    .context("could not count the stored readings")?;
    pool.close().await;
    let index: HashMap<String, u32> = (0..STATIONS)
        .map(|station| (station_key(station), station as u32))
        .collect();
    let acknowledged: HashSet<Key> = acked.iter().copied().collect();
    let mut stored = HashSet::with_capacity(rows.len());
    let mut doubled = 0;
    let mut stored_rows = 0u64;
    let mut stored_not_acknowledged = 0;
    for (station, quantity, observed_at_ms, count) in &rows {
        stored_rows += *count as u64;
        let Some(&station) = index.get(station) else {
            bail!("a reading of a station the test did not create: {station}");
        };
        if quantity != QUANTITY {
            bail!("a reading of a quantity the test did not send: {quantity}");
        }
        let key = (station, observed_at_ms / 1000);
        if *count > 1 {
            doubled += 1;
        }
        if !acknowledged.contains(&key) {
            stored_not_acknowledged += 1;
        }
        stored.insert(key);
    }
    let missing = acknowledged.iter().filter(|k| !stored.contains(k)).count();
    Ok(Verification {
        acknowledged: acknowledged.len(),
        stored_keys: stored.len(),
        stored_rows,
        missing,
        doubled,
        stored_not_acknowledged,
        seconds: began.elapsed().as_secs_f64(),
    })
}

// ---------------------------------------------------------------------------------------------
// The report

fn percentile(sorted: &[u64], fraction: f64) -> f64 {
    if sorted.is_empty() {
        return f64::NAN;
    }
    // Nearest rank: the smallest value with at least `fraction` of the values at or below it.
    let rank = ((fraction * sorted.len() as f64).ceil() as usize).clamp(1, sorted.len());
    sorted[rank - 1] as f64 / 1000.0
}

struct Summary {
    requests: usize,
    readings_acked: u64,
    p50_ms: f64,
    p99_ms: f64,
    max_ms: f64,
    statuses: BTreeMap<u16, usize>,
}

fn summarise<'a>(samples: impl Iterator<Item = &'a Sample>) -> Summary {
    let mut micros = Vec::new();
    let mut statuses = BTreeMap::new();
    let mut readings_acked = 0;
    for sample in samples {
        micros.push(sample.micros);
        *statuses.entry(sample.status).or_insert(0) += 1;
        if sample.status == 200 {
            readings_acked += u64::from(sample.readings);
        }
    }
    micros.sort_unstable();
    Summary {
        requests: micros.len(),
        readings_acked,
        p50_ms: percentile(&micros, 0.50),
        p99_ms: percentile(&micros, 0.99),
        max_ms: micros.last().map_or(f64::NAN, |&m| m as f64 / 1000.0),
        statuses,
    }
}

fn statuses_text(statuses: &BTreeMap<u16, usize>) -> String {
    statuses
        .iter()
        .map(|(status, count)| {
            if *status == 0 {
                format!("no answer:{count}")
            } else {
                format!("{status}:{count}")
            }
        })
        .collect::<Vec<_>>()
        .join(" ")
}

fn met(ok: bool) -> &'static str {
    if ok {
        "MET"
    } else {
        "NOT MET"
    }
}

fn report(
    outcome: &Outcome,
    verification: &Verification,
    server_peak_rss: Option<f64>,
    shutdown: Duration,
) {
    println!();
    println!(
        "set-up (20 areas, 1000 stations, 11 tokens): {:.1} s",
        outcome.setup_seconds
    );
    println!(
        "phase seconds: batched {:.1}, single {:.1}, burst {:.1}, drain {:.1}",
        outcome.phase_seconds[0],
        outcome.phase_seconds[1],
        outcome.phase_seconds[2],
        outcome.phase_seconds[3]
    );
    println!();
    println!(
        "{:<8} {:<30} {:>8} {:>10} {:>10} {:>9} {:>9} {:>9}  statuses",
        "phase", "requests", "count", "rdg acked", "rdg/s", "p50 ms", "p99 ms", "max ms"
    );
    let kinds = [
        Kind::LiveBatch,
        Kind::Single,
        Kind::Backlog,
        Kind::Series,
        Kind::Latest,
    ];
    for (phase, name) in PHASES.iter().enumerate() {
        for kind in kinds {
            let summary = summarise(
                outcome
                    .samples
                    .iter()
                    .filter(|s| s.phase as usize == phase && s.kind == kind),
            );
            if summary.requests == 0 {
                continue;
            }
            let rate = if matches!(kind, Kind::Series | Kind::Latest) {
                String::new()
            } else {
                format!(
                    "{:.0}",
                    summary.readings_acked as f64 / outcome.phase_seconds[phase]
                )
            };
            println!(
                "{:<8} {:<30} {:>8} {:>10} {:>10} {:>9.1} {:>9.1} {:>9.1}  {}",
                name,
                kind.name(),
                summary.requests,
                if rate.is_empty() {
                    String::new()
                } else {
                    summary.readings_acked.to_string()
                },
                rate,
                summary.p50_ms,
                summary.p99_ms,
                summary.max_ms,
                statuses_text(&summary.statuses)
            );
        }
    }
    let ingest_batches = summarise(
        outcome
            .samples
            .iter()
            .filter(|s| matches!(s.kind, Kind::LiveBatch | Kind::Backlog)),
    );
    let reads = summarise(
        outcome
            .samples
            .iter()
            .filter(|s| matches!(s.kind, Kind::Series | Kind::Latest)),
    );
    let singles = summarise(outcome.samples.iter().filter(|s| s.kind == Kind::Single));
    println!(
        "all phases: batched ingest p50 {:.1} ms p99 {:.1} ms ({} requests); dashboard reads p50 {:.1} ms p99 {:.1} ms ({} requests)",
        ingest_batches.p50_ms,
        ingest_batches.p99_ms,
        ingest_batches.requests,
        reads.p50_ms,
        reads.p99_ms,
        reads.requests
    );

    let backlog = summarise(outcome.samples.iter().filter(|s| s.kind == Kind::Backlog));
    let burst_rate = backlog.readings_acked as f64 / outcome.phase_seconds[2];
    println!();
    println!(
        "burst: {} backlog readings ({} per station) acknowledged {} in {:.2} s = {:.0} readings/s (plus live batches meanwhile)",
        outcome.burst_readings,
        BACKLOG_SECONDS,
        backlog.readings_acked,
        outcome.phase_seconds[2],
        burst_rate
    );
    println!(
        "server answers, all ingest: accepted {} new, {} duplicates, {} revised",
        outcome.accepted, outcome.duplicates, outcome.revised
    );

    println!();
    println!("worker (each second; pending = intervals waiting, incl. the {AREAS} in progress held back 30 s by design):");
    println!(
        "{:>7} {:<8} {:>8} {:>12} {:>9} {:>9}",
        "t s", "phase", "pending", "stored rdg", "lag s", "rss MiB"
    );
    let show = |value: Option<f64>, decimals: usize| {
        value.map_or_else(|| "-".to_owned(), |v| format!("{v:.decimals$}"))
    };
    let mut last_printed = f64::NEG_INFINITY;
    for (index, row) in outcome.monitor.iter().enumerate() {
        let phase_changes = index == 0 || outcome.monitor[index - 1].phase != row.phase;
        let busy = row.phase >= 2 && row.pending.is_some_and(|p| p > AREAS as u64);
        if phase_changes
            || busy
            || row.seconds - last_printed >= 5.0
            || index + 1 == outcome.monitor.len()
        {
            last_printed = row.seconds;
            println!(
                "{:>7.1} {:<8} {:>8} {:>12} {:>9} {:>9}",
                row.seconds,
                PHASES[row.phase as usize],
                row.pending.map_or("-".to_owned(), |p| p.to_string()),
                row.stored.map_or("-".to_owned(), |p| p.to_string()),
                show(row.lag_seconds, 1),
                show(row.rss_mib, 1)
            );
        }
    }
    match outcome.recovery {
        Some(after) => println!(
            "pending back to at most the {AREAS} intervals in progress {after:.1} s after the burst ended"
        ),
        None => println!(
            "pending NOT back to the {AREAS} intervals in progress within {} s after the burst",
            DRAIN_LIMIT.as_secs()
        ),
    }
    println!();
    println!(
        "peak resident memory: server {} MiB (VmHWM), load client {} MiB",
        show(server_peak_rss, 1),
        show(machine::peak_rss_mib(), 1)
    );
    println!(
        "server stopped cleanly on SIGTERM in {:.2} s",
        shutdown.as_secs_f64()
    );
    println!();
    println!(
        "verification ({:.1} s, sqlite file after stop): {} readings acknowledged, {} distinct stored ({} rows); missing {}, stored more than once {}, stored but never acknowledged {}",
        verification.seconds,
        verification.acknowledged,
        verification.stored_keys,
        verification.stored_rows,
        verification.missing,
        verification.doubled,
        verification.stored_not_acknowledged
    );
    println!(
        "  accepted counted by the server {} vs distinct stored {}",
        outcome.accepted, verification.stored_keys
    );

    println!();
    println!("targets (issue 7, SQLite, this machine):");
    println!(
        "  >= 100000 readings/s sustained in batches: {} (burst {:.0} readings/s over {:.1} s; live offered load is {} readings/s)",
        met(burst_rate >= 100_000.0),
        burst_rate,
        outcome.phase_seconds[2],
        STATIONS
    );
    let p99_of = |filter: &dyn Fn(&Sample) -> bool| {
        summarise(outcome.samples.iter().filter(|s| filter(s))).p99_ms
    };
    let burst = PHASES.iter().position(|p| *p == "burst").unwrap_or(2) as u8;
    println!(
        "  p99 < 250 ms, batched ingest: {} ({:.1} ms over all batches; live batches outside the burst {:.1} ms, during it {:.1} ms; backlog batches {:.1} ms)",
        met(ingest_batches.p99_ms < 250.0),
        ingest_batches.p99_ms,
        p99_of(&|s| s.kind == Kind::LiveBatch && s.phase != burst),
        p99_of(&|s| s.kind == Kind::LiveBatch && s.phase == burst),
        p99_of(&|s| s.kind == Kind::Backlog),
    );
    println!(
        "  p99 < 250 ms, dashboard reads: {} ({:.1} ms over all; outside the burst {:.1} ms, during it {:.1} ms)",
        met(reads.p99_ms < 250.0),
        reads.p99_ms,
        p99_of(&|s| matches!(s.kind, Kind::Series | Kind::Latest) && s.phase != burst),
        p99_of(&|s| matches!(s.kind, Kind::Series | Kind::Latest) && s.phase == burst),
    );
    println!(
        "  (not a target) one reading per request: p99 {:.1} ms, {:.0} readings/s acknowledged against {} offered",
        singles.p99_ms,
        singles.readings_acked as f64 / outcome.phase_seconds[1],
        STATIONS
    );
    println!(
        "  zero lost or doubled readings: {} (missing {}, doubled {})",
        met(verification.missing == 0 && verification.doubled == 0),
        verification.missing,
        verification.doubled
    );
    println!(
        "  worker back under one interval within a minute of the burst: {} ({})",
        met(outcome.recovery.is_some_and(|after| after <= 60.0)),
        outcome.recovery.map_or_else(
            || "never within the drain".to_owned(),
            |a| format!("{a:.1} s")
        )
    );
    let errors: usize = outcome
        .samples
        .iter()
        .filter(|s| s.status != 200 && !(s.kind == Kind::Latest && s.status == 404))
        .count();
    println!(
        "  errors (any answer but 200, or none; 404 of /latest before a first result excepted): {errors}"
    );
}
