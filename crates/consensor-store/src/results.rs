//! The data types of the consensus side of the store: the queue of intervals the worker claims,
//! what it loads and stores, the results the API reads back, the set-aside listing and the review
//! log. Like `model.rs`, they hold integer ids and times (milliseconds since the Unix epoch, UTC)
//! and no driver types; the consensus types themselves (`Point`, `Rule`, `Reading`) are the core's.

use std::collections::HashSet;
use std::fmt;
use std::str::FromStr;

use consensor_core::checks::{Point, Reading, Rule};

/// A pending (area, quantity, interval) that one worker has claimed and must compute.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ClaimedBucket {
    pub area_id: i64,
    /// The area's public id, for logs and metrics.
    pub area_key: String,
    pub quantity_id: i64,
    /// The quantity key (such as `air_temperature`), which selects the quantity's rules.
    pub quantity: String,
    /// The interval is `[bucket_start_ms, bucket_start_ms + interval_ms)`.
    pub bucket_start_ms: i64,
    /// The area's interval length when the bucket was claimed.
    pub interval_ms: i64,
    /// How many times the bucket had been marked when it was claimed. `store_result` removes the
    /// bucket only if this is still its count, so that readings stored during the computation cause
    /// another one.
    pub mark_count: i64,
    /// The worker name the claim was taken under.
    pub claimed_by: String,
}

/// The readings one interval decision needs, as `load_interval` returns them.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct IntervalData {
    /// One entry per station of the area with at least one reading of the quantity in the range,
    /// ordered by station key.
    pub stations: Vec<StationSeries>,
    /// The ids of the readings in the range whose latest review decision is `overturn`: an operator
    /// has ruled them good, so the worker keeps them whatever the rules say.
    pub overturned: HashSet<u64>,
}

/// The worker's read of one area and quantity over a time range, in three queries whose parameters
/// are `$1` area id, `$2` quantity key, `$3`..`$4` the range: the area's stations; each station's
/// readings, one range of the station-first index (migration 0003) per station, driven by the
/// stations (`CROSS JOIN` keeps that order on SQLite) in (time, revision) order; the reviews of
/// those readings, few, in (reading, review) order.
pub(crate) const LOAD_STATIONS_SQL: &str =
    "SELECT id, key FROM stations WHERE area_id = $1 ORDER BY key";
pub(crate) const LOAD_READINGS_SQL: &str =
    "SELECT s.id, r.id, r.observed_at_ms, r.value, r.value_as_sent \
     FROM stations s CROSS JOIN readings r \
     WHERE s.area_id = $1 AND r.station_id = s.id \
     AND r.quantity_id = (SELECT id FROM quantities WHERE key = $2) \
     AND r.observed_at_ms >= $3 AND r.observed_at_ms < $4 \
     ORDER BY s.id, r.observed_at_ms, r.revision";
pub(crate) const LOAD_REVIEWS_SQL: &str = "SELECT v.reading_id, v.decision FROM reviews v \
     JOIN readings r ON r.id = v.reading_id \
     JOIN stations s ON s.id = r.station_id \
     WHERE s.area_id = $1 \
     AND r.quantity_id = (SELECT id FROM quantities WHERE key = $2) \
     AND r.observed_at_ms >= $3 AND r.observed_at_ms < $4 \
     ORDER BY v.reading_id, v.id";

/// One row of the worker's read: station id, reading id, observed_at_ms, value, value as sent; in
/// (station, observed_at, revision) order.
pub(crate) type ReadingRow = (i64, i64, i64, Option<f64>, Option<f64>);

