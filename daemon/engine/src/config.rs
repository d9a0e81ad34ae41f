//! Engine configuration: what the daemon's `[instrument.search]` and `[instrument.assess]` tables compile to.
//! `check` reports every problem at once, each naming its key, before an engine is built from it.

use glint_science::instrument::InstrumentResponse;

use glint_science::calibration::TrialsCalibration;

use crate::error::EngineError;

/// Everything one instrument's engine needs.
#[derive(Debug, Clone, PartialEq)]
pub struct EngineConfig {
    /// Instrument id; also stamped into the saved acceptance map so a map is never loaded for another one.
    pub instrument: String,
    /// The instrument's response (PSF, field of view, systematic error, clock precision).
    pub response: InstrumentResponse,
    /// Timescales of the ladder, seconds, strictly increasing, 1 to 32 of them, each in [1e-4, 3600].
    pub ladder_s: Vec<f64>,
    /// Radius of the disc each photon seeds, degrees, [0.01, 10].
    pub search_radius_deg: f64,
    /// Target false-alarm rate of the whole search (all timescales, whole field of view), per year.
    pub far_per_year: f64,
    /// Trailing window of the all-sky rate, seconds (live time is counted, dead time is not).
    pub rate_window_s: f64,
    /// Time constant of the acceptance map, seconds.
    pub acceptance_tau_s: f64,
    /// No trigger until the acceptance map holds this much (decayed) weight, unless a map was loaded or a
    /// prior seeded it.
    pub warmup_photons: u64,
    /// Reorder tolerance, ns: the watermark trails the latest time seen by this much.
    pub reorder_tolerance_ns: i64,
    /// A frame more than this far ahead of the stream is refused as a clock jump, ns.
    pub max_clock_jump_ns: i64,
    /// Seeds the acceptance map with a cos^power density of weight `warmup_photons`, so triggering starts at
    /// once; data then replace the prior with the map's time constant. None: learn from data only.
    pub acceptance_prior_cos_power: Option<f64>,
    /// Assessment settings.
    pub assess: AssessConfig,
    /// False: reorder and count only (`glint replay --no-search`); no search, no findings.
    pub search_enabled: bool,
    /// True: assessments leave the engine with their evaporation fit pending (`Assessment::fit_job`) for the
    /// caller to run elsewhere, so a slow fit does not hold up the photons behind it (the live daemon). False:
    /// the engine runs the fit itself (replays). The verdict never depends on the fit, and a job's
    /// [`run`](crate::FitJob::run) gives exactly what the engine would have, so both give the same findings.
    pub defer_fit: bool,
    /// The effective-trials calibration measured on this instrument's background (`glint calibrate`): with
    /// it the thresholds and every alert's `far_per_year` use the measured trials; without it the nominal
    /// K x R per second, an upper estimate (docs/science.md section 4).
    pub trials: Option<TrialsCalibration>,
}

/// Assessment settings and verdict thresholds (defaults as in `deploy/glint.toml`).
#[derive(Debug, Clone, PartialEq)]
pub struct AssessConfig {
    /// Shortest persistence window, seconds. Default 30.
    pub persistence_min_s: f64,
    /// The persistence window is at least this many times the candidate's timescale. Default 10.
    pub persistence_timescale_factor: f64,
    /// Window before the flash checked for earlier emission, seconds. Default 120: a precursor at the spot
    /// must be seen over minutes, and the burst's own rise there is modelled, not guessed.
    pub pre_window_s: f64,
    /// Persistent when the post-flash excess exceeds this significance. Default 3.
    pub post_sigma_max: f64,
    /// Persistent when the pre-flash excess exceeds this significance. Default 2.5: the boundary test's
    /// chance on an isolated burst is 0.6%, and at 3 a precursor of 5 sigma the burst's fitted rise partly
    /// absorbs was missed in 6% of the populations (README, "Verdicts").
    pub pre_sigma_max: f64,
    /// Instrumental when the all-sky count in the flash window (the flash's own disc left out) exceeds the
    /// all-sky rate by this significance. Default 5.
    pub all_sky_sigma_max: f64,
    /// Instrumental when more than this fraction of the flash photons share a timestamp (within the clock
    /// precision) with another flash photon. Default 0.5.
    pub identical_fraction_max: f64,
    /// No longer read by any rule (the disc bounds the ratio it compared; see `spread_sigma_max`); kept so
    /// that configurations naming it still load. Default 2.5.
    pub spread_ratio_max: f64,
    /// Instrumental when the flash window's photons within a few search radii are spread wider than the PSF
    /// at this significance (`Flash::spread_sigma`). Default 3.5.
    pub spread_sigma_max: f64,
    /// Persistent (`decaying_shape`) when the flash's light curve fits the evaporation template with a
    /// goodness-of-fit p-value below this ... Default 1e-3.
    pub shape_p_max: f64,
    /// ... and a decaying shape beats the template by more than this in 2 Delta ln L. Default 0.
    pub shape_log_ratio_min: f64,
    /// Undecided when dead time covers more than this fraction of the persistence window. Default 0.1.
    pub max_dead_fraction: f64,
    /// Most photons a candidate keeps for its assessment and fit (those within three search radii); more
    /// are dropped and flagged `photons_capped`. Default 10000.
    pub max_photons: usize,
    /// Most candidates open at once; crossings that would open more are counted as suppressed, not reported.
    /// Default 256.
    pub max_open_candidates: usize,
    /// Power-law index of the background spectrum (dN/dE ~ E^-index), passed to the evaporation fit.
    /// Default 2.7 (the daemon sets the instrument's `background.spectral_index`).
    pub background_spectral_index: f64,
}

