//! Hawking evaporation and the final-burst photon spectrum (docs/science.md sections 1 and 2): temperature,
//! lifetime and remaining mass of a black hole against its time-to-go, the photons it emits in its last
//! seconds, and those an instrument detects at a given distance. The simulator draws bursts from the
//! joint density here; the reach and the engine's distance fit fold the same spectrum through a response.
//!
//! Burst spectrum (Petkov et al. 2008, Astron. Lett. 34, 509; constants from memory): the photons of the
//! last `tau` seconds, direct plus fragmentation, have `dN/dE = 9e35 (1 GeV/T)^1.5 (1 GeV/E)^1.5` per GeV
//! for `E < T` and `9e35 (1 GeV/E)^3` above, with `T = T1 tau^(-1/3)`, `T1 = 7800 GeV`. Differentiating in
//! `tau` at fixed `E`: below `T(tau)` the spectrum grows as `tau^(1/2)`, above it does not change, so the
//! photons emitted at time-to-go `tau` all lie below `T(tau)` and
//! `d2N/(dtau dE) = 4.5e35 T1^-1.5 tau^-1/2 E^-1.5` for `E < T1 tau^(-1/3)`, zero above: an `E^-1.5`
//! spectrum whose rate rises as `tau^-1/2` toward the end and stops dead at `tau = 0`. Integrating it
//! back over `[0, tau]` gives the time-integrated spectrum above, both branches.

use crate::error::{ScienceError, arg};
use crate::instrument::InstrumentResponse;

/// Reduced Planck constant, J s (CODATA 2018).
pub const HBAR_J_S: f64 = 1.054_571_817e-34;
/// Speed of light, m/s.
pub const C_M_S: f64 = 299_792_458.0;
/// Newton's constant, m^3 kg^-1 s^-2 (CODATA 2018).
pub const G_SI: f64 = 6.674_30e-11;
/// Boltzmann's constant, J/K.
pub const K_B_J_K: f64 = 1.380_649e-23;
/// One GeV in joules.
pub const GEV_J: f64 = 1.602_176_634e-10;
/// Stefan-Boltzmann constant, W m^-2 K^-4 (CODATA 2018).
pub const SIGMA_SB: f64 = 5.670_374_419e-8;
/// One parsec in metres (IAU 2015).
pub const PARSEC_M: f64 = 3.085_677_581_491_367e16;
/// The Julian year in seconds, the year of every "per year" in glint.
pub const YEAR_S: f64 = 365.25 * 86_400.0;
/// One solar mass in grams (IAU 2015 nominal G M_sun over CODATA G).
pub const SOLAR_MASS_G: f64 = 1.988_41e33;

/// `kT = hbar c^3 / (8 pi G M)` for M = 1 g, in joules.
const KT_ONE_GRAM_J: f64 = HBAR_J_S * C_M_S * C_M_S * C_M_S / (8.0 * std::f64::consts::PI * G_SI * 1e-3);

/// Mass-loss constant `alpha` of `dM/dt = -alpha f(M) M^-2`, g^3/s (MacGibbon 1991, Phys. Rev. D 44, 376;
/// from memory).
pub const MASS_LOSS_G3_PER_S: f64 = 5.34e25;

/// `f(M)` with every Standard Model species emitted, the value used in burst-search papers (from memory).
pub const F_ALL_SPECIES: f64 = 15.35;
/// `f(M)` when only photons, three neutrinos and gravitons are emitted (MacGibbon 1991; from memory).
pub const F_LIGHT_SPECIES: f64 = 1.023;

/// `T1` of the burst spectrum: the temperature one second before the end, GeV (Petkov et al. 2008).
/// Slightly below the 7832 GeV of [`temperature_at_time_to_go_gev`]; the spectrum keeps the paper's value.
pub const SPECTRUM_T1_GEV: f64 = 7800.0;
/// Normalisation of the burst spectrum, photons per GeV (Petkov et al. 2008).
pub const SPECTRUM_NORM: f64 = 9e35;

/// Temperature `kT = hbar c^3 / (8 pi G M)` in GeV: 1.0573e13 GeV for 1 g.
pub fn temperature_gev(mass_g: f64) -> Result<f64, ScienceError> {
    let m = arg::positive("mass_g", mass_g)?;
    Ok(KT_ONE_GRAM_J / GEV_J / m)
}

