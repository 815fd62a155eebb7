//! `outrider report`: the store's history as a CSV of independent events,
//! camera-nights and RAI per site, species and period
//! ([`crate::interchange::report`] builds it). Reads the store only, so it
//! is safe while the daemon runs.

use crate::cli::{ReportArgs, ReportPeriod};
use crate::config::Config;
use crate::interchange::{report_csv, Period, ReportSpec};
use crate::model::Message;
use crate::replay::parse_instant;
use crate::store::sqlite::{load_history, Sqlite};
use anyhow::Context as _;
use chrono::{DateTime, Utc};

/// Every stored message (observations and heartbeats in time order, then
/// corrections), read through a read-only connection.
pub fn read_history(cfg: &Config) -> anyhow::Result<Vec<Message>> {
    let dir = &cfg.service.state_dir;
    if !crate::store::db_path(dir).exists() {
        anyhow::bail!(
            "no outrider store in {} (expected {})",
            dir.display(),
            crate::store::DB_FILE
        );
    }
    let db = Sqlite::open_read_only(dir)?;
    Ok(load_history(db.connection(), DateTime::<Utc>::MIN_UTC)?)
}

/// An optional end of a window.
type Instant = Option<DateTime<Utc>>;

/// `--from`/`--to` as instants, checked.
pub fn window(from: Option<&str>, to: Option<&str>) -> anyhow::Result<(Instant, Instant)> {
    let from = parse_instant("--from", from)?;
    let to = parse_instant("--to", to)?;
    if let (Some(f), Some(t)) = (from, to) {
        if f >= t {
            anyhow::bail!("--from must be before --to");
        }
    }
    Ok((from, to))
}

pub fn run(cfg: &Config, args: &ReportArgs, now: DateTime<Utc>) -> anyhow::Result<()> {
    let (from, to) = window(args.from.as_deref(), args.to.as_deref())?;
    let spec = ReportSpec {
        by: match args.by {
            ReportPeriod::Day => Period::Day,
            ReportPeriod::Week => Period::Week,
            ReportPeriod::Month => Period::Month,
        },
        from,
        to,
    };
    let history = read_history(cfg)?;
    let csv = report_csv(cfg, &history, &spec, now)?;
    match &args.out {
        Some(path) => std::fs::write(path, csv)
            .with_context(|| format!("writing the report to {}", path.display()))?,
        None => {
            use std::io::Write as _;
            let mut out = std::io::stdout().lock();
            match out.write_all(csv.as_bytes()).and_then(|_| out.flush()) {
                Err(e) if e.kind() != std::io::ErrorKind::BrokenPipe => {
                    return Err(e).context("writing the report to stdout")
                }
                _ => {}
            }
        }
    }
    Ok(())
}
