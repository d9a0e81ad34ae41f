//! The figures `/status`, `/healthz`, the status page and `glint status` show: per instrument its stream and
//! engine, per sink its lag, the alert counts and last alerts (with their photon times, for light curves),
//! the latency percentiles, and the running upper limit on the burst rate density (docs/science.md section
//! 5, "Running limit"). One serde type, written by the daemon and read back by `glint status`.

use std::sync::atomic::Ordering;

use glint_science::hawking::YEAR_S;
use glint_science::limits::{gehrels_upper, rate_density_upper_limit};
use glint_wire::pb;
use serde::{Deserialize, Serialize};

use crate::alerts::{kind_name, verdict_name};
use crate::desk::Desk;
use crate::metrics::{InstrumentHealth, Metrics, SinkKind, Stage};
use crate::timefmt::{gps_ns_to_utc, now_unix_ns, unix_ns_to_gps_ns};

/// Confidence level of the running upper limit.
pub(crate) const LIMIT_CL: f64 = 0.9;
/// Last alerts shown on the status page.
const RECENT: u64 = 8;

/// Everything `/status` answers.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub(crate) struct Status {
    /// `glint` and its version.
    pub(crate) server: String,
    /// Host clock, UTC.
    pub(crate) now_utc: String,
    /// Seconds since the daemon started.
    pub(crate) uptime_s: f64,
    /// `ingest.silent_after_s`.
    pub(crate) silent_after_s: f64,
    /// No instrument silent.
    pub(crate) healthy: bool,
    /// Per instrument, in configuration order.
    pub(crate) instruments: Vec<InstrumentStatus>,
    /// Per kind of sink.
    pub(crate) sinks: Vec<SinkStatus>,
    /// Alerts issued since the start, by kind.
    pub(crate) alerts: AlertCounts,
    /// Latency percentiles per stage.
    pub(crate) latency: Vec<StageLatency>,
    /// The running upper limit.
    pub(crate) limit: RunningLimit,
    /// The last alerts journalled, newest first.
    pub(crate) recent: Vec<RecentAlert>,
}

/// One instrument's stream and engine.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub(crate) struct InstrumentStatus {
    pub(crate) id: String,
    pub(crate) connected: bool,
    pub(crate) photons: u64,
    pub(crate) late: u64,
    pub(crate) refused: u64,
    pub(crate) rate_hz: f64,
    /// The engine's event time, UTC; absent before the first photon.
    pub(crate) watermark_utc: Option<String>,
    /// Host clock minus the watermark, seconds.
    pub(crate) event_lag_s: Option<f64>,
    pub(crate) seconds_since_frame: f64,
    pub(crate) silent: bool,
    pub(crate) open_candidates: u64,
    pub(crate) dead_s: f64,
    pub(crate) dead_today_s: f64,
    pub(crate) live_s: f64,
    pub(crate) producers_gone: u64,
    pub(crate) silences: u64,
    pub(crate) effective_volume_pc3: f64,
}

/// One kind of sink.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub(crate) struct SinkStatus {
    pub(crate) sink: String,
    /// Sink tasks running (subscribers connected, recipients, the bus).
    pub(crate) running: usize,
    /// Alerts journalled but not handed over by the slowest of them.
    pub(crate) lag: u64,
    pub(crate) failures: u64,
    /// Flashes handed to its peers (one per peer and flash).
    pub(crate) flash_deliveries: u64,
}

/// Alerts issued, one per alert.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub(crate) struct AlertCounts {
    pub(crate) flash: u64,
    pub(crate) assessment: u64,
    pub(crate) withdrawal: u64,
    /// Assessments with the verdict isolated.
    pub(crate) isolated: u64,
    /// The newest sequence number journalled.
    pub(crate) last_seq: u64,
}

