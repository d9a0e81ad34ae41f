//! Issue 6's verdict checks on simulated data: glint-sim streams (the ventisca-array block, the daemon's
//! default engine settings) go through the engine, each assessment is matched to the source that made it,
//! and the verdicts are counted per class against the issue's fractions: evaporation bursts `isolated` in
//! at least 95% of detected cases, afterglow-like bursts and steady sources `persistent` in 90%, identical
//! timestamps and all-sky jumps `instrumental` in 95%, a burst followed by a dead interval `undecided`.
#![allow(missing_docs)]
#![allow(clippy::unwrap_used)] // tests may unwrap

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use glint_engine::{Assessment, Engine, EngineConfig, Finding, Verdict};
use glint_science::instrument::InstrumentResponse;
use glint_sim::scenario::Glitch;
use glint_sim::{Scenario, Simulator, Source, parse_scenario};
use glint_wire::pb::producer_frame::Body;

/// The site's latitude (deploy/instruments/ventisca-array.toml): sources are placed around the zenith.
const LAT: f64 = -26.3;

fn instrument_file() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../../deploy/instruments/ventisca-array.toml")
}

/// A scenario from its `[[source]]` tables: the ventisca-array instrument, the simulator's default batching.
fn scenario(name: &str, duration_s: f64, seed: u64, sources: &str) -> Scenario {
    let text = format!(
        r#"
[scenario]
name = "{name}"
start_utc = "2026-12-01T02:00:00Z"
duration_s = {duration_s}
seed = {seed}
[instrument]
id = "ventisca-array"
token = "unused"
spec_file = "{}"
{sources}
"#,
        instrument_file().display()
    );
    parse_scenario(&text, Path::new(env!("CARGO_MANIFEST_DIR")), name).unwrap()
}

/// The daemon's engine settings (daemon/glint/src/driver.rs `engine_config` with the defaults of
/// daemon/glint/src/config.rs): `EngineConfig::with_defaults`, the acceptance prior from the instrument's
/// background shape, the background's spectral index for the fit.
fn engine_config(s: &Scenario) -> EngineConfig {
    let spec = &s.instrument.spec;
    let response = InstrumentResponse::from_spec(&spec.response).unwrap();
    let mut c = EngineConfig::with_defaults(s.instrument.id.clone(), response);
    c.acceptance_prior_cos_power = Some(spec.background.zenith_cos_power);
    c.assess.background_spectral_index = spec.background.spectral_index;
    c
}

/// Every frame of the scenario through one engine, then `finish`.
fn run(s: &Scenario) -> Vec<Finding> {
    let mut e = Engine::new(engine_config(s)).unwrap();
    let mut out = Vec::new();
    for f in Simulator::new(s, s.seed).unwrap() {
        match f.body.unwrap() {
            Body::Hello(_) => {}
            Body::Batch(b) => e.push_batch(&b, &mut out).unwrap(),
            Body::Status(st) => e.push_status(&st, &mut out).unwrap(),
        }
    }
    e.finish(&mut out);
    out
}

/// Right ascension of the zenith `t_s` seconds after the start (the local sidereal time: about 32 deg at
/// the start, 15.04 deg per hour), degrees.
fn zenith_ra(t_s: f64) -> f64 {
    (32.0 + 15.041 * t_s / 3600.0).rem_euclid(360.0)
}

/// Twelve places around the zenith at time `t_s`, at least 9 deg apart (six on a ring of 9 deg, six on one
/// of 18 deg): far outside each other's candidate merge radius (about 3.5 deg).
fn place(slot: usize, t_s: f64) -> (f64, f64) {
    // Consecutive slots jump across the sky.
    let k = (slot * 5) % 12;
    let (radius, angle) = if k < 6 {
        (9.0, 60.0 * k as f64)
    } else {
        (18.0, 30.0 + 60.0 * (k - 6) as f64)
    };
    let a: f64 = f64::to_radians(angle);
    let dec = LAT + radius * a.sin();
    let ra = zenith_ra(t_s) + radius * a.cos() / dec.to_radians().cos();
    (ra.rem_euclid(360.0), dec)
}

