//! Small numeric helpers the search and the assessment share.

pub(crate) fn median_sorted(x: &[f64]) -> f64 {
    match x.len() {
        0 => 0.0,
        n if n % 2 == 1 => x[n / 2],
        n => 0.5 * (x[n / 2 - 1] + x[n / 2]),
    }
}

/// Significances stay finite in outputs: p = 1 would be -inf and p = 0 +inf.
pub(crate) fn clamp_sigma(z: f64) -> f64 {
    if z.is_nan() { 0.0 } else { z.clamp(-40.0, 1000.0) }
}
