"""The joint law-of-the-minimum fit: all per-factor ceiling curves chosen together.

A per-factor ceiling is the upper edge of the cloud of abundance along one factor. Where
another factor limits, the cloud never reaches that factor's own curve, so a curve fitted on
its own sits on the marginal edge rather than on the factor's ceiling, and the minimum of
such curves names the wrong limiting factor wherever two curves run close. The joint fit
instead chooses every curve ``f_k`` (each in its own basis) so that the combined ceiling

    c_i = max(0, min_k f_k(x_ik))

is the tau-quantile boundary of the abundance ``y_i``, i.e. it minimises the total check loss
``sum_i rho_tau(y_i - c_i)`` (Koenker & Bassett 1978, Econometrica 46:33-50) over the
coefficients of all curves at once.

Algorithm (annealed smoothing). The objective is neither convex nor smooth (the minimum, the
clip at zero and the kink of the check loss). It is replaced by a smooth surrogate with a
temperature ``T``:

- the minimum by the soft minimum ``-T log sum_k exp(-f_k / T)``, which is within
  ``T log K`` of it (common practice; e.g. Boyd & Vandenberghe 2004, Convex Optimization,
  sec. 3.1.5 for the log-sum-exp bound),
- the clip at zero by the softplus ``T log(1 + exp(c / T))``, within ``T log 2`` of it,
- the check loss by its Gaussian-kernel smoothing with bandwidth ``T``
  (:func:`ceiling.uncertainty.smoothed_check_loss`, Fernandes, Guerre & Horta 2021).

The surrogate is minimised with L-BFGS-B (scipy.optimize.minimize, exact gradient) along a
decreasing path of temperatures ``T = t * s`` for ``t`` in :data:`TEMPERATURES` and ``s`` the
tau-quantile of the transformed abundance, each stage starting where the one before stopped
(continuation: the high-temperature surfaces are smooth and nearly convex, the last is close
to the exact objective). The first start is the per-factor fits; further starts, seeded, scale
each curve's coefficients by random factors (1 + 0.1 N(0, 1)). The start with the lowest
exact check loss wins, and the per-factor fits are kept if no start improves on them, so the
joint objective never ends above where it began. Run time is bounded by
``starts * len(TEMPERATURES) * MAX_ITER`` gradient evaluations, each O(n K p).

The result is deterministic for a given seed. Diagnostics: the exact objective (mean check
loss) at the start and the end, the iterations, the share of points each factor limits and
the share of points above the combined ceiling (close to 1 - tau when the fit is a quantile
boundary).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.optimize import minimize
from scipy.special import logsumexp, ndtr

from .boundary import FactorCeiling, check_loss
from .kernels import forward_transform
from .uncertainty import smoothed_check_loss

__all__ = ["JointFit", "joint_fit", "TEMPERATURES", "MAX_ITER"]

TEMPERATURES = (0.3, 0.1, 0.03, 0.01)
MAX_ITER = 500
PERTURBATION = 0.1


@dataclass(frozen=True)
class JointFit:
    """Outcome of :func:`joint_fit`: coefficients per factor and the fit's diagnostics."""

    params: dict[str, np.ndarray]
    objective_start: float
    objective_end: float
    iterations: int
    starts: int
    best_start: int
    limiting_share: dict[str, float]
    share_above: float
    tau: float
    extra: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        return {
            "method": "joint",
            "objective_start": float(self.objective_start),
            "objective_end": float(self.objective_end),
            "iterations": int(self.iterations),
            "starts": int(self.starts),
            "best_start": int(self.best_start),
            "limiting_share": {k: float(v) for k, v in self.limiting_share.items()},
            "share_above": float(self.share_above),
            "expected_share_above": float(1.0 - self.tau),
        }


def _designs(factors: Sequence[FactorCeiling], values: Mapping[str, Any]) -> list[np.ndarray]:
    return [f.basis.design(f._x(np.asarray(values[f.factor], dtype=np.float64))) for f in factors]


def _hard(theta: np.ndarray, Xs: list[np.ndarray], cuts: np.ndarray, y: np.ndarray, tau: float):
    eta = np.stack([X @ b for X, b in zip(Xs, np.split(theta, cuts))])
    c = np.maximum(0.0, eta.min(axis=0))
    return float(np.mean(check_loss(y - c, tau))), c, np.argmin(eta, axis=0)


