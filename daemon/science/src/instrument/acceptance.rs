//! The acceptance shape over the field of view: a density per steradian proportional to
//! `cos(zenith)^k` inside the edge of the field, normalised to 1 over it. The engine multiplies it by the
//! all-sky rate and the disc's solid angle to get a seed's expected background; the reach does the same.

use crate::error::{ScienceError, arg};

/// A checked `cos^k` acceptance shape with its normalisation worked out once.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Acceptance {
    cos_power: f64,
    max_zenith_deg: f64,
    norm_sr: f64,
}

impl Acceptance {
    /// A shape `cos(theta)^cos_power` for `theta` in `[0, max_zenith_deg]` (beyond 90 degrees a positive
    /// power gives 0: nothing arrives from below the horizon of the instrument frame).
    pub fn new(cos_power: f64, max_zenith_deg: f64) -> Result<Self, ScienceError> {
        let k = arg::within("cos_power", cos_power, 0.0, 100.0, "a number in [0, 100]")?;
        let max = arg::within(
            "max_zenith_deg",
            max_zenith_deg,
            1e-6,
            180.0,
            "an angle in (0, 180] degrees",
        )?;
        let two_pi = 2.0 * std::f64::consts::PI;
        let norm_sr = if k == 0.0 {
            two_pi * (1.0 - max.to_radians().cos())
        } else {
            let cm = max.to_radians().cos().max(0.0);
            two_pi * (1.0 - cm.powf(k + 1.0)) / (k + 1.0)
        };
        Ok(Self {
            cos_power: k,
            max_zenith_deg: max,
            norm_sr,
        })
    }

    /// Density per steradian at `zenith_deg`; 0 outside the field of view (and for NaN).
    #[inline]
    pub fn density(&self, zenith_deg: f64) -> f64 {
        if !(zenith_deg >= 0.0 && zenith_deg <= self.max_zenith_deg) {
            return 0.0;
        }
        if self.cos_power == 0.0 {
            return 1.0 / self.norm_sr;
        }
        zenith_deg.to_radians().cos().max(0.0).powf(self.cos_power) / self.norm_sr
    }

    /// `integral of cos^k over the field` in steradians: the solid angle the shape would fill at its peak
    /// density (equal to the field's solid angle when k = 0).
    pub fn norm_sr(&self) -> f64 {
        self.norm_sr
    }

    /// Solid angle of the field of view, `2 pi (1 - cos max_zenith)`.
    pub fn field_solid_angle_sr(&self) -> f64 {
        crate::geometry::disc_solid_angle_sr(self.max_zenith_deg)
    }

    /// The edge of the field of view, degrees.
    pub fn max_zenith_deg(&self) -> f64 {
        self.max_zenith_deg
    }
}

/// Acceptance density per steradian `a(theta)` for the cos-power shape within `max_zenith_deg`, normalised
/// to 1 over the field of view. Returns 0 outside the field and for invalid shapes (a negative or NaN
/// power or edge); build an [`Acceptance`] once to get a typed error instead and to skip the normalisation.
pub fn acceptance_density(cos_power: f64, max_zenith_deg: f64, zenith_deg: f64) -> f64 {
    Acceptance::new(cos_power, max_zenith_deg).map_or(0.0, |a| a.density(zenith_deg))
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap
mod tests {
    use super::*;

    /// Midpoint rule for integral of a(theta) 2 pi sin(theta) d theta over [0, max].
    fn integrate(a: &Acceptance, max: f64) -> f64 {
        let n = 20_000;
        let h = max.to_radians() / f64::from(n);
        (0..n)
            .map(|i| {
                let t = (f64::from(i) + 0.5) * h;
                a.density(t.to_degrees()) * 2.0 * std::f64::consts::PI * t.sin() * h
            })
            .sum()
    }

    #[test]
    fn normalised_over_the_field() {
        // [calc] from the formula: the density integrates to 1 over the field of view.
        for &(k, max) in &[(0.0, 45.0), (2.0, 45.0), (1.5, 65.0), (3.0, 120.0), (0.0, 180.0)] {
            let a = Acceptance::new(k, max).unwrap();
            assert!((integrate(&a, max) - 1.0).abs() < 1e-6, "k={k} max={max}");
        }
        // Uniform over a hemisphere: 1 / (2 pi).
        assert!((acceptance_density(0.0, 90.0, 30.0) - 0.5 / std::f64::consts::PI).abs() < 1e-15);
    }

    #[test]
    fn zero_outside_and_on_bad_input() {
        assert_eq!(acceptance_density(2.0, 45.0, 46.0), 0.0);
        assert_eq!(acceptance_density(2.0, 45.0, -1.0), 0.0);
        assert_eq!(acceptance_density(2.0, 45.0, f64::NAN), 0.0);
        assert_eq!(acceptance_density(-1.0, 45.0, 10.0), 0.0);
        assert_eq!(acceptance_density(f64::NAN, 45.0, 10.0), 0.0);
        assert!(matches!(
            Acceptance::new(2.0, 0.0),
            Err(ScienceError::InvalidArgument { .. })
        ));
        assert!(matches!(
            Acceptance::new(f64::INFINITY, 40.0),
            Err(ScienceError::InvalidArgument { .. })
        ));
    }
}
