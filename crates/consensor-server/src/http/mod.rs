//! The HTTP API: one module per resource with its own `router()`, merged here.

mod health;
mod network;
mod ops;
mod params;
mod readings;
mod results;
mod review;
mod tokens;

use std::time::Duration;

use axum::extract::DefaultBodyLimit;
use axum::Router;
use tower_http::timeout::TimeoutLayer;
use tower_http::trace::TraceLayer;

use crate::error::ApiError;
use crate::state::AppState;

/// The whole application, ready to serve.
pub fn app(state: AppState) -> Router {
    let body_limit = state.config.body_limit_bytes;
    let timeout: Duration = state.config.request_timeout;
    Router::new()
        .merge(ops::router())
        .merge(network::router())
        .merge(tokens::router())
        .merge(readings::router())
        .merge(results::router())
        .merge(review::router())
        .merge(health::router())
        .fallback(|| async { ApiError::not_found("no such route") })
        .layer(DefaultBodyLimit::max(body_limit))
        .layer(TimeoutLayer::with_status_code(
            axum::http::StatusCode::REQUEST_TIMEOUT,
            timeout,
        ))
        .layer(TraceLayer::new_for_http())
        .with_state(state)
}

/// Milliseconds since the epoch as RFC 3339 in UTC (`2026-06-01T07:00:00Z`, with fractional seconds
/// only when there are any).
pub fn rfc3339(ms: i64) -> String {
    chrono::DateTime::from_timestamp_millis(ms)
        .map(|time| time.to_rfc3339_opts(chrono::SecondsFormat::AutoSi, true))
        .unwrap_or_else(|| ms.to_string())
}
