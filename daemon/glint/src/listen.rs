//! `glint listen`: a subscriber on the command line. Connects to the daemon's subscriber port, prints each
//! alert (a readable summary, or one JSON line with `--json`), optionally runs a command per alert with the
//! JSON on its stdin, and reconnects with backoff, resuming after the last sequence number it saw (kept in
//! `--state-file` across runs), so every alert is handled once and in order.

use std::io::Write as _;
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::time::Duration;

use anyhow::{Context, anyhow, bail};
use futures::{SinkExt, StreamExt};
use glint_wire::pb::{self, subscriber_frame, subscriber_request};
use tokio_util::codec::Framed;

use crate::alerts;
use crate::codec::{SubscriberClientCodec, refusal_name};
use crate::tls::{self, ClientTls};

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

/// Reads a token file: its content with surrounding whitespace removed; an empty file is an error.
pub(crate) fn read_token(path: &Path) -> anyhow::Result<String> {
    let t = std::fs::read_to_string(path)
        .with_context(|| format!("cannot read token file {}", path.display()))?;
    let t = t.trim();
    if t.is_empty() {
        bail!("token file {} is empty", path.display());
    }
    Ok(t.to_string())
}

/// What one subscriber session asks for.
#[derive(Debug, Clone)]
pub(crate) struct ListenOptions {
    /// `HOST:PORT`.
    pub(crate) addr: String,
    /// Subscriber token.
    pub(crate) token: String,
    /// Kinds wanted (empty: all).
    pub(crate) kinds: Vec<pb::AlertKind>,
    /// Significance cut.
    pub(crate) min_sigma: f64,
    /// Resume after this seq (0: only new alerts unless `replay_all`).
    pub(crate) resume_after: u64,
    /// Replay the whole journal at the first connection.
    pub(crate) replay_all: bool,
    /// Client name.
    pub(crate) client: String,
    /// TLS, when the daemon uses it.
    pub(crate) tls: Option<ClientTls>,
    /// Largest frame accepted from the daemon.
    pub(crate) max_frame: usize,
}

/// What the caller does with each alert; returning `false` ends the session.
pub(crate) type OnAlert<'a> = dyn FnMut(&pb::Alert) -> anyhow::Result<bool> + Send + 'a;

/// How a session ended.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum ListenEnd {
    /// The callback asked to stop.
    Done,
    /// The daemon said goodbye (closing heartbeat) and `reconnect` was false.
    DaemonClosed,
}

/// Subscribes and hands every new alert (seq above the last one seen) to `on_alert`, reconnecting with
/// backoff when the connection drops (and after a closing heartbeat when `reconnect`). A refusal is final.
pub(crate) async fn listen_loop(
    opts: &ListenOptions,
    reconnect: bool,
    on_alert: &mut OnAlert<'_>,
) -> anyhow::Result<ListenEnd> {
    let mut last_seen = opts.resume_after;
    let mut first = true;
    let mut backoff = Duration::from_millis(200);
    loop {
        match session(
            opts,
            last_seen,
            first && opts.replay_all && last_seen == 0,
            &mut last_seen,
            on_alert,
        )
        .await
        {
            Ok(SessionEnd::Done) => return Ok(ListenEnd::Done),
            Ok(SessionEnd::Closed) if !reconnect => return Ok(ListenEnd::DaemonClosed),
            Ok(SessionEnd::Closed) => {
                eprintln!("glint listen: the daemon is shutting down; reconnecting");
                backoff = Duration::from_millis(200);
            }
            Err(SessionError::Refused(e)) => return Err(e),
            Err(SessionError::Lost(e, welcomed)) => {
                if welcomed {
                    backoff = Duration::from_millis(200);
                }
                eprintln!(
                    "glint listen: {e:#}; reconnecting in {:.1} s",
                    backoff.as_secs_f64()
                );
            }
        }
        first = false;
        tokio::time::sleep(backoff).await;
        backoff = (backoff * 2).min(Duration::from_secs(10));
    }
}

enum SessionEnd {
    Done,
    Closed,
}

enum SessionError {
    /// The daemon refused the subscription: retrying cannot help.
    Refused(anyhow::Error),
    /// The connection failed; whether a Welcome had been received.
    Lost(anyhow::Error, bool),
}

async fn session(
    opts: &ListenOptions,
    resume_after: u64,
    replay_all: bool,
    last_seen: &mut u64,
    on_alert: &mut OnAlert<'_>,
) -> Result<SessionEnd, SessionError> {
    let lost = |e: anyhow::Error| SessionError::Lost(e, false);
    let io = tls::connect(&opts.addr, opts.tls.as_ref()).await.map_err(lost)?;
    let mut framed = Framed::new(io, SubscriberClientCodec::new(opts.max_frame));
    let sub = pb::Subscribe {
        token: opts.token.clone(),
        kinds: opts.kinds.iter().map(|k| *k as i32).collect(),
        min_sigma: opts.min_sigma,
        resume_after,
        client: opts.client.clone(),
        schema_version: glint_wire::SCHEMA_VERSION,
        replay_all,
    };
    framed
        .send(pb::SubscriberRequest {
            body: Some(subscriber_request::Body::Subscribe(sub)),
        })
        .await
        .map_err(|e| lost(anyhow!("sending subscribe to {}: {e}", opts.addr)))?;
    let mut welcomed = false;
    // Heartbeats come every few seconds; a long silence means the connection is dead.
    let silence = Duration::from_secs(120);
    loop {
        let frame = match tokio::time::timeout(silence, framed.next()).await {
            Err(_) => {
                return Err(SessionError::Lost(
                    anyhow!("no frame from {} for {} s", opts.addr, silence.as_secs()),
                    welcomed,
                ));
            }
            Ok(None) => {
                return Err(SessionError::Lost(
                    anyhow!("{} closed the connection", opts.addr),
                    welcomed,
                ));
            }
            Ok(Some(Err(e))) => {
                return Err(SessionError::Lost(
                    anyhow!("reading from {}: {e}", opts.addr),
                    welcomed,
                ));
            }
            Ok(Some(Ok(f))) => f,
        };
        match frame.body {
            Some(subscriber_frame::Body::Welcome(w)) => {
                welcomed = true;
                tracing::debug!(server = %w.server, last_seq = w.last_seq, "welcomed");
            }
            Some(subscriber_frame::Body::Refusal(r)) => {
                return Err(SessionError::Refused(anyhow!(
                    "{} refused: {} ({})",
                    opts.addr,
                    refusal_name(r.code),
                    r.detail
                )));
            }
            Some(subscriber_frame::Body::Heartbeat(h)) if h.closing => return Ok(SessionEnd::Closed),
            Some(subscriber_frame::Body::Heartbeat(_)) => {}
            Some(subscriber_frame::Body::Alert(a)) => {
                // After a reconnect the daemon resumes after `last_seen`; anything not newer is a duplicate.
                if a.seq <= *last_seen {
                    continue;
                }
                *last_seen = a.seq;
                match on_alert(&a) {
                    Ok(true) => {}
                    Ok(false) => return Ok(SessionEnd::Done),
                    Err(e) => return Err(SessionError::Refused(e)),
                }
            }
            None => {}
        }
    }
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
