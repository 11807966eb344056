//! `consensor demo`: an invented network with planted faults, computed by the real worker and served.
//!
//! The command builds the scenario of [`generator`] (three made-up areas, forty made-up stations,
//! several days of one-minute readings), stores it through the same [`Store`] the server uses, feeds
//! the readings in hourly batches as a live network would deliver them, runs the consensus worker
//! until it is idle, then delivers one station's late readings and computes again. It prints what it
//! planted next to what the checks found, and serves the result with [`crate::serve::run`] until
//! Ctrl-C. `README.md` beside this file tells a newcomer what to look at.

pub mod generator;

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::{Duration, Instant};

use anyhow::{bail, Context};
use consensor_core::checks::Rule;
use consensor_core::stats::theil_sen;
use consensor_store::{SetAsideFilter, Store};
use tokio::net::TcpListener;

pub use generator::{
    Expectation, FaultKind, PlantedFault, Quantity, Scenario, DAY_MS, DEFAULT_SEED, HOUR_MS,
    INTERVAL_MS, MINUTE_MS,
};

use crate::auth::{issue_token, Role};
use crate::config::Config;
use crate::state::{AppState, Clock, SystemClock};
use crate::worker::{run_until_idle, WorkerSettings};

/// The caution every output that could inform a heat or air-quality decision carries.
pub const CAUTION: &str = "Caution: these are screened values from an invented demo network, \
not a regulatory measurement. For heat or air-quality warnings, defer to local authorities and \
licensed practice.";

/// The most days the demo generates: beyond two weeks the feed takes minutes, which is no demo.
pub const MAX_DAYS: u32 = 14;

/// The options of `consensor demo`.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct DemoOptions {
    /// Where to serve; `None` takes `CONSENSOR_LISTEN` or the default 127.0.0.1:8080.
    pub listen: Option<String>,
    /// A new SQLite file to create; `None` makes one in a fresh temporary directory, removed on exit.
    pub database: Option<PathBuf>,
    pub days: u32,
    pub seed: u64,
}

impl DemoOptions {
    /// Parses `[--listen ADDR] [--database PATH] [--days N] [--seed S]` (also `--flag=value`).
    pub fn parse(args: &[String]) -> anyhow::Result<DemoOptions> {
        let mut options = DemoOptions {
            listen: None,
            database: None,
            days: 3,
            seed: DEFAULT_SEED,
        };
        let mut rest = args.iter();
        while let Some(flag) = rest.next() {
            let (name, value) = crate::cli::option_value(flag, &mut rest)?;
            match name {
                "--listen" => options.listen = Some(value),
                "--database" => options.database = Some(PathBuf::from(value)),
                "--days" => {
                    options.days = value
                        .parse()
                        .ok()
                        .filter(|days| (1..=MAX_DAYS).contains(days))
                        .with_context(|| {
                            format!("--days: {value:?} must be a whole number from 1 to {MAX_DAYS}")
                        })?
                }
                "--seed" => {
                    options.seed = value.parse().with_context(|| {
                        format!("--seed: {value:?} must be a whole number (0 to 2^64 - 1)")
                    })?
                }
                other => bail!("unknown option {other:?} for demo"),
            }
        }
        Ok(options)
    }
}

/// How loading the scenario went, stage by stage.
#[derive(Debug, Clone, Default)]
pub struct LoadReport {
    pub readings: u64,
    pub batches: usize,
    pub feed_time: Duration,
    /// Intervals computed after the on-time delivery.
    pub computed: usize,
    pub compute_time: Duration,
    pub late_readings: u64,
    /// Intervals computed again after the late delivery.
    pub recomputed: usize,
    pub late_time: Duration,
}

/// What the checks made of one planted fault.
#[derive(Debug, Clone)]
pub struct Finding {
    pub fault: PlantedFault,
    /// The station's readings of the quantity (all of its quantities when the fault names none)
    /// observed in the fault's stretch, counted by the rule that set them aside.
    pub set_aside: BTreeMap<Rule, u64>,
    /// For a drift: the Theil–Sen slope of (station value − area median) per day, with Sen's 95 %
    /// interval, over the intervals of the stretch.
    pub drift: Option<Drift>,
    /// For late readings: intervals of the stretch now past revision 1, of all intervals there.
    pub revised_intervals: Option<(u64, u64)>,
}

