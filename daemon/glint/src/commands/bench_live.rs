//! `glint bench-live` (hidden): the live daemon's throughput and latency benchmark. Simulates a scenario,
//! starts the daemon on loopback, feeds it with `glint feed` and reads it with `glint listen --json` as
//! separate processes (as on an operations host), and prints the latency table beside the host's own floor
//! measured meanwhile by [`crate::serve::hostprobe`].

use std::process::ExitCode;
use std::time::{Duration, Instant};

use anyhow::Context;

use crate::client::feed::Speed;
use crate::serve::Daemon;
use crate::serve::loopback::loopback_config;

/// Arguments of `glint bench-live` (hidden): the live daemon's throughput and latency benchmark.
#[derive(Debug, clap::Args)]
pub(crate) struct BenchArgs {
    /// Scenario to simulate, record and feed (e.g. deploy/scenarios/stress-20khz.toml).
    #[arg(required_unless_present = "probe_only")]
    scenario: Option<std::path::PathBuf>,
    /// Feed speed: a multiple of real time, or "max".
    #[arg(long, default_value = "max")]
    speed: Speed,
    /// Subscribers reading alerts.
    #[arg(long, default_value_t = 3)]
    subscribers: usize,
    /// Keep the simulated recording here (it is made once and reused when present).
    #[arg(long, value_name = "FILE")]
    recording: Option<std::path::PathBuf>,
    /// Niceness of the producer and subscriber processes (0 runs them at the daemon's priority). On a
    /// machine with few cores they stand in for producers and subscribers on other hosts; a positive value
    /// lets the daemon's threads run first when both want a core.
    #[arg(long, default_value_t = 0, value_name = "N")]
    clients_nice: u8,
    /// Keep each subscriber's alerts (JSON lines, with their latency stamps) in this directory.
    #[arg(long, value_name = "DIR")]
    keep_alerts: Option<std::path::PathBuf>,
    /// Run only the host probe for this many seconds, without the daemon or any client: the machine's own
    /// floor at rest, to set beside the one measured under load.
    #[arg(long, value_name = "SECONDS")]
    probe_only: Option<u64>,
}

/// CPU time the hypervisor gave to other guests (the `steal` column of /proc/stat, all cores), seconds;
/// None where that is not available. On a virtual machine it is the first thing to look at when latency
/// tails differ between runs of the same binary.
fn stolen_cpu_s() -> Option<f64> {
    let stat = std::fs::read_to_string("/proc/stat").ok()?;
    let cpu = stat.lines().next()?.strip_prefix("cpu ")?;
    let steal: f64 = cpu.split_whitespace().nth(7)?.parse().ok()?;
    // USER_HZ is 100 on every Linux build glint targets.
    Some(steal / 100.0)
}

/// A client process of the benchmark: this same executable running `glint feed` or `glint listen`, under
/// `nice` when asked.
fn client(nice: u8, args: &[&std::ffi::OsStr]) -> anyhow::Result<tokio::process::Command> {
    let exe = std::env::current_exe().context("cannot find the glint executable")?;
    let mut c = if nice > 0 {
        let mut c = tokio::process::Command::new("nice");
        c.arg("-n").arg(nice.to_string()).arg(exe);
        c
    } else {
        tokio::process::Command::new(exe)
    };
    c.args(args).kill_on_drop(true);
    Ok(c)
}

