"""volsweep: option prices, implied volatilities and Greeks over Arrow tables.

Outputs are model values, not investment advice.

The Arrow-facing modules are imported on first use (PEP 562), so that ``import
volsweep.kernel`` -- the numba kernels and their registry -- works without pyarrow.
"""

import importlib

__version__ = "0.1.0"

# public name -> module that defines it
_EXPORTS = {
    "price": "api", "implied_vol": "api", "greeks": "api", "sweep": "api",
    "prepare": "api", "backfill": "dask_backfill", "warmup": "loader",
    "fit_smiles": "smiles", "smile_vols": "smiles",
    "GREEK_NAMES": "kernel.greeks", "MODELS": "kernel.registry",
    "OPERATIONS": "kernel.registry",
    "OptionError": "_columns", "IgnoredInputWarning": "_columns",
    "position_greeks": "risk", "scenarios": "risk",
    "implied_forwards": "chains", "model_free_variance": "chains",
    "constant_maturity_variance": "chains", "term_history": "history_view",
}

__all__ = sorted(_EXPORTS)


def __getattr__(name):
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module 'volsweep' has no attribute {name!r}")
    value = getattr(importlib.import_module(f"{__name__}.{module}"), name)
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(__all__))
