//! The spine end to end: an independent MQTT client (paho-mqtt) publishes
//! good, repeated and malformed messages; outrider stores each good one
//! once, ignores repeats, rejects the rest with a reason, keeps them, and
//! reports each on `<prefix>/_rejected`. Against the embedded broker and a
//! real Mosquitto, and through a kill -9 of outrider mid-burst.

use crate::util::*;
use chrono::{DateTime, Duration, Utc};
use outrider::clock::{Clock, SystemClock};
use std::collections::BTreeMap;

fn ts(t: DateTime<Utc>) -> String {
    t.with_timezone(&chrono_tz::Australia::Sydney).to_rfc3339()
}

fn observation(i: usize, at: DateTime<Utc>) -> Msg {
    let dep = format!("KB-0{}", 1 + i % 4);
    let species = [
        "Canis familiaris",
        "Vulpes vulpes",
        "Sus scrofa",
        "Macropus giganteus",
    ][i % 4];
    let payload = if i % 50 == 7 {
        serde_json::json!({"observationID": format!("obs-{i}"), "deploymentID": dep, "eventStart": ts(at), "observationType": "human", "filePath": "https://images.kellerby.example/person.jpg"})
    } else {
        serde_json::json!({"observationID": format!("obs-{i}"), "deploymentID": dep, "eventStart": ts(at), "observationType": "animal", "scientificName": species, "count": 1 + i % 3, "classificationProbability": 0.9})
    };
    Msg {
        topic: format!("outrider/{dep}/observation"),
        payload: payload.to_string().into_bytes(),
    }
}

/// 850 distinct good observations, 100 repeats, 50 malformed of ten kinds
/// (five each). Returns the corpus and the reasons expected.
fn corpus() -> (Vec<Msg>, BTreeMap<String, u64>) {
    let now = SystemClock.now();
    let base = now - Duration::hours(3);
    let good: Vec<Msg> = (0..850)
        .map(|i| observation(i, base + Duration::seconds(i as i64 * 7)))
        .collect();
    let mut bad: Vec<(Msg, &str)> = Vec::new();
    for k in 0..5 {
        let t = ts(base + Duration::minutes(k));
        let obs = |fields: serde_json::Value| -> Vec<u8> {
            let mut m = serde_json::json!({"observationID": format!("bad-{k}"), "deploymentID": "KB-01", "eventStart": t, "observationType": "animal", "scientificName": "Vulpes vulpes"});
            for (key, v) in fields.as_object().unwrap() {
                if v.is_null() {
                    m.as_object_mut().unwrap().remove(key);
                } else {
                    m[key] = v.clone();
                }
            }
            m.to_string().into_bytes()
        };
        let topic = "outrider/KB-01/observation".to_string();
        bad.push((
            Msg {
                topic: topic.clone(),
                payload: format!("{{\"observationID\": \"bad-{k}\", ").into_bytes(),
            },
            "invalid-json",
        ));
        bad.push((
            Msg {
                topic: topic.clone(),
                payload: obs(serde_json::json!({"eventStart": null})),
            },
            "missing-field",
        ));
        bad.push((
            Msg {
                topic: topic.clone(),
                payload: obs(serde_json::json!({"count": "three"})),
            },
            "wrong-type",
        ));
        bad.push((
            Msg {
                topic: topic.clone(),
                payload: obs(serde_json::json!({"eventStart": "yesterday at dusk"})),
            },
            "bad-timestamp",
        ));
        bad.push((
            Msg {
                topic: "outrider/KB-99/observation".into(),
                payload: obs(serde_json::json!({"deploymentID": "KB-99"})),
            },
            "unknown-deployment",
        ));
        let mut big = obs(serde_json::json!({"behavior": "x".repeat(70 * 1024)}));
        big.truncate(big.len());
        bad.push((
            Msg {
                topic: topic.clone(),
                payload: big,
            },
            "payload-too-large",
        ));
        bad.push((
            Msg {
                topic: topic.clone(),
                payload: vec![b'{', b'"', 0xC3, 0x28, b'"', b':', b'1', b'}'],
            },
            "invalid-utf8",
        ));
        bad.push((
            Msg {
                topic: topic.clone(),
                payload: b"[\"not\", \"an\", \"object\"]".to_vec(),
            },
            "not-an-object",
        ));
        bad.push((
            Msg {
                topic: topic.clone(),
                payload: obs(serde_json::json!({"classificationProbability": 1.3})),
            },
            "invalid-value",
        ));
        bad.push((
            Msg {
                topic: "outrider/KB-02/observation".into(),
                payload: obs(serde_json::json!({})),
            },
            "deployment-mismatch",
        ));
    }
    let mut expected = BTreeMap::new();
    for (_, r) in &bad {
        *expected.entry(r.to_string()).or_insert(0) += 1;
    }
    // Interleave: good messages, with a repeat after every 8th and a bad one after every 17th.
    let mut out = Vec::new();
    let mut bad = bad.into_iter().map(|(m, _)| m);
    let mut repeats = 0;
    for (i, m) in good.iter().enumerate() {
        out.push(Msg {
            topic: m.topic.clone(),
            payload: m.payload.clone(),
        });
        if i % 8 == 0 && repeats < 100 {
            out.push(Msg {
                topic: good[i / 2].topic.clone(),
                payload: good[i / 2].payload.clone(),
            });
            repeats += 1;
        }
        if i % 17 == 16 {
            if let Some(b) = bad.next() {
                out.push(b);
            }
        }
    }
    out.extend(bad);
    assert_eq!(repeats, 100);
    assert_eq!(out.len(), 1000);
    (out, expected)
}

