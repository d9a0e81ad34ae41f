//! From the passes' measurements to the tuning report's numbers: trigger rates against threshold with
//! their predictions (docs/science.md section 4), p-value uniformity, detection efficiency against
//! distance with r50 and r90, the effective volume, the distance fit's coverage, the verdicts, and the
//! upper limit on the local burst rate density (docs/science.md section 5). Pure functions, no I/O.

use std::collections::BTreeMap;

use glint_science::calibration::TrialsCalibration;
use glint_science::critical::{critical_count, false_crossing_probability};
use glint_science::limits::{gehrels_upper, rate_density_upper_limit};
use glint_science::poisson::ln_cdf;
use glint_science::reach::ReachReport;
use serde::{Deserialize, Serialize};

use super::inject::Injection;
use super::tap::{LNP_BIN, LNP_BINS, SeedRec, TapData};
use glint_engine::SECONDS_PER_YEAR;

/// What a pass recorded besides the tap: its findings, reduced, and its engine counters.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub(crate) struct PassFindings {
    pub(crate) flashes: Vec<FlashRec>,
    pub(crate) assessments: Vec<AssessRec>,
    pub(crate) live_ns: i64,
    pub(crate) dead_ns: i64,
    pub(crate) released: u64,
    pub(crate) refused_frames: u64,
}

/// A flash, reduced to what matching needs.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub(crate) struct FlashRec {
    pub(crate) candidate: u64,
    pub(crate) end_ns: i64,
    pub(crate) ra_deg: f64,
    pub(crate) dec_deg: f64,
    pub(crate) timescale_s: f64,
    pub(crate) far_per_year: f64,
}

/// An assessment, reduced.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub(crate) struct AssessRec {
    pub(crate) candidate: u64,
    pub(crate) verdict: String,
    pub(crate) ra_deg: f64,
    pub(crate) dec_deg: f64,
    pub(crate) fit_converged: bool,
    pub(crate) distance_pc: f64,
    pub(crate) distance_pc_lo: f64,
    pub(crate) distance_pc_hi: f64,
}

/// The search the numbers refer to.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub(crate) struct SearchInfo {
    pub(crate) instrument: String,
    pub(crate) ladder_s: Vec<f64>,
    pub(crate) search_radius_deg: f64,
    pub(crate) far_per_year: f64,
    /// Angle within which a flash or seed belongs to an injection (the engine's merge radius).
    pub(crate) match_deg: f64,
    /// Crossings of one fluctuation closer than this in time are one candidate, s.
    pub(crate) cluster_gap_s: f64,
    pub(crate) field_of_view_sr: f64,
}

/// One threshold of the all-timescale trigger: candidates (clustered crossings) measured and predicted.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub(crate) struct FarLevel {
    pub(crate) far_per_year: f64,
    /// F / (K R): the nominal per-seed bound.
    pub(crate) p_nominal: f64,
    pub(crate) candidates_nominal: u64,
    /// The calibrated bound the alerts use (equal to the nominal one without a calibration).
    pub(crate) p_calibrated: f64,
    pub(crate) candidates_calibrated: u64,
    /// F x live time: what the calibrated search promises.
    pub(crate) expected: f64,
    /// (measured - expected) / sqrt(expected), calibrated bound.
    pub(crate) z: f64,
}

/// One per-seed threshold on one timescale: tests crossing, measured and predicted.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub(crate) struct TestLevel {
    pub(crate) p: f64,
    pub(crate) measured: u64,
    /// Sum over tests of P(N >= n*(b) - 1 | b) at this bound.
    pub(crate) predicted: f64,
    /// sqrt of the sum of squared cluster sizes (crossings of one fluctuation come together).
    pub(crate) sigma: f64,
    pub(crate) z: f64,
}

