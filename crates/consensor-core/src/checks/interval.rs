//! The decision of one interval for one area and quantity, exactly as API.md "How an interval is
//! decided" defines it:
//!
//! 1. hard per-reading checks: `missing_value`, `missing_code`, `out_of_range`, `flat_line`;
//! 2. the step test against the station's previous reading that passed steps 1 and 2;
//! 3. a provisional consensus (median and scale of each station's median of the readings that passed
//!    step 1) that clears a step-suspect reading close to it, or sets it aside as `step`;
//! 4. one value per station: the median of its readings not set aside;
//! 5. the cross-station test on those values (at least 3): |score| > limit → `far_from_consensus`;
//! 6. the `Point` on the station values kept.
//!
//! The input holds each station's readings in time order, including its *history* before the
//! interval: the readings the step and flat-line tests look back on. Every reading is judged on its
//! station's readings from [`Rules::chain_start`] of its time on (one to two `history_ms` back), so
//! give each station's readings from `rules.chain_start(start_ms)` on; earlier ones are skipped.
//! History readings produce no record; readings at or after the interval's end are ignored.
//!
//! Steps 1 and 2 depend on one station's readings only, so a caller deciding many neighbouring
//! intervals judges each station's readings once ([`IntervalScreen::judge`]) and then decides each
//! interval on its share of the verdicts ([`IntervalScreen::decide`]); the outcome is the same as
//! [`IntervalScreen::screen`] gives for each interval on its own.
//!
//! [`IntervalScreen`] keeps its working buffers between calls, and [`IntervalOutcome`] can be reused,
//! so screening interval after interval allocates nothing once the buffers have grown (the benchmark
//! counts allocations to check it).

use std::collections::VecDeque;

use super::quantity::DEFAULT_MISSING_CODES;
use super::quantity::{QuantitySpec, MINUTE_MS};
use super::{Rule, SetAside};
use crate::stats::circular::{circular_median, signed_difference, wrap_degrees};
use crate::stats::median::median_range_in_place;
use crate::stats::scale::{robust_scale_with, MAD_TO_SD};
use crate::stats::{ci, huber_location, HUBER_K};

/// One stored reading, in the canonical unit.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Reading {
    /// The store's id for the reading (opaque here; copied into set-aside records).
    pub id: u64,
    pub observed_at_ms: i64,
    /// The canonical value; `None` when the station sent `null`.
    pub value: Option<f64>,
    /// The value as sent, before unit conversion (`None` when the station sent `null`); the
    /// missing-data codes are compared with it.
    pub value_as_sent: Option<f64>,
}

/// One station's readings, sorted by `observed_at_ms` (history first, then the interval's).
#[derive(Debug, Clone, Copy)]
pub struct StationReadings<'a> {
    /// The caller's handle for the station, copied into the results.
    pub station: u32,
    pub readings: &'a [Reading],
}

/// The configurable parts of the decision.
#[derive(Debug, Clone, PartialEq)]
pub struct Rules {
    /// Values that mean "no data", compared with the value as sent.
    pub missing_codes: Vec<f64>,
    /// The |score| above which a station value is far from the consensus (Iglewicz & Hoaglin 3.5).
    pub far_limit: f64,
    /// The flat-line window: readings with `observed_at` in (t − window, t].
    pub flat_window_ms: i64,
    /// The fewest readings a flat-line window must hold before it can judge.
    pub flat_min_readings: usize,
    /// The coverage of the median's confidence interval (0.95 for `ci95_*`).
    pub ci_confidence: f64,
    /// How far back a station's readings are judged from (see [`Rules::chain_start`]).
    pub history_ms: i64,
}

impl Rules {
    /// Where the judgement of a reading observed at `time_ms` starts: the step test's "previous
    /// accepted reading" and the precipitation gap form a chain from reading to reading, and the
    /// chain of a reading is started afresh at this time, the start of the history block
    /// (`history_ms` long, aligned on the epoch) before the reading's own. Every reading is thus
    /// judged on one to two histories of its station's readings, the same whichever interval or run
    /// of intervals it is decided with, so that a result never depends on how the worker batched.
    pub fn chain_start(&self, time_ms: i64) -> i64 {
        time_ms.div_euclid(self.history_ms) * self.history_ms - self.history_ms
    }
}

impl Default for Rules {
    fn default() -> Self {
        Rules {
            missing_codes: DEFAULT_MISSING_CODES.to_vec(),
            far_limit: crate::stats::MODIFIED_Z_LIMIT,
            flat_window_ms: 60 * MINUTE_MS,
            flat_min_readings: 6,
            ci_confidence: 0.95,
            // Three hours (our own choice): the flat-line window's hour, plus room for the step
            // test's chain of "previous accepted reading" to settle before the reading judged.
            history_ms: 3 * 60 * MINUTE_MS,
        }
    }
}

