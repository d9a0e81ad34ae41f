//! Coverage of the 90% position region (docs/science.md section 4) on injected bursts through the whole
//! engine, at background densities of a 100 Hz, 2 kHz and 10 kHz ground array. To keep the runs short the
//! field is a flat 10-degree cap whose density per steradian equals the 45-degree cos^2 field's at 20
//! degrees from the zenith; each injection runs on a fresh engine over 12 s of background.
//! The full-size run (400 injections per level) is `#[ignore]`d:
//! `cargo test --release -p glint-engine --test localisation -- --ignored --nocapture`.
#![allow(missing_docs)]
#![allow(clippy::unwrap_used)] // tests may unwrap

use glint_engine::{Engine, EngineConfig, Finding};
use glint_science::geometry::disc_solid_angle_sr;
use glint_science::instrument::{AreaTable, CurveTable, InstrumentResponse, ResponseSpec};
use glint_wire::pb::{PhotonBatch, StreamStatus};
use rand::{Rng, RngExt, SeedableRng};
use rand_distr::{Distribution, Poisson};
use rand_pcg::Pcg64;

const S: i64 = 1_000_000_000;
const T0: i64 = 1_420_000_000 * S;
const CAP_DEG: f64 = 10.0;

/// An energy-dependent PSF like the demo ground array's (68% radius 1.5 deg at 300 GeV to 0.15 deg at
/// 100 TeV), no systematic error (the injections have none), flat in zenith over the cap.
fn response() -> InstrumentResponse {
    let spec = ResponseSpec {
        max_zenith_deg: CAP_DEG,
        energy_min_gev: 300.0,
        energy_max_gev: 1e5,
        effective_area: AreaTable {
            energy_gev: vec![300.0, 1e3, 2e3, 1e4, 1e5],
            zenith_deg: vec![0.0, CAP_DEG],
            area_m2: vec![
                vec![150.0, 2500.0, 8000.0, 40000.0, 90000.0],
                vec![150.0, 2500.0, 8000.0, 40000.0, 90000.0],
            ],
        },
        psf68_deg: CurveTable {
            energy_gev: vec![300.0, 1000.0, 2000.0, 5000.0, 10000.0, 100000.0],
            value: vec![1.5, 0.7, 0.5, 0.3, 0.2, 0.15],
        },
        energy_resolution: CurveTable {
            energy_gev: vec![300.0, 1e5],
            value: vec![0.3, 0.3],
        },
        systematic_deg: 0.0,
        clock_precision_ns: 100,
    };
    InstrumentResponse::from_spec(&spec).unwrap()
}

fn config() -> EngineConfig {
    let mut c = EngineConfig::with_defaults("cap-array", response());
    c.acceptance_prior_cos_power = Some(0.0);
    c.rate_window_s = 10.0;
    c
}

/// All-sky rate of the cap with the density per steradian of a 45-degree cos^2 field of `full_rate_hz` at
/// 20 degrees: a(20) = cos^2 20 x 3 / (2 pi (1 - cos^3 45)) (docs/science.md section 4; computed).
fn cap_rate(full_rate_hz: f64) -> f64 {
    let c3 = 45f64.to_radians().cos().powi(3);
    let a20 = 20f64.to_radians().cos().powi(2) * 3.0 / (std::f64::consts::TAU * (1.0 - c3));
    full_rate_hz * a20 * disc_solid_angle_sr(CAP_DEG)
}

#[derive(Clone, Copy)]
struct Ph {
    t: i64,
    ra: f64,
    dec: f64,
    e: f64,
}

fn unit(ra: f64, dec: f64) -> [f64; 3] {
    let (sd, cd) = dec.to_radians().sin_cos();
    let (sr, cr) = ra.to_radians().sin_cos();
    [cd * cr, cd * sr, sd]
}

fn angle_deg(a: (f64, f64), b: (f64, f64)) -> f64 {
    let (u, v) = (unit(a.0, a.1), unit(b.0, b.1));
    (u[0] * v[0] + u[1] * v[1] + u[2] * v[2])
        .clamp(-1.0, 1.0)
        .acos()
        .to_degrees()
}

fn normal(r: &mut impl Rng) -> f64 {
    let u1: f64 = 1.0 - r.random::<f64>();
    let u2: f64 = r.random();
    (-2.0 * u1.ln()).sqrt() * (std::f64::consts::TAU * u2).cos()
}

