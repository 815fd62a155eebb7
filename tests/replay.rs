//! `outrider replay`, the real binary, on archives built by hand in the
//! invented Kellerby Basin district. Each test works out the notices it
//! expects in its comments, from the sources named beside each check:
//! DESIGN.md "Command line" (the replay interface and its fields),
//! DESIGN.md "Delivery" (fatigue control), METHODS.md (independent events,
//! the gamma-Poisson spike test, time windows), the Camtrap DP 1.0.2
//! observations table schema (columns, missing values; a copy is in
//! /work/shared/standards/camtrap-dp/). Then a month of the demo feed,
//! checked for each happening the scenario scripts.
//!
//! Local times are Australia/Sydney in July: AEST, UTC+10, no daylight
//! saving (the offset is written in every timestamp, so nothing here
//! depends on a time-zone database).

use crate::util::{BIN, SITES};
use serde_json::Value;
use std::fmt::Write as _;
use std::path::{Path, PathBuf};
use std::process::Command;

/// The config every hand-built case uses, with its subscribers appended.
/// Values are written out rather than left to defaults so the worked
/// examples below can rely on them.
fn write_case(dir: &Path, subscribers: &str) -> PathBuf {
    std::fs::create_dir_all(dir.join("mail")).unwrap();
    std::fs::write(dir.join("sites.csv"), SITES).unwrap();
    let cfg = format!(
        "[service]\nstate_dir = \"state\"\ntimezone = \"Australia/Sydney\"\n\n\
         [sites]\nfile = \"sites.csv\"\nsilence_hours = 12\n\n\
         [detection]\nmin_probability = 0.5\nindependence_minutes = 30\n\n\
         [baseline]\nwindow_days = 28\nguard_days = 1\nprior_nights = 14\nalpha = 0.01\n\n\
         [email_folder]\ndir = \"mail\"\n\n{subscribers}"
    );
    let path = dir.join("outrider.toml");
    std::fs::write(&path, cfg).unwrap();
    path
}

/// One observation of the hand-built archives.
#[derive(Clone)]
struct Obs {
    id: String,
    dep: &'static str,
    /// RFC 3339 with offset, as a camera would write it.
    at: String,
    species: &'static str,
    count: u32,
}

fn obs(id: &str, dep: &'static str, at: &str, species: &'static str) -> Obs {
    Obs {
        id: id.into(),
        dep,
        at: at.into(),
        species,
        count: 1,
    }
}

/// A Camtrap DP observations CSV. Besides the columns the message schema
/// uses it carries others of the observations table (observationLevel,
/// cameraSetupType, bboxX, classifiedBy) and missing values written the
/// ways the table schema allows ("", NA), which replay must ignore.
fn csv_archive(rows: &[Obs]) -> String {
    let mut s = String::from(
        "observationID,deploymentID,mediaID,eventID,eventStart,eventEnd,observationLevel,observationType,cameraSetupType,scientificName,count,lifeStage,bboxX,classificationMethod,classifiedBy,classificationProbability\n",
    );
    for r in rows {
        writeln!(
            s,
            "{},{},NA,ev-{},{},{},event,animal,,{},{},NA,,machine,NA,0.93",
            r.id, r.dep, r.id, r.at, r.at, r.species, r.count
        )
        .unwrap();
    }
    s
}

/// The same observations as JSON lines of messages (DESIGN "Messages").
fn jsonl_archive(rows: &[Obs]) -> String {
    let mut s = String::new();
    for r in rows {
        let line = serde_json::json!({
            "topic": format!("outrider/{}/observation", r.dep),
            "payload": {
                "observationID": r.id,
                "deploymentID": r.dep,
                "eventStart": r.at,
                "eventEnd": r.at,
                "observationType": "animal",
                "scientificName": r.species,
                "count": r.count,
                "classificationMethod": "machine",
                "classificationProbability": 0.93,
            }
        });
        writeln!(s, "{line}").unwrap();
    }
    s
}

struct Replay {
    code: i32,
    notices: Vec<Value>,
    stderr: String,
}

fn replay(config: &Path, observations: &Path, extra: &[&str]) -> Replay {
    let out = Command::new(BIN)
        .arg("replay")
        .arg("-c")
        .arg(config)
        .arg("--observations")
        .arg(observations)
        .args(extra)
        .output()
        .expect("run outrider replay");
    let stdout = String::from_utf8(out.stdout).expect("stdout is UTF-8");
    let notices: Vec<Value> = stdout
        .lines()
        .map(|l| serde_json::from_str(l).unwrap_or_else(|e| panic!("not JSON: {l}: {e}")))
        .collect();
    for n in &notices {
        check_line(n);
    }
    Replay {
        code: out.status.code().unwrap_or(-1),
        notices,
        stderr: String::from_utf8_lossy(&out.stderr).into_owned(),
    }
}

