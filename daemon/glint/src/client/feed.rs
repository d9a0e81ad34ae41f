//! `glint feed FILE --to HOST:PORT`: plays a `.glrec` recording into a running daemon as a producer would,
//! at real time, a multiple of it, or as fast as the socket takes it. The recording's `Hello` is replaced by
//! one carrying the given token; the daemon's acks are read alongside and the last one is reported with the
//! throughput at the end. The same code feeds the in-process demo from the simulator. A stream that ends
//! before the recording does (the daemon went away, the connection was reset or closed before the last ack)
//! is an error, with a message saying so, never a quiet success: a supervisor must see it and restart.

use std::str::FromStr;
use std::time::{Duration, Instant};

use anyhow::{anyhow, bail};
use futures::{SinkExt, StreamExt};
use glint_wire::pb::{self, ingest_reply, producer_frame};
use tokio::sync::mpsc;
use tokio_util::codec::Framed;

use crate::codec::{IngestClientCodec, refusal_name};
use crate::tls::{self, ClientTls};

/// How fast to play a stream.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) enum Speed {
    /// As fast as the daemon takes it.
    Max,
    /// This many times real time (event time).
    Times(f64),
}

impl FromStr for Speed {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        if s == "max" {
            return Ok(Self::Max);
        }
        match s.trim_end_matches('x').parse::<f64>() {
            Ok(v) if v.is_finite() && v > 0.0 => Ok(Self::Times(v)),
            _ => Err(format!(
                "'{s}' is not a speed: give a factor > 0 (e.g. 1, 20, 0.5) or 'max'"
            )),
        }
    }
}

impl std::fmt::Display for Speed {
    /// What [`FromStr`] reads back.
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Self::Max => f.write_str("max"),
            Self::Times(x) => write!(f, "{x}"),
        }
    }
}

/// What a feed did.
#[derive(Debug, Clone, Default, PartialEq)]
pub(crate) struct FeedReport {
    /// Frames sent after the Hello.
    pub(crate) frames: u64,
    /// Photons in the batches sent.
    pub(crate) photons: u64,
    /// Wall seconds from the Welcome to the final ack.
    pub(crate) wall_s: f64,
    /// The daemon's last ack: highest seq taken, photons taken, photons refused.
    pub(crate) acked_seq: u64,
    /// Photons the daemon says it took.
    pub(crate) acked_photons: u64,
    /// Photons the daemon refused.
    pub(crate) refused_photons: u64,
    /// Photons the daemon took but dropped as late.
    pub(crate) late_photons: u64,
    /// Warnings the daemon sent (code and detail).
    pub(crate) refusals: Vec<String>,
    /// The daemon's `Welcome.last_seq`: the highest seq it had already taken from this instrument.
    pub(crate) daemon_last_seq: u64,
    /// Frames not sent because the daemon had already taken them (seq at most `daemon_last_seq`).
    pub(crate) skipped_frames: u64,
    /// Photons in those frames.
    pub(crate) skipped_photons: u64,
}

impl FeedReport {
    /// Photons per wall second.
    pub(crate) fn photons_per_s(&self) -> f64 {
        if self.wall_s > 0.0 {
            self.photons as f64 / self.wall_s
        } else {
            0.0
        }
    }
}

/// Where a feed connects and as what.
#[derive(Clone)]
pub(crate) struct FeedTarget {
    /// `HOST:PORT`.
    pub(crate) addr: String,
    /// Producer token.
    pub(crate) token: String,
    /// Instrument to announce when the source has no Hello or it is overridden.
    pub(crate) instrument: Option<String>,
    /// Producer name.
    pub(crate) producer: String,
    /// TLS, when the daemon uses it.
    pub(crate) tls: Option<ClientTls>,
    /// Frame size limit.
    pub(crate) max_frame: usize,
    /// Resume after the daemon's `Welcome.last_seq` (skip the leading frames it already took); false sends
    /// everything from the start.
    pub(crate) resume: bool,
}

/// Event time a frame stands for: a batch's latest photon, a status frame's `now`.
fn event_time(f: &pb::ProducerFrame) -> Option<i64> {
    match &f.body {
        Some(producer_frame::Body::Batch(b)) => b.time_gps_ns.iter().copied().max(),
        Some(producer_frame::Body::Status(s)) => Some(s.now_gps_ns),
        _ => None,
    }
}

fn seq_of(f: &pb::ProducerFrame) -> u64 {
    match &f.body {
        Some(producer_frame::Body::Batch(b)) => b.seq,
        Some(producer_frame::Body::Status(s)) => s.seq,
        _ => 0,
    }
}

