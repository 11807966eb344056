//! Liveness, readiness and status.

use axum::extract::State;
use axum::routing::get;
use axum::{Json, Router};
use consensor_store::Store;
use serde::Serialize;

use crate::auth::ReadAccess;
use crate::error::ApiError;
use crate::state::AppState;

pub fn router() -> Router<AppState> {
    Router::new()
        .route("/healthz", get(healthz))
        .route("/readyz", get(readyz))
        .route("/v1/status", get(status))
}

#[derive(Serialize)]
struct Health {
    status: &'static str,
}

/// Liveness: the process answers. No authentication, no database.
async fn healthz() -> Json<Health> {
    Json(Health { status: "ok" })
}

/// Readiness: the database answers and every migration is applied.
async fn readyz(State(state): State<AppState>) -> Result<Json<Health>, ApiError> {
    state.store.ping().await?;
    Ok(Json(Health { status: "ready" }))
}

#[derive(Serialize)]
struct Status {
    readings: u64,
    pending_intervals: u64,
    last_computed_at: Option<String>,
}

/// Counts read from the database, so they survive a restart.
async fn status(_: ReadAccess, State(state): State<AppState>) -> Result<Json<Status>, ApiError> {
    let readings = state.store.count_readings().await?;
    let pending_intervals = state.store.count_pending_buckets().await?;
    let last_computed_at = state
        .store
        .last_computed_at()
        .await?
        .map(crate::http::rfc3339);
    Ok(Json(Status {
        readings,
        pending_intervals,
        last_computed_at,
    }))
}
