"""The quantile-fitting layer under every ceiling: a thin, checked wrapper over statsmodels.

:func:`quantile_fit` accepts any ``tau`` in (0, 1) (ceilings themselves require (0.5, 1);
that rule lives in the ceiling API). It returns coefficients, standard errors and confidence
intervals from statsmodels' ``QuantReg`` and adds the check loss. Solver warnings become the
project's :class:`~ceiling.errors.ConvergenceWarning`.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from ..errors import ConfigError, ConvergenceWarning

__all__ = ["QuantileFit", "quantile_fit", "check_loss"]

MAX_ITER = 5000
P_TOL = 1e-8


def check_loss(residual: np.ndarray, tau: float) -> np.ndarray:
    """The pinball (check) loss rho_tau(u) = u * (tau - 1[u < 0]) (Koenker & Bassett 1978)."""
    u = np.asarray(residual, dtype=np.float64)
    return u * (tau - (u < 0))


@dataclass(frozen=True)
class QuantileFit:
    """Coefficients of one linear quantile regression and their uncertainty."""

    tau: float
    params: np.ndarray
    bse: np.ndarray
    conf_int: np.ndarray  # (p, 2) at the 95% level
    n: int
    loss: float  # mean check loss
    iterations: int

    def predict(self, X: np.ndarray) -> np.ndarray:
        return np.asarray(X, dtype=np.float64) @ self.params


def _check_tau(tau: float) -> None:
    if not (isinstance(tau, int | float) and 0.0 < float(tau) < 1.0):
        raise ConfigError(f"The 'tau' parameter must be in (0, 1); got {tau!r}")


def quantile_fit(
    y: np.ndarray,
    X: np.ndarray,
    tau: float,
    *,
    with_errors: bool = True,
    max_iter: int = MAX_ITER,
    p_tol: float = P_TOL,
    warn: bool = True,
) -> QuantileFit:
    """Fit the ``tau`` conditional quantile of ``y`` as ``X @ params``.

    ``X`` must already contain the intercept column. Standard errors use statsmodels'
    default robust (kernel, Hall-Sheather bandwidth) sandwich estimate; ``with_errors=False``
    skips them (as bootstrap replicates do) and fills NaN. ``warn=False`` keeps a solver that
    stops at ``max_iter`` quiet (bootstrap replicates count those instead of warning).
    """
    _check_tau(tau)
    y = np.asarray(y, dtype=np.float64)
    X = np.asarray(X, dtype=np.float64)
    if X.ndim != 2 or X.shape[0] != y.shape[0]:
        raise ValueError(f"X must be (n, p) with n = len(y) = {y.shape[0]}; got {X.shape}")
    # statsmodels is imported when fitting, not when the package is (projection start-up)
    from statsmodels.regression.quantile_regression import QuantReg
    from statsmodels.tools.sm_exceptions import ConvergenceWarning as SMConvergenceWarning
    from statsmodels.tools.sm_exceptions import IterationLimitWarning

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        res = QuantReg(y, X).fit(q=float(tau), max_iter=max_iter, p_tol=p_tol)
    for w in caught if warn else ():
        if issubclass(w.category, IterationLimitWarning | SMConvergenceWarning):
            warnings.warn(
                f"quantile fit at tau={tau} stopped after {max_iter} iterations without reaching "
                "its tolerance; the coefficients may be imprecise",
                ConvergenceWarning,
                stacklevel=2,
            )
    params = np.asarray(res.params, dtype=np.float64)
    if with_errors:
        bse = np.asarray(res.bse, dtype=np.float64)
        ci = np.asarray(res.conf_int(alpha=0.05), dtype=np.float64)
    else:
        bse = np.full_like(params, np.nan)
        ci = np.full((params.size, 2), np.nan)
    loss = float(np.mean(check_loss(y - X @ params, tau)))
    return QuantileFit(
        tau=float(tau),
        params=params,
        bse=bse,
        conf_int=ci,
        n=int(y.size),
        loss=loss,
        iterations=int(getattr(res, "iterations", -1) or -1),
    )
