//! Fault tests (issue 7): nothing is lost, nothing is done twice.
//!
//! Each test runs the real binary against a real Mosquitto 2 (persistence
//! on), a real SMTP server (aiosmtpd, `tests/clients/smtp_sink.py`), a real
//! HTTP receiver (`tests/clients/webhook_sink.py`) and a real SQLite file,
//! then breaks one thing: `kill -9` of outrider at random moments, Mosquitto
//! restarts, receivers away, a full disk, SIGTERM under load. What was
//! published is judged by what the broker acknowledged to an independent
//! client (paho-mqtt), what the receivers got by their own records, and the
//! notices by a second run of the same messages without faults.
//!
//! Sizes are chosen to run in about 3 minutes here (2 shared cores); the
//! knobs below (environment variables) make the same tests longer, and
//! `tests/soak.sh` sets them. A failing run prints its seed; set
//! `OUTRIDER_FAULT_SEED` to repeat its kill moments and its load.

use crate::delivery::Sink;
use crate::util::*;
use chrono::{DateTime, Duration, Utc};
use outrider::clock::{Clock, SystemClock};
use std::collections::{BTreeMap, BTreeSet};
use std::path::Path;
use std::time::{Duration as StdDuration, Instant};

// ------------------------------------------------------------------ knobs

fn knob(name: &str, default: u64) -> u64 {
    std::env::var(name)
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(default)
}

/// The seed of this run: `OUTRIDER_FAULT_SEED`, else from the clock.
fn seed(test: &str) -> u64 {
    let s = std::env::var("OUTRIDER_FAULT_SEED")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or_else(|| SystemClock.now().timestamp_micros() as u64);
    eprintln!("{test}: OUTRIDER_FAULT_SEED={s}");
    s
}

/// A small pseudo-random sequence (64-bit linear congruential generator
/// with Knuth's MMIX multiplier and increment, from memory), so a seed
/// fixes the load and the kill moments.
struct Lcg(u64);

impl Lcg {
    fn next(&mut self) -> u64 {
        self.0 = self
            .0
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        self.0 >> 33
    }
    fn below(&mut self, n: u64) -> u64 {
        self.next() % n
    }
}

// ------------------------------------------------------------------- load

const SPECIES: [&str; 5] = [
    "Canis familiaris",
    "Vulpes vulpes",
    "Felis catus",
    "Sus scrofa",
    "Macropus giganteus",
];

fn ts(t: DateTime<Utc>) -> String {
    t.with_timezone(&chrono_tz::Australia::Sydney).to_rfc3339()
}

/// `n` distinct observations over the 20 days before `now`, in time order,
/// at the four harness sites, of five species, one in 50 a person (stored
/// as a count only). Gaps are random, so events of one species at one
/// camera are sometimes closer than the 30-minute independence interval and
/// sometimes not.
fn load(n: usize, rng: &mut Lcg, now: DateTime<Utc>) -> Vec<Msg> {
    let span_ms = 20 * 24 * 3600 * 1000;
    let mut times: Vec<i64> = (0..n).map(|_| rng.below(span_ms as u64) as i64).collect();
    times.sort_unstable();
    let start = now - Duration::days(20) - Duration::minutes(30);
    times
        .into_iter()
        .enumerate()
        .map(|(i, ms)| {
            let dep = format!("KB-0{}", 1 + rng.below(4));
            let at = ts(start + Duration::milliseconds(ms));
            let id = format!("load-{i:05}");
            let payload = if rng.below(50) == 0 {
                serde_json::json!({"observationID": id, "deploymentID": dep, "eventStart": at, "observationType": "human"})
            } else {
                let species = SPECIES[rng.below(5) as usize];
                let p = 0.80 + rng.below(20) as f64 / 100.0;
                serde_json::json!({"observationID": id, "deploymentID": dep, "eventStart": at, "observationType": "animal", "scientificName": species, "count": 1 + rng.below(3), "classificationProbability": p})
            };
            Msg {
                topic: format!("outrider/{dep}/observation"),
                payload: payload.to_string().into_bytes(),
            }
        })
        .collect()
}

