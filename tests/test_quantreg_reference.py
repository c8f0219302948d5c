"""The quantile layer against published results and against the definition of a quantile."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose
from reference_values import (
    ENGEL_N,
    ENGEL_PSEUDO_R1,
    ENGEL_QUANTREG,
    ENGEL_STATA_FULL,
    ENGEL_SUM_ADEV,
)
from scipy import stats

from ceiling.boundary import fit_factor, quantile_fit
from ceiling.boundary.diagnostics import pseudo_r1
from ceiling.boundary.quantreg import check_loss
from ceiling.errors import ConfigError, FitError


@pytest.fixture(scope="module")
def engel():
    data = sm.datasets.engel.load_pandas().data
    y = data["foodexp"].to_numpy(dtype=float)
    X = np.column_stack([np.ones(len(data)), data["income"].to_numpy(dtype=float)])
    return y, X


def test_engel_has_the_published_size(engel):
    y, X = engel
    assert y.size == ENGEL_N and X.shape == (ENGEL_N, 2)


@pytest.mark.parametrize("tau", sorted(ENGEL_QUANTREG))
def test_engel_coefficients_match_published_table(engel, tau):
    # Sources: see tests/reference_values.py (Koenker & Hallock 2001 table for tau .5 and .95;
    # Stata qreg reference values in statsmodels' tests for tau .75). The published figures are
    # rounded to 4 decimals: rtol=1e-4 for the iterative solver plus atol=5e-5 for the rounding.
    y, X = engel
    res = quantile_fit(y, X, tau)
    for got, ref in zip(res.params, ENGEL_QUANTREG[tau]):
        assert_allclose(got, ref.value, rtol=ref.rtol, atol=ref.atol, err_msg=ref.source)


@pytest.mark.parametrize("tau", sorted(ENGEL_STATA_FULL))
def test_engel_coefficients_match_stata_full_precision(engel, tau):
    # Source: Stata qreg output kept in statsmodels' regression test results.
    y, X = engel
    res = quantile_fit(y, X, tau)
    for got, ref in zip(res.params, ENGEL_STATA_FULL[tau]):
        assert_allclose(got, ref.value, rtol=ref.rtol, atol=ref.atol, err_msg=ref.source)


@pytest.mark.parametrize("tau", sorted(ENGEL_PSEUDO_R1))
def test_engel_pseudo_r1_and_check_loss_match_stata(engel, tau):
    y, X = engel
    res = quantile_fit(y, X, tau)
    fitted = X @ res.params
    ref = ENGEL_PSEUDO_R1[tau]
    assert_allclose(pseudo_r1(y, fitted, tau), ref.value, rtol=ref.rtol, atol=ref.atol, err_msg=ref.source)
    adev = ENGEL_SUM_ADEV[tau]
    assert_allclose(2.0 * np.sum(check_loss(y - fitted, tau)), adev.value, rtol=adev.rtol, err_msg=adev.source)
    # the result's mean loss is the mean check loss of its residuals
    assert_allclose(res.loss, adev.value / 2.0 / y.size, rtol=1e-6)


def test_engel_confidence_interval_brackets_the_estimate(engel):
    y, X = engel
    res = quantile_fit(y, X, 0.95)
    assert np.all(res.bse > 0)
    assert np.all(res.conf_int[:, 0] < res.params) and np.all(res.params < res.conf_int[:, 1])


def test_check_loss_definition():
    # Source: Koenker & Bassett (1978): rho_tau(u) = u * (tau - 1[u < 0]).
    u = np.array([-2.0, -0.5, 0.0, 0.5, 2.0])
    assert_allclose(check_loss(u, 0.9), [0.2, 0.05, 0.0, 0.45, 1.8])
    assert_allclose(check_loss(u, 0.5), 0.5 * np.abs(u))


@pytest.mark.parametrize("tau", [1e-3, 0.05, 0.3, 0.5, 0.9, 0.999])
def test_quantile_fit_accepts_tau_in_open_unit_interval(engel, tau):
    y, X = engel
    res = quantile_fit(y, X, tau)
    assert res.tau == tau and np.all(np.isfinite(res.params))


@pytest.mark.parametrize("tau", [0, 0.0, 1, 1.0, 1.5, -0.2, float("nan"), "0.9"])
def test_quantile_fit_refuses_tau_outside_open_unit_interval(engel, tau):
    y, X = engel
    with pytest.raises(ConfigError, match="tau"):
        quantile_fit(y, X, tau)


@pytest.mark.parametrize("tau", [0.5, 0.3, 1.0, 1.2, 0.0])
def test_fit_factor_refuses_tau_outside_upper_half(tau):
    rng = np.random.default_rng(0)
    x = rng.uniform(0, 1, 50)
    with pytest.raises(FitError, match=r"tau.*\(0\.5, 1\)"):
        fit_factor(x, 10 * x, factor="f", tau=tau, basis="linear", wedge_replicates=0)


# --- statistical property on data with a known noise quantile --------------------------------

@pytest.mark.parametrize(
    ("dist", "tau"),
    [(stats.norm(loc=0.0, scale=2.0), 0.9), (stats.expon(scale=3.0), 0.95), (stats.gumbel_r(scale=1.5), 0.95)],
    ids=["normal-0.9", "exponential-0.95", "gumbel-0.95"],
)
def test_ceiling_recovers_true_conditional_quantile(dist, tau):
    # y = a + b x + e, e ~ dist: the true tau-quantile line is a + F^-1(tau) + b x
    # (Source: definition of the conditional quantile; F^-1 from scipy.stats).
    rng = np.random.default_rng(12345)
    n, a, b = 4000, 20.0, 3.0
    x = rng.uniform(0.0, 10.0, n)
    y = a + b * x + dist.rvs(size=n, random_state=rng)
    fc = fit_factor(x, y, factor="x", tau=tau, basis="linear", wedge_replicates=0)
    grid = np.linspace(0.5, 9.5, 50)
    true_line = a + dist.ppf(tau) + b * grid
    # Tolerance: the sampling sd of a sample tau-quantile is sqrt(tau(1-tau)/n)/f(F^-1(tau))
    # (asymptotic variance of a sample quantile, from memory); for a fitted straight line with
    # x uniform the prediction sd grows to twice that at the ends of the range (variance factor
    # 1 + 3z^2 at z = +/-1, least-squares analogue, from memory). Allow 4 such sds.
    sd_q = np.sqrt(tau * (1 - tau) / n) / dist.pdf(dist.ppf(tau))
    assert np.max(np.abs(fc.predict(grid) - true_line)) < 4 * 2 * sd_q
    # share above the ceiling close to 1 - tau (common practice); binomial sd sqrt(tau(1-tau)/n)
    share = fc.diagnostics.share_above
    assert abs(share - (1 - tau)) < 4 * np.sqrt(tau * (1 - tau) / n) + 1.0 / n
    # the same share computed here from the data, independently of the diagnostics
    assert abs(np.mean(y > fc.predict(x)) - share) <= 2.0 / n


def test_share_above_on_engel_obeys_the_counting_bound(engel):
    # A tau-quantile regression with p parameters passes through (at least) p points and the
    # counts above (N+) and on the fit (N0) satisfy N+ <= n(1 - tau) <= N+ + N0
    # (Source: Koenker & Bassett 1978, Econometrica 46:33-50, Theorem 3.4; from memory). So
    # the share above is within p/n of 1 - tau, the basis of the common-practice check.
    y, X = engel
    n, p = X.shape
    for tau in (0.5, 0.75, 0.9, 0.95):
        res = quantile_fit(y, X, tau)
        r = y - X @ res.params
        on = np.abs(r) < 1e-4  # the iterative solver leaves ~1e-7 on interpolated points
        above = np.sum(r > 0) - np.sum(on & (r > 0))
        assert on.sum() >= p
        assert above <= n * (1 - tau) + 1e-9
        assert n * (1 - tau) <= above + on.sum() + 1e-9


@pytest.mark.parametrize(
    ("transform", "inverse", "a", "b"),
    [("log1p", np.expm1, 1.0, 0.3), ("sqrt", np.square, 5.0, 1.0)],
)
def test_transformed_ceiling_is_the_back_transformed_quantile(transform, inverse, a, b):
    # Quantiles are equivariant under monotone transformations: Q(h(Y)) = h(Q(Y)) for
    # increasing h (Koenker 2005, Quantile Regression, section 2.2; from memory). With
    # h^-1(y) = a + b x + e, the ceiling in abundance units is h^-1 of the true tau-quantile line.
    rng = np.random.default_rng(99)
    n, tau = 3000, 0.9
    dist = stats.norm(scale=0.3)
    x = rng.uniform(0.0, 10.0, n)
    y = inverse(a + b * x + dist.rvs(size=n, random_state=rng))
    fc = fit_factor(x, y, factor="x", tau=tau, basis="linear", transform=transform, wedge_replicates=0)
    grid = np.linspace(0.5, 9.5, 40)
    true_eta = a + b * grid + dist.ppf(tau)
    sd_q = np.sqrt(tau * (1 - tau) / n) / dist.pdf(dist.ppf(tau))
    assert np.max(np.abs(fc.linear_predictor(grid) - true_eta)) < 4 * 2 * sd_q
    assert_allclose(fc.predict(grid), inverse(fc.linear_predictor(grid)), rtol=1e-12)
    # about 1 - tau of the points above the back-transformed ceiling (common practice)
    assert abs(np.mean(y > fc.predict(x)) - (1 - tau)) < 4 * np.sqrt(tau * (1 - tau) / n)
