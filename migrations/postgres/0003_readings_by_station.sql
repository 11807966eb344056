-- The worker reads one area's stations over a few hours at a time. With only the time-first key, that
-- read scanned every station's readings in the window (the whole network) and probed each one; with
-- this index it is one short range per station of the area, read in (time, revision) order.
-- Measured with `consensor-bench worker` and `consensor-bench ingest`: see BENCHMARKS.md.
CREATE INDEX readings_by_station ON readings (station_id, quantity_id, observed_at_ms, revision);
