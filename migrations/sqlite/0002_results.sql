-- Consensus results, the readings each result set aside, each station's value, and the operators'
-- review log. Results are append-only: recomputing an interval adds a row with the next revision,
-- and earlier revisions (with their set-aside records and station values) stay readable unchanged.

CREATE TABLE interval_results (
    id                 INTEGER PRIMARY KEY,
    area_id            INTEGER NOT NULL REFERENCES areas (id),
    quantity_id        INTEGER NOT NULL REFERENCES quantities (id),
    bucket_start_ms    INTEGER NOT NULL,
    interval_ms        INTEGER NOT NULL CHECK (interval_ms > 0),
    revision           INTEGER NOT NULL CHECK (revision >= 1),
    median             REAL,
    median_low         REAL,
    median_high        REAL,
    mean               REAL,
    mean_all           REAL,
    mad                REAL,
    spread             REAL,
    ci95_low           REAL,
    ci95_high          REAL,
    huber              REAL,
    stations_used      INTEGER NOT NULL CHECK (stations_used >= 0),
    stations_set_aside INTEGER NOT NULL CHECK (stations_set_aside >= 0),
    status             TEXT    NOT NULL CHECK (status IN ('no_data', 'few_stations', 'ok')),
    computed_at_ms     INTEGER NOT NULL
);

-- The next revision is the previous maximum plus one; this key makes two writers that computed the
-- same revision at once collide, and the loser retries with the next number.
CREATE UNIQUE INDEX interval_results_key
    ON interval_results (area_id, quantity_id, bucket_start_ms, revision);

-- For /v1/status: the time of the most recent computation, read from the index's last entry.
CREATE INDEX interval_results_computed ON interval_results (computed_at_ms);

-- Results are never changed or removed once written; a recomputation is a new revision. The ids
-- therefore only ever grow, which the set-aside listing relies on to find a reading's latest record.
CREATE TRIGGER interval_results_no_update BEFORE UPDATE ON interval_results
BEGIN
    SELECT RAISE(ABORT, 'interval results are append-only');
END;

CREATE TRIGGER interval_results_no_delete BEFORE DELETE ON interval_results
BEGIN
    SELECT RAISE(ABORT, 'interval results are append-only');
END;

-- Which result is the latest revision of each interval. It is written in the same transaction as
-- the result, so every read of "the current consensus" is a primary-key range scan plus a join by
-- id instead of a search for the highest revision.
CREATE TABLE interval_latest (
    area_id         INTEGER NOT NULL REFERENCES areas (id),
    quantity_id     INTEGER NOT NULL REFERENCES quantities (id),
    bucket_start_ms INTEGER NOT NULL,
    revision        INTEGER NOT NULL,
    result_id       INTEGER NOT NULL UNIQUE REFERENCES interval_results (id),
    PRIMARY KEY (area_id, quantity_id, bucket_start_ms)
);

-- One record per reading a result set aside. The station and observation time are copied from the
-- reading row (which never changes: a corrected value is a new row with its own id) so that the
-- listing can filter and page on this table's own indexes.
CREATE TABLE set_aside (
    result_id        INTEGER NOT NULL REFERENCES interval_results (id),
    reading_id       INTEGER NOT NULL REFERENCES readings (id),
    station_id       INTEGER NOT NULL REFERENCES stations (id),
    observed_at_ms   INTEGER NOT NULL,
    rule             TEXT    NOT NULL CHECK (rule IN ('missing_value', 'missing_code',
                         'out_of_range', 'flat_line', 'step', 'far_from_consensus')),
    reason           TEXT    NOT NULL,
    score            REAL,
    threshold        REAL,
    consensus_median REAL,
    consensus_spread REAL,
    gap_ms           INTEGER,
    window_readings  INTEGER,
    station_value    REAL,
    PRIMARY KEY (result_id, reading_id)
);

-- The listing's order and keyset cursor.
CREATE INDEX set_aside_time ON set_aside (observed_at_ms, reading_id, result_id);
-- A reading's records, newest last: "was it ever set aside" and "its latest record".
CREATE INDEX set_aside_reading ON set_aside (reading_id, result_id);
-- One station's records over time: the station filter and the health report's counts.
CREATE INDEX set_aside_station ON set_aside (station_id, observed_at_ms);

-- Each station's value for the interval as it reached the cross-station test.
CREATE TABLE interval_station_values (
    result_id  INTEGER NOT NULL REFERENCES interval_results (id),
    station_id INTEGER NOT NULL REFERENCES stations (id),
    value      REAL    NOT NULL,
    used       INTEGER NOT NULL CHECK (used IN (0, 1)),
    score      REAL,
    PRIMARY KEY (result_id, station_id)
);

-- The audit log of review decisions. `by_token` is the deciding token's id, kept as text without a
-- foreign key because the start-up admin token (CONSENSOR_ADMIN_TOKEN) has no row in `tokens`.
CREATE TABLE reviews (
    id         INTEGER PRIMARY KEY,
    reading_id INTEGER NOT NULL REFERENCES readings (id),
    decision   TEXT    NOT NULL CHECK (decision IN ('uphold', 'overturn')),
    note       TEXT,
    by_token   TEXT    NOT NULL,
    at_ms      INTEGER NOT NULL
);

-- A reading's reviews in order: its latest decision is the last entry.
CREATE INDEX reviews_reading ON reviews (reading_id, id);

-- An audit log that could be edited would prove nothing.
CREATE TRIGGER reviews_no_update BEFORE UPDATE ON reviews
BEGIN
    SELECT RAISE(ABORT, 'the review log is append-only');
END;

CREATE TRIGGER reviews_no_delete BEFORE DELETE ON reviews
BEGIN
    SELECT RAISE(ABORT, 'the review log is append-only');
END;
