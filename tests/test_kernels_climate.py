"""The fused per-chunk kernel (ceiling.kernels_climate) against the reference composition.

The reference is what the lazy API computes: ``kernels_fast.evaluate`` (tested against the law
of the minimum in test_kernels_fast.py), ``mess.mess_kernel`` (tested on hand-worked MESS
values in test_similarity_ensemble.py), ``kernels.change_kernel`` / ``zone_kernel`` /
``switch_kernel`` and ``projection._stats_block``. Maps must agree exactly (NaN where NaN),
statistics to summation order.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from test_kernels_fast import DIAG, factor

from ceiling.boundary.ceiling import FactorCeiling
from ceiling.kernels_climate import ChunkParams, climate_chunk, climate_chunk_reference, mess_table
from ceiling.kernels_fast import HAVE_NUMBA
from ceiling.model import CeilingModel

pytestmark = pytest.mark.skipif(not HAVE_NUMBA, reason="numba is not installed")


@st.composite
def chunks(draw):
    k = draw(st.integers(1, 6))
    h, w = draw(st.integers(1, 40)), draw(st.integers(1, 70))
    transform = draw(st.sampled_from(["none", "log1p", "sqrt"]))
    outside = draw(st.sampled_from(["hold", "extend"]))
    rng = np.random.default_rng(draw(st.integers(0, 2**31 - 1)))
    fs, values, ref = [], {}, {}
    for j in range(k):
        basis = draw(st.sampled_from(["linear", "quadratic", "spline"]))
        p = {"linear": 2, "quadratic": 3}.get(basis, draw(st.integers(2, 6)))
        coef = rng.normal(0, 3, p)
        coef[0] = rng.uniform(-1, 6)
        lo = rng.uniform(-10, 10)
        hi = lo + rng.uniform(0.5, 20)
        fs.append(factor(f"f{j}", basis, coef, lo, hi, transform, outside))
        x = rng.uniform(lo - 0.3 * (hi - lo), hi + 0.3 * (hi - lo), (h, w)).astype(np.float32)
        x[rng.uniform(size=(h, w)) < 0.08] = np.nan
        n = draw(st.integers(4, 300))  # at least two distinct values, as check_reference demands
        r = np.sort(rng.uniform(lo, hi, n))
        if draw(st.booleans()):  # repeated survey values: many reference values at one number
            r[: n // 2] = r[n // 2]
            r = np.sort(r)
            x[rng.uniform(size=(h, w)) < 0.2] = np.float32(r[n // 2])
        x[rng.uniform(size=(h, w)) < 0.05] = np.float32(r[0])  # at the reference range's ends
        x[rng.uniform(size=(h, w)) < 0.05] = np.float32(r[-1])
        values[f"f{j}"] = x
        ref[f"f{j}"] = r
    if k > 1 and draw(st.booleans()):  # an exact tie: a copy of factor 0 at the same values
        f0 = fs[0]
        fs[-1] = FactorCeiling(fs[-1].factor, f0.basis, f0.params, f0.bse, f0.conf_int, f0.median_params, f0.tau,
                               f0.transform, f0.outside, f0.observed, f0.estimator, DIAG)
        values[fs[-1].factor] = values["f0"].copy()
        ref[fs[-1].factor] = ref["f0"].copy()
    m = CeilingModel("sp", tuple(fs), 0.95, transform, outside, reference=ref)
    novel = draw(st.sampled_from([None, "mask"]))
    params = ChunkParams(release=draw(st.sampled_from([0.0, 0.1, 0.5])), constraint=0.1,
                         floor=draw(st.sampled_from([0.0, 0.5, 2.0])), zero=draw(st.sampled_from([0.0, 0.5])),
                         novel=novel, hist_bins=draw(st.sampled_from([10, 4000])), hist_max=float(rng.uniform(1, 50)))
    area = rng.uniform(1.0, 3.0, (h, 1)) * np.ones((1, w)) if draw(st.booleans()) else rng.uniform(1.0, 3.0, (h, w))
    present = None
    if draw(st.booleans()):
        pc = rng.uniform(-1, 8, (h, w)).astype(np.float32)
        pc[pc < 0] = 0.0
        pc[rng.uniform(size=(h, w)) < 0.05] = np.nan
        pl = rng.integers(0, k, (h, w)).astype(np.uint8)
        pl[np.isnan(pc)] = 255
        present = (pc, pl)
    return m, values, area, params, present


def _same(m, values, area, params, present):
    maps, stats = climate_chunk(m, values, area, params=params, present=present)
    rmaps, rstats = climate_chunk_reference(m, values, area, params=params, present=present)
    assert sorted(maps) == sorted(rmaps)
    for name, ref in rmaps.items():
        assert maps[name].dtype == ref.dtype, name
        np.testing.assert_array_equal(maps[name], ref, err_msg=name)
    np.testing.assert_allclose(stats, rstats, rtol=1e-9, atol=1e-9)


@settings(max_examples=150, deadline=None)
@given(case=chunks())
def test_fused_kernel_equals_the_reference_composition(case):
    _same(*case)


def test_mess_table_counts_equal_searchsorted():
    # Source: numpy.searchsorted (side="left") is the definition of "reference values below p"
    # used by mess.similarity; the table must give the same count for every value.
    rng = np.random.default_rng(5)
    r = np.sort(np.concatenate([rng.normal(0, 1, 500), np.full(200, 0.25), [-3.0, 3.0]]))
    tab = mess_table([r])
    p = np.concatenate([rng.uniform(-4, 4, 20000), r, np.nextafter(r, np.inf), np.nextafter(r, -np.inf)])
    m = len(tab.below[0])
    lo = r[0]
    q = np.where((p > lo) & (p <= r[-1]), p, lo)
    b = np.clip(((q - lo) * tab.inv_width[0]).astype(np.int64), 0, m - 1)
    cnt = tab.below[0][b].astype(np.int64)
    while True:
        step = tab.ref[0][cnt] < q
        if not step.any():
            break
        cnt += step
    cnt = np.where(p <= lo, 0, np.where(p > r[-1], r.size, cnt))
    np.testing.assert_array_equal(cnt, np.searchsorted(r, p, side="left"))
    # the table never overshoots: its count is at most the true count under each value
    assert np.all(tab.below[0][b] <= np.searchsorted(r, q, side="left"))


def test_mess_hand_worked_values_through_the_fused_kernel():
    # Source: hand-worked from the MESS formula (Elith et al. 2010), quoted from memory (see
    # test_similarity_ensemble.py): reference {1..10}; p = 5.5, 3, 8.5, 0.1, 11.8, 1, 10 give
    # S = 100, 40, 40, -10, -20, 0, 20
    f = factor("a", "linear", [1.0, 0.0], 1.0, 10.0, "none", "hold")
    m = CeilingModel("sp", (f,), 0.95, "none", "hold", reference={"a": np.arange(1.0, 11.0)})
    x = np.array([[5.5, 3.0, 8.5, 0.1, 11.8, 1.0, 10.0]], dtype=np.float32)
    maps, _ = climate_chunk(m, {"a": x}, np.ones_like(x, dtype=np.float64), params=ChunkParams())
    np.testing.assert_allclose(maps["similarity"][0], [100, 40, 40, -10, -20, 0, 20], atol=2e-5)
    assert maps["extrapolated"][0].tolist() == [0, 0, 0, 1, 1, 0, 0]
