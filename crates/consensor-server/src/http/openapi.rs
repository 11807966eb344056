//! `GET /openapi.json`: the OpenAPI 3.1 description of the HTTP API, generated from the code: each
//! handler carries a `#[utoipa::path]` annotation next to its route, and each wire type derives
//! `ToSchema` beside its `Serialize`/`Deserialize`. This module gathers them, adds what every
//! operation shares (the bearer scheme, and the 401/403/408/413/429/431/500/503 answers of the
//! shared layers and extractors, from one table, [`SHARED_ANSWERS`]), and serves the result.
//!
//! The test `tests/openapi.rs` fetches the document from the running server and compares it with
//! the router itself, both ways, so a route cannot be added without being documented here.

use std::sync::OnceLock;

use axum::http::header;
use axum::response::IntoResponse;
use axum::routing::get;
use axum::Router;
use serde::Serialize;
use utoipa::openapi::header::{Header, HeaderBuilder};
use utoipa::openapi::schema::{ObjectBuilder, Type};
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

/// Adds the bearer security scheme, and to every operation the answers that are not made by its
/// handler but by the layers and extractors every route shares ([`SHARED_ANSWERS`]).
struct SharedAnswers;

/// Which operations a shared answer applies to.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Scope {
    /// Every operation: the answer comes from a layer of the whole application (`http/mod.rs`).
    Every,
    /// Operations that accept a token: the answer comes from the auth extractors (`auth.rs`),
    /// which also apply the rate limit (`rate_limit.rs`).
    TakesToken,
    /// Operations that use the database (all but [`WITHOUT_DATABASE`]; the token lookup uses it).
    UsesDatabase,
    /// Operations with a request body: the body limit (`DefaultBodyLimit` in `http/mod.rs`).
    TakesBody,
}

/// An answer that many operations share, documented once here rather than in each annotation.
struct SharedAnswer {
    status: &'static str,
    description: &'static str,
    scope: Scope,
    /// Sent with `Retry-After` (whole seconds, RFC 9110 §10.2.3).
    retry_after: bool,
}

/// The answers the layers and extractors give, whatever the handler. An operation whose own
/// annotation already documents one of these statuses keeps its own description (and gains the
/// `Retry-After` header where the shared answer has one).
const SHARED_ANSWERS: &[SharedAnswer] = &[
    SharedAnswer {
        status: "413",
        description: "The body is over the size limit (`body_limit_bytes`); nothing was done.",
        scope: Scope::TakesBody,
        retry_after: false,
    },
    SharedAnswer {
        status: "401",
        description: "No token, or one that is unknown or revoked.",
        scope: Scope::TakesToken,
        retry_after: false,
    },
    SharedAnswer {
        status: "403",
        description: "A valid token whose role may not do this.",
        scope: Scope::TakesToken,
        retry_after: false,
    },
    SharedAnswer {
        status: "408",
        description: "The request was not answered within `request_timeout_seconds`, counted from \
            the end of its head and including the time to read its body (a client that trickles \
            its body is cut off). A connection that does not send a complete request head within \
            `request_head_timeout_seconds` is closed without an answer.",
        scope: Scope::Every,
        retry_after: false,
    },
    SharedAnswer {
        status: "429",
        description: "The token (or, for an anonymous read with `public_read`, the client \
            address) has used up its request budget (`[rate_limit]`); nothing was done. \
            `Retry-After` says how many seconds until a request gets through.",
        scope: Scope::TakesToken,
        retry_after: true,
    },
    SharedAnswer {
        status: "431",
        description: "The request's header fields total more than `header_limit_bytes`; nothing \
            was done.",
        scope: Scope::Every,
        retry_after: false,
    },
    SharedAnswer {
        status: "500",
        description: "An internal error; its cause is logged, not sent.",
        scope: Scope::Every,
        retry_after: false,
    },
    SharedAnswer {
        status: "503",
        description: "The database is unavailable (it could not be reached within \
            `database_acquire_timeout_seconds`, or refused the write); nothing was stored. \
            `Retry-After` says when to try again.",
        scope: Scope::UsesDatabase,
        retry_after: true,
    },
];

/// Routes that answer without touching the database.
const WITHOUT_DATABASE: [&str; 2] = ["/healthz", "/openapi.json"];

/// The `Retry-After` header of a 429 or 503.
fn retry_after_header() -> Header {
    HeaderBuilder::new()
        .schema(
            ObjectBuilder::new()
                .schema_type(Type::Integer)
                .minimum(Some(1)),
        )
        .description(Some("Seconds to wait before trying again."))
        .build()
}

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
                let uses_database = !WITHOUT_DATABASE.contains(&path.as_str());
                for answer in SHARED_ANSWERS {
                    let applies = match answer.scope {
                        Scope::Every => true,
                        Scope::TakesToken => takes_token,
                        Scope::UsesDatabase => uses_database,
                        Scope::TakesBody => operation.request_body.is_some(),
                    };
                    if applies {
                        add_answer(&mut operation.responses.responses, answer);
                    }
                }
            }
        }
    }
}

/// Adds `answer` to an operation's responses, or its `Retry-After` header to the operation's own
/// description of that status.
fn add_answer(
    responses: &mut std::collections::BTreeMap<String, RefOr<utoipa::openapi::Response>>,
    answer: &SharedAnswer,
) {
    let response = responses
        .entry(answer.status.to_owned())
        .or_insert_with(|| {
            RefOr::T(
                ResponseBuilder::new()
                    .description(answer.description)
                    .content(
                        "application/json",
                        ContentBuilder::new()
                            .schema(Some(Ref::from_schema_name("ErrorBody")))
                            .build(),
                    )
                    .build(),
            )
        });
    if let (true, RefOr::T(response)) = (answer.retry_after, response) {
        response
            .headers
            .entry("Retry-After".to_owned())
            .or_insert_with(retry_after_header);
    }
}