/// Temperature in kelvin: 1.2269e26 K for 1 g.
pub fn temperature_k(mass_g: f64) -> Result<f64, ScienceError> {
    let m = arg::positive("mass_g", mass_g)?;
    Ok(KT_ONE_GRAM_J / K_B_J_K / m)
}

/// Lifetime with a constant `f`, `M^3 / (3 alpha f)` seconds: `6.24e-27 M^3 / f` with M in grams.
pub fn lifetime_s(mass_g: f64, f: f64) -> Result<f64, ScienceError> {
    let m = arg::positive("mass_g", mass_g)?;
    let f = arg::positive("f", f)?;
    Ok(m * m * m / (3.0 * MASS_LOSS_G3_PER_S * f))
}

/// One massive species of the `f(M)` fit: mass (GeV), weight (degrees of freedom times the per-degree
/// emission weight of its spin), and the spin's `beta`.
struct Species {
    mass_gev: f64,
    weight: f64,
    beta: f64,
}

// Per-degree-of-freedom weights and betas by spin (MacGibbon 1991; from memory).
const W0: f64 = 0.267;
const WHALF: f64 = 0.147;
const W1: f64 = 0.060;
const B0: f64 = 2.66;
const BHALF: f64 = 4.53;
const B1: f64 = 6.04;

/// Quarks and gluons are emitted as jets once the temperature passes an effective QCD mass; these values
/// are glint's choice for the fit, not a source's.
const SPECIES: [Species; 13] = [
    Species {
        mass_gev: 0.000_511,
        weight: 4.0 * WHALF,
        beta: BHALF,
    }, // e
    Species {
        mass_gev: 0.105_66,
        weight: 4.0 * WHALF,
        beta: BHALF,
    }, // mu
    Species {
        mass_gev: 1.776_9,
        weight: 4.0 * WHALF,
        beta: BHALF,
    }, // tau
    Species {
        mass_gev: 0.134_98,
        weight: W0,
        beta: B0,
    }, // pi0
    Species {
        mass_gev: 0.139_57,
        weight: 2.0 * W0,
        beta: B0,
    }, // pi+-
    Species {
        mass_gev: 0.5,
        weight: 36.0 * WHALF,
        beta: BHALF,
    }, // u, d, s (effective)
    Species {
        mass_gev: 0.6,
        weight: 16.0 * W1,
        beta: B1,
    }, // gluons (effective)
    Species {
        mass_gev: 1.27,
        weight: 12.0 * WHALF,
        beta: BHALF,
    }, // c
    Species {
        mass_gev: 4.18,
        weight: 12.0 * WHALF,
        beta: BHALF,
    }, // b
    Species {
        mass_gev: 172.7,
        weight: 12.0 * WHALF,
        beta: BHALF,
    }, // t
    Species {
        mass_gev: 80.4,
        weight: 6.0 * W1,
        beta: B1,
    }, // W+-
    Species {
        mass_gev: 91.19,
        weight: 3.0 * W1,
        beta: B1,
    }, // Z
    Species {
        mass_gev: 125.2,
        weight: W0,
        beta: B0,
    }, // H
];

/// The number of emitted species `f(M)`, a smooth fit for masses from the last seconds to the present
/// epoch and beyond.
///
/// Form (after MacGibbon 1991): `f = 1.023 + s * sum_i w_i exp(-M / (beta_i M_i))`, where `M_i` is the
/// mass whose temperature equals species i's mass (so the exponent is `m_i / (beta_i T)`), `w_i` its
/// weight (degrees of freedom times 0.267, 0.147 or 0.060 for spin 0, 1/2, 1) and `s` scales the sum so
/// that `f -> 15.35` as `M -> 0`; `f -> 1.023` for large M. It gives about 1.9 at 5e14 g (the mass
/// expiring today), and within 0.1% of 15.35 in the last second (1.35e9 g) and 0.6% at 1e10 g (eight
/// minutes before the end): the burst functions below use 15.35 itself, as the burst-search papers do. `M = 0` gives
/// 15.35; a negative or NaN mass is outside the fit and gives 1.023 (the checked functions reject it).
pub fn f_of_mass(mass_g: f64) -> f64 {
    if mass_g.is_nan() || mass_g <= 0.0 {
        return if mass_g == 0.0 {
            F_ALL_SPECIES
        } else {
            F_LIGHT_SPECIES
        };
    }
    let total: f64 = SPECIES.iter().map(|s| s.weight).sum();
    let scale = (F_ALL_SPECIES - F_LIGHT_SPECIES) / total;
    let t_gev = KT_ONE_GRAM_J / GEV_J / mass_g;
    let on: f64 = SPECIES
        .iter()
        .map(|s| s.weight * (-s.mass_gev / (s.beta * t_gev)).exp())
        .sum();
    F_LIGHT_SPECIES + scale * on
}

