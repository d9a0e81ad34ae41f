//! Sky and time for the simulator: GPS nanoseconds to UT1 and TT, Greenwich mean sidereal time (IAU 2006),
//! and the conversion between ICRS and an instrument's own frame (horizontal for a ground site, off-axis
//! angle and azimuth about a drifting pointing in orbit). Every photon is written in both frames.
//!
//! Approximations, checked against astropy in `tests/altaz.rs` (within 0.5 deg over 2020-2030): UT1 = UTC;
//! ICRS is taken as the mean equator and equinox of date (precession and nutation since J2000 neglected:
//! up to 0.38 deg in 2026, growing 50 arcsec a year); no refraction, aberration or polar motion.
//! In orbit the Earth's shadow is ignored: a sky position inside the field of view is always visible.

use glint_science::instrument::SiteSpec;
use hifitime::Epoch;

/// Julian date (UTC) of the GPS epoch, 1980-01-06T00:00:00 UTC.
const GPS_EPOCH_JD: f64 = 2_444_244.5;
/// Julian date of J2000.0.
const J2000_JD: f64 = 2_451_545.0;
/// TT - GPS, seconds: TAI - GPS = 19 s exactly and TT - TAI = 32.184 s exactly.
const TT_MINUS_GPS_S: f64 = 51.184;
const NS_PER_DAY: i64 = 86_400_000_000_000;

/// UTC - GPS in seconds at a GPS time (-18 s since 2017-01-01), from hifitime's leap-second table.
pub fn utc_minus_gps_s(t_gps_ns: i64) -> f64 {
    let epoch = Epoch::from_gpst_nanoseconds(t_gps_ns.max(0).unsigned_abs());
    // TAI - UTC is the leap-second count; TAI - GPS is 19 s.
    19.0 - f64::from(epoch.leap_seconds_iers())
}

/// Greenwich mean sidereal time in radians, [0, 2 pi), by the IAU 2006 expression (Capitaine, Wallace &
/// Chapront 2003, A&A 412, 567; IERS Conventions 2010 eq. 5.32): the Earth rotation angle of UT1 plus a
/// polynomial in TT centuries. UT1 is taken as GPS + `utc_minus_gps_s` (UT1 = UTC, |UT1 - UTC| < 0.9 s).
pub fn gmst_rad(t_gps_ns: i64, utc_minus_gps_s: f64) -> f64 {
    // Whole days and the fraction kept apart so the Earth rotation angle keeps nanosecond precision.
    let whole_days = t_gps_ns.div_euclid(NS_PER_DAY);
    let day_frac = t_gps_ns.rem_euclid(NS_PER_DAY) as f64 / NS_PER_DAY as f64;
    let ut1_frac = day_frac + utc_minus_gps_s / 86_400.0;
    // Days of UT1 since J2000: the GPS epoch is J2000 - 7300.5 days.
    let tu = (GPS_EPOCH_JD - J2000_JD) + whole_days as f64 + ut1_frac;
    // Integer part of tu is whole_days - 7300 (plus the -0.5): only the fraction matters for the turn count.
    let era_turns = 0.779_057_273_264_0 + (ut1_frac - 0.5) + 0.002_737_811_911_354_48 * tu;
    let era = std::f64::consts::TAU * era_turns.rem_euclid(1.0);
    let t = ((GPS_EPOCH_JD - J2000_JD) + whole_days as f64 + day_frac + TT_MINUS_GPS_S / 86_400.0) / 36_525.0;
    let poly_arcsec = 0.014_506
        + t * (4_612.156_534
            + t * (1.391_581_7 + t * (-0.000_000_44 + t * (-0.000_029_956 + t * -0.000_000_036_8))));
    (era + (poly_arcsec / 3_600.0).to_radians()).rem_euclid(std::f64::consts::TAU)
}

/// Greenwich mean sidereal time in degrees, [0, 360), at a GPS time (see [`gmst_rad`]; the leap-second
/// offset comes from hifitime).
pub fn gmst_deg(t_gps_ns: i64) -> f64 {
    gmst_rad(t_gps_ns, utc_minus_gps_s(t_gps_ns)).to_degrees()
}

