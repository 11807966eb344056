//! The consensus worker's step, `run_once`, on a real database: readings stored, intervals computed,
//! results stored as revisions with their set-aside lists; late data and an overturn make new
//! revisions. Expected Points come from numpy/scipy/statsmodels on the same series
//! (`tools/reference/worker_scenario.py`: `np.median`, `np.mean`, `scipy.stats.median_abs_deviation`,
//! `binom.cdf` for the interval, statsmodels `HuberT(t=1.345).weights` with the scale fixed).

mod common;

use std::sync::Arc;

use common::{TestClock, T0_MS};
use consensor_core::checks::{Rule, Status};
use consensor_server::config::Config;
use consensor_server::worker::{run_once, run_until_idle, WorkerSettings};
use consensor_store::testing::TestDatabase;
use consensor_store::{NewReading, ReviewDecision, SetAsideFilter, Store};

on_both_backends!(
    worker_decides_revises_and_honours_overturns,
    neighbouring_intervals_decided_together_match_one_at_a_time,
    an_ended_interval_is_computed_once_its_marks_have_settled,
    the_worker_loop_gives_way_to_an_ingest_burst_for_a_bounded_time
);

const MINUTE: i64 = 60_000;

fn wiggle(minute: i64) -> f64 {
    0.1 * minute.rem_euclid(3) as f64
}

fn close(got: Option<f64>, expected: f64, what: &str) {
    let got = got.unwrap_or_else(|| panic!("{what} missing"));
    assert!(
        (got - expected).abs() < 1e-9,
        "{what}: got {got}, expected {expected}"
    );
}

