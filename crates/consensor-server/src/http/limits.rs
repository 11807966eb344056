//! The edge of the HTTP layer: a limit on the request head that hyper does not apply by itself, and
//! the contract's error body on every error answer ([`contract_errors`]).
//!
//! hyper buffers a request head of up to about 400 KiB (its `DEFAULT_MAX_BUFFER_SIZE`, 8 KiB +
//! 100 × 4 KiB, hyper 1.x) and at most 100 header fields, and answers 431 beyond that; a single
//! 100 KiB header fits, and would reach every handler. This layer refuses a request whose header
//! fields, counted as they are sent (`name: value` plus CRLF), exceed `header_limit_bytes` (default
//! 32 KiB: four 8 KiB header buffers, as common reverse proxies allow by default, from memory),
//! with 431 and the contract's error body, before any handler or token lookup runs.

use axum::extract::{Request, State};
use axum::middleware::Next;
use axum::response::{IntoResponse, Response};

use crate::error::ApiError;

/// Refuses a request whose header fields total more than `limit` bytes with 431.
pub async fn header_size(State(limit): State<usize>, request: Request, next: Next) -> Response {
    let size: usize = request
        .headers()
        .iter()
        .map(|(name, value)| name.as_str().len() + 2 + value.len() + 2)
        .sum();
    if size > limit {
        return ApiError::header_fields_too_large(limit).into_response();
    }
    next.run(request).await
}

/// The longest plain-text error body read back to be wrapped; axum's rejection texts are one line.
const MAX_PLAIN_ERROR_BYTES: usize = 16 * 1024;

/// Gives every error answer the contract's JSON body (API.md: "Every error body is ..."), also
/// those not made as an [`ApiError`]: the plain-text rejections of axum's own extractors (a path
/// segment that is not UTF-8 after percent-decoding, say), the empty 405 of its router and the
/// empty 408 of the timeout layer. Their status and headers (`Allow`, `Retry-After`) are kept;
/// the text, if any, becomes the message. Answers that already carry an error summary, and error
/// pages of another content type (the web page's HTML), pass unchanged.
pub async fn contract_errors(request: Request, next: Next) -> Response {
    let response = next.run(request).await;
    let status = response.status();
    if !(status.is_client_error() || status.is_server_error())
        || response
            .extensions()
            .get::<crate::error::ErrorSummary>()
            .is_some()
    {
        return response;
    }
    let plain_or_empty = match response.headers().get(axum::http::header::CONTENT_TYPE) {
        None => true,
        Some(value) => value.to_str().is_ok_and(|v| v.starts_with("text/plain")),
    };
    if !plain_or_empty {
        return response;
    }
    let (parts, body) = response.into_parts();
    let text = axum::body::to_bytes(body, MAX_PLAIN_ERROR_BYTES)
        .await
        .map(|bytes| String::from_utf8_lossy(&bytes).trim().to_owned())
        .unwrap_or_default();
    let message = if text.is_empty() {
        status.canonical_reason().map_or_else(
            || format!("HTTP status {}", status.as_u16()),
            str::to_lowercase,
        )
    } else {
        text
    };
    let mut wrapped = ApiError::from_status(status, message).into_response();
    for (name, value) in &parts.headers {
        if name != axum::http::header::CONTENT_TYPE && name != axum::http::header::CONTENT_LENGTH {
            wrapped.headers_mut().insert(name.clone(), value.clone());
        }
    }
    wrapped
}
