//! The numbers behind the map colours and the 14-night chart, from stored
//! events and signs of life. Pure: plain values and `now` in, values out.
//!
//! No statistics of its own: effort is [`Uptime::camera_nights`], the
//! baseline and the last-24-hour test are the engine's [`spike_test`] and
//! [`GammaRate`], the window is [`baseline_window`], the index is [`rai`].
//! This module only chooses the windows and counts the events.

use crate::activity::{
    baseline_window, rai, regional_rate, spike_test, GammaRate, SpikeInput, SpikeParams, Uptime,
};
use crate::config::{Config, TriggerKind};
use crate::web::chart::{NightColumn, NightPoint, NightsChart, Series};
use chrono::{DateTime, Duration, NaiveTime, Utc};
use std::collections::{BTreeMap, BTreeSet, HashMap};

/// A stored independent event, as this module needs it.
#[derive(Debug, Clone, PartialEq)]
pub struct EventRow {
    pub deployment_id: String,
    pub scientific_name: String,
    pub start: DateTime<Utc>,
}

/// Events and effort of every configured site over a span.
#[derive(Debug, Clone)]
pub struct ActivityData {
    /// One per configured site, in the sites file's order.
    pub uptime: Vec<Uptime>,
    /// (site index, species) -> event starts, sorted.
    events: HashMap<(usize, String), Vec<DateTime<Utc>>>,
    /// Species seen anywhere in the span.
    pub species: BTreeSet<String>,
}

impl ActivityData {
    /// Builds uptime per site from the deployment bounds and `signs`
    /// (deploymentID, instant of a heartbeat or observation) with the
    /// configured silence limit, the engine's rule; and indexes `events`.
    /// Rows for unknown deployments are ignored.
    pub fn build(
        cfg: &Config,
        signs: impl IntoIterator<Item = (String, DateTime<Utc>)>,
        events: impl IntoIterator<Item = EventRow>,
    ) -> Self {
        let silence =
            Duration::seconds((cfg.sites.silence_hours * 3600.0) as i64).max(Duration::seconds(1));
        let index: HashMap<&str, usize> = cfg
            .sites
            .sites
            .iter()
            .enumerate()
            .map(|(i, s)| (s.deployment_id.as_str(), i))
            .collect();
        let mut uptime: Vec<Uptime> = cfg
            .sites
            .sites
            .iter()
            .filter_map(|s| {
                Uptime::new(s.deployment_start, s.deployment_end, silence)
                    .or_else(|_| Uptime::new(s.deployment_start, None, silence))
                    .ok()
            })
            .collect();
        if uptime.len() != cfg.sites.sites.len() {
            // Only reached with a silence limit that is not positive, which
            // config refuses; keep indexes aligned with no effort at all.
            uptime.clear();
        }
        for (dep, at) in signs {
            if let Some(u) = index.get(dep.as_str()).and_then(|&i| uptime.get_mut(i)) {
                u.record(at);
            }
        }
        let mut by: HashMap<(usize, String), Vec<DateTime<Utc>>> = HashMap::new();
        let mut species = BTreeSet::new();
        for e in events {
            if let Some(&i) = index.get(e.deployment_id.as_str()) {
                species.insert(e.scientific_name.clone());
                by.entry((i, e.scientific_name)).or_default().push(e.start);
            }
        }
        for v in by.values_mut() {
            v.sort();
        }
        ActivityData {
            uptime,
            events: by,
            species,
        }
    }

    /// Events of `species` at `site` starting in `[from, to)`.
    pub fn count(&self, site: usize, species: &str, from: DateTime<Utc>, to: DateTime<Utc>) -> u64 {
        self.events
            .get(&(site, species.to_string()))
            .map(|v| {
                let a = v.partition_point(|t| *t < from);
                let b = v.partition_point(|t| *t < to);
                b.saturating_sub(a) as u64
            })
            .unwrap_or(0)
    }

    /// Camera-nights at `site` in `[from, to)` as of `now` (0 without data).
    pub fn nights(
        &self,
        site: usize,
        from: DateTime<Utc>,
        to: DateTime<Utc>,
        now: DateTime<Utc>,
    ) -> f64 {
        self.uptime
            .get(site)
            .map(|u| u.camera_nights(from, to, now))
            .unwrap_or(0.0)
    }

