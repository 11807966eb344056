//! `POST /v1/readings`: a batch of readings in JSON, NDJSON or SenML, stored atomically.

use std::collections::HashSet;

use axum::body::Bytes;
use axum::extract::rejection::BytesRejection;
use axum::extract::State;
use axum::http::{header, HeaderMap, StatusCode};
use axum::routing::post;
use axum::{Json, Router};
use consensor_core::units;
use consensor_store::{BatchOutcome, NewReading, Store};
use serde::Serialize;

use crate::auth::Caller;
use crate::error::{ApiError, Detail};
use crate::ingest::{self, DecodeError, DecodeLimits};
use crate::state::AppState;

pub fn router() -> Router<AppState> {
    Router::new().route("/v1/readings", post(post_readings))
}

#[derive(Serialize)]
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
    let mut details: Vec<Detail> = decoded
        .errors
        .into_iter()
        .map(|e| Detail {
            index: Some(e.index),
            field: e.field,
            reason: e.reason,
        })
        .collect();
    let mut keys: Vec<String> = decoded
        .readings
        .iter()
        .map(|(_, r)| r.station.clone())
        .collect();
    keys.sort();
    keys.dedup();
    let known = state.store.station_keys_lookup(&keys).await?;
    let mut readings = Vec::with_capacity(decoded.readings.len());
    for (index, reading) in decoded.readings {
        let mut bad = |field: &str, reason: String| {
            details.push(Detail {
                index: Some(index),
                field: field.into(),
                reason,
            })
        };
        if !known.contains_key(&reading.station) {
            bad("station", format!("unknown station {:?}", reading.station));
        }
        let Some(spec) = state.config.quantity(&reading.quantity) else {
            bad(
                "quantity",
                format!("unknown quantity {:?}", reading.quantity),
            );
            continue;
        };
        let value = match (reading.value, reading.unit.as_deref()) {
            (None, _) => None,
            (Some(value), None) => Some(value),
            (Some(value), Some(unit)) => match units::convert(value, unit, &spec.unit) {
                Ok(converted) => Some(converted),
                Err(error) => {
                    bad("unit", error.to_string());
                    continue;
                }
            },
        };
        readings.push(NewReading {
            station: reading.station,
            quantity: reading.quantity,
            observed_at_ms: reading.observed_at_ms,
            value,
            value_as_sent: reading.value,
            unit_as_sent: reading.unit,
        });
    }
    details.sort_by_key(|d| d.index);
    if !details.is_empty() {
        return Err(invalid_readings(details));
    }
    let BatchOutcome {
        accepted,
        duplicates,
        revised,
    } = state.store.insert_batch(&readings, now_ms).await?;
    tracing::debug!(accepted, duplicates, revised, "batch stored");
    Ok((
        StatusCode::OK,
        Json(Accepted {
            accepted,
            duplicates,
            revised,
        }),
    ))
}
