//! The SQLite backend: WAL journal, foreign keys on, numbered migrations
//! applied at open (`PRAGMA user_version` holds the number applied).

use super::{Backend, Ingest, Outcome, StatusCounts, StoreError};
use crate::model::{Message, ObservationType, RejectReason, Rejection};
use chrono::{DateTime, Utc};
use rusqlite::{params, Connection, OpenFlags, OptionalExtension};
use std::path::Path;

/// The migrations, in order. Never edit one that has shipped: add another.
pub const MIGRATIONS: &[(&str, &str)] = &[("0001_init", include_str!("migrations/0001_init.sql"))];

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

impl Backend for Sqlite {
    fn commit(&mut self, batch: &[Ingest]) -> Result<Vec<Outcome>, StoreError> {
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
                    match known {
                        Some(dep) if dep == c.deployment_id => {
                            let key = format!(
                                "{}\u{1f}{}\u{1f}{}\u{1f}{}",
                                c.observation_id,
                                c.scientific_name.as_deref().unwrap_or(""),
                                c.count.map(|v| v.to_string()).unwrap_or_default(),
                                c.observation_type
                                    .map(ObservationType::as_str)
                                    .unwrap_or("")
                            );
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
                        other => {
                            let r = match other {
                                None => Rejection::new(
                                    RejectReason::UnknownObservation,
                                    format!(
                                        "no stored observation has observationID `{}`",
                                        crate::ingest::decode::printable(&c.observation_id)
                                    ),
                                ),
                                Some(dep) => Rejection::new(
                                    RejectReason::DeploymentMismatch,
                                    format!(
                                        "observation `{}` belongs to deployment `{dep}`, not `{}`",
                                        crate::ingest::decode::printable(&c.observation_id),
                                        c.deployment_id
                                    ),
                                ),
                            };
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
                    }
                }
            };
            out.push(outcome);
        }
        if duplicates > 0 {
            bump(&tx, "duplicates_ignored", duplicates)?;
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

    fn close(&mut self) -> Result<(), StoreError> {
        // Fold the WAL back into the main file so a copy of outrider.db alone
        // is a complete backup after a clean stop.
        self.conn
            .query_row("PRAGMA wal_checkpoint(TRUNCATE)", [], |_| Ok(()))?;
        Ok(())
    }
}
