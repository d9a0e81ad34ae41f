//! `glint run`: the daemon as a service. Loads the configuration, installs the signal handlers and hands
//! both to [`crate::serve::run`], which stops in stages on the first SIGTERM or SIGINT.

use std::future::Future;
use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::Context;

use crate::config::config_or_exit;

/// Arguments of `glint run`.
#[derive(Debug, clap::Args)]
pub(crate) struct RunArgs {
    /// Configuration file; the embedded default when omitted.
    #[arg(long, short, value_name = "FILE")]
    config: Option<PathBuf>,
}

/// `glint run`: runs until SIGTERM or SIGINT; SIGHUP reloads tokens and email recipients.
pub(crate) fn run_command(args: RunArgs) -> anyhow::Result<ExitCode> {
    let cfg = config_or_exit(args.config.as_ref())?;
    crate::logging::init(&cfg.daemon.log_level, cfg.daemon.log_format);
    let rt = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .context("cannot start the runtime")?;
    rt.block_on(async {
        let first = shutdown_signals()?;
        crate::serve::run(cfg, args.config.clone(), first).await
    })?;
    Ok(ExitCode::SUCCESS)
}

/// A future that resolves on the first SIGTERM or SIGINT; a second one exits the process at once.
fn shutdown_signals() -> anyhow::Result<impl Future<Output = ()>> {
    use tokio::signal::unix::{SignalKind, signal};
    let mut term = signal(SignalKind::terminate()).context("cannot install the SIGTERM handler")?;
    let mut int = signal(SignalKind::interrupt()).context("cannot install the SIGINT handler")?;
    let (tx, rx) = tokio::sync::oneshot::channel::<&'static str>();
    tokio::spawn(async move {
        let name = tokio::select! { _ = term.recv() => "SIGTERM", _ = int.recv() => "SIGINT" };
        let _ = tx.send(name);
        let again = tokio::select! { _ = term.recv() => "SIGTERM", _ = int.recv() => "SIGINT" };
        tracing::error!("second signal ({again}): exiting at once");
        std::process::exit(130);
    });
    Ok(async move {
        if let Ok(name) = rx.await {
            tracing::info!("{name} received: shutting down (a second signal exits at once)");
        }
    })
}
