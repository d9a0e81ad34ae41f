//! Coverage of the evaporation fit's 90% distance interval through the whole engine (docs/science.md
//! section 4): glint-sim evaporation bursts at 0.02 to 0.11 pc and 0 to 40 degrees from the zenith on the
//! ventisca-array's own background go through flash, candidate and assessment, and each detected burst's
//! fitted interval is checked against the truth. The full-size run (120 bursts per distance) is ignored:
//! `cargo test --release -p glint-engine --test distance -- --ignored --nocapture`.
#![allow(missing_docs)]
#![allow(clippy::unwrap_used)] // tests may unwrap

use std::fmt::Write;
use std::path::{Path, PathBuf};

use glint_engine::{Engine, EngineConfig, Finding};
use glint_science::instrument::InstrumentResponse;
use glint_sim::{Scenario, Simulator, Source, parse_scenario};
use glint_wire::pb::producer_frame::Body;

const LAT: f64 = -26.3;
const DISTANCES: [f64; 5] = [0.02, 0.05, 0.07, 0.09, 0.11];
/// Seconds between bursts; 24 places in turn, so one place is reused only after 1200 s.
const SPACING_S: f64 = 50.0;
const PLACES: usize = 24;
/// Photons are drawn from this long before each explosion. The fit window reaches 30 s before a
/// candidate's first crossing, and a bright burst crosses as soon as its photons begin: a burst cut off
/// shortly before that would leave the window's start empty of the signal the model expects there (a
/// simulation artefact that reads as a far bias of a few percent at 0.02 pc with 100 s). 800 s plus the
/// longest persistence window (300 s) stays below the 1200 s between bursts at one place.
const MAX_TIME_TO_GO_S: f64 = 800.0;

fn scenario(distances: &[f64], bursts: usize, seed: u64) -> Scenario {
    let mut sources = String::new();
    for i in 0..bursts {
        let t = MAX_TIME_TO_GO_S + 120.0 + SPACING_S * i as f64;
        let (ra, dec) = place(i % PLACES, t);
        let d = distances[i % distances.len()];
        write!(
            sources,
            "[[source]]\nkind = \"evaporation\"\nra_deg = {ra}\ndec_deg = {dec}\ndistance_pc = {d}\n\
             t_offset_s = {t}\nmax_time_to_go_s = {MAX_TIME_TO_GO_S}\n"
        )
        .unwrap();
    }
    let duration = MAX_TIME_TO_GO_S + 120.0 + SPACING_S * bursts as f64 + 400.0;
    let file = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../../deploy/instruments/ventisca-array.toml");
    let text = format!(
        "[scenario]\nname = \"distance\"\nstart_utc = \"2026-12-01T02:00:00Z\"\nduration_s = {duration}\n\
         seed = {seed}\n[instrument]\nid = \"ventisca-array\"\ntoken = \"unused\"\nspec_file = \"{}\"\n{sources}",
        file.display()
    );
    parse_scenario(&text, Path::new(env!("CARGO_MANIFEST_DIR")), "distance").unwrap()
}

/// Right ascension of the zenith `t_s` after the start (local sidereal time), degrees.
fn zenith_ra(t_s: f64) -> f64 {
    (32.0 + 15.041 * t_s / 3600.0).rem_euclid(360.0)
}

/// 24 places, six on each ring at 5, 15, 25 and 35 degrees from the zenith, at least 5 degrees apart
/// (beyond the candidate merge radius, about 3.5 degrees); consecutive slots jump across the sky.
fn place(slot: usize, t_s: f64) -> (f64, f64) {
    let k = (slot * 5) % PLACES;
    let radius = [5.0, 15.0, 25.0, 35.0][k / 6];
    let angle = (60.0 * (k % 6) as f64 + 15.0 * (k / 6) as f64).to_radians();
    let dec = LAT + radius * angle.sin();
    let ra = zenith_ra(t_s) + radius * angle.cos() / dec.to_radians().cos();
    (ra.rem_euclid(360.0), dec)
}

fn engine_config(s: &Scenario) -> EngineConfig {
    let spec = &s.instrument.spec;
    let response = InstrumentResponse::from_spec(&spec.response).unwrap();
    let mut c = EngineConfig::with_defaults(s.instrument.id.clone(), response);
    c.acceptance_prior_cos_power = Some(spec.background.zenith_cos_power);
    c.assess.background_spectral_index = spec.background.spectral_index;
    c
}

fn angle_deg(ra1: f64, dec1: f64, ra2: f64, dec2: f64) -> f64 {
    let u = |ra: f64, dec: f64| {
        let (sd, cd) = f64::to_radians(dec).sin_cos();
        let (sr, cr) = f64::to_radians(ra).sin_cos();
        [cd * cr, cd * sr, sd]
    };
    let (a, b) = (u(ra1, dec1), u(ra2, dec2));
    (a[0] * b[0] + a[1] * b[1] + a[2] * b[2])
        .clamp(-1.0, 1.0)
        .acos()
        .to_degrees()
}

