"""The fictional listed universe: venue, underlyings, their vol surfaces, listed expiries.

Everything here is invented.  Tickers are built from syllables with a rare letter in the
third place (``KAQU``, ``TOXI``); any resemblance to a real listing is coincidental.
"""

from dataclasses import dataclass, replace

import numpy as np

from . import svi
from .rates import NelsonSiegel, random_curve

VENUE = "Halvern Bay Options Exchange"
VENUE_CODE = "HBOX"

_ONSETS = "BDFGHKLMNPRSTVW"
_VOWELS = "AEIOU"
_MIDDLES = "JQXZ"      # rare letters in the third place, to look unlike real listings
_CODAS = "LNRST"

# Strike range: +-4 standard deviations (ATM total vol) of log-moneyness around the
# forward, but never below 10% or above 300% of the forward (long-dated high-vol names
# would otherwise list strikes at 1000x the forward, which no venue does).
STRIKE_SDS = 4.0
K_LOG_LO = np.log(0.1)
K_LOG_HI = np.log(3.0)

# Wing slope cap for the total variance, b (1 + |rho|).  Lee's moment formula bounds the
# large-|k| slope of total variance by 2 (from memory); we keep well inside.
WING_SLOPE_CAP = 0.8


def ticker_pool(n=0):
    """Candidate tickers, sorted: consonant, vowel, one of J/Q/X/Z, vowel (``KAQU``);
    five-letter ones with a final consonant (``KAQUN``) only when more than the 1500
    four-letter codes are needed."""
    four = [a + v + c + w for a in _ONSETS for v in _VOWELS for c in _MIDDLES for w in _VOWELS]
    if n <= len(four):
        return sorted(four)
    return sorted(four + [t + e for t in four for e in _CODAS])


def make_tickers(n, rng):
    pool = ticker_pool(n)
    if n > len(pool):
        raise ValueError(f"at most {len(pool)} underlyings, asked for {n}")
    pick = rng.choice(len(pool), size=n, replace=False)
    return sorted(pool[i] for i in pick)


@dataclass(frozen=True)
class Universe:
    """Per-underlying parameters (arrays of length n), sorted by ticker."""

    tickers: tuple
    spot: np.ndarray
    div_yield: np.ndarray
    tier: np.ndarray          # 1 = most liquid (dailies, weeklies, long-dated), 3 = least
    has_long: np.ndarray      # lists 10y+ expiries
    vol_level: np.ndarray     # long-end ATM vol, 15%..80%
    vol_slope: np.ndarray     # short-end ATM vol = vol_level * (1 + vol_slope)
    vol_tau: np.ndarray       # years over which the short-end premium decays
    rho: np.ndarray           # SVI correlation (skew), negative for most names
    smile_width: np.ndarray   # SVI sigma = smile_width * ATM total vol
    smile_curv: np.ndarray    # SVI b = smile_curv * w_atm / sigma (before caps)
    smile_shift: np.ndarray   # SVI m = smile_shift * ATM total vol
    liquidity: np.ndarray     # spread multiplier, 1 = typical
    curve: NelsonSiegel

    @property
    def n(self):
        return len(self.tickers)

    def with_state(self, spot, vol_level, curve):
        return replace(self, spot=spot, vol_level=vol_level, curve=curve)


def make_universe(n_underlyings=600, seed=0):
    """A seeded universe; depends only on (n_underlyings, seed)."""
    if n_underlyings < 1:
        raise ValueError("n_underlyings must be >= 1")
    rng = np.random.default_rng([int(seed), 0x554E4956])  # stream tag: "UNIV"
    n = int(n_underlyings)
    tickers = tuple(make_tickers(n, rng))
    spot = np.round(np.clip(np.exp(rng.normal(np.log(60.0), 1.0, n)), 1.5, 3000.0), 2)
    div_yield = np.where(rng.random(n) < 0.3, 0.0, np.round(rng.uniform(0.002, 0.06, n), 4))
    tier = rng.choice(np.array([1, 2, 3], dtype=np.int8), size=n, p=[0.1, 0.3, 0.6])
    has_long = (tier == 1) & (rng.random(n) < 0.5)
    vol_level = 0.15 + 0.65 * rng.random(n) ** 1.7
    vol_slope = rng.uniform(-0.25, 0.35, n)
    vol_tau = rng.uniform(0.15, 1.0, n)
    rho = np.where(rng.random(n) < 0.85, rng.uniform(-0.75, -0.25, n), rng.uniform(-0.2, 0.3, n))
    smile_width = rng.uniform(0.8, 1.6, n)
    smile_curv = rng.uniform(0.25, 0.55, n)
    smile_shift = rng.uniform(-0.1, 0.1, n)
    liquidity = np.exp(rng.normal(0.0, 0.3, n)) * np.array([0.0, 0.7, 1.0, 1.5])[tier]
    return Universe(tickers, spot, div_yield, tier, has_long, vol_level, vol_slope, vol_tau,
                    rho, smile_width, smile_curv, smile_shift, liquidity, random_curve(rng))


# ---------------------------------------------------------------- listed expiries

def _third_friday(year, month):
    first = np.datetime64(f"{year:04d}-{month:02d}-01", "D")
    weekday = (first.astype(np.int64) + 3) % 7      # 1970-01-01 was a Thursday; Monday = 0
    return first + np.timedelta64(int((4 - weekday) % 7) + 14, "D")