/// One area's interval for one quantity.
#[derive(Debug, Clone, Copy)]
pub struct IntervalInput<'a> {
    pub quantity: &'a QuantitySpec,
    pub rules: &'a Rules,
    /// The interval is `[start_ms, end_ms)`.
    pub start_ms: i64,
    pub end_ms: i64,
    pub stations: &'a [StationReadings<'a>],
    /// Ids of readings whose set-aside an operator overturned, sorted ascending. Such a reading is
    /// used whatever the rules say (when it has a value): it gets no record, it counts as the
    /// station's accepted reading for the step test, and its station's value is used without a
    /// cross-station test, since the operator vouched for it.
    pub overturned: &'a [u64],
}

/// How much the interval could say.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Status {
    /// No station value was kept.
    NoData,
    /// Fewer than 3 station values reached the cross-station test, so none was made.
    FewStations,
    Ok,
}

impl Status {
    pub fn as_str(self) -> &'static str {
        match self {
            Status::NoData => "no_data",
            Status::FewStations => "few_stations",
            Status::Ok => "ok",
        }
    }
}

/// The consensus of one interval (API.md `Point`, without the storage fields).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Point {
    pub median: Option<f64>,
    pub median_low: Option<f64>,
    pub median_high: Option<f64>,
    pub mean: Option<f64>,
    /// The mean over stations of each station's median of all its numeric readings, unchecked.
    pub mean_all: Option<f64>,
    pub mad: Option<f64>,
    pub spread: Option<f64>,
    pub ci95_low: Option<f64>,
    pub ci95_high: Option<f64>,
    pub huber: Option<f64>,
    pub stations_used: u32,
    pub stations_set_aside: u32,
    pub status: Status,
}

impl Point {
    fn empty() -> Self {
        Point {
            median: None,
            median_low: None,
            median_high: None,
            mean: None,
            mean_all: None,
            mad: None,
            spread: None,
            ci95_low: None,
            ci95_high: None,
            huber: None,
            stations_used: 0,
            stations_set_aside: 0,
            status: Status::NoData,
        }
    }
}

/// A station's value for the interval, as it reached the cross-station test.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct StationValue {
    pub station: u32,
    pub value: f64,
    /// Whether the value went into the `Point`.
    pub used: bool,
    /// Its signed score in the cross-station test, when one was made.
    pub score: Option<f64>,
}

/// Everything decided about one interval.
#[derive(Debug, Clone, PartialEq)]
pub struct IntervalOutcome {
    pub point: Point,
    /// Every reading of the interval set aside, grouped by station in input order, then by time.
    pub set_aside: Vec<SetAside>,
    /// Every station value of step 4, in input order.
    pub station_values: Vec<StationValue>,
}

impl Default for IntervalOutcome {
    fn default() -> Self {
        IntervalOutcome {
            point: Point::empty(),
            set_aside: Vec::new(),
            station_values: Vec::new(),
        }
    }
}

/// Decides one interval with fresh buffers. See [`IntervalScreen`] to decide many without allocating.
pub fn screen_interval(input: &IntervalInput<'_>) -> IntervalOutcome {
    let mut outcome = IntervalOutcome::default();
    IntervalScreen::default().screen(input, &mut outcome);
    outcome
}

/// Reusable working memory for deciding intervals.
#[derive(Debug, Default)]
pub struct IntervalScreen {
    verdicts: Vec<Judged>,
    chains: [Chain; 2],
    stations: Vec<StationWork>,
    values: Vec<f64>,
    scratch: Vec<f64>,
}

/// What the per-reading rules made of one reading.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Verdict {
    /// Caught by a rule of step 1.
    Hard {
        rule: Rule,
        score: Option<f64>,
        threshold: Option<f64>,
        gap_ms: Option<i64>,
        window_readings: Option<u32>,
    },
    /// Failed the step test; awaits the provisional consensus.
    StepSuspect {
        change: f64,
        limit: f64,
        gap_ms: i64,
    },
    /// Step-suspect, and the provisional consensus did not confirm it.
    StepSetAside {
        change: f64,
        limit: f64,
        gap_ms: i64,
        median: Option<f64>,
        scale: Option<f64>,
    },
    /// Passed every per-reading rule (or was a step-suspect the consensus cleared).
    Passed,
}

/// Per-station bookkeeping for one interval.
#[derive(Debug, Clone, Copy)]
struct StationWork {
    /// Index range of the station's interval readings inside `verdicts`.
    first: usize,
    end: usize,
    value: Option<f64>,
    score: Option<f64>,
    far: bool,
    /// The station has a reading in the interval that an operator overturned.
    vouched: bool,
}

impl StationWork {
    fn new(first: usize, end: usize) -> Self {
        StationWork {
            first,
            end,
            value: None,
            score: None,
            far: false,
            vouched: false,
        }
    }
}

