//! Reports: independent events, animals, effort (camera-nights) and the
//! relative abundance index per site, species and period, as rows and as
//! CSV. Effort sits in the same row as the count it divides, so nobody
//! divides by the wrong number.
//!
//! Role: pure. Counts come from [`History`] (the engine's independent
//! events) and effort from its uptime ledgers; RAI is
//! [`crate::activity::rai`]. Periods are local days, ISO weeks (Monday to
//! Monday) or calendar months in the service's time zone, each
//! `[local midnight, next local midnight)`, so a daylight-saving day holds
//! 23 or 25 hours (METHODS.md 6); the first and last periods are cut to the
//! report's `[from, to)` and the row says the bounds it counted.
//!
//! Rows: for every period, every deployment operating at some time in it
//! (config order), and every species with an event anywhere in the report
//! (sorted): zero counts are rows too, because a zero with effort is
//! information. With no species at all there is one row per period and
//! deployment with an empty species, for the effort.

use super::history::History;
use super::text::local_datetime;
use crate::calendar::{local_date_of, local_day_bounds};
use crate::config::Config;
use crate::model::Message;
use chrono::{DateTime, Datelike, Duration, NaiveDate, Utc};
use chrono_tz::Tz;
use std::collections::{BTreeSet, HashMap};

/// The length of a report's periods.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Period {
    Day,
    /// ISO 8601 weeks, Monday to Monday, labelled `2026-W29`.
    Week,
    /// Calendar months, labelled `2026-07`.
    Month,
}

impl Period {
    pub fn parse(s: &str) -> Option<Self> {
        match s {
            "day" => Some(Self::Day),
            "week" => Some(Self::Week),
            "month" => Some(Self::Month),
            _ => None,
        }
    }

    /// The first local date of the period holding `d`.
    fn start_of(self, d: NaiveDate) -> NaiveDate {
        match self {
            Self::Day => d,
            Self::Week => d - Duration::days(i64::from(d.weekday().num_days_from_monday())),
            Self::Month => d.with_day(1).unwrap_or(d),
        }
    }

    /// The first local date of the next period.
    fn next(self, start: NaiveDate) -> NaiveDate {
        match self {
            Self::Day => start + Duration::days(1),
            Self::Week => start + Duration::days(7),
            Self::Month => {
                let (y, m) = if start.month() == 12 {
                    (start.year() + 1, 1)
                } else {
                    (start.year(), start.month() + 1)
                };
                NaiveDate::from_ymd_opt(y, m, 1).unwrap_or(start + Duration::days(31))
            }
        }
    }

    fn label(self, start: NaiveDate) -> String {
        match self {
            Self::Day => start.format("%Y-%m-%d").to_string(),
            Self::Week => start.format("%G-W%V").to_string(),
            Self::Month => start.format("%Y-%m").to_string(),
        }
    }
}

/// What to report on. Open ends default to the earliest deploymentStart and
/// to `now`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ReportSpec {
    pub by: Period,
    pub from: Option<DateTime<Utc>>,
    pub to: Option<DateTime<Utc>>,
}

/// Why a report could not be made.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum ReportError {
    #[error("the report window is empty: from {from} is not before to {to}")]
    EmptyWindow {
        from: DateTime<Utc>,
        to: DateTime<Utc>,
    },
    #[error("there are no sites to report on")]
    NoSites,
}

/// One row of a report.
#[derive(Debug, Clone, PartialEq)]
pub struct ReportRow {
    /// `2026-07-14`, `2026-W29` or `2026-07`.
    pub period: String,
    /// The instants counted: the period cut to the report's window.
    pub period_start: DateTime<Utc>,
    pub period_end: DateTime<Utc>,
    pub deployment_id: String,
    pub location_name: Option<String>,
    /// Empty only in the effort rows of a report with no species.
    pub scientific_name: Option<String>,
    /// Independent events starting in the period.
    pub events: u64,
    /// Sum of the events' counts (the most animals seen at once in each).
    pub individuals: u64,
    /// Camera-nights of operation in the period.
    pub camera_nights: f64,
    /// 100 x events / camera-nights; `None` at zero effort (undefined, not 0).
    pub rai: Option<f64>,
}

/// An event's start and count.
type Start = (DateTime<Utc>, u32);

/// The report's rows, from a stored history. `now` bounds effort (a camera
/// is not counted as up in the future).
pub fn report_rows(
    cfg: &Config,
    history: &[Message],
    spec: &ReportSpec,
    now: DateTime<Utc>,
) -> Result<Vec<ReportRow>, ReportError> {
    let h = History::read(cfg, history);
    rows_from(&h, cfg.service.timezone, spec, now)
}

