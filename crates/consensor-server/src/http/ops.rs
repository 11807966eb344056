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

#[derive(Serialize, utoipa::ToSchema)]
struct Health {
    status: &'static str,
}

/// Liveness: the process answers. No authentication, no database.
#[utoipa::path(
    get,
    path = "/healthz",
    tag = "operations",
    summary = "Liveness",
    description = "The process answers. No token, no database.",
    responses((status = 200, description = "The process is alive: `{\"status\": \"ok\"}`.", body = Health))
)]
async fn healthz() -> Json<Health> {
    Json(Health { status: "ok" })
}

/// Readiness: the database answers and every migration is applied.
#[utoipa::path(
    get,
    path = "/readyz",
    tag = "operations",
    summary = "Readiness",
    description = "The database answers and every migration is applied. No token.",
    responses(
        (status = 200, description = "Ready: `{\"status\": \"ready\"}`.", body = Health),
        (status = 503, description = "The database cannot be reached or did not answer within 2 s; `Retry-After` says when to ask again.", body = crate::http::ErrorBody)
    )
)]
async fn readyz(State(state): State<AppState>) -> Result<Json<Health>, ApiError> {
    // While the database is unreachable the pool keeps trying to connect until its acquire timeout;
    // a readiness probe should hear "not ready" well before that, so the check has its own bound.
    match tokio::time::timeout(READINESS_TIMEOUT, state.store.ping()).await {
        Ok(answer) => answer?,
        Err(_) => {
            return Err(ApiError::unavailable(format!(
                "the database did not answer within {} s",
                READINESS_TIMEOUT.as_secs()
            )))
        }
    }
    Ok(Json(Health { status: "ready" }))
}

/// How long `/readyz` waits for the database before answering 503.
const READINESS_TIMEOUT: std::time::Duration = std::time::Duration::from_secs(2);

#[derive(Serialize, utoipa::ToSchema)]
struct Status {
    readings: u64,
    pending_intervals: u64,
    last_computed_at: Option<String>,
}

/// Counts read from the database, so they survive a restart.
#[utoipa::path(
    get,
    path = "/v1/status",
    tag = "operations",
    summary = "Counts of stored readings and pending intervals",
    description = "Read from the database, so they survive a restart. `pending_intervals` is 0 \
        once the worker has caught up. Role: reader (or none with `public_read = true`).",
    security((), ("bearer" = [])),
    responses((status = 200, description = "The counts.", body = Status))
)]
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
