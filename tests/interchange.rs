//! Open-standard interchange with the real binary: `outrider export
//! --camtrap-dp` checked by frictionless and jsonschema against the Camtrap
//! DP 1.0.2 schemas (offline copies in tests/reference/camtrap-dp/),
//! `outrider import` into a fresh state giving the same baselines (the
//! engine's own computation), `outrider replay` of a package folder,
//! `outrider report` against an independent Python count, and CAP 1.2
//! alerts checked by xmllint against the CAP XSD.
//!
//! The store the tests start from is made the way the daemon makes it: each
//! message through the engine, then committed with what the engine derived
//! (a real SQLite file). History: the invented Kellerby Basin sites of
//! `util::SITES`, 30 days in June 2026 (Australia/Sydney, AEST, UTC+10),
//! hourly heartbeats, and a camera (KB-04) silent for three days.

use crate::util::{python, repo, BIN, SITES};
use chrono::{DateTime, Duration, TimeZone, Utc};
use outrider::engine::Engine;
use outrider::model::{Correction, Heartbeat, Message, Observation, ObservationType};
use outrider::store::sqlite::{load_history, Durability, Sqlite};
use outrider::store::{Backend, Ingest};
use serde_json::Value;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::sync::Arc;

/// Local midnight 1 June 2026, Sydney (AEST, UTC+10).
fn t0() -> DateTime<Utc> {
    Utc.with_ymd_and_hms(2026, 5, 31, 14, 0, 0).unwrap()
}

const DAYS: i64 = 30;

/// KB-04 is silent from day 10 06:00 to day 13 06:00 (72 h > 36 h).
fn kb04_silent(t: DateTime<Utc>) -> bool {
    let a = t0() + Duration::days(10) + Duration::hours(6);
    t > a && t < a + Duration::hours(72)
}

fn config(dir: &Path, subscribers: &str) -> PathBuf {
    std::fs::create_dir_all(dir.join("mail")).unwrap();
    std::fs::write(dir.join("sites.csv"), SITES).unwrap();
    let cfg = format!(
        "[service]\nstate_dir = \"state\"\ntimezone = \"Australia/Sydney\"\npublic_url = \"https://outrider.kellerby.example\"\n\n\
         [sites]\nfile = \"sites.csv\"\nsilence_hours = 36\n\n\
         [detection]\nmin_probability = 0.5\nindependence_minutes = 30\n\n\
         [baseline]\nwindow_days = 14\nguard_days = 1\nprior_nights = 14\nalpha = 0.01\n\n\
         [email_folder]\ndir = \"mail\"\n\n{subscribers}"
    );
    let path = dir.join("outrider.toml");
    std::fs::write(&path, cfg).unwrap();
    path
}

/// A presence watch for dogs over the whole district, and a webhook (for
/// the CAP format option; nothing is sent in these tests).
const SUBSCRIBERS: &str = "[[subscriber]]\nid = \"stonecroft\"\nname = \"Stonecroft <& Sons>\"\nemail = \"owner@stonecroft.example\"\n\
area = { lat = -31.4963, lon = 148.0578, radius_km = 9.0 }\n\
[[subscriber.watch]]\nname = \"dogs & foxes\"\ntrigger = \"presence\"\nspecies = [\"Canis familiaris\", \"Vulpes vulpes\"]\ncooldown_minutes = 0\nchannels = [\"email\"]\n";

/// A small deterministic generator (an LCG; Knuth's MMIX constants).
struct Lcg(u64);
impl Lcg {
    fn next(&mut self, n: u64) -> u64 {
        self.0 = self
            .0
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (self.0 >> 33) % n
    }
}

fn animal(id: String, dep: &str, at: DateTime<Utc>, species: &str, count: u32) -> Message {
    Message::Observation(Observation {
        observation_id: id.clone(),
        deployment_id: dep.into(),
        event_start: at,
        event_end: None,
        observation_type: ObservationType::Animal,
        scientific_name: Some(species.into()),
        count,
        classification_probability: Some(0.9),
        classification_method: None,
        media_id: None,
        file_path: Some(format!("https://images.kellerby.example/{dep}/{id}.jpg")),
        vernacular_name: None,
        life_stage: None,
        sex: None,
        behavior: None,
    })
}

