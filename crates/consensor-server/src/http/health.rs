//! Station health (API.md "Station health"): how a station compares with its area over a window of
//! days, from the stored consensus results.
//!
//! For every interval of the window whose latest result has both a value for the station and an
//! area median, the residual is (station value − area median). Station values set aside as far
//! from the consensus count too: a drifting station is exactly what this report must show.
//! * `bias` is the median of the residuals (`consensor_core::stats::median`).
//! * `drift_per_day` is the Theil–Sen slope of the residuals against time in days, with Sen's 95 %
//!   confidence interval (`consensor_core::stats::theil_sen`).
//! * `calibration` is the least-absolute-deviations line predicting the area median (y) from the
//!   station value (x): `gain` is its slope and `offset` its intercept, so a reading r of the
//!   station is best corrected to `gain · r + offset`.
//!
//! `bias` needs one residual; drift and calibration need [`MIN_POINTS_FOR_FIT`]. Below that they are
//! `null`, with the shape kept (`drift_per_day_ci95: [null, null]`, `calibration: {"gain": null,
//! "offset": null}`) so that a dashboard can index them without checking first.

use axum::extract::{Path, State};
use axum::routing::get;
use axum::{Json, Router};
use consensor_core::ids::is_valid_id;
use consensor_core::stats::{least_absolute_deviations, median, theil_sen};
use consensor_store::{StationResidual, Store};
use serde::Serialize;

use super::params::{Params, RawPairs};
use super::rfc3339;
use crate::auth::ReadAccess;
use crate::error::ApiError;
use crate::state::AppState;

/// API.md's default window, and the longest one allowed: a leap year.
pub const DEFAULT_DAYS: i64 = 30;
pub const MAX_DAYS: i64 = 366;

/// Drift and calibration are lines; two points fit any line exactly and say nothing about the
/// scatter, so at least three intervals are needed before either is reported.
pub const MIN_POINTS_FOR_FIT: usize = 3;

/// Theil–Sen keeps every pairwise slope: n points take n(n−1)/2 slopes, 16 MB of `f64` at 2000
/// points. Longer series are thinned evenly in time to this many points before the fit (the median
/// of slopes of an evenly thinned series estimates the same trend, with a slightly wider interval).
pub const MAX_THEIL_SEN_POINTS: usize = 2000;

/// The LAD descent costs O(n log n) per step; past this many points the series is thinned evenly
/// for the calibration too, which keeps one request under a fraction of a second even for a year
/// of one-minute intervals. `bias` always uses every residual.
pub const MAX_LAD_POINTS: usize = 20_000;

const DAY_MS: i64 = 86_400_000;

/// The confidence level of the drift interval (API.md: "with its confidence interval"; 95 % as for
/// the consensus `ci95_*` fields).
const DRIFT_CONFIDENCE: f64 = 0.95;

pub fn router() -> Router<AppState> {
    Router::new().route("/v1/stations/{station}/health", get(health))
}

#[derive(Debug, Serialize, utoipa::ToSchema)]
struct HealthOut {
    station: String,
    quantity: String,
    unit: String,
    /// The window, `[from, to)`, on interval starts for the residuals and on observation times for
    /// the reading counts.
    from: String,
    to: String,
    days: i64,
    readings: u64,
    set_aside: u64,
    set_aside_rate: Option<f64>,
    /// How many intervals had both a station value and an area median.
    intervals: usize,
    bias: Option<f64>,
    drift_per_day: Option<f64>,
    drift_per_day_ci95: [Option<f64>; 2],
    calibration: Calibration,
    last_seen: Option<String>,
}

#[derive(Debug, Default, Serialize, utoipa::ToSchema)]
struct Calibration {
    gain: Option<f64>,
    offset: Option<f64>,
}

/// The statistics of one residual series (see the module documentation).
#[derive(Debug, Default)]
struct Fits {
    bias: Option<f64>,
    drift_per_day: Option<f64>,
    drift_ci95: [Option<f64>; 2],
    calibration: Calibration,
}

