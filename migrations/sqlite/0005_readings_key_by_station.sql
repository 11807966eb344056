-- The readings' unique key becomes station-first, and the time-first key goes.
--
-- Before, every reading was written to three B-trees: the table, the time-first unique key
-- `readings_key (observed_at_ms, station_id, quantity_id, revision)` (0001) and the station-first
-- index `readings_by_station` (0003), which carried the values too. Every read of readings goes by
-- station: the writer's lookup of a batch's current revisions, the worker's read of an area, a
-- station's history and its newest reading. The time-first key only kept the key unique, and an
-- outage burst (every station resending ten minutes of backlog, slotted in among the stored
-- readings of those minutes) made it costly to keep: dropping it alone raised the burst's
-- throughput by about a third in the load test (BENCHMARKS.md, "Load").
--
-- Now one station-first unique key does both jobs: two B-trees per reading instead of three. SQLite
-- cannot carry values in a unique index without making them part of what must be unique, so the
-- worker's read now visits the table for each reading's values; that read's cost is measured in
-- BENCHMARKS.md too ("Worker").
DROP INDEX readings_by_station;
DROP INDEX readings_key;
CREATE UNIQUE INDEX readings_key ON readings (station_id, quantity_id, observed_at_ms, revision);