/// `glint bench-live`: simulates a scenario into a recording, starts the daemon in-process, then `N`
/// subscriber processes (`glint listen --json`) and one producer process (`glint feed`) playing the
/// recording at the given speed, as on an operations host. Prints the producer's report and the daemon's
/// latency percentiles, from the receipt of the frame that completes a trigger to the alert frame written
/// to each subscriber's socket, then the host's own floor measured meanwhile (see [`crate::serve::hostprobe`]).
pub(crate) fn bench(args: BenchArgs) -> anyhow::Result<ExitCode> {
    let tmp = tempfile::Builder::new()
        .prefix("glint-bench-")
        .tempdir()
        .context("cannot make a temporary directory")?;
    if let Some(secs) = args.probe_only {
        let probe =
            crate::serve::hostprobe::HostProbe::start(tmp.path()).context("cannot start the host probe")?;
        std::thread::sleep(Duration::from_secs(secs));
        print!("{}", probe.stop().table());
        return Ok(ExitCode::SUCCESS);
    }
    let Some(scenario) = &args.scenario else {
        anyhow::bail!("bench-live needs a scenario unless --probe-only is given");
    };
    let scenario = glint_sim::load_scenario(scenario)?;
    let rec = args
        .recording
        .clone()
        .unwrap_or_else(|| tmp.path().join("bench.glrec.zst"));
    if !rec.exists() {
        let t = Instant::now();
        let mut w = glint_wire::RecordingWriter::create(&rec)?;
        let mut frames = 0u64;
        for f in glint_sim::Simulator::new(&scenario, scenario.seed)? {
            w.write_frame(&f)?;
            frames += 1;
        }
        w.finish()?;
        println!(
            "simulated {} into {} ({frames} frames) in {:.1} s",
            scenario.name,
            rec.display(),
            t.elapsed().as_secs_f64()
        );
    }
    let (cfg, producer_token, sub_token) = loopback_config(tmp.path(), &scenario.instrument.id)?;
    let (producer_file, sub_file) = (tmp.path().join("producer.token"), tmp.path().join("sub.token"));
    std::fs::write(&producer_file, &producer_token).context("cannot write a token file")?;
    std::fs::write(&sub_file, &sub_token).context("cannot write a token file")?;
    let speed = args.speed.to_string();
    let rt = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .context("cannot start the runtime")?;
    let (metrics, alerts, photons, floor) = rt.block_on(async {
        let daemon = Daemon::start(cfg).await?;
        let (ingest, subs) = (
            daemon.ingest_addr.to_string(),
            daemon.subscribers_addr.to_string(),
        );
        let mut listeners = Vec::new();
        for i in 0..args.subscribers {
            let out = tmp.path().join(format!("sub-{i}.jsonl"));
            let file = std::fs::File::create(&out).context("cannot create a subscriber's output")?;
            let name = format!("bench-{i}");
            let child = client(
                args.clients_nice,
                &[
                    "listen".as_ref(),
                    "--from".as_ref(),
                    subs.as_ref(),
                    "--token-file".as_ref(),
                    sub_file.as_os_str(),
                    "--replay-all".as_ref(),
                    "--json".as_ref(),
                    "--client".as_ref(),
                    name.as_ref(),
                ],
            )?
            .stdout(file)
            // Reconnection notices once the daemon has gone are expected; the count below tells the rest.
            .stderr(std::process::Stdio::null())
            .spawn()
            .context("cannot start a subscriber")?;
            listeners.push((child, out));
        }
        tokio::time::sleep(Duration::from_millis(500)).await;
        let probe = crate::serve::hostprobe::HostProbe::start(tmp.path()).context("cannot start the host probe")?;
        let (stolen_before, fed_from) = (stolen_cpu_s(), Instant::now());
        let fed = client(
            args.clients_nice,
            &[
                "feed".as_ref(),
                rec.as_os_str(),
                "--to".as_ref(),
                ingest.as_ref(),
                "--token-file".as_ref(),
                producer_file.as_os_str(),
                "--speed".as_ref(),
                speed.as_ref(),
                "--producer".as_ref(),
                "glint-bench".as_ref(),
            ],
        )?
        .status()
        .await
        .context("cannot run the producer")?;
        let floor = tokio::task::spawn_blocking(move || probe.stop())
            .await
            .context("the host probe failed")?;
        if !fed.success() {
            anyhow::bail!("the producer failed ({fed})");
        }
        if let (Some(a), Some(b)) = (stolen_before, stolen_cpu_s()) {
            let wall = fed_from.elapsed().as_secs_f64();
            println!(
                "CPU stolen by the hypervisor while feeding: {:.1} s over {wall:.0} s ({:.1}% of the machine's cores)",
                b - a,
                100.0 * (b - a) / (wall * std::thread::available_parallelism().map_or(1.0, |n| n.get() as f64))
            );
        }
        let metrics = daemon.metrics.clone();
        daemon.shutdown().await?;
        // The daemon has sent its last alert and closed every connection: what each subscriber printed
        // by now is all it will get.
        tokio::time::sleep(Duration::from_millis(300)).await;
        let mut alerts = Vec::new();
        for (mut child, out) in listeners {
            let _ = child.kill().await;
            let text = std::fs::read_to_string(&out).context("cannot read a subscriber's output")?;
            if let (Some(dir), Some(name)) = (&args.keep_alerts, out.file_name()) {
                std::fs::create_dir_all(dir).with_context(|| format!("cannot create {}", dir.display()))?;
                std::fs::write(dir.join(name), &text)
                    .with_context(|| format!("cannot write into {}", dir.display()))?;
            }
            alerts.push(text.lines().filter(|l| !l.trim().is_empty()).count());
        }
        let photons = metrics.photons.load(std::sync::atomic::Ordering::Relaxed);
        Ok::<_, anyhow::Error>((metrics, alerts, photons, floor))
    })?;
    println!("daemon took {photons} photons; alerts received per subscriber: {alerts:?}");
    metrics.print_latency();
    print!("{}", floor.table());
    Ok(ExitCode::SUCCESS)
}
