//! Engine tests: each trigger kind on hand-built message sequences whose
//! expected outcome is worked out in the comments.

use super::*;
use crate::config::{parse, Files};
use crate::model::{Correction, Heartbeat};
use std::path::Path;

const SITES: &str = "deploymentID,locationName,latitude,longitude,deploymentStart\n\
KB-06,Pine Hill,-31.56393,148.05781,2026-01-01T00:00:00+11:00\n\
KB-07,Swamp Corner,-31.56393,148.14219,2026-01-01T00:00:00+11:00\n\
KB-16,River Bend,-31.70821,148.22656,2026-06-20T00:00:00+10:00\n";

fn config(subscribers: &str) -> Arc<Config> {
    let src = format!(
        "[service]\ntimezone = \"Australia/Sydney\"\n[sites]\nfile = \"sites.csv\"\nsilence_hours = 12\n[email_folder]\ndir = \"mail\"\n[species.groups]\npredators = [\"Canis familiaris\", \"Vulpes vulpes\"]\n{subscribers}"
    );
    let files = Files {
        read: &|_p: &Path| Ok(SITES.to_string()),
        env: &|_| None,
    };
    Arc::new(parse(Path::new("/t/outrider.toml"), &src, &[], &files).expect("valid test config"))
}

fn t(s: &str) -> DateTime<Utc> {
    DateTime::parse_from_rfc3339(s).unwrap().with_timezone(&Utc)
}

fn obs(id: &str, dep: &str, species: &str, at: DateTime<Utc>) -> Message {
    Message::Observation(Observation {
        observation_id: id.into(),
        deployment_id: dep.into(),
        event_start: at,
        event_end: None,
        observation_type: ObservationType::Animal,
        scientific_name: Some(species.into()),
        count: 1,
        classification_probability: Some(0.95),
        classification_method: None,
        media_id: None,
        file_path: Some(format!("https://images.kellerby.example/{id}.jpg")),
        vernacular_name: None,
        life_stage: None,
        sex: None,
        behavior: None,
    })
}

fn hb(dep: &str, at: DateTime<Utc>) -> Message {
    Message::Heartbeat(Heartbeat {
        deployment_id: dep.into(),
        timestamp: at,
        battery_percent: None,
        signal_dbm: None,
        images_since_last: None,
    })
}

fn notices(out: &[Output]) -> Vec<(&Notice, &str)> {
    out.iter()
        .filter_map(|o| match o {
            Output::Notice { notice, reason, .. } => Some((notice.as_ref(), reason.as_str())),
            _ => None,
        })
        .collect()
}

const STONECROFT: &str = "[[subscriber]]\nid = \"stonecroft\"\nemail = \"o@stonecroft.example\"\narea = { lat = -31.566, lon = 148.057, radius_km = 6.0 }\n[[subscriber.watch]]\nname = \"dogs\"\ntrigger = \"presence\"\nspecies = [\"@predators\"]\ncooldown_minutes = 120\nchannels = [\"email\"]\n";

#[test]
fn presence_sends_once_per_event_and_folds_within_the_cooldown() {
    let mut e = Engine::new(config(STONECROFT));
    let t0 = t("2026-07-14T02:00:00+10:00");
    // A trigger at KB-06 (inside the 6 km circle): a new event -> sent.
    let out = e.apply(&obs("a1", "KB-06", "Canis familiaris", t0), t0);
    let n = notices(&out);
    assert_eq!(n.len(), 1);
    assert_eq!(
        (n[0].0.disposition, n[0].0.trigger),
        (Disposition::Sent, crate::notify::Trigger::Presence)
    );
    assert_eq!(
        n[0].0.evidence.distance_km,
        Some(0.24),
        "geodesic distance from the circle's centre, 2 decimals"
    );
    assert_eq!(
        n[0].0.image_url.as_deref(),
        Some("https://images.kellerby.example/a1.jpg")
    );
    // Another trigger 20 min later is the same independent event: nothing new.
    let t1 = t0 + Duration::minutes(20);
    assert!(notices(&e.apply(&obs("a2", "KB-06", "Canis familiaris", t1), t1)).is_empty());
    // 51 min after a2 (gap > 30 min): a new event, within the 120 min cooldown -> folded.
    let t2 = t1 + Duration::minutes(51);
    let out = e.apply(&obs("a3", "KB-06", "Canis familiaris", t2), t2);
    assert_eq!(notices(&out)[0].0.disposition, Disposition::Folded);
    // A fox at KB-07 (8 km away): outside the circle, nothing.
    assert!(notices(&e.apply(&obs("f1", "KB-07", "Vulpes vulpes", t2), t2)).is_empty());
    // After the cooldown the next event is sent and carries the folded one.
    let t3 = t0 + Duration::minutes(125);
    let out = e.apply(&obs("a4", "KB-06", "Canis familiaris", t3), t3);
    let n = notices(&out);
    assert_eq!(n[0].0.disposition, Disposition::Sent);
    assert_eq!(n[0].0.folded.len(), 1);
    assert_eq!(n[0].0.folded[0].event_time, t2);
}