impl Default for AssessConfig {
    fn default() -> Self {
        Self {
            persistence_min_s: 30.0,
            persistence_timescale_factor: 10.0,
            pre_window_s: 120.0,
            post_sigma_max: 3.0,
            pre_sigma_max: 2.5,
            all_sky_sigma_max: 5.0,
            identical_fraction_max: 0.5,
            spread_ratio_max: 2.5,
            spread_sigma_max: 3.5,
            shape_p_max: 1.0,
            shape_log_ratio_min: 10.0,
            max_dead_fraction: 0.1,
            max_photons: 10_000,
            max_open_candidates: 256,
            background_spectral_index: 2.7,
        }
    }
}

impl EngineConfig {
    /// A configuration with the documented defaults (`deploy/glint.toml`) for `instrument`.
    pub fn with_defaults(instrument: impl Into<String>, response: InstrumentResponse) -> Self {
        Self {
            instrument: instrument.into(),
            response,
            ladder_s: vec![0.01, 0.03, 0.1, 0.3, 1.0, 3.0, 10.0, 30.0],
            search_radius_deg: 0.5,
            far_per_year: 1.0,
            rate_window_s: 60.0,
            acceptance_tau_s: 21_600.0,
            warmup_photons: 20_000,
            reorder_tolerance_ns: 20_000_000,
            max_clock_jump_ns: 3_600_000_000_000,
            acceptance_prior_cos_power: None,
            assess: AssessConfig::default(),
            search_enabled: true,
            defer_fit: false,
            trials: None,
        }
    }

