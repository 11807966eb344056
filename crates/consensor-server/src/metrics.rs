//! Prometheus metrics: `GET /metrics` in the text exposition format (version 0.0.4), the HTTP
//! middleware that times every request, and the recording functions that the ingest route and the
//! consensus worker call.
//!
//! # What is exported
//! Counted as they happen (process-wide, since the start of the process):
//! * `consensor_readings_accepted_total`, `consensor_readings_duplicates_total`,
//!   `consensor_readings_revised_total`: the counts of `POST /v1/readings` answers (API.md
//!   "Ingest": `revised` readings are part of `accepted`).
//! * `consensor_ingest_batches_rejected_total{reason}`: batches refused, by the error code of the
//!   answer (`invalid_input`, `malformed_body`, `unauthenticated`, `forbidden`,
//!   `payload_too_large`, `unsupported_media_type`, `unavailable`, …; `http_<status>` for an
//!   answer without a code, such as a timeout).
//! * `consensor_readings_rejected_total{field}`: readings named invalid in 422 answers, each by the
//!   first field at fault (`station`, `quantity`, `value`, `unit`, `observed_at`, or `other`).
//! * `consensor_set_aside_total{rule}`: readings set aside by the worker, by rule.
//! * `consensor_interval_compute_seconds`: histogram of the time to decide and store one interval.
//! * `consensor_worker_step_failures_total`: worker steps that failed and were retried.
//! * `consensor_worker_ingest_yields_total`: times the worker held its steps back while an ingest
//!   burst was being stored (`worker.yield_above_readings`).
//! * `consensor_http_request_duration_seconds{route, method, status}`: histogram of request
//!   latency, labelled with the route *template* (`/v1/areas/{area}/series`, never the raw path,
//!   so the number of series stays bounded; `unmatched` for requests no route matched).
//!
//! Read from the server's own state at each scrape:
//! * `consensor_worker_lag_seconds`: age of the oldest pending interval's mark (0 when none is
//!   pending), from [`Store::oldest_pending_marked_at`] and the injected clock.
//! * `consensor_pending_intervals`: intervals waiting for the worker.
//! * `consensor_db_pool_connections{state="idle"|"in_use"}`, `consensor_db_pool_max_connections`.
//! * `consensor_database_up`: 1 when the scrape's queries succeeded, 0 otherwise (the two
//!   database-backed gauges are then left out rather than reported stale).
//!
//! # Why one registry per process
//! The worker records through free functions ([`record_bucket_computed`]) rather than through the
//! application state, and one process serves one application, so the counters live in one
//! process-wide recorder, as the default registries of Prometheus client libraries do. The
//! recorder is used as a *local* recorder (`metrics::with_local_recorder`): it is never installed
//! as the global one, so nothing else in the process can replace or read it by accident.
//!
//! # Who may read `/metrics`
//! On the main listener `/metrics` is a read route: it needs a token of any role but `station`,
//! or none when `public_read = true`. With `[metrics] listen` set, it is served on that address
//! only, without a token (bind it to loopback or a private network), and the main listener has no
//! such route.

use std::sync::OnceLock;
use std::time::{Duration, Instant};

use axum::extract::{MatchedPath, Request, State};
use axum::http::{header, Method, StatusCode};
use axum::middleware::Next;
use axum::response::{IntoResponse, Response};
use axum::routing::get;
use axum::Router;
use consensor_core::checks::{IntervalOutcome, Rule};
use consensor_store::Store;
use metrics::{counter, describe_counter, describe_histogram, histogram, Unit};
use metrics_exporter_prometheus::{PrometheusBuilder, PrometheusHandle, PrometheusRecorder};

use crate::auth::ReadAccess;
use crate::error::ErrorSummary;
use crate::state::AppState;

/// The media type of the Prometheus text exposition format.
pub const CONTENT_TYPE: &str = "text/plain; version=0.0.4; charset=utf-8";

/// The route label of requests that no route matched.
pub const UNMATCHED_ROUTE: &str = "unmatched";

/// The ingest route, whose refusals are also counted by reason.
const READINGS_ROUTE: &str = "/v1/readings";

/// Upper bounds (seconds) of the latency and compute-time histograms: 1 ms to 30 s, roughly
/// ×2.5 apart, so that both a cached read (a millisecond) and a large batch or a request that
/// runs into the timeout (30 s by default) land in a bucket of their own (common practice).
const SECONDS_BUCKETS: [f64; 14] = [
    0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0,
];

/// How often histogram samples are folded into their buckets when nobody scrapes (a scrape does
/// it too), so that memory stays bounded on a server that is never scraped.
const UPKEEP_EVERY: Duration = Duration::from_secs(5);

