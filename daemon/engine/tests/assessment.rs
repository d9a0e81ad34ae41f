//! Verdict rules of the assessment, one scenario each: a clean burst is isolated, a burst with a tail is
//! persistent, identical timestamps and an all-sky jump are instrumental (and withdrawn), dead time in the
//! persistence window or input ending before it closes leave the verdict undecided.
#![allow(missing_docs)]
#![allow(clippy::unwrap_used)] // tests may unwrap

mod common;
use common::*;
use glint_engine::{Assessment, Engine, Finding, Verdict};
use glint_wire::pb::{DeadInterval, StreamStatus};

const BURST_AT: i64 = T0 + 60 * S;
const END: i64 = T0 + 260 * S;
const RA: f64 = 40.0;
const DEC: f64 = 70.0;

fn base(seed: u64) -> Vec<Ph> {
    base_until(seed, END)
}

fn base_until(seed: u64, end: i64) -> Vec<Ph> {
    let mut r = rng(seed);
    let mut ph = background(&mut r, 100.0, T0, end);
    ph.extend(cluster(&mut r, RA, DEC, 0.2, 20, BURST_AT, S / 10));
    ph
}

fn run(ph: Vec<Ph>) -> Vec<Finding> {
    run_until(ph, END)
}

fn run_until(mut ph: Vec<Ph>, end: i64) -> Vec<Finding> {
    sort(&mut ph);
    let mut e = Engine::new(config(1.0)).unwrap();
    let mut out = Vec::new();
    feed(&mut e, &ph, S / 10, end, &mut out, 1);
    e.finish(&mut out);
    out
}

/// The assessment of the candidate at the burst's position.
fn burst_assessment(out: &[Finding]) -> &Assessment {
    let a: Vec<_> = assessments(out)
        .into_iter()
        .filter(|a| angle_deg(a.trigger.ra_deg, a.trigger.dec_deg, RA, DEC) < 1.0)
        .collect();
    assert_eq!(a.len(), 1, "{out:?}");
    a[0]
}

fn withdrawn(out: &[Finding], candidate: u64) -> bool {
    out.iter()
        .any(|f| matches!(f, Finding::Withdrawal(w) if w.candidate == candidate))
}

#[test]
fn a_clean_burst_is_isolated() {
    let out = run(base(1));
    let a = burst_assessment(&out);
    assert_eq!(a.verdict, Verdict::Isolated, "{a:?}");
    assert!(a.post_sigma < 3.0 && a.pre_sigma < 3.0);
    assert!(a.post_background > 0.0 && a.pre_background > 0.0);
    assert!(a.identical_time_fraction < 0.5 && a.spread_ratio < 2.5);
    assert!(!withdrawn(&out, a.candidate));
    // The flash came first, then its assessment.
    let fi = out
        .iter()
        .position(|f| matches!(f, Finding::Flash(f) if f.candidate == a.candidate))
        .unwrap();
    let ai = out
        .iter()
        .position(|f| matches!(f, Finding::Assessment(x) if x.candidate == a.candidate))
        .unwrap();
    assert!(fi < ai);
    assert!(
        a.trigger.p_value
            <= out
                .iter()
                .find_map(|f| match f {
                    Finding::Flash(f) if f.candidate == a.candidate => Some(f.p_value),
                    _ => None,
                })
                .unwrap(),
        "the assessment carries the best trigger"
    );
}

#[test]
fn a_tail_after_the_burst_is_persistent() {
    let mut r = rng(2);
    // Long enough for the longest persistence window: the tail makes the 30 s timescale the best trigger,
    // so the window lasts 10 x 30 s.
    let end = BURST_AT + 420 * S;
    let mut ph = base_until(2, end);
    // One photon per second from the same point for two minutes after the burst.
    for i in 0..120 {
        ph.extend(cluster(&mut r, RA, DEC, 0.2, 1, BURST_AT + S + i * S, S));
    }
    let out = run_until(ph, end);
    let a = burst_assessment(&out);
    assert_eq!(a.verdict, Verdict::Persistent, "{a:?}");
    assert!(a.post_sigma > 3.0 && a.flags.iter().any(|f| f == "post_excess"));
    assert!(a.post_counts as f64 > 5.0 * a.post_background);
    assert!(!withdrawn(&out, a.candidate));
}

