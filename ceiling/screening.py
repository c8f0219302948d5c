"""Which factors take part in the minimum: spatially blocked cross-validation of the joint fit.

A factor belongs in the law-of-the-minimum ceiling when the ceiling predicts abundance at sites
it has not seen better with the factor than without it. The test (``[fit] screen``, on by
default) is backward elimination on held-out check loss:

1. the survey area is cut into squares and whole squares are dealt to ``folds`` folds
   (:func:`ceiling.selection.block_folds`; blocked cross-validation, Roberts et al. 2017,
   Ecography 40:913-929), so that clustered sites never sit on both sides of a fold;
2. for the current set of factors and for the set without each one in turn, the joint fit
   (:func:`ceiling.joint.joint_fit`, warm-started from the full-survey fit) is refitted on the
   other folds and its check loss (Koenker & Bassett 1978) summed over every held-out fold;
3. if leaving one factor out does not make the held-out loss worse, the factor whose absence
   helps most is left out, and step 2 is repeated with the rest; otherwise every factor stays.

Correlation alone never removes a factor: two factors that move together at the survey sites
both stay unless the held-out loss shows one adds nothing. When one of them is left out and the
two part ways in the future (their rank correlation over a future's cells falls clearly below
that at the sites, by ``DECOUPLING`` or more), the choice changes the projection, and the
reason says so. A factor without an upper edge adds nothing a held-out site can confirm, so it
does not stay in the minimum.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import pandas as pd
from scipy.stats import spearmanr

from .boundary import FactorCeiling, check_loss
from .joint import joint_fit
from .kernels import forward_transform
from .selection import block_folds, default_block

__all__ = ["ScreenSettings", "Screening", "Chosen", "choose_factors", "screen_by_cv", "site_correlations", "decoupling",
           "CORRELATED", "DECOUPLING", "CV_TEMPERATURES"]

# a pair "moves together" at this absolute rank correlation (common practice for collinear
# predictors; Dormann et al. 2013, Ecography 36:27-46, discuss |r| > 0.7 as the usual flag)
CORRELATED = 0.7
# "clearly below": the future's rank correlation is this much lower than at the sites (our rule)
DECOUPLING = 0.1
# warm-started refits inside the folds start near the answer: the last two annealing stages
CV_TEMPERATURES = (0.03, 0.01)
# held-out losses within this relative amount are equal (a factor that never limits in any fold
# changes the loss only by the solver's rounding)
TIE = 1e-9


@dataclass(frozen=True)
class ScreenSettings:
    """How the joint fit is refitted inside the cross-validation folds."""

    tau: float
    transform: str = "none"
    folds: int = 5
    block: float | None = None
    seed: int = 0
    concave: bool = True
    keep: tuple[str, ...] = ()


@dataclass(frozen=True)
class Screening:
    """Outcome of :func:`screen_by_cv`: the factors left out (with reasons) and every round."""

    left_out: dict[str, str]
    table: pd.DataFrame = field(default_factory=pd.DataFrame)


def site_correlations(values: Any, names: Sequence[str]) -> pd.DataFrame:
    """Spearman rank correlations of the factors at the survey points (pairwise complete)."""
    cols = pd.DataFrame({n: np.asarray(values[n], dtype=np.float64) for n in names})
    return cols.corr(method="spearman")


def fold_labels(x: np.ndarray | None, y: np.ndarray | None, n: int, settings: ScreenSettings) -> np.ndarray:
    """Fold of every point: whole spatial blocks when there are coordinates, else single points."""
    if x is not None and y is not None and np.all(np.isfinite(x)) and np.all(np.isfinite(y)):
        block = settings.block if settings.block is not None else default_block(x, y)
        return block_folds(x, y, block, settings.folds, seed=settings.seed)
    order = np.random.default_rng(settings.seed).permutation(n)
    out = np.empty(n, dtype=np.int64)
    out[order] = np.arange(n) % settings.folds
    return out


def _held_out_loss(factors: Sequence[FactorCeiling], params: Mapping[str, np.ndarray], cols: Mapping[str, np.ndarray],
                   yt: np.ndarray, test: np.ndarray, tau: float) -> float:
    eta = np.stack([replace(f, params=params[f.factor]).linear_predictor(cols[f.factor][test]) for f in factors])
    c = np.maximum(0.0, eta.min(axis=0))
    return float(np.sum(check_loss(yt[test] - c, tau)))


def cv_loss(factors: Sequence[FactorCeiling], cols: Mapping[str, np.ndarray], y: np.ndarray,
            folds: np.ndarray, settings: ScreenSettings) -> float:
    """Held-out check loss (transformed scale) of the joint fit of ``factors``, summed over folds.

    ``factors`` carry the warm start (the full-survey joint fit); ``cols`` the factor values.
    """
    yt = forward_transform(y, settings.transform)
    fixed = [f.factor for f in factors if f.estimator == "binned"]
    total = 0.0
    for k in range(int(folds.max()) + 1):
        test = folds == k
        train = ~test
        jf = joint_fit(factors, {n: v[train] for n, v in cols.items()}, y[train], tau=settings.tau,
                       transform=settings.transform, starts=1, seed=settings.seed + k, fixed=fixed,
                       concave=settings.concave, temperatures=CV_TEMPERATURES)
        total += _held_out_loss(factors, jf.params, cols, yt, test, settings.tau)
    return total


def screen_by_cv(factors: Sequence[FactorCeiling], samples: Any, settings: ScreenSettings) -> Screening:
    """Backward elimination of ``factors`` (carrying the full-survey joint fit) on held-out loss.

    Points with a missing factor value or abundance are left out of the folds. Factors in
    ``settings.keep`` always stay; at least one factor always stays.
    """
    names = [f.factor for f in factors]
    y_all = np.asarray(samples.abundance, dtype=np.float64)
    raw = {n: np.asarray(samples.values[n], dtype=np.float64) for n in names}
    ok = np.isfinite(y_all) & np.all(np.isfinite(np.stack(list(raw.values()))), axis=0)
    cols, y = {n: v[ok] for n, v in raw.items()}, y_all[ok]
    x, yy = _coordinates(samples, ok)
    folds = fold_labels(x, yy, int(ok.sum()), settings)
    current = list(factors)
    base = cv_loss(current, cols, y, folds, settings)
    rows, left_out = [], {}
    # a factor whose absence made the held-out loss worse stays worse without it once another
    # factor is gone (removing factors leaves the rest more to do), so later rounds test only
    # the factors that were not worse without them
    candidates = [f.factor for f in factors if f.factor not in settings.keep]
    while len(current) > 1 and candidates:
        trials = {}
        for f in current:
            if f.factor not in candidates:
                continue
            trials[f.factor] = cv_loss([g for g in current if g is not f], cols, y, folds, settings)
            rows.append({"round": len(left_out) + 1, "factor": f.factor, "loss_with": base,
                         "loss_without": trials[f.factor]})
        not_worse = [n for n, v in trials.items() if v <= base * (1.0 + TIE)]
        if not not_worse:
            break
        out = min(not_worse, key=trials.get)
        left_out[out] = (f"blocked cross-validation: held-out check loss {trials[out]:.4g} without it, "
                         f"{base:.4g} with it ({int(folds.max()) + 1} folds of spatial blocks); it adds nothing "
                         "held-out sites confirm")
        current = [g for g in current if g.factor != out]
        candidates = [n for n in not_worse if n != out]
        base = trials[out]
    return Screening(left_out, pd.DataFrame(rows))


def _coordinates(samples: Any, ok: np.ndarray) -> tuple[np.ndarray | None, np.ndarray | None]:
    x, y = getattr(samples, "x", None), getattr(samples, "y", None)
    if x is None or y is None:
        return None, None
    return np.asarray(x, dtype=np.float64)[ok], np.asarray(y, dtype=np.float64)[ok]


def decoupling(left: str, kept: Sequence[str], at_sites: pd.DataFrame,
               futures: Mapping[str, Mapping[str, np.ndarray]] | None) -> str:
    """A note when ``left`` moves with a kept factor at the sites but not in some future ("" if none)."""
    notes = []
    for k in kept:
        r_site = float(at_sites.loc[left, k])
        if not np.isfinite(r_site) or abs(r_site) < CORRELATED:
            continue
        part = f"it moves with {k} at the survey sites (|Spearman| {abs(r_site):.2f})"
        if futures:
            worst = None
            for label, vals in futures.items():
                a, b = np.asarray(vals[left], dtype=np.float64), np.asarray(vals[k], dtype=np.float64)
                good = np.isfinite(a) & np.isfinite(b)
                if good.sum() < 3:
                    continue
                r = abs(float(spearmanr(a[good], b[good]).statistic))
                if np.isfinite(r) and (worst is None or r < worst[1]):
                    worst = (label, r)
            if worst is not None and worst[1] <= abs(r_site) - DECOUPLING:
                part += (f" but not in the future ({worst[1]:.2f} over {worst[0]}): the projection depends on "
                         f"this choice; compare with fit.keep = [\"{left}\"]")
        notes.append(part)
    return "; ".join(notes)


@dataclass(frozen=True)
class Chosen:
    """Every fitted factor (those in the minimum with their final coefficients), the ones left
    out with their reasons, and the fit's diagnostics (``CeilingModel.fit_info``)."""

    factors: list[FactorCeiling]
    left_out: dict[str, str]
    info: dict[str, Any]


