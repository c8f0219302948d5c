"""A fused, single-pass kernel for the ceiling and the limiting factor of one model.

The reference implementation is :func:`ceiling.kernels.combine_minimum` applied to
:meth:`ceiling.model.CeilingModel.linear_predictors` (each factor's
:meth:`~ceiling.boundary.FactorCeiling.linear_predictor`): the law of the minimum as documented
there. This module computes the same two results cell by cell in one loop, without the
(K, ...) stacks of predictors, back-transformed ceilings and tie masks the reference builds.

Why one pass is enough: every back-transform (``none``, ``log1p``, ``sqrt``) is applied to the
predictor clipped at zero and is non-decreasing in it. The factor with the lowest unclipped
predictor therefore always attains the minimum ceiling, and among the factors tied at that
ceiling it has the lowest predictor, which is the documented tie rule. So the limiting factor
is the first factor (in model order) with the lowest unclipped predictor, and the ceiling is the
back-transform of that predictor clipped at zero. Where any factor's predictor is NaN the
ceiling is NaN and the code is 255, as in the reference.

Per factor, as in ``FactorCeiling``: ``hold`` clips the value to the observed range first,
``extend`` does not; ``z = (x - center) * (1 / scale)``; linear ``c0 + c1 z``; quadratic
``c0 + z (c1 + z c2)`` (Horner, the same operation order as the reference, so the predictors
agree to the last bit); natural cubic spline in the truncated-power form of
:class:`ceiling.boundary.bases.SplineBasis`.

The loop is compiled with numba when it is installed (``nogil``, so dask's threads run chunks
in parallel; ``cache=True`` keeps the compiled code between processes). Without numba the same
algorithm runs in NumPy over slices of cells, so temporaries stay bounded by the slice.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from .kernels import NODATA_CODE

__all__ = ["HAVE_NUMBA", "PackedModel", "pack", "qualifies", "ceiling_and_limiting", "evaluate"]

try:  # numba is a dependency, but the projection must still run without it
    import numba

    HAVE_NUMBA = True
except ImportError:  # pragma: no cover - exercised only where numba is missing
    numba = None
    HAVE_NUMBA = False

LINEAR, QUADRATIC, SPLINE = 0, 1, 2
_KINDS = {"linear": LINEAR, "quadratic": QUADRATIC, "spline": SPLINE}
_TRANSFORMS = {"none": 0, "log1p": 1, "sqrt": 2}
_SLICE = 65536  # cells per slice of the NumPy fallback


@dataclass(frozen=True)
class PackedModel:
    """A model's factors as flat arrays the kernel reads (one row per factor, model order)."""

    names: tuple[str, ...]
    kind: np.ndarray  # int64 (K,)
    center: np.ndarray  # float64 (K,)
    scale: np.ndarray  # float64 (K,)
    clip: np.ndarray  # bool (K,): True for 'hold'
    lo: np.ndarray  # float64 (K,): observed range
    hi: np.ndarray
    coef: np.ndarray  # float64 (K, P), zero-padded
    knots: np.ndarray  # float64 (K, Q): spline knots in z units, padded
    n_knots: np.ndarray  # int64 (K,)
    transform: int


def qualifies(model: Any) -> bool:
    """True when every factor's basis, transform and range rule is one the fast kernel knows."""
    try:
        if model.transform not in _TRANSFORMS or not model.factors:
            return False
        return all(f.basis.name in _KINDS and f.outside in ("hold", "extend") and f.transform == model.transform
                   for f in model.factors)
    except AttributeError:
        return False