/// Lifetime with `f(M)` from [`f_of_mass`]: `integral_0^M m^2 dm / (alpha f(m))` seconds.
pub fn lifetime_varying_f_s(mass_g: f64) -> Result<f64, ScienceError> {
    let m0 = arg::positive("mass_g", mass_g)?;
    // In ln m the integrand m^3 / f(m) falls by 1e-18 six decades down, so start there; Simpson in ln m.
    let (u0, u1) = ((m0 * 1e-6).ln(), m0.ln());
    let n = 4000;
    let h = (u1 - u0) / f64::from(n);
    let g = |u: f64| {
        let m = u.exp();
        m * m * m / f_of_mass(m)
    };
    let mut s = g(u0) + g(u1);
    for i in 1..n {
        s += if i % 2 == 1 { 4.0 } else { 2.0 } * g(u0 + f64::from(i) * h);
    }
    let head = (m0 * 1e-6).powi(3) / (3.0 * F_ALL_SPECIES);
    Ok((s * h / 3.0 + head) / MASS_LOSS_G3_PER_S)
}

/// The initial mass of a black hole that expires after `age_s` seconds with `f(M)` from [`f_of_mass`]
/// (about 5e14 g for the age of the universe), by bisection in `ln M`.
pub fn initial_mass_expiring_after_g(age_s: f64) -> Result<f64, ScienceError> {
    let t = arg::positive("age_s", age_s)?;
    // Constant-f bounds bracket the answer: f stays within [1.023, 15.35].
    let mut lo = (3.0 * MASS_LOSS_G3_PER_S * F_LIGHT_SPECIES * t).cbrt().ln();
    let mut hi = (3.0 * MASS_LOSS_G3_PER_S * F_ALL_SPECIES * t).cbrt().ln();
    for _ in 0..100 {
        let mid = 0.5 * (lo + hi);
        if lifetime_varying_f_s(mid.exp())? < t {
            lo = mid;
        } else {
            hi = mid;
        }
        if hi - lo < 1e-12 {
            break;
        }
    }
    Ok((0.5 * (lo + hi)).exp())
}

/// Lifetime of a pure photon blackbody of the Hawking temperature radiating from the horizon area
/// `4 pi r_s^2` (no greybody factors, no other species): `M c^2 / (3 P)`, seconds. About 2.1e67 yr for a
/// solar mass; a reference point for the order of magnitude, not a physical lifetime.
pub fn photon_blackbody_lifetime_s(mass_g: f64) -> Result<f64, ScienceError> {
    let m_kg = arg::positive("mass_g", mass_g)? * 1e-3;
    let t_k = temperature_k(mass_g)?;
    let r_s = schwarzschild_radius_m(mass_g)?;
    let power_w = SIGMA_SB * t_k.powi(4) * 4.0 * std::f64::consts::PI * r_s * r_s;
    Ok(m_kg * C_M_S * C_M_S / (3.0 * power_w))
}

/// Schwarzschild radius `2 G M / c^2`, metres.
pub fn schwarzschild_radius_m(mass_g: f64) -> Result<f64, ScienceError> {
    let m_kg = arg::positive("mass_g", mass_g)? * 1e-3;
    Ok(2.0 * G_SI * m_kg / (C_M_S * C_M_S))
}

fn check_tau(tau_s: f64) -> Result<f64, ScienceError> {
    arg::positive("tau_s", tau_s)
}

/// Mass left `tau_s` seconds before the end, with `f = 15.35`: `1.350e9 g (tau/1 s)^(1/3)`.
pub fn mass_at_time_to_go_g(tau_s: f64) -> Result<f64, ScienceError> {
    let tau = check_tau(tau_s)?;
    Ok((3.0 * MASS_LOSS_G3_PER_S * F_ALL_SPECIES * tau).cbrt())
}

/// Temperature `tau_s` seconds before the end: `7.83 TeV (tau/1 s)^(-1/3)`, in GeV.
pub fn temperature_at_time_to_go_gev(tau_s: f64) -> Result<f64, ScienceError> {
    temperature_gev(mass_at_time_to_go_g(tau_s)?)
}