/// Builds the stations' series from the area's stations (id, key; in key order) and the reading rows:
/// of several revisions of one reading the last (highest) is kept; stations without readings are
/// left out. Used by every way of reading the rows, so they all give the same `IntervalData`.
pub(crate) fn assemble_series<E>(
    stations: Vec<(i64, String)>,
    rows: impl Iterator<Item = Result<ReadingRow, E>>,
) -> Result<Vec<StationSeries>, crate::StoreError>
where
    crate::StoreError: From<E>,
{
    let mut series: Vec<StationSeries> = stations
        .into_iter()
        .map(|(station_id, station_key)| StationSeries {
            station_id,
            station_key,
            readings: Vec::new(),
        })
        .collect();
    let mut by_id: Vec<(i64, usize)> = series
        .iter()
        .enumerate()
        .map(|(index, station)| (station.station_id, index))
        .collect();
    by_id.sort_unstable();
    let mut current: Option<(i64, usize)> = None;
    for row in rows {
        let (station_id, id, observed_at_ms, value, value_as_sent) = row?;
        let index = match current {
            Some((id, index)) if id == station_id => index,
            _ => {
                let found = by_id
                    .binary_search_by_key(&station_id, |&(id, _)| id)
                    .map_err(|_| {
                        crate::StoreError::Other(format!(
                            "station {station_id} left its area during a read"
                        ))
                    })?;
                current = Some(by_id[found]);
                by_id[found].1
            }
        };
        let reading = Reading {
            id: reading_id_for_core(id)?,
            observed_at_ms,
            value,
            value_as_sent,
        };
        let readings = &mut series[index].readings;
        match readings.last_mut() {
            // A higher revision of the same reading: it replaces the one before.
            Some(last) if last.observed_at_ms == observed_at_ms => *last = reading,
            _ => readings.push(reading),
        }
    }
    series.retain(|station| !station.readings.is_empty());
    Ok(series)
}

/// The readings whose latest review is `overturn`, from (reading id, decision) rows ordered by
/// reading id and then by review (the last row of a reading is its latest decision).
pub(crate) fn overturned_of(
    reviews: Vec<(i64, String)>,
) -> Result<HashSet<u64>, crate::StoreError> {
    let mut overturned = HashSet::new();
    let mut rows = reviews.into_iter().peekable();
    while let Some((reading_id, decision)) = rows.next() {
        let latest = rows.peek().is_none_or(|next| next.0 != reading_id);
        if latest && decision == ReviewDecision::Overturn.as_str() {
            overturned.insert(reading_id_for_core(reading_id)?);
        }
    }
    Ok(overturned)
}

/// A reading's row id as the core's `Reading::id`.
pub(crate) fn reading_id_for_core(id: i64) -> Result<u64, crate::StoreError> {
    u64::try_from(id).map_err(|_| crate::StoreError::Other(format!("negative reading id {id}")))
}

/// One station's current readings of one quantity, oldest first.
#[derive(Debug, Clone, PartialEq)]
pub struct StationSeries {
    pub station_id: i64,
    pub station_key: String,
    /// The current revision of each reading (the core's `Reading::id` is the reading row id).
    pub readings: Vec<Reading>,
}

/// One decided interval handed to `Store::store_results`: the claimed bucket, the core's outcome,
/// the row id of each station handle the outcome uses (`station_ids[h]` for handle `h`), and the
/// reason sentence of each set-aside record (`reasons[i]` for `outcome.set_aside[i]`).
#[derive(Debug, Clone, Copy)]
pub struct ResultToStore<'a> {
    pub bucket: &'a ClaimedBucket,
    pub outcome: &'a consensor_core::checks::IntervalOutcome,
    pub station_ids: &'a [i64],
    pub reasons: &'a [String],
}

/// What claiming the interval of one reviewed reading found.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum IntervalClaim {
    /// The interval was pending and is now claimed by the caller, who must compute it.
    Claimed(ClaimedBucket),
    /// The interval is pending but another worker holds a live claim on it.
    Busy,
    /// Nothing is pending for the interval: it has been computed since it was marked.
    NotPending,
}

/// What `store_result` wrote.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct StoredResult {
    /// The row id of the new result.
    pub result_id: i64,
    /// The interval's new revision: 1 for its first result, then 2, 3, …
    pub revision: i64,
    /// `true` when the pending bucket was removed; `false` when new readings marked it again while
    /// it was being computed, so it stays pending (with its claim released) and will get another
    /// revision.
    pub bucket_done: bool,
}

