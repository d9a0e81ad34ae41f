//! The daemon's telemetry: latency histograms per stage and end to end (hdrhistogram, nanoseconds), counters
//! of photons, frames, alerts and connections, each instrument's health and each sink's cursor; `http/` serves
//! them (Prometheus exposition, health, status). Memory is fixed: fourteen histograms (hdrhistogram for the
//! percentiles, prometheus-client's for `_bucket`/`_sum`/`_count`), a handful of atomics per instrument.

use std::sync::atomic::{AtomicBool, AtomicI64, AtomicU64, Ordering};
use std::sync::{Arc, Mutex, Weak};

use hdrhistogram::Histogram;

/// A stage of the path from a producer's frame to a subscriber's socket.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Stage {
    /// Frame read to finding decided. For a flash the frame is the one that brought the last of its photons
    /// to arrive, so the wait in the reorder stage counts; for an assessment it is the frame whose event time
    /// closed its persistence window, and the evaporation fit counts.
    Decide,
    /// Finding decided to journal record fsynced.
    Journal,
    /// Journal fsync to the alert frame handed to a subscriber's socket.
    Send,
    /// Frame read to the alert frame handed to a subscriber's socket.
    EndToEnd,
    /// `Decide` for flashes only (assessments include the evaporation fit).
    FlashDecide,
    /// `EndToEnd` for flashes only: the low-latency path the daemon exists for.
    FlashEndToEnd,
    /// Journal fsync to the bus server's acknowledgement of the publish (the bus sink).
    BusAck,
    /// `FlashEndToEnd` minus the time the flash waited on fdatasync calls (`Latency.fsync_wait_ns`): glint's
    /// own share of the path, apart from the host's disk.
    FlashOwn,
}

impl Stage {
    /// Every stage, in the order of the path.
    pub(crate) const ALL: [Self; 8] = [
        Self::Decide,
        Self::Journal,
        Self::Send,
        Self::EndToEnd,
        Self::FlashDecide,
        Self::FlashEndToEnd,
        Self::BusAck,
        Self::FlashOwn,
    ];

    fn index(self) -> usize {
        match self {
            Self::Decide => 0,
            Self::Journal => 1,
            Self::Send => 2,
            Self::EndToEnd => 3,
            Self::FlashDecide => 4,
            Self::FlashEndToEnd => 5,
            Self::BusAck => 6,
            Self::FlashOwn => 7,
        }
    }

    /// Name used in logs and the Prometheus labels.
    pub(crate) fn name(self) -> &'static str {
        match self {
            Self::Decide => "decide",
            Self::Journal => "journal",
            Self::Send => "send",
            Self::EndToEnd => "end_to_end",
            Self::FlashDecide => "flash_decide",
            Self::FlashEndToEnd => "flash_end_to_end",
            Self::BusAck => "bus_ack",
            Self::FlashOwn => "flash_own",
        }
    }
}

/// Percentiles of one latency histogram, milliseconds.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub(crate) struct Percentiles {
    /// Values recorded.
    pub(crate) count: u64,
    /// Median.
    pub(crate) p50_ms: f64,
    /// 99th percentile.
    pub(crate) p99_ms: f64,
    /// 99.9th percentile.
    pub(crate) p999_ms: f64,
    /// Largest.
    pub(crate) max_ms: f64,
}

impl Percentiles {
    /// Of a histogram of nanoseconds.
    pub(crate) fn of(h: &Histogram<u64>) -> Self {
        let ms = |ns: u64| ns as f64 / 1e6;
        Self {
            count: h.len(),
            p50_ms: ms(h.value_at_quantile(0.5)),
            p99_ms: ms(h.value_at_quantile(0.99)),
            p999_ms: ms(h.value_at_quantile(0.999)),
            max_ms: ms(h.max()),
        }
    }

    /// The heading of a table of [`row`](Self::row)s.
    pub(crate) fn header(title: &str) -> String {
        format!("{title:<27}n      p50      p99    p99.9      max")
    }