/// DESIGN "Command line": a notice line carries at least subscriber,
/// watch, trigger, deploymentID, scientificName, at (RFC 3339 UTC),
/// disposition (sent, folded, deferred) and evidence; the brief adds reason.
fn check_line(n: &Value) {
    for key in ["subscriber", "watch", "trigger", "deploymentID", "at"] {
        assert!(n[key].is_string(), "{key} missing in {n}");
    }
    assert!(
        n.get("scientificName").is_some(),
        "scientificName missing (null for camera notices) in {n}"
    );
    assert!(n["evidence"].is_object(), "evidence missing in {n}");
    assert!(n["reason"].is_string(), "reason missing in {n}");
    let d = n["disposition"].as_str().unwrap();
    assert!(
        ["sent", "folded", "deferred"].contains(&d),
        "disposition {d}"
    );
    // RFC 3339 in UTC: parses, and is written with Z.
    let at = n["at"].as_str().unwrap();
    assert!(at.ends_with('Z'), "at {at} is not UTC");
    chrono::DateTime::parse_from_rfc3339(at).unwrap();
    assert!(
        [
            "presence",
            "spike",
            "first-seen",
            "silence",
            "silence-ended",
            "build-up",
            "retraction"
        ]
        .contains(&n["trigger"].as_str().unwrap()),
        "trigger {}",
        n["trigger"]
    );
}

fn strs<'a>(ns: &'a [Value], key: &str) -> Vec<&'a str> {
    ns.iter().map(|n| n[key].as_str().unwrap_or("")).collect()
}

fn case_dir() -> tempfile::TempDir {
    tempfile::tempdir().unwrap()
}

/// Writes the archive in both formats; returns (csv, jsonl) paths.
fn both(dir: &Path, rows: &[Obs]) -> (PathBuf, PathBuf) {
    let csv = dir.join("observations.csv");
    let jsonl = dir.join("observations.jsonl");
    std::fs::write(&csv, csv_archive(rows)).unwrap();
    std::fs::write(&jsonl, jsonl_archive(rows)).unwrap();
    (csv, jsonl)
}

const FOX_AT_KB01: &str = "[[subscriber]]\nid = \"ridge\"\nname = \"Ridge Gate\"\nemail = \"o@ridge.example\"\narea = { sites = [\"KB-01\"] }\n\n  [[subscriber.watch]]\n  name = \"foxes\"\n  trigger = \"presence\"\n  species = [\"Vulpes vulpes\"]\n  hours = \"any\"\n  cooldown_minutes = 0\n  channels = [\"email\"]\n";

/// Foxes at KB-01 on 14 July 2026, midday (no quiet hours, no cooldown).
/// METHODS 1: a trigger starts a new event when its gap to the previous
/// trigger of the same species at the same deployment is strictly greater
/// than the independence interval (30 min, common practice).
/// - f1 12:00            new event A            -> notice (sent) at 02:00Z
/// - f2 12:20  gap 20    joins A                -> nothing
/// - f3 12:51  gap 31    new event B            -> notice (sent) at 02:51Z
/// - f4 13:21  gap 30    joins B (not > 30)     -> nothing
fn fox_rows() -> Vec<Obs> {
    vec![
        obs("f1", "KB-01", "2026-07-14T12:00:00+10:00", "Vulpes vulpes"),
        obs("f2", "KB-01", "2026-07-14T12:20:00+10:00", "Vulpes vulpes"),
        obs("f3", "KB-01", "2026-07-14T12:51:00+10:00", "Vulpes vulpes"),
        obs("f4", "KB-01", "2026-07-14T13:21:00+10:00", "Vulpes vulpes"),
    ]
}