/// One stored result of one interval: the core's `Point` and where and when it was computed. The
/// unit is not stored; the caller knows the quantity's canonical unit.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ResultRow {
    /// The interval is `[start_ms, start_ms + interval_ms)`.
    pub start_ms: i64,
    pub interval_ms: i64,
    pub revision: i64,
    pub computed_at_ms: i64,
    pub point: Point,
}

/// The review state of a set-aside reading: its latest review decision, or `Pending` when there is
/// none.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum ReviewState {
    Pending,
    Upheld,
    Overturned,
}

impl ReviewState {
    /// The state's name in the API.
    pub fn as_str(self) -> &'static str {
        match self {
            ReviewState::Pending => "pending",
            ReviewState::Upheld => "upheld",
            ReviewState::Overturned => "overturned",
        }
    }

    /// The state for an API name (`pending`, `upheld`, `overturned`).
    pub fn parse(text: &str) -> Option<ReviewState> {
        [
            ReviewState::Pending,
            ReviewState::Upheld,
            ReviewState::Overturned,
        ]
        .into_iter()
        .find(|state| state.as_str() == text)
    }
}

/// An operator's decision on a set-aside reading.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum ReviewDecision {
    /// The reading was rightly set aside.
    Uphold,
    /// The reading is good and must be used again.
    Overturn,
}

impl ReviewDecision {
    /// The decision's name in the API and in the `reviews` table.
    pub fn as_str(self) -> &'static str {
        match self {
            ReviewDecision::Uphold => "uphold",
            ReviewDecision::Overturn => "overturn",
        }
    }

    /// The decision for an API name (`uphold`, `overturn`).
    pub fn parse(text: &str) -> Option<ReviewDecision> {
        [ReviewDecision::Uphold, ReviewDecision::Overturn]
            .into_iter()
            .find(|decision| decision.as_str() == text)
    }

    /// The review state a reading is in when this is its latest decision.
    pub fn state(self) -> ReviewState {
        match self {
            ReviewDecision::Uphold => ReviewState::Upheld,
            ReviewDecision::Overturn => ReviewState::Overturned,
        }
    }
}

/// Which set-aside records to list; every `None` field leaves that dimension unfiltered.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct SetAsideFilter {
    pub area: Option<String>,
    pub station: Option<String>,
    pub quantity: Option<String>,
    /// Inclusive lower bound on the reading's `observed_at_ms`.
    pub from_ms: Option<i64>,
    /// Exclusive upper bound on the reading's `observed_at_ms`.
    pub to_ms: Option<i64>,
    pub review: Option<ReviewState>,
}

/// A reading's latest review, as the set-aside listing shows it.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ReviewSummary {
    pub state: ReviewState,
    /// The id of the token that decided; `None` while pending.
    pub by: Option<String>,
    pub at_ms: Option<i64>,
    pub note: Option<String>,
}

/// One set-aside record joined with its reading and the reading's latest review.
#[derive(Debug, Clone, PartialEq)]
pub struct SetAsideRow {
    pub reading_id: i64,
    pub station: String,
    pub area: String,
    pub quantity: String,
    /// The canonical value; `None` when the station sent `null`.
    pub value: Option<f64>,
    pub value_as_sent: Option<f64>,
    /// `None` when the station sent no unit.
    pub unit_as_sent: Option<String>,
    pub observed_at_ms: i64,
    pub rule: Rule,
    pub reason: String,
    pub score: Option<f64>,
    pub threshold: Option<f64>,
    pub consensus_median: Option<f64>,
    pub consensus_spread: Option<f64>,
    pub gap_ms: Option<i64>,
    pub window_readings: Option<i64>,
    pub station_value: Option<f64>,
    /// The interval and result revision the record belongs to.
    pub bucket_start_ms: i64,
    pub result_revision: i64,
    pub result_id: i64,
    pub review: ReviewSummary,
}