    /// Pooled events per camera-night of `species` over all sites.
    fn regional(
        &self,
        species: &str,
        from: DateTime<Utc>,
        to: DateTime<Utc>,
        now: DateTime<Utc>,
    ) -> f64 {
        let mut events = 0;
        let mut nights = 0.0;
        for site in 0..self.uptime.len() {
            events += self.count(site, species, from, to);
            nights += self.nights(site, from, to, now);
        }
        regional_rate(events, nights)
    }

    /// The span of data [`ActivityData::build`] needs for the views at
    /// `now`: the 14 nights, the baseline window and guard before the
    /// first, and one silence limit more so the first stretch of effort is
    /// judged from a real sign of life.
    pub fn span(cfg: &Config, now: DateTime<Utc>) -> (DateTime<Utc>, DateTime<Utc>) {
        let b = &cfg.baseline;
        let days = i64::from(NIGHTS) + 2 + i64::from(b.window_days + b.guard_days);
        let silence = Duration::seconds((cfg.sites.silence_hours * 3600.0) as i64);
        (
            now - Duration::days(days) - silence,
            now + Duration::seconds(1),
        )
    }
}

/// Nights in the site chart.
pub const NIGHTS: u32 = 14;

/// Below this upper-tail probability (and at or above the configured
/// `alpha`) a site's last 24 hours count as "above usual"; our choice,
/// between the alpha of a notice and chance.
pub const RAISED_P: f64 = 0.1;

/// A site's last 24 hours against its baseline, for the map colour.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum Level {
    /// No watched species in the last 24 hours, with the camera working.
    Quiet,
    /// Some, within what the baseline expects.
    Usual,
    /// More than usual: P(count this high) < 0.1.
    Raised,
    /// Well above: P < the spike test's alpha.
    High,
    /// The camera has been silent longer than its limit: it cannot see.
    Silent,
    /// No effort in the last 24 hours but not yet silent (just deployed,
    /// or collected).
    NoEffort,
}

impl Level {
    pub fn as_str(self) -> &'static str {
        match self {
            Level::Quiet => "quiet",
            Level::Usual => "usual",
            Level::Raised => "raised",
            Level::High => "high",
            Level::Silent => "silent",
            Level::NoEffort => "no-effort",
        }
    }

    /// What the legend says.
    pub fn words(self) -> &'static str {
        match self {
            Level::Quiet => "no watched species seen",
            Level::Usual => "usual activity",
            Level::Raised => "above usual",
            Level::High => "well above usual",
            Level::Silent => "camera silent",
            Level::NoEffort => "not operating",
        }
    }
}

/// One species at a site in the last 24 hours.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct SpeciesNow {
    pub scientific_name: String,
    pub count: u64,
    /// The baseline's expected count for the 24 hours' effort.
    pub expected: f64,
    /// P(Y >= count) under the baseline's predictive distribution.
    pub p_value: f64,
    /// Baseline rate per camera-night.
    pub baseline_rate: f64,
}

/// A site's last 24 hours.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct SiteNow {
    pub deployment_id: String,
    pub level: Level,
    /// Camera-nights in the last 24 hours.
    pub effort_nights: f64,
    /// Watched species seen, most unusual first.
    pub species: Vec<SpeciesNow>,
}

/// The species whose activity colours the map: every species some watch
/// names; all species when no watch names any.
pub fn watched_species(cfg: &Config) -> BTreeSet<String> {
    cfg.subscribers
        .iter()
        .flat_map(|s| s.watches.iter())
        .filter(|w| w.trigger != TriggerKind::Silence)
        .flat_map(|w| w.species.iter().cloned())
        .collect()
}

