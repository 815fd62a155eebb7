//! Watch time windows: hours of the day and seasons of the year.
//!
//! Owns [`Hours`] (`any`, local `HH:MM-HH:MM`, `dusk-to-dawn`) and [`Season`]
//! (`MM-DD..MM-DD`), their parsing from the config strings with errors that
//! say what is wrong and how to write it, and the membership tests.
//!
//! Conventions:
//! - `HH:MM-HH:MM` is [start, end) on the local wall clock of the
//!   subscriber's zone and may wrap midnight (`21:30-05:00`). The test uses
//!   the instant's own local time, so during an autumn fold both passes of
//!   the repeated hour are tested by their clock reading, and a window inside
//!   a spring-forward gap is simply not met that night. `24:00` is accepted
//!   as an end (`18:00-24:00` = `18:00-00:00`). start == end is refused: it
//!   could mean "never" or "always"; write `any` for all day.
//! - `dusk-to-dawn` is [`crate::geo::is_night`] at the site in the zone.
//! - `MM-DD..MM-DD` is inclusive on local dates and may wrap the year
//!   (`11-15..02-15`). Dates are compared as (month, day) pairs, so `02-29` is
//!   accepted as a bound: a season starting `02-29` starts on 1 March in a
//!   common year; one ending `02-29` ends on 28 February in a common year.
//!   A season whose start equals its end is that one day.
//!
//! Pure: the instant is passed in.

use crate::geo::{is_night, LatLon};
use chrono::{DateTime, Datelike, NaiveDate, NaiveTime, Utc};
use chrono_tz::Tz;
use std::fmt;
use std::str::FromStr;

/// Why a window string was refused. `Display` names the fault; `hint` says
/// how to write it.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum WindowError {
    #[error("hours {0:?} is not \"any\", \"dusk-to-dawn\" or \"HH:MM-HH:MM\"")]
    HoursSyntax(String),
    #[error("time {0:?} is not a valid HH:MM (00:00 to 23:59, two digits each)")]
    Time(String),
    #[error("hours {0:?} start and end at the same time")]
    EmptyWindow(String),
    #[error("season {0:?} is not \"MM-DD..MM-DD\"")]
    SeasonSyntax(String),
    #[error("season date {0:?} is not a valid MM-DD day of the year")]
    SeasonDate(String),
}

impl WindowError {
    /// How to write it instead.
    pub fn hint(&self) -> &'static str {
        match self {
            WindowError::HoursSyntax(_) => {
                "write hours = \"any\", \"dusk-to-dawn\", or a local range such as \"21:30-05:00\""
            }
            WindowError::Time(_) => "use 24-hour HH:MM with two digits, e.g. \"05:00\", \"21:30\"",
            WindowError::EmptyWindow(_) => {
                "a window from a time to the same time is ambiguous; write \"any\" for all day"
            }
            WindowError::SeasonSyntax(_) => {
                "write the season as two local dates with two dots, e.g. \"07-01..08-31\" \
                 (it may wrap the year: \"11-15..02-15\")"
            }
            WindowError::SeasonDate(_) => {
                "use MM-DD with a real day of that month, e.g. \"02-29\", \"04-30\", \"12-31\""
            }
        }
    }
}

/// A local clock range [start, end), wrapping midnight when end < start.
/// Built only through [`LocalHours::new`]: start != end.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct LocalHours {
    start: NaiveTime,
    end: NaiveTime,
}

impl LocalHours {
    /// A window; refused when `start == end` (ambiguous).
    pub fn new(start: NaiveTime, end: NaiveTime) -> Result<Self, WindowError> {
        if start == end {
            return Err(WindowError::EmptyWindow(format!(
                "{}-{}",
                start.format("%H:%M"),
                end.format("%H:%M")
            )));
        }
        Ok(LocalHours { start, end })
    }
    pub fn start(&self) -> NaiveTime {
        self.start
    }
    pub fn end(&self) -> NaiveTime {
        self.end
    }
    /// Whether a local clock reading is in [start, end) (wrapping).
    pub fn contains_time(&self, t: NaiveTime) -> bool {
        if self.start < self.end {
            self.start <= t && t < self.end
        } else {
            t >= self.start || t < self.end
        }
    }
}

/// A watch's hours of the day.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Hours {
    /// Always.
    Any,
    /// A local clock range in the subscriber's zone.
    Local(LocalHours),
    /// From civil dusk to civil dawn at the site.
    DuskToDawn,
}

