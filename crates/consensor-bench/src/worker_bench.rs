//! The worker benchmark: intervals per second computed by the real worker from a database of
//! readings (by default 2000 stations in 40 areas, one reading a minute for 3.5 days: about 10
//! million), against the same decisions made by the core on the same readings held in memory, in the
//! same run. The difference is the cost of storage: loading readings, storing results and records.
//! `tools/bench/pandas_groupby.py` times the equivalent pandas group-by on data of the same shape
//! held in memory (the counterpart of the in-memory line), and `tools/bench/pandas_pipeline.py`
//! the whole job done with pandas from a SQLite file back to it (the counterpart of the worker
//! lines).

use std::sync::Arc;
use std::time::Instant;

use anyhow::Context;
use consensor_core::checks::{
    default_quantities, IntervalInput, IntervalOutcome, IntervalScreen, Judged, JudgedInterval,
    JudgedStation, Judging, Reading, Rules, StationReadings,
};
use consensor_server::config::Config;
use consensor_server::state::SystemClock;
use consensor_server::worker::{run_until_idle, WorkerSettings};
use consensor_store::testing::TestDatabase;
use consensor_store::{NewArea, NewReading, NewStation, Store};

use crate::machine;
use crate::synthetic::SplitMix;

const MINUTE: i64 = 60_000;
const INTERVAL: i64 = 10 * MINUTE;

/// The size of the synthetic network.
#[derive(Debug, Clone, Copy)]
pub struct Shape {
    pub areas: usize,
    pub stations_per_area: usize,
    pub minutes: i64,
}

pub async fn run(shape: Shape, postgres: bool) -> anyhow::Result<()> {
    println!("machine: {}", machine::describe());
    let readings_total = shape.areas * shape.stations_per_area * shape.minutes as usize;
    println!(
        "network: {} areas x {} stations, one air-temperature reading a minute for {} minutes = {} readings; 10-minute intervals",
        shape.areas, shape.stations_per_area, shape.minutes, readings_total
    );
    let start_ms =
        (chrono::Utc::now().timestamp_millis() / INTERVAL - shape.minutes / 10 - 200) * INTERVAL;
    let values = generate(shape);

    // The baseline: the core deciding every interval from memory, each station's readings judged
    // once as the worker does; beside it, each interval screened on its own with its history.
    let began = Instant::now();
    let in_memory_intervals = decide_in_memory(shape, &values, start_ms, false);
    let in_memory = began.elapsed();
    println!(
        "in memory (core only):  {:>8} intervals in {:>7.2} s = {:>9.0} intervals/s",
        in_memory_intervals,
        in_memory.as_secs_f64(),
        in_memory_intervals as f64 / in_memory.as_secs_f64()
    );
    let began = Instant::now();
    let one_by_one_intervals = decide_in_memory(shape, &values, start_ms, true);
    let one_by_one = began.elapsed();
    println!(
        "in memory, one by one:  {:>8} intervals in {:>7.2} s = {:>9.0} intervals/s  (each interval re-judging its history)",
        one_by_one_intervals,
        one_by_one.as_secs_f64(),
        one_by_one_intervals as f64 / one_by_one.as_secs_f64()
    );

    let mut databases = vec![("sqlite", TestDatabase::sqlite())];
    if postgres {
        match TestDatabase::postgres().await {
            Some(database) => databases.push(("postgres", database)),
            None => println!("(PostgreSQL skipped: CONSENSOR_TEST_POSTGRES_URL is not set)"),
        }
    }
    for (name, database) in databases {
        let env = vec![("CONSENSOR_DATABASE_URL".to_owned(), database.url.clone())];
        let config = Config::load(None, env, &[])?;
        let state = consensor_server::serve::open_state(config, Arc::new(SystemClock)).await?;
        let began = Instant::now();
        load(&state.store, shape, &values, start_ms).await?;
        let loading = began.elapsed();
        if name == "postgres" {
            // Readings are never updated, so in a running deployment autovacuum marks their pages
            // all-visible soon after they are written (PostgreSQL 13 and later also vacuum
            // insert-only tables), and the worker's read of older readings is an index-only scan.
            // Right after a bulk load nothing is marked yet; vacuum here, as autovacuum would, so
            // that the recompute is measured on the steady state, and say what it took.
            let began = Instant::now();
            vacuum_postgres(&database.url).await?;
            println!(
                "postgres: VACUUM (ANALYZE) readings after the load took {:.1} s",
                began.elapsed().as_secs_f64()
            );
        }
        let pending = state.store.count_pending_buckets().await?;
        let settings = WorkerSettings {
            claim_batch: 256,
            ..WorkerSettings::default()
        };
        let began = Instant::now();
        let computed = run_until_idle(&state, &settings, chrono::Utc::now().timestamp_millis())
            .await
            .context("worker")?;
        let computing = began.elapsed();
        anyhow::ensure!(
            computed as u64 == pending,
            "computed {computed} of {pending} pending intervals"
        );
        println!(
            "{name:<8} worker:        {:>8} intervals in {:>7.2} s = {:>9.0} intervals/s  ({:.2}x the in-memory time; loading the readings took {:.1} s, {:.0} readings/s)",
            computed,
            computing.as_secs_f64(),
            computed as f64 / computing.as_secs_f64(),
            computing.as_secs_f64() / in_memory.as_secs_f64(),
            loading.as_secs_f64(),
            readings_total as f64 / loading.as_secs_f64()
        );
        state.store.close().await;
        database.finish().await;
    }
    let live_shape = Shape {
        areas: if quick_live(shape) { 20 } else { 200 },
        stations_per_area: 50,
        minutes: 180,
    };
    let live_minutes = if quick_live(shape) { 5 } else { 15 };
    let mut live_databases = vec![("sqlite", TestDatabase::sqlite())];
    if postgres {
        if let Some(database) = TestDatabase::postgres().await {
            live_databases.push(("postgres", database));
        }
    }
    for (name, database) in live_databases {
        live(name, &database, live_shape, live_minutes).await?;
        database.finish().await;
    }
    if let Some(peak) = machine::peak_rss_mib() {
        println!("peak resident memory: {peak:.1} MiB");
    }
    Ok(())
}

