//! The engine: the one pure core that the daemon and `outrider replay` both
//! run. It takes decoded messages (and the time, as a value) and returns
//! what to store: independent-event changes and notice decisions.
//!
//! It owns the in-memory working set: the event ledger (a trailing horizon
//! of triggers), each deployment's uptime, the fatigue-control state and
//! the open silence episodes. It never does I/O and never reads the clock;
//! the daemon persists its outputs in the same transaction as the messages
//! that caused them, and rebuilds the working set from the store at start.
//!
//! # What fires when
//! - An observation of an animal that starts a new independent event (or
//!   raises an event's best classification probability over a watch's
//!   threshold) is checked against every watch of every subscriber whose
//!   area covers the site: `presence`, `first-seen` (no event of that
//!   species at any covered site for `quiet_days`, with monitoring over that
//!   whole span) and `spike` (gamma-Poisson test over `window_hours`).
//! - [`Engine::tick`] opens a silence episode for a covered deployment with
//!   no sign of life for a watch's `silence_hours`; the next sign of life
//!   closes it with a `silence-ended` notice.
//! - A correction that retracts an observation a sent notice was based on
//!   produces a short follow-up.
//!
//! Every candidate then goes through [`crate::notify::Policy`] (cooldown,
//! hourly cap, quiet hours), and every decision comes out with its reason.

mod digest;
pub mod rules;

pub use digest::{usual_high, DIGESTS_PER_TICK};

use crate::activity::{
    baseline_window, spike_test, Change, EventId, EventLedger, IndependentEvent, SpikeEvidence,
    SpikeInput, SpikeParams, Trigger, Uptime,
};
use crate::activity::{cusum, CusumParams, CusumState, GammaRate};
use crate::calendar::{local_date_of, local_day_bounds};
use crate::config::{Config, TriggerKind};
use crate::model::{Message, Observation, ObservationType};
use crate::notify::notice::Text;
use crate::notify::{Candidate, Decision, Disposition, Evidence, FoldKey, Notice, Policy};
use chrono::{DateTime, Duration, NaiveDate, Utc};
use rules::{RuleBook, TwilightCache};
use std::collections::{BTreeSet, HashMap};
use std::sync::Arc;

/// What the engine asks the shell to store.
#[derive(Debug, Clone, PartialEq)]
pub enum Output {
    /// Insert or replace this event.
    EventUpsert(IndependentEvent),
    /// This event no longer exists in that form.
    EventDelete(EventId),
    /// A notice decision (sent, folded or deferred) with its reason and the
    /// channels a sent notice goes out on.
    Notice {
        /// Shared with the engine's record of sent notices (retraction
        /// follow-ups), so a decision is not copied to be remembered.
        notice: Arc<Notice>,
        reason: String,
        channels: Vec<crate::config::Channel>,
    },
    /// A daily digest is due: queue it (once per subscriber and due instant).
    Digest(Box<crate::digest::Digest>),
}

/// An event by its series in the ledger
/// ([`EventLedger::series_of`]) and its start: what the engine's own maps
/// are keyed by (an [`EventId`] holds two `String`s to hash and clone).
type EventKey = (u32, DateTime<Utc>);

/// The engine's hot maps: small keys, a fast seeded hash.
type FastMap<K, V> = HashMap<K, V, foldhash::fast::RandomState>;

/// What the engine remembers of an event besides the ledger's numbers.
#[derive(Debug, Clone, Default)]
struct EventMeta {
    best_probability: f64,
    vernacular_name: Option<Text>,
    file_path: Option<Text>,
    /// The event's key text (`event_key`), made at its first decision.
    key_text: Option<Text>,
}

/// The names a subscriber's decisions copy, made once (at its first
/// decision) and shared by every notice after.
#[derive(Debug)]
struct SubscriberNames {
    id: Text,
    name: Text,
    /// Per watch: its name and the `subscriber/watch` rule text.
    watches: Vec<(Text, Text)>,
}

impl SubscriberNames {
    fn of(s: &crate::config::Subscriber) -> Self {
        SubscriberNames {
            id: s.id.as_str().into(),
            name: s.name.as_str().into(),
            watches: s
                .watches
                .iter()
                .map(|w| {
                    (
                        w.name.as_str().into(),
                        [s.id.as_str(), "/", w.name.as_str()].concat().into(),
                    )
                })
                .collect(),
        }
    }
}

/// Working state of the core. Build with [`Engine::new`], warm with
/// [`Engine::warm`], then feed [`Engine::apply`] and [`Engine::tick`].
pub struct Engine {
    cfg: Arc<Config>,
    rules: RuleBook,
    ledger: EventLedger,
    uptime: Vec<Uptime>,
    last_sign: Vec<DateTime<Utc>>,
    meta: FastMap<EventKey, EventMeta>,
    /// (event start in ms, series, subscriber, watch) already decided, so
    /// an event is notified once. Ordered by start, so pruning is a split,
    /// not a walk over every entry.
    decided: BTreeSet<(i64, u32, u32, u32)>,
    /// Sent notices per event, for retraction follow-ups.
    sent_for: FastMap<EventKey, Vec<Arc<Notice>>>,
    /// Civil twilight per site and date, for dusk-to-dawn watches.
    twilight: TwilightCache,
    /// Per subscriber, its names as shared text (`None` until its first
    /// decision: most of a million subscribers may never get one).
    names: Vec<Option<Arc<SubscriberNames>>>,
    /// Per site: deployment id and label as shared text.
    site_names: Vec<(Text, Text)>,
    /// Scientific names as shared text.
    species_names: std::collections::HashSet<Text, foldhash::fast::RandomState>,
    /// (subscriber, site) -> the distance a notice shows, km, worked out
    /// at the first notice (the rule book keeps membership only).
    distances: FastMap<(u32, u32), f64>,
    /// Open silence episodes: (subscriber, watch, site) -> last sign of life.
    silent: HashMap<(usize, usize, usize), DateTime<Utc>>,
    policy: Policy,
    /// Regional rate cache: (species, baseline window end hour) -> rate.
    regional: HashMap<(String, i64), f64>,
    last_prune: Option<DateTime<Utc>>,
    /// See [`Engine::horizon`].
    horizon: Duration,
    /// While warming, nothing is notified (history is being loaded).
    quiet: bool,
    options: Options,
    /// Corrections whose observation has not arrived yet, with arrival time.
    pending: FastMap<String, Vec<(DateTime<Utc>, crate::model::Correction)>>,
    /// Species of a notice that has no single event (build-up), for `decide`.
    species_override: Option<String>,
    /// CUSUM statistic per (subscriber, watch, site, species).
    cusum: HashMap<(usize, usize, usize, String), CusumState>,
    /// The last local day (service time zone) whose CUSUM step is done.
    last_day: Option<NaiveDate>,
    /// Digest schedule; `None` until [`Engine::schedule_digests`].
    digests: Option<digest::DigestQueue>,
    /// Per-site digest numbers for the digests being built now.
    digest_cache: Option<digest::DigestCache>,
    /// The latest common name the messages gave per scientific name.
    vernacular: FastMap<String, String>,
}

