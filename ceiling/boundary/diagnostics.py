"""Diagnostics of one fitted upper boundary.

- share of points above the ceiling (close to 1 - tau for a quantile fit; common practice),
- mean check loss and the Koenker-Machado pseudo-R1: 1 - V(fit) / V(intercept only), with V the
  summed check loss (Koenker & Machado 1999, JASA 94:1296-1310),
- where the ceiling peaks and where it is above zero over the observed range,
- the wedge test: a Wald test that the slope coefficients at tau equal those at the median, with
  the covariance of the difference from a seeded bootstrap: of points, or of whole spatial
  blocks of points when block labels are given (a cluster bootstrap, Davison & Hinkley 1997,
  sec. 3.8: sites of one cluster share their surroundings and are not independent evidence, and
  a pairs bootstrap of clustered sites understates the variance). Equal slopes mean the upper
  edge runs parallel to the centre of the cloud (no distinct upper edge); different slopes mean
  the spread of abundance changes with the factor, the wedge a limiting factor makes.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np

from .quantreg import check_loss, quantile_fit

__all__ = ["FactorDiagnostics", "pseudo_r1", "wedge_test", "LIMITING", "NO_EDGE", "NOT_TESTED"]

# bootstrap replicates only feed a covariance: statsmodels' default tolerances are enough
REPLICATE_MAX_ITER = 1000
REPLICATE_P_TOL = 1e-6

LIMITING = "acts as a limiting factor"
NO_EDGE = "no distinct upper edge"
NOT_TESTED = "not tested"


@dataclass(frozen=True)
class FactorDiagnostics:
    n: int
    share_above: float
    pinball_loss: float
    pseudo_r1: float
    peak_at: float
    peak_ceiling: float
    positive_from: float
    positive_to: float
    wedge_stat: float
    wedge_df: int
    wedge_p: float
    wedge_replicates: int
    verdict: str

    def to_dict(self) -> dict[str, Any]:
        return {k: (None if isinstance(v, float) and not np.isfinite(v) else v) for k, v in asdict(self).items()}

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> FactorDiagnostics:
        vals = {k: (np.nan if d.get(k) is None else d[k]) for k in cls.__dataclass_fields__}
        return cls(**vals)


def pseudo_r1(y: np.ndarray, fitted: np.ndarray, tau: float) -> float:
    """Koenker-Machado R1 = 1 - sum rho(y - fitted) / sum rho(y - q_tau(y))."""
    v_fit = float(np.sum(check_loss(y - fitted, tau)))
    # the intercept-only quantile fit is the sample tau-quantile (lower empirical quantile)
    q = np.quantile(y, tau, method="inverted_cdf")
    v_null = float(np.sum(check_loss(y - q, tau)))
    return 1.0 - v_fit / v_null if v_null > 0 else np.nan


def wedge_test(
    y: np.ndarray,
    X: np.ndarray,
    tau: float,
    *,
    replicates: int,
    seed: int,
    params_tau: np.ndarray | None = None,
    solver: str = "smoothed",
    blocks: np.ndarray | None = None,
) -> tuple[float, int, float]:
    """Wald test of equal slopes at ``tau`` and at 0.5; returns (statistic, df, p-value).

    The covariance of the slope differences comes from a seeded pairs bootstrap. With
    ``solver="smoothed"`` (default) every replicate is refitted at once by the smoothed
    quantile solver (:func:`ceiling.uncertainty.smoothed_quantile_fit`, case weights = resample
    counts), the replicate being the exact full-sample fit plus the smoothed fit's shift, as
    the model bootstrap does; a replicate whose smoothed fit does not converge is refitted
    exactly. ``solver="exact"`` refits every replicate with statsmodels' QuantReg. ``blocks``
    (labels 0..G-1, one per point) resamples whole blocks instead of points.
    """
    p = X.shape[1]
    dfree = p - 1
    if replicates < 2 or dfree < 1:
        return np.nan, dfree, np.nan
    b_tau = params_tau if params_tau is not None else quantile_fit(y, X, tau, with_errors=False).params
    b_med = quantile_fit(y, X, 0.5, with_errors=False).params
    diff = (b_tau - b_med)[1:]
    n = y.size
    from ..uncertainty import bootstrap_counts, counts_to_indices

    counts = bootstrap_counts(n, replicates, seed=seed, blocks=blocks)
    if solver == "exact":
        reps = np.empty((replicates, dfree))
        quick = {"with_errors": False, "max_iter": REPLICATE_MAX_ITER, "p_tol": REPLICATE_P_TOL, "warn": False}
        for b in range(replicates):
            idx = counts_to_indices(counts[b])
            yb, Xb = y[idx], X[idx]
            reps[b] = (quantile_fit(yb, Xb, tau, **quick).params - quantile_fit(yb, Xb, 0.5, **quick).params)[1:]
    else:
        reps = _smoothed_replicates(y, X, tau, b_tau, b_med, counts.astype(np.float64))
    cov = np.atleast_2d(np.cov(reps, rowvar=False))
    stat = float(diff @ np.linalg.pinv(cov) @ diff)
    from scipy import stats  # imported when testing, not at start-up

    return stat, dfree, float(stats.chi2.sf(stat, dfree))


def _smoothed_replicates(y: np.ndarray, X: np.ndarray, tau: float, b_tau: np.ndarray,
                         b_med: np.ndarray, counts: np.ndarray) -> np.ndarray:
    from ..uncertainty import counts_to_indices, residual_band, smoothed_quantile_fit, smoothing_bandwidth

    n, p = X.shape
    out = []
    for q, b_full in ((tau, b_tau), (0.5, b_med)):
        h = smoothing_bandwidth(n, p, residual_band(y - X @ b_full, q))
        first = smoothed_quantile_fit(y, X, q, h=h, start=b_full)
        full = first.params[0]
        rep = smoothed_quantile_fit(y, X, q, h=h, start=full, weights=counts)
        coef = b_full + (rep.params - full)
        for j in np.flatnonzero(~rep.converged):
            idx = counts_to_indices(counts[j].astype(np.int64))
            coef[j] = quantile_fit(y[idx], X[idx], q, with_errors=False, warn=False).params
        out.append(coef)
    return (out[0] - out[1])[:, 1:]


def shape_summary(
    ceiling_of: Callable[[np.ndarray], np.ndarray], lo: float, hi: float
) -> tuple[float, float, float, float]:
    """Peak location and value, and the span above zero, over ``[lo, hi]`` on a fine grid."""
    grid = np.linspace(lo, hi, 513)
    c = ceiling_of(grid)
    i = int(np.argmax(c))
    pos = grid[c > 0]
    if pos.size:
        return float(grid[i]), float(c[i]), float(pos.min()), float(pos.max())
    return float(grid[i]), float(c[i]), np.nan, np.nan
