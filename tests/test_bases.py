"""Response bases against their definitions and against patsy's natural cubic splines."""

from __future__ import annotations

import numpy as np
import patsy
import pytest
from numpy.testing import assert_allclose

from ceiling.boundary.bases import (
    LinearBasis,
    QuadraticBasis,
    SplineBasis,
    basis_from_dict,
    make_basis,
)
from ceiling.errors import FitError, ModelFileError


def _projection_residual(A: np.ndarray, B: np.ndarray) -> float:
    """Largest relative residual of projecting the columns of A onto the column space of B."""
    coef, *_ = np.linalg.lstsq(B, A, rcond=None)
    resid = A - B @ coef
    return float(np.max(np.linalg.norm(resid, axis=0) / np.linalg.norm(A, axis=0)))


@pytest.mark.parametrize("df", [3, 4, 6])
def test_spline_spans_the_same_space_as_patsy_cr(df):
    # Source: patsy documentation, "Spline regression": cr() is a natural cubic regression
    # spline; without constraints its columns span all natural cubic splines with the given
    # inner knots and boundary knots, the same space as the truncated-power form.
    rng = np.random.default_rng(7)
    x = rng.gamma(3.0, 2.0, 300) + 5.0
    basis = make_basis("spline", x, df=df, factor="f")
    assert isinstance(basis, SplineBasis) and basis.n_params == df + 1
    knots = np.asarray(basis.knots)
    assert_allclose(knots, np.quantile(x, np.linspace(0, 1, df + 1)))
    inner = tuple(knots[1:-1])
    cr = np.asarray(patsy.dmatrix(
        "cr(x, knots=inner, lower_bound=lo, upper_bound=hi) - 1",
        {"x": x, "inner": inner, "lo": knots[0], "hi": knots[-1]},
    ))
    ours = basis.design(x)
    assert cr.shape == ours.shape
    assert np.linalg.matrix_rank(ours) == df + 1
    # both directions: equal column spaces
    assert _projection_residual(ours, cr) < 1e-8
    assert _projection_residual(cr, ours) < 1e-8


def test_spline_differs_from_an_unrelated_space():
    # the projection check can fail: a basis with other knots does not lie in patsy's space
    rng = np.random.default_rng(7)
    x = np.sort(rng.uniform(0.0, 10.0, 200))
    basis = SplineBasis(5.0, 5.0, (0.0, 2.0, 5.0, 10.0))
    cr = np.asarray(patsy.dmatrix("cr(x, knots=(4.0, 7.0), lower_bound=0, upper_bound=10) - 1", {"x": x}))
    assert _projection_residual(basis.design(x), cr) > 1e-3


def test_spline_is_linear_beyond_boundary_knots():
    # Source: definition of a natural cubic spline (Hastie, Tibshirani & Friedman, The
    # Elements of Statistical Learning, 2nd ed., section 5.2.1): linear beyond the boundary knots.
    basis = SplineBasis(center=5.0, scale=5.0, knots=(0.0, 1.5, 4.0, 7.0, 10.0))
    step = 0.25
    for grid in (np.arange(-10.0, 0.0 + 1e-9, step), np.arange(10.0, 25.0 + 1e-9, step)):
        D = basis.design(grid)
        second = np.diff(D, n=2, axis=0)
        assert_allclose(second, 0.0, atol=1e-9)
    # ...and it is genuinely cubic between the boundary knots (the check above can fail)
    inside = basis.design(np.arange(0.0, 10.0, step))
    assert np.max(np.abs(np.diff(inside, n=2, axis=0))) > 1e-4


def test_spline_is_twice_continuously_differentiable_at_knots():
    # Source: definition of a cubic spline (ESL 2nd ed., section 5.2): continuous up to the
    # second derivative at every knot. Check by one-sided finite differences.
    basis = SplineBasis(center=5.0, scale=5.0, knots=(0.0, 3.0, 6.0, 10.0))
    h = 1e-4
    for k in basis.knots:
        left = basis.design(np.array([k - 2 * h, k - h, k]))
        right = basis.design(np.array([k, k + h, k + 2 * h]))
        assert_allclose(left[-1], right[0], atol=1e-12)
        d1l = (left[2] - left[1]) / h
        d1r = (right[1] - right[0]) / h
        assert_allclose(d1l, d1r, atol=1e-2)
        d2l = (left[2] - 2 * left[1] + left[0]) / h**2
        d2r = (right[2] - 2 * right[1] + right[0]) / h**2
        assert_allclose(d2l, d2r, atol=1e-2 * max(1.0, float(np.max(np.abs(d2l)))))


@pytest.mark.parametrize(
    ("name", "coef"),
    [("linear", (3.0, -0.5)), ("quadratic", (3.0, -0.5, 0.25))],
)
def test_polynomial_bases_reproduce_an_exact_polynomial(name, coef):
    # a polynomial of the basis' degree lies exactly in its column space (definition)
    x = np.linspace(-4.0, 12.0, 41)
    truth = sum(c * x**i for i, c in enumerate(coef))
    basis = make_basis(name, x, factor="f")
    D = basis.design(x)
    b, *_ = np.linalg.lstsq(D, truth, rcond=None)
    assert_allclose(D @ b, truth, rtol=1e-10, atol=1e-10)
    # the design is [1, z, z^2...] with z = (x - centre) / half-range
    z = (x - 4.0) / 8.0
    assert_allclose(D[:, 1], z)
    assert_allclose(D[:, 0], 1.0)
    if name == "quadratic":
        assert_allclose(D[:, 2], z**2)


def test_linear_basis_cannot_reproduce_a_quadratic():
    x = np.linspace(0.0, 1.0, 20)
    D = make_basis("linear", x).design(x)
    b, *_ = np.linalg.lstsq(D, x**2, rcond=None)
    assert np.max(np.abs(D @ b - x**2)) > 1e-2


@pytest.mark.parametrize(
    "basis",
    [LinearBasis(2.0, 3.0), QuadraticBasis(-1.0, 0.5), SplineBasis(1.0, 2.0, (-1.0, 0.0, 1.5, 3.0))],
    ids=["linear", "quadratic", "spline"],
)
def test_basis_dict_round_trip(basis):
    back = basis_from_dict(basis.to_dict())
    assert back == basis
    x = np.linspace(-3, 5, 17)
    assert np.array_equal(back.design(x), basis.design(x))


@pytest.mark.parametrize(
    ("d", "field"),
    [
        ({"name": "cubic", "center": 0.0, "scale": 1.0}, "cubic"),
        ({"name": "linear", "scale": 1.0}, "center"),
        ({"name": "linear", "center": 0.0, "scale": 0.0}, "scale"),
        ({"name": "spline", "center": 0.0, "scale": 1.0, "knots": [1.0, 0.5]}, "knots"),
        ({"name": "spline", "center": 0.0, "scale": 1.0}, "knots"),
    ],
)
def test_basis_from_dict_refuses_bad_fields(d, field):
    with pytest.raises(ModelFileError, match=field) as err:
        basis_from_dict(d)
    assert "ceiling fit" in str(err.value)


def test_make_basis_needs_enough_distinct_values():
    x = np.array([1.0, 1.0, 2.0, 2.0, 2.0])
    with pytest.raises(FitError, match="needs at least 3 distinct values"):
        make_basis("quadratic", x, factor="f")
    with pytest.raises(FitError, match="df=4 needs at least 5"):
        make_basis("spline", np.arange(4.0), df=4, factor="f")
    with pytest.raises(FitError, match="unknown basis"):
        make_basis("cubic", np.arange(10.0))
