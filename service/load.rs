//! `outrider load`: publishes the demo's synthetic feed ([`crate::demo::feed`])
//! to a broker at a given rate, for load tests and benchmarks (issue 8,
//! `benches/side_by_side.py`).
//!
//! What is published is chosen by a pure plan ([`Plan`]): the feed's
//! `count` messages just before `now` (the last `count` of the feed's
//! messages before `now`), in time order. So every
//! timestamp is in the past (the daemon accepts it) and the stream is the
//! same for the same options and the same `now`. The sites are the demo
//! district's 16 or a synthetic grid of N sites ([`district::grid`]);
//! `--write-sites` writes them as a Camtrap DP deployments CSV for the
//! daemon's `[sites] file`.
//!
//! The shell ([`run`]) owns one rumqttc client: it paces the publishes
//! (or sends as fast as the client's window allows), waits for every QoS 1
//! PUBACK (or, at QoS 0, for the DISCONNECT to be written after the last
//! publish), and reports what it published and the rate it achieved. It
//! never reconnects: a lost connection is an error that says how many
//! messages went out.

use crate::demo::district::{self, DemoSite};
use crate::demo::feed::{Feed, FeedMessage};
use anyhow::Context;
use chrono::{DateTime, Duration, Utc};
use rumqttc::{AsyncClient, Event, MqttOptions, Outgoing, Packet, QoS};
use std::path::PathBuf;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;

/// The seed of the feed when none is given (the demo's own).
pub const DEFAULT_SEED: u64 = 2026;

/// How far back the plan looks for messages before giving up (a small
/// network at the demo's rates cannot fill a large count).
const MAX_LOOKBACK_DAYS: i64 = 5 * 366;

/// Feed hours generated at a time.
const WINDOW_HOURS: i64 = 6;

/// What to publish.
#[derive(Debug, Clone)]
pub struct LoadOptions {
    pub url: crate::config::MqttUrl,
    pub prefix: String,
    pub client_id: String,
    /// Messages to publish (observations, plus heartbeats when
    /// `heartbeats`).
    pub count: u64,
    /// Messages per second; `None`: as fast as the broker takes them.
    pub rate: Option<f64>,
    pub qos: QoS,
    /// `None`: the demo district's 16 sites; `Some(n)`: a grid of n sites.
    pub grid_sites: Option<usize>,
    pub spacing_km: f64,
    pub heartbeats: bool,
    pub seed: u64,
    pub id_prefix: String,
    /// QoS 1 publishes in flight at once (the client's window).
    pub inflight: u16,
}

/// What [`run`] did.
#[derive(Debug, Clone, serde::Serialize)]
pub struct Report {
    pub published: u64,
    pub observations: u64,
    pub heartbeats: u64,
    /// PUBACKs received (QoS 1; 0 at QoS 0).
    pub acknowledged: u64,
    pub sites: usize,
    pub qos: u8,
    /// From the first publish to the last PUBACK (QoS 1) or to the
    /// DISCONNECT written after the last publish (QoS 0).
    pub seconds: f64,
    pub messages_per_second: f64,
    pub target_rate: Option<f64>,
    pub first_message_at: Option<DateTime<Utc>>,
    pub last_message_at: Option<DateTime<Utc>>,
}

impl Report {
    /// One line for people.
    pub fn text(&self) -> String {
        let span = match (self.first_message_at, self.last_message_at) {
            (Some(a), Some(b)) => format!(
                "; message times {} to {}",
                a.format("%Y-%m-%d %H:%M"),
                b.format("%Y-%m-%d %H:%M UTC")
            ),
            _ => String::new(),
        };
        let target = match self.target_rate {
            Some(r) => format!(" (asked for {r} messages/s)"),
            None => " (as fast as possible)".into(),
        };
        format!(
            "published {} messages ({} observations, {} heartbeats) of {} sites at QoS {} in {:.2} s: {:.0} messages/s{target}{}{span}",
            self.published,
            self.observations,
            self.heartbeats,
            self.sites,
            self.qos,
            self.seconds,
            self.messages_per_second,
            if self.qos == 1 {
                format!(", {} acknowledged", self.acknowledged)
            } else {
                String::new()
            },
        )
    }
}

/// The sites a load run publishes for.
pub fn sites(grid_sites: Option<usize>, spacing_km: f64) -> Vec<DemoSite> {
    match grid_sites {
        None => district::sites(),
        Some(n) => district::grid(n, spacing_km),
    }
}

/// The feed a load run publishes from: the demo's, over `sites`, with its
/// origin at `now`.
pub fn feed(opts: &LoadOptions, sites: Vec<DemoSite>, now: DateTime<Utc>) -> Feed {
    let mut f = Feed::with_sites(now, opts.prefix.clone(), opts.seed, sites);
    f.heartbeats = opts.heartbeats;
    f.id_prefix = opts.id_prefix.clone();
    f
}

#[derive(Debug, thiserror::Error, PartialEq)]
pub enum PlanError {
    #[error("the feed holds only {found} messages in the {days} days before now at these {sites} sites; ask for fewer, or use more sites (--grid-sites)")]
    TooFew { found: u64, days: i64, sites: usize },
}

