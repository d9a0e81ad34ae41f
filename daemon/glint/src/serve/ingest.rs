//! The producer listener: one task per connection, a span per connection. A producer must open with a
//! `Hello` (token checked first, in constant time against every instrument, so an unknown instrument and a
//! wrong token look alike; then the schema version) within the gate's short deadline and in a small frame;
//! it then streams photon batches and status frames. Each frame is checked here, the time checks included
//! (ahead of the host clock, a jump ahead of the stream, photons behind the watermark), so the producer hears
//! at once about a bad one, then handed to its instrument's engine thread over a bounded channel, whose
//! fullness slows the socket (TCP back-pressure). A frame begun and not finished within `frame_timeout`
//! ends the connection, so a stalled producer releases its instrument. The checks are plain functions
//! ([`authenticate`], [`FrameCheck::check`]) so the fuzz test drives them without sockets.

use std::net::SocketAddr;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use futures::{SinkExt, StreamExt};
use glint_wire::pb::{self, ingest_reply, producer_frame};
use glint_wire::validate;
use tokio::net::{TcpListener, TcpStream};
use tokio_rustls::TlsAcceptor;
use tokio_util::codec::Framed;
use tokio_util::sync::CancellationToken;
use tokio_util::task::TaskTracker;
use tracing::Instrument;

use crate::codec::{INITIAL_READ_BUFFER, IngestServerCodec, PRE_AUTH_MAX_FRAME, Refusal, ingest_refusal};
use crate::config::{Secret, token_matches};
use crate::logging::untrusted;
use crate::metrics::Metrics;
use crate::net::{Gate, Ticket};
use crate::serve::driver::InstrumentDriver;
use crate::timefmt::{now_unix_ns, unix_ns_to_gps_ns};
use crate::tls::{self, BoxIo};

#[cfg(test)]
mod fuzz;

/// How long a reply may take to be written to an authenticated producer.
const IO_TIMEOUT: Duration = Duration::from_secs(10);
/// How long a refusal to an unauthenticated peer may take to be written: it holds a slot of the pool.
const PRE_AUTH_WRITE_TIMEOUT: Duration = Duration::from_secs(1);
/// An Ack follows when the producer has been quiet this long with frames not yet acked.
const ACK_WHEN_QUIET: Duration = Duration::from_millis(20);
/// Late-photon warnings and frame-refusal log lines of one connection come at most this often.
const WARN_EVERY: Duration = Duration::from_secs(1);
/// The refusal a peer gets for an unknown instrument and for a wrong token alike.
const NOT_ACCEPTED: &str = "instrument or token not accepted";

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
    /// Publish the health figures now (sent by the health watch when the queue has room, so an idle engine's
    /// figures are never stale).
    Health,
}

/// An instrument's event time as its engine will see it, kept by ingest from the frames it hands over (in
/// the engine's own order and by the engine's own rules: the watermark is the latest time minus the reorder
/// tolerance, or a batch's promise when later, and never goes back). Ingest is the engine's only source, so
/// the photons this counts as late are exactly those the engine drops; the engine itself stays clock-free.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub(crate) struct StreamClock {
    /// Latest event time handed over, GPS ns.
    pub(crate) latest: Option<i64>,
    /// Photons older than this are late, GPS ns.
    pub(crate) watermark: Option<i64>,
}

impl StreamClock {
    /// Photons of `times` behind the watermark.
    fn late_in(&self, times: &[i64]) -> u64 {
        self.watermark
            .map_or(0, |w| times.iter().filter(|&&t| t < w).count() as u64)
    }

    fn advance(&mut self, w: i64) {
        self.watermark = Some(self.watermark.map_or(w, |old| old.max(w)));
    }

    fn move_time(&mut self, t: i64, tolerance_ns: i64) {
        let latest = self.latest.map_or(t, |l| l.max(t));
        self.latest = Some(latest);
        self.advance(latest.saturating_sub(tolerance_ns));
    }

