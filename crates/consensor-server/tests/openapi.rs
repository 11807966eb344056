//! `GET /openapi.json` against the real server on a random port, on a real SQLite file and a real
//! PostgreSQL database: the document has the shape OpenAPI 3.1 requires (OpenAPI Specification
//! 3.1.0, "OpenAPI Object", "Paths Object", "Operation Object": `openapi`, `info` and `paths`;
//! `responses` in every operation), it describes exactly the routes the router has, every
//! documented operation reaches a handler, and its error body is API.md's
//! `{"error", "message", "details"}` and matches what the server really sends.
//!
//! The router's routes are read from the router itself: its path templates from its `Debug`
//! output (axum prints the path table of its matcher), and the methods of each path from the
//! `Allow` header of the 405 that the router answers to a method no route uses (RFC 9110 §15.5.6:
//! a 405 lists the allowed methods in `Allow`). A route added without documentation, or a
//! documented route that the router lost, fails `documented_routes_are_exactly_the_routers`.
//!
//! The answers that come from the layers and extractors every route shares (401/403 from the token
//! check, 408 from the request timeout, 413 from the body limit, 429 from the rate limit, 431 from
//! the header limit, 503 when the database is unavailable) must be documented on every operation
//! that can give them (`shared_answers_are_documented_where_they_can_happen`), and the server is
//! made to give 413, 429 and 431 on every documented operation to check that what it really sends
//! is documented (`what_the_server_sends_is_documented`).

mod common;

use std::collections::{BTreeMap, BTreeSet};
use std::sync::Arc;

use common::{TestServer, ADMIN};
use consensor_server::config::Config;
use consensor_store::testing::TestDatabase;
use reqwest::Method;
use serde_json::{json, Value};

on_both_backends!(
    documented_routes_are_exactly_the_routers,
    document_shape_and_error_body,
    shared_answers_are_documented_where_they_can_happen,
    what_the_server_sends_is_documented
);

/// The web pages for people (HTML, served by `crate::web`): they are not part of the API that
/// programs use, so the API description leaves them out. Any other route must be documented; a
/// new page must be added here, on purpose.
const BROWSER_PAGES: [&str; 5] = [
    "/",
    "/areas/{area}",
    "/review",
    "/stations/{station}",
    "/assets/{*path}",
];

/// A method no route uses, so that the router answers 405 with `Allow` for every path.
const PROBE_METHOD: &[u8] = b"PROBE";

/// What the router's fallback answers for a path that no route matches (`http/mod.rs`).
const NO_SUCH_ROUTE: &str = "no such route";

async fn fetch_document(server: &TestServer) -> Value {
    let response = server
        .client
        .get(server.url("/openapi.json"))
        .send()
        .await
        .expect("fetch /openapi.json");
    assert_eq!(response.status(), 200);
    assert!(response.headers()["content-type"]
        .to_str()
        .unwrap()
        .starts_with("application/json"));
    response.json().await.expect("the document is JSON")
}

/// Every (path template, method) the document describes.
fn documented_operations(document: &Value) -> BTreeSet<(String, String)> {
    let mut operations = BTreeSet::new();
    for (path, item) in document["paths"].as_object().expect("paths is an object") {
        for method in [
            "get", "put", "post", "delete", "patch", "head", "options", "trace",
        ] {
            if item.get(method).is_some() {
                operations.insert((path.clone(), method.to_uppercase()));
            }
        }
    }
    operations
}

/// The path templates of the router's path table, read from its `Debug` output:
/// `Router { path_router: PathRouter { routes: {...}, node: Node { paths: {RouteId(1): "/healthz",
/// ...} } }, fallback_router: ... }`. The fallback router's own table (`/{*__private__axum_...}`)
/// comes later and is not read.
fn router_paths(router: &axum::Router) -> BTreeSet<String> {
    let debug = format!("{router:?}");
    let main = debug
        .find("path_router: PathRouter")
        .expect("the router's Debug output names its path router");
    let marker = "node: Node { paths: {";
    let start = debug[main..]
        .find(marker)
        .map(|offset| main + offset + marker.len())
        .expect("the path router's Debug output lists its paths");
    let mut rest = &debug[start..];
    let mut paths = BTreeSet::new();
    loop {
        rest = rest.trim_start_matches([' ', ',']);
        if rest.starts_with('}') {
            break;
        }
        let after_id = rest
            .strip_prefix("RouteId(")
            .and_then(|r| r.find("): \"").map(|end| &r[end + 4..]))
            .unwrap_or_else(|| {
                panic!(
                    "unexpected Debug output at {:?}",
                    &rest[..40.min(rest.len())]
                )
            });
        // A Debug string: read up to the closing quote, undoing `\"` and `\\`.
        let mut path = String::new();
        let mut chars = after_id.char_indices();
        let end = loop {
            match chars.next().expect("an unterminated path") {
                (_, '\\') => path.push(chars.next().expect("an escape").1),
                (index, '"') => break index,
                (_, c) => path.push(c),
            }
        };
        paths.insert(path);
        rest = &after_id[end + 1..];
    }
    assert!(
        paths.len() >= 10,
        "the router's path table could not be read: {paths:?}"
    );
    paths
}

