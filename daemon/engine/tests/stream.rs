//! The engine's handling of the stream itself: order independence, late photons, dead time (declared, from
//! sequence gaps and from stream breaks), clock jumps, the saved acceptance map, the warm-up rule, malformed
//! frames and the no-search mode.
#![allow(missing_docs)]
#![allow(clippy::unwrap_used)] // tests may unwrap

mod common;
use common::*;
use glint_engine::{Engine, EngineError, Finding};
use glint_wire::pb::{DeadInterval, StreamStatus};
use rand::RngExt;

const TOL: i64 = 20_000_000; // the default reorder tolerance, 20 ms

fn run_sorted(cfg: glint_engine::EngineConfig, ph: &[Ph], end: i64) -> (Engine, Vec<Finding>) {
    let mut e = Engine::new(cfg).unwrap();
    let mut out = Vec::new();
    feed(&mut e, ph, S / 10, end, &mut out, 1);
    e.finish(&mut out);
    (e, out)
}

fn scene(seed: u64) -> (Vec<Ph>, i64) {
    let mut r = rng(seed);
    let end = T0 + 200 * S;
    let mut ph = background(&mut r, 200.0, T0, end);
    ph.extend(cluster(&mut r, 40.0, 70.0, 0.3, 20, T0 + 70 * S, S / 10));
    ph.extend(cluster(&mut r, 200.0, 60.0, 0.3, 30, T0 + 120 * S, 2 * S));
    sort(&mut ph);
    (ph, end)
}

#[test]
fn findings_do_not_depend_on_batching_within_the_reorder_tolerance() {
    let (ph, end) = scene(3);
    let (a, fa) = run_sorted(config(1.0), &ph, end);
    assert!(
        flashes(&fa).len() >= 2 && assessments(&fa).len() >= 2,
        "the scene must give findings: {fa:?}"
    );

    // Arrival order: each photon delayed by up to half the tolerance, then cut into batches of random size.
    let mut r = rng(99);
    let mut arrival: Vec<(i64, Ph)> = ph
        .iter()
        .map(|p| (p.t + r.random_range(0..TOL / 2), *p))
        .collect();
    arrival.sort_by_key(|x| x.0);
    let mut e = Engine::new(config(1.0)).unwrap();
    let mut fb = Vec::new();
    let mut seq = 1;
    let mut i = 0;
    while i < arrival.len() {
        let n = r.random_range(1..400).min(arrival.len() - i);
        let chunk: Vec<Ph> = arrival[i..i + n].iter().map(|x| x.1).collect();
        e.push_batch(&batch(seq, &chunk), &mut fb).unwrap();
        seq += 1;
        i += n;
    }
    e.push_status(&status(seq, end), &mut fb).unwrap();
    e.finish(&mut fb);
    assert_eq!(e.stats().late, 0);
    assert_eq!(e.stats().released, a.stats().released);
    assert_eq!(
        fa, fb,
        "same photons, other batching: the findings must be identical"
    );
    assert_eq!(e.stats().tests, a.stats().tests);
    assert_eq!(
        e.stats().predicted_false_crossings,
        a.stats().predicted_false_crossings
    );
}

#[test]
fn the_same_frames_give_the_same_findings() {
    let (ph, end) = scene(5);
    let (_, a) = run_sorted(config(1.0), &ph, end);
    let (_, b) = run_sorted(config(1.0), &ph, end);
    assert!(!a.is_empty());
    assert_eq!(a, b);
}

