#!/usr/bin/env python3
"""Reference values for glint-science's Poisson tails and Gaussian significances.

Writes poisson.csv (P(N >= n | b) and its one-sided Z) and normal.csv (ln Q(z)), next to this script.
The main columns come from mpmath at 60 digits, which stays exact where p underflows a double; scipy's
values are written beside them wherever they are finite, as the independent cross-check the Rust tests
also read. Offline: no downloads. Run: python3 tests/reference/make_poisson.py
"""

import math
import os
import sys

import mpmath
import numpy
import scipy
from scipy import stats

mpmath.mp.dps = 60
HERE = os.path.dirname(os.path.abspath(__file__))

N_GRID = [1, 2, 3, 4, 5, 7, 10, 15, 20, 30, 50, 100, 200, 500, 1000, 3000, 10000]
B_GRID = [1e-8, 1e-6, 1e-4, 1e-3, 0.01, 0.03, 0.1, 0.3, 0.5, 1.0, 2.0, 3.0, 5.0, 10.0, 20.0, 50.0,
          100.0, 300.0, 1000.0, 3000.0, 10000.0]
Z_GRID = [-8.0, -5.0, -3.0, -1.0, -0.3, 0.0, 0.1, 0.5, 1.0, 1.5, 1.7320508, 2.0, 2.5, 3.0, 4.0, 5.0,
          6.0, 8.0, 10.0, 15.0, 20.0, 30.0, 37.5, 38.5, 50.0, 100.0, 300.0, 1000.0, 1e4]


def header(f, what):
    f.write(f"# {what}\n")
    f.write(f"# made by tests/reference/make_poisson.py with python {sys.version.split()[0]}, "
            f"mpmath {mpmath.__version__} (dps {mpmath.mp.dps}), scipy {scipy.__version__}, "
            f"numpy {numpy.__version__}\n")


def ln_upper_poisson(n, b):
    """ln P(N >= n | b) = ln P(n, b), the regularised lower incomplete gamma function."""
    if n == 0:
        return mpmath.mpf(0)
    lower = mpmath.gammainc(n, 0, b, regularized=True)
    if lower > 0.5:
        # Close to 1: take the log from the small complement so ln p keeps its digits.
        return mpmath.log1p(-mpmath.gammainc(n, b, mpmath.inf, regularized=True))
    return mpmath.log(lower)


def ln_q(z):
    """ln of the standard normal upper tail."""
    return mpmath.log(mpmath.erfc(mpmath.mpf(z) / mpmath.sqrt(2)) / 2)


def sigma_from_ln_p(ln_p):
    """One-sided Z with ln Q(Z) = ln_p, by a root finder in mpmath."""
    ln_p = mpmath.mpf(ln_p)
    if ln_p == 0:
        return mpmath.mpf("-inf")
    if ln_p > mpmath.log(0.5):
        # p close to 1: Z = -Phi^-1(1 - (1 - p)), with ln(1 - p) taken without rounding 1 - p.
        return -sigma_from_ln_p(mpmath.log(-mpmath.expm1(ln_p)))
    guess = mpmath.sqrt(-2 * ln_p)
    return mpmath.findroot(lambda z: ln_q(z) - ln_p, guess, tol=mpmath.mpf(10) ** -40)


def fmt(x):
    return "nan" if x is None or not math.isfinite(x) else repr(float(x))


def main():
    rows = 0
    with open(os.path.join(HERE, "poisson.csv"), "w") as f:
        header(f, "P(N >= n | b): ln_sf (mpmath), ln_sf_scipy = scipy.stats.poisson.logsf(n - 1, b); "
                  "sigma = Phi^-1(1 - p) from ln_sf (mpmath root), sigma_scipy = scipy.stats.norm.isf(p); "
                  "nan where scipy underflows")
        f.write("n,b,ln_sf,ln_sf_scipy,sigma,sigma_scipy\n")
        for n in N_GRID:
            for b in B_GRID:
                ln_p = ln_upper_poisson(n, b)
                if ln_p < -1e6:
                    continue
                ln_p_scipy = float(stats.poisson.logsf(n - 1, b))
                sigma = sigma_from_ln_p(ln_p)
                p = math.exp(float(ln_p)) if ln_p > -745 else 0.0
                sigma_scipy = float(stats.norm.isf(p)) if 0.0 < p < 1.0 else None
                f.write(f"{n},{fmt(b)},{mpmath.nstr(ln_p, 20)},{fmt(ln_p_scipy)},"
                        f"{mpmath.nstr(sigma, 20)},{fmt(sigma_scipy)}\n")
                rows += 1
    with open(os.path.join(HERE, "normal.csv"), "w") as f:
        header(f, "standard normal upper tail: ln_q = ln Q(z) (mpmath), ln_q_scipy = scipy.stats.norm.logsf(z)")
        f.write("z,ln_q,ln_q_scipy\n")
        for z in Z_GRID:
            f.write(f"{fmt(z)},{mpmath.nstr(ln_q(z), 20)},{fmt(float(stats.norm.logsf(z)))}\n")
    print(f"wrote {rows} Poisson rows and {len(Z_GRID)} normal rows")


if __name__ == "__main__":
    main()
