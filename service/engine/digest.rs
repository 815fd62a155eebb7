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
use std::collections::{BTreeSet, BinaryHeap, HashMap};

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
    pub fn digest(&mut self, sub: usize, due: DateTime<Utc>, now: DateTime<Utc>) -> Digest {
        let (from, to) = digest::period(due);
        let cfg = self.cfg.clone();
        let s = &cfg.subscribers[sub];
        let watched: BTreeSet<String> = s
            .watches
            .iter()
            .flat_map(|w| w.species.iter().cloned())
            .collect();
        let coordinator = matches!(s.area_spec, AreaSpec::All);
        let subscriber_id = s.id.clone();
        let b = self.cfg.baseline.clone();
        let silence = Duration::seconds((self.cfg.sites.silence_hours * 3600.0) as i64);
        let sites: Vec<usize> = self.rules.sites_of(sub).iter().map(|&(i, _)| i).collect();
        let window = baseline_window(from, to, b.window_days, b.guard_days).ok();

        let mut rows = Vec::new();
        let mut silent = Vec::new();
        let mut camera_nights = 0.0;
        // Per covered site, the posterior of each watched species, for the chart.
        let mut posteriors: Vec<(usize, String, GammaRate)> = Vec::new();
        for &site in &sites {
            let info = self.rules.site(site).clone();
            let dep = info.deployment_id.clone();
            let exposure = self.uptime[site].camera_nights(from, to, now);
            camera_nights += exposure;
            let mut species: BTreeSet<String> = watched.clone();
            species.extend(self.ledger.species_at(&dep).map(str::to_string));
            for sp in species {
                let events = self.ledger.count_starting_in(&dep, &sp, from, to);
                let posterior = window.and_then(|w| {
                    let n = self.ledger.count_starting_in(&dep, &sp, w.from, w.to);
                    let t = self.uptime[site].camera_nights(w.from, w.to, now);
                    let r = self.regional_rate(&sp, w.from, w.to, now);
                    GammaRate::prior(r, b.prior_nights)
                        .and_then(|p| p.update(n, t))
                        .ok()
                });
                let is_watched = watched.contains(&sp);
                if let (true, Some(p)) = (is_watched, posterior) {
                    posteriors.push((site, sp.clone(), p));
                }
                if events == 0 {
                    continue;
                }
                let p_value = posterior.map(|p| p.upper_tail(events, exposure));
                rows.push(ActivityRow {
                    deployment_id: dep.clone(),
                    site_label: info.label().to_string(),
                    vernacular_name: self.vernacular.get(&sp).cloned(),
                    watched: is_watched,
                    events,
                    camera_nights: exposure,
                    expected: posterior.map(|p| p.expected(exposure)),
                    p_value,
                    above_usual: p_value.is_some_and(|p| p < b.alpha),
                    rai: rai(events, exposure),
                    scientific_name: sp,
                });
            }
            let ended = info.deployment_end.is_some_and(|e| e <= now);
            if !ended && !self.options.assume_operating && now - self.last_sign[site] > silence {
                silent.push(SilentCamera {
                    deployment_id: dep,
                    site_label: info.label().to_string(),
                    last_sign: self.last_sign[site],
                });
            }
        }
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
            .map(|k| {
                let end = to - Duration::hours(24 * (CHART_NIGHTS - 1 - k) as i64);
                let start = end - Duration::hours(24);
                let mut events = 0;
                let mut expected = 0.0;
                for (site, sp, p) in &posteriors {
                    let dep = &self.rules.site(*site).deployment_id;
                    events += self.ledger.count_starting_in(dep, sp, start, end);
                    expected += p.expected(self.uptime[*site].camera_nights(start, end, now));
                }
                NightTotal {
                    date: crate::calendar::local_date_of(end, tz),
                    events,
                    expected,
                    usual_high: usual_high(expected),
                }
            })
            .collect();
        Digest {
            subscriber_id,
            due_at: due,
            from,
            to,
            rows,
            nights,
            silent,
            cameras: sites.len(),
            camera_nights,
            notices: Vec::new(),
            coordinator,
            failures: Vec::new(),
        }
    }
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
