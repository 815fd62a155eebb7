//! Topic + payload bytes -> a validated [`Message`], or a [`Rejection`] with
//! a reason and a sentence saying what was wrong.
//!
//! Pure and total: arbitrary bytes never panic (a property test feeds it
//! random input). The time, the known deployments and the limits are passed
//! in. Field names and topics are DESIGN.md "Messages".

use crate::config::{looks_like_scientific_name, sites::parse_datetime, Species};
use crate::model::{
    ClassificationMethod, Correction, Heartbeat, Message, Observation, ObservationType,
    RejectReason as R, Rejection,
};
use chrono::{DateTime, Duration, Utc};
use serde::de::IgnoredAny;
use serde::Deserialize;
use std::collections::HashMap;

/// The message kind a topic names.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Kind {
    Observation,
    Heartbeat,
    Correction,
}

/// What decoding needs to know besides the bytes.
pub struct DecodeContext<'a> {
    pub topic_prefix: &'a str,
    /// deploymentID -> deploymentStart.
    pub deployments: &'a HashMap<String, DateTime<Utc>>,
    pub species: &'a Species,
    pub now: DateTime<Utc>,
    pub max_payload_bytes: usize,
    /// How far past `now` a timestamp may lie (camera clocks drift).
    pub future_tolerance: Duration,
}

/// Longest identifier or text field accepted, in bytes.
const MAX_TEXT: usize = 1024;

/// Splits `P/<deploymentID>/<kind>`.
pub fn parse_topic<'t>(topic: &'t str, prefix: &str) -> Option<(&'t str, Kind)> {
    let rest = topic.strip_prefix(prefix)?.strip_prefix('/')?;
    let (dep, kind) = rest.split_once('/')?;
    let kind = match kind {
        "observation" => Kind::Observation,
        "heartbeat" => Kind::Heartbeat,
        "correction" => Kind::Correction,
        _ => return None,
    };
    Some((dep, kind))
}

#[derive(Deserialize)]
struct RawObservation {
    #[serde(rename = "observationID")]
    observation_id: String,
    #[serde(rename = "deploymentID")]
    deployment_id: String,
    #[serde(rename = "eventStart")]
    event_start: String,
    #[serde(rename = "eventEnd", default)]
    event_end: Option<String>,
    #[serde(rename = "observationType")]
    observation_type: String,
    #[serde(rename = "scientificName", default)]
    scientific_name: Option<String>,
    #[serde(default)]
    count: Option<JsonNumber>,
    #[serde(rename = "classificationProbability", default)]
    classification_probability: Option<f64>,
    #[serde(rename = "classificationMethod", default)]
    classification_method: Option<String>,
    #[serde(rename = "mediaID", default)]
    media_id: Option<String>,
    #[serde(rename = "filePath", default)]
    file_path: Option<String>,
    #[serde(rename = "vernacularName", default)]
    vernacular_name: Option<String>,
    #[serde(rename = "lifeStage", default)]
    life_stage: Option<String>,
    #[serde(default)]
    sex: Option<String>,
    #[serde(default)]
    behavior: Option<String>,
}

#[derive(Deserialize)]
struct RawHeartbeat {
    #[serde(rename = "deploymentID")]
    deployment_id: String,
    timestamp: String,
    #[serde(rename = "batteryPercent", default)]
    battery_percent: Option<f64>,
    #[serde(rename = "signalDbm", default)]
    signal_dbm: Option<f64>,
    #[serde(rename = "imagesSinceLast", default)]
    images_since_last: Option<JsonNumber>,
}

#[derive(Deserialize)]
struct RawCorrection {
    #[serde(rename = "observationID")]
    observation_id: String,
    #[serde(rename = "deploymentID", default)]
    deployment_id: Option<String>,
    #[serde(rename = "scientificName", default)]
    scientific_name: Option<String>,
    #[serde(default)]
    count: Option<JsonNumber>,
    #[serde(rename = "observationType", default)]
    observation_type: Option<String>,
}

