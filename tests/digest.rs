//! The daily digest against independent readers: observations through a
//! real broker (Mosquitto, paho-mqtt) into the daemon; the digest read back
//! by Python's `email` package (`tests/clients/smtp_sink.py parse`), its
//! chart decoded by Pillow (`tests/clients/read_chart.py`); and the daemon
//! sending digests to a real SMTP server (aiosmtpd), once, with the
//! catch-up after downtime.

use crate::delivery::{one_header, parse_eml, Sink};
use crate::util::*;
use chrono::{DateTime, Duration, DurationRound, NaiveTime, Utc};
use chrono_tz::Australia::Sydney;
use outrider::clock::{Clock, SystemClock};
use std::process::Command;

fn ts(t: DateTime<Utc>) -> String {
    t.with_timezone(&Sydney).to_rfc3339()
}

fn dog(id: &str, dep: &str, at: DateTime<Utc>) -> Msg {
    let p = serde_json::json!({"observationID": id, "deploymentID": dep, "eventStart": ts(at), "observationType": "animal", "scientificName": "Canis familiaris", "vernacularName": "wild dog", "count": 1, "classificationProbability": 0.95});
    Msg {
        topic: format!("outrider/{dep}/observation"),
        payload: p.to_string().into_bytes(),
    }
}

fn subscriber(digest_at: &str, smtp_port: Option<u16>) -> String {
    let smtp = smtp_port
        .map(|p| format!("[smtp]\nhost = \"127.0.0.1\"\nport = {p}\nsecurity = \"none\"\nfrom = \"outrider <notices@kellerby.example>\"\n\n"))
        .unwrap_or_else(|| "[email_folder]\ndir = \"mail\"\n\n".to_string());
    format!(
        "{smtp}[[subscriber]]\nid = \"stonecroft\"\nname = \"Stonecroft\"\nemail = \"owner@stonecroft.example\"\ndigest_at = \"{digest_at}\"\narea = {{ sites = [\"KB-01\", \"KB-02\"] }}\n[[subscriber.watch]]\nname = \"dog build-up\"\ntrigger = \"spike\"\nspecies = [\"Canis familiaris\"]\nchannels = [\"email\"]\n"
    )
}

