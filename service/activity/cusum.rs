//! Slow build-up detector: a Poisson CUSUM with varying exposure (METHODS 4;
//! Lucas 1985, "Counted data CUSUMs" \[memory\]).
//!
//! Role: owns the CUSUM recursion and its persisted state. One state per
//! (site, species); the daemon steps it once per closed daily bucket and
//! stores the state (it is `Serialize + Deserialize`).
//!
//! - Reference value per day: `k_t = e_t (r1 - r0) / ln(r1 / r0)`, the
//!   log-likelihood-ratio boundary between Poisson(r0 e_t) and
//!   Poisson(r1 e_t).
//! - `S_t = max(0, S_{t-1} + x_t - k_t)`; signal when `S_t >= h`, then `S`
//!   resets to 0 (signal rule and reset: common practice).
//! - A day with `e_t = 0` (camera down all day) leaves `S` unchanged.
//! - `r0` is floored at a positive rate (see [`CusumParams::new`]): with
//!   `r0 = 0` the reference value is undefined.

use serde::{Deserialize, Serialize};
use thiserror::Error;

/// Default decision interval `h`, in events. With r1 = 2 r0 our own
/// simulation gives an in-control run length of about 240 days at 1
/// expected event a day and about 2,500 days at 0.05 a day (docs/activity.md).
pub const DEFAULT_H: f64 = 5.0;

/// Invalid CUSUM settings or input.
#[derive(Debug, Clone, PartialEq, Error)]
pub enum CusumError {
    #[error("{name} must be finite and positive, got {value}")]
    NotPositive { name: &'static str, value: f64 },
    #[error("ratio r1 / r0 must be finite and greater than 1, got {0}")]
    Ratio(f64),
    #[error("exposure must be finite and non-negative, got {0}")]
    Exposure(f64),
}

/// The floor for `r0`: the posterior mean a site would have with no events
/// anywhere, `0.5 / (prior_nights + history_nights)` (the prior's shape
/// floor 0.5 over the posterior rate).
pub fn rate_floor(prior_nights: f64, history_nights: f64) -> f64 {
    0.5 / (prior_nights + history_nights.max(0.0))
}

/// CUSUM settings: in-control rate `r0`, out-of-control rate `r1`, decision
/// interval `h`, all validated.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct CusumParams {
    r0: f64,
    r1: f64,
    h: f64,
}

impl CusumParams {
    /// `r0 = max(in_control_rate, floor)`, `r1 = ratio × r0`.
    pub fn new(in_control_rate: f64, ratio: f64, h: f64, floor: f64) -> Result<Self, CusumError> {
        let floor = positive("floor", floor)?;
        if !(in_control_rate.is_finite() && in_control_rate >= 0.0) {
            return Err(CusumError::NotPositive {
                name: "in-control rate",
                value: in_control_rate,
            });
        }
        if !(ratio.is_finite() && ratio > 1.0) {
            return Err(CusumError::Ratio(ratio));
        }
        let h = positive("h", h)?;
        let r0 = in_control_rate.max(floor);
        Ok(CusumParams {
            r0,
            r1: ratio * r0,
            h,
        })
    }

    pub fn r0(&self) -> f64 {
        self.r0
    }

    pub fn r1(&self) -> f64 {
        self.r1
    }

    pub fn h(&self) -> f64 {
        self.h
    }

    /// Reference value `k = e (r1 - r0) / ln(r1 / r0)` for `e` camera-nights.
    pub fn reference_value(&self, exposure: f64) -> f64 {
        exposure * (self.r1 - self.r0) / (self.r1 / self.r0).ln()
    }
}

fn positive(name: &'static str, value: f64) -> Result<f64, CusumError> {
    if value.is_finite() && value > 0.0 {
        Ok(value)
    } else {
        Err(CusumError::NotPositive { name, value })
    }
}

/// The persisted CUSUM statistic.
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize, Deserialize)]
pub struct CusumState {
    /// Current `S` (0 after a signal).
    pub s: f64,
}

/// The outcome of one day.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct CusumStep {
    /// Reference value used (0 on a zero-exposure day).
    pub k: f64,
    /// `S_t` before any reset (the evidence for a signal).
    pub s: f64,
    /// `S_t >= h`: the state was reset to 0.
    pub signal: bool,
}

impl CusumState {
    /// Advance by one day with `count` events in `exposure` camera-nights.
    pub fn step(
        &mut self,
        params: &CusumParams,
        count: u64,
        exposure: f64,
    ) -> Result<CusumStep, CusumError> {
        if !(exposure.is_finite() && exposure >= 0.0) {
            return Err(CusumError::Exposure(exposure));
        }
        if exposure == 0.0 {
            return Ok(CusumStep {
                k: 0.0,
                s: self.s,
                signal: false,
            });
        }
        let k = params.reference_value(exposure);
        let s = (self.s + count as f64 - k).max(0.0);
        let signal = s >= params.h;
        self.s = if signal { 0.0 } else { s };
        Ok(CusumStep { k, s, signal })
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)]
mod tests {
    use super::*;
    use crate::activity::test_reference::reference;