/// Every site's last 24 hours at `now`. `silent` names the deployments
/// `status::silent` found silent.
pub fn sites_now(
    cfg: &Config,
    data: &ActivityData,
    now: DateTime<Utc>,
    silent: &[&str],
) -> Vec<SiteNow> {
    let watched = watched_species(cfg);
    let to = now;
    let from = now - Duration::hours(24);
    let b = &cfg.baseline;
    let window = baseline_window(from, to, b.window_days, b.guard_days).ok();
    let params = SpikeParams {
        alpha: b.alpha,
        min_count: 1,
        ratio: 0.0,
        prior_nights: b.prior_nights,
    };
    let species: Vec<&String> = if watched.is_empty() {
        data.species.iter().collect()
    } else {
        watched.iter().collect()
    };
    let regional: BTreeMap<&str, f64> = match window {
        Some(w) => species
            .iter()
            .map(|s| (s.as_str(), data.regional(s, w.from, w.to, now)))
            .collect(),
        None => BTreeMap::new(),
    };
    cfg.sites
        .sites
        .iter()
        .enumerate()
        .map(|(i, site)| {
            let effort = data.nights(i, from, to, now);
            let mut seen = Vec::new();
            if let (Some(w), true) = (window, effort > 0.0) {
                let history_nights = data.nights(i, w.from, w.to, now);
                for sp in &species {
                    let count = data.count(i, sp, from, to);
                    if count == 0 {
                        continue;
                    }
                    let input = SpikeInput {
                        count,
                        exposure_nights: effort,
                        history_events: data.count(i, sp, w.from, w.to),
                        history_nights,
                        regional_rate: regional.get(sp.as_str()).copied().unwrap_or(0.0),
                        baseline: w,
                    };
                    if let Ok(ev) = spike_test(&input, &params) {
                        seen.push(SpeciesNow {
                            scientific_name: (*sp).clone(),
                            count,
                            expected: ev.expected,
                            p_value: ev.p_value,
                            baseline_rate: ev.baseline_rate,
                        });
                    }
                }
            }
            seen.sort_by(|a, b| a.p_value.total_cmp(&b.p_value));
            let level = if silent.contains(&site.deployment_id.as_str()) {
                Level::Silent
            } else if effort <= 0.0 {
                Level::NoEffort
            } else {
                match seen.first() {
                    None => Level::Quiet,
                    Some(s) if s.p_value < b.alpha => Level::High,
                    Some(s) if s.p_value < RAISED_P => Level::Raised,
                    Some(_) => Level::Usual,
                }
            };
            SiteNow {
                deployment_id: site.deployment_id.clone(),
                level,
                effort_nights: effort,
                species: seen,
            }
        })
        .collect()
}

/// The central 80 % of the baseline's predictive count for `exposure`
/// camera-nights: the smallest `lo` with P(Y <= lo) >= 0.1 and the
/// smallest `hi` with P(Y <= hi) >= 0.9, from the engine's upper tail.
pub fn usual_band(g: &GammaRate, exposure: f64) -> Option<(u64, u64)> {
    if !(exposure.is_finite() && exposure > 0.0) {
        return None;
    }
    // P(Y <= k) = 1 - P(Y >= k + 1).
    let quantile = |q: f64| (0..10_000u64).find(|k| 1.0 - g.upper_tail(k + 1, exposure) >= q);
    Some((quantile(0.1)?, quantile(0.9)?))
}

/// RAI per species at a site over the chart's nights: (species, events,
/// camera-nights, RAI or None at zero effort).
pub type RaiRow = (String, u64, f64, Option<f64>);

