//! The checked, ready-to-evaluate form of an instrument's response: effective area over energy and zenith,
//! PSF and energy resolution over energy. The simulator draws photons with it, the engine sizes error
//! radii with it, and the reach and the fit fold burst spectra through it.
//!
//! Interpolation: log-log in energy between table points (linear in `ln E` where a neighbour is zero),
//! linear in zenith between rows, held at the end values outside the tables, and zero outside the field
//! of view and the `[energy_min_gev, energy_max_gev]` range.

use super::spec::{CurveTable, ResponseSpec};
use crate::error::ScienceError;

/// A curve `y(E)` held as logs for log-log interpolation.
#[derive(Debug, Clone, PartialEq)]
struct LogCurve {
    ln_e: Vec<f64>,
    ln_v: Vec<f64>,
}

impl LogCurve {
    fn new(c: &CurveTable) -> Self {
        Self {
            ln_e: c.energy_gev.iter().map(|e| e.ln()).collect(),
            ln_v: c.value.iter().map(|v| v.ln()).collect(),
        }
    }

    /// The curve at `e`; below the table (or NaN) the first value, above it the last.
    fn at(&self, e: f64) -> f64 {
        let le = e.ln();
        let (Some(&x_first), Some(&x_last)) = (self.ln_e.first(), self.ln_e.last()) else {
            return 0.0;
        };
        if le.is_nan() || le <= x_first {
            return self.ln_v.first().map_or(0.0, |v| v.exp());
        }
        if le >= x_last {
            return self.ln_v.last().map_or(0.0, |v| v.exp());
        }
        let j = self.ln_e.partition_point(|&x| x <= le);
        let (x0, x1, y0, y1) = (self.ln_e[j - 1], self.ln_e[j], self.ln_v[j - 1], self.ln_v[j]);
        (y0 + (le - x0) / (x1 - x0) * (y1 - y0)).exp()
    }
}

/// `(e^t - 1) / t`, 1 at t = 0.
fn exprel(t: f64) -> f64 {
    if t == 0.0 { 1.0 } else { t.exp_m1() / t }
}

/// `integral_0^1 v e^(t v) dv = (e^t (t - 1) + 1) / t^2`, by its series where that form cancels.
fn first_moment_exp(t: f64) -> f64 {
    if t.abs() < 1.0 {
        // sum_k t^k / (k! (k + 2))
        let mut term = 1.0; // t^k / k!
        let mut sum = 0.5;
        for k in 1..40_u32 {
            term *= t / f64::from(k);
            let add = term / f64::from(k + 2);
            sum += add;
            if add.abs() < 1e-17 * sum.abs() {
                break;
            }
        }
        sum
    } else {
        (t.exp() * (t - 1.0) + 1.0) / (t * t)
    }
}

/// The checked instrument response, built from a [`ResponseSpec`] that passed its checks.
#[derive(Debug, Clone, PartialEq)]
pub struct InstrumentResponse {
    max_zenith_deg: f64,
    energy_min_gev: f64,
    energy_max_gev: f64,
    /// Area table energies, GeV, and their logs.
    area_e: Vec<f64>,
    area_ln_e: Vec<f64>,
    area_zenith: Vec<f64>,
    /// One row per zenith angle, m^2.
    area: Vec<Vec<f64>>,
    psf68: LogCurve,
    eres: LogCurve,
    systematic_deg: f64,
    clock_precision_ns: i64,
}

impl InstrumentResponse {
    /// Checks the spec (every problem reported at once, keys under `response.`) and builds the response.
    pub fn from_spec(spec: &ResponseSpec) -> Result<Self, ScienceError> {
        let mut problems = Vec::new();
        if !spec.check("response", &mut problems) {
            return Err(ScienceError::InvalidSpec { problems });
        }
        let a = &spec.effective_area;
        Ok(Self {
            max_zenith_deg: spec.max_zenith_deg,
            energy_min_gev: spec.energy_min_gev,
            energy_max_gev: spec.energy_max_gev,
            area_e: a.energy_gev.clone(),
            area_ln_e: a.energy_gev.iter().map(|e| e.ln()).collect(),
            area_zenith: a.zenith_deg.clone(),
            area: a.area_m2.clone(),
            psf68: LogCurve::new(&spec.psf68_deg),
            eres: LogCurve::new(&spec.energy_resolution),
            systematic_deg: spec.systematic_deg,
            clock_precision_ns: spec.clock_precision_ns,
        })
    }

    /// Whether `zenith_deg` is inside the field of view (NaN is not).
    fn in_fov(&self, zenith_deg: f64) -> bool {
        zenith_deg >= 0.0 && zenith_deg <= self.max_zenith_deg
    }

