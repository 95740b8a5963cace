"""Scalar special functions for the kernels (scalar tier, inlined, branch-free).

Every function computes all of its regions and selects the result with ``a if c else b``
(a masked blend once inlined into a loop); none calls libm, so a loop over them
vectorises.  Float->int conversion and 2**n are done by bit casts and integer arithmetic
(``_intrinsics``), which vectorise on any x86-64, with or without AVX-512.

Accuracy, asserted by tests/test_special.py against mpmath at 50 digits (measured peak on
the reference table in brackets).  Where the true result is subnormal, relative error is
meaningless and the bound is absolute, in units of the smallest subnormal 2**-1074.

================  ================================  ==========================================
function          range                             bound [measured]
================  ================================  ==========================================
exp               [-745.13, 709.78]                 <= 1 ulp [0.59; subnormal results 0.72]
log               every positive double             <= 1 ulp [0.66; subnormal inputs 0.50]
erfc              [-6, 26.55] (normal result)       <= 2e-15 relative [5.6e-16]
                  (26.55, 27.3] (subnormal)         <= 4 * 2**-1074 [0.58]; 0 beyond
erfcx             [-26.628, 2.5e307]                <= 2e-15 relative [7.8e-16]
                  up to the largest double          subnormal result, <= 4 * 2**-1074 [0.52]
erfcx_pos         [0, 2.5e307] (as erfcx, no exp)   <= 2e-15 relative [7.8e-16]
erfcx_pos_approx  [0, 2.5e307] (guesses only)       <= 1e-7 relative [8.7e-8]
exp_approx        [-700, 700] (guesses only)        <= 1e-8 relative [7.0e-9]
log_approx        positive normal (guesses only)    <= 1e-9 absolute [7.1e-10]
norm_cdf          [-37.5, 8.3] (normal result)      <= 2e-15 relative [7.4e-16]
                  [-38.5, -37.5] (subnormal)        <= 4 * 2**-1074 [0.90]
norm_pdf          [-37.5, 37.5] (normal result)     <= 2e-15 relative [3.8e-16]
================  ================================  ==========================================

Special values: NaN in -> NaN out everywhere.  exp(+inf) = inf, exp(-inf) = 0,
overflow -> inf, underflow -> 0 (gradually, through the subnormals).  log(+-0) = -inf,
log(x < 0) = NaN, log(inf) = inf.  erfc(-inf) = 2, erfc(inf) = 0; erfcx(inf) = 0,
erfcx(x) = inf for x < -26.63 (overflow); norm_cdf(-inf) = 0, norm_cdf(inf) = 1;
norm_pdf(+-inf) = 0.  -0.0 behaves as 0.0 (exp, erfc, erfcx, norm_cdf, norm_pdf) and
log(-0.0) = -inf.
"""

import math
import struct

from ._intrinsics import f64_as_i64, fma, i64_as_f64
from ._jit import scalar

# Shared constants of the kernel, defined once (the other modules import them)
INF = math.inf
NAN = math.nan
SQRT1_2 = 0.7071067811865476      # 1/sqrt(2)
SQRT2PI = 2.5066282746310002      # sqrt(2 pi)
INV_SQRT2PI = 0.3989422804014327  # 1/sqrt(2 pi)
SQRT_PI_2 = 1.2533141373155003    # sqrt(pi/2)
LN2 = 0.6931471805599453
_INV_SQRT_PI = 0.5641895835477563

# 1.5 * 2**52: adding it rounds a float64 of magnitude < 2**51 to an integer n, and the
# bits of the sum are then bits(_SHIFT) + n.  This replaces float<->int64 conversions.
_SHIFT = 6755399441055744.0
_SHIFT_BITS = struct.unpack("<q", struct.pack("<d", _SHIFT))[0]


