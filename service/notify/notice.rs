//! The notice model: one decision about one candidate, with its evidence.
//!
//! Role: plain data plus two derived views, the stable [`NoticeId`] and the
//! JSON object written by `outrider replay` (one per line) and sent as the
//! webhook body and the MQTT payload ([`Notice::replay_line`]). No I/O.
//!
//! A notice is made for every candidate, whatever the fatigue policy
//! decided: `disposition` says whether it was sent, folded into a later
//! notice, or deferred to the digest. That is what lets replay count what
//! each setting would have sent.

use chrono::{DateTime, SecondsFormat, Utc};
use serde::{Deserialize, Serialize};
use serde_json::{json, Value};
use sha2::{Digest, Sha256};
use std::fmt;

/// Why a notice was raised. Serialised in kebab-case, matching the watch
/// `trigger` values of the config (`presence`, `spike`, `first-seen`,
/// `silence`) plus the kinds the service raises itself.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Trigger {
    /// A watched species was detected.
    Presence,
    /// Activity well above the site's usual level (gamma-Poisson test).
    Spike,
    /// Slow rise over days (Poisson CUSUM).
    BuildUp,
    /// A species seen again after N quiet days.
    FirstSeen,
    /// A camera stopped reporting.
    Silence,
    /// A silent camera is reporting again.
    SilenceEnded,
    /// Follow-up: a person corrected the observation behind an earlier
    /// notice, so that notice no longer stands.
    Retraction,
}

impl Trigger {
    pub const ALL: [Trigger; 7] = [
        Self::Presence,
        Self::Spike,
        Self::BuildUp,
        Self::FirstSeen,
        Self::Silence,
        Self::SilenceEnded,
        Self::Retraction,
    ];

    pub fn as_str(self) -> &'static str {
        match self {
            Self::Presence => "presence",
            Self::Spike => "spike",
            Self::BuildUp => "build-up",
            Self::FirstSeen => "first-seen",
            Self::Silence => "silence",
            Self::SilenceEnded => "silence-ended",
            Self::Retraction => "retraction",
        }
    }

    pub fn parse(s: &str) -> Option<Self> {
        Self::ALL.into_iter().find(|t| t.as_str() == s)
    }

    /// Whether the notice is about a camera rather than an animal.
    pub fn is_about_camera(self) -> bool {
        matches!(self, Self::Silence | Self::SilenceEnded)
    }
}

impl fmt::Display for Trigger {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// What the fatigue policy did with the notice.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Disposition {
    /// Goes to the outbox now.
    Sent,
    /// Held; rides along in the next notice sent for the same camera and
    /// species, or in the digest.
    Folded,
    /// Waits for the digest (quiet hours, hourly cap).
    Deferred,
}

impl Disposition {
    pub fn as_str(self) -> &'static str {
        match self {
            Self::Sent => "sent",
            Self::Folded => "folded",
            Self::Deferred => "deferred",
        }
    }
}

