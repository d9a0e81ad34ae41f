#!/usr/bin/env python3
"""Reference FITS event lists for glint's reader (daemon/glint/src/fits.rs).

Writes tests/reference/fits/*.fits: small EVENTS tables (TIME, RA, DEC, ENERGY, sometimes ALT/AZ) in the open
gamma-ray event-list layout, one per time system (TT, TAI, UTC across the 2016-12-31 leap second, GPS with
TIMEUNIT = 'd') and energy unit, plus broken ones that must be refused (unknown TIMESYS, a NaN row, a
missing column, a wrong unit). tests/reference/fits_photons.csv lists, for every good file, each photon in
time order with its GPS time in nanoseconds as astropy computes it:
    astropy Time(MJDREFI, MJDREFF, format='mjd', scale=TIMESYS) + TimeDelta(TIMEZERO + TIME, unit TIMEUNIT)
taken to TAI, minus 1980-01-06T00:00:19 TAI (the GPS epoch), in exact decimal arithmetic on astropy's two
doubles. GPS is no astropy scale: a GPS reference is read as TAI plus 19 s (TAI = GPS + 19 s by definition).
The data are invented (uniform positions, power-law energies); the CSV's first line records the versions.

Run from the repository root: python3 tests/reference/make_fits.py
"""

import csv
import pathlib
from decimal import Decimal

import astropy
import astropy.units as u
import numpy as np
from astropy.io import fits
from astropy.time import Time, TimeDelta
from astropy.utils import iers

iers.conf.auto_download = False

ROOT = pathlib.Path(__file__).resolve().parent
OUT = ROOT / "fits"
GPS0 = Time("1980-01-06T00:00:19", scale="tai")
NS_PER_DAY = Decimal(86_400) * Decimal(10**9)
ENERGY_GEV = {"TeV": 1e3, "GeV": 1.0, "MeV": 1e-3}


def gps_ns(t):
    """GPS nanoseconds of astropy times, exact to well under a nanosecond."""
    d = t.tai - GPS0
    return [int((Decimal(float(a)) * NS_PER_DAY + Decimal(float(b)) * NS_PER_DAY).to_integral_value())
            for a, b in zip(np.atleast_1d(d.jd1), np.atleast_1d(d.jd2))]


def events(rng, n, t0, span, energy_unit, float_kind):
    time = np.sort(t0 + rng.uniform(0.0, span, n))
    ra = rng.uniform(0.0, 360.0, n)
    dec = np.degrees(np.arcsin(rng.uniform(-1.0, 0.3, n)))
    # Energies from 0.3 TeV up, index 2.6, in the file's unit.
    e_tev = 0.3 * (1.0 - rng.uniform(0.0, 1.0, n)) ** (-1.0 / 1.6)
    energy = e_tev * 1e3 / ENERGY_GEV[energy_unit]
    return time, ra.astype(float_kind), dec.astype(float_kind), energy.astype(float_kind)


def write(name, cols, header, primary_header=None):
    hdu = fits.BinTableHDU.from_columns(cols, name="EVENTS")
    for k, v in header.items():
        hdu.header[k] = v
    prim = fits.PrimaryHDU()
    for k, v in (primary_header or {}).items():
        prim.header[k] = v
    fits.HDUList([prim, hdu]).writeto(OUT / name, overwrite=True)


