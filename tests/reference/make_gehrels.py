#!/usr/bin/env python3
"""Reference values for glint-science's Gehrels (1986) confidence limits.

Writes gehrels.csv next to this script: for n = 0..10 and CL = Phi(1), 0.90, 0.95, 0.99, the upper limit
chi2.ppf(CL, 2n + 2) / 2 and the lower limit chi2.ppf(1 - CL, 2n) / 2 (0 for n = 0), the exact relation
of Gehrels 1986, ApJ 303, 336, Tables 1 and 2. Offline. Run: python3 tests/reference/make_gehrels.py
"""

import os
import sys

import numpy
import scipy
from scipy import stats

HERE = os.path.dirname(os.path.abspath(__file__))
CLS = [float(stats.norm.cdf(1.0)), 0.90, 0.95, 0.99]


def main():
    with open(os.path.join(HERE, "gehrels.csv"), "w") as f:
        f.write("# Gehrels 1986 Tables 1 and 2 by the exact chi2 relation: upper = chi2.ppf(cl, 2n+2)/2, "
                "lower = chi2.ppf(1-cl, 2n)/2\n")
        f.write(f"# made by tests/reference/make_gehrels.py with python {sys.version.split()[0]}, "
                f"scipy {scipy.__version__}, numpy {numpy.__version__}\n")
        f.write("n,cl,upper,lower\n")
        for n in range(0, 11):
            for cl in CLS:
                upper = stats.chi2.ppf(cl, 2 * n + 2) / 2
                lower = stats.chi2.ppf(1 - cl, 2 * n) / 2 if n > 0 else 0.0
                f.write(f"{n},{cl!r},{float(upper)!r},{float(lower)!r}\n")
    print("wrote gehrels.csv")


if __name__ == "__main__":
    main()
