//! Evaporation bursts against the model in glint-science: counts per time-to-explosion bin and energy bin
//! match the expected detected counts, the time-integrated spectrum has the published slopes, and the full
//! simulator puts the expected number of photons into the stream.

#![allow(clippy::unwrap_used)]

mod common;

use glint_science::hawking::{PARSEC_M, detected_counts, detected_counts_between, slice_spectrum};
use glint_science::instrument::{InstrumentResponse, ResponseSpec};
use glint_sim::draw::EvaporationSampler;
use glint_sim::{Simulator, Source};
use rand::SeedableRng;
use rand_pcg::Pcg64;

fn response_from(instrument_toml: &str) -> (ResponseSpec, InstrumentResponse) {
    let table: toml::Table = toml::from_str(instrument_toml).unwrap();
    let spec: ResponseSpec = table["instrument"]["response"].clone().try_into().unwrap();
    let resp = InstrumentResponse::from_spec(&spec).unwrap();
    (spec, resp)
}

/// Expected detected photons with true energy in [e_lo, e_hi] and time-to-go in [tau_lo, tau_hi], from
/// glint-science's slice spectrum folded exactly with the response.
fn expected_in_cell(resp: &InstrumentResponse, z: f64, d_pc: f64, tau: (f64, f64), e: (f64, f64)) -> f64 {
    let d_m = d_pc * PARSEC_M;
    let dilution = 1.0 / (4.0 * std::f64::consts::PI * d_m * d_m);
    slice_spectrum(tau.0, tau.1)
        .unwrap()
        .iter()
        .map(|p| resp.fold_power_law(z, p.e_lo_gev.max(e.0), p.e_hi_gev.min(e.1), p.coeff, p.index))
        .sum::<f64>()
        * dilution
}

/// Asserts a Poisson total `observed` is within 4 sigma of `expected`.
fn within_4_sigma(what: &str, observed: f64, expected: f64) {
    let sigma = expected.sqrt().max(1.0);
    assert!(
        (observed - expected).abs() < 4.0 * sigma,
        "{what}: observed {observed}, expected {expected:.1} (sigma {sigma:.1})"
    );
}

#[test]
fn counts_per_time_and_energy_bin_match_the_model() {
    let (spec, resp) = response_from(common::GROUND);
    let (z, d, tau_max) = (20.0, 0.02, 100.0);
    let sampler = EvaporationSampler::new(&resp, &spec.effective_area.zenith_deg, d, tau_max);
    let reps = 300;
    let tau_edges = [0.0, 0.01, 0.1, 1.0, 10.0, 100.0];
    let e_edges = [300.0, 1000.0, 3000.0, 10_000.0, 30_000.0, 200_000.0];
    let mut by_tau = [0.0; 5];
    let mut by_e = [0.0; 5];
    // One joint cell: the last second and 3-30 TeV (time and energy are drawn together).
    let mut cell = 0.0;
    let mut rng = Pcg64::seed_from_u64(11);
    for _ in 0..reps {
        for (tau, e) in sampler.draw(&mut rng, |e, _| resp.effective_area_m2(e, z)) {
            by_tau[tau_edges.partition_point(|&x| x <= tau) - 1] += 1.0;
            by_e[e_edges.partition_point(|&x| x <= e).clamp(1, 5) - 1] += 1.0;
            if tau <= 1.0 && (3000.0..30_000.0).contains(&e) {
                cell += 1.0;
            }
        }
    }
    for i in 0..5 {
        let expected =
            reps as f64 * detected_counts_between(&resp, z, d, tau_edges[i], tau_edges[i + 1]).unwrap();
        within_4_sigma(
            &format!("tau in [{}, {}]", tau_edges[i], tau_edges[i + 1]),
            by_tau[i],
            expected,
        );
        let expected =
            reps as f64 * expected_in_cell(&resp, z, d, (0.0, tau_max), (e_edges[i], e_edges[i + 1]));
        within_4_sigma(
            &format!("E in [{}, {}]", e_edges[i], e_edges[i + 1]),
            by_e[i],
            expected,
        );
    }
    within_4_sigma(
        "tau <= 1 s, 3-30 TeV",
        cell,
        reps as f64 * expected_in_cell(&resp, z, d, (0.0, 1.0), (3000.0, 30_000.0)),
    );
    // The totals are what detected_counts gives for the whole window.
    let total: f64 = by_tau.iter().sum();
    within_4_sigma(
        "total",
        total,
        reps as f64 * detected_counts(&resp, z, d, tau_max).unwrap(),
    );
}

