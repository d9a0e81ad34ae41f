//! `glint tune`'s work: the recordings replayed through the live driver as independent passes (as recorded,
//! time-scrambled, and once per batch of injections), the passes spread over threads or cluster shards and
//! merged in pass order, so the report is the same however many cores or shards ran it; then the analysis,
//! the report files and the plots.

pub(crate) mod analyse;
pub(crate) mod inject;
pub(crate) mod plot;
pub(crate) mod report;
pub(crate) mod stream;
pub(crate) mod tap;

use std::path::PathBuf;
use std::sync::Mutex;
use std::sync::atomic::{AtomicUsize, Ordering};

use glint_engine::{Finding, SECONDS_PER_YEAR};
use glint_science::critical::per_seed_bound;
use glint_science::reach::{ReachParams, reach_report};
use rand::SeedableRng;
use serde::{Deserialize, Serialize};

use crate::config::InstrumentConfig;
use crate::serve::driver::InstrumentDriver;
use analyse::{AssessRec, FlashRec, PassFindings, SearchInfo};
use inject::{InjectSpec, Injection};
use stream::Photons;
use tap::{Tap, TapData};

/// Photons per frame when a pass replays its stream.
const BATCH: usize = 1024;
/// Injections start this long after the recordings do (warm-up: half the rate window and the acceptance
/// map's first photons) and end this long before (the candidate's persistence window must close).
const LEAD_S: f64 = 120.0;

/// Why tuning failed.
#[derive(Debug, thiserror::Error)]
pub(crate) enum TuneError {
    #[error(transparent)]
    Stream(#[from] stream::StreamError),
    #[error("injections: {0}")]
    Inject(String),
    #[error("the engine: {0}")]
    Engine(#[from] glint_engine::EngineError),
    #[error("shard {0}: {1}")]
    Shard(String, String),
    #[error("a worker thread panicked")]
    Worker,
}

/// What a campaign is: everything but the photons, stored in every shard's output.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub(crate) struct Plan {
    pub(crate) recordings: Vec<String>,
    pub(crate) instrument: String,
    pub(crate) seed: u64,
    pub(crate) loosest_far_per_year: f64,
    pub(crate) inject: InjectSpec,
    pub(crate) passes: Vec<Vec<Injection>>,
    pub(crate) span: (i64, i64),
}

impl Plan {
    /// Passes: 0 as recorded, 1 time-scrambled, then one per injection batch.
    pub(crate) fn units(&self) -> usize {
        2 + self.passes.len()
    }
}

/// One pass's output.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub(crate) struct UnitOutput {
    pub(crate) unit: usize,
    pub(crate) findings: PassFindings,
    pub(crate) tap: TapData,
    pub(crate) injections: Vec<Injection>,
}

/// A shard's file: the plan and the passes it ran.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub(crate) struct ShardFile {
    pub(crate) plan: Plan,
    pub(crate) shard: (usize, usize),
    pub(crate) units: Vec<UnitOutput>,
}

/// Reads the recordings and lays out the campaign.
pub(crate) fn prepare(
    inst: &InstrumentConfig,
    files: &[PathBuf],
    max_frame_bytes: usize,
    inject: InjectSpec,
    loosest_far_per_year: f64,
    seed: u64,
) -> Result<(Plan, Photons), TuneError> {
    let photons = Photons::read(files, max_frame_bytes)?;
    let tail =
        inst.assess.persistence_min_s.max(
            inst.assess.persistence_timescale_factor * inst.search.ladder_s.last().copied().unwrap_or(0.0),
        ) + inst.search.ladder_s.last().copied().unwrap_or(0.0)
            + 5.0;
    let passes = inject::plan(&inject, &photons, &inst.spec, &inst.response, LEAD_S, tail)
        .map_err(TuneError::Inject)?;
    let plan = Plan {
        recordings: files.iter().map(|p| p.display().to_string()).collect(),
        instrument: inst.id.clone(),
        seed,
        loosest_far_per_year,
        inject,
        passes,
        span: photons.span(),
    };
    Ok((plan, photons))
}

/// ln of the loosest per-seed level kept: the nominal bound at the loosest false-alarm rate.
fn keep_ln_p(inst: &InstrumentConfig, photons: &Photons, loosest: f64) -> f64 {
    let (a, b) = photons.span();
    let rate = photons.photons.len() as f64 / ((b - a).max(1) as f64 * 1e-9);
    let k = inst.search.ladder_s.len() as f64;
    (loosest / SECONDS_PER_YEAR / (k * rate)).ln()
}

