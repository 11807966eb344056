//! The quantity table: units, plausible ranges, step limits, flat-line minimum variation and the
//! resolution floor of the cross-station scale, with where each figure comes from.

/// Step limits for one quantity: the largest change allowed between consecutive readings of one
/// station one minute apart, and one hour apart. Gaps in between are interpolated in log–log; no step
/// test is made across a gap longer than an hour (API.md, "How an interval is decided", step 2).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct StepLimits {
    pub one_minute: f64,
    pub one_hour: f64,
}

/// Milliseconds in one minute.
pub const MINUTE_MS: i64 = 60_000;
/// Milliseconds in one hour.
pub const HOUR_MS: i64 = 3_600_000;

impl StepLimits {
    /// The limit for a gap of `gap_ms` milliseconds, or `None` when the gap is longer than an hour
    /// (no step test then). Up to a minute the one-minute figure applies; between a minute and an hour
    /// log(limit) is linear in log(gap). The WMO figures are for consecutive one-minute values
    /// (REFERENCE.md §4); interpolating towards the hourly GDPS tolerance for sparser reports is our
    /// own choice, documented in API.md.
    pub fn limit_for_gap(&self, gap_ms: i64) -> Option<f64> {
        if gap_ms > HOUR_MS {
            return None;
        }
        if gap_ms <= MINUTE_MS {
            return Some(self.one_minute);
        }
        let fraction = (gap_ms as f64 / MINUTE_MS as f64).ln() / 60f64.ln();
        let log_limit =
            self.one_minute.ln() + fraction * (self.one_hour.ln() - self.one_minute.ln());
        Some(log_limit.exp())
    }
}

/// Everything the checks need to know about one quantity.
#[derive(Debug, Clone, PartialEq)]
pub struct QuantitySpec {
    /// The quantity's id in the API, e.g. `air_temperature`.
    pub key: String,
    /// The canonical unit as a case-sensitive UCUM code, e.g. `Cel`.
    pub unit: String,
    /// The inclusive plausible range in the canonical unit. For a per-minute quantity the upper limit
    /// is per minute of the gap (see `range_per_minute`).
    pub range_min: f64,
    pub range_max: f64,
    /// Precipitation: the upper limit is `range_max` per minute of the gap since the station's
    /// previous reading that passed, or per minute of the area's interval for its first one.
    pub range_per_minute: bool,
    /// Step limits, or `None` for no step test.
    pub step: Option<StepLimits>,
    /// The minimum variation expected over 60 minutes, or `None` for no flat-line test.
    pub flat_line_min_variation: Option<f64>,
    /// The floor of the cross-station scale (our own choice per quantity, about the resolution and
    /// siting noise of field sensors), so identical station values never make a zero scale.
    pub min_spread: f64,
    /// Directions in degrees: differences are angular and the consensus is the circular median.
    pub circular: bool,
}

/// A quantity table that does not make sense.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("quantity {quantity:?}: field {field}: {reason}")]
pub struct QuantitySpecError {
    pub quantity: String,
    pub field: &'static str,
    pub reason: String,
}

impl QuantitySpec {
    /// Checks the spec's invariants, naming the field at fault.
    pub fn validate(&self) -> Result<(), QuantitySpecError> {
        let fail = |field: &'static str, reason: String| QuantitySpecError {
            quantity: self.key.clone(),
            field,
            reason,
        };
        if !crate::ids::is_valid_id(&self.key) {
            return Err(fail(
                "key",
                "must be 1-64 characters of A-Z a-z 0-9 . _ -".into(),
            ));
        }
        if self.unit.is_empty() {
            return Err(fail("unit", "must not be empty".into()));
        }
        if !(self.range_min.is_finite()
            && self.range_max.is_finite()
            && self.range_min < self.range_max)
        {
            return Err(fail(
                "range",
                format!(
                    "minimum {} must be below maximum {}, both finite",
                    self.range_min, self.range_max
                ),
            ));
        }
        if let Some(step) = self.step {
            if !(step.one_minute > 0.0
                && step.one_hour >= step.one_minute
                && step.one_hour.is_finite())
            {
                return Err(fail(
                    "step",
                    format!(
                        "one-minute limit {} must be positive and no larger than the one-hour limit {}",
                        step.one_minute, step.one_hour
                    ),
                ));
            }
        }
        if let Some(variation) = self.flat_line_min_variation {
            if !(variation > 0.0 && variation.is_finite()) {
                return Err(fail(
                    "flat_line_min_variation",
                    format!("{variation} must be positive"),
                ));
            }
        }
        if !(self.min_spread > 0.0 && self.min_spread.is_finite()) {
            return Err(fail(
                "min_spread",
                format!("{} must be positive", self.min_spread),
            ));
        }
        Ok(())
    }
}

/// The missing-data codes every quantity recognises by default, compared with the value as sent
/// (API.md). -999, -9999 and 9999 are common practice in station data; -7999 is a code seen in a
/// network's trouble tickets (REFERENCE.md §5, [READ]).
pub const DEFAULT_MISSING_CODES: [f64; 4] = [-999.0, -9999.0, -7999.0, 9999.0];

