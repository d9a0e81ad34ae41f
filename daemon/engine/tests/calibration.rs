//! Calibration of the trigger on background only: the number of distinct candidates per timescale must agree
//! with the engine's own prediction, the sum over tested seeds of P(N >= n*(b) - 1 | b) (docs/science.md
//! section 4), and at the design false-alarm rate of one per year an hour of background gives nothing.
#![allow(missing_docs)]
#![allow(clippy::unwrap_used)] // tests may unwrap

mod common;
use common::*;
use glint_engine::{Engine, EngineStats, Finding};
use glint_science::poisson::{ln_cdf, ln_sf};

/// One-sided 3-sigma tail probability, Phi(-3) (docs/science.md section 3 check value).
const TAIL_3SIGMA: f64 = 1.349_898e-3;

fn run(far_per_year: f64, ph: &[Ph], end: i64) -> (EngineStats, Vec<Finding>) {
    let mut e = Engine::new(config(far_per_year)).unwrap();
    let mut out = Vec::new();
    feed(&mut e, ph, S / 10, end, &mut out, 1);
    e.finish(&mut out);
    (e.stats(), out)
}

/// True when `observed` is within 3 standard deviations of a Poisson count of mean `predicted`, judged by
/// the exact Poisson tails at the 3-sigma one-sided probability.
fn within_3_sigma(observed: u64, predicted: f64) -> bool {
    let upper = ln_sf(observed, predicted); // P(N >= observed)
    let lower = if observed == 0 {
        0.0
    } else {
        ln_cdf(observed, predicted)
    }; // P(N <= observed)
    upper > TAIL_3SIGMA.ln() && lower > TAIL_3SIGMA.ln()
}

#[test]
fn background_candidates_match_the_predicted_false_crossings() {
    // One hour at 300 Hz, cos^2 zenith acceptance inside 45 degrees, uniform in azimuth.
    let mut r = rng(7);
    let end = T0 + 3600 * S;
    let ph = background(&mut r, 300.0, T0, end);
    // Threshold lowered to 1e7 per year (about 1100 per hour over 8 timescales, less after the counts'
    // discreteness) so dozens of false triggers are expected; and the design rate of one per year.
    let ((low, low_out), (design, design_out)) = std::thread::scope(|s| {
        let a = s.spawn(|| run(1e7, &ph, end));
        let b = s.spawn(|| run(1.0, &ph, end));
        (a.join().unwrap(), b.join().unwrap())
    });

    let predicted_total: f64 = low.predicted_false_crossings.iter().sum();
    eprintln!(
        "candidates per timescale {:?}\npredicted false crossings {:.1?}\ncrossings {:?}",
        low.candidates_per_timescale, low.predicted_false_crossings, low.crossings
    );
    assert!(
        predicted_total > 100.0,
        "the lowered threshold should predict dozens, got {predicted_total}"
    );
    for k in 0..low.tests.len() {
        let (obs, pred) = (low.candidates_per_timescale[k], low.predicted_false_crossings[k]);
        assert!(
            within_3_sigma(obs, pred),
            "timescale {k}: {obs} distinct candidates, {pred:.2} predicted false crossings"
        );
        assert!(low.crossings[k] >= obs, "every candidate's timescale crossed");
        assert!(
            low.tests[k] > 900_000,
            "timescale {k}: only {} tests",
            low.tests[k]
        );
    }
    // Summed over timescales (a fluctuation crossing on two timescales is one candidate but counts on both).
    let per_timescale: u64 = low.candidates_per_timescale.iter().sum();
    assert!(
        within_3_sigma(per_timescale, predicted_total),
        "{per_timescale} candidate-timescales, {predicted_total:.1} predicted"
    );
    assert!(low.candidates <= per_timescale && low.candidates * 10 >= per_timescale * 7);
    let flashes = flashes(&low_out).len() as u64;
    assert_eq!(flashes, low.candidates, "one flash per candidate");
    assert_eq!(
        assessments(&low_out).len() as u64,
        low.candidates,
        "every candidate is assessed"
    );

    // At one per year: an hour of background predicts about 1e-4 false triggers.
    let predicted_design: f64 = design.predicted_false_crossings.iter().sum();
    assert!(predicted_design < 0.01, "{predicted_design}");
    assert_eq!(design.candidates, 0);
    assert!(
        design_out.is_empty(),
        "no finding at the design rate: {design_out:?}"
    );
    assert_eq!(
        design.tests, low.tests,
        "the same seeds are tested whatever the threshold"
    );
}
