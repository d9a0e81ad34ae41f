//! The simulator proper: turns a checked scenario and a seed into the producer frames an instrument's front
//! end would send (a `Hello`, then photon batches, each promising how old the photons still to come can be,
//! and `StreamStatus` heartbeats), plus truth records.
//!
//! Memory is bounded: transient sources (evaporation, afterglow-like bursts, identical-timestamp glitches)
//! are drawn once up front (they are small and capped); the background, steady sources and rate jumps are
//! drawn one chunk of event time at a time, so a run holds at most about one chunk of photons.
//!
//! Determinism: every source draws from its own PCG stream (`Pcg64`) derived from the seed and the
//! source's index (the background from its own), so adding a source leaves the others' photons unchanged;
//! photons are merged by a stable sort; no hash-map order is used. The photon values go through the
//! platform's `libm` (sin, cos, pow, exp, ...): byte-identical frames are promised for the same build on
//! x86_64 Linux with glibc; another libm may differ in the last bit of a coordinate.

use std::collections::VecDeque;

use glint_science::instrument::InstrumentResponse;
use glint_wire::pb::{DeadInterval, Hello, PhotonBatch, ProducerFrame, StreamStatus, producer_frame::Body};
use rand::{RngExt, SeedableRng};
use rand_pcg::Pcg64;
use serde::Serialize;

use crate::draw::{self, AfterglowCurve, EvaporationSampler, MAX_BURST_PROPOSALS, PowerLaw, ZenithShape};
use crate::scenario::{Glitch, Problem, Scenario, Source, seconds_to_ns};
use crate::sky::{SkyFrame, gps_ns_to_utc_string, offset_by};
use crate::{SimError, TIMESCALES_S};

/// Event time generated per step for the streamed sources (background, steady sources, rate jumps).
const CHUNK_NS: i64 = 1_000_000_000;
/// Largest expected photon count of a pre-drawn transient source.
const MAX_TRANSIENT_PHOTONS: f64 = 5e6;
/// Stream id of the background (sources use their index).
const BACKGROUND_STREAM: u64 = u64::MAX;

/// One simulated photon before it is written into a batch.
#[derive(Debug, Clone, Copy)]
struct Photon {
    /// Event time, GPS ns (quantised to the clock precision).
    t: i64,
    /// When it is sent: `t` plus the out-of-order jitter, GPS ns.
    key: i64,
    /// Place in the pending queue before sorting: the tie-break that keeps the sort deterministic.
    ord: u32,
    ra: f64,
    dec: f64,
    zenith: f32,
    azimuth: f32,
    energy: f32,
}

/// How many photons of one source fell in the window of one timescale ending at its reference time.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct TimescaleCount {
    /// Window length, s.
    pub timescale_s: f64,
    /// Photons sent in `(t - timescale, t]`.
    pub counts: u64,
}

/// What one source put into the stream (one JSON line of the truth file).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct TruthRecord {
    /// Index of the source in the scenario file.
    pub index: usize,
    /// Source kind (`evaporation`, `afterglow_burst`, `steady`, `glitch`, `dead`).
    pub kind: &'static str,
    /// ICRS right ascension, degrees (none for sources without a position).
    pub ra_deg: Option<f64>,
    /// ICRS declination, degrees.
    pub dec_deg: Option<f64>,
    /// Reference time, GPS ns: the explosion (evaporation), the peak (afterglow), the instant or start
    /// (glitch, dead), the stream start (steady).
    pub t_gps_ns: i64,
    /// The reference time in UTC.
    pub t_utc: String,
    /// Distance, parsecs (evaporation only).
    pub distance_pc: Option<f64>,
    /// Photons of this source actually sent (after dead time and the field of view).
    pub photons: u64,
    /// Photons sent in windows of each ladder timescale ending at the reference time (transient sources).
    pub counts_by_timescale: Vec<TimescaleCount>,
    /// The source as checked, with its own parameters.
    pub params: Source,
}

