//! The invented demo network and its readings, from our own seeded generator.
//!
//! Everything here is made up: the three areas, their forty stations, their climate and the faults
//! planted in them. A reading is a pure function of (seed, station, quantity, minute): the slow
//! weather of an area and a station's own small fluctuations come from value noise (Gaussian values
//! at fixed knots, smoothly interpolated), and the per-minute sensor noise from a counter-based hash.
//! That makes any hour of data cheap to produce on its own, so the demo can feed hour after hour
//! without holding days of readings in memory, and the same seed always gives the same readings.

use consensor_core::checks::Rule;
use consensor_store::{NewArea, NewReading, NewStation};

/// Milliseconds in a minute, an hour and a day.
pub const MINUTE_MS: i64 = 60_000;
pub const HOUR_MS: i64 = 60 * MINUTE_MS;
pub const DAY_MS: i64 = 24 * HOUR_MS;

/// The scenario's local time is UTC+01:00: the diurnal cycles follow the local sun, and the planted
/// faults are described in local hours where the sun matters.
pub const LOCAL_OFFSET_MS: i64 = HOUR_MS;

/// The length of every demo area's consensus interval (10 minutes).
pub const INTERVAL_MS: i64 = 10 * MINUTE_MS;

/// The seed used when the command line gives none.
pub const DEFAULT_SEED: u64 = 20_260_601;

/// How much the drifting humidity sensor drifts, in percentage points per day.
pub const HUMIDITY_DRIFT_PER_DAY: f64 = 1.5;

/// How long before the end the late station's readings are held back.
pub const LATE_SPAN_MS: i64 = 3 * HOUR_MS;

/// SplitMix64 (Steele, Lea & Flood 2014): a tiny seeded generator, plenty for invented data. The
/// same mixing function also serves as the counter-based hash behind the per-minute noise.
#[derive(Debug, Clone)]
pub struct SplitMix(u64);

impl SplitMix {
    pub fn new(seed: u64) -> SplitMix {
        SplitMix(seed)
    }

    pub fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        mix(self.0)
    }

    /// Uniform in [0, 1).
    pub fn unit(&mut self) -> f64 {
        to_unit(self.next_u64())
    }

    /// Standard normal (Box–Muller).
    pub fn gaussian(&mut self) -> f64 {
        box_muller(self.next_u64(), self.next_u64())
    }
}

/// The quantities the demo stations measure.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Quantity {
    AirTemperature,
    RelativeHumidity,
    AirPressure,
    WindSpeed,
    WindDirection,
    Pm25,
}

impl Quantity {
    pub const ALL: [Quantity; 6] = [
        Quantity::AirTemperature,
        Quantity::RelativeHumidity,
        Quantity::AirPressure,
        Quantity::WindSpeed,
        Quantity::WindDirection,
        Quantity::Pm25,
    ];

    /// The quantity's key in the API's quantity table.
    pub fn key(self) -> &'static str {
        match self {
            Quantity::AirTemperature => "air_temperature",
            Quantity::RelativeHumidity => "relative_humidity",
            Quantity::AirPressure => "air_pressure",
            Quantity::WindSpeed => "wind_speed",
            Quantity::WindDirection => "wind_direction",
            Quantity::Pm25 => "pm2_5",
        }
    }

    /// The canonical unit (UCUM), in which the demo stations send their values.
    pub fn unit(self) -> &'static str {
        match self {
            Quantity::AirTemperature => "Cel",
            Quantity::RelativeHumidity => "%",
            Quantity::AirPressure => "hPa",
            Quantity::WindSpeed => "m/s",
            Quantity::WindDirection => "deg",
            Quantity::Pm25 => "ug/m3",
        }
    }

    fn index(self) -> u64 {
        self as u64
    }
}

/// One invented area and the climate its readings follow.
#[derive(Debug, Clone, PartialEq)]
pub struct DemoArea {
    pub key: &'static str,
    pub name: &'static str,
    /// The prefix of its station ids.
    pub code: &'static str,
    /// A sentence for the printed summary.
    pub description: &'static str,
    climate: Climate,
}

/// The parameters of an area's weather.
#[derive(Debug, Clone, Copy, PartialEq)]
struct Climate {
    temperature_mean: f64,
    /// Half the mean daily temperature range.
    temperature_amplitude: f64,
    humidity_mean: f64,
    pressure_shift: f64,
    wind_base: f64,
    /// How much the afternoon's mixing adds to the wind speed.
    wind_daytime_gain: f64,
    prevailing_direction: f64,
    pm_base: f64,
    /// The height of the morning rush-hour bump in pm2_5.
    pm_rush: f64,
    elevation_m: f64,
}

/// One invented station.
#[derive(Debug, Clone, PartialEq)]
pub struct DemoStation {
    pub key: String,
    pub name: String,
    /// Index into [`Scenario::areas`].
    pub area: usize,
    pub elevation_m: f64,
    /// What it measures, in [`Quantity::ALL`] order.
    pub quantities: Vec<Quantity>,
    /// Its place in the scenario, which names its noise streams.
    index: usize,
    temperature_offset: f64,
    humidity_offset: f64,
    pressure_offset: f64,
    wind_exposure: f64,
    direction_offset: f64,
    pm_factor: f64,
    defect: Defect,
}

