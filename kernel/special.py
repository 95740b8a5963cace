"""Scalar special functions for the kernels (scalar tier, inlined).

INTERIM: thin wrappers over ``math``; to be replaced by branch-free, vectorisable
implementations (issue: vectorised special functions).  The names and accuracy contracts
below are the interface the rest of the kernel relies on.

* ``exp(x)``       e^x,           <= 1 ulp,  overflow -> inf, underflow -> 0
* ``log(x)``       ln x, x > 0,   <= 1 ulp
* ``erfc(x)``      1 - erf(x),    <= 2e-15 relative
* ``erfcx(x)``     e^{x^2} erfc(x), <= 2e-15 relative
* ``norm_cdf(x)``  Phi(x),        <= 2e-15 relative
* ``norm_pdf(x)``  phi(x)
"""

import math

from ._jit import scalar

_SQRT1_2 = 0.7071067811865476
_INV_SQRT_2PI = 0.3989422804014327
_INV_SQRT_PI = 0.5641895835477563


@scalar
def exp(x):
    return math.exp(x)


@scalar
def log(x):
    return math.log(x)


@scalar
def erfc(x):
    return math.erfc(x)


@scalar
def erfcx(x):
    if x < 25.0:
        return math.exp(x * x) * math.erfc(x)
    # asymptotic series, ample at x >= 25
    z = 1.0 / (x * x)
    return _INV_SQRT_PI / x * (1.0 - 0.5 * z * (1.0 - 1.5 * z * (1.0 - 2.5 * z)))


@scalar
def norm_cdf(x):
    return 0.5 * math.erfc(-x * _SQRT1_2)


@scalar
def norm_pdf(x):
    return _INV_SQRT_2PI * math.exp(-0.5 * x * x)
