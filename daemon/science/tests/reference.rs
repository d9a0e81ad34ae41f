//! glint-science against outside references: mpmath and scipy values written by the scripts in
//! `tests/reference/` (CSV files committed with the library versions in their header), statrs over a grid
//! where it is accurate, and the invented demo instruments of `deploy/instruments/`, which must load, pass
//! their checks and reach the distances of the trade.

#![allow(clippy::unwrap_used)] // tests may unwrap

use std::path::PathBuf;

use glint_science::instrument::{InstrumentResponse, InstrumentSpec};
use glint_science::reach::{ReachParams, reach_report};
use glint_science::{critical, limits, poisson};
use statrs::distribution::{ContinuousCDF, DiscreteCDF, Normal, Poisson};

fn workspace_file(rel: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../..").join(rel)
}

/// Rows of a reference CSV as named columns: `#` lines are comments, the first other line the header.
fn read_csv(rel: &str) -> Vec<std::collections::BTreeMap<String, f64>> {
    let text = std::fs::read_to_string(workspace_file(rel)).unwrap();
    let mut lines = text
        .lines()
        .filter(|l| !l.starts_with('#') && !l.trim().is_empty());
    let header: Vec<String> = lines.next().unwrap().split(',').map(str::to_string).collect();
    lines
        .map(|l| {
            header
                .iter()
                .cloned()
                .zip(l.split(',').map(|v| v.trim().parse::<f64>().unwrap()))
                .collect()
        })
        .collect()
}

#[test]
fn poisson_tails_match_mpmath_and_scipy() {
    // Reference: tests/reference/poisson.csv from make_poisson.py (mpmath 60 digits; scipy logsf beside it).
    let rows = read_csv("tests/reference/poisson.csv");
    assert!(rows.len() > 300);
    let mut deep = 0;
    for r in &rows {
        let (n, b, want) = (r["n"] as u64, r["b"], r["ln_sf"]);
        let got = poisson::ln_sf(n, b);
        if want == 0.0 {
            // 1 - p below 1e-308: ln p rounds to 0 in f64 (here too), and Z to -inf.
            assert_eq!(got, 0.0, "n={n} b={b}");
            assert_eq!(poisson::sigma_from_ln_p(got), f64::NEG_INFINITY);
            continue;
        }
        // Relative error of p below 1e-10 wherever p is representable; beyond, the same in ln p scaled by
        // its size (the rounding of ln p itself).
        let tol = 1e-10 * (want.abs() / 700.0).max(1.0);
        assert!(
            (got - want).abs() <= tol,
            "n={n} b={b}: ln_sf {got} vs mpmath {want}"
        );
        if r["ln_sf_scipy"].is_finite() {
            assert!(
                (got - r["ln_sf_scipy"]).abs() <= 1e-9 * want.abs().max(1.0),
                "n={n} b={b}: scipy"
            );
        }
        if want < -700.0 {
            deep += 1;
        }
        // One-sided Z from ln p, against the mpmath root; p far below 1e-300 included.
        let z = poisson::sigma_from_ln_p(got);
        let z_want = r["sigma"];
        assert!(
            (z - z_want).abs() <= 1e-9 * z_want.abs().max(1.0),
            "n={n} b={b}: Z {z} vs {z_want}"
        );
        // scipy's isf takes p itself, which has lost the digits of 1 - p when p is near 1.
        if r["sigma_scipy"].is_finite() && got < -std::f64::consts::LN_2 {
            assert!(
                (z - r["sigma_scipy"]).abs() <= 1e-8 * z_want.abs().max(1.0),
                "n={n} b={b}: scipy Z"
            );
        }
    }
    assert!(deep > 50, "too few rows below 1e-300: {deep}");
}

