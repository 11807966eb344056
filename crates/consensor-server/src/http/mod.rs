//! The HTTP API: one module per resource with its own `router()`, merged here.

mod health;
mod limits;
mod network;
mod openapi;
mod ops;
mod overview;
mod params;
mod readings;
mod results;
mod review;
mod station_values;
mod tokens;

use std::time::Duration;

use axum::extract::DefaultBodyLimit;
use axum::Router;
use tower_http::timeout::TimeoutLayer;
use tower_http::trace::TraceLayer;

use crate::error::ApiError;
use crate::state::AppState;

pub use openapi::{document_json as openapi_json, ApiDoc, ErrorBody};

/// The whole application, ready to serve.
pub fn app(state: AppState) -> Router {
    let body_limit = state.config.body_limit_bytes;
    let timeout: Duration = state.config.request_timeout;
    let header_limit = state.config.header_limit_bytes;
    let rate_limiter = crate::rate_limit::RateLimiter::new(&state.config.rate_limit);
    // `/metrics` is served here unless the configuration gives it a listener of its own.
    let metrics = if state.config.metrics_listen.is_none() {
        crate::metrics::router()
    } else {
        Router::new()
    };
    Router::new()
        .merge(ops::router())
        .merge(network::router())
        .merge(tokens::router())
        .merge(readings::router())
        .merge(results::router())
        .merge(review::router())
        .merge(health::router())
        .merge(overview::router())
        .merge(station_values::router())
        .merge(crate::web::router())
        .merge(openapi::router())
        .merge(metrics)
        .fallback(|| async { ApiError::not_found("no such route") })
        .layer(DefaultBodyLimit::max(body_limit))
        .layer(TimeoutLayer::with_status_code(
            axum::http::StatusCode::REQUEST_TIMEOUT,
            timeout,
        ))
        // The auth extractors find the rate limiter among the request's extensions.
        .layer(axum::Extension(rate_limiter))
        .layer(axum::middleware::from_fn_with_state(
            header_limit,
            limits::header_size,
        ))
        // Outside the timeout, so that its 408 gets the contract's error body too.
        .layer(axum::middleware::from_fn(limits::contract_errors))
        .layer(TraceLayer::new_for_http())
        // Outermost, so that the time includes every other layer (a timeout's 408 too); added with
        // `layer`, which runs after routing, so the matched route template is known.
        .layer(axum::middleware::from_fn(crate::metrics::track_http))
        .with_state(state)
}

/// Milliseconds since the epoch as RFC 3339 in UTC (`2026-06-01T07:00:00Z`, with fractional seconds
/// only when there are any).
pub fn rfc3339(ms: i64) -> String {
    chrono::DateTime::from_timestamp_millis(ms)
        .map(|time| time.to_rfc3339_opts(chrono::SecondsFormat::AutoSi, true))
        .unwrap_or_else(|| ms.to_string())
}
