//! Confidence limits on a Poisson mean and the burst-rate limit they imply: Gehrels' exact limits for the
//! counts of a candidate, Feldman & Cousins' unified intervals for counts on a known background, and the
//! upper limit on the local burst rate density that `glint reach` reports after a search finds nothing.

use crate::error::{ScienceError, arg};
use crate::poisson;

/// Bisects a monotone `f` on `ln x` between a point where `f < 0` and one where `f >= 0`, to 1e-15.
fn bisect_ln(mut lo: f64, mut hi: f64, f: impl Fn(f64) -> f64) -> f64 {
    for _ in 0..400 {
        let mid = 0.5 * (lo + hi);
        if f(mid.exp()) < 0.0 {
            lo = mid;
        } else {
            hi = mid;
        }
        if hi - lo < 1e-15 * hi.abs().max(1.0) {
            break;
        }
    }
    (0.5 * (lo + hi)).exp()
}

/// Starting bracket for a Poisson mean near `n`: a tiny mean below, then doubling until `f` turns.
fn bracket(n: u64, f: &impl Fn(f64) -> f64) -> Result<(f64, f64), ScienceError> {
    let lo = (1e-300_f64).ln();
    let mut hi = (n as f64 + 10.0).ln();
    for _ in 0..2000 {
        if f(hi.exp()) >= 0.0 {
            return Ok((lo, hi));
        }
        hi += std::f64::consts::LN_2;
    }
    Err(ScienceError::NoConvergence {
        what: "Poisson limit bracket",
    })
}

/// Gehrels 1986 (ApJ 303, 336) upper limit at confidence `cl` on the mean of a Poisson count `n`:
/// the mean with `P(N <= n | lambda) = 1 - cl`, i.e. `chi2_cl(2n + 2) / 2`.
pub fn gehrels_upper(n: u64, cl: f64) -> Result<f64, ScienceError> {
    let cl = arg::open_unit("cl", cl)?;
    let target = (1.0 - cl).ln();
    // ln P(N <= n | lambda) falls with lambda; f >= 0 once it is at or below the target.
    let f = move |lambda: f64| target - poisson::ln_cdf(n, lambda);
    let (lo, hi) = bracket(n, &f)?;
    Ok(bisect_ln(lo, hi, f))
}

/// Gehrels 1986 lower limit at confidence `cl`: the mean with `P(N >= n | lambda) = 1 - cl`, i.e.
/// `chi2_(1-cl)(2n) / 2`; 0 for `n = 0`.
pub fn gehrels_lower(n: u64, cl: f64) -> Result<f64, ScienceError> {
    let cl = arg::open_unit("cl", cl)?;
    if n == 0 {
        return Ok(0.0);
    }
    let target = (1.0 - cl).ln();
    let f = move |lambda: f64| poisson::ln_sf(n, lambda) - target;
    let (lo, hi) = bracket(n, &f)?;
    Ok(bisect_ln(lo, hi, f))
}

/// Grid step of the Feldman & Cousins scan in the signal mean, as in their paper.
const FC_STEP: f64 = 0.005;

/// The Feldman & Cousins acceptance region `[n1, n2]` for signal mean `mu` on background `b`: counts
/// added in decreasing order of `P(n | mu + b) / P(n | mu_best + b)` until their probability reaches `cl`.
fn fc_acceptance(mu: f64, b: f64, cl: f64) -> (u64, u64) {
    let m = mu + b;
    let n_max = (m + 10.0 * m.sqrt() + 20.0).ceil() as u64;
    let mut ranked: Vec<(f64, u64, f64)> = (0..=n_max)
        .map(|n| {
            let ln_p = poisson::ln_pmf(n, m);
            let best = (n as f64 - b).max(0.0) + b;
            (ln_p - poisson::ln_pmf(n, best), n, ln_p.exp())
        })
        .collect();
    ranked.sort_by(|x, y| y.0.total_cmp(&x.0).then(x.1.cmp(&y.1)));
    let (mut lo, mut hi, mut sum) = (u64::MAX, 0, 0.0);
    for (_, n, p) in ranked {
        lo = lo.min(n);
        hi = hi.max(n);
        sum += p;
        if sum >= cl {
            break;
        }
    }
    (lo, hi)
}

fn fc_accepts(n0: u64, mu: f64, b: f64, cl: f64) -> bool {
    let (lo, hi) = fc_acceptance(mu, b, cl);
    lo <= n0 && n0 <= hi
}