#[test]
fn normal_tail_matches_mpmath() {
    // Reference: tests/reference/normal.csv from make_poisson.py (mpmath; scipy norm.logsf beside it).
    for r in read_csv("tests/reference/normal.csv") {
        let (z, want) = (r["z"], r["ln_q"]);
        let got = poisson::ln_p_from_sigma(z);
        assert!(
            (got - want).abs() <= 1e-13 * want.abs().max(1e-300),
            "z={z}: {got} vs {want}"
        );
        assert!(
            (poisson::sigma_from_ln_p(want) - z).abs() <= 1e-12 * z.abs().max(1.0),
            "z={z}"
        );
    }
}

#[test]
fn poisson_tails_match_statrs() {
    // statrs (dev-dependency only) where its incomplete gamma is accurate: p above 1e-200, small n.
    for n in 1..=60_u64 {
        for &b in &[0.001, 0.05, 0.3, 1.0, 2.5, 7.0, 15.0, 40.0, 90.0] {
            let want = Poisson::new(b).unwrap().sf(n - 1);
            if want < 1e-200 {
                continue;
            }
            let got = poisson::sf(n, b);
            assert!(
                ((got - want) / want).abs() < 1e-9,
                "n={n} b={b}: {got} vs statrs {want}"
            );
        }
    }
}

#[test]
fn gaussian_quantiles_match_statrs() {
    let normal = Normal::standard();
    for i in 0..=300 {
        let z = -6.0 + 0.1 * f64::from(i);
        let want = normal.sf(z);
        let got = poisson::p_from_sigma(z);
        // statrs's erfc is good to a few 1e-11 (mpmath agrees with us to 1e-13 in normal.csv).
        assert!(
            ((got - want) / want).abs() < 1e-10,
            "z={z}: {got:e} vs statrs {want:e}"
        );
    }
    for &p in &[
        0.9, 0.5, 0.1, 1e-2, 1e-4, 1e-7, 1e-10, 1e-15, 1e-30, 1e-60, 1e-100,
    ] {
        let want = -normal.inverse_cdf(p);
        assert!(
            (poisson::sigma_from_p(p) - want).abs() < 1e-9 * want.abs().max(1.0),
            "p={p}"
        );
    }
}

#[test]
fn gehrels_limits_match_scipy_chi2() {
    // Gehrels 1986, Tables 1 and 2, n = 0..10, by the exact chi2 relation; reference:
    // tests/reference/gehrels.csv from make_gehrels.py (scipy chi2.ppf).
    let rows = read_csv("tests/reference/gehrels.csv");
    assert_eq!(rows.len(), 44);
    for r in rows {
        let (n, cl) = (r["n"] as u64, r["cl"]);
        let up = limits::gehrels_upper(n, cl).unwrap();
        let lo = limits::gehrels_lower(n, cl).unwrap();
        assert!(
            (up - r["upper"]).abs() < 1e-9 * r["upper"],
            "n={n} cl={cl}: upper {up} vs {}",
            r["upper"]
        );
        assert!(
            (lo - r["lower"]).abs() < 1e-9 * r["lower"].max(1e-3),
            "n={n} cl={cl}: lower {lo}"
        );
    }
}

fn demo(id: &str) -> InstrumentSpec {
    let text = std::fs::read_to_string(workspace_file(&format!("deploy/instruments/{id}.toml"))).unwrap();
    toml::from_str(&text).unwrap()
}

const LADDER: [f64; 8] = [0.01, 0.03, 0.1, 0.3, 1.0, 3.0, 10.0, 30.0];

fn params(radius_deg: f64) -> ReachParams {
    ReachParams {
        far_per_year: 1.0,
        timescales_s: LADDER.to_vec(),
        search_radius_deg: radius_deg,
        zenith_deg: 20.0,
        distances_pc: vec![0.01, 0.03, 0.1, 0.3],
    }
}

#[test]
fn demo_instruments_load_and_pass_their_checks() {
    for id in ["ventisca-array", "lumen-drift"] {
        let spec = demo(id);
        let mut problems = Vec::new();
        assert!(spec.check(id, &mut problems), "{id}: {problems:?}");
        let resp = InstrumentResponse::from_spec(&spec.response).unwrap();
        assert!(resp.effective_area_m2(resp.energy_min_gev() * 2.0, 10.0) > 0.0);
    }
}

