"""ceiling: maximum potential abundance of species under climate scenarios.

Per-factor upper boundaries are fitted to survey abundance by high-quantile regression, combined
by the law of the minimum into a multi-factor ceiling, and projected onto present and future
climate grids. A ceiling is a potential upper limit, not a forecast of abundance.
"""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("ceiling")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.1.0"

from .boundary import FactorCeiling, fit_factor, quantile_fit  # noqa: E402
from .config import RunConfig, load_config  # noqa: E402
from .model import CeilingModel, FactorSpec, ModelSet, fit, load_model, load_models  # noqa: E402

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