#[test]
fn probability_and_hours_filter_before_anything_is_decided() {
    let cfg = config(&STONECROFT.replace(
        "cooldown_minutes = 120",
        "cooldown_minutes = 0\nmin_probability = 0.9\nhours = \"20:00-06:00\"",
    ));
    let mut e = Engine::new(cfg);
    // 14:00 local (04:00Z in winter, AEST = UTC+10): outside 20:00-06:00.
    let day = t("2026-07-14T14:00:00+10:00");
    assert!(notices(&e.apply(&obs("d1", "KB-06", "Canis familiaris", day), day)).is_empty());
    // 23:00 local, probability 0.5: below 0.9, no notice; a later trigger of
    // the same event at 0.95 lifts the event's best probability: notice then.
    let night = t("2026-07-14T23:00:00+10:00");
    let mut low = obs("n1", "KB-06", "Canis familiaris", night);
    if let Message::Observation(o) = &mut low {
        o.classification_probability = Some(0.5);
    }
    assert!(notices(&e.apply(&low, night)).is_empty());
    let later = night + Duration::minutes(3);
    let n = e.apply(&obs("n2", "KB-06", "Canis familiaris", later), later);
    assert_eq!(notices(&n).len(), 1);
}

#[test]
fn first_seen_needs_a_quiet_span_that_was_watched() {
    let sub = "[[subscriber]]\nid = \"coord\"\nemail = \"c@kellerby.example\"\narea = \"all\"\n[[subscriber.watch]]\nname = \"new\"\ntrigger = \"first-seen\"\nspecies = [\"Dama dama\"]\nquiet_days = 30\ncooldown_minutes = 0\nchannels = [\"email\"]\n";
    let mut e = Engine::new(config(sub));
    let t0 = t("2026-07-10T06:00:00+10:00");
    // KB-06 has been deployed since January, no deer: first seen.
    let n = e.apply(&obs("d1", "KB-06", "Dama dama", t0), t0);
    assert_eq!(notices(&n).len(), 1);
    assert_eq!(notices(&n)[0].0.evidence.quiet_days, Some(30));
    // Ten days later at KB-07: a deer was seen 10 days ago at a covered site.
    let t1 = t0 + Duration::days(10);
    assert!(notices(&e.apply(&obs("d2", "KB-07", "Dama dama", t1), t1)).is_empty());
    // 31 days after that: quiet again -> first seen.
    let t2 = t1 + Duration::days(31);
    assert_eq!(
        notices(&e.apply(&obs("d3", "KB-06", "Dama dama", t2), t2)).len(),
        1
    );
}

/// 40 days from `start`: hourly heartbeats at KB-06 and KB-07, and a wild
/// dog at KB-07 every ten days (hours 100, 340, 580, 820).
fn quiet_history(start: DateTime<Utc>) -> Vec<Message> {
    let mut msgs = Vec::new();
    for h in 0..(40 * 24) {
        let at = start + Duration::hours(h);
        msgs.push(hb("KB-06", at));
        msgs.push(hb("KB-07", at));
        if h % 240 == 100 {
            msgs.push(obs(
                &format!("h{h}"),
                "KB-07",
                "Canis familiaris",
                at + Duration::minutes(5),
            ));
        }
    }
    msgs
}