/// Per distance of `distances` (bursts take them in turn): (detected with a converged fit, interval covers,
/// fitted / true ratios).
fn run(distances: &[f64], bursts: usize, seed: u64) -> Vec<(usize, usize, Vec<f64>)> {
    let s = scenario(distances, bursts, seed);
    let mut e = Engine::new(engine_config(&s)).unwrap();
    let mut out = Vec::new();
    for f in Simulator::new(&s, s.seed).unwrap() {
        match f.body.unwrap() {
            Body::Hello(_) => {}
            Body::Batch(b) => e.push_batch(&b, &mut out).unwrap(),
            Body::Status(st) => e.push_status(&st, &mut out).unwrap(),
        }
    }
    e.finish(&mut out);
    let mut per = vec![(0usize, 0usize, Vec::new()); distances.len()];
    let mut seen = vec![false; s.sources.len()];
    for f in &out {
        let Finding::Assessment(a) = f else { continue };
        let tr = &a.trigger;
        let found = s.sources.iter().position(|src| match src {
            Source::Evaporation(ev) => {
                angle_deg(ev.ra_deg, ev.dec_deg, tr.ra_deg, tr.dec_deg) < 2.5
                    && tr.start_ns < ev.t_gps_ns
                    && tr.end_ns >= ev.t_gps_ns - (MAX_TIME_TO_GO_S * 1e9) as i64
            }
            _ => false,
        });
        let Some(i) = found else { continue };
        let Source::Evaporation(ev) = &s.sources[i] else {
            continue;
        };
        if seen[i] || !a.fit.converged {
            continue;
        }
        seen[i] = true;
        let k = distances.iter().position(|&d| d == ev.distance_pc).unwrap();
        let d = ev.distance_pc;
        per[k].0 += 1;
        if a.fit.distance_pc_lo <= d && d <= a.fit.distance_pc_hi {
            per[k].1 += 1;
        }
        per[k].2.push(a.fit.distance_pc / d);
    }
    per
}

fn report(distances: &[f64], per: &mut [(usize, usize, Vec<f64>)]) -> Vec<(f64, f64)> {
    per.iter_mut()
        .zip(distances)
        .map(|((n, c, ratios), d)| {
            ratios.sort_by(f64::total_cmp);
            let median = ratios.get(ratios.len() / 2).copied().unwrap_or(f64::NAN);
            let cov = *c as f64 / (*n).max(1) as f64;
            println!(
                "{d} pc: {n} fitted, 90% interval covers in {c} ({cov:.3}), median fitted/true {median:.3}"
            );
            (cov, median)
        })
        .collect()
}

// CI size: 24 bursts per distance, all distances pooled for the coverage (about 100 fits; binomial sd 3%
// at 0.90, band 0.80-0.98 about 3 sd) and each distance's median within 15% (sd of a median of ~20
// ratios of about 20%/sqrt(20) x 1.25 = 6%).
#[test]
fn distance_interval_covers_through_the_engine() {
    let mut per = run(&DISTANCES, 120, 21);
    let rows = report(&DISTANCES, &mut per);
    let (n, c): (usize, usize) = per.iter().fold((0, 0), |(n, c), x| (n + x.0, c + x.1));
    let pooled = c as f64 / n as f64;
    assert!(n >= 80, "{n} fitted bursts");
    assert!((0.80..=0.98).contains(&pooled), "pooled coverage {pooled}");
    for ((_, median), d) in rows.iter().zip(DISTANCES) {
        assert!(
            (0.85..=1.15).contains(median),
            "median fitted/true {median} at {d} pc"
        );
    }
}

// Full size: 120 bursts per distance. The project's bands: coverage 0.85-0.95, here widened by two binomial
// sd of each distance's sample (0.09/n)^1/2, and the median within 5% wherever at least 80% of the bursts
// are detected and fitted. At the reach's edge (0.11 pc, about 40% detected) only bursts that fluctuated
// up are detected, so their fitted distances lie nearer than the truth (a selection effect of the trigger,
// not of the fit; README gives the figure).
#[test]
#[ignore = "full-size run, several minutes; figures in README"]
fn full_size_distance_coverage() {
    let mut per = run(&DISTANCES, 600, 22);
    let rows = report(&DISTANCES, &mut per);
    for (((n, _, _), (cov, median)), d) in per.iter().zip(&rows).zip(DISTANCES) {
        let sd = (0.09 / *n as f64).sqrt();
        assert!(
            (0.85 - 2.0 * sd..=0.95 + 2.0 * sd).contains(cov),
            "coverage {cov} at {d} pc ({n} fits)"
        );
        if *n >= 96 {
            assert!((0.95..=1.05).contains(median), "median {median} at {d} pc");
        }
    }
}

/// The reach's edge alone, with enough bursts for 100 detections there (about 40% are detected): 280 bursts
/// at 0.11 pc. Prints the row README quotes; asserts the coverage band widened by two binomial sd (the
/// median's selection bias is the figure to read, not asserted). `GLINT_DIST_PC` and `GLINT_DIST_BURSTS`
/// run another distance (README's larger sample at 0.09 pc: 0.09 and 240).
#[test]
#[ignore = "full-size run at 0.11 pc, several minutes; figures in README"]
fn edge_distance_coverage() {
    let var = |k: &str| std::env::var(k).ok().and_then(|v| v.parse::<f64>().ok());
    let d = [var("GLINT_DIST_PC").unwrap_or(0.11)];
    let bursts = var("GLINT_DIST_BURSTS").map_or(280, |b| b as usize);
    let mut per = run(&d, bursts, 23);
    let rows = report(&d, &mut per);
    let (n, cov) = (per[0].0, rows[0].0);
    let sd = (0.09 / n as f64).sqrt();
    assert!(n >= 100, "{n} fits at {} pc", d[0]);
    assert!(
        (0.85 - 2.0 * sd..=0.95 + 2.0 * sd).contains(&cov),
        "coverage {cov} at {} pc ({n} fits)",
        d[0]
    );
}