fn parse_hhmm(s: &str, allow_24: bool) -> Result<NaiveTime, WindowError> {
    let bad = || WindowError::Time(s.to_string());
    let b = s.as_bytes();
    if b.len() != 5 || b[2] != b':' || !s.is_char_boundary(2) {
        return Err(bad());
    }
    let (h, m) = (&s[0..2], &s[3..5]);
    if !h.bytes().chain(m.bytes()).all(|c| c.is_ascii_digit()) {
        return Err(bad());
    }
    let h: u32 = h.parse().map_err(|_| bad())?;
    let m: u32 = m.parse().map_err(|_| bad())?;
    if allow_24 && h == 24 && m == 0 {
        return Ok(NaiveTime::MIN);
    }
    NaiveTime::from_hms_opt(h, m, 0).ok_or_else(bad)
}

impl FromStr for Hours {
    type Err = WindowError;
    fn from_str(s: &str) -> Result<Self, Self::Err> {
        let t = s.trim();
        match t {
            "any" => return Ok(Hours::Any),
            "dusk-to-dawn" => return Ok(Hours::DuskToDawn),
            _ => {}
        }
        let (a, b) = t
            .split_once('-')
            .ok_or_else(|| WindowError::HoursSyntax(s.to_string()))?;
        if !a.contains(':') || !b.contains(':') {
            return Err(WindowError::HoursSyntax(s.to_string()));
        }
        let start = parse_hhmm(a.trim(), false)?;
        let end = parse_hhmm(b.trim(), true)?;
        if start == end {
            return Err(WindowError::EmptyWindow(s.to_string()));
        }
        LocalHours::new(start, end).map(Hours::Local)
    }
}

impl fmt::Display for Hours {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Hours::Any => f.write_str("any"),
            Hours::DuskToDawn => f.write_str("dusk-to-dawn"),
            Hours::Local(w) => write!(f, "{}-{}", w.start.format("%H:%M"), w.end.format("%H:%M")),
        }
    }
}

impl Hours {
    /// Parse a config string (`any`, `HH:MM-HH:MM`, `dusk-to-dawn`).
    pub fn parse(s: &str) -> Result<Self, WindowError> {
        s.parse()
    }

    /// Whether the instant is inside the window: local clock in `tz` for
    /// `Local`, civil night at `site` (dates local to `tz`) for `DuskToDawn`.
    pub fn contains(&self, instant: DateTime<Utc>, tz: Tz, site: LatLon) -> bool {
        match self {
            Hours::Any => true,
            Hours::Local(w) => w.contains_time(instant.with_timezone(&tz).time()),
            Hours::DuskToDawn => is_night(instant, site, tz),
        }
    }
}

/// Inclusive range of local dates, (month, day) pairs, may wrap the year.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Season {
    start: (u32, u32),
    end: (u32, u32),
}

fn parse_mmdd(s: &str) -> Result<(u32, u32), WindowError> {
    let bad = || WindowError::SeasonDate(s.to_string());
    let (m, d) = s.split_once('-').ok_or_else(bad)?;
    if m.len() != 2 || d.len() != 2 || !m.bytes().chain(d.bytes()).all(|c| c.is_ascii_digit()) {
        return Err(bad());
    }
    let m: u32 = m.parse().map_err(|_| bad())?;
    let d: u32 = d.parse().map_err(|_| bad())?;
    // Check against a leap year so that 02-29 is a valid bound.
    NaiveDate::from_ymd_opt(2000, m, d).ok_or_else(bad)?;
    Ok((m, d))
}

impl FromStr for Season {
    type Err = WindowError;
    fn from_str(s: &str) -> Result<Self, Self::Err> {
        let (a, b) = s
            .trim()
            .split_once("..")
            .ok_or_else(|| WindowError::SeasonSyntax(s.to_string()))?;
        Ok(Season {
            start: parse_mmdd(a.trim())?,
            end: parse_mmdd(b.trim())?,
        })
    }
}

impl fmt::Display for Season {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "{:02}-{:02}..{:02}-{:02}",
            self.start.0, self.start.1, self.end.0, self.end.1
        )
    }
}

impl Season {
    /// Parse a config string `MM-DD..MM-DD`.
    pub fn parse(s: &str) -> Result<Self, WindowError> {
        s.parse()
    }

    /// Whether a local date is in the season (inclusive, may wrap).
    pub fn contains_date(&self, date: NaiveDate) -> bool {
        let d = (date.month(), date.day());
        if self.start <= self.end {
            self.start <= d && d <= self.end
        } else {
            d >= self.start || d <= self.end
        }
    }

