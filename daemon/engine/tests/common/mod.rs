//! Shared helpers of the engine tests: a simple instrument, seeded background and cluster generators and a
//! driver that feeds batches and collects findings. The instrument frame is tied to the sky (a site at the
//! pole, no rotation): zenith = 90 - dec, azimuth = ra, so acceptance maps onto a fixed sky cap.
#![allow(dead_code, unreachable_pub, clippy::unwrap_used)] // test helpers; tests may unwrap

use glint_engine::{Engine, EngineConfig, Finding};
use glint_science::instrument::{AreaTable, CurveTable, InstrumentResponse, ResponseSpec};
use glint_wire::pb::{PhotonBatch, StreamStatus};
use rand::{Rng, RngExt, SeedableRng};
use rand_pcg::Pcg64;

pub const S: i64 = 1_000_000_000;
/// A GPS time in 2025, so times are realistic in size.
pub const T0: i64 = 1_420_000_000 * S;

#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Ph {
    pub t: i64,
    pub ra: f64,
    pub dec: f64,
    pub zen: f32,
    pub az: f32,
    pub e: f32,
}

pub fn response(psf68_deg: f64, max_zenith_deg: f64, clock_precision_ns: i64) -> InstrumentResponse {
    let spec = ResponseSpec {
        max_zenith_deg,
        energy_min_gev: 100.0,
        energy_max_gev: 1e5,
        effective_area: AreaTable {
            energy_gev: vec![100.0, 1e3, 1e5],
            zenith_deg: vec![0.0, max_zenith_deg],
            area_m2: vec![vec![1e3, 1e4, 1e5], vec![5e2, 5e3, 5e4]],
        },
        psf68_deg: CurveTable {
            energy_gev: vec![100.0, 1e5],
            value: vec![psf68_deg, psf68_deg],
        },
        energy_resolution: CurveTable {
            energy_gev: vec![100.0, 1e5],
            value: vec![0.3, 0.3],
        },
        systematic_deg: 0.0,
        clock_precision_ns,
    };
    InstrumentResponse::from_spec(&spec).unwrap()
}

pub const MAX_ZENITH: f64 = 45.0;
pub const COS_POWER: f64 = 2.0;

/// Defaults of deploy/glint.toml with a prior so triggering starts at once.
pub fn config(far_per_year: f64) -> EngineConfig {
    let mut c = EngineConfig::with_defaults("test-array", response(0.5, MAX_ZENITH, 100));
    c.far_per_year = far_per_year;
    c.acceptance_prior_cos_power = Some(COS_POWER);
    c.rate_window_s = 60.0;
    c
}

pub fn rng(seed: u64) -> Pcg64 {
    Pcg64::seed_from_u64(seed)
}

fn from_frame(zen: f32, az: f32) -> (f64, f64) {
    (f64::from(az), 90.0 - f64::from(zen))
}

/// Zenith/azimuth of an ICRS direction in the pole-site frame.
pub fn to_frame(ra: f64, dec: f64) -> (f32, f32) {
    ((90.0 - dec) as f32, ra.rem_euclid(360.0) as f32)
}

fn energy(rng: &mut impl Rng) -> f32 {
    // Power law E^-2.7 above 100 GeV, capped at 1e5.
    let u: f64 = 1.0 - rng.random::<f64>();
    (100.0 * u.powf(-1.0 / 1.7)).min(1e5) as f32
}

/// A background photon in the field of view: uniform in azimuth, density cos^p(zenith) inside the cap.
pub fn background_photon(rng: &mut impl Rng, t: i64) -> Ph {
    let c0 = MAX_ZENITH.to_radians().cos();
    let q = COS_POWER + 1.0;
    let u: f64 = rng.random();
    let c = (c0.powf(q) + u * (1.0 - c0.powf(q))).powf(1.0 / q);
    let zen = c.clamp(-1.0, 1.0).acos().to_degrees() as f32;
    let az = (360.0 * rng.random::<f64>()) as f32 % 360.0;
    let (ra, dec) = from_frame(zen, az);
    Ph {
        t,
        ra,
        dec,
        zen,
        az,
        e: energy(rng),
    }
}

/// Poisson background at `rate_hz` over [t_from, t_to).
pub fn background(rng: &mut impl Rng, rate_hz: f64, t_from: i64, t_to: i64) -> Vec<Ph> {
    let mut out = Vec::new();
    let mut t = t_from as f64;
    loop {
        let u: f64 = 1.0 - rng.random::<f64>();
        t += -u.ln() / rate_hz * 1e9;
        if t >= t_to as f64 {
            break;
        }
        out.push(background_photon(rng, t as i64));
    }
    out
}

fn unit(ra: f64, dec: f64) -> [f64; 3] {
    let (sd, cd) = dec.to_radians().sin_cos();
    let (sr, cr) = ra.to_radians().sin_cos();
    [cd * cr, cd * sr, sd]
}

