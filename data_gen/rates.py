"""A smooth zero-rate curve: Nelson-Siegel (1987), continuously compounded."""

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class NelsonSiegel:
    """r(T) = b0 + b1 (1 - e^{-x})/x + b2 ((1 - e^{-x})/x - e^{-x}),  x = T / tau."""

    b0: float = 0.036
    b1: float = -0.008
    b2: float = 0.012
    tau: float = 1.6

    def __call__(self, t):
        t = np.asarray(t, dtype=np.float64)
        x = np.maximum(t, 0.0) / self.tau
        # (1 - e^{-x})/x by -expm1(-x)/x, which tends to 1 at x -> 0; the x = 0 point
        # (expired rows) takes its limit.
        with np.errstate(invalid="ignore", divide="ignore"):
            f1 = np.where(x > 0.0, -np.expm1(-x) / x, 1.0)
        return self.b0 + self.b1 * f1 + self.b2 * (f1 - np.exp(-x))

    def shifted(self, parallel):
        return NelsonSiegel(self.b0 + parallel, self.b1, self.b2, self.tau)


def random_curve(rng):
    """A curve a few percent high, with a random level, slope and hump."""
    return NelsonSiegel(
        b0=float(rng.uniform(0.025, 0.05)),
        b1=float(rng.uniform(-0.015, 0.01)),
        b2=float(rng.uniform(-0.01, 0.02)),
        tau=float(rng.uniform(0.8, 3.0)),
    )
