//! The evaporation fit of a candidate's assessment: an unbinned extended maximum-likelihood fit of the
//! photons' arrival times and energies to a flat background plus the final burst of an evaporating black
//! hole. It gives the explosion time, the distance with a 90% profile-likelihood interval, the fitted counts
//! and a goodness-of-fit p-value. Pure and bounded: bad input gives `converged = false` with a reason.

use glint_science::geometry::offset_gaussian_containment;
use glint_science::hawking::{self, PARSEC_M, SPECTRUM_T1_GEV};
use glint_science::instrument::InstrumentResponse;
use glint_science::poisson::p_from_sigma;

/// Half of the 0.90 quantile of chi-squared with one degree of freedom (2.705543): the drop of ln L that
/// bounds a two-sided 90% profile-likelihood interval (Wilks 1938).
const HALF_DELTA_90: f64 = 1.352_771_727_047_702;
/// Fewest photons the fit accepts: with fewer, the explosion time and the distance are not both determined.
const MIN_PHOTONS: usize = 3;
/// Most photons the fit accepts; each photon holds a table of `PHOTON_NODES` values, and the anchor search
/// costs O(photons x anchors), so this bounds both memory (about 6 MB) and time.
const MAX_PHOTONS: usize = 10_000;
/// Up to this many distinct photon times every one is tried as the anchor of the explosion time; above it a
/// coarse pass over `COARSE_ANCHORS` of them is refined around its best few.
const FULL_SEARCH_MAX: usize = 1024;
const COARSE_ANCHORS: usize = 256;
const REFINE_AROUND: usize = 4;
/// Energy resolutions are clamped into this range of sigma(ln E): below the floor the folding grid would
/// become needlessly fine (the likelihood no longer changes), above the cap the tables would grow without
/// purpose (no real instrument is that poor).
const MIN_SIGMA_LN: f64 = 0.01;
const MAX_SIGMA_LN: f64 = 2.0;
/// Reconstructed energy within this many sigma of the true energy is folded; the rest is below 1e-8.
const FOLD_SIGMAS: f64 = 6.0;
/// Nodes of each photon's folding table: +-6 sigma in steps of sigma/6.
const PHOTON_NODES: usize = 73;
/// Grid of the acceptance-weighted spectrum: at most this step in ln E, and at most this many nodes.
const MAX_LN_E_STEP: f64 = 0.02;
const MAX_SPECTRUM_NODES: usize = 200_000;
/// Nodes per decade of the cumulative light-curve table, and its earliest time-to-go (seconds).
const LIGHT_CURVE_PER_DECADE: f64 = 64.0;
const LIGHT_CURVE_TAU_MIN_S: f64 = 1e-10;
/// Iteration caps of the one-dimensional solvers: never loop forever.
const MAX_SOLVER_ITERATIONS: usize = 200;
const MAX_BRACKET_DOUBLINGS: usize = 200;
/// Name of the goodness-of-fit test reported in `FitResult::gof_test`.
const GOF_TEST: &str = "ks_time";
/// `FitResult::reason` of a fit still to run.
const PENDING: &str = "pending";

/// What the fit needs: the candidate's photons in the disc and window, the instrument, and the background.
#[derive(Clone, Copy)]
pub struct FitInput<'a> {
    /// Arrival times, GPS nanoseconds, each in `[window_start_ns, window_end_ns]`, any order.
    pub times_ns: &'a [i64],
    /// Reconstructed energies, GeV, one per time, each in the instrument's energy range.
    pub energies_gev: &'a [f64],
    /// Zenith (ground) or off-axis (space) angle of the candidate, degrees; selects the effective area.
    pub zenith_deg: f64,
    /// The instrument's response.
    pub response: &'a InstrumentResponse,
    /// Expected background photons per second in the disc, all energies the instrument keeps.
    pub background_rate_hz: f64,
    /// Power-law index of the background spectrum (dN/dE ~ E^-index) over the instrument's energy range.
    pub background_spectral_index: f64,
    /// Start of the window, GPS nanoseconds.
    pub window_start_ns: i64,
    /// End of the window, GPS nanoseconds; must be after the start.
    pub window_end_ns: i64,
    /// Fraction of a point source's photons that fall in the disc, in (0, 1]; used only when
    /// `disc_radius_deg` is 0.
    pub psf_containment: f64,
    /// Radius of the disc the photons were taken from, degrees: when positive, the containment is the PSF's
    /// at each true energy, 1 - exp(-r^2 / 2 sigma(E)^2), folded with the effective area. A single
    /// containment at the flash photons' median energy counts the soft photons, which mostly fall outside
    /// the disc, as if they were inside, and the fitted distance comes out too far.
    pub disc_radius_deg: f64,
    /// Angle between the disc's centre and the best estimate of the source's position, degrees: the
    /// containment is then the offset Gaussian's (the disc is centred on the first flash, whose position
    /// from its first few photons can lie a PSF width from the source).
    pub disc_offset_deg: f64,
}

/// The fit's answer. When `converged` is false the numbers are zero and `reason` says what was wrong.
#[derive(Debug, Clone, PartialEq)]
pub struct FitResult {
    /// True when the fit found a burst and every number below is meaningful.
    pub converged: bool,
    /// Why the fit failed, or a one-line summary of the fit when it converged.
    pub reason: String,
    /// Fitted explosion time, GPS nanoseconds: one time-resolution step after the last photon counted as
    /// signal (see `fit_evaporation`).
    pub explosion_ns: i64,
    /// Best-fit distance, parsecs.
    pub distance_pc: f64,
    /// Lower end of the 90% interval on the distance, parsecs.
    pub distance_pc_lo: f64,
    /// Upper end of the 90% interval on the distance, parsecs; infinite when the data are compatible with
    /// no burst at 90% (the profile never drops far enough at large distance).
    pub distance_pc_hi: f64,
    /// Goodness-of-fit p-value of the test named in `gof_test`.
    pub template_p: f64,
    /// The goodness-of-fit test: `ks_time`, a Kolmogorov-Smirnov test of the photon times against the
    /// fitted model's cumulative distribution over the window.
    pub gof_test: String,
    /// Fitted number of burst photons in the window (disc containment included).
    pub signal_counts: f64,
    /// Expected number of background photons in the window (the rate is given, not fitted).
    pub background_counts: f64,
    /// ln of the likelihood ratio of the burst against background alone, ln L(best q) - ln L(q = 0) at the
    /// fitted explosion time, the photon it is anchored on left out (its tau^-1/2 density is unbounded).
    pub ln_likelihood_ratio: f64,
    /// Its one-sided significance, sqrt(2 ln LR): Chernoff's half chi-square of one degree of freedom for a
    /// strength on its boundary (docs/science.md section 4). The explosion time is searched too and exists
    /// only under the burst, so this is optimistic by the look-elsewhere factor of that search.
    pub lr_sigma: f64,
    /// The burst model is preferred: `lr_sigma` at least 3 and the goodness of fit `template_p` at least 0.01
    /// (`BURST_PREFERRED_*`). False means the photons are background, or something the template does not
    /// describe (an afterglow, a steady source, a glitch), whatever the distance says.
    pub burst_preferred: bool,
}

/// `FitResult::burst_preferred` needs the likelihood ratio at least this many sigma (common practice, no
/// source) ...
pub const BURST_PREFERRED_LR_SIGMA: f64 = 3.0;
/// ... and the goodness of fit at least this p-value.
pub const BURST_PREFERRED_MIN_P: f64 = 0.01;

impl FitResult {
    /// A fit not run yet: what an assessment carries while its `fit_job` waits for the caller
    /// (`converged = false`, reason `pending`, the numbers zero).
    pub fn pending() -> Self {
        Self::failed(PENDING.to_owned())
    }

    /// True for [`pending`](Self::pending).
    pub fn is_pending(&self) -> bool {
        !self.converged && self.reason == PENDING
    }