/// Subscribers that exercise the fatigue policy (cooldowns, an hourly cap,
/// first-seen, spike) on email and on a signed webhook, with short retries.
fn subscribers(smtp_port: u16, hook_port: u16) -> String {
    format!(
        r#"
[smtp]
host = "127.0.0.1"
port = {smtp_port}
security = "none"
from = "outrider <notices@kellerby.example>"

[delivery]
retry_first_seconds = 1
retry_max_seconds = 2

[species.groups]
predators = ["Canis familiaris", "Vulpes vulpes", "Felis catus"]

[[subscriber]]
id = "stonecroft"
name = "Stonecroft"
email = "owner@stonecroft.example"
max_per_hour = 6
area = {{ lat = -31.49179, lon = 148.05781, radius_km = 10.0 }}
  [[subscriber.watch]]
  name = "predators"
  trigger = "presence"
  species = ["@predators"]
  cooldown_minutes = 120
  channels = ["email"]
  [[subscriber.watch]]
  name = "pigs back"
  trigger = "first-seen"
  species = ["Sus scrofa"]
  quiet_days = 3
  cooldown_minutes = 0
  channels = ["email"]

[[subscriber]]
id = "coordinator"
name = "Kellerby Basin pest office"
email = "pests@kellerby.example"
max_per_hour = 10000
area = {{ sites = ["KB-01", "KB-02"] }}
webhook = {{ url = "http://127.0.0.1:{hook_port}/hook", secret_env = "OUTRIDER_TEST_HOOK_SECRET" }}
  [[subscriber.watch]]
  name = "cats"
  trigger = "presence"
  species = ["Felis catus"]
  cooldown_minutes = 0
  channels = ["webhook"]
  [[subscriber.watch]]
  name = "pig spike"
  trigger = "spike"
  species = ["Sus scrofa"]
  window_hours = 24
  ratio = 2.0
  min_count = 3
  cooldown_minutes = 0
  channels = ["webhook", "email"]
"#
    )
}

const HOOK_SECRET: &str = "kellerby-test-hook-secret";

// ---------------------------------------------------------- what happened

fn db(dir: &Path) -> rusqlite::Connection {
    rusqlite::Connection::open(dir.join("state/outrider.db")).unwrap()
}

/// Every notice decision: id -> (disposition, ids of the events it carries).
fn decisions(dir: &Path) -> BTreeMap<String, (String, Vec<String>)> {
    let c = db(dir);
    let mut stmt = c
        .prepare("SELECT id, disposition, notice FROM notices")
        .unwrap();
    let rows = stmt
        .query_map([], |r| {
            Ok((
                r.get::<_, String>(0)?,
                r.get::<_, String>(1)?,
                r.get::<_, String>(2)?,
            ))
        })
        .unwrap();
    rows.map(|r| {
        let (id, disposition, notice) = r.unwrap();
        let v: serde_json::Value = serde_json::from_str(&notice).unwrap();
        let folded = v["folded"]
            .as_array()
            .map(|a| {
                a.iter()
                    .map(|f| f["event_id"].as_str().unwrap_or("").to_string())
                    .collect()
            })
            .unwrap_or_default();
        (id, (disposition, folded))
    })
    .collect()
}

/// Deliveries: (notice id, channel) -> state.
fn deliveries(dir: &Path) -> BTreeMap<(String, String), String> {
    let c = db(dir);
    let mut stmt = c
        .prepare("SELECT notice_id, channel, state FROM deliveries")
        .unwrap();
    let rows = stmt
        .query_map([], |r| Ok(((r.get(0)?, r.get(1)?), r.get(2)?)))
        .unwrap();
    rows.map(|r| r.unwrap()).collect()
}

/// The observation ids stored, with how often each is there.
fn stored_ids(dir: &Path) -> BTreeMap<String, u64> {
    let c = db(dir);
    let mut stmt = c
        .prepare("SELECT observation_id, count(*) FROM observations GROUP BY observation_id")
        .unwrap();
    let rows = stmt
        .query_map([], |r| Ok((r.get(0)?, r.get::<_, i64>(1)? as u64)))
        .unwrap();
    rows.map(|r| r.unwrap()).collect()
}

fn corpus_ids(msgs: &[Msg]) -> BTreeSet<String> {
    msgs.iter()
        .map(|m| {
            let v: serde_json::Value = serde_json::from_slice(&m.payload).unwrap();
            v["observationID"].as_str().unwrap().to_string()
        })
        .collect()
}

/// Message-IDs of the messages the SMTP server accepted, with counts (the
/// header as the server stored it: RFC 5322 §3.6.4).
fn message_ids(sink_dir: &Path) -> BTreeMap<String, u64> {
    let mut out = BTreeMap::new();
    for entry in std::fs::read_dir(sink_dir).unwrap() {
        let p = entry.unwrap().path();
        if p.extension().is_none_or(|x| x != "eml") {
            continue;
        }
        let text = String::from_utf8_lossy(&std::fs::read(&p).unwrap()).to_string();
        let id = text
            .lines()
            .take_while(|l| !l.is_empty())
            .find_map(|l| {
                let (name, value) = l.split_once(':')?;
                name.eq_ignore_ascii_case("message-id")
                    .then(|| value.trim().to_string())
            })
            .unwrap_or_else(|| panic!("no Message-ID in {}", p.display()));
        *out.entry(id).or_default() += 1;
    }
    out
}

/// Idempotency-Keys of the webhook requests the receiver answered with
/// 2xx, with counts, and whether every signature checked out (Python's
/// hmac, in the receiver).
fn webhook_keys(sink: &Sink) -> (BTreeMap<String, u64>, bool) {
    let mut out = BTreeMap::new();
    let mut all_signed = true;
    for req in sink.log("requests.jsonl") {
        let ok = req["status"]
            .as_u64()
            .is_some_and(|s| (200..300).contains(&s));
        all_signed &= req["signature_ok"] == true;
        if !ok {
            continue;
        }
        let key = req["headers"]
            .as_array()
            .unwrap()
            .iter()
            .find(|h| {
                h[0].as_str()
                    .unwrap()
                    .eq_ignore_ascii_case("idempotency-key")
            })
            .map(|h| h[1].as_str().unwrap().to_string())
            .expect("an Idempotency-Key header");
        *out.entry(key).or_default() += 1;
    }
    (out, all_signed)
}

