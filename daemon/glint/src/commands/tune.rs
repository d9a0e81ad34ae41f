//! `glint tune`: measured false-alarm rates, injection campaigns, efficiency, effective volume and the
//! rate-density upper limit from recordings, written as `report.md`, `report.json` and figures. The work
//! lives in `tune/`; this file parses, picks the instrument and prints. `--shard I/N` runs every N-th pass
//! and writes it for `glint tune merge` (a batch scheduler's array job; `deploy/slurm/glint-tune.sbatch`).

use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::time::Instant;

use anyhow::Context;

use crate::config::{Config, InstrumentConfig, config_or_exit};
use crate::tune::inject::InjectSpec;
use crate::tune::{self, ShardFile};

/// Arguments of `glint tune`.
#[derive(Debug, clap::Args)]
#[command(args_conflicts_with_subcommands = true)]
pub(crate) struct TuneArgs {
    #[command(subcommand)]
    merge: Option<TuneCommand>,
    /// Recordings (.glrec or .glrec.zst) of one instrument.
    files: Vec<PathBuf>,
    /// Configuration file; the embedded default when omitted.
    #[arg(long)]
    config: Option<PathBuf>,
    /// Directory for report.md, report.json and the figures (with --shard: for the shard's file).
    #[arg(long)]
    report: Option<PathBuf>,
    /// Instrument; the one the recordings name when omitted.
    #[arg(long)]
    instrument: Option<String>,
    /// Run with this false-alarm rate per year instead of the configured one.
    #[arg(long)]
    far_per_year: Option<f64>,
    /// Evaporation bursts to inject (0: background only).
    #[arg(long, default_value_t = 1000)]
    injections: usize,
    /// Distances to inject at, pc; by default eight around `glint reach`'s best r50.
    #[arg(long, value_delimiter = ',')]
    distances_pc: Vec<f64>,
    /// Inject at this zenith (or off-axis) angle instead of uniformly over the field of view (to compare
    /// with `glint reach`, which assumes one angle).
    #[arg(long)]
    zenith_deg: Option<f64>,
    /// Burst photons are drawn over this many seconds before the explosion; the longest timescale when omitted.
    #[arg(long)]
    max_time_to_go_s: Option<f64>,
    /// Bursts of one pass are at least this many seconds apart.
    #[arg(long, default_value_t = 40.0)]
    spacing_s: f64,
    /// Seed of the injections and the scrambling.
    #[arg(long, default_value_t = 1)]
    seed: u64,
    /// Loosest false-alarm rate per year at which background seeds are kept (the trigger rate is measured at
    /// this level and every stricter one).
    #[arg(long, default_value_t = 1e7)]
    loosest_far_per_year: f64,
    /// Threads; every core when omitted. The report does not depend on it.
    #[arg(long)]
    jobs: Option<usize>,
    /// Run only passes p with p mod N = I (I/N, I from 0) and write `<report>/shard-I-of-N.json`.
    #[arg(long)]
    shard: Option<String>,
}

/// `glint tune merge`.
#[derive(Debug, clap::Subcommand)]
pub(crate) enum TuneCommand {
    /// Combine the shard files (`shard-*.json`) in DIRs into one report.
    Merge(MergeArgs),
}

/// Arguments of `glint tune merge`.
#[derive(Debug, clap::Args)]
pub(crate) struct MergeArgs {
    /// Directories holding shard files.
    #[arg(required = true)]
    dirs: Vec<PathBuf>,
    /// Configuration file the shards ran with.
    #[arg(long)]
    config: Option<PathBuf>,
    /// Directory for the report.
    #[arg(long, required = true)]
    report: PathBuf,
    /// The false-alarm rate the shards ran with, when it was overridden.
    #[arg(long)]
    far_per_year: Option<f64>,
}

fn parse_shard(s: &str) -> anyhow::Result<(usize, usize)> {
    let (i, n) = s.split_once('/').context("--shard takes I/N, e.g. 0/4")?;
    let (i, n): (usize, usize) = (i.trim().parse()?, n.trim().parse()?);
    if n == 0 || i >= n {
        anyhow::bail!("--shard {s}: need 0 <= I < N");
    }
    Ok((i, n))
}