fn time_of(m: &Message) -> DateTime<Utc> {
    match m {
        Message::Observation(o) => o.event_start,
        Message::Heartbeat(h) => h.timestamp,
        Message::Correction(_) => DateTime::<Utc>::MIN_UTC,
    }
}

/// The history: hourly heartbeats from t0 to t0 + DAYS (inclusive), and
/// visits of three species, each a burst of one to three triggers two
/// minutes apart (one independent event), plus people, a vehicle, a
/// retraction and a relabel.
fn history() -> Vec<Message> {
    let sites = ["KB-01", "KB-02", "KB-03", "KB-04"];
    let species = ["Canis familiaris", "Vulpes vulpes", "Sus scrofa"];
    let mut rng = Lcg(20260601);
    let mut msgs = Vec::new();
    for h in 0..=(DAYS * 24) {
        let t = t0() + Duration::hours(h);
        for dep in sites {
            if dep == "KB-04" && kb04_silent(t) {
                continue;
            }
            msgs.push(Message::Heartbeat(Heartbeat {
                deployment_id: dep.into(),
                timestamp: t,
                battery_percent: Some(90.0),
                signal_dbm: Some(-71.0),
                images_since_last: Some(2),
            }));
        }
    }
    let mut n = 0;
    for day in 0..DAYS {
        for (si, dep) in sites.iter().enumerate() {
            // More visits later in the month at KB-02, so baselines differ.
            let visits = rng.next(3) + u64::from(si == 1 && day > 20) * 3;
            for _ in 0..visits {
                let at =
                    t0() + Duration::days(day) + Duration::minutes(30 + rng.next(22 * 60) as i64);
                if *dep == "KB-04" && kb04_silent(at) {
                    continue;
                }
                let sp = species[rng.next(3) as usize];
                let triggers = 1 + rng.next(3);
                for k in 0..triggers {
                    n += 1;
                    msgs.push(animal(
                        format!("o{n}"),
                        dep,
                        at + Duration::minutes(2 * k as i64),
                        sp,
                        1 + rng.next(3) as u32,
                    ));
                }
            }
        }
    }
    for (i, (kind, day)) in [
        (ObservationType::Human, 2),
        (ObservationType::Human, 5),
        (ObservationType::Vehicle, 5),
    ]
    .into_iter()
    .enumerate()
    {
        msgs.push(Message::Observation(
            Observation {
                observation_id: format!("p{i}"),
                deployment_id: "KB-01".into(),
                event_start: t0() + Duration::days(day) + Duration::hours(11),
                event_end: None,
                observation_type: kind,
                scientific_name: None,
                count: 1,
                classification_probability: None,
                classification_method: None,
                media_id: None,
                file_path: None,
                vernacular_name: None,
                life_stage: None,
                sex: None,
                behavior: None,
            }
            .redacted(),
        ));
    }
    msgs.sort_by_key(time_of);
    // A person retracted one trigger and relabelled another.
    msgs.push(Message::Correction(Correction {
        observation_id: "o3".into(),
        deployment_id: deployment_of(&msgs, "o3"),
        scientific_name: None,
        count: None,
        observation_type: Some(ObservationType::Blank),
    }));
    msgs.push(Message::Correction(Correction {
        observation_id: "o10".into(),
        deployment_id: deployment_of(&msgs, "o10"),
        scientific_name: Some("Felis catus".into()),
        count: Some(1),
        observation_type: None,
    }));
    msgs
}

fn deployment_of(msgs: &[Message], id: &str) -> String {
    msgs.iter()
        .find_map(|m| match m {
            Message::Observation(o) if o.observation_id == id => Some(o.deployment_id.clone()),
            _ => None,
        })
        .unwrap()
}

