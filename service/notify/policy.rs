//! Fatigue control: decides, for each candidate notice, whether it goes out
//! now, folds into a later notice, or waits for the digest.
//!
//! Role: a sans-I/O state machine in the manner of rumqttc's `state.rs`.
//! [`Policy::on_candidate`] changes the state and returns a [`Decision`];
//! the shell stores the notice with that disposition and enqueues the sent
//! ones. A restart keeps cooldowns, held events and the hourly count: the
//! engine hands the stored decisions back to [`Policy::restore`] (the
//! [`Policy`] is also `serde`, for a snapshot). No I/O and no clock: `now` is passed in,
//! and must not go backwards between calls (the daemon's clock and replay's
//! simulated clock both move forward).
//!
//! Rules, checked in this order:
//! 1. **Cooldown** per (subscriber, watch, deployment, species): the first
//!    candidate sends; later ones before the cooldown ends fold. They are
//!    held under their [`FoldKey`] and ride along in the next notice sent for
//!    that key ([`Policy::take_folded`]), or in the digest
//!    ([`Policy::take_folded_for_subscriber`]). Urgent watches fold too.
//! 2. **Quiet hours** (the caller computes `in_quiet_hours` from the
//!    subscriber's local window): non-urgent candidates are deferred to the
//!    digest. Urgent watches pass.
//! 3. **Hourly cap** per subscriber: at most `max_per_hour` notices sent in
//!    any 60-minute window; beyond it candidates are deferred to the digest.
//!    Urgent watches count and are capped like any other.
//!
//! A deferred candidate does not start a cooldown: nothing was sent.

use chrono::{DateTime, Duration, Utc};
use serde::{Deserialize, Serialize};
use std::collections::{BTreeMap, HashMap, VecDeque};

use crate::notify::notice::{Disposition, FoldedEvent, Text};

/// The sliding window of the hourly cap.
const CAP_WINDOW: Duration = Duration::hours(1);

/// What a cooldown is kept per: one subscriber's watch at one camera for one
/// species (empty for camera notices).
#[derive(Debug, Clone, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize, Deserialize)]
pub struct FoldKey {
    pub subscriber: Text,
    pub watch: Text,
    pub deployment: Text,
    pub species: Text,
}

/// One candidate notice, as the rules produced it, with the settings that
/// apply to it. Settings travel with the candidate so a config reload takes
/// effect at the next candidate and the state holds no config.
#[derive(Debug, Clone, PartialEq)]
pub struct Candidate {
    pub key: FoldKey,
    pub event_id: Text,
    pub event_time: DateTime<Utc>,
    /// Animals in the event.
    pub count: u32,
    /// The watch is urgent: it passes quiet hours (not the cooldown or cap).
    pub urgent: bool,
    /// `now` falls in the subscriber's quiet hours (their local window).
    pub in_quiet_hours: bool,
    /// The watch's `cooldown_minutes`; 0 turns the cooldown off.
    pub cooldown_minutes: u32,
    /// The subscriber's `max_per_hour`; 0 sends nothing at once (every
    /// candidate waits for the digest).
    pub max_per_hour: u32,
}

/// What to do with a candidate. Every decision carries a plain reason that
/// is stored with the notice and shown by replay and the status page.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(tag = "decision", rename_all = "snake_case")]
pub enum Decision {
    /// Send now. The shell calls [`Policy::take_folded`] for the key and puts
    /// the result in the notice.
    SendNow { reason: String },
    /// Held under `into`; rides along with the next notice sent for that
    /// key, or in the digest.
    Fold { into: FoldKey, reason: String },
    /// Goes to the digest only.
    DeferToDigest { reason: String },
}

impl Decision {
    /// The reason, moved out (no copy).
    pub fn into_reason(self) -> String {
        match self {
            Self::SendNow { reason }
            | Self::Fold { reason, .. }
            | Self::DeferToDigest { reason } => reason,
        }
    }

    pub fn reason(&self) -> &str {
        match self {
            Self::SendNow { reason }
            | Self::Fold { reason, .. }
            | Self::DeferToDigest { reason } => reason,
        }
    }