/// values[area][station][minute]: a shared diurnal cycle per area plus a station offset and noise.
fn generate(shape: Shape) -> Vec<Vec<Vec<f64>>> {
    let mut rng = SplitMix::new(0x0DA7A);
    (0..shape.areas)
        .map(|area| {
            (0..shape.stations_per_area)
                .map(|_| {
                    let offset = (rng.unit() - 0.5) * 0.8;
                    (0..shape.minutes)
                        .map(|minute| {
                            let day = (minute % 1440) as f64 / 1440.0;
                            let diurnal = 6.0 * (std::f64::consts::TAU * (day - 0.375)).sin();
                            10.0 + area as f64 * 0.1 + diurnal + offset + (rng.unit() - 0.5) * 0.3
                        })
                        .collect()
                })
                .collect()
        })
        .collect()
}

/// The core deciding every interval from memory, each area's readings of the whole span in hand.
/// `one_by_one`: each interval screened on its own with its history (what deciding intervals one at
/// a time costs); otherwise each station is judged once and each interval decided on its share, as
/// the worker does with a run of intervals. Both give the same outcomes (consensor-core's `batching`
/// test).
fn decide_in_memory(
    shape: Shape,
    values: &[Vec<Vec<f64>>],
    start_ms: i64,
    one_by_one: bool,
) -> usize {
    let spec = default_quantities()
        .into_iter()
        .find(|q| q.key == "air_temperature")
        .expect("built-in quantity");
    let rules = Rules::default();
    let judging = Judging {
        quantity: &spec,
        rules: &rules,
        interval_ms: INTERVAL,
        overturned: &[],
    };
    let mut screen = IntervalScreen::default();
    let mut outcome = IntervalOutcome::default();
    let mut intervals = 0;
    let end_ms = start_ms + shape.minutes * MINUTE;
    for area_values in values {
        let series: Vec<Vec<Reading>> = area_values
            .iter()
            .enumerate()
            .map(|(station, station_values)| {
                station_values
                    .iter()
                    .enumerate()
                    .map(|(minute, &value)| Reading {
                        id: (station * 1_000_000 + minute) as u64,
                        observed_at_ms: start_ms + minute as i64 * MINUTE,
                        value: Some(value),
                        value_as_sent: Some(value),
                    })
                    .collect()
            })
            .collect();
        let mut verdicts: Vec<Vec<Judged>> = vec![Vec::new(); series.len()];
        if !one_by_one {
            for (readings, judged) in series.iter().zip(&mut verdicts) {
                screen.judge(&judging, readings, start_ms, end_ms, judged);
            }
        }
        for first_minute in (0..shape.minutes).step_by(10) {
            let (from, to) = (
                start_ms + first_minute * MINUTE,
                start_ms + (first_minute + 10) * MINUTE,
            );
            let slice = |readings: &[Reading], from_ms: i64| {
                readings.partition_point(|r| r.observed_at_ms < from_ms)
                    ..readings.partition_point(|r| r.observed_at_ms < to)
            };
            if one_by_one {
                let stations: Vec<StationReadings<'_>> = series
                    .iter()
                    .enumerate()
                    .map(|(i, readings)| StationReadings {
                        station: i as u32,
                        readings: &readings[slice(readings, rules.chain_start(from))],
                    })
                    .collect();
                screen.screen(
                    &IntervalInput {
                        quantity: &spec,
                        rules: &rules,
                        start_ms: from,
                        end_ms: to,
                        stations: &stations,
                        overturned: &[],
                    },
                    &mut outcome,
                );
            } else {
                let stations: Vec<JudgedStation<'_>> = series
                    .iter()
                    .zip(&verdicts)
                    .enumerate()
                    .map(|(i, (readings, judged))| {
                        let range = slice(readings, from);
                        JudgedStation {
                            station: i as u32,
                            readings: &readings[range.clone()],
                            judged: &judged[range],
                        }
                    })
                    .collect();
                screen.decide(
                    &JudgedInterval {
                        judging,
                        start_ms: from,
                        end_ms: to,
                        stations: &stations,
                    },
                    &mut outcome,
                );
            }
            intervals += 1;
        }
    }
    intervals
}

