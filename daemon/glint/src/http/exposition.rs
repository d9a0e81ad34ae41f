//! `/metrics`: every counter, gauge and latency histogram of the daemon, encoded by the `prometheus-client`
//! crate (OpenMetrics text, which Prometheus reads) through one [`Collector`] that reads the atomics at scrape
//! time, so the hot paths keep their plain counters. Names and meanings are listed in README's "Operations:
//! health and metrics"; `_total` is added to counters by the encoder.

use std::fmt;
use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};

use prometheus_client::collector::Collector;
use prometheus_client::encoding::{DescriptorEncoder, EncodeLabelSet, EncodeMetric};
use prometheus_client::metrics::MetricType;
use prometheus_client::metrics::counter::ConstCounter;
use prometheus_client::metrics::gauge::ConstGauge;
use prometheus_client::registry::Registry;

use crate::desk::Desk;
use crate::http::status;
use crate::metrics::{DELIVERY_KINDS, Metrics, SinkKind, Stage};
use crate::timefmt::{now_unix_ns, unix_ns_to_gps_ns};

/// The daemon's metrics as a prometheus-client collector.
#[derive(Debug)]
pub(crate) struct DaemonCollector {
    pub(crate) metrics: Arc<Metrics>,
    pub(crate) desk: Arc<Desk>,
}

/// A registry holding the daemon's collector.
pub(crate) fn registry(metrics: Arc<Metrics>, desk: Arc<Desk>) -> Registry {
    let mut r = Registry::default();
    r.register_collector(Box::new(DaemonCollector { metrics, desk }));
    r
}

/// The exposition text of `registry`.
pub(crate) fn text(registry: &Registry) -> Result<String, fmt::Error> {
    let mut out = String::new();
    prometheus_client::encoding::text::encode(&mut out, registry)?;
    Ok(out)
}

fn counter(e: &mut DescriptorEncoder, name: &str, help: &str, v: u64) -> fmt::Result {
    ConstCounter::new(v).encode(e.encode_descriptor(name, help, None, MetricType::Counter)?)
}

fn gauge(e: &mut DescriptorEncoder, name: &str, help: &str, v: f64) -> fmt::Result {
    ConstGauge::new(v).encode(e.encode_descriptor(name, help, None, MetricType::Gauge)?)
}

/// A sample: whole counts print as integers, measured quantities as floats.
#[derive(Debug, Clone, Copy)]
enum V {
    N(u64),
    F(f64),
}

/// One labelled family; `is_counter` picks the type.
fn family<L: EncodeLabelSet>(
    e: &mut DescriptorEncoder,
    name: &str,
    help: &str,
    is_counter: bool,
    rows: &[(L, V)],
) -> fmt::Result {
    let kind = if is_counter {
        MetricType::Counter
    } else {
        MetricType::Gauge
    };
    let mut m = e.encode_descriptor(name, help, None, kind)?;
    for (labels, v) in rows {
        let f = m.encode_family(labels)?;
        match (*v, is_counter) {
            (V::N(n), true) => ConstCounter::new(n).encode(f)?,
            (V::F(x), true) => ConstCounter::new(x).encode(f)?,
            (V::N(n), false) => ConstGauge::new(i64::try_from(n).unwrap_or(i64::MAX)).encode(f)?,
            (V::F(x), false) => ConstGauge::new(x).encode(f)?,
        }
    }
    Ok(())
}

