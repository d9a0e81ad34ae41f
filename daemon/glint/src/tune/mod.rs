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
use glint_science::ScienceError;
use glint_science::critical::per_seed_bound;
use glint_science::reach::{ReachParams, ReachReport, reach_report};
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

/// Reads the recordings (or FITS event lists) and lays out the campaign.
pub(crate) fn prepare(
    inst: &InstrumentConfig,
    files: &[PathBuf],
    cfg: &crate::config::Config,
    inject: InjectSpec,
    loosest_far_per_year: f64,
    seed: u64,
) -> Result<(Plan, Photons), TuneError> {
    let photons = Photons::read(files, cfg, Some(&inst.id))?;
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
            let frame = glint_sim::sky::SkyFrame::new(&inst.spec.site, plan.span.0);
            owned = photons.scrambled(&mut rng, &frame);
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
/// `glint reach` for the instrument's own search at one zenith angle (deg) and distances (pc): what the
/// injections are placed around and compared with.
pub(crate) fn reach_at(
    inst: &InstrumentConfig,
    zenith_deg: f64,
    distances_pc: Vec<f64>,
) -> Result<ReachReport, ScienceError> {
    reach_report(
        &inst.id,
        &inst.spec,
        &ReachParams {
            far_per_year: inst.search.far_per_year,
            timescales_s: inst.search.ladder_s.clone(),
            search_radius_deg: inst.search.search_radius_deg,
            zenith_deg,
            distances_pc,
        },
    )
}

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
        let reach = reach_at(
            inst,
            plan.inject.zenith_deg.unwrap_or(20.0),
            plan.inject.distances_pc.clone(),
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

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap
mod tests {
    use std::path::Path;

    use glint_engine::trials::TrialsMeter;
    use glint_sim::{Simulator, load_scenario};

    use super::*;
    use crate::config::Config;

    fn inst() -> InstrumentConfig {
        let c = Config::embedded_default().unwrap();
        let mut i = c.instruments[0].clone();
        i.trials = None;
        i
    }

    /// `seconds` of the quiet-hour scenario's background (250 Hz) with `seed`.
    fn background(seconds: f64, seed: u64) -> Photons {
        let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("../../deploy/scenarios/quiet-hour.toml");
        let mut sc = load_scenario(&path).unwrap();
        sc.duration_ns = (seconds * 1e9) as i64;
        let sim = Simulator::new(&sc, seed).unwrap();
        let mut p = Photons {
            instrument: Some(sc.instrument.id.clone()),
            photons: Photons::from_frames(sim),
            dead: Vec::new(),
        };
        p.sort();
        p
    }

    fn spec(
        inst: &InstrumentConfig,
        count: usize,
        distances_pc: Vec<f64>,
        zenith_deg: Option<f64>,
    ) -> InjectSpec {
        InjectSpec {
            count,
            distances_pc,
            max_time_to_go_s: 30.0,
            spacing_s: 40.0,
            zenith_deg,
            seed: 5,
            separation_window_s: 500.0,
            min_separation_deg: 2.0 * search_info(inst).match_deg,
        }
    }

    fn plan_for(inst: &InstrumentConfig, photons: &Photons, s: InjectSpec) -> Plan {
        let tail = 335.0;
        let passes = inject::plan(&s, photons, &inst.spec, &inst.response, LEAD_S, tail).unwrap();
        Plan {
            recordings: vec!["test".into()],
            instrument: inst.id.clone(),
            seed: 3,
            loosest_far_per_year: 1e7,
            inject: s,
            passes,
            span: photons.span(),
        }
    }

    /// Passes on one thread, on three, and as two shards merged give the same outputs and the same report.
    #[test]
    fn threads_and_shards_give_the_serial_result() {
        let inst = inst();
        let photons = background(700.0, 21);
        let plan = plan_for(&inst, &photons, spec(&inst, 8, vec![0.05, 0.1], None));
        assert!(plan.passes.len() >= 2, "{} passes", plan.passes.len());
        let all: Vec<usize> = (0..plan.units()).collect();
        let quiet = |_: usize, _: usize| {};
        let serial = run_units(&inst, &plan, &photons, &all, 1, &quiet).unwrap();
        let threaded = run_units(&inst, &plan, &photons, &all, 3, &quiet).unwrap();
        assert_eq!(
            serde_json::to_string(&serial).unwrap(),
            serde_json::to_string(&threaded).unwrap()
        );
        let even: Vec<usize> = all.iter().copied().filter(|u| u % 2 == 0).collect();
        let odd: Vec<usize> = all.iter().copied().filter(|u| u % 2 == 1).collect();
        let mut sharded = run_units(&inst, &plan, &photons, &odd, 1, &quiet).unwrap();
        sharded.extend(run_units(&inst, &plan, &photons, &even, 2, &quiet).unwrap());
        // Shards travel as JSON files: the round trip must keep every bit.
        let text = serde_json::to_string(&sharded).unwrap();
        let mut sharded: Vec<UnitOutput> = serde_json::from_str(&text).unwrap();
        let a = analyse(&inst, &plan, serial).unwrap();
        let b = analyse(&inst, &plan, sharded.clone()).unwrap();
        assert_eq!(
            serde_json::to_string(&a).unwrap(),
            serde_json::to_string(&b).unwrap()
        );
        assert_eq!(a.injections.as_ref().unwrap().count, 8);
        // A missing shard is an error, not a smaller report.
        sharded.retain(|u| u.unit != 1);
        assert!(analyse(&inst, &plan, sharded).is_err());
    }

    /// The acceptance checks of the background, at CI size (40 min calibration, 40 min test): randomised
    /// p-values of the smallest timescale flat (chi-square, 20 dof, p > 0.001); tests crossing each
    /// per-seed level within 3 sigma of the Poisson prediction on every timescale; candidates within 3
    /// sigma of the calibrated false-alarm rate at every level expecting at least 10.
    #[test]
    fn background_matches_its_predictions() {
        let mut inst = inst();
        let cal_bg = background(2400.0, 11);
        let mut d = InstrumentDriver::measuring(&inst, 1e7).unwrap();
        let mut meter = TrialsMeter::new();
        let mut found = Vec::new();
        for f in cal_bg.frames(BATCH) {
            d.on_frame(&f, &mut found).unwrap();
            found.drain(..).for_each(|f| meter.observe(&f));
        }
        d.finish(&mut found);
        found.drain(..).for_each(|f| meter.observe(&f));
        let cfg = crate::serve::driver::engine_config(&inst, true);
        let cal = meter
            .calibration(&cfg, &d.engine_stats(), 1e7, 20, "test")
            .unwrap();
        inst.trials = Some(cal);
        let photons = background(2400.0, 12);
        let plan = plan_for(&inst, &photons, spec(&inst, 0, vec![0.1], None));
        let out = run_units(&inst, &plan, &photons, &[0, 1], 2, &|_, _| {}).unwrap();
        let r = analyse(&inst, &plan, out).unwrap();
        for bg in &r.background {
            let t0 = &bg.timescales[0];
            assert_eq!(t0.randomised_dof, 20);
            assert!(
                t0.randomised_p > 1e-3,
                "{}: chi2 {} p {}",
                bg.name,
                t0.randomised_chi2,
                t0.randomised_p
            );
            let mut checked = 0;
            for t in &bg.timescales {
                for l in t.levels.iter().filter(|l| l.predicted >= 3.0) {
                    checked += 1;
                    assert!(
                        l.z.abs() <= 3.0,
                        "{} {} s at p {:e}: {l:?}",
                        bg.name,
                        t.timescale_s,
                        l.p
                    );
                }
            }
            assert!(checked >= 8, "{checked} levels checked");
            let levels: Vec<_> = bg.far_levels.iter().filter(|l| l.expected >= 10.0).collect();
            assert!(levels.len() >= 2, "{:?}", bg.far_levels);
            for l in levels {
                assert!(l.z.abs() <= 3.0, "{}: {l:?}", bg.name);
            }
        }
    }

    /// Efficiency at zenith 20 deg against `glint reach` at 0.7, 1 and 1.3 times its best r50, 24
    /// injections each: the best timescale's efficiency within 3 binomial sigma (plus 0.05 for what the
    /// reach leaves out: energy dispersion, the seed's own PSF scatter) of the reach's best P_det.
    #[test]
    fn efficiency_agrees_with_reach() {
        let inst = inst();
        let r = reach_at(&inst, 20.0, vec![0.1]).unwrap();
        let ds: Vec<f64> = [0.7, 1.0, 1.3].iter().map(|f| f * r.best_r50_pc).collect();
        let photons = background(1500.0, 31);
        let plan = plan_for(&inst, &photons, spec(&inst, 72, ds, Some(20.0)));
        let all: Vec<usize> = (0..plan.units()).collect();
        let out = run_units(&inst, &plan, &photons, &all, 2, &|_, _| {}).unwrap();
        let rep = analyse(&inst, &plan, out).unwrap();
        let inj = rep.injections.unwrap();
        for d in &inj.distances {
            let best = d.per_timescale.iter().copied().fold(0.0, f64::max);
            let reach = d.reach_per_timescale.iter().copied().fold(0.0, f64::max);
            let sigma = (reach * (1.0 - reach) / d.injected as f64).sqrt();
            assert!(d.injected >= 20, "{d:?}");
            assert!(
                (best - reach).abs() <= 3.0 * sigma + 0.05,
                "{} pc: injections {best:.3} vs reach {reach:.3} (sigma {sigma:.3})",
                d.distance_pc
            );
        }
    }
}
