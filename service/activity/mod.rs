//! Activity engine: the pure numbers behind every notice.
//!
//! Role: turns triggers and signs of life into independent events, effort,
//! baselines and detector decisions (METHODS sections 1-4 and 7). Pure: no
//! I/O, no clock reads (instants come in as `DateTime<Utc>`), no runtime or
//! database types. The pipeline task calls it and stores what it returns.
//!
//! # Layout
//! - [`events`]: independence collapse ([`collapse`]) and the incremental
//!   [`EventLedger`] (duplicates, late triggers, retractions, relabels).
//! - [`effort`]: per-deployment [`Uptime`], camera-nights, silence, [`rai`].
//! - [`special`]: `ln Γ`, incomplete gamma/beta, Poisson and
//!   negative-binomial upper tails, critical counts.
//! - [`baseline`]: gamma-Poisson prior/posterior, baseline window,
//!   [`spike_test`] with [`SpikeEvidence`].
//! - [`cusum`]: Poisson CUSUM with exposure for slow build-ups.
//! - [`words`]: p-value to "about once in 2,000 nights".
//!
//! Conventions and their sources: docs/activity.md. Reference data:
//! tests/reference/gen_activity.py -> tests/reference/data/activity.json.

pub mod baseline;
pub mod cusum;
pub mod effort;
pub mod events;
pub mod special;
pub mod words;

pub use baseline::{
    baseline_window, regional_rate, spike_test, BaselineError, GammaRate, SpikeConditions,
    SpikeEvidence, SpikeInput, SpikeParams, Window,
};
pub use cusum::{CusumError, CusumParams, CusumState, CusumStep};
pub use effort::{rai, EffortError, Uptime};
pub use events::{collapse, Change, EventId, EventLedger, IndependentEvent, Trigger};
pub use special::{critical_count, nbinom_upper_tail, poisson_upper_tail};
pub use words::chance_in_words;

/// Shared helpers for the reference-data tests.
#[cfg(test)]
#[allow(clippy::unwrap_used)]
pub(crate) mod test_reference {
    use std::sync::OnceLock;

    /// tests/reference/data/activity.json, written by gen_activity.py.
    pub fn reference() -> &'static serde_json::Value {
        static DATA: OnceLock<serde_json::Value> = OnceLock::new();
        DATA.get_or_init(|| {
            let path = concat!(
                env!("CARGO_MANIFEST_DIR"),
                "/tests/reference/data/activity.json"
            );
            let text = std::fs::read_to_string(path)
                .unwrap_or_else(|e| panic!("{path}: {e}; run tests/reference/gen_activity.py"));
            serde_json::from_str(&text).unwrap()
        })
    }

    /// Relative error, with exact zero matching zero.
    pub fn rel_err(got: f64, want: f64) -> f64 {
        if got == want {
            0.0
        } else {
            ((got - want) / want).abs()
        }
    }
}
