//! The batch write on SQLite, through a connection of its own on a thread of its own.
//!
//! SQLite lets one transaction write at a time, so the time a batch holds the write lock bounds the
//! whole service's ingest rate. Through sqlx every statement of a batch's transaction is a round
//! trip between the connection's thread and an async task, and under a burst that task waits for a
//! runtime thread that is busy decoding other requests: in the load test's burst a 5,000-reading
//! batch held the lock for 53 ms at the median (4.6 ms of it to look up nine stations and one
//! quantity) while the machine stood 40 % idle (BENCHMARKS.md, "Load"). Here one thread of its own
//! stores every batch: it takes the batches waiting in the
//! commit queue (`commit_group.rs`) as soon as it is free, runs their whole transaction in one
//! call (every statement prepared once and kept, 64 readings one step of a prepared multi-row
//! `INSERT`), and gives the write lock back as soon as the commit returns.
//!
//! The classification is the backend-neutral one (`batch.rs`), so the outcome of a batch is the
//! same as on PostgreSQL; the statements are the point-wise forms of the set-based ones the
//! PostgreSQL store sends (`postgres.rs`), the inserts 64 rows at a time.

use std::collections::{BTreeSet, HashMap};
use std::hash::BuildHasher;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Condvar, Mutex};
use std::time::Duration;

use rusqlite::{Connection, OpenFlags, OptionalExtension, TransactionBehavior};

use crate::batch::{
    coalesce_following, distinct_sorted, missing_keys, plan_batch, resolve, CurrentValue, FastMap,
    Following, KeyIds, ResolvedReading, RowToInsert, MARK_FOLLOWING,
};
use crate::commit_group::{BatchAnswer, CommitQueue, WaitingBatch};
use crate::write_gate::{WriteGate, LARGE_WRITE_ROWS};
use crate::{BatchOutcome, NewReading, StationRef, StoreError};

/// The writer thread of one SQLite file: it owns the one writing connection of this process
/// (opened on first use, and again after a failure that left it inside a transaction) and stores
/// the batches of the commit queue, a turn at a time. Dropping the last handle (or `close`) lets the
/// thread store what is queued and end.
#[derive(Debug)]
pub(crate) struct DirectWriter {
    queue: Arc<CommitQueue>,
    thread: Mutex<Option<std::thread::JoinHandle<()>>>,
}

/// What the writer thread needs to open its connection.
#[derive(Debug, Clone)]
struct WriterSettings {
    path: PathBuf,
    read_only: bool,
    busy_timeout: Duration,
    history_ms: i64,
    /// SQLite's automatic checkpoint at commit; off for the writer while the checkpoint thread
    /// runs.
    automatic_checkpoint: bool,
}

impl DirectWriter {
    /// Starts the writer of the database file at `path`; `read_only` when the database URL asked
    /// for SQLite's `mode=ro`, so that writes fail as they do through the pool.
    pub(crate) fn start(
        path: &Path,
        read_only: bool,
        busy_timeout: Duration,
        history_ms: i64,
        gate: Arc<WriteGate>,
    ) -> Result<Self, StoreError> {
        let queue = Arc::new(CommitQueue::default());
        let settings = WriterSettings {
            path: path.to_owned(),
            read_only,
            busy_timeout,
            history_ms,
            automatic_checkpoint: true,
        };
        let thread_queue = Arc::clone(&queue);
        let thread = std::thread::Builder::new()
            .name("consensor-sqlite-writer".to_owned())
            .spawn(move || write_turns(&settings, &thread_queue, &gate))
            .map_err(|error| {
                StoreError::Other(format!("could not start the SQLite writer thread: {error}"))
            })?;
        Ok(DirectWriter {
            queue,
            thread: Mutex::new(Some(thread)),
        })
    }

    /// Queues `readings` (which arrived at `now_ms`) and waits for the writer's answer.
    pub(crate) async fn store(&self, readings: Vec<NewReading>, now_ms: i64) -> BatchAnswer {
        let (answer, answered) = tokio::sync::oneshot::channel();
        let batch = WaitingBatch {
            readings,
            now_ms,
            answer,
        };
        if self.queue.push(batch).is_err() {
            return Err(StoreError::Unavailable("the store is closing".to_owned()));
        }
        answered.await.unwrap_or_else(|_| {
            Err(StoreError::Other(
                "the SQLite writer ended without an answer".to_owned(),
            ))
        })
    }

