//! The backend-neutral part of storing a batch: deciding, for each reading, whether it is new, a
//! duplicate or a revision, and which pending buckets it touches. The backends only fetch the
//! current values and write the rows this module plans.

use std::collections::{BTreeSet, HashMap};
use std::future::Future;

use sqlx::Row;

use crate::{BatchOutcome, NewReading, StationRef, StoreError};

/// The integer identity of a reading: (observed_at_ms, station_id, quantity_id), in the order of the
/// unique index.
pub(crate) type KeyIds = (i64, i64, i64);

/// The maps of a batch's planning (its keys, stations and quantities, thousands of lookups a batch)
/// hash with foldhash, seeded per process, rather than std's SipHash, which took about 6 % of the
/// SQLite writer thread's time in the load test's burst (BENCHMARKS.md, "SQLite's build").
pub(crate) type FastMap<K, V> = HashMap<K, V, foldhash::fast::RandomState>;

/// The current (highest) revision stored for a key, with the fields that decide duplicates.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct CurrentValue {
    pub revision: i64,
    pub value: Option<f64>,
    pub value_as_sent: Option<f64>,
    pub unit_as_sent: Option<String>,
}

/// A reading whose station and quantity have been resolved to ids.
pub(crate) struct ResolvedReading<'a> {
    pub reading: &'a NewReading,
    pub station_id: i64,
    pub area_id: i64,
    pub interval_ms: i64,
    pub quantity_id: i64,
}

impl ResolvedReading<'_> {
    pub fn key(&self) -> KeyIds {
        (
            self.reading.observed_at_ms,
            self.station_id,
            self.quantity_id,
        )
    }
}

/// Resolves each reading's station and quantity keys to ids; every key must be in the maps (the
/// caller has refused unknown stations and added unknown quantities).
pub(crate) fn resolve<'a>(
    readings: &'a [NewReading],
    stations: &FastMap<String, StationRef>,
    quantities: &FastMap<String, i64>,
) -> Vec<ResolvedReading<'a>> {
    readings
        .iter()
        .map(|reading| {
            let station = stations[&reading.station];
            ResolvedReading {
                reading,
                station_id: station.station_id,
                area_id: station.area_id,
                interval_ms: station.interval_ms,
                quantity_id: quantities[&reading.quantity],
            }
        })
        .collect()
}

/// One row to append to `readings`.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct RowToInsert {
    pub observed_at_ms: i64,
    pub station_id: i64,
    pub quantity_id: i64,
    pub revision: i64,
    pub value: Option<f64>,
    pub value_as_sent: Option<f64>,
    pub unit_as_sent: Option<String>,
}

/// What a batch will write, computed before any write happens.
#[derive(Debug, Default, PartialEq)]
pub(crate) struct BatchPlan {
    pub rows: Vec<RowToInsert>,
    /// Distinct (area_id, quantity_id, bucket_start_ms), sorted so that concurrent batches lock
    /// pending-bucket rows in the same order and cannot deadlock each other.
    pub buckets: Vec<KeyIds>,
    /// The intervals after the ones marked whose results a stored reading may change: see
    /// [`Following`].
    pub following: Following,
    pub outcome: BatchOutcome,
}

/// The already computed intervals a batch's stored readings may change, as ranges
/// `(area_id, quantity_id, after_ms, until_ms)` of interval starts, `after_ms < start < until_ms`.
/// A reading is judged on its station's readings from `Rules::chain_start` of its time on (the
/// start of the history block before its own), so a reading at `t` takes part in the judgement of
/// every later reading up to the end of the history block after `t`'s: an interval computed before
/// a late reading came may change with it (a step that was a station's first reading now has a
/// previous one; a flat line gets longer). Each reading gives the range from its own interval to
/// the end of that block; overlapping ranges of one area and quantity are joined
/// ([`coalesce_following`]) and separate ones kept apart, so that a batch holding one old reading
/// beside today's marks nothing between the two.
pub(crate) type Following = Vec<(i64, i64, i64, i64)>;

/// Sorts `ranges` and joins those of one area and quantity that overlap or touch.
pub(crate) fn coalesce_following(ranges: &mut Following) {
    ranges.sort_unstable();
    let mut joined: Following = Vec::with_capacity(ranges.len());
    for &(area_id, quantity_id, after, until) in ranges.iter() {
        match joined.last_mut() {
            Some(last) if (last.0, last.1) == (area_id, quantity_id) && after <= last.3 => {
                last.3 = last.3.max(until);
            }
            _ => joined.push((area_id, quantity_id, after, until)),
        }
    }
    *ranges = joined;
}

