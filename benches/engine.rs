//! Benchmarks of the engine (criterion). Figures and the commands that
//! produced them: docs/performance.md; how to run: benches/README.md.
//!
//! Owns only synthetic data of the invented Kellerby Basin district: camera
//! sites on a square grid around (-31.6, 148.1) and a feed shaped like the
//! demo's (service/demo/district.rs rates and daily rhythms, scaled up).
//! Measures, never asserts: speed and memory goals are judged from these
//! numbers, not by tests.
//!
//! Groups (filter with `cargo bench --bench engine -- <group>`):
//! - `hot_path`: one observation through `Engine::apply` on a 100-camera
//!   network with a mix of subscribers, warmed with 35 days of history.
//! - `rule_matching`: one new event matched against 1k..1M subscribers
//!   (circles of 1-20 km over 10,000 sites, one presence watch each).
//! - `rule_book`: `RuleBook::compile` for 100k subscribers over 10k sites.
//! - `config_parse`: `config::parse` of one file with many subscribers.
//! - `startup`: `load_history` + `Engine::warm` from a year-long store.
//!
//! `cargo bench --bench engine -- memory` instead prints the peak memory
//! (VmHWM) of building the 100k x 10k rule book in a process of its own;
//! `cargo bench --bench engine -- digests` times building, queuing (real
//! SQLite, synchronous=FULL) and rendering 100,000 daily digests.

use chrono::{DateTime, Duration, Timelike, Utc};
use criterion::{BenchmarkId, Criterion, Throughput};
use outrider::config::{parse, AreaSpec, Config, Files};
use outrider::demo::district::{hour_weight, SPECIES};
use outrider::engine::rules::RuleBook;
use outrider::engine::Engine;
use outrider::geo::{Area, Circle, LatLon};
use outrider::model::{Heartbeat, Message, Observation, ObservationType};
use outrider::store::sqlite::{load_history, Durability, Sqlite};
use outrider::store::{Backend, Ingest};
use rand::rngs::SmallRng;
use rand::{Rng, SeedableRng};
use std::hint::black_box;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::Instant;

/// Centre of the invented district.
const CENTRE: (f64, f64) = (-31.6, 148.1);
/// The 100-camera network: a 10 x 10 grid, 3 km apart.
const NET_SIDE: usize = 10;
const NET_SPACING_KM: f64 = 3.0;
/// The large network for rule matching: 100 x 100 sites, 3 km apart (the
/// same density as the 100-camera network, about 297 km across).
const BIG_SIDE: usize = 100;
const BIG_SPACING_KM: f64 = 3.0;
/// Demo rates scaled so that 100 cameras give about 2 million observations
/// a year (the demo's 16 sites give about 3.5 per camera-day).
const RATE_SCALE: f64 = 16.0;

/// "Now" of every benchmark: 02:00 in Sydney (winter), a night hour.
fn now0() -> DateTime<Utc> {
    DateTime::parse_from_rfc3339("2026-07-14T02:00:00+10:00")
        .expect("valid instant")
        .with_timezone(&Utc)
}

// ---------------------------------------------------------------- sites

struct GridSite {
    id: String,
    lat: f64,
    lon: f64,
}

/// `side` x `side` sites `spacing_km` apart, centred on the district.
fn grid(side: usize, spacing_km: f64) -> Vec<GridSite> {
    let dlat = spacing_km / 110.9;
    let dlon = spacing_km / (111.32 * CENTRE.0.to_radians().cos());
    let mid = (side as f64 - 1.0) / 2.0;
    (0..side * side)
        .map(|i| {
            let (row, col) = ((i / side) as f64, (i % side) as f64);
            GridSite {
                id: format!("KB-{i:05}"),
                lat: CENTRE.0 + (mid - row) * dlat,
                lon: CENTRE.1 + (col - mid) * dlon,
            }
        })
        .collect()
}

fn sites_csv(sites: &[GridSite], start: DateTime<Utc>) -> String {
    let mut s = String::from("deploymentID,locationName,latitude,longitude,deploymentStart\n");
    for g in sites {
        s.push_str(&format!(
            "{},Grid {},{:.6},{:.6},{}\n",
            g.id,
            g.id,
            g.lat,
            g.lon,
            start.to_rfc3339()
        ));
    }
    s
}

/// A config from subscriber TOML, with the sites file served from memory.
fn config(sites: &[GridSite], subscribers: &str) -> Config {
    let header = r#"
[service]
timezone = "Australia/Sydney"
[sites]
file = "sites.csv"
silence_hours = 12
[detection]
min_probability = 0.80
independence_minutes = 30
[baseline]
window_days = 28
guard_days = 1
prior_nights = 14
alpha = 0.01
[email_folder]
dir = "mail"
[species.groups]
predators = ["Canis familiaris", "Vulpes vulpes", "Felis catus"]
pigs = ["Sus scrofa"]
deer = ["Dama dama"]
"#;
    let csv = sites_csv(sites, now0() - Duration::days(400));
    let files = Files {
        read: &|_p: &Path| Ok(csv.clone()),
        env: &|_| None,
    };
    let src = format!("{header}\n{subscribers}");
    match parse(Path::new("/bench/outrider.toml"), &src, &[], &files) {
        Ok(c) => c,
        Err(e) => panic!("bench config does not parse: {e}"),
    }
}