    fn failed(reason: String) -> Self {
        Self {
            converged: false,
            reason,
            explosion_ns: 0,
            distance_pc: 0.0,
            distance_pc_lo: 0.0,
            distance_pc_hi: 0.0,
            template_p: 0.0,
            gof_test: GOF_TEST.to_owned(),
            signal_counts: 0.0,
            background_counts: 0.0,
            ln_likelihood_ratio: 0.0,
            lr_sigma: 0.0,
            burst_preferred: false,
        }
    }
}

/// Why a fit could not be made; its text becomes `FitResult::reason`.
#[derive(thiserror::Error, Debug, Clone, PartialEq)]
pub(crate) enum FitProblem {
    #[error("too few photons: {n} (the fit needs at least {MIN_PHOTONS})")]
    TooFewPhotons { n: usize },
    #[error("too many photons: {n} (the fit takes at most {MAX_PHOTONS})")]
    TooManyPhotons { n: usize },
    #[error("times_ns has {times} entries but energies_gev has {energies}")]
    LengthMismatch { times: usize, energies: usize },
    #[error("window_end_ns = {end} is not after window_start_ns = {start}")]
    EmptyWindow { start: i64, end: i64 },
    #[error("photon {index}: time {time_ns} ns is outside the window [{start}, {end}] ns")]
    TimeOutsideWindow {
        index: usize,
        time_ns: i64,
        start: i64,
        end: i64,
    },
    #[error("photon {index}: energy {value} GeV is outside the instrument's range [{min}, {max}] GeV")]
    EnergyOutOfRange {
        index: usize,
        value: f64,
        min: f64,
        max: f64,
    },
    #[error("all {n} photons have the same time; the explosion time cannot be fitted")]
    AllSameTime { n: usize },
    #[error("{name} = {value} is invalid: expected {expected}")]
    BadArgument {
        name: &'static str,
        value: f64,
        expected: &'static str,
    },
    #[error("the instrument's {what} is invalid: {value}")]
    BadResponse { what: &'static str, value: f64 },
    #[error("the effective area is zero at zenith {zenith_deg} deg over the instrument's energy range")]
    NoAcceptance { zenith_deg: f64 },
    #[error("no burst: the best fit puts every photon in the background")]
    NoSignal,
    #[error("{what} did not converge within {MAX_SOLVER_ITERATIONS} iterations")]
    NoConvergence { what: &'static str },
    #[error("{what} gave a non-finite value")]
    NonFinite { what: &'static str },
}

/// Fits the photons of a candidate to background plus the final burst of an evaporating black hole.
///
/// The model, per unit time and reconstructed energy E, in the window:
///
/// `lambda(t, E) = B f(E) + q * c * tau^-1/2 * F(E, T1 tau^-1/3)`, with `tau = t0 - t` (no signal for `t >= t0`),
///
/// * `B f(E)`: the background, rate `background_rate_hz`, `f ~ E^-index` normalised over the instrument's
///   reconstructed energy range;
/// * `q = (1 pc / d)^2`, the only way the distance d enters; `c = psf_containment / (4 pi (1 pc)^2) * K` with
///   `K = 4.5e35 T1^-3/2` from `d2N/(dtau dE) = K tau^-1/2 E^-3/2 for E < T1 tau^-1/3` (docs/science.md section 2;
///   `hawking::joint_density`);
/// * `F(E, Ecut) = integral_0^Ecut A_eff(E', zenith) E'^-3/2 R(E | E') dE'`: the emitted spectrum, cut at the
///   temperature, times the effective area, folded with the energy resolution R (Gaussian in ln E with the
///   response's sigma at true energy E'; sigma clamped into [0.01, 2]). Energy dispersion is folded, not
///   ignored: at the 30-50% resolution of ground arrays it smears the temperature cut-off that ties a
///   photon's energy to its time-to-go.
///
/// The expected counts are `B T + q S(t0)` with `S(t0) = c integral over the window of tau^-1/2 G(T1 tau^-1/3)`,
/// `G(Ecut) = integral_0^Ecut A_eff E'^-3/2 P(E_min < E_reco < E_max | E') dE'`.
///
/// **The explosion time.** The signal rate diverges as tau^-1/2 at t0: it is integrable, so the expected
/// counts stay finite, but the density of a photon at t0 is not. Photon times are resolved to
/// `delta` = one clock step of the instrument (at least 1 ns), so t0 is taken one step after a photon (the
/// "anchor"). Between two consecutive photon times, moving t0 later lowers every signal density (tau^-1/2
/// falls and the temperature cut-off drops) and raises the expected counts, so ln L strictly decreases: the
/// maximum over t0 is always at an anchor, and no continuous search is needed. The anchor's own term,
/// `ln(B f + q c delta^-1/2 F)`, carries a constant `-ln(delta)/2` that is common to every anchor, so the choice
/// of anchor does not depend on `delta` once the burst outshines the background at `delta`. All distinct
/// photon times are tried as anchors (up to 1024; above that a coarse pass of 256 refined around its best 4).
///
/// **The distance.** For each anchor ln L is concave in q; q is solved by safeguarded Newton. The profile over
/// t0 at fixed q is the maximum over anchors, and the 90% interval is where it lies within 1.3528 of its
/// maximum (Delta(-2 ln L) = 2.706), the hull of the anchors' intervals. d = q^-1/2.
///
/// **Goodness of fit.** A Kolmogorov-Smirnov test of the photon times, the anchor photon(s) left out since
/// they fix t0, against the fitted model's cumulative distribution over the window, with the Kolmogorov
/// distribution and the Stephens (1970) small-sample correction. The burst's intensity is fitted, so the
/// p-value is somewhat conservative (Lilliefors 1967).
///
/// **What it presumes.** The trigger has already decided there is a burst: the anchor photon always counts
/// as signal, so the likelihood ratio against background only grows with -ln(delta) and is not a detection
/// significance, and the fit finds a (faint, distant) burst even in pure background. Photons whose
/// reconstructed energy lies outside the instrument's range are refused, not dropped: select them first.
///
/// Cost: O(photons x anchors) likelihood terms, every solver capped at 200 iterations; memory O(photons).
pub fn fit_evaporation(input: &FitInput<'_>) -> FitResult {
    match fit(input, FULL_SEARCH_MAX) {
        Ok(result) => result,
        Err(problem) => FitResult::failed(problem.to_string()),
    }
}

fn fit(input: &FitInput<'_>, full_search_max: usize) -> Result<FitResult, FitProblem> {
    let photons = Photons::new(input)?;
    let model = Model::new(input, &photons)?;
    let curves = PhotonCurves::new(input, &photons, &model)?;
    let search = Search {
        photons: &photons,
        model: &model,
        curves: &curves,
    };

    let anchors = search.anchors();
    let mut fits = Vec::new();
    let mut scratch = Vec::with_capacity(photons.len());
    if anchors.len() <= full_search_max {
        for &j in &anchors {
            fits.push(search.fit_anchor(j, &mut scratch)?);
        }
    } else {
        let stride = anchors.len().div_ceil(COARSE_ANCHORS);
        let mut coarse: Vec<AnchorFit> = Vec::with_capacity(COARSE_ANCHORS + 1);
        let mut positions: Vec<usize> = (0..anchors.len()).step_by(stride).collect();
        if positions.last() != Some(&(anchors.len() - 1)) {
            positions.push(anchors.len() - 1);
        }
        for &pos in &positions {
            coarse.push(search.fit_anchor(anchors[pos], &mut scratch)?);
        }
        let mut order: Vec<usize> = (0..coarse.len()).collect();
        order.sort_by(|&a, &b| coarse[b].ln_l.total_cmp(&coarse[a].ln_l).then(a.cmp(&b)));
        let mut wanted = vec![false; anchors.len()];
        for &k in order.iter().take(REFINE_AROUND) {
            let centre = positions[k];
            let lo = centre.saturating_sub(stride);
            let hi = (centre + stride).min(anchors.len() - 1);
            wanted[lo..=hi].iter_mut().for_each(|w| *w = true);
        }
        for &pos in &positions {
            wanted[pos] = false;
        }
        fits.extend(coarse);
        for (pos, _) in wanted.iter().enumerate().filter(|(_, w)| **w) {
            fits.push(search.fit_anchor(anchors[pos], &mut scratch)?);
        }
    }

    // Best anchor; ties go to the later anchor (the explosion is at the end of the burst).
    let best = fits
        .iter()
        .copied()
        .max_by(|a, b| a.ln_l.total_cmp(&b.ln_l).then(a.anchor.cmp(&b.anchor)))
        .ok_or(FitProblem::NoSignal)?;
    if best.q <= 0.0 || best.ln_l <= 0.0 {
        return Err(FitProblem::NoSignal);
    }

    let (q_lo, q_hi) = search.profile_interval(&fits, best.ln_l, &mut scratch)?;
    let template_p = search.ks_p_value(&best);

    let distance = best.q.powf(-0.5);
    let distance_lo = q_hi.powf(-0.5);
    let distance_hi = if q_lo > 0.0 {
        q_lo.powf(-0.5)
    } else {
        f64::INFINITY
    };
    let signal_counts = best.q * best.norm;
    let background_counts = model.background_rate * photons.window_s;
    for (what, v) in [
        ("distance", distance),
        ("distance interval", distance_lo),
        ("goodness-of-fit p-value", template_p),
        ("signal counts", signal_counts),
        ("background counts", background_counts),
    ] {
        if !v.is_finite() {
            return Err(FitProblem::NonFinite { what });
        }
    }
    let anchor_ns = photons.times_ns[best.anchor];
    let ln_lr = search.ln_ratio_without_anchor(&best, &mut scratch)?;
    let lr_sigma = (2.0 * ln_lr).sqrt();
    let burst_preferred = lr_sigma >= BURST_PREFERRED_LR_SIGMA && template_p >= BURST_PREFERRED_MIN_P;
    Ok(FitResult {
        converged: true,
        reason: format!(
            "converged: explosion one clock step after photon {} of {}; {signal_counts:.1} burst photons on \
             {background_counts:.1} background",
            best.anchor + 1,
            photons.len(),
        ),
        explosion_ns: anchor_ns.saturating_add(photons.delta_ns),
        distance_pc: distance,
        distance_pc_lo: distance_lo,
        distance_pc_hi: distance_hi,
        template_p,
        gof_test: GOF_TEST.to_owned(),
        signal_counts,
        background_counts,
        ln_likelihood_ratio: ln_lr,
        lr_sigma,
        burst_preferred,
    })
}

/// The photons, checked and sorted by time, with times as offsets from the window start.
struct Photons {
    /// Sorted absolute times, ns.
    times_ns: Vec<i64>,
    /// Offsets from the window start, ns (i128: a window may span the whole i64 range).
    offsets_ns: Vec<i128>,
    energies: Vec<f64>,
    /// Background density B f(E) at each photon, per second per GeV.
    background: Vec<f64>,
    window_s: f64,
    /// Time resolution: t0 sits this long after its anchor photon.
    delta_ns: i64,
}

impl Photons {
    fn new(input: &FitInput<'_>) -> Result<Self, FitProblem> {
        let n = input.times_ns.len();
        if input.energies_gev.len() != n {
            return Err(FitProblem::LengthMismatch {
                times: n,
                energies: input.energies_gev.len(),
            });
        }
        if n < MIN_PHOTONS {
            return Err(FitProblem::TooFewPhotons { n });
        }
        if n > MAX_PHOTONS {
            return Err(FitProblem::TooManyPhotons { n });
        }
        let (start, end) = (input.window_start_ns, input.window_end_ns);
        if end <= start {
            return Err(FitProblem::EmptyWindow { start, end });
        }
        check_positive("background_rate_hz", input.background_rate_hz)?;
        let index = input.background_spectral_index;
        if !(index.is_finite() && index > 0.0 && index < 10.0) {
            return Err(FitProblem::BadArgument {
                name: "background_spectral_index",
                value: index,
                expected: "a finite number in (0, 10)",
            });
        }
        let c = input.psf_containment;
        if !(c > 0.0 && c <= 1.0) {
            return Err(FitProblem::BadArgument {
                name: "psf_containment",
                value: c,
                expected: "a number in (0, 1]",
            });
        }
        let z = input.zenith_deg;
        if !(z.is_finite() && (0.0..=180.0).contains(&z)) {
            return Err(FitProblem::BadArgument {
                name: "zenith_deg",
                value: z,
                expected: "a finite angle in [0, 180] degrees",
            });
        }
        let e_min = input.response.energy_min_gev();
        let e_max = input.response.energy_max_gev();
        if !(e_min.is_finite() && e_min > 0.0) {
            return Err(FitProblem::BadResponse {
                what: "energy_min_gev",
                value: e_min,
            });
        }
        if !(e_max.is_finite() && e_max > e_min) {
            return Err(FitProblem::BadResponse {
                what: "energy_max_gev",
                value: e_max,
            });
        }
        for (index, (&t, &e)) in input.times_ns.iter().zip(input.energies_gev).enumerate() {
            if t < start || t > end {
                return Err(FitProblem::TimeOutsideWindow {
                    index,
                    time_ns: t,
                    start,
                    end,
                });
            }
            if !(e >= e_min && e <= e_max) {
                return Err(FitProblem::EnergyOutOfRange {
                    index,
                    value: e,
                    min: e_min,
                    max: e_max,
                });
            }
        }
        let mut order: Vec<usize> = (0..n).collect();
        order.sort_by_key(|&i| (input.times_ns[i], i));
        let times_ns: Vec<i64> = order.iter().map(|&i| input.times_ns[i]).collect();
        if times_ns.first() == times_ns.last() {
            return Err(FitProblem::AllSameTime { n });
        }
        let energies: Vec<f64> = order.iter().map(|&i| input.energies_gev[i]).collect();
        let offsets_ns = times_ns
            .iter()
            .map(|&t| i128::from(t) - i128::from(start))
            .collect();
        let window_ns = i128::from(end) - i128::from(start);
        let spectrum = PowerLaw::new(index, e_min, e_max);
        let background: Vec<f64> = energies
            .iter()
            .map(|&e| input.background_rate_hz * spectrum.density(e))
            .collect();
        if background.iter().any(|&b| !(b.is_finite() && b > 0.0)) {
            return Err(FitProblem::NonFinite {
                what: "the background density at a photon's energy",
            });
        }
        let delta_ns = input.response.clock_precision_ns().max(1);
        Ok(Self {
            times_ns,
            offsets_ns,
            energies,
            background,
            window_s: window_ns as f64 * 1e-9,
            delta_ns,
        })
    }

    fn len(&self) -> usize {
        self.times_ns.len()
    }

    /// t0 for `anchor`, ns after the window start.
    fn t0_ns(&self, anchor: usize) -> i128 {
        self.offsets_ns[anchor] + i128::from(self.delta_ns)
    }

    /// t0 for `anchor`, seconds after the window start.
    fn t0_s(&self, anchor: usize) -> f64 {
        self.t0_ns(anchor) as f64 * 1e-9
    }
}

fn check_positive(name: &'static str, value: f64) -> Result<f64, FitProblem> {
    if value.is_finite() && value > 0.0 {
        Ok(value)
    } else {
        Err(FitProblem::BadArgument {
            name,
            value,
            expected: "a finite number > 0",
        })
    }
}

/// A power law E^-index normalised to one over [e_min, e_max].
struct PowerLaw {
    index: f64,
    norm: f64,
}

impl PowerLaw {
    fn new(index: f64, e_min: f64, e_max: f64) -> Self {
        let one_minus = 1.0 - index;
        let norm = if one_minus.abs() < 1e-9 {
            1.0 / (e_max / e_min).ln()
        } else {
            one_minus / (e_max.powf(one_minus) - e_min.powf(one_minus))
        };
        Self { index, norm }
    }

    fn density(&self, e: f64) -> f64 {
        self.norm * e.powf(-self.index)
    }
}

/// A running integral tabulated on a uniform grid, zero below the grid and constant above it.
struct Cumulative {
    x0: f64,
    dx: f64,
    values: Vec<f64>,
}

impl Cumulative {
    /// Trapezoid running integral of `integrand` sampled at `x0 + k dx`.
    fn from_samples(x0: f64, dx: f64, integrand: &[f64]) -> Self {
        let mut values = Vec::with_capacity(integrand.len());
        let mut acc = 0.0;
        for (k, &y) in integrand.iter().enumerate() {
            if k > 0 {
                acc += 0.5 * dx * (integrand[k - 1] + y);
            }
            values.push(acc);
        }
        Self { x0, dx, values }
    }

    fn at(&self, x: f64) -> f64 {
        interpolate(&self.values, (x - self.x0) / self.dx)
    }

    fn total(&self) -> f64 {
        self.values.last().copied().unwrap_or(0.0)
    }
}

/// Linear interpolation in `values` at fractional index `p`, clamped to the ends (0 for NaN).
fn interpolate(values: &[f64], p: f64) -> f64 {
    let Some(&last) = values.last() else { return 0.0 };
    if p.is_nan() || p <= 0.0 {
        return values[0];
    }
    let top = (values.len() - 1) as f64;
    if p >= top {
        return last;
    }
    let k = p as usize;
    let f = p - k as f64;
    values[k] + f * (values[k + 1] - values[k])
}

/// The parts of the model shared by all photons: the burst's normalisation and its instrument-folded light
/// curve.
struct Model {
    /// Signal density constant at 1 pc: psf_containment / (4 pi pc^2) * K, per m^2 (GeV^1/2 s^-1/2 units).
    c: f64,
    zenith_deg: f64,
    background_rate: f64,
    curve: LightCurve,
}

impl Model {
    fn new(input: &FitInput<'_>, photons: &Photons) -> Result<Self, FitProblem> {
        // K = 4.5e35 T1^-3/2: the joint density at tau = 1 s, E = 1 GeV (below the cut-off).
        let k = hawking::joint_density(1.0, 1.0);
        if !(k.is_finite() && k > 0.0) {
            return Err(FitProblem::NonFinite {
                what: "the burst's joint density",
            });
        }
        // With the disc known, the light curve folds each energy's PSF share inside it (offset included);
        // without it, one containment for all energies.
        let (containment, disc) = if input.disc_radius_deg > 0.0 {
            (1.0, Some((input.disc_radius_deg, input.disc_offset_deg)))
        } else {
            (input.psf_containment, None)
        };
        let c = containment / (4.0 * std::f64::consts::PI * PARSEC_M * PARSEC_M) * k;
        let tau_max = photons.window_s + 2.0 * photons.delta_ns as f64 * 1e-9;
        let curve = LightCurve::build(input.response, input.zenith_deg, tau_max, disc)?;
        Ok(Self {
            c,
            zenith_deg: input.zenith_deg,
            background_rate: input.background_rate_hz,
            curve,
        })
    }

    /// Cut-off ln(E) of the emission at time-to-go tau: T1 tau^-1/3.
    fn ln_cut(&self, tau_s: f64) -> f64 {
        self.curve.ln_cut(tau_s)
    }

    /// Expected signal counts at q = 1 (1 pc) in the window [0, window] for explosion time t0 (seconds
    /// after the window start), and the part of it before time t.
    fn signal_before(&self, t0_s: f64, window_s: f64, t_s: f64) -> f64 {
        let upto = t_s.min(window_s);
        self.c * (self.curve.cumulative(t0_s) - self.curve.cumulative(t0_s - upto))
    }
}

/// The burst's detected light curve above the instrument's threshold, folded with its effective area at
/// one zenith and its energy resolution: H(tau) = integral_0^tau u^-1/2 G(T1 u^-1/3) du, with G the
/// acceptance-weighted emitted spectrum below the cut-off (see [`fit_evaporation`]). Steeper toward the end
/// than the bare tau^-1/2 law, because the spectrum hardens as the end nears and the effective area grows
/// with energy. The fit, the assessment's light-curve shape test and its pre-flash expectation all use it.
pub(crate) struct LightCurve {
    ln_t1: f64,
    /// G over ln(E_cut).
    g: Cumulative,
    /// H over ln(tau) from `LIGHT_CURVE_TAU_MIN_S`.
    h: Cumulative,
    h_start: f64,
}

impl LightCurve {
    /// Tabulates the light curve up to `tau_max_s` (beyond it H is constant: ask for what you need). With
    /// `disc` (radius, and the source's offset from its centre, degrees), each true energy is weighted by the share of its Gaussian PSF inside a disc of that
    /// radius about the source: the light curve of the photons a search disc holds. That matters: the
    /// early, soft photons of a burst spread wider than its last, hard ones, so a disc sees a steeper rise
    /// than the whole sky does.
    pub(crate) fn build(
        response: &InstrumentResponse,
        zenith_deg: f64,
        tau_max_s: f64,
        disc: Option<(f64, f64)>,
    ) -> Result<Self, FitProblem> {
        let (e_min, e_max) = (response.energy_min_gev(), response.energy_max_gev());
        // The acceptance-weighted spectrum over true energy, wide enough to hold every energy that can be
        // reconstructed inside [e_min, e_max].
        let (sigma_lo, sigma_hi) = sigma_range(response, e_min, e_max)?;
        let u0 = e_min.ln() - FOLD_SIGMAS * sigma_hi;
        let u1 = e_max.ln() + FOLD_SIGMAS * sigma_hi;
        let du = (sigma_lo / 6.0).min(MAX_LN_E_STEP);
        let nodes = ((u1 - u0) / du).ceil() as usize + 1;
        if nodes > MAX_SPECTRUM_NODES {
            return Err(FitProblem::BadResponse {
                what: "energy range over resolution",
                value: nodes as f64,
            });
        }
        let (ln_min, ln_max) = (e_min.ln(), e_max.ln());
        let mut integrand = Vec::with_capacity(nodes);
        for k in 0..nodes {
            let u = u0 + k as f64 * du;
            let e = u.exp();
            let s = sigma_at(response, e);
            // P(e_min < E_reco < e_max | E) with ln E_reco ~ N(u, s).
            let accept = p_from_sigma((ln_min - u) / s) - p_from_sigma((ln_max - u) / s);
            let contained = disc.map_or(1.0, |(r, off)| {
                offset_gaussian_containment(r, off, response.psf_sigma_deg(e))
            });
            // dE = E du, so A E^-3/2 dE = A E^-1/2 du.
            integrand.push(area(response, e, zenith_deg) * (-0.5 * u).exp() * accept.max(0.0) * contained);
        }
        let g = Cumulative::from_samples(u0, du, &integrand);
        if g.total().is_nan() || g.total() <= 0.0 {
            return Err(FitProblem::NoAcceptance { zenith_deg });
        }

        // H over ln tau: dH = tau^1/2 G(T1 tau^-1/3) d ln tau, from H(tau_min) = 2 tau_min^1/2 G(...).
        let ln_t1 = SPECTRUM_T1_GEV.ln();
        let tau_max = tau_max_s.max(1e-9) * 1.01;
        let x0 = LIGHT_CURVE_TAU_MIN_S.ln();
        let dx = std::f64::consts::LN_10 / LIGHT_CURVE_PER_DECADE;
        let h_nodes = (((tau_max.ln() - x0) / dx).ceil().max(1.0)) as usize + 1;
        let mut light = Vec::with_capacity(h_nodes);
        for k in 0..h_nodes {
            let x = x0 + k as f64 * dx;
            light.push((0.5 * x).exp() * g.at(ln_t1 - x / 3.0));
        }
        let h = Cumulative::from_samples(x0, dx, &light);
        let h_start = 2.0 * LIGHT_CURVE_TAU_MIN_S.sqrt() * g.at(ln_t1 - x0 / 3.0);
        Ok(Self { ln_t1, g, h, h_start })
    }

    /// Cut-off ln(E) of the emission at time-to-go tau: T1 tau^-1/3.
    fn ln_cut(&self, tau_s: f64) -> f64 {
        self.ln_t1 - tau_s.ln() / 3.0
    }

    /// H(tau): the detected counts of the last tau seconds, in the units of the fit's model without its
    /// constant c (only ratios and shapes matter to the assessment).
    pub(crate) fn cumulative(&self, tau_s: f64) -> f64 {
        if tau_s.is_nan() || tau_s <= 0.0 {
            return 0.0;
        }
        if tau_s < LIGHT_CURVE_TAU_MIN_S {
            return 2.0 * tau_s.sqrt() * self.g.at(self.ln_cut(tau_s));
        }
        self.h_start + self.h.at(tau_s.ln())
    }

    /// dH/dtau: the detected rate at time-to-go tau, same units.
    pub(crate) fn rate(&self, tau_s: f64) -> f64 {
        if tau_s.is_nan() || tau_s <= 0.0 {
            return 0.0;
        }
        self.g.at(self.ln_cut(tau_s)) / tau_s.sqrt()
    }
}

fn area(response: &InstrumentResponse, e_gev: f64, zenith_deg: f64) -> f64 {
    let a = response.effective_area_m2(e_gev, zenith_deg);
    if a.is_finite() && a > 0.0 { a } else { 0.0 }
}

/// The effective area times the PSF's containment in the disc at true energy `e_gev` (1 without a disc).
fn area_in_disc(input: &FitInput<'_>, e_gev: f64, zenith_deg: f64) -> f64 {
    let a = area(input.response, e_gev, zenith_deg);
    if input.disc_radius_deg > 0.0 && a > 0.0 {
        let sigma = input.response.psf_sigma_deg(e_gev);
        a * offset_gaussian_containment(input.disc_radius_deg, input.disc_offset_deg, sigma)
    } else {
        a
    }
}

fn sigma_at(response: &InstrumentResponse, e_gev: f64) -> f64 {
    let s = response.energy_sigma_ln(e_gev);
    if s.is_finite() {
        s.clamp(MIN_SIGMA_LN, MAX_SIGMA_LN)
    } else {
        MAX_SIGMA_LN
    }
}

/// Smallest and largest energy resolution over the range, scanned on a log grid.
fn sigma_range(response: &InstrumentResponse, e_min: f64, e_max: f64) -> Result<(f64, f64), FitProblem> {
    let (a, b) = (e_min.ln() - 1.0, e_max.ln() + 1.0);
    let mut lo = f64::INFINITY;
    let mut hi = 0.0_f64;
    for k in 0..=128 {
        let s = sigma_at(response, (a + (b - a) * k as f64 / 128.0).exp());
        lo = lo.min(s);
        hi = hi.max(s);
    }
    if lo.is_finite() && lo > 0.0 {
        Ok((lo, hi))
    } else {
        Err(FitProblem::BadResponse {
            what: "energy_sigma_ln",
            value: lo,
        })
    }
}

/// Each photon's folded spectrum F_i(E_cut) = integral_0^E_cut A(E') E'^-3/2 R(E_i | E') dE', tabulated over
/// ln E_cut on +-6 sigma around ln E_i, in one flat array.
struct PhotonCurves {
    x0: Vec<f64>,
    dx: Vec<f64>,
    values: Vec<f64>,
}

impl PhotonCurves {
    fn new(input: &FitInput<'_>, photons: &Photons, model: &Model) -> Result<Self, FitProblem> {
        let n = photons.len();
        let mut x0 = Vec::with_capacity(n);
        let mut dx = Vec::with_capacity(n);
        let mut values = Vec::with_capacity(n * PHOTON_NODES);
        let mut integrand = [0.0; PHOTON_NODES];
        let inv_sqrt_2pi = 1.0 / (2.0 * std::f64::consts::PI).sqrt();
        for &e in &photons.energies {
            let x = e.ln();
            let s_e = sigma_at(input.response, e);
            let start = x - FOLD_SIGMAS * s_e;
            let step = 2.0 * FOLD_SIGMAS * s_e / (PHOTON_NODES - 1) as f64;
            for (k, slot) in integrand.iter_mut().enumerate() {
                let u = start + k as f64 * step;
                let e_true = u.exp();
                let s = sigma_at(input.response, e_true);
                let z = (x - u) / s;
                // R(E | E') in E: phi(z) / (s E); times A E'^-3/2 dE' = A E'^-1/2 du.
                *slot = area_in_disc(input, e_true, model.zenith_deg)
                    * (-0.5 * u).exp()
                    * inv_sqrt_2pi
                    * (-0.5 * z * z).exp()
                    / (s * e);
            }
            let table = Cumulative::from_samples(start, step, &integrand);
            x0.push(start);
            dx.push(step);
            values.extend_from_slice(&table.values);
        }
        if values.iter().any(|v| !v.is_finite()) {
            return Err(FitProblem::NonFinite {
                what: "the folded burst spectrum",
            });
        }
        Ok(Self { x0, dx, values })
    }

    fn at(&self, i: usize, ln_cut: f64) -> f64 {
        let table = &self.values[i * PHOTON_NODES..(i + 1) * PHOTON_NODES];
        interpolate(table, (ln_cut - self.x0[i]) / self.dx[i])
    }
}

/// The fit at one anchor: q maximising ln L, ln L there relative to background only, and S = expected
/// signal counts at q = 1.
#[derive(Debug, Clone, Copy)]
struct AnchorFit {
    anchor: usize,
    q: f64,
    ln_l: f64,
    norm: f64,
}

struct Search<'a> {
    photons: &'a Photons,
    model: &'a Model,
    curves: &'a PhotonCurves,
}

impl Search<'_> {
    /// The last photon of each group of equal times: the candidate anchors of t0, in time order.
    fn anchors(&self) -> Vec<usize> {
        let t = &self.photons.times_ns;
        (0..t.len())
            .filter(|&j| j + 1 == t.len() || t[j + 1] != t[j])
            .collect()
    }

    /// Fills `ratios` with r_i = signal density at q = 1 over background density for the photons before t0
    /// (`t0_ns` after the window start), and returns the expected signal counts at q = 1.
    fn ratios_at(&self, t0_ns: i128, ratios: &mut Vec<f64>) -> f64 {
        let p = self.photons;
        let signal = p.offsets_ns.partition_point(|&t| t < t0_ns);
        ratios.clear();
        for i in 0..signal {
            let tau = (t0_ns - p.offsets_ns[i]) as f64 * 1e-9;
            let h = self.model.c * self.curves.at(i, self.model.ln_cut(tau)) / tau.sqrt();
            ratios.push(h / p.background[i]);
        }
        self.model
            .signal_before(t0_ns as f64 * 1e-9, p.window_s, p.window_s)
    }

    /// `ratios_at` with t0 one time-resolution step after photon `anchor`.
    fn ratios(&self, anchor: usize, ratios: &mut Vec<f64>) -> f64 {
        self.ratios_at(self.photons.t0_ns(anchor), ratios)
    }

    fn fit_anchor(&self, anchor: usize, scratch: &mut Vec<f64>) -> Result<AnchorFit, FitProblem> {
        let norm = self.ratios(anchor, scratch);
        let q = best_strength(scratch, norm)?;
        Ok(AnchorFit {
            anchor,
            q,
            ln_l: ln_likelihood(scratch, norm, q),
            norm,
        })
    }

    /// The 90% interval on q from the profile over anchors: the hull of each anchor's interval where its ln L
    /// stays above max - 1.3528. Anchors are visited best first, and one evaluation tells whether an anchor can
    /// widen the hull (its ln L is concave in q), so few intervals are solved in full.
    fn profile_interval(
        &self,
        fits: &[AnchorFit],
        best_ln_l: f64,
        scratch: &mut Vec<f64>,
    ) -> Result<(f64, f64), FitProblem> {
        let target = best_ln_l - HALF_DELTA_90;
        let mut order: Vec<&AnchorFit> = fits.iter().filter(|f| f.ln_l >= target).collect();
        order.sort_by(|a, b| b.ln_l.total_cmp(&a.ln_l).then(a.anchor.cmp(&b.anchor)));
        let mut q_lo = f64::INFINITY;
        let mut q_hi = 0.0_f64;
        for f in order {
            let norm = self.ratios(f.anchor, scratch);
            let r = scratch.as_slice();
            let level = |q: f64| ln_likelihood(r, norm, q) - target;
            // Lower end: only if this anchor is still above the target at the current lower end.
            if q_lo > 0.0 && (q_lo > f.q || level(q_lo.min(f.q)) > 0.0) {
                q_lo = q_lo.min(if level(0.0) >= 0.0 {
                    0.0
                } else {
                    lower_crossing(r, norm, target, f.q)?
                });
            }
            if q_hi < f.q || level(q_hi) > 0.0 {
                q_hi = q_hi.max(upper_crossing(r, norm, target, f.q)?);
            }
        }
        if !(q_hi > 0.0 && q_hi.is_finite() && q_lo.is_finite()) {
            return Err(FitProblem::NonFinite {
                what: "the distance interval",
            });
        }
        Ok((q_lo, q_hi))
    }

    /// ln LR of the burst against background alone at the fitted explosion time, the anchor group left out
    /// and the strength fitted again. The photon the explosion is anchored on sits a clock step before it,
    /// where tau^-1/2 makes its density ratio huge: with it, one background photon alone "prefers" a burst.
    /// Conditioning on it, as the trigger's p-value leaves the seed out, removes that.
    fn ln_ratio_without_anchor(&self, best: &AnchorFit, scratch: &mut Vec<f64>) -> Result<f64, FitProblem> {
        let norm = self.ratios(best.anchor, scratch);
        let t = &self.photons.times_ns;
        let group = t.iter().filter(|&&x| x == t[best.anchor]).count();
        scratch.truncate(scratch.len().saturating_sub(group));
        let q = best_strength(scratch, norm)?;
        Ok(ln_likelihood(scratch, norm, q).max(0.0))
    }

    /// KS p-value of the photon times, anchor group left out, against the fitted model over the window.
    fn ks_p_value(&self, best: &AnchorFit) -> f64 {
        let p = self.photons;
        let t0 = p.t0_s(best.anchor);
        let anchor_ns = p.times_ns[best.anchor];
        let total = self.model.background_rate * p.window_s + best.q * best.norm;
        let cdf = |t: f64| {
            let signal = if t0 > 0.0 {
                best.q * self.model.signal_before(t0, p.window_s, t)
            } else {
                0.0
            };
            ((self.model.background_rate * t + signal) / total).clamp(0.0, 1.0)
        };
        let sample: Vec<f64> = p
            .times_ns
            .iter()
            .zip(&p.offsets_ns)
            .filter(|(t, _)| **t != anchor_ns)
            .map(|(_, &off)| cdf(off as f64 * 1e-9))
            .collect();
        ks_p_value_of_cdf_values(&sample)
    }
}

/// ln L(q) - ln L(0) for one anchor: sum ln(1 + q r_i) - q S.
pub(crate) fn ln_likelihood(ratios: &[f64], norm: f64, q: f64) -> f64 {
    ratios.iter().map(|&r| (q * r).ln_1p()).sum::<f64>() - q * norm
}

/// d/dq of `ln_likelihood` and its second derivative.
fn derivatives(ratios: &[f64], norm: f64, q: f64) -> (f64, f64) {
    let mut d1 = -norm;
    let mut d2 = 0.0;
    for &r in ratios {
        let w = r / (1.0 + q * r);
        d1 += w;
        d2 -= w * w;
    }
    (d1, d2)
}

/// The q >= 0 maximising the concave `ln_likelihood`: zero if its slope at 0 is not positive, else the root of
/// the slope, which lies below m / S (each term r/(1 + q r) < 1/q).
pub(crate) fn best_strength(ratios: &[f64], norm: f64) -> Result<f64, FitProblem> {
    if !(norm > 0.0 && norm.is_finite()) {
        return Err(FitProblem::NonFinite {
            what: "the expected burst counts",
        });
    }
    if derivatives(ratios, norm, 0.0).0 <= 0.0 {
        return Ok(0.0);
    }
    let hi = ratios.len() as f64 / norm;
    solve(|q| derivatives(ratios, norm, q), 0.0, hi, "the burst strength")
}

/// The q in [0, q_best] where `ln_likelihood` falls to `target` (it rises on that side).
fn lower_crossing(ratios: &[f64], norm: f64, target: f64, q_best: f64) -> Result<f64, FitProblem> {
    solve(
        |q| {
            (
                ln_likelihood(ratios, norm, q) - target,
                derivatives(ratios, norm, q).0,
            )
        },
        0.0,
        q_best,
        "the distance interval's far end",
    )
}

/// The q above q_best where `ln_likelihood` falls to `target`, bracketed by doubling.
fn upper_crossing(ratios: &[f64], norm: f64, target: f64, q_best: f64) -> Result<f64, FitProblem> {
    let mut hi = if q_best > 0.0 { 2.0 * q_best } else { 1.0 / norm };
    let mut lo = q_best;
    let mut found = false;
    for _ in 0..MAX_BRACKET_DOUBLINGS {
        if !hi.is_finite() {
            break;
        }
        if ln_likelihood(ratios, norm, hi) < target {
            found = true;
            break;
        }
        lo = hi;
        hi *= 2.0;
    }
    if !found {
        return Err(FitProblem::NoConvergence {
            what: "bracketing the distance interval's near end",
        });
    }
    solve(
        |q| {
            (
                ln_likelihood(ratios, norm, q) - target,
                derivatives(ratios, norm, q).0,
            )
        },
        lo,
        hi,
        "the distance interval's near end",
    )
}

/// Root of a monotone function on [lo, hi] whose values at the ends differ in sign: Newton steps, with
/// bisection whenever a step leaves the bracket or fails to halve it (Press et al., Numerical Recipes,
/// `rtsafe`). At most `MAX_SOLVER_ITERATIONS` steps.
fn solve(f: impl Fn(f64) -> (f64, f64), lo: f64, hi: f64, what: &'static str) -> Result<f64, FitProblem> {
    let (f_lo, _) = f(lo);
    let (f_hi, _) = f(hi);
    if !(f_lo.is_finite() && f_hi.is_finite()) {
        return Err(FitProblem::NonFinite { what });
    }
    if f_lo == 0.0 {
        return Ok(lo);
    }
    if f_hi == 0.0 {
        return Ok(hi);
    }
    if f_lo.signum() == f_hi.signum() {
        return Err(FitProblem::NoConvergence { what });
    }
    // Orient so that f(neg) < 0 < f(pos).
    let (mut neg, mut pos) = if f_lo < 0.0 { (lo, hi) } else { (hi, lo) };
    let mut x = 0.5 * (lo + hi);
    let mut step = (hi - lo).abs();
    for _ in 0..MAX_SOLVER_ITERATIONS {
        let (fx, dfx) = f(x);
        if !fx.is_finite() {
            return Err(FitProblem::NonFinite { what });
        }
        if fx == 0.0 {
            return Ok(x);
        }
        if fx < 0.0 {
            neg = x;
        } else {
            pos = x;
        }
        // Newton only when it stays inside the bracket and at least halves the previous step.
        let newton = x - fx / dfx;
        let inside = newton.is_finite() && (newton - neg) * (newton - pos) < 0.0;
        let fast = (2.0 * fx).abs() <= (step * dfx).abs();
        let next = if inside && fast { newton } else { 0.5 * (neg + pos) };
        step = (next - x).abs();
        let tolerance = 1e-12 * next.abs().max(f64::MIN_POSITIVE);
        if step <= tolerance || (pos - neg).abs() <= tolerance {
            return Ok(next);
        }
        x = next;
    }
    Err(FitProblem::NoConvergence { what })
}

/// KS p-value of a sample given as model-CDF values (any order): the two-sided statistic D against the
/// uniform, then the Kolmogorov distribution at (sqrt(n) + 0.12 + 0.11/sqrt(n)) D (Stephens 1970, J. R.
/// Statist. Soc. B 32, 115; as in Press et al., Numerical Recipes, section 14.3).
pub(crate) fn ks_p_value_of_cdf_values(values: &[f64]) -> f64 {
    if values.is_empty() {
        return 1.0;
    }
    let mut sorted = values.to_vec();
    sorted.sort_by(f64::total_cmp);
    let n = sorted.len() as f64;
    let d = sorted
        .iter()
        .enumerate()
        .map(|(i, &u)| ((i as f64 + 1.0) / n - u).max(u - i as f64 / n))
        .fold(0.0_f64, f64::max);
    let root = n.sqrt();
    kolmogorov_sf((root + 0.12 + 0.11 / root) * d)
}

/// Q_KS(lambda) = P(K > lambda) for the Kolmogorov distribution: the alternating series
/// 2 sum (-1)^(k-1) exp(-2 k^2 lambda^2) for lambda >= 1.18, and for smaller lambda its Jacobi-theta dual
/// 1 - sqrt(2 pi)/lambda sum exp(-(2k-1)^2 pi^2 / (8 lambda^2)), which converges fast there.
fn kolmogorov_sf(lambda: f64) -> f64 {
    if lambda.is_nan() || lambda <= 0.0 {
        return 1.0;
    }
    let mut sum = 0.0;
    if lambda < 1.18 {
        let a = std::f64::consts::PI * std::f64::consts::PI / (8.0 * lambda * lambda);
        for k in 1..=100_u32 {
            let m = f64::from(2 * k - 1);
            let term = (-m * m * a).exp();
            sum += term;
            if term <= 1e-17 * sum {
                break;
            }
        }
        (1.0 - (2.0 * std::f64::consts::PI).sqrt() / lambda * sum).clamp(0.0, 1.0)
    } else {
        let mut sign = 1.0;
        for k in 1..=100_u32 {
            let kf = f64::from(k);
            let term = (-2.0 * kf * kf * lambda * lambda).exp();
            sum += sign * term;
            if term <= 1e-17 * sum.abs() {
                break;
            }
            sign = -sign;
        }
        (2.0 * sum).clamp(0.0, 1.0)
    }
}

/// An evaporation fit still to run, owning its data (the photons' times and energies, a copy of the
/// instrument's response) so it can run on another thread. [`run`](Self::run) is a pure function of the
/// job: the same result whether the engine calls it at once or its caller does later.
#[derive(Debug, Clone, PartialEq)]
pub struct FitJob {
    pub(crate) times_ns: Vec<i64>,
    pub(crate) energies_gev: Vec<f64>,
    pub(crate) zenith_deg: f64,
    pub(crate) response: InstrumentResponse,
    pub(crate) background_rate_hz: f64,
    pub(crate) background_spectral_index: f64,
    pub(crate) window_start_ns: i64,
    pub(crate) window_end_ns: i64,
    pub(crate) psf_containment: f64,
    pub(crate) disc_radius_deg: f64,
    pub(crate) disc_offset_deg: f64,
}

impl FitJob {
    /// Runs the fit: up to a few hundred milliseconds with many photons (see [`fit_evaporation`]).
    pub fn run(&self) -> FitResult {
        fit_evaporation(&FitInput {
            times_ns: &self.times_ns,
            energies_gev: &self.energies_gev,
            zenith_deg: self.zenith_deg,
            response: &self.response,
            background_rate_hz: self.background_rate_hz,
            background_spectral_index: self.background_spectral_index,
            window_start_ns: self.window_start_ns,
            window_end_ns: self.window_end_ns,
            psf_containment: self.psf_containment,
            disc_radius_deg: self.disc_radius_deg,
            disc_offset_deg: self.disc_offset_deg,
        })
    }

