//! The pipeline task: takes raw MQTT messages, decodes them (pure), commits
//! them to the store in batches, and only then acknowledges them to the
//! broker and publishes rejections to `P/_rejected`.
//!
//! Batching is natural: the first message is awaited, then whatever else is
//! already waiting (up to [`MAX_BATCH`]) joins the same transaction. Under
//! light load every message commits alone and at once; under heavy load a
//! commit carries many. Nothing is acknowledged before its commit.

use crate::clock::Clock;
use crate::config::Config;
use crate::engine::{Engine, Output};
use crate::ingest::decode::{decode, DecodeContext};
use crate::model::ObservationType;
use crate::store::{Ingest, Outcome, Store};
use crate::telemetry::Counters;
use chrono::{DateTime, Duration, Utc};
use std::collections::HashMap;
use std::sync::Arc;
use tokio::sync::mpsc;

/// Most messages in one transaction.
pub const MAX_BATCH: usize = 512;

/// A message as it came off the wire, with what is needed to acknowledge it.
pub struct Inbound {
    pub topic: String,
    pub payload: bytes::Bytes,
    /// The broker's packet, to acknowledge after commit (None when the
    /// message did not come from MQTT, e.g. in tests).
    pub publish: Option<rumqttc::Publish>,
    /// When it was read off the connection (real time), for the
    /// ingest-to-commit histogram.
    pub arrived: std::time::Instant,
}

/// Where acknowledgements and `_rejected` reports go: acknowledgements to
/// the MQTT loop (which alone may send them, see `ingest::mqtt::run`),
/// reports straight into the client.
#[derive(Clone)]
pub struct MqttReply {
    pub client: rumqttc::AsyncClient,
    pub acks: mpsc::Sender<rumqttc::Publish>,
    pub topic_prefix: String,
}

/// Static facts the decoder needs, built once from the config.
pub struct DecodeFacts {
    pub topic_prefix: String,
    pub deployments: HashMap<String, DateTime<Utc>>,
    pub species: crate::config::Species,
    pub max_payload_bytes: usize,
    pub future_tolerance: Duration,
}

impl DecodeFacts {
    pub fn from_config(cfg: &Config) -> Self {
        Self {
            topic_prefix: cfg.mqtt.topic_prefix.clone(),
            deployments: cfg
                .sites
                .sites
                .iter()
                .map(|s| (s.deployment_id.clone(), s.deployment_start))
                .collect(),
            species: cfg.species.clone(),
            max_payload_bytes: cfg.detection.max_payload_bytes,
            future_tolerance: Duration::minutes(cfg.detection.future_tolerance_minutes as i64),
        }
    }
}

/// Decodes one inbound message into what the store should commit.
pub fn to_ingest(facts: &DecodeFacts, topic: &str, payload: &[u8], now: DateTime<Utc>) -> Ingest {
    let ctx = DecodeContext {
        topic_prefix: &facts.topic_prefix,
        deployments: &facts.deployments,
        species: &facts.species,
        now,
        max_payload_bytes: facts.max_payload_bytes,
        future_tolerance: facts.future_tolerance,
    };
    match decode(topic, payload, &ctx) {
        Ok(message) => Ingest::Message {
            message,
            received_at: now,
        },
        Err(rejection) => Ingest::Rejected {
            topic: topic.to_string(),
            payload: kept_payload(payload, facts.max_payload_bytes),
            payload_bytes: payload.len(),
            rejection,
            received_at: now,
        },
    }
}

/// What of a rejected payload is kept: at most the payload limit, and for a
/// message that says it shows a person or vehicle, only its identifying keys
/// (the privacy rule holds for bad messages too).
pub fn kept_payload(payload: &[u8], limit: usize) -> Vec<u8> {
    let cut = &payload[..payload.len().min(limit)];
    if let Ok(serde_json::Value::Object(map)) = serde_json::from_slice::<serde_json::Value>(cut) {
        let private = map
            .get("observationType")
            .and_then(|v| v.as_str())
            .and_then(ObservationType::parse)
            .is_some_and(ObservationType::is_private);
        if private {
            let kept: serde_json::Map<String, serde_json::Value> = map
                .into_iter()
                .filter(|(k, _)| {
                    matches!(
                        k.as_str(),
                        "observationID" | "deploymentID" | "eventStart" | "observationType"
                    )
                })
                .collect();
            return serde_json::to_vec(&kept).unwrap_or_default();
        }
    }
    cut.to_vec()
}

