//! Detections to notices in the running daemon: a real broker (Mosquitto),
//! an independent publisher (paho-mqtt), a real SMTP server (aiosmtpd), the
//! email read back by Python's `email` package; and `outrider rebuild`
//! against the events the daemon derived incrementally.

use crate::delivery::{one_header, parse_eml, part, Sink};
use crate::util::*;
use chrono::{DateTime, Duration, Utc};
use outrider::clock::{Clock, SystemClock};

fn ts(t: DateTime<Utc>) -> String {
    t.with_timezone(&chrono_tz::Australia::Sydney).to_rfc3339()
}

fn animal(id: &str, dep: &str, species: &str, at: DateTime<Utc>) -> Msg {
    let p = serde_json::json!({"observationID": id, "deploymentID": dep, "eventStart": ts(at), "observationType": "animal", "scientificName": species, "count": 2, "classificationProbability": 0.93, "filePath": format!("https://images.kellerby.example/{id}.jpg")});
    Msg {
        topic: format!("outrider/{dep}/observation"),
        payload: p.to_string().into_bytes(),
    }
}

#[test]
fn a_detection_becomes_one_email_at_a_real_smtp_server() {
    let dir = tempfile::tempdir().unwrap();
    let smtp = Sink::smtp(&dir.path().join("smtp"), &[]);
    let mosquitto = Mosquitto::start(dir.path());
    // Stonecroft: 2 km around a point 0.5 km from KB-02 (Dry Creek Crossing).
    let extra = format!(
        "[smtp]\nhost = \"127.0.0.1\"\nport = {}\nsecurity = \"none\"\nfrom = \"outrider <notices@kellerby.example>\"\n\n[[subscriber]]\nid = \"stonecroft\"\nname = \"Stonecroft\"\nemail = \"owner@stonecroft.example\"\narea = {{ lat = -31.4963, lon = 148.0578, radius_km = 2.0 }}\n[[subscriber.watch]]\nname = \"dogs\"\ntrigger = \"presence\"\nspecies = [\"Canis familiaris\"]\ncooldown_minutes = 60\nchannels = [\"email\"]\n",
        smtp.port
    );
    let cfg = write_config(dir.path(), mosquitto.port, false, &extra);
    let mut daemon = Daemon::start(&cfg);
    let t0 = SystemClock.now() - Duration::minutes(30);
    let msgs = vec![
        animal("d1", "KB-02", "Canis familiaris", t0),
        // Five minutes later: the same independent event (30 min interval).
        animal("d2", "KB-02", "Canis familiaris", t0 + Duration::minutes(5)),
        // KB-04 is 16 km away: outside the area.
        animal("d3", "KB-04", "Canis familiaris", t0),
        // A fox is not watched.
        animal("f1", "KB-02", "Vulpes vulpes", t0),
    ];
    let corpus = dir.path().join("c.jsonl");
    write_corpus(&corpus, &msgs);
    publish_corpus(mosquitto.port, &corpus, 0, "noticepublisher");

    let files = wait_for(
        std::time::Duration::from_secs(30),
        "the email at the SMTP server",
        || {
            let m = smtp.messages();
            (!m.is_empty()).then_some(m)
        },
    );
    let s = wait_for(
        std::time::Duration::from_secs(10),
        "the delivery to be recorded",
        || {
            let s = status(&cfg);
            (s["deliveries"]["sent"] == 1).then_some(s)
        },
    );
    assert_eq!(s["notices"]["sent"], 1, "{s}");
    assert_eq!(n(&s, "outbox_pending"), 0);
    assert_eq!(
        n(&s, "events"),
        3,
        "dog at KB-02, dog at KB-04, fox at KB-02: {s}"
    );

    // Read by an independent MIME parser (Python email, policy=default).
    let parsed = parse_eml(&files[0]);
    let db = rusqlite::Connection::open(dir.path().join("state/outrider.db")).unwrap();
    let id: String = db
        .query_row("SELECT id FROM notices", [], |r| r.get(0))
        .unwrap();
    assert_eq!(
        one_header(&parsed, "Message-ID"),
        format!("<{id}@kellerby.example>")
    );
    assert_eq!(one_header(&parsed, "To"), "owner@stonecroft.example");
    let subject = one_header(&parsed, "Subject");
    assert!(subject.contains("Dry Creek Crossing (KB-02)"), "{subject}");
    let unsub = one_header(&parsed, "List-Unsubscribe");
    assert!(
        unsub.starts_with("<http://127.0.0.1:8080/unsubscribe/"),
        "RFC 2369 form: {unsub}"
    );
    let text = part(&parsed, "text/plain");
    // Geodesic 0.5 km from the circle's centre, written to one decimal.
    assert!(
        text.contains("0.5 km from the centre of your area."),
        "{text}"
    );
    assert!(text.contains("2 animals"), "{text}");
    assert!(
        text.contains("https://images.kellerby.example/d1.jpg"),
        "{text}"
    );
    assert!(
        text.contains("Never approach a feral pig or a wild dog."),
        "the caution footer"
    );

    // A restart does not send it again: the delivery was recorded as sent.
    daemon.restart();
    std::thread::sleep(std::time::Duration::from_secs(2));
    assert_eq!(smtp.messages().len(), 1);
    let (exit, _) = daemon.stop();
    assert!(exit.success());
}

