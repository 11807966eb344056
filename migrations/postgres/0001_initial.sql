-- Consensor's initial schema for PostgreSQL. Times are integer milliseconds since the Unix epoch
-- (UTC); ids are integers. Readings are append-only: a new value for an existing key is a new row
-- with the next revision, nothing is updated in place and nothing is deleted.

CREATE TABLE areas (
    id          BIGINT GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
    key         TEXT   NOT NULL UNIQUE,
    name        TEXT   NOT NULL,
    interval_ms BIGINT NOT NULL CHECK (interval_ms > 0)
);

CREATE TABLE stations (
    id          BIGINT GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
    key         TEXT   NOT NULL UNIQUE,
    area_id     BIGINT NOT NULL REFERENCES areas (id),
    name        TEXT   NOT NULL,
    lat         DOUBLE PRECISION,
    lon         DOUBLE PRECISION,
    elevation_m DOUBLE PRECISION
);

CREATE INDEX stations_area ON stations (area_id);

-- Quantity keys are mapped to small integers on first use, so that the readings' key is all integers.
CREATE TABLE quantities (
    id  BIGINT GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
    key TEXT NOT NULL UNIQUE
);

-- Only the hash of a token is stored; the clear token is shown once to its creator and never kept.
CREATE TABLE tokens (
    id            TEXT   PRIMARY KEY,
    hash          BYTEA  NOT NULL UNIQUE,
    role          TEXT   NOT NULL CHECK (role IN ('admin', 'operator', 'station', 'reader')),
    label         TEXT,
    created_at_ms BIGINT NOT NULL,
    revoked_at_ms BIGINT
);

-- Bindings are by station key without a foreign key, so that a token can be issued for a station
-- before the station itself is described.
CREATE TABLE token_stations (
    token_id    TEXT NOT NULL REFERENCES tokens (id),
    station_key TEXT NOT NULL,
    PRIMARY KEY (token_id, station_key)
);

CREATE TABLE readings (
    id             BIGINT GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
    observed_at_ms BIGINT NOT NULL,
    station_id     BIGINT NOT NULL REFERENCES stations (id),
    quantity_id    BIGINT NOT NULL REFERENCES quantities (id),
    revision       BIGINT NOT NULL CHECK (revision >= 0),
    value          DOUBLE PRECISION,
    value_as_sent  DOUBLE PRECISION,
    unit_as_sent   TEXT,
    received_at_ms BIGINT NOT NULL
);

-- The key starts with the observation time because live readings arrive time-major (every station
-- at minute t, then every station at t + 1): new entries then land at the right-hand end of the
-- B-tree instead of being scattered over one region per station, which keeps inserts fast.
CREATE UNIQUE INDEX readings_key ON readings (observed_at_ms, station_id, quantity_id, revision);

-- One row per (area, quantity, interval start) whose consensus must be (re)computed. The consensus
-- worker claims rows (claimed_by, claimed_at_ms; FOR UPDATE SKIP LOCKED lets several replicas share
-- the work) and deletes a row once it has computed it, unless mark_count shows that new readings
-- marked it again in the meantime.
CREATE TABLE pending_buckets (
    area_id         BIGINT NOT NULL REFERENCES areas (id),
    quantity_id     BIGINT NOT NULL REFERENCES quantities (id),
    bucket_start_ms BIGINT NOT NULL,
    marked_at_ms    BIGINT NOT NULL,
    mark_count      BIGINT NOT NULL DEFAULT 1,
    claimed_by      TEXT,
    claimed_at_ms   BIGINT,
    PRIMARY KEY (area_id, quantity_id, bucket_start_ms)
);

CREATE INDEX pending_buckets_marked ON pending_buckets (marked_at_ms);
