//! Logging set-up and the process's counters.
//!
//! Each counter is bumped in one place, next to the log line for the same
//! fact. The counters feed `/metrics` and the readiness check.

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

/// Counters since the process started.
#[derive(Debug, Default)]
pub struct Counters {
    pub received: AtomicU64,
    pub stored: AtomicU64,
    pub duplicates: AtomicU64,
    pub rejected: Mutex<BTreeMap<RejectReason, u64>>,
    pub commits: AtomicU64,
    pub commit_micros: AtomicU64,
    pub broker_connected: AtomicBool,
    store_writable: AtomicBool,
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
}