/// One timescale on background.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub(crate) struct TimescaleBackground {
    pub(crate) timescale_s: f64,
    pub(crate) tests: u64,
    pub(crate) levels: Vec<TestLevel>,
    /// Randomised p-values by bin (uniform under background).
    pub(crate) randomised_hist: Vec<u64>,
    /// Chi-square of that histogram against flat, its degrees of freedom and p-value.
    pub(crate) randomised_chi2: f64,
    pub(crate) randomised_dof: u32,
    pub(crate) randomised_p: f64,
    /// Tests by ln p bin of width `ln_p_bin`, measured and predicted.
    pub(crate) ln_p_hist: Vec<u64>,
    pub(crate) ln_p_hist_predicted: Vec<f64>,
}

/// Background measured on one stream (as recorded, or time-scrambled).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub(crate) struct Background {
    pub(crate) name: String,
    pub(crate) live_seconds: f64,
    pub(crate) dead_seconds: f64,
    pub(crate) rate_hz: f64,
    pub(crate) flashes: u64,
    pub(crate) far_levels: Vec<FarLevel>,
    pub(crate) timescales: Vec<TimescaleBackground>,
    pub(crate) ln_p_bin: f64,
}

/// Efficiency at one distance.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub(crate) struct DistanceRow {
    pub(crate) distance_pc: f64,
    pub(crate) injected: u64,
    pub(crate) detected: u64,
    pub(crate) efficiency: f64,
    pub(crate) sigma: f64,
    /// Per timescale: fraction whose seeds crossed the configured bound on that timescale.
    pub(crate) per_timescale: Vec<f64>,
    /// `glint reach` detection probability per timescale at this distance (its representative zenith).
    pub(crate) reach_per_timescale: Vec<f64>,
    pub(crate) fits: u64,
    pub(crate) fits_covering: u64,
    pub(crate) median_fitted_pc: Option<f64>,
}

/// Upper limit at one confidence level.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub(crate) struct Limit {
    pub(crate) cl: f64,
    pub(crate) mu: f64,
    pub(crate) per_pc3_per_yr: f64,
}

/// One injection's outcome.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub(crate) struct Outcome {
    pub(crate) injection: Injection,
    pub(crate) detected: bool,
    pub(crate) recovered_ra_deg: Option<f64>,
    pub(crate) recovered_dec_deg: Option<f64>,
    pub(crate) verdict: Option<String>,
    /// The distance fit (value, 90% interval) when it converged.
    pub(crate) fit_pc: Option<(f64, f64, f64)>,
    pub(crate) timescales: Vec<bool>,
}

/// Injection results.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub(crate) struct Injections {
    pub(crate) count: usize,
    pub(crate) passes: usize,
    pub(crate) zenith_deg: Option<f64>,
    pub(crate) distances: Vec<DistanceRow>,
    pub(crate) r50_pc: Option<f64>,
    pub(crate) r90_pc: Option<f64>,
    pub(crate) r50_per_timescale_pc: Vec<Option<f64>>,
    pub(crate) effective_volume_pc3: f64,
    pub(crate) fit_coverage: Option<f64>,
    pub(crate) fits: u64,
    pub(crate) verdicts: BTreeMap<String, u64>,
    pub(crate) outcomes: Vec<Outcome>,
}

/// The whole report.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub(crate) struct Report {
    pub(crate) search: SearchInfo,
    pub(crate) calibration: Option<String>,
    pub(crate) background: Vec<Background>,
    pub(crate) injections: Option<Injections>,
    pub(crate) live_seconds: f64,
    pub(crate) limits: Vec<Limit>,
    /// Published 99% limits, for context only (docs/science.md section 5).
    pub(crate) published_99_range_per_pc3_yr: (f64, f64),
}

fn dot(a: [f64; 3], b: [f64; 3]) -> f64 {
    a[0] * b[0] + a[1] * b[1] + a[2] * b[2]
}

pub(crate) fn unit_vector(ra_deg: f64, dec_deg: f64) -> [f64; 3] {
    let (sr, cr) = ra_deg.to_radians().sin_cos();
    let (sd, cd) = dec_deg.to_radians().sin_cos();
    [cd * cr, cd * sr, sd]
}

