//! Consensus results (API.md "Consensus results"): the series of an area and quantity, its latest
//! interval, one interval at any revision, and the admin's request to recompute a range.
//!
//! Every read route answers 404 for an unknown area and 422 for a quantity outside the table in
//! force, so that a typo is never mistaken for "no data yet".

use axum::extract::{Path, State};
use axum::http::StatusCode;
use axum::routing::{get, post};
use axum::{Json, Router};
use consensor_core::ids::IntervalLength;
use consensor_store::{Area, ResultRow, Store};
use serde::Serialize;

use super::params::{invalid_param, Params, RawPairs};
use super::rfc3339;
use crate::auth::{Caller, ReadAccess};
use crate::error::ApiError;
use crate::state::AppState;

/// The most intervals one series request may return. Ten thousand 10-minute points are about ten
/// weeks, and the JSON of that many points is a few megabytes: enough for any chart, small enough
/// to build in memory per request. A longer range is refused with a 422 that says how to split it.
pub const MAX_SERIES_POINTS: i64 = 10_000;

pub fn router() -> Router<AppState> {
    Router::new()
        .route("/v1/areas/{area}/series", get(series))
        .route("/v1/areas/{area}/latest", get(latest))
        .route("/v1/areas/{area}/intervals/{start}", get(interval))
        .route("/v1/areas/{area}/recompute", post(recompute))
}

/// The wire form of one interval's consensus (API.md `Point`). Times are RFC 3339 UTC; every
/// statistic the core could not compute is `null`.
#[derive(Debug, Serialize, utoipa::ToSchema)]
pub struct PointOut {
    start: String,
    end: String,
    median: Option<f64>,
    median_low: Option<f64>,
    median_high: Option<f64>,
    mean: Option<f64>,
    mean_all: Option<f64>,
    mad: Option<f64>,
    spread: Option<f64>,
    ci95_low: Option<f64>,
    ci95_high: Option<f64>,
    huber: Option<f64>,
    stations_used: u32,
    stations_set_aside: u32,
    revision: i64,
    computed_at: String,
    status: &'static str,
}

impl From<&ResultRow> for PointOut {
    fn from(row: &ResultRow) -> Self {
        let point = &row.point;
        PointOut {
            start: rfc3339(row.start_ms),
            end: rfc3339(row.start_ms + row.interval_ms),
            median: point.median,
            median_low: point.median_low,
            median_high: point.median_high,
            mean: point.mean,
            mean_all: point.mean_all,
            mad: point.mad,
            spread: point.spread,
            ci95_low: point.ci95_low,
            ci95_high: point.ci95_high,
            huber: point.huber,
            stations_used: point.stations_used,
            stations_set_aside: point.stations_set_aside,
            revision: row.revision,
            computed_at: rfc3339(row.computed_at_ms),
            status: point.status.as_str(),
        }
    }
}

#[derive(Serialize, utoipa::ToSchema)]
struct SeriesOut {
    area: String,
    quantity: String,
    unit: String,
    interval: String,
    points: Vec<PointOut>,
}

#[derive(Serialize, utoipa::ToSchema)]
struct Queued {
    queued: u64,
}

/// The area with this key, or 404.
pub async fn find_area(state: &AppState, key: &str) -> Result<Area, ApiError> {
    state
        .store
        .list_areas()
        .await?
        .into_iter()
        .find(|area| area.key == key)
        .ok_or_else(|| ApiError::not_found(format!("unknown area {key:?}")))
}

/// The API's spelling of an interval length (`10m`); a length outside the table, which only a
/// database edited by hand could hold, is shown in milliseconds rather than hidden.
pub(super) fn interval_name(interval_ms: i64) -> String {
    IntervalLength::from_millis(interval_ms)
        .map_or_else(|| format!("{interval_ms}ms"), |l| l.as_str().to_owned())
}

/// Refuses a range `[from, to)` of more than [`MAX_SERIES_POINTS`] intervals of `interval_ms`.
pub(super) fn check_series_length(
    from_ms: i64,
    to_ms: i64,
    interval_ms: i64,
) -> Result<(), ApiError> {
    // The number of interval starts in [from, to) is at most the range divided by the length,
    // rounded up.
    let length = interval_ms.max(1);
    let intervals = (to_ms - from_ms + length - 1) / length;
    if intervals > MAX_SERIES_POINTS {
        return Err(invalid_param(
            "to",
            format!(
                "the range holds {intervals} intervals of {}; at most {MAX_SERIES_POINTS} are \
                 returned per request, so split it into shorter ranges",
                interval_name(interval_ms)
            ),
        ));
    }
    Ok(())
}

