//! The consensus worker: a loop around a public step, [`run_once`], that claims pending intervals,
//! decides each with the core's checks and estimators, and stores the result as a new revision
//! together with its set-aside list; neighbouring intervals of one area are loaded with one query,
//! and the results of a step, of all its areas, are stored a few dozen per transaction.
//!
//! Ingest, review decisions and recompute requests mark (area, quantity, interval) buckets pending in
//! the same transaction as their own change; the worker only ever reads that queue. On PostgreSQL
//! several replicas run a worker each: claims use `FOR UPDATE SKIP LOCKED`, so no two compute the
//! same bucket at once, and a claim older than `stale_after` (a crashed worker's) is taken over.

use std::time::{Duration, Instant};

use anyhow::Context;
use consensor_core::checks::{
    IntervalOutcome, IntervalScreen, Judged, JudgedInterval, JudgedStation, Judging, QuantitySpec,
    Rules,
};
use consensor_store::{ClaimedBucket, IntervalClaim, IntervalData, ResultToStore, Store};

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
    /// How long an idle worker waits before looking again.
    pub poll_interval: Duration,
    /// An interval that has not ended yet is computed at most about once per this period while
    /// readings keep arriving in it (it waits this long after the first reading that marked it);
    /// an ended interval is computed as soon as it is claimed.
    pub open_interval_refresh: Duration,
    /// An interval that has ended is computed once no reading has marked it for this long (but at
    /// most `open_interval_refresh` after its first mark), so that a burst of batches re-marking
    /// the same intervals has them computed once it has passed, not after every batch. Zero:
    /// computed as soon as claimed.
    pub settle: Duration,
    /// While more readings than this are in this process's ingest requests (decoded, not yet
    /// answered), the worker starts no step: an outage burst is stored first and computed after
    /// ([`Yielding`]). Zero: never.
    pub yield_above_readings: usize,
    /// The longest the worker holds back in a row; after that it steps as usual until it has
    /// found nothing to do once, so that a stream of large batches cannot starve it.
    pub yield_at_most: Duration,
}

impl Default for WorkerSettings {
    fn default() -> Self {
        WorkerSettings {
            worker_id: format!("worker-{}", std::process::id()),
            claim_batch: 64,
            stale_after: Duration::from_secs(300),
            poll_interval: Duration::from_millis(500),
            // Our own choice: a dashboard's current value is at most half a minute behind, and
            // the worker's load stays flat while every station streams into the open interval
            // (BENCHMARKS.md, "live": 21-28 % of one core for 10,000 stations).
            open_interval_refresh: Duration::from_secs(30),
            // Our own choice: dashboards see an ended interval about a second after its last
            // reading, and an outage burst was stored 4-13 % faster in alternating runs
            // (BENCHMARKS.md, "Load").
            settle: Duration::from_secs(1),
            // Our own choice: two backlog batches of 5,000 waiting. Live stations stay far below
            // it by arithmetic: the load test's 1,000 stations offer 1,000 readings a second, so
            // even a whole second's readings held at once are 1,000 (not measured as a count); an
            // outage burst goes above it (ten batches of 5,000 in flight). With the worker
            // stepping during the burst the backlog batches' p99 was 316-361 ms, with it held back
            // 254-267 ms (BENCHMARKS.md, "Load").
            yield_above_readings: 10_000,
            // Our own choice: well within the load test's bound of one minute for the worker to
            // be back under one interval after a burst.
            yield_at_most: Duration::from_secs(10),
        }
    }
}

/// How often a worker holding back looks at the ingest load again.
const YIELD_CHECK: Duration = Duration::from_millis(50);

/// The worker's giving way to ingest: it waits while ingest is busy, for at most a bound in a row,
/// and once it has waited that long it steps regardless until it has found nothing to do.
#[derive(Debug)]
pub struct Yielding {
    /// The longest wait in a row.
    at_most: Duration,
    /// When the current wait began.
    since: Option<Instant>,
    /// The bound was reached: no more waiting until the worker has been idle.
    spent: bool,
}

/// What the worker does next, as [`Yielding::next`] decides.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Yield {
    /// Take a step.
    Step,
    /// Hold back: a new wait begins.
    Begin,
    /// Hold back: the wait in hand goes on.
    Wait,
}

