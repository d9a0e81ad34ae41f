//! What a false-alarm rate means: the effective-trials calibration measured on background (docs/science.md
//! section 4) and the post-trials significance of an alert. Overlapping windows, nested timescales and
//! overlapping discs make the real trials fewer than the nominal K x R per second; the calibration stores
//! the measured fraction against the per-seed p-value so thresholds and reported rates use the real one.

use serde::{Deserialize, Serialize};

use crate::ScienceError;
use crate::poisson::sigma_from_ln_p;

/// The calibration file format this build writes and reads.
pub const CALIBRATION_FORMAT: u32 = 1;

/// Post-trials significance of an alert whose false-alarm rate is `far_per_year`: the one-sided Z of the
/// chance of at least one background alert as rare within a year, P = 1 - exp(-FAR x 1 yr) (docs/science.md
/// section 4). NaN or negative rates count as 0 (Z unbounded; the caller clamps).
pub fn sigma_post_trials(far_per_year: f64) -> f64 {
    let far = if far_per_year.is_nan() {
        0.0
    } else {
        far_per_year.max(0.0)
    };
    // ln(1 - exp(-x)) without cancellation at small x.
    let ln_p = (-(-far).exp_m1()).ln();
    sigma_from_ln_p(ln_p)
}

/// One measured level: at per-seed p-values up to exp(`ln_p`), background gave `candidates` distinct
/// candidates where the nominal trials predict `nominal`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TrialsPoint {
    /// ln of the per-seed p-value level.
    pub ln_p: f64,
    /// Distinct background candidates whose best trigger reached it.
    pub candidates: u64,
    /// exp(ln_p) x K x R x live time: what the nominal trials predict.
    pub nominal: f64,
    /// candidates / nominal: the effective fraction of the nominal trials.
    pub fraction: f64,
}

/// An instrument's effective-trials calibration, as stored in `<state_dir>/calibration/<instrument>.toml`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TrialsCalibration {
    /// File format, [`CALIBRATION_FORMAT`].
    pub format: u32,
    /// Instrument id.
    pub instrument: String,
    /// The search it was measured with: ladder, search radius; a different search needs a new calibration.
    pub ladder_s: Vec<f64>,
    /// Search radius, degrees.
    pub search_radius_deg: f64,
    /// Mean all-sky rate of the background it was measured on, Hz.
    pub all_sky_rate_hz: f64,
    /// Live time measured, seconds.
    pub live_seconds: f64,
    /// What the background was (simulated, or which recordings, time-scrambled or not).
    pub source: String,
    /// Measured levels, in increasing `ln_p`.
    pub points: Vec<TrialsPoint>,
}

impl TrialsCalibration {
    /// Checks the format, the search it applies to and the points.
    pub fn check(
        &self,
        instrument: &str,
        ladder_s: &[f64],
        search_radius_deg: f64,
    ) -> Result<(), ScienceError> {
        let bad = |detail: String| ScienceError::OutOfRange {
            what: "trials calibration",
            detail,
        };
        if self.format != CALIBRATION_FORMAT {
            return Err(bad(format!(
                "format {} (this build reads {CALIBRATION_FORMAT})",
                self.format
            )));
        }
        if self.instrument != instrument {
            return Err(bad(format!(
                "made for instrument {:?}, not {instrument:?}",
                self.instrument
            )));
        }
        if self.ladder_s != ladder_s || (self.search_radius_deg - search_radius_deg).abs() > 1e-9 {
            return Err(bad(format!(
                "made for ladder {:?} and radius {} deg, the search uses {ladder_s:?} and {search_radius_deg} deg",
                self.ladder_s, self.search_radius_deg
            )));
        }
        if self.points.is_empty() {
            return Err(bad("no measured points".to_owned()));
        }
        for w in self.points.windows(2) {
            if w[1].ln_p <= w[0].ln_p {
                return Err(bad("points are not in increasing ln_p".to_owned()));
            }
        }
        for p in &self.points {
            if !(p.fraction.is_finite() && p.fraction > 0.0 && p.fraction <= 10.0 && p.ln_p.is_finite()) {
                return Err(bad(format!(
                    "point at ln_p {} has fraction {}",
                    p.ln_p, p.fraction
                )));
            }
        }
        Ok(())
    }

    /// The effective fraction of the nominal trials at per-seed ln p: linear in ln p between points, held
    /// at the end points outside them (the rarest measured level stands for everything rarer).
    pub fn fraction(&self, ln_p: f64) -> f64 {
        let pts = &self.points;
        let Some(first) = pts.first() else { return 1.0 };
        if ln_p.is_nan() || ln_p <= first.ln_p {
            return first.fraction;
        }
        for w in pts.windows(2) {
            if ln_p <= w[1].ln_p {
                let x = (ln_p - w[0].ln_p) / (w[1].ln_p - w[0].ln_p);
                return w[0].fraction + x * (w[1].fraction - w[0].fraction);
            }
        }
        pts.last().map_or(1.0, |p| p.fraction)
    }

