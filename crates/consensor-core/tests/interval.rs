//! The decision of one interval, checked against outside references: the Point against numpy, scipy
//! and statsmodels on published data sets used as station values (printed by
//! `tools/reference/interval_points.py`), and each rule against its definition in API.md with the
//! figures REFERENCE.md gives for it.

use consensor_core::checks::{
    default_quantities, screen_interval, IntervalInput, IntervalOutcome, QuantitySpec, Reading,
    Rule, Rules, StationReadings, Status, DEFAULT_MISSING_CODES,
};

const MINUTE: i64 = 60_000;
/// 2026-06-01T07:00:00Z in epoch milliseconds (Unix time arithmetic, common practice).
const T0: i64 = 1_780_297_200_000;

fn quantity(key: &str) -> QuantitySpec {
    default_quantities()
        .into_iter()
        .find(|q| q.key == key)
        .unwrap()
}

fn reading(id: u64, minute: i64, value: Option<f64>) -> Reading {
    Reading {
        id,
        observed_at_ms: T0 + minute * MINUTE,
        value,
        value_as_sent: value,
    }
}

/// Decides the 10-minute interval starting at T0 with one series per station.
fn decide(spec: &QuantitySpec, series: &[Vec<Reading>]) -> IntervalOutcome {
    let rules = Rules::default();
    let stations: Vec<StationReadings<'_>> = series
        .iter()
        .enumerate()
        .map(|(index, readings)| StationReadings {
            station: index as u32,
            readings,
        })
        .collect();
    screen_interval(&IntervalInput {
        quantity: spec,
        rules: &rules,
        start_ms: T0,
        end_ms: T0 + 10 * MINUTE,
        stations: &stations,
        overturned: &[],
    })
}

/// One reading per station at the start of the interval.
fn one_each(values: &[f64]) -> Vec<Vec<Reading>> {
    values
        .iter()
        .enumerate()
        .map(|(i, &v)| vec![reading(i as u64, 0, Some(v))])
        .collect()
}

fn close(got: Option<f64>, expected: f64, what: &str) {
    let got = got.unwrap_or_else(|| panic!("{what} is missing"));
    assert!(
        (got - expected).abs() <= 1e-9 * (1.0 + expected.abs()),
        "{what}: got {got}, expected {expected}"
    );
}

fn rules_of(outcome: &IntervalOutcome) -> Vec<(u32, Rule)> {
    outcome
        .set_aside
        .iter()
        .map(|record| (record.station, record.rule))
        .collect()
}

#[test]
fn chem_data_as_station_values() {
    // The 24 MASS `chem` determinations as 24 stations' air temperatures. Expected values from
    // tools/reference/interval_points.py: numpy 2.4.6 `np.median`/`np.mean`, scipy 1.17.1
    // `median_abs_deviation` (raw) and `binom.cdf` for the interval, statsmodels 0.15.0
    // `HuberT(t=1.345).weights` iterated with the scale fixed at the spread.
    let chem = [
        2.20, 2.20, 2.4, 2.4, 2.5, 2.7, 2.8, 2.9, 3.03, 3.03, 3.10, 3.37, 3.4, 3.4, 3.4, 3.5, 3.6,
        3.7, 3.7, 3.7, 3.7, 3.77, 5.28, 28.95,
    ];
    let outcome = decide(&quantity("air_temperature"), &one_each(&chem));
    // Cross-station test: median 3.385, raw MAD 0.355, scale 0.5263237875694887; 5.28 scores
    // 3.600445 and 28.95 scores 48.572762, both above 3.5.
    assert_eq!(
        rules_of(&outcome),
        vec![(22, Rule::FarFromConsensus), (23, Rule::FarFromConsensus)]
    );
    let far = &outcome.set_aside[0];
    assert!((far.score.unwrap() - 3.600445).abs() < 1e-6);
    close(far.consensus_median, 3.385, "consensus median");
    close(far.consensus_spread, 0.5263237875694887, "consensus scale");
    close(far.threshold, 3.5, "threshold");
    let p = outcome.point;
    assert_eq!(
        (p.stations_used, p.stations_set_aside, p.status),
        (22, 2, Status::Ok)
    );
    close(p.median, 3.2350000000000003, "median");
    close(p.median_low, 3.1, "median_low");
    close(p.median_high, 3.37, "median_high");
    close(p.mean, 3.1136363636363638, "mean");
    close(p.mad, 0.4500000000000002, "mad");
    close(p.spread, 0.6671709983275211, "spread");
    // n = 22 → r = 6: [X(6), X(17)] = [2.7, 3.6].
    close(p.ci95_low, 2.7, "ci95_low");
    close(p.ci95_high, 3.6, "ci95_high");
    assert!((p.huber.unwrap() - 3.115265500724976).abs() < 1e-8);
    // The naive mean of all 24 (numpy `np.mean(chem)`).
    close(p.mean_all, 4.2804166666666665, "mean_all");
}