#[utoipa::path(
    get,
    path = "/v1/areas/{area}/series",
    tag = "results",
    summary = "The consensus series of an area and quantity",
    description = "The latest revision of every interval with a start in `[from, to)`; intervals \
        with no reading at all are left out. At most 10000 intervals per request. Role: reader \
        (or none with `public_read = true`). These are screened network values, not a regulatory \
        measurement.",
    params(
        ("area" = String, Path, description = "Area id."),
        ("quantity" = String, Query, description = "A quantity of the table in force."),
        ("from" = String, Query, description = "RFC 3339, inclusive, on the interval start."),
        ("to" = String, Query, description = "RFC 3339, exclusive, on the interval start."),
    ),
    security((), ("bearer" = [])),
    responses(
        (status = 200, description = "The series.", body = SeriesOut),
        (status = 400, description = "The query string cannot be parsed.", body = crate::http::ErrorBody),
        (status = 404, description = "Unknown area.", body = crate::http::ErrorBody),
        (status = 422, description = "A missing, unknown or invalid parameter, or a range of more than 10000 intervals.", body = crate::http::ErrorBody),
    )
)]
async fn series(
    _: ReadAccess,
    State(state): State<AppState>,
    Path(area_key): Path<String>,
    query: RawPairs,
) -> Result<Json<SeriesOut>, ApiError> {
    let params = Params::parse(query, &["quantity", "from", "to"])?;
    let quantity = params.required_quantity(&state, "quantity")?;
    let (from_ms, to_ms) = params.required_range()?;
    let area = find_area(&state, &area_key).await?;
    check_series_length(from_ms, to_ms, area.interval_ms)?;
    let rows = state
        .store
        .series(&area.key, &quantity.key, from_ms, to_ms)
        .await?;
    Ok(Json(SeriesOut {
        area: area.key,
        quantity: quantity.key.clone(),
        unit: quantity.unit.clone(),
        interval: interval_name(area.interval_ms),
        points: rows.iter().map(PointOut::from).collect(),
    }))
}

#[utoipa::path(
    get,
    path = "/v1/areas/{area}/latest",
    tag = "results",
    summary = "The newest interval with a result",
    description = "Role: reader (or none with `public_read = true`).",
    params(
        ("area" = String, Path, description = "Area id."),
        ("quantity" = String, Query, description = "A quantity of the table in force."),
    ),
    security((), ("bearer" = [])),
    responses(
        (status = 200, description = "The newest computed interval.", body = PointOut),
        (status = 400, description = "The query string cannot be parsed.", body = crate::http::ErrorBody),
        (status = 404, description = "Unknown area, or no interval computed yet.", body = crate::http::ErrorBody),
        (status = 422, description = "A missing, unknown or invalid parameter.", body = crate::http::ErrorBody),
    )
)]
async fn latest(
    _: ReadAccess,
    State(state): State<AppState>,
    Path(area_key): Path<String>,
    query: RawPairs,
) -> Result<Json<PointOut>, ApiError> {
    let params = Params::parse(query, &["quantity"])?;
    let quantity = params.required_quantity(&state, "quantity")?;
    let area = find_area(&state, &area_key).await?;
    let row = state
        .store
        .latest(&area.key, &quantity.key)
        .await?
        .ok_or_else(|| {
            ApiError::not_found(format!(
                "area {:?} has no computed interval of {} yet",
                area.key, quantity.key
            ))
        })?;
    Ok(Json(PointOut::from(&row)))
}

