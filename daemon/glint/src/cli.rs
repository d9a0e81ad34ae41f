//! The command line: one binary, one subcommand per job. Arguments are checked in two phases: clap checks
//! their shape, then each subcommand loads and compiles the configuration, reporting every problem at once.

use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Parser, Subcommand};

use crate::config::Config;

/// Exit code for a failure while running.
pub(crate) const EXIT_ERROR: u8 = 1;
/// Exit code for a configuration that does not compile.
pub(crate) const EXIT_CONFIG: u8 = 2;

/// glint finds the final gamma-ray flashes of evaporating black holes in live photon streams and alerts
/// within milliseconds.
#[derive(Debug, Parser)]
#[command(
    name = "glint",
    version,
    about,
    after_help = "Exit codes: 0 success, 1 error while running, 2 configuration problems."
)]
pub(crate) struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Check a configuration file and list every problem in it.
    CheckConfig(CheckConfigArgs),
    /// Simulate an observatory's photon stream from a scenario and write it as a recording.
    Simulate(crate::simulate::SimulateArgs),
    /// Replay recordings through the engine as fast as the CPU allows and print the alerts as JSON lines.
    Replay(crate::replay::ReplayArgs),
    /// Print what a configured instrument can see: background, critical counts, reach, upper limits.
    Reach(crate::reach::ReachArgs),
    /// Run the daemon: ingest, engines, alert desk, subscribers (until SIGTERM or SIGINT).
    Run(crate::daemon::RunArgs),
    /// Run the whole pipeline on the built-in demo scenario, in one process, and print the alerts.
    Demo(crate::demo::DemoArgs),
    /// Benchmark the live daemon: feed a simulated scenario with subscribers attached, print throughput and
    /// latency percentiles.
    #[command(hide = true)]
    BenchLive(crate::demo::BenchArgs),
    /// Play a recording into a running daemon, as a producer would.
    Feed(crate::feed::FeedArgs),
    /// Subscribe to a daemon's alerts and print them (or run a command per alert).
    Listen(crate::listen::ListenArgs),
    /// Withdraw an alert (needs the operator token).
    Withdraw(crate::withdraw::WithdrawArgs),
}

/// Arguments of `glint check-config`.
#[derive(Debug, clap::Args)]
struct CheckConfigArgs {
    /// The file to check; the embedded default when omitted.
    file: Option<PathBuf>,
}

/// Loads the configuration named on the command line, or the embedded default. A configuration that does not
/// compile is printed with every problem and turned into exit code 2 by the caller.
pub(crate) fn load_config(path: Option<&PathBuf>) -> Result<Config, crate::config::ConfigError> {
    match path {
        Some(p) => Config::load(p),
        None => Config::embedded_default(),
    }
}

/// Error type that carries the exit code for a configuration that does not compile.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub(crate) struct BadConfig(pub(crate) crate::config::ConfigError);

/// Loads the configuration or returns a `BadConfig` error (exit code 2).
pub(crate) fn config_or_exit(path: Option<&PathBuf>) -> anyhow::Result<Config> {
    load_config(path).map_err(|e| BadConfig(e).into())
}

/// Runs the chosen subcommand.
pub(crate) fn dispatch(cli: Cli) -> anyhow::Result<ExitCode> {
    let result = match cli.command {
        Command::CheckConfig(a) => check_config(&a),
        Command::Simulate(a) => crate::simulate::run(&a),
        Command::Replay(a) => crate::replay::run(&a),
        Command::Reach(a) => crate::reach::run(&a),
        Command::Run(a) => crate::daemon::run_command(a),
        Command::Demo(a) => crate::demo::run(a),
        Command::BenchLive(a) => crate::demo::bench(a),
        Command::Feed(a) => crate::feed::run(a),
        Command::Listen(a) => crate::listen::run(a),
        Command::Withdraw(a) => crate::withdraw::run(a),
    };
    match result {
        Err(e) if e.downcast_ref::<BadConfig>().is_some() => {
            eprintln!("{e}");
            Ok(ExitCode::from(EXIT_CONFIG))
        }
        other => other,
    }
}

fn check_config(a: &CheckConfigArgs) -> anyhow::Result<ExitCode> {
    let cfg = config_or_exit(a.file.as_ref())?;
    println!(
        "{}: ok ({} instrument(s): {})",
        cfg.source_name,
        cfg.instruments.len(),
        cfg.instruments
            .iter()
            .map(|i| i.id.as_str())
            .collect::<Vec<_>>()
            .join(", ")
    );
    Ok(ExitCode::SUCCESS)
}
