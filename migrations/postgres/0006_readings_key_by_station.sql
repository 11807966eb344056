-- The readings' unique key becomes station-first, and the time-first key goes (as SQLite's 0005).
--
-- Every read of readings goes by station (the batch's current revisions, the worker's read of an
-- area, a station's history and its newest reading); the time-first key `readings_key` (0001) only
-- kept the key unique, at the cost of one more B-tree insert per reading. The station-first index of
-- 0005 becomes that unique key, still carrying the reading's id and values with `INCLUDE` (which
-- are not part of what must be unique), so the worker's read stays an index-only scan.
CREATE UNIQUE INDEX readings_key_by_station
    ON readings (station_id, quantity_id, observed_at_ms, revision) INCLUDE (id, value, value_as_sent);
DROP INDEX readings_by_station;
DROP INDEX readings_key;
ALTER INDEX readings_key_by_station RENAME TO readings_key;
