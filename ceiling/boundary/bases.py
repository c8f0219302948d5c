"""Response bases: the shapes a ceiling curve can take along one factor.

A basis turns factor values ``x`` into a design matrix whose first column is the intercept.
Each basis is a small frozen value object that is built from the observed values
(:func:`make_basis`), evaluated with :meth:`design`, and written to / read from JSON with
:meth:`to_dict` / :func:`basis_from_dict`. Values are centred and scaled by the observed
range before the powers are taken, which keeps the quantile solver well conditioned.

Adding a basis: subclass nothing; write a frozen dataclass with ``name``, ``n_params``,
``design(x)`` and ``to_dict()``, register it in ``_BASES`` and in :func:`make_basis`, and add a
reference test (see DEVELOPERS.md).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import FitError, ModelFileError

__all__ = [
    "Basis",
    "LinearBasis",
    "QuadraticBasis",
    "SplineBasis",
    "make_basis",
    "basis_from_dict",
]


@dataclass(frozen=True)
class _Scaled:
    center: float
    scale: float

    def _z(self, x: np.ndarray) -> np.ndarray:
        # a multiplication by the reciprocal (not a division): the compiled projection kernels
        # (kernels_fast, kernels_climate) do the same, so their predictors agree to the last bit
        return (np.asarray(x, dtype=np.float64) - self.center) * (1.0 / self.scale)


@dataclass(frozen=True)
class LinearBasis(_Scaled):
    """``[1, z]`` with ``z = (x - center) / scale``."""

    name = "linear"

    @property
    def n_params(self) -> int:
        return 2

    def design(self, x: np.ndarray) -> np.ndarray:
        z = self._z(x)
        return np.stack([np.ones_like(z), z], axis=-1)

    def predictor(self, x: np.ndarray, coef: np.ndarray) -> np.ndarray:
        """``design(x) @ coef`` without building the design matrix."""
        return coef[0] + coef[1] * self._z(x)

    def to_dict(self) -> dict[str, Any]:
        return {"name": self.name, "center": self.center, "scale": self.scale}


@dataclass(frozen=True)
class QuadraticBasis(_Scaled):
    """``[1, z, z**2]``: a hump-shaped (or U-shaped) ceiling."""

    name = "quadratic"

    @property
    def n_params(self) -> int:
        return 3

    def design(self, x: np.ndarray) -> np.ndarray:
        z = self._z(x)
        return np.stack([np.ones_like(z), z, z * z], axis=-1)

    def predictor(self, x: np.ndarray, coef: np.ndarray) -> np.ndarray:
        """``design(x) @ coef`` by Horner's rule, without building the design matrix."""
        z = self._z(x)
        return coef[0] + z * (coef[1] + z * coef[2])

    def to_dict(self) -> dict[str, Any]:
        return {"name": self.name, "center": self.center, "scale": self.scale}


@dataclass(frozen=True)
class SplineBasis(_Scaled):
    """Natural cubic spline with knots ``knots`` (in factor units), in the truncated-power form.

    With K knots the basis is ``N1 = 1, N2 = z, N_{k+2} = d_k - d_{K-1}`` for k = 1..K-2, where
    ``d_k = ((z - k_k)^3_+ - (z - k_K)^3_+) / (k_K - k_k)`` (Hastie, Tibshirani & Friedman,
    The Elements of Statistical Learning, 2nd ed., eqs. 5.4-5.5). It is linear beyond the
    boundary knots and has ``K - 1`` degrees of freedom besides the intercept.
    """

    knots: tuple[float, ...] = ()
    name = "spline"

    @property
    def n_params(self) -> int:
        return len(self.knots)

    @property
    def df(self) -> int:
        return len(self.knots) - 1

    def design(self, x: np.ndarray) -> np.ndarray:
        z = self._z(x)
        k = (np.asarray(self.knots, dtype=np.float64) - self.center) / self.scale
        last = k[-1]

        def d(j: int) -> np.ndarray:
            return (np.maximum(z - k[j], 0.0) ** 3 - np.maximum(z - last, 0.0) ** 3) / (last - k[j])

        cols = [np.ones_like(z), z]
        if len(k) > 2:
            d_last = d(len(k) - 2)
            cols += [d(j) - d_last for j in range(len(k) - 2)]
        return np.stack(cols, axis=-1)

    def predictor(self, x: np.ndarray, coef: np.ndarray) -> np.ndarray:
        return self.design(x) @ coef

    def to_dict(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "center": self.center,
            "scale": self.scale,
            "knots": list(self.knots),
        }


Basis = LinearBasis | QuadraticBasis | SplineBasis
_BASES = {"linear": LinearBasis, "quadratic": QuadraticBasis, "spline": SplineBasis}


def make_basis(name: str, x: np.ndarray, *, df: int = 4, factor: str = "factor") -> Basis:
    """Build a basis from observed values ``x`` (finite)."""
    x = np.asarray(x, dtype=np.float64)
    lo, hi = float(np.min(x)), float(np.max(x))
    distinct = np.unique(x).size
    center = 0.5 * (lo + hi)
    scale = 0.5 * (hi - lo) if hi > lo else 1.0
    if name == "linear":
        need = 2
    elif name == "quadratic":
        need = 3
    elif name == "spline":
        need = df + 1
    else:
        raise FitError(f"unknown basis '{name}' for factor '{factor}'; use linear, quadratic or spline")
    if distinct < need:
        raise FitError(
            f"factor '{factor}': basis '{name}'"
            + (f" with df={df}" if name == "spline" else "")
            + f" needs at least {need} distinct values of the factor, the data have {distinct}; "
            "choose a simpler basis or fewer degrees of freedom"
        )
    if name == "linear":
        return LinearBasis(center, scale)
    if name == "quadratic":
        return QuadraticBasis(center, scale)
    knots = np.quantile(x, np.linspace(0.0, 1.0, df + 1))
    if np.unique(knots).size < knots.size:
        raise FitError(
            f"factor '{factor}': spline with df={df} gets tied knots because the factor has "
            f"few distinct values ({distinct}); use fewer degrees of freedom"
        )
    return SplineBasis(center, scale, tuple(float(v) for v in knots))


def basis_from_dict(d: dict[str, Any], *, where: str = "model file") -> Basis:
    """Rebuild a basis from :meth:`to_dict` output, validating every field."""
    try:
        name = d["name"]
        if name not in _BASES:
            raise ValueError(f"unknown basis name {name!r}")
        cls = _BASES[name]
        center, scale = float(d["center"]), float(d["scale"])
        if not np.isfinite(center) or not np.isfinite(scale) or scale <= 0:
            raise ValueError("center and scale must be finite and scale > 0")
        if cls is SplineBasis:
            knots = tuple(float(v) for v in d["knots"])
            if len(knots) < 2 or any(b <= a for a, b in zip(knots, knots[1:])):
                raise ValueError("spline knots must be at least two increasing numbers")
            return SplineBasis(center, scale, knots)
        return cls(center, scale)
    except KeyError as exc:
        raise ModelFileError(f"{where}: basis is missing field {exc}; re-create the model file with 'ceiling fit'") from None
    except (TypeError, ValueError) as exc:
        raise ModelFileError(f"{where}: invalid basis ({exc}); re-create the model file with 'ceiling fit'") from None