/// Marks again the computed intervals of `following` (a table or CTE with columns area_id,
/// quantity_id, after_ms, until_ms, marked_at_ms, written by each backend in front of this), in key
/// order so that concurrent batches lock rows in the same order. The results of the intervals
/// themselves are kept (append-only); the worker computes a new revision.
pub(crate) const MARK_FOLLOWING: &str = "INSERT INTO pending_buckets (area_id, quantity_id, \
     bucket_start_ms, marked_at_ms, first_marked_at_ms) \
     SELECT DISTINCT l.area_id, l.quantity_id, l.bucket_start_ms, m.marked_at_ms, m.marked_at_ms \
     FROM following m JOIN interval_latest l ON l.area_id = m.area_id \
     AND l.quantity_id = m.quantity_id AND l.bucket_start_ms > m.after_ms \
     AND l.bucket_start_ms < m.until_ms \
     WHERE true ORDER BY l.area_id, l.quantity_id, l.bucket_start_ms \
     ON CONFLICT (area_id, quantity_id, bucket_start_ms) DO UPDATE SET \
     marked_at_ms = excluded.marked_at_ms, mark_count = pending_buckets.mark_count + 1";

/// Classifies every reading of a batch against the current values already stored (`current`, keyed
/// by [`KeyIds`]) and against the readings before it in the same batch, so that a key repeated
/// within one batch is treated exactly as if it had arrived in two batches. `current` is left
/// holding what the batch made current, so that batches planned one after the other in one
/// transaction see each other as if they had been stored one after the other.
///
/// `history_ms` is the rules' history block (`Rules::history_ms`), for [`Following`].
pub(crate) fn plan_batch(
    readings: &[ResolvedReading<'_>],
    current: &mut FastMap<KeyIds, CurrentValue>,
    history_ms: i64,
) -> BatchPlan {
    let mut plan = BatchPlan::default();
    let mut buckets = BTreeSet::new();
    for resolved in readings {
        let reading = resolved.reading;
        let key = resolved.key();
        let revision = match current.get(&key) {
            Some(stored) if same_reading(stored, reading) => {
                plan.outcome.duplicates += 1;
                continue;
            }
            Some(stored) => {
                plan.outcome.revised += 1;
                stored.revision + 1
            }
            None => 0,
        };
        plan.outcome.accepted += 1;
        plan.rows.push(RowToInsert {
            observed_at_ms: reading.observed_at_ms,
            station_id: resolved.station_id,
            quantity_id: resolved.quantity_id,
            revision,
            value: reading.value,
            value_as_sent: reading.value_as_sent,
            unit_as_sent: reading.unit_as_sent.clone(),
        });
        let bucket = bucket_start_ms(reading.observed_at_ms, resolved.interval_ms);
        buckets.insert((resolved.area_id, resolved.quantity_id, bucket));
        let until = (reading.observed_at_ms.div_euclid(history_ms) + 2) * history_ms;
        plan.following
            .push((resolved.area_id, resolved.quantity_id, bucket, until));
        current.insert(
            key,
            CurrentValue {
                revision,
                value: reading.value,
                value_as_sent: reading.value_as_sent,
                unit_as_sent: reading.unit_as_sent.clone(),
            },
        );
    }
    // The rows go in the order of the readings' key (`readings_key`: station, quantity, time,
    // revision) rather than the batch's: a gateway's batch interleaves its stations second by
    // second, and inserted in that order each row goes to another station's leaf of the key.
    // Sorted, a station's rows are inserted one after the other into the same leaf. Alternating
    // load runs stored the burst 1.13x as fast (BENCHMARKS.md, "Load"). Reading ids then follow
    // the key within a batch; nothing reads them as arrival order (a key's revisions are counted
    // by `revision`, and a batch's readings share `received_at_ms`).
    plan.rows.sort_unstable_by_key(|row| {
        (
            row.station_id,
            row.quantity_id,
            row.observed_at_ms,
            row.revision,
        )
    });
    plan.buckets = buckets.into_iter().collect();
    coalesce_following(&mut plan.following);
    plan
}

/// The newest `marked_at_ms` an ended interval may have to be claimed at `now_ms` when marks must
/// have settled for `settle_ms` (see `Store::claim_buckets`); no limit when `settle_ms` is 0.
pub(crate) fn settled_before(now_ms: i64, settle_ms: i64) -> i64 {
    if settle_ms > 0 {
        now_ms.saturating_sub(settle_ms)
    } else {
        i64::MAX
    }
}

/// The start of the epoch-aligned interval containing `observed_at_ms`. Euclidean division makes
/// times before 1970 fall into the interval that starts at or before them, as for later times.
pub fn bucket_start_ms(observed_at_ms: i64, interval_ms: i64) -> i64 {
    observed_at_ms.div_euclid(interval_ms) * interval_ms
}

/// A reading is a duplicate of the stored current value when everything the station sent and what
/// it was converted to are the same. Numbers compare with `==` rather than bit for bit because
/// SQLite stores a whole-number REAL as an integer and so reads -0.0 back as 0.0; NaN (refused at
/// the edge anyway) is taken as equal to NaN so that resending it is not an endless revision.
fn same_reading(stored: &CurrentValue, reading: &NewReading) -> bool {
    same_number(stored.value, reading.value)
        && same_number(stored.value_as_sent, reading.value_as_sent)
        && stored.unit_as_sent == reading.unit_as_sent
}

fn same_number(left: Option<f64>, right: Option<f64>) -> bool {
    match (left, right) {
        (None, None) => true,
        (Some(a), Some(b)) => a == b || (a.is_nan() && b.is_nan()),
        _ => false,
    }
}

/// Why one attempt at storing a batch failed: a driver error (which may be worth retrying), or a
/// refusal that no retry can change (an unknown station, say).
pub(crate) enum AttemptError {
    Sql(sqlx::Error),
    Refused(StoreError),
}

impl From<sqlx::Error> for AttemptError {
    fn from(error: sqlx::Error) -> Self {
        AttemptError::Sql(error)
    }
}

impl From<StoreError> for AttemptError {
    fn from(error: StoreError) -> Self {
        AttemptError::Refused(error)
    }
}

/// How many times a batch is attempted when concurrent writers collide. A collision means another
/// batch committed the same new key first; the next attempt sees its row and classifies against it.
const BATCH_ATTEMPTS: usize = 4;

/// Runs one transaction (a batch, a result, a recompute request), again when it failed for a reason
/// another attempt can cure.
pub(crate) async fn with_retries<T, F, Fut>(mut attempt: F) -> Result<T, StoreError>
where
    F: FnMut() -> Fut,
    Fut: Future<Output = Result<T, AttemptError>>,
{
    let mut attempts_left = BATCH_ATTEMPTS;
    loop {
        attempts_left -= 1;
        match attempt().await {
            Ok(outcome) => return Ok(outcome),
            Err(AttemptError::Refused(error)) => return Err(error),
            Err(AttemptError::Sql(error))
                if attempts_left > 0 && crate::error::is_retryable(&error) => {}
            Err(AttemptError::Sql(error)) => return Err(error.into()),
        }
    }
}

/// Returns the unknown keys of `wanted` (sorted, deduplicated) given what a lookup `found`.
pub(crate) fn missing_keys<'a, V, S: std::hash::BuildHasher>(
    wanted: impl IntoIterator<Item = &'a String>,
    found: &HashMap<String, V, S>,
) -> Vec<String> {
    let missing: BTreeSet<&String> = wanted
        .into_iter()
        .filter(|key| !found.contains_key(*key))
        .collect();
    missing.into_iter().cloned().collect()
}

