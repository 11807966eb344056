//! The ingest benchmark: readings per second through the whole HTTP path (JSON decoding, validation,
//! unit handling, duplicate detection, one transaction per batch, pending-bucket marking), against
//! the same rows inserted straight into the same kind of database in one transaction with a
//! prepared statement, measured in the same run.

use std::sync::Arc;
use std::time::{Duration, Instant};

use anyhow::Context;
use consensor_server::config::Config;
use consensor_server::state::SystemClock;
use consensor_store::testing::TestDatabase;
use consensor_store::{AnyStore, NewArea, NewStation, Store};
use serde_json::{json, Value};

use crate::machine;

const ADMIN: &str = "bench-admin-token-0123456789";
const STATIONS: usize = 100;
const CLIENTS: usize = 4;

pub async fn run(quick: bool) -> anyhow::Result<()> {
    println!("machine: {}", machine::describe());
    println!(
        "build: {}",
        if cfg!(debug_assertions) {
            "debug (use --release for real figures)"
        } else {
            "release"
        }
    );
    let scale = if quick { 10 } else { 1 };
    // (batch size, readings sent): enough readings that each figure spans at least a second or so.
    let plans = [
        (1usize, 4_000 / scale),
        (100, 100_000 / scale),
        (5_000, 400_000 / scale),
    ];
    let mut backends = vec![("sqlite", TestDatabase::sqlite())];
    match TestDatabase::postgres().await {
        Some(database) => backends.push(("postgres", database)),
        None => println!("(PostgreSQL skipped: CONSENSOR_TEST_POSTGRES_URL is not set)"),
    }
    for (name, http_database) in backends {
        println!();
        println!("backend: {name}");
        println!(
            "{:>7} {:>9} {:>12} {:>14} {:>10} {:>12} {:>10} {:>9}",
            "batch",
            "readings",
            "http rdg/s",
            "prepared/s",
            "http/prep",
            "bulk/s",
            "http/bulk",
            "rss MiB"
        );
        let direct_database = if name == "sqlite" {
            TestDatabase::sqlite()
        } else {
            TestDatabase::postgres().await.context("postgres")?
        };
        let server = BenchServer::start(&http_database.url).await?;
        let direct_store = direct_database.open().await;
        let direct_file = direct_database
            .directory()
            .map(|directory| directory.join("consensor.db"));
        create_network(&direct_store).await?;
        let mut minute_offset = 0i64;
        for (batch, total) in plans {
            let minutes = (total / STATIONS).max(1) as i64;
            let rows = rows(minute_offset, minutes);
            minute_offset += minutes;
            let http = server.send_all(&rows, batch).await?;
            let direct = direct_insert(&direct_store, direct_file.as_deref(), &rows).await?;
            // The bulk baseline writes the same keys one hour later, into the same table.
            let later: Vec<Row> = rows
                .iter()
                .map(|&(s, m, v)| (s, m + 1_000_000, v))
                .collect();
            let bulk = direct_bulk_insert(&direct_store, &later).await?;
            let rate = |d: Duration| rows.len() as f64 / d.as_secs_f64();
            println!(
                "{:>7} {:>9} {:>12.0} {:>14.0} {:>9.2}x {:>12.0} {:>9.2}x {:>9.1}",
                batch,
                rows.len(),
                rate(http),
                rate(direct),
                direct.as_secs_f64() / http.as_secs_f64(),
                rate(bulk),
                bulk.as_secs_f64() / http.as_secs_f64(),
                machine::current_rss_mib().unwrap_or(0.0)
            );
        }
        direct_store.close().await;
        server.stop().await;
        http_database.finish().await;
        direct_database.finish().await;
    }
    println!();
    if let Some(peak) = machine::peak_rss_mib() {
        println!("peak resident memory of the whole run (server and client in one process): {peak:.1} MiB");
    }
    Ok(())
}

/// One reading: (station index, minute, value).
type Row = (usize, i64, f64);

/// Time-major rows, as live stations send them: every station at minute t, then at t + 1.
fn rows(first_minute: i64, minutes: i64) -> Vec<Row> {
    let mut rows = Vec::with_capacity(minutes as usize * STATIONS);
    for minute in first_minute..first_minute + minutes {
        for station in 0..STATIONS {
            let value = 10.0 + (station as f64) / 50.0 + (minute % 60) as f64 / 100.0;
            rows.push((station, minute, value));
        }
    }
    rows
}

/// The first observation time: a day before now, so every reading is in the past.
fn base_ms() -> i64 {
    (chrono::Utc::now().timestamp_millis() / 60_000 - 7 * 24 * 60) * 60_000
}

fn station_key(index: usize) -> String {
    format!("B-{index:03}")
}