/// Feldman & Cousins 1998 (Phys. Rev. D 57, 3873) unified interval `(lower, upper)` for the signal mean,
/// given `n` observed counts on a known `background`, at confidence `cl`.
///
/// The belt is scanned in steps of 0.005 in the signal mean, as in the paper, and each edge then refined
/// by bisection between the last grid point inside and the first outside. The cost grows with n
/// (intended for the small counts of a candidate, n up to a few hundred).
pub fn feldman_cousins(n: u64, background: f64, cl: f64) -> Result<(f64, f64), ScienceError> {
    let b = arg::non_negative("background", background)?;
    let cl = arg::open_unit("cl", cl)?;
    let mu_cap = n as f64 + 20.0 * (n as f64 + 1.0).sqrt() + 50.0;
    let mut first: Option<f64> = None;
    let mut last = 0.0;
    let mut i = 0_u32;
    loop {
        let mu = f64::from(i) * FC_STEP;
        if mu > mu_cap {
            return Err(ScienceError::NoConvergence {
                what: "Feldman-Cousins belt scan",
            });
        }
        let (lo, hi) = fc_acceptance(mu, b, cl);
        if lo <= n && n <= hi {
            first.get_or_insert(mu);
            last = mu;
        } else if lo > n {
            break;
        }
        i += 1;
    }
    let Some(first) = first else {
        return Err(ScienceError::NoConvergence {
            what: "Feldman-Cousins belt scan (empty interval)",
        });
    };
    let refine = |mut inside: f64, mut outside: f64| {
        for _ in 0..40 {
            let mid = 0.5 * (inside + outside);
            if fc_accepts(n, mid, b, cl) {
                inside = mid;
            } else {
                outside = mid;
            }
        }
        inside
    };
    let lower = if first > 0.0 {
        refine(first, first - FC_STEP)
    } else {
        0.0
    };
    let upper = refine(last, last + FC_STEP);
    Ok((lower, upper))
}

/// Upper limit on the local burst rate density, per pc^3 per year, after no detection in
/// `live_time_yr` years over an effective volume of `effective_volume_pc3`: `mu_ul / (V_eff T)`.
pub fn rate_density_upper_limit(
    mu_ul: f64,
    effective_volume_pc3: f64,
    live_time_yr: f64,
) -> Result<f64, ScienceError> {
    let mu = arg::positive("mu_ul", mu_ul)?;
    let v = arg::positive("effective_volume_pc3", effective_volume_pc3)?;
    let t = arg::positive("live_time_yr", live_time_yr)?;
    Ok(mu / (v * t))
}

