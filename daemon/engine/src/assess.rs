//! Assessment of a closed candidate: persistence after and before the flash, instrumental signs (all-sky
//! jump, identical timestamps, spread wider than the PSF), the evaporation fit, and the verdict. Pure
//! functions of what the candidate collected while it was open; the engine calls them when the watermark
//! passes the end of the persistence window (or at `finish`, cut short).

use glint_science::geometry::gaussian_containment;
use glint_science::instrument::InstrumentResponse;
use glint_science::poisson::p_from_sigma;

use crate::candidate::Candidate;
use crate::config::AssessConfig;
use crate::engine::pre_end;
use crate::finding::{Assessment, Flash, Verdict, Withdrawal, flags as flag};
use crate::fit::{FitJob, LightCurve, best_strength, ln_likelihood};
use crate::shape::{ShapeInput, light_curve_shape, precursor_test};
use crate::sky::{angle_deg, unit_vector};
use crate::stats::{count_sigma, median_sorted};

/// What the engine hands over for one candidate.
pub(crate) struct AssessInput<'a> {
    pub(crate) cand: &'a Candidate,
    /// End of the persistence window actually covered (the nominal end, or the end of input when cut short).
    pub(crate) close: i64,
    pub(crate) cut_short: bool,
    /// Dead time inside the post-flash window (end of the best trigger's window, close], ns.
    pub(crate) dead_post_ns: i64,
    /// All-sky photons released in the post-flash window.
    pub(crate) post_all_sky: u64,
    /// Acceptance density at the candidate's instrument-frame bin, per sr.
    pub(crate) density: f64,
    pub(crate) omega_r: f64,
    /// All-sky rate of the current thresholds, Hz.
    pub(crate) rate_hz: f64,
    pub(crate) search_radius_deg: f64,
    pub(crate) longest_ns: i64,
    pub(crate) pre_ns: i64,
    pub(crate) response: &'a InstrumentResponse,
    pub(crate) cfg: &'a AssessConfig,
}

/// Fraction of photons whose time lies within `precision_ns` of another photon's.
pub(crate) fn identical_time_fraction(times: &[i64], precision_ns: i64) -> f64 {
    if times.len() < 2 {
        return 0.0;
    }
    let mut t = times.to_vec();
    t.sort_unstable();
    let close = |a: i64, b: i64| b.saturating_sub(a) <= precision_ns.max(0);
    let n = t
        .iter()
        .enumerate()
        .filter(|&(i, &x)| (i > 0 && close(t[i - 1], x)) || (i + 1 < t.len() && close(x, t[i + 1])))
        .count();
    n as f64 / t.len() as f64
}

/// RMS angular distance of the flash photons from their centroid over what a Gaussian PSF gives:
/// E[d^2] about the sample centroid is 2 sigma^2 (n - 1) / n (common practice, no source), with sigma^2
/// averaged over the photons' energies. Reported only: inside the search disc it cannot grow much past 1
/// (the disc bounds the distances), so no rule reads it; see [`extension_sigma`].
pub(crate) fn spread_ratio(f: &Flash, response: &InstrumentResponse) -> f64 {
    let n = f.photons.len();
    if n < 2 {
        return 0.0;
    }
    let c = unit_vector(f.ra_deg, f.dec_deg);
    let mut msd = 0.0;
    let mut s2 = 0.0;
    for p in &f.photons {
        let d = angle_deg(unit_vector(p.ra_deg, p.dec_deg), c);
        msd += d * d;
        let s = response.psf_sigma_deg(p.energy_gev);
        s2 += s * s;
    }
    let nf = n as f64;
    let expected = 2.0 * (s2 / nf) * (nf - 1.0) / nf;
    if expected > 0.0 && expected.is_finite() {
        (msd / nf / expected).sqrt()
    } else {
        0.0
    }
}

/// Each photon's PSF is taken at its energy lowered by this many resolution sigmas (see `extension_sigma`).
const SPREAD_ENERGY_SHIFT: f64 = 0.25;

/// Extra widths (degrees, added in quadrature to the PSF) the spread test tries.
const EXTENSIONS_DEG: [f64; 10] = [0.1, 0.2, 0.35, 0.5, 0.75, 1.0, 1.4, 2.0, 2.8, 4.0];

