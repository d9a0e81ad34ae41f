//! The subscriber listener: receiving telescopes and people connect, send one `Subscribe` (or an operator's
//! `WithdrawRequest`), and get a replay from the journal followed by live alerts and heartbeats. Each
//! connection is a [`Sink`] driven by [`drive`] with its own cursor into the desk: it waits on a watch of
//! the newest sequence number, never on a queue, and is dropped when no alert could be written to its
//! socket for `unwritable_timeout` (time without progress), after a `SLOW_CONSUMER` refusal saying where
//! to resume.

use std::net::SocketAddr;
use std::sync::Arc;
use std::sync::atomic::Ordering;
use std::time::Duration;

use futures::stream::{SplitSink, SplitStream};
use futures::{SinkExt, StreamExt};
use glint_wire::pb::{self, subscriber_frame, subscriber_request};
use tokio::net::TcpListener;
use tokio::sync::Semaphore;
use tokio_rustls::TlsAcceptor;
use tokio_util::codec::Framed;
use tokio_util::sync::CancellationToken;
use tokio_util::task::TaskTracker;
use tracing::Instrument;

use crate::codec::{SubscriberServerCodec, subscriber_refusal};
use crate::config::{SubscribersConfig, token_matches};
use crate::desk::Desk;
use crate::metrics::{Metrics, Stage, Watermarks};
use crate::sinks::{Idle, Overflow, Sink, SinkError, drive};
use crate::timefmt::now_unix_ns;
use crate::tls::{self, BoxIo};

/// How long a dropped subscriber's goodbye may wait for its reader to wake up: a client that resumes reading
/// within this time gets every alert queued for it and then the reason it was dropped.
const GOODBYE_GRACE: Duration = Duration::from_secs(30);
/// Kernel send buffer per subscriber socket (the kernel doubles it for bookkeeping).
const SEND_BUFFER_BYTES: usize = 32 * 1024;
/// How long a new connection may take to send its request.
const REQUEST_TIMEOUT: Duration = Duration::from_secs(10);

/// What every subscriber connection shares.
#[derive(Debug)]
pub(crate) struct Hub {
    /// Source of alerts.
    pub(crate) desk: Arc<Desk>,
    /// Tokens, heartbeat, timeouts, limits.
    pub(crate) cfg: SubscribersConfig,
    /// Frame size limit.
    pub(crate) max_frame: usize,
    /// Engine event times for heartbeats.
    pub(crate) watermarks: Arc<Watermarks>,
    /// Latency histograms and counters.
    pub(crate) metrics: Arc<Metrics>,
    /// Cancelled when the daemon says goodbye: each subscriber sends what is left, a closing heartbeat, and
    /// ends.
    pub(crate) closing: CancellationToken,
}

/// Accepts subscribers until `stop` is cancelled; every connection task is spawned on `tracker`.
pub(crate) async fn serve(
    listener: TcpListener,
    tls: Option<TlsAcceptor>,
    hub: Arc<Hub>,
    tracker: TaskTracker,
    stop: CancellationToken,
) {
    let permits = Arc::new(Semaphore::new(hub.cfg.max_connections.get()));
    let mut backoff = Duration::from_millis(10);
    loop {
        let Some((tcp, peer)) = crate::net::accept(&listener, &stop, &mut backoff, "subscribers").await
        else {
            return;
        };
        // A bounded send buffer bounds what one subscriber holds in the kernel, and makes "no progress" mean
        // the reader stopped: with the multi-megabyte buffers loopback grows to, the kernel wakes a blocked
        // writer only after a third of the buffer has drained, minutes for a slow but steady reader.
        if let Err(e) = socket2::SockRef::from(&tcp).set_send_buffer_size(SEND_BUFFER_BYTES) {
            tracing::debug!(%peer, "cannot bound the send buffer: {e}");
        }
        let permit = permits.clone().try_acquire_owned().ok();
        let hub = hub.clone();
        let tls = tls.clone();
        let span = tracing::info_span!("subscriber", %peer);
        tracker.spawn(
            async move {
                let io = match tls::accept(tcp, tls.as_ref()).await {
                    Ok(io) => io,
                    Err(e) => {
                        tracing::warn!("connection failed: {e:#}");
                        return;
                    }
                };
                let mut framed = Framed::new(io, SubscriberServerCodec::new(hub.max_frame));
                let Some(_permit) = permit else {
                    let detail = format!(
                        "subscriber limit of {} connections reached",
                        hub.cfg.max_connections
                    );
                    tracing::warn!("refused: {detail}");
                    let _ = framed
                        .send(subscriber_refusal(pb::RefusalCode::BadRequest, detail))
                        .await;
                    return;
                };
                if let Err(e) = handle(framed, peer, &hub).await {
                    tracing::info!("closed: {e:#}");
                }
            }
            .instrument(span),
        );
    }
}