#[test]
fn presence_counts_independent_events_only() {
    let dir = case_dir();
    let cfg = write_case(dir.path(), FOX_AT_KB01);
    let (csv, _) = both(dir.path(), &fox_rows());
    let r = replay(&cfg, &csv, &[]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    // Worked out above: two events, two notices (METHODS 1).
    assert_eq!(r.notices.len(), 2, "{:#?}", r.notices);
    assert_eq!(
        strs(&r.notices, "eventStart"),
        ["2026-07-14T02:00:00Z", "2026-07-14T02:51:00Z"]
    );
    // The decision time is the simulated clock: the trigger's own time.
    assert_eq!(
        strs(&r.notices, "at"),
        ["2026-07-14T02:00:00Z", "2026-07-14T02:51:00Z"]
    );
    assert_eq!(strs(&r.notices, "disposition"), ["sent", "sent"]);
    assert_eq!(strs(&r.notices, "trigger"), ["presence", "presence"]);
    assert_eq!(strs(&r.notices, "subscriber"), ["ridge", "ridge"]);
    assert_eq!(strs(&r.notices, "deploymentID"), ["KB-01", "KB-01"]);
    assert_eq!(
        strs(&r.notices, "scientificName"),
        ["Vulpes vulpes", "Vulpes vulpes"]
    );
    // Stderr summary: the ridge/presence row says 2 sent, 0 folded, 0 deferred.
    assert!(
        summary_row(&r.stderr, "ridge", "presence") == Some([2, 0, 0]),
        "{}",
        r.stderr
    );
    assert!(
        r.stderr.contains("4 read, 4 replayed, 0 rejected"),
        "{}",
        r.stderr
    );
}

/// The `[sent, folded, deferred]` cells of a summary row.
fn summary_row(stderr: &str, subscriber: &str, trigger: &str) -> Option<[u64; 3]> {
    stderr.lines().find_map(|l| {
        let cells: Vec<&str> = l.split_whitespace().collect();
        (cells.len() == 5 && cells[0] == subscriber && cells[1] == trigger).then(|| {
            [
                cells[2].parse().unwrap(),
                cells[3].parse().unwrap(),
                cells[4].parse().unwrap(),
            ]
        })
    })
}

#[test]
fn csv_and_json_lines_give_the_same_notices() {
    // DESIGN "Command line": replay reads either form; both go through the
    // same decoder, so the same observations must give the same lines.
    let dir = case_dir();
    let cfg = write_case(
        dir.path(),
        &format!("{FOX_AT_KB01}\n{TANK_DOGS}\n{COORD_DEER}"),
    );
    let mut rows = fox_rows();
    rows.extend(dog_rows());
    rows.extend(deer_rows());
    let (csv, jsonl) = both(dir.path(), &rows);
    let a = replay(&cfg, &csv, &[]);
    let b = replay(&cfg, &jsonl, &[]);
    assert_eq!((a.code, b.code), (0, 0), "{}\n{}", a.stderr, b.stderr);
    // fox 2 + dogs 3 + deer 2, worked out in the tests of each.
    assert_eq!(a.notices.len(), 7, "{:#?}", a.notices);
    assert_eq!(a.notices, b.notices);
    assert!(
        a.stderr.contains("Camtrap DP observations CSV"),
        "{}",
        a.stderr
    );
    assert!(b.stderr.contains("JSON lines of messages"), "{}", b.stderr);
}

const TANK_DOGS: &str = "[[subscriber]]\nid = \"tank\"\nname = \"Tank Paddock\"\nemail = \"o@tank.example\"\narea = { sites = [\"KB-04\"] }\n\n  [[subscriber.watch]]\n  name = \"dogs\"\n  trigger = \"presence\"\n  species = [\"Canis familiaris\"]\n  cooldown_minutes = 120\n  channels = [\"email\"]\n";

/// Wild dogs at KB-04 with a 120-minute cooldown (DESIGN "Delivery":
/// one immediate notice, then a cooldown that folds further events into
/// the next notice):
/// - d1 12:00  event A, first notice                 -> sent at 02:00Z, cooldown to 04:00Z
/// - d2 13:00  event B (gap 60 > 30), in cooldown    -> folded
/// - d3 14:30  event C (gap 90), cooldown has ended  -> sent, carrying B
fn dog_rows() -> Vec<Obs> {
    vec![
        obs(
            "d1",
            "KB-04",
            "2026-07-14T12:00:00+10:00",
            "Canis familiaris",
        ),
        obs(
            "d2",
            "KB-04",
            "2026-07-14T13:00:00+10:00",
            "Canis familiaris",
        ),
        obs(
            "d3",
            "KB-04",
            "2026-07-14T14:30:00+10:00",
            "Canis familiaris",
        ),
    ]
}

#[test]
fn cooldown_folds_events_into_the_next_notice() {
    let dir = case_dir();
    let cfg = write_case(dir.path(), TANK_DOGS);
    let (csv, _) = both(dir.path(), &dog_rows());
    let r = replay(&cfg, &csv, &[]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert_eq!(
        strs(&r.notices, "disposition"),
        ["sent", "folded", "sent"],
        "{:#?}",
        r.notices
    );
    assert_eq!(
        strs(&r.notices, "eventStart"),
        [
            "2026-07-14T02:00:00Z",
            "2026-07-14T03:00:00Z",
            "2026-07-14T04:30:00Z"
        ]
    );
    // The third notice carries the folded event B.
    let folded = r.notices[2]["folded"].as_array().unwrap();
    assert_eq!(folded.len(), 1, "{}", r.notices[2]);
    assert_eq!(folded[0]["eventStart"], "2026-07-14T03:00:00Z");
    assert_eq!(summary_row(&r.stderr, "tank", "presence"), Some([2, 1, 0]));
}

const GULLY: &str = "[[subscriber]]\nid = \"gully\"\nname = \"Red Gully\"\nemail = \"o@gully.example\"\nquiet_hours = \"21:30-05:00\"\narea = { sites = [\"KB-02\"] }\n\n  [[subscriber.watch]]\n  name = \"pigs\"\n  trigger = \"presence\"\n  species = [\"Sus scrofa\"]\n  cooldown_minutes = 60\n  channels = [\"email\"]\n\n  [[subscriber.watch]]\n  name = \"dogs at night\"\n  trigger = \"presence\"\n  species = [\"Canis familiaris\"]\n  urgent = true\n  channels = [\"email\"]\n";

#[test]
fn quiet_hours_defer_all_but_urgent_watches() {
    // DESIGN "Delivery": quiet hours defer all but the subscriber's urgent
    // watches to the digest. METHODS 6: local windows are [start, end).
    // Quiet hours 21:30-05:00 local at KB-02:
    // - pig 21:29        before the window          -> sent (cooldown 60 min)
    // - pig 23:00        new event (gap 91), quiet  -> deferred
    // - dog 23:10        urgent watch               -> sent
    // - pig 05:00 (15th) window has ended (end excl.) -> sent (a deferral
    //                    starts no cooldown, and 21:29 + 60 min is long past)
    let rows = vec![
        obs("p1", "KB-02", "2026-07-14T21:29:00+10:00", "Sus scrofa"),
        obs("p2", "KB-02", "2026-07-14T23:00:00+10:00", "Sus scrofa"),
        obs(
            "w1",
            "KB-02",
            "2026-07-14T23:10:00+10:00",
            "Canis familiaris",
        ),
        obs("p3", "KB-02", "2026-07-15T05:00:00+10:00", "Sus scrofa"),
    ];
    let dir = case_dir();
    let cfg = write_case(dir.path(), GULLY);
    let (csv, _) = both(dir.path(), &rows);
    let r = replay(&cfg, &csv, &[]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let got: Vec<(&str, &str)> = r
        .notices
        .iter()
        .map(|n| {
            (
                n["watch"].as_str().unwrap(),
                n["disposition"].as_str().unwrap(),
            )
        })
        .collect();
    assert_eq!(
        got,
        [
            ("pigs", "sent"),
            ("pigs", "deferred"),
            ("dogs at night", "sent"),
            ("pigs", "sent")
        ]
    );
    assert_eq!(summary_row(&r.stderr, "gully", "presence"), Some([3, 0, 1]));
}

const COORD_DEER: &str = "[[subscriber]]\nid = \"coord\"\nname = \"Kellerby Basin pest coordinator\"\nemail = \"pests@kellerby.example\"\narea = \"all\"\n\n  [[subscriber.watch]]\n  name = \"deer after a quiet month\"\n  trigger = \"first-seen\"\n  species = [\"Dama dama\"]\n  quiet_days = 30\n  channels = [\"email\"]\n";

/// Fallow deer anywhere in the district (the coordinator covers all four
/// sites, deployed since January). DESIGN "Rules": first-seen after N quiet
/// days; the quiet span is the 30 days before the event at any covered site.
/// - e1 14 Jul KB-03  none in the 30 days before        -> first-seen
/// - e2 16 Jul KB-01  e1 two days before                 -> nothing
/// - e3 14 Aug KB-03  e2 29 days before                  -> nothing
/// - e4 15 Sep KB-02  e3 32 days before                  -> first-seen
fn deer_rows() -> Vec<Obs> {
    vec![
        obs("e1", "KB-03", "2026-07-14T12:00:00+10:00", "Dama dama"),
        obs("e2", "KB-01", "2026-07-16T12:00:00+10:00", "Dama dama"),
        obs("e3", "KB-03", "2026-08-14T12:00:00+10:00", "Dama dama"),
        obs("e4", "KB-02", "2026-09-15T12:00:00+10:00", "Dama dama"),
    ]
}

#[test]
fn first_seen_after_quiet_days() {
    let dir = case_dir();
    let cfg = write_case(dir.path(), COORD_DEER);
    let (csv, _) = both(dir.path(), &deer_rows());
    let r = replay(&cfg, &csv, &[]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert_eq!(strs(&r.notices, "trigger"), ["first-seen", "first-seen"]);
    assert_eq!(strs(&r.notices, "deploymentID"), ["KB-03", "KB-02"]);
    assert_eq!(
        strs(&r.notices, "eventStart"),
        ["2026-07-14T02:00:00Z", "2026-09-15T02:00:00Z"]
    );
    for n in &r.notices {
        assert_eq!(n["evidence"]["quiet_days"], 30, "{n}");
    }
}

fn spike_watch(min_count: u32) -> String {
    format!("[[subscriber]]\nid = \"bb\"\nname = \"Bellbird Creek\"\nemail = \"o@bellbird.example\"\narea = {{ sites = [\"KB-01\"] }}\n\n  [[subscriber.watch]]\n  name = \"dog build-up\"\n  trigger = \"spike\"\n  species = [\"Canis familiaris\"]\n  window_hours = 24\n  ratio = 3.0\n  min_count = {min_count}\n  channels = [\"email\"]\n")
}

/// A quiet history, then a burst, at KB-01 (no heartbeats: every site
/// counts as operating since its deploymentStart in January).
/// - history: dogs on 24 June and 4 July, 22:00
/// - burst:   dogs on 14 July at 21:00, 22:00 and 23:00 (three events)
fn spike_rows() -> Vec<Obs> {
    vec![
        obs(
            "h1",
            "KB-01",
            "2026-06-24T22:00:00+10:00",
            "Canis familiaris",
        ),
        obs(
            "h2",
            "KB-01",
            "2026-07-04T22:00:00+10:00",
            "Canis familiaris",
        ),
        obs(
            "b1",
            "KB-01",
            "2026-07-14T21:00:00+10:00",
            "Canis familiaris",
        ),
        obs(
            "b2",
            "KB-01",
            "2026-07-14T22:00:00+10:00",
            "Canis familiaris",
        ),
        obs(
            "b3",
            "KB-01",
            "2026-07-14T23:00:00+10:00",
            "Canis familiaris",
        ),
    ]
}

/// P(Y >= c) for Y ~ NB(r, p), pmf Γ(k+r)/(Γ(r) k!) p^r (1-p)^k (the
/// negative binomial in the parameterisation METHODS 3 gives, as in
/// scipy.stats.nbinom; pmf from memory). Summed upward from c, so no
/// cancellation; terms fall fast here.
fn nb_upper_tail(c: u64, r: f64, p: f64) -> f64 {
    let mut pmf = p.powf(r); // k = 0
    let mut tail = 0.0;
    for k in 0..2000u64 {
        if k > 0 {
            pmf *= (k as f64 - 1.0 + r) / k as f64 * (1.0 - p);
        }
        if k >= c {
            tail += pmf;
        }
    }
    tail
}

#[test]
fn spike_after_a_quiet_history() {
    // METHODS 3 worked by hand. At b3 (23:00 on 14 July):
    // - current window: the 24 h up to b3, exposure e = 1 camera-night,
    //   count c = 3 (b1, b2, b3);
    // - baseline window: 28 days ending a guard day before the current
    //   window starts, 14 June 23:00 .. 12 July 23:00: KB-01 had n = 2
    //   events (h1, h2) in t = 28 camera-nights;
    // - regional rate r over the 4 sites: 2 events / (4 x 28) nights;
    // - prior a0 = r N + 0.5 = 14 x 2/112 + 0.5 = 0.75, b0 = N = 14;
    //   posterior a = 2.75, b = 42;
    // - expected = a e / b = 0.0654762, ratio = 3 / expected = 45.8;
    // - p = P(Y >= 3), Y ~ NB(2.75, 42/43), well below alpha 0.01.
    // At b2 the count is 2: p and ratio pass, but 2 < min_count 3, so
    // nothing fires; at b1, h1, h2 the count is 1.
    let dir = case_dir();
    let cfg = write_case(dir.path(), &spike_watch(3));
    let (csv, _) = both(dir.path(), &spike_rows());
    let r = replay(&cfg, &csv, &[]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert_eq!(r.notices.len(), 1, "{:#?}", r.notices);
    let n = &r.notices[0];
    assert_eq!(n["trigger"], "spike");
    assert_eq!(n["subscriber"], "bb");
    assert_eq!(n["deploymentID"], "KB-01");
    assert_eq!(n["scientificName"], "Canis familiaris");
    assert_eq!(n["at"], "2026-07-14T13:00:00Z");
    assert_eq!(n["disposition"], "sent");
    let e = &n["evidence"];
    let f = |k: &str| {
        e[k].as_f64()
            .unwrap_or_else(|| panic!("{k} missing in {e}"))
    };
    assert_eq!(e["count"], 3);
    // One camera-night, less the engine's 1 ms: its window is the 24 h
    // ending 1 ms after the event (so the event itself is in it) while
    // effort runs only to the clock, the event's own instant.
    let exposure = f("exposure_nights");
    assert!((exposure - 1.0).abs() < 1e-6, "{e}");
    assert!((f("gamma_shape") - 2.75).abs() < 1e-9, "{e}");
    assert!((f("gamma_rate") - 42.0).abs() < 1e-9, "{e}");
    // DESIGN: expected = rate x e with the posterior mean rate a / b.
    let expected = f("gamma_shape") * exposure / f("gamma_rate");
    assert!((f("expected") - expected).abs() <= 1e-12 * expected, "{e}");
    assert!(
        (f("expected") - 2.75 / 42.0).abs() <= 1e-6 * expected,
        "{e}"
    );
    assert!(
        (f("ratio") - 3.0 / expected).abs() <= 1e-9 * f("ratio"),
        "{e}"
    );
    assert!(
        (f("ratio") - 3.0 / (2.75 / 42.0)).abs() <= 1e-6 * f("ratio"),
        "{e}"
    );
    // p with the evidence's own exposure, to 1e-9; and the hand value
    // (e = 1) to 1e-6.
    let p = nb_upper_tail(3, 2.75, 42.0 / (42.0 + exposure));
    assert!(
        (f("p_value") - p).abs() <= 1e-9 * p,
        "p {} vs {p}",
        f("p_value")
    );
    let p1 = nb_upper_tail(3, 2.75, 42.0 / 43.0);
    assert!(
        (f("p_value") - p1).abs() <= 1e-6 * p1,
        "p {} vs {p1}",
        f("p_value")
    );
    assert!(f("p_value") < 0.01);

    // At b2 the spike test would pass on p and ratio alone, so min_count
    // is what held it back.
    let p2 = nb_upper_tail(2, 2.75, 42.0 / 43.0);
    assert!(p2 < 0.01 && 2.0 / (2.75 / 42.0) >= 3.0, "p2 {p2}");

    // Below min_count nothing fires: the same archive with min_count 4.
    let dir4 = case_dir();
    let cfg4 = write_case(dir4.path(), &spike_watch(4));
    let (csv4, _) = both(dir4.path(), &spike_rows());
    let r4 = replay(&cfg4, &csv4, &[]);
    assert_eq!(r4.code, 0, "{}", r4.stderr);
    assert!(r4.notices.is_empty(), "{:#?}", r4.notices);
    assert!(
        summary_row(&r4.stderr, "bb", "-") == Some([0, 0, 0]),
        "{}",
        r4.stderr
    );
}

const COORD_SILENCE: &str = "[[subscriber]]\nid = \"coord\"\nname = \"Kellerby Basin pest coordinator\"\nemail = \"pests@kellerby.example\"\narea = \"all\"\n\n  [[subscriber.watch]]\n  name = \"silent cameras\"\n  trigger = \"silence\"\n  silence_hours = 12\n  channels = [\"email\"]\n";

#[test]
fn silence_and_silence_ended_with_heartbeats() {
    // Heartbeats every hour at all four sites from 14 July 00:00 to 15 July
    // 03:00, except that KB-02 says nothing after 06:00 on the 14th until
    // 00:00 on the 15th (18 h). DESIGN: a camera stops reporting -> notice
    // to the coordinator; the silence limit is 12 h (strictly longer counts,
    // METHODS 2). The daemon checks every second, so:
    // - silence of KB-02 decided at 06:00 + 12 h = 18:00 local (08:00Z, to
    //   within the minute), silent_hours 12;
    // - silence-ended when KB-02 reports at 00:00 on the 15th (14:00Z),
    //   silent_hours 18;
    // - no other camera is silent.
    let dir = case_dir();
    let cfg = write_case(dir.path(), COORD_SILENCE);
    let mut hb = String::from("deploymentID,timestamp,batteryPercent\n");
    for dep in ["KB-01", "KB-02", "KB-03", "KB-04"] {
        for h in 0..28 {
            let (day, hour) = (14 + h / 24, h % 24);
            if dep == "KB-02" && h > 6 && h < 24 {
                continue;
            }
            writeln!(hb, "{dep},2026-07-{day}T{hour:02}:00:00+10:00,88").unwrap();
        }
    }
    let hb_path = dir.path().join("heartbeats.csv");
    std::fs::write(&hb_path, hb).unwrap();
    // A kangaroo is all the observations archive holds.
    let rows = vec![obs(
        "k1",
        "KB-03",
        "2026-07-14T07:00:00+10:00",
        "Macropus giganteus",
    )];
    let (csv, _) = both(dir.path(), &rows);
    let r = replay(&cfg, &csv, &["--heartbeats", hb_path.to_str().unwrap()]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert_eq!(
        strs(&r.notices, "trigger"),
        ["silence", "silence-ended"],
        "{:#?}",
        r.notices
    );
    assert_eq!(strs(&r.notices, "deploymentID"), ["KB-02", "KB-02"]);
    let at0 = r.notices[0]["at"].as_str().unwrap();
    assert!(
        ("2026-07-14T08:00:00Z"..="2026-07-14T08:01:00Z").contains(&at0),
        "silence decided at {at0}"
    );
    let h0 = r.notices[0]["evidence"]["silent_hours"].as_f64().unwrap();
    assert!((12.0..=12.02).contains(&h0), "silent_hours {h0}");
    assert_eq!(r.notices[1]["at"], "2026-07-14T14:00:00Z");
    assert_eq!(r.notices[1]["evidence"]["silent_hours"], 18.0);
    assert!(r.stderr.contains("silence judged"), "{}", r.stderr);

    // Without heartbeats a deployment counts as operating from
    // deploymentStart to deploymentEnd (DESIGN "Command line"): no silence.
    let r2 = replay(&cfg, &csv, &[]);
    assert_eq!(r2.code, 0, "{}", r2.stderr);
    assert!(r2.notices.is_empty(), "{:#?}", r2.notices);
    assert!(r2.stderr.contains("silence not judged"), "{}", r2.stderr);
}

#[test]
fn from_and_to_filter_by_the_messages_own_time() {
    // The fox archive (two events: 12:00 and 12:51 local).
    // --from 12:30: f1 and f2 are left out; f3 starts an event -> 1 notice.
    // --to 12:30:   f3 and f4 are left out; f1 -> 1 notice.
    let dir = case_dir();
    let cfg = write_case(dir.path(), FOX_AT_KB01);
    let (csv, _) = both(dir.path(), &fox_rows());
    let late = replay(&cfg, &csv, &["--from", "2026-07-14T12:30:00+10:00"]);
    assert_eq!(late.code, 0, "{}", late.stderr);
    assert_eq!(strs(&late.notices, "eventStart"), ["2026-07-14T02:51:00Z"]);
    assert!(
        late.stderr.contains("2 outside --from/--to"),
        "{}",
        late.stderr
    );
    let early = replay(&cfg, &csv, &["--to", "2026-07-14T02:30:00Z"]);
    assert_eq!(strs(&early.notices, "eventStart"), ["2026-07-14T02:00:00Z"]);
    // Both ends: only f3 and f4 remain.
    let mid = replay(
        &cfg,
        &csv,
        &[
            "--from",
            "2026-07-14T12:30:00+10:00",
            "--to",
            "2026-07-14T13:00:00+10:00",
        ],
    );
    assert_eq!(strs(&mid.notices, "eventStart"), ["2026-07-14T02:51:00Z"]);
    // Bad values: a clear error and exit code 2 (the brief), nothing on stdout.
    let bad = replay(&cfg, &csv, &["--from", "last Tuesday"]);
    assert_eq!(bad.code, 2);
    assert!(bad.stderr.contains("--from"), "{}", bad.stderr);
    assert!(bad.notices.is_empty());
    let backwards = replay(
        &cfg,
        &csv,
        &[
            "--from",
            "2026-07-15T00:00:00Z",
            "--to",
            "2026-07-14T00:00:00Z",
        ],
    );
    assert_eq!(backwards.code, 2);
    assert!(
        backwards.stderr.contains("before --to"),
        "{}",
        backwards.stderr
    );
}

#[test]
fn malformed_records_are_counted_not_fatal() {
    // DESIGN "Bad input never stops the service", and the rejection reasons
    // (model.rs RejectReason, "the list is part of the interface").
    let dir = case_dir();
    let cfg = write_case(dir.path(), FOX_AT_KB01);
    let mut csv = csv_archive(&fox_rows());
    // Lines 6..9 (line 1 is the header, foxes are lines 2..5).
    csv.push_str(
        "bad1,KB-01,NA,e,2026-07-14T14:00:00+10:00,,event,animal,,Vulpes vulpes,1,,,machine,,1.7\n",
    );
    csv.push_str(
        "bad2,KB-01,NA,e,14/07/2026 14:00,,event,animal,,Vulpes vulpes,1,,,machine,,0.9\n",
    );
    csv.push_str(
        "bad3,KB-99,NA,e,2026-07-14T14:00:00+10:00,,event,animal,,Vulpes vulpes,1,,,machine,,0.9\n",
    );
    csv.push_str("bad4,KB-01,NA,e,2026-07-14T14:00:00+10:00,,event,animal,,Vulpes vulpes,three,,,machine,,0.9\n");
    let path = dir.path().join("observations.csv");
    std::fs::write(&path, csv).unwrap();
    let r = replay(&cfg, &path, &[]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    // The good rows still give their two notices.
    assert_eq!(r.notices.len(), 2, "{}", r.stderr);
    assert!(
        r.stderr.contains("8 read, 4 replayed, 4 rejected"),
        "{}",
        r.stderr
    );
    for (reason, line) in [
        ("invalid-value", 6),
        ("bad-timestamp", 7),
        ("unknown-deployment", 8),
        ("wrong-type", 9),
    ] {
        assert!(
            r.stderr
                .contains(&format!("rejected {reason}: 1 (line {line})")),
            "{reason} at line {line}: {}",
            r.stderr
        );
    }

    // JSON lines: a line that is not JSON and one without a payload.
    let mut jl = jsonl_archive(&fox_rows());
    jl.push_str("this is not json\n");
    jl.push_str("{\"topic\": \"outrider/KB-01/observation\"}\n");
    let path = dir.path().join("observations.jsonl");
    std::fs::write(&path, jl).unwrap();
    let r = replay(&cfg, &path, &[]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert_eq!(r.notices.len(), 2);
    assert!(
        r.stderr.contains("rejected invalid-json: 1 (line 5)"),
        "{}",
        r.stderr
    );
    assert!(
        r.stderr.contains("rejected missing-field: 1 (line 6)"),
        "{}",
        r.stderr
    );

    // A CSV without the columns a Camtrap DP observation needs is not an
    // archive: a clear error naming what is missing, exit 2.
    let path = dir.path().join("wrong.csv");
    std::fs::write(&path, "observationID,deploymentID\nx,KB-01\n").unwrap();
    let r = replay(&cfg, &path, &[]);
    assert_eq!(r.code, 2);
    assert!(r.stderr.contains("eventStart"), "{}", r.stderr);
}

#[test]
fn camtrap_media_level_rows_do_not_count_twice() {
    // Camtrap DP 1.0.2 observations table: observationLevel is `media`
    // (one image) or `event` (the whole sequence), so a package with both
    // holds each detection twice; replay keeps the event-level rows. The
    // media-level row below (a fox at KB-01 at 15:00) would otherwise be a
    // third fox event (99 min after f4) and a third notice.
    let dir = case_dir();
    let cfg = write_case(dir.path(), FOX_AT_KB01);
    let mut csv = csv_archive(&fox_rows());
    csv.push_str("m1,KB-01,img1,ev-f1,2026-07-14T15:00:00+10:00,,media,animal,,Vulpes vulpes,1,,,machine,,0.9\n");
    let path = dir.path().join("observations.csv");
    std::fs::write(&path, csv).unwrap();
    let r = replay(&cfg, &path, &[]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert_eq!(r.notices.len(), 2, "{:#?}", r.notices);
    assert!(
        r.stderr.contains("1 media-level rows left out"),
        "{}",
        r.stderr
    );
}

/// The demo's origin: 16:00 local on 10 July 2026 (the scripted pig and
/// deer come at 16:20 and 16:50, outside Stonecroft's quiet hours).
fn demo_origin() -> chrono::DateTime<chrono::Utc> {
    chrono::DateTime::parse_from_rfc3339("2026-07-10T06:00:00Z")
        .unwrap()
        .with_timezone(&chrono::Utc)
}

/// Writes `days` of the demo feed before the origin (and one after) as a
/// JSON-lines archive, with the demo's own config and sites, deployments
/// starting with the archive. Returns (config, archive).
fn demo_archive(dir: &Path, days: i64, heartbeats: bool) -> (PathBuf, PathBuf) {
    use std::io::Write as _;
    let origin = demo_origin();
    let from = origin - chrono::Duration::days(days);
    let to = origin + chrono::Duration::days(1);
    let cfg =
        outrider::demo::write_files(dir, 1883, "127.0.0.1:8080".parse().unwrap(), from).unwrap();
    let feed = outrider::demo::feed::Feed::new(origin, "outrider", 2026);
    let path = dir.join("demo-feed.jsonl");
    let mut f = std::io::BufWriter::new(std::fs::File::create(&path).unwrap());
    let mut t = from;
    while t < to {
        let next = (t + chrono::Duration::days(10)).min(to);
        for m in feed.between(t, next) {
            if !heartbeats && m.topic.ends_with("/heartbeat") {
                continue;
            }
            let payload = std::str::from_utf8(&m.payload).unwrap();
            writeln!(
                f,
                "{{\"topic\":{},\"payload\":{payload}}}",
                serde_json::to_string(&m.topic).unwrap()
            )
            .unwrap();
        }
        t = next;
    }
    f.flush().unwrap();
    (cfg, path)
}

#[test]
fn a_month_of_the_demo_feed_shows_every_scripted_happening() {
    // service/demo/feed.rs Scenario: KB-11 falls silent 11.5 h before the
    // origin; wild dogs at KB-07 at 6 events a night from 8 h before to
    // 16 h after it; a feral pig at KB-06 20 min after; the first fallow
    // deer at KB-03 50 min after. The demo config (service/demo/mod.rs)
    // watches each: coordinator silence 12 h and first-seen after 30 quiet
    // days, Bellbird spike (24 h, ratio 3, min 3), Stonecroft pigs any time.
    let dir = case_dir();
    let (cfg, archive) = demo_archive(dir.path(), 30, true);
    let r = replay(&cfg, &archive, &[]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let origin = demo_origin();
    let time = |n: &Value, k: &str| {
        chrono::DateTime::parse_from_rfc3339(n[k].as_str().unwrap())
            .unwrap()
            .with_timezone(&chrono::Utc)
    };
    let of = |trigger: &str| -> Vec<&Value> {
        r.notices
            .iter()
            .filter(|n| n["trigger"] == trigger)
            .collect()
    };

    // Silence: KB-11 only, the coordinator, at least 12 h without a sign.
    // Its last heartbeat is in the hour starting 12 h before the origin, so
    // the 12 h limit runs out within about an hour and a half after it.
    let silent = of("silence");
    assert_eq!(
        silent
            .iter()
            .map(|n| n["deploymentID"].as_str().unwrap())
            .collect::<Vec<_>>(),
        ["KB-11"],
        "{silent:#?}"
    );
    let s = silent[0];
    assert_eq!(s["subscriber"], "coordinator");
    assert_eq!(s["disposition"], "sent");
    assert!(s["evidence"]["silent_hours"].as_f64().unwrap() >= 12.0);
    let at = time(s, "at");
    assert!(
        at > origin && at < origin + chrono::Duration::minutes(90),
        "silence at {at}"
    );
    // KB-11 never reports again within the archive.
    assert!(of("silence-ended").is_empty());

    // Spike: Bellbird, wild dogs at KB-07, inside the scripted window, and
    // the rule's three conditions hold in the evidence (DESIGN "Spike test").
    let spikes: Vec<&Value> = of("spike")
        .into_iter()
        .filter(|n| n["deploymentID"] == "KB-07")
        .collect();
    assert!(!spikes.is_empty(), "no spike at KB-07: {}", r.stderr);
    let sp = spikes[0];
    assert_eq!(sp["subscriber"], "bellbird");
    assert_eq!(sp["scientificName"], "Canis familiaris");
    assert_eq!(sp["disposition"], "sent");
    let at = time(sp, "at");
    assert!(
        at >= origin - chrono::Duration::hours(8) && at < origin + chrono::Duration::hours(16),
        "spike at {at}"
    );
    let e = &sp["evidence"];
    let f = |k: &str| e[k].as_f64().unwrap();
    assert!(f("p_value") < 0.01, "{e}");
    assert!(f("ratio") >= 3.0, "{e}");
    assert!(f("count") >= 3.0, "{e}");
    let expected = f("gamma_shape") * f("exposure_nights") / f("gamma_rate");
    assert!((f("expected") - expected).abs() <= 1e-9 * expected, "{e}");

    // The pig near Stonecroft: presence at KB-06, the scripted event.
    let pig: Vec<&Value> = of("presence")
        .into_iter()
        .filter(|n| n["subscriber"] == "stonecroft" && n["scientificName"] == "Sus scrofa")
        .collect();
    assert_eq!(pig.len(), 1, "{pig:#?}");
    assert_eq!(pig[0]["deploymentID"], "KB-06");
    assert_eq!(pig[0]["watch"], "pigs any time");
    assert_eq!(pig[0]["disposition"], "sent");
    let start = time(pig[0], "eventStart");
    assert!(
        start >= origin + chrono::Duration::minutes(20)
            && start < origin + chrono::Duration::minutes(21),
        "pig event at {start}"
    );

    // The first fallow deer: first-seen at KB-03 for the coordinator, and
    // the only first-seen of the month (every other watched species is
    // seen somewhere in the district every few nights).
    let first = of("first-seen");
    assert_eq!(first.len(), 1, "{first:#?}");
    assert_eq!(first[0]["deploymentID"], "KB-03");
    assert_eq!(first[0]["scientificName"], "Dama dama");
    assert_eq!(first[0]["subscriber"], "coordinator");
    assert_eq!(first[0]["evidence"]["quiet_days"], 30);
    let start = time(first[0], "eventStart");
    assert!(
        start >= origin + chrono::Duration::minutes(50)
            && start < origin + chrono::Duration::minutes(51),
        "deer event at {start}"
    );

    // The stderr summary agrees with the lines on stdout.
    for sub in ["stonecroft", "bellbird", "coordinator"] {
        for trigger in ["presence", "spike", "first-seen", "silence"] {
            let mut want = [0u64; 3];
            for n in &r.notices {
                if n["subscriber"] == sub && n["trigger"] == trigger {
                    let k = ["sent", "folded", "deferred"]
                        .iter()
                        .position(|d| n["disposition"] == *d)
                        .unwrap();
                    want[k] += 1;
                }
            }
            let got = summary_row(&r.stderr, sub, trigger).unwrap_or([0; 3]);
            assert_eq!(got, want, "{sub} {trigger}: {}", r.stderr);
        }
    }
}

/// Not a test: writes the demo-feed archive used by docs/replay.md and the
/// throughput figure. `OUTRIDER_REPLAY_OUT` (a folder), `OUTRIDER_REPLAY_DAYS`
/// (default 90) and `OUTRIDER_REPLAY_HEARTBEATS` (default 1) choose what.
///
/// `cargo test --test integration replay::write_demo_archive -- --ignored`
#[test]
#[ignore]
fn write_demo_archive() {
    let out = PathBuf::from(
        std::env::var("OUTRIDER_REPLAY_OUT").expect("set OUTRIDER_REPLAY_OUT to a folder"),
    );
    let days: i64 = std::env::var("OUTRIDER_REPLAY_DAYS")
        .ok()
        .map(|d| d.parse().unwrap())
        .unwrap_or(90);
    let heartbeats = std::env::var("OUTRIDER_REPLAY_HEARTBEATS").map_or(true, |v| v != "0");
    let (cfg, archive) = demo_archive(&out, days, heartbeats);
    println!("config {}\narchive {}", cfg.display(), archive.display());
}
