//! Logging set-up and the process's counters.
//!
//! Each counter is bumped in one place, next to the log line for the same
//! fact. The counters feed `/metrics` and the readiness check.
//!
//! Counters count since the process started (Prometheus handles resets);
//! histograms keep cumulative bucket counts with fixed bounds in seconds.
//! Rendering them as text is `web::metrics`'s job, a pure function over a
//! [`Snapshot`].

use crate::model::RejectReason;
use crate::store::{Ingest, Outcome};
use std::collections::BTreeMap;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering::Relaxed};
use std::sync::Mutex;
use std::time::Duration;

/// Log output format.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum LogFormat {
    Text,
    Json,
}

/// Starts logging to stderr, filtered by `RUST_LOG` (default `info`).
pub fn init(format: LogFormat) {
    let filter = tracing_subscriber::EnvFilter::try_from_default_env()
        .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("info,rumqttd=warn,rumqttc=warn"));
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr);
    let _ = match format {
        LogFormat::Text => builder.try_init(),
        LogFormat::Json => builder.json().flatten_event(true).try_init(),
    };
}

/// Upper bounds (seconds) of the ingest-to-commit histogram: from a
/// message read off the MQTT connection to the commit that holds it.
pub const COMMIT_BUCKETS: &[f64] = &[
    0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0,
];

/// Upper bounds (seconds) of the delivery histograms: one attempt's
/// duration, and a notice's decision to its delivery (service clock).
pub const DELIVERY_BUCKETS: &[f64] = &[
    0.01, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0, 60.0, 300.0, 3600.0,
];

/// A histogram with fixed bucket bounds; bucket counts are per bucket (not
/// cumulative) until [`Histogram::snapshot`] adds them up.
#[derive(Debug)]
pub struct Histogram {
    bounds: &'static [f64],
    /// One per bound, plus one for +Inf.
    buckets: Vec<AtomicU64>,
    /// Sum of observations in microseconds (an integer keeps it atomic).
    sum_micros: AtomicU64,
}

/// A histogram as read at one moment: cumulative counts, Prometheus-style.
#[derive(Debug, Clone, PartialEq)]
pub struct HistogramSnapshot {
    /// (upper bound, observations <= bound), ascending; +Inf last.
    pub buckets: Vec<(f64, u64)>,
    pub count: u64,
    pub sum_seconds: f64,
}

impl Histogram {
    pub fn new(bounds: &'static [f64]) -> Self {
        Histogram {
            bounds,
            buckets: (0..=bounds.len()).map(|_| AtomicU64::new(0)).collect(),
            sum_micros: AtomicU64::new(0),
        }
    }

    /// Records one observation; negative or NaN durations count as 0.
    pub fn observe(&self, seconds: f64) {
        let s = if seconds.is_finite() && seconds > 0.0 {
            seconds
        } else {
            0.0
        };
        let i = self
            .bounds
            .iter()
            .position(|b| s <= *b)
            .unwrap_or(self.bounds.len());
        if let Some(b) = self.buckets.get(i) {
            b.fetch_add(1, Relaxed);
        }
        self.sum_micros
            .fetch_add((s * 1e6).min(u64::MAX as f64 / 4.0) as u64, Relaxed);
    }

    pub fn snapshot(&self) -> HistogramSnapshot {
        let mut total = 0;
        let mut buckets = Vec::with_capacity(self.buckets.len());
        for (i, b) in self.buckets.iter().enumerate() {
            total += b.load(Relaxed);
            let bound = self.bounds.get(i).copied().unwrap_or(f64::INFINITY);
            buckets.push((bound, total));
        }
        HistogramSnapshot {
            buckets,
            count: total,
            sum_seconds: self.sum_micros.load(Relaxed) as f64 / 1e6,
        }
    }
}

/// Counters since the process started.
#[derive(Debug)]
pub struct Counters {
    pub received: AtomicU64,
    pub stored: AtomicU64,
    pub duplicates: AtomicU64,
    pub rejected: Mutex<BTreeMap<RejectReason, u64>>,
    pub commits: AtomicU64,
    pub commit_micros: AtomicU64,
    pub broker_connected: AtomicBool,
    store_writable: AtomicBool,
    /// Independent events written (new or changed) by the pipeline.
    pub events_written: AtomicU64,
    /// Independent events removed (retracted, merged) by the pipeline.
    pub events_removed: AtomicU64,
    /// Notice decisions committed, by (trigger, disposition).
    pub notices: Mutex<BTreeMap<(String, String), u64>>,
    /// Delivery outcomes recorded by the outbox, by (channel, outcome):
    /// sent, retry, failed, closed.
    pub deliveries: Mutex<BTreeMap<(String, String), u64>>,
    /// Message read off MQTT -> its commit.
    pub ingest_to_commit: Histogram,
    /// One delivery attempt (real time).
    pub delivery_attempt: Histogram,
    /// Notice decision -> accepted by the receiving server, on the
    /// service's clock (simulated time in the demo).
    pub notice_to_delivery: Histogram,
}

