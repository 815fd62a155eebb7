//! Sampling effort: camera uptime, camera-nights, silence, and the relative
//! abundance index (METHODS 2).
//!
//! Role: owns the uptime rule for one deployment. Pure: every query takes
//! `now` as a value.
//!
//! # The rule
//! Take, in time order, the deployment start (a person just set the camera
//! running: a sign of life), every sign of life (heartbeat or observation)
//! in [start, stop], and `stop = min(now, deploymentEnd)`. Each stretch
//! between two consecutive points counts as **up** when it is no longer than
//! the silence limit, and as **down for its whole length** (down from the
//! earlier sign) when it is strictly longer. So:
//! - a gap of exactly the limit is up; one second more and the whole gap is
//!   down (the same "strictly greater" convention as independent events);
//! - after the latest sign the camera is up until `now` while `now - last <=
//!   silence`; once the silence exceeds the limit, the whole stretch since
//!   the last sign counts as down. This is the answer a later sign would
//!   give too, so effort never has to be revised twice;
//! - `deploymentEnd` closes the record like a sign: the last stretch before
//!   it is up if no longer than the limit (no heartbeat is expected after a
//!   camera is collected).
//!
//! Signs before the start or after the end are ignored. The ledger keeps
//! runs of signs (a new run after every outage), not every sign, so memory
//! grows with the number of outages, not with heartbeats.

use chrono::{DateTime, Duration, Utc};
use std::collections::BTreeMap;
use std::ops::Bound;
use thiserror::Error;

/// Why an [`Uptime`] could not be built.
#[derive(Debug, Clone, PartialEq, Eq, Error)]
pub enum EffortError {
    #[error("deployment end {end} is before its start {start}")]
    EndBeforeStart {
        start: DateTime<Utc>,
        end: DateTime<Utc>,
    },
    #[error("silence limit must be positive")]
    NonPositiveSilence,
}

/// Uptime of one deployment, built incrementally from signs of life.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Uptime {
    start: DateTime<Utc>,
    end: Option<DateTime<Utc>>,
    silence: Duration,
    /// First sign of a run -> last sign of it. Consecutive signs inside a
    /// run are at most `silence` apart; runs are more than `silence` apart.
    runs: BTreeMap<DateTime<Utc>, DateTime<Utc>>,
}

impl Uptime {
    /// A deployment from `start` to `end` (`None`: still out) with the given
    /// silence limit.
    pub fn new(
        start: DateTime<Utc>,
        end: Option<DateTime<Utc>>,
        silence: Duration,
    ) -> Result<Self, EffortError> {
        if let Some(end) = end {
            if end < start {
                return Err(EffortError::EndBeforeStart { start, end });
            }
        }
        if silence <= Duration::zero() {
            return Err(EffortError::NonPositiveSilence);
        }
        let mut runs = BTreeMap::new();
        runs.insert(start, start);
        Ok(Uptime {
            start,
            end,
            silence,
            runs,
        })
    }

    pub fn start(&self) -> DateTime<Utc> {
        self.start
    }

    pub fn end(&self) -> Option<DateTime<Utc>> {
        self.end
    }

    pub fn silence(&self) -> Duration {
        self.silence
    }

    /// Record a sign of life (any order, duplicates allowed). Returns false
    /// when the sign lies outside the deployment and was ignored.
    pub fn record(&mut self, sign: DateTime<Utc>) -> bool {
        if sign < self.start || self.end.is_some_and(|e| sign > e) {
            return false;
        }
        let silence = self.silence;
        let prev = self
            .runs
            .range(..=sign)
            .next_back()
            .map(|(a, b)| (*a, *b))
            .filter(|(_, b)| sign <= *b || sign - *b <= silence);
        let next = self
            .runs
            .range((Bound::Excluded(sign), Bound::Unbounded))
            .next()
            .map(|(a, b)| (*a, *b))
            .filter(|(a, _)| *a - sign <= silence);
        match (prev, next) {
            (Some((pa, pb)), Some((na, nb))) => {
                self.runs.remove(&na);
                self.runs.insert(pa, pb.max(nb));
            }
            (Some((pa, pb)), None) => {
                self.runs.insert(pa, pb.max(sign));
            }
            (None, Some((na, nb))) => {
                self.runs.remove(&na);
                self.runs.insert(sign, nb);
            }
            (None, None) => {
                self.runs.insert(sign, sign);
            }
        }
        true
    }

