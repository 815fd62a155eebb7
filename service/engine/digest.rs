//! The engine's part of the daily digest: when each subscriber's digest is
//! due, and the activity numbers it carries, from the working set (events,
//! effort, baselines) the notices were decided on. The store adds the
//! notices and failed deliveries when it queues the digest.

use super::{Engine, Output};
use crate::activity::{baseline_window, rai, GammaRate};
use crate::config::AreaSpec;
use crate::digest::{self, ActivityRow, Digest, NightTotal, SilentCamera, CHART_NIGHTS};
use chrono::{DateTime, Duration, Utc};
use std::cmp::Reverse;
use std::collections::{BTreeMap, BTreeSet, BinaryHeap, HashMap};

/// At most this many digests are built per tick, so a morning when many
/// subscribers share a digest time does not hold up ingest for long.
pub const DIGESTS_PER_TICK: usize = 2000;

/// Due digests, earliest first.
#[derive(Debug, Default)]
pub(super) struct DigestQueue {
    heap: BinaryHeap<Reverse<(DateTime<Utc>, usize)>>,
    /// Due instants of the last digest recorded per subscriber id, until
    /// the first tick turns them into the queue.
    history: Option<HashMap<String, DateTime<Utc>>>,
}

impl Engine {
    /// Turns digests on, given the due instant of the last digest recorded
    /// per subscriber (from the store). The first [`Engine::tick`] then
    /// queues each subscriber's next digest and at most one catch-up.
    pub fn schedule_digests(&mut self, last: HashMap<String, DateTime<Utc>>) {
        self.digests = Some(DigestQueue {
            heap: BinaryHeap::new(),
            history: Some(last),
        });
    }

    /// Digests due by `now` (called from `tick`).
    pub(super) fn due_digests(&mut self, now: DateTime<Utc>, out: &mut Vec<Output>) {
        let Some(mut q) = self.digests.take() else {
            return;
        };
        if let Some(history) = q.history.take() {
            // Digests go by email: a subscriber without an address gets none.
            for (i, s) in self.cfg.subscribers.iter().enumerate() {
                if s.email.is_none() {
                    continue;
                }
                let (missed, next) =
                    digest::catch_up(history.get(&s.id).copied(), now, s.digest_at, s.timezone);
                q.heap.push(Reverse((missed.unwrap_or(next), i)));
            }
        }
        let mut built = 0;
        while let Some(Reverse((due, sub))) = q.heap.peek().copied() {
            if due > now || built >= DIGESTS_PER_TICK {
                break;
            }
            q.heap.pop();
            let s = &self.cfg.subscribers[sub];
            let (tz, at) = (s.timezone, s.digest_at);
            // After a stall only the latest missed digest goes out.
            let due = due.max(digest::latest_due(now, at, tz));
            let d = self.digest(sub, due, now);
            out.push(Output::Digest(Box::new(d)));
            built += 1;
            q.heap.push(Reverse((
                crate::calendar::next_occurrence(due, at, tz),
                sub,
            )));
        }
        self.digests = Some(q);
    }