    pub fn disposition(&self) -> Disposition {
        match self {
            Self::SendNow { .. } => Disposition::Sent,
            Self::Fold { .. } => Disposition::Folded,
            Self::DeferToDigest { .. } => Disposition::Deferred,
        }
    }
}

/// State kept per fold key.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
struct KeyState {
    /// When the last notice for this key was sent.
    last_sent: Option<DateTime<Utc>>,
    /// Candidates before this instant fold. Stored as an instant (not
    /// minutes) so a config change applies from the next notice sent.
    cooldown_until: Option<DateTime<Utc>>,
    /// Held events, oldest first. Bounded in practice: independent events
    /// of one species at one camera are at least the independence interval
    /// apart, so a cooldown of C minutes holds at most C / 30 of them.
    folded: Vec<FoldedEvent>,
}

/// The fatigue-control state of all subscribers.
///
/// Serialises to a JSON object (`version`, `keys`, `sent`) with a stable
/// order, so two equal states give the same text.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
#[serde(from = "Snapshot", into = "Snapshot")]
pub struct Policy {
    /// Hashed, not ordered: a lookup per candidate is the hot path;
    /// the few places that need an order sort.
    keys: HashMap<FoldKey, KeyState, foldhash::fast::RandomState>,
    /// Send times per subscriber within the cap window, oldest first.
    /// Hashed too: with a million subscribers an ordered map's walk of
    /// string comparisons made the cost per decision grow with their number.
    sent: HashMap<Text, VecDeque<DateTime<Utc>>, foldhash::fast::RandomState>,
}

/// The serialised form: JSON maps need string keys, so keys are a list.
#[derive(Serialize, Deserialize)]
struct Snapshot {
    version: u32,
    keys: Vec<SnapshotKey>,
    sent: BTreeMap<Text, Vec<DateTime<Utc>>>,
}

#[derive(Serialize, Deserialize)]
struct SnapshotKey {
    key: FoldKey,
    #[serde(flatten)]
    state: KeyState,
}

impl From<Policy> for Snapshot {
    fn from(p: Policy) -> Self {
        Snapshot {
            version: 1,
            keys: {
                let mut keys: Vec<SnapshotKey> = p
                    .keys
                    .into_iter()
                    .map(|(key, state)| SnapshotKey { key, state })
                    .collect();
                keys.sort_by(|a, b| a.key.cmp(&b.key));
                keys
            },
            sent: p
                .sent
                .into_iter()
                .map(|(s, q)| (s, q.into_iter().collect()))
                .collect(),
        }
    }
}

impl From<Snapshot> for Policy {
    fn from(s: Snapshot) -> Self {
        Policy {
            keys: s.keys.into_iter().map(|k| (k.key, k.state)).collect(),
            sent: s
                .sent
                .into_iter()
                .map(|(s, mut v)| {
                    v.sort();
                    (s, v.into_iter().collect())
                })
                .collect(),
        }
    }
}

impl Policy {
    pub fn new() -> Self {
        Self::default()
    }

