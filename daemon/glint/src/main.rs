//! The `glint` binary: parses the command line, sets up logging, and dispatches to a subcommand. This is the
//! only place anyhow errors are printed; exit codes are documented in `glint --help`.

use std::process::ExitCode;

use clap::Parser;

mod alerts;
mod cli;
mod codec;
mod config;
mod daemon;
mod demo;
mod desk;
mod driver;
mod feed;
mod hostprobe;
mod ingest;
mod issuing;
mod journal;
mod listen;
mod logging;
mod metrics;
mod net;
mod reach;
mod replay;
mod simulate;
mod subscribers;
mod timefmt;
mod tls;
mod withdraw;

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