/// Significance of a spread wider than the PSF, from the photons of the flash window within `cone_deg` of
/// the flash (distance from it in degrees, reconstructed energy): the likelihood ratio of a source of
/// Gaussian width sqrt(sigma_PSF^2 + w^2), maximised over w and its counts, against a point source
/// (w = 0), both over a flat background of `background` photons in the cone (small-angle densities per
/// deg^2; the usual extension test, common practice, no source). Under a point source the ratio follows
/// half a chi-squared of one degree of freedom (w >= 0 is on the boundary), so sqrt(2 Delta ln L) is its
/// one-sided normal equivalent. Each photon's PSF is taken at its energy lowered by a quarter of a resolution sigma:
/// on steep spectra a photon's true energy is more often below its reconstructed one, and a PSF taken at
/// the reconstructed energy would be too narrow and call bright sources wide.
pub(crate) fn extension_sigma(
    cone: &[(f64, f64)],
    background: f64,
    cone_deg: f64,
    response: &InstrumentResponse,
) -> f64 {
    if cone.len() < 3 || cone_deg <= 0.0 {
        return 0.0;
    }
    let area = std::f64::consts::PI * cone_deg * cone_deg;
    // A floor on the background density: a window far shorter than the background's spacing must not make
    // one stray photon look infinitely unlikely.
    let bdens = background.max(0.01) / area;
    let sig2: Vec<f64> = cone
        .iter()
        .map(|&(_, e)| {
            let lowered = e * (-SPREAD_ENERGY_SHIFT * response.energy_sigma_ln(e).clamp(0.0, 2.0)).exp();
            response
                .psf_sigma_deg(lowered.max(response.energy_min_gev()))
                .powi(2)
        })
        .collect();
    let mut s2_sorted = sig2.clone();
    s2_sorted.sort_by(f64::total_cmp);
    let s2_med = median_sorted(&s2_sorted);
    let mut ratios = Vec::with_capacity(cone.len());
    let mut ln_l_at = |w2: f64| -> f64 {
        ratios.clear();
        ratios.extend(cone.iter().zip(&sig2).map(|(&(d, _), &s2)| {
            let v = s2 + w2;
            (-d * d / (2.0 * v)).exp() / (2.0 * std::f64::consts::PI * v) / bdens
        }));
        let norm = -(-cone_deg * cone_deg / (2.0 * (s2_med + w2))).exp_m1();
        match best_strength(&ratios, norm) {
            Ok(q) => ln_likelihood(&ratios, norm, q),
            Err(_) => 0.0,
        }
    };
    let point = ln_l_at(0.0);
    let wide = EXTENSIONS_DEG
        .iter()
        .map(|&w| ln_l_at(w * w))
        .fold(f64::NEG_INFINITY, f64::max);
    let ts = 2.0 * (wide - point);
    if ts.is_finite() && ts > 0.0 {
        ts.sqrt()
    } else {
        0.0
    }
}