/// Makes the store in `dir/state` as the daemon would: each message through
/// the engine at its own time, committed with what the engine derived.
fn build_store(cfg_path: &Path, msgs: &[Message]) {
    let cfg = Arc::new(outrider::config::load(cfg_path).unwrap());
    let mut db = Sqlite::open(&cfg.service.state_dir, Durability::Normal).unwrap();
    let mut engine = Engine::new(cfg.clone());
    let mut last = t0();
    for m in msgs {
        let at = match m {
            Message::Correction(_) => last,
            other => time_of(other),
        };
        last = last.max(at);
        let derived = engine.apply(m, at);
        db.commit(
            &[Ingest::Message {
                message: m.clone(),
                received_at: at,
            }],
            &derived,
        )
        .unwrap();
    }
    db.close().unwrap();
}

fn run(args: &[&str]) -> Output {
    Command::new(BIN).args(args).output().unwrap()
}

fn ok(out: &Output) -> String {
    assert!(
        out.status.success(),
        "failed: {}\n{}",
        String::from_utf8_lossy(&out.stderr),
        String::from_utf8_lossy(&out.stdout)
    );
    String::from_utf8_lossy(&out.stdout).into_owned()
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

fn rfc(t: DateTime<Utc>) -> String {
    t.to_rfc3339()
}

/// tests/clients/camtrap_check.py: frictionless + jsonschema, offline.
fn camtrap_check(pkg: &Path) -> (bool, Value) {
    let out = Command::new(python())
        .arg(repo().join("tests/clients/camtrap_check.py"))
        .arg("--schemas")
        .arg(repo().join("tests/reference/camtrap-dp"))
        .arg(pkg)
        .output()
        .unwrap();
    let v: Value = serde_json::from_slice(&out.stdout).unwrap_or_else(|_| {
        panic!(
            "camtrap_check.py printed no JSON: {}",
            String::from_utf8_lossy(&out.stderr)
        )
    });
    (out.status.success(), v)
}

fn read_csv(path: &Path) -> Vec<std::collections::HashMap<String, String>> {
    let mut r = csv::Reader::from_path(path).unwrap();
    let headers = r.headers().unwrap().clone();
    r.records()
        .map(|rec| {
            let rec = rec.unwrap();
            headers
                .iter()
                .zip(rec.iter())
                .map(|(h, v)| (h.to_string(), v.to_string()))
                .collect()
        })
        .collect()
}

/// (deployment, species, start ms, count) of the store's events table.
fn events_table(state: &Path) -> Vec<(String, String, i64, i64)> {
    let c = rusqlite::Connection::open(state.join(outrider::store::DB_FILE)).unwrap();
    let mut st = c
        .prepare("SELECT deployment_id, scientific_name, start, count FROM events ORDER BY 1, 2, 3")
        .unwrap();
    st.query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?)))
        .unwrap()
        .map(Result::unwrap)
        .collect()
}

/// Every baseline the engine would use at the end of the history, after
/// warming from the store like the daemon at start.
fn baselines(cfg_path: &Path) -> Vec<(String, String, u32, outrider::activity::SpikeEvidence)> {
    let cfg = Arc::new(outrider::config::load(cfg_path).unwrap());
    let db = Sqlite::open_read_only(&cfg.service.state_dir).unwrap();
    let history = load_history(db.connection(), DateTime::<Utc>::MIN_UTC).unwrap();
    let mut engine = Engine::new(cfg.clone());
    engine.warm(history.iter());
    let at = t0() + Duration::days(DAYS);
    let mut out = Vec::new();
    for site in ["KB-01", "KB-02", "KB-03", "KB-04"] {
        for sp in [
            "Canis familiaris",
            "Vulpes vulpes",
            "Sus scrofa",
            "Felis catus",
        ] {
            for hours in [24, 72, 24 * 7] {
                let b = engine
                    .baseline(site, sp, at, hours)
                    .expect("a window with effort");
                out.push((site.to_string(), sp.to_string(), hours, b));
            }
        }
    }
    out
}

