"""Per-cell kernels over plain NumPy arrays.

These functions know nothing of xarray, files or CRS; the projection wraps them. Factor order is
the model's (the config's) order: it defines the limiting-factor codes 0..K-1, and 255 is nodata.
"""

from __future__ import annotations

import numpy as np

__all__ = ["NODATA_CODE", "forward_transform", "inverse_transform", "combine_minimum"]

NODATA_CODE = 255


def forward_transform(y: np.ndarray, transform: str) -> np.ndarray:
    """Response transform applied before fitting (``none``, ``log1p``, ``sqrt``)."""
    y = np.asarray(y, dtype=np.float64)
    if transform == "none":
        return y
    if transform == "log1p":
        return np.log1p(y)
    if transform == "sqrt":
        return np.sqrt(y)
    raise ValueError(f"unknown transform {transform!r}; use none, log1p or sqrt")


def inverse_transform(eta: np.ndarray, transform: str) -> np.ndarray:
    """Back to abundance units, with the linear predictor clipped at zero first.

    Clipping before inverting keeps every ceiling >= 0 (a negative predictor squared by the
    ``sqrt`` inverse would otherwise turn positive).
    """
    e = np.maximum(eta, 0.0)
    if transform == "none":
        return e
    if transform == "log1p":
        return np.expm1(e)
    if transform == "sqrt":
        return e * e
    raise ValueError(f"unknown transform {transform!r}; use none, log1p or sqrt")


def combine_minimum(eta: np.ndarray, transform: str = "none") -> tuple[np.ndarray, np.ndarray]:
    """Law of the minimum over factors: the ceiling and the limiting factor.

    ``eta`` has the factor axis first, shape (K, ...), holding each factor's unclipped linear
    predictor (in the transformed response scale). The ceiling is the minimum over factors of
    the clipped, back-transformed predictors. The limiting factor is the factor that attains
    it; ties (several factors at a ceiling of zero, say) go to the factor with the lowest
    unclipped predictor, then to the first in factor order. Where any factor is NaN the
    ceiling is NaN and the code is 255.
    """
    eta = np.asarray(eta, dtype=np.float64)
    per = inverse_transform(eta, transform)
    cmin = per.min(axis=0)
    tied = per == cmin[np.newaxis]
    key = np.where(tied, eta, np.inf)
    code = np.argmin(key, axis=0).astype(np.uint8)
    bad = np.isnan(eta).any(axis=0)
    cmin = np.where(bad, np.nan, cmin)
    code = np.where(bad, np.uint8(NODATA_CODE), code).astype(np.uint8)
    return cmin, code


def change_kernel(present: np.ndarray, future: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Absolute change (future - present) and percent change where the present is above zero."""
    p = np.asarray(present, dtype=np.float64)
    f = np.asarray(future, dtype=np.float64)
    change = f - p
    with np.errstate(divide="ignore", invalid="ignore"):
        pct = np.where(p > 0, 100.0 * change / p, np.nan)
    return change.astype(np.float32), pct.astype(np.float32)


# zone codes, as in ceiling.categories.ZONES
STABLE, RELEASE, CONSTRAINT, OPENS, CLOSES, ABSENT = 0, 1, 2, 3, 4, 5


def zone_kernel(
    present: np.ndarray,
    future: np.ndarray,
    *,
    release: float = 0.10,
    constraint: float = 0.10,
    floor: float = 0.5,
    zero: float = 0.0,
) -> np.ndarray:
    """Zone class per cell.

    A ceiling at or below ``zero`` counts as zero. Where both are above zero, the change is a
    release when it exceeds ``max(release * present, floor)`` and a constraint when it falls
    below ``-max(constraint * present, floor)``; otherwise stable. NaN in either gives 255.
    """
    p = np.asarray(present, dtype=np.float64)
    f = np.asarray(future, dtype=np.float64)
    pz, fz = p <= zero, f <= zero
    d = f - p
    up = np.maximum(release * p, floor)
    down = np.maximum(constraint * p, floor)
    out = np.full(p.shape, STABLE, dtype=np.uint8)
    out[d > up] = RELEASE
    out[d < -down] = CONSTRAINT
    out[pz & ~fz] = OPENS
    out[~pz & fz] = CLOSES
    out[pz & fz] = ABSENT
    out[np.isnan(p) | np.isnan(f)] = NODATA_CODE
    return out


def switch_kernel(present_code: np.ndarray, future_code: np.ndarray, k: int) -> np.ndarray:
    """Limiting-factor switch code ``present * k + future``; 255 where either is nodata."""
    p = np.asarray(present_code).astype(np.int32)
    f = np.asarray(future_code).astype(np.int32)
    bad = (p == NODATA_CODE) | (f == NODATA_CODE)
    return np.where(bad, NODATA_CODE, p * k + f).astype(np.uint8)