#[test]
fn a_spike_over_a_quiet_history_fires_with_its_evidence() {
    let sub = "[[subscriber]]\nid = \"bell\"\nemail = \"b@bellbird.example\"\narea = { sites = [\"KB-07\"] }\n[[subscriber.watch]]\nname = \"dogs up\"\ntrigger = \"spike\"\nspecies = [\"Canis familiaris\"]\nwindow_hours = 24\nratio = 3.0\nmin_count = 3\ncooldown_minutes = 0\nchannels = [\"email\"]\n";
    let mut e = Engine::new(config(sub));
    let start = t("2026-06-01T00:00:00+10:00");
    // Hourly heartbeats at KB-06 and KB-07 for 40 days; a dog at KB-07 every 10 days.
    let msgs = quiet_history(start);
    e.warm(msgs.iter());
    // Then five dog visits an hour apart.
    let burst = start + Duration::days(40) + Duration::hours(1);
    let mut fired = Vec::new();
    for k in 0..5 {
        let at = burst + Duration::hours(k);
        let _ = e.apply(&hb("KB-07", at), at);
        for o in e.apply(&obs(&format!("b{k}"), "KB-07", "Canis familiaris", at), at) {
            if let Output::Notice { notice, .. } = o {
                fired.push((k, notice));
            }
        }
    }
    // The history holds 3 events in the 28-night baseline window (days 11..39):
    // at hours 100+240j for j = 1..3 fall in it; the prior adds the regional
    // rate (same 4 events over 2 cameras). Counts of 1 and 2 are below
    // min_count 3, so the first notice can come at the third visit.
    assert!(
        !fired.is_empty(),
        "a burst of five visits in a day at a site with one visit per ten days is a spike"
    );
    let (k, n) = &fired[0];
    assert!(
        *k >= 2,
        "min_count = 3: not before the third visit (fired at {k})"
    );
    let ev = &n.evidence;
    assert_eq!(ev.count, Some(*k as u32 + 1));
    assert!(ev.p_value.unwrap() < 0.01);
    assert!(ev.ratio.unwrap() >= 3.0);
    let expected = ev.gamma_shape.unwrap() * ev.exposure_nights.unwrap() / ev.gamma_rate.unwrap();
    assert!(
        (ev.expected.unwrap() - expected).abs() < 1e-12,
        "expected = a e / b (METHODS 3)"
    );
    assert_eq!(ev.window_hours, Some(24.0));
}

#[test]
fn a_silent_camera_is_reported_once_and_again_when_it_returns() {
    let sub = "[[subscriber]]\nid = \"coord\"\nemail = \"c@kellerby.example\"\narea = { sites = [\"KB-06\"] }\n[[subscriber.watch]]\nname = \"quiet cameras\"\ntrigger = \"silence\"\nsilence_hours = 12\ncooldown_minutes = 0\nchannels = [\"email\"]\n";
    let mut e = Engine::new(config(sub));
    let last = t("2026-07-14T08:00:00+10:00");
    e.apply(&hb("KB-06", last), last);
    assert!(
        notices(&e.tick(last + Duration::hours(12))).is_empty(),
        "exactly 12 h is not more than the limit"
    );
    let out = e.tick(last + Duration::hours(12) + Duration::minutes(1));
    let n = notices(&out);
    assert_eq!(n.len(), 1);
    assert_eq!(n[0].0.trigger, crate::notify::Trigger::Silence);
    assert_eq!(n[0].0.evidence.silent_hours, Some(12.02));
    assert!(
        notices(&e.tick(last + Duration::hours(20))).is_empty(),
        "once per episode"
    );
    let back = last + Duration::hours(30);
    let n = e.apply(&hb("KB-06", back), back);
    assert_eq!(
        notices(&n)[0].0.trigger,
        crate::notify::Trigger::SilenceEnded
    );
    assert_eq!(notices(&n)[0].0.evidence.silent_hours, Some(30.0));
}