type Conn = Framed<BoxIo, SubscriberServerCodec>;

async fn refuse(framed: &mut Conn, code: pb::RefusalCode, detail: String) -> anyhow::Result<()> {
    tracing::warn!(code = code.as_str_name(), "refused: {detail}");
    let _ = tokio::time::timeout(REQUEST_TIMEOUT, framed.send(subscriber_refusal(code, detail))).await;
    Ok(())
}

async fn handle(mut framed: Conn, peer: SocketAddr, hub: &Hub) -> anyhow::Result<()> {
    let req = match tokio::time::timeout(REQUEST_TIMEOUT, framed.next()).await {
        Err(_) => {
            let detail = format!("no request within {} s", REQUEST_TIMEOUT.as_secs());
            return refuse(&mut framed, pb::RefusalCode::ProtocolViolation, detail).await;
        }
        Ok(None) => return Ok(()),
        Ok(Some(Err(e))) => {
            let code = e.refusal_code().unwrap_or(pb::RefusalCode::MalformedFrame);
            return refuse(&mut framed, code, e.to_string()).await;
        }
        Ok(Some(Ok(req))) => req,
    };
    match req.body {
        Some(subscriber_request::Body::Subscribe(s)) => subscribe(framed, peer, s, hub).await,
        Some(subscriber_request::Body::Withdraw(w)) => withdraw(framed, w, hub).await,
        Some(subscriber_request::Body::TestAlert(t)) => test_alert(framed, t, hub).await,
        None => {
            refuse(
                &mut framed,
                pb::RefusalCode::ProtocolViolation,
                "request has no body".into(),
            )
            .await
        }
    }
}

async fn withdraw(mut framed: Conn, w: pb::WithdrawRequest, hub: &Hub) -> anyhow::Result<()> {
    let allowed = hub
        .cfg
        .operator_token
        .as_ref()
        .is_some_and(|t| token_matches(&w.token, t));
    if !allowed {
        return refuse(
            &mut framed,
            pb::RefusalCode::BadToken,
            "withdrawals need the operator token".into(),
        )
        .await;
    }
    let desk = hub.desk.clone();
    let (id, reason, operator) = (w.alert_id.clone(), w.reason.clone(), w.operator.clone());
    let result = tokio::task::spawn_blocking(move || desk.withdraw(&id, &reason, &operator)).await?;
    match result {
        Ok(alert) => {
            let frame = pb::SubscriberFrame {
                body: Some(subscriber_frame::Body::Alert((*alert).clone())),
            };
            tokio::time::timeout(REQUEST_TIMEOUT, framed.send(frame)).await??;
            Ok(())
        }
        Err(e) => refuse(&mut framed, pb::RefusalCode::BadRequest, e.to_string()).await,
    }
}