/// Running totals of a simulation.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize)]
pub struct SimStats {
    /// Frames produced (the `Hello` included).
    pub frames: u64,
    /// Photon batches produced.
    pub batches: u64,
    /// Status frames produced.
    pub statuses: u64,
    /// Photons sent.
    pub photons: u64,
    /// Sequence numbers skipped by silent dead intervals.
    pub skipped_seq: u64,
}

/// Where a streamed source's photons come from on the sky.
#[derive(Debug, Clone, Copy)]
enum Shape {
    /// Over the field like the background (acceptance-weighted), background spectrum.
    AllSky,
    /// A point source with PSF scatter and its own spectrum.
    Point { ra: f64, dec: f64, law: PowerLaw },
}

/// A source drawn chunk by chunk.
#[derive(Debug)]
struct Streamed {
    /// Truth slot (None for the background).
    truth: Option<usize>,
    rng: Pcg64,
    start: i64,
    end: i64,
    rate_hz: f64,
    shape: Shape,
}

/// A source drawn once, sent in time order.
#[derive(Debug)]
struct Transient {
    photons: Vec<Photon>,
    pos: usize,
}

#[derive(Debug, Clone)]
struct DeadSpan {
    start: i64,
    end: i64,
    declared: bool,
    reason: String,
    /// Declared: written into a status frame. Silent: its lost frame's number has been skipped.
    done: bool,
}

/// The batch being filled.
#[derive(Debug, Default)]
struct OpenBatch {
    first_key: i64,
    batch: PhotonBatch,
}

/// Everything a photon needs from the instrument, shared by the sources.
#[derive(Debug)]
struct Kit {
    frame: SkyFrame,
    resp: InstrumentResponse,
    zenith: ZenithShape,
    bg_law: PowerLaw,
    t0: i64,
    t_end: i64,
    jitter_ns: i64,
    clock_ns: i64,
    dead: Vec<(i64, i64)>,
}

impl Kit {
    fn in_dead(&self, t: i64) -> bool {
        self.dead.iter().any(|&(s, e)| t >= s && t < e)
    }

    fn quantise(&self, t: i64) -> i64 {
        let q = if self.clock_ns > 1 {
            t - t.rem_euclid(self.clock_ns)
        } else {
            t
        };
        q.max(self.t0)
    }

    fn key(&self, rng: &mut Pcg64, t: i64) -> i64 {
        let j = if self.jitter_ns > 0 {
            (rng.random::<f64>() * self.jitter_ns as f64) as i64
        } else {
            0
        };
        (t + j).min(self.t_end - 1).max(t)
    }

    /// A reconstructed energy: the true one from `law`, then the energy dispersion.
    fn energy(&self, rng: &mut Pcg64, law: &PowerLaw) -> f64 {
        let e = law.draw(rng);
        draw::disperse_energy(rng, e, self.resp.energy_sigma_ln(e))
    }

    /// The power law of `index` over the instrument's energy range.
    fn law(&self, index: f64) -> PowerLaw {
        PowerLaw::new(index, self.resp.energy_min_gev(), self.resp.energy_max_gev())
    }

    /// A photon from the field like the background: zenith from the acceptance, azimuth uniform.
    fn all_sky(&self, rng: &mut Pcg64, t: i64) -> Photon {
        let cos_z = self.zenith.draw_cos(rng);
        let az = 360.0 * rng.random::<f64>();
        let e = self.energy(rng, &self.bg_law);
        let key = self.key(rng, t);
        let z = cos_z.acos().to_degrees();
        let (ra, dec) = self
            .frame
            .to_icrs_trig(cos_z, (1.0 - cos_z * cos_z).max(0.0).sqrt(), z, az, t);
        photon(t, key, ra, dec, z, az, e)
    }

    /// A photon scattered by the PSF (at `e_true`) about a sky position, with energy `e_reco`.
    fn near(&self, rng: &mut Pcg64, t: i64, ra: f64, dec: f64, sigma_deg: f64, e_reco: f64) -> Photon {
        let (r, pa) = draw::gaussian_offset(rng, sigma_deg);
        let (ra, dec) = if r > 0.0 {
            offset_by(ra, dec, r, pa)
        } else {
            (ra, dec)
        };
        let key = self.key(rng, t);
        let (z, az) = self.frame.to_instrument(ra, dec, t);
        photon(t, key, ra, dec, z, az, e_reco)
    }

