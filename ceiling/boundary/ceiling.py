"""One factor's upper boundary: fitting it and evaluating it.

:func:`fit_factor` fits the ceiling of abundance along one factor, either as a high-quantile
regression (``estimator="quantile"``, statsmodels' ``QuantReg``) or by binned maxima
(``estimator="binned"``: split the factor's range into equal-width bins, keep the largest
abundance of each bin and fit the curve to those maxima by least squares, the upper-bound
method of Blackburn, Lawton & Perry 1992, Oikos 65:107-112). It returns a
:class:`FactorCeiling`, a frozen results object that evaluates the ceiling anywhere.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from ..errors import FitError, ModelFileError
from ..kernels import forward_transform, inverse_transform
from .bases import Basis, basis_from_dict, make_basis
from .diagnostics import (
    LIMITING,
    NO_EDGE,
    NOT_TESTED,
    FactorDiagnostics,
    pseudo_r1,
    shape_summary,
    wedge_test,
)
from .quantreg import check_loss, quantile_fit

__all__ = ["FactorCeiling", "fit_factor", "MIN_BIN_POINTS"]

MIN_BIN_POINTS = 3


@dataclass(frozen=True)
class FactorCeiling:
    """A fitted ceiling along one factor (state after fitting; nothing mutates it)."""

    factor: str
    basis: Basis
    params: np.ndarray
    bse: np.ndarray
    conf_int: np.ndarray
    median_params: np.ndarray
    tau: float
    transform: str
    outside: str
    observed: tuple[float, float]
    estimator: str
    diagnostics: FactorDiagnostics
    units: str | None = None
    label: str | None = None
    # factor screening (ceiling.model.screen_factors): whether the factor takes part in the
    # minimum, and why not when it does not
    in_minimum: bool = True
    screened_reason: str = ""

    def _x(self, x: np.ndarray) -> np.ndarray:
        x = np.asarray(x, dtype=np.float64)
        if self.outside == "hold":
            x = np.clip(x, *self.observed)
        return x

    def linear_predictor(self, x: np.ndarray, *, median: bool = False) -> np.ndarray:
        """Unclipped predictor in the transformed response scale (NaN stays NaN)."""
        coef = self.median_params if median else self.params
        return self.basis.predictor(self._x(x), coef)

    def predict(self, x: np.ndarray) -> np.ndarray:
        """The ceiling in abundance units (>= 0)."""
        return inverse_transform(self.linear_predictor(x), self.transform)

    def predict_median(self, x: np.ndarray) -> np.ndarray:
        return inverse_transform(self.linear_predictor(x, median=True), self.transform)

    @property
    def is_limiting(self) -> bool:
        return self.diagnostics.verdict == LIMITING

    def summary(self) -> str:
        d = self.diagnostics
        unit = f" {self.units}" if self.units and self.units != "1" else ""
        lines = [
            f"{self.factor}: {self.basis.name} ceiling at tau={self.tau:g} ({self.estimator}), n={d.n}",
            f"  observed range {self.observed[0]:.4g} to {self.observed[1]:.4g}{unit}; "
            f"ceiling peaks at {d.peak_at:.4g}{unit} ({d.peak_ceiling:.4g}), "
            f"above zero from {d.positive_from:.4g} to {d.positive_to:.4g}",
            f"  share above ceiling {d.share_above:.3f} (expected about {1 - self.tau:.3f}); "
            f"check loss {d.pinball_loss:.4g}; pseudo-R1 {d.pseudo_r1:.3f}",
            f"  wedge test p={d.wedge_p:.3g}: {d.verdict}",
        ]
        if not self.in_minimum:
            lines.append(f"  left out of the minimum: {self.screened_reason}")
        for i, (b, s) in enumerate(zip(self.params, self.bse)):
            lo, hi = self.conf_int[i]
            lines.append(f"    b{i} = {b: .5g}  (se {s:.3g}; 95% CI {lo:.4g} to {hi:.4g})")
        return "\n".join(lines)

    def to_dict(self) -> dict[str, Any]:
        def arr(a: np.ndarray) -> list[Any]:
            return [None if not np.isfinite(v) else float(v) for v in np.ravel(a)]

        return {
            "name": self.factor,
            "units": self.units,
            "label": self.label,
            "estimator": self.estimator,
            "basis": self.basis.to_dict(),
            "coefficients": arr(self.params),
            "std_errors": arr(self.bse),
            "conf_int": [arr(row) for row in self.conf_int],
            "median_coefficients": arr(self.median_params),
            "observed_range": [float(self.observed[0]), float(self.observed[1])],
            "diagnostics": self.diagnostics.to_dict(),
            "in_minimum": bool(self.in_minimum),
            "screened_reason": self.screened_reason,
        }

    @classmethod
    def from_dict(
        cls, d: dict[str, Any], *, tau: float, transform: str, outside: str, where: str
    ) -> FactorCeiling:
        basis = basis_from_dict(d["basis"], where=where)

        def vec(key: str, allow_null: bool) -> np.ndarray:
            raw = d[key]
            out = np.array([np.nan if v is None else float(v) for v in raw], dtype=np.float64)
            if out.size != basis.n_params:
                raise ModelFileError(
                    f"{where}: '{key}' has {out.size} values but the {basis.name} basis needs "
                    f"{basis.n_params}; re-create the model file with 'ceiling fit'"
                )
            if not allow_null and not np.all(np.isfinite(out)):
                raise ModelFileError(f"{where}: '{key}' holds a non-number; re-create the model file with 'ceiling fit'")
            return out

        ci = np.array(
            [[np.nan if v is None else float(v) for v in row] for row in d["conf_int"]], dtype=np.float64
        ).reshape(-1, 2)
        lo, hi = (float(v) for v in d["observed_range"])
        return cls(
            factor=str(d["name"]),
            basis=basis,
            params=vec("coefficients", False),
            bse=vec("std_errors", True),
            conf_int=ci,
            median_params=vec("median_coefficients", False),
            tau=tau,
            transform=transform,
            outside=outside,
            observed=(lo, hi),
            estimator=str(d["estimator"]),
            diagnostics=FactorDiagnostics.from_dict(d["diagnostics"]),
            units=d.get("units"),
            label=d.get("label"),
            in_minimum=bool(d.get("in_minimum", True)),
            screened_reason=str(d.get("screened_reason", "") or ""),
        )


def _binned_maxima(x: np.ndarray, y: np.ndarray, bins: int) -> tuple[np.ndarray, np.ndarray]:
    edges = np.linspace(x.min(), x.max(), bins + 1)
    which = np.clip(np.searchsorted(edges, x, side="right") - 1, 0, bins - 1)
    xs, ys = [], []
    for b in range(bins):
        idx = np.flatnonzero(which == b)
        if idx.size >= MIN_BIN_POINTS:
            j = idx[np.argmax(y[idx])]
            xs.append(x[j])
            ys.append(y[j])
    return np.asarray(xs), np.asarray(ys)


def fit_factor(
    x: np.ndarray,
    y: np.ndarray,
    *,
    factor: str,
    tau: float = 0.95,
    basis: str = "quadratic",
    df: int = 4,
    transform: str = "none",
    outside: str = "hold",
    estimator: str = "quantile",
    bins: int = 10,
    wedge_replicates: int = 50,
    wedge_alpha: float = 0.05,
    seed: int = 0,
    units: str | None = None,
    label: str | None = None,
    blocks: np.ndarray | None = None,
) -> FactorCeiling:
    """Fit the upper boundary of abundance ``y`` along factor values ``x``.

    ``blocks`` (a spatial block label per point, as from
    :func:`ceiling.uncertainty.spatial_blocks`) makes the wedge test resample whole blocks, so
    that clustered sites are not counted as independent evidence.
    """
    if not 0.5 < float(tau) < 1.0:
        raise FitError(f"The 'tau' parameter must be in (0.5, 1) for a ceiling; got {tau!r}")
    if outside not in ("hold", "extend"):
        raise FitError(f"The 'outside' parameter must be 'hold' or 'extend'; got {outside!r}")
    if estimator not in ("quantile", "binned"):
        raise FitError(f"The 'estimator' parameter must be 'quantile' or 'binned'; got {estimator!r}")
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    ok = np.isfinite(x) & np.isfinite(y)
    x, y = x[ok], y[ok]
    if blocks is not None:
        blocks = np.unique(np.asarray(blocks)[ok], return_inverse=True)[1].ravel()
    b = make_basis(basis, x, df=df, factor=factor)
    need = max(2 * b.n_params, 10)
    if x.size < need:
        raise FitError(
            f"factor '{factor}': {x.size} usable points, but a {basis} ceiling needs at least "
            f"{need}; add survey points or choose a simpler basis"
        )
    yt = forward_transform(y, transform)
    X = b.design(x)
    qfit = quantile_fit(yt, X, tau)
    median = quantile_fit(yt, X, 0.5, with_errors=False)
    if estimator == "quantile":
        params, bse, ci = qfit.params, qfit.bse, qfit.conf_int
    else:
        xb, yb = _binned_maxima(x, yt, bins)
        if xb.size < b.n_params + 1:
            raise FitError(
                f"factor '{factor}': binned maxima gave {xb.size} bins with at least "
                f"{MIN_BIN_POINTS} points, a {basis} curve needs {b.n_params + 1}; use fewer bins"
            )
        import statsmodels.api as sm

        ols = sm.OLS(yb, b.design(xb)).fit()
        params = np.asarray(ols.params, dtype=np.float64)
        bse = np.asarray(ols.bse, dtype=np.float64)
        ci = np.asarray(ols.conf_int(alpha=0.05), dtype=np.float64)
    fitted = X @ params
    stat, wdf, p = wedge_test(
        yt, X, tau, replicates=wedge_replicates, seed=seed, params_tau=qfit.params, blocks=blocks
    )
    verdict = NOT_TESTED if not np.isfinite(p) else (LIMITING if p < wedge_alpha else NO_EDGE)
    lo, hi = float(x.min()), float(x.max())
    partial = FactorCeiling(
        factor=factor, basis=b, params=params, bse=bse, conf_int=ci,
        median_params=median.params, tau=float(tau), transform=transform, outside=outside,
        observed=(lo, hi), estimator=estimator, diagnostics=None,  # type: ignore[arg-type]
        units=units, label=label,
    )
    peak_at, peak_c, pos_lo, pos_hi = shape_summary(partial.predict, lo, hi)
    diag = FactorDiagnostics(
        n=int(x.size),
        share_above=float(np.mean(yt > fitted + 1e-9 * max(1.0, float(np.abs(fitted).max())))),
        pinball_loss=float(np.mean(check_loss(yt - fitted, tau))),
        pseudo_r1=pseudo_r1(yt, fitted, tau),
        peak_at=peak_at,
        peak_ceiling=peak_c,
        positive_from=pos_lo,
        positive_to=pos_hi,
        wedge_stat=stat,
        wedge_df=wdf,
        wedge_p=p,
        wedge_replicates=int(wedge_replicates),
        verdict=verdict,
    )
    return replace(partial, diagnostics=diag)