async fn worker_decides_revises_and_honours_overturns(database: TestDatabase) {
    let clock = Arc::new(TestClock::at(T0_MS + 3_600_000));
    let state = open_with_area(
        &database,
        clock.clone(),
        "west-fields",
        &["W-0", "W-1", "W-2", "W-3", "W-4", "W-5", "W-6"],
    )
    .await;
    let store = state.store.clone();
    // Seventy minutes of history and the interval [T0, T0 + 10 min), one reading a minute:
    // W-1 sends the missing-data code -999 at minutes 2 and 5, W-2 is stuck at 17.3, W-3 reads
    // 4.4 °C above the others (a sensor in the sun), the rest vary by the wiggle.
    let bases = [
        ("W-0", 15.0),
        ("W-1", 15.2),
        ("W-3", 19.4),
        ("W-4", 15.1),
        ("W-5", 14.9),
    ];
    let mut readings = Vec::new();
    for minute in -70..10 {
        for (station, base) in bases {
            let value = if station == "W-1" && (minute == 2 || minute == 5) {
                -999.0
            } else {
                base + wiggle(minute)
            };
            readings.push(reading(station, minute, value));
        }
        readings.push(reading("W-2", minute, 17.3));
    }
    store
        .insert_batch(&readings, T0_MS + 3_600_000)
        .await
        .unwrap();
    let settings = WorkerSettings {
        claim_batch: 3,
        settle: std::time::Duration::ZERO,
        ..WorkerSettings::default()
    };
    let computed = run_until_idle(&state, &settings, clock_now(&clock))
        .await
        .unwrap();
    // Eight 10-minute intervals hold readings (minutes −70 … 9).
    assert_eq!(computed, 8);
    assert_eq!(store.count_pending_buckets().await.unwrap(), 0);

    let first = store
        .latest("west-fields", "air_temperature")
        .await
        .unwrap()
        .expect("a result");
    assert_eq!((first.start_ms, first.revision), (T0_MS, 1));
    let p = first.point;
    // Cross-station: W-3's value 19.5 scores 8.6 > 3.5; W-2 has no value (all flat_line).
    assert_eq!(
        (p.status, p.stations_used, p.stations_set_aside),
        (Status::Ok, 4, 2)
    );
    close(p.median, 15.149999999999999, "median");
    close(p.median_low, 15.1, "median_low");
    close(p.median_high, 15.2, "median_high");
    close(p.mean, 15.1375, "mean");
    close(p.mad, 0.07500000000000107, "mad");
    close(p.spread, 0.11119516638792173, "spread");
    close(p.huber, 15.1375, "huber");
    assert_eq!(
        (p.ci95_low, p.ci95_high),
        (None, None),
        "n = 4 is too few for a 95 % interval"
    );
    close(p.mean_all, 16.216666666666665, "mean_all");

    let in_interval = SetAsideFilter {
        area: Some("west-fields".into()),
        from_ms: Some(T0_MS),
        to_ms: Some(T0_MS + 10 * MINUTE),
        ..SetAsideFilter::default()
    };
    let listed = store
        .list_set_aside(&in_interval, 1000, None)
        .await
        .unwrap()
        .items;
    let count = |station: &str, rule: Rule| {
        listed
            .iter()
            .filter(|r| r.station == station && r.rule == rule)
            .count()
    };
    assert_eq!(count("W-1", Rule::MissingCode), 2);
    assert_eq!(count("W-2", Rule::FlatLine), 10);
    assert_eq!(count("W-3", Rule::FarFromConsensus), 10);
    assert_eq!(listed.len(), 22);
    let sun = listed.iter().find(|r| r.station == "W-3").unwrap();
    assert!((sun.score.unwrap() - 8.600000000000001).abs() < 1e-9);
    assert!(
        sun.reason.contains("19.5 Cel") && sun.reason.contains("8.6 spreads above"),
        "{}",
        sun.reason
    );

    // A late reading from W-6: revision 2, and revision 1 stays readable.
    store
        .insert_batch(&[reading("W-6", 5, 15.6)], T0_MS + 3_600_000)
        .await
        .unwrap();
    assert_eq!(
        run_once(&state, &settings, clock_now(&clock))
            .await
            .unwrap()
            .computed,
        1
    );
    let second = store
        .latest("west-fields", "air_temperature")
        .await
        .unwrap()
        .unwrap();
    assert_eq!(second.revision, 2);
    close(second.point.median, 15.2, "median after the late reading");
    close(
        second.point.mean,
        15.229999999999999,
        "mean after the late reading",
    );
    close(
        second.point.huber,
        15.187352499597253,
        "huber after the late reading",
    );
    let again = store
        .result_revision("west-fields", "air_temperature", T0_MS, Some(1))
        .await
        .unwrap()
        .unwrap();
    assert_eq!(again.point, first.point);

    // An operator overturns W-3's set-aside: the interval is recomputed and W-3 is used.
    store
        .review_reading(
            sun.reading_id,
            ReviewDecision::Overturn,
            Some("shaded since Tuesday"),
            "tok_test",
            T0_MS + 3_600_000,
        )
        .await
        .unwrap();
    assert_eq!(
        run_until_idle(&state, &settings, clock_now(&clock))
            .await
            .unwrap(),
        1
    );
    let third = store
        .latest("west-fields", "air_temperature")
        .await
        .unwrap()
        .unwrap();
    assert_eq!((third.revision, third.point.stations_used), (3, 6));
    close(third.point.median, 15.225, "median with W-3");
    close(third.point.mean, 15.941666666666665, "mean with W-3");
    close(third.point.huber, 15.299793499436147, "huber with W-3");
    close(third.point.ci95_low, 15.0, "ci95_low (n = 6: r = 1)");
    close(third.point.ci95_high, 19.5, "ci95_high");
    state.store.close().await;
    database.finish().await;
}

/// Opens the database as the server would and adds one area of ten-minute intervals with the
/// given stations.
async fn open_with_area(
    database: &TestDatabase,
    clock: Arc<TestClock>,
    area: &str,
    stations: &[&str],
) -> consensor_server::state::AppState {
    let env = vec![("CONSENSOR_DATABASE_URL".to_owned(), database.url.clone())];
    let config = Config::load(None, env, &[]).unwrap();
    let state = consensor_server::serve::open_state(config, clock)
        .await
        .unwrap();
    let stations: Vec<String> = stations.iter().map(|s| (*s).to_owned()).collect();
    common::add_area(&state.store, area, 600_000, &stations).await;
    state
}

