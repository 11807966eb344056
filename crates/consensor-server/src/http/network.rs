//! The network description: areas, stations and the quantity table.

use axum::extract::{Path, State};
use axum::http::StatusCode;
use axum::routing::{get, put};
use axum::{Json, Router};
use consensor_core::ids::IntervalLength;
use consensor_store::{NewArea, NewStation, Store};
use serde::{Deserialize, Serialize};

use super::results::interval_name;
use crate::auth::{Caller, ReadAccess};
use crate::error::{ApiError, ApiJson};
use crate::network_fields::{self, ELEVATION_LIMIT_M, LAT_LIMIT, LON_LIMIT};
use crate::state::AppState;

pub fn router() -> Router<AppState> {
    Router::new()
        .route("/v1/areas", get(list_areas))
        .route("/v1/areas/{area}", put(put_area))
        .route("/v1/stations", get(list_stations))
        .route("/v1/stations/{station}", put(put_station))
        .route("/v1/quantities", get(list_quantities))
}

#[derive(Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields)]
struct AreaBody {
    name: String,
    interval: String,
}

#[derive(Serialize, utoipa::ToSchema)]
struct AreaOut {
    id: String,
    name: String,
    interval: String,
}

fn check_id(kind: &str, id: &str) -> Result<(), ApiError> {
    network_fields::check_id(id).map_err(|reason| {
        ApiError::invalid_detail(format!("{kind} id {id:?} {reason}"), kind, reason)
    })
}

fn check_name(name: &str) -> Result<(), ApiError> {
    network_fields::check_name(name)
        .map_err(|reason| ApiError::invalid_detail(format!("name {reason}"), "name", reason))
}

#[utoipa::path(
    put,
    path = "/v1/areas/{area}",
    tag = "network",
    summary = "Create or update an area",
    description = "`interval` is one of `1m, 5m, 10m, 15m, 30m, 1h`; intervals are aligned to the \
        UTC epoch. Role: admin.",
    params(("area" = String, Path, description = "Area id: 1-64 characters of `[A-Za-z0-9._-]`.")),
    request_body = AreaBody,
    security(("bearer" = [])),
    responses(
        (status = 200, description = "Updated.", body = AreaOut),
        (status = 201, description = "Created.", body = AreaOut),
        (status = 400, description = "The body is not well-formed JSON.", body = crate::http::ErrorBody),
        (status = 415, description = "The body is not `application/json`.", body = crate::http::ErrorBody),
        (status = 422, description = "An invalid id, name or interval, or an unknown field.", body = crate::http::ErrorBody),
    )
)]
async fn put_area(
    caller: Caller,
    State(state): State<AppState>,
    Path(area): Path<String>,
    ApiJson(body): ApiJson<AreaBody>,
) -> Result<(StatusCode, Json<AreaOut>), ApiError> {
    caller.require_admin()?;
    check_id("area", &area)?;
    check_name(&body.name)?;
    let interval = IntervalLength::parse(&body.interval).map_err(|error| {
        ApiError::invalid_detail(error.to_string(), "interval", error.to_string())
    })?;
    let upserted = state
        .store
        .upsert_area(&NewArea {
            key: area.clone(),
            name: body.name.clone(),
            interval_ms: interval.as_millis(),
        })
        .await?;
    let status = if upserted.created {
        StatusCode::CREATED
    } else {
        StatusCode::OK
    };
    Ok((
        status,
        Json(AreaOut {
            id: area,
            name: body.name,
            interval: interval.as_str().to_owned(),
        }),
    ))
}

#[derive(Serialize, utoipa::ToSchema)]
struct AreaList {
    areas: Vec<AreaOut>,
}

#[utoipa::path(
    get,
    path = "/v1/areas",
    tag = "network",
    summary = "List the areas",
    description = "Role: reader (or none with `public_read = true`).",
    security((), ("bearer" = [])),
    responses((status = 200, description = "Every area, by id.", body = AreaList))
)]
async fn list_areas(
    _: ReadAccess,
    State(state): State<AppState>,
) -> Result<Json<AreaList>, ApiError> {
    let areas = state.store.list_areas().await?;
    Ok(Json(AreaList {
        areas: areas
            .into_iter()
            .map(|area| AreaOut {
                interval: interval_name(area.interval_ms),
                id: area.key,
                name: area.name,
            })
            .collect(),
    }))
}

#[derive(Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields)]
struct StationBody {
    area: String,
    name: String,
    lat: Option<f64>,
    lon: Option<f64>,
    elevation_m: Option<f64>,
}

#[derive(Serialize, utoipa::ToSchema)]
struct StationOut {
    id: String,
    area: String,
    name: String,
    lat: Option<f64>,
    lon: Option<f64>,
    elevation_m: Option<f64>,
}

fn check_coordinate(field: &str, value: Option<f64>, limit: f64) -> Result<(), ApiError> {
    let Some(v) = value else { return Ok(()) };
    network_fields::check_coordinate(v, limit)
        .map_err(|rule| ApiError::invalid_field(field, format!("{v} {rule}")))
}

