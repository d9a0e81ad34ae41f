//! Poisson tails and Gaussian significances, computed in logs so that the trigger's p-values stay exact far
//! beyond `f64`'s smallest number. The engine turns every crossing's count and background into a p-value
//! and a one-sided Z with these functions; Li & Ma's formulas serve the on/off tests of the assessment.
//!
//! Method: the Poisson probability uses Loader's saddle-point form (Stirling error plus a stable
//! `n ln(n/b) - n + b`), the tails the series or Lentz continued fraction of the regularised incomplete
//! gamma function scaled by that probability, and the inverse normal an Acklam start (or the asymptotic
//! expansion in `ln p` below `ln p = -680`) polished by Newton steps on `ln Q(z)`.

use crate::error::{ScienceError, arg};

/// `ln(2 pi)`.
const LN_2PI: f64 = 1.837_877_066_409_345_5;
/// `ln(sqrt(2 pi))`.
const LN_SQRT_2PI: f64 = 0.918_938_533_204_672_7;
/// `ln(Gamma(1/2)) = ln(sqrt(pi))`.
const LN_GAMMA_HALF: f64 = 0.572_364_942_924_700_1;
/// Below this `ln p` the inverse normal starts from the asymptotic expansion instead of Acklam's fit.
const ASYMPTOTIC_LN_P: f64 = -680.0;
/// Lentz's guard against a zero denominator.
const FPMIN: f64 = 1e-300;
/// Cap on series and continued-fraction terms; the count grows as `sqrt(n)` near `b = n`, so this covers
/// counts up to about 1e12, far beyond any window glint tests.
const MAX_TERMS: u64 = 50_000_000;

/// Stirling's error `ln(n!) - ln(sqrt(2 pi n) (n/e)^n)` at n = 0..=15 (Loader 2000's table).
const STIRLERR_SMALL: [f64; 16] = [
    0.0,
    0.081_061_466_795_327_26,
    0.041_340_695_955_409_3,
    0.027_677_925_684_998_34,
    0.020_790_672_103_765_093,
    0.016_644_691_189_821_193,
    0.013_876_128_823_070_748,
    0.011_896_709_945_891_77,
    0.010_411_265_261_972_096,
    0.009_255_462_182_712_733,
    0.008_330_563_433_362_87,
    0.007_573_675_487_951_841,
    0.006_942_840_107_209_53,
    0.006_408_994_188_004_207,
    0.005_951_370_112_758_847_5,
    0.005_554_733_551_962_801,
];

/// Stirling's error for an integer `n >= 0` held in an `f64`.
fn stirlerr(n: f64) -> f64 {
    const S0: f64 = 1.0 / 12.0;
    const S1: f64 = 1.0 / 360.0;
    const S2: f64 = 1.0 / 1260.0;
    const S3: f64 = 1.0 / 1680.0;
    const S4: f64 = 1.0 / 1188.0;
    if n <= 15.0 {
        // n is a small non-negative integer here, so the cast is exact.
        return STIRLERR_SMALL[n as usize];
    }
    let nn = n * n;
    if n > 500.0 {
        (S0 - S1 / nn) / n
    } else if n > 80.0 {
        (S0 - (S1 - S2 / nn) / nn) / n
    } else if n > 35.0 {
        (S0 - (S1 - (S2 - S3 / nn) / nn) / nn) / n
    } else {
        (S0 - (S1 - (S2 - (S3 - S4 / nn) / nn) / nn) / nn) / n
    }
}

/// `x ln(x / m) + m - x`, without the cancellation of the naive form when x is close to m (Loader 2000).
/// Both arguments finite and > 0.
pub(crate) fn bd0(x: f64, m: f64) -> f64 {
    let d = x - m;
    if d.abs() < 0.1 * (x + m) {
        let v = d / (x + m);
        let v2 = v * v;
        let mut s = d * v;
        let mut ej = 2.0 * x * v;
        for j in 1..1000_u32 {
            ej *= v2;
            let s1 = s + ej / f64::from(2 * j + 1);
            if s1 == s {
                return s1;
            }
            s = s1;
        }
        s
    } else {
        x * (x / m).ln() + m - x
    }
}

