-- The worker's read of one area's stations (0003's index) also needs each reading's id and values.
-- With them carried in the index (INCLUDE keeps them out of the key, so the B-tree's order and
-- its inner pages are as before), PostgreSQL can answer the read by an index-only scan: one short
-- range per station, with no visit to the table for each reading once autovacuum has marked its
-- pages all-visible (readings are never updated, so nearly all of them are).
-- SQLite's 0003 already carries the values: the row id is the reading's id there.
-- Measured with `consensor-bench worker --postgres`: see BENCHMARKS.md.
DROP INDEX readings_by_station;
CREATE INDEX readings_by_station
    ON readings (station_id, quantity_id, observed_at_ms, revision) INCLUDE (id, value, value_as_sent);