    /// Whether the instant's local date in `tz` is in the season.
    pub fn contains(&self, instant: DateTime<Utc>, tz: Tz) -> bool {
        self.contains_date(instant.with_timezone(&tz).date_naive())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use chrono::TimeZone;
    use chrono_tz::Australia::Sydney;
    use proptest::prelude::*;

    fn t(h: u32, m: u32) -> NaiveTime {
        NaiveTime::from_hms_opt(h, m, 0).unwrap()
    }
    fn d(y: i32, m: u32, day: u32) -> NaiveDate {
        NaiveDate::from_ymd_opt(y, m, day).unwrap()
    }

    #[test]
    fn parses_the_config_forms() {
        assert_eq!(Hours::parse("any").unwrap(), Hours::Any);
        assert_eq!(Hours::parse("dusk-to-dawn").unwrap(), Hours::DuskToDawn);
        let w = Hours::parse("21:30-05:00").unwrap();
        assert_eq!(
            w,
            Hours::Local(LocalHours::new(t(21, 30), t(5, 0)).unwrap())
        );
        assert_eq!(w.to_string(), "21:30-05:00");
        assert_eq!(
            Hours::parse("18:00-24:00").unwrap(),
            Hours::Local(LocalHours::new(t(18, 0), t(0, 0)).unwrap())
        );
    }

    #[test]
    fn hours_errors() {
        assert!(matches!(
            Hours::parse("nightly"),
            Err(WindowError::HoursSyntax(_))
        ));
        assert!(matches!(
            Hours::parse("9:30-17:00"),
            Err(WindowError::Time(_))
        ));
        assert!(matches!(
            Hours::parse("21:60-05:00"),
            Err(WindowError::Time(_))
        ));
        assert!(matches!(
            Hours::parse("24:00-05:00"),
            Err(WindowError::Time(_))
        ));
        assert!(matches!(
            Hours::parse("06:00-06:00"),
            Err(WindowError::EmptyWindow(_))
        ));
        assert!(matches!(
            Hours::parse("00:00-24:00"),
            Err(WindowError::EmptyWindow(_))
        ));
        let e = Hours::parse("dusk to dawn").unwrap_err();
        assert!(e.hint().contains("dusk-to-dawn"));
    }

    #[test]
    fn wrapping_window_is_half_open() {
        let w = LocalHours::new(t(21, 30), t(5, 0)).unwrap();
        assert!(w.contains_time(t(21, 30)));
        assert!(w.contains_time(t(23, 59)));
        assert!(w.contains_time(t(0, 0)));
        assert!(w.contains_time(t(4, 59)));
        assert!(!w.contains_time(t(5, 0)));
        assert!(!w.contains_time(t(21, 29)));
        let day = LocalHours::new(t(9, 0), t(17, 0)).unwrap();
        assert!(day.contains_time(t(9, 0)) && !day.contains_time(t(17, 0)));
    }

    #[test]
    fn window_uses_the_instants_local_time() {
        // 2026-01-10 11:00 UTC is 22:00 AEDT (UTC+11) in Sydney (zoneinfo
        // reference data in tests/reference/data/time.json covers the DST days).
        let site = LatLon::new(-31.6, 148.1).unwrap();
        let w = Hours::parse("21:30-05:00").unwrap();
        let i = Utc.with_ymd_and_hms(2026, 1, 10, 11, 0, 0).unwrap();
        assert!(w.contains(i, Sydney, site));
        // 10:00 UTC = 21:00 AEDT: outside.
        let i = Utc.with_ymd_and_hms(2026, 1, 10, 10, 0, 0).unwrap();
        assert!(!w.contains(i, Sydney, site));
    }

    #[test]
    fn seasons() {
        let s = Season::parse("07-01..08-31").unwrap();
        assert!(s.contains_date(d(2026, 7, 1)) && s.contains_date(d(2026, 8, 31)));
        assert!(!s.contains_date(d(2026, 6, 30)) && !s.contains_date(d(2026, 9, 1)));
        let wrap = Season::parse("11-15..02-15").unwrap();
        assert!(wrap.contains_date(d(2026, 12, 31)) && wrap.contains_date(d(2027, 1, 1)));
        assert!(wrap.contains_date(d(2026, 11, 15)) && wrap.contains_date(d(2026, 2, 15)));
        assert!(!wrap.contains_date(d(2026, 2, 16)) && !wrap.contains_date(d(2026, 11, 14)));
        assert_eq!(wrap.to_string(), "11-15..02-15");
        let one = Season::parse("03-10..03-10").unwrap();
        assert!(one.contains_date(d(2026, 3, 10)) && !one.contains_date(d(2026, 3, 11)));
    }

    #[test]
    fn leap_day_bounds() {
        let from = Season::parse("02-29..03-31").unwrap();
        assert!(!from.contains_date(d(2026, 2, 28)));
        assert!(from.contains_date(d(2026, 3, 1)));
        assert!(from.contains_date(d(2028, 2, 29)));
        let until = Season::parse("01-01..02-29").unwrap();
        assert!(until.contains_date(d(2026, 2, 28)));
        assert!(!until.contains_date(d(2026, 3, 1)));
        assert!(until.contains_date(d(2028, 2, 29)));
    }

    #[test]
    fn season_errors() {
        assert!(matches!(
            Season::parse("07-01-08-31"),
            Err(WindowError::SeasonSyntax(_))
        ));
        assert!(matches!(
            Season::parse("02-30..03-01"),
            Err(WindowError::SeasonDate(_))
        ));
        assert!(matches!(
            Season::parse("04-31..05-01"),
            Err(WindowError::SeasonDate(_))
        ));
        assert!(matches!(
            Season::parse("7-1..8-31"),
            Err(WindowError::SeasonDate(_))
        ));
    }

    #[test]
    fn season_uses_the_local_date() {
        // 2026-06-30 14:30 UTC is 2026-07-01 00:30 AEST (UTC+10).
        let s = Season::parse("07-01..08-31").unwrap();
        assert!(s.contains(
            Utc.with_ymd_and_hms(2026, 6, 30, 14, 30, 0).unwrap(),
            Sydney
        ));
        assert!(!s.contains(
            Utc.with_ymd_and_hms(2026, 6, 30, 13, 30, 0).unwrap(),
            Sydney
        ));
    }

    proptest! {
        #[test]
        fn season_and_its_complement_partition_the_year(
            sm in 1u32..=12, sd in 1u32..=28, em in 1u32..=12, ed in 1u32..=28, doy in 0i64..366,
        ) {
            let s = Season::parse(&format!("{sm:02}-{sd:02}..{em:02}-{ed:02}")).unwrap();
            let date = d(2026, 1, 1) + chrono::Duration::days(doy);
            let inside = s.contains_date(date);
            // Independent formulation: count days forward from start.
            let start = NaiveDate::from_ymd_opt(date.year(), sm, sd).unwrap();
            let start = if start > date { NaiveDate::from_ymd_opt(date.year() - 1, sm, sd).unwrap() } else { start };
            let mut end = NaiveDate::from_ymd_opt(start.year(), em, ed).unwrap();
            if end < start { end = NaiveDate::from_ymd_opt(start.year() + 1, em, ed).unwrap(); }
            prop_assert_eq!(inside, date <= end);
        }

        #[test]
        fn window_and_complement(sh in 0u32..24, sm in 0u32..60, eh in 0u32..24, em in 0u32..60, x in 0u32..86_400) {
            prop_assume!((sh, sm) != (eh, em));
            let w = LocalHours::new(t(sh, sm), t(eh, em)).unwrap();
            let c = LocalHours::new(t(eh, em), t(sh, sm)).unwrap();
            let at = NaiveTime::from_num_seconds_from_midnight_opt(x, 0).unwrap();
            prop_assert_ne!(w.contains_time(at), c.contains_time(at));
        }
    }
    #[test]
    fn local_windows_match_zoneinfo_clock() {
        // Source: tests/reference/gen_time.py: the window decision from the
        // zoneinfo local clock reading of each instant, every 20 minutes
        // through the 2026 change days (Sydney gap and fold included).
        let data: serde_json::Value = serde_json::from_str(include_str!(concat!(
            env!("CARGO_MANIFEST_DIR"),
            "/tests/reference/data/time.json"
        )))
        .unwrap();
        let site = LatLon::new(-31.6, 148.1).unwrap();
        let mut n = 0;
        for s in data["samples"].as_array().unwrap() {
            let tz: Tz = s["tz"].as_str().unwrap().parse().unwrap();
            let i: DateTime<Utc> = s["utc"].as_str().unwrap().parse().unwrap();
            for (w, want) in s["in_window"].as_object().unwrap() {
                let hours = Hours::parse(w).unwrap();
                assert_eq!(
                    hours.contains(i, tz, site),
                    want.as_bool().unwrap(),
                    "{w} {s}"
                );
                n += 1;
            }
        }
        assert!(n > 5000);
    }
}