    /// One line of a latency table: label, count, p50, p99, p99.9, max.
    pub(crate) fn row(&self, label: &str) -> String {
        format!(
            "  {label:<19}{:>7} {:>8.3} {:>8.3} {:>8.3} {:>8.3}",
            self.count, self.p50_ms, self.p99_ms, self.p999_ms, self.max_ms
        )
    }
}

/// An empty latency histogram: nanoseconds, 3 significant digits, up to [`MAX_TRACKED_NS`].
pub(crate) fn latency_histogram() -> Histogram<u64> {
    Histogram::new_with_bounds(1, MAX_TRACKED_NS, 3).expect("constant histogram bounds are valid")
}

/// Counters and histograms shared by every part of the daemon.
#[derive(Debug)]
pub(crate) struct Metrics {
    hists: Mutex<Vec<Histogram<u64>>>,
    /// The same values in seconds, for the Prometheus histogram (`_bucket`, `_sum`, `_count`).
    prom_hists: Vec<prometheus_client::metrics::histogram::Histogram>,
    /// Each configured instrument's health, in configuration order.
    pub(crate) instruments: Vec<InstrumentHealth>,
    /// Live cursors of each kind of sink (see [`SinkKind`]), for the lag: one per running sink task.
    sink_cursors: [Mutex<Vec<Weak<AtomicU64>>>; 3],
    /// Alerts handed to a sink's peer, by sink kind and alert kind ([`DELIVERY_KINDS`]).
    deliveries: [[AtomicU64; 4]; 3],
    /// Assessments with the verdict `isolated` (consistent with a final burst): the count the running upper
    /// limit is set with.
    pub(crate) isolated: AtomicU64,
    /// Photons taken into engine queues.
    pub(crate) photons: AtomicU64,
    /// Photons in batches refused by validation.
    pub(crate) refused_photons: AtomicU64,
    /// Frames refused (validation, clock jump, protocol).
    pub(crate) refused_frames: AtomicU64,
    /// Producer connections refused before they authenticated (bad token, no Hello in time, evicted).
    pub(crate) refused_connections: AtomicU64,
    /// Subscriber connections refused before they authenticated.
    pub(crate) refused_subscriber_connections: AtomicU64,
    /// Photons taken but dropped as late (behind the instrument's watermark on arrival).
    pub(crate) late_photons: AtomicU64,
    /// Photons dropped after a restart because they lie behind the instrument's resume point (searched
    /// before the restart).
    pub(crate) photons_behind_resume: AtomicU64,
    /// Alerts issued, by kind: flash, assessment, withdrawal.
    pub(crate) alerts: [AtomicU64; 3],
    /// Producers connected now.
    pub(crate) producers: AtomicI64,
    /// Subscribers connected now.
    pub(crate) subscribers: AtomicI64,
    /// Subscribers dropped for an unwritable socket.
    pub(crate) subscribers_dropped: AtomicU64,
    /// Journal fsyncs by the desk's committer; alerts over fsyncs is how much group commit saves.
    pub(crate) journal_fsyncs: AtomicU64,
    /// Alerts the bus acknowledged (duplicates included).
    pub(crate) bus_published: AtomicU64,
    /// Of those, alerts the bus already held under the same id (republished after a restart or failure).
    pub(crate) bus_duplicates: AtomicU64,
    /// Bus publishes that failed (and were retried from the sink's cursor).
    pub(crate) bus_failures: AtomicU64,
    /// Emails the relay accepted, one per alert (digests counted apart).
    pub(crate) email_sent: AtomicU64,
    /// Digest emails the relay accepted (each stands for several alerts held back by a rate limit or quiet
    /// hours).
    pub(crate) email_digests: AtomicU64,
    /// Emails the relay rejected for good (5xx); logged with recipient and alert ids, then moved past.
    pub(crate) email_rejected: AtomicU64,
    /// Attempts that failed for a transient reason (4xx, refused, timeout) and were retried.
    pub(crate) email_retries: AtomicU64,
    /// Damaged stretches of the journal found (and quarantined) when it was opened, torn tail included.
    pub(crate) journal_damaged: AtomicU64,
    /// Sequence numbers whose alerts the journal lost (damage, missing segments), found when it was opened.
    pub(crate) journal_lost_seqs: AtomicU64,
    /// Free bytes on the state directory's file system at the last check.
    pub(crate) disk_free_bytes: AtomicI64,
}

