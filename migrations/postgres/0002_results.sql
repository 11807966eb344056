-- Consensus results, the readings each result set aside, each station's value, and the operators'
-- review log. Results are append-only: recomputing an interval adds a row with the next revision,
-- and earlier revisions (with their set-aside records and station values) stay readable unchanged.

CREATE TABLE interval_results (
    id                 BIGINT GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
    area_id            BIGINT NOT NULL REFERENCES areas (id),
    quantity_id        BIGINT NOT NULL REFERENCES quantities (id),
    bucket_start_ms    BIGINT NOT NULL,
    interval_ms        BIGINT NOT NULL CHECK (interval_ms > 0),
    revision           BIGINT NOT NULL CHECK (revision >= 1),
    median             DOUBLE PRECISION,
    median_low         DOUBLE PRECISION,
    median_high        DOUBLE PRECISION,
    mean               DOUBLE PRECISION,
    mean_all           DOUBLE PRECISION,
    mad                DOUBLE PRECISION,
    spread             DOUBLE PRECISION,
    ci95_low           DOUBLE PRECISION,
    ci95_high          DOUBLE PRECISION,
    huber              DOUBLE PRECISION,
    stations_used      BIGINT NOT NULL CHECK (stations_used >= 0),
    stations_set_aside BIGINT NOT NULL CHECK (stations_set_aside >= 0),
    status             TEXT   NOT NULL CHECK (status IN ('no_data', 'few_stations', 'ok')),
    computed_at_ms     BIGINT NOT NULL
);

-- The next revision is the previous maximum plus one; this key makes two writers that computed the
-- same revision at once collide, and the loser retries with the next number. The loser waits for
-- the winner's commit before it fails, so the retried row also gets a larger id.
CREATE UNIQUE INDEX interval_results_key
    ON interval_results (area_id, quantity_id, bucket_start_ms, revision);

-- For /v1/status: the time of the most recent computation, read from the index's last entry.
CREATE INDEX interval_results_computed ON interval_results (computed_at_ms);

-- Results and reviews are never changed or removed once written; one trigger function refuses it
-- for both tables.
CREATE FUNCTION consensor_append_only() RETURNS trigger LANGUAGE plpgsql AS $$
BEGIN
    RAISE EXCEPTION '% is append-only', TG_TABLE_NAME;
END
$$;

CREATE TRIGGER interval_results_append_only BEFORE UPDATE OR DELETE ON interval_results
    FOR EACH ROW EXECUTE FUNCTION consensor_append_only();

-- Which result is the latest revision of each interval. It is written in the same transaction as
-- the result, so every read of "the current consensus" is a primary-key range scan plus a join by
-- id instead of a search for the highest revision.
CREATE TABLE interval_latest (
    area_id         BIGINT NOT NULL REFERENCES areas (id),
    quantity_id     BIGINT NOT NULL REFERENCES quantities (id),
    bucket_start_ms BIGINT NOT NULL,
    revision        BIGINT NOT NULL,
    result_id       BIGINT NOT NULL UNIQUE REFERENCES interval_results (id),
    PRIMARY KEY (area_id, quantity_id, bucket_start_ms)
);

-- One record per reading a result set aside. The station and observation time are copied from the
-- reading row (which never changes: a corrected value is a new row with its own id) so that the
-- listing can filter and page on this table's own indexes.
CREATE TABLE set_aside (
    result_id        BIGINT NOT NULL REFERENCES interval_results (id),
    reading_id       BIGINT NOT NULL REFERENCES readings (id),
    station_id       BIGINT NOT NULL REFERENCES stations (id),
    observed_at_ms   BIGINT NOT NULL,
    rule             TEXT   NOT NULL CHECK (rule IN ('missing_value', 'missing_code',
                         'out_of_range', 'flat_line', 'step', 'far_from_consensus')),
    reason           TEXT   NOT NULL,
    score            DOUBLE PRECISION,
    threshold        DOUBLE PRECISION,
    consensus_median DOUBLE PRECISION,
    consensus_spread DOUBLE PRECISION,
    gap_ms           BIGINT,
    window_readings  BIGINT,
    station_value    DOUBLE PRECISION,
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
    result_id  BIGINT  NOT NULL REFERENCES interval_results (id),
    station_id BIGINT  NOT NULL REFERENCES stations (id),
    value      DOUBLE PRECISION NOT NULL,
    used       BOOLEAN NOT NULL,
    score      DOUBLE PRECISION,
    PRIMARY KEY (result_id, station_id)
);

-- The audit log of review decisions. `by_token` is the deciding token's id, kept as text without a
-- foreign key because the start-up admin token (CONSENSOR_ADMIN_TOKEN) has no row in `tokens`.
CREATE TABLE reviews (
    id         BIGINT GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
    reading_id BIGINT NOT NULL REFERENCES readings (id),
    decision   TEXT   NOT NULL CHECK (decision IN ('uphold', 'overturn')),
    note       TEXT,
    by_token   TEXT   NOT NULL,
    at_ms      BIGINT NOT NULL
);

-- A reading's reviews in order: its latest decision is the last entry.
CREATE INDEX reviews_reading ON reviews (reading_id, id);

-- An audit log that could be edited would prove nothing.
CREATE TRIGGER reviews_append_only BEFORE UPDATE OR DELETE ON reviews
    FOR EACH ROW EXECUTE FUNCTION consensor_append_only();
