//! Sinks: the consumers of the alert journal. Every sink keeps one contract, [`Sink`]: its own cursor into
//! the desk, a stated overflow policy, and a bounded shutdown. [`drive`] runs that contract for any sink, so
//! a slow or absent sink never holds back the desk, ingest or another sink, and a new sink (email, a message
//! bus) is one file beside `subscribers.rs` that implements the trait. A sink whose peer acknowledges durably
//! (the bus, `bus.rs`) reports its acknowledged cursor through [`Sink::acknowledged`], and `drive` hands that
//! back after a failure, so the caller resumes from what the peer holds rather than from what was sent.

use std::sync::Arc;
use std::sync::atomic::Ordering;
use std::time::Duration;

use glint_wire::pb;
use tokio_util::sync::CancellationToken;

use crate::desk::Desk;
use crate::metrics::{Metrics, SinkKind};

pub(crate) mod bus;
pub(crate) mod email;
pub(crate) mod subscribers;

/// Alerts read from the desk per step of a cursor; bounds the memory one sink holds at a time.
const READ_CHUNK: usize = 256;

/// What a sink does when it cannot keep up with the journal. Nothing queues in memory without bound: the
/// journal is the queue, and each sink only holds its cursor into it.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Overflow {
    /// Dropped when no alert could be handed over for this long (time without progress, not time per
    /// chunk, so a slow but steady reader is never dropped); the peer resumes later from its own cursor.
    DropWhenStalled(Duration),
    /// Never dropped: a step without progress for this long is a failure, after which the sink's owner
    /// reconnects with backoff and resumes from [`Sink::acknowledged`] (the journal holds what is behind).
    RetryFromAcknowledged(Duration),
    /// Never dropped: the sink keeps its cursor on disk, so the journal is its queue for as long as retention
    /// keeps it, and each step may take as long as its retries need. At shutdown it gets `grace` to deliver
    /// what was journalled, then stops wherever it is and resumes from its cursor at the next start (an
    /// item cut off mid-delivery is delivered again: at-least-once).
    Resume {
        /// Time allowed after shutdown begins.
        grace: Duration,
    },
}

/// Why a sink stopped.
#[derive(Debug, thiserror::Error)]
pub(crate) enum SinkError {
    /// No alert could be handed over for the overflow policy's time; the sink's cursor says where it got to.
    #[error("no progress for {:.1} s; dropped (resume after seq {resume_after})", .stalled.as_secs_f64())]
    Stalled {
        /// The stall limit that was reached.
        stalled: Duration,
        /// The last sequence number handed over before the stall.
        resume_after: u64,
    },
    /// The peer went away or its connection failed.
    #[error("{0:#}")]
    Peer(anyhow::Error),
    /// The journal could not be read.
    #[error("reading the journal: {0:#}")]
    Journal(anyhow::Error),
}

/// What woke an idle sink.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Idle {
    /// Its own timer fired (a heartbeat went out, say); keep going.
    Ticked,
    /// The peer closed its side; the sink ends normally.
    PeerClosed,
}

/// The contract of a journal consumer. [`drive`] calls `deliver` for each wanted alert in sequence order,
/// `commit` after each chunk, `idle` while caught up, and `close` once on shutdown.
pub(crate) trait Sink {
    /// How the sink is named in logs.
    fn name(&self) -> &str;

    /// Which kind of sink it is, for its cursor lag and delivery counts.
    fn kind(&self) -> SinkKind;

    /// The daemon's counters, where `drive` keeps the sink's cursor and deliveries.
    fn metrics(&self) -> &Metrics;

    /// The sink's overflow policy.
    fn overflow(&self) -> Overflow;

    /// Whether the sink wants this alert at all; alerts it does not want still move its cursor.
    fn wants(&self, alert: &pb::Alert) -> bool;

    /// Hands one alert over (written to a socket's buffer, sent, published). Progress is measured per
    /// alert, so this must return as soon as this one alert is taken.
    async fn deliver(&mut self, alert: &pb::Alert) -> anyhow::Result<()>;

    /// Numbers the journal cannot deliver (damage, a lost segment, retention, numbers never issued), in their
    /// place in the sequence: tell the peer, never skip silently. The cursor moves past `gap.to_seq` after.
    async fn gap(&mut self, gap: &pb::Gap) -> anyhow::Result<()>;