# ---------------------------------------------------------------------------------------
# exp: Cody-Waite reduction x = n ln2 + r, |r| <= ln2/2, with ln2 split in a 32-bit head
# (so n*_LN2_HI is exact for |n| < 2**21) and a tail; r is carried as r + rl.  exp(r) by
# its Taylor polynomial of degree 13 (truncation < 0.05 ulp), summed as (1 + r) + tail
# with the rounding error of 1 + r recovered, so the result is within ~0.55 ulp.  2**n is
# applied as two factors 2**(n//2) * 2**(n - n//2) so that results near overflow and in
# the subnormal range are formed by a single final rounding.
# ---------------------------------------------------------------------------------------
_LOG2E = 1.4426950408889634
_LN2_HI = 6.93147180369123816490e-01    # 0x3fe62e42fee00000 (fdlibm)
_LN2_LO = 1.90821492927058770002e-10    # 0x3dea39ef35793c76
_EXP_ARG_MAX = 710.0                    # exp(710) overflows; beyond it clamp
_EXP_ARG_MIN = -746.0                   # exp(-746) underflows to 0
_E2, _E3, _E4, _E5, _E6, _E7, _E8, _E9, _E10, _E11, _E12, _E13 = (
    1.0 / math.factorial(k) for k in range(2, 14))


@scalar
def _exp_parts(x):
    """(e, s1, s2) with e**x = (e * s1) * s2, for x already clamped to [-746, 710]."""
    t = fma(x, _LOG2E, _SHIFT)
    n = t - _SHIFT
    ni = f64_as_i64(t) - _SHIFT_BITS
    rh = fma(-n, _LN2_HI, x)              # exact
    r = fma(-n, _LN2_LO, rh)
    rl = fma(-n, _LN2_LO, rh - r)         # what r lost: r + rl = x - n ln2 to ~2**-76
    q = _E13 * r + _E12
    q = q * r + _E11
    q = q * r + _E10
    q = q * r + _E9
    q = q * r + _E8
    q = q * r + _E7
    q = q * r + _E6
    q = q * r + _E5
    q = q * r + _E4
    q = q * r + _E3
    q = q * r + _E2
    hi = 1.0 + r
    lo = (1.0 - hi) + r                   # exact error of 1 + r (|r| < 1)
    e = hi + (lo + (r * r * q + (rl * r + rl)))
    n1 = ni >> 1
    n2 = ni - n1
    s1 = i64_as_f64((n1 + 1023) << 52)
    s2 = i64_as_f64((n2 + 1023) << 52)
    return e, s1, s2


@scalar
def _exp_raw(x):
    """e**x for x already clamped to [-746, 710] (or NaN)."""
    e, s1, s2 = _exp_parts(x)
    return (e * s1) * s2


@scalar
def exp_mul(x, m):
    """m e**x for x in [-745, 0] and m > 0 (NaN -> NaN), rounded into the subnormals once:
    e**x below 2**-1022 loses digits, m e**x need not (m >= 1 large enough).  The second
    power-of-two factor of e**x is applied last; <= 1.5 ulp while the result is normal."""
    xc = _EXP_ARG_MIN if x < _EXP_ARG_MIN else x
    e, s1, s2 = _exp_parts(xc)
    return ((e * s1) * m) * s2


@scalar
def exp(x):
    """e**x, <= 1 ulp on [-745.13, 709.78]; overflow -> inf, underflow -> 0."""
    xc = _EXP_ARG_MAX if x > _EXP_ARG_MAX else x
    xc = _EXP_ARG_MIN if xc < _EXP_ARG_MIN else xc
    return _exp_raw(xc)


_EXPA_MAX = 700.0                       # 2**n stays one normal factor


@scalar
def exp_approx(x):
    """e**x to <= 1e-8 relative for |x| <= 700, for initial guesses only: the same
    Cody-Waite reduction as ``exp`` with a degree-7 Taylor polynomial (truncation 5.3e-9)
    and no error-free tail, 2**n as one factor.  Arguments beyond +-700 are clamped there
    (so the result is e**+-700, not inf or 0); NaN -> NaN."""
    xc = _EXPA_MAX if x > _EXPA_MAX else x
    xc = -_EXPA_MAX if xc < -_EXPA_MAX else xc
    t = fma(xc, _LOG2E, _SHIFT)
    n = t - _SHIFT
    ni = f64_as_i64(t) - _SHIFT_BITS
    r = fma(-n, _LN2_LO, fma(-n, _LN2_HI, xc))
    q = _E7 * r + _E6
    q = q * r + _E5
    q = q * r + _E4
    q = q * r + _E3
    q = q * r + _E2
    q = q * r + 1.0
    q = q * r + 1.0
    return q * i64_as_f64((ni + 1023) << 52)