/// Effective volume of a uniform field of view of `solid_angle_sr` with a sharp reach `reach_pc`:
/// `Omega r^3 / 3`, pc^3.
pub fn sharp_reach_volume_pc3(solid_angle_sr: f64, reach_pc: f64) -> Result<f64, ScienceError> {
    let omega = arg::within(
        "solid_angle_sr",
        solid_angle_sr,
        0.0,
        4.0 * std::f64::consts::PI,
        "[0, 4 pi]",
    )?;
    let r = arg::non_negative("reach_pc", reach_pc)?;
    Ok(omega * r * r * r / 3.0)
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap
mod tests {
    use super::*;

    /// Gehrels 1986, Table 1 (upper) and Table 2 (lower), n = 0..5, CL 0.8413, 0.90, 0.95, 0.99
    /// (docs/science.md section 3; computed from the exact chi2 relation, matching the printed table from memory).
    const CLS: [f64; 4] = [0.841_344_746, 0.90, 0.95, 0.99];
    const UPPER: [[f64; 4]; 6] = [
        [1.841, 2.303, 2.996, 4.605],
        [3.300, 3.890, 4.744, 6.638],
        [4.638, 5.322, 6.296, 8.406],
        [5.918, 6.681, 7.754, 10.045],
        [7.163, 7.994, 9.154, 11.605],
        [8.382, 9.275, 10.513, 13.108],
    ];

    #[test]
    fn gehrels_tables_n0_to_5() {
        for (n, row) in UPPER.iter().enumerate() {
            for (cl, &want) in CLS.iter().zip(row) {
                let got = gehrels_upper(n as u64, *cl).unwrap();
                assert!(
                    (got - want).abs() < 1.5e-3,
                    "upper n={n} cl={cl}: {got} vs {want}"
                );
            }
        }
        // Gehrels 1986, Table 2, lower limits for n = 1 and 5.
        let lower = [
            (1, [0.173, 0.105, 0.051, 0.010]),
            (5, [2.840, 2.433, 1.970, 1.279]),
        ];
        for (n, row) in lower {
            for (cl, &want) in CLS.iter().zip(&row) {
                let got = gehrels_lower(n, *cl).unwrap();
                assert!(
                    (got - want).abs() < 1.5e-3,
                    "lower n={n} cl={cl}: {got} vs {want}"
                );
            }
        }
        assert_eq!(gehrels_lower(0, 0.9).unwrap(), 0.0);
        // [calc] from the formula: n = 0 gives -ln(1 - CL) exactly.
        assert!((gehrels_upper(0, 0.99).unwrap() - 100f64.ln()).abs() < 1e-12);
    }

    #[test]
    fn feldman_cousins_values() {
        // Feldman & Cousins 1998, zero background, 90% (docs/science.md section 3 [calc], tolerance 0.005).
        let zero_b = [(0, 0.00, 2.44), (1, 0.11, 4.36), (2, 0.53, 5.91), (3, 1.10, 7.42)];
        for (n, lo, hi) in zero_b {
            let (l, h) = feldman_cousins(n, 0.0, 0.9).unwrap();
            assert!(
                (l - lo).abs() <= 0.005 && (h - hi).abs() <= 0.005,
                "n={n}: [{l}, {h}]"
            );
        }
        // Feldman & Cousins 1998, Table IV [src]: b = 3, n = 6 and b = 0.5, n = 10.
        let (l, h) = feldman_cousins(6, 3.0, 0.9).unwrap();
        assert!(
            (l - 0.15).abs() <= 0.005 && (h - 8.47).abs() <= 0.005,
            "[{l}, {h}]"
        );
        let (l, h) = feldman_cousins(10, 0.5, 0.9).unwrap();
        assert!(
            (l - 5.00).abs() <= 0.005 && (h - 16.00).abs() <= 0.005,
            "[{l}, {h}]"
        );
    }

    #[test]
    fn rate_density_check_values() {
        // docs/science.md section 5 [calc]: r_max 0.1 pc, Omega 2 sr, 1 yr, 99% -> 6.9e3; 0.05 pc -> 5.5e4.
        let mu = gehrels_upper(0, 0.99).unwrap();
        let v = sharp_reach_volume_pc3(2.0, 0.1).unwrap();
        assert!((rate_density_upper_limit(mu, v, 1.0).unwrap() / 6.9e3 - 1.0).abs() < 0.01);
        let v = sharp_reach_volume_pc3(2.0, 0.05).unwrap();
        assert!((rate_density_upper_limit(mu, v, 1.0).unwrap() / 5.5e4 - 1.0).abs() < 0.01);
        // docs/science.md section 5: mu_UL = 2.303 (90%), 2.996 (95%), 4.605 (99%) for zero observed.
        for (cl, want) in [(0.9, 2.303), (0.95, 2.996), (0.99, 4.605)] {
            assert!((gehrels_upper(0, cl).unwrap() - want).abs() < 5e-4);
        }
    }

    #[test]
    fn limits_reject_bad_input() {
        for cl in [0.0, 1.0, -0.1, 1.5, f64::NAN] {
            assert!(matches!(
                gehrels_upper(3, cl),
                Err(ScienceError::InvalidArgument { name: "cl", .. })
            ));
            assert!(matches!(
                gehrels_lower(3, cl),
                Err(ScienceError::InvalidArgument { name: "cl", .. })
            ));
            assert!(matches!(
                feldman_cousins(3, 1.0, cl),
                Err(ScienceError::InvalidArgument { name: "cl", .. })
            ));
        }
        assert!(matches!(
            feldman_cousins(3, -1.0, 0.9),
            Err(ScienceError::InvalidArgument {
                name: "background",
                ..
            })
        ));
        assert!(matches!(
            feldman_cousins(3, f64::NAN, 0.9),
            Err(ScienceError::InvalidArgument { .. })
        ));
        assert!(rate_density_upper_limit(4.6, 0.0, 1.0).is_err());
        assert!(rate_density_upper_limit(4.6, 1e-3, f64::NAN).is_err());
        assert!(rate_density_upper_limit(-4.6, 1e-3, 1.0).is_err());
        assert!(sharp_reach_volume_pc3(20.0, 0.1).is_err());
        assert!(sharp_reach_volume_pc3(2.0, -0.1).is_err());
    }
}
