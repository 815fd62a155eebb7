//! Local wall-clock times in IANA zones: resolving them to instants, daily
//! buckets, and the next daily occurrence.
//!
//! Owns [`resolve_local`], [`next_occurrence`], [`local_day_bounds`] and
//! [`local_date_of`]. Instants are UTC; zones come from chrono-tz (the IANA
//! database). Reference: Python zoneinfo (tests/reference/gen_time.py).
//!
//! Conventions (METHODS.md section 6):
//! - A local time that occurs twice (autumn fold) resolves to its first
//!   occurrence (the earlier instant, still on daylight time).
//! - A local time that does not exist (spring-forward gap) resolves to the
//!   first instant after the jump, i.e. the transition instant itself: in
//!   Sydney on 2026-10-04 every time from 02:00 to 02:59 resolves to 03:00
//!   AEDT (16:00 UTC). This keeps a digest scheduled in the gap on its own
//!   day and as close as possible to the time asked for.
//! - A local day is [local midnight, next local midnight): 23 h or 25 h on a
//!   change day in Sydney. A midnight that falls in a gap (some zones) starts
//!   the day at the transition instant.
//!
//! Pure: every instant is passed in.

use chrono::{DateTime, Duration, LocalResult, NaiveDate, NaiveDateTime, NaiveTime, TimeZone, Utc};
use chrono_tz::Tz;

/// The local date of an instant in `tz`.
pub fn local_date_of(instant: DateTime<Utc>, tz: Tz) -> NaiveDate {
    instant.with_timezone(&tz).date_naive()
}

/// The instant at which the local clock in `tz` reads `date` `time`; in a
/// fold the first occurrence, in a gap the first instant after the jump.
pub fn resolve_local(date: NaiveDate, time: NaiveTime, tz: Tz) -> DateTime<Utc> {
    let local = date.and_time(time);
    match tz.from_local_datetime(&local) {
        LocalResult::Single(t) => t.with_timezone(&Utc),
        LocalResult::Ambiguous(first, second) => {
            first.with_timezone(&Utc).min(second.with_timezone(&Utc))
        }
        LocalResult::None => first_instant_at_or_after(local, tz),
    }
}

/// Smallest whole-second instant whose local reading is >= `local`, by
/// bisection. UTC offsets lie within -12 h..+14 h, so `local` - 27 h read as
/// UTC reads earlier than `local` everywhere and `local` + 27 h reads later;
/// local readings only jump forward inside a gap, so the reading is monotone
/// over the bracket in every real zone.
fn first_instant_at_or_after(local: NaiveDateTime, tz: Tz) -> DateTime<Utc> {
    let reads = |secs: i64| {
        DateTime::<Utc>::from_timestamp(secs, 0).map(|u| u.with_timezone(&tz).naive_local())
    };
    let base = local.and_utc().timestamp();
    let mut lo = base - 27 * 3600; // reads < local
    let mut hi = base + 27 * 3600; // reads >= local
    while hi - lo > 1 {
        let mid = lo + (hi - lo) / 2;
        match reads(mid) {
            Some(r) if r >= local => hi = mid,
            Some(_) => lo = mid,
            None => break,
        }
    }
    DateTime::<Utc>::from_timestamp(hi, 0).unwrap_or(local.and_utc())
}

/// The first instant strictly after `after` at which the local clock in
/// `tz` reads `time` (resolved with [`resolve_local`]): the next run of a
/// daily schedule such as the digest. Always within 49 h of `after`.
pub fn next_occurrence(after: DateTime<Utc>, time: NaiveTime, tz: Tz) -> DateTime<Utc> {
    let today = local_date_of(after, tz);
    let mut date = today - Duration::days(1);
    for _ in 0..4 {
        let at = resolve_local(date, time, tz);
        if at > after {
            return at;
        }
        date += Duration::days(1);
    }
    // Unreachable for real zones (the loop covers yesterday..+2 days);
    // fall back to one day later.
    after + Duration::days(1)
}

