"""Model selection by spatially blocked cross-validation of the check (pinball) loss.

What can be selected (``[fit] select``): the quantile level ``tau``, the basis of every
factor's curve (linear, quadratic, natural splines of 3 or 4 degrees of freedom) and the
response transform. Settings not listed keep the user's explicit choice from the config.

Folds. Survey sites cluster; a held-out point next to a fitted one says little about
prediction elsewhere. The survey area is therefore cut into squares of ``cv_block`` map units
(:func:`ceiling.uncertainty.spatial_blocks`) and whole squares are dealt to the folds, so a
square never contributes points to both the fitting and the held-out part of a fold
(blocked cross-validation: Roberts et al. 2017, Ecography 40:913-929). Without ``cv_block``
the side of a square is a tenth of the larger side of the survey's bounding box.

Score. Each candidate is fitted on the other folds and scored on the held-out fold by the
check loss of the held-out abundance against the predicted combined ceiling, in abundance
units (quantiles commute with monotone transforms, so candidates with different transforms
are compared on one scale). Check losses at different tau are not comparable, so the score is
the held-out analogue of Koenker & Machado's (1999, JASA 94:1296-1310) pseudo-R1,
``1 - V / V0``, with ``V0`` the held-out check loss of the fitting folds' sample
tau-quantile: for a fixed tau this ranks candidates exactly as the check loss does. The
candidate with the highest mean score over the species and folds wins.
"""

from __future__ import annotations

import itertools
import math
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
import pandas as pd

from .boundary import check_loss
from .errors import CeilingWarning, FitError
from .uncertainty import spatial_blocks

__all__ = ["BASIS_CANDIDATES", "TAU_CANDIDATES", "TRANSFORM_CANDIDATES", "Selection",
           "block_folds", "cv_score", "select_settings", "default_block"]

BASIS_CANDIDATES = (("linear", 4), ("quadratic", 4), ("spline", 3), ("spline", 4))
TAU_CANDIDATES = (0.9, 0.95, 0.975)
TRANSFORM_CANDIDATES = ("none", "log1p", "sqrt")
BLOCKS_PER_SIDE = 10


@dataclass(frozen=True)
class Selection:
    """The table of candidates with their scores, and the chosen settings."""

    table: pd.DataFrame
    chosen: dict[str, Any]
    selected: tuple[str, ...]


def default_block(x: np.ndarray, y: np.ndarray) -> float:
    """A tenth of the larger side of the points' bounding box (1 when they coincide)."""
    side = max(float(np.ptp(x)), float(np.ptp(y))) if len(x) else 0.0
    return side / BLOCKS_PER_SIDE if side > 0 else 1.0


def block_folds(x: np.ndarray, y: np.ndarray, block: float, folds: int, *, seed: int = 0) -> np.ndarray:
    """Fold number 0..folds-1 of every point; every point of one square gets the same fold.

    Squares are shuffled (seeded) and dealt to the folds in turn, so the folds hold nearly the
    same number of squares. Fewer squares than folds is refused.
    """
    labels = spatial_blocks(np.asarray(x, dtype=np.float64), np.asarray(y, dtype=np.float64), block)
    g = int(labels.max()) + 1 if labels.size else 0
    if g < folds:
        raise FitError(
            f"cross-validation needs at least {folds} spatial blocks, the survey fills {g} of "
            f"{block:g} map units; set a smaller fit.cv_block or fewer fit.cv_folds"
        )
    order = np.random.default_rng(seed).permutation(g)
    fold_of_block = np.empty(g, dtype=np.int64)
    fold_of_block[order] = np.arange(g) % folds
    return fold_of_block[labels]


def _subset(samples: Any, rows: np.ndarray) -> Any:
    return replace(samples, abundance=np.asarray(samples.abundance)[rows],
                   values=samples.values.iloc[rows].reset_index(drop=True),
                   x=np.asarray(samples.x)[rows], y=np.asarray(samples.y)[rows])


