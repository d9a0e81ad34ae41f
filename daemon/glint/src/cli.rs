//! The command line: one binary, one subcommand per job. Arguments are checked in two phases: clap checks
//! their shape, then each subcommand loads and compiles the configuration, reporting every problem at once.

use std::process::ExitCode;

use clap::{Parser, Subcommand};

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
    after_help = "Exit codes: 0 success, 1 error while running, 2 configuration problems, 3 (listen --exec) a handler failed after its retries, 4 (listen --timeout-s) the daemon never accepted the subscription."
)]
pub(crate) struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Check a configuration file and list every problem in it.
    CheckConfig(crate::commands::check_config::CheckConfigArgs),
    /// Simulate an observatory's photon stream from a scenario and write it as a recording.
    Simulate(crate::commands::simulate::SimulateArgs),
    /// Replay recordings through the engine as fast as the CPU allows and print the alerts as JSON lines.
    Replay(crate::commands::replay::ReplayArgs),
    /// Tune on recordings: measured false-alarm rates, injections, efficiency, upper limits, with plots
    /// (`glint tune merge` combines the shards of a cluster run).
    Tune(crate::commands::tune::TuneArgs),
    /// Write a FITS event list (an EVENTS table) as a recording; replay also reads such files directly.
    Import(crate::commands::import::ImportArgs),
    /// Print what a configured instrument can see: background, critical counts, reach, upper limits.
    Reach(crate::commands::reach::ReachArgs),
    /// Run the daemon: ingest, engines, alert desk, subscribers (until SIGTERM or SIGINT).
    Run(crate::commands::run::RunArgs),
    /// Run the whole pipeline on the built-in demo scenario, in one process, and print the alerts.
    Demo(crate::commands::demo::DemoArgs),
    /// Benchmark the live daemon: feed a simulated scenario with subscribers attached, print throughput and
    /// latency percentiles.
    #[command(hide = true)]
    BenchLive(crate::commands::bench_live::BenchArgs),
    /// Measure an instrument's effective trials on background (recordings or a simulated scenario) and
    /// write its false-alarm calibration to <state_dir>/calibration/<instrument>.toml.
    #[command(hide = true)]
    Calibrate(crate::commands::calibrate::CalibrateArgs),
    /// Play a recording into a running daemon, as a producer would.
    Feed(crate::commands::feed::FeedArgs),
    /// Subscribe to a daemon's alerts and print them (or run a command per alert).
    Listen(crate::commands::listen::ListenArgs),
    /// Withdraw an alert (needs the operator token).
    Withdraw(crate::commands::withdraw::WithdrawArgs),
    /// Join alerts from several sites on the message bus into joint alerts (its own configuration).
    Coincide(crate::commands::coincide::CoincideArgs),
    /// Benchmark the bus sink: publish made-up test alerts through a desk to a NATS server, print alerts/s
    /// and the latency from journal to acknowledged publish.
    #[command(hide = true)]
    BenchBus(crate::commands::bench_bus::BenchBusArgs),
    /// Ask a running daemon for a TEST alert through every sink (needs the operator token).
    TestAlert(crate::commands::test_alert::TestAlertArgs),
    /// Show a running daemon's health: streams, sinks, alerts, latency, the running upper limit.
    Status(crate::commands::status::StatusArgs),
    /// Read a state directory's alert journal offline: verify, list, show, export (never modifies it).
    Journal(crate::commands::journal::JournalArgs),
}

/// Runs the chosen subcommand.
pub(crate) fn dispatch(cli: Cli) -> anyhow::Result<ExitCode> {
    let result = match cli.command {
        Command::CheckConfig(a) => crate::commands::check_config::run(&a),
        Command::Simulate(a) => crate::commands::simulate::run(&a),
        Command::Replay(a) => crate::commands::replay::run(&a),
        Command::Import(a) => crate::commands::import::run(&a),
        Command::Reach(a) => crate::commands::reach::run(&a),
        Command::Tune(a) => crate::commands::tune::run(&a),
        Command::Status(a) => crate::commands::status::run(&a),
        Command::Run(a) => crate::commands::run::run_command(a),
        Command::Demo(a) => crate::commands::demo::run(a),
        Command::BenchLive(a) => crate::commands::bench_live::bench(a),
        Command::Calibrate(a) => crate::commands::calibrate::run(&a),
        Command::Feed(a) => crate::commands::feed::run(a),
        Command::Coincide(a) => crate::commands::coincide::run(a),
        Command::BenchBus(a) => crate::commands::bench_bus::run(a),
        Command::Listen(a) => crate::commands::listen::run(a),
        Command::Withdraw(a) => crate::commands::withdraw::run(a),
        Command::TestAlert(a) => crate::commands::test_alert::run(a),
        Command::Journal(a) => crate::commands::journal::run(&a),
    };
    match result {
        // A configuration or a scenario that does not compile is the operator's to mend: exit code 2.
        Err(e)
            if e.chain()
                .any(|c| c.is::<crate::config::BadConfig>() || c.is::<glint_sim::SimError>()) =>
        {
            // `:#` prints the whole chain: "scenario F: source[3] ..." rather than the file name alone.
            eprintln!("{e:#}");
            Ok(ExitCode::from(EXIT_CONFIG))
        }
        other => other,
    }
}