fn run_corpus(embedded: bool) {
    let dir = tempfile::tempdir().unwrap();
    let (port, _mosquitto) = if embedded {
        (free_port(), None)
    } else {
        let m = Mosquitto::start(dir.path());
        (m.port, Some(m))
    };
    let cfg = write_config(dir.path(), port, embedded, "");
    let mut daemon = Daemon::start(&cfg);
    let (msgs, expected) = corpus();
    let corpus_file = dir.path().join("corpus.jsonl");
    write_corpus(&corpus_file, &msgs);

    let result = publish_corpus(port, &corpus_file, 50, "corpuspublisher");
    assert_eq!(result["published"], 1000);
    let s = wait_for(
        std::time::Duration::from_secs(60),
        "all 1000 messages to be processed",
        || {
            let s = status(&cfg);
            (n(&s, "observations_stored") + n(&s, "duplicates_ignored") + rejected_total(&s)
                >= 1000)
                .then_some(s)
        },
    );
    assert_eq!(n(&s, "observations_stored"), 850, "{s}");
    assert_eq!(n(&s, "duplicates_ignored"), 100, "{s}");
    let got: BTreeMap<String, u64> = s["rejected"]
        .as_object()
        .unwrap()
        .iter()
        .map(|(k, v)| (k.clone(), v.as_u64().unwrap()))
        .collect();
    assert_eq!(got, expected, "rejections by reason");

    // Each rejection was published on outrider/_rejected with its reason.
    let reports = result["rejections"].as_array().unwrap();
    let mut by_reason: BTreeMap<String, u64> = BTreeMap::new();
    for r in reports {
        *by_reason
            .entry(r["reason"].as_str().unwrap().to_string())
            .or_default() += 1;
        assert!(!r["detail"].as_str().unwrap().is_empty());
    }
    assert_eq!(by_reason, expected, "reports on _rejected");
    let oversize = reports
        .iter()
        .find(|r| r["reason"] == "payload-too-large")
        .unwrap();
    assert!(oversize["payloadBytes"].as_u64().unwrap() > 70 * 1024);
    assert_eq!(
        oversize["payload"].as_str().unwrap().len(),
        64 * 1024,
        "kept cut to the limit"
    );

    // Rejected messages are kept in the store with their payloads.
    let db = rusqlite::Connection::open(dir.path().join("state/outrider.db")).unwrap();
    let kept: i64 = db
        .query_row(
            "SELECT count(*) FROM rejected WHERE length(payload) > 0",
            [],
            |r| r.get(0),
        )
        .unwrap();
    assert_eq!(kept, 50);
    // The privacy rule: the human observations keep no image link.
    let (humans, with_path): (i64, i64) = db
        .query_row(
            "SELECT count(*), count(file_path) FROM observations WHERE observation_type = 'human'",
            [],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .unwrap();
    assert_eq!((humans, with_path), (17, 0));

    let (exit, took) = daemon.stop();
    assert!(exit.success(), "exit status {exit:?}");
    assert!(
        took < std::time::Duration::from_secs(5),
        "shutdown took {took:?}"
    );
    assert!(daemon.log_text().contains("Rejected message"));
}

#[test]
fn embedded_broker_end_to_end() {
    run_corpus(true);
}

#[test]
fn mosquitto_end_to_end() {
    run_corpus(false);
}

/// kill -9 in the middle of a 5,000-message QoS 1 burst through Mosquitto
/// with persistence on; after a restart every observation is stored exactly
/// once.
#[test]
fn kill_9_mid_burst_loses_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let mosquitto = Mosquitto::start(dir.path());
    let cfg = write_config(dir.path(), mosquitto.port, false, "");
    let mut daemon = Daemon::start(&cfg);
    let base = SystemClock.now() - Duration::hours(5);
    let msgs: Vec<Msg> = (0..5000)
        .map(|i| observation(i, base + Duration::seconds(i as i64 * 3)))
        .collect();
    let corpus_file = dir.path().join("burst.jsonl");
    write_corpus(&corpus_file, &msgs);

    let port = mosquitto.port;
    let publisher =
        std::thread::spawn(move || publish_corpus(port, &corpus_file, 0, "burstpublisher"));
    let at_kill = wait_for(
        std::time::Duration::from_secs(60),
        "outrider to store part of the burst",
        || {
            let s = status(&cfg);
            let stored = n(&s, "observations_stored");
            (stored >= 200).then_some(stored)
        },
    );
    daemon.kill9();
    let after_kill = n(&status(&cfg), "observations_stored");
    eprintln!("killed with {at_kill} stored; {after_kill} committed before the kill");
    daemon.restart();
    let result = publisher.join().unwrap();
    assert_eq!(result["published"], 5000);
    let s = wait_for(
        std::time::Duration::from_secs(90),
        "all 5,000 observations",
        || {
            let s = status(&cfg);
            (n(&s, "observations_stored") >= 5000).then_some(s)
        },
    );
    assert!(
        after_kill < 5000,
        "the kill came mid-burst (stored {at_kill} when killed, {after_kill} after)"
    );
    assert_eq!(n(&s, "observations_stored"), 5000, "{s}");
    assert_eq!(rejected_total(&s), 0, "{s}");
    let db = rusqlite::Connection::open(dir.path().join("state/outrider.db")).unwrap();
    let distinct: i64 = db.query_row("SELECT count(DISTINCT observation_id) FROM observations WHERE observation_id LIKE 'obs-%'", [], |r| r.get(0)).unwrap();
    assert_eq!(distinct, 5000);
    let (exit, _) = daemon.stop();
    assert!(exit.success());
}

