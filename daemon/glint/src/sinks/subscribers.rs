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

use crate::codec::{
    INITIAL_READ_BUFFER, PRE_AUTH_MAX_FRAME, Refusal, SubscriberServerCodec, subscriber_refusal,
};
use crate::config::{SubscribersConfig, token_matches};
use crate::desk::Desk;
use crate::logging::untrusted;
use crate::metrics::{Metrics, Stage, Watermarks};
use crate::net::{Gate, Ticket};
use crate::sinks::{Idle, Overflow, Sink, SinkError, drive};
use crate::timefmt::now_unix_ns;
use crate::tls::{self, BoxIo};

/// How long a reply to an authenticated request may take to be written.
const REQUEST_TIMEOUT: Duration = Duration::from_secs(10);
/// How long a refusal to an unauthenticated peer may take to be written: it holds a slot of the pool.
const PRE_AUTH_WRITE_TIMEOUT: Duration = Duration::from_secs(1);
/// How long a dropped subscriber's goodbye may wait for its reader to wake up: a client that resumes reading
/// within this time gets every alert queued for it and then the reason it was dropped.
const GOODBYE_GRACE: Duration = Duration::from_secs(30);
/// Kernel send buffer per subscriber socket (the kernel doubles it for bookkeeping).
const SEND_BUFFER_BYTES: usize = 32 * 1024;

/// What every subscriber connection shares.
#[derive(Debug)]
pub(crate) struct Hub {
    /// The pool of connections that have not authenticated yet, and the refusal log.
    pub(crate) gate: Arc<Gate>,
    /// Source of alerts.
    pub(crate) desk: Arc<Desk>,
    /// Tokens, heartbeat, timeouts, limits, as at start.
    pub(crate) cfg: SubscribersConfig,
    /// The tokens in force: those of `cfg` until a reload (SIGHUP) replaces them. Requests are checked
    /// against this; connections already accepted are not asked again.
    pub(crate) tokens: std::sync::RwLock<Arc<SubscribersConfig>>,
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

impl Hub {
    /// The subscriber settings in force (tokens as last reloaded).
    pub(crate) fn current(&self) -> Arc<SubscribersConfig> {
        self.tokens
            .read()
            .unwrap_or_else(std::sync::PoisonError::into_inner)
            .clone()
    }

