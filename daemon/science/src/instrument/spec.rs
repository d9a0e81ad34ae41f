//! The raw, serde-facing instrument block (`[instrument.site]`, `[instrument.response]`,
//! `[instrument.background]`) used by both the daemon's config and simulator scenarios, and its checks.
//! `check` reports every problem at once, each naming its key, so a config can be fixed in one pass.

use serde::{Deserialize, Serialize};

/// Where the instrument is and how it points.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case", deny_unknown_fields)]
pub enum SiteSpec {
    /// A ground array fixed to the Earth, looking up; the instrument frame is horizontal (zenith angle,
    /// azimuth from north through east).
    Ground {
        /// Geodetic latitude, degrees north.
        latitude_deg: f64,
        /// Longitude, degrees east.
        longitude_deg: f64,
        /// Altitude above sea level, metres (informational; the response tables already include it).
        #[serde(default)]
        altitude_m: f64,
    },
    /// A telescope in orbit; the instrument frame is off-axis angle and azimuth about the pointing.
    Space {
        /// Pointing at the GPS epoch of the stream start (the simulator's t0), ICRS degrees.
        pointing_ra_deg: f64,
        /// Pointing declination, ICRS degrees.
        pointing_dec_deg: f64,
        /// Drift of the pointing in right ascension, degrees per second (a zenith-pointing survey orbit
        /// sweeps 360 degrees per orbit, about 0.063 deg/s for a 95-minute orbit).
        #[serde(default)]
        ra_drift_deg_per_s: f64,
    },
}

/// A curve y(E) given at increasing energies, interpolated in log-log.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct CurveTable {
    /// Energies, GeV, strictly increasing, > 0.
    pub energy_gev: Vec<f64>,
    /// Values at those energies, > 0.
    pub value: Vec<f64>,
}

/// Effective area as a table over energy (columns) and zenith or off-axis angle (rows), m^2.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct AreaTable {
    /// Energies, GeV, strictly increasing, > 0.
    pub energy_gev: Vec<f64>,
    /// Zenith (or off-axis) angles, degrees, strictly increasing, in [0, 180].
    pub zenith_deg: Vec<f64>,
    /// One row per zenith angle, one value per energy, m^2, >= 0.
    pub area_m2: Vec<Vec<f64>>,
}

/// How the detector responds to photons.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ResponseSpec {
    /// Edge of the field of view: largest zenith (ground) or off-axis (space) angle accepted, degrees.
    pub max_zenith_deg: f64,
    /// Lowest reconstructed energy kept after cuts, GeV.
    pub energy_min_gev: f64,
    /// Highest energy the instrument reconstructs, GeV.
    pub energy_max_gev: f64,
    /// Effective area after cuts.
    pub effective_area: AreaTable,
    /// 68% containment radius of the point-spread function versus energy, degrees.
    pub psf68_deg: CurveTable,
    /// Energy resolution: Gaussian sigma of ln(E_reco / E_true) versus true energy (about the fractional
    /// resolution for small values).
    pub energy_resolution: CurveTable,
    /// Systematic pointing error added in quadrature to every error radius, degrees.
    #[serde(default)]
    pub systematic_deg: f64,
    /// Clock precision: photons closer in time than this are indistinguishable, nanoseconds.
    pub clock_precision_ns: i64,
}

/// The background the instrument records with no source: rate, acceptance shape and spectrum.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct BackgroundSpec {
    /// All-sky rate of events passing the gamma cuts, Hz.
    pub rate_hz: f64,
    /// Acceptance shape over the field of view: density per steradian proportional to
    /// cos(zenith)^zenith_cos_power inside `max_zenith_deg`, uniform in azimuth.
    pub zenith_cos_power: f64,
    /// Power-law index of the background energy spectrum above `energy_min_gev` (dN/dE ~ E^-index).
    pub spectral_index: f64,
}

/// A full instrument block.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct InstrumentSpec {
    /// Where it is and how it points.
    pub site: SiteSpec,
    /// How it responds.
    pub response: ResponseSpec,
    /// What it records with no source.
    pub background: BackgroundSpec,
}

/// One problem found by `check`, naming the key (relative to the block's prefix) and what is wrong.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct SpecProblem {
    /// Full dotted key, e.g. `instrument[0].response.psf68_deg.value[2]`.
    pub key: String,
    /// What is wrong with it.
    pub message: String,
}

impl std::fmt::Display for SpecProblem {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{}: {}", self.key, self.message)
    }
}

struct Checker<'a> {
    prefix: &'a str,
    out: &'a mut Vec<SpecProblem>,
}

impl Checker<'_> {
    fn problem(&mut self, key: &str, message: impl Into<String>) {
        self.out.push(SpecProblem {
            key: format!("{}.{}", self.prefix, key),
            message: message.into(),
        });
    }

    fn finite_in(&mut self, key: &str, v: f64, lo: f64, hi: f64) {
        if !v.is_finite() || v < lo || v > hi {
            self.problem(key, format!("{v} is outside [{lo}, {hi}]"));
        }
    }

    fn positive(&mut self, key: &str, v: f64) {
        if !v.is_finite() || v <= 0.0 {
            self.problem(key, format!("{v} must be a finite number > 0"));
        }
    }

    fn increasing_positive(&mut self, key: &str, xs: &[f64]) {
        if xs.is_empty() {
            self.problem(key, "table is empty");
            return;
        }
        for (i, &x) in xs.iter().enumerate() {
            if !x.is_finite() || x <= 0.0 {
                self.problem(&format!("{key}[{i}]"), format!("{x} must be a finite number > 0"));
            }
        }
        if let Some(i) = xs.windows(2).position(|w| w[1] <= w[0]) {
            self.problem(
                key,
                format!("must be strictly increasing (entry {} <= entry {i})", i + 1),
            );
        }
    }

    fn curve(&mut self, key: &str, c: &CurveTable) {
        self.increasing_positive(&format!("{key}.energy_gev"), &c.energy_gev);
        if c.value.len() != c.energy_gev.len() {
            self.problem(
                &format!("{key}.value"),
                format!(
                    "has {} entries, energy_gev has {}",
                    c.value.len(),
                    c.energy_gev.len()
                ),
            );
        }
        for (i, &v) in c.value.iter().enumerate() {
            if !v.is_finite() || v <= 0.0 {
                self.problem(
                    &format!("{key}.value[{i}]"),
                    format!("{v} must be a finite number > 0"),
                );
            }
        }
    }
}