/// The messages to publish, in time order: pure (the feed is a function of
/// its seed, sites and origin).
pub struct Plan<'a> {
    feed: &'a Feed,
    now: DateTime<Utc>,
    next: DateTime<Utc>,
    /// Messages of the first windows left out, so the stream ends at `now`.
    skip: u64,
    left: u64,
    window: std::vec::IntoIter<FeedMessage>,
}

impl<'a> Plan<'a> {
    /// Finds the start: counts the feed's messages backwards from `now` in
    /// windows of a few hours until `count` are found, looking back at most
    /// `lookback_days`.
    pub fn new(
        feed: &'a Feed,
        now: DateTime<Utc>,
        count: u64,
        lookback_days: i64,
    ) -> Result<Self, PlanError> {
        let mut found = 0u64;
        let mut start = now;
        let limit = now - Duration::days(lookback_days);
        while found < count {
            if start <= limit {
                return Err(PlanError::TooFew {
                    found,
                    days: lookback_days,
                    sites: feed.sites().len(),
                });
            }
            let from = start - Duration::hours(WINDOW_HOURS);
            found += feed.between(from, start).len() as u64;
            start = from;
        }
        Ok(Plan {
            feed,
            now,
            next: start,
            skip: found - count,
            left: count,
            window: Vec::new().into_iter(),
        })
    }

    /// The instant of the first message's window.
    pub fn start(&self) -> DateTime<Utc> {
        self.next
    }
}

impl Iterator for Plan<'_> {
    type Item = FeedMessage;
    fn next(&mut self) -> Option<FeedMessage> {
        if self.left == 0 {
            return None;
        }
        loop {
            if let Some(m) = self.window.next() {
                if self.skip > 0 {
                    self.skip -= 1;
                    continue;
                }
                self.left -= 1;
                return Some(m);
            }
            if self.next >= self.now {
                return None;
            }
            let to = (self.next + Duration::hours(WINDOW_HOURS)).min(self.now);
            self.window = self.feed.between(self.next, to).into_iter();
            self.next = to;
        }
    }
}

/// Publishes `opts.count` messages of the plan and reports.
pub async fn run(opts: &LoadOptions, now: DateTime<Utc>) -> anyhow::Result<Report> {
    if opts.url.tls {
        anyhow::bail!("outrider load speaks plain mqtt:// only (no TLS yet); point it at a loopback or test listener");
    }
    if let Some(r) = opts.rate {
        if !(r.is_finite() && r > 0.0) {
            anyhow::bail!("--rate must be a positive number of messages per second");
        }
    }
    let site_list = sites(opts.grid_sites, opts.spacing_km);
    let n_sites = site_list.len();
    let feed = feed(opts, site_list, now);
    let plan = Plan::new(&feed, now, opts.count, MAX_LOOKBACK_DAYS)?;

    let mut o = MqttOptions::new(opts.client_id.clone(), opts.url.host.clone(), opts.url.port);
    o.set_keep_alive(std::time::Duration::from_secs(30))
        .set_clean_session(true)
        .set_inflight(opts.inflight.max(1))
        .set_max_packet_size(1 << 20, 1 << 20);
    let (client, mut eventloop) = AsyncClient::new(o, 4096);
    let acked = Arc::new(AtomicU64::new(0));
    let all_acked = Arc::new(tokio::sync::Notify::new());
    let connected = Arc::new(tokio::sync::Notify::new());
    let (acked2, all_acked2, connected2) = (acked.clone(), all_acked.clone(), connected.clone());
    // The event loop: counts PUBACKs, ends at our DISCONNECT or an error.
    let looper = tokio::spawn(async move {
        loop {
            match eventloop.poll().await {
                Ok(Event::Incoming(Packet::ConnAck(_))) => connected2.notify_one(),
                Ok(Event::Incoming(Packet::PubAck(_))) => {
                    acked2.fetch_add(1, Ordering::Relaxed);
                    all_acked2.notify_one();
                }
                Ok(Event::Outgoing(Outgoing::Disconnect)) => return Ok(()),
                Ok(_) => {}
                Err(e) => return Err(e),
            }
        }
    });
    tokio::select! {
        _ = connected.notified() => {}
        _ = tokio::time::sleep(std::time::Duration::from_secs(10)) => {
            anyhow::bail!("no CONNACK from {} within 10 s", opts.url);
        }
    }

    let (mut observations, mut heartbeats) = (0u64, 0u64);
    let (mut first_at, mut last_at) = (None, None);
    let started = tokio::time::Instant::now();
    let mut sent = 0u64;
    for m in plan {
        if let Some(r) = opts.rate {
            let due = started + std::time::Duration::from_secs_f64(sent as f64 / r);
            tokio::time::sleep_until(due).await;
        }
        if looper.is_finished() {
            break;
        }
        if m.topic.ends_with("/heartbeat") {
            heartbeats += 1;
        } else {
            observations += 1;
        }
        first_at.get_or_insert(m.at);
        last_at = Some(m.at);
        client
            .publish(m.topic, opts.qos, false, m.payload)
            .await
            .with_context(|| format!("publishing message {}", sent + 1))?;
        sent += 1;
    }
    if opts.qos != QoS::AtMostOnce {
        while acked.load(Ordering::Relaxed) < sent && !looper.is_finished() {
            let _ =
                tokio::time::timeout(std::time::Duration::from_millis(200), all_acked.notified())
                    .await;
        }
    }
    let _ = client.disconnect().await;
    let ended = match looper.await {
        Ok(Ok(())) => tokio::time::Instant::now(),
        Ok(Err(e)) => {
            anyhow::bail!(
                "the connection to {} failed after {sent} publishes ({} acknowledged): {e}",
                opts.url,
                acked.load(Ordering::Relaxed)
            )
        }
        Err(e) => anyhow::bail!("the MQTT event loop stopped: {e}"),
    };
    let seconds = (ended - started).as_secs_f64();
    Ok(Report {
        published: sent,
        observations,
        heartbeats,
        acknowledged: acked.load(Ordering::Relaxed),
        sites: n_sites,
        qos: opts.qos as u8,
        seconds,
        messages_per_second: if seconds > 0.0 {
            sent as f64 / seconds
        } else {
            0.0
        },
        target_rate: opts.rate,
        first_message_at: first_at,
        last_message_at: last_at,
    })
}