#[test]
fn a_retraction_follows_up_a_sent_notice_and_removes_the_event() {
    let mut e = Engine::new(config(STONECROFT));
    let t0 = t("2026-07-14T02:00:00+10:00");
    let first = e.apply(&obs("x1", "KB-06", "Vulpes vulpes", t0), t0);
    let sent = notices(&first)[0].0.clone();
    let fix = Message::Correction(Correction {
        observation_id: "x1".into(),
        deployment_id: "KB-06".into(),
        scientific_name: None,
        count: None,
        observation_type: Some(ObservationType::Blank),
    });
    let out = e.apply(&fix, t0 + Duration::hours(1));
    assert!(out
        .iter()
        .any(|o| matches!(o, Output::EventDelete(id) if id.start == t0)));
    let n = notices(&out);
    assert_eq!(n.len(), 1);
    assert_eq!(n[0].0.trigger, crate::notify::Trigger::Retraction);
    assert_ne!(n[0].0.id(), sent.id(), "a follow-up is its own notice");
    assert_eq!(e.events().count(), 0);
}

#[test]
fn quiet_hours_defer_non_urgent_notices() {
    let cfg = config(&STONECROFT.replace("area =", "quiet_hours = \"21:30-05:00\"\narea ="));
    let mut e = Engine::new(cfg);
    let late = t("2026-07-14T23:00:00+10:00");
    let n = e.apply(&obs("q1", "KB-06", "Vulpes vulpes", late), late);
    assert_eq!(notices(&n)[0].0.disposition, Disposition::Deferred);
}

#[test]
fn a_slow_build_up_signals_once_the_cusum_passes_h() {
    let sub = "[[subscriber]]\nid = \"coord\"\nemail = \"c@kellerby.example\"\narea = { sites = [\"KB-07\"] }\n[[subscriber.watch]]\nname = \"dogs creeping up\"\ntrigger = \"build-up\"\nspecies = [\"Canis familiaris\"]\nratio = 2.0\ncooldown_minutes = 0\nchannels = [\"email\"]\n";
    let mut e = Engine::new(config(sub));
    let start = t("2026-06-01T00:00:00+10:00");
    let msgs = quiet_history(start);
    e.warm(msgs.iter());
    // First tick: the last 14 days run quietly; nothing is notified.
    let mut now = start + Duration::days(40) + Duration::minutes(5);
    assert!(notices(&e.tick(now)).is_empty());
    // Then one dog a day at noon. With r0 near 0.1 per night and r1 = 2 r0,
    // k = e (r1 - r0) / ln 2 is about 0.15 a day, so S climbs by about 0.85
    // a day and crosses h = 5 after six days at the earliest (Lucas 1985
    // recursion, METHODS 4).
    let mut fired = Vec::new();
    for d in 0..10 {
        let noon = now + Duration::hours(12);
        for k in 0..24 {
            let _ = e.apply(
                &hb("KB-07", now + Duration::hours(k)),
                now + Duration::hours(k),
            );
        }
        let _ = e.apply(
            &obs(&format!("u{d}"), "KB-07", "Canis familiaris", noon),
            noon,
        );
        now += Duration::days(1);
        for (n, _) in notices(&e.tick(now)) {
            fired.push((d, n.clone()));
        }
    }
    assert!(
        !fired.is_empty(),
        "a daily visit at a site with one every ten days is a build-up"
    );
    let (day, n) = &fired[0];
    assert!(
        (5..=9).contains(day),
        "fired after {} daily visits",
        day + 1
    );
    assert_eq!(n.trigger, crate::notify::Trigger::BuildUp);
    assert_eq!(n.scientific_name.as_deref(), Some("Canis familiaris"));
    let ev = &n.evidence;
    assert_eq!(ev.ratio, Some(2.0));
    assert_eq!(ev.count, Some(1));
    let mean = ev.gamma_shape.unwrap() / ev.gamma_rate.unwrap();
    assert!(
        (ev.expected.unwrap() - mean * ev.exposure_nights.unwrap()).abs() < 1e-9,
        "expected = r0 e with r0 the posterior mean"
    );
    assert!(
        fired.len() <= 2,
        "the statistic resets after a signal: {fired:?}"
    );
}