#[utoipa::path(
    get,
    path = "/v1/stations/{station}/health",
    tag = "health",
    summary = "How a station compares with its area",
    description = "Over the last `days`: readings and set-aside counts, bias (median of station \
        value minus area median), Theil-Sen drift per day with its 95 % interval, and a \
        least-absolute-deviations calibration line. Role: reader (or none with `public_read = true`).",
    params(
        ("station" = String, Path, description = "Station id."),
        ("quantity" = String, Query, description = "A quantity of the table in force."),
        ("days" = Option<i64>, Query, description = "1 to 366; 30 when left out."),
    ),
    security((), ("bearer" = [])),
    responses(
        (status = 200, description = "The report.", body = HealthOut),
        (status = 400, description = "The query string cannot be parsed.", body = crate::http::ErrorBody),
        (status = 404, description = "Unknown station.", body = crate::http::ErrorBody),
        (status = 422, description = "A missing, unknown or invalid parameter.", body = crate::http::ErrorBody),
    )
)]
async fn health(
    _: ReadAccess,
    State(state): State<AppState>,
    Path(station): Path<String>,
    query: RawPairs,
) -> Result<Json<HealthOut>, ApiError> {
    let params = Params::parse(query, &["quantity", "days"])?;
    let quantity = params.required_quantity(&state, "quantity")?;
    let days = params.integer_in("days", 1, MAX_DAYS, DEFAULT_DAYS)?;
    let unknown = || ApiError::not_found(format!("unknown station {station:?}"));
    if !is_valid_id(&station) {
        return Err(unknown());
    }
    if !state
        .store
        .station_keys_lookup(std::slice::from_ref(&station))
        .await?
        .contains_key(&station)
    {
        return Err(unknown());
    }
    let to_ms = state.clock.now_ms();
    let from_ms = to_ms - days * DAY_MS;
    let residuals = state
        .store
        .station_residuals(&station, &quantity.key, from_ms, to_ms)
        .await?;
    let counts = state
        .store
        .station_reading_counts(&station, &quantity.key, from_ms, to_ms)
        .await?;
    let last_seen = state.store.last_seen(&station).await?;
    let intervals = residuals.len();
    // The fits are CPU work proportional to the window (up to hundreds of thousands of intervals);
    // they run on the blocking pool so that they never stall the runtime's request threads.
    let fits = tokio::task::spawn_blocking(move || fit(&residuals, from_ms))
        .await
        .map_err(|error| ApiError::internal(&error))?;
    Ok(Json(HealthOut {
        station,
        quantity: quantity.key.clone(),
        unit: quantity.unit.clone(),
        from: rfc3339(from_ms),
        to: rfc3339(to_ms),
        days,
        readings: counts.readings,
        set_aside: counts.set_aside,
        set_aside_rate: (counts.readings > 0)
            .then(|| counts.set_aside as f64 / counts.readings as f64),
        intervals,
        bias: fits.bias,
        drift_per_day: fits.drift_per_day,
        drift_per_day_ci95: fits.drift_ci95,
        calibration: fits.calibration,
        last_seen: last_seen.map(rfc3339),
    }))
}

