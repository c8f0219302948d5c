"""Factor screening (ceiling.screening) on simulated data with a known truth.

Toy: two real limiting factors with linear ceilings and one pure-noise factor (independent of
the abundance); abundance = min(ceilings) * U, U uniform. A real limiting factor makes a wedge
(the spread of abundance grows with the ceiling), a noise factor has none: the wedge test
should drop the noise factor and keep the real ones. A copy of a real factor with small
noise added moves with it (Spearman correlation about 0.99) and is a real limit too: it stays.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from ceiling.config import parse_config
from ceiling.errors import ConfigError
from ceiling.model import ModelSet, _parse, fit

TAU = 0.9


class _Toy:
    def __init__(self, n: int = 800, seed: int = 11, duplicate: bool = False):
        rng = np.random.default_rng(seed)
        a, b, noise = rng.uniform(0, 10, n), rng.uniform(0, 10, n), rng.uniform(0, 10, n)
        c = np.minimum(10 + 6 * a, 70 - 5 * b)
        self.abundance = c * rng.uniform(0, 1, n)
        cols = {"a": a, "b": b, "noise": noise}
        if duplicate:
            cols["a_copy"] = a + rng.normal(0, 0.3, n)
        self.values = pd.DataFrame(cols)
        self.species = "toy"
        self.dropped = {}


def _fit(toy, names, **kw):
    return fit(toy, [{"name": n, "basis": "linear"} for n in names], tau=TAU, wedge_replicates=50,
               seed=2, **kw)


def test_screening_drops_the_noise_factor_and_keeps_the_real_ones():
    toy = _Toy()
    m = _fit(toy, ["a", "b", "noise"], screen=True)
    assert m.factor_names == ["a", "b"]
    out = {f.factor: f for f in m.screened}
    assert list(out) == ["noise"]
    assert "wedge test p=" in out["noise"].screened_reason
    assert out["noise"].diagnostics.wedge_p >= 0.05
    # the real factors' wedges are clear (p far below the level)
    assert all(f.diagnostics.wedge_p < 0.01 for f in m.factors)


def test_without_screening_every_factor_is_in_the_minimum():
    m = _fit(_Toy(), ["a", "b", "noise"], screen=False)
    assert m.factor_names == ["a", "b", "noise"] and not m.screened


def test_keep_and_drop_force_factors_in_and_out():
    toy = _Toy()
    m = _fit(toy, ["a", "b", "noise"], screen=True, keep=["noise"], drop=["b"])
    assert m.factor_names == ["a", "noise"]
    assert m["b"].screened_reason == "left out by fit.drop"


def test_correlation_alone_never_leaves_a_factor_out():
    # a near-copy of a real factor (Spearman about 0.99 at the sites) is a real limit too: the
    # screening keeps both (the rule it replaces left one out on the correlation alone)
    toy = _Toy(duplicate=True)
    assert toy.values["a"].corr(toy.values["a_copy"], method="spearman") > 0.98
    m = _fit(toy, ["a", "b", "noise", "a_copy"], screen=True)
    assert {"a", "b", "a_copy"} <= set(m.factor_names)
    assert [f.factor for f in m.screened] == ["noise"]


def test_joint_screening_needs_both_tests_to_leave_a_factor_out():
    # edge_test="both": the noise factor (no edge by the wedge test) goes only because the
    # held-out loss of the joint fit is no worse without it; the real factors stay whatever
    # the cross-validation says, because the wedge test finds their edges
    toy = _Toy(n=800)
    m = _fit(toy, ["a", "b", "noise"], screen=True, method="joint", edge_test="both", shape="concave")
    assert m.factor_names == ["a", "b"]
    reason = m["noise"].screened_reason
    assert "wedge test p=" in reason and "blocked cross-validation" in reason
    assert m.fit_info["screening"]["test"].startswith("block-bootstrap wedge test")


def test_a_factor_left_out_that_parts_ways_in_the_future_is_named():
    from ceiling.screening import decoupling, site_correlations

    rng = np.random.default_rng(0)
    a = rng.normal(size=500)
    sites = pd.DataFrame({"a": a, "a2": a + rng.normal(0, 0.1, 500)})
    at_sites = site_correlations(sites, ["a", "a2"])
    together = {"ssp": {"a": a, "a2": a + rng.normal(0, 0.1, 500)}}
    apart = {"ssp": {"a": a, "a2": rng.normal(size=500)}}
    assert "not in the future" not in decoupling("a2", ["a"], at_sites, together)
    note = decoupling("a2", ["a"], at_sites, apart)
    assert "moves with a at the survey sites" in note and "not in the future" in note and "ssp" in note
    assert decoupling("a2", ["a"], at_sites, None).startswith("it moves with a")


def test_screened_factors_survive_the_model_file():
    m = _fit(_Toy(), ["a", "b", "noise"], screen=True)
    data = json.loads(ModelSet({"toy": m}).to_json())
    flags = {f["name"]: f["in_minimum"] for f in data["species"]["toy"]["factors"]}
    assert flags == {"a": True, "b": True, "noise": False}
    back = _parse(data, "test")["toy"]
    assert back.factor_names == ["a", "b"] and [f.factor for f in back.screened] == ["noise"]
    table = back.diagnostics_table()
    assert dict(zip(table["factor"], table["in_minimum"])) == flags
    assert "wedge test" in table.set_index("factor").loc["noise", "screened_reason"]


def test_keep_of_an_unknown_factor_is_a_config_error():
    data = {"survey": {"path": "s.csv"}, "factors": [{"name": "a", "column": "a"}],
            "fit": {"keep": ["b"]}}
    with pytest.raises(ConfigError, match="fit.keep"):
        parse_config(data)


def test_smoothed_wedge_replicates_agree_with_exact_quantreg():
    # the wedge test's bootstrap replicates come from the smoothed solver by default; on the
    # same resamples statsmodels' exact QuantReg must give a statistic of the same size and
    # the same verdict (the smoothed loss is within h * phi(0) of the check loss: Fernandes,
    # Guerre & Horta 2021)
    from ceiling.boundary import make_basis
    from ceiling.boundary.diagnostics import wedge_test

    toy = _Toy(n=500)
    for name in ("a", "noise"):
        x = toy.values[name].to_numpy()
        X = make_basis("linear", x).design(x)
        exact = wedge_test(toy.abundance, X, TAU, replicates=50, seed=4, solver="exact")
        smooth = wedge_test(toy.abundance, X, TAU, replicates=50, seed=4)
        assert (exact[2] < 0.05) == (smooth[2] < 0.05), (name, exact, smooth)
        if name == "a":
            assert 0.6 < smooth[0] / exact[0] < 1.6, (exact, smooth)


def test_block_bootstrap_counts_a_cluster_of_copies_as_one_site():
    # every site surveyed 8 times over (a tight cluster of identical records) carries the
    # evidence of one site: resampling whole clusters (a cluster bootstrap, Davison & Hinkley
    # 1997, sec. 3.8) must give about the statistic of the sites themselves, while resampling
    # points as if independent inflates it about 8-fold and finds an edge in the noise factor
    from ceiling.boundary import make_basis
    from ceiling.boundary.diagnostics import wedge_test

    toy, k = _Toy(n=200), 8
    for name in ("a", "noise"):
        x, y = toy.values[name].to_numpy(), toy.abundance
        once = wedge_test(y, make_basis("linear", x).design(x), TAU, replicates=100, seed=4)
        xr, yr = np.repeat(x, k), np.repeat(y, k)
        Xr = make_basis("linear", xr).design(xr)
        points = wedge_test(yr, Xr, TAU, replicates=100, seed=4)
        blocks = wedge_test(yr, Xr, TAU, replicates=100, seed=4, blocks=np.repeat(np.arange(x.size), k))
        assert 0.7 < blocks[0] / once[0] < 1.4, (name, once, blocks)
        assert points[0] / once[0] > 1.7, (name, once, points)
    # measured: noise p 0.19 alone, 0.20 with clusters as blocks, 0.001 with points as independent
    assert once[2] >= 0.05 and blocks[2] >= 0.05 and points[2] < 0.05