#[test]
fn camtrap_dp_export_validates_and_an_import_gives_the_same_baselines() {
    let dir = tempfile::tempdir().unwrap();
    let a = config(&dir.path().join("a"), SUBSCRIBERS);
    let msgs = history();
    build_store(&a, &msgs);

    let pkg = dir.path().join("pkg");
    let to = t0() + Duration::days(DAYS) + Duration::seconds(1);
    let stdout = ok(&run(&[
        "export",
        "-c",
        s(&a),
        "--camtrap-dp",
        s(&pkg),
        "--from",
        &rfc(t0()),
        "--to",
        &rfc(to),
    ]));
    assert!(
        stdout.contains("3 human and vehicle observations appear only as counts"),
        "{stdout}"
    );

    // Outside check: the Camtrap DP 1.0.2 profile (jsonschema) and table
    // schemas (frictionless), tests/reference/camtrap-dp/SOURCE.md.
    let (valid, report) = camtrap_check(&pkg);
    assert!(valid, "the package does not validate: {report:#}");
    let events = events_table(&dir.path().join("a/state"));
    assert_eq!(
        report["rows"]["observations"],
        events.len(),
        "one event-level row per independent event"
    );
    assert_eq!(report["rows"]["deployments"], 4);
    assert_eq!(report["rows"]["heartbeats"], 4 * (DAYS * 24 + 1) - 71);
    // Every trigger still in an event had a filePath: one media row each.
    let triggers = msgs.iter().filter(|m| matches!(m, Message::Observation(o) if o.observation_type == ObservationType::Animal)).count() - 1;
    assert_eq!(
        report["rows"]["media"], triggers,
        "the retracted trigger o3 has no media row"
    );

    // The same check fails on a package with a value outside the schema, so
    // it is not a check that cannot fail.
    let bad = dir.path().join("bad");
    std::fs::create_dir_all(&bad).unwrap();
    for f in std::fs::read_dir(&pkg).unwrap() {
        let f = f.unwrap().path();
        std::fs::copy(&f, bad.join(f.file_name().unwrap())).unwrap();
    }
    let text = std::fs::read_to_string(bad.join("observations.csv")).unwrap();
    std::fs::write(
        bad.join("observations.csv"),
        text.replacen(",event,animal,", ",event,person,", 1),
    )
    .unwrap();
    let (valid, report) = camtrap_check(&bad);
    assert!(!valid, "a bad observationType passed: {report}");

    // Privacy (DESIGN.md "Messages"): people and vehicles only as counts.
    let obs = read_csv(&pkg.join("observations.csv"));
    assert!(obs
        .iter()
        .all(|o| o["observationType"] == "animal" && o["observationLevel"] == "event"));
    let deps = read_csv(&pkg.join("deployments.csv"));
    let kb01 = deps.iter().find(|d| d["deploymentID"] == "KB-01").unwrap();
    assert_eq!(
        kb01["deploymentTags"],
        "humanObservations:2|vehicleObservations:1"
    );
    // The relabelled trigger's event is a cat now, and its method human.
    assert!(obs
        .iter()
        .any(|o| o["scientificName"] == "Felis catus" && o["classificationMethod"] == "human"));

    // Import into a fresh state: the same events and the same baselines.
    let b = config(&dir.path().join("b"), SUBSCRIBERS);
    let stdout = ok(&run(&["import", "-c", s(&b), "--camtrap-dp", s(&pkg)]));
    assert!(stdout.contains("0 refused"), "{stdout}");
    let imported: Vec<_> = events_table(&dir.path().join("b/state"));
    assert_eq!(imported, events, "independent events after the round trip");
    let (ba, bb) = (baselines(&a), baselines(&b));
    assert!(
        ba.iter()
            .filter(|(_, _, _, e)| e.history_events > 0)
            .count()
            > 20,
        "the comparison should cover real history"
    );
    assert!(
        ba.iter()
            .any(|(d, _, _, e)| d == "KB-04" && e.history_nights < 14.0 - 2.9),
        "KB-04's silence shows in its effort"
    );
    for (x, y) in ba.iter().zip(&bb) {
        assert_eq!(x, y, "baseline at {} for {} over {} h", x.0, x.1, x.2);
    }

    // Again: nothing new, every row a duplicate.
    let before = crate::util::status(&b);
    let stdout = ok(&run(&["import", "-c", s(&b), "--camtrap-dp", s(&pkg)]));
    assert!(stdout.contains(" 0 new messages"), "{stdout}");
    let after = crate::util::status(&b);
    assert_eq!(after["observations_stored"], before["observations_stored"]);
    assert_eq!(
        after["duplicates_ignored"].as_u64().unwrap(),
        before["duplicates_ignored"].as_u64().unwrap() + events.len() as u64
    );

    // A package naming a deployment outside the sites file: refused, with
    // the line, and nothing written.
    let text = std::fs::read_to_string(bad.join("deployments.csv")).unwrap();
    let extra = text.lines().nth(1).unwrap().replacen("KB-01", "KB-99", 1);
    std::fs::write(bad.join("deployments.csv"), format!("{text}{extra}\n")).unwrap();
    let out = run(&["import", "-c", s(&b), "--camtrap-dp", s(&bad)]);
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("deployments.csv:6: `KB-99`") && err.contains("nothing imported"),
        "{err}"
    );
    assert_eq!(
        crate::util::status(&b)["observations_stored"],
        after["observations_stored"]
    );

    // Replay takes the package folder (observations and heartbeats).
    let out = run(&["replay", "-c", s(&b), "--observations", s(&pkg)]);
    ok(&out);
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("heartbeats present: silence judged"), "{err}");
    assert!(
        err.contains("observations.csv") && err.contains("heartbeats.csv"),
        "{err}"
    );
}

