"""True per-factor ceiling curves and their law-of-the-minimum combination.

Each curve is placed on its factor by quantiles of the factor's present field (``a`` and
``b``, in (0, 1); values beyond are extrapolated linearly from the 0 and 1 quantiles), so that
a scenario reads the same whatever the landscape's random draw. ``sign = -1`` mirrors a curve
(it is built on ``-x``). Shapes, with ``qa = q(a)``, ``qb = q(b)`` and ``P`` the peak:

- ``hump``: ``P exp(-((x - qa) / (qb - qa))^2 / 2)``, a bell centred on ``qa``;
- ``saturating``: 0 up to ``qa``, then ``P (1 - exp(-2 (x - qa) / (qb - qa)))``;
- ``declining``: ``P / (1 + exp(3 (x - qa) / (qb - qa)))``, a logistic fall through ``qa``;
- ``plateau``: 0 below the threshold ``qa``, a straight rise to ``P`` at ``qb``, flat beyond;
- ``tail``: ``P`` up to ``qa``, then a straight fall to 0 at ``qb`` (with ``P`` above the
  other curves' peaks, the factor limits only beyond ``qa``: a small part of the region);
- ``none``: the constant ``P`` (use a large one): a factor with no upper edge, never limiting.

None of these is a quadratic, the fitting's default basis, so every fit is an approximation.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

__all__ = ["CurveSpec", "Curve", "Truth", "SHAPES"]

SHAPES = ("hump", "saturating", "declining", "plateau", "tail", "none")


@dataclass(frozen=True)
class CurveSpec:
    """A true ceiling curve, placed by quantiles of its factor's present field."""

    shape: str
    a: float = 0.5
    b: float = 0.9
    peak: float = 100.0
    sign: int = 1

    def place(self, field: np.ndarray) -> Curve:
        if self.shape not in SHAPES:
            raise ValueError(f"unknown curve shape {self.shape!r}; use one of {SHAPES}")
        v = self.sign * np.asarray(field, dtype=np.float64)
        q0, q1 = np.quantile(v, [0.0, 1.0])

        def q(p: float) -> float:
            if p < 0:
                return float(q0 + p * (q1 - q0))
            if p > 1:
                return float(q1 + (p - 1) * (q1 - q0))
            return float(np.quantile(v, p))

        return Curve(self.shape, q(self.a), q(self.b), float(self.peak), int(self.sign))


@dataclass(frozen=True)
class Curve:
    """A placed curve: anchors in the factor's own units."""

    shape: str
    qa: float
    qb: float
    peak: float
    sign: int

    def __call__(self, x: np.ndarray) -> np.ndarray:
        v = self.sign * np.asarray(x, dtype=np.float64)
        P, qa, d = self.peak, self.qa, self.qb - self.qa
        if self.shape == "hump":
            return P * np.exp(-0.5 * ((v - qa) / d) ** 2)
        if self.shape == "saturating":
            return P * np.clip(1.0 - np.exp(-2.0 * (v - qa) / d), 0.0, None)
        if self.shape == "declining":
            return P / (1.0 + np.exp(np.clip(3.0 * (v - qa) / d, -50, 50)))
        if self.shape == "plateau":
            return P * np.clip((v - qa) / d, 0.0, 1.0)
        if self.shape == "tail":
            return P * np.clip((self.qb - v) / d, 0.0, 1.0)
        return np.full_like(v, P)


@dataclass(frozen=True)
class Truth:
    """The true ceiling of a virtual species: one placed curve per factor, combined by the minimum."""

    names: tuple[str, ...]
    curves: tuple[Curve, ...]

    @classmethod
    def place(cls, names: tuple[str, ...], specs: tuple[CurveSpec, ...], present: Mapping[str, np.ndarray]) -> Truth:
        return cls(names, tuple(s.place(present[n]) for n, s in zip(names, specs)))

    def per_factor(self, values: Mapping[str, np.ndarray]) -> np.ndarray:
        """Each factor's true ceiling, shape (K, n)."""
        return np.stack([c(values[n]) for n, c in zip(self.names, self.curves)])

    def ceiling(self, values: Mapping[str, np.ndarray]) -> np.ndarray:
        return self.per_factor(values).min(axis=0)

    @property
    def edgeless(self) -> tuple[str, ...]:
        return tuple(n for n, c in zip(self.names, self.curves) if c.shape == "none")