    /// Photons the fit takes.
    pub fn photons(&self) -> usize {
        self.times_ns.len()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use glint_science::instrument::{AreaTable, CurveTable, ResponseSpec};

    /// An invented ground-array response (for tests of the fit's arithmetic, not a check value).
    fn response(sigma_ln: f64, clock_precision_ns: i64) -> InstrumentResponse {
        let energy = vec![300.0, 1e3, 1e4, 1e5];
        InstrumentResponse::from_spec(&ResponseSpec {
            max_zenith_deg: 45.0,
            energy_min_gev: 300.0,
            energy_max_gev: 1e5,
            effective_area: AreaTable {
                energy_gev: energy.clone(),
                zenith_deg: vec![0.0, 45.0],
                area_m2: vec![vec![300.0, 2e3, 1.2e4, 3e4], vec![50.0, 500.0, 5e3, 1.5e4]],
            },
            psf68_deg: CurveTable {
                energy_gev: energy.clone(),
                value: vec![1.5, 0.8, 0.3, 0.2],
            },
            energy_resolution: CurveTable {
                energy_gev: energy,
                value: vec![sigma_ln; 4],
            },
            systematic_deg: 0.0,
            clock_precision_ns,
        })
        .unwrap()
    }

    const S: i64 = 1_000_000_000;
    const START: i64 = 1_000 * S;

    /// A deterministic burst: `burst` photons at the quantiles of the tau^-1/2 law over the 20 s before t0 =
    /// START + 20 s, energies cycling below the cut-off, plus background photons every `spacing_ns` over
    /// the 30 s window at 350 GeV.
    fn photons(burst: u32, spacing_ns: i64) -> (Vec<i64>, Vec<f64>) {
        let t0 = START + 20 * S;
        let mut times = Vec::new();
        let mut energies = Vec::new();
        for k in 0..burst {
            let u = (f64::from(k) + 0.5) / f64::from(burst);
            times.push(t0 - (20e9 * u * u) as i64);
            energies.push([400.0, 700.0, 1200.0, 2500.0][k as usize % 4]);
        }
        let mut t = START + spacing_ns / 3;
        while t <= START + 30 * S {
            times.push(t);
            energies.push(350.0);
            t += spacing_ns;
        }
        (times, energies)
    }

    fn input<'a>(times: &'a [i64], energies: &'a [f64], response: &'a InstrumentResponse) -> FitInput<'a> {
        FitInput {
            times_ns: times,
            energies_gev: energies,
            zenith_deg: 10.0,
            response,
            background_rate_hz: 2.0,
            background_spectral_index: 2.7,
            window_start_ns: START,
            window_end_ns: START + 30 * S,
            psf_containment: 0.68,
            disc_radius_deg: 0.0,
            disc_offset_deg: 0.0,
        }
    }

