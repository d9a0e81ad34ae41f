//! `glint reach`: what a configured instrument can see before anything is tuned — for each timescale of its
//! ladder, the background in the search disc, the critical count, the burst signal at a few distances, and the
//! distances of 50% and 90% detection probability; then the effective volume and the rate-density upper limit
//! one year of live time with no detection would give.

use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::Context;
use glint_science::reach::{ReachParams, reach_report};

use crate::config::config_or_exit;

/// Arguments of `glint reach`.
#[derive(Debug, clap::Args)]
pub(crate) struct ReachArgs {
    /// Configuration file; the embedded default when omitted.
    #[arg(long)]
    config: Option<PathBuf>,
    /// Instrument id; the first configured instrument when omitted.
    #[arg(long)]
    instrument: Option<String>,
    /// Target false-alarm rate per year; the instrument's configured value when omitted.
    #[arg(long)]
    far_per_year: Option<f64>,
    /// Zenith (or off-axis) angle of the burst, degrees.
    #[arg(long, default_value_t = 20.0)]
    zenith_deg: f64,
    /// Print one JSON object instead of a table.
    #[arg(long)]
    json: bool,
}

/// Runs `glint reach`.
pub(crate) fn run(args: &ReachArgs) -> anyhow::Result<ExitCode> {
    let cfg = config_or_exit(args.config.as_ref())?;
    let inst = match &args.instrument {
        Some(id) => cfg
            .instrument(id)
            .with_context(|| format!("no instrument '{id}' in {}", cfg.source_name))?,
        None => cfg.instruments.first().context("no instrument configured")?,
    };
    let far = args.far_per_year.unwrap_or(inst.search.far_per_year);
    if !(far.is_finite() && far > 0.0) {
        anyhow::bail!("--far-per-year must be a finite number > 0, got {far}");
    }
    if !(args.zenith_deg.is_finite() && (0.0..=inst.response.max_zenith_deg()).contains(&args.zenith_deg)) {
        anyhow::bail!(
            "--zenith-deg must lie in the field of view [0, {}], got {}",
            inst.response.max_zenith_deg(),
            args.zenith_deg
        );
    }
    let params = ReachParams {
        far_per_year: far,
        timescales_s: inst.search.ladder_s.clone(),
        search_radius_deg: inst.search.search_radius_deg,
        zenith_deg: args.zenith_deg,
        distances_pc: vec![0.01, 0.03, 0.1, 0.3],
    };
    let r = reach_report(&inst.id, &inst.spec, &params).context("computing the reach")?;
    if args.json {
        println!("{}", serde_json::to_string_pretty(&r)?);
        return Ok(ExitCode::SUCCESS);
    }
    println!(
        "reach of {} at FAR {} /yr, all-sky rate {:.1} Hz, search radius {} deg, zenith {} deg",
        r.instrument, r.far_per_year, r.all_sky_rate_hz, r.search_radius_deg, args.zenith_deg
    );
    print!("{:>10} {:>12} {:>8}", "timescale", "background", "n_crit");
    if let Some(first) = r.timescales.first() {
        for s in &first.signal {
            print!(" {:>11}", format!("s@{}pc", s.distance_pc));
        }
    }
    println!(" {:>10} {:>10}", "r50 [pc]", "r90 [pc]");
    for t in &r.timescales {
        print!(
            "{:>9}s {:>12.4e} {:>8}",
            t.timescale_s, t.background, t.critical_count
        );
        for s in &t.signal {
            print!(" {:>11.3e}", s.counts);
        }
        println!(" {:>10.4} {:>10.4}", t.r50_pc, t.r90_pc);
    }
    println!(
        "best r50: {:.4} pc ({:.3} light-years)",
        r.best_r50_pc,
        r.best_r50_pc * 3.261_563_777
    );
    println!("effective volume: {:.3e} pc^3", r.effective_volume_pc3);
    println!(
        "rate-density upper limit, 99% CL, one year live, no detection: {:.3e} per pc^3 per year",
        r.rate_density_ul_99_per_pc3_yr
    );
    Ok(ExitCode::SUCCESS)
}