    /// The two rows bracketing `zenith_deg` and the weight of the second.
    fn rows_for(&self, zenith_deg: f64) -> (usize, usize, f64) {
        let n = self.area_zenith.len();
        let j = self.area_zenith.partition_point(|&z| z <= zenith_deg);
        if j == 0 {
            (0, 0, 0.0)
        } else if j >= n {
            (n - 1, n - 1, 0.0)
        } else {
            let (z0, z1) = (self.area_zenith[j - 1], self.area_zenith[j]);
            (j - 1, j, (zenith_deg - z0) / (z1 - z0))
        }
    }

    /// Row `r` of the area table at energy `e` (inside the energy range, table ends held).
    fn row_at(&self, r: usize, e: f64) -> f64 {
        let row = &self.area[r];
        let n = self.area_e.len();
        if e <= self.area_e[0] {
            return row[0];
        }
        if e >= self.area_e[n - 1] {
            return row[n - 1];
        }
        let j = self.area_e.partition_point(|&x| x <= e);
        let (a0, a1) = (row[j - 1], row[j]);
        let t = (e.ln() - self.area_ln_e[j - 1]) / (self.area_ln_e[j] - self.area_ln_e[j - 1]);
        if a0 > 0.0 && a1 > 0.0 {
            (a0.ln() + t * (a1.ln() - a0.ln())).exp()
        } else {
            a0 + t * (a1 - a0)
        }
    }

    /// Effective area after cuts, m^2, at true energy `e_gev` and zenith (or off-axis) angle `zenith_deg`;
    /// 0 outside the field of view or the energy range (and for NaN arguments).
    pub fn effective_area_m2(&self, e_gev: f64, zenith_deg: f64) -> f64 {
        let in_range = e_gev >= self.energy_min_gev && e_gev <= self.energy_max_gev;
        if !in_range || !self.in_fov(zenith_deg) {
            return 0.0;
        }
        let (r0, r1, w) = self.rows_for(zenith_deg);
        let a0 = self.row_at(r0, e_gev);
        if w == 0.0 {
            a0
        } else {
            (1.0 - w) * a0 + w * self.row_at(r1, e_gev)
        }
    }

    /// 68% containment radius of the PSF at `e_gev`, degrees.
    pub fn psf68_deg(&self, e_gev: f64) -> f64 {
        self.psf68.at(e_gev)
    }

    /// Sigma of the Gaussian PSF with that 68% radius (`r68 = 1.515 sigma`), degrees.
    pub fn psf_sigma_deg(&self, e_gev: f64) -> f64 {
        self.psf68.at(e_gev) / crate::geometry::R68_PER_SIGMA
    }

    /// Gaussian sigma of `ln(E_reco / E_true)` at true energy `e_gev`.
    pub fn energy_sigma_ln(&self, e_gev: f64) -> f64 {
        self.eres.at(e_gev)
    }

    /// Edge of the field of view, degrees.
    pub fn max_zenith_deg(&self) -> f64 {
        self.max_zenith_deg
    }

    /// Lowest energy kept, GeV.
    pub fn energy_min_gev(&self) -> f64 {
        self.energy_min_gev
    }

    /// Highest energy reconstructed, GeV.
    pub fn energy_max_gev(&self) -> f64 {
        self.energy_max_gev
    }

    /// Systematic pointing error, degrees.
    pub fn systematic_deg(&self) -> f64 {
        self.systematic_deg
    }

    /// Clock precision, nanoseconds.
    pub fn clock_precision_ns(&self) -> i64 {
        self.clock_precision_ns
    }

    /// The energies at which the response tables have nodes (area, PSF, resolution), sorted: the places
    /// where a numerical fold should break its steps.
    pub fn energy_nodes_gev(&self) -> Vec<f64> {
        let mut v: Vec<f64> = self
            .area_e
            .iter()
            .copied()
            .chain(self.psf68.ln_e.iter().map(|x| x.exp()))
            .chain(self.eres.ln_e.iter().map(|x| x.exp()))
            .collect();
        v.sort_by(f64::total_cmp);
        v.dedup();
        v
    }