#[test]
fn leys_data_as_particulate_stations() {
    // Leys et al. (2013) worked example as 8 stations' PM2.5: only 1000 is set aside, at score
    // 191.362378 (REFERENCE.md §1–2; numpy/scipy via tools/reference/interval_points.py). 1000 is
    // inside the plausible range 0…1000 (inclusive), so it reaches the cross-station test.
    let leys = [1.0, 3.0, 3.0, 6.0, 8.0, 10.0, 10.0, 1000.0];
    let outcome = decide(&quantity("pm2_5"), &one_each(&leys));
    assert_eq!(rules_of(&outcome), vec![(7, Rule::FarFromConsensus)]);
    assert!((outcome.set_aside[0].score.unwrap() - 191.362378).abs() < 1e-6);
    let p = outcome.point;
    close(p.median, 6.0, "median");
    close(p.mean, 5.857142857142857, "mean");
    close(p.mad, 3.0, "mad");
    close(p.spread, 4.447806655516806, "spread");
    // n = 7: r = 1 covers 1 − 2/128 = 98.4 %, r = 2 only 87.5 % (scipy `binom.cdf`).
    close(p.ci95_low, 1.0, "ci95_low");
    close(p.ci95_high, 10.0, "ci95_high");
    close(p.huber, 5.857142857142857, "huber");
    close(p.mean_all, 130.125, "mean_all");
    let reason = outcome.set_aside[0].reason("ug/m3", &DEFAULT_MISSING_CODES);
    assert_eq!(
        reason,
        "station value 1000.0 ug/m3 (median of its readings this interval) is 191.362 spreads above \
         the area median 7.0 ug/m3 (spread 5.189); limit 3.5"
    );
}

#[test]
fn missing_values_and_codes_are_set_aside_before_anything_else() {
    // API.md step 1. -7999 is a missing-data code a real network reported (REFERENCE.md §5, [READ]);
    // -999 is in the default list.
    let spec = quantity("air_temperature");
    let series = vec![
        vec![reading(1, 0, None)],
        vec![reading(2, 0, Some(-7999.0))],
        vec![reading(3, 0, Some(-999.0))],
        vec![reading(4, 0, Some(14.0))],
    ];
    let outcome = decide(&spec, &series);
    assert_eq!(
        rules_of(&outcome),
        vec![
            (0, Rule::MissingValue),
            (1, Rule::MissingCode),
            (2, Rule::MissingCode)
        ]
    );
    assert!(outcome
        .set_aside
        .iter()
        .all(|r| r.score.is_none() && r.consensus_median.is_none()));
    assert_eq!(outcome.point.status, Status::FewStations);
    assert_eq!(
        (
            outcome.point.stations_used,
            outcome.point.stations_set_aside
        ),
        (1, 3)
    );
    close(outcome.point.median, 14.0, "median of the one station left");
    // mean_all includes the codes as numbers: (−7999 − 999 + 14)/3.
    close(
        outcome.point.mean_all,
        (-7999.0 - 999.0 + 14.0) / 3.0,
        "mean_all",
    );
    assert_eq!(
        outcome.set_aside[1].reason("Cel", &DEFAULT_MISSING_CODES),
        "value -7999.0 as sent is a missing-data code (codes: -999.0, -9999.0, -7999.0, 9999.0)"
    );
}