    fn after_batch(&mut self, b: &pb::PhotonBatch, tolerance_ns: i64) {
        if let Some(&newest) = b.time_gps_ns.iter().max() {
            self.move_time(newest, tolerance_ns);
            if b.complete_before_gps_ns > 0 {
                self.advance(b.complete_before_gps_ns);
            }
        }
    }
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
    /// A batch this far ahead of the stream's latest time is refused as a clock jump, ns.
    pub(crate) max_clock_jump_ns: i64,
    /// A producer is connected.
    busy: AtomicBool,
    /// Highest seq taken from this instrument (any connection).
    last_seq: AtomicU64,
    /// Event time handed to the engine, across connections.
    clock: Mutex<StreamClock>,
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
            clock: Mutex::new(StreamClock::default()),
        }
    }

    /// After a restart: the highest seq the engine took before it, so the next producer's Welcome says
    /// where to resume.
    pub(crate) fn resume_seq(&self, seq: u64) {
        self.last_seq.store(seq, Ordering::Release);
    }

    fn clock(&self) -> StreamClock {
        *self
            .clock
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner)
    }

    fn set_clock(&self, c: StreamClock) {
        *self
            .clock
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner) = c;
    }
}

/// What every producer connection shares.
#[derive(Debug)]
pub(crate) struct IngestShared {
    /// Instruments, in configuration order.
    pub(crate) slots: Vec<Slot>,
    /// Frame size limit once authenticated.
    pub(crate) max_frame: usize,
    /// Ack after this many frames.
    pub(crate) ack_every: usize,
    /// Counters.
    pub(crate) metrics: Arc<Metrics>,
    /// The pool of connections that have not authenticated yet, and the refusal log.
    pub(crate) gate: Arc<Gate>,
    /// TCP keepalive idle time.
    pub(crate) keepalive: Duration,
    /// A frame begun must be complete within this.
    pub(crate) frame_timeout: Duration,
    /// Frames further ahead of the host clock than this are refused, ns.
    pub(crate) max_future_ns: i64,
}

/// Checks a Hello: the token first (compared against every instrument's, so the time taken and the answer
/// are the same for an unknown instrument and a wrong token), then the schema version.
pub(crate) fn authenticate<'a>(slots: &'a [Slot], hello: &pb::Hello) -> Result<&'a Slot, Refusal> {
    let mut found = None;
    for s in slots {
        let token_ok = token_matches(&hello.token, &s.token);
        if token_ok && s.id == hello.instrument {
            found = Some(s);
        }
    }
    let Some(slot) = found else {
        return Err(Refusal::new(pb::RefusalCode::BadToken, NOT_ACCEPTED, 0));
    };
    validate::validate_hello(hello)
        .map_err(|e| Refusal::new(e.refusal_code(), untrusted(&e.to_string()), 0))?;
    Ok(slot)
}

/// What to do with one frame of an authenticated producer.
#[derive(Debug, Clone, PartialEq, Eq)]
pub(crate) enum Verdict {
    /// Hand it to the engine, which will drop `late` of its photons as late.
    Take {
        /// Photons behind the watermark.
        late: u64,
    },
    /// Drop the frame, warn the producer, count its photons as refused; the connection stays open.
    Warn(Refusal, u64),
    /// Refuse and close the connection.
    Close(Refusal),
}

/// The per-connection checks of a producer's frames, without I/O: sequence numbers, validation, the host
/// clock, clock jumps and late photons. `clock` is the instrument's, carried across connections.
#[derive(Debug, Clone)]
pub(crate) struct FrameCheck {
    /// Reorder tolerance, ns.
    pub(crate) reorder_tolerance_ns: i64,
    /// Largest jump ahead of the stream, ns.
    pub(crate) max_clock_jump_ns: i64,
    /// Largest distance ahead of the host clock, ns.
    pub(crate) max_future_ns: i64,
    /// Highest seq seen on this connection.
    pub(crate) last_seq: u64,
    /// Latest time taken on this connection.
    pub(crate) latest_ns: Option<i64>,
}

impl FrameCheck {
    /// Checks for one instrument's connection.
    pub(crate) fn new(reorder_tolerance_ns: i64, max_clock_jump_ns: i64, max_future_ns: i64) -> Self {
        Self {
            reorder_tolerance_ns,
            max_clock_jump_ns,
            max_future_ns,
            last_seq: 0,
            latest_ns: None,
        }
    }