# ---------------------------------------------------------------------------------------
# log: fdlibm / musl e_log.c.  x = 2**k (1 + f) with sqrt(2)/2 <= 1 + f < sqrt(2), found by
# integer arithmetic on the bits (subnormals are first scaled by 2**54);
# s = f / (2 + f), log(1 + f) = f - hfsq + s (hfsq + R(s**2)), R a minimax polynomial.
# ---------------------------------------------------------------------------------------
_LG1 = 6.666666666666735130e-01  # 3FE55555 55555593
_LG2 = 3.999999999940941908e-01  # 3FD99999 9997FA04
_LG3 = 2.857142874366239149e-01  # 3FD24924 94229359
_LG4 = 2.222219843214978396e-01  # 3FCC71C5 1D8E78AF
_LG5 = 1.818357216161805012e-01  # 3FC74664 96CB03DE
_LG6 = 1.531383769920937332e-01  # 3FC39A09 D078C69F
_LG7 = 1.479819860511658591e-01  # 3FC2F112 DF3E5244
_TWO54 = 18014398509481984.0
_DBL_MIN = 2.2250738585072014e-308
_BITS_SQRT1_2 = 0x3fe6a09e667f3bcd
_ONE_MINUS_SQRT1_2_BITS = 0x3ff0000000000000 - _BITS_SQRT1_2
_MANT_MASK = 0x000fffffffffffff


@scalar
def log(x):
    """Natural logarithm, <= 1 ulp for every positive double (normal or subnormal);
    log(+-0) = -inf, log(x < 0) = NaN, log(inf) = inf, log(NaN) = NaN."""
    sub = x < _DBL_MIN
    xs = x * _TWO54 if sub else x
    ix = f64_as_i64(xs) + _ONE_MINUS_SQRT1_2_BITS
    k = (ix >> 52) - (1023 + 54 if sub else 1023)
    m = i64_as_f64((ix & _MANT_MASK) + _BITS_SQRT1_2)
    f = m - 1.0
    dk = i64_as_f64(k + _SHIFT_BITS) - _SHIFT
    hfsq = 0.5 * f * f
    s = f / (2.0 + f)
    z = s * s
    w = z * z
    t1 = w * (_LG2 + w * (_LG4 + w * _LG6))
    t2 = z * (_LG1 + w * (_LG3 + w * (_LG5 + w * _LG7)))
    R = t2 + t1
    res = s * (hfsq + R) + dk * _LN2_LO - hfsq + f + dk * _LN2_HI
    res = res if x < INF else x          # +inf -> inf, NaN -> NaN
    res = -INF if x == 0.0 else res
    res = NAN if x < 0.0 else res
    return res


@scalar
def log_approx(x):
    """Natural logarithm to <= 1e-9 absolute for positive normal x, for initial guesses and
    first iterations only: the reduction of ``log``, then 2 atanh(s) by its series to s^9
    (|s| <= 0.172, truncation 7e-10) without the error-free recombination.  NaN outside
    (0, inf) and for NaN; subnormal arguments (not scaled first) give inaccurate values."""
    ix = f64_as_i64(x) + _ONE_MINUS_SQRT1_2_BITS
    k = (ix >> 52) - 1023
    m = i64_as_f64((ix & _MANT_MASK) + _BITS_SQRT1_2)
    f = m - 1.0
    dk = i64_as_f64(k + _SHIFT_BITS) - _SHIFT
    s = f / (2.0 + f)
    z = s * s
    q = z * (1.0 / 9.0) + (1.0 / 7.0)
    q = q * z + (1.0 / 5.0)
    q = q * z + (1.0 / 3.0)
    q = q * z + 1.0
    res = fma(dk, _LN2_HI + _LN2_LO, 2.0 * s * q)
    return res if (x > 0.0 and x < INF) else NAN


