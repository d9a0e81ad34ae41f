//! Injection campaigns: evaporation bursts drawn by the simulator's own model (`glint-sim`, the photons of
//! an `evaporation` source with no background) at random times and random positions in the field of view,
//! over a grid of distances, spread over passes so that bursts of one pass do not overlap in time.

use glint_science::instrument::{InstrumentResponse, InstrumentSpec};
use glint_sim::Simulator;
use glint_sim::scenario::{Evaporation, Scenario, ScenarioInstrument, Source};
use glint_sim::sky::SkyFrame;
use rand::{RngExt, SeedableRng};
use serde::{Deserialize, Serialize};

use super::stream::{Photon, Photons};

/// One injected burst.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub(crate) struct Injection {
    /// Index over the whole campaign.
    pub(crate) id: usize,
    /// The pass it belongs to.
    pub(crate) pass: usize,
    /// Explosion time, GPS ns.
    pub(crate) t_ns: i64,
    pub(crate) ra_deg: f64,
    pub(crate) dec_deg: f64,
    /// Zenith (or off-axis) angle at the explosion, degrees.
    pub(crate) zenith_deg: f64,
    pub(crate) distance_pc: f64,
    /// Photons the simulator put into the stream (filled when the pass runs).
    pub(crate) photons: u64,
}

/// How injections are laid out.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub(crate) struct InjectSpec {
    pub(crate) count: usize,
    pub(crate) distances_pc: Vec<f64>,
    /// Photons are drawn over this much time before the explosion, s.
    pub(crate) max_time_to_go_s: f64,
    /// Bursts of one pass are at least this far apart, s.
    pub(crate) spacing_s: f64,
    /// None: uniform over the field of view's solid angle; Some: this zenith, random azimuth.
    pub(crate) zenith_deg: Option<f64>,
    pub(crate) seed: u64,
    /// Bursts of one pass closer than this in time (s) are also at least `min_separation_deg` apart, so
    /// one burst's candidate never swallows the next one's.
    pub(crate) separation_window_s: f64,
    pub(crate) min_separation_deg: f64,
}

