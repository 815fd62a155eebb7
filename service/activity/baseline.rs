//! Baselines and the spike test (METHODS 3): a gamma-Poisson model of a
//! site's rate per camera-night, shrunk toward the regional rate.
//!
//! Role: owns the prior, the posterior update, the baseline window and the
//! spike decision with its evidence. Pure: counts and effort come in as
//! numbers, computed by the caller from [`crate::activity::events`] and
//! [`crate::activity::effort`].
//!
//! - Prior: `a0 = r N + 0.5`, `b0 = N` (shape, rate), r the pooled regional
//!   rate, N `prior_nights`.
//! - Posterior: `a = a0 + n`, `b = b0 + t` for n events in t camera-nights
//!   of site history (conjugate gamma-Poisson; Gelman et al., BDA 3rd ed.,
//!   sec. 2.6 \[memory\]).
//! - Predictive count over e camera-nights: `NB(r = a, p = b / (b + e))`,
//!   mean `a e / b`; p-value `P(Y >= c)` from the incomplete beta function.
//! - Spike: `p < alpha && c >= min_count && c / (a e / b) >= ratio`.

use chrono::{DateTime, Duration, Utc};
use serde::{Deserialize, Serialize};
use thiserror::Error;

use super::special::nbinom_upper_tail_pair;

/// Default significance level of the spike test.
pub const DEFAULT_ALPHA: f64 = 0.01;
/// Default weight of the regional prior, in camera-nights.
pub const DEFAULT_PRIOR_NIGHTS: f64 = 14.0;
/// Default length of the baseline window, in days.
pub const DEFAULT_WINDOW_DAYS: u32 = 28;
/// Default gap between the baseline window and the current window, in days.
pub const DEFAULT_GUARD_DAYS: u32 = 1;

/// Invalid input to a baseline computation.
#[derive(Debug, Clone, PartialEq, Error)]
pub enum BaselineError {
    #[error("{name} must be finite and non-negative, got {value}")]
    Negative { name: &'static str, value: f64 },
    #[error("{name} must be finite and positive, got {value}")]
    NotPositive { name: &'static str, value: f64 },
    #[error("alpha must be in (0, 1), got {0}")]
    Alpha(f64),
    #[error("the current window has no effort: the spike test is undefined")]
    NoEffort,
    #[error("the current window ends before it starts")]
    EmptyWindow,
    #[error("window arithmetic leaves the representable range of instants")]
    OutOfRange,
}

fn non_negative(name: &'static str, value: f64) -> Result<f64, BaselineError> {
    if value.is_finite() && value >= 0.0 {
        Ok(value)
    } else {
        Err(BaselineError::Negative { name, value })
    }
}

fn positive(name: &'static str, value: f64) -> Result<f64, BaselineError> {
    if value.is_finite() && value > 0.0 {
        Ok(value)
    } else {
        Err(BaselineError::NotPositive { name, value })
    }
}

/// A gamma distribution of a rate per camera-night, shape `a`, rate `b`
/// (density `b^a l^(a-1) e^(-b l) / Γ(a)`, mean `a / b`).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct GammaRate {
    pub shape: f64,
    pub rate: f64,
}

impl GammaRate {
    /// The prior from the pooled regional rate: `a0 = r N + 0.5`, `b0 = N`.
    pub fn prior(regional_rate: f64, prior_nights: f64) -> Result<Self, BaselineError> {
        let r = non_negative("regional rate", regional_rate)?;
        let n = positive("prior nights", prior_nights)?;
        Ok(GammaRate {
            shape: r * n + 0.5,
            rate: n,
        })
    }

    /// The posterior after `events` in `nights` camera-nights.
    pub fn update(self, events: u64, nights: f64) -> Result<Self, BaselineError> {
        let t = non_negative("history nights", nights)?;
        Ok(GammaRate {
            shape: self.shape + events as f64,
            rate: self.rate + t,
        })
    }

    /// Mean rate `a / b` per camera-night.
    pub fn mean(&self) -> f64 {
        self.shape / self.rate
    }

    /// Predictive mean count over `exposure` camera-nights: `a e / b`.
    pub fn expected(&self, exposure: f64) -> f64 {
        self.shape * exposure / self.rate
    }

