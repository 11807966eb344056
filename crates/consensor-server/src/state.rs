//! What every handler shares.

use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Arc;

use consensor_store::AnyStore;

use crate::config::Config;

/// The time source, injected so that tests control "now" instead of sleeping.
pub trait Clock: Send + Sync + std::fmt::Debug {
    /// Milliseconds since the Unix epoch.
    fn now_ms(&self) -> i64;
}

/// The system clock.
#[derive(Debug, Default)]
pub struct SystemClock;

impl Clock for SystemClock {
    fn now_ms(&self) -> i64 {
        chrono::Utc::now().timestamp_millis()
    }
}

/// Shared state of the HTTP handlers and the worker.
#[derive(Debug, Clone)]
pub struct AppState {
    pub store: AnyStore,
    pub config: Arc<Config>,
    pub clock: Arc<dyn Clock>,
    /// Readings of this process's ingest requests that are decoded and not yet answered; the
    /// worker gives way while there are many (`worker::Yielding`).
    pub ingest: Arc<IngestLoad>,
}

/// How many readings this process's ingest requests hold between decoding and their answer.
#[derive(Debug, Default)]
pub struct IngestLoad {
    readings: AtomicUsize,
}

impl IngestLoad {
    /// Counts `readings` as in flight until the returned guard is dropped (when the request is
    /// answered, fails, or is cancelled by its client going away).
    pub fn enter(self: &Arc<Self>, readings: usize) -> InFlight {
        self.readings.fetch_add(readings, Ordering::Relaxed);
        InFlight {
            load: Arc::clone(self),
            readings,
        }
    }

    /// Readings in flight now.
    pub fn readings(&self) -> usize {
        self.readings.load(Ordering::Relaxed)
    }
}

/// Readings counted in an [`IngestLoad`] while this guard lives.
#[derive(Debug)]
pub struct InFlight {
    load: Arc<IngestLoad>,
    readings: usize,
}

impl Drop for InFlight {
    fn drop(&mut self) {
        self.load
            .readings
            .fetch_sub(self.readings, Ordering::Relaxed);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn readings_count_while_their_guards_live() {
        let load = Arc::new(IngestLoad::default());
        let first = load.enter(5_000);
        let second = load.enter(100);
        assert_eq!(load.readings(), 5_100);
        drop(first);
        assert_eq!(load.readings(), 100);
        drop(second);
        assert_eq!(load.readings(), 0);
    }
}