async fn vacuum_postgres(url: &str) -> anyhow::Result<()> {
    use sqlx::Connection;
    let mut connection = sqlx::PgConnection::connect(url).await?;
    sqlx::raw_sql("VACUUM (ANALYZE) readings")
        .execute(&mut connection)
        .await?;
    connection.close().await?;
    Ok(())
}

async fn load(
    store: &consensor_store::AnyStore,
    shape: Shape,
    values: &[Vec<Vec<f64>>],
    start_ms: i64,
) -> anyhow::Result<()> {
    create_network(store, shape).await?;
    // Time-major batches of ten minutes of the whole network, as live stations would send them.
    for first_minute in (0..shape.minutes).step_by(10) {
        let minutes = first_minute..(first_minute + 10).min(shape.minutes);
        let batch = readings_of(values, start_ms, minutes, |_| true);
        store
            .insert_batch(&batch, start_ms + shape.minutes * MINUTE)
            .await?;
    }
    Ok(())
}

/// The areas `a00`, `a01`, … with their stations `s00-000`, ….
async fn create_network(store: &consensor_store::AnyStore, shape: Shape) -> anyhow::Result<()> {
    for area in 0..shape.areas {
        store
            .upsert_area(&NewArea {
                key: format!("a{area:02}"),
                name: format!("Area {area}"),
                interval_ms: INTERVAL,
            })
            .await?;
        for station in 0..shape.stations_per_area {
            store
                .upsert_station(&NewStation {
                    key: format!("s{area:02}-{station:03}"),
                    area_key: format!("a{area:02}"),
                    name: format!("Station {area}-{station}"),
                    lat: None,
                    lon: None,
                    elevation_m: None,
                })
                .await?;
        }
    }
    Ok(())
}

