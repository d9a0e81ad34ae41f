mod common;
use common::*;
use glint_engine::Engine;

#[test]
fn smoke() {
    let mut r = rng(1);
    let mut ph = background(&mut r, 300.0, T0, T0 + 300 * S);
    ph.extend(cluster(&mut r, 30.0, 70.0, 0.5 / 1.515, 12, T0 + 200 * S, S / 10));
    sort(&mut ph);
    let mut e = Engine::new(config(1.0)).unwrap();
    let mut out = Vec::new();
    let t = std::time::Instant::now();
    feed(&mut e, &ph, S / 10, T0 + 300 * S, &mut out, 1);
    e.finish(&mut out);
    eprintln!("{:?} for {} photons", t.elapsed(), ph.len());
    eprintln!("{:#?}", e.stats());
    for f in &out { eprintln!("{f:?}"); }
}
