//! Reads for the web pages, on a read-only SQLite connection of their own
//! (never the store thread's: a slow page must not hold up a commit and so
//! the acknowledgements to the broker). SQLite in WAL mode lets readers run
//! beside the one writer and see the last committed state. Called on
//! `spawn_blocking` threads by `web::serve`.
//!
//! Each function runs a few plain queries and returns rows; the pages are
//! worked out from them by the pure modules (`assess`, `view`).

use crate::notify::Notice;
use crate::store::sqlite::{from_ms, ms, Sqlite};
use crate::store::{Backend, StatusCounts, StoreError};
use crate::web::assess::EventRow;
use crate::web::view::{DeliveryView, Names, NoticeFilter, NoticeRow, RejectedRow};
use chrono::{DateTime, Utc};
use rusqlite::{params, params_from_iter, Connection};
use std::collections::BTreeMap;
use std::path::Path;

/// One read-only connection for one request.
pub struct Reader {
    db: Sqlite,
}

impl Reader {
    pub fn open(state_dir: &Path) -> Result<Self, StoreError> {
        Ok(Reader {
            db: Sqlite::open_read_only(state_dir)?,
        })
    }

    fn c(&self) -> &Connection {
        self.db.connection()
    }

    /// The counts `outrider status` prints, plus the last sign of life of
    /// each deployment.
    pub fn status(&mut self) -> Result<StatusCounts, StoreError> {
        self.db.status()
    }

    /// Signs of life (heartbeats and observations of any type) and
    /// independent events in `[from, to)`.
    #[allow(clippy::type_complexity)]
    pub fn activity(
        &self,
        from: DateTime<Utc>,
        to: DateTime<Utc>,
    ) -> Result<(Vec<(String, DateTime<Utc>)>, Vec<EventRow>), StoreError> {
        let c = self.c();
        let mut signs = Vec::new();
        let mut stmt = c.prepare_cached(
            "SELECT deployment_id, timestamp FROM heartbeats WHERE timestamp >= ?1 AND timestamp < ?2
             UNION ALL
             SELECT deployment_id, event_start FROM observations WHERE event_start >= ?1 AND event_start < ?2",
        )?;
        for row in stmt.query_map(params![ms(from), ms(to)], |r| {
            Ok((r.get::<_, String>(0)?, from_ms(r.get(1)?)))
        })? {
            signs.push(row?);
        }
        let mut events = Vec::new();
        let mut stmt = c.prepare_cached(
            "SELECT deployment_id, scientific_name, start FROM events WHERE start >= ?1 AND start < ?2",
        )?;
        for row in stmt.query_map(params![ms(from), ms(to)], |r| {
            Ok(EventRow {
                deployment_id: r.get(0)?,
                scientific_name: r.get(1)?,
                start: from_ms(r.get(2)?),
            })
        })? {
            events.push(row?);
        }
        Ok((signs, events))
    }

    /// The latest heartbeat of each deployment: (time, battery %, signal dBm).
    #[allow(clippy::type_complexity)]
    pub fn last_heartbeats(
        &self,
    ) -> Result<BTreeMap<String, (DateTime<Utc>, Option<f64>, Option<f64>)>, StoreError> {
        let mut out = BTreeMap::new();
        let mut stmt = self.c().prepare_cached(
            "SELECT h.deployment_id, h.timestamp, h.battery_percent, h.signal_dbm FROM heartbeats h
             JOIN (SELECT deployment_id, max(timestamp) AS t FROM heartbeats GROUP BY deployment_id) m
               ON m.deployment_id = h.deployment_id AND m.t = h.timestamp",
        )?;
        for row in stmt.query_map([], |r| {
            Ok((
                r.get::<_, String>(0)?,
                (from_ms(r.get(1)?), r.get(2)?, r.get(3)?),
            ))
        })? {
            let (k, v) = row?;
            out.insert(k, v);
        }
        Ok(out)
    }

    /// The names people read for species seen since `since`, from the
    /// observations' `vernacularName` (the latest one given wins).
    pub fn names(&self, since: DateTime<Utc>) -> Result<Names, StoreError> {
        let mut out = BTreeMap::new();
        let mut stmt = self.c().prepare_cached(
            "SELECT scientific_name, vernacular_name, max(received_at) FROM observations
             WHERE observation_type = 'animal' AND received_at >= ?1
               AND scientific_name IS NOT NULL AND vernacular_name IS NOT NULL AND vernacular_name != ''
             GROUP BY scientific_name",
        )?;
        for row in stmt.query_map(params![ms(since)], |r| {
            Ok((r.get::<_, String>(0)?, r.get::<_, String>(1)?))
        })? {
            let (k, v) = row?;
            out.insert(k, v);
        }
        Ok(Names(out))
    }

