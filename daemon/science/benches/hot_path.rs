//! The trigger's hot path in glint-science: the critical-count lookup done once per seed and timescale,
//! and the Poisson tail computed once per crossing (for the alert's p-value).

use std::hint::black_box;

use criterion::{Criterion, Throughput, criterion_group, criterion_main};
use glint_science::critical::CriticalTable;
use glint_science::poisson;

fn critical_lookup(c: &mut Criterion) {
    // Bound of a 250 Hz array, 8 timescales, 1 false alarm per year.
    let table = CriticalTable::new(1.58e-11, 1e-6, 1e4, 100).expect("table");
    let bs: Vec<f64> = (0..1024).map(|i| 1e-5 * 1.0137_f64.powi(i)).collect();
    let mut g = c.benchmark_group("critical");
    g.bench_function("one_lookup", |b| b.iter(|| table.critical(black_box(0.0371))));
    g.throughput(Throughput::Elements(bs.len() as u64));
    g.bench_function("1024_lookups_spread", |b| {
        b.iter(|| {
            bs.iter()
                .map(|&x| table.critical(black_box(x)))
                .fold(0_u32, u32::wrapping_add)
        })
    });
    g.finish();
}

fn ln_sf(c: &mut Criterion) {
    let mut g = c.benchmark_group("ln_sf");
    for &(n, b) in &[
        (3_u64, 0.01),
        (8, 0.04),
        (20, 2.0),
        (60, 30.0),
        (1000, 900.0),
        (5, 40.0),
    ] {
        g.bench_function(format!("n{n}_b{b}"), |bench| {
            bench.iter(|| poisson::ln_sf(black_box(n), black_box(b)))
        });
    }
    g.bench_function("sigma_from_ln_p(-50)", |bench| {
        bench.iter(|| poisson::sigma_from_ln_p(black_box(-50.0)))
    });
    g.finish();
}

criterion_group!(benches, critical_lookup, ln_sf);
criterion_main!(benches);
