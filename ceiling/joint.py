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
from scipy.special import ndtr
from threadpoolctl import threadpool_limits

from .boundary import FactorCeiling, check_loss
from .boundary.shapes import ConcaveForm, concave_form
from .kernels import forward_transform

__all__ = ["JointFit", "joint_fit", "TEMPERATURES", "MAX_ITER"]

TEMPERATURES = (0.3, 0.1, 0.03, 0.01)
MAX_ITER = 500
PERTURBATION = 0.1
_INV_SQRT_2PI = 1.0 / np.sqrt(2.0 * np.pi)


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


def _forms(factors: Sequence[FactorCeiling], concave: bool, fixed: Sequence[str]) -> list[ConcaveForm]:
    """Each factor's parameterisation: concave (bounded) or its own basis (free)."""
    out = []
    for f in factors:
        form = concave_form(f.basis)
        if not concave or f.factor in fixed:
            form = ConcaveForm(f.basis, (None,) * f.basis.n_params, native=True)
        out.append(form)
    return out


def _hard(theta: np.ndarray, Xs: list[np.ndarray], cuts: np.ndarray, y: np.ndarray, tau: float):
    eta = np.stack([X @ b for X, b in zip(Xs, np.split(theta, cuts))])
    c = np.maximum(0.0, eta.min(axis=0))
    return float(np.mean(check_loss(y - c, tau))), c, np.argmin(eta, axis=0)


def _surrogate(theta: np.ndarray, Xs: list[np.ndarray], cuts: np.ndarray, y: np.ndarray,
               tau: float, T: float) -> tuple[float, np.ndarray]:
    """Smoothed objective (soft minimum, softplus, smoothed check loss) and its gradient."""
    eta = np.stack([X @ b for X, b in zip(Xs, np.split(theta, cuts))])
    a = eta * (-1.0 / T)
    top = a.max(axis=0)
    e = np.exp(a - top)
    tot = e.sum(axis=0)
    smin = -T * (top + np.log(tot))  # soft minimum: -T log sum_k exp(-f_k / T)
    w = e / tot  # d softmin / d f_k
    z = smin / T
    c = T * np.logaddexp(0.0, z)
    dc = 0.5 * (1.0 + np.tanh(0.5 * z))  # logistic(z), overflow-free
    u = y - c
    s = u / T
    phi_tail = ndtr(-s)
    loss = u * (tau - phi_tail) + T * np.exp(-0.5 * s * s) * _INV_SQRT_2PI  # smoothed check loss
    g_c = (phi_tail - tau) * dc  # d loss / d c, times d c / d softmin
    g = np.concatenate([X.T @ (g_c * w[k]) for k, X in enumerate(Xs)])
    n = y.size
    return float(loss.sum() / n), g / n


@dataclass(frozen=True)
class _Problem:
    """The data of one joint fit, in the solver's parameterisation."""

    Xs: list[np.ndarray]
    cuts: np.ndarray
    y: np.ndarray
    tau: float
    free: np.ndarray
    upper: np.ndarray
    bounds: list[tuple[float | None, float | None]]
    scale: float

    def hard(self, theta: np.ndarray):
        return _hard(theta, self.Xs, self.cuts, self.y, self.tau)