impl Yielding {
    /// Waits of at most `at_most` in a row.
    pub fn new(at_most: Duration) -> Yielding {
        Yielding {
            at_most,
            since: None,
            spent: false,
        }
    }

    /// What to do at `now`, with ingest `busy` or not.
    pub fn next(&mut self, busy: bool, now: Instant) -> Yield {
        if !busy || self.spent {
            self.since = None;
            return Yield::Step;
        }
        let Some(since) = self.since else {
            if self.at_most.is_zero() {
                self.spent = true;
                return Yield::Step;
            }
            self.since = Some(now);
            return Yield::Begin;
        };
        if now.duration_since(since) < self.at_most {
            return Yield::Wait;
        }
        self.spent = true;
        self.since = None;
        Yield::Step
    }

    /// The worker found nothing to do: it may give way again.
    pub fn idle(&mut self) {
        self.spent = false;
        self.since = None;
    }
}

/// What one step did.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct Outcome {
    /// Intervals computed and stored.
    pub computed: usize,
}

/// One step: claims up to `claim_batch` pending buckets and computes each. Claimed buckets of one
/// area and quantity whose history windows meet form a run: the run's readings are loaded with one
/// query, and every interval of it is decided from its own window of them (exactly the readings a
/// load of that interval alone would give). The step's results, of all its runs, are stored
/// [`STORE_CHUNK`] per transaction as runs are decided.
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
            settings.open_interval_refresh.as_millis() as i64,
            settings.settle.as_millis() as i64,
        )
        .await
        .context("could not claim pending intervals")?;
    let rules = &state.config.rules;
    // Up to RUNS_AT_ONCE runs are read and decided at a time, overlapping the storing of those
    // decided before them. Every run is awaited, even after one has failed, so that no run is
    // still in hand when the caller releases this worker's claims.
    let mut in_flight = tokio::task::JoinSet::new();
    let mut decided = DecidedRuns::default();
    let mut failure: Option<anyhow::Error> = None;
    for run in runs(buckets, rules) {
        let Some(spec) = state.config.quantity(&run[0].quantity).cloned() else {
            // A quantity removed from the configuration after its readings were stored: the claim
            // lapses and the buckets wait until the quantity is configured again.
            tracing::warn!(quantity = %run[0].quantity, area = %run[0].area_key, intervals = run.len(), "pending intervals of an unconfigured quantity; skipped");
            continue;
        };
        if in_flight.len() >= RUNS_AT_ONCE {
            if let Some(joined) = in_flight.join_next().await {
                decided.settle(joined, &mut failure);
            }
        }
        if failure.is_none() && decided.intervals() >= STORE_CHUNK {
            if let Err(error) = decided.store(state).await {
                failure.get_or_insert(error);
            }
        }
        if failure.is_some() {
            // The step fails: the caller releases its claims, and what is neither stored nor
            // started yet is claimed again at a later step.
            break;
        }
        let state = state.clone();
        in_flight.spawn(async move { decide_loaded_run(&state, run, spec).await });
    }
    while let Some(joined) = in_flight.join_next().await {
        decided.settle(joined, &mut failure);
    }
    let computed = match failure {
        Some(error) => return Err(error),
        None => decided.store(state).await?,
    };
    Ok(Outcome { computed })
}

/// Runs decided and not yet stored, in the order they were decided.
#[derive(Default)]
struct DecidedRuns {
    runs: Vec<DecidedRun>,
    /// Intervals stored so far in this step.
    stored: usize,
}

/// One run's buckets, their decisions and how long reading and deciding them took.
struct DecidedRun {
    buckets: Vec<ClaimedBucket>,
    decided: Vec<Decided>,
    seconds: f64,
}

impl DecidedRuns {
    fn intervals(&self) -> usize {
        self.runs.iter().map(|run| run.buckets.len()).sum()
    }

    /// Keeps a finished run's decisions, or its failure (the first failure of the step is kept).
    fn settle(
        &mut self,
        joined: Result<anyhow::Result<DecidedRun>, tokio::task::JoinError>,
        failure: &mut Option<anyhow::Error>,
    ) {
        match joined {
            Ok(Ok(run)) => self.runs.push(run),
            Ok(Err(error)) => {
                failure.get_or_insert(error);
            }
            Err(error) => {
                failure.get_or_insert(anyhow::anyhow!("an interval run panicked: {error}"));
            }
        }
    }