    /// The instant where the rule stops looking: min(now, end).
    fn stop(&self, now: DateTime<Utc>) -> DateTime<Utc> {
        self.end.map_or(now, |e| e.min(now))
    }

    /// Up intervals `[from, to)` as of `now`, in time order, disjoint.
    pub fn up_intervals(&self, now: DateTime<Utc>) -> Vec<(DateTime<Utc>, DateTime<Utc>)> {
        let stop = self.stop(now);
        let mut out: Vec<(DateTime<Utc>, DateTime<Utc>)> = Vec::new();
        if stop < self.start {
            return out;
        }
        let mut last_end = None;
        for (a, b) in self.runs.range(..=stop) {
            let b = (*b).min(stop);
            if b > *a {
                out.push((*a, b));
            }
            last_end = Some(b);
        }
        if let Some(b) = last_end {
            if stop > b && stop - b <= self.silence {
                match out.last_mut() {
                    Some(iv) if iv.1 == b => iv.1 = stop,
                    _ => out.push((b, stop)),
                }
            }
        }
        out
    }

    /// Camera-nights of operation inside [from, to) as of `now`: up time /
    /// 24 h. Zero when `to <= from`.
    pub fn camera_nights(&self, from: DateTime<Utc>, to: DateTime<Utc>, now: DateTime<Utc>) -> f64 {
        if to <= from {
            return 0.0;
        }
        let mut total = Duration::zero();
        for (a, b) in self.up_intervals(now) {
            let lo = a.max(from);
            let hi = b.min(to);
            if hi > lo {
                total += hi - lo;
            }
        }
        nights(total)
    }

    /// The last sign of life at or before `now`, when the camera has been
    /// silent for strictly longer than the limit and the deployment is
    /// still running; `None` otherwise (not yet deployed, collected, or
    /// heard from recently). Feeds the silence trigger and the status page.
    pub fn silent_since(&self, now: DateTime<Utc>) -> Option<DateTime<Utc>> {
        if now < self.start || self.end.is_some_and(|e| now >= e) {
            return None;
        }
        let (_, b) = self.runs.range(..=now).next_back()?;
        if *b >= now {
            return None;
        }
        (now - *b > self.silence).then_some(*b)
    }
}

/// A duration in camera-nights (24 h each), as f64.
pub fn nights(d: Duration) -> f64 {
    let secs = d.num_seconds() as f64;
    let nanos = f64::from(d.subsec_nanos());
    (secs + nanos * 1e-9) / 86_400.0
}

/// Relative abundance index: 100 × events / camera-nights (O'Brien et al.
/// 2003, "per 100 trap-days" \[memory\]). `None` at zero (or invalid) effort:
/// the index is undefined there, not 0.
pub fn rai(events: u64, camera_nights: f64) -> Option<f64> {
    (camera_nights.is_finite() && camera_nights > 0.0)
        .then(|| 100.0 * events as f64 / camera_nights)
}

#[cfg(test)]
#[allow(clippy::unwrap_used)]
mod tests {
    use super::*;
    use crate::activity::test_reference::{reference, rel_err};
    use chrono::TimeZone;
    use proptest::prelude::*;

    fn t0() -> DateTime<Utc> {
        Utc.with_ymd_and_hms(2026, 5, 1, 0, 0, 0).unwrap()
    }