def _surrogate(theta: np.ndarray, Xs: list[np.ndarray], cuts: np.ndarray, y: np.ndarray,
               tau: float, T: float) -> tuple[float, np.ndarray]:
    """Smoothed objective (soft minimum, softplus, smoothed check loss) and its gradient."""
    eta = np.stack([X @ b for X, b in zip(Xs, np.split(theta, cuts))])
    a = -eta / T
    lse = logsumexp(a, axis=0)
    smin = -T * lse
    w = np.exp(a - lse)  # d softmin / d f_k
    z = smin / T
    c = T * np.logaddexp(0.0, z)
    dc = 0.5 * (1.0 + np.tanh(0.5 * z))  # logistic(z), overflow-free
    u = y - c
    loss = smoothed_check_loss(u, tau, T)
    dl = -(tau - ndtr(-u / T))  # d loss / d c
    g = np.concatenate([X.T @ (dl * dc * w[k]) for k, X in enumerate(Xs)])
    n = y.size
    return float(loss.sum() / n), g / n


def joint_fit(
    factors: Sequence[FactorCeiling],
    values: Mapping[str, Any],
    abundance: np.ndarray,
    *,
    tau: float,
    transform: str = "none",
    starts: int = 3,
    seed: int = 0,
    fixed: Sequence[str] = (),
) -> JointFit:
    """Fit the curves of ``factors`` together so that their minimum is the tau boundary.

    ``factors`` are per-factor fits (their bases and coefficients are the first start);
    ``values`` maps factor names to the values at the survey points; ``abundance`` is the
    abundance there (untransformed; ``transform`` is applied as in the per-factor fits).
    Points with a missing value are left out. Curves of the factors named in ``fixed`` (say,
    binned-maxima fits, which follow their own rule) take part in the minimum unchanged.
    """
    y_all = np.asarray(abundance, dtype=np.float64)
    cols = [np.asarray(values[f.factor], dtype=np.float64) for f in factors]
    ok = np.isfinite(y_all) & np.all(np.isfinite(np.stack(cols)), axis=0)
    y = forward_transform(y_all[ok], transform)
    Xs = _designs(factors, {f.factor: c[ok] for f, c in zip(factors, cols)})
    sizes = [X.shape[1] for X in Xs]
    cuts = np.cumsum(sizes)[:-1]
    theta0 = np.concatenate([np.asarray(f.params, dtype=np.float64) for f in factors])
    free = np.concatenate([np.full(n, f.factor not in fixed) for f, n in zip(factors, sizes)])
    bounds = [(None, None) if fr else (v, v) for fr, v in zip(free, theta0)]
    scale = float(np.quantile(y, tau)) if y.size else 1.0
    if not scale > 0:
        scale = float(np.max(np.abs(y))) or 1.0
    start_loss, _, _ = _hard(theta0, Xs, cuts, y, tau)
    best_loss, best_theta, best_start = start_loss, theta0, -1
    rng = np.random.default_rng(seed)
    iterations = 0
    if free.any() and y.size:
        for st in range(starts):
            theta = theta0.copy()
            if st:
                theta = np.where(free, theta * (1.0 + PERTURBATION * rng.standard_normal(theta.size)), theta)
            for t in TEMPERATURES:
                res = minimize(_surrogate, theta, args=(Xs, cuts, y, tau, t * scale), jac=True,
                               method="L-BFGS-B", bounds=bounds, options={"maxiter": MAX_ITER})
                iterations += int(res.nit)
                if np.all(np.isfinite(res.x)):
                    theta = res.x
            loss, _, _ = _hard(theta, Xs, cuts, y, tau)
            if loss < best_loss - 1e-12:
                best_loss, best_theta, best_start = loss, theta, st
    end_loss, c, lim = _hard(best_theta, Xs, cuts, y, tau)
    tol = 1e-9 * max(1.0, float(np.abs(c).max()) if c.size else 1.0)
    share = {f.factor: float(np.mean(lim == k)) if y.size else 0.0 for k, f in enumerate(factors)}
    params = {f.factor: b for f, b in zip(factors, np.split(best_theta, cuts))}
    return JointFit(
        params=params, objective_start=start_loss, objective_end=end_loss, iterations=iterations,
        starts=starts, best_start=best_start, limiting_share=share,
        share_above=float(np.mean(y > c + tol)) if y.size else float("nan"), tau=float(tau),
    )