    fn in_fov(&self, ra: f64, dec: f64, t: i64) -> bool {
        self.frame.to_instrument(ra, dec, t).0 <= self.resp.max_zenith_deg()
    }
}

fn photon(t: i64, key: i64, ra: f64, dec: f64, z: f64, az: f64, e: f64) -> Photon {
    let mut azimuth = az as f32;
    if azimuth >= 360.0 {
        azimuth = 0.0;
    }
    Photon {
        t,
        key,
        ord: 0,
        ra,
        dec: dec.clamp(-90.0, 90.0),
        zenith: (z as f32).clamp(0.0, 180.0),
        azimuth,
        energy: (e as f32).max(f32::MIN_POSITIVE),
    }
}

/// A PCG stream for `stream` under `seed`: the two are mixed by SplitMix64 so neighbouring seeds and
/// streams give unrelated generators.
fn substream(seed: u64, stream: u64) -> Pcg64 {
    fn splitmix(mut z: u64) -> u64 {
        z = z.wrapping_add(0x9e37_79b9_7f4a_7c15);
        z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
        z ^ (z >> 31)
    }
    Pcg64::seed_from_u64(splitmix(seed ^ splitmix(stream)))
}

/// The simulator: an iterator of producer frames. Call order: `new`, then `next` until `None`; `truth`
/// and `stats` at any time (complete once the iterator has ended). Generation cannot fail after `new`.
#[derive(Debug)]
pub struct Simulator {
    kit: Kit,
    batch_max_photons: usize,
    batch_max_ns: i64,
    status_period_ns: i64,
    hello: Option<Hello>,
    streamed: Vec<Streamed>,
    transients: Vec<Transient>,
    /// Truth slot of each transient, parallel to `transients`.
    transient_truth: Vec<usize>,
    dead: Vec<DeadSpan>,
    truth: Vec<TruthRecord>,
    pending: Vec<Photon>,
    pending_pos: usize,
    generated_until: i64,
    next_status: i64,
    finished: bool,
    next_seq: u64,
    open: Option<OpenBatch>,
    out: VecDeque<ProducerFrame>,
    stats: SimStats,
}

impl Simulator {
    /// Prepares a run of `scenario` with `seed` (which replaces the scenario's own seed). Draws every
    /// transient source now; fails, naming the source by index and kind, when a source is never inside
    /// the field of view during its window or would hold too many photons.
    pub fn new(scenario: &Scenario, seed: u64) -> Result<Self, SimError> {
        let spec = &scenario.instrument.spec;
        let resp = InstrumentResponse::from_spec(&spec.response)?;
        let (t0, t_end) = (scenario.start_gps_ns, scenario.end_gps_ns());
        let dead_spans: Vec<DeadSpan> = scenario
            .sources
            .iter()
            .filter_map(|s| match s {
                Source::Dead(d) => Some(DeadSpan {
                    start: d.t_gps_ns.max(t0),
                    end: (d.t_gps_ns + seconds_to_ns(d.duration_s)).min(t_end),
                    declared: d.declared,
                    reason: d.reason.clone(),
                    done: false,
                }),
                _ => None,
            })
            .collect();
        let kit = Kit {
            frame: SkyFrame::new(&spec.site, t0),
            zenith: ZenithShape::new(spec.background.zenith_cos_power, spec.response.max_zenith_deg),
            bg_law: PowerLaw::new(
                spec.background.spectral_index,
                resp.energy_min_gev(),
                resp.energy_max_gev(),
            ),
            t0,
            t_end,
            jitter_ns: scenario.jitter_ns,
            clock_ns: resp.clock_precision_ns(),
            dead: dead_spans.iter().map(|d| (d.start, d.end)).collect(),
            resp,
        };
        let mut sim = Self {
            batch_max_photons: scenario.batch_max_photons,
            batch_max_ns: scenario.batch_max_ns,
            status_period_ns: scenario.status_period_ns,
            hello: Some(Hello {
                instrument: scenario.instrument.id.clone(),
                token: scenario.instrument.token.clone(),
                schema_version: glint_wire::SCHEMA_VERSION,
                producer: format!("glint-sim {} ({})", env!("CARGO_PKG_VERSION"), scenario.name),
            }),
            streamed: vec![Streamed {
                truth: None,
                rng: substream(seed, BACKGROUND_STREAM),
                start: t0,
                end: t_end,
                rate_hz: spec.background.rate_hz,
                shape: Shape::AllSky,
            }],
            transients: Vec::new(),
            transient_truth: Vec::new(),
            dead: dead_spans,
            truth: Vec::new(),
            pending: Vec::new(),
            pending_pos: 0,
            generated_until: t0,
            next_status: (t0 + scenario.status_period_ns).min(t_end),
            finished: false,
            next_seq: 1,
            open: None,
            out: VecDeque::new(),
            stats: SimStats::default(),
            kit,
        };
        let mut problems = Vec::new();
        for (i, source) in scenario.sources.iter().enumerate() {
            sim.add_source(
                i,
                source,
                seed,
                &spec.response.effective_area.zenith_deg,
                &mut problems,
            );
        }
        if !problems.is_empty() {
            return Err(SimError::Invalid {
                scenario: scenario.name.clone(),
                problems,
            });
        }
        Ok(sim)
    }

