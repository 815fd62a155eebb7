//! The command line (DESIGN.md "Command line"). Parsing only; `main.rs`
//! dispatches.

use crate::telemetry::LogFormat;
use clap::{Args, Parser, Subcommand};
use std::path::PathBuf;

#[derive(Debug, Parser)]
#[command(
    name = "outrider",
    version,
    about = "Turns camera-trap detections arriving over MQTT into pest-incursion notices"
)]
pub struct Cli {
    /// Log format on stderr.
    #[arg(long, global = true, value_enum, default_value = "text")]
    pub log_format: LogFormat,
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Args)]
pub struct ConfigArg {
    /// The configuration file (TOML).
    #[arg(short = 'c', long = "config", value_name = "FILE")]
    pub config: PathBuf,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Run the daemon.
    Run(ConfigArg),
    /// Run the whole service on the invented demo district, with an embedded
    /// broker and store and no external service.
    Demo {
        /// Where the demo keeps its state, config and mail.
        #[arg(long, value_name = "DIR", default_value = "outrider-demo")]
        state_dir: PathBuf,
        /// Simulated seconds per real second.
        #[arg(long, value_name = "N", default_value_t = 600.0)]
        speed: f64,
        /// Stop after this many real seconds (default: run until Ctrl-C).
        #[arg(long, value_name = "SECS")]
        duration: Option<f64>,
        /// Address of the status page.
        #[arg(long, value_name = "ADDR", default_value = "127.0.0.1:8080")]
        web: std::net::SocketAddr,
    },
    /// Check a configuration and its sites; print what each subscriber covers.
    Check(ConfigArg),
    /// Print counts from the store.
    Status {
        /// The configuration file (gives the state directory and the sites).
        #[arg(
            short = 'c',
            long = "config",
            value_name = "FILE",
            conflicts_with = "state_dir"
        )]
        config: Option<PathBuf>,
        /// A state directory (uses DIR/outrider.toml for the sites when present).
        #[arg(long, value_name = "DIR")]
        state_dir: Option<PathBuf>,
        /// Print JSON.
        #[arg(long)]
        json: bool,
    },
    /// Recompute the independent events from the raw observations (with
    /// their corrections). Stop the daemon first.
    Rebuild(ConfigArg),
    /// Run an archive through the same core on a simulated clock and print
    /// one JSON object per notice (stdout) and a per-subscriber summary
    /// (stderr). Nothing is sent or stored.
    Replay(ReplayArgs),
    /// Preview one subscriber's daily digest from the store (safe while
    /// the daemon runs; nothing is sent).
    Digest {
        /// The configuration file (TOML).
        #[arg(short = 'c', long = "config", value_name = "FILE")]
        config: PathBuf,
        /// The subscriber's id.
        #[arg(long, value_name = "ID")]
        subscriber: String,
        /// The digest's due instant (RFC 3339); default: the latest one at
        /// or before now.
        #[arg(long, value_name = "TIME")]
        at: Option<String>,
        /// Write to FILE: .eml the whole email, .html the HTML part, .json
        /// the numbers, else the text; default: the text on stdout.
        #[arg(long, value_name = "FILE")]
        out: Option<PathBuf>,
    },
    /// Send one clearly marked test message now on each of a subscriber's
    /// channels and report what each server said.
    SendTest {
        /// The configuration file (TOML).
        #[arg(short = 'c', long = "config", value_name = "FILE")]
        config: PathBuf,
        /// The subscriber's id.
        #[arg(long, value_name = "ID")]
        subscriber: String,
    },
    /// Copy the store to a file, safely while the daemon runs; check the
    /// copy and print its row counts.
    Backup {
        /// The configuration file (gives the state directory).
        #[arg(
            short = 'c',
            long = "config",
            value_name = "FILE",
            conflicts_with = "state_dir",
            required_unless_present = "state_dir"
        )]
        config: Option<PathBuf>,
        /// The state directory itself: no config needed, so no secrets in
        /// the environment either.
        #[arg(long, value_name = "DIR")]
        state_dir: Option<PathBuf>,
        /// The backup file to write.
        #[arg(long, value_name = "PATH")]
        to: PathBuf,
        /// Replace PATH if it exists.
        #[arg(long)]
        force: bool,
        /// Database pages copied per step (the daemon's commits go ahead
        /// between steps).
        #[arg(long, value_name = "N", default_value_t = 256, value_parser = clap::value_parser!(i32).range(1..))]
        pages_per_step: i32,
    },
    /// Write what the store holds in open-standard formats: a Camtrap DP
    /// data package, and/or the sent notices as CAP 1.2 alerts. Reads the
    /// store only; safe while the daemon runs.
    Export(ExportArgs),
    /// Load a Camtrap DP data package's deployments and observations into
    /// the store as history (for baselines). Stop the daemon first; it
    /// reads history when it starts.
    Import(ImportArgs),
    /// Print a CSV report of independent events, camera-nights and RAI per
    /// site, species and period. Reads the store only.
    Report(ReportArgs),
    /// Publish synthetic observations of the invented demo district (or of
    /// a grid of N sites) to a broker at a given rate, for load tests;
    /// print what was published and the rate achieved.
    Load(LoadArgs),
}