impl fmt::Display for Disposition {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// Shared, immutable text: what notices, fold keys and the engine's
/// name tables hold, so that copying a name into a decision is a
/// reference-count increment, not an allocation (a decision is made for
/// every matched watch). Serialises as a plain JSON string.
pub type Text = std::sync::Arc<str>;

/// The figures behind a notice, kept exactly (the email words them).
///
/// Fields that do not apply to a trigger are `None` and left out of the
/// JSON. Units are in the names; rates are per camera-night.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct Evidence {
    /// Independent events (or animals, for presence) in the current window.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub count: Option<u32>,
    /// Camera-nights of effort in the current window.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub exposure_nights: Option<f64>,
    /// Length of the current window, hours (spike, build-up).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub window_hours: Option<f64>,
    /// Posterior gamma shape of the rate per camera-night.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub gamma_shape: Option<f64>,
    /// Posterior gamma rate (camera-nights) of the rate per camera-night.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub gamma_rate: Option<f64>,
    /// Expected count in the current window under the baseline.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub expected: Option<f64>,
    /// count / expected.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub ratio: Option<f64>,
    /// Upper-tail probability P(Y >= count) under the baseline.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub p_value: Option<f64>,
    /// Start of the baseline window.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub baseline_from: Option<DateTime<Utc>>,
    /// End (exclusive) of the baseline window.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub baseline_to: Option<DateTime<Utc>>,
    /// Geodesic distance in km shown on the notice: for a polygon area from
    /// the site to the area (`0.0` inside); for a circle area from the
    /// circle's centre (see `distance_from`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub distance_km: Option<f64>,
    /// What `distance_km` is measured to: `centre` for a circle area,
    /// `area` (the default) otherwise.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub distance_from: Option<DistanceFrom>,
    /// Days without the species at the site before this event (first-seen).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub quiet_days: Option<u32>,
    /// Hours without a sign of life (silence, silence-ended).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub silent_hours: Option<f64>,
    /// The rule that fired, `subscriber/watch`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub rule: Option<Text>,
    /// The clock time when the rule was evaluated (the simulated clock in
    /// replay).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub clock_time: Option<DateTime<Utc>>,
}

/// What a notice's distance is measured to.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum DistanceFrom {
    /// The centre of a circle area (the point the subscriber gave).
    Centre,
    /// The area itself: 0 inside, else to its boundary.
    Area,
}

/// One earlier event carried by a notice (it arrived during a cooldown).
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct FoldedEvent {
    pub event_id: Text,
    pub event_time: DateTime<Utc>,
    /// Animals in the event (largest count seen).
    pub count: u32,
}

/// Stable identifier of a notice: the same candidate always gets the same
/// id, so a retry, a redelivered message or a replay cannot make a second
/// notice. It is also the webhook idempotency key and the local part of the
/// email Message-ID.
///
/// Recipe (documented in docs/notices.md): SHA-256 over the ASCII tag
/// `outrider-notice-v1`, then for each of subscriber id, watch name,
/// deployment id, scientific name (empty for camera notices), trigger
/// (kebab-case) and the triggering event's id: its UTF-8 length as a
/// big-endian u64 followed by its bytes. The id is the first 16 bytes of the
/// digest in lower-case hex (32 characters).
///
/// The trigger is part of the recipe so that a retraction follow-up (same
/// event) does not collide with the notice it corrects.
#[derive(Debug, Clone, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize, Deserialize)]
#[serde(transparent)]
pub struct NoticeId(String);

impl NoticeId {
    pub fn derive(
        subscriber_id: &str,
        watch: &str,
        deployment_id: &str,
        scientific_name: &str,
        trigger: Trigger,
        event_id: &str,
    ) -> Self {
        let mut h = Sha256::new();
        h.update(b"outrider-notice-v1");
        for part in [
            subscriber_id,
            watch,
            deployment_id,
            scientific_name,
            trigger.as_str(),
            event_id,
        ] {
            h.update((part.len() as u64).to_be_bytes());
            h.update(part.as_bytes());
        }
        let digest = h.finalize();
        NoticeId(crate::notify::token::to_hex(&digest[..16]))
    }

    pub fn as_str(&self) -> &str {
        &self.0
    }
}

impl fmt::Display for NoticeId {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.0)
    }
}

