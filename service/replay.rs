//! `outrider replay`: an archive through the same engine on a simulated
//! clock. (Being written.)

use crate::cli::ReplayArgs;
use crate::config::Config;
use std::process::ExitCode;

/// Runs the replay; prints notices on stdout and a summary on stderr.
pub fn run(_cfg: &Config, _args: &ReplayArgs) -> anyhow::Result<ExitCode> {
    anyhow::bail!("replay is not built yet")
}