    fn h(n: i64) -> DateTime<Utc> {
        t0() + Duration::hours(n)
    }

    #[test]
    fn gap_of_exactly_the_limit_is_up_one_second_more_is_down() {
        // Worked from the rule (METHODS 2): silence 6 h.
        let mut u = Uptime::new(t0(), None, Duration::hours(6)).unwrap();
        u.record(h(6));
        assert_eq!(u.camera_nights(t0(), h(6), h(6)), 0.25);
        let mut v = Uptime::new(t0(), None, Duration::hours(6)).unwrap();
        v.record(h(6) + Duration::seconds(1));
        // The whole 6 h 1 s gap is down, measured from the start.
        let sign = h(6) + Duration::seconds(1);
        assert_eq!(v.camera_nights(t0(), sign, h(7)), 0.0);
        assert_eq!(v.camera_nights(t0(), h(7), h(7)), 3599.0 / 86_400.0);
        assert_eq!(
            v.up_intervals(h(7)),
            vec![(h(6) + Duration::seconds(1), h(7))]
        );
    }

    #[test]
    fn tail_after_last_sign_both_edges() {
        // Worked from the rule: up until now while now - last <= silence;
        // strictly longer, the whole tail is down from the last sign.
        let mut u = Uptime::new(t0(), None, Duration::hours(6)).unwrap();
        u.record(h(10));
        u.record(h(4));
        u.record(h(8));
        assert_eq!(u.camera_nights(t0(), h(100), h(16)), 16.0 / 24.0);
        assert_eq!(u.silent_since(h(16)), None);
        let later = h(16) + Duration::seconds(1);
        assert_eq!(u.camera_nights(t0(), h(100), later), 10.0 / 24.0);
        assert_eq!(u.silent_since(later), Some(h(10)));
        // A sign that ends the silence gives the same past answer.
        u.record(h(20));
        assert_eq!(u.camera_nights(t0(), h(20), h(20)), 10.0 / 24.0);
        assert_eq!(u.silent_since(h(20)), None);
    }

    #[test]
    fn deployment_end_closes_the_record() {
        let mut u = Uptime::new(t0(), Some(h(30)), Duration::hours(6)).unwrap();
        u.record(h(24));
        assert!(!u.record(h(31)), "after the end: ignored");
        assert!(
            !u.record(t0() - Duration::hours(1)),
            "before the start: ignored"
        );
        // 24 -> 30 is exactly 6 h: up to the end; nothing after the end.
        assert_eq!(u.camera_nights(t0(), h(100), h(100)), 0.0 + 6.0 / 24.0);
        assert_eq!(
            u.silent_since(h(100)),
            None,
            "collected cameras are not silent"
        );
        assert_eq!(u.camera_nights(h(24), h(30), h(100)), 0.25);
    }

    #[test]
    fn never_heard_from_is_silent_since_start() {
        let u = Uptime::new(t0(), None, Duration::hours(6)).unwrap();
        assert_eq!(u.silent_since(h(5)), None);
        assert_eq!(u.silent_since(h(7)), Some(t0()));
        assert_eq!(u.silent_since(t0() - Duration::hours(1)), None);
        assert_eq!(u.camera_nights(t0(), h(7), h(7)), 0.0);
    }

    #[test]
    fn rejects_bad_construction() {
        assert!(Uptime::new(h(2), Some(h(1)), Duration::hours(6)).is_err());
        assert!(Uptime::new(h(2), None, Duration::zero()).is_err());
    }

    #[test]
    fn rai_is_undefined_at_zero_effort() {
        // Definition (METHODS 2): RAI = 100 x events / camera-nights;
        // undefined at zero effort.
        assert_eq!(rai(3, 0.0), None);
        assert_eq!(rai(0, 0.0), None);
        assert_eq!(rai(3, f64::NAN), None);
        assert_eq!(rai(5, 20.0), Some(25.0));
        assert_eq!(rai(0, 20.0), Some(0.0));
    }