    /// `P(Y >= c)` for the predictive count over `exposure` camera-nights,
    /// `Y ~ NB(a, b / (b + e))`. At zero exposure `Y = 0`.
    pub fn upper_tail(&self, c: u64, exposure: f64) -> f64 {
        let total = self.rate + exposure;
        nbinom_upper_tail_pair(c, self.shape, exposure / total, self.rate / total)
    }
}

/// Pooled rate: events / camera-nights over all sites. At zero effort there
/// is no regional information: 0, which leaves the weakest prior
/// `Gamma(0.5, N)` (documented in docs/activity.md).
pub fn regional_rate(events: u64, nights: f64) -> f64 {
    if nights.is_finite() && nights > 0.0 {
        events as f64 / nights
    } else {
        0.0
    }
}

/// An interval of instants `[from, to)`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct Window {
    pub from: DateTime<Utc>,
    pub to: DateTime<Utc>,
}

/// The baseline window for a current window `[current_start, current_end)`:
/// it ends `guard_days` × 24 h before `current_start` and lasts
/// `window_days` × 24 h. Days are 24 h of real time (a window across a
/// daylight-saving change still holds 28 × 24 h of effort).
pub fn baseline_window(
    current_start: DateTime<Utc>,
    current_end: DateTime<Utc>,
    window_days: u32,
    guard_days: u32,
) -> Result<Window, BaselineError> {
    if current_end < current_start {
        return Err(BaselineError::EmptyWindow);
    }
    let to = current_start
        .checked_sub_signed(Duration::days(i64::from(guard_days)))
        .ok_or(BaselineError::OutOfRange)?;
    let from = to
        .checked_sub_signed(Duration::days(i64::from(window_days)))
        .ok_or(BaselineError::OutOfRange)?;
    Ok(Window { from, to })
}

/// Settings of the spike test.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct SpikeParams {
    /// Significance level: spike needs `p < alpha`.
    pub alpha: f64,
    /// Spike needs at least this many events in the current window.
    pub min_count: u64,
    /// Spike needs `c / expected >= ratio`.
    pub ratio: f64,
    /// Weight N of the regional prior, in camera-nights.
    pub prior_nights: f64,
}

/// What the spike test is given (all plain numbers).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct SpikeInput {
    /// c: independent events in the current window.
    pub count: u64,
    /// e: camera-nights in the current window.
    pub exposure_nights: f64,
    /// n: the site's events in the baseline window.
    pub history_events: u64,
    /// t: the site's camera-nights in the baseline window.
    pub history_nights: f64,
    /// r: pooled regional rate per camera-night in the baseline window.
    pub regional_rate: f64,
    /// The baseline window the history was counted in.
    pub baseline: Window,
}

/// Which conditions of the spike rule held.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct SpikeConditions {
    pub p_below_alpha: bool,
    pub count_at_least_min: bool,
    pub ratio_at_least_min: bool,
}

/// Everything behind a spike decision, kept with the notice.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SpikeEvidence {
    pub count: u64,
    pub exposure_nights: f64,
    pub history_events: u64,
    pub history_nights: f64,
    pub regional_rate: f64,
    pub prior_nights: f64,
    /// Posterior shape a.
    pub gamma_shape: f64,
    /// Posterior rate b (camera-nights).
    pub gamma_rate: f64,
    /// Baseline rate per camera-night, a / b.
    pub baseline_rate: f64,
    /// Predictive mean a e / b.
    pub expected: f64,
    /// c / expected.
    pub ratio: f64,
    /// P(Y >= c) under the predictive negative binomial.
    pub p_value: f64,
    pub alpha: f64,
    pub min_count: u64,
    pub min_ratio: f64,
    pub baseline_from: DateTime<Utc>,
    pub baseline_to: DateTime<Utc>,
    pub conditions: SpikeConditions,
    /// All three conditions held.
    pub spike: bool,
}

/// Run the spike test. Errors on invalid numbers and on zero current
/// effort (the predictive law is then a point mass at 0 and a ratio is
/// undefined; the caller treats it as "no test", not "no spike").
pub fn spike_test(
    input: &SpikeInput,
    params: &SpikeParams,
) -> Result<SpikeEvidence, BaselineError> {
    if !(params.alpha > 0.0 && params.alpha < 1.0) {
        return Err(BaselineError::Alpha(params.alpha));
    }
    non_negative("ratio", params.ratio)?;
    let e = non_negative("exposure nights", input.exposure_nights)?;
    if e == 0.0 {
        return Err(BaselineError::NoEffort);
    }
    let posterior = GammaRate::prior(input.regional_rate, params.prior_nights)?
        .update(input.history_events, input.history_nights)?;
    let expected = posterior.expected(e);
    let ratio = input.count as f64 / expected;
    let p_value = posterior.upper_tail(input.count, e);
    let conditions = SpikeConditions {
        p_below_alpha: p_value < params.alpha,
        count_at_least_min: input.count >= params.min_count,
        ratio_at_least_min: ratio >= params.ratio,
    };
    Ok(SpikeEvidence {
        count: input.count,
        exposure_nights: e,
        history_events: input.history_events,
        history_nights: input.history_nights,
        regional_rate: input.regional_rate,
        prior_nights: params.prior_nights,
        gamma_shape: posterior.shape,
        gamma_rate: posterior.rate,
        baseline_rate: posterior.mean(),
        expected,
        ratio,
        p_value,
        alpha: params.alpha,
        min_count: params.min_count,
        min_ratio: params.ratio,
        baseline_from: input.baseline.from,
        baseline_to: input.baseline.to,
        conditions,
        spike: conditions.p_below_alpha
            && conditions.count_at_least_min
            && conditions.ratio_at_least_min,
    })
}

