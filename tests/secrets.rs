//! Secrets: a world-readable secret file and a world-readable config that
//! holds a secret get a warning at `check` and at start; and no secret
//! reaches the logs. The daemon runs with every kind of secret set (MQTT
//! password, SMTP password from a file, webhook signing secret, a token in
//! the webhook URL, admin token), against a Mosquitto and an SMTP server
//! that check the passwords and a webhook receiver that checks the
//! signature, through a failed and a successful delivery, at log level
//! trace (the most detailed) for every crate; then its whole log is
//! searched for each secret and its base64 forms (SMTP AUTH PLAIN and LOGIN
//! send base64: RFC 4616, and the LOGIN draft, from memory).

use crate::delivery::Sink;
use crate::util::*;
use base64::Engine;
use chrono::Duration;
use outrider::clock::{Clock, SystemClock};
use std::os::unix::fs::PermissionsExt;
use std::process::Command;

const MQTT_PW: &str = "mqtt-Pw-3f9a1c";
const SMTP_PW: &str = "smtp-Pw-77b2e0";
const HOOK_SECRET: &str = "hook-Secret-c41d";
const URL_TOKEN: &str = "url-Token-9e8f";
// At least 32 bytes: the config refuses a shorter admin token.
const ADMIN_TOKEN: &str = "admin-Token-05aa-7c1e9d3b40f26a58e0";

/// Each secret and the forms it travels in.
fn forms() -> Vec<(String, &'static str)> {
    let b64 = |s: &str| base64::engine::general_purpose::STANDARD.encode(s);
    vec![
        (MQTT_PW.to_string(), "MQTT password"),
        (SMTP_PW.to_string(), "SMTP password"),
        (b64(SMTP_PW), "SMTP password, base64 (AUTH LOGIN)"),
        (b64(&format!("\0notices\0{SMTP_PW}")), "SMTP AUTH PLAIN"),
        (HOOK_SECRET.to_string(), "webhook secret"),
        (URL_TOKEN.to_string(), "token in the webhook URL"),
        (ADMIN_TOKEN.to_string(), "admin token"),
    ]
}

fn assert_no_secret(what: &str, text: &str) {
    for (s, name) in forms() {
        assert!(!text.contains(&s), "{name} in {what}");
    }
}

fn chmod(p: &std::path::Path, mode: u32) {
    std::fs::set_permissions(p, std::fs::Permissions::from_mode(mode)).unwrap();
}