/// Bias, drift and calibration of one station's residual series; times are measured in days from
/// `origin_ms` (the slope does not depend on the origin; a small origin keeps the x values exact).
fn fit(residuals: &[StationResidual], origin_ms: i64) -> Fits {
    let differences: Vec<f64> = residuals
        .iter()
        .map(|r| r.station_value - r.area_median)
        .collect();
    let mut fits = Fits {
        bias: median(&differences),
        ..Fits::default()
    };
    if residuals.len() < MIN_POINTS_FOR_FIT {
        return fits;
    }

    let drift_points = thin_evenly(residuals, MAX_THEIL_SEN_POINTS);
    let days: Vec<f64> = drift_points
        .iter()
        .map(|r| (r.bucket_start_ms - origin_ms) as f64 / DAY_MS as f64)
        .collect();
    let drift_residuals: Vec<f64> = drift_points
        .iter()
        .map(|r| r.station_value - r.area_median)
        .collect();
    if let Ok(line) = theil_sen(&days, &drift_residuals, DRIFT_CONFIDENCE) {
        fits.drift_per_day = Some(line.line.slope);
        fits.drift_ci95 = [Some(line.slope_low), Some(line.slope_high)];
    }

    let calibration_points = thin_evenly(residuals, MAX_LAD_POINTS);
    let station_values: Vec<f64> = calibration_points.iter().map(|r| r.station_value).collect();
    let area_medians: Vec<f64> = calibration_points.iter().map(|r| r.area_median).collect();
    // A station that reported one value throughout gives no x spread to fit a line on; the
    // calibration then stays null rather than guessing.
    if let Ok(line) = least_absolute_deviations(&station_values, &area_medians) {
        fits.calibration = Calibration {
            gain: Some(line.slope),
            offset: Some(line.intercept),
        };
    }
    fits
}

/// At most `limit` points spread evenly over `points` (the first and last always kept), or all of
/// them when there are no more than `limit`.
fn thin_evenly(points: &[StationResidual], limit: usize) -> Vec<StationResidual> {
    let n = points.len();
    if n <= limit || limit < 2 {
        return points.to_vec();
    }
    (0..limit)
        .map(|i| points[i * (n - 1) / (limit - 1)])
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn residual(index: i64, station_value: f64, area_median: f64) -> StationResidual {
        StationResidual {
            bucket_start_ms: index * 600_000,
            station_value,
            area_median,
            used: true,
        }
    }

    #[test]
    fn thinning_keeps_the_ends_and_spreads_evenly() {
        let points: Vec<StationResidual> = (0..10).map(|i| residual(i, 0.0, 0.0)).collect();
        let thinned = thin_evenly(&points, 4);
        // Indices i·(n−1)/(limit−1) for n = 10, limit = 4: 0, 3, 6, 9.
        let starts: Vec<i64> = thinned
            .iter()
            .map(|r| r.bucket_start_ms / 600_000)
            .collect();
        assert_eq!(starts, vec![0, 3, 6, 9]);
        assert_eq!(thin_evenly(&points, 10).len(), 10);
        assert_eq!(thin_evenly(&points, 50).len(), 10);
    }

    #[test]
    fn too_few_points_give_nulls_but_a_bias() {
        // Two residuals, 1.0 and 3.0: numpy.median([1.0, 3.0]) = 2.0; two points are below
        // MIN_POINTS_FOR_FIT, so no line is reported.
        let fits = fit(&[residual(0, 11.0, 10.0), residual(1, 13.0, 10.0)], 0);
        assert_eq!(fits.bias, Some(2.0));
        assert_eq!(fits.drift_per_day, None);
        assert_eq!(fits.drift_ci95, [None, None]);
        assert_eq!(fits.calibration.gain, None);
        let empty = fit(&[], 0);
        assert_eq!(empty.bias, None);
    }

    #[test]
    fn a_station_stuck_on_one_value_has_no_calibration() {
        // Every x equal: no LAD line is determined (the station value never varies), so the
        // calibration stays null; the drift is still defined, as the times differ.
        let points: Vec<StationResidual> =
            (0..5).map(|i| residual(i, 10.0, 10.0 + i as f64)).collect();
        let fits = fit(&points, 0);
        assert_eq!(fits.calibration.gain, None);
        // Residuals 0, −1, …, −4 ten minutes (1/144 day) apart:
        // scipy.stats.theilslopes([0, -1, -2, -3, -4], numpy.arange(5) / 144) gives slope −144.0
        // with the interval [−144.0, −144.0].
        let drift = fits.drift_per_day.unwrap();
        assert!((drift + 144.0).abs() < 1e-9, "{drift}");
        assert!((fits.drift_ci95[0].unwrap() + 144.0).abs() < 1e-9);
        assert!((fits.drift_ci95[1].unwrap() + 144.0).abs() < 1e-9);
    }
}
