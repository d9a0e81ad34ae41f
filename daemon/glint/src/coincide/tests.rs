use super::*;

fn site(instrument: &str, lat: f64, lon: f64, tol: f64, fov: f64) -> SiteConfig {
    SiteConfig {
        instrument: instrument.into(),
        latitude_deg: lat,
        longitude_deg: lon,
        height_m: 0.0,
        clock_tolerance_s: tol,
        fov_radius_deg: fov,
    }
}

fn cand(id: &str, instrument: &str, t_ns: i64, ra: f64, dec: f64, r: f64, far: f64) -> Candidate {
    Candidate {
        id: id.into(),
        flash_id: format!("{id}-flash"),
        instrument: instrument.into(),
        start_gps_ns: t_ns,
        end_gps_ns: t_ns,
        ra_deg: ra,
        dec_deg: dec,
        error_radius_deg: r,
        far_per_year: far,
        distance: None,
    }
}

#[test]
fn light_travel_time_is_the_chord_over_c() {
    // Two points on the equator a quarter turn apart: the chord is a * sqrt(2) exactly.
    let t = light_travel_s(&site("a", 0.0, 0.0, 0.0, 45.0), &site("b", 0.0, 90.0, 0.0, 45.0));
    assert!((t - WGS84_A * 2f64.sqrt() / C_M_PER_S).abs() < 1e-12, "{t}");
    // The two invented arrays of deploy/instruments are about 420 km apart: about 1.4 ms.
    let v = site("ventisca-array", -26.3, -68.4, 0.0, 45.0);
    let h = site("helado-array", -23.1, -66.2, 0.0, 45.0);
    let t = light_travel_s(&v, &h);
    assert!((1.2e-3..1.6e-3).contains(&t), "{t}");
    // Height counts: a point 3 km straight up is 10 us away.
    let mut up = v.clone();
    up.height_m = 2998.0;
    assert!((light_travel_s(&v, &up) - 2998.0 / C_M_PER_S).abs() < 1e-9);
}

#[test]
fn cap_overlap_matches_closed_forms() {
    use std::f64::consts::PI;
    // Concentric caps: the smaller one; disjoint caps: nothing.
    assert!((cap_overlap_sr(0.5, 0.8, 0.0) - cap_sr(0.5)).abs() < 1e-12);
    assert_eq!(cap_overlap_sr(0.3, 0.3, 0.7), 0.0);
    // Two hemispheres whose poles are gamma apart meet in a lune of angle pi - gamma: 2 (pi - gamma) sr.
    for gamma in [0.1, 0.5, 1.0, 2.0, 3.0] {
        let got = cap_overlap_sr(PI / 2.0, PI / 2.0, gamma);
        assert!((got - 2.0 * (PI - gamma)).abs() < 1e-4, "gamma {gamma}: {got}");
    }
    // Symmetric in the two radii.
    let (x, y) = (cap_overlap_sr(0.4, 0.7, 0.5), cap_overlap_sr(0.7, 0.4, 0.5));
    assert!((x - y).abs() < 1e-5, "{x} {y}");
}

#[test]
fn distances_combine_by_inverse_variance() {
    // Equal widths: the mean, and the interval narrower by sqrt(2).
    let (d, lo, hi) = combine_distances(&[(0.04, 0.03, 0.05), (0.06, 0.05, 0.07)]).unwrap();
    assert!((d - 0.05).abs() < 1e-12);
    assert!(((hi - lo) - 0.02 / 2f64.sqrt()).abs() < 1e-12);
    // A fit twice as wide weighs a quarter as much.
    let (d, _, _) = combine_distances(&[(1.0, 0.9, 1.1), (2.0, 1.8, 2.2)]).unwrap();
    assert!((d - (1.0 * 4.0 + 2.0) / 5.0).abs() < 1e-12, "{d}");
    assert!(combine_distances(&[(1.0, 1.0, 1.0), (2.0, 1.0, 3.0)]).is_none());
}