def _wedge_rule(fitted: Sequence[FactorCeiling], opts: Any, left: dict[str, str]) -> dict[str, str]:
    out = {}
    for f in fitted:
        p = f.diagnostics.wedge_p
        if f.factor not in left and f.factor not in opts.keep and np.isfinite(p) and p >= opts.wedge_alpha:
            out[f.factor] = f"no distinct upper edge (wedge test p={p:.3g} >= {opts.wedge_alpha:g})"
    if len(out) + len(left) >= len(fitted):  # never an empty minimum: keep the clearest edge
        rest = [f for f in fitted if f.factor not in left]
        out.pop(min(rest, key=lambda f: f.diagnostics.wedge_p).factor, None)
    return out


def _joint(factors: Sequence[FactorCeiling], samples: Any, opts: Any) -> tuple[list[FactorCeiling], dict[str, Any]]:
    jf = joint_fit(factors, samples.values, samples.abundance, tau=opts.tau, transform=opts.transform,
                   starts=opts.joint_starts, seed=opts.seed, fixed=[f.factor for f in factors if f.estimator == "binned"],
                   concave=opts.shape == "concave")
    # the standard errors are the per-factor QuantReg ones; the intervals keep their width and
    # are recentred on the joint estimate (an approximation: the joint fit has no sandwich
    # estimate of its own; the bootstrap gives proper bounds)
    out = [replace(f, params=jf.params[f.factor], conf_int=f.conf_int + (jf.params[f.factor] - f.params)[:, None])
           for f in factors]
    return out, {**jf.to_dict(), "shape": opts.shape}


