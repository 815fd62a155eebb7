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
}
