//! `GET /openapi.json`: the OpenAPI 3.1 description of the HTTP API, generated from the code: each
//! handler carries a `#[utoipa::path]` annotation next to its route, and each wire type derives
//! `ToSchema` beside its `Serialize`/`Deserialize`. This module gathers them, adds what every
//! operation shares (the bearer scheme, and the 401/403/408/500/503 answers), and serves the result.
//!
//! The test `tests/openapi.rs` fetches the document from the running server and compares it with
//! the router itself, both ways, so a route cannot be added without being documented here.

use std::sync::OnceLock;

use axum::http::header;
use axum::response::IntoResponse;
use axum::routing::get;
use axum::Router;
use serde::Serialize;
use utoipa::openapi::security::{HttpAuthScheme, HttpBuilder, SecurityScheme};
use utoipa::openapi::{ContentBuilder, OpenApi as Document, Ref, RefOr, ResponseBuilder};
use utoipa::{Modify, OpenApi, ToSchema};

use crate::error::Detail;
use crate::state::AppState;

/// The body of every error answer (API.md): a machine code, a sentence for people, and, where it
/// helps, the fields at fault.
#[derive(Serialize, ToSchema)]
#[schema(example = json!({
    "error": "invalid_input",
    "message": "1 reading(s) of the batch are invalid; nothing was stored",
    "details": [{"index": 3, "field": "station", "reason": "unknown station \"ST-999\""}]
}))]
pub struct ErrorBody {
    /// Machine code: `bad_request`, `malformed_body`, `invalid_input`, `unauthenticated`,
    /// `forbidden`, `not_found`, `conflict`, `payload_too_large`, `unsupported_media_type`,
    /// `unavailable` or `internal`.
    pub error: String,
    /// A sentence for people.
    pub message: String,
    /// The fields at fault; left out when there is nothing to list.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub details: Vec<Detail>,
}

/// One reading of a JSON batch (the NDJSON body has one such object per line).
#[derive(Serialize, ToSchema)]
#[schema(example = json!({
    "station": "VB-03", "quantity": "air_temperature", "value": 13.9, "unit": "Cel",
    "observed_at": "2026-06-01T07:00:00Z"
}))]
pub struct ReadingIn {
    /// A station id bound to the posting token (any station for an admin token).
    pub station: String,
    /// A quantity of the table in force (`GET /v1/quantities`).
    pub quantity: String,
    /// The value; `null` reports "no value" (stored and set aside as `missing_value`).
    pub value: Option<f64>,
    /// A UCUM unit convertible to the quantity's canonical one; the canonical unit when left out.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub unit: Option<String>,
    /// RFC 3339 time with any offset, at most 10 minutes in the future.
    pub observed_at: String,
}

/// The JSON body of `POST /v1/readings`.
#[derive(Serialize, ToSchema)]
pub struct ReadingsBatch {
    pub readings: Vec<ReadingIn>,
}

/// One record of a SenML pack (RFC 8428). The station id is the last `:`-separated part of the
/// base name before the name (`"bn": "VB-03:"` or `"urn:dev:…:VB-03:"`), the name is the
/// quantity, and times are seconds since the Unix epoch.
#[derive(Serialize, ToSchema)]
pub struct SenmlRecord {
    #[serde(skip_serializing_if = "Option::is_none")]
    pub bn: Option<String>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub bt: Option<f64>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub bu: Option<String>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub bv: Option<f64>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub n: Option<String>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub u: Option<String>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub v: Option<f64>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub t: Option<f64>,
}

