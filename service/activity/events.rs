//! Independent events: collapsing camera triggers into visits (METHODS 1).
//!
//! Role: owns the independence rule and an incremental ledger of events.
//! Triggers are grouped by (deployment, scientific name) and sorted by
//! instant. A trigger starts a new event when its gap to the *previous
//! trigger of its group* is strictly greater than the independence interval
//! (so a gap of exactly the interval joins). An event's start is its first
//! trigger, its end its last trigger, its count the largest `count` seen.
//!
//! Two entry points that must always agree (property-tested):
//! - [`collapse`]: from scratch, for replay and for checking;
//! - [`EventLedger`]: incremental, for the live stream, with duplicates,
//!   late (out-of-order) triggers, retractions and relabels.
//!
//! Event identity: an event is named by [`EventId`] = (deployment, species,
//! start instant). Two events of a group never share a start, so the id is
//! unique; it changes only when the event's first trigger changes (a late
//! trigger before it, or a retraction of it), and every [`Change`] reports
//! the old and new ids so the store can follow.
//!
//! Pure: no I/O, no clock; instants are UTC, never wall-clock text, so a
//! daylight-saving fold cannot reorder or merge anything.

use chrono::{DateTime, Duration, Utc};
use serde::Serialize;
use std::collections::{BTreeMap, HashMap, HashSet};
use std::ops::Bound;

/// Default independence interval: 30 minutes (common practice in camera-trap
/// studies; O'Brien, Kinnaird & Wibisono 2003 used 0.5 h \[memory\]).
pub const DEFAULT_INTERVAL_MINUTES: i64 = 30;

/// One classified animal detection, as the pure core sees it.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Trigger {
    /// Camtrap DP `observationID`: the idempotency key.
    pub observation_id: String,
    /// Camtrap DP `deploymentID`.
    pub deployment_id: String,
    /// Darwin Core `scientificName`.
    pub scientific_name: String,
    /// `eventStart` as an instant.
    pub at: DateTime<Utc>,
    /// Individuals in the image (>= 1 after validation).
    pub count: u32,
}

/// Stable name of an event: its group and the instant of its first trigger.
#[derive(Debug, Clone, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize)]
pub struct EventId {
    pub deployment_id: String,
    pub scientific_name: String,
    pub start: DateTime<Utc>,
}

/// One independent event (a "visit").
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct IndependentEvent {
    pub deployment_id: String,
    pub scientific_name: String,
    /// Instant of the first trigger.
    pub start: DateTime<Utc>,
    /// Instant of the last trigger.
    pub end: DateTime<Utc>,
    /// Largest `count` of any trigger in the event.
    pub count: u32,
    /// Number of distinct triggers.
    pub triggers: u32,
    /// Observation ids ordered by (instant, id).
    pub observation_ids: Vec<String>,
}

impl IndependentEvent {
    /// This event's stable name.
    pub fn id(&self) -> EventId {
        EventId {
            deployment_id: self.deployment_id.clone(),
            scientific_name: self.scientific_name.clone(),
            start: self.start,
        }
    }
}

/// What one ledger operation did, in terms of event ids. `old` ids no longer
/// exist in that form; `new` ids are the events to (re)store.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub enum Change {
    /// The observation id was already in the ledger: nothing changed.
    Duplicate,
    /// The trigger lies before the ledger's horizon (see
    /// [`EventLedger::prune_before`]): refused, nothing changed.
    TooOld,
    /// Retract or relabel of an observation id the ledger does not hold.
    Unknown,
    /// The trigger started a new event.
    NewEvent(EventId),
    /// The trigger joined one event. `old != new` when it came before the
    /// event's first trigger (a late delivery), which moves the start.
    Extended { old: EventId, new: EventId },
    /// A late trigger bridged events of its group: `old` lists every event
    /// absorbed (in start order, the first of which keeps its start), `new`
    /// is the combined event.
    Merged { old: Vec<EventId>, new: EventId },
    /// A trigger left the event or changed its count; the event still
    /// stands (its start or end may have moved).
    Updated { old: EventId, new: EventId },
    /// Retracting a trigger left a gap wider than the interval: `old`
    /// became the events `new` (in start order).
    Split { old: EventId, new: Vec<EventId> },
    /// The event's only trigger was retracted.
    Removed(EventId),
    /// The trigger moved to another species: it was retracted from its old
    /// group and inserted into the new one.
    Relabelled {
        retracted: Box<Change>,
        inserted: Box<Change>,
    },
}

/// A trigger reduced to what ordering and counting need: (instant, id, count).
type Keyed = (DateTime<Utc>, String, u32);