/// Deliveries the daemon said it sends again because a kill fell between
/// an attempt and its record: (notice id, channel) -> times.
fn reclaimed(daemon: &Daemon) -> BTreeMap<(String, String), u64> {
    let mut out = BTreeMap::new();
    for l in daemon.log_lines() {
        if l["message"]
            .as_str()
            .is_some_and(|m| m.starts_with("A delivery was under way"))
        {
            let key = (
                l["notice"].as_str().unwrap().to_string(),
                l["channel"].as_str().unwrap().to_string(),
            );
            *out.entry(key).or_default() += 1;
        }
    }
    out
}

fn wait_stored(cfg: &Path, want: u64, limit: u64, what: &str) -> serde_json::Value {
    wait_for(StdDuration::from_secs(limit), what, || {
        let s = status_of(&cfg.with_file_name("state"));
        (n(&s, "observations_stored") >= want).then_some(s)
    })
}

/// Waits until the outbox is empty and the sent count stops moving.
fn wait_outbox_settled(cfg: &Path, limit: u64) -> serde_json::Value {
    let mut last = None;
    wait_for(
        StdDuration::from_secs(limit),
        "the outbox to settle",
        || {
            let s = status_of(&cfg.with_file_name("state"));
            let sent = s["deliveries"]["sent"].as_u64().unwrap_or(0);
            let settled = n(&s, "outbox_pending") == 0 && last == Some(sent);
            last = Some(sent);
            if !settled {
                std::thread::sleep(StdDuration::from_millis(700));
            }
            settled.then_some(s)
        },
    )
}

/// One run of the load against a fresh broker, receivers and store.
struct Setup {
    dir: tempfile::TempDir,
    mosquitto: Mosquitto,
    smtp: Sink,
    hook: Sink,
    cfg: std::path::PathBuf,
}

fn setup() -> Setup {
    let dir = tempfile::tempdir().unwrap();
    let mosquitto = Mosquitto::start(dir.path());
    let smtp = Sink::smtp(&dir.path().join("smtp"), &[]);
    let hook = Sink::webhook(&dir.path().join("hook"), &["--secret", HOOK_SECRET]);
    let cfg = write_config(
        dir.path(),
        mosquitto.port,
        false,
        &subscribers(smtp.port, hook.port),
    );
    Setup {
        dir,
        mosquitto,
        smtp,
        hook,
        cfg,
    }
}

impl Drop for Setup {
    /// With `OUTRIDER_FAULT_KEEP_LOG=1`, keeps the daemon's and the broker's
    /// logs (every `*.log` under the run's directory) as
    /// `/tmp/outrider-fault-<pid>-<path>.log`, for a failure or a figure
    /// that needs explaining after the temporary directory is gone.
    fn drop(&mut self) {
        if std::env::var_os("OUTRIDER_FAULT_KEEP_LOG").is_none() {
            return;
        }
        let mut todo = vec![self.dir.path().to_path_buf()];
        while let Some(d) = todo.pop() {
            let Ok(entries) = std::fs::read_dir(&d) else {
                continue;
            };
            for e in entries.flatten() {
                let p = e.path();
                if p.is_dir() {
                    todo.push(p);
                } else if p.extension().is_some_and(|x| x == "log") {
                    let rel = p.strip_prefix(self.dir.path()).unwrap_or(&p);
                    let name = rel.to_string_lossy().replace('/', "-");
                    let to = format!("/tmp/outrider-fault-{}-{name}", std::process::id());
                    match std::fs::copy(&p, &to) {
                        Ok(_) => eprintln!("kept {}", to),
                        Err(e) => eprintln!("could not keep {}: {e}", p.display()),
                    }
                }
            }
        }
    }
}

fn start(s: &Setup) -> Daemon {
    Daemon::start_with_env(&s.cfg, &[("OUTRIDER_TEST_HOOK_SECRET", HOOK_SECRET)])
}

// ------------------------------------------------------------------ tests

