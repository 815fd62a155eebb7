//! The synthetic feed of the invented district: observation and heartbeat
//! messages, deterministic for a seed, so the demo, tests and benchmarks see
//! the same stream.
//!
//! Each (site, hour) draws its own random numbers from a seed derived from
//! the pair, so what a given hour holds does not depend on how the caller
//! slices time. Built in: daily rhythms (dogs and foxes mostly at night), a
//! feral pig near one property, the first fallow deer at a site, a spike of
//! wild-dog visits at one site, and one camera that goes silent.

use super::district::{hour_weight, sites, DemoSite, SPECIES};
use chrono::{DateTime, Duration, Timelike, Utc};
use chrono_tz::Tz;
use rand::rngs::SmallRng;
use rand::{Rng, SeedableRng};
use serde_json::json;

/// One message to publish.
#[derive(Debug, Clone, PartialEq)]
pub struct FeedMessage {
    pub at: DateTime<Utc>,
    pub topic: String,
    pub payload: Vec<u8>,
}

/// The scripted happenings, as offsets from the feed's origin (the moment
/// the demo goes live; negative offsets lie in the history it backfills).
#[derive(Debug, Clone)]
pub struct Scenario {
    /// KB-11 stops sending anything from this offset on.
    pub silent_from: Duration,
    /// Wild dogs at KB-07 at this many independent events per night within the window.
    pub spike_window: (Duration, Duration),
    pub spike_rate_per_night: f64,
    /// A feral pig at KB-06 at this offset.
    pub pig_at: Duration,
    /// The first fallow deer at KB-03 at this offset.
    pub deer_at: Duration,
}

impl Default for Scenario {
    fn default() -> Self {
        Self {
            silent_from: Duration::hours(-11) - Duration::minutes(30),
            spike_window: (Duration::minutes(10), Duration::hours(12)),
            spike_rate_per_night: 36.0,
            pig_at: Duration::minutes(20),
            deer_at: Duration::minutes(50),
        }
    }
}

/// The feed: sites, species, the scenario and a seed.
pub struct Feed {
    pub origin: DateTime<Utc>,
    pub prefix: String,
    pub seed: u64,
    pub scenario: Scenario,
    pub tz: Tz,
    /// Whether the hourly heartbeats are in the stream (a load test may
    /// want observations only).
    pub heartbeats: bool,
    /// Put in front of every `observationID` (and `mediaID`), so that two
    /// runs of a load test over the same hours do not collide.
    pub id_prefix: String,
    sites: Vec<DemoSite>,
}