/// Angle between two sky directions, degrees (haversine form, accurate at small angles).
pub fn separation_deg(ra1_deg: f64, dec1_deg: f64, ra2_deg: f64, dec2_deg: f64) -> f64 {
    let (d1, d2) = (dec1_deg.to_radians(), dec2_deg.to_radians());
    let dra = (ra2_deg - ra1_deg).to_radians();
    let h = ((d2 - d1) / 2.0).sin().powi(2) + d1.cos() * d2.cos() * (dra / 2.0).sin().powi(2);
    (2.0 * h.sqrt().min(1.0).asin()).to_degrees()
}

/// The point `theta_deg` away from (`ra_deg`, `dec_deg`) at position angle `pa_deg` (north through east).
/// Returns ICRS-style degrees with right ascension in [0, 360).
pub fn offset_by(ra_deg: f64, dec_deg: f64, theta_deg: f64, pa_deg: f64) -> (f64, f64) {
    let (d1, th, pa) = (dec_deg.to_radians(), theta_deg.to_radians(), pa_deg.to_radians());
    let (sd1, cd1) = d1.sin_cos();
    let (sth, cth) = th.sin_cos();
    let (spa, cpa) = pa.sin_cos();
    let sd2 = (sd1 * cth + cd1 * sth * cpa).clamp(-1.0, 1.0);
    let d2 = sd2.asin();
    let dra = (spa * sth * cd1).atan2(cth - sd1 * sd2);
    (wrap_360(ra_deg + dra.to_degrees()), d2.to_degrees())
}

/// Position angle (north through east, degrees in [0, 360)) of direction 2 seen from direction 1.
pub fn position_angle_deg(ra1_deg: f64, dec1_deg: f64, ra2_deg: f64, dec2_deg: f64) -> f64 {
    let (d1, d2) = (dec1_deg.to_radians(), dec2_deg.to_radians());
    let dra = (ra2_deg - ra1_deg).to_radians();
    let y = dra.sin() * d2.cos();
    let x = d1.cos() * d2.sin() - d1.sin() * d2.cos() * dra.cos();
    wrap_360(y.atan2(x).to_degrees())
}

/// Wraps an angle into [0, 360), never returning 360 itself (which rounding could otherwise give).
pub fn wrap_360(deg: f64) -> f64 {
    let w = deg.rem_euclid(360.0);
    if w >= 360.0 { 0.0 } else { w }
}

/// An instrument's frame: converts between ICRS and (zenith or off-axis angle, azimuth) at a GPS time.
#[derive(Debug, Clone)]
pub enum SkyFrame {
    /// A ground site: the frame is horizontal, azimuth from north through east.
    Ground {
        /// sin and cos of the geodetic latitude.
        lat_sin_cos: (f64, f64),
        /// East longitude, radians.
        lon_rad: f64,
        /// UTC - GPS seconds in force (refreshed by [`SkyFrame::refresh_leap_seconds`]).
        utc_minus_gps_s: f64,
    },
    /// A telescope in orbit: off-axis angle from the pointing and azimuth as the position angle about it.
    Space {
        /// Pointing right ascension at `t0_gps_ns`, degrees.
        ra0_deg: f64,
        /// Pointing declination, degrees.
        dec_deg: f64,
        /// Pointing drift in right ascension, degrees per second.
        drift_deg_per_s: f64,
        /// Reference time of the pointing, GPS ns.
        t0_gps_ns: i64,
    },
}

impl SkyFrame {
    /// The frame of `site`, with the pointing of a space site referred to `t0_gps_ns` (the stream start).
    pub fn new(site: &SiteSpec, t0_gps_ns: i64) -> Self {
        match site {
            SiteSpec::Ground {
                latitude_deg,
                longitude_deg,
                ..
            } => Self::Ground {
                lat_sin_cos: latitude_deg.to_radians().sin_cos(),
                lon_rad: longitude_deg.to_radians(),
                utc_minus_gps_s: utc_minus_gps_s(t0_gps_ns),
            },
            SiteSpec::Space {
                pointing_ra_deg,
                pointing_dec_deg,
                ra_drift_deg_per_s,
            } => Self::Space {
                ra0_deg: *pointing_ra_deg,
                dec_deg: *pointing_dec_deg,
                drift_deg_per_s: *ra_drift_deg_per_s,
                t0_gps_ns,
            },
        }
    }