def cv_score(samples: Any, specs: Sequence[Any], folds: np.ndarray, *, tau: float, transform: str,
             fit_options: dict[str, Any]) -> list[float]:
    """Held-out pseudo-R1 (1 - V / V0, in abundance units) of one candidate in every fold."""
    from .model import fit

    y = np.asarray(samples.abundance, dtype=np.float64)
    scores = []
    for k in range(int(folds.max()) + 1):
        test = folds == k
        train = np.flatnonzero(~test)
        m = fit(_subset(samples, train), specs, tau=tau, transform=transform, **fit_options)
        pred = m.predict({f: np.asarray(samples.values[f], dtype=np.float64)[test] for f in m.factor_names})
        v = float(np.sum(check_loss(y[test] - pred, tau)))
        q0 = float(np.quantile(y[train], tau, method="inverted_cdf"))
        v0 = float(np.sum(check_loss(y[test] - q0, tau)))
        scores.append(1.0 - v / v0 if v0 > 0 else math.nan)
    return scores


def select_settings(
    samples: dict[str, Any],
    specs: Sequence[Any],
    *,
    select: Sequence[str],
    tau: float,
    transform: str,
    block: float | None = None,
    folds: int = 5,
    seed: int = 0,
    fit_options: dict[str, Any] | None = None,
) -> Selection:
    """Score every combination of the candidates of the settings in ``select``.

    ``samples`` maps species to their :class:`ceiling.samples.Samples`; ``specs`` are the
    config's factor specs (:class:`ceiling.model.FactorSpec`). ``fit_options`` go to
    :func:`ceiling.model.fit` (wedge replicates are turned off inside the folds: the
    coefficients do not depend on them).
    """
    from .model import FactorSpec

    unknown = [s for s in select if s not in ("basis", "tau", "transform")]
    if unknown:
        raise FitError(f"fit.select lists {', '.join(unknown)}; choose from basis, tau and transform")
    opts = dict(fit_options or {})
    opts["wedge_replicates"] = 0
    specs = [FactorSpec.coerce(s) for s in specs]
    grid = {
        "basis": BASIS_CANDIDATES if "basis" in select else (None,),
        "tau": TAU_CANDIDATES if "tau" in select else (tau,),
        "transform": TRANSFORM_CANDIDATES if "transform" in select else (transform,),
    }
    fold_of = {}
    for sp, s in samples.items():
        b = block if block is not None else default_block(np.asarray(s.x), np.asarray(s.y))
        fold_of[sp] = block_folds(s.x, s.y, b, folds, seed=seed)
    rows = []
    for basis, t, tr in itertools.product(grid["basis"], grid["tau"], grid["transform"]):
        cand = specs if basis is None else [replace(s, basis=basis[0], df=basis[1]) for s in specs]
        label = "config" if basis is None else (basis[0] if basis[0] != "spline" else f"spline df={basis[1]}")
        all_scores = []
        failed = ""
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", CeilingWarning)
            for sp, s in samples.items():
                try:
                    all_scores += cv_score(s, cand, fold_of[sp], tau=t, transform=tr, fit_options=opts)
                except FitError as exc:
                    failed = str(exc)
                    break
        score = float(np.nanmean(all_scores)) if all_scores and not failed else math.nan
        rows.append({"basis": label, "tau": t, "transform": tr, "cv_pseudo_r1": score,
                     "cv_sd": float(np.nanstd(all_scores)) if all_scores and not failed else math.nan,
                     "folds": folds, "note": failed})
    table = pd.DataFrame(rows)
    ok = table["cv_pseudo_r1"].notna()
    if not ok.any():
        raise FitError("no candidate of fit.select could be fitted in every fold; set fewer fit.cv_folds or a larger fit.cv_block")
    best = table[ok]["cv_pseudo_r1"].idxmax()
    table["chosen"] = table.index == best
    row = table.loc[best]
    chosen: dict[str, Any] = {"tau": float(row["tau"]), "transform": str(row["transform"])}
    if "basis" in select:
        pick = next(b for b in BASIS_CANDIDATES if (b[0] if b[0] != "spline" else f"spline df={b[1]}") == row["basis"])
        chosen["basis"], chosen["df"] = pick
    return Selection(table=table, chosen=chosen, selected=tuple(select))