fn angle_deg(ra1: f64, dec1: f64, ra2: f64, dec2: f64) -> f64 {
    let u = |ra: f64, dec: f64| {
        let (sd, cd) = dec.to_radians().sin_cos();
        let (sr, cr) = ra.to_radians().sin_cos();
        [cd * cr, cd * sr, sd]
    };
    let (a, b) = (u(ra1, dec1), u(ra2, dec2));
    (a[0] * b[0] + a[1] * b[1] + a[2] * b[2])
        .clamp(-1.0, 1.0)
        .acos()
        .to_degrees()
}

/// What made an assessment: the index of the source in the scenario, or nothing.
fn source_of(s: &Scenario, a: &Assessment) -> Option<usize> {
    let f = &a.trigger;
    // The best window (start, end] overlaps the source's active span [lo, hi].
    let overlaps = |lo: i64, hi: i64| f.start_ns < hi && f.end_ns >= lo;
    let near = |ra: f64, dec: f64| angle_deg(ra, dec, f.ra_deg, f.dec_deg) < 2.5;
    s.sources.iter().position(|src| match src {
        Source::Evaporation(e) => {
            near(e.ra_deg, e.dec_deg) && overlaps(e.t_gps_ns - (e.max_time_to_go_s * 1e9) as i64, e.t_gps_ns)
        }
        Source::AfterglowBurst(g) => {
            near(g.ra_deg, g.dec_deg)
                && overlaps(
                    g.t_gps_ns - (g.rise_s * 1e9) as i64,
                    g.t_gps_ns + (g.duration_s * 1e9) as i64,
                )
        }
        Source::Steady(st) => near(st.ra_deg, st.dec_deg),
        Source::Glitch(Glitch::IdenticalTimestamps {
            t_gps_ns,
            position: Some((ra, dec)),
            ..
        }) => near(*ra, *dec) && overlaps(*t_gps_ns, *t_gps_ns),
        Source::Glitch(Glitch::RateJump {
            t_gps_ns, duration_s, ..
        }) => overlaps(*t_gps_ns, t_gps_ns + (duration_s * 1e9) as i64),
        _ => false,
    })
}

// Counting: a "detected case" is one assessment matched to a source (a steady source gives one every few
// minutes). The streams are deterministic (fixed seeds), so the counts are the same on every run; each
// class has at least 40 cases so that a pass means something (binomial, [calc] with scipy.stats.binom):
// with 60 cases and a 95% requirement (at most 3 failures), a class whose true rate were 95% would pass
// with probability 0.65, one at 90% with 0.14, one at 99% with 0.997; with 48 cases and a 90% requirement
// (at most 4 failures), a true 90% passes with 0.47, 80% with 0.025, 96% with 0.96. So a pass says the
// class meets the issue's fraction or misses it by a few points at most, and a failure says it misses.
// The whole file runs in about 5 s in release on two cores.

/// Verdicts of one class of source.
#[derive(Default)]
struct Tally {
    /// One entry per assessment: its source (stream seed, index in the scenario) and verdict.
    cases: Vec<((u64, usize), Verdict)>,
    /// Sources of the class, and those that gave at least one assessment.
    injected: usize,
    detected: usize,
}

impl Tally {
    fn fraction(&self, v: Verdict) -> f64 {
        self.cases.iter().filter(|c| c.1 == v).count() as f64 / self.cases.len().max(1) as f64
    }

    /// One case per detected source: `v` when every assessment of the source says `v`, else the first
    /// verdict that does not.
    fn per_source(&self, v: Verdict) -> Self {
        let mut by: BTreeMap<(u64, usize), Verdict> = BTreeMap::new();
        for &(k, x) in &self.cases {
            let e = by.entry(k).or_insert(v);
            if *e == v {
                *e = x;
            }
        }
        Self {
            cases: by.into_iter().collect(),
            injected: self.injected,
            detected: self.detected,
        }
    }

