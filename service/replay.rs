//! `outrider replay`: an archive through the daemon's own core on a
//! simulated clock, to see what the daemon would have sent (DESIGN.md
//! "Command line"; docs/replay.md).
//!
//! Owns: reading the archive files ([`archive`]), putting every message in
//! time order, driving one [`Engine`] with the clock set to each message's
//! own time, scheduling the time-driven checks ([`Engine::tick`]) the
//! daemon's once-a-second ticker would have made, and printing one JSON
//! object per notice on stdout and the summary on stderr ([`report`]).
//!
//! Must not: send, store or read the wall clock for anything but the
//! progress bar and the elapsed time in the summary. Every message goes
//! through the same decoder and the same engine as in the daemon, so what
//! replay says is what the daemon would have done with those messages.
//!
//! # The clock
//! Messages are sorted by their own time (`eventStart`, `timestamp`; a
//! correction, which has none, by the archive line's `receivedAt` or else
//! the time of the record before it in its file), stably, so ties keep
//! file order and the observations archive comes before the heartbeats
//! file. The engine sees each message at its own time. When the inputs
//! hold heartbeats, every deployment running at the replay's start is
//! taken as alive then (the archive cannot say otherwise), the engine is
//! ticked whenever the clock has moved on a minute or more, and also at
//! the exact second a silence limit runs out between two messages, as the
//! daemon's ticker would; and once at the end. Without heartbeats
//! deployments count as operating from `deploymentStart` to
//! `deploymentEnd` and silence is not judged.

pub mod archive;
pub mod report;

use crate::cli::ReplayArgs;
use crate::config::Config;
use crate::engine::{Engine, Options, Output};
use crate::model::{Heartbeat, Message};
use crate::notify::Notice;
use crate::pipeline::DecodeFacts;
use anyhow::Context as _;
use archive::{Record, TimeFilter};
use chrono::{DateTime, Duration, Utc};
use std::collections::BTreeSet;
use std::io::{IsTerminal as _, Write as _};
use std::process::ExitCode;
use std::sync::Arc;

/// Runs the replay; prints notices on stdout and a summary on stderr.
pub fn run(cfg: &Config, args: &ReplayArgs) -> anyhow::Result<ExitCode> {
    let started = std::time::Instant::now();
    let filter = TimeFilter {
        from: parse_instant("--from", args.from.as_deref())?,
        to: parse_instant("--to", args.to.as_deref())?,
    };
    if let (Some(f), Some(t)) = (filter.from, filter.to) {
        if f >= t {
            anyhow::bail!("--from ({}) must be before --to ({})", rfc(f), rfc(t));
        }
    }
    let mut progress = report::Progress::new(std::io::stderr().is_terminal());
    let facts = DecodeFacts::from_config(cfg);
    let mut records: Vec<Record> = Vec::new();
    let mut files = Vec::new();
    // A Camtrap DP package folder: its observations, and its heartbeats
    // unless --heartbeats names others.
    let (observations, heartbeats) = if args.observations.is_dir() {
        let pkg = crate::import::open_package(&args.observations)?;
        for w in &pkg.warnings {
            eprintln!("warning: {w}");
        }
        (pkg.observations, args.heartbeats.clone().or(pkg.heartbeats))
    } else {
        (args.observations.clone(), args.heartbeats.clone())
    };
    for path in std::iter::once(&observations).chain(heartbeats.as_ref()) {
        let total = std::fs::metadata(path).map(|m| m.len()).unwrap_or(0);
        let label = format!(
            "reading {}",
            path.file_name()
                .map(|n| n.to_string_lossy().into_owned())
                .unwrap_or_default()
        );
        let stats = archive::read(path, &facts, filter, &mut records, &mut |bytes| {
            progress.show(&label, bytes, total)
        })?;
        files.push(stats);
    }
    progress.clear();
    sort_by_time(&mut records);
    let read_secs = started.elapsed().as_secs_f64();

    let mut summary = report::Summary::new(cfg);
    let stdout = std::io::stdout();
    let mut out = std::io::BufWriter::with_capacity(1 << 16, stdout.lock());
    let mut write_error: Option<std::io::Error> = None;
    let mut line = Vec::with_capacity(2048);
    let total = records.len() as u64;
    let replayed = replay(
        Arc::new(cfg.clone()),
        &records,
        filter,
        |notice, reason| {
            summary.count(notice);
            if write_error.is_some() {
                return;
            }
            line.clear();
            if let Err(e) =
                notice_line(&mut line, notice, reason).and_then(|_| out.write_all(&line))
            {
                write_error = Some(e);
            }
        },
        |done| progress.show("replaying", done, total),
    );
    progress.clear();
    if write_error.is_none() {
        if let Err(e) = out.flush() {
            write_error = Some(e);
        }
    }
    drop(out);
    let mut text = report::render_files(&files);
    text.push_str(&summary.render());
    let secs = started.elapsed().as_secs_f64();
    text.push_str(&format!(
        "replayed {} messages{} in {:.2} s ({:.2} s reading and sorting; {} messages per second); {}\n",
        report::thousands(replayed.messages),
        match (replayed.first, replayed.last) {
            (Some(a), Some(b)) => format!(" from {} to {}", rfc(a), rfc(b)),
            _ => String::new(),
        },
        secs,
        read_secs,
        report::thousands(if secs > 0.0 {
            (replayed.messages as f64 / secs) as u64
        } else {
            replayed.messages
        }),
        if replayed.heartbeats {
            "heartbeats present: silence judged"
        } else {
            "no heartbeats: deployments count as operating from deploymentStart to deploymentEnd; silence not judged"
        }
    ));
    eprint!("{text}");
    match write_error {
        // The reader went away (e.g. `| head`): not a failure of the replay.
        Some(e) if e.kind() == std::io::ErrorKind::BrokenPipe => Ok(ExitCode::SUCCESS),
        Some(e) => Err(e).context("writing the notices to stdout"),
        None => Ok(ExitCode::SUCCESS),
    }
}

