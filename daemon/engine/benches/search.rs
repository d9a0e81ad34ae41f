//! Photons per second through the engine with the default ladder (0.01 to 30 s) and search radius (0.5 deg).
//! At 1 kHz of background: the full search and the reorder stage alone (`search_enabled = false`), each
//! iteration feeding 60 s of event time in 0.1 s batches to an engine already warmed by 40 s of data. At
//! 20 kHz (the daemon's stress rate, where the disc search dominates): the full search over 10 s after 40 s.
#![allow(missing_docs, clippy::unwrap_used)] // a benchmark may unwrap

use criterion::{BatchSize, Criterion, Throughput, criterion_group, criterion_main};
use glint_engine::{Engine, EngineConfig};
use glint_science::instrument::{AreaTable, CurveTable, InstrumentResponse, ResponseSpec};
use glint_wire::pb::PhotonBatch;
use rand::{RngExt, SeedableRng};
use rand_pcg::Pcg64;

const S: i64 = 1_000_000_000;
const T0: i64 = 1_420_000_000 * S;
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
fn batches(seed: u64, rate_hz: f64, from: i64, to: i64, seq0: u64) -> Vec<PhotonBatch> {
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
        t += -(1.0 - rng.random::<f64>()).ln() / rate_hz * 1e9;
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

/// Times `cases` (name, search on) at `rate_hz`: `timed_s` seconds of data after 40 s of warm-up.
fn group(c: &mut Criterion, name: &str, rate_hz: f64, timed_s: i64, cases: &[(&str, bool)]) {
    let warm = batches(1, rate_hz, T0, T0 + 40 * S, 1);
    let next = warm.last().map_or(1, |b| b.seq + 1);
    let timed = batches(2, rate_hz, T0 + 40 * S, T0 + (40 + timed_s) * S, next);
    let n: usize = timed.iter().map(|b| b.time_gps_ns.len()).sum();
    let mut g = c.benchmark_group(name);
    g.throughput(Throughput::Elements(n as u64));
    g.sample_size(10);
    for &(case, search) in cases {
        g.bench_function(case, |bch| {
            bch.iter_batched(
                || {
                    let mut e = Engine::new(config(search)).unwrap();
                    let mut out = Vec::new();
                    for b in &warm {
                        e.push_batch(b, &mut out).unwrap();
                    }
                    e
                },
                |mut e| {
                    let mut out = Vec::new();
                    for b in &timed {
                        e.push_batch(b, &mut out).unwrap();
                    }
                    (e, out)
                },
                BatchSize::PerIteration,
            );
        });
    }
    g.finish();
}

fn bench(c: &mut Criterion) {
    group(
        c,
        "engine_1khz",
        1000.0,
        60,
        &[("full_search", true), ("no_search", false)],
    );
    group(c, "engine_20khz", 20_000.0, 10, &[("full_search", true)]);
}

criterion_group!(benches, bench);
criterion_main!(benches);
