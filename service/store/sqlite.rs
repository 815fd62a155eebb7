//! The SQLite backend: WAL journal, foreign keys on, numbered migrations
//! applied at open (`PRAGMA user_version` holds the number applied).

use super::{Backend, Ingest, Outcome, StatusCounts, StoreError};
use crate::engine::Output;
use crate::model::{Message, ObservationType, RejectReason, Rejection};
use chrono::{DateTime, Utc};
use rusqlite::{params, Connection, OpenFlags, OptionalExtension};
use std::collections::HashMap;
use std::path::Path;

/// The migrations, in order. Never edit one that has shipped: add another.
pub const MIGRATIONS: &[(&str, &str)] = &[
    ("0001_init", include_str!("migrations/0001_init.sql")),
    ("0002_derived", include_str!("migrations/0002_derived.sql")),
    ("0003_digests", include_str!("migrations/0003_digests.sql")),
    (
        "0004_unsubscribes",
        include_str!("migrations/0004_unsubscribes.sql"),
    ),
];

/// How hard SQLite works to keep a commit on disk.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Durability {
    /// Each commit is on disk before it returns (survives power loss).
    Full,
    /// A commit survives a crash of the process, not necessarily of the
    /// machine (WAL with synchronous=NORMAL).
    Normal,
}

pub struct Sqlite {
    conn: Connection,
}

pub fn ms(t: DateTime<Utc>) -> i64 {
    t.timestamp_millis()
}

pub fn from_ms(v: i64) -> DateTime<Utc> {
    DateTime::from_timestamp_millis(v).unwrap_or_default()
}

impl Sqlite {
    /// Opens (creating if needed) the database in `state_dir` and migrates it.
    pub fn open(state_dir: &Path, durability: Durability) -> Result<Self, StoreError> {
        std::fs::create_dir_all(state_dir).map_err(|source| StoreError::StateDir {
            path: state_dir.to_path_buf(),
            source,
        })?;
        let conn = Connection::open(super::db_path(state_dir))?;
        conn.busy_timeout(std::time::Duration::from_secs(5))?;
        conn.pragma_update(None, "journal_mode", "WAL")?;
        conn.pragma_update(
            None,
            "synchronous",
            match durability {
                Durability::Full => "FULL",
                Durability::Normal => "NORMAL",
            },
        )?;
        conn.pragma_update(None, "foreign_keys", "ON")?;
        // The writer's page cache: 64 MiB instead of SQLite's 2 MiB, so the
        // notice and delivery indexes stay in memory under a heavy load of
        // decisions (a negative value is KiB, per the SQLite docs).
        conn.pragma_update(None, "cache_size", -65_536)?;
        // (The WAL checkpoint interval stays SQLite's 1,000 pages, ~4 MB: a
        // longer one made fewer checkpoints but needs that much more free
        // disk, and a nearly full disk then stops ingest sooner.)
        let mut me = Self { conn };
        me.migrate()?;
        Ok(me)
    }

    /// Opens an existing database for reading only (`status --state-dir`).
    pub fn open_read_only(state_dir: &Path) -> Result<Self, StoreError> {
        let conn = Connection::open_with_flags(
            super::db_path(state_dir),
            OpenFlags::SQLITE_OPEN_READ_ONLY | OpenFlags::SQLITE_OPEN_NO_MUTEX,
        )?;
        conn.busy_timeout(std::time::Duration::from_secs(5))?;
        let version: i64 = conn.pragma_query_value(None, "user_version", |r| r.get(0))?;
        if version > MIGRATIONS.len() as i64 {
            return Err(StoreError::TooNew {
                found: version,
                known: MIGRATIONS.len() as i64,
            });
        }
        Ok(Self { conn })
    }

    fn migrate(&mut self) -> Result<(), StoreError> {
        let version: i64 = self
            .conn
            .pragma_query_value(None, "user_version", |r| r.get(0))?;
        let known = MIGRATIONS.len() as i64;
        if version > known {
            return Err(StoreError::TooNew {
                found: version,
                known,
            });
        }
        for (i, (name, sql)) in MIGRATIONS.iter().enumerate().skip(version as usize) {
            let tx = self.conn.transaction()?;
            tx.execute_batch(sql)?;
            tx.pragma_update(None, "user_version", (i + 1) as i64)?;
            tx.commit()?;
            tracing::info!(migration = name, "Applied database migration");
        }
        Ok(())
    }

    pub fn connection(&self) -> &Connection {
        &self.conn
    }
}

/// A correction's content, so that a redelivered one is stored once.
fn correction_key(c: &crate::model::Correction) -> String {
    format!(
        "{}\u{1f}{}\u{1f}{}\u{1f}{}",
        c.observation_id,
        c.scientific_name.as_deref().unwrap_or(""),
        c.count.map(|v| v.to_string()).unwrap_or_default(),
        c.observation_type
            .map(ObservationType::as_str)
            .unwrap_or("")
    )
}

fn bump(tx: &rusqlite::Transaction<'_>, name: &str, by: i64) -> rusqlite::Result<()> {
    tx.prepare_cached("INSERT INTO counters (name, value) VALUES (?1, ?2) ON CONFLICT (name) DO UPDATE SET value = value + ?2")?
        .execute(params![name, by])?;
    Ok(())
}

