//! The flash's own light curve: the arrival times of the candidate's disc photons from the start of its
//! best window to the end of its persistence window, fitted with the instrument-folded evaporation template
//! and with a decaying family (a sharp onset, then a power-law or exponential decay), both on the known
//! background (docs/science.md section 4). Its answer carries the likelihood ratio of the two, the
//! template's goodness of fit, and the template's fitted burst, from which the pre-flash expectation comes.

use crate::fit::{LightCurve, best_strength, ks_p_value_of_cdf_values, ln_likelihood};

/// Most anchors (trial explosion times, trial onsets) each model tries: bounds the cost to
/// O(photons x anchors x grid) however long the window.
const MAX_ANCHORS: usize = 96;
/// Onsets tried by the decaying family (each costs the whole grid).
const MAX_ONSETS: usize = 40;
/// Decay indices of the power-law family (1 + x/tc)^-index; `EXPONENTIAL` marks exp(-x/tc).
const DECAY_INDICES: [f64; 7] = [0.5, 0.8, 1.0, 1.3, 1.7, 2.2, EXPONENTIAL];
const EXPONENTIAL: f64 = -1.0;
/// Decay times tc, seconds: 10 ms to 300 s, a factor of about 2.4 apart.
const DECAY_TIMES_S: [f64; 13] = [
    0.01, 0.024, 0.056, 0.13, 0.32, 0.75, 1.8, 4.2, 10.0, 24.0, 56.0, 130.0, 300.0,
];

/// The photons and the window of the test.
pub(crate) struct ShapeInput<'a> {
    /// Disc photon times in [start_ns, end_ns], sorted.
    pub(crate) times_ns: &'a [i64],
    pub(crate) start_ns: i64,
    pub(crate) end_ns: i64,
    /// Expected background photons per second in the disc.
    pub(crate) background_hz: f64,
    /// Explosion times are tried one clock step after a photon, as in the fit.
    pub(crate) delta_ns: i64,
    /// Explosion times are tried at photons in (t0_from_ns, t0_to_ns], onsets at photons in
    /// [start_ns, onset_to_ns].
    pub(crate) t0_from_ns: i64,
    pub(crate) t0_to_ns: i64,
    pub(crate) onset_to_ns: i64,
}

/// The best evaporation template: rate s x H'(t0 - t) before t0 (H from [`LightCurve`]).
#[derive(Debug, Clone, Copy)]
pub(crate) struct Template {
    pub(crate) t0_ns: i64,
    pub(crate) strength: f64,
    pub(crate) ln_l: f64,
}

/// The test's answer.
#[derive(Debug, Clone, Copy)]
pub(crate) struct ShapeResult {
    /// 2 (ln L_decaying - ln L_evaporation), each maximised over its parameters; positive favours a decay.
    pub(crate) log_ratio: f64,
    /// Kolmogorov-Smirnov p-value of the photon times (anchor left out) against the best template.
    pub(crate) template_p: f64,
    pub(crate) template: Template,
    /// Best decaying model: index (-1 for exponential) and decay time.
    pub(crate) decay_index: f64,
    pub(crate) decay_time_s: f64,
}

/// Up to `MAX_ANCHORS` indices of `idx`, evenly strided, the last always kept.
fn thin(idx: Vec<usize>, max: usize) -> Vec<usize> {
    if idx.len() <= max {
        return idx;
    }
    let stride = idx.len().div_ceil(max);
    let mut out: Vec<usize> = idx.iter().copied().step_by(stride).collect();
    if out.last() != idx.last() {
        out.extend(idx.last().copied());
    }
    out
}

/// Integral of the decay profile from 0 to x.
fn decay_integral(index: f64, tc: f64, x: f64) -> f64 {
    if x <= 0.0 {
        return 0.0;
    }
    if index == EXPONENTIAL {
        return tc * -(-x / tc).exp_m1();
    }
    let u = x / tc;
    if (index - 1.0).abs() < 1e-9 {
        tc * u.ln_1p()
    } else {
        tc * (1.0 - (1.0 + u).powf(1.0 - index)) / (index - 1.0)
    }
}

