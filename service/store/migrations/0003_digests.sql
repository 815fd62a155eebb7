-- 0003: daily digests. One row per subscriber and due instant, written in
-- the transaction of the tick that found it due, so a digest is queued
-- once; the row then carries its own delivery state (email only).

CREATE TABLE digests (
    id                INTEGER PRIMARY KEY,
    subscriber_id     TEXT NOT NULL,
    due_at            INTEGER NOT NULL,
    -- The digest (serde), with the notices and failures of its period.
    body              TEXT NOT NULL,
    state             TEXT NOT NULL,          -- pending | sent | failed
    attempts          INTEGER NOT NULL DEFAULT 0,
    next_attempt_at   INTEGER NOT NULL,
    first_attempt_at  INTEGER,
    last_error        TEXT,
    created_at        INTEGER NOT NULL,
    done_at           INTEGER,
    UNIQUE (subscriber_id, due_at)
);
CREATE INDEX digests_due ON digests (state, next_attempt_at);