impl Default for Counters {
    fn default() -> Self {
        Counters {
            received: AtomicU64::new(0),
            stored: AtomicU64::new(0),
            duplicates: AtomicU64::new(0),
            rejected: Mutex::new(BTreeMap::new()),
            commits: AtomicU64::new(0),
            commit_micros: AtomicU64::new(0),
            broker_connected: AtomicBool::new(false),
            store_writable: AtomicBool::new(false),
            events_written: AtomicU64::new(0),
            events_removed: AtomicU64::new(0),
            notices: Mutex::new(BTreeMap::new()),
            deliveries: Mutex::new(BTreeMap::new()),
            ingest_to_commit: Histogram::new(COMMIT_BUCKETS),
            delivery_attempt: Histogram::new(DELIVERY_BUCKETS),
            notice_to_delivery: Histogram::new(DELIVERY_BUCKETS),
        }
    }
}

/// Everything `/metrics` shows from the process, read at one moment.
#[derive(Debug, Clone, PartialEq)]
pub struct Snapshot {
    pub received: u64,
    pub stored: u64,
    pub duplicates: u64,
    pub rejected: BTreeMap<String, u64>,
    pub commits: u64,
    pub broker_connected: bool,
    pub store_writable: bool,
    pub events_written: u64,
    pub events_removed: u64,
    pub notices: BTreeMap<(String, String), u64>,
    pub deliveries: BTreeMap<(String, String), u64>,
    pub ingest_to_commit: HistogramSnapshot,
    pub delivery_attempt: HistogramSnapshot,
    pub notice_to_delivery: HistogramSnapshot,
}

fn bump_pair(m: &Mutex<BTreeMap<(String, String), u64>>, a: &str, b: &str) {
    if let Ok(mut m) = m.lock() {
        *m.entry((a.to_string(), b.to_string())).or_default() += 1;
    }
}

impl Counters {
    pub fn new() -> Self {
        let c = Self::default();
        c.store_writable.store(true, Relaxed);
        c
    }

    pub fn count(&self, ingest: &Ingest, outcome: &Outcome) {
        self.received.fetch_add(1, Relaxed);
        let reason = match (ingest, outcome) {
            (Ingest::Rejected { rejection, .. }, _) => Some(rejection.reason),
            (_, Outcome::Rejected(r)) => Some(r.reason),
            (_, Outcome::Duplicate) => {
                self.duplicates.fetch_add(1, Relaxed);
                None
            }
            _ => {
                self.stored.fetch_add(1, Relaxed);
                None
            }
        };
        if let Some(reason) = reason {
            if let Ok(mut m) = self.rejected.lock() {
                *m.entry(reason).or_default() += 1;
            }
        }
    }

    pub fn observe_commit(&self, took: Duration) {
        self.commits.fetch_add(1, Relaxed);
        self.commit_micros
            .fetch_add(took.as_micros() as u64, Relaxed);
    }

    pub fn set_store_writable(&self, ok: bool) {
        self.store_writable.store(ok, Relaxed);
    }

    pub fn store_writable(&self) -> bool {
        self.store_writable.load(Relaxed)
    }

    /// Ready to take messages: the store takes writes and the broker is connected.
    pub fn ready(&self) -> bool {
        self.store_writable() && self.broker_connected.load(Relaxed)
    }

    /// A notice decision was committed.
    pub fn count_notice(&self, trigger: &str, disposition: &str) {
        bump_pair(&self.notices, trigger, disposition);
    }

    /// The outbox recorded a delivery outcome (`sent`, `retry`, `failed`,
    /// `closed`) on `channel`.
    pub fn count_delivery(&self, channel: &str, outcome: &str) {
        bump_pair(&self.deliveries, channel, outcome);
    }

    pub fn snapshot(&self) -> Snapshot {
        let rejected = self
            .rejected
            .lock()
            .map(|m| {
                m.iter()
                    .map(|(r, n)| (r.as_str().to_string(), *n))
                    .collect()
            })
            .unwrap_or_default();
        let pairs = |m: &Mutex<BTreeMap<(String, String), u64>>| {
            m.lock().map(|m| m.clone()).unwrap_or_default()
        };
        Snapshot {
            received: self.received.load(Relaxed),
            stored: self.stored.load(Relaxed),
            duplicates: self.duplicates.load(Relaxed),
            rejected,
            commits: self.commits.load(Relaxed),
            broker_connected: self.broker_connected.load(Relaxed),
            store_writable: self.store_writable(),
            events_written: self.events_written.load(Relaxed),
            events_removed: self.events_removed.load(Relaxed),
            notices: pairs(&self.notices),
            deliveries: pairs(&self.deliveries),
            ingest_to_commit: self.ingest_to_commit.snapshot(),
            delivery_attempt: self.delivery_attempt.snapshot(),
            notice_to_delivery: self.notice_to_delivery.snapshot(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn histogram_buckets_are_cumulative_and_bounds_inclusive() {
        let h = Histogram::new(&[0.1, 1.0]);
        for s in [0.05, 0.1, 0.5, 1.0, 7.0, -3.0] {
            h.observe(s);
        }
        let s = h.snapshot();
        // Prometheus buckets are `le` (less than or equal), cumulative,
        // ending with +Inf = count (exposition format, common practice).
        assert_eq!(
            s.buckets,
            vec![(0.1, 3), (1.0, 5), (f64::INFINITY, 6)],
            "-3 counts as 0, 0.1 falls in le=0.1"
        );
        assert_eq!(s.count, 6);
        assert!((s.sum_seconds - 8.65).abs() < 1e-9, "{}", s.sum_seconds);
    }

    #[test]
    fn a_new_store_counts_as_writable_and_the_broker_as_not_connected() {
        let c = Counters::new();
        assert!(c.store_writable());
        assert!(!c.ready());
        c.broker_connected.store(true, Relaxed);
        assert!(c.ready());
    }
}