/// With the configured default (`worker.settle_seconds`, 1 s), an interval that has ended waits
/// until no batch has marked it for a second, so that a burst re-marking it is computed once it
/// has passed; a batch arriving meanwhile restarts the wait.
async fn an_ended_interval_is_computed_once_its_marks_have_settled(database: TestDatabase) {
    let clock = Arc::new(TestClock::at(T0_MS + 3_600_000));
    let state = open_with_area(&database, clock.clone(), "west-fields", &["W-0", "W-1"]).await;
    let settings = state.config.worker.clone();
    assert_eq!(settings.settle, std::time::Duration::from_secs(1));
    let now = T0_MS + 3_600_000;
    let step = |at_ms: i64| {
        clock.set_ms(at_ms);
        let (state, settings) = (state.clone(), settings.clone());
        async move { run_once(&state, &settings, at_ms).await.unwrap().computed }
    };
    state
        .store
        .insert_batch(&[reading("W-0", 1, 15.0)], now)
        .await
        .unwrap();
    assert_eq!(step(now + 400).await, 0, "marked 0.4 s ago");
    state
        .store
        .insert_batch(&[reading("W-1", 2, 15.2)], now + 600)
        .await
        .unwrap();
    assert_eq!(step(now + 1_200).await, 0, "marked again 0.6 s ago");
    assert_eq!(step(now + 1_600).await, 1, "quiet for 1 s");
    let latest = state
        .store
        .latest("west-fields", "air_temperature")
        .await
        .unwrap()
        .expect("computed");
    // Both readings were in: numpy 2.4.6 `np.median([15.0, 15.2])` = 15.1.
    assert!((latest.point.median.unwrap() - 15.1).abs() < 1e-12);
    assert_eq!(state.store.count_pending_buckets().await.unwrap(), 0);
}

/// The worker loop (`worker::run`) starts no step while more readings than
/// `yield_above_readings` are in this process's ingest requests, computes as soon as they have been
/// answered, and holds back no longer than `yield_at_most` in a row.
async fn the_worker_loop_gives_way_to_an_ingest_burst_for_a_bounded_time(database: TestDatabase) {
    let now = T0_MS + 3_600_000;
    let clock = Arc::new(TestClock::at(now));
    let state = open_with_area(&database, clock.clone(), "west-fields", &["W-0"]).await;
    let pending = |state: &consensor_server::state::AppState| {
        let store = state.store.clone();
        async move { store.count_pending_buckets().await.unwrap() }
    };
    let until_computed = |state: consensor_server::state::AppState| async move {
        let deadline = std::time::Instant::now() + std::time::Duration::from_secs(10);
        while pending(&state).await > 0 {
            assert!(std::time::Instant::now() < deadline, "never computed");
            tokio::time::sleep(std::time::Duration::from_millis(20)).await;
        }
    };
    for (minute, at_most_ms, release) in [(1, 60_000, true), (12, 300, false)] {
        let settings = WorkerSettings {
            settle: std::time::Duration::ZERO,
            poll_interval: std::time::Duration::from_millis(20),
            yield_above_readings: 10_000,
            yield_at_most: std::time::Duration::from_millis(at_most_ms),
            ..state.config.worker.clone()
        };
        state
            .store
            .insert_batch(&[reading("W-0", minute, 15.0)], now)
            .await
            .unwrap();
        assert_eq!(pending(&state).await, 1);
        let burst = state.ingest.enter(10_001);
        let (stop_tx, stop_rx) = tokio::sync::watch::channel(false);
        let worker = tokio::spawn(consensor_server::worker::run(
            state.clone(),
            settings,
            stop_rx,
        ));
        tokio::time::sleep(std::time::Duration::from_millis(150)).await;
        assert_eq!(
            pending(&state).await,
            1,
            "held back while the burst is in flight"
        );
        if release {
            // The burst is answered: the interval is computed long before the 60 s bound.
            drop(burst);
            until_computed(state.clone()).await;
        } else {
            // The burst goes on, but 0.3 s is the most the worker holds back.
            until_computed(state.clone()).await;
            drop(burst);
        }
        stop_tx.send(true).unwrap();
        worker.await.unwrap();
    }
    state.store.close().await;
}