    /// Lets the writer store what is queued, then waits for it to end (its connection closed).
    pub(crate) async fn close(&self) {
        self.queue.close();
        let thread = self
            .thread
            .lock()
            .unwrap_or_else(|poison| poison.into_inner())
            .take();
        if let Some(thread) = thread {
            let _ = tokio::task::spawn_blocking(move || thread.join()).await;
        }
    }

    /// The queue, for tests that watch batches wait.
    #[cfg(test)]
    pub(crate) fn queue(&self) -> &CommitQueue {
        &self.queue
    }
}

impl Drop for DirectWriter {
    fn drop(&mut self) {
        self.queue.close();
    }
}

/// The writer thread's loop: waits for batches, takes its turn at the write lock (behind this
/// process's other writers, `write_gate.rs`), takes the batches waiting then and stores them.
fn write_turns(settings: &WriterSettings, queue: &CommitQueue, gate: &WriteGate) {
    // The checkpoint thread lives as long as the writer's loop (a read-only database has no WAL
    // to copy from).
    let checkpoints = Checkpoints::default();
    std::thread::scope(|scope| {
        let checkpointing = !settings.read_only && {
            let checkpoints = &checkpoints;
            std::thread::Builder::new()
                .name("consensor-sqlite-checkpoint".to_owned())
                .spawn_scoped(scope, move || checkpoint_on_request(settings, checkpoints))
                .is_ok()
        };
        // Without the thread (it could not be started), the writer's commits checkpoint as
        // SQLite's default has them do.
        let writer = WriterSettings {
            automatic_checkpoint: !checkpointing,
            ..settings.clone()
        };
        serve_queue(&writer, queue, gate, &checkpoints);
        checkpoints.close();
    });
}

/// Serves the commit queue until the store closes, asking for a checkpoint after each turn.
fn serve_queue(
    settings: &WriterSettings,
    queue: &CommitQueue,
    gate: &WriteGate,
    checkpoints: &Checkpoints,
) {
    let mut connection: Option<Connection> = None;
    let mut after_large = false;
    while queue.wait_for_batches() {
        let pass = gate.enter_blocking();
        let turn = queue.take_turn(after_large);
        if turn.is_empty() {
            continue;
        }
        after_large = turn[0].readings.len() > LARGE_WRITE_ROWS;
        let mut senders = Vec::with_capacity(turn.len());
        let batches: Vec<(Vec<NewReading>, i64)> = turn
            .into_iter()
            .map(|waiting| {
                senders.push(waiting.answer);
                (waiting.readings, waiting.now_ms)
            })
            .collect();
        // A panic in one turn (a bug) fails that turn's batches, whose transaction was rolled back
        // when the connection was dropped; the thread goes on serving the queue.
        let answers = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
            store_turn(settings, &mut connection, &batches)
        }))
        .unwrap_or_else(|_| {
            connection = None;
            let error = StoreError::Other("the SQLite writer failed on this batch".to_owned());
            vec![Err(error); batches.len()]
        });
        drop(pass);
        for (sender, answer) in senders.into_iter().zip(answers) {
            // A requester that has gone away needs no answer; its batch is stored all the same.
            let _ = sender.send(answer);
        }
        checkpoints.request();
    }
}

/// What the checkpoint thread waits for.
#[derive(Debug, Default)]
struct Checkpoints {
    state: Mutex<CheckpointState>,
    changed: Condvar,
}

#[derive(Debug, Default)]
struct CheckpointState {
    /// The writer has committed since the last checkpoint began.
    requested: bool,
    /// The writer has ended.
    closed: bool,
}

impl Checkpoints {
    fn update(&self, change: impl FnOnce(&mut CheckpointState)) {
        change(&mut self.state.lock().unwrap_or_else(|p| p.into_inner()));
        self.changed.notify_one();
    }

    fn request(&self) {
        self.update(|state| state.requested = true);
    }

    fn close(&self) {
        self.update(|state| state.closed = true);
    }

    /// Waits for a request (true) or the writer's end (false).
    fn wait(&self) -> bool {
        let mut state = self.state.lock().unwrap_or_else(|p| p.into_inner());
        loop {
            if state.closed {
                return false;
            }
            if std::mem::take(&mut state.requested) {
                return true;
            }
            state = self.changed.wait(state).unwrap_or_else(|p| p.into_inner());
        }
    }
}