/// [`report_rows`] on a history already read (the export reuses one).
pub fn rows_from(
    h: &History,
    tz: Tz,
    spec: &ReportSpec,
    now: DateTime<Utc>,
) -> Result<Vec<ReportRow>, ReportError> {
    let from = match spec.from {
        Some(f) => f,
        None => h
            .sites
            .iter()
            .map(|s| s.deployment_start)
            .min()
            .ok_or(ReportError::NoSites)?,
    };
    let to = spec.to.unwrap_or(now);
    if from >= to {
        return Err(ReportError::EmptyWindow { from, to });
    }
    // Event starts (and counts) per (site, species), sorted by start.
    let mut starts: HashMap<(usize, &str), Vec<Start>> = HashMap::new();
    let mut species: BTreeSet<&str> = BTreeSet::new();
    for e in &h.events {
        let Some(site) = h.site_index(&e.deployment_id) else {
            continue;
        };
        if e.start >= from && e.start < to {
            species.insert(e.scientific_name.as_str());
        }
        starts
            .entry((site, e.scientific_name.as_str()))
            .or_default()
            .push((e.start, e.count));
    }
    for list in starts.values_mut() {
        list.sort();
    }
    let species: Vec<Option<&str>> = if species.is_empty() {
        vec![None]
    } else {
        species.into_iter().map(Some).collect()
    };
    let mut rows = Vec::new();
    let mut day = spec.by.start_of(local_date_of(from, tz));
    loop {
        let next = spec.by.next(day);
        let (p_from, _) = local_day_bounds(day, tz);
        let (p_to, _) = local_day_bounds(next, tz);
        let lo = p_from.max(from);
        let hi = p_to.min(to);
        if lo >= to {
            break;
        }
        if hi > lo {
            for (site, s) in h.sites.iter().enumerate() {
                let operating = s.deployment_start < hi && s.deployment_end.is_none_or(|e| e > lo);
                if !operating {
                    continue;
                }
                let nights = h.camera_nights(site, lo, hi, now);
                for name in &species {
                    let (events, individuals) =
                        name.and_then(|n| starts.get(&(site, n)))
                            .map_or((0, 0), |list| {
                                let a = list.partition_point(|(t, _)| *t < lo);
                                let b = list.partition_point(|(t, _)| *t < hi);
                                let slice = &list[a..b];
                                (
                                    slice.len() as u64,
                                    slice.iter().map(|(_, c)| u64::from(*c)).sum(),
                                )
                            });
                    rows.push(ReportRow {
                        period: spec.by.label(day),
                        period_start: lo,
                        period_end: hi,
                        deployment_id: s.deployment_id.clone(),
                        location_name: s.location_name.clone(),
                        scientific_name: name.map(str::to_owned),
                        events,
                        individuals,
                        camera_nights: nights,
                        rai: crate::activity::rai(events, nights),
                    });
                }
            }
        }
        if next <= day {
            break;
        }
        day = next;
    }
    Ok(rows)
}

/// The CSV header of a report.
pub const REPORT_COLUMNS: [&str; 10] = [
    "period",
    "period_start",
    "period_end",
    "deploymentID",
    "locationName",
    "scientificName",
    "events",
    "individuals",
    "camera_nights",
    "rai_per_100_camera_nights",
];

/// Rows as CSV (header first, LF line ends, fields quoted as RFC 4180 quotes them). Instants in the service's zone
/// with their offset; camera-nights to 6 decimals; RAI to 4 decimals and
/// empty at zero effort.
pub fn rows_to_csv(rows: &[ReportRow], tz: Tz) -> String {
    let mut w = csv::WriterBuilder::new()
        .terminator(csv::Terminator::Any(b'\n'))
        .from_writer(Vec::new());
    // Writing into a Vec cannot fail; a failed row would only shorten the
    // output, never panic.
    let _ = w.write_record(REPORT_COLUMNS);
    for r in rows {
        let _ = w.write_record([
            r.period.clone(),
            local_datetime(r.period_start, tz),
            local_datetime(r.period_end, tz),
            r.deployment_id.clone(),
            r.location_name.clone().unwrap_or_default(),
            r.scientific_name.clone().unwrap_or_default(),
            r.events.to_string(),
            r.individuals.to_string(),
            format!("{:.6}", r.camera_nights),
            r.rai.map(|v| format!("{v:.4}")).unwrap_or_default(),
        ]);
    }
    let bytes = w.into_inner().unwrap_or_default();
    String::from_utf8(bytes).unwrap_or_default()
}

