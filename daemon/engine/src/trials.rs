//! Measuring the effective trials (docs/science.md section 4): the engine runs on background with a loose
//! nominal false-alarm rate and no calibration, every candidate's best per-seed p-value is kept, and the
//! count of candidates at each p-value level over the nominal trials there is the fraction stored in a
//! `TrialsCalibration`. `glint calibrate` and the calibration tests use this one path.

use glint_science::calibration::{CALIBRATION_FORMAT, TrialsCalibration, measure_points};

use crate::config::EngineConfig;
use crate::engine::{EngineStats, SECONDS_PER_YEAR};
use crate::finding::Finding;

/// Levels are spaced by this factor in nominal rate (half a decade).
const LEVEL_STEP: f64 = 3.162_277_660_168_379_5;

/// The configuration to measure with: `cfg` with a loose nominal rate and no calibration.
pub fn measuring_config(cfg: &EngineConfig, loose_far_per_year: f64) -> EngineConfig {
    let mut c = cfg.clone();
    c.far_per_year = loose_far_per_year;
    c.trials = None;
    c
}

/// Collects the best per-seed ln p of every background candidate.
#[derive(Debug, Default, Clone)]
pub struct TrialsMeter {
    best_ln_p: Vec<f64>,
}

impl TrialsMeter {
    /// An empty meter.
    pub fn new() -> Self {
        Self::default()
    }

    /// Takes a finding: each assessment carries its candidate's best trigger.
    pub fn observe(&mut self, f: &Finding) {
        if let Finding::Assessment(a) = f {
            self.best_ln_p.push(a.trigger.ln_p);
        }
    }

    /// Candidates seen so far.
    pub fn candidates(&self) -> usize {
        self.best_ln_p.len()
    }

    /// The calibration from what was seen: levels from the loose rate down by half decades while at least
    /// `min_candidates` reach them (fewer are too noisy to interpolate on: 20 give +-22%), with the mean
    /// all-sky rate and live time of `stats`. None when no level has enough candidates.
    pub fn calibration(
        &self,
        cfg: &EngineConfig,
        stats: &EngineStats,
        loose_far_per_year: f64,
        min_candidates: u64,
        source: &str,
    ) -> Option<TrialsCalibration> {
        let live_s = stats.live_ns as f64 * 1e-9;
        if live_s <= 0.0 || stats.released == 0 {
            return None;
        }
        let rate = stats.released as f64 / live_s;
        let k = cfg.ladder_s.len();
        let mut levels = Vec::new();
        let mut far = loose_far_per_year;
        for _ in 0..40 {
            levels.push((far / (k as f64 * rate * SECONDS_PER_YEAR)).ln());
            far /= LEVEL_STEP;
        }
        levels.reverse();
        let mut points = measure_points(&self.best_ln_p, &levels, k, rate, live_s);
        points.retain(|p| p.candidates >= min_candidates);
        if points.is_empty() {
            return None;
        }
        Some(TrialsCalibration {
            format: CALIBRATION_FORMAT,
            instrument: cfg.instrument.clone(),
            ladder_s: cfg.ladder_s.clone(),
            search_radius_deg: cfg.search_radius_deg,
            all_sky_rate_hz: rate,
            live_seconds: live_s,
            source: source.to_owned(),
            points,
        })
    }
}