/// The readings of the given minutes from every station `keep(global station index)` accepts.
fn readings_of(
    values: &[Vec<Vec<f64>>],
    start_ms: i64,
    minutes: std::ops::Range<i64>,
    keep: impl Fn(usize) -> bool,
) -> Vec<NewReading> {
    let mut batch = Vec::new();
    for minute in minutes {
        let mut index = 0;
        for (area, area_values) in values.iter().enumerate() {
            for (station, station_values) in area_values.iter().enumerate() {
                if keep(index) {
                    let value = station_values[minute as usize];
                    batch.push(NewReading {
                        station: format!("s{area:02}-{station:03}"),
                        quantity: "air_temperature".into(),
                        observed_at_ms: start_ms + minute * MINUTE,
                        value: Some(value),
                        value_as_sent: Some(value),
                        unit_as_sent: None,
                    });
                }
                index += 1;
            }
        }
    }
    batch
}

fn quick_live(shape: Shape) -> bool {
    shape.areas < 40
}

/// Live operation: every station reports once a minute, spread over the minute in 20 batches three
/// seconds apart, on a simulated clock; the worker steps after each batch, as its poll would. The
/// worker's busy time per simulated minute is the share of one core it needs to keep up; three
/// hours of history are stored and computed first, so each load reads what it would in steady state.
async fn live(
    name: &str,
    database: &TestDatabase,
    shape: Shape,
    live_minutes: i64,
) -> anyhow::Result<()> {
    const BATCHES_PER_MINUTE: i64 = 20;
    let env = vec![("CONSENSOR_DATABASE_URL".to_owned(), database.url.clone())];
    let config = Config::load(None, env, &[])?;
    let state = consensor_server::serve::open_state(config, Arc::new(SystemClock)).await?;
    let history = shape.minutes;
    let values = generate(Shape {
        minutes: history + live_minutes,
        ..shape
    });
    let start_ms = (chrono::Utc::now().timestamp_millis() / 3_600_000 - 48) * 3_600_000;
    create_network(&state.store, shape).await?;
    for first_minute in (0..history).step_by(10) {
        let batch = readings_of(&values, start_ms, first_minute..first_minute + 10, |_| true);
        state
            .store
            .insert_batch(&batch, start_ms + history * MINUTE)
            .await?;
    }
    let settings = WorkerSettings {
        claim_batch: 256,
        ..WorkerSettings::default()
    };
    let backlog = WorkerSettings {
        open_interval_refresh: std::time::Duration::ZERO,
        settle: std::time::Duration::ZERO,
        ..settings.clone()
    };
    run_until_idle(&state, &backlog, start_ms + history * MINUTE).await?;

    let stations = shape.areas * shape.stations_per_area;
    let (mut busy, mut computed, mut most_pending) = (std::time::Duration::ZERO, 0, 0);
    for minute in history..history + live_minutes {
        for slot in 0..BATCHES_PER_MINUTE {
            let now_ms = start_ms + minute * MINUTE + slot * 3_000 + 1_000;
            let batch = readings_of(&values, start_ms, minute..minute + 1, |index| {
                index as i64 % BATCHES_PER_MINUTE == slot
            });
            state.store.insert_batch(&batch, now_ms).await?;
            let began = Instant::now();
            computed += run_until_idle(&state, &settings, now_ms).await?;
            busy += began.elapsed();
        }
        most_pending = most_pending.max(state.store.count_pending_buckets().await?);
    }
    println!(
        "{name:<8} live: {stations} stations x 1 reading/min, {live_minutes} simulated minutes: worker busy {:.2} s per minute = {:.1} % of one core; {} intervals computed ({:.1} per area per minute); at most {} intervals pending at a minute's end (the {} open ones held back for the {} s refresh)",
        busy.as_secs_f64() / live_minutes as f64,
        100.0 * busy.as_secs_f64() / (live_minutes as f64 * 60.0),
        computed,
        computed as f64 / (shape.areas as f64 * live_minutes as f64),
        most_pending,
        shape.areas,
        settings.open_interval_refresh.as_secs()
    );
    state.store.close().await;
    Ok(())
}