    /// Stores every decided interval in hand, [`STORE_CHUNK`] per transaction, and records each
    /// in the metrics; returns how many intervals this step has stored in all.
    async fn store(&mut self, state: &AppState) -> anyhow::Result<usize> {
        let runs = std::mem::take(&mut self.runs);
        let to_store: Vec<(ResultToStore<'_>, f64)> = runs
            .iter()
            .flat_map(|run| {
                let per_interval = run.seconds / run.buckets.len() as f64;
                run.buckets
                    .iter()
                    .zip(&run.decided)
                    .map(move |(bucket, decided)| {
                        (
                            ResultToStore {
                                bucket,
                                outcome: &decided.outcome,
                                station_ids: &decided.station_ids,
                                reasons: &decided.reasons,
                            },
                            per_interval,
                        )
                    })
            })
            .collect();
        for chunk in to_store.chunks(STORE_CHUNK) {
            let started = std::time::Instant::now();
            let results: Vec<ResultToStore<'_>> = chunk.iter().map(|(result, _)| *result).collect();
            let stored = state
                .store
                .store_results(&results, state.clock.now_ms())
                .await
                .context("could not store an interval's result")?;
            let storing = started.elapsed().as_secs_f64() / chunk.len() as f64;
            for ((result, deciding), stored) in chunk.iter().zip(&stored) {
                crate::metrics::record_bucket_computed(
                    deciding + storing,
                    &crate::metrics::set_aside_by_rule(result.outcome),
                );
                tracing::debug!(
                    area = %result.bucket.area_key,
                    quantity = %result.bucket.quantity,
                    start = result.bucket.bucket_start_ms,
                    revision = stored.revision,
                    "interval computed"
                );
            }
            self.stored += stored.len();
        }
        Ok(self.stored)
    }
}

/// Runs of intervals in hand at once in one step: two, so that on a machine of two cores or more
/// one run's read (SQLite's direct reader, or PostgreSQL) and decision (the blocking pool) overlap
/// the other's store. More would only queue behind SQLite's one writer.
const RUNS_AT_ONCE: usize = 2;

/// Decided intervals stored per transaction: one commit (one flush to disk) for many, while the
/// write lock is held briefly enough that ingest batches on SQLite wait only a little for it.
const STORE_CHUNK: usize = 32;

/// How long a review waits for another worker that holds its interval's claim to finish.
const REVIEW_WAIT: Duration = Duration::from_secs(10);

/// Recomputes, at once, the interval in which a just-reviewed reading was set aside, so that the
/// review's answer is followed by a new revision that applies it. When another worker holds the
/// interval's claim, waits (up to [`REVIEW_WAIT`]) until that worker has finished: either it
/// computed the interval with the review already applied, or the review's mark made it release
/// the claim and this call computes it. Returns whether this call computed it.
pub async fn compute_interval_of_reading(
    state: &AppState,
    settings: &WorkerSettings,
    reading_id: i64,
) -> anyhow::Result<bool> {
    let deadline = tokio::time::Instant::now() + REVIEW_WAIT;
    loop {
        let claim = state
            .store
            .claim_interval_of_reading(
                reading_id,
                // A name of its own, so that the loop's release after a failed step never hands
                // back a claim a review is computing.
                &format!("{}-review", settings.worker_id),
                state.clock.now_ms(),
                settings.stale_after.as_millis() as i64,
            )
            .await
            .context("could not claim the reviewed reading's interval")?;
        match claim {
            IntervalClaim::Claimed(bucket) => {
                let spec = state
                    .config
                    .quantity(&bucket.quantity)
                    .cloned()
                    .with_context(|| format!("quantity {} is not configured", bucket.quantity))?;
                compute_run(state, vec![bucket], spec).await?;
                return Ok(true);
            }
            IntervalClaim::NotPending => return Ok(false),
            IntervalClaim::Busy if tokio::time::Instant::now() >= deadline => {
                anyhow::bail!("another worker still holds the interval's claim")
            }
            IntervalClaim::Busy => tokio::time::sleep(Duration::from_millis(20)).await,
        }
    }
}

/// Loads, decides and stores one run of neighbouring buckets; returns how many were stored.
async fn compute_run(
    state: &AppState,
    run: Vec<ClaimedBucket>,
    spec: QuantitySpec,
) -> anyhow::Result<usize> {
    let mut decided = DecidedRuns::default();
    decided
        .runs
        .push(decide_loaded_run(state, run, spec).await?);
    decided.store(state).await
}

/// Loads one run of neighbouring buckets and decides each of its intervals.
async fn decide_loaded_run(
    state: &AppState,
    run: Vec<ClaimedBucket>,
    spec: QuantitySpec,
) -> anyhow::Result<DecidedRun> {
    let started = std::time::Instant::now();
    let (first, last) = (&run[0], &run[run.len() - 1]);
    let rules = state.config.rules.clone();
    let data = state
        .store
        .load_interval(
            first.area_id,
            &first.quantity,
            rules.chain_start(first.bucket_start_ms),
            last.bucket_start_ms + last.interval_ms,
        )
        .await
        .context("could not load an interval's readings")?;
    // The statistics run on the blocking pool, off the async threads that serve requests.
    let (buckets, decided) = tokio::task::spawn_blocking(move || {
        let decided = decide_run(&run, &spec, &rules, &data);
        (run, decided)
    })
    .await
    .context("the interval computation panicked")?;
    Ok(DecidedRun {
        buckets,
        decided,
        seconds: started.elapsed().as_secs_f64(),
    })
}

/// Splits claimed buckets into runs: buckets of one area and quantity, in time order, where each
/// bucket's history (from `rules.chain_start` of its start) reaches back at least to the end of the
/// one before, so that one load of the run reads no reading that none of its buckets needs.
fn runs(mut buckets: Vec<ClaimedBucket>, rules: &Rules) -> Vec<Vec<ClaimedBucket>> {
    buckets.sort_by_key(|b| (b.area_id, b.quantity_id, b.bucket_start_ms));
    let mut runs: Vec<Vec<ClaimedBucket>> = Vec::new();
    for bucket in buckets {
        match runs.last_mut() {
            Some(run)
                if run.last().is_some_and(|previous| {
                    previous.area_id == bucket.area_id
                        && previous.quantity_id == bucket.quantity_id
                        && rules.chain_start(bucket.bucket_start_ms)
                            <= previous.bucket_start_ms + previous.interval_ms
                }) =>
            {
                run.push(bucket)
            }
            _ => runs.push(vec![bucket]),
        }
    }
    runs
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
/// `stop` turns true (after the step in hand: each result is stored whole in one transaction with
/// others, so stopping between two steps never leaves a half-stored result).
pub async fn run(
    state: AppState,
    settings: WorkerSettings,
    mut stop: tokio::sync::watch::Receiver<bool>,
) {
    let mut yielding = Yielding::new(settings.yield_at_most);
    while !*stop.borrow() {
        let in_flight = state.ingest.readings();
        let busy = settings.yield_above_readings > 0 && in_flight > settings.yield_above_readings;
        let next = yielding.next(busy, Instant::now());
        if next != Yield::Step {
            if next == Yield::Begin {
                crate::metrics::record_worker_yielded();
                tracing::debug!(
                    readings_in_flight = in_flight,
                    "ingest burst: the worker holds its steps back"
                );
            }
            tokio::select! {
                _ = stop.changed() => {}
                _ = tokio::time::sleep(YIELD_CHECK) => {}
            }
            continue;
        }
        let now_ms = state.clock.now_ms();
        let idle = match run_once(&state, &settings, now_ms).await {
            Ok(step) if step.computed == 0 => {
                yielding.idle();
                true
            }
            Ok(_) => false,
            Err(error) => {
                crate::metrics::record_worker_step_failed();
                tracing::warn!(error = format!("{error:#}"), "worker step failed; retrying");
                // Hand back what this step claimed, so that it is retried at the next step rather
                // than after the stale-claim time; if the database is still away, that time
                // remains the fallback.
                if let Err(error) = state.store.release_claims(&settings.worker_id).await {
                    tracing::warn!(error = %error, "could not release the failed step's claims");
                }
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

/// Decides every bucket of a run from the readings loaded for the whole run. Each station's readings
/// are judged once (steps 1 and 2, which depend on that station alone) over the run's span; each
/// bucket is then decided on its share of the verdicts, which gives exactly what deciding the bucket
/// on its own would (consensor-core's `batching` test checks this).
fn decide_run(
    run: &[ClaimedBucket],
    spec: &QuantitySpec,
    rules: &Rules,
    data: &IntervalData,
) -> Vec<Decided> {
    let mut overturned: Vec<u64> = data.overturned.iter().copied().collect();
    overturned.sort_unstable();
    let (run_start, run_end) = (
        run[0].bucket_start_ms,
        run[run.len() - 1].bucket_start_ms + run[run.len() - 1].interval_ms,
    );
    let judging = Judging {
        quantity: spec,
        rules,
        interval_ms: run[0].interval_ms,
        overturned: &overturned,
    };
    let mut screen = IntervalScreen::default();
    // Per station: the index of its first reading in the run's span, and the verdicts from there on.
    let mut verdicts: Vec<Judged> = Vec::new();
    let mut spans: Vec<(usize, usize)> = Vec::with_capacity(data.stations.len());
    for series in &data.stations {
        let from = verdicts.len();
        screen.judge(
            &judging,
            &series.readings,
            run_start,
            run_end,
            &mut verdicts,
        );
        spans.push((
            series
                .readings
                .partition_point(|r| r.observed_at_ms < run_start),
            from,
        ));
    }
    let mut stations: Vec<JudgedStation<'_>> = Vec::with_capacity(data.stations.len());
    run.iter()
        .map(|bucket| {
            let start_ms = bucket.bucket_start_ms;
            let end_ms = start_ms + bucket.interval_ms;
            let history_from = rules.chain_start(start_ms);
            stations.clear();
            let mut station_ids = Vec::with_capacity(data.stations.len());
            for (series, &(first, from)) in data.stations.iter().zip(&spans) {
                let readings = &series.readings;
                // A station takes part when it has a reading in the bucket's history or in the
                // bucket itself, as when the bucket is loaded on its own.
                let history_low = readings.partition_point(|r| r.observed_at_ms < history_from);
                let low = readings.partition_point(|r| r.observed_at_ms < start_ms);
                let high = readings.partition_point(|r| r.observed_at_ms < end_ms);
                if history_low < high {
                    stations.push(JudgedStation {
                        station: station_ids.len() as u32,
                        readings: &readings[low..high],
                        judged: &verdicts[from + low - first..from + high - first],
                    });
                    station_ids.push(series.station_id);
                }
            }
            let mut outcome = IntervalOutcome::default();
            screen.decide(
                &JudgedInterval {
                    judging,
                    start_ms,
                    end_ms,
                    stations: &stations,
                },
                &mut outcome,
            );
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
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    const AT_MOST: Duration = Duration::from_secs(10);

    #[test]
    fn the_worker_waits_only_while_ingest_is_busy() {
        let start = Instant::now();
        let mut yielding = Yielding::new(AT_MOST);
        assert_eq!(yielding.next(false, start), Yield::Step);
        assert_eq!(yielding.next(true, start), Yield::Begin);
        let later = start + Duration::from_secs(3);
        assert_eq!(
            yielding.next(true, later),
            Yield::Wait,
            "the same wait goes on"
        );
        // The burst has been stored: the worker steps at once.
        assert_eq!(yielding.next(false, later), Yield::Step);
        // A new burst starts a new wait with its own bound.
        let next = start + Duration::from_secs(12);
        assert_eq!(yielding.next(true, next), Yield::Begin);
        assert_eq!(
            yielding.next(true, next + Duration::from_secs(9)),
            Yield::Wait
        );
    }

    #[test]
    fn a_wait_ends_at_its_bound_and_the_worker_steps_until_it_is_idle() {
        let start = Instant::now();
        let mut yielding = Yielding::new(AT_MOST);
        assert_eq!(yielding.next(true, start), Yield::Begin);
        assert_eq!(yielding.next(true, start + AT_MOST), Yield::Step);
        // Ingest still busy, but the bound was reached: no more waiting, however long it lasts.
        for seconds in [11, 30, 300] {
            let at = start + Duration::from_secs(seconds);
            assert_eq!(yielding.next(true, at), Yield::Step);
        }
        // Once the worker has found nothing to do, it gives way again.
        yielding.idle();
        let at = start + Duration::from_secs(301);
        assert_eq!(yielding.next(true, at), Yield::Begin);
    }

    #[test]
    fn a_zero_bound_never_waits() {
        let mut yielding = Yielding::new(Duration::ZERO);
        assert_eq!(yielding.next(true, Instant::now()), Yield::Step);
    }
}