# ---------------------------------------------------------------------------------------
# erfc / erfcx / Phi: W. J. Cody, "Rational Chebyshev approximations for the error
# function", Math. Comp. 23 (1969) 631-637, coefficients of his CALERF routine (netlib
# specfun).  Regions on y = |x|:
#   1. y <= 0.46875:      erf(x) = x P1(x^2) / Q1(x^2)
#   2. 0.46875 < y <= 4:  erfcx(y) = P2(y) / Q2(y)
#   3. y > 4:             erfcx(y) = (1/sqrt(pi) - z P3(z) / Q3(z)) / y,  z = 1/y^2
# All regions are evaluated and the numerator/denominator pair selected, so one division
# serves them all.  Region 3 is rewritten in w = y^2 (multiply through by w^6) to avoid
# the division 1/y^2; for y > 1e8 (where w^6 would overflow and the correction is below
# 1e-16 relative) erfcx(y) = 1/(sqrt(pi) y).
#
# CALERF forms exp(-y^2) as exp(-a^2) exp(-(y-a)(y+a)) with a = y rounded to 1/16, since
# exp(-fl(y*y)) is wrong by y^2 * 2**-53 relative (8e-14 at y = 27).  Here y^2 = hi + lo
# exactly (a real FMA gives lo), and exp(-y^2) = exp(-hi) (1 - lo): one exp.
# ---------------------------------------------------------------------------------------
_A1, _A2, _A3, _A4, _A5 = (3.16112374387056560e00, 1.13864154151050156e02,
                           3.77485237685302021e02, 3.20937758913846947e03,
                           1.85777706184603153e-1)
_B1, _B2, _B3, _B4 = (2.36012909523441209e01, 2.44024637934444173e02,
                      1.28261652607737228e03, 2.84423683343917062e03)
_C1, _C2, _C3, _C4, _C5, _C6, _C7, _C8, _C9 = (
    5.64188496988670089e-1, 8.88314979438837594e00, 6.61191906371416295e01,
    2.98635138197400131e02, 8.81952221241769090e02, 1.71204761263407058e03,
    2.05107837782607147e03, 1.23033935479799725e03, 2.15311535474403846e-8)
_D1, _D2, _D3, _D4, _D5, _D6, _D7, _D8 = (
    1.57449261107098347e01, 1.17693950891312499e02, 5.37181101862009858e02,
    1.62138957456669019e03, 3.29079923573345963e03, 4.36261909014324716e03,
    3.43936767414372164e03, 1.23033935480374942e03)
_P1, _P2, _P3, _P4, _P5, _P6 = (3.05326634961232344e-1, 3.60344899949804439e-1,
                                1.25781726111229246e-1, 1.60837851487422766e-2,
                                6.58749161529837803e-4, 1.63153871373020978e-2)
_Q1, _Q2, _Q3, _Q4, _Q5 = (2.56852019228982242e00, 1.87295284992346047e00,
                           5.27905102951428412e-1, 6.05183413124413191e-2,
                           2.33520497626869185e-3)
_R1_MAX = 0.46875
_R2_MAX = 4.0
_R3_MAX = 1e8


@scalar
def _cody(x, y):
    """y = |x|.  Returns erfc(x) if y <= 0.46875, else erfcx(y); one division."""
    s = y * y
    # region 1, in s = x^2: erfc(x) = (Q1 - x P1) / Q1
    p1 = (((_A5 * s + _A1) * s + _A2) * s + _A3) * s + _A4
    q1 = (((s + _B1) * s + _B2) * s + _B3) * s + _B4
    num1 = q1 - x * p1
    # region 2, in y
    p2 = ((((((((_C9 * y + _C1) * y + _C2) * y + _C3) * y + _C4) * y + _C5) * y + _C6)
           * y + _C7) * y + _C8)
    q2 = (((((((y + _D1) * y + _D2) * y + _D3) * y + _D4) * y + _D5) * y + _D6) * y
          + _D7) * y + _D8
    # region 3, in w = y^2: z P3(z) / Q3(z) = p3 / (w q3), all terms positive
    p3 = ((((_P5 * s + _P4) * s + _P3) * s + _P2) * s + _P1) * s + _P6
    q3 = ((((_Q5 * s + _Q4) * s + _Q3) * s + _Q2) * s + _Q1) * s + 1.0
    wq3 = s * q3
    num3 = wq3 * _INV_SQRT_PI - p3
    den3 = y * wq3
    num = _INV_SQRT_PI if y > _R3_MAX else num3
    den = y if y > _R3_MAX else den3
    num = p2 if y <= _R2_MAX else num
    den = q2 if y <= _R2_MAX else den
    num = num1 if y <= _R1_MAX else num
    den = q1 if y <= _R1_MAX else den
    return num / den


