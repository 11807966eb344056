//! The web page served beside the API: four views for dashboards and operators, rendered from
//! templates compiled into the binary, with every figure fetched by the page's own script from the
//! JSON API under the caller's token.
//!
//! * `/` — network overview: every area and quantity with its newest result.
//! * `/areas/{area}` — area view: one chart per quantity (median, the median range and the 95 %
//!   interval as bands, the unchecked mean of all stations, and each set-aside reading as a marker
//!   whose shape and colour name its rule).
//! * `/review` — review queue: pending set-aside readings, filtered by area, station, quantity and
//!   rule, decided with `POST /v1/set-aside/{id}/review`; the chart beside it is redrawn from the
//!   recomputed interval.
//! * `/stations/{station}` — station view: its values against the area median, the residual with
//!   its Theil–Sen drift line and interval, the suggested calibration line, its set-aside history.
//!
//! The server holds no session: the page asks for a token and keeps it in the browser tab's
//! `sessionStorage` only, and sends it as `Authorization: Bearer` like any other client. With
//! `public_read = true` the views read without one; deciding a review always needs an operator or
//! admin token. Nothing is fetched from outside: the chart library (Chart.js, MIT licence) is
//! embedded in the binary and served from `/assets/`, and a Content-Security-Policy of `'self'`
//! holds the page to this server.

mod assets;

use askama::Template;
use axum::extract::{Path, State};
use axum::http::{header, HeaderValue, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::routing::get;
use axum::Router;
use consensor_core::ids::is_valid_id;

use crate::state::AppState;

/// The caution every view carries (API.md and the project's rules: values that may inform a heat
/// or air-quality decision say what they are and to whom to defer).
pub const CAUTION: &str = "these are screened network values, not a regulatory measurement. \
For heat or air-quality warnings, defer to local authorities and licensed practice.";

/// The page's Content-Security-Policy: scripts, styles, fetches and images from this server only
/// (the icon is an empty `data:` URL so that browsers do not ask for `/favicon.ico`), no plugins,
/// no framing, no `<base>` rewriting.
pub const CONTENT_SECURITY_POLICY: &str = "default-src 'none'; script-src 'self'; \
style-src 'self'; img-src 'self' data:; connect-src 'self'; font-src 'self'; base-uri 'none'; \
form-action 'self'; frame-ancestors 'none'";

pub fn router() -> Router<AppState> {
    Router::new()
        .route("/", get(overview))
        .route("/areas/{area}", get(area))
        .route("/review", get(review))
        .route("/stations/{station}", get(station))
        .route("/assets/{*path}", get(assets::serve))
}

/// What every view's frame needs.
struct Layout {
    title: String,
    view: &'static str,
    subject: String,
    now_ms: i64,
    public_read: bool,
    caution: &'static str,
    css_url: String,
    chart_url: String,
    app_url: String,
    licence_url: &'static str,
}

impl Layout {
    fn new(state: &AppState, view: &'static str, title: String, subject: String) -> Layout {
        Layout {
            title,
            view,
            subject,
            now_ms: state.clock.now_ms(),
            public_read: state.config.public_read,
            caution: CAUTION,
            css_url: assets::url("consensor.css"),
            chart_url: assets::url(assets::CHART_JS),
            app_url: assets::url("consensor.js"),
            licence_url: assets::CHART_JS_LICENCE,
        }
    }
}

#[derive(Template)]
#[template(path = "overview.html")]
struct OverviewPage {
    layout: Layout,
}

#[derive(Template)]
#[template(path = "area.html")]
struct AreaPage {
    layout: Layout,
}

#[derive(Template)]
#[template(path = "review.html")]
struct ReviewPage {
    layout: Layout,
}

#[derive(Template)]
#[template(path = "station.html")]
struct StationPage {
    layout: Layout,
}

#[derive(Template)]
#[template(path = "not_found.html")]
struct NotFoundPage {
    layout: Layout,
    what: String,
}

async fn overview(State(state): State<AppState>) -> Response {
    html(
        StatusCode::OK,
        OverviewPage {
            layout: Layout::new(&state, "overview", "Network overview".into(), String::new()),
        }
        .render(),
    )
}

async fn area(State(state): State<AppState>, Path(area): Path<String>) -> Response {
    // Whether the area exists is the API's answer, read by the page under the caller's token: the
    // page itself reveals nothing about the network to a caller without one.
    if !is_valid_id(&area) {
        return not_found(&state, format!("{area:?} is not an area id"));
    }
    html(
        StatusCode::OK,
        AreaPage {
            layout: Layout::new(&state, "area", format!("Area {area}"), area),
        }
        .render(),
    )
}

async fn review(State(state): State<AppState>) -> Response {
    html(
        StatusCode::OK,
        ReviewPage {
            layout: Layout::new(&state, "review", "Review queue".into(), String::new()),
        }
        .render(),
    )
}

async fn station(State(state): State<AppState>, Path(station): Path<String>) -> Response {
    if !is_valid_id(&station) {
        return not_found(&state, format!("{station:?} is not a station id"));
    }
    html(
        StatusCode::OK,
        StationPage {
            layout: Layout::new(&state, "station", format!("Station {station}"), station),
        }
        .render(),
    )
}

fn not_found(state: &AppState, what: String) -> Response {
    html(
        StatusCode::NOT_FOUND,
        NotFoundPage {
            layout: Layout::new(state, "not-found", "Not found".into(), String::new()),
            what,
        }
        .render(),
    )
}

/// `answer` with the headers every page and embedded file carries: its content type, its caching
/// rule and `nosniff`.
fn typed_response(
    answer: impl IntoResponse,
    content_type: &'static str,
    cache_control: &'static str,
) -> Response {
    let mut response = answer.into_response();
    let headers = response.headers_mut();
    headers.insert(header::CONTENT_TYPE, HeaderValue::from_static(content_type));
    headers.insert(
        header::CACHE_CONTROL,
        HeaderValue::from_static(cache_control),
    );
    headers.insert(
        header::X_CONTENT_TYPE_OPTIONS,
        HeaderValue::from_static("nosniff"),
    );
    response
}

/// An HTML answer with the page's security headers; a template that fails to render (which only a
/// bug can cause: every value it shows is escaped text) is logged and answered with a plain 500.
fn html(status: StatusCode, rendered: askama::Result<String>) -> Response {
    match rendered {
        Ok(body) => {
            // The page is a frame around data fetched under a token: always revalidate it.
            let mut response =
                typed_response((status, body), "text/html; charset=utf-8", "no-cache");
            let headers = response.headers_mut();
            headers.insert(
                header::CONTENT_SECURITY_POLICY,
                HeaderValue::from_static(CONTENT_SECURITY_POLICY),
            );
            headers.insert(
                header::REFERRER_POLICY,
                HeaderValue::from_static("no-referrer"),
            );
            response
        }
        Err(error) => {
            tracing::error!(error = %error, "could not render a page template");
            (
                StatusCode::INTERNAL_SERVER_ERROR,
                "the page could not be rendered",
            )
                .into_response()
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_policy_allows_nothing_from_elsewhere() {
        // Every fetch directive is 'self' or narrower (data: only for the empty icon).
        for directive in CONTENT_SECURITY_POLICY.split(';') {
            let sources: Vec<&str> = directive.split_whitespace().skip(1).collect();
            for source in sources {
                assert!(
                    ["'self'", "'none'", "data:"].contains(&source),
                    "{directive:?} allows {source:?}"
                );
            }
        }
    }
}
