//! `glint demo`: the whole pipeline in one process, with nothing to set up. Starts the daemon on free loopback
//! ports with the embedded default configuration and a fresh temporary state directory, subscribes to it,
//! and feeds it the built-in demo scenario (five minutes of the invented Cerro Ventisca array) from the
//! simulator at an accelerated speed, printing each alert as it arrives and a summary at the end.

use std::collections::BTreeMap;
use std::process::ExitCode;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use anyhow::{Context, anyhow};
use glint_wire::pb;

use crate::alerts;
use crate::client::feed::{self, FeedTarget, Speed};
use crate::client::listen::{ListenOptions, listen_loop};
use crate::serve::Daemon;
use crate::serve::loopback::{demo_simulator, loopback_config};

/// Arguments of `glint demo`.
#[derive(Debug, clap::Args)]
pub(crate) struct DemoArgs {
    /// About how long the demo runs, wall seconds (the twelve-minute scenario is sped up to fit).
    #[arg(long, default_value_t = 40.0)]
    seconds: f64,
    /// Print alerts as JSON lines instead of readable summaries.
    #[arg(long)]
    json: bool,
}

/// `glint demo`.
pub(crate) fn run(args: DemoArgs) -> anyhow::Result<ExitCode> {
    if !(args.seconds.is_finite() && args.seconds > 0.0) {
        return Err(anyhow!("--seconds {} must be a number > 0", args.seconds));
    }
    let tmp = tempfile::Builder::new()
        .prefix("glint-demo-")
        .tempdir()
        .context("cannot make a temporary state directory")?;
    let (scenario, sim) = demo_simulator(tmp.path())?;

    let (mut cfg, producer_token, sub_token) = loopback_config(tmp.path(), &scenario.instrument.id)?;
    cfg.subscribers.heartbeat = Duration::from_secs(1);
    let event_s = (scenario.end_gps_ns() - scenario.start_gps_ns) as f64 / 1e9;
    let speed = (event_s / args.seconds).max(1e-3);

    println!(
        "glint demo: {event_s:.0} s of the invented Cerro Ventisca array ({}) played at {speed:.1}x real time",
        scenario.instrument.id
    );
    println!(
        "  the scenario holds a glitch, two evaporation bursts (one followed by a data gap) and an afterglow-like burst"
    );
    println!(
        "  state directory (deleted at the end): {}\n",
        tmp.path().display()
    );

    let rt = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .context("cannot start the runtime")?;
    let kinds: Arc<Mutex<BTreeMap<String, u64>>> = Arc::default();
    let json = args.json;
    let report = rt.block_on(async {
        let daemon = Daemon::start(cfg).await?;
        let opts = ListenOptions {
            addr: daemon.subscribers_addr.to_string(),
            token: sub_token,
            kinds: Vec::new(),
            min_sigma: 0.0,
            resume_after: 0,
            replay_all: true,
            client: "glint-demo".into(),
            tls: None,
            max_frame: 64 << 20,
        };
        let seen = kinds.clone();
        let listener = tokio::spawn(async move {
            let mut on_alert = move |a: &pb::Alert| -> anyhow::Result<bool> {
                if json {
                    println!("{}", alerts::alert_json(a));
                } else {
                    println!("{}\n", alerts::alert_summary(a));
                }
                let mut key = alerts::kind_name(a.kind).to_string();
                if let Some(x) = &a.assessment {
                    key = format!("{key} ({})", alerts::verdict_name(x.verdict));
                }
                if let Ok(mut m) = seen.lock() {
                    *m.entry(key).or_default() += 1;
                }
                Ok(true)
            };
            listen_loop(&opts, false, &mut on_alert).await
        });
        // Let the subscriber connect before the first photon.
        tokio::time::sleep(Duration::from_millis(200)).await;
        let target = FeedTarget {
            addr: daemon.ingest_addr.to_string(),
            token: producer_token,
            instrument: None,
            producer: "glint-demo".into(),
            tls: None,
            max_frame: 64 << 20,
            resume: true,
        };
        let started = Instant::now();
        let fed = feed::feed(sim.map(Ok::<_, anyhow::Error>), &target, Speed::Times(speed)).await;
        let metrics = daemon.metrics.clone();
        // Shutting down assesses what is still open, then says goodbye, which ends the listener.
        daemon.shutdown().await?;
        let listened = tokio::time::timeout(Duration::from_secs(10), listener).await;
        let fed = fed?;
        match listened {
            Ok(Ok(Ok(_))) => {}
            Ok(Ok(Err(e))) => return Err(e),
            Ok(Err(e)) => return Err(anyhow!("listener task failed: {e}")),
            Err(_) => return Err(anyhow!("the listener did not finish after the daemon closed")),
        }
        Ok::<_, anyhow::Error>((fed, metrics, started.elapsed()))
    })?;
    let (fed, metrics, wall) = report;
    println!("--- summary ---");
    println!(
        "fed {} photons in {} frames over {:.1} s ({:.0} photons/s); the daemon took {} and refused {}",
        fed.photons,
        fed.frames,
        wall.as_secs_f64(),
        fed.photons_per_s(),
        fed.acked_photons,
        fed.refused_photons
    );
    let kinds = kinds.lock().map(|m| m.clone()).unwrap_or_default();
    let total: u64 = kinds.values().sum();
    println!("alerts received: {total}");
    for (k, n) in &kinds {
        println!("  {n:>3}  {k}");
    }
    metrics.print_latency();
    println!("(alerts decided at shutdown, for candidates cut short, carry no receipt stamp)");
    Ok(ExitCode::SUCCESS)
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap
mod tests {
    use super::*;
    use std::net::SocketAddr;

    use crate::config::Config;
    use crate::serve::driver::InstrumentDriver;

    /// Two and a half minutes of the ground array: a glitch (instrumental, withdrawn), a burst (fitted), and
    /// a burst followed by a declared data gap (the producer's promise must wait for the declaration).
    const SCENARIO: &str = r#"
[scenario]
name = "live-replay"
start_utc = "2026-12-01T02:00:00Z"
duration_s = 150
seed = 3
batch_max_photons = 256
batch_max_s = 0.01
jitter_s = 0.002
status_period_s = 1.0

[instrument]
id = "ventisca-array"
token = "demo-token"
spec_file = "../instruments/ventisca-array.toml"

[[source]]
kind = "glitch"
mode = "identical_timestamps"
t_offset_s = 30.0
photons = 40
ra_deg = 25.0
dec_deg = -30.0
spread_deg = 0.2

[[source]]
kind = "evaporation"
ra_deg = 35.0
dec_deg = -22.0
distance_pc = 0.04
t_offset_s = 60.0
max_time_to_go_s = 50.0

[[source]]
kind = "evaporation"
ra_deg = 40.0
dec_deg = -28.0
distance_pc = 0.04
t_offset_s = 100.0
max_time_to_go_s = 30.0

[[source]]
kind = "dead"
t_offset_s = 101.0
duration_s = 20.0
declared = true
reason = "readout stop"
"#;

    /// What live and replay must agree on: everything but numbering, links and wall-clock stamps.
    fn science(a: &pb::Alert) -> pb::Alert {
        let mut a = a.clone();
        a.seq = 0;
        a.id.clear();
        a.issued_utc.clear();
        a.issued_gps_ns = 0;
        a.withdrawn_id.clear();
        a.latency = None;
        a.replayed = false;
        if let Some(x) = a.assessment.as_mut() {
            x.flash_seq = 0;
            x.flash_id.clear();
        }
        a
    }

    fn order(v: &mut [pb::Alert]) {
        v.sort_by_key(|a| (a.trigger.as_ref().map_or(0, |t| t.end_gps_ns), a.kind));
    }

    #[test]
    fn live_alerts_with_promises_and_deferred_fits_match_a_replay_of_the_recording() {
        let tmp = tempfile::tempdir().unwrap();
        let (scen_dir, inst_dir) = (tmp.path().join("scenarios"), tmp.path().join("instruments"));
        std::fs::create_dir_all(&scen_dir).unwrap();
        std::fs::create_dir_all(&inst_dir).unwrap();
        let block = crate::config::builtin_instrument("ventisca-array").unwrap();
        std::fs::write(inst_dir.join("ventisca-array.toml"), block).unwrap();
        let scenario = glint_sim::parse_scenario(SCENARIO, &scen_dir, "live-replay").unwrap();
        let sim = glint_sim::Simulator::new(&scenario, scenario.seed).unwrap();

        let mut cfg = Config::embedded_default().unwrap();
        let loopback = SocketAddr::from(([127, 0, 0, 1], 0));
        cfg.daemon.state_dir = tmp.path().join("state");
        cfg.ingest.listen = loopback;
        cfg.subscribers.listen = loopback;
        cfg.metrics_listen = None;
        cfg.ingest.record = true;
        let inst = cfg.instrument("ventisca-array").unwrap().clone();
        let token = inst.token.expose().to_string();
        let rt = tokio::runtime::Builder::new_multi_thread()
            .enable_all()
            .build()
            .unwrap();
        let (desk, fed) = rt.block_on(async {
            let daemon = Daemon::start(cfg.clone()).await.unwrap();
            let target = FeedTarget {
                addr: daemon.ingest_addr.to_string(),
                token,
                instrument: None,
                producer: "test".into(),
                tls: None,
                max_frame: 64 << 20,
                resume: true,
            };
            let fed = feed::feed(sim.map(Ok::<_, anyhow::Error>), &target, Speed::Max)
                .await
                .unwrap();
            let desk = daemon.desk.clone();
            daemon.shutdown().await.unwrap();
            (desk, fed)
        });
        assert_eq!(fed.refused_photons, 0, "{:?}", fed.refusals);
        let live = desk.read_from_disk(0, 10_000).unwrap();

        // The replay: the daemon's own recording through the replay's driver (fits inline).
        let mut recs: Vec<_> = std::fs::read_dir(cfg.daemon.state_dir.join("recordings"))
            .unwrap()
            .map(|e| e.unwrap().path())
            .collect();
        recs.sort();
        assert_eq!(recs.len(), 1, "one stream, one recording: {recs:?}");
        // Named by the UTC time of its first photon (timefmt::recording_name's form).
        let name = recs[0].file_name().unwrap().to_string_lossy().into_owned();
        assert!(
            name.starts_with("ventisca-array-20") && name.ends_with("Z.glrec.zst") && name.contains('T'),
            "{name}"
        );
        let mut driver = InstrumentDriver::new(&inst, true).unwrap();
        let mut seq = alerts::Sequencer::starting_at(1);
        let mut findings = Vec::new();
        let mut replayed = Vec::new();
        let mut first = true;
        for path in &recs {
            for frame in glint_wire::RecordingReader::open(path, 64 << 20).unwrap() {
                let frame = frame.unwrap();
                if std::mem::take(&mut first)
                    && matches!(frame.body, Some(pb::producer_frame::Body::Hello(_)))
                {
                    continue;
                }
                let _ = driver.on_frame(&frame, &mut findings);
                replayed.extend(findings.drain(..).map(|f| seq.assign("ventisca-array", &f, 0)));
            }
        }
        driver.finish(&mut findings);
        replayed.extend(findings.drain(..).map(|f| seq.assign("ventisca-array", &f, 0)));
        assert_eq!(
            driver.engine_stats().late,
            0,
            "the simulator's promises were kept"
        );

        // Live links hold: every assessment names a live flash, every withdrawal a live alert.
        let ids: Vec<&str> = live.iter().map(|a| a.id.as_str()).collect();
        for a in &live {
            if let Some(x) = &a.assessment {
                assert!(ids.contains(&x.flash_id.as_str()), "{a:?}");
                let fit = x.fit.as_ref().unwrap();
                assert_ne!(fit.reason, "pending", "a fit left pending: {a:?}");
            }
            if a.kind == pb::AlertKind::Withdrawal as i32 {
                assert!(ids.contains(&a.withdrawn_id.as_str()), "{a:?}");
            }
        }
        let kinds = |v: &[pb::Alert], k: pb::AlertKind| v.iter().filter(|a| a.kind == k as i32).count();
        assert!(kinds(&replayed, pb::AlertKind::Withdrawal) >= 1, "{replayed:?}");
        assert!(
            replayed
                .iter()
                .filter_map(|a| a.assessment.as_ref()?.fit.as_ref())
                .any(|f| f.converged),
            "the scenario must give a fitted burst: {replayed:?}"
        );
        let mut live: Vec<pb::Alert> = live.iter().map(|a| science(a)).collect();
        let mut replayed: Vec<pb::Alert> = replayed.iter().map(science).collect();
        order(&mut live);
        order(&mut replayed);
        assert_eq!(live.len(), replayed.len());
        for (l, r) in live.iter().zip(&replayed) {
            assert_eq!(l, r, "live and replay differ");
        }
    }
}