#[test]
fn missing_codes_compare_the_value_as_sent() {
    // A Fahrenheit station sending -999 [degF] converts to -552.8 °C: the code is recognised on the
    // value as sent (API.md), not on the converted one. (−999 − 32)·5/9 = −572.78 (exact definition).
    let spec = quantity("air_temperature");
    let mut code = reading(1, 0, Some((-999.0 - 32.0) * 5.0 / 9.0));
    code.value_as_sent = Some(-999.0);
    let outcome = decide(&spec, &[vec![code]]);
    assert_eq!(rules_of(&outcome), vec![(0, Rule::MissingCode)]);
}

#[test]
fn plausible_range_is_inclusive() {
    // REFERENCE.md §4 "test use": a value equal to a limit passes. Air temperature −80 … 60 °C (WMO
    // guideline figures, from memory). −120 °C is a real fault report (REFERENCE.md §5, [READ]).
    let spec = quantity("air_temperature");
    let series = one_each(&[60.0, -80.0, 60.0001, -120.0]);
    let outcome = decide(&spec, &series);
    assert_eq!(
        rules_of(&outcome),
        vec![(2, Rule::OutOfRange), (3, Rule::OutOfRange)]
    );
    close(outcome.set_aside[0].threshold, 60.0, "upper limit crossed");
    close(outcome.set_aside[0].score, 60.0001, "value");
    close(outcome.set_aside[1].threshold, -80.0, "lower limit crossed");
    assert_eq!(
        outcome.set_aside[1].reason("Cel", &DEFAULT_MISSING_CODES),
        "value -120.0 Cel is below the plausible minimum -80.0 Cel"
    );
    // Relative humidity −49 % (the same fault report).
    let outcome = decide(
        &quantity("relative_humidity"),
        &one_each(&[-49.0, 100.0, 0.0]),
    );
    assert_eq!(rules_of(&outcome), vec![(0, Rule::OutOfRange)]);
}

#[test]
fn precipitation_limit_is_per_minute_of_the_gap() {
    // API.md: the upper limit is 40 mm per minute of the gap since the previous accepted reading, or
    // of the interval (10 min) for the first one.
    let spec = quantity("precipitation");
    let series = vec![vec![
        reading(1, 0, Some(400.0)), // first: 10 min × 40 = 400, passes (inclusive)
        reading(2, 1, Some(40.0)),  // 1 min since: 40, passes
        reading(3, 2, Some(40.5)),  // 1 min since: 40 < 40.5, set aside
        reading(4, 4, Some(80.0)), // 2 min since the last accepted one (minute 2 was set aside): 80
    ]];
    let outcome = decide(&spec, &series);
    assert_eq!(rules_of(&outcome), vec![(0, Rule::OutOfRange)]);
    assert_eq!(outcome.set_aside[0].reading_id, 3);
    close(outcome.set_aside[0].threshold, 40.0, "per-minute limit");
}

/// A small repeating wiggle (0, 0.1, 0.2 by minute) so that healthy series vary by more than the
/// flat-line minimum of 0.1; over minutes 0…9 its median is 0.1.
fn wiggle(minute: i64) -> f64 {
    0.1 * minute.rem_euclid(3) as f64
}

/// A station reading every minute from `from` to `to` (inclusive) with values from `value(minute)`.
fn minutely(id_base: u64, from: i64, to: i64, value: impl Fn(i64) -> f64) -> Vec<Reading> {
    (from..=to)
        .map(|m| reading(id_base + (m - from) as u64, m, Some(value(m))))
        .collect()
}