/// 1. `kill -9` of the daemon at 20 random moments during a 10,000
///    observation QoS 1 load through Mosquitto (persistence on). Afterwards:
///    every observation is stored exactly once; the notice decisions are
///    exactly those of a run of the same messages without kills; every
///    notice to send was sent; and no receiver got one twice, except where
///    the daemon logged that a kill fell between an attempt and its record,
///    and then with the same Message-ID / Idempotency-Key.
#[test]
fn kill_9_twenty_times_under_load_loses_nothing_and_repeats_nothing() {
    let seed = seed("kill_9_twenty_times");
    let mut rng = Lcg(seed);
    let n_obs = knob("OUTRIDER_FAULT_OBSERVATIONS", 10_000) as usize;
    let kills = knob("OUTRIDER_FAULT_KILLS", 20);
    let rate = knob("OUTRIDER_FAULT_RATE", 160) as f64;
    let msgs = load(n_obs, &mut rng, SystemClock.now());

    // The same messages without faults: the decisions to expect.
    let clean = setup();
    let corpus = clean.dir.path().join("load.jsonl");
    write_corpus(&corpus, &msgs);
    let mut daemon = start(&clean);
    let r = publish_corpus(clean.mosquitto.port, &corpus, 0, "cleanpublisher");
    assert_eq!(r["published"], n_obs as u64);
    wait_stored(
        &clean.cfg,
        n_obs as u64,
        120,
        "the clean run to store the load",
    );
    let clean_status = wait_outbox_settled(&clean.cfg, 120);
    daemon.stop();
    let want = decisions(clean.dir.path());
    let want_deliveries = deliveries(clean.dir.path());
    assert!(
        want.values().filter(|(d, _)| d == "sent").count() > 50
            && want.values().any(|(d, _)| d == "folded")
            && want.values().any(|(d, _)| d == "deferred"),
        "the load exercises sending, folding and the hourly cap: {clean_status}"
    );

    // Now with kills.
    let run = setup();
    let corpus = run.dir.path().join("load.jsonl");
    write_corpus(&corpus, &msgs);
    let mut daemon = start(&run);
    let port = run.mosquitto.port;
    let publisher =
        std::thread::spawn(move || publish_corpus_at(port, &corpus, 0, "killpublisher", rate));
    let started = Instant::now();
    // The load lasts n / rate seconds; the kills are spread over it at
    // random, each after 30 % to 100 % of the time left per kill to come,
    // so they all fall during the load even when restarts are slow.
    let load_ends = started + StdDuration::from_secs_f64(n_obs as f64 / rate);
    let mut at_kill = Vec::new();
    for k in 0..kills {
        let left = load_ends.saturating_duration_since(Instant::now());
        let share = left / (kills - k + 1) as u32;
        let pause = share.mul_f64(0.3 + rng.below(700) as f64 / 1000.0);
        std::thread::sleep(pause.max(StdDuration::from_millis(100)));
        at_kill.push(n(
            &status_of(&run.cfg.with_file_name("state")),
            "observations_stored",
        ));
        daemon.restart(); // SIGKILL, then start again and wait for the broker
    }
    let load_still_running = !publisher.is_finished();
    eprintln!(
        "{kills} kills in {:.1} s; stored at each kill: {at_kill:?}",
        started.elapsed().as_secs_f64()
    );
    let r = publisher.join().unwrap();
    assert_eq!(
        r["published"], n_obs as u64,
        "the broker took the whole load"
    );
    assert!(
        load_still_running && *at_kill.last().unwrap() < n_obs as u64,
        "every kill fell during the load (stored at each kill: {at_kill:?})"
    );

    let s = wait_stored(
        &run.cfg,
        n_obs as u64,
        120,
        "every observation after the last restart",
    );
    wait_outbox_settled(&run.cfg, 120);

    // Every observation exactly once, and only those published.
    let ids = stored_ids(run.dir.path());
    assert_eq!(ids.len(), n_obs, "{s}");
    assert!(ids.values().all(|&c| c == 1));
    assert_eq!(
        ids.keys().cloned().collect::<BTreeSet<_>>(),
        corpus_ids(&msgs)
    );
    assert_eq!(n(&s, "observations_stored"), n_obs as u64);
    assert_eq!(rejected_total(&s), 0, "{s}");
    eprintln!(
        "duplicates ignored (redelivered after a kill): {}",
        n(&s, "duplicates_ignored")
    );

    // The same decisions as the run without kills, each stored once (the
    // notice id is the primary key).
    let got = decisions(run.dir.path());
    let missing: Vec<_> = want.keys().filter(|k| !got.contains_key(*k)).collect();
    let extra: Vec<_> = got.keys().filter(|k| !want.contains_key(*k)).collect();
    assert!(
        missing.is_empty() && extra.is_empty(),
        "missing {missing:?}, extra {extra:?}"
    );
    let differing: Vec<_> = want
        .iter()
        .filter(|(k, v)| got.get(*k) != Some(v))
        .map(|(k, v)| (k, v, got.get(k)))
        .collect();
    assert!(
        differing.is_empty(),
        "{} of {} decisions differ: {differing:?}",
        differing.len(),
        want.len()
    );
    let got_deliveries = deliveries(run.dir.path());
    assert_eq!(got_deliveries, want_deliveries);
    assert!(got_deliveries.values().all(|s| s == "sent"));

    // At the receivers: every delivery arrived, none twice unless the
    // daemon said why.
    let again = reclaimed(&daemon);
    let mids = message_ids(&run.smtp.dir);
    let (keys, all_signed) = webhook_keys(&run.hook);
    assert!(
        all_signed,
        "every webhook carried a signature Python accepts"
    );
    let mut repeats = 0;
    for ((notice, channel), _) in want_deliveries.iter() {
        let count = match channel.as_str() {
            "email" => mids
                .get(&format!("<{notice}@kellerby.example>"))
                .copied()
                .unwrap_or(0),
            "webhook" => keys.get(notice).copied().unwrap_or(0),
            other => panic!("channel {other}"),
        };
        let explained = again
            .get(&(notice.clone(), channel.clone()))
            .copied()
            .unwrap_or(0);
        assert!(count >= 1, "{channel} delivery of {notice} never arrived");
        assert!(
            count - 1 <= explained,
            "{channel} delivery of {notice} arrived {count} times; the daemon reported {explained} interrupted attempt(s)"
        );
        repeats += count - 1;
    }
    assert_eq!(
        mids.values().sum::<u64>() + keys.values().sum::<u64>(),
        want_deliveries.len() as u64 + repeats,
        "nothing arrived that was not a delivery"
    );
    eprintln!(
        "deliveries: {} ({} email, {} webhook); repeated at a receiver after a kill between attempt and record: {repeats}; attempts reclaimed at start: {}",
        want_deliveries.len(),
        mids.len(),
        keys.len(),
        again.values().sum::<u64>()
    );
    let (exit, _) = daemon.stop();
    assert!(exit.success());
}