fn decay_profile(index: f64, tc: f64, x: f64) -> f64 {
    if x < 0.0 {
        0.0
    } else if index == EXPONENTIAL {
        (-x / tc).exp()
    } else {
        (1.0 + x / tc).powf(-index)
    }
}

/// Fits both models; None with fewer than three photons or no background (nothing to tell apart).
pub(crate) fn light_curve_shape(inp: &ShapeInput<'_>, curve: &LightCurve) -> Option<ShapeResult> {
    let t = inp.times_ns;
    let b = inp.background_hz;
    if t.len() < 3 || !(b > 0.0 && b.is_finite()) || inp.end_ns <= inp.start_ns {
        return None;
    }
    let secs = |ns: i64| (ns - inp.start_ns) as f64 * 1e-9;
    let window_s = secs(inp.end_ns);
    let x: Vec<f64> = t.iter().map(|&v| secs(v)).collect();
    let delta_s = inp.delta_ns.max(1) as f64 * 1e-9;
    let mut ratios = Vec::with_capacity(t.len());

    // Evaporation: explosion one clock step after an anchor photon (the last of its time group).
    let t0_idx: Vec<usize> = (0..t.len())
        .filter(|&j| t[j] > inp.t0_from_ns && t[j] <= inp.t0_to_ns && (j + 1 == t.len() || t[j + 1] != t[j]))
        .collect();
    let mut best_evap: Option<Template> = None;
    for j in thin(t0_idx, MAX_ANCHORS) {
        let t0 = x[j] + delta_s;
        ratios.clear();
        ratios.extend(x[..=j].iter().map(|&xi| curve.rate(t0 - xi) / b));
        let norm = curve.cumulative(t0) - curve.cumulative(t0 - window_s);
        let Ok(q) = best_strength(&ratios, norm) else {
            continue;
        };
        let ln_l = ln_likelihood(&ratios, norm, q);
        if best_evap.is_none_or(|e| ln_l > e.ln_l) {
            best_evap = Some(Template {
                t0_ns: t[j] + inp.delta_ns.max(1),
                strength: q,
                ln_l,
            });
        }
    }
    let template = best_evap?;

    // Decaying: onset at an anchor photon, a grid of indices and decay times.
    let onset_idx: Vec<usize> = (0..t.len())
        .filter(|&j| t[j] <= inp.onset_to_ns && (j == 0 || t[j - 1] != t[j]))
        .collect();
    let mut best_decay = (0.0_f64, 1.0, 1.0);
    for j in thin(onset_idx, MAX_ONSETS) {
        let ts = x[j];
        for &index in &DECAY_INDICES {
            for &tc in &DECAY_TIMES_S {
                ratios.clear();
                ratios.extend(x[j..].iter().map(|&xi| decay_profile(index, tc, xi - ts) / b));
                let norm = decay_integral(index, tc, window_s - ts);
                let Ok(q) = best_strength(&ratios, norm) else {
                    continue;
                };
                let ln_l = ln_likelihood(&ratios, norm, q);
                if ln_l > best_decay.0 {
                    best_decay = (ln_l, index, tc);
                }
            }
        }
    }

    // Goodness of fit of the template over the window, its anchor group left out.
    let t0 = secs(template.t0_ns);
    let signal_total = template.strength * (curve.cumulative(t0) - curve.cumulative(t0 - window_s));
    let total = b * window_s + signal_total;
    let anchor_ns = template.t0_ns - inp.delta_ns.max(1);
    let cdf: Vec<f64> = t
        .iter()
        .zip(&x)
        .filter(|(v, _)| **v != anchor_ns)
        .map(|(_, &xi)| {
            let s = template.strength * (curve.cumulative(t0) - curve.cumulative(t0 - xi.min(t0)));
            ((b * xi + s) / total).clamp(0.0, 1.0)
        })
        .collect();
    Some(ShapeResult {
        log_ratio: 2.0 * (best_decay.0 - template.ln_l),
        template_p: ks_p_value_of_cdf_values(&cdf),
        template,
        decay_index: best_decay.1,
        decay_time_s: best_decay.2,
    })
}