    /// Checks every field; the error lists every problem, each naming its key.
    pub fn check(&self) -> Result<(), EngineError> {
        let mut p = Vec::new();
        if let Some(t) = &self.trials {
            if let Err(e) = t.check(&self.instrument, &self.ladder_s, self.search_radius_deg) {
                p.push(format!("trials calibration: {e}"));
            }
        }
        let mut range = |key: &str, v: f64, lo: f64, hi: f64| {
            if !v.is_finite() || v < lo || v > hi {
                p.push(format!("{key}: {v} is outside [{lo}, {hi}]"));
            }
        };
        range("search_radius_deg", self.search_radius_deg, 0.01, 10.0);
        range("far_per_year", self.far_per_year, 1e-12, 1e12);
        range("rate_window_s", self.rate_window_s, 0.1, 86_400.0);
        range("acceptance_tau_s", self.acceptance_tau_s, 1.0, 1e9);
        if let Some(c) = self.acceptance_prior_cos_power {
            range("acceptance_prior_cos_power", c, 0.0, 20.0);
        }
        let a = &self.assess;
        range("assess.persistence_min_s", a.persistence_min_s, 0.0, 86_400.0);
        range(
            "assess.persistence_timescale_factor",
            a.persistence_timescale_factor,
            0.0,
            1e4,
        );
        range("assess.pre_window_s", a.pre_window_s, 0.0, 86_400.0);
        range("assess.post_sigma_max", a.post_sigma_max, -40.0, 40.0);
        range("assess.pre_sigma_max", a.pre_sigma_max, -40.0, 40.0);
        range("assess.all_sky_sigma_max", a.all_sky_sigma_max, -40.0, 40.0);
        range(
            "assess.identical_fraction_max",
            a.identical_fraction_max,
            0.0,
            1.0,
        );
        range("assess.spread_ratio_max", a.spread_ratio_max, 0.0, 1e6);
        range("assess.spread_sigma_max", a.spread_sigma_max, 0.0, 1e6);
        range("assess.shape_p_max", a.shape_p_max, 0.0, 1.0);
        range("assess.shape_log_ratio_min", a.shape_log_ratio_min, -1e6, 1e6);
        range("assess.max_dead_fraction", a.max_dead_fraction, 0.0, 1.0);
        range(
            "assess.background_spectral_index",
            a.background_spectral_index,
            1.01,
            6.0,
        );
        if self.ladder_s.is_empty() || self.ladder_s.len() > 32 {
            p.push(format!(
                "ladder_s: {} timescales, expected 1 to 32",
                self.ladder_s.len()
            ));
        }
        for (i, &s) in self.ladder_s.iter().enumerate() {
            if !s.is_finite() || !(1e-4..=3600.0).contains(&s) {
                p.push(format!("ladder_s[{i}]: {s} is outside [0.0001, 3600]"));
            }
        }
        if let Some(i) = self.ladder_s.windows(2).position(|w| w[1] <= w[0]) {
            p.push(format!(
                "ladder_s: must be strictly increasing (entry {} <= entry {i})",
                i + 1
            ));
        }
        if self.instrument.is_empty() {
            p.push("instrument: empty id".into());
        }
        if self.warmup_photons > 1_000_000_000 {
            p.push(format!("warmup_photons: {} is above 1e9", self.warmup_photons));
        }
        if !(0..=3_600_000_000_000).contains(&self.reorder_tolerance_ns) {
            p.push(format!(
                "reorder_tolerance_ns: {} is outside [0, 3.6e12]",
                self.reorder_tolerance_ns
            ));
        }
        if !(1..=i64::MAX / 4).contains(&self.max_clock_jump_ns) {
            p.push(format!(
                "max_clock_jump_ns: {} must be > 0",
                self.max_clock_jump_ns
            ));
        }
        if a.max_photons == 0 || a.max_photons > 10_000_000 {
            p.push(format!(
                "assess.max_photons: {} is outside [1, 1e7]",
                a.max_photons
            ));
        }
        if a.max_open_candidates == 0 || a.max_open_candidates > 100_000 {
            p.push(format!(
                "assess.max_open_candidates: {} is outside [1, 100000]",
                a.max_open_candidates
            ));
        }
        if p.is_empty() {
            Ok(())
        } else {
            Err(EngineError::Config(p))
        }
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap
mod tests {
    use super::*;
    use glint_science::instrument::{AreaTable, CurveTable, ResponseSpec};

    fn response() -> InstrumentResponse {
        InstrumentResponse::from_spec(&ResponseSpec {
            max_zenith_deg: 45.0,
            energy_min_gev: 100.0,
            energy_max_gev: 1e5,
            effective_area: AreaTable {
                energy_gev: vec![100.0, 1e5],
                zenith_deg: vec![0.0, 45.0],
                area_m2: vec![vec![1e3, 1e5], vec![5e2, 5e4]],
            },
            psf68_deg: CurveTable {
                energy_gev: vec![100.0, 1e5],
                value: vec![0.5, 0.5],
            },
            energy_resolution: CurveTable {
                energy_gev: vec![100.0, 1e5],
                value: vec![0.3, 0.3],
            },
            systematic_deg: 0.0,
            clock_precision_ns: 100,
        })
        .unwrap()
    }

    #[test]
    fn defaults_pass_and_every_problem_is_reported_with_its_key() {
        let good = EngineConfig::with_defaults("array", response());
        assert_eq!(good.check(), Ok(()));
        let mut bad = good.clone();
        bad.ladder_s = vec![0.1, 0.1, 5000.0];
        bad.search_radius_deg = 0.0;
        bad.far_per_year = f64::NAN;
        bad.assess.max_dead_fraction = 2.0;
        bad.max_clock_jump_ns = 0;
        let Err(EngineError::Config(problems)) = bad.check() else {
            panic!("expected config errors")
        };
        for key in [
            "ladder_s[2]",
            "ladder_s: must be strictly increasing",
            "search_radius_deg",
            "far_per_year",
            "assess.max_dead_fraction",
            "max_clock_jump_ns",
        ] {
            assert!(
                problems.iter().any(|p| p.starts_with(key)),
                "{key} missing from {problems:?}"
            );
        }
        assert_eq!(problems.len(), 6, "{problems:?}");
    }
}
