//! The bus sink: every journalled alert published to NATS JetStream on `<prefix>.<instrument>.<kind>` as
//! protobuf `Alert` bytes with the alert id as `Nats-Msg-Id` (see `natsbus.rs`). Its cursor lives in
//! `state_dir/bus-<stream>.cursor` and moves only after the server acknowledged every alert up to it (atomic
//! write and fsync per chunk), so a crash republishes at most one chunk, which the server drops as duplicates.
//! Overflow policy: never dropped and nothing held in memory; a publish without acknowledgement within
//! `ack_timeout` is a failure, after which the sink waits (backoff) and resumes from its cursor.

use std::io::Write as _;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::sync::atomic::Ordering;
use std::time::Duration;

use anyhow::Context as _;
use async_nats::jetstream;
use glint_wire::pb;
use tokio_util::sync::CancellationToken;

use crate::config::BusConfig;
use crate::desk::Desk;
use crate::metrics::{Metrics, Stage};
use crate::natsbus;
use crate::sinks::{Idle, Overflow, Sink, SinkError, drive};
use crate::timefmt::now_unix_ns;

/// The bus sink's connection and cursor.
pub(crate) struct BusSink {
    js: jetstream::Context,
    client: async_nats::Client,
    cfg: BusConfig,
    cursor_file: PathBuf,
    /// Last sequence number acknowledged by the server and written to `cursor_file`.
    acked: u64,
    metrics: Arc<Metrics>,
}

/// Where the bus sink of `stream` keeps its cursor.
pub(crate) fn cursor_path(state_dir: &Path, stream: &str) -> PathBuf {
    state_dir.join(format!("bus-{stream}.cursor"))
}

/// Reads a cursor file; a missing file is cursor 0 (publish the whole journal kept).
pub(crate) fn read_cursor(path: &Path) -> anyhow::Result<u64> {
    match std::fs::read_to_string(path) {
        Ok(t) => t
            .trim()
            .parse()
            .with_context(|| format!("{} does not hold a sequence number", path.display())),
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(0),
        Err(e) => Err(e).with_context(|| format!("cannot read {}", path.display())),
    }
}

/// Writes a cursor durably: temporary file, fsync, rename, fsync of the directory (so the rename survives a
/// power cut too).
fn write_cursor(path: &Path, seq: u64) -> std::io::Result<()> {
    let tmp = path.with_extension("cursor.tmp");
    let mut f = std::fs::File::create(&tmp)?;
    f.write_all(format!("{seq}\n").as_bytes())?;
    f.sync_all()?;
    std::fs::rename(&tmp, path)?;
    if let Some(dir) = path.parent() {
        std::fs::File::open(dir)?.sync_all()?;
    }
    Ok(())
}

impl Sink for BusSink {
    fn name(&self) -> &str {
        "bus"
    }

    fn kind(&self) -> crate::metrics::SinkKind {
        crate::metrics::SinkKind::Bus
    }

    fn metrics(&self) -> &crate::metrics::Metrics {
        &self.metrics
    }

    fn overflow(&self) -> Overflow {
        // One step is one publish and its acknowledgement; the client's own timeout fires first.
        Overflow::RetryFromAcknowledged(self.cfg.ack_timeout + Duration::from_secs(1))
    }

    fn wants(&self, _alert: &pb::Alert) -> bool {
        true
    }

    async fn deliver(&mut self, alert: &pb::Alert) -> anyhow::Result<()> {
        // One alert in flight at a time: the stream keeps the journal's order even across a reconnection.
        let duplicate = natsbus::publish(&self.js, &self.cfg, alert).await?;
        let now = now_unix_ns();
        if let Some(l) = &alert.latency {
            self.metrics.record(Stage::BusAck, l.journaled_unix_ns, now);
        }
        self.metrics.bus_published.fetch_add(1, Ordering::Relaxed);
        if duplicate {
            self.metrics.bus_duplicates.fetch_add(1, Ordering::Relaxed);
            tracing::debug!(alert = %alert.id, "bus already held this alert");
        }
        Ok(())
    }

    async fn gap(&mut self, gap: &pb::Gap) -> anyhow::Result<()> {
        // The stream shows a gap as a jump in Glint-Seq; the operator hears of it here.
        tracing::warn!(
            sink = "bus",
            from = gap.from_seq,
            to = gap.to_seq,
            "alerts not in the journal are missing from the bus too: {}",
            gap.reason
        );
        Ok(())
    }