/// Counts one stored ingest batch (called by `POST /v1/readings` once the store has answered).
pub fn record_batch_stored(accepted: u64, duplicates: u64, revised: u64) {
    with_recorder(|| {
        counter!("consensor_readings_accepted_total").increment(accepted);
        counter!("consensor_readings_duplicates_total").increment(duplicates);
        counter!("consensor_readings_revised_total").increment(revised);
    });
}

/// Records one interval that the worker decided and stored: how long it took (claim excluded:
/// loading, deciding and storing), and how many readings its result set aside, by rule name
/// (`Rule::as_str`: `missing_value`, `missing_code`, `out_of_range`, `step`, `flat_line`,
/// `far_from_consensus`; any other name is counted as `other`). Rules with a count of 0 may be
/// passed or left out.
pub fn record_bucket_computed(seconds: f64, set_aside_by_rule: &[(&str, u64)]) {
    with_recorder(|| {
        if seconds.is_finite() && seconds >= 0.0 {
            histogram!("consensor_interval_compute_seconds").record(seconds);
        }
        for (rule, count) in set_aside_by_rule {
            counter!("consensor_set_aside_total", "rule" => rule_label(rule)).increment(*count);
        }
    });
}

/// The set-aside records of an outcome counted by rule name, in the order the rules are applied,
/// with the rules that set nothing aside left out: what [`record_bucket_computed`] takes.
pub fn set_aside_by_rule(outcome: &IntervalOutcome) -> Vec<(&'static str, u64)> {
    Rule::ALL
        .iter()
        .filter_map(|rule| {
            let count = outcome.set_aside.iter().filter(|r| r.rule == *rule).count() as u64;
            (count > 0).then_some((rule.as_str(), count))
        })
        .collect()
}

/// Counts a worker step that failed (and will be retried).
pub fn record_worker_step_failed() {
    with_recorder(|| counter!("consensor_worker_step_failures_total").increment(1));
}

/// Counts one period in which the worker held its steps back for an ingest burst.
pub fn record_worker_yielded() {
    with_recorder(|| counter!("consensor_worker_ingest_yields_total").increment(1));
}

/// Middleware (`axum::middleware::from_fn`) that times every request and counts ingest refusals.
/// It must be added with `Router::layer`, which runs it after routing, so that the matched route
/// template is known.
pub async fn track_http(request: Request, next: Next) -> Response {
    let started = Instant::now();
    let route = request
        .extensions()
        .get::<MatchedPath>()
        .map(|path| path.as_str().to_owned());
    let method = request.method().clone();
    let response = next.run(request).await;
    let seconds = started.elapsed().as_secs_f64();
    let status = response.status();
    let is_ingest = method == Method::POST && route.as_deref() == Some(READINGS_ROUTE);
    with_recorder(|| {
        histogram!(
            "consensor_http_request_duration_seconds",
            "route" => route.unwrap_or_else(|| UNMATCHED_ROUTE.to_owned()),
            "method" => method_label(&method),
            "status" => status.as_str().to_owned(),
        )
        .record(seconds);
        if is_ingest && !status.is_success() {
            count_ingest_refusal(status, response.extensions().get::<ErrorSummary>());
        }
    });
    response
}

/// `GET /metrics` on the main listener: a read route (see the module documentation).
#[utoipa::path(
    get,
    path = "/metrics",
    tag = "operations",
    summary = "Prometheus metrics",
    description = "Counters and histograms in the Prometheus text exposition format (version \
        0.0.4): readings accepted, duplicate, revised and rejected; set-aside readings by rule; \
        worker lag and interval compute time; HTTP latency by route template and status; database \
        pool use. On the main listener this is a read route (a token of any role but `station`, \
        or none when `public_read = true`). When the configuration sets `[metrics] listen`, it is \
        served on that address only, without a token, and this listener answers 404.",
    security((), ("bearer" = [])),
    responses(
        (status = 200, description = "The metrics.", content_type = "text/plain; version=0.0.4; charset=utf-8", body = String),
        (status = 404, description = "Served on the separate metrics listener instead (`[metrics] listen`).", body = crate::http::ErrorBody),
    )
)]
pub async fn scrape_with_token(_: ReadAccess, State(state): State<AppState>) -> Response {
    scrape(State(state)).await
}

/// `GET /metrics` on the separate metrics listener: no token.
pub async fn scrape(State(state): State<AppState>) -> Response {
    let body = render(&state).await;
    ([(header::CONTENT_TYPE, CONTENT_TYPE)], body).into_response()
}

/// The router of the main listener's `/metrics` (merged only when no separate listener is set).
pub fn router() -> Router<AppState> {
    Router::new().route("/metrics", get(scrape_with_token))
}

/// The whole application of the separate metrics listener: `/metrics` without a token, and the
/// contract's 404 body for anything else.
pub fn listener_app(state: AppState) -> Router {
    Router::new()
        .route("/metrics", get(scrape))
        .fallback(|| async {
            crate::error::ApiError::not_found("this listener serves only /metrics")
        })
        .with_state(state)
}