impl ResponseSpec {
    /// Checks the response block alone, appending one problem per fault to `out`; `prefix` is the block's
    /// own key (e.g. `instrument[0].response`). Returns true when nothing was wrong.
    pub fn check(&self, prefix: &str, out: &mut Vec<SpecProblem>) -> bool {
        let before = out.len();
        let mut c = Checker { prefix, out };
        self.check_fields(&mut c);
        out.len() == before
    }

    /// The response checks with keys relative to `response.`, for `InstrumentSpec::check`.
    fn check_into(&self, outer: &mut Checker<'_>) {
        let prefix = format!("{}.response", outer.prefix);
        let mut c = Checker {
            prefix: &prefix,
            out: &mut *outer.out,
        };
        self.check_fields(&mut c);
    }

    fn check_fields(&self, c: &mut Checker<'_>) {
        let r = self;
        c.finite_in("max_zenith_deg", r.max_zenith_deg, 1.0, 180.0);
        c.positive("energy_min_gev", r.energy_min_gev);
        c.positive("energy_max_gev", r.energy_max_gev);
        if r.energy_max_gev.is_finite()
            && r.energy_min_gev.is_finite()
            && r.energy_max_gev <= r.energy_min_gev
        {
            c.problem("energy_max_gev", "must be greater than energy_min_gev");
        }
        let a = &r.effective_area;
        c.increasing_positive("effective_area.energy_gev", &a.energy_gev);
        if a.zenith_deg.is_empty() {
            c.problem("effective_area.zenith_deg", "table is empty");
        }
        for (i, &z) in a.zenith_deg.iter().enumerate() {
            c.finite_in(&format!("effective_area.zenith_deg[{i}]"), z, 0.0, 180.0);
        }
        if let Some(i) = a.zenith_deg.windows(2).position(|w| w[1] <= w[0]) {
            c.problem(
                "effective_area.zenith_deg",
                format!("must be strictly increasing (entry {} <= entry {i})", i + 1),
            );
        }
        if a.area_m2.len() != a.zenith_deg.len() {
            c.problem(
                "effective_area.area_m2",
                format!(
                    "has {} rows, zenith_deg has {} entries",
                    a.area_m2.len(),
                    a.zenith_deg.len()
                ),
            );
        }
        for (i, row) in a.area_m2.iter().enumerate() {
            if row.len() != a.energy_gev.len() {
                c.problem(
                    &format!("effective_area.area_m2[{i}]"),
                    format!("has {} entries, energy_gev has {}", row.len(), a.energy_gev.len()),
                );
            }
            for (j, &v) in row.iter().enumerate() {
                if !v.is_finite() || v < 0.0 {
                    c.problem(
                        &format!("effective_area.area_m2[{i}][{j}]"),
                        format!("{v} must be a finite number >= 0"),
                    );
                }
            }
        }
        if a.area_m2.iter().flatten().all(|&v| v <= 0.0) && !a.area_m2.is_empty() {
            c.problem("effective_area.area_m2", "is zero everywhere");
        }
        c.curve("psf68_deg", &r.psf68_deg);
        c.curve("energy_resolution", &r.energy_resolution);
        c.finite_in("systematic_deg", r.systematic_deg, 0.0, 10.0);
        if r.clock_precision_ns < 0 || r.clock_precision_ns > 1_000_000_000 {
            c.problem(
                "clock_precision_ns",
                format!("{} is outside [0, 1e9]", r.clock_precision_ns),
            );
        }
    }
}

impl InstrumentSpec {
    /// Checks every value and table of the block, appending one problem per fault to `out`; `prefix` is the
    /// block's own key (e.g. `instrument[0]`). Returns true when nothing was wrong.
    pub fn check(&self, prefix: &str, out: &mut Vec<SpecProblem>) -> bool {
        let before = out.len();
        let mut c = Checker { prefix, out };
        match &self.site {
            SiteSpec::Ground {
                latitude_deg,
                longitude_deg,
                altitude_m,
            } => {
                c.finite_in("site.latitude_deg", *latitude_deg, -90.0, 90.0);
                c.finite_in("site.longitude_deg", *longitude_deg, -180.0, 360.0);
                c.finite_in("site.altitude_m", *altitude_m, -500.0, 10_000.0);
            }
            SiteSpec::Space {
                pointing_ra_deg,
                pointing_dec_deg,
                ra_drift_deg_per_s,
            } => {
                c.finite_in("site.pointing_ra_deg", *pointing_ra_deg, 0.0, 360.0);
                c.finite_in("site.pointing_dec_deg", *pointing_dec_deg, -90.0, 90.0);
                c.finite_in("site.ra_drift_deg_per_s", *ra_drift_deg_per_s, -1.0, 1.0);
            }
        }
        self.response.check_into(&mut c);
        let b = &self.background;
        c.positive("background.rate_hz", b.rate_hz);
        c.finite_in("background.zenith_cos_power", b.zenith_cos_power, 0.0, 20.0);
        c.finite_in("background.spectral_index", b.spectral_index, 1.01, 6.0);
        out.len() == before
    }
}