async fn create_network(store: &AnyStore) -> anyhow::Result<()> {
    store
        .upsert_area(&NewArea {
            key: "bench".into(),
            name: "Bench".into(),
            interval_ms: 600_000,
        })
        .await?;
    for index in 0..STATIONS {
        store
            .upsert_station(&NewStation {
                key: station_key(index),
                area_key: "bench".into(),
                name: station_key(index),
                lat: None,
                lon: None,
                elevation_m: None,
            })
            .await?;
    }
    Ok(())
}

/// The baseline: the same rows straight into `readings`, one transaction, one prepared statement
/// executed per row. On SQLite through a rusqlite connection of its own to the same file, run on a
/// blocking thread, as the store's writer does (`sqlite_write.rs`): the statement runs in place,
/// with no hop between threads per row. On PostgreSQL through sqlx (which caches the prepared
/// statement on the connection): there every row is a round trip to the server.
async fn direct_insert(
    store: &AnyStore,
    file: Option<&std::path::Path>,
    rows: &[Row],
) -> anyhow::Result<Duration> {
    let base = base_ms();
    match store {
        AnyStore::Sqlite(_) => {
            let file = file
                .context("the SQLite baseline needs the database file")?
                .to_owned();
            // Copied before the clock starts: the blocking thread needs rows of its own.
            let rows = rows.to_vec();
            let began = Instant::now();
            tokio::task::spawn_blocking(move || prepared_rows_sqlite(&file, &rows, base)).await??;
            Ok(began.elapsed())
        }
        AnyStore::Postgres(postgres) => {
            let began = Instant::now();
            let pool = postgres.pool();
            let mut tx = pool.begin().await?;
            sqlx::query(
                "INSERT INTO quantities (key) VALUES ('air_temperature') ON CONFLICT DO NOTHING",
            )
            .execute(&mut *tx)
            .await?;
            let (quantity_id,): (i64,) =
                sqlx::query_as("SELECT id FROM quantities WHERE key = 'air_temperature'")
                    .fetch_one(&mut *tx)
                    .await?;
            let stations: Vec<(i64, String)> =
                sqlx::query_as("SELECT id, key FROM stations ORDER BY key")
                    .fetch_all(&mut *tx)
                    .await?;
            for &(station, minute, value) in rows {
                sqlx::query(
                    "INSERT INTO readings (observed_at_ms, station_id, quantity_id, revision, value, value_as_sent, unit_as_sent, received_at_ms) VALUES ($1, $2, $3, 0, $4, $5, NULL, $6)",
                )
                .bind(base + minute * 60_000)
                .bind(stations[station].0)
                .bind(quantity_id)
                .bind(value)
                .bind(value)
                .bind(base)
                .execute(&mut *tx)
                .await?;
            }
            tx.commit().await?;
            Ok(began.elapsed())
        }
    }
}

/// One transaction, one prepared `INSERT` step per row, on a connection set up as the store's
/// (`synchronous=FULL`, foreign keys on).
fn prepared_rows_sqlite(file: &std::path::Path, rows: &[Row], base: i64) -> anyhow::Result<()> {
    let mut connection = rusqlite::Connection::open(file)?;
    connection.busy_timeout(Duration::from_secs(5))?;
    connection.pragma_update(None, "synchronous", "FULL")?;
    connection.pragma_update(None, "foreign_keys", "ON")?;
    let tx = connection.transaction()?;
    tx.execute(
        "INSERT OR IGNORE INTO quantities (key) VALUES ('air_temperature')",
        [],
    )?;
    let quantity_id: i64 = tx.query_row(
        "SELECT id FROM quantities WHERE key = 'air_temperature'",
        [],
        |row| row.get(0),
    )?;
    let stations: Vec<i64> = tx
        .prepare("SELECT id FROM stations ORDER BY key")?
        .query_map([], |row| row.get(0))?
        .collect::<Result<_, _>>()?;
    {
        let mut insert = tx.prepare(
            "INSERT INTO readings (observed_at_ms, station_id, quantity_id, revision, value, value_as_sent, unit_as_sent, received_at_ms) VALUES (?1, ?2, ?3, 0, ?4, ?4, NULL, ?5)",
        )?;
        for &(station, minute, value) in rows {
            insert.execute(rusqlite::params![
                base + minute * 60_000,
                stations[station],
                quantity_id,
                value,
                base
            ])?;
        }
    }
    tx.commit()?;
    Ok(())
}