    /// `integral of A_eff(E, zenith) coeff E^-index dE` over `[e_lo, e_hi]` clipped to the energy range,
    /// exactly: between table nodes the area is a power law (or linear in `ln E`), so each piece has a
    /// closed form. Returns 0 outside the field of view or for an empty or invalid range.
    pub fn fold_power_law(&self, zenith_deg: f64, e_lo: f64, e_hi: f64, coeff: f64, index: f64) -> f64 {
        let lo = e_lo.max(self.energy_min_gev);
        let hi = e_hi.min(self.energy_max_gev);
        if !self.in_fov(zenith_deg)
            || hi.is_nan()
            || lo.is_nan()
            || hi <= lo
            || !coeff.is_finite()
            || !index.is_finite()
        {
            return 0.0;
        }
        let (r0, r1, w) = self.rows_for(zenith_deg);
        let first = self.fold_row(r0, lo, hi, coeff, index);
        if w == 0.0 {
            first
        } else {
            (1.0 - w) * first + w * self.fold_row(r1, lo, hi, coeff, index)
        }
    }

    fn fold_row(&self, r: usize, lo: f64, hi: f64, coeff: f64, index: f64) -> f64 {
        let c = 1.0 - index;
        let mut total = 0.0;
        let mut x0 = lo;
        let mut a0 = self.row_at(r, x0);
        let nodes = self.area_e.iter().copied().filter(|&e| e > lo && e < hi);
        for x1 in nodes.chain(std::iter::once(hi)) {
            let a1 = self.row_at(r, x1);
            let l = (x1 / x0).ln();
            let pref = coeff * (c * x0.ln()).exp() * l;
            total += if a0 > 0.0 && a1 > 0.0 {
                let s = (a1 / a0).ln() / l;
                pref * a0 * exprel((s + c) * l)
            } else {
                pref * (a0 * exprel(c * l) + (a1 - a0) * first_moment_exp(c * l))
            };
            x0 = x1;
            a0 = a1;
        }
        total
    }