/// METHODS 1: the events the daemon derives as messages and corrections
/// arrive equal those `outrider rebuild` derives from the raw observations
/// afterwards.
#[test]
fn rebuild_equals_the_incremental_events_after_a_long_run_with_corrections() {
    let dir = tempfile::tempdir().unwrap();
    let port = free_port();
    let cfg = write_config(dir.path(), port, true, "");
    // The whole invented district, not only the harness's four sites.
    std::fs::copy(
        repo().join("config_examples/sites.csv"),
        dir.path().join("sites.csv"),
    )
    .unwrap();
    let mut daemon = Daemon::start(&cfg);
    let now = SystemClock.now();
    let feed = outrider::demo::feed::Feed::new(now - Duration::days(1), "outrider", 11);
    let mut msgs: Vec<Msg> = feed
        .between(now - Duration::days(12), now - Duration::hours(1))
        .into_iter()
        .map(|m| Msg {
            topic: m.topic,
            payload: m.payload,
        })
        .collect();
    // Corrections of one animal observation in 12: alternately retract
    // (blank) and relabel to another species.
    let animals: Vec<(String, String)> = msgs
        .iter()
        .filter_map(|m| {
            let v: serde_json::Value = serde_json::from_slice(&m.payload).ok()?;
            (v["observationType"] == "animal").then(|| {
                (
                    v["observationID"].as_str().unwrap().to_string(),
                    v["deploymentID"].as_str().unwrap().to_string(),
                )
            })
        })
        .collect();
    let mut corrections = 0;
    for (k, (id, dep)) in animals.iter().enumerate().filter(|(k, _)| k % 12 == 5) {
        let payload = if k % 24 == 5 {
            serde_json::json!({"observationID": id, "observationType": "blank"})
        } else {
            serde_json::json!({"observationID": id, "scientificName": "Vulpes vulpes", "count": 1})
        };
        msgs.push(Msg {
            topic: format!("outrider/{dep}/correction"),
            payload: payload.to_string().into_bytes(),
        });
        corrections += 1;
    }
    let total = msgs.len() as u64;
    let corpus = dir.path().join("run.jsonl");
    write_corpus(&corpus, &msgs);
    publish_corpus(port, &corpus, 0, "rebuildpublisher");
    wait_for(
        std::time::Duration::from_secs(90),
        "every message to be processed",
        || {
            let s = status(&cfg);
            let done = n(&s, "observations_stored")
                + n(&s, "heartbeats_stored")
                + n(&s, "corrections_stored")
                + rejected_total(&s);
            (done >= total).then_some(())
        },
    );
    let (exit, _) = daemon.stop();
    assert!(exit.success());
    let s = status(&cfg);
    assert_eq!(n(&s, "corrections_stored"), corrections, "{s}");
    assert_eq!(rejected_total(&s), 0, "{s}");

    let dump = || -> Vec<(String, String, i64, i64, i64, i64)> {
        let db = rusqlite::Connection::open(dir.path().join("state/outrider.db")).unwrap();
        let mut stmt = db.prepare("SELECT deployment_id, scientific_name, start, end, count, triggers FROM events ORDER BY 1, 2, 3").unwrap();
        stmt.query_map([], |r| {
            Ok((
                r.get(0)?,
                r.get(1)?,
                r.get(2)?,
                r.get(3)?,
                r.get(4)?,
                r.get(5)?,
            ))
        })
        .unwrap()
        .map(|r| r.unwrap())
        .collect()
    };
    let incremental = dump();
    assert!(
        incremental.len() > 100,
        "a long run: {} events",
        incremental.len()
    );
    let out = std::process::Command::new(BIN)
        .args(["rebuild", "-c"])
        .arg(&cfg)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let rebuilt = dump();
    assert_eq!(incremental.len(), rebuilt.len());
    assert_eq!(incremental, rebuilt);
}
