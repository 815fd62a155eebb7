//! The fuzz targets, as plain functions of a byte string, so that the
//! libFuzzer entries (`fuzz_targets/`) and the stable runner
//! (`src/bin/stable.rs`) run the same code.
//!
//! Each target feeds the bytes to one of outrider's parsers and checks,
//! beyond "does not panic", what the parser promises about what it
//! accepts: a decoded message is within the limits docs/ingest.md lists,
//! a refusal carries a reason and a detail, a config or sites error points
//! at a line of the input. A broken promise panics, which both runners
//! report as a crash with the input that caused it. Each returns a short
//! summary of the parser's answer (the stable runner keeps inputs that give
//! a new one).

use chrono::{DateTime, Duration, TimeZone, Utc};
use outrider::config::{parse, sites::parse_sites, Files, Species};
use outrider::ingest::decode::{decode as decode_message, DecodeContext};
use outrider::model::{Message, ObservationType};
use std::collections::HashMap;
use std::path::Path;

/// A fuzz target: bytes in, a short summary of the parser's answer out.
pub type Target = fn(&[u8]) -> String;

/// The targets by name, for the stable runner.
pub const TARGETS: &[(&str, Target)] = &[
    ("decode", decode),
    ("config", config),
    ("geojson", geojson),
    ("sites", sites),
];

/// A parser's message reduced to its kind: quoted values (between
/// backticks) and digits dropped, cut to 40 characters, so "payload is
/// 70001 bytes" and "payload is 70002 bytes" count as one outcome.
fn shape(s: &str) -> String {
    let mut out = String::new();
    let mut quoted = false;
    for c in s.chars() {
        match c {
            '`' => quoted = !quoted,
            _ if quoted || c.is_ascii_digit() => {}
            _ => out.push(c),
        }
        if out.len() >= 40 {
            break;
        }
    }
    out
}

fn now() -> DateTime<Utc> {
    Utc.with_ymd_and_hms(2026, 7, 14, 3, 0, 0).unwrap()
}

fn no_controls(field: &str, s: &str) {
    assert!(
        !s.chars().any(|c| c.is_control()),
        "{field} holds a control character: {s:?}"
    );
}

/// MQTT decoding: the first byte picks the topic, the rest is the payload.
pub fn decode(data: &[u8]) -> String {
    let Some((&pick, payload)) = data.split_first() else {
        return "empty".into();
    };
    let topic = match pick % 6 {
        0 => "outrider/KB-01/observation",
        1 => "outrider/KB-01/heartbeat",
        2 => "outrider/KB-01/correction",
        3 => "outrider/KB-99/observation",
        4 => "outrider//observation",
        _ => "outrider/KB-01/status",
    };
    let start = Utc.with_ymd_and_hms(2026, 1, 15, 0, 0, 0).unwrap();
    let mut deployments = HashMap::new();
    deployments.insert("KB-01".to_string(), start);
    let mut species = Species::default();
    species
        .aliases
        .insert("wild dog".into(), "Canis familiaris".into());
    let ctx = DecodeContext {
        topic_prefix: "outrider",
        deployments: &deployments,
        species: &species,
        now: now(),
        max_payload_bytes: 64 * 1024,
        future_tolerance: Duration::minutes(10),
    };
    let earliest = start - Duration::days(1);
    let latest = now() + Duration::minutes(10);
    let result = decode_message(topic, payload, &ctx);
    let outcome = match &result {
        Ok(Message::Observation(o)) => format!("observation {:?}", o.observation_type),
        Ok(Message::Heartbeat(_)) => "heartbeat".into(),
        Ok(Message::Correction(_)) => "correction".into(),
        Err(r) => format!("{} {}", r.reason, shape(&r.detail)),
    };
    match result {
        Ok(Message::Observation(o)) => {
            assert_eq!(o.deployment_id, "KB-01");
            assert!(!o.observation_id.trim().is_empty());
            no_controls("observationID", &o.observation_id);
            assert!((1..=10_000).contains(&o.count), "count {}", o.count);
            if let Some(p) = o.classification_probability {
                assert!((0.0..=1.0).contains(&p), "probability {p}");
            }
            assert!(o.event_start >= earliest && o.event_start <= latest);
            if let Some(e) = o.event_end {
                assert!(e >= o.event_start && e <= latest);
            }
            if o.observation_type == ObservationType::Animal {
                let name = o.scientific_name.as_deref().expect("an animal has a name");
                assert!(
                    outrider::config::looks_like_scientific_name(name),
                    "{name:?}"
                );
            }
            if o.observation_type.is_private() {
                assert!(o.scientific_name.is_none() && o.file_path.is_none());
            }
            for (f, v) in [
                ("mediaID", &o.media_id),
                ("filePath", &o.file_path),
                ("vernacularName", &o.vernacular_name),
                ("behavior", &o.behavior),
            ] {
                if let Some(v) = v {
                    no_controls(f, v);
                }
            }
        }
        Ok(Message::Heartbeat(h)) => {
            assert_eq!(h.deployment_id, "KB-01");
            assert!(h.timestamp >= earliest && h.timestamp <= latest);
            if let Some(b) = h.battery_percent {
                assert!((0.0..=100.0).contains(&b));
            }
        }
        Ok(Message::Correction(c)) => {
            assert_eq!(c.deployment_id, "KB-01");
            assert!(!c.observation_id.trim().is_empty());
            assert!(
                c.scientific_name.is_some() || c.count.is_some() || c.observation_type.is_some()
            );
        }
        Err(r) => {
            assert!(!r.detail.is_empty(), "a refusal says why");
            // What is stored and reported of it stays within the limit and
            // the report is JSON.
            let kept = outrider::pipeline::kept_payload(payload, 64 * 1024);
            assert!(kept.len() <= 64 * 1024);
            let report = outrider::pipeline::rejection_report(topic, payload, 64 * 1024, &r);
            let v: serde_json::Value = serde_json::from_slice(&report).expect("report is JSON");
            assert_eq!(v["reason"], r.reason.as_str());
        }
    }
    outcome
}

