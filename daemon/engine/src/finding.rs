//! What the engine reports: a `Flash` at the first crossing of a candidate, an `Assessment` once its
//! persistence window has passed in event time, and a `Withdrawal` when the assessment finds an instrumental
//! cause. The caller gives them global ids and sequence numbers; `candidate` links the three.

use serde::{Deserialize, Serialize};

use crate::fit::{FitJob, FitResult};

/// Where the engine puts its findings, in its order, the moment it decides each: a `Vec<Finding>` collects
/// them (replay, tests); the live daemon issues a flash at once instead of after the rest of its frame has
/// been searched, which would add a whole frame's search time to the alert's latency.
pub trait FindingSink {
    /// Takes the next finding.
    fn emit(&mut self, finding: Finding);
}

impl FindingSink for Vec<Finding> {
    fn emit(&mut self, finding: Finding) {
        self.push(finding);
    }
}

/// Every flag the engine can put on a flash (`Flash::flags`) or an assessment (`Assessment::flags`): the one
/// list the emitting code reads its names from, so the proto's comments and docs/alerts.md can be checked
/// against it by a test.
pub mod flags {
    /// The all-sky rate jumped during the flash window (instrumental sign; flash and assessment).
    pub const ALL_SKY_JUMP: &str = "all_sky_jump";
    /// Too many flash photons share one timestamp (instrumental sign; flash and assessment).
    pub const IDENTICAL_TIMESTAMPS: &str = "identical_timestamps";
    /// The photons spread wider than the PSF allows (instrumental sign; flash and assessment).
    pub const WIDE_SPREAD: &str = "wide_spread";
    /// Too much dead time in the persistence window to decide (assessment).
    pub const DEAD_TIME: &str = "dead_time";
    /// The persistence window was cut short by a stream gap or shutdown (assessment).
    pub const CUT_SHORT: &str = "cut_short";
    /// Significant emission after the flash (assessment).
    pub const POST_EXCESS: &str = "post_excess";
    /// Significant emission before the flash (assessment).
    pub const PRE_EXCESS: &str = "pre_excess";
    /// The light curve prefers a fast rise and decay over the evaporation template (assessment).
    pub const DECAYING_SHAPE: &str = "decaying_shape";
    /// The light-curve test could not run (assessment).
    pub const SHAPE_UNTESTED: &str = "shape_untested";
    /// The candidate kept only its first photons, the rest dropped at the cap (assessment).
    pub const PHOTONS_CAPPED: &str = "photons_capped";
    /// Further threshold crossings came after the flash inside the persistence window (assessment).
    pub const CROSSINGS_AFTER_FLASH: &str = "crossings_after_flash";

    /// The flags a flash can carry: instrumental signs only.
    pub const FLASH: [&str; 3] = [ALL_SKY_JUMP, IDENTICAL_TIMESTAMPS, WIDE_SPREAD];
    /// The flags an assessment can carry (the flash's instrumental signs included).
    pub const ASSESSMENT: [&str; 11] = [
        ALL_SKY_JUMP,
        IDENTICAL_TIMESTAMPS,
        WIDE_SPREAD,
        DEAD_TIME,
        CUT_SHORT,
        POST_EXCESS,
        PRE_EXCESS,
        DECAYING_SHAPE,
        SHAPE_UNTESTED,
        PHOTONS_CAPPED,
        CROSSINGS_AFTER_FLASH,
    ];
}

/// One photon of a flash, as it arrived (GPS ns, ICRS degrees, GeV, instrument-frame degrees).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct PhotonRec {
    /// Arrival time, GPS nanoseconds.
    pub time_ns: i64,
    /// Right ascension, degrees.
    pub ra_deg: f64,
    /// Declination, degrees.
    pub dec_deg: f64,
    /// Reconstructed energy, GeV.
    pub energy_gev: f64,
    /// Zenith (or off-axis) angle, degrees.
    pub zenith_deg: f64,
    /// Azimuth in the instrument frame, degrees.
    pub azimuth_deg: f64,
}

