//! The core benchmark: the selection median against a sorting median, and the whole interval
//! decision against a sort-based median-of-medians baseline, on the same data in the same run.

use std::alloc::System;
use std::hint::black_box;
use std::time::{Duration, Instant};

use consensor_core::checks::{
    default_quantities, IntervalInput, IntervalOutcome, IntervalScreen, Reading, Rules,
    StationReadings,
};
use consensor_core::stats::median_range_in_place;
use stats_alloc::{Region, StatsAlloc};

use crate::machine;
use crate::synthetic::{area_interval, uniform_values, SplitMix};

pub fn run(quick: bool, allocator: &'static StatsAlloc<System>) -> anyhow::Result<()> {
    println!("machine: {}", machine::describe());
    println!(
        "build: {}",
        if cfg!(debug_assertions) {
            "debug (use --release for real figures)"
        } else {
            "release"
        }
    );
    println!();
    median_benchmark(quick);
    println!();
    interval_benchmark(quick, allocator);
    println!();
    if let Some(peak) = machine::peak_rss_mib() {
        println!("peak resident memory of the whole run: {peak:.1} MiB");
    }
    Ok(())
}

/// Selection (`select_nth_unstable_by`, O(n)) against `sort_unstable_by` (O(n log n)) on the same
/// uniform data; both include copying the data into a reused buffer, as the worker does.
fn median_benchmark(quick: bool) {
    let sizes: &[usize] = if quick {
        &[1_000, 10_000, 100_000, 1_000_000]
    } else {
        &[1_000, 10_000, 100_000, 1_000_000, 10_000_000]
    };
    let budget_elements = if quick { 4_000_000 } else { 40_000_000 };
    println!("median of n values: selection vs sorting (same data, same run)");
    println!(
        "{:>10} {:>6} {:>14} {:>14} {:>16}",
        "n", "reps", "select ns/val", "sort ns/val", "sort / select"
    );
    let mut rng = SplitMix::new(0x5EED);
    let mut data = Vec::new();
    let mut buffer = Vec::new();
    for &n in sizes {
        uniform_values(&mut rng, n, &mut data);
        let reps = (budget_elements / n).max(3);
        let selection = time_reps(reps, || {
            buffer.clear();
            buffer.extend_from_slice(&data);
            black_box(median_range_in_place(&mut buffer));
        });
        let sorting = time_reps(reps, || {
            buffer.clear();
            buffer.extend_from_slice(&data);
            buffer.sort_unstable_by(f64::total_cmp);
            black_box((buffer[(n - 1) / 2], buffer[n / 2]));
        });
        let per_value = |d: Duration| d.as_nanos() as f64 / (reps * n) as f64;
        println!(
            "{:>10} {:>6} {:>14.2} {:>14.2} {:>15.2}x",
            n,
            reps,
            per_value(selection),
            per_value(sorting),
            sorting.as_secs_f64() / selection.as_secs_f64()
        );
    }
}

fn time_reps(reps: usize, mut work: impl FnMut()) -> Duration {
    // One untimed run warms caches and buffers.
    work();
    let start = Instant::now();
    for _ in 0..reps {
        work();
    }
    start.elapsed()
}

/// The whole decision of one 10-minute interval per area (50 stations, one reading a minute, an hour
/// of history each) against the simplest possible consensus on the same readings: per station a
/// sort-based median of its interval values, then a sort-based median of those. Data generation is
/// not timed.
fn interval_benchmark(quick: bool, allocator: &'static StatsAlloc<System>) {
    let areas = if quick { 500 } else { 10_000 };
    let stations = 50;
    let history_minutes = 60;
    let spec = default_quantities()
        .into_iter()
        .find(|q| q.key == "air_temperature")
        .expect("built-in quantity");
    let rules = Rules::default();
    let start_ms = 1_780_297_200_000;
    let mut rng = SplitMix::new(0xA7EA);
    let mut series: Vec<Vec<Reading>> = Vec::new();
    let mut screen = IntervalScreen::default();
    let mut outcome = IntervalOutcome::default();
    let mut baseline_buffer = Vec::new();
    let mut station_medians = Vec::new();
    let mut full = Duration::ZERO;
    let mut baseline = Duration::ZERO;
    let mut allocations_in_loop = 0usize;
    let mut set_aside_total = 0usize;
    let warm_up = 10;
    for area in 0..areas + warm_up {
        area_interval(&mut rng, stations, start_ms, history_minutes, &mut series);
        let inputs: [StationReadings<'_>; 50] = std::array::from_fn(|i| StationReadings {
            station: i as u32,
            readings: &series[i],
        });
        let input = IntervalInput {
            quantity: &spec,
            rules: &rules,
            start_ms,
            end_ms: start_ms + 600_000,
            stations: &inputs[..stations],
            overturned: &[],
        };
        let region = Region::new(allocator);
        let began = Instant::now();
        screen.screen(&input, &mut outcome);
        let elapsed = began.elapsed();
        let allocations = region.change().allocations + region.change().reallocations;
        black_box(&outcome);

        let began = Instant::now();
        station_medians.clear();
        for readings in &series {
            baseline_buffer.clear();
            baseline_buffer.extend(
                readings
                    .iter()
                    .filter(|r| r.observed_at_ms >= start_ms)
                    .filter_map(|r| r.value),
            );
            baseline_buffer.sort_unstable_by(f64::total_cmp);
            let n = baseline_buffer.len();
            station_medians.push((baseline_buffer[(n - 1) / 2] + baseline_buffer[n / 2]) / 2.0);
        }
        station_medians.sort_unstable_by(f64::total_cmp);
        black_box(station_medians[station_medians.len() / 2]);
        let baseline_elapsed = began.elapsed();

        if area >= warm_up {
            full += elapsed;
            baseline += baseline_elapsed;
            allocations_in_loop += allocations;
            set_aside_total += outcome.set_aside.len();
        }
    }
    let readings_per_area = stations * (history_minutes as usize + 10);
    println!(
        "interval decision: {areas} areas x {stations} stations x 10 readings (+{history_minutes} min of history each)"
    );
    println!(
        "  full decision (all rules, Point):        {:>9.1} us/area  {:>6.1} ns/reading",
        full.as_secs_f64() * 1e6 / areas as f64,
        full.as_secs_f64() * 1e9 / (areas * readings_per_area) as f64
    );
    println!(
        "  baseline (sort median of sort medians):  {:>9.1} us/area",
        baseline.as_secs_f64() * 1e6 / areas as f64
    );
    println!(
        "  ratio full / baseline: {:.2}x   areas per second per core (full): {:.0}",
        full.as_secs_f64() / baseline.as_secs_f64(),
        areas as f64 / full.as_secs_f64()
    );
    println!(
        "  allocations inside the timed loop after warm-up: {allocations_in_loop} ({:.3} per area); set-aside records: {set_aside_total}",
        allocations_in_loop as f64 / areas as f64
    );
}