#[test]
fn a_correction_that_overtakes_its_observation_waits_for_it() {
    // MQTT keeps order per topic only: a retraction on .../correction can
    // arrive before the observation on .../observation.
    let mut e = Engine::new(config(STONECROFT));
    let t0 = t("2026-07-14T02:00:00+10:00");
    let fix = Message::Correction(Correction {
        observation_id: "late1".into(),
        deployment_id: "KB-06".into(),
        scientific_name: None,
        count: None,
        observation_type: Some(ObservationType::Blank),
    });
    assert!(e.apply(&fix, t0).is_empty());
    let out = e.apply(
        &obs("late1", "KB-06", "Vulpes vulpes", t0),
        t0 + Duration::seconds(5),
    );
    assert!(
        notices(&out).is_empty(),
        "a retracted observation is not notified"
    );
    assert_eq!(e.events().count(), 0, "and leaves no event");
}

/// One step of a simulated daemon run: a message arriving at a time, or a
/// tick of the time-driven checks.
enum Step {
    Msg(Box<Message>, DateTime<Utc>),
    Tick(DateTime<Utc>),
}

/// Three days at three cameras: dogs, foxes and pigs at pseudo-random
/// times (a fixed linear congruential sequence), hourly heartbeats except
/// for a 20-hour outage at KB-07, one retraction, and a tick every 30 min.
fn restart_run() -> Vec<Step> {
    let t0 = t("2026-07-14T00:00:00+10:00");
    let mut x: u64 = 12345;
    let mut next = |m: u64| {
        x = x
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (x >> 33) % m
    };
    let mut steps = Vec::new();
    let mut n = 0;
    for half_hour in 0..(3 * 48) {
        let at = t0 + Duration::minutes(30 * half_hour);
        for dep in ["KB-06", "KB-07", "KB-16"] {
            let out = dep == "KB-07" && (20..60).contains(&half_hour);
            if half_hour % 2 == 0 && !out {
                steps.push(Step::Msg(Box::new(hb(dep, at)), at));
            }
            if !out && next(3) == 0 {
                let species = ["Canis familiaris", "Vulpes vulpes", "Sus scrofa"][next(3) as usize];
                let when = at + Duration::minutes(next(29) as i64);
                n += 1;
                steps.push(Step::Msg(
                    Box::new(obs(&format!("o{n}"), dep, species, when)),
                    when + Duration::minutes(1),
                ));
            }
        }
        if half_hour == 70 {
            let fix = Message::Correction(Correction {
                observation_id: "o3".into(),
                deployment_id: "KB-06".into(),
                scientific_name: None,
                count: None,
                observation_type: Some(ObservationType::Blank),
            });
            steps.push(Step::Msg(Box::new(fix), at));
        }
        steps.push(Step::Tick(at + Duration::minutes(29)));
    }
    steps
}

/// What a run decided: each notice's id, disposition and held events.
fn decisions(out: &[Output]) -> Vec<(String, Disposition, Vec<String>)> {
    notices(out)
        .into_iter()
        .map(|(n, _)| {
            let held = n.folded.iter().map(|f| f.event_id.to_string()).collect();
            (n.id().as_str().to_string(), n.disposition, held)
        })
        .collect()
}

fn drive(e: &mut Engine, steps: &[Step]) -> Vec<Output> {
    let mut out = Vec::new();
    for s in steps {
        match s {
            Step::Msg(m, now) => out.extend(e.apply(m, *now)),
            Step::Tick(now) => out.extend(e.tick(*now)),
        }
    }
    out
}

