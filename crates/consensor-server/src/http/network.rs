//! The network description: areas, stations and the quantity table.

use axum::extract::{Path, State};
use axum::http::StatusCode;
use axum::routing::{get, put};
use axum::{Json, Router};
use consensor_core::ids::{is_valid_id, IntervalLength};
use consensor_store::{NewArea, NewStation, Store};
use serde::{Deserialize, Serialize};

use crate::auth::{Caller, ReadAccess};
use crate::error::{ApiError, ApiJson, Detail};
use crate::state::AppState;

pub fn router() -> Router<AppState> {
    Router::new()
        .route("/v1/areas", get(list_areas))
        .route("/v1/areas/{area}", put(put_area))
        .route("/v1/stations", get(list_stations))
        .route("/v1/stations/{station}", put(put_station))
        .route("/v1/quantities", get(list_quantities))
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct AreaBody {
    name: String,
    interval: String,
}

#[derive(Serialize)]
struct AreaOut {
    id: String,
    name: String,
    interval: String,
}

fn check_id(kind: &str, id: &str) -> Result<(), ApiError> {
    if is_valid_id(id) {
        Ok(())
    } else {
        Err(ApiError::invalid(format!(
            "{kind} id {id:?} must be 1-64 characters of A-Z a-z 0-9 . _ -"
        ))
        .with_details(vec![Detail {
            index: None,
            field: kind.to_owned(),
            reason: "must be 1-64 characters of A-Z a-z 0-9 . _ -".into(),
        }]))
    }
}

fn check_name(name: &str) -> Result<(), ApiError> {
    if name.trim().is_empty() || name.chars().count() > 200 {
        return Err(
            ApiError::invalid("name must be 1-200 characters").with_details(vec![Detail {
                index: None,
                field: "name".into(),
                reason: "must be 1-200 characters".into(),
            }]),
        );
    }
    Ok(())
}

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
        ApiError::invalid(error.to_string()).with_details(vec![Detail {
            index: None,
            field: "interval".into(),
            reason: error.to_string(),
        }])
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

#[derive(Serialize)]
struct AreaList {
    areas: Vec<AreaOut>,
}

async fn list_areas(
    _: ReadAccess,
    State(state): State<AppState>,
) -> Result<Json<AreaList>, ApiError> {
    let areas = state.store.list_areas().await?;
    Ok(Json(AreaList {
        areas: areas
            .into_iter()
            .map(|area| AreaOut {
                interval: IntervalLength::from_millis(area.interval_ms).map_or_else(
                    || format!("{}ms", area.interval_ms),
                    |l| l.as_str().to_owned(),
                ),
                id: area.key,
                name: area.name,
            })
            .collect(),
    }))
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct StationBody {
    area: String,
    name: String,
    lat: Option<f64>,
    lon: Option<f64>,
    elevation_m: Option<f64>,
}

#[derive(Serialize)]
struct StationOut {
    id: String,
    area: String,
    name: String,
    lat: Option<f64>,
    lon: Option<f64>,
    elevation_m: Option<f64>,
}

fn check_coordinate(field: &str, value: Option<f64>, limit: f64) -> Result<(), ApiError> {
    match value {
        Some(v) if !(v.is_finite() && v.abs() <= limit) => {
            let reason = format!("{v} must be a number from -{limit} to {limit}");
            Err(
                ApiError::invalid(format!("{field}: {reason}")).with_details(vec![Detail {
                    index: None,
                    field: field.into(),
                    reason,
                }]),
            )
        }
        _ => Ok(()),
    }
}

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
    check_coordinate("lat", body.lat, 90.0)?;
    check_coordinate("lon", body.lon, 180.0)?;
    // The Dead Sea shore to above the highest summit (common practice for a sanity bound).
    check_coordinate("elevation_m", body.elevation_m, 9000.0)?;
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
            consensor_store::StoreError::NotFound(_) => ApiError::invalid(format!(
                "area {:?} does not exist; create it first with PUT /v1/areas/{}",
                body.area, body.area
            ))
            .with_details(vec![Detail {
                index: None,
                field: "area".into(),
                reason: "unknown area".into(),
            }]),
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

#[derive(Serialize)]
struct StationList {
    stations: Vec<StationOut>,
}

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

#[derive(Serialize)]
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

#[derive(Serialize)]
struct QuantityList {
    quantities: Vec<QuantityOut>,
    missing_codes: Vec<f64>,
    far_from_consensus_limit: f64,
}

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