    /// What each source put into the stream, in file order (complete once the iterator has ended).
    pub fn truth(&self) -> Vec<TruthRecord> {
        self.truth.clone()
    }

    /// Running totals.
    pub fn stats(&self) -> SimStats {
        self.stats
    }

    fn add_source(
        &mut self,
        i: usize,
        source: &Source,
        seed: u64,
        area_rows: &[f64],
        problems: &mut Vec<Problem>,
    ) {
        let prefix = format!("source[{i}] ({})", source.kind());
        let mut rng = substream(seed, i as u64);
        let kit = &self.kit;
        let slot = self.truth.len();
        let mut record = TruthRecord {
            index: i,
            kind: source.kind(),
            ra_deg: None,
            dec_deg: None,
            t_gps_ns: kit.t0,
            t_utc: String::new(),
            distance_pc: None,
            photons: 0,
            counts_by_timescale: Vec::new(),
            params: source.clone(),
        };
        // Whether (ra, dec) is ever in the field of view over [lo, hi]; the lowest zenith seen.
        let visible = |ra: f64, dec: f64, lo: i64, hi: i64| -> (bool, f64) {
            let (lo, hi) = (lo.max(kit.t0), hi.min(kit.t_end).max(lo.max(kit.t0)));
            // At least one look a minute (a source may graze the edge of the field briefly).
            let steps = ((hi - lo) / 60_000_000_000).clamp(400, 50_000);
            let mut best = f64::INFINITY;
            for s in 0..=steps {
                let t = lo + (((hi - lo) as f64) * s as f64 / steps as f64) as i64;
                best = best.min(kit.frame.to_instrument(ra, dec, t).0);
            }
            (best <= kit.resp.max_zenith_deg(), best)
        };
        let not_visible = |problems: &mut Vec<Problem>, best: f64, what: &str| {
            problems.push(Problem {
                key: format!("{prefix}.dec_deg"),
                message: format!(
                    "the source is outside the field of view (zenith > {} deg; closest {best:.1} deg) for {what}: \
                     below the horizon or out of view for its whole duration",
                    kit.resp.max_zenith_deg()
                ),
            });
        };
        let mut transient: Option<Vec<Photon>> = None;
        match source {
            Source::Evaporation(ev) => {
                record.ra_deg = Some(ev.ra_deg);
                record.dec_deg = Some(ev.dec_deg);
                record.t_gps_ns = ev.t_gps_ns;
                record.distance_pc = Some(ev.distance_pc);
                let first = ev.t_gps_ns - seconds_to_ns(ev.max_time_to_go_s);
                let (ok, best) = visible(ev.ra_deg, ev.dec_deg, first, ev.t_gps_ns);
                if !ok {
                    not_visible(problems, best, "the whole emission window before the explosion");
                    return;
                }
                let sampler =
                    EvaporationSampler::new(&kit.resp, area_rows, ev.distance_pc, ev.max_time_to_go_s);
                if sampler.mean_proposals() > MAX_BURST_PROPOSALS {
                    problems.push(Problem {
                        key: format!("{prefix}.distance_pc"),
                        message: format!(
                            "{} pc is too close: drawing the burst needs {:.3e} proposals (limit {MAX_BURST_PROPOSALS:e})",
                            ev.distance_pc,
                            sampler.mean_proposals()
                        ),
                    });
                    return;
                }
                let drawn = sampler.draw(&mut rng, |e, tau| {
                    let t = ev.t_gps_ns - seconds_to_ns(tau);
                    kit.resp
                        .effective_area_m2(e, kit.frame.to_instrument(ev.ra_deg, ev.dec_deg, t).0)
                });
                let mut photons = Vec::with_capacity(drawn.len());
                for (tau, e_true) in drawn {
                    let t = kit.quantise(ev.t_gps_ns - seconds_to_ns(tau));
                    let e = draw::disperse_energy(&mut rng, e_true, kit.resp.energy_sigma_ln(e_true));
                    let sigma = kit.resp.psf_sigma_deg(e_true);
                    let p = kit.near(&mut rng, t, ev.ra_deg, ev.dec_deg, sigma, e);
                    if t >= kit.t0 && t < kit.t_end && !kit.in_dead(t) {
                        photons.push(p);
                    }
                }
                transient = Some(photons);
            }
            Source::AfterglowBurst(ag) => {
                record.ra_deg = Some(ag.ra_deg);
                record.dec_deg = Some(ag.dec_deg);
                record.t_gps_ns = ag.t_gps_ns;
                let (lo, hi) = (
                    ag.t_gps_ns - seconds_to_ns(ag.rise_s),
                    ag.t_gps_ns + seconds_to_ns(ag.duration_s),
                );
                let (ok, best) = visible(ag.ra_deg, ag.dec_deg, lo, hi);
                if !ok {
                    not_visible(problems, best, "the whole burst");
                    return;
                }
                let curve = AfterglowCurve::new(ag.peak_rate_hz, ag.rise_s, ag.decay_index, ag.duration_s);
                if curve.mean_photons() > MAX_TRANSIENT_PHOTONS {
                    problems.push(Problem {
                        key: format!("{prefix}.peak_rate_hz"),
                        message: format!(
                            "the burst would hold {:.3e} photons (limit {MAX_TRANSIENT_PHOTONS:e}); lower the rate or shorten it",
                            curve.mean_photons()
                        ),
                    });
                    return;
                }
                let n = draw::poisson(&mut rng, curve.mean_photons());
                let law = kit.law(ag.spectral_index);
                let mut photons = Vec::with_capacity(usize::try_from(n).unwrap_or(0));
                for _ in 0..n {
                    let t = kit.quantise(ag.t_gps_ns + seconds_to_ns(curve.draw(&mut rng)));
                    let e_true = law.draw(&mut rng);
                    let e = draw::disperse_energy(&mut rng, e_true, kit.resp.energy_sigma_ln(e_true));
                    let p = kit.near(
                        &mut rng,
                        t,
                        ag.ra_deg,
                        ag.dec_deg,
                        kit.resp.psf_sigma_deg(e_true),
                        e,
                    );
                    if t >= kit.t0 && t < kit.t_end && !kit.in_dead(t) && kit.in_fov(ag.ra_deg, ag.dec_deg, t)
                    {
                        photons.push(p);
                    }
                }
                transient = Some(photons);
            }
            Source::Steady(st) => {
                record.ra_deg = Some(st.ra_deg);
                record.dec_deg = Some(st.dec_deg);
                let (on, off) = (
                    st.on_gps_ns.unwrap_or(kit.t0).max(kit.t0),
                    st.off_gps_ns.unwrap_or(kit.t_end).min(kit.t_end),
                );
                let (ok, best) = visible(st.ra_deg, st.dec_deg, on, off);
                if !ok {
                    not_visible(problems, best, "the whole time it is on");
                    return;
                }
                self.streamed.push(Streamed {
                    truth: Some(slot),
                    rng,
                    start: on,
                    end: off,
                    rate_hz: st.rate_hz,
                    shape: Shape::Point {
                        ra: st.ra_deg,
                        dec: st.dec_deg,
                        law: kit.law(st.spectral_index),
                    },
                });
            }
            Source::Glitch(Glitch::IdenticalTimestamps {
                t_gps_ns,
                photons: n,
                position,
                spread_deg,
            }) => {
                record.t_gps_ns = *t_gps_ns;
                let t = kit.quantise(*t_gps_ns);
                if let Some((ra, dec)) = position {
                    record.ra_deg = Some(*ra);
                    record.dec_deg = Some(*dec);
                    let (z, _) = kit.frame.to_instrument(*ra, *dec, t);
                    if z > kit.resp.max_zenith_deg() {
                        not_visible(problems, z, "the glitch instant");
                        return;
                    }
                }
                let mut photons = Vec::new();
                if !kit.in_dead(t) {
                    for _ in 0..*n {
                        let p = match position {
                            Some((ra, dec)) => {
                                let e = kit.energy(&mut rng, &kit.bg_law);
                                kit.near(&mut rng, t, *ra, *dec, *spread_deg, e)
                            }
                            None => kit.all_sky(&mut rng, t),
                        };
                        photons.push(p);
                    }
                }
                transient = Some(photons);
            }
            Source::Glitch(Glitch::Cluster {
                t_gps_ns,
                duration_s,
                photons: n,
                position: (ra, dec),
                radius_deg,
            }) => {
                record.t_gps_ns = *t_gps_ns;
                record.ra_deg = Some(*ra);
                record.dec_deg = Some(*dec);
                let (z, _) = kit.frame.to_instrument(*ra, *dec, *t_gps_ns);
                if z > kit.resp.max_zenith_deg() {
                    not_visible(problems, z, "the cluster");
                    return;
                }
                let mut photons = Vec::new();
                let span = seconds_to_ns(*duration_s);
                for _ in 0..*n {
                    let t = kit.quantise(t_gps_ns + (rng.random::<f64>() * span as f64) as i64);
                    // Uniform over the disc: radius sqrt(u) R, position angle uniform.
                    let rho = radius_deg * rng.random::<f64>().sqrt();
                    let phi = std::f64::consts::TAU * rng.random::<f64>();
                    let dec_c = (dec + rho * phi.sin()).clamp(-90.0, 90.0);
                    let ra_c = ra + rho * phi.cos() / dec.to_radians().cos().max(1e-6);
                    let e = kit.energy(&mut rng, &kit.bg_law);
                    let p = kit.near(&mut rng, t, ra_c.rem_euclid(360.0), dec_c, 0.0, e);
                    if !kit.in_dead(t) {
                        photons.push(p);
                    }
                }
                transient = Some(photons);
            }
            Source::Glitch(Glitch::RateJump {
                t_gps_ns,
                duration_s,
                factor,
            }) => {
                record.t_gps_ns = *t_gps_ns;
                self.streamed.push(Streamed {
                    truth: Some(slot),
                    rng,
                    start: (*t_gps_ns).max(kit.t0),
                    end: (t_gps_ns + seconds_to_ns(*duration_s)).min(kit.t_end),
                    rate_hz: (factor - 1.0) * self.streamed[0].rate_hz,
                    shape: Shape::AllSky,
                });
            }
            Source::Dead(d) => {
                record.t_gps_ns = d.t_gps_ns;
            }
        }
        record.t_utc = gps_ns_to_utc_string(record.t_gps_ns);
        if let Some(mut photons) = transient {
            photons.sort_by_key(|p| p.t);
            record.photons = photons.len() as u64;
            record.counts_by_timescale = TIMESCALES_S
                .iter()
                .map(|&ts| {
                    let lo = record.t_gps_ns - seconds_to_ns(ts);
                    let counts = photons
                        .iter()
                        .filter(|p| p.t > lo && p.t <= record.t_gps_ns)
                        .count() as u64;
                    TimescaleCount {
                        timescale_s: ts,
                        counts,
                    }
                })
                .collect();
            self.transients.push(Transient { photons, pos: 0 });
            self.transient_truth.push(slot);
        }
        self.truth.push(record);
    }

