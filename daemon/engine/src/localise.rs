//! Position and 90% region of a flash by the unbinned likelihood of a mixture (docs/science.md section 4):
//! each photon of the window near the source is either signal, spread by the PSF at its own energy around
//! the source, or background, flat over the sky with the modelled density. The position and the signal
//! count are fitted; the region is where 2 Delta ln L <= 4.605 (two parameters) with the signal profiled.
//! A few photons, a few hundred microseconds at most: it runs on the flash's path.

/// 2 Delta ln L bounding the 90% region of two parameters (chi-square, 2 dof: -2 ln 0.1; Wilks 1938;
/// common practice, no source).
pub(crate) const DELTA_2LNL_90_2DOF: f64 = 4.605_170_185_988_091;
/// Directions in which the region's boundary is found; the radius is their root mean square.
const DIRECTIONS: usize = 8;
/// Expectation-maximisation steps of the position fit at most.
const EM_STEPS: usize = 200;
/// Bisection steps on the boundary in each direction (the bracket shrinks 2^-18).
const BOUNDARY_STEPS: usize = 18;

/// One photon for the fit: its unit vector and the PSF width at its energy (radians).
#[derive(Debug, Clone, Copy)]
pub(crate) struct LocPhoton {
    pub(crate) v: [f64; 3],
    pub(crate) sigma_rad: f64,
}

/// The fitted position and its region.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct Localisation {
    /// Best-fit direction (unit vector).
    pub(crate) centre: [f64; 3],
    /// Radius of the disc of the same mean extent as the 90% region, statistical only, degrees. At most
    /// the fit region's radius: a region that reaches it means the photons do not tell the position.
    pub(crate) radius90_deg: f64,
    /// Fitted signal photons.
    pub(crate) signal: f64,
}

/// Photons projected on the tangent plane at the region's centre (radians).
struct Plane {
    x: Vec<f64>,
    y: Vec<f64>,
    /// 1 / (2 pi sigma^2) and -1 / (2 sigma^2) per photon.
    norm: Vec<f64>,
    expo: Vec<f64>,
    /// Background density per steradian.
    beta: f64,
}

impl Plane {
    /// PSF density of photon i (per steradian) for a source at (mx, my).
    fn psf(&self, i: usize, mx: f64, my: f64) -> f64 {
        let (dx, dy) = (self.x[i] - mx, self.y[i] - my);
        self.norm[i] * (self.expo[i] * (dx * dx + dy * dy)).exp()
    }

    fn fill_psf(&self, mx: f64, my: f64, a: &mut Vec<f64>) {
        a.clear();
        a.extend((0..self.x.len()).map(|i| self.psf(i, mx, my)));
    }

    /// ln L(s) = -s + sum ln(s a_i + beta) maximised over s >= 0 (concave in s), from `s0`.
    fn profile(&self, a: &[f64], s0: f64) -> (f64, f64) {
        let ln_l = |s: f64| -s + a.iter().map(|&ai| (s * ai + self.beta).ln()).sum::<f64>();
        let slope0 = -1.0 + a.iter().map(|&ai| ai / self.beta).sum::<f64>();
        if slope0 <= 0.0 {
            return (0.0, ln_l(0.0));
        }
        // Newton on the slope, kept inside a bracket [lo, hi] where the slope changes sign; the slope is
        // negative at s = n (every term below 1).
        let (mut lo, mut hi) = (0.0, a.len() as f64);
        let mut s = s0.clamp(lo, hi);
        for _ in 0..40 {
            let (mut g, mut h) = (-1.0, 0.0);
            for &ai in a {
                let q = ai / (s * ai + self.beta);
                g += q;
                h -= q * q;
            }
            if g > 0.0 {
                lo = s;
            } else {
                hi = s;
            }
            let mut next = if h < 0.0 { s - g / h } else { 0.5 * (lo + hi) };
            if !(next > lo && next < hi) {
                next = 0.5 * (lo + hi);
            }
            if (next - s).abs() <= 1e-9 * s.max(1.0) {
                s = next;
                break;
            }
            s = next;
        }
        (s, ln_l(s))
    }
}