/// Runs pass `unit` of the plan.
pub(crate) fn run_unit(
    inst: &InstrumentConfig,
    plan: &Plan,
    photons: &Photons,
    unit: usize,
) -> Result<UnitOutput, TuneError> {
    let keep = keep_ln_p(inst, photons, plan.loosest_far_per_year);
    let unit_seed = plan
        .seed
        .wrapping_mul(0x9e37_79b9_7f4a_7c15)
        .wrapping_add(unit as u64);
    let mut injections = Vec::new();
    let owned;
    let stream: &Photons = match unit {
        0 => photons,
        1 => {
            let mut rng = rand_pcg::Pcg64::seed_from_u64(unit_seed);
            owned = photons.scrambled(&mut rng);
            &owned
        }
        _ => {
            injections = plan.passes.get(unit - 2).cloned().unwrap_or_default();
            let extra = inject::simulate(
                &mut injections,
                &inst.id,
                &inst.spec,
                plan.span,
                plan.inject.max_time_to_go_s,
                unit_seed,
            )
            .map_err(TuneError::Inject)?;
            owned = photons.with(&extra);
            &owned
        }
    };
    let mut driver = InstrumentDriver::new(inst, true)?;
    let (tap, data) = Tap::new(inst.search.ladder_s.len(), keep, unit_seed ^ 0x7a9);
    driver.set_tap(Some(Box::new(tap)));
    let mut findings = PassFindings::default();
    let mut found: Vec<Finding> = Vec::new();
    for frame in stream.frames(BATCH) {
        if driver.on_frame(&frame, &mut found).is_err() {
            findings.refused_frames += 1;
        }
        reduce(&mut found, &mut findings);
    }
    driver.finish(&mut found);
    reduce(&mut found, &mut findings);
    let stats = driver.engine_stats();
    driver.set_tap(None);
    findings.live_ns = stats.live_ns;
    findings.dead_ns = stats.dead_ns;
    findings.released = stats.released;
    let tap = data
        .lock()
        .map(|mut d| std::mem::take(&mut *d))
        .map_err(|_| TuneError::Worker)?;
    Ok(UnitOutput {
        unit,
        findings,
        tap,
        injections,
    })
}

fn reduce(found: &mut Vec<Finding>, out: &mut PassFindings) {
    for f in found.drain(..) {
        match f {
            Finding::Flash(x) => out.flashes.push(FlashRec {
                candidate: x.candidate,
                end_ns: x.end_ns,
                ra_deg: x.ra_deg,
                dec_deg: x.dec_deg,
                timescale_s: x.timescale_s,
                far_per_year: x.far_per_year,
            }),
            Finding::Assessment(a) => out.assessments.push(AssessRec {
                candidate: a.candidate,
                verdict: a.verdict.as_str().to_owned(),
                ra_deg: a.trigger.ra_deg,
                dec_deg: a.trigger.dec_deg,
                fit_converged: a.fit.converged,
                distance_pc: a.fit.distance_pc,
                distance_pc_lo: a.fit.distance_pc_lo,
                distance_pc_hi: a.fit.distance_pc_hi,
            }),
            _ => {}
        }
    }
}

/// Runs the units `units` on `jobs` threads; outputs in unit order whatever the thread count.
pub(crate) fn run_units(
    inst: &InstrumentConfig,
    plan: &Plan,
    photons: &Photons,
    units: &[usize],
    jobs: usize,
    progress: &(dyn Fn(usize, usize) + Sync),
) -> Result<Vec<UnitOutput>, TuneError> {
    let next = AtomicUsize::new(0);
    let done = AtomicUsize::new(0);
    let results: Mutex<Vec<Option<Result<UnitOutput, TuneError>>>> =
        Mutex::new((0..units.len()).map(|_| None).collect());
    std::thread::scope(|s| {
        for _ in 0..jobs.clamp(1, units.len().max(1)) {
            s.spawn(|| {
                loop {
                    let i = next.fetch_add(1, Ordering::Relaxed);
                    let Some(&u) = units.get(i) else { break };
                    let r = run_unit(inst, plan, photons, u);
                    if let Ok(mut v) = results.lock() {
                        v[i] = Some(r);
                    }
                    progress(done.fetch_add(1, Ordering::Relaxed) + 1, units.len());
                }
            });
        }
    });
    let v = results.into_inner().map_err(|_| TuneError::Worker)?;
    v.into_iter()
        .map(|r| r.unwrap_or(Err(TuneError::Worker)))
        .collect()
}