/// A concrete path for a template: each `{name}` replaced by a plausible value.
fn concrete(template: &str) -> String {
    template
        .split('/')
        .map(|segment| match segment {
            "{area}" => "velloran-basin",
            "{station}" => "VB-01",
            "{start}" => "2026-06-01T07:00:00Z",
            "{reading_id}" => "1",
            "{id}" => "tok_0000000000000000",
            other if other.starts_with('{') => "probe",
            other => other,
        })
        .collect::<Vec<_>>()
        .join("/")
}

/// The methods the router has for a path: the `Allow` header of its 405 to an unused method
/// (without `HEAD`, which axum adds to every `GET`).
async fn router_methods(server: &TestServer, template: &str) -> BTreeSet<String> {
    let response = server
        .client
        .request(
            Method::from_bytes(PROBE_METHOD).unwrap(),
            server.url(&concrete(template)),
        )
        .bearer_auth(ADMIN)
        .send()
        .await
        .expect("probe");
    assert_eq!(
        response.status(),
        405,
        "{template}: the router should refuse an unused method"
    );
    let allow = response
        .headers()
        .get("allow")
        .unwrap_or_else(|| panic!("{template}: 405 without Allow"))
        .to_str()
        .unwrap()
        .to_owned();
    let mut methods: BTreeSet<String> = allow
        .split(',')
        .map(|m| m.trim().to_owned())
        .filter(|m| !m.is_empty())
        .collect();
    if methods.contains("GET") {
        methods.remove("HEAD");
    }
    methods
}

async fn documented_routes_are_exactly_the_routers(database: TestDatabase) {
    let url = database.url.clone();
    let server = TestServer::start(database, &[]).await;
    let document = fetch_document(&server).await;
    let documented = documented_operations(&document);

    // The same application as the server's, for its path table.
    let config = Config::load(
        None,
        vec![
            ("CONSENSOR_DATABASE_URL".to_owned(), url),
            ("CONSENSOR_ADMIN_TOKEN".to_owned(), ADMIN.to_owned()),
        ],
        &[],
    )
    .expect("configuration");
    let state =
        consensor_server::serve::open_state(config, Arc::new(consensor_server::state::SystemClock))
            .await
            .expect("state");
    let paths = router_paths(&consensor_server::http::app(state.clone()));
    let mut routed = BTreeSet::new();
    for path in paths
        .iter()
        .filter(|p| !BROWSER_PAGES.contains(&p.as_str()))
    {
        for method in router_methods(&server, path).await {
            routed.insert((path.clone(), method));
        }
    }
    // Every browser page listed above really is a route, so the list cannot go stale silently.
    for page in BROWSER_PAGES {
        assert!(
            paths.contains(page),
            "{page} is listed as a browser page but the router has no such route"
        );
    }
    let undocumented: Vec<_> = routed.difference(&documented).collect();
    let not_routed: Vec<_> = documented.difference(&routed).collect();
    assert!(
        undocumented.is_empty() && not_routed.is_empty(),
        "routes without documentation: {undocumented:?}; documented but not routed: {not_routed:?}"
    );

    // Calibration: a path no route matches gets the fallback's 404.
    let (status, body) = server
        .call(Method::GET, "/no/such/route/here", Some(ADMIN), None)
        .await;
    assert_eq!(
        (status, body["message"].as_str()),
        (404, Some(NO_SUCH_ROUTE))
    );
    // Every documented operation reaches a handler: neither the fallback's 404 nor a 405. (The
    // handler may well refuse the probe's values: 401, 404 for an unknown area, 422 for `{}`.)
    for (path, method) in &documented {
        let body = matches!(method.as_str(), "POST" | "PUT").then(|| json!({}));
        let (status, answer) = server
            .call(
                Method::from_bytes(method.as_bytes()).unwrap(),
                &concrete(path),
                Some(ADMIN),
                body,
            )
            .await;
        assert_ne!(status, 405, "{method} {path}: {answer}");
        assert!(
            !(status == 404 && answer["message"] == NO_SUCH_ROUTE),
            "{method} {path} fell through to the router's fallback"
        );
    }
    consensor_store::Store::close(&state.store).await;
    server.stop().await;
}