/// The exposition text: everything recorded so far, then the gauges read from `state` now.
pub async fn render(state: &AppState) -> String {
    let mut text = handle().render();
    let pool = state.store.pool_status();
    gauge_family(
        &mut text,
        "consensor_db_pool_connections",
        "Open database connections, idle or in use.",
        &[
            ("state=\"idle\"", f64::from(pool.idle)),
            ("state=\"in_use\"", f64::from(pool.open - pool.idle)),
        ],
    );
    gauge_family(
        &mut text,
        "consensor_db_pool_max_connections",
        "The most connections the database pool may open.",
        &[("", f64::from(pool.max))],
    );
    let pending = state.store.count_pending_buckets().await;
    let oldest = state.store.oldest_pending_marked_at().await;
    let up = match (pending, oldest) {
        (Ok(pending), Ok(oldest)) => {
            let lag_ms = oldest.map_or(0, |marked| (state.clock.now_ms() - marked).max(0));
            gauge_family(
                &mut text,
                "consensor_pending_intervals",
                "Intervals waiting for the consensus worker.",
                &[("", pending as f64)],
            );
            gauge_family(
                &mut text,
                "consensor_worker_lag_seconds",
                "Age of the oldest pending interval's mark; 0 when none is pending.",
                &[("", lag_ms as f64 / 1000.0)],
            );
            1.0
        }
        (pending, oldest) => {
            let error = pending.err().or(oldest.err());
            tracing::warn!(error = ?error, "metrics: could not read the worker's queue");
            0.0
        }
    };
    gauge_family(
        &mut text,
        "consensor_database_up",
        "1 when this scrape could query the database, 0 otherwise.",
        &[("", up)],
    );
    text
}

/// Appends one gauge family (HELP, TYPE and its samples; `labels` is the text between the braces,
/// empty for none).
fn gauge_family(text: &mut String, name: &str, help: &str, samples: &[(&str, f64)]) {
    use std::fmt::Write;
    if !text.is_empty() && !text.ends_with('\n') {
        text.push('\n');
    }
    let _ = writeln!(text, "# HELP {name} {help}");
    let _ = writeln!(text, "# TYPE {name} gauge");
    for (labels, value) in samples {
        if labels.is_empty() {
            let _ = writeln!(text, "{name} {value}");
        } else {
            let _ = writeln!(text, "{name}{{{labels}}} {value}");
        }
    }
}

fn count_ingest_refusal(status: StatusCode, summary: Option<&ErrorSummary>) {
    let reason = summary.map_or_else(
        || format!("http_{}", status.as_u16()),
        |summary| summary.code.to_owned(),
    );
    counter!("consensor_ingest_batches_rejected_total", "reason" => reason).increment(1);
    let Some(summary) = summary else {
        return;
    };
    // One count per invalid reading, for the first field at fault (details are sorted by index).
    let mut last_index = None;
    for (index, field) in &summary.details {
        let Some(index) = index else { continue };
        if last_index == Some(*index) {
            continue;
        }
        last_index = Some(*index);
        counter!("consensor_readings_rejected_total", "field" => field_label(field)).increment(1);
    }
}

/// The reading part a decoder's field name refers to. Field names are spelt as the sender spelt
/// them (an unknown member is reported under its own name), so they are mapped onto a closed set:
/// a label value a client chooses would let it create any number of series.
fn field_label(field: &str) -> &'static str {
    match field {
        "station" | "bn" => "station",
        "quantity" | "n" => "quantity",
        "value" | "v" | "bv" | "vs" | "vb" | "vd" | "s" | "bs" => "value",
        "unit" | "u" | "bu" => "unit",
        "observed_at" | "t" | "bt" => "observed_at",
        _ => "other",
    }
}

/// A rule name from the closed set of the API, or `other`.
fn rule_label(rule: &str) -> &'static str {
    Rule::ALL
        .iter()
        .map(|rule| rule.as_str())
        .find(|name| *name == rule)
        .unwrap_or("other")
}

/// The request method as a label from a closed set (a client may send any token as a method).
fn method_label(method: &Method) -> &'static str {
    match *method {
        Method::GET => "GET",
        Method::HEAD => "HEAD",
        Method::POST => "POST",
        Method::PUT => "PUT",
        Method::DELETE => "DELETE",
        Method::PATCH => "PATCH",
        Method::OPTIONS => "OPTIONS",
        _ => "other",
    }
}

struct Registry {
    recorder: PrometheusRecorder,
    handle: PrometheusHandle,
}