/// Collapse triggers into independent events, from scratch.
///
/// The first trigger seen with a given observation id wins; later copies
/// are ignored (as [`EventLedger::insert`] reports them `Duplicate`). A
/// negative interval is treated as zero. Output is sorted by (deployment,
/// species, start).
pub fn collapse(
    triggers: impl IntoIterator<Item = Trigger>,
    interval: Duration,
) -> Vec<IndependentEvent> {
    let interval = interval.max(Duration::zero());
    let mut seen: HashSet<String> = HashSet::new();
    let mut groups: BTreeMap<(String, String), Vec<Keyed>> = BTreeMap::new();
    for t in triggers {
        if !seen.insert(t.observation_id.clone()) {
            continue;
        }
        groups
            .entry((t.deployment_id, t.scientific_name))
            .or_default()
            .push((t.at, t.observation_id, t.count));
    }
    let mut out = Vec::new();
    for ((deployment_id, scientific_name), mut list) in groups {
        list.sort();
        let mut current: Option<IndependentEvent> = None;
        for (at, id, count) in list {
            match current.as_mut() {
                Some(ev) if at - ev.end <= interval => {
                    ev.end = at;
                    ev.count = ev.count.max(count);
                    ev.triggers += 1;
                    ev.observation_ids.push(id);
                }
                _ => {
                    out.extend(current.take());
                    current = Some(IndependentEvent {
                        deployment_id: deployment_id.clone(),
                        scientific_name: scientific_name.clone(),
                        start: at,
                        end: at,
                        count,
                        triggers: 1,
                        observation_ids: vec![id],
                    });
                }
            }
        }
        out.extend(current);
    }
    out
}

/// Summary of one event inside a group; its triggers live in the group's
/// trigger map between `start` (the map key) and `end`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
struct Span {
    end: DateTime<Utc>,
    count: u32,
    triggers: u32,
}

/// All triggers and events of one (deployment, species).
#[derive(Debug, Clone)]
struct Group {
    deployment_id: String,
    scientific_name: String,
    /// (instant, observation id) -> count. Ordered like [`collapse`] sorts.
    triggers: BTreeMap<(DateTime<Utc>, String), u32>,
    /// Event start -> span. Spans never overlap and are separated by more
    /// than the interval.
    events: BTreeMap<DateTime<Utc>, Span>,
}

impl Group {
    fn id(&self, start: DateTime<Utc>) -> EventId {
        EventId {
            deployment_id: self.deployment_id.clone(),
            scientific_name: self.scientific_name.clone(),
            start,
        }
    }

    /// The event whose span holds `at`, if any.
    fn event_at(&self, at: DateTime<Utc>) -> Option<(DateTime<Utc>, Span)> {
        self.events
            .range(..=at)
            .next_back()
            .filter(|(_, span)| span.end >= at)
            .map(|(s, span)| (*s, *span))
    }

    /// Re-derive the events from the triggers in [from, to] (after a
    /// retraction or count change inside one former event).
    fn rebuild(
        &mut self,
        from: DateTime<Utc>,
        to: DateTime<Utc>,
        interval: Duration,
    ) -> Vec<DateTime<Utc>> {
        let mut starts = Vec::new();
        let mut current: Option<(DateTime<Utc>, Span)> = None;
        let lower = (from, String::new());
        for ((at, _), count) in self
            .triggers
            .range((Bound::Included(lower), Bound::Unbounded))
        {
            if *at > to {
                break;
            }
            match current.as_mut() {
                Some((_, span)) if *at - span.end <= interval => {
                    span.end = *at;
                    span.count = span.count.max(*count);
                    span.triggers += 1;
                }
                _ => {
                    if let Some((s, span)) = current.take() {
                        self.events.insert(s, span);
                        starts.push(s);
                    }
                    current = Some((
                        *at,
                        Span {
                            end: *at,
                            count: *count,
                            triggers: 1,
                        },
                    ));
                }
            }
        }
        if let Some((s, span)) = current {
            self.events.insert(s, span);
            starts.push(s);
        }
        starts
    }

    fn materialise(&self, start: DateTime<Utc>, span: &Span) -> IndependentEvent {
        let lower = (start, String::new());
        let observation_ids = self
            .triggers
            .range((Bound::Included(lower), Bound::Unbounded))
            .take_while(|((at, _), _)| *at <= span.end)
            .map(|((_, id), _)| id.clone())
            .collect();
        IndependentEvent {
            deployment_id: self.deployment_id.clone(),
            scientific_name: self.scientific_name.clone(),
            start,
            end: span.end,
            count: span.count,
            triggers: span.triggers,
            observation_ids,
        }
    }
}

/// Where the ledger keeps a trigger.
#[derive(Debug, Clone, Copy)]
struct Seen {
    group: usize,
    at: DateTime<Utc>,
}

/// Incremental independent events. Feeding it any sequence of inserts,
/// duplicates, retractions and relabels gives the same events as
/// [`collapse`] over the triggers that remain.
///
/// Memory: one entry per trigger held, until [`EventLedger::prune_before`]
/// forgets old events. Groups (deployment × species) are never dropped;
/// there are few of them.
#[derive(Debug, Clone)]
pub struct EventLedger {
    interval: Duration,
    /// Triggers before this instant are refused (set by `prune_before`).
    horizon: Option<DateTime<Utc>>,
    /// deployment -> species -> index into `groups`; sorted for output.
    index: BTreeMap<String, BTreeMap<String, usize>>,
    /// The same, hashed: every trigger looks its series up, and an ordered
    /// map's walk of string comparisons was a tenth of a trigger's cost.
    lookup: HashMap<
        String,
        HashMap<String, usize, foldhash::fast::RandomState>,
        foldhash::fast::RandomState,
    >,
    groups: Vec<Group>,
    /// observation id -> location, for duplicates, retractions and relabels.
    seen: HashMap<String, Seen, foldhash::fast::RandomState>,
}