/// One notice, as decided. Text fields that came from messages or config
/// (names, labels, URLs) are kept as received; the renderers clean them.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Notice {
    pub subscriber_id: Text,
    /// Display name of the subscriber (config `name`).
    pub subscriber_name: Text,
    /// The watch's name (config `subscriber.watch.name`).
    pub watch: Text,
    /// Whether the watch is urgent (passes quiet hours).
    #[serde(default)]
    pub urgent: bool,
    pub trigger: Trigger,
    pub deployment_id: Text,
    /// Site label (Camtrap DP `locationName`, e.g. "Swamp Corner").
    pub site_label: Text,
    pub latitude: f64,
    pub longitude: f64,
    /// `None` for camera notices (silence, silence-ended).
    pub scientific_name: Option<Text>,
    pub vernacular_name: Option<Text>,
    /// The triggering event's id (for a camera notice, the silence episode).
    pub event_id: Text,
    /// Start of the triggering event (for silence: the last sign of life).
    pub event_time: DateTime<Utc>,
    /// Decision time.
    pub at: DateTime<Utc>,
    pub disposition: Disposition,
    pub evidence: Evidence,
    /// Link to the image (`filePath` of the observation), if any.
    pub image_url: Option<Text>,
    /// Earlier events of the same camera and species folded into this one,
    /// oldest first.
    #[serde(default)]
    pub folded: Vec<FoldedEvent>,
}

impl Notice {
    /// The stable id (see [`NoticeId`]); derived, never stored apart.
    pub fn id(&self) -> NoticeId {
        NoticeId::derive(
            &self.subscriber_id,
            &self.watch,
            &self.deployment_id,
            self.scientific_name.as_deref().unwrap_or(""),
            self.trigger,
            &self.event_id,
        )
    }

    /// The cooldown / fold key of this notice.
    pub fn fold_key(&self) -> crate::notify::policy::FoldKey {
        crate::notify::policy::FoldKey {
            subscriber: self.subscriber_id.clone(),
            watch: self.watch.clone(),
            deployment: self.deployment_id.clone(),
            species: self.scientific_name.clone().unwrap_or_default(),
        }
    }

    /// The name a person reads: vernacular name, else scientific name, else
    /// "camera" for camera notices.
    pub fn species_label(&self) -> &str {
        self.vernacular_name
            .as_deref()
            .filter(|s| !s.trim().is_empty())
            .or(self.scientific_name.as_deref())
            .unwrap_or("camera")
    }

    /// The JSON object printed by `outrider replay` (one line per notice) and
    /// sent as the webhook body and the MQTT payload.
    ///
    /// Keys: `noticeID`, `subscriber`, `watch`, `trigger`, `urgent`,
    /// `deploymentID`, `locationName`, `latitude`, `longitude`,
    /// `scientificName` (null for camera notices), `vernacularName`,
    /// `eventID`, `eventStart`, `at` (RFC 3339 UTC, seconds), `disposition`,
    /// `evidence` (absent fields left out), `filePath` (null when none),
    /// `folded` (list of `{eventID, eventStart, count}`).
    pub fn replay_line(&self) -> Value {
        let folded: Vec<Value> = self
            .folded
            .iter()
            .map(|f| {
                json!({
                    "eventID": f.event_id,
                    "eventStart": rfc3339(f.event_time),
                    "count": f.count,
                })
            })
            .collect();
        json!({
            "noticeID": self.id().as_str(),
            "subscriber": self.subscriber_id,
            "watch": self.watch,
            "trigger": self.trigger.as_str(),
            "urgent": self.urgent,
            "deploymentID": self.deployment_id,
            "locationName": self.site_label,
            "latitude": self.latitude,
            "longitude": self.longitude,
            "scientificName": self.scientific_name,
            "vernacularName": self.vernacular_name,
            "eventID": self.event_id,
            "eventStart": rfc3339(self.event_time),
            "at": rfc3339(self.at),
            "disposition": self.disposition.as_str(),
            "evidence": evidence_json(&self.evidence),
            "filePath": self.image_url,
            "folded": folded,
        })
    }
}

/// RFC 3339 in UTC with a `Z` and whole seconds (sub-second parts are kept
/// when present).
pub fn rfc3339(t: DateTime<Utc>) -> String {
    t.to_rfc3339_opts(SecondsFormat::AutoSi, true)
}