/// Where a page of the set-aside listing ended: the sort key of its last row. The listing is ordered
/// by (observed_at_ms, reading_id, result_id), which is unique, so the next page starts strictly
/// after it and no row is skipped or repeated when rows are added meanwhile.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub struct SetAsideCursor {
    pub observed_at_ms: i64,
    pub reading_id: i64,
    pub result_id: i64,
}

impl fmt::Display for SetAsideCursor {
    /// The opaque text form handed to API clients: the three numbers joined by `_`.
    fn fmt(&self, formatter: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            formatter,
            "{}_{}_{}",
            self.observed_at_ms, self.reading_id, self.result_id
        )
    }
}

/// A cursor text that is not three integers joined by `_`.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("not a set-aside cursor")]
pub struct BadCursor;

impl FromStr for SetAsideCursor {
    type Err = BadCursor;

    fn from_str(text: &str) -> Result<Self, Self::Err> {
        let mut parts = text.split('_');
        let mut next = || -> Result<i64, BadCursor> {
            parts
                .next()
                .and_then(|part| part.parse().ok())
                .ok_or(BadCursor)
        };
        let cursor = SetAsideCursor {
            observed_at_ms: next()?,
            reading_id: next()?,
            result_id: next()?,
        };
        if parts.next().is_some() {
            return Err(BadCursor);
        }
        Ok(cursor)
    }
}

/// One page of a listing and the cursor of the next one (`None` on the last page).
#[derive(Debug, Clone, PartialEq)]
pub struct Page<T, C> {
    pub items: Vec<T>,
    pub next_cursor: Option<C>,
}

/// One entry of the review audit log.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ReviewRecord {
    /// The review's id; the audit log's cursor and its newest-first order are by this id.
    pub id: i64,
    pub reading_id: i64,
    pub station: String,
    pub quantity: String,
    pub observed_at_ms: i64,
    pub decision: ReviewDecision,
    pub note: Option<String>,
    /// The id of the token that decided.
    pub by: String,
    pub at_ms: i64,
}

/// Which audit entries to list; every `None` field leaves that dimension unfiltered.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct AuditFilter {
    pub reading_id: Option<i64>,
    pub station: Option<String>,
    /// Inclusive lower bound on the review's `at_ms`.
    pub from_ms: Option<i64>,
    /// Exclusive upper bound on the review's `at_ms`.
    pub to_ms: Option<i64>,
}

/// One interval's comparison of a station with its area, for the station health report.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct StationResidual {
    pub bucket_start_ms: i64,
    /// The station's value for the interval (the median of its readings not set aside).
    pub station_value: f64,
    /// The area's consensus median for the interval.
    pub area_median: f64,
    /// Whether the station value went into the consensus (false when it was far from it).
    pub used: bool,
}

/// How many current readings a station sent in a window, and how many of them the latest results
/// set aside.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct ReadingCounts {
    pub readings: u64,
    pub set_aside: u64,
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cursor_round_trips_and_refuses_garbage() {
        let cursor = SetAsideCursor {
            observed_at_ms: -5,
            reading_id: 42,
            result_id: 7,
        };
        assert_eq!(cursor.to_string(), "-5_42_7");
        assert_eq!("-5_42_7".parse::<SetAsideCursor>(), Ok(cursor));
        for garbage in ["", "1_2", "1_2_3_4", "a_b_c", "1__3"] {
            assert_eq!(
                garbage.parse::<SetAsideCursor>(),
                Err(BadCursor),
                "{garbage}"
            );
        }
    }

    #[test]
    fn review_names_round_trip() {
        for state in [
            ReviewState::Pending,
            ReviewState::Upheld,
            ReviewState::Overturned,
        ] {
            assert_eq!(ReviewState::parse(state.as_str()), Some(state));
        }
        for decision in [ReviewDecision::Uphold, ReviewDecision::Overturn] {
            assert_eq!(ReviewDecision::parse(decision.as_str()), Some(decision));
        }
        assert_eq!(ReviewDecision::parse("upheld"), None);
        assert_eq!(ReviewDecision::Overturn.state(), ReviewState::Overturned);
    }
}
