//! The producer listener: one task per connection, a span per connection. A producer must open with a
//! `Hello` (instrument, token compared in constant time, schema version), then streams photon batches and
//! status frames; each is checked here so the producer hears at once about a bad one, then handed to its
//! instrument's engine thread over a bounded channel, whose fullness slows the socket (TCP back-pressure).
//! Garbage or an oversize frame gets a `Refusal` and a hang-up; an invalid batch only a warning.

use std::net::SocketAddr;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::time::Duration;

use futures::{SinkExt, StreamExt};
use glint_wire::pb::{self, ingest_reply, producer_frame};
use glint_wire::validate;
use tokio::net::TcpListener;
use tokio::sync::Semaphore;
use tokio_rustls::TlsAcceptor;
use tokio_util::codec::Framed;
use tokio_util::sync::CancellationToken;
use tokio_util::task::TaskTracker;
use tracing::Instrument;

use crate::codec::{IngestServerCodec, ingest_refusal};
use crate::config::Secret;
use crate::config::token_matches;
use crate::metrics::Metrics;
use crate::serve::driver::InstrumentDriver;
use crate::timefmt::now_unix_ns;
use crate::tls::{self, BoxIo};

/// How long a new connection may take to send its Hello, and a reply may take to be written.
const IO_TIMEOUT: Duration = Duration::from_secs(10);
/// An Ack follows when the producer has been quiet this long with frames not yet acked.
const ACK_WHEN_QUIET: Duration = Duration::from_millis(20);
/// Most producer connections at once (one per instrument is the norm; the rest are refused quickly).
const MAX_CONNECTIONS: usize = 256;

/// What ingest hands an engine thread.
#[derive(Debug)]
pub(crate) enum EngineMsg {
    /// A producer connected (token removed): starts a recording file.
    Hello(pb::Hello),
    /// A checked photon batch and when its frame was read (Unix ns).
    Batch(pb::PhotonBatch, i64),
    /// A checked status frame and when it was read.
    Status(pb::StreamStatus, i64),
    /// The producer went away or skipped sequence numbers: dead time until its next frame.
    StreamBreak,
}

/// One configured instrument as ingest sees it.
#[derive(Debug)]
pub(crate) struct Slot {
    /// Instrument id.
    pub(crate) id: String,
    /// Producer token.
    pub(crate) token: Secret,
    /// Queue into the engine thread.
    pub(crate) tx: async_channel::Sender<EngineMsg>,
    /// Reorder tolerance for batch validation, ns.
    pub(crate) reorder_tolerance_ns: i64,
    /// A batch this far ahead of the engine's event time is refused as a clock jump, ns.
    pub(crate) max_clock_jump_ns: i64,
    /// A producer is connected.
    busy: AtomicBool,
    /// Highest seq taken from this instrument (any connection).
    last_seq: AtomicU64,
}

impl Slot {
    /// A free slot.
    pub(crate) fn new(
        id: String,
        token: Secret,
        tx: async_channel::Sender<EngineMsg>,
        reorder_tolerance_ns: i64,
        max_clock_jump_ns: i64,
    ) -> Self {
        Self {
            id,
            token,
            tx,
            reorder_tolerance_ns,
            max_clock_jump_ns,
            busy: AtomicBool::new(false),
            last_seq: AtomicU64::new(0),
        }
    }
}

/// What every producer connection shares.
#[derive(Debug)]
pub(crate) struct IngestShared {
    /// Instruments, in configuration order.
    pub(crate) slots: Vec<Slot>,
    /// Frame size limit.
    pub(crate) max_frame: usize,
    /// Ack after this many frames.
    pub(crate) ack_every: usize,
    /// Counters.
    pub(crate) metrics: Arc<Metrics>,
}

/// Accepts producers until `stop` is cancelled; connections end when `stop` is cancelled too.
pub(crate) async fn serve(
    listener: TcpListener,
    tls: Option<TlsAcceptor>,
    shared: Arc<IngestShared>,
    tracker: TaskTracker,
    stop: CancellationToken,
) {
    let permits = Arc::new(Semaphore::new(MAX_CONNECTIONS));
    let mut backoff = Duration::from_millis(10);
    loop {
        let Some((tcp, peer)) = crate::net::accept(&listener, &stop, &mut backoff, "ingest").await else {
            return;
        };
        let Ok(permit) = permits.clone().try_acquire_owned() else {
            tracing::warn!(%peer, "ingest: {MAX_CONNECTIONS} connections open, refusing another");
            continue;
        };
        let shared = shared.clone();
        let tls = tls.clone();
        let stop = stop.clone();
        let span = tracing::info_span!("producer", %peer);
        tracker.spawn(
            async move {
                let _permit = permit;
                let io = match tls::accept(tcp, tls.as_ref()).await {
                    Ok(io) => io,
                    Err(e) => {
                        tracing::warn!("connection failed: {e:#}");
                        return;
                    }
                };
                handle(io, peer, &shared, &stop).await;
            }
            .instrument(span),
        );
    }
}