/// Copies the WAL's committed pages into the database file after the writer's commits, on a
/// connection of its own, so that the writer's commits never do it: its connection's automatic
/// checkpoint is off. SQLite's automatic checkpoint runs inside the commit that takes the WAL past
/// 1,000 pages, and during a burst that was every few backlog batches, each time lengthening the
/// turn that every waiting batch waits for (BENCHMARKS.md, "Load"). A passive checkpoint takes no
/// write lock, so the writer goes on meanwhile; the pool's connections keep their automatic
/// checkpoint, which finds little left to copy.
fn checkpoint_on_request(settings: &WriterSettings, checkpoints: &Checkpoints) {
    let mut connection: Option<Connection> = None;
    while checkpoints.wait() {
        let done = (|| -> Result<(), StoreError> {
            let connection = match &connection {
                Some(connection) => connection,
                None => connection.insert(settings.open()?),
            };
            connection.query_row("PRAGMA wal_checkpoint(PASSIVE)", [], |_| Ok(()))?;
            Ok(())
        })();
        if done.is_err() {
            connection = None;
            std::thread::sleep(Duration::from_millis(500));
        }
    }
}

/// Stores one turn's batches in one transaction, one answer per batch. A statement error that is
/// not the database's state (read-only, full, gone) may be one batch's own doing: the batches are
/// then stored one by one, so that it fails only its own batch.
fn store_turn(
    settings: &WriterSettings,
    connection: &mut Option<Connection>,
    batches: &[(Vec<NewReading>, i64)],
) -> Vec<BatchAnswer> {
    match attempt(settings, connection, batches) {
        Ok(answers) => answers,
        Err(StoreError::Other(_)) if batches.len() > 1 => batches
            .iter()
            .map(|batch| {
                attempt(settings, connection, std::slice::from_ref(batch))
                    .and_then(|mut answer| answer.remove(0))
            })
            .collect(),
        Err(error) => vec![Err(error); batches.len()],
    }
}

/// One transaction for `batches`, on the kept connection.
fn attempt(
    settings: &WriterSettings,
    slot: &mut Option<Connection>,
    batches: &[(Vec<NewReading>, i64)],
) -> Result<Vec<BatchAnswer>, StoreError> {
    let connection = match slot {
        Some(connection) => connection,
        None => slot.insert(settings.open()?),
    };
    let result = store_batches(connection, batches, settings.history_ms);
    // SQLite rolls a transaction back by itself on some errors (a full disk, an I/O error); a
    // connection left inside one by a failure is closed, and the next write opens a fresh one.
    if result.is_err() && !connection.is_autocommit() {
        *slot = None;
    }
    result
}

impl WriterSettings {
    fn open(&self) -> Result<Connection, StoreError> {
        let access = if self.read_only {
            OpenFlags::SQLITE_OPEN_READ_ONLY
        } else {
            OpenFlags::SQLITE_OPEN_READ_WRITE
        };
        let connection =
            Connection::open_with_flags(&self.path, access | OpenFlags::SQLITE_OPEN_NO_MUTEX)?;
        connection.busy_timeout(self.busy_timeout)?;
        // The same settings as the pool's connections (`sqlite.rs`): a commit is on disk when it
        // returns, and the references between tables are enforced. WAL mode is a property of the
        // file, set when the pool created it.
        connection.pragma_update(None, "synchronous", "FULL")?;
        connection.pragma_update(None, "foreign_keys", "ON")?;
        // A page cache of 64 MiB (negative: KiB) instead of SQLite's 2 MiB for this one
        // connection: each batch inserts into the readings' key at places spread over the file, and
        // pages that fall out of the cache are read again from the operating system's. Alternating
        // load runs stored the burst 20-40 % faster with it (BENCHMARKS.md, "Load"); 256 MiB was
        // no faster there.
        connection.pragma_update(None, "cache_size", WRITER_CACHE_KIB)?;
        if !self.automatic_checkpoint {
            // Checkpoints are the checkpoint thread's (`checkpoint_on_request`).
            connection.pragma_update(None, "wal_autocheckpoint", 0)?;
        }
        connection.set_prepared_statement_cache_capacity(32);
        Ok(connection)
    }
}

