//! A stored history read the engine's way, for the formats that describe
//! it: independent events with their observations, effort per deployment,
//! heartbeats, and how many people and vehicles each camera saw.
//!
//! Role: one pass over the messages a store returns
//! ([`crate::store::Backend::history`]: observations and heartbeats in time
//! order, then corrections). Events come from
//! [`crate::engine::ledger_from_history`] and effort from
//! [`crate::engine::site_uptime`], the daemon's own code, so an export or a
//! report says what the engine would count. Pure: no I/O, no clock.

use crate::activity::{IndependentEvent, Uptime};
use crate::config::{Config, Site};
use crate::model::{ClassificationMethod, Heartbeat, Message, ObservationType};
use chrono::{DateTime, Duration, Utc};
use std::collections::{HashMap, HashSet};

/// What the formats keep of one animal observation (a trigger).
#[derive(Debug, Clone, PartialEq)]
pub struct ObservationFacts {
    pub deployment_id: String,
    pub at: DateTime<Utc>,
    pub classification_probability: Option<f64>,
    pub classification_method: Option<ClassificationMethod>,
    pub media_id: Option<String>,
    pub file_path: Option<String>,
    pub vernacular_name: Option<String>,
    pub life_stage: Option<String>,
    pub sex: Option<String>,
    pub behavior: Option<String>,
}

/// A human or vehicle observation: only when and where (DESIGN.md
/// "Messages": they never appear beyond a count).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct PrivateSighting {
    /// Index into the config's sites.
    pub site: usize,
    pub at: DateTime<Utc>,
    pub kind: ObservationType,
}

/// A history, read.
#[derive(Debug, Clone)]
pub struct History {
    /// The config's sites, in its order (indices below point here).
    pub sites: Vec<Site>,
    /// Every independent event, sorted by (deployment, species, start),
    /// corrections applied.
    pub events: Vec<IndependentEvent>,
    /// Effort per site (same order as `sites`).
    pub uptime: Vec<Uptime>,
    /// Animal observations by observation id.
    pub observations: HashMap<String, ObservationFacts>,
    /// Observation ids a person corrected.
    pub corrected: HashSet<String>,
    /// Heartbeats of known deployments, in time order.
    pub heartbeats: Vec<Heartbeat>,
    /// Human and vehicle observations of known deployments.
    pub private: Vec<PrivateSighting>,
}

impl History {
    /// Reads `history` with the config's sites, silence limit and
    /// independence interval. Messages of deployments not in the sites
    /// file are left out, as the engine leaves them out.
    pub fn read(cfg: &Config, history: &[Message]) -> Self {
        let sites = cfg.sites.sites.clone();
        let index: HashMap<&str, usize> = sites
            .iter()
            .enumerate()
            .map(|(i, s)| (s.deployment_id.as_str(), i))
            .collect();
        let silence = crate::engine::effort_silence(cfg, crate::engine::Options::default());
        let mut uptime: Vec<Uptime> = sites
            .iter()
            .map(|s| crate::engine::site_uptime(s, silence))
            .collect();
        let mut observations = HashMap::new();
        let mut corrected = HashSet::new();
        let mut heartbeats = Vec::new();
        let mut private = Vec::new();
        for m in history {
            match m {
                Message::Observation(o) => {
                    let Some(&site) = index.get(o.deployment_id.as_str()) else {
                        continue;
                    };
                    uptime[site].record(o.event_start);
                    match o.observation_type {
                        ObservationType::Animal => {
                            observations.insert(
                                o.observation_id.clone(),
                                ObservationFacts {
                                    deployment_id: o.deployment_id.clone(),
                                    at: o.event_start,
                                    classification_probability: o.classification_probability,
                                    classification_method: o.classification_method,
                                    media_id: o.media_id.clone(),
                                    file_path: o.file_path.clone(),
                                    vernacular_name: o.vernacular_name.clone(),
                                    life_stage: o.life_stage.clone(),
                                    sex: o.sex.clone(),
                                    behavior: o.behavior.clone(),
                                },
                            );
                        }
                        t if t.is_private() => private.push(PrivateSighting {
                            site,
                            at: o.event_start,
                            kind: t,
                        }),
                        _ => {}
                    }
                }
                Message::Heartbeat(h) => {
                    if let Some(&site) = index.get(h.deployment_id.as_str()) {
                        uptime[site].record(h.timestamp);
                        heartbeats.push(h.clone());
                    }
                }
                Message::Correction(c) => {
                    corrected.insert(c.observation_id.clone());
                }
            }
        }
        heartbeats.sort_by_key(|h| h.timestamp);
        let interval = Duration::minutes(i64::from(cfg.detection.independence_minutes));
        let events = crate::engine::ledger_from_history(history, interval)
            .events()
            .filter(|e| index.contains_key(e.deployment_id.as_str()))
            .collect();
        History {
            sites,
            events,
            uptime,
            observations,
            corrected,
            heartbeats,
            private,
        }
    }

    /// The site index of a deployment.
    pub fn site_index(&self, deployment_id: &str) -> Option<usize> {
        self.sites
            .iter()
            .position(|s| s.deployment_id == deployment_id)
    }

    /// Camera-nights of `site` in `[from, to)` as of `now` (the engine's
    /// rule: docs/activity.md).
    pub fn camera_nights(
        &self,
        site: usize,
        from: DateTime<Utc>,
        to: DateTime<Utc>,
        now: DateTime<Utc>,
    ) -> f64 {
        self.uptime
            .get(site)
            .map_or(0.0, |u| u.camera_nights(from, to, now))
    }
}