    #[test]
    fn expected_counts_match_the_exact_fold_when_dispersion_is_small() {
        // [calc] from the formula: with sigma(ln E) = 0.01 the folded expected counts must equal
        // psf_containment x hawking::detected_counts_between (an exact power-law fold, no dispersion) to
        // within the edge losses of the resolution (0.04% here), for several time spans.
        let resp = response(0.01, 1);
        let (times, energies) = photons(40, S);
        let inp = input(&times, &energies, &resp);
        let p = Photons::new(&inp).unwrap();
        let m = Model::new(&inp, &p).unwrap();
        for (t0_s, span_s) in [(30.0, 30.0), (30.0, 1.0), (20.0, 20.0), (30.0, 0.01)] {
            let ours = m.signal_before(t0_s, 30.0, 30.0) - m.signal_before(t0_s, 30.0, t0_s - span_s);
            let exact = 0.68 * hawking::detected_counts_between(&resp, 10.0, 1.0, 0.0, span_s).unwrap();
            assert!(
                (ours / exact - 1.0).abs() < 0.003,
                "span {span_s} s: {ours} vs {exact}"
            );
        }
    }

    #[test]
    fn likelihood_falls_between_photon_times_so_anchors_suffice() {
        // The claim that lets the search stop at anchors: within a gap between photon times, the profile
        // of ln L over q strictly decreases as t0 moves later.
        let resp = response(0.4, 10);
        let (times, energies) = photons(40, S);
        let inp = input(&times, &energies, &resp);
        let p = Photons::new(&inp).unwrap();
        let m = Model::new(&inp, &p).unwrap();
        let c = PhotonCurves::new(&inp, &p, &m).unwrap();
        let search = Search {
            photons: &p,
            model: &m,
            curves: &c,
        };
        let mut scratch = Vec::new();
        let mut gaps = 0;
        for j in 0..p.len() - 1 {
            let (a, b) = (p.t0_ns(j), p.offsets_ns[j + 1]);
            if b - a < 100 {
                continue;
            }
            gaps += 1;
            let mut previous = f64::INFINITY;
            for k in 0..=10 {
                let t0 = a + (b - a) * k / 10;
                let norm = search.ratios_at(t0, &mut scratch);
                let q = best_strength(&scratch, norm).unwrap();
                let ln_l = ln_likelihood(&scratch, norm, q);
                assert!(
                    ln_l < previous || (ln_l == 0.0 && previous == 0.0),
                    "gap {j}, step {k}: {ln_l} >= {previous}"
                );
                previous = ln_l;
            }
        }
        assert!(gaps > 50, "only {gaps} gaps tried");
    }

