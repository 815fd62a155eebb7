//! Civil twilight and "is it night" at a site, from the NOAA solar
//! calculator equations (after Meeus, Astronomical Algorithms).
//!
//! Owns [`civil_twilight`] (civil dawn and dusk of a local date: the sun's
//! centre 6 degrees below the horizon, no refraction term, observer at sea
//! level) and [`is_night`] (METHODS.md section 6: night iff the instant is
//! before civil dawn or at/after civil dusk of its local date).
//!
//! Method. The NOAA equations give the sun's declination and the equation of
//! time for a Julian day (fractional, so at the instant itself). The hour
//! angle of the event follows from cos H = (cos 96 - sin lat sin decl) /
//! (cos lat cos decl). Starting 6 h either side of local noon on the date, the
//! event time is corrected by the hour-angle error (4 minutes per degree)
//! until the step is under 1 s; the sun is re-evaluated at each estimate.
//! An event that falls on another local date is searched once more from the
//! neighbouring day; if it still is not on the date, it is `None`.
//! Reference: Python astral 3.2 (also NOAA equations) within 2 minutes.
//!
//! Pure: the date and instant are passed in.

use super::geodesic::LatLon;
use chrono::{DateTime, Duration, NaiveDate, NaiveTime, TimeZone, Timelike, Utc};
use chrono_tz::Tz;

/// The sun's centre is this far below the horizon at civil dawn and dusk.
pub const CIVIL_DEPRESSION_DEG: f64 = 6.0;

/// Why a date has no civil dawn or dusk.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Polar {
    /// The sun stays above -6 degrees all day (high-latitude summer).
    AlwaysLight,
    /// The sun stays below -6 degrees all day (high-latitude winter).
    AlwaysDark,
}

/// Civil dawn and dusk of one local date at one place.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct CivilTwilight {
    /// Civil dawn on that local date, if there is one.
    pub dawn: Option<DateTime<Utc>>,
    /// Civil dusk on that local date, if there is one.
    pub dusk: Option<DateTime<Utc>>,
    /// Set when the sun never crosses -6 degrees around local noon.
    pub polar: Option<Polar>,
}

/// Sun position terms at an instant: (declination rad, equation of time min).
fn sun_terms(t: DateTime<Utc>) -> (f64, f64) {
    let jd = t.timestamp() as f64 / 86_400.0
        + f64::from(t.timestamp_subsec_millis()) / 86_400_000.0
        + 2_440_587.5;
    let tc = (jd - 2_451_545.0) / 36_525.0; // Julian centuries since J2000.0
    let l0 = (280.46646 + tc * (36_000.769_83 + tc * 0.000_303_2)).rem_euclid(360.0);
    let m = 357.52911 + tc * (35_999.050_29 - 0.000_153_7 * tc);
    let e = 0.016_708_634 - tc * (0.000_042_037 + 0.000_000_126_7 * tc);
    let mr = m.to_radians();
    let c = mr.sin() * (1.914_602 - tc * (0.004_817 + 0.000_014 * tc))
        + (2.0 * mr).sin() * (0.019_993 - 0.000_101 * tc)
        + (3.0 * mr).sin() * 0.000_289;
    let true_long = l0 + c;
    let omega = (125.04 - 1_934.136 * tc).to_radians();
    let app_long = true_long - 0.005_69 - 0.004_78 * omega.sin();
    let obliq0 =
        23.0 + (26.0 + (21.448 - tc * (46.815 + tc * (0.000_59 - tc * 0.001_813))) / 60.0) / 60.0;
    let obliq = (obliq0 + 0.002_56 * omega.cos()).to_radians();
    let decl = (obliq.sin() * app_long.to_radians().sin()).asin();
    let y = (obliq / 2.0).tan().powi(2);
    let l0r = l0.to_radians();
    let eot = 4.0
        * (y * (2.0 * l0r).sin() - 2.0 * e * mr.sin() + 4.0 * e * y * mr.sin() * (2.0 * l0r).cos()
            - 0.5 * y * y * (4.0 * l0r).sin()
            - 1.25 * e * e * (2.0 * mr).sin())
        .to_degrees();
    (decl, eot)
}

/// Cosine of the event hour angle (may be outside [-1, 1]).
fn cos_hour_angle(lat: f64, decl: f64) -> f64 {
    let z = (90.0 + CIVIL_DEPRESSION_DEG).to_radians();
    let phi = lat.to_radians();
    (z.cos() - phi.sin() * decl.sin()) / (phi.cos() * decl.cos())
}

