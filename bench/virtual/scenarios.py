"""The families of scenarios of the virtual-species suite.

Every family varies one thing over three scenarios; every scenario runs over ``SEEDS`` seeds
(a new landscape, truth placement, survey and abundance each time). The base species has four
factors: a hump (``f1``, the factor that warms most), a saturating rise (``f2``), a logistic
decline (``f3``) and a plateau behind a threshold (``f4``); ``f2`` correlates 0.5 with ``f1``.

| family | what varies |
|---|---|
| ``size`` | uniform sites, 150 / 600 / 3,000 |
| ``clustered`` | 300 sites in 20 clusters, 600 in 40, 2,000 in 80 (sd 1.5 km) |
| ``biased`` | 800 sites drawn toward the warm end of ``f1`` (bias 1 / 1.5 / 2) |
| ``correlated`` | ``f2`` correlated 0.6 / 0.9 / 0.97 with ``f1``, the pair decoupling in the future |
| ``edgeless`` | one factor without an edge, alone; one tied 0.9 to ``f1`` (clustered); two, one tied to ``f3`` (clustered) |
| ``small_limit`` | a fifth factor that limits only beyond its 0.97 / 0.93 / 0.85 quantile |
| ``shapes`` | four humps; four monotone shapes; six factors of every shape, one without an edge |
| ``abundance`` | continuous values (half zeros); Poisson counts of a ceiling of 20; negative binomial, size 0.8 |
| ``novel_future`` | ``f1`` warms by 1 / 1.5 / 2.5 of its present standard deviation |
| ``field_stations`` | 300 / 600 / 1,200 sites in 20 / 40 / 60 clusters, ``f1``-``f2`` at 0.96 decoupling, an edge-less factor |
"""

from __future__ import annotations

import zlib
from dataclasses import dataclass, replace

import numpy as np

from ceiling.samples import Samples

from .landscape import FieldSpec, Landscape, make_landscape
from .survey import Abundance, Design, holdout_blocks, simulate_survey
from .truth import CurveSpec, Truth

__all__ = ["Factor", "Scenario", "Case", "SEEDS", "scenarios", "build"]

SEEDS = (1, 2, 3)


@dataclass(frozen=True)
class Factor:
    curve: CurveSpec
    field: FieldSpec = FieldSpec()


@dataclass(frozen=True)
class Scenario:
    family: str
    name: str
    factors: tuple[Factor, ...]
    design: Design = Design()
    abundance: Abundance = Abundance()

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(f"f{i + 1}" for i in range(len(self.factors)))


@dataclass(frozen=True)
class Case:
    """One scenario at one seed: the landscape, the truth, the survey and the held-out sites."""

    scenario: Scenario
    seed: int
    land: Landscape
    truth: Truth
    samples: Samples
    held_out: np.ndarray  # boolean, per site


HUMP = Factor(CurveSpec("hump", 0.55, 0.85, 100.0), FieldSpec(shift=0.8))
SATURATING = Factor(CurveSpec("saturating", 0.0, 0.5, 110.0), FieldSpec(partner=0, corr=0.5, shift=-0.3))
DECLINING = Factor(CurveSpec("declining", 0.7, 0.95, 120.0), FieldSpec(shift=0.3))
PLATEAU = Factor(CurveSpec("plateau", 0.1, 0.35, 105.0), FieldSpec(shift=0.0))
BASE = (HUMP, SATURATING, DECLINING, PLATEAU)
NO_EDGE = CurveSpec("none", peak=2000.0)


def _with(factors: tuple[Factor, ...], i: int, **field) -> tuple[Factor, ...]:
    out = list(factors)
    out[i] = replace(out[i], field=replace(out[i].field, **field))
    return tuple(out)


def _family(family: str, variants: list[tuple[str, dict]]) -> list[Scenario]:
    return [Scenario(family=family, name=name, **{"factors": BASE, **kw}) for name, kw in variants]


