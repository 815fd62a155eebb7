//! `outrider import`: a Camtrap DP data package's deployments and
//! observations (and its heartbeats, when it has outrider's heartbeats
//! resource) loaded into the store as history, for baselines.
//!
//! Every row goes through the daemon's own decoder (the replay archive
//! reader, [`crate::replay::archive`]) and into the store the way the daemon
//! stores messages: a repeated `observationID` (or heartbeat) is ignored and
//! counted as a duplicate, so importing a package twice changes nothing; a
//! row the decoder refuses is stored as a rejection with its reason, as the
//! daemon stores a bad message, and listed. Nothing is written when the
//! package names a deployment that is not in the sites file: the import
//! stops and says which. Then the independent events are rebuilt from the
//! raw observations (as `outrider rebuild` does).
//!
//! The daemon reads history when it starts: stop it before importing (the
//! event rebuild replaces the events table) and start it again after.

use crate::cli::ImportArgs;
use crate::config::Config;
use crate::interchange::camtrap::{read_deployments, PackageLayout};
use crate::model::Message;
use crate::pipeline::DecodeFacts;
use crate::replay::archive::{self, FileStats, Record, RefusedRecord, TimeFilter};
use crate::store::sqlite::{Durability, Sqlite};
use crate::store::{Backend, Ingest, Outcome};
use anyhow::Context as _;
use chrono::{DateTime, Duration, Utc};
use std::path::{Path, PathBuf};
use std::process::ExitCode;

/// The files of a package on disk.
#[derive(Debug, Clone)]
pub struct OpenPackage {
    pub dir: PathBuf,
    pub deployments: PathBuf,
    pub observations: PathBuf,
    pub heartbeats: Option<PathBuf>,
    pub warnings: Vec<String>,
}

/// Reads `dir/datapackage.json` and says where the tables are.
pub fn open_package(dir: &Path) -> anyhow::Result<OpenPackage> {
    let descriptor = dir.join("datapackage.json");
    let text = std::fs::read_to_string(&descriptor).with_context(|| {
        format!(
            "{} is not a data package folder: cannot read {}",
            dir.display(),
            descriptor.display()
        )
    })?;
    let layout = PackageLayout::parse(&text).with_context(|| descriptor.display().to_string())?;
    Ok(OpenPackage {
        dir: dir.to_path_buf(),
        deployments: dir.join(&layout.deployments),
        observations: dir.join(&layout.observations),
        heartbeats: layout.heartbeats.as_ref().map(|h| dir.join(h)),
        warnings: layout.warnings,
    })
}

/// Rows stored per transaction.
const BATCH: usize = 10_000;

