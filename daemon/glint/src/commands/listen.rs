//! `glint listen`: a subscriber on the command line. Prints each alert (a readable summary, or one JSON line
//! with `--json`), optionally runs a command per alert with the JSON on its stdin, and keeps the last sequence
//! number seen in `--state-file`; the connection, resume and backoff live in [`crate::client::listen`].

use std::io::Write as _;
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::time::Duration;

use anyhow::{Context, anyhow, bail};
use glint_wire::pb;

use crate::alerts;
use crate::client::listen::{ListenOptions, listen_loop};
use crate::client::read_token;
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
    /// Alert kinds wanted, comma-separated (flash, assessment, withdrawal, test); all when omitted.
    #[arg(long, value_delimiter = ',', value_name = "KINDS")]
    kinds: Vec<String>,
    /// Only alerts at least this many sigma (withdrawals always pass).
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
    /// Run this shell command for each alert, with the alert's JSON on its stdin.
    #[arg(long, value_name = "CMD")]
    exec: Option<String>,
    /// Exit after this many alerts.
    #[arg(long, value_name = "N")]
    max_alerts: Option<u64>,
    /// Exit after this many seconds (an error if --max-alerts was given and not reached).
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
                anyhow!("unknown alert kind '{n}' (flash, assessment, withdrawal, heartbeat, test)")
            })
        })
        .collect()
}

fn read_state(path: &Path) -> anyhow::Result<u64> {
    match std::fs::read_to_string(path) {
        Ok(t) => t
            .trim()
            .parse()
            .with_context(|| format!("state file {} does not hold a sequence number", path.display())),
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(0),
        Err(e) => Err(e).with_context(|| format!("cannot read state file {}", path.display())),
    }
}

/// Writes the state file atomically (temporary file, fsync, rename), so a crash leaves the old or the new value.
fn write_state(path: &Path, seq: u64) -> anyhow::Result<()> {
    let tmp = path.with_extension("tmp");
    let mut f = std::fs::File::create(&tmp).with_context(|| format!("cannot write {}", tmp.display()))?;
    writeln!(f, "{seq}")
        .and_then(|()| f.sync_all())
        .with_context(|| format!("cannot write {}", tmp.display()))?;
    std::fs::rename(&tmp, path)
        .with_context(|| format!("cannot rename {} to {}", tmp.display(), path.display()))
}

fn run_exec(cmd: &str, json: &str) -> anyhow::Result<()> {
    let mut child = std::process::Command::new("sh")
        .arg("-c")
        .arg(cmd)
        .stdin(std::process::Stdio::piped())
        .spawn()
        .with_context(|| format!("cannot run '{cmd}'"))?;
    if let Some(mut stdin) = child.stdin.take() {
        // A command that does not read its input is fine.
        let _ = stdin
            .write_all(json.as_bytes())
            .and_then(|()| stdin.write_all(b"\n"));
    }
    let status = child.wait().with_context(|| format!("waiting for '{cmd}'"))?;
    if !status.success() {
        eprintln!("glint listen: '{cmd}' exited with {status}");
    }
    Ok(())
}

/// `glint listen`.
pub(crate) fn run(args: ListenArgs) -> anyhow::Result<ExitCode> {
    let token = read_token(&args.token_file)?;
    let kinds = parse_kinds(&args.kinds)?;
    if !args.min_sigma.is_finite() || args.min_sigma < 0.0 {
        bail!("--min-sigma {} must be a number >= 0", args.min_sigma);
    }
    let resume_after = match (args.resume_after, &args.state_file) {
        (Some(n), _) => n,
        (None, Some(p)) => read_state(p)?,
        (None, None) => 0,
    };
    let tls = args.tls_ca.as_deref().map(ClientTls::from_ca_file).transpose()?;
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
        let json = alerts::alert_json(a).to_string();
        let mut out = std::io::stdout().lock();
        if args.json {
            writeln!(out, "{json}")?;
        } else {
            writeln!(out, "{}\n", alerts::alert_summary(a))?;
        }
        out.flush()?;
        drop(out);
        if let Some(cmd) = &args.exec {
            run_exec(cmd, &json)?;
        }
        if let Some(p) = &args.state_file {
            write_state(p, a.seq)?;
        }
        count += 1;
        Ok(max.is_none_or(|m| count < m))
    };
    let fut = listen_loop(&opts, true, &mut on_alert);
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
    match result? {
        Some(_) => Ok(ExitCode::SUCCESS),
        None => match max {
            Some(m) => Err(anyhow!(
                "timed out after {} s with {count} of {m} alerts",
                args.timeout_s.unwrap_or(0.0)
            )),
            None => Ok(ExitCode::SUCCESS),
        },
    }
}
