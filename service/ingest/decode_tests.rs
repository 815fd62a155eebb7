//! Decoder tests: one per rejection reason, the privacy rule, aliases, and a
//! property test that arbitrary bytes never panic.

use super::*;
use crate::model::RejectReason;
use std::collections::BTreeMap;

fn t(s: &str) -> DateTime<Utc> {
    DateTime::parse_from_rfc3339(s).unwrap().with_timezone(&Utc)
}

struct Fixture {
    deployments: HashMap<String, DateTime<Utc>>,
    species: Species,
}

impl Fixture {
    fn new() -> Self {
        let mut deployments = HashMap::new();
        deployments.insert("KB-07".to_string(), t("2026-06-01T00:00:00+10:00"));
        let mut aliases = BTreeMap::new();
        aliases.insert(
            "Canis lupus dingo".to_string(),
            "Canis familiaris".to_string(),
        );
        aliases.insert("wild dog".to_string(), "Canis familiaris".to_string());
        Self {
            deployments,
            species: Species {
                groups: BTreeMap::new(),
                aliases,
            },
        }
    }

    fn ctx(&self) -> DecodeContext<'_> {
        DecodeContext {
            topic_prefix: "outrider",
            deployments: &self.deployments,
            species: &self.species,
            now: t("2026-07-14T03:00:00+10:00"),
            max_payload_bytes: 64 * 1024,
            future_tolerance: Duration::minutes(10),
        }
    }

    fn obs(&self, payload: &str) -> Result<Message, Rejection> {
        decode(
            "outrider/KB-07/observation",
            payload.as_bytes(),
            &self.ctx(),
        )
    }
}

const GOOD: &str = r#"{"observationID":"o1","deploymentID":"KB-07","eventStart":"2026-07-14T02:13:00+10:00","observationType":"animal","scientificName":"Canis lupus dingo","count":2,"classificationProbability":0.93,"classificationMethod":"machine","filePath":"https://images.kellerby.example/o1.jpg","unknownExtra":{"a":[1,2]}}"#;

#[test]
fn a_good_observation_decodes_with_its_alias_resolved() {
    let f = Fixture::new();
    let Ok(Message::Observation(o)) = f.obs(GOOD) else {
        panic!("expected an observation")
    };
    assert_eq!(o.observation_id, "o1");
    assert_eq!(o.scientific_name.as_deref(), Some("Canis familiaris"));
    assert_eq!(o.count, 2);
    assert_eq!(o.event_start, t("2026-07-13T16:13:00Z"));
    assert_eq!(
        o.file_path.as_deref(),
        Some("https://images.kellerby.example/o1.jpg")
    );
}

#[test]
fn people_and_vehicles_keep_only_time_place_and_type() {
    let f = Fixture::new();
    let p = r#"{"observationID":"p1","deploymentID":"KB-07","eventStart":"2026-07-14T02:13:00+10:00","observationType":"human","scientificName":"Homo sapiens","count":3,"filePath":"https://x.example/face.jpg","vernacularName":"Bob","behavior":"walking"}"#;
    let Ok(Message::Observation(o)) = f.obs(p) else {
        panic!("expected an observation")
    };
    assert_eq!((o.observation_type, o.count), (ObservationType::Human, 1));
    assert_eq!(
        (
            o.scientific_name,
            o.file_path,
            o.vernacular_name,
            o.behavior
        ),
        (None, None, None, None)
    );
}

