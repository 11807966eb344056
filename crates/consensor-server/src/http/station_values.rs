//! A station's interval values beside its area's median: the series behind the health report.
//!
//! `GET /v1/stations/{station}/values?quantity=&from=&to=` (reader) answers, for each interval of
//! the station's area with a start in `[from, to)` whose latest result has both a value for the
//! station and an area median, the two side by side:
//!
//! ```json
//! {"station": "VB-03", "area": "velloran-basin", "quantity": "air_temperature", "unit": "Cel",
//!  "interval": "10m", "from": "...", "to": "...",
//!  "points": [{"start": "2026-06-01T07:00:00Z", "station_value": 13.9, "area_median": 13.6,
//!              "used": true}]}
//! ```
//! `station_value` is the median of the station's readings in the interval that the checks kept;
//! `used` is false when that value was set aside as far from the consensus. These are the pairs
//! from which `GET /v1/stations/{station}/health` computes its bias, drift and calibration, so a
//! page can plot the residuals and the fitted lines over them. The health report gives only the
//! fits; no other route lists a station's values.

use axum::extract::{Path, State};
use axum::routing::get;
use axum::{Json, Router};
use consensor_core::ids::is_valid_id;
use consensor_store::Store;
use serde::Serialize;

use super::params::{Params, RawPairs};
use super::results::{check_series_length, find_area, interval_name};
use super::rfc3339;
use crate::auth::ReadAccess;
use crate::error::ApiError;
use crate::state::AppState;

pub fn router() -> Router<AppState> {
    Router::new().route("/v1/stations/{station}/values", get(values))
}

#[derive(Serialize, utoipa::ToSchema)]
struct ValuesOut {
    station: String,
    area: String,
    quantity: String,
    unit: String,
    interval: String,
    from: String,
    to: String,
    points: Vec<ValuePoint>,
}

#[derive(Serialize, utoipa::ToSchema)]
struct ValuePoint {
    start: String,
    station_value: f64,
    area_median: f64,
    used: bool,
}

#[utoipa::path(
    get,
    path = "/v1/stations/{station}/values",
    tag = "health",
    summary = "A station's interval values beside its area's median",
    description = "For each interval with a start in `[from, to)` whose latest result has both a \
        value for the station and an area median: the two side by side (`used` is false when the \
        station value was set aside as far from the consensus). Role: reader (or none with \
        `public_read = true`).",
    params(
        ("station" = String, Path, description = "Station id."),
        ("quantity" = String, Query, description = "A quantity of the table in force."),
        ("from" = String, Query, description = "RFC 3339, inclusive, on the interval start."),
        ("to" = String, Query, description = "RFC 3339, exclusive, on the interval start."),
    ),
    security((), ("bearer" = [])),
    responses(
        (status = 200, description = "The values.", body = ValuesOut),
        (status = 400, description = "The query string cannot be parsed.", body = crate::http::ErrorBody),
        (status = 404, description = "Unknown station.", body = crate::http::ErrorBody),
        (status = 422, description = "A missing, unknown or invalid parameter, or a range of too many intervals.", body = crate::http::ErrorBody),
    )
)]
async fn values(
    _: ReadAccess,
    State(state): State<AppState>,
    Path(station_key): Path<String>,
    query: RawPairs,
) -> Result<Json<ValuesOut>, ApiError> {
    let params = Params::parse(query, &["quantity", "from", "to"])?;
    let quantity = params.required_quantity(&state, "quantity")?;
    let (from_ms, to_ms) = params.required_range()?;
    let unknown = || ApiError::not_found(format!("unknown station {station_key:?}"));
    if !is_valid_id(&station_key) {
        return Err(unknown());
    }
    let station = state
        .store
        .list_stations()
        .await?
        .into_iter()
        .find(|station| station.key == station_key)
        .ok_or_else(unknown)?;
    let area = find_area(&state, &station.area_key).await?;
    check_series_length(from_ms, to_ms, area.interval_ms)?;
    let residuals = state
        .store
        .station_residuals(&station.key, &quantity.key, from_ms, to_ms)
        .await?;
    Ok(Json(ValuesOut {
        station: station.key,
        area: area.key,
        quantity: quantity.key.clone(),
        unit: quantity.unit.clone(),
        interval: interval_name(area.interval_ms),
        from: rfc3339(from_ms),
        to: rfc3339(to_ms),
        points: residuals
            .iter()
            .map(|residual| ValuePoint {
                start: rfc3339(residual.bucket_start_ms),
                station_value: residual.station_value,
                area_median: residual.area_median,
                used: residual.used,
            })
            .collect(),
    }))
}