/// Solve for the civil dawn (`rising`) or dusk nearest to `start`.
fn solve(start: DateTime<Utc>, at: LatLon, rising: bool) -> Result<DateTime<Utc>, Polar> {
    let mut t = start;
    for _ in 0..10 {
        let (decl, eot) = sun_terms(t);
        let ch = cos_hour_angle(at.lat(), decl);
        if ch > 1.0 {
            return Err(Polar::AlwaysDark);
        }
        if ch < -1.0 {
            return Err(Polar::AlwaysLight);
        }
        let h = ch.acos().to_degrees();
        let target = if rising { -h } else { h };
        // True solar time in minutes, then the hour angle now (degrees).
        let secs = f64::from(t.time().num_seconds_from_midnight());
        let tst = secs / 60.0 + eot + 4.0 * at.lon();
        let ha = tst / 4.0 - 180.0;
        let err = (target - ha + 180.0).rem_euclid(360.0) - 180.0;
        let step_s = (err * 240.0).round() as i64; // 4 min = 240 s per degree
        t += Duration::seconds(step_s);
        if step_s.abs() < 1 {
            break;
        }
    }
    Ok(t)
}

/// 12:00 on the local date in `tz` as UTC (noon never falls in a DST gap in
/// any current zone; if it did, the instant after the gap is used).
fn local_noon(date: NaiveDate, tz: Tz) -> DateTime<Utc> {
    let noon = date.and_time(NaiveTime::MIN) + Duration::hours(12);
    match tz.from_local_datetime(&noon).earliest() {
        Some(t) => t.with_timezone(&Utc),
        None => (noon - Duration::hours(1)).and_utc(),
    }
}

/// One event on the local date, searched from that day and its neighbours.
fn event_on(
    date: NaiveDate,
    at: LatLon,
    tz: Tz,
    rising: bool,
) -> Result<Option<DateTime<Utc>>, Polar> {
    let offset = if rising { -6 } else { 6 };
    let day_of = |t: DateTime<Utc>| t.with_timezone(&tz).date_naive();
    let first = solve(local_noon(date, tz) + Duration::hours(offset), at, rising)?;
    let got = day_of(first);
    if got == date {
        return Ok(Some(first));
    }
    let shift = if got < date { 1 } else { -1 };
    let again = solve(first + Duration::days(shift), at, rising)?;
    Ok((day_of(again) == date).then_some(again))
}

/// Civil dawn and dusk on `date` (local to `tz`) at `at`.
pub fn civil_twilight(date: NaiveDate, at: LatLon, tz: Tz) -> CivilTwilight {
    let dawn = event_on(date, at, tz, true);
    let dusk = event_on(date, at, tz, false);
    let polar = match (&dawn, &dusk) {
        (Err(p), _) | (_, Err(p)) => Some(*p),
        _ => None,
    };
    CivilTwilight {
        dawn: dawn.ok().flatten(),
        dusk: dusk.ok().flatten(),
        polar,
    }
}

/// Night iff `instant` is before civil dawn or at/after civil dusk of its
/// local date in `tz` (METHODS.md section 6). With no dawn on the date the
/// night lasts until dusk's side of the rule decides; on a polar date the
/// whole date is night when the sun stays below -6 degrees.
pub fn is_night(instant: DateTime<Utc>, at: LatLon, tz: Tz) -> bool {
    let date = instant.with_timezone(&tz).date_naive();
    civil_twilight(date, at, tz).is_night(instant)
}