    /// Observations of people and vehicles since `since`: a count only.
    pub fn private_count(&self, since: DateTime<Utc>) -> Result<u64, StoreError> {
        Ok(self.c().query_row(
            "SELECT count(*) FROM observations WHERE observation_type IN ('human', 'vehicle') AND event_start >= ?1",
            params![ms(since)],
            |r| r.get::<_, i64>(0),
        )?.max(0) as u64)
    }

    /// Notices matching `f`, newest first, with their deliveries.
    pub fn notices(&self, f: &NoticeFilter) -> Result<Vec<NoticeRow>, StoreError> {
        let mut sql = String::from("SELECT id, notice, reason FROM notices WHERE 1 = 1");
        let mut args: Vec<String> = Vec::new();
        for (col, v) in [
            ("subscriber_id", &f.subscriber),
            ("scientific_name", &f.species),
            ("trigger", &f.trigger),
            ("disposition", &f.disposition),
            ("deployment_id", &f.deployment_id),
        ] {
            if let Some(v) = v {
                args.push(v.clone());
                sql.push_str(&format!(" AND {col} = ?{}", args.len()));
            }
        }
        sql.push_str(&format!(" ORDER BY at DESC, id LIMIT {}", f.row_limit()));
        let c = self.c();
        let mut stmt = c.prepare(&sql)?;
        let mut rows = Vec::new();
        for row in stmt.query_map(params_from_iter(args.iter()), |r| {
            Ok((
                r.get::<_, String>(0)?,
                r.get::<_, String>(1)?,
                r.get::<_, String>(2)?,
            ))
        })? {
            let (id, body, reason) = row?;
            // Written by this program; a row that does not read back is
            // skipped (and logged) rather than failing the page.
            match serde_json::from_str::<Notice>(&body) {
                Ok(notice) => rows.push((id, notice, reason)),
                Err(error) => tracing::warn!(notice = %id, %error, "Unreadable notice row"),
            }
        }
        let mut out = Vec::with_capacity(rows.len());
        let mut stmt = c.prepare_cached(
            "SELECT channel, state, attempts, last_error FROM deliveries WHERE notice_id = ?1 ORDER BY channel",
        )?;
        for (id, notice, reason) in rows {
            let mut deliveries = Vec::new();
            for d in stmt.query_map(params![id], |r| {
                Ok(DeliveryView {
                    channel: r.get(0)?,
                    state: r.get(1)?,
                    attempts: r.get::<_, i64>(2)?.clamp(0, i64::from(u32::MAX)) as u32,
                    last_error: r.get(3)?,
                })
            })? {
                deliveries.push(d?);
            }
            out.push(NoticeRow {
                notice,
                reason,
                deliveries,
            });
        }
        Ok(out)
    }

    /// Species and subscribers that have notices, for the filter form.
    pub fn notice_species(&self) -> Result<Vec<String>, StoreError> {
        let mut stmt = self.c().prepare_cached(
            "SELECT DISTINCT scientific_name FROM notices WHERE scientific_name IS NOT NULL ORDER BY scientific_name",
        )?;
        let rows = stmt.query_map([], |r| r.get::<_, String>(0))?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// Rejections, newest first, of one reason or all.
    pub fn rejected(
        &self,
        reason: Option<&str>,
        limit: u32,
    ) -> Result<Vec<RejectedRow>, StoreError> {
        let mut stmt = self.c().prepare_cached(
            "SELECT received_at, topic, reason, detail, payload, payload_bytes FROM rejected
             WHERE ?1 IS NULL OR reason = ?1 ORDER BY id DESC LIMIT ?2",
        )?;
        let rows = stmt.query_map(params![reason, i64::from(limit)], |r| {
            Ok(RejectedRow {
                received_at: from_ms(r.get(0)?),
                topic: r.get(1)?,
                reason: r.get(2)?,
                detail: r.get(3)?,
                payload: r.get(4)?,
                payload_bytes: r.get::<_, i64>(5)?.max(0) as u64,
            })
        })?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// Subscribers who unsubscribed from email, and when.
    pub fn unsubscribes(&self) -> Result<BTreeMap<String, DateTime<Utc>>, StoreError> {
        let mut stmt = self
            .c()
            .prepare_cached("SELECT subscriber_id, at FROM unsubscribes")?;
        let rows = stmt.query_map([], |r| Ok((r.get::<_, String>(0)?, from_ms(r.get(1)?))))?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// Deliveries by (channel, state), for `/metrics`.
    pub fn deliveries_by_channel(&self) -> Result<BTreeMap<(String, String), u64>, StoreError> {
        let mut stmt = self.c().prepare_cached(
            "SELECT channel, state, count(*) FROM deliveries GROUP BY channel, state",
        )?;
        let rows = stmt.query_map([], |r| {
            Ok((
                (r.get::<_, String>(0)?, r.get::<_, String>(1)?),
                r.get::<_, i64>(2)?.max(0) as u64,
            ))
        })?;
        Ok(rows.collect::<Result<_, _>>()?)
    }
}
