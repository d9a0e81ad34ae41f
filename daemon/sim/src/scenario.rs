//! Scenario files: the raw TOML (a `[scenario]` header, an `[instrument]` block and `[[source]]` tables) and
//! its checked form. Every problem is reported at once, each naming its key; a source's problems name the
//! source by index and kind (`source[2] (evaporation).distance_pc`), so a file can be fixed in one pass.
//! Checks that need the instrument in motion (is a source ever in the field of view?) are done by
//! `Simulator::new`, which reports them the same way.

use std::path::{Path, PathBuf};

use glint_science::instrument::{BackgroundSpec, InstrumentSpec, ResponseSpec, SiteSpec};
use serde::{Deserialize, Serialize};

use crate::SimError;
use crate::sky::parse_utc_to_gps_ns;

/// One problem in a scenario: the dotted key and what is wrong with it.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Problem {
    /// e.g. `scenario.duration_s`, `instrument.response.max_zenith_deg`, `source[1] (glitch).factor`.
    pub key: String,
    /// What is wrong.
    pub message: String,
}

impl std::fmt::Display for Problem {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{}: {}", self.key, self.message)
    }
}

/// The checked scenario: times resolved to GPS nanoseconds, the instrument block loaded and checked.
#[derive(Debug, Clone, PartialEq)]
pub struct Scenario {
    /// Scenario name (from `[scenario] name`, or the file name when absent).
    pub name: String,
    /// Stream start, GPS ns (`start_utc`).
    pub start_gps_ns: i64,
    /// Stream length, ns (`duration_s`).
    pub duration_ns: i64,
    /// The seed written in the file (a command line may override it).
    pub seed: u64,
    /// Largest number of photons in one batch.
    pub batch_max_photons: usize,
    /// Longest span of event time one batch covers, ns.
    pub batch_max_ns: i64,
    /// Largest amount by which a photon is sent late relative to its time, ns (out-of-order jitter).
    pub jitter_ns: i64,
    /// Period of the `StreamStatus` heartbeats, ns.
    pub status_period_ns: i64,
    /// The instrument the stream claims to come from.
    pub instrument: ScenarioInstrument,
    /// The sources, in file order (a source's index is its place here).
    pub sources: Vec<Source>,
}

impl Scenario {
    /// End of the stream, GPS ns (exclusive).
    pub fn end_gps_ns(&self) -> i64 {
        self.start_gps_ns + self.duration_ns
    }
}

/// The instrument of a scenario: what the `Hello` carries and the response the photons are drawn with.
#[derive(Debug, Clone, PartialEq)]
pub struct ScenarioInstrument {
    /// Instrument id sent in the `Hello`.
    pub id: String,
    /// Token sent in the `Hello`.
    pub token: String,
    /// Site, response and background (from `spec_file`, each table replaced by an inline one when given).
    pub spec: InstrumentSpec,
}

/// One checked source.
#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum Source {
    /// The final seconds of an evaporating black hole.
    Evaporation(Evaporation),
    /// A burst with a fast rise and a power-law tail (the afterglow-like impostor).
    AfterglowBurst(AfterglowBurst),
    /// A constant point source.
    Steady(Steady),
    /// Instrumental trouble: identical timestamps or a jump of the all-sky rate.
    Glitch(Glitch),
    /// An interval without data, declared in a `StreamStatus` or left as a silent sequence gap.
    Dead(Dead),
}

impl Source {
    /// The `kind` key of this source as written in the file.
    pub fn kind(&self) -> &'static str {
        match self {
            Self::Evaporation(_) => "evaporation",
            Self::AfterglowBurst(_) => "afterglow_burst",
            Self::Steady(_) => "steady",
            Self::Glitch(_) => "glitch",
            Self::Dead(_) => "dead",
        }
    }
}

/// An evaporation burst: photons drawn from the joint density in time-to-explosion and energy.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Evaporation {
    /// ICRS right ascension, degrees.
    pub ra_deg: f64,
    /// ICRS declination, degrees.
    pub dec_deg: f64,
    /// Distance, parsecs.
    pub distance_pc: f64,
    /// Explosion time (time-to-go 0), GPS ns.
    pub t_gps_ns: i64,
    /// How far before the explosion photons are drawn, s.
    pub max_time_to_go_s: f64,
}