    /// Decide what to do with `c` at `now`, and update the state.
    pub fn on_candidate(&mut self, c: &Candidate, now: DateTime<Utc>) -> Decision {
        // 1. Cooldown (urgent or not).
        if let Some(ks) = self.keys.get_mut(&c.key) {
            if let (Some(until), Some(last)) = (ks.cooldown_until, ks.last_sent) {
                if now < until {
                    if !ks.folded.iter().any(|f| f.event_id == c.event_id) {
                        ks.folded.push(FoldedEvent {
                            event_id: c.event_id.clone(),
                            event_time: c.event_time,
                            count: c.count,
                        });
                    }
                    return Decision::Fold {
                        into: c.key.clone(),
                        reason: format!(
                            "cooldown: a notice for this camera and species went out at {}; \
                             until {} further events ride along with the next notice or the digest",
                            hm_utc(last),
                            hm_utc(until)
                        ),
                    };
                }
            }
        }

        // 2. Quiet hours.
        if c.in_quiet_hours && !c.urgent {
            return Decision::DeferToDigest {
                reason: "quiet hours: non-urgent notices wait for the digest".to_owned(),
            };
        }

        // 3. Hourly cap over a sliding window: count sends in (now - 1 h, now].
        // Look up before inserting: the key's `String` is cloned only for a
        // subscriber not seen yet.
        let sends = match self.sent.get_mut(&c.key.subscriber) {
            Some(q) => q,
            None => self.sent.entry(c.key.subscriber.clone()).or_default(),
        };
        while sends.front().is_some_and(|t| *t <= now - CAP_WINDOW) {
            sends.pop_front();
        }
        if sends.len() >= c.max_per_hour as usize {
            return Decision::DeferToDigest {
                reason: format!(
                    "hourly limit: {} notices sent to this subscriber in the past hour (limit {}); \
                     this one waits for the digest",
                    sends.len(),
                    c.max_per_hour
                ),
            };
        }
        sends.push_back(now);

        let ks = match self.keys.get_mut(&c.key) {
            Some(ks) => ks,
            None => self.keys.entry(c.key.clone()).or_default(),
        };
        let reason = match ks.last_sent {
            None => "first notice for this camera and species".to_owned(),
            Some(last) => format!(
                "the cooldown after the notice sent at {} has ended",
                hm_utc(last)
            ),
        };
        let reason = if c.urgent && c.in_quiet_hours {
            format!("{reason}; urgent watch, so quiet hours do not hold it")
        } else {
            reason
        };
        ks.last_sent = Some(now);
        ks.cooldown_until = Some(now + Duration::minutes(i64::from(c.cooldown_minutes)));
        Decision::SendNow { reason }
    }

    /// The events folded under `key`, oldest first, removed from the state.
    /// Call it when a notice for `key` is sent and put them in the notice.
    pub fn take_folded(&mut self, key: &FoldKey) -> Vec<FoldedEvent> {
        self.keys
            .get_mut(key)
            .map(|ks| std::mem::take(&mut ks.folded))
            .unwrap_or_default()
    }

    /// Every key of `subscriber` with folded events, drained, for the
    /// digest. Keys come in `FoldKey` order.
    pub fn take_folded_for_subscriber(
        &mut self,
        subscriber: &str,
    ) -> Vec<(FoldKey, Vec<FoldedEvent>)> {
        let mut out: Vec<(FoldKey, Vec<FoldedEvent>)> = self
            .keys
            .iter_mut()
            .filter(|(k, ks)| *k.subscriber == *subscriber && !ks.folded.is_empty())
            .map(|(k, ks)| (k.clone(), std::mem::take(&mut ks.folded)))
            .collect();
        out.sort_by(|a, b| a.0.cmp(&b.0));
        out
    }

    /// Notices sent to `subscriber` in the hour up to `now`.
    pub fn sent_in_last_hour(&self, subscriber: &str, now: DateTime<Utc>) -> usize {
        self.sent.get(subscriber).map_or(0, |q| {
            q.iter()
                .filter(|t| **t > now - CAP_WINDOW && **t <= now)
                .count()
        })
    }

    /// Takes back one decision made earlier (by this process before a
    /// restart, read back from the store), so that the state after a
    /// restart is the state the running process had: the same cooldowns,
    /// the same held events, the same sends in the cap window. Give the
    /// decisions oldest first, with the watch's current `cooldown_minutes`.
    /// A deferred decision changed nothing and changes nothing here.
    pub fn restore(
        &mut self,
        key: &FoldKey,
        disposition: Disposition,
        at: DateTime<Utc>,
        folded: FoldedEvent,
        cooldown_minutes: u32,
    ) {
        match disposition {
            Disposition::Sent => {
                let sends = self.sent.entry(key.subscriber.clone()).or_default();
                // Oldest first, as on_candidate keeps them.
                let i = sends.partition_point(|t| *t <= at);
                sends.insert(i, at);
                let ks = self.keys.entry(key.clone()).or_default();
                ks.last_sent = Some(at);
                ks.cooldown_until = Some(at + Duration::minutes(i64::from(cooldown_minutes)));
                // The notice sent took what was held (take_folded).
                ks.folded.clear();
            }
            Disposition::Folded => {
                let ks = self.keys.entry(key.clone()).or_default();
                if !ks.folded.iter().any(|f| f.event_id == folded.event_id) {
                    ks.folded.push(folded);
                }
            }
            Disposition::Deferred => {}
        }
    }