/// A direction `sigma_deg`-Gaussian about (ra, dec), on the tangent plane.
fn smear(r: &mut impl Rng, ra: f64, dec: f64, sigma_deg: f64) -> (f64, f64) {
    let c = unit(ra, dec);
    let z = [0.0, 0.0, 1.0];
    let mut e1 = [
        z[1] * c[2] - z[2] * c[1],
        z[2] * c[0] - z[0] * c[2],
        z[0] * c[1] - z[1] * c[0],
    ];
    let n = (e1[0] * e1[0] + e1[1] * e1[1] + e1[2] * e1[2]).sqrt();
    e1 = if n < 1e-9 {
        [1.0, 0.0, 0.0]
    } else {
        [e1[0] / n, e1[1] / n, e1[2] / n]
    };
    let e2 = [
        c[1] * e1[2] - c[2] * e1[1],
        c[2] * e1[0] - c[0] * e1[2],
        c[0] * e1[1] - c[1] * e1[0],
    ];
    let (dx, dy) = (
        normal(r) * sigma_deg.to_radians(),
        normal(r) * sigma_deg.to_radians(),
    );
    let v = [
        c[0] + dx * e1[0] + dy * e2[0],
        c[1] + dx * e1[1] + dy * e2[1],
        c[2] + dx * e1[2] + dy * e2[2],
    ];
    let n = (v[0] * v[0] + v[1] * v[1] + v[2] * v[2]).sqrt();
    (
        (v[1].atan2(v[0]).to_degrees()).rem_euclid(360.0),
        (v[2] / n).asin().to_degrees(),
    )
}

/// Uniform in the cap around the pole (the site's zenith).
fn background(r: &mut impl Rng, rate: f64, from: i64, to: i64) -> Vec<Ph> {
    let c0 = CAP_DEG.to_radians().cos();
    let mut out = Vec::new();
    let mut t = from as f64;
    loop {
        t += -(1.0 - r.random::<f64>()).ln() / rate * 1e9;
        if t >= to as f64 {
            break;
        }
        let c = 1.0 - r.random::<f64>() * (1.0 - c0);
        let e = 300.0 * (1.0 - r.random::<f64>()).powf(-1.0 / 1.7);
        out.push(Ph {
            t: t as i64,
            ra: r.random::<f64>() * 360.0,
            dec: 90.0 - c.acos().to_degrees(),
            e: e.min(1e5),
        });
    }
    out
}

/// A burst ending at `t_end`: Poisson(mu) photons whose time to go follows tau^-1/2 over 3 s (docs/science.md
/// section 2), energies E^-1.5 weighted by the effective area, each smeared by the PSF at its energy.
fn burst(r: &mut impl Rng, resp: &InstrumentResponse, mu: f64, ra: f64, dec: f64, t_end: i64) -> Vec<Ph> {
    let k = Poisson::new(mu).unwrap().sample(r) as usize;
    let a_max = resp.effective_area_m2(1e5, 0.0);
    let mut out = Vec::new();
    while out.len() < k {
        let e = 300.0 * (1.0 - r.random::<f64>()).powf(-2.0);
        if e > 1e5 || r.random::<f64>() * a_max > resp.effective_area_m2(e, 0.0) {
            continue;
        }
        let u: f64 = r.random();
        let tau = 3.0 * u * u;
        let (pra, pdec) = smear(r, ra, dec, resp.psf_sigma_deg(e));
        out.push(Ph {
            t: t_end - (tau * 1e9) as i64,
            ra: pra,
            dec: pdec,
            e,
        });
    }
    out
}

fn run(engine: &mut Engine, ph: &[Ph], end: i64) -> Vec<Finding> {
    let mut out = Vec::new();
    let mut seq = 1;
    for chunk in ph.chunk_by(|a, b| a.t / (S / 10) == b.t / (S / 10)) {
        let batch = PhotonBatch {
            seq,
            time_gps_ns: chunk.iter().map(|p| p.t).collect(),
            ra_deg: chunk.iter().map(|p| p.ra).collect(),
            dec_deg: chunk.iter().map(|p| p.dec).collect(),
            zenith_deg: chunk.iter().map(|p| (90.0 - p.dec) as f32).collect(),
            azimuth_deg: chunk.iter().map(|p| p.ra as f32).collect(),
            energy_gev: chunk.iter().map(|p| p.e as f32).collect(),
            psf68_deg: vec![],
            gammaness: vec![],
            complete_before_gps_ns: 0,
        };
        engine.push_batch(&batch, &mut out).unwrap();
        seq += 1;
    }
    let status = StreamStatus {
        seq,
        now_gps_ns: end,
        dead: vec![],
    };
    engine.push_status(&status, &mut out).unwrap();
    engine.finish(&mut out);
    out
}