/// The centre and scale of a cross-station comparison, in the quantity's geometry.
#[derive(Debug, Clone, Copy)]
struct Consensus {
    median: f64,
    scale: f64,
}

/// What the per-reading rules (steps 1 and 2) of an area's stations need besides the readings.
#[derive(Debug, Clone, Copy)]
pub struct Judging<'a> {
    pub quantity: &'a QuantitySpec,
    pub rules: &'a Rules,
    /// The area's interval length: the gap given to a station's first precipitation reading.
    pub interval_ms: i64,
    /// Ids of readings an operator overturned, sorted ascending (see [`IntervalInput::overturned`]).
    pub overturned: &'a [u64],
}

/// The verdict of steps 1 and 2 on one reading, from [`IntervalScreen::judge`]; steps 3 to 6 take it
/// up in [`IntervalScreen::decide`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Judged(Verdict);

/// One station's readings of an interval with their verdicts of steps 1 and 2.
#[derive(Debug, Clone, Copy)]
pub struct JudgedStation<'a> {
    /// The caller's handle for the station, copied into the results.
    pub station: u32,
    /// The station's readings in the interval, sorted by time.
    pub readings: &'a [Reading],
    /// `judged[i]` is the verdict on `readings[i]`.
    pub judged: &'a [Judged],
}

/// An interval whose readings were judged beforehand, ready for steps 3 to 6.
#[derive(Debug, Clone, Copy)]
pub struct JudgedInterval<'a> {
    pub judging: Judging<'a>,
    /// The interval is `[start_ms, end_ms)`.
    pub start_ms: i64,
    pub end_ms: i64,
    pub stations: &'a [JudgedStation<'a>],
}

impl IntervalScreen {
    /// Decides `input` into `outcome` (whose vectors are cleared and refilled).
    ///
    /// Panics if a station's readings are not sorted by time: the store returns them ordered, and a
    /// misordered series would silently change which reading is "previous".
    pub fn screen(&mut self, input: &IntervalInput<'_>, outcome: &mut IntervalOutcome) {
        let judging = Judging {
            quantity: input.quantity,
            rules: input.rules,
            interval_ms: input.end_ms - input.start_ms,
            overturned: input.overturned,
        };
        self.verdicts.clear();
        self.stations.clear();
        for station in input.stations {
            let first = self.verdicts.len();
            judge_readings(
                &mut self.chains,
                &judging,
                station.readings,
                input.start_ms,
                input.end_ms,
                &mut self.verdicts,
            );
            self.stations
                .push(StationWork::new(first, self.verdicts.len()));
        }
        let interval_readings = |index: usize| {
            let station = &input.stations[index];
            let readings = station.readings;
            let low = readings.partition_point(|r| r.observed_at_ms < input.start_ms);
            let high = readings.partition_point(|r| r.observed_at_ms < input.end_ms);
            (station.station, &readings[low..high])
        };
        self.decide_judged(&judging, interval_readings, outcome);
    }

    /// Steps 1 and 2 for one station: appends to `out` one verdict for each of its readings
    /// observed in `[from_ms, to_ms)`, in time order. Each reading is judged on its station's
    /// readings from `rules.chain_start(observed_at)` on, whatever range it is judged with, so
    /// `readings` must start at or before `rules.chain_start(from_ms)` (earlier ones are skipped).
    ///
    /// Panics if the readings are not sorted by time.
    pub fn judge(
        &mut self,
        judging: &Judging<'_>,
        readings: &[Reading],
        from_ms: i64,
        to_ms: i64,
        out: &mut Vec<Judged>,
    ) {
        judge_readings(&mut self.chains, judging, readings, from_ms, to_ms, out);
    }

    /// Steps 3 to 6 on readings judged by [`IntervalScreen::judge`]: the same outcome as
    /// [`IntervalScreen::screen`] gives on the same readings.
    ///
    /// Panics if a station has not exactly one verdict per reading.
    pub fn decide(&mut self, interval: &JudgedInterval<'_>, outcome: &mut IntervalOutcome) {
        self.verdicts.clear();
        self.stations.clear();
        for station in interval.stations {
            assert_eq!(
                station.readings.len(),
                station.judged.len(),
                "one verdict per reading"
            );
            let first = self.verdicts.len();
            self.verdicts.extend_from_slice(station.judged);
            self.stations
                .push(StationWork::new(first, self.verdicts.len()));
        }
        let stations = interval.stations;
        self.decide_judged(
            &interval.judging,
            |index: usize| (stations[index].station, stations[index].readings),
            outcome,
        );
    }