/// Lays out `spec.count` injections over the recordings' span `[t0, t1]`, avoiding their first `lead_s`
/// (warm-up), their last `tail_s` (the candidate must close) and dead time. Returns them grouped by pass.
pub(crate) fn plan(
    spec: &InjectSpec,
    photons: &Photons,
    inst: &InstrumentSpec,
    resp: &InstrumentResponse,
    lead_s: f64,
    tail_s: f64,
) -> Result<Vec<Vec<Injection>>, String> {
    if spec.count == 0 {
        return Ok(Vec::new());
    }
    if spec.distances_pc.is_empty() || spec.distances_pc.iter().any(|d| !(d.is_finite() && *d > 0.0)) {
        return Err("injection distances must be positive numbers".into());
    }
    let ns = |s: f64| (s * 1e9) as i64;
    let (t0, t1) = photons.span();
    let (a, b) = (t0 + ns(lead_s), t1 - ns(tail_s));
    let spacing = ns(spec.spacing_s.max(spec.max_time_to_go_s + 1.0));
    if b - a < spacing {
        return Err(format!(
            "the recordings span {:.0} s: injections need at least {:.0} s (warm-up {lead_s:.0} s, close-out {tail_s:.0} s, one slot {:.0} s)",
            (t1 - t0) as f64 / 1e9,
            lead_s + tail_s + spec.spacing_s,
            spec.spacing_s
        ));
    }
    let slots = ((b - a) / spacing) as usize;
    let zmax = (resp.max_zenith_deg() - 1.0).max(0.0);
    if let Some(z) = spec.zenith_deg {
        if !(z.is_finite() && (0.0..=zmax).contains(&z)) {
            return Err(format!("--zenith-deg must lie in [0, {zmax}]"));
        }
    }
    let frame = SkyFrame::new(&inst.site, t0);
    let mut rng = rand_pcg::Pcg64::seed_from_u64(spec.seed ^ 0x1a7e_c7ed);
    let touches_dead = |t: i64| {
        let from = t - ns(spec.max_time_to_go_s) - ns(tail_s.min(60.0));
        photons
            .dead
            .iter()
            .any(|&(x, y)| x < t + 1_000_000_000 && y > from)
    };
    let mut passes: Vec<Vec<Injection>> = Vec::new();
    let mut id = 0;
    let mut empty_passes = 0;
    while id < spec.count {
        let pass = passes.len();
        let mut this = Vec::new();
        for s in 0..slots {
            if id >= spec.count {
                break;
            }
            let lo = a + s as i64 * spacing + ns(spec.max_time_to_go_s);
            let hi = a + (s as i64 + 1) * spacing;
            let mut chosen = None;
            for _ in 0..10 {
                let t = lo + (rng.random::<f64>() * (hi - lo) as f64) as i64;
                if !touches_dead(t) {
                    chosen = Some(t);
                    break;
                }
            }
            let Some(t) = chosen else { continue };
            let cos_max = zmax.to_radians().cos();
            let mut pos = (0.0, 0.0, 0.0);
            for _ in 0..50 {
                let zenith = spec.zenith_deg.unwrap_or_else(|| {
                    let c: f64 = 1.0 - rng.random::<f64>() * (1.0 - cos_max);
                    c.clamp(-1.0, 1.0).acos().to_degrees()
                });
                let az = rng.random::<f64>() * 360.0;
                let (ra, dec) = frame.to_icrs(zenith, az, t);
                pos = (zenith, ra, dec);
                let window = ns(spec.separation_window_s);
                let crowded = this.iter().any(|o: &Injection| {
                    (o.t_ns - t).abs() <= window
                        && glint_sim::sky::separation_deg(o.ra_deg, o.dec_deg, ra, dec)
                            < spec.min_separation_deg
                });
                if !crowded {
                    break;
                }
            }
            let (zenith, ra, dec) = pos;
            this.push(Injection {
                id,
                pass,
                t_ns: t,
                ra_deg: ra,
                dec_deg: dec,
                zenith_deg: zenith,
                distance_pc: spec.distances_pc[id % spec.distances_pc.len()],
                photons: 0,
            });
            id += 1;
        }
        if this.is_empty() {
            empty_passes += 1;
            if empty_passes > 3 {
                return Err("no slot for an injection is free of dead time".into());
            }
        }
        passes.push(this);
    }
    Ok(passes)
}

/// Draws the photons of one pass's bursts (and fills in how many each gave).
pub(crate) fn simulate(
    pass: &mut [Injection],
    instrument: &str,
    spec: &InstrumentSpec,
    span: (i64, i64),
    max_time_to_go_s: f64,
    seed: u64,
) -> Result<Vec<Photon>, String> {
    let mut spec = spec.clone();
    spec.background.rate_hz = 0.0;
    let scenario = Scenario {
        name: "tune-injections".into(),
        start_gps_ns: span.0,
        duration_ns: (span.1 - span.0).max(1) + 1,
        seed,
        batch_max_photons: 4096,
        batch_max_ns: 1_000_000_000,
        jitter_ns: 0,
        status_period_ns: 3_600_000_000_000,
        instrument: ScenarioInstrument {
            id: instrument.to_owned(),
            token: String::new(),
            spec,
        },
        sources: pass
            .iter()
            .map(|i| {
                Source::Evaporation(Evaporation {
                    ra_deg: i.ra_deg,
                    dec_deg: i.dec_deg,
                    distance_pc: i.distance_pc,
                    t_gps_ns: i.t_ns,
                    max_time_to_go_s,
                })
            })
            .collect(),
    };
    let mut sim = Simulator::new(&scenario, seed).map_err(|e| e.to_string())?;
    let photons = Photons::from_frames(&mut sim);
    for (inj, truth) in pass.iter_mut().zip(sim.truth()) {
        inj.photons = truth.photons;
    }
    Ok(photons)
}