/// Regression: a backlog larger than every internal queue (pipeline 2,048,
/// client requests 8,192) drains completely. Before the acknowledgements
/// were moved into the MQTT loop, the pipeline waited on a full request
/// queue while the loop waited on a full pipeline, and ingest stopped.
#[test]
fn backlog_larger_than_every_queue_drains() {
    let dir = tempfile::tempdir().unwrap();
    let mosquitto = Mosquitto::start(dir.path());
    let cfg = write_config(dir.path(), mosquitto.port, false, "");
    // Create the persistent session, then go away so the broker queues.
    let mut daemon = Daemon::start(&cfg);
    daemon.stop();
    let base = SystemClock.now() - Duration::days(10);
    let msgs: Vec<Msg> = (0..12_000)
        .map(|i| observation(i, base + Duration::seconds(i as i64 * 20)))
        .collect();
    let corpus_file = dir.path().join("backlog.jsonl");
    write_corpus(&corpus_file, &msgs);
    let result = publish_corpus(mosquitto.port, &corpus_file, 0, "backlogpublisher");
    assert_eq!(result["published"], 12_000);
    daemon.restart();
    let s = wait_for(
        std::time::Duration::from_secs(120),
        "the 12,000-message backlog to drain",
        || {
            let s = status(&cfg);
            (n(&s, "observations_stored") >= 12_000).then_some(s)
        },
    );
    assert_eq!(n(&s, "observations_stored"), 12_000, "{s}");
    let (exit, _) = daemon.stop();
    assert!(exit.success());
}