#[test]
fn flat_line_needs_six_readings_varying_less_than_the_minimum() {
    // API.md step 1 with the WMO persistence figure 0.1 °C over 60 min (from memory, REFERENCE.md §4):
    // a stuck sensor repeating 21.3 for an hour is set aside; one varying by exactly 0.1 is not.
    let spec = quantity("air_temperature");
    let stuck = minutely(1000, -60, 9, |_| 21.3);
    let barely = minutely(2000, -60, 9, |m| if m % 2 == 0 { 21.3 } else { 21.4 });
    let outcome = decide(&spec, &[stuck, barely]);
    let flagged: Vec<_> = rules_of(&outcome);
    assert_eq!(
        flagged.len(),
        10,
        "every interval reading of the stuck station"
    );
    assert!(flagged
        .iter()
        .all(|&(station, rule)| station == 0 && rule == Rule::FlatLine));
    let first = &outcome.set_aside[0];
    close(first.score, 0.0, "variation");
    close(first.threshold, 0.1, "minimum variation");
    // The window (t − 60 min, t] holds 60 one-minute readings.
    assert_eq!(first.window_readings, Some(60));
    assert_eq!(
        first.reason("Cel", &DEFAULT_MISSING_CODES),
        "the station's 60 readings over the 60 minutes up to this one varied by only 0.0 Cel; at \
         least 0.1 Cel is expected"
    );
    // Five readings are too few to judge (the window must hold at least 6).
    let short = vec![
        reading(1, 5, Some(21.3)),
        reading(2, 6, Some(21.3)),
        reading(3, 7, Some(21.3)),
        reading(4, 8, Some(21.3)),
        reading(5, 9, Some(21.3)),
    ];
    assert!(decide(&spec, &[short]).set_aside.is_empty());
}

#[test]
fn flat_line_exemptions() {
    // REFERENCE.md §4: no persistence rule for precipitation; zero rain and night-time zero
    // irradiance are legitimate long runs. API.md: a window on one end of the range is exempt.
    let dry = minutely(1, -60, 9, |_| 0.0);
    assert!(
        decide(&quantity("precipitation"), std::slice::from_ref(&dry))
            .set_aside
            .is_empty()
    );
    assert!(
        decide(&quantity("solar_irradiance"), std::slice::from_ref(&dry))
            .set_aside
            .is_empty()
    );
    // Calm wind (0 m/s) and saturated air (100 %) sit on an end of their ranges.
    assert!(decide(&quantity("wind_speed"), &[dry]).set_aside.is_empty());
    let saturated = minutely(1, -60, 9, |_| 100.0);
    assert!(decide(&quantity("relative_humidity"), &[saturated])
        .set_aside
        .is_empty());
    // But a humidity sensor stuck at 73 % is not exempt.
    let stuck = minutely(1, -60, 9, |_| 73.0);
    assert_eq!(
        decide(&quantity("relative_humidity"), &[stuck])
            .set_aside
            .len(),
        10
    );
}

#[test]
fn step_at_the_limit_passes_and_beyond_it_needs_the_consensus() {
    // REFERENCE.md §4 "test use": a step exactly at the limit passes. The limit for 1-minute readings
    // of air temperature is 3 °C (WMO guideline, from memory).
    let spec = quantity("air_temperature");
    let at_limit = vec![reading(1, -1, Some(10.0)), reading(2, 0, Some(13.0))];
    assert!(decide(&spec, &[at_limit]).set_aside.is_empty());
    // A jump of 3.5 °C with no other station: no provisional consensus can confirm it → step.
    let jump = vec![reading(1, -1, Some(10.0)), reading(2, 0, Some(13.5))];
    let outcome = decide(&spec, std::slice::from_ref(&jump));
    assert_eq!(rules_of(&outcome), vec![(0, Rule::Step)]);
    let record = &outcome.set_aside[0];
    close(record.score, 3.5, "change");
    close(record.threshold, 3.0, "limit for a one-minute gap");
    assert_eq!(record.consensus_median, None);
    assert_eq!(
        record.reason("Cel", &DEFAULT_MISSING_CODES),
        "value 13.5 Cel changed by 3.5 Cel in 1.0 minutes since the previous accepted reading; the \
         limit for that gap is 3.0 Cel, and fewer than 3 stations gave a provisional consensus that \
         could confirm it"
    );
    // The same jump when three neighbours also read about 13.4 is weather the area shares: cleared.
    let neighbours: Vec<Vec<Reading>> = (0..3)
        .map(|i| vec![reading(10 + i, 0, Some(13.3 + 0.1 * i as f64))])
        .collect();
    let mut series = vec![jump];
    series.extend(neighbours);
    let outcome = decide(&spec, &series);
    assert!(outcome.set_aside.is_empty(), "{:?}", outcome.set_aside);
    close(
        outcome.point.median,
        13.45,
        "median of 13.3, 13.4, 13.5, 13.5",
    );
}

