//! `glint listen`: a subscriber on the command line. Connects to the daemon's subscriber port, prints each
//! alert (a readable summary, or one JSON line with `--json`), optionally runs a command per alert with the
//! JSON on its stdin, and reconnects with backoff, resuming after the last sequence number it saw (kept in
//! `--state-file` across runs), so every alert is handled once and in order.

use std::time::Duration;

use anyhow::anyhow;
use futures::{SinkExt, StreamExt};
use glint_wire::pb::{self, subscriber_frame, subscriber_request};
use tokio_util::codec::Framed;

use crate::codec::{SubscriberClientCodec, refusal_name};
use crate::tls::{self, ClientTls};

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

/// Frames other than alerts that a caller may want to see.
#[derive(Debug, Clone, Copy)]
pub(crate) enum Event<'a> {
    /// The daemon accepted the subscription (once per connection).
    Welcomed,
    /// A heartbeat, with each instrument's watermark.
    Heartbeat(&'a pb::Heartbeat),
}

/// What the caller does with the other frames; an error ends the session as a refusal does.
pub(crate) type OnEvent<'a> = dyn FnMut(Event<'_>) -> anyhow::Result<()> + Send + 'a;

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
    listen_loop_with(opts, reconnect, on_alert, &mut |_| Ok(())).await
}

/// [`listen_loop`], also handing welcomes and heartbeats to `on_event`.
pub(crate) async fn listen_loop_with(
    opts: &ListenOptions,
    reconnect: bool,
    on_alert: &mut OnAlert<'_>,
    on_event: &mut OnEvent<'_>,
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
            on_event,
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
    on_event: &mut OnEvent<'_>,
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
                on_event(Event::Welcomed).map_err(SessionError::Refused)?;
            }
            // Dropped for reading too slowly: every alert queued before the refusal has been read, so
            // resuming after the last one seen loses nothing.
            Some(subscriber_frame::Body::Refusal(r)) if r.code == pb::RefusalCode::SlowConsumer as i32 => {
                return Err(SessionError::Lost(
                    anyhow!("{} dropped this subscriber: {}", opts.addr, r.detail),
                    welcomed,
                ));
            }
            Some(subscriber_frame::Body::Refusal(r)) => {
                return Err(SessionError::Refused(anyhow!(
                    "{} refused: {} ({})",
                    opts.addr,
                    refusal_name(r.code),
                    r.detail
                )));
            }
            Some(subscriber_frame::Body::Heartbeat(h)) => {
                on_event(Event::Heartbeat(&h)).map_err(SessionError::Refused)?;
                if h.closing {
                    return Ok(SessionEnd::Closed);
                }
            }
            Some(subscriber_frame::Body::Gap(g)) => {
                // The daemon cannot deliver these; say so loudly and move on rather than wait for them.
                eprintln!(
                    "warning: alerts {}-{} are not available from {}: {}",
                    g.from_seq, g.to_seq, opts.addr, g.reason
                );
                *last_seen = (*last_seen).max(g.to_seq);
            }
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
