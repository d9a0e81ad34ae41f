//! The two ways a live run gets findings out sooner, and that they change only when, never what: a
//! producer's promise that no older photon follows (`complete_before_gps_ns`) releases photons from the
//! reorder stage at once, and a deferred evaporation fit (`EngineConfig::defer_fit`) leaves the fit to the
//! caller with exactly the result the engine would have given.
#![allow(missing_docs)]
#![allow(clippy::unwrap_used)] // tests may unwrap

mod common;
use common::*;
use glint_engine::{Engine, EngineError, Finding, FitResult};
use rand::RngExt;

const TOL: i64 = 20_000_000; // the default reorder tolerance, 20 ms

/// Background with a short bright burst and a longer fainter one.
fn scene(seed: u64) -> (Vec<Ph>, i64) {
    let mut r = rng(seed);
    let end = T0 + 200 * S;
    let mut ph = background(&mut r, 200.0, T0, end);
    ph.extend(cluster(&mut r, 40.0, 70.0, 0.2, 20, T0 + 70 * S, S / 10));
    ph.extend(cluster(&mut r, 200.0, 60.0, 0.3, 30, T0 + 120 * S, 2 * S));
    sort(&mut ph);
    (ph, end)
}

/// The scene as a producer with out-of-order jitter sends it: each photon up to `jitter` late, then cut into
/// batches of random size. With `promise`, each batch carries the true bound on what is still to come: the
/// earliest time among the photons not sent yet (at most its own latest time + 1).
fn jittered_batches(ph: &[Ph], jitter: i64, seed: u64, promise: bool) -> Vec<glint_wire::pb::PhotonBatch> {
    let mut r = rng(seed);
    let mut arrival: Vec<(i64, Ph)> = ph.iter().map(|p| (p.t + r.random_range(0..jitter), *p)).collect();
    arrival.sort_by_key(|x| (x.0, x.1.t));
    let mut unsent_min = vec![i64::MAX; arrival.len() + 1];
    for i in (0..arrival.len()).rev() {
        unsent_min[i] = unsent_min[i + 1].min(arrival[i].1.t);
    }
    let mut out = Vec::new();
    let mut i = 0;
    while i < arrival.len() {
        let n = r.random_range(1..60).min(arrival.len() - i);
        let chunk: Vec<Ph> = arrival[i..i + n].iter().map(|x| x.1).collect();
        let mut b = batch(out.len() as u64 + 1, &chunk);
        if promise {
            let latest = chunk.iter().map(|p| p.t).max().unwrap();
            b.complete_before_gps_ns = unsent_min[i + n].min(latest + 1);
        }
        out.push(b);
        i += n;
    }
    out
}

/// Feeds the batches, then a status at `end` and `finish`; returns the findings, for each the index of the
/// batch that gave it (the number of batches for those of the status and `finish`), and the engine.
fn run(
    cfg: glint_engine::EngineConfig,
    batches: &[glint_wire::pb::PhotonBatch],
    end: i64,
) -> (Vec<Finding>, Vec<usize>, Engine) {
    let mut e = Engine::new(cfg).unwrap();
    let mut out = Vec::new();
    let mut when = Vec::new();
    for (k, b) in batches.iter().enumerate() {
        e.push_batch(b, &mut out).unwrap();
        when.resize(out.len(), k);
    }
    e.push_status(&status(batches.len() as u64 + 1, end), &mut out)
        .unwrap();
    e.finish(&mut out);
    when.resize(out.len(), batches.len());
    (out, when, e)
}

