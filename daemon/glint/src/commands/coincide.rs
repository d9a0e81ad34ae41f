//! `glint coincide`: joint alerts from several sites. Reads its own configuration (`[bus]`, `[coincide]`,
//! `[[site]]`; see deploy/coincide.toml), consumes the alert stream with a durable consumer of its own, and
//! prints every joint alert it publishes back to the bus as a JSON line on stdout.

use std::io::Write as _;
use std::path::PathBuf;
use std::process::ExitCode;
use std::time::Duration;

use anyhow::Context;
use tokio_util::sync::CancellationToken;

use crate::coincide::consumer::{self, RunLimits};
use crate::config::{BadConfig, CoincideConfig, LogFormat};

/// Arguments of `glint coincide`.
#[derive(Debug, clap::Args)]
pub(crate) struct CoincideArgs {
    /// Coincide configuration file.
    #[arg(long, short, value_name = "FILE")]
    config: PathBuf,
    /// Stop after this many seconds without a message from the bus (batch runs); runs until SIGTERM or
    /// SIGINT when omitted.
    #[arg(long, value_name = "SECONDS")]
    idle_exit_s: Option<f64>,
}

/// `glint coincide`.
pub(crate) fn run(a: CoincideArgs) -> anyhow::Result<ExitCode> {
    let cfg = CoincideConfig::load(&a.config).map_err(BadConfig)?;
    crate::logging::init(&cfg.log_level, LogFormat::Text);
    let idle_exit = a
        .idle_exit_s
        .map(Duration::try_from_secs_f64)
        .transpose()
        .context("--idle-exit-s must be a number of seconds >= 0")?;
    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .context("cannot start the runtime")?;
    let issued = rt.block_on(async {
        let stop = CancellationToken::new();
        let on_signal = stop.clone();
        tokio::spawn(async move {
            use tokio::signal::unix::{SignalKind, signal};
            if let (Ok(mut term), Ok(mut int)) =
                (signal(SignalKind::terminate()), signal(SignalKind::interrupt()))
            {
                tokio::select! { _ = term.recv() => {}, _ = int.recv() => {} }
                on_signal.cancel();
            }
        });
        consumer::run(cfg, RunLimits { idle_exit }, stop, |j| {
            let mut out = std::io::stdout().lock();
            let _ = writeln!(out, "{}", crate::alerts::alert_json(j));
            let _ = out.flush();
        })
        .await
    })?;
    tracing::info!(issued, "coincide stopped");
    Ok(ExitCode::SUCCESS)
}
