//! Delivery retry schedule and the retriable / permanent classification of
//! channel answers.
//!
//! Role: pure arithmetic on instants for the outbox worker, which owns the
//! attempts and the sleeping. No I/O, no clock.
//!
//! Schedule (DESIGN.md "Delivery"): after the n-th failed attempt the next
//! one waits 1 min x 2^(n-1), capped at 1 h: 1, 2, 4, 8, 16, 32, 60, 60, ...
//! minutes. Delivery gives up 24 h after the first attempt: the last attempt
//! is made at that deadline (the wait is shortened to meet it), and after it
//! fails [`RetrySchedule::next_attempt`] returns `None` and the notice is
//! marked failed. Against a channel that always fails that is 30 attempts
//! (docs/notices.md has the table).

use chrono::{DateTime, Duration, Utc};

/// The outcome of one delivery attempt, for the outbox.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Outcome {
    /// Accepted by the receiver: done.
    Delivered,
    /// Try again later per the schedule (also what a network error or a
    /// timeout is).
    Retriable,
    /// Will not succeed by waiting: mark failed now.
    Permanent,
}

/// Exponential back-off with a cap and a give-up deadline.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct RetrySchedule {
    /// Wait after the first failure.
    pub base: Duration,
    /// Longest wait between attempts.
    pub cap: Duration,
    /// Measured from the first attempt; no attempt after it.
    pub give_up_after: Duration,
}

impl Default for RetrySchedule {
    fn default() -> Self {
        RetrySchedule {
            base: Duration::minutes(1),
            cap: Duration::hours(1),
            give_up_after: Duration::hours(24),
        }
    }
}

impl RetrySchedule {
    /// The wait after `attempts` attempts have failed (0 attempts: no wait).
    pub fn delay(&self, attempts: u32) -> Duration {
        if attempts == 0 {
            return Duration::zero();
        }
        // Doubling overflows nothing: stop as soon as the cap is reached.
        let mut d = self.base;
        for _ in 1..attempts {
            if d >= self.cap {
                break;
            }
            d = d + d;
        }
        d.min(self.cap)
    }

    /// When to try again after `attempts` failed attempts, the last one
    /// ending at `now`; `None` when the deadline (first attempt +
    /// `give_up_after`) has been reached: mark the notice failed.
    pub fn next_attempt(
        &self,
        first_attempt: DateTime<Utc>,
        attempts: u32,
        now: DateTime<Utc>,
    ) -> Option<DateTime<Utc>> {
        let deadline = first_attempt + self.give_up_after;
        if now >= deadline {
            return None;
        }
        Some((now + self.delay(attempts)).min(deadline))
    }
}

/// [`RetrySchedule::next_attempt`] with the default schedule.
pub fn next_attempt(
    first_attempt: DateTime<Utc>,
    attempts: u32,
    now: DateTime<Utc>,
) -> Option<DateTime<Utc>> {
    RetrySchedule::default().next_attempt(first_attempt, attempts, now)
}

/// An SMTP reply code to the final command of a transaction (RFC 5321
/// §4.2.1: 2yz done, 4yz transient, 5yz permanent). Anything else (1yz, 3yz
/// where a final reply was due, or out of range) is a protocol surprise and
/// is retried until the deadline.
pub fn classify_smtp(code: u16) -> Outcome {
    match code {
        200..=299 => Outcome::Delivered,
        500..=599 => Outcome::Permanent,
        _ => Outcome::Retriable,
    }
}

