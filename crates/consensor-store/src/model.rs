//! The plain data types that cross the storage boundary. They hold integers for ids and times
//! (milliseconds since the Unix epoch, UTC) and carry no driver types.

/// An area to create or update, keyed by its public id (such as `north-basin`).
#[derive(Debug, Clone, PartialEq)]
pub struct NewArea {
    pub key: String,
    pub name: String,
    /// The length of the area's consensus intervals; intervals are aligned to the Unix epoch.
    pub interval_ms: i64,
}

/// A stored area.
#[derive(Debug, Clone, PartialEq)]
pub struct Area {
    pub id: i64,
    pub key: String,
    pub name: String,
    pub interval_ms: i64,
}

/// A station to create or update; `area_key` must name an existing area.
#[derive(Debug, Clone, PartialEq)]
pub struct NewStation {
    pub key: String,
    pub area_key: String,
    pub name: String,
    pub lat: Option<f64>,
    pub lon: Option<f64>,
    pub elevation_m: Option<f64>,
}

/// A stored station, with the public id of its area.
#[derive(Debug, Clone, PartialEq)]
pub struct Station {
    pub id: i64,
    pub key: String,
    pub area_id: i64,
    pub area_key: String,
    pub name: String,
    pub lat: Option<f64>,
    pub lon: Option<f64>,
    pub elevation_m: Option<f64>,
}

/// The result of an upsert: the row's id and whether this call created it (HTTP 201) or updated an
/// existing row (HTTP 200).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Upserted {
    pub id: i64,
    pub created: bool,
}

/// What the ingest path needs to know about a station: its row id, its area and the area's interval.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct StationRef {
    pub station_id: i64,
    pub area_id: i64,
    pub interval_ms: i64,
}

/// A token to store. The caller computes the hash; the store never sees a clear token.
#[derive(Debug, Clone, PartialEq)]
pub struct NewToken {
    /// The token's public id (used to revoke it), chosen at random by the caller.
    pub id: String,
    pub hash: Vec<u8>,
    /// One of `admin`, `operator`, `station`, `reader`; the schema refuses anything else.
    pub role: String,
    pub label: Option<String>,
    /// The station keys a `station` token may post readings for.
    pub stations: Vec<String>,
    pub created_at_ms: i64,
}

/// A stored token (never its hash, which callers only ever look up by).
#[derive(Debug, Clone, PartialEq)]
pub struct Token {
    pub id: String,
    pub role: String,
    pub label: Option<String>,
    /// Bound station keys, sorted.
    pub stations: Vec<String>,
    pub created_at_ms: i64,
    pub revoked_at_ms: Option<i64>,
}

/// One reading as the ingest path hands it over: already validated and converted.
#[derive(Debug, Clone, PartialEq)]
pub struct NewReading {
    pub station: String,
    pub quantity: String,
    pub observed_at_ms: i64,
    /// The value in the quantity's canonical unit; `None` when the station reported "no value".
    pub value: Option<f64>,
    /// The value exactly as the station sent it, before unit conversion.
    pub value_as_sent: Option<f64>,
    /// The unit the station sent, `None` when it sent none.
    pub unit_as_sent: Option<String>,
}

/// The identity of a reading: at most one current value exists per key.
#[derive(Debug, Clone, PartialEq, Eq, Hash)]
pub struct ReadingKey {
    pub station: String,
    pub quantity: String,
    pub observed_at_ms: i64,
}

/// A stored reading row: one revision of one reading key.
#[derive(Debug, Clone, PartialEq)]
pub struct StoredReading {
    /// The row id, which identifies this revision (the API's `reading_id`).
    pub id: i64,
    pub station: String,
    pub quantity: String,
    pub observed_at_ms: i64,
    /// 0 for the first value stored for the key, then 1, 2, … for each changed value.
    pub revision: i64,
    pub value: Option<f64>,
    pub value_as_sent: Option<f64>,
    pub unit_as_sent: Option<String>,
    pub received_at_ms: i64,
}

/// What one call of `insert_batch` did.
///
/// * `accepted`: rows newly stored, i.e. readings whose key was new plus readings that changed the
///   current value of an existing key (revisions). Duplicates are not counted here.
/// * `duplicates`: readings identical to the current value of their key (from earlier batches or
///   from earlier in the same batch); nothing was stored for them.
/// * `revised`: how many of the `accepted` readings were revisions of an existing key.
///
/// So `accepted + duplicates` equals the batch length, and the sum of `accepted` over all batches
/// equals `count_readings()`.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct BatchOutcome {
    pub accepted: u64,
    pub duplicates: u64,
    pub revised: u64,
}

/// Tunables for opening a store; every field has a sensible default.
#[derive(Debug, Clone, PartialEq)]
pub struct StoreOptions {
    /// Pool size. SQLite serialises writers anyway, so a few connections suffice there.
    pub max_connections: u32,
    /// How long to wait for a pooled connection before reporting the database unavailable.
    pub acquire_timeout: std::time::Duration,
    /// How long an SQLite connection waits for another writer's lock before giving up.
    pub sqlite_busy_timeout: std::time::Duration,
    /// The worker's history block (`Rules::history_ms`): how far after a stored reading computed
    /// intervals are marked again (`batch::Following`).
    pub history_ms: i64,
}

impl Default for StoreOptions {
    fn default() -> Self {
        StoreOptions {
            max_connections: 8,
            acquire_timeout: std::time::Duration::from_secs(10),
            sqlite_busy_timeout: std::time::Duration::from_secs(5),
            history_ms: consensor_core::checks::Rules::default().history_ms,
        }
    }
}