#[derive(Debug, Args)]
pub struct LoadArgs {
    /// The broker (mqtt://HOST:PORT).
    #[arg(long, value_name = "URL", default_value = "mqtt://127.0.0.1:1883")]
    pub url: String,
    /// Messages to publish (0: only write --write-sites).
    #[arg(long, value_name = "N", default_value_t = 1000)]
    pub count: u64,
    /// Messages per second (default: as fast as the broker takes them).
    #[arg(long, value_name = "MSGS_PER_S")]
    pub rate: Option<f64>,
    /// MQTT quality of service of the publishes.
    #[arg(long, value_name = "0|1", default_value_t = 1, value_parser = clap::value_parser!(u8).range(0..=1))]
    pub qos: u8,
    /// Topic prefix.
    #[arg(long, value_name = "P", default_value = "outrider")]
    pub prefix: String,
    /// Publish for a synthetic grid of N sites around the district
    /// (ids KB-00000...) instead of the district's 16.
    #[arg(long, value_name = "N", value_parser = clap::value_parser!(u64).range(1..=100_000))]
    pub grid_sites: Option<u64>,
    /// Distance between neighbouring grid sites, km.
    #[arg(long, value_name = "KM", default_value_t = 3.0)]
    pub spacing_km: f64,
    /// Write the sites as a Camtrap DP deployments CSV (for `[sites] file`).
    #[arg(long, value_name = "FILE")]
    pub write_sites: Option<PathBuf>,
    /// Publish the hourly heartbeats too (default: observations only).
    #[arg(long)]
    pub heartbeats: bool,
    /// Seed of the synthetic feed.
    #[arg(long, value_name = "N", default_value_t = crate::load::DEFAULT_SEED)]
    pub seed: u64,
    /// Put in front of every observationID (the same options at the same
    /// hour otherwise give the same ids, which a daemon keeps once).
    #[arg(long, value_name = "TEXT", default_value = "")]
    pub id_prefix: String,
    /// MQTT client id (default: `outrider-load-<process id>`).
    #[arg(long, value_name = "ID")]
    pub client_id: Option<String>,
    /// QoS 1 publishes in flight at once.
    #[arg(long, value_name = "N", default_value_t = 1000)]
    pub inflight: u16,
    /// Print the report as JSON.
    #[arg(long)]
    pub json: bool,
}

#[derive(Debug, Args)]
#[command(group(clap::ArgGroup::new("what").required(true).multiple(true).args(["camtrap_dp", "cap"])))]
pub struct ExportArgs {
    /// The configuration file (TOML).
    #[arg(short = 'c', long = "config", value_name = "FILE")]
    pub config: PathBuf,
    /// Write a Camtrap DP 1.0.2 data package into DIR (datapackage.json,
    /// deployments.csv, media.csv, observations.csv, heartbeats.csv).
    #[arg(long = "camtrap-dp", value_name = "DIR")]
    pub camtrap_dp: Option<PathBuf>,
    /// Write each sent notice as a CAP 1.2 alert, one XML file each, into DIR.
    #[arg(long, value_name = "DIR")]
    pub cap: Option<PathBuf>,
    /// Only what happened at or after this instant (RFC 3339).
    #[arg(long, value_name = "T")]
    pub from: Option<String>,
    /// Only what happened before this instant (RFC 3339).
    #[arg(long, value_name = "T")]
    pub to: Option<String>,
    /// Write into a folder that is not empty (files of the same names are
    /// replaced).
    #[arg(long)]
    pub force: bool,
}

#[derive(Debug, Args)]
pub struct ImportArgs {
    /// The configuration file (TOML).
    #[arg(short = 'c', long = "config", value_name = "FILE")]
    pub config: PathBuf,
    /// The Camtrap DP data package: a folder holding datapackage.json.
    #[arg(long = "camtrap-dp", value_name = "DIR")]
    pub camtrap_dp: PathBuf,
}

/// The length of a report's periods.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum ReportPeriod {
    Day,
    Week,
    Month,
}

#[derive(Debug, Args)]
pub struct ReportArgs {
    /// The configuration file (TOML).
    #[arg(short = 'c', long = "config", value_name = "FILE")]
    pub config: PathBuf,
    /// One row per site and species for each local day, ISO week or
    /// calendar month.
    #[arg(long, value_enum, value_name = "PERIOD")]
    pub by: ReportPeriod,
    /// Start of the report (RFC 3339); default: the first deploymentStart.
    #[arg(long, value_name = "T")]
    pub from: Option<String>,
    /// End of the report, exclusive (RFC 3339); default: now.
    #[arg(long, value_name = "T")]
    pub to: Option<String>,
    /// Write the CSV to FILE instead of stdout.
    #[arg(long, value_name = "FILE")]
    pub out: Option<PathBuf>,
}

#[derive(Debug, Args)]
pub struct ReplayArgs {
    /// The configuration file (TOML).
    #[arg(short = 'c', long = "config", value_name = "FILE")]
    pub config: PathBuf,
    /// The archive: a CSV with Camtrap DP observation columns, JSON lines
    /// of messages ({"topic": ..., "payload": {...}}), or a Camtrap DP data
    /// package (a folder with datapackage.json: its observations, and its
    /// heartbeats when it has them and --heartbeats is not given).
    #[arg(long, value_name = "ARCHIVE")]
    pub observations: PathBuf,
    /// Heartbeats (JSON lines of messages, or a CSV with deploymentID and
    /// timestamp columns). Without them a deployment counts as operating
    /// from deploymentStart to deploymentEnd, and silence is not judged.
    #[arg(long, value_name = "FILE")]
    pub heartbeats: Option<PathBuf>,
    /// Only messages at or after this instant (RFC 3339).
    #[arg(long, value_name = "T")]
    pub from: Option<String>,
    /// Only messages before this instant (RFC 3339).
    #[arg(long, value_name = "T")]
    pub to: Option<String>,
}
