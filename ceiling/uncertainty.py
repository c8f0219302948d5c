"""Fit uncertainty of a ceiling model by the bootstrap, and the layers it yields.

Three pieces, all on plain NumPy arrays:

- :func:`bootstrap_model` resamples the survey (pairs bootstrap, or whole spatial blocks of
  survey points) and refits every per-factor ceiling on each resample with the basis held
  fixed, so that replicate coefficients are comparable with the fitted ones. It returns a copy
  of the model that carries the replicate coefficients (``CeilingModel.replicates``).
- :func:`replicate_ceilings` evaluates the combined ceiling of every replicate on a chunk of
  cells in one vectorised pass, with a replicate axis first.
- :func:`uncertainty_layers` reduces replicate ceilings to percentile bounds of the ceiling
  and of the change, and to the probabilities of release and of constraint.

Replicate fits of quantile ceilings use a smoothed quantile solver (see
:func:`smoothed_quantile_fit`): exact linear-programming quantile regression on every replicate
of a large survey is too slow, and the smoothed fit, shifted by the full-sample difference
between the exact and the smoothed fit, reproduces the exact replicate fits closely (the
agreement is measured in ``tests/test_uncertainty.py`` and ``bench/bootstrap_timing.py``).
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
from scipy.special import ndtr

from .boundary.bases import LinearBasis, QuadraticBasis
from .boundary.ceiling import FactorCeiling, _binned_maxima
from .boundary.quantreg import quantile_fit
from .config import MIN_REPLICATES
from .errors import CeilingWarning, ConfigError, FitError
from .kernels import (
    CONSTRAINT,
    NODATA_CODE,
    RELEASE,
    forward_transform,
    inverse_transform,
    zone_kernel,
)
from .model import CeilingModel

__all__ = [
    "MIN_REPLICATES",
    "SOLVER",
    "bootstrap_model",
    "bootstrap_counts",
    "counts_to_indices",
    "spatial_blocks",
    "residual_band",
    "SmoothedFit",
    "smoothed_check_loss",
    "smoothed_quantile_fit",
    "smoothing_bandwidth",
    "replicate_model",
    "replicate_ceilings",
    "uncertainty_layers",
    "chunk_uncertainty",
]

SOLVER = "smoothed-newton"
# bandwidth multiplier of smoothing_bandwidth
BANDWIDTH_FACTOR = 0.25
PAIRS, BLOCKS = "pairs", "spatial-blocks"

# Newton iterations of the smoothed solver: stop when no coefficient moves by more than
# STEP_TOL times the scale of the transformed abundance (warm starts converge in a handful)
MAX_NEWTON = 500
FIRST_NEWTON = 50
CONTINUATION_STAGES = 6
STEP_TOL = 1e-10
MAX_HALVINGS = 40
# replicates solved together are limited so that a batch's (replicates x points) work arrays
# stay near 32 MB each
BATCH_ELEMENTS = 4_000_000
# cells per slab of the replicate kernel: bounds its temporaries to (replicates x slab)
SLAB_CELLS = 16_384
# screening in the smoothed solver: points beyond SCREEN_K bandwidths of the boundary enter
# linearly (Phi(-8) < 1e-15); SCREEN_ROUNDS doublings of the margin before a full solve
SCREEN_K = 8.0
SCREEN_ROUNDS = 4
SCREEN_MIN_POINTS = 200
# fewer spatial blocks than this gives a coarse bootstrap distribution
FEW_BLOCKS = 10

_SQRT_2PI = math.sqrt(2.0 * math.pi)


# --------------------------------------------------------------------------------------------
# resampling


def spatial_blocks(x: np.ndarray, y: np.ndarray, block: float) -> np.ndarray:
    """Label of the ``block`` x ``block`` square (in the units of x and y) holding each point.

    Squares are aligned on the smallest x and y of the points; labels are 0..G-1 in the order
    of the (column, row) of the squares, counting only squares that hold points.
    """
    if not (isinstance(block, int | float) and math.isfinite(block) and block > 0):
        raise ConfigError(f"The 'block' size must be a positive number of map units; got {block!r}")
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    if x.shape != y.shape or x.ndim != 1:
        raise ValueError(f"x and y must be 1-D of the same length; got {x.shape} and {y.shape}")
    if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
        raise FitError("spatial blocks need finite survey coordinates; drop the points without coordinates")
    col = np.floor((x - x.min()) / block).astype(np.int64)
    row = np.floor((y - y.min()) / block).astype(np.int64)
    _, labels = np.unique(np.stack([col, row], axis=1), axis=0, return_inverse=True)
    return labels.reshape(-1).astype(np.int64)


def bootstrap_counts(
    n: int,
    replicates: int,
    *,
    seed: int = 0,
    blocks: np.ndarray | None = None,
) -> np.ndarray:
    """How often each of ``n`` points enters each bootstrap resample, shape (replicates, n).

    Without ``blocks`` each resample draws ``n`` points with replacement (pairs bootstrap).
    With ``blocks`` (a block label per point, as from :func:`spatial_blocks`) each resample
    draws as many blocks as there are, with replacement, and takes every point of a drawn
    block each time the block is drawn, so every point of a block has the same count (the
    resample size varies around ``n``). A fit on a resample equals the fit with these counts
    as case weights. The same seed gives the same counts.
    """
    rng = np.random.default_rng(seed)
    if blocks is None:
        draws = rng.integers(0, n, size=(replicates, n))
        offset = (np.arange(replicates, dtype=np.int64) * n)[:, None]
        return np.bincount((draws + offset).ravel(), minlength=replicates * n).reshape(replicates, n)
    labels = np.asarray(blocks, dtype=np.int64)
    if labels.shape != (n,):
        raise ValueError(f"blocks must hold one label per point ({n}); got shape {labels.shape}")
    g = int(labels.max()) + 1 if n else 0
    draws = rng.integers(0, g, size=(replicates, g))
    offset = (np.arange(replicates, dtype=np.int64) * g)[:, None]
    per_block = np.bincount((draws + offset).ravel(), minlength=replicates * g).reshape(replicates, g)
    return per_block[:, labels]


def counts_to_indices(counts: np.ndarray) -> np.ndarray:
    """The resample of one row of :func:`bootstrap_counts` as point indices (sorted)."""
    c = np.asarray(counts, dtype=np.int64)
    return np.repeat(np.arange(c.size), c)


# --------------------------------------------------------------------------------------------
# the smoothed quantile solver


def smoothed_check_loss(u: np.ndarray, tau: float, h: float) -> np.ndarray:
    """The check loss convolved with a Gaussian kernel of bandwidth ``h``.

    ``l_h(u) = E[rho_tau(u + h Z)]`` with Z standard normal, which in closed form is
    ``u * (tau - Phi(-u/h)) + h * phi(u/h)``; its derivative is ``tau - Phi(-u/h)`` and its
    second derivative ``phi(u/h) / h`` (Fernandes, Guerre & Horta 2021; He, Pan, Tan & Zhou
    2023). It is convex, smooth and within ``h * phi(0)`` of the check loss.
    """
    u = np.asarray(u, dtype=np.float64)
    s = u / h
    with np.errstate(over="ignore"):  # far from zero the kernel term is exactly 0
        bump = np.exp(-0.5 * s * s)
    return u * (tau - ndtr(-s)) + h * bump / _SQRT_2PI


def smoothing_bandwidth(n: int, p: int, band: float, factor: float | None = None) -> float:
    """Bandwidth of the smoothed check loss, in units of the (transformed) response.

    ``h = factor * band * max(((log n + p) / n) ** 0.4, 0.05)``: the rate in n and p and the
    floor of the default bandwidth documented with He, Pan, Tan & Zhou's (2023)
    implementation, which assumes errors of unit scale, times ``band``, the width of the band
    of residuals around the quantile that holds a share 1 - tau of the points
    (:func:`residual_band`), so the bandwidth follows the spread of the data near the
    boundary rather than their overall spread. ``factor`` (default ``BANDWIDTH_FACTOR``) was
    set by comparing bootstrap replicates with exact quantile regression on the same
    resamples (bench/bootstrap_timing.py).
    """
    f = BANDWIDTH_FACTOR if factor is None else float(factor)
    rate = max(((math.log(max(n, 2)) + p) / max(n, 1)) ** 0.4, 0.05)
    return f * float(band) * rate


def residual_band(residuals: np.ndarray, tau: float) -> float:
    """Width of the band of residuals around the tau-quantile holding a share 1 - tau of them.

    ``Q(tau + d) - Q(tau - d)`` with ``d = (1 - tau) / 2``, the empirical quantiles of the
    full-sample residuals (``d`` shrinks to fit below 1 and above 0). Divided by ``2 d`` it is
    the difference-quotient estimate of the sparsity 1/f at the quantile (Koenker 2005,
    Quantile Regression, sec. 3.4). Falls back to wider bands, then to 1, when it is zero.
    """
    r = np.asarray(residuals, dtype=np.float64)
    d = (1.0 - tau) / 2.0
    for widen in (1.0, 2.0, 4.0, 8.0):
        lo, hi = max(tau - widen * d, 0.0), min(tau + widen * d, 1.0)
        qlo, qhi = np.quantile(r, [lo, hi])
        if qhi > qlo:
            return float(qhi - qlo)
    spread = float(np.max(r) - np.min(r)) if r.size else 0.0
    return spread if spread > 0 else 1.0


@dataclass(frozen=True)
class SmoothedFit:
    """Result of :func:`smoothed_quantile_fit`."""

    params: np.ndarray  # (R, p)
    converged: np.ndarray  # (R,) bool
    iterations: int  # Newton iterations, summed over screening rounds and continuation stages
    near_share: float  # share of points kept in the Newton iterations after screening


def _newton(
    y: np.ndarray,
    X: np.ndarray,
    W: np.ndarray,
    beta: np.ndarray,
    tau: float,
    h: float,
    lin: np.ndarray,
    const: np.ndarray,
    step_tol: float,
    max_iter: int,
) -> tuple[np.ndarray, np.ndarray, int]:
    """Damped Newton on ``sum_i W_ri l_h(y_i - X_i b) + const_r - lin_r @ b`` for every row r."""
    n, p = X.shape
    R = W.shape[0]
    beta = beta.copy()
    XX = (X[:, :, None] * X[:, None, :]).reshape(n, p * p)
    done = np.zeros(R, dtype=bool)
    converged = np.zeros(R, dtype=bool)
    iterations = 0

    def objective(b: np.ndarray, rows: np.ndarray) -> np.ndarray:
        loss = smoothed_check_loss(y - b @ X.T, tau, h)
        return np.einsum("rn,rn->r", W[rows], loss) + const[rows] - np.einsum("rp,rp->r", lin[rows], b)

    for _ in range(max_iter):
        act = np.flatnonzero(~done)
        if act.size == 0:
            break
        iterations += 1
        b, w = beta[act], W[act]
        r = y - b @ X.T
        s = r / h
        grad = -(w * (tau - ndtr(-s))) @ X - lin[act]
        with np.errstate(over="ignore"):
            curv = (w * np.exp(-0.5 * s * s)) / (h * _SQRT_2PI)
        H = (curv @ XX).reshape(-1, p, p)
        # a tiny ridge keeps a resample with few points near the boundary solvable
        ridge = 1e-12 * np.trace(H, axis1=1, axis2=2) / p + 1e-300
        H = H + ridge[:, None, None] * np.eye(p)
        step = -np.linalg.solve(H, grad[:, :, None])[:, :, 0]
        f0 = np.einsum("rn,rn->r", w, smoothed_check_loss(r, tau, h)) + const[act] - np.einsum("rp,rp->r", lin[act], b)
        slope = np.einsum("rp,rp->r", grad, step)  # minus the squared Newton decrement
        # a negligible Newton step, or a predicted decrease below the rounding of the
        # objective: take the step (it is accurate there) and stop
        small = (np.max(np.abs(step), axis=1) <= step_tol) | (-slope <= 1e-13 * np.abs(f0))
        beta[act[small]] = b[small] + step[small]
        done[act[small]] = converged[act[small]] = True
        big = np.flatnonzero(~small)
        if big.size == 0:
            continue
        f0, slope = f0[big], slope[big]
        t = np.ones(big.size)
        pending = np.arange(big.size)
        for _halving in range(MAX_HALVINGS):
            trial = b[big[pending]] + t[pending, None] * step[big[pending]]
            ok = objective(trial, act[big[pending]]) <= f0[pending] + 1e-4 * t[pending] * slope[pending]
            beta[act[big[pending[ok]]]] = trial[ok]
            pending = pending[~ok]
            if pending.size == 0:
                break
            t[pending] *= 0.5
        # no step along the Newton direction lowers the objective although the predicted
        # decrease is not negligible: give up on this fit (reported as not converged)
        done[act[big[pending]]] = True
    return beta, converged, iterations


def _screened_solve(
    y: np.ndarray,
    X: np.ndarray,
    W: np.ndarray,
    beta0: np.ndarray,
    center: np.ndarray,
    tau: float,
    h: float,
    step_tol: float,
    max_iter: int,
    screen: bool,
) -> tuple[np.ndarray, np.ndarray, int, float]:
    """Newton fits of every row of ``W`` from ``beta0``, screening points by their residual at
    ``center``; returns (coefficients, converged, iterations, share of points kept)."""
    n, p = X.shape
    R = W.shape[0]
    beta = beta0.copy()
    if not screen or n <= SCREEN_MIN_POINTS:
        out, conv, it = _newton(y, X, W, beta, tau, h, np.zeros((R, p)), np.zeros(R), step_tol, max_iter)
        return out, conv, it, 1.0
    r0 = y - X @ center
    edge = SCREEN_K * h
    # the starts may lie away from the centre: widen the margin by a bound on how far they
    # move the residuals, sum_j max|X_.j| |b_j - center_j|
    xmax = np.max(np.abs(X), axis=0)
    margin = edge + (float(np.max(np.abs(beta0 - center) @ xmax)) if R else 0.0)
    todo = np.arange(R)
    out = np.empty((R, p))
    conv = np.zeros(R, dtype=bool)
    iterations = 0
    kept = 1.0
    for _round in range(SCREEN_ROUNDS + 1):
        last = _round == SCREEN_ROUNDS
        near = np.ones(n, dtype=bool) if last else np.abs(r0) < edge + margin
        if _round == 0:
            kept = float(near.mean())
        # far points: loss a_i * (y_i - X_i b) with a_i = tau above the boundary, tau - 1 below
        a = np.where(near, 0.0, tau - (r0 < 0))
        Wt = W if todo.size == R else W[todo]
        lin = Wt @ (a[:, None] * X)
        const = Wt @ (a * y)
        b, c, it = _newton(y[near], X[near], Wt[:, near], beta[todo], tau, h, lin, const, step_tol, max_iter)
        iterations += it
        out[todo], conv[todo] = b, c
        beta[todo] = b  # a fit solved again starts where it stopped
        if last:
            break
        # a screened point must still lie beyond the edge, on its side, at the solution. Its
        # residual moved by |X_i (b - center)| <= sum_j max|X_.j| |b_j - center_j|, so only
        # points with less slack than that bound need the exact check
        far = np.flatnonzero(~near)
        if far.size == 0:
            break
        slack = np.abs(r0[far]) - edge
        bound = np.abs(b - center) @ np.max(np.abs(X[far]), axis=0)
        close = far[slack <= bound.max()]
        bad = np.zeros(todo.size, dtype=bool)
        if close.size:
            side = np.where(r0[close] < 0, -1.0, 1.0)
            bad = (((y[close] - b @ X[close].T) * side) <= edge).any(axis=1)
        if not bad.any():
            break
        todo = todo[bad]
        margin *= 2.0
    return out, conv, iterations, kept


def smoothed_quantile_fit(
    y: np.ndarray,
    X: np.ndarray,
    tau: float,
    *,
    h: float,
    start: np.ndarray,
    weights: np.ndarray | None = None,
    step_tol: float | None = None,
    max_iter: int = MAX_NEWTON,
    screen: bool = True,
) -> SmoothedFit:
    """Minimise ``sum_i w_i l_h(y_i - X_i @ beta)`` for several weight vectors at once.

    ``weights`` has shape (R, n) (one row per fit, e.g. bootstrap counts) or is None (one fit
    with unit weights); ``start`` is the (p,) starting point shared by all fits, best near
    the solution (the exact fit of the full sample, say).

    Damped Newton: the gradient is ``-X' (w * (tau - Phi(-r/h)))`` and the Hessian
    ``X' diag(w phi(r/h) / h) X`` (both exact for the Gaussian-smoothed loss of
    :func:`smoothed_check_loss`); steps are halved until the objective falls by at least
    1e-4 of the predicted decrease (Armijo's rule), and a fit stops when no coefficient
    moves by more than ``step_tol`` (by default 1e-10 times the spread of ``y``) or the
    predicted decrease is below the rounding of the objective (Nocedal & Wright 2006,
    Numerical Optimization, ch. 3).

    Continuation: with a small ``h`` the loss is close to piecewise linear and Newton's
    method moves slowly from a start far from the solution (a resample of clustered data,
    say). A fit not converged after ``FIRST_NEWTON`` steps is therefore restarted along a
    path of bandwidths ``2**CONTINUATION_STAGES * h, ..., 2h, h``, each stage starting from
    the solution of the one before.

    Screening (``screen=True``): a point whose residual stays more than ``SCREEN_K * h``
    from zero on one side contributes a term linear in the coefficients (its loss there is
    the check loss to within 1e-14 of ``h``), so those points are summed once into a linear
    term and the Newton iterations run over the points near the boundary only. Points are
    screened by their residual at the start with a safety margin; at the end every fit is
    checked, and a fit for which a screened point came near the boundary is solved again
    with a doubled margin (in the end without screening), so screening changes the result
    only by rounding.
    """
    y = np.asarray(y, dtype=np.float64)
    X = np.asarray(X, dtype=np.float64)
    n, p = X.shape
    W = np.ones((1, n)) if weights is None else np.atleast_2d(np.asarray(weights, dtype=np.float64))
    R = W.shape[0]
    b0 = np.asarray(start, dtype=np.float64).reshape(p)
    if not (isinstance(h, int | float) and math.isfinite(h) and h > 0):
        raise ValueError(f"the bandwidth h must be a positive number; got {h!r}")
    if step_tol is None:
        spread = float(np.max(y) - np.min(y)) if y.size else 1.0
        step_tol = STEP_TOL * max(spread, 1e-300)
    out, conv, iterations, kept = _screened_solve(
        y, X, W, np.tile(b0, (R, 1)), b0, tau, h, step_tol, min(FIRST_NEWTON, max_iter), screen
    )
    hard = np.flatnonzero(~conv)
    if hard.size:
        bh = np.tile(b0, (hard.size, 1))
        hh = h * 2.0**CONTINUATION_STAGES
        while True:
            bh, ch, it, _ = _screened_solve(
                y, X, W[hard], bh, np.median(bh, axis=0), tau, hh, step_tol, max_iter, screen
            )
            iterations += it
            if hh <= h:
                break
            hh = max(h, hh / 2.0)
        out[hard], conv[hard] = bh, ch
    return SmoothedFit(out, conv, iterations, kept)


# --------------------------------------------------------------------------------------------
# bootstrap of a model


def _check_replicates(replicates: Any, where: str = "replicates") -> int:
    if isinstance(replicates, bool) or not isinstance(replicates, int | np.integer):
        raise ConfigError(f"The '{where}' parameter must be an integer; got {replicates!r}")
    if int(replicates) < MIN_REPLICATES:
        raise ConfigError(
            f"The '{where}' parameter is {replicates}: bounds need at least {MIN_REPLICATES} "
            "replicates; use 200 or more for 5-95% bounds"
        )
    return int(replicates)


def _binned_fit(x: np.ndarray, yt: np.ndarray, fc: FactorCeiling, bins: int) -> np.ndarray | None:
    xb, yb = _binned_maxima(x, yt, bins)
    if xb.size < fc.basis.n_params:
        return None
    coef, *_ = np.linalg.lstsq(fc.basis.design(xb), yb, rcond=None)
    return coef


def _bins_for(bins: Mapping[str, int] | int, factor: str) -> int:
    if isinstance(bins, Mapping):
        if factor not in bins:
            raise FitError(
                f"factor '{factor}' uses binned maxima but no bin count was given for it; pass "
                "bins={factor: n} with the bins of the fit"
            )
        return int(bins[factor])
    return int(bins)


def bootstrap_model(
    model: CeilingModel,
    samples: Any,
    *,
    replicates: int,
    seed: int = 0,
    block: float | None = None,
    bins: Mapping[str, int] | int = 10,
) -> CeilingModel:
    """A copy of ``model`` carrying ``replicates`` bootstrap refits of every factor's ceiling.

    ``samples`` must be the survey points the model was fitted to (a
    :class:`ceiling.samples.Samples`: ``abundance``, ``values``, and ``x``/``y`` in the survey
    CRS when ``block`` is set).

    Resampling. Each replicate is one resample of the survey points, shared by all factors so
    that the replicate keeps the joint fit of the factors. Without ``block``: ``n`` points
    drawn with replacement (pairs bootstrap; Efron & Tibshirani 1993, ch. 9). With ``block``:
    the survey is cut into ``block`` x ``block`` squares of the survey's coordinate units, and
    whole squares are drawn with replacement (as many draws as there are occupied squares),
    which keeps spatially clustered sites together (a cluster bootstrap; Davison & Hinkley
    1997, sec. 3.8). See :func:`bootstrap_counts`.

    Refits. Each factor keeps its fitted basis (centre, scale and knots), tau, transform and
    estimator; only the coefficients are refitted.

    - Quantile ceilings: the check loss is replaced by its convolution with a Gaussian kernel
      of bandwidth h (Fernandes, Guerre & Horta 2021, J. Bus. Econ. Stat. 39:678-695; He, Pan,
      Tan & Zhou 2023, J. Econometrics 232:367-388), a smooth convex loss minimised by damped
      Newton steps (:func:`smoothed_quantile_fit`), all replicates of a factor at once with the
      resample counts as case weights, warm-started from the full-sample fit; points far
      from the boundary are screened out of the iterations without changing the result.
      Bandwidth (:func:`smoothing_bandwidth`): ``h = 0.25 * w * max(((log n + p) / n) ** 0.4,
      0.05)``, with ``w`` the width of the band of full-sample residuals around the
      tau-quantile that holds a share 1 - tau of the points (:func:`residual_band`). The
      smoothed fit estimates the quantile coefficients up to a small smoothing bias that is
      nearly the same on every resample, so each replicate is stored as
      ``b_exact + (b_smooth* - b_smooth)``: the exact full-sample coefficients plus the
      replicate's departure from the full-sample smoothed fit. A replicate whose smoothed
      fit does not converge is refitted exactly (statsmodels QuantReg) instead; their number
      is kept as ``exact_fallbacks``. Measured against exact QuantReg on the same resamples
      (Engel data, tau 0.9; synthetic ceilings of 20,000 points, tau 0.95) the gap is about
      0.1 bootstrap standard deviations at the median and below 0.25 at the 90th percentile.
    - Binned-maxima ceilings: the binned maxima of the resample are refitted by least squares
      (``bins`` gives each such factor's bin count, as in the fit; the full-sample refit must
      reproduce the model's coefficients).

    The replicates are kept as ``model.replicates`` ({factor: (replicates, n_params)}) with
    the settings in ``model.bootstrap``. The same seed gives the same replicates.
    """
    B = _check_replicates(replicates)
    if block is not None and not (isinstance(block, int | float) and math.isfinite(block) and block > 0):
        raise ConfigError(f"The 'block' parameter must be a positive size in map units; got {block!r}")
    y = np.asarray(samples.abundance, dtype=np.float64)
    n = y.size
    if model.n_points and n != model.n_points:
        raise FitError(
            f"species '{model.species}': the model was fitted to {model.n_points} survey points "
            f"but {n} were given; bootstrap with the samples of the fit"
        )
    values = samples.values
    labels = None
    n_blocks = None
    if block is not None:
        labels = spatial_blocks(np.asarray(samples.x), np.asarray(samples.y), float(block))
        n_blocks = int(labels.max()) + 1
        if n_blocks < 2:
            raise FitError(
                f"species '{model.species}': bootstrap blocks of {block:g} map units put all "
                f"{n} survey points in one block; use a smaller fit.bootstrap_block"
            )
        if n_blocks < FEW_BLOCKS:
            warnings.warn(
                f"species '{model.species}': only {n_blocks} bootstrap blocks of {block:g} map "
                "units hold survey points; the bounds will be coarse (use smaller blocks)",
                CeilingWarning,
                stacklevel=2,
            )
    counts = bootstrap_counts(n, B, seed=seed, blocks=labels)
    coefs: dict[str, np.ndarray] = {}
    bandwidths: dict[str, float] = {}
    used_bins: dict[str, int] = {}
    exact_fallbacks = 0
    for fc in model.factors:
        if fc.factor not in values:
            raise FitError(
                f"species '{model.species}': factor '{fc.factor}' has no values in the samples; "
                f"they have {list(values.columns)}"
            )
        x = np.asarray(values[fc.factor], dtype=np.float64)
        ok = np.isfinite(x) & np.isfinite(y)
        x_ok, yt = x[ok], forward_transform(y[ok], fc.transform)
        w = counts if ok.all() else counts[:, ok]
        if fc.estimator == "binned":
            nb = _bins_for(bins, fc.factor)
            used_bins[fc.factor] = nb
            full = _binned_fit(x_ok, yt, fc, nb)
            if full is None or not np.allclose(full, fc.params, rtol=1e-7, atol=1e-9 * (1 + np.abs(fc.params).max())):
                raise FitError(
                    f"species '{model.species}' factor '{fc.factor}': {nb} bins do not reproduce "
                    "the fitted binned-maxima ceiling; pass the bins used in the fit"
                )
            out = np.empty((B, fc.basis.n_params))
            for b in range(B):
                idx = counts_to_indices(w[b])
                coef = _binned_fit(x_ok[idx], yt[idx], fc, nb)
                if coef is None:
                    raise FitError(
                        f"species '{model.species}' factor '{fc.factor}': a bootstrap resample "
                        f"leaves fewer than {fc.basis.n_params} bins with enough points; use "
                        "fewer bins for this factor"
                    )
                out[b] = coef
            coefs[fc.factor] = out
            continue
        X = fc.basis.design(x_ok)
        h = smoothing_bandwidth(x_ok.size, X.shape[1], residual_band(yt - X @ fc.params, fc.tau))
        bandwidths[fc.factor] = h
        first = smoothed_quantile_fit(yt, X, fc.tau, h=h, start=fc.params)
        full = first.params[0]
        out = np.empty((B, X.shape[1]))
        if not first.converged[0]:
            # without a converged full-sample smoothed fit there is nothing to centre on
            raise FitError(
                f"species '{model.species}' factor '{fc.factor}': the smoothed quantile fit for "
                "the bootstrap did not converge; check the factor's values"
            )
        per_batch = max(1, BATCH_ELEMENTS // max(x_ok.size, 1))
        for b0 in range(0, B, per_batch):
            rep = smoothed_quantile_fit(yt, X, fc.tau, h=h, start=full, weights=w[b0:b0 + per_batch])
            out[b0:b0 + per_batch] = fc.params + (rep.params - full)
            # a smoothed fit that did not converge is replaced by the exact fit of its resample
            for j in np.flatnonzero(~rep.converged):
                idx = counts_to_indices(w[b0 + j])
                out[b0 + j] = quantile_fit(yt[idx], X[idx], fc.tau, with_errors=False).params
                exact_fallbacks += 1
        coefs[fc.factor] = out
    if not all(np.all(np.isfinite(c)) for c in coefs.values()):
        raise FitError(f"species '{model.species}': a bootstrap refit gave non-finite coefficients")
    meta: dict[str, Any] = {
        "replicates": B,
        "seed": int(seed),
        "method": PAIRS if block is None else BLOCKS,
        "block": None if block is None else float(block),
        "blocks": n_blocks,
        "solver": SOLVER,
        "bandwidth": bandwidths,
        "bins": used_bins,
        "exact_fallbacks": exact_fallbacks,
    }
    return replace(model, replicates=coefs, bootstrap=meta)


# --------------------------------------------------------------------------------------------
# evaluating replicates


def _replicates_of(model: CeilingModel) -> Mapping[str, np.ndarray]:
    if not model.replicates:
        raise FitError(
            f"the model of '{model.species}' holds no bootstrap replicates; fit it with "
            "fit.bootstrap set (e.g. 200)"
        )
    return model.replicates


def replicate_model(model: CeilingModel, b: int) -> CeilingModel:
    """Replicate ``b`` as a model of its own (same bases, ranges and rules; no replicates)."""
    reps = _replicates_of(model)
    factors = tuple(replace(f, params=np.array(reps[f.factor][b], dtype=np.float64)) for f in model.factors)
    return replace(model, factors=factors, replicates=None, bootstrap=None)


def _replicate_predictor(f: FactorCeiling, x: np.ndarray, coef: np.ndarray) -> np.ndarray:
    """Every replicate's unclipped predictor of one factor, shape (R, m), for 1-D ``x``."""
    xs = f._x(x)  # the model's hold/extend rule
    if isinstance(f.basis, QuadraticBasis):
        # Horner's rule c0 + z * (c1 + z * c2), the floating-point operations of
        # QuadraticBasis.predictor in the same order (done in place to spare memory traffic)
        z = f.basis._z(xs)
        eta = np.multiply(coef[:, 2, np.newaxis], z)
        eta += coef[:, 1, np.newaxis]
        eta *= z
        eta += coef[:, 0, np.newaxis]
        return eta
    if isinstance(f.basis, LinearBasis):
        # c0 + c1 * z, as LinearBasis.predictor
        eta = np.multiply(coef[:, 1, np.newaxis], f.basis._z(xs))
        eta += coef[:, 0, np.newaxis]
        return eta
    return (f.basis.design(xs) @ coef.T).T


def replicate_ceilings(model: CeilingModel, values: Mapping[str, Any]) -> np.ndarray:
    """Every replicate's combined ceiling at the given factor values, shape (R, ...).

    ``values`` maps each factor name to an array (all of one shape, or broadcastable). The
    ceiling of replicate r is the law of the minimum over the factors of the replicate's
    per-factor ceilings, with the model's hold/extend rule and transform, as
    ``replicate_model(model, r).predict(values)`` gives. The running minimum is taken over
    the unclipped predictors and transformed back once; since clipping at zero and the back
    transforms are non-decreasing this is the same number as the minimum of the transformed
    ceilings. Work proceeds in slabs of cells; the result needs R x cells x 8 bytes.
    """
    reps = _replicates_of(model)
    cols = [model._column(values, f.factor) for f in model.factors]
    shape = np.broadcast_shapes(*(c.shape for c in cols))
    flat = [np.broadcast_to(c, shape).reshape(-1) for c in cols]
    R = next(iter(reps.values())).shape[0]
    m = int(np.prod(shape, dtype=np.int64))
    out = np.empty((R, m), dtype=np.float64)
    for s0 in range(0, m, SLAB_CELLS):
        sl = slice(s0, min(m, s0 + SLAB_CELLS))
        low = None
        for f, c in zip(model.factors, flat):
            eta = _replicate_predictor(f, c[sl], np.asarray(reps[f.factor], dtype=np.float64))
            low = eta if low is None else np.minimum(low, eta, out=low)  # NaN propagates
        out[:, sl] = inverse_transform(low, model.transform)
    return out.reshape((R, *shape))


def _check_levels(lower: float, upper: float) -> None:
    if not (0.0 <= lower < upper <= 100.0):
        raise ConfigError(
            f"percentile bounds must satisfy 0 <= lower < upper <= 100; got lower={lower!r}, "
            f"upper={upper!r} (5 and 95 are usual)"
        )


def uncertainty_layers(
    present_reps: np.ndarray,
    future_reps: np.ndarray | None = None,
    *,
    lower: float = 5.0,
    upper: float = 95.0,
    release: float = 0.10,
    constraint: float = 0.10,
    floor: float = 0.5,
    zero: float = 0.0,
) -> dict[str, np.ndarray]:
    """Percentile bounds and zone probabilities from replicate ceilings (replicate axis first).

    Returns float32 arrays of the cell shape:

    - ``present_low``, ``present_high``: the ``lower`` and ``upper`` percentiles of the
      present ceiling over replicates (numpy's default linear interpolation);
    and with ``future_reps``:
    - ``future_low``, ``future_high``: the same for the future ceiling;
    - ``change_low``, ``change_high``: the same for the change, future - present, taken
      replicate by replicate;
    - ``release_probability``, ``constraint_probability``: the share of replicates whose
      present and future ceilings make a release or a constraint by the rules of
      :func:`ceiling.kernels.zone_kernel` (both above ``zero``; change above
      ``max(release * present, floor)``, or below ``-max(constraint * present, floor)``).

    Cells where any replicate is NaN are NaN in every layer.
    """
    _check_levels(lower, upper)
    p = np.asarray(present_reps, dtype=np.float64)
    if p.ndim < 1 or p.shape[0] < 1:
        raise ValueError("present_reps needs a replicate axis first")
    q = np.array([lower, upper], dtype=np.float64)
    out: dict[str, np.ndarray] = {}
    p_bad = np.isnan(p).any(axis=0)

    def bounds(a: np.ndarray, bad: np.ndarray, name: str) -> None:
        # replicates last and sorted first: the same numbers, found faster
        srt = np.sort(np.moveaxis(a, 0, -1), axis=-1)
        lo, hi = np.percentile(srt, q, axis=-1)
        out[f"{name}_low"] = np.where(bad, np.nan, lo).astype(np.float32)
        out[f"{name}_high"] = np.where(bad, np.nan, hi).astype(np.float32)

    bounds(p, p_bad, "present")
    if future_reps is None:
        return out
    f = np.asarray(future_reps, dtype=np.float64)
    if f.shape != p.shape:
        raise ValueError(f"future_reps must have the shape of present_reps {p.shape}; got {f.shape}")
    bad = p_bad | np.isnan(f).any(axis=0)
    bounds(f, bad, "future")
    bounds(f - p, bad, "change")
    zones = zone_kernel(p, f, release=release, constraint=constraint, floor=floor, zero=zero)
    for key, code in (("release_probability", RELEASE), ("constraint_probability", CONSTRAINT)):
        share = np.mean(zones == code, axis=0)
        out[key] = np.where(bad | (zones == NODATA_CODE).any(axis=0), np.nan, share).astype(np.float32)
    return out


def chunk_uncertainty(
    model: CeilingModel,
    present: Mapping[str, Any],
    future: Mapping[str, Any] | None = None,
    *,
    lower: float = 5.0,
    upper: float = 95.0,
    release: float = 0.10,
    constraint: float = 0.10,
    floor: float = 0.5,
    zero: float = 0.0,
    slab: int | None = None,
) -> dict[str, np.ndarray]:
    """:func:`uncertainty_layers` of a chunk of factor values, slab by slab.

    The same layers as ``uncertainty_layers(replicate_ceilings(model, present),
    replicate_ceilings(model, future), ...)``, but the replicate ceilings are held for
    ``slab`` cells at a time (default ``SLAB_CELLS``), so memory stays near
    replicates x slab x 8 bytes (times a few) whatever the size of the chunk.
    """
    _check_levels(lower, upper)
    names = model.factor_names
    shape = np.broadcast_shapes(*(np.shape(model._column(present, k)) for k in names))
    if future is not None:
        fshape = np.broadcast_shapes(*(np.shape(model._column(future, k)) for k in names))
        if fshape != shape:
            raise ValueError(f"future values have shape {fshape}, present values {shape}; use one grid")
    flat_p = {k: np.broadcast_to(model._column(present, k), shape).reshape(-1) for k in names}
    flat_f = None if future is None else {
        k: np.broadcast_to(model._column(future, k), shape).reshape(-1) for k in names
    }
    m = int(np.prod(shape, dtype=np.int64))
    step = int(slab or SLAB_CELLS)
    out: dict[str, np.ndarray] = {}
    for s0 in range(0, m, step):
        sl = slice(s0, min(m, s0 + step))
        pr = replicate_ceilings(model, {k: v[sl] for k, v in flat_p.items()})
        fr = None if flat_f is None else replicate_ceilings(model, {k: v[sl] for k, v in flat_f.items()})
        part = uncertainty_layers(pr, fr, lower=lower, upper=upper, release=release,
                                  constraint=constraint, floor=floor, zero=zero)
        for key, arr in part.items():
            if key not in out:
                out[key] = np.empty(m, dtype=np.float32)
            out[key][sl] = arr
    if m == 0:  # an empty chunk: the layers, empty
        pr = np.empty((model.n_replicates, 0))
        out = uncertainty_layers(pr, None if future is None else pr)
    return {k: v.reshape(shape) for k, v in out.items()}