/// Maximum-likelihood index `s` of `x^-s` truncated to [a, b]: solves mean(ln x) = E[ln x | s] by
/// bisection (the expectation falls as s grows).
fn truncated_power_law_index(xs: &[f64], a: f64, b: f64) -> f64 {
    let mean_ln = xs.iter().map(|x| x.ln()).sum::<f64>() / xs.len() as f64;
    let expected_ln = |s: f64| {
        let g = 1.0 - s;
        (b.powf(g) * b.ln() - a.powf(g) * a.ln()) / (b.powf(g) - a.powf(g)) - 1.0 / g
    };
    let (mut lo, mut hi) = (1.0001, 6.0);
    for _ in 0..100 {
        let mid = 0.5 * (lo + hi);
        if expected_ln(mid) > mean_ln {
            lo = mid
        } else {
            hi = mid
        }
    }
    0.5 * (lo + hi)
}

#[test]
fn time_integrated_spectrum_has_the_published_slopes() {
    // A flat 1000 m^2 from 10 GeV to 1 PeV so the drawn energies follow the emitted spectrum.
    let flat = r#"
[instrument.response]
max_zenith_deg = 60.0
energy_min_gev = 10.0
energy_max_gev = 1000000.0
clock_precision_ns = 0
[instrument.response.effective_area]
energy_gev = [10.0, 1000000.0]
zenith_deg = [0.0]
area_m2 = [[1000.0, 1000.0]]
[instrument.response.psf68_deg]
energy_gev = [10.0]
value = [0.5]
[instrument.response.energy_resolution]
energy_gev = [10.0]
value = [0.1]
"#;
    let (spec, resp) = response_from(flat);
    let tau_max = 100.0;
    let sampler = EvaporationSampler::new(&resp, &spec.effective_area.zenith_deg, 0.0015, tau_max);
    let mut rng = Pcg64::seed_from_u64(5);
    let drawn = sampler.draw(&mut rng, |e, _| resp.effective_area_m2(e, 0.0));
    // Burst temperature at the start of the window: T1 tau^(-1/3), T1 = 7800 GeV (Petkov et al. 2008, from
    // memory).
    let t_max = 7800.0 / tau_max.cbrt();
    let below: Vec<f64> = drawn.iter().map(|d| d.1).filter(|&e| e < t_max).collect();
    let above: Vec<f64> = drawn.iter().map(|d| d.1).filter(|&e| e >= t_max).collect();
    assert!(
        below.len() > 200_000 && above.len() > 4_000,
        "{} below, {} above",
        below.len(),
        above.len()
    );
    // Time-integrated spectrum: E^-1.5 below the temperature of the window's start and E^-3 above it
    // (Petkov et al. 2008, Astron. Lett. 34, 509; docs/science.md section 2, from memory). Statistical error
    // of the index is about (s - 1) / sqrt(n): 0.001 and 0.025 here; the bounds are about 4 sigma.
    let s_below = truncated_power_law_index(&below, 10.0, t_max);
    let s_above = truncated_power_law_index(&above, t_max, 1e6);
    assert!((s_below - 1.5).abs() < 0.005, "index below T: {s_below}");
    assert!((s_above - 3.0).abs() < 0.1, "index above T: {s_above}");
}

#[test]
fn simulator_sends_the_expected_burst_photons() {
    // On the axis of a telescope that does not drift, the source stays at off-axis angle 0, so the whole
    // window's expectation is glint-science's detected_counts at zenith 0.
    let (d, tau_max) = (0.004, 100.0);
    let text = format!(
        "{}{}\n[[source]]\nkind = \"evaporation\"\nra_deg = 212.0\ndec_deg = -8.5\ndistance_pc = {d}\n\
         t_offset_s = 150.0\nmax_time_to_go_s = {tau_max}\n",
        common::header("burst", 200.0),
        common::SPACE_FIXED
    );
    let scenario = common::scenario(&text);
    let (_, resp) = response_from(common::SPACE_FIXED);
    let runs = 40;
    let (mut total, mut last_second, mut sent) = (0.0, 0.0, 0_u64);
    for seed in 0..runs {
        let mut sim = Simulator::new(&scenario, seed).unwrap();
        for _ in sim.by_ref() {}
        let truth = sim.truth();
        assert_eq!(truth.len(), 1);
        let t = &truth[0];
        assert!(matches!(t.params, Source::Evaporation(_)));
        assert_eq!(t.distance_pc, Some(d));
        total += t.photons as f64;
        let one = t
            .counts_by_timescale
            .iter()
            .find(|c| c.timescale_s == 1.0)
            .unwrap();
        last_second += one.counts as f64;
        sent += sim.stats().photons;
    }
    let runs = f64::from(runs as u32);
    within_4_sigma(
        "photons per run",
        total,
        runs * detected_counts(&resp, 0.0, d, tau_max).unwrap(),
    );
    within_4_sigma(
        "last second",
        last_second,
        runs * detected_counts(&resp, 0.0, d, 1.0).unwrap(),
    );
    // Everything the truth counts was sent (plus a few background photons at 0.01 Hz).
    assert!(
        sent as f64 >= total && (sent as f64) < total + runs * 10.0,
        "sent {sent}, burst {total}"
    );
}
