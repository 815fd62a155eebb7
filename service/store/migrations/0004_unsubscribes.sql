-- 0004: unsubscribes (one-click, RFC 8058, and the subscriber's own page).
--
-- Numbering: 0003 is kept for the digest table of another change. What
-- counts is the order of the MIGRATIONS list in service/store/sqlite.rs
-- (PRAGMA user_version holds how many of its entries have been applied),
-- not the number in a file name, so the gap is harmless.
--
-- One row per subscriber who asked for no more email. The outbox closes
-- that subscriber's email deliveries instead of sending them (state
-- 'closed', with the reason in last_error). Webhook and MQTT deliveries are
-- machine feeds set up by the operator and are not touched.

CREATE TABLE unsubscribes (
    subscriber_id  TEXT PRIMARY KEY,
    -- When the request was taken (milliseconds since the Unix epoch, UTC).
    at             INTEGER NOT NULL,
    -- How it came: 'one-click' (a mail program's POST, RFC 8058) or 'page'
    -- (the confirmation button on the unsubscribe page).
    via            TEXT NOT NULL
) WITHOUT ROWID;