/// Days of history the CUSUM runs over quietly at start, so a build-up
/// under way is not forgotten by a restart.
const CUSUM_WARM_DAYS: i64 = 14;

/// How the engine runs.
#[derive(Debug, Clone, Copy, Default)]
pub struct Options {
    /// Count every deployment as operating from deploymentStart to
    /// deploymentEnd whatever the signs of life, and judge no silence
    /// (replay of an archive without heartbeats).
    pub assume_operating: bool,
}

/// Observations with no probability (e.g. labelled by a person) count as certain.
fn probability(o: &Observation) -> f64 {
    o.classification_probability.unwrap_or(1.0)
}

impl Engine {
    pub fn new(cfg: Arc<Config>) -> Self {
        Self::with_options(cfg, Options::default())
    }

    pub fn with_options(cfg: Arc<Config>, options: Options) -> Self {
        let rules = RuleBook::compile(&cfg);
        let site_names = rules
            .sites()
            .iter()
            .map(|s| (s.deployment_id.as_str().into(), s.label().into()))
            .collect();
        let silence = effort_silence(&cfg, options);
        let uptime = cfg
            .sites
            .sites
            .iter()
            .map(|s| site_uptime(s, silence))
            .collect();
        let last_sign = cfg.sites.sites.iter().map(|s| s.deployment_start).collect();
        Engine {
            ledger: EventLedger::new(Duration::minutes(cfg.detection.independence_minutes as i64)),
            rules,
            uptime,
            last_sign,
            meta: FastMap::default(),
            decided: Default::default(),
            sent_for: FastMap::default(),
            twilight: TwilightCache::default(),
            names: vec![None; cfg.subscribers.len()],
            site_names,
            species_names: Default::default(),
            distances: FastMap::default(),
            silent: HashMap::new(),
            policy: Policy::new(),
            regional: HashMap::new(),
            last_prune: None,
            horizon: Self::horizon_of(&cfg),
            quiet: false,
            options,
            species_override: None,
            pending: FastMap::default(),
            cusum: HashMap::new(),
            last_day: None,
            digests: None,
            digest_cache: None,
            vernacular: FastMap::default(),
            cfg,
        }
    }

    /// How far back the working set must reach: the longest baseline or
    /// quiet-days look-back, plus margin.
    pub fn horizon(&self) -> Duration {
        self.horizon
    }

    /// [`Engine::horizon`] worked out from the config (once: it walks every
    /// watch, and a prune every 6 hours asks for it).
    fn horizon_of(cfg: &Config) -> Duration {
        let b = &cfg.baseline;
        let mut days = i64::from(b.window_days + b.guard_days) + 4;
        for s in &cfg.subscribers {
            for w in &s.watches {
                days = days.max(i64::from(w.quiet_days) + 1).max(
                    i64::from(b.window_days + b.guard_days) + i64::from(w.window_hours) / 24 + 2,
                );
            }
        }
        Duration::days(days + 1)
    }

