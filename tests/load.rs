//! `outrider load` against a real Mosquitto: what it says it published
//! arrives, an independent client (Mosquitto's own mosquitto_sub) reads it
//! as Camtrap DP observations, and a running daemon decodes and stores every
//! one of them (none rejected). Short: a few hundred messages.

use crate::util::*;
use std::process::{Command, Stdio};
use std::time::Duration;

fn load(args: &[&str]) -> serde_json::Value {
    let out = Command::new(BIN)
        .arg("load")
        .args(args)
        .arg("--json")
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "outrider load failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).expect("load report")
}

/// mosquitto_sub reading `n` messages of `topic` (verbose: topic, then payload).
fn listen(port: u16, qos: &str, n: usize) -> std::process::Child {
    let child = Command::new("mosquitto_sub")
        .args(["-p", &port.to_string(), "-q", qos, "-v", "-W", "60"])
        .args(["-t", "outrider/+/observation", "-C", &n.to_string()])
        .stdout(Stdio::piped())
        .stderr(Stdio::inherit())
        .spawn()
        .expect("mosquitto_sub (Debian package mosquitto-clients; tests/run-all.sh installs it)");
    // Its subscription must exist before anything is published.
    std::thread::sleep(Duration::from_millis(500));
    child
}

/// Each line "topic payload" as (topic, JSON).
fn received(child: std::process::Child) -> Vec<(String, serde_json::Value)> {
    let out = child.wait_with_output().unwrap();
    assert!(out.status.success(), "mosquitto_sub timed out or failed");
    String::from_utf8(out.stdout)
        .unwrap()
        .lines()
        .map(|l| {
            let (topic, payload) = l.split_once(' ').unwrap();
            (topic.to_string(), serde_json::from_str(payload).unwrap())
        })
        .collect()
}

#[test]
fn load_messages_arrive_decode_and_are_stored() {
    let dir = tempfile::tempdir().unwrap();
    let mq = Mosquitto::start(dir.path());
    let url = format!("mqtt://127.0.0.1:{}", mq.port);
    let sites = dir.path().join("sites.csv");
    let out = Command::new(BIN)
        .args(["load", "--count", "0", "--write-sites"])
        .arg(&sites)
        .output()
        .unwrap();
    assert!(out.status.success());
    let cfg = dir.path().join("outrider.toml");
    std::fs::write(
        &cfg,
        format!("[service]\nstate_dir = \"state\"\ntimezone = \"Australia/Sydney\"\nshutdown_timeout_seconds = 5\n\n[mqtt]\nurl = \"{url}\"\nclient_id = \"outriderloadtest\"\nkeep_alive_seconds = 5\n\n[sites]\nfile = \"sites.csv\"\n"),
    )
    .unwrap();
    let _daemon = Daemon::start(&cfg);
    let count = 300;
    let sub = listen(mq.port, "1", count);
    let r = load(&["--url", &url, "--count", &count.to_string(), "--qos", "1"]);
    assert_eq!(r["published"], count);
    assert_eq!(r["observations"], count);
    assert_eq!(r["acknowledged"], count, "every QoS 1 publish acknowledged");
    assert_eq!(r["sites"], 16);

    // The independent client: n observations of the district's sites, with
    // the fields DESIGN.md "Messages" requires (Camtrap DP names).
    let msgs = received(sub);
    assert_eq!(msgs.len(), count);
    let known: Vec<String> = (1..=16).map(|i| format!("KB-{i:02}")).collect();
    for (topic, p) in &msgs {
        let dep = p["deploymentID"].as_str().unwrap();
        assert!(known.iter().any(|k| k == dep), "{dep}");
        assert_eq!(topic, &format!("outrider/{dep}/observation"));
        assert!(p["observationID"].as_str().is_some_and(|s| !s.is_empty()));
        chrono::DateTime::parse_from_rfc3339(p["eventStart"].as_str().unwrap()).unwrap();
        let kind = p["observationType"].as_str().unwrap();
        assert!(kind == "animal" || kind == "human", "{kind}");
        if kind == "animal" {
            assert!(p["scientificName"].as_str().unwrap().contains(' '));
        }
    }

    // The daemon decoded and stored every one; none rejected, no repeats.
    let s = wait_for(
        Duration::from_secs(30),
        "outrider to store the load",
        || {
            let s = status(&cfg);
            (n(&s, "observations_stored") >= count as u64).then_some(s)
        },
    );
    assert_eq!(n(&s, "observations_stored"), count as u64);
    assert_eq!(rejected_total(&s), 0, "{s}");
    assert_eq!(n(&s, "duplicates_ignored"), 0, "{s}");
}

#[test]
fn load_paces_to_the_rate_and_publishes_qos0_on_a_grid() {
    let dir = tempfile::tempdir().unwrap();
    let mq = Mosquitto::start(dir.path());
    let url = format!("mqtt://127.0.0.1:{}", mq.port);
    let count = 200;
    let sub = listen(mq.port, "0", count);
    let r = load(&[
        "--url",
        &url,
        "--count",
        &count.to_string(),
        "--qos",
        "0",
        "--rate",
        "400",
        "--grid-sites",
        "2500",
        "--id-prefix",
        "pace-",
    ]);
    assert_eq!(r["published"], count);
    assert_eq!(r["qos"], 0);
    assert_eq!(r["sites"], 2500);
    // Paced: 200 messages at 400/s take at least 0.5 s minus one interval,
    // however fast the machine is.
    assert!(r["seconds"].as_f64().unwrap() >= 0.49, "{r}");
    let msgs = received(sub);
    assert_eq!(msgs.len(), count);
    assert!(msgs.iter().all(|(_, p)| {
        p["observationID"].as_str().unwrap().starts_with("pace-KB-")
            && p["deploymentID"].as_str().unwrap().len() == 8
    }));
}