fn store_rejection(
    tx: &rusqlite::Transaction<'_>,
    topic: &str,
    payload: &[u8],
    payload_bytes: usize,
    r: &Rejection,
    at: DateTime<Utc>,
) -> rusqlite::Result<()> {
    tx.prepare_cached("INSERT INTO rejected (received_at, topic, reason, detail, payload, payload_bytes) VALUES (?1, ?2, ?3, ?4, ?5, ?6)")?
        .execute(params![ms(at), topic, r.reason.as_str(), r.detail, payload, payload_bytes as i64])?;
    Ok(())
}

/// Writes one engine output. Notices are keyed by their stable id, so a
/// redelivered message cannot make a second notice or delivery.
fn store_derived(tx: &rusqlite::Transaction<'_>, d: &Output) -> rusqlite::Result<()> {
    match d {
        Output::EventUpsert(e) => {
            tx.prepare_cached("INSERT OR REPLACE INTO events (deployment_id, scientific_name, start, end, count, triggers) VALUES (?1, ?2, ?3, ?4, ?5, ?6)")?
                .execute(params![e.deployment_id, e.scientific_name, ms(e.start), ms(e.end), e.count, e.triggers])?;
        }
        Output::EventDelete(id) => {
            tx.prepare_cached("DELETE FROM events WHERE deployment_id = ?1 AND scientific_name = ?2 AND start = ?3")?
                .execute(params![id.deployment_id, id.scientific_name, ms(id.start)])?;
        }
        Output::Notice {
            notice,
            reason,
            channels,
        } => {
            let id = notice.id();
            let mut body = notice.replay_line();
            body["reason"] = serde_json::Value::String(reason.clone());
            let n = tx
                .prepare_cached("INSERT INTO notices (id, subscriber_id, watch, trigger, deployment_id, scientific_name, event_id, event_time, at, disposition, reason, body, notice) VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13) ON CONFLICT (id) DO NOTHING")?
                .execute(params![
                    id.as_str(),
                    notice.subscriber_id,
                    notice.watch,
                    notice.trigger.as_str(),
                    notice.deployment_id,
                    notice.scientific_name,
                    notice.event_id,
                    ms(notice.event_time),
                    ms(notice.at),
                    notice.disposition.as_str(),
                    reason,
                    body.to_string(),
                    serde_json::to_string(notice.as_ref()).unwrap_or_default(),
                ])?;
            if n == 1 && notice.disposition == crate::notify::Disposition::Sent {
                for c in channels {
                    tx.prepare_cached("INSERT INTO deliveries (notice_id, channel, state, next_attempt_at, created_at) VALUES (?1, ?2, 'pending', ?3, ?3) ON CONFLICT DO NOTHING")?
                        .execute(params![id.as_str(), c.as_str(), ms(notice.at)])?;
                }
            }
        }
        Output::Digest(d) => {
            let mut d = d.as_ref().clone();
            fill_digest(tx, &mut d)?;
            tx.prepare_cached("INSERT INTO digests (subscriber_id, due_at, body, state, next_attempt_at, created_at) VALUES (?1, ?2, ?3, 'pending', ?2, ?2) ON CONFLICT DO NOTHING")?
                .execute(params![d.subscriber_id, ms(d.due_at), serde_json::to_string(&d).unwrap_or_default()])?;
        }
    }
    Ok(())
}

/// Most notice lines and failures one digest lists.
const DIGEST_LIST_LIMIT: i64 = 200;

/// Adds to a digest what the store knows of its period: the subscriber's
/// notice decisions and, for a coordinator, the deliveries that failed for
/// good (notices and digests of every subscriber).
pub fn fill_digest(c: &Connection, d: &mut crate::digest::Digest) -> rusqlite::Result<()> {
    use crate::digest::{FailedDelivery, NoticeLine};
    let (from, to) = (ms(d.from), ms(d.to));
    let mut stmt = c.prepare_cached(
        "SELECT at, watch, trigger, disposition, deployment_id, scientific_name, reason FROM notices
         WHERE subscriber_id = ?1 AND at >= ?2 AND at < ?3 ORDER BY at, id LIMIT ?4",
    )?;
    d.notices = stmt
        .query_map(params![d.subscriber_id, from, to, DIGEST_LIST_LIMIT], |r| {
            Ok(NoticeLine {
                at: from_ms(r.get(0)?),
                watch: r.get(1)?,
                trigger: r.get(2)?,
                disposition: r.get(3)?,
                deployment_id: r.get(4)?,
                scientific_name: r.get(5)?,
                reason: r.get(6)?,
            })
        })?
        .collect::<rusqlite::Result<_>>()?;
    if d.coordinator {
        let mut stmt = c.prepare_cached(
            "SELECT n.subscriber_id, d.channel, d.notice_id, d.done_at, coalesce(d.last_error, '') FROM deliveries d JOIN notices n ON n.id = d.notice_id
               WHERE d.state = 'failed' AND d.done_at >= ?1 AND d.done_at < ?2
             UNION ALL
             SELECT subscriber_id, 'email (digest)', 'digest', done_at, coalesce(last_error, '') FROM digests
               WHERE state = 'failed' AND done_at >= ?1 AND done_at < ?2
             ORDER BY 4 LIMIT ?3",
        )?;
        d.failures = stmt
            .query_map(params![from, to, DIGEST_LIST_LIMIT], |r| {
                Ok(FailedDelivery {
                    subscriber_id: r.get(0)?,
                    channel: r.get(1)?,
                    notice_id: r.get(2)?,
                    at: from_ms(r.get(3)?),
                    error: r.get(4)?,
                })
            })?
            .collect::<rusqlite::Result<_>>()?;
    }
    Ok(())
}

