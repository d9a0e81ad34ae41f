//! Assessment of a closed candidate: persistence after and before the flash, instrumental signs (all-sky
//! jump, identical timestamps, spread wider than the PSF), the evaporation fit, and the verdict. Pure
//! functions of what the candidate collected while it was open; the engine calls them when the watermark
//! passes the end of the persistence window (or at `finish`, cut short).

use glint_science::geometry::gaussian_containment;
use glint_science::instrument::InstrumentResponse;
use glint_science::poisson::{ln_sf, sigma_from_ln_p};

use crate::candidate::Candidate;
use crate::config::AssessConfig;
use crate::finding::{Assessment, Flash, Verdict, Withdrawal};
use crate::fit::FitJob;
use crate::sky::{angle_deg, unit_vector};
use crate::stats::{clamp_sigma, median_sorted};

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

/// p-value and clamped significance of `n` or more counts on `b`.
fn excess(n: u64, b: f64) -> (f64, f64) {
    let ln_p = ln_sf(n, b.max(0.0));
    (ln_p.exp(), clamp_sigma(sigma_from_ln_p(ln_p)))
}

/// Photons an evaporation burst puts in the `pre_ns` before its flash span, given `signal` photons (above
/// background) over the span of `span_ns` ending at the explosion. Above a fixed energy threshold the light
/// curve rises as tau^-1/2 toward the explosion (docs/science.md section 2), so the counts in the last tau grow as
/// sqrt(tau) and the pre-window holds signal x (sqrt(1 + pre / span) - 1) [calc] from the formula. For a real
/// instrument this is an upper bound: the spectrum softens as tau grows, and the effective area falls toward
/// low energies. The span is taken at least as long as the pre-window, so a short flash cannot excuse a
/// long pre-flash excess (a burst bright enough to fill the pre-window would have crossed on a timescale as
/// long, and its span would reach back that far).
pub(crate) fn evaporation_rise(signal: f64, span_ns: i64, pre_ns: i64) -> f64 {
    // A NaN signal (none can arise from finite counts) gives no rise rather than a NaN expectation.
    if signal.is_nan() || signal <= 0.0 || pre_ns <= 0 {
        return 0.0;
    }
    let span = span_ns.max(pre_ns) as f64;
    signal * ((1.0 + pre_ns as f64 / span).sqrt() - 1.0)
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
/// averaged over the photons' energies.
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

/// Builds the assessment and, for an instrumental verdict, the withdrawal.
///
/// Verdict rules, in order: `instrumental` if any instrumental sign passes its threshold; else `undecided`
/// if dead time covers more than `max_dead_fraction` of the post-flash window or the input ended first;
/// else `persistent` if the post- or pre-flash excess passes its significance; else `isolated`.
///
/// The post-flash window runs from the end of the best trigger's window to the end of the persistence
/// window. An evaporation burst is brightest at its end, so its best window ends at the explosion and the
/// model puts nothing after it; an afterglow-like burst peaks and fades, so its tail follows its best window.
/// (The last crossing would start the window too late: a fading burst keeps crossing on the longer
/// timescales while its tail is still bright.) The pre-flash window is the `pre_window_s` before the flash
/// span; its expectation is the background plus the rise an evaporation burst ending at the best window's
/// end would put there (`evaporation_rise`), so a burst's own rising light curve is not called persistent.
pub(crate) fn assess(inp: &AssessInput<'_>) -> (Assessment, Option<Withdrawal>) {
    let c = inp.cand;
    let cfg = inp.cfg;
    let frac = (inp.density * inp.omega_r).clamp(0.0, 1.0);
    let mut flags: Vec<String> = Vec::new();

    // Persistence: the disc after the best trigger's window and before the flash span, against the all-sky
    // photons of the same windows times the disc's share of the acceptance (dead time needs no correction:
    // it has no photons in either).
    let post_from = c.best.end_ns;
    let in_disc = |a: i64, b: i64| c.photons.iter().filter(|p| p.t > a && p.t <= b).count() as u64;
    let post_counts = in_disc(post_from, inp.close);
    let post_background = inp.post_all_sky as f64 * frac;
    let (post_p_value, post_sigma) = excess(post_counts, post_background);
    let pre_from = c.span_start.saturating_sub(inp.pre_ns);
    let pre_counts = in_disc(pre_from, c.span_start);
    let span_ns = post_from.saturating_sub(c.span_start);
    let span_signal = in_disc(c.span_start, post_from) as f64 - inp.rate_hz * frac * span_ns as f64 * 1e-9;
    let rise = evaporation_rise(span_signal, span_ns, inp.pre_ns);
    let pre_background = c.pre_all_sky as f64 * frac + rise;
    let (pre_p_value, pre_sigma) = excess(pre_counts, pre_background);

    // Instrumental signs.
    let all_sky_sigma = if c.best_all_sky_expected > 0.0 {
        excess(c.best_all_sky, c.best_all_sky_expected).1
    } else {
        0.0
    };
    let times: Vec<i64> = c.best.photons.iter().map(|p| p.time_ns).collect();
    let identical = identical_time_fraction(&times, inp.response.clock_precision_ns());
    let spread = spread_ratio(&c.best, inp.response);
    let mut instrumental = Vec::new();
    if all_sky_sigma > cfg.all_sky_sigma_max {
        instrumental.push("all_sky_jump");
    }
    if identical > cfg.identical_fraction_max {
        instrumental.push("identical_timestamps");
    }
    if spread > cfg.spread_ratio_max {
        instrumental.push("wide_spread");
    }
    flags.extend(instrumental.iter().map(|s| (*s).to_owned()));

    let window_ns = inp.close.saturating_sub(post_from);
    let dead_fraction = if window_ns > 0 {
        inp.dead_post_ns as f64 / window_ns as f64
    } else {
        0.0
    };
    let too_dead = dead_fraction > cfg.max_dead_fraction;
    if too_dead {
        flags.push("dead_time".into());
    }
    if inp.cut_short {
        flags.push("cut_short".into());
    }
    let post_excess = post_sigma > cfg.post_sigma_max;
    let pre_excess = pre_sigma > cfg.pre_sigma_max;
    if post_excess {
        flags.push("post_excess".into());
    }
    if pre_excess {
        flags.push("pre_excess".into());
    }
    if c.capped {
        flags.push("photons_capped".into());
    }
    if c.late_crossings > 0 {
        flags.push("crossings_after_flash".into());
    }

    let verdict = if !instrumental.is_empty() {
        Verdict::Instrumental
    } else if too_dead || inp.cut_short {
        Verdict::Undecided
    } else if post_excess || pre_excess {
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
        pre_p_value,
        pre_sigma,
        flags,
        all_sky_counts: c.best_all_sky,
        all_sky_expected: c.best_all_sky_expected,
        identical_time_fraction: identical,
        spread_ratio: spread,
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

    #[test]
    fn evaporation_rise_follows_the_square_root_law() {
        let s = 1_000_000_000;
        // [calc] from the formula: N(< tau) ~ sqrt(tau), so 100 photons in the last 30 s give
        // 100 (sqrt(60 / 30) - 1) = 41.42 in the 30 s before.
        assert!((evaporation_rise(100.0, 30 * s, 30 * s) - 41.421_356).abs() < 1e-5);
        // 300 s of span: 100 (sqrt(330 / 300) - 1) = 4.881.
        assert!((evaporation_rise(100.0, 300 * s, 30 * s) - 4.880_885).abs() < 1e-5);
        // A span shorter than the pre-window counts as long as it: a 1 s flash excuses no more than a 30 s one.
        assert_eq!(
            evaporation_rise(10.0, s, 30 * s),
            evaporation_rise(10.0, 30 * s, 30 * s)
        );
        assert_eq!(evaporation_rise(0.0, 30 * s, 30 * s), 0.0);
        assert_eq!(evaporation_rise(-3.0, 30 * s, 30 * s), 0.0);
        assert_eq!(evaporation_rise(f64::NAN, 30 * s, 30 * s), 0.0);
        assert_eq!(evaporation_rise(50.0, 30 * s, 0), 0.0);
    }
}