#[utoipa::path(
    get,
    path = "/v1/areas/{area}/intervals/{start}",
    tag = "results",
    summary = "One interval, at its latest or a given revision",
    description = "Earlier revisions stay readable. Role: reader (or none with `public_read = true`).",
    params(
        ("area" = String, Path, description = "Area id."),
        ("start" = String, Path, description = "The interval start, RFC 3339."),
        ("quantity" = String, Query, description = "A quantity of the table in force."),
        ("revision" = Option<i64>, Query, description = "A revision (1, 2, ...); the latest when left out."),
    ),
    security((), ("bearer" = [])),
    responses(
        (status = 200, description = "The interval's result.", body = PointOut),
        (status = 400, description = "The start is not RFC 3339, or the query string cannot be parsed.", body = crate::http::ErrorBody),
        (status = 404, description = "Unknown area, or no such interval or revision.", body = crate::http::ErrorBody),
        (status = 422, description = "A missing, unknown or invalid parameter.", body = crate::http::ErrorBody),
    )
)]
async fn interval(
    _: ReadAccess,
    State(state): State<AppState>,
    Path((area_key, start)): Path<(String, String)>,
    query: RawPairs,
) -> Result<Json<PointOut>, ApiError> {
    let params = Params::parse(query, &["quantity", "revision"])?;
    let quantity = params.required_quantity(&state, "quantity")?;
    let revision = params
        .text("revision")
        .map(|_| params.integer_in("revision", 1, i64::MAX, 1))
        .transpose()?;
    // A path segment that cannot be parsed is a 400 (the error module's convention), unlike the
    // query parameters, which name themselves in a 422.
    let start_ms = chrono::DateTime::parse_from_rfc3339(&start)
        .map(|time| time.timestamp_millis())
        .map_err(|_| {
            ApiError::bad_request(format!(
                "the interval start {start:?} is not an RFC 3339 time such as 2026-06-01T07:00:00Z"
            ))
        })?;
    let area = find_area(&state, &area_key).await?;
    let found = state
        .store
        .result_revision(&area.key, &quantity.key, start_ms, revision)
        .await?;
    match found {
        Some(row) => Ok(Json(PointOut::from(&row))),
        None => {
            // Say why nothing was found when the time cannot be an interval start at all: that is
            // the likelier mistake, and the message names the start the caller probably meant.
            let aligned = start_ms.div_euclid(area.interval_ms.max(1)) * area.interval_ms.max(1);
            let hint = if aligned != start_ms {
                format!(
                    "; intervals of this area are {} long and aligned to the epoch, so the \
                     interval holding that time starts at {}",
                    interval_name(area.interval_ms),
                    rfc3339(aligned)
                )
            } else {
                String::new()
            };
            let which = revision.map_or_else(
                || "a result".to_owned(),
                |revision| format!("revision {revision}"),
            );
            Err(ApiError::not_found(format!(
                "the {} interval of area {:?} starting at {} has no {which}{hint}",
                quantity.key,
                area.key,
                rfc3339(start_ms)
            )))
        }
    }
}

#[utoipa::path(
    post,
    path = "/v1/areas/{area}/recompute",
    tag = "results",
    summary = "Recompute a range of intervals",
    description = "Every interval in `[from, to)` that has readings is recomputed from the stored \
        readings into a new revision; the work shows in `pending_intervals` until done. Role: admin.",
    params(
        ("area" = String, Path, description = "Area id."),
        ("quantity" = Option<String>, Query, description = "One quantity; all when left out."),
        ("from" = String, Query, description = "RFC 3339, inclusive, on the interval start."),
        ("to" = String, Query, description = "RFC 3339, exclusive, on the interval start."),
    ),
    security(("bearer" = [])),
    responses(
        (status = 202, description = "Queued: `queued` intervals will be recomputed.", body = Queued),
        (status = 400, description = "The query string cannot be parsed.", body = crate::http::ErrorBody),
        (status = 404, description = "Unknown area.", body = crate::http::ErrorBody),
        (status = 422, description = "A missing, unknown or invalid parameter.", body = crate::http::ErrorBody),
    )
)]
async fn recompute(
    caller: Caller,
    State(state): State<AppState>,
    Path(area_key): Path<String>,
    query: RawPairs,
) -> Result<(StatusCode, Json<Queued>), ApiError> {
    caller.require_admin()?;
    let params = Params::parse(query, &["quantity", "from", "to"])?;
    let quantity = params.quantity(&state, "quantity")?;
    let (from_ms, to_ms) = params.required_range()?;
    let queued = state
        .store
        .mark_for_recompute(
            &area_key,
            quantity.map(|q| q.key.as_str()),
            from_ms,
            to_ms,
            state.clock.now_ms(),
        )
        .await?;
    tracing::info!(
        area = %area_key,
        quantity = quantity.map_or("all", |q| q.key.as_str()),
        queued,
        "recompute requested"
    );
    Ok((StatusCode::ACCEPTED, Json(Queued { queued })))
}
