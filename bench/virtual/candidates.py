"""The fitting settings the suite compares, all through the project's Python API.

- ``defaults``: :func:`ceiling.model.fit` with the options a config without a ``[fit]`` section
  gets (:func:`ceiling.fitting.fit_options` of a default :class:`ceiling.config.FitConfig`);
- ``plain``: one quadratic quantile fit per factor at tau 0.95, every factor in the minimum;
- ``joint_all``: the joint law-of-the-minimum fit of every factor, no screening;
- ``previous``: the defaults before the suite existed, rebuilt here from public pieces: the
  wedge test with a pairs bootstrap (points taken as independent), factors with p >= 0.05 left
  out, and of two factors with |Spearman| > 0.9 at the sites the one with the larger wedge
  p-value left out, then the joint fit of the rest;
- further candidates tried while choosing the defaults (see BENCHMARKS.md).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.stats import spearmanr

from ceiling.boundary import make_basis
from ceiling.boundary.diagnostics import wedge_test
from ceiling.config import FactorConfig, FitConfig
from ceiling.fitting import fit_options
from ceiling.model import CeilingModel, FactorSpec, fit

__all__ = ["Candidate", "CANDIDATES", "candidate"]

TAU = 0.95
_FACTOR = FactorConfig(name="f", column="f")  # a factor's defaults


@dataclass(frozen=True)
class Candidate:
    name: str
    label: str
    options: dict[str, Any] = field(default_factory=dict)
    custom: Callable[[Any], CeilingModel] | None = None
    basis: tuple[str, int] = ("quadratic", 4)

    def fit(self, samples: Any) -> CeilingModel:
        if self.custom is not None:
            return self.custom(samples)
        specs = [FactorSpec(n, basis=self.basis[0], df=self.basis[1]) for n in samples.values.columns]
        return fit(samples, specs, **self.options)


def _previous(samples: Any) -> CeilingModel:
    names = list(samples.values.columns)
    y = np.asarray(samples.abundance, dtype=np.float64)
    p = {}
    for i, n in enumerate(names):
        x = samples.values[n].to_numpy(dtype=np.float64)
        p[n] = wedge_test(y, make_basis("quadratic", x).design(x), TAU, replicates=50, seed=i)[2]
    out = {n for n in names if p[n] >= 0.05}
    pairs = []
    for i, a in enumerate(names):
        for b in names[i + 1:]:
            r = abs(float(spearmanr(samples.values[a], samples.values[b]).statistic))
            if r > 0.9:
                pairs.append((r, a, b))
    for _, a, b in sorted(pairs, reverse=True):
        if a not in out and b not in out:
            out.add(b if p[a] <= p[b] else a)
    if len(out) == len(names):
        out.discard(min(names, key=lambda n: p[n]))
    return fit(samples, [FactorSpec(n) for n in names], tau=TAU, method="joint", screen=False,
               wedge_replicates=0, drop=sorted(out))


CANDIDATES: dict[str, Candidate] = {
    c.name: c for c in (
        Candidate("defaults", "defaults (a config without [fit] and without basis / df)", fit_options(FitConfig()),
                  basis=(_FACTOR.basis, _FACTOR.df)),
        Candidate("plain", "plain: per-factor quadratic, tau 0.95, all factors",
                  dict(tau=TAU, method="per_factor", screen=False, wedge_replicates=0)),
        Candidate("joint_all", "joint fit, every factor, no screening",
                  dict(tau=TAU, method="joint", screen=False, wedge_replicates=0)),
        Candidate("joint_spline3", "joint fit, every factor, natural splines df 3",
                  dict(tau=TAU, method="joint", screen=False, wedge_replicates=0), basis=("spline", 3)),
        Candidate("joint_spline4", "joint fit, every factor, natural splines df 4",
                  dict(tau=TAU, method="joint", screen=False, wedge_replicates=0), basis=("spline", 4)),
        Candidate("joint_linear", "joint fit, every factor, linear",
                  dict(tau=TAU, method="joint", screen=False, wedge_replicates=0), basis=("linear", 4)),
        Candidate("concave_quad", "joint fit, every factor, concave quadratics",
                  dict(tau=TAU, method="joint", screen=False, wedge_replicates=0, shape="concave")),
        Candidate("concave_spline3", "joint fit, every factor, concave natural splines df 3",
                  dict(tau=TAU, method="joint", screen=False, wedge_replicates=0, shape="concave"), basis=("spline", 3)),
        Candidate("concave_spline4", "joint fit, every factor, concave natural splines df 4",
                  dict(tau=TAU, method="joint", screen=False, wedge_replicates=0, shape="concave"), basis=("spline", 4)),
        Candidate("cs3_tau90", "joint fit, every factor, concave natural splines df 3, tau 0.9",
                  dict(tau=0.9, method="joint", screen=False, wedge_replicates=0, shape="concave"), basis=("spline", 3)),
        Candidate("cq_cv", "joint, concave quadratics, blocked-CV screening",
                  dict(tau=TAU, method="joint", screen=True, edge_test="cv", wedge_replicates=0, shape="concave")),
        Candidate("cq_wedge", "joint, concave quadratics, block-bootstrap wedge screening",
                  dict(tau=TAU, method="joint", screen=True, edge_test="wedge", wedge_replicates=50, shape="concave")),
        Candidate("cq_both", "joint, concave quadratics, out only when the block-bootstrap wedge test and blocked CV agree",
                  dict(tau=TAU, method="joint", screen=True, edge_test="both", wedge_replicates=50, shape="concave")),
        Candidate("cs3_both", "joint, concave splines df 3, out only when block wedge test and blocked CV agree",
                  dict(tau=TAU, method="joint", screen=True, edge_test="both", wedge_replicates=50, shape="concave"),
                  basis=("spline", 3)),
        Candidate("cs3_cv", "joint, concave splines df 3, blocked-CV screening",
                  dict(tau=TAU, method="joint", screen=True, edge_test="cv", wedge_replicates=0, shape="concave"),
                  basis=("spline", 3)),
        Candidate("cs3_wedge", "joint, concave splines df 3, block-bootstrap wedge screening",
                  dict(tau=TAU, method="joint", screen=True, edge_test="wedge", wedge_replicates=50, shape="concave"),
                  basis=("spline", 3)),
        Candidate("previous", "previous defaults: joint + wedge test (points independent) + |Spearman| > 0.9",
                  custom=_previous),
    )
}


def candidate(name: str) -> Candidate:
    try:
        return CANDIDATES[name]
    except KeyError:
        raise SystemExit(f"unknown candidate {name!r}; choose from {', '.join(CANDIDATES)}") from None
