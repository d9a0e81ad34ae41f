//! `glint calibrate` (hidden): measures an instrument's effective trials on background, from recordings of
//! the site's own data or from a simulated background-only scenario, and writes the false-alarm calibration
//! the engine reads at start (`<state_dir>/calibration/<instrument>.toml`; docs/science.md section 4).

use std::path::PathBuf;
use std::process::ExitCode;
use std::time::Instant;

use anyhow::Context;
use glint_engine::Finding;
use glint_engine::trials::TrialsMeter;
use glint_sim::{Simulator, load_scenario};
use glint_wire::pb::ProducerFrame;
use glint_wire::pb::producer_frame::Body;
use glint_wire::recording::RecordingReader;

use crate::config::{calibration_path, config_or_exit};
use crate::serve::driver::InstrumentDriver;

/// Arguments of `glint calibrate`.
#[derive(Debug, clap::Args)]
pub(crate) struct CalibrateArgs {
    /// Background recordings (.glrec or .glrec.zst) of the instrument, in time order. A real source in them
    /// adds a candidate or two; hours of quiet sky are what is wanted.
    files: Vec<PathBuf>,
    /// Or a scenario without sources, simulated on the fly (e.g. deploy/scenarios/quiet-hour.toml).
    #[arg(long, conflicts_with = "files")]
    scenario: Option<PathBuf>,
    /// With --scenario: hours of background to simulate instead of the scenario's own duration.
    #[arg(long, requires = "scenario")]
    hours: Option<f64>,
    /// With --scenario: random seed instead of the scenario's.
    #[arg(long, requires = "scenario")]
    seed: Option<u64>,
    /// Configuration file; the embedded default when omitted.
    #[arg(long)]
    config: Option<PathBuf>,
    /// Instrument to calibrate; the one the recordings or the scenario name when omitted.
    #[arg(long)]
    instrument: Option<String>,
    /// Nominal false-alarm rate the measuring search runs at, per year: the loosest level measured.
    #[arg(long, default_value_t = 1e7)]
    nominal_far_per_year: f64,
    /// Levels with fewer candidates than this are left out (too noisy to interpolate on).
    #[arg(long, default_value_t = 20)]
    min_candidates: u64,
    /// Where to write it; `<state_dir>/calibration/<instrument>.toml` when omitted.
    #[arg(long)]
    out: Option<PathBuf>,
    /// Instead of measuring: run the search with the calibration at `--out` (or the default path) at each of
    /// these false-alarm rates per year on the background and print the flashes found against those
    /// expected (use independent background: another seed, other recordings).
    #[arg(long, value_delimiter = ',')]
    verify: Vec<f64>,
}

