//! Detection of injected bursts: clusters of photons from one point, smeared by the PSF, inside a window,
//! on top of background. Each must give exactly one flash at its time, with the injected position inside
//! the flash's 90% error radius in at least 90% of trials; clusters below threshold must give nothing.
#![allow(missing_docs)]
#![allow(clippy::unwrap_used)] // tests may unwrap

mod common;
use common::*;
use glint_engine::Engine;

struct Injection {
    ra: f64,
    dec: f64,
    t_start: i64,
    dur: i64,
    k: usize,
    expect: bool,
}

#[test]
fn injected_clusters_are_found_once_at_their_position_and_time() {
    let mut r = rng(11);
    let sigma = 0.5 / 1.515; // PSF 68% radius 0.5 deg (docs/science.md section 4: r68 = 1.515 sigma)
    // (photons, duration, zenith): from 10 ms to 10 s, near the zenith to near the edge of the field.
    let kinds: [(usize, f64, f64, bool); 5] = [
        (16, 0.01, 10.0, true),
        (20, 0.1, 30.0, true),
        (28, 1.0, 40.0, true),
        (50, 10.0, 20.0, true),
        // Below threshold: 3 photons in 1 s on about 0.01 expected needs p ~ 1e-4, far above the bound.
        (3, 1.0, 25.0, false),
    ];
    let trials = 40;
    let spacing = 40 * S; // successive clusters lie far apart on the sky, so their candidates never merge
    let mut injections = Vec::new();
    let mut ph = Vec::new();
    let mut t = T0 + 60 * S;
    for trial in 0..trials {
        for (i, &(k, dur_s, zen, expect)) in kinds.iter().enumerate() {
            let az = f64::from((trial * 37 + i as u32 * 71) % 360);
            let (ra, dec) = (az, 90.0 - zen);
            let dur = (dur_s * 1e9) as i64;
            ph.extend(cluster(&mut r, ra, dec, sigma, k, t, dur));
            injections.push(Injection {
                ra,
                dec,
                t_start: t,
                dur,
                k,
                expect,
            });
            t += spacing;
        }
    }
    let end = t + 30 * S;
    ph.extend(background(&mut r, 100.0, T0, end));
    sort(&mut ph);

    let mut e = Engine::new(config(1.0)).unwrap();
    let mut out = Vec::new();
    feed(&mut e, &ph, S / 10, end, &mut out, 1);
    e.finish(&mut out);
    let fl = flashes(&out);

    let mut inside = 0;
    let mut found = 0;
    for inj in &injections {
        let matching: Vec<_> = fl
            .iter()
            .filter(|f| {
                angle_deg(f.ra_deg, f.dec_deg, inj.ra, inj.dec) < 3.0
                    && f.end_ns >= inj.t_start
                    && f.start_ns <= inj.t_start + inj.dur
            })
            .collect();
        if !inj.expect {
            assert!(
                matching.is_empty(),
                "a {}-photon cluster below threshold gave {matching:?}",
                inj.k
            );
            continue;
        }
        assert_eq!(
            matching.len(),
            1,
            "cluster of {} in {} ns at ({}, {}): {matching:?}",
            inj.k,
            inj.dur,
            inj.ra,
            inj.dec
        );
        let f = matching[0];
        found += 1;
        if angle_deg(f.ra_deg, f.dec_deg, inj.ra, inj.dec) <= f.error_radius_deg {
            inside += 1;
        }
        assert!(f.counts >= 3 && f.photons.len() as u64 == f.counts);
        assert!(
            f.far_per_year < 1.0,
            "a flash is rarer than the design rate: {}",
            f.far_per_year
        );
    }
    assert_eq!(found, 4 * trials as usize);
    assert_eq!(fl.len(), found, "no flash apart from the injected ones");
    assert!(
        inside * 10 >= found * 9,
        "position inside the 90% error radius in {inside} of {found}"
    );
    assert_eq!(assessments(&out).len(), found, "every flash is assessed");
}