/// An operator's TEST alert: issued through the desk (journalled, then every sink sees it) and sent back.
async fn test_alert(mut framed: Conn, t: pb::TestAlertRequest, hub: &Hub) -> anyhow::Result<()> {
    let allowed = hub
        .cfg
        .operator_token
        .as_ref()
        .is_some_and(|tok| token_matches(&t.token, tok));
    if !allowed {
        return refuse(
            &mut framed,
            pb::RefusalCode::BadToken,
            "test alerts need the operator token".into(),
        )
        .await;
    }
    let desk = hub.desk.clone();
    let result = tokio::task::spawn_blocking(move || desk.issue_test(&t.operator, &t.note)).await?;
    match result {
        Ok(alert) => {
            let frame = pb::SubscriberFrame {
                body: Some(subscriber_frame::Body::Alert((*alert).clone())),
            };
            tokio::time::timeout(REQUEST_TIMEOUT, framed.send(frame)).await??;
            Ok(())
        }
        Err(e) => refuse(&mut framed, pb::RefusalCode::BadRequest, e.to_string()).await,
    }
}

/// What a subscriber asked for.
struct Filter {
    kinds: Vec<i32>,
    min_sigma: f64,
}

impl Filter {
    /// Kinds filter, then the significance cut (withdrawals always pass it, so a retraction is never missed).
    fn wants(&self, a: &pb::Alert) -> bool {
        let kind_ok = self.kinds.is_empty() || self.kinds.contains(&a.kind);
        let sigma_ok = self.min_sigma <= 0.0
            || a.kind == pb::AlertKind::Withdrawal as i32
            || a.trigger.as_ref().is_some_and(|t| t.sigma >= self.min_sigma);
        kind_ok && sigma_ok
    }
}

async fn subscribe(mut framed: Conn, peer: SocketAddr, s: pb::Subscribe, hub: &Hub) -> anyhow::Result<()> {
    // Every token is compared, so the time taken does not tell which one came close.
    let mut ok = hub
        .cfg
        .tokens
        .iter()
        .fold(false, |acc, t| acc | token_matches(&s.token, t));
    ok |= hub
        .cfg
        .operator_token
        .as_ref()
        .is_some_and(|t| token_matches(&s.token, t));
    if !ok {
        return refuse(
            &mut framed,
            pb::RefusalCode::BadToken,
            "subscriber token not accepted".into(),
        )
        .await;
    }
    if s.schema_version > glint_wire::SCHEMA_VERSION {
        let detail = format!(
            "schema version {} is not supported (this daemon writes version {})",
            s.schema_version,
            glint_wire::SCHEMA_VERSION
        );
        return refuse(&mut framed, pb::RefusalCode::SchemaUnsupported, detail).await;
    }
    let last = hub.desk.last_seq();
    if s.resume_after > last {
        let detail = format!(
            "resume_after {} is newer than the newest alert in the journal ({last})",
            s.resume_after
        );
        return refuse(&mut framed, pb::RefusalCode::BadRequest, detail).await;
    }
    if !s.min_sigma.is_finite() || s.min_sigma < 0.0 {
        return refuse(
            &mut framed,
            pb::RefusalCode::BadRequest,
            format!("min_sigma {} must be >= 0", s.min_sigma),
        )
        .await;
    }
    let welcome = pb::Welcome {
        schema_version: glint_wire::SCHEMA_VERSION,
        server: format!("glint {}", env!("CARGO_PKG_VERSION")),
        max_frame_bytes: u32::try_from(hub.max_frame).unwrap_or(u32::MAX),
        last_seq: last,
    };
    let t = hub.cfg.unwritable_timeout;
    tokio::time::timeout(
        t,
        framed.send(pb::SubscriberFrame {
            body: Some(subscriber_frame::Body::Welcome(welcome)),
        }),
    )
    .await
    .map_err(|_| anyhow::anyhow!("welcome not written within {} s", t.as_secs_f64()))??;
    let client = if s.client.is_empty() {
        peer.to_string()
    } else {
        s.client.clone()
    };
    let mut cursor = if s.resume_after > 0 {
        s.resume_after
    } else if s.replay_all {
        0
    } else {
        last
    };
    tracing::info!(client = %client, resume_after = cursor, kinds = ?s.kinds, min_sigma = s.min_sigma, "subscribed");
    hub.metrics.subscribers.fetch_add(1, Ordering::Relaxed);
    let filter = Filter {
        kinds: s.kinds.clone(),
        min_sigma: s.min_sigma,
    };
    let (tx, rx) = framed.split();
    let mut sink = SocketSink {
        hub,
        client: client.clone(),
        filter,
        tx,
        rx,
        live_from: last,
        next_beat: tokio::time::Instant::now() + hub.cfg.heartbeat,
        unflushed: Vec::new(),
    };
    let result = drive(&mut sink, &hub.desk, &mut cursor, &hub.closing).await;
    hub.metrics.subscribers.fetch_sub(1, Ordering::Relaxed);
    match &result {
        Err(e) => tracing::info!(client = %client, last_seq_sent = cursor, "subscriber gone: {e:#}"),
        Ok(()) => tracing::info!(client = %client, last_seq_sent = cursor, "subscriber closed"),
    }
    result.map_err(Into::into)
}