/// TLS to the broker (mqtts with a CA generated here by rcgen) and a
/// password, against a real Mosquitto that speaks only TLS: the right CA
/// connects and ingests; another CA is refused; a wrong password is refused.
#[test]
fn mqtts_with_a_test_ca_and_a_password() {
    let dir = tempfile::tempdir().unwrap();
    let (ca, cert, key) = crate::delivery::test_certificates(&dir.path().join("pki"));
    let mosquitto = Mosquitto::start_tls(dir.path(), &cert, &key, "outrider", "kellerby-test-pw");
    let tls = |sub: &str, ca: &std::path::Path| {
        let d = dir.path().join(sub);
        let cfg = write_config(&d, mosquitto.port, false, "");
        let text = std::fs::read_to_string(&cfg).unwrap().replace(
            &format!("url = \"mqtt://127.0.0.1:{}\"", mosquitto.port),
            &format!("url = \"mqtts://127.0.0.1:{}\"\nusername = \"outrider\"\npassword_env = \"OUTRIDER_TEST_MQTT_PW\"\nca_file = \"{}\"", mosquitto.port, ca.display()),
        );
        std::fs::write(&cfg, text).unwrap();
        cfg
    };
    // The right CA and password: connects (the harness waits for it).
    let good = tls("good", &ca);
    let mut daemon =
        Daemon::start_with_env(&good, &[("OUTRIDER_TEST_MQTT_PW", "kellerby-test-pw")]);
    assert!(daemon.log_text().contains("Connected to the MQTT broker"));
    let (exit, _) = daemon.stop();
    assert!(exit.success());

    // A certificate from another CA: the TLS handshake is refused.
    let (other_ca, _, _) = crate::delivery::test_certificates(&dir.path().join("other-pki"));
    let wrong_ca = tls("wrong-ca", &other_ca);
    let mut d =
        Daemon::start_unconnected(&wrong_ca, &[("OUTRIDER_TEST_MQTT_PW", "kellerby-test-pw")]);
    let log = wait_for(
        std::time::Duration::from_secs(15),
        "a refused TLS handshake in the log",
        || {
            let t = d.log_text();
            t.contains("MQTT connection lost or refused").then_some(t)
        },
    );
    assert!(!log.contains("Connected to the MQTT broker"), "{log}");
    assert!(
        log.to_lowercase().contains("certificate") || log.contains("Tls") || log.contains("tls"),
        "{log}"
    );
    d.kill9();

    // The right CA but a wrong password: the broker refuses the login, and
    // the password appears nowhere in the log.
    let wrong_pw = tls("wrong-pw", &ca);
    let mut d =
        Daemon::start_unconnected(&wrong_pw, &[("OUTRIDER_TEST_MQTT_PW", "not-the-password")]);
    let log = wait_for(
        std::time::Duration::from_secs(15),
        "a refused login in the log",
        || {
            let t = d.log_text();
            t.contains("MQTT connection lost or refused").then_some(t)
        },
    );
    assert!(!log.contains("Connected to the MQTT broker"), "{log}");
    assert!(
        !log.contains("not-the-password") && !log.contains("kellerby-test-pw"),
        "a secret reached the log"
    );
    d.kill9();
}