def pack(model: Any) -> PackedModel:
    """Flatten a :class:`ceiling.model.CeilingModel` for the kernel (cached on the model)."""
    cached = getattr(model, "_packed_fast", None)
    if cached is not None:
        return cached
    fs = model.factors
    k = len(fs)
    p = max(len(f.params) for f in fs)
    q = max(max((len(getattr(f.basis, "knots", ())) for f in fs), default=0), 1)
    coef = np.zeros((k, p))
    knots = np.zeros((k, q))
    n_knots = np.zeros(k, dtype=np.int64)
    for i, f in enumerate(fs):
        coef[i, : len(f.params)] = np.asarray(f.params, dtype=np.float64)
        if f.basis.name == "spline":
            kz = (np.asarray(f.basis.knots, dtype=np.float64) - f.basis.center) / f.basis.scale
            knots[i, : kz.size] = kz
            n_knots[i] = kz.size
    packed = PackedModel(
        names=tuple(f.factor for f in fs),
        kind=np.array([_KINDS[f.basis.name] for f in fs], dtype=np.int64),
        center=np.array([f.basis.center for f in fs], dtype=np.float64),
        scale=np.array([f.basis.scale for f in fs], dtype=np.float64),
        clip=np.array([f.outside == "hold" for f in fs], dtype=np.bool_),
        lo=np.array([f.observed[0] for f in fs], dtype=np.float64),
        hi=np.array([f.observed[1] for f in fs], dtype=np.float64),
        coef=coef, knots=knots, n_knots=n_knots, transform=_TRANSFORMS[model.transform],
    )
    try:  # frozen dataclass: cache without changing its fields or equality
        object.__setattr__(model, "_packed_fast", packed)
    except (AttributeError, TypeError):
        pass
    return packed


def _predictor_scalar(x, j, kind, center, scale, clip, lo, hi, coef, knots, n_knots):
    """Unclipped predictor of factor ``j`` at one value (NaN stays NaN)."""
    if clip[j]:
        if x < lo[j]:
            x = lo[j]
        elif x > hi[j]:
            x = hi[j]
    z = (x - center[j]) * (1.0 / scale[j])
    kd = kind[j]
    if kd == LINEAR:
        return coef[j, 0] + coef[j, 1] * z
    if kd == QUADRATIC:
        return coef[j, 0] + z * (coef[j, 1] + z * coef[j, 2])
    m = n_knots[j]
    last = knots[j, m - 1]
    tl = z - last
    if tl < 0.0:
        tl = 0.0
    tl3 = tl * tl * tl
    eta = coef[j, 0] + coef[j, 1] * z
    if m > 2:
        kp = knots[j, m - 2]
        tp = z - kp
        if tp < 0.0:
            tp = 0.0
        d_last = (tp * tp * tp - tl3) / (last - kp)
        for i in range(m - 2):
            t = z - knots[j, i]
            if t < 0.0:
                t = 0.0
            eta += coef[j, i + 2] * ((t * t * t - tl3) / (last - knots[j, i]) - d_last)
    return eta


