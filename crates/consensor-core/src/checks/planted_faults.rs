//! Test support, compiled only into tests: random station series with planted faults (nulls,
//! missing codes, stuck stretches, jumps, level shifts, gaps). Shared by the unit tests of
//! `interval.rs` and the `batching` integration test, which includes this file with `#[path]`; the
//! including module must have `Reading` in scope.

use super::Reading;
use proptest::prelude::*;

pub const MINUTE: i64 = 60_000;
/// 2026-06-01T07:04:00Z in epoch milliseconds: deliberately not on a history-block boundary.
pub const T0: i64 = 1_780_297_440_000;

/// What a station sent in one minute.
#[derive(Debug, Clone, Copy)]
pub enum Minute {
    Absent,
    Null,
    Code,
    /// Stuck on the previous value.
    Stuck,
    /// A jump of this many tenths of a degree from the smooth course.
    Jump(i32),
    /// The course moves for good by this many tenths of a degree (a sensor swapped or recalibrated):
    /// a chain that starts before the move sets the new level aside as steps for as long as no gap
    /// breaks the chain, one that starts after it does not.
    Shift(i32),
    Normal,
}

pub fn minute_kind() -> impl Strategy<Value = Minute> {
    prop_oneof![
        40 => Just(Minute::Normal),
        3 => Just(Minute::Absent),
        1 => Just(Minute::Null),
        1 => Just(Minute::Code),
        6 => Just(Minute::Stuck),
        2 => (-80i32..80).prop_map(Minute::Jump),
        1 => prop_oneof![(-90i32..-40), (40i32..90)].prop_map(Minute::Shift),
    ]
}

/// One station's readings from its minute kinds: the n-th kind is observed at
/// `T0 + n * step_minutes` minutes with id `first_id + n`, around a smooth course from `level`.
pub fn series(kinds: &[Minute], first_id: u64, step_minutes: i64, level: f64) -> Vec<Reading> {
    let mut readings = Vec::new();
    let (mut level, mut last) = (level, level);
    for (index, kind) in kinds.iter().enumerate() {
        if let Minute::Shift(tenths) = *kind {
            level += f64::from(tenths) / 10.0;
        }
        let smooth = level + (index as f64 / 40.0).sin() * 2.0;
        let value = match *kind {
            Minute::Absent => continue,
            Minute::Null => None,
            Minute::Code => Some(-999.0),
            Minute::Stuck => Some(last),
            Minute::Jump(tenths) => Some(smooth + f64::from(tenths) / 10.0),
            Minute::Normal | Minute::Shift(_) => Some(smooth),
        };
        if let Some(value) = value.filter(|&v| v != -999.0) {
            last = value;
        }
        readings.push(Reading {
            id: first_id + index as u64,
            observed_at_ms: T0 + index as i64 * step_minutes * MINUTE,
            value,
            value_as_sent: value,
        });
    }
    readings
}