/// Distinct values in first-seen-independent (sorted) order, so that rows are locked in a fixed
/// order by concurrent transactions. A batch names few keys many times (a gateway's 5,000 readings
/// name its hundred stations fifty times each), so the keys are made distinct by hashing first and
/// only the distinct ones are sorted: collecting all of them into a `BTreeSet` compared each
/// reading's key with several others on its way down the set, and took 7 % of the SQLite writer's
/// time in the load test's burst (profile in BENCHMARKS.md, "Load").
pub(crate) fn distinct_sorted<'a>(keys: impl IntoIterator<Item = &'a String>) -> Vec<String> {
    let distinct: std::collections::HashSet<&String, foldhash::fast::RandomState> =
        keys.into_iter().collect();
    let mut sorted: Vec<String> = distinct.into_iter().cloned().collect();
    sorted.sort_unstable();
    sorted
}

/// Joins `batch_keys` to the readings and keeps each key's highest revision. Shared by both
/// backends, which differ only in how they build `batch_keys`.
pub(crate) const CURRENT_VALUES_SELECT: &str =
    "SELECT r.observed_at_ms, r.station_id, r.quantity_id, r.revision, r.value, \
     r.value_as_sent, r.unit_as_sent \
     FROM batch_keys k JOIN readings r ON r.observed_at_ms = k.observed_at_ms \
     AND r.station_id = k.station_id AND r.quantity_id = k.quantity_id \
     WHERE NOT EXISTS (SELECT 1 FROM readings newer \
     WHERE newer.observed_at_ms = r.observed_at_ms AND newer.station_id = r.station_id \
     AND newer.quantity_id = r.quantity_id AND newer.revision > r.revision)";

