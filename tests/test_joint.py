"""The joint law-of-the-minimum fit (ceiling.joint) on a toy whose boundary is known exactly.

Toy: two independent factors uniform on [0, 10], true ceilings f1 = 10 + 6 x1 and
f2 = 70 - 5 x2, abundance y = min(f1, f2) * U with U uniform on [0, 1]. The conditional
tau-quantile of y is then exactly tau * min(f1, f2) (the quantile of a scaled uniform; from
memory, elementary probability), so the tau boundary is the minimum of the curves tau * f_k,
each linear: the joint fit in linear bases should recover both.
"""

from __future__ import annotations

import time

import numpy as np
import pandas as pd
import pytest

from ceiling.joint import joint_fit
from ceiling.model import fit

TAU = 0.9


class _Toy:
    def __init__(self, n: int = 1500, seed: int = 3):
        rng = np.random.default_rng(seed)
        self.x1 = rng.uniform(0, 10, n)
        self.x2 = rng.uniform(0, 10, n)
        self.f1 = lambda x: 10 + 6 * x
        self.f2 = lambda x: 70 - 5 * x
        c = np.minimum(self.f1(self.x1), self.f2(self.x2))
        self.abundance = c * rng.uniform(0, 1, n)
        self.values = pd.DataFrame({"a": self.x1, "b": self.x2})
        self.species = "toy"
        self.dropped = {}


@pytest.fixture(scope="module")
def toy():
    return _Toy()


def _curve_error(model, toy) -> dict[str, float]:
    grid = np.linspace(1, 9, 81)
    out = {}
    for name, f in (("a", toy.f1), ("b", toy.f2)):
        truth = TAU * f(grid)
        out[name] = float(np.max(np.abs(model[name].predict(grid) - truth)) / (TAU * 70))
    return out


def test_joint_fit_recovers_both_curves(toy):
    t0 = time.perf_counter()
    m = fit(toy, [{"name": "a", "basis": "linear"}, {"name": "b", "basis": "linear"}], tau=TAU,
            wedge_replicates=0, method="joint", seed=0)
    assert time.perf_counter() - t0 < 20
    err = _curve_error(m, toy)
    # tolerance: the largest error over the inner range, 3 % of the boundary's peak
    assert all(e < 0.03 for e in err.values()), err
    info = m.fit_info
    assert info["method"] == "joint"
    assert info["objective_end"] <= info["objective_start"]
    # share above a tau boundary is about 1 - tau (common practice)
    assert abs(info["share_above"] - (1 - TAU)) < 0.02
    assert abs(sum(info["limiting_share"].values()) - 1) < 1e-9


def test_joint_fit_beats_the_per_factor_fit_on_the_toy(toy):
    # the per-factor fits sit on the marginal edges, below the true curves where the other
    # factor limits; the joint fit must be clearly closer to the truth
    specs = [{"name": "a", "basis": "linear"}, {"name": "b", "basis": "linear"}]
    per = fit(toy, specs, tau=TAU, wedge_replicates=0, method="per_factor")
    joint = fit(toy, specs, tau=TAU, wedge_replicates=0, method="joint")
    e_per, e_joint = _curve_error(per, toy), _curve_error(joint, toy)
    assert max(e_joint.values()) < 0.5 * max(e_per.values()), (e_per, e_joint)


def test_joint_fit_is_deterministic(toy):
    per = fit(toy, [{"name": "a", "basis": "linear"}, {"name": "b", "basis": "linear"}], tau=TAU,
              wedge_replicates=0)
    a = joint_fit(per.factors, toy.values, toy.abundance, tau=TAU, starts=2, seed=5)
    b = joint_fit(per.factors, toy.values, toy.abundance, tau=TAU, starts=2, seed=5)
    for k in a.params:
        np.testing.assert_array_equal(a.params[k], b.params[k])


# --------------------------------------------------------------------------------------------
# Measured acceptance on the demo's simulated truth, on the GRID (every land cell), present and
# one future (ssp585 / model-a / 2071-2100). The truth is ceiling.demo.true_ceiling of
# truth.json evaluated on the grid's factor values. Measured (default fit: joint with
# screening, wedge replicates 10 as demo_run; per-factor fit: all factors, no screening):
#   limiting factor right, present (cells with true ceiling > 0.2 of the present true peak):
#     per-factor   sp_a 0.854  sp_b 0.695  sp_c 0.769
#     default      sp_a 0.903  sp_b 0.877  sp_c 0.939
#   Spearman correlation of recovered and true ceilings, present:
#     per-factor   0.983 / 0.956 / 0.984      default 0.998 / 0.992 / 0.998
#   sign of the change right where the true change exceeds 0.2 of the true peak:
#     per-factor   0.999 / 0.919 / 0.998      default 1.000 / 0.993 / 0.999
# Thresholds a little below the measurement.
ACCEPT_SHARE = {"sp_a": 0.88, "sp_b": 0.85, "sp_c": 0.92}
ACCEPT_GAIN = {"sp_a": 0.03, "sp_b": 0.15, "sp_c": 0.15}
ACCEPT_RHO = 0.985
ACCEPT_SIGN = 0.98


def _grid_values(folder, names):
    import rasterio

    out = {}
    for f in names:
        with rasterio.open(folder / f"{f}.tif") as src:
            out[f] = src.read(1, masked=True).astype("float64").filled(np.nan).ravel()
    return out


