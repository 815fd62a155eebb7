//! The hostile corpus (`tests/data/hostile/`, 100+ cases): malformed and
//! hostile messages (broken JSON, deep nesting, huge numbers, NaN, wrong
//! types, a 10 MiB payload, invalid UTF-8, control and bidirectional
//! characters, timestamps far ahead or behind, unknown deployments, a
//! deploymentID that differs from the topic's, duplicate keys, ...),
//! published by an independent client (paho-mqtt) through Mosquitto to a
//! running daemon. Each must be rejected with the reason `cases.toml` gives
//! it and kept in the `rejected` table; the daemon must keep running and
//! take a good message afterwards; the counts must match.

use crate::util::*;
use chrono::{DateTime, Duration, Utc};
use outrider::clock::{Clock, SystemClock};
use std::collections::BTreeMap;

#[derive(serde::Deserialize)]
struct Corpus {
    case: Vec<Case>,
}

#[derive(serde::Deserialize)]
struct Case {
    name: String,
    topic: String,
    file: String,
    reason: String,
    #[serde(default)]
    pad_to_bytes: Option<usize>,
    #[allow(dead_code)]
    why: String,
}

/// A stored rejection: reason, detail, payload size.
type Stored = (String, String, i64);

fn corpus_dir() -> std::path::PathBuf {
    repo().join("tests/data/hostile")
}

fn cases() -> Vec<Case> {
    let text = std::fs::read_to_string(corpus_dir().join("cases.toml")).unwrap();
    toml::from_str::<Corpus>(&text).unwrap().case
}

/// `${NOW}` / `${NOW-2h}` / `${NOW+15m}` / `${NOW+2d}` -> RFC 3339 (README.md).
fn fill_times(bytes: &[u8], now: DateTime<Utc>) -> Vec<u8> {
    let mut out = Vec::with_capacity(bytes.len());
    let mut i = 0;
    while i < bytes.len() {
        if bytes[i..].starts_with(b"${NOW") {
            let end = i + bytes[i..].iter().position(|&b| b == b'}').unwrap();
            let spec = std::str::from_utf8(&bytes[i + 5..end]).unwrap();
            let t = if spec.is_empty() {
                now
            } else {
                let (sign, rest) = spec.split_at(1);
                let (num, unit) = rest.split_at(rest.len() - 1);
                let n: i64 = num.parse().unwrap();
                let d = match unit {
                    "m" => Duration::minutes(n),
                    "h" => Duration::hours(n),
                    "d" => Duration::days(n),
                    u => panic!("unit {u}"),
                };
                if sign == "-" {
                    now - d
                } else {
                    now + d
                }
            };
            out.extend_from_slice(
                t.to_rfc3339_opts(chrono::SecondsFormat::Secs, true)
                    .as_bytes(),
            );
            i = end + 1;
        } else {
            out.push(bytes[i]);
            i += 1;
        }
    }
    out
}

fn payload(c: &Case, now: DateTime<Utc>) -> Vec<u8> {
    let raw = std::fs::read(corpus_dir().join(&c.file)).unwrap();
    let mut p = fill_times(&raw, now);
    if let Some(size) = c.pad_to_bytes {
        let at = p
            .windows(3)
            .position(|w| w == b"PAD")
            .expect("PAD in a padded case");
        let fill = size - (p.len() - 3);
        p.splice(at..at + 3, std::iter::repeat_n(b'x', fill));
        assert_eq!(p.len(), size);
    }
    p
}

/// What the store keeps of a rejected payload: at most the 64 KiB limit
/// (docs/ingest.md; no case here is a person or vehicle).
fn kept(p: &[u8]) -> Vec<u8> {
    p[..p.len().min(64 * 1024)].to_vec()
}

