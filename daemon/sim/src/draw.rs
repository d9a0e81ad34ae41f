//! The random draws behind every simulated photon: power-law energies, cos-power zenith angles, Gaussian
//! PSF scatter, lognormal energy dispersion, the afterglow light curve, and evaporation bursts drawn from
//! the joint density in time-to-explosion and energy folded with the effective area. All draws take a
//! caller's seeded generator, so the simulator decides which stream each source uses.

use glint_science::hawking::{PARSEC_M, SPECTRUM_NORM, SPECTRUM_T1_GEV};
use glint_science::instrument::InstrumentResponse;
use rand::{Rng, RngExt};
use rand_distr::{Distribution, Poisson, StandardNormal};

/// Uniform in (0, 1]: safe to take the logarithm of.
pub fn open_unit<R: Rng + ?Sized>(rng: &mut R) -> f64 {
    1.0 - rng.random::<f64>()
}

/// A Poisson count with mean `mean` (0 for a mean that is not positive and finite).
pub fn poisson<R: Rng + ?Sized>(rng: &mut R, mean: f64) -> u64 {
    if !(mean > 0.0 && mean.is_finite()) {
        return 0;
    }
    match Poisson::new(mean) {
        Ok(p) => {
            let n: f64 = p.sample(rng);
            n as u64
        }
        Err(_) => 0,
    }
}

/// A power law `dN/dx ~ x^-index` truncated to `[lo, hi]`, drawn by the inverse of its distribution
/// function (the powers of the ends are worked out once).
#[derive(Debug, Clone, Copy)]
pub struct PowerLaw {
    lo: f64,
    hi: f64,
    /// `1 - index`, or 0 for index 1 (then the law is `1/x`).
    g: f64,
    /// `lo^g`.
    a: f64,
    /// `hi^g - lo^g`, or `ln(hi/lo)` when g = 0.
    span: f64,
}

impl PowerLaw {
    /// The law with `index` on `[lo, hi]` (0 < lo < hi, finite).
    pub fn new(index: f64, lo: f64, hi: f64) -> Self {
        let g = 1.0 - index;
        if g.abs() < 1e-12 {
            Self {
                lo,
                hi,
                g: 0.0,
                a: 0.0,
                span: (hi / lo).ln(),
            }
        } else {
            let a = lo.powf(g);
            Self {
                lo,
                hi,
                g,
                a,
                span: hi.powf(g) - a,
            }
        }
    }

    /// The `u` quantile, `u` in [0, 1].
    pub fn quantile(&self, u: f64) -> f64 {
        let x = if self.g == 0.0 {
            self.lo * (u * self.span).exp()
        } else {
            (self.a + u * self.span).powf(1.0 / self.g)
        };
        x.clamp(self.lo, self.hi)
    }

    /// One draw.
    pub fn draw<R: Rng + ?Sized>(&self, rng: &mut R) -> f64 {
        self.quantile(rng.random::<f64>())
    }
}

/// The cos-power acceptance shape `cos(z)^k` within `max_zenith_deg` (for `k > 0` nothing beyond 90 deg,
/// as glint-science's `Acceptance`), ready to draw zenith angles from.
#[derive(Debug, Clone, Copy)]
pub struct ZenithShape {
    k: f64,
    /// `cos(edge)^(k+1)` for k > 0, `cos(edge)` for k = 0.
    low: f64,
}

impl ZenithShape {
    /// The shape for `cos_power` and the field's edge.
    pub fn new(cos_power: f64, max_zenith_deg: f64) -> Self {
        let c = max_zenith_deg.to_radians().cos();
        if cos_power == 0.0 {
            Self { k: 0.0, low: c }
        } else {
            Self {
                k: cos_power,
                low: c.max(0.0).powf(cos_power + 1.0),
            }
        }
    }

    /// The cosine of a zenith angle with density per steradian proportional to the shape: `cos z` is drawn
    /// from `u^k du`, whose distribution function inverts in closed form.
    pub fn draw_cos<R: Rng + ?Sized>(&self, rng: &mut R) -> f64 {
        let u = rng.random::<f64>();
        let x = self.low + u * (1.0 - self.low);
        let cos_z = if self.k == 0.0 {
            x
        } else if self.k == 1.0 {
            x.sqrt()
        } else if self.k == 2.0 {
            x.cbrt()
        } else {
            x.powf(1.0 / (self.k + 1.0))
        };
        cos_z.clamp(-1.0, 1.0)
    }

    /// A zenith angle in degrees drawn as in [`ZenithShape::draw_cos`].
    pub fn draw<R: Rng + ?Sized>(&self, rng: &mut R) -> f64 {
        self.draw_cos(rng).acos().to_degrees()
    }
}