impl Finding {
    /// Whether the checks found what the fault's expectation names.
    pub fn found(&self) -> bool {
        match self.fault.expected {
            Expectation::SetAside(rule) => self.set_aside.get(&rule).copied().unwrap_or(0) > 0,
            Expectation::HealthDrift => self.drift.is_some_and(|drift| drift.low > 0.0),
            Expectation::NewRevision => self
                .revised_intervals
                .is_some_and(|(revised, total)| total > 0 && revised == total),
        }
    }
}

/// A drift estimate, in the quantity's unit per day.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Drift {
    pub per_day: f64,
    pub low: f64,
    pub high: f64,
    pub intervals: usize,
}

/// Network-wide counts after the demo's computation.
#[derive(Debug, Clone, Default)]
pub struct Totals {
    pub readings: u64,
    pub set_aside_by_rule: BTreeMap<Rule, u64>,
    /// Readings of (station, quantity) series with nothing planted in them, and how many of those
    /// the checks set aside anyway.
    pub clean_readings: u64,
    pub clean_set_aside: u64,
    /// The clean series with the most readings set aside: (station, quantity, count).
    pub worst_clean: Option<(String, String, u64)>,
}

/// `consensor demo`: builds, loads, prints and serves until SIGINT or SIGTERM.
pub async fn run(options: DemoOptions) -> anyhow::Result<()> {
    let (database, temporary) = demo_database(options.database.as_deref())?;
    let url = format!("sqlite://{}", database.display());
    let config = demo_config(&url, options.listen.as_deref(), std::env::vars())?;
    let listen = config.listen;
    // Bind before the minute of work, so that a port already in use is reported at once.
    let listener = TcpListener::bind(listen)
        .await
        .with_context(|| format!("could not listen on {listen}"))?;
    let address = listener
        .local_addr()
        .context("could not read the listening address")?;
    let state = crate::serve::open_state(config, Arc::new(SystemClock)).await?;

    let scenario = Scenario::new(options.seed, options.days, state.clock.now_ms());
    print!(
        "{}",
        introduction(&scenario, &database, temporary.is_some())
    );
    let report = load(&state, &scenario, |line| println!("{line}")).await?;
    let findings = findings(&state, &scenario).await?;
    let totals = totals(&state, &scenario).await?;
    print!("{}", fault_table(&scenario, &findings));
    print!("{}", totals_text(&report, &totals));
    let (token, _) = issue_token(&state, Role::Admin, Vec::new(), Some("demo admin".into()))
        .await
        .map_err(|error| anyhow::anyhow!("could not issue the demo's admin token: {error:?}"))?;
    print!("{}", try_it(&scenario, &address.to_string(), &token));
    println!("{CAUTION}\n");

    let served = crate::serve::run(listener, state, crate::serve::shutdown_signal()).await;
    if let Some(directory) = temporary {
        // The temporary database was never asked for by name; it goes with the demo.
        if let Err(error) = std::fs::remove_dir_all(&directory) {
            eprintln!(
                "consensor: could not remove the demo's temporary directory {}: {error}",
                directory.display()
            );
        }
    }
    served
}

/// The demo's configuration: the same layers as `serve` (so `CONSENSOR_LISTEN`, the quantity table
/// and the rest apply here too), except that the database is always the demo's own fresh file, and
/// that the worker's look-back defaults to 60 minutes.
///
/// Why 60 minutes: the worker loads each interval's look-back with it, so a three-hour look-back
/// reads every reading about nineteen times over and makes the demo's several days take minutes to
/// compute; an hour is the flat-line window, the least the checks need (API.md, step 1) and the
/// least the configuration accepts. `CONSENSOR_WORKER__HISTORY_MINUTES` still overrides it.
pub fn demo_config(
    database_url: &str,
    listen: Option<&str>,
    env: impl IntoIterator<Item = (String, String)>,
) -> anyhow::Result<Config> {
    let mut flags = vec![("database_url", database_url.to_owned())];
    if let Some(listen) = listen {
        flags.push(("listen", listen.to_owned()));
    }
    let defaults = [(
        "CONSENSOR_WORKER__HISTORY_MINUTES".to_owned(),
        DEMO_HISTORY_MINUTES.to_string(),
    )];
    // Later layers win, so the caller's environment comes after the demo's own default.
    Config::load(None, defaults.into_iter().chain(env), &flags)
}