    /// Loads history without notifying (start-up, rebuild).
    pub fn warm<'a>(&mut self, messages: impl IntoIterator<Item = &'a Message>) {
        self.quiet = true;
        let mut last = None;
        for m in messages {
            let at = match m {
                Message::Observation(o) => o.event_start,
                Message::Heartbeat(h) => h.timestamp,
                Message::Correction(_) => match last {
                    Some(t) => t,
                    None => continue,
                },
            };
            last = Some(last.map_or(at, |l: DateTime<Utc>| l.max(at)));
            self.apply(m, at);
        }
        self.quiet = false;
    }

    /// Takes back the decisions stored before a restart (oldest first),
    /// after [`Engine::warm`]: which events each watch has already decided,
    /// the fatigue-control state (cooldowns, held events, the hourly cap),
    /// the sent notices a retraction would follow up, and the silence
    /// episodes still open. Without it a restarted daemon would send a
    /// notice the running one would have folded. Decisions of a subscriber
    /// or watch no longer in the config are skipped.
    pub fn restore<'a>(&mut self, notices: impl IntoIterator<Item = &'a Notice>) {
        use crate::notify::Trigger as T;
        // Subscribers by id, looked up per notice (a walk of the list per
        // notice is quadratic at start-up with many subscribers).
        let cfg = Arc::clone(&self.cfg);
        let by_id: FastMap<&str, usize> = cfg
            .subscribers
            .iter()
            .enumerate()
            .map(|(i, s)| (s.id.as_str(), i))
            .collect();
        for n in notices {
            let Some(&sub) = by_id.get(&*n.subscriber_id) else {
                continue;
            };
            let Some(wi) = self.cfg.subscribers[sub]
                .watches
                .iter()
                .position(|w| *w.name == *n.watch)
            else {
                continue;
            };
            let Some(site) = self.rules.site_index(&n.deployment_id) else {
                continue;
            };
            match n.trigger {
                T::Presence | T::FirstSeen | T::Spike => {
                    // No series: no event of that species at that camera in
                    // the working set, so nothing to decide again.
                    if let Some(series) = n
                        .scientific_name
                        .as_ref()
                        .and_then(|sp| self.ledger.series_of(&n.deployment_id, sp))
                    {
                        // Only for an event the ledger holds: pruning
                        // forgets records with the ledger's events.
                        if n.disposition == Disposition::Sent
                            && self.ledger.holds(series, n.event_time)
                        {
                            self.sent_for
                                .entry((series, n.event_time))
                                .or_default()
                                .push(Arc::new(n.clone()));
                        }
                        self.decided.insert((
                            n.event_time.timestamp_millis(),
                            series,
                            sub as u32,
                            wi as u32,
                        ));
                    }
                }
                // Open until a later sign of life (warm has seen them all).
                T::Silence if self.last_sign[site] <= n.event_time => {
                    self.silent.insert((sub, wi, site), n.event_time);
                }
                // A follow-up bypasses the policy (see follow_up).
                T::Retraction => continue,
                _ => {}
            }
            let cooldown = self.cfg.subscribers[sub].watches[wi].cooldown_minutes;
            // The count a held event carries is the event's (a spike
            // notice's evidence counts the whole window instead).
            let count = match (n.trigger, &n.scientific_name) {
                (T::Spike, Some(species)) => self
                    .ledger
                    .event_summary(&EventId {
                        deployment_id: n.deployment_id.to_string(),
                        scientific_name: species.to_string(),
                        start: n.event_time,
                    })
                    .map(|e| e.count),
                _ => None,
            };
            let folded = crate::notify::notice::FoldedEvent {
                event_id: n.event_id.clone(),
                event_time: n.event_time,
                count: count.or(n.evidence.count).unwrap_or(0),
            };
            self.policy
                .restore(&n.fold_key(), n.disposition, n.at, folded, cooldown);
        }
    }

    /// The rule book (sites covered per subscriber).
    pub fn rules(&self) -> &RuleBook {
        &self.rules
    }

    /// All events in the working set.
    pub fn events(&self) -> impl Iterator<Item = IndependentEvent> + '_ {
        self.ledger.events()
    }

    /// Applies one message at `now`; returns what to store.
    pub fn apply(&mut self, message: &Message, now: DateTime<Utc>) -> Vec<Output> {
        // An event upsert and a notice or two, mostly.
        let mut out = Vec::with_capacity(4);
        match message {
            Message::Heartbeat(h) => {
                self.sign_of_life(&h.deployment_id, h.timestamp, now, &mut out)
            }
            Message::Observation(o) => {
                self.sign_of_life(&o.deployment_id, o.event_start, now, &mut out);
                if o.observation_type == ObservationType::Animal {
                    if let Some(name) = &o.scientific_name {
                        self.animal(o, name, now, &mut out);
                    }
                }
            }
            Message::Correction(c) => {
                let change = correct(&mut self.ledger, c);
                if change == Change::Unknown {
                    // Its observation has not arrived yet (MQTT orders
                    // messages per topic only): apply it when it does.
                    self.pending
                        .entry(c.observation_id.clone())
                        .or_default()
                        .push((now, c.clone()));
                }
                let removed = self.store_change(&change, &mut out);
                for id in removed {
                    self.follow_up(&id, &c.observation_id, now, &mut out);
                }
            }
        }
        self.maybe_prune(now);
        out
    }

    fn sign_of_life(
        &mut self,
        dep: &str,
        at: DateTime<Utc>,
        now: DateTime<Utc>,
        out: &mut Vec<Output>,
    ) {
        let Some(site) = self.rules.site_index(dep) else {
            return;
        };
        self.uptime[site].record(at);
        if at > self.last_sign[site] {
            self.last_sign[site] = at;
        }
        // A sign of life closes the silence episodes of this site.
        let closed: Vec<((usize, usize, usize), DateTime<Utc>)> = self
            .silent
            .iter()
            .filter(|((_, _, s), _)| *s == site)
            .map(|(k, v)| (*k, *v))
            .collect();
        for ((sub, watch, s), since) in closed {
            self.silent.remove(&(sub, watch, s));
            if !self.quiet {
                let silent_hours = (at - since).num_minutes() as f64 / 60.0;
                let ev = Evidence {
                    silent_hours: Some(round2(silent_hours)),
                    ..Default::default()
                };
                self.decide(
                    sub,
                    watch,
                    site,
                    crate::notify::Trigger::SilenceEnded,
                    None,
                    format!(
                        "silence-ended:{}:{}",
                        self.rules.site(site).deployment_id,
                        rfc(since)
                    )
                    .into(),
                    at,
                    ev,
                    now,
                    out,
                );
            }
        }
    }

    fn animal(&mut self, o: &Observation, name: &str, now: DateTime<Utc>, out: &mut Vec<Output>) {
        if let Some(v) = &o.vernacular_name {
            if self.vernacular.get(name) != Some(v) {
                self.vernacular.insert(name.to_string(), v.clone());
            }
        }
        let change = self.ledger.insert(Trigger {
            observation_id: o.observation_id.clone(),
            deployment_id: o.deployment_id.clone(),
            scientific_name: name.to_string(),
            at: o.event_start,
            count: o.count,
        });
        let id = match &change {
            Change::NewEvent(id) => id.clone(),
            Change::Extended { new, .. }
            | Change::Merged { new, .. }
            | Change::Updated { new, .. } => new.clone(),
            _ => return,
        };
        self.store_change(&change, out);
        if let Some(corrections) = self.pending.remove(&o.observation_id) {
            // A person already looked at this one: apply the corrections and
            // do not notify on the observation as first labelled.
            for (_, c) in corrections {
                let change = correct(&mut self.ledger, &c);
                self.store_change(&change, out);
            }
            return;
        }
        let Some(ek @ (series, _)) = self.key_of(&id) else {
            return;
        };
        let meta = self.meta.entry(ek).or_default();
        let raised = probability(o) > meta.best_probability;
        meta.best_probability = meta.best_probability.max(probability(o));
        if meta.vernacular_name.is_none() {
            meta.vernacular_name = o.vernacular_name.as_deref().map(Text::from);
        }
        if meta.file_path.is_none() {
            meta.file_path = o.file_path.as_deref().map(Text::from);
        }
        if self.quiet {
            return;
        }
        // A trigger that joins an event without moving its start or raising
        // its best probability changes nothing a watch looks at (the spike
        // and first-seen tests count event starts): skip the watches.
        if matches!(&change, Change::Extended { old, new } if old == new) && !raised {
            return;
        }
        let Some(site) = self.rules.site_index(&o.deployment_id) else {
            return;
        };
        let Some(event) = self.ledger.event_summary(&id) else {
            return;
        };
        let best = self
            .meta
            .get(&ek)
            .map(|m| m.best_probability)
            .unwrap_or(0.0);
        // (window hours, evidence): watches of one event share the test.
        let mut spike_cache: Vec<(u32, Option<SpikeEvidence>)> = Vec::new();
        let cfg = Arc::clone(&self.cfg);
        let ncovering = self.rules.covering(site).len();
        // Room for a decision per covering subscriber, grown once.
        out.reserve(ncovering);
        for ci in 0..ncovering {
            let sub = self.rules.covering(site)[ci] as usize;
            for (wi, w) in cfg.subscribers[sub].watches.iter().enumerate() {
                if !matches!(
                    w.trigger,
                    TriggerKind::Presence | TriggerKind::FirstSeen | TriggerKind::Spike
                ) {
                    continue;
                }
                if !w.species.contains(name) || best < w.min_probability {
                    continue;
                }
                if !self
                    .rules
                    .in_window(sub, wi, site, event.start, &mut self.twilight)
                {
                    continue;
                }
                let decided_key = (
                    event.start.timestamp_millis(),
                    series,
                    sub as u32,
                    wi as u32,
                );
                if self.decided.contains(&decided_key) {
                    continue;
                }
                let distance_from = Some(match self.cfg.subscribers[sub].area {
                    crate::geo::Area::Circle(_) => crate::notify::notice::DistanceFrom::Centre,
                    _ => crate::notify::notice::DistanceFrom::Area,
                });
                let distance_km = self.distance_km(sub, site);
                let mut ev = Evidence {
                    count: Some(event.count),
                    distance_km: Some(round2(distance_km)),
                    distance_from,
                    ..Default::default()
                };
                let trigger = match w.trigger {
                    TriggerKind::Presence => crate::notify::Trigger::Presence,
                    TriggerKind::FirstSeen => {
                        if !self.first_seen(sub, name, event.start, w.quiet_days) {
                            continue;
                        }
                        ev.quiet_days = Some(w.quiet_days);
                        crate::notify::Trigger::FirstSeen
                    }
                    _ => {
                        let (hours, ratio, min_count) = (w.window_hours, w.ratio, w.min_count);
                        // A spike needs at least min_count events in the
                        // window: when the count alone rules it out, the
                        // effort walks and the gamma-Poisson tail are not
                        // needed (same answer, a fraction of the cost).
                        let to = event.start + Duration::milliseconds(1);
                        let c = self.ledger.count_starting_in(
                            &o.deployment_id,
                            name,
                            to - Duration::hours(i64::from(hours)),
                            to,
                        );
                        if c < u64::from(min_count) {
                            continue;
                        }
                        let s = match spike_cache.iter().find(|(h, _)| *h == hours) {
                            Some((_, s)) => s.clone(),
                            None => {
                                let s = self.spike_evidence(
                                    site,
                                    name,
                                    event.start,
                                    hours,
                                    ratio,
                                    min_count,
                                );
                                spike_cache.push((hours, s.clone()));
                                s
                            }
                        };
                        let Some(s) = s else { continue };
                        // Thresholds are the watch's own; the p-value is shared.
                        if !(s.p_value < self.cfg.baseline.alpha
                            && s.count >= u64::from(min_count)
                            && s.ratio >= ratio)
                        {
                            continue;
                        }
                        ev.count = Some(s.count as u32);
                        ev.exposure_nights = Some(s.exposure_nights);
                        ev.window_hours = Some(f64::from(hours));
                        ev.gamma_shape = Some(s.gamma_shape);
                        ev.gamma_rate = Some(s.gamma_rate);
                        ev.expected = Some(s.expected);
                        ev.ratio = Some(s.ratio);
                        ev.p_value = Some(s.p_value);
                        ev.baseline_from = Some(s.baseline_from);
                        ev.baseline_to = Some(s.baseline_to);
                        crate::notify::Trigger::Spike
                    }
                };
                self.decided.insert(decided_key);
                let event_id = self.key_text(ek, &id);
                self.decide(
                    sub,
                    wi,
                    site,
                    trigger,
                    Some(&event),
                    event_id,
                    event.start,
                    ev,
                    now,
                    out,
                );
            }
        }
    }

    /// The distance a notice of `sub` at `site` shows, km (cached: areas
    /// and sites are fixed for the engine's life).
    fn distance_km(&mut self, sub: usize, site: usize) -> f64 {
        let key = (sub as u32, site as u32);
        if let Some(d) = self.distances.get(&key) {
            return *d;
        }
        let d = self
            .rules
            .distance_km(&self.cfg.subscribers[sub].area, site);
        if self.distances.len() >= 1_000_000 {
            self.distances.clear();
        }
        self.distances.insert(key, d);
        d
    }

    /// No event of `species` at any site the subscriber covers in the
    /// `quiet_days` before `start`, and those sites were deployed over that
    /// whole span (otherwise "not seen" only means "not watched").
    fn first_seen(&self, sub: usize, species: &str, start: DateTime<Utc>, quiet_days: u32) -> bool {
        let from = start - Duration::days(i64::from(quiet_days));
        let sites = self.rules.sites_of(sub);
        let watched = sites
            .iter()
            .any(|&s| self.rules.site(s as usize).deployment_start <= from);
        watched
            && sites.iter().all(|&s| {
                self.ledger.count_starting_in(
                    &self.rules.site(s as usize).deployment_id,
                    species,
                    from,
                    start,
                ) == 0
            })
    }

    /// The spike test at `site` for the `hours` ending at `at` (inclusive).
    fn spike_evidence(
        &mut self,
        site: usize,
        species: &str,
        at: DateTime<Utc>,
        hours: u32,
        ratio: f64,
        min_count: u32,
    ) -> Option<SpikeEvidence> {
        let to = at + Duration::milliseconds(1);
        let from = to - Duration::hours(i64::from(hours));
        let dep = self.rules.site(site).deployment_id.clone();
        let count = self.ledger.count_starting_in(&dep, species, from, to);
        let exposure = self.uptime[site].camera_nights(from, to, to);
        let b = self.cfg.baseline.clone();
        let window = baseline_window(from, to, b.window_days, b.guard_days).ok()?;
        let history_events = self
            .ledger
            .count_starting_in(&dep, species, window.from, window.to);
        let history_nights = self.uptime[site].camera_nights(window.from, window.to, at);
        let regional_rate = self.regional_rate(species, window.from, window.to, at);
        let input = SpikeInput {
            count,
            exposure_nights: exposure,
            history_events,
            history_nights,
            regional_rate,
            baseline: window,
        };
        let params = SpikeParams {
            alpha: b.alpha,
            min_count: u64::from(min_count),
            ratio,
            prior_nights: b.prior_nights,
        };
        spike_test(&input, &params).ok()
    }

    /// The baseline the spike test would use at `deployment_id` for
    /// `species` over the `window_hours` ending at `at`: the site's history,
    /// the regional prior and the gamma posterior, with the count and
    /// effort of that window. `None` for an unknown deployment or a window
    /// with no effort. (Thresholds are the config's defaults; the figures do
    /// not depend on them.)
    pub fn baseline(
        &mut self,
        deployment_id: &str,
        species: &str,
        at: DateTime<Utc>,
        window_hours: u32,
    ) -> Option<SpikeEvidence> {
        let site = self.rules.site_index(deployment_id)?;
        self.spike_evidence(site, species, at, window_hours, 3.0, 3)
    }

    /// Events per camera-night of `species` over all sites in the window,
    /// cached per window-end hour.
    fn regional_rate(
        &mut self,
        species: &str,
        from: DateTime<Utc>,
        to: DateTime<Utc>,
        now: DateTime<Utc>,
    ) -> f64 {
        let key = (species.to_string(), to.timestamp().div_euclid(3600));
        if let Some(r) = self.regional.get(&key) {
            return *r;
        }
        let mut events = 0u64;
        let mut nights = 0.0;
        for (i, s) in self.rules.sites().iter().enumerate() {
            events += self
                .ledger
                .count_starting_in(&s.deployment_id, species, from, to);
            nights += self.uptime[i].camera_nights(from, to, now);
        }
        let r = crate::activity::regional_rate(events, nights);
        if self.regional.len() > 10_000 {
            self.regional.clear();
        }
        self.regional.insert(key, r);
        r
    }

    /// Time-driven checks: the CUSUM step of every local day that has
    /// ended, and silence episodes.
    pub fn tick(&mut self, now: DateTime<Utc>) -> Vec<Output> {
        let mut out = Vec::new();
        if self.quiet {
            return out;
        }
        self.close_days(now, &mut out);
        self.due_digests(now, &mut out);
        if self.options.assume_operating {
            return out;
        }
        for (sub, wi, site) in self.rules.silence_watches().to_vec() {
            if self.silent.contains_key(&(sub, wi, site)) {
                continue;
            }
            let s = self.rules.site(site);
            if s.deployment_end.is_some_and(|e| e <= now) {
                continue;
            }
            let w = &self.cfg.subscribers[sub].watches[wi];
            let limit = Duration::seconds((w.silence_hours * 3600.0) as i64);
            let last = self.last_sign[site];
            if now - last > limit {
                self.silent.insert((sub, wi, site), last);
                let hours = (now - last).num_minutes() as f64 / 60.0;
                let ev = Evidence {
                    silent_hours: Some(round2(hours)),
                    ..Default::default()
                };
                let event_id = format!("silence:{}:{}", s.deployment_id, rfc(last));
                self.decide(
                    sub,
                    wi,
                    site,
                    crate::notify::Trigger::Silence,
                    None,
                    event_id.into(),
                    last,
                    ev,
                    now,
                    &mut out,
                );
            }
        }
        out
    }

    /// Runs the build-up CUSUM (METHODS 4) for each local day that ended
    /// since the last call. The first call runs the last
    /// [`CUSUM_WARM_DAYS`] quietly.
    fn close_days(&mut self, now: DateTime<Utc>, out: &mut Vec<Output>) {
        if self.rules.buildup_watches().is_empty() {
            return;
        }
        let tz = self.cfg.service.timezone;
        let today = local_date_of(now, tz);
        let (mut day, warm_until) = match self.last_day {
            None => (today - Duration::days(CUSUM_WARM_DAYS), Some(today)),
            Some(d) => (d + Duration::days(1), None),
        };
        while day < today {
            let quiet = warm_until.is_some();
            self.cusum_day(day, quiet, now, out);
            self.last_day = Some(day);
            day += Duration::days(1);
        }
    }

    fn cusum_day(
        &mut self,
        day: NaiveDate,
        quiet: bool,
        now: DateTime<Utc>,
        out: &mut Vec<Output>,
    ) {
        let (from, to) = local_day_bounds(day, self.cfg.service.timezone);
        let b = self.cfg.baseline.clone();
        let Ok(window) = baseline_window(from, to, b.window_days, b.guard_days) else {
            return;
        };
        for (sub, wi, site) in self.rules.buildup_watches().to_vec() {
            let w = self.cfg.subscribers[sub].watches[wi].clone();
            let dep = self.rules.site(site).deployment_id.clone();
            for species in &w.species {
                let x = self.ledger.count_starting_in(&dep, species, from, to);
                let e = self.uptime[site].camera_nights(from, to, to);
                let n = self
                    .ledger
                    .count_starting_in(&dep, species, window.from, window.to);
                let t = self.uptime[site].camera_nights(window.from, window.to, to);
                let regional = self.regional_rate(species, window.from, window.to, to);
                let Ok(posterior) =
                    GammaRate::prior(regional, b.prior_nights).and_then(|p| p.update(n, t))
                else {
                    continue;
                };
                let Ok(params) = CusumParams::new(
                    posterior.mean(),
                    w.ratio,
                    cusum::DEFAULT_H,
                    cusum::rate_floor(b.prior_nights, t),
                ) else {
                    continue;
                };
                let state = self
                    .cusum
                    .entry((sub, wi, site, species.clone()))
                    .or_default();
                let Ok(step) = state.step(&params, x, e) else {
                    continue;
                };
                if step.signal && !quiet {
                    let ev = Evidence {
                        count: Some(x as u32),
                        exposure_nights: Some(e),
                        window_hours: Some((to - from).num_minutes() as f64 / 60.0),
                        gamma_shape: Some(posterior.shape),
                        gamma_rate: Some(posterior.rate),
                        expected: Some(params.r0() * e),
                        ratio: Some(w.ratio),
                        baseline_from: Some(window.from),
                        baseline_to: Some(window.to),
                        ..Default::default()
                    };
                    self.species_override = Some(species.clone());
                    let event_id = format!("build-up:{dep}:{}:{day}", species.replace(' ', "_"));
                    self.decide(
                        sub,
                        wi,
                        site,
                        crate::notify::Trigger::BuildUp,
                        None,
                        event_id.into(),
                        from,
                        ev,
                        now,
                        out,
                    );
                    self.species_override = None;
                }
            }
        }
    }

    #[allow(clippy::too_many_arguments)]
    fn decide(
        &mut self,
        sub: usize,
        wi: usize,
        site: usize,
        trigger: crate::notify::Trigger,
        event: Option<&IndependentEvent>,
        event_id: Text,
        event_time: DateTime<Utc>,
        mut evidence: Evidence,
        now: DateTime<Utc>,
        out: &mut Vec<Output>,
    ) {
        let s = &self.cfg.subscribers[sub];
        let w = &s.watches[wi];
        let names =
            Arc::clone(self.names[sub].get_or_insert_with(|| Arc::new(SubscriberNames::of(s))));
        let (watch_name, rule) = &names.watches[wi];
        let site_info = self.rules.site(site);
        let (deployment, site_label) = &self.site_names[site];
        let species = match event {
            Some(e) => Some(intern(&mut self.species_names, &e.scientific_name)),
            None => self
                .species_override
                .take()
                .map(|sp| intern(&mut self.species_names, &sp)),
        };
        evidence.rule = Some(Arc::clone(rule));
        evidence.clock_time = Some(now);
        let key = FoldKey {
            subscriber: Arc::clone(&names.id),
            watch: Arc::clone(watch_name),
            deployment: Arc::clone(deployment),
            species: species.clone().unwrap_or_else(|| Text::from("")),
        };
        let in_quiet_hours = s
            .quiet_hours
            .as_ref()
            .is_some_and(|q| q.contains_time(now.with_timezone(&s.timezone).time()));
        let cand = Candidate {
            key,
            event_id,
            event_time,
            count: event.map(|e| e.count).unwrap_or(0),
            urgent: w.urgent,
            in_quiet_hours,
            cooldown_minutes: w.cooldown_minutes,
            max_per_hour: s.max_per_hour,
        };
        let decision = self.policy.on_candidate(&cand, now);
        let folded = if matches!(decision, Decision::SendNow { .. }) {
            self.policy.take_folded(&cand.key)
        } else {
            Vec::new()
        };
        let Candidate { event_id, .. } = cand;
        let event_key = event.and_then(|e| self.key(&e.deployment_id, &e.scientific_name, e.start));
        let meta = event_key.and_then(|k| self.meta.get(&k));
        let notice = Notice {
            subscriber_id: Arc::clone(&names.id),
            subscriber_name: Arc::clone(&names.name),
            watch: Arc::clone(watch_name),
            urgent: w.urgent,
            trigger,
            deployment_id: Arc::clone(deployment),
            site_label: Arc::clone(site_label),
            latitude: site_info.latitude,
            longitude: site_info.longitude,
            scientific_name: species,
            vernacular_name: meta.and_then(|m| m.vernacular_name.clone()),
            event_id,
            event_time,
            at: now,
            disposition: decision.disposition(),
            evidence,
            image_url: meta.and_then(|m| m.file_path.clone()),
            folded,
        };
        let notice = Arc::new(notice);
        if notice.disposition == Disposition::Sent {
            if let Some(k) = event_key {
                self.sent_for
                    .entry(k)
                    .or_default()
                    .push(Arc::clone(&notice));
            }
        }
        out.push(Output::Notice {
            notice,
            reason: decision.into_reason(),
            channels: w.channels.clone(),
        });
    }

    /// The key text of event `ek` (`event_key`), made once per event.
    fn key_text(&mut self, ek: EventKey, id: &EventId) -> Text {
        let meta = self.meta.entry(ek).or_default();
        Arc::clone(meta.key_text.get_or_insert_with(|| event_key(id).into()))
    }

    /// Records an event change; returns events that were removed outright.
    fn store_change(&mut self, change: &Change, out: &mut Vec<Output>) -> Vec<EventId> {
        let mut removed = Vec::new();
        let upsert = |this: &mut Self, id: &EventId, out: &mut Vec<Output>| {
            if let Some(e) = this.ledger.event_summary(id) {
                out.push(Output::EventUpsert(e));
            }
        };
        match change {
            Change::NewEvent(id) => upsert(self, id, out),
            Change::Extended { old, new } | Change::Updated { old, new } => {
                if old != new {
                    out.push(Output::EventDelete(old.clone()));
                    self.move_meta(old, new);
                }
                upsert(self, new, out);
            }
            Change::Merged { old, new } => {
                for o in old.iter().filter(|o| *o != new) {
                    out.push(Output::EventDelete(o.clone()));
                    self.move_meta(o, new);
                }
                upsert(self, new, out);
            }
            Change::Split { old, new } => {
                if !new.contains(old) {
                    out.push(Output::EventDelete(old.clone()));
                    // Nothing can reach the old start's records again.
                    if let Some(k) = self.key_of(old) {
                        self.meta.remove(&k);
                        self.sent_for.remove(&k);
                    }
                }
                for n in new {
                    upsert(self, n, out);
                }
            }
            Change::Removed(id) => {
                out.push(Output::EventDelete(id.clone()));
                // Its sent notices stay for the caller's follow-up.
                if let Some(k) = self.key_of(id) {
                    self.meta.remove(&k);
                }
                removed.push(id.clone());
            }
            Change::Relabelled {
                retracted,
                inserted,
            } => {
                removed.extend(self.store_change(retracted, out));
                self.store_change(inserted, out);
            }
            Change::Duplicate | Change::TooOld | Change::Unknown => {}
        }
        removed
    }

    /// The engine's key of an event the ledger has a series for.
    fn key_of(&self, id: &EventId) -> Option<EventKey> {
        self.key(&id.deployment_id, &id.scientific_name, id.start)
    }

    fn key(&self, deployment_id: &str, species: &str, start: DateTime<Utc>) -> Option<EventKey> {
        self.ledger
            .series_of(deployment_id, species)
            .map(|series| (series, start))
    }

    fn move_meta(&mut self, old: &EventId, new: &EventId) {
        let (Some(old), Some(new)) = (self.key_of(old), self.key_of(new)) else {
            return;
        };
        if let Some(m) = self.meta.remove(&old) {
            let e = self.meta.entry(new).or_default();
            e.best_probability = e.best_probability.max(m.best_probability);
            if e.vernacular_name.is_none() {
                e.vernacular_name = m.vernacular_name;
            }
            if e.file_path.is_none() {
                e.file_path = m.file_path;
            }
        }
        if let Some(n) = self.sent_for.remove(&old) {
            self.sent_for.entry(new).or_default().extend(n);
        }
    }

    /// A retraction took away an event that notices were sent for: tell
    /// those subscribers, once each.
    fn follow_up(
        &mut self,
        id: &EventId,
        observation_id: &str,
        now: DateTime<Utc>,
        out: &mut Vec<Output>,
    ) {
        let Some(sent) = self.key_of(id).and_then(|k| self.sent_for.remove(&k)) else {
            return;
        };
        for n in sent {
            let mut n = Arc::unwrap_or_clone(n);
            let channels = self
                .cfg
                .subscribers
                .iter()
                .find(|s| *s.id == *n.subscriber_id)
                .and_then(|s| s.watches.iter().find(|w| *w.name == *n.watch))
                .map(|w| w.channels.clone())
                .unwrap_or_default();
            n.trigger = crate::notify::Trigger::Retraction;
            n.event_id = format!("{}:retracted:{observation_id}", n.event_id).into();
            n.at = now;
            n.disposition = Disposition::Sent;
            n.folded.clear();
            n.evidence.clock_time = Some(now);
            out.push(Output::Notice {
                notice: Arc::new(n),
                reason: "the observation this notice was based on was corrected".into(),
                channels,
            });
        }
    }

    fn maybe_prune(&mut self, now: DateTime<Utc>) {
        if self
            .last_prune
            .is_some_and(|t| now - t < Duration::hours(6))
        {
            return;
        }
        self.prune(now);
    }

    /// Forgets what lies before the working horizon at `now`; returns the
    /// events forgotten. [`Engine::apply`] does this by itself every 6
    /// hours of message time; the benchmarks call it between timed rounds
    /// to measure it apart from the cost of a trigger.
    pub fn prune(&mut self, now: DateTime<Utc>) -> usize {
        self.last_prune = Some(now);
        let cutoff = now - self.horizon();
        // What the ledger forgets, the engine forgets, key by key: a walk
        // over every event's record at each prune was a tenth of the cost
        // of a trigger. (Events that went another way, removed or split,
        // are dropped where the change is stored.)
        let (meta, sent_for) = (&mut self.meta, &mut self.sent_for);
        let forgotten = self.ledger.prune_before_each(cutoff, |series, start| {
            meta.remove(&(series, start));
            sent_for.remove(&(series, start));
        });
        self.decided = self
            .decided
            .split_off(&(cutoff.timestamp_millis(), 0, 0, 0));
        self.pending
            .retain(|_, v| v.iter().any(|(at, _)| *at >= cutoff));
        self.policy.prune(now);
        forgotten
    }
}