impl Collector for DaemonCollector {
    fn encode(&self, mut e: DescriptorEncoder) -> fmt::Result {
        let m = &*self.metrics;
        let get = |a: &AtomicU64| a.load(Ordering::Relaxed);
        for (name, help, v) in [
            (
                "glint_photons",
                "Photons taken into engine queues (late ones included).",
                get(&m.photons),
            ),
            (
                "glint_refused_photons",
                "Photons in refused batches.",
                get(&m.refused_photons),
            ),
            (
                "glint_refused_frames",
                "Producer frames refused.",
                get(&m.refused_frames),
            ),
            (
                "glint_refused_connections",
                "Producer connections refused before authenticating (bad token, no Hello in time, evicted).",
                get(&m.refused_connections),
            ),
            (
                "glint_refused_subscriber_connections",
                "Subscriber connections refused before authenticating.",
                get(&m.refused_subscriber_connections),
            ),
            (
                "glint_late_photons",
                "Photons dropped as late (behind the instrument's watermark on arrival).",
                get(&m.late_photons),
            ),
            (
                "glint_photons_behind_resume",
                "Photons dropped after a restart as already searched (behind the instrument's resume point).",
                get(&m.photons_behind_resume),
            ),
            (
                "glint_bus_published",
                "Alerts the bus server acknowledged (duplicates included).",
                get(&m.bus_published),
            ),
            (
                "glint_bus_duplicates",
                "Alerts the bus already held under the same id.",
                get(&m.bus_duplicates),
            ),
            (
                "glint_bus_failures",
                "Bus publishes that failed and were retried.",
                get(&m.bus_failures),
            ),
            (
                "glint_subscribers_dropped",
                "Subscribers dropped for an unwritable socket.",
                get(&m.subscribers_dropped),
            ),
            (
                "glint_journal_fsyncs",
                "Journal fsyncs (each covers every alert queued while the previous one ran).",
                get(&m.journal_fsyncs),
            ),
            (
                "glint_email_sent",
                "Alert emails accepted by the relay (digests apart).",
                get(&m.email_sent),
            ),
            (
                "glint_email_digests",
                "Digest emails accepted by the relay, each for alerts held by a rate limit or quiet hours.",
                get(&m.email_digests),
            ),
            (
                "glint_email_rejected",
                "Emails the relay rejected for good (5xx); logged with recipient and alert ids, then skipped.",
                get(&m.email_rejected),
            ),
            (
                "glint_email_retries",
                "Email attempts that failed transiently (4xx, refused, timeout) and were retried.",
                get(&m.email_retries),
            ),
            (
                "glint_journal_damaged",
                "Damaged journal stretches found at open (quarantined, or a torn tail cut).",
                get(&m.journal_damaged),
            ),
            (
                "glint_journal_lost_seqs",
                "Sequence numbers whose alerts the journal had lost when it was opened.",
                get(&m.journal_lost_seqs),
            ),
            (
                "glint_isolated_assessments",
                "Assessments with the verdict isolated (the count the running upper limit is set with).",
                get(&m.isolated),
            ),
        ] {
            counter(&mut e, name, help, v)?;
        }
        let alerts: Vec<([(&str, &str); 1], V)> = ["flash", "assessment", "withdrawal"]
            .iter()
            .enumerate()
            .map(|(i, k)| ([("kind", *k)], V::N(get(&m.alerts[i]))))
            .collect();
        family(
            &mut e,
            "glint_alerts",
            "Alerts issued, one per alert, by kind (deliveries are glint_deliveries_total).",
            true,
            &alerts,
        )?;
        let mut deliveries = Vec::new();
        for sink in SinkKind::ALL {
            for (i, k) in DELIVERY_KINDS.iter().enumerate() {
                deliveries.push(([("sink", sink.name()), ("kind", *k)], V::N(m.deliveries(sink, i))));
            }
        }
        family(
            &mut e,
            "glint_deliveries",
            "Alerts handed to a sink's peers, one per peer and alert (a flash sent to three subscribers counts 3).",
            true,
            &deliveries,
        )?;
        let newest = self.desk.last_seq();
        let mut lag = Vec::new();
        let mut running = Vec::new();
        let mut failures = Vec::new();
        for sink in SinkKind::ALL {
            let slowest = m.slowest_cursor(sink);
            let l = slowest.map_or(0, |(c, _)| newest.saturating_sub(c));
            lag.push(([("sink", sink.name())], V::N(l)));
            running.push((
                [("sink", sink.name())],
                V::N(slowest.map_or(0, |(_, n)| n) as u64),
            ));
            failures.push(([("sink", sink.name())], V::N(m.sink_failures(sink))));
        }
        family(
            &mut e,
            "glint_sink_cursor_lag",
            "Alerts journalled but not yet handed over by the slowest running sink of the kind.",
            false,
            &lag,
        )?;
        family(
            &mut e,
            "glint_sink_running",
            "Sink tasks running, by kind.",
            false,
            &running,
        )?;
        family(
            &mut e,
            "glint_sink_failures",
            "Failures by kind of sink: subscribers dropped, emails rejected or retried, bus publishes failed.",
            true,
            &failures,
        )?;
        self.encode_instruments(&mut e)?;
        for (name, help, v) in [
            (
                "glint_producers",
                "Producers connected.",
                m.producers.load(Ordering::Relaxed),
            ),
            (
                "glint_subscribers",
                "Subscribers connected.",
                m.subscribers.load(Ordering::Relaxed),
            ),
            (
                "glint_disk_free_bytes",
                "Free bytes on the state directory's file system at the last check.",
                m.disk_free_bytes.load(Ordering::Relaxed),
            ),
        ] {
            ConstGauge::new(v).encode(e.encode_descriptor(name, help, None, MetricType::Gauge)?)?;
        }
        let limit = status::running_limit(m);
        gauge(
            &mut e,
            "glint_exposure_pc3_years",
            "Live time times effective volume, summed over instruments, pc^3 yr.",
            limit.exposure_pc3_yr,
        )?;
        if let Some(ul) = limit.rate_density_ul_per_pc3_yr {
            gauge(
                &mut e,
                "glint_rate_density_upper_limit",
                "Running 90% CL upper limit on the local burst rate density, per pc^3 per year.",
                ul,
            )?;
        }
        let mut h = e.encode_descriptor(
            "glint_latency_seconds",
            "Latency per stage: decide and journal once per alert, send and end_to_end once per subscriber delivery, bus_ack once per publish, flash_own (flash_end_to_end minus its fsync wait, glint's own share) once per flash delivery.",
            None,
            MetricType::Histogram,
        )?;
        for stage in Stage::ALL {
            let labels = [("stage", stage.name())];
            let f = h.encode_family(&labels)?;
            m.prom_histogram(stage).encode(f)?;
        }
        Ok(())
    }
}