/// The worker's look-back in the demo, in minutes (see [`demo_config`]).
pub const DEMO_HISTORY_MINUTES: u32 = 60;

/// The demo's database file and, when it is a temporary one, its directory (to remove on exit).
/// A named file must not exist yet: the demo never overwrites a file.
fn demo_database(named: Option<&Path>) -> anyhow::Result<(PathBuf, Option<PathBuf>)> {
    if let Some(path) = named {
        let text = path.to_string_lossy();
        if text.contains("://") || text.starts_with("sqlite:") {
            bail!("--database takes the path of a new SQLite file, not a URL ({text})");
        }
        for candidate in [
            path.to_path_buf(),
            sibling(path, "-wal"),
            sibling(path, "-shm"),
        ] {
            if candidate.exists() {
                bail!(
                    "{} already exists; the demo only creates a fresh database: remove it or name another file",
                    candidate.display()
                );
            }
        }
        return Ok((path.to_path_buf(), None));
    }
    let stamp = SystemClock.now_ms();
    let directory =
        std::env::temp_dir().join(format!("consensor-demo-{}-{stamp}", std::process::id()));
    std::fs::create_dir(&directory).with_context(|| {
        format!(
            "could not create the temporary directory {}",
            directory.display()
        )
    })?;
    Ok((directory.join("consensor-demo.db"), Some(directory)))
}

fn sibling(path: &Path, suffix: &str) -> PathBuf {
    let mut name = path.as_os_str().to_owned();
    name.push(suffix);
    PathBuf::from(name)
}

/// Stores the network, feeds the on-time readings hour by hour while the worker computes what has
/// arrived, delivers the late readings and computes again. `progress` receives a line per stage.
pub async fn load(
    state: &AppState,
    scenario: &Scenario,
    mut progress: impl FnMut(String),
) -> anyhow::Result<LoadReport> {
    let mut report = LoadReport::default();
    create_network(state, scenario).await?;

    // The worker runs beside the feed, as it does beside a live network: while one core stores the
    // next hour, the other decides the hours already stored.
    let started = Instant::now();
    let (feeding, feed_done) = tokio::sync::watch::channel(false);
    let steppers: Vec<_> = (0..STEPPERS)
        .map(|index| tokio::spawn(compute_until_fed(state.clone(), index, feed_done.clone())))
        .collect();
    let fed = feed(state, scenario).await;
    // Whatever happened to the feed, the steppers must be told to finish.
    let _ = feeding.send(true);
    let (readings, batches) = fed?;
    report.readings = readings;
    report.batches = batches;
    report.feed_time = started.elapsed();
    for stepper in steppers {
        report.computed += stepper.await.context("a worker stepper panicked")??;
    }
    // A bucket that a stepper found re-marked while it computed is released, not dropped; one
    // last pass computes any such bucket.
    report.computed += run_until_idle(state, &stepper_settings(state, 0), state.clock.now_ms())
        .await
        .context("the consensus worker failed")?;
    report.compute_time = started.elapsed();
    progress(format!(
        "fed {} readings in {} hourly batches ({:.1} s) while the consensus worker computed {} \
         intervals ({:.1} s in all)",
        thousands(report.readings),
        report.batches,
        report.feed_time.as_secs_f64(),
        thousands(report.computed as u64),
        report.compute_time.as_secs_f64()
    ));

    let started = Instant::now();
    let late = scenario.late_readings();
    let outcome = state
        .store
        .insert_batch(&late, scenario.end_ms)
        .await
        .context("could not store the late demo readings")?;
    report.late_readings = outcome.accepted;
    report.readings += outcome.accepted;
    report.recomputed = run_until_idle(state, &stepper_settings(state, 0), state.clock.now_ms())
        .await
        .context("the worker failed on the late readings")?;
    report.late_time = started.elapsed();
    progress(format!(
        "{} late readings arrived; {} intervals recomputed as new revisions in {:.1} s",
        thousands(report.late_readings),
        report.recomputed,
        report.late_time.as_secs_f64()
    ));
    Ok(report)
}