impl CivilTwilight {
    /// Whether `instant`, on this twilight's local date, is before civil
    /// dawn or from civil dusk on (the night either side of the day), or
    /// the date has no civil day at all. [`is_night`] without the solar
    /// computation, for a caller that keeps the twilight of a date.
    pub fn is_night(&self, instant: DateTime<Utc>) -> bool {
        let tw = self;
        match (tw.dawn, tw.dusk) {
            (None, None) => tw.polar == Some(Polar::AlwaysDark),
            (dawn, dusk) => dawn.is_some_and(|d| instant < d) || dusk.is_some_and(|d| instant >= d),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use chrono_tz::Australia::Sydney;

    #[test]
    fn kellerby_midwinter_twilight_is_plausible() {
        // Sanity, not a reference (astral data is in tests/reference): at
        // -31.6 deg in late June civil dawn is near 06:35 local and dusk near
        // 17:30 (from memory of NSW almanac times; tolerance 30 min).
        let at = LatLon::new(-31.6, 148.1).unwrap();
        let d = NaiveDate::from_ymd_opt(2026, 6, 21).unwrap();
        let tw = civil_twilight(d, at, Sydney);
        let dawn = tw.dawn.unwrap().with_timezone(&Sydney).time();
        let dusk = tw.dusk.unwrap().with_timezone(&Sydney).time();
        let near = |t: NaiveTime, h: u32, m: u32| {
            let want = NaiveTime::from_hms_opt(h, m, 0).unwrap();
            (t - want).num_minutes().abs() <= 30
        };
        assert!(near(dawn, 6, 35), "{dawn}");
        assert!(near(dusk, 17, 30), "{dusk}");
    }

    #[test]
    fn polar_days() {
        // Svalbard (78.2 N) at midsummer stays light; at midwinter stays dark
        // (geographic fact).
        let at = LatLon::new(78.2, 15.6).unwrap();
        let tz = chrono_tz::Arctic::Longyearbyen;
        let summer = civil_twilight(NaiveDate::from_ymd_opt(2026, 6, 21).unwrap(), at, tz);
        assert_eq!(summer.polar, Some(Polar::AlwaysLight));
        assert!(summer.dawn.is_none() && summer.dusk.is_none());
        let noon = local_noon(NaiveDate::from_ymd_opt(2026, 6, 21).unwrap(), tz);
        assert!(!is_night(noon - Duration::hours(12), at, tz));
        let winter = civil_twilight(NaiveDate::from_ymd_opt(2026, 12, 21).unwrap(), at, tz);
        assert_eq!(winter.polar, Some(Polar::AlwaysDark));
        let noon = local_noon(NaiveDate::from_ymd_opt(2026, 12, 21).unwrap(), tz);
        assert!(is_night(noon, at, tz));
    }
    fn reference() -> serde_json::Value {
        serde_json::from_str(include_str!(concat!(
            env!("CARGO_MANIFEST_DIR"),
            "/tests/reference/data/solar.json"
        )))
        .unwrap()
    }

    fn place(v: &serde_json::Value) -> (LatLon, Tz) {
        let at = LatLon::new(v["lat"].as_f64().unwrap(), v["lon"].as_f64().unwrap()).unwrap();
        let tz: Tz = v["tz"].as_str().unwrap().parse().unwrap();
        (at, tz)
    }

    fn instant(secs: f64) -> DateTime<Utc> {
        DateTime::from_timestamp_millis((secs * 1000.0).round() as i64).unwrap()
    }

    #[test]
    fn twilight_matches_astral() {
        // Source: Python astral 3.2 (NOAA equations after Meeus), dawn/dusk
        // with depression 6, elevation 0: tests/reference/gen_solar.py.
        // Kellerby Basin and five capitals, every 5th day of 2026 plus the
        // Sydney DST change days. Tolerance 2 minutes (METHODS.md 6).
        let data = reference();
        let mut worst: i64 = 0;
        for day in data["days"].as_array().unwrap() {
            let (at, tz) = place(day);
            let date: NaiveDate = day["date"].as_str().unwrap().parse().unwrap();
            let tw = civil_twilight(date, at, tz);
            for (key, got) in [("dawn_utc_s", tw.dawn), ("dusk_utc_s", tw.dusk)] {
                match (day[key].as_f64(), got) {
                    (Some(want), Some(got)) => {
                        let err = (got - instant(want)).num_milliseconds().abs();
                        worst = worst.max(err);
                        assert!(err <= 120_000, "{day} {key}: {got} is {err} ms off");
                    }
                    (None, None) => {}
                    (want, got) => panic!("{day} {key}: want {want:?} got {got:?}"),
                }
            }
        }
        println!(
            "civil twilight worst error vs astral: {:.1} s",
            worst as f64 / 1000.0
        );
    }

    #[test]
    fn night_decisions_match_astral() {
        // Source: gen_solar.py applies the METHODS.md 6 rule to astral's
        // times; every sample is 10 minutes or more from a dawn or dusk.
        let data = reference();
        let samples = data["night_samples"].as_array().unwrap();
        assert!(samples.len() > 2000);
        for s in samples {
            let (at, tz) = place(s);
            let i = instant(s["instant_utc_s"].as_f64().unwrap());
            assert_eq!(is_night(i, at, tz), s["night"].as_bool().unwrap(), "{s}");
        }
    }
}
