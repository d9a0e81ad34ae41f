//! Small-sky geometry for the search and the alerts: the solid angle of the search disc (which scales the
//! background), Gaussian PSF containment (which scales the signal), and the 90% error radius of a
//! candidate's centroid, and the rotation from ICRS to galactic coordinates that alerts quote.

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

/// Fraction of a 2-D Gaussian PSF of width `sigma_deg`, centred `offset_deg` from a disc's centre, that
/// falls inside the disc of radius `radius_deg` (flat sky): 1 - Q_1(offset / sigma, radius / sigma), the
/// Marcum Q function, by Simpson's rule over the radial density
/// (rho / sigma^2) exp(-(rho^2 + offset^2) / 2 sigma^2) I_0(rho offset / sigma^2). Equals
/// [`gaussian_containment`] at zero offset (computed).
pub fn offset_gaussian_containment(radius_deg: f64, offset_deg: f64, sigma_deg: f64) -> f64 {
    if radius_deg.is_nan() || radius_deg <= 0.0 {
        return 0.0;
    }
    if sigma_deg.is_nan() || sigma_deg <= 0.0 {
        return if offset_deg.abs() <= radius_deg { 1.0 } else { 0.0 };
    }
    let d = if offset_deg.is_nan() {
        0.0
    } else {
        offset_deg.abs()
    };
    if d == 0.0 {
        return gaussian_containment(radius_deg, sigma_deg);
    }
    let (r, s2) = (radius_deg / sigma_deg, 1.0);
    let a = d / sigma_deg;
    // Integrand in units of sigma: rho exp(-(rho - a)^2 / 2) I0e(rho a), I0e(x) = I0(x) exp(-x).
    let f = |rho: f64| rho * (-(rho - a) * (rho - a) / (2.0 * s2)).exp() * bessel_i0e(rho * a);
    let n = 96;
    let h = r / n as f64;
    let mut sum = f(0.0) + f(r);
    for k in 1..n {
        sum += f(k as f64 * h) * if k % 2 == 1 { 4.0 } else { 2.0 };
    }
    (sum * h / 3.0).clamp(0.0, 1.0)
}