/// A subscriber's connection as a [`Sink`]: alerts are fed into the socket as the driver hands them over,
/// heartbeats go out while it is caught up, and a subscriber that cannot take an alert for
/// `unwritable_timeout` gets a `SLOW_CONSUMER` refusal naming where to resume, then is dropped.
struct SocketSink<'h> {
    hub: &'h Hub,
    client: String,
    filter: Filter,
    tx: SplitSink<Conn, pb::SubscriberFrame>,
    rx: SplitStream<Conn>,
    /// Alerts up to here were journalled before the subscriber connected: sent as replayed.
    live_from: u64,
    next_beat: tokio::time::Instant,
    /// Receipt and journal stamps of live alerts fed since the last flush, recorded once they are on the
    /// socket.
    unflushed: Vec<(i64, i64, bool)>,
}

impl SocketSink<'_> {
    async fn heartbeat(&mut self, closing: bool) -> anyhow::Result<()> {
        let (instruments, watermark_gps_ns) = self.hub.watermarks.snapshot();
        let hb = pb::Heartbeat {
            unix_ns: now_unix_ns(),
            last_seq: self.hub.desk.last_seq(),
            instruments,
            watermark_gps_ns,
            closing,
        };
        self.tx
            .send(pb::SubscriberFrame {
                body: Some(subscriber_frame::Body::Heartbeat(hb)),
            })
            .await?;
        self.next_beat = tokio::time::Instant::now() + self.hub.cfg.heartbeat;
        Ok(())
    }
}