#[test]
fn step_that_the_consensus_does_not_confirm_is_set_aside_with_the_consensus() {
    // A brief spike to 28 °C at one station while four neighbours read about 20 °C: the provisional
    // consensus (API.md step 3) leaves it far away → step.
    let spec = quantity("air_temperature");
    let mut series: Vec<Vec<Reading>> = (0..4)
        .map(|i| minutely(100 * (i + 1), -5, 9, |m| 20.0 + 0.1 * i as f64 + wiggle(m)))
        .collect();
    series.push(minutely(900, -5, 9, |m| {
        if m == 3 {
            28.0
        } else {
            20.05 + wiggle(m)
        }
    }));
    let outcome = decide(&spec, &series);
    assert_eq!(rules_of(&outcome), vec![(4, Rule::Step)]);
    let record = &outcome.set_aside[0];
    assert_eq!(record.observed_at_ms, T0 + 3 * MINUTE);
    close(
        record.score,
        28.0 - 20.25,
        "change from the reading at minute 2",
    );
    // The reading after the spike compares with the last accepted one (20.25), not the spike, so
    // only the spike is set aside and the station still counts.
    assert_eq!(outcome.point.stations_used, 5);
    // Provisional station medians 20.1, 20.2, 20.3, 20.4 and 20.15 (the spike included): median 20.2,
    // raw MAD 0.1, scale max(1.4826 × 0.1, 0.5) = 0.5, the air-temperature floor.
    close(record.consensus_median, 20.2, "provisional median");
    close(record.consensus_spread, 0.5, "provisional scale (floor)");
}

#[test]
fn few_stations_make_no_cross_station_test() {
    // API.md step 5: no cross-station test with fewer than 3 station values.
    let outcome = decide(&quantity("air_temperature"), &one_each(&[10.0, 30.0]));
    assert!(outcome.set_aside.is_empty());
    assert_eq!(outcome.point.status, Status::FewStations);
    close(outcome.point.median_low, 10.0, "median_low");
    close(outcome.point.median_high, 30.0, "median_high");
    close(outcome.point.median, 20.0, "median");
    assert_eq!(outcome.point.ci95_low, None);
    let empty = decide(&quantity("air_temperature"), &[]);
    assert_eq!(empty.point.status, Status::NoData);
    assert_eq!(empty.point.median, None);
}

#[test]
fn sun_exposed_station_is_far_from_consensus() {
    // Ten stations within 0.4 °C and one reading 5 °C high (a sensor in direct sun): only it is set
    // aside, every one of its readings gets a record, and the median barely moves while the naive
    // mean is dragged.
    let spec = quantity("air_temperature");
    let mut series: Vec<Vec<Reading>> = (0..10)
        .map(|i| minutely(100 * (i + 1), 0, 9, |m| 18.0 + 0.04 * i as f64 + wiggle(m)))
        .collect();
    series.push(minutely(5000, 0, 9, |m| 23.0 + wiggle(m)));
    let outcome = decide(&spec, &series);
    assert_eq!(outcome.set_aside.len(), 10);
    assert!(outcome
        .set_aside
        .iter()
        .all(|r| r.station == 10 && r.rule == Rule::FarFromConsensus));
    assert!(outcome.set_aside[0].score.unwrap() > 3.5);
    // Station values 18.1 + 0.04·i (i = 0…9): the median of the ten kept is (18.26 + 18.30)/2.
    close(outcome.point.median, 18.28, "median");
    let naive = (18.1 * 10.0 + 0.04 * 45.0 + 23.1) / 11.0;
    close(outcome.point.mean_all, naive, "mean_all");
}