    /// Steps 3 to 6, with `self.verdicts` and `self.stations` filled for the interval's readings;
    /// `interval_readings(i)` gives the handle and the interval readings of station `i`.
    fn decide_judged<'r>(
        &mut self,
        judging: &Judging<'_>,
        interval_readings: impl Fn(usize) -> (u32, &'r [Reading]),
        outcome: &mut IntervalOutcome,
    ) {
        let spec = judging.quantity;
        let rules = judging.rules;
        outcome.set_aside.clear();
        outcome.station_values.clear();
        outcome.point = Point::empty();
        if !judging.overturned.is_empty() {
            for (index, work) in self.stations.iter_mut().enumerate() {
                work.vouched = interval_readings(index)
                    .1
                    .iter()
                    .any(|r| judging.overturned.binary_search(&r.id).is_ok());
            }
        }

        // Step 3: the provisional consensus clears or sets aside the step-suspects.
        self.values.clear();
        for (index, work) in self.stations.iter().enumerate() {
            let candidates = interval_values(
                &self.verdicts[work.first..work.end],
                interval_readings(index).1,
                |v| matches!(v, Verdict::Passed | Verdict::StepSuspect { .. }),
            );
            if let Some(value) = station_median(spec, candidates, &mut self.scratch) {
                self.values.push(value);
            }
        }
        let provisional = if self.values.len() >= 3 {
            consensus(spec, &mut self.values, &mut self.scratch)
        } else {
            None
        };
        for Judged(verdict) in &mut self.verdicts {
            if let Verdict::StepSuspect {
                change,
                limit,
                gap_ms,
            } = *verdict
            {
                *verdict = Verdict::StepSetAside {
                    change,
                    limit,
                    gap_ms,
                    median: provisional.map(|c| c.median),
                    scale: provisional.map(|c| c.scale),
                };
            }
        }
        if let Some(provisional) = provisional {
            for (index, work) in self.stations.iter().enumerate() {
                let readings = interval_readings(index).1;
                for (Judged(verdict), reading) in
                    self.verdicts[work.first..work.end].iter_mut().zip(readings)
                {
                    if let (Verdict::StepSetAside { .. }, Some(value)) = (*verdict, reading.value) {
                        let score = score(spec, &provisional, value);
                        if score.abs() <= rules.far_limit {
                            *verdict = Verdict::Passed;
                        }
                    }
                }
            }
        }

        // Step 4: one value per station.
        self.values.clear();
        for (index, work) in self.stations.iter_mut().enumerate() {
            let kept = interval_values(
                &self.verdicts[work.first..work.end],
                interval_readings(index).1,
                |v| matches!(v, Verdict::Passed),
            );
            work.value = station_median(spec, kept, &mut self.scratch);
            if let Some(value) = work.value {
                self.values.push(value);
            }
        }

        // Step 5: the cross-station test, when at least 3 station values reach it.
        let tested = self.values.len() >= 3;
        let cross = if tested {
            consensus(spec, &mut self.values, &mut self.scratch)
        } else {
            None
        };
        if let Some(cross) = cross {
            for work in &mut self.stations {
                if let Some(value) = work.value {
                    let score = score(spec, &cross, value);
                    work.score = Some(score);
                    work.far = score.abs() > rules.far_limit && !work.vouched;
                }
            }
        }

        // Step 6: the Point on the station values kept.
        self.values.clear();
        for (index, work) in self.stations.iter().enumerate() {
            if let Some(value) = work.value {
                outcome.station_values.push(StationValue {
                    station: interval_readings(index).0,
                    value,
                    used: !work.far,
                    score: work.score,
                });
                if !work.far {
                    self.values.push(value);
                }
            }
        }
        let mut point = Point::empty();
        self.fill_point(judging, &mut point);
        point.status = if self.values.is_empty() {
            Status::NoData
        } else if !tested {
            Status::FewStations
        } else {
            Status::Ok
        };
        point.stations_used = self.values.len() as u32;
        point.stations_set_aside = self
            .stations
            .iter()
            .filter(|work| work.first < work.end && (work.value.is_none() || work.far))
            .count() as u32;
        point.mean_all = self.naive_mean(spec, &interval_readings);
        outcome.point = point;

        // The records, station by station in time order.
        for (index, work) in self.stations.iter().enumerate() {
            let (station, readings) = interval_readings(index);
            for (&Judged(verdict), reading) in
                self.verdicts[work.first..work.end].iter().zip(readings)
            {
                if let Some(record) = record_for(reading, station, verdict, work, cross, rules) {
                    outcome.set_aside.push(record);
                }
            }
        }
    }

