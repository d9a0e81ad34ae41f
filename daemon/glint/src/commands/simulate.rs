//! `glint simulate`: turns a scenario (an instrument and its sources) into a recording a real instrument
//! could plausibly have sent, plus a truth file listing what was injected, for tests, tuning and the demo.

use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::PathBuf;
use std::process::ExitCode;
use std::time::Instant;

use anyhow::Context;
use glint_sim::{Simulator, load_scenario};
use glint_wire::recording::RecordingWriter;

/// Arguments of `glint simulate`.
#[derive(Debug, clap::Args)]
pub(crate) struct SimulateArgs {
    /// Scenario file (see deploy/scenarios/).
    #[arg(long)]
    scenario: PathBuf,
    /// Recording to write: `.glrec`, or `.glrec.zst` for zstd compression.
    #[arg(long)]
    out: PathBuf,
    /// Also write the injected sources as JSON lines here.
    #[arg(long)]
    truth: Option<PathBuf>,
    /// Random seed; the scenario's own seed when omitted. The same scenario and seed give the same bytes.
    #[arg(long)]
    seed: Option<u64>,
}

/// Runs `glint simulate`.
pub(crate) fn run(args: &SimulateArgs) -> anyhow::Result<ExitCode> {
    let started = Instant::now();
    let scenario =
        load_scenario(&args.scenario).with_context(|| format!("scenario {}", args.scenario.display()))?;
    let seed = args.seed.unwrap_or(scenario.seed);
    let mut sim =
        Simulator::new(&scenario, seed).with_context(|| format!("scenario {}", args.scenario.display()))?;
    let mut writer =
        RecordingWriter::create(&args.out).with_context(|| format!("creating {}", args.out.display()))?;
    for frame in &mut sim {
        writer
            .write_frame(&frame)
            .with_context(|| format!("writing {}", args.out.display()))?;
    }
    writer
        .finish()
        .with_context(|| format!("finishing {}", args.out.display()))?;
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
        args.out.display(),
        started.elapsed().as_secs_f64()
    );
    Ok(ExitCode::SUCCESS)
}
