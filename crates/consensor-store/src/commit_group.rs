//! Group commit of small SQLite batches.
//!
//! With `synchronous=FULL` every commit waits until the WAL is on disk. A station that posts one
//! reading per request pays one such flush per reading, and the load test measured one process
//! committing about 900 one-reading requests a second while 1,000 stations each posted once a
//! second, so the queue (and every answer's latency) grew without end (BENCHMARKS.md, "Load").
//! Small batches therefore wait here while the write lock is in other hands, and the first of
//! them to get its turn stores all those then waiting in one transaction with one flush. Each
//! batch is classified as if stored alone, one after the other in arrival order (a key sent by two
//! batches of one group is a duplicate or a revision in the second, as it would be across two
//! transactions), gets its own outcome or its own refusal, and is answered only after the commit,
//! so a 200 still means "on disk".

use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Mutex;

use tokio::sync::oneshot;

use crate::{BatchOutcome, NewReading, StoreError};

/// What a stored batch answers.
pub(crate) type BatchAnswer = Result<BatchOutcome, StoreError>;

/// At most this many readings are stored in one group, so that a group holds the write lock about
/// as long as one large batch does (`write_gate.rs`) and a writer queued behind it waits no longer.
const GROUP_ROWS: usize = 5_000;

/// A small batch waiting for its group.
#[derive(Debug)]
pub(crate) struct WaitingBatch {
    pub readings: Vec<NewReading>,
    pub now_ms: i64,
    pub answer: oneshot::Sender<BatchAnswer>,
}

/// The batches waiting, oldest first.
#[derive(Debug, Default)]
pub(crate) struct CommitQueue {
    waiting: Mutex<Vec<WaitingBatch>>,
    groups: AtomicU64,
}

impl CommitQueue {
    pub(crate) fn push(&self, batch: WaitingBatch) {
        self.waiting
            .lock()
            .unwrap_or_else(|poisoned| poisoned.into_inner())
            .push(batch);
    }

    /// Takes the oldest waiting batches, up to [`GROUP_ROWS`] readings (always at least one batch
    /// when any waits); the rest wait for the next group.
    pub(crate) fn take_group(&self) -> Vec<WaitingBatch> {
        let mut waiting = self
            .waiting
            .lock()
            .unwrap_or_else(|poisoned| poisoned.into_inner());
        let mut rows = 0;
        let count = waiting
            .iter()
            .take_while(|batch| {
                rows += batch.readings.len();
                rows <= GROUP_ROWS
            })
            .count()
            .max(1)
            .min(waiting.len());
        if count > 0 {
            self.groups.fetch_add(1, Ordering::Relaxed);
        }
        waiting.drain(..count).collect()
    }

    /// How many batches are waiting.
    #[cfg(test)]
    pub(crate) fn waiting(&self) -> usize {
        self.waiting
            .lock()
            .unwrap_or_else(|poisoned| poisoned.into_inner())
            .len()
    }

    /// How many groups have been taken since the store was opened.
    #[cfg(test)]
    pub(crate) fn groups_taken(&self) -> u64 {
        self.groups.load(Ordering::Relaxed)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn waiting(readings: usize) -> (WaitingBatch, oneshot::Receiver<BatchAnswer>) {
        let (answer, answered) = oneshot::channel();
        let reading = NewReading {
            station: "ST-1".to_owned(),
            quantity: "air_temperature".to_owned(),
            observed_at_ms: 0,
            value: Some(1.0),
            value_as_sent: Some(1.0),
            unit_as_sent: None,
        };
        let batch = WaitingBatch {
            readings: vec![reading; readings],
            now_ms: 0,
            answer,
        };
        (batch, answered)
    }

    #[test]
    fn a_group_takes_the_oldest_batches_up_to_its_row_limit() {
        let queue = CommitQueue::default();
        let mut receivers = Vec::new();
        for readings in [1_000, 1_000, 2_000, 1_000, 1] {
            let (batch, answered) = waiting(readings);
            receivers.push(answered);
            queue.push(batch);
        }
        // 1,000 + 1,000 + 2,000 + 1,000 = 5,000 readings fit in one group; the last batch waits.
        let sizes = |group: Vec<WaitingBatch>| -> Vec<usize> {
            group.iter().map(|batch| batch.readings.len()).collect()
        };
        assert_eq!(sizes(queue.take_group()), vec![1_000, 1_000, 2_000, 1_000]);
        assert_eq!(sizes(queue.take_group()), vec![1]);
        assert!(queue.take_group().is_empty());
        assert_eq!(queue.groups_taken(), 2);
    }

    #[test]
    fn a_batch_larger_than_a_group_is_still_taken_alone() {
        let queue = CommitQueue::default();
        let (batch, _answered) = waiting(GROUP_ROWS + 1);
        queue.push(batch);
        assert_eq!(queue.take_group().len(), 1);
    }
}