/// Coverage of the flash's and the assessment's region over `n` injections at `full_rate_hz`: (detected,
/// flash inside, assessment inside).
fn coverage(full_rate_hz: f64, n: usize, seed: u64) -> (usize, usize, usize) {
    let mut r = Pcg64::seed_from_u64(seed);
    let resp = response();
    let rate = cap_rate(full_rate_hz);
    let (mut detected, mut in_flash, mut in_assess) = (0, 0, 0);
    for _ in 0..n {
        let mut engine = Engine::new(config()).unwrap();
        let end = T0 + 12 * S;
        let t_burst = T0 + 10 * S;
        // Away from the pole (a coordinate singularity of the test frame only) and from the cap's edge.
        let (ra, dec) = (r.random::<f64>() * 360.0, 90.0 - 2.0 - 4.0 * r.random::<f64>());
        let mu = 12.0 + 28.0 * r.random::<f64>();
        let mut ph = background(&mut r, rate, T0, end);
        ph.extend(burst(&mut r, &resp, mu, ra, dec, t_burst));
        ph.sort_by_key(|p| (p.t, p.ra.to_bits()));
        let out = run(&mut engine, &ph, end);
        let near = |fra: f64, fdec: f64| angle_deg((fra, fdec), (ra, dec)) < 3.0;
        let flash = out.iter().find_map(|f| match f {
            Finding::Flash(f) if near(f.ra_deg, f.dec_deg) && f.end_ns >= t_burst - 3 * S => Some(f),
            _ => None,
        });
        let Some(flash) = flash else { continue };
        detected += 1;
        if angle_deg((flash.ra_deg, flash.dec_deg), (ra, dec)) <= flash.error_radius_deg {
            in_flash += 1;
        }
        let assessment = out.iter().find_map(|f| match f {
            Finding::Assessment(a) if a.candidate == flash.candidate => Some(a),
            _ => None,
        });
        let a = assessment.unwrap();
        if angle_deg((a.trigger.ra_deg, a.trigger.dec_deg), (ra, dec)) <= a.trigger.error_radius_deg {
            in_assess += 1;
        }
    }
    (detected, in_flash, in_assess)
}

/// Checks the coverage of `n` injections against [lo, hi] widened by `widen` binomial sd of the detected
/// sample, (0.09 / detected)^1/2.
fn check(full_rate_hz: f64, n: usize, seed: u64, lo: f64, hi: f64, widen: f64) {
    let (d, f, a) = coverage(full_rate_hz, n, seed);
    let sd = (0.09 / d as f64).sqrt();
    let (lo, hi) = (lo - widen * sd, hi + widen * sd);
    let (cf, ca) = (f as f64 / d as f64, a as f64 / d as f64);
    println!(
        "{full_rate_hz} Hz: {d} of {n} detected; 90% region holds the source in {f} ({cf:.3}) flashes, {a} ({ca:.3}) assessments"
    );
    assert!(d * 2 >= n, "most injections are detected: {d} of {n}");
    assert!(
        (lo..=hi).contains(&cf),
        "flash coverage {cf} at {full_rate_hz} Hz"
    );
    assert!(
        (lo..=hi).contains(&ca),
        "assessment coverage {ca} at {full_rate_hz} Hz"
    );
}

// CI size: 120 injections per level. With true coverage 0.90 the binomial sd at ~110 detected is 2.9%;
// the band 0.80-0.98 is about 3 sd each way, so the test fails by chance about once in 300 runs (computed).
#[test]
fn region_covers_at_100_hz() {
    check(100.0, 120, 101, 0.80, 0.98, 0.0);
}

#[test]
fn region_covers_at_2_khz() {
    check(2000.0, 120, 202, 0.80, 0.98, 0.0);
}

#[test]
fn region_covers_at_10_khz() {
    check(10000.0, 120, 303, 0.80, 0.98, 0.0);
}

// Full size: 400 injections per level, the project's band 0.85-0.95 widened by two binomial sd of the
// detected sample (1.5% at 400, 2% at 230 detected).
#[test]
#[ignore = "full-size coverage run, a few minutes; figures in README"]
fn full_size_region_coverage() {
    for (rate, seed) in [(100.0, 11), (2000.0, 12), (10000.0, 13)] {
        check(rate, 400, seed, 0.85, 0.95, 2.0);
    }
}