    /// Drop what can no longer affect a decision: keys whose cooldown has
    /// ended and that hold nothing, and send times older than the cap
    /// window. Call it now and then (e.g. after each digest); decisions are
    /// the same with or without it.
    pub fn prune(&mut self, now: DateTime<Utc>) {
        self.keys
            .retain(|_, ks| !ks.folded.is_empty() || ks.cooldown_until.is_some_and(|u| now < u));
        for q in self.sent.values_mut() {
            q.retain(|t| *t > now - CAP_WINDOW);
        }
        self.sent.retain(|_, q| !q.is_empty());
    }
}

/// `2026-07-14 16:05 UTC`. Written by hand: chrono's `format` parses its
/// pattern on every call, and every folded or capped candidate's reason
/// names one or two instants (a test checks it against chrono).
fn hm_utc(t: DateTime<Utc>) -> String {
    let mut s = String::with_capacity(20);
    if !crate::calendar::text::push_utc_minutes(&mut s, t, ' ') {
        return t.format("%Y-%m-%d %H:%M UTC").to_string();
    }
    s.push_str(" UTC");
    s
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::notify::notice::tests::utc;
    use proptest::prelude::*;

    proptest! {
        /// Reference: chrono's strftime (`%Y-%m-%d %H:%M UTC`), over years
        /// 0-9999 and beyond, where the hand-written path hands over.
        #[test]
        fn hm_utc_matches_chrono(secs in -70_000_000_000i64..260_000_000_000i64) {
            let t = DateTime::from_timestamp(secs, 0).unwrap();
            prop_assert_eq!(hm_utc(t), t.format("%Y-%m-%d %H:%M UTC").to_string());
        }
    }

    fn key(sub: &str, dep: &str) -> FoldKey {
        FoldKey {
            subscriber: sub.into(),
            watch: "dogs and foxes at night".into(),
            deployment: dep.into(),
            species: "Canis familiaris".into(),
        }
    }

    fn cand(k: &FoldKey, id: &str, at: DateTime<Utc>) -> Candidate {
        Candidate {
            key: k.clone(),
            event_id: id.into(),
            event_time: at,
            count: 1,
            urgent: false,
            in_quiet_hours: false,
            cooldown_minutes: 120,
            max_per_hour: 6,
        }
    }

    fn is_send(d: &Decision) -> bool {
        matches!(d, Decision::SendNow { .. })
    }

    #[test]
    fn first_sends_then_folds_until_cooldown_ends() {
        // Rule from DESIGN.md "Delivery": one immediate notice, then a
        // cooldown that folds further events into the next notice.
        let mut p = Policy::new();
        let k = key("stonecroft", "KB-07");
        let t0 = utc(2025, 7, 14, 11, 40);
        let d = p.on_candidate(&cand(&k, "e1", t0), t0);
        assert!(is_send(&d), "{d:?}");
        assert_eq!(d.disposition(), Disposition::Sent);
        assert_eq!(d.reason(), "first notice for this camera and species");

        let t1 = t0 + Duration::minutes(45);
        let d = p.on_candidate(&cand(&k, "e2", t1), t1);
        assert_eq!(d.disposition(), Disposition::Folded);
        assert!(matches!(&d, Decision::Fold { into, .. } if *into == k));
        assert!(
            d.reason().contains("2025-07-14 11:40 UTC"),
            "{}",
            d.reason()
        );
        assert!(
            d.reason().contains("2025-07-14 13:40 UTC"),
            "{}",
            d.reason()
        );

        // 119 minutes after: still folds; 120 minutes after: sends.
        let t2 = t0 + Duration::minutes(119);
        assert_eq!(
            p.on_candidate(&cand(&k, "e3", t2), t2).disposition(),
            Disposition::Folded
        );
        let t3 = t0 + Duration::minutes(120);
        let d = p.on_candidate(&cand(&k, "e4", t3), t3);
        assert!(is_send(&d), "{d:?}");
        let folded = p.take_folded(&k);
        assert_eq!(
            folded.iter().map(|f| &*f.event_id).collect::<Vec<_>>(),
            ["e2", "e3"]
        );
        assert_eq!(folded[0].event_time, t1);
        assert!(p.take_folded(&k).is_empty(), "take empties the key");
    }

    #[test]
    fn another_camera_or_subscriber_has_its_own_cooldown() {
        let mut p = Policy::new();
        let t0 = utc(2025, 7, 14, 11, 40);
        assert!(is_send(
            &p.on_candidate(&cand(&key("stonecroft", "KB-07"), "a", t0), t0)
        ));
        assert!(is_send(
            &p.on_candidate(&cand(&key("stonecroft", "KB-08"), "b", t0), t0)
        ));
        assert!(is_send(&p.on_candidate(
            &cand(&key("wattle-downs", "KB-07"), "c", t0),
            t0
        )));
        let mut fox = cand(&key("stonecroft", "KB-07"), "d", t0);
        fox.key.species = "Vulpes vulpes".into();
        assert!(is_send(&p.on_candidate(&fox, t0)));
    }

    #[test]
    fn quiet_hours_defer_all_but_urgent() {
        let mut p = Policy::new();
        let t0 = utc(2025, 7, 14, 14, 0);
        let mut c = cand(&key("stonecroft", "KB-07"), "e1", t0);
        c.in_quiet_hours = true;
        let d = p.on_candidate(&c, t0);
        assert_eq!(d.disposition(), Disposition::Deferred);
        assert_eq!(
            d.reason(),
            "quiet hours: non-urgent notices wait for the digest"
        );
        // A deferral starts no cooldown: the next one outside quiet hours sends.
        let t1 = t0 + Duration::minutes(5);
        assert!(is_send(
            &p.on_candidate(&cand(&key("stonecroft", "KB-07"), "e2", t1), t1)
        ));

        let mut u = cand(&key("stonecroft", "KB-09"), "e3", t1);
        u.in_quiet_hours = true;
        u.urgent = true;
        let d = p.on_candidate(&u, t1);
        assert!(is_send(&d), "{d:?}");
        assert!(d.reason().contains("urgent"), "{}", d.reason());
        // ...but urgent does not pass the cooldown.
        let t2 = t1 + Duration::minutes(10);
        u.event_id = "e4".into();
        assert_eq!(p.on_candidate(&u, t2).disposition(), Disposition::Folded);
    }

    #[test]
    fn hourly_cap_defers_to_digest_and_frees_after_an_hour() {
        let mut p = Policy::new();
        let t0 = utc(2025, 7, 14, 12, 0);
        for i in 0..3 {
            let mut c = cand(&key("stonecroft", &format!("KB-0{i}")), "e", t0);
            c.max_per_hour = 3;
            let t = t0 + Duration::minutes(i);
            assert!(is_send(&p.on_candidate(&c, t)));
        }
        let mut c = cand(&key("stonecroft", "KB-05"), "e", t0);
        c.max_per_hour = 3;
        let t = t0 + Duration::minutes(30);
        let d = p.on_candidate(&c, t);
        assert_eq!(d.disposition(), Disposition::Deferred);
        assert!(
            d.reason().contains("3 notices") && d.reason().contains("limit 3"),
            "{}",
            d.reason()
        );
        assert_eq!(p.sent_in_last_hour("stonecroft", t), 3);
        // Exactly one hour after the first send it has left the window.
        let t = t0 + Duration::minutes(60);
        assert!(is_send(&p.on_candidate(&c, t)));
        // Urgent watches are capped too.
        let mut u = cand(&key("stonecroft", "KB-06"), "e", t);
        u.max_per_hour = 3;
        u.urgent = true;
        assert_eq!(p.on_candidate(&u, t).disposition(), Disposition::Deferred);
    }

    #[test]
    fn digest_drains_folded_events_of_one_subscriber() {
        let mut p = Policy::new();
        let t0 = utc(2025, 7, 14, 12, 0);
        let a = key("stonecroft", "KB-07");
        let b = key("wattle-downs", "KB-07");
        for k in [&a, &b] {
            p.on_candidate(&cand(k, "e1", t0), t0);
            let t = t0 + Duration::minutes(40);
            p.on_candidate(&cand(k, "e2", t), t);
            // The same event again (a redelivery) is held once.
            p.on_candidate(&cand(k, "e2", t), t);
        }
        let got = p.take_folded_for_subscriber("stonecroft");
        assert_eq!(got.len(), 1);
        assert_eq!(got[0].0, a);
        assert_eq!(got[0].1.len(), 1);
        assert!(p.take_folded_for_subscriber("stonecroft").is_empty());
        assert_eq!(p.take_folded(&b).len(), 1);
    }

    #[test]
    fn prune_keeps_what_matters() {
        let mut p = Policy::new();
        let t0 = utc(2025, 7, 14, 12, 0);
        let k = key("stonecroft", "KB-07");
        p.on_candidate(&cand(&k, "e1", t0), t0);
        let before = p.clone();
        p.prune(t0 + Duration::minutes(30));
        assert_eq!(p, before, "cooldown still running");
        p.prune(t0 + Duration::hours(3));
        assert_eq!(p, Policy::new());
    }

    #[test]
    fn state_survives_serde() {
        let mut p = Policy::new();
        let t0 = utc(2025, 7, 14, 12, 0);
        let k = key("stonecroft", "KB-07");
        p.on_candidate(&cand(&k, "e1", t0), t0);
        p.on_candidate(
            &cand(&k, "e2", t0 + Duration::minutes(31)),
            t0 + Duration::minutes(31),
        );
        let text = serde_json::to_string(&p).unwrap();
        let v: serde_json::Value = serde_json::from_str(&text).unwrap();
        assert_eq!(v["version"], 1);
        assert_eq!(v["keys"][0]["key"]["deployment"], "KB-07");
        assert_eq!(v["keys"][0]["cooldown_until"], "2025-07-14T14:00:00Z");
        let back: Policy = serde_json::from_str(&text).unwrap();
        assert_eq!(back, p);
    }

    /// One step of a generated run: seconds since the previous step, which
    /// of 2 subscribers x 3 cameras, urgent, quiet.
    fn steps() -> impl Strategy<Value = Vec<(u32, usize, bool, bool)>> {
        prop::collection::vec((0u32..900, 0usize..6, any::<bool>(), any::<bool>()), 0..120)
    }

    /// A decision with its time and key, as a run records it.
    type Step = (DateTime<Utc>, FoldKey, Decision);

    fn run(
        p: &mut Policy,
        steps: &[(u32, usize, bool, bool)],
        start: DateTime<Utc>,
        cooldown: u32,
        cap: u32,
        first_index: usize,
    ) -> (Vec<Step>, DateTime<Utc>) {
        let mut t = start;
        let mut out = vec![];
        for (i, &(dt, which, urgent, quiet)) in steps.iter().enumerate() {
            t += Duration::seconds(i64::from(dt));
            let sub = if which < 3 {
                "stonecroft"
            } else {
                "wattle-downs"
            };
            let k = key(sub, &format!("KB-0{}", which % 3 + 1));
            let c = Candidate {
                key: k.clone(),
                event_id: format!("ev{}", first_index + i).into(),
                event_time: t,
                count: 1,
                urgent,
                in_quiet_hours: quiet,
                cooldown_minutes: cooldown,
                max_per_hour: cap,
            };
            let d = p.on_candidate(&c, t);
            if is_send(&d) {
                p.take_folded(&k);
            }
            out.push((t, k, d));
        }
        (out, t)
    }

    proptest! {
        #[test]
        fn never_more_than_the_cap_in_any_hour(
            s in steps(), cooldown in 0u32..90, cap in 0u32..5
        ) {
            let mut p = Policy::new();
            let (out, _) = run(&mut p, &s, utc(2025, 7, 14, 8, 0), cooldown, cap, 0);
            for sub in ["stonecroft", "wattle-downs"] {
                let sends: Vec<DateTime<Utc>> = out
                    .iter()
                    .filter(|(_, k, d)| *k.subscriber == *sub && is_send(d))
                    .map(|(t, _, _)| *t)
                    .collect();
                // The busiest 60-minute window [a, a + 60 min) starts at a send.
                for &a in &sends {
                    let n = sends.iter().filter(|&&t| t >= a && t < a + Duration::hours(1)).count();
                    prop_assert!(n <= cap as usize, "{n} sends from {a} with cap {cap}");
                }
            }
        }

        #[test]
        fn at_most_one_send_per_key_within_a_cooldown(
            s in steps(), cooldown in 0u32..90, cap in 1u32..8
        ) {
            let mut p = Policy::new();
            let (out, _) = run(&mut p, &s, utc(2025, 7, 14, 8, 0), cooldown, cap, 0);
            let mut last: BTreeMap<FoldKey, DateTime<Utc>> = BTreeMap::new();
            for (t, k, d) in &out {
                if is_send(d) {
                    if let Some(prev) = last.get(k) {
                        prop_assert!(*t - *prev >= Duration::minutes(i64::from(cooldown)));
                    }
                    last.insert(k.clone(), *t);
                }
            }
        }

        #[test]
        fn replay_from_a_snapshot_gives_the_same_decisions(
            s in steps(), cooldown in 0u32..90, cap in 0u32..5, cut in 0usize..120
        ) {
            let start = utc(2025, 7, 14, 8, 0);
            let cut = cut.min(s.len());
            let mut whole = Policy::new();
            let (all, _) = run(&mut whole, &s, start, cooldown, cap, 0);

            let mut first = Policy::new();
            let (mut got, t) = run(&mut first, &s[..cut], start, cooldown, cap, 0);
            let text = serde_json::to_string(&first).unwrap();
            let mut restored: Policy = serde_json::from_str(&text).unwrap();
            prop_assert_eq!(&restored, &first);
            // Resume the same sequence: step `cut` is relative to step cut-1.
            let (rest, _) = run(&mut restored, &s[cut..], t, cooldown, cap, cut);
            got.extend(rest);
            prop_assert_eq!(got, all);
            prop_assert_eq!(restored, whole);
        }

        /// A restart rebuilds the state from the stored decisions alone
        /// (no snapshot): every decision after the restart is the one the
        /// process that kept running made.
        #[test]
        fn restored_from_stored_decisions_gives_the_same_decisions(
            s in steps(), cooldown in 0u32..90, cap in 0u32..5, cut in 0usize..120
        ) {
            let start = utc(2025, 7, 14, 8, 0);
            let cut = cut.min(s.len());
            let mut whole = Policy::new();
            let (all, _) = run(&mut whole, &s, start, cooldown, cap, 0);

            let mut first = Policy::new();
            let (mut got, t) = run(&mut first, &s[..cut], start, cooldown, cap, 0);
            let mut restored = Policy::new();
            for (i, (at, k, d)) in got.iter().enumerate() {
                let folded = FoldedEvent { event_id: format!("ev{i}").into(), event_time: *at, count: 1 };
                restored.restore(k, d.disposition(), *at, folded, cooldown);
            }
            let (rest, _) = run(&mut restored, &s[cut..], t, cooldown, cap, cut);
            let n = got.len();
            got.extend(rest);
            prop_assert_eq!(&got[n..], &all[n..]);
        }
    }

    #[test]
    fn restore_takes_back_cooldown_held_events_and_the_cap() {
        let mut p = Policy::new();
        let k = key("stonecroft", "KB-07");
        let t0 = utc(2025, 7, 14, 12, 0);
        let ev = |id: &str, t| FoldedEvent {
            event_id: id.into(),
            event_time: t,
            count: 1,
        };
        p.restore(&k, Disposition::Sent, t0, ev("e1", t0), 120);
        let t1 = t0 + Duration::minutes(40);
        p.restore(&k, Disposition::Folded, t1, ev("e2", t1), 120);
        assert_eq!(p.sent_in_last_hour("stonecroft", t1), 1);
        // Still in the cooldown: folds, and the held event is still there.
        let t2 = t0 + Duration::minutes(80);
        assert_eq!(
            p.on_candidate(&cand(&k, "e3", t2), t2).disposition(),
            Disposition::Folded
        );
        let t3 = t0 + Duration::minutes(121);
        assert!(is_send(&p.on_candidate(&cand(&k, "e4", t3), t3)));
        let held: Vec<String> = p
            .take_folded(&k)
            .into_iter()
            .map(|f| f.event_id.to_string())
            .collect();
        assert_eq!(held, ["e2", "e3"]);
    }
}