/// Most rounds of the coordinate ascent in [`precursor_test`]; each round is two one-dimensional concave
/// maximisations, and the joint likelihood is concave, so a few tens suffice.
const PRECURSOR_ROUNDS: usize = 60;

/// The precursor test's answer.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Precursor {
    /// 2 (ln L with a flat precursor - ln L without), >= 0.
    pub(crate) log_ratio: f64,
    /// Fitted precursor rate, photons per second in the disc.
    pub(crate) rate_hz: f64,
    /// The burst's own counts in the pre-window under the no-precursor fit.
    pub(crate) rise: f64,
}

/// Whether the pre-window holds emission beyond the background and the burst's own rise: the disc photons
/// of (pre_from, close] (`times_ns`, sorted) fitted with the background, the evaporation template at the
/// light-curve test's explosion time (its strength refitted over the whole span), and, for the
/// alternative, a flat source from pre_from to the explosion. A precursor is flat over minutes; the burst's own
/// rise crowds toward the flash, so the two are told apart by shape as well as by counts, and the
/// template's strength is set by the flash and the pre-window together rather than extrapolated.
#[allow(clippy::too_many_arguments)]
pub(crate) fn precursor_test(
    times_ns: &[i64],
    tpl: &Template,
    curve: &LightCurve,
    background_hz: f64,
    pre_from: i64,
    pre_to: i64,
    close: i64,
) -> Option<Precursor> {
    let b = background_hz;
    if !(b > 0.0 && b.is_finite()) || pre_to <= pre_from || close <= pre_to {
        return None;
    }
    let tau = |ns: i64| (tpl.t0_ns - ns) as f64 * 1e-9;
    let a: Vec<f64> = times_ns.iter().map(|&t| curve.rate(tau(t)) / b).collect();
    // The flat source runs up to the explosion: a precursor may still be on while the flash's best window
    // opens, and its photons there are as much its own as those before.
    let flat_to = tpl.t0_ns.clamp(pre_to, close);
    let c: Vec<f64> = times_ns
        .iter()
        .map(|&t| {
            if t > pre_from && t <= flat_to {
                1.0 / b
            } else {
                0.0
            }
        })
        .collect();
    let a_norm = curve.cumulative(tau(pre_from)) - curve.cumulative(tau(close));
    let c_norm = (flat_to - pre_from) as f64 * 1e-9;
    if !(a_norm > 0.0 && a_norm.is_finite()) {
        return None;
    }
    let s0 = best_strength(&a, a_norm).ok()?;
    let null = ln_likelihood(&a, a_norm, s0);
    // Coordinate ascent on (s, p): ln L = sum ln(k_i) + sum ln(1 + s a_i / k_i) - s A - p C with
    // k_i = 1 + p c_i, and symmetrically; each step is the one-dimensional solver of the fit.
    let (mut s, mut p) = (s0, 0.0_f64);
    let mut scaled = Vec::with_capacity(a.len());
    for _ in 0..PRECURSOR_ROUNDS {
        scaled.clear();
        scaled.extend(a.iter().zip(&c).map(|(&ai, &ci)| ci / (1.0 + s * ai)));
        let p_next = best_strength(&scaled, c_norm).ok()?;
        scaled.clear();
        scaled.extend(a.iter().zip(&c).map(|(&ai, &ci)| ai / (1.0 + p_next * ci)));
        let s_next = best_strength(&scaled, a_norm).ok()?;
        let done = (p_next - p).abs() <= 1e-9 * (1.0 + p) && (s_next - s).abs() <= 1e-9 * (1.0 + s);
        (s, p) = (s_next, p_next);
        if done {
            break;
        }
    }
    let alt: f64 = a
        .iter()
        .zip(&c)
        .map(|(&ai, &ci)| (s * ai + p * ci).ln_1p())
        .sum::<f64>()
        - s * a_norm
        - p * c_norm;
    let rise = s0 * (curve.cumulative(tau(pre_from)) - curve.cumulative(tau(pre_to)));
    let log_ratio = (2.0 * (alt - null)).max(0.0);
    log_ratio.is_finite().then_some(Precursor {
        log_ratio,
        rate_hz: p * b,
        rise: if rise.is_finite() { rise.max(0.0) } else { 0.0 },
    })
}