#[test]
fn agreement_needs_time_and_position() {
    let a = site("a", -26.3, -68.4, 1e-6, 45.0);
    let b = site("b", -23.1, -66.2, 1e-6, 45.0);
    let t0 = 1_400_000_000_000_000_000;
    let x = cand("x", "a", t0, 35.0, -24.0, 0.3, 1.0);
    // Within light travel + tolerances: joined.
    let y = cand("y", "b", t0 + 1_000_000, 35.2, -24.1, 0.3, 2.0);
    let j = joint_of(&x, &a, &y, &b).unwrap();
    assert!((j.window_s - (light_travel_s(&a, &b) + 2e-6)).abs() < 1e-12);
    assert!((j.combined_radius_deg - 0.3 * 2f64.sqrt()).abs() < 1e-12);
    let expected = 2.0 * (j.window_s / SECONDS_PER_YEAR) * 1.0 * 2.0 * j.position_chance;
    assert!((j.far_per_year - expected).abs() <= 1e-12 * expected);
    // Too late by a millisecond beyond the window: not joined.
    let late = cand(
        "late",
        "b",
        t0 + ((j.window_s + 1e-3) * 1e9) as i64,
        35.0,
        -24.0,
        0.3,
        2.0,
    );
    assert!(joint_of(&x, &a, &late, &b).is_none());
    // A trigger window widens it: half of each window counts.
    let mut wide = late.clone();
    wide.start_gps_ns -= 10_000_000;
    assert!(joint_of(&x, &a, &wide, &b).is_some());
    // Too far apart on the sky: not joined.
    let far = cand("far", "b", t0, 36.0, -24.0, 0.3, 2.0);
    assert!(joint_of(&x, &a, &far, &b).is_none());
}