/// Fits the source position and its 90% region from `photons` (those of the window within
/// `region_radius_deg` of `start`, the region the background density `bkg_per_sr` is flat over), starting
/// from `start`. With no photons, or none preferring a source, the position stays at `start` and the radius
/// is the region's.
pub(crate) fn localise(
    photons: &[LocPhoton],
    start: [f64; 3],
    region_radius_deg: f64,
    bkg_per_sr: f64,
) -> Localisation {
    let r_max = region_radius_deg.to_radians();
    let none = Localisation {
        centre: start,
        radius90_deg: region_radius_deg,
        signal: 0.0,
    };
    if photons.is_empty() {
        return none;
    }
    let (e1, e2) = tangent_basis(start);
    let mut plane = Plane {
        x: Vec::with_capacity(photons.len()),
        y: Vec::with_capacity(photons.len()),
        norm: Vec::with_capacity(photons.len()),
        expo: Vec::with_capacity(photons.len()),
        // A model with no background at all would make the region a point on an outlier; a floor far below
        // any real density keeps the logarithms finite.
        beta: bkg_per_sr.max(1e-3),
    };
    for p in photons {
        let s = p.sigma_rad.max(1e-6);
        plane.x.push(dot(p.v, e1));
        plane.y.push(dot(p.v, e2));
        plane.norm.push(1.0 / (2.0 * std::f64::consts::PI * s * s));
        plane.expo.push(-0.5 / (s * s));
    }
    let n = photons.len();
    // EM: each step raises the likelihood; the position step is the weighted mean of the photons, each
    // weighted by its chance of being signal over its PSF variance.
    let (mut mx, mut my) = (0.0, 0.0);
    let mut s = n as f64 * 0.5;
    for _ in 0..EM_STEPS {
        let (mut sw, mut swx, mut swy, mut ssig) = (0.0, 0.0, 0.0, 0.0);
        for i in 0..n {
            let sa = s * plane.psf(i, mx, my);
            let w = sa / (sa + plane.beta);
            let wv = w * (-2.0 * plane.expo[i]);
            ssig += w;
            sw += wv;
            swx += wv * plane.x[i];
            swy += wv * plane.y[i];
        }
        if sw <= 0.0 || !sw.is_finite() {
            break;
        }
        let (nx, ny) = (swx / sw, swy / sw);
        let moved = (nx - mx).hypot(ny - my);
        mx = nx;
        my = ny;
        let done = moved < 1e-9 && (ssig - s).abs() < 1e-6 * s.max(1.0);
        s = ssig;
        if done {
            break;
        }
    }
    let mut a = Vec::with_capacity(n);
    plane.fill_psf(mx, my, &mut a);
    let (s_hat, ln_max) = plane.profile(&a, s);
    if s_hat <= 0.0 || mx.hypot(my) > r_max {
        return none;
    }
    // Boundary of 2 Delta ln L = 4.605 along each direction, bracketed from a Gaussian guess.
    let mean_var = {
        let (mut num, mut den) = (0.0, 0.0);
        for (ai, expo) in a.iter().zip(&plane.expo) {
            let sa = s_hat * ai;
            let w = sa / (sa + plane.beta);
            num += w;
            den += w * (-2.0 * expo);
        }
        if den > 0.0 { num / den } else { r_max * r_max }
    };
    let guess = (DELTA_2LNL_90_2DOF * mean_var / s_hat.max(1.0)).sqrt().min(r_max);
    let mut sum_r2 = 0.0;
    for j in 0..DIRECTIONS {
        let phi = std::f64::consts::TAU * j as f64 / DIRECTIONS as f64;
        let (uy, ux) = phi.sin_cos();
        let mut s_warm = s_hat;
        let mut excess = |r: f64, a: &mut Vec<f64>| {
            plane.fill_psf(mx + r * ux, my + r * uy, a);
            let (sp, lp) = plane.profile(a, s_warm);
            s_warm = sp;
            2.0 * (ln_max - lp) - DELTA_2LNL_90_2DOF
        };
        let (mut lo, mut hi) = (0.0, guess.max(1e-7));
        while excess(hi, &mut a) < 0.0 {
            lo = hi;
            hi *= 2.0;
            if hi >= r_max {
                hi = r_max;
                break;
            }
        }
        let r = if hi >= r_max && excess(hi, &mut a) < 0.0 {
            r_max
        } else {
            for _ in 0..BOUNDARY_STEPS {
                let mid = 0.5 * (lo + hi);
                if excess(mid, &mut a) < 0.0 {
                    lo = mid;
                } else {
                    hi = mid;
                }
            }
            0.5 * (lo + hi)
        };
        sum_r2 += r * r;
    }
    let radius = (sum_r2 / DIRECTIONS as f64).sqrt().min(r_max);
    // Back from the plane (orthographic projection) to the sphere.
    let z = (1.0 - mx * mx - my * my).max(0.0).sqrt();
    let c = [
        z * start[0] + mx * e1[0] + my * e2[0],
        z * start[1] + mx * e1[1] + my * e2[1],
        z * start[2] + mx * e1[2] + my * e2[2],
    ];
    let norm = dot(c, c).sqrt();
    Localisation {
        centre: [c[0] / norm, c[1] / norm, c[2] / norm],
        radius90_deg: radius.to_degrees(),
        signal: s_hat,
    }
}

fn dot(a: [f64; 3], b: [f64; 3]) -> f64 {
    a[0] * b[0] + a[1] * b[1] + a[2] * b[2]
}