/// A JSON number where a whole number is wanted. JSON has one number type
/// (RFC 8259 §6), so `3`, `3.0` and `3e0` are the same count; `2.5`, `-1`
/// or `1e23` are numbers whose value is out of place (`invalid-value`),
/// not values of the wrong type. Only a non-number (`"3"`, `true`) is
/// `wrong-type`. (Integers beyond 64 bits arrive as floats from serde_json;
/// beyond f64's range serde_json itself refuses them as out of range.)
#[derive(Debug, Clone, Copy, PartialEq)]
enum JsonNumber {
    Int(i128),
    Float(f64),
}

impl<'de> Deserialize<'de> for JsonNumber {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V;
        impl serde::de::Visitor<'_> for V {
            type Value = JsonNumber;
            fn expecting(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
                f.write_str("a number")
            }
            fn visit_u64<E>(self, v: u64) -> Result<JsonNumber, E> {
                Ok(JsonNumber::Int(i128::from(v)))
            }
            fn visit_i64<E>(self, v: i64) -> Result<JsonNumber, E> {
                Ok(JsonNumber::Int(i128::from(v)))
            }
            fn visit_f64<E>(self, v: f64) -> Result<JsonNumber, E> {
                Ok(JsonNumber::Float(v))
            }
        }
        d.deserialize_any(V)
    }
}

impl std::fmt::Display for JsonNumber {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            JsonNumber::Int(i) => write!(f, "{i}"),
            JsonNumber::Float(x) => write!(f, "{x}"),
        }
    }
}

/// `n` as a whole number in `[min, max]`, or why not.
fn whole(field: &str, n: JsonNumber, min: u64, max: u64) -> Result<u64, Rejection> {
    let v = match n {
        JsonNumber::Int(i) => Some(i),
        // Exact: every f64 with no fraction below 2^63 is an integer.
        JsonNumber::Float(x) if x.fract() == 0.0 && x.abs() < 9.2e18 => Some(x as i128),
        JsonNumber::Float(_) => None,
    };
    match v {
        Some(v) if (i128::from(min)..=i128::from(max)).contains(&v) => Ok(v as u64),
        Some(_) => Err(Rejection::new(
            R::InvalidValue,
            format!("{field} {n} is outside {min} to {max}"),
        )),
        None => Err(Rejection::new(
            R::InvalidValue,
            format!("{field} {n} is not a whole number"),
        )),
    }
}

/// Decodes one MQTT message.
pub fn decode(topic: &str, payload: &[u8], ctx: &DecodeContext<'_>) -> Result<Message, Rejection> {
    let Some((topic_dep, kind)) = parse_topic(topic, ctx.topic_prefix) else {
        return Err(Rejection::new(
            R::UnknownTopic,
            format!(
                "topic `{}` is not <prefix>/<deploymentID>/observation|heartbeat|correction",
                printable(topic)
            ),
        ));
    };
    if payload.len() > ctx.max_payload_bytes {
        return Err(Rejection::new(
            R::PayloadTooLarge,
            format!(
                "payload is {} bytes; the limit is {}",
                payload.len(),
                ctx.max_payload_bytes
            ),
        ));
    }
    let text = std::str::from_utf8(payload).map_err(|e| {
        Rejection::new(
            R::InvalidUtf8,
            format!(
                "payload is not UTF-8 (first bad byte at offset {})",
                e.valid_up_to()
            ),
        )
    })?;
    if let Some(depth) = too_deep(payload) {
        return Err(Rejection::new(
            R::TooDeep,
            format!("JSON nests deeper than {MAX_DEPTH} levels (at least {depth})"),
        ));
    }
    if !text.trim_start().starts_with('{') {
        return Err(match serde_json::from_str::<IgnoredAny>(text) {
            Ok(_) => Rejection::new(R::NotAnObject, "payload is JSON but not an object"),
            Err(e) => json_rejection(&e),
        });
    }
    match kind {
        Kind::Observation => {
            let raw: RawObservation = serde_json::from_str(text).map_err(|e| json_rejection(&e))?;
            observation(raw, topic_dep, ctx).map(Message::Observation)
        }
        Kind::Heartbeat => {
            let raw: RawHeartbeat = serde_json::from_str(text).map_err(|e| json_rejection(&e))?;
            heartbeat(raw, topic_dep, ctx).map(Message::Heartbeat)
        }
        Kind::Correction => {
            let raw: RawCorrection = serde_json::from_str(text).map_err(|e| json_rejection(&e))?;
            correction(raw, topic_dep, ctx).map(Message::Correction)
        }
    }
}