def listed_expiries(as_of_day):
    """Expiry days after ``as_of_day`` with the largest tier that lists each, and whether
    it is a 10y+ expiry (listed only on names with ``has_long``).

    Tier 1 lists 3 dailies, 8 weeklies, monthlies out to 24 months, quarterlies to 3y,
    Decembers to 5y, and 7y/10y/12y Decembers where ``has_long``.  Tier 2: 4 weeklies,
    monthlies to 9 months, quarterlies to 2y, Decembers to 3y.  Tier 3: monthlies to 3
    months, quarterlies to 1y, Decembers to 2y.
    """
    as_of_day = np.datetime64(as_of_day, "D")
    found = {}

    def add(day, tier_max, long=False):
        day = np.datetime64(day, "D")
        if day <= as_of_day:
            return
        old = found.get(day)
        if old is None:
            found[day] = (tier_max, long)
        else:
            found[day] = (max(old[0], tier_max), old[1] and long)

    for i in (1, 2, 3):
        add(np.busday_offset(as_of_day, i, roll="forward"), 1)
    weekday = int((as_of_day.astype(np.int64) + 3) % 7)
    next_friday = as_of_day + np.timedelta64((4 - weekday) % 7 or 7, "D")
    for i in range(8):
        add(next_friday + np.timedelta64(7 * i, "D"), 2 if i < 4 else 1)
    y0 = int(str(as_of_day)[:4])
    m0 = int(str(as_of_day)[5:7])
    for i in range(0, 40):
        y, m = y0 + (m0 - 1 + i) // 12, (m0 - 1 + i) % 12 + 1
        months_out = i
        if months_out <= 3:
            tier_max = 3
        elif months_out <= 9:
            tier_max = 2
        elif months_out <= 24:
            tier_max = 1
        else:
            tier_max = 0
        if m % 3 == 0:
            if months_out <= 12:
                tier_max = max(tier_max, 3)
            elif months_out <= 24:
                tier_max = max(tier_max, 2)
            elif months_out <= 36:
                tier_max = max(tier_max, 1)
        if tier_max:
            add(_third_friday(y, m), tier_max)
    for years in range(1, 6):
        add(_third_friday(y0 + years, 12), 3 if years <= 2 else 2 if years <= 3 else 1)
    for years in (7, 10, 12):
        add(_third_friday(y0 + years, 12), 1, long=True)

    days = np.array(sorted(found), dtype="datetime64[D]")
    tier_max = np.array([found[d][0] for d in days], dtype=np.int8)
    is_long = np.array([found[d][1] for d in days], dtype=bool)
    return days, tier_max, is_long


# ---------------------------------------------------------------- smiles

def atm_vol(universe, u, t):
    """ATM vol term structure of underlyings ``u`` at expiries ``t`` (years)."""
    lvl = universe.vol_level[u]
    return lvl * (1.0 + universe.vol_slope[u] * np.exp(-t / universe.vol_tau[u]))


def smile_params(universe, u, t):
    """Raw SVI parameters (a, b, rho, m, sigma) for underlyings ``u`` at expiries ``t``.

    Built from the ATM total variance w0: sigma and m scale with the ATM total vol
    sqrt(w0), so the smile has a similar shape in standard deviations at every expiry
    (and an ATM skew dsigma/dk falling like 1/sqrt(T)); b comes from the
    curvature parameter and then capped so that (i) the wing slope b(1+|rho|) stays below
    WING_SLOPE_CAP, (ii) the smile minimum stays >= 10% of w0, (iii) Gatheral's butterfly
    density g(k) is >= 0 on a wide k grid (b is shrunk where it is not); a is then set so
    that w(0) = w0 exactly.
    """
    u = np.asarray(u)
    t = np.asarray(t, dtype=np.float64)
    w0 = atm_vol(universe, u, t) ** 2 * t
    sd = np.sqrt(w0)
    rho = universe.rho[u]
    sig = universe.smile_width[u] * sd
    m = universe.smile_shift[u] * sd
    root = np.sqrt(m * m + sig * sig)
    # w(0) - min w = b * (root - rho m - sig sqrt(1-rho^2)) >= 0 (Cauchy-Schwarz).
    drop = np.maximum(root - rho * m - sig * np.sqrt(1.0 - rho * rho), 1e-300)
    b = universe.smile_curv[u] * w0 / sig
    b = np.minimum(b, WING_SLOPE_CAP / (1.0 + np.abs(rho)))
    b = np.minimum(b, 0.9 * w0 / drop)

    z = np.linspace(-8.0, 8.0, 65)
    kw = np.linspace(-3.0, 3.0, 31)
    for _ in range(30):
        a = w0 - b * (root - rho * m)
        k = np.concatenate([z[None, :] * sd[:, None], np.broadcast_to(kw, (len(t), kw.size))], axis=1)
        g = svi.butterfly_density(k, a[:, None], b[:, None], rho[:, None], m[:, None], sig[:, None])
        bad = ~(g.min(axis=1) >= 0.0)
        if not bad.any():
            break
        b = np.where(bad, 0.8 * b, b)
    a = w0 - b * (root - rho * m)
    return a, b, rho, m, sig