/// A seeded test that crossed its threshold: the photons within the search radius of the seed photon in
/// the window (start_ns, end_ns] ending at the seed.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Flash {
    /// Engine-local candidate id (1, 2, ...): links the flash to its assessment and withdrawal.
    pub candidate: u64,
    /// Window start (exclusive), GPS ns: the seed time minus the timescale.
    pub start_ns: i64,
    /// Window end (inclusive), GPS ns: the seed photon's time.
    pub end_ns: i64,
    /// Position, ICRS degrees: the maximum of the mixture likelihood (PSF-shaped signal plus flat background)
    /// over the window's photons within twice the search radius (docs/science.md section 4).
    pub ra_deg: f64,
    /// Declination of the position, degrees.
    pub dec_deg: f64,
    /// 90% error radius, degrees: the radius of the region 2 Delta ln L <= 4.605 of the mixture likelihood
    /// (root mean square over eight directions), the systematic error added in quadrature (docs/science.md
    /// section 4).
    pub error_radius_deg: f64,
    /// Search radius of the disc, degrees.
    pub search_radius_deg: f64,
    /// Timescale of the window, seconds.
    pub timescale_s: f64,
    /// Photons in the disc and window, the seed included.
    pub counts: u64,
    /// Expected background in the disc and window, b = R dt a Omega_r.
    pub background: f64,
    /// Per-seed p-value P(N >= counts - 1 | background) (0 when it underflows; see `ln_p`).
    pub p_value: f64,
    /// Natural log of the p-value, exact far below the smallest f64.
    pub ln_p: f64,
    /// One-sided Gaussian significance of the per-seed p-value, before any trials: `sigma_per_seed` on the
    /// wire. Never read it as the alert's significance; that is `sigma_post_trials`.
    pub sigma: f64,
    /// Rate of background alerts at least this rare, per year: min(p, 1) x K x R x 3.15576e7 s (Julian
    /// year) x the effective fraction of those trials measured by the instrument's calibration (1 without
    /// one, an upper estimate); docs/science.md section 4.
    pub far_per_year: f64,
    /// Post-trials significance: Z of P = 1 - exp(-far_per_year x 1 yr), the chance of a background alert at
    /// least this rare within a year (clamped to [-40, 1000]).
    pub sigma_post_trials: f64,
    /// Zenith (or off-axis) angle of the seed photon, degrees.
    pub zenith_deg: f64,
    /// The photons in the disc and window, in time order.
    pub photons: Vec<PhotonRec>,
    /// Instrumental signs found when the flash was decided (no later data needed): `all_sky_jump`,
    /// `identical_timestamps`, `wide_spread`. Empty for a clean flash; any of them makes the candidate's
    /// verdict `instrumental`.
    #[serde(default)]
    pub flags: Vec<String>,
    /// Signed significance of the all-sky count in the window (the flash's own cone left out) against the
    /// rate just before it.
    #[serde(default)]
    pub all_sky_sigma: f64,
    /// Fraction of the flash photons sharing a timestamp (within the clock precision) with another.
    #[serde(default)]
    pub identical_time_fraction: f64,
    /// Significance of a spread wider than the PSF, from the window's photons within a cone of
    /// max(3 r, r + 4 sigma_PSF) (`assess::extension_sigma`).
    #[serde(default)]
    pub spread_sigma: f64,
}

/// Outcome of an assessment.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Verdict {
    /// No persistence, no instrumental sign.
    Isolated,
    /// Emission before or after the flash, or a light curve that rises fast and decays.
    Persistent,
    /// An instrumental sign (all-sky jump, identical timestamps, spread wider than the PSF); withdrawn.
    Instrumental,
    /// Too much dead time in the persistence window, or the input ended before it closed.
    Undecided,
}

impl Verdict {
    /// The verdict's name as users see it.
    pub fn as_str(self) -> &'static str {
        match self {
            Self::Isolated => "isolated",
            Self::Persistent => "persistent",
            Self::Instrumental => "instrumental",
            Self::Undecided => "undecided",
        }
    }
}