    /// Everything up to `seq` has been delivered: flush, and keep the cursor if the sink keeps one.
    async fn commit(&mut self, seq: u64) -> anyhow::Result<()>;

    /// Waits, while caught up, for something of the sink's own (a heartbeat due, the peer gone). It may be
    /// cut short by a new alert, so it must only wait; work that must not be cut off goes in `housekeep`.
    async fn idle(&mut self) -> Result<Idle, SinkError>;

    /// Work of the sink's own that is due (a digest whose rate limit has passed), run after each catch-up
    /// under the same overflow policy as `deliver`.
    async fn housekeep(&mut self) -> anyhow::Result<()> {
        Ok(())
    }

    /// Stalled under its overflow policy: a last word to the peer saying why and where to resume,
    /// best effort and bounded.
    async fn stalled(&mut self, err: &SinkError);

    /// The daemon is closing: last words and close, bounded in time.
    async fn close(&mut self) -> anyhow::Result<()>;

    /// The last sequence number the peer has acknowledged and the sink has kept durably, for a sink whose
    /// cursor moves only on acknowledgement; `None` (the default) for a sink whose cursor is what it sent.
    fn acknowledged(&self) -> Option<u64> {
        None
    }
}

/// Runs `sink` from `cursor` (the last sequence number it has) until the peer leaves, the sink stalls, or
/// `closing` is cancelled (then everything journalled so far is delivered before `close`, within the grace
/// of a [`Overflow::Resume`] sink). `cursor` is left at the last sequence number handed over, or, after a
/// failure of a sink that keeps an acknowledged cursor, at that cursor.
pub(crate) async fn drive<S: Sink>(
    sink: &mut S,
    desk: &Arc<Desk>,
    cursor: &mut u64,
    closing: &CancellationToken,
) -> Result<(), SinkError> {
    let result = drive_from(sink, desk, cursor, closing).await;
    if result.is_err() {
        if let Some(acked) = sink.acknowledged() {
            *cursor = acked;
        }
    }
    result
}

async fn drive_from<S: Sink>(
    sink: &mut S,
    desk: &Arc<Desk>,
    cursor: &mut u64,
    closing: &CancellationToken,
) -> Result<(), SinkError> {
    let policy = sink.overflow();
    // For a resuming sink: resolves once shutdown began and its grace ran out.
    let stop = async {
        closing.cancelled().await;
        if let Overflow::Resume { grace } = policy {
            tokio::time::sleep(grace).await;
        }
    };
    tokio::pin!(stop);
    let mut watch = desk.watch();
    let mut shutting_down = false;
    // The cursor as the health figures see it (lag = newest journalled - slowest cursor of the kind).
    let shown = sink.metrics().sink_cursor(sink.kind(), *cursor);
    loop {
        shown.store(*cursor, Ordering::Relaxed);
        // Catch up to the newest published alert, one bounded chunk at a time.
        while *cursor < desk.last_seq() {
            let chunk = read_chunk(desk, *cursor).await?;
            let Some(newest) = chunk.last().map(|a| a.seq) else {
                // The next number is not in the journal: the desk says how far the gap goes and why.
                let Some(gap) = gap_after(desk, *cursor).await? else {
                    continue; // published meanwhile: read again
                };
                tracing::warn!(sink = sink.name(), from = gap.from_seq, to = gap.to_seq, reason = %gap.reason, "sending a gap: these alerts are not in the journal");
                match step(policy, *cursor, &mut stop, sink.gap(&gap)).await {
                    Ok(true) => {}
                    Ok(false) => return stopped(sink, *cursor).await,
                    Err(e) => return Err(last_word(sink, e).await),
                }
                match step(policy, *cursor, &mut stop, sink.commit(gap.to_seq)).await {
                    Ok(true) => {}
                    Ok(false) => return stopped(sink, *cursor).await,
                    Err(e) => return Err(last_word(sink, e).await),
                }
                *cursor = gap.to_seq;
                continue;
            };
            for a in &chunk {
                if !sink.wants(a) {
                    continue;
                }
                match step(policy, *cursor, &mut stop, sink.deliver(a)).await {
                    Ok(true) => {}
                    Ok(false) => return stopped(sink, *cursor).await,
                    Err(e) => return Err(last_word(sink, e).await),
                }
                sink.metrics().count_delivery(sink.kind(), a.kind);
                // Handed over: a stall from here on resumes after this one.
                *cursor = a.seq;
            }
            match step(policy, *cursor, &mut stop, sink.commit(newest)).await {
                Ok(true) => {}
                Ok(false) => return stopped(sink, *cursor).await,
                Err(e) => return Err(last_word(sink, e).await),
            }
            *cursor = newest;
            shown.store(newest, Ordering::Relaxed);
        }
        match step(policy, *cursor, &mut stop, sink.housekeep()).await {
            Ok(true) => {}
            Ok(false) => return stopped(sink, *cursor).await,
            Err(e) => return Err(last_word(sink, e).await),
        }
        if shutting_down {
            return sink.close().await.map_err(SinkError::Peer);
        }
        tokio::select! {
            changed = watch.changed() => {
                if changed.is_err() {
                    shutting_down = true;
                }
            }
            idle = sink.idle() => match idle {
                Ok(Idle::Ticked) => {}
                Ok(Idle::PeerClosed) => return Ok(()),
                Err(e) => return Err(last_word(sink, e).await),
            },
            () = closing.cancelled() => shutting_down = true,
        }
    }
}