/// I_0(x) exp(-x) for x >= 0: the power series below 30, the asymptotic series above (Abramowitz & Stegun
/// 9.7.1; from memory; its first omitted term is below 2e-7 there).
fn bessel_i0e(x: f64) -> f64 {
    if x < 30.0 {
        let q = 0.25 * x * x;
        let (mut term, mut sum) = (1.0, 1.0);
        for k in 1..120 {
            term *= q / (k * k) as f64;
            sum += term;
            if term < 1e-17 * sum {
                break;
            }
        }
        sum * (-x).exp()
    } else {
        let inv = 1.0 / (8.0 * x);
        (1.0 + inv * (1.0 + inv * (9.0 / 2.0 * (1.0 + inv * 25.0 / 3.0))))
            / (2.0 * std::f64::consts::PI * x).sqrt()
    }
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

/// Direction of the north galactic pole in ICRS, degrees, and the galactic longitude of the north celestial
/// pole: the IAU 1958 galactic system as realised in ICRS by the Hipparcos catalogue (ESA 1997, SP-1200,
/// vol. 1, section 1.5.3).
pub const NGP_RA_DEG: f64 = 192.859_48;
/// Declination of the north galactic pole, ICRS degrees.
pub const NGP_DEC_DEG: f64 = 27.128_25;
/// Galactic longitude of the north celestial pole, degrees.
pub const NCP_L_DEG: f64 = 122.931_92;

/// The rotation from ICRS unit vectors to galactic ones, derived from the three defining angles above: row 3
/// is the galactic pole, rows 1 and 2 the directions of `l = 0` and `l = 90` in the galactic plane, placed so
/// that the celestial pole lies at longitude [`NCP_L_DEG`]. Matches the printed matrix of the same source
/// (eq. 1.5.11) to its ten digits.
pub fn icrs_to_galactic_matrix() -> [[f64; 3]; 3] {
    let (a, d) = (NGP_RA_DEG.to_radians(), NGP_DEC_DEG.to_radians());
    let z = [d.cos() * a.cos(), d.cos() * a.sin(), d.sin()];
    // The celestial pole projected onto the galactic plane, at longitude NCP_L_DEG there.
    let n = [0.0, 0.0, 1.0];
    let nz = z[2];
    let e_raw = [n[0] - nz * z[0], n[1] - nz * z[1], n[2] - nz * z[2]];
    let norm = (e_raw[0] * e_raw[0] + e_raw[1] * e_raw[1] + e_raw[2] * e_raw[2]).sqrt();
    let e = [e_raw[0] / norm, e_raw[1] / norm, e_raw[2] / norm];
    // w = z x e: the direction 90 degrees of longitude further on.
    let w = [
        z[1] * e[2] - z[2] * e[1],
        z[2] * e[0] - z[0] * e[2],
        z[0] * e[1] - z[1] * e[0],
    ];
    let (sl, cl) = NCP_L_DEG.to_radians().sin_cos();
    let x = [0, 1, 2].map(|i| cl * e[i] - sl * w[i]);
    let y = [0, 1, 2].map(|i| sl * e[i] + cl * w[i]);
    [x, y, z]
}

/// Galactic longitude and latitude (degrees; longitude in `[0, 360)`, latitude in `[-90, 90]`) of an ICRS
/// direction given in degrees. Non-finite input gives NaN.
pub fn icrs_to_galactic_deg(ra_deg: f64, dec_deg: f64) -> (f64, f64) {
    if !ra_deg.is_finite() || !dec_deg.is_finite() {
        return (f64::NAN, f64::NAN);
    }
    let (ra, dec) = (ra_deg.to_radians(), dec_deg.to_radians());
    let v = [dec.cos() * ra.cos(), dec.cos() * ra.sin(), dec.sin()];
    let g = icrs_to_galactic_matrix().map(|row| row[0] * v[0] + row[1] * v[1] + row[2] * v[2]);
    // atan2 of the out-of-plane part against the in-plane one stays accurate at the poles, unlike asin.
    let b = g[2].atan2(g[0].hypot(g[1])).to_degrees();
    let l = g[1].atan2(g[0]).to_degrees().rem_euclid(360.0);
    // A longitude that rounds to 360 is 0.
    let l = if l >= 360.0 { 0.0 } else { l };
    (l, b)
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap
mod tests {
    use super::*;

    #[test]
    fn offset_containment_limits_and_values() {
        // Zero offset: the closed form; a tiny offset: continuous with it (computed).
        let c0 = gaussian_containment(0.5, 0.3);
        assert_eq!(offset_gaussian_containment(0.5, 0.0, 0.3), c0);
        assert!((offset_gaussian_containment(0.5, 1e-6, 0.3) - c0).abs() < 1e-6);
        // A wide PSF far inside: containment falls with the offset; a source at the edge of a disc much
        // wider than the PSF has half its photons inside (computed).
        let a = offset_gaussian_containment(0.5, 0.2, 0.3);
        let b = offset_gaussian_containment(0.5, 0.4, 0.3);
        assert!(b < a && a < c0, "{c0} {a} {b}");
        let edge = offset_gaussian_containment(10.0, 10.0, 0.1);
        assert!((edge - 0.5).abs() < 0.01, "{edge}");
        // Asymptotic and series forms of I0e meet at 30 (1e-6).
        assert!((bessel_i0e(29.999_999) - bessel_i0e(30.0)).abs() < 1e-6 * bessel_i0e(30.0));
    }

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
    /// Angular distance between two directions, degrees.
    fn sep_deg(l1: f64, b1: f64, l2: f64, b2: f64) -> f64 {
        let (l1, b1, l2, b2) = (l1.to_radians(), b1.to_radians(), l2.to_radians(), b2.to_radians());
        let c = b1.sin() * b2.sin() + b1.cos() * b2.cos() * (l1 - l2).cos();
        c.clamp(-1.0, 1.0).acos().to_degrees()
    }

    #[test]
    fn galactic_reference_directions() {
        // Hipparcos (ESA 1997, SP-1200 vol. 1, section 1.5.3): the north galactic pole is RA 192.85948,
        // Dec +27.12825; the north celestial pole lies at galactic longitude 122.93192, latitude 27.12825.
        let (_, b) = icrs_to_galactic_deg(192.859_48, 27.128_25);
        assert!((b - 90.0).abs() < 1e-9, "pole latitude {b}");
        let (l, b) = icrs_to_galactic_deg(0.0, 90.0);
        assert!(
            (l - 122.931_92).abs() < 1e-4 && (b - 27.128_25).abs() < 1e-4,
            "NCP at {l} {b}"
        );
        // The galactic centre (l = 0, b = 0) is at RA 266.40500, Dec -28.93617 in that realisation.
        let (l, b) = icrs_to_galactic_deg(266.405, -28.936_17);
        assert!(sep_deg(l, b, 0.0, 0.0) < 2e-4, "centre at {l} {b}");
        // The south galactic pole is the antipode of the north one.
        let (_, b) = icrs_to_galactic_deg(12.859_48, -27.128_25);
        assert!((b + 90.0).abs() < 1e-5);
        assert!(icrs_to_galactic_deg(f64::NAN, 1.0).0.is_nan());
    }

    #[test]
    fn galactic_rotation_matches_the_printed_matrix() {
        // Hipparcos (ESA 1997, SP-1200 vol. 1, eq. 1.5.11), transposed to map ICRS onto galactic axes.
        let printed = [
            [-0.054_875_560_4, -0.873_437_090_2, -0.483_835_015_5],
            [0.494_109_427_9, -0.444_829_630_0, 0.746_982_244_5],
            [-0.867_666_149_0, -0.198_076_373_4, 0.455_983_776_2],
        ];
        let m = icrs_to_galactic_matrix();
        for i in 0..3 {
            for j in 0..3 {
                assert!(
                    (m[i][j] - printed[i][j]).abs() < 1e-9,
                    "[{i}][{j}] {} vs {}",
                    m[i][j],
                    printed[i][j]
                );
            }
        }
        // [calc] a rotation: rows of unit length, mutually orthogonal.
        for i in 0..3 {
            for j in 0..3 {
                let dot: f64 = (0..3).map(|k| m[i][k] * m[j][k]).sum();
                let want = if i == j { 1.0 } else { 0.0 };
                assert!((dot - want).abs() < 1e-12, "rows {i} {j}: {dot}");
            }
        }
    }

    #[test]
    fn galactic_rotation_is_orthonormal() {
        let m = icrs_to_galactic_matrix();
        for i in 0..3 {
            for j in 0..3 {
                let dot: f64 = (0..3).map(|k| m[i][k] * m[j][k]).sum();
                let want = if i == j { 1.0 } else { 0.0 };
                assert!((dot - want).abs() < 1e-9, "rows {i} {j}: {dot}");
            }
        }
    }
}