/// An HTTP status code from a webhook receiver (RFC 9110 §15). 2xx done;
/// 408 (timeout), 429 (too many requests) and 5xx retriable; any other 4xx
/// permanent. Redirects (3xx) are permanent: the webhook client does not
/// follow them (a signed body must not be re-sent to another address), so
/// the subscriber has to fix the URL. 1xx or out of range: retriable.
pub fn classify_http(status: u16) -> Outcome {
    match status {
        200..=299 => Outcome::Delivered,
        408 | 429 => Outcome::Retriable,
        300..=499 => Outcome::Permanent,
        500..=599 => Outcome::Retriable,
        _ => Outcome::Retriable,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::notify::notice::tests::utc;
    use proptest::prelude::*;

    #[test]
    fn backoff_grows_to_max() {
        // 1 min doubling to a 1 h cap: DESIGN.md "Delivery".
        let s = RetrySchedule::default();
        let minutes: Vec<i64> = (0..=10).map(|n| s.delay(n).num_minutes()).collect();
        assert_eq!(minutes, [0, 1, 2, 4, 8, 16, 32, 60, 60, 60, 60]);
        assert_eq!(s.delay(u32::MAX), Duration::hours(1));
    }

    #[test]
    fn always_failing_channel_gets_30_attempts_over_24_hours() {
        // Worked by hand from the rule: attempts at 0, 1, 3, 7, 15, 31, 63
        // minutes, then every 60 min: 123, ..., 1383 (22 more), then the
        // deadline 1440. 1 + 6 + 22 + 1 = 30.
        let first = utc(2025, 7, 14, 16, 15);
        let mut now = first;
        let mut at = vec![0i64];
        let mut attempts = 1;
        while let Some(next) = next_attempt(first, attempts, now) {
            assert!(next > now);
            now = next;
            attempts += 1;
            at.push((now - first).num_minutes());
        }
        assert_eq!(at.len(), 30);
        assert_eq!(&at[..8], &[0, 1, 3, 7, 15, 31, 63, 123]);
        assert_eq!(at[28], 1383);
        assert_eq!(at[29], 1440);
        assert_eq!(now, first + Duration::hours(24));
    }

    #[test]
    fn gives_up_at_the_deadline_even_if_attempts_were_late() {
        let first = utc(2025, 7, 14, 16, 15);
        // The worker was down for a day: nothing more to do.
        assert_eq!(next_attempt(first, 3, first + Duration::hours(25)), None);
        // Just before the deadline the wait is shortened to meet it.
        let now = first + Duration::hours(24) - Duration::minutes(5);
        assert_eq!(
            next_attempt(first, 9, now),
            Some(first + Duration::hours(24))
        );
    }

    #[test]
    fn smtp_reply_codes() {
        // Reply code classes of RFC 5321 §4.2.1 (from memory): 2yz positive
        // completion, 4yz transient negative, 5yz permanent negative.
        for c in [250, 251, 221] {
            assert_eq!(classify_smtp(c), Outcome::Delivered, "{c}");
        }
        for c in [421, 450, 451, 452] {
            assert_eq!(classify_smtp(c), Outcome::Retriable, "{c}");
        }
        for c in [500, 550, 552, 553, 554] {
            assert_eq!(classify_smtp(c), Outcome::Permanent, "{c}");
        }
        for c in [0, 199, 354, 600] {
            assert_eq!(classify_smtp(c), Outcome::Retriable, "{c}");
        }
    }

    #[test]
    fn http_status_codes() {
        // Status classes of RFC 9110 §15 (from memory); 408 and 429 are the
        // 4xx codes that mean "try later" (common practice).
        for c in [200, 201, 202, 204, 299] {
            assert_eq!(classify_http(c), Outcome::Delivered, "{c}");
        }
        for c in [408, 429, 500, 502, 503, 504, 599] {
            assert_eq!(classify_http(c), Outcome::Retriable, "{c}");
        }
        for c in [
            400, 401, 403, 404, 405, 410, 413, 422, 499, 301, 302, 307, 308,
        ] {
            assert_eq!(classify_http(c), Outcome::Permanent, "{c}");
        }
        for c in [100, 0, 600] {
            assert_eq!(classify_http(c), Outcome::Retriable, "{c}");
        }
    }

    proptest! {
        #[test]
        fn next_attempt_is_after_now_and_never_past_the_deadline(
            attempts in 0u32..100, elapsed_s in 0i64..(30 * 3600)
        ) {
            let first = utc(2025, 7, 14, 16, 15);
            let now = first + Duration::seconds(elapsed_s);
            match next_attempt(first, attempts, now) {
                None => prop_assert!(now >= first + Duration::hours(24)),
                Some(t) => {
                    prop_assert!(t <= first + Duration::hours(24));
                    prop_assert!(t >= now);
                    prop_assert!(t - now <= Duration::hours(1));
                    if attempts > 0 { prop_assert!(t > now); }
                }
            }
        }
    }
}
