//! False-alarm rates that mean what they say (docs/science.md section 4): the effective trials measured on
//! simulated background with `trials::TrialsMeter`, then the calibrated search on independent background
//! gives flashes at the configured rate, and each flash's `far_per_year` matches the rate of flashes as
//! rare. The full-size run is `glint calibrate --verify` (README).
#![allow(missing_docs)]
#![allow(clippy::unwrap_used)] // tests may unwrap

mod common;
use common::*;
use glint_engine::trials::{TrialsMeter, measuring_config};
use glint_engine::{Engine, Finding, SECONDS_PER_YEAR};

const RATE_HZ: f64 = 300.0;
const CHUNK: i64 = 600 * S;

/// Runs `engine` over `hours` of background from `seed`, generated ten minutes at a time; returns the
/// findings.
fn run(engine: &mut Engine, hours: i64, seed: u64, mut keep: impl FnMut(&Finding)) {
    let mut r = rng(seed);
    let mut seq = 1;
    let end = T0 + hours * 3600 * S;
    let mut t = T0;
    while t < end {
        let ph = background(&mut r, RATE_HZ, t, t + CHUNK);
        let mut out = Vec::new();
        seq = feed(engine, &ph, S / 10, t + CHUNK, &mut out, seq);
        out.iter().for_each(&mut keep);
        t += CHUNK;
    }
    let mut out = Vec::new();
    engine.finish(&mut out);
    out.iter().for_each(&mut keep);
}

#[test]
fn calibrated_false_alarm_rate_matches_the_configured_one() {
    let loose = 1e7;
    let base = config(1.0);
    let mut engine = Engine::new(measuring_config(&base, loose)).unwrap();
    let mut meter = TrialsMeter::new();
    run(&mut engine, 2, 41, |f| meter.observe(f));
    let cal = meter
        .calibration(&base, &engine.stats(), loose, 20, "test background")
        .unwrap();
    // Overlapping windows and discs, and the integer thresholds, leave far fewer real trials than K R.
    for p in &cal.points {
        assert!(p.fraction < 0.5, "{p:?}");
    }

    let far = 1e6;
    let mut c = base.clone();
    c.far_per_year = far;
    c.trials = Some(cal);
    let mut engine = Engine::new(c).unwrap();
    let mut fars = Vec::new();
    run(&mut engine, 2, 42, |f| {
        if let Finding::Flash(fl) = f {
            fars.push(fl.far_per_year);
        }
    });
    let live_yr = engine.stats().live_ns as f64 * 1e-9 / SECONDS_PER_YEAR;
    let expected = far * live_yr;
    let n = fars.len() as f64;
    println!("{n} flashes where {expected:.1} expected at {far}/yr");
    // Poisson sd of ~230 flashes is 6.6%, the calibration's own noise about 8% (~170 candidates at the
    // level); the factor 1.5 band is more than 4 combined sd wide on each side (computed).
    assert!(
        n / expected > 1.0 / 1.5 && n / expected < 1.5,
        "{n} flashes, {expected:.1} expected"
    );
    // The alerts' own rates: flashes reporting far_per_year <= F' come at the rate F' (F' = F / 2: about 115
    // expected, sd 9%; the same band).
    let half = far / 2.0;
    let k = fars.iter().filter(|&&f| f <= half).count() as f64;
    let expected_half = half * live_yr;
    println!("{k} flashes with far_per_year <= {half} where {expected_half:.1} expected");
    assert!(
        k / expected_half > 1.0 / 1.5 && k / expected_half < 1.5,
        "{k} flashes at far <= {half}, {expected_half:.1} expected"
    );
}