    /// Decides about `frame`, read when the host clock said `host_gps_ns`; on `Take` the instrument's
    /// `clock` has moved on.
    pub(crate) fn check(
        &mut self,
        frame: &pb::ProducerFrame,
        clock: &mut StreamClock,
        host_gps_ns: i64,
    ) -> Verdict {
        match &frame.body {
            Some(producer_frame::Body::Batch(b)) => {
                let n = b.time_gps_ns.len() as u64;
                if let Err(r) = self.check_seq(b.seq) {
                    return Verdict::Close(r);
                }
                if let Err(r) = InstrumentDriver::check_batch(b, self.reorder_tolerance_ns) {
                    return Verdict::Warn(Refusal::new(r.code, untrusted(&r.detail), b.seq), n);
                }
                if let Some(&newest) = b.time_gps_ns.iter().max() {
                    if let Err(r) = self.check_time(b.seq, newest, clock, host_gps_ns) {
                        return Verdict::Warn(r, n);
                    }
                }
                let late = clock.late_in(&b.time_gps_ns);
                clock.after_batch(b, self.reorder_tolerance_ns);
                if let Some(&newest) = b.time_gps_ns.iter().max() {
                    self.latest_ns = Some(self.latest_ns.map_or(newest, |l| l.max(newest)));
                }
                Verdict::Take { late }
            }
            Some(producer_frame::Body::Status(st)) => {
                if let Err(r) = self.check_seq(st.seq) {
                    return Verdict::Close(r);
                }
                if let Err(e) = validate::validate_status(st) {
                    return Verdict::Warn(
                        Refusal::new(e.refusal_code(), untrusted(&e.to_string()), st.seq),
                        0,
                    );
                }
                let newest = st.dead.iter().map(|d| d.end_gps_ns).fold(st.now_gps_ns, i64::max);
                if let Err(r) = self.check_time(st.seq, newest, clock, host_gps_ns) {
                    return Verdict::Warn(r, 0);
                }
                clock.move_time(st.now_gps_ns, self.reorder_tolerance_ns);
                self.latest_ns = Some(self.latest_ns.map_or(st.now_gps_ns, |l| l.max(st.now_gps_ns)));
                Verdict::Take { late: 0 }
            }
            Some(producer_frame::Body::Hello(_)) => Verdict::Close(Refusal::new(
                pb::RefusalCode::ProtocolViolation,
                "a second Hello on one connection",
                0,
            )),
            None => Verdict::Close(Refusal::new(
                pb::RefusalCode::MalformedFrame,
                "frame has no body",
                0,
            )),
        }
    }

    /// A sequence number that does not increase ends the connection; a forward jump is a gap the engine turns
    /// into dead time itself.
    fn check_seq(&mut self, seq: u64) -> Result<(), Refusal> {
        if seq <= self.last_seq {
            return Err(Refusal::new(
                pb::RefusalCode::ProtocolViolation,
                format!(
                    "seq {seq} does not follow {} (sequence numbers must increase)",
                    self.last_seq
                ),
                seq,
            ));
        }
        self.last_seq = seq;
        Ok(())
    }

    /// Every frame, the first of a connection included: not further ahead of the host clock than allowed,
    /// and not further ahead of the stream than the clock-jump limit. The stream is this connection's latest
    /// time, or for a connection's first frame the instrument's latest when that is recent (a producer back
    /// after a long outage is held to the host clock only).
    fn check_time(&self, seq: u64, t: i64, clock: &StreamClock, host_gps_ns: i64) -> Result<(), Refusal> {
        let ahead_of_host = t.saturating_sub(host_gps_ns);
        if ahead_of_host > self.max_future_ns {
            return Err(Refusal::new(
                pb::RefusalCode::TimeOutOfRange,
                format!(
                    "time {t} ns (GPS) is {:.1} s ahead of the daemon's clock, more than the {:.0} s allowed (ingest.max_future_s)",
                    ahead_of_host as f64 / 1e9,
                    self.max_future_ns as f64 / 1e9
                ),
                seq,
            ));
        }
        let reference = self.latest_ns.or_else(|| {
            clock
                .latest
                .filter(|&l| l >= host_gps_ns.saturating_sub(self.max_clock_jump_ns))
        });
        if let Some(latest) = reference {
            let ahead = t.saturating_sub(latest);
            if ahead > self.max_clock_jump_ns {
                return Err(Refusal::new(
                    pb::RefusalCode::ClockJump,
                    format!(
                        "time {t} ns is {:.1} s ahead of the stream's latest time {latest} ns, more than the {:.0} s allowed",
                        ahead as f64 / 1e9,
                        self.max_clock_jump_ns as f64 / 1e9
                    ),
                    seq,
                ));
            }
        }
        Ok(())
    }
}