/// 2. Mosquitto, with deploy/mosquitto.conf's durability settings, stopped
///    and started three times while a QoS 1 load goes through it: every
///    observation the broker acknowledged to the publisher is stored once.
#[test]
fn mosquitto_restarted_three_times_mid_load_loses_nothing() {
    let seed = seed("mosquitto_restarted");
    let mut rng = Lcg(seed);
    let n_obs = knob("OUTRIDER_FAULT_BROKER_OBSERVATIONS", 6_000) as usize;
    let dir = tempfile::tempdir().unwrap();
    let mut mosquitto = Mosquitto::start_deploy(dir.path());
    let conf = mosquitto.conf();
    for needed in [
        "persistence true",
        "autosave_on_changes true",
        "max_queued_messages 0",
    ] {
        assert!(conf.contains(needed), "{needed} in:\n{conf}");
    }
    let cfg = write_config(dir.path(), mosquitto.port, false, "");
    let mut daemon = Daemon::start(&cfg);
    let msgs = load(n_obs, &mut rng, SystemClock.now());
    let corpus = dir.path().join("load.jsonl");
    write_corpus(&corpus, &msgs);
    let port = mosquitto.port;
    let publisher =
        std::thread::spawn(move || publish_corpus_at(port, &corpus, 0, "restartpublisher", 700.0));
    let mut at_restart = Vec::new();
    for _ in 0..3 {
        std::thread::sleep(StdDuration::from_millis(1500 + rng.below(1500)));
        at_restart.push(n(
            &status_of(&cfg.with_file_name("state")),
            "observations_stored",
        ));
        mosquitto.restart(); // SIGTERM (Mosquitto saves), then start again
    }
    let load_still_running = !publisher.is_finished();
    let r = publisher.join().unwrap();
    assert_eq!(
        r["published"], n_obs as u64,
        "the publisher got every PUBACK"
    );
    assert!(
        load_still_running && at_restart[2] < n_obs as u64,
        "the restarts fell during the load (stored at each: {at_restart:?})"
    );
    let s = wait_stored(
        &cfg,
        n_obs as u64,
        120,
        "every observation after the restarts",
    );
    let ids = stored_ids(dir.path());
    assert_eq!(ids.len(), n_obs, "{s}");
    assert_eq!(
        ids.keys().cloned().collect::<BTreeSet<_>>(),
        corpus_ids(&msgs)
    );
    assert_eq!(rejected_total(&s), 0, "{s}");
    let log = daemon.log_text();
    assert!(
        log.matches("Connected to the MQTT broker").count() >= 4,
        "outrider reconnected after each restart"
    );
    eprintln!(
        "stored at each broker restart: {at_restart:?}; duplicates ignored: {}",
        n(&s, "duplicates_ignored")
    );
    let (exit, _) = daemon.stop();
    assert!(exit.success());
}