#[utoipa::path(
    put,
    path = "/v1/stations/{station}",
    tag = "network",
    summary = "Create or update a station",
    description = "The area must exist. `lat`, `lon` and `elevation_m` are optional. Role: admin.",
    params(("station" = String, Path, description = "Station id: 1-64 characters of `[A-Za-z0-9._-]`.")),
    request_body = StationBody,
    security(("bearer" = [])),
    responses(
        (status = 200, description = "Updated.", body = StationOut),
        (status = 201, description = "Created.", body = StationOut),
        (status = 400, description = "The body is not well-formed JSON.", body = crate::http::ErrorBody),
        (status = 415, description = "The body is not `application/json`.", body = crate::http::ErrorBody),
        (status = 422, description = "An invalid id, name or coordinate, an unknown area, or an unknown field.", body = crate::http::ErrorBody),
    )
)]
async fn put_station(
    caller: Caller,
    State(state): State<AppState>,
    Path(station): Path<String>,
    ApiJson(body): ApiJson<StationBody>,
) -> Result<(StatusCode, Json<StationOut>), ApiError> {
    caller.require_admin()?;
    check_id("station", &station)?;
    check_id("area", &body.area)?;
    check_name(&body.name)?;
    check_coordinate("lat", body.lat, LAT_LIMIT)?;
    check_coordinate("lon", body.lon, LON_LIMIT)?;
    check_coordinate("elevation_m", body.elevation_m, ELEVATION_LIMIT_M)?;
    let upserted = state
        .store
        .upsert_station(&NewStation {
            key: station.clone(),
            area_key: body.area.clone(),
            name: body.name.clone(),
            lat: body.lat,
            lon: body.lon,
            elevation_m: body.elevation_m,
        })
        .await
        .map_err(|error| match error {
            consensor_store::StoreError::NotFound(_) => ApiError::invalid_detail(
                format!(
                    "area {:?} does not exist; create it first with PUT /v1/areas/{}",
                    body.area, body.area
                ),
                "area",
                "unknown area",
            ),
            other => other.into(),
        })?;
    let status = if upserted.created {
        StatusCode::CREATED
    } else {
        StatusCode::OK
    };
    Ok((
        status,
        Json(StationOut {
            id: station,
            area: body.area,
            name: body.name,
            lat: body.lat,
            lon: body.lon,
            elevation_m: body.elevation_m,
        }),
    ))
}

#[derive(Serialize, utoipa::ToSchema)]
struct StationList {
    stations: Vec<StationOut>,
}

#[utoipa::path(
    get,
    path = "/v1/stations",
    tag = "network",
    summary = "List the stations",
    description = "Role: reader (or none with `public_read = true`).",
    security((), ("bearer" = [])),
    responses((status = 200, description = "Every station with its area, by id.", body = StationList))
)]
async fn list_stations(
    _: ReadAccess,
    State(state): State<AppState>,
) -> Result<Json<StationList>, ApiError> {
    let stations = state.store.list_stations().await?;
    Ok(Json(StationList {
        stations: stations
            .into_iter()
            .map(|s| StationOut {
                id: s.key,
                area: s.area_key,
                name: s.name,
                lat: s.lat,
                lon: s.lon,
                elevation_m: s.elevation_m,
            })
            .collect(),
    }))
}

#[derive(Serialize, utoipa::ToSchema)]
struct QuantityOut {
    id: String,
    unit: String,
    range_min: f64,
    range_max: f64,
    range_per_minute: bool,
    step_1min: Option<f64>,
    step_1h: Option<f64>,
    flat_line_min_variation: Option<f64>,
    min_spread: f64,
    circular: bool,
}

#[derive(Serialize, utoipa::ToSchema)]
struct QuantityList {
    quantities: Vec<QuantityOut>,
    missing_codes: Vec<f64>,
    far_from_consensus_limit: f64,
}

#[utoipa::path(
    get,
    path = "/v1/quantities",
    tag = "network",
    summary = "The quantity table in force",
    description = "Built-in defaults with the configuration's overrides, the missing-data codes \
        and the far-from-consensus limit. Units are UCUM case-sensitive codes. Role: reader (or \
        none with `public_read = true`).",
    security((), ("bearer" = [])),
    responses((status = 200, description = "The table.", body = QuantityList))
)]
async fn list_quantities(_: ReadAccess, State(state): State<AppState>) -> Json<QuantityList> {
    Json(QuantityList {
        quantities: state
            .config
            .quantities
            .iter()
            .map(|q| QuantityOut {
                id: q.key.clone(),
                unit: q.unit.clone(),
                range_min: q.range_min,
                range_max: q.range_max,
                range_per_minute: q.range_per_minute,
                step_1min: q.step.map(|s| s.one_minute),
                step_1h: q.step.map(|s| s.one_hour),
                flat_line_min_variation: q.flat_line_min_variation,
                min_spread: q.min_spread,
                circular: q.circular,
            })
            .collect(),
        missing_codes: state.config.rules.missing_codes.clone(),
        far_from_consensus_limit: state.config.rules.far_limit,
    })
}
