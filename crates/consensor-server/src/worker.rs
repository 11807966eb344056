//! The consensus worker: a loop around a public step, [`run_once`], that claims pending intervals,
//! decides each with the core's checks and estimators, and stores the result as a new revision
//! together with its set-aside list, in one transaction per interval.
//!
//! Ingest, review decisions and recompute requests mark (area, quantity, interval) buckets pending in
//! the same transaction as their own change; the worker only ever reads that queue. On PostgreSQL
//! several replicas run a worker each: claims use `FOR UPDATE SKIP LOCKED`, so no two compute the
//! same bucket at once, and a claim older than `stale_after` (a crashed worker's) is taken over.

use std::time::Duration;

use anyhow::Context;
use consensor_core::checks::{
    IntervalInput, IntervalOutcome, IntervalScreen, QuantitySpec, Rules, StationReadings,
};
use consensor_store::{ClaimedBucket, IntervalData, Store};

use crate::state::AppState;

/// How the worker runs.
#[derive(Debug, Clone)]
pub struct WorkerSettings {
    /// Names this worker's claims (host and process id by default).
    pub worker_id: String,
    /// Buckets claimed per step.
    pub claim_batch: usize,
    /// A claim older than this is taken over (its worker is presumed dead).
    pub stale_after: Duration,
    /// How far before an interval the step and flat-line tests look back.
    pub history: Duration,
    /// How long an idle worker waits before looking again.
    pub poll_interval: Duration,
}

impl Default for WorkerSettings {
    fn default() -> Self {
        WorkerSettings {
            worker_id: format!("worker-{}", std::process::id()),
            claim_batch: 64,
            stale_after: Duration::from_secs(300),
            // Three hours: an hour for the flat-line window plus room for the step test's chain of
            // "previous accepted reading" to settle before the interval (see consensor-core).
            history: Duration::from_secs(3 * 3600),
            poll_interval: Duration::from_millis(500),
        }
    }
}

/// What one step did.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct Outcome {
    /// Intervals computed and stored.
    pub computed: usize,
}

/// One step: claims up to `claim_batch` pending buckets and computes each.
pub async fn run_once(
    state: &AppState,
    settings: &WorkerSettings,
    now_ms: i64,
) -> anyhow::Result<Outcome> {
    let buckets = state
        .store
        .claim_buckets(
            &settings.worker_id,
            now_ms,
            settings.claim_batch,
            settings.stale_after.as_millis() as i64,
        )
        .await
        .context("could not claim pending intervals")?;
    let mut outcome = Outcome::default();
    for bucket in buckets {
        let Some(spec) = state.config.quantity(&bucket.quantity).cloned() else {
            // A quantity removed from the configuration after its readings were stored: the claim
            // lapses and the bucket waits until the quantity is configured again.
            tracing::warn!(quantity = %bucket.quantity, area = %bucket.area_key, "pending interval of an unconfigured quantity; skipped");
            continue;
        };
        let history_ms = settings.history.as_millis() as i64;
        let data = state
            .store
            .load_interval(
                bucket.area_id,
                &bucket.quantity,
                bucket.bucket_start_ms - history_ms,
                bucket.bucket_start_ms + bucket.interval_ms,
            )
            .await
            .context("could not load an interval's readings")?;
        let rules = state.config.rules.clone();
        let decided = {
            let bucket = bucket.clone();
            // The statistics run on the blocking pool, off the async threads that serve requests.
            tokio::task::spawn_blocking(move || decide(&bucket, &spec, &rules, data))
                .await
                .context("the interval computation panicked")?
        };
        let stored = state
            .store
            .store_result(
                &bucket,
                &decided.outcome,
                &decided.station_ids,
                &decided.reasons,
                state.clock.now_ms(),
            )
            .await
            .context("could not store an interval's result")?;
        tracing::debug!(
            area = %bucket.area_key,
            quantity = %bucket.quantity,
            start = bucket.bucket_start_ms,
            revision = stored.revision,
            "interval computed"
        );
        outcome.computed += 1;
    }
    Ok(outcome)
}

/// Runs [`run_once`] until a step computes nothing; returns how many intervals were computed.
pub async fn run_until_idle(
    state: &AppState,
    settings: &WorkerSettings,
    now_ms: i64,
) -> anyhow::Result<usize> {
    let mut total = 0;
    loop {
        let step = run_once(state, settings, now_ms).await?;
        if step.computed == 0 {
            return Ok(total);
        }
        total += step.computed;
    }
}

/// The worker loop: steps while there is work, waits `poll_interval` when idle, and ends once
/// `stop` turns true (after the step in hand: each interval is stored in its own transaction, so
/// stopping between two never leaves a half-stored result).
pub async fn run(
    state: AppState,
    settings: WorkerSettings,
    mut stop: tokio::sync::watch::Receiver<bool>,
) {
    while !*stop.borrow() {
        let now_ms = state.clock.now_ms();
        let idle = match run_once(&state, &settings, now_ms).await {
            Ok(step) => step.computed == 0,
            Err(error) => {
                tracing::warn!(error = format!("{error:#}"), "worker step failed; retrying");
                true
            }
        };
        if idle {
            tokio::select! {
                _ = stop.changed() => {}
                _ = tokio::time::sleep(settings.poll_interval) => {}
            }
        }
    }
}

/// The decided interval and what storing it needs.
struct Decided {
    outcome: IntervalOutcome,
    station_ids: Vec<i64>,
    reasons: Vec<String>,
}

fn decide(
    bucket: &ClaimedBucket,
    spec: &QuantitySpec,
    rules: &Rules,
    data: IntervalData,
) -> Decided {
    let station_ids: Vec<i64> = data.stations.iter().map(|s| s.station_id).collect();
    let stations: Vec<StationReadings<'_>> = data
        .stations
        .iter()
        .enumerate()
        .map(|(handle, series)| StationReadings {
            station: handle as u32,
            readings: &series.readings,
        })
        .collect();
    let mut overturned: Vec<u64> = data.overturned.iter().copied().collect();
    overturned.sort_unstable();
    let input = IntervalInput {
        quantity: spec,
        rules,
        start_ms: bucket.bucket_start_ms,
        end_ms: bucket.bucket_start_ms + bucket.interval_ms,
        stations: &stations,
        overturned: &overturned,
    };
    let mut outcome = IntervalOutcome::default();
    IntervalScreen::default().screen(&input, &mut outcome);
    let reasons = outcome
        .set_aside
        .iter()
        .map(|record| record.reason(&spec.unit, &rules.missing_codes))
        .collect();
    Decided {
        outcome,
        station_ids,
        reasons,
    }
}