/// A point `dx_km` east and `dy_km` north of the district centre.
fn offset(dx_km: f64, dy_km: f64) -> (f64, f64) {
    (
        CENTRE.0 + dy_km / 110.9,
        CENTRE.1 + dx_km / (111.32 * CENTRE.0.to_radians().cos()),
    )
}

/// The 100-camera network's subscribers: 30 landholders (circles of
/// 2-8 km: predators at night, pigs any time), 10 graziers watching a 2 x 2
/// block of cameras for a wild-dog spike, 5 reserves (10 km circles: first
/// deer, cats by the clock), and the district coordinator (everything:
/// first-seen, silence, a spike test on predators and pigs).
fn mixed_subscribers() -> String {
    let mut rng = SmallRng::seed_from_u64(31);
    let half = (NET_SIDE as f64 - 1.0) * NET_SPACING_KM / 2.0;
    let mut s = String::new();
    for i in 0..30 {
        let (lat, lon) = offset(rng.gen_range(-half..half), rng.gen_range(-half..half));
        let r = rng.gen_range(2.0..8.0);
        let quiet = if i % 2 == 0 {
            "quiet_hours = \"21:30-05:00\"\n"
        } else {
            ""
        };
        s.push_str(&format!(
            r#"[[subscriber]]
id = "land-{i:02}"
email = "owner{i}@land.example"
{quiet}area = {{ lat = {lat:.5}, lon = {lon:.5}, radius_km = {r:.1} }}
  [[subscriber.watch]]
  name = "dogs and foxes at night"
  trigger = "presence"
  species = ["@predators"]
  hours = "dusk-to-dawn"
  min_probability = 0.85
  cooldown_minutes = 120
  urgent = true
  channels = ["email"]
  [[subscriber.watch]]
  name = "pigs any time"
  trigger = "presence"
  species = ["@pigs"]
  channels = ["email"]
"#
        ));
    }
    for i in 0..10 {
        let (row, col) = (
            rng.gen_range(0..NET_SIDE - 1),
            rng.gen_range(0..NET_SIDE - 1),
        );
        let ids: Vec<String> = [(0, 0), (0, 1), (1, 0), (1, 1)]
            .iter()
            .map(|(dr, dc)| format!("\"KB-{:05}\"", (row + dr) * NET_SIDE + col + dc))
            .collect();
        s.push_str(&format!(
            r#"[[subscriber]]
id = "grazier-{i:02}"
email = "g{i}@grazier.example"
area = {{ sites = [{}] }}
  [[subscriber.watch]]
  name = "wild dog build-up"
  trigger = "spike"
  species = ["Canis familiaris"]
  window_hours = 24
  ratio = 3.0
  min_count = 3
  channels = ["email"]
"#,
            ids.join(", ")
        ));
    }
    for i in 0..5 {
        let (lat, lon) = offset(rng.gen_range(-half..half), rng.gen_range(-half..half));
        s.push_str(&format!(
            r#"[[subscriber]]
id = "reserve-{i:02}"
email = "r{i}@reserve.example"
max_per_hour = 3
area = {{ lat = {lat:.5}, lon = {lon:.5}, radius_km = 10.0 }}
  [[subscriber.watch]]
  name = "first deer"
  trigger = "first-seen"
  species = ["@deer"]
  quiet_days = 30
  channels = ["email"]
  [[subscriber.watch]]
  name = "cats in the evening"
  trigger = "presence"
  species = ["Felis catus"]
  hours = "18:00-06:00"
  channels = ["email"]
"#
        ));
    }
    s.push_str(
        r#"[[subscriber]]
id = "coordinator"
email = "pests@kellerby.example"
area = "all"
  [[subscriber.watch]]
  name = "new species at a site"
  trigger = "first-seen"
  species = ["@predators", "@pigs", "@deer"]
  quiet_days = 30
  channels = ["email"]
  [[subscriber.watch]]
  name = "silent cameras"
  trigger = "silence"
  silence_hours = 12
  channels = ["email"]
  [[subscriber.watch]]
  name = "district spike"
  trigger = "spike"
  species = ["@predators", "@pigs"]
  window_hours = 24
  ratio = 3.0
  min_count = 3
  channels = ["email"]
"#,
    );
    s
}

fn network_config() -> Arc<Config> {
    Arc::new(config(
        &grid(NET_SIDE, NET_SPACING_KM),
        &mixed_subscribers(),
    ))
}

// ----------------------------------------------------------------- feed