def _cv_rule(fitted: Sequence[FactorCeiling], kept: list[FactorCeiling], info: dict[str, Any], samples: Any,
             opts: Any, left: dict[str, str]) -> tuple[list[FactorCeiling], dict[str, Any]]:
    """Blocked-CV backward elimination of the joint fit ``kept``; updates ``left`` in place.

    With ``edge_test="both"`` only the factors the (block-bootstrap) wedge test finds without a
    distinct edge may go, and only when held-out sites agree: two tests must agree before a
    factor leaves the minimum.
    """
    keep = tuple(opts.keep)
    no_edge: dict[str, str] = {}
    if opts.edge_test == "both":
        no_edge = _wedge_rule(fitted, opts, left)
        keep += tuple(f.factor for f in kept if f.factor not in no_edge)
    if len(kept) < 2 or not {f.factor for f in kept} - set(keep):
        return kept, info
    settings = ScreenSettings(tau=opts.tau, transform=opts.transform, folds=opts.cv_folds, block=opts.cv_block,
                              seed=opts.seed, concave=opts.shape == "concave", keep=keep)
    sc = screen_by_cv(kept, samples, settings)
    if sc.left_out:
        left.update({n: (f"{no_edge[n]} and " if n in no_edge else "") + why for n, why in sc.left_out.items()})
        kept, info = _joint([f for f in fitted if f.factor not in left], samples, opts)
    test = "block-bootstrap wedge test and blocked cross-validation" if no_edge else "blocked cross-validation"
    info["screening"] = {"test": test, "folds": opts.cv_folds, "rounds": sc.table.to_dict("records")}
    return kept, info


def choose_factors(fitted: Sequence[FactorCeiling], samples: Any, opts: Any) -> Chosen:
    """Which of the per-factor fits ``fitted`` take part in the minimum, and with which curves.

    ``opts`` is a :class:`ceiling.model.FitOptions`.
    """
    left = {f.factor: "left out by fit.drop" for f in fitted if f.factor in opts.drop}
    if opts.screen and (opts.edge_test == "wedge" or opts.method == "per_factor"):
        left.update(_wedge_rule(fitted, opts, left))
    kept = [f for f in fitted if f.factor not in left]
    info: dict[str, Any] = {"method": "per_factor"}
    if opts.method == "joint":
        kept, info = _joint(kept, samples, opts)
        if opts.screen and opts.edge_test in ("cv", "both"):
            kept, info = _cv_rule(fitted, kept, info, samples, opts, left)
    names = [f.factor for f in kept]
    at_sites = site_correlations(samples.values, [f.factor for f in fitted])
    for name, why in list(left.items()):
        if why != "left out by fit.drop":
            note = decoupling(name, names, at_sites, opts.futures)
            if note:
                left[name] = f"{why}; {note}"
    final = {f.factor: f for f in kept}
    return Chosen([final.get(f.factor, f) for f in fitted], left, info)
