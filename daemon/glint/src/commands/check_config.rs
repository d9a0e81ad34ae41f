//! `glint check-config`: compiles a configuration and lists every problem in it at once (TLS material is
//! loaded and listener ports compared, so what passes here also starts), then the warnings `run` would log.

use std::path::PathBuf;
use std::process::ExitCode;

use crate::config::config_or_exit;

/// Arguments of `glint check-config`.
#[derive(Debug, clap::Args)]
pub(crate) struct CheckConfigArgs {
    /// The file to check; the embedded default when omitted.
    file: Option<PathBuf>,
}

pub(crate) fn run(a: &CheckConfigArgs) -> anyhow::Result<ExitCode> {
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
    for w in cfg.startup_warnings() {
        println!("warning: {w}");
    }
    Ok(ExitCode::SUCCESS)
}