/// Parses a `--from`/`--to` value: RFC 3339 with an offset.
pub fn parse_instant(flag: &str, value: Option<&str>) -> anyhow::Result<Option<DateTime<Utc>>> {
    let Some(v) = value else { return Ok(None) };
    match crate::config::sites::parse_datetime(v) {
        Some(t) => Ok(Some(t)),
        None => anyhow::bail!(
            "{flag} `{}` is not an RFC 3339 instant with an offset, e.g. 2026-07-01T00:00:00+10:00",
            crate::ingest::decode::printable(v)
        ),
    }
}

fn rfc(t: DateTime<Utc>) -> String {
    crate::notify::notice::rfc3339(t)
}

/// Stable sort by each record's own time (ties keep their order).
pub fn sort_by_time(records: &mut [Record]) {
    if !records.is_sorted_by_key(|r| r.at) {
        records.sort_by_key(|r| r.at);
    }
}

/// One stdout line: [`Notice::replay_line`] plus `"reason"`, and a newline.
pub fn notice_line(buf: &mut Vec<u8>, notice: &Notice, reason: &str) -> std::io::Result<()> {
    let mut value = notice.replay_line();
    if let Some(map) = value.as_object_mut() {
        map.insert("reason".into(), serde_json::Value::from(reason));
    }
    serde_json::to_writer(&mut *buf, &value)?;
    buf.push(b'\n');
    Ok(())
}

/// What a replay went through.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct Replayed {
    pub messages: u64,
    pub first: Option<DateTime<Utc>>,
    pub last: Option<DateTime<Utc>>,
    /// Heartbeats were present, so silence was judged.
    pub heartbeats: bool,
    pub ticks: u64,
}

