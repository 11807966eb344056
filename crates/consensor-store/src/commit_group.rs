//! The queue of batches waiting for SQLite's writer thread, and which of them go together.
//!
//! With `synchronous=FULL` every commit waits until the WAL is on disk. A station that posts one
//! reading per request pays one such flush per reading, and the load test measured one process
//! committing about 900 one-reading requests a second while 1,000 stations each posted once a
//! second, so the queue (and every answer's latency) grew without end (BENCHMARKS.md, "Load").
//! Every batch therefore waits here, and the writer thread (`sqlite_write.rs`) stores the batches
//! of one turn in one transaction with one flush. A turn holds batches of one kind, in arrival
//! order: either small ones (at most [`LARGE_WRITE_ROWS`] readings each, up to [`SMALL_ROWS`] in
//! all) or large ones (up to [`TURN_ROWS`] in all; the oldest always goes). After a turn of large
//! batches the small ones waiting go first, so a live batch waits for the turn in hand and its own,
//! and a stream of small batches cannot hold the large ones back for more than one turn either. Each
//! batch is classified as if stored alone, one after the other in the turn's order (a key sent by two
//! batches of one turn is a duplicate or a revision in the second, as it would be across two
//! transactions), gets its own outcome or its own refusal, and is answered only after the commit, so
//! a 200 still means "on disk".

use std::collections::VecDeque;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Condvar, Mutex};

use tokio::sync::oneshot;

use crate::write_gate::LARGE_WRITE_ROWS;
use crate::{BatchOutcome, NewReading, StoreError};

/// What a stored batch answers.
pub(crate) type BatchAnswer = Result<BatchOutcome, StoreError>;

/// Small batches of at most this many readings in all go in one turn (at least one batch).
const SMALL_ROWS: usize = 5_000;

/// Large batches of at most this many readings in all go in one turn (at least one batch): one
/// backlog batch of 5,000 at a time. Turns of 10,000 (two backlog batches to a flush) stored a burst
/// no faster and kept live batches waiting no less (BENCHMARKS.md, "Load").
pub(crate) const TURN_ROWS: usize = 5_000;

/// A batch waiting for its turn.
#[derive(Debug)]
pub(crate) struct WaitingBatch {
    pub readings: Vec<NewReading>,
    pub now_ms: i64,
    pub answer: oneshot::Sender<BatchAnswer>,
}

/// The batches waiting, oldest first; the writer thread sleeps on `arrived` while there are none.
#[derive(Debug, Default)]
pub(crate) struct CommitQueue {
    state: Mutex<Waiting>,
    arrived: Condvar,
    turns: AtomicU64,
}

#[derive(Debug, Default)]
struct Waiting {
    batches: VecDeque<WaitingBatch>,
    /// The store is closing: nothing more is queued, and the writer stops once the queue is empty.
    closed: bool,
}