#[test]
fn heartbeats_and_corrections_decode() {
    let f = Fixture::new();
    let hb = decode("outrider/KB-07/heartbeat", br#"{"deploymentID":"KB-07","timestamp":"2026-07-13T16:00:00Z","batteryPercent":81.5,"signalDbm":-88,"imagesSinceLast":4}"#, &f.ctx());
    assert!(
        matches!(hb, Ok(Message::Heartbeat(Heartbeat { battery_percent: Some(b), .. })) if b == 81.5),
        "{hb:?}"
    );
    let c = decode(
        "outrider/KB-07/correction",
        br#"{"observationID":"o1","observationType":"blank"}"#,
        &f.ctx(),
    );
    assert!(
        matches!(
            c,
            Ok(Message::Correction(Correction {
                observation_type: Some(ObservationType::Blank),
                ..
            }))
        ),
        "{c:?}"
    );
}

/// One malformed message per reason; the decoder names the reason.
#[test]
fn each_kind_of_bad_message_gets_its_own_reason() {
    let f = Fixture::new();
    let with = |k: &str, v: &str| -> String {
        let mut m: serde_json::Map<String, serde_json::Value> = serde_json::from_str(GOOD).unwrap();
        if v == "DELETE" {
            m.remove(k);
        } else {
            m.insert(k.into(), serde_json::from_str(v).unwrap());
        }
        serde_json::to_string(&m).unwrap()
    };
    let cases: Vec<(String, RejectReason)> = vec![
        ("{\"observationID\": ".into(), RejectReason::InvalidJson),
        ("{\"count\": NaN}".into(), RejectReason::InvalidJson),
        ("[1,2,3]".into(), RejectReason::NotAnObject),
        ("\"just a string\"".into(), RejectReason::NotAnObject),
        (
            format!("{}{}{}", "{\"x\":".repeat(200), "1", "}".repeat(200)),
            RejectReason::TooDeep,
        ),
        (
            GOOD.replacen("\"count\":2", "\"count\":2,\"count\":3", 1),
            RejectReason::DuplicateKey,
        ),
        (with("eventStart", "DELETE"), RejectReason::MissingField),
        (with("scientificName", "DELETE"), RejectReason::MissingField),
        (with("count", "\"2\""), RejectReason::WrongType),
        (
            with("classificationProbability", "\"high\""),
            RejectReason::WrongType,
        ),
        (with("count", "0"), RejectReason::InvalidValue),
        (with("count", "-1"), RejectReason::InvalidValue),
        (
            GOOD.replace("\"count\":2", "\"count\":1e400"),
            RejectReason::InvalidValue,
        ),
        (
            with("classificationProbability", "1.3"),
            RejectReason::InvalidValue,
        ),
        (
            with("observationType", "\"ghost\""),
            RejectReason::InvalidValue,
        ),
        (
            with("scientificName", "\"wild\\ndog\""),
            RejectReason::InvalidValue,
        ),
        (
            with("scientificName", "\"big black thing\""),
            RejectReason::InvalidValue,
        ),
        (
            with("eventStart", "\"2026-07-14 02:13\""),
            RejectReason::BadTimestamp,
        ),
        (
            with("eventStart", "\"2026-07-14T02:13:00\""),
            RejectReason::BadTimestamp,
        ),
        (
            with("eventStart", "\"2030-01-01T00:00:00Z\""),
            RejectReason::TimestampOutOfRange,
        ),
        (
            with("eventStart", "\"2026-05-01T00:00:00Z\""),
            RejectReason::TimestampOutOfRange,
        ),
        (
            with("deploymentID", "\"KB-08\""),
            RejectReason::DeploymentMismatch,
        ),
    ];
    for (payload, want) in cases {
        let got = f.obs(&payload).map(|_| ()).map_err(|r| r.reason);
        assert_eq!(got, Err(want), "payload {payload:.120}");
    }
    let ctx = f.ctx();
    let r = |topic: &str, payload: &[u8]| {
        decode(topic, payload, &ctx)
            .map(|_| ())
            .map_err(|r| r.reason)
    };
    assert_eq!(
        r(
            "outrider/KB-99/observation",
            GOOD.replace("KB-07", "KB-99").as_bytes()
        ),
        Err(RejectReason::UnknownDeployment)
    );
    assert_eq!(
        r("outrider/KB-07/status", GOOD.as_bytes()),
        Err(RejectReason::UnknownTopic)
    );
    assert_eq!(
        r("other/KB-07/observation", GOOD.as_bytes()),
        Err(RejectReason::UnknownTopic)
    );
    assert_eq!(
        r("outrider/KB-07/observation", &[b'{', 0xff, 0xfe, b'}']),
        Err(RejectReason::InvalidUtf8)
    );
    let big = format!("{{\"pad\":\"{}\"}}", "x".repeat(70 * 1024));
    assert_eq!(
        r("outrider/KB-07/observation", big.as_bytes()),
        Err(RejectReason::PayloadTooLarge)
    );
    assert_eq!(
        r("outrider/KB-07/correction", br#"{"observationID":"o1"}"#),
        Err(RejectReason::MissingField)
    );
}

#[test]
fn the_future_tolerance_is_ten_minutes() {
    let f = Fixture::new();
    let at = |s: &str| {
        f.obs(&GOOD.replace("2026-07-14T02:13:00+10:00", s))
            .map(|_| ())
            .map_err(|r| r.reason)
    };
    assert_eq!(at("2026-07-14T03:10:00+10:00"), Ok(()));
    assert_eq!(
        at("2026-07-14T03:10:01+10:00"),
        Err(RejectReason::TimestampOutOfRange)
    );
    // A day before deploymentStart is still accepted (clock set-up slop).
    assert_eq!(at("2026-05-31T00:00:00+10:00"), Ok(()));
    assert_eq!(
        at("2026-05-30T23:59:59+10:00"),
        Err(RejectReason::TimestampOutOfRange)
    );
}

#[test]
fn printable_escapes_control_characters() {
    assert_eq!(printable("a\r\nb\u{1b}"), "a\\r\\nb\\u{1b}");
    assert_eq!(printable(&"é".repeat(200)).chars().count(), 121);
}

mod properties {
    use super::*;
    use proptest::prelude::*;

    proptest! {
        #[test]
        fn arbitrary_bytes_never_panic(topic in "outrider/(KB-07|[ -~]{0,8})/(observation|heartbeat|correction|x)", payload in proptest::collection::vec(any::<u8>(), 0..300)) {
            let f = Fixture::new();
            let _ = decode(&topic, &payload, &f.ctx());
        }

        #[test]
        fn json_shaped_noise_never_panics(s in r#"\{("[a-zA-Z]{1,20}": ?("[ -~]{0,12}"|-?[0-9]{1,25}(\.[0-9]+)?(e[0-9]{1,4})?|true|null|\[\]|\{\}),?){0,8}\}"#) {
            let f = Fixture::new();
            let _ = decode("outrider/KB-07/observation", s.as_bytes(), &f.ctx());
            let _ = decode("outrider/KB-07/heartbeat", s.as_bytes(), &f.ctx());
            let _ = decode("outrider/KB-07/correction", s.as_bytes(), &f.ctx());
        }

        /// Changing one byte of a good message either still decodes or is
        /// rejected; a rejection always carries a detail.
        #[test]
        fn one_byte_changes(pos in 0usize..GOOD.len(), byte in any::<u8>()) {
            let f = Fixture::new();
            let mut p = GOOD.as_bytes().to_vec();
            p[pos] = byte;
            if let Err(r) = decode("outrider/KB-07/observation", &p, &f.ctx()) {
                prop_assert!(!r.detail.is_empty());
            }
        }
    }
}

/// Gaps the hostile corpus (tests/data/hostile/) found: a number is judged
/// by its value (RFC 8259 §6 has one number type), bidirectional controls
/// are refused in text, and a correction needs an observationID.
#[test]
fn numbers_are_judged_by_value_bidi_controls_and_empty_correction_ids_refused() {
    let f = Fixture::new();
    let count = |v: &str| {
        f.obs(&GOOD.replace("\"count\":2", &format!("\"count\":{v}")))
            .map(|m| match m {
                Message::Observation(o) => o.count,
                _ => 0,
            })
            .map_err(|r| r.reason)
    };
    assert_eq!(count("3.0"), Ok(3), "3.0 is the number 3");
    assert_eq!(count("3e0"), Ok(3));
    assert_eq!(count("2.5"), Err(RejectReason::InvalidValue));
    // Beyond u64: serde_json reads it as a float; its value is out of range.
    assert_eq!(
        count("99999999999999999999999"),
        Err(RejectReason::InvalidValue)
    );
    assert_eq!(count("1e23"), Err(RejectReason::InvalidValue));
    assert_eq!(count("-0"), Err(RejectReason::InvalidValue));
    assert_eq!(count("\"3\""), Err(RejectReason::WrongType));
    assert_eq!(count("true"), Err(RejectReason::WrongType));
    let hb = |v: &str| {
        decode(
            "outrider/KB-07/heartbeat",
            format!(r#"{{"deploymentID":"KB-07","timestamp":"2026-07-13T16:00:00Z","imagesSinceLast":{v}}}"#).as_bytes(),
            &f.ctx(),
        )
        .map(|_| ())
        .map_err(|r| r.reason)
    };
    assert_eq!(hb("4"), Ok(()));
    assert_eq!(hb("-1"), Err(RejectReason::InvalidValue));
    assert_eq!(hb("4.5"), Err(RejectReason::InvalidValue));
    assert_eq!(hb("[]"), Err(RejectReason::WrongType));

    // U+202E RIGHT-TO-LEFT OVERRIDE and U+2066 LEFT-TO-RIGHT ISOLATE (UAX #9).
    for name in ["\\u202egod dliw", "dog\\u2066"] {
        let p = GOOD.replace(
            "\"count\":2",
            &format!("\"count\":2,\"vernacularName\":\"{name}\""),
        );
        assert_eq!(
            f.obs(&p).map(|_| ()).map_err(|r| r.reason),
            Err(RejectReason::InvalidValue),
            "{name}"
        );
    }
    // An implicit mark (U+200F RIGHT-TO-LEFT MARK) is text, not a control.
    let p = GOOD.replace(
        "\"count\":2",
        "\"count\":2,\"vernacularName\":\"dingo\\u200f\"",
    );
    assert!(f.obs(&p).is_ok());

    for id in ["", "  "] {
        let p = format!(r#"{{"observationID":"{id}","observationType":"blank"}}"#);
        assert_eq!(
            decode("outrider/KB-07/correction", p.as_bytes(), &f.ctx())
                .map(|_| ())
                .map_err(|r| r.reason),
            Err(RejectReason::InvalidValue),
            "{id:?}"
        );
    }
}