    fn fill_point(&mut self, judging: &Judging<'_>, point: &mut Point) {
        let spec = judging.quantity;
        if self.values.is_empty() {
            return;
        }
        // Circular values are unwrapped around their circular median so the linear statistics apply
        // (see `stats::circular`); the results are wrapped back at the end.
        if spec.circular {
            let centre = circular_median(&self.values).expect("non-empty");
            for value in &mut self.values {
                *value = centre + signed_difference(*value, centre);
            }
        }
        let wrap = |value: f64| {
            if spec.circular {
                wrap_degrees(value)
            } else {
                value
            }
        };
        self.scratch.clear();
        self.scratch.extend_from_slice(&self.values);
        let range = median_range_in_place(&mut self.scratch).expect("non-empty");
        let interval = ci::median_ci_in_place(&mut self.scratch, judging.rules.ci_confidence);
        for value in &mut self.scratch {
            *value = (*value - range.mid).abs();
        }
        let mad = median_range_in_place(&mut self.scratch)
            .expect("non-empty")
            .mid;
        let spread = MAD_TO_SD * mad;
        point.median = Some(wrap(range.mid));
        point.median_low = Some(wrap(range.low));
        point.median_high = Some(wrap(range.high));
        point.mean = crate::stats::mean(&self.values).map(wrap);
        point.mad = Some(mad);
        point.spread = Some(spread);
        point.ci95_low = interval.map(|(low, _)| wrap(low));
        point.ci95_high = interval.map(|(_, high)| wrap(high));
        point.huber = huber_location(&self.values, range.mid, spread, HUBER_K).map(wrap);
    }

    /// `mean_all`: the mean over stations of the median of each station's numeric readings in the
    /// interval, with no check at all.
    fn naive_mean<'r>(
        &mut self,
        spec: &QuantitySpec,
        interval_readings: &impl Fn(usize) -> (u32, &'r [Reading]),
    ) -> Option<f64> {
        self.values.clear();
        for index in 0..self.stations.len() {
            let numeric = interval_readings(index).1.iter().filter_map(|r| r.value);
            if let Some(value) = station_median(spec, numeric, &mut self.scratch) {
                self.values.push(value);
            }
        }
        if spec.circular && !self.values.is_empty() {
            let centre = circular_median(&self.values).expect("non-empty");
            let total: f64 = self
                .values
                .iter()
                .map(|&v| signed_difference(v, centre))
                .sum();
            return Some(wrap_degrees(centre + total / self.values.len() as f64));
        }
        crate::stats::mean(&self.values)
    }
}

/// Steps 1 and 2 for one station's readings observed in `[from_ms, to_ms)`, appended to `out`. The
/// readings are cut into blocks of `rules.history_ms` aligned on the epoch, and the readings of one
/// block are judged by a chain of steps 1 and 2 started afresh at the start of the block before it,
/// so each reading's verdict depends only on its own station's readings from `rules.chain_start(t)`
/// on.
///
/// Walking every block twice (once as history, once judged) is not needed: while the `lead` chain
/// judges a block, a `fresh` chain started at the block's start follows it until the two hold the
/// same state (the same flat-line window, previous in-range and previous accepted reading), which
/// usually happens once the flat-line window has moved past the block's start. From then on both
/// would give every later reading the same verdict, so the lead chain at the block's end is the
/// fresh chain the next block needs. When they never meet (a station whose level moved for good
/// stays set aside as steps by the older chain), the fresh chain walks the whole block and takes
/// over as the lead. The outcome is that of [`judge_readings_block_by_block`], which a test checks.
fn judge_readings(
    chains: &mut [Chain; 2],
    judging: &Judging<'_>,
    readings: &[Reading],
    from_ms: i64,
    to_ms: i64,
    out: &mut Vec<Judged>,
) {
    let history = judging.rules.history_ms;
    assert!(history > 0, "rules.history_ms must be positive");
    if from_ms >= to_ms {
        return;
    }
    let [lead, fresh] = chains;
    let mut block_start = from_ms.div_euclid(history) * history;
    // The first block's lead chain starts at the block before it, and walks that block as history.
    lead.restart();
    let mut next =
        readings.partition_point(|r| r.observed_at_ms < judging.rules.chain_start(from_ms));
    while let Some(reading) = readings
        .get(next)
        .filter(|r| r.observed_at_ms < block_start)
    {
        lead.judge(judging, reading);
        next += 1;
    }
    loop {
        let block_end = block_start.saturating_add(history);
        let last = block_end >= to_ms;
        fresh.restart();
        // The last block needs no chain for a block after it.
        let mut met = last;
        while let Some(reading) = readings
            .get(next)
            .filter(|r| r.observed_at_ms < block_end.min(to_ms))
        {
            let verdict = lead.judge(judging, reading);
            if reading.observed_at_ms >= from_ms {
                out.push(Judged(verdict));
            }
            if !met {
                fresh.judge(judging, reading);
                met = fresh.has_caught_up_with(lead);
            }
            next += 1;
        }
        if last {
            return;
        }
        if !met {
            std::mem::swap(lead, fresh);
        }
        block_start = block_end;
    }
}

/// The state of one chain of steps 1 and 2 over a station's readings: each reading is judged on the
/// readings before it since the chain started.
#[derive(Debug)]
struct Chain {
    window: SlidingWindow,
    previous_in_range: Option<i64>,
    previous_accepted: Option<(i64, f64)>,
    previous_time: i64,
}