impl Sink for SocketSink<'_> {
    fn name(&self) -> &str {
        &self.client
    }

    fn overflow(&self) -> Overflow {
        Overflow::DropWhenStalled(self.hub.cfg.unwritable_timeout)
    }

    fn wants(&self, alert: &pb::Alert) -> bool {
        self.filter.wants(alert)
    }

    async fn deliver(&mut self, alert: &pb::Alert) -> anyhow::Result<()> {
        let mut a = alert.clone();
        a.replayed = a.seq <= self.live_from;
        if let Some(l) = a.latency.as_mut() {
            l.sent_unix_ns = now_unix_ns();
            if !a.replayed {
                self.unflushed.push((
                    l.received_unix_ns,
                    l.journaled_unix_ns,
                    a.kind == pb::AlertKind::Flash as i32,
                ));
            }
        }
        self.tx
            .feed(pb::SubscriberFrame {
                body: Some(subscriber_frame::Body::Alert(a)),
            })
            .await?;
        Ok(())
    }

    async fn commit(&mut self, _seq: u64) -> anyhow::Result<()> {
        self.tx.flush().await?;
        let done = now_unix_ns();
        for (received, journaled, flash) in self.unflushed.drain(..) {
            self.hub.metrics.record(Stage::Send, journaled, done);
            self.hub.metrics.record(Stage::EndToEnd, received, done);
            if flash {
                self.hub.metrics.record(Stage::FlashEndToEnd, received, done);
            }
        }
        self.next_beat = tokio::time::Instant::now() + self.hub.cfg.heartbeat;
        Ok(())
    }

    async fn idle(&mut self) -> Result<Idle, SinkError> {
        tokio::select! {
            () = tokio::time::sleep_until(self.next_beat) => {
                let stall = self.hub.cfg.unwritable_timeout;
                match tokio::time::timeout(stall, self.heartbeat(false)).await {
                    Ok(r) => r.map(|()| Idle::Ticked).map_err(SinkError::Peer),
                    Err(_) => Err(SinkError::Stalled {
                        stalled: stall,
                        resume_after: 0,
                    }),
                }
            }
            incoming = self.rx.next() => match incoming {
                // A subscriber sends one request; anything more is ignored, the end of its stream ends ours.
                Some(Ok(_)) => Ok(Idle::Ticked),
                Some(Err(e)) => Err(SinkError::Peer(anyhow::anyhow!("reading from subscriber: {e}"))),
                None => Ok(Idle::PeerClosed),
            },
        }
    }

    async fn stalled(&mut self, err: &SinkError) {
        self.hub
            .metrics
            .subscribers_dropped
            .fetch_add(1, Ordering::Relaxed);
        let SinkError::Stalled { resume_after, .. } = err else {
            return;
        };
        tracing::warn!(client = %self.client, last_seq_sent = resume_after, "dropping subscriber: {err}");
        // The refusal queues behind whatever the socket still holds, so a reader that wakes up gets every
        // alert fed so far and then the reason, in order; it waits `GOODBYE_GRACE` at most.
        let goodbye = pb::SubscriberFrame {
            body: Some(subscriber_frame::Body::Refusal(pb::Refusal {
                code: pb::RefusalCode::SlowConsumer as i32,
                detail: format!("{err}; reconnect with resume_after {resume_after}"),
                seq: *resume_after,
            })),
        };
        let say = async {
            let _ = self.tx.send(goodbye).await;
            let _ = self.tx.close().await;
        };
        tokio::select! {
            _ = tokio::time::timeout(GOODBYE_GRACE, say) => {}
            () = self.hub.closing.cancelled() => {}
        }
    }

    async fn close(&mut self) -> anyhow::Result<()> {
        let stall = self.hub.cfg.unwritable_timeout;
        tokio::time::timeout(stall, self.heartbeat(true))
            .await
            .map_err(|_| {
                anyhow::anyhow!(
                    "closing heartbeat not written within {:.1} s",
                    stall.as_secs_f64()
                )
            })??;
        let _ = tokio::time::timeout(stall, self.tx.close()).await;
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn filter_by_kind_and_sigma_lets_withdrawals_through() {
        let alert = |kind: pb::AlertKind, sigma: f64| pb::Alert {
            kind: kind as i32,
            trigger: Some(pb::Trigger {
                sigma,
                ..Default::default()
            }),
            ..Default::default()
        };
        let f = Filter {
            kinds: vec![pb::AlertKind::Flash as i32, pb::AlertKind::Withdrawal as i32],
            min_sigma: 5.0,
        };
        assert!(f.wants(&alert(pb::AlertKind::Flash, 5.0)));
        assert!(!f.wants(&alert(pb::AlertKind::Flash, 4.9)));
        assert!(!f.wants(&alert(pb::AlertKind::Assessment, 9.0)));
        assert!(f.wants(&alert(pb::AlertKind::Withdrawal, 1.0)));
        let all = Filter {
            kinds: vec![],
            min_sigma: 0.0,
        };
        assert!(all.wants(&pb::Alert::default()));
    }
}
