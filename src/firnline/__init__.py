"""firnline: distributed surface mass balance of glacierised catchments.

From a DEM, glacier outlines and a daily station record, firnline maps the
annual, winter and summer balance of every cell and derives each glacier's
specific balance, ELA and AAR. Results are model estimates: see the caution in
the README.
"""

__version__ = "0.1.0"

from .config import Config, load_config  # noqa: E402


def __getattr__(name):
    # the model (numba, xarray, pandas) loads on first use, so `firnline --help` stays quick
    if name in ("run", "RunResult"):
        from . import model
        return getattr(model, name)
    raise AttributeError(f"module 'firnline' has no attribute {name!r}")


__all__ = ["Config", "RunResult", "load_config", "run", "__version__"]