#[cfg(test)]
#[allow(clippy::unwrap_used)]
mod tests {
    use super::*;
    use crate::activity::test_reference::{reference, rel_err};
    use chrono::TimeZone;
    use proptest::prelude::*;

    fn window() -> Window {
        Window {
            from: Utc.with_ymd_and_hms(2026, 6, 1, 14, 0, 0).unwrap(),
            to: Utc.with_ymd_and_hms(2026, 6, 29, 14, 0, 0).unwrap(),
        }
    }

    fn params(alpha: f64, min_count: u64, ratio: f64, prior_nights: f64) -> SpikeParams {
        SpikeParams {
            alpha,
            min_count,
            ratio,
            prior_nights,
        }
    }

    #[test]
    fn flat_prior_no_history_is_geometric() {
        // Worked example (METHODS 3): a = b = 1, no history, e = 1 gives
        // NB(1, 1/2) and P(Y >= k) = 0.5^k exactly. a0 = r N + 0.5 = 1 needs
        // r N = 0.5: N = 1, r = 0.5.
        for k in 0..60u64 {
            let input = SpikeInput {
                count: k,
                exposure_nights: 1.0,
                history_events: 0,
                history_nights: 0.0,
                regional_rate: 0.5,
                baseline: window(),
            };
            let ev = spike_test(&input, &params(0.01, 0, 0.0, 1.0)).unwrap();
            assert_eq!((ev.gamma_shape, ev.gamma_rate), (1.0, 1.0));
            assert!(rel_err(ev.p_value, 0.5f64.powi(k as i32)) <= 1e-13);
            assert_eq!(ev.expected, 1.0);
            // 0.5^7 = 0.0078 < 0.01 <= 0.5^6 = 0.0156.
            assert_eq!(ev.spike, k >= 7);
        }
    }

    #[test]
    fn matches_scipy_spike_cases() {
        // Reference: gen_activity.py computes the posterior and decision in
        // its own code and the p-value with scipy.stats.nbinom.sf(c - 1, a, p).
        let data = reference();
        let cases = data["spike"].as_array().unwrap();
        assert!(cases.len() > 50);
        let mut worst = 0.0f64;
        let mut spikes = 0;
        for case in cases {
            let f = |k: &str| case[k].as_f64().unwrap();
            let u = |k: &str| case[k].as_u64().unwrap();
            let input = SpikeInput {
                count: u("c"),
                exposure_nights: f("e"),
                history_events: u("n"),
                history_nights: f("t"),
                regional_rate: f("regional_rate"),
                baseline: window(),
            };
            let ev = spike_test(
                &input,
                &params(f("alpha"), u("min_count"), f("ratio"), f("prior_nights")),
            )
            .unwrap();
            for (got, want) in [
                (ev.gamma_shape, f("a")),
                (ev.gamma_rate, f("b")),
                (ev.expected, f("expected")),
                (ev.p_value, f("p_value")),
            ] {
                let e = rel_err(got, want);
                worst = worst.max(e);
                assert!(e <= 1e-9, "{got} vs {want} in {case}");
            }
            assert_eq!(ev.spike, case["spike"].as_bool().unwrap(), "{case}");
            spikes += usize::from(ev.spike);
        }
        assert!(
            spikes > 5 && spikes < cases.len() - 5,
            "cases must exercise both outcomes"
        );
        eprintln!("spike cases worst rel err vs scipy: {worst:e}");
    }