#[test]
fn late_photons_are_counted_and_dropped() {
    let mut e = Engine::new(config(1.0)).unwrap();
    let mut out = Vec::new();
    let mut r = rng(1);
    let ph = background(&mut r, 100.0, T0, T0 + 10 * S);
    e.push_batch(&batch(1, &ph), &mut out).unwrap();
    let latest = ph.last().unwrap().t;
    assert_eq!(e.watermark_ns(), Some(latest - TOL));
    let released = e.stats().released;
    let mut old = background_photon(&mut r, latest - TOL - 1);
    let at_watermark = background_photon(&mut r, latest - TOL);
    old.t = latest - 5 * S;
    let mut late = background_photon(&mut r, latest - TOL - 1);
    late.t = latest - TOL - 1;
    e.push_batch(&batch(2, &[old, late, at_watermark]), &mut out)
        .unwrap();
    let s = e.stats();
    assert_eq!(s.late, 2, "photons behind the watermark are late");
    assert_eq!(s.photons_in, ph.len() as u64 + 3);
    assert_eq!(s.released, released, "nothing new passed the watermark");
    e.finish(&mut out);
    assert_eq!(
        e.stats().released,
        ph.len() as u64 + 1,
        "the photon at the watermark was kept"
    );
}

/// A cluster split by a 0.2 s gap: 4 photons before, 4 after, all at one point. Either half alone is below
/// threshold on every timescale; together they cross on the 1 s timescale.
fn split_cluster() -> (Vec<Ph>, Vec<Ph>, i64, i64) {
    let mut r = rng(21);
    let gap_start = T0 + 80 * S;
    let gap_end = gap_start + S / 5;
    let end = T0 + 120 * S;
    let mut before: Vec<Ph> = background(&mut r, 100.0, T0, gap_start);
    let mut after: Vec<Ph> = background(&mut r, 100.0, gap_end, end);
    let (ra, dec) = (100.0, 75.0);
    let (zen, az) = to_frame(ra, dec);
    let spot = |t: i64| Ph {
        t,
        ra,
        dec,
        zen,
        az,
        e: 500.0,
    };
    for i in 0..4 {
        before.push(spot(gap_start - S / 4 + i * S / 20));
        after.push(spot(gap_end + S / 20 + i * S / 20));
    }
    sort(&mut before);
    sort(&mut after);
    (before, after, gap_start, gap_end)
}

#[test]
fn windows_spanning_dead_time_are_not_tested() {
    let (before, after, gap_start, gap_end) = split_cluster();
    let end = T0 + 120 * S;
    let mut all = before.clone();
    all.extend(after.iter().copied());

    // Control: no dead time declared, the joined cluster crosses.
    let (ctrl, ctrl_out) = run_sorted(config(1.0), &all, end);
    assert_eq!(flashes(&ctrl_out).len(), 1, "{ctrl_out:?}");
    assert_eq!(ctrl.stats().dead_ns, 0);

    // Declared dead interval.
    let mut e = Engine::new(config(1.0)).unwrap();
    let mut out = Vec::new();
    let seq = feed(&mut e, &before, S / 10, gap_start, &mut out, 1);
    let dead = StreamStatus {
        seq,
        now_gps_ns: gap_end,
        dead: vec![DeadInterval {
            start_gps_ns: gap_start,
            end_gps_ns: gap_end,
            reason: "readout stop".into(),
        }],
    };
    e.push_status(&dead, &mut out).unwrap();
    feed(&mut e, &after, S / 10, end, &mut out, seq + 1);
    e.finish(&mut out);
    let s = e.stats();
    assert!(
        flashes(&out).is_empty(),
        "a window across dead time was tested: {out:?}"
    );
    assert_eq!(s.dead_ns, gap_end - gap_start);
    assert!(
        s.skipped_dead.iter().skip(3).all(|&n| n > 0),
        "{:?}",
        s.skipped_dead
    );
    assert!(s.tests.iter().zip(&ctrl.stats().tests).all(|(a, b)| a < b));
    assert!((s.live_ns - ctrl.stats().live_ns + s.dead_ns).abs() < S / 10);

    // The same gap as a jump in the batch sequence numbers.
    let mut e = Engine::new(config(1.0)).unwrap();
    let mut out = Vec::new();
    let seq = feed(&mut e, &before, S / 10, gap_start - 1, &mut out, 1);
    feed(&mut e, &after, S / 10, end, &mut out, seq + 5);
    e.finish(&mut out);
    let s = e.stats();
    assert!(flashes(&out).is_empty(), "{out:?}");
    assert_eq!(s.seq_gaps, 1);
    let last_before = before.last().unwrap().t.max(gap_start - 1);
    assert_eq!(s.dead_ns, after[0].t - (last_before + 1));

    // The same gap as a stream break (the producer reconnects and starts its sequence again).
    let mut e = Engine::new(config(1.0)).unwrap();
    let mut out = Vec::new();
    feed(&mut e, &before, S / 10, gap_start - 1, &mut out, 1);
    e.stream_break();
    feed(&mut e, &after, S / 10, end, &mut out, 1);
    e.finish(&mut out);
    let s = e.stats();
    assert!(flashes(&out).is_empty(), "{out:?}");
    assert_eq!((s.stream_breaks, s.seq_gaps), (1, 0));
    assert_eq!(s.dead_ns, after[0].t - (last_before + 1));
}