impl EventLedger {
    /// An empty ledger. A negative interval is treated as zero.
    pub fn new(interval: Duration) -> Self {
        EventLedger {
            interval: interval.max(Duration::zero()),
            horizon: None,
            index: BTreeMap::new(),
            lookup: HashMap::default(),
            groups: Vec::new(),
            seen: HashMap::default(),
        }
    }

    /// The independence interval in force.
    pub fn interval(&self) -> Duration {
        self.interval
    }

    /// Triggers before this instant are refused; `None` until a prune.
    pub fn horizon(&self) -> Option<DateTime<Utc>> {
        self.horizon
    }

    /// Number of triggers held.
    pub fn trigger_count(&self) -> usize {
        self.seen.len()
    }

    /// A small stable handle of the (deployment, species) series: series
    /// are never removed (pruning empties them), so the handle and an event
    /// start name an event more cheaply than an [`EventId`].
    pub fn series_of(&self, deployment_id: &str, scientific_name: &str) -> Option<u32> {
        self.find(deployment_id, scientific_name).map(|i| i as u32)
    }

    /// Whether the series `series` holds an event starting at `start`.
    pub fn holds(&self, series: u32, start: DateTime<Utc>) -> bool {
        self.groups
            .get(series as usize)
            .is_some_and(|g| g.events.contains_key(&start))
    }

    fn find(&self, deployment_id: &str, scientific_name: &str) -> Option<usize> {
        self.lookup
            .get(deployment_id)
            .and_then(|m| m.get(scientific_name))
            .copied()
    }

    fn group_index(&mut self, deployment_id: &str, scientific_name: &str) -> usize {
        if let Some(i) = self.find(deployment_id, scientific_name) {
            return i;
        }
        let i = self.groups.len();
        self.groups.push(Group {
            deployment_id: deployment_id.to_owned(),
            scientific_name: scientific_name.to_owned(),
            triggers: BTreeMap::new(),
            events: BTreeMap::new(),
        });
        self.index
            .entry(deployment_id.to_owned())
            .or_default()
            .insert(scientific_name.to_owned(), i);
        self.lookup
            .entry(deployment_id.to_owned())
            .or_default()
            .insert(scientific_name.to_owned(), i);
        i
    }

    /// Add one trigger.
    pub fn insert(&mut self, trigger: Trigger) -> Change {
        if self.seen.contains_key(&trigger.observation_id) {
            return Change::Duplicate;
        }
        if self.horizon.is_some_and(|h| trigger.at < h) {
            return Change::TooOld;
        }
        self.insert_unchecked(trigger)
    }

    fn insert_unchecked(&mut self, trigger: Trigger) -> Change {
        let gi = self.group_index(&trigger.deployment_id, &trigger.scientific_name);
        let interval = self.interval;
        let at = trigger.at;
        let count = trigger.count;
        self.seen
            .insert(trigger.observation_id.clone(), Seen { group: gi, at });
        let g = &mut self.groups[gi];
        g.triggers.insert((at, trigger.observation_id), count);

        let prev = g
            .events
            .range(..=at)
            .next_back()
            .map(|(s, span)| (*s, *span))
            .filter(|(_, span)| at <= span.end || at - span.end <= interval);
        let next = g
            .events
            .range((Bound::Excluded(at), Bound::Unbounded))
            .next()
            .map(|(s, span)| (*s, *span))
            .filter(|(s, _)| *s - at <= interval);

        match (prev, next) {
            (Some((ps, pspan)), Some((ns, nspan))) => {
                g.events.remove(&ns);
                let merged = Span {
                    end: nspan.end,
                    count: pspan.count.max(nspan.count).max(count),
                    triggers: pspan.triggers + nspan.triggers + 1,
                };
                g.events.insert(ps, merged);
                Change::Merged {
                    old: vec![g.id(ps), g.id(ns)],
                    new: g.id(ps),
                }
            }
            (Some((ps, pspan)), None) => {
                let span = Span {
                    end: pspan.end.max(at),
                    count: pspan.count.max(count),
                    triggers: pspan.triggers + 1,
                };
                g.events.insert(ps, span);
                Change::Extended {
                    old: g.id(ps),
                    new: g.id(ps),
                }
            }
            (None, Some((ns, nspan))) => {
                g.events.remove(&ns);
                let span = Span {
                    end: nspan.end,
                    count: nspan.count.max(count),
                    triggers: nspan.triggers + 1,
                };
                g.events.insert(at, span);
                Change::Extended {
                    old: g.id(ns),
                    new: g.id(at),
                }
            }
            (None, None) => {
                g.events.insert(
                    at,
                    Span {
                        end: at,
                        count,
                        triggers: 1,
                    },
                );
                Change::NewEvent(g.id(at))
            }
        }
    }

