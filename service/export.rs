//! `outrider export`: the store in open-standard formats, written into a
//! folder. `--camtrap-dp DIR` writes a Camtrap DP 1.0.2 data package
//! ([`crate::interchange::camtrap`]); `--cap DIR` writes each sent notice
//! as a CAP 1.2 alert ([`crate::interchange::cap`]). Reads the store
//! through a read-only connection, so it is safe while the daemon runs.

use crate::cli::ExportArgs;
use crate::config::Config;
use crate::interchange::camtrap::{write_package, PackageOptions};
use crate::interchange::History;
use crate::report::{read_history, window};
use anyhow::Context as _;
use chrono::{DateTime, Utc};
use std::path::Path;

pub fn run(cfg: &Config, args: &ExportArgs, now: DateTime<Utc>) -> anyhow::Result<()> {
    let (from, to) = window(args.from.as_deref(), args.to.as_deref())?;
    for dir in [&args.camtrap_dp, &args.cap].into_iter().flatten() {
        prepare(dir, args.force)?;
    }
    if let Some(dir) = &args.camtrap_dp {
        let history = read_history(cfg)?;
        let h = History::read(cfg, &history);
        let pkg = write_package(
            &h,
            &PackageOptions {
                from,
                to,
                now,
                timezone: cfg.service.timezone,
                public_url: &cfg.service.public_url,
            },
        )?;
        for (name, bytes) in &pkg.files {
            write_file(&dir.join(name), bytes)?;
        }
        println!(
            "wrote a Camtrap DP {} package to {}: {} deployments, {} event-level observations, {} media, {} heartbeats",
            crate::interchange::camtrap::VERSION,
            dir.display(),
            pkg.deployments,
            pkg.observations,
            pkg.media,
            pkg.heartbeats
        );
        if pkg.private_counted > 0 {
            println!(
                "{} human and vehicle observations appear only as counts (deploymentTags)",
                pkg.private_counted
            );
        }
        if pkg.media_refused > 0 {
            println!(
                "{} image links left out: Camtrap DP's filePath may not start with '.', '/' or '~' or hold '..'",
                pkg.media_refused
            );
        }
        if pkg.media_repeated > 0 {
            println!(
                "{} media rows left out: their mediaID was already used by another trigger",
                pkg.media_repeated
            );
        }
    }
    if let Some(dir) = &args.cap {
        let n = export_cap(cfg, dir, from, to, now)?;
        println!("wrote {n} CAP 1.2 alerts to {}", dir.display());
    }
    Ok(())
}

/// Makes `dir`; refuses one that holds files unless `force`.
fn prepare(dir: &Path, force: bool) -> anyhow::Result<()> {
    if dir.is_dir() {
        let busy = std::fs::read_dir(dir)
            .with_context(|| format!("reading {}", dir.display()))?
            .next()
            .is_some();
        if busy && !force {
            anyhow::bail!(
                "{} is not empty; choose an empty folder, or add --force to replace files of the same names",
                dir.display()
            );
        }
    }
    std::fs::create_dir_all(dir).with_context(|| format!("creating {}", dir.display()))
}

/// Writes through a temporary file and a rename, so a reader never sees
/// half a file.
pub fn write_file(path: &Path, bytes: &[u8]) -> anyhow::Result<()> {
    let tmp = path.with_extension("part");
    std::fs::write(&tmp, bytes).with_context(|| format!("writing {}", tmp.display()))?;
    std::fs::rename(&tmp, path).with_context(|| format!("writing {}", path.display()))
}

/// Writes the sent notices decided in `[from, to)` as CAP files, one
/// `<noticeID>.xml` each; returns how many. A retraction's `references`
/// names the sent notices of the same subscriber and event it cancels.
fn export_cap(
    cfg: &Config,
    dir: &Path,
    from: Option<DateTime<Utc>>,
    to: Option<DateTime<Utc>>,
    now: DateTime<Utc>,
) -> anyhow::Result<usize> {
    use crate::interchange::cap::{alert, context_for, incident, sender_for, CapReference};
    use crate::notify::{Notice, Trigger};
    let state = &cfg.service.state_dir;
    if !crate::store::db_path(state).exists() {
        anyhow::bail!(
            "no outrider store in {} (expected {})",
            state.display(),
            crate::store::DB_FILE
        );
    }
    let db = crate::store::sqlite::Sqlite::open_read_only(state)?;
    let mut stmt = db
        .connection()
        .prepare("SELECT notice FROM notices WHERE disposition = 'sent' ORDER BY at, id")?;
    let mut notices: Vec<Notice> = Vec::new();
    let mut unreadable = 0usize;
    for row in stmt.query_map([], |r| r.get::<_, String>(0))? {
        match serde_json::from_str::<Notice>(&row?) {
            Ok(n) => notices.push(n),
            Err(_) => unreadable += 1,
        }
    }
    let sender = sender_for(&cfg.service.public_url);
    let (from, to) = (from.unwrap_or(DateTime::<Utc>::MIN_UTC), to.unwrap_or(now));
    let mut written = 0;
    for n in notices.iter().filter(|n| n.at >= from && n.at < to) {
        let references: Vec<CapReference> = if n.trigger == Trigger::Retraction {
            notices
                .iter()
                .filter(|o| {
                    o.trigger != Trigger::Retraction
                        && o.subscriber_id == n.subscriber_id
                        && *o.event_id == *incident(n)
                })
                .map(|o| CapReference {
                    sender: sender.clone(),
                    identifier: o.id().to_string(),
                    sent: o.at,
                })
                .collect()
        } else {
            Vec::new()
        };
        let sub = cfg.subscribers.iter().find(|s| *s.id == *n.subscriber_id);
        let ctx = context_for(cfg, sub, &sender, &references);
        write_file(
            &dir.join(format!("{}.xml", n.id())),
            alert(n, &ctx).as_bytes(),
        )?;
        written += 1;
    }
    if unreadable > 0 {
        eprintln!("warning: {unreadable} stored notices could not be read and were left out");
    }
    Ok(written)
}