fn mix(mut x: u64) -> u64 {
    // splitmix64 finaliser (as in service/demo/feed.rs)
    x = x.wrapping_add(0x9E37_79B9_7F4A_7C15);
    x = (x ^ (x >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    x = (x ^ (x >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    x ^ (x >> 31)
}

fn poisson(rng: &mut SmallRng, lambda: f64) -> u32 {
    let l = (-lambda).exp();
    let (mut k, mut p) = (0, 1.0);
    loop {
        p *= rng.gen::<f64>();
        if p <= l || k > 1000 {
            return k;
        }
        k += 1;
    }
}

fn observation(id: String, dep: &str, species: usize, at: DateTime<Utc>, count: u32) -> Message {
    let sp = &SPECIES[species];
    Message::Observation(Observation {
        file_path: Some(format!("https://images.kellerby.example/{dep}/{id}.jpg")),
        media_id: Some(format!("{id}-m")),
        observation_id: id,
        deployment_id: dep.to_string(),
        event_start: at,
        event_end: None,
        observation_type: ObservationType::Animal,
        scientific_name: Some(sp.scientific_name.to_string()),
        count,
        classification_probability: Some(0.9),
        classification_method: None,
        vernacular_name: Some(sp.vernacular_name.to_string()),
        life_stage: None,
        sex: None,
        behavior: None,
    })
}

fn heartbeat(dep: &str, at: DateTime<Utc>) -> Message {
    Message::Heartbeat(Heartbeat {
        deployment_id: dep.to_string(),
        timestamp: at,
        battery_percent: Some(88.0),
        signal_dbm: Some(-76.0),
        images_since_last: Some(3),
    })
}

fn message_time(m: &Message) -> DateTime<Utc> {
    match m {
        Message::Observation(o) => o.event_start,
        Message::Heartbeat(h) => h.timestamp,
        Message::Correction(_) => DateTime::<Utc>::MAX_UTC,
    }
}

/// The synthetic feed of the 100-camera network in `[from, to)`, in time
/// order: an hourly heartbeat per camera and, per species, Poisson events
/// of 1-4 triggers a minute apart at the demo's rates x RATE_SCALE.
fn feed(sites: &[GridSite], from: DateTime<Utc>, to: DateTime<Utc>) -> Vec<Message> {
    let tz = chrono_tz::Australia::Sydney;
    let mut out = Vec::new();
    let h0 = from.timestamp().div_euclid(3600);
    let h1 = to.timestamp().div_euclid(3600);
    for h in h0..h1 {
        let start = DateTime::from_timestamp(h * 3600, 0).unwrap_or(from);
        let local_hour = start.with_timezone(&tz).hour();
        for (i, site) in sites.iter().enumerate() {
            let mut rng = SmallRng::seed_from_u64(mix(mix(i as u64 + 1) ^ mix(h as u64)));
            out.push(heartbeat(
                &site.id,
                start + Duration::minutes(7 + (i % 50) as i64),
            ));
            for (si, sp) in SPECIES.iter().enumerate() {
                let mut rate = sp.rate_per_night * RATE_SCALE;
                if sp.scientific_name == "Sus scrofa" && i < sites.len() / 2 {
                    rate = 0.0;
                }
                let n = poisson(&mut rng, rate * hour_weight(sp.rhythm, local_hour));
                for k in 0..n {
                    let at = start + Duration::seconds(rng.gen_range(0..3600));
                    let group = rng.gen_range(1..=sp.max_group);
                    for t in 0..rng.gen_range(1..=4) {
                        let when = at + Duration::seconds(60 * t + rng.gen_range(0..20));
                        let id = format!("{}-{h}-{si}-{k}-{t}", site.id);
                        out.push(observation(
                            id,
                            &site.id,
                            si,
                            when,
                            rng.gen_range(1..=group),
                        ));
                    }
                }
            }
        }
    }
    out.retain(|m| message_time(m) >= from && message_time(m) < to);
    out.sort_by_key(message_time);
    out
}

fn warmed_network() -> (Engine, Vec<GridSite>) {
    let cfg = network_config();
    let sites = grid(NET_SIDE, NET_SPACING_KM);
    let history = feed(&sites, now0() - Duration::days(35), now0());
    let mut engine = Engine::new(cfg);
    engine.warm(history.iter());
    (engine, sites)
}

// ------------------------------------------------------------ hot path

/// Index of the species in the demo table.
fn species(name: &str) -> usize {
    SPECIES
        .iter()
        .position(|s| s.scientific_name == name)
        .unwrap_or(0)
}

/// The hourly heartbeats of every camera in the day before `until`.
fn day_of_heartbeats(engine: &mut Engine, sites: &[GridSite], until: DateTime<Utc>) {
    for h in 0..24 {
        let at = until - Duration::hours(24 - h);
        for s in sites {
            engine.apply(&heartbeat(&s.id, at), at);
        }
    }
}

/// Whether a criterion filter given on the command line can select
/// something in `group`, so that a filtered run skips the set-up of the
/// other groups (some take tens of seconds).
fn wanted(group: &str) -> bool {
    let filters: Vec<String> = std::env::args()
        .skip(1)
        .filter(|a| !a.starts_with('-'))
        .flat_map(|a| a.split('|').map(str::to_string).collect::<Vec<_>>())
        .collect();
    filters.is_empty()
        || filters
            .iter()
            .any(|f| group.contains(f.as_str()) || f.starts_with(group))
}

fn hot_path(c: &mut Criterion) {
    if !wanted("hot_path") {
        return;
    }
    let mut g = c.benchmark_group("hot_path");
    g.sample_size(20)
        .warm_up_time(std::time::Duration::from_secs(1))
        .measurement_time(std::time::Duration::from_secs(4));
    g.throughput(Throughput::Elements(1));
    let dog = species("Canis familiaris");

    // 1. Triggers that extend an open event: every camera and pest species
    // in turn gets a first trigger (not timed), then 4 more a minute apart
    // (timed), as a lingering animal gives (the feed's events have 1-4).
    // Rounds are a day apart, with a day of heartbeats between them.
    {
        let (mut engine, sites) = warmed_network();
        let pests = [
            dog,
            species("Vulpes vulpes"),
            species("Felis catus"),
            species("Sus scrofa"),
        ];
        let groups = sites.len() * pests.len();
        let per_round = (groups * 4) as i64;
        let mut k: i64 = 0;
        g.bench_function("extend_event", |b| {
            b.iter_custom(|iters| {
                let mut total = std::time::Duration::ZERO;
                let mut left = iters as i64;
                while left > 0 {
                    let round = k / per_round;
                    let round_start = now0() + Duration::hours(1) + Duration::days(round);
                    let pos0 = k % per_round;
                    if pos0 == 0 {
                        if round > 0 {
                            day_of_heartbeats(&mut engine, &sites, round_start);
                        }
                        // Forgetting old events is timed on its own
                        // (printed after the criterion estimates).
                        engine.prune(round_start);
                        for p in 0..groups {
                            let at = round_start + Duration::milliseconds(100 * p as i64);
                            let m = observation(
                                format!("x-{round}-{p}-0"),
                                &sites[p % sites.len()].id,
                                pests[p / sites.len()],
                                at,
                                1,
                            );
                            engine.apply(&m, at);
                        }
                    }
                    let n = left.min(per_round - pos0);
                    let msgs: Vec<(Message, DateTime<Utc>)> = (0..n)
                        .map(|j| {
                            let pos = (pos0 + j) as usize;
                            let (t, p) = (pos / groups + 1, pos % groups);
                            let at = round_start
                                + Duration::seconds(60 * t as i64)
                                + Duration::milliseconds(100 * p as i64);
                            let m = observation(
                                format!("x-{round}-{p}-{t}"),
                                &sites[p % sites.len()].id,
                                pests[p / sites.len()],
                                at,
                                1,
                            );
                            (m, at)
                        })
                        .collect();
                    let start = Instant::now();
                    for (m, at) in &msgs {
                        black_box(engine.apply(m, *at));
                    }
                    total += start.elapsed();
                    k += n;
                    left -= n;
                }
                total
            })
        });
    }

    // 1b. How the cost of one more trigger grows with the event's size
    // (printed, not a criterion estimate): a wild dog that never leaves.
    {
        let (mut engine, sites) = warmed_network();
        let site = &sites[4 * NET_SIDE + 4].id;
        let t0 = now0() + Duration::minutes(1);
        let mut held = 0i64;
        for size in [10i64, 100, 1_000, 10_000] {
            while held < size {
                let at = t0 + Duration::seconds(held);
                engine.apply(&observation(format!("long-{held}"), site, dog, at, 1), at);
                held += 1;
            }
            let msgs: Vec<(Message, DateTime<Utc>)> = (0..20)
                .map(|j| {
                    let at = t0 + Duration::seconds(held + j);
                    (
                        observation(format!("long-{}", held + j), site, dog, at, 1),
                        at,
                    )
                })
                .collect();
            let start = Instant::now();
            for (m, at) in &msgs {
                black_box(engine.apply(m, *at));
            }
            let each = start.elapsed().as_secs_f64() / msgs.len() as f64;
            held += msgs.len() as i64;
            println!(
                "hot_path: one more trigger on an event of {size} triggers: {:.1} us",
                each * 1e6
            );
        }
    }

    // 2. Triggers that each start a new event (wild dog, fox, cat or pig,
    // every camera in turn, a day apart per camera and species), so each
    // runs the spike test of the coordinator's watch (and of a grazier's
    // where one covers the camera) besides the presence and first-seen
    // watches. The hourly heartbeats between the rounds are not timed.
    {
        let (mut engine, sites) = warmed_network();
        let pests = [
            dog,
            species("Vulpes vulpes"),
            species("Felis catus"),
            species("Sus scrofa"),
        ];
        let per_round = (sites.len() * pests.len()) as i64;
        let mut k: i64 = 0;
        let (mut prune_time, mut pruned) = (std::time::Duration::ZERO, 0usize);
        g.bench_function("new_event_spike", |b| {
            b.iter_custom(|iters| {
                let mut total = std::time::Duration::ZERO;
                let mut left = iters as i64;
                while left > 0 {
                    let round = k / per_round;
                    let round_start = now0() + Duration::hours(1) + Duration::days(round);
                    if k % per_round == 0 {
                        if round > 0 {
                            day_of_heartbeats(&mut engine, &sites, round_start);
                        }
                        // Each day forgets a day of the warm feed's events
                        // and of the rounds': timed on its own, so that
                        // where the 6-hourly prune falls does not decide
                        // the estimate of a trigger.
                        let t = Instant::now();
                        let n = engine.prune(round_start);
                        prune_time += t.elapsed();
                        pruned += n;
                    }
                    let n = left.min(per_round - k % per_round);
                    let msgs: Vec<(Message, DateTime<Utc>)> = (0..n)
                        .map(|j| {
                            let pos = k % per_round + j;
                            let site = &sites[(pos as usize) % sites.len()].id;
                            let sp = pests[(pos as usize) / sites.len()];
                            let at = round_start + Duration::milliseconds(500 * pos);
                            (observation(format!("new-{}", k + j), site, sp, at, 1), at)
                        })
                        .collect();
                    let start = Instant::now();
                    for (m, at) in &msgs {
                        black_box(engine.apply(m, *at));
                    }
                    total += start.elapsed();
                    k += n;
                    left -= n;
                }
                total
            })
        });
        if pruned > 0 {
            println!(
                "hot_path: pruning: {:.2} us per event forgotten ({pruned} events, {:.1} ms in all)",
                prune_time.as_secs_f64() * 1e6 / pruned as f64,
                prune_time.as_secs_f64() * 1e3
            );
        }
    }

    // 3. A heartbeat (sign of life only), for scale.
    {
        let (mut engine, sites) = warmed_network();
        let mut k: i64 = 0;
        g.bench_function("heartbeat", |b| {
            b.iter_custom(|iters| {
                let msgs: Vec<(Message, DateTime<Utc>)> = (0..iters as i64)
                    .map(|j| {
                        let at = now0() + Duration::seconds(k + j);
                        (
                            heartbeat(&sites[((k + j) as usize) % sites.len()].id, at),
                            at,
                        )
                    })
                    .collect();
                k += iters as i64;
                let start = Instant::now();
                for (m, at) in &msgs {
                    black_box(engine.apply(m, *at));
                }
                start.elapsed()
            })
        });
    }
    g.finish();
}

// ------------------------------------------------------- rule matching

/// A config with `n` subscribers over the 10,000-site grid: circles of
/// 1-20 km (centres uniform over the grid), one presence watch each for
/// wild dogs. One subscriber is parsed from TOML and cloned: parsing a
/// million in one file is itself slow (see `config_parse`).
fn big_config(n: usize) -> Config {
    let sites = grid(BIG_SIDE, BIG_SPACING_KM);
    let template = r#"[[subscriber]]
id = "template"
email = "t@land.example"
area = { lat = -31.6, lon = 148.1, radius_km = 5.0 }
  [[subscriber.watch]]
  name = "wild dogs"
  trigger = "presence"
  species = ["Canis familiaris"]
  channels = ["email"]
"#;
    let mut cfg = config(&sites, template);
    let half = (BIG_SIDE as f64 - 1.0) * BIG_SPACING_KM / 2.0;
    cfg.subscribers = circle_subscribers(&cfg.subscribers[0], n, half, 1.0..20.0, 4);
    cfg
}

/// `n` copies of `proto`, each with its own id, address and a circle of
/// radius in `radius_km` centred at random within `half` km of the centre.
fn circle_subscribers(
    proto: &outrider::config::Subscriber,
    n: usize,
    half: f64,
    radius_km: std::ops::Range<f64>,
    seed: u64,
) -> Vec<outrider::config::Subscriber> {
    let mut rng = SmallRng::seed_from_u64(seed);
    (0..n)
        .map(|i| {
            let mut s = proto.clone();
            let (lat, lon) = offset(rng.gen_range(-half..half), rng.gen_range(-half..half));
            let radius_km = rng.gen_range(radius_km.clone());
            s.id = format!("sub-{i:07}");
            s.email = Some(format!("sub{i}@land.example"));
            s.area_spec = AreaSpec::Circle {
                lat,
                lon,
                radius_km,
            };
            let centre = LatLon::new(lat, lon).expect("inside the district");
            s.area = Area::Circle(Circle::new(centre, radius_km).expect("radius in range"));
            s
        })
        .collect()
}

/// Site in the middle of the big grid (no edge effects).
fn middle_site() -> String {
    let mid = BIG_SIDE / 2;
    format!("KB-{:05}", mid * BIG_SIDE + mid)
}

fn rule_matching(c: &mut Criterion) {
    if !wanted("rule_matching") {
        return;
    }
    let mut g = c.benchmark_group("rule_matching");
    g.sample_size(10)
        .warm_up_time(std::time::Duration::from_secs(1))
        .measurement_time(std::time::Duration::from_secs(3));
    let dog = species("Canis familiaris");
    let site = middle_site();
    let mut rows = Vec::new();
    for n in [1_000usize, 10_000, 100_000, 1_000_000] {
        let cfg = Arc::new(big_config(n));
        let t = Instant::now();
        let mut engine = Engine::new(cfg);
        let compile_s = t.elapsed().as_secs_f64();
        let si = engine.rules().site_index(&site).unwrap_or(0);
        let matched = engine.rules().covering(si).len();
        let pairs: usize = (0..BIG_SIDE * BIG_SIDE)
            .map(|i| engine.rules().covering(i).len())
            .sum();
        println!(
            "rule_matching: {n} subscribers: {pairs} (site, subscriber) pairs, {matched} cover {site}; engine built in {compile_s:.2} s"
        );
        rows.push(format!("{n},{matched},{pairs},{compile_s:.3}"));
        g.throughput(Throughput::Elements(matched as u64));
        // Every iteration a new wild-dog event at the middle camera, 31 min
        // after the last (more than the independence interval): each
        // covering subscriber's watch matches and is decided (sent, folded
        // by the 60 min cooldown, or deferred).
        let mut k: i64 = 0;
        g.bench_with_input(BenchmarkId::from_parameter(n), &n, |b, _| {
            b.iter_custom(|iters| {
                let msgs: Vec<(Message, DateTime<Utc>)> = (0..iters as i64)
                    .map(|j| {
                        let at = now0() + Duration::minutes(31 * (k + j));
                        (observation(format!("m-{}", k + j), &site, dog, at, 1), at)
                    })
                    .collect();
                k += iters as i64;
                let start = Instant::now();
                for (m, at) in &msgs {
                    black_box(engine.apply(m, *at));
                }
                start.elapsed()
            })
        });
    }
    g.finish();
    // For benches/plot_rule_cost.py: what the criterion estimates are per.
    let dir = criterion_dir();
    let _ = std::fs::create_dir_all(&dir);
    let _ = std::fs::write(
        dir.join("rule_matching_meta.csv"),
        format!(
            "subscribers,matched_watches,pairs,engine_build_s\n{}\n",
            rows.join("\n")
        ),
    );
}

fn criterion_dir() -> PathBuf {
    let target = std::env::var_os("CARGO_TARGET_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(|| Path::new(env!("CARGO_MANIFEST_DIR")).join("target"));
    target.join("criterion")
}

fn rule_book(c: &mut Criterion) {
    if !wanted("rule_book") {
        return;
    }
    let mut g = c.benchmark_group("rule_book");
    g.sample_size(10)
        .warm_up_time(std::time::Duration::from_millis(500))
        .measurement_time(std::time::Duration::from_secs(10));
    let cfg = big_config(100_000);
    g.bench_function("compile_100k_subscribers_10k_sites", |b| {
        b.iter(|| black_box(RuleBook::compile(&cfg)))
    });
    g.finish();
}

/// One file with `n` circle subscribers, as a large regional operator might write it.
fn many_subscribers_toml(n: usize) -> String {
    let mut rng = SmallRng::seed_from_u64(9);
    let half = (BIG_SIDE as f64 - 1.0) * BIG_SPACING_KM / 2.0;
    (0..n)
        .map(|i| {
            let (lat, lon) = offset(rng.gen_range(-half..half), rng.gen_range(-half..half));
            format!(
                "[[subscriber]]\nid = \"sub-{i:07}\"\nemail = \"sub{i}@land.example\"\narea = {{ lat = {lat:.5}, lon = {lon:.5}, radius_km = {:.1} }}\n  [[subscriber.watch]]\n  name = \"wild dogs\"\n  trigger = \"presence\"\n  species = [\"Canis familiaris\"]\n  channels = [\"email\"]\n",
                rng.gen_range(1.0..20.0)
            )
        })
        .collect()
}

fn config_parse(c: &mut Criterion) {
    if !wanted("config_parse") {
        return;
    }
    let mut g = c.benchmark_group("config_parse");
    g.sample_size(10)
        .warm_up_time(std::time::Duration::from_millis(500))
        .measurement_time(std::time::Duration::from_secs(3));
    let sites = grid(BIG_SIDE, BIG_SPACING_KM);
    for n in [1_000usize, 4_000] {
        let subs = many_subscribers_toml(n);
        g.throughput(Throughput::Elements(n as u64));
        g.bench_with_input(BenchmarkId::from_parameter(n), &n, |b, _| {
            b.iter(|| black_box(config(&sites, &subs)))
        });
    }
    g.finish();
}

// ------------------------------------------------------------- start-up

/// A store holding one year of the 100-camera network, generated once
/// (about 2 million observations and 876,000 heartbeats) and kept under
/// target/ for later runs. `rm -r target/bench-store` to make it anew.
fn year_store() -> PathBuf {
    let dir = criterion_dir()
        .parent()
        .map(Path::to_path_buf)
        .unwrap_or_default()
        .join("bench-store")
        .join("year-100-cameras-v1");
    let done = dir.join("complete");
    if done.exists() {
        return dir;
    }
    let _ = std::fs::remove_dir_all(&dir);
    let started = Instant::now();
    let sites = grid(NET_SIDE, NET_SPACING_KM);
    let mut db = Sqlite::open(&dir, Durability::Normal).expect("open the bench store");
    let (mut obs, mut hbs) = (0usize, 0usize);
    let end = now0();
    let mut from = end - Duration::days(365);
    while from < end {
        let to = (from + Duration::days(7)).min(end);
        let batch: Vec<Ingest> = feed(&sites, from, to)
            .into_iter()
            .map(|m| {
                match &m {
                    Message::Observation(_) => obs += 1,
                    _ => hbs += 1,
                }
                let received_at = message_time(&m) + Duration::seconds(30);
                Ingest::Message {
                    message: m,
                    received_at,
                }
            })
            .collect();
        db.commit(&batch, &[]).expect("commit a week");
        from = to;
    }
    db.close().expect("close the bench store");
    let _ = std::fs::write(&done, format!("{obs} observations, {hbs} heartbeats\n"));
    println!(
        "startup: generated {obs} observations and {hbs} heartbeats in {:.1} s into {}",
        started.elapsed().as_secs_f64(),
        dir.display()
    );
    dir
}

fn startup(c: &mut Criterion) {
    if !wanted("startup") {
        return;
    }
    let dir = year_store();
    let cfg = network_config();
    let db = Sqlite::open_read_only(&dir).expect("open the bench store");
    let now = now0();
    {
        let engine = Engine::new(cfg.clone());
        let since = now - engine.horizon();
        let t = Instant::now();
        let history = load_history(db.connection(), since).expect("load history");
        let load_s = t.elapsed().as_secs_f64();
        let t = Instant::now();
        let mut engine = engine;
        engine.warm(history.iter());
        println!(
            "startup: horizon {} days, {} messages loaded in {load_s:.2} s, warmed in {:.2} s ({})",
            (now - since).num_days(),
            history.len(),
            t.elapsed().as_secs_f64(),
            std::fs::read_to_string(dir.join("complete"))
                .unwrap_or_default()
                .trim()
        );
    }
    let mut g = c.benchmark_group("startup");
    g.sample_size(10)
        .warm_up_time(std::time::Duration::from_millis(500))
        .measurement_time(std::time::Duration::from_secs(10));
    g.bench_function("load_history_and_warm_year_store", |b| {
        b.iter(|| {
            let mut engine = Engine::new(cfg.clone());
            let since = now - engine.horizon();
            let history = load_history(db.connection(), since).expect("load history");
            engine.warm(history.iter());
            black_box(engine)
        })
    });
    g.bench_function("load_history_only", |b| {
        b.iter(|| {
            let since = now - Engine::new(cfg.clone()).horizon();
            black_box(load_history(db.connection(), since).expect("load history"))
        })
    });
    g.finish();
}

// --------------------------------------------------------------- memory

fn status_kb(key: &str) -> u64 {
    std::fs::read_to_string("/proc/self/status")
        .unwrap_or_default()
        .lines()
        .find(|l| l.starts_with(key))
        .and_then(|l| l.split_whitespace().nth(1))
        .and_then(|v| v.parse().ok())
        .unwrap_or(0)
}

/// Peak memory of the 100k x 10k rule book, in this process alone.
fn memory_report() {
    let mib = |kb: u64| kb as f64 / 1024.0;
    let base = status_kb("VmRSS:");
    let cfg = big_config(100_000);
    let after_cfg_rss = status_kb("VmRSS:");
    let after_cfg_hwm = status_kb("VmHWM:");
    let t = Instant::now();
    let book = RuleBook::compile(&cfg);
    let took = t.elapsed().as_secs_f64();
    let after_rss = status_kb("VmRSS:");
    let hwm = status_kb("VmHWM:");
    let pairs: usize = (0..BIG_SIDE * BIG_SIDE)
        .map(|i| book.covering(i).len())
        .sum();
    println!("memory: 100,000 subscribers, 10,000 sites, {pairs} (site, subscriber) pairs");
    println!("memory: RSS at start              {:8.1} MiB", mib(base));
    println!(
        "memory: RSS with the Config        {:8.1} MiB (peak so far {:.1} MiB)",
        mib(after_cfg_rss),
        mib(after_cfg_hwm)
    );
    println!(
        "memory: RSS with the RuleBook      {:8.1} MiB (compile took {took:.2} s)",
        mib(after_rss)
    );
    println!("memory: peak (VmHWM)              {:8.1} MiB", mib(hwm));
    println!(
        "memory: RuleBook::compile added    {:8.1} MiB to the peak, {:.1} MiB kept",
        mib(hwm.saturating_sub(after_cfg_rss)),
        mib(after_rss.saturating_sub(after_cfg_rss))
    );
    black_box(book);
}

/// 100,000 subscribers over the 100-camera network, all with a digest
/// due at the same 06:30: built through `Engine::tick` (the daemon's path,
/// at most `DIGESTS_PER_TICK` per tick), committed to a real store, then
/// read back and rendered to complete RFC 5322 messages (the send path
/// without the SMTP round trip).
fn digest_report() {
    use outrider::digest::render::{render_digest, DigestContext};
    use outrider::engine::Output;
    let n = 100_000;
    let sites = grid(NET_SIDE, NET_SPACING_KM);
    let template = r#"[[subscriber]]
id = "template"
email = "t@land.example"
digest_at = "06:30"
area = { lat = -31.6, lon = 148.1, radius_km = 5.0 }
  [[subscriber.watch]]
  name = "predators"
  trigger = "presence"
  species = ["@predators", "Sus scrofa"]
  channels = ["email"]
"#;
    let mut cfg = config(&sites, template);
    let half = (NET_SIDE as f64 - 1.0) * NET_SPACING_KM / 2.0;
    cfg.subscribers = circle_subscribers(&cfg.subscribers[0], n, half, 1.0..8.0, 5);
    let cfg = Arc::new(cfg);
    let tz = chrono_tz::Australia::Sydney;
    let at = chrono::NaiveTime::from_hms_opt(6, 30, 0).expect("valid time");
    let due = outrider::digest::latest_due(now0() + Duration::hours(12), at, tz);
    let history = feed(&sites, due - Duration::days(35), due);
    let mut engine = Engine::new(cfg.clone());
    engine.warm(history.iter());
    // Every subscriber had yesterday's digest: today's is due for all.
    let last = cfg
        .subscribers
        .iter()
        .map(|s| (s.id.clone(), due - Duration::days(1)))
        .collect();
    engine.schedule_digests(last);
    let dir = std::env::temp_dir().join(format!("outrider-digest-bench-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    let mut db = Sqlite::open(&dir, Durability::Full).expect("bench store");
    let (mut built, mut build_s, mut queue_s) = (0usize, 0.0, 0.0);
    let mut tick = due + Duration::seconds(1);
    while built < n {
        let t = Instant::now();
        let out: Vec<Output> = engine
            .tick(tick)
            .into_iter()
            .filter(|o| matches!(o, Output::Digest(_)))
            .collect();
        build_s += t.elapsed().as_secs_f64();
        built += out.len();
        let t = Instant::now();
        db.commit(&[], &out).expect("queue digests");
        queue_s += t.elapsed().as_secs_f64();
        tick += Duration::seconds(1);
        if out.is_empty() {
            break;
        }
    }
    let mut rendered = 0usize;
    let (mut html_bytes, mut png_bytes) = (0usize, 0usize);
    let mut ids = Vec::new();
    let (mut read_s, mut render_s, mut mark_s) = (0.0, 0.0, 0.0);
    loop {
        let t = Instant::now();
        let due_now = db.due_digests(tick, 2000).expect("read digests");
        read_s += t.elapsed().as_secs_f64();
        if due_now.is_empty() {
            break;
        }
        let t = Instant::now();
        for d in &due_now {
            let sub = &cfg.subscribers[d.digest.subscriber_id[4..].parse::<usize>().unwrap_or(0)];
            let r = render_digest(
                &d.digest,
                &DigestContext {
                    subscriber_name: &sub.name,
                    time_zone: sub.timezone,
                    status_url: Some("https://pests.kellerby.example"),
                    unsubscribe_url: "https://pests.kellerby.example/unsubscribe/x",
                },
            );
            html_bytes += r.html.len() + r.text.len();
            png_bytes += r.chart_png.as_ref().map_or(0, Vec::len);
            rendered += 1;
            ids.push(d.id);
            black_box(r);
        }
        render_s += t.elapsed().as_secs_f64();
        // Mark them sent so the next read moves on: one UPDATE per digest
        // in its own transaction, as the worker records each send.
        let t = Instant::now();
        for id in ids.drain(..) {
            db.finish_digest(
                id,
                &outrider::store::sqlite::DeliveryUpdate::Sent { at: tick },
            )
            .expect("mark sent");
        }
        mark_s += t.elapsed().as_secs_f64();
    }
    println!(
        "digests: {built} built in {build_s:.1} s ({:.0} µs each) through Engine::tick",
        build_s * 1e6 / built.max(1) as f64
    );
    println!("digests: queued (SQLite, synchronous=FULL, with their notices) in {queue_s:.1} s");
    let per = |b: usize| b as f64 / 1024.0 / rendered.max(1) as f64;
    println!(
        "digests: {rendered} read back in {read_s:.1} s, rendered in {render_s:.1} s (text + HTML {:.1} KiB, PNG chart {:.1} KiB each)",
        per(html_bytes),
        per(png_bytes)
    );
    println!(
        "digests: build + queue + read + render = {:.1} s for {n} digests",
        build_s + queue_s + read_s + render_s
    );
    println!("digests: marking each sent (one fsync'd UPDATE per digest, as the worker does) took {mark_s:.1} s more");
    let _ = std::fs::remove_dir_all(&dir);
}

criterion::criterion_group!(
    benches,
    hot_path,
    rule_matching,
    rule_book,
    config_parse,
    startup
);

fn main() {
    if std::env::args().skip(1).any(|a| a == "memory") {
        memory_report();
        return;
    }
    if std::env::args().skip(1).any(|a| a == "digests") {
        digest_report();
        return;
    }
    benches();
    Criterion::default().configure_from_args().final_summary();
}