/// [start, end) of the local date in `tz`: local midnight to the next local
/// midnight (each resolved with [`resolve_local`]).
pub fn local_day_bounds(date: NaiveDate, tz: Tz) -> (DateTime<Utc>, DateTime<Utc>) {
    let start = resolve_local(date, NaiveTime::MIN, tz);
    let next = date.succ_opt().unwrap_or(date);
    (start, resolve_local(next, NaiveTime::MIN, tz))
}

#[cfg(test)]
mod tests {
    use super::*;
    use chrono_tz::Australia::Sydney;
    use proptest::prelude::*;

    fn d(y: i32, m: u32, day: u32) -> NaiveDate {
        NaiveDate::from_ymd_opt(y, m, day).unwrap()
    }
    fn t(h: u32, m: u32) -> NaiveTime {
        NaiveTime::from_hms_opt(h, m, 0).unwrap()
    }

    #[test]
    fn sydney_gap_and_fold() {
        // Australia/Sydney 2026: DST ends Sun 5 April 03:00 AEDT -> 02:00 AEST,
        // starts Sun 4 October 02:00 AEST -> 03:00 AEDT (NSW rule: first Sunday
        // of April / October; from memory, checked by the zoneinfo data).
        let fold = resolve_local(d(2026, 4, 5), t(2, 30), Sydney);
        assert_eq!(fold, Utc.with_ymd_and_hms(2026, 4, 4, 15, 30, 0).unwrap());
        let gap = resolve_local(d(2026, 10, 4), t(2, 30), Sydney);
        assert_eq!(gap, Utc.with_ymd_and_hms(2026, 10, 3, 16, 0, 0).unwrap());
    }

    #[test]
    fn change_days_last_23_and_25_hours() {
        let (s, e) = local_day_bounds(d(2026, 4, 5), Sydney);
        assert_eq!((e - s).num_hours(), 25);
        let (s, e) = local_day_bounds(d(2026, 10, 4), Sydney);
        assert_eq!((e - s).num_hours(), 23);
        let (s, e) = local_day_bounds(d(2026, 7, 1), Sydney);
        assert_eq!((e - s).num_hours(), 24);
    }

    fn zones() -> impl Strategy<Value = Tz> {
        prop_oneof![
            Just(chrono_tz::Australia::Sydney),
            Just(chrono_tz::Australia::Lord_Howe),
            Just(chrono_tz::Australia::Adelaide),
            Just(chrono_tz::Australia::Perth),
            Just(chrono_tz::America::New_York),
            Just(chrono_tz::Europe::London),
            Just(chrono_tz::Pacific::Apia),
        ]
    }

    proptest! {
        #[test]
        fn next_occurrence_is_after_and_within_49_hours(
            // 2010-01-01 .. 2035-01-01, any second.
            secs in 1_262_304_000i64..2_051_222_400,
            h in 0u32..24, m in 0u32..60, tz in zones(),
        ) {
            let after = DateTime::<Utc>::from_timestamp(secs, 0).unwrap();
            let next = next_occurrence(after, t(h, m), tz);
            prop_assert!(next > after);
            prop_assert!(next < after + Duration::hours(49));
            // It is the earliest resolved occurrence after `after`.
            let first = local_date_of(after, tz) - Duration::days(2);
            for k in 0..6 {
                let at = resolve_local(first + Duration::days(k), t(h, m), tz);
                prop_assert!(at <= after || at >= next);
            }
        }

        #[test]
        fn resolve_reads_back_or_is_a_transition(
            days in 0i64..9_000, h in 0u32..24, m in 0u32..60, tz in zones(),
        ) {
            let date = d(2010, 1, 1) + Duration::days(days);
            let at = resolve_local(date, t(h, m), tz);
            let reads = at.with_timezone(&tz).naive_local();
            let wanted = date.and_time(t(h, m));
            if reads != wanted {
                // Gap: the reading is later, and one second earlier the
                // clock read before the wanted time.
                prop_assert!(reads > wanted);
                let before = (at - Duration::seconds(1)).with_timezone(&tz).naive_local();
                prop_assert!(before < wanted);
            } else {
                // First occurrence: an hour or less earlier does not read it
                // (folds in these zones are 30 or 60 minutes).
                for back in [30i64, 60] {
                    let e = (at - Duration::minutes(back)).with_timezone(&tz).naive_local();
                    prop_assert!(e != wanted);
                }
            }
        }

        #[test]
        fn day_bounds_contain_their_dates_instants(secs in 1_262_304_000i64..2_051_222_400, tz in prop_oneof![
            Just(chrono_tz::Australia::Sydney), Just(chrono_tz::Australia::Lord_Howe), Just(chrono_tz::Europe::London)]) {
            let i = DateTime::<Utc>::from_timestamp(secs, 0).unwrap();
            let (s, e) = local_day_bounds(local_date_of(i, tz), tz);
            prop_assert!(s <= i && i < e);
            let hours = (e - s).num_minutes();
            prop_assert!([23 * 60, 23 * 60 + 30, 24 * 60, 24 * 60 + 30, 25 * 60].contains(&hours));
        }
    }
    fn reference() -> serde_json::Value {
        serde_json::from_str(include_str!(concat!(
            env!("CARGO_MANIFEST_DIR"),
            "/tests/reference/data/time.json"
        )))
        .unwrap()
    }