#[test]
fn a_clock_jump_is_refused_and_changes_nothing() {
    let mut e = Engine::new(config(1.0)).unwrap();
    let mut out = Vec::new();
    let mut r = rng(4);
    let ph = background(&mut r, 100.0, T0, T0 + 40 * S);
    let seq = feed(&mut e, &ph, S / 10, T0 + 40 * S, &mut out, 1);
    let before = e.stats();
    let wm = e.watermark_ns();
    let jump = T0 + 40 * S + 2 * 3600 * S; // two hours ahead; the limit is one
    let far = [background_photon(&mut r, jump)];
    match e.push_batch(&batch(seq, &far), &mut out) {
        Err(EngineError::ClockJump {
            seq: s,
            time_ns,
            limit_ns,
            ..
        }) => {
            assert_eq!((s, time_ns, limit_ns), (seq, jump, 3600 * S));
        }
        other => panic!("expected a clock jump, got {other:?}"),
    }
    let err = e.push_status(&status(seq, jump), &mut out).unwrap_err();
    assert!(err.to_string().contains("clock jump"), "{err}");
    let after = e.stats();
    assert_eq!(after.refused_clock_jump, 2);
    assert_eq!(EngineStatsNoRefusals(after), EngineStatsNoRefusals(before));
    assert_eq!(e.watermark_ns(), wm);
    assert!(out.is_empty());
    // The stream goes on as if nothing had come.
    let next = background(&mut r, 100.0, T0 + 40 * S, T0 + 41 * S);
    e.push_batch(&batch(seq, &next), &mut out).unwrap();
    assert_eq!(e.stats().seq_gaps, 0);
    // After a stream break the next frame may start anywhere; the gap is dead time.
    e.stream_break();
    e.push_batch(&batch(1, &far), &mut out).unwrap();
    assert!(e.stats().dead_ns >= jump - (T0 + 41 * S) - S);
}

/// Stats with the refusal counter left out, for "nothing else changed" comparisons.
#[derive(Debug)]
struct EngineStatsNoRefusals(glint_engine::EngineStats);
impl PartialEq for EngineStatsNoRefusals {
    fn eq(&self, other: &Self) -> bool {
        let mut a = self.0.clone();
        let mut b = other.0.clone();
        a.refused_clock_jump = 0;
        b.refused_clock_jump = 0;
        a == b
    }
}

fn learn_only(warmup: u64) -> glint_engine::EngineConfig {
    let mut c = config(1.0);
    c.acceptance_prior_cos_power = None;
    c.warmup_photons = warmup;
    c
}