pub fn run(cfg: &Config, args: &ImportArgs, now: DateTime<Utc>) -> anyhow::Result<ExitCode> {
    let pkg = open_package(&args.camtrap_dp)?;
    for w in &pkg.warnings {
        eprintln!("warning: {w}");
    }
    // 1. Every deployment must be a configured site.
    let text = std::fs::read_to_string(&pkg.deployments)
        .with_context(|| format!("reading {}", pkg.deployments.display()))?;
    let deployments = read_deployments(&text)
        .map_err(|e| anyhow::anyhow!("{}: {e}", pkg.deployments.display()))?;
    let unknown: Vec<String> = deployments
        .iter()
        .filter(|d| {
            !cfg.sites
                .sites
                .iter()
                .any(|s| s.deployment_id == d.deployment_id)
        })
        .map(|d| {
            format!(
                "{}:{}: `{}`",
                pkg.deployments.display(),
                d.line,
                crate::ingest::decode::printable(&d.deployment_id)
            )
        })
        .collect();
    if !unknown.is_empty() {
        anyhow::bail!(
            "nothing imported: {} deployment{} of the package {} not in the sites file {}:\n  {}\n\
             hint: add {} to the sites file (same deploymentID, its place and deploymentStart), then import again",
            unknown.len(),
            if unknown.len() == 1 { "" } else { "s" },
            if unknown.len() == 1 { "is" } else { "are" },
            cfg.sites.file.display(),
            unknown.join("\n  "),
            if unknown.len() == 1 { "it" } else { "them" },
        );
    }
    for d in &deployments {
        let Some(site) = cfg
            .sites
            .sites
            .iter()
            .find(|s| s.deployment_id == d.deployment_id)
        else {
            continue;
        };
        if d.deployment_start
            .is_some_and(|t| t < site.deployment_start - Duration::days(1))
        {
            eprintln!(
                "warning: {}:{}: deployment `{}` starts before its deploymentStart in the sites file; rows more than a day before that are refused (timestamp-out-of-range)",
                pkg.deployments.display(),
                d.line,
                d.deployment_id
            );
        }
    }

    // 2. Decode the rows as the daemon decodes messages.
    let facts = DecodeFacts::from_config(cfg);
    let mut records: Vec<Record> = Vec::new();
    let mut refused: Vec<RefusedRecord> = Vec::new();
    let mut files: Vec<(FileStats, usize)> = Vec::new();
    for path in std::iter::once(&pkg.observations).chain(pkg.heartbeats.as_ref()) {
        let before = refused.len();
        let stats = archive::read_keeping(
            path,
            &facts,
            TimeFilter::default(),
            &mut records,
            Some(&mut refused),
            &mut |_| {},
        )?;
        let n = refused.len() - before;
        files.push((stats, n));
    }

    // 3. Store them, then rebuild the events.
    let mut db = Sqlite::open(&cfg.service.state_dir, Durability::Full)?;
    let mut batch: Vec<Ingest> = records
        .into_iter()
        .map(|r| Ingest::Message {
            message: r.message,
            received_at: now,
        })
        .collect();
    batch.extend(refused.iter().map(|r| Ingest::Rejected {
        topic: format!("(import)/{}", r.topic),
        payload: r.payload.clone(),
        payload_bytes: r.payload.len(),
        rejection: r.rejection.clone(),
        received_at: now,
    }));
    let (mut stored, mut duplicates, mut observations) = (0u64, 0u64, 0u64);
    for chunk in batch.chunks(BATCH) {
        let outcomes = db.commit(chunk, &[])?;
        for (item, o) in chunk.iter().zip(&outcomes) {
            let is_obs = matches!(
                item,
                Ingest::Message {
                    message: Message::Observation(_),
                    ..
                }
            );
            match o {
                Outcome::Stored => {
                    stored += 1;
                    observations += u64::from(is_obs);
                }
                Outcome::Duplicate => duplicates += 1,
                _ => {}
            }
        }
    }
    let (_, events) = db.rebuild_events(Duration::minutes(i64::from(
        cfg.detection.independence_minutes,
    )))?;
    db.close()?;

    // 4. Say what happened.
    println!(
        "imported {} into {}: {stored} new messages ({observations} observations, {} heartbeats), {duplicates} already stored (ignored), {} refused; {events} independent events rebuilt",
        pkg.dir.display(),
        cfg.service.state_dir.display(),
        stored - observations,
        refused.len()
    );
    for (stats, n) in &files {
        if stats.media_level_skipped > 0 {
            println!(
                "{}: {} media-level rows left out (the event-level rows hold the same detections)",
                stats.path.display(),
                stats.media_level_skipped
            );
        }
        if *n > 0 {
            for (reason, t) in &stats.rejected {
                let lines: Vec<String> = t.lines.iter().map(u64::to_string).collect();
                eprintln!(
                    "{}: {} row{} refused ({reason}), line{} {}{}: {}",
                    stats.path.display(),
                    t.count,
                    if t.count == 1 { "" } else { "s" },
                    if t.lines.len() == 1 { "" } else { "s" },
                    lines.join(", "),
                    if t.count as usize > t.lines.len() {
                        ", ..."
                    } else {
                        ""
                    },
                    t.example
                );
            }
        }
    }
    if !refused.is_empty() {
        eprintln!(
            "the refused rows are kept in the store as rejections (outrider status shows them); fix them and import again: rows already stored are ignored"
        );
    }
    println!("restart the daemon so that it loads this history");
    Ok(if refused.is_empty() {
        ExitCode::SUCCESS
    } else {
        ExitCode::from(1)
    })
}