/// Groups `(t, v)` points in time order: a point joins an open cluster within `cos_merge` whose last point
/// is at most `gap_ns` older. Returns the cluster sizes.
pub(crate) fn cluster_sizes<'a>(
    points: impl Iterator<Item = (i64, [f64; 3])> + 'a,
    cos_merge: f64,
    gap_ns: i64,
) -> Vec<u64> {
    let mut open: Vec<(usize, i64, [f64; 3])> = Vec::new();
    let mut sizes: Vec<u64> = Vec::new();
    for (t, v) in points {
        open.retain(|c| t - c.1 <= gap_ns);
        if let Some(c) = open.iter_mut().find(|c| dot(c.2, v) >= cos_merge) {
            c.1 = t;
            sizes[c.0] += 1;
        } else {
            open.push((sizes.len(), t, v));
            sizes.push(1);
        }
    }
    sizes
}

/// P(chi-square with 2a degrees of freedom > x) = P(Poisson(x / 2) <= a - 1) (common practice, no source).
fn chi2_sf_even(x: f64, dof: u32) -> f64 {
    ln_cdf(u64::from(dof / 2).saturating_sub(1), x / 2.0).exp()
}

/// Background numbers of one stream from its tap data.
#[allow(clippy::too_many_arguments)]
pub(crate) fn background(
    name: &str,
    tap: &TapData,
    f: &PassFindings,
    s: &SearchInfo,
    cal: Option<&TrialsCalibration>,
    far_levels: &[f64],
    test_levels: &[f64],
) -> Background {
    let live = f.live_ns as f64 * 1e-9;
    let rate = if live > 0.0 { f.released as f64 / live } else { 0.0 };
    let k_all = s.ladder_s.len();
    let cos_merge = s.match_deg.to_radians().cos();
    let gap = (s.cluster_gap_s * 1e9) as i64;
    let keep = tap.keep_ln_p;
    let count_at = |ln_level: f64| -> u64 {
        cluster_sizes(
            tap.seeds
                .iter()
                .filter(|x| x.min_ln_p() <= ln_level)
                .map(|x| (x.t, x.v)),
            cos_merge,
            gap,
        )
        .len() as u64
    };
    let mut levels = Vec::new();
    for &far in far_levels {
        let far_s = far / SECONDS_PER_YEAR;
        let p_nom = far_s / (k_all as f64 * rate.max(1e-300));
        let p_cal = cal.map_or(p_nom, |c| c.bound(far_s, k_all, rate));
        if p_nom.ln() > keep + 1e-9 || p_cal.ln() > keep + 1e-9 {
            continue;
        }
        let expected = far * live / SECONDS_PER_YEAR;
        let nc = count_at(p_cal.ln());
        levels.push(FarLevel {
            far_per_year: far,
            p_nominal: p_nom,
            candidates_nominal: count_at(p_nom.ln()),
            p_calibrated: p_cal,
            candidates_calibrated: nc,
            expected,
            z: (nc as f64 - expected) / expected.sqrt().max(1e-12),
        });
    }
    let mut timescales = Vec::new();
    for k in 0..k_all {
        let bins = tap.b_bins.get(k).cloned().unwrap_or_default();
        let mut rows = Vec::new();
        for &p in test_levels {
            if p.ln() > keep + 1e-9 {
                continue;
            }
            let predicted: f64 = bins
                .values()
                .filter(|b| b.tests > 0)
                .map(|b| {
                    let mean = b.sum_b / b.tests as f64;
                    let c = critical_count(mean, p).unwrap_or(u32::MAX);
                    b.tests as f64 * false_crossing_probability(mean, c)
                })
                .sum();
            let crossing = |x: &&SeedRec| x.ln_p.get(k).is_some_and(|l| *l <= p.ln());
            let measured = tap.seeds.iter().filter(crossing).count() as u64;
            let dt_ns = (s.ladder_s[k] * 1e9) as i64;
            let sizes = cluster_sizes(
                tap.seeds.iter().filter(crossing).map(|x| (x.t, x.v)),
                (2.0 * s.search_radius_deg).to_radians().cos(),
                dt_ns,
            );
            let var: f64 = sizes.iter().map(|&n| (n * n) as f64).sum::<f64>().max(predicted);
            let sigma = var.sqrt();
            rows.push(TestLevel {
                p,
                measured,
                predicted,
                sigma,
                z: if sigma > 0.0 {
                    (measured as f64 - predicted) / sigma
                } else {
                    0.0
                },
            });
        }
        // Predicted ln p histogram: p takes the values P(N >= m | b) with probability P(N = m | b).
        let mut pred = vec![0.0; LNP_BINS];
        for b in bins.values().filter(|b| b.tests > 0) {
            let mean = b.sum_b / b.tests as f64;
            let mut m = 0u64;
            loop {
                let lp = glint_science::poisson::ln_sf(m, mean);
                let pm = glint_science::poisson::ln_pmf(m, mean).exp();
                let bin = ((-lp / LNP_BIN) as usize).min(LNP_BINS - 1);
                pred[bin] += b.tests as f64 * pm;
                if bin == LNP_BINS - 1 || m > 10_000 || (m as f64 > mean && pm < 1e-18) {
                    break;
                }
                m += 1;
            }
        }
        let rh = tap.rand_hist.get(k).cloned().unwrap_or_default();
        let total: u64 = rh.iter().sum();
        let e = total as f64 / rh.len().max(1) as f64;
        let chi2: f64 = if e > 0.0 {
            rh.iter().map(|&o| (o as f64 - e).powi(2) / e).sum()
        } else {
            0.0
        };
        let dof = rh.len().saturating_sub(1) as u32;
        timescales.push(TimescaleBackground {
            timescale_s: s.ladder_s[k],
            tests: tap.tests(k),
            levels: rows,
            randomised_chi2: chi2,
            randomised_dof: dof,
            randomised_p: if dof % 2 == 0 {
                chi2_sf_even(chi2, dof)
            } else {
                f64::NAN
            },
            randomised_hist: rh,
            ln_p_hist: tap.ln_p_hist.get(k).cloned().unwrap_or_default(),
            ln_p_hist_predicted: pred,
        });
    }
    Background {
        name: name.to_owned(),
        live_seconds: live,
        dead_seconds: f.dead_ns as f64 * 1e-9,
        rate_hz: rate,
        flashes: f.flashes.len() as u64,
        far_levels: levels,
        timescales,
        ln_p_bin: LNP_BIN,
    }
}