/// An offset drawn from a circular 2-D Gaussian of width `sigma_deg` per axis: (radius, position angle),
/// degrees. The radius follows the Rayleigh distribution.
pub fn gaussian_offset<R: Rng + ?Sized>(rng: &mut R, sigma_deg: f64) -> (f64, f64) {
    let r = sigma_deg * (-2.0 * open_unit(rng).ln()).sqrt();
    let pa = 360.0 * rng.random::<f64>();
    (r, pa)
}

/// A reconstructed energy: the true energy times a lognormal factor of width `sigma_ln`.
pub fn disperse_energy<R: Rng + ?Sized>(rng: &mut R, e_true: f64, sigma_ln: f64) -> f64 {
    let z: f64 = StandardNormal.sample(rng);
    e_true * (sigma_ln * z).exp()
}

/// The afterglow-like light curve: a linear rise over `rise_s` to the peak rate, then
/// `(1 + t/rise_s)^-decay_index` for `duration_s` after the peak (a power law `t^-decay_index` once
/// `t >> rise_s`, as afterglows decay: Nousek et al. 2006, ApJ 642, 389).
#[derive(Debug, Clone, Copy)]
pub struct AfterglowCurve {
    rise_s: f64,
    /// The tail in `y = 1 + t/rise`: `y^-decay_index` on `[1, 1 + duration/rise]`.
    tail: PowerLaw,
    /// Share of the photons in the rise.
    rise_share: f64,
    /// Expected photons over the whole curve.
    mean_photons: f64,
}

impl AfterglowCurve {
    /// The curve for the burst's parameters (all positive and finite, as checked by the scenario).
    pub fn new(peak_rate_hz: f64, rise_s: f64, decay_index: f64, duration_s: f64) -> Self {
        let y_end = 1.0 + duration_s / rise_s;
        let g = 1.0 - decay_index;
        // integral_0^D (1 + t/r)^-a dt = r integral_1^Y y^-a dy
        let tail = if g.abs() < 1e-12 {
            rise_s * y_end.ln()
        } else {
            rise_s * (y_end.powf(g) - 1.0) / g
        };
        let rise = 0.5 * rise_s;
        Self {
            rise_s,
            tail: PowerLaw::new(decay_index, 1.0, y_end),
            rise_share: rise / (rise + tail),
            mean_photons: peak_rate_hz * (rise + tail),
        }
    }

    /// Expected photons over the whole curve.
    pub fn mean_photons(&self) -> f64 {
        self.mean_photons
    }

    /// A photon time relative to the peak, seconds (negative during the rise).
    pub fn draw<R: Rng + ?Sized>(&self, rng: &mut R) -> f64 {
        let u = rng.random::<f64>();
        let v = rng.random::<f64>();
        if u < self.rise_share {
            // Density proportional to (t + r) on [-r, 0].
            -self.rise_s * (1.0 - v.sqrt())
        } else {
            let y = self.tail.quantile(v);
            self.rise_s * (y - 1.0)
        }
    }
}

/// Largest expected number of proposals an evaporation burst may need (a burst closer than this allows
/// would hold too many photons in memory at once).
pub const MAX_BURST_PROPOSALS: f64 = 2e7;

/// One energy segment of the evaporation proposal: a power law `E^-index` on `[lo, hi]` and the largest
/// effective area the instrument has there.
#[derive(Debug, Clone, Copy)]
struct Segment {
    law: PowerLaw,
    area_max_m2: f64,
}

/// Draws the detected photons of an evaporation burst: time-to-explosion and true energy together from
/// `d2N/(dtau dE) = 0.5 N0 T1^-1.5 tau^-1/2 E^-1.5` for `E < T1 tau^(-1/3)` (glint-science `hawking`,
/// Petkov et al. 2008) times `A_eff(E, zenith(tau)) / (4 pi d^2)`.
///
/// Method (exact, no binning of the model): integrating the joint density over `tau in [0, tau_max]` gives
/// a piecewise power law in E (`E^-1.5` below `T(tau_max)`, `E^-3` above). The proposal is that marginal
/// times a piecewise-constant envelope of the area (its maximum over the field on each segment between
/// table nodes, where the log-log interpolation is monotone). A Poisson number of proposals is drawn, each
/// E from its segment and tau from `tau^-1/2` on `[0, min(tau_max, (T1/E)^3)]`, and each is kept with
/// probability `A_eff(E, zenith) / envelope`. Thinning a Poisson process keeps it Poisson, so the number
/// kept is Poisson with mean exactly the expected detected count, with the zenith evaluated at each
/// photon's own time.
#[derive(Debug, Clone)]
pub struct EvaporationSampler {
    tau_max_s: f64,
    segments: Vec<Segment>,
    /// Cumulative proposal weights of the segments (photons), ending at the total.
    cumulative: Vec<f64>,
}