impl CommitQueue {
    fn lock(&self) -> std::sync::MutexGuard<'_, Waiting> {
        self.state
            .lock()
            .unwrap_or_else(|poisoned| poisoned.into_inner())
    }

    /// Queues `batch` for the writer; gives it back when the store is closing.
    pub(crate) fn push(&self, batch: WaitingBatch) -> Result<(), WaitingBatch> {
        let mut waiting = self.lock();
        if waiting.closed {
            return Err(batch);
        }
        waiting.batches.push_back(batch);
        self.arrived.notify_one();
        Ok(())
    }

    /// Blocks until a batch waits (true) or the store is closing with none left (false).
    pub(crate) fn wait_for_batches(&self) -> bool {
        let mut waiting = self.lock();
        loop {
            if !waiting.batches.is_empty() {
                return true;
            }
            if waiting.closed {
                return false;
            }
            waiting = self
                .arrived
                .wait(waiting)
                .unwrap_or_else(|poisoned| poisoned.into_inner());
        }
    }

    /// Stops taking batches; the writer stores those already queued and then ends.
    pub(crate) fn close(&self) {
        self.lock().closed = true;
        self.arrived.notify_all();
    }

    /// Takes one turn's batches (see the module's text); the others keep their places. `after_large`
    /// says whether the turn before took large batches.
    pub(crate) fn take_turn(&self, after_large: bool) -> Vec<WaitingBatch> {
        let mut waiting = self.lock();
        let is_small = |batch: &WaitingBatch| batch.readings.len() <= LARGE_WRITE_ROWS;
        let small_waits = waiting.batches.iter().any(is_small);
        let large_waits = waiting.batches.iter().any(|batch| !is_small(batch));
        let (small, limit) = if small_waits && (after_large || !large_waits) {
            (true, SMALL_ROWS)
        } else {
            (false, TURN_ROWS)
        };
        let mut rows = 0;
        let mut turn = Vec::new();
        let mut kept = VecDeque::with_capacity(waiting.batches.len());
        let mut full = false;
        for batch in waiting.batches.drain(..) {
            // Batches of the turn's kind in arrival order while the turn has room (the first
            // always goes); one that does not fit ends the turn, so none is overtaken for ever.
            if is_small(&batch) == small && !full {
                let size = batch.readings.len();
                if rows == 0 || rows + size <= limit {
                    rows += size;
                    turn.push(batch);
                    continue;
                }
                full = true;
            }
            kept.push_back(batch);
        }
        waiting.batches = kept;
        if !turn.is_empty() {
            self.turns.fetch_add(1, Ordering::Relaxed);
        }
        turn
    }

    /// How many batches are waiting.
    #[cfg(test)]
    pub(crate) fn waiting(&self) -> usize {
        self.lock().batches.len()
    }

    /// How many turns have been taken since the store was opened.
    #[cfg(test)]
    pub(crate) fn turns_taken(&self) -> u64 {
        self.turns.load(Ordering::Relaxed)
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

    fn sizes(turn: &[WaitingBatch]) -> Vec<usize> {
        turn.iter().map(|batch| batch.readings.len()).collect()
    }

    #[test]
    fn turns_alternate_between_small_and_large_batches_each_in_arrival_order() {
        let queue = CommitQueue::default();
        let mut receivers = Vec::new();
        for readings in [5_000, 100, 3_000, 5_000, 1, 1_500, 1_000] {
            let (batch, answered) = waiting(readings);
            receivers.push(answered);
            queue.push(batch).expect("open");
        }
        // After a small turn (or at the start), large batches: the first always goes, the next
        // only while the turn stays within TURN_ROWS (5,000), so the 3,000 waits.
        assert_eq!(sizes(&queue.take_turn(false)), vec![5_000]);
        // After a large turn, the small batches waiting (100, 1 and 1,000 readings) go together.
        assert_eq!(sizes(&queue.take_turn(true)), vec![100, 1, 1_000]);
        // With no small batch waiting, large ones go even right after a large turn, in arrival
        // order: the 3,000 and the next 5,000 would make 8,000, so the 3,000 goes alone; the
        // 1,500 would fit beside it but does not overtake the 5,000 before it.
        assert_eq!(sizes(&queue.take_turn(true)), vec![3_000]);
        assert_eq!(sizes(&queue.take_turn(true)), vec![5_000]);
        assert_eq!(sizes(&queue.take_turn(true)), vec![1_500]);
        assert!(queue.take_turn(true).is_empty());
        // Small batches beyond SMALL_ROWS readings wait for the next small turn.
        for _ in 0..6 {
            let (batch, answered) = waiting(1_000);
            receivers.push(answered);
            queue.push(batch).expect("open");
        }
        assert_eq!(queue.take_turn(true).len(), SMALL_ROWS / 1_000);
        assert_eq!(queue.take_turn(true).len(), 6 - SMALL_ROWS / 1_000);
        assert_eq!(queue.waiting(), 0);
    }

    #[test]
    fn a_batch_larger_than_a_turn_is_still_taken_alone() {
        let queue = CommitQueue::default();
        for _ in 0..2 {
            let (batch, _answered) = waiting(TURN_ROWS + 1);
            queue.push(batch).expect("open");
        }
        assert_eq!(queue.take_turn(false).len(), 1);
        assert_eq!(queue.take_turn(false).len(), 1);
        assert_eq!(queue.turns_taken(), 2);
    }

    #[test]
    fn a_closed_queue_refuses_batches_and_ends_once_empty() {
        let queue = CommitQueue::default();
        let (batch, _answered) = waiting(1);
        queue.push(batch).expect("open");
        queue.close();
        let (batch, _answered) = waiting(1);
        assert!(queue.push(batch).is_err());
        // The batch queued before closing is still stored.
        assert!(queue.wait_for_batches());
        assert_eq!(queue.take_turn(false).len(), 1);
        assert!(!queue.wait_for_batches());
    }
}