/// Builds the assessment and, for an instrumental verdict, the withdrawal.
///
/// Verdict rules, in order: `instrumental` if the best trigger's flash carries an instrumental sign (all-sky
/// jump, identical timestamps, spread wider than the PSF; set when the flash was decided), or, when it
/// carries none, the same signs measured over its window run as long again past its end
/// (`signs_after_flash`: a glitch that crossed before all its photons had arrived); else
/// `undecided` if dead time covers more than `max_dead_fraction` of the post-flash window or the input
/// ended first; else `persistent` if the post- or pre-flash excess passes its significance or the flash's
/// own light curve decays (`decaying_shape`); else `isolated`.
///
/// The post-flash window runs from the end of the best trigger's window to the end of the persistence
/// window. The pre-flash window is the `pre_window_s` ending just before the best trigger's earliest photon,
/// so emission at the spot before the burst is seen even when crossings it made were merged into the
/// candidate. Its expectation is the background plus the rise the best-fitting instrument-folded evaporation
/// template puts there (reported apart, `pre_rise`).
///
/// The light-curve test (`shape.rs`) reads the disc photons from the start of the best trigger's window to
/// the end of the persistence window: an afterglow-like burst's best window may swallow most of its decay,
/// leaving the post-flash window only a faint tail, but the decay shows plainly inside the flash. A shape
/// is called decaying when the decaying family beats the evaporation template by `shape_log_ratio_min` and
/// the template's own goodness of fit falls below `shape_p_max`: both, so that neither a poor but
/// un-decaying template fit nor a slight preference for a decay on a faint flash decides alone.
pub(crate) fn assess(inp: &AssessInput<'_>) -> (Assessment, Option<Withdrawal>) {
    let c = inp.cand;
    let cfg = inp.cfg;
    let frac = (inp.density * inp.omega_r).clamp(0.0, 1.0);
    let disc_rate = inp.rate_hz * frac;
    let mut flags: Vec<String> = Vec::new();

    // Persistence after the flash: the disc after the best trigger's window, against the all-sky photons
    // of the same window times the disc's share of the acceptance (dead time needs no correction: it has
    // no photons in either).
    let post_from = c.best.end_ns;
    let in_disc = |a: i64, b: i64| c.photons.iter().filter(|p| p.t > a && p.t <= b).count() as u64;
    let post_counts = in_disc(post_from, inp.close);
    let post_background = inp.post_all_sky as f64 * frac;
    let (post_p_value, post_sigma) = count_sigma(post_counts, post_background);

    // The flash's own light curve.
    let pre_to = pre_end(&c.best);
    let pre_from = pre_to.saturating_sub(inp.pre_ns);
    let best_len = c.best.end_ns.saturating_sub(c.best.start_ns);
    let shape_times: Vec<i64> = c
        .photons
        .iter()
        .map(|p| p.t)
        .filter(|&t| t > c.best.start_ns && t <= inp.close)
        .collect();
    let tau_max = inp.close.saturating_sub(pre_from) as f64 * 1e-9;
    let curve = LightCurve::build(
        inp.response,
        c.zenith0,
        tau_max,
        Some((inp.search_radius_deg, 0.0)),
    )
    .ok();
    let shape = curve.as_ref().and_then(|curve| {
        light_curve_shape(
            &ShapeInput {
                times_ns: &shape_times,
                start_ns: c.best.start_ns,
                end_ns: inp.close,
                background_hz: disc_rate,
                delta_ns: inp.response.clock_precision_ns(),
                t0_from_ns: c.best.start_ns,
                t0_to_ns: c.best.end_ns.saturating_add(best_len),
                onset_to_ns: c.best.end_ns,
            },
            curve,
        )
    });
    let decaying =
        shape.is_some_and(|s| s.log_ratio > cfg.shape_log_ratio_min && s.template_p < cfg.shape_p_max);
    if shape.is_none() {
        flags.push(flag::SHAPE_UNTESTED.into());
    }

    // Before the flash: background from the all-sky photons of the window; the burst's own rise and a
    // possible precursor from the joint fit of `shape::precursor_test`. Its significance is sqrt(2 Delta
    // ln L) of a flat precursor (one-sided, on the boundary: half a chi-squared of one degree of freedom)
    // when one improves the fit; otherwise the counts' own signed significance against background plus
    // rise, which is then no excess or a deficit.
    let pre_counts = in_disc(pre_from, pre_to);
    let pre_background = c.pre_all_sky as f64 * frac;
    let span_times: Vec<i64> = c
        .photons
        .iter()
        .map(|p| p.t)
        .filter(|&t| t > pre_from && t <= inp.close)
        .collect();
    let precursor = match (&shape, &curve) {
        (Some(s), Some(curve)) => precursor_test(
            &span_times,
            &s.template,
            curve,
            disc_rate,
            pre_from,
            pre_to,
            inp.close,
        ),
        _ => None,
    };
    let pre_rise = precursor.map_or(0.0, |p| p.rise);
    let (pre_p_value, pre_sigma) = match precursor {
        Some(p) if p.log_ratio > 0.0 && p.rate_hz > 0.0 => {
            let z = p.log_ratio.sqrt();
            (p_from_sigma(z), z)
        }
        _ => {
            let (p, z) = count_sigma(pre_counts, pre_background + pre_rise);
            (p, z.min(0.0))
        }
    };

    // Instrumental signs, from the best trigger's flash; when it carried none, from the same signs measured
    // again once the window had run as long again (a glitch that crossed before all its photons arrived).
    let late = c
        .late_signs
        .as_ref()
        .filter(|l| c.best.flags.is_empty() && l.best_end_ns == c.best.end_ns && !l.flags.is_empty());
    let instrumental: Vec<String> = late.map_or_else(|| c.best.flags.clone(), |l| l.flags.clone());
    flags.extend(instrumental.iter().cloned());
    if late.is_some() {
        flags.push("signs_after_flash".into());
    }
    let spread = spread_ratio(&c.best, inp.response);

    let window_ns = inp.close.saturating_sub(post_from);
    let dead_fraction = if window_ns > 0 {
        inp.dead_post_ns as f64 / window_ns as f64
    } else {
        0.0
    };
    let too_dead = dead_fraction > cfg.max_dead_fraction;
    if too_dead {
        flags.push(flag::DEAD_TIME.into());
    }
    if inp.cut_short {
        flags.push(flag::CUT_SHORT.into());
    }
    let post_excess = post_sigma > cfg.post_sigma_max;
    let pre_excess = pre_sigma > cfg.pre_sigma_max;
    if post_excess {
        flags.push(flag::POST_EXCESS.into());
    }
    if pre_excess {
        flags.push(flag::PRE_EXCESS.into());
    }
    if decaying {
        flags.push(flag::DECAYING_SHAPE.into());
    }
    if c.capped {
        flags.push(flag::PHOTONS_CAPPED.into());
    }
    if c.late_crossings > 0 {
        flags.push(flag::CROSSINGS_AFTER_FLASH.into());
    }

    let verdict = if !instrumental.is_empty() {
        Verdict::Instrumental
    } else if too_dead || inp.cut_short {
        Verdict::Undecided
    } else if post_excess || pre_excess || decaying {
        Verdict::Persistent
    } else {
        Verdict::Isolated
    };

    let fit = fit(inp, frac);
    let withdrawal = (verdict == Verdict::Instrumental).then(|| Withdrawal {
        candidate: c.id,
        reason: format!("instrumental: {}", instrumental.join(", ")),
    });
    let assessment = Assessment {
        candidate: c.id,
        verdict,
        trigger: c.best.clone(),
        post_counts,
        post_background,
        post_p_value,
        post_sigma,
        pre_counts,
        pre_background,
        pre_rise,
        pre_p_value,
        pre_sigma,
        flags,
        all_sky_counts: c.best_all_sky,
        all_sky_expected: c.best_all_sky_expected,
        all_sky_sigma: late.map_or(c.best.all_sky_sigma, |l| l.all_sky_sigma),
        identical_time_fraction: late.map_or(c.best.identical_time_fraction, |l| l.identical_time_fraction),
        spread_ratio: spread,
        spread_sigma: late.map_or(c.best.spread_sigma, |l| l.spread_sigma),
        shape_log_ratio: shape.map_or(0.0, |s| s.log_ratio),
        shape_template_p: shape.map_or(1.0, |s| s.template_p),
        shape_decay_index: shape.map_or(0.0, |s| s.decay_index),
        shape_decay_time_s: shape.map_or(0.0, |s| s.decay_time_s),
        dead_seconds: inp.dead_post_ns as f64 * 1e-9,
        fit: crate::fit::FitResult::pending(),
        fit_job: Some(fit),
    };
    (assessment, withdrawal)
}

