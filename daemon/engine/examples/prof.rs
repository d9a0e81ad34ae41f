#![allow(missing_docs)]
use glint_engine::{Engine, EngineConfig};
use glint_science::instrument::{AreaTable, CurveTable, InstrumentResponse, ResponseSpec};
use glint_wire::pb::PhotonBatch;
use rand::{RngExt, SeedableRng};
use rand_pcg::Pcg64;
const S: i64 = 1_000_000_000;
const T0: i64 = 1_420_000_000 * S;
const RATE_HZ: f64 = 1000.0;
const MAX_ZENITH: f64 = 45.0;

fn config(search: bool) -> EngineConfig {
    let spec = ResponseSpec {
        max_zenith_deg: MAX_ZENITH,
        energy_min_gev: 100.0,
        energy_max_gev: 1e5,
        effective_area: AreaTable {
            energy_gev: vec![100.0, 1e5],
            zenith_deg: vec![0.0, MAX_ZENITH],
            area_m2: vec![vec![1e3, 1e5], vec![5e2, 5e4]],
        },
        psf68_deg: CurveTable {
            energy_gev: vec![100.0, 1e5],
            value: vec![0.5, 0.5],
        },
        energy_resolution: CurveTable {
            energy_gev: vec![100.0, 1e5],
            value: vec![0.3, 0.3],
        },
        systematic_deg: 0.0,
        clock_precision_ns: 100,
    };
    let mut c = EngineConfig::with_defaults("bench-array", InstrumentResponse::from_spec(&spec).unwrap());
    c.acceptance_prior_cos_power = Some(2.0);
    c.search_enabled = search;
    c
}

/// Background batches: cos^2 zenith acceptance inside 45 deg, uniform azimuth, pole-site frame.
fn batches(seed: u64, from: i64, to: i64, seq0: u64) -> Vec<PhotonBatch> {
    let mut rng = Pcg64::seed_from_u64(seed);
    let c0 = MAX_ZENITH.to_radians().cos();
    let mut out = Vec::new();
    let mut b = PhotonBatch {
        seq: seq0,
        ..PhotonBatch::default()
    };
    let mut t = from as f64;
    let mut edge = from + S / 10;
    loop {
        t += -(1.0 - rng.random::<f64>()).ln() / RATE_HZ * 1e9;
        if t as i64 >= edge || t as i64 >= to {
            let seq = b.seq;
            out.push(std::mem::replace(
                &mut b,
                PhotonBatch {
                    seq: seq + 1,
                    ..PhotonBatch::default()
                },
            ));
            edge += S / 10;
            if t as i64 >= to {
                break;
            }
        }
        let c = (c0.powi(3) + rng.random::<f64>() * (1.0 - c0.powi(3))).cbrt();
        let zen = c.acos().to_degrees() as f32;
        let az = (360.0 * rng.random::<f64>()) as f32 % 360.0;
        b.time_gps_ns.push(t as i64);
        b.ra_deg.push(f64::from(az));
        b.dec_deg.push(90.0 - f64::from(zen));
        b.zenith_deg.push(zen);
        b.azimuth_deg.push(az);
        b.energy_gev
            .push((100.0 * (1.0 - rng.random::<f64>()).powf(-1.0 / 1.7)) as f32);
    }
    out
}
fn main() {
    let search = std::env::args().nth(1).map_or(true, |a| a != "nosearch");
    let all = batches(1, T0, T0 + 400 * S, 1);
    let n: usize = all.iter().map(|b| b.time_gps_ns.len()).sum();
    let mut e = Engine::new(config(search)).unwrap();
    let mut out = Vec::new();
    let cpu = || {
        let s = std::fs::read_to_string("/proc/self/stat").unwrap();
        let f: Vec<&str> = s.rsplit(')').next().unwrap().split_whitespace().collect();
        (f[11].parse::<f64>().unwrap() + f[12].parse::<f64>().unwrap()) / 100.0
    };
    let c0 = cpu();
    let t = std::time::Instant::now();
    for b in &all {
        e.push_batch(b, &mut out).unwrap();
    }
    let el = t.elapsed();
    let c1 = cpu();
    eprintln!(
        "cpu {:.2} s -> {:.0} photons per cpu-second",
        c1 - c0,
        n as f64 / (c1 - c0)
    );
    eprintln!(
        "{} photons in {:?}: {:.0} /s; stats {:?}",
        n,
        el,
        n as f64 / el.as_secs_f64(),
        e.stats().model_builds
    );
}