async fn document_shape_and_error_body(database: TestDatabase) {
    let server = TestServer::start(database, &[]).await;
    let document = fetch_document(&server).await;
    // OpenAPI 3.1.0 §4.8.1: `openapi` is the version string; `info` has `title` and `version`.
    let version = document["openapi"].as_str().expect("openapi");
    assert!(version.starts_with("3.1."), "{version}");
    assert!(document["info"]["title"].is_string());
    assert!(document["info"]["version"].is_string());
    let paths = document["paths"].as_object().expect("paths");
    assert!(!paths.is_empty());
    // The routes API.md lists are all there (a spot check of the contract's own list).
    for (path, method) in [
        ("/v1/readings", "post"),
        ("/v1/tokens", "post"),
        ("/v1/tokens/{id}", "delete"),
        ("/v1/areas/{area}/series", "get"),
        ("/v1/set-aside/{reading_id}/review", "post"),
        ("/v1/stations/{station}/health", "get"),
        ("/healthz", "get"),
        ("/readyz", "get"),
        ("/metrics", "get"),
        ("/openapi.json", "get"),
    ] {
        assert!(paths[path].get(method).is_some(), "{method} {path}");
    }
    // Every operation has responses, each with a description (OpenAPI 3.1.0 §4.8.17.1), and every
    // error answer with a JSON body uses the one error schema.
    let error_ref = "#/components/schemas/ErrorBody";
    for (path, item) in paths {
        for (method, operation) in item.as_object().unwrap() {
            let responses = operation["responses"]
                .as_object()
                .unwrap_or_else(|| panic!("{method} {path}: no responses"));
            assert!(!responses.is_empty(), "{method} {path}: no responses");
            for (status, response) in responses {
                assert!(
                    response["description"].is_string(),
                    "{method} {path} {status}: no description"
                );
                let code: u16 = status.parse().expect("a numeric status");
                if code >= 400 {
                    assert_eq!(
                        response["content"]["application/json"]["schema"]["$ref"], error_ref,
                        "{method} {path} {status}"
                    );
                }
            }
            // A route that takes a token documents 401.
            let takes_token = operation["security"]
                .as_array()
                .is_some_and(|s| s.iter().any(|r| r.get("bearer").is_some()));
            if takes_token {
                assert!(responses.contains_key("401"), "{method} {path}");
            }
        }
    }
    assert_eq!(
        document["components"]["securitySchemes"]["bearer"]["scheme"],
        "bearer"
    );

    // API.md: every error body is {"error", "message", "details": [{"index", "field", "reason"}]}.
    let schemas = &document["components"]["schemas"];
    let error_body = &schemas["ErrorBody"];
    let keys = |schema: &Value| -> BTreeSet<String> {
        schema["properties"]
            .as_object()
            .expect("properties")
            .keys()
            .cloned()
            .collect()
    };
    let set =
        |names: &[&str]| -> BTreeSet<String> { names.iter().map(|s| s.to_string()).collect() };
    assert_eq!(keys(error_body), set(&["error", "message", "details"]));
    let required: BTreeSet<String> = error_body["required"]
        .as_array()
        .expect("required")
        .iter()
        .map(|v| v.as_str().unwrap().to_owned())
        .collect();
    // `details` appears "only where it helps" (API.md), so only the other two are required.
    assert_eq!(required, set(&["error", "message"]));
    assert_eq!(error_body["properties"]["details"]["type"], "array");
    assert_eq!(
        error_body["properties"]["details"]["items"]["$ref"],
        "#/components/schemas/Detail"
    );
    assert_eq!(keys(&schemas["Detail"]), set(&["index", "field", "reason"]));

    // And the server's real error bodies have exactly that shape.
    let mut real: BTreeMap<&str, Value> = BTreeMap::new();
    real.insert(
        "fallback 404",
        server
            .call(Method::GET, "/no/such/route/here", None, None)
            .await
            .1,
    );
    real.insert(
        "401",
        server.call(Method::GET, "/v1/areas", None, None).await.1,
    );
    let (status, invalid) = server
        .call(
            Method::PUT,
            "/v1/areas/velloran-basin",
            Some(ADMIN),
            Some(json!({"name": "Velloran basin", "interval": "7m"})),
        )
        .await;
    assert_eq!(status, 422);
    assert!(invalid["details"].is_array(), "{invalid}");
    real.insert("422", invalid);
    for (what, body) in &real {
        let object = body.as_object().unwrap_or_else(|| panic!("{what}: {body}"));
        let present: BTreeSet<String> = object.keys().cloned().collect();
        assert!(present.is_subset(&keys(error_body)), "{what}: {body}");
        assert!(present.is_superset(&required), "{what}: {body}");
        for detail in body["details"].as_array().into_iter().flatten() {
            let present: BTreeSet<String> = detail.as_object().unwrap().keys().cloned().collect();
            assert!(
                present.is_subset(&keys(&schemas["Detail"])),
                "{what}: {body}"
            );
        }
    }
    server.stop().await;
}