/// What is wrong with a station, as the generator applies it.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Defect {
    Healthy,
    /// The sensor failed and the logger sends -999 for the quantity in [from, to).
    MissingCode {
        quantity: Quantity,
        from_ms: i64,
        to_ms: i64,
    },
    /// The logger repeats the value it had at `from_ms` until `to_ms`.
    Stuck {
        quantity: Quantity,
        from_ms: i64,
        to_ms: i64,
    },
    /// The radiation shield is in direct sun every afternoon from 12:00 to 17:00 local time.
    AfternoonSun {
        quantity: Quantity,
        peak: f64,
    },
    /// The sensor reads higher by `per_day` for every day since `from_ms`.
    Drift {
        quantity: Quantity,
        from_ms: i64,
        per_day: f64,
    },
    /// Someone heats the sensor for a few minutes: these are the excess values, one a minute.
    Tampering {
        quantity: Quantity,
        from_ms: i64,
        excess: [f64; 4],
    },
    /// The logger's clock runs this many milliseconds behind, for every quantity.
    ClockBehind {
        behind_ms: i64,
    },
    /// The station's readings from `from_ms` on arrive late, in a second delivery.
    Late {
        from_ms: i64,
    },
}

/// The kinds of fault the demo plants.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FaultKind {
    MissingCode,
    Stuck,
    AfternoonSun,
    Drift,
    Tampering,
    ClockBehind,
    Late,
}

impl FaultKind {
    /// A short description for the printed table.
    pub fn label(self) -> &'static str {
        match self {
            FaultKind::MissingCode => "failed sensor sends -999",
            FaultKind::Stuck => "stuck sensor repeats one value",
            FaultKind::AfternoonSun => "sensor in direct afternoon sun",
            FaultKind::Drift => "humidity sensor drifting upwards",
            FaultKind::Tampering => "tampering: sensor heated for 4 minutes",
            FaultKind::ClockBehind => "logger clock one hour behind",
            FaultKind::Late => "last hours delivered late",
        }
    }
}

/// What an operator should see for a planted fault.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Expectation {
    /// Readings set aside by this rule.
    SetAside(Rule),
    /// A positive drift in the station health report (the readings stay within the consensus).
    HealthDrift,
    /// The intervals the late readings fall in get a new revision.
    NewRevision,
}

impl Expectation {
    pub fn label(self) -> String {
        match self {
            Expectation::SetAside(rule) => rule.as_str().to_owned(),
            Expectation::HealthDrift => "health: drift > 0".to_owned(),
            Expectation::NewRevision => "revision 2".to_owned(),
        }
    }
}

/// One planted fault, as the demo prints it and the tests check it.
#[derive(Debug, Clone, PartialEq)]
pub struct PlantedFault {
    pub station: String,
    /// The quantity affected; `None` when it is every quantity the station measures.
    pub quantity: Option<Quantity>,
    pub kind: FaultKind,
    /// The stretch `[from_ms, to_ms)` of observation times in which the fault shows.
    pub from_ms: i64,
    pub to_ms: i64,
    pub expected: Expectation,
    /// What happened, in a sentence, with where to look.
    pub note: String,
}

/// The whole invented scenario: network, time span and planted faults.
#[derive(Debug, Clone)]
pub struct Scenario {
    pub seed: u64,
    /// The readings are observed in `[start_ms, end_ms)`, one a minute.
    pub start_ms: i64,
    pub end_ms: i64,
    pub areas: Vec<DemoArea>,
    pub stations: Vec<DemoStation>,
    pub faults: Vec<PlantedFault>,
    /// The synoptic pressure wave's phase, drawn from the seed.
    pressure_phase: f64,
}

impl Scenario {
    /// The scenario for `seed`, with `days` of readings ending at `end_ms` (rounded down to the
    /// minute).
    pub fn new(seed: u64, days: u32, end_ms: i64) -> Scenario {
        let end_ms = end_ms.div_euclid(MINUTE_MS) * MINUTE_MS;
        let start_ms = end_ms - i64::from(days.max(1)) * DAY_MS;
        let areas = invented_areas();
        let mut rng = SplitMix::new(seed);
        let pressure_phase = rng.unit() * std::f64::consts::TAU;
        let mut stations = Vec::new();
        for (area_index, area) in areas.iter().enumerate() {
            let count = if area_index == 0 { 14 } else { 13 };
            for number in 1..=count {
                let index = stations.len();
                stations.push(DemoStation {
                    key: format!("{}-{number:02}", area.code),
                    name: format!("{} {}", area.name, SITES[area_index][number - 1]),
                    area: area_index,
                    elevation_m: (area.climate.elevation_m + rng.gaussian() * 15.0).round(),
                    quantities: station_quantities(area_index, number),
                    index,
                    // Siting offsets are small: the stations of an area are meant to agree, so that
                    // what the checks set aside is what was planted.
                    temperature_offset: (rng.gaussian() * 0.25).clamp(-0.6, 0.6),
                    humidity_offset: (rng.gaussian() * 1.2).clamp(-3.0, 3.0),
                    pressure_offset: (rng.gaussian() * 0.12).clamp(-0.3, 0.3),
                    wind_exposure: 0.88 + 0.24 * rng.unit(),
                    direction_offset: (rng.gaussian() * 6.0).clamp(-15.0, 15.0),
                    pm_factor: 0.93 + 0.14 * rng.unit(),
                    defect: Defect::Healthy,
                });
            }
        }
        let mut scenario = Scenario {
            seed,
            start_ms,
            end_ms,
            areas,
            stations,
            faults: Vec::new(),
            pressure_phase,
        };
        scenario.plant_faults();
        scenario
    }