/// The search's description for the analysis.
pub(crate) fn search_info(inst: &InstrumentConfig) -> SearchInfo {
    let r = inst.search.search_radius_deg;
    let resp = &inst.response;
    let sigma = resp.psf_sigma_deg(resp.energy_min_gev());
    let zmax = resp.max_zenith_deg();
    SearchInfo {
        instrument: inst.id.clone(),
        ladder_s: inst.search.ladder_s.clone(),
        search_radius_deg: r,
        far_per_year: inst.search.far_per_year,
        // The engine's merge radius (engine.rs on_crossing).
        match_deg: (3.0 * r).max(r + 3.0 * sigma).min(90.0),
        cluster_gap_s: inst.assess.persistence_min_s,
        field_of_view_sr: 2.0 * std::f64::consts::PI * (1.0 - zmax.to_radians().cos()),
    }
}

/// The full report from every unit's output (in any order; they are sorted by unit).
pub(crate) fn analyse(
    inst: &InstrumentConfig,
    plan: &Plan,
    mut units: Vec<UnitOutput>,
) -> Result<analyse::Report, TuneError> {
    units.sort_by_key(|u| u.unit);
    units.dedup_by_key(|u| u.unit);
    let want = plan.units();
    if units.len() != want || units.iter().enumerate().any(|(i, u)| u.unit != i) {
        let have: Vec<usize> = units.iter().map(|u| u.unit).collect();
        return Err(TuneError::Shard(
            "merge".into(),
            format!("passes {have:?} of 0..{want}: some shards are missing"),
        ));
    }
    let s = search_info(inst);
    let cal = inst.trials.as_ref();
    let far_levels: Vec<f64> = (0..=28).map(|i| 10f64.powf(7.0 - 0.5 * f64::from(i))).collect();
    // Per-seed levels from the loosest kept one down by half decades.
    let keep = units[0].tap.keep_ln_p.exp();
    let test_levels: Vec<f64> = [1e-2, 1e-3, 1e-4]
        .into_iter()
        .filter(|&p| p <= keep)
        .chain((0..=16).map(|i| keep * 10f64.powf(-0.5 * f64::from(i))))
        .collect();
    let mut background = Vec::new();
    for (u, name) in units.iter().take(2).zip(["as recorded", "time-scrambled"]) {
        background.push(analyse::background(
            name,
            &u.tap,
            &u.findings,
            &s,
            cal,
            &far_levels,
            &test_levels,
        ));
    }
    let live = units[0].findings.live_ns as f64 * 1e-9;
    let rate = background.first().map_or(0.0, |b| b.rate_hz);
    let k = s.ladder_s.len();
    let far_s = s.far_per_year / SECONDS_PER_YEAR;
    let bound = match cal {
        Some(c) => c.bound(far_s, k, rate),
        None => per_seed_bound(far_s, k, rate).unwrap_or(0.0),
    };
    let injections = if plan.passes.is_empty() {
        None
    } else {
        let reach = reach_report(
            &inst.id,
            &inst.spec,
            &ReachParams {
                far_per_year: s.far_per_year,
                timescales_s: s.ladder_s.clone(),
                search_radius_deg: s.search_radius_deg,
                zenith_deg: plan.inject.zenith_deg.unwrap_or(20.0),
                distances_pc: plan.inject.distances_pc.clone(),
            },
        )
        .ok();
        let passes: Vec<_> = units
            .iter()
            .skip(2)
            .map(|u| (u.injections.clone(), u.findings.clone(), u.tap.clone()))
            .collect();
        Some(analyse::injections(
            &passes,
            &s,
            bound.max(1e-300).ln(),
            plan.inject.max_time_to_go_s,
            plan.inject.zenith_deg,
            &plan.inject.distances_pc,
            reach.as_ref(),
        ))
    };
    let limits = injections
        .as_ref()
        .filter(|i| i.effective_volume_pc3 > 0.0 && live > 0.0)
        .map_or_else(Vec::new, |i| analyse::limits(i.effective_volume_pc3, live));
    Ok(analyse::Report {
        search: s,
        calibration: cal.map(|c| format!("{} ({:.1} h of live time)", c.source, c.live_seconds / 3600.0)),
        background,
        injections,
        live_seconds: live,
        limits,
        published_99_range_per_pc3_yr: (2e2, 4e4),
    })
}
