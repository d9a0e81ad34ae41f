//! The scenarios shipped in deploy/scenarios load and generate, and bad scenario files give errors that
//! name the source (index and kind) and the key, every problem at once.

#![allow(clippy::unwrap_used)]

mod common;

use std::path::{Path, PathBuf};

use glint_sim::{Problem, SimError, Simulator, load_scenario, parse_scenario};
use glint_wire::pb::producer_frame::Body;

fn deploy(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../../deploy/scenarios")
        .join(name)
}

/// Runs the first `seconds` of a scenario; returns (photons, truth photons per source).
fn run_for(path: &Path, seconds: Option<i64>) -> (u64, Vec<u64>) {
    let s = load_scenario(path).unwrap();
    let mut sim = Simulator::new(&s, s.seed).unwrap();
    let stop = seconds.map(|sec| s.start_gps_ns + sec * 1_000_000_000);
    let mut photons = 0;
    for f in sim.by_ref() {
        match f.body {
            Some(Body::Batch(b)) => photons += b.time_gps_ns.len() as u64,
            Some(Body::Status(st)) if stop.is_some_and(|t| st.now_gps_ns >= t) => break,
            _ => {}
        }
    }
    (photons, sim.truth().iter().map(|t| t.photons).collect())
}

fn assert_poisson(what: &str, n: u64, expected: f64) {
    assert!(
        (n as f64 - expected).abs() < 4.0 * expected.sqrt(),
        "{what}: {n} photons, expected {expected}"
    );
}

#[test]
fn quiet_hour_is_background_only() {
    let s = load_scenario(&deploy("quiet-hour.toml")).unwrap();
    assert!(s.sources.is_empty());
    let rate = s.instrument.spec.background.rate_hz;
    let (n, truth) = run_for(&deploy("quiet-hour.toml"), None);
    assert!(truth.is_empty());
    assert_poisson("quiet hour", n, rate * 3600.0);
}

#[test]
fn one_burst_has_both_bursts() {
    let s = load_scenario(&deploy("one-burst.toml")).unwrap();
    let kinds: Vec<&str> = s.sources.iter().map(|s| s.kind()).collect();
    assert_eq!(kinds, ["evaporation", "afterglow_burst"]);
    let (_, truth) = run_for(&deploy("one-burst.toml"), None);
    assert!(truth.iter().all(|&n| n > 10), "{truth:?}");
}

#[test]
fn demo_shows_each_case_quickly() {
    let s = load_scenario(&deploy("demo.toml")).unwrap();
    // Twelve minutes: long enough for every persistence window to close, short enough to replay in a blink.
    assert!(s.duration_ns <= 720_000_000_000);
    let mut sim = Simulator::new(&s, s.seed).unwrap();
    for _ in sim.by_ref() {}
    let truth = sim.truth();
    let kinds: Vec<&str> = truth.iter().map(|t| t.kind).collect();
    assert_eq!(
        kinds,
        ["glitch", "evaporation", "afterglow_burst", "evaporation", "dead"]
    );
    // The first evaporation burst is about two minutes in and clear: tens of photons in its last second.
    let t = &truth[1];
    assert!((t.t_gps_ns - s.start_gps_ns - 120_000_000_000).abs() < 30_000_000_000);
    assert!(
        t.counts_by_timescale[4].counts >= 20,
        "{:?}",
        t.counts_by_timescale
    );
    assert!(truth[..4].iter().all(|t| t.photons > 10));
}

#[test]
fn stress_starts_at_20_khz() {
    // The first 20 s only in a debug build; the full ten minutes run in release (`glint simulate`).
    let s = load_scenario(&deploy("stress-20khz.toml")).unwrap();
    assert_eq!(s.instrument.spec.background.rate_hz, 20_000.0);
    assert_eq!(s.duration_ns, 600_000_000_000);
    let (n, _) = run_for(&deploy("stress-20khz.toml"), Some(20));
    assert_poisson("stress, first 20 s", n, 20_000.0 * 20.0);
}

fn problems(text: &str) -> Vec<Problem> {
    match parse_scenario(text, Path::new(env!("CARGO_MANIFEST_DIR")), "bad") {
        Err(SimError::Invalid { problems, .. }) => problems,
        other => panic!("expected Invalid, got {other:?}"),
    }
}

fn has(problems: &[Problem], key: &str, words: &str) {
    assert!(
        problems.iter().any(|p| p.key == key && p.message.contains(words)),
        "no problem at {key} mentioning {words:?} in {problems:#?}"
    );
}

fn with_sources(sources: &str) -> String {
    format!("{}{}{sources}", common::header("bad", 60.0), common::GROUND)
}

#[test]
fn bad_sources_are_named_by_index_kind_and_key() {
    let p = problems(&with_sources(
        r#"
[[source]]
kind = "evaporation"
ra_deg = 35.0
dec_deg = -22.0
distance_pc = -0.05
t_offset_s = 20.0
[[source]]
kind = "supernova"
ra_deg = 1.0
[[source]]
kind = "steady"
ra_deg = 400.0
dec_deg = 0.0
rate_hz = 1.0
spectral_index = 2.0
[[source]]
kind = "glitch"
mode = "sideways"
t_offset_s = 3.0
[[source]]
kind = "afterglow_burst"
ra_deg = 1.0
dec_deg = 0.0
t_offset_s = 3.0
t_utc = "2026-12-01T02:00:03Z"
rise_s = 1.0
peak_rate_hz = 10.0
decay_index = 1.0
duration_s = 10.0
spectral_index = 2.0
[[source]]
kind = "dead"
t_offset_s = 5.0
duration_s = 1.0
colour = "red"
"#,
    ));
    // Every problem at once.
    assert_eq!(p.len(), 6, "{p:#?}");
    has(&p, "source[0] (evaporation).distance_pc", "-0.05");
    has(&p, "source[1].kind", "supernova");
    has(&p, "source[2] (steady).ra_deg", "400");
    has(&p, "source[3] (glitch).mode", "sideways");
    has(&p, "source[4] (afterglow_burst).t_offset_s", "not both");
    has(&p, "source[5] (dead)", "colour");
    // The error prints each problem on its own line.
    let shown = parse_scenario(
        &with_sources("[[source]]\nkind = \"supernova\"\n"),
        Path::new("."),
        "bad",
    )
    .unwrap_err()
    .to_string();
    assert!(
        shown.contains("source[0].kind: unknown source kind \"supernova\""),
        "{shown}"
    );
}

