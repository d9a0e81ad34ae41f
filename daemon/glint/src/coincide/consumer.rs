//! `glint coincide` on the bus: a durable pull consumer of its own on the alert stream, each message decoded,
//! given to the [`Coincider`], its state saved (atomic write, fsync) and the joint alerts it completes
//! published back to the bus (`<prefix>.<name>.joint`, acknowledged) and printed as JSON lines, and only then
//! the message acknowledged: a crash at any point redelivers it, and the joint alert's id (made from what it
//! joins) lets the bus drop a second copy.

use std::io::Write as _;
use std::path::{Path, PathBuf};
use std::time::Duration;

use anyhow::{Context as _, anyhow};
use async_nats::jetstream::{self, consumer};
use futures::StreamExt;
use tokio_util::sync::CancellationToken;

use crate::coincide::{CoincideState, Coincider};
use crate::config::CoincideConfig;
use crate::natsbus;
use crate::timefmt::now_unix_ns;

/// Where coincide keeps its state.
pub(crate) fn state_path(cfg: &CoincideConfig) -> PathBuf {
    cfg.state_dir.join(format!("coincide-{}.json", cfg.consumer))
}

fn load_state(path: &Path) -> anyhow::Result<CoincideState> {
    match std::fs::read_to_string(path) {
        Ok(t) => {
            serde_json::from_str(&t).with_context(|| format!("{} is not coincide state", path.display()))
        }
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(CoincideState::default()),
        Err(e) => Err(e).with_context(|| format!("cannot read {}", path.display())),
    }
}

fn save_state(path: &Path, state: &CoincideState) -> anyhow::Result<()> {
    let tmp = path.with_extension("json.tmp");
    let mut f = std::fs::File::create(&tmp).with_context(|| format!("cannot write {}", tmp.display()))?;
    f.write_all(serde_json::to_string(state)?.as_bytes())?;
    f.sync_all()?;
    std::fs::rename(&tmp, path).with_context(|| format!("cannot write {}", path.display()))?;
    Ok(())
}

/// How the run ends.
#[derive(Debug, Clone, Copy)]
pub(crate) struct RunLimits {
    /// Stop after this long without a message (for batch runs and tests); `None`: run until `stop`.
    pub(crate) idle_exit: Option<Duration>,
}