    fn merge(&mut self, other: Self) {
        self.cases.extend(other.cases);
        self.injected += other.injected;
        self.detected += other.detected;
    }

    fn summary(&self) -> String {
        let mut by: BTreeMap<&str, usize> = BTreeMap::new();
        for (_, v) in &self.cases {
            *by.entry(v.as_str()).or_default() += 1;
        }
        format!(
            "{} cases from {} of {} sources: {by:?}",
            self.cases.len(),
            self.detected,
            self.injected
        )
    }

    /// Asserts at least `min_cases` cases and the fraction with verdict `v`, printing what was measured.
    fn require(&self, class: &str, v: Verdict, required: f64, min_cases: usize) {
        let got = self.fraction(v);
        println!(
            "{class}: {} {:.3} (issue 6 requires >= {required}); {}",
            v.as_str(),
            got,
            self.summary()
        );
        assert!(
            self.cases.len() >= min_cases,
            "{class}: only {} detected cases, want >= {min_cases} for the fraction to mean something; {}",
            self.cases.len(),
            self.summary()
        );
        assert!(
            got >= required,
            "{class}: issue 6 requires `{}` in at least {required} of detected cases, measured {got:.3}; {}",
            v.as_str(),
            self.summary()
        );
    }
}

/// Runs the stream and files each assessment under the class `class_of` gives its source; an assessment
/// with no source is a false alarm (the search runs at one per year, so there should be none). `keep`
/// filters the assessments counted.
fn tally(
    s: &Scenario,
    class_of: impl Fn(&Source) -> Option<&'static str>,
    keep: impl Fn(&Assessment) -> bool,
) -> BTreeMap<&'static str, Tally> {
    let out = run(s);
    let mut t: BTreeMap<&'static str, Tally> = BTreeMap::new();
    let mut seen = vec![false; s.sources.len()];
    for f in &out {
        let Finding::Assessment(a) = f else { continue };
        let Some(i) = source_of(s, a) else {
            panic!("assessment with no injected source (false alarm or mismatch): {a:?}");
        };
        let Some(class) = class_of(&s.sources[i]) else {
            continue;
        };
        if keep(a) {
            t.entry(class).or_default().cases.push(((s.seed, i), a.verdict));
            seen[i] = true;
        }
    }
    for (i, src) in s.sources.iter().enumerate() {
        if let Some(class) = class_of(src) {
            let e = t.entry(class).or_default();
            e.injected += 1;
            e.detected += usize::from(seen[i]);
        }
    }
    t
}

/// `n` evaporation bursts `spacing_s` apart from 0.02 to 0.12 pc (the array sees about half of those at
/// 0.12 pc), emitting over the last 100 or 300 s.
fn evaporation_stream(seed: u64, n: usize, spacing_s: f64) -> Scenario {
    let mut src = String::new();
    let distances = [0.02, 0.03, 0.04, 0.05, 0.06, 0.07, 0.08, 0.10, 0.12];
    for i in 0..n {
        let t = 360.0 + spacing_s * i as f64;
        let (ra, dec) = place(i, t);
        let d = distances[i % distances.len()];
        let ttg = [100.0, 300.0][(i / distances.len()) % 2];
        src += &format!(
            "[[source]]\nkind = \"evaporation\"\nra_deg = {ra}\ndec_deg = {dec}\ndistance_pc = {d}\n\
             t_offset_s = {t}\nmax_time_to_go_s = {ttg}\n"
        );
    }
    // The last persistence window (at most 300 s after the last crossing) closes before the end.
    let duration = 360.0 + spacing_s * n as f64 + 400.0;
    scenario("evaporation", duration, seed, &src)
}

