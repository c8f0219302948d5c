"""A synthetic landscape: spatially structured factor fields now and in one future.

The landscape is a square of ``SIDE`` x ``SIDE`` cells of 1 km. Every factor field is a
mixture of a smooth gradient in a random direction, broad smoothed noise and finer smoothed
noise (Gaussian-filtered white noise, as the demo's climate is made), standardised to mean 0
and standard deviation 1 over the grid. A factor may be tied to an earlier one (its
``partner``): it is then ``r * partner + sqrt(1 - r^2) * own``, with ``own`` made orthogonal
to the partner over the grid, so the two correlate exactly ``r`` over the grid (at the survey
sites the correlation differs, as it does in real surveys).

The future adds to each factor a shift (in standard deviations of the present field) and a
smooth change pattern of its own, orthogonal over the grid to the factor's present field and
its partner's; a large pattern on one member of a correlated pair
decouples the pair, a large shift pushes part of the grid beyond the range the survey saw.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

__all__ = ["SIDE", "FieldSpec", "Landscape", "make_landscape", "smooth_noise"]

SIDE = 96  # cells per side (1 km cells)
BROAD, FINE, CHANGE = 14.0, 4.0, 18.0  # smoothing lengths (cells) of the noise fields


@dataclass(frozen=True)
class FieldSpec:
    """How one factor's field is built (all amounts in standard deviations of the field)."""

    partner: int | None = None  # index of an earlier factor this one is correlated with
    corr: float = 0.0  # the correlation with the partner over the present grid
    gradient: float = 0.6  # weight of the gradient (the rest is noise)
    shift: float = 0.0  # future: mean change
    pattern: float = 0.25  # future: amplitude of the factor's own smooth change pattern


@dataclass(frozen=True)
class Landscape:
    """Factor values of every cell (flattened, row-major), now and in the future."""

    names: tuple[str, ...]
    present: dict[str, np.ndarray]
    future: dict[str, np.ndarray]
    x: np.ndarray  # cell centres, km
    y: np.ndarray

    @property
    def cells(self) -> int:
        return self.x.size


def smooth_noise(rng: np.random.Generator, sigma: float, side: int = SIDE) -> np.ndarray:
    """Gaussian-filtered white noise on the grid, standardised (mean 0, sd 1)."""
    pad = int(3 * sigma)
    raw = rng.standard_normal((side + 2 * pad, side + 2 * pad))
    field = ndimage.gaussian_filter(raw, sigma, mode="wrap")[pad:-pad, pad:-pad]
    return _standardise(field)


def _standardise(a: np.ndarray) -> np.ndarray:
    return (a - a.mean()) / a.std()


def _orthogonal(a: np.ndarray, basis: list[np.ndarray]) -> np.ndarray:
    """``a`` with its least-squares projection on the (centred) ``basis`` fields removed, standardised."""
    B = np.stack([b.ravel() - b.mean() for b in basis], axis=1)
    v = a.ravel() - a.mean()
    coef, *_ = np.linalg.lstsq(B, v, rcond=None)
    return _standardise((v - B @ coef).reshape(a.shape))


def _own_field(rng: np.random.Generator, gradient: float) -> np.ndarray:
    rows, cols = np.mgrid[0:SIDE, 0:SIDE] / (SIDE - 1)
    angle = rng.uniform(0, 2 * np.pi)
    grad = _standardise(np.cos(angle) * cols + np.sin(angle) * rows)
    noise = 0.8 * smooth_noise(rng, BROAD) + 0.35 * smooth_noise(rng, FINE)
    return _standardise(gradient * grad + (1 - gradient) * _standardise(noise))


def make_landscape(specs: tuple[FieldSpec, ...], names: tuple[str, ...], rng: np.random.Generator) -> Landscape:
    """Present and future fields of every factor (see the module docstring)."""
    fields: list[np.ndarray] = []
    for spec in specs:
        own = _own_field(rng, spec.gradient)
        if spec.partner is not None:
            p = fields[spec.partner]
            own = _standardise(own - (own * p).mean() * p)  # orthogonal to the partner over the grid
            own = spec.corr * p + np.sqrt(1.0 - spec.corr**2) * own
        fields.append(_standardise(own))
    future = []
    for spec, f in zip(specs, fields):
        # the change pattern is made orthogonal to the factor's present field and its partner's,
        # so a large pattern decouples a pair by the same amount on every draw
        basis = [f] + ([fields[spec.partner]] if spec.partner is not None else [])
        future.append(f + spec.shift + spec.pattern * _orthogonal(smooth_noise(rng, CHANGE), basis))
    rows, cols = np.mgrid[0:SIDE, 0:SIDE]
    return Landscape(
        names=names,
        present={n: f.ravel() for n, f in zip(names, fields)},
        future={n: f.ravel() for n, f in zip(names, future)},
        x=(cols.ravel() + 0.5).astype(np.float64),
        y=(SIDE - rows.ravel() - 0.5).astype(np.float64),
    )