/// Runs `glint calibrate`.
pub(crate) fn run(args: &CalibrateArgs) -> anyhow::Result<ExitCode> {
    let cfg = config_or_exit(args.config.as_ref())?;
    crate::logging::init(&cfg.daemon.log_level, cfg.daemon.log_format);
    if !(args.nominal_far_per_year.is_finite() && args.nominal_far_per_year > 0.0) {
        anyhow::bail!("--nominal-far-per-year must be a positive number");
    }
    let started = Instant::now();
    let frames: Box<dyn Iterator<Item = anyhow::Result<ProducerFrame>>>;
    let mut instrument = args.instrument.clone();
    let source;
    if let Some(path) = &args.scenario {
        let mut scenario = load_scenario(path).with_context(|| format!("scenario {}", path.display()))?;
        if !scenario.sources.is_empty() {
            anyhow::bail!(
                "scenario {} has {} sources: calibration needs background only",
                path.display(),
                scenario.sources.len()
            );
        }
        if let Some(h) = args.hours {
            if !(h.is_finite() && h > 0.0 && h <= 1e5) {
                anyhow::bail!("--hours must be in (0, 100000]");
            }
            scenario.duration_ns = (h * 3600.0 * 1e9) as i64;
        }
        let seed = args.seed.unwrap_or(scenario.seed);
        instrument.get_or_insert_with(|| scenario.instrument.id.clone());
        source = format!(
            "simulated background: scenario {}, {:.1} h, seed {seed}",
            scenario.name,
            scenario.duration_ns as f64 / 3.6e12
        );
        let sim = Simulator::new(&scenario, seed).with_context(|| format!("scenario {}", path.display()))?;
        frames = Box::new(sim.map(Ok));
    } else {
        if args.files.is_empty() {
            anyhow::bail!("give background recordings or --scenario");
        }
        source = format!(
            "recordings: {}",
            args.files
                .iter()
                .map(|p| p.display().to_string())
                .collect::<Vec<_>>()
                .join(", ")
        );
        let max = cfg.daemon.max_frame_bytes;
        let mut readers = Vec::new();
        for path in &args.files {
            let r = RecordingReader::open(path, max)
                .with_context(|| format!("opening recording {}", path.display()))?;
            let name = path.display().to_string();
            readers.push(r.map(move |f| f.with_context(|| format!("reading {name}"))));
        }
        frames = Box::new(readers.into_iter().flatten());
    }

    if !args.verify.is_empty() {
        return verify(args, &cfg, frames, instrument);
    }
    let mut driver: Option<InstrumentDriver> = None;
    let mut meter = TrialsMeter::new();
    let mut found: Vec<Finding> = Vec::new();
    let mut chosen = instrument;
    for frame in frames {
        let frame = frame?;
        if let Some(Body::Hello(h)) = &frame.body {
            chosen.get_or_insert_with(|| h.instrument.clone());
        }
        let Some(id) = chosen.as_deref() else {
            anyhow::bail!("the background does not start with a Hello; give --instrument");
        };
        if driver.is_none() {
            let inst = cfg
                .instrument(id)
                .with_context(|| format!("instrument '{id}' is not in {}", cfg.source_name))?;
            driver = Some(InstrumentDriver::measuring(inst, args.nominal_far_per_year)?);
            if matches!(frame.body, Some(Body::Hello(_))) {
                continue;
            }
        }
        let Some(d) = driver.as_mut() else { continue };
        if let Err(r) = d.on_frame(&frame, &mut found) {
            tracing::warn!(seq = r.seq, code = ?r.code, "frame refused: {}", r.detail);
        }
        found.drain(..).for_each(|f| meter.observe(&f));
    }
    let (Some(mut d), Some(id)) = (driver, chosen) else {
        anyhow::bail!("no background frames to measure");
    };
    d.finish(&mut found);
    found.drain(..).for_each(|f| meter.observe(&f));
    let stats = d.engine_stats();
    let inst = cfg
        .instrument(&id)
        .with_context(|| format!("instrument '{id}' is not in {}", cfg.source_name))?;
    let engine_cfg = crate::serve::driver::engine_config(inst, true);
    let Some(cal) = meter.calibration(
        &engine_cfg,
        &stats,
        args.nominal_far_per_year,
        args.min_candidates,
        &source,
    ) else {
        anyhow::bail!(
            "{} candidates in {:.0} s of live time: no level reached {} candidates; measure longer or raise \
             --nominal-far-per-year",
            meter.candidates(),
            stats.live_ns as f64 * 1e-9,
            args.min_candidates
        );
    };
    let path = args
        .out
        .clone()
        .unwrap_or_else(|| calibration_path(&cfg.daemon.state_dir, &id));
    if let Some(dir) = path.parent() {
        std::fs::create_dir_all(dir).with_context(|| format!("creating {}", dir.display()))?;
    }
    let text = format!(
        "# Effective-trials calibration of {id}, written by `glint calibrate` (docs/science.md section 4).\n\
         # fraction = background candidates / nominal trials at each per-seed p-value level.\n{}",
        toml::to_string(&cal).context("serialising the calibration")?
    );
    std::fs::write(&path, text).with_context(|| format!("writing {}", path.display()))?;
    println!(
        "{id}: {} candidates in {:.2} h of live time at {:.1} Hz ({:.1} s)",
        meter.candidates(),
        cal.live_seconds / 3600.0,
        cal.all_sky_rate_hz,
        started.elapsed().as_secs_f64()
    );
    println!(
        "{:>14} {:>10} {:>12} {:>9}",
        "nominal/yr", "found", "expected", "fraction"
    );
    let trials_per_year = cal.ladder_s.len() as f64 * cal.all_sky_rate_hz * glint_engine::SECONDS_PER_YEAR;
    for p in &cal.points {
        println!(
            "{:>14.3e} {:>10} {:>12.1} {:>9.3}",
            p.ln_p.exp() * trials_per_year,
            p.candidates,
            p.nominal,
            p.fraction
        );
    }
    println!("written to {}", path.display());
    Ok(ExitCode::SUCCESS)
}