def _fold_factor(x, m, j, kind, center, scale, clip, lo, hi, coef, knots, n_knots, eb, best, arg, bad):
    """Fold factor ``j``'s predictor at the block's ``m`` values ``x`` into the running minimum
    ``best`` (its factor in ``arg``, NaN seen in ``bad``); the first factor starts it.

    Shared by this module's loop and the per-chunk loop of :mod:`ceiling.kernels_climate`.
    """
    # 'hold' clips to the observed range; 'extend' clips to (-inf, inf), which changes nothing;
    # NaN fails both comparisons and stays NaN
    lo_j = lo[j] if clip[j] else -np.inf
    hi_j = hi[j] if clip[j] else np.inf
    ce, isc = center[j], 1.0 / scale[j]
    c0, c1 = coef[j, 0], coef[j, 1]
    kd = kind[j]
    c2 = coef[j, 2] if kd == QUADRATIC else 0.0
    jj = np.float64(j)
    # the predictor of each cell folded at once into the running minimum (strict <: the first
    # factor wins ties); one tight loop per basis and for the first factor
    if kd == QUADRATIC and j == 0:
        for i in range(m):
            v = np.float64(x[i])
            v = lo_j if v < lo_j else v
            v = hi_j if v > hi_j else v
            z = (v - ce) * isc
            e = c0 + z * (c1 + z * c2)
            best[i] = e
            arg[i] = 0.0
            bad[i] = 1.0 if e != e else 0.0
        return
    if kd == QUADRATIC:
        for i in range(m):
            v = np.float64(x[i])
            v = lo_j if v < lo_j else v
            v = hi_j if v > hi_j else v
            z = (v - ce) * isc
            e = c0 + z * (c1 + z * c2)
            bad[i] = 1.0 if e != e else bad[i]
            lower = e < best[i]
            best[i] = e if lower else best[i]
            arg[i] = jj if lower else arg[i]
        return
    if kd == LINEAR:  # predictors of the block into eb, then the same fold
        for i in range(m):
            v = np.float64(x[i])
            v = lo_j if v < lo_j else v
            v = hi_j if v > hi_j else v
            eb[i] = c0 + c1 * ((v - ce) * isc)
    else:
        for i in range(m):
            eb[i] = predictor(np.float64(x[i]), j, kind, center, scale, clip, lo, hi, coef, knots, n_knots)
    if j == 0:
        for i in range(m):
            e = eb[i]
            best[i] = e
            arg[i] = 0.0
            bad[i] = 1.0 if e != e else 0.0
    else:
        for i in range(m):
            e = eb[i]
            bad[i] = 1.0 if e != e else bad[i]
            lower = e < best[i]
            best[i] = e if lower else best[i]
            arg[i] = jj if lower else arg[i]


_BLOCK = 2048  # cells per block of the compiled loop: the running minimum stays in the L1 cache


def _loop(xs, kind, center, scale, clip, lo, hi, coef, knots, n_knots, transform, out_c, out_code):
    n = out_c.shape[0]
    k = len(xs)
    # block scratch, all float64 so that the fold loop vectorises (the code and the NaN flag
    # are small whole numbers held as floats)
    eb = np.empty(_BLOCK)
    best = np.empty(_BLOCK)
    arg = np.empty(_BLOCK)
    bad = np.empty(_BLOCK)
    for b0 in range(0, n, _BLOCK):
        b1 = min(n, b0 + _BLOCK)
        m = b1 - b0
        for j in range(k):  # factor by factor over the block: branch-free inner loops
            fold_factor(xs[j][b0:b1], m, j, kind, center, scale, clip, lo, hi, coef, knots, n_knots, eb, best, arg, bad)
        oc = out_c[b0:b1]
        ok = out_code[b0:b1]
        # back to abundance units and out, one loop per transform
        if transform == 1:
            for i in range(m):
                e = best[i] if best[i] > 0.0 else 0.0
                oc[i] = np.nan if bad[i] != 0.0 else math.expm1(e)
                ok[i] = 255 if bad[i] != 0.0 else np.uint8(arg[i])
        elif transform == 2:
            for i in range(m):
                e = best[i] if best[i] > 0.0 else 0.0
                oc[i] = np.nan if bad[i] != 0.0 else e * e
                ok[i] = 255 if bad[i] != 0.0 else np.uint8(arg[i])
        else:
            for i in range(m):
                e = best[i] if best[i] > 0.0 else 0.0
                oc[i] = np.nan if bad[i] != 0.0 else e
                ok[i] = 255 if bad[i] != 0.0 else np.uint8(arg[i])


if HAVE_NUMBA:
    # error_model="numpy": no zero-division checks in the loops (scales are > 0), so they vectorise
    predictor = numba.njit(_predictor_scalar, nogil=True, cache=True, error_model="numpy")
    # inlined (numba IR level) into both loops, which keep their scratch arrays private
    fold_factor = numba.njit(_fold_factor, nogil=True, cache=True, error_model="numpy", inline="always")
    _fused = numba.njit(_loop, nogil=True, cache=True, error_model="numpy")
else:  # pragma: no cover
    predictor = _predictor_scalar
    _fused = None