/// 3. The SMTP server away for a while and a webhook answering 500 before
///    200: once they answer, every notice is delivered exactly once, with a
///    restart of outrider in between. The retry waits come from
///    `[delivery]` (1 s doubling to 2 s here).
#[test]
fn receivers_away_then_back_get_everything_once() {
    let dir = tempfile::tempdir().unwrap();
    let mosquitto = Mosquitto::start(dir.path());
    let smtp_port = free_port(); // nothing listens there yet
    let hook = Sink::webhook(
        &dir.path().join("hook"),
        &[
            "--secret",
            HOOK_SECRET,
            "--statuses",
            "500,500,500,500,500,500,200",
        ],
    );
    let extra = format!(
        r#"
[smtp]
host = "127.0.0.1"
port = {smtp_port}
security = "none"
from = "outrider <notices@kellerby.example>"

[delivery]
retry_first_seconds = 1
retry_max_seconds = 2

[[subscriber]]
id = "stonecroft"
name = "Stonecroft"
email = "owner@stonecroft.example"
max_per_hour = 100
area = "all"
webhook = {{ url = "http://127.0.0.1:{}/hook", secret_env = "OUTRIDER_TEST_HOOK_SECRET" }}
  [[subscriber.watch]]
  name = "dogs"
  trigger = "presence"
  species = ["Canis familiaris"]
  cooldown_minutes = 0
  channels = ["email", "webhook"]
"#,
        hook.port
    );
    let cfg = write_config(dir.path(), mosquitto.port, false, &extra);
    let env = [("OUTRIDER_TEST_HOOK_SECRET", HOOK_SECRET)];
    let mut daemon = Daemon::start_with_env(&cfg, &env);
    // Eight dogs an hour apart: eight independent events, eight notices.
    let t0 = SystemClock.now() - Duration::hours(10);
    let msgs: Vec<Msg> = (0..8)
        .map(|i| {
            let p = serde_json::json!({"observationID": format!("dog-{i}"), "deploymentID": "KB-01", "eventStart": ts(t0 + Duration::hours(i)), "observationType": "animal", "scientificName": "Canis familiaris", "classificationProbability": 0.95});
            Msg {
                topic: "outrider/KB-01/observation".into(),
                payload: p.to_string().into_bytes(),
            }
        })
        .collect();
    let corpus = dir.path().join("dogs.jsonl");
    write_corpus(&corpus, &msgs);
    publish_corpus(mosquitto.port, &corpus, 0, "dogpublisher");

    // The SMTP server is away: every email fails (connection refused,
    // retriable) at least twice.
    let failed_email = |d: &Daemon| {
        d.log_lines()
            .iter()
            .filter(|l| l["message"] == "Delivery failed; will retry" && l["channel"] == "email")
            .count()
    };
    wait_for(
        StdDuration::from_secs(60),
        "16 failed email attempts",
        || (failed_email(&daemon) >= 16).then_some(()),
    );
    // Restart while the deliveries are pending: they survive it.
    daemon.restart();
    let s = status_of(&cfg.with_file_name("state"));
    assert!(n(&s, "outbox_pending") >= 8, "{s}");
    let smtp = Sink::start_at("smtp_sink.py", &dir.path().join("smtp"), smtp_port, &[]);
    let s = wait_for(StdDuration::from_secs(60), "all 16 deliveries", || {
        let s = status_of(&cfg.with_file_name("state"));
        (s["deliveries"]["sent"] == 16).then_some(s)
    });
    assert_eq!(n(&s, "outbox_pending"), 0, "{s}");
    assert!(s["deliveries"].get("failed").is_none(), "{s}");

    let db = db(dir.path());
    let notices: BTreeSet<String> = db
        .prepare("SELECT id FROM notices WHERE disposition = 'sent'")
        .unwrap()
        .query_map([], |r| r.get(0))
        .unwrap()
        .map(|r| r.unwrap())
        .collect();
    assert_eq!(notices.len(), 8);
    let min_email_attempts: i64 = db
        .query_row(
            "SELECT min(attempts) FROM deliveries WHERE channel = 'email'",
            [],
            |r| r.get(0),
        )
        .unwrap();
    // At least one refusal, then the delivery (the sixteen refusals above
    // are shared among the eight; sends run concurrently per channel).
    assert!(min_email_attempts >= 2, "a refusal, then the delivery");

    // Each email once at the SMTP server; each webhook answered 200 once,
    // after the first six requests got 500.
    std::thread::sleep(StdDuration::from_secs(2)); // a repeat would show by now
    let mids = message_ids(&smtp.dir);
    let want_mids: BTreeMap<String, u64> = notices
        .iter()
        .map(|id| (format!("<{id}@kellerby.example>"), 1))
        .collect();
    assert_eq!(mids, want_mids);
    let (keys, all_signed) = webhook_keys(&hook);
    assert!(all_signed);
    assert_eq!(keys, notices.iter().map(|id| (id.clone(), 1)).collect());
    let answered_500 = hook
        .log("requests.jsonl")
        .iter()
        .filter(|r| r["status"] == 500)
        .count();
    assert_eq!(answered_500, 6);
    let (exit, _) = daemon.stop();
    assert!(exit.success());
}