fn clock_now(clock: &TestClock) -> i64 {
    use consensor_server::state::Clock;
    clock.now_ms()
}

fn reading(station: &str, minute: i64, value: f64) -> NewReading {
    NewReading {
        station: station.into(),
        quantity: "air_temperature".into(),
        observed_at_ms: T0_MS + minute * MINUTE,
        value: Some(value),
        value_as_sent: Some(value),
        unit_as_sent: None,
    }
}

/// The worker loads a run of neighbouring intervals with one query and decides each from its own
/// window of it. That must give exactly what deciding them one claim at a time gives: the same
/// Points and the same set-aside readings with the same reasons. (An equivalence of two paths of
/// our own; the values themselves are checked against the references in the test above.)
async fn neighbouring_intervals_decided_together_match_one_at_a_time(database: TestDatabase) {
    let one_at_a_time_database = TestDatabase::sqlite();
    let mut answers = Vec::new();
    for (database, claim_batch) in [(&database, 256), (&one_at_a_time_database, 1)] {
        let clock = Arc::new(TestClock::at(T0_MS + 24 * 3_600_000));
        let stations = ["E-0", "E-1", "E-2", "E-3", "E-4", "E-5"];
        let state = open_with_area(database, clock.clone(), "east-rise", &stations).await;
        let store = state.store.clone();
        // Seven hours of one-minute readings with the usual faults: E-1 sends -999 now and then,
        // E-2 is stuck for two hours, E-3 reads 2.5 degrees high for an hour and E-4 jumps by 9
        // degrees for one minute; E-5 is silent for the first three hours.
        let mut readings = Vec::new();
        for minute in 0..420 {
            for (index, station) in stations.iter().enumerate() {
                let mut value = 12.0 + 0.01 * minute as f64 + 0.2 * index as f64 + wiggle(minute);
                match *station {
                    "E-1" if minute % 37 == 5 => value = -999.0,
                    "E-2" if (120..240).contains(&minute) => value = 13.7,
                    "E-3" if (200..260).contains(&minute) => value += 2.5,
                    "E-4" if minute == 300 => value += 9.0,
                    "E-5" if minute < 180 => continue,
                    _ => {}
                }
                readings.push(reading(station, minute, value));
            }
        }
        for chunk in readings.chunks(500) {
            store.insert_batch(chunk, T0_MS).await.unwrap();
        }
        let settings = WorkerSettings {
            claim_batch,
            settle: std::time::Duration::ZERO,
            ..WorkerSettings::default()
        };
        let computed = run_until_idle(&state, &settings, clock_now(&clock))
            .await
            .unwrap();
        assert_eq!(computed, 42, "seven hours of ten-minute intervals");
        let series = store
            .series("east-rise", "air_temperature", T0_MS, T0_MS + 420 * MINUTE)
            .await
            .unwrap();
        let filter = SetAsideFilter {
            area: Some("east-rise".into()),
            ..SetAsideFilter::default()
        };
        let set_aside: Vec<_> = store
            .list_set_aside(&filter, 1000, None)
            .await
            .unwrap()
            .items
            .into_iter()
            .map(|row| {
                (
                    row.reading_id,
                    row.station,
                    row.rule,
                    row.reason,
                    row.bucket_start_ms,
                )
            })
            .collect();
        assert!(
            [
                Rule::MissingCode,
                Rule::FlatLine,
                Rule::FarFromConsensus,
                Rule::Step
            ]
            .iter()
            .all(|rule| set_aside.iter().any(|row| row.2 == *rule)),
            "every planted fault is set aside by its rule: {set_aside:?}"
        );
        answers.push((series, set_aside));
        state.store.close().await;
    }
    assert_eq!(answers[0].0.len(), 42);
    assert_eq!(answers[0], answers[1]);
    one_at_a_time_database.finish().await;
    database.finish().await;
}