    #[test]
    fn matches_independent_python_cusum() {
        // Reference: gen_activity.py's own implementation of Lucas's
        // recursion, with zero-exposure days and resets in the sequences.
        let data = reference();
        let cases = data["cusum"].as_array().unwrap();
        assert!(!cases.is_empty());
        let (mut signals, mut zero_days, mut worst) = (0, 0, 0.0f64);
        for case in cases {
            let f = |k: &str| case[k].as_f64().unwrap();
            let params = CusumParams::new(f("rate"), f("ratio"), f("h"), f("floor")).unwrap();
            assert!((params.r0() - f("r0")).abs() <= 1e-15 * f("r0"));
            let mut state = CusumState::default();
            let xs = case["x"].as_array().unwrap();
            let es = case["e"].as_array().unwrap();
            let ks = case["k"].as_array().unwrap();
            let ss = case["s"].as_array().unwrap();
            let sig = case["signal"].as_array().unwrap();
            for i in 0..xs.len() {
                let e = es[i].as_f64().unwrap();
                zero_days += usize::from(e == 0.0);
                let step = state.step(&params, xs[i].as_u64().unwrap(), e).unwrap();
                let (dk, ds) = (
                    (step.k - ks[i].as_f64().unwrap()).abs(),
                    (step.s - ss[i].as_f64().unwrap()).abs(),
                );
                worst = worst.max(dk).max(ds);
                assert!(dk <= 1e-12 && ds <= 1e-12, "day {i}: {step:?} in {case}");
                assert_eq!(step.signal, sig[i].as_bool().unwrap(), "day {i}");
                signals += usize::from(step.signal);
            }
        }
        assert!(
            signals >= 2 && zero_days >= 2,
            "sequences must exercise resets and e = 0"
        );
        eprintln!("cusum worst abs err vs python: {worst:e}");
    }

    #[test]
    fn worked_example_by_hand() {
        // Definition (METHODS 4): r0 = 0.1, r1 = 0.2, e = 10: k = 1 / ln 2 =
        // 1.4427. Counts 4, 0 (e = 0), 4 give S = 2.5573, unchanged, 5.1146
        // >= h = 5: signal and reset; then 0 gives S = 0.
        let p = CusumParams::new(0.1, 2.0, 5.0, 1e-3).unwrap();
        let k = 1.0 / std::f64::consts::LN_2;
        let mut st = CusumState::default();
        let a = st.step(&p, 4, 10.0).unwrap();
        assert!((a.k - k).abs() < 1e-14 && (a.s - (4.0 - k)).abs() < 1e-14 && !a.signal);
        let b = st.step(&p, 3, 0.0).unwrap();
        assert_eq!((b.k, b.s, b.signal), (0.0, a.s, false));
        let c = st.step(&p, 4, 10.0).unwrap();
        assert!((c.s - (8.0 - 2.0 * k)).abs() < 1e-14 && c.signal);
        assert_eq!(st.s, 0.0);
        assert_eq!(st.step(&p, 0, 10.0).unwrap().s, 0.0);
    }

    #[test]
    fn floor_and_validation() {
        let p = CusumParams::new(0.0, 3.0, 4.0, rate_floor(14.0, 28.0)).unwrap();
        assert_eq!(p.r0(), 0.5 / 42.0);
        assert!(p.reference_value(1.0).is_finite() && p.reference_value(1.0) > 0.0);
        assert!(CusumParams::new(0.1, 1.0, 4.0, 1e-3).is_err());
        assert!(CusumParams::new(0.1, 2.0, 0.0, 1e-3).is_err());
        assert!(CusumParams::new(0.1, 2.0, 4.0, 0.0).is_err());
        let mut st = CusumState::default();
        assert!(st.step(&p, 1, -1.0).is_err());
        assert!(st.step(&p, 1, f64::NAN).is_err());
    }

    #[test]
    fn state_round_trips_through_json() {
        let st = CusumState {
            s: 2.345_678_901_234_5,
        };
        let json = serde_json::to_string(&st).unwrap();
        assert_eq!(serde_json::from_str::<CusumState>(&json).unwrap(), st);
        let p = CusumParams::new(0.2, 2.0, 4.0, 1e-3).unwrap();
        let back: CusumParams = serde_json::from_str(&serde_json::to_string(&p).unwrap()).unwrap();
        assert_eq!(back, p);
    }
}