#[test]
fn missing_instrument_fields_are_named() {
    let text = format!(
        "{}{}",
        common::header("bad", 60.0),
        common::GROUND.replace("rate_hz = 200.0\n", "")
    );
    has(&problems(&text), "instrument.background", "rate_hz");
    let text = format!(
        "{}[instrument]\nid = \"x\"\ntoken = \"t\"\nspec_file = \"no/such/file.toml\"\n",
        common::header("bad", 60.0)
    );
    let p = problems(&text);
    assert!(
        p.iter()
            .any(|p| p.key.starts_with("instrument.spec_file") && p.message.contains("cannot read")),
        "{p:#?}"
    );
    let text = format!(
        "{}{}",
        common::header("bad", 60.0),
        common::GROUND.replace("max_zenith_deg = 45.0", "max_zenith_deg = -3.0")
    );
    has(&problems(&text), "instrument.response.max_zenith_deg", "-3");
    let text = format!(
        "{}{}",
        common::header("bad", 60.0).replace("jitter_s = 0.002", "jitter_s = 0.05"),
        common::GROUND
    );
    has(&problems(&text), "scenario.jitter_s", "0.05");
}

#[test]
fn a_source_never_in_view_is_an_error() {
    // From latitude -26.3 a source at declination +80 never rises within 45 deg of the zenith.
    let text = with_sources(
        "[[source]]\nkind = \"steady\"\nra_deg = 10.0\ndec_deg = -30.0\nrate_hz = 1.0\nspectral_index = 2.0\n\
         [[source]]\nkind = \"evaporation\"\nra_deg = 10.0\ndec_deg = 80.0\ndistance_pc = 0.05\nt_offset_s = 30.0\n",
    );
    let s = parse_scenario(&text, Path::new("."), "bad").unwrap();
    match Simulator::new(&s, 1) {
        Err(SimError::Invalid { problems, .. }) => {
            assert_eq!(problems.len(), 1, "{problems:#?}");
            has(
                &problems,
                "source[1] (evaporation).dec_deg",
                "outside the field of view",
            );
        }
        other => panic!("expected Invalid, got {other:?}"),
    }
    // A burst whose whole window lies before the run starts is refused by the scenario check itself.
    has(
        &problems(&with_sources(
            "[[source]]\nkind = \"evaporation\"\nra_deg = 10.0\ndec_deg = -30.0\ndistance_pc = 0.05\nt_offset_s = -5.0\n",
        )),
        "source[0] (evaporation).t_offset_s",
        "misses the run",
    );
}

#[test]
fn deploy_scenarios_all_parse() {
    let mut names: Vec<String> = std::fs::read_dir(deploy(""))
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n.ends_with(".toml"))
        .collect();
    names.sort();
    assert_eq!(
        names,
        [
            "background-10khz.toml",
            "background-300hz.toml",
            "demo.toml",
            "one-burst.toml",
            "quiet-hour.toml",
            "stress-10khz.toml",
            "stress-20khz.toml"
        ]
    );
    for n in names {
        let s = load_scenario(&deploy(&n)).unwrap();
        assert_eq!(s.name, n.trim_end_matches(".toml"));
        assert_eq!(s.instrument.id, "ventisca-array");
        Simulator::new(&s, s.seed).unwrap();
    }
}

#[test]
fn switched_steady_sources_and_clusters_are_checked_and_drawn() {
    // A steady source switched off before it is switched on, and a cluster with a negative radius.
    let p = problems(&with_sources(
        r#"
[[source]]
kind = "steady"
ra_deg = 35.0
dec_deg = -22.0
rate_hz = 1.0
spectral_index = 2.0
on_offset_s = 40
off_offset_s = 20

[[source]]
kind = "glitch"
mode = "cluster"
t_offset_s = 10
duration_s = 0.005
photons = 40
ra_deg = 35.0
dec_deg = -22.0
radius_deg = -1.0
"#,
    ));
    has(&p, "source[0] (steady).off_offset_s", "switched off after");
    has(&p, "source[1] (glitch).radius_deg", "");

    // Good ones: the steady source's photons come only while it is on, the cluster's inside its disc and
    // its 5 ms.
    let text = with_sources(
        r#"
[[source]]
kind = "steady"
ra_deg = 35.0
dec_deg = -22.0
rate_hz = 5.0
spectral_index = 2.0
on_offset_s = 20
off_offset_s = 40

[[source]]
kind = "glitch"
mode = "cluster"
t_offset_s = 10
duration_s = 0.005
photons = 40
ra_deg = 35.0
dec_deg = -22.0
radius_deg = 2.0
"#,
    );
    let s = parse_scenario(&text, Path::new(env!("CARGO_MANIFEST_DIR")), "good").unwrap();
    let mut sim = Simulator::new(&s, 3).unwrap();
    for _ in sim.by_ref() {}
    let truth = sim.truth();
    // 5 Hz for 20 s.
    assert_poisson("switched steady source", truth[0].photons, 100.0);
    assert_eq!(truth[1].photons, 40);
}