@scalar
def _exp_sq(y, sign):
    """exp(sign * y*y) for y >= 0, sign = +-1 or +-0.5, with y*y split exactly."""
    hi = y * y
    lo = fma(y, y, -hi)
    return exp(sign * hi) * (1.0 + sign * lo)


@scalar
def erfc(x):
    """Complementary error function 1 - erf(x).

    <= 2e-15 relative on [-6, 26.55] (2.0 below -6); on (26.55, 27.3] the result is
    subnormal and the error is <= 4 * 2**-1074 absolute; 0 above.
    erfc(-inf) = 2, erfc(inf) = 0, erfc(NaN) = NaN.
    """
    y = abs(x)
    val = _cody(x, y)
    yc = 28.0 if y > 28.0 else y          # erfc(28) = 0; keeps inf out of the square
    t = val * _exp_sq(yc, -1.0)
    r = 2.0 - t if x < 0.0 else t
    return val if y <= _R1_MAX else r


# erfcx of a non-negative argument as one rational function P(y)/Q(y), degree 11 over 12
# (so it decays like 1/(sqrt(pi) y)), fitted to the relative error over [0, 1e8] by
# tests/fit_erfcx.py (Loeb's re-weighted least squares with mpmath; error of the exact
# coefficients ~5e-18).  Every coefficient is positive, so Horner's rule has no
# cancellation for y >= 0.  Beyond 1e8, erfcx(y) = 1/(sqrt(pi) y) to 5e-17 (and y^12
# would overflow).  No exponential, one division, 23 FMAs: about half of Cody's regions.
_XP = (1.0,
       2.5655049247102784,
       3.2586108048749622,
       2.666190646948703,
       1.5492642558480316,
       0.6686111115312033,
       0.21836250138788327,
       0.05400146400074677,
       0.00993574017828874,
       0.001301545958702712,
       0.0001101145710827634,
       4.618730084410358e-06)
_XQ = (1.0,
       3.6938840918057907,
       6.4267126597341475,
       6.976328011359525,
       5.273229356863728,
       2.930956767192206,
       1.2317966589658627,
       0.39574519044703754,
       0.09686447465309106,
       0.017708227438381744,
       0.0023110233895953444,
       0.00019517299555645316,
       8.186485924406298e-06)


@scalar
def erfcx_pos(y):
    """erfcx(y) for y >= 0, without an exponential: the rational function above (one
    division).  <= 2e-15 relative for 0 <= y <= 2.5e307 and subnormal beyond, as
    ``erfcx``; erfcx_pos(inf) = 0, NaN -> NaN.  Arguments a rounding error below 0
    (|y| < 1e-3) are still accurate; more negative ones are not (use ``erfcx``)."""
    big = y > _R3_MAX
    z = 0.0 if big else y                 # NaN stays NaN
    num = _XP[11] * z + _XP[10]
    num = num * z + _XP[9]
    num = num * z + _XP[8]
    num = num * z + _XP[7]
    num = num * z + _XP[6]
    num = num * z + _XP[5]
    num = num * z + _XP[4]
    num = num * z + _XP[3]
    num = num * z + _XP[2]
    num = num * z + _XP[1]
    num = num * z + _XP[0]
    den = _XQ[12] * z + _XQ[11]
    den = den * z + _XQ[10]
    den = den * z + _XQ[9]
    den = den * z + _XQ[8]
    den = den * z + _XQ[7]
    den = den * z + _XQ[6]
    den = den * z + _XQ[5]
    den = den * z + _XQ[4]
    den = den * z + _XQ[3]
    den = den * z + _XQ[2]
    den = den * z + _XQ[1]
    den = den * z + _XQ[0]
    num = _INV_SQRT_PI if big else num
    den = y if big else den
    return num / den


# Degree 4/5 fit of the same form (same script, ``--degree 4``): 8.7e-8 relative for the
# exact coefficients, for iterates that a later full-precision step polishes.
_XP4 = (1.0000000326096183, 1.334955898231351, 0.8367621377378686, 0.2808995257668356,
        0.0442078884929722)
_XQ4 = (1.0, 2.4633380568137206, 2.61629822521154, 1.5222339868298354,
        0.49788290560494325, 0.07835643541682451)


