"""Fit the polynomial that kernel/special.py uses for erfcx on [0, 0.46875].

    .venv/bin/python tests/fit_erfcx_small.py       # a few seconds; prints the tuple

Method: Chebyshev interpolation (interpolation at the Chebyshev nodes of the first kind,
which is within a small factor of the minimax polynomial) of erfcx(y) = exp(y^2) erfc(y),
computed with mpmath at 60 digits, written in monomial form in t = y - 0.234375 (the
interval's midpoint, so the Horner sum is well conditioned: its terms fall by about 3x
per degree) and rounded to doubles.  The script prints the truncation error of the exact
interpolant and the error of the rounded coefficients in double Horner arithmetic; both
must stay well below 1 ulp.  tests/test_special.py checks the result in the kernel
itself against the mpmath reference table.
"""

import mpmath as mp
import numpy as np

DEGREE = 14
LO, HI = 0.0, 0.46875
MID = 0.234375


def erfcx(y):
    return mp.erfc(y) * mp.exp(y * y)


def fit(degree=DEGREE):
    mp.mp.dps = 60
    a, b, c = mp.mpf(LO), mp.mpf(HI), mp.mpf(MID)
    nodes = [(a + b) / 2 + (b - a) / 2 * mp.cos(mp.pi * (k + mp.mpf(1) / 2) / (degree + 1))
             for k in range(degree + 1)]
    vander = mp.matrix([[(x - c) ** j for j in range(degree + 1)] for x in nodes])
    coef = mp.lu_solve(vander, mp.matrix([erfcx(x) for x in nodes]))
    return [coef[j] for j in range(degree + 1)]


def main():
    coef = fit()
    grid = [mp.mpf(LO) + (mp.mpf(HI) - LO) * k / 400 for k in range(401)]
    trunc = max(abs(sum(cj * (y - MID) ** j for j, cj in enumerate(coef)) / erfcx(y) - 1)
                for y in grid)
    cd = [float(cj) for cj in coef]
    ys = np.linspace(LO, HI, 4001)
    p = np.zeros_like(ys)
    for cj in reversed(cd):
        p = p * (ys - MID) + cj
    ref = np.array([float(erfcx(mp.mpf(float(y)))) for y in ys])
    print(f"degree {DEGREE}: truncation {float(trunc):.2g}, "
          f"rounded coefficients in double Horner {np.max(np.abs(p / ref - 1)):.2g}")
    print("(" + ",\n ".join(repr(v) for v in cd) + ")")


if __name__ == "__main__":
    main()