    /// Replaces the subscriber and operator tokens (a reload); returns what changed, counts only (tokens
    /// are secrets).
    pub(crate) fn reload_tokens(&self, new: &SubscribersConfig) -> Vec<String> {
        let mut live = self
            .tokens
            .write()
            .unwrap_or_else(std::sync::PoisonError::into_inner);
        let mut notes = Vec::new();
        let same = |a: &[crate::config::Secret], b: &[crate::config::Secret]| {
            a.len() == b.len() && a.iter().zip(b).all(|(x, y)| x.expose() == y.expose())
        };
        if !same(&live.tokens, &new.tokens) {
            notes.push(format!(
                "subscriber tokens reloaded ({} before, {} now)",
                live.tokens.len(),
                new.tokens.len()
            ));
        }
        if live.operator_token.as_ref().map(|t| t.expose()) != new.operator_token.as_ref().map(|t| t.expose())
        {
            notes.push("operator token reloaded".to_string());
        }
        let mut next = (**live).clone();
        next.tokens = new.tokens.clone();
        next.operator_token = new.operator_token.clone();
        *live = Arc::new(next);
        notes
    }
}

/// Accepts subscribers until `stop` is cancelled; every connection task is spawned on `tracker`. Until its
/// request is accepted a connection sits in the gate's small pool of unauthenticated ones (short deadline,
/// oldest evicted first); authenticated subscribers are counted against `max_connections` only.
pub(crate) async fn serve(
    listener: TcpListener,
    tls: Option<TlsAcceptor>,
    hub: Arc<Hub>,
    tracker: TaskTracker,
    stop: CancellationToken,
) {
    tokio::spawn(hub.gate.clone().summaries(stop.clone()));
    let permits = Arc::new(Semaphore::new(hub.cfg.max_connections.get()));
    let mut backoff = Duration::from_millis(10);
    loop {
        let Some((tcp, peer)) = crate::net::accept(&listener, &stop, &mut backoff, "subscribers").await
        else {
            return;
        };
        if let Err(e) = crate::net::set_keepalive(&tcp, hub.cfg.keepalive) {
            tracing::debug!(%peer, "cannot set TCP keepalive: {e}");
        }
        // A bounded send buffer bounds what one subscriber holds in the kernel, and makes "no progress" mean
        // the reader stopped: with the multi-megabyte buffers loopback grows to, the kernel wakes a blocked
        // writer only after a third of the buffer has drained, minutes for a slow but steady reader.
        if let Err(e) = socket2::SockRef::from(&tcp).set_send_buffer_size(SEND_BUFFER_BYTES) {
            tracing::debug!(%peer, "cannot bound the send buffer: {e}");
        }
        let ticket = hub.gate.admit(peer);
        let hub = hub.clone();
        let tls = tls.clone();
        let permits = permits.clone();
        let stop = stop.clone();
        let span = tracing::info_span!("subscriber", %peer);
        tracker.spawn(
            async move {
                let Some((framed, req)) = first_request(tcp, peer, &ticket, tls, &hub, &stop).await else {
                    return;
                };
                if let Err(e) = handle(framed, peer, ticket, req, &permits, &hub).await {
                    tracing::info!("closed: {e:#}");
                }
            }
            .instrument(span),
        );
        // Let the new task read its request before the next accept (see ingest's accept loop).
        tokio::task::yield_now().await;
    }
}

type Conn = Framed<BoxIo, SubscriberServerCodec>;

/// Refuses a peer before it is authenticated: counted and summarised by the gate, answered within a short
/// write deadline.
async fn refuse_unauthenticated(
    framed: &mut Conn,
    peer: SocketAddr,
    hub: &Hub,
    reason: &'static str,
    r: Refusal,
) {
    hub.gate.refusals.note(peer, reason, &r.detail);
    let _ = tokio::time::timeout(PRE_AUTH_WRITE_TIMEOUT, async {
        let _ = framed.send(subscriber_refusal(r.code, r.detail)).await;
        let _ = framed.close().await;
    })
    .await;
}

/// Refuses an authenticated subscriber or operator.
async fn refuse(framed: &mut Conn, r: Refusal) -> anyhow::Result<()> {
    tracing::warn!(code = r.code.as_str_name(), "refused: {}", r.detail);
    let _ = tokio::time::timeout(REQUEST_TIMEOUT, framed.send(subscriber_refusal(r.code, r.detail))).await;
    Ok(())
}

/// The TLS handshake and the one request, within the gate's deadline, in a frame of at most
/// `PRE_AUTH_MAX_FRAME` bytes; given up at once when the gate evicts the connection.
async fn first_request(
    tcp: tokio::net::TcpStream,
    peer: SocketAddr,
    ticket: &Ticket,
    tls: Option<TlsAcceptor>,
    hub: &Hub,
    stop: &CancellationToken,
) -> Option<(Conn, pb::SubscriberRequest)> {
    let deadline = tokio::time::Instant::now() + ticket.time_left();
    let io = tokio::select! {
        () = stop.cancelled() => return None,
        () = ticket.evicted() => return None,
        () = tokio::time::sleep_until(deadline) => {
            hub.gate.refusals.note(peer, "no TLS handshake in time", "the TLS handshake did not finish within the authentication deadline");
            return None;
        }
        io = tls::accept(tcp, tls.as_ref()) => match io {
            Ok(io) => io,
            Err(tls::AcceptError::PlainOnTls(tcp)) => {
                // Answered in the plain protocol the client speaks, so it says why instead of failing to read.
                let mut plain = Framed::new(Box::new(tcp) as tls::BoxIo, SubscriberServerCodec::new(PRE_AUTH_MAX_FRAME));
                let r = Refusal::new(pb::RefusalCode::ProtocolViolation, tls::PLAIN_ON_TLS, 0);
                refuse_unauthenticated(&mut plain, peer, hub, "plain (non-TLS) client on the TLS port", r).await;
                return None;
            }
            Err(tls::AcceptError::Failed(e)) => {
                hub.gate.refusals.note(peer, "TLS handshake failed", &untrusted(&format!("{e:#}")));
                return None;
            }
        },
    };
    let mut framed = Framed::with_capacity(
        io,
        SubscriberServerCodec::new(PRE_AUTH_MAX_FRAME),
        INITIAL_READ_BUFFER,
    );
    let first = tokio::select! {
        () = stop.cancelled() => return None,
        () = ticket.evicted() => return None,
        () = tokio::time::sleep_until(deadline) => {
            let detail = format!("no request within {:.1} s", hub.gate.limits().auth_timeout.as_secs_f64());
            let r = Refusal::new(pb::RefusalCode::ProtocolViolation, detail, 0);
            refuse_unauthenticated(&mut framed, peer, hub, "no request in time", r).await;
            return None;
        }
        f = framed.next() => f,
    };
    match first {
        None => None,
        Some(Err(e)) => {
            let code = e.refusal_code().unwrap_or(pb::RefusalCode::MalformedFrame);
            let r = Refusal::new(code, untrusted(&e.to_string()), 0);
            refuse_unauthenticated(&mut framed, peer, hub, "bad request frame", r).await;
            None
        }
        Some(Ok(req)) => Some((framed, req)),
    }
}

/// A checked request.
#[derive(Debug)]
pub(crate) enum Request {
    /// Subscribe with this filter.
    Subscribe(pb::Subscribe, Filter),
    /// Withdraw an alert (the operator token matched).
    Withdraw(pb::WithdrawRequest),
    /// Issue a TEST alert (the operator token matched).
    TestAlert(pb::TestAlertRequest),
}

/// Checks a request without I/O: the token first (every configured token is compared, so the time taken
/// does not tell which one came close), then the request itself. `last_seq` is the journal's newest alert.
pub(crate) fn check_request(
    req: pb::SubscriberRequest,
    cfg: &SubscribersConfig,
    last_seq: u64,
) -> Result<Request, Refusal> {
    let operator = |token: &str| {
        cfg.operator_token
            .as_ref()
            .is_some_and(|t| token_matches(token, t))
    };
    match req.body {
        Some(subscriber_request::Body::Subscribe(s)) => {
            let ok = cfg
                .tokens
                .iter()
                .fold(false, |acc, t| acc | token_matches(&s.token, t))
                | operator(&s.token);
            if !ok {
                return Err(Refusal::new(
                    pb::RefusalCode::BadToken,
                    "subscriber token not accepted",
                    0,
                ));
            }
            let filter = check_subscribe(&s, last_seq)?;
            Ok(Request::Subscribe(s, filter))
        }
        Some(subscriber_request::Body::Withdraw(w)) => {
            if !operator(&w.token) {
                return Err(Refusal::new(
                    pb::RefusalCode::BadToken,
                    "withdrawals need the operator token",
                    0,
                ));
            }
            Ok(Request::Withdraw(w))
        }
        Some(subscriber_request::Body::TestAlert(t)) => {
            if !operator(&t.token) {
                return Err(Refusal::new(
                    pb::RefusalCode::BadToken,
                    "test alerts need the operator token",
                    0,
                ));
            }
            Ok(Request::TestAlert(t))
        }
        None => Err(Refusal::new(
            pb::RefusalCode::ProtocolViolation,
            "request has no body",
            0,
        )),
    }
}

/// Checks an authenticated Subscribe: schema, resume point, significance cut, and that every kind in the
/// filter is one this daemon sends (an unknown kind would silently match nothing).
fn check_subscribe(s: &pb::Subscribe, last: u64) -> Result<Filter, Refusal> {
    let bad = |detail: String| Refusal::new(pb::RefusalCode::BadRequest, detail, 0);
    if s.schema_version > glint_wire::SCHEMA_VERSION {
        return Err(Refusal::new(
            pb::RefusalCode::SchemaUnsupported,
            format!(
                "schema version {} is not supported (this daemon writes version {})",
                s.schema_version,
                glint_wire::SCHEMA_VERSION
            ),
            0,
        ));
    }
    if s.resume_after > last {
        return Err(bad(format!(
            "resume_after {} is newer than the newest alert in the journal ({last})",
            s.resume_after
        )));
    }
    if !s.min_sigma.is_finite() || s.min_sigma < 0.0 {
        return Err(bad(format!("min_sigma {} must be >= 0", s.min_sigma)));
    }
    let mut kinds = Vec::new();
    for &k in &s.kinds {
        match pb::AlertKind::try_from(k) {
            Ok(pb::AlertKind::Unspecified) | Err(_) => {
                let known: Vec<&str> = [
                    pb::AlertKind::Flash,
                    pb::AlertKind::Assessment,
                    pb::AlertKind::Withdrawal,
                    pb::AlertKind::Heartbeat,
                    pb::AlertKind::Test,
                ]
                .iter()
                .map(|k| k.as_str_name())
                .collect();
                return Err(bad(format!(
                    "unknown alert kind {k} in the filter (known: {})",
                    known.join(", ")
                )));
            }
            Ok(_) => {
                if !kinds.contains(&k) {
                    kinds.push(k);
                }
            }
        }
    }
    Ok(Filter {
        kinds,
        min_sigma: s.min_sigma,
    })
}

async fn handle(
    mut framed: Conn,
    peer: SocketAddr,
    ticket: Ticket,
    req: pb::SubscriberRequest,
    permits: &Arc<Semaphore>,
    hub: &Hub,
) -> anyhow::Result<()> {
    let last = hub.desk.last_seq();
    let req = match check_request(req, &hub.current(), last) {
        Ok(r) => r,
        Err(r) => {
            let reason = if r.code == pb::RefusalCode::BadToken {
                "token not accepted"
            } else {
                "request refused"
            };
            refuse_unauthenticated(&mut framed, peer, hub, reason, r).await;
            return Ok(());
        }
    };
    ticket.authenticated();
    framed.codec_mut().set_max_frame(hub.max_frame);
    match req {
        Request::Subscribe(s, filter) => {
            let Ok(_permit) = permits.clone().try_acquire_owned() else {
                let detail = format!(
                    "subscriber limit of {} connections reached",
                    hub.cfg.max_connections
                );
                return refuse(&mut framed, Refusal::new(pb::RefusalCode::BadRequest, detail, 0)).await;
            };
            subscribe(framed, peer, s, filter, last, hub).await
        }
        Request::Withdraw(w) => withdraw(framed, w, hub).await,
        Request::TestAlert(t) => test_alert(framed, t, hub).await,
    }
}

/// An operator's TEST alert: issued through the desk (journalled, then every sink sees it) and sent back.
async fn test_alert(mut framed: Conn, t: pb::TestAlertRequest, hub: &Hub) -> anyhow::Result<()> {
    let desk = hub.desk.clone();
    let result = tokio::task::spawn_blocking(move || desk.issue_test(&t.operator, &t.note)).await?;
    match result {
        Ok(alert) => {
            let frame = pb::SubscriberFrame {
                body: Some(subscriber_frame::Body::Alert((*alert).clone())),
            };
            tokio::time::timeout(REQUEST_TIMEOUT, framed.send(frame)).await??;
            // Closing says that was all (the operator's client reads until then).
            let _ = tokio::time::timeout(REQUEST_TIMEOUT, framed.close()).await;
            Ok(())
        }
        Err(e) => {
            let detail = untrusted(&e.to_string());
            refuse(&mut framed, Refusal::new(pb::RefusalCode::BadRequest, detail, 0)).await
        }
    }
}

async fn withdraw(mut framed: Conn, w: pb::WithdrawRequest, hub: &Hub) -> anyhow::Result<()> {
    let desk = hub.desk.clone();
    let (id, reason, operator) = (w.alert_id.clone(), w.reason.clone(), w.operator.clone());
    let result = tokio::task::spawn_blocking(move || desk.withdraw(&id, &reason, &operator)).await?;
    match result {
        Ok(alerts) => {
            // The withdrawal asked for first, then those issued with it (a flash's assessment); then the
            // connection closes, which tells the operator's client that was all.
            for alert in alerts {
                let frame = pb::SubscriberFrame {
                    body: Some(subscriber_frame::Body::Alert((*alert).clone())),
                };
                tokio::time::timeout(REQUEST_TIMEOUT, framed.send(frame)).await??;
            }
            let _ = tokio::time::timeout(REQUEST_TIMEOUT, framed.close()).await;
            Ok(())
        }
        Err(e) => {
            let detail = untrusted(&e.to_string());
            refuse(&mut framed, Refusal::new(pb::RefusalCode::BadRequest, detail, 0)).await
        }
    }
}

/// What a subscriber asked for.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Filter {
    kinds: Vec<i32>,
    min_sigma: f64,
}