fn evidence_json(e: &Evidence) -> Value {
    // Serialising a struct of numbers, strings and instants cannot fail; an
    // empty object is still a valid line if it ever did.
    serde_json::to_value(e).unwrap_or_else(|_| json!({}))
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use chrono::TimeZone;

    pub(crate) fn utc(y: i32, mo: u32, d: u32, h: u32, mi: u32) -> DateTime<Utc> {
        Utc.with_ymd_and_hms(y, mo, d, h, mi, 0).unwrap()
    }

    /// A presence notice in the invented district.
    pub(crate) fn sample() -> Notice {
        Notice {
            subscriber_id: "stonecroft".into(),
            subscriber_name: "Stonecroft".into(),
            watch: "dogs and foxes at night".into(),
            urgent: true,
            trigger: Trigger::Presence,
            deployment_id: "KB-07".into(),
            site_label: "Swamp Corner".into(),
            latitude: -31.62,
            longitude: 148.07,
            scientific_name: Some("Canis familiaris".into()),
            vernacular_name: Some("wild dog".into()),
            event_id: "KB-07/Canis familiaris/2025-07-14T16:14:00Z".into(),
            event_time: utc(2025, 7, 14, 16, 14),
            at: utc(2025, 7, 14, 16, 15),
            disposition: Disposition::Sent,
            evidence: Evidence {
                count: Some(1),
                distance_km: Some(2.3),
                rule: Some("stonecroft/dogs and foxes at night".into()),
                clock_time: Some(utc(2025, 7, 14, 16, 15)),
                ..Evidence::default()
            },
            image_url: Some("https://media.kellerby.example/kb07/0001.jpg".into()),
            folded: vec![],
        }
    }

    #[test]
    fn trigger_and_disposition_names() {
        // Names from DESIGN.md "Rules" (trigger kinds) and "Command line"
        // (dispositions sent, folded, deferred).
        let t: Vec<String> = Trigger::ALL
            .iter()
            .map(|t| {
                serde_json::to_value(t)
                    .unwrap()
                    .as_str()
                    .unwrap()
                    .to_owned()
            })
            .collect();
        assert_eq!(
            t,
            [
                "presence",
                "spike",
                "build-up",
                "first-seen",
                "silence",
                "silence-ended",
                "retraction"
            ]
        );
        for t in Trigger::ALL {
            assert_eq!(Trigger::parse(t.as_str()), Some(t));
            assert_eq!(serde_json::to_value(t).unwrap(), json!(t.as_str()));
        }
        assert_eq!(Trigger::parse("Presence"), None);
        assert_eq!(
            serde_json::to_value(Disposition::Sent).unwrap(),
            json!("sent")
        );
        assert_eq!(
            serde_json::to_value(Disposition::Folded).unwrap(),
            json!("folded")
        );
        assert_eq!(
            serde_json::to_value(Disposition::Deferred).unwrap(),
            json!("deferred")
        );
    }

    #[test]
    fn notice_id_matches_the_documented_recipe() {
        // Expected value computed outside Rust with Python 3 hashlib from the
        // recipe in the NoticeId docs / docs/notices.md:
        //   import hashlib, struct
        //   h = hashlib.sha256(b"outrider-notice-v1")
        //   for p in ["stonecroft", "dogs and foxes at night", "KB-07",
        //             "Canis familiaris", "presence",
        //             "KB-07/Canis familiaris/2025-07-14T16:14:00Z"]:
        //       b = p.encode(); h.update(struct.pack(">Q", len(b)) + b)
        //   h.hexdigest()[:32]
        assert_eq!(sample().id().as_str(), "2b65300baab149c9cfd5913a126e242d");
    }

    #[test]
    fn notice_id_is_stable_and_separates_every_field() {
        let a = sample();
        assert_eq!(a.id(), a.clone().id(), "same candidate, same id");
        // Disposition, decision time and evidence do not change the id: a
        // replay at another clock time names the same notice.
        let mut b = a.clone();
        b.at = utc(2025, 7, 15, 0, 0);
        b.disposition = Disposition::Folded;
        b.evidence = Evidence::default();
        assert_eq!(a.id(), b.id());

        let variants: Vec<Notice> = vec![
            Notice {
                subscriber_id: "wattle-downs".into(),
                ..a.clone()
            },
            Notice {
                watch: "pig build-up".into(),
                ..a.clone()
            },
            Notice {
                deployment_id: "KB-08".into(),
                ..a.clone()
            },
            Notice {
                scientific_name: Some("Vulpes vulpes".into()),
                ..a.clone()
            },
            Notice {
                trigger: Trigger::Retraction,
                ..a.clone()
            },
            Notice {
                event_id: "KB-07/Canis familiaris/2025-07-14T18:00:00Z".into(),
                ..a.clone()
            },
        ];
        for v in &variants {
            assert_ne!(v.id(), a.id(), "{v:?}");
        }
        // Length prefixes: moving a character across a field boundary gives
        // another id.
        let x = NoticeId::derive("ab", "c", "d", "e", Trigger::Presence, "f");
        let y = NoticeId::derive("a", "bc", "d", "e", Trigger::Presence, "f");
        assert_ne!(x, y);
        assert_eq!(x.as_str().len(), 32);
        assert!(x
            .as_str()
            .bytes()
            .all(|c| c.is_ascii_hexdigit() && !c.is_ascii_uppercase()));
    }

    #[test]
    fn replay_line_has_the_design_fields() {
        // Field list from DESIGN.md "Command line" (replay notice line).
        let line = sample().replay_line();
        assert_eq!(line["subscriber"], "stonecroft");
        assert_eq!(line["watch"], "dogs and foxes at night");
        assert_eq!(line["trigger"], "presence");
        assert_eq!(line["deploymentID"], "KB-07");
        assert_eq!(line["scientificName"], "Canis familiaris");
        // RFC 3339 UTC, written by hand from the sample's decision time.
        assert_eq!(line["at"], "2025-07-14T16:15:00Z");
        assert_eq!(line["eventStart"], "2025-07-14T16:14:00Z");
        assert_eq!(line["disposition"], "sent");
        assert_eq!(line["evidence"]["count"], 1);
        assert_eq!(line["evidence"]["distance_km"], 2.3);
        assert_eq!(line["evidence"]["clock_time"], "2025-07-14T16:15:00Z");
        // Fields that do not apply are left out, not null.
        let ev = line["evidence"].as_object().unwrap();
        for absent in [
            "p_value",
            "gamma_shape",
            "quiet_days",
            "silent_hours",
            "baseline_from",
        ] {
            assert!(!ev.contains_key(absent), "{absent} should be skipped");
        }
        assert_eq!(line["noticeID"], sample().id().as_str());
        assert_eq!(line["folded"], json!([]));
    }

    #[test]
    fn camera_notice_has_null_species_and_folded_list() {
        let mut n = sample();
        n.trigger = Trigger::Silence;
        n.scientific_name = None;
        n.vernacular_name = None;
        n.evidence = Evidence {
            silent_hours: Some(38.5),
            ..Evidence::default()
        };
        n.folded = vec![FoldedEvent {
            event_id: "e1".into(),
            event_time: utc(2025, 7, 14, 11, 40),
            count: 2,
        }];
        let line = n.replay_line();
        assert_eq!(line["scientificName"], Value::Null);
        assert_eq!(line["evidence"], json!({"silent_hours": 38.5}));
        assert_eq!(
            line["folded"],
            json!([{"eventID": "e1", "eventStart": "2025-07-14T11:40:00Z", "count": 2}])
        );
        assert_eq!(n.species_label(), "camera");
    }

    #[test]
    fn notice_round_trips_through_json() {
        // The outbox stores notices as JSON; a restart must read back the
        // same notice.
        let mut n = sample();
        n.evidence.p_value = Some(4.9e-4);
        n.evidence.baseline_from = Some(utc(2025, 6, 15, 14, 0));
        let text = serde_json::to_string(&n).unwrap();
        let back: Notice = serde_json::from_str(&text).unwrap();
        assert_eq!(back, n);
    }
}