pub(crate) fn insert_current<R: Row>(
    current: &mut FastMap<KeyIds, CurrentValue>,
    row: &R,
) -> Result<(), sqlx::Error>
where
    usize: sqlx::ColumnIndex<R>,
    i64: sqlx::Type<R::Database> + for<'r> sqlx::Decode<'r, R::Database>,
    f64: sqlx::Type<R::Database> + for<'r> sqlx::Decode<'r, R::Database>,
    String: sqlx::Type<R::Database> + for<'r> sqlx::Decode<'r, R::Database>,
{
    let key: KeyIds = (row.try_get(0)?, row.try_get(1)?, row.try_get(2)?);
    let candidate = CurrentValue {
        revision: row.try_get(3)?,
        value: row.try_get(4)?,
        value_as_sent: row.try_get(5)?,
        unit_as_sent: row.try_get(6)?,
    };
    // The query already keeps only the highest revision; taking the maximum here as well keeps the
    // result right even if a key appears twice in the joined set.
    match current.get(&key) {
        Some(existing) if existing.revision >= candidate.revision => {}
        _ => {
            current.insert(key, candidate);
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The default history block (`Rules::default().history_ms`).
    const HOURS_3: i64 = 3 * 3_600_000;

    fn reading(value: Option<f64>, unit: Option<&str>) -> NewReading {
        NewReading {
            station: "ST-1".to_owned(),
            quantity: "air_temperature".to_owned(),
            observed_at_ms: 600_000,
            value,
            value_as_sent: value,
            unit_as_sent: unit.map(str::to_owned),
        }
    }

    fn resolved(reading: &NewReading) -> ResolvedReading<'_> {
        ResolvedReading {
            reading,
            station_id: 7,
            area_id: 3,
            interval_ms: 600_000,
            quantity_id: 2,
        }
    }

    #[test]
    fn repeated_key_within_one_batch_is_duplicate_then_revision() {
        // Three readings of one key: the second repeats the first exactly, the third changes it, so
        // the plan stores revision 0 and revision 1 and counts one duplicate.
        let first = reading(Some(13.9), Some("Cel"));
        let same = reading(Some(13.9), Some("Cel"));
        let changed = reading(Some(14.2), Some("Cel"));
        let batch = [resolved(&first), resolved(&same), resolved(&changed)];
        let plan = plan_batch(&batch, &mut FastMap::default(), HOURS_3);
        assert_eq!(
            plan.outcome,
            BatchOutcome {
                accepted: 2,
                duplicates: 1,
                revised: 1
            }
        );
        let revisions: Vec<i64> = plan.rows.iter().map(|row| row.revision).collect();
        assert_eq!(revisions, vec![0, 1]);
        // 600 000 ms is exactly one 10-minute interval after the epoch, so it starts its bucket.
        assert_eq!(plan.buckets, vec![(3, 2, 600_000)]);
        // 600 000 ms lies in the first three-hour block [0, 3 h); the block after it ends at 6 h.
        assert_eq!(plan.following, vec![(3, 2, 600_000, 6 * 3_600_000)]);
    }

    #[test]
    fn distinct_keys_come_sorted_whatever_the_order_they_arrive_in() {
        // Byte-wise order: Rust's `Ord` for `str` orders "lexicographically by their byte values"
        // (std documentation), as SQLite's BINARY collation does with memcmp() (sqlite.org,
        // "Datatypes In SQLite", collating sequences), so "ST-10" sorts before "ST-9".
        let keys: Vec<String> = ["ST-9", "ST-10", "AX-1", "ST-9", "ST-10", "ST-9"]
            .into_iter()
            .map(str::to_owned)
            .collect();
        assert_eq!(distinct_sorted(&keys), vec!["AX-1", "ST-10", "ST-9"]);
        assert_eq!(
            distinct_sorted(keys.iter().rev()),
            vec!["AX-1", "ST-10", "ST-9"]
        );
        assert!(distinct_sorted(&Vec::<String>::new()).is_empty());
    }

    #[test]
    fn rows_go_in_the_order_of_the_readings_key() {
        // A gateway's batch: two stations, second by second, interleaved, with the second station
        // revising its first reading at the end. The plan keeps every row and puts them in the
        // order of `readings_key` (station, quantity, time, revision): common practice for
        // inserting into a B-tree, so that each station's rows go into one leaf one after the other.
        let at = |second: i64, value: f64| NewReading {
            observed_at_ms: second * 1_000,
            ..reading(Some(value), None)
        };
        let readings = [at(1, 1.0), at(1, 2.0), at(2, 1.5), at(2, 2.5), at(1, 9.0)];
        let station_of = [8, 7, 8, 7, 7];
        let batch: Vec<ResolvedReading<'_>> = readings
            .iter()
            .zip(station_of)
            .map(|(reading, station_id)| ResolvedReading {
                station_id,
                ..resolved(reading)
            })
            .collect();
        let plan = plan_batch(&batch, &mut FastMap::default(), HOURS_3);
        let rows: Vec<(i64, i64, i64, Option<f64>)> = plan
            .rows
            .iter()
            .map(|row| (row.station_id, row.observed_at_ms, row.revision, row.value))
            .collect();
        assert_eq!(
            rows,
            vec![
                (7, 1_000, 0, Some(2.0)),
                (7, 1_000, 1, Some(9.0)),
                (7, 2_000, 0, Some(2.5)),
                (8, 1_000, 0, Some(1.0)),
                (8, 2_000, 0, Some(1.5)),
            ]
        );
        assert_eq!(plan.outcome.accepted, 5);
        assert_eq!(plan.outcome.revised, 1);
    }

    #[test]
    fn following_ranges_join_only_where_they_overlap() {
        let hour = 3_600_000;
        let mut ranges = vec![
            // Area 1: 00:00–06:00 and 02:00–09:00 overlap; 10:00–15:00 stands apart.
            (1, 7, 10 * hour, 15 * hour),
            (1, 7, 2 * hour, 9 * hour),
            (1, 7, 0, 6 * hour),
            // The same times in another area, or for another quantity, are not joined to them.
            (2, 7, 3 * hour, 9 * hour),
            (1, 8, 5 * hour, 9 * hour),
            // A range that starts where the one before ends is joined to it.
            (2, 7, 9 * hour, 12 * hour),
        ];
        coalesce_following(&mut ranges);
        assert_eq!(
            ranges,
            vec![
                (1, 7, 0, 9 * hour),
                (1, 7, 10 * hour, 15 * hour),
                (1, 8, 5 * hour, 9 * hour),
                (2, 7, 3 * hour, 12 * hour),
            ]
        );
    }

    #[test]
    fn unit_and_null_decide_duplicates() {
        let stored = CurrentValue {
            revision: 4,
            value: None,
            value_as_sent: None,
            unit_as_sent: None,
        };
        // null == null with no unit on either side: nothing changed.
        assert!(same_reading(&stored, &reading(None, None)));
        // The same (absent) value with a unit now given is a change of what was sent.
        assert!(!same_reading(&stored, &reading(None, Some("Cel"))));
        // A value where there was none is a change.
        assert!(!same_reading(&stored, &reading(Some(0.0), None)));
        // -0.0 == 0.0, because SQLite cannot keep the sign of a whole-number REAL.
        let zero = CurrentValue {
            value: Some(0.0),
            value_as_sent: Some(0.0),
            ..stored
        };
        assert!(same_reading(&zero, &reading(Some(-0.0), None)));
    }

    #[test]
    fn revision_continues_from_stored_current_value() {
        // The stored current revision is 4, so a changed value becomes revision 5.
        let changed = reading(Some(1.5), None);
        let mut current = FastMap::default();
        current.insert(
            (600_000, 7, 2),
            CurrentValue {
                revision: 4,
                value: Some(1.0),
                value_as_sent: Some(1.0),
                unit_as_sent: None,
            },
        );
        let plan = plan_batch(&[resolved(&changed)], &mut current, HOURS_3);
        assert_eq!(plan.rows[0].revision, 5);
        assert_eq!(plan.outcome.revised, 1);
    }

    #[test]
    fn bucket_starts_align_to_the_epoch() {
        // Hand-computed: 10-minute buckets are multiples of 600 000 ms; a time one millisecond
        // before the epoch belongs to the bucket that starts 600 000 ms before it.
        assert_eq!(bucket_start_ms(0, 600_000), 0);
        assert_eq!(bucket_start_ms(599_999, 600_000), 0);
        assert_eq!(bucket_start_ms(600_000, 600_000), 600_000);
        assert_eq!(bucket_start_ms(-1, 600_000), -600_000);
    }
}