/// The angular separation of two unit vectors, degrees.
fn sep_deg(a: [f64; 3], b: [f64; 3]) -> f64 {
    dot(a, b).clamp(-1.0, 1.0).acos().to_degrees()
}

/// The distance where `eff` (in increasing distance) first falls below `level`, interpolated in log d.
pub(crate) fn crossing_distance(d: &[f64], eff: &[f64], level: f64) -> Option<f64> {
    if eff.first().is_none_or(|&e| e < level) {
        return None;
    }
    for i in 1..d.len() {
        if eff[i] < level {
            let (x0, x1) = (d[i - 1].ln(), d[i].ln());
            let f = (eff[i - 1] - level) / (eff[i - 1] - eff[i]);
            return Some((x0 + f * (x1 - x0)).exp());
        }
    }
    None
}

/// Injection results from each pass's injections, findings and tap data.
#[allow(clippy::too_many_arguments)]
pub(crate) fn injections(
    passes: &[(Vec<Injection>, PassFindings, TapData)],
    s: &SearchInfo,
    ln_bound: f64,
    max_time_to_go_s: f64,
    zenith_deg: Option<f64>,
    distances_pc: &[f64],
    reach: Option<&ReachReport>,
) -> Injections {
    let k_all = s.ladder_s.len();
    let mut outcomes = Vec::new();
    let ns = |x: f64| (x * 1e9) as i64;
    for (injs, f, tap) in passes {
        let assessed: BTreeMap<u64, &AssessRec> = f.assessments.iter().map(|a| (a.candidate, a)).collect();
        for inj in injs {
            let v = unit_vector(inj.ra_deg, inj.dec_deg);
            let from = inj.t_ns - ns(max_time_to_go_s) - 1_000_000_000;
            let to = inj.t_ns + ns(s.ladder_s.last().copied().unwrap_or(0.0)) + 1_000_000_000;
            let best = f
                .flashes
                .iter()
                .filter(|x| x.end_ns >= from && x.end_ns <= to)
                .map(|x| (sep_deg(v, unit_vector(x.ra_deg, x.dec_deg)), x))
                .filter(|(d, _)| *d <= s.match_deg)
                .min_by(|a, b| a.0.total_cmp(&b.0));
            let a = best.and_then(|(_, x)| assessed.get(&x.candidate).copied());
            let timescales = (0..k_all)
                .map(|k| {
                    let hi = inj.t_ns + ns(s.ladder_s[k]);
                    tap.seeds.iter().any(|x| {
                        x.t >= inj.t_ns - ns(max_time_to_go_s)
                            && x.t <= hi
                            && x.ln_p.get(k).is_some_and(|l| *l <= ln_bound)
                            && sep_deg(v, x.v) <= s.match_deg
                    })
                })
                .collect();
            let (ra, dec) = match (a, best) {
                (Some(a), _) => (Some(a.ra_deg), Some(a.dec_deg)),
                (None, Some((_, x))) => (Some(x.ra_deg), Some(x.dec_deg)),
                _ => (None, None),
            };
            outcomes.push(Outcome {
                injection: inj.clone(),
                detected: best.is_some(),
                recovered_ra_deg: ra,
                recovered_dec_deg: dec,
                verdict: a.map(|a| a.verdict.clone()),
                fit_pc: a
                    .filter(|a| a.fit_converged)
                    .map(|a| (a.distance_pc, a.distance_pc_lo, a.distance_pc_hi)),
                timescales,
            });
        }
    }
    let mut rows = Vec::new();
    let mut verdicts: BTreeMap<String, u64> = BTreeMap::new();
    let (mut fits, mut covering) = (0u64, 0u64);
    for (di, &d) in distances_pc.iter().enumerate() {
        let here: Vec<&Outcome> = outcomes
            .iter()
            .filter(|o| (o.injection.distance_pc - d).abs() < 1e-12)
            .collect();
        let n = here.len() as u64;
        let det = here.iter().filter(|o| o.detected).count() as u64;
        let e = if n > 0 { det as f64 / n as f64 } else { 0.0 };
        let per_timescale = (0..k_all)
            .map(|k| {
                if n == 0 {
                    0.0
                } else {
                    here.iter().filter(|o| o.timescales[k]).count() as f64 / n as f64
                }
            })
            .collect();
        let reach_per_timescale = reach.map_or_else(Vec::new, |r| {
            r.timescales
                .iter()
                .map(|t| t.signal.get(di).map_or(f64::NAN, |x| x.detection_probability))
                .collect()
        });
        // Distance fits of the detected ones: find each outcome's assessment again.
        let mut fitted = Vec::new();
        let (mut nf, mut nc) = (0u64, 0u64);
        for (fd, lo, hi) in here.iter().filter_map(|o| o.fit_pc) {
            nf += 1;
            fitted.push(fd);
            if lo <= d && d <= hi {
                nc += 1;
            }
        }
        fitted.sort_by(f64::total_cmp);
        fits += nf;
        covering += nc;
        rows.push(DistanceRow {
            distance_pc: d,
            injected: n,
            detected: det,
            efficiency: e,
            sigma: if n > 0 {
                (e * (1.0 - e) / n as f64).sqrt()
            } else {
                0.0
            },
            per_timescale,
            reach_per_timescale,
            fits: nf,
            fits_covering: nc,
            median_fitted_pc: fitted.get(fitted.len() / 2).copied(),
        });
    }
    for o in &outcomes {
        if o.detected {
            *verdicts
                .entry(o.verdict.clone().unwrap_or_else(|| "not assessed".into()))
                .or_default() += 1;
        }
    }
    let ds: Vec<f64> = rows.iter().map(|r| r.distance_pc).collect();
    let eff: Vec<f64> = rows.iter().map(|r| r.efficiency).collect();
    let r50_per_timescale_pc = (0..k_all)
        .map(|k| {
            let e: Vec<f64> = rows.iter().map(|r| r.per_timescale[k]).collect();
            crossing_distance(&ds, &e, 0.5)
        })
        .collect();
    // V_eff = Omega x integral eff(d) d^2 dd, eff held at its first value inside the nearest distance.
    let mut v = 0.0;
    if let (Some(&d0), Some(&e0)) = (ds.first(), eff.first()) {
        v += e0 * d0.powi(3) / 3.0;
        for i in 1..ds.len() {
            let (a, b) = (ds[i - 1], ds[i]);
            v += 0.5 * (eff[i - 1] * a * a + eff[i] * b * b) * (b - a);
        }
    }
    Injections {
        count: outcomes.len(),
        passes: passes.len(),
        zenith_deg,
        r50_pc: crossing_distance(&ds, &eff, 0.5),
        r90_pc: crossing_distance(&ds, &eff, 0.9),
        r50_per_timescale_pc,
        effective_volume_pc3: v * s.field_of_view_sr,
        fit_coverage: (fits > 0).then(|| covering as f64 / fits as f64),
        fits,
        distances: rows,
        verdicts,
        outcomes,
    }
}