/// Runs until `rx` closes (every sender dropped), then returns after the
/// batch in hand is committed and acknowledged.
#[allow(clippy::too_many_arguments)]
pub async fn run(
    mut rx: mpsc::Receiver<Inbound>,
    store: Store,
    facts: Arc<DecodeFacts>,
    mut engine: Engine,
    clock: Arc<dyn Clock>,
    reply: Option<MqttReply>,
    counters: Arc<Counters>,
    tick_every: std::time::Duration,
    wake_outbox: Arc<tokio::sync::Notify>,
) {
    let mut batch: Vec<Inbound> = Vec::with_capacity(MAX_BATCH);
    let mut ticker = tokio::time::interval(tick_every);
    ticker.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    loop {
        let first = tokio::select! {
            m = rx.recv() => m,
            _ = ticker.tick() => {
                // Time-driven checks (silent cameras).
                let derived = engine.tick(clock.now());
                if derived.is_empty() {
                    continue;
                }
                let wake = derived.iter().any(queues_delivery);
                let counts = derived_counts(&derived);
                if commit_until_done(&store, Vec::new(), derived, &counters).await.is_none() {
                    break;
                }
                counts.add_to(&counters);
                if wake {
                    wake_outbox.notify_one();
                }
                continue;
            }
        };
        let Some(first) = first else { break };
        batch.push(first);
        while batch.len() < MAX_BATCH {
            match rx.try_recv() {
                Ok(m) => batch.push(m),
                Err(_) => break,
            }
        }
        let now = clock.now();
        let ingests: Vec<Ingest> = batch
            .iter()
            .map(|m| to_ingest(&facts, &m.topic, &m.payload, now))
            .collect();
        let mut derived = Vec::new();
        for ingest in &ingests {
            if let Ingest::Message { message, .. } = ingest {
                derived.extend(engine.apply(message, now));
            }
        }
        let notices = derived
            .iter()
            .filter(|d| matches!(d, Output::Notice { .. }))
            .count();
        let wake = derived.iter().any(queues_delivery);
        let started = std::time::Instant::now();
        let derived_for_counts = derived_counts(&derived);
        let outcomes = commit_until_done(&store, ingests.clone(), derived, &counters).await;
        let Some(outcomes) = outcomes else {
            // The store stopped for good: leave everything unacknowledged.
            tracing::error!("Store stopped; messages stay with the broker");
            break;
        };
        counters.observe_commit(started.elapsed());
        derived_for_counts.add_to(&counters);
        if wake {
            // Committed: the outbox can send now instead of at its next poll.
            wake_outbox.notify_one();
        }
        if notices > 0 {
            tracing::debug!(notices, "Notice decisions committed");
        }
        let committed = std::time::Instant::now();
        for ((m, ingest), outcome) in batch.drain(..).zip(ingests.iter()).zip(outcomes.iter()) {
            counters.count(ingest, outcome);
            counters
                .ingest_to_commit
                .observe(committed.saturating_duration_since(m.arrived).as_secs_f64());
            if let Some(reply) = &reply {
                let rejection = match (ingest, outcome) {
                    (Ingest::Rejected { rejection, .. }, _) => Some(rejection),
                    (_, Outcome::Rejected(r)) => Some(r),
                    _ => None,
                };
                if let Some(r) = rejection {
                    tracing::warn!(topic = %crate::ingest::decode::printable(&m.topic), reason = %r.reason, detail = %r.detail, "Rejected message");
                    let report = rejection_report(&m.topic, &m.payload, facts.max_payload_bytes, r);
                    let topic = format!("{}/_rejected", reply.topic_prefix);
                    // Best effort: the rejection is already stored.
                    if let Err(error) =
                        reply
                            .client
                            .try_publish(topic, rumqttc::QoS::AtLeastOnce, false, report)
                    {
                        tracing::warn!(%error, "Could not publish a rejection report");
                    }
                }
                if let Some(publish) = m.publish {
                    if reply.acks.send(publish).await.is_err() {
                        tracing::warn!("MQTT loop gone; the broker will redeliver");
                    }
                }
            }
        }
    }
}