/// The report as CSV: [`report_rows`] then [`rows_to_csv`]. This is the one
/// call a caller needs (the command line, a web handler): give it the
/// config, the store's history (`Backend::history(DateTime::<Utc>::MIN_UTC)`
/// or since the report's start minus the independence interval), what to
/// report, and the time.
pub fn report_csv(
    cfg: &Config,
    history: &[Message],
    spec: &ReportSpec,
    now: DateTime<Utc>,
) -> Result<String, ReportError> {
    let rows = report_rows(cfg, history, spec, now)?;
    Ok(rows_to_csv(&rows, cfg.service.timezone))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Site;
    use crate::model::{Heartbeat, Observation, ObservationType};
    use chrono::TimeZone;
    use chrono_tz::Australia::Sydney;

    fn site(id: &str, start: DateTime<Utc>) -> Site {
        Site {
            deployment_id: id.into(),
            location_id: None,
            location_name: Some(format!("{id} place")),
            latitude: -31.6,
            longitude: 148.1,
            deployment_start: start,
            deployment_end: None,
            camera_id: None,
            camera_delay: None,
        }
    }

    fn obs(id: &str, dep: &str, at: DateTime<Utc>, species: &str, count: u32) -> Message {
        Message::Observation(Observation {
            observation_id: id.into(),
            deployment_id: dep.into(),
            event_start: at,
            event_end: None,
            observation_type: ObservationType::Animal,
            scientific_name: Some(species.into()),
            count,
            classification_probability: Some(0.9),
            classification_method: None,
            media_id: None,
            file_path: None,
            vernacular_name: None,
            life_stage: None,
            sex: None,
            behavior: None,
        })
    }

    fn hb(dep: &str, at: DateTime<Utc>) -> Message {
        Message::Heartbeat(Heartbeat {
            deployment_id: dep.into(),
            timestamp: at,
            battery_percent: None,
            signal_dbm: None,
            images_since_last: None,
        })
    }

    /// Local midnight, 14 July 2026, Sydney (AEST, UTC+10): 13 July 14:00 UTC.
    fn d0() -> DateTime<Utc> {
        Utc.with_ymd_and_hms(2026, 7, 13, 14, 0, 0).unwrap()
    }

    fn history_from(sites: Vec<Site>, messages: &[Message]) -> History {
        let cfg = crate::interchange::test_config(sites, "");
        History::read(&cfg, messages)
    }

    #[test]
    fn hand_worked_two_days_two_sites() {
        // Hand-worked from the definitions (METHODS.md 1, 2; DESIGN.md
        // "Activity"): KB-A deployed at local midnight 14 July with
        // heartbeats every 6 h (silence limit 36 h, so always up), KB-B
        // deployed at local noon 14 July, never heard from after that
        // (down after 36 h: it is up from noon 14th to the end of the 15th,
        // 36 h exactly, "a gap of exactly the limit is up").
        let a = d0();
        let b = d0() + Duration::hours(12);
        let mut msgs = vec![];
        for k in 0..=8 {
            msgs.push(hb("KB-A", a + Duration::hours(6 * k)));
        }
        // Two dogs at KB-A on the 14th, 10 minutes apart: ONE event (30 min
        // interval), count max(1, 2) = 2. A third at 22:00: a second event.
        msgs.push(obs(
            "o1",
            "KB-A",
            a + Duration::hours(2),
            "Canis familiaris",
            1,
        ));
        msgs.push(obs(
            "o2",
            "KB-A",
            a + Duration::hours(2) + Duration::minutes(10),
            "Canis familiaris",
            2,
        ));
        msgs.push(obs(
            "o3",
            "KB-A",
            a + Duration::hours(22),
            "Canis familiaris",
            1,
        ));
        // A fox at KB-B at 13:00 on the 14th (KB-B's only sign of life
        // besides its start).
        msgs.push(obs(
            "o4",
            "KB-B",
            b + Duration::hours(1),
            "Vulpes vulpes",
            1,
        ));
        msgs.sort_by_key(|m| match m {
            Message::Observation(o) => o.event_start,
            Message::Heartbeat(h) => h.timestamp,
            Message::Correction(_) => DateTime::<Utc>::MAX_UTC,
        });
        let h = history_from(vec![site("KB-A", a), site("KB-B", b)], &msgs);
        let spec = ReportSpec {
            by: Period::Day,
            from: Some(a),
            to: Some(a + Duration::days(2)),
        };
        // Asked at the end of the 15th (KB-B's tail since its 13:00 sign is
        // 35 h, within the limit).
        let now = a + Duration::days(2);
        let rows = rows_from(&h, Sydney, &spec, now).unwrap();
        let get = |day: &str, dep: &str, sp: &str| {
            rows.iter()
                .find(|r| {
                    r.period == day
                        && r.deployment_id == dep
                        && r.scientific_name.as_deref() == Some(sp)
                })
                .unwrap()
                .clone()
        };
        // 2 days x 2 sites x 2 species.
        assert_eq!(rows.len(), 8);
        let r = get("2026-07-14", "KB-A", "Canis familiaris");
        assert_eq!((r.events, r.individuals), (2, 3));
        assert_eq!(r.camera_nights, 1.0);
        assert_eq!(r.rai, Some(200.0));
        let r = get("2026-07-15", "KB-A", "Canis familiaris");
        assert_eq!((r.events, r.camera_nights, r.rai), (0, 1.0, Some(0.0)));
        // KB-B: up from 12:00 on the 14th (13:00 sign, then 35 h to the
        // end of the 15th, within the limit): 0.5 night, then 1 night.
        let r = get("2026-07-14", "KB-B", "Vulpes vulpes");
        assert_eq!((r.events, r.camera_nights, r.rai), (1, 0.5, Some(200.0)));
        let r = get("2026-07-15", "KB-B", "Vulpes vulpes");
        assert_eq!((r.events, r.camera_nights), (0, 1.0));
        // Two hours later KB-B has been silent 37 h > 36 h: the whole
        // stretch since 13:00 on the 14th counts as down.
        let rows = rows_from(
            &h,
            Sydney,
            &spec,
            a + Duration::days(2) + Duration::hours(2),
        )
        .unwrap();
        let r = rows
            .iter()
            .find(|r| r.period == "2026-07-15" && r.deployment_id == "KB-B")
            .unwrap();
        assert_eq!(r.camera_nights, 0.0);
        assert_eq!(r.rai, None, "RAI is undefined at zero effort");
        let r = rows
            .iter()
            .find(|r| r.period == "2026-07-14" && r.deployment_id == "KB-B")
            .unwrap();
        assert_eq!(r.camera_nights, 1.0 / 24.0, "12:00 to the 13:00 sign");
        let csv = rows_to_csv(&rows, Sydney);
        assert!(csv.starts_with("period,period_start,period_end,deploymentID,"));
        assert!(csv.contains("2026-07-15,2026-07-15T00:00:00+10:00,2026-07-16T00:00:00+10:00,KB-B,KB-B place,Vulpes vulpes,0,0,0.000000,\n"), "{csv}");
    }

    #[test]
    fn weeks_months_and_a_daylight_saving_day() {
        // Sydney: daylight saving starts 2026-10-04 02:00 local (first
        // Sunday in October, common knowledge, from memory): that local day
        // lasts 23 h. A camera up all the time shows 23/24 camera-nights.
        let start = Sydney
            .with_ymd_and_hms(2026, 9, 28, 0, 0, 0)
            .unwrap()
            .with_timezone(&Utc);
        let mut msgs = vec![];
        for k in 0..(24 * 14) {
            msgs.push(hb("KB-A", start + Duration::hours(k)));
        }
        let h = history_from(vec![site("KB-A", start)], &msgs);
        // Fourteen local days: 14 x 24 h less the hour skipped.
        let end = Sydney
            .with_ymd_and_hms(2026, 10, 12, 0, 0, 0)
            .unwrap()
            .with_timezone(&Utc);
        assert_eq!(end - start, Duration::hours(14 * 24 - 1));
        let now = end + Duration::days(1);
        let day = rows_from(
            &h,
            Sydney,
            &ReportSpec {
                by: Period::Day,
                from: Some(start),
                to: Some(end),
            },
            now,
        )
        .unwrap();
        let dst = day.iter().find(|r| r.period == "2026-10-04").unwrap();
        assert_eq!(dst.camera_nights, 23.0 / 24.0);
        assert_eq!(dst.scientific_name, None, "no species: effort rows only");
        let week = rows_from(
            &h,
            Sydney,
            &ReportSpec {
                by: Period::Week,
                from: Some(start),
                to: Some(end),
            },
            now,
        )
        .unwrap();
        // 28 Sep 2026 is a Monday: ISO weeks 40 and 41 (from a calendar).
        let labels: Vec<&str> = week.iter().map(|r| r.period.as_str()).collect();
        assert_eq!(labels, ["2026-W40", "2026-W41"]);
        assert_eq!(week[0].camera_nights, 7.0 - 1.0 / 24.0);
        let month = rows_from(
            &h,
            Sydney,
            &ReportSpec {
                by: Period::Month,
                from: Some(start),
                to: Some(end),
            },
            now,
        )
        .unwrap();
        let labels: Vec<&str> = month.iter().map(|r| r.period.as_str()).collect();
        assert_eq!(labels, ["2026-09", "2026-10"]);
        // September is cut to the window: 28 Sep 00:00 to 1 Oct 00:00.
        assert_eq!(month[0].camera_nights, 3.0);
        assert_eq!(month[0].period_start, start);
        let total: f64 = month.iter().map(|r| r.camera_nights).sum();
        assert!((total - (14.0 - 1.0 / 24.0)).abs() < 1e-12);
        assert!(rows_from(
            &h,
            Sydney,
            &ReportSpec {
                by: Period::Day,
                from: Some(end),
                to: Some(start)
            },
            now
        )
        .is_err());
    }
}
