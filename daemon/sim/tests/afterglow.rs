//! The afterglow-like light curve: its expected photon count is the integral of the rate, and its tail
//! decays as the power law it is meant to imitate.

#![allow(clippy::unwrap_used)]

use glint_sim::draw::{AfterglowCurve, PowerLaw};
use rand::SeedableRng;
use rand_pcg::Pcg64;

#[test]
fn mean_photons_is_the_integral_of_the_rate() {
    // Rate: linear rise over r to the peak, then peak (1 + t/r)^-a for D; midpoint rule with 2e6 steps.
    for &(peak, r, a, d) in &[
        (30.0, 1.0, 1.2, 120.0),
        (200.0, 0.5, 1.0, 100.0),
        (5.0, 2.0, 2.5, 10.0),
    ] {
        let curve = AfterglowCurve::new(peak, r, a, d);
        let n = 2_000_000;
        let (lo, hi) = (-r, d);
        let h = (hi - lo) / f64::from(n);
        let integral: f64 = (0..n)
            .map(|i| {
                let t = lo + (f64::from(i) + 0.5) * h;
                let rate = if t < 0.0 {
                    peak * (t + r) / r
                } else {
                    peak * (1.0 + t / r).powf(-a)
                };
                rate * h
            })
            .sum();
        assert!(
            (curve.mean_photons() / integral - 1.0).abs() < 1e-6,
            "{peak} {r} {a} {d}"
        );
    }
}

#[test]
fn tail_keeps_the_power_law_fraction() {
    // For a t^-alpha decay a fraction 10^(1 - alpha) of the fluence after the onset time T comes after
    // 10 T (docs/science.md section 7, [calc] from the formula; decay indices as in Nousek et al. 2006, ApJ 642,
    // 389). Here y = 1 + t/r plays t/T, and the tail is cut at y_end, so the fraction is
    // (10^(1-a) - y_end^(1-a)) / (1 - y_end^(1-a)).
    let (r, a, d) = (1.0, 1.5, 1e6);
    let curve = AfterglowCurve::new(10.0, r, a, d);
    let mut rng = Pcg64::seed_from_u64(3);
    let draws: Vec<f64> = (0..200_000).map(|_| curve.draw(&mut rng)).collect();
    let tail: Vec<f64> = draws.iter().copied().filter(|&t| t >= 0.0).collect();
    let late = tail.iter().filter(|&&t| 1.0 + t / r >= 10.0).count() as f64 / tail.len() as f64;
    let y_end: f64 = 1.0 + d / r;
    let expected = (10f64.powf(1.0 - a) - y_end.powf(1.0 - a)) / (1.0 - y_end.powf(1.0 - a));
    // Binomial error sqrt(p (1 - p) / n) = 0.0011 for n ~ 2e5: 0.005 is over 4 sigma.
    assert!(
        (late - expected).abs() < 0.005,
        "late fraction {late}, expected {expected}"
    );
    // The rise holds (r/2) / (r/2 + tail integral) of the photons and lies in [-r, 0).
    let rise = draws.iter().filter(|&&t| t < 0.0).count() as f64 / draws.len() as f64;
    let tail_integral = r * (y_end.powf(1.0 - a) - 1.0) / (1.0 - a);
    let expected_rise = 0.5 * r / (0.5 * r + tail_integral);
    assert!(
        (rise - expected_rise).abs() < 0.005,
        "rise share {rise}, expected {expected_rise}"
    );
    assert!(draws.iter().all(|&t| t >= -r && t <= d));
}

#[test]
fn power_law_quantiles_invert_the_distribution() {
    // F(x) = (x^g - lo^g) / (hi^g - lo^g), g = 1 - index ([calc] from the formula); index 1 is log-uniform.
    for &(index, lo, hi) in &[
        (2.6, 300.0, 2e5),
        (1.5, 10.0, 1e6),
        (1.0, 1.0, 100.0),
        (3.0, 1681.0, 1e6),
    ] {
        let law = PowerLaw::new(index, lo, hi);
        assert!((law.quantile(0.0) - lo).abs() < 1e-12 * lo);
        assert!((law.quantile(1.0) - hi).abs() < 1e-9 * hi);
        for &u in &[0.1, 0.5, 0.9] {
            let x = law.quantile(u);
            let f = if index == 1.0 {
                (x / lo).ln() / (hi / lo).ln()
            } else {
                let g = 1.0 - index;
                (x.powf(g) - lo.powf(g)) / (hi.powf(g) - lo.powf(g))
            };
            assert!((f - u).abs() < 1e-12, "index {index}: F(q({u})) = {f}");
        }
    }
}
