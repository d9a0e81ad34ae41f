#!/usr/bin/env python3
"""Reference horizontal coordinates for glint-sim's ICRS <-> horizontal conversion (daemon/sim/src/sky.rs).

Writes tests/reference/altaz.csv: for a grid of UTC times (2020-2030) and ICRS positions seen from two
invented sites, the GPS-scale time in nanoseconds, the IAU 2006 mean sidereal time at Greenwich, and the
altitude and azimuth (north through east) astropy gives.

Offline-safe settings (nothing is downloaded):
  * astropy.utils.iers.conf.auto_download = False, auto_max_age = None, iers_degraded_accuracy = "warn";
  * delta_ut1_utc is set to 0 on every Time, so UT1 = UTC exactly as glint-sim assumes (|UT1-UTC| < 0.9 s,
    < 0.004 deg of hour angle) and the result does not depend on which IERS table is bundled;
  * AltAz(pressure=0) leaves refraction out, as glint-sim does.
What remains between this file and glint-sim is what glint-sim neglects: precession and nutation since J2000
(up to ~0.42 deg by 2030), annual aberration (< 0.006 deg), polar motion and light deflection (tiny).

Run from the repository root: python3 tests/reference/make_altaz.py
"""

import csv
import pathlib
import warnings

import astropy
import astropy.units as u
import erfa
import numpy as np
from astropy.coordinates import AltAz, EarthLocation, SkyCoord
from astropy.time import Time
from astropy.utils import iers

iers.conf.auto_download = False
iers.conf.auto_max_age = None
iers.conf.iers_degraded_accuracy = "warn"
warnings.simplefilter("ignore")  # degraded-accuracy and ERFA "dubious year" warnings are expected offline

OUT = pathlib.Path(__file__).with_name("altaz.csv")

# Invented sites (not real observatories): a southern high-altitude site and a northern one.
SITES = [
    ("south", -23.25, -67.75, 4800.0),
    ("north", 31.5, 101.25, 4400.0),
]
TIMES_UTC = [
    "2020-03-20T00:00:00",
    "2021-07-04T06:30:00",
    "2022-11-15T12:45:30",
    "2024-02-29T18:00:00",
    "2025-06-21T03:15:00",
    "2026-12-01T02:00:00",
    "2027-09-09T21:21:21",
    "2029-01-31T09:10:00",
    "2030-12-31T23:59:00",
]
RA_DEG = [0.0, 45.0, 83.6, 150.0, 201.3, 266.4, 300.0, 350.0]
DEC_DEG = [-80.0, -45.0, -20.0, 0.0, 22.0, 45.0, 70.0]


def main() -> None:
    rows = []
    for site, lat, lon, height in SITES:
        loc = EarthLocation.from_geodetic(lon=lon * u.deg, lat=lat * u.deg, height=height * u.m)
        for iso in TIMES_UTC:
            t = Time(iso, scale="utc", location=loc)
            t.delta_ut1_utc = 0.0
            # GPS seconds since 1980-01-06T00:00:00 UTC = TAI - 19 s.
            # GPS seconds since 1980-01-06T00:00:00 UTC (= TAI - 19 s), rounded to the microsecond: the float
            # difference carries ~0.2 us of rounding, and every time in the grid is a whole second.
            gps_s = (t.tai - Time("1980-01-06T00:00:19", scale="tai")).to_value(u.s)
            gps_ns = int(round(gps_s * 1e6)) * 1000
            gmst = t.sidereal_time("mean", longitude=0.0 * u.deg, model="IAU2006").deg
            frame = AltAz(obstime=t, location=loc, pressure=0.0 * u.hPa)
            ra, dec = np.meshgrid(RA_DEG, DEC_DEG, indexing="ij")
            aa = SkyCoord(ra=ra.ravel() * u.deg, dec=dec.ravel() * u.deg, frame="icrs").transform_to(frame)
            for r, d, alt, az in zip(ra.ravel(), dec.ravel(), aa.alt.deg, aa.az.deg):
                rows.append((site, lat, lon, iso + "Z", gps_ns, gmst, r, d, alt, az))
    with OUT.open("w", newline="") as f:
        f.write(f"# made by tests/reference/make_altaz.py with astropy {astropy.__version__}, "
                f"pyerfa {erfa.__version__}, numpy {np.__version__}\n")
        f.write("# AltAz(pressure=0), delta_ut1_utc=0, IERS auto_download off; angles degrees; az north through east\n")
        w = csv.writer(f, lineterminator="\n")
        w.writerow(["site", "lat_deg", "lon_deg", "utc", "gps_ns", "gmst_deg", "ra_deg", "dec_deg", "alt_deg", "az_deg"])
        for site, lat, lon, iso, gps_ns, gmst, r, d, alt, az in rows:
            w.writerow([site, lat, lon, iso, gps_ns, f"{gmst:.10f}", r, d, f"{alt:.8f}", f"{az:.8f}"])
    print(f"wrote {len(rows)} rows to {OUT}")


if __name__ == "__main__":
    main()