/// Deepest JSON nesting accepted. Real messages nest two levels at most.
pub const MAX_DEPTH: usize = 32;

/// The nesting depth, if it exceeds [`MAX_DEPTH`] (a scan that skips strings).
fn too_deep(bytes: &[u8]) -> Option<usize> {
    let (mut depth, mut in_string, mut escaped) = (0usize, false, false);
    for &b in bytes {
        if in_string {
            match (escaped, b) {
                (true, _) => escaped = false,
                (false, b'\\') => escaped = true,
                (false, b'"') => in_string = false,
                _ => {}
            }
            continue;
        }
        match b {
            b'"' => in_string = true,
            b'{' | b'[' => {
                depth += 1;
                if depth > MAX_DEPTH {
                    return Some(depth);
                }
            }
            b'}' | b']' => depth = depth.saturating_sub(1),
            _ => {}
        }
    }
    None
}

/// Maps a serde_json error onto a reason. serde_json's messages are stable
/// text ("missing field", "duplicate field", "invalid type", ...).
fn json_rejection(e: &serde_json::Error) -> Rejection {
    let msg = e.to_string();
    let reason = if msg.starts_with("missing field") {
        R::MissingField
    } else if msg.starts_with("duplicate field") {
        R::DuplicateKey
    } else if msg.starts_with("invalid type") {
        R::WrongType
    } else if msg.starts_with("invalid value") || msg.starts_with("number out of range") {
        R::InvalidValue
    } else if msg.starts_with("recursion limit exceeded") {
        R::TooDeep
    } else {
        R::InvalidJson
    };
    Rejection::new(reason, msg)
}

/// Text safe to put in a log line or a reason: control characters escaped,
/// cut to a sensible length.
pub fn printable(s: &str) -> String {
    let mut out: String = s.chars().take(120).flat_map(char::escape_debug).collect();
    if s.chars().count() > 120 {
        out.push('…');
    }
    out
}

fn check_text(field: &str, value: &str) -> Result<(), Rejection> {
    if value.len() > MAX_TEXT {
        return Err(Rejection::new(
            R::InvalidValue,
            format!("{field} is {} bytes long; at most {MAX_TEXT}", value.len()),
        ));
    }
    if value.chars().any(char::is_control) {
        return Err(Rejection::new(
            R::InvalidValue,
            format!("{field} holds control characters: `{}`", printable(value)),
        ));
    }
    if value.chars().any(is_bidi_control) {
        return Err(Rejection::new(
            R::InvalidValue,
            format!(
                "{field} holds a bidirectional text control, which can make text read differently from what it holds: `{}`",
                printable(value)
            ),
        ));
    }
    Ok(())
}

/// The explicit directional embeddings, overrides and isolates of Unicode's
/// bidirectional algorithm (UAX #9: U+202A..U+202E, U+2066..U+2069): no
/// label or identifier needs them, and they can reorder what a person
/// sees in a log line or an email ("Trojan Source", CVE-2021-42574, from
/// memory). The implicit marks (U+200E, U+200F) stay allowed.
fn is_bidi_control(c: char) -> bool {
    matches!(c, '\u{202A}'..='\u{202E}' | '\u{2066}'..='\u{2069}')
}

fn check_opt(field: &str, value: Option<String>) -> Result<Option<String>, Rejection> {
    match value {
        Some(v) if v.is_empty() => Ok(None),
        Some(v) => check_text(field, &v).map(|_| Some(v)),
        None => Ok(None),
    }
}