/// `ln(1 - exp(a))` for `a <= 0`, accurate at both ends (Maechler 2012).
pub(crate) fn ln1mexp(a: f64) -> f64 {
    if a > -std::f64::consts::LN_2 {
        (-a.exp_m1()).ln()
    } else {
        (-a.exp()).ln_1p()
    }
}

/// `ln P(N = n | b)`. `b = 0` gives 0 for `n = 0` and `-inf` otherwise; `b = +inf` gives `-inf`.
/// A negative or NaN `b` gives NaN (use [`ln_sf_checked`] where `b` comes from outside).
pub fn ln_pmf(n: u64, b: f64) -> f64 {
    if b.is_nan() || b < 0.0 {
        return f64::NAN;
    }
    if b == 0.0 {
        return if n == 0 { 0.0 } else { f64::NEG_INFINITY };
    }
    if b.is_infinite() {
        return f64::NEG_INFINITY;
    }
    if n == 0 {
        return -b;
    }
    // u64 -> f64 rounds above 2^53, where a Poisson count has no meaning anyway.
    let x = n as f64;
    -stirlerr(x) - bd0(x, b) - 0.5 * (LN_2PI + x.ln())
}

/// The continued fraction of the regularised upper incomplete gamma, Q(a, z) = e^-z z^a / Gamma(a) * h, by
/// the modified Lentz method; converges fast for z >= a + 1. Returns h.
fn upper_gamma_cf(a: f64, z: f64, max_terms: u64) -> f64 {
    let mut bb = z + 1.0 - a;
    let mut c = 1.0 / FPMIN;
    let mut d = 1.0 / bb;
    let mut h = d;
    let mut i = 0.0_f64;
    for _ in 0..max_terms {
        i += 1.0;
        let an = -i * (i - a);
        bb += 2.0;
        d = an * d + bb;
        if d.abs() < FPMIN {
            d = FPMIN;
        }
        c = bb + an / c;
        if c.abs() < FPMIN {
            c = FPMIN;
        }
        d = 1.0 / d;
        let del = d * c;
        h *= del;
        if (del - 1.0).abs() < 1e-16 {
            break;
        }
    }
    h
}

/// Both tails at once: `(ln P(N >= n | b), ln P(N <= n - 1 | b))`, each accurate in its own right.
fn ln_tails(n: u64, b: f64) -> (f64, f64) {
    if b.is_nan() || b < 0.0 {
        return (f64::NAN, f64::NAN);
    }
    if n == 0 {
        return (0.0, f64::NEG_INFINITY);
    }
    if b == 0.0 {
        return (f64::NEG_INFINITY, 0.0);
    }
    if b.is_infinite() {
        return (0.0, f64::NEG_INFINITY);
    }
    let x = n as f64;
    if b < x + 1.0 {
        // Upper Poisson tail = regularised lower gamma P(n, b) = pmf(n) * sum_j b^j / ((n+1)...(n+j)).
        let mut term = 1.0_f64;
        let mut sum = 1.0_f64;
        let mut k = x;
        for _ in 0..MAX_TERMS {
            k += 1.0;
            term *= b / k;
            sum += term;
            if term < sum * 1e-17 {
                break;
            }
        }
        let ln_sf = ln_pmf(n, b) + sum.ln();
        (ln_sf, ln1mexp(ln_sf))
    } else {
        // Lower Poisson tail = regularised upper gamma Q(n, b), by the continued fraction (modified Lentz),
        // with prefactor e^-b b^n / Gamma(n) = n pmf(n, b).
        let h = upper_gamma_cf(x, b, MAX_TERMS);
        let ln_below = x.ln() + ln_pmf(n, b) + h.ln();
        (ln1mexp(ln_below), ln_below)
    }
}

/// `ln P(N >= n | b)`, the log p-value of `n` or more counts on a known background `b`.
///
/// `n == 0` gives 0; `b == 0` with `n > 0` gives `-inf`; `b = +inf` gives 0. Relative error of p below
/// 1e-12 wherever p is representable, and the same absolute precision in `ln p` far below that. A negative
/// or NaN `b` gives NaN; use [`ln_sf_checked`] for a typed error.
pub fn ln_sf(n: u64, b: f64) -> f64 {
    ln_tails(n, b).0
}