fn outrider(args: &[&str]) -> String {
    let out = Command::new(BIN).args(args).output().unwrap();
    assert!(
        out.status.success(),
        "outrider {args:?}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8_lossy(&out.stdout).into_owned()
}

#[test]
fn a_digest_preview_counts_each_night_and_embeds_its_chart() {
    let dir = tempfile::tempdir().unwrap();
    let mosquitto = Mosquitto::start(dir.path());
    let cfg = write_config(
        dir.path(),
        mosquitto.port,
        false,
        &subscriber("06:30", None),
    );
    let now = SystemClock.now();
    let due = outrider::digest::latest_due(now, NaiveTime::from_hms_opt(6, 30, 0).unwrap(), Sydney);
    // Night k (k = 0 the last 24 h, up to 13) gets k % 4 dog events at
    // KB-01, two hours apart (independent at the 30 min interval), placed
    // 20 h before the end of its 24 h period; two at KB-02 in the last 24 h.
    let mut msgs = Vec::new();
    let mut want = [0u64; 14];
    for k in 0..14i64 {
        let end = due - Duration::hours(24 * k);
        for j in 0..(k % 4) {
            let at = end - Duration::hours(20) + Duration::hours(2 * j);
            msgs.push(dog(&format!("n{k}-{j}"), "KB-01", at));
            want[13 - k as usize] += 1;
        }
    }
    msgs.push(dog("last-a", "KB-02", due - Duration::hours(5)));
    msgs.push(dog("last-b", "KB-02", due - Duration::hours(2)));
    want[13] += 2;
    let corpus = dir.path().join("c.jsonl");
    write_corpus(&corpus, &msgs);
    let mut daemon = Daemon::start(&cfg);
    publish_corpus(mosquitto.port, &corpus, 0, "digestpublisher");
    wait_for(
        std::time::Duration::from_secs(30),
        "the observations",
        || (n(&status(&cfg), "observations_stored") == msgs.len() as u64).then_some(()),
    );
    daemon.stop();

    let c = cfg.to_str().unwrap();
    let at = outrider::notify::notice::rfc3339(due);
    let json = dir.path().join("d.json");
    outrider(&[
        "digest",
        "-c",
        c,
        "--subscriber",
        "stonecroft",
        "--at",
        &at,
        "--out",
        json.to_str().unwrap(),
    ]);
    let d: serde_json::Value = serde_json::from_slice(&std::fs::read(&json).unwrap()).unwrap();
    let nights: Vec<u64> = d["nights"]
        .as_array()
        .unwrap()
        .iter()
        .map(|n| n["events"].as_u64().unwrap())
        .collect();
    assert_eq!(
        nights,
        want.to_vec(),
        "events per 24 h period, oldest first"
    );
    let rows = d["rows"].as_array().unwrap();
    let kb02 = rows.iter().find(|r| r["deployment_id"] == "KB-02").unwrap();
    assert_eq!(kb02["events"], 2);
    assert!(
        rows.iter().all(|r| r["deployment_id"] != "KB-01"),
        "0 % 4 = 0 events at KB-01 in the last 24 h: {rows:?}"
    );

    let eml = dir.path().join("d.eml");
    outrider(&[
        "digest",
        "-c",
        c,
        "--subscriber",
        "stonecroft",
        "--at",
        &at,
        "--out",
        eml.to_str().unwrap(),
    ]);
    let parsed = parse_eml(&eml);
    let tree = &parsed["tree"];
    assert_eq!(tree["content_type"], "multipart/alternative", "{tree}");
    let kinds: Vec<&str> = tree["parts"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| p["content_type"].as_str().unwrap())
        .collect();
    assert_eq!(
        kinds,
        ["text/plain", "multipart/related"],
        "RFC 2387 layout: {tree}"
    );
    assert!(one_header(&parsed, "Subject").starts_with("Daily digest"));
    // An http:// public_url: the link, but no one-click header (RFC 8058
    // §3 asks for HTTPS).
    assert!(
        one_header(&parsed, "List-Unsubscribe").starts_with("<http://127.0.0.1:8080/unsubscribe/")
    );
    let text = tree["parts"][0]["content"].as_str().unwrap();
    assert!(
        text.contains("wild dog at Dry Creek Crossing (KB-02): 2 visits"),
        "{text}"
    );
    assert!(text.contains("Never approach a feral pig or a wild dog."));

    // The chart, decoded by Pillow: one bar per night with events, heights
    // in proportion to the counts (within the 2-pixel expected line).
    let out = Command::new(python())
        .arg(repo().join("tests/clients/read_chart.py"))
        .arg(&eml)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let chart: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(chart["content_id"], "nights-chart@outrider");
    assert_eq!(chart["html_refers"], true, "the HTML shows it by cid:");
    let bars: Vec<f64> = chart["bars"]
        .as_array()
        .unwrap()
        .iter()
        .map(|b| b.as_f64().unwrap())
        .collect();
    let nonzero: Vec<f64> = want.iter().filter(|&&e| e > 0).map(|&e| e as f64).collect();
    assert_eq!(bars.len(), nonzero.len(), "{chart}");
    let (bmax, emax) = (
        bars.iter().cloned().fold(0.0, f64::max),
        nonzero.iter().cloned().fold(0.0, f64::max),
    );
    for (b, e) in bars.iter().zip(&nonzero) {
        assert!(
            (b - e * bmax / emax).abs() <= 2.5,
            "bar {b} for {e} events ({chart})"
        );
    }
}

#[test]
fn the_daemon_sends_each_digest_once_and_catches_up_after_downtime() {
    let dir = tempfile::tempdir().unwrap();
    let smtp = Sink::smtp(&dir.path().join("smtp"), &[]);
    let mosquitto = Mosquitto::start(dir.path());
    let local = |t: DateTime<Utc>| t.with_timezone(&Sydney).format("%H:%M").to_string();
    // The first digest is due at the next whole minute at least 20 s away.
    let first = (SystemClock.now() + Duration::seconds(80))
        .duration_trunc(Duration::minutes(1))
        .unwrap();
    let cfg = write_config(
        dir.path(),
        mosquitto.port,
        false,
        &subscriber(&local(first), Some(smtp.port)),
    );
    let mut daemon = Daemon::start(&cfg);
    let digests = |smtp: &Sink| {
        smtp.messages()
            .into_iter()
            .filter(|m| std::fs::read_to_string(m).unwrap().contains("Daily digest"))
            .count()
    };
    wait_for(
        std::time::Duration::from_secs(150),
        "the first digest",
        || (digests(&smtp) == 1).then_some(()),
    );
    // The send is recorded just after the server accepts it.
    wait_for(
        std::time::Duration::from_secs(10),
        "the digest recorded as sent",
        || (status(&cfg)["digests"]["sent"] == 1).then_some(()),
    );
    daemon.stop();

    // Down over the next due time (moved to the minute after the first).
    let second = first + Duration::minutes(1);
    write_config(
        dir.path(),
        mosquitto.port,
        false,
        &subscriber(&local(second), Some(smtp.port)),
    );
    while SystemClock.now() < second + Duration::seconds(3) {
        std::thread::sleep(std::time::Duration::from_millis(500));
    }
    daemon.restart();
    wait_for(
        std::time::Duration::from_secs(30),
        "the catch-up digest",
        || (digests(&smtp) == 2).then_some(()),
    );
    // Recorded as sent (restart is kill -9: a digest accepted but not yet
    // recorded would be sent again, with the same Message-ID).
    wait_for(
        std::time::Duration::from_secs(10),
        "the catch-up recorded as sent",
        || (status(&cfg)["digests"]["sent"] == 2).then_some(()),
    );
    // Another restart: that digest is on record, none is sent again.
    daemon.restart();
    std::thread::sleep(std::time::Duration::from_secs(5));
    let ids: Vec<String> = smtp
        .messages()
        .iter()
        .map(|m| one_header(&parse_eml(m), "Message-ID"))
        .collect();
    let db = rusqlite::Connection::open(dir.path().join("state/outrider.db")).unwrap();
    let rows: Vec<(String, i64, String)> = db
        .prepare("SELECT subscriber_id, due_at, state FROM digests")
        .unwrap()
        .query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))
        .unwrap()
        .map(Result::unwrap)
        .collect();
    assert_eq!(
        digests(&smtp),
        2,
        "{ids:?} {rows:?} first {first} second {second}"
    );
    let s = status(&cfg);
    assert_eq!(s["digests"]["sent"], 2, "{s}");
    assert_eq!(s["digests"].as_object().unwrap().len(), 1, "only sent: {s}");
    let (exit, _) = daemon.stop();
    assert!(exit.success());
}

