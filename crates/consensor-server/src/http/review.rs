//! Set-aside readings and their review (API.md "Set-aside readings and review"): the listing of
//! what the checks set aside and why, an operator's decision on one reading, and the audit log of
//! every decision.
//!
//! Who may do what: the listing and the audit log are reads (any non-station token, or anyone when
//! `public_read` is set). The audit log holds nothing the listing does not already show (the
//! listing carries each reading's latest review with its author and note), so hiding it from
//! readers would protect nothing. Deciding needs an operator or admin token, and the decision is
//! recorded under that token's id.

use axum::extract::{Path, State};
use axum::routing::{get, post};
use axum::{Json, Router};
use consensor_core::ids::is_valid_id;
use consensor_store::{
    AuditFilter, ReviewDecision, ReviewRecord, ReviewState, SetAsideCursor, SetAsideFilter,
    SetAsideRow, Store,
};
use serde::{Deserialize, Serialize};

use super::params::{check_range, invalid_param, Params, RawPairs};
use super::results::find_area;
use super::rfc3339;
use crate::auth::{Caller, ReadAccess, Role};
use crate::error::{ApiError, ApiJson};
use crate::state::AppState;

/// API.md: `limit` defaults to 100 and must be a whole number from 1 to 1000.
pub const DEFAULT_LIMIT: i64 = 100;
pub const MAX_LIMIT: i64 = 1000;

/// The longest review note kept; a note is a sentence or a paragraph, not a document.
pub const MAX_NOTE_CHARS: usize = 2000;

pub fn router() -> Router<AppState> {
    Router::new()
        .route("/v1/set-aside", get(list_set_aside))
        .route("/v1/set-aside/{reading_id}/review", post(review))
        .route("/v1/audit", get(audit))
}

/// The wire form of one set-aside record (API.md `SetAside`), plus the interval it was judged in,
/// the revision of that interval's result, and the station's interval value that a
/// `far_from_consensus` score was computed on.
#[derive(Serialize, utoipa::ToSchema)]
struct SetAsideOut {
    reading_id: i64,
    station: String,
    area: String,
    quantity: String,
    value: Option<f64>,
    unit: Option<String>,
    value_as_sent: Option<f64>,
    unit_as_sent: Option<String>,
    observed_at: String,
    rule: &'static str,
    reason: String,
    score: Option<f64>,
    threshold: Option<f64>,
    consensus_median: Option<f64>,
    consensus_spread: Option<f64>,
    review: ReviewOut,
    interval_start: String,
    revision: i64,
    station_value: Option<f64>,
}

#[derive(Serialize, utoipa::ToSchema)]
struct ReviewOut {
    state: &'static str,
    by: Option<String>,
    at: Option<String>,
    note: Option<String>,
}

#[derive(Serialize, utoipa::ToSchema)]
struct SetAsidePage {
    items: Vec<SetAsideOut>,
    next_cursor: Option<String>,
}

/// One audit log entry, which is also the answer to a review decision.
#[derive(Serialize, utoipa::ToSchema)]
struct AuditEntryOut {
    id: i64,
    reading_id: i64,
    station: String,
    quantity: String,
    observed_at: String,
    decision: &'static str,
    note: Option<String>,
    by: String,
    at: String,
}

#[derive(Serialize, utoipa::ToSchema)]
struct AuditPage {
    items: Vec<AuditEntryOut>,
    next_cursor: Option<String>,
}

#[derive(Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields)]
struct ReviewBody {
    decision: String,
    #[serde(default)]
    note: Option<String>,
}

impl From<ReviewRecord> for AuditEntryOut {
    fn from(record: ReviewRecord) -> Self {
        AuditEntryOut {
            id: record.id,
            reading_id: record.reading_id,
            station: record.station,
            quantity: record.quantity,
            observed_at: rfc3339(record.observed_at_ms),
            decision: record.decision.as_str(),
            note: record.note,
            by: record.by,
            at: rfc3339(record.at_ms),
        }
    }
}

fn set_aside_out(state: &AppState, row: SetAsideRow) -> SetAsideOut {
    // The canonical unit is the quantity table's; a quantity removed from the configuration since
    // the record was made has none to show.
    let unit = state.config.quantity(&row.quantity).map(|q| q.unit.clone());
    SetAsideOut {
        reading_id: row.reading_id,
        station: row.station,
        area: row.area,
        quantity: row.quantity,
        value: row.value,
        unit,
        value_as_sent: row.value_as_sent,
        unit_as_sent: row.unit_as_sent,
        observed_at: rfc3339(row.observed_at_ms),
        rule: row.rule.as_str(),
        reason: row.reason,
        score: row.score,
        threshold: row.threshold,
        consensus_median: row.consensus_median,
        consensus_spread: row.consensus_spread,
        review: ReviewOut {
            state: row.review.state.as_str(),
            by: row.review.by,
            at: row.review.at_ms.map(rfc3339),
            note: row.review.note,
        },
        interval_start: rfc3339(row.bucket_start_ms),
        revision: row.result_revision,
        station_value: row.station_value,
    }
}