/// Longest latency the histograms track: one hour in nanoseconds (longer values are clamped).
pub(crate) const MAX_TRACKED_NS: u64 = 3_600_000_000_000;

impl Default for Metrics {
    fn default() -> Self {
        Self::new()
    }
}

impl Metrics {
    /// Empty counters and histograms, no instruments.
    pub(crate) fn new() -> Self {
        Self::for_instruments(&[])
    }

    /// Empty counters and histograms, with a health record for each instrument id.
    pub(crate) fn for_instruments(ids: &[String]) -> Self {
        let hists = Stage::ALL.iter().map(|_| latency_histogram()).collect();
        // 50 us to about 105 s, doubling: the flash path's milliseconds and a slow relay's seconds alike.
        let prom_hists = Stage::ALL
            .iter()
            .map(|_| {
                prometheus_client::metrics::histogram::Histogram::new(
                    prometheus_client::metrics::histogram::exponential_buckets(5e-5, 2.0, 22),
                )
            })
            .collect();
        let now = crate::timefmt::now_unix_ns();
        Self {
            hists: Mutex::new(hists),
            prom_hists,
            instruments: ids.iter().map(|id| InstrumentHealth::new(id, now)).collect(),
            sink_cursors: Default::default(),
            deliveries: Default::default(),
            isolated: AtomicU64::new(0),
            photons: AtomicU64::new(0),
            refused_photons: AtomicU64::new(0),
            bus_published: AtomicU64::new(0),
            bus_duplicates: AtomicU64::new(0),
            bus_failures: AtomicU64::new(0),
            refused_frames: AtomicU64::new(0),
            refused_connections: AtomicU64::new(0),
            refused_subscriber_connections: AtomicU64::new(0),
            late_photons: AtomicU64::new(0),
            photons_behind_resume: AtomicU64::new(0),
            alerts: [AtomicU64::new(0), AtomicU64::new(0), AtomicU64::new(0)],
            producers: AtomicI64::new(0),
            subscribers: AtomicI64::new(0),
            subscribers_dropped: AtomicU64::new(0),
            journal_fsyncs: AtomicU64::new(0),
            email_sent: AtomicU64::new(0),
            email_digests: AtomicU64::new(0),
            email_rejected: AtomicU64::new(0),
            email_retries: AtomicU64::new(0),
            journal_damaged: AtomicU64::new(0),
            journal_lost_seqs: AtomicU64::new(0),
            disk_free_bytes: AtomicI64::new(0),
        }
    }

    /// Records one latency between two wall-clock stamps (Unix ns). Absent (0) or reversed stamps are not
    /// recorded: a clock step must not put a negative value in a histogram.
    pub(crate) fn record(&self, stage: Stage, from_unix_ns: i64, to_unix_ns: i64) {
        if from_unix_ns > 0 {
            self.record_span(stage, to_unix_ns.saturating_sub(from_unix_ns));
        }
    }

    /// Records a span already measured, nanoseconds; a negative one (a clock step) is not recorded.
    pub(crate) fn record_span(&self, stage: Stage, ns: i64) {
        let Ok(ns) = u64::try_from(ns) else { return };
        let ns = ns.clamp(1, MAX_TRACKED_NS);
        if let Ok(mut h) = self.hists.lock() {
            // Cannot fail: the value was clamped into the tracked range.
            let _ = h[stage.index()].record(ns);
        }
        self.prom_hists[stage.index()].observe(ns as f64 / 1e9);
    }