/// Drives one engine over `records` (already in time order) on a simulated
/// clock; every notice decision goes to `on_notice` with its reason.
/// `progress` is told how many messages are done, now and then.
pub fn replay(
    cfg: Arc<Config>,
    records: &[Record],
    filter: TimeFilter,
    mut on_notice: impl FnMut(&Notice, &str),
    mut progress: impl FnMut(u64),
) -> Replayed {
    let heartbeats = records
        .iter()
        .any(|r| matches!(r.message, Message::Heartbeat(_)));
    let mut engine = Engine::with_options(
        cfg.clone(),
        Options {
            assume_operating: !heartbeats,
        },
    );
    let mut done = Replayed {
        heartbeats,
        first: records.first().map(|r| r.at),
        last: records.last().map(|r| r.at),
        ..Default::default()
    };
    let mut emit = |outputs: Vec<Output>| {
        for o in outputs {
            if let Output::Notice { notice, reason, .. } = o {
                on_notice(&notice, &reason);
            }
        }
    };
    let Some(start) = filter.from.or(done.first) else {
        return done;
    };
    let mut due = Deadlines::new(&cfg, &engine);
    if heartbeats {
        // The archive begins here: what came before is unknown, so each
        // running deployment is taken as alive now rather than silent since
        // its deploymentStart.
        let alive: Vec<Message> = cfg
            .sites
            .sites
            .iter()
            .filter(|s| s.deployment_start <= start && s.deployment_end.is_none_or(|e| start < e))
            .map(|s| {
                Message::Heartbeat(Heartbeat {
                    deployment_id: s.deployment_id.clone(),
                    timestamp: start,
                    battery_percent: None,
                    signal_dbm: None,
                    images_since_last: None,
                })
            })
            .collect();
        for m in &alive {
            due.sign(m);
        }
        engine.warm(alive.iter());
    }
    let mut clock = start;
    let mut last_tick: Option<DateTime<Utc>> = None;
    for (i, r) in records.iter().enumerate() {
        if heartbeats {
            // Silence limits that run out before this message.
            while let Some(d) = due.pop_until(r.at) {
                clock = clock.max(d);
                emit(engine.tick(clock));
                done.ticks += 1;
                last_tick = Some(clock);
            }
            if last_tick.is_none_or(|t| r.at - t >= Duration::minutes(1)) {
                clock = clock.max(r.at);
                emit(engine.tick(clock));
                done.ticks += 1;
                last_tick = Some(clock);
            }
        }
        clock = clock.max(r.at);
        emit(engine.apply(&r.message, clock));
        if heartbeats {
            due.sign(&r.message);
        }
        done.messages += 1;
        if i % 16_384 == 0 {
            progress(i as u64);
        }
    }
    if heartbeats {
        if let Some(to) = filter.to {
            // Time runs on to --to: limits that run out before it count.
            while let Some(d) = due.pop_until(to - Duration::nanoseconds(1)) {
                clock = clock.max(d);
                emit(engine.tick(clock));
                done.ticks += 1;
            }
        }
    }
    emit(engine.tick(clock));
    done.ticks += 1;
    progress(done.messages);
    done
}

/// When each silence limit runs out: per deployment, the last sign of life
/// plus each distinct `silence_hours` of the watches covering it, plus one
/// second (silence is strictly longer than the limit). Mirrors what the
/// engine counts as a sign of life (any observation or heartbeat of a
/// known deployment), only to choose when to tick; the engine decides.
struct Deadlines {
    by_id: std::collections::HashMap<String, usize>,
    limits: Vec<Vec<Duration>>,
    last_sign: Vec<DateTime<Utc>>,
    queue: BTreeSet<(DateTime<Utc>, usize, usize)>,
}

impl Deadlines {
    fn new(cfg: &Config, engine: &Engine) -> Self {
        let rules = engine.rules();
        let n = rules.sites().len();
        let mut limits: Vec<Vec<Duration>> = vec![Vec::new(); n];
        for &(sub, wi, site) in rules.silence_watches() {
            let hours = cfg
                .subscribers
                .get(sub)
                .and_then(|s| s.watches.get(wi))
                .map_or(cfg.sites.silence_hours, |w| w.silence_hours);
            let limit = Duration::seconds((hours * 3600.0) as i64);
            if !limits[site].contains(&limit) {
                limits[site].push(limit);
            }
        }
        let last_sign: Vec<DateTime<Utc>> =
            rules.sites().iter().map(|s| s.deployment_start).collect();
        let by_id = rules
            .sites()
            .iter()
            .enumerate()
            .map(|(i, s)| (s.deployment_id.clone(), i))
            .collect();
        let mut d = Deadlines {
            by_id,
            limits,
            last_sign,
            queue: BTreeSet::new(),
        };
        for site in 0..n {
            d.schedule(site);
        }
        d
    }

    fn due(&self, site: usize, li: usize) -> DateTime<Utc> {
        self.last_sign[site] + self.limits[site][li] + Duration::seconds(1)
    }

    fn schedule(&mut self, site: usize) {
        for li in 0..self.limits[site].len() {
            self.queue.insert((self.due(site, li), site, li));
        }
    }

    fn sign(&mut self, m: &Message) {
        let (dep, at) = match m {
            Message::Observation(o) => (&o.deployment_id, o.event_start),
            Message::Heartbeat(h) => (&h.deployment_id, h.timestamp),
            Message::Correction(_) => return,
        };
        let Some(&site) = self.by_id.get(dep) else {
            return;
        };
        if at <= self.last_sign[site] || self.limits[site].is_empty() {
            return;
        }
        for li in 0..self.limits[site].len() {
            let old = self.due(site, li);
            self.queue.remove(&(old, site, li));
        }
        self.last_sign[site] = at;
        self.schedule(site);
    }

    /// The earliest limit running out at or before `upto`, removed.
    fn pop_until(&mut self, upto: DateTime<Utc>) -> Option<DateTime<Utc>> {
        let first = *self.queue.first()?;
        if first.0 <= upto {
            self.queue.remove(&first);
            Some(first.0)
        } else {
            None
        }
    }
}
