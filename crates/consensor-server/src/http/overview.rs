//! The network at a glance: every area with the newest result of each quantity it has, its number
//! of stations and the time of its newest reading, in one answer.
//!
//! `GET /v1/overview` (reader) exists for the web page's overview: without it a dashboard would ask
//! `GET /v1/areas/{area}/latest` for every area and every quantity of the table, and read a 404 for
//! each pair that has no result (most of them, in a network where not every station measures
//! everything) just to learn which quantities an area has.
//!
//! ```json
//! {"now": "2026-06-01T08:00:00Z",
//!  "areas": [{"id": "velloran-basin", "name": "Velloran Basin", "interval": "10m", "stations": 14,
//!             "last_reading_at": "2026-06-01T07:59:00Z",
//!             "quantities": [{"quantity": "air_temperature", "unit": "Cel", "latest": Point}]}]}
//! ```
//! `now` is the server's clock, so that a page can say how long ago something happened without
//! trusting the viewer's clock. `last_reading_at` is the observation time of the newest reading of
//! any station of the area (null when none has one); `quantities` follows the order of the quantity
//! table and lists only quantities with a computed interval.

use std::collections::BTreeMap;

use axum::extract::State;
use axum::routing::get;
use axum::{Json, Router};
use consensor_store::{ResultRow, Store};
use serde::Serialize;

use super::results::{interval_name, PointOut};
use super::rfc3339;
use crate::auth::ReadAccess;
use crate::error::ApiError;
use crate::state::AppState;

pub fn router() -> Router<AppState> {
    Router::new().route("/v1/overview", get(overview))
}

#[derive(Serialize, utoipa::ToSchema)]
struct OverviewOut {
    now: String,
    areas: Vec<AreaSummary>,
}

#[derive(Serialize, utoipa::ToSchema)]
struct AreaSummary {
    id: String,
    name: String,
    interval: String,
    stations: usize,
    last_reading_at: Option<String>,
    quantities: Vec<QuantitySummary>,
}

#[derive(Serialize, utoipa::ToSchema)]
struct QuantitySummary {
    quantity: String,
    unit: String,
    latest: PointOut,
}

#[utoipa::path(
    get,
    path = "/v1/overview",
    tag = "results",
    summary = "The network at a glance",
    description = "Every area with its number of stations, the time of its newest reading and the \
        newest result of each quantity it has, with the server's `now`. Role: reader (or none \
        with `public_read = true`). These are screened network values, not a regulatory \
        measurement.",
    security((), ("bearer" = [])),
    responses((status = 200, description = "The overview.", body = OverviewOut))
)]
async fn overview(
    _: ReadAccess,
    State(state): State<AppState>,
) -> Result<Json<OverviewOut>, ApiError> {
    let now_ms = state.clock.now_ms();
    let areas = state.store.list_areas().await?;
    let stations = state.store.list_stations().await?;
    let mut station_counts: BTreeMap<&str, usize> = BTreeMap::new();
    for station in &stations {
        *station_counts.entry(&station.area_key).or_default() += 1;
    }
    // The newest observation of each area, in one query however many stations there are.
    let newest = state.store.newest_observation_by_area().await?;
    let last_reading: BTreeMap<&str, i64> = newest
        .iter()
        .map(|(area, newest)| (area.as_str(), *newest))
        .collect();
    // The newest result of every area and quantity, also in one query.
    let newest_results = state.store.latest_of_every_area().await?;
    let latest: BTreeMap<(&str, &str), &ResultRow> = newest_results
        .iter()
        .map(|(area, quantity, row)| ((area.as_str(), quantity.as_str()), row))
        .collect();
    let mut summaries = Vec::with_capacity(areas.len());
    for area in &areas {
        let mut quantities = Vec::new();
        for quantity in &state.config.quantities {
            if let Some(row) = latest.get(&(area.key.as_str(), quantity.key.as_str())) {
                quantities.push(QuantitySummary {
                    quantity: quantity.key.clone(),
                    unit: quantity.unit.clone(),
                    latest: PointOut::from(*row),
                });
            }
        }
        summaries.push(AreaSummary {
            id: area.key.clone(),
            name: area.name.clone(),
            interval: interval_name(area.interval_ms),
            stations: station_counts.get(area.key.as_str()).copied().unwrap_or(0),
            last_reading_at: last_reading.get(area.key.as_str()).copied().map(rfc3339),
            quantities,
        });
    }
    Ok(Json(OverviewOut {
        now: rfc3339(now_ms),
        areas: summaries,
    }))
}
