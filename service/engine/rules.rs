//! The rule book: each subscriber's covered sites worked out once at load
//! (an R-tree over the sites), turned around so that matching an event is a
//! lookup by site, plus the time-window test of a watch. Pure.

use crate::config::{Config, Site, TriggerKind};
use crate::geo::{LatLon, SiteIndex};
use chrono::{DateTime, Utc};
use std::collections::HashMap;

/// Sites, subscribers and who covers what.
pub struct RuleBook {
    sites: Vec<Site>,
    points: Vec<LatLon>,
    by_id: HashMap<String, usize, foldhash::fast::RandomState>,
    /// Who covers what, both ways, as flat lists with offsets (4 bytes a
    /// pair): a million subscribers over 10,000 sites make tens of millions
    /// of pairs. Distances are worked out when a notice needs one
    /// ([`RuleBook::distance_km`]).
    covering: Csr,
    covered: Csr,
    /// (subscriber, watch, site) for every silence watch and covered site.
    silence: Vec<(usize, usize, usize)>,
    /// (subscriber, watch, site) for every build-up watch and covered site.
    buildup: Vec<(usize, usize, usize)>,
    /// `[subscriber][watch]`: time zone, hours and season (all `Copy`), so
    /// the window test needs no `Config`.
    windows: Vec<Vec<Window>>,
}

/// Lists of indices in one flat vector: list `i` is
/// `items[offsets[i]..offsets[i + 1]]`.
#[derive(Debug, Default)]
struct Csr {
    offsets: Vec<u32>,
    items: Vec<u32>,
}

impl Csr {
    fn get(&self, i: usize) -> &[u32] {
        match (self.offsets.get(i), self.offsets.get(i + 1)) {
            (Some(&a), Some(&b)) => &self.items[a as usize..b as usize],
            _ => &[],
        }
    }

    /// The same pairs turned around: for each of `n` targets, the lists
    /// holding it, in list order.
    fn transpose(&self, n: usize) -> Csr {
        let mut counts = vec![0u32; n + 1];
        for &t in &self.items {
            counts[t as usize + 1] += 1;
        }
        for i in 0..n {
            counts[i + 1] += counts[i];
        }
        let mut next = counts.clone();
        let mut items = vec![0u32; self.items.len()];
        for list in 0..self.offsets.len().saturating_sub(1) {
            for &t in self.get(list) {
                let slot = &mut next[t as usize];
                items[*slot as usize] = list as u32;
                *slot += 1;
            }
        }
        Csr {
            offsets: counts,
            items,
        }
    }
}

type Window = (
    chrono_tz::Tz,
    crate::calendar::Hours,
    Option<crate::calendar::Season>,
);

impl RuleBook {
    pub fn compile(cfg: &Config) -> Self {
        let sites = cfg.sites.sites.clone();
        let points: Vec<LatLon> = sites
            .iter()
            .map(|s| LatLon::new(s.latitude, s.longitude).unwrap_or_else(|_| fallback_point()))
            .collect();
        let keyed: Vec<(String, LatLon)> = sites
            .iter()
            .zip(&points)
            .map(|(s, p)| (s.deployment_id.clone(), *p))
            .collect();
        let index = SiteIndex::new(&keyed);
        let by_id = sites
            .iter()
            .enumerate()
            .map(|(i, s)| (s.deployment_id.clone(), i))
            .collect();
        let mut covered = Csr {
            offsets: Vec::with_capacity(cfg.subscribers.len() + 1),
            items: Vec::new(),
        };
        covered.offsets.push(0);
        let mut silence = Vec::new();
        let mut buildup = Vec::new();
        let mut windows = Vec::with_capacity(cfg.subscribers.len());
        for (si, sub) in cfg.subscribers.iter().enumerate() {
            windows.push(
                sub.watches
                    .iter()
                    .map(|w| (sub.timezone, w.hours, w.season))
                    .collect(),
            );
            let cov = index.covered_by(&sub.area);
            for (wi, w) in sub.watches.iter().enumerate() {
                if w.trigger == TriggerKind::Silence {
                    silence.extend(cov.iter().map(|&site| (si, wi, site as usize)));
                }
                if w.trigger == TriggerKind::BuildUp {
                    buildup.extend(cov.iter().map(|&site| (si, wi, site as usize)));
                }
            }
            covered.items.extend_from_slice(&cov);
            covered.offsets.push(covered.items.len() as u32);
        }
        covered.items.shrink_to_fit();
        let covering = covered.transpose(sites.len());
        RuleBook {
            sites,
            points,
            by_id,
            covering,
            covered,
            silence,
            buildup,
            windows,
        }
    }