#[test]
fn wind_direction_consensus_is_circular() {
    // Directions around north: the circular median is 0° (the arithmetic median of these numbers
    // would be 10°), and 180° is set aside (arc distances, Mardia & Jupp; from memory).
    let spec = quantity("wind_direction");
    let outcome = decide(&spec, &one_each(&[350.0, 355.0, 0.0, 5.0, 10.0, 180.0]));
    assert_eq!(rules_of(&outcome), vec![(5, Rule::FarFromConsensus)]);
    close(outcome.point.median, 0.0, "circular median");
    close(outcome.point.mean, 0.0, "mean of the unwrapped values");
}

#[test]
fn history_readings_produce_no_records_and_later_readings_are_ignored() {
    let spec = quantity("air_temperature");
    let series = vec![vec![
        reading(1, -30, Some(-999.0)),
        reading(2, 0, Some(12.0)),
        reading(3, 10, Some(-999.0)),
    ]];
    let outcome = decide(&spec, &series);
    assert!(outcome.set_aside.is_empty());
    close(outcome.point.median, 12.0, "median");
}

#[test]
fn reused_screen_gives_the_same_answers() {
    use consensor_core::checks::IntervalScreen;
    let spec = quantity("air_temperature");
    let rules = Rules::default();
    let mut screen = IntervalScreen::default();
    let mut outcome = IntervalOutcome::default();
    for values in [
        &[1.0, 2.0, 3.0, 40.0][..],
        &[5.0, 5.0][..],
        &[7.0, 8.0, 9.0][..],
    ] {
        let series = one_each(values);
        let stations: Vec<_> = series
            .iter()
            .enumerate()
            .map(|(i, r)| StationReadings {
                station: i as u32,
                readings: r,
            })
            .collect();
        let input = IntervalInput {
            quantity: &spec,
            rules: &rules,
            start_ms: T0,
            end_ms: T0 + 10 * MINUTE,
            stations: &stations,
            overturned: &[],
        };
        screen.screen(&input, &mut outcome);
        assert_eq!(outcome, screen_interval(&input));
    }
}

#[test]
fn an_overturned_reading_is_used_whatever_the_rules_say() {
    // API.md "review": an overturned reading is used again. With the Leys et al. data as station
    // values, overturning the 1000 keeps all 8 stations: median 7.0 and mean 130.125 (numpy 2.4
    // `np.median`, `np.mean` of [1,3,3,6,8,10,10,1000]).
    let spec = quantity("pm2_5");
    let rules = Rules::default();
    let series = one_each(&[1.0, 3.0, 3.0, 6.0, 8.0, 10.0, 10.0, 1000.0]);
    let stations: Vec<StationReadings<'_>> = series
        .iter()
        .enumerate()
        .map(|(i, readings)| StationReadings {
            station: i as u32,
            readings,
        })
        .collect();
    let outcome = screen_interval(&IntervalInput {
        quantity: &spec,
        rules: &rules,
        start_ms: T0,
        end_ms: T0 + 10 * MINUTE,
        stations: &stations,
        overturned: &[7],
    });
    assert!(outcome.set_aside.is_empty());
    assert_eq!(outcome.point.stations_used, 8);
    close(outcome.point.median, 7.0, "median");
    close(outcome.point.mean, 130.125, "mean");
    // An out-of-range value overturned is used too (80 °C, above the 60 °C limit).
    let air = quantity("air_temperature");
    let hot = [vec![reading(42, 0, Some(80.0))]];
    let stations = [StationReadings {
        station: 0,
        readings: &hot[0],
    }];
    let outcome = screen_interval(&IntervalInput {
        quantity: &air,
        rules: &rules,
        start_ms: T0,
        end_ms: T0 + 10 * MINUTE,
        stations: &stations,
        overturned: &[42],
    });
    assert!(outcome.set_aside.is_empty());
    close(outcome.point.median, 80.0, "median");
}
