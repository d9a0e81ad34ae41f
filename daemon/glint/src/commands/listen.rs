//! `glint listen`: a subscriber on the command line. Prints each alert (a readable summary, or one JSON line
//! with `--json`), optionally runs a handler per alert (`--exec`, see [`crate::client::exec`]), and keeps the
//! last sequence number handled in `--state-file`; the connection, resume and backoff live in
//! [`crate::client::listen`]. Exits with [`EXIT_HANDLER_FAILED`] when a handler failed after its retries,
//! and with [`EXIT_NEVER_CONNECTED`] when `--timeout-s` ran out before the daemon ever accepted it.

use std::io::Write as _;
use std::path::PathBuf;
use std::process::ExitCode;
use std::time::Duration;

use anyhow::{Context, anyhow, bail};
use glint_wire::pb;

use crate::alerts;
use crate::client::exec::{ExecOptions, ExecPool};
use crate::client::listen::{Event, ListenOptions, listen_loop_with};
use crate::client::{read_state, read_token, write_state};
use crate::tls::ClientTls;

/// Arguments of `glint listen`.
#[derive(Debug, clap::Args)]
pub(crate) struct ListenArgs {
    /// The daemon's subscriber address.
    #[arg(long, value_name = "HOST:PORT")]
    from: String,
    /// File holding the subscriber (or operator) token.
    #[arg(long, value_name = "FILE")]
    token_file: PathBuf,
    /// Alert kinds wanted, comma-separated, in any case: flash, assessment, withdrawal, test, joint, and
    /// heartbeat (prints heartbeats, as --heartbeats does); all alert kinds when omitted.
    #[arg(long, value_delimiter = ',', value_name = "KINDS")]
    kinds: Vec<String>,
    /// Also print each heartbeat (every few seconds): the journal's newest number and every instrument's
    /// event time (watermark), so a wrapper can see a stale instrument.
    #[arg(long)]
    heartbeats: bool,
    /// Include the trigger's photons (times, positions, energies) in the JSON (--json and --exec).
    #[arg(long)]
    photons: bool,
    /// Only alerts at least this many sigma post-trials (`sigma_post_trials`; withdrawals always pass).
    #[arg(long, default_value_t = 0.0, value_name = "SIGMA")]
    min_sigma: f64,
    /// Replay journalled alerts after this sequence number first (overrides --state-file).
    #[arg(long, value_name = "SEQ")]
    resume_after: Option<u64>,
    /// Replay every alert the daemon's journal holds before streaming live ones.
    #[arg(long)]
    replay_all: bool,
    /// Keep the last sequence number seen in this file, and resume after it on the next run.
    #[arg(long, value_name = "FILE")]
    state_file: Option<PathBuf>,
    /// Print one JSON object per alert instead of a readable summary.
    #[arg(long)]
    json: bool,
    /// Run this shell command (`sh -c`) for each alert, with the alert's JSON on its stdin and its key fields
    /// in GLINT_ALERT_* environment variables; with --state-file, the file moves past an alert only once its
    /// handler and every earlier one succeeded.
    #[arg(long, value_name = "CMD")]
    exec: Option<String>,
    /// Handlers running at once.
    #[arg(long, default_value_t = 4, value_name = "N")]
    exec_concurrency: usize,
    /// Seconds one handler attempt may run before it is killed (with its process group).
    #[arg(long, default_value_t = 60.0, value_name = "SECONDS")]
    exec_timeout_s: f64,
    /// Attempts after the first for a handler that failed or timed out (backoff 0.5 s, doubling, at most 30 s).
    #[arg(long, default_value_t = 3, value_name = "N")]
    exec_retries: u32,
    /// Exit after this many alerts.
    #[arg(long, value_name = "N")]
    max_alerts: Option<u64>,
    /// Exit after this many seconds: 0, or an error (1) if --max-alerts was given and not reached, or 4 if the
    /// daemon never accepted the subscription in that time.
    #[arg(long, value_name = "SECONDS")]
    timeout_s: Option<f64>,
    /// Connect with TLS, trusting the CA certificates in this PEM file.
    #[arg(long, value_name = "FILE")]
    tls_ca: Option<PathBuf>,
    /// Name sent to the daemon for its logs.
    #[arg(long, default_value = "glint-listen")]
    client: String,
}

fn parse_kinds(names: &[String]) -> anyhow::Result<Vec<pb::AlertKind>> {
    names
        .iter()
        .filter(|n| !n.trim().is_empty())
        .map(|n| {
            alerts::parse_kind(n).ok_or_else(|| {
                anyhow!("unknown alert kind '{n}' (flash, assessment, withdrawal, test, joint, heartbeat)")
            })
        })
        .collect()
}

/// Exit code of `glint listen` when a handler failed after its retries (the state file stops before it).
pub(crate) const EXIT_HANDLER_FAILED: u8 = 3;

/// Exit code of `glint listen --timeout-s` when the daemon never accepted the subscription in that time
/// (unreachable, or never answered), so the command serves as a probe. A refusal (bad token) exits 1.
pub(crate) const EXIT_NEVER_CONNECTED: u8 = 4;