/// 5. SIGTERM while a load is arriving: outrider exits with status 0 within
///    5 s, and after a start nothing is missing.
#[test]
fn sigterm_under_load_exits_within_5_s_and_loses_nothing() {
    let seed = seed("sigterm_under_load");
    let mut rng = Lcg(seed);
    let n_obs = 10_000;
    let dir = tempfile::tempdir().unwrap();
    let mosquitto = Mosquitto::start(dir.path());
    let cfg = write_config(dir.path(), mosquitto.port, false, "");
    let mut daemon = Daemon::start(&cfg);
    let msgs = load(n_obs, &mut rng, SystemClock.now());
    let corpus = dir.path().join("load.jsonl");
    write_corpus(&corpus, &msgs);
    let port = mosquitto.port;
    let publisher = std::thread::spawn(move || publish_corpus(port, &corpus, 0, "termpublisher"));
    let at_stop = wait_for(
        StdDuration::from_secs(60),
        "part of the load stored",
        || {
            let stored = n(
                &status_of(&cfg.with_file_name("state")),
                "observations_stored",
            );
            (stored >= 1_000).then_some(stored)
        },
    );
    let (exit, took) = daemon.stop();
    let after_stop = n(
        &status_of(&cfg.with_file_name("state")),
        "observations_stored",
    );
    eprintln!(
        "SIGTERM with {at_stop} stored: exited {exit:?} in {} ms, {after_stop} stored",
        took.as_millis()
    );
    assert!(exit.success(), "exit status {exit:?}");
    assert!(took < StdDuration::from_secs(5), "took {took:?}");
    assert!(after_stop < n_obs as u64, "stopped under load");
    assert!(daemon.log_text().contains("Stopped"));
    // Start again at once: the load goes on arriving meanwhile.
    daemon.restart();
    let r = publisher.join().unwrap();
    assert_eq!(r["published"], n_obs as u64);
    let s = wait_stored(&cfg, n_obs as u64, 120, "the rest after the start");
    let ids = stored_ids(dir.path());
    assert_eq!(ids.len(), n_obs, "{s}");
    assert_eq!(
        ids.keys().cloned().collect::<BTreeSet<_>>(),
        corpus_ids(&msgs)
    );
    let (exit, _) = daemon.stop();
    assert!(exit.success());
}

// ------------------------------------------------------------ a full disk

/// A size-limited tmpfs mounted by the test; unmounted when dropped.
struct Tmpfs(std::path::PathBuf);

impl Tmpfs {
    /// `None` when this machine does not let the test mount (not root, or
    /// no CAP_SYS_ADMIN in a container).
    fn mount(at: &Path, size: &str) -> Option<Tmpfs> {
        std::fs::create_dir_all(at).unwrap();
        let out = std::process::Command::new("mount")
            .args([
                "-t",
                "tmpfs",
                "-o",
                &format!("size={size},mode=0700"),
                "tmpfs",
            ])
            .arg(at)
            .output()
            .ok()?;
        if !out.status.success() {
            eprintln!("mount: {}", String::from_utf8_lossy(&out.stderr).trim());
            return None;
        }
        Some(Tmpfs(at.to_path_buf()))
    }
}

impl Drop for Tmpfs {
    fn drop(&mut self) {
        let _ = std::process::Command::new("umount")
            .arg("-l")
            .arg(&self.0)
            .status();
    }
}

/// Fills the filesystem holding `path` with one file, to the last block.
fn fill(path: &Path) -> u64 {
    use std::io::Write;
    let mut f = std::fs::File::create(path).unwrap();
    let mut written = 0u64;
    for chunk in [1 << 20, 4096, 512] {
        let buf = vec![0u8; chunk];
        while f.write_all(&buf).is_ok() {
            written += chunk as u64;
        }
    }
    let _ = f.sync_all();
    written
}

/// Log lines of the daemon run in this test process (JSON, one a line).
static TEST_LOG: std::sync::Mutex<Vec<u8>> = std::sync::Mutex::new(Vec::new());

struct TestLog;

impl std::io::Write for TestLog {
    fn write(&mut self, b: &[u8]) -> std::io::Result<usize> {
        TEST_LOG.lock().unwrap().extend_from_slice(b);
        Ok(b.len())
    }
    fn flush(&mut self) -> std::io::Result<()> {
        Ok(())
    }
}

fn test_log_count(message: &str) -> usize {
    let log = String::from_utf8_lossy(&TEST_LOG.lock().unwrap()).to_string();
    log.lines()
        .filter_map(|l| serde_json::from_str::<serde_json::Value>(l).ok())
        .filter(|l| {
            l["message"]
                .as_str()
                .is_some_and(|m| m.starts_with(message))
        })
        .count()
}

/// The daemon (`app::run`, what `outrider run` runs) inside this process,
/// so the test can read its counters (`telemetry::Counters`).
struct InProcess {
    counters: std::sync::Arc<outrider::telemetry::Counters>,
    stop: Option<tokio::sync::oneshot::Sender<()>>,
    thread: Option<std::thread::JoinHandle<anyhow::Result<()>>>,
}

impl InProcess {
    fn start(config: &Path) -> InProcess {
        let cfg = outrider::config::load(config).unwrap();
        let (stop, stopped) = tokio::sync::oneshot::channel::<()>();
        let (tx, rx) = std::sync::mpsc::channel();
        let thread = std::thread::spawn(move || {
            let rt = tokio::runtime::Builder::new_multi_thread()
                .worker_threads(2)
                .enable_all()
                .build()
                .unwrap();
            rt.block_on(outrider::app::run(
                cfg,
                std::sync::Arc::new(SystemClock),
                async {
                    let _ = stopped.await;
                },
                move |r| {
                    let _ = tx.send(r.counters.clone());
                },
            ))
        });
        let counters = rx
            .recv_timeout(StdDuration::from_secs(30))
            .expect("the daemon to start");
        wait_for(StdDuration::from_secs(30), "the MQTT connection", || {
            counters.ready().then_some(())
        });
        InProcess {
            counters,
            stop: Some(stop),
            thread: Some(thread),
        }
    }