    /// Remove a trigger (a correction to `blank`). May shrink, split or
    /// remove its event.
    pub fn retract(&mut self, observation_id: &str) -> Change {
        let Some((id, seen)) = self.seen.remove_entry(observation_id) else {
            return Change::Unknown;
        };
        let interval = self.interval;
        let g = &mut self.groups[seen.group];
        let Some((start, span)) = g.event_at(seen.at) else {
            // Cannot happen: every held trigger lies in an event. Keep the
            // ledger consistent anyway.
            g.triggers.remove(&(seen.at, id));
            return Change::Unknown;
        };
        g.triggers.remove(&(seen.at, id));
        g.events.remove(&start);
        let old = g.id(start);
        let starts = g.rebuild(start, span.end, interval);
        match starts.as_slice() {
            [] => Change::Removed(old),
            [s] => Change::Updated { old, new: g.id(*s) },
            _ => Change::Split {
                old,
                new: starts.iter().map(|s| g.id(*s)).collect(),
            },
        }
    }

    /// Correct a trigger's species and count. Same species: the count is
    /// replaced (`Updated`). Another species: the trigger moves groups
    /// (`Relabelled`), unless it lies before the horizon, where the target
    /// group's old events may have been pruned (`TooOld`, nothing changed).
    pub fn relabel(&mut self, observation_id: &str, new_species: &str, new_count: u32) -> Change {
        let Some(seen) = self.seen.get(observation_id).copied() else {
            return Change::Unknown;
        };
        let g = &self.groups[seen.group];
        if g.scientific_name == new_species {
            let interval = self.interval;
            let g = &mut self.groups[seen.group];
            let Some((start, span)) = g.event_at(seen.at) else {
                return Change::Unknown;
            };
            if let Some(c) = g.triggers.get_mut(&(seen.at, observation_id.to_owned())) {
                *c = new_count;
            }
            g.events.remove(&start);
            let starts = g.rebuild(start, span.end, interval);
            let new = starts.first().copied().unwrap_or(start);
            return Change::Updated {
                old: g.id(start),
                new: g.id(new),
            };
        }
        if self.horizon.is_some_and(|h| seen.at < h) {
            return Change::TooOld;
        }
        let deployment_id = g.deployment_id.clone();
        let retracted = self.retract(observation_id);
        let inserted = self.insert_unchecked(Trigger {
            observation_id: observation_id.to_owned(),
            deployment_id,
            scientific_name: new_species.to_owned(),
            at: seen.at,
            count: new_count,
        });
        Change::Relabelled {
            retracted: Box::new(retracted),
            inserted: Box::new(inserted),
        }
    }

    /// Forget every event that ended more than one interval before `cutoff`
    /// (no trigger at or after `cutoff` can join it), with its triggers and
    /// their observation ids, and refuse triggers before `cutoff` from now
    /// on (`TooOld`): a redelivered old trigger must not come back as a new
    /// event. The horizon only moves forward. Returns the events forgotten.
    pub fn prune_before(&mut self, cutoff: DateTime<Utc>) -> usize {
        self.prune_before_each(cutoff, |_, _| {})
    }

    /// [`EventLedger::prune_before`], telling `forgot` the series handle
    /// ([`EventLedger::series_of`]) and start of each event forgotten, so
    /// that a caller keeping its own per-event records can drop just those.
    pub fn prune_before_each(
        &mut self,
        cutoff: DateTime<Utc>,
        mut forgot: impl FnMut(u32, DateTime<Utc>),
    ) -> usize {
        let cutoff = self.horizon.map_or(cutoff, |h| h.max(cutoff));
        self.horizon = Some(cutoff);
        let Some(limit) = cutoff.checked_sub_signed(self.interval) else {
            return 0;
        };
        let mut forgotten = 0;
        let Self { groups, seen, .. } = self;
        for (gi, g) in groups.iter_mut().enumerate() {
            // Spans are ordered and apart, so the events to forget (start
            // and end before `limit`) are a prefix, and their triggers are
            // every trigger up to the last one's end: split both maps once
            // instead of removing key by key.
            let Some(first_kept) = g
                .events
                .iter()
                .find(|(s, span)| !(**s < limit && span.end < limit))
                .map(|(s, _)| *s)
                .or_else(|| {
                    g.events
                        .keys()
                        .next_back()
                        .map(|_| DateTime::<Utc>::MAX_UTC)
                })
            else {
                continue;
            };
            if g.events.keys().next() == Some(&first_kept) {
                continue;
            }
            let kept = g.events.split_off(&first_kept);
            let gone = std::mem::replace(&mut g.events, kept);
            let Some(last_end) = gone.values().next_back().map(|span| span.end) else {
                continue;
            };
            let later = g
                .triggers
                .split_off(&(last_end + Duration::nanoseconds(1), String::new()));
            for ((_, observation_id), _) in std::mem::replace(&mut g.triggers, later) {
                seen.remove(&observation_id);
            }
            for start in gone.into_keys() {
                forgot(gi as u32, start);
                forgotten += 1;
            }
        }
        forgotten
    }