    async fn commit(&mut self, seq: u64) -> anyhow::Result<()> {
        if seq == self.acked {
            return Ok(());
        }
        // Every alert up to `seq` was acknowledged in `deliver`; only now may the cursor move.
        let path = self.cursor_file.clone();
        tokio::task::spawn_blocking(move || write_cursor(&path, seq))
            .await?
            .with_context(|| format!("cannot write {}", self.cursor_file.display()))?;
        self.acked = seq;
        Ok(())
    }

    async fn idle(&mut self) -> Result<Idle, SinkError> {
        // Nothing of its own to do while caught up: the client keeps the connection alive by itself.
        std::future::pending().await
    }

    async fn stalled(&mut self, err: &SinkError) {
        tracing::warn!(sink = "bus", "{err}");
    }

    async fn close(&mut self) -> anyhow::Result<()> {
        tokio::time::timeout(self.cfg.ack_timeout, self.client.flush())
            .await
            .context("flushing the bus connection timed out")?
            .context("flushing the bus connection")
    }

    fn acknowledged(&self) -> Option<u64> {
        Some(self.acked)
    }
}

/// Runs the bus sink until `closing` is cancelled: connects (in the background, with backoff), creates the
/// stream from its definition if configured, and publishes from the saved cursor on; after any failure it
/// waits (100 ms doubling up to `max_backoff`) and resumes from the acknowledged cursor. At shutdown it
/// publishes what is journalled while the bus answers, and otherwise leaves the rest to the next start.
pub(crate) async fn run(
    cfg: BusConfig,
    desk: Arc<Desk>,
    state_dir: PathBuf,
    metrics: Arc<Metrics>,
    closing: CancellationToken,
) {
    let cursor_file = cursor_path(&state_dir, &cfg.stream);
    let mut cursor = match read_cursor(&cursor_file) {
        Ok(c) if c > desk.last_seq() => {
            tracing::warn!(
                file = %cursor_file.display(),
                cursor = c,
                last_seq = desk.last_seq(),
                "bus cursor is ahead of the journal (a new journal?); publishing from its start"
            );
            0
        }
        Ok(c) => c,
        Err(e) => {
            tracing::error!("bus sink not started: {e:#}");
            return;
        }
    };
    let client = match natsbus::connect(&cfg, "glint-daemon").await {
        Ok(c) => c,
        Err(e) => {
            tracing::error!("bus sink not started: {e:#}");
            return;
        }
    };
    let js = natsbus::context(client.clone(), &cfg);
    tracing::info!(url = %cfg.url, stream = %cfg.stream, prefix = %cfg.subject_prefix, from = cursor, "bus sink starting");
    let mut failures = 0usize;
    let mut stream_ready = cfg.stream_file.is_none();
    loop {
        if !stream_ready {
            match natsbus::ensure_stream(&js, &cfg).await {
                Ok(()) => stream_ready = true,
                Err(e) => tracing::warn!("bus: {e:#}"),
            }
        }
        if stream_ready {
            let before = cursor;
            let mut sink = BusSink {
                js: js.clone(),
                client: client.clone(),
                cfg: cfg.clone(),
                cursor_file: cursor_file.clone(),
                acked: cursor,
                metrics: metrics.clone(),
            };
            match drive(&mut sink, &desk, &mut cursor, &closing).await {
                Ok(()) => {
                    tracing::info!(cursor, "bus sink closed");
                    return;
                }
                Err(e) => {
                    metrics.bus_failures.fetch_add(1, Ordering::Relaxed);
                    tracing::warn!(resume_after = cursor, "bus: {e}");
                    if cursor > before {
                        // It made progress before failing: start the backoff over.
                        failures = 0;
                    }
                }
            }
        }
        if closing.is_cancelled() {
            tracing::warn!(
                resume_after = cursor,
                "bus unreachable at shutdown; the next start publishes the rest from the journal"
            );
            return;
        }
        failures += 1;
        let wait = natsbus::backoff(failures, cfg.max_backoff);
        tokio::select! {
            () = tokio::time::sleep(wait) => {}
            () = closing.cancelled() => {}
        }
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap
mod tests {
    use super::*;

    #[test]
    fn cursor_round_trips_and_a_missing_one_is_zero() {
        let tmp = tempfile::tempdir().unwrap();
        let p = cursor_path(tmp.path(), "GLINT_ALERTS");
        assert_eq!(read_cursor(&p).unwrap(), 0);
        write_cursor(&p, 42).unwrap();
        assert_eq!(read_cursor(&p).unwrap(), 42);
        std::fs::write(&p, "not a number").unwrap();
        assert!(read_cursor(&p).is_err());
    }
}
