//! Tokens: issue (shown once) and revoke.

use axum::extract::{Path, State};
use axum::http::StatusCode;
use axum::routing::{delete, post};
use axum::{Json, Router};
use consensor_core::ids::is_valid_id;
use consensor_store::Store;
use serde::{Deserialize, Serialize};

use crate::auth::{issue_token, Caller, Role};
use crate::error::{ApiError, ApiJson};
use crate::state::AppState;

pub fn router() -> Router<AppState> {
    Router::new()
        .route("/v1/tokens", post(create))
        .route("/v1/tokens/{id}", delete(revoke))
}

#[derive(Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields)]
struct TokenBody {
    role: String,
    #[serde(default)]
    stations: Vec<String>,
    label: Option<String>,
}

#[derive(Serialize, utoipa::ToSchema)]
struct TokenOut {
    id: String,
    token: String,
    role: String,
    stations: Vec<String>,
    label: Option<String>,
}

#[utoipa::path(
    post,
    path = "/v1/tokens",
    tag = "tokens",
    summary = "Issue a token",
    description = "The token is shown once, in this answer; only its hash is stored. A `station` \
        token needs the station ids it may post for; other roles take none. Role: admin.",
    request_body = TokenBody,
    security(("bearer" = [])),
    responses(
        (status = 201, description = "Issued.", body = TokenOut),
        (status = 400, description = "The body is not well-formed JSON.", body = crate::http::ErrorBody),
        (status = 415, description = "The body is not `application/json`.", body = crate::http::ErrorBody),
        (status = 422, description = "An unknown role, stations that do not fit the role, a label over 200 characters, or an unknown field.", body = crate::http::ErrorBody),
    )
)]
async fn create(
    caller: Caller,
    State(state): State<AppState>,
    ApiJson(body): ApiJson<TokenBody>,
) -> Result<(StatusCode, Json<TokenOut>), ApiError> {
    caller.require_admin()?;
    let role = Role::parse(&body.role).ok_or_else(|| {
        ApiError::invalid_field(
            "role",
            format!(
                "{:?} is not one of admin, operator, station, reader",
                body.role
            ),
        )
    })?;
    if role == Role::Station && body.stations.is_empty() {
        return Err(ApiError::invalid_field(
            "stations",
            "a station token needs at least one station id",
        ));
    }
    if role != Role::Station && !body.stations.is_empty() {
        return Err(ApiError::invalid_field(
            "stations",
            "only a station token is bound to stations",
        ));
    }
    if let Some(bad) = body.stations.iter().find(|s| !is_valid_id(s)) {
        return Err(ApiError::invalid_field(
            "stations",
            format!("{bad:?} is not a valid station id"),
        ));
    }
    if body.label.as_ref().is_some_and(|l| l.chars().count() > 200) {
        return Err(ApiError::invalid_field(
            "label",
            "must be at most 200 characters",
        ));
    }
    let mut stations = body.stations;
    stations.sort();
    stations.dedup();
    let (token, record) = issue_token(&state, role, stations, body.label).await?;
    tracing::info!(token_id = %record.id, role = role.as_str(), "token issued");
    Ok((
        StatusCode::CREATED,
        Json(TokenOut {
            id: record.id,
            token,
            role: record.role,
            stations: record.stations,
            label: record.label,
        }),
    ))
}

#[utoipa::path(
    delete,
    path = "/v1/tokens/{id}",
    tag = "tokens",
    summary = "Revoke a token",
    description = "The token stops working at once. Revoking twice is not an error. Role: admin.",
    params(("id" = String, Path, description = "The token's id, as `POST /v1/tokens` answered it.")),
    security(("bearer" = [])),
    responses(
        (status = 204, description = "Revoked."),
        (status = 404, description = "No token has this id.", body = crate::http::ErrorBody),
    )
)]
async fn revoke(
    caller: Caller,
    State(state): State<AppState>,
    Path(id): Path<String>,
) -> Result<StatusCode, ApiError> {
    caller.require_admin()?;
    state.store.revoke_token(&id, state.clock.now_ms()).await?;
    tracing::info!(token_id = %id, "token revoked");
    Ok(StatusCode::NO_CONTENT)
}