    /// Draws the photons of event time `[a, b)` from every source and queues them in sending order.
    fn generate_chunk(&mut self) {
        let a = self.generated_until;
        let b = (a + CHUNK_NS).min(self.kit.t_end);
        self.pending.drain(..self.pending_pos);
        self.pending_pos = 0;
        self.kit.frame.refresh_leap_seconds(a);
        let kit = &self.kit;
        for s in &mut self.streamed {
            let (lo, hi) = (a.max(s.start), b.min(s.end));
            if hi <= lo {
                continue;
            }
            let n = draw::poisson(&mut s.rng, s.rate_hz * (hi - lo) as f64 * 1e-9);
            let mut sent = 0_u64;
            for _ in 0..n {
                let t = kit.quantise(lo + (s.rng.random::<f64>() * (hi - lo) as f64) as i64);
                let p = match s.shape {
                    Shape::AllSky => kit.all_sky(&mut s.rng, t),
                    Shape::Point { ra, dec, law } => {
                        let e_true = law.draw(&mut s.rng);
                        let e = draw::disperse_energy(&mut s.rng, e_true, kit.resp.energy_sigma_ln(e_true));
                        let p = kit.near(&mut s.rng, t, ra, dec, kit.resp.psf_sigma_deg(e_true), e);
                        if !kit.in_fov(ra, dec, t) {
                            continue;
                        }
                        p
                    }
                };
                if !kit.in_dead(p.t) {
                    self.pending.push(p);
                    sent += 1;
                }
            }
            if let Some(slot) = s.truth
                && let Some(r) = self.truth.get_mut(slot)
            {
                r.photons += sent;
            }
        }
        for tr in &mut self.transients {
            let start = tr.pos;
            while tr.pos < tr.photons.len() && tr.photons[tr.pos].t < b {
                tr.pos += 1;
            }
            self.pending.extend_from_slice(&tr.photons[start..tr.pos]);
        }
        // An unstable sort with the queue position as tie-break orders exactly as a stable sort would.
        for (i, p) in self.pending.iter_mut().enumerate() {
            p.ord = u32::try_from(i).unwrap_or(u32::MAX);
        }
        self.pending.sort_unstable_by_key(|p| (p.key, p.ord));
        self.generated_until = b;
    }

