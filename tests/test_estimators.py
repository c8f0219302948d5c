"""The binned-maxima estimator and the wedge test of a limiting factor."""

from __future__ import annotations

import json

import numpy as np
import pytest
from numpy.testing import assert_allclose

from ceiling.boundary import LIMITING, NO_EDGE, NOT_TESTED, fit_factor
from ceiling.config import load_config
from ceiling.errors import FitError
from ceiling.fitting import fit_config, fit_to_folder


def _maxima_on_curve(curve, *, n=400, bins=10, lo=0.0, hi=10.0, shrink=0.3, seed=1):
    """Points under ``curve`` (scaled by U(0, shrink)) plus one point exactly on it per bin."""
    rng = np.random.default_rng(seed)
    x = rng.uniform(lo, hi, n)
    y = curve(x) * rng.uniform(0.0, shrink, n)
    width = (hi - lo) / bins
    xm = lo + width * (np.arange(bins) + rng.uniform(0.1, 0.9, bins))
    return np.concatenate([x, xm]), np.concatenate([y, curve(xm)])


@pytest.mark.parametrize(
    ("basis", "curve"),
    [("linear", lambda x: 5.0 + 3.0 * x), ("quadratic", lambda x: 40.0 - (x - 5.0) ** 2)],
    ids=["line", "parabola"],
)
def test_binned_maxima_recover_the_curve_through_the_maxima(basis, curve):
    # Source: Blackburn, Lawton & Perry (1992), Oikos 65:107-112, the upper-bound method:
    # split the factor's range into bins, keep each bin's maximum, regress through the maxima.
    # When every bin's maximum lies on a curve of the basis' family, the fit is that curve.
    x, y = _maxima_on_curve(curve)
    fc = fit_factor(x, y, factor="x", tau=0.95, basis=basis, estimator="binned", bins=10, wedge_replicates=0)
    assert fc.estimator == "binned"
    grid = np.linspace(x.min(), x.max(), 101)  # inside the observed range ('hold' beyond it)
    assert_allclose(fc.predict(grid), curve(grid), rtol=1e-9, atol=1e-9)
    # the quantile estimator on the same data sits far below that edge (only 10 of 410 points
    # are on it), which shows the two estimators really differ
    q = fit_factor(x, y, factor="x", tau=0.95, basis=basis, estimator="quantile", wedge_replicates=0)
    assert np.median(curve(grid) - q.predict(grid)) > 0.2 * np.median(curve(grid))


def test_binned_maxima_ignore_bins_with_too_few_points():
    from ceiling.boundary.ceiling import MIN_BIN_POINTS

    line = lambda x: 5.0 + 3.0 * x  # noqa: E731
    x, y = _maxima_on_curve(line, lo=0.0, hi=9.0, bins=9)
    # a tenth bin [9, 10] holding fewer than MIN_BIN_POINTS points, far above the line
    x = np.concatenate([x, np.linspace(9.2, 10.0, MIN_BIN_POINTS - 1)])
    y = np.concatenate([y, np.full(MIN_BIN_POINTS - 1, 500.0)])
    fc = fit_factor(x, y, factor="x", tau=0.95, basis="linear", estimator="binned", bins=10, wedge_replicates=0)
    assert_allclose(fc.predict(np.array([1.0, 8.0])), line(np.array([1.0, 8.0])), rtol=1e-9)


def test_binned_with_too_few_filled_bins_is_refused():
    rng = np.random.default_rng(1)
    x = np.concatenate([rng.uniform(0, 1, 30), [10.0]])
    y = rng.uniform(0, 1, 31)
    with pytest.raises(FitError, match="binned maxima gave 1 bins.*use fewer bins"):
        fit_factor(x, y, factor="x", basis="quadratic", estimator="binned", bins=10, wedge_replicates=0)