#[test]
fn evaporation_bursts_come_out_isolated() {
    // Bursts 80 s apart: a candidate may take crossings from 300 s before its explosion (when its emission
    // starts) to 300 s after its last crossing, so a place is reused only after 12 x 80 s = 960 s.
    let mut all = Tally::default();
    for (seed, n) in [(61, 45), (62, 45)] {
        let s = evaporation_stream(seed, n, 80.0);
        let t = tally(
            &s,
            |src| matches!(src, Source::Evaporation(_)).then_some("evaporation"),
            |_| true,
        );
        all.merge(t.into_values().next().unwrap());
    }
    all.require("evaporation 0.02-0.12 pc", Verdict::Isolated, 0.95, 60);
}

#[test]
fn afterglow_like_bursts_come_out_persistent() {
    // Peaks of 60 to 150 detected photons per second reached in 1 to 3 s, tails of index 1.1 to 1.3 lasting
    // 900 s (longer than any persistence window). About a fifth of these soft photons (index 2.5, PSF 1.5 deg
    // at 300 GeV) land in the 0.5 deg search disc, so the tail after the best window gives a few tens of
    // counts over the persistence window on 5 to 20 of background. A quarter of the bursts rise in 0.5 s
    // instead: their tail fades from half a second on and leaves only 5 to 10 photons in the disc after the
    // flash, too few for any rule to tell from no tail; their fraction is printed, not required.
    let mut src = String::new();
    let n = 64;
    let spacing = 80.0;
    for i in 0..n {
        let t = 120.0 + spacing * i as f64;
        let (ra, dec) = place(i, t);
        let peak = [60.0, 100.0, 150.0][i % 3];
        let rise = [1.0, 2.0, 3.0, 0.5][i % 4];
        let decay = [1.1, 1.2, 1.3][(i / 4) % 3];
        src += &format!(
            "[[source]]\nkind = \"afterglow_burst\"\nra_deg = {ra}\ndec_deg = {dec}\nt_offset_s = {t}\n\
             rise_s = {rise}\npeak_rate_hz = {peak}\ndecay_index = {decay}\nduration_s = 900\n\
             spectral_index = 2.5\n"
        );
    }
    let s = scenario("afterglow", 120.0 + spacing * n as f64 + 700.0, 71, &src);
    let t = tally(
        &s,
        |src| match src {
            Source::AfterglowBurst(g) if g.rise_s >= 1.0 => Some("afterglow"),
            Source::AfterglowBurst(_) => Some("afterglow, 0.5 s rise"),
            _ => None,
        },
        |_| true,
    );
    let fast = &t["afterglow, 0.5 s rise"];
    println!(
        "afterglow-like, 0.5 s rise (not required): persistent {:.3}; {}",
        fast.fraction(Verdict::Persistent),
        fast.summary()
    );
    t["afterglow"].require(
        "afterglow-like, decay index 1.1-1.3, rise 1-3 s",
        Verdict::Persistent,
        0.90,
        40,
    );
}

#[test]
fn steady_sources_come_out_persistent() {
    // Eight sources of 2 detected photons per second, bright enough to cross the 30 s threshold every few
    // minutes; each crossing opens a candidate once the previous one has closed. The last candidate of each
    // source is still open when the stream ends and comes out `undecided` (cut short) by rule: those are
    // left out.
    let mut src = String::new();
    let duration = 3600.0;
    for i in 0..8 {
        let (ra, dec) = place(i, duration / 2.0);
        src += &format!(
            "[[source]]\nkind = \"steady\"\nra_deg = {ra}\ndec_deg = {dec}\nrate_hz = 2.0\nspectral_index = 2.5\n"
        );
    }
    let s = scenario("steady", duration, 81, &src);
    let t = tally(
        &s,
        |src| matches!(src, Source::Steady(_)).then_some("steady"),
        |a| !a.flags.iter().any(|f| f == "cut_short"),
    );
    t["steady"].require("steady 2 Hz", Verdict::Persistent, 0.90, 40);
}