/// A burst with a linear rise over `rise_s` to its peak and a tail `(1 + t/rise_s)^-decay_index`.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct AfterglowBurst {
    /// ICRS right ascension, degrees.
    pub ra_deg: f64,
    /// ICRS declination, degrees.
    pub dec_deg: f64,
    /// Time of the peak, GPS ns.
    pub t_gps_ns: i64,
    /// Rise time before the peak, s.
    pub rise_s: f64,
    /// Detected photons per second at the peak.
    pub peak_rate_hz: f64,
    /// Power-law index of the decaying tail.
    pub decay_index: f64,
    /// How long the tail lasts after the peak, s.
    pub duration_s: f64,
    /// Photon index of the energy spectrum (dN/dE ~ E^-index above the instrument's threshold).
    pub spectral_index: f64,
}

/// A point source of constant detected rate while it is in the field of view.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Steady {
    /// ICRS right ascension, degrees.
    pub ra_deg: f64,
    /// ICRS declination, degrees.
    pub dec_deg: f64,
    /// Detected photons per second while in the field of view.
    pub rate_hz: f64,
    /// Photon index of the energy spectrum.
    pub spectral_index: f64,
    /// Switched on at this GPS ns (the stream start when not given), e.g. a precursor before a burst.
    pub on_gps_ns: Option<i64>,
    /// Switched off at this GPS ns (the stream end when not given).
    pub off_gps_ns: Option<i64>,
}

/// Instrumental trouble.
#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(tag = "mode", rename_all = "snake_case")]
pub enum Glitch {
    /// `photons` events all stamped with one instant.
    IdenticalTimestamps {
        /// The instant, GPS ns.
        t_gps_ns: i64,
        /// How many events.
        photons: u64,
        /// At one sky position (ICRS degrees) when given; spread over the field like the background when not.
        position: Option<(f64, f64)>,
        /// Gaussian scatter about `position`, degrees (0: every event in exactly one direction).
        spread_deg: f64,
    },
    /// `photons` events at times spread uniformly over `duration_s`, uniformly over a disc of `radius_deg`
    /// about a position, energies from the background's spectrum: a readout fault lighting a patch of the
    /// detector, wider than the PSF.
    Cluster {
        /// Start, GPS ns.
        t_gps_ns: i64,
        /// Length, s.
        duration_s: f64,
        /// How many events.
        photons: u64,
        /// Centre, ICRS degrees.
        position: (f64, f64),
        /// Radius of the disc, degrees.
        radius_deg: f64,
    },
    /// The all-sky background multiplied by `factor` for `duration_s`.
    RateJump {
        /// Start, GPS ns.
        t_gps_ns: i64,
        /// Length, s.
        duration_s: f64,
        /// Multiplier of the background rate, > 1.
        factor: f64,
    },
}

/// An interval without data.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Dead {
    /// Start, GPS ns.
    pub t_gps_ns: i64,
    /// Length, s.
    pub duration_s: f64,
    /// Declared in a `StreamStatus` (true) or a silent sequence gap (false).
    pub declared: bool,
    /// The reason written in the declared interval.
    pub reason: String,
}

// ---- raw, serde-facing forms ----

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawFile {
    scenario: toml::Table,
    instrument: toml::Table,
    #[serde(default)]
    source: Vec<toml::Table>,
}

