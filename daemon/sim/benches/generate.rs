//! Simulator throughput: photons generated and framed per second on the stress scenario's 20 kHz
//! background (deploy/scenarios/stress-20khz.toml), two seconds of event time per iteration.

#![allow(missing_docs, clippy::unwrap_used)]

use std::path::Path;

use criterion::{Criterion, Throughput, criterion_group, criterion_main};
use glint_sim::{Simulator, load_scenario};
use glint_wire::pb::producer_frame::Body;

fn generate(c: &mut Criterion) {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("../../deploy/scenarios/stress-20khz.toml");
    let scenario = load_scenario(&path).unwrap();
    let stop = scenario.start_gps_ns + 2_000_000_000;
    let run = || {
        let mut photons = 0_u64;
        for f in Simulator::new(&scenario, 7).unwrap() {
            match f.body {
                Some(Body::Batch(b)) => photons += b.time_gps_ns.len() as u64,
                Some(Body::Status(s)) if s.now_gps_ns >= stop => break,
                _ => {}
            }
        }
        photons
    };
    let per_iter = run();
    let mut group = c.benchmark_group("simulate");
    group.throughput(Throughput::Elements(per_iter));
    group.sample_size(20);
    group.bench_function("stress_20khz_2s", |b| b.iter(run));
    group.finish();
}

criterion_group!(benches, generate);
criterion_main!(benches);
