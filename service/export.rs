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

/// Writes the sent notices in `[from, to)` as CAP files; returns how many.
fn export_cap(
    _cfg: &Config,
    _dir: &Path,
    _from: Option<DateTime<Utc>>,
    _to: Option<DateTime<Utc>>,
    _now: DateTime<Utc>,
) -> anyhow::Result<usize> {
    anyhow::bail!("CAP export is not built yet")
}