#[test]
fn glitches_and_all_sky_jumps_come_out_instrumental() {
    // Alternating every 60 s: 8 to 40 events with one timestamp at one place (scattered by 0 to 0.4 deg),
    // then a jump of the all-sky rate (x30 to x60 for 1 to 2 s; weaker or shorter jumps seldom cross the
    // thresholds at all: x20 for half a second puts less than one extra photon in a search disc). A jump
    // makes up to a few tens of candidates at once all over the sky: the fraction is required both over the
    // candidates and over the jumps (a jump passes when every one of its candidates is instrumental).
    let mut src = String::new();
    let n = 60;
    for i in 0..n {
        let t = 120.0 + 120.0 * i as f64;
        let (ra, dec) = place(i, t);
        let photons = [8, 15, 40][i % 3];
        let spread = [0.0, 0.2, 0.4][(i / 3) % 3];
        src += &format!(
            "[[source]]\nkind = \"glitch\"\nmode = \"identical_timestamps\"\nt_offset_s = {t}\n\
             photons = {photons}\nra_deg = {ra}\ndec_deg = {dec}\nspread_deg = {spread}\n"
        );
        let factor = [30.0, 45.0, 60.0][i % 3];
        let length = [1.0, 1.5, 2.0][(i / 3) % 3];
        src += &format!(
            "[[source]]\nkind = \"glitch\"\nmode = \"rate_jump\"\nt_offset_s = {}\nduration_s = {length}\n\
             factor = {factor}\n",
            t + 60.0
        );
    }
    let s = scenario("glitches", 120.0 + 120.0 * n as f64 + 100.0, 91, &src);
    let t = tally(
        &s,
        |src| match src {
            Source::Glitch(Glitch::IdenticalTimestamps { .. }) => Some("identical"),
            Source::Glitch(Glitch::RateJump { .. }) => Some("jump"),
            _ => None,
        },
        |_| true,
    );
    t["identical"].require("identical timestamps", Verdict::Instrumental, 0.95, 40);
    t["jump"].require("all-sky jump, per candidate", Verdict::Instrumental, 0.95, 40);
    t["jump"].per_source(Verdict::Instrumental).require(
        "all-sky jump, per jump",
        Verdict::Instrumental,
        0.95,
        40,
    );
}

#[test]
fn a_burst_followed_by_a_dead_interval_comes_out_undecided() {
    // A clear burst (the last 10 s of an evaporation at 0.03 to 0.06 pc), then from half a second after it
    // either a declared dead interval of 25 s or a silent gap of 60 s (lost frames, a sequence gap). The
    // simulator declares a dead interval in the first status after it ends, so it reaches the engine only
    // if it ends before the persistence window closes (at least 30 s); 25 s is over a tenth of any window
    // these bursts get (their best timescale is at most 10 s, so the window is at most 100 s).
    let mut src = String::new();
    let n = 44;
    let spacing = 120.0;
    for i in 0..n {
        let t = 120.0 + spacing * i as f64;
        let (ra, dec) = place(i, t);
        let d = [0.03, 0.04, 0.05, 0.06][i % 4];
        src += &format!(
            "[[source]]\nkind = \"evaporation\"\nra_deg = {ra}\ndec_deg = {dec}\ndistance_pc = {d}\n\
             t_offset_s = {t}\nmax_time_to_go_s = 10\n"
        );
        let (length, declared) = if i % 2 == 0 { (25.0, true) } else { (60.0, false) };
        src += &format!(
            "[[source]]\nkind = \"dead\"\nt_offset_s = {}\nduration_s = {length}\ndeclared = {declared}\n",
            t + 0.5
        );
    }
    let s = scenario("dead", 120.0 + spacing * n as f64 + 200.0, 101, &src);
    let t = tally(
        &s,
        |src| matches!(src, Source::Evaporation(_)).then_some("burst+dead"),
        |_| true,
    );
    let b = &t["burst+dead"];
    b.require("burst followed by dead time", Verdict::Undecided, 1.0, 40);
}