/// A per-instrument family: name, help, and the figure of one instrument.
type Figure<'a> = (
    &'a str,
    &'a str,
    &'a dyn Fn(&crate::metrics::InstrumentHealth) -> V,
);

impl DaemonCollector {
    fn encode_instruments(&self, e: &mut DescriptorEncoder) -> fmt::Result {
        let now = now_unix_ns();
        let now_gps = unix_ns_to_gps_ns(now);
        let rows = |f: &dyn Fn(&crate::metrics::InstrumentHealth) -> V| -> Vec<([(&str, &str); 1], V)> {
            self.metrics
                .instruments
                .iter()
                .map(|h| ([("instrument", h.id.as_str())], f(h)))
                .collect()
        };
        let ld = |a: &AtomicU64| V::N(a.load(Ordering::Relaxed));
        let s = |a: &std::sync::atomic::AtomicI64| V::F(a.load(Ordering::Relaxed) as f64 / 1e9);
        let counters: [Figure<'_>; 7] = [
            (
                "glint_instrument_photons",
                "Photons taken from the instrument's producer (late ones included).",
                &|h| ld(&h.photons),
            ),
            (
                "glint_instrument_late_photons",
                "Photons dropped as late (behind the watermark on arrival).",
                &|h| ld(&h.late),
            ),
            (
                "glint_instrument_refused_photons",
                "Photons in refused batches.",
                &|h| ld(&h.refused),
            ),
            (
                "glint_instrument_dead_seconds",
                "Dead time recorded since the start (event time), seconds.",
                &|h| s(&h.dead_ns),
            ),
            (
                "glint_instrument_live_seconds",
                "Live time searched since the start (dead time removed), seconds.",
                &|h| s(&h.live_ns),
            ),
            (
                "glint_instrument_silences",
                "Times the instrument fell silent (no frame for ingest.silent_after_s).",
                &|h| ld(&h.silences),
            ),
            (
                "glint_instrument_producers_gone",
                "Producer connections that ended while the daemon ran.",
                &|h| ld(&h.producers_gone),
            ),
        ];
        for (name, help, f) in counters {
            family(e, name, help, true, &rows(f))?;
        }
        let gauges: [Figure<'_>; 9] = [
            (
                "glint_instrument_photon_rate_hz",
                "Photons per second taken over the last two seconds.",
                &|h| V::F(h.rate_hz.get()),
            ),
            (
                "glint_instrument_watermark_gps_seconds",
                "The engine's event time (watermark), GPS seconds; 0 before the first photon.",
                &|h| s(&h.watermark_gps_ns),
            ),
            (
                "glint_instrument_event_lag_seconds",
                "Host clock minus the engine's watermark, seconds; 0 before the first photon.",
                &|h| V::F(h.event_lag_s(now_gps).unwrap_or(0.0)),
            ),
            (
                "glint_instrument_seconds_since_frame",
                "Seconds since the last frame (since the start before the first).",
                &|h| V::F(h.seconds_since_frame(now)),
            ),
            (
                "glint_instrument_silent",
                "1 while the instrument is silent past ingest.silent_after_s.",
                &|h| V::N(u64::from(h.silent.load(Ordering::Relaxed))),
            ),
            (
                "glint_instrument_connected",
                "1 while a producer is connected.",
                &|h| V::N(u64::from(h.connected.load(Ordering::Relaxed))),
            ),
            (
                "glint_instrument_open_candidates",
                "Candidates awaiting their assessment.",
                &|h| ld(&h.open_candidates),
            ),
            (
                "glint_instrument_dead_today_seconds",
                "Dead time recorded since UTC midnight (host clock), seconds.",
                &|h| s(&h.dead_today_ns),
            ),
            (
                "glint_instrument_effective_volume_pc3",
                "Effective volume for a final burst, pc^3 (0 until computed).",
                &|h| V::F(h.effective_volume_pc3.get()),
            ),
        ];
        for (name, help, f) in gauges {
            family(e, name, help, false, &rows(f))?;
        }
        Ok(())
    }
}