type Conn = Framed<BoxIo, IngestServerCodec>;

/// Sends a reply, giving up after `IO_TIMEOUT` (a producer that never reads its replies is cut off).
async fn reply(framed: &mut Conn, r: pb::IngestReply) -> bool {
    matches!(tokio::time::timeout(IO_TIMEOUT, framed.send(r)).await, Ok(Ok(())))
}

async fn refuse_and_close(
    framed: &mut Conn,
    metrics: &Metrics,
    code: pb::RefusalCode,
    detail: String,
    seq: u64,
) {
    if code == pb::RefusalCode::ShuttingDown {
        tracing::info!(seq, "closing: {detail}");
    } else {
        tracing::warn!(code = code.as_str_name(), seq, "refused, closing: {detail}");
        metrics.refused_connections.fetch_add(1, Ordering::Relaxed);
    }
    reply(framed, ingest_refusal(code, detail, seq)).await;
    let _ = tokio::time::timeout(IO_TIMEOUT, framed.close()).await;
}

/// Releases the instrument when the connection ends, however it ends.
struct BusyGuard<'a>(&'a Slot, &'a Metrics);

impl Drop for BusyGuard<'_> {
    fn drop(&mut self) {
        self.0.busy.store(false, Ordering::Release);
        self.1.producers.fetch_sub(1, Ordering::Relaxed);
    }
}

async fn handle(io: BoxIo, peer: SocketAddr, shared: &IngestShared, stop: &CancellationToken) {
    let metrics = &shared.metrics;
    let mut framed = Framed::new(io, IngestServerCodec::new(shared.max_frame));
    let first = tokio::select! {
        () = stop.cancelled() => {
            refuse_and_close(&mut framed, metrics, pb::RefusalCode::ShuttingDown, "the daemon is shutting down".into(), 0).await;
            return;
        }
        f = tokio::time::timeout(IO_TIMEOUT, framed.next()) => f,
    };
    let hello = match first {
        Err(_) => {
            let detail = format!("no Hello within {} s", IO_TIMEOUT.as_secs());
            return refuse_and_close(
                &mut framed,
                metrics,
                pb::RefusalCode::ProtocolViolation,
                detail,
                0,
            )
            .await;
        }
        Ok(None) => return,
        Ok(Some(Err(e))) => {
            let code = e.refusal_code().unwrap_or(pb::RefusalCode::MalformedFrame);
            return refuse_and_close(&mut framed, metrics, code, e.to_string(), 0).await;
        }
        Ok(Some(Ok(pb::ProducerFrame {
            body: Some(producer_frame::Body::Hello(h)),
        }))) => h,
        Ok(Some(Ok(_))) => {
            let detail = "the first frame must be a Hello".to_string();
            return refuse_and_close(
                &mut framed,
                metrics,
                pb::RefusalCode::ProtocolViolation,
                detail,
                0,
            )
            .await;
        }
    };
    if let Err(e) = validate::validate_hello(&hello) {
        return refuse_and_close(&mut framed, metrics, e.refusal_code(), e.to_string(), 0).await;
    }
    let Some(slot) = shared.slots.iter().find(|s| s.id == hello.instrument) else {
        let detail = format!(
            "instrument '{}' is not configured in this daemon",
            hello.instrument
        );
        return refuse_and_close(
            &mut framed,
            metrics,
            pb::RefusalCode::UnknownInstrument,
            detail,
            0,
        )
        .await;
    };
    if !token_matches(&hello.token, &slot.token) {
        let detail = format!("token not accepted for instrument '{}'", slot.id);
        return refuse_and_close(&mut framed, metrics, pb::RefusalCode::BadToken, detail, 0).await;
    }
    if slot
        .busy
        .compare_exchange(false, true, Ordering::AcqRel, Ordering::Acquire)
        .is_err()
    {
        let detail = format!("another producer is connected for instrument '{}'", slot.id);
        return refuse_and_close(&mut framed, metrics, pb::RefusalCode::InstrumentBusy, detail, 0).await;
    }
    metrics.producers.fetch_add(1, Ordering::Relaxed);
    let _guard = BusyGuard(slot, metrics);
    let welcome = pb::Welcome {
        schema_version: glint_wire::SCHEMA_VERSION,
        server: format!("glint {}", env!("CARGO_PKG_VERSION")),
        max_frame_bytes: u32::try_from(shared.max_frame).unwrap_or(u32::MAX),
        last_seq: slot.last_seq.load(Ordering::Acquire),
    };
    if !reply(
        &mut framed,
        pb::IngestReply {
            body: Some(ingest_reply::Body::Welcome(welcome)),
        },
    )
    .await
    {
        return;
    }
    tracing::info!(instrument = %slot.id, producer = %hello.producer, "producer connected");
    let redacted = pb::Hello {
        token: String::new(),
        ..hello
    };
    if slot.tx.send(EngineMsg::Hello(redacted)).await.is_err() {
        return;
    }
    let mut conn = Connection {
        slot,
        shared,
        latest_ns: None,
        last_seq: 0,
        taken_seq: 0,
        acked_seq: 0,
        photons: 0,
        refused: 0,
        unacked: 0,
    };
    let why = conn.stream(&mut framed, stop).await;
    // Whatever ended the stream, the time until the producer is back is dead time.
    let _ = slot.tx.send(EngineMsg::StreamBreak).await;
    tracing::info!(
        instrument = %slot.id,
        %peer,
        photons = conn.photons,
        refused = conn.refused,
        last_seq = conn.taken_seq,
        "producer disconnected: {why}"
    );
}

