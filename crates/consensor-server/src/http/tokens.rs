//! Tokens: issue (shown once) and revoke.

use axum::extract::{Path, State};
use axum::http::StatusCode;
use axum::routing::{delete, post};
use axum::{Json, Router};
use consensor_core::ids::is_valid_id;
use consensor_store::Store;
use serde::{Deserialize, Serialize};

use crate::auth::{issue_token, Caller, Role};
use crate::error::{ApiError, ApiJson, Detail};
use crate::state::AppState;

pub fn router() -> Router<AppState> {
    Router::new()
        .route("/v1/tokens", post(create))
        .route("/v1/tokens/{id}", delete(revoke))
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct TokenBody {
    role: String,
    #[serde(default)]
    stations: Vec<String>,
    label: Option<String>,
}

#[derive(Serialize)]
struct TokenOut {
    id: String,
    token: String,
    role: String,
    stations: Vec<String>,
    label: Option<String>,
}

fn invalid(field: &str, reason: String) -> ApiError {
    ApiError::invalid(format!("{field}: {reason}")).with_details(vec![Detail {
        index: None,
        field: field.into(),
        reason,
    }])
}

async fn create(
    caller: Caller,
    State(state): State<AppState>,
    ApiJson(body): ApiJson<TokenBody>,
) -> Result<(StatusCode, Json<TokenOut>), ApiError> {
    caller.require_admin()?;
    let role = Role::parse(&body.role).ok_or_else(|| {
        invalid(
            "role",
            format!(
                "{:?} is not one of admin, operator, station, reader",
                body.role
            ),
        )
    })?;
    if role == Role::Station && body.stations.is_empty() {
        return Err(invalid(
            "stations",
            "a station token needs at least one station id".into(),
        ));
    }
    if role != Role::Station && !body.stations.is_empty() {
        return Err(invalid(
            "stations",
            "only a station token is bound to stations".into(),
        ));
    }
    if let Some(bad) = body.stations.iter().find(|s| !is_valid_id(s)) {
        return Err(invalid(
            "stations",
            format!("{bad:?} is not a valid station id"),
        ));
    }
    if body.label.as_ref().is_some_and(|l| l.chars().count() > 200) {
        return Err(invalid("label", "must be at most 200 characters".into()));
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