def main():
    OUT.mkdir(exist_ok=True)
    rng = np.random.default_rng(20261205)
    rows = []

    def case(name, timesys, mjdrefi, mjdreff, timezero, unit, span, t0, energy_unit, kind, altaz=False,
             in_primary=False, n=40):
        time, ra, dec, energy = events(rng, n, t0, span, energy_unit, kind)
        fmt = "D" if kind == np.float64 else "E"
        cols = [
            fits.Column(name="EVENT_ID", format="K", array=np.arange(1, n + 1)),
            fits.Column(name="TIME", format="D", unit=unit, array=time),
            fits.Column(name="RA", format=fmt, unit="deg", array=ra),
            fits.Column(name="DEC", format=fmt, unit="deg", array=dec),
            fits.Column(name="ENERGY", format=fmt, unit=energy_unit, array=energy),
        ]
        alt = None
        if altaz:
            alt = rng.uniform(45.0, 90.0, n).astype(np.float32)
            cols += [
                fits.Column(name="ALT", format="E", unit="deg", array=alt),
                fits.Column(name="AZ", format="E", unit="deg", array=rng.uniform(0, 360, n).astype(np.float32)),
            ]
        keys = {"MJDREFI": mjdrefi, "MJDREFF": mjdreff, "TIMESYS": timesys, "TIMEUNIT": unit,
                "TIMEZERO": timezero, "TIMEREF": "LOCAL", "INSTRUME": "ventisca-array"}
        if in_primary:
            write(name, cols, {"INSTRUME": keys.pop("INSTRUME")}, keys)
        else:
            write(name, cols, keys)
        scale = {"TT": "tt", "TAI": "tai", "UTC": "utc", "GPS": "tai"}[timesys]
        ref = Time(float(mjdrefi), float(mjdreff), format="mjd", scale=scale)
        if timesys == "GPS":
            ref = ref + TimeDelta(19.0, format="sec")
        fmt_d = "jd" if unit == "d" else "sec"
        t = ref + TimeDelta(timezero, format=fmt_d) + TimeDelta(time, format=fmt_d)
        for i, ns in enumerate(gps_ns(t)):
            z = "" if alt is None else repr(90.0 - float(alt[i]))
            rows.append([name, i + 1, ns, repr(float(ra[i])), repr(float(dec[i])),
                         repr(float(energy[i]) * ENERGY_GEV[energy_unit]), z])

    # The format's usual reference (2001-01-01 00:00:00 UTC expressed in TT) and large TIME values.
    case("events_tt.fits", "TT", 51910, 7.428703703703703e-4, 0.0, "s", 3600.0, 817_776_000.0, "TeV", np.float32)
    # TAI, the keys in the primary header, a TIMEZERO, energies in GeV, ALT/AZ columns.
    case("events_tai.fits", "TAI", 61375, 0.25, 12.5, "s", 600.0, 100.0, "GeV", np.float64, altaz=True,
         in_primary=True)
    # UTC across the leap second inserted at the end of 2016-12-31 (MJD 57753): elapsed SI seconds.
    case("events_utc.fits", "UTC", 57753, 0.0, 0.0, "s", 20.0, 86_390.0, "MeV", np.float64)
    # GPS, times in days.
    case("events_gps.fits", "GPS", 61375, 0.0, 0.0, "d", 0.01, 0.5, "TeV", np.float64)

    # Broken files: each must be refused with its own message.
    n = 5
    base = [
        fits.Column(name="TIME", format="D", unit="s", array=np.arange(n, dtype=float)),
        fits.Column(name="RA", format="D", unit="deg", array=np.full(n, 10.0)),
        fits.Column(name="DEC", format="D", unit="deg", array=np.full(n, -20.0)),
    ]
    good_keys = {"MJDREFI": 61375, "MJDREFF": 0.0, "TIMESYS": "TT", "TIMEUNIT": "s"}
    energy = np.full(n, 1.0)
    write("bad_timesys.fits", base + [fits.Column(name="ENERGY", format="D", unit="TeV", array=energy)],
          {**good_keys, "TIMESYS": "TDB"})
    nan_e = energy.copy()
    nan_e[2] = np.nan
    write("bad_nan.fits", base + [fits.Column(name="ENERGY", format="D", unit="TeV", array=nan_e)], good_keys)
    write("bad_no_energy.fits", base, good_keys)
    write("bad_unit.fits", base + [fits.Column(name="ENERGY", format="D", unit="m", array=energy)], good_keys)

    with open(ROOT / "fits_photons.csv", "w", newline="") as f:
        f.write(f"# astropy {astropy.__version__}, numpy {np.__version__}; written by tests/reference/make_fits.py\n")
        w = csv.writer(f, lineterminator="\n")
        w.writerow(["file", "row", "gps_ns", "ra_deg", "dec_deg", "energy_gev", "zenith_deg"])
        w.writerows(rows)


if __name__ == "__main__":
    main()
