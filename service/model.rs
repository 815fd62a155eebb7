//! Plain data shared by every layer: identifiers, the three message kinds
//! (observation, heartbeat, correction) and the reasons a message is refused.
//!
//! Nothing here does I/O. Field names follow Camtrap DP / Darwin Core where a
//! term exists (`observationID`, `deploymentID`, `eventStart`,
//! `scientificName`, `classificationProbability`, ...).

use chrono::{DateTime, Utc};
use serde::Serialize;
use std::fmt;

/// What the classifier saw (Camtrap DP `observationType`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum ObservationType {
    Animal,
    Human,
    Vehicle,
    Blank,
    Unknown,
    Unclassified,
}

impl ObservationType {
    pub const ALL: [ObservationType; 6] = [
        Self::Animal,
        Self::Human,
        Self::Vehicle,
        Self::Blank,
        Self::Unknown,
        Self::Unclassified,
    ];

    pub fn as_str(self) -> &'static str {
        match self {
            Self::Animal => "animal",
            Self::Human => "human",
            Self::Vehicle => "vehicle",
            Self::Blank => "blank",
            Self::Unknown => "unknown",
            Self::Unclassified => "unclassified",
        }
    }

    pub fn parse(s: &str) -> Option<Self> {
        Self::ALL.into_iter().find(|t| t.as_str() == s)
    }

    /// People on the land: only the fact that one arrived is kept.
    pub fn is_private(self) -> bool {
        matches!(self, Self::Human | Self::Vehicle)
    }
}

impl fmt::Display for ObservationType {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// Who or what labelled the observation (Camtrap DP `classificationMethod`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum ClassificationMethod {
    Machine,
    Human,
}

/// One classified detection, validated.
///
/// For `human` and `vehicle` observations every optional field is `None`
/// (see [`Observation::redacted`]): the store keeps only time, deployment and
/// type.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Observation {
    pub observation_id: String,
    pub deployment_id: String,
    pub event_start: DateTime<Utc>,
    pub event_end: Option<DateTime<Utc>>,
    pub observation_type: ObservationType,
    /// Present for `animal` (after alias resolution), absent otherwise.
    pub scientific_name: Option<String>,
    /// Number of individuals, at least 1.
    pub count: u32,
    pub classification_probability: Option<f64>,
    pub classification_method: Option<ClassificationMethod>,
    pub media_id: Option<String>,
    pub file_path: Option<String>,
    pub vernacular_name: Option<String>,
    pub life_stage: Option<String>,
    pub sex: Option<String>,
    pub behavior: Option<String>,
}

impl Observation {
    /// The privacy rule: a human or vehicle observation keeps only its
    /// identity, deployment, time and type.
    pub fn redacted(mut self) -> Self {
        if self.observation_type.is_private() {
            self.event_end = None;
            self.scientific_name = None;
            self.count = 1;
            self.classification_probability = None;
            self.classification_method = None;
            self.media_id = None;
            self.file_path = None;
            self.vernacular_name = None;
            self.life_stage = None;
            self.sex = None;
            self.behavior = None;
        }
        self
    }
}

/// A sign of life from a camera.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Heartbeat {
    pub deployment_id: String,
    pub timestamp: DateTime<Utc>,
    pub battery_percent: Option<f64>,
    pub signal_dbm: Option<f64>,
    pub images_since_last: Option<u64>,
}

/// A person re-labelled an observation. `observation_type = blank` retracts it.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Correction {
    pub observation_id: String,
    pub deployment_id: String,
    pub scientific_name: Option<String>,
    pub count: Option<u32>,
    pub observation_type: Option<ObservationType>,
}

/// A decoded, validated message.
#[derive(Debug, Clone, PartialEq)]
pub enum Message {
    Observation(Observation),
    Heartbeat(Heartbeat),
    Correction(Correction),
}

/// Why a message was refused. The kebab-case name is what `status`,
/// `_rejected` and metrics show; the list is part of the interface.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum RejectReason {
    /// Over the payload limit (64 KiB).
    PayloadTooLarge,
    /// Not valid UTF-8.
    InvalidUtf8,
    /// Not parseable JSON (includes `NaN`, trailing garbage, empty payload).
    InvalidJson,
    /// Nesting deeper than the decoder accepts.
    TooDeep,
    /// JSON, but not an object.
    NotAnObject,
    /// A key appears twice.
    DuplicateKey,
    /// A required field is missing.
    MissingField,
    /// A field has the wrong JSON type.
    WrongType,
    /// A field has the right type but an impossible value.
    InvalidValue,
    /// A timestamp that is not RFC 3339 with an offset.
    BadTimestamp,
    /// A timestamp before the deployment started or too far in the future.
    TimestampOutOfRange,
    /// The deploymentID is not in the sites file.
    UnknownDeployment,
    /// The payload's deploymentID differs from the topic's.
    DeploymentMismatch,
    /// The topic is not one outrider reads.
    UnknownTopic,
    /// Replay: a correction that cannot be placed in time. (The daemon keeps
    /// a correction of an observation not seen yet and applies it later.)
    UnknownObservation,
}

impl RejectReason {
    pub fn as_str(self) -> &'static str {
        match self {
            Self::PayloadTooLarge => "payload-too-large",
            Self::InvalidUtf8 => "invalid-utf8",
            Self::InvalidJson => "invalid-json",
            Self::TooDeep => "too-deep",
            Self::NotAnObject => "not-an-object",
            Self::DuplicateKey => "duplicate-key",
            Self::MissingField => "missing-field",
            Self::WrongType => "wrong-type",
            Self::InvalidValue => "invalid-value",
            Self::BadTimestamp => "bad-timestamp",
            Self::TimestampOutOfRange => "timestamp-out-of-range",
            Self::UnknownDeployment => "unknown-deployment",
            Self::DeploymentMismatch => "deployment-mismatch",
            Self::UnknownTopic => "unknown-topic",
            Self::UnknownObservation => "unknown-observation",
        }
    }
}

impl fmt::Display for RejectReason {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// A refused message: its reason and a plain sentence saying what was wrong.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Rejection {
    pub reason: RejectReason,
    pub detail: String,
}

impl Rejection {
    pub fn new(reason: RejectReason, detail: impl Into<String>) -> Self {
        Self {
            reason,
            detail: detail.into(),
        }
    }
}

impl fmt::Display for Rejection {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}: {}", self.reason, self.detail)
    }
}
