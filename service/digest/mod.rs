//! The daily digest: one message per subscriber at `digest_at` local time
//! covering the 24 h before it in the subscriber's area.
//!
//! Role: the numbers a landholder or coordinator reads over breakfast. The
//! engine fills the activity part from its working set
//! ([`crate::engine::Engine::digest`]): per site and species the
//! independent events of the last 24 h against the usual level (the same
//! gamma-Poisson baseline as the spike test, METHODS 3) with the RAI
//! (METHODS 2), a 14-night series for the chart, and the silent cameras.
//! The store adds, in the same transaction that queues the digest, the
//! notices of the period (sent, folded, deferred) and, for coordinators,
//! the deliveries that failed. [`render`] turns it into text, HTML and a
//! PNG chart ([`chart`]). No I/O here.
//!
//! Schedule (METHODS 6): the digest is due at the instant the subscriber's
//! clock reads `digest_at` (a fold: the first occurrence; a gap: the first
//! instant after the jump; [`crate::calendar::next_occurrence`]). A digest
//! is recorded under its due instant, once; after downtime only the latest
//! missed digest is sent, once, at start (see [`catch_up`]).

pub mod chart;
pub mod render;

use chrono::{DateTime, Duration, NaiveDate, NaiveTime, Utc};
use chrono_tz::Tz;
use serde::{Deserialize, Serialize};

/// Nights in the digest chart.
pub const CHART_NIGHTS: usize = 14;

/// One digest, as queued in the store and rendered at send time.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Digest {
    pub subscriber_id: String,
    /// The scheduled instant (its identity with the subscriber).
    pub due_at: DateTime<Utc>,
    /// The period covered: `[from, to)`, the 24 h before `due_at`.
    pub from: DateTime<Utc>,
    pub to: DateTime<Utc>,
    /// Independent events per site and species in the period (only pairs
    /// with at least one event), watched species first.
    pub rows: Vec<ActivityRow>,
    /// The last [`CHART_NIGHTS`] periods of 24 h ending at `due_at`, oldest
    /// first, for the watched species over the covered sites.
    pub nights: Vec<NightTotal>,
    /// Covered cameras with no sign of life for the silence limit.
    pub silent: Vec<SilentCamera>,
    /// Covered sites and their camera-nights in the period (effort), so a
    /// quiet digest can still say how many cameras were watching.
    pub cameras: usize,
    pub camera_nights: f64,
    /// Notice decisions of the period for this subscriber (added by the store).
    #[serde(default)]
    pub notices: Vec<NoticeLine>,
    /// Whether this subscriber sees delivery failures (a coordinator:
    /// `area = "all"`).
    pub coordinator: bool,
    /// Deliveries that failed for good in the period, any subscriber
    /// (coordinators only; added by the store).
    #[serde(default)]
    pub failures: Vec<FailedDelivery>,
}

/// Events of one species at one site in the period.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ActivityRow {
    pub deployment_id: String,
    pub site_label: String,
    pub scientific_name: String,
    /// A common name from the messages, when one was given.
    pub vernacular_name: Option<String>,
    /// Whether one of the subscriber's watches names this species.
    pub watched: bool,
    pub events: u64,
    /// Camera-nights of the site in the period.
    pub camera_nights: f64,
    /// Events the baseline expects over those camera-nights (posterior
    /// mean x exposure); `None` when the baseline cannot be formed.
    pub expected: Option<f64>,
    /// `P(Y >= events)` under the baseline's predictive distribution.
    pub p_value: Option<f64>,
    /// Whether that chance is below the configured alpha.
    pub above_usual: bool,
    /// 100 x events / camera-nights; `None` at zero effort.
    pub rai: Option<f64>,
}

/// One 24 h period of the chart.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct NightTotal {
    /// The local date on which the period ends (the morning after).
    pub date: NaiveDate,
    pub events: u64,
    /// Sum over sites and species of the baseline's expected count.
    pub expected: f64,
    /// The top of the usual range: the largest count a Poisson variable
    /// with mean `expected` reaches at least 1 time in 20.
    pub usual_high: u64,
}

/// A covered camera that has gone quiet.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SilentCamera {
    pub deployment_id: String,
    pub site_label: String,
    pub last_sign: DateTime<Utc>,
}

/// One notice decision, in brief.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct NoticeLine {
    pub at: DateTime<Utc>,
    pub watch: String,
    pub trigger: String,
    pub disposition: String,
    pub deployment_id: String,
    pub scientific_name: Option<String>,
    pub reason: String,
}

/// A delivery given up on.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FailedDelivery {
    pub subscriber_id: String,
    pub channel: String,
    pub notice_id: String,
    pub at: DateTime<Utc>,
    pub error: String,
}

impl Digest {
    /// Whether there is anything to report beyond "all quiet".
    pub fn is_quiet(&self) -> bool {
        self.rows.is_empty()
            && self.silent.is_empty()
            && self.notices.is_empty()
            && self.failures.is_empty()
    }