    #[test]
    fn anchor_choice_does_not_depend_on_the_time_resolution() {
        // The constant -ln(delta)/2 of the anchor's term is common to all anchors: 1 ns and 1 us clocks
        // pick the same anchor, and the distance moves only through the tiny change of t0.
        let (times, energies) = photons(40, S);
        let fine = response(0.4, 1);
        let coarse = response(0.4, 1000);
        let a = fit_evaporation(&input(&times, &energies, &fine));
        let b = fit_evaporation(&input(&times, &energies, &coarse));
        assert!(a.converged && b.converged, "{} / {}", a.reason, b.reason);
        assert_eq!(a.explosion_ns + 999, b.explosion_ns);
        assert!(
            (a.distance_pc / b.distance_pc - 1.0).abs() < 1e-3,
            "{} vs {}",
            a.distance_pc,
            b.distance_pc
        );
        assert!((a.distance_pc_hi / b.distance_pc_hi - 1.0).abs() < 1e-3);
    }

    #[test]
    fn coarse_to_fine_search_finds_the_exhaustive_optimum() {
        // 300 burst photons and 1500 background photons: more distinct times than FULL_SEARCH_MAX.
        let (times, energies) = photons(300, 20_000_000);
        assert!(times.len() > FULL_SEARCH_MAX);
        let resp = response(0.4, 10);
        let inp = input(&times, &energies, &resp);
        let quick = fit(&inp, FULL_SEARCH_MAX).unwrap();
        let full = fit(&inp, usize::MAX).unwrap();
        assert_eq!(quick, full);
        // The burst's last photon is 20e9 * (0.5/300)^2 ns = 55.6 us before t0 (the 10 ns step after it).
        assert!(
            (quick.explosion_ns - (START + 20 * S)).abs() < 100_000,
            "{}",
            quick.explosion_ns
        );
    }

