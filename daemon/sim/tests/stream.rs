//! The frame stream as a producer contract: Hello first, sequence numbers from 1, valid batches of bounded
//! size and span, out-of-order only within the jitter, heartbeats and batches that keep their promises,
//! declared and silent dead time, and determinism (same seed, same bytes; sources on their own random
//! streams).

#![allow(clippy::unwrap_used)]

mod common;

use glint_sim::Simulator;
use glint_wire::pb::producer_frame::Body;
use glint_wire::{validate_batch, validate_hello, validate_status};
use prost::Message;

const JITTER_NS: i64 = 2_000_000;

fn busy_scenario() -> String {
    format!(
        "{}{}{}",
        common::header("busy", 60.0),
        common::GROUND,
        r#"
[[source]]
kind = "evaporation"
ra_deg = 35.0
dec_deg = -22.0
distance_pc = 0.03
t_offset_s = 20.0
[[source]]
kind = "afterglow_burst"
ra_deg = 28.0
dec_deg = -35.0
t_offset_s = 30.0
rise_s = 0.5
peak_rate_hz = 40.0
decay_index = 1.2
duration_s = 20.0
spectral_index = 2.5
[[source]]
kind = "glitch"
mode = "identical_timestamps"
t_offset_s = 40.0
photons = 30
[[source]]
kind = "glitch"
mode = "rate_jump"
t_offset_s = 45.0
duration_s = 5.0
factor = 3.0
[[source]]
kind = "dead"
t_offset_s = 10.0
duration_s = 2.5
declared = true
reason = "calibration"
[[source]]
kind = "dead"
t_offset_s = 50.0
duration_s = 3.2
declared = false
"#
    )
}

#[test]
fn frames_keep_the_producer_contract() {
    let s = common::scenario(&busy_scenario());
    let (t0, t_end) = (s.start_gps_ns, s.end_gps_ns());
    let frames = common::frames(&s, 7);
    let Some(Body::Hello(h)) = &frames[0].body else {
        panic!("first frame is not a Hello")
    };
    validate_hello(h).unwrap();
    assert_eq!(
        (h.instrument.as_str(), h.token.as_str(), h.schema_version),
        ("test-array", "test-token", 1)
    );

    let (silent_lo, silent_hi) = (t0 + 50_000_000_000, t0 + 53_200_000_000);
    let (declared_lo, declared_hi) = (t0 + 10_000_000_000, t0 + 12_500_000_000);
    let mut last_seq = 0;
    let mut gaps = Vec::new();
    let mut latest_t = t0;
    let mut promised = t0;
    let mut batch_promised = 0;
    let mut statuses = Vec::new();
    let mut declared = Vec::new();
    let mut photons = 0;
    for f in &frames[1..] {
        let (seq, now) = match f.body.as_ref().unwrap() {
            Body::Hello(_) => panic!("a second Hello"),
            Body::Batch(b) => {
                validate_batch(b, JITTER_NS).unwrap();
                assert!(!b.time_gps_ns.is_empty() && b.time_gps_ns.len() <= s.batch_max_photons);
                let (lo, hi) = (
                    b.time_gps_ns.iter().min().unwrap(),
                    b.time_gps_ns.iter().max().unwrap(),
                );
                assert!(
                    hi - lo <= s.batch_max_ns + JITTER_NS,
                    "batch {} spans {} ns",
                    b.seq,
                    hi - lo
                );
                for &t in &b.time_gps_ns {
                    assert!((t0..t_end).contains(&t));
                    // Out of order only within the jitter, never behind a heartbeat's promise nor behind an
                    // earlier batch's.
                    assert!(
                        t > latest_t - JITTER_NS && t >= promised - JITTER_NS,
                        "t {t} after {latest_t}"
                    );
                    assert!(
                        t >= batch_promised,
                        "t {t} behind an earlier batch's promise {batch_promised}"
                    );
                    latest_t = latest_t.max(t);
                    assert!(!(silent_lo..silent_hi).contains(&t) && !(declared_lo..declared_hi).contains(&t));
                }
                // The promise covers at most what was sent, and trails the newest photon by no more than the
                // jitter, except while a declared dead interval has yet to be declared: it waits at its start.
                let p = b.complete_before_gps_ns;
                assert!(
                    p <= hi + 1,
                    "batch {} promises {p} past its newest photon {hi}",
                    b.seq
                );
                assert!(
                    p >= hi - JITTER_NS || p == declared_lo,
                    "batch {} promises {p}, far behind its newest photon {hi}",
                    b.seq
                );
                batch_promised = batch_promised.max(p);
                photons += b.time_gps_ns.len() as u64;
                (b.seq, None)
            }
            Body::Status(st) => {
                validate_status(st).unwrap();
                if !st.dead.is_empty() {
                    assert!(
                        batch_promised <= declared_lo,
                        "a batch promised {batch_promised}, past the dead interval declared only now"
                    );
                }
                promised = st.now_gps_ns;
                declared.extend(
                    st.dead
                        .iter()
                        .map(|d| (d.start_gps_ns, d.end_gps_ns, d.reason.clone())),
                );
                statuses.push(st.now_gps_ns);
                (st.seq, Some(st.now_gps_ns))
            }
        };
        if seq != last_seq + 1 {
            gaps.push((last_seq, seq, now));
        }
        last_seq = seq;
    }
    // Heartbeats once a second of simulated time, the last at the end, none inside the silent gap.
    let expected: Vec<i64> = (1..=60)
        .map(|k| t0 + k * 1_000_000_000)
        .filter(|&t| !(t > silent_lo && t < silent_hi))
        .collect();
    assert_eq!(statuses, expected);
    // One gap: the frame lost at the gap's start and the heartbeats at 51, 52 and 53 s.
    assert_eq!(gaps.len(), 1, "{gaps:?}");
    assert_eq!(gaps[0].1 - gaps[0].0 - 1, 4);
    assert_eq!(
        declared,
        vec![(declared_lo, declared_hi, "calibration".to_string())]
    );
    assert_eq!(
        photons,
        Simulator::new(&s, 7).unwrap().fold(0, |n, f| match f.body {
            Some(Body::Batch(b)) => n + b.time_gps_ns.len() as u64,
            _ => n,
        })
    );
}

