-- 0001: raw input. Raw observations are the source of truth; everything
-- derived can be rebuilt from them. Instants are INTEGER milliseconds since
-- the Unix epoch, UTC.

CREATE TABLE observations (
    observation_id              TEXT PRIMARY KEY,
    deployment_id               TEXT NOT NULL,
    event_start                 INTEGER NOT NULL,
    event_end                   INTEGER,
    observation_type            TEXT NOT NULL,
    scientific_name             TEXT,
    count                       INTEGER NOT NULL DEFAULT 1,
    classification_probability  REAL,
    classification_method       TEXT,
    media_id                    TEXT,
    file_path                   TEXT,
    vernacular_name             TEXT,
    life_stage                  TEXT,
    sex                         TEXT,
    behavior                    TEXT,
    received_at                 INTEGER NOT NULL
);
CREATE INDEX observations_by_deployment ON observations (deployment_id, event_start);

CREATE TABLE heartbeats (
    deployment_id      TEXT NOT NULL,
    timestamp          INTEGER NOT NULL,
    battery_percent    REAL,
    signal_dbm         REAL,
    images_since_last  INTEGER,
    received_at        INTEGER NOT NULL,
    PRIMARY KEY (deployment_id, timestamp)
) WITHOUT ROWID;

CREATE TABLE corrections (
    id                 INTEGER PRIMARY KEY,
    -- Not a foreign key: a correction may arrive before its observation
    -- (MQTT orders messages per topic only); it then waits and applies
    -- when the observation comes.
    observation_id     TEXT NOT NULL,
    deployment_id      TEXT NOT NULL,
    scientific_name    TEXT,
    count              INTEGER,
    observation_type   TEXT,
    received_at        INTEGER NOT NULL,
    -- The correction's content, so that a redelivered message is stored once.
    content_key        TEXT NOT NULL UNIQUE
);

CREATE TABLE rejected (
    id             INTEGER PRIMARY KEY,
    received_at    INTEGER NOT NULL,
    topic          TEXT NOT NULL,
    reason         TEXT NOT NULL,
    detail         TEXT NOT NULL,
    -- Kept as received, cut to the payload limit; payload_bytes is the full size.
    payload        BLOB NOT NULL,
    payload_bytes  INTEGER NOT NULL
);
CREATE INDEX rejected_by_reason ON rejected (reason);

-- Monotonic counters that have no table of their own (duplicates ignored).
CREATE TABLE counters (
    name   TEXT PRIMARY KEY,
    value  INTEGER NOT NULL
) WITHOUT ROWID;