    fn utc(v: &serde_json::Value) -> DateTime<Utc> {
        v.as_str().unwrap().parse().unwrap()
    }
    fn zone(v: &serde_json::Value) -> Tz {
        v["tz"].as_str().unwrap().parse().unwrap()
    }

    #[test]
    fn resolve_matches_zoneinfo() {
        // Source: Python zoneinfo + tzdata 2026.6 (tests/reference/gen_time.py):
        // PEP 495 fold=0 for the first occurrence; gap -> transition instant
        // found by scanning UTC seconds. Sydney, Lord Howe, Adelaide,
        // Brisbane, Perth, London, New York change days of 2026.
        let data = reference();
        let mut kinds = std::collections::BTreeMap::new();
        for r in data["resolve"].as_array().unwrap() {
            let date: NaiveDate = r["date"].as_str().unwrap().parse().unwrap();
            let time = NaiveTime::parse_from_str(r["time"].as_str().unwrap(), "%H:%M").unwrap();
            assert_eq!(resolve_local(date, time, zone(r)), utc(&r["utc"]), "{r}");
            *kinds
                .entry(r["kind"].as_str().unwrap().to_string())
                .or_insert(0) += 1;
        }
        // The data really exercises gaps and folds.
        assert!(kinds["gap"] >= 10 && kinds["fold"] >= 10, "{kinds:?}");
    }

    #[test]
    fn day_bounds_match_zoneinfo() {
        // Source: zoneinfo, [local midnight, next local midnight).
        let data = reference();
        for b in data["day_bounds"].as_array().unwrap() {
            let date: NaiveDate = b["date"].as_str().unwrap().parse().unwrap();
            let (s, e) = local_day_bounds(date, zone(b));
            assert_eq!((s, e), (utc(&b["start"]), utc(&b["end"])), "{b}");
            assert_eq!((e - s).num_minutes(), b["minutes"].as_i64().unwrap());
        }
    }

    #[test]
    fn local_dates_match_zoneinfo() {
        // Source: zoneinfo local date and clock reading, every 20 minutes
        // through each change day and its neighbours.
        let data = reference();
        for s in data["samples"].as_array().unwrap() {
            let i = utc(&s["utc"]);
            let tz = zone(s);
            assert_eq!(
                local_date_of(i, tz).to_string(),
                s["local_date"].as_str().unwrap(),
                "{s}"
            );
            let clock = i.with_timezone(&tz).format("%H:%M:%S").to_string();
            assert_eq!(clock, s["local_time"].as_str().unwrap(), "{s}");
        }
    }

    #[test]
    fn next_occurrence_matches_zoneinfo() {
        // Source: zoneinfo; smallest resolved occurrence strictly after.
        let data = reference();
        for n in data["next_occurrence"].as_array().unwrap() {
            let time = NaiveTime::parse_from_str(n["time"].as_str().unwrap(), "%H:%M").unwrap();
            let got = next_occurrence(utc(&n["after"]), time, zone(n));
            assert_eq!(got, utc(&n["next"]), "{n}");
        }
    }
}