#[test]
fn send_test_reaches_email_webhook_and_mqtt() {
    let dir = tempfile::tempdir().unwrap();
    let smtp = Sink::smtp(&dir.path().join("smtp"), &[]);
    let hook = Sink::webhook(&dir.path().join("hook"), &["--secret", "s3cret-for-test"]);
    let mosquitto = Mosquitto::start(dir.path());
    let extra = format!(
        "[smtp]\nhost = \"127.0.0.1\"\nport = {}\nsecurity = \"none\"\nfrom = \"outrider <notices@kellerby.example>\"\n\n[[subscriber]]\nid = \"bellbird\"\nname = \"Bellbird\"\nemail = \"office@bellbird.example\"\narea = \"all\"\nwebhook = {{ url = \"http://127.0.0.1:{}/hook\", secret_env = \"TEST_HOOK_SECRET\" }}\n[[subscriber.watch]]\nname = \"pigs\"\ntrigger = \"presence\"\nspecies = [\"Sus scrofa\"]\nchannels = [\"email\", \"webhook\", \"mqtt\"]\n",
        smtp.port, hook.port
    );
    let cfg = write_config(dir.path(), mosquitto.port, false, &extra);
    let out = Command::new(BIN)
        .args([
            "send-test",
            "-c",
            cfg.to_str().unwrap(),
            "--subscriber",
            "bellbird",
        ])
        .env("TEST_HOOK_SECRET", "s3cret-for-test")
        .output()
        .unwrap();
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "{stdout}{}",
        String::from_utf8_lossy(&out.stderr)
    );
    for ch in ["email", "webhook", "mqtt"] {
        assert!(
            stdout
                .lines()
                .any(|l| l.starts_with(ch) && l.contains(" ok: ")),
            "{ch}: {stdout}"
        );
    }
    // The email, read by Python's email package.
    let files = smtp.messages();
    assert_eq!(files.len(), 1);
    let parsed = parse_eml(&files[0]);
    assert_eq!(one_header(&parsed, "Subject"), "Test message from outrider");
    // The webhook, its signature checked with Python's hmac.
    let reqs = hook.log("requests.jsonl");
    assert_eq!(reqs.len(), 1);
    assert_eq!(reqs[0]["signature_ok"], true);
    // A wrong SMTP port: that channel fails, exit code 1.
    let bad = write_config(
        dir.path(),
        mosquitto.port,
        false,
        &extra.replace(
            &format!("port = {}", smtp.port),
            &format!("port = {}", free_port()),
        ),
    );
    let out = Command::new(BIN)
        .args([
            "send-test",
            "-c",
            bad.to_str().unwrap(),
            "--subscriber",
            "bellbird",
        ])
        .env("TEST_HOOK_SECRET", "s3cret-for-test")
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(1));
    assert!(String::from_utf8_lossy(&out.stdout).contains("email    FAILED"));
}