    /// Every event, sorted by (deployment, species, start), as
    /// [`collapse`] returns them.
    pub fn events(&self) -> impl Iterator<Item = IndependentEvent> + '_ {
        self.index.values().flat_map(move |species| {
            species.values().flat_map(move |gi| {
                let g = &self.groups[*gi];
                g.events
                    .iter()
                    .map(move |(s, span)| g.materialise(*s, span))
            })
        })
    }

    /// One event by id.
    /// Like [`EventLedger::event`] without the observation ids (left
    /// empty): what the engine stores and tests, at a cost that does not
    /// grow with the event's length.
    pub fn event_summary(&self, id: &EventId) -> Option<IndependentEvent> {
        let gi = self.find(&id.deployment_id, &id.scientific_name)?;
        let g = &self.groups[gi];
        g.events.get(&id.start).map(|span| IndependentEvent {
            deployment_id: g.deployment_id.clone(),
            scientific_name: g.scientific_name.clone(),
            start: id.start,
            end: span.end,
            count: span.count,
            triggers: span.triggers,
            observation_ids: Vec::new(),
        })
    }

    pub fn event(&self, id: &EventId) -> Option<IndependentEvent> {
        let gi = self.find(&id.deployment_id, &id.scientific_name)?;
        let g = &self.groups[gi];
        g.events
            .get(&id.start)
            .map(|span| g.materialise(id.start, span))
    }

    /// The event holding an observation, if the ledger holds it.
    pub fn event_of(&self, observation_id: &str) -> Option<IndependentEvent> {
        let seen = self.seen.get(observation_id)?;
        let g = &self.groups[seen.group];
        g.event_at(seen.at).map(|(s, span)| g.materialise(s, &span))
    }

    /// The species with events or triggers held at a deployment, sorted.
    pub fn species_at<'a>(&'a self, deployment_id: &str) -> impl Iterator<Item = &'a str> + 'a {
        self.index
            .get(deployment_id)
            .into_iter()
            .flat_map(|m| m.keys().map(String::as_str))
    }

    /// Independent events of one group that start in [from, to): the count
    /// `c` of a spike test.
    pub fn count_starting_in(
        &self,
        deployment_id: &str,
        scientific_name: &str,
        from: DateTime<Utc>,
        to: DateTime<Utc>,
    ) -> u64 {
        if from >= to {
            return 0;
        }
        self.find(deployment_id, scientific_name).map_or(0, |gi| {
            self.groups[gi].events.range(from..to).count() as u64
        })
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)]
mod tests {
    use super::*;
    use crate::activity::test_reference::reference;
    use chrono::{NaiveDate, TimeZone};
    use chrono_tz::Australia::Sydney;
    use proptest::prelude::*;

    const DOG: &str = "Canis familiaris";
    const FOX: &str = "Vulpes vulpes";

    fn t0() -> DateTime<Utc> {
        Utc.with_ymd_and_hms(2026, 3, 10, 11, 0, 0).unwrap()
    }

    fn trig(id: &str, dep: &str, sp: &str, at: DateTime<Utc>, count: u32) -> Trigger {
        Trigger {
            observation_id: id.to_owned(),
            deployment_id: dep.to_owned(),
            scientific_name: sp.to_owned(),
            at,
            count,
        }
    }

    fn half_hour() -> Duration {
        Duration::minutes(30)
    }

    /// Both entry points, so every worked example checks both.
    fn both(triggers: Vec<Trigger>) -> Vec<IndependentEvent> {
        let scratch = collapse(triggers.clone(), half_hour());
        let mut ledger = EventLedger::new(half_hour());
        for t in triggers {
            ledger.insert(t);
        }
        let inc: Vec<_> = ledger.events().collect();
        assert_eq!(inc, scratch, "ledger and collapse disagree");
        scratch
    }

    #[test]
    fn gap_of_exactly_the_interval_joins() {
        // Definition (METHODS 1; O'Brien et al. 2003 [memory]): a new event
        // needs a gap strictly greater than 30 min.
        let ev = both(vec![
            trig("a", "KB-01", DOG, t0(), 1),
            trig("b", "KB-01", DOG, t0() + Duration::minutes(30), 2),
        ]);
        assert_eq!(ev.len(), 1);
        assert_eq!(ev[0].count, 2);
        assert_eq!(ev[0].triggers, 2);
    }

    #[test]
    fn gap_one_second_over_splits() {
        // Definition: 30 min + 1 s is strictly greater than 30 min.
        let ev = both(vec![
            trig("a", "KB-01", DOG, t0(), 1),
            trig("b", "KB-01", DOG, t0() + Duration::seconds(30 * 60 + 1), 1),
        ]);
        assert_eq!(ev.len(), 2);
        assert_eq!(ev[1].start, t0() + Duration::seconds(1801));
    }

    #[test]
    fn gap_is_measured_from_the_previous_trigger_not_the_first() {
        // Definition (METHODS 1): the gap is to the previous trigger, so a
        // chain may last far longer than the interval. Triggers one minute
        // apart (common practice: cameras wait about a minute) for 3 hours.
        let chain: Vec<_> = (0..180)
            .map(|i| {
                trig(
                    &format!("c{i}"),
                    "KB-02",
                    DOG,
                    t0() + Duration::minutes(i),
                    1 + (i % 3) as u32,
                )
            })
            .collect();
        let ev = both(chain);
        assert_eq!(ev.len(), 1);
        assert_eq!(ev[0].triggers, 180);
        assert_eq!(ev[0].end - ev[0].start, Duration::minutes(179));
        assert_eq!(ev[0].count, 3);
    }

