//! `outrider status`: counts from the store, as JSON or as a few lines of
//! text. Reads the database only; safe while the daemon runs.

use crate::config::Config;
use crate::store::sqlite::Sqlite;
use crate::store::{Backend, StatusCounts};
use chrono::{DateTime, Duration, Utc};
use std::path::Path;

/// Written by `outrider demo` into its state directory: the simulated time
/// it had reached when it stopped (RFC 3339), which `status` then uses as
/// "now" for that directory.
pub const DEMO_CLOCK_FILE: &str = "demo-clock";

/// The time to judge silence by: the demo's simulated time for a demo's
/// state directory, else `now`.
pub fn effective_now(state_dir: &Path, now: DateTime<Utc>) -> DateTime<Utc> {
    std::fs::read_to_string(state_dir.join(DEMO_CLOCK_FILE))
        .ok()
        .and_then(|t| DateTime::parse_from_rfc3339(t.trim()).ok())
        .map(|t| t.with_timezone(&Utc))
        .unwrap_or(now)
}

/// Counts from the store in `state_dir`; with `cfg`, silent deployments are
/// worked out against its sites and silence limit at `now`.
pub fn read(
    state_dir: &Path,
    cfg: Option<&Config>,
    now: DateTime<Utc>,
) -> anyhow::Result<StatusCounts> {
    if !crate::store::db_path(state_dir).exists() {
        anyhow::bail!(
            "no outrider store in {} (expected {})",
            state_dir.display(),
            crate::store::DB_FILE
        );
    }
    let mut db = Sqlite::open_read_only(state_dir)?;
    let mut s = db.status()?;
    if let Some(cfg) = cfg {
        s.deployments_silent = silent(&s, cfg, now).len() as u64;
    }
    Ok(s)
}

/// Deployments with no sign of life for longer than the silence limit,
/// counting from deploymentStart for a camera never heard from. Ended
/// deployments are not silent.
pub fn silent<'c>(s: &StatusCounts, cfg: &'c Config, now: DateTime<Utc>) -> Vec<&'c str> {
    let limit = Duration::seconds((cfg.sites.silence_hours * 3600.0) as i64);
    cfg.sites
        .sites
        .iter()
        .filter(|site| site.deployment_end.is_none_or(|end| end > now))
        .filter(|site| {
            let last = s
                .last_seen
                .get(&site.deployment_id)
                .copied()
                .unwrap_or(site.deployment_start);
            now - last > limit
        })
        .map(|site| site.deployment_id.as_str())
        .collect()
}

/// Plain text for people.
pub fn render_text(s: &StatusCounts) -> String {
    let mut out = String::new();
    out.push_str(&format!(
        "observations stored   {}\n",
        s.observations_stored
    ));
    out.push_str(&format!("duplicates ignored    {}\n", s.duplicates_ignored));
    out.push_str(&format!("heartbeats stored     {}\n", s.heartbeats_stored));
    out.push_str(&format!("corrections stored    {}\n", s.corrections_stored));
    let rejected: u64 = s.rejected.values().sum();
    out.push_str(&format!("rejected              {rejected}\n"));
    for (reason, n) in &s.rejected {
        out.push_str(&format!("  {reason:<22}{n}\n"));
    }
    out.push_str(&format!("independent events    {}\n", s.events));
    let notices: u64 = s.notices.values().sum();
    out.push_str(&format!("notices               {notices}\n"));
    for (d, n) in &s.notices {
        out.push_str(&format!("  {d:<22}{n}\n"));
    }
    out.push_str(&format!("outbox pending        {}\n", s.outbox_pending));
    let deliveries: u64 = s.deliveries.values().sum();
    out.push_str(&format!("deliveries            {deliveries}\n"));
    // pending, sent, failed, and closed (not sent: the subscriber unsubscribed).
    for (state, n) in &s.deliveries {
        out.push_str(&format!("  {state:<22}{n}\n"));
    }
    if !s.digests.is_empty() {
        out.push_str("digests\n");
        for (state, n) in &s.digests {
            out.push_str(&format!("  {state:<22}{n}\n"));
        }
    }
    out.push_str(&format!("deployments silent    {}\n", s.deployments_silent));
    out
}