/// Observations and heartbeats since `since` merged in time order, then
/// the corrections of those observations.
pub fn load_history(c: &Connection, since: DateTime<Utc>) -> Result<Vec<Message>, StoreError> {
    use crate::model::{ClassificationMethod, Correction, Heartbeat, Observation};
    let mut obs: Vec<Message> = Vec::new();
    let mut stmt = c.prepare_cached(
        "SELECT observation_id, deployment_id, event_start, event_end, observation_type, scientific_name, count, classification_probability, classification_method, media_id, file_path, vernacular_name, life_stage, sex, behavior
         FROM observations WHERE event_start >= ?1 ORDER BY event_start, observation_id",
    )?;
    let rows = stmt.query_map(params![ms(since)], |r| {
        Ok(Observation {
            observation_id: r.get(0)?,
            deployment_id: r.get(1)?,
            event_start: from_ms(r.get(2)?),
            event_end: r.get::<_, Option<i64>>(3)?.map(from_ms),
            observation_type: ObservationType::parse(&r.get::<_, String>(4)?)
                .unwrap_or(ObservationType::Unknown),
            scientific_name: r.get(5)?,
            count: r.get::<_, i64>(6)?.clamp(1, i64::from(u32::MAX)) as u32,
            classification_probability: r.get(7)?,
            classification_method: r
                .get::<_, Option<String>>(8)?
                .and_then(|m| match m.as_str() {
                    "machine" => Some(ClassificationMethod::Machine),
                    "human" => Some(ClassificationMethod::Human),
                    _ => None,
                }),
            media_id: r.get(9)?,
            file_path: r.get(10)?,
            vernacular_name: r.get(11)?,
            life_stage: r.get(12)?,
            sex: r.get(13)?,
            behavior: r.get(14)?,
        })
    })?;
    for o in rows {
        obs.push(Message::Observation(o?));
    }
    let mut hbs: Vec<Message> = Vec::new();
    let mut stmt = c.prepare_cached("SELECT deployment_id, timestamp, battery_percent, signal_dbm, images_since_last FROM heartbeats WHERE timestamp >= ?1 ORDER BY timestamp")?;
    let rows = stmt.query_map(params![ms(since)], |r| {
        Ok(Heartbeat {
            deployment_id: r.get(0)?,
            timestamp: from_ms(r.get(1)?),
            battery_percent: r.get(2)?,
            signal_dbm: r.get(3)?,
            images_since_last: r.get::<_, Option<i64>>(4)?.map(|v| v.max(0) as u64),
        })
    })?;
    for h in rows {
        hbs.push(Message::Heartbeat(h?));
    }
    let time = |m: &Message| match m {
        Message::Observation(o) => o.event_start,
        Message::Heartbeat(h) => h.timestamp,
        Message::Correction(_) => DateTime::<Utc>::MAX_UTC,
    };
    let mut out = Vec::with_capacity(obs.len() + hbs.len());
    let (mut a, mut b) = (obs.into_iter().peekable(), hbs.into_iter().peekable());
    loop {
        let take_a = match (a.peek(), b.peek()) {
            (Some(x), Some(y)) => time(x) <= time(y),
            (Some(_), None) => true,
            (None, Some(_)) => false,
            (None, None) => break,
        };
        if let Some(m) = if take_a { a.next() } else { b.next() } {
            out.push(m);
        }
    }
    let mut stmt = c.prepare_cached(
        "SELECT c.observation_id, c.deployment_id, c.scientific_name, c.count, c.observation_type FROM corrections c
         LEFT JOIN observations o ON o.observation_id = c.observation_id
         WHERE o.event_start >= ?1 OR (o.observation_id IS NULL AND c.received_at >= ?1) ORDER BY c.id",
    )?;
    let rows = stmt.query_map(params![ms(since)], |r| {
        Ok(Correction {
            observation_id: r.get(0)?,
            deployment_id: r.get(1)?,
            scientific_name: r.get(2)?,
            count: r
                .get::<_, Option<i64>>(3)?
                .map(|v| v.clamp(1, i64::from(u32::MAX)) as u32),
            observation_type: r
                .get::<_, Option<String>>(4)?
                .and_then(|t| ObservationType::parse(&t)),
        })
    })?;
    for c in rows {
        out.push(Message::Correction(c?));
    }
    Ok(out)
}

