//! The demo scenario on a real SQLite file: generated, fed through the store, computed by the real
//! worker, with a late delivery computed again. Every planted fault must be found by the rule it
//! was planted for, the series with nothing planted must stay almost untouched, the drifting
//! humidity sensor must show a positive drift, and the late readings must make new revisions.
//! These are demo data: the checks are about the faults being found, not about reference values.

mod common;

use std::sync::Arc;

use common::TestClock;
use consensor_core::checks::Rule;
use consensor_core::stats::theil_sen;
use consensor_server::demo::generator::HUMIDITY_DRIFT_PER_DAY;
use consensor_server::demo::{
    self, Expectation, FaultKind, Quantity, Scenario, DAY_MS, INTERVAL_MS,
};
use consensor_store::testing::TestDatabase;
use consensor_store::{SetAsideFilter, Store};

/// 2026-06-03T00:00:00Z: the span of two days before it holds two whole local afternoons, two
/// mornings and two evenings, so that every planted fault shows.
const END_MS: i64 = 1_780_444_800_000;

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_planted_fault_is_found_by_its_rule() {
    let database = TestDatabase::sqlite();
    let config = demo::demo_config(&database.url, None, Vec::new()).unwrap();
    let clock = Arc::new(TestClock::at(END_MS + 60_000));
    let state = consensor_server::serve::open_state(config, clock.clone())
        .await
        .unwrap();
    let scenario = Scenario::new(demo::DEFAULT_SEED, 2, END_MS);
    let report = demo::load(&state, &scenario, |line| eprintln!("{line}"))
        .await
        .unwrap();
    let store = state.store.clone();
    assert_eq!(report.readings, store.count_readings().await.unwrap());
    assert_eq!(store.count_pending_buckets().await.unwrap(), 0);

    // Each fault with a rule: its stretch holds records of that rule.
    let findings = demo::findings(&state, &scenario).await.unwrap();
    assert_eq!(findings.len(), scenario.faults.len());
    for finding in &findings {
        let fault = &finding.fault;
        assert!(finding.found(), "not found: {fault:?}\n{finding:?}");
        if let Expectation::SetAside(rule) = fault.expected {
            let caught = finding.set_aside.get(&rule).copied().unwrap_or(0);
            let least = match fault.kind {
                // All 7 hours of -999: one record each.
                FaultKind::MissingCode => 7 * 60,
                // 6 hours stuck; flat_line judges a reading once its 60-minute window holds only
                // repeats, from the 60th repeat on: 360 − 59 readings.
                FaultKind::Stuck => 360 - 59,
                // Every heated minute is a jump the area does not share.
                FaultKind::Tampering => 4,
                // At least an hour of each afternoon: the excess passes 1.75 °C (3.5 spreads at
                // the 0.5 °C floor) for about 3 of its 5 hours.
                FaultKind::AfternoonSun => 60,
                // At least an hour a day of fast change (two days in the span).
                FaultKind::ClockBehind => 2 * 60,
                FaultKind::Drift | FaultKind::Late => 0,
            };
            assert!(
                caught >= least,
                "{} {:?}: {caught} records of {}, expected at least {least}",
                fault.station,
                fault.kind,
                rule.as_str()
            );
        }
    }

    // The missing-data code is caught by nothing but its own rule, and the stuck stretch mostly by
    // flat_line (its first hour may drift away from the area and be far_from_consensus instead).
    let missing = findings
        .iter()
        .find(|f| f.fault.kind == FaultKind::MissingCode)
        .unwrap();
    assert_eq!(missing.set_aside.len(), 1, "{:?}", missing.set_aside);

    // Series with nothing planted: at most 1 reading in 5,000 set aside (the generator keeps their
    // sensors within the area's consensus; what little is set aside is noise reaching a limit).
    let totals = demo::totals(&state, &scenario).await.unwrap();
    assert!(totals.clean_readings > 300_000, "{totals:?}");
    assert!(
        totals.clean_set_aside * 5_000 <= totals.clean_readings,
        "clean series: {} of {} set aside; worst {:?}",
        totals.clean_set_aside,
        totals.clean_readings,
        totals.worst_clean
    );

    // The drifting humidity sensor: the Theil–Sen slope of its residual against the area median,
    // computed here from the stored residuals, is positive and near the planted 1.5 %/day.
    let residuals = store
        .station_residuals(
            "OF-11",
            Quantity::RelativeHumidity.key(),
            scenario.start_ms,
            scenario.end_ms,
        )
        .await
        .unwrap();
    assert!(residuals.len() >= 250, "{} residuals", residuals.len());
    let days: Vec<f64> = residuals
        .iter()
        .map(|r| (r.bucket_start_ms - scenario.start_ms) as f64 / DAY_MS as f64)
        .collect();
    let differences: Vec<f64> = residuals
        .iter()
        .map(|r| r.station_value - r.area_median)
        .collect();
    let fit = theil_sen(&days, &differences, 0.95).unwrap();
    assert!(fit.slope_low > 0.0, "{fit:?}");
    assert!(
        (fit.line.slope - HUMIDITY_DRIFT_PER_DAY).abs() < 0.5,
        "drift {} %/day, planted {HUMIDITY_DRIFT_PER_DAY}",
        fit.line.slope
    );
    // A clean humidity sensor of the same area shows no such drift.
    let clean = store
        .station_residuals(
            "OF-02",
            Quantity::RelativeHumidity.key(),
            scenario.start_ms,
            scenario.end_ms,
        )
        .await
        .unwrap();
    let clean_fit = theil_sen(
        &clean
            .iter()
            .map(|r| (r.bucket_start_ms - scenario.start_ms) as f64 / DAY_MS as f64)
            .collect::<Vec<_>>(),
        &clean
            .iter()
            .map(|r| r.station_value - r.area_median)
            .collect::<Vec<_>>(),
        0.95,
    )
    .unwrap();
    assert!(clean_fit.line.slope.abs() < 0.5, "{clean_fit:?}");

    // The late readings: every interval of VB-04's area they fall in is at revision 2, for every
    // quantity VB-04 measures, and revision 1 (computed without them) stays readable.
    let late = scenario
        .faults
        .iter()
        .find(|f| f.kind == FaultKind::Late)
        .unwrap();
    let vb04 = scenario.station("VB-04").unwrap();
    let first_late_interval = late.from_ms.div_euclid(INTERVAL_MS) * INTERVAL_MS;
    for quantity in &vb04.quantities {
        let rows = store
            .series(
                "velloran-basin",
                quantity.key(),
                first_late_interval,
                late.to_ms,
            )
            .await
            .unwrap();
        assert_eq!(
            rows.len(),
            18,
            "{}: 3 hours of 10-minute intervals",
            quantity.key()
        );
        assert!(
            rows.iter().all(|row| row.revision == 2),
            "{}: {:?}",
            quantity.key(),
            rows.iter().map(|r| r.revision).collect::<Vec<_>>()
        );
        let before = store
            .result_revision(
                "velloran-basin",
                quantity.key(),
                first_late_interval,
                Some(1),
            )
            .await
            .unwrap()
            .unwrap();
        let after = &rows[0];
        assert_eq!(
            after.point.stations_used + after.point.stations_set_aside,
            before.point.stations_used + before.point.stations_set_aside + 1,
            "{}: revision 2 counts VB-04, revision 1 did not",
            quantity.key()
        );
    }
    // The intervals before the late stretch were computed once.
    let earlier = store
        .series(
            "velloran-basin",
            "air_temperature",
            scenario.start_ms,
            first_late_interval,
        )
        .await
        .unwrap();
    assert!(earlier.iter().all(|row| row.revision == 1));

    // The set-aside records explain themselves: the tampering's reason names the jump and its limit.
    let tampering = findings
        .iter()
        .find(|f| f.fault.kind == FaultKind::Tampering)
        .unwrap();
    let records = store
        .list_set_aside(
            &SetAsideFilter {
                station: Some("VB-09".into()),
                quantity: Some("air_temperature".into()),
                from_ms: Some(tampering.fault.from_ms),
                to_ms: Some(tampering.fault.to_ms),
                ..SetAsideFilter::default()
            },
            10,
            None,
        )
        .await
        .unwrap()
        .items;
    assert_eq!(records.len(), 4);
    assert!(records.iter().all(|r| r.rule == Rule::Step
        && r.reason.contains("changed by")
        && r.reason.contains("limit")));

    state.store.close().await;
    database.finish().await;
}