    #[test]
    fn input_order_and_repeats_do_not_matter() {
        // Definition (METHODS 1): order must not matter; duplicates by id.
        let sorted = vec![
            trig("a", "KB-03", DOG, t0(), 1),
            trig("b", "KB-03", DOG, t0() + Duration::minutes(10), 4),
            trig("c", "KB-03", DOG, t0() + Duration::minutes(50), 1),
        ];
        let mut shuffled = vec![sorted[2].clone(), sorted[0].clone(), sorted[1].clone()];
        shuffled.push(sorted[1].clone());
        shuffled.push(sorted[2].clone());
        let a = both(sorted);
        let b = both(shuffled);
        assert_eq!(a, b);
        assert_eq!(a.len(), 2);
        assert_eq!(a[0].observation_ids, vec!["a", "b"]);
        assert_eq!(a[0].count, 4);
    }

    #[test]
    fn two_cameras_and_another_species_are_separate() {
        // Definition (METHODS 1): groups are (deployment, species); a fox
        // between two dog triggers neither breaks nor extends the dog event.
        let ev = both(vec![
            trig("d1", "KB-04", DOG, t0(), 1),
            trig("f1", "KB-04", FOX, t0() + Duration::minutes(20), 1),
            trig("d2", "KB-04", DOG, t0() + Duration::minutes(25), 1),
            trig("d3", "KB-05", DOG, t0() + Duration::minutes(5), 1),
            // 40 min after d2: the fox at +50 does not bridge it.
            trig("f2", "KB-04", FOX, t0() + Duration::minutes(50), 1),
            trig("d4", "KB-04", DOG, t0() + Duration::minutes(65), 1),
        ]);
        let dogs04: Vec<_> = ev
            .iter()
            .filter(|e| e.deployment_id == "KB-04" && e.scientific_name == DOG)
            .collect();
        assert_eq!(dogs04.len(), 2);
        assert_eq!(dogs04[0].observation_ids, vec!["d1", "d2"]);
        let foxes: Vec<_> = ev.iter().filter(|e| e.scientific_name == FOX).collect();
        assert_eq!(foxes.len(), 1, "fox gap 30 min joins");
        assert_eq!(ev.iter().filter(|e| e.deployment_id == "KB-05").count(), 1);
        assert_eq!(ev.len(), 4);
    }

    #[test]
    fn daylight_saving_fold_uses_real_gaps() {
        // Australia/Sydney: 2026-04-05 03:00 AEDT becomes 02:00 AEST (the
        // wall clock runs back an hour; IANA tz database via chrono-tz).
        // 02:50 AEDT and 02:10 AEST read 40 min *earlier* on the wall but are
        // 20 min apart in real time: they join.
        let first = Sydney
            .from_local_datetime(
                &NaiveDate::from_ymd_opt(2026, 4, 5)
                    .unwrap()
                    .and_hms_opt(2, 50, 0)
                    .unwrap(),
            )
            .earliest()
            .unwrap()
            .with_timezone(&Utc);
        let second = Sydney
            .from_local_datetime(
                &NaiveDate::from_ymd_opt(2026, 4, 5)
                    .unwrap()
                    .and_hms_opt(2, 10, 0)
                    .unwrap(),
            )
            .latest()
            .unwrap()
            .with_timezone(&Utc);
        assert_eq!(second - first, Duration::minutes(20));
        // 02:40 AEST is 50 min after 02:50 AEDT in real time: splits, though
        // the wall clock shows only 10 min earlier.
        let third = second + Duration::minutes(30) + Duration::seconds(1);
        let ev = both(vec![
            trig("x", "KB-06", DOG, third, 1),
            trig("w", "KB-06", DOG, second, 1),
            trig("v", "KB-06", DOG, first, 1),
        ]);
        assert_eq!(ev.len(), 2);
        assert_eq!(ev[0].observation_ids, vec!["v", "w"]);
        assert_eq!(ev[0].start, first);
    }

    #[test]
    fn ledger_reports_changes_with_old_and_new_ids() {
        let mut l = EventLedger::new(half_hour());
        let id = |s: DateTime<Utc>| EventId {
            deployment_id: "KB-07".into(),
            scientific_name: DOG.into(),
            start: s,
        };
        let a = t0();
        let b = t0() + Duration::minutes(50);
        assert_eq!(
            l.insert(trig("a", "KB-07", DOG, a, 1)),
            Change::NewEvent(id(a))
        );
        assert_eq!(l.insert(trig("a", "KB-07", DOG, a, 1)), Change::Duplicate);
        assert_eq!(
            l.insert(trig("b", "KB-07", DOG, b, 1)),
            Change::NewEvent(id(b))
        );
        // A late trigger 25 min after a and 25 min before b bridges them.
        let m = t0() + Duration::minutes(25);
        assert_eq!(
            l.insert(trig("m", "KB-07", DOG, m, 3)),
            Change::Merged {
                old: vec![id(a), id(b)],
                new: id(a)
            }
        );
        // A late trigger before the first moves the start.
        let early = t0() - Duration::minutes(10);
        assert_eq!(
            l.insert(trig("e", "KB-07", DOG, early, 1)),
            Change::Extended {
                old: id(a),
                new: id(early)
            }
        );
        // Retracting the bridge splits the event again.
        assert_eq!(
            l.retract("m"),
            Change::Split {
                old: id(early),
                new: vec![id(early), id(b)]
            }
        );
        assert_eq!(l.retract("m"), Change::Unknown);
        assert_eq!(
            l.retract("e"),
            Change::Updated {
                old: id(early),
                new: id(a)
            }
        );
        assert_eq!(l.retract("b"), Change::Removed(id(b)));
        // Relabel to fox moves it.
        let ch = l.relabel("a", FOX, 2);
        assert_eq!(
            ch,
            Change::Relabelled {
                retracted: Box::new(Change::Removed(id(a))),
                inserted: Box::new(Change::NewEvent(EventId {
                    deployment_id: "KB-07".into(),
                    scientific_name: FOX.into(),
                    start: a
                })),
            }
        );
        let ev: Vec<_> = l.events().collect();
        assert_eq!(ev.len(), 1);
        assert_eq!(ev[0].count, 2);
        assert_eq!(l.relabel("zz", FOX, 1), Change::Unknown);
    }