    /// The Prometheus histogram of one stage (seconds).
    pub(crate) fn prom_histogram(&self, stage: Stage) -> &prometheus_client::metrics::histogram::Histogram {
        &self.prom_hists[stage.index()]
    }

    /// The health record of instrument `id`.
    pub(crate) fn instrument_health(&self, id: &str) -> Option<&InstrumentHealth> {
        self.instruments.iter().find(|h| h.id == id)
    }

    /// Registers a running sink's cursor; its lag is read from it while the returned handle lives.
    pub(crate) fn sink_cursor(&self, kind: SinkKind, start: u64) -> Arc<AtomicU64> {
        let c = Arc::new(AtomicU64::new(start));
        if let Ok(mut v) = self.sink_cursors[kind as usize].lock() {
            v.retain(|w| w.strong_count() > 0);
            v.push(Arc::downgrade(&c));
        }
        c
    }

    /// The slowest running cursor of a kind of sink and how many of that kind run; `None` when none runs.
    pub(crate) fn slowest_cursor(&self, kind: SinkKind) -> Option<(u64, usize)> {
        let v = self.sink_cursors[kind as usize].lock().ok()?;
        let live: Vec<u64> = v
            .iter()
            .filter_map(Weak::upgrade)
            .map(|c| c.load(Ordering::Relaxed))
            .collect();
        live.iter().min().map(|m| (*m, live.len()))
    }

    /// Counts one alert handed to a sink's peer.
    pub(crate) fn count_delivery(&self, sink: SinkKind, kind: i32) {
        if let Some(i) = delivery_index(kind) {
            self.deliveries[sink as usize][i].fetch_add(1, Ordering::Relaxed);
        }
    }

    /// Alerts of `DELIVERY_KINDS[i]` handed to peers of `sink`.
    pub(crate) fn deliveries(&self, sink: SinkKind, i: usize) -> u64 {
        self.deliveries[sink as usize][i].load(Ordering::Relaxed)
    }

    /// Failures of a kind of sink: subscribers dropped, emails rejected or retried, bus publishes failed.
    pub(crate) fn sink_failures(&self, sink: SinkKind) -> u64 {
        let get = |a: &AtomicU64| a.load(Ordering::Relaxed);
        match sink {
            SinkKind::Subscribers => get(&self.subscribers_dropped),
            SinkKind::Email => get(&self.email_rejected) + get(&self.email_retries),
            SinkKind::Bus => get(&self.bus_failures),
        }
    }

    /// Percentiles of one stage so far.
    pub(crate) fn percentiles(&self, stage: Stage) -> Percentiles {
        self.hists
            .lock()
            .map(|h| Percentiles::of(&h[stage.index()]))
            .unwrap_or_default()
    }

    /// Counts an issued alert by its kind (and an `isolated` assessment for the running upper limit).
    pub(crate) fn count_alert(&self, alert: &glint_wire::pb::Alert) {
        if alert
            .assessment
            .as_ref()
            .is_some_and(|a| a.verdict == glint_wire::pb::Verdict::Isolated as i32)
        {
            self.isolated.fetch_add(1, Ordering::Relaxed);
        }
        let i = match glint_wire::pb::AlertKind::try_from(alert.kind) {
            Ok(glint_wire::pb::AlertKind::Flash) => 0,
            Ok(glint_wire::pb::AlertKind::Assessment) => 1,
            Ok(glint_wire::pb::AlertKind::Withdrawal) => 2,
            _ => return,
        };
        self.alerts[i].fetch_add(1, Ordering::Relaxed);
    }

    /// Prints the latency table of every stage of the flash's path (demo and bench).
    pub(crate) fn print_latency(&self) {
        println!("{}", Percentiles::header("latency (ms)"));
        for (label, stage) in [
            ("receipt -> decided", Stage::Decide),
            ("decided -> fsynced", Stage::Journal),
            ("fsynced -> socket", Stage::Send),
            ("receipt -> socket", Stage::EndToEnd),
            ("flashes: -> decided", Stage::FlashDecide),
            ("flashes: -> socket", Stage::FlashEndToEnd),
            ("flashes: own share", Stage::FlashOwn),
        ] {
            println!("{}", self.percentiles(stage).row(label));
        }
    }
}