/// Energy released in the last `tau_s` seconds, the rest energy of the remaining mass:
/// `1.21e23 J (tau/1 s)^(1/3)`.
pub fn energy_released_j(tau_s: f64) -> Result<f64, ScienceError> {
    Ok(mass_at_time_to_go_g(tau_s)? * 1e-3 * C_M_S * C_M_S)
}

/// The burst-spectrum temperature `T1 tau^(-1/3)`, GeV (Petkov et al. 2008's `T1 = 7800 GeV`).
pub fn spectrum_temperature_gev(tau_s: f64) -> Result<f64, ScienceError> {
    Ok(SPECTRUM_T1_GEV / check_tau(tau_s)?.cbrt())
}

/// Time-integrated photon spectrum of the last `tau_s` seconds, photons per GeV at `e_gev`.
pub fn burst_dnde(e_gev: f64, tau_s: f64) -> Result<f64, ScienceError> {
    let e = arg::positive("e_gev", e_gev)?;
    let t = spectrum_temperature_gev(tau_s)?;
    Ok(if e < t {
        SPECTRUM_NORM * (t * e).powf(-1.5)
    } else {
        SPECTRUM_NORM * e.powi(-3)
    })
}

/// Photons emitted above `e_th_gev` in the last `tau_s` seconds:
/// `9e35 [2 T^-1.5 E_th^-0.5 - 1.5 T^-2]` while `T >= E_th`, and `4.5e35 / E_th^2` once `T < E_th`.
pub fn counts_above(e_th_gev: f64, tau_s: f64) -> Result<f64, ScienceError> {
    let e = arg::positive("e_th_gev", e_th_gev)?;
    let t = spectrum_temperature_gev(tau_s)?;
    Ok(if t >= e {
        SPECTRUM_NORM * (2.0 * t.powf(-1.5) / e.sqrt() - 1.5 / (t * t))
    } else {
        0.5 * SPECTRUM_NORM / (e * e)
    })
}

/// Energy carried by the photons of the last `tau_s` seconds, joules: `2.7e36 GeV^2 / T` (46% of the
/// remaining rest energy at every tau).
pub fn photon_energy_j(tau_s: f64) -> Result<f64, ScienceError> {
    let t = spectrum_temperature_gev(tau_s)?;
    // integral E dN/dE: 2 * 9e35 / T below T, 9e35 / T above.
    Ok(3.0 * SPECTRUM_NORM / t * GEV_J)
}

/// `d2N / (dtau dE)` at time-to-go `tau_s` and energy `e_gev`, photons per second per GeV:
/// `4.5e35 T1^-1.5 tau^-1/2 E^-1.5` below `T1 tau^(-1/3)`, zero above. Zero for `tau <= 0`, `E <= 0` or
/// NaN arguments.
pub fn joint_density(tau_s: f64, e_gev: f64) -> f64 {
    let ok = |x: f64| x.is_finite() && x > 0.0;
    if !ok(tau_s) || !ok(e_gev) {
        return 0.0;
    }
    if e_gev >= SPECTRUM_T1_GEV / tau_s.cbrt() {
        return 0.0;
    }
    0.5 * SPECTRUM_NORM * SPECTRUM_T1_GEV.powf(-1.5) / tau_s.sqrt() * e_gev.powf(-1.5)
}

/// One power-law piece `coeff E^-index` of a spectrum on `[e_lo_gev, e_hi_gev)` (photons per GeV).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PowerLawPiece {
    /// Lower edge, GeV.
    pub e_lo_gev: f64,
    /// Upper edge, GeV (may be infinite).
    pub e_hi_gev: f64,
    /// Coefficient, photons per GeV at 1 GeV (may be negative: pieces add up).
    pub coeff: f64,
    /// Spectral index.
    pub index: f64,
}