    /// Looks up the leap-second offset again for time `t_gps_ns` (the simulator calls this once per chunk, so
    /// a leap second inside a run is off by at most one chunk).
    pub fn refresh_leap_seconds(&mut self, t_gps_ns: i64) {
        if let Self::Ground {
            utc_minus_gps_s: off, ..
        } = self
        {
            *off = utc_minus_gps_s(t_gps_ns);
        }
    }

    /// Local sidereal time in radians (ground) at `t_gps_ns`.
    fn lst_rad(lon_rad: f64, off: f64, t_gps_ns: i64) -> f64 {
        gmst_rad(t_gps_ns, off) + lon_rad
    }

    /// Pointing of a space frame at `t_gps_ns`, degrees.
    fn pointing(ra0_deg: f64, dec_deg: f64, drift: f64, t0: i64, t_gps_ns: i64) -> (f64, f64) {
        let dt_s = (t_gps_ns - t0) as f64 * 1e-9;
        (wrap_360(ra0_deg + drift * dt_s), dec_deg)
    }

    /// ICRS (degrees) to the instrument frame: (zenith or off-axis angle in [0, 180], azimuth in [0, 360)).
    pub fn to_instrument(&self, ra_deg: f64, dec_deg: f64, t_gps_ns: i64) -> (f64, f64) {
        match *self {
            Self::Ground {
                lat_sin_cos: (sphi, cphi),
                lon_rad,
                utc_minus_gps_s: off,
            } => {
                let h = Self::lst_rad(lon_rad, off, t_gps_ns) - ra_deg.to_radians();
                let (sh, ch) = h.sin_cos();
                let (sd, cd) = dec_deg.to_radians().sin_cos();
                let salt = (sphi * sd + cphi * cd * ch).clamp(-1.0, 1.0);
                let az = (-cd * sh).atan2(sd * cphi - cd * ch * sphi);
                (90.0 - salt.asin().to_degrees(), wrap_360(az.to_degrees()))
            }
            Self::Space {
                ra0_deg,
                dec_deg: pdec,
                drift_deg_per_s,
                t0_gps_ns,
            } => {
                let (pra, pdec) = Self::pointing(ra0_deg, pdec, drift_deg_per_s, t0_gps_ns, t_gps_ns);
                (
                    separation_deg(pra, pdec, ra_deg, dec_deg),
                    position_angle_deg(pra, pdec, ra_deg, dec_deg),
                )
            }
        }
    }

    /// Instrument frame (zenith or off-axis angle, azimuth; degrees) to ICRS (ra in [0, 360), dec).
    pub fn to_icrs(&self, zenith_deg: f64, azimuth_deg: f64, t_gps_ns: i64) -> (f64, f64) {
        let (sin_z, cos_z) = zenith_deg.to_radians().sin_cos();
        self.to_icrs_trig(cos_z, sin_z, zenith_deg, azimuth_deg, t_gps_ns)
    }