    #[test]
    fn kolmogorov_distribution_matches_tabulated_points() {
        // From memory: the asymptotic Kolmogorov critical values 1.2238, 1.3581, 1.6276 at 10%, 5%, 1%
        // (Smirnov 1948, Ann. Math. Stat. 19, 279), the median 0.8276 and Q(1) = 0.2700; both branches of
        // the series are exercised (the switch is at 1.18).
        for (lambda, q) in [
            (0.5, 0.963_945),
            (0.8276, 0.5),
            (1.0, 0.270_000),
            (1.2238, 0.1),
            (1.3581, 0.05),
            (1.6276, 0.01),
        ] {
            let got = kolmogorov_sf(lambda);
            assert!((got - q).abs() < 2e-4, "Q_KS({lambda}) = {got}, expected {q}");
        }
        // The two series agree where they meet.
        let a = kolmogorov_sf(1.18 - 1e-12);
        let b = kolmogorov_sf(1.18);
        assert!((a - b).abs() < 1e-12, "{a} vs {b}");
        assert_eq!(kolmogorov_sf(0.0), 1.0);
        assert!(kolmogorov_sf(10.0) < 1e-80);
    }

    #[test]
    fn ks_of_an_even_sample_is_not_rejected_and_of_a_bunched_one_is() {
        // [calc] from the formula: the points (i + 0.5)/n have D = 0.5/n, far inside the acceptance region.
        let even: Vec<f64> = (0..50).map(|i| (f64::from(i) + 0.5) / 50.0).collect();
        assert!(ks_p_value_of_cdf_values(&even) > 0.999);
        // All 50 points below 0.2: D = 0.8, p essentially zero.
        let bunched: Vec<f64> = (0..50).map(|i| 0.2 * f64::from(i) / 50.0).collect();
        assert!(ks_p_value_of_cdf_values(&bunched) < 1e-20);
    }

