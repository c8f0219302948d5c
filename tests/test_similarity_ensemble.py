"""Novel climates (MESS) and multi-model ensembles.

MESS values below were worked by hand from the formula of Elith, Kearney & Phillips (2010,
Methods in Ecology and Evolution 1:330-342); the formula itself is quoted from memory of the
paper (as written in ceiling/mess.py): with f the percentage of reference values strictly
below p, S = 100 (p - min)/(max - min) if f = 0; 2f if 0 < f <= 50; 2(100 - f) if
50 <= f < 100; 100 (max - p)/(max - min) if f = 100; MESS = min over factors.

The ensemble agreement rule follows the "simple approach" of the IPCC AR6 WG1 Atlas
(Cross-Chapter Box Atlas.1): at least 80% of models agreeing on the sign of the change is
robust, fewer is low agreement.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import rasterio
from projection_helpers import SmallCase, assert_refused, cli, read_code, read_float

from ceiling.ensemble import LOW_AGREEMENT, ROBUST, UNCERTAIN, agreement_kernel, ensemble_kernel
from ceiling.errors import DataError
from ceiling.kernels import CONSTRAINT, RELEASE
from ceiling.mess import check_reference, mess_kernel, similarity

REF = np.arange(1.0, 11.0)  # {1, ..., 10}


@pytest.mark.parametrize(
    ("p", "expected"),
    [
        (5.5, 100.0),  # f = 50 (5 of 10 below)            -> 2f = 100
        (3.0, 40.0),  # f = 20 (1, 2 below)                 -> 2f = 40
        (8.5, 40.0),  # f = 80                              -> 2(100 - 80) = 40
        (0.1, -10.0),  # f = 0                              -> 100 (0.1 - 1)/9 = -10
        (11.8, -20.0),  # f = 100                           -> 100 (10 - 11.8)/9 = -20
        (1.0, 0.0),  # f = 0 ("strictly below")             -> 100 (1 - 1)/9 = 0
        (10.0, 20.0),  # f = 90                             -> 2(100 - 90) = 20
    ],
)
def test_similarity_hand_worked_values(p, expected):
    # Source: hand-worked from the MESS formula (Elith et al. 2010), quoted from memory
    assert similarity(np.array([p]), REF)[0] == pytest.approx(expected, abs=1e-9)


def test_mess_two_factors_and_least_similar_factor():
    # Source: hand-worked from the MESS formula (Elith et al. 2010), quoted from memory:
    # A = {1..10}, B = {0, 10, ..., 90}, point (3, 95): S_A = 40, S_B = 100 (90 - 95)/90 = -5.556
    b = np.arange(0.0, 100.0, 10.0)
    mess, code = mess_kernel([np.array([3.0]), np.array([95.0])], [REF, b])
    assert mess[0] == pytest.approx(-500.0 / 90.0, abs=1e-9)
    assert code[0] == 1


def test_mess_nan_propagates_and_order_of_reference_does_not_matter():
    # common practice: nodata in any factor is nodata in the result
    mess, code = mess_kernel([np.array([3.0, np.nan]), np.array([5.0, 5.0])], [REF, REF])
    assert np.isnan(mess[1]) and code[1] == 255
    assert mess[0] == pytest.approx(40.0)


def test_reference_with_too_few_distinct_values_is_refused():
    with pytest.raises(DataError, match="fewer than 2 distinct values"):
        check_reference({"t": np.array([4.0, 4.0, 4.0])}, ["t"], species="sp1")


def test_agreement_of_five_models_at_the_80_percent_boundary():
    # Source: IPCC AR6 WG1 Atlas, Cross-Chapter Box Atlas.1 (simple approach): >= 80% agree -> robust.
    # Five models; column 0: 4 of 5 positive (agreement 0.8, robust); column 1: 3 of 5 negative (0.6).
    change = np.array([[2.0, -2.0], [3.0, -3.0], [1.0, -4.0], [4.0, 1.0], [-1.0, 2.0]])
    med, agree = agreement_kernel(change)
    assert med.tolist() == [2.0, -2.0]
    assert agree.tolist() == [0.8, 0.6]
    present = np.array([10.0, 10.0])
    out = ensemble_kernel(present, present[None] + change, np.zeros((5, 2), np.uint8), 2)
    assert out["robustness"].tolist() == [ROBUST, LOW_AGREEMENT]
    # column 0: median future 12 > 10 + max(1.0, 0.5) -> release, robust; column 1: median future 8
    # is a constraint in the median (-2 < -1) but only 60% agree -> uncertain
    assert out["zone"].tolist() == [RELEASE, UNCERTAIN]
    assert out["change_min"].tolist() == [-1.0, -4.0]
    assert out["change_max"].tolist() == [4.0, 2.0]
    # interquartile range by numpy's default (linear) percentile: column 0 sorted -1,1,2,3,4 -> 3 - 1
    # column 1 sorted -4,-3,-2,1,2 -> 1 - (-3)
    assert out["change_iqr"].tolist() == [2.0, 4.0]


def test_robust_constraint_keeps_its_class():
    present = np.array([10.0])
    change = np.array([[-3.0], [-2.0], [-4.0], [-1.5], [-2.5]])
    out = ensemble_kernel(present, present[None] + change, np.zeros((5, 1), np.uint8), 2)
    assert out["zone"].tolist() == [CONSTRAINT]
    assert out["agreement"].tolist() == [1.0]


def test_limiting_factor_across_models_is_the_mode_with_its_share():
    lim = np.array([[0], [1], [1], [2], [1]], dtype=np.uint8)
    p = np.array([5.0])
    out = ensemble_kernel(p, np.full((5, 1), 6.0), lim, 3)
    assert out["limiting"].tolist() == [1]
    assert out["limiting_share"].tolist() == [pytest.approx(0.6)]


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    return SmallCase(tmp_path_factory.mktemp("novel") / "case", ny=40, nx=50, futures=2)


def _project(cfg, model, out):
    res = cli(["project", cfg, "--model", model, "--out", out])
    assert res.exit_code == 0, res.stderr
    return out


def test_mask_rule_sets_novel_cells_to_nodata_and_records_the_rule(small, tmp_path):
    # a reference sample covering only the lower half of each factor's range makes many cells novel
    doc = json.loads(small.model.read_text())
    for sp in doc["species"].values():
        for name, vals in sp["reference"].items():
            lo, hi = min(vals), max(vals)
            sp["reference"][name] = [float(v) for v in np.linspace(lo, lo + 0.5 * (hi - lo), 51)]
    model = tmp_path / "narrow.json"
    model.write_text(json.dumps(doc))
    held = _project(small.config("hold.toml"), model, tmp_path / "hold")
    masked = _project(small.config("mask.toml", projection={"novel": "mask"}), model, tmp_path / "mask")
    nov = read_float(held / "sp1" / "present" / "similarity.tif")
    ext = read_code(held / "sp1" / "present" / "extrapolated.tif")
    assert (ext[np.isfinite(nov)] == (nov[np.isfinite(nov)] < 0)).all()
    assert (nov < 0).sum() > 0
    c_hold = read_float(held / "sp1" / "present" / "ceiling.tif")
    c_mask = read_float(masked / "sp1" / "present" / "ceiling.tif")
    assert np.isnan(c_mask[nov < 0]).all()
    ok = nov >= 0
    np.testing.assert_array_equal(c_mask[ok], c_hold[ok])
    with rasterio.open(masked / "sp1" / "present" / "ceiling.tif") as src:
        assert src.tags()["novel_cells"] == "mask"
    s = pd.read_csv(held / "summary.csv")
    row = s[(s["species"] == "sp1") & (s["scenario"] == "present")].iloc[0]
    assert 0 < row["share_novel"] < 1


def test_ensemble_maps_and_rows(small, tmp_path):
    out = _project(small.config("ens.toml"), small.model, tmp_path / "ens")
    d = out / "sp1" / "s1" / "ensemble" / "p1"
    med = read_float(d / "median_change.tif")
    a = read_float(out / "sp1" / "s1" / "m0" / "p1" / "change.tif")
    b = read_float(out / "sp1" / "s1" / "m1" / "p1" / "change.tif")
    # Source: the median of two values is their mean (definition of the median)
    np.testing.assert_allclose(med, 0.5 * (a + b), rtol=1e-6, atol=1e-5, equal_nan=True)
    agree = read_float(d / "agreement.tif")
    expected = np.where(np.sign(a) == np.sign(b), 1.0, 0.5)
    ok = np.isfinite(agree)
    np.testing.assert_array_equal(agree[ok], expected[ok])
    s = pd.read_csv(out / "summary.csv")
    e = s[s["model"] == "ensemble"]
    assert len(e) == 2 and (e["n_models"] == 2).all()


def test_too_few_models_for_an_ensemble_is_said_not_fatal(small, tmp_path):
    cfg = small.config("one.toml", futures=small.futures[:1], projection={"ensemble_min_models": 2})
    res = cli(["project", cfg, "--model", small.model, "--out", tmp_path / "one"])
    assert res.exit_code == 0, res.stderr
    assert not (tmp_path / "one" / "sp1" / "s1" / "ensemble").exists()


def test_reserved_model_name_is_refused(small, tmp_path):
    fut = [{**small.futures[0], "model": "ensemble"}]
    cfg = small.config("reserved.toml", futures=fut)
    out = tmp_path / "reserved"
    res = cli(["project", cfg, "--model", small.model, "--out", out])
    assert_refused(res.exit_code, res.stderr, out, "ensemble", "rename")