/// Accepts producers until `stop` is cancelled; connections end when `stop` is cancelled too.
pub(crate) async fn serve(
    listener: TcpListener,
    tls: Option<TlsAcceptor>,
    shared: Arc<IngestShared>,
    tracker: TaskTracker,
    stop: CancellationToken,
) {
    tokio::spawn(shared.gate.clone().summaries(stop.clone()));
    let mut backoff = Duration::from_millis(10);
    loop {
        let Some((tcp, peer)) = crate::net::accept(&listener, &stop, &mut backoff, "ingest").await else {
            return;
        };
        if let Err(e) = crate::net::set_keepalive(&tcp, shared.keepalive) {
            tracing::debug!(%peer, "cannot set TCP keepalive: {e}");
        }
        let ticket = shared.gate.admit(peer);
        let shared = shared.clone();
        let tls = tls.clone();
        let stop = stop.clone();
        let span = tracing::info_span!("producer", %peer);
        tracker.spawn(handle(tcp, peer, ticket, tls, shared, stop).instrument(span));
        // Let the new task read its first bytes before the next accept: under a flood of connections the
        // accept loop would otherwise admit (and evict) many before any of them is looked at.
        tokio::task::yield_now().await;
    }
}

type Conn = Framed<BoxIo, IngestServerCodec>;

/// Sends a reply, giving up after `IO_TIMEOUT` (a producer that never reads its replies is cut off).
async fn reply(framed: &mut Conn, r: pb::IngestReply) -> bool {
    matches!(tokio::time::timeout(IO_TIMEOUT, framed.send(r)).await, Ok(Ok(())))
}

/// Refuses an authenticated producer and closes.
async fn refuse_and_close(framed: &mut Conn, metrics: &Metrics, r: Refusal) {
    if r.code == pb::RefusalCode::ShuttingDown {
        tracing::info!(seq = r.seq, "closing: {}", r.detail);
    } else {
        tracing::warn!(
            code = r.code.as_str_name(),
            seq = r.seq,
            "refused, closing: {}",
            r.detail
        );
        metrics.refused_frames.fetch_add(1, Ordering::Relaxed);
    }
    reply(framed, ingest_refusal(r.code, r.detail, r.seq)).await;
    let _ = tokio::time::timeout(IO_TIMEOUT, framed.close()).await;
}

/// Refuses a peer that has not authenticated: counted and summarised by the gate's refusal log, answered
/// within a short write deadline.
async fn refuse_unauthenticated(
    framed: &mut Conn,
    shared: &IngestShared,
    peer: SocketAddr,
    reason: &'static str,
    r: Refusal,
) {
    shared.gate.refusals.note(peer, reason, &r.detail);
    let send = async {
        let _ = framed.send(ingest_refusal(r.code, r.detail, r.seq)).await;
        let _ = framed.close().await;
    };
    let _ = tokio::time::timeout(PRE_AUTH_WRITE_TIMEOUT, send).await;
}

/// Releases the instrument when the connection ends, however it ends.
struct BusyGuard<'a>(&'a Slot, &'a Metrics);

impl Drop for BusyGuard<'_> {
    fn drop(&mut self) {
        self.0.busy.store(false, Ordering::Release);
        self.1.producers.fetch_sub(1, Ordering::Relaxed);
    }
}