#[test]
fn report_rows_match_an_independent_count_of_the_package() {
    let dir = tempfile::tempdir().unwrap();
    let a = config(&dir.path().join("a"), "");
    build_store(&a, &history());
    // The report stops at the last heartbeat, the package just after it.
    let to = t0() + Duration::days(DAYS);
    let pkg = dir.path().join("pkg");
    ok(&run(&[
        "export",
        "-c",
        s(&a),
        "--camtrap-dp",
        s(&pkg),
        "--from",
        &rfc(t0()),
        "--to",
        &rfc(to + Duration::seconds(1)),
    ]));
    let csv = ok(&run(&[
        "report",
        "-c",
        s(&a),
        "--by",
        "day",
        "--from",
        &rfc(t0()),
        "--to",
        &rfc(to),
    ]));
    // Independent computation: tests/clients/report_check.py (Python csv,
    // datetime, zoneinfo) from the exported package.
    let out = Command::new(python())
        .arg(repo().join("tests/clients/report_check.py"))
        .args([
            "--package",
            s(&pkg),
            "--tz",
            "Australia/Sydney",
            "--from",
            &rfc(t0()),
            "--to",
            &rfc(to),
            "--silence-hours",
            "36",
        ])
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let want: Vec<Value> = serde_json::from_slice(&out.stdout).unwrap();
    let mut r = csv::Reader::from_reader(csv.as_bytes());
    let got: Vec<csv::StringRecord> = r.records().map(Result::unwrap).collect();
    assert_eq!(got.len(), want.len(), "rows: 30 days x 4 sites x species");
    assert_eq!(got.len(), 30 * 4 * 4);
    let mut zero_effort = 0;
    for (g, w) in got.iter().zip(&want) {
        let what = format!("{g:?} vs {w}");
        assert_eq!(&g[0], w["day"].as_str().unwrap(), "{what}");
        assert_eq!(&g[3], w["deploymentID"].as_str().unwrap(), "{what}");
        assert_eq!(&g[5], w["scientificName"].as_str().unwrap(), "{what}");
        assert_eq!(
            g[6].parse::<u64>().unwrap(),
            w["events"].as_u64().unwrap(),
            "{what}"
        );
        assert_eq!(
            g[7].parse::<u64>().unwrap(),
            w["individuals"].as_u64().unwrap(),
            "{what}"
        );
        let nights: f64 = g[8].parse().unwrap();
        assert!(
            (nights - w["camera_nights"].as_f64().unwrap()).abs() < 1e-6,
            "{what}"
        );
        match w["rai"].as_f64() {
            Some(rai) => assert!((g[9].parse::<f64>().unwrap() - rai).abs() < 1e-3, "{what}"),
            None => {
                zero_effort += 1;
                assert_eq!(&g[9], "", "RAI undefined at zero effort: {what}");
            }
        }
    }
    // KB-04's silence: day 11 and 12 have no effort at all (down from the
    // last heartbeat on day 10 at 06:00 to day 13 06:00), 4 species each.
    assert_eq!(zero_effort, 2 * 4);
}