/// The kinds of journal consumer, as labelled in the metrics.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum SinkKind {
    /// Socket subscribers (`sinks/subscribers.rs`).
    Subscribers = 0,
    /// Email recipients (`sinks/email/`).
    Email = 1,
    /// The message bus (`sinks/bus.rs`).
    Bus = 2,
}

impl SinkKind {
    /// Every kind, in label order.
    pub(crate) const ALL: [Self; 3] = [Self::Subscribers, Self::Email, Self::Bus];

    /// The `sink` label.
    pub(crate) fn name(self) -> &'static str {
        match self {
            Self::Subscribers => "subscribers",
            Self::Email => "email",
            Self::Bus => "bus",
        }
    }
}

/// Alert kinds counted per delivery, by index.
pub(crate) const DELIVERY_KINDS: [&str; 4] = ["flash", "assessment", "withdrawal", "test"];

fn delivery_index(kind: i32) -> Option<usize> {
    use glint_wire::pb::AlertKind;
    match AlertKind::try_from(kind).ok()? {
        AlertKind::Flash => Some(0),
        AlertKind::Assessment => Some(1),
        AlertKind::Withdrawal => Some(2),
        AlertKind::Test => Some(3),
        _ => None,
    }
}

/// An `f64` kept in an atomic as its bits.
#[derive(Debug, Default)]
pub(crate) struct AtomicF64(AtomicU64);

impl AtomicF64 {
    /// Stores `v`.
    pub(crate) fn set(&self, v: f64) {
        self.0.store(v.to_bits(), Ordering::Relaxed);
    }

    /// The value stored last (0.0 at first).
    pub(crate) fn get(&self) -> f64 {
        f64::from_bits(self.0.load(Ordering::Relaxed))
    }
}

/// One instrument's health: written by ingest (frames, photons, connections), its engine thread (watermark,
/// dead and live time, candidates) and the health watch (rate, silence); read by `http/`.
#[derive(Debug)]
pub(crate) struct InstrumentHealth {
    /// Instrument id (the `instrument` label).
    pub(crate) id: String,
    /// Photons taken into the engine queue.
    pub(crate) photons: AtomicU64,
    /// Of those, photons dropped as late (behind the watermark on arrival).
    pub(crate) late: AtomicU64,
    /// Photons in refused batches.
    pub(crate) refused: AtomicU64,
    /// Host clock (Unix ns) of the last frame taken, or of the daemon's start before the first.
    pub(crate) last_frame_unix_ns: AtomicI64,
    /// A producer is connected.
    pub(crate) connected: AtomicBool,
    /// Producers that went away (any reason but the daemon's own shutdown).
    pub(crate) producers_gone: AtomicU64,
    /// Silent past `ingest.silent_after_s` now.
    pub(crate) silent: AtomicBool,
    /// Times it fell silent.
    pub(crate) silences: AtomicU64,
    /// Photons per second over the last few seconds (host clock), set by the health watch.
    pub(crate) rate_hz: AtomicF64,
    /// The engine's watermark (event time), GPS ns; 0 before the first photon.
    pub(crate) watermark_gps_ns: AtomicI64,
    /// Dead time the engine recorded since the daemon started, ns (event time).
    pub(crate) dead_ns: AtomicI64,
    /// Of that, dead time recorded since the host clock's UTC midnight, ns.
    pub(crate) dead_today_ns: AtomicI64,
    /// Live time (searched, dead time removed) since the daemon started, ns.
    pub(crate) live_ns: AtomicI64,
    /// Candidates awaiting their assessment.
    pub(crate) open_candidates: AtomicU64,
    /// The instrument's effective volume for a final burst (pc^3), once computed at start; 0 until then.
    pub(crate) effective_volume_pc3: AtomicF64,
}

