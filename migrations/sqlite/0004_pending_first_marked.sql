-- When a pending bucket was first marked since it was last computed. Marking it again moves
-- `marked_at_ms` but not this, so the worker can hold back an interval that is still open (its end
-- is after now) until it has waited `worker.open_interval_refresh_seconds` since this first mark: a
-- stream of readings into the current interval is then computed about once per refresh period
-- instead of after every batch. Rows from before this migration count as marked long ago.
ALTER TABLE pending_buckets ADD COLUMN first_marked_at_ms INTEGER NOT NULL DEFAULT 0;