/// Plays the frames of `source` (produced on a blocking thread, so file reading or simulation never runs on
/// the runtime) into the daemon at `target`.
pub(crate) async fn feed<I>(source: I, target: &FeedTarget, speed: Speed) -> anyhow::Result<FeedReport>
where
    I: Iterator<Item = anyhow::Result<pb::ProducerFrame>> + Send + 'static,
{
    let (tx, mut rx) = mpsc::channel::<anyhow::Result<pb::ProducerFrame>>(256);
    let reader = tokio::task::spawn_blocking(move || {
        for f in source {
            let stop = f.is_err();
            if tx.blocking_send(f).is_err() || stop {
                return;
            }
        }
    });
    // The source's own Hello (if first) names the instrument; the token is always ours.
    let mut pending = None;
    let mut instrument = target.instrument.clone();
    match rx.recv().await {
        Some(Ok(pb::ProducerFrame {
            body: Some(producer_frame::Body::Hello(h)),
        })) => {
            instrument.get_or_insert(h.instrument);
        }
        Some(Ok(f)) => pending = Some(f),
        Some(Err(e)) => return Err(e),
        None => bail!("the recording holds no frame"),
    }
    let instrument = instrument
        .ok_or_else(|| anyhow!("the recording has no Hello: name the instrument with --instrument"))?;
    let io = tls::connect(&target.addr, target.tls.as_ref()).await?;
    let mut framed = Framed::new(io, IngestClientCodec::new(target.max_frame));
    let hello = pb::Hello {
        instrument: instrument.clone(),
        token: target.token.clone(),
        schema_version: glint_wire::SCHEMA_VERSION,
        producer: target.producer.clone(),
    };
    framed
        .send(pb::ProducerFrame {
            body: Some(producer_frame::Body::Hello(hello)),
        })
        .await
        .map_err(|e| anyhow!("sending the Hello to {}: {e}", target.addr))?;
    let daemon_last_seq = match tokio::time::timeout(Duration::from_secs(30), framed.next()).await {
        Err(_) => bail!("no reply to the Hello from {} within 30 s", target.addr),
        Ok(None) => bail!("{} closed the connection after the Hello", target.addr),
        Ok(Some(Err(e))) => bail!("reading from {}: {e}", target.addr),
        Ok(Some(Ok(r))) => match r.body {
            Some(ingest_reply::Body::Welcome(w)) => w.last_seq,
            Some(ingest_reply::Body::Refusal(r)) => {
                bail!(
                    "{} refused {instrument}: {} ({})",
                    target.addr,
                    refusal_name(r.code),
                    r.detail
                )
            }
            _ => bail!(
                "{} answered the Hello with something other than Welcome",
                target.addr
            ),
        },
    };
    let (mut sink, mut replies) = framed.split();
    // Replies are read alongside: acks and warnings, and a closing refusal. Once the last frame is sent its
    // seq arrives on `want_rx`, and the task ends when the daemon has acked it.
    let (want_tx, mut want_rx) = tokio::sync::watch::channel(u64::MAX);
    let reply_task = tokio::spawn(async move {
        let mut last = pb::Ack::default();
        let mut refusals = Vec::new();
        // Why the reply stream ended before the last ack, if it did.
        let mut ended = None;
        // Highest seq answered: acked, or refused with a warning (a refused frame is never acked).
        let mut answered = 0;
        loop {
            if last.seq.max(answered) >= *want_rx.borrow() {
                break;
            }
            tokio::select! {
                changed = want_rx.changed() => if changed.is_err() { break },
                r = replies.next() => match r {
                    Some(Ok(pb::IngestReply { body: Some(ingest_reply::Body::Ack(a)) })) => last = a,
                    Some(Ok(pb::IngestReply { body: Some(ingest_reply::Body::Refusal(r)) })) => {
                        answered = answered.max(r.seq);
                        refusals.push(format!("{} (seq {}): {}", refusal_name(r.code), r.seq, r.detail));
                    }
                    Some(Ok(_)) => {}
                    Some(Err(e)) => {
                        ended = Some(format!("reading replies failed: {e}"));
                        break;
                    }
                    None => {
                        ended = Some("the daemon closed the connection".to_string());
                        break;
                    }
                },
            }
        }
        (last, answered, refusals, ended)
    });
    // A socket error is the daemon going away, never a closed stdout: it must not look like one (the caller
    // treats a broken pipe on stdout as a normal end), so only its text is kept.
    let gone = |frames: u64, e: &dyn std::fmt::Display| {
        anyhow!(
            "the stream to {} ended after {frames} frames, before the recording did: {e}",
            target.addr
        )
    };
    let start = Instant::now();
    let mut t0: Option<i64> = None;
    let mut report = FeedReport {
        daemon_last_seq,
        ..FeedReport::default()
    };
    let mut last_seq = 0;
    // Leading frames the daemon already took (a restart of this feed, or of the daemon, whose state keeps the
    // number) are skipped until the first one past it; a Hello inside the recording starts a new numbering,
    // so skipping stops there too.
    let mut skipping = target.resume && daemon_last_seq > 0;
    loop {
        let next = match pending.take() {
            Some(f) => Some(Ok(f)),
            None => match rx.try_recv() {
                Ok(f) => Some(f),
                Err(mpsc::error::TryRecvError::Disconnected) => None,
                Err(mpsc::error::TryRecvError::Empty) => {
                    // Nothing ready: push what is buffered before waiting for the source.
                    sink.flush().await.map_err(|e| gone(report.frames, &e))?;
                    rx.recv().await
                }
            },
        };
        let Some(frame) = next else { break };
        let frame = frame?;
        if matches!(frame.body, Some(producer_frame::Body::Hello(_))) {
            // A Hello inside a recording marks a reconnect of the original producer; ours stays connected.
            skipping = false;
            continue;
        }
        if skipping {
            if seq_of(&frame) <= daemon_last_seq {
                report.skipped_frames += 1;
                if let Some(producer_frame::Body::Batch(b)) = &frame.body {
                    report.skipped_photons += b.time_gps_ns.len() as u64;
                }
                continue;
            }
            skipping = false;
        }
        if let (Speed::Times(x), Some(t)) = (speed, event_time(&frame)) {
            let t0 = *t0.get_or_insert(t);
            let due = Duration::from_secs_f64(((t - t0).max(0) as f64 / 1e9) / x);
            let elapsed = start.elapsed();
            if due > elapsed {
                sink.flush().await.map_err(|e| gone(report.frames, &e))?;
                tokio::time::sleep(due - elapsed).await;
            }
        }
        if let Some(producer_frame::Body::Batch(b)) = &frame.body {
            report.photons += b.time_gps_ns.len() as u64;
        }
        last_seq = last_seq.max(seq_of(&frame));
        report.frames += 1;
        if let Err(e) = sink.feed(frame).await {
            // The daemon hung up; its refusal, if it sent one, says why.
            let _ = want_tx.send(0);
            let why = match tokio::time::timeout(Duration::from_secs(2), reply_task).await {
                Ok(Ok((_, _, refusals, _))) if !refusals.is_empty() => refusals.join("; "),
                _ => e.to_string(),
            };
            return Err(gone(report.frames, &why));
        }
    }
    sink.flush().await.map_err(|e| gone(report.frames, &e))?;
    let _ = reader.await;
    // Wait for the ack of the last frame (the daemon acks when the producer goes quiet), then hang up.
    let _ = want_tx.send(last_seq);
    let (ack, answered, refusals, ended) =
        match tokio::time::timeout(Duration::from_secs(60), reply_task).await {
            Ok(Ok(r)) => r,
            Ok(Err(e)) => return Err(anyhow!("reply reader failed: {e}")),
            Err(_) => bail!("no ack of seq {last_seq} from {} within 60 s", target.addr),
        };
    if ack.seq.max(answered) < last_seq {
        let why = ended.unwrap_or_else(|| "no reason given".into());
        let told: String = refusals.iter().map(|r| format!("; daemon said: {r}")).collect();
        return Err(gone(
            report.frames,
            &format!(
                "{why}; the last ack was seq {} of {last_seq}, so frames may not have been taken{told}",
                ack.seq
            ),
        ));
    }
    report.wall_s = start.elapsed().as_secs_f64();
    report.acked_seq = ack.seq;
    report.acked_photons = ack.photons;
    report.refused_photons = ack.refused;
    report.late_photons = ack.late;
    report.refusals = refusals;
    let _ = sink.close().await;
    Ok(report)
}

/// Prints a feed's figures on stdout.
pub(crate) fn print_report(name: &str, r: &FeedReport) {
    println!(
        "fed {name}: {} frames, {} photons in {:.2} s ({:.0} photons/s); daemon acked seq {} ({} photons taken, {} refused, {} late)",
        r.frames,
        r.photons,
        r.wall_s,
        r.photons_per_s(),
        r.acked_seq,
        r.acked_photons,
        r.refused_photons,
        r.late_photons
    );
    if r.skipped_frames > 0 {
        println!(
            "  resumed after seq {} (the daemon had taken it before): skipped {} frames, {} photons",
            r.daemon_last_seq, r.skipped_frames, r.skipped_photons
        );
    }
    for w in &r.refusals {
        println!("  daemon warned: {w}");
    }
}