/// The deployment named by topic and payload, known and consistent.
fn deployment<'c>(
    topic_dep: &str,
    payload_dep: Option<&str>,
    ctx: &'c DecodeContext<'_>,
) -> Result<(&'c String, DateTime<Utc>), Rejection> {
    if let Some(p) = payload_dep {
        if p != topic_dep {
            return Err(Rejection::new(
                R::DeploymentMismatch,
                format!(
                    "payload deploymentID `{}` differs from the topic's `{}`",
                    printable(p),
                    printable(topic_dep)
                ),
            ));
        }
    }
    match ctx.deployments.get_key_value(topic_dep) {
        Some((k, start)) => Ok((k, *start)),
        None => Err(Rejection::new(
            R::UnknownDeployment,
            format!(
                "deploymentID `{}` is not in the sites file",
                printable(topic_dep)
            ),
        )),
    }
}

fn timestamp(
    field: &str,
    raw: &str,
    start: DateTime<Utc>,
    ctx: &DecodeContext<'_>,
) -> Result<DateTime<Utc>, Rejection> {
    check_text(field, raw)?;
    let t = parse_datetime(raw).ok_or_else(|| {
        Rejection::new(
            R::BadTimestamp,
            format!(
                "{field} `{}` is not RFC 3339 with an offset (e.g. 2026-07-14T02:13:00+10:00)",
                printable(raw)
            ),
        )
    })?;
    let earliest = start - Duration::days(1);
    let latest = ctx.now + ctx.future_tolerance;
    if t < earliest {
        return Err(Rejection::new(
            R::TimestampOutOfRange,
            format!(
                "{field} {} is more than a day before the deployment started ({})",
                t.to_rfc3339(),
                start.to_rfc3339()
            ),
        ));
    }
    if t > latest {
        return Err(Rejection::new(
            R::TimestampOutOfRange,
            format!(
                "{field} {} is in the future (received at {}); is the camera's clock right?",
                t.to_rfc3339(),
                ctx.now.to_rfc3339()
            ),
        ));
    }
    Ok(t)
}

fn count(field: &str, v: JsonNumber) -> Result<u32, Rejection> {
    whole(field, v, 1, 10_000).map(|c| c as u32)
}

fn species_name(raw: &str, ctx: &DecodeContext<'_>) -> Result<String, Rejection> {
    check_text("scientificName", raw)?;
    let name = ctx.species.resolve(raw.trim());
    if looks_like_scientific_name(name) {
        Ok(name.to_string())
    } else {
        Err(Rejection::new(R::InvalidValue, format!("scientificName `{}` is not a scientific name (Genus species); add an alias under [species.aliases] if the classifier uses this label", printable(raw))))
    }
}

fn observation(
    raw: RawObservation,
    topic_dep: &str,
    ctx: &DecodeContext<'_>,
) -> Result<Observation, Rejection> {
    check_text("observationID", &raw.observation_id)?;
    if raw.observation_id.trim().is_empty() {
        return Err(Rejection::new(R::InvalidValue, "observationID is empty"));
    }
    let (dep, start) = deployment(topic_dep, Some(&raw.deployment_id), ctx)?;
    let observation_type = ObservationType::parse(&raw.observation_type).ok_or_else(|| {
        Rejection::new(R::InvalidValue, format!("observationType `{}` is not one of animal, human, vehicle, blank, unknown, unclassified", printable(&raw.observation_type)))
    })?;
    let event_start = timestamp("eventStart", &raw.event_start, start, ctx)?;
    let event_end = match raw.event_end.as_deref() {
        None | Some("") => None,
        Some(e) => {
            let end = timestamp("eventEnd", e, start, ctx)?;
            if end < event_start {
                return Err(Rejection::new(
                    R::InvalidValue,
                    "eventEnd is before eventStart",
                ));
            }
            Some(end)
        }
    };
    let scientific_name = match (observation_type, raw.scientific_name.as_deref()) {
        (ObservationType::Animal, None | Some("")) => {
            return Err(Rejection::new(
                R::MissingField,
                "an animal observation needs scientificName",
            ));
        }
        (ObservationType::Animal, Some(n)) => Some(species_name(n, ctx)?),
        (t, _) if t.is_private() => None,
        (_, Some(n)) if !n.is_empty() => Some(species_name(n, ctx)?),
        _ => None,
    };
    let count = match raw.count {
        None => 1,
        Some(c) => count("count", c)?,
    };
    let classification_probability = match raw.classification_probability {
        Some(p) if !(0.0..=1.0).contains(&p) => {
            return Err(Rejection::new(
                R::InvalidValue,
                format!("classificationProbability {p} is outside 0 to 1"),
            ));
        }
        p => p,
    };
    let classification_method = match raw.classification_method.as_deref() {
        None | Some("") => None,
        Some("machine") => Some(ClassificationMethod::Machine),
        Some("human") => Some(ClassificationMethod::Human),
        Some(other) => {
            return Err(Rejection::new(
                R::InvalidValue,
                format!(
                    "classificationMethod `{}` is not machine or human",
                    printable(other)
                ),
            ));
        }
    };
    let obs = Observation {
        observation_id: raw.observation_id,
        deployment_id: dep.clone(),
        event_start,
        event_end,
        observation_type,
        scientific_name,
        count,
        classification_probability,
        classification_method,
        media_id: check_opt("mediaID", raw.media_id)?,
        file_path: check_opt("filePath", raw.file_path)?,
        vernacular_name: check_opt("vernacularName", raw.vernacular_name)?,
        life_stage: check_opt("lifeStage", raw.life_stage)?,
        sex: check_opt("sex", raw.sex)?,
        behavior: check_opt("behavior", raw.behavior)?,
    };
    Ok(obs.redacted())
}