/// The generated document.
#[derive(OpenApi)]
#[openapi(
    info(
        title = "Consensor HTTP API",
        description = "Consensor turns raw readings of environmental field stations into one \
            robust value per area, quantity and interval, and lists the readings it set aside \
            with the reason. Authentication: `Authorization: Bearer <token>`; roles `admin`, \
            `operator`, `station`, `reader`. Every error body is `{\"error\", \"message\", \
            \"details\"}`. Results are screened network values, not a regulatory measurement; \
            for heat or air-quality warnings defer to local authorities.",
        license(name = "MIT OR Apache-2.0")
    ),
    paths(
        super::ops::healthz,
        super::ops::readyz,
        super::ops::status,
        super::network::list_areas,
        super::network::put_area,
        super::network::list_stations,
        super::network::put_station,
        super::network::list_quantities,
        super::tokens::create,
        super::tokens::revoke,
        super::readings::post_readings,
        super::results::series,
        super::results::latest,
        super::results::interval,
        super::results::recompute,
        super::review::list_set_aside,
        super::review::review,
        super::review::audit,
        super::health::health,
        super::station_values::values,
        super::overview::overview,
        crate::metrics::scrape_with_token,
        openapi_json,
    ),
    components(schemas(ErrorBody, Detail)),
    modifiers(&SharedAnswers),
    tags(
        (name = "operations", description = "Liveness, readiness, status, metrics and this document."),
        (name = "network", description = "Areas, stations and the quantity table."),
        (name = "tokens", description = "Issuing and revoking tokens (admin)."),
        (name = "ingest", description = "Posting readings."),
        (name = "results", description = "Consensus values per area, quantity and interval."),
        (name = "review", description = "Set-aside readings, review decisions and the audit log."),
        (name = "health", description = "How a station compares with its area."),
    )
)]
pub struct ApiDoc;

/// The document as JSON text, built once.
pub fn document_json() -> &'static str {
    static DOCUMENT: OnceLock<String> = OnceLock::new();
    DOCUMENT.get_or_init(|| {
        ApiDoc::openapi()
            .to_pretty_json()
            .expect("the OpenAPI document serialises")
    })
}

pub fn router() -> Router<AppState> {
    Router::new().route("/openapi.json", get(openapi_json))
}

/// This document.
#[utoipa::path(
    get,
    path = "/openapi.json",
    tag = "operations",
    summary = "The OpenAPI 3.1 description of this API",
    description = "Generated from the code. No token needed.",
    responses((status = 200, description = "The OpenAPI document.", content_type = "application/json", body = Object))
)]
async fn openapi_json() -> impl IntoResponse {
    (
        [(header::CONTENT_TYPE, "application/json")],
        document_json(),
    )
}

/// Adds the bearer security scheme, and to every operation the answers that any route may give:
/// 401 and 403 where a token is accepted, 408 (the request timeout), 500, and 503 where the
/// database is used.
struct SharedAnswers;

/// Routes that answer without touching the database.
const WITHOUT_DATABASE: [&str; 2] = ["/healthz", "/openapi.json"];

impl Modify for SharedAnswers {
    fn modify(&self, document: &mut Document) {
        let components = document.components.get_or_insert_with(Default::default);
        components.add_security_scheme(
            "bearer",
            SecurityScheme::Http(
                HttpBuilder::new()
                    .scheme(HttpAuthScheme::Bearer)
                    .description(Some(
                        "A token issued by POST /v1/tokens, or CONSENSOR_ADMIN_TOKEN.",
                    ))
                    .build(),
            ),
        );
        let error = |description: &str| -> RefOr<utoipa::openapi::Response> {
            RefOr::T(
                ResponseBuilder::new()
                    .description(description)
                    .content(
                        "application/json",
                        ContentBuilder::new()
                            .schema(Some(Ref::from_schema_name("ErrorBody")))
                            .build(),
                    )
                    .build(),
            )
        };
        for (path, item) in document.paths.paths.iter_mut() {
            let operations = [
                &mut item.get,
                &mut item.put,
                &mut item.post,
                &mut item.delete,
                &mut item.patch,
                &mut item.head,
                &mut item.options,
                &mut item.trace,
            ];
            for operation in operations.into_iter().flatten() {
                let takes_token = operation.security.as_ref().is_some_and(|requirements| {
                    requirements
                        .iter()
                        .any(|r| *r != utoipa::openapi::security::SecurityRequirement::default())
                });
                let answers = &mut operation.responses.responses;
                let mut add = |status: &str, description: &str| {
                    answers
                        .entry(status.to_owned())
                        .or_insert_with(|| error(description));
                };
                if takes_token {
                    add("401", "No token, or one that is unknown or revoked.");
                    add("403", "A valid token whose role may not do this.");
                }
                add(
                    "408",
                    "The request took longer than `request_timeout_seconds`.",
                );
                add("500", "An internal error; its cause is logged, not sent.");
                if !WITHOUT_DATABASE.contains(&path.as_str()) {
                    add(
                        "503",
                        "The database is unavailable; nothing was stored. Sent with `Retry-After`.",
                    );
                }
            }
        }
    }
}