/// Runs coincide until `stop` is cancelled (or it has been idle for `limits.idle_exit`); every joint alert is
/// handed to `emit` (the command prints it) after the bus acknowledged it. Returns how many were issued.
pub(crate) async fn run(
    cfg: CoincideConfig,
    limits: RunLimits,
    stop: CancellationToken,
    mut emit: impl FnMut(&glint_wire::pb::Alert),
) -> anyhow::Result<u64> {
    std::fs::create_dir_all(&cfg.state_dir)
        .with_context(|| format!("cannot create state_dir {}", cfg.state_dir.display()))?;
    let state_file = state_path(&cfg);
    let mut coincider = Coincider::new(cfg.clone(), load_state(&state_file)?);
    let client = natsbus::connect(&cfg.bus, "glint-coincide").await?;
    let js = natsbus::context(client.clone(), &cfg.bus);
    let mut issued = 0u64;
    let mut failures = 0usize;
    let mut last_message = tokio::time::Instant::now();
    'connect: loop {
        if stop.is_cancelled() {
            break;
        }
        let messages = async {
            natsbus::ensure_stream(&js, &cfg.bus).await?;
            let stream = js
                .get_stream(&cfg.bus.stream)
                .await
                .map_err(|e| anyhow!("stream {}: {e}", cfg.bus.stream))?;
            let consumer: consumer::PullConsumer = stream
                .get_or_create_consumer(
                    &cfg.consumer,
                    consumer::pull::Config {
                        durable_name: Some(cfg.consumer.clone()),
                        deliver_policy: consumer::DeliverPolicy::All,
                        ack_policy: consumer::AckPolicy::Explicit,
                        ack_wait: Duration::from_secs(30),
                        filter_subject: format!("{}.>", cfg.bus.subject_prefix),
                        ..Default::default()
                    },
                )
                .await
                .map_err(|e| anyhow!("consumer {}: {e}", cfg.consumer))?;
            consumer
                .messages()
                .await
                .map_err(|e| anyhow!("consumer {}: {e}", cfg.consumer))
        };
        let mut messages = match tokio::time::timeout(cfg.bus.ack_timeout * 2, messages).await {
            Ok(Ok(m)) => m,
            Ok(Err(e)) => {
                tracing::warn!("coincide: {e:#}");
                failures += 1;
                if !wait(&stop, natsbus::backoff(failures, cfg.bus.max_backoff)).await {
                    break;
                }
                continue;
            }
            Err(_) => {
                tracing::warn!("coincide: the bus did not answer");
                failures += 1;
                if !wait(&stop, natsbus::backoff(failures, cfg.bus.max_backoff)).await {
                    break;
                }
                continue;
            }
        };
        tracing::info!(stream = %cfg.bus.stream, consumer = %cfg.consumer, "coincide consuming");
        loop {
            let idle_left = limits
                .idle_exit
                .map(|d| (last_message + d).saturating_duration_since(tokio::time::Instant::now()));
            let next = tokio::select! {
                m = messages.next() => m,
                () = stop.cancelled() => break 'connect,
                () = sleep_opt(idle_left) => {
                    tracing::info!("coincide: idle; stopping");
                    break 'connect;
                }
            };
            let msg = match next {
                Some(Ok(m)) => m,
                Some(Err(e)) => {
                    tracing::warn!("coincide: {e}");
                    failures += 1;
                    if !wait(&stop, natsbus::backoff(failures, cfg.bus.max_backoff)).await {
                        break 'connect;
                    }
                    continue 'connect;
                }
                None => continue 'connect,
            };
            failures = 0;
            last_message = tokio::time::Instant::now();
            let alert = match natsbus::decode(&msg.payload) {
                Ok(a) => a,
                Err(e) => {
                    tracing::warn!(subject = %msg.subject, "not an alert; skipped: {e}");
                    let _ = msg.ack().await;
                    continue;
                }
            };
            let (joints, changed) = coincider.on_alert(&alert, now_unix_ns());
            // Joint alerts first, state after: a crash between the two redelivers the message, which joins
            // the same pair again under the same id, and the bus drops the copy.
            for j in &joints {
                publish_until_acknowledged(&js, &cfg, j, &stop).await?;
                emit(j);
                issued += 1;
            }
            if changed {
                save_state(&state_file, &coincider.state)?;
            }
            if let Err(e) = msg.double_ack().await {
                // Redelivered later: the state already holds it, so nothing is joined twice.
                tracing::warn!("coincide: acknowledging {}: {e}", alert.id);
            }
        }
    }
    client.flush().await.ok();
    Ok(issued)
}

/// Publishes a joint alert, retrying with backoff until the bus acknowledges it or `stop` is cancelled.
async fn publish_until_acknowledged(
    js: &jetstream::Context,
    cfg: &CoincideConfig,
    alert: &glint_wire::pb::Alert,
    stop: &CancellationToken,
) -> anyhow::Result<()> {
    let mut failures = 0;
    loop {
        match natsbus::publish(js, &cfg.bus, alert).await {
            Ok(_) => return Ok(()),
            Err(e) => {
                failures += 1;
                tracing::warn!("coincide: {e:#}");
                if !wait(stop, natsbus::backoff(failures, cfg.bus.max_backoff)).await {
                    return Err(e.context("stopped before the bus took a joint alert"));
                }
            }
        }
    }
}

/// Sleeps `d` unless `stop` comes first; false when stopped.
async fn wait(stop: &CancellationToken, d: Duration) -> bool {
    tokio::select! {
        () = tokio::time::sleep(d) => true,
        () = stop.cancelled() => false,
    }
}

async fn sleep_opt(d: Option<Duration>) {
    match d {
        Some(d) => tokio::time::sleep(d).await,
        None => std::future::pending().await,
    }
}