#[test]
fn identical_timestamps_are_instrumental_and_withdrawn() {
    let mut r = rng(3);
    let mut ph = background(&mut r, 100.0, T0, END);
    let mut burst = cluster(&mut r, RA, DEC, 0.2, 20, BURST_AT, S / 10);
    for p in &mut burst {
        p.t = BURST_AT + 12_345;
    }
    ph.extend(burst);
    let out = run(ph);
    let a = burst_assessment(&out);
    assert_eq!(a.verdict, Verdict::Instrumental, "{a:?}");
    assert!(a.identical_time_fraction > 0.9);
    assert!(a.flags.iter().any(|f| f == "identical_timestamps"));
    assert!(withdrawn(&out, a.candidate));
    let w = out.iter().find_map(|f| match f {
        Finding::Withdrawal(w) => Some(w),
        _ => None,
    });
    assert!(w.unwrap().reason.contains("identical_timestamps"));
}

#[test]
fn an_all_sky_jump_is_instrumental() {
    let mut r = rng(4);
    let mut ph = base(4);
    // 3000 extra photons all over the field within the burst's 0.1 s: the all-sky rate jumps 300-fold.
    for i in 0..3000 {
        ph.push(background_photon(&mut r, BURST_AT + i * (S / 10) / 3000));
    }
    let out = run(ph);
    let a = burst_assessment(&out);
    assert_eq!(a.verdict, Verdict::Instrumental, "{a:?}");
    assert!(a.flags.iter().any(|f| f == "all_sky_jump"));
    assert!(a.all_sky_counts as f64 > 50.0 * a.all_sky_expected);
    assert!(withdrawn(&out, a.candidate));
    // Every candidate the jump made is instrumental too.
    for x in assessments(&out) {
        if x.trigger.end_ns >= BURST_AT && x.trigger.start_ns <= BURST_AT + S / 10 {
            assert_eq!(x.verdict, Verdict::Instrumental, "{x:?}");
            assert!(withdrawn(&out, x.candidate));
        }
    }
}

#[test]
fn dead_time_in_the_persistence_window_leaves_it_undecided() {
    let ph = base(5);
    let dead_from = BURST_AT + 2 * S;
    let dead_to = BURST_AT + 40 * S;
    let (mut before, mut after): (Vec<Ph>, Vec<Ph>) = ph
        .into_iter()
        .filter(|p| p.t < dead_from || p.t >= dead_to)
        .partition(|p| p.t < dead_from);
    sort(&mut before);
    sort(&mut after);
    let mut e = Engine::new(config(1.0)).unwrap();
    let mut out = Vec::new();
    let seq = feed(&mut e, &before, S / 10, dead_from, &mut out, 1);
    let st = StreamStatus {
        seq,
        now_gps_ns: dead_to,
        dead: vec![DeadInterval {
            start_gps_ns: dead_from,
            end_gps_ns: dead_to,
            reason: "calibration".into(),
        }],
    };
    e.push_status(&st, &mut out).unwrap();
    feed(&mut e, &after, S / 10, END, &mut out, seq + 1);
    e.finish(&mut out);
    let a = burst_assessment(&out);
    assert_eq!(a.verdict, Verdict::Undecided, "{a:?}");
    assert!(a.flags.iter().any(|f| f == "dead_time"));
    assert!(a.dead_seconds > 3.0, "{}", a.dead_seconds);
    assert!(!withdrawn(&out, a.candidate));
}

#[test]
fn input_ending_inside_the_persistence_window_leaves_it_undecided() {
    let mut ph = base(6);
    ph.retain(|p| p.t < BURST_AT + 10 * S);
    sort(&mut ph);
    let mut e = Engine::new(config(1.0)).unwrap();
    let mut out = Vec::new();
    feed(&mut e, &ph, S / 10, BURST_AT + 10 * S, &mut out, 1);
    assert_eq!(assessments(&out).len(), 0, "still open");
    assert_eq!(e.stats().open_candidates, 1);
    e.finish(&mut out);
    let a = burst_assessment(&out);
    assert_eq!(a.verdict, Verdict::Undecided, "{a:?}");
    assert!(a.flags.iter().any(|f| f == "cut_short"));
    assert_eq!(e.stats().open_candidates, 0);
}

#[test]
fn the_fit_sees_the_burst() {
    let out = run(base(7));
    let a = burst_assessment(&out);
    // 20 photons in 0.1 s on about 1.5 background photons over the fit window: the fit must find the burst
    // and put the explosion at its end (the photons were drawn uniformly over the 0.1 s).
    assert!(a.fit.converged, "{:?}", a.fit);
    assert!(a.fit.signal_counts > 10.0, "{:?}", a.fit);
    assert!(
        a.fit.explosion_ns >= BURST_AT && a.fit.explosion_ns <= BURST_AT + S / 5,
        "{:?}",
        a.fit
    );
    assert!(a.fit.distance_pc_lo <= a.fit.distance_pc && a.fit.distance_pc <= a.fit.distance_pc_hi);
}