    /// The areas as the store takes them.
    pub fn new_areas(&self) -> Vec<NewArea> {
        self.areas
            .iter()
            .map(|area| NewArea {
                key: area.key.to_owned(),
                name: area.name.to_owned(),
                interval_ms: INTERVAL_MS,
            })
            .collect()
    }

    /// The stations as the store takes them. They carry an elevation but no coordinates: an
    /// invented network has no true place on a map, and made-up coordinates would land on a real one.
    pub fn new_stations(&self) -> Vec<NewStation> {
        self.stations
            .iter()
            .map(|station| NewStation {
                key: station.key.clone(),
                area_key: self.areas[station.area].key.to_owned(),
                name: station.name.clone(),
                lat: None,
                lon: None,
                elevation_m: Some(station.elevation_m),
            })
            .collect()
    }

    /// The station with this key.
    pub fn station(&self, key: &str) -> Option<&DemoStation> {
        self.stations.iter().find(|station| station.key == key)
    }

    /// The area of the station with this key.
    pub fn area_of(&self, station_key: &str) -> Option<&DemoArea> {
        self.station(station_key)
            .map(|station| &self.areas[station.area])
    }

    /// Appends to `out` the readings observed in `[from_ms, to_ms)` that arrive on time, minute by
    /// minute and, within a minute, station by station (the order in which a live network delivers).
    pub fn on_time_readings(&self, from_ms: i64, to_ms: i64, out: &mut Vec<NewReading>) {
        self.readings(from_ms, to_ms, Delivery::OnTime, out);
    }

    /// The readings held back by the late station, which arrive after the rest has been computed.
    pub fn late_readings(&self) -> Vec<NewReading> {
        let mut out = Vec::new();
        self.readings(self.start_ms, self.end_ms, Delivery::Late, &mut out);
        out
    }

    /// The value a station sends for `quantity` at the observation time `label_ms` (as its logger
    /// stamps it), or `None` when it sends nothing for that time.
    pub fn sent_value(
        &self,
        station: &DemoStation,
        quantity: Quantity,
        label_ms: i64,
    ) -> Option<f64> {
        let mut true_ms = label_ms;
        if let Defect::ClockBehind { behind_ms } = station.defect {
            // A clock that runs behind stamps the value measured at t with t − behind; the newest
            // stamps have not been measured yet.
            true_ms = label_ms + behind_ms;
            if true_ms >= self.end_ms {
                return None;
            }
        }
        let clean = self.healthy_value(station, quantity, true_ms);
        let value = match station.defect {
            Defect::MissingCode {
                quantity: q,
                from_ms,
                to_ms,
            } if q == quantity && (from_ms..to_ms).contains(&label_ms) => -999.0,
            Defect::Stuck {
                quantity: q,
                from_ms,
                to_ms,
            } if q == quantity && (from_ms..to_ms).contains(&label_ms) => {
                self.healthy_value(station, quantity, from_ms)
            }
            Defect::AfternoonSun { quantity: q, peak } if q == quantity => {
                round_to(clean + peak * sun_exposure(label_ms), 0.1)
            }
            Defect::Drift {
                quantity: q,
                from_ms,
                per_day,
            } if q == quantity => {
                let days = (label_ms - from_ms) as f64 / DAY_MS as f64;
                round_to((clean + per_day * days).min(100.0), 0.1)
            }
            Defect::Tampering {
                quantity: q,
                from_ms,
                excess,
            } if q == quantity && (from_ms..from_ms + 4 * MINUTE_MS).contains(&label_ms) => {
                let minute = ((label_ms - from_ms) / MINUTE_MS) as usize;
                round_to(clean + excess[minute], 0.1)
            }
            _ => clean,
        };
        Some(value)
    }

    /// What a healthy sensor of the station reads at the true time `ms`, rounded to the sensor's
    /// resolution.
    pub fn healthy_value(&self, station: &DemoStation, quantity: Quantity, ms: i64) -> f64 {
        let area = &self.areas[station.area];
        let climate = &area.climate;
        let minute = ms.div_euclid(MINUTE_MS);
        let stream =
            |purpose: u64| ((station.index as u64 + 1) << 16) | (quantity.index() << 8) | purpose;
        let white = |purpose: u64| gaussian_at(self.seed, stream(purpose), minute);
        let wander = |purpose: u64, knot_minutes: f64| {
            smooth_noise(self.seed, stream(purpose), minute as f64, knot_minutes)
        };
        match quantity {
            Quantity::AirTemperature => {
                let value = self.area_temperature(station.area, ms)
                    + station.temperature_offset
                    + 0.08 * white(1)
                    + 0.08 * wander(2, 20.0);
                round_to(value, 0.1)
            }
            Quantity::RelativeHumidity => {
                let value = self.area_humidity(station.area, ms)
                    + station.humidity_offset
                    + 0.45 * white(1)
                    + 0.4 * wander(2, 20.0);
                round_to(value.clamp(1.0, 100.0), 0.1)
            }
            Quantity::AirPressure => {
                let value = self.area_pressure(station.area, ms)
                    + station.pressure_offset
                    + 0.05 * white(1);
                round_to(value, 0.1)
            }
            Quantity::WindSpeed => {
                let mean = self.area_wind(station.area, ms) * station.wind_exposure;
                // Gusts scale with the wind itself; the absolute term keeps a light breeze lively.
                let value = mean * (1.0 + 0.22 * white(1)) + 0.15 * white(2);
                round_to(value.max(0.0), 0.1)
            }
            Quantity::WindDirection => {
                let speed = self.area_wind(station.area, ms);
                // A light wind swings more than a strong one.
                let swing = 8.0 + 14.0 / speed.max(1.0);
                let value = self.area_direction(station.area, ms)
                    + station.direction_offset
                    + swing * white(1);
                round_to(value, 1.0).rem_euclid(360.0)
            }
            Quantity::Pm25 => {
                let value = self.area_pm25(station.area, ms) * station.pm_factor
                    + 0.07 * climate.pm_base * white(1)
                    + 0.8 * white(2);
                round_to(value.max(0.5), 0.1)
            }
        }
    }

