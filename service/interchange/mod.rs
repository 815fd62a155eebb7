//! Open-standard interchange: Camtrap DP data packages out and in, CAP 1.2
//! alerts, and CSV reports of counts, effort and RAI.
//!
//! Role: the pure format code. Everything here takes plain values (the
//! config, a stored history as [`crate::model::Message`]s, notices, the
//! time as a value) and returns bytes or strings; nothing reads a file, the
//! database or the clock. The command shells (`service/export.rs`,
//! `service/import.rs`, `service/report.rs`) and the delivery worker do the
//! I/O. docs/interchange.md is the user's page.
//!
//! # Layout
//! - [`history`]: a stored history read the engine's way: independent
//!   events (with their observations), effort per deployment, and what the
//!   formats need of each observation. Shared by the export and the report.
//! - [`camtrap`]: Camtrap DP 1.0.2 packages: writing one from a history,
//!   reading the parts an import or a replay needs.
//! - [`cap`]: a notice as a CAP 1.2 `<alert>`.
//! - [`report`]: counts, camera-nights and RAI per site, species and
//!   period, as rows and as CSV ([`report::report_csv`]).
//! - [`text`]: shared text helpers (local date-times, XML escaping).

pub mod camtrap;
pub mod cap;
pub mod history;
pub mod report;
pub mod text;

pub use history::History;
pub use report::{report_csv, report_rows, Period, ReportRow, ReportSpec};

/// A configuration for the unit tests: Australia/Sydney, the given sites
/// (replacing the placeholder file), silence limit 36 h, independence
/// interval 30 min, and `extra` TOML (subscribers).
#[cfg(test)]
pub(crate) fn test_config(sites: Vec<crate::config::Site>, extra: &str) -> crate::config::Config {
    use crate::config::{parse, Files};
    use std::path::Path;
    let src = format!(
        "[service]\ntimezone = \"Australia/Sydney\"\npublic_url = \"https://outrider.kellerby.example\"\n[sites]\nfile = \"sites.csv\"\nsilence_hours = 36\n[detection]\nindependence_minutes = 30\n{extra}"
    );
    let placeholder = "deploymentID,latitude,longitude,deploymentStart\n\
        KB-01,-31.49,147.97,2026-01-01T00:00:00+11:00\n\
        KB-02,-31.49,148.05,2026-01-01T00:00:00+11:00\n";
    let files = Files {
        read: &|_p: &Path| Ok(placeholder.to_string()),
        env: &|_| None,
    };
    let mut cfg = parse(Path::new("/t/outrider.toml"), &src, &[], &files)
        .unwrap_or_else(|e| panic!("test config: {e}"));
    if !sites.is_empty() {
        cfg.sites.sites = sites;
    }
    cfg
}
