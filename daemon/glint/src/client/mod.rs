//! Clients of a running daemon: the producer side (`feed`: a recording played into the ingest port) and
//! the subscriber side (`listen`: alerts read from the subscriber port, resumed after the last one seen).
//! `exec` runs `listen --exec` handlers. The commands `feed`, `listen`, `withdraw`, `test-alert`, `demo` and
//! `bench-live` are thin shells over these.

use std::io::Write as _;
use std::path::Path;

use std::time::Duration;

use anyhow::{Context, anyhow, bail};
use futures::{SinkExt, StreamExt};
use glint_wire::pb::{self, subscriber_frame, subscriber_request};
use tokio_util::codec::Framed;

use crate::codec::{SubscriberClientCodec, refusal_name};
use crate::tls::{self, ClientTls};

pub(crate) mod exec;
pub(crate) mod feed;
pub(crate) mod listen;

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

/// Reads a listener's state file: the last sequence number handled (0 when the file does not exist).
pub(crate) fn read_state(path: &Path) -> anyhow::Result<u64> {
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
pub(crate) fn write_state(path: &Path, seq: u64) -> anyhow::Result<()> {
    let tmp = path.with_extension("tmp");
    let mut f = std::fs::File::create(&tmp).with_context(|| format!("cannot write {}", tmp.display()))?;
    writeln!(f, "{seq}")
        .and_then(|()| f.sync_all())
        .with_context(|| format!("cannot write {}", tmp.display()))?;
    std::fs::rename(&tmp, path)
        .with_context(|| format!("cannot rename {} to {}", tmp.display(), path.display()))
}

/// What every operator command does around its one request: reads the token file, the TLS trust, and the
/// operator's name (`--operator`, else `$USER`), then sends the request `make` builds from the token and the
/// name, on a runtime of its own, and returns the alert the daemon issued.
pub(crate) fn operator_command(
    from: &str,
    token_file: &Path,
    tls_ca: Option<&Path>,
    operator: Option<String>,
    make: impl FnOnce(String, String) -> subscriber_request::Body,
) -> anyhow::Result<Vec<pb::Alert>> {
    let token = read_token(token_file)?;
    let tls = tls_ca.map(ClientTls::from_ca_file).transpose()?;
    let operator = operator
        .or_else(|| std::env::var("USER").ok())
        .unwrap_or_default();
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .context("cannot start the runtime")?;
    rt.block_on(operator_request(from, tls.as_ref(), make(token, operator)))
}

/// Alerts one operator request may bring (a withdrawal and the one issued with it, say); more is a daemon
/// gone wrong, not a reason to read on.
const MAX_REPLY_ALERTS: usize = 16;

/// Sends one operator request (a withdrawal, a test alert) to a daemon's subscriber port and returns the
/// alerts the daemon issued for it, the one asked for first (a withdrawn flash's assessment is withdrawn
/// with it); a refusal or no reply within 30 s is an error naming the daemon.
pub(crate) async fn operator_request(
    addr: &str,
    tls: Option<&ClientTls>,
    body: subscriber_request::Body,
) -> anyhow::Result<Vec<pb::Alert>> {
    let io = tls::connect(addr, tls).await?;
    let mut framed = Framed::new(
        io,
        SubscriberClientCodec::new(glint_wire::DEFAULT_MAX_FRAME_BYTES.max(64 << 20)),
    );
    framed.send(pb::SubscriberRequest { body: Some(body) }).await?;
    let reply = tokio::time::timeout(Duration::from_secs(30), framed.next())
        .await
        .map_err(|_| anyhow!("no reply from {addr} within 30 s"))?
        .ok_or_else(|| anyhow!("{addr} closed the connection without a reply"))??;
    match reply.body {
        Some(subscriber_frame::Body::Alert(a)) => {
            let mut alerts = vec![a];
            // The daemon closes the connection after the last alert; a daemon that does not is not waited for
            // long.
            while alerts.len() < MAX_REPLY_ALERTS {
                match tokio::time::timeout(Duration::from_secs(5), framed.next()).await {
                    Ok(Some(Ok(pb::SubscriberFrame {
                        body: Some(subscriber_frame::Body::Alert(a)),
                    }))) => alerts.push(a),
                    _ => break,
                }
            }
            Ok(alerts)
        }
        Some(subscriber_frame::Body::Refusal(r)) => {
            Err(anyhow!("{addr} refused: {} ({})", refusal_name(r.code), r.detail))
        }
        _ => Err(anyhow!("{addr} sent an unexpected reply")),
    }
}