/// The silence limit effort is counted with: the sites' `silence_hours`,
/// or, with [`Options::assume_operating`], one so long that a deployment is
/// up from deploymentStart to deploymentEnd without signs of life.
pub fn effort_silence(cfg: &Config, options: Options) -> Duration {
    if options.assume_operating {
        Duration::days(365 * 200)
    } else {
        Duration::seconds((cfg.sites.silence_hours * 3600.0) as i64).max(Duration::seconds(1))
    }
}

/// A deployment's empty uptime ledger, as the engine builds it (the
/// interchange formats count effort with the same one).
pub fn site_uptime(site: &crate::config::Site, silence: Duration) -> Uptime {
    Uptime::new(site.deployment_start, site.deployment_end, silence)
        .or_else(|_| Uptime::new(site.deployment_start, None, silence))
        .unwrap_or_else(|_| unreachable_uptime(site.deployment_start))
}

/// The independent events of a stored history (observations, then the
/// corrections in arrival order, as [`crate::store::Backend::history`]
/// returns them), read the way the engine reads them: animal observations
/// with a scientific name are triggers, corrections go through [`correct`].
/// Shared by `outrider rebuild`, the exports and the reports.
pub fn ledger_from_history<'a>(
    history: impl IntoIterator<Item = &'a Message>,
    interval: Duration,
) -> EventLedger {
    let mut ledger = EventLedger::new(interval);
    for m in history {
        match m {
            Message::Observation(o) => {
                if let (ObservationType::Animal, Some(name)) =
                    (o.observation_type, &o.scientific_name)
                {
                    ledger.insert(Trigger {
                        observation_id: o.observation_id.clone(),
                        deployment_id: o.deployment_id.clone(),
                        scientific_name: name.clone(),
                        at: o.event_start,
                        count: o.count,
                    });
                }
            }
            Message::Correction(c) => {
                correct(&mut ledger, c);
            }
            Message::Heartbeat(_) => {}
        }
    }
    ledger
}