    /// [`SkyFrame::to_icrs`] for a caller that already has the zenith angle's cosine and sine.
    pub(crate) fn to_icrs_trig(
        &self,
        cos_z: f64,
        sin_z: f64,
        zenith_deg: f64,
        azimuth_deg: f64,
        t: i64,
    ) -> (f64, f64) {
        match *self {
            Self::Ground {
                lat_sin_cos: (sphi, cphi),
                lon_rad,
                utc_minus_gps_s: off,
            } => {
                // altitude = 90 deg - zenith: sin(alt) = cos z, cos(alt) = sin z.
                let (salt, calt) = (cos_z, sin_z);
                let (saz, caz) = azimuth_deg.to_radians().sin_cos();
                let sd = (sphi * salt + cphi * calt * caz).clamp(-1.0, 1.0);
                let h = (-saz * calt).atan2(salt * cphi - calt * sphi * caz);
                let ra = Self::lst_rad(lon_rad, off, t) - h;
                (wrap_360(ra.to_degrees()), sd.asin().to_degrees())
            }
            Self::Space {
                ra0_deg,
                dec_deg: pdec,
                drift_deg_per_s,
                t0_gps_ns,
            } => {
                let (pra, pdec) = Self::pointing(ra0_deg, pdec, drift_deg_per_s, t0_gps_ns, t);
                offset_by(pra, pdec, zenith_deg, azimuth_deg)
            }
        }
    }
}

/// GPS nanoseconds of an ISO-8601 UTC time such as `2026-12-01T02:00:00Z` (hifitime handles leap seconds).
pub fn parse_utc_to_gps_ns(text: &str) -> Result<i64, String> {
    let trimmed = text.trim();
    // hifitime reads "YYYY-MM-DDTHH:MM:SS[.f] UTC"; accept the common trailing Z as UTC.
    let body = trimmed.strip_suffix('Z').unwrap_or(trimmed);
    let with_scale = if body.ends_with("UTC") {
        body.to_string()
    } else {
        format!("{body} UTC")
    };
    let epoch = Epoch::from_gregorian_str(&with_scale).map_err(|e| format!("not a UTC time ({e})"))?;
    let ns = epoch
        .to_gpst_nanoseconds()
        .map_err(|e| format!("outside the GPS nanosecond range ({e})"))?;
    i64::try_from(ns).map_err(|_| "outside the GPS nanosecond range".to_string())
}

/// ISO-8601 UTC text of a GPS time (for truth records).
pub fn gps_ns_to_utc_string(t_gps_ns: i64) -> String {
    let epoch = Epoch::from_gpst_nanoseconds(t_gps_ns.max(0).unsigned_abs());
    format!(
        "{}Z",
        Epoch::from_utc_duration(epoch.to_utc_duration()).to_isoformat()
    )
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap: a panic is the failure report
mod tests {
    use super::*;

    #[test]
    fn round_trip_ground_and_space() {
        let t = parse_utc_to_gps_ns("2026-12-01T02:00:00Z").unwrap();
        let ground = SkyFrame::new(
            &SiteSpec::Ground {
                latitude_deg: -23.0,
                longitude_deg: -67.0,
                altitude_m: 0.0,
            },
            t,
        );
        let space = SkyFrame::new(
            &SiteSpec::Space {
                pointing_ra_deg: 120.0,
                pointing_dec_deg: 30.0,
                ra_drift_deg_per_s: 0.06,
            },
            t,
        );
        for frame in [ground, space] {
            for &(ra, dec) in &[(10.0, -30.0), (200.0, 45.0), (359.5, 0.1), (83.6, 22.0)] {
                let (z, az) = frame.to_instrument(ra, dec, t + 1_234_567_890);
                let (ra2, dec2) = frame.to_icrs(z, az, t + 1_234_567_890);
                assert!(
                    separation_deg(ra, dec, ra2, dec2) < 1e-9,
                    "{ra} {dec} -> {z} {az} -> {ra2} {dec2}"
                );
            }
        }
    }

    #[test]
    fn utc_text_round_trips_and_gps_offset_is_18_s() {
        let t = parse_utc_to_gps_ns("2026-12-01T02:00:00Z").unwrap();
        // IERS Bulletin C: GPS - UTC = 18 s since 2017-01-01.
        assert_eq!(utc_minus_gps_s(t), -18.0);
        assert_eq!(gps_ns_to_utc_string(t), "2026-12-01T02:00:00.000000Z");
        assert_eq!(
            gps_ns_to_utc_string(t + 1_500_000_000),
            "2026-12-01T02:00:01.500000Z"
        );
        assert!(parse_utc_to_gps_ns("yesterday").is_err());
    }
}
