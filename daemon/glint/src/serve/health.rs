//! The health watch: every quarter second it asks each idle engine for fresh figures, works out each
//! instrument's photon rate, and notices silence (no frame for `ingest.silent_after_s`): a warning, a metric
//! and `/healthz` 503 until the next frame. At start it also computes each instrument's effective volume for
//! the running upper limit (docs/science.md section 5), off the async threads.

use std::sync::Arc;
use std::sync::atomic::Ordering;
use std::time::{Duration, Instant};

use glint_science::reach::{ReachParams, reach_report};
use tokio_util::sync::CancellationToken;

use crate::config::InstrumentConfig;
use crate::metrics::Metrics;
use crate::serve::ingest::{EngineMsg, IngestShared};
use crate::timefmt::now_unix_ns;

/// How often the watch looks.
const TICK: Duration = Duration::from_millis(250);
/// The photon rate is averaged over this window.
const RATE_WINDOW: Duration = Duration::from_secs(2);

/// Runs until `stop` is cancelled.
pub(crate) async fn watch(
    ingest: Arc<IngestShared>,
    metrics: Arc<Metrics>,
    silent_after: Duration,
    stop: CancellationToken,
) {
    let mut tick = tokio::time::interval(TICK);
    tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    // Per instrument: photon counts of the last RATE_WINDOW, oldest first.
    let mut history: Vec<std::collections::VecDeque<(Instant, u64)>> =
        metrics.instruments.iter().map(|_| Default::default()).collect();
    let limit_s = silent_after.as_secs_f64();
    loop {
        tokio::select! {
            () = stop.cancelled() => return,
            _ = tick.tick() => {}
        }
        for slot in &ingest.slots {
            // A full queue means a busy engine, which publishes on its own every 200 ms.
            let _ = slot.tx.try_send(EngineMsg::Health);
        }
        let now = Instant::now();
        let now_ns = now_unix_ns();
        for (h, hist) in metrics.instruments.iter().zip(&mut history) {
            let photons = h.photons.load(Ordering::Relaxed);
            hist.push_back((now, photons));
            while hist.len() > 2 && now.duration_since(hist[0].0) > RATE_WINDOW {
                hist.pop_front();
            }
            if let (Some(&(t0, n0)), true) = (hist.front(), hist.len() > 1) {
                let dt = now.duration_since(t0).as_secs_f64();
                if dt > 0.0 {
                    h.rate_hz.set(photons.saturating_sub(n0) as f64 / dt);
                }
            }
            let quiet_s = h.seconds_since_frame(now_ns);
            let silent = quiet_s >= limit_s;
            let was = h.silent.swap(silent, Ordering::Relaxed);
            if silent && !was {
                h.silences.fetch_add(1, Ordering::Relaxed);
                tracing::warn!(
                    instrument = %h.id,
                    quiet_s = format!("{quiet_s:.1}"),
                    connected = h.connected.load(Ordering::Relaxed),
                    "instrument silent: no frame for {quiet_s:.1} s (ingest.silent_after_s = {limit_s})"
                );
            } else if was && !silent {
                tracing::info!(instrument = %h.id, "instrument heard from again");
            }
        }
    }
}

/// Computes each instrument's effective volume (the reach machinery of `glint reach`) on a blocking thread
/// and stores it in its health record; an instrument whose volume cannot be computed is left at 0 (no limit)
/// with a warning.
pub(crate) fn effective_volumes(instruments: &[InstrumentConfig], metrics: &Arc<Metrics>) {
    let work: Vec<(String, glint_science::instrument::InstrumentSpec, ReachParams)> = instruments
        .iter()
        .map(|inst| {
            (
                inst.id.clone(),
                inst.spec.clone(),
                ReachParams {
                    far_per_year: inst.search.far_per_year,
                    timescales_s: inst.search.ladder_s.clone(),
                    search_radius_deg: inst.search.search_radius_deg,
                    zenith_deg: 0.0,
                    distances_pc: Vec::new(),
                },
            )
        })
        .collect();
    let metrics = metrics.clone();
    tokio::task::spawn_blocking(move || {
        for (id, spec, params) in work {
            match reach_report(&id, &spec, &params) {
                Ok(r) => {
                    if let Some(h) = metrics.instrument_health(&id) {
                        h.effective_volume_pc3.set(r.effective_volume_pc3);
                    }
                    tracing::debug!(instrument = %id, volume_pc3 = r.effective_volume_pc3, "effective volume");
                }
                Err(e) => {
                    tracing::warn!(instrument = %id, "no effective volume, so no running upper limit: {e}")
                }
            }
        }
    });
}