/// A second baseline: the same rows as multi-row INSERTs of 1,000 rows each through sqlx, in one
/// transaction: the fastest way through sqlx, and what the PostgreSQL store does after its
/// duplicate check (on SQLite, the prepared baseline above is faster).
async fn direct_bulk_insert(store: &AnyStore, rows: &[Row]) -> anyhow::Result<Duration> {
    let base = base_ms();
    let began = Instant::now();
    macro_rules! bulk {
        ($pool:expr, $db:ty, $ignore_quantity:literal) => {{
            let mut tx = $pool.begin().await?;
            sqlx::query($ignore_quantity).execute(&mut *tx).await?;
            let (quantity_id,): (i64,) =
                sqlx::query_as("SELECT id FROM quantities WHERE key = 'air_temperature'")
                    .fetch_one(&mut *tx)
                    .await?;
            let stations: Vec<(i64, String)> =
                sqlx::query_as("SELECT id, key FROM stations ORDER BY key").fetch_all(&mut *tx).await?;
            for chunk in rows.chunks(1_000) {
                let mut builder = sqlx::QueryBuilder::<$db>::new(
                    "INSERT INTO readings (observed_at_ms, station_id, quantity_id, revision, value, value_as_sent, unit_as_sent, received_at_ms) ",
                );
                builder.push_values(chunk, |mut row, &(station, minute, value)| {
                    row.push_bind(base + minute * 60_000)
                        .push_bind(stations[station].0)
                        .push_bind(quantity_id)
                        .push_bind(0i64)
                        .push_bind(value)
                        .push_bind(value)
                        .push_bind(Option::<String>::None)
                        .push_bind(base);
                });
                builder.build().execute(&mut *tx).await?;
            }
            tx.commit().await?;
        }};
    }
    match store {
        AnyStore::Sqlite(sqlite) => bulk!(
            sqlite.pool(),
            sqlx::Sqlite,
            "INSERT OR IGNORE INTO quantities (key) VALUES ('air_temperature')"
        ),
        AnyStore::Postgres(postgres) => bulk!(
            postgres.pool(),
            sqlx::Postgres,
            "INSERT INTO quantities (key) VALUES ('air_temperature') ON CONFLICT DO NOTHING"
        ),
    }
    Ok(began.elapsed())
}

/// The real server, in this process, on a random loopback port.
struct BenchServer {
    base: String,
    client: reqwest::Client,
    shutdown: tokio::sync::oneshot::Sender<()>,
    task: tokio::task::JoinHandle<anyhow::Result<()>>,
}

impl BenchServer {
    async fn start(database_url: &str) -> anyhow::Result<BenchServer> {
        let env = vec![
            ("CONSENSOR_DATABASE_URL".to_owned(), database_url.to_owned()),
            ("CONSENSOR_ADMIN_TOKEN".to_owned(), ADMIN.to_owned()),
        ];
        let config = Config::load(None, env, &[])?;
        let state = consensor_server::serve::open_state(config, Arc::new(SystemClock)).await?;
        create_network(&state.store).await?;
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await?;
        let base = format!("http://{}", listener.local_addr()?);
        let (shutdown, stop) = tokio::sync::oneshot::channel::<()>();
        let task = tokio::spawn(consensor_server::serve::run(listener, state, async move {
            let _ = stop.await;
        }));
        Ok(BenchServer {
            base,
            client: reqwest::Client::new(),
            shutdown,
            task,
        })
    }

    /// Sends `rows` in batches of `batch` from `CLIENTS` concurrent clients; every batch must be
    /// answered 200 with all of it accepted.
    async fn send_all(&self, rows: &[Row], batch: usize) -> anyhow::Result<Duration> {
        let base = base_ms();
        // Bodies are built before the clock starts: the figure is the server's, not the client's.
        let bodies: Vec<(usize, String)> = rows
            .chunks(batch)
            .map(|chunk| {
                let readings: Vec<Value> = chunk
                    .iter()
                    .map(|&(station, minute, value)| {
                        json!({
                            "station": station_key(station),
                            "quantity": "air_temperature",
                            "value": value,
                            "observed_at": consensor_server::http::rfc3339(base + minute * 60_000),
                        })
                    })
                    .collect();
                (chunk.len(), json!({ "readings": readings }).to_string())
            })
            .collect();
        let bodies = Arc::new(bodies);
        let next = Arc::new(std::sync::atomic::AtomicUsize::new(0));
        let began = Instant::now();
        let mut clients = Vec::new();
        for _ in 0..CLIENTS {
            let bodies = bodies.clone();
            let next = next.clone();
            let client = self.client.clone();
            let url = format!("{}/v1/readings", self.base);
            clients.push(tokio::spawn(async move {
                loop {
                    let index = next.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
                    let Some((count, body)) = bodies.get(index) else {
                        return anyhow::Ok(());
                    };
                    let response = client
                        .post(&url)
                        .bearer_auth(ADMIN)
                        .header("content-type", "application/json")
                        .body(body.clone())
                        .send()
                        .await?;
                    let status = response.status();
                    let answer: Value = response.json().await?;
                    anyhow::ensure!(status.is_success(), "batch refused: {status} {answer}");
                    anyhow::ensure!(
                        answer["accepted"].as_u64() == Some(*count as u64),
                        "not all accepted: {answer}"
                    );
                }
            }));
        }
        for client in clients {
            client.await??;
        }
        Ok(began.elapsed())
    }

    async fn stop(self) {
        let _ = self.shutdown.send(());
        let _ = self.task.await;
    }
}