    /// A stable id: the subscriber and the due instant.
    pub fn id(&self) -> String {
        format!(
            "digest-{}-{}",
            self.subscriber_id,
            self.due_at.format("%Y%m%dT%H%M%SZ")
        )
    }
}

/// The period a digest due at `due` covers.
pub fn period(due: DateTime<Utc>) -> (DateTime<Utc>, DateTime<Utc>) {
    (due - Duration::hours(24), due)
}

/// The latest scheduled instant at or before `now`.
pub fn latest_due(now: DateTime<Utc>, at: NaiveTime, tz: Tz) -> DateTime<Utc> {
    // next_occurrence is strictly after its argument and within 49 h, so
    // step from two days back.
    let mut t = crate::calendar::next_occurrence(now - Duration::hours(50), at, tz);
    loop {
        let next = crate::calendar::next_occurrence(t, at, tz);
        if next > now {
            return t;
        }
        t = next;
    }
}

/// What a starting service does about one subscriber's digests, given the
/// due instant of the last digest it recorded (`None`: never).
///
/// Returns `(catch_up, next)`: a missed digest to send now (at most one:
/// the latest one missed), and the next scheduled instant after `now`.
/// A subscriber with no digest on record starts with the next one, so a
/// first start never sends a digest for a day the service did not see.
pub fn catch_up(
    last: Option<DateTime<Utc>>,
    now: DateTime<Utc>,
    at: NaiveTime,
    tz: Tz,
) -> (Option<DateTime<Utc>>, DateTime<Utc>) {
    let latest = latest_due(now, at, tz);
    let next = crate::calendar::next_occurrence(now, at, tz);
    match last {
        Some(l) if l < latest => (Some(latest), next),
        _ => (None, next),
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)]
mod tests {
    use super::*;
    use chrono::TimeZone;
    use chrono_tz::Australia::Sydney;

    fn utc(y: i32, m: u32, d: u32, h: u32, min: u32) -> DateTime<Utc> {
        Utc.with_ymd_and_hms(y, m, d, h, min, 0).unwrap()
    }
    fn t(h: u32, m: u32) -> NaiveTime {
        NaiveTime::from_hms_opt(h, m, 0).unwrap()
    }

    #[test]
    fn latest_due_is_at_or_before_now() {
        // 06:30 AEST on 2026-06-10 is 20:30 UTC on 06-09.
        let due = utc(2026, 6, 9, 20, 30);
        assert_eq!(latest_due(due, t(6, 30), Sydney), due);
        assert_eq!(
            latest_due(due - Duration::seconds(1), t(6, 30), Sydney),
            due - Duration::hours(24)
        );
    }

    #[test]
    fn catch_up_sends_the_latest_missed_digest_once() {
        let at = t(6, 30);
        // Down from before the 06-08 digest until after the 06-10 one.
        let last = Some(utc(2026, 6, 6, 20, 30));
        let now = utc(2026, 6, 10, 1, 0);
        let (missed, next) = catch_up(last, now, at, Sydney);
        assert_eq!(missed, Some(utc(2026, 6, 9, 20, 30)));
        assert_eq!(next, utc(2026, 6, 10, 20, 30));
        // Restarted again after sending it: nothing more.
        let (missed, _) = catch_up(missed, now + Duration::minutes(5), at, Sydney);
        assert_eq!(missed, None);
        // Never sent one: start with the next.
        assert_eq!(catch_up(None, now, at, Sydney).0, None);
    }

    #[test]
    fn schedule_across_the_sydney_changes() {
        // Spring forward 2026-10-04 02:00 AEST -> 03:00 AEDT: a digest at
        // 02:30 goes at the jump (16:00 UTC), the next day at 02:30 AEDT.
        // Autumn 2026-04-05 03:00 AEDT -> 02:00 AEST: 02:30 happens twice;
        // the first (AEDT, 15:30 UTC) counts. The same instants are checked
        // against Python zoneinfo in calendar::local's reference tests.
        let at = t(2, 30);
        let mut due = latest_due(utc(2026, 10, 2, 12, 0), at, Sydney);
        let mut seen = Vec::new();
        for _ in 0..4 {
            due = crate::calendar::next_occurrence(due, at, Sydney);
            seen.push(due);
        }
        assert_eq!(
            seen,
            vec![
                utc(2026, 10, 2, 16, 30), // 10-03 02:30 AEST
                utc(2026, 10, 3, 16, 0),  // 10-04 in the gap: 03:00 AEDT
                utc(2026, 10, 4, 15, 30), // 10-05 02:30 AEDT
                utc(2026, 10, 5, 15, 30),
            ]
        );
        let fold = crate::calendar::next_occurrence(utc(2026, 4, 4, 12, 0), at, Sydney);
        assert_eq!(fold, utc(2026, 4, 4, 15, 30));
        // The day after the fold: 02:30 AEST = 16:30 UTC, 25 h later.
        let after = crate::calendar::next_occurrence(fold, at, Sydney);
        assert_eq!(after - fold, Duration::hours(25));
    }
}