/// How many worker steppers run beside the feed: one per core of the small machine the demo is
/// meant to run on comfortably; each claims its own intervals under its own name, as replicas do.
const STEPPERS: usize = 2;

/// The worker settings of stepper `index`: the configured ones under a name of its own, and
/// computing the interval in progress and the ones just marked at once too (the demo computes
/// everything before it serves).
fn stepper_settings(state: &AppState, index: usize) -> WorkerSettings {
    let base = &state.config.worker;
    WorkerSettings {
        worker_id: format!("{}-demo-{index}", base.worker_id),
        open_interval_refresh: std::time::Duration::ZERO,
        settle: std::time::Duration::ZERO,
        ..base.clone()
    }
}

/// Stores the on-time readings in batches of one clock hour each (the first and last may be
/// shorter), so that no 10-minute interval is split between two batches and computed half-fed.
async fn feed(state: &AppState, scenario: &Scenario) -> anyhow::Result<(u64, usize)> {
    let (mut readings, mut batches) = (0, 0);
    let mut batch = Vec::new();
    let mut from = scenario.start_ms;
    while from < scenario.end_ms {
        let to = (from.div_euclid(HOUR_MS) * HOUR_MS + HOUR_MS).min(scenario.end_ms);
        batch.clear();
        scenario.on_time_readings(from, to, &mut batch);
        // A batch is received when its hour is over, as a logger that uploads hourly sends it.
        let outcome = state
            .store
            .insert_batch(&batch, to)
            .await
            .context("could not store a batch of demo readings")?;
        readings += outcome.accepted;
        batches += 1;
        from = to;
    }
    Ok((readings, batches))
}

/// Runs the real worker's step until the feed is done and nothing is pending; returns how many
/// intervals this stepper computed.
async fn compute_until_fed(
    state: AppState,
    index: usize,
    mut feed_done: tokio::sync::watch::Receiver<bool>,
) -> anyhow::Result<usize> {
    let settings = stepper_settings(&state, index);
    let mut computed = 0;
    let mut failures = 0;
    loop {
        // Read the flag before the step: a step that finds nothing after the feed has finished
        // means everything stored has been computed (or is held by the other stepper, which
        // finishes it).
        let finished = *feed_done.borrow();
        let step = match run_until_idle(&state, &settings, state.clock.now_ms()).await {
            Ok(step) => {
                failures = 0;
                step
            }
            // As the server's worker loop does: on a busy machine SQLite's write lock can stay
            // taken longer than the busy timeout; hand the claims back and try again.
            Err(error) if failures < 20 => {
                failures += 1;
                tracing::warn!(
                    error = format!("{error:#}"),
                    "demo worker step failed; retrying"
                );
                let _ = state.store.release_claims(&settings.worker_id).await;
                tokio::time::sleep(Duration::from_millis(100)).await;
                continue;
            }
            Err(error) => return Err(error.context("the consensus worker failed")),
        };
        computed += step;
        if step == 0 {
            if finished {
                return Ok(computed);
            }
            // Nothing to do until the next batch lands.
            let _ = tokio::time::timeout(Duration::from_millis(20), feed_done.changed()).await;
        }
    }
}

/// Stores the invented areas and stations.
pub async fn create_network(state: &AppState, scenario: &Scenario) -> anyhow::Result<()> {
    for area in scenario.new_areas() {
        state
            .store
            .upsert_area(&area)
            .await
            .with_context(|| format!("could not store the demo area {}", area.key))?;
    }
    for station in scenario.new_stations() {
        state
            .store
            .upsert_station(&station)
            .await
            .with_context(|| format!("could not store the demo station {}", station.key))?;
    }
    Ok(())
}