#[test]
fn demo_instruments_reach_the_trade_distances() {
    // Common practice, no source (docs/science.md section 2): ground arrays see a final burst to about 0.1 pc, space
    // pair-conversion telescopes to about 0.03 pc. FAR 1/yr, the eight-step ladder, search radius 0.5 deg
    // (ground) and 1.0 deg (space), about the PSF near where most detected burst photons are.
    for (id, radius, trade_pc) in [("ventisca-array", 0.5, 0.1), ("lumen-drift", 1.0, 0.03)] {
        let report = reach_report(id, &demo(id), &params(radius)).unwrap();
        let r50 = report.best_r50_pc;
        assert!(
            r50 > trade_pc / 3.0 && r50 < trade_pc * 3.0,
            "{id}: best r50 {r50} pc"
        );
        for t in &report.timescales {
            assert!(t.r90_pc < t.r50_pc, "{id}: r90 must be nearer than r50");
            assert_eq!(
                t.critical_count,
                critical::critical_count(t.background, report.per_seed_bound).unwrap()
            );
            // The report's own detection probabilities bracket r50.
            for s in &t.signal {
                assert!(
                    (s.detection_probability >= 0.5) == (s.distance_pc <= t.r50_pc),
                    "{id}: {s:?}"
                );
            }
        }
        // The effective volume is about that of a sharp reach over the field of view (docs/science.md section 5).
        let spec = demo(id);
        let omega = glint_science::geometry::disc_solid_angle_sr(spec.response.max_zenith_deg);
        let sharp = limits::sharp_reach_volume_pc3(omega, r50).unwrap();
        let ratio = report.effective_volume_pc3 / sharp;
        assert!((0.2..2.0).contains(&ratio), "{id}: V_eff / sharp = {ratio}");
        let json = serde_json::to_string(&report).unwrap();
        assert!(json.contains("rate_density_ul_99_per_pc3_yr"));
    }
}

#[test]
fn reach_scales_as_the_square_root_of_the_area() {
    // docs/science.md section 5 [calc]: background-free, r_max grows as A_eff^(1/2); the background (set by the
    // rate, not the area) and so the critical counts stay the same, so quadrupling the area doubles r50.
    let spec = demo("lumen-drift");
    let mut big = spec.clone();
    for row in &mut big.response.effective_area.area_m2 {
        for a in row.iter_mut() {
            *a *= 4.0;
        }
    }
    let a = reach_report("x", &spec, &params(1.0)).unwrap();
    let b = reach_report("x", &big, &params(1.0)).unwrap();
    for (s, l) in a.timescales.iter().zip(&b.timescales) {
        assert!(
            (l.r50_pc / s.r50_pc - 2.0).abs() < 1e-6,
            "{} s: {} vs {}",
            s.timescale_s,
            s.r50_pc,
            l.r50_pc
        );
    }
}

#[test]
fn reach_rejects_bad_input() {
    let spec = demo("ventisca-array");
    let mut p = params(0.5);
    p.far_per_year = f64::NAN;
    assert!(reach_report("x", &spec, &p).is_err());
    let mut p = params(0.5);
    p.timescales_s.clear();
    assert!(reach_report("x", &spec, &p).is_err());
    let mut p = params(0.5);
    p.distances_pc.push(-1.0);
    assert!(reach_report("x", &spec, &p).is_err());
    assert!(reach_report("x", &spec, &params(-0.5)).is_err());
    let mut broken = spec.clone();
    broken.response.effective_area.energy_gev.reverse();
    broken.background.rate_hz = -3.0;
    match reach_report("x", &broken, &params(0.5)) {
        Err(glint_science::ScienceError::InvalidSpec { problems }) => {
            let keys: Vec<&str> = problems.iter().map(|p| p.key.as_str()).collect();
            assert!(
                keys.contains(&"instrument.response.effective_area.energy_gev"),
                "{keys:?}"
            );
            assert!(keys.contains(&"instrument.background.rate_hz"), "{keys:?}");
        }
        other => panic!("expected InvalidSpec, got {other:?}"),
    }
}