    /// The area's air temperature: a daily mean that wanders from day to day, an asymmetric diurnal
    /// cycle (minimum at dawn, maximum in mid-afternoon), and slower and faster weather noise.
    fn area_temperature(&self, area: usize, ms: i64) -> f64 {
        let climate = &self.areas[area].climate;
        let minute = (ms / MINUTE_MS) as f64;
        let stream = 0xA000 + area as u64 * 16;
        let daily_mean =
            climate.temperature_mean + 1.8 * smooth_noise(self.seed, stream, minute, 1440.0);
        let amplitude = climate.temperature_amplitude
            * (1.0 + 0.12 * smooth_noise(self.seed, stream + 1, minute, 1440.0));
        daily_mean
            + amplitude * diurnal_shape(local_hour(ms))
            + 0.3 * smooth_noise(self.seed, stream + 2, minute, 45.0)
            + 0.12 * smooth_noise(self.seed, stream + 3, minute, 12.0)
    }

    /// The area's relative humidity, anti-correlated with the temperature's diurnal swing, kept
    /// below saturation.
    fn area_humidity(&self, area: usize, ms: i64) -> f64 {
        let climate = &self.areas[area].climate;
        let minute = (ms / MINUTE_MS) as f64;
        let stream = 0xB000 + area as u64 * 16;
        let swing = climate.temperature_amplitude * diurnal_shape(local_hour(ms));
        let value = climate.humidity_mean - 2.6 * swing
            + 3.0 * smooth_noise(self.seed, stream, minute, 90.0)
            + 1.0 * smooth_noise(self.seed, stream + 1, minute, 15.0);
        // Soft ceiling: humid nights approach 95 % but do not sit at 100 %.
        if value > 93.0 {
            93.0 + (value - 93.0) * 0.25
        } else {
            value.max(15.0)
        }
    }

    /// Sea-level pressure: a synoptic wave of about three days, the semidiurnal tide and some noise.
    fn area_pressure(&self, area: usize, ms: i64) -> f64 {
        let climate = &self.areas[area].climate;
        let minute = (ms / MINUTE_MS) as f64;
        let days = ms as f64 / DAY_MS as f64;
        let hour = local_hour(ms);
        1012.0
            + climate.pressure_shift
            + 7.0 * (std::f64::consts::TAU * days / 3.1 + self.pressure_phase).sin()
            + 0.8 * (std::f64::consts::TAU * (hour - 10.0) / 12.0).cos()
            + 0.4 * smooth_noise(self.seed, 0xC000, minute, 180.0)
    }

    /// Mean wind speed: a base that wanders over days, stronger in the afternoon when the air mixes.
    fn area_wind(&self, area: usize, ms: i64) -> f64 {
        let climate = &self.areas[area].climate;
        let minute = (ms / MINUTE_MS) as f64;
        let stream = 0xD000 + area as u64 * 16;
        let hour = local_hour(ms);
        let daytime = if (8.0..20.0).contains(&hour) {
            (std::f64::consts::PI * (hour - 8.0) / 12.0).sin()
        } else {
            0.0
        };
        let value = climate.wind_base
            * (1.0 + 0.25 * smooth_noise(self.seed, stream, minute, 1440.0))
            + climate.wind_daytime_gain * daytime
            + 0.5 * smooth_noise(self.seed, stream + 1, minute, 30.0);
        value.max(1.5)
    }

    /// Wind direction: the area's prevailing direction with slow and faster veering.
    fn area_direction(&self, area: usize, ms: i64) -> f64 {
        let climate = &self.areas[area].climate;
        let minute = (ms / MINUTE_MS) as f64;
        let stream = 0xE000 + area as u64 * 16;
        climate.prevailing_direction
            + 35.0 * smooth_noise(self.seed, stream, minute, 180.0)
            + 12.0 * smooth_noise(self.seed, stream + 1, minute, 40.0)
    }

    /// Fine particulates: a background, a morning and an evening rush-hour bump, and noise.
    fn area_pm25(&self, area: usize, ms: i64) -> f64 {
        let climate = &self.areas[area].climate;
        let minute = (ms / MINUTE_MS) as f64;
        let stream = 0xF000 + area as u64 * 16;
        let hour = local_hour(ms);
        let bump = |centre: f64, width: f64| (-0.5 * ((hour - centre) / width).powi(2)).exp();
        let rush = bump(8.0, 0.7) + 0.75 * bump(17.75, 0.8);
        climate.pm_base * (1.0 + 0.3 * smooth_noise(self.seed, stream, minute, 1440.0))
            + climate.pm_rush * rush
            + 0.1 * climate.pm_base * smooth_noise(self.seed, stream + 1, minute, 30.0)
    }