/// `xmllint --noout --schema CAP-v1.2.xsd FILE...` (Debian libxml2-utils)
/// against the test copy of the OASIS CAP 1.2 schema.
fn xmllint(files: &[PathBuf]) -> Output {
    Command::new("xmllint")
        .arg("--noout")
        .arg("--schema")
        .arg(repo().join("tests/reference/cap-1.2/CAP-v1.2.xsd"))
        .args(files)
        .output()
        .expect("xmllint (Debian package libxml2-utils): run tests/run-all.sh")
}

/// A paddock polygon with a hole (RFC 7946 [lon, lat]) near KB-03.
const PADDOCK: &str = r#"{"type": "Polygon", "coordinates": [
  [[148.12, -31.51], [148.16, -31.51], [148.16, -31.47], [148.12, -31.47], [148.12, -31.51]],
  [[148.13, -31.50], [148.13, -31.49], [148.14, -31.49], [148.14, -31.50], [148.13, -31.50]]]}"#;

#[test]
fn cap_alerts_validate_against_the_xsd_in_files_and_on_the_webhook() {
    let dir = tempfile::tempdir().unwrap();
    let hook = crate::delivery::Sink::webhook(&dir.path().join("hook"), &[]);
    let a = dir.path().join("a");
    std::fs::create_dir_all(a.join("areas")).unwrap();
    std::fs::write(a.join("areas/paddock.geojson"), PADDOCK).unwrap();
    let hooked = SUBSCRIBERS.replacen(
        "[[subscriber.watch]]",
        &format!(
            "webhook = {{ url = \"http://127.0.0.1:{}/in\", format = \"cap\" }}\nmqtt = {{ format = \"cap\" }}\n[[subscriber.watch]]",
            hook.port
        ),
        1,
    );
    let subscribers = format!(
        "{hooked}\n\
         [[subscriber]]\nid = \"wattle\"\nname = \"Wattle Downs\"\nemail = \"wd@wattle.example\"\n\
         area = {{ geojson = \"areas/paddock.geojson\", buffer_km = 1.5 }}\n\
         [[subscriber.watch]]\nname = \"dogs\"\ntrigger = \"presence\"\nspecies = [\"Canis familiaris\"]\nurgent = true\nchannels = [\"email\"]\n"
    );
    let cfg_path = config(&a, &subscribers);
    // Two dogs a day after t0: one at KB-03 (both areas), with hostile text
    // from the message, and one at KB-02 that a person then retracts.
    let t = t0() + Duration::days(1);
    let mut msgs: Vec<Message> = (0..=48)
        .flat_map(|h| {
            ["KB-01", "KB-02", "KB-03", "KB-04"].map(|d| {
                Message::Heartbeat(Heartbeat {
                    deployment_id: d.into(),
                    timestamp: t0() + Duration::hours(h),
                    battery_percent: None,
                    signal_dbm: None,
                    images_since_last: None,
                })
            })
        })
        .collect();
    let mut d1 = animal(
        "d1".into(),
        "KB-03",
        t + Duration::hours(2),
        "Canis familiaris",
        2,
    );
    if let Message::Observation(o) = &mut d1 {
        o.vernacular_name = Some("wild <dog> & \"co\" ]]> \u{1}".into());
    }
    msgs.push(d1);
    msgs.push(animal(
        "d2".into(),
        "KB-02",
        t + Duration::hours(5),
        "Canis familiaris",
        1,
    ));
    msgs.sort_by_key(time_of);
    msgs.push(Message::Correction(Correction {
        observation_id: "d2".into(),
        deployment_id: "KB-02".into(),
        scientific_name: None,
        count: None,
        observation_type: Some(ObservationType::Blank),
    }));
    build_store(&cfg_path, &msgs);

    let caps = dir.path().join("cap");
    let stdout = ok(&run(&["export", "-c", s(&cfg_path), "--cap", s(&caps)]));
    let mut files: Vec<PathBuf> = std::fs::read_dir(&caps)
        .unwrap()
        .map(|e| e.unwrap().path())
        .collect();
    files.sort();
    // Stonecroft (9 km circle) covers KB-02 and KB-03: two presence alerts
    // and a cancel; Wattle Downs' paddock (plus 1.5 km) covers KB-03 only.
    assert_eq!(files.len(), 4, "{stdout} {files:?}");
    let out = xmllint(&files);
    assert!(
        out.status.success(),
        "CAP 1.2 XSD: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let texts: Vec<String> = files
        .iter()
        .map(|f| std::fs::read_to_string(f).unwrap())
        .collect();
    let all = texts.join("\n");
    assert!(all.contains("<category>Env</category>"));
    assert!(
        all.contains("ild &lt;dog&gt; &amp; &quot;co&quot; ]]&gt;"),
        "message text escaped: {all}"
    );
    assert!(!all.contains('\u{1}'));
    assert!(
        all.contains("Stonecroft &lt;&amp; Sons&gt;"),
        "config text escaped"
    );
    // KB-03, 02:00 local on 2 June (AEST): CAP's date-time form.
    assert!(
        all.contains("<onset>2026-06-02T02:00:00+10:00</onset>"),
        "{all}"
    );
    assert!(all.contains("<circle>-31.4963,148.0578 9</circle>"));
    assert!(all.contains(
        "<polygon>-31.51,148.12 -31.51,148.16 -31.47,148.16 -31.47,148.12 -31.51,148.12</polygon>"
    ));
    assert!(all.contains("holes are left out") && all.contains("1.5 km around it"));
    let cancel = texts
        .iter()
        .find(|t| t.contains("<msgType>Cancel</msgType>"))
        .expect("a cancel for the retraction");
    let original = texts
        .iter()
        .find(|t| {
            t.contains("<addresses>stonecroft</addresses>")
                && t.contains("<circle>-31.49179,148.05781 0</circle>")
                && t.contains("<msgType>Alert</msgType>")
        })
        .unwrap();
    let id = original
        .split("<identifier>")
        .nth(1)
        .unwrap()
        .split('<')
        .next()
        .unwrap();
    assert!(cancel.contains(&format!("<references>outrider@outrider.kellerby.example,{id},2026-06-02T05:00:00+10:00</references>")), "{cancel}");

    // The XSD does catch a bad alert: a "Z" date-time.
    let bad = dir.path().join("bad.xml");
    std::fs::write(&bad, texts[0].replacen("+10:00</sent>", "Z</sent>", 1)).unwrap();
    assert!(
        !xmllint(&[bad]).status.success(),
        "xmllint accepted a Z date-time"
    );

    // The webhook channel with format = "cap": the body the outbox sends,
    // through the real sender to a real HTTP server.
    let cfg = outrider::config::load(&cfg_path).unwrap();
    let sub = &cfg.subscribers[0];
    let db = Sqlite::open_read_only(&cfg.service.state_dir).unwrap();
    let notice: String = db
        .connection()
        .query_row("SELECT notice FROM notices WHERE subscriber_id = 'stonecroft' AND disposition = 'sent' ORDER BY at LIMIT 1", [], |r| r.get(0))
        .unwrap();
    let n: outrider::notify::Notice = serde_json::from_str(&notice).unwrap();
    let body = outrider::outbox::channel_body(&cfg, sub, &n, sub.webhook_format);
    let request = outrider::deliver::OutgoingWebhook::to(
        sub.webhook.as_ref().unwrap(),
        n.id().as_str(),
        body,
        1_780_000_000,
    )
    .with_content_type(sub.webhook_format.content_type());
    let sender = outrider::deliver::WebhookSender::new().unwrap();
    tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap()
        .block_on(sender.send(&request))
        .unwrap();
    let log = hook.log("requests.jsonl");
    assert_eq!(log.len(), 1);
    let ct: Vec<&str> = log[0]["headers"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|h| h[0].as_str().unwrap().eq_ignore_ascii_case("content-type"))
        .map(|h| h[1].as_str().unwrap())
        .collect();
    assert_eq!(ct, ["application/xml; charset=utf-8"]);
    use base64::Engine as _;
    let got = base64::engine::general_purpose::STANDARD
        .decode(log[0]["body_b64"].as_str().unwrap())
        .unwrap();
    let file = dir.path().join("hook.xml");
    std::fs::write(&file, &got).unwrap();
    let out = xmllint(&[file]);
    assert!(
        out.status.success(),
        "webhook body: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    // The MQTT channel's payload is the same document.
    assert_eq!(
        outrider::outbox::channel_body(&cfg, sub, &n, sub.mqtt_format),
        got
    );
}

/// The MQTT channel with `mqtt = { format = "cap" }` in the running daemon:
/// a real Mosquitto, the detection published by paho-mqtt, the notice read
/// back by mosquitto_sub, and the payload checked by xmllint.
#[test]
fn the_daemon_publishes_a_cap_alert_over_mqtt() {
    use crate::util::{publish_corpus, write_config, write_corpus, Daemon, Mosquitto, Msg};
    use outrider::clock::{Clock, SystemClock};
    let dir = tempfile::tempdir().unwrap();
    let mosquitto = Mosquitto::start(dir.path());
    let extra = "[[subscriber]]\nid = \"stonecroft\"\nname = \"Stonecroft\"\narea = { lat = -31.4963, lon = 148.0578, radius_km = 2.0 }\nmqtt = { format = \"cap\" }\n[[subscriber.watch]]\nname = \"dogs\"\ntrigger = \"presence\"\nspecies = [\"Canis familiaris\"]\nchannels = [\"mqtt\"]\n";
    let cfg = write_config(dir.path(), mosquitto.port, false, extra);
    let mut sub = Command::new("mosquitto_sub")
        .args([
            "-h",
            "127.0.0.1",
            "-p",
            &mosquitto.port.to_string(),
            "-t",
            "outrider/_notices/#",
            "-C",
            "1",
            "-W",
            "60",
            "-q",
            "1",
        ])
        .stdout(std::process::Stdio::piped())
        .spawn()
        .expect("mosquitto_sub (Debian package mosquitto-clients)");
    let _daemon = Daemon::start(&cfg);
    let at =
        (SystemClock.now() - Duration::minutes(20)).with_timezone(&chrono_tz::Australia::Sydney);
    let p = serde_json::json!({"observationID": "m1", "deploymentID": "KB-02", "eventStart": at.to_rfc3339(), "observationType": "animal", "scientificName": "Canis familiaris", "vernacularName": "wild dog", "classificationProbability": 0.95});
    let corpus = dir.path().join("c.jsonl");
    write_corpus(
        &corpus,
        &[Msg {
            topic: "outrider/KB-02/observation".into(),
            payload: p.to_string().into_bytes(),
        }],
    );
    publish_corpus(mosquitto.port, &corpus, 0, "cappublisher");
    // mosquitto_sub subscribed before the daemon started; it exits after
    // one message (-C 1), or fails after 60 s (-W 60).
    crate::util::wait_for(
        std::time::Duration::from_secs(70),
        "the notice on MQTT",
        || sub.try_wait().unwrap().map(|_| ()),
    );
    let mut payload = Vec::new();
    std::io::Read::read_to_end(sub.stdout.as_mut().unwrap(), &mut payload).unwrap();
    let file = dir.path().join("mqtt.xml");
    std::fs::write(&file, &payload).unwrap();
    let text = String::from_utf8_lossy(&payload);
    assert!(
        text.contains("<addresses>stonecroft</addresses>")
            && text.contains("<event>Animal detected</event>"),
        "{text}"
    );
    let out = xmllint(&[file]);
    assert!(
        out.status.success(),
        "MQTT payload: {}",
        String::from_utf8_lossy(&out.stderr)
    );
}
