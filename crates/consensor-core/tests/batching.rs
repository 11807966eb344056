//! The decision of an interval must not depend on how a caller batches intervals: deciding each
//! interval on its own ([`IntervalScreen::screen`]), judging every station's readings once for a run
//! of intervals and deciding each on its share ([`IntervalScreen::judge`] + [`IntervalScreen::decide`]),
//! and handing in more history than [`Rules::chain_start`] asks for must all give the same outcome.
//! This is a property of our own design (API.md defines the rules per interval; the worker batches),
//! checked here on random stations with planted faults: missing codes, nulls, stuck stretches, jumps,
//! gaps and operator overturns.

use consensor_core::checks::{
    default_quantities, IntervalInput, IntervalOutcome, IntervalScreen, Judged, JudgedInterval,
    JudgedStation, Judging, QuantitySpec, Reading, Rules, StationReadings,
};
use proptest::prelude::*;

fn quantity(key: &str) -> QuantitySpec {
    default_quantities()
        .into_iter()
        .find(|q| q.key == key)
        .unwrap()
}

#[path = "../src/checks/planted_faults.rs"]
mod planted_faults;
use planted_faults::{minute_kind, series, MINUTE, T0};

fn network() -> impl Strategy<Value = (Vec<Vec<Reading>>, Vec<u64>)> {
    // Four stations over 9 hours: long enough for runs that cross several 3-hour history blocks.
    let minutes = 9 * 60;
    (
        prop::collection::vec(
            (prop::collection::vec(minute_kind(), minutes), -20i32..20),
            4,
        ),
        prop::collection::vec((0usize..4, 0usize..minutes), 0..6),
    )
        .prop_map(|(stations, overturns)| {
            let series: Vec<Vec<Reading>> = stations
                .iter()
                .enumerate()
                .map(|(index, (kinds, offset))| {
                    series(
                        kinds,
                        (index * 100_000) as u64,
                        1,
                        15.0 + f64::from(*offset) / 10.0,
                    )
                })
                .collect();
            let mut overturned: Vec<u64> = overturns
                .into_iter()
                .map(|(station, minute)| (station * 100_000 + minute) as u64)
                .collect();
            overturned.sort_unstable();
            overturned.dedup();
            (series, overturned)
        })
}

/// Each interval of `[first, first + count)` (10-minute intervals after 4 hours) decided on its own,
/// its readings from `from(start)` on.
fn one_at_a_time(
    spec: &QuantitySpec,
    rules: &Rules,
    stations: &[Vec<Reading>],
    overturned: &[u64],
    intervals: &[(i64, i64)],
    from: impl Fn(i64) -> i64,
) -> Vec<IntervalOutcome> {
    let mut screen = IntervalScreen::default();
    intervals
        .iter()
        .map(|&(start, end)| {
            let slices: Vec<StationReadings<'_>> = stations
                .iter()
                .enumerate()
                .map(|(index, readings)| {
                    let low = readings.partition_point(|r| r.observed_at_ms < from(start));
                    let high = readings.partition_point(|r| r.observed_at_ms < end);
                    StationReadings {
                        station: index as u32,
                        readings: &readings[low..high],
                    }
                })
                .filter(|station| !station.readings.is_empty())
                .collect();
            let mut outcome = IntervalOutcome::default();
            screen.screen(
                &IntervalInput {
                    quantity: spec,
                    rules,
                    start_ms: start,
                    end_ms: end,
                    stations: &slices,
                    overturned,
                },
                &mut outcome,
            );
            outcome
        })
        .collect()
}

/// The same intervals, each station judged once over the whole run.
fn judged_once(
    spec: &QuantitySpec,
    rules: &Rules,
    stations: &[Vec<Reading>],
    overturned: &[u64],
    intervals: &[(i64, i64)],
) -> Vec<IntervalOutcome> {
    let (run_start, run_end) = (intervals[0].0, intervals[intervals.len() - 1].1);
    let judging = Judging {
        quantity: spec,
        rules,
        interval_ms: intervals[0].1 - intervals[0].0,
        overturned,
    };
    let mut screen = IntervalScreen::default();
    let verdicts: Vec<(usize, Vec<Judged>)> = stations
        .iter()
        .map(|readings| {
            let mut judged = Vec::new();
            screen.judge(&judging, readings, run_start, run_end, &mut judged);
            (
                readings.partition_point(|r| r.observed_at_ms < run_start),
                judged,
            )
        })
        .collect();
    intervals
        .iter()
        .map(|&(start, end)| {
            let shares: Vec<JudgedStation<'_>> = stations
                .iter()
                .zip(&verdicts)
                .enumerate()
                .filter_map(|(index, (readings, (first, judged)))| {
                    let low = readings.partition_point(|r| r.observed_at_ms < start);
                    let high = readings.partition_point(|r| r.observed_at_ms < end);
                    // A station with readings only in the history takes part with no interval
                    // readings, as it does in `screen`.
                    let from = rules.chain_start(start);
                    if !readings
                        .iter()
                        .any(|r| r.observed_at_ms >= from && r.observed_at_ms < end)
                    {
                        return None;
                    }
                    Some(JudgedStation {
                        station: index as u32,
                        readings: &readings[low..high],
                        judged: &judged[low - first..high - first],
                    })
                })
                .collect();
            let mut outcome = IntervalOutcome::default();
            screen.decide(
                &JudgedInterval {
                    judging,
                    start_ms: start,
                    end_ms: end,
                    stations: &shares,
                },
                &mut outcome,
            );
            outcome
        })
        .collect()
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(64))]

    #[test]
    fn batching_never_changes_an_interval(
        (stations, overturned) in network(),
        first in 0i64..12,
        count in 1usize..20,
        key in prop_oneof![Just("air_temperature"), Just("precipitation"), Just("wind_direction")],
    ) {
        let spec = quantity(key);
        let rules = Rules::default();
        // 10-minute intervals from 4 h 20 min after T0 on, so that every interval has its whole
        // history in the data.
        let intervals: Vec<(i64, i64)> = (0..count as i64)
            .map(|k| {
                let start = T0 + (260 + 10 * (first + k)) * MINUTE;
                (start, start + 10 * MINUTE)
            })
            .collect();
        let alone = one_at_a_time(&spec, &rules, &stations, &overturned, &intervals, |start| {
            rules.chain_start(start)
        });
        let with_more_history = one_at_a_time(&spec, &rules, &stations, &overturned, &intervals, |start| {
            rules.chain_start(start) - 97 * MINUTE
        });
        let batched = judged_once(&spec, &rules, &stations, &overturned, &intervals);
        prop_assert_eq!(&alone, &with_more_history);
        prop_assert_eq!(&alone, &batched);
    }
}