    #[test]
    fn solver_finds_roots_and_refuses_unbracketed_ones() {
        let root = solve(|x| (x * x - 2.0, 2.0 * x), 0.0, 4.0, "sqrt2").unwrap();
        assert!((root - std::f64::consts::SQRT_2).abs() < 1e-10);
        let err = solve(|x| (x * x + 1.0, 2.0 * x), 0.0, 4.0, "no root").unwrap_err();
        assert_eq!(err, FitProblem::NoConvergence { what: "no root" });
    }

    #[test]
    fn best_strength_is_the_poisson_estimate_when_signal_dominates() {
        // [calc] from the formula: with r_i -> infinity, d/dq sum ln(1 + q r) - q S = n/q - S, so q = n/S.
        let ratios = vec![1e12; 40];
        let q = best_strength(&ratios, 4.0).unwrap();
        assert!((q - 10.0).abs() < 1e-6, "{q}");
        // No excess: the slope at zero is negative, the estimate is zero.
        assert_eq!(best_strength(&[0.1, 0.2], 10.0).unwrap(), 0.0);
    }

    #[test]
    fn interpolation_clamps_and_handles_nan() {
        let v = [0.0, 1.0, 3.0];
        assert_eq!(interpolate(&v, -1.0), 0.0);
        assert_eq!(interpolate(&v, f64::NAN), 0.0);
        assert_eq!(interpolate(&v, 1.5), 2.0);
        assert_eq!(interpolate(&v, 7.0), 3.0);
        assert_eq!(interpolate(&[], 1.0), 0.0);
    }

    #[test]
    fn background_power_law_is_normalised() {
        // [calc] from the formula: integrate the density numerically over [e_min, e_max].
        for index in [1.0, 1.5, 2.7] {
            let pl = PowerLaw::new(index, 300.0, 3e5);
            let n = 200_000;
            let (a, b) = (300.0_f64.ln(), 3e5_f64.ln());
            let h = (b - a) / f64::from(n);
            let sum: f64 = (0..n)
                .map(|k| {
                    let u = a + (f64::from(k) + 0.5) * h;
                    pl.density(u.exp()) * u.exp() * h
                })
                .sum();
            assert!((sum - 1.0).abs() < 1e-6, "index {index}: {sum}");
        }
    }
}