/// What the checks found for each planted fault.
pub async fn findings(state: &AppState, scenario: &Scenario) -> anyhow::Result<Vec<Finding>> {
    let mut findings = Vec::new();
    for fault in &scenario.faults {
        let mut finding = Finding {
            fault: fault.clone(),
            set_aside: BTreeMap::new(),
            drift: None,
            revised_intervals: None,
        };
        let filter = SetAsideFilter {
            station: Some(fault.station.clone()),
            quantity: fault.quantity.map(|q| q.key().to_owned()),
            from_ms: Some(fault.from_ms),
            to_ms: Some(fault.to_ms),
            ..SetAsideFilter::default()
        };
        for rule in set_aside_rules(state, &filter).await? {
            *finding.set_aside.entry(rule).or_insert(0) += 1;
        }
        match fault.expected {
            Expectation::HealthDrift => {
                let quantity = fault.quantity.context("a drift names its quantity")?;
                finding.drift =
                    drift(state, &fault.station, quantity, fault.from_ms, fault.to_ms).await?;
            }
            Expectation::NewRevision => {
                finding.revised_intervals = Some(revised_intervals(state, scenario, fault).await?);
            }
            Expectation::SetAside(_) => {}
        }
        findings.push(finding);
    }
    Ok(findings)
}

/// The rules of every set-aside record matching `filter`, page by page.
async fn set_aside_rules(state: &AppState, filter: &SetAsideFilter) -> anyhow::Result<Vec<Rule>> {
    let mut rules = Vec::new();
    let mut after = None;
    loop {
        let page = state
            .store
            .list_set_aside(filter, 1000, after)
            .await
            .context("could not list set-aside readings")?;
        rules.extend(page.items.iter().map(|row| row.rule));
        match page.next_cursor {
            Some(cursor) => after = Some(cursor),
            None => return Ok(rules),
        }
    }
}

/// The Theil–Sen slope of the station's residuals against the area median, per day, as the station
/// health report computes it; `None` with fewer than two intervals.
pub async fn drift(
    state: &AppState,
    station: &str,
    quantity: Quantity,
    from_ms: i64,
    to_ms: i64,
) -> anyhow::Result<Option<Drift>> {
    let residuals = state
        .store
        .station_residuals(station, quantity.key(), from_ms, to_ms)
        .await
        .context("could not load a station's residuals")?;
    let days: Vec<f64> = residuals
        .iter()
        .map(|r| (r.bucket_start_ms - from_ms) as f64 / DAY_MS as f64)
        .collect();
    let differences: Vec<f64> = residuals
        .iter()
        .map(|r| r.station_value - r.area_median)
        .collect();
    Ok(theil_sen(&days, &differences, 0.95).ok().map(|fit| Drift {
        per_day: fit.line.slope,
        low: fit.slope_low,
        high: fit.slope_high,
        intervals: residuals.len(),
    }))
}

/// For a late delivery: how many intervals of the station's area, for each quantity it measures,
/// starting in the stretch's intervals, are past revision 1, and how many there are.
async fn revised_intervals(
    state: &AppState,
    scenario: &Scenario,
    fault: &PlantedFault,
) -> anyhow::Result<(u64, u64)> {
    let station = scenario
        .station(&fault.station)
        .context("a fault names a station of the scenario")?;
    let area = &scenario.areas[station.area];
    let from = fault.from_ms.div_euclid(INTERVAL_MS) * INTERVAL_MS;
    let (mut revised, mut total) = (0, 0);
    for quantity in &station.quantities {
        let rows = state
            .store
            .series(area.key, quantity.key(), from, fault.to_ms)
            .await
            .context("could not read a series")?;
        total += rows.len() as u64;
        revised += rows.iter().filter(|row| row.revision >= 2).count() as u64;
    }
    Ok((revised, total))
}

/// Network-wide counts: every set-aside record by rule, and how the clean series fared.
pub async fn totals(state: &AppState, scenario: &Scenario) -> anyhow::Result<Totals> {
    let mut totals = Totals {
        readings: state
            .store
            .count_readings()
            .await
            .context("could not count readings")?,
        ..Totals::default()
    };
    for rule in set_aside_rules(state, &SetAsideFilter::default()).await? {
        *totals.set_aside_by_rule.entry(rule).or_insert(0) += 1;
    }
    for station in &scenario.stations {
        for &quantity in &station.quantities {
            if !station.is_clean(quantity) {
                continue;
            }
            let counts = state
                .store
                .station_reading_counts(
                    &station.key,
                    quantity.key(),
                    scenario.start_ms,
                    scenario.end_ms,
                )
                .await
                .context("could not count a station's readings")?;
            totals.clean_readings += counts.readings;
            totals.clean_set_aside += counts.set_aside;
            if counts.set_aside > 0
                && totals
                    .worst_clean
                    .as_ref()
                    .is_none_or(|(_, _, worst)| counts.set_aside > *worst)
            {
                totals.worst_clean = Some((
                    station.key.clone(),
                    quantity.key().to_owned(),
                    counts.set_aside,
                ));
            }
        }
    }
    Ok(totals)
}