/// A station filter must name a known station: an unknown one would list nothing, which reads as
/// "this station is fine" when it is a typo.
async fn check_station(state: &AppState, name: &str, key: &str) -> Result<(), ApiError> {
    if !is_valid_id(key) {
        return Err(invalid_param(name, format!("{key:?} is not a station id")));
    }
    let known = state.store.station_keys_lookup(&[key.to_owned()]).await?;
    if known.contains_key(key) {
        Ok(())
    } else {
        Err(invalid_param(name, format!("unknown station {key:?}")))
    }
}

#[utoipa::path(
    get,
    path = "/v1/set-aside",
    tag = "review",
    summary = "Readings set aside by the checks",
    description = "Each with its rule, a reason an operator can check by hand, the statistic and \
        its limit, and its review. Pages of `limit` items; pass `next_cursor` back as `cursor`. \
        Role: reader (or none with `public_read = true`).",
    params(
        ("area" = Option<String>, Query, description = "Area id."),
        ("station" = Option<String>, Query, description = "Station id."),
        ("quantity" = Option<String>, Query, description = "A quantity of the table in force."),
        ("from" = Option<String>, Query, description = "RFC 3339, inclusive, on the observation time."),
        ("to" = Option<String>, Query, description = "RFC 3339, exclusive, on the observation time."),
        ("review" = Option<String>, Query, description = "`pending`, `upheld` or `overturned`."),
        ("limit" = Option<i64>, Query, description = "1 to 1000; 100 when left out."),
        ("cursor" = Option<String>, Query, description = "The previous page's `next_cursor`."),
    ),
    security((), ("bearer" = [])),
    responses(
        (status = 200, description = "One page.", body = SetAsidePage),
        (status = 400, description = "The query string cannot be parsed.", body = crate::http::ErrorBody),
        (status = 422, description = "An unknown or invalid parameter (an unknown area or station included).", body = crate::http::ErrorBody),
    )
)]
async fn list_set_aside(
    _: ReadAccess,
    State(state): State<AppState>,
    query: RawPairs,
) -> Result<Json<SetAsidePage>, ApiError> {
    let params = Params::parse(
        query,
        &[
            "area", "station", "quantity", "from", "to", "review", "limit", "cursor",
        ],
    )?;
    let limit = params.integer_in("limit", 1, MAX_LIMIT, DEFAULT_LIMIT)?;
    let quantity = params.quantity(&state, "quantity")?;
    let from_ms = params.time("from")?;
    let to_ms = params.time("to")?;
    check_range(from_ms, to_ms)?;
    let review = params
        .text("review")
        .map(|text| {
            ReviewState::parse(text).ok_or_else(|| {
                invalid_param(
                    "review",
                    format!("{text:?} is not one of pending, upheld, overturned"),
                )
            })
        })
        .transpose()?;
    let cursor = params
        .text("cursor")
        .map(|text| {
            text.parse::<SetAsideCursor>().map_err(|_| {
                invalid_param(
                    "cursor",
                    "not a cursor this listing handed out; pass `next_cursor` back as it is",
                )
            })
        })
        .transpose()?;
    let area = match params.text("area") {
        Some(key) => Some(
            find_area(&state, key)
                .await
                .map_err(|error| {
                    if error.status() == axum::http::StatusCode::NOT_FOUND {
                        invalid_param("area", format!("unknown area {key:?}"))
                    } else {
                        error
                    }
                })?
                .key,
        ),
        None => None,
    };
    if let Some(station) = params.text("station") {
        check_station(&state, "station", station).await?;
    }
    let filter = SetAsideFilter {
        area,
        station: params.text("station").map(str::to_owned),
        quantity: quantity.map(|q| q.key.clone()),
        from_ms,
        to_ms,
        review,
    };
    let page = state
        .store
        .list_set_aside(&filter, limit as usize, cursor)
        .await?;
    Ok(Json(SetAsidePage {
        items: page
            .items
            .into_iter()
            .map(|row| set_aside_out(&state, row))
            .collect(),
        next_cursor: page.next_cursor.map(|cursor| cursor.to_string()),
    }))
}