impl Filter {
    /// Kinds filter, then the significance cut (withdrawals always pass it, so a retraction is never missed).
    /// The cut reads the post-trials significance, the alert's own: the per-seed one (`sigma`) is 7 or more
    /// for every flash at the design false-alarm rate, so a cut on it would pass background alerts.
    fn wants(&self, a: &pb::Alert) -> bool {
        let kind_ok = self.kinds.is_empty() || self.kinds.contains(&a.kind);
        let sigma_ok = self.min_sigma <= 0.0
            || a.kind == pb::AlertKind::Withdrawal as i32
            || a.trigger
                .as_ref()
                .is_some_and(|t| t.sigma_post_trials >= self.min_sigma);
        kind_ok && sigma_ok
    }
}

async fn subscribe(
    mut framed: Conn,
    peer: SocketAddr,
    s: pb::Subscribe,
    filter: Filter,
    last: u64,
    hub: &Hub,
) -> anyhow::Result<()> {
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
        untrusted(&s.client)
    };
    let mut cursor = if s.resume_after > 0 {
        s.resume_after
    } else if s.replay_all {
        0
    } else {
        last
    };
    let kinds: Vec<&str> = filter
        .kinds
        .iter()
        .map(|&k| pb::AlertKind::try_from(k).map_or("?", |k| k.as_str_name()))
        .collect();
    tracing::info!(client = %client, resume_after = cursor, kinds = ?kinds, min_sigma = s.min_sigma, "subscribed");
    hub.metrics.subscribers.fetch_add(1, Ordering::Relaxed);
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
    unflushed: Vec<Unflushed>,
}