    #[test]
    fn relabel_count_lowers_event_max() {
        let mut l = EventLedger::new(half_hour());
        l.insert(trig("a", "KB-08", DOG, t0(), 5));
        l.insert(trig("b", "KB-08", DOG, t0() + Duration::minutes(1), 2));
        l.relabel("a", DOG, 1);
        let ev: Vec<_> = l.events().collect();
        assert_eq!(ev[0].count, 2);
    }

    #[test]
    fn prune_forgets_old_events_and_refuses_old_triggers() {
        let mut l = EventLedger::new(half_hour());
        l.insert(trig("old", "KB-09", DOG, t0(), 1));
        l.insert(trig("new", "KB-09", DOG, t0() + Duration::days(40), 1));
        let cutoff = t0() + Duration::days(30);
        assert_eq!(l.prune_before(cutoff), 1);
        assert_eq!(l.trigger_count(), 1);
        // The redelivered old trigger is refused, not a new event.
        assert_eq!(l.insert(trig("old", "KB-09", DOG, t0(), 1)), Change::TooOld);
        assert_eq!(l.retract("old"), Change::Unknown);
        assert_eq!(l.events().count(), 1);
        // The horizon never moves back.
        l.prune_before(t0());
        assert_eq!(l.horizon(), Some(cutoff));
    }

    #[test]
    fn prune_keeps_events_a_new_trigger_could_still_join() {
        let mut l = EventLedger::new(half_hour());
        let cutoff = t0() + Duration::days(1);
        // Ends 30 min before the cutoff: a trigger at the cutoff joins it.
        l.insert(trig("a", "KB-10", DOG, cutoff - Duration::minutes(30), 1));
        assert_eq!(l.prune_before(cutoff), 0);
        assert!(matches!(
            l.insert(trig("b", "KB-10", DOG, cutoff, 1)),
            Change::Extended { .. }
        ));
        assert_eq!(l.events().count(), 1);
    }

    #[test]
    fn count_starting_in_window() {
        let mut l = EventLedger::new(half_hour());
        for i in 0..5 {
            l.insert(trig(
                &format!("x{i}"),
                "KB-11",
                DOG,
                t0() + Duration::hours(i),
                1,
            ));
        }
        assert_eq!(
            l.count_starting_in("KB-11", DOG, t0(), t0() + Duration::hours(3)),
            3
        );
        assert_eq!(
            l.count_starting_in("KB-11", FOX, t0(), t0() + Duration::hours(3)),
            0
        );
    }

    /// (deployment, species, start s, end s, count, triggers, ids).
    type Row = (String, String, i64, i64, u64, u64, Vec<String>);

    #[test]
    fn matches_independent_python_collapse() {
        // Reference: the independent collapse in gen_activity.py (its own
        // sort-and-split code, not a port of this file).
        let data = reference();
        let cases = data["events"].as_array().unwrap();
        assert!(!cases.is_empty());
        for case in cases {
            let interval = Duration::seconds(case["interval_s"].as_i64().unwrap());
            let triggers: Vec<Trigger> = case["triggers"]
                .as_array()
                .unwrap()
                .iter()
                .map(|t| Trigger {
                    observation_id: t["id"].as_str().unwrap().into(),
                    deployment_id: t["dep"].as_str().unwrap().into(),
                    scientific_name: t["sp"].as_str().unwrap().into(),
                    at: DateTime::from_timestamp(t["t"].as_i64().unwrap(), 0).unwrap(),
                    count: t["n"].as_u64().unwrap() as u32,
                })
                .collect();
            let want: Vec<Row> = case["events"]
                .as_array()
                .unwrap()
                .iter()
                .map(|e| {
                    (
                        e["dep"].as_str().unwrap().to_owned(),
                        e["sp"].as_str().unwrap().to_owned(),
                        e["start"].as_i64().unwrap(),
                        e["end"].as_i64().unwrap(),
                        e["count"].as_u64().unwrap(),
                        e["triggers"].as_u64().unwrap(),
                        e["ids"]
                            .as_array()
                            .unwrap()
                            .iter()
                            .map(|s| s.as_str().unwrap().to_owned())
                            .collect(),
                    )
                })
                .collect();
            let mut ledger = EventLedger::new(interval);
            for t in triggers.clone() {
                ledger.insert(t);
            }
            for got in [collapse(triggers, interval), ledger.events().collect()] {
                let got: Vec<_> = got
                    .into_iter()
                    .map(|e| {
                        (
                            e.deployment_id,
                            e.scientific_name,
                            e.start.timestamp(),
                            e.end.timestamp(),
                            e.count as u64,
                            e.triggers as u64,
                            e.observation_ids,
                        )
                    })
                    .collect();
                assert_eq!(got, want);
            }
        }
    }