    #[test]
    fn matches_independent_python_effort() {
        // Reference: the independent uptime computation in gen_activity.py
        // (sorted points, gap test, interval overlap; written separately).
        let data = reference();
        let cases = data["effort"].as_array().unwrap();
        assert!(!cases.is_empty());
        let ts = |v: &serde_json::Value| DateTime::from_timestamp(v.as_i64().unwrap(), 0).unwrap();
        let mut worst = 0.0f64;
        for case in cases {
            let end = case["end"]
                .as_i64()
                .map(|s| DateTime::from_timestamp(s, 0).unwrap());
            let mut u = Uptime::new(
                ts(&case["start"]),
                end,
                Duration::seconds(case["silence_s"].as_i64().unwrap()),
            )
            .unwrap();
            for s in case["signs"].as_array().unwrap() {
                u.record(ts(s));
            }
            for q in case["queries"].as_array().unwrap() {
                let got = u.camera_nights(ts(&q["from"]), ts(&q["to"]), ts(&q["now"]));
                let want = q["nights"].as_f64().unwrap();
                let err = if want == 0.0 {
                    got.abs()
                } else {
                    rel_err(got, want)
                };
                worst = worst.max(err);
                assert!(err <= 1e-12, "{got} vs {want} for {q}");
                let silent = u.silent_since(ts(&q["now"])).map(|d| d.timestamp());
                assert_eq!(silent, q["silent_since"].as_i64(), "silent_since for {q}");
            }
        }
        eprintln!("effort worst rel err vs python: {worst:e}");
    }

    /// From-scratch rule, written straight from the module docs.
    fn scratch_up(
        start: i64,
        end: Option<i64>,
        silence: i64,
        signs: &[i64],
        now: i64,
    ) -> Vec<(i64, i64)> {
        let stop = end.map_or(now, |e| e.min(now));
        if stop < start {
            return vec![];
        }
        let mut pts: Vec<i64> = signs
            .iter()
            .copied()
            .filter(|s| *s >= start && *s <= stop && end.is_none_or(|e| *s <= e))
            .collect();
        pts.push(start);
        pts.push(stop);
        pts.sort();
        pts.dedup();
        let mut out: Vec<(i64, i64)> = vec![];
        for w in pts.windows(2) {
            if w[1] - w[0] <= silence {
                match out.last_mut() {
                    Some(iv) if iv.1 == w[0] => iv.1 = w[1],
                    _ => out.push((w[0], w[1])),
                }
            }
        }
        out
    }

    proptest! {
        #[test]
        fn incremental_equals_from_scratch(
            signs in proptest::collection::vec(0i64..200, 0..40),
            silence in 1i64..30,
            end in proptest::option::of(0i64..220),
            now in 0i64..240,
            start in 0i64..20,
        ) {
            // Hours as the unit; duplicates come from the narrow range.
            let end = end.map(|e| e.max(start));
            let mut u = Uptime::new(h(start), end.map(h), Duration::hours(silence)).unwrap();
            for s in &signs {
                u.record(h(*s));
                // Record again: duplicates change nothing.
                u.record(h(*s));
            }
            let want: Vec<_> = scratch_up(start, end, silence, &signs, now).into_iter().map(|(a, b)| (h(a), h(b))).collect();
            // Signs after `now` may sit in the ledger; the rule ignores
            // them, and they never change the answer for `now`.
            prop_assert_eq!(u.up_intervals(h(now)), want.clone());
            let total: i64 = want.iter().map(|(a, b)| (*b - *a).num_hours()).sum();
            prop_assert_eq!(u.camera_nights(h(0), h(300), h(now)), total as f64 / 24.0);
            let rai_v = rai(3, u.camera_nights(h(0), h(300), h(now)));
            prop_assert!(rai_v.is_none_or(|r| r >= 0.0));
        }
    }
}