/// Applies a correction to a ledger: a type other than `animal` retracts
/// the observation; a new name or count relabels it. Shared by the engine
/// and `outrider rebuild`, so both read corrections the same way.
pub fn correct(ledger: &mut EventLedger, c: &crate::model::Correction) -> Change {
    match (c.observation_type, &c.scientific_name) {
        (Some(t), _) if t != ObservationType::Animal => ledger.retract(&c.observation_id),
        (_, Some(name)) => {
            let count = c
                .count
                .or_else(|| ledger.event_of(&c.observation_id).map(|e| e.count))
                .unwrap_or(1);
            ledger.relabel(&c.observation_id, name, count)
        }
        (_, None) => match (c.count, ledger.event_of(&c.observation_id)) {
            (Some(count), Some(ev)) => {
                ledger.relabel(&c.observation_id, &ev.scientific_name, count)
            }
            _ => Change::Unknown,
        },
    }
}

/// A stable text key of an event.
pub fn event_key(id: &EventId) -> String {
    let mut s = String::with_capacity(id.deployment_id.len() + id.scientific_name.len() + 22);
    s.push_str(&id.deployment_id);
    s.push(':');
    s.extend(
        id.scientific_name
            .chars()
            .map(|c| if c == ' ' { '_' } else { c }),
    );
    s.push(':');
    push_rfc(&mut s, id.start);
    s
}

