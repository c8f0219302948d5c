"""Scores of one fitted model against the simulated truth.

Over every cell of the landscape, now and in the future:

- ``rho_now``, ``rho_later``: Spearman rank correlation of the fitted and the true ceiling
  (a fitted tau-boundary is a multiple of the true ceiling when the fraction below it does not
  depend on the factors, so ranks, not levels, are compared);
- ``lim_now``, ``lim_later``: share of the identifiable cells whose limiting factor is named
  right; a cell is identifiable when the truth's lowest per-factor ceiling lies more than
  ``GAP`` below the next ((second - lowest) / second > GAP) and the true ceiling is well above
  zero (above ``WELL_ABOVE`` of the largest true ceiling of the present grid);
- ``sign``: share of the cells with a large true change (more than ``BIG_CHANGE`` of that
  largest true ceiling) whose fitted change has the same sign;
- ``above``: share of the held-out sites (one fold of spatial blocks, never fitted) above the
  fitted ceiling, to set against 1 - tau;
- ``edgeless``: share of the cells with a true ceiling well above zero whose fitted limiting
  factor is one the truth gives no edge (NaN when there is none): it must stay near 0;
- ``firm``: share of the identifiable cells that the fit itself calls firm (its own relative gap
  between the lowest and next-lowest per-factor ceiling above ``GAP``), and ``lim_firm``, the
  share of those named right.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
from scipy.stats import spearmanr

from ceiling.model import CeilingModel

from .landscape import Landscape
from .truth import Truth

__all__ = ["Score", "score", "GAP", "WELL_ABOVE", "BIG_CHANGE", "relative_gap"]

GAP = 0.10
WELL_ABOVE = 0.2
BIG_CHANGE = 0.2


@dataclass(frozen=True)
class Score:
    rho_now: float
    rho_later: float
    lim_now: float
    lim_later: float
    sign: float
    above: float
    firm: float
    lim_firm: float
    edgeless: float
    identifiable_now: int
    identifiable_later: int
    big_changes: int
    held_out: int

    def to_dict(self) -> dict:
        return asdict(self)


def relative_gap(per_factor: np.ndarray) -> np.ndarray:
    """(second lowest - lowest) / second lowest over the factor axis (0 where both are 0)."""
    s = np.sort(per_factor, axis=0)
    if s.shape[0] < 2:
        return np.ones(s.shape[1:])
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(s[1] > 0, (s[1] - s[0]) / s[1], 0.0)


def _rho(a: np.ndarray, b: np.ndarray) -> float:
    r = spearmanr(a, b).statistic
    return float(r) if np.isfinite(r) else 0.0


def _fitted_names(model: CeilingModel, values: dict) -> np.ndarray:
    per = model.per_factor(values)
    code = np.argmin(per, axis=0)
    return np.asarray(model.factor_names, dtype=object)[code], relative_gap(per)


def _share(mask: np.ndarray, right: np.ndarray) -> float:
    return float(np.mean(right[mask])) if mask.any() else float("nan")


def score(model: CeilingModel, truth: Truth, land: Landscape, held_x: dict, held_y: np.ndarray) -> Score:
    """Score ``model`` against ``truth`` over ``land``; ``held_x``/``held_y`` are the held-out sites."""
    names = np.asarray(truth.names, dtype=object)
    out = {}
    true_c, fit_c, idents = {}, {}, {}
    top = float(truth.ceiling(land.present).max())
    for when, values in (("now", land.present), ("later", land.future)):
        per = truth.per_factor(values)
        tc = per.min(axis=0)
        fc = model.predict(values)
        fitted, fgap = _fitted_names(model, values)
        ident = (relative_gap(per) > GAP) & (tc > WELL_ABOVE * top)
        right = fitted == names[np.argmin(per, axis=0)]
        out[f"rho_{when}"] = _rho(fc, tc)
        out[f"lim_{when}"] = _share(ident, right)
        out[f"identifiable_{when}"] = int(ident.sum())
        if when == "now":
            well = tc > WELL_ABOVE * top
            out["edgeless"] = float(np.mean(np.isin(fitted[well], truth.edgeless))) if truth.edgeless else float("nan")
            firm = ident & (fgap > GAP)
            out["firm"] = float(firm.sum() / max(ident.sum(), 1))
            out["lim_firm"] = _share(firm, right)
        true_c[when], fit_c[when], idents[when] = tc, fc, ident
    d_true = true_c["later"] - true_c["now"]
    big = np.abs(d_true) > BIG_CHANGE * top
    out["sign"] = _share(big, np.sign(fit_c["later"] - fit_c["now"]) == np.sign(d_true))
    out["big_changes"] = int(big.sum())
    pred = model.predict(held_x)
    tol = 1e-9 * max(1.0, float(np.nanmax(np.abs(pred))) if pred.size else 1.0)
    out["above"] = float(np.mean(held_y > pred + tol)) if held_y.size else float("nan")
    out["held_out"] = int(held_y.size)
    return Score(**out)