def scenarios() -> list[Scenario]:
    """Every scenario of the suite, family by family."""
    clustered = Design("clustered", 600, clusters=40)
    decoupled = _with(BASE, 1, corr=0.96, pattern=1.0)
    out: list[Scenario] = []
    out += _family("size", [(f"uniform {n}", {"design": Design("uniform", n)}) for n in (150, 600, 3000)])
    out += _family("clustered", [(f"{n} in {c} clusters", {"design": Design("clustered", n, clusters=c)})
                                 for n, c in ((300, 20), (600, 40), (2000, 80))])
    out += _family("biased", [(f"bias {b}", {"design": Design("biased", 800, bias=b)}) for b in (1.0, 1.5, 2.0)])
    out += _family("correlated", [(f"r {r}", {"factors": _with(BASE, 1, corr=r, pattern=1.0), "design": Design("uniform", 800)})
                                  for r in (0.6, 0.9, 0.97)])
    out += _family("edgeless", [
        ("one, independent", {"factors": BASE + (Factor(NO_EDGE),)}),
        ("one, tied 0.9 to f1", {"factors": BASE + (Factor(NO_EDGE, FieldSpec(partner=0, corr=0.9, shift=0.2, pattern=0.8)),),
                                 "design": clustered}),
        ("two, one tied to f3", {"factors": BASE + (Factor(NO_EDGE, FieldSpec(partner=2, corr=0.9, pattern=0.8)),
                                                    Factor(NO_EDGE)), "design": clustered}),
    ])
    out += _family("small_limit", [(f"tail beyond q{a}", {
        "factors": BASE + (Factor(CurveSpec("tail", a, 1.01, 100.0), FieldSpec(shift=0.3)),), "design": Design("uniform", 800)})
        for a in (0.97, 0.93, 0.85)])
    humps = tuple(Factor(CurveSpec("hump", a, a + 0.3, p), FieldSpec(shift=s)) for a, p, s in
                  ((0.55, 100.0, 0.8), (0.4, 110.0, -0.3), (0.6, 120.0, 0.3), (0.5, 105.0, 0.0)))
    monotone = (Factor(CurveSpec("plateau", 0.05, 0.4, 100.0), FieldSpec(shift=0.8)), SATURATING,
                DECLINING, Factor(CurveSpec("tail", 0.8, 1.05, 140.0)))
    mixed = BASE + (Factor(CurveSpec("tail", 0.9, 1.01, 100.0), FieldSpec(shift=0.3)), Factor(NO_EDGE))
    out += _family("shapes", [("four humps", {"factors": humps}), ("four monotone", {"factors": monotone}),
                              ("six, every shape", {"factors": mixed, "design": Design("uniform", 1000)})])
    out += _family("abundance", [
        ("continuous, half zeros", {"abundance": Abundance("continuous", zero_inflation=0.5)}),
        ("Poisson, ceiling 20", {"abundance": Abundance("poisson"), "factors": tuple(
            replace(f, curve=replace(f.curve, peak=f.curve.peak / 5)) for f in BASE)}),
        ("negative binomial 0.8", {"abundance": Abundance("negbin", size=0.8)}),
    ])
    out += _family("novel_future", [(f"f1 +{s} sd", {"factors": _with(BASE, 0, shift=s)}) for s in (1.0, 1.5, 2.5)])
    out += _family("field_stations", [(f"{n} in {c} clusters", {
        "factors": decoupled + (Factor(NO_EDGE),), "design": Design("clustered", n, clusters=c)})
        for n, c in ((300, 20), (600, 40), (1200, 60))])
    return out


def _rng(scenario: Scenario, seed: int, part: int) -> np.random.Generator:
    key = zlib.crc32(f"{scenario.family}/{scenario.name}".encode())
    return np.random.default_rng([key, seed, part])


def build(scenario: Scenario, seed: int) -> Case:
    """The landscape, truth, survey and held-out sites of ``scenario`` at ``seed`` (deterministic)."""
    names = scenario.names
    land = make_landscape(tuple(f.field for f in scenario.factors), names, _rng(scenario, seed, 1))
    truth = Truth.place(names, tuple(f.curve for f in scenario.factors), land.present)
    samples = simulate_survey(land, truth, scenario.design, scenario.abundance, _rng(scenario, seed, 2))
    return Case(scenario, seed, land, truth, samples, holdout_blocks(samples, seed))