/// [`ln_sf`] with the background checked: a NaN or negative `b` is an error.
pub fn ln_sf_checked(n: u64, b: f64) -> Result<f64, ScienceError> {
    if b.is_nan() || b < 0.0 {
        return Err(ScienceError::InvalidArgument {
            name: "b",
            value: b,
            expected: "a number >= 0",
        });
    }
    Ok(ln_sf(n, b))
}

/// `P(N >= n | b)` (see [`ln_sf`]); underflows to 0 below about 1e-308, where only the log is meaningful.
pub fn sf(n: u64, b: f64) -> f64 {
    ln_sf(n, b).exp()
}

/// `ln P(N <= n | b)`, the lower tail, accurate when it is tiny (used for upper confidence limits).
pub fn ln_cdf(n: u64, b: f64) -> f64 {
    match n.checked_add(1) {
        Some(m) => ln_tails(m, b).1,
        None => 0.0,
    }
}

/// `ln Q(z)`, the log of the standard normal upper tail `1 - Phi(z)`, for any real z.
pub fn ln_p_from_sigma(z: f64) -> f64 {
    if z.is_nan() {
        return f64::NAN;
    }
    if z < 0.0 {
        return ln1mexp(ln_p_from_sigma(-z));
    }
    if z.is_infinite() {
        return f64::NEG_INFINITY;
    }
    // Q(z) = Q_gamma(1/2, z^2/2) / 2.
    let x = 0.5 * z * z;
    let a = 0.5;
    let ln_pref = -x + a * x.ln() - LN_GAMMA_HALF;
    if x < 1.5 {
        // Series for the lower gamma P(1/2, x): e^-x x^a / Gamma(a + 1) * sum x^j / ((a+1)...(a+j)).
        if x == 0.0 {
            return -std::f64::consts::LN_2;
        }
        let mut term = 1.0 / a;
        let mut sum = term;
        let mut ap = a;
        for _ in 0..1000 {
            ap += 1.0;
            term *= x / ap;
            sum += term;
            if term < sum * 1e-17 {
                break;
            }
        }
        let p = (ln_pref + sum.ln()).exp();
        -std::f64::consts::LN_2 + (-p).ln_1p()
    } else {
        let h = upper_gamma_cf(a, x, 10_000);
        -std::f64::consts::LN_2 + ln_pref + h.ln()
    }
}

/// `Q(z) = 1 - Phi(z)`, the one-sided p-value of a Z-score.
pub fn p_from_sigma(z: f64) -> f64 {
    ln_p_from_sigma(z).exp()
}

/// `ln phi(z)`, the log standard normal density.
fn ln_phi(z: f64) -> f64 {
    -0.5 * z * z - LN_SQRT_2PI
}

/// Acklam's rational approximation to `Phi^-1(p)` (relative error 1.15e-9), for `p` in (0, 0.5].
fn acklam_lower(p: f64, ln_p: f64) -> f64 {
    const A: [f64; 6] = [
        -3.969_683_028_665_376e1,
        2.209_460_984_245_205e2,
        -2.759_285_104_469_687e2,
        1.383_577_518_672_69e2,
        -3.066_479_806_614_716e1,
        2.506_628_277_459_239,
    ];
    const B: [f64; 5] = [
        -5.447_609_879_822_406e1,
        1.615_858_368_580_409e2,
        -1.556_989_798_598_866e2,
        6.680_131_188_771_972e1,
        -1.328_068_155_288_572e1,
    ];
    const C: [f64; 6] = [
        -7.784_894_002_430_293e-3,
        -3.223_964_580_411_365e-1,
        -2.400_758_277_161_838,
        -2.549_732_539_343_734,
        4.374_664_141_464_968,
        2.938_163_982_698_783,
    ];
    const D: [f64; 4] = [
        7.784_695_709_041_462e-3,
        3.224_671_290_700_398e-1,
        2.445_134_137_142_996,
        3.754_408_661_907_416,
    ];
    const P_LOW: f64 = 0.02425;
    if p < P_LOW {
        let q = (-2.0 * ln_p).sqrt();
        (((((C[0] * q + C[1]) * q + C[2]) * q + C[3]) * q + C[4]) * q + C[5])
            / ((((D[0] * q + D[1]) * q + D[2]) * q + D[3]) * q + 1.0)
    } else {
        let q = p - 0.5;
        let r = q * q;
        (((((A[0] * r + A[1]) * r + A[2]) * r + A[3]) * r + A[4]) * r + A[5]) * q
            / (((((B[0] * r + B[1]) * r + B[2]) * r + B[3]) * r + B[4]) * r + 1.0)
    }
}

