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
    by_id: HashMap<String, usize>,
    /// Per site: (subscriber index, distance km) for every subscriber covering it.
    covering: Vec<Vec<(usize, f64)>>,
    /// Per subscriber: (site index, distance km) for the sites it covers.
    covered: Vec<Vec<(usize, f64)>>,
    /// (subscriber, watch, site) for every silence watch and covered site.
    silence: Vec<(usize, usize, usize)>,
    /// (subscriber, watch, site) for every build-up watch and covered site.
    buildup: Vec<(usize, usize, usize)>,
    /// `[subscriber][watch]`: time zone, hours and season (all `Copy`), so
    /// the window test needs no `Config`.
    windows: Vec<Vec<Window>>,
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
        let mut covering = vec![Vec::new(); sites.len()];
        let mut covered = Vec::with_capacity(cfg.subscribers.len());
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
            let cov = index.coverage_of(&sub.area);
            for (site, d) in &cov {
                covering[*site].push((si, *d));
            }
            for (wi, w) in sub.watches.iter().enumerate() {
                if w.trigger == TriggerKind::Silence {
                    silence.extend(cov.iter().map(|(site, _)| (si, wi, *site)));
                }
                if w.trigger == TriggerKind::BuildUp {
                    buildup.extend(cov.iter().map(|(site, _)| (si, wi, *site)));
                }
            }
            covered.push(cov);
        }
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

    /// Subscribers covering site `i`, with the distance a notice shows.
    pub fn covering(&self, i: usize) -> &[(usize, f64)] {
        &self.covering[i]
    }

    /// Sites subscriber `s` covers (in sites-file order), with the distance
    /// a notice shows.
    pub fn sites_of(&self, s: usize) -> &[(usize, f64)] {
        &self.covered[s]
    }

    pub fn silence_watches(&self) -> &[(usize, usize, usize)] {
        &self.silence
    }

    pub fn buildup_watches(&self) -> &[(usize, usize, usize)] {
        &self.buildup
    }

    /// The watch's hours and season hold at `at` (the subscriber's time
    /// zone; dusk and dawn at the site).
    pub fn in_window(&self, sub: usize, watch: usize, site: usize, at: DateTime<Utc>) -> bool {
        let Some((tz, hours, season)) = self.windows.get(sub).and_then(|w| w.get(watch)) else {
            return false;
        };
        hours.contains(at, *tz, self.points[site])
            && season.as_ref().is_none_or(|s| s.contains(at, *tz))
    }
}

/// Sites were range-checked at load; (0, 0) is never used in practice.
fn fallback_point() -> LatLon {
    match LatLon::new(0.0, 0.0) {
        Ok(p) => p,
        Err(_) => unreachable!("0, 0 is a valid position"),
    }
}