#[test]
fn warm_up_waits_for_the_acceptance_map_unless_a_prior_or_saved_map_is_given() {
    let mut r = rng(8);
    let end = T0 + 200 * S;
    let mut ph = background(&mut r, 100.0, T0, end);
    let early = T0 + 60 * S;
    let late = T0 + 170 * S;
    ph.extend(cluster(&mut r, 10.0, 70.0, 0.2, 25, early, S / 10));
    ph.extend(cluster(&mut r, 190.0, 70.0, 0.2, 25, late, S / 10));
    sort(&mut ph);

    // 15000 photons of weight take about 150 s at 100 Hz: the early cluster falls in the warm-up.
    let (e, out) = run_sorted(learn_only(15_000), &ph, end);
    let f = flashes(&out);
    assert_eq!(f.len(), 1, "{f:?}");
    assert!(f[0].start_ns > early + S, "only the late cluster triggers");
    let s = e.stats();
    assert!(s.warm);
    assert!(
        s.seeds_warmup > 14_000 && s.seeds_warmup < 16_500,
        "{}",
        s.seeds_warmup
    );

    // With the prior, both clusters trigger.
    let (_, out) = run_sorted(config(1.0), &ph, end);
    assert_eq!(flashes(&out).len(), 2);

    // With a saved map, both trigger too.
    let blob = e.save_state();
    let mut loaded = Engine::new(learn_only(15_000)).unwrap();
    loaded.load_state(&blob).unwrap();
    assert_eq!(loaded.save_state(), blob, "save(load(blob)) == blob");
    let mut out = Vec::new();
    feed(&mut loaded, &ph, S / 10, end, &mut out, 1);
    loaded.finish(&mut out);
    assert_eq!(flashes(&out).len(), 2);
    assert!(
        loaded.stats().seeds_warmup < 7_000,
        "only the rate window's first half waits"
    );
}

#[test]
fn corrupt_or_foreign_state_is_an_error_and_changes_nothing() {
    let mut r = rng(9);
    let ph = background(&mut r, 100.0, T0, T0 + 60 * S);
    let (e, _) = run_sorted(learn_only(100), &ph, T0 + 60 * S);
    let blob = e.save_state();
    let mut fresh = Engine::new(learn_only(1_000_000)).unwrap();
    let reference = fresh.save_state();
    for i in [0, 9, 20, blob.len() / 2, blob.len() - 1] {
        let mut bad = blob.clone();
        bad[i] ^= 0x40;
        assert!(
            matches!(fresh.load_state(&bad), Err(EngineError::State(_))),
            "byte {i} flipped"
        );
    }
    assert!(fresh.load_state(&blob[..blob.len() - 1]).is_err(), "truncated");
    assert!(fresh.load_state(&[]).is_err(), "empty");
    let mut other_cfg = learn_only(100);
    other_cfg.instrument = "other-array".into();
    let mut other = Engine::new(other_cfg).unwrap();
    let err = other.load_state(&blob).unwrap_err();
    assert!(err.to_string().contains("test-array"), "{err}");
    assert_eq!(
        fresh.save_state(),
        reference,
        "failed loads leave the map as it was"
    );
    assert!(!fresh.stats().warm);
}

#[test]
fn malformed_frames_are_refused_whole() {
    let mut e = Engine::new(config(1.0)).unwrap();
    let mut out = Vec::new();
    let mut r = rng(2);
    let ph = background(&mut r, 100.0, T0, T0 + S);
    let mut b = batch(1, &ph);
    b.dec_deg.pop();
    let err = e.push_batch(&b, &mut out).unwrap_err();
    assert!(err.to_string().contains("dec_deg"), "{err}");
    let mut b = batch(1, &ph);
    b.dec_deg[3] = f64::NAN;
    assert!(matches!(
        e.push_batch(&b, &mut out),
        Err(EngineError::InvalidFrame { seq: 1, .. })
    ));
    let bad_status = StreamStatus {
        seq: 1,
        now_gps_ns: T0,
        dead: vec![DeadInterval {
            start_gps_ns: T0 + 5,
            end_gps_ns: T0,
            reason: String::new(),
        }],
    };
    assert!(e.push_status(&bad_status, &mut out).is_err());
    let s = e.stats();
    assert_eq!((s.photons_in, s.refused_invalid), (0, 3));
    assert_eq!(e.watermark_ns(), None);
    e.push_batch(&batch(1, &[]), &mut out).unwrap();
    e.push_batch(&batch(2, &ph), &mut out).unwrap();
    assert_eq!(e.stats().photons_in, ph.len() as u64);
}

