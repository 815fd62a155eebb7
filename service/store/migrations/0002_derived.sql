-- 0002: derived state. Independent events (rebuildable from observations),
-- notice decisions, and the outbox of deliveries. A notice and its
-- deliveries are written in the same transaction as the message that
-- caused them.

CREATE TABLE events (
    deployment_id    TEXT NOT NULL,
    scientific_name  TEXT NOT NULL,
    start            INTEGER NOT NULL,
    end              INTEGER NOT NULL,
    count            INTEGER NOT NULL,
    triggers         INTEGER NOT NULL,
    PRIMARY KEY (deployment_id, scientific_name, start)
) WITHOUT ROWID;
CREATE INDEX events_by_start ON events (start);

CREATE TABLE notices (
    id               TEXT PRIMARY KEY,
    subscriber_id    TEXT NOT NULL,
    watch            TEXT NOT NULL,
    trigger          TEXT NOT NULL,
    deployment_id    TEXT NOT NULL,
    scientific_name  TEXT,
    event_id         TEXT NOT NULL,
    event_time       INTEGER NOT NULL,
    at               INTEGER NOT NULL,
    disposition      TEXT NOT NULL,
    reason           TEXT NOT NULL,
    -- The notice as JSON (the replay line shape), for the API.
    body             TEXT NOT NULL,
    -- The notice itself (serde), for the delivery worker's renderers.
    notice           TEXT NOT NULL
);
CREATE INDEX notices_by_subscriber ON notices (subscriber_id, at);
CREATE INDEX notices_by_at ON notices (at);

CREATE TABLE deliveries (
    id               INTEGER PRIMARY KEY,
    notice_id        TEXT NOT NULL REFERENCES notices (id),
    channel          TEXT NOT NULL,
    state            TEXT NOT NULL,          -- pending | sent | failed
    attempts         INTEGER NOT NULL DEFAULT 0,
    next_attempt_at  INTEGER NOT NULL,
    first_attempt_at INTEGER,
    last_error       TEXT,
    created_at       INTEGER NOT NULL,
    done_at          INTEGER,
    UNIQUE (notice_id, channel)
);
CREATE INDEX deliveries_due ON deliveries (state, next_attempt_at);