impl Backend for Sqlite {
    fn commit(&mut self, batch: &[Ingest], derived: &[Output]) -> Result<Vec<Outcome>, StoreError> {
        let tx = self.conn.transaction()?;
        let mut out = Vec::with_capacity(batch.len());
        let mut duplicates = 0;
        for item in batch {
            let outcome = match item {
                Ingest::Rejected {
                    topic,
                    payload,
                    payload_bytes,
                    rejection,
                    received_at,
                } => {
                    store_rejection(&tx, topic, payload, *payload_bytes, rejection, *received_at)?;
                    Outcome::RejectionStored
                }
                Ingest::Message {
                    message: Message::Observation(o),
                    received_at,
                } => {
                    let n = tx
                        .prepare_cached(
                            "INSERT INTO observations (observation_id, deployment_id, event_start, event_end, observation_type, scientific_name, count, classification_probability, classification_method, media_id, file_path, vernacular_name, life_stage, sex, behavior, received_at)
                             VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14, ?15, ?16) ON CONFLICT (observation_id) DO NOTHING",
                        )?
                        .execute(params![
                            o.observation_id,
                            o.deployment_id,
                            ms(o.event_start),
                            o.event_end.map(ms),
                            o.observation_type.as_str(),
                            o.scientific_name,
                            o.count,
                            o.classification_probability,
                            o.classification_method.map(|m| match m {
                                crate::model::ClassificationMethod::Machine => "machine",
                                crate::model::ClassificationMethod::Human => "human",
                            }),
                            o.media_id,
                            o.file_path,
                            o.vernacular_name,
                            o.life_stage,
                            o.sex,
                            o.behavior,
                            ms(*received_at),
                        ])?;
                    if n == 1 {
                        Outcome::Stored
                    } else {
                        duplicates += 1;
                        Outcome::Duplicate
                    }
                }
                Ingest::Message {
                    message: Message::Heartbeat(h),
                    received_at,
                } => {
                    let n = tx
                        .prepare_cached("INSERT INTO heartbeats (deployment_id, timestamp, battery_percent, signal_dbm, images_since_last, received_at) VALUES (?1, ?2, ?3, ?4, ?5, ?6) ON CONFLICT DO NOTHING")?
                        .execute(params![h.deployment_id, ms(h.timestamp), h.battery_percent, h.signal_dbm, h.images_since_last.map(|v| v.min(i64::MAX as u64) as i64), ms(*received_at)])?;
                    if n == 1 {
                        Outcome::Stored
                    } else {
                        bump(&tx, "heartbeat_duplicates", 1)?;
                        Outcome::Duplicate
                    }
                }
                Ingest::Message {
                    message: Message::Correction(c),
                    received_at,
                } => {
                    let known: Option<String> = tx
                        .prepare_cached(
                            "SELECT deployment_id FROM observations WHERE observation_id = ?1",
                        )?
                        .query_row(params![c.observation_id], |r| r.get(0))
                        .optional()?;
                    // A correction naming another deployment than its
                    // observation's is refused; one of an observation not
                    // seen yet is kept and applies when the observation
                    // arrives.
                    match known {
                        Some(dep) if dep != c.deployment_id => {
                            let r = Rejection::new(
                                RejectReason::DeploymentMismatch,
                                format!(
                                    "observation `{}` belongs to deployment `{dep}`, not `{}`",
                                    crate::ingest::decode::printable(&c.observation_id),
                                    c.deployment_id
                                ),
                            );
                            let payload = serde_json::to_vec(c).unwrap_or_default();
                            let topic = format!("(correction)/{}", c.deployment_id);
                            store_rejection(
                                &tx,
                                &topic,
                                &payload,
                                payload.len(),
                                &r,
                                *received_at,
                            )?;
                            Outcome::Rejected(r)
                        }
                        _ => {
                            let key = correction_key(c);
                            let n = tx
                                .prepare_cached("INSERT INTO corrections (observation_id, deployment_id, scientific_name, count, observation_type, received_at, content_key) VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7) ON CONFLICT (content_key) DO NOTHING")?
                                .execute(params![c.observation_id, c.deployment_id, c.scientific_name, c.count, c.observation_type.map(ObservationType::as_str), ms(*received_at), key])?;
                            if n == 1 {
                                Outcome::Stored
                            } else {
                                bump(&tx, "correction_duplicates", 1)?;
                                Outcome::Duplicate
                            }
                        }
                    }
                }
            };
            out.push(outcome);
        }
        if duplicates > 0 {
            bump(&tx, "duplicates_ignored", duplicates)?;
        }
        for d in derived {
            store_derived(&tx, d)?;
        }
        tx.commit()?;
        Ok(out)
    }

    fn status(&mut self) -> Result<StatusCounts, StoreError> {
        let c = &self.conn;
        let count = |sql: &str| -> rusqlite::Result<u64> {
            c.query_row(sql, [], |r| r.get::<_, i64>(0))
                .map(|v| v.max(0) as u64)
        };
        let counter = |name: &str| -> rusqlite::Result<u64> {
            c.query_row("SELECT value FROM counters WHERE name = ?1", [name], |r| {
                r.get::<_, i64>(0)
            })
            .optional()
            .map(|v| v.unwrap_or(0).max(0) as u64)
        };
        let mut s = StatusCounts {
            observations_stored: count("SELECT count(*) FROM observations")?,
            duplicates_ignored: counter("duplicates_ignored")?,
            heartbeats_stored: count("SELECT count(*) FROM heartbeats")?,
            corrections_stored: count("SELECT count(*) FROM corrections")?,
            ..Default::default()
        };
        s.events = count("SELECT count(*) FROM events")?;
        // Under way ('sending') is still pending until its outcome is known.
        s.outbox_pending =
            count("SELECT count(*) FROM deliveries WHERE state IN ('pending', 'sending')")?;
        let mut stmt =
            c.prepare("SELECT disposition, count(*) FROM notices GROUP BY disposition")?;
        for row in stmt.query_map([], |r| Ok((r.get::<_, String>(0)?, r.get::<_, i64>(1)?)))? {
            let (d, n) = row?;
            s.notices.insert(d, n.max(0) as u64);
        }
        let mut stmt = c.prepare("SELECT state, count(*) FROM deliveries GROUP BY state")?;
        for row in stmt.query_map([], |r| Ok((r.get::<_, String>(0)?, r.get::<_, i64>(1)?)))? {
            let (d, n) = row?;
            s.deliveries.insert(d, n.max(0) as u64);
        }
        let mut stmt = c.prepare("SELECT state, count(*) FROM digests GROUP BY state")?;
        for row in stmt.query_map([], |r| Ok((r.get::<_, String>(0)?, r.get::<_, i64>(1)?)))? {
            let (d, n) = row?;
            s.digests.insert(d, n.max(0) as u64);
        }
        let mut stmt =
            c.prepare("SELECT reason, count(*) FROM rejected GROUP BY reason ORDER BY reason")?;
        for row in stmt.query_map([], |r| Ok((r.get::<_, String>(0)?, r.get::<_, i64>(1)?)))? {
            let (reason, n) = row?;
            s.rejected.insert(reason, n.max(0) as u64);
        }
        let mut stmt = c.prepare(
            "SELECT deployment_id, max(t) FROM (
                SELECT deployment_id, max(timestamp) AS t FROM heartbeats GROUP BY deployment_id
                UNION ALL
                SELECT deployment_id, max(event_start) AS t FROM observations GROUP BY deployment_id
             ) GROUP BY deployment_id",
        )?;
        for row in stmt.query_map([], |r| Ok((r.get::<_, String>(0)?, r.get::<_, i64>(1)?)))? {
            let (dep, t) = row?;
            s.last_seen.insert(dep, from_ms(t));
        }
        Ok(s)
    }

    fn history(&mut self, since: DateTime<Utc>) -> Result<Vec<Message>, StoreError> {
        load_history(&self.conn, since)
    }

    fn decisions(
        &mut self,
        since: DateTime<Utc>,
    ) -> Result<Vec<crate::notify::Notice>, StoreError> {
        let mut stmt = self
            .conn
            .prepare_cached("SELECT notice FROM notices WHERE at >= ?1 ORDER BY at, rowid")?;
        let rows = stmt.query_map(params![ms(since)], |r| r.get::<_, String>(0))?;
        let mut out = Vec::new();
        for row in rows {
            // Written by this program; a row that does not read back is
            // damaged and is left out rather than stopping the start.
            match serde_json::from_str(&row?) {
                Ok(n) => out.push(n),
                Err(error) => tracing::warn!(%error, "Skipping an unreadable stored notice"),
            }
        }
        Ok(out)
    }

    fn due_deliveries(
        &mut self,
        now: DateTime<Utc>,
        limit: usize,
    ) -> Result<Vec<DueDelivery>, StoreError> {
        Sqlite::due_deliveries(self, now, limit)
    }

    fn begin_delivery(&mut self, id: i64) -> Result<(), StoreError> {
        self.conn.execute(
            "UPDATE deliveries SET state = 'sending' WHERE id = ?1 AND state = 'pending'",
            params![id],
        )?;
        Ok(())
    }

    fn begin_digest(&mut self, id: i64) -> Result<(), StoreError> {
        self.conn.execute(
            "UPDATE digests SET state = 'sending' WHERE id = ?1 AND state = 'pending'",
            params![id],
        )?;
        Ok(())
    }

    fn reclaim_interrupted(&mut self) -> Result<Vec<(String, String)>, StoreError> {
        let tx = self.conn.transaction()?;
        let found = {
            let mut stmt = tx.prepare(
                "SELECT notice_id, channel FROM deliveries WHERE state = 'sending'
                 UNION ALL SELECT 'digest of ' || subscriber_id, 'email' FROM digests WHERE state = 'sending'",
            )?;
            let rows = stmt.query_map([], |r| Ok((r.get(0)?, r.get(1)?)))?;
            rows.collect::<Result<Vec<(String, String)>, _>>()?
        };
        tx.execute(
            "UPDATE deliveries SET state = 'pending' WHERE state = 'sending'",
            [],
        )?;
        tx.execute(
            "UPDATE digests SET state = 'pending' WHERE state = 'sending'",
            [],
        )?;
        tx.commit()?;
        Ok(found)
    }

    fn finish_delivery(&mut self, id: i64, update: &DeliveryUpdate) -> Result<(), StoreError> {
        Sqlite::finish_delivery(self, id, update)
    }

    fn due_digests(
        &mut self,
        now: DateTime<Utc>,
        limit: usize,
    ) -> Result<Vec<DueDigest>, StoreError> {
        Sqlite::due_digests(self, now, limit)
    }

    fn finish_digest(&mut self, id: i64, update: &DeliveryUpdate) -> Result<(), StoreError> {
        Sqlite::finish_digest(self, id, update)
    }

    fn last_digests(&mut self) -> Result<HashMap<String, DateTime<Utc>>, StoreError> {
        Sqlite::last_digests(self)
    }

    fn unsubscribe(
        &mut self,
        subscriber_id: &str,
        at: DateTime<Utc>,
        via: &str,
    ) -> Result<Unsubscribed, StoreError> {
        Sqlite::unsubscribe(self, subscriber_id, at, via)
    }

    fn close(&mut self) -> Result<(), StoreError> {
        // Fold the WAL back into the main file so a copy of outrider.db alone
        // is a complete backup after a clean stop.
        self.conn
            .query_row("PRAGMA wal_checkpoint(TRUNCATE)", [], |_| Ok(()))?;
        Ok(())
    }
}