/// `--verify`: the calibrated search at each rate on the same background, flashes against expectation.
fn verify(
    args: &CalibrateArgs,
    cfg: &crate::config::Config,
    frames: Box<dyn Iterator<Item = anyhow::Result<ProducerFrame>>>,
    instrument: Option<String>,
) -> anyhow::Result<ExitCode> {
    let mut chosen = instrument;
    let mut drivers: Vec<(f64, InstrumentDriver, Vec<f64>)> = Vec::new();
    let mut found: Vec<Finding> = Vec::new();
    for frame in frames {
        let frame = frame?;
        if let Some(Body::Hello(h)) = &frame.body {
            chosen.get_or_insert_with(|| h.instrument.clone());
        }
        let Some(id) = chosen.as_deref() else {
            anyhow::bail!("the background does not start with a Hello; give --instrument");
        };
        if drivers.is_empty() {
            let inst = cfg
                .instrument(id)
                .with_context(|| format!("instrument '{id}' is not in {}", cfg.source_name))?;
            let path = args
                .out
                .clone()
                .unwrap_or_else(|| calibration_path(&cfg.daemon.state_dir, id));
            let text =
                std::fs::read_to_string(&path).with_context(|| format!("reading {}", path.display()))?;
            let cal: glint_science::calibration::TrialsCalibration =
                toml::from_str(&text).with_context(|| format!("parsing {}", path.display()))?;
            for &far in &args.verify {
                if !(far.is_finite() && far > 0.0) {
                    anyhow::bail!("--verify rates must be positive numbers");
                }
                let mut inst = inst.clone();
                inst.search.far_per_year = far;
                inst.trials = Some(cal.clone());
                drivers.push((far, InstrumentDriver::new(&inst, true)?, Vec::new()));
            }
            if matches!(frame.body, Some(Body::Hello(_))) {
                continue;
            }
        }
        for (_, d, fars) in &mut drivers {
            if let Err(r) = d.on_frame(&frame, &mut found) {
                tracing::warn!(seq = r.seq, code = ?r.code, "frame refused: {}", r.detail);
            }
            collect(&mut found, fars);
        }
    }
    println!(
        "{:>12} {:>8} {:>10} {:>10} {:>8}   flashes with far_per_year <= level / expected",
        "far/yr", "flashes", "expected", "measured", "+-1sd"
    );
    for (far, d, fars) in &mut drivers {
        d.finish(&mut found);
        collect(&mut found, fars);
        let live_yr = d.engine_stats().live_ns as f64 * 1e-9 / glint_engine::SECONDS_PER_YEAR;
        let n = fars.len() as f64;
        let mut lower = String::new();
        for &level in &args.verify {
            if level <= *far {
                let k = fars.iter().filter(|&&f| f <= level).count();
                lower += &format!("  <= {level:.0e}: {k} / {:.1}", level * live_yr);
            }
        }
        println!(
            "{:>12.3e} {:>8} {:>10.1} {:>10.3e} {:>8.2e} {lower}",
            far,
            fars.len(),
            *far * live_yr,
            n / live_yr,
            n.sqrt() / live_yr
        );
    }
    Ok(ExitCode::SUCCESS)
}

fn collect(found: &mut Vec<Finding>, fars: &mut Vec<f64>) {
    for f in found.drain(..) {
        if let Finding::Flash(fl) = f {
            fars.push(fl.far_per_year);
        }
    }
}