    /// Work due before anything happening at event time `x`: the frame lost in each silent gap that has
    /// ended (its number is skipped just before the first frame after the gap, so the gap shows as one jump),
    /// and the open batch once it has spanned `batch_max_s`.
    fn before_event(&mut self, x: i64) {
        let mut ended = 0;
        for d in &mut self.dead {
            if !d.declared && !d.done && d.end <= x {
                d.done = true;
                ended += 1;
            }
        }
        if ended > 0 {
            self.flush();
            self.next_seq += ended;
            self.stats.skipped_seq += ended;
        }
        if self
            .open
            .as_ref()
            .is_some_and(|o| x >= o.first_key + self.batch_max_ns)
        {
            self.flush();
        }
    }

    fn flush(&mut self) {
        if let Some(mut o) = self.open.take() {
            let latest = o.batch.time_gps_ns.iter().copied().max().unwrap_or(0);
            o.batch.complete_before_gps_ns = self.unsent_floor().min(latest.saturating_add(1)).max(0);
            o.batch.seq = self.next_seq;
            self.next_seq += 1;
            self.stats.batches += 1;
            self.push(Body::Batch(o.batch));
        }
    }

    /// The batch promise (`complete_before_gps_ns`): nothing not yet sent is older than this. Queued photons
    /// go out in order of their send time, at most the jitter after their own time, so none is older than the
    /// next one's send time minus the jitter; photons not drawn yet lie at or after the clock tick of the
    /// generated span's end. A dead interval still to be declared must reach the daemon before the watermark
    /// passes it, so the promise stops at its start.
    fn unsent_floor(&self) -> i64 {
        let queued = self
            .pending
            .get(self.pending_pos)
            .map_or(i64::MAX, |p| p.key.saturating_sub(self.kit.jitter_ns.max(0)));
        let undrawn = if self.generated_until < self.kit.t_end {
            self.kit.quantise(self.generated_until)
        } else {
            i64::MAX
        };
        let undeclared = self
            .dead
            .iter()
            .filter(|d| d.declared && !d.done)
            .map(|d| d.start)
            .min()
            .unwrap_or(i64::MAX);
        queued.min(undrawn).min(undeclared)
    }