    /// The activity part of subscriber `sub`'s digest due at `due`, as of
    /// `now`: events per covered site and species in the 24 h before `due`
    /// against the baseline, the 14-night series, and silent cameras.
    ///
    /// The per-site numbers (effort, counts, posteriors) are the same for
    /// every subscriber covering the site, so they are worked out once per
    /// (due, now) and shared: a morning when 100,000 digests fall due
    /// costs one pass over the sites plus a sum per subscriber.
    pub fn digest(&mut self, sub: usize, due: DateTime<Utc>, now: DateTime<Utc>) -> Digest {
        let (from, to) = digest::period(due);
        let cfg = self.cfg.clone();
        let s = &cfg.subscribers[sub];
        let watched: BTreeSet<&str> = s
            .watches
            .iter()
            .flat_map(|w| w.species.iter().map(String::as_str))
            .collect();
        let alpha = cfg.baseline.alpha;
        let silence = Duration::seconds((cfg.sites.silence_hours * 3600.0) as i64);
        let mut cache = match self.digest_cache.take() {
            Some(c) if c.due == due && c.now == now => c,
            _ => DigestCache {
                due,
                now,
                sites: HashMap::new(),
            },
        };
        let mut rows = Vec::new();
        let mut silent = Vec::new();
        let mut camera_nights = 0.0;
        let mut night_events = [0u64; CHART_NIGHTS];
        let mut night_expected = [0.0f64; CHART_NIGHTS];
        let covered: Vec<usize> = self
            .rules
            .sites_of(sub)
            .iter()
            .map(|&i| i as usize)
            .collect();
        for &site in &covered {
            if let std::collections::hash_map::Entry::Vacant(e) = cache.sites.entry(site) {
                e.insert(self.site_facts(site, due, now));
            }
            for sp in &watched {
                let known = cache
                    .sites
                    .get(&site)
                    .is_some_and(|f| f.species.contains_key(*sp));
                if !known {
                    let f = self.species_facts(site, sp, due, now);
                    if let Some(facts) = cache.sites.get_mut(&site) {
                        facts.species.insert((*sp).to_string(), f);
                    }
                }
            }
            let Some(f) = cache.sites.get(&site) else {
                continue;
            };
            let info = self.rules.site(site);
            camera_nights += f.exposure;
            for (sp, sf) in &f.species {
                let is_watched = watched.contains(sp.as_str());
                if is_watched {
                    if let Some(p) = sf.posterior {
                        for k in 0..CHART_NIGHTS {
                            night_events[k] += sf.nights[k];
                            night_expected[k] += p.expected(f.night_exposure[k]);
                        }
                    }
                }
                if sf.events == 0 {
                    continue;
                }
                let p_value = sf.posterior.map(|p| p.upper_tail(sf.events, f.exposure));
                rows.push(ActivityRow {
                    deployment_id: info.deployment_id.clone(),
                    site_label: info.label().to_string(),
                    scientific_name: sp.clone(),
                    vernacular_name: self.vernacular.get(sp).cloned(),
                    watched: is_watched,
                    events: sf.events,
                    camera_nights: f.exposure,
                    expected: sf.posterior.map(|p| p.expected(f.exposure)),
                    p_value,
                    above_usual: p_value.is_some_and(|p| p < alpha),
                    rai: rai(sf.events, f.exposure),
                });
            }
            let ended = info.deployment_end.is_some_and(|e| e <= now);
            if !ended && !self.options.assume_operating && now - self.last_sign[site] > silence {
                silent.push(SilentCamera {
                    deployment_id: info.deployment_id.clone(),
                    site_label: info.label().to_string(),
                    last_sign: self.last_sign[site],
                });
            }
        }
        self.digest_cache = Some(cache);
        rows.sort_by(|a, b| {
            (
                !a.watched,
                Reverse(a.events),
                &a.deployment_id,
                &a.scientific_name,
            )
                .cmp(&(
                    !b.watched,
                    Reverse(b.events),
                    &b.deployment_id,
                    &b.scientific_name,
                ))
        });
        let tz = s.timezone;
        let nights = (0..CHART_NIGHTS)
            .map(|k| NightTotal {
                date: crate::calendar::local_date_of(night_bounds(to, k).1, tz),
                events: night_events[k],
                expected: night_expected[k],
                usual_high: usual_high(night_expected[k]),
            })
            .collect();
        Digest {
            subscriber_id: s.id.clone(),
            due_at: due,
            from,
            to,
            rows,
            nights,
            silent,
            cameras: covered.len(),
            camera_nights,
            notices: Vec::new(),
            coordinator: matches!(s.area_spec, AreaSpec::All),
            failures: Vec::new(),
        }
    }