#[test]
fn every_hostile_message_is_rejected_with_its_reason_and_kept() {
    let cases = cases();
    assert!(cases.len() >= 60, "at least 60 cases, got {}", cases.len());
    let now = SystemClock.now();
    let mut msgs: Vec<Msg> = cases
        .iter()
        .map(|c| Msg {
            topic: c.topic.clone(),
            payload: payload(c, now),
        })
        .collect();
    let mut seen = BTreeMap::new();
    for (c, m) in cases.iter().zip(&msgs) {
        if let Some(other) = seen.insert((m.topic.clone(), kept(&m.payload)), &c.name) {
            panic!(
                "cases {other} and {} have the same topic and payload",
                c.name
            );
        }
    }
    // A good observation last: the daemon is still there and still takes them.
    let good = serde_json::json!({"observationID": "h-still-alive", "deploymentID": "KB-01", "eventStart": (now - Duration::hours(1)).to_rfc3339(), "observationType": "animal", "scientificName": "Vulpes vulpes"});
    msgs.push(Msg {
        topic: "outrider/KB-01/observation".into(),
        payload: good.to_string().into_bytes(),
    });

    let dir = tempfile::tempdir().unwrap();
    let mosquitto = Mosquitto::start(dir.path());
    let cfg = write_config(dir.path(), mosquitto.port, false, "");
    let mut daemon = Daemon::start(&cfg);
    let file = dir.path().join("hostile.jsonl");
    write_corpus(&file, &msgs);
    let result = publish_corpus(mosquitto.port, &file, cases.len(), "hostilepublisher");
    assert_eq!(result["published"], msgs.len() as u64);
    let s = wait_for(
        std::time::Duration::from_secs(60),
        "every message rejected or stored",
        || {
            let s = status(&cfg);
            let done = rejected_total(&s)
                + n(&s, "observations_stored")
                + n(&s, "heartbeats_stored")
                + n(&s, "corrections_stored");
            (done >= msgs.len() as u64).then_some(s)
        },
    );

    // Each case: one stored rejection, with its reason.
    let db = rusqlite::Connection::open(dir.path().join("state/outrider.db")).unwrap();
    let mut rows: BTreeMap<(String, Vec<u8>), Vec<Stored>> = BTreeMap::new();
    let mut stmt = db
        .prepare("SELECT topic, payload, reason, detail, payload_bytes FROM rejected")
        .unwrap();
    for r in stmt
        .query_map([], |r| {
            Ok((
                r.get::<_, String>(0)?,
                r.get::<_, Vec<u8>>(1)?,
                r.get::<_, String>(2)?,
                r.get::<_, String>(3)?,
                r.get::<_, i64>(4)?,
            ))
        })
        .unwrap()
    {
        let (topic, payload, reason, detail, bytes) = r.unwrap();
        rows.entry((topic, payload))
            .or_default()
            .push((reason, detail, bytes));
    }
    let mut wrong = Vec::new();
    for (c, m) in cases.iter().zip(&msgs) {
        match rows
            .get(&(c.topic.clone(), kept(&m.payload)))
            .map(Vec::as_slice)
        {
            Some([(reason, detail, bytes)]) => {
                if *reason != c.reason || *bytes != m.payload.len() as i64 || detail.is_empty() {
                    wrong.push(format!(
                        "{}: want {}, got {reason} ({detail})",
                        c.name, c.reason
                    ));
                }
            }
            Some(more) => wrong.push(format!("{}: stored {} times", c.name, more.len())),
            None => wrong.push(format!("{}: no stored rejection", c.name)),
        }
    }
    assert!(
        wrong.is_empty(),
        "{} of {} cases:\n{}",
        wrong.len(),
        cases.len(),
        wrong.join("\n")
    );
    assert_eq!(
        rows.values().map(Vec::len).sum::<usize>(),
        cases.len(),
        "nothing else was rejected"
    );

    // The counts by reason, in `status` and on <prefix>/_rejected.
    let mut want: BTreeMap<String, u64> = BTreeMap::new();
    for c in &cases {
        *want.entry(c.reason.clone()).or_default() += 1;
    }
    let got: BTreeMap<String, u64> = s["rejected"]
        .as_object()
        .unwrap()
        .iter()
        .map(|(k, v)| (k.clone(), v.as_u64().unwrap()))
        .collect();
    assert_eq!(got, want, "status rejected by reason");
    let mut reported: BTreeMap<String, u64> = BTreeMap::new();
    for r in result["rejections"].as_array().unwrap() {
        *reported
            .entry(r["reason"].as_str().unwrap().to_string())
            .or_default() += 1;
    }
    assert_eq!(reported, want, "reports on outrider/_rejected");
    assert_eq!(n(&s, "observations_stored"), 1, "only the good one: {s}");

    // Still running; the log carries no raw control or bidirectional
    // character from a payload (log lines are escaped: decode::printable).
    assert!(daemon.is_running(), "the daemon kept running");
    let log = daemon.log_text();
    assert!(!log.contains("panicked"));
    for c in ['\u{1b}', '\u{7}', '\u{202e}', '\u{0}'] {
        assert!(!log.contains(c), "raw {c:?} in the log");
    }
    let (exit, _) = daemon.stop();
    assert!(exit.success());
}