/// Percentiles of one stage, milliseconds.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub(crate) struct StageLatency {
    pub(crate) stage: String,
    pub(crate) count: u64,
    pub(crate) p50_ms: f64,
    pub(crate) p99_ms: f64,
    pub(crate) p999_ms: f64,
    pub(crate) max_ms: f64,
}

/// The running upper limit on the local burst rate density.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub(crate) struct RunningLimit {
    pub(crate) cl: f64,
    /// Live time summed over instruments, seconds.
    pub(crate) live_s: f64,
    /// Sum over instruments of effective volume times live time, pc^3 yr.
    pub(crate) exposure_pc3_yr: f64,
    /// Isolated assessments so far (the n of the Gehrels limit).
    pub(crate) isolated: u64,
    /// Gehrels upper limit on the mean count for that n.
    pub(crate) mu_ul: f64,
    /// Per pc^3 per year; absent while the exposure is zero.
    pub(crate) rate_density_ul_per_pc3_yr: Option<f64>,
}

/// One of the last alerts.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub(crate) struct RecentAlert {
    pub(crate) seq: u64,
    pub(crate) id: String,
    pub(crate) kind: String,
    pub(crate) instrument: String,
    pub(crate) issued_utc: String,
    /// For assessments.
    pub(crate) verdict: Option<String>,
    pub(crate) sigma_post_trials: Option<f64>,
    /// Trigger window length, seconds.
    pub(crate) timescale_s: Option<f64>,
    /// The trigger's photon times relative to the window's end, milliseconds (the light curve).
    pub(crate) photon_offsets_ms: Vec<f64>,
}

/// The running limit from the instruments' live time and effective volume: `mu_UL(n) / sum_i V_i T_i` with
/// `n` the isolated assessments (docs/science.md section 5).
pub(crate) fn running_limit(m: &Metrics) -> RunningLimit {
    let mut live_s = 0.0;
    let mut exposure = 0.0;
    for h in &m.instruments {
        let t = h.live_ns.load(Ordering::Relaxed).max(0) as f64 / 1e9;
        live_s += t;
        exposure += h.effective_volume_pc3.get() * t / YEAR_S;
    }
    let isolated = m.isolated.load(Ordering::Relaxed);
    let mu_ul = gehrels_upper(isolated, LIMIT_CL).unwrap_or(f64::NAN);
    RunningLimit {
        cl: LIMIT_CL,
        live_s,
        exposure_pc3_yr: exposure,
        isolated,
        mu_ul,
        rate_density_ul_per_pc3_yr: rate_density_upper_limit(mu_ul, exposure, 1.0).ok(),
    }
}

fn instrument_status(h: &InstrumentHealth, now: i64) -> InstrumentStatus {
    let w = h.watermark_gps_ns.load(Ordering::Relaxed);
    let secs = |a: &std::sync::atomic::AtomicI64| a.load(Ordering::Relaxed) as f64 / 1e9;
    InstrumentStatus {
        id: h.id.clone(),
        connected: h.connected.load(Ordering::Relaxed),
        photons: h.photons.load(Ordering::Relaxed),
        late: h.late.load(Ordering::Relaxed),
        refused: h.refused.load(Ordering::Relaxed),
        rate_hz: h.rate_hz.get(),
        watermark_utc: (w != 0).then(|| gps_ns_to_utc(w)),
        event_lag_s: h.event_lag_s(unix_ns_to_gps_ns(now)),
        seconds_since_frame: h.seconds_since_frame(now),
        silent: h.silent.load(Ordering::Relaxed),
        open_candidates: h.open_candidates.load(Ordering::Relaxed),
        dead_s: secs(&h.dead_ns),
        dead_today_s: secs(&h.dead_today_ns),
        live_s: secs(&h.live_ns),
        producers_gone: h.producers_gone.load(Ordering::Relaxed),
        silences: h.silences.load(Ordering::Relaxed),
        effective_volume_pc3: h.effective_volume_pc3.get(),
    }
}