def test_estimator_is_selectable_per_factor_in_the_config(tiny, build):
    import pandas as pd

    rows = pd.read_csv(tiny.survey)
    rows["elev"] = np.linspace(100.0, 900.0, len(rows))
    rows.to_csv(tiny.survey, index=False)
    factors = [
        {"name": "f1", "layer": tiny.layer, "basis": "linear", "estimator": "binned", "bins": 4},
        {"name": "elev", "column": "elev", "basis": "linear"},
    ]
    cfg = load_config(tiny.config(factors=factors))
    run = fit_config(cfg)
    m = run.models["species"]
    assert m["f1"].estimator == "binned" and m["elev"].estimator == "quantile"
    # the binned fit is least squares through the bin maxima, computed here independently
    x, y = run.samples["species"].values["f1"].to_numpy(), run.samples["species"].abundance
    edges = np.linspace(x.min(), x.max(), 5)
    which = np.clip(np.searchsorted(edges, x, side="right") - 1, 0, 3)
    xb, yb = [], []
    for b in range(4):
        idx = np.flatnonzero(which == b)
        if idx.size >= 3:
            j = idx[np.argmax(y[idx])]
            xb.append(x[j])
            yb.append(y[j])
    slope, intercept = np.polyfit(xb, yb, 1)
    grid = np.linspace(x.min(), x.max(), 7)
    assert_allclose(m["f1"].predict(grid), np.maximum(intercept + slope * grid, 0), rtol=1e-9, atol=1e-9)
    # the choice is kept in the model file
    _, written = fit_to_folder(cfg, tiny.out)
    data = json.loads((tiny.out / "model.json").read_text())
    est = {f["name"]: f["estimator"] for f in data["species"]["species"]["factors"]}
    assert est == {"f1": "binned", "elev": "quantile"}


# --- the wedge test ----------------------------------------------------------------------------

def test_wedge_is_detected_as_a_limiting_factor():
    # a real wedge: abundance anywhere between 0 and a ceiling that rises with the factor, so
    # the upper edge (tau 0.9: slope 9) is much steeper than the centre (median: slope 5)
    rng = np.random.default_rng(2024)
    n = 200
    x = rng.uniform(0.0, 10.0, n)
    y = 10.0 * x * rng.uniform(0.0, 1.0, n)
    fc = fit_factor(x, y, factor="x", tau=0.9, basis="linear", wedge_replicates=30, seed=5)
    d = fc.diagnostics
    assert d.wedge_p < 0.05 and d.wedge_df == 1 and d.wedge_stat > 3.84
    assert d.verdict == LIMITING and fc.is_limiting
    # the fitted slopes themselves show the wedge: the median fit is clearly flatter
    grid = np.array([1.0, 9.0])
    assert np.diff(fc.predict(grid))[0] > 1.4 * np.diff(fc.predict_median(grid))[0]


def _location_shift(seed: int, n: int = 200):
    rng = np.random.default_rng(seed)
    x = rng.uniform(0.0, 10.0, n)
    return x, 20.0 + 2.0 * x + rng.normal(0.0, 3.0, n)  # every quantile has slope 2


def test_location_shift_has_no_distinct_upper_edge_fixed_seed():
    # common practice: with homoscedastic noise the tau-quantile line is parallel to the median
    x, y = _location_shift(1)
    fc = fit_factor(x, y, factor="x", tau=0.9, basis="linear", wedge_replicates=30, seed=1)
    assert fc.diagnostics.wedge_p > 0.3  # measured 0.74
    assert fc.diagnostics.verdict == NO_EDGE and not fc.is_limiting


def test_location_shift_rarely_rejects():
    # under no wedge the p-value is (about) uniform, so about 5 % of seeds fall below 0.05;
    # measured over seeds 0-9: 9 of 10 above 0.05, median p 0.47
    ps = []
    for seed in range(10):
        x, y = _location_shift(seed)
        fc = fit_factor(x, y, factor="x", tau=0.9, basis="linear", wedge_replicates=30, seed=seed)
        ps.append(fc.diagnostics.wedge_p)
    ps = np.array(ps)
    assert np.sum(ps > 0.05) >= 8, ps
    assert np.median(ps) > 0.2, ps


def test_wedge_test_is_seeded_and_can_be_skipped():
    x, y = _location_shift(3)
    a = fit_factor(x, y, factor="x", tau=0.9, basis="linear", wedge_replicates=10, seed=7)
    b = fit_factor(x, y, factor="x", tau=0.9, basis="linear", wedge_replicates=10, seed=7)
    assert a.diagnostics.wedge_p == b.diagnostics.wedge_p
    skipped = fit_factor(x, y, factor="x", tau=0.9, basis="linear", wedge_replicates=0)
    assert np.isnan(skipped.diagnostics.wedge_p) and skipped.diagnostics.verdict == NOT_TESTED
    # the ceiling itself does not depend on the wedge test
    assert np.array_equal(a.params, skipped.params)