    /// Asks it to stop (as SIGTERM does) and waits; returns how long it took.
    fn stop(&mut self) -> StdDuration {
        let t = Instant::now();
        if let Some(s) = self.stop.take() {
            let _ = s.send(());
        }
        if let Some(h) = self.thread.take() {
            h.join().unwrap().unwrap();
        }
        t.elapsed()
    }
}

/// 4. The store on a small filesystem that fills up: outrider stops
///    acknowledging (the broker keeps the messages), reports not ready
///    (`Counters::store_writable`, `ready`), logs why, and resumes without
///    loss when space returns, both in the same process and across a stop
///    and start while the disk is full.
#[test]
fn a_full_disk_stops_acknowledging_and_resumes_without_loss() {
    let dir = tempfile::tempdir().unwrap();
    let state = dir.path().join("state");
    let Some(_tmpfs) = Tmpfs::mount(&state, "8m") else {
        eprintln!(
            "SKIPPED a_full_disk_stops_acknowledging_and_resumes_without_loss: this machine does not allow `mount -t tmpfs` (run the tests as root, or in a container with CAP_SYS_ADMIN, to run it)"
        );
        return;
    };
    let _ = tracing_subscriber::fmt()
        .json()
        .flatten_event(true)
        .with_writer(|| TestLog)
        .with_env_filter("info")
        .try_init();
    let mut rng = Lcg(seed("a_full_disk"));
    let msgs = load(4_000, &mut rng, SystemClock.now());
    let mosquitto = Mosquitto::start(dir.path()); // its own files are not on the tmpfs
    let cfg = write_config(dir.path(), mosquitto.port, false, "");
    let publish = |range: std::ops::Range<usize>, name: &str| {
        let file = dir.path().join(format!("{name}.jsonl"));
        write_corpus(&file, &msgs[range.clone()]);
        let r = publish_corpus(mosquitto.port, &file, 0, name);
        assert_eq!(r["published"], range.len() as u64);
    };
    let stored = || n(&status_of(&state), "observations_stored");

    let mut daemon = InProcess::start(&cfg);
    publish(0..1_000, "before");
    wait_for(StdDuration::from_secs(60), "1,000 stored", || {
        (stored() >= 1_000).then_some(())
    });
    assert!(daemon.counters.store_writable());

    // The disk fills; 2,000 more arrive.
    let filler = state.join("filler");
    let filled = fill(&filler);
    let refusals = test_log_count("Store cannot take writes");
    publish(1_000..3_000, "during");
    wait_for(
        StdDuration::from_secs(60),
        "the store to refuse writes",
        || (test_log_count("Store cannot take writes") > refusals).then_some(()),
    );
    assert!(!daemon.counters.store_writable(), "store_writable is false");
    assert!(!daemon.counters.ready(), "not ready");
    let held = stored();
    std::thread::sleep(StdDuration::from_secs(3));
    assert_eq!(
        stored(),
        held,
        "nothing more is committed (or acknowledged)"
    );
    assert!(held < 3_000, "the full disk stopped ingest at {held}");
    let log = String::from_utf8_lossy(&TEST_LOG.lock().unwrap()).to_string();
    assert!(log.contains("database or disk is full"), "the log says why");
    eprintln!("disk filled with {filled} bytes; {held} stored while full");

    // Space returns: the same process catches up.
    std::fs::remove_file(&filler).unwrap();
    wait_for(
        StdDuration::from_secs(90),
        "3,000 stored after space returns",
        || (stored() >= 3_000).then_some(()),
    );
    assert!(daemon.counters.store_writable() && daemon.counters.ready());
    assert!(test_log_count("Store takes writes again") >= 1);

    // Full again, and this time outrider is stopped while full and started
    // only after space returns: what it had in hand was never acknowledged,
    // so the broker still has it.
    let refusals = test_log_count("Store cannot take writes");
    fill(&filler);
    publish(3_000..4_000, "while-stopped");
    wait_for(
        StdDuration::from_secs(60),
        "the store to refuse writes again",
        || (test_log_count("Store cannot take writes") > refusals).then_some(()),
    );
    let took = daemon.stop();
    assert!(
        took < StdDuration::from_secs(6),
        "stop while full took {took:?}"
    );
    std::fs::remove_file(&filler).unwrap();
    let mut daemon = InProcess::start(&cfg);
    wait_for(
        StdDuration::from_secs(90),
        "all 4,000 after a start",
        || (stored() >= 4_000).then_some(()),
    );
    let ids = stored_ids(dir.path());
    assert_eq!(ids.len(), 4_000);
    assert_eq!(
        ids.keys().cloned().collect::<BTreeSet<_>>(),
        corpus_ids(&msgs)
    );
    assert_eq!(rejected_total(&status_of(&state)), 0);
    assert_eq!(
        test_log_count("Store failed"),
        0,
        "every refusal was taken as passing"
    );
    daemon.stop();
}