/// The writer connection's page cache, as SQLite's `cache_size` takes it (negative: KiB).
const WRITER_CACHE_KIB: i64 = -64 * 1024;

/// The value of the `mode` parameter of an SQLite database URL (`sqlite://path?mode=ro`).
fn url_mode(url: &str) -> Option<&str> {
    let (_, query) = url.split_once('?')?;
    query
        .split('&')
        .find_map(|parameter| parameter.strip_prefix("mode="))
}

/// Whether an SQLite database URL asks for a read-only database (`mode=ro`).
pub(crate) fn url_is_read_only(url: &str) -> bool {
    url_mode(url).is_some_and(|mode| mode.eq_ignore_ascii_case("ro"))
}

/// The database file that `path` (the file name of an SQLite database URL) names, or `None` for an
/// in-memory database, which a second connection cannot open.
pub(crate) fn database_file(url: &str, path: &Path) -> Option<PathBuf> {
    let text = path.to_string_lossy();
    // sqlx names the shared in-memory database it makes of `sqlite::memory:` with a URI of its
    // own (`file:sqlx-in-memory-N`), which names no file.
    let in_memory = text.is_empty()
        || text == ":memory:"
        || text.starts_with("file:")
        || url_mode(url).is_some_and(|mode| mode.eq_ignore_ascii_case("memory"));
    (!in_memory).then(|| path.to_owned())
}

const STATION_SQL: &str = "SELECT s.id, s.area_id, a.interval_ms FROM stations s \
     JOIN areas a ON a.id = s.area_id WHERE s.key = ?1";
const QUANTITY_SQL: &str = "SELECT id FROM quantities WHERE key = ?1";
const ADD_QUANTITY_SQL: &str =
    "INSERT INTO quantities (key) VALUES (?1) ON CONFLICT (key) DO NOTHING";
/// Every stored revision of one station's quantity over a span of time, in time and revision order:
/// one search of the station-first key `readings_key` (migration 0005;
/// `current_revisions_are_one_range_search_per_station`).
const CURRENT_SQL: &str = "SELECT observed_at_ms, revision, value, value_as_sent, unit_as_sent \
     FROM readings WHERE station_id = ?1 AND quantity_id = ?2 \
     AND observed_at_ms BETWEEN ?3 AND ?4 ORDER BY observed_at_ms, revision";
/// Keys of one station and quantity whose times are at most this far apart are looked up with one
/// range search ([`current_values`]); a wider gap starts another search, so that a batch holding
/// two far-apart times of a station does not read every reading stored between them.
const CURRENT_SPAN_GAP_MS: i64 = 60_000;
/// Readings per multi-row `INSERT` ([`insert_rows`]; the results' own chunk size is
/// `results_sql::ROWS_PER_INSERT`). One statement per row opened and closed its
/// cursors on the readings' table, their key and the tables the foreign keys name for every row;
/// one statement for many rows opens them once. Alternating load runs stored the burst 1.11x as
/// fast with it (BENCHMARKS.md, "Load"). 64 rows take 512 parameters, far below SQLite's limit
/// (32,766 since 3.32, sqlite.org "Limits In SQLite", from memory; the suite's 151-reading batch
/// binds them all).
const READINGS_PER_INSERT: usize = 64;
/// Parameters per row of an `INSERT` of readings.
const INSERT_COLUMNS: usize = 8;

/// `INSERT INTO readings` of `rows` rows, each [`INSERT_COLUMNS`] parameters bound in the order of
/// [`bind_row`].
fn insert_sql(rows: usize) -> String {
    let row = format!("({})", ["?"; INSERT_COLUMNS].join(", "));
    format!(
        "INSERT INTO readings (observed_at_ms, station_id, quantity_id, revision, \
         value, value_as_sent, unit_as_sent, received_at_ms) VALUES {}",
        vec![row; rows].join(", ")
    )
}

static INSERT_ONE_SQL: std::sync::LazyLock<String> = std::sync::LazyLock::new(|| insert_sql(1));
static INSERT_MANY_SQL: std::sync::LazyLock<String> =
    std::sync::LazyLock::new(|| insert_sql(READINGS_PER_INSERT));