impl EvaporationSampler {
    /// The sampler for a burst at `distance_pc` whose photons are drawn over the last `tau_max_s` seconds,
    /// seen by `resp`; `area_zenith_rows_deg` are the zenith rows of its area table (`effective_area.zenith_deg`).
    pub fn new(
        resp: &InstrumentResponse,
        area_zenith_rows_deg: &[f64],
        distance_pc: f64,
        tau_max_s: f64,
    ) -> Self {
        let t1 = SPECTRUM_T1_GEV;
        // 0.5 N0 T1^-1.5: the joint density's constant.
        let k = 0.5 * SPECTRUM_NORM * t1.powf(-1.5);
        let d_m = distance_pc * PARSEC_M;
        let dilution = 1.0 / (4.0 * std::f64::consts::PI * d_m * d_m);
        let (e_lo, e_hi) = (resp.energy_min_gev(), resp.energy_max_gev());
        let t_max = t1 / tau_max_s.cbrt();
        let mut cuts: Vec<f64> = resp
            .energy_nodes_gev()
            .into_iter()
            .chain(std::iter::once(t_max))
            .filter(|&e| e > e_lo && e < e_hi)
            .collect();
        cuts.push(e_lo);
        cuts.push(e_hi);
        cuts.sort_by(f64::total_cmp);
        cuts.dedup();
        // The area is linear in zenith between rows and held outside them, so its maximum over the field
        // is at a row inside the field or at an edge of the field.
        let zmax = resp.max_zenith_deg();
        let zeniths: Vec<f64> = area_zenith_rows_deg
            .iter()
            .copied()
            .filter(|&z| (0.0..=zmax).contains(&z))
            .chain([0.0, zmax])
            .collect();
        let mut segments = Vec::with_capacity(cuts.len());
        let mut cumulative = Vec::with_capacity(cuts.len());
        let mut total = 0.0;
        for w in cuts.windows(2) {
            let (lo, hi) = (w[0], w[1]);
            let area_max_m2 = zeniths
                .iter()
                .flat_map(|&z| [resp.effective_area_m2(lo, z), resp.effective_area_m2(hi, z)])
                .fold(0.0, f64::max);
            // tau-integrated marginal: 2 k sqrt(tau_max) E^-1.5 below T(tau_max), 2 k T1^1.5 E^-3 above.
            let below = hi <= t_max;
            let (coeff, index) = if below {
                (2.0 * k * tau_max_s.sqrt(), 1.5)
            } else {
                (2.0 * k * t1.powf(1.5), 3.0)
            };
            let integral = coeff * (lo.powf(1.0 - index) - hi.powf(1.0 - index)) / (index - 1.0);
            total += integral * area_max_m2 * dilution;
            segments.push(Segment {
                law: PowerLaw::new(index, lo, hi),
                area_max_m2,
            });
            cumulative.push(total);
        }
        Self {
            tau_max_s,
            segments,
            cumulative,
        }
    }

    /// Expected number of proposals (an upper bound on the expected detected photons).
    pub fn mean_proposals(&self) -> f64 {
        self.cumulative.last().copied().unwrap_or(0.0)
    }

    /// Draws one burst: `(time_to_go_s, true_energy_gev)` of every detected photon, in draw order.
    /// `area_at(e_gev, tau_s)` is the effective area for the source at that time-to-go (zero when it is
    /// outside the field of view); it must not exceed the area of the response passed to `new`.
    pub fn draw<R: Rng + ?Sized>(&self, rng: &mut R, area_at: impl Fn(f64, f64) -> f64) -> Vec<(f64, f64)> {
        let total = self.mean_proposals();
        let n = poisson(rng, total);
        let mut out = Vec::new();
        for _ in 0..n {
            let x = rng.random::<f64>() * total;
            let j = self
                .cumulative
                .partition_point(|&c| c <= x)
                .min(self.segments.len().saturating_sub(1));
            let Some(seg) = self.segments.get(j) else { break };
            let e = seg.law.draw(rng);
            let tau_up = self.tau_max_s.min((SPECTRUM_T1_GEV / e).powi(3));
            let tau = tau_up * rng.random::<f64>().powi(2);
            let keep = rng.random::<f64>() * seg.area_max_m2;
            if tau > 0.0 && keep < area_at(e, tau) {
                out.push((tau, e));
            }
        }
        out
    }
}
