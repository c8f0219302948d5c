"""Novel climates: the multivariate environmental similarity surface (MESS).

The run writes it as the layer ``similarity`` (MESS, %) beside ``least_similar`` (the factor with
the lowest similarity) and ``extrapolated`` (1 where MESS < 0: novel climate).

For each factor, with f the percentage of reference values strictly below the cell's value p,
and min / max the reference range (Elith, Kearney & Phillips 2010, Methods in Ecology and
Evolution 1:330-342):

    S = 100 (p - min) / (max - min)   if f = 0
    S = 2 f                           if 0 < f <= 50
    S = 2 (100 - f)                   if 50 <= f < 100
    S = 100 (max - p) / (max - min)   if f = 100

MESS is the minimum of S over factors and the least similar factor is the one that attains it
(ties to the first in factor order). Negative values mean the cell lies outside the sampled range
of at least one factor. The reference sample is the factor values at the survey points used in
the fit; the percentages come from a binary search in the sorted sample (``searchsorted``), never
a loop over cells.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np

from .errors import DataError
from .kernels import NODATA_CODE

__all__ = ["similarity", "mess_kernel", "check_reference"]


def check_reference(reference: Mapping[str, np.ndarray], factors: Sequence[str], *, species: str = "") -> None:
    """Refuse a reference sample with fewer than two distinct values of a factor."""
    for f in factors:
        if f not in reference:
            raise DataError(f"species '{species}': the model file has no reference sample for factor '{f}'; fit again with this version")
        r = np.asarray(reference[f])
        if np.unique(r[np.isfinite(r)]).size < 2:
            raise DataError(
                f"species '{species}': factor '{f}' has fewer than 2 distinct values in the reference sample; "
                "MESS needs a range: add survey points with other values of the factor"
            )


def similarity(p: np.ndarray, ref_sorted: np.ndarray) -> np.ndarray:
    """Per-factor similarity S (percent) of values ``p`` to a sorted reference sample."""
    p = np.asarray(p, dtype=np.float64)
    r = np.asarray(ref_sorted, dtype=np.float64)
    n = r.size
    lo, hi = r[0], r[-1]
    f = 100.0 * np.searchsorted(r, p, side="left") / n  # percent strictly below p
    span = hi - lo
    s = np.where(
        f == 0, 100.0 * (p - lo) / span,
        np.where(f <= 50, 2.0 * f, np.where(f < 100, 2.0 * (100.0 - f), 100.0 * (hi - p) / span)),
    )
    return np.where(np.isnan(p), np.nan, s)


def mess_kernel(values: Sequence[np.ndarray], refs: Sequence[np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """(MESS, least similar factor code) for stacked factor values; NaN / 255 where any is NaN."""
    s = np.stack([similarity(v, r) for v, r in zip(values, refs)])
    bad = np.isnan(s).any(axis=0)
    filled = np.where(np.isnan(s), np.inf, s)
    code = np.argmin(filled, axis=0).astype(np.uint8)
    mess = np.where(bad, np.nan, filled.min(axis=0))
    code[bad] = NODATA_CODE
    return mess, code