struct Connection<'a> {
    slot: &'a Slot,
    shared: &'a IngestShared,
    /// Latest photon time taken on this connection, GPS ns.
    latest_ns: Option<i64>,
    /// Highest seq seen on this connection.
    last_seq: u64,
    /// Highest seq handed to the engine.
    taken_seq: u64,
    acked_seq: u64,
    photons: u64,
    refused: u64,
    unacked: usize,
}

impl Connection<'_> {
    fn ack(&mut self) -> pb::IngestReply {
        self.unacked = 0;
        self.acked_seq = self.taken_seq;
        pb::IngestReply {
            body: Some(ingest_reply::Body::Ack(pb::Ack {
                seq: self.taken_seq,
                photons: self.photons,
                refused: self.refused,
            })),
        }
    }

    /// Checks the sequence number of a batch or status frame; `Err` closes the connection. A forward jump is
    /// a gap the engine turns into dead time itself.
    fn check_seq(&mut self, seq: u64) -> Result<(), String> {
        if seq <= self.last_seq {
            return Err(format!(
                "seq {seq} does not follow {} (sequence numbers must increase)",
                self.last_seq
            ));
        }
        if self.last_seq != 0 && seq != self.last_seq + 1 {
            tracing::warn!(instrument = %self.slot.id, from = self.last_seq, to = seq, "sequence gap: dead time until this frame");
        }
        self.last_seq = seq;
        Ok(())
    }

    /// Checks the sequence number; a number that does not increase is a protocol violation that ends the
    /// connection, so the refusal is sent here and the detail returned for the log.
    async fn seq_or_close(&mut self, framed: &mut Conn, metrics: &Metrics, seq: u64) -> Result<(), String> {
        let checked = self.check_seq(seq);
        if let Err(detail) = &checked {
            refuse_and_close(
                framed,
                metrics,
                pb::RefusalCode::ProtocolViolation,
                detail.clone(),
                seq,
            )
            .await;
        }
        checked
    }

    async fn warn(
        &mut self,
        framed: &mut Conn,
        code: pb::RefusalCode,
        detail: String,
        seq: u64,
        photons: u64,
    ) -> bool {
        tracing::warn!(instrument = %self.slot.id, code = code.as_str_name(), seq, "frame refused: {detail}");
        self.refused += photons;
        self.shared
            .metrics
            .refused_photons
            .fetch_add(photons, Ordering::Relaxed);
        self.shared.metrics.refused_frames.fetch_add(1, Ordering::Relaxed);
        reply(framed, ingest_refusal(code, detail, seq)).await
    }

    /// Reads frames until the producer leaves, misbehaves, or the daemon stops; returns why it ended.
    async fn stream(&mut self, framed: &mut Conn, stop: &CancellationToken) -> String {
        let metrics = &self.shared.metrics;
        loop {
            let next = tokio::select! {
                biased;
                () = stop.cancelled() => {
                    if self.taken_seq > self.acked_seq {
                        let a = self.ack();
                        reply(framed, a).await;
                    }
                    refuse_and_close(framed, metrics, pb::RefusalCode::ShuttingDown, "the daemon is shutting down".into(), 0).await;
                    return "daemon shutting down".into();
                }
                f = framed.next() => f,
                () = tokio::time::sleep(ACK_WHEN_QUIET), if self.taken_seq > self.acked_seq => {
                    let a = self.ack();
                    if !reply(framed, a).await {
                        return "ack not written".into();
                    }
                    continue;
                }
            };
            let received = now_unix_ns();
            let frame = match next {
                None => return "end of stream".into(),
                Some(Err(e)) => match e.refusal_code() {
                    Some(code) => {
                        let detail = e.to_string();
                        refuse_and_close(framed, metrics, code, detail.clone(), 0).await;
                        return detail;
                    }
                    None => return e.to_string(),
                },
                Some(Ok(f)) => f,
            };
            match frame.body {
                Some(producer_frame::Body::Batch(b)) => {
                    let n = b.time_gps_ns.len() as u64;
                    if let Err(detail) = self.seq_or_close(framed, metrics, b.seq).await {
                        return detail;
                    }
                    if let Err(r) = InstrumentDriver::check_batch(&b, self.slot.reorder_tolerance_ns) {
                        if !self.warn(framed, r.code, r.detail, b.seq, n).await {
                            return "warning not written".into();
                        }
                        continue;
                    }
                    let newest = b.time_gps_ns.iter().copied().max();
                    // Ahead of this connection's own stream by more than allowed: a clock jump. The first
                    // batch of a connection is exempt (a producer may come back after a long outage).
                    if let (Some(t), Some(latest)) = (newest, self.latest_ns) {
                        if t - latest > self.slot.max_clock_jump_ns {
                            let detail = format!(
                                "photon time {t} is {:.1} s ahead of the stream's latest time {latest}, more than the {:.0} s allowed",
                                (t - latest) as f64 / 1e9,
                                self.slot.max_clock_jump_ns as f64 / 1e9
                            );
                            if !self
                                .warn(framed, pb::RefusalCode::ClockJump, detail, b.seq, n)
                                .await
                            {
                                return "warning not written".into();
                            }
                            continue;
                        }
                    }
                    if let Some(t) = newest {
                        self.latest_ns = Some(self.latest_ns.map_or(t, |l| l.max(t)));
                    }
                    let seq = b.seq;
                    // Waits while the engine's queue is full: the socket is not read meanwhile.
                    if self.slot.tx.send(EngineMsg::Batch(b, received)).await.is_err() {
                        return "the engine has stopped".into();
                    }
                    self.taken(seq, n);
                }
                Some(producer_frame::Body::Status(s)) => {
                    if let Err(detail) = self.seq_or_close(framed, metrics, s.seq).await {
                        return detail;
                    }
                    if let Err(e) = validate::validate_status(&s) {
                        if !self.warn(framed, e.refusal_code(), e.to_string(), s.seq, 0).await {
                            return "warning not written".into();
                        }
                        continue;
                    }
                    let seq = s.seq;
                    if self.slot.tx.send(EngineMsg::Status(s, received)).await.is_err() {
                        return "the engine has stopped".into();
                    }
                    self.taken(seq, 0);
                }
                Some(producer_frame::Body::Hello(_)) => {
                    let detail = "a second Hello on one connection".to_string();
                    refuse_and_close(
                        framed,
                        metrics,
                        pb::RefusalCode::ProtocolViolation,
                        detail.clone(),
                        0,
                    )
                    .await;
                    return detail;
                }
                None => {
                    let detail = "frame has no body".to_string();
                    refuse_and_close(
                        framed,
                        metrics,
                        pb::RefusalCode::MalformedFrame,
                        detail.clone(),
                        0,
                    )
                    .await;
                    return detail;
                }
            }
            if self.unacked >= self.shared.ack_every {
                let a = self.ack();
                if !reply(framed, a).await {
                    return "ack not written".into();
                }
            }
        }
    }

    fn taken(&mut self, seq: u64, photons: u64) {
        self.taken_seq = seq;
        self.photons += photons;
        self.unacked += 1;
        self.slot.last_seq.store(seq, Ordering::Release);
        self.shared.metrics.photons.fetch_add(photons, Ordering::Relaxed);
    }
}
