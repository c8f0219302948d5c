"""The fused kernel (ceiling.kernels_fast) against the reference law of the minimum.

The reference is ``CeilingModel.evaluate``: each factor's ``FactorCeiling.linear_predictor``
combined by ``ceiling.kernels.combine_minimum`` (minimum of the clipped, back-transformed
predictors; ties to the lowest unclipped predictor, then to the first factor; NaN in any factor
gives NaN and code 255). Codes must agree exactly, ceilings to float32 rounding.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from ceiling.boundary.bases import LinearBasis, QuadraticBasis, SplineBasis
from ceiling.boundary.ceiling import FactorCeiling
from ceiling.boundary.diagnostics import FactorDiagnostics
from ceiling.kernels import NODATA_CODE
from ceiling.kernels_fast import HAVE_NUMBA, ceiling_and_limiting, evaluate, qualifies
from ceiling.model import CeilingModel

TRANSFORMS = ["none", "log1p", "sqrt"]
DIAG = FactorDiagnostics(10, 0.05, 1.0, 0.5, 0.0, 1.0, -1.0, 1.0, np.nan, 0, np.nan, 0, "not tested")


def factor(name: str, basis: str, coef, lo: float, hi: float, transform: str, outside: str) -> FactorCeiling:
    center, scale = 0.5 * (lo + hi), 0.5 * (hi - lo)
    if basis == "linear":
        b = LinearBasis(center, scale)
    elif basis == "quadratic":
        b = QuadraticBasis(center, scale)
    else:
        b = SplineBasis(center, scale, tuple(np.linspace(lo, hi, len(coef))))
    coef = np.asarray(coef, dtype=np.float64)
    return FactorCeiling(name, b, coef, np.zeros_like(coef), np.zeros((coef.size, 2)), coef, 0.95, transform,
                         outside, (lo, hi), "quantile", DIAG)


@st.composite
def models_and_values(draw):
    k = draw(st.integers(1, 6))
    n = draw(st.integers(1, 200))
    transform = draw(st.sampled_from(TRANSFORMS))
    outside = draw(st.sampled_from(["hold", "extend"]))
    seed = draw(st.integers(0, 2**31 - 1))
    rng = np.random.default_rng(seed)
    fs, values = [], {}
    for j in range(k):
        basis = draw(st.sampled_from(["linear", "quadratic", "spline"]))
        p = {"linear": 2, "quadratic": 3}.get(basis, draw(st.integers(2, 6)))
        coef = rng.normal(0, 3, p)
        coef[0] = rng.uniform(-1, 4)
        lo = rng.uniform(-10, 10)
        hi = lo + rng.uniform(0.5, 20)
        name = f"f{j}"
        fs.append(factor(name, basis, coef, lo, hi, transform, outside))
        # values inside and beyond the observed range, with NaN
        x = rng.uniform(lo - 0.5 * (hi - lo), hi + 0.5 * (hi - lo), n)
        x[rng.uniform(size=n) < 0.1] = np.nan
        x[rng.uniform(size=n) < 0.05] = lo
        values[name] = x
    if k > 1 and draw(st.booleans()):  # an exact tie: a copy of factor 0 at the same values
        f0 = fs[0]
        fs[-1] = FactorCeiling(fs[-1].factor, f0.basis, f0.params, f0.bse, f0.conf_int, f0.median_params, f0.tau,
                               f0.transform, f0.outside, f0.observed, f0.estimator, DIAG)
        values[fs[-1].factor] = values["f0"].copy()
    dtype = draw(st.sampled_from([np.float64, np.float32]))
    values = {key: v.astype(dtype) for key, v in values.items()}
    m = CeilingModel("sp", tuple(fs), 0.95, transform, outside)
    return m, values


def check(m: CeilingModel, values, use_numba) -> None:
    ref_c, ref_code = m.evaluate(values)
    c, code = ceiling_and_limiting(m, values, use_numba=use_numba)
    assert code.dtype == np.uint8 and c.dtype == np.float32
    np.testing.assert_array_equal(code, ref_code)
    np.testing.assert_array_equal(np.isnan(c), np.isnan(ref_c))
    np.testing.assert_allclose(c, ref_c.astype(np.float32), rtol=2e-7, atol=0, equal_nan=True)
    assert np.all(c[~np.isnan(c)] >= 0)


@pytest.mark.skipif(not HAVE_NUMBA, reason="numba is not installed")
@settings(max_examples=150, deadline=None)
@given(case=models_and_values())
def test_compiled_kernel_equals_reference(case):
    check(*case, use_numba=True)


@settings(max_examples=60, deadline=None)
@given(case=models_and_values())
def test_numpy_fallback_equals_reference(case):
    check(*case, use_numba=False)


@pytest.mark.parametrize("use_numba", [True, False])
def test_ties_at_zero_go_to_the_lowest_predictor_then_the_first_factor(use_numba):
    if use_numba and not HAVE_NUMBA:
        pytest.skip("numba is not installed")
    # both factors negative (ceiling 0): the lower predictor limits; equal predictors: the first
    fs = (factor("a", "linear", [-1.0, 0.0], 0, 1, "none", "hold"),
          factor("b", "linear", [-2.0, 0.0], 0, 1, "none", "hold"),
          factor("c", "linear", [-2.0, 0.0], 0, 1, "none", "hold"))
    m = CeilingModel("sp", fs, 0.95, "none", "hold")
    v = {"a": np.array([0.5, np.nan]), "b": np.array([0.5, 0.5]), "c": np.array([0.5, 0.5])}
    c, code = ceiling_and_limiting(m, v, use_numba=use_numba)
    assert code.tolist() == [1, NODATA_CODE]
    assert c[0] == 0.0 and np.isnan(c[1])


def test_hold_clips_and_extend_does_not():
    f = factor("a", "quadratic", [1.0, 0.0, -1.0], 0.0, 2.0, "none", "hold")
    m = CeilingModel("sp", (f,), 0.95, "none", "hold")
    c, _ = ceiling_and_limiting(m, {"a": np.array([5.0, -3.0])})
    assert np.allclose(c, [0.0, 0.0])  # held at the range ends, where the hump reaches 0
    f2 = factor("a", "linear", [1.0, 1.0], 0.0, 2.0, "none", "extend")
    m2 = CeilingModel("sp", (f2,), 0.95, "none", "extend")
    c2, _ = ceiling_and_limiting(m2, {"a": np.array([4.0])})
    assert np.isclose(c2[0], 4.0)  # z = 3 beyond the range: 1 + 3


def test_shape_is_kept_and_evaluate_dispatches():
    f = factor("a", "quadratic", [1.0, 0.2, -0.5], 0.0, 2.0, "sqrt", "hold")
    m = CeilingModel("sp", (f,), 0.95, "sqrt", "hold")
    x = np.linspace(-1, 3, 12).reshape(3, 4)
    assert qualifies(m)
    c, code = evaluate(m, {"a": x})
    assert c.shape == (3, 4) and code.shape == (3, 4)
    ref_c, _ = m.evaluate({"a": x})
    np.testing.assert_allclose(c, ref_c, rtol=2e-7)