impl Sqlite {
    /// Recomputes the independent events from the raw observations (with
    /// their corrections applied in arrival order) and replaces the events
    /// table in one transaction. Returns (observations read, events written).
    pub fn rebuild_events(
        &mut self,
        interval: chrono::Duration,
    ) -> Result<(usize, usize), StoreError> {
        let history = load_history(&self.conn, DateTime::<Utc>::MIN_UTC)?;
        let read = history
            .iter()
            .filter(|m| matches!(m, Message::Observation(_)))
            .count();
        let ledger = crate::engine::ledger_from_history(&history, interval);
        let tx = self.conn.transaction()?;
        tx.execute("DELETE FROM events", [])?;
        let mut written = 0;
        for e in ledger.events() {
            store_derived(&tx, &Output::EventUpsert(e))?;
            written += 1;
        }
        tx.commit()?;
        Ok((read, written))
    }
}

/// A delivery that is due.
#[derive(Debug, Clone)]
pub struct DueDelivery {
    pub id: i64,
    pub channel: String,
    pub attempts: u32,
    pub first_attempt_at: Option<DateTime<Utc>>,
    pub notice: crate::notify::Notice,
    /// When the notice's subscriber asked for no more email, if they did.
    pub unsubscribed_at: Option<DateTime<Utc>>,
}