@pytest.fixture(scope="module")
def demo_grids(demo_truth):
    from conftest import REPO

    names = list(demo_truth["factors"])
    pres = _grid_values(REPO / "demo_grids" / "present", names)
    fut = _grid_values(REPO / "demo_grids" / "future" / "ssp585" / "model-a" / "2071-2100", names)
    ok = np.all([np.isfinite(pres[f]) & np.isfinite(fut[f]) for f in names], axis=0)
    return names, {f: v[ok] for f, v in pres.items()}, {f: v[ok] for f, v in fut.items()}


@pytest.fixture(scope="module")
def per_factor_models():
    import warnings

    from conftest import DEMO_CONFIG

    from ceiling.config import load_config
    from ceiling.fitting import fit_config

    cfg = load_config(DEMO_CONFIG)
    fit_cfg = cfg.fit.model_copy(update={"wedge_replicates": 0, "bootstrap": 0, "method": "per_factor", "screen": False})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fit_config(cfg.model_copy(update={"fit": fit_cfg})).models


def _grid_measure(model, truth_sp, names, pres, fut):
    from scipy.stats import spearmanr

    from ceiling.demo import true_ceiling

    tc_p, tl_p = true_ceiling(truth_sp, pres, names)
    tc_f, _ = true_ceiling(truth_sp, fut, names)
    c_p, code = model.evaluate(pres)
    c_f, _ = model.evaluate(fut)
    peak = np.nanmax(tc_p)
    well = tc_p > 0.2 * peak
    got = np.array(model.factor_names)[code]
    share = float(np.mean(got[well] == np.array(names)[tl_p[well]]))
    rho = float(spearmanr(c_p, tc_p).statistic)
    d_true = tc_f - tc_p
    big = np.abs(d_true) > 0.2 * peak
    sign = float(np.mean(np.sign(c_f - c_p)[big] == np.sign(d_true[big])))
    return share, rho, sign


@pytest.mark.parametrize("sp", ["sp_a", "sp_b", "sp_c"])
def test_default_fit_meets_the_acceptance_on_the_demo_grid(demo_run, per_factor_models, demo_truth, demo_grids, sp):
    names, pres, fut = demo_grids
    truth_sp = demo_truth["species"][sp]
    share, rho, sign = _grid_measure(demo_run.models[sp], truth_sp, names, pres, fut)
    share_a, rho_a, _ = _grid_measure(per_factor_models[sp], truth_sp, names, pres, fut)
    assert share >= ACCEPT_SHARE[sp], share
    assert share - share_a >= ACCEPT_GAIN[sp], (share, share_a)
    assert rho >= ACCEPT_RHO and rho >= rho_a, (rho, rho_a)
    assert sign >= ACCEPT_SIGN, sign


@pytest.mark.parametrize("df", [3, 4])
def test_concave_spline_form_spans_the_natural_spline_and_its_bounds_mean_concave(df):
    # the natural cubic spline's second derivative is a linear spline, zero at the boundary
    # knots (Hastie, Tibshirani & Friedman, The Elements of Statistical Learning, 2nd ed.,
    # sec. 5.2.1), so it is a sum of hat functions at the interior knots: coefficients <= 0
    # on them are exactly the concave curves, and the two bases span the same curves
    from ceiling.boundary import make_basis
    from ceiling.boundary.shapes import concave_form

    x = np.random.default_rng(0).uniform(-3, 7, 400)
    b = make_basis("spline", x, df=df)
    form = concave_form(b)
    grid = np.linspace(-3, 7, 401)
    theta = np.random.default_rng(1).normal(size=b.n_params)
    back = form.to_basis(form.from_basis(theta))
    np.testing.assert_allclose(b.design(grid) @ back, b.design(grid) @ theta, atol=1e-8)
    rng = np.random.default_rng(2)
    for _ in range(20):  # random coefficients within the bounds: the curve bends down everywhere
        phi = rng.normal(size=b.n_params)
        phi[2:] = -np.abs(phi[2:])
        curve = form.design(grid) @ phi
        np.testing.assert_allclose(b.design(grid) @ form.to_basis(phi), curve, atol=1e-8)
        assert np.all(np.diff(curve, 2) <= 1e-9)


def test_concave_joint_fit_keeps_every_quadratic_bent_down():
    # a convex start (a curve that rises again at both ends) is replaced by the nearest concave
    # one, and the fitted quadratics all have a second coefficient <= 0; on the toy (linear
    # truth) the concave fit is as good as the free one
    rng = np.random.default_rng(5)
    toy = _Toy(n=800, seed=5)
    toy.values["noise"] = rng.uniform(0, 10, 800)
    specs = [{"name": n, "basis": "quadratic"} for n in ("a", "b", "noise")]
    per = fit(toy, specs, tau=TAU, wedge_replicates=0, seed=0)
    start = [f for f in per.factors]
    start[2] = type(start[2])(**{**start[2].__dict__, "params": np.array([0.0, 0.0, 50.0])})  # convex start
    free = joint_fit(start, toy.values, toy.abundance, tau=TAU, seed=0)
    conc = joint_fit(start, toy.values, toy.abundance, tau=TAU, seed=0, concave=True)
    assert all(b[2] <= 1e-12 for b in conc.params.values()), conc.params
    assert conc.objective_end <= free.objective_end * 1.02, (conc.objective_end, free.objective_end)
