"""ceiling: maximum potential abundance of species under climate scenarios.

Per-factor upper boundaries are fitted to survey abundance by high-quantile regression, combined
by the law of the minimum into a multi-factor ceiling, and projected onto present and future
climate grids. A ceiling is a potential upper limit, not a forecast of abundance.
"""

from importlib.metadata import PackageNotFoundError, version

from .numba_cache import configure_numba_cache

configure_numba_cache()  # before any kernel is compiled: the cache goes where the user can write

try:
    __version__ = version("ceiling")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.1.0"

# the public names are imported on first use, so that commands start without loading the
# fitting stack (statsmodels, scipy.stats) when they do not fit
_LAZY = {
    "FactorCeiling": "boundary", "fit_factor": "boundary", "quantile_fit": "boundary",
    "RunConfig": "config", "load_config": "config",
    "CeilingModel": "model", "FactorSpec": "model", "ModelSet": "model", "fit": "model", "load_model": "model",
    "load_models": "model",
}


def __getattr__(name: str):
    if name in _LAZY:
        import importlib

        value = getattr(importlib.import_module(f".{_LAZY[name]}", __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'ceiling' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(__all__)


__all__ = [
    "__version__",
    "CeilingModel",
    "FactorCeiling",
    "FactorSpec",
    "ModelSet",
    "RunConfig",
    "fit",
    "fit_factor",
    "load_config",
    "load_model",
    "load_models",
    "quantile_fit",
]