def _predictor_numpy(x: np.ndarray, j: int, pm: PackedModel) -> np.ndarray:
    """The same predictor as :func:`_predictor_scalar`, over a slice of cells."""
    if pm.clip[j]:
        x = np.clip(x, pm.lo[j], pm.hi[j])
    z = (x - pm.center[j]) * (1.0 / pm.scale[j])
    c = pm.coef[j]
    if pm.kind[j] == LINEAR:
        return c[0] + c[1] * z
    if pm.kind[j] == QUADRATIC:
        return c[0] + z * (c[1] + z * c[2])
    m = int(pm.n_knots[j])
    kz = pm.knots[j, :m]
    last = kz[-1]
    tl3 = np.maximum(z - last, 0.0) ** 3
    eta = c[0] + c[1] * z
    if m > 2:
        d_last = (np.maximum(z - kz[m - 2], 0.0) ** 3 - tl3) / (last - kz[m - 2])
        for i in range(m - 2):
            eta = eta + c[i + 2] * ((np.maximum(z - kz[i], 0.0) ** 3 - tl3) / (last - kz[i]) - d_last)
    return eta


def _numpy_loop(xs, pm: PackedModel, out_c: np.ndarray, out_code: np.ndarray) -> None:
    n = out_c.shape[0]
    for s in range(0, n, _SLICE):
        sl = slice(s, min(n, s + _SLICE))
        best = None
        arg = np.zeros(sl.stop - sl.start, dtype=np.uint8)
        bad = np.zeros(sl.stop - sl.start, dtype=bool)
        for j, x in enumerate(xs):
            e = _predictor_numpy(np.asarray(x[sl], dtype=np.float64), j, pm)
            bad |= np.isnan(e)
            if best is None:
                best = e
            else:
                lower = e < best
                best = np.where(lower, e, best)
                arg[lower] = j
        e = np.maximum(best, 0.0)
        v = np.expm1(e) if pm.transform == 1 else (e * e if pm.transform == 2 else e)
        v[bad] = np.nan
        arg[bad] = NODATA_CODE
        out_c[sl] = v
        out_code[sl] = arg


def ceiling_and_limiting(
    model: Any, values: Mapping[str, np.ndarray], *, dtype: Any = np.float32, use_numba: bool | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """(ceiling, limiting-factor code) of ``model`` at ``values`` (factor name -> array).

    Equal to ``model.evaluate(values)``: codes exactly, ceilings to the rounding of ``dtype``.
    """
    pm = pack(model)
    first = np.asarray(values[pm.names[0]])
    shape = first.shape
    arrays = []
    kinds = set()
    for name in pm.names:
        a = np.asarray(values[name])
        if a.shape != shape:
            raise ValueError(f"factor '{name}' has shape {a.shape}, the others {shape}")
        if a.dtype not in (np.float32, np.float64):
            a = a.astype(np.float64)
        arrays.append(np.ascontiguousarray(a).reshape(-1))
        kinds.add(a.dtype)
    if len(kinds) > 1:  # one element type for the compiled loop
        arrays = [a.astype(np.float64) for a in arrays]
    n = arrays[0].size
    out_c = np.empty(n, dtype=dtype)
    out_code = np.empty(n, dtype=np.uint8)
    fast = HAVE_NUMBA if use_numba is None else (use_numba and HAVE_NUMBA)
    if fast:
        _fused(tuple(arrays), pm.kind, pm.center, pm.scale, pm.clip, pm.lo, pm.hi, pm.coef, pm.knots,
               pm.n_knots, pm.transform, out_c, out_code)
    else:
        _numpy_loop(arrays, pm, out_c, out_code)
    return out_c.reshape(shape), out_code.reshape(shape)


def evaluate(model: Any, values: Mapping[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """The projection's entry point: the fast kernel when the model qualifies, else the reference."""
    if qualifies(model):
        return ceiling_and_limiting(model, values)
    return model.evaluate(values)