/// A candidate's assessment, made once its persistence window has passed.
#[derive(Debug, Clone, PartialEq)]
pub struct Assessment {
    /// Engine-local candidate id.
    pub candidate: u64,
    /// The verdict.
    pub verdict: Verdict,
    /// The candidate's best (lowest p) trigger.
    pub trigger: Flash,
    /// Photons in the disc after the flash, in (end of the best trigger's window, end of the persistence
    /// window]: an evaporation burst is brightest at its end, so nothing of it follows its best window.
    pub post_counts: u64,
    /// Expected background for them: all-sky photons in the window x a(zenith, azimuth) x Omega_r.
    pub post_background: f64,
    /// P(N >= post_counts | post_background).
    pub post_p_value: f64,
    /// Its signed significance: from the upper tail for an excess, minus that of the lower tail for a
    /// deficit, 0 at the median (`stats::count_sigma`).
    pub post_sigma: f64,
    /// Photons in the disc in the pre-window: the `pre_window_s` ending just before the best trigger's
    /// earliest photon.
    pub pre_counts: u64,
    /// Background expected there: all-sky photons in the window x a(zenith, azimuth) x Omega_r.
    pub pre_background: f64,
    /// The burst's own rise expected there: what the best-fitting instrument-folded evaporation template
    /// of the light-curve test puts in the pre-window (0 when the test could not run).
    pub pre_rise: f64,
    /// P(N >= pre_counts | pre_background + pre_rise).
    pub pre_p_value: f64,
    /// Its signed significance (as `post_sigma`).
    pub pre_sigma: f64,
    /// Reasons behind the verdict and caveats, e.g. `all_sky_jump`, `identical_timestamps`, `wide_spread`,
    /// `dead_time`, `cut_short`, `post_excess`, `pre_excess`, `decaying_shape`, `shape_untested`,
    /// `photons_capped`, `crossings_after_flash`.
    pub flags: Vec<String>,
    /// All-sky photons in the best trigger's window, a cone around the flash left out that holds its PSF's
    /// wings at the lowest energy (max(3 r, r + 4 sigma_PSF)).
    pub all_sky_counts: u64,
    /// Their expectation from the all-sky rate just before the window.
    pub all_sky_expected: f64,
    /// Fraction of the trigger's photons sharing a timestamp (within the clock precision) with another.
    pub identical_time_fraction: f64,
    /// Signed significance of the all-sky count (the trigger's `all_sky_sigma`).
    pub all_sky_sigma: f64,
    /// RMS spread of the trigger's disc photons about their centroid over the PSF's expectation (reported;
    /// the disc bounds it, so no rule reads it).
    pub spread_ratio: f64,
    /// Significance of a spread wider than the PSF (the trigger's `spread_sigma`).
    pub spread_sigma: f64,
    /// Light-curve test: 2 (ln L_decaying - ln L_evaporation) of the disc photons' arrival times from the
    /// best window's start to the persistence window's end; positive favours a fast rise and decay.
    pub shape_log_ratio: f64,
    /// Kolmogorov-Smirnov p-value of those times against the best instrument-folded evaporation template
    /// (1 when the test could not run).
    pub shape_template_p: f64,
    /// Best decaying model: power-law index of (1 + t/tc)^-index, or -1 for exp(-t/tc).
    pub shape_decay_index: f64,
    /// Its decay time tc, seconds.
    pub shape_decay_time_s: f64,
    /// Dead time inside the post-flash window, seconds.
    pub dead_seconds: f64,
    /// The evaporation fit; [`FitResult::pending`] while `fit_job` is set.
    pub fit: FitResult,
    /// The fit still to run when the engine defers it (`EngineConfig::defer_fit`): run it, put the result in
    /// `fit` and clear this before the assessment goes out. None once the fit is in `fit`.
    pub fit_job: Option<FitJob>,
}

/// An alert retracted by the engine.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct Withdrawal {
    /// Engine-local candidate id of the withdrawn flash.
    pub candidate: u64,
    /// Why.
    pub reason: String,
}

/// Everything the engine reports. Findings are rare (a few per day), so the variants stay unboxed.
#[derive(Debug, Clone, PartialEq)]
#[allow(clippy::large_enum_variant)]
pub enum Finding {
    /// A new candidate's first crossing, reported at once.
    Flash(Flash),
    /// A candidate's assessment.
    Assessment(Assessment),
    /// A candidate withdrawn because its assessment found an instrumental cause.
    Withdrawal(Withdrawal),
}