fn heartbeat(
    raw: RawHeartbeat,
    topic_dep: &str,
    ctx: &DecodeContext<'_>,
) -> Result<Heartbeat, Rejection> {
    let (dep, start) = deployment(topic_dep, Some(&raw.deployment_id), ctx)?;
    let ts = timestamp("timestamp", &raw.timestamp, start, ctx)?;
    if let Some(b) = raw.battery_percent {
        if !(0.0..=100.0).contains(&b) {
            return Err(Rejection::new(
                R::InvalidValue,
                format!("batteryPercent {b} is outside 0 to 100"),
            ));
        }
    }
    if let Some(s) = raw.signal_dbm {
        if !(-200.0..=50.0).contains(&s) {
            return Err(Rejection::new(
                R::InvalidValue,
                format!("signalDbm {s} is outside -200 to 50"),
            ));
        }
    }
    Ok(Heartbeat {
        deployment_id: dep.clone(),
        timestamp: ts,
        battery_percent: raw.battery_percent,
        signal_dbm: raw.signal_dbm,
        images_since_last: raw
            .images_since_last
            .map(|n| whole("imagesSinceLast", n, 0, u64::from(u32::MAX)))
            .transpose()?,
    })
}

fn correction(
    raw: RawCorrection,
    topic_dep: &str,
    ctx: &DecodeContext<'_>,
) -> Result<Correction, Rejection> {
    check_text("observationID", &raw.observation_id)?;
    if raw.observation_id.trim().is_empty() {
        return Err(Rejection::new(R::InvalidValue, "observationID is empty"));
    }
    let (dep, _) = deployment(topic_dep, raw.deployment_id.as_deref(), ctx)?;
    let observation_type = match raw.observation_type.as_deref() {
        None | Some("") => None,
        Some(t) => Some(ObservationType::parse(t).ok_or_else(|| {
            Rejection::new(
                R::InvalidValue,
                format!(
                    "observationType `{}` is not a Camtrap DP observation type",
                    printable(t)
                ),
            )
        })?),
    };
    let scientific_name = match raw.scientific_name.as_deref() {
        None | Some("") => None,
        Some(n) => Some(species_name(n, ctx)?),
    };
    let count = raw.count.map(|c| count("count", c)).transpose()?;
    if scientific_name.is_none() && count.is_none() && observation_type.is_none() {
        return Err(Rejection::new(
            R::MissingField,
            "a correction needs scientificName, count or observationType",
        ));
    }
    Ok(Correction {
        observation_id: raw.observation_id,
        deployment_id: dep.clone(),
        scientific_name,
        count,
        observation_type,
    })
}

#[cfg(test)]
#[path = "decode_tests.rs"]
mod tests;