fn default_seed() -> u64 {
    1
}
fn default_batch_max_photons() -> i64 {
    256
}
fn default_batch_max_s() -> f64 {
    0.01
}
fn default_jitter_s() -> f64 {
    0.002
}
fn default_status_period_s() -> f64 {
    1.0
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawHeader {
    name: Option<String>,
    start_utc: String,
    duration_s: f64,
    #[serde(default = "default_seed")]
    seed: u64,
    #[serde(default = "default_batch_max_photons")]
    batch_max_photons: i64,
    #[serde(default = "default_batch_max_s")]
    batch_max_s: f64,
    #[serde(default = "default_jitter_s")]
    jitter_s: f64,
    #[serde(default = "default_status_period_s")]
    status_period_s: f64,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawInstrument {
    id: String,
    token: String,
    spec_file: Option<String>,
    site: Option<toml::Table>,
    response: Option<toml::Table>,
    background: Option<toml::Table>,
}

fn default_max_time_to_go_s() -> f64 {
    100.0
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawEvaporation {
    ra_deg: f64,
    dec_deg: f64,
    distance_pc: f64,
    t_offset_s: Option<f64>,
    t_utc: Option<String>,
    #[serde(default = "default_max_time_to_go_s")]
    max_time_to_go_s: f64,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawAfterglow {
    ra_deg: f64,
    dec_deg: f64,
    t_offset_s: Option<f64>,
    t_utc: Option<String>,
    rise_s: f64,
    peak_rate_hz: f64,
    decay_index: f64,
    duration_s: f64,
    spectral_index: f64,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawSteady {
    ra_deg: f64,
    dec_deg: f64,
    rate_hz: f64,
    spectral_index: f64,
    on_offset_s: Option<f64>,
    off_offset_s: Option<f64>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawCluster {
    t_offset_s: Option<f64>,
    t_utc: Option<String>,
    duration_s: f64,
    photons: i64,
    ra_deg: f64,
    dec_deg: f64,
    radius_deg: f64,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawIdentical {
    t_offset_s: Option<f64>,
    t_utc: Option<String>,
    photons: i64,
    ra_deg: Option<f64>,
    dec_deg: Option<f64>,
    #[serde(default)]
    spread_deg: f64,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawRateJump {
    t_offset_s: Option<f64>,
    t_utc: Option<String>,
    duration_s: f64,
    factor: f64,
}

fn default_true() -> bool {
    true
}
fn default_dead_reason() -> String {
    "simulated dead time".to_string()
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawDead {
    t_offset_s: Option<f64>,
    t_utc: Option<String>,
    duration_s: f64,
    #[serde(default = "default_true")]
    declared: bool,
    #[serde(default = "default_dead_reason")]
    reason: String,
}

/// Longest run a scenario may describe (30 days), s.
const MAX_DURATION_S: f64 = 30.0 * 86_400.0;
/// Largest time offset a source may have from the start, s.
const MAX_OFFSET_S: f64 = 1e7;

/// Collects problems under one prefix.
struct Problems<'a> {
    prefix: String,
    out: &'a mut Vec<Problem>,
}

impl Problems<'_> {
    fn add(&mut self, key: &str, message: impl Into<String>) {
        let key = if key.is_empty() {
            self.prefix.clone()
        } else {
            format!("{}.{key}", self.prefix)
        };
        self.out.push(Problem {
            key,
            message: message.into(),
        });
    }

    /// `lo < v <= hi` (or `lo <= v` when `lo_inclusive`), finite.
    fn range(&mut self, key: &str, v: f64, lo: f64, hi: f64, lo_inclusive: bool) -> f64 {
        let ok_lo = if lo_inclusive { v >= lo } else { v > lo };
        if !(v.is_finite() && ok_lo && v <= hi) {
            let open = if lo_inclusive { '[' } else { '(' };
            self.add(key, format!("{v} is outside {open}{lo}, {hi}]"));
        }
        v
    }

    fn ra(&mut self, v: f64) -> f64 {
        if !(v.is_finite() && (0.0..360.0).contains(&v)) {
            self.add("ra_deg", format!("{v} is outside [0, 360)"));
        }
        v
    }

    fn dec(&mut self, v: f64) -> f64 {
        self.range("dec_deg", v, -90.0, 90.0, true)
    }

    /// Resolves `t_offset_s` or `t_utc` (exactly one) to GPS ns.
    fn time(&mut self, start_gps_ns: i64, offset: Option<f64>, utc: Option<&str>) -> i64 {
        match (offset, utc) {
            (Some(_), Some(_)) => {
                self.add("t_offset_s", "give either t_offset_s or t_utc, not both");
                start_gps_ns
            }
            (None, None) => {
                self.add(
                    "t_offset_s",
                    "missing: give t_offset_s (seconds after start_utc) or t_utc",
                );
                start_gps_ns
            }
            (Some(off), None) => {
                if !(off.is_finite() && off.abs() <= MAX_OFFSET_S) {
                    self.add(
                        "t_offset_s",
                        format!("{off} is outside [-{MAX_OFFSET_S}, {MAX_OFFSET_S}]"),
                    );
                    return start_gps_ns;
                }
                start_gps_ns + seconds_to_ns(off)
            }
            (None, Some(text)) => match parse_utc_to_gps_ns(text) {
                Ok(t) => t,
                Err(e) => {
                    self.add("t_utc", format!("{text:?}: {e}"));
                    start_gps_ns
                }
            },
        }
    }
}

/// Seconds to nanoseconds, rounded (callers have bounded the value).
pub(crate) fn seconds_to_ns(s: f64) -> i64 {
    (s * 1e9).round() as i64
}

/// Reads and checks a scenario file. A `spec_file` in its `[instrument]` is read relative to the file.
pub fn load_scenario(path: &Path) -> Result<Scenario, SimError> {
    let text = std::fs::read_to_string(path).map_err(|source| SimError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    let base = path.parent().unwrap_or_else(|| Path::new("."));
    let name = path.file_stem().map_or_else(
        || path.display().to_string(),
        |s| s.to_string_lossy().into_owned(),
    );
    parse_scenario(&text, base, &name)
}

/// Checks a scenario given as TOML text; `base_dir` resolves a relative `spec_file`, `name` names the
/// scenario in errors (and is its name when `[scenario] name` is absent).
pub fn parse_scenario(text: &str, base_dir: &Path, name: &str) -> Result<Scenario, SimError> {
    let raw: RawFile = toml::from_str(text).map_err(|e| SimError::Toml {
        what: format!("scenario {name}"),
        message: e.to_string(),
    })?;
    let mut problems = Vec::new();

    let header = match raw.scenario.try_into::<RawHeader>() {
        Ok(h) => Some(h),
        Err(e) => {
            problems.push(Problem {
                key: "scenario".into(),
                message: e.message().to_string(),
            });
            None
        }
    };
    let mut p = Problems {
        prefix: "scenario".into(),
        out: &mut problems,
    };
    let (mut start, mut duration_ns) = (0_i64, 1_i64);
    let mut header_out = None;
    if let Some(h) = header {
        match parse_utc_to_gps_ns(&h.start_utc) {
            Ok(t) => start = t,
            Err(e) => p.add("start_utc", format!("{:?}: {e}", h.start_utc)),
        }
        let d = p.range("duration_s", h.duration_s, 0.0, MAX_DURATION_S, false);
        if d.is_finite() && d > 0.0 && d <= MAX_DURATION_S {
            duration_ns = seconds_to_ns(d).max(1);
        }
        let bmp = h.batch_max_photons;
        if !(1..=65_536).contains(&bmp) {
            p.add("batch_max_photons", format!("{bmp} is outside [1, 65536]"));
        }
        p.range("batch_max_s", h.batch_max_s, 0.0, 60.0, false);
        // Jitter at or above the daemon's default reorder tolerance would make photons late.
        if !(h.jitter_s.is_finite() && (0.0..0.02).contains(&h.jitter_s)) {
            p.add(
                "jitter_s",
                format!("{} is outside [0, 0.02): it must stay below the daemon's default reorder tolerance, 0.02 s", h.jitter_s),
            );
        }
        p.range("status_period_s", h.status_period_s, 0.0, 3_600.0, false);
        if let Some(n) = &h.name
            && n.trim().is_empty()
        {
            p.add("name", "is empty");
        }
        header_out = Some(h);
    }

    let instrument = check_instrument(raw.instrument, base_dir, &mut problems);

    let mut sources = Vec::new();
    for (i, table) in raw.source.into_iter().enumerate() {
        if let Some(s) = check_source(i, table, start, start + duration_ns, &mut problems) {
            sources.push(s);
        }
    }

    match (header_out, instrument) {
        (Some(h), Some(instrument)) if problems.is_empty() => Ok(Scenario {
            name: h.name.unwrap_or_else(|| name.to_string()),
            start_gps_ns: start,
            duration_ns,
            seed: h.seed,
            batch_max_photons: usize::try_from(h.batch_max_photons).unwrap_or(256),
            batch_max_ns: seconds_to_ns(h.batch_max_s).max(1),
            jitter_ns: seconds_to_ns(h.jitter_s).max(0),
            status_period_ns: seconds_to_ns(h.status_period_s).max(1),
            instrument,
            sources,
        }),
        _ => Err(SimError::Invalid {
            scenario: name.to_string(),
            problems,
        }),
    }
}

fn table_into<T: for<'de> Deserialize<'de>>(
    table: toml::Table,
    key: &str,
    problems: &mut Vec<Problem>,
) -> Option<T> {
    match table.try_into::<T>() {
        Ok(v) => Some(v),
        Err(e) => {
            problems.push(Problem {
                key: key.to_string(),
                message: e.message().to_string(),
            });
            None
        }
    }
}

fn check_instrument(
    table: toml::Table,
    base_dir: &Path,
    problems: &mut Vec<Problem>,
) -> Option<ScenarioInstrument> {
    let raw: RawInstrument = table_into(table, "instrument", problems)?;
    let before = problems.len();
    if raw.id.trim().is_empty() {
        problems.push(Problem {
            key: "instrument.id".into(),
            message: "is empty".into(),
        });
    }
    let (mut site, mut response, mut background) = (None, None, None);
    let before_file = problems.len();
    if let Some(file) = raw.spec_file {
        let path: PathBuf = base_dir.join(&file);
        let key = format!("instrument.spec_file ({})", path.display());
        match std::fs::read_to_string(&path) {
            Ok(text) => match toml::from_str::<toml::Table>(&text) {
                Ok(mut t) => {
                    (site, response, background) =
                        (t.remove("site"), t.remove("response"), t.remove("background"));
                    for other in t.keys() {
                        problems.push(Problem {
                            key: format!("{key}.{other}"),
                            message:
                                "unknown key: an instrument file holds [site], [response] and [background]"
                                    .into(),
                        });
                    }
                }
                Err(e) => problems.push(Problem {
                    key,
                    message: e.to_string(),
                }),
            },
            Err(e) => problems.push(Problem {
                key,
                message: format!("cannot read: {e}"),
            }),
        }
    }
    if problems.len() > before_file {
        return None;
    }
    // Inline tables replace the file's tables of the same name (e.g. a louder background for a stress run).
    site = raw.site.map(toml::Value::Table).or(site);
    response = raw.response.map(toml::Value::Table).or(response);
    background = raw.background.map(toml::Value::Table).or(background);
    let spec = spec_from_tables(site, response, background, "instrument", problems)?;
    let mut spec_problems = Vec::new();
    spec.check("instrument", &mut spec_problems);
    problems.extend(spec_problems.into_iter().map(|sp| Problem {
        key: sp.key,
        message: sp.message,
    }));
    (problems.len() == before).then_some(ScenarioInstrument {
        id: raw.id,
        token: raw.token,
        spec,
    })
}

/// Builds an instrument block from its three tables, naming each missing or malformed one under `prefix`.
fn spec_from_tables(
    site: Option<toml::Value>,
    response: Option<toml::Value>,
    background: Option<toml::Value>,
    prefix: &str,
    problems: &mut Vec<Problem>,
) -> Option<InstrumentSpec> {
    fn part<T: for<'de> Deserialize<'de>>(
        v: Option<toml::Value>,
        name: &str,
        prefix: &str,
        problems: &mut Vec<Problem>,
    ) -> Option<T> {
        let key = format!("{prefix}.{name}");
        match v {
            Some(toml::Value::Table(t)) => table_into(t, &key, problems),
            Some(other) => {
                problems.push(Problem {
                    key,
                    message: format!("must be a table, got {}", other.type_str()),
                });
                None
            }
            None => {
                problems.push(Problem {
                    key,
                    message: format!("missing: give spec_file or an inline [{prefix}.{name}] table"),
                });
                None
            }
        }
    }
    let site = part::<SiteSpec>(site, "site", prefix, problems);
    let response = part::<ResponseSpec>(response, "response", prefix, problems);
    let background = part::<BackgroundSpec>(background, "background", prefix, problems);
    Some(InstrumentSpec {
        site: site?,
        response: response?,
        background: background?,
    })
}

fn check_source(
    index: usize,
    mut table: toml::Table,
    start: i64,
    end: i64,
    problems: &mut Vec<Problem>,
) -> Option<Source> {
    let kind = match table.remove("kind") {
        Some(toml::Value::String(k)) => k,
        Some(other) => {
            problems.push(Problem {
                key: format!("source[{index}].kind"),
                message: format!("must be a string, got {}", other.type_str()),
            });
            return None;
        }
        None => {
            problems.push(Problem {
                key: format!("source[{index}].kind"),
                message: "missing: one of evaporation, afterglow_burst, steady, glitch, dead".into(),
            });
            return None;
        }
    };
    let prefix = format!("source[{index}] ({kind})");
    let before = problems.len();
    let run_s = (end - start) as f64 * 1e-9;
    let source = match kind.as_str() {
        "evaporation" => {
            let r: RawEvaporation = table_into(table, &prefix, problems)?;
            let mut p = Problems {
                prefix: prefix.clone(),
                out: problems,
            };
            let ra_deg = p.ra(r.ra_deg);
            let dec_deg = p.dec(r.dec_deg);
            let distance_pc = p.range("distance_pc", r.distance_pc, 0.0, 1e4, false);
            let max_time_to_go_s = p.range("max_time_to_go_s", r.max_time_to_go_s, 0.0, 1e5, false);
            let t = p.time(start, r.t_offset_s, r.t_utc.as_deref());
            let first = t - seconds_to_ns(max_time_to_go_s.clamp(0.0, 1e5));
            if t <= start || first >= end {
                p.add(
                    "t_offset_s",
                    format!("its emission window (the {max_time_to_go_s} s before the explosion) misses the run (0 to {run_s} s)"),
                );
            }
            Source::Evaporation(Evaporation {
                ra_deg,
                dec_deg,
                distance_pc,
                t_gps_ns: t,
                max_time_to_go_s,
            })
        }
        "afterglow_burst" => {
            let r: RawAfterglow = table_into(table, &prefix, problems)?;
            let mut p = Problems {
                prefix: prefix.clone(),
                out: problems,
            };
            let ra_deg = p.ra(r.ra_deg);
            let dec_deg = p.dec(r.dec_deg);
            let t = p.time(start, r.t_offset_s, r.t_utc.as_deref());
            let rise_s = p.range("rise_s", r.rise_s, 0.0, 1e5, false);
            let peak_rate_hz = p.range("peak_rate_hz", r.peak_rate_hz, 0.0, 1e6, false);
            let decay_index = p.range("decay_index", r.decay_index, 0.0, 10.0, false);
            let duration_s = p.range("duration_s", r.duration_s, 0.0, 1e6, false);
            let spectral_index = p.range("spectral_index", r.spectral_index, 1.0, 6.0, false);
            let (lo, hi) = (
                t - seconds_to_ns(rise_s.clamp(0.0, 1e5)),
                t + seconds_to_ns(duration_s.clamp(0.0, 1e6)),
            );
            if hi <= start || lo >= end {
                p.add(
                    "t_offset_s",
                    format!("the burst (rise and tail) misses the run (0 to {run_s} s)"),
                );
            }
            Source::AfterglowBurst(AfterglowBurst {
                ra_deg,
                dec_deg,
                t_gps_ns: t,
                rise_s,
                peak_rate_hz,
                decay_index,
                duration_s,
                spectral_index,
            })
        }
        "steady" => {
            let r: RawSteady = table_into(table, &prefix, problems)?;
            let mut p = Problems {
                prefix: prefix.clone(),
                out: problems,
            };
            let on_gps_ns = r
                .on_offset_s
                .map(|o| start + seconds_to_ns(p.range("on_offset_s", o, 0.0, run_s, true)));
            let off_gps_ns = r
                .off_offset_s
                .map(|o| start + seconds_to_ns(p.range("off_offset_s", o, 0.0, run_s, false)));
            if on_gps_ns.unwrap_or(start) >= off_gps_ns.unwrap_or(end) {
                p.add(
                    "off_offset_s",
                    "the source must be switched off after it is switched on",
                );
            }
            Source::Steady(Steady {
                ra_deg: p.ra(r.ra_deg),
                dec_deg: p.dec(r.dec_deg),
                rate_hz: p.range("rate_hz", r.rate_hz, 0.0, 1e6, false),
                spectral_index: p.range("spectral_index", r.spectral_index, 1.0, 6.0, false),
                on_gps_ns,
                off_gps_ns,
            })
        }
        "glitch" => {
            let mode = match table.remove("mode") {
                Some(toml::Value::String(m)) => m,
                _ => {
                    problems.push(Problem {
                        key: format!("{prefix}.mode"),
                        message: "missing or not a string: one of identical_timestamps, cluster, rate_jump"
                            .into(),
                    });
                    return None;
                }
            };
            match mode.as_str() {
                "identical_timestamps" => {
                    let r: RawIdentical = table_into(table, &prefix, problems)?;
                    let mut p = Problems {
                        prefix: prefix.clone(),
                        out: problems,
                    };
                    let t = p.time(start, r.t_offset_s, r.t_utc.as_deref());
                    if t < start || t >= end {
                        p.add(
                            "t_offset_s",
                            format!("the glitch instant is outside the run (0 to {run_s} s)"),
                        );
                    }
                    if !(1..=1_000_000).contains(&r.photons) {
                        p.add("photons", format!("{} is outside [1, 1000000]", r.photons));
                    }
                    let position = match (r.ra_deg, r.dec_deg) {
                        (Some(ra), Some(dec)) => Some((p.ra(ra), p.dec(dec))),
                        (None, None) => None,
                        _ => {
                            p.add(
                                "ra_deg",
                                "give both ra_deg and dec_deg, or neither (spread over the field)",
                            );
                            None
                        }
                    };
                    let spread_deg = p.range("spread_deg", r.spread_deg, 0.0, 10.0, true);
                    Source::Glitch(Glitch::IdenticalTimestamps {
                        t_gps_ns: t,
                        photons: r.photons.unsigned_abs(),
                        position,
                        spread_deg,
                    })
                }
                "cluster" => {
                    let r: RawCluster = table_into(table, &prefix, problems)?;
                    let mut p = Problems {
                        prefix: prefix.clone(),
                        out: problems,
                    };
                    let t = p.time(start, r.t_offset_s, r.t_utc.as_deref());
                    let duration_s = p.range("duration_s", r.duration_s, 0.0, 3600.0, true);
                    if t < start || t + seconds_to_ns(duration_s.clamp(0.0, 3600.0)) >= end {
                        p.add(
                            "t_offset_s",
                            format!("the cluster is not inside the run (0 to {run_s} s)"),
                        );
                    }
                    if !(1..=1_000_000).contains(&r.photons) {
                        p.add("photons", format!("{} is outside [1, 1000000]", r.photons));
                    }
                    let position = (p.ra(r.ra_deg), p.dec(r.dec_deg));
                    let radius_deg = p.range("radius_deg", r.radius_deg, 0.0, 30.0, true);
                    Source::Glitch(Glitch::Cluster {
                        t_gps_ns: t,
                        duration_s,
                        photons: r.photons.unsigned_abs(),
                        position,
                        radius_deg,
                    })
                }
                "rate_jump" => {
                    let r: RawRateJump = table_into(table, &prefix, problems)?;
                    let mut p = Problems {
                        prefix: prefix.clone(),
                        out: problems,
                    };
                    let t = p.time(start, r.t_offset_s, r.t_utc.as_deref());
                    let duration_s = p.range("duration_s", r.duration_s, 0.0, MAX_DURATION_S, false);
                    let factor = p.range("factor", r.factor, 1.0, 1000.0, false);
                    if t >= end || t + seconds_to_ns(duration_s.clamp(0.0, MAX_DURATION_S)) <= start {
                        p.add(
                            "t_offset_s",
                            format!("the rate jump misses the run (0 to {run_s} s)"),
                        );
                    }
                    Source::Glitch(Glitch::RateJump {
                        t_gps_ns: t,
                        duration_s,
                        factor,
                    })
                }
                other => {
                    problems.push(Problem {
                        key: format!("{prefix}.mode"),
                        message: format!(
                            "unknown glitch mode {other:?}: one of identical_timestamps, cluster, rate_jump"
                        ),
                    });
                    return None;
                }
            }
        }
        "dead" => {
            let r: RawDead = table_into(table, &prefix, problems)?;
            let mut p = Problems {
                prefix: prefix.clone(),
                out: problems,
            };
            let t = p.time(start, r.t_offset_s, r.t_utc.as_deref());
            let duration_s = p.range("duration_s", r.duration_s, 0.0, MAX_DURATION_S, false);
            let t_end = t + seconds_to_ns(duration_s.clamp(0.0, MAX_DURATION_S));
            if t < start || t >= end {
                p.add(
                    "t_offset_s",
                    format!("the dead interval starts outside the run (0 to {run_s} s)"),
                );
            } else if !r.declared && t_end >= end {
                // A gap only shows when a frame follows it.
                p.add(
                    "duration_s",
                    "a silent (declared = false) dead interval must end before the run does",
                );
            }
            Source::Dead(Dead {
                t_gps_ns: t,
                duration_s,
                declared: r.declared,
                reason: r.reason,
            })
        }
        other => {
            problems.push(Problem {
                key: format!("source[{index}].kind"),
                message: format!(
                    "unknown source kind {other:?}: one of evaporation, afterglow_burst, steady, glitch, dead"
                ),
            });
            return None;
        }
    };
    (problems.len() == before).then_some(source)
}