    /// The per-seed p-value bound that gives a real rate of `far_per_s` with `k` timescales at `rate_hz`:
    /// p K R f(p) = F, solved by a few fixed-point steps (f varies slowly with p).
    pub fn bound(&self, far_per_s: f64, k: usize, rate_hz: f64) -> f64 {
        let nominal = far_per_s / (k as f64 * rate_hz);
        let mut p = nominal;
        for _ in 0..8 {
            p = nominal / self.fraction(p.ln());
        }
        p
    }
}

/// Counts, at each level of `ln_p_levels`, the candidates whose best per-seed ln p reached it, and the
/// fraction of the nominal trials (`k` timescales, `rate_hz`, `live_s`) they amount to.
pub fn measure_points(
    best_ln_p: &[f64],
    ln_p_levels: &[f64],
    k: usize,
    rate_hz: f64,
    live_s: f64,
) -> Vec<TrialsPoint> {
    ln_p_levels
        .iter()
        .filter_map(|&level| {
            let candidates = best_ln_p.iter().filter(|&&l| l <= level).count() as u64;
            let nominal = level.exp() * k as f64 * rate_hz * live_s;
            // A level with no candidate says only that the fraction is small: it is left out.
            (candidates > 0 && nominal > 0.0).then(|| TrialsPoint {
                ln_p: level,
                candidates,
                nominal,
                fraction: candidates as f64 / nominal,
            })
        })
        .collect()
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap
mod tests {
    use super::*;

    #[test]
    fn post_trials_sigma_values() {
        // FAR 1/yr: P = 1 - e^-1 = 0.632, Z = -0.338; FAR 0.01/yr: P = 0.00995, Z = 2.329 (computed).
        assert!(
            (sigma_post_trials(1.0) + 0.3375).abs() < 2e-3,
            "{}",
            sigma_post_trials(1.0)
        );
        assert!(
            (sigma_post_trials(0.01) - 2.3285).abs() < 2e-3,
            "{}",
            sigma_post_trials(0.01)
        );
        // FAR 0.15/yr (the example beside 7.2 sigma per seed): P = 0.139, Z = 1.083 (computed).
        assert!(
            (sigma_post_trials(0.15) - 1.083).abs() < 2e-3,
            "{}",
            sigma_post_trials(0.15)
        );
        // P = 1e-9: Z = 5.998 (computed).
        assert!((sigma_post_trials(1e-9) - 5.998).abs() < 2e-3);
    }

    fn cal(points: Vec<(f64, f64)>) -> TrialsCalibration {
        TrialsCalibration {
            format: CALIBRATION_FORMAT,
            instrument: "a".into(),
            ladder_s: vec![0.1, 1.0],
            search_radius_deg: 0.5,
            all_sky_rate_hz: 100.0,
            live_seconds: 3600.0,
            source: "test".into(),
            points: points
                .into_iter()
                .map(|(ln_p, fraction)| TrialsPoint {
                    ln_p,
                    candidates: 1,
                    nominal: 1.0,
                    fraction,
                })
                .collect(),
        }
    }

    #[test]
    fn fraction_interpolates_and_holds_the_ends() {
        let c = cal(vec![(-20.0, 0.1), (-10.0, 0.3)]);
        assert_eq!(c.fraction(-30.0), 0.1);
        assert!((c.fraction(-15.0) - 0.2).abs() < 1e-12);
        assert_eq!(c.fraction(-5.0), 0.3);
        assert!(c.check("a", &[0.1, 1.0], 0.5).is_ok());
        assert!(c.check("b", &[0.1, 1.0], 0.5).is_err());
        assert!(c.check("a", &[0.1], 0.5).is_err());
        // A constant fraction f divides the nominal bound by f.
        let c = cal(vec![(-40.0, 0.2), (-1.0, 0.2)]);
        let nominal = 1e-9 / (2.0 * 100.0);
        assert!((c.bound(1e-9, 2, 100.0) / (nominal / 0.2) - 1.0).abs() < 1e-12);
    }

    #[test]
    fn measured_points_count_candidates_below_each_level() {
        let pts = measure_points(&[-12.0, -11.0, -5.0], &[-20.0, -10.0, -4.0], 2, 10.0, 100.0);
        assert_eq!(pts.len(), 2, "the empty level is left out");
        assert_eq!(pts[0].candidates, 2);
        assert!((pts[0].nominal - (-10f64).exp() * 2000.0).abs() < 1e-12);
        assert_eq!(pts[1].candidates, 3);
    }
}
