"""Fit the rational functions kernel/bachelier.py uses (prints the coefficient tuples).

    .venv/bin/python tests/fit_bachelier.py          # a few minutes

1. ``_HP``/``_HQ``: h(z) = 1/sqrt(pi) - z erfcx(z) on [0, 1e8], the scaled normalised
   Bachelier time value (time value = s e^{-z^2} h(z) / sqrt2, z = |F - K| / (s sqrt2)).
   h decays like 1/(2 sqrt(pi) z^2), so P has degree m and Q degree m + 2; the direct
   difference cancels (by a factor 2 z^2 for large z), the rational does not (all its
   coefficients are positive).  Same method as tests/fit_erfcx.py (Loeb's re-weighted
   least squares with mpmath, Chebyshev nodes in t = z/(z+2) over [0, 400]).
2. ``_CP``/``_CQ`` and ``_WP``/``_WQ``: initial guesses of the implied-vol solver, the
   inverse of psi(u) = phi(u)/u - Phi(-u) = v (u = |F - K| / s, v = time value / |F - K|).
   Core (u <= U_SPLIT): u = w R(w^2) with w = 1 / (v + 1/2) (psi ~ 1/(sqrt(2 pi) u) - 1/2
   + ...: R(0) = sqrt(2 pi)).  Wing (u > U_SPLIT): u = eta R(eta) with eta = sqrt(-ln v)
   (u ~ sqrt2 eta as v -> 0).  Fitted on points (v(u), u) with u on Chebyshev nodes, mpmath
   at 40 digits; guess-grade (the Householder step of the solver polishes).
The script reports the maximum relative error of the exact coefficients on dense grids.
"""

import mpmath as mp

from fit_erfcx import fit, fit_points

U_SPLIT = 2.0
U_MAX = 60.0


def h(z):
    return 1 / mp.sqrt(mp.pi) - z * mp.erfc(z) * mp.exp(z * z)


def psi(u):
    return mp.npdf(u) / u - mp.ncdf(-u)


def _rat(p, q, y):
    return mp.polyval(p[::-1], y) / mp.polyval(q[::-1], y)


def _cheb(a, b, n):
    return [a + (b - a) * (1 + mp.cos(mp.pi * (k + mp.mpf(1) / 2) / n)) / 2 for k in range(n)]


def core_points(n):
    us = _cheb(mp.mpf(0), mp.mpf(U_SPLIT), n)
    ws = [1 / (psi(u) + mp.mpf(1) / 2) for u in us]
    return [w * w for w in ws], [u / w for u, w in zip(us, ws)]


def wing_points(n):
    us = _cheb(mp.mpf(U_SPLIT), mp.mpf(U_MAX), n)
    etas = [mp.sqrt(-mp.log(psi(u))) for u in us]
    return etas, [u / e for u, e in zip(us, etas)]


def _err(p, q, xs, fs):
    return max(abs(_rat(p, q, x) / f - 1) for x, f in zip(xs, fs))


def _show(name, cs):
    print(f"{name} = (" + ",\n       ".join(repr(float(c)) for c in cs) + ")")


def main(h_degree=11, core_degree=5, wing_degree=5):
    mp.mp.dps = 40
    xs, fs = core_points(120)
    cp, cq = fit_points(xs, fs, core_degree, extra=0, iterations=8)
    tx, tf = core_points(997)
    print(f"core guess {core_degree}/{core_degree}: max rel error "
          f"{float(_err(cp, cq, tx, tf)):.2g}")
    _show("_CP", cp)
    _show("_CQ", cq)
    xs, fs = wing_points(120)
    wp, wq = fit_points(xs, fs, wing_degree, extra=0, iterations=8)
    tx, tf = wing_points(997)
    print(f"wing guess {wing_degree}/{wing_degree}: max rel error "
          f"{float(_err(wp, wq, tx, tf)):.2g}")
    _show("_WP", wp)
    _show("_WQ", wq)
    mp.mp.dps = 60
    p, q = fit(m=h_degree, target=h, extra=2)
    grid = ([mp.mpf(k) / 200 for k in range(4001)]
            + [mp.mpf(20) * mp.mpf("1.02") ** k for k in range(800)])
    print(f"h {h_degree}/{h_degree + 2}: max rel error {float(_err(p, q, grid, [h(z) for z in grid])):.2g}"
          f"; all positive: {all(c > 0 for c in p + q)}")
    _show("_HP", p)
    _show("_HQ", q)


if __name__ == "__main__":
    import sys
    main(*(int(a) for a in sys.argv[1:]))