#[test]
fn truth_counts_what_was_sent() {
    let s = common::scenario(&busy_scenario());
    let mut sim = Simulator::new(&s, 7).unwrap();
    let frames: Vec<_> = sim.by_ref().collect();
    let truth = sim.truth();
    let kinds: Vec<&str> = truth.iter().map(|t| t.kind).collect();
    assert_eq!(
        kinds,
        [
            "evaporation",
            "afterglow_burst",
            "glitch",
            "glitch",
            "dead",
            "dead"
        ]
    );
    let ph = common::photons(&frames);
    // The identical-timestamp glitch: exactly its photons share its instant.
    let glitch_t = truth[2].t_gps_ns;
    assert_eq!(truth[2].photons, 30);
    assert_eq!(ph.iter().filter(|p| p.t == glitch_t).count(), 30);
    assert!(truth[2].counts_by_timescale.iter().all(|c| c.counts == 30));
    // The burst's windows nest: counts grow with the timescale and stop at its photon total.
    let c: Vec<u64> = truth[0].counts_by_timescale.iter().map(|c| c.counts).collect();
    assert_eq!(c.len(), 8);
    assert!(c.windows(2).all(|w| w[0] <= w[1]) && c[7] <= truth[0].photons && truth[0].photons > 50);
    // Within 5 deg of the burst (over 6 PSF sigmas) in its last 10 s: the truth's count plus background,
    // which is 200 Hz x cos^2(10 deg) / 1.354 sr x 0.0239 sr x 10 s = 34 photons ([calc] from the
    // acceptance), so at most 34 + 4 sqrt(34) = 57 extra.
    let ten = truth[0].counts_by_timescale[6].counts as usize;
    let near = ph
        .iter()
        .filter(|p| p.t > truth[0].t_gps_ns - 10_000_000_000 && p.t <= truth[0].t_gps_ns)
        .filter(|p| glint_sim::sky::separation_deg(p.ra, p.dec, 35.0, -22.0) < 5.0)
        .count();
    assert!(near >= ten && near < ten + 57, "{near} near vs {ten} in truth");
    // The rate jump doubled-plus the background for 5 s: 2 x 200 Hz x 5 s extra, within 4 sigma.
    let extra = truth[3].photons as f64;
    assert!(
        (extra - 2000.0).abs() < 4.0 * 2000f64.sqrt(),
        "rate jump sent {extra}"
    );
    assert_eq!(sim.stats().photons, ph.len() as u64);
}

fn encoded(frames: &[glint_wire::pb::ProducerFrame]) -> Vec<u8> {
    let mut out = Vec::new();
    for f in frames {
        f.encode_length_delimited(&mut out).unwrap();
    }
    out
}

#[test]
fn same_seed_same_bytes_other_seed_other_bytes() {
    let s = common::scenario(&busy_scenario());
    let a = encoded(&common::frames(&s, 42));
    let b = encoded(&common::frames(&s, 42));
    let c = encoded(&common::frames(&s, 43));
    assert!(a.len() > 100_000);
    assert_eq!(a, b);
    assert_ne!(a, c);
}

#[test]
fn adding_a_source_leaves_the_other_draws_alone() {
    let base = busy_scenario();
    let more = format!(
        "{base}\n[[source]]\nkind = \"steady\"\nra_deg = 30.0\ndec_deg = -26.0\nrate_hz = 5.0\nspectral_index = 2.2\n"
    );
    let key = |p: &common::Seen| (p.t, p.ra.to_bits(), p.dec.to_bits(), p.energy.to_bits());
    let mut a: Vec<_> = common::photons(&common::frames(&common::scenario(&base), 5))
        .iter()
        .map(key)
        .collect();
    let mut b: Vec<_> = common::photons(&common::frames(&common::scenario(&more), 5))
        .iter()
        .map(key)
        .collect();
    a.sort_unstable();
    b.sort_unstable();
    // Every photon of the base run is in the richer run, which only adds the steady source's.
    let mut j = 0;
    for p in &a {
        while j < b.len() && b[j] < *p {
            j += 1;
        }
        assert!(
            j < b.len() && b[j] == *p,
            "photon {p:?} of the base run is missing"
        );
        j += 1;
    }
    let added = b.len() - a.len();
    assert!(
        (added as f64 - 300.0).abs() < 4.0 * 300f64.sqrt(),
        "steady source added {added}"
    );
}