/// Until the Hello is accepted: the TLS handshake and one small frame, within the gate's deadline, given up
/// at once when the gate evicts this connection for a newer one.
async fn authenticate_peer<'a>(
    tcp: TcpStream,
    peer: SocketAddr,
    ticket: &Ticket,
    tls: Option<TlsAcceptor>,
    shared: &'a IngestShared,
    stop: &CancellationToken,
) -> Option<(Conn, &'a Slot, pb::Hello)> {
    let deadline = tokio::time::Instant::now() + ticket.time_left();
    let io = tokio::select! {
        () = stop.cancelled() => return None,
        () = ticket.evicted() => return None,
        () = tokio::time::sleep_until(deadline) => {
            shared.gate.refusals.note(peer, "no TLS handshake in time", "the TLS handshake did not finish within the authentication deadline");
            return None;
        }
        io = tls::accept(tcp, tls.as_ref()) => match io {
            Ok(io) => io,
            Err(tls::AcceptError::PlainOnTls(tcp)) => {
                // Answered in the plain protocol the client speaks, so it says why instead of failing to read.
                let mut plain = Framed::new(Box::new(tcp) as tls::BoxIo, IngestServerCodec::new(PRE_AUTH_MAX_FRAME));
                let r = Refusal::new(pb::RefusalCode::ProtocolViolation, tls::PLAIN_ON_TLS, 0);
                refuse_unauthenticated(&mut plain, shared, peer, "plain (non-TLS) client on the TLS port", r).await;
                return None;
            }
            Err(tls::AcceptError::Failed(e)) => {
                shared.gate.refusals.note(peer, "TLS handshake failed", &untrusted(&format!("{e:#}")));
                return None;
            }
        },
    };
    let mut framed = Framed::with_capacity(
        io,
        IngestServerCodec::new(PRE_AUTH_MAX_FRAME),
        INITIAL_READ_BUFFER,
    );
    let first = tokio::select! {
        () = stop.cancelled() => {
            let r = Refusal::new(pb::RefusalCode::ShuttingDown, "the daemon is shutting down", 0);
            let _ = tokio::time::timeout(PRE_AUTH_WRITE_TIMEOUT, framed.send(ingest_refusal(r.code, r.detail, 0))).await;
            return None;
        }
        () = ticket.evicted() => return None,
        () = tokio::time::sleep_until(deadline) => {
            let detail = format!("no Hello within {:.1} s", shared.gate.limits().auth_timeout.as_secs_f64());
            let r = Refusal::new(pb::RefusalCode::ProtocolViolation, detail, 0);
            refuse_unauthenticated(&mut framed, shared, peer, "no Hello in time", r).await;
            return None;
        }
        f = framed.next() => f,
    };
    let hello = match first {
        None => return None,
        Some(Err(e)) => {
            let code = e.refusal_code().unwrap_or(pb::RefusalCode::MalformedFrame);
            let r = Refusal::new(code, untrusted(&e.to_string()), 0);
            refuse_unauthenticated(&mut framed, shared, peer, "bad first frame", r).await;
            return None;
        }
        Some(Ok(pb::ProducerFrame {
            body: Some(producer_frame::Body::Hello(h)),
        })) => h,
        Some(Ok(_)) => {
            let r = Refusal::new(
                pb::RefusalCode::ProtocolViolation,
                "the first frame must be a Hello",
                0,
            );
            refuse_unauthenticated(&mut framed, shared, peer, "first frame not a Hello", r).await;
            return None;
        }
    };
    match authenticate(&shared.slots, &hello) {
        Ok(slot) => Some((framed, slot, hello)),
        Err(r) => {
            let reason = if r.code == pb::RefusalCode::BadToken {
                "instrument or token not accepted"
            } else {
                "Hello refused"
            };
            refuse_unauthenticated(&mut framed, shared, peer, reason, r).await;
            None
        }
    }
}

async fn handle(
    tcp: TcpStream,
    peer: SocketAddr,
    ticket: Ticket,
    tls: Option<TlsAcceptor>,
    shared: Arc<IngestShared>,
    stop: CancellationToken,
) {
    let shared = &*shared;
    let metrics = &shared.metrics;
    let Some((mut framed, slot, hello)) = authenticate_peer(tcp, peer, &ticket, tls, shared, &stop).await
    else {
        return;
    };
    // Authenticated: out of the pool, and frames up to the configured limit from now on.
    ticket.authenticated();
    framed.codec_mut().set_max_frame(shared.max_frame);
    if slot
        .busy
        .compare_exchange(false, true, Ordering::AcqRel, Ordering::Acquire)
        .is_err()
    {
        let detail = format!("another producer is connected for instrument '{}'", slot.id);
        tracing::warn!(instrument = %slot.id, "refused: {detail}");
        metrics.refused_connections.fetch_add(1, Ordering::Relaxed);
        reply(
            &mut framed,
            ingest_refusal(pb::RefusalCode::InstrumentBusy, detail, 0),
        )
        .await;
        let _ = tokio::time::timeout(IO_TIMEOUT, framed.close()).await;
        return;
    }
    metrics.producers.fetch_add(1, Ordering::Relaxed);
    let _guard = BusyGuard(slot, metrics);
    let health = metrics.instrument_health(&slot.id);
    if let Some(h) = health {
        h.connected.store(true, Ordering::Relaxed);
    }
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
    tracing::info!(instrument = %slot.id, producer = %untrusted(&hello.producer), "producer connected");
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
        check: FrameCheck::new(
            slot.reorder_tolerance_ns,
            slot.max_clock_jump_ns,
            shared.max_future_ns,
        ),
        taken_seq: 0,
        acked_seq: 0,
        photons: 0,
        refused: 0,
        late: 0,
        late_unwarned: 0,
        last_late_warning: None,
        log_throttle: Throttle::default(),
        unacked: 0,
    };
    let why = conn.stream(&mut framed, &stop).await;
    // Whatever ended the stream, the time until the producer is back is dead time.
    let _ = slot.tx.send(EngineMsg::StreamBreak).await;
    if let Some(h) = health {
        h.connected.store(false, Ordering::Relaxed);
    }
    if stop.is_cancelled() {
        tracing::info!(
            instrument = %slot.id,
            %peer,
            photons = conn.photons,
            refused = conn.refused,
            late = conn.late,
            last_seq = conn.taken_seq,
            "producer disconnected: {why}"
        );
    } else {
        // The stream stopped while the daemon runs: the operator must see it (and the metric counts it).
        if let Some(h) = health {
            h.producers_gone.fetch_add(1, Ordering::Relaxed);
        }
        tracing::warn!(
            instrument = %slot.id,
            %peer,
            photons = conn.photons,
            refused = conn.refused,
            late = conn.late,
            last_seq = conn.taken_seq,
            "producer went away: {why}"
        );
    }
}

