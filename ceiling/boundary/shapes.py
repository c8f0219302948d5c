"""Shape rules for ceiling curves: concave curves as bound constraints on the coefficients.

A ceiling curve that bends upward (rises again toward an end of the range) says that the
species does better at the extreme than just inside it. Species' responses along one gradient
are monotone, plateau-shaped or unimodal (the hierarchy of response shapes of Huisman, Olff &
Fresco 1993, J. Veg. Sci. 4:37-46; Oksanen & Minchin 2002, Ecol. Model. 157:119-129), and a
concave curve clipped at zero follows each of them: a hump, a rise that saturates, a fall, a
plateau behind a threshold (the clip at zero makes the threshold). Measured on the
virtual-species suite (BENCHMARKS.md), fits restricted to concave curves name the limiting
factor right more often and keep spurious curves from dipping where another factor limits.

For each basis, :func:`concave_form` gives a design whose coefficients make the curve concave
exactly when they respect simple bounds (so a bound-constrained solver such as L-BFGS-B can
keep them):

- linear: no constraint;
- quadratic ``b0 + b1 z + b2 z^2``: ``b2 <= 0``;
- natural cubic spline with knots ``k_0 < ... < k_{m-1}``: its second derivative is a linear
  spline that is zero at the boundary knots, so it is ``sum_j s_j h_j(z)`` with ``h_j`` the
  hat function peaking at the interior knot ``k_j``, and the spline is
  ``a + b z + sum_j s_j G_j(z)`` with ``G_j`` the hat function integrated twice; it is concave
  exactly when every ``s_j <= 0``. The span is that of the truncated-power basis of
  :class:`ceiling.boundary.bases.SplineBasis`, so coefficients convert both ways exactly.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .bases import Basis, LinearBasis, QuadraticBasis, SplineBasis

__all__ = ["ConcaveForm", "concave_form"]


@dataclass(frozen=True)
class ConcaveForm:
    """A reparameterisation of one basis: ``basis.design(x) @ to_basis(phi) == design(x) @ phi``."""

    basis: Basis
    upper: tuple[float | None, ...]  # upper bound of each coefficient (None: free)
    native: bool = False  # the basis's own coefficients, free (no shape rule)

    def design(self, x: np.ndarray) -> np.ndarray:
        b = self.basis
        if self.native or not isinstance(b, SplineBasis):
            return b.design(x)
        z = b._z(x)
        k = (np.asarray(b.knots, dtype=np.float64) - b.center) / b.scale
        cols = [np.ones_like(z), z]
        for j in range(1, len(k) - 1):
            left, right = k[j] - k[j - 1], k[j + 1] - k[j]
            g = (np.maximum(z - k[j - 1], 0.0) ** 3 / left
                 - np.maximum(z - k[j], 0.0) ** 3 * (1.0 / left + 1.0 / right)
                 + np.maximum(z - k[j + 1], 0.0) ** 3 / right) / 6.0
            cols.append(g)
        return np.stack(cols, axis=-1)

    def _grid(self) -> np.ndarray:
        b = self.basis
        lo, hi = b.center - b.scale, b.center + b.scale
        if isinstance(b, SplineBasis):
            lo, hi = min(lo, b.knots[0]), max(hi, b.knots[-1])
        return np.linspace(lo - 0.5 * (hi - lo), hi + 0.5 * (hi - lo), 64)

    def to_basis(self, phi: np.ndarray) -> np.ndarray:
        """The basis coefficients of the curve with coefficients ``phi`` in this form."""
        if self.native or not isinstance(self.basis, SplineBasis):
            return np.asarray(phi, dtype=np.float64).copy()
        g = self._grid()
        coef, *_ = np.linalg.lstsq(self.basis.design(g), self.design(g) @ phi, rcond=None)
        return coef

    def from_basis(self, theta: np.ndarray) -> np.ndarray:
        """The coefficients in this form of the curve with basis coefficients ``theta``."""
        if self.native or not isinstance(self.basis, SplineBasis):
            return np.asarray(theta, dtype=np.float64).copy()
        g = self._grid()
        phi, *_ = np.linalg.lstsq(self.design(g), self.basis.design(g) @ theta, rcond=None)
        return phi

    def nearest(self, theta: np.ndarray, x: np.ndarray) -> np.ndarray:
        """Coefficients in this form of the curve within the bounds closest (least squares at
        the points ``x``) to the curve with basis coefficients ``theta``."""
        from scipy.optimize import lsq_linear

        phi = self.from_basis(theta)
        hi = np.array([np.inf if u is None else u for u in self.upper])
        if np.all(phi <= hi):
            return phi
        res = lsq_linear(self.design(x), self.basis.design(x) @ theta, bounds=(-np.inf, hi))
        return np.minimum(res.x, hi)


def concave_form(basis: Basis) -> ConcaveForm:
    """The concave parameterisation of ``basis`` (see the module docstring)."""
    if isinstance(basis, LinearBasis):
        return ConcaveForm(basis, (None, None))
    if isinstance(basis, QuadraticBasis):
        return ConcaveForm(basis, (None, None, 0.0))
    if isinstance(basis, SplineBasis):
        return ConcaveForm(basis, (None, None) + (0.0,) * (basis.n_params - 2))
    raise TypeError(f"no concave form for basis {type(basis).__name__}")