    /// Effort of one site for a digest due at `due`, and the facts of every
    /// species with events held there.
    fn site_facts(&mut self, site: usize, due: DateTime<Utc>, now: DateTime<Utc>) -> SiteFacts {
        let (from, to) = digest::period(due);
        let mut night_exposure = [0.0; CHART_NIGHTS];
        for (k, e) in night_exposure.iter_mut().enumerate() {
            let (a, b) = night_bounds(to, k);
            *e = self.uptime[site].camera_nights(a, b, now);
        }
        let dep = self.rules.site(site).deployment_id.clone();
        let held: Vec<String> = self.ledger.species_at(&dep).map(str::to_string).collect();
        let mut species = BTreeMap::new();
        for sp in held {
            let f = self.species_facts(site, &sp, due, now);
            species.insert(sp, f);
        }
        SiteFacts {
            exposure: self.uptime[site].camera_nights(from, to, now),
            night_exposure,
            species,
        }
    }

    /// Counts and baseline of one species at one site for a digest due at `due`.
    fn species_facts(
        &mut self,
        site: usize,
        sp: &str,
        due: DateTime<Utc>,
        now: DateTime<Utc>,
    ) -> SpeciesFacts {
        let (from, to) = digest::period(due);
        let b = self.cfg.baseline.clone();
        let dep = self.rules.site(site).deployment_id.clone();
        let posterior = baseline_window(from, to, b.window_days, b.guard_days)
            .ok()
            .and_then(|w| {
                let n = self.ledger.count_starting_in(&dep, sp, w.from, w.to);
                let t = self.uptime[site].camera_nights(w.from, w.to, now);
                let r = self.regional_rate(sp, w.from, w.to, now);
                GammaRate::prior(r, b.prior_nights)
                    .and_then(|p| p.update(n, t))
                    .ok()
            });
        let mut nights = [0u64; CHART_NIGHTS];
        for (k, c) in nights.iter_mut().enumerate() {
            let (a, b) = night_bounds(to, k);
            *c = self.ledger.count_starting_in(&dep, sp, a, b);
        }
        SpeciesFacts {
            events: self.ledger.count_starting_in(&dep, sp, from, to),
            posterior,
            nights,
        }
    }
}

/// `[start, end)` of chart night `k` (0 the oldest) of a digest whose
/// period ends at `to`: 24 h periods, the last one the digest's own.
fn night_bounds(to: DateTime<Utc>, k: usize) -> (DateTime<Utc>, DateTime<Utc>) {
    let end = to - Duration::hours(24 * (CHART_NIGHTS - 1 - k) as i64);
    (end - Duration::hours(24), end)
}

/// Per-site digest numbers for one (due, now), shared by subscribers.
#[derive(Debug, Default)]
pub(super) struct DigestCache {
    due: DateTime<Utc>,
    now: DateTime<Utc>,
    sites: HashMap<usize, SiteFacts>,
}

#[derive(Debug, Clone)]
struct SiteFacts {
    exposure: f64,
    night_exposure: [f64; CHART_NIGHTS],
    species: BTreeMap<String, SpeciesFacts>,
}

#[derive(Debug, Clone, Copy)]
struct SpeciesFacts {
    events: u64,
    posterior: Option<GammaRate>,
    nights: [u64; CHART_NIGHTS],
}

/// The top of the usual range for a Poisson count with this mean: the
/// largest `c` with `P(Y >= c) >= 0.05`.
pub fn usual_high(mean: f64) -> u64 {
    if !(mean.is_finite() && mean > 0.0) {
        return 0;
    }
    crate::activity::critical_count(0.05, |c| crate::activity::poisson_upper_tail(c, mean))
        .map_or(0, |c| c.saturating_sub(1))
}

#[cfg(test)]
#[allow(clippy::unwrap_used)]
mod tests {
    use super::*;

    #[test]
    fn usual_high_against_scipy() {
        // Reference: scipy.stats.poisson 1.17.1, the largest c with
        // poisson.sf(c - 1, mu) >= 0.05, computed by
        // `c = 0; while poisson.sf(c, mu) >= 0.05: c += 1`.
        for (mu, c) in [(0.3, 1), (1.0, 3), (4.0, 8), (10.0, 15), (37.5, 48)] {
            assert_eq!(usual_high(mu), c, "mu {mu}");
        }
        assert_eq!(usual_high(0.0), 0);
    }
}