/// Two unit vectors orthogonal to `c` and to each other.
fn tangent_basis(c: [f64; 3]) -> ([f64; 3], [f64; 3]) {
    let helper = if c[2].abs() < 0.9 {
        [0.0, 0.0, 1.0]
    } else {
        [1.0, 0.0, 0.0]
    };
    let x = [
        helper[1] * c[2] - helper[2] * c[1],
        helper[2] * c[0] - helper[0] * c[2],
        helper[0] * c[1] - helper[1] * c[0],
    ];
    let n = dot(x, x).sqrt();
    let e1 = [x[0] / n, x[1] / n, x[2] / n];
    let e2 = [
        c[1] * e1[2] - c[2] * e1[1],
        c[2] * e1[0] - c[0] * e1[2],
        c[0] * e1[1] - c[1] * e1[0],
    ];
    (e1, e2)
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap
mod tests {
    use super::*;
    use crate::sky::{angle_deg, unit_vector};
    use rand::{RngExt, SeedableRng};
    use rand_pcg::Pcg64;

    fn offset(c: [f64; 3], dx: f64, dy: f64) -> [f64; 3] {
        let (e1, e2) = tangent_basis(c);
        let v = [
            c[0] + dx * e1[0] + dy * e2[0],
            c[1] + dx * e1[1] + dy * e2[1],
            c[2] + dx * e1[2] + dy * e2[2],
        ];
        let n = dot(v, v).sqrt();
        [v[0] / n, v[1] / n, v[2] / n]
    }

    fn normal(r: &mut Pcg64) -> f64 {
        let u1: f64 = 1.0 - r.random::<f64>();
        let u2: f64 = r.random();
        (-2.0 * u1.ln()).sqrt() * (std::f64::consts::TAU * u2).cos()
    }

    #[test]
    fn background_free_region_is_the_centroid_radius() {
        // Without background the fit is the PSF-weighted mean and the region's radius is
        // sqrt(4.605) sigma / sqrt(n) = 2.146 sigma / sqrt(n) (docs/science.md section 4; computed).
        let mut r = Pcg64::seed_from_u64(3);
        let c = unit_vector(30.0, 40.0);
        let sigma = 0.4f64.to_radians();
        let ph: Vec<LocPhoton> = (0..25)
            .map(|_| LocPhoton {
                v: offset(c, normal(&mut r) * sigma, normal(&mut r) * sigma),
                sigma_rad: sigma,
            })
            .collect();
        let loc = localise(&ph, c, 2.0, 1e-3);
        let expect = 2.146 * 0.4 / 5.0;
        assert!(
            (loc.radius90_deg / expect - 1.0).abs() < 0.01,
            "{loc:?} against {expect}"
        );
        assert!((loc.signal - 25.0).abs() < 0.01);
    }

    #[test]
    fn region_covers_the_source_in_about_90_percent_of_trials() {
        // 2000 trials of 8 signal photons on a background of 20 in the 1 deg region, the source up to 0.3 deg
        // from the start. Wilks (2 dof) gives 90% asymptotically; the binomial sd at 2000 is 0.7%, and the
        // band 0.85-0.95 leaves room for the few-photon regime (common practice, no source).
        let mut r = Pcg64::seed_from_u64(5);
        let sigma = 0.3f64.to_radians();
        let region = 1.0f64;
        let omega = glint_science::geometry::disc_solid_angle_sr(region);
        let bkg = 20.0;
        let mut inside = 0;
        let trials = 2000;
        for _ in 0..trials {
            let start = unit_vector(r.random::<f64>() * 360.0, r.random::<f64>() * 60.0);
            let src = offset(
                start,
                0.2f64.to_radians() * normal(&mut r),
                0.2f64.to_radians() * normal(&mut r),
            );
            let mut ph = Vec::new();
            for _ in 0..8 {
                ph.push(LocPhoton {
                    v: offset(src, normal(&mut r) * sigma, normal(&mut r) * sigma),
                    sigma_rad: sigma,
                });
            }
            let nb =
                rand_distr::Distribution::sample(&rand_distr::Poisson::new(bkg).unwrap(), &mut r) as usize;
            for _ in 0..nb {
                // Uniform in the cap.
                let cos_r = region.to_radians().cos();
                let ct = 1.0 - r.random::<f64>() * (1.0 - cos_r);
                let th = ct.acos();
                let phi = std::f64::consts::TAU * r.random::<f64>();
                ph.push(LocPhoton {
                    v: offset(start, th * phi.cos(), th * phi.sin()),
                    sigma_rad: sigma,
                });
            }
            ph.retain(|p| angle_deg(p.v, start) <= region);
            let loc = localise(&ph, start, region, bkg / omega);
            if angle_deg(loc.centre, src) <= loc.radius90_deg {
                inside += 1;
            }
        }
        let frac = f64::from(inside) / f64::from(trials);
        assert!((0.85..=0.95).contains(&frac), "coverage {frac}");
    }
}