/// What [`Sqlite::unsubscribe`] did.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Unsubscribed {
    /// When the subscriber's unsubscribe was first recorded (an earlier
    /// request stands; a repeated one changes nothing).
    pub since: DateTime<Utc>,
    /// True when this call recorded it; false when it was already there.
    pub new: bool,
    /// Pending email deliveries closed by this call.
    pub closed: u64,
}

/// The `last_error` text of an email delivery closed by an unsubscribe.
pub fn unsubscribed_reason(since: DateTime<Utc>) -> String {
    format!(
        "not sent: the subscriber unsubscribed from email at {}",
        since.to_rfc3339_opts(chrono::SecondsFormat::Secs, true)
    )
}

/// A digest that is due to be sent.
#[derive(Debug, Clone)]
pub struct DueDigest {
    pub id: i64,
    pub attempts: u32,
    pub first_attempt_at: Option<DateTime<Utc>>,
    pub digest: crate::digest::Digest,
    /// When the subscriber unsubscribed from email, if they did: the digest
    /// is then closed, not sent.
    pub unsubscribed_at: Option<DateTime<Utc>>,
}

/// What became of one attempt.
#[derive(Debug, Clone, PartialEq)]
pub enum DeliveryUpdate {
    Sent {
        at: DateTime<Utc>,
    },
    Retry {
        at: DateTime<Utc>,
        next: DateTime<Utc>,
        error: String,
    },
    Failed {
        at: DateTime<Utc>,
        error: String,
    },
    /// Not to be sent at all (the subscriber unsubscribed): state `closed`,
    /// the reason kept in `last_error`. Not an attempt.
    Closed {
        at: DateTime<Utc>,
        reason: String,
    },
}

impl Sqlite {
    /// Pending deliveries due at `now`, oldest first.
    pub fn due_deliveries(
        &mut self,
        now: DateTime<Utc>,
        limit: usize,
    ) -> Result<Vec<DueDelivery>, StoreError> {
        let mut stmt = self.conn.prepare_cached(
            "SELECT d.id, d.channel, d.attempts, d.first_attempt_at, n.notice, u.at FROM deliveries d JOIN notices n ON n.id = d.notice_id
             LEFT JOIN unsubscribes u ON u.subscriber_id = n.subscriber_id
             WHERE d.state = 'pending' AND d.next_attempt_at <= ?1 ORDER BY d.next_attempt_at, d.id LIMIT ?2",
        )?;
        let rows = stmt.query_map(params![ms(now), limit as i64], |r| {
            Ok((
                r.get::<_, i64>(0)?,
                r.get::<_, String>(1)?,
                r.get::<_, i64>(2)?,
                r.get::<_, Option<i64>>(3)?,
                r.get::<_, String>(4)?,
                r.get::<_, Option<i64>>(5)?,
            ))
        })?;
        let mut out = Vec::new();
        for row in rows {
            let (id, channel, attempts, first, notice, unsubscribed) = row?;
            match serde_json::from_str(&notice) {
                Ok(notice) => out.push(DueDelivery {
                    id,
                    channel,
                    attempts: attempts.max(0) as u32,
                    first_attempt_at: first.map(from_ms),
                    notice,
                    unsubscribed_at: unsubscribed.map(from_ms),
                }),
                Err(e) => {
                    // Written by this program, so this means a damaged row:
                    // fail it rather than retry it for ever.
                    self.conn.execute(
                        "UPDATE deliveries SET state = 'failed', last_error = ?2 WHERE id = ?1",
                        params![id, format!("unreadable notice: {e}")],
                    )?;
                }
            }
        }
        Ok(out)
    }