#[test]
fn readable_secrets_are_warned_about_and_no_secret_reaches_the_log() {
    let dir = tempfile::tempdir().unwrap();
    let mosquitto = Mosquitto::start_with_password(dir.path(), "outrider", MQTT_PW);
    let smtp = Sink::smtp(
        &dir.path().join("smtp"),
        &[
            "--auth",
            &format!("notices:{SMTP_PW}"),
            "--auth-without-tls",
        ],
    );
    let hook = Sink::webhook(
        &dir.path().join("hook"),
        &["--secret", HOOK_SECRET, "--statuses", "500,200"],
    );
    let pw_file = dir.path().join("smtp-password");
    std::fs::write(&pw_file, format!("{SMTP_PW}\n")).unwrap();
    let extra = format!(
        r#"
[smtp]
host = "127.0.0.1"
port = {}
security = "none"
from = "outrider <notices@kellerby.example>"
username = "notices"
password_file = "{}"

[delivery]
retry_first_seconds = 1
retry_max_seconds = 2

[web]
admin_token_env = "OUTRIDER_TEST_ADMIN_TOKEN"

[[subscriber]]
id = "stonecroft"
name = "Stonecroft"
email = "owner@stonecroft.example"
area = "all"
webhook = {{ url = "http://127.0.0.1:{}/hook?token={URL_TOKEN}", secret_env = "OUTRIDER_TEST_HOOK_SECRET" }}
  [[subscriber.watch]]
  name = "dogs"
  trigger = "presence"
  species = ["Canis familiaris"]
  channels = ["email", "webhook"]
"#,
        smtp.port,
        pw_file.display(),
        hook.port
    );
    let cfg = write_config(dir.path(), mosquitto.port, false, &extra);
    let text = std::fs::read_to_string(&cfg).unwrap().replace(
        "client_id = \"outridertest\"",
        "client_id = \"outridertest\"\nusername = \"outrider\"\npassword_env = \"OUTRIDER_TEST_MQTT_PW\"",
    );
    std::fs::write(&cfg, text).unwrap();
    let env = [
        ("OUTRIDER_TEST_MQTT_PW", MQTT_PW),
        ("OUTRIDER_TEST_HOOK_SECRET", HOOK_SECRET),
        ("OUTRIDER_TEST_ADMIN_TOKEN", ADMIN_TOKEN),
    ];
    let check = |mode_cfg: u32, mode_pw: u32| {
        chmod(&cfg, mode_cfg);
        chmod(&pw_file, mode_pw);
        let out = Command::new(BIN)
            .args(["check", "-c"])
            .arg(&cfg)
            .envs(env)
            .output()
            .unwrap();
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        let stdout = String::from_utf8_lossy(&out.stdout).to_string();
        assert_no_secret("check's output", &stdout);
        assert_no_secret("check's errors", &String::from_utf8_lossy(&out.stderr));
        stdout
    };

    // Private files: no warning.
    let quiet = check(0o640, 0o600);
    assert!(!quiet.contains("readable by every user"), "{quiet}");
    // Readable by everyone: one warning for each.
    let loud = check(0o644, 0o644);
    assert!(
        loud.contains(&format!(
            "smtp.password_file: the secret file {} is readable by every user on this machine (mode 0644)",
            pw_file.display()
        )),
        "{loud}"
    );
    assert!(
        loud.contains(&format!(
            "{} is readable by every user on this machine (mode 0644) and holds a secret (subscriber `stonecroft` webhook.url",
            cfg.display()
        )),
        "{loud}"
    );

    // The daemon, at trace level for every crate, with both still readable.
    let mut env_trace = env.to_vec();
    env_trace.push(("RUST_LOG", "trace"));
    let mut daemon = Daemon::start_with_env(&cfg, &env_trace);
    let msgs = [Msg {
        topic: "outrider/KB-01/observation".into(),
        payload: serde_json::json!({"observationID": "s1", "deploymentID": "KB-01", "eventStart": (SystemClock.now() - Duration::hours(1)).to_rfc3339(), "observationType": "animal", "scientificName": "Canis familiaris"}).to_string().into_bytes(),
    }];
    let corpus = dir.path().join("one.jsonl");
    write_corpus(&corpus, &msgs);
    publish_corpus_as(
        mosquitto.port,
        &corpus,
        0,
        "secretpublisher",
        0.0,
        Some(("outrider", MQTT_PW)),
    );
    wait_for(
        std::time::Duration::from_secs(30),
        "the email (after AUTH) and the webhook (500, then 200)",
        || {
            let s = status_of(&dir.path().join("state"));
            (s["deliveries"]["sent"] == 2).then_some(())
        },
    );
    // The receivers saw the secrets work: SMTP AUTH as `notices`, the
    // signature checked by Python's hmac, the URL token arrived.
    let auth: Vec<_> = smtp
        .log("attempts.jsonl")
        .into_iter()
        .filter(|a| a["code"] == 250)
        .collect();
    assert_eq!(auth.len(), 1);
    assert_eq!(auth[0]["auth_user"], "notices");
    let reqs = hook.log("requests.jsonl");
    assert_eq!(reqs.len(), 2);
    assert!(reqs.iter().all(|r| r["signature_ok"] == true));
    assert!(reqs[0]["path"]
        .as_str()
        .unwrap()
        .ends_with(&format!("token={URL_TOKEN}")));
    let (exit, _) = daemon.stop();
    assert!(exit.success());

    let log = daemon.log_text();
    assert!(
        log.contains("Delivery failed; will retry"),
        "the failed attempt was logged"
    );
    assert!(
        log.contains("readable by every user"),
        "the warnings at start"
    );
    assert!(
        log.contains("\"level\":\"TRACE\""),
        "trace lines were written"
    );
    assert_no_secret("the daemon's log", &log);
}