const MARK_SQL: &str = "INSERT INTO pending_buckets (area_id, quantity_id, bucket_start_ms, \
     marked_at_ms, first_marked_at_ms) VALUES (?1, ?2, ?3, ?4, ?4) \
     ON CONFLICT (area_id, quantity_id, bucket_start_ms) DO UPDATE SET \
     marked_at_ms = excluded.marked_at_ms, mark_count = pending_buckets.mark_count + 1";

/// Stores `batches` as if one after the other, in one transaction: a batch naming an unknown
/// station is refused whole and writes nothing, the others are classified in order against what is
/// stored and what the batches before them stored.
fn store_batches(
    connection: &mut Connection,
    batches: &[(Vec<NewReading>, i64)],
    history_ms: i64,
) -> Result<Vec<BatchAnswer>, StoreError> {
    let tx = connection.transaction_with_behavior(TransactionBehavior::Immediate)?;

    let all_readings = || batches.iter().flat_map(|(readings, _)| readings.iter());
    let station_keys = distinct_sorted(all_readings().map(|reading| &reading.station));
    let stations = lookup_stations(&tx, &station_keys)?;
    let mut answers: Vec<BatchAnswer> = batches
        .iter()
        .map(|(readings, _)| {
            let unknown = missing_keys(readings.iter().map(|reading| &reading.station), &stations);
            if unknown.is_empty() {
                Ok(BatchOutcome::default())
            } else {
                Err(StoreError::NotFound(format!(
                    "unknown stations: {}",
                    unknown.join(", ")
                )))
            }
        })
        .collect();
    let stored = || {
        batches
            .iter()
            .zip(&answers)
            .filter(|(_, answer)| answer.is_ok())
            .map(|(batch, _)| batch)
    };
    let quantity_keys = distinct_sorted(
        stored()
            .flat_map(|(readings, _)| readings.iter())
            .map(|reading| &reading.quantity),
    );
    let quantities = ensure_quantities(&tx, &quantity_keys)?;

    let resolved: Vec<(Vec<ResolvedReading<'_>>, i64)> = stored()
        .map(|(readings, now_ms)| (resolve(readings, &stations, &quantities), *now_ms))
        .collect();
    let mut current = current_values(&tx, &resolved)?;

    let mut buckets = BTreeSet::new();
    let mut following = Following::new();
    let mut marked_at_ms = i64::MIN;
    {
        let stored_answers = answers.iter_mut().filter(|answer| answer.is_ok());
        for ((batch, now_ms), answer) in resolved.iter().zip(stored_answers) {
            let plan = plan_batch(batch, &mut current, history_ms);
            *answer = Ok(plan.outcome);
            insert_rows(&tx, &plan.rows, *now_ms)?;
            buckets.extend(plan.buckets);
            following.extend(plan.following);
            marked_at_ms = marked_at_ms.max(*now_ms);
        }
    }

    {
        let mut mark = tx.prepare_cached(MARK_SQL)?;
        for (area_id, quantity_id, bucket_start_ms) in buckets {
            mark.execute([area_id, quantity_id, bucket_start_ms, marked_at_ms])?;
        }
    }
    coalesce_following(&mut following);
    if !following.is_empty() {
        let sql = format!(
            "WITH following (area_id, quantity_id, after_ms, until_ms, marked_at_ms) AS \
             (VALUES (?1, ?2, ?3, ?4, ?5)) {MARK_FOLLOWING}"
        );
        let mut mark = tx.prepare_cached(&sql)?;
        for (area_id, quantity_id, after_ms, until_ms) in following {
            mark.execute([area_id, quantity_id, after_ms, until_ms, marked_at_ms])?;
        }
    }

    tx.commit()?;
    Ok(answers)
}

/// Inserts `rows`, received at `now_ms`: [`READINGS_PER_INSERT`] rows to a statement, the rest one by
/// one (one statement per distinct row count would crowd the connection's statement cache).
fn insert_rows(
    tx: &rusqlite::Transaction<'_>,
    rows: &[RowToInsert],
    now_ms: i64,
) -> rusqlite::Result<()> {
    let mut chunks = rows.chunks_exact(READINGS_PER_INSERT);
    if chunks.len() > 0 {
        let mut many = tx.prepare_cached(&INSERT_MANY_SQL)?;
        for chunk in &mut chunks {
            for (index, row) in chunk.iter().enumerate() {
                bind_row(&mut many, index * INSERT_COLUMNS, row, now_ms)?;
            }
            many.raw_execute()?;
        }
    }
    if !chunks.remainder().is_empty() {
        let mut one = tx.prepare_cached(&INSERT_ONE_SQL)?;
        for row in chunks.remainder() {
            bind_row(&mut one, 0, row, now_ms)?;
            one.raw_execute()?;
        }
    }
    Ok(())
}

/// Binds `row` to the parameters after the first `before` of an [`insert_sql`] statement.
fn bind_row(
    statement: &mut rusqlite::Statement<'_>,
    before: usize,
    row: &RowToInsert,
    now_ms: i64,
) -> rusqlite::Result<()> {
    statement.raw_bind_parameter(before + 1, row.observed_at_ms)?;
    statement.raw_bind_parameter(before + 2, row.station_id)?;
    statement.raw_bind_parameter(before + 3, row.quantity_id)?;
    statement.raw_bind_parameter(before + 4, row.revision)?;
    statement.raw_bind_parameter(before + 5, row.value)?;
    statement.raw_bind_parameter(before + 6, row.value_as_sent)?;
    statement.raw_bind_parameter(before + 7, row.unit_as_sent.as_deref())?;
    statement.raw_bind_parameter(before + 8, now_ms)
}

/// Runs `statement` once per key, with the parameters `parameters` makes of it, and keeps in
/// `found` what `read` makes of the row of each key that has one.
fn found_per_key<K, P, V, S>(
    statement: &mut rusqlite::CachedStatement<'_>,
    keys: impl IntoIterator<Item = K>,
    parameters: impl Fn(&K) -> P,
    read: impl Fn(&rusqlite::Row<'_>) -> rusqlite::Result<V>,
    found: &mut HashMap<K, V, S>,
) -> rusqlite::Result<()>
where
    K: Eq + std::hash::Hash,
    P: rusqlite::Params,
    S: BuildHasher,
{
    for key in keys {
        if let Some(value) = statement.query_row(parameters(&key), &read).optional()? {
            found.insert(key, value);
        }
    }
    Ok(())
}

/// The stations of the given keys (in any order), with their area and its interval; a key with no
/// station is left out. The map's hasher is the caller's: the writer's [`FastMap`], or std's for
/// `Store::station_keys_lookup`, so that neither copies the map into the other.
pub(crate) fn lookup_stations<S: BuildHasher + Default>(
    tx: &rusqlite::Transaction<'_>,
    keys: &[String],
) -> Result<HashMap<String, StationRef, S>, StoreError> {
    let mut found = HashMap::with_capacity_and_hasher(keys.len(), S::default());
    found_per_key(
        &mut tx.prepare_cached(STATION_SQL)?,
        keys.iter().cloned(),
        |key| [key.clone()],
        |row| {
            Ok(StationRef {
                station_id: row.get(0)?,
                area_id: row.get(1)?,
                interval_ms: row.get(2)?,
            })
        },
        &mut found,
    )?;
    Ok(found)
}

/// Returns the ids of the given quantity keys, adding the keys that have none yet.
fn ensure_quantities(
    tx: &rusqlite::Transaction<'_>,
    keys: &[String],
) -> Result<FastMap<String, i64>, StoreError> {
    let mut select = tx.prepare_cached(QUANTITY_SQL)?;
    let mut found = FastMap::with_capacity_and_hasher(keys.len(), Default::default());
    let id = |row: &rusqlite::Row<'_>| row.get(0);
    found_per_key(
        &mut select,
        keys.iter().cloned(),
        |key| [key.clone()],
        id,
        &mut found,
    )?;
    let missing = missing_keys(keys, &found);
    if !missing.is_empty() {
        let mut add = tx.prepare_cached(ADD_QUANTITY_SQL)?;
        for key in &missing {
            add.execute([key])?;
        }
        found_per_key(&mut select, missing, |key| [key.clone()], id, &mut found)?;
    }
    Ok(found)
}

/// The current revision of every distinct key of the batches. The keys are grouped by station and
/// quantity into spans of time with no gap over [`CURRENT_SPAN_GAP_MS`], and each span is one range
/// search: a gateway's batch covers a hundred stations over a minute, so its 5,000 keys take a
/// hundred searches instead of 5,000, and a span with nothing stored yet (new readings) returns no
/// row at all.
fn current_values(
    tx: &rusqlite::Transaction<'_>,
    resolved: &[(Vec<ResolvedReading<'_>>, i64)],
) -> Result<FastMap<KeyIds, CurrentValue>, StoreError> {
    // Station, quantity, time: the order of the spans.
    let mut keys: Vec<(i64, i64, i64)> = resolved
        .iter()
        .flat_map(|(batch, _)| batch.iter().map(ResolvedReading::key))
        .map(|(observed_at_ms, station_id, quantity_id)| (station_id, quantity_id, observed_at_ms))
        .collect();
    keys.sort_unstable();
    keys.dedup();
    let mut statement = tx.prepare_cached(CURRENT_SQL)?;
    let mut current = FastMap::with_capacity_and_hasher(keys.len(), Default::default());
    let same_span = |a: &(i64, i64, i64), b: &(i64, i64, i64)| {
        (a.0, a.1) == (b.0, b.1) && b.2 - a.2 <= CURRENT_SPAN_GAP_MS
    };
    for span in keys.chunk_by(same_span) {
        let (station_id, quantity_id, from_ms) = span[0];
        let until_ms = span[span.len() - 1].2;
        let mut rows = statement.query([station_id, quantity_id, from_ms, until_ms])?;
        while let Some(row) = rows.next()? {
            let observed_at_ms: i64 = row.get(0)?;
            if span
                .binary_search(&(station_id, quantity_id, observed_at_ms))
                .is_err()
            {
                continue;
            }
            // Rows come in revision order, so the last one kept for a key is its current one.
            current.insert(
                (observed_at_ms, station_id, quantity_id),
                CurrentValue {
                    revision: row.get(1)?,
                    value: row.get(2)?,
                    value_as_sent: row.get(3)?,
                    unit_as_sent: row.get(4)?,
                },
            );
        }
    }
    Ok(current)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// `EXPLAIN QUERY PLAN` of the current-revisions query on the migrated schema: one `SEARCH` of
    /// the station-first key `readings_key` (migration 0005) on the station, the quantity and a
    /// range of times, no `SCAN`, and no `USE TEMP B-TREE` for the `ORDER BY` (the index holds the
    /// rows in that order). The output's vocabulary is SQLite's (sqlite.org, "EXPLAIN QUERY PLAN").
    #[tokio::test]
    async fn current_revisions_are_one_range_search_per_station() {
        let database = crate::testing::TestDatabase::sqlite();
        let store = database.open().await;
        let file = database.sqlite_file().expect("a file");
        let connection = Connection::open(&file).expect("open");
        let plan: Vec<String> = connection
            .prepare(&format!("EXPLAIN QUERY PLAN {CURRENT_SQL}"))
            .expect("explain")
            .query_map([1_i64, 2, 3, 4], |row| row.get(3))
            .expect("plan")
            .collect::<Result<_, _>>()
            .expect("rows");
        assert_eq!(plan.len(), 1, "{plan:?}");
        assert!(
            plan[0].starts_with("SEARCH readings USING INDEX readings_key"),
            "{plan:?}"
        );
        for column in [
            "station_id=?",
            "quantity_id=?",
            "observed_at_ms>? AND observed_at_ms<?",
        ] {
            assert!(plan[0].contains(column), "{column} not searched: {plan:?}");
        }
        drop(connection);
        crate::Store::close(&store).await;
        database.finish().await;
    }

    #[test]
    fn reads_the_mode_of_a_database_url() {
        // SQLite's URI parameters (sqlite.org, "Uniform Resource Identifiers"): mode=ro opens the
        // database read-only, mode=memory in memory.
        assert!(url_is_read_only("sqlite:///var/lib/consensor/c.db?mode=ro"));
        assert!(url_is_read_only("sqlite://c.db?cache=shared&mode=ro"));
        assert!(!url_is_read_only("sqlite://c.db?mode=rwc"));
        assert!(!url_is_read_only("sqlite://mode=ro.db"));
        let file = Path::new("/var/lib/consensor/c.db");
        assert_eq!(
            database_file("sqlite:///var/lib/consensor/c.db", file),
            Some(file.to_owned())
        );
        assert_eq!(database_file("sqlite://c.db?mode=memory", file), None);
        assert_eq!(
            database_file("sqlite::memory:", Path::new(":memory:")),
            None
        );
    }
}
