//! Horizontal coordinates and sidereal time against astropy (tests/reference/altaz.csv, made by
//! tests/reference/make_altaz.py with astropy 8; UT1 = UTC and no refraction on both sides).

#![allow(clippy::unwrap_used)]

use glint_science::instrument::SiteSpec;
use glint_sim::sky::{SkyFrame, gmst_deg, parse_utc_to_gps_ns};

struct Row {
    lat: f64,
    lon: f64,
    utc: String,
    gps_ns: i64,
    gmst: f64,
    ra: f64,
    dec: f64,
    alt: f64,
    az: f64,
}

fn rows() -> Vec<Row> {
    let path = concat!(env!("CARGO_MANIFEST_DIR"), "/../../tests/reference/altaz.csv");
    let text = std::fs::read_to_string(path).unwrap();
    let mut lines = text.lines().filter(|l| !l.starts_with('#'));
    let head = lines.next().unwrap();
    assert_eq!(
        head,
        "site,lat_deg,lon_deg,utc,gps_ns,gmst_deg,ra_deg,dec_deg,alt_deg,az_deg"
    );
    lines
        .map(|l| {
            let c: Vec<&str> = l.split(',').collect();
            let f = |i: usize| c[i].parse::<f64>().unwrap();
            Row {
                lat: f(1),
                lon: f(2),
                utc: c[3].to_string(),
                gps_ns: c[4].parse().unwrap(),
                gmst: f(5),
                ra: f(6),
                dec: f(7),
                alt: f(8),
                az: f(9),
            }
        })
        .collect()
}

/// Angle between two (altitude, azimuth) directions, degrees.
fn horizontal_separation(alt1: f64, az1: f64, alt2: f64, az2: f64) -> f64 {
    glint_sim::sky::separation_deg(az1, alt1, az2, alt2)
}

#[test]
fn utc_to_gps_matches_astropy() {
    let rows = rows();
    assert!(rows.len() >= 1000, "reference has {} rows", rows.len());
    for r in &rows {
        assert_eq!(parse_utc_to_gps_ns(&r.utc).unwrap(), r.gps_ns, "{}", r.utc);
    }
}

#[test]
fn gmst_matches_astropy_iau2006() {
    // Same IAU 2006 expression on both sides (Capitaine et al. 2003; erfa.gmst06 in astropy) with
    // UT1 = UTC: agreement to 1e-6 deg is [calc] rounding only.
    let mut worst: f64 = 0.0;
    for r in rows() {
        let d = (gmst_deg(r.gps_ns) - r.gmst + 540.0).rem_euclid(360.0) - 180.0;
        worst = worst.max(d.abs());
    }
    assert!(worst < 1e-6, "worst GMST difference {worst} deg");
}

#[test]
fn horizontal_coordinates_match_astropy_within_the_stated_error() {
    // glint-sim neglects precession and nutation since J2000 (about 50 arcsec a year: 0.28 deg by 2020,
    // 0.42 deg by 2030), annual aberration (< 0.006 deg) and polar motion: 0.5 deg bounds them over
    // 2020-2030 (common practice, no source; the precession rate is from memory).
    let mut worst: f64 = 0.0;
    let mut worst_2026: f64 = 0.0;
    let mut best_2026 = f64::INFINITY;
    for r in rows() {
        let frame = SkyFrame::new(
            &SiteSpec::Ground {
                latitude_deg: r.lat,
                longitude_deg: r.lon,
                altitude_m: 0.0,
            },
            r.gps_ns,
        );
        let (zenith, az) = frame.to_instrument(r.ra, r.dec, r.gps_ns);
        let sep = horizontal_separation(90.0 - zenith, az, r.alt, r.az);
        worst = worst.max(sep);
        if r.utc.starts_with("2026") {
            worst_2026 = worst_2026.max(sep);
            best_2026 = best_2026.min(sep);
        }
        // The inverse lands back on the same sky position.
        let (ra, dec) = frame.to_icrs(zenith, az, r.gps_ns);
        assert!(glint_sim::sky::separation_deg(ra, dec, r.ra, r.dec) < 1e-8);
    }
    assert!(worst < 0.5, "worst separation {worst} deg");
    // The error stated in the docs for 2026 (up to about 0.38 deg: 26.9 years of 50.3 arcsec along the
    // ecliptic, less toward the ecliptic poles; [calc] from the precession rate, which is from memory) is
    // what the comparison shows: the neglected precession dominates and nothing else is missing.
    assert!(
        (0.3..=0.4).contains(&worst_2026),
        "2026: {best_2026} to {worst_2026} deg"
    );
}
