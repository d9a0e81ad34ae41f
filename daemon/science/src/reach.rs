//! How far an instrument can see a final burst, and the rate limit a year without one would set
//! (docs/science.md section 5); this is what `glint reach` prints. For each timescale of the ladder: the
//! expected background in the search disc, the critical count of the seeded test at the target false-alarm
//! rate, the burst photons in the disc at each distance, and the distances of 50% and 90% detection
//! probability; then the effective volume over the field of view and the 99% rate-density upper limit.
//!
//! Conventions: the seed is the burst's last detected photon, so a window of length `dt` ending there
//! holds the photons of time-to-go `[0, dt]` plus background, and the test crosses when that count
//! (seed included) reaches the critical count: `P_det = P(Poisson(b + s) >= n*)`. The signal `s` folds the
//! burst spectrum with the effective area at the representative zenith angle and with the Gaussian PSF
//! containment of the disc at each energy; energy dispersion is left out.

use serde::Serialize;

use crate::critical::{critical_count, per_seed_bound};
use crate::error::{ScienceError, arg};
use crate::geometry::{disc_solid_angle_sr, gaussian_containment};
use crate::hawking::{YEAR_S, detected_counts_weighted};
use crate::instrument::{Acceptance, InstrumentResponse, InstrumentSpec};
use crate::limits::{gehrels_upper, rate_density_upper_limit};
use crate::poisson;

/// What the reach is computed for.
#[derive(Debug, Clone, PartialEq)]
pub struct ReachParams {
    /// Target false-alarm rate of the whole search, per year.
    pub far_per_year: f64,
    /// The timescale ladder, seconds.
    pub timescales_s: Vec<f64>,
    /// Radius of the search disc, degrees.
    pub search_radius_deg: f64,
    /// Representative zenith (ground) or off-axis (space) angle for the per-timescale figures, degrees.
    pub zenith_deg: f64,
    /// Distances at which to report the expected signal, pc.
    pub distances_pc: Vec<f64>,
}

/// Expected burst photons in the disc at one distance.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SignalAtDistance {
    /// Distance, pc.
    pub distance_pc: f64,
    /// Expected burst photons in the search disc and window.
    pub counts: f64,
    /// Probability that the seeded test crosses.
    pub detection_probability: f64,
}

/// The reach on one timescale.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct TimescaleReach {
    /// Window length, seconds.
    pub timescale_s: f64,
    /// Expected background photons in the disc and window at the representative zenith.
    pub background: f64,
    /// Counts (seed included) at which the seeded test crosses.
    pub critical_count: u32,
    /// Distance of 50% detection probability, pc.
    pub r50_pc: f64,
    /// Distance of 90% detection probability, pc.
    pub r90_pc: f64,
    /// Expected signal at the requested distances.
    pub signal: Vec<SignalAtDistance>,
}

/// The full reach report of one instrument.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ReachReport {
    /// Instrument id.
    pub instrument: String,
    /// Target false-alarm rate, per year.
    pub far_per_year: f64,
    /// All-sky background rate, Hz.
    pub all_sky_rate_hz: f64,
    /// Search-disc radius, degrees.
    pub search_radius_deg: f64,
    /// Representative zenith or off-axis angle, degrees.
    pub zenith_deg: f64,
    /// Per-seed p-value bound `F / (K R)`.
    pub per_seed_bound: f64,
    /// One entry per timescale of the ladder.
    pub timescales: Vec<TimescaleReach>,
    /// The largest r50 over the ladder, pc.
    pub best_r50_pc: f64,
    /// The timescale that gives it, seconds.
    pub best_timescale_s: f64,
    /// `integral dOmega integral P_det r^2 dr` over the field of view, best timescale at each angle, pc^3.
    pub effective_volume_pc3: f64,
    /// Upper limit on the burst rate density at 99% after one year of live time with no detection,
    /// per pc^3 per year.
    pub rate_density_ul_99_per_pc3_yr: f64,
}

/// Background, critical count and signal-at-1-pc of one timescale at one angle.
struct Cell {
    background: f64,
    critical: u32,
    signal_1pc: f64,
}

impl Cell {
    fn p_detect(&self, signal: f64) -> f64 {
        poisson::sf(u64::from(self.critical), self.background + signal)
    }

    /// The signal giving detection probability `p`, by bisection in `ln s`.
    fn signal_for(&self, p: f64) -> f64 {
        let (mut lo, mut hi) = ((1e-6_f64).ln(), (1e6_f64 + 10.0 * f64::from(self.critical)).ln());
        for _ in 0..200 {
            let mid = 0.5 * (lo + hi);
            if self.p_detect(mid.exp()) < p {
                lo = mid;
            } else {
                hi = mid;
            }
            if hi - lo < 1e-12 {
                break;
            }
        }
        (0.5 * (lo + hi)).exp()
    }

    /// Distance of detection probability `p`, pc (0 when no signal reaches the disc).
    fn reach_pc(&self, p: f64) -> f64 {
        if self.signal_1pc <= 0.0 {
            return 0.0;
        }
        (self.signal_1pc / self.signal_for(p)).sqrt()
    }