    fn readings(&self, from_ms: i64, to_ms: i64, delivery: Delivery, out: &mut Vec<NewReading>) {
        let from_ms = from_ms.max(self.start_ms).div_euclid(MINUTE_MS) * MINUTE_MS;
        let to_ms = to_ms.min(self.end_ms);
        let mut label_ms = from_ms;
        while label_ms < to_ms {
            for station in &self.stations {
                let late =
                    matches!(station.defect, Defect::Late { from_ms } if label_ms >= from_ms);
                if late != (delivery == Delivery::Late) {
                    continue;
                }
                for &quantity in &station.quantities {
                    if let Some(value) = self.sent_value(station, quantity, label_ms) {
                        out.push(NewReading {
                            station: station.key.clone(),
                            quantity: quantity.key().to_owned(),
                            observed_at_ms: label_ms,
                            value: Some(value),
                            value_as_sent: Some(value),
                            unit_as_sent: Some(quantity.unit().to_owned()),
                        });
                    }
                }
            }
            label_ms += MINUTE_MS;
        }
    }

    /// Plants the faults and records them. The stretches are placed at fixed fractions of the span,
    /// rounded to the minute, so that every fault shows whatever the number of days; the afternoon
    /// sun follows the local clock and is listed once per afternoon in the span.
    fn plant_faults(&mut self) {
        let span = self.end_ms - self.start_ms;
        let at_fraction = |fraction: f64| {
            let offset = (span as f64 * fraction) as i64;
            self.start_ms + offset.div_euclid(MINUTE_MS) * MINUTE_MS
        };
        let missing_from = at_fraction(0.20);
        let stuck_from = at_fraction(0.45);
        let tamper_from = at_fraction(0.62);
        let late_from = self.end_ms - LATE_SPAN_MS;
        let (start_ms, end_ms) = (self.start_ms, self.end_ms);
        let mut faults = Vec::new();

        self.set_defect(
            "TH-05",
            Defect::MissingCode {
                quantity: Quantity::WindSpeed,
                from_ms: missing_from,
                to_ms: missing_from + 7 * HOUR_MS,
            },
        );
        faults.push(PlantedFault {
            station: "TH-05".into(),
            quantity: Some(Quantity::WindSpeed),
            kind: FaultKind::MissingCode,
            from_ms: missing_from,
            to_ms: missing_from + 7 * HOUR_MS,
            expected: Expectation::SetAside(Rule::MissingCode),
            note: "the anemometer failed; the logger sends the missing-data code -999 for 7 hours"
                .into(),
        });

        self.set_defect(
            "TH-10",
            Defect::Stuck {
                quantity: Quantity::RelativeHumidity,
                from_ms: stuck_from,
                to_ms: stuck_from + 6 * HOUR_MS,
            },
        );
        faults.push(PlantedFault {
            station: "TH-10".into(),
            quantity: Some(Quantity::RelativeHumidity),
            kind: FaultKind::Stuck,
            from_ms: stuck_from,
            to_ms: stuck_from + 6 * HOUR_MS,
            expected: Expectation::SetAside(Rule::FlatLine),
            note:
                "the logger repeats its last humidity value for 6 hours; flat_line can only tell \
                   once a whole hour of repeats fills its window"
                    .into(),
        });

        self.set_defect(
            "OF-05",
            Defect::AfternoonSun {
                quantity: Quantity::AirTemperature,
                peak: 4.5,
            },
        );
        let mut day_start =
            (start_ms + LOCAL_OFFSET_MS).div_euclid(DAY_MS) * DAY_MS - LOCAL_OFFSET_MS;
        while day_start < end_ms {
            let from = (day_start + 12 * HOUR_MS).max(start_ms);
            let to = (day_start + 17 * HOUR_MS).min(end_ms);
            // An afternoon cut to less than an hour by the span's ends is too short to list.
            if to - from >= HOUR_MS {
                faults.push(PlantedFault {
                    station: "OF-05".into(),
                    quantity: Some(Quantity::AirTemperature),
                    kind: FaultKind::AfternoonSun,
                    from_ms: from,
                    to_ms: to,
                    expected: Expectation::SetAside(Rule::FarFromConsensus),
                    note: "the radiation shield faces the afternoon sun: up to 4.5 °C too warm \
                           from 12:00 to 17:00 local time, most around 14:30"
                        .into(),
                });
            }
            day_start += DAY_MS;
        }

        self.set_defect(
            "OF-11",
            Defect::Drift {
                quantity: Quantity::RelativeHumidity,
                from_ms: start_ms,
                per_day: HUMIDITY_DRIFT_PER_DAY,
            },
        );
        faults.push(PlantedFault {
            station: "OF-11".into(),
            quantity: Some(Quantity::RelativeHumidity),
            kind: FaultKind::Drift,
            from_ms: start_ms,
            to_ms: end_ms,
            expected: Expectation::HealthDrift,
            note: format!(
                "the humidity sensor drifts up by {HUMIDITY_DRIFT_PER_DAY} %/day: too little to set \
                 aside, but the station health report shows the drift"
            ),
        });

        self.set_defect(
            "VB-09",
            Defect::Tampering {
                quantity: Quantity::AirTemperature,
                from_ms: tamper_from,
                excess: [7.8, 9.6, 10.2, 8.9],
            },
        );
        faults.push(PlantedFault {
            station: "VB-09".into(),
            quantity: Some(Quantity::AirTemperature),
            kind: FaultKind::Tampering,
            from_ms: tamper_from,
            to_ms: tamper_from + 4 * MINUTE_MS,
            expected: Expectation::SetAside(Rule::Step),
            note: "someone holds a heat source to the sensor: 4 readings 8-10 °C too warm, \
                   plausible on their own but a jump no weather makes in a minute"
                .into(),
        });

        self.set_defect("VB-12", Defect::ClockBehind { behind_ms: HOUR_MS });
        for quantity in [Quantity::AirTemperature, Quantity::Pm25] {
            faults.push(PlantedFault {
                station: "VB-12".into(),
                quantity: Some(quantity),
                kind: FaultKind::ClockBehind,
                from_ms: start_ms,
                to_ms: end_ms - HOUR_MS,
                expected: Expectation::SetAside(Rule::FarFromConsensus),
                note: match quantity {
                    Quantity::AirTemperature => {
                        "every value is stamped an hour early; it disagrees with the area while the \
                         temperature changes fast, in the morning and the evening"
                    }
                    _ => {
                        "the same clock: the rush-hour bumps in pm2_5 show an hour early"
                    }
                }
                .into(),
            });
        }

        self.set_defect("VB-04", Defect::Late { from_ms: late_from });
        faults.push(PlantedFault {
            station: "VB-04".into(),
            quantity: None,
            kind: FaultKind::Late,
            from_ms: late_from,
            to_ms: end_ms,
            expected: Expectation::NewRevision,
            note:
                "the station's modem was down: its last 3 hours arrive after those intervals were \
                   computed, and each gets a new revision"
                    .into(),
        });

        self.faults = faults;
    }

