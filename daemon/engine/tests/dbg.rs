mod common;
use common::*;
use glint_engine::Engine;
#[test]
fn dbg() {
    let mut r = rng(11);
    let sigma = 0.5 / 1.515;
    for trial in 0..40 {
        let mut ph = cluster(&mut r, 259.0, 80.0, sigma, 10, T0 + 100 * S, S / 100);
        let mut close = 0;
        let c = ph.clone();
        for a in &c {
            let n = c
                .iter()
                .filter(|b| angle_deg(a.ra, a.dec, b.ra, b.dec) <= 0.5)
                .count();
            close = close.max(n);
        }
        ph.extend(background(&mut r, 100.0, T0, T0 + 200 * S));
        sort(&mut ph);
        let mut e = Engine::new(config(1.0)).unwrap();
        let mut out = Vec::new();
        feed(&mut e, &ph, S / 10, T0 + 200 * S, &mut out, 1);
        let s = e.stats();
        eprintln!(
            "trial {trial}: flashes {} max-in-disc {close} crossings {:?}",
            flashes(&out).len(),
            s.crossings
        );
    }
}