/// The opening lines: what is invented, the span, the areas.
fn introduction(scenario: &Scenario, database: &Path, temporary: bool) -> String {
    let mut text = String::new();
    let days = (scenario.end_ms - scenario.start_ms) / DAY_MS;
    let _ = writeln!(
        text,
        "Consensor demo: an invented network (seed {}), {days} days of one-minute readings, {} to {} UTC",
        scenario.seed,
        clock_text(scenario.start_ms),
        clock_text(scenario.end_ms)
    );
    let _ = writeln!(
        text,
        "Every area, station and reading here is made up by Consensor's own seeded generator; \
         the scenario's local time is UTC+01:00.\n"
    );
    let _ = writeln!(text, "Areas (10-minute intervals):");
    for (index, area) in scenario.areas.iter().enumerate() {
        let stations: Vec<&str> = scenario
            .stations
            .iter()
            .filter(|station| station.area == index)
            .map(|station| station.key.as_str())
            .collect();
        let _ = writeln!(
            text,
            "  {:<20} {:<20} {:>2} stations {}..{}  {}",
            area.key,
            area.name,
            stations.len(),
            stations.first().copied().unwrap_or(""),
            stations.last().copied().unwrap_or(""),
            area.description
        );
    }
    let _ = writeln!(
        text,
        "\nDatabase: {}{}\n",
        database.display(),
        if temporary {
            " (a temporary file, removed when the demo stops)"
        } else {
            " (kept when the demo stops)"
        }
    );
    text
}

/// The planted faults next to what the checks found.
fn fault_table(scenario: &Scenario, findings: &[Finding]) -> String {
    let mut text = String::new();
    let _ = writeln!(
        text,
        "\nPlanted faults and what the checks found (times UTC):"
    );
    let _ = writeln!(
        text,
        "  {:<2} {:<6} {:<17} {:<39} {:<35} {:<18} found",
        "#", "station", "quantity", "fault", "stretch", "expected"
    );
    for (number, finding) in findings.iter().enumerate() {
        let fault = &finding.fault;
        let quantity = fault.quantity.map_or("(all)", Quantity::key);
        let stretch = format!(
            "{} - {}",
            clock_text(fault.from_ms),
            short_clock_text(fault.from_ms, fault.to_ms)
        );
        let _ = writeln!(
            text,
            "  {:<2} {:<7} {:<17} {:<39} {:<35} {:<18} {} {}",
            number + 1,
            fault.station,
            quantity,
            fault.kind.label(),
            stretch,
            fault.expected.label(),
            if finding.found() { "yes:" } else { "NO:" },
            found_text(finding)
        );
    }
    let _ = writeln!(text, "\n  What each is:");
    let mut seen = Vec::new();
    for fault in &scenario.faults {
        if seen.contains(&(fault.kind, fault.quantity)) {
            continue;
        }
        seen.push((fault.kind, fault.quantity));
        let _ = writeln!(
            text,
            "  - {} {}: {}",
            fault.station,
            fault.kind.label(),
            fault.note
        );
    }
    text
}

/// The finding in a few words: the rules' counts, the drift, the revisions.
fn found_text(finding: &Finding) -> String {
    let mut parts: Vec<String> = finding
        .set_aside
        .iter()
        .map(|(rule, count)| format!("{} {count}", rule.as_str()))
        .collect();
    if let Some(drift) = finding.drift {
        parts.insert(
            0,
            format!(
                "drift {:+.2}/day (95 % {:+.2} to {:+.2}, {} intervals)",
                drift.per_day, drift.low, drift.high, drift.intervals
            ),
        );
    }
    if let Some((revised, total)) = finding.revised_intervals {
        parts.insert(0, format!("{revised} of {total} intervals at revision 2+"));
    }
    if parts.is_empty() {
        "nothing set aside".into()
    } else {
        parts.join(", ")
    }
}

