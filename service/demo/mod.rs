//! `outrider demo`: the whole service on the invented district with no
//! external service. It writes a config and a sites file into the state
//! directory, starts the embedded broker and the daemon on a fast simulated
//! clock, and publishes the synthetic feed to the broker over real MQTT.

pub mod district;
pub mod feed;

use crate::clock::{Clock, ScaledClock};
use anyhow::Context;
use chrono::{DateTime, Duration, Utc};
use rumqttc::{AsyncClient, MqttOptions, QoS};
use std::path::{Path, PathBuf};
use std::sync::Arc;

/// Options of `outrider demo`.
#[derive(Debug, Clone)]
pub struct DemoOptions {
    pub state_dir: PathBuf,
    /// Simulated seconds per real second.
    pub speed: f64,
    /// Real seconds to run, then exit 0; `None` runs until interrupted.
    pub duration_seconds: Option<f64>,
    pub web: std::net::SocketAddr,
    /// Days of history fed in at start, before simulated time runs on from
    /// the real present (baselines need a few weeks of it).
    pub history_days: i64,
}

/// The sites CSV of the invented district (Camtrap DP deployments columns).
pub fn sites_csv(deployment_start: DateTime<Utc>) -> String {
    deployments_csv(&district::sites(), deployment_start)
}

/// A sites CSV (Camtrap DP deployments columns) for any of the feed's
/// sites, all deployed at `deployment_start` and still running.
pub fn deployments_csv(sites: &[district::DemoSite], deployment_start: DateTime<Utc>) -> String {
    let tz = chrono_tz::Australia::Sydney;
    let mut s = String::from("deploymentID,locationID,locationName,latitude,longitude,deploymentStart,deploymentEnd,cameraID,cameraDelay\n");
    for (i, site) in sites.iter().enumerate() {
        s.push_str(&format!(
            "{},L{:02},{},{},{},{},,CAM-{:03},60\n",
            site.id,
            i + 1,
            site.name,
            site.lat,
            site.lon,
            deployment_start
                .with_timezone(&tz)
                .format("%Y-%m-%dT%H:%M:%S%:z"),
            100 + i
        ));
    }
    s
}

/// The demo's configuration (TOML), for a broker on `broker_port`.
pub fn config_toml(broker_port: u16, web: std::net::SocketAddr) -> String {
    format!(
        r#"# Written by `outrider demo`: the invented Kellerby Basin district.
# Every other command can be pointed at this file: outrider status -c {{this file}}

[service]
state_dir = "."
timezone = "Australia/Sydney"
public_url = "http://{web}"

[mqtt]
url = "mqtt://127.0.0.1:{broker_port}"
client_id = "outriderdemo"
topic_prefix = "outrider"

[broker]
embedded = true
listen = "127.0.0.1:{broker_port}"

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

[species.groups]
predators = ["Canis familiaris", "Vulpes vulpes", "Felis catus"]
pigs = ["Sus scrofa"]
deer = ["Dama dama"]

[species.aliases]
"Canis lupus dingo" = "Canis familiaris"

[email_folder]
dir = "mail"

[web]
listen = "{web}"

[[subscriber]]
id = "stonecroft"
name = "Stonecroft"
email = "owner@stonecroft.example"
digest_at = "06:30"
quiet_hours = "21:30-05:00"
max_per_hour = 6
area = {{ lat = -31.566, lon = 148.057, radius_km = 6.0 }}

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

[[subscriber]]
id = "bellbird"
name = "Bellbird Creek"
email = "manager@bellbird.example"
digest_at = "07:00"
area = {{ sites = ["KB-07", "KB-08", "KB-11", "KB-12"] }}

  [[subscriber.watch]]
  name = "wild dog build-up before lambing"
  trigger = "spike"
  species = ["Canis familiaris"]
  window_hours = 24
  ratio = 3.0
  min_count = 3
  channels = ["email"]

[[subscriber]]
id = "coordinator"
name = "Kellerby Basin pest coordinator"
email = "pests@kellerby.example"
digest_at = "06:00"
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
"#
    )
}

/// A free TCP port on loopback (bound, then released).
fn free_port() -> anyhow::Result<u16> {
    let l = std::net::TcpListener::bind("127.0.0.1:0")
        .context("finding a free port for the embedded broker")?;
    Ok(l.local_addr()?.port())
}

/// Writes the demo's config and sites into `dir`; returns the config path.
pub fn write_files(
    dir: &Path,
    broker_port: u16,
    web: std::net::SocketAddr,
    deployment_start: DateTime<Utc>,
) -> anyhow::Result<PathBuf> {
    std::fs::create_dir_all(dir.join("mail"))
        .with_context(|| format!("creating {}", dir.display()))?;
    let cfg_path = dir.join("outrider.toml");
    std::fs::write(&cfg_path, config_toml(broker_port, web))
        .with_context(|| format!("writing {}", cfg_path.display()))?;
    std::fs::write(dir.join("sites.csv"), sites_csv(deployment_start))
        .context("writing sites.csv")?;
    Ok(cfg_path)
}