/// The spectrum of the photons emitted while the time-to-go runs from `tau_hi_s` down to `tau_lo_s`
/// (`0 <= tau_lo < tau_hi`), as power-law pieces that add up:
/// `9e35 T1^-1.5 (sqrt(tau_hi) - sqrt(tau_lo)) E^-1.5` below `T(tau_hi)`, and
/// `9e35 E^-3 - 9e35 T(tau_lo)^-1.5 E^-1.5` between `T(tau_hi)` and `T(tau_lo)`.
pub fn slice_spectrum(tau_lo_s: f64, tau_hi_s: f64) -> Result<Vec<PowerLawPiece>, ScienceError> {
    let (lo, hi) = check_slice(tau_lo_s, tau_hi_s)?;
    let t_hi = SPECTRUM_T1_GEV / hi.cbrt();
    let t1_pow = SPECTRUM_T1_GEV.powf(-1.5);
    let mut pieces = vec![PowerLawPiece {
        e_lo_gev: 0.0,
        e_hi_gev: t_hi,
        coeff: SPECTRUM_NORM * t1_pow * (hi.sqrt() - lo.sqrt()),
        index: 1.5,
    }];
    let t_lo = if lo > 0.0 {
        SPECTRUM_T1_GEV / lo.cbrt()
    } else {
        f64::INFINITY
    };
    pieces.push(PowerLawPiece {
        e_lo_gev: t_hi,
        e_hi_gev: t_lo,
        coeff: SPECTRUM_NORM,
        index: 3.0,
    });
    if lo > 0.0 {
        pieces.push(PowerLawPiece {
            e_lo_gev: t_hi,
            e_hi_gev: t_lo,
            coeff: -SPECTRUM_NORM * t1_pow * lo.sqrt(),
            index: 1.5,
        });
    }
    Ok(pieces)
}

fn check_slice(tau_lo_s: f64, tau_hi_s: f64) -> Result<(f64, f64), ScienceError> {
    let lo = arg::non_negative("tau_lo_s", tau_lo_s)?;
    let hi = arg::positive("tau_hi_s", tau_hi_s)?;
    if hi <= lo {
        return Err(ScienceError::InvalidArgument {
            name: "tau_hi_s",
            value: hi,
            expected: "a time-to-go greater than tau_lo_s",
        });
    }
    Ok((lo, hi))
}

/// Photons per GeV at `e_gev` emitted while the time-to-go runs from `tau_hi_s` down to `tau_lo_s`.
pub fn slice_dnde(e_gev: f64, tau_lo_s: f64, tau_hi_s: f64) -> Result<f64, ScienceError> {
    let e = arg::positive("e_gev", e_gev)?;
    Ok(slice_spectrum(tau_lo_s, tau_hi_s)?
        .iter()
        .filter(|p| e >= p.e_lo_gev && e < p.e_hi_gev)
        .map(|p| p.coeff * e.powf(-p.index))
        .sum::<f64>()
        .max(0.0))
}

/// `1 / (4 pi d^2)` for `distance_pc`, per square metre.
fn dilution_per_m2(distance_pc: f64) -> Result<f64, ScienceError> {
    let d_m = arg::positive("distance_pc", distance_pc)? * PARSEC_M;
    Ok(1.0 / (4.0 * std::f64::consts::PI * d_m * d_m))
}

/// Expected detected photons from the last `tau_s` seconds of a burst at `distance_pc`, seen at
/// `zenith_deg`: `(4 pi d^2)^-1 integral A_eff(E) dN/dE dE` over the instrument's energy range.
pub fn detected_counts(
    resp: &InstrumentResponse,
    zenith_deg: f64,
    distance_pc: f64,
    tau_s: f64,
) -> Result<f64, ScienceError> {
    detected_counts_between(resp, zenith_deg, distance_pc, 0.0, tau_s)
}

/// Expected detected photons emitted while the time-to-go runs from `tau_hi_s` down to `tau_lo_s`.
/// Exact: the area is a power law between table nodes and the spectrum a sum of power laws.
pub fn detected_counts_between(
    resp: &InstrumentResponse,
    zenith_deg: f64,
    distance_pc: f64,
    tau_lo_s: f64,
    tau_hi_s: f64,
) -> Result<f64, ScienceError> {
    let zenith = arg::finite("zenith_deg", zenith_deg)?;
    let dilution = dilution_per_m2(distance_pc)?;
    let folded: f64 = slice_spectrum(tau_lo_s, tau_hi_s)?
        .iter()
        .map(|p| resp.fold_power_law(zenith, p.e_lo_gev, p.e_hi_gev, p.coeff, p.index))
        .sum();
    Ok((folded * dilution).max(0.0))
}