/// Upper limits on the local burst rate density at 90, 95 and 99% CL after no detection (docs/science.md
/// section 5): mu_UL(n = 0) / (V_eff T_live).
pub(crate) fn limits(effective_volume_pc3: f64, live_seconds: f64) -> Vec<Limit> {
    let t_yr = live_seconds / SECONDS_PER_YEAR;
    [0.90, 0.95, 0.99]
        .iter()
        .filter_map(|&cl| {
            let mu = gehrels_upper(0, cl).ok()?;
            let rho = rate_density_upper_limit(mu, effective_volume_pc3, t_yr).ok()?;
            Some(Limit {
                cl,
                mu,
                per_pc3_per_yr: rho,
            })
        })
        .collect()
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap
mod tests {
    use super::*;

    #[test]
    fn upper_limits_match_the_check_values() {
        // docs/science.md section 5 [calc]: r_max 0.1 pc, Omega 2 sr, 1 yr, 99% -> 6.9e3 per pc^3 per yr;
        // mu_UL = 2.303, 2.996, 4.605 (Gehrels 1986) for none seen.
        let v = 2.0 * 0.1f64.powi(3) / 3.0;
        let l = limits(v, SECONDS_PER_YEAR);
        assert_eq!(l.len(), 3);
        for (got, want) in l.iter().zip([2.303, 2.996, 4.605]) {
            assert!((got.mu - want).abs() < 5e-4, "{got:?}");
        }
        assert!((l[2].per_pc3_per_yr / 6.9e3 - 1.0).abs() < 0.01, "{:?}", l[2]);
        let l = limits(2.0 * 0.05f64.powi(3) / 3.0, SECONDS_PER_YEAR);
        assert!((l[2].per_pc3_per_yr / 5.5e4 - 1.0).abs() < 0.01, "{:?}", l[2]);
    }

    #[test]
    fn crossing_distances_interpolate_in_log_distance() {
        let d = [0.01, 0.1, 1.0];
        assert!((crossing_distance(&d, &[1.0, 0.6, 0.4], 0.5).unwrap() - 0.1 * 10f64.powf(0.5)).abs() < 1e-9);
        assert_eq!(crossing_distance(&d, &[0.4, 0.3, 0.1], 0.5), None);
        assert_eq!(crossing_distance(&d, &[1.0, 0.9, 0.8], 0.5), None);
    }

    #[test]
    fn clusters_join_near_points_and_split_far_ones() {
        let v = unit_vector(10.0, 20.0);
        let w = unit_vector(40.0, 20.0);
        let pts = vec![(0, v), (5, v), (6, w), (100, v)];
        let sizes = cluster_sizes(pts.into_iter(), 1f64.to_radians().cos(), 10);
        assert_eq!(sizes, vec![2, 1, 1]);
        // chi-square with 2 dof: P(> x) = exp(-x / 2).
        assert!((chi2_sf_even(3.0, 2) - (-1.5f64).exp()).abs() < 1e-12);
    }
}