/// One-sided significance `Z = Phi^-1(1 - p)` from `ln p`, precise for p far below 1e-300.
///
/// `ln_p = 0` gives `-inf`, `ln_p = -inf` gives `+inf`; `ln_p > 0` or NaN is not a probability and gives NaN.
/// p above 1/2 gives a negative Z.
pub fn sigma_from_ln_p(ln_p: f64) -> f64 {
    if ln_p.is_nan() || ln_p > 0.0 {
        return f64::NAN;
    }
    if ln_p == 0.0 {
        return f64::NEG_INFINITY;
    }
    if ln_p == f64::NEG_INFINITY {
        return f64::INFINITY;
    }
    if ln_p > -std::f64::consts::LN_2 {
        return -sigma_from_ln_p(ln1mexp(ln_p));
    }
    let mut z = if ln_p < ASYMPTOTIC_LN_P {
        // ln p = -z^2/2 - ln(2 pi)/2 - ln z + ln(1 - 1/z^2 + 3/z^4) + ..., solved by fixed-point steps.
        let l = -ln_p;
        let mut z = (2.0 * l).sqrt();
        for _ in 0..4 {
            let z2 = z * z;
            let corr = (1.0 - 1.0 / z2 + 3.0 / (z2 * z2)).ln();
            z = (2.0 * l - LN_2PI - 2.0 * z.ln() + 2.0 * corr).sqrt();
        }
        z
    } else {
        -acklam_lower(ln_p.exp(), ln_p)
    };
    // Newton on ln Q(z) - ln p; d ln Q / dz = -phi(z) / Q(z).
    for _ in 0..50 {
        let lq = ln_p_from_sigma(z);
        let dz = (lq - ln_p) * (lq - ln_phi(z)).exp();
        z += dz;
        if dz.abs() <= 1e-15 * z.abs().max(1.0) {
            break;
        }
    }
    z
}

/// One-sided significance `Z = Phi^-1(1 - p)`; `p = 0` gives `+inf`, p outside [0, 1] or NaN gives NaN.
pub fn sigma_from_p(p: f64) -> f64 {
    if p.is_nan() || !(0.0..=1.0).contains(&p) {
        return f64::NAN;
    }
    sigma_from_ln_p(p.ln())
}

fn check_counts(name: &'static str, v: f64) -> Result<f64, ScienceError> {
    arg::non_negative(name, v)
}

/// Li & Ma 1983 (ApJ 272, 317) eq. 17: the likelihood-ratio significance of `n_on` counts against `n_off`
/// counts scaled by the exposure ratio `alpha`, signed by the sign of `n_on - alpha n_off`.
pub fn li_ma_17(n_on: f64, n_off: f64, alpha: f64) -> Result<f64, ScienceError> {
    let n_on = check_counts("n_on", n_on)?;
    let n_off = check_counts("n_off", n_off)?;
    let alpha = arg::positive("alpha", alpha)?;
    let total = n_on + n_off;
    if total == 0.0 {
        return Ok(0.0);
    }
    let on_term = if n_on > 0.0 {
        n_on * ((1.0 + alpha) / alpha * (n_on / total)).ln()
    } else {
        0.0
    };
    let off_term = if n_off > 0.0 {
        n_off * ((1.0 + alpha) * (n_off / total)).ln()
    } else {
        0.0
    };
    let s = (2.0 * (on_term + off_term).max(0.0)).sqrt();
    Ok(if n_on < alpha * n_off { -s } else { s })
}

/// Li & Ma 1983 eq. 5: `(n_on - alpha n_off) / sqrt(n_on + alpha^2 n_off)`; 0 when both counts are 0.
pub fn li_ma_5(n_on: f64, n_off: f64, alpha: f64) -> Result<f64, ScienceError> {
    let n_on = check_counts("n_on", n_on)?;
    let n_off = check_counts("n_off", n_off)?;
    let alpha = arg::positive("alpha", alpha)?;
    let var = n_on + alpha * alpha * n_off;
    if var == 0.0 {
        return Ok(0.0);
    }
    Ok((n_on - alpha * n_off) / var.sqrt())
}