/// Like [`detected_counts_between`] with a per-energy weight in [0, 1] (a PSF containment, an energy
/// cut), folded numerically.
pub fn detected_counts_weighted(
    resp: &InstrumentResponse,
    zenith_deg: f64,
    distance_pc: f64,
    tau_lo_s: f64,
    tau_hi_s: f64,
    weight: impl Fn(f64) -> f64,
) -> Result<f64, ScienceError> {
    let zenith = arg::finite("zenith_deg", zenith_deg)?;
    let dilution = dilution_per_m2(distance_pc)?;
    let pieces = slice_spectrum(tau_lo_s, tau_hi_s)?;
    let breaks: Vec<f64> = pieces
        .iter()
        .flat_map(|p| [p.e_lo_gev, p.e_hi_gev])
        .filter(|e| e.is_finite())
        .collect();
    let spectrum = |e: f64| -> f64 {
        let s: f64 = pieces
            .iter()
            .filter(|p| e >= p.e_lo_gev && e < p.e_hi_gev)
            .map(|p| p.coeff * e.powf(-p.index))
            .sum();
        s.max(0.0) * weight(e)
    };
    let folded = resp.fold_numeric(zenith, 0.0, f64::INFINITY, &breaks, spectrum);
    Ok((folded * dilution).max(0.0))
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap
mod tests {
    use super::*;
    use crate::instrument::spec::{AreaTable, CurveTable, ResponseSpec};

    fn rel(a: f64, b: f64) -> f64 {
        ((a - b) / b).abs()
    }

    #[test]
    fn temperature_check_values() {
        // docs/science.md section 1 [calc, CODATA 2018]: 1.0573e13 GeV and 1.2269e26 K for 1 g.
        assert!(rel(temperature_gev(1.0).unwrap(), 1.0573e13) < 1e-4);
        assert!(rel(temperature_k(1.0).unwrap(), 1.2269e26) < 1e-4);
        // One solar mass: 6.170e-8 K [calc]; 6.17e-8 K is the textbook value.
        assert!(rel(temperature_k(SOLAR_MASS_G).unwrap(), 6.170e-8) < 1e-3);
    }

    #[test]
    fn lifetime_check_values() {
        // docs/science.md section 1 (MacGibbon 1991, from memory): tau = 6.24e-27 M^3 / f s.
        assert!(rel(lifetime_s(1.0, 1.0).unwrap(), 6.24e-27) < 1e-3);
        // [calc]: with f = 15.35, tau = 407 s (406.7 s) for 1e10 g.
        assert!((lifetime_s(1e10, F_ALL_SPECIES).unwrap() - 406.7).abs() < 0.1);
    }

    #[test]
    fn species_fit_limits() {
        // The fit's own limits: 15.35 for the last seconds, 1.023 (light species, from memory) for heavy holes.
        assert!(rel(f_of_mass(1.35e9), F_ALL_SPECIES) < 1e-3);
        assert!(rel(f_of_mass(1e10), F_ALL_SPECIES) < 6e-3);
        assert!(rel(f_of_mass(1e22), F_LIGHT_SPECIES) < 1e-3);
        // f never rises with mass.
        let mut prev = f64::INFINITY;
        for i in 0..200 {
            let f = f_of_mass(10f64.powf(5.0 + 0.1 * f64::from(i)));
            assert!(f <= prev + 1e-12);
            prev = f;
        }
        assert_eq!(f_of_mass(f64::NAN), F_LIGHT_SPECIES);
    }

    #[test]
    fn mass_expiring_today() {
        // Page 1976 [src]: (5 +- 1)e14 g; MacGibbon, Carr & Page 2008 [from memory]: 5.0e14 to 5.1e14 g for a
        // 13.7 to 13.8 Gyr universe. Check with a 10% tolerance.
        let m = initial_mass_expiring_after_g(13.8e9 * YEAR_S).unwrap();
        assert!(rel(m, 5.0e14) < 0.10, "M* = {m:e} g");
        // Consistency: that mass's lifetime is the age again.
        assert!(rel(lifetime_varying_f_s(m).unwrap(), 13.8e9 * YEAR_S) < 1e-9);
        // Common practice, no source: smaller than an atom (1e-10 m).
        assert!(schwarzschild_radius_m(m).unwrap() < 1e-10);
    }

    #[test]
    fn solar_mass_lifetime_order_of_magnitude() {
        // docs/science.md section 1: pure photon blackbody 2.10e67 yr [calc]; about 1e67 yr counting photons only,
        // sources differ by up to 10x (Page 1976 ~2e66 yr with neutrinos): order of magnitude only.
        let bb = photon_blackbody_lifetime_s(SOLAR_MASS_G).unwrap() / YEAR_S;
        assert!(rel(bb, 2.10e67) < 0.01, "{bb:e}");
        let light = lifetime_s(SOLAR_MASS_G, F_LIGHT_SPECIES).unwrap() / YEAR_S;
        assert!((1e66..1e68).contains(&light), "{light:e}");
    }

    #[test]
    fn last_seconds_check_values() {
        // docs/science.md section 1 [calc], f = 15.35.
        assert!(rel(mass_at_time_to_go_g(1.0).unwrap(), 1.350e9) < 1e-3);
        assert!(rel(temperature_at_time_to_go_gev(1.0).unwrap(), 7830.0) < 1e-3);
        assert!(rel(energy_released_j(1.0).unwrap(), 1.21e23) < 3e-3);
        for (tau, tev) in [
            (1e-3, 78.0),
            (0.1, 16.9),
            (1.0, 7.83),
            (10.0, 3.64),
            (100.0, 1.69),
        ] {
            let t = temperature_at_time_to_go_gev(tau).unwrap() / 1000.0;
            assert!(rel(t, tev) < 5e-3, "tau={tau}: {t} TeV");
        }
        assert!(rel(temperature_at_time_to_go_gev(480.0).unwrap(), 1000.0) < 1e-3);
        // Kapusta 2000 [src]: about 8 minutes before the end M is about 1e10 g and T about 1 TeV.
        assert!(rel(mass_at_time_to_go_g(480.0).unwrap(), 1e10) < 0.1);
    }

    #[test]
    fn burst_spectrum_check_values() {
        // docs/science.md section 2 [calc]: photons of the last 1 s above 100 GeV, 1 TeV, 10 TeV.
        assert!(rel(counts_above(100.0, 1.0).unwrap(), 2.39e29) < 2e-3);
        assert!(rel(counts_above(1000.0, 1.0).unwrap(), 6.04e28) < 2e-3);
        assert!(rel(counts_above(10_000.0, 1.0).unwrap(), 4.5e27) < 2e-3);
        // Photons carry 46% of M_tau c^2 at every tau [calc].
        for tau in [1e-3, 1.0, 30.0] {
            let frac = photon_energy_j(tau).unwrap() / energy_released_j(tau).unwrap();
            assert!((frac - 0.46).abs() < 0.005, "tau={tau}: {frac}");
        }
        // Counts in the last 10 s over the last 1 s: 3.0 above 100 GeV, 2.6 above 1 TeV [calc].
        let r100 = counts_above(100.0, 10.0).unwrap() / counts_above(100.0, 1.0).unwrap();
        let r1000 = counts_above(1000.0, 10.0).unwrap() / counts_above(1000.0, 1.0).unwrap();
        assert!(
            (r100 - 3.0).abs() < 0.05 && (r1000 - 2.6).abs() < 0.05,
            "{r100} {r1000}"
        );
        // Continuous at E = T.
        let t = spectrum_temperature_gev(2.0).unwrap();
        let below = burst_dnde(t * (1.0 - 1e-12), 2.0).unwrap();
        assert!(rel(burst_dnde(t, 2.0).unwrap(), below) < 1e-9);
    }

    #[test]
    fn joint_density_integrates_to_the_spectrum() {
        // [calc] from the formula: integral over tau' in [0, tau] and E > E_th of d2N/(dtau dE) equals
        // N(>E_th) of the last tau; tau' = x^2 removes the tau^-1/2 singularity, and the E integral is exact.
        let (e_th, tau) = (1000.0_f64, 3.0_f64);
        let n = 20_000;
        let xmax = tau.sqrt();
        let h = xmax / f64::from(n);
        let mut sum = 0.0;
        for i in 0..n {
            let x = (f64::from(i) + 0.5) * h;
            let t = SPECTRUM_T1_GEV / (x * x).cbrt();
            if t > e_th {
                // integral_{e_th}^{T} joint dE = joint(tau, 1 GeV) * 2 (e_th^-1/2 - T^-1/2), dtau = 2x dx.
                sum += joint_density(x * x, 1.0) * 2.0 * (e_th.powf(-0.5) - t.powf(-0.5)) * 2.0 * x * h;
            }
        }
        assert!(rel(sum, counts_above(e_th, tau).unwrap()) < 1e-6, "{sum:e}");
        assert_eq!(joint_density(1.0, 9000.0), 0.0);
        assert_eq!(joint_density(0.0, 100.0), 0.0);
        assert_eq!(joint_density(f64::NAN, 100.0), 0.0);
        // The slice spectrum is the difference of two time-integrated spectra.
        for e in [50.0, 3000.0, 9000.0, 20_000.0, 1e5] {
            let want = burst_dnde(e, 2.0).unwrap() - burst_dnde(e, 0.1).unwrap();
            assert!((slice_dnde(e, 0.1, 2.0).unwrap() - want).abs() <= 1e-9 * want.abs().max(1e-300));
        }
    }

    fn flat_above_1tev() -> InstrumentResponse {
        InstrumentResponse::from_spec(&ResponseSpec {
            max_zenith_deg: 45.0,
            energy_min_gev: 1000.0,
            energy_max_gev: 1e9,
            effective_area: AreaTable {
                energy_gev: vec![1000.0, 1e9],
                zenith_deg: vec![0.0],
                area_m2: vec![vec![1e5, 1e5]],
            },
            psf68_deg: CurveTable {
                energy_gev: vec![1000.0],
                value: vec![0.3],
            },
            energy_resolution: CurveTable {
                energy_gev: vec![1000.0],
                value: vec![0.3],
            },
            systematic_deg: 0.0,
            clock_precision_ns: 0,
        })
        .unwrap()
    }

    #[test]
    fn detected_counts_check_value() {
        // docs/science.md section 2 [calc]: 0.1 pc, a flat 1e5 m^2 above 1 TeV, the last 1 s: about 50 photons.
        let r = flat_above_1tev();
        let n = detected_counts(&r, 10.0, 0.1, 1.0).unwrap();
        assert!((n - 50.0).abs() < 1.0, "{n}");
        // Additive over slices of time-to-go, and the numerical fold agrees with the exact one.
        let a = detected_counts_between(&r, 10.0, 0.1, 0.0, 0.3).unwrap();
        let b = detected_counts_between(&r, 10.0, 0.1, 0.3, 1.0).unwrap();
        assert!(rel(a + b, n) < 1e-12);
        let w = detected_counts_weighted(&r, 10.0, 0.1, 0.3, 1.0, |_| 1.0).unwrap();
        assert!(rel(w, b) < 1e-5, "{w} vs {b}");
        assert_eq!(detected_counts(&r, 60.0, 0.1, 1.0).unwrap(), 0.0);
    }

    #[test]
    fn bad_input_is_a_typed_error() {
        let r = flat_above_1tev();
        for m in [-1.0, 0.0, f64::NAN, f64::INFINITY] {
            assert!(matches!(
                temperature_gev(m),
                Err(ScienceError::InvalidArgument { name: "mass_g", .. })
            ));
            assert!(matches!(
                temperature_k(m),
                Err(ScienceError::InvalidArgument { .. })
            ));
            assert!(matches!(
                lifetime_s(m, 15.35),
                Err(ScienceError::InvalidArgument { .. })
            ));
            assert!(matches!(
                schwarzschild_radius_m(m),
                Err(ScienceError::InvalidArgument { .. })
            ));
        }
        assert!(matches!(
            lifetime_s(1e10, -2.0),
            Err(ScienceError::InvalidArgument { name: "f", .. })
        ));
        for tau in [-1.0, 0.0, f64::NAN] {
            assert!(matches!(
                mass_at_time_to_go_g(tau),
                Err(ScienceError::InvalidArgument { name: "tau_s", .. })
            ));
            assert!(burst_dnde(100.0, tau).is_err());
            assert!(counts_above(100.0, tau).is_err());
            assert!(detected_counts(&r, 10.0, 0.1, tau).is_err());
        }
        for d in [-0.1, 0.0, f64::NAN, f64::INFINITY] {
            assert!(matches!(
                detected_counts(&r, 10.0, d, 1.0),
                Err(ScienceError::InvalidArgument {
                    name: "distance_pc",
                    ..
                })
            ));
        }
        assert!(burst_dnde(-5.0, 1.0).is_err());
        assert!(counts_above(f64::NAN, 1.0).is_err());
        assert!(detected_counts(&r, f64::NAN, 0.1, 1.0).is_err());
        assert!(detected_counts_between(&r, 10.0, 0.1, 2.0, 1.0).is_err());
        assert!(detected_counts_between(&r, 10.0, 0.1, -1.0, 1.0).is_err());
        assert!(initial_mass_expiring_after_g(-1.0).is_err());
    }
}