    /// Pending digests due at `now`, oldest first.
    pub fn due_digests(
        &mut self,
        now: DateTime<Utc>,
        limit: usize,
    ) -> Result<Vec<DueDigest>, StoreError> {
        let mut stmt = self.conn.prepare_cached(
            "SELECT g.id, g.attempts, g.first_attempt_at, g.body, u.at FROM digests g
             LEFT JOIN unsubscribes u ON u.subscriber_id = g.subscriber_id
             WHERE g.state = 'pending' AND g.next_attempt_at <= ?1 ORDER BY g.next_attempt_at, g.id LIMIT ?2",
        )?;
        let rows = stmt
            .query_map(params![ms(now), limit as i64], |r| {
                Ok((
                    r.get::<_, i64>(0)?,
                    r.get::<_, i64>(1)?,
                    r.get::<_, Option<i64>>(2)?,
                    r.get::<_, String>(3)?,
                    r.get::<_, Option<i64>>(4)?,
                ))
            })?
            .collect::<rusqlite::Result<Vec<_>>>()?;
        drop(stmt);
        let mut out = Vec::new();
        for (id, attempts, first, body, unsubscribed) in rows {
            match serde_json::from_str(&body) {
                Ok(digest) => out.push(DueDigest {
                    id,
                    attempts: attempts.max(0) as u32,
                    first_attempt_at: first.map(from_ms),
                    digest,
                    unsubscribed_at: unsubscribed.map(from_ms),
                }),
                Err(e) => {
                    self.conn.execute(
                        "UPDATE digests SET state = 'failed', last_error = ?2, done_at = ?3 WHERE id = ?1",
                        params![id, format!("unreadable digest: {e}"), ms(now)],
                    )?;
                }
            }
        }
        Ok(out)
    }

    /// Records the outcome of a digest's attempt.
    pub fn finish_digest(&mut self, id: i64, update: &DeliveryUpdate) -> Result<(), StoreError> {
        finish(&self.conn, "digests", id, update)
    }

    /// The due instant of the last digest recorded per subscriber.
    pub fn last_digests(&mut self) -> Result<HashMap<String, DateTime<Utc>>, StoreError> {
        let mut stmt = self.conn.prepare_cached(
            "SELECT subscriber_id, max(due_at) FROM digests GROUP BY subscriber_id",
        )?;
        let rows = stmt.query_map([], |r| Ok((r.get::<_, String>(0)?, from_ms(r.get(1)?))))?;
        Ok(rows.collect::<rusqlite::Result<_>>()?)
    }

    /// Records the outcome of an attempt.
    pub fn finish_delivery(&mut self, id: i64, update: &DeliveryUpdate) -> Result<(), StoreError> {
        finish(&self.conn, "deliveries", id, update)
    }

    /// Records that `subscriber_id` wants no more email and, in the same
    /// transaction, closes their pending email deliveries (state `closed`,
    /// reason in `last_error`). Repeating it changes nothing: the first
    /// request's time stands.
    pub fn unsubscribe(
        &mut self,
        subscriber_id: &str,
        at: DateTime<Utc>,
        via: &str,
    ) -> Result<Unsubscribed, StoreError> {
        let tx = self.conn.transaction()?;
        let new = tx.execute(
            "INSERT INTO unsubscribes (subscriber_id, at, via) VALUES (?1, ?2, ?3) ON CONFLICT (subscriber_id) DO NOTHING",
            params![subscriber_id, ms(at), via],
        )? == 1;
        let since = from_ms(tx.query_row(
            "SELECT at FROM unsubscribes WHERE subscriber_id = ?1",
            params![subscriber_id],
            |r| r.get::<_, i64>(0),
        )?);
        let closed = tx.execute(
            "UPDATE deliveries SET state = 'closed', done_at = ?2, last_error = ?3
             WHERE state = 'pending' AND channel = 'email'
               AND notice_id IN (SELECT id FROM notices WHERE subscriber_id = ?1)",
            params![subscriber_id, ms(at), unsubscribed_reason(since)],
        )? as u64;
        tx.commit()?;
        Ok(Unsubscribed { since, new, closed })
    }
}

/// Records an attempt's outcome in `table` (deliveries or digests: the
/// same state columns).
fn finish(c: &Connection, table: &str, id: i64, update: &DeliveryUpdate) -> Result<(), StoreError> {
    match update {
        DeliveryUpdate::Sent { at } => c.execute(
            &format!("UPDATE {table} SET state = 'sent', attempts = attempts + 1, first_attempt_at = coalesce(first_attempt_at, ?2), done_at = ?2, last_error = NULL WHERE id = ?1"),
            params![id, ms(*at)],
        )?,
        DeliveryUpdate::Retry { at, next, error } => c.execute(
            &format!("UPDATE {table} SET state = 'pending', attempts = attempts + 1, first_attempt_at = coalesce(first_attempt_at, ?2), next_attempt_at = ?3, last_error = ?4 WHERE id = ?1"),
            params![id, ms(*at), ms(*next), error],
        )?,
        DeliveryUpdate::Failed { at, error } => c.execute(
            &format!("UPDATE {table} SET state = 'failed', attempts = attempts + 1, first_attempt_at = coalesce(first_attempt_at, ?2), done_at = ?2, last_error = ?3 WHERE id = ?1"),
            params![id, ms(*at), error],
        )?,
        DeliveryUpdate::Closed { at, reason } => c.execute(
            &format!("UPDATE {table} SET state = 'closed', done_at = ?2, last_error = ?3 WHERE id = ?1"),
            params![id, ms(*at), reason],
        )?,
    };
    Ok(())
}

