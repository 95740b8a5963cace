"""volsweep: option prices, implied volatilities and Greeks over Arrow tables.

Outputs are model values, not investment advice.
"""

from .api import greeks, implied_vol, price, sweep
from .backfill import backfill
from volsweep.kernel.greeks import GREEK_NAMES

from .warmup import warmup

__all__ = ["GREEK_NAMES", "backfill", "greeks", "implied_vol", "price", "sweep", "warmup"]
__version__ = "0.1.0"