impl Default for Chain {
    fn default() -> Self {
        Chain {
            window: SlidingWindow::default(),
            previous_in_range: None,
            previous_accepted: None,
            previous_time: i64::MIN,
        }
    }
}

impl Chain {
    fn restart(&mut self) {
        self.window.clear();
        self.previous_in_range = None;
        self.previous_accepted = None;
        self.previous_time = i64::MIN;
    }

    /// Whether this chain, started later than `lead` and fed the same readings since, now holds
    /// the same state: then both judge every later reading alike. The windows differ in length
    /// (a cheap comparison) until the lead's has dropped every reading from before this chain's
    /// start.
    fn has_caught_up_with(&self, lead: &Chain) -> bool {
        self.previous_accepted == lead.previous_accepted
            && self.previous_in_range == lead.previous_in_range
            && self.window == lead.window
    }

    /// Steps 1 and 2 on the next reading of the chain.
    ///
    /// Panics if the readings are not sorted by time.
    fn judge(&mut self, judging: &Judging<'_>, reading: &Reading) -> Verdict {
        let spec = judging.quantity;
        let rules = judging.rules;
        let time = reading.observed_at_ms;
        assert!(
            time > self.previous_time,
            "readings of one station must be sorted by time without repeats"
        );
        self.previous_time = time;
        let overturned =
            !judging.overturned.is_empty() && judging.overturned.binary_search(&reading.id).is_ok();
        match reading.value {
            Some(value) if overturned => {
                self.window.retire_up_to(time - rules.flat_window_ms);
                self.window.push(time, value);
                self.previous_accepted = Some((time, value));
                Verdict::Passed
            }
            None => Verdict::Hard {
                rule: Rule::MissingValue,
                score: None,
                threshold: None,
                gap_ms: None,
                window_readings: None,
            },
            Some(value) => {
                let as_sent = reading.value_as_sent.unwrap_or(value);
                if rules.missing_codes.contains(&as_sent) {
                    Verdict::Hard {
                        rule: Rule::MissingCode,
                        score: None,
                        threshold: None,
                        gap_ms: None,
                        window_readings: None,
                    }
                } else if let Some(verdict) =
                    range_verdict(judging, value, time, &mut self.previous_in_range)
                {
                    verdict
                } else {
                    self.window.retire_up_to(time - rules.flat_window_ms);
                    self.window.push(time, value);
                    flat_line_verdict(spec, rules, &self.window)
                        .or_else(|| step_verdict(spec, value, time, &mut self.previous_accepted))
                        .unwrap_or(Verdict::Passed)
                }
            }
        }
    }
}

/// [`judge_readings`] as the rules define it, each block walked by a chain of its own from the start
/// of the block before it: the reference the faster walk is checked against.
#[cfg(test)]
fn judge_readings_block_by_block(
    judging: &Judging<'_>,
    readings: &[Reading],
    from_ms: i64,
    to_ms: i64,
    out: &mut Vec<Judged>,
) {
    let history = judging.rules.history_ms;
    let mut chain = Chain::default();
    let mut block_from = from_ms;
    while block_from < to_ms {
        let block_start = block_from.div_euclid(history) * history;
        let block_end = block_start.saturating_add(history).min(to_ms);
        let anchor = judging.rules.chain_start(block_from);
        chain.restart();
        for reading in readings
            .iter()
            .filter(|r| r.observed_at_ms >= anchor && r.observed_at_ms < block_end)
        {
            let verdict = chain.judge(judging, reading);
            if reading.observed_at_ms >= block_from {
                out.push(Judged(verdict));
            }
        }
        block_from = block_end;
    }
}

/// The values of a station's interval readings whose verdict satisfies `keep`.
fn interval_values<'a>(
    verdicts: &'a [Judged],
    readings: &'a [Reading],
    keep: impl Fn(&Verdict) -> bool + 'a,
) -> impl Iterator<Item = f64> + 'a {
    verdicts.iter().zip(readings).filter_map(
        move |(Judged(verdict), reading)| {
            if keep(verdict) {
                reading.value
            } else {
                None
            }
        },
    )
}

/// A station's value: the median of `values` (the circular median for directions).
fn station_median(
    spec: &QuantitySpec,
    values: impl Iterator<Item = f64>,
    scratch: &mut Vec<f64>,
) -> Option<f64> {
    scratch.clear();
    scratch.extend(values);
    if spec.circular {
        circular_median(scratch)
    } else {
        median_range_in_place(scratch).map(|range| range.mid)
    }
}

/// The median and floored scale of station values, in the quantity's geometry. Circular values are
/// unwrapped in place around their circular median first.
fn consensus(spec: &QuantitySpec, values: &mut [f64], scratch: &mut Vec<f64>) -> Option<Consensus> {
    if spec.circular {
        let centre = circular_median(values)?;
        for value in values.iter_mut() {
            *value = centre + signed_difference(*value, centre);
        }
    }
    let robust = robust_scale_with(values, spec.min_spread, scratch)?;
    Some(Consensus {
        median: if spec.circular {
            wrap_degrees(robust.median)
        } else {
            robust.median
        },
        scale: robust.scale,
    })
}