fn totals_text(report: &LoadReport, totals: &Totals) -> String {
    let mut text = String::new();
    let rules: Vec<String> = totals
        .set_aside_by_rule
        .iter()
        .map(|(rule, count)| format!("{} {}", rule.as_str(), thousands(*count)))
        .collect();
    let _ = writeln!(
        text,
        "\nTotals: {} readings stored; {} interval results ({} first computations, {} new revisions \
         after the late delivery); set aside: {}",
        thousands(totals.readings),
        thousands((report.computed + report.recomputed) as u64),
        thousands(report.computed as u64),
        thousands(report.recomputed as u64),
        if rules.is_empty() {
            "none".to_owned()
        } else {
            rules.join(", ")
        }
    );
    let share = if totals.clean_readings > 0 {
        100.0 * totals.clean_set_aside as f64 / totals.clean_readings as f64
    } else {
        0.0
    };
    let _ = writeln!(
        text,
        "Series with nothing planted: {} of {} readings set aside ({share:.3} %){}",
        thousands(totals.clean_set_aside),
        thousands(totals.clean_readings),
        match &totals.worst_clean {
            Some((station, quantity, count)) => format!("; most at {station} {quantity} ({count})"),
            None => String::new(),
        }
    );
    let _ = writeln!(
        text,
        "Time: feed {:.1} s, feed and compute side by side {:.1} s, late delivery and recompute {:.1} s",
        report.feed_time.as_secs_f64(),
        report.compute_time.as_secs_f64(),
        report.late_time.as_secs_f64()
    );
    text
}

/// The token and example requests that work against this demo.
fn try_it(scenario: &Scenario, address: &str, token: &str) -> String {
    let base = format!("http://{address}");
    let mut text = String::new();
    let _ = writeln!(
        text,
        "\nAdmin token (shown once; only its hash is stored in the demo database):\n  {token}\n"
    );
    let _ = writeln!(
        text,
        "Open {base}/ in a browser and paste the token into \"Access token\": the overview, each \
         area's charts (set-aside readings are the markers), the review queue and the stations."
    );
    let _ = writeln!(text, "\nOr try the API (in another terminal):");
    let _ = writeln!(text, "  T={token}");
    let auth = "-H \"Authorization: Bearer $T\"";
    let fault_start = |kind: FaultKind| {
        scenario
            .faults
            .iter()
            .find(|fault| fault.kind == kind)
            .map_or(scenario.start_ms, |fault| fault.from_ms)
    };
    let sun = fault_start(FaultKind::AfternoonSun);
    let sun_day = (
        sun.div_euclid(DAY_MS) * DAY_MS,
        sun.div_euclid(DAY_MS) * DAY_MS + DAY_MS,
    );
    let late = fault_start(FaultKind::Late).div_euclid(INTERVAL_MS) * INTERVAL_MS + INTERVAL_MS;
    let examples = [
        ("the network", format!("{base}/v1/stations")),
        (
            "a day of consensus temperature where OF-05 sits in the sun",
            format!(
                "{base}/v1/areas/ostmarrow-flats/series?quantity=air_temperature&from={}&to={}",
                crate::http::rfc3339(sun_day.0),
                crate::http::rfc3339(sun_day.1)
            ),
        ),
        (
            "why OF-05 was set aside (each record gives its reason with the numbers)",
            format!("{base}/v1/set-aside?station=OF-05&quantity=air_temperature&limit=3"),
        ),
        (
            "the failed anemometer and the stuck humidity sensor",
            format!("{base}/v1/set-aside?station=TH-05&limit=3"),
        ),
        ("", format!("{base}/v1/set-aside?station=TH-10&limit=3")),
        (
            "the tampering and the clock an hour behind",
            format!("{base}/v1/set-aside?station=VB-09&quantity=air_temperature"),
        ),
        (
            "",
            format!("{base}/v1/set-aside?station=VB-12&quantity=pm2_5&limit=5"),
        ),
        (
            "the drifting humidity sensor's health (drift_per_day)",
            format!(
                "{base}/v1/stations/OF-11/health?quantity=relative_humidity&days={}",
                ((scenario.end_ms - scenario.start_ms) / DAY_MS).max(1)
            ),
        ),
        (
            "an interval before and after VB-04's late readings",
            format!(
                "{base}/v1/areas/velloran-basin/intervals/{}?quantity=air_temperature&revision=1",
                crate::http::rfc3339(late)
            ),
        ),
        (
            "",
            format!(
                "{base}/v1/areas/velloran-basin/intervals/{}?quantity=air_temperature",
                crate::http::rfc3339(late)
            ),
        ),
        ("the worker's state", format!("{base}/v1/status")),
    ];
    for (what, url) in examples {
        if !what.is_empty() {
            let _ = writeln!(text, "  # {what}");
        }
        let _ = writeln!(text, "  curl -s {auth} '{url}'");
    }
    let _ = writeln!(
        text,
        "\nThe demo keeps serving (with the worker running) until Ctrl-C.\n"
    );
    text
}