fn rfc(t: DateTime<Utc>) -> String {
    let mut s = String::with_capacity(20);
    push_rfc(&mut s, t);
    s
}

/// Appends `t` as RFC 3339 in UTC to whole seconds (`2026-07-14T02:00:00Z`),
/// as `to_rfc3339_opts(SecondsFormat::Secs, true)` writes it, without the
/// formatting machinery (event keys are built for every decision).
fn push_rfc(s: &mut String, t: DateTime<Utc>) {
    use crate::calendar::text::{push_two, push_utc_minutes};
    use chrono::Timelike;
    if !push_utc_minutes(s, t, 'T') {
        s.push_str(&t.to_rfc3339_opts(chrono::SecondsFormat::Secs, true));
        return;
    }
    s.push(':');
    // A leap second (nanosecond >= 1e9) is written as :60, as chrono does.
    push_two(s, t.second() + u32::from(t.nanosecond() >= 1_000_000_000));
    s.push('Z');
}

/// `name` as shared text, made once per name.
fn intern(
    set: &mut std::collections::HashSet<Text, foldhash::fast::RandomState>,
    name: &str,
) -> Text {
    match set.get(name) {
        Some(t) => Arc::clone(t),
        None => {
            let t = Text::from(name);
            set.insert(Arc::clone(&t));
            t
        }
    }
}

fn round2(v: f64) -> f64 {
    (v * 100.0).round() / 100.0
}

/// Never reached: sites were validated at load (end after start, silence > 0).
fn unreachable_uptime(start: DateTime<Utc>) -> Uptime {
    match Uptime::new(start, None, Duration::hours(36)) {
        Ok(u) => u,
        Err(_) => unreachable!("a 36 h silence limit is positive"),
    }
}

#[cfg(test)]
mod tests;
