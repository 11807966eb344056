//! The order in which this process's writers take SQLite's one write lock.
//!
//! SQLite lets one transaction write at a time; the others wait in its busy handler, which sleeps
//! and retries (up to 100 ms between tries) and serves no one in particular: under a burst a small
//! batch can lose the race again and again behind large ones (the load test measured a live batch
//! of 100 readings waiting 3.4 s behind backlog batches of 5,000). The gate queues this process's
//! big writers in arrival order, one at a time, and lets every writer take the write lock in
//! arrival order, so a small write waits at most for the one large write in hand and the small ones
//! ahead of it. Both queues are tokio mutexes, which are fair (first come, first served).
//! Other processes (an import, a backup) still meet the busy handler, as before.
//!
//! Batches of readings reach the gate through the SQLite writer thread (`sqlite_write.rs`), which
//! takes a pass for each of its turns and orders large and small batches itself
//! (`commit_group.rs`); the consensus results, reviews and claims take theirs from async tasks.

use std::sync::Arc;

use tokio::sync::{Mutex, OwnedMutexGuard};

/// Writes of more rows than this queue behind each other before taking the write lock.
pub(crate) const LARGE_WRITE_ROWS: usize = 1_000;

#[derive(Debug, Default)]
pub(crate) struct WriteGate {
    /// Held by a large write from before it queues for the write lock until it has committed.
    large: Arc<Mutex<()>>,
    /// Held by every gated write while it writes.
    writer: Arc<Mutex<()>>,
}

/// Held while a gated write runs; dropping it lets the next writer in.
#[derive(Debug)]
pub(crate) struct GatePass {
    _writer: OwnedMutexGuard<()>,
    _large: Option<OwnedMutexGuard<()>>,
}

impl WriteGate {
    /// Waits for this write's turn: a write of more than [`LARGE_WRITE_ROWS`] rows first waits
    /// for the large writes before it.
    pub(crate) async fn enter(&self, rows: usize) -> GatePass {
        let large = if rows > LARGE_WRITE_ROWS {
            Some(Arc::clone(&self.large).lock_owned().await)
        } else {
            None
        };
        GatePass {
            _writer: Arc::clone(&self.writer).lock_owned().await,
            _large: large,
        }
    }
}

impl WriteGate {
    /// [`WriteGate::enter`] for a small write, from a thread outside the async runtime (the SQLite
    /// writer thread): it waits in the same first-come queue.
    pub(crate) fn enter_blocking(&self) -> GatePass {
        GatePass {
            _writer: Arc::clone(&self.writer).blocking_lock_owned(),
            _large: None,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::time::Duration;

    /// A small write that arrives while large writes queue goes in right after the large write in
    /// hand, before the large writes that arrived earlier (the property the gate exists for;
    /// tokio documents its mutex as fair, first in first out).
    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn a_small_write_overtakes_queued_large_writes() {
        let gate = Arc::new(WriteGate::default());
        let order = Arc::new(std::sync::Mutex::new(Vec::new()));
        let first = gate.enter(5_000).await;
        let mut tasks = Vec::new();
        for (name, rows) in [("large-2", 5_000), ("large-3", 5_000), ("small", 100)] {
            let (gate, order) = (Arc::clone(&gate), Arc::clone(&order));
            tasks.push(tokio::spawn(async move {
                let _pass = gate.enter(rows).await;
                order.lock().unwrap().push(name);
                tokio::time::sleep(Duration::from_millis(20)).await;
            }));
            // Let each arrive, and queue, before the next.
            tokio::time::sleep(Duration::from_millis(30)).await;
        }
        drop(first);
        for task in tasks {
            task.await.unwrap();
        }
        assert_eq!(*order.lock().unwrap(), vec!["small", "large-2", "large-3"]);
    }
}
