//! The checks of a decoded batch that need the configuration and the database: does the station
//! exist, is the quantity in the table, does the unit convert to the quantity's canonical unit. Both
//! `POST /v1/readings` and `consensor import` go through [`resolve_readings`], so a reading refused
//! by one is refused by the other with the same field and reason.

use consensor_core::units;
use consensor_store::NewReading;

use super::{DecodedReading, FieldError};
use crate::config::Config;

/// The distinct station keys of a decoded batch, sorted: what `Store::station_keys_lookup` needs.
pub fn station_keys(readings: &[(usize, DecodedReading)]) -> Vec<String> {
    let mut keys: Vec<String> = readings.iter().map(|(_, r)| r.station.clone()).collect();
    keys.sort();
    keys.dedup();
    keys
}

/// Turns decoded readings into readings to store, converting each value to its quantity's canonical
/// unit and keeping the value and unit as sent beside it. Every reading whose station is not known
/// (`station_exists` says no), whose quantity is not in the configuration's table or whose unit does
/// not convert is left out and listed in `errors` under its index, by field and reason. The caller
/// stores nothing unless `errors` is empty (a batch is atomic, API.md "Ingest").
pub fn resolve_readings(
    decoded: Vec<(usize, DecodedReading)>,
    station_exists: impl Fn(&str) -> bool,
    config: &Config,
    errors: &mut Vec<FieldError>,
) -> Vec<NewReading> {
    let mut readings = Vec::with_capacity(decoded.len());
    for (index, reading) in decoded {
        let mut bad = |field: &str, reason: String| {
            errors.push(FieldError {
                index,
                field: field.into(),
                reason,
            })
        };
        if !station_exists(&reading.station) {
            bad("station", format!("unknown station {:?}", reading.station));
        }
        let Some(spec) = config.quantity(&reading.quantity) else {
            bad(
                "quantity",
                format!("unknown quantity {:?}", reading.quantity),
            );
            continue;
        };
        let value = match (reading.value, reading.unit.as_deref()) {
            (None, _) => None,
            (Some(value), None) => Some(value),
            (Some(value), Some(unit)) => match units::convert(value, unit, &spec.unit) {
                Ok(converted) => Some(converted),
                Err(error) => {
                    bad("unit", error.to_string());
                    continue;
                }
            },
        };
        readings.push(NewReading {
            station: reading.station,
            quantity: reading.quantity,
            observed_at_ms: reading.observed_at_ms,
            value,
            value_as_sent: reading.value,
            unit_as_sent: reading.unit,
        });
    }
    readings
}