/// The site's 14 nights, per species, against the baseline band; and the
/// RAI of each species over those nights. A night is local noon to local
/// noon in the service's time zone, labelled by the evening's date. The
/// last column is the night under way once its evening has come (from
/// 18:00 local; its effort counted to `now`), before that the last full
/// night, so an afternoon does not show a near-empty night.
/// `names` gives the label a person reads for a scientific name.
pub fn site_nights(
    cfg: &Config,
    data: &ActivityData,
    site: usize,
    now: DateTime<Utc>,
    names: &dyn Fn(&str) -> String,
) -> (NightsChart, Vec<RaiRow>) {
    let tz = cfg.service.timezone;
    let noon = NaiveTime::from_hms_opt(12, 0, 0).unwrap_or(NaiveTime::MIN);
    let last = crate::calendar::local_date_of(now - Duration::hours(18), tz);
    let b = &cfg.baseline;
    let mut bounds = Vec::new();
    for k in (0..i64::from(NIGHTS)).rev() {
        let d = last - Duration::days(k);
        let from = crate::calendar::resolve_local(d, noon, tz);
        let to = crate::calendar::resolve_local(d + Duration::days(1), noon, tz);
        bounds.push((d, from, to));
    }
    let nights: Vec<NightColumn> = bounds
        .iter()
        .map(|(d, from, to)| NightColumn {
            label: d.format("%a %-d").to_string(),
            effort_nights: data.nights(site, *from, (*to).min(now), now),
        })
        .collect();
    // Species with events at this site in the nights or the baseline
    // window before the first; watched ones first, then by events.
    let first_window = bounds
        .first()
        .and_then(|(_, f, t)| baseline_window(*f, *t, b.window_days, b.guard_days).ok());
    let span_from = first_window.map(|w| w.from).unwrap_or(now);
    let watched = watched_species(cfg);
    let mut species: Vec<(bool, u64, String)> = data
        .species
        .iter()
        .filter_map(|sp| {
            let n = data.count(site, sp, span_from, now + Duration::seconds(1));
            (n > 0).then(|| (watched.contains(sp), n, sp.clone()))
        })
        .collect();
    species.sort_by(|a, b| b.0.cmp(&a.0).then(b.1.cmp(&a.1)).then(a.2.cmp(&b.2)));
    species.truncate(MAX_SERIES);

    let mut series = Vec::new();
    let mut rai_rows = Vec::new();
    for (_, _, sp) in &species {
        let mut points = Vec::new();
        for ((_, from, to), col) in bounds.iter().zip(&nights) {
            let count = data.count(site, sp, *from, *to);
            let (expected, band) = match baseline_window(*from, *to, b.window_days, b.guard_days) {
                Ok(w) if col.effort_nights > 0.0 => {
                    let posterior =
                        GammaRate::prior(data.regional(sp, w.from, w.to, now), b.prior_nights)
                            .and_then(|g| {
                                g.update(
                                    data.count(site, sp, w.from, w.to),
                                    data.nights(site, w.from, w.to, now),
                                )
                            });
                    match posterior {
                        Ok(g) => (
                            Some(g.expected(col.effort_nights)),
                            usual_band(&g, col.effort_nights),
                        ),
                        Err(_) => (None, None),
                    }
                }
                _ => (None, None),
            };
            points.push(NightPoint {
                count,
                expected,
                band,
            });
        }
        let events: u64 = points.iter().map(|p| p.count).sum();
        let effort: f64 = nights.iter().map(|c| c.effort_nights).sum();
        rai_rows.push((sp.clone(), events, effort, rai(events, effort)));
        series.push(Series {
            label: names(sp),
            scientific_name: sp.clone(),
            points,
        });
    }
    let site_cfg = &cfg.sites.sites[site.min(cfg.sites.sites.len().saturating_sub(1))];
    let title = if site_cfg.label() == site_cfg.deployment_id {
        format!(
            "{}: independent events in the last {NIGHTS} nights",
            site_cfg.deployment_id
        )
    } else {
        format!(
            "{} {}: independent events in the last {NIGHTS} nights",
            site_cfg.deployment_id,
            site_cfg.label()
        )
    };
    (
        NightsChart {
            title,
            nights,
            series,
        },
        rai_rows,
    )
}