/// kill -9 at any step: the restarted engine, warmed from the stored
/// messages and given back the stored decisions, decides everything after
/// the restart as the engine that kept running did. Without the decisions
/// (warm alone) it would not: it sends notices the running one folded.
#[test]
fn a_restart_anywhere_decides_as_the_engine_that_kept_running() {
    let subs = "[[subscriber]]\nid = \"stonecroft\"\nemail = \"o@stonecroft.example\"\nmax_per_hour = 3\narea = \"all\"\n[[subscriber.watch]]\nname = \"predators\"\ntrigger = \"presence\"\nspecies = [\"@predators\"]\ncooldown_minutes = 180\nchannels = [\"email\"]\n[[subscriber.watch]]\nname = \"pigs back\"\ntrigger = \"first-seen\"\nspecies = [\"Sus scrofa\"]\nquiet_days = 1\ncooldown_minutes = 0\nchannels = [\"email\"]\n[[subscriber]]\nid = \"coord\"\nemail = \"c@kellerby.example\"\narea = \"all\"\n[[subscriber.watch]]\nname = \"quiet cameras\"\ntrigger = \"silence\"\nsilence_hours = 6\ncooldown_minutes = 0\nchannels = [\"email\"]\n";
    let cfg = config(subs);
    let steps = restart_run();
    let mut whole = Engine::new(cfg.clone());
    let mut all = Vec::new();
    let mut at_step = Vec::new();
    for s in &steps {
        let out = drive(&mut whole, std::slice::from_ref(s));
        at_step.push(all.len());
        all.extend(out);
    }
    let sent = decisions(&all)
        .iter()
        .filter(|d| d.1 == Disposition::Sent)
        .count();
    let folded = decisions(&all)
        .iter()
        .filter(|d| d.1 == Disposition::Folded)
        .count();
    assert!(
        sent > 5 && folded > 5,
        "the run exercises the policy: {sent} sent, {folded} folded"
    );
    let mut differs_without = 0;
    for cut in (1..steps.len()).step_by(7) {
        // What the store holds at the kill: the messages and decisions
        // committed before step `cut`; history comes back by time, then
        // the corrections (Backend::history).
        let mut history: Vec<&Message> = steps[..cut]
            .iter()
            .filter_map(|s| match s {
                Step::Msg(m, _) => Some(m.as_ref()),
                Step::Tick(_) => None,
            })
            .collect();
        history.sort_by_key(|m| match m {
            Message::Observation(o) => (0, o.event_start),
            Message::Heartbeat(h) => (0, h.timestamp),
            Message::Correction(_) => (1, DateTime::<Utc>::MIN_UTC),
        });
        let stored: Vec<Notice> = notices(&all[..at_step[cut]])
            .into_iter()
            .map(|(n, _)| n.clone())
            .collect();
        let want = decisions(&all[at_step[cut]..]);

        let mut restarted = Engine::new(cfg.clone());
        restarted.warm(history.iter().copied());
        restarted.restore(&stored);
        let got = decisions(&drive(&mut restarted, &steps[cut..]));
        assert_eq!(got, want, "restart before step {cut}");

        let mut forgetful = Engine::new(cfg.clone());
        forgetful.warm(history.iter().copied());
        if decisions(&drive(&mut forgetful, &steps[cut..])) != want {
            differs_without += 1;
        }
    }
    assert!(
        differs_without > 0,
        "the check can tell a forgetful restart"
    );
}

proptest::proptest! {
    /// The hand-written RFC 3339 writer of event keys agrees with chrono's
    /// `to_rfc3339_opts(Secs, true)` (the reference) over years 1-9999,
    /// sub-second parts included (they are dropped, not rounded).
    #[test]
    fn event_key_time_matches_chrono(secs in -62_000_000_000i64..253_000_000_000i64, nanos in 0u32..1_000_000_000) {
        let t = DateTime::from_timestamp(secs, nanos).unwrap();
        proptest::prop_assert_eq!(rfc(t), t.to_rfc3339_opts(chrono::SecondsFormat::Secs, true));
    }
}

#[test]
fn event_key_replaces_spaces_in_the_name() {
    let id = EventId {
        deployment_id: "KB-01".into(),
        scientific_name: "Canis familiaris".into(),
        start: t("2026-07-14T02:00:00+10:00"),
    };
    assert_eq!(
        event_key(&id),
        "KB-01:Canis_familiaris:2026-07-13T16:00:00Z"
    );
}