#[utoipa::path(
    post,
    path = "/v1/set-aside/{reading_id}/review",
    tag = "review",
    summary = "Uphold or overturn a set-aside reading",
    description = "An overturned reading is used again, and its interval is recomputed at once into \
        a new revision. Every decision is kept in the audit log. Role: operator or admin.",
    params(("reading_id" = i64, Path, description = "The reading id of a set-aside record.")),
    request_body = ReviewBody,
    security(("bearer" = [])),
    responses(
        (status = 200, description = "Recorded: the audit log entry.", body = AuditEntryOut),
        (status = 400, description = "The reading id is not a positive whole number, or the body is not well-formed JSON.", body = crate::http::ErrorBody),
        (status = 404, description = "No result ever set this reading aside.", body = crate::http::ErrorBody),
        (status = 415, description = "The body is not `application/json`.", body = crate::http::ErrorBody),
        (status = 422, description = "A decision other than uphold or overturn, a note over 2000 characters, or an unknown field.", body = crate::http::ErrorBody),
    )
)]
async fn review(
    caller: Caller,
    State(state): State<AppState>,
    Path(reading_id): Path<String>,
    body: Result<ApiJson<ReviewBody>, ApiError>,
) -> Result<Json<AuditEntryOut>, ApiError> {
    match caller.role {
        Role::Admin | Role::Operator => {}
        other => {
            return Err(ApiError::forbidden(format!(
                "reviewing needs an operator or admin token; yours has the role {}",
                other.as_str()
            )))
        }
    }
    // The body is judged only after the role, so that a caller without the right learns that
    // first rather than how to fix a request it may not make.
    let ApiJson(body) = body?;
    // Reading ids are positive row ids; anything else cannot name a reading (a path segment that
    // does not parse is a 400, the error module's convention).
    let reading_id: i64 = match reading_id.parse() {
        Ok(id) if id > 0 => id,
        _ => {
            return Err(ApiError::bad_request(format!(
                "{reading_id:?} is not a reading id (a positive whole number)"
            )))
        }
    };
    let decision = ReviewDecision::parse(&body.decision).ok_or_else(|| {
        ApiError::invalid_field(
            "decision",
            format!("{:?} is not one of uphold, overturn", body.decision),
        )
    })?;
    let note = body
        .note
        .as_deref()
        .map(str::trim)
        .filter(|n| !n.is_empty());
    if note.is_some_and(|n| n.chars().count() > MAX_NOTE_CHARS) {
        return Err(ApiError::invalid_field(
            "note",
            format!("must be at most {MAX_NOTE_CHARS} characters"),
        ));
    }
    // The store appends the decision to the audit log and marks the reading's interval pending in
    // one transaction; the interval is then recomputed here, before the answer, so that the next
    // read already shows the revision that applies the decision.
    let record = state
        .store
        .review_reading(
            reading_id,
            decision,
            note,
            &caller.token_id,
            state.clock.now_ms(),
        )
        .await?;
    tracing::info!(
        reading_id,
        decision = decision.as_str(),
        by = %caller.token_id,
        "review recorded"
    );
    if let Err(error) =
        crate::worker::compute_interval_of_reading(&state, &state.config.worker, reading_id).await
    {
        // The decision is stored and its interval marked: the worker's next poll applies it.
        tracing::warn!(
            reading_id,
            error = format!("{error:#}"),
            "could not recompute the reviewed interval at once; the worker will"
        );
    }
    Ok(Json(AuditEntryOut::from(record)))
}

#[utoipa::path(
    get,
    path = "/v1/audit",
    tag = "review",
    summary = "The audit log of review decisions",
    description = "Newest first. Pages of `limit` items; pass `next_cursor` back as `cursor`. \
        Role: reader (or none with `public_read = true`).",
    params(
        ("reading_id" = Option<i64>, Query, description = "One reading's decisions."),
        ("station" = Option<String>, Query, description = "Station id."),
        ("from" = Option<String>, Query, description = "RFC 3339, inclusive, on the decision time."),
        ("to" = Option<String>, Query, description = "RFC 3339, exclusive, on the decision time."),
        ("limit" = Option<i64>, Query, description = "1 to 1000; 100 when left out."),
        ("cursor" = Option<String>, Query, description = "The previous page's `next_cursor`."),
    ),
    security((), ("bearer" = [])),
    responses(
        (status = 200, description = "One page.", body = AuditPage),
        (status = 400, description = "The query string cannot be parsed.", body = crate::http::ErrorBody),
        (status = 422, description = "An unknown or invalid parameter.", body = crate::http::ErrorBody),
    )
)]
async fn audit(
    _: ReadAccess,
    State(state): State<AppState>,
    query: RawPairs,
) -> Result<Json<AuditPage>, ApiError> {
    let params = Params::parse(
        query,
        &["reading_id", "station", "from", "to", "limit", "cursor"],
    )?;
    let limit = params.integer_in("limit", 1, MAX_LIMIT, DEFAULT_LIMIT)?;
    let reading_id = params
        .text("reading_id")
        .map(|_| params.integer_in("reading_id", 1, i64::MAX, 1))
        .transpose()?;
    let from_ms = params.time("from")?;
    let to_ms = params.time("to")?;
    check_range(from_ms, to_ms)?;
    let before_id = params
        .text("cursor")
        .map(|text| match text.parse::<i64>() {
            Ok(id) if id > 0 => Ok(id),
            _ => Err(invalid_param(
                "cursor",
                "not a cursor this listing handed out; pass `next_cursor` back as it is",
            )),
        })
        .transpose()?;
    if let Some(station) = params.text("station") {
        check_station(&state, "station", station).await?;
    }
    let filter = AuditFilter {
        reading_id,
        station: params.text("station").map(str::to_owned),
        from_ms,
        to_ms,
    };
    let page = state
        .store
        .audit(&filter, limit as usize, before_id)
        .await?;
    Ok(Json(AuditPage {
        items: page.items.into_iter().map(AuditEntryOut::from).collect(),
        next_cursor: page.next_cursor.map(|id| id.to_string()),
    }))
}
