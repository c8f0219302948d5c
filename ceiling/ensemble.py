"""Multi-model ensembles: where the climate models agree on the change of the ceiling.

For each emission scenario and period, the climate models' futures are combined cell by cell:
ensemble median and mean of the future ceiling and of the change, the inter-model spread of the
change (min, max, interquartile range), and the agreement, the fraction of models whose change
has the same sign as the ensemble median change. Following the "simple approach" of the IPCC
AR6 WG1 Atlas (Cross-Chapter Box Atlas.1), a change on whose sign at least 80% of the models
agree is *robust*, otherwise of *low agreement* (threshold configurable). The ensemble zone map
shows ``release`` / ``constraint`` only where the models agree and ``uncertain`` where they do
not; the other classes come from the present and the median future ceiling. The limiting factor
across models is the factor named by most models (ties to the first in factor order), with the
share of models naming it.
"""

from __future__ import annotations

import numpy as np

from .kernels import CONSTRAINT, NODATA_CODE, RELEASE, zone_kernel

__all__ = ["UNCERTAIN", "LOW_AGREEMENT", "ROBUST", "ensemble_kernel", "agreement_kernel"]

UNCERTAIN = 6
LOW_AGREEMENT, ROBUST = 0, 1


def agreement_kernel(change: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(median change, fraction of models sharing its sign) over the model axis (first)."""
    ch = np.asarray(change, dtype=np.float64)
    med = np.median(ch, axis=0)
    agree = np.mean(np.sign(ch) == np.sign(med)[np.newaxis], axis=0)
    bad = np.isnan(ch).any(axis=0)
    return np.where(bad, np.nan, med), np.where(bad, np.nan, agree)


def ensemble_kernel(
    present: np.ndarray,
    future: np.ndarray,
    limiting: np.ndarray,
    n_factors: int,
    *,
    robust: float = 0.8,
    release: float = 0.10,
    constraint: float = 0.10,
    floor: float = 0.5,
    zero: float = 0.0,
) -> dict[str, np.ndarray]:
    """Ensemble layers from the present ceiling (y, x) and M models' futures (M, y, x)."""
    p = np.asarray(present, dtype=np.float64)
    f = np.asarray(future, dtype=np.float64)
    ch = f - p[np.newaxis]
    bad = np.isnan(p) | np.isnan(f).any(axis=0)
    med_change, agree = agreement_kernel(ch)
    med_ceiling = np.median(f, axis=0)
    q25, q75 = np.percentile(ch, [25.0, 75.0], axis=0)
    zone = zone_kernel(p, med_ceiling, release=release, constraint=constraint, floor=floor, zero=zero)
    is_robust = agree >= robust
    zone = np.where(((zone == RELEASE) | (zone == CONSTRAINT)) & ~is_robust, UNCERTAIN, zone).astype(np.uint8)
    lim = np.asarray(limiting).astype(np.int64)
    counts = np.stack([(lim == k).sum(axis=0) for k in range(n_factors)])
    mode = np.argmax(counts, axis=0)
    share = counts.max(axis=0) / lim.shape[0]
    lim_bad = bad | (lim == NODATA_CODE).any(axis=0)

    def f32(a: np.ndarray) -> np.ndarray:
        return np.where(bad, np.nan, a).astype(np.float32)

    return {
        "median_ceiling": f32(med_ceiling),
        "mean_ceiling": f32(f.mean(axis=0)),
        "median_change": f32(med_change),
        "mean_change": f32(ch.mean(axis=0)),
        "change_min": f32(ch.min(axis=0)),
        "change_max": f32(ch.max(axis=0)),
        "change_iqr": f32(q75 - q25),
        "agreement": f32(agree),
        "robustness": np.where(bad, NODATA_CODE, np.where(is_robust, ROBUST, LOW_AGREEMENT)).astype(np.uint8),
        "zone": np.where(bad, NODATA_CODE, zone).astype(np.uint8),
        "limiting": np.where(lim_bad, NODATA_CODE, mode).astype(np.uint8),
        "limiting_share": np.where(lim_bad, np.nan, share).astype(np.float32),
    }
