"""The virtual observer: where sites are surveyed and what abundance is recorded there.

Designs (sites fall anywhere in the landscape; a site takes the factor values of its cell):

- ``uniform``: sites uniformly at random;
- ``clustered``: ``clusters`` centres uniformly at random, sites scattered around them with a
  standard deviation of ``spread`` km (surveys along roads and around field stations);
- ``biased``: cells drawn with probability proportional to ``exp(bias * z)``, with ``z`` the
  standardised present field of factor ``toward``: most sites at one end of its gradient.

Abundance sits far below the ceiling ``C`` at most sites: a fraction ``F`` drawn from a beta
distribution skewed toward 0 (``beta``), zero with probability ``zero_inflation``; the record is
``C F`` (``continuous``), a Poisson count with that mean (``poisson``), or a negative-binomial
count with that mean and size ``size`` (``negbin``, drawn as a gamma-Poisson mixture).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ceiling.samples import Samples

from .landscape import SIDE, Landscape
from .truth import Truth

__all__ = ["Design", "Abundance", "simulate_survey", "holdout_blocks", "HOLDOUT_BLOCK", "HOLDOUT_FOLDS"]

HOLDOUT_BLOCK = 12.0  # km: side of the squares dealt to the calibration folds
HOLDOUT_FOLDS = 5  # one fold of squares (about a fifth of the sites) is held out


@dataclass(frozen=True)
class Design:
    kind: str = "uniform"
    n: int = 600
    clusters: int = 40
    spread: float = 1.5
    bias: float = 2.5
    toward: int = 0


@dataclass(frozen=True)
class Abundance:
    kind: str = "poisson"
    zero_inflation: float = 0.3
    beta: tuple[float, float] = (0.8, 2.2)
    size: float = 1.5


def _sites(design: Design, land: Landscape, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    n = design.n
    if design.kind == "uniform":
        return rng.uniform(0, SIDE, n), rng.uniform(0, SIDE, n)
    if design.kind == "clustered":
        centres = rng.uniform(0, SIDE, (design.clusters, 2))
        which = rng.integers(0, design.clusters, n)
        xy = centres[which] + rng.normal(0, design.spread, (n, 2))
        xy = np.clip(xy, 0, SIDE - 1e-6)
        return xy[:, 0], xy[:, 1]
    if design.kind == "biased":
        z = land.present[land.names[design.toward]]
        w = np.exp(design.bias * (z - z.max()))
        cells = rng.choice(z.size, size=n, p=w / w.sum())
        jitter = rng.uniform(-0.5, 0.5, (n, 2))
        return land.x[cells] + jitter[:, 0], land.y[cells] + jitter[:, 1]
    raise ValueError(f"unknown survey design {design.kind!r}")


def _cells(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    col = np.clip(np.floor(x).astype(np.int64), 0, SIDE - 1)
    row = np.clip(SIDE - 1 - np.floor(y).astype(np.int64), 0, SIDE - 1)
    return row * SIDE + col


def _abundance(c: np.ndarray, ab: Abundance, rng: np.random.Generator) -> np.ndarray:
    n = c.size
    frac = np.where(rng.random(n) < ab.zero_inflation, 0.0, rng.beta(*ab.beta, n))
    mean = c * frac
    if ab.kind == "continuous":
        return mean
    if ab.kind == "poisson":
        return rng.poisson(mean).astype(np.float64)
    if ab.kind == "negbin":
        lam = rng.gamma(ab.size, np.maximum(mean, 1e-12) / ab.size)
        return rng.poisson(np.where(mean > 0, lam, 0.0)).astype(np.float64)
    raise ValueError(f"unknown abundance model {ab.kind!r}")


def simulate_survey(land: Landscape, truth: Truth, design: Design, ab: Abundance,
                    rng: np.random.Generator, species: str = "virtual") -> Samples:
    """One survey: site coordinates (metres), factor values at the sites and recorded abundance."""
    x, y = _sites(design, land, rng)
    cells = _cells(x, y)
    values = {n: land.present[n][cells] for n in land.names}
    c = truth.ceiling(values)
    return Samples(species=species, abundance=_abundance(c, ab, rng), values=pd.DataFrame(values),
                   x=x * 1000.0, y=y * 1000.0, crs="EPSG:3857")


def holdout_blocks(samples: Samples, seed: int) -> np.ndarray:
    """Boolean mask of the held-out sites: one fold of ``HOLDOUT_BLOCK`` km squares.

    Squares are shuffled (seeded) and dealt to ``HOLDOUT_FOLDS`` folds in turn; fold 0 is held
    out. Written here, apart from the project's own cross-validation, so the score does not lean
    on the code it scores.
    """
    col = np.floor(np.asarray(samples.x) / 1000.0 / HOLDOUT_BLOCK).astype(np.int64)
    row = np.floor(np.asarray(samples.y) / 1000.0 / HOLDOUT_BLOCK).astype(np.int64)
    key = col * 1000 + row
    squares, label = np.unique(key, return_inverse=True)
    order = np.random.default_rng(seed).permutation(squares.size)
    fold = np.empty(squares.size, dtype=np.int64)
    fold[order] = np.arange(squares.size) % HOLDOUT_FOLDS
    return fold[label.ravel()] == 0