#[cfg(test)]
#[allow(clippy::unwrap_used)]
mod tests {
    use super::*;
    use crate::config::Channel;
    use crate::notify::notice::tests::sample;

    fn notice_output(event: &str, subscriber: &str) -> Output {
        let mut n = sample();
        n.event_id = event.into();
        n.subscriber_id = subscriber.into();
        Output::Notice {
            notice: std::sync::Arc::new(n),
            reason: "first of its kind".into(),
            channels: vec![Channel::Email, Channel::Webhook],
        }
    }

    fn states(db: &Sqlite) -> Vec<(String, String, String)> {
        let mut stmt = db
            .connection()
            .prepare("SELECT n.subscriber_id, d.channel, d.state FROM deliveries d JOIN notices n ON n.id = d.notice_id ORDER BY n.subscriber_id, n.event_id, d.channel")
            .unwrap();
        stmt.query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))
            .unwrap()
            .map(Result::unwrap)
            .collect()
    }

    #[test]
    fn an_unsubscribe_closes_that_subscribers_pending_email_and_nothing_else() {
        let dir = tempfile::tempdir().unwrap();
        let mut db = Sqlite::open(dir.path(), Durability::Normal).unwrap();
        db.commit(
            &[],
            &[
                notice_output("e1", "stonecroft"),
                notice_output("e2", "bellbird"),
            ],
        )
        .unwrap();
        let at = crate::notify::notice::tests::utc(2025, 7, 15, 1, 0);
        let u = db.unsubscribe("stonecroft", at, "one-click").unwrap();
        assert_eq!(
            u,
            Unsubscribed {
                since: at,
                new: true,
                closed: 1
            }
        );
        assert_eq!(
            states(&db),
            vec![
                ("bellbird".into(), "email".into(), "pending".into()),
                ("bellbird".into(), "webhook".into(), "pending".into()),
                ("stonecroft".into(), "email".into(), "closed".into()),
                ("stonecroft".into(), "webhook".into(), "pending".into()),
            ]
        );
        let reason: String = db
            .connection()
            .query_row(
                "SELECT last_error FROM deliveries WHERE state = 'closed'",
                [],
                |r| r.get(0),
            )
            .unwrap();
        assert_eq!(
            reason,
            "not sent: the subscriber unsubscribed from email at 2025-07-15T01:00:00Z"
        );
        // A second request changes nothing; the first time stands.
        let later = at + chrono::Duration::hours(2);
        let again = db.unsubscribe("stonecroft", later, "page").unwrap();
        assert_eq!((again.since, again.new, again.closed), (at, false, 0));
        // A notice decided after the unsubscribe still gets its rows (the
        // pipeline does not know); the outbox sees who unsubscribed.
        db.commit(&[], &[notice_output("e3", "stonecroft")])
            .unwrap();
        let due = db
            .due_deliveries(later + chrono::Duration::days(400), 10)
            .unwrap();
        let of = |sub: &str, ch: &str| {
            due.iter()
                .find(|d| *d.notice.subscriber_id == *sub && d.channel == ch)
                .map(|d| d.unsubscribed_at)
        };
        assert_eq!(of("stonecroft", "email"), Some(Some(at)));
        assert_eq!(of("bellbird", "email"), Some(None));
        // The closed row is not due again.
        assert_eq!(due.len(), 5, "3 webhooks + bellbird's and e3's email");
    }

    #[test]
    fn status_counts_closed_deliveries_by_their_state() {
        let dir = tempfile::tempdir().unwrap();
        let mut db = Sqlite::open(dir.path(), Durability::Normal).unwrap();
        db.commit(&[], &[notice_output("e1", "stonecroft")])
            .unwrap();
        db.unsubscribe("stonecroft", sample().at, "one-click")
            .unwrap();
        let s = db.status().unwrap();
        assert_eq!(s.deliveries.get("closed"), Some(&1));
        assert_eq!(s.outbox_pending, 1, "the webhook is still pending");
    }

    #[test]
    fn migrations_apply_in_list_order_and_a_read_only_open_sees_the_table() {
        let dir = tempfile::tempdir().unwrap();
        drop(Sqlite::open(dir.path(), Durability::Normal).unwrap());
        let ro = Sqlite::open_read_only(dir.path()).unwrap();
        let v: i64 = ro
            .connection()
            .pragma_query_value(None, "user_version", |r| r.get(0))
            .unwrap();
        assert_eq!(v, MIGRATIONS.len() as i64);
        let n: i64 = ro
            .connection()
            .query_row("SELECT count(*) FROM unsubscribes", [], |r| r.get(0))
            .unwrap();
        assert_eq!(n, 0);
    }
}