const SITES: &str = "deploymentID,latitude,longitude,deploymentStart\nKB-01,-31.49,147.97,2026-01-15T09:00:00+11:00\nKB-02,-31.49,148.05,2026-01-15T09:00:00+11:00\n";
const AREA: &str = r#"{"type":"Polygon","coordinates":[[[148.0,-31.5],[148.1,-31.5],[148.1,-31.6],[148.0,-31.6],[148.0,-31.5]]]}"#;

/// Lines in `text`, counting a last line without a newline.
fn lines(text: &str) -> usize {
    text.lines().count().max(1) + 1
}

/// The TOML config: every error points at a line of the input (or at line
/// 0 for the file as a whole) and says something.
pub fn config(data: &[u8]) -> String {
    let text = String::from_utf8_lossy(data);
    let files = Files {
        read: &|p: &Path| {
            if p.extension().is_some_and(|x| x == "geojson") {
                Ok(AREA.to_string())
            } else if p.ends_with("sites.csv") {
                Ok(SITES.to_string())
            } else {
                Err(std::io::Error::new(
                    std::io::ErrorKind::NotFound,
                    "no such file",
                ))
            }
        },
        env: &|name: &str| (name == "FUZZ_SECRET").then(|| "s3cret".to_string()),
    };
    let path = Path::new("/etc/outrider/outrider.toml");
    match parse(path, &text, &[], &files) {
        Ok(cfg) => {
            assert!(cfg.delivery.retry_max_seconds >= cfg.delivery.retry_first_seconds);
            assert!(!cfg.sites.sites.is_empty(), "a valid config has its sites");
            // Secrets never show in the Debug form.
            assert!(!format!("{cfg:?}").contains("s3cret"));
            format!("ok {} subscribers", cfg.subscribers.len().min(3))
        }
        Err(errors) => {
            assert!(!errors.0.is_empty());
            for e in &errors.0 {
                assert!(!e.message.is_empty());
                if e.file == path {
                    assert!(
                        e.line <= lines(&text),
                        "line {} of {}",
                        e.line,
                        lines(&text)
                    );
                }
            }
            let _ = errors.to_string();
            let first = &errors.0[0];
            format!("{} {}", shape(&first.key), shape(&first.message))
        }
    }
}

/// GeoJSON areas: what is accepted is closed rings of finite positions on
/// the globe.
pub fn geojson(data: &[u8]) -> String {
    let Ok(text) = std::str::from_utf8(data) else {
        return "not utf-8".into();
    };
    match outrider::geo::geojson::parse_area_geojson(text) {
        Ok(mp) => {
            assert!(!mp.0.is_empty());
            for poly in &mp.0 {
                for ring in std::iter::once(poly.exterior()).chain(poly.interiors()) {
                    assert!(ring.0.len() >= 4, "a ring has at least 4 positions");
                    assert_eq!(ring.0.first(), ring.0.last(), "rings are closed");
                    for c in &ring.0 {
                        assert!(
                            c.x.is_finite() && (-180.0..=180.0).contains(&c.x),
                            "lon {}",
                            c.x
                        );
                        assert!(
                            c.y.is_finite() && (-90.0..=90.0).contains(&c.y),
                            "lat {}",
                            c.y
                        );
                    }
                }
            }
            format!("ok {} polygons", mp.0.len().min(3))
        }
        Err(e) => {
            assert!(!e.to_string().is_empty());
            e.hint().to_string()
        }
    }
}

/// The sites CSV: accepted sites are on the globe with valid ids and an
/// end after the start; every error names a line of the file.
pub fn sites(data: &[u8]) -> String {
    let text = String::from_utf8_lossy(data);
    let file = Path::new("/etc/outrider/sites.csv");
    match parse_sites(file, &text) {
        Ok(sites) => {
            for s in &sites {
                assert!(outrider::config::sites::valid_id(&s.deployment_id));
                assert!((-90.0..=90.0).contains(&s.latitude), "lat {}", s.latitude);
                assert!(
                    (-180.0..=180.0).contains(&s.longitude),
                    "lon {}",
                    s.longitude
                );
                if let Some(end) = s.deployment_end {
                    assert!(end >= s.deployment_start);
                }
            }
            format!("ok {} sites", sites.len().min(3))
        }
        Err(errors) => {
            assert!(!errors.is_empty());
            for e in &errors {
                assert!(!e.message.is_empty());
                assert!(
                    e.line <= lines(&text),
                    "line {} of {}",
                    e.line,
                    lines(&text)
                );
            }
            shape(&errors[0].message)
        }
    }
}
