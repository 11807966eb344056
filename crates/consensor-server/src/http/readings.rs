//! `POST /v1/readings`: a batch of readings in JSON, NDJSON or SenML, stored atomically.

use std::collections::HashSet;

use axum::body::Bytes;
use axum::extract::rejection::BytesRejection;
use axum::extract::State;
use axum::http::{header, HeaderMap, StatusCode};
use axum::routing::post;
use axum::{Json, Router};
use consensor_store::{BatchOutcome, Store};
use serde::Serialize;

use crate::auth::Caller;
use crate::error::{ApiError, Detail};
use crate::ingest::{self, DecodeError, DecodeLimits};
use crate::state::AppState;

pub fn router() -> Router<AppState> {
    Router::new().route("/v1/readings", post(post_readings))
}

#[derive(Serialize, utoipa::ToSchema)]
struct Accepted {
    accepted: u64,
    duplicates: u64,
    revised: u64,
}

fn decode_error(error: DecodeError) -> ApiError {
    match error {
        DecodeError::Malformed(message) => ApiError::malformed(message),
        DecodeError::UnsupportedMediaType(message) => ApiError::unsupported_media_type(message),
        DecodeError::Empty => ApiError::invalid("the batch holds no readings"),
        DecodeError::Invalid(errors) => invalid_readings(
            errors
                .into_iter()
                .map(|e| Detail {
                    index: Some(e.index),
                    field: e.field,
                    reason: e.reason,
                })
                .collect(),
        ),
    }
}

fn invalid_readings(details: Vec<Detail>) -> ApiError {
    let count = details
        .iter()
        .filter_map(|d| d.index)
        .collect::<HashSet<_>>()
        .len();
    ApiError::invalid(format!(
        "{count} reading(s) of the batch are invalid; nothing was stored"
    ))
    .with_details(details)
}

#[utoipa::path(
    post,
    path = "/v1/readings",
    tag = "ingest",
    summary = "Post a batch of readings",
    description = "Three body formats, chosen by `Content-Type`: JSON `{\"readings\": [...]}`, \
        NDJSON (one reading object per line) and SenML (RFC 8428; times in seconds since the \
        epoch). Convertible units are converted; the value and unit as sent are kept. The batch \
        is atomic: every reading is stored, or none and the answer lists every bad reading by \
        index, field and reason. Implausible values (such as -999) are not input errors: they are \
        stored and set aside by the checks. Sending a reading again counts as a duplicate; a \
        different value for a stored (station, quantity, observed_at) is a new revision. A 200 \
        means the readings are durably stored. Role: station (for its own stations) or admin.",
    request_body(
        description = "The readings.",
        content(
            (crate::http::openapi::ReadingsBatch = "application/json"),
            (crate::http::openapi::ReadingIn = "application/x-ndjson"),
            (Vec<crate::http::openapi::SenmlRecord> = "application/senml+json"),
        )
    ),
    security(("bearer" = [])),
    responses(
        (status = 200, description = "Stored: `accepted` counts newly stored readings (revisions included), not duplicates.", body = Accepted),
        (status = 400, description = "The body is not well-formed JSON, NDJSON or SenML.", body = crate::http::ErrorBody),
        (status = 415, description = "A content type other than the three above.", body = crate::http::ErrorBody),
        (status = 422, description = "Invalid readings (unknown station or quantity, a value that is not a finite number, a bad or future time, an unconvertible unit, an unknown field...), each listed in `details`; nothing was stored.", body = crate::http::ErrorBody),
    )
)]
async fn post_readings(
    caller: Caller,
    State(state): State<AppState>,
    headers: HeaderMap,
    body: Result<Bytes, BytesRejection>,
) -> Result<(StatusCode, Json<Accepted>), ApiError> {
    caller.require_ingest()?;
    let format = ingest::format_for_content_type(
        headers
            .get(header::CONTENT_TYPE)
            .and_then(|value| value.to_str().ok()),
    )
    .map_err(decode_error)?;
    let body = body.map_err(|rejection| {
        if rejection.status() == StatusCode::PAYLOAD_TOO_LARGE {
            ApiError::payload_too_large(state.config.body_limit_bytes)
        } else {
            ApiError::bad_request(rejection.body_text())
        }
    })?;
    let now_ms = state.clock.now_ms();
    let limits = DecodeLimits {
        max_readings: state.config.max_readings_per_batch,
        ..DecodeLimits::default()
    };
    let decoded = ingest::decode_batch(format, &body, now_ms, &limits).map_err(decode_error)?;
    // Counted from here until answered, so that the worker gives way to a burst (`worker.rs`).
    let in_flight = state.ingest.enter(decoded.readings.len());

    // A station token may post only for its own stations: refuse the whole batch otherwise.
    if let Some((_, foreign)) = decoded
        .readings
        .iter()
        .find(|(_, r)| !caller.may_post_for(&r.station))
    {
        return Err(ApiError::forbidden(format!(
            "this token may not post readings for station {:?}",
            foreign.station
        )));
    }

    // Every station must exist and every quantity be in the table; units must convert. The
    // answer lists every bad reading of the batch: the decoder's findings and these together.
    let mut errors = decoded.errors;
    let known = state
        .store
        .station_keys_lookup(&ingest::station_keys(&decoded.readings))
        .await?;
    let readings = ingest::resolve_readings(
        decoded.readings,
        |station| known.contains_key(station),
        &state.config,
        &mut errors,
    );
    let mut details: Vec<Detail> = errors
        .into_iter()
        .map(|e| Detail {
            index: Some(e.index),
            field: e.field,
            reason: e.reason,
        })
        .collect();
    details.sort_by_key(|d| d.index);
    if !details.is_empty() {
        return Err(invalid_readings(details));
    }
    let BatchOutcome {
        accepted,
        duplicates,
        revised,
    } = state.store.insert_batch(&readings, now_ms).await?;
    drop(in_flight);
    tracing::debug!(accepted, duplicates, revised, "batch stored");
    crate::metrics::record_batch_stored(accepted, duplicates, revised);
    Ok((
        StatusCode::OK,
        Json(Accepted {
            accepted,
            duplicates,
            revised,
        }),
    ))
}
