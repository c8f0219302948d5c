"""Recovery of the simulated truth of the invented demo scenario.

The demo survey was simulated as count ~ Poisson(C * U) with C the true law-of-the-minimum
ceiling (demo_grids/truth.json, evaluated by ceiling.demo.true_ceiling) and U a zero-inflated
Beta noise, so the true ceiling is known exactly at every survey point. The demo config is
fitted once for the session (conftest.demo_run); the coefficients do not depend on the number
of wedge replicates.

The per-factor measurements below are of the per-factor fit without screening
(``[fit] method = "per_factor"``, ``screen = false``, fitted here as ``per_factor_run``); the
default run (``demo_run``: joint fit with screening) is checked at the end.

Thresholds were set from a measurement (values in the comments below) and put a little on the
safe side of it; they are statements about how well the method recovers a known truth, not
copies of our own output.
"""

from __future__ import annotations

import numpy as np
import pytest

from ceiling.demo import ceiling_curve, true_ceiling
from ceiling.model import CeilingModel

SPECIES = ["sp_a", "sp_b", "sp_c"]
# "True ceiling well above zero": above this share of the species' largest true ceiling at its
# survey points (near zero every factor clips to 0 and the limiting factor is a tie).
WELL_ABOVE_ZERO = 0.2

# Median absolute error of each recovered per-factor ceiling against the true curve over the
# inner 90 % of the observed range (5 % to 95 % quantiles of the sampled factor values),
# relative to the true curve's peak there. Measured (tau 0.95, quadratic bases):
#   sp_a  tmax_warm 0.087  tmin_cold 0.086  precip 0.059
#   sp_b  tmin_cold 0.097  precip 0.100    moisture 0.141
#   sp_c  tmax_warm 0.057  precip 0.053    moisture 0.103
# The per-factor ceiling is a marginal upper edge: where another factor limits, the cloud
# never reaches the true single-factor curve, which is why the error is not smaller.
CURVE_TOLERANCE = 0.15

# Median absolute error of the combined ceiling at the survey points with a true ceiling well
# above zero, relative to the true peak. Measured: sp_a 0.074, sp_b 0.104, sp_c 0.080.
COMBINED_TOLERANCE = 0.12

# Share of survey points (true ceiling well above zero) whose limiting factor matches the truth.
# Measured with all four factors in the minimum:       sp_a 0.865  sp_b 0.735  sp_c 0.791
# Measured with only the truly non-flat factors:       sp_a 0.941  sp_b 0.863  sp_c 0.939
# The aim is >= 0.85; with all factors the flat factors (fitted as if they limited) take a
# share of points, so only sp_a reaches it; sp_b stays below it even without its flat factor.
SHARE_ALL_FACTORS = {"sp_a": 0.84, "sp_b": 0.71, "sp_c": 0.77}
SHARE_NON_FLAT = {"sp_a": 0.92, "sp_b": 0.84, "sp_c": 0.92}


@pytest.fixture(scope="module")
def per_factor_run():
    import warnings

    from conftest import DEMO_CONFIG

    from ceiling.config import load_config
    from ceiling.fitting import fit_config

    cfg = load_config(DEMO_CONFIG)
    fit = cfg.fit.model_copy(update={"wedge_replicates": 10, "bootstrap": 0, "method": "per_factor", "screen": False})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fit_config(cfg.model_copy(update={"fit": fit}))


def _values(run, sp):
    s = run.samples[sp]
    return {f: s.values[f].to_numpy(dtype=float) for f in s.values.columns}


def _non_flat(truth, sp):
    curves = truth["species"][sp]["curves"]
    return [f for f, c in curves.items() if c["form"] != "flat"]


def test_every_species_was_fitted_with_every_factor(demo_run, per_factor_run, demo_truth):
    assert sorted(demo_run.models.species) == sorted(demo_truth["species"])
    for sp in SPECIES:
        assert per_factor_run.models[sp].factor_names == list(demo_truth["factors"])
        m = demo_run.models[sp]
        # screening may leave factors out of the minimum, but every factor is fitted and the
        # minimum keeps the config's order
        assert sorted(f.factor for f in m.all_factors) == sorted(demo_truth["factors"])
        assert m.factor_names == [f for f in demo_truth["factors"] if f in m.factor_names]


@pytest.mark.parametrize("sp", SPECIES)
def test_per_factor_ceiling_follows_the_true_curve(per_factor_run, demo_truth, sp):
    model = per_factor_run.models[sp]
    values = _values(per_factor_run, sp)
    curves = demo_truth["species"][sp]["curves"]
    errors = {}
    for f in _non_flat(demo_truth, sp):
        lo, hi = np.quantile(values[f], [0.05, 0.95])
        grid = np.linspace(lo, hi, 201)
        truth = ceiling_curve(curves[f], grid)
        got = model[f].predict(grid)
        errors[f] = float(np.median(np.abs(got - truth)) / truth.max())
    assert errors and all(e <= CURVE_TOLERANCE for e in errors.values()), errors


