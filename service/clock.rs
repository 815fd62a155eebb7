//! The one place that reads the wall clock. Everything else is handed the
//! time, so replay and tests can run on a simulated clock.

use chrono::{DateTime, Utc};
use std::sync::atomic::{AtomicI64, Ordering};
use std::sync::Arc;

/// A source of "now".
pub trait Clock: Send + Sync + 'static {
    fn now(&self) -> DateTime<Utc>;
}

/// The real clock.
#[derive(Debug, Clone, Copy, Default)]
pub struct SystemClock;

impl Clock for SystemClock {
    #[allow(clippy::disallowed_methods)]
    fn now(&self) -> DateTime<Utc> {
        Utc::now()
    }
}

/// A clock that moves only when told to (replay, tests, the demo's fast
/// simulated time). Cloning shares the same time.
#[derive(Debug, Clone)]
pub struct ManualClock {
    micros: Arc<AtomicI64>,
}

impl ManualClock {
    pub fn new(at: DateTime<Utc>) -> Self {
        Self {
            micros: Arc::new(AtomicI64::new(at.timestamp_micros())),
        }
    }

    pub fn set(&self, at: DateTime<Utc>) {
        self.micros.store(at.timestamp_micros(), Ordering::SeqCst);
    }

    pub fn advance(&self, by: chrono::Duration) {
        let step = by.num_microseconds().unwrap_or(i64::MAX);
        self.micros.fetch_add(step, Ordering::SeqCst);
    }
}

impl Clock for ManualClock {
    fn now(&self) -> DateTime<Utc> {
        DateTime::from_timestamp_micros(self.micros.load(Ordering::SeqCst)).unwrap_or_default()
    }
}

/// Simulated time that runs `speed` times faster than real time from a
/// chosen start (the demo). Monotonic: it follows `Instant`, not the wall
/// clock.
#[derive(Debug, Clone)]
pub struct ScaledClock {
    start: DateTime<Utc>,
    real_start: std::time::Instant,
    speed: f64,
}

impl ScaledClock {
    pub fn new(start: DateTime<Utc>, speed: f64) -> Self {
        Self {
            start,
            real_start: std::time::Instant::now(),
            speed,
        }
    }
}

impl Clock for ScaledClock {
    fn now(&self) -> DateTime<Utc> {
        let real = self.real_start.elapsed().as_secs_f64();
        self.start + chrono::Duration::microseconds((real * self.speed * 1e6) as i64)
    }
}