/// The statuses an operation documents.
fn documented_statuses(operation: &Value) -> BTreeSet<u16> {
    operation["responses"]
        .as_object()
        .expect("responses")
        .keys()
        .map(|status| status.parse().expect("a numeric status"))
        .collect()
}

/// The operation object of `method` (upper case) on `path`.
fn operation<'a>(document: &'a Value, path: &str, method: &str) -> &'a Value {
    &document["paths"][path][method.to_lowercase()]
}

/// Whether an operation accepts a bearer token (its `security` names the scheme).
fn takes_token(operation: &Value) -> bool {
    operation["security"]
        .as_array()
        .is_some_and(|s| s.iter().any(|r| r.get("bearer").is_some()))
}

/// The routes that answer without the database: no token lookup, no query (`/healthz` is
/// liveness, API.md "Operations"; `/openapi.json` is a constant).
const WITHOUT_DATABASE: [&str; 2] = ["/healthz", "/openapi.json"];

/// A documented `Retry-After` header: a whole number of seconds (RFC 9110 §10.2.3, delay-seconds).
#[track_caller]
fn assert_retry_after_documented(operation: &Value, status: &str, what: &str) {
    let header = &operation["responses"][status]["headers"]["Retry-After"];
    assert_eq!(
        header["schema"]["type"], "integer",
        "{what} {status}: Retry-After is not documented as whole seconds: {header}"
    );
}

async fn shared_answers_are_documented_where_they_can_happen(database: TestDatabase) {
    let server = TestServer::start(database, &[]).await;
    let document = fetch_document(&server).await;
    let operations = documented_operations(&document);
    assert!(operations.len() >= 20, "{operations:?}");
    for (path, method) in &operations {
        let what = format!("{method} {path}");
        let operation = operation(&document, path, method);
        let statuses = documented_statuses(operation);
        let mut expected: BTreeSet<u16> = BTreeSet::new();
        // Layers of the whole application (`http/mod.rs`): the request timeout (408), the header
        // limit (431) and the opaque internal error (500) can meet any route.
        expected.extend([408, 431, 500]);
        if takes_token(operation) {
            // The auth extractors: no or unknown token, wrong role, and the rate limit they apply.
            expected.extend([401, 403, 429]);
            assert_retry_after_documented(operation, "429", &what);
        } else {
            // No token, no budget: such a route never answers 429, so it must not say it does.
            assert!(
                !statuses.contains(&429),
                "{what} documents a 429 it cannot send"
            );
        }
        if !WITHOUT_DATABASE.contains(&path.as_str()) {
            expected.insert(503);
            assert_retry_after_documented(operation, "503", &what);
        } else {
            assert!(
                !statuses.contains(&503),
                "{what} documents a 503 it cannot send"
            );
        }
        if operation.get("requestBody").is_some() {
            // The body limit (`body_limit_bytes`).
            expected.insert(413);
        }
        let missing: Vec<_> = expected.difference(&statuses).collect();
        assert!(missing.is_empty(), "{what} does not document {missing:?}");
    }
    // The ingest route in full (API.md "Ingest": 200, 400, 413, 422; "Roles and tokens": 401,
    // 403; the shared answers above; 415 for a content type other than the three formats).
    let ingest = operation(&document, "/v1/readings", "POST");
    assert_eq!(
        documented_statuses(ingest),
        BTreeSet::from([200, 400, 401, 403, 408, 413, 415, 422, 429, 431, 500, 503]),
        "POST /v1/readings"
    );
    // /readyz documents its own 503 (its own 2 s bound), with the shared Retry-After header.
    assert!(
        operation(&document, "/readyz", "GET")["responses"]["503"]["description"]
            .as_str()
            .is_some_and(|d| d.contains("2 s"))
    );
    server.stop().await;
}

