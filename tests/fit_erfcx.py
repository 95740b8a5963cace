"""Fit the rational function kernel/special.py uses for erfcx on [0, 1e8].

    .venv/bin/python tests/fit_erfcx.py              # about two minutes; prints the tuples
    .venv/bin/python tests/fit_erfcx.py --degree 4   # the guess-grade _XP4 / _XQ4 (8.7e-8)

erfcx(y) = exp(y^2) erfc(y) ~ P(y) / Q(y) with P of degree 11 and Q of degree 12 (so the
ratio decays like 1/(sqrt(pi) y), as erfcx does), Q(0) = 1.  Method: linearised least
squares for the relative error, re-weighted by 1/|Q| of the previous iterate (Loeb's
algorithm, a standard route to a near-minimax rational approximation), on 360 Chebyshev
nodes in t = y/(y+2) over [0, 400], with erfcx from mpmath at 60 digits.  The script
reports the error of the exact coefficients on a dense grid up to 1.5e8 (about 5e-18) and
the signs (all positive, so Horner's rule is cancellation-free for y >= 0).
tests/test_special.py checks the rounded coefficients in the kernel against the mpmath
reference table (<= 2e-15 relative).
"""

import argparse

import mpmath as mp

DEG = 11
NODES = 360
ITERATIONS = 10


def erfcx(y):
    return mp.erfc(y) * mp.exp(y * y)


def fit(m=DEG, n=NODES, iterations=ITERATIONS, hi=mp.mpf(400), target=erfcx, extra=1):
    """P (degree m) and Q (degree m + extra, Q(0) = 1) with P/Q ~ target on [0, hi]."""
    tmax = hi / (hi + 2)
    ts = [tmax / 2 + tmax / 2 * mp.cos(mp.pi * (k + mp.mpf(1) / 2) / n) for k in range(n)]
    ys = [2 * t / (1 - t) for t in ts]
    return fit_points(ys, [target(y) for y in ys], m, extra, iterations)


def fit_points(ys, fs, m, extra=1, iterations=ITERATIONS):
    """Loeb's re-weighted linearised least squares for the relative error of P/Q at the
    points (ys, fs): P of degree m, Q of degree m + extra with Q(0) = 1."""
    n = len(ys)
    w = [mp.mpf(1)] * n
    for _ in range(iterations):
        a = mp.matrix(n, 2 * m + 1 + extra)
        b = mp.matrix(n, 1)
        for i, (y, f) in enumerate(zip(ys, fs)):
            for j in range(m + 1):
                a[i, j] = y ** j * w[i] / f
            for j in range(1, m + 1 + extra):
                a[i, m + j] = -y ** j * w[i]
            b[i] = w[i]
        sol = mp.qr_solve(a, b)[0]
        p = [sol[j] for j in range(m + 1)]
        q = [mp.mpf(1)] + [sol[m + j] for j in range(1, m + 1 + extra)]
        w = [1 / abs(sum(c * y ** j for j, c in enumerate(q))) for y in ys]
    return p, q


def main(argv=None):
    ap = argparse.ArgumentParser(description="fit erfcx on [0, 1e8] by a rational function")
    ap.add_argument("--degree", type=int, default=DEG, help="degree of P (Q: one more)")
    deg = ap.parse_args(argv).degree
    mp.mp.dps = 60
    small = deg != DEG
    p, q = fit(m=deg, n=max(60, 30 * deg) if small else NODES,
               iterations=12 if small else ITERATIONS)
    grid = ([mp.mpf(k) / 200 for k in range(4001)]
            + [mp.mpf(20) * mp.mpf("1.02") ** k for k in range(800)])
    err = max(abs(sum(c * y ** j for j, c in enumerate(p))
                  / sum(c * y ** j for j, c in enumerate(q)) / erfcx(y) - 1) for y in grid)
    print(f"P degree {deg}, Q degree {deg + 1}: max relative error of the exact "
          f"coefficients {float(err):.2g}; all positive: {all(c > 0 for c in p + q)}")
    suffix = "" if deg == DEG else str(deg)
    for name, cs in (("_XP" + suffix, p), ("_XQ" + suffix, q)):
        print(f"{name} = (" + ",\n       ".join(repr(float(c)) for c in cs) + ")")


if __name__ == "__main__":
    main()