    #[derive(Debug, Clone)]
    enum Op {
        Insert(Trigger),
        Repeat(usize),
        Retract(usize),
        Relabel(usize, usize, u32),
    }

    fn arb_trigger() -> impl Strategy<Value = Trigger> {
        // Few ids, deployments, species and a tight time range so that
        // collisions, bridges and splits are frequent.
        (0u32..40, 0usize..2, 0usize..2, 0i64..(6 * 3600), 1u32..5).prop_map(
            |(id, d, s, secs, n)| Trigger {
                observation_id: format!("o{id}"),
                deployment_id: ["KB-12", "KB-13"][d].to_owned(),
                scientific_name: [DOG, FOX][s].to_owned(),
                // Minute-ish steps plus exact-interval gaps.
                at: t0()
                    + Duration::seconds(
                        secs - secs % 60 + if secs % 7 == 0 { 0 } else { secs % 2 },
                    ),
                count: n,
            },
        )
    }

    fn arb_op() -> impl Strategy<Value = Op> {
        prop_oneof![
            6 => arb_trigger().prop_map(Op::Insert),
            1 => any::<usize>().prop_map(Op::Repeat),
            2 => any::<usize>().prop_map(Op::Retract),
            1 => (any::<usize>(), 0usize..2, 1u32..5).prop_map(|(i, s, n)| Op::Relabel(i, s, n)),
        ]
    }

    proptest! {
        #![proptest_config(ProptestConfig::with_cases(256))]
        #[test]
        fn ledger_equals_collapse(ops in proptest::collection::vec(arb_op(), 1..120), prune_at in 0i64..(7 * 3600), extra in proptest::collection::vec(arb_trigger(), 0..20)) {
            let interval = half_hour();
            let mut ledger = EventLedger::new(interval);
            // Model: the triggers that should remain, by id, first seen wins.
            let mut model: Vec<Trigger> = Vec::new();
            let mut history: Vec<Trigger> = Vec::new();
            for op in ops {
                match op {
                    Op::Insert(t) => {
                        let dup = model.iter().any(|m| m.observation_id == t.observation_id);
                        let ch = ledger.insert(t.clone());
                        prop_assert_eq!(dup, ch == Change::Duplicate);
                        if !dup { model.push(t.clone()); }
                        history.push(t);
                    }
                    Op::Repeat(i) if !history.is_empty() => {
                        let t = history[i % history.len()].clone();
                        let dup = model.iter().any(|m| m.observation_id == t.observation_id);
                        ledger.insert(t.clone());
                        if !dup { model.push(t); }
                    }
                    Op::Retract(i) if !history.is_empty() => {
                        let id = history[i % history.len()].observation_id.clone();
                        let held = model.iter().any(|m| m.observation_id == id);
                        let ch = ledger.retract(&id);
                        prop_assert_eq!(held, ch != Change::Unknown);
                        model.retain(|m| m.observation_id != id);
                    }
                    Op::Relabel(i, s, n) if !history.is_empty() => {
                        let id = history[i % history.len()].observation_id.clone();
                        ledger.relabel(&id, [DOG, FOX][s], n);
                        for m in model.iter_mut().filter(|m| m.observation_id == id) {
                            m.scientific_name = [DOG, FOX][s].to_owned();
                            m.count = n;
                        }
                    }
                    _ => {}
                }
                let got: Vec<_> = ledger.events().collect();
                prop_assert_eq!(got, collapse(model.clone(), interval));
            }
            // Prune, then keep feeding: kept events must match the model
            // restricted to events a post-cutoff trigger could still reach.
            let cutoff = t0() + Duration::seconds(prune_at);
            let before: Vec<_> = ledger.events().collect();
            let mut reported = Vec::new();
            let n = ledger.prune_before_each(cutoff, |series, start| reported.push((series, start)));
            // What it says it forgot is what went, and the triggers of
            // what went are forgotten too (an id may come again).
            let after: Vec<_> = ledger.events().collect();
            let mut gone: Vec<_> = before
                .iter()
                .filter(|e| !after.contains(e))
                .filter_map(|e| ledger.series_of(&e.deployment_id, &e.scientific_name).map(|s| (s, e.start)))
                .collect();
            gone.sort();
            reported.sort();
            prop_assert_eq!(n, reported.len());
            prop_assert_eq!(reported, gone);
            let held: usize = after.iter().map(|e| e.observation_ids.len()).sum();
            prop_assert_eq!(ledger.trigger_count(), held);
            for (i, t) in extra.into_iter().enumerate() {
                let t = Trigger { observation_id: format!("x-{i}"), ..t };
                let ch = ledger.insert(t.clone());
                if t.at < cutoff {
                    prop_assert_eq!(ch, Change::TooOld);
                } else if !model.iter().any(|m| m.observation_id == t.observation_id) {
                    model.push(t);
                }
            }
            let limit = cutoff - interval;
            let want: Vec<_> = collapse(model, interval).into_iter().filter(|e| e.end >= limit).collect();
            let got: Vec<_> = ledger.events().collect();
            prop_assert_eq!(got, want);
        }
    }
}
