mod common;
use common::*;
use glint_engine::Engine;

#[test]
fn probe() {
    let mut r = rng(7);
    let ph = background(&mut r, 300.0, T0, T0 + 3600 * S);
    for far in [1e7, 3e7] {
        let mut e = Engine::new(config(far)).unwrap();
        let mut out = Vec::new();
        let t = std::time::Instant::now();
        feed(&mut e, &ph, S / 10, T0 + 3600 * S, &mut out, 1);
        e.finish(&mut out);
        let s = e.stats();
        eprintln!("far {far}: {:?}", t.elapsed());
        eprintln!("crossings {:?}\ncands {:?}\npred {:?}\ncands {} flashes {}", s.crossings, s.candidates_per_timescale, s.predicted_false_crossings, s.candidates, s.flashes);
    }
}