@pytest.mark.parametrize("sp", SPECIES)
def test_per_factor_ceiling_has_the_true_direction(per_factor_run, demo_truth, sp):
    # a coarser, shape-level check: rising true curves are recovered rising, falling ones
    # falling, and humps peak inside the inner range near the true optimum
    model = per_factor_run.models[sp]
    values = _values(per_factor_run, sp)
    curves = demo_truth["species"][sp]["curves"]
    for f in _non_flat(demo_truth, sp):
        lo, hi = np.quantile(values[f], [0.05, 0.95])
        c = curves[f]
        got = model[f].predict(np.array([lo, hi]))
        if c["form"] == "linear":
            assert np.sign(got[1] - got[0]) == np.sign(c["params"]["slope"]), f
        else:
            peak = model[f].diagnostics.peak_at
            assert abs(peak - c["params"]["optimum"]) < 0.1 * (hi - lo), (f, peak)


@pytest.mark.parametrize("sp", SPECIES)
def test_combined_ceiling_at_survey_points(per_factor_run, demo_truth, sp):
    model = per_factor_run.models[sp]
    values = _values(per_factor_run, sp)
    factors = model.factor_names
    true_c, _ = true_ceiling(demo_truth["species"][sp], values, factors)
    peak = np.nanmax(true_c)
    well = true_c > WELL_ABOVE_ZERO * peak
    err = np.median(np.abs(model.predict(values)[well] - true_c[well])) / peak
    assert err <= COMBINED_TOLERANCE, err


def _limiting_share(model: CeilingModel, truth_sp, values, factors) -> float:
    true_c, true_lim = true_ceiling(truth_sp, values, factors)
    well = true_c > WELL_ABOVE_ZERO * np.nanmax(true_c)
    assert well.sum() > 100
    sub = CeilingModel(
        species=model.species, factors=tuple(model[f] for f in factors), tau=model.tau,
        transform=model.transform, outside=model.outside,
    )
    got = sub.limiting(values)
    return float(np.mean(got[well] == true_lim[well]))


@pytest.mark.parametrize("sp", SPECIES)
def test_limiting_factor_share_all_factors(per_factor_run, demo_truth, sp):
    model = per_factor_run.models[sp]
    share = _limiting_share(model, demo_truth["species"][sp], _values(per_factor_run, sp), model.factor_names)
    assert share >= SHARE_ALL_FACTORS[sp], share


@pytest.mark.parametrize("sp", SPECIES)
def test_limiting_factor_share_non_flat_factors(per_factor_run, demo_truth, sp):
    model = per_factor_run.models[sp]
    factors = _non_flat(demo_truth, sp)
    share = _limiting_share(model, demo_truth["species"][sp], _values(per_factor_run, sp), factors)
    assert share >= SHARE_NON_FLAT[sp], share


def test_limiting_share_is_far_above_chance(per_factor_run, demo_truth):
    # guard that the share check can fail: a model with its factors' ceilings swapped
    # (each factor evaluated on another's curve) matches the truth far less often
    sp = "sp_a"
    model = per_factor_run.models[sp]
    values = _values(per_factor_run, sp)
    factors = _non_flat(demo_truth, sp)
    share = _limiting_share(model, demo_truth["species"][sp], values, factors)
    shuffled = {f: np.random.default_rng(0).permutation(values[f]) for f in factors}
    true_c, true_lim = true_ceiling(demo_truth["species"][sp], values, factors)
    well = true_c > WELL_ABOVE_ZERO * np.nanmax(true_c)
    sub = CeilingModel(species=sp, factors=tuple(model[f] for f in factors), tau=model.tau,
                       transform=model.transform, outside=model.outside)
    chance = float(np.mean(sub.limiting(shuffled)[well] == true_lim[well]))
    assert share > chance + 0.3


# The default fit (joint law-of-the-minimum fit of the factors left after screening), at the
# survey points, against the same truth. Measured (wedge replicates 10, as demo_run; the same with 50):
#   limiting factor right, points with true ceiling well above zero: sp_a 0.885  sp_b 0.948  sp_c 0.958
#   median absolute error of the combined ceiling / true peak:       sp_a 0.086  sp_b 0.126  sp_c 0.078
# (screening leaves out sp_a's and sp_b's flat factors, moisture and tmax_warm; sp_c's flat
# tmin_cold stays, its concave curve above the others). It names the limiting factor right more
# often than the per-factor fit with all factors (SHARE_ALL_FACTORS above: 0.865 / 0.735 /
# 0.791); the level of the combined ceiling is about as close as the per-factor fit's (the tau
# boundary of the counts is not the ceiling C itself). Before the defaults were chosen on the
# virtual-species suite (BENCHMARKS.md) sp_b measured 0.860 and 0.106.
SHARE_DEFAULT = {"sp_a": 0.86, "sp_b": 0.92, "sp_c": 0.93}
COMBINED_DEFAULT = 0.14


@pytest.mark.parametrize("sp", SPECIES)
def test_default_fit_limiting_share_and_combined_ceiling(demo_run, demo_truth, sp):
    model = demo_run.models[sp]
    values = _values(demo_run, sp)
    factors = list(demo_truth["factors"])
    true_c, true_lim = true_ceiling(demo_truth["species"][sp], values, factors)
    peak = np.nanmax(true_c)
    well = true_c > WELL_ABOVE_ZERO * peak
    c, code = model.evaluate(values)
    got = np.array(model.factor_names)[code]
    share = float(np.mean(got[well] == np.array(factors)[true_lim[well]]))
    err = float(np.median(np.abs(c[well] - true_c[well])) / peak)
    assert share >= SHARE_DEFAULT[sp], share
    assert err <= COMBINED_DEFAULT, err