def _anneal(pb: _Problem, theta0: np.ndarray, *, starts: int, seed: int,
            temperatures: Sequence[float]) -> tuple[float, np.ndarray, int, int]:
    """Best (exact loss, coefficients, start, iterations) over the seeded starts."""
    best_loss, best_theta, best_start = pb.hard(theta0)[0], theta0, -1
    rng = np.random.default_rng(seed)
    iterations = 0
    if not (pb.free.any() and pb.y.size):
        return best_loss, best_theta, best_start, iterations
    for st in range(starts):
        theta = theta0.copy()
        if st:
            theta = np.where(pb.free, theta * (1.0 + PERTURBATION * rng.standard_normal(theta.size)), theta)
            theta = np.minimum(theta, pb.upper)
        for t in temperatures:
            res = minimize(_surrogate, theta, args=(pb.Xs, pb.cuts, pb.y, pb.tau, t * pb.scale), jac=True,
                           method="L-BFGS-B", bounds=pb.bounds, options={"maxiter": MAX_ITER})
            iterations += int(res.nit)
            if np.all(np.isfinite(res.x)):
                theta = res.x
        loss = pb.hard(theta)[0]
        if loss < best_loss - 1e-12:
            best_loss, best_theta, best_start = loss, theta, st
    return best_loss, best_theta, best_start, iterations


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
    concave: bool = False,
    temperatures: Sequence[float] = TEMPERATURES,
) -> JointFit:
    """Fit the curves of ``factors`` together so that their minimum is the tau boundary.

    ``factors`` are per-factor fits (their bases and coefficients are the first start);
    ``values`` maps factor names to the values at the survey points; ``abundance`` is the
    abundance there (untransformed; ``transform`` is applied as in the per-factor fits).
    Points with a missing value are left out. Curves of the factors named in ``fixed`` (say,
    binned-maxima fits, which follow their own rule) take part in the minimum unchanged.
    ``temperatures`` is the annealing path (warm starts near the answer may skip the first
    stages). With ``concave`` every other curve is kept concave (:mod:`ceiling.boundary.shapes`); a
    start that bends upward is first replaced by the nearest concave curve.
    """
    y_all = np.asarray(abundance, dtype=np.float64)
    cols = [np.asarray(values[f.factor], dtype=np.float64) for f in factors]
    ok = np.isfinite(y_all) & np.all(np.isfinite(np.stack(cols)), axis=0)
    y = forward_transform(y_all[ok], transform)
    forms = _forms(factors, concave, fixed)
    xs = [f._x(c[ok]) for f, c in zip(factors, cols)]
    Xs = [fm.design(x) for fm, x in zip(forms, xs)]
    sizes = [X.shape[1] for X in Xs]
    upper = np.array([np.inf if u is None else u for fm in forms for u in fm.upper])
    theta0 = np.minimum(np.concatenate([fm.nearest(np.asarray(f.params, dtype=np.float64), x)
                                        for fm, f, x in zip(forms, factors, xs)]), upper)
    free = np.concatenate([np.full(n, f.factor not in fixed) for f, n in zip(factors, sizes)])
    bounds = [(None, u if np.isfinite(u) else None) if fr else (v, v) for fr, v, u in zip(free, theta0, upper)]
    scale = float(np.quantile(y, tau)) if y.size else 1.0
    if not scale > 0:
        scale = float(np.max(np.abs(y))) if y.size and np.max(np.abs(y)) > 0 else 1.0
    pb = _Problem(Xs, np.cumsum(sizes)[:-1], y, float(tau), free, upper, bounds, scale)
    start_loss = pb.hard(theta0)[0]
    # BLAS on one thread: each iteration is a few small products, and a pool of BLAS threads
    # costs far more than it saves (measured: L-BFGS-B iterations 10 to 100 times slower on
    # two busy cores with OpenBLAS's default of one thread per core)
    with threadpool_limits(limits=1, user_api="blas"):
        _, best_theta, best_start, iterations = _anneal(pb, theta0, starts=starts, seed=seed,
                                                        temperatures=temperatures)
    end_loss, c, lim = pb.hard(best_theta)
    tol = 1e-9 * max(1.0, float(np.abs(c).max()) if c.size else 1.0)
    share = {f.factor: float(np.mean(lim == k)) if y.size else 0.0 for k, f in enumerate(factors)}
    params = {f.factor: fm.to_basis(b) for f, fm, b in zip(factors, forms, np.split(best_theta, pb.cuts))}
    return JointFit(
        params=params, objective_start=start_loss, objective_end=end_loss, iterations=iterations,
        starts=starts, best_start=best_start, limiting_share=share,
        share_above=float(np.mean(y > c + tol)) if y.size else float("nan"), tau=float(tau),
    )