#[test]
fn a_promise_releases_at_once_and_a_photon_breaking_it_is_late() {
    let mut r = rng(1);
    let ph = background(&mut r, 100.0, T0, T0 + 10 * S);
    let latest = ph.last().unwrap().t;
    let promised = {
        let mut b = batch(1, &ph);
        b.complete_before_gps_ns = latest + 1;
        b
    };
    // Without the promise the last 20 ms wait in the reorder stage.
    let mut plain = Engine::new(config(1.0)).unwrap();
    plain.push_batch(&batch(1, &ph), &mut Vec::new()).unwrap();
    assert_eq!(plain.watermark_ns(), Some(latest - TOL));
    assert!(plain.stats().pending > 0);

    let mut e = Engine::new(config(1.0)).unwrap();
    let mut out = Vec::new();
    e.push_batch(&promised, &mut out).unwrap();
    assert_eq!(e.watermark_ns(), Some(latest + 1));
    assert_eq!((e.stats().released, e.stats().pending), (ph.len() as u64, 0));

    // A photon at the latest time breaks the promise: late. One just after it is kept.
    let broken = background_photon(&mut r, latest);
    let kept = background_photon(&mut r, latest + 1);
    let mut b = batch(2, &[broken, kept]);
    b.complete_before_gps_ns = latest + 1; // behind the watermark already: no effect
    e.push_batch(&b, &mut out).unwrap();
    let s = e.stats();
    assert_eq!((s.late, s.photons_in, s.pending), (1, ph.len() as u64 + 2, 1));
    assert_eq!(
        e.watermark_ns(),
        Some(latest + 1),
        "an old promise does not move it back"
    );

    // Promises the engine refuses, leaving everything as it was: negative, past the batch, on no photons.
    let later = background_photon(&mut r, latest + S);
    for (p, photons) in [(-5, vec![later]), (latest + S + 2, vec![later]), (latest, vec![])] {
        let mut b = batch(3, &photons);
        b.complete_before_gps_ns = p;
        let err = e.push_batch(&b, &mut out).unwrap_err();
        assert!(
            matches!(&err, EngineError::InvalidFrame { seq: 3, detail } if detail.contains("complete_before_gps_ns")),
            "{err:?}"
        );
    }
    let after = e.stats();
    assert_eq!(
        (after.photons_in, after.late, after.refused_invalid),
        (s.photons_in, 1, 3)
    );
    assert_eq!(e.watermark_ns(), Some(latest + 1));
}

#[test]
fn promises_change_when_findings_come_out_not_what() {
    let (ph, end) = scene(3);
    let jitter = TOL / 2;
    let plain = jittered_batches(&ph, jitter, 99, false);
    let promised = jittered_batches(&ph, jitter, 99, true);
    let (fa, when_a, a) = run(config(1.0), &plain, end);
    let (fb, when_b, b) = run(config(1.0), &promised, end);
    assert!(
        flashes(&fa).len() >= 2 && assessments(&fa).len() >= 2,
        "the scene must give findings: {fa:?}"
    );
    assert_eq!(b.stats().late, 0, "a true promise is never broken");
    assert_eq!(
        fa, fb,
        "same photons, with and without promises: the findings must be identical"
    );
    assert_eq!(a.stats().tests, b.stats().tests);
    assert_eq!(a.stats().released, b.stats().released);
    // ... but the flashes come out no later, and at least one sooner (the photon completing it no longer
    // waits for photons 20 ms younger to arrive).
    let flash_at = |f: &[Finding], when: &[usize]| -> Vec<usize> {
        f.iter()
            .zip(when)
            .filter(|(x, _)| matches!(x, Finding::Flash(_)))
            .map(|(_, &k)| k)
            .collect()
    };
    let (ka, kb) = (flash_at(&fa, &when_a), flash_at(&fb, &when_b));
    assert!(ka.iter().zip(&kb).all(|(a, b)| b <= a), "{ka:?} vs {kb:?}");
    assert!(ka.iter().zip(&kb).any(|(a, b)| b < a), "{ka:?} vs {kb:?}");
}

#[test]
fn a_deferred_fit_job_gives_exactly_the_inline_result() {
    let (ph, end) = scene(7);
    let batches = jittered_batches(&ph, TOL / 2, 5, true);
    let (inline, _, _) = run(config(1.0), &batches, end);
    let mut cfg = config(1.0);
    cfg.defer_fit = true;
    let (mut deferred, _, _) = run(cfg, &batches, end);
    assert_eq!(inline.len(), deferred.len());
    let inline_fits: Vec<&FitResult> = assessments(&inline).iter().map(|a| &a.fit).collect();
    assert!(
        inline_fits.len() >= 2,
        "the scene must give assessments: {inline:?}"
    );
    assert!(
        inline_fits.iter().any(|f| f.converged),
        "at least one fit must converge: {inline_fits:?}"
    );
    assert!(assessments(&inline).iter().all(|a| a.fit_job.is_none()));
    let mut ran = 0;
    for f in &mut deferred {
        if let Finding::Assessment(a) = f {
            assert!(a.fit.is_pending() && !a.fit.converged, "{:?}", a.fit);
            let job = a
                .fit_job
                .take()
                .expect("a deferred assessment carries its fit job");
            assert!(job.photons() > 0);
            a.fit = job.run();
            ran += 1;
        }
    }
    assert_eq!(ran, inline_fits.len());
    assert_eq!(
        inline, deferred,
        "the job's result, filled in, gives the findings of the inline fit"
    );
}
