//! What every handler shares.

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
}