    /// `integral P_det(r) r^2 dr` in pc^3, net of the background-only crossing probability. With
    /// `s = s1 / r^2` it is `s1^1.5 / 2 integral (P(s) - P(0)) s^-2.5 ds`, done in `ln s` from 1e-4 to 1e4
    /// times the 50% signal, with P = 1 assumed above (the rest is below 1e-6 of the total).
    fn volume_pc3(&self) -> f64 {
        if self.signal_1pc <= 0.0 {
            return 0.0;
        }
        let s50 = self.signal_for(0.5);
        let p0 = self.p_detect(0.0);
        let (u0, u1) = ((s50 * 1e-4).ln(), (s50 * 1e4).ln());
        let n = 600;
        let h = (u1 - u0) / f64::from(n);
        let g = |u: f64| {
            let s = u.exp();
            (self.p_detect(s) - p0).max(0.0) * (-1.5 * u).exp()
        };
        let mut sum = g(u0) + g(u1);
        for i in 1..n {
            sum += if i % 2 == 1 { 4.0 } else { 2.0 } * g(u0 + f64::from(i) * h);
        }
        let body = 0.5 * sum * h / 3.0;
        let head = (s50 * 1e4).powf(-1.5) / 3.0;
        self.signal_1pc.powf(1.5) * (body + head)
    }
}

fn cell(
    resp: &InstrumentResponse,
    rate_hz: f64,
    acceptance: &Acceptance,
    bound: f64,
    radius_deg: f64,
    zenith_deg: f64,
    dt: f64,
) -> Result<Cell, ScienceError> {
    let background = rate_hz * dt * acceptance.density(zenith_deg) * disc_solid_angle_sr(radius_deg);
    let critical = critical_count(background, bound)?;
    let signal_1pc = detected_counts_weighted(resp, zenith_deg, 1.0, 0.0, dt, |e| {
        gaussian_containment(radius_deg, resp.psf_sigma_deg(e))
    })?;
    Ok(Cell {
        background,
        critical,
        signal_1pc,
    })
}

/// The reach report of instrument `id` described by `spec` (checked here) for `params`.
pub fn reach_report(
    id: &str,
    spec: &InstrumentSpec,
    params: &ReachParams,
) -> Result<ReachReport, ScienceError> {
    let mut problems = Vec::new();
    if !spec.check("instrument", &mut problems) {
        return Err(ScienceError::InvalidSpec { problems });
    }
    let far = arg::positive("far_per_year", params.far_per_year)?;
    let radius = arg::within(
        "search_radius_deg",
        params.search_radius_deg,
        1e-6,
        90.0,
        "an angle in (0, 90]",
    )?;
    let zenith = arg::within(
        "zenith_deg",
        params.zenith_deg,
        0.0,
        180.0,
        "an angle in [0, 180]",
    )?;
    if params.timescales_s.is_empty() {
        return Err(ScienceError::InvalidArgument {
            name: "timescales_s",
            value: 0.0,
            expected: "at least one timescale",
        });
    }
    for &dt in &params.timescales_s {
        arg::positive("timescales_s", dt)?;
    }
    for &d in &params.distances_pc {
        arg::positive("distances_pc", d)?;
    }
    let resp = InstrumentResponse::from_spec(&spec.response)?;
    let acceptance = Acceptance::new(spec.background.zenith_cos_power, spec.response.max_zenith_deg)?;
    let rate = spec.background.rate_hz;
    let bound = per_seed_bound(far / YEAR_S, params.timescales_s.len(), rate)?;

    let mut timescales = Vec::with_capacity(params.timescales_s.len());
    for &dt in &params.timescales_s {
        let c = cell(&resp, rate, &acceptance, bound, radius, zenith, dt)?;
        let signal = params
            .distances_pc
            .iter()
            .map(|&d| {
                let counts = c.signal_1pc / (d * d);
                SignalAtDistance {
                    distance_pc: d,
                    counts,
                    detection_probability: c.p_detect(counts),
                }
            })
            .collect();
        timescales.push(TimescaleReach {
            timescale_s: dt,
            background: c.background,
            critical_count: c.critical,
            r50_pc: c.reach_pc(0.5),
            r90_pc: c.reach_pc(0.9),
            signal,
        });
    }
    let (best_r50_pc, best_timescale_s) =
        timescales
            .iter()
            .map(|t| (t.r50_pc, t.timescale_s))
            .fold(
                (0.0, params.timescales_s[0]),
                |acc, x| if x.0 > acc.0 { x } else { acc },
            );

    // Effective volume: Simpson over the field of view in zenith, best timescale at each angle.
    let max_z = spec.response.max_zenith_deg.min(180.0);
    let n = 24;
    let h = max_z.to_radians() / f64::from(n);
    let mut volume = 0.0;
    for i in 0..=n {
        let theta = f64::from(i) * h;
        let weight = if i == 0 || i == n {
            1.0
        } else if i % 2 == 1 {
            4.0
        } else {
            2.0
        };
        let z = theta.to_degrees().min(max_z);
        let mut best = 0.0_f64;
        for &dt in &params.timescales_s {
            best = best.max(cell(&resp, rate, &acceptance, bound, radius, z, dt)?.volume_pc3());
        }
        volume += weight * 2.0 * std::f64::consts::PI * theta.sin() * best;
    }
    let effective_volume_pc3 = volume * h / 3.0;
    if effective_volume_pc3 <= 0.0 {
        return Err(ScienceError::OutOfRange {
            what: "effective volume",
            detail: "the instrument detects no burst photons anywhere in its field of view".into(),
        });
    }
    let rate_density_ul_99_per_pc3_yr =
        rate_density_upper_limit(gehrels_upper(0, 0.99)?, effective_volume_pc3, 1.0)?;
    Ok(ReachReport {
        instrument: id.to_string(),
        far_per_year: far,
        all_sky_rate_hz: rate,
        search_radius_deg: radius,
        zenith_deg: zenith,
        per_seed_bound: bound,
        timescales,
        best_r50_pc,
        best_timescale_s,
        effective_volume_pc3,
        rate_density_ul_99_per_pc3_yr,
    })
}