/// What a commit's engine outputs add to the counters, worked out before
/// the outputs move into the commit and added once it has succeeded.
#[derive(Debug, Default)]
struct DerivedCounts {
    events_written: u64,
    events_removed: u64,
    /// (trigger, disposition) of each notice decision.
    notices: Vec<(&'static str, &'static str)>,
}

fn derived_counts(derived: &[Output]) -> DerivedCounts {
    let mut c = DerivedCounts::default();
    for d in derived {
        match d {
            Output::EventUpsert(_) => c.events_written += 1,
            Output::EventDelete(_) => c.events_removed += 1,
            Output::Notice { notice, .. } => c
                .notices
                .push((notice.trigger.as_str(), notice.disposition.as_str())),
            Output::Digest(_) => {}
        }
    }
    c
}

impl DerivedCounts {
    fn add_to(&self, counters: &Counters) {
        use std::sync::atomic::Ordering::Relaxed;
        counters
            .events_written
            .fetch_add(self.events_written, Relaxed);
        counters
            .events_removed
            .fetch_add(self.events_removed, Relaxed);
        for (t, d) in &self.notices {
            counters.count_notice(t, d);
        }
    }
}

/// Commits, retrying transient failures (full disk, locked file) with
/// back-off up to 30 s between tries; while it retries nothing is acked.
/// Whether committing this output queues something for the outbox.
fn queues_delivery(o: &Output) -> bool {
    match o {
        Output::Notice { notice, .. } => notice.disposition == crate::notify::Disposition::Sent,
        Output::Digest(_) => true,
        _ => false,
    }
}

async fn commit_until_done(
    store: &Store,
    batch: Vec<Ingest>,
    derived: Vec<Output>,
    counters: &Counters,
) -> Option<Vec<Outcome>> {
    let mut delay = std::time::Duration::from_millis(250);
    let mut refused_since: Option<std::time::Instant> = None;
    loop {
        match store.commit(batch.clone(), derived.clone()).await {
            Ok(o) => {
                counters.set_store_writable(true);
                if let Some(since) = refused_since {
                    tracing::warn!(
                        unwritable_ms = since.elapsed().as_millis() as u64,
                        messages = batch.len(),
                        "Store takes writes again; acknowledging resumes"
                    );
                }
                return Some(o);
            }
            Err(e) if e.is_transient() => {
                counters.set_store_writable(false);
                refused_since.get_or_insert_with(std::time::Instant::now);
                tracing::error!(error = %e, retry_in_ms = delay.as_millis() as u64, messages = batch.len(), ready = false, "Store cannot take writes; not acknowledging until it can");
                tokio::time::sleep(delay).await;
                delay = (delay * 2).min(std::time::Duration::from_secs(30));
            }
            Err(e) => {
                counters.set_store_writable(false);
                tracing::error!(error = %e, "Store failed");
                return None;
            }
        }
    }
}

/// The JSON published on `P/_rejected`: the original topic and payload (as
/// text when it is UTF-8, else base64-free hex), the reason and the detail.
pub fn rejection_report(
    topic: &str,
    payload: &[u8],
    limit: usize,
    r: &crate::model::Rejection,
) -> Vec<u8> {
    let kept = kept_payload(payload, limit);
    let payload_value = match std::str::from_utf8(&kept) {
        Ok(s) => serde_json::Value::String(s.to_string()),
        Err(_) => serde_json::Value::String(kept.iter().map(|b| format!("{b:02x}")).collect()),
    };
    let encoding = if std::str::from_utf8(&kept).is_ok() {
        "utf-8"
    } else {
        "hex"
    };
    serde_json::to_vec(&serde_json::json!({
        "topic": topic,
        "reason": r.reason.as_str(),
        "detail": r.detail,
        "payload": payload_value,
        "payloadEncoding": encoding,
        "payloadBytes": payload.len(),
    }))
    .unwrap_or_default()
}
