//! The command line: one binary, one subcommand per job. Arguments are checked in two phases: clap checks
//! their shape, then each subcommand loads and compiles the configuration, reporting every problem at once.

use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::Context;
use clap::{Parser, Subcommand};

use crate::config::Config;

/// Exit code for a failure while running.
pub(crate) const EXIT_ERROR: u8 = 1;
/// Exit code for a configuration that does not compile.
pub(crate) const EXIT_CONFIG: u8 = 2;

/// glint finds the final gamma-ray flashes of evaporating black holes in live photon streams and alerts
/// within milliseconds.
#[derive(Debug, Parser)]
#[command(name = "glint", version, about, after_help = "Exit codes: 0 success, 1 error while running, 2 configuration problems.")]
pub(crate) struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Check a configuration file and list every problem in it.
    CheckConfig {
        /// The file to check; the embedded default when omitted.
        file: Option<PathBuf>,
    },
}

/// Loads the configuration named on the command line, or the embedded default.
pub(crate) fn load_config(path: Option<&PathBuf>) -> Result<Config, crate::config::ConfigError> {
    match path {
        Some(p) => Config::load(p),
        None => Config::embedded_default(),
    }
}

/// Runs the chosen subcommand.
pub(crate) fn dispatch(cli: Cli) -> anyhow::Result<ExitCode> {
    match cli.command {
        Command::CheckConfig { file } => match load_config(file.as_ref()) {
            Ok(cfg) => {
                println!(
                    "{}: ok ({} instrument(s): {})",
                    cfg.source_name,
                    cfg.instruments.len(),
                    cfg.instruments.iter().map(|i| i.id.as_str()).collect::<Vec<_>>().join(", ")
                );
                Ok(ExitCode::SUCCESS)
            }
            Err(e) => {
                eprintln!("{e}");
                Ok(ExitCode::from(EXIT_CONFIG))
            }
        },
    }
    .context("running glint")
}