pub fn angle_deg(ra1: f64, dec1: f64, ra2: f64, dec2: f64) -> f64 {
    let a = unit(ra1, dec1);
    let b = unit(ra2, dec2);
    let d = (a[0] * b[0] + a[1] * b[1] + a[2] * b[2]).clamp(-1.0, 1.0);
    d.acos().to_degrees()
}

/// Standard normal by Box-Muller.
pub fn normal(rng: &mut impl Rng) -> f64 {
    let u1: f64 = 1.0 - rng.random::<f64>();
    let u2: f64 = rng.random();
    (-2.0 * u1.ln()).sqrt() * (2.0 * std::f64::consts::PI * u2).cos()
}

/// `k` photons from a point at (ra, dec) smeared by a Gaussian PSF of width sigma, uniform in
/// [t_start, t_start + dur].
pub fn cluster(
    rng: &mut impl Rng,
    ra: f64,
    dec: f64,
    sigma_deg: f64,
    k: usize,
    t_start: i64,
    dur: i64,
) -> Vec<Ph> {
    let c = unit(ra, dec);
    // Tangent basis at c.
    let e1 = {
        let z = [0.0, 0.0, 1.0];
        let x = [
            z[1] * c[2] - z[2] * c[1],
            z[2] * c[0] - z[0] * c[2],
            z[0] * c[1] - z[1] * c[0],
        ];
        let n = (x[0] * x[0] + x[1] * x[1] + x[2] * x[2]).sqrt();
        if n < 1e-9 {
            [1.0, 0.0, 0.0]
        } else {
            [x[0] / n, x[1] / n, x[2] / n]
        }
    };
    let e2 = [
        c[1] * e1[2] - c[2] * e1[1],
        c[2] * e1[0] - c[0] * e1[2],
        c[0] * e1[1] - c[1] * e1[0],
    ];
    (0..k)
        .map(|_| {
            let dx = normal(rng) * sigma_deg.to_radians();
            let dy = normal(rng) * sigma_deg.to_radians();
            let v = [
                c[0] + dx * e1[0] + dy * e2[0],
                c[1] + dx * e1[1] + dy * e2[1],
                c[2] + dx * e1[2] + dy * e2[2],
            ];
            let n = (v[0] * v[0] + v[1] * v[1] + v[2] * v[2]).sqrt();
            let dec = (v[2] / n).asin().to_degrees();
            let ra = v[1].atan2(v[0]).to_degrees().rem_euclid(360.0);
            let t = t_start + (rng.random::<f64>() * dur as f64) as i64;
            let (zen, az) = to_frame(ra, dec);
            Ph {
                t,
                ra,
                dec,
                zen,
                az,
                e: energy(rng),
            }
        })
        .collect()
}

pub fn sort(ph: &mut [Ph]) {
    ph.sort_by_key(|p| (p.t, p.ra.to_bits(), p.dec.to_bits()));
}

pub fn batch(seq: u64, ph: &[Ph]) -> PhotonBatch {
    PhotonBatch {
        seq,
        time_gps_ns: ph.iter().map(|p| p.t).collect(),
        ra_deg: ph.iter().map(|p| p.ra).collect(),
        dec_deg: ph.iter().map(|p| p.dec).collect(),
        zenith_deg: ph.iter().map(|p| p.zen).collect(),
        azimuth_deg: ph.iter().map(|p| p.az).collect(),
        energy_gev: ph.iter().map(|p| p.e).collect(),
        psf68_deg: vec![],
        gammaness: vec![],
        complete_before_gps_ns: 0,
    }
}

pub fn status(seq: u64, now: i64) -> StreamStatus {
    StreamStatus {
        seq,
        now_gps_ns: now,
        dead: vec![],
    }
}

/// Feeds time-sorted photons in batches covering `batch_ns` of event time each, then a status at `end`.
/// Returns the findings and the next sequence number.
pub fn feed(
    engine: &mut Engine,
    ph: &[Ph],
    batch_ns: i64,
    end: i64,
    out: &mut Vec<Finding>,
    seq0: u64,
) -> u64 {
    let mut seq = seq0;
    let mut i = 0;
    while i < ph.len() {
        let limit = ph[i].t - ph[i].t.rem_euclid(batch_ns) + batch_ns;
        let j = i + ph[i..].partition_point(|p| p.t < limit);
        engine.push_batch(&batch(seq, &ph[i..j]), out).unwrap();
        seq += 1;
        i = j;
    }
    engine.push_status(&status(seq, end), out).unwrap();
    seq + 1
}

pub fn flashes(f: &[Finding]) -> Vec<&glint_engine::Flash> {
    f.iter()
        .filter_map(|x| match x {
            Finding::Flash(f) => Some(f),
            _ => None,
        })
        .collect()
}

pub fn assessments(f: &[Finding]) -> Vec<&glint_engine::Assessment> {
    f.iter()
        .filter_map(|x| match x {
            Finding::Assessment(a) => Some(a),
            _ => None,
        })
        .collect()
}
