//! Small numeric helpers the search and the assessment share, and the one rule every significance glint
//! prints or sends follows: a signed normal equivalent, never a clamp value.

use glint_science::poisson::{ln_cdf, ln_sf, sigma_from_ln_p};

pub(crate) fn median_sorted(x: &[f64]) -> f64 {
    match x.len() {
        0 => 0.0,
        n if n % 2 == 1 => x[n / 2],
        n => 0.5 * (x[n / 2 - 1] + x[n / 2]),
    }
}

/// Keeps a significance finite for the wire (JSON has no infinity): NaN (no test) is 0, and an infinite
/// one (counts on a background of exactly 0) the largest finite number of its sign. Every finite value
/// passes unchanged: nothing is clamped to a bound that a reader could take for a measurement.
pub(crate) fn finite_sigma(z: f64) -> f64 {
    if z.is_nan() {
        0.0
    } else if z.is_infinite() {
        f64::MAX.copysign(z)
    } else {
        z
    }
}

/// P(N >= n | b) and the signed normal equivalent of `n` counts on `b`: from the upper tail,
/// Phi^-1(1 - P(N >= n)), when that tail is below 1/2 (an excess); from the lower tail,
/// -Phi^-1(1 - P(N <= n)), when that one is (a deficit: 0 on 31.76 is -7.59, not a clamp bound); 0 when
/// both tails exceed 1/2 (n at the median of a discrete Poisson: neither excess nor deficit).
pub(crate) fn count_sigma(n: u64, b: f64) -> (f64, f64) {
    let b = if b.is_nan() { 0.0 } else { b.max(0.0) };
    let ln_up = ln_sf(n, b);
    let p = ln_up.exp();
    if ln_up < -std::f64::consts::LN_2 {
        return (p, finite_sigma(sigma_from_ln_p(ln_up)));
    }
    let ln_low = ln_cdf(n, b);
    if ln_low < -std::f64::consts::LN_2 {
        return (p, finite_sigma(-sigma_from_ln_p(ln_low)));
    }
    (p, 0.0)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn deficits_get_their_own_tail_not_a_clamp() {
        // 0 on 31.76: P(N <= 0) = exp(-31.76), whose one-sided normal equivalent is 7.589 [calc: the root
        // of erfc(z / sqrt 2) / 2 = exp(-31.76) by bisection, Python's math.erfc].
        let (p, z) = count_sigma(0, 31.76);
        assert_eq!(p, 1.0);
        assert!((z + 7.589).abs() < 1e-3, "{z}");
        // An excess keeps its upper tail: 10 on 1 is P(N >= 10) = 1.114e-7, 5.179 sigma [calc, same way].
        let (p, z) = count_sigma(10, 1.0);
        assert!((p - 1.114e-7).abs() < 1e-9, "{p}");
        assert!((z - 5.18).abs() < 0.01, "{z}");
        // At the median, neither.
        assert_eq!(count_sigma(3, 3.2).1, 0.0);
        // No background: an infinite excess stays finite, and nothing is NaN.
        assert_eq!(count_sigma(2, 0.0).1, f64::MAX);
        assert_eq!(count_sigma(0, 0.0).1, 0.0);
        assert_eq!(count_sigma(4, f64::NAN).1, f64::MAX);
        assert_eq!(finite_sigma(f64::NAN), 0.0);
        assert_eq!(finite_sigma(-3.5), -3.5);
        assert_eq!(finite_sigma(f64::NEG_INFINITY), -f64::MAX);
    }
}