@scalar
def erfcx_pos_approx_parts(y):
    """(num, den) with erfcx(y) ~ num / den to <= 1e-7 relative, y >= 0 (see
    ``erfcx_pos_approx``), so that a caller combining two values needs one division.
    den <= 8e38 for y <= 1e8; beyond, (1/sqrt(pi), y)."""
    big = y > _R3_MAX
    z = 0.0 if big else y
    num = _XP4[4] * z + _XP4[3]
    num = num * z + _XP4[2]
    num = num * z + _XP4[1]
    num = num * z + _XP4[0]
    den = _XQ4[5] * z + _XQ4[4]
    den = den * z + _XQ4[3]
    den = den * z + _XQ4[2]
    den = den * z + _XQ4[1]
    den = den * z + _XQ4[0]
    num = _INV_SQRT_PI if big else num
    den = y if big else den
    return num, den


@scalar
def erfcx_pos_approx(y):
    """erfcx(y) for y >= 0 to <= 1e-7 relative (9 FMAs and a division instead of 23 and
    one): for initial guesses and first iterations, never for a result.  Its error is a
    smooth function of y (that of a near-minimax rational), so a difference of two values
    at nearby arguments keeps about the same relative accuracy.  0 at inf, NaN -> NaN."""
    num, den = erfcx_pos_approx_parts(y)
    return num / den


@scalar
def erfcx(x):
    """Scaled complementary error function exp(x^2) erfc(x).

    <= 2e-15 relative on [-26.628, 2.5e307]; above, up to the largest double, the result
    1/(sqrt(pi) x) is subnormal and the error is <= 4 * 2**-1074 absolute.
    For x < 0, erfcx(x) = 2 exp(x^2) - erfcx(-x), which overflows to inf below about
    -26.63.  erfcx(inf) = 0, erfcx(-inf) = inf.  Equal to ``erfcx_pos`` for x >= 0, bit
    for bit; only negative arguments need the exponential.  (Cody's regions, used by
    ``erfc`` and ``norm_cdf`` below, are not needed here.)
    """
    y = abs(x)
    val = erfcx_pos(y)
    yc = 27.0 if y > 27.0 else y          # exp(27^2) = inf already
    e = _exp_sq(yc, 1.0)
    return 2.0 * e - val if x < 0.0 else val


@scalar
def norm_cdf(x):
    """Standard normal cumulative distribution function Phi(x).

    <= 2e-15 relative on [-37.5, 8.3] (Phi(x) rounds to 1 above 8.3); between -38.5 and
    -37.5 the result is subnormal and the error is a few 2**-1074 absolute.

    0.5 erfc(-x/sqrt2) loses ~x^2 * 2**-53 relative in the left tail because x/sqrt2 is
    rounded and erfc is steep there.  Instead Phi(x) = erfcx(-x/sqrt2) exp(-x^2/2) / 2,
    where erfcx is flat (the rounding of x/sqrt2 costs ~1 ulp) and exp(-x^2/2) is formed
    from the exact square of x itself.  For x > 0.66, Phi = 1 - Phi(-x) in the same form.
    """
    u = -x * SQRT1_2
    y = abs(u)
    val = _cody(u, y)                     # erfc(u) if |u| <= 0.46875, else erfcx(|u|)
    ax = abs(x)
    xc = 40.0 if ax > 40.0 else ax        # Phi(-40) = 0; keeps inf out of the square
    t = 0.5 * val * _exp_sq(xc, -0.5)
    r = 1.0 - t if u < 0.0 else t
    return 0.5 * val if y <= _R1_MAX else r


@scalar
def norm_pdf(x):
    """Standard normal density phi(x) = exp(-x^2/2) / sqrt(2 pi), with x^2 split exactly;
    <= 2e-15 relative while the result is normal (|x| <= 37.5), 0 at +-inf."""
    ax = abs(x)
    xc = 40.0 if ax > 40.0 else ax
    return INV_SQRT2PI * _exp_sq(xc, -0.5)


@scalar
def two_prod(a, b):
    """(p, e) with p = fl(a*b) and p + e = a*b exactly (unless it under/overflows)."""
    p = a * b
    return p, fma(a, b, -p)