    fn push(&mut self, body: Body) {
        self.stats.frames += 1;
        self.out.push_back(ProducerFrame { body: Some(body) });
    }

    fn take_photon(&mut self) {
        let p = self.pending[self.pending_pos];
        // Still queued while an earlier batch is flushed, so that batch's promise covers it.
        self.before_event(p.key);
        self.pending_pos += 1;
        let cap = self.batch_max_photons;
        let o = self.open.get_or_insert_with(|| OpenBatch {
            first_key: p.key,
            batch: PhotonBatch {
                time_gps_ns: Vec::with_capacity(cap),
                ra_deg: Vec::with_capacity(cap),
                dec_deg: Vec::with_capacity(cap),
                zenith_deg: Vec::with_capacity(cap),
                azimuth_deg: Vec::with_capacity(cap),
                energy_gev: Vec::with_capacity(cap),
                ..PhotonBatch::default()
            },
        });
        let b = &mut o.batch;
        b.time_gps_ns.push(p.t);
        b.ra_deg.push(p.ra);
        b.dec_deg.push(p.dec);
        b.zenith_deg.push(p.zenith);
        b.azimuth_deg.push(p.azimuth);
        b.energy_gev.push(p.energy);
        self.stats.photons += 1;
        if b.time_gps_ns.len() >= cap {
            self.flush();
        }
    }