    fn set_defect(&mut self, key: &str, defect: Defect) {
        let station = self
            .stations
            .iter_mut()
            .find(|station| station.key == key)
            .expect("a planted fault names a station of the invented network");
        if let Some(quantity) = defect_quantity(&defect) {
            assert!(
                station.quantities.contains(&quantity),
                "{key} does not measure {}",
                quantity.key()
            );
        }
        station.defect = defect;
    }
}

impl DemoStation {
    /// Whether the station's values of `quantity` are exactly what a healthy sensor reads, at the
    /// right time (a late delivery changes nothing in the values).
    pub fn is_clean(&self, quantity: Quantity) -> bool {
        match self.defect {
            Defect::Healthy | Defect::Late { .. } => true,
            Defect::ClockBehind { .. } => false,
            other => defect_quantity(&other) != Some(quantity),
        }
    }
}

/// Which delivery a reading belongs to.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Delivery {
    OnTime,
    Late,
}

fn defect_quantity(defect: &Defect) -> Option<Quantity> {
    match *defect {
        Defect::MissingCode { quantity, .. }
        | Defect::Stuck { quantity, .. }
        | Defect::AfternoonSun { quantity, .. }
        | Defect::Drift { quantity, .. }
        | Defect::Tampering { quantity, .. } => Some(quantity),
        Defect::Healthy | Defect::ClockBehind { .. } | Defect::Late { .. } => None,
    }
}

/// The three invented areas. The names are made up for this scenario.
fn invented_areas() -> Vec<DemoArea> {
    vec![
        DemoArea {
            key: "velloran-basin",
            name: "Velloran Basin",
            code: "VB",
            description:
                "a sheltered valley town: warm afternoons, clear nights, traffic at rush hours",
            climate: Climate {
                temperature_mean: 17.0,
                temperature_amplitude: 7.5,
                humidity_mean: 62.0,
                pressure_shift: 0.2,
                wind_base: 2.2,
                wind_daytime_gain: 2.0,
                prevailing_direction: 225.0,
                pm_base: 9.0,
                pm_rush: 26.0,
                elevation_m: 140.0,
            },
        },
        DemoArea {
            key: "tarnwhistle-heights",
            name: "Tarnwhistle Heights",
            code: "TH",
            description: "open upland moor: cooler and windier, little traffic",
            climate: Climate {
                temperature_mean: 12.0,
                temperature_amplitude: 5.0,
                humidity_mean: 72.0,
                pressure_shift: -0.3,
                wind_base: 4.5,
                wind_daytime_gain: 3.0,
                prevailing_direction: 250.0,
                pm_base: 4.0,
                pm_rush: 3.0,
                elevation_m: 610.0,
            },
        },
        DemoArea {
            key: "ostmarrow-flats",
            name: "Ostmarrow Flats",
            code: "OF",
            description: "wet lowland by a lake: humid, with a smaller daily swing",
            climate: Climate {
                temperature_mean: 15.0,
                temperature_amplitude: 5.0,
                humidity_mean: 76.0,
                pressure_shift: 0.5,
                wind_base: 3.2,
                wind_daytime_gain: 2.0,
                prevailing_direction: 200.0,
                pm_base: 6.0,
                pm_rush: 9.0,
                elevation_m: 35.0,
            },
        },
    ]
}

