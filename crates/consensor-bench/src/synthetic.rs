//! Synthetic benchmark data from a small seeded generator (not demo data: the benchmark only needs
//! realistic shapes, and the same seed gives the same data on every run).

use consensor_core::checks::Reading;

/// SplitMix64 (Steele, Lea & Flood 2014): tiny, fast, and good enough for benchmark inputs.
pub struct SplitMix(u64);

impl SplitMix {
    pub fn new(seed: u64) -> Self {
        SplitMix(seed)
    }

    pub fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform in [0, 1).
    pub fn unit(&mut self) -> f64 {
        (self.next_u64() >> 11) as f64 / (1u64 << 53) as f64
    }
}

/// Fills `out` with `count` uniform values in [−50, 50).
pub fn uniform_values(rng: &mut SplitMix, count: usize, out: &mut Vec<f64>) {
    out.clear();
    out.extend((0..count).map(|_| rng.unit() * 100.0 - 50.0));
}

/// One area's air temperatures for one 10-minute interval with an hour of history before it:
/// `stations` series of one reading a minute, a shared slow trend plus per-station noise, with a few
/// planted faults (a missing-data code, a station reading high, a stuck sensor) so every rule runs.
pub fn area_interval(
    rng: &mut SplitMix,
    stations: usize,
    start_ms: i64,
    minutes_of_history: i64,
    series: &mut Vec<Vec<Reading>>,
) {
    series.resize_with(stations, Vec::new);
    let base = 10.0 + rng.unit() * 10.0;
    let mut id = 0u64;
    for (index, readings) in series.iter_mut().enumerate() {
        readings.clear();
        let offset = (rng.unit() - 0.5) * 0.6 + if index == 1 { 5.0 } else { 0.0 };
        for minute in -minutes_of_history..10 {
            id += 1;
            let trend = 0.02 * minute as f64;
            let noise = (rng.unit() - 0.5) * 0.4;
            let value = match index {
                0 if minute % 7 == 0 => -999.0,
                2 => 14.2,
                _ => base + trend + offset + noise,
            };
            readings.push(Reading {
                id,
                observed_at_ms: start_ms + minute * 60_000,
                value: Some(value),
                value_as_sent: Some(value),
            });
        }
    }
}