/// The signed score of `value` against a consensus.
fn score(spec: &QuantitySpec, consensus: &Consensus, value: f64) -> f64 {
    let difference = if spec.circular {
        signed_difference(value, consensus.median)
    } else {
        value - consensus.median
    };
    difference / consensus.scale
}

/// The `out_of_range` verdict, or `None` when the value is within range (and, for a per-minute
/// quantity, the time becomes the station's previous in-range reading).
fn range_verdict(
    judging: &Judging<'_>,
    value: f64,
    time: i64,
    previous_in_range: &mut Option<i64>,
) -> Option<Verdict> {
    let spec = judging.quantity;
    let (maximum, gap_ms) = if spec.range_per_minute {
        let gap = previous_in_range.map_or(judging.interval_ms, |previous| time - previous);
        (spec.range_max * gap as f64 / MINUTE_MS as f64, Some(gap))
    } else {
        (spec.range_max, None)
    };
    let threshold = if value < spec.range_min {
        spec.range_min
    } else if value > maximum || value.is_nan() {
        maximum
    } else {
        *previous_in_range = Some(time);
        return None;
    };
    Some(Verdict::Hard {
        rule: Rule::OutOfRange,
        score: Some(value),
        threshold: Some(threshold),
        gap_ms,
        window_readings: None,
    })
}

/// The readings of one station that passed the first three rules within the flat-line window, with
/// their running minimum and maximum kept in monotonic queues, so that each reading costs O(1)
/// amortised instead of a scan of the whole window.
#[derive(Debug, Default, PartialEq)]
struct SlidingWindow {
    members: VecDeque<(i64, f64)>,
    /// Decreasing values: the front is the window's maximum.
    maxima: VecDeque<(i64, f64)>,
    /// Increasing values: the front is the window's minimum.
    minima: VecDeque<(i64, f64)>,
}

impl SlidingWindow {
    fn clear(&mut self) {
        self.members.clear();
        self.maxima.clear();
        self.minima.clear();
    }

    /// Drops every reading observed at or before `cutoff` (the window is (t − 60 min, t]).
    fn retire_up_to(&mut self, cutoff: i64) {
        for queue in [&mut self.members, &mut self.maxima, &mut self.minima] {
            while queue.front().is_some_and(|&(time, _)| time <= cutoff) {
                queue.pop_front();
            }
        }
    }

    fn push(&mut self, time: i64, value: f64) {
        self.members.push_back((time, value));
        while self.maxima.back().is_some_and(|&(_, v)| v <= value) {
            self.maxima.pop_back();
        }
        self.maxima.push_back((time, value));
        while self.minima.back().is_some_and(|&(_, v)| v >= value) {
            self.minima.pop_back();
        }
        self.minima.push_back((time, value));
    }

    fn len(&self) -> usize {
        self.members.len()
    }

    /// The lowest and highest value in the window. Directions are unwrapped around the window's
    /// first reading (a scan, since the monotonic queues do not apply on a circle).
    fn extremes(&self, circular: bool) -> (f64, f64) {
        if circular {
            let first = self.members.front().map_or(0.0, |&(_, v)| v);
            self.members.iter().fold(
                (f64::INFINITY, f64::NEG_INFINITY),
                |(low, high), &(_, v)| {
                    let on_line = first + signed_difference(v, first);
                    (low.min(on_line), high.max(on_line))
                },
            )
        } else {
            let low = self.minima.front().map_or(f64::INFINITY, |&(_, v)| v);
            let high = self.maxima.front().map_or(f64::NEG_INFINITY, |&(_, v)| v);
            (low, high)
        }
    }
}

/// The `flat_line` verdict for the newest reading of `window`.
fn flat_line_verdict(
    spec: &QuantitySpec,
    rules: &Rules,
    window: &SlidingWindow,
) -> Option<Verdict> {
    let minimum_variation = spec.flat_line_min_variation?;
    if window.len() < rules.flat_min_readings {
        return None;
    }
    let (low, high) = window.extremes(spec.circular);
    let variation = high - low;
    if variation >= minimum_variation - 1e-9 {
        return None;
    }
    // A window sitting on one end of the range is a legitimate steady state (calm wind, saturated
    // air, darkness), not a stuck sensor: every reading within the minimum variation of that end.
    // Directions have no ends.
    if !spec.circular
        && (high <= spec.range_min + minimum_variation || low >= spec.range_max - minimum_variation)
    {
        return None;
    }
    Some(Verdict::Hard {
        rule: Rule::FlatLine,
        score: Some(variation),
        threshold: Some(minimum_variation),
        gap_ms: None,
        window_readings: Some(window.len() as u32),
    })
}