fn registry() -> &'static Registry {
    static REGISTRY: OnceLock<Registry> = OnceLock::new();
    REGISTRY.get_or_init(|| {
        let recorder = PrometheusBuilder::new()
            .set_buckets(&SECONDS_BUCKETS)
            .expect("the bucket list is not empty")
            .build_recorder();
        let handle = recorder.handle();
        metrics::with_local_recorder(&recorder, describe_and_zero);
        let upkeep = handle.clone();
        // A plain thread rather than a task: it must outlive any one async runtime (tests start
        // several in one process).
        let _ = std::thread::Builder::new()
            .name("metrics-upkeep".into())
            .spawn(move || loop {
                std::thread::sleep(UPKEEP_EVERY);
                upkeep.run_upkeep();
            });
        Registry { recorder, handle }
    })
}

fn handle() -> &'static PrometheusHandle {
    &registry().handle
}

fn with_recorder<T>(record: impl FnOnce() -> T) -> T {
    metrics::with_local_recorder(&registry().recorder, record)
}

/// HELP texts, and a zero for every series whose labels are known in advance, so that rates and
/// alerts work from the first scrape (Prometheus instrumentation practice: initialise known series).
fn describe_and_zero() {
    describe_counter!(
        "consensor_readings_accepted_total",
        Unit::Count,
        "Readings newly stored by POST /v1/readings (revisions included, duplicates not)."
    );
    describe_counter!(
        "consensor_readings_duplicates_total",
        Unit::Count,
        "Readings received again with the value already stored (stored once)."
    );
    describe_counter!(
        "consensor_readings_revised_total",
        Unit::Count,
        "Accepted readings that changed the value of an existing reading (a new revision)."
    );
    describe_counter!(
        "consensor_ingest_batches_rejected_total",
        Unit::Count,
        "Batches refused by POST /v1/readings, by the error code of the answer."
    );
    describe_counter!(
        "consensor_readings_rejected_total",
        Unit::Count,
        "Readings named invalid in 422 answers, by the first field at fault."
    );
    describe_counter!(
        "consensor_set_aside_total",
        Unit::Count,
        "Readings set aside by the consensus worker, by rule."
    );
    describe_counter!(
        "consensor_worker_step_failures_total",
        Unit::Count,
        "Consensus worker steps that failed and were retried."
    );
    describe_counter!(
        "consensor_worker_ingest_yields_total",
        Unit::Count,
        "Times the consensus worker held its steps back while an ingest burst was stored."
    );
    describe_histogram!(
        "consensor_interval_compute_seconds",
        Unit::Seconds,
        "Time to load, decide and store one interval's consensus."
    );
    describe_histogram!(
        "consensor_http_request_duration_seconds",
        Unit::Seconds,
        "HTTP request latency by route template, method and status."
    );
    counter!("consensor_readings_accepted_total").increment(0);
    counter!("consensor_readings_duplicates_total").increment(0);
    counter!("consensor_readings_revised_total").increment(0);
    counter!("consensor_worker_step_failures_total").increment(0);
    counter!("consensor_worker_ingest_yields_total").increment(0);
    for rule in Rule::ALL {
        counter!("consensor_set_aside_total", "rule" => rule.as_str()).increment(0);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn labels_come_from_closed_sets() {
        // API.md "Set-aside readings": the six rule names; anything else is not a rule.
        for rule in Rule::ALL {
            assert_eq!(rule_label(rule.as_str()), rule.as_str());
        }
        assert_eq!(rule_label("made_up"), "other");
        // JSON field names and their SenML counterparts (RFC 8428 §4.1, §4.2) map to one part.
        assert_eq!(field_label("observed_at"), "observed_at");
        assert_eq!(field_label("bt"), "observed_at");
        assert_eq!(field_label("u"), "unit");
        assert_eq!(field_label("colour"), "other");
        assert_eq!(method_label(&Method::from_bytes(b"BREW").unwrap()), "other");
        assert_eq!(method_label(&Method::PUT), "PUT");
    }

    #[test]
    fn set_aside_counts_follow_the_rule_order() {
        use consensor_core::checks::SetAside;
        let record = |rule: Rule| SetAside {
            reading_id: 1,
            station: 0,
            observed_at_ms: 0,
            value: Some(1.0),
            value_as_sent: Some(1.0),
            rule,
            score: None,
            threshold: None,
            consensus_median: None,
            consensus_spread: None,
            gap_ms: None,
            window_readings: None,
            station_value: None,
        };
        let outcome = IntervalOutcome {
            set_aside: vec![
                record(Rule::FarFromConsensus),
                record(Rule::Step),
                record(Rule::FarFromConsensus),
            ],
            ..IntervalOutcome::default()
        };
        // Rule::ALL order: step before far_from_consensus.
        assert_eq!(
            set_aside_by_rule(&outcome),
            vec![("step", 1), ("far_from_consensus", 2)]
        );
        assert!(set_aside_by_rule(&IntervalOutcome::default()).is_empty());
    }
}