    /// `integral of A_eff(E, zenith) f(E) dE` over `[e_lo, e_hi]` clipped to the energy range, by Simpson's
    /// rule in `ln E` with steps of at most 0.02 that break at the table nodes and at `breaks` (put a
    /// spectrum's kinks there). For smooth `f` the relative error is below 1e-6.
    pub fn fold_numeric(
        &self,
        zenith_deg: f64,
        e_lo: f64,
        e_hi: f64,
        breaks: &[f64],
        f: impl Fn(f64) -> f64,
    ) -> f64 {
        let lo = e_lo.max(self.energy_min_gev);
        let hi = e_hi.min(self.energy_max_gev);
        if !self.in_fov(zenith_deg) || hi.is_nan() || lo.is_nan() || hi <= lo {
            return 0.0;
        }
        let mut cuts: Vec<f64> = self
            .energy_nodes_gev()
            .into_iter()
            .chain(breaks.iter().copied())
            .filter(|&e| e > lo && e < hi)
            .collect();
        cuts.push(lo);
        cuts.push(hi);
        cuts.sort_by(f64::total_cmp);
        cuts.dedup();
        let g = |e: f64| self.effective_area_m2(e, zenith_deg) * f(e) * e;
        let mut total = 0.0;
        for w in cuts.windows(2) {
            let (u0, u1) = (w[0].ln(), w[1].ln());
            let n = (((u1 - u0) / 0.02).ceil() as usize).max(1) * 2;
            let h = (u1 - u0) / n as f64;
            // The ends are evaluated at the exact energies: exp(ln e) may fall just outside the range.
            let mut s = g(w[0]) + g(w[1]);
            for i in 1..n {
                s += if i % 2 == 1 { 4.0 } else { 2.0 } * g((u0 + i as f64 * h).exp());
            }
            total += s * h / 3.0;
        }
        total
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap
mod tests {
    use super::*;
    use crate::instrument::spec::AreaTable;

    fn spec() -> ResponseSpec {
        ResponseSpec {
            max_zenith_deg: 45.0,
            energy_min_gev: 100.0,
            energy_max_gev: 1e5,
            effective_area: AreaTable {
                energy_gev: vec![100.0, 1000.0, 10_000.0],
                zenith_deg: vec![0.0, 40.0],
                area_m2: vec![vec![10.0, 1000.0, 1e4], vec![0.0, 500.0, 5e3]],
            },
            psf68_deg: CurveTable {
                energy_gev: vec![100.0, 10_000.0],
                value: vec![1.0, 0.1],
            },
            energy_resolution: CurveTable {
                energy_gev: vec![100.0, 10_000.0],
                value: vec![0.5, 0.3],
            },
            systematic_deg: 0.05,
            clock_precision_ns: 100,
        }
    }

    #[test]
    fn interpolates_log_log_and_linear_in_zenith() {
        let r = InstrumentResponse::from_spec(&spec()).unwrap();
        // [calc] from the formula: log-log midpoint of 10 and 1000 m^2 at sqrt(100 * 1000) GeV is 100 m^2.
        let e = (100.0_f64 * 1000.0).sqrt();
        assert!((r.effective_area_m2(e, 0.0) - 100.0).abs() < 1e-9);
        // Halfway in zenith between 1000 and 500 m^2.
        assert!((r.effective_area_m2(1000.0, 20.0) - 750.0).abs() < 1e-9);
        // Held beyond the last row, zero beyond the field and the energy range.
        assert!((r.effective_area_m2(1000.0, 44.0) - 500.0).abs() < 1e-9);
        assert_eq!(r.effective_area_m2(1000.0, 46.0), 0.0);
        assert_eq!(r.effective_area_m2(50.0, 10.0), 0.0);
        assert_eq!(r.effective_area_m2(2e5, 10.0), 0.0);
        assert_eq!(r.effective_area_m2(f64::NAN, 10.0), 0.0);
        assert_eq!(r.effective_area_m2(1000.0, f64::NAN), 0.0);
        // Held above the table's last energy up to energy_max.
        assert!((r.effective_area_m2(5e4, 0.0) - 1e4).abs() < 1e-9);
        // PSF log-log: 1 deg -> 0.1 deg over two decades, so 0.316 deg at 1 TeV.
        assert!((r.psf68_deg(1000.0) - 10f64.powf(-0.5)).abs() < 1e-12);
        assert!((r.psf_sigma_deg(1000.0) * 1.515_172_9 - r.psf68_deg(1000.0)).abs() < 1e-9);
        assert_eq!(r.psf68_deg(f64::NAN), 1.0);
        assert!((r.energy_sigma_ln(1e6) - 0.3).abs() < 1e-12);
        assert_eq!(r.clock_precision_ns(), 100);
        assert_eq!(r.systematic_deg(), 0.05);
    }

    #[test]
    fn exact_fold_matches_numeric_fold() {
        let r = InstrumentResponse::from_spec(&spec()).unwrap();
        for &(z, index) in &[(0.0, 1.5), (20.0, 3.0), (40.0, 1.5), (30.0, 2.0), (10.0, 1.0)] {
            let exact = r.fold_power_law(z, 50.0, 2e5, 3.0, index);
            let numeric = r.fold_numeric(z, 50.0, 2e5, &[], |e| 3.0 * e.powf(-index));
            assert!(
                ((exact - numeric) / exact).abs() < 1e-6,
                "z={z} index={index}: {exact} vs {numeric}"
            );
        }
        // [calc] from the formula: a constant area A over [a, b] with E^-2 gives A (1/a - 1/b).
        let flat = r.fold_power_law(44.0, 20_000.0, 40_000.0, 1.0, 2.0);
        assert!((flat - 5e3 * (1.0 / 20_000.0 - 1.0 / 40_000.0)).abs() < 1e-12);
        assert_eq!(r.fold_power_law(50.0, 100.0, 1000.0, 1.0, 2.0), 0.0);
        assert_eq!(r.fold_power_law(10.0, 1000.0, 100.0, 1.0, 2.0), 0.0);
    }

    #[test]
    fn bad_tables_are_typed_errors() {
        type Spoil = Box<dyn Fn(&mut ResponseSpec)>;
        let cases: Vec<(&str, Spoil)> = vec![
            (
                "response.effective_area.energy_gev",
                Box::new(|s| s.effective_area.energy_gev.clear()),
            ),
            (
                "response.effective_area.energy_gev",
                Box::new(|s| s.effective_area.energy_gev = vec![100.0, 50.0, 1e4]),
            ),
            (
                "response.effective_area.area_m2[0][1]",
                Box::new(|s| s.effective_area.area_m2[0][1] = -3.0),
            ),
            (
                "response.effective_area.area_m2[1][2]",
                Box::new(|s| s.effective_area.area_m2[1][2] = f64::NAN),
            ),
            (
                "response.effective_area.zenith_deg",
                Box::new(|s| s.effective_area.zenith_deg = vec![]),
            ),
            (
                "response.psf68_deg.value[0]",
                Box::new(|s| s.psf68_deg.value[0] = 0.0),
            ),
            ("response.energy_max_gev", Box::new(|s| s.energy_max_gev = 10.0)),
            (
                "response.max_zenith_deg",
                Box::new(|s| s.max_zenith_deg = f64::NAN),
            ),
        ];
        for (key, spoil) in cases {
            let mut s = spec();
            spoil(&mut s);
            match InstrumentResponse::from_spec(&s) {
                Err(ScienceError::InvalidSpec { problems }) => {
                    assert!(problems.iter().any(|p| p.key == key), "{key} not in {problems:?}");
                }
                other => panic!("{key}: expected InvalidSpec, got {other:?}"),
            }
        }
    }
}
