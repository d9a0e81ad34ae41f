//! `glint simulate`: turns a scenario (an instrument and its sources) into a recording a real instrument
//! could plausibly have sent, plus a truth file listing what was injected, for tests, tuning and the demo.

use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::PathBuf;
use std::process::ExitCode;
use std::time::Instant;

use anyhow::Context;
use glint_sim::{Simulator, load_scenario};
use glint_wire::pb::producer_frame::Body;
use glint_wire::recording::RecordingWriter;

use crate::progress::Progress;

/// Arguments of `glint simulate`.
#[derive(Debug, clap::Args)]
pub(crate) struct SimulateArgs {
    /// Scenario file (see deploy/scenarios/).
    #[arg(long)]
    scenario: PathBuf,
    /// Recording to write: `.glrec`, or `.glrec.zst` for zstd compression; or an existing directory, where
    /// the file is named by the instrument and the UTC time of its first photon (`.glrec.zst`).
    #[arg(long)]
    out: PathBuf,
    /// Also write the injected sources as JSON lines here.
    #[arg(long)]
    truth: Option<PathBuf>,
    /// Random seed; the scenario's own seed when omitted. The same scenario and seed give the same bytes.
    #[arg(long)]
    seed: Option<u64>,
    /// No progress output.
    #[arg(long)]
    quiet: bool,
    /// Seconds between progress lines when stderr is not a terminal.
    #[arg(long, default_value_t = 10.0, hide = true)]
    progress_every: f64,
}

/// Runs `glint simulate`.
pub(crate) fn run(args: &SimulateArgs) -> anyhow::Result<ExitCode> {
    let started = Instant::now();
    let scenario =
        load_scenario(&args.scenario).with_context(|| format!("scenario {}", args.scenario.display()))?;
    let seed = args.seed.unwrap_or(scenario.seed);
    let mut sim =
        Simulator::new(&scenario, seed).with_context(|| format!("scenario {}", args.scenario.display()))?;
    // Into a directory: written under a temporary name, renamed once the first photon's time is known.
    let into_dir = args.out.is_dir();
    let out = if into_dir {
        args.out
            .join(format!(".{}.partial.glrec.zst", scenario.instrument.id))
    } else {
        args.out.clone()
    };
    let mut writer = RecordingWriter::create(&out).with_context(|| format!("creating {}", out.display()))?;
    let every = std::time::Duration::from_secs_f64(args.progress_every.clamp(0.0, 86_400.0));
    let mut progress = Progress::new("simulate", args.quiet, every);
    let (start, span) = (scenario.start_gps_ns, scenario.duration_ns.max(1));
    let mut photons = 0u64;
    let mut first: Option<i64> = None;
    for frame in &mut sim {
        if let Some(Body::Batch(b)) = &frame.body {
            photons += b.time_gps_ns.len() as u64;
            if let Some(lo) = b.time_gps_ns.iter().min() {
                first = Some(first.map_or(*lo, |f| f.min(*lo)));
            }
            let last = b.time_gps_ns.iter().max().copied();
            let done = last.map(|t| (t - start) as f64 / span as f64);
            progress.update(photons, last, done);
        }
        writer
            .write_frame(&frame)
            .with_context(|| format!("writing {}", out.display()))?;
    }
    writer
        .finish()
        .with_context(|| format!("finishing {}", out.display()))?;
    progress.finish();
    let out = match (into_dir, first) {
        (true, Some(t)) => {
            let named = args.out.join(crate::timefmt::recording_name(
                &scenario.instrument.id,
                t,
                ".glrec.zst",
            ));
            std::fs::rename(&out, &named)
                .with_context(|| format!("renaming {} to {}", out.display(), named.display()))?;
            named
        }
        _ => out,
    };
    if let Some(path) = &args.truth {
        let mut w =
            BufWriter::new(File::create(path).with_context(|| format!("creating {}", path.display()))?);
        for t in sim.truth() {
            writeln!(w, "{}", serde_json::to_string(&t)?)?;
        }
        w.flush()?;
    }
    let st = sim.stats();
    eprintln!(
        "{}: {} photons in {} batches, {} status frames, {:.1} s of event time, seed {seed}, written to {} in {:.2} s",
        scenario.name,
        st.photons,
        st.batches,
        st.statuses,
        scenario.duration_ns as f64 / 1e9,
        out.display(),
        started.elapsed().as_secs_f64()
    );
    Ok(ExitCode::SUCCESS)
}