/// `2026-06-01 07:00`.
fn clock_text(ms: i64) -> String {
    chrono::DateTime::from_timestamp_millis(ms)
        .map(|time| time.format("%Y-%m-%d %H:%M").to_string())
        .unwrap_or_else(|| ms.to_string())
}

/// The end of a stretch: only the time when it is on the same day as the start.
fn short_clock_text(from_ms: i64, to_ms: i64) -> String {
    if from_ms.div_euclid(DAY_MS) == to_ms.div_euclid(DAY_MS) {
        chrono::DateTime::from_timestamp_millis(to_ms)
            .map(|time| time.format("%H:%M").to_string())
            .unwrap_or_else(|| to_ms.to_string())
    } else {
        clock_text(to_ms)
    }
}

/// `1234567` as `1,234,567`.
fn thousands(value: u64) -> String {
    let digits = value.to_string();
    // A separator goes before every digit whose position from the left matches the length of the
    // leading group.
    let leading = digits.len() % 3;
    let mut text = String::new();
    for (index, digit) in digits.chars().enumerate() {
        if index > 0 && index % 3 == leading {
            text.push(',');
        }
        text.push(digit);
    }
    text
}

#[cfg(test)]
mod tests {
    use super::*;

    fn args(text: &str) -> Vec<String> {
        text.split_whitespace().map(str::to_owned).collect()
    }

    #[test]
    fn options_parse_with_defaults_and_limits() {
        let options = DemoOptions::parse(&[]).unwrap();
        assert_eq!(
            options,
            DemoOptions {
                listen: None,
                database: None,
                days: 3,
                seed: DEFAULT_SEED
            }
        );
        let options = DemoOptions::parse(&args(
            "--listen 127.0.0.1:0 --days=2 --seed 9 --database x.db",
        ))
        .unwrap();
        assert_eq!(options.listen.as_deref(), Some("127.0.0.1:0"));
        assert_eq!((options.days, options.seed), (2, 9));
        assert_eq!(options.database, Some(PathBuf::from("x.db")));
        for bad in [
            "--days 0",
            "--days 15",
            "--days two",
            "--seed -1",
            "--port 1",
            "--days",
        ] {
            assert!(DemoOptions::parse(&args(bad)).is_err(), "{bad}");
        }
    }

    #[test]
    fn a_named_database_is_never_overwritten() {
        let directory = tempfile::tempdir().unwrap();
        let existing = directory.path().join("taken.db");
        std::fs::write(&existing, b"not ours").unwrap();
        let error = demo_database(Some(&existing)).unwrap_err();
        assert!(format!("{error:#}").contains("already exists"), "{error:#}");
        assert_eq!(std::fs::read(&existing).unwrap(), b"not ours");
        let fresh = directory.path().join("fresh.db");
        assert_eq!(demo_database(Some(&fresh)).unwrap(), (fresh, None));
        assert!(demo_database(Some(Path::new("sqlite://x.db"))).is_err());
    }

    #[test]
    fn numbers_and_times_print_plainly() {
        assert_eq!(thousands(0), "0");
        assert_eq!(thousands(999), "999");
        assert_eq!(thousands(1_000), "1,000");
        assert_eq!(thousands(1_234_567), "1,234,567");
        // 2026-06-01T07:00:00Z.
        let ms = 1_780_297_200_000;
        assert_eq!(clock_text(ms), "2026-06-01 07:00");
        assert_eq!(short_clock_text(ms, ms + HOUR_MS), "08:00");
        assert_eq!(short_clock_text(ms, ms + DAY_MS), "2026-06-02 07:00");
    }
}
