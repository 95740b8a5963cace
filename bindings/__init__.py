"""volsweep: option prices, implied volatilities and Greeks over Arrow tables.

Outputs are model values, not investment advice.
"""

from .api import price

__all__ = ["price"]
__version__ = "0.1.0"
