"""Raw SVI smiles (Gatheral's stochastic-volatility-inspired parametrisation).

Total implied variance at log-moneyness k = ln(K/F):

    w(k) = a + b * (rho * (k - m) + sqrt((k - m)**2 + sigma**2))

with b >= 0, |rho| < 1, sigma > 0.  Its minimum is a + b*sigma*sqrt(1 - rho**2) and its
wings grow linearly with slopes b*(1 - rho) (left) and b*(1 + rho) (right).
"""

import numpy as np


def total_variance(k, a, b, rho, m, sigma):
    """Raw SVI total variance w(k)."""
    x = k - m
    return a + b * (rho * x + np.sqrt(x * x + sigma * sigma))


def min_total_variance(a, b, rho, sigma):
    """The smallest value of w over all k: a + b*sigma*sqrt(1 - rho^2)."""
    return a + b * sigma * np.sqrt(1.0 - rho * rho)


def butterfly_density(k, a, b, rho, m, sigma):
    """Gatheral's g(k); a smile is free of butterfly arbitrage where g(k) >= 0.

    g(k) = (1 - k w'/(2w))^2 - (w'^2/4)(1/w + 1/4) + w''/2  (Gatheral and Jacquier, 2014).
    """
    x = k - m
    r = np.sqrt(x * x + sigma * sigma)
    w = a + b * (rho * x + r)
    w1 = b * (rho + x / r)
    w2 = b * sigma * sigma / (r * r * r)
    return (1.0 - k * w1 / (2.0 * w)) ** 2 - 0.25 * w1 * w1 * (1.0 / w + 0.25) + 0.5 * w2