fn recent_alert(a: &pb::Alert) -> RecentAlert {
    let t = a.trigger.as_ref();
    RecentAlert {
        seq: a.seq,
        id: a.id.clone(),
        kind: kind_name(a.kind).to_string(),
        instrument: a.instrument.clone(),
        issued_utc: a.issued_utc.clone(),
        verdict: a.assessment.as_ref().map(|s| verdict_name(s.verdict).to_string()),
        sigma_post_trials: t.map(|t| t.sigma_post_trials),
        timescale_s: t.map(|t| t.timescale_s),
        photon_offsets_ms: t
            .map(|t| {
                t.photon_time_gps_ns
                    .iter()
                    .map(|p| (p - t.end_gps_ns) as f64 / 1e6)
                    .collect()
            })
            .unwrap_or_default(),
    }
}

/// The status now.
pub(crate) fn build(m: &Metrics, desk: &Desk, uptime_s: f64, silent_after_s: f64) -> Status {
    let now = now_unix_ns();
    let instruments: Vec<InstrumentStatus> =
        m.instruments.iter().map(|h| instrument_status(h, now)).collect();
    let last_seq = desk.last_seq();
    let sinks = SinkKind::ALL
        .iter()
        .map(|&k| {
            let slowest = m.slowest_cursor(k);
            SinkStatus {
                sink: k.name().to_string(),
                running: slowest.map_or(0, |(_, n)| n),
                lag: slowest.map_or(0, |(c, _)| last_seq.saturating_sub(c)),
                failures: m.sink_failures(k),
                flash_deliveries: m.deliveries(k, 0),
            }
        })
        .collect();
    let get = |i: usize| m.alerts[i].load(Ordering::Relaxed);
    let latency = Stage::ALL
        .iter()
        .map(|&s| {
            let p = m.percentiles(s);
            StageLatency {
                stage: s.name().to_string(),
                count: p.count,
                p50_ms: p.p50_ms,
                p99_ms: p.p99_ms,
                p999_ms: p.p999_ms,
                max_ms: p.max_ms,
            }
        })
        .collect();
    // From the desk's tail in memory only: the page must never wait on the disk.
    let mut recent: Vec<RecentAlert> = desk
        .read_cached(last_seq.saturating_sub(RECENT), RECENT as usize)
        .unwrap_or_default()
        .iter()
        .map(|a| recent_alert(a))
        .collect();
    recent.reverse();
    Status {
        server: format!("glint {}", env!("CARGO_PKG_VERSION")),
        now_utc: gps_ns_to_utc(unix_ns_to_gps_ns(now)),
        uptime_s,
        silent_after_s,
        healthy: !instruments.iter().any(|i| i.silent),
        instruments,
        sinks,
        alerts: AlertCounts {
            flash: get(0),
            assessment: get(1),
            withdrawal: get(2),
            isolated: m.isolated.load(Ordering::Relaxed),
            last_seq,
        },
        latency,
        limit: running_limit(m),
        recent,
    }
}

/// `/healthz`: whether every instrument is heard from, and one line per instrument saying why.
pub(crate) fn health_text(m: &Metrics, silent_after_s: f64) -> (bool, String) {
    let now = now_unix_ns();
    let mut ok = true;
    let mut text = String::new();
    for h in &m.instruments {
        let quiet = h.seconds_since_frame(now);
        if h.silent.load(Ordering::Relaxed) {
            ok = false;
            let who = if h.connected.load(Ordering::Relaxed) {
                "producer connected"
            } else {
                "no producer connected"
            };
            text.push_str(&format!(
                "instrument {}: silent, no frame for {quiet:.1} s (limit {silent_after_s} s, {who})\n",
                h.id
            ));
        } else {
            text.push_str(&format!("instrument {}: ok, last frame {quiet:.1} s ago\n", h.id));
        }
    }
    let head = if ok { "ok\n" } else { "unhealthy\n" };
    (ok, format!("{head}{text}"))
}