    #[test]
    fn sparse_new_site_does_not_alert_on_its_first_dog() {
        // DESIGN: shrinkage toward the regional rate. Regional rate 0.05 per
        // night, N = 14, no history: a = 1.2, b = 14; one event in one
        // night has mean 0.0857 and P(Y >= 1) = 1 - (14/15)^1.2 = 0.0794
        // (hand calculation from the NB pmf at 0) > 0.01.
        let input = SpikeInput {
            count: 1,
            exposure_nights: 1.0,
            history_events: 0,
            history_nights: 0.0,
            regional_rate: 0.05,
            baseline: window(),
        };
        let ev = spike_test(&input, &params(0.01, 1, 2.0, 14.0)).unwrap();
        assert!(rel_err(ev.p_value, 1.0 - (14.0f64 / 15.0).powf(1.2)) <= 1e-12);
        assert!(!ev.spike);
        assert!(ev.conditions.count_at_least_min && ev.conditions.ratio_at_least_min);
        assert!(!ev.conditions.p_below_alpha);
    }

    #[test]
    fn errors_on_bad_input() {
        let mut input = SpikeInput {
            count: 1,
            exposure_nights: 0.0,
            history_events: 0,
            history_nights: 0.0,
            regional_rate: 0.05,
            baseline: window(),
        };
        let p = params(0.01, 1, 2.0, 14.0);
        assert_eq!(spike_test(&input, &p), Err(BaselineError::NoEffort));
        input.exposure_nights = f64::NAN;
        assert!(spike_test(&input, &p).is_err());
        input.exposure_nights = 1.0;
        input.regional_rate = -1.0;
        assert!(spike_test(&input, &p).is_err());
        input.regional_rate = 0.0;
        assert!(spike_test(&input, &params(1.0, 1, 2.0, 14.0)).is_err());
        assert!(spike_test(&input, &params(0.01, 1, 2.0, 0.0)).is_err());
        assert_eq!(regional_rate(4, 0.0), 0.0);
        assert_eq!(regional_rate(4, 8.0), 0.5);
    }

    #[test]
    fn evidence_serialises_with_named_fields() {
        let input = SpikeInput {
            count: 5,
            exposure_nights: 1.0,
            history_events: 11,
            history_nights: 27.5,
            regional_rate: 0.3,
            baseline: window(),
        };
        let ev = spike_test(&input, &params(0.01, 3, 2.0, 14.0)).unwrap();
        let v = serde_json::to_value(&ev).unwrap();
        for key in [
            "count",
            "exposure_nights",
            "gamma_shape",
            "gamma_rate",
            "expected",
            "ratio",
            "p_value",
            "baseline_from",
            "baseline_to",
            "conditions",
            "spike",
        ] {
            assert!(v.get(key).is_some(), "missing {key}");
        }
        assert_eq!(v["baseline_from"], "2026-06-01T14:00:00Z");
        let back: SpikeEvidence = serde_json::from_value(v).unwrap();
        assert_eq!(back, ev);
    }

    #[test]
    fn baseline_window_arithmetic() {
        // Definition (METHODS 3): 28 days ending 1 day before the current
        // window starts. Current window: the 24 h before 2026-04-06 00:00
        // AEST; the baseline spans the 2026-04-05 fold in real 24 h days.
        let now = Utc.with_ymd_and_hms(2026, 4, 5, 14, 0, 0).unwrap();
        let start = now - Duration::hours(24);
        let w = baseline_window(start, now, 28, 1).unwrap();
        assert_eq!(w.to, Utc.with_ymd_and_hms(2026, 4, 3, 14, 0, 0).unwrap());
        assert_eq!(w.from, Utc.with_ymd_and_hms(2026, 3, 6, 14, 0, 0).unwrap());
        assert_eq!(w.to - w.from, Duration::hours(28 * 24));
        assert_eq!(
            baseline_window(now, start, 28, 1),
            Err(BaselineError::EmptyWindow)
        );
        let w0 = baseline_window(start, now, 28, 0).unwrap();
        assert_eq!(w0.to, start);
    }

    proptest! {
        #[test]
        fn p_value_is_a_probability_and_falls_with_count(
            c in 0u64..200, e in 0.01f64..60.0, n in 0u64..300, t in 0.0f64..400.0,
            r in 0.0f64..5.0, prior in 1.0f64..60.0
        ) {
            // Definition: P(Y >= c) lies in [0, 1] and does not rise with c.
            let mk = |count| SpikeInput { count, exposure_nights: e, history_events: n, history_nights: t, regional_rate: r, baseline: window() };
            let p = params(0.01, 1, 2.0, prior);
            let a = spike_test(&mk(c), &p).unwrap();
            let b = spike_test(&mk(c + 1), &p).unwrap();
            prop_assert!((0.0..=1.0).contains(&a.p_value));
            prop_assert!(b.p_value <= a.p_value * (1.0 + 1e-12));
            prop_assert!(a.expected > 0.0);
        }
    }
}