/// Most species panels in one chart.
pub const MAX_SERIES: usize = 8;

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::{Config, Files};
    use chrono::TimeZone;
    use std::path::Path;

    const SITES: &str = "deploymentID,latitude,longitude,deploymentStart,deploymentEnd\nKB-01,-31.56,148.05,2026-01-01T00:00:00+11:00,\nKB-02,-31.64,148.14,2026-01-01T00:00:00+11:00,\nKB-03,-31.64,148.24,2026-01-01T00:00:00+11:00,\n";

    fn cfg() -> Config {
        let src = "[service]\ntimezone = \"Australia/Sydney\"\n[sites]\nfile = \"sites.csv\"\nsilence_hours = 12\n[[subscriber]]\nid = \"a\"\narea = \"all\"\n[[subscriber.watch]]\ntrigger = \"presence\"\nspecies = [\"Canis familiaris\"]\nchannels = [\"mqtt\"]\n";
        let files = Files {
            read: &|_p: &Path| Ok(SITES.to_string()),
            env: &|_| None,
        };
        match crate::config::parse(Path::new("/x/outrider.toml"), src, &[], &files) {
            Ok(c) => c,
            Err(e) => panic!("{e}"),
        }
    }

    fn at(day: u32, h: u32) -> DateTime<Utc> {
        Utc.with_ymd_and_hms(2026, 6, day, h, 0, 0)
            .single()
            .unwrap_or_default()
    }

    /// Hourly heartbeats at every site from 1 May to `until`, except KB-03
    /// which stops on 20 June; one dog event at KB-01 every fourth night
    /// and `burst` on the last night.
    fn data(c: &Config, until: DateTime<Utc>, burst: u32) -> ActivityData {
        let mut signs = Vec::new();
        let mut t = Utc
            .with_ymd_and_hms(2026, 5, 1, 0, 0, 0)
            .single()
            .unwrap_or_default();
        while t < until {
            for dep in ["KB-01", "KB-02"] {
                signs.push((dep.to_string(), t));
            }
            if t < at(20, 0) {
                signs.push(("KB-03".to_string(), t));
            }
            t += Duration::hours(1);
        }
        let mut events = Vec::new();
        let mut d = Utc
            .with_ymd_and_hms(2026, 5, 1, 14, 0, 0)
            .single()
            .unwrap_or_default();
        while d < until - Duration::hours(24) {
            events.push(EventRow {
                deployment_id: "KB-01".into(),
                scientific_name: "Canis familiaris".into(),
                start: d,
            });
            d += Duration::days(4);
        }
        for k in 0..burst {
            events.push(EventRow {
                deployment_id: "KB-01".into(),
                scientific_name: "Canis familiaris".into(),
                start: until - Duration::hours(10) + Duration::minutes(40 * i64::from(k)),
            });
        }
        ActivityData::build(c, signs, events)
    }

    #[test]
    fn a_burst_well_above_the_baseline_colours_the_site_high_and_a_quiet_site_quiet() {
        let c = cfg();
        let now = at(28, 4);
        let d = data(&c, now, 6);
        let silent = crate::status::silent(
            &crate::store::StatusCounts {
                last_seen: [
                    ("KB-01".to_string(), now),
                    ("KB-02".to_string(), now),
                    ("KB-03".to_string(), at(20, 0)),
                ]
                .into_iter()
                .collect(),
                ..Default::default()
            },
            &c,
            now,
        );
        assert_eq!(silent, vec!["KB-03"]);
        let s = sites_now(&c, &d, now, &silent);
        assert_eq!(s[0].level, Level::High, "{:?}", s[0]);
        // The engine's own numbers: 6 events where about 0.25 per night is
        // usual; the p-value is the spike test's.
        assert_eq!(s[0].species[0].count, 6);
        assert!(s[0].species[0].expected < 1.0, "{:?}", s[0]);
        assert!(s[0].species[0].p_value < c.baseline.alpha);
        assert_eq!(s[1].level, Level::Quiet);
        assert_eq!(s[2].level, Level::Silent);
        // One event on a night where one in four is usual: not unusual.
        let d = data(&c, now, 1);
        assert_eq!(sites_now(&c, &d, now, &[])[0].level, Level::Usual);
    }

    #[test]
    fn the_usual_band_is_the_central_80_percent_of_the_predictive_count() {
        // Gamma(1, 1) and one night: Y is geometric with P(Y >= k) = 0.5^k
        // (METHODS 3's worked example), so P(Y <= 0) = 0.5 >= 0.1 gives
        // lo = 0, and P(Y <= 3) = 0.9375 is the first >= 0.9, so hi = 3.
        let g = GammaRate {
            shape: 1.0,
            rate: 1.0,
        };
        assert_eq!(usual_band(&g, 1.0), Some((0, 3)));
        assert_eq!(usual_band(&g, 0.0), None);
    }

    #[test]
    fn fourteen_nights_of_counts_effort_and_bands_for_the_species_seen() {
        let c = cfg();
        let now = at(28, 4); // 14:00 AEST 28 June: the night of the 27th is over
        let d = data(&c, now, 6);
        let (chart, rai) = site_nights(&c, &d, 0, now, &|s| s.to_lowercase());
        assert_eq!(chart.nights.len(), 14);
        assert_eq!(chart.nights[13].label, "Sat 27");
        assert_eq!(chart.nights[0].label, "Sun 14");
        assert!(chart
            .nights
            .iter()
            .all(|n| (n.effort_nights - 1.0).abs() < 0.05));
        assert_eq!(chart.series.len(), 1);
        let p = &chart.series[0].points;
        let total: u64 = p.iter().map(|x| x.count).sum();
        assert_eq!(p[13].count, 6, "the burst on the last night");
        assert!(p[13].band.is_some_and(|(_, hi)| 6 > hi), "{:?}", p[13]);
        assert!(p.iter().all(|x| x.expected.is_some()));
        assert_eq!(rai[0].1, total);
        // RAI = 100 x events / camera-nights (METHODS 2).
        let want = 100.0 * total as f64 / chart.nights.iter().map(|n| n.effort_nights).sum::<f64>();
        assert!((rai[0].3.unwrap_or(0.0) - want).abs() < 1e-9);
        // KB-03 stopped on 20 June: its later nights have no effort and no band.
        let (chart3, _) = site_nights(&c, &d, 2, now, &|s| s.to_string());
        assert_eq!(chart3.nights[13].effort_nights, 0.0);
        assert!(chart3.series.is_empty(), "no events at KB-03");
    }
}
