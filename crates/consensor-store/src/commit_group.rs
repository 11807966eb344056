//! Group commit of small SQLite batches.
//!
//! With `synchronous=FULL` every commit waits until the WAL is on disk. A station that posts one
//! reading per request pays one such flush per reading, and the load test measured one process
//! committing about 900 one-reading requests a second while 1,000 stations each posted once a
//! second, so the queue (and every answer's latency) grew without end (BENCHMARKS.md, "Load").
//! Small batches therefore wait here while the write lock is in other hands: the first to arrive
//! starts one turn at the lock, those arriving before it is taken join it, and the turn stores them
//! all in one transaction with one flush (at most one turn is on its way at a time, so waiting
//! batches cost no turns of their own at the lock). Each
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

/// The batches waiting, oldest first, and whether a turn at the write lock is on its way for them.
#[derive(Debug, Default)]
pub(crate) struct CommitQueue {
    state: Mutex<Waiting>,
    groups: AtomicU64,
}

#[derive(Debug, Default)]
struct Waiting {
    batches: Vec<WaitingBatch>,
    /// A turn has been started that has not taken its group yet: batches pushed meanwhile go with
    /// it, and need no turn of their own.
    turn_started: bool,
}

impl CommitQueue {
    fn lock(&self) -> std::sync::MutexGuard<'_, Waiting> {
        self.state
            .lock()
            .unwrap_or_else(|poisoned| poisoned.into_inner())
    }

    /// Queues `batch`; true when the caller must start a turn for it (none is on its way).
    pub(crate) fn push(&self, batch: WaitingBatch) -> bool {
        let mut waiting = self.lock();
        waiting.batches.push(batch);
        !std::mem::replace(&mut waiting.turn_started, true)
    }

    /// Takes the oldest waiting batches, up to [`GROUP_ROWS`] readings (always at least one batch
    /// when any waits); the rest wait for the next group. The flag is true when batches are left,
    /// and the caller must then start the turn that takes them.
    pub(crate) fn take_group(&self) -> (Vec<WaitingBatch>, bool) {
        let mut waiting = self.lock();
        let mut rows = 0;
        let count = waiting
            .batches
            .iter()
            .take_while(|batch| {
                rows += batch.readings.len();
                rows <= GROUP_ROWS
            })
            .count()
            .max(1)
            .min(waiting.batches.len());
        if count > 0 {
            self.groups.fetch_add(1, Ordering::Relaxed);
        }
        let group = waiting.batches.drain(..count).collect();
        waiting.turn_started = !waiting.batches.is_empty();
        (group, waiting.turn_started)
    }

    /// How many batches are waiting.
    #[cfg(test)]
    pub(crate) fn waiting(&self) -> usize {
        self.lock().batches.len()
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
        let mut turns = Vec::new();
        for readings in [1_000, 1_000, 2_000, 1_000, 1] {
            let (batch, answered) = waiting(readings);
            receivers.push(answered);
            turns.push(queue.push(batch));
        }
        // Only the first batch starts a turn; the others go with it.
        assert_eq!(turns, vec![true, false, false, false, false]);
        // 1,000 + 1,000 + 2,000 + 1,000 = 5,000 readings fit in one group; the last batch waits,
        // so the turn that took the group must start another.
        let sizes = |(group, _): (Vec<WaitingBatch>, bool)| -> Vec<usize> {
            group.iter().map(|batch| batch.readings.len()).collect()
        };
        let first = queue.take_group();
        assert!(first.1, "a batch is left: another turn is needed");
        assert_eq!(sizes(first), vec![1_000, 1_000, 2_000, 1_000]);
        let second = queue.take_group();
        assert!(!second.1, "nothing is left");
        assert_eq!(sizes(second), vec![1]);
        assert!(queue.take_group().0.is_empty());
        assert_eq!(queue.groups_taken(), 2);
        // With no turn on its way, the next batch starts one again.
        let (batch, _answered) = waiting(1);
        assert!(queue.push(batch));
    }

    #[test]
    fn a_batch_larger_than_a_group_is_still_taken_alone() {
        let queue = CommitQueue::default();
        let (batch, _answered) = waiting(GROUP_ROWS + 1);
        queue.push(batch);
        assert_eq!(queue.take_group().0.len(), 1);
    }
}