/// One step of a sink under its overflow policy: within the stall limit, or (for a resuming sink) until its
/// shutdown grace runs out. `Ok(false)`: cut off by shutdown.
async fn step(
    policy: Overflow,
    cursor: u64,
    stop: &mut std::pin::Pin<&mut impl Future<Output = ()>>,
    work: impl Future<Output = anyhow::Result<()>>,
) -> Result<bool, SinkError> {
    match policy {
        Overflow::DropWhenStalled(stall) | Overflow::RetryFromAcknowledged(stall) => {
            within(stall, cursor, work).await.map(|()| true)
        }
        Overflow::Resume { .. } => tokio::select! {
            r = work => r.map(|()| true).map_err(SinkError::Peer),
            () = stop.as_mut() => Ok(false),
        },
    }
}

/// A resuming sink cut off by shutdown keeps its cursor (best effort, bounded) and ends normally.
async fn stopped<S: Sink>(sink: &mut S, cursor: u64) -> Result<(), SinkError> {
    tracing::info!(
        sink = sink.name(),
        cursor,
        "stopped by shutdown; resumes from its cursor"
    );
    let _ = tokio::time::timeout(Duration::from_secs(2), sink.commit(cursor)).await;
    Ok(())
}

/// One step of a sink, which must finish within the stall limit.
async fn within(
    stall: Duration,
    cursor: u64,
    step: impl Future<Output = anyhow::Result<()>>,
) -> Result<(), SinkError> {
    match tokio::time::timeout(stall, step).await {
        Ok(r) => r.map_err(SinkError::Peer),
        Err(_) => Err(SinkError::Stalled {
            stalled: stall,
            resume_after: cursor,
        }),
    }
}

/// A stalled sink says why to its peer before it is dropped.
async fn last_word<S: Sink>(sink: &mut S, err: SinkError) -> SinkError {
    if matches!(err, SinkError::Stalled { .. }) {
        sink.stalled(&err).await;
    }
    err
}

/// The gap a sink at `after` has reached (blocking I/O on its own thread); `None` if there is none after all.
async fn gap_after(desk: &Arc<Desk>, after: u64) -> Result<Option<pb::Gap>, SinkError> {
    let desk = desk.clone();
    tokio::task::spawn_blocking(move || desk.gap_after(after))
        .await
        .map_err(|e| SinkError::Journal(e.into()))?
        .map_err(|e| SinkError::Journal(e.into()))
}

/// The next chunk after `after`: from the desk's in-memory tail when it still holds it, else from disk on a
/// blocking thread.
async fn read_chunk(desk: &Arc<Desk>, after: u64) -> Result<Vec<Arc<pb::Alert>>, SinkError> {
    if let Some(c) = desk.read_cached(after, READ_CHUNK) {
        return Ok(c);
    }
    let desk = desk.clone();
    tokio::task::spawn_blocking(move || desk.read_from_disk(after, READ_CHUNK))
        .await
        .map_err(|e| SinkError::Journal(e.into()))?
        .map_err(|e| SinkError::Journal(e.into()))
}
