//! The `glint` binary: parses the command line, sets up logging, and dispatches to a subcommand. This is the
//! only place anyhow errors are printed; exit codes are documented in `glint --help`.

use std::process::ExitCode;

use clap::Parser;

// Plumbing every layer may use: configuration, framing, sockets, TLS, time formats, logs, alert rendering,
// the daemon's own measurements, the message bus's conventions.
mod alerts;
mod codec;
mod config;
mod fits;
mod logging;
mod metrics;
mod natsbus;
mod net;
mod progress;
mod timefmt;
mod tls;

// The live service, from the photon's arrival to the alert's departure (see DEVELOPERS.md).
mod desk;
mod http;
mod serve;
mod sinks;
mod tune;

// Joint alerts of several sites from the bus.
mod coincide;

// Clients of a running daemon, then the subcommands on top of everything.
mod cli;
mod client;
mod commands;

fn main() -> ExitCode {
    let args = cli::Cli::parse();
    match cli::dispatch(args) {
        Ok(code) => code,
        Err(e) => {
            if is_broken_pipe(&e) {
                return ExitCode::SUCCESS;
            }
            eprintln!("glint: error: {e:#}");
            ExitCode::from(cli::EXIT_ERROR)
        }
    }
}

/// A closed stdout (e.g. piped into `head`) is a normal end, not an error.
fn is_broken_pipe(e: &anyhow::Error) -> bool {
    e.chain().any(|c| {
        c.downcast_ref::<std::io::Error>()
            .is_some_and(|io| io.kind() == std::io::ErrorKind::BrokenPipe)
    })
}