/// The evaporation fit's job: the disc photons from (flash span start - longest timescale) to the end of the
/// persistence window, energies inside the instrument's range, and what the fit needs besides. The engine
/// runs it at once unless it defers fits to its caller (`EngineConfig::defer_fit`).
fn fit(inp: &AssessInput<'_>, frac: f64) -> FitJob {
    let c = inp.cand;
    let start = c.span_start.saturating_sub(inp.longest_ns);
    let end = inp.close.max(start.saturating_add(1));
    let (emin, emax) = (inp.response.energy_min_gev(), inp.response.energy_max_gev());
    let (times, energies): (Vec<i64>, Vec<f64>) = c
        .photons
        .iter()
        .filter(|p| p.t >= start && p.t <= end)
        .map(|p| (p.t, f64::from(p.energy)))
        .filter(|&(_, e)| e >= emin && e <= emax)
        .unzip();
    let mut flash_e: Vec<f64> = c.best.photons.iter().map(|p| p.energy_gev).collect();
    flash_e.sort_by(f64::total_cmp);
    let sigma = inp.response.psf_sigma_deg(median_sorted(&flash_e));
    let containment = gaussian_containment(inp.search_radius_deg, sigma).clamp(1e-6, 1.0);
    FitJob {
        times_ns: times,
        energies_gev: energies,
        zenith_deg: c.zenith0,
        response: inp.response.clone(),
        background_rate_hz: inp.rate_hz * frac,
        background_spectral_index: inp.cfg.background_spectral_index,
        window_start_ns: start,
        window_end_ns: end,
        psf_containment: containment,
        disc_radius_deg: inp.search_radius_deg,
        disc_offset_deg: angle_deg(c.pos0, unit_vector(c.best.ra_deg, c.best.dec_deg)),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn identical_fraction_counts_pairs_within_precision() {
        assert_eq!(identical_time_fraction(&[5, 5, 5, 5], 0), 1.0);
        assert_eq!(identical_time_fraction(&[0, 100, 200, 300], 0), 0.0);
        assert_eq!(identical_time_fraction(&[0, 10, 200, 300], 10), 0.5);
        assert_eq!(identical_time_fraction(&[7], 0), 0.0);
    }
}