/// The known-background limit of Li & Ma eq. 17: `sqrt(2 [n ln(n/b) - n + b])`, signed by `n - b`.
pub fn li_ma_known_background(n: f64, b: f64) -> Result<f64, ScienceError> {
    let n = check_counts("n", n)?;
    let b = arg::positive("b", b)?;
    let dev = if n == 0.0 { b } else { bd0(n, b) };
    let s = (2.0 * dev.max(0.0)).sqrt();
    Ok(if n < b { -s } else { s })
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap
mod tests {
    use super::*;

    fn rel(a: f64, b: f64) -> f64 {
        ((a - b) / b).abs()
    }

    #[test]
    fn stirling_table_matches_exact_factorials() {
        // [calc] from the formula: ln(n!) - (n + 1/2) ln n + n - ln sqrt(2 pi), n! exact in f64 for n <= 15.
        let mut fact = 1.0_f64;
        for n in 1..=15_u32 {
            fact *= f64::from(n);
            let x = f64::from(n);
            let direct = fact.ln() - (x + 0.5) * x.ln() + x - LN_SQRT_2PI;
            assert!(
                (stirlerr(x) - direct).abs() < 1e-14,
                "n={n}: {} vs {direct}",
                stirlerr(x)
            );
        }
        // The large-n series joins the table smoothly: stirlerr(n) ~ 1/(12 n).
        assert!(rel(stirlerr(16.0), 1.0 / (12.0 * 16.0)) < 2e-3);
    }

    #[test]
    fn pmf_small_cases_exact() {
        // [calc] from the formula: P(N = n | b) = e^-b b^n / n!.
        assert!(rel(ln_pmf(3, 2.0).exp(), (-2.0_f64).exp() * 8.0 / 6.0) < 1e-14);
        assert!(rel(ln_pmf(0, 2.5).exp(), (-2.5_f64).exp()) < 1e-15);
        assert_eq!(ln_pmf(0, 0.0), 0.0);
        assert_eq!(ln_pmf(2, 0.0), f64::NEG_INFINITY);
        assert!(ln_pmf(2, -1.0).is_nan());
    }

    #[test]
    fn tail_edge_cases() {
        assert_eq!(ln_sf(0, 3.0), 0.0);
        assert_eq!(ln_sf(5, 0.0), f64::NEG_INFINITY);
        assert_eq!(ln_sf(0, 0.0), 0.0);
        assert_eq!(ln_sf(3, f64::INFINITY), 0.0);
        assert!(ln_sf(3, f64::NAN).is_nan());
        assert!(matches!(
            ln_sf_checked(3, -1.0),
            Err(ScienceError::InvalidArgument { name: "b", .. })
        ));
        assert!(matches!(
            ln_sf_checked(3, f64::NAN),
            Err(ScienceError::InvalidArgument { .. })
        ));
        // [calc] from the formula: P(N >= 1 | b) = 1 - e^-b on both sides of the series/fraction switch.
        for b in [1e-12_f64, 0.3, 1.9, 2.1, 40.0] {
            let exact = -(-b).exp_m1();
            assert!(rel(sf(1, b), exact) < 1e-13, "b={b}");
        }
    }

    #[test]
    fn tails_sum_to_one_across_the_switch() {
        for n in [1_u64, 2, 7, 30, 300, 5000] {
            for f in [0.3, 0.9, 0.999, 1.0, 1.001, 1.1, 2.0] {
                let b = n as f64 * f + if f >= 1.0 { 1.0 } else { 0.0 };
                let (s, c) = ln_tails(n, b);
                let total = s.exp() + c.exp();
                assert!((total - 1.0).abs() < 1e-12, "n={n} b={b}: {total}");
            }
        }
    }

    #[test]
    fn gaussian_check_values() {
        // docs/science.md section 3 [calc]: Z = 1..6 <-> p.
        // Each p is printed to its last digit; the tolerance is half of that digit.
        let table = [
            (1.0, 0.158655, 5e-7),
            (2.0, 0.022750, 5e-7),
            (3.0, 1.349898e-3, 5e-10),
            (4.0, 3.167124e-5, 5e-12),
            (5.0, 2.866516e-7, 5e-14),
            (6.0, 9.865876e-10, 5e-17),
        ];
        for (z, p, tol) in table {
            assert!((p_from_sigma(z) - p).abs() <= tol, "Q({z}) = {}", p_from_sigma(z));
            // dZ = dp / phi(Z): the printed digits pin Z to about 1e-5.
            assert!((sigma_from_p(p) - z).abs() < 1e-5, "Z({p}) = {}", sigma_from_p(p));
        }
    }

    #[test]
    fn sigma_round_trips_deep_in_the_tail() {
        for z in [
            -8.0, -3.0, -0.5, 0.0, 1e-3, 0.7, 1.7320508, 2.5, 7.0, 20.0, 37.0, 38.5, 100.0, 1e4, 1e6,
        ] {
            let lp = ln_p_from_sigma(z);
            let back = sigma_from_ln_p(lp);
            assert!(
                (back - z).abs() <= 1e-12 * z.abs().max(1.0),
                "z={z}: ln p={lp}, back={back}"
            );
        }
        // Asymptotic form [calc] from the formula: ln Q(z) -> -z^2/2 - ln z - ln sqrt(2 pi) as z -> inf.
        let z = 1e5_f64;
        let asym = -0.5 * z * z - z.ln() - LN_SQRT_2PI;
        assert!((ln_p_from_sigma(z) - asym).abs() < 2e-10 * asym.abs());
        assert_eq!(sigma_from_ln_p(0.0), f64::NEG_INFINITY);
        assert_eq!(sigma_from_ln_p(f64::NEG_INFINITY), f64::INFINITY);
        assert!(sigma_from_ln_p(0.1).is_nan());
        assert!(sigma_from_p(1.5).is_nan());
        assert_eq!(sigma_from_p(0.5), 0.0);
    }

    #[test]
    fn li_ma_check_values() {
        // Li & Ma 1983, eqs. 17 and 5 (docs/science.md section 3 [src], reproduced to 1e-6).
        assert!((li_ma_17(10.0, 20.0, 0.1).unwrap() - 3.6850322).abs() < 1e-6);
        assert!((li_ma_17(10.0, 8.0, 1.0).unwrap() - 0.4718917).abs() < 1e-6);
        assert!((li_ma_5(10.0, 20.0, 0.1).unwrap() - 2.5048972).abs() < 1e-6);
        // Known-background limit (docs/science.md section 3 [src]).
        assert!((li_ma_known_background(10.0, 2.0).unwrap() - 4.0235256).abs() < 1e-6);
        assert!((li_ma_known_background(11.0, 9.0).unwrap() - 0.6440150).abs() < 1e-6);
        assert!((li_ma_known_background(7.0, 9.0).unwrap() + 0.693973).abs() < 1e-6);
        // Signs and degenerate inputs.
        assert!(li_ma_17(2.0, 40.0, 0.1).unwrap() < 0.0);
        assert_eq!(li_ma_17(0.0, 0.0, 0.5).unwrap(), 0.0);
        assert!(li_ma_known_background(0.0, 3.0).unwrap() < 0.0);
    }

    #[test]
    fn li_ma_rejects_bad_input() {
        assert!(matches!(
            li_ma_17(-1.0, 2.0, 0.1),
            Err(ScienceError::InvalidArgument { name: "n_on", .. })
        ));
        assert!(matches!(
            li_ma_17(1.0, f64::NAN, 0.1),
            Err(ScienceError::InvalidArgument { name: "n_off", .. })
        ));
        assert!(matches!(
            li_ma_17(1.0, 2.0, 0.0),
            Err(ScienceError::InvalidArgument { name: "alpha", .. })
        ));
        assert!(matches!(
            li_ma_5(1.0, 2.0, f64::INFINITY),
            Err(ScienceError::InvalidArgument { .. })
        ));
        assert!(matches!(
            li_ma_known_background(3.0, 0.0),
            Err(ScienceError::InvalidArgument { name: "b", .. })
        ));
        assert!(matches!(
            li_ma_known_background(f64::NAN, 1.0),
            Err(ScienceError::InvalidArgument { .. })
        ));
    }
}