/// Writes the run's sites as a Camtrap DP deployments CSV (deployed a year
/// before `now`, so every message of a plan lies inside the deployment).
pub fn write_sites(
    path: &PathBuf,
    grid_sites: Option<usize>,
    spacing_km: f64,
    now: DateTime<Utc>,
) -> anyhow::Result<usize> {
    let s = sites(grid_sites, spacing_km);
    let csv = crate::demo::deployments_csv(&s, now - Duration::days(MAX_LOOKBACK_DAYS.min(400)));
    std::fs::write(path, csv).with_context(|| format!("writing {}", path.display()))?;
    Ok(s.len())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn opts(grid: Option<usize>) -> LoadOptions {
        LoadOptions {
            url: crate::config::parse_mqtt_url("mqtt://127.0.0.1:1").unwrap(),
            prefix: "outrider".into(),
            client_id: "t".into(),
            count: 0,
            rate: None,
            qos: QoS::AtLeastOnce,
            grid_sites: grid,
            spacing_km: 3.0,
            heartbeats: false,
            seed: DEFAULT_SEED,
            id_prefix: String::new(),
            inflight: 100,
        }
    }

    fn now() -> DateTime<Utc> {
        DateTime::parse_from_rfc3339("2026-08-01T00:00:00Z")
            .unwrap()
            .with_timezone(&Utc)
    }

    #[test]
    fn plan_gives_count_messages_in_order_before_now() {
        let o = opts(Some(400));
        let f = feed(&o, sites(o.grid_sites, 3.0), now());
        let msgs: Vec<_> = Plan::new(&f, now(), 5_000, 30).unwrap().collect();
        assert_eq!(msgs.len(), 5_000);
        assert!(msgs.windows(2).all(|w| w[0].at <= w[1].at));
        assert!(msgs.iter().all(|m| m.at < now()));
        // The last `count` before now: the stream ends within the last hour.
        assert!(msgs.last().unwrap().at > now() - Duration::hours(1));
        assert!(msgs.iter().all(|m| m.topic.ends_with("/observation")));
        let ids: std::collections::HashSet<_> = msgs
            .iter()
            .map(|m| {
                let v: serde_json::Value = serde_json::from_slice(&m.payload).unwrap();
                v["observationID"].as_str().unwrap().to_string()
            })
            .collect();
        assert_eq!(ids.len(), msgs.len(), "observation ids are unique");
        // The same options and `now` give the same stream.
        let again: Vec<_> = Plan::new(&f, now(), 5_000, 30).unwrap().collect();
        assert_eq!(msgs, again);
    }

    #[test]
    fn plan_with_heartbeats_and_prefix() {
        let mut o = opts(None);
        o.heartbeats = true;
        o.id_prefix = "run7-".into();
        let f = feed(&o, sites(None, 3.0), now());
        let msgs: Vec<_> = Plan::new(&f, now(), 300, 30).unwrap().collect();
        assert_eq!(msgs.len(), 300);
        assert!(msgs.iter().any(|m| m.topic.ends_with("/heartbeat")));
        assert!(msgs
            .iter()
            .filter(|m| m.topic.ends_with("/observation"))
            .all(|m| String::from_utf8_lossy(&m.payload).contains("\"observationID\":\"run7-KB-")));
    }

    #[test]
    fn too_many_for_a_small_network_is_an_error() {
        let o = opts(None);
        let f = feed(&o, sites(None, 3.0), now());
        // About 57 observations a day at 16 sites: 30 days hold ~1,700.
        match Plan::new(&f, now(), 10_000, 30) {
            Err(PlanError::TooFew { sites, found, days }) => {
                assert_eq!((sites, days), (16, 30));
                assert!(found > 500 && found < 10_000, "{found}");
            }
            Ok(_) => panic!("16 sites cannot hold 10,000 observations in 30 days"),
        }
    }
}