    pub fn site_index(&self, deployment_id: &str) -> Option<usize> {
        self.by_id.get(deployment_id).copied()
    }

    pub fn site(&self, i: usize) -> &Site {
        &self.sites[i]
    }

    pub fn sites(&self) -> &[Site] {
        &self.sites
    }

    /// Subscribers covering site `i` (in config order).
    pub fn covering(&self, i: usize) -> &[u32] {
        self.covering.get(i)
    }

    /// Sites subscriber `s` covers (in sites-file order).
    pub fn sites_of(&self, s: usize) -> &[u32] {
        self.covered.get(s)
    }

    /// The distance a notice shows from `area` (the subscriber's) to a
    /// site it covers, km: geodesic from a circle's centre, 0 inside a
    /// polygon or else to its boundary, 0 for listed sites and `all`.
    pub fn distance_km(&self, area: &crate::geo::Area, site: usize) -> f64 {
        let s = &self.sites[site];
        area.covers(self.points[site], &s.deployment_id)
            .unwrap_or(0.0)
    }

    pub fn silence_watches(&self) -> &[(usize, usize, usize)] {
        &self.silence
    }

    pub fn buildup_watches(&self) -> &[(usize, usize, usize)] {
        &self.buildup
    }

    /// The watch's hours and season hold at `at` (the subscriber's time
    /// zone; dusk and dawn at the site).
    /// `twilight` keeps the civil twilight of each (site, local date, zone)
    /// worked out so far: the solar equations cost more than the rest of an
    /// event's matching, and a site's night is the same for every watch.
    pub fn in_window(
        &self,
        sub: usize,
        watch: usize,
        site: usize,
        at: DateTime<Utc>,
        twilight: &mut TwilightCache,
    ) -> bool {
        let Some((tz, hours, season)) = self.windows.get(sub).and_then(|w| w.get(watch)) else {
            return false;
        };
        let in_hours = match hours {
            crate::calendar::Hours::DuskToDawn => {
                twilight.get(site, self.points[site], at, *tz).is_night(at)
            }
            other => other.contains(at, *tz, self.points[site]),
        };
        in_hours && season.as_ref().is_none_or(|s| s.contains(at, *tz))
    }
}

/// Civil twilight per (site, local date, zone), as
/// [`crate::geo::solar::civil_twilight`] gives it. Bounded: emptied when it
/// holds more than [`TwilightCache::LIMIT`] entries (a year of 10,000 sites
/// is 3.65 million; recent dates are what events ask for).
#[derive(Debug, Default)]
pub struct TwilightCache {
    map: HashMap<(usize, chrono::NaiveDate, chrono_tz::Tz), crate::geo::solar::CivilTwilight>,
}

impl TwilightCache {
    pub const LIMIT: usize = 200_000;

    /// The twilight of the local date (in `tz`) of `at` at `site`.
    pub fn get(
        &mut self,
        site: usize,
        point: LatLon,
        at: DateTime<Utc>,
        tz: chrono_tz::Tz,
    ) -> crate::geo::solar::CivilTwilight {
        let date = at.with_timezone(&tz).date_naive();
        if let Some(t) = self.map.get(&(site, date, tz)) {
            return *t;
        }
        if self.map.len() >= Self::LIMIT {
            self.map.clear();
        }
        let t = crate::geo::solar::civil_twilight(date, point, tz);
        self.map.insert((site, date, tz), t);
        t
    }
}

/// Sites were range-checked at load; (0, 0) is never used in practice.
fn fallback_point() -> LatLon {
    match LatLon::new(0.0, 0.0) {
        Ok(p) => p,
        Err(_) => unreachable!("0, 0 is a valid position"),
    }
}