    fn emit_status(&mut self) {
        let s = self.next_status;
        self.before_event(s);
        self.flush();
        if self.dead.iter().any(|d| !d.declared && d.start < s && s < d.end) {
            // Lost inside a silent gap: its number is used, nothing is sent.
            self.next_seq += 1;
            self.stats.skipped_seq += 1;
        } else {
            let mut dead = Vec::new();
            for d in &mut self.dead {
                if d.declared && !d.done && d.end <= s {
                    d.done = true;
                    dead.push(DeadInterval {
                        start_gps_ns: d.start,
                        end_gps_ns: d.end,
                        reason: d.reason.clone(),
                    });
                }
            }
            let seq = self.next_seq;
            self.next_seq += 1;
            self.stats.statuses += 1;
            self.push(Body::Status(StreamStatus {
                seq,
                now_gps_ns: s,
                dead,
            }));
        }
        if s >= self.kit.t_end {
            self.finished = true;
        } else {
            self.next_status = (s + self.status_period_ns).min(self.kit.t_end);
        }
    }

    fn advance(&mut self) {
        while self.out.is_empty() && !self.finished {
            match self.pending.get(self.pending_pos).map(|p| p.key) {
                Some(k) if k < self.generated_until && k < self.next_status => self.take_photon(),
                _ if self.next_status <= self.generated_until => self.emit_status(),
                _ => self.generate_chunk(),
            }
        }
    }
}

impl Iterator for Simulator {
    type Item = ProducerFrame;

    fn next(&mut self) -> Option<ProducerFrame> {
        if let Some(h) = self.hello.take() {
            self.stats.frames += 1;
            return Some(ProducerFrame {
                body: Some(Body::Hello(h)),
            });
        }
        self.advance();
        self.out.pop_front()
    }
}