/// The stamps of one live alert on its way to the socket, recorded in the latency histograms once flushed.
struct Unflushed {
    received: i64,
    journaled: i64,
    /// The alert's wait on the journal's disk work, taken out of the flash's own share.
    fsync_wait: i64,
    flash: bool,
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

    fn kind(&self) -> crate::metrics::SinkKind {
        crate::metrics::SinkKind::Subscribers
    }

    fn metrics(&self) -> &crate::metrics::Metrics {
        &self.hub.metrics
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
                self.unflushed.push(Unflushed {
                    received: l.received_unix_ns,
                    journaled: l.journaled_unix_ns,
                    fsync_wait: l.fsync_wait_ns,
                    flash: a.kind == pb::AlertKind::Flash as i32,
                });
            }
        }
        self.tx
            .feed(pb::SubscriberFrame {
                body: Some(subscriber_frame::Body::Alert(a)),
            })
            .await?;
        Ok(())
    }

    async fn gap(&mut self, gap: &pb::Gap) -> anyhow::Result<()> {
        // Sent whatever the subscriber's filters: nobody can tell what the missing alerts were.
        self.tx
            .feed(pb::SubscriberFrame {
                body: Some(subscriber_frame::Body::Gap(gap.clone())),
            })
            .await?;
        Ok(())
    }

    async fn commit(&mut self, _seq: u64) -> anyhow::Result<()> {
        self.tx.flush().await?;
        let done = now_unix_ns();
        for u in self.unflushed.drain(..) {
            self.hub.metrics.record(Stage::Send, u.journaled, done);
            self.hub.metrics.record(Stage::EndToEnd, u.received, done);
            if u.flash && u.received > 0 {
                self.hub.metrics.record(Stage::FlashEndToEnd, u.received, done);
                self.hub
                    .metrics
                    .record_span(Stage::FlashOwn, done - u.received - u.fsync_wait);
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
        // A flash's per-seed sigma is high whatever its false-alarm rate; the cut must read the post-trials one.
        let alert = |kind: pb::AlertKind, post: f64| pb::Alert {
            kind: kind as i32,
            trigger: Some(pb::Trigger {
                sigma: 9.0,
                sigma_per_seed: 9.0,
                sigma_post_trials: post,
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
        assert!(!f.wants(&alert(pb::AlertKind::Flash, -0.3)));
        assert!(!f.wants(&alert(pb::AlertKind::Assessment, 9.0)));
        assert!(f.wants(&alert(pb::AlertKind::Withdrawal, 1.0)));
        let all = Filter {
            kinds: vec![],
            min_sigma: 0.0,
        };
        assert!(all.wants(&pb::Alert::default()));
    }
}