/// Lets one log line through per [`WARN_EVERY`], counting the ones held back.
#[derive(Debug, Default)]
struct Throttle {
    last: Option<Instant>,
    held_back: u64,
}

impl Throttle {
    /// `Some(lines held back since the last one)` when a line may be written now.
    fn allow(&mut self) -> Option<u64> {
        if self.last.is_some_and(|l| l.elapsed() < WARN_EVERY) {
            self.held_back += 1;
            return None;
        }
        self.last = Some(Instant::now());
        Some(std::mem::take(&mut self.held_back))
    }
}

struct Connection<'a> {
    slot: &'a Slot,
    shared: &'a IngestShared,
    check: FrameCheck,
    /// Highest seq handed to the engine.
    taken_seq: u64,
    acked_seq: u64,
    photons: u64,
    refused: u64,
    /// Photons taken but late, on this connection.
    late: u64,
    /// Late photons not yet told in a warning.
    late_unwarned: u64,
    last_late_warning: Option<Instant>,
    log_throttle: Throttle,
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
                late: self.late,
            })),
        }
    }

    async fn warn(&mut self, framed: &mut Conn, r: Refusal, photons: u64) -> bool {
        if let Some(held_back) = self.log_throttle.allow() {
            tracing::warn!(instrument = %self.slot.id, code = r.code.as_str_name(), seq = r.seq, held_back, "frame refused: {}", r.detail);
        }
        self.refused += photons;
        self.shared
            .metrics
            .refused_photons
            .fetch_add(photons, Ordering::Relaxed);
        if let Some(h) = self.shared.metrics.instrument_health(&self.slot.id) {
            h.refused.fetch_add(photons, Ordering::Relaxed);
        }
        self.shared.metrics.refused_frames.fetch_add(1, Ordering::Relaxed);
        reply(framed, ingest_refusal(r.code, r.detail, r.seq)).await
    }

    /// Tells the producer about late photons, at most once per [`WARN_EVERY`] unless `now` (the producer
    /// went quiet: what is left is told before the ack).
    async fn warn_late(&mut self, framed: &mut Conn, seq: u64, now: bool) -> bool {
        let throttled = self.last_late_warning.is_some_and(|l| l.elapsed() < WARN_EVERY);
        if self.late_unwarned == 0 || (throttled && !now) {
            return true;
        }
        self.last_late_warning = Some(Instant::now());
        let n = std::mem::take(&mut self.late_unwarned);
        let w = self.slot.clock().watermark.unwrap_or(0);
        let detail = format!(
            "{n} photon(s) arrived behind the watermark (now {w} ns GPS) and were dropped as late; {} on this connection so far",
            self.late
        );
        tracing::warn!(instrument = %self.slot.id, seq, late = n, "{detail}");
        reply(framed, ingest_refusal(pb::RefusalCode::LatePhotons, detail, seq)).await
    }

    /// Reads frames until the producer leaves, misbehaves, stalls mid-frame, or the daemon stops; returns
    /// why it ended.
    async fn stream(&mut self, framed: &mut Conn, stop: &CancellationToken) -> String {
        let metrics = &self.shared.metrics;
        let frame_timeout = self.shared.frame_timeout;
        let mut tick = tokio::time::interval((frame_timeout / 8).max(Duration::from_millis(10)));
        tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        // When a frame's first bytes were first seen waiting in the buffer.
        let mut partial_since: Option<Instant> = None;
        loop {
            let next = tokio::select! {
                biased;
                () = stop.cancelled() => {
                    if self.taken_seq > self.acked_seq {
                        let a = self.ack();
                        reply(framed, a).await;
                    }
                    let r = Refusal::new(pb::RefusalCode::ShuttingDown, "the daemon is shutting down", 0);
                    refuse_and_close(framed, metrics, r).await;
                    return "daemon shutting down".into();
                }
                f = framed.next() => f,
                () = tokio::time::sleep(ACK_WHEN_QUIET), if self.taken_seq > self.acked_seq => {
                    if !self.warn_late(framed, self.taken_seq, true).await {
                        return "warning not written".into();
                    }
                    let a = self.ack();
                    if !reply(framed, a).await {
                        return "ack not written".into();
                    }
                    continue;
                }
                _ = tick.tick() => {
                    if framed.read_buffer().is_empty() {
                        partial_since = None;
                    } else if partial_since.get_or_insert_with(Instant::now).elapsed() >= frame_timeout {
                        let detail = format!(
                            "a frame begun was not completed within {:.1} s (ingest.frame_timeout_s); the instrument is released",
                            frame_timeout.as_secs_f64()
                        );
                        refuse_and_close(framed, metrics, Refusal::new(pb::RefusalCode::ProtocolViolation, detail.clone(), 0)).await;
                        return detail;
                    }
                    continue;
                }
            };
            partial_since = None;
            let received = now_unix_ns();
            let frame = match next {
                None => return "end of stream".into(),
                Some(Err(e)) => match e.refusal_code() {
                    Some(code) => {
                        let detail = untrusted(&e.to_string());
                        refuse_and_close(framed, metrics, Refusal::new(code, detail.clone(), 0)).await;
                        return detail;
                    }
                    None => return e.to_string(),
                },
                Some(Ok(f)) => f,
            };
            let mut clock = self.slot.clock();
            let prev_seq = self.check.last_seq;
            let verdict = self.check.check(&frame, &mut clock, unix_ns_to_gps_ns(received));
            match verdict {
                Verdict::Close(r) => {
                    let detail = r.detail.clone();
                    refuse_and_close(framed, metrics, r).await;
                    return detail;
                }
                Verdict::Warn(r, photons) => {
                    if !self.warn(framed, r, photons).await {
                        return "warning not written".into();
                    }
                    continue;
                }
                Verdict::Take { late } => {
                    self.slot.set_clock(clock);
                    let (seq, n, msg) = match frame.body {
                        Some(producer_frame::Body::Batch(b)) => {
                            (b.seq, b.time_gps_ns.len() as u64, EngineMsg::Batch(b, received))
                        }
                        Some(producer_frame::Body::Status(s)) => (s.seq, 0, EngineMsg::Status(s, received)),
                        // The check takes only batches and status frames.
                        _ => continue,
                    };
                    if prev_seq != 0 && seq != prev_seq + 1 {
                        tracing::warn!(instrument = %self.slot.id, from = prev_seq, to = seq, "sequence gap: dead time until this frame");
                    }
                    // Waits while the engine's queue is full: the socket is not read meanwhile.
                    if self.slot.tx.send(msg).await.is_err() {
                        return "the engine has stopped".into();
                    }
                    self.taken(seq, n);
                    if let Some(h) = metrics.instrument_health(&self.slot.id) {
                        h.photons.fetch_add(n, Ordering::Relaxed);
                        h.late.fetch_add(late, Ordering::Relaxed);
                        h.last_frame_unix_ns.store(received, Ordering::Relaxed);
                    }
                    if late > 0 {
                        self.late += late;
                        self.late_unwarned += late;
                        metrics.late_photons.fetch_add(late, Ordering::Relaxed);
                    }
                    if !self.warn_late(framed, seq, false).await {
                        return "warning not written".into();
                    }
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