fn instrument(cfg: &Config, id: &str, far: Option<f64>) -> anyhow::Result<InstrumentConfig> {
    let mut inst = cfg
        .instrument(id)
        .with_context(|| {
            format!(
                "instrument '{id}' is not in {} (give --instrument or --config)",
                cfg.source_name
            )
        })?
        .clone();
    if let Some(f) = far {
        if !(f.is_finite() && f > 0.0) {
            anyhow::bail!("--far-per-year must be a positive number");
        }
        inst.search.far_per_year = f;
    }
    Ok(inst)
}

/// Runs `glint tune`.
pub(crate) fn run(args: &TuneArgs) -> anyhow::Result<ExitCode> {
    if let Some(TuneCommand::Merge(m)) = &args.merge {
        return merge(m);
    }
    let cfg = config_or_exit(args.config.as_ref())?;
    crate::logging::init(&cfg.daemon.log_level, cfg.daemon.log_format);
    if args.files.is_empty() {
        anyhow::bail!("give recordings to tune on");
    }
    let Some(dir) = &args.report else {
        anyhow::bail!("give --report DIR");
    };
    let shard = args.shard.as_deref().map(parse_shard).transpose()?;
    let started = Instant::now();
    // The instrument: as given, or the first Hello's.
    let id = match &args.instrument {
        Some(id) => id.clone(),
        None => {
            let p = tune::stream::Photons::read(&args.files[..1], &cfg, None)?;
            p.instrument
                .context("the recording has no Hello; give --instrument")?
        }
    };
    let inst = instrument(&cfg, &id, args.far_per_year)?;
    let longest = inst.search.ladder_s.last().copied().unwrap_or(1.0);
    let distances = if args.distances_pc.is_empty() {
        let r = tune::reach_at(&inst, args.zenith_deg.unwrap_or(20.0), vec![0.1])
            .context("computing the reach to place the distances")?;
        [0.3, 0.5, 0.7, 0.85, 1.0, 1.2, 1.5, 2.0]
            .iter()
            .map(|f| (f * r.best_r50_pc * 1e4).round() / 1e4)
            .collect()
    } else {
        args.distances_pc.clone()
    };
    let spec = InjectSpec {
        count: args.injections,
        distances_pc: distances,
        max_time_to_go_s: args.max_time_to_go_s.unwrap_or(longest),
        spacing_s: args.spacing_s,
        zenith_deg: args.zenith_deg,
        seed: args.seed,
        // A candidate stays open up to its persistence window after its last crossing, and its assessment
        // reads the pre-window before it.
        separation_window_s: inst
            .assess
            .persistence_min_s
            .max(inst.assess.persistence_timescale_factor * longest)
            + 2.0 * longest
            + inst.assess.pre_window_s,
        min_separation_deg: 2.0 * tune::search_info(&inst).match_deg,
    };
    let (plan, photons) = tune::prepare(
        &inst,
        &args.files,
        &cfg,
        spec,
        args.loosest_far_per_year,
        args.seed,
    )?;
    let units: Vec<usize> = (0..plan.units())
        .filter(|u| shard.is_none_or(|(i, n)| u % n == i))
        .collect();
    let jobs = args
        .jobs
        .unwrap_or_else(|| std::thread::available_parallelism().map_or(1, |n| n.get()));
    eprintln!(
        "glint tune: {} photons, {:.0} s, {} passes ({} injections) on {jobs} threads",
        photons.photons.len(),
        (plan.span.1 - plan.span.0) as f64 / 1e9,
        units.len(),
        plan.passes.iter().filter(|_| true).map(Vec::len).sum::<usize>()
    );
    let t0 = Instant::now();
    let progress = |done: usize, of: usize| {
        let el = t0.elapsed().as_secs_f64();
        eprintln!(
            "  pass {done}/{of}  {el:.0} s elapsed, about {:.0} s left",
            el / done as f64 * (of - done) as f64
        );
    };
    let outputs = tune::run_units(&inst, &plan, &photons, &units, jobs, &progress)?;
    if let Some((i, n)) = shard {
        std::fs::create_dir_all(dir).with_context(|| format!("creating {}", dir.display()))?;
        let p = dir.join(format!("shard-{i}-of-{n}.json"));
        let file = ShardFile {
            plan,
            shard: (i, n),
            units: outputs,
        };
        std::fs::write(&p, serde_json::to_vec(&file)?).with_context(|| format!("writing {}", p.display()))?;
        println!(
            "shard {i}/{n} written to {} ({:.1} s)",
            p.display(),
            started.elapsed().as_secs_f64()
        );
        return Ok(ExitCode::SUCCESS);
    }
    let report = tune::analyse(&inst, &plan, outputs)?;
    let header = format!(
        "`glint tune {}` ({} injections, seed {}), {:.1} s wall on {jobs} threads.",
        plan.recordings.join(" "),
        plan.inject.count,
        plan.seed,
        started.elapsed().as_secs_f64()
    );
    tune::report::write(dir, &report, &header)?;
    print_summary(dir, &report, started.elapsed().as_secs_f64());
    Ok(ExitCode::SUCCESS)
}

