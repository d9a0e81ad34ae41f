//! The daemon's telemetry: latency histograms per stage and end to end (hdrhistogram, nanoseconds), counters
//! of photons, frames, alerts and connections, and an optional plain-HTTP endpoint serving them in the
//! Prometheus text format. Memory is fixed: seven histograms and a handful of atomics.

use std::fmt::Write as _;
use std::sync::Mutex;
use std::sync::atomic::{AtomicI64, AtomicU64, Ordering};

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
}

impl Stage {
    const ALL: [Self; 7] = [
        Self::Decide,
        Self::Journal,
        Self::Send,
        Self::EndToEnd,
        Self::FlashDecide,
        Self::FlashEndToEnd,
        Self::BusAck,
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
    /// Empty counters and histograms.
    pub(crate) fn new() -> Self {
        let hists = Stage::ALL.iter().map(|_| latency_histogram()).collect();
        Self {
            hists: Mutex::new(hists),
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
        if from_unix_ns <= 0 || to_unix_ns < from_unix_ns {
            return;
        }
        let ns = u64::try_from(to_unix_ns - from_unix_ns)
            .unwrap_or(0)
            .clamp(1, MAX_TRACKED_NS);
        if let Ok(mut h) = self.hists.lock() {
            // Cannot fail: the value was clamped into the tracked range.
            let _ = h[stage.index()].record(ns);
        }
    }

    /// Percentiles of one stage so far.
    pub(crate) fn percentiles(&self, stage: Stage) -> Percentiles {
        self.hists
            .lock()
            .map(|h| Percentiles::of(&h[stage.index()]))
            .unwrap_or_default()
    }

    /// Counts an issued alert by its kind.
    pub(crate) fn count_alert(&self, kind: i32) {
        let i = match glint_wire::pb::AlertKind::try_from(kind) {
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
        ] {
            println!("{}", self.percentiles(stage).row(label));
        }
    }

    /// Everything in the Prometheus text exposition format.
    pub(crate) fn prometheus_text(&self) -> String {
        let mut s = String::new();
        let get = |a: &AtomicU64| a.load(Ordering::Relaxed);
        let counters = [
            (
                "glint_photons_total",
                "Photons taken into engine queues.",
                get(&self.photons),
            ),
            (
                "glint_refused_photons_total",
                "Photons in refused batches.",
                get(&self.refused_photons),
            ),
            (
                "glint_refused_frames_total",
                "Producer frames refused.",
                get(&self.refused_frames),
            ),
            (
                "glint_refused_connections_total",
                "Producer connections refused before authenticating (bad token, no Hello in time, evicted).",
                get(&self.refused_connections),
            ),
            (
                "glint_refused_subscriber_connections_total",
                "Subscriber connections refused before authenticating.",
                get(&self.refused_subscriber_connections),
            ),
            (
                "glint_bus_published_total",
                "Alerts the bus server acknowledged (duplicates included).",
                get(&self.bus_published),
            ),
            (
                "glint_bus_duplicates_total",
                "Alerts the bus already held under the same id.",
                get(&self.bus_duplicates),
            ),
            (
                "glint_bus_failures_total",
                "Bus publishes that failed and were retried.",
                get(&self.bus_failures),
            ),
            (
                "glint_late_photons_total",
                "Photons dropped as late (behind the instrument's watermark on arrival).",
                get(&self.late_photons),
            ),
            (
                "glint_photons_behind_resume_total",
                "Photons dropped after a restart as already searched (behind the instrument's resume point).",
                get(&self.photons_behind_resume),
            ),
            (
                "glint_subscribers_dropped_total",
                "Subscribers dropped for an unwritable socket.",
                get(&self.subscribers_dropped),
            ),
            (
                "glint_journal_fsyncs_total",
                "Journal fsyncs (each covers every alert queued while the previous one ran).",
                get(&self.journal_fsyncs),
            ),
            (
                "glint_email_sent_total",
                "Alert emails accepted by the relay (digests apart).",
                get(&self.email_sent),
            ),
            (
                "glint_email_digests_total",
                "Digest emails accepted by the relay, each for alerts held by a rate limit or quiet hours.",
                get(&self.email_digests),
            ),
            (
                "glint_email_rejected_total",
                "Emails the relay rejected for good (5xx); logged with recipient and alert ids, then skipped.",
                get(&self.email_rejected),
            ),
            (
                "glint_email_retries_total",
                "Email attempts that failed transiently (4xx, refused, timeout) and were retried.",
                get(&self.email_retries),
            ),
            (
                "glint_journal_damaged_total",
                "Damaged journal stretches found at open (quarantined, or a torn tail cut).",
                get(&self.journal_damaged),
            ),
            (
                "glint_journal_lost_seqs_total",
                "Sequence numbers whose alerts the journal had lost when it was opened.",
                get(&self.journal_lost_seqs),
            ),
        ];
        for (name, help, v) in counters {
            let _ = writeln!(s, "# HELP {name} {help}\n# TYPE {name} counter\n{name} {v}");
        }
        let _ = writeln!(
            s,
            "# HELP glint_alerts_total Alerts issued, by kind.\n# TYPE glint_alerts_total counter"
        );
        for (i, kind) in ["flash", "assessment", "withdrawal"].iter().enumerate() {
            let _ = writeln!(
                s,
                "glint_alerts_total{{kind=\"{kind}\"}} {}",
                get(&self.alerts[i])
            );
        }
        for (name, help, v) in [
            (
                "glint_producers",
                "Producers connected.",
                self.producers.load(Ordering::Relaxed),
            ),
            (
                "glint_subscribers",
                "Subscribers connected.",
                self.subscribers.load(Ordering::Relaxed),
            ),
            (
                "glint_disk_free_bytes",
                "Free bytes on the state directory's file system at the last check.",
                self.disk_free_bytes.load(Ordering::Relaxed),
            ),
        ] {
            let _ = writeln!(s, "# HELP {name} {help}\n# TYPE {name} gauge\n{name} {v}");
        }
        let _ = writeln!(
            s,
            "# HELP glint_latency_seconds Latency per stage, from frame receipt to subscriber socket.\n# TYPE glint_latency_seconds summary"
        );
        for stage in Stage::ALL {
            let p = self.percentiles(stage);
            let name = stage.name();
            for (q, v) in [
                ("0.5", p.p50_ms),
                ("0.99", p.p99_ms),
                ("0.999", p.p999_ms),
                ("1", p.max_ms),
            ] {
                let _ = writeln!(
                    s,
                    "glint_latency_seconds{{stage=\"{name}\",quantile=\"{q}\"}} {}",
                    v / 1e3
                );
            }
            let _ = writeln!(s, "glint_latency_seconds_count{{stage=\"{name}\"}} {}", p.count);
        }
        s
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
    fn percentiles_and_text_format() {
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
        m.count_alert(glint_wire::pb::AlertKind::Assessment as i32);
        let text = m.prometheus_text();
        assert!(
            text.contains("glint_alerts_total{kind=\"assessment\"} 1"),
            "{text}"
        );
        assert!(
            text.contains("glint_latency_seconds_count{stage=\"end_to_end\"} 1000"),
            "{text}"
        );
    }
}