fn mix(mut x: u64) -> u64 {
    // splitmix64 finaliser
    x = x.wrapping_add(0x9E37_79B9_7F4A_7C15);
    x = (x ^ (x >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    x = (x ^ (x >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    x ^ (x >> 31)
}

fn poisson(rng: &mut SmallRng, lambda: f64) -> u32 {
    // Knuth's method; lambda here is small (well under 10).
    let l = (-lambda).exp();
    let mut k = 0;
    let mut p = 1.0;
    loop {
        p *= rng.gen::<f64>();
        if p <= l || k > 1000 {
            return k;
        }
        k += 1;
    }
}

impl Feed {
    pub fn new(origin: DateTime<Utc>, prefix: impl Into<String>, seed: u64) -> Self {
        Self::with_sites(origin, prefix, seed, sites())
    }

    /// The same feed over other sites (e.g. [`super::district::grid`]):
    /// the demo's species, rates and rhythms at every site.
    pub fn with_sites(
        origin: DateTime<Utc>,
        prefix: impl Into<String>,
        seed: u64,
        sites: Vec<DemoSite>,
    ) -> Self {
        Self {
            origin,
            prefix: prefix.into(),
            seed,
            scenario: Scenario::default(),
            tz: chrono_tz::Australia::Sydney,
            heartbeats: true,
            id_prefix: String::new(),
            sites,
        }
    }

    /// The sites the feed covers.
    pub fn sites(&self) -> &[DemoSite] {
        &self.sites
    }

    /// Every message whose time lies in `[from, to)`, in time order.
    pub fn between(&self, from: DateTime<Utc>, to: DateTime<Utc>) -> Vec<FeedMessage> {
        let mut out = Vec::new();
        if to <= from {
            return out;
        }
        let hour0 = (from - self.origin).num_seconds().div_euclid(3600) - 1;
        let hour1 = (to - self.origin).num_seconds().div_euclid(3600) + 1;
        for h in hour0..=hour1 {
            for (i, site) in self.sites.iter().enumerate() {
                self.hour(i, site, h, &mut |m| {
                    if m.at >= from && m.at < to {
                        out.push(m);
                    }
                });
            }
        }
        out.sort_by(|a, b| a.at.cmp(&b.at).then_with(|| a.topic.cmp(&b.topic)));
        out
    }

    fn hour(&self, idx: usize, site: &DemoSite, h: i64, emit: &mut dyn FnMut(FeedMessage)) {
        let start = self.origin + Duration::hours(h);
        let offset = Duration::hours(h);
        if site.id == "KB-11" && offset >= self.scenario.silent_from {
            return;
        }
        let mut rng = SmallRng::seed_from_u64(mix(self.seed
            ^ mix(idx as u64 + 1)
            ^ mix(h as u64 ^ 0xA5A5)));
        // A heartbeat at a fixed minute of every hour (the same random
        // draws either way, so leaving heartbeats out changes nothing else).
        let hb_at = start + Duration::minutes(7 + (idx % 50) as i64);
        let battery = (100.0 - (h.max(0) as f64) * 0.05).max(5.0);
        let images: i32 = rng.gen_range(0..12);
        if self.heartbeats {
            emit(FeedMessage {
                at: hb_at,
                topic: format!("{}/{}/heartbeat", self.prefix, site.id),
                payload: json!({
                    "deploymentID": site.id,
                    "timestamp": hb_at.with_timezone(&self.tz).to_rfc3339(),
                    "batteryPercent": (battery * 10.0).round() / 10.0,
                    "signalDbm": -70 - (idx as i64 % 5) * 6,
                    "imagesSinceLast": images,
                })
                .to_string()
                .into_bytes(),
            });
        }
        let local_hour = start.with_timezone(&self.tz).hour();
        for (si, sp) in SPECIES.iter().enumerate() {
            let mut rate = sp.rate_per_night;
            // Pigs keep to the southern half of the district.
            if sp.scientific_name == "Sus scrofa" && idx < 8 {
                rate = 0.0;
            }
            let (s0, s1) = self.scenario.spike_window;
            let mut per_hour = rate * hour_weight(sp.rhythm, local_hour);
            if sp.scientific_name == "Canis familiaris"
                && site.id == "KB-07"
                && offset + Duration::hours(1) > s0
                && offset < s1
            {
                // A pack around the lambing paddock, day and night alike.
                per_hour = self.scenario.spike_rate_per_night / 24.0;
            }
            let n = poisson(&mut rng, per_hour);
            for k in 0..n {
                let at = start + Duration::seconds(rng.gen_range(0..3600));
                let group = rng.gen_range(1..=sp.max_group);
                let triggers = rng.gen_range(1..=4);
                self.event(site, si, h, k, at, group, triggers, &mut rng, emit);
            }
        }
        let scripted = [
            (self.scenario.pig_at, "KB-06", 2usize, 2u32),
            (self.scenario.deer_at, "KB-03", 4usize, 1u32),
        ];
        for (when, id, si, group) in scripted {
            if site.id == id && when >= offset && when < offset + Duration::hours(1) {
                self.event(
                    site,
                    si,
                    h,
                    99,
                    self.origin + when,
                    group,
                    3,
                    &mut rng,
                    emit,
                );
            }
        }
        // Now and then a person walks past (privacy rule: only the fact is kept).
        if (7..18).contains(&local_hour) && rng.gen_bool(0.01) {
            let at = start + Duration::seconds(rng.gen_range(0..3600));
            emit(FeedMessage {
                at,
                topic: format!("{}/{}/observation", self.prefix, site.id),
                payload: json!({
                    "observationID": format!("{}{}-{h}-p", self.id_prefix, site.id),
                    "deploymentID": site.id,
                    "eventStart": at.with_timezone(&self.tz).to_rfc3339(),
                    "observationType": "human",
                    "classificationProbability": 0.97,
                    "classificationMethod": "machine",
                })
                .to_string()
                .into_bytes(),
            });
        }
    }

    /// A run of triggers about a minute apart (a lingering animal).
    #[allow(clippy::too_many_arguments)]
    fn event(
        &self,
        site: &DemoSite,
        si: usize,
        h: i64,
        k: u32,
        at: DateTime<Utc>,
        group: u32,
        triggers: u32,
        rng: &mut SmallRng,
        emit: &mut dyn FnMut(FeedMessage),
    ) {
        let sp = &SPECIES[si];
        for t in 0..triggers {
            let when = at + Duration::seconds(60 * t as i64 + rng.gen_range(0..20));
            let id = format!("{}{}-{h}-{si}-{k}-{t}", self.id_prefix, site.id);
            let prob: f64 = rng.gen_range(0.62..0.995);
            emit(FeedMessage {
                at: when,
                topic: format!("{}/{}/observation", self.prefix, site.id),
                payload: json!({
                    "observationID": id,
                    "deploymentID": site.id,
                    "eventStart": when.with_timezone(&self.tz).to_rfc3339(),
                    "observationType": "animal",
                    "scientificName": sp.scientific_name,
                    "vernacularName": sp.vernacular_name,
                    "count": rng.gen_range(1..=group),
                    "classificationProbability": (prob * 1000.0).round() / 1000.0,
                    "classificationMethod": "machine",
                    "mediaID": format!("{id}-m"),
                    "filePath": format!("https://images.kellerby.example/{}/{id}.jpg", site.id),
                })
                .to_string()
                .into_bytes(),
            });
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn origin() -> DateTime<Utc> {
        DateTime::parse_from_rfc3339("2026-07-10T06:00:00Z")
            .unwrap()
            .with_timezone(&Utc)
    }

    #[test]
    fn slicing_does_not_change_the_stream() {
        let feed = Feed::new(origin(), "outrider", 7);
        let begin = origin() - Duration::hours(5);
        let end = origin() + Duration::hours(30);
        let whole = feed.between(begin, end);
        let mut parts = Vec::new();
        let mut t = begin;
        while t < end {
            let next = (t + Duration::minutes(37)).min(end);
            parts.extend(feed.between(t, next));
            t = next;
        }
        assert_eq!(whole, parts);
        assert!(
            whole.len() > 16 * 34,
            "at least a heartbeat per site-hour: {}",
            whole.len()
        );
    }

    #[test]
    fn the_silent_camera_stops_and_the_spike_shows() {
        let feed = Feed::new(origin(), "outrider", 7);
        let s = &feed.scenario;
        let late = feed.between(
            origin() + s.silent_from + Duration::hours(1),
            origin() + Duration::hours(40),
        );
        assert!(late.iter().all(|m| !m.topic.contains("/KB-11/")));
        let dogs_at = |from: Duration, to: Duration| {
            feed.between(origin() + from, origin() + to)
                .iter()
                .filter(|m| {
                    m.topic.contains("/KB-07/observation")
                        && String::from_utf8_lossy(&m.payload).contains("Canis familiaris")
                })
                .count()
        };
        let spike = dogs_at(s.spike_window.0, s.spike_window.1);
        let before = dogs_at(s.spike_window.0 - Duration::days(10), s.spike_window.0);
        // The one spike day holds more wild-dog triggers than the ten days before it.
        assert!(spike > before, "spike {spike}, ten days before {before}");
    }
}