#[test]
fn no_search_mode_only_reorders() {
    let (ph, end) = scene(6);
    let mut cfg = config(1.0);
    cfg.search_enabled = false;
    let (e, out) = run_sorted(cfg, &ph, end);
    assert!(out.is_empty());
    let s = e.stats();
    assert_eq!(s.released, ph.len() as u64);
    assert_eq!(s.seeds_tested, 0);
    assert_eq!(s.held_photons, 0);
}

#[test]
fn held_state_follows_the_rate_not_the_uptime() {
    let mut r = rng(12);
    let mut e = Engine::new(config(1.0)).unwrap();
    let mut out = Vec::new();
    let mut seq = 1;
    let mut sizes = Vec::new();
    for minute in 0..5 {
        let from = T0 + minute * 60 * S;
        let ph = background(&mut r, 500.0, from, from + 60 * S);
        seq = feed(&mut e, &ph, S / 10, from + 60 * S, &mut out, seq);
        let s = e.stats();
        sizes.push((s.held_photons, s.held_bytes));
    }
    eprintln!("held (photons, bytes) per minute: {sizes:?}");
    // The index holds (longest timescale + pre-window) = 30 + 120 = 150 s of photons, whatever the uptime,
    // once that much has passed.
    for &(n, bytes) in &sizes[2..] {
        assert!((70_000..80_000).contains(&n), "{sizes:?}");
        assert!(bytes < 400 * n, "{} bytes per held photon", bytes / n);
    }
    let (first, last) = (sizes[2].1 as f64, sizes[4].1 as f64);
    assert!(last < 1.3 * first, "state grew with uptime: {sizes:?}");
}

#[test]
fn the_sub_pixel_bound_changes_no_finding_and_no_counter() {
    // 90 s of 4 kHz background (neighbourhoods of hundreds of photons, where the bound is taken) with
    // clusters from well above to just at threshold, at a false-alarm rate high enough that background
    // crossings happen too: every finding and every counter (tests, crossings, predicted false crossings per
    // timescale) must equal those of the engine that counts every disc exactly.
    let mut r = rng(31);
    let end = T0 + 90 * S;
    let mut ph = background(&mut r, 4000.0, T0, end);
    for (i, k) in [40, 25, 16, 12, 9].into_iter().enumerate() {
        let at = T0 + (40 + 9 * i as i64) * S;
        ph.extend(cluster(&mut r, 30.0 + 25.0 * i as f64, 65.0, 0.2, k, at, S / 5));
    }
    sort(&mut ph);
    let run = |exact: bool| {
        let mut e = Engine::new(config(1e5)).unwrap();
        if exact {
            e.count_every_seed_exactly();
        }
        let mut out = Vec::new();
        feed(&mut e, &ph, S / 10, end, &mut out, 1);
        e.finish(&mut out);
        (e.stats(), out)
    };
    let (exact, exact_found) = run(true);
    let (bounded, bounded_found) = run(false);
    assert!(
        exact.crossings.iter().sum::<u64>() > 20 && flashes(&exact_found).len() >= 3,
        "the scene must cross: {:?}, {} flashes",
        exact.crossings,
        flashes(&exact_found).len()
    );
    assert_eq!(bounded_found, exact_found);
    let strip = |mut s: glint_engine::EngineStats| {
        s.held_bytes = 0; // the bound's own counts are held memory too
        s
    };
    assert_eq!(strip(bounded), strip(exact));
}