/// A small deterministic generator for the Monte Carlo check (splitmix64).
struct Mix(u64);
impl Mix {
    fn next(&mut self) -> f64 {
        self.0 = self.0.wrapping_add(0x9e37_79b9_7f4a_7c15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
        ((z ^ (z >> 31)) >> 11) as f64 / (1u64 << 53) as f64
    }
}

#[test]
fn joint_false_alarm_rate_matches_a_simulation_of_two_unrelated_streams() {
    // Two independent Poisson streams of triggers, 1 per second each, at uniformly random places on the
    // whole sky (both sites see the whole sky, so the overlap is 4 pi), for 10^6 s; the coincidence window
    // is the two clock tolerances (co-located sites, zero-length trigger windows).
    let sa = site("a", 10.0, 20.0, 0.025, 180.0);
    let sb = site("b", 10.0, 20.0, 0.025, 180.0);
    let (rate, span_s, r) = (1.0, 1.0e6, 10.0 / 2f64.sqrt());
    let far = rate * SECONDS_PER_YEAR;
    let mut rng = Mix(2026);
    let mut stream = |inst: &str| {
        let mut t = 0.0;
        let mut out = Vec::new();
        loop {
            t += -(1.0 - rng.next()).ln() / rate;
            if t > span_s {
                return out;
            }
            let ra = 360.0 * rng.next();
            let dec = (2.0 * rng.next() - 1.0).asin().to_degrees();
            out.push(cand("", inst, (t * 1e9) as i64, ra, dec, r, far));
        }
    };
    let (xs, ys) = (stream("a"), stream("b"));
    let mut joined = 0u64;
    let mut predicted = None;
    let mut lo = 0;
    for x in &xs {
        while lo < ys.len() && ys[lo].end_gps_ns < x.end_gps_ns - 60_000_000 {
            lo += 1;
        }
        for y in ys[lo..]
            .iter()
            .take_while(|y| y.end_gps_ns <= x.end_gps_ns + 60_000_000)
        {
            if let Some(j) = joint_of(x, &sa, y, &sb) {
                joined += 1;
                predicted.get_or_insert(j.far_per_year);
            }
        }
    }
    let f_joint = predicted.expect("some coincidences");
    // The formula by hand: W = 0.05 s, cap of 10 deg over 4 pi.
    let by_hand = joint_far_per_year(
        far,
        far,
        0.05,
        cap_sr(10f64.to_radians()) / (4.0 * std::f64::consts::PI),
    );
    assert!(
        (f_joint - by_hand).abs() < 1e-9 * by_hand,
        "{f_joint} vs {by_hand}"
    );
    let expected = f_joint * span_s / SECONDS_PER_YEAR;
    // About 760 expected; the Poisson sigma is about 28, so 5 sigma is about 18%.
    let tolerance = 5.0 * expected.sqrt();
    assert!(
        (joined as f64 - expected).abs() < tolerance,
        "{joined} chance coincidences, formula {expected:.1} +- {tolerance:.1}"
    );
}

fn coincide_cfg() -> CoincideConfig {
    let text = r#"
[bus]
url = "nats://127.0.0.1:4222"
[coincide]
state_dir = "/nonexistent"
horizon_s = 600
[[site]]
instrument = "ventisca-array"
latitude_deg = -26.3
longitude_deg = -68.4
height_m = 4100
clock_tolerance_s = 1e-6
[[site]]
instrument = "helado-array"
latitude_deg = -23.1
longitude_deg = -66.2
height_m = 3900
clock_tolerance_s = 1e-6
"#;
    CoincideConfig::from_toml(text, "test", std::path::Path::new("/")).unwrap()
}

fn assessment(id: &str, instrument: &str, t_ns: i64, ra: f64, verdict: pb::Verdict) -> pb::Alert {
    pb::Alert {
        id: id.into(),
        kind: pb::AlertKind::Assessment as i32,
        instrument: instrument.into(),
        trigger: Some(pb::Trigger {
            start_gps_ns: t_ns - 100_000_000,
            end_gps_ns: t_ns,
            ra_deg: ra,
            dec_deg: -24.0,
            error_radius_deg: 0.3,
            far_per_year: 0.5,
            ..Default::default()
        }),
        assessment: Some(pb::Assessment {
            verdict: verdict as i32,
            flash_id: format!("{id}-flash"),
            fit: Some(pb::EvaporationFit {
                converged: true,
                distance_pc: 0.04,
                distance_pc_lo: 0.03,
                distance_pc_hi: 0.05,
                ..Default::default()
            }),
            ..Default::default()
        }),
        ..Default::default()
    }
}

#[test]
fn coincider_joins_across_sites_once_and_forgets_withdrawn_candidates() {
    let mut c = Coincider::new(coincide_cfg(), CoincideState::default());
    let t = 1_400_000_000_000_000_000;
    let iso = pb::Verdict::Isolated;
    let (none, changed) = c.on_alert(&assessment("v1", "ventisca-array", t, 35.0, iso), 0);
    assert!(none.is_empty() && changed);
    // The same instrument never joins itself.
    assert!(
        c.on_alert(&assessment("v2", "ventisca-array", t, 35.0, iso), 0)
            .0
            .is_empty()
    );
    // An instrumental assessment is no candidate.
    let bad = assessment("h0", "helado-array", t, 35.0, pb::Verdict::Instrumental);
    assert_eq!(c.on_alert(&bad, 0), (Vec::new(), false));
    let (joints, _) = c.on_alert(&assessment("h1", "helado-array", t + 20_000_000, 35.1, iso), 0);
    assert_eq!(joints.len(), 2, "h1 agrees with both v1 and v2");
    let j = &joints[0];
    assert_eq!(j.kind, pb::AlertKind::Joint as i32);
    assert_eq!(j.instrument, "coincide");
    let jj = j.joint.as_ref().unwrap();
    assert_eq!(jj.alert_ids, vec!["v1".to_string(), "h1".to_string()]);
    assert!(jj.has_distance && (jj.distance_pc - 0.04).abs() < 1e-12);
    assert_eq!(j.trigger.as_ref().unwrap().far_per_year, jj.far_per_year);
    // Delivered again: nothing new, and the id of a joint alert depends only on what it joins.
    assert!(
        c.on_alert(&assessment("h1", "helado-array", t + 20_000_000, 35.1, iso), 0)
            .0
            .is_empty()
    );
    let again = joint_alert(
        "coincide",
        &c.state.held[0],
        &c.state.held[2],
        &joint_of(
            &c.state.held[0],
            c.cfg.site("ventisca-array").unwrap(),
            &c.state.held[2],
            c.cfg.site("helado-array").unwrap(),
        )
        .unwrap(),
        5,
    );
    assert_eq!(again.id, j.id);
    // A withdrawn flash takes its candidate out.
    let w = pb::Alert {
        kind: pb::AlertKind::Withdrawal as i32,
        withdrawn_id: "v2-flash".into(),
        ..Default::default()
    };
    assert!(c.on_alert(&w, 0).1);
    assert!(c.state.held.iter().all(|h| h.id != "v2"));
    // An unrelated burst much later neither joins nor keeps the old ones past the horizon.
    let later = t + 3_600_000_000_000;
    assert!(
        c.on_alert(&assessment("h2", "helado-array", later, 50.0, iso), 0)
            .0
            .is_empty()
    );
    assert_eq!(
        c.state.held.iter().map(|h| h.id.as_str()).collect::<Vec<_>>(),
        vec!["h2"]
    );
}
