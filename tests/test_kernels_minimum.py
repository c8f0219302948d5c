"""Law of the minimum: properties of the combined ceiling and of the limiting-factor codes.

Source of the rule: Liebig's law of the minimum as used for multi-factor ceilings: the joint
upper limit is the smallest of the single-factor limits, and the factor attaining it limits.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from numpy.testing import assert_allclose

from ceiling.boundary import fit_factor
from ceiling.kernels import NODATA_CODE, combine_minimum, forward_transform, inverse_transform
from ceiling.model import CeilingModel

TRANSFORMS = ["none", "log1p", "sqrt"]

finite = st.floats(min_value=-50.0, max_value=50.0, allow_nan=False, allow_infinity=False)


@st.composite
def predictor_stacks(draw, with_nan: bool = False):
    k = draw(st.integers(1, 5))
    n = draw(st.integers(1, 30))
    elems = st.one_of(finite, st.just(np.nan)) if with_nan else finite
    return draw(arrays(np.float64, (k, n), elements=elems))


@settings(max_examples=150, deadline=None)
@given(eta=predictor_stacks(), transform=st.sampled_from(TRANSFORMS))
def test_minimum_is_below_every_factor_and_attained_by_the_limiting_one(eta, transform):
    per = inverse_transform(eta, transform)
    cmin, code = combine_minimum(eta, transform)
    assert code.dtype == np.uint8
    assert np.all(cmin >= 0)
    assert np.all(cmin[np.newaxis] <= per)
    assert np.all(code < eta.shape[0])
    cols = np.arange(eta.shape[1])
    assert np.array_equal(cmin, per[code, cols])
    assert np.array_equal(cmin, per.min(axis=0))


@settings(max_examples=150, deadline=None)
@given(eta=predictor_stacks(with_nan=True), transform=st.sampled_from(TRANSFORMS))
def test_nan_in_any_factor_gives_nan_and_nodata_code(eta, transform):
    cmin, code = combine_minimum(eta, transform)
    bad = np.isnan(eta).any(axis=0)
    assert np.all(np.isnan(cmin[bad]))
    assert np.all(code[bad] == NODATA_CODE)
    assert np.all(np.isfinite(cmin[~bad]))
    assert np.all(code[~bad] < eta.shape[0])


@settings(max_examples=100, deadline=None)
@given(eta=predictor_stacks(), transform=st.sampled_from(TRANSFORMS))
def test_ties_go_to_lowest_unclipped_then_first(eta, transform):
    per = inverse_transform(eta, transform)
    _, code = combine_minimum(eta, transform)
    for j in range(eta.shape[1]):
        tied = np.flatnonzero(per[:, j] == per[:, j].min())
        lowest = eta[tied, j].min()
        expect = tied[eta[tied, j] == lowest][0]
        assert code[j] == expect


def test_hand_made_ties():
    eta = np.array([
        # col 0: factors 0 and 1 both clip to zero; factor 1 is further below -> 1
        # col 1: exact tie at 2.0 between factors 0 and 2 -> first in order, 0
        # col 2: exact tie of all three below zero at the same value -> first, 0
        # col 3: no tie: factor 2 is smallest
        [-1.0, 2.0, -4.0, 9.0],
        [-3.0, 5.0, -4.0, 8.0],
        [7.0, 2.0, -4.0, 1.0],
    ])
    cmin, code = combine_minimum(eta, "none")
    assert_allclose(cmin, [0.0, 2.0, 0.0, 1.0])
    assert code.tolist() == [1, 0, 0, 2]
    # transforms do not change which factor limits
    for t in ("log1p", "sqrt"):
        assert combine_minimum(eta, t)[1].tolist() == [1, 0, 0, 2]


def test_multidimensional_grid_keeps_shape():
    eta = np.stack([np.full((3, 4), 2.0), np.arange(12.0).reshape(3, 4) - 3])
    eta[1, 2, 3] = np.nan
    cmin, code = combine_minimum(eta)
    assert cmin.shape == code.shape == (3, 4)
    assert code[2, 3] == NODATA_CODE and np.isnan(cmin[2, 3])
    assert code[0, 0] == 1 and cmin[0, 0] == 0.0


@pytest.mark.parametrize("transform", TRANSFORMS)
def test_transforms_invert_and_clip_at_zero(transform):
    y = np.array([0.0, 0.5, 3.0, 250.0])
    assert_allclose(inverse_transform(forward_transform(y, transform), transform), y, rtol=1e-12)
    # a negative predictor means a ceiling of zero (not, say, a positive square)
    assert np.all(inverse_transform(np.array([-2.0, -1e-9]), transform) == 0.0)


@pytest.fixture(scope="module")
def three_factor_model():
    rng = np.random.default_rng(3)
    n = 300
    a, b, c = rng.uniform(0, 10, n), rng.uniform(-5, 5, n), rng.uniform(100, 200, n)
    cap = np.minimum.reduce([40 - 4 * np.abs(a - 5) ** 1.5, 30 + 3 * b, 0.5 * c - 40])
    y = np.maximum(cap, 0) * rng.beta(3, 0.7, n)
    fcs = tuple(
        fit_factor(x, y, factor=name, tau=0.9, basis="quadratic", wedge_replicates=0)
        for name, x in (("a", a), ("b", b), ("c", c))
    )
    return CeilingModel(species="s", factors=fcs, tau=0.9, transform="none", outside="hold")


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    a=arrays(np.float64, 12, elements=st.floats(-5, 15)),
    b=arrays(np.float64, 12, elements=st.floats(-10, 10)),
    c=arrays(np.float64, 12, elements=st.floats(50, 250)),
)
def test_model_evaluate_is_the_minimum_of_its_factors(three_factor_model, a, b, c):
    m = three_factor_model
    values = pd.DataFrame({"c": c, "a": a, "b": b})  # column order must not matter
    per = m.per_factor(values)
    ceiling, code = m.evaluate(values)
    assert per.shape == (3, 12)
    assert np.all(ceiling >= 0)
    assert np.all(ceiling[np.newaxis] <= per)
    assert np.array_equal(ceiling, per[code, np.arange(12)])
    assert np.array_equal(m.predict(values), ceiling)
    assert np.array_equal(m.limiting(values), code)


def test_model_evaluate_nan_and_missing_factor(three_factor_model):
    m = three_factor_model
    values = {"a": np.array([5.0, np.nan]), "b": np.array([0.0, 0.0]), "c": np.array([150.0, 150.0])}
    ceiling, code = m.evaluate(values)
    assert np.isfinite(ceiling[0]) and code[0] < 3
    assert np.isnan(ceiling[1]) and code[1] == NODATA_CODE
    from ceiling.errors import FitError

    with pytest.raises(FitError, match="'c' are missing"):
        m.evaluate({"a": values["a"], "b": values["b"]})