/// Runs the demo to the end of its duration or an interrupt.
pub async fn run(opts: DemoOptions, real_now: DateTime<Utc>) -> anyhow::Result<()> {
    // Simulated time starts at the last 04:30 in the district (before
    // dawn: night watches still apply) and runs `speed` times faster, so
    // the scripted happenings and then the 06:00-07:00 digests come within
    // the first minute at the default speed.
    let start = crate::digest::latest_due(
        real_now,
        chrono::NaiveTime::from_hms_opt(4, 30, 0).unwrap_or_default(),
        chrono_tz::Australia::Sydney,
    );
    let history_from = start - Duration::days(opts.history_days.max(0));
    let port = free_port()?;
    let cfg_path = write_files(
        &opts.state_dir,
        port,
        opts.web,
        history_from - Duration::days(30),
    )?;
    let cfg = crate::config::load(&cfg_path).map_err(|e| anyhow::anyhow!("{e}"))?;
    let clock: Arc<dyn Clock> = Arc::new(ScaledClock::new(start, opts.speed));
    let prefix = cfg.mqtt.topic_prefix.clone();
    let dir = opts.state_dir.clone();
    println!(
        "outrider demo: the invented Kellerby Basin district; {} days of history, then simulated time from {} at {}x",
        opts.history_days,
        start.with_timezone(&chrono_tz::Australia::Sydney).format("%Y-%m-%d %H:%M %Z"),
        opts.speed
    );
    println!("  config:  {}", cfg_path.display());
    println!(
        "  counts:  outrider status --state-dir {} (or -c {})",
        dir.display(),
        cfg_path.display()
    );
    println!("  broker:  mqtt://127.0.0.1:{port} (embedded; topics outrider/<deploymentID>/observation|heartbeat|correction)");
    println!(
        "  mail:    {} (one .eml file per email; open with any mail program)",
        dir.join("mail").display()
    );
    println!(
        "  status:  http://{}/ (map, notices, sites; JSON under /api/, metrics at /metrics)",
        opts.web
    );
    let prefix_for_history = cfg.mqtt.topic_prefix.clone();
    let history_cfg = cfg.clone();
    let loaded = tokio::task::spawn_blocking(move || {
        preload(&history_cfg, &prefix_for_history, history_from, start)
    })
    .await??;
    println!(
        "  history: {loaded} messages of {} days stored as if received live",
        opts.history_days
    );
    let duration = opts.duration_seconds;
    let shutdown = async move {
        match duration {
            Some(s) => {
                tokio::select! {
                    _ = tokio::time::sleep(std::time::Duration::from_secs_f64(s)) => {}
                    _ = crate::app::shutdown_signal() => {}
                }
            }
            None => crate::app::shutdown_signal().await,
        }
    };
    let feed_clock = clock.clone();
    let end_clock = clock.clone();
    crate::app::run(cfg, clock, shutdown, move |_running| {
        tokio::spawn(publish_feed(port, prefix, start, feed_clock));
    })
    .await?;
    // Leave the simulated time reached, so `status` judges silence by it.
    let sim_end = end_clock.now();
    let _ = std::fs::write(
        dir.join(crate::status::DEMO_CLOCK_FILE),
        sim_end.to_rfc3339(),
    );
    let status = crate::status::read(&dir, crate::config::load(&cfg_path).ok().as_ref(), sim_end)?;
    println!("{}", crate::status::render_text(&status));
    Ok(())
}

/// Writes the feed's history `[from, to)` into the store through the same
/// decoder the daemon uses (each message as if it arrived 30 s after its
/// own time), then derives the independent events from it. Returns the
/// number of messages.
pub fn preload(
    cfg: &crate::config::Config,
    prefix: &str,
    from: DateTime<Utc>,
    to: DateTime<Utc>,
) -> anyhow::Result<usize> {
    use crate::store::Backend;
    let facts = crate::pipeline::DecodeFacts::from_config(cfg);
    let mut db = crate::store::sqlite::Sqlite::open(
        &cfg.service.state_dir,
        crate::store::sqlite::Durability::Normal,
    )?;
    let feed = feed::Feed::new(to, prefix, 2026);
    let mut n = 0;
    let mut day = from;
    while day < to {
        let next = (day + Duration::days(1)).min(to);
        let batch: Vec<crate::store::Ingest> = feed
            .between(day, next)
            .iter()
            .map(|m| {
                crate::pipeline::to_ingest(
                    &facts,
                    &m.topic,
                    &m.payload,
                    m.at + Duration::seconds(30),
                )
            })
            .collect();
        n += batch.len();
        db.commit(&batch, &[])?;
        day = next;
    }
    db.rebuild_events(Duration::minutes(i64::from(
        cfg.detection.independence_minutes,
    )))?;
    Ok(n)
}

/// Publishes the feed as simulated time passes, over real MQTT.
async fn publish_feed(port: u16, prefix: String, start: DateTime<Utc>, clock: Arc<dyn Clock>) {
    let mut o = MqttOptions::new("outriderdemofeed", "127.0.0.1", port);
    o.set_keep_alive(std::time::Duration::from_secs(30))
        .set_max_packet_size(2 << 20, 2 << 20);
    let (client, mut eventloop) = AsyncClient::new(o, 4096);
    tokio::spawn(async move {
        loop {
            if eventloop.poll().await.is_err() {
                tokio::time::sleep(std::time::Duration::from_millis(200)).await;
            }
        }
    });
    let feed = feed::Feed::new(start, prefix, 2026);
    let mut sent_to = start;
    loop {
        let now = clock.now();
        for m in feed.between(sent_to, now) {
            if client
                .publish(m.topic, QoS::AtLeastOnce, false, m.payload)
                .await
                .is_err()
            {
                return;
            }
        }
        sent_to = now;
        tokio::time::sleep(std::time::Duration::from_millis(200)).await;
    }
}
