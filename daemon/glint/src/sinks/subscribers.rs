//! The subscriber listener: receiving telescopes and people connect, send one `Subscribe` (or an operator's
//! `WithdrawRequest`), and get a replay from the journal followed by live alerts and heartbeats. Each
//! connection is a task with its own cursor into the desk; it waits on a watch of the newest sequence
//! number, never on a queue, and is dropped (with a log line) when its socket stays unwritable too long.

use std::net::SocketAddr;
use std::sync::Arc;
use std::sync::atomic::Ordering;
use std::time::Duration;

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
use crate::timefmt::now_unix_ns;
use crate::tls::{self, BoxIo};

/// How long a reply to an authenticated request may take to be written.
const REQUEST_TIMEOUT: Duration = Duration::from_secs(10);
/// How long a refusal to an unauthenticated peer may take to be written: it holds a slot of the pool.
const PRE_AUTH_WRITE_TIMEOUT: Duration = Duration::from_secs(1);
/// Alerts read per step of a subscriber's cursor; bounds the memory one subscriber holds at a time.
const READ_CHUNK: usize = 256;

/// What every subscriber connection shares.
#[derive(Debug)]
pub(crate) struct Hub {
    /// The pool of connections that have not authenticated yet, and the refusal log.
    pub(crate) gate: Arc<Gate>,
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
            Err(e) => {
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
    let req = match check_request(req, &hub.cfg, last) {
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
    }
}

async fn withdraw(mut framed: Conn, w: pb::WithdrawRequest, hub: &Hub) -> anyhow::Result<()> {
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
    fn wants(&self, a: &pb::Alert) -> bool {
        let kind_ok = self.kinds.is_empty() || self.kinds.contains(&a.kind);
        let sigma_ok = self.min_sigma <= 0.0
            || a.kind == pb::AlertKind::Withdrawal as i32
            || a.trigger.as_ref().is_some_and(|t| t.sigma >= self.min_sigma);
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
    let result = stream_alerts(framed, &client, &mut cursor, last, &filter, hub).await;
    hub.metrics.subscribers.fetch_sub(1, Ordering::Relaxed);
    match &result {
        Err(e) => tracing::info!(client = %client, last_seq_sent = cursor, "subscriber gone: {e:#}"),
        Ok(()) => tracing::info!(client = %client, last_seq_sent = cursor, "subscriber closed"),
    }
    result
}

/// Why a stream to one subscriber ended early.
#[derive(Debug, thiserror::Error)]
enum StreamEnd {
    #[error("socket unwritable for {0:?}; dropped")]
    Unwritable(Duration),
    #[error("{0}")]
    Other(#[from] anyhow::Error),
}

async fn stream_alerts(
    framed: Conn,
    client: &str,
    cursor: &mut u64,
    live_from: u64,
    filter: &Filter,
    hub: &Hub,
) -> anyhow::Result<()> {
    let (mut sink, mut stream) = framed.split();
    let mut watch = hub.desk.watch();
    let beat = hub.cfg.heartbeat;
    let mut next_beat = tokio::time::Instant::now() + beat;
    let timeout = hub.cfg.unwritable_timeout;
    let mut closing = false;
    loop {
        // Catch up to the newest published alert, one bounded chunk at a time.
        while *cursor < hub.desk.last_seq() {
            let chunk = match hub.desk.read_cached(*cursor, READ_CHUNK) {
                Some(c) => c,
                None => {
                    let (desk, after) = (hub.desk.clone(), *cursor);
                    tokio::task::spawn_blocking(move || desk.read_from_disk(after, READ_CHUNK)).await??
                }
            };
            let Some(newest) = chunk.last().map(|a| a.seq) else {
                // Nothing readable although the journal is ahead (deleted by retention or corrupt): skip on.
                tracing::warn!(
                    client,
                    from = *cursor,
                    "alerts after seq {} are no longer in the journal",
                    *cursor
                );
                *cursor = hub.desk.last_seq();
                break;
            };
            let mut live = Vec::new();
            let sent = async {
                for a in chunk.iter().filter(|a| filter.wants(a)) {
                    let mut a = (**a).clone();
                    a.replayed = a.seq <= live_from;
                    if let Some(l) = a.latency.as_mut() {
                        l.sent_unix_ns = now_unix_ns();
                        if !a.replayed {
                            live.push((
                                l.received_unix_ns,
                                l.journaled_unix_ns,
                                a.kind == pb::AlertKind::Flash as i32,
                            ));
                        }
                    }
                    sink.feed(pb::SubscriberFrame {
                        body: Some(subscriber_frame::Body::Alert(a)),
                    })
                    .await?;
                }
                sink.flush().await
            };
            match tokio::time::timeout(timeout, sent).await {
                Err(_) => {
                    hub.metrics.subscribers_dropped.fetch_add(1, Ordering::Relaxed);
                    tracing::warn!(
                        client,
                        last_seq_sent = *cursor,
                        "dropping subscriber: socket unwritable for {:.1} s",
                        timeout.as_secs_f64()
                    );
                    return Err(StreamEnd::Unwritable(timeout).into());
                }
                Ok(r) => r?,
            }
            let done = now_unix_ns();
            for (received, journaled, flash) in live {
                hub.metrics.record(Stage::Send, journaled, done);
                hub.metrics.record(Stage::EndToEnd, received, done);
                if flash {
                    hub.metrics.record(Stage::FlashEndToEnd, received, done);
                }
            }
            *cursor = newest;
            next_beat = tokio::time::Instant::now() + beat;
        }
        if closing {
            send_heartbeat(&mut sink, hub, true, timeout).await?;
            let _ = tokio::time::timeout(timeout, sink.close()).await;
            return Ok(());
        }
        tokio::select! {
            changed = watch.changed() => {
                if changed.is_err() {
                    closing = true;
                }
            }
            () = tokio::time::sleep_until(next_beat) => {
                send_heartbeat(&mut sink, hub, false, timeout).await?;
                next_beat = tokio::time::Instant::now() + beat;
            }
            () = hub.closing.cancelled() => closing = true,
            incoming = stream.next() => match incoming {
                // A subscriber sends one request; anything more is ignored, the end of its stream ends ours.
                Some(Ok(_)) => {}
                Some(Err(e)) => return Err(anyhow::anyhow!("reading from subscriber: {e}")),
                None => return Ok(()),
            },
        }
    }
}

async fn send_heartbeat(
    sink: &mut futures::stream::SplitSink<Conn, pb::SubscriberFrame>,
    hub: &Hub,
    closing: bool,
    timeout: Duration,
) -> anyhow::Result<()> {
    let (instruments, watermark_gps_ns) = hub.watermarks.snapshot();
    let hb = pb::Heartbeat {
        unix_ns: now_unix_ns(),
        last_seq: hub.desk.last_seq(),
        instruments,
        watermark_gps_ns,
        closing,
    };
    let frame = pb::SubscriberFrame {
        body: Some(subscriber_frame::Body::Heartbeat(hb)),
    };
    match tokio::time::timeout(timeout, sink.send(frame)).await {
        Err(_) => {
            hub.metrics.subscribers_dropped.fetch_add(1, Ordering::Relaxed);
            tracing::warn!(
                "dropping subscriber: socket unwritable for {:.1} s",
                timeout.as_secs_f64()
            );
            Err(StreamEnd::Unwritable(timeout).into())
        }
        Ok(r) => Ok(r?),
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap
mod tests {
    use super::*;
    use crate::client::listen::{ListenOptions, listen_loop};
    use crate::config::Config;
    use crate::serve::Daemon;
    use tokio::io::{AsyncReadExt, AsyncWriteExt};

    /// About 136 bytes per test alert: 60,000 of them overfill the kernel's socket buffers on both ends
    /// (loopback send buffers grow to a few MB at most; a stuck client asks for a 4 KB receive buffer).
    const PREFILLED: usize = 60_000;

    /// A loopback configuration whose journal already holds `PREFILLED` alerts, so a subscriber replaying it
    /// from the start has far more to read than any socket buffer holds.
    fn prefilled(tmp: &std::path::Path, unwritable: Duration) -> (Config, String) {
        let (mut cfg, _, token) = crate::serve::loopback::loopback_config(tmp, "ventisca-array").unwrap();
        cfg.subscribers.unwritable_timeout = unwritable;
        let (desk, _) = Desk::open(
            &cfg.daemon.state_dir.join("journal"),
            &cfg.journal,
            Arc::new(Metrics::new()),
            tokio_util::sync::CancellationToken::new(),
        )
        .unwrap();
        crate::desk::tests::issue_test_flashes(&desk, PREFILLED, 0);
        (cfg, token)
    }

    /// Subscribes from the start of the journal with a 4 KB receive buffer and never reads.
    async fn stuck_subscriber(addr: SocketAddr, token: &str) -> tokio::net::TcpStream {
        let sock = tokio::net::TcpSocket::new_v4().unwrap();
        sock.set_recv_buffer_size(4096).unwrap();
        let mut stuck = sock.connect(addr).await.unwrap();
        let sub = pb::SubscriberRequest {
            body: Some(subscriber_request::Body::Subscribe(pb::Subscribe {
                token: token.to_string(),
                client: "never-reads".into(),
                schema_version: glint_wire::SCHEMA_VERSION,
                replay_all: true,
                ..Default::default()
            })),
        };
        let mut bytes = Vec::new();
        glint_wire::framing::encode_frame(&sub, 1 << 20, &mut bytes).unwrap();
        stuck.write_all(&bytes).await.unwrap();
        stuck
    }

    fn runtime() -> tokio::runtime::Runtime {
        tokio::runtime::Builder::new_multi_thread()
            .enable_all()
            .build()
            .unwrap()
    }

    /// A subscriber that subscribes and then never reads: its socket fills while the daemon replays a large
    /// journal to it; past the unwritable limit it is dropped, and a reading subscriber at the same time gets
    /// everything.
    #[test]
    fn a_subscriber_whose_socket_stays_full_is_dropped_and_the_others_go_on() {
        const N: usize = PREFILLED;
        let tmp = tempfile::tempdir().unwrap();
        let (cfg, token) = prefilled(tmp.path(), Duration::from_millis(500));
        runtime().block_on(async {
            let daemon = Daemon::start(cfg).await.unwrap();
            let mut stuck = stuck_subscriber(daemon.subscribers_addr, &token).await;
            let opts = ListenOptions {
                addr: daemon.subscribers_addr.to_string(),
                token,
                kinds: Vec::new(),
                min_sigma: 0.0,
                resume_after: 0,
                replay_all: true,
                client: "reads".into(),
                tls: None,
                max_frame: 1 << 20,
            };
            let mut seqs = Vec::new();
            let mut on_alert = |a: &pb::Alert| -> anyhow::Result<bool> {
                seqs.push(a.seq);
                Ok(seqs.len() < N)
            };
            tokio::time::timeout(Duration::from_secs(60), listen_loop(&opts, false, &mut on_alert))
                .await
                .expect("the reading subscriber was held up")
                .unwrap();
            assert_eq!(seqs, (1..=N as u64).collect::<Vec<_>>(), "every alert, in order");

            // The stuck one is dropped once its socket has stayed full for the limit.
            let deadline = tokio::time::Instant::now() + Duration::from_secs(30);
            while daemon.metrics.subscribers_dropped.load(Ordering::Relaxed) == 0 {
                assert!(
                    tokio::time::Instant::now() < deadline,
                    "the stuck subscriber was never dropped"
                );
                tokio::time::sleep(Duration::from_millis(50)).await;
            }
            assert_eq!(daemon.metrics.subscribers_dropped.load(Ordering::Relaxed), 1);
            // What it finally reads ends early: the daemon closed the connection part way through.
            let mut got = Vec::new();
            tokio::time::timeout(Duration::from_secs(30), stuck.read_to_end(&mut got))
                .await
                .expect("the dropped connection was not closed")
                .unwrap();
            // Decoded: the Welcome, then a run of alerts from the first on, cut short (a torn frame at the end
            // is where the daemon stopped writing).
            let dec = glint_wire::framing::FrameDecoder::new(1 << 20);
            let mut buf = bytes::BytesMut::from(&got[..]);
            let mut alerts = Vec::new();
            while let Ok(Some(f)) = dec.decode_from::<pb::SubscriberFrame>(&mut buf) {
                if let Some(subscriber_frame::Body::Alert(a)) = f.body {
                    alerts.push(a.seq);
                }
            }
            assert!(!alerts.is_empty(), "the stuck subscriber got nothing at all");
            assert!(alerts.len() < N, "a dropped subscriber got all {N} alerts");
            assert_eq!(alerts, (1..=alerts.len() as u64).collect::<Vec<_>>());
            println!(
                "the stuck subscriber held {} alerts ({} bytes) when dropped",
                alerts.len(),
                got.len()
            );
            daemon.shutdown().await.unwrap();
        });
    }

    /// Feeds the demo scenario at full speed into `daemon`; photons per second as `glint feed` reports them.
    async fn feed_rate(daemon: &Daemon, tmp: &std::path::Path) -> f64 {
        let (scenario, sim) = crate::serve::loopback::demo_simulator(tmp).unwrap();
        let cfg = Config::embedded_default().unwrap();
        let inst = Config::instrument(&cfg, &scenario.instrument.id).unwrap();
        let token = inst.token.expose().to_string();
        let target = crate::client::feed::FeedTarget {
            addr: daemon.ingest_addr.to_string(),
            token,
            instrument: None,
            producer: "rate".into(),
            tls: None,
            max_frame: 64 << 20,
        };
        let fed = crate::client::feed::feed(
            sim.map(Ok::<_, anyhow::Error>),
            &target,
            crate::client::feed::Speed::Max,
        )
        .await
        .unwrap();
        assert_eq!(fed.refused_photons, 0);
        fed.photons_per_s()
    }

    /// Three subscribers whose sockets are full for the whole run (a large journal to replay, never read)
    /// do not slow ingest: the feed rate is the same within noise as with no subscriber at all.
    #[test]
    fn subscribers_with_full_sockets_do_not_slow_ingest() {
        let tmp = tempfile::tempdir().unwrap();
        let rt = runtime();
        let (cfg_alone, _) = prefilled(&tmp.path().join("alone"), Duration::from_secs(600));
        let (cfg_stuck, token) = prefilled(&tmp.path().join("stuck"), Duration::from_secs(600));
        let (alone, with_stuck) = rt.block_on(async {
            let alone = Daemon::start(cfg_alone).await.unwrap();
            let stuck_daemon = Daemon::start(cfg_stuck).await.unwrap();
            let mut stuck = Vec::new();
            for _ in 0..3 {
                stuck.push(stuck_subscriber(stuck_daemon.subscribers_addr, &token).await);
            }
            // Their sockets are full before the feed starts: the daemon has tried to write all of the journal.
            tokio::time::sleep(Duration::from_millis(500)).await;
            // Alternating runs, best of three each, so a busy moment of the machine hits both alike.
            let (mut a, mut s) = (0.0f64, 0.0f64);
            for _ in 0..3 {
                a = a.max(feed_rate(&alone, tmp.path()).await);
                s = s.max(feed_rate(&stuck_daemon, tmp.path()).await);
            }
            assert_eq!(
                stuck_daemon.metrics.subscribers_dropped.load(Ordering::Relaxed),
                0,
                "nobody was dropped within the limit"
            );
            drop(stuck);
            alone.shutdown().await.unwrap();
            stuck_daemon.shutdown().await.unwrap();
            (a, s)
        });
        println!(
            "feed rate alone: {alone:.0} photons/s; with three full subscriber sockets: {with_stuck:.0}"
        );
        // Same within noise: runs on a shared 2-core machine vary by tens of percent (common practice, no
        // source); a subscriber holding up ingest would stop the feed outright.
        assert!(
            with_stuck >= 0.6 * alone,
            "ingest slowed: {with_stuck:.0} vs {alone:.0} photons/s"
        );
    }

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