/// A request of `method` on `path` with the admin token, optional extra header and raw JSON body;
/// returns the status and whether it came with `Retry-After`.
async fn probe(
    server: &TestServer,
    method: &str,
    path: &str,
    header: Option<(&str, String)>,
    body: Option<String>,
) -> (u16, bool) {
    let mut request = server
        .client
        .request(
            Method::from_bytes(method.as_bytes()).unwrap(),
            server.url(&concrete(path)),
        )
        .bearer_auth(ADMIN);
    if let Some((name, value)) = header {
        request = request.header(name, value);
    }
    if let Some(body) = body {
        request = request
            .header("content-type", "application/json")
            .body(body);
    }
    let response = request.send().await.expect("probe");
    let retry_after = response.headers().contains_key("retry-after");
    (response.status().as_u16(), retry_after)
}

async fn what_the_server_sends_is_documented(database: TestDatabase) {
    // A small body limit, and a rate limit of a few requests that hardly refills (one request per
    // 1000 s), so that the test can run the admin token's budget out on purpose.
    const BURST: usize = 8;
    let burst = BURST.to_string();
    let server = TestServer::start(
        database,
        &[
            ("CONSENSOR_BODY_LIMIT_BYTES", "4096"),
            ("CONSENSOR_RATE_LIMIT__REQUESTS_PER_SECOND", "0.001"),
            ("CONSENSOR_RATE_LIMIT__BURST", &burst),
        ],
    )
    .await;
    let document = fetch_document(&server).await;
    let operations = documented_operations(&document);
    let mut seen: BTreeMap<u16, usize> = BTreeMap::new();
    let mut check = |path: &str, method: &str, status: u16, why: &str| {
        let statuses = documented_statuses(operation(&document, path, method));
        assert!(
            statuses.contains(&status),
            "{method} {path} answered {status} ({why}), which its description does not list: \
             {statuses:?}"
        );
        *seen.entry(status).or_default() += 1;
    };

    // 40 KiB of header fields, over `header_limit_bytes` (32 KiB): 431 (RFC 6585 §5) on every
    // route, before any token is looked at (so no budget is used).
    for (path, method) in &operations {
        let padding = Some(("x-padding", "a".repeat(40 * 1024)));
        let (status, _) = probe(&server, method, path, padding, None).await;
        assert_eq!(status, 431, "{method} {path}");
        check(path, method, status, "header fields over the limit");
    }
    // A body over `body_limit_bytes` on every route that takes one: 413 (RFC 9110 §15.5.14).
    let with_body: Vec<_> = operations
        .iter()
        .filter(|(path, method)| {
            operation(&document, path, method)
                .get("requestBody")
                .is_some()
        })
        .collect();
    assert!(
        with_body.len() >= 5 && with_body.len() < BURST,
        "{with_body:?}"
    );
    for (path, method) in &with_body {
        let body = format!("{{\"name\": \"{}\"}}", "n".repeat(5000));
        let (status, _) = probe(&server, method, path, None, Some(body)).await;
        assert_eq!(status, 413, "{method} {path}");
        check(path, method, status, "a body over the limit");
    }
    // Use up the rest of the admin token's budget, then every route that takes a token answers
    // 429 with Retry-After (RFC 6585 §4), and the others answer as usual.
    let mut used = with_body.len();
    while used < BURST {
        let (status, _) = probe(&server, "GET", "/v1/areas", None, None).await;
        assert_eq!(status, 200);
        used += 1;
    }
    for (path, method) in &operations {
        let body = matches!(method.as_str(), "POST" | "PUT").then(|| "{}".to_owned());
        let (status, retry_after) = probe(&server, method, path, None, body).await;
        if takes_token(operation(&document, path, method)) {
            assert_eq!(status, 429, "{method} {path}");
            assert!(retry_after, "{method} {path}: 429 without Retry-After");
        } else {
            assert_ne!(status, 429, "{method} {path}");
        }
        check(path, method, status, "the admin token's budget used up");
    }
    assert!(
        seen[&431] == operations.len() && seen[&429] > 15,
        "{seen:?}"
    );
    server.stop().await;
}