/// The step test against the previous reading that passed steps 1 and 2; a reading that passes
/// becomes the new previous one.
fn step_verdict(
    spec: &QuantitySpec,
    value: f64,
    time: i64,
    previous_accepted: &mut Option<(i64, f64)>,
) -> Option<Verdict> {
    if let (Some(step), Some((previous_time, previous_value))) = (spec.step, *previous_accepted) {
        let gap_ms = time - previous_time;
        if let Some(limit) = step.limit_for_gap(gap_ms) {
            let change = if spec.circular {
                signed_difference(value, previous_value).abs()
            } else {
                (value - previous_value).abs()
            };
            if change > limit {
                return Some(Verdict::StepSuspect {
                    change,
                    limit,
                    gap_ms,
                });
            }
        }
    }
    *previous_accepted = Some((time, value));
    None
}

/// The set-aside record of one interval reading, if it was set aside.
fn record_for(
    reading: &Reading,
    station: u32,
    verdict: Verdict,
    work: &StationWork,
    cross: Option<Consensus>,
    rules: &Rules,
) -> Option<SetAside> {
    let mut record = SetAside {
        reading_id: reading.id,
        station,
        observed_at_ms: reading.observed_at_ms,
        value: reading.value,
        value_as_sent: reading.value_as_sent,
        rule: Rule::FarFromConsensus,
        score: None,
        threshold: None,
        consensus_median: None,
        consensus_spread: None,
        gap_ms: None,
        window_readings: None,
        station_value: None,
    };
    match verdict {
        Verdict::StepSuspect { .. } => return None,
        Verdict::Hard {
            rule,
            score,
            threshold,
            gap_ms,
            window_readings,
        } => {
            record.rule = rule;
            record.score = score;
            record.threshold = threshold;
            record.gap_ms = gap_ms;
            record.window_readings = window_readings;
        }
        Verdict::StepSetAside {
            change,
            limit,
            gap_ms,
            median,
            scale,
        } => {
            record.rule = Rule::Step;
            record.score = Some(change);
            record.threshold = Some(limit);
            record.gap_ms = Some(gap_ms);
            record.consensus_median = median;
            record.consensus_spread = scale;
        }
        Verdict::Passed => {
            if !work.far {
                return None;
            }
            let cross = cross.expect("a far station implies a cross-station test");
            record.rule = Rule::FarFromConsensus;
            record.score = work.score;
            record.threshold = Some(rules.far_limit);
            record.consensus_median = Some(cross.median);
            record.consensus_spread = Some(cross.scale);
            record.station_value = work.value;
        }
    }
    Some(record)
}

#[cfg(test)]
mod tests {
    //! The one-walk judgement of [`judge_readings`] against the rules' definition, each history
    //! block walked by a chain of its own ([`judge_readings_block_by_block`]). A property of our own
    //! design, checked on random series with planted faults.

    use super::*;
    use crate::checks::default_quantities;
    use proptest::prelude::*;

    use crate::checks::planted_faults::{minute_kind, series, MINUTE, T0};

    proptest! {
        #![proptest_config(ProptestConfig::with_cases(256))]

        #[test]
        fn one_walk_judges_as_each_block_on_its_own(
            kinds in prop::collection::vec(minute_kind(), 0..900),
            quantity in prop::sample::select(vec!["air_temperature", "precipitation", "wind_direction", "relative_humidity"]),
            step_minutes in prop::sample::select(vec![1i64, 2, 5]),
            base in prop::sample::select(vec![0.0f64, 15.0, 99.95, 359.0]),
            overturns in prop::collection::vec(0u64..900, 0..6),
            from_minute in -200i64..1500,
            length_minutes in 0i64..1500,
            history_minutes in prop::sample::select(vec![60i64, 180, 45]),
        ) {
            let spec = default_quantities().into_iter().find(|q| q.key == quantity).unwrap();
            let rules = Rules { history_ms: history_minutes * MINUTE, ..Rules::default() };
            let mut overturned = overturns;
            overturned.sort_unstable();
            overturned.dedup();
            let judging = Judging { quantity: &spec, rules: &rules, interval_ms: 10 * MINUTE, overturned: &overturned };
            let series = series(&kinds, 0, step_minutes, base);
            let from = T0 + from_minute * MINUTE;
            let to = from + length_minutes * MINUTE;
            let (mut fast, mut reference) = (Vec::new(), Vec::new());
            // Chains left over from another station must not matter: judge one first.
            let mut chains: [Chain; 2] = Default::default();
            judge_readings(&mut chains, &judging, &series[..series.len() / 2], T0, T0 + 600 * MINUTE, &mut Vec::new());
            judge_readings(&mut chains, &judging, &series, from, to, &mut fast);
            judge_readings_block_by_block(&judging, &series, from, to, &mut reference);
            prop_assert_eq!(fast, reference);
        }
    }
}