/// The built-in quantity table of API.md.
///
/// Sources, figure by figure:
/// - plausible ranges and one-minute steps, and the flat-line minimum variations: the commonly quoted
///   WMO automatic-station QC guidelines (Zahumenský 2004, WMO-No. 8), **from memory** (REFERENCE.md
///   §4 could not read the tables; the numbers match independent secondary transcriptions);
/// - one-hour steps of air temperature, dew point and pressure: the WMO GDPS time-consistency table
///   (WMO-No. 305, VI.21), [SECONDARY] in REFERENCE.md §4;
/// - every other one-hour step, the particulate ranges and every `min_spread`: our own choice.
pub fn default_quantities() -> Vec<QuantitySpec> {
    #[allow(clippy::too_many_arguments)]
    fn spec(
        key: &str,
        unit: &str,
        range: (f64, f64),
        step: Option<(f64, f64)>,
        flat: Option<f64>,
        min_spread: f64,
        range_per_minute: bool,
        circular: bool,
    ) -> QuantitySpec {
        QuantitySpec {
            key: key.into(),
            unit: unit.into(),
            range_min: range.0,
            range_max: range.1,
            range_per_minute,
            step: step.map(|(one_minute, one_hour)| StepLimits {
                one_minute,
                one_hour,
            }),
            flat_line_min_variation: flat,
            min_spread,
            circular,
        }
    }
    vec![
        spec(
            "air_temperature",
            "Cel",
            (-80.0, 60.0),
            Some((3.0, 4.0)),
            Some(0.1),
            0.5,
            false,
            false,
        ),
        spec(
            "dew_point",
            "Cel",
            (-80.0, 35.0),
            Some((2.0, 4.0)),
            Some(0.1),
            0.5,
            false,
            false,
        ),
        spec(
            "relative_humidity",
            "%",
            (0.0, 100.0),
            Some((10.0, 25.0)),
            Some(1.0),
            3.0,
            false,
            false,
        ),
        spec(
            "air_pressure",
            "hPa",
            (500.0, 1100.0),
            Some((0.5, 3.0)),
            Some(0.1),
            0.5,
            false,
            false,
        ),
        spec(
            "wind_speed",
            "m/s",
            (0.0, 75.0),
            Some((20.0, 20.0)),
            Some(0.5),
            1.0,
            false,
            false,
        ),
        spec(
            "wind_direction",
            "deg",
            (0.0, 360.0),
            None,
            Some(10.0),
            20.0,
            false,
            true,
        ),
        spec(
            "precipitation",
            "mm",
            (0.0, 40.0),
            None,
            None,
            0.5,
            true,
            false,
        ),
        spec(
            "solar_irradiance",
            "W/m2",
            (0.0, 1600.0),
            Some((800.0, 800.0)),
            None,
            50.0,
            false,
            false,
        ),
        spec(
            "pm2_5",
            "ug/m3",
            (0.0, 1000.0),
            None,
            None,
            2.0,
            false,
            false,
        ),
        spec(
            "pm10",
            "ug/m3",
            (0.0, 2000.0),
            None,
            None,
            3.0,
            false,
            false,
        ),
    ]
}

#[cfg(test)]
mod tests {
    use super::*;

    fn table() -> Vec<QuantitySpec> {
        default_quantities()
    }

    fn find(key: &str) -> QuantitySpec {
        table().into_iter().find(|q| q.key == key).unwrap()
    }

    #[test]
    fn default_table_is_valid_and_matches_the_api_table() {
        for quantity in table() {
            quantity.validate().unwrap();
        }
        // API.md quantity table (the WMO-guideline figures, from memory per REFERENCE.md §4).
        let air = find("air_temperature");
        assert_eq!((air.range_min, air.range_max), (-80.0, 60.0));
        assert_eq!(
            air.step,
            Some(StepLimits {
                one_minute: 3.0,
                one_hour: 4.0
            })
        );
        assert_eq!(air.flat_line_min_variation, Some(0.1));
        assert_eq!(find("precipitation").flat_line_min_variation, None);
        assert_eq!(find("solar_irradiance").flat_line_min_variation, None);
        assert!(find("wind_direction").circular);
        assert!(find("precipitation").range_per_minute);
        assert_eq!(table().len(), 10);
    }

    #[test]
    fn step_limit_interpolates_in_log_log() {
        let air = find("air_temperature").step.unwrap();
        // At and under one minute: the one-minute figure (WMO step for 1-min data, from memory).
        assert_eq!(air.limit_for_gap(30_000), Some(3.0));
        assert_eq!(air.limit_for_gap(MINUTE_MS), Some(3.0));
        // At one hour: the GDPS hourly tolerance (4 °C, REFERENCE.md §4 [SECONDARY]).
        assert!((air.limit_for_gap(HOUR_MS).unwrap() - 4.0).abs() < 1e-12);
        // Past an hour: no test.
        assert_eq!(air.limit_for_gap(HOUR_MS + 1), None);
        // Halfway in log time (√60 ≈ 7.746 min) the limit is the geometric mean √(3·4) = 3.4641.
        let halfway_ms = (60f64.sqrt() * MINUTE_MS as f64).round() as i64;
        assert!((air.limit_for_gap(halfway_ms).unwrap() - 12f64.sqrt()).abs() < 1e-6);
        // 10 minutes: exp(ln 3 + ln(10)/ln(60)·ln(4/3)) = 3.5268300562570047 (Python 3.11 `math`).
        let ten = air.limit_for_gap(10 * MINUTE_MS).unwrap();
        assert!((ten - 3.5268300562570047).abs() < 1e-12, "{ten}");
    }

    #[test]
    fn invalid_specs_name_the_field() {
        let mut bad = find("air_temperature");
        bad.range_max = -100.0;
        assert_eq!(bad.validate().unwrap_err().field, "range");
        let mut bad = find("air_temperature");
        bad.min_spread = 0.0;
        assert_eq!(bad.validate().unwrap_err().field, "min_spread");
        let mut bad = find("air_temperature");
        bad.key = "air temperature".into();
        assert_eq!(bad.validate().unwrap_err().field, "key");
    }
}