/// Invented site descriptions, one list per area, one entry per station.
const SITES: [[&str; 14]; 3] = [
    [
        "pump house",
        "school roof",
        "ferry landing",
        "late-bus depot",
        "grain store",
        "water tower",
        "north allotments",
        "old tannery yard",
        "market square",
        "clinic car park",
        "sports field",
        "rail halt",
        "library garden",
        "sluice gate",
    ],
    [
        "summit cairn",
        "shepherd's hut",
        "peat cutting",
        "quarry rim",
        "radio mast",
        "sheepfold",
        "bothy",
        "fire lookout",
        "moor gate",
        "tarn outflow",
        "heather ridge",
        "trig pillar",
        "forestry track",
        "",
    ],
    [
        "reed bed",
        "boathouse",
        "eel weir",
        "dyke pumping station",
        "duck decoy",
        "mill leat",
        "jetty end",
        "willow holt",
        "pasture gate",
        "lock keeper's garden",
        "causeway",
        "wader hide",
        "ferry slip",
        "",
    ],
];

/// What station `number` of area `area_index` measures. Every station measures temperature and
/// humidity; pressure, wind and particulates are on some, so that each area has at least four
/// stations per quantity for a consensus and the fault stations measure what is planted in them.
fn station_quantities(area_index: usize, number: usize) -> Vec<Quantity> {
    const PRESSURE: [usize; 5] = [1, 4, 7, 10, 13];
    const WIND: [usize; 7] = [1, 3, 5, 7, 9, 11, 13];
    // The valley town has the traffic, so the most particulate sensors.
    const PARTICULATES: [&[usize]; 3] = [
        &[2, 4, 6, 8, 10, 12, 14],
        &[1, 5, 9, 13],
        &[1, 4, 7, 10, 13],
    ];
    let mut quantities = vec![Quantity::AirTemperature, Quantity::RelativeHumidity];
    if PRESSURE.contains(&number) {
        quantities.push(Quantity::AirPressure);
    }
    if WIND.contains(&number) {
        quantities.push(Quantity::WindSpeed);
        quantities.push(Quantity::WindDirection);
    }
    if PARTICULATES[area_index].contains(&number) {
        quantities.push(Quantity::Pm25);
    }
    quantities
}

/// The local clock hour in [0, 24), as a fraction.
pub fn local_hour(ms: i64) -> f64 {
    (ms + LOCAL_OFFSET_MS).rem_euclid(DAY_MS) as f64 / HOUR_MS as f64
}

/// The diurnal temperature shape in [−1, 1]: −1 at dawn (05:30 local), +1 at 15:00. The rise is a
/// half cosine; the fall is slow at first, fastest around sunset and slow again overnight, which is
/// the shape of a clear day's cooling.
pub fn diurnal_shape(hour: f64) -> f64 {
    const DAWN: f64 = 5.5;
    const PEAK: f64 = 15.0;
    let since_dawn = (hour - DAWN).rem_euclid(24.0);
    let rise = PEAK - DAWN;
    if since_dawn <= rise {
        -(std::f64::consts::PI * since_dawn / rise).cos()
    } else {
        let fall = 24.0 - rise;
        let u = (since_dawn - rise) / fall;
        const WIDTH: f64 = 0.35;
        let g = (1.0 - (-(u / WIDTH).powi(2)).exp()) / (1.0 - (-(1.0 / WIDTH).powi(2)).exp());
        1.0 - 2.0 * g
    }
}

/// How directly the sun reaches a badly sited shield, in [0, 1]: zero outside 12:00–17:00 local,
/// most at 14:30.
fn sun_exposure(ms: i64) -> f64 {
    let hour = local_hour(ms);
    if (12.0..17.0).contains(&hour) {
        (std::f64::consts::PI * (hour - 12.0) / 5.0).sin().powi(2)
    } else {
        0.0
    }
}

fn round_to(value: f64, step: f64) -> f64 {
    let rounded = (value / step).round() * step;
    // Printing 12.300000000000001 would look like a sensor with too many digits.
    (rounded * 100.0).round() / 100.0
}