fn print_summary(dir: &Path, r: &tune::analyse::Report, wall: f64) {
    if let Some(i) = &r.injections {
        println!(
            "efficiency: r50 {} pc, r90 {} pc, effective volume {:.3e} pc^3, distance coverage {}",
            i.r50_pc.map_or("-".into(), |v| format!("{v:.4}")),
            i.r90_pc.map_or("-".into(), |v| format!("{v:.4}")),
            i.effective_volume_pc3,
            i.fit_coverage
                .map_or("-".into(), |c| format!("{:.1}%", 100.0 * c))
        );
    }
    for l in &r.limits {
        println!(
            "upper limit {:.0}% CL: {:.3e} per pc^3 per yr",
            100.0 * l.cl,
            l.per_pc3_per_yr
        );
    }
    println!("report written to {} ({wall:.1} s)", dir.display());
}

/// `glint tune merge`.
fn merge(m: &MergeArgs) -> anyhow::Result<ExitCode> {
    let cfg = config_or_exit(m.config.as_ref())?;
    let started = Instant::now();
    let mut plan = None;
    let mut units = Vec::new();
    for dir in &m.dirs {
        let entries = std::fs::read_dir(dir).with_context(|| format!("reading {}", dir.display()))?;
        let mut names: Vec<PathBuf> = entries
            .filter_map(|e| e.ok().map(|e| e.path()))
            .filter(|p| {
                p.file_name()
                    .and_then(|n| n.to_str())
                    .is_some_and(|n| n.starts_with("shard-") && n.ends_with(".json"))
            })
            .collect();
        names.sort();
        for p in names {
            let text = std::fs::read(&p).with_context(|| format!("reading {}", p.display()))?;
            let f: ShardFile =
                serde_json::from_slice(&text).with_context(|| format!("parsing {}", p.display()))?;
            let this = serde_json::to_string(&f.plan)?;
            match &plan {
                None => plan = Some(f.plan),
                Some(first) => {
                    if serde_json::to_string(first)? != this {
                        anyhow::bail!("{} belongs to another campaign (its plan differs)", p.display());
                    }
                }
            }
            units.extend(f.units);
        }
    }
    let Some(plan) = plan else {
        anyhow::bail!("no shard-*.json files in {:?}", m.dirs);
    };
    let inst = instrument(&cfg, &plan.instrument, m.far_per_year)?;
    let report = tune::analyse(&inst, &plan, units)?;
    let header = format!(
        "`glint tune {}` ({} injections, seed {}), merged from shards.",
        plan.recordings.join(" "),
        plan.inject.count,
        plan.seed
    );
    tune::report::write(&m.report, &report, &header)?;
    print_summary(&m.report, &report, started.elapsed().as_secs_f64());
    Ok(ExitCode::SUCCESS)
}
