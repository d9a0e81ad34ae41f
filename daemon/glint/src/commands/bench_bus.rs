//! `glint bench-bus` (hidden): the bus sink's throughput and latency. Opens a desk on a fresh journal in a
//! temporary directory, runs the bus sink against a NATS server (its stream made if missing), issues TEST
//! alerts at a given rate (or all at once), and prints alerts per second and the latency from journal fsync
//! to the server's acknowledgement.

use std::process::ExitCode;
use std::sync::Arc;
use std::sync::atomic::Ordering;
use std::time::{Duration, Instant};

use anyhow::{Context, anyhow};
use tokio_util::sync::CancellationToken;

use crate::config::{BusConfig, JournalConfig};
use crate::desk::Desk;
use crate::metrics::{Metrics, Percentiles, Stage};

/// Arguments of `glint bench-bus`.
#[derive(Debug, clap::Args)]
pub(crate) struct BenchBusArgs {
    /// NATS server URL.
    #[arg(long, default_value = "nats://127.0.0.1:4222")]
    url: String,
    /// Alerts to publish.
    #[arg(long, default_value_t = 2000)]
    alerts: usize,
    /// Alerts per second to issue; 0 issues them in batches of 64 as fast as the desk takes them.
    #[arg(long, default_value_t = 0.0)]
    rate: f64,
    /// Stream to publish to (made with file storage if missing); subjects `bench.<stream>.bench.test`.
    #[arg(long, default_value = "GLINT_BENCH")]
    stream: String,
}

/// `glint bench-bus`.
pub(crate) fn run(a: BenchBusArgs) -> anyhow::Result<ExitCode> {
    crate::logging::init("warn", crate::config::LogFormat::Text);
    let tmp = tempfile::tempdir().context("cannot make a temporary directory")?;
    let metrics = Arc::new(Metrics::new());
    let journal = JournalConfig {
        segment_bytes: 64 << 20,
        retention: Duration::from_secs(86_400),
    };
    let (desk, _) = Desk::open(
        &tmp.path().join("journal"),
        &journal,
        metrics.clone(),
        CancellationToken::new(),
    )
    .context("cannot open a journal")?;
    let desk = Arc::new(desk);
    let cfg = BusConfig {
        url: a.url.clone(),
        credentials_file: None,
        subject_prefix: format!("bench.{}", a.stream),
        stream: a.stream.clone(),
        stream_file: None,
        ack_timeout: Duration::from_secs(5),
        max_backoff: Duration::from_secs(1),
    };
    let rt = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .context("cannot start the runtime")?;
    rt.block_on(async {
        let client = crate::natsbus::connect(&cfg, "glint-bench-bus").await?;
        let js = crate::natsbus::context(client, &cfg);
        js.get_or_create_stream(async_nats::jetstream::stream::Config {
            name: cfg.stream.clone(),
            subjects: vec![format!("{}.>", cfg.subject_prefix)],
            storage: async_nats::jetstream::stream::StorageType::File,
            duplicate_window: Duration::from_secs(120),
            ..Default::default()
        })
        .await
        .map_err(|e| anyhow!("cannot make stream {}: {e}", cfg.stream))?;
        let closing = CancellationToken::new();
        let sink = tokio::spawn(crate::sinks::bus::run(
            cfg.clone(),
            desk.clone(),
            tmp.path().to_path_buf(),
            metrics.clone(),
            closing.clone(),
        ));
        let started = Instant::now();
        let issuer = {
            let desk = desk.clone();
            let (n, rate) = (a.alerts, a.rate);
            tokio::task::spawn_blocking(move || -> anyhow::Result<()> {
                let mut issued = 0;
                while issued < n {
                    let batch = if rate > 0.0 { 1 } else { 64.min(n - issued) };
                    desk.issue_test_alerts("bench", batch)?;
                    issued += batch;
                    if rate > 0.0 {
                        let due = started + Duration::from_secs_f64(issued as f64 / rate);
                        std::thread::sleep(due.saturating_duration_since(Instant::now()));
                    }
                }
                Ok(())
            })
        };
        issuer.await??;
        let deadline = Instant::now() + Duration::from_secs(600);
        while metrics.bus_published.load(Ordering::Relaxed) < a.alerts as u64 {
            if Instant::now() > deadline {
                return Err(anyhow!(
                    "the bus took fewer than {} alerts in 10 minutes",
                    a.alerts
                ));
            }
            tokio::time::sleep(Duration::from_millis(1)).await;
        }
        let took = started.elapsed().as_secs_f64();
        closing.cancel();
        let _ = sink.await;
        println!(
            "bus sink: {} alerts in {:.2} s = {:.0} alerts/s ({}), {} duplicates, {} failures",
            a.alerts,
            took,
            a.alerts as f64 / took,
            if a.rate > 0.0 {
                format!("issued at {} alerts/s", a.rate)
            } else {
                "issued as fast as the desk takes them".into()
            },
            metrics.bus_duplicates.load(Ordering::Relaxed),
            metrics.bus_failures.load(Ordering::Relaxed),
        );
        println!("{}", Percentiles::header("latency (ms)"));
        println!("{}", metrics.percentiles(Stage::BusAck).row("fsynced -> bus ack"));
        anyhow::Ok(())
    })?;
    Ok(ExitCode::SUCCESS)
}