/// SplitMix64's output function.
fn mix(mut z: u64) -> u64 {
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

fn to_unit(bits: u64) -> f64 {
    (bits >> 11) as f64 / (1u64 << 53) as f64
}

fn box_muller(a: u64, b: u64) -> f64 {
    // 1 − u lies in (0, 1], so the logarithm is finite.
    let u = 1.0 - to_unit(a);
    let v = to_unit(b);
    (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * v).cos()
}

/// A standard normal value for (seed, stream, index), the same every time it is asked for.
fn gaussian_at(seed: u64, stream: u64, index: i64) -> f64 {
    let base = mix(seed ^ mix(stream.wrapping_mul(0x9E37_79B9_7F4A_7C15) ^ index as u64));
    box_muller(mix(base), mix(base ^ 0xD1B5_4A32_D192_ED03))
}

/// Value noise: standard normal values at knots `knot_minutes` apart, joined by a cosine ease so
/// the curve is smooth. Its standard deviation is a little below 1 between knots.
fn smooth_noise(seed: u64, stream: u64, minute: f64, knot_minutes: f64) -> f64 {
    let position = minute / knot_minutes;
    let knot = position.floor();
    let fraction = position - knot;
    let ease = (1.0 - (std::f64::consts::PI * fraction).cos()) / 2.0;
    let a = gaussian_at(seed, stream, knot as i64);
    let b = gaussian_at(seed, stream, knot as i64 + 1);
    a + (b - a) * ease
}

#[cfg(test)]
mod tests {
    use super::*;

    /// 2026-06-03T00:00:00Z.
    const END_MS: i64 = 1_780_444_800_000;

    #[test]
    fn the_network_has_three_areas_and_forty_stations() {
        let scenario = Scenario::new(DEFAULT_SEED, 2, END_MS);
        assert_eq!(scenario.areas.len(), 3);
        assert_eq!(scenario.stations.len(), 40);
        for (index, area) in scenario.areas.iter().enumerate() {
            for quantity in Quantity::ALL {
                let measuring = scenario
                    .stations
                    .iter()
                    .filter(|s| s.area == index && s.quantities.contains(&quantity))
                    .count();
                assert!(
                    measuring >= 4,
                    "{} has {measuring} stations with {}",
                    area.key,
                    quantity.key()
                );
            }
        }
        let mut keys: Vec<&str> = scenario.stations.iter().map(|s| s.key.as_str()).collect();
        keys.sort_unstable();
        keys.dedup();
        assert_eq!(keys.len(), 40, "station ids are unique");
        assert!(scenario.stations.iter().all(|s| !s.name.trim().is_empty()));
    }

    #[test]
    fn the_same_seed_gives_the_same_readings_and_another_seed_others() {
        let hour = (END_MS - 5 * HOUR_MS, END_MS - 4 * HOUR_MS);
        let mut first = Vec::new();
        let mut again = Vec::new();
        let mut other = Vec::new();
        Scenario::new(7, 1, END_MS).on_time_readings(hour.0, hour.1, &mut first);
        Scenario::new(7, 1, END_MS).on_time_readings(hour.0, hour.1, &mut again);
        Scenario::new(8, 1, END_MS).on_time_readings(hour.0, hour.1, &mut other);
        assert!(!first.is_empty());
        assert_eq!(first, again);
        assert_ne!(first, other);
    }

    #[test]
    fn temperature_is_lowest_near_dawn_and_highest_mid_afternoon() {
        // The shape's own extremes: -1 at 05:30 and +1 at 15:00 local, by construction.
        assert!((diurnal_shape(5.5) + 1.0).abs() < 1e-12);
        assert!((diurnal_shape(15.0) - 1.0).abs() < 1e-12);
        let hottest = (0..1440)
            .map(|m| m as f64 / 60.0)
            .max_by(|a, b| diurnal_shape(*a).total_cmp(&diurnal_shape(*b)))
            .unwrap();
        let coldest = (0..1440)
            .map(|m| m as f64 / 60.0)
            .min_by(|a, b| diurnal_shape(*a).total_cmp(&diurnal_shape(*b)))
            .unwrap();
        assert_eq!((hottest, coldest), (15.0, 5.5));
        // And the generated readings of a healthy station follow it: its afternoon is warmer than
        // its dawn, and its humidity lower, on every day of the span.
        let scenario = Scenario::new(DEFAULT_SEED, 2, END_MS);
        let station = scenario.station("TH-02").unwrap();
        let mut day_start = scenario.start_ms - LOCAL_OFFSET_MS + DAY_MS;
        while day_start + DAY_MS <= scenario.end_ms {
            let at = |hour: i64, quantity| {
                scenario.healthy_value(station, quantity, day_start + hour * HOUR_MS)
            };
            assert!(at(15, Quantity::AirTemperature) > at(5, Quantity::AirTemperature) + 4.0);
            assert!(at(15, Quantity::RelativeHumidity) < at(5, Quantity::RelativeHumidity) - 10.0);
            day_start += DAY_MS;
        }
    }

    #[test]
    fn every_value_is_in_range_except_the_missing_code() {
        let scenario = Scenario::new(DEFAULT_SEED, 1, END_MS);
        let mut readings = Vec::new();
        scenario.on_time_readings(scenario.start_ms, scenario.end_ms, &mut readings);
        readings.extend(scenario.late_readings());
        let mut codes = 0;
        for reading in &readings {
            let value = reading.value.unwrap();
            let (low, high) = match reading.quantity.as_str() {
                "air_temperature" => (-80.0, 60.0),
                "relative_humidity" => (0.0, 100.0),
                "air_pressure" => (500.0, 1100.0),
                "wind_speed" => (0.0, 75.0),
                "wind_direction" => (0.0, 360.0),
                _ => (0.0, 1000.0),
            };
            if value == -999.0 {
                codes += 1;
            } else {
                assert!(value >= low && value <= high, "{reading:?}");
            }
        }
        // Seven hours of one anemometer, one reading a minute.
        assert_eq!(codes, 7 * 60);
    }

    #[test]
    fn the_late_readings_are_held_back_from_the_first_delivery() {
        let scenario = Scenario::new(DEFAULT_SEED, 1, END_MS);
        let late = scenario.late_readings();
        let vb04 = scenario.station("VB-04").unwrap();
        assert_eq!(late.len(), 180 * vb04.quantities.len());
        assert!(late
            .iter()
            .all(|r| r.station == "VB-04" && r.observed_at_ms >= scenario.end_ms - LATE_SPAN_MS));
        let mut on_time = Vec::new();
        scenario.on_time_readings(
            scenario.end_ms - LATE_SPAN_MS,
            scenario.end_ms,
            &mut on_time,
        );
        assert!(on_time.iter().all(|r| r.station != "VB-04"));
        // The clock-behind station sends nothing stamped in the last hour: it has not measured it.
        assert!(on_time
            .iter()
            .all(|r| r.station != "VB-12" || r.observed_at_ms < scenario.end_ms - HOUR_MS));
    }
}
