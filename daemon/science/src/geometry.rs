//! Small-sky geometry for the search and the alerts: the solid angle of the search disc (which scales the
//! background), Gaussian PSF containment (which scales the signal), and the 90% error radius of a
//! candidate's centroid.

/// 68.27% containment radius of a 2-D Gaussian PSF in units of its sigma: `sqrt(-2 ln(1 - 0.6827))`
/// (the "1.515 sigma" of docs/science.md section 4).
pub const R68_PER_SIGMA: f64 = 1.515_172_903_961_338_6;

/// 90% containment radius of a 2-D Gaussian in units of its sigma: `sqrt(2 ln 10)`.
pub const R90_PER_SIGMA: f64 = 2.145_966_026_289_347;

/// Solid angle of a cap of angular radius `radius_deg`, `2 pi (1 - cos r)`, in steradians.
/// A negative or NaN radius gives 0; radii above 180 degrees give the whole sphere.
pub fn disc_solid_angle_sr(radius_deg: f64) -> f64 {
    if radius_deg.is_nan() || radius_deg <= 0.0 {
        return 0.0;
    }
    let half = 0.5 * radius_deg.min(180.0).to_radians();
    // 4 pi sin^2(r/2) keeps full precision for small discs, where 1 - cos r cancels.
    4.0 * std::f64::consts::PI * half.sin().powi(2)
}

/// Fraction of a 2-D Gaussian PSF of width `sigma_deg` inside a disc of radius `radius_deg` centred on the
/// source, `1 - exp(-r^2 / (2 sigma^2))` (flat-sky; exact to well below 1% for discs of a few degrees).
/// Returns 0 for a negative or NaN radius, 1 for a point-like PSF (`sigma <= 0`).
pub fn gaussian_containment(radius_deg: f64, sigma_deg: f64) -> f64 {
    if radius_deg.is_nan() || radius_deg <= 0.0 {
        return 0.0;
    }
    if sigma_deg.is_nan() || sigma_deg <= 0.0 {
        return 1.0;
    }
    let x = radius_deg / sigma_deg;
    -(-0.5 * x * x).exp_m1()
}

/// 90% error radius of the centroid of `n` photons from a Gaussian PSF of width `psf_sigma_deg`,
/// `2.146 sigma / sqrt(n)`, added in quadrature to the instrument's `systematic_deg` (docs/science.md section 4).
/// `n = 0` is treated as one photon; negative or NaN widths count as 0.
pub fn error_radius90_deg(psf_sigma_deg: f64, n: u64, systematic_deg: f64) -> f64 {
    let sigma = psf_sigma_deg.max(0.0);
    let sys = systematic_deg.max(0.0);
    let n = n.max(1) as f64;
    let stat = R90_PER_SIGMA * sigma / n.sqrt();
    stat.hypot(sys)
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap
mod tests {
    use super::*;

    #[test]
    fn containment_constants() {
        // [calc] from the formula, docs/science.md section 4: r68 = 1.515 sigma, centroid r90 = 2.146 sigma / sqrt(n).
        assert!((R68_PER_SIGMA - 1.515).abs() < 5e-4);
        assert!((R90_PER_SIGMA - 2.146).abs() < 5e-4);
        assert!((gaussian_containment(R68_PER_SIGMA, 1.0) - 0.682_689_492).abs() < 1e-9);
        assert!((gaussian_containment(R90_PER_SIGMA, 1.0) - 0.9).abs() < 1e-12);
        assert_eq!(gaussian_containment(-1.0, 1.0), 0.0);
        assert_eq!(gaussian_containment(0.5, 0.0), 1.0);
    }

    #[test]
    fn disc_solid_angle_values() {
        // [calc] from the formula: a hemisphere is 2 pi sr, the sphere 4 pi; a small disc is ~ pi r^2.
        assert!((disc_solid_angle_sr(90.0) - 2.0 * std::f64::consts::PI).abs() < 1e-12);
        assert!((disc_solid_angle_sr(180.0) - 4.0 * std::f64::consts::PI).abs() < 1e-12);
        let r = 0.5_f64.to_radians();
        assert!((disc_solid_angle_sr(0.5) / (std::f64::consts::PI * r * r) - 1.0).abs() < 1e-4);
        assert_eq!(disc_solid_angle_sr(f64::NAN), 0.0);
        assert_eq!(disc_solid_angle_sr(-2.0), 0.0);
    }

    #[test]
    fn error_radius_in_quadrature() {
        // [calc] from the formula: 4 photons halve the statistical radius; the systematic adds in quadrature.
        let stat = error_radius90_deg(0.4, 4, 0.0);
        assert!((stat - 2.145_966 * 0.4 / 2.0).abs() < 1e-6);
        let total = error_radius90_deg(0.4, 4, 0.1);
        assert!((total - (stat * stat + 0.01).sqrt()).abs() < 1e-12);
        assert_eq!(error_radius90_deg(0.4, 0, 0.0), error_radius90_deg(0.4, 1, 0.0));
        assert_eq!(error_radius90_deg(f64::NAN, 3, 0.2), 0.2);
    }
}