/// `glint listen`.
pub(crate) fn run(args: ListenArgs) -> anyhow::Result<ExitCode> {
    let token = read_token(&args.token_file)?;
    let kinds = parse_kinds(&args.kinds)?;
    let heartbeats = args.heartbeats || kinds.contains(&pb::AlertKind::Heartbeat);
    let json_opts = alerts::JsonOptions {
        photons: args.photons,
    };
    if !args.min_sigma.is_finite() || args.min_sigma < 0.0 {
        bail!("--min-sigma {} must be a number >= 0", args.min_sigma);
    }
    let resume_after = match (args.resume_after, &args.state_file) {
        (Some(n), _) => n,
        (None, Some(p)) => read_state(p)?,
        (None, None) => 0,
    };
    if args.exec_concurrency == 0 {
        bail!("--exec-concurrency must be at least 1");
    }
    let exec_timeout = Duration::try_from_secs_f64(args.exec_timeout_s)
        .ok()
        .filter(|d| !d.is_zero())
        .ok_or_else(|| anyhow!("--exec-timeout-s {} must be a number > 0", args.exec_timeout_s))?;
    let tls = args.tls_ca.as_deref().map(ClientTls::from_ca_file).transpose()?;
    let mut pool = args.exec.as_ref().map(|cmd| {
        ExecPool::new(ExecOptions {
            cmd: cmd.clone(),
            concurrency: args.exec_concurrency,
            timeout: exec_timeout,
            retries: args.exec_retries,
            state_file: args.state_file.clone(),
        })
    });
    let opts = ListenOptions {
        addr: args.from.clone(),
        token,
        kinds,
        min_sigma: args.min_sigma,
        resume_after,
        replay_all: args.replay_all,
        client: args.client.clone(),
        tls,
        max_frame: glint_wire::DEFAULT_MAX_FRAME_BYTES.max(64 << 20),
    };
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .context("cannot start the runtime")?;
    let mut count = 0u64;
    let max = args.max_alerts;
    let mut on_alert = |a: &pb::Alert| -> anyhow::Result<bool> {
        let json = alerts::alert_json_with(a, json_opts).to_string();
        let mut out = std::io::stdout().lock();
        if args.json {
            writeln!(out, "{json}")?;
        } else {
            writeln!(out, "{}\n", alerts::alert_summary(a))?;
        }
        out.flush()?;
        drop(out);
        match pool.as_mut() {
            Some(p) => p.submit(a, json),
            None => {
                if let Some(p) = &args.state_file {
                    write_state(p, a.seq)?;
                }
            }
        }
        count += 1;
        Ok(max.is_none_or(|m| count < m))
    };
    let mut welcomed = false;
    let json = args.json;
    let mut on_event = |e: Event<'_>| -> anyhow::Result<()> {
        match e {
            Event::Welcomed => welcomed = true,
            Event::Heartbeat(h) if heartbeats => {
                let mut out = std::io::stdout().lock();
                if json {
                    writeln!(out, "{}", alerts::heartbeat_json(h))?;
                } else {
                    writeln!(out, "{}\n", alerts::heartbeat_summary(h))?;
                }
                out.flush()?;
            }
            Event::Heartbeat(_) => {}
        }
        Ok(())
    };
    let fut = listen_loop_with(&opts, true, &mut on_alert, &mut on_event);
    let result = rt.block_on(async {
        match args.timeout_s {
            Some(t) => {
                let d = Duration::try_from_secs_f64(t)
                    .map_err(|_| anyhow!("--timeout-s {t} is not a duration"))?;
                match tokio::time::timeout(d, fut).await {
                    Ok(r) => r.map(Some),
                    Err(_) => Ok(None),
                }
            }
            None => fut.await.map(Some),
        }
    });
    // Every handler started finishes (or times out) before the command ends.
    let report = pool.map(ExecPool::finish);
    if matches!(result, Ok(None)) && !welcomed {
        eprintln!(
            "glint listen: {} did not accept the subscription within {} s",
            args.from,
            args.timeout_s.unwrap_or(0.0)
        );
        return Ok(ExitCode::from(EXIT_NEVER_CONNECTED));
    }
    let outcome = match result? {
        Some(_) => Ok(ExitCode::SUCCESS),
        None => match max {
            Some(m) => Err(anyhow!(
                "timed out after {} s with {count} of {m} alerts",
                args.timeout_s.unwrap_or(0.0)
            )),
            None => Ok(ExitCode::SUCCESS),
        },
    };
    if let Some(r) = report {
        if let Some(e) = r.state_error {
            bail!("the state file could not be kept: {e}");
        }
        if !r.failed.is_empty() {
            let ids: Vec<&str> = r.failed.iter().map(|(_, id, _)| id.as_str()).collect();
            eprintln!(
                "glint listen: {} handler(s) failed: {}; the state file stops at {}",
                r.failed.len(),
                ids.join(" "),
                r.committed
                    .map_or("its old value".to_string(), |s| format!("seq {s}"))
            );
            return Ok(ExitCode::from(EXIT_HANDLER_FAILED));
        }
    }
    outcome
}
