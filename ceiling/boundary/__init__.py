"""Upper-boundary fitting: response bases, the quantile layer, one factor's ceiling."""

from .bases import Basis, LinearBasis, QuadraticBasis, SplineBasis, basis_from_dict, make_basis
from .ceiling import FactorCeiling, fit_factor
from .diagnostics import LIMITING, NO_EDGE, NOT_TESTED, FactorDiagnostics
from .quantreg import QuantileFit, check_loss, quantile_fit

__all__ = [
    "Basis",
    "LinearBasis",
    "QuadraticBasis",
    "SplineBasis",
    "basis_from_dict",
    "make_basis",
    "FactorCeiling",
    "fit_factor",
    "FactorDiagnostics",
    "LIMITING",
    "NO_EDGE",
    "NOT_TESTED",
    "QuantileFit",
    "check_loss",
    "quantile_fit",
]
