//! `glint check-config`: compiles a configuration (the daemon's, or `glint coincide`'s) and lists every
//! problem in it at once (TLS material is loaded and listener ports compared, so what passes here also
//! starts), then the warnings `run` would log. It also refuses what would run but must not be deployed: the
//! shipped placeholder tokens, token files the group or others can read, a state directory that is missing
//! or not writable by this user (run it as the daemon's user).

use std::path::PathBuf;
use std::process::ExitCode;

use crate::config::{BadConfig, CoincideConfig, ConfigError, config_or_exit, is_coincide_config};

/// Arguments of `glint check-config`.
#[derive(Debug, clap::Args)]
pub(crate) struct CheckConfigArgs {
    /// The file to check; the embedded default when omitted.
    file: Option<PathBuf>,
}

pub(crate) fn run(a: &CheckConfigArgs) -> anyhow::Result<ExitCode> {
    // A `glint coincide` configuration (it has a [coincide] table) is checked as one.
    if let Some(f) = &a.file {
        if std::fs::read_to_string(f).is_ok_and(|t| is_coincide_config(&t)) {
            let cfg = CoincideConfig::load(f).map_err(BadConfig)?;
            println!(
                "{}: ok (coincide, bus {} stream {}, {} site(s): {})",
                cfg.source_name,
                cfg.bus.url,
                cfg.bus.stream,
                cfg.sites.len(),
                cfg.sites
                    .iter()
                    .map(|s| s.instrument.as_str())
                    .collect::<Vec<_>>()
                    .join(", ")
            );
            return Ok(ExitCode::SUCCESS);
        }
    }
    let cfg = config_or_exit(a.file.as_ref())?;
    let mut problems = cfg.deployment.clone();
    problems.extend(cfg.state_dir_problem());
    if !problems.is_empty() {
        return Err(BadConfig(ConfigError {
            source_name: cfg.source_name.clone(),
            problems,
        })
        .into());
    }
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
    if let Some(b) = &cfg.bus {
        println!(
            "  bus: {} stream {} subjects {}.<instrument>.<kind>",
            b.url, b.stream, b.subject_prefix
        );
    }
    for w in cfg.startup_warnings() {
        println!("warning: {w}");
    }
    Ok(ExitCode::SUCCESS)
}