impl InstrumentHealth {
    fn new(id: &str, now_unix_ns: i64) -> Self {
        Self {
            id: id.to_string(),
            photons: AtomicU64::new(0),
            late: AtomicU64::new(0),
            refused: AtomicU64::new(0),
            last_frame_unix_ns: AtomicI64::new(now_unix_ns),
            connected: AtomicBool::new(false),
            producers_gone: AtomicU64::new(0),
            silent: AtomicBool::new(false),
            silences: AtomicU64::new(0),
            rate_hz: AtomicF64::default(),
            watermark_gps_ns: AtomicI64::new(0),
            dead_ns: AtomicI64::new(0),
            dead_today_ns: AtomicI64::new(0),
            live_ns: AtomicI64::new(0),
            open_candidates: AtomicU64::new(0),
            effective_volume_pc3: AtomicF64::default(),
        }
    }

    /// Seconds since the last frame taken (or since the start, before the first), by the host clock.
    pub(crate) fn seconds_since_frame(&self, now_unix_ns: i64) -> f64 {
        (now_unix_ns - self.last_frame_unix_ns.load(Ordering::Relaxed)).max(0) as f64 / 1e9
    }

    /// How far the engine's event time is behind the host clock, seconds; `None` before the first photon.
    pub(crate) fn event_lag_s(&self, now_gps_ns: i64) -> Option<f64> {
        let w = self.watermark_gps_ns.load(Ordering::Relaxed);
        (w != 0).then(|| (now_gps_ns - w) as f64 / 1e9)
    }
}

/// Each instrument's event time (engine watermark), published by the engine threads for heartbeats.
#[derive(Debug)]
pub(crate) struct Watermarks {
    names: Vec<String>,
    values: Vec<AtomicI64>,
}

impl Watermarks {
    /// One zeroed watermark per instrument, in configuration order.
    pub(crate) fn new(names: Vec<String>) -> Self {
        let values = names.iter().map(|_| AtomicI64::new(0)).collect();
        Self { names, values }
    }

    /// Sets instrument `i`'s watermark, GPS ns.
    pub(crate) fn set(&self, i: usize, gps_ns: i64) {
        if let Some(v) = self.values.get(i) {
            v.store(gps_ns, Ordering::Relaxed);
        }
    }

    pub(crate) fn snapshot(&self) -> (Vec<String>, Vec<i64>) {
        (
            self.names.clone(),
            self.values.iter().map(|v| v.load(Ordering::Relaxed)).collect(),
        )
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn percentiles_and_prometheus_histogram() {
        let m = Metrics::new();
        // 1..=1000 microseconds: p50 about 0.5 ms, max 1 ms (hdrhistogram keeps 3 significant digits).
        for us in 1..=1000_i64 {
            m.record(Stage::EndToEnd, 1_000, 1_000 + us * 1_000);
        }
        // Absent and reversed stamps are ignored.
        m.record(Stage::EndToEnd, 0, 5);
        m.record(Stage::EndToEnd, 10, 5);
        let p = m.percentiles(Stage::EndToEnd);
        assert_eq!(p.count, 1000);
        assert!((p.p50_ms - 0.5).abs() < 0.002, "{p:?}");
        assert!((p.p99_ms - 0.99).abs() < 0.002, "{p:?}");
        assert!((p.max_ms - 1.0).abs() < 0.002, "{p:?}");
        // The Prometheus histograms carry the same values in seconds, with their count and sum.
        let mut r = prometheus_client::registry::Registry::default();
        r.register("e2e", "end to end", m.prom_histogram(Stage::EndToEnd).clone());
        r.register("decide", "decide", m.prom_histogram(Stage::Decide).clone());
        let mut text = String::new();
        prometheus_client::encoding::text::encode(&mut text, &r).unwrap();
        assert!(text.contains("\ne2e_count 1000\n"), "{text}");
        // Sum of 1..=1000 microseconds in seconds.
        assert!(text.contains("\ne2e_sum 0.5005"), "{text}");
        assert!(text.contains("\ndecide_count 0\n"), "{text}");
    }
}
