"""One pass over a chunk of a climate: every map and summary statistic of one species.

The projection's per-cell work, fused. For one species and one chunk of one climate it computes,
cell by cell and without whole-chunk temporaries:

- the ceiling and the limiting factor (law of the minimum, as :mod:`ceiling.kernels_fast`);
- similarity (MESS) and the least similar factor, and the extrapolated flag;
- for a future: change, percent change, zone class and limiting-factor switch against the
  present ceiling and limiting factor;
- the summary statistics of the chunk (areas by zone, by limiting factor now and later, switch
  matrix, area-weighted sums, the change histogram), as :class:`ceiling.projection.StatsLayout`.

The reference is the composition the lazy API builds: :func:`ceiling.projection.project`
(:func:`ceiling.kernels_fast.evaluate` and :func:`ceiling.mess.mess_kernel`),
:func:`ceiling.projection.compare` (:func:`ceiling.kernels.change_kernel`,
:func:`~ceiling.kernels.zone_kernel`, :func:`~ceiling.kernels.switch_kernel`) and
:func:`ceiling.projection.climate_stats`. :func:`climate_chunk_reference` is that composition on
plain arrays; :func:`climate_chunk` runs the compiled loop when numba is installed and the
reference otherwise. Maps agree exactly (the same float64 operations in the same order, then the
same rounding to float32); the statistics agree to summation order (the reference sums pairwise).

Similarity needs, per factor, the share of reference values below a cell's value. The reference
finds it by binary search (``searchsorted``); here a table of counts at evenly spaced values
(eight times as many as reference values) gives the count at a value just below the cell's, and
a short forward scan in the sorted sample finishes it, so the count is exact and the cost does
not grow with the size of the sample.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from .kernels import ABSENT, CLOSES, CONSTRAINT, NODATA_CODE, OPENS, RELEASE, STABLE
from .kernels_fast import HAVE_NUMBA, PackedModel, pack, qualifies

__all__ = ["ChunkParams", "MessTable", "mess_table", "climate_chunk", "climate_chunk_reference"]

_BLOCK = 1024  # cells per block of the compiled loop (scratch stays in the L1/L2 cache)


@dataclass(frozen=True)
class ChunkParams:
    """The projection options the per-cell work needs (see :class:`ceiling.scenarios.ProjectionOptions`)."""

    release: float = 0.10
    constraint: float = 0.10
    floor: float = 0.5
    zero: float = 0.0
    novel: str | None = None  # "mask" sets the ceiling to nodata where MESS < 0
    hist_bins: int = 4000
    hist_max: float = 1.0
    n_zones: int = 6
    similarity: bool = True  # False: the similarity maps are not needed, only whether a cell is novel


@dataclass(frozen=True)
class MessTable:
    """Sorted reference samples of a model's factors, with count tables for fast exact lookups."""

    ref: np.ndarray  # (K, N + 4) float64, each row sorted, padded with +inf
    n: np.ndarray  # (K,) int64
    below: np.ndarray  # (K, M) int32: number of reference values < lo + (i - 1) * width
    inv_width: np.ndarray  # (K,) float64
    pct: np.ndarray  # (K, N + 1) float64: 100 i / n, the percentage of values below for a count i


def mess_table(refs: list[np.ndarray]) -> MessTable:
    """Count tables for the sorted reference samples ``refs`` (one per factor, model order).

    The range of each factor is cut into M equal bins (M = 8 N). A value p falls in bin
    b = floor((p - lo) / width); ``below[b]`` counts the reference values under the start of
    the bin before, lo + (b - 1) width, so it never exceeds the count under p, whatever the
    rounding of b, and the scan from there passes two bins' worth of values (a quarter of a
    value on average).
    """
    n = np.array([r.size for r in refs], dtype=np.int64)
    big = int(n.max())
    m = int(min(max(16, 8 * big), 1 << 20))
    ref = np.full((len(refs), big + 4), np.inf)
    below = np.zeros((len(refs), m), dtype=np.int32)
    inv = np.zeros(len(refs))
    pct = np.zeros((len(refs), big + 1))
    for j, r in enumerate(refs):
        r = np.asarray(r, dtype=np.float64)
        ref[j, : r.size] = r
        lo, hi = r[0], r[-1]
        width = (hi - lo) / m if hi > lo else 1.0
        starts = lo + width * (np.arange(m) - 1.0)
        below[j] = np.searchsorted(r, starts, side="left")
        inv[j] = 1.0 / width
        pct[j, : r.size + 1] = 100.0 * np.arange(r.size + 1) / r.size  # as mess.similarity computes f
    return MessTable(ref, n, below, inv, pct)


def _model_table(model: Any) -> MessTable:
    cached = getattr(model, "_mess_table", None)
    if cached is None:
        cached = mess_table([np.asarray(model.reference[f], dtype=np.float64) for f in model.factor_names])
        try:
            object.__setattr__(model, "_mess_table", cached)
        except (AttributeError, TypeError):
            pass
    return cached


# --- the reference: the lazy API's kernels on plain arrays ---------------------------------------------

def climate_chunk_reference(
    model: Any, values: Mapping[str, np.ndarray], area: np.ndarray, *, params: ChunkParams,
    present: tuple[np.ndarray, np.ndarray] | None = None,
) -> tuple[dict[str, np.ndarray], np.ndarray]:
    """The maps (name -> array) and the statistics vector of one chunk, by the reference kernels.

    ``values`` are the model's factors (float32, NaN for nodata, mask applied); ``present`` the
    present ceiling (float32) and limiting code (uint8) for a future, None for the present.
    ``model`` must already follow the projection's rule for novel cells
    (:func:`ceiling.projection.with_policy`).
    """
    from .kernels import change_kernel, switch_kernel, zone_kernel
    from .kernels_fast import evaluate
    from .mess import mess_kernel
    from .projection import StatsLayout, _stats_block

    v64 = {f: np.asarray(values[f]).astype(np.float64) for f in model.factor_names}
    c, code = evaluate(model, v64)
    mess, far = mess_kernel([v64[f] for f in model.factor_names], [model.reference[f] for f in model.factor_names])
    if params.novel == "mask":
        outside = mess < 0
        c = np.where(outside, np.nan, c)
        code = np.where(outside, NODATA_CODE, code)
    c32 = np.asarray(c, dtype=np.float32)
    code = np.asarray(code, dtype=np.uint8)
    mess32 = mess.astype(np.float32)
    ext = np.where(np.isnan(mess32), NODATA_CODE, (mess32 < 0).astype(np.uint8)).astype(np.uint8)
    maps = {"ceiling": c32, "limiting": code, "similarity": mess32, "least_similar": far.astype(np.uint8),
            "extrapolated": ext}
    layout = StatsLayout(k=len(model.factors), n_zones=params.n_zones, hist_bins=params.hist_bins,
                         hist_max=params.hist_max)
    if present is None:
        zone = np.where(np.isnan(c32), NODATA_CODE, np.where(c32 > 0, STABLE, ABSENT)).astype(np.uint8)
        stats = _stats_block(c32, code, c32, code, zone, area, ext, layout)
        return maps, stats
    pc, pl = present
    ch, pct = change_kernel(pc, c32)
    zone = zone_kernel(pc, c32, release=params.release, constraint=params.constraint, floor=params.floor,
                       zero=params.zero)
    maps.update(change=ch, change_pct=pct, zone=zone, switch=switch_kernel(pl, code, len(model.factors)))
    stats = _stats_block(pc, pl, c32, code, zone, area, ext, layout)
    return maps, stats


# --- the compiled loop -------------------------------------------------------------------------------

def _loop(xs, kind, center, scale, clip, lo, hi, coef, knots, n_knots, transform,
          ref, n_ref, below, inv_width, pct, similarity,
          future, pc, pl, area, release, constraint, floor, zero, mask_novel, n_zones, hedges, hist_max,
          out_c, out_code, out_mess, out_far, out_ext, out_change, out_pct, out_zone, out_switch, v, off):
    h, w = out_c.shape
    k = len(xs)
    nb = hedges.shape[0] - 1
    hscale = nb / (2.0 * hist_max)  # a first guess of the bin, corrected against the edges
    o_zone, o_now, o_later, o_switch = off[0], off[1], off[2], off[3]
    o_area, o_change, o_cells, o_now_area, o_later_area = off[4], off[5], off[6], off[7], off[8]
    o_novel, o_zone_novel, o_hist = off[9], off[10], off[11]
    eb = np.empty(_BLOCK)
    best = np.empty(_BLOCK)
    arg = np.empty(_BLOCK)
    bad = np.empty(_BLOCK)
    sbest = np.empty(_BLOCK)
    sarg = np.empty(_BLOCK)
    sbad = np.empty(_BLOCK)
    qs = np.empty(_BLOCK)
    cnts = np.empty(_BLOCK, dtype=np.int64)
    for r in range(h):
        for b0 in range(0, w, _BLOCK):
            b1 = min(w, b0 + _BLOCK)
            m = b1 - b0
            for j in range(k):
                x = xs[j][r, b0:b1]
                jj = np.float64(j)
                # the law of the minimum, as kernels_fast._loop
                _fold_factor(x, m, j, kind, center, scale, clip, lo, hi, coef, knots, n_knots, eb, best, arg, bad)
                # similarity (MESS) of the value to the factor's reference sample
                nj = n_ref[j]
                rlo, rhi = ref[j, 0], ref[j, nj - 1]
                span = rhi - rlo
                iw, nm = inv_width[j], below.shape[1]
                # the number of reference values below p (searchsorted, side="left"): the count
                # at the start of the bin before p's, then a step or two forward in the sorted
                # sample (padded with +inf); in passes over the block, so most of it vectorises
                # without ``similarity`` only the sign of S is needed (the extrapolated flag and the
                # novel areas): S is negative exactly outside the range, where no count is needed
                if similarity:
                    for i in range(m):
                        p = np.float64(x[i])
                        q = p if (p > rlo and p <= rhi) else rlo  # outside the range the count is 0 or n
                        qs[i] = q
                        b = int((q - rlo) * iw)
                        b = 0 if b < 0 else (nm - 1 if b > nm - 1 else b)
                        c0 = np.int64(below[j, b])
                        cnts[i] = c0 + np.int64(ref[j, c0] < q)
                    for i in range(m):
                        c = cnts[i]
                        if ref[j, c] < qs[i]:  # rare: more values close together
                            while ref[j, c] < qs[i]:
                                c += 1
                            cnts[i] = c
                for i in range(m):
                    p = np.float64(x[i])
                    # S as in mess.similarity, with f = 100 count / n from the table
                    s = 0.0
                    if similarity:
                        f = pct[j, cnts[i]]
                        s = 2.0 * f if f <= 50 else 2.0 * (100.0 - f)
                    if p <= rlo:  # f = 0
                        s = 100.0 * (p - rlo) / span
                    elif p > rhi:  # f = 100
                        s = 100.0 * (rhi - p) / span
                    elif p != p:
                        s = np.nan
                    if j == 0:
                        sbad[i] = 1.0 if s != s else 0.0
                        sbest[i] = s
                        sarg[i] = 0.0
                    else:
                        sbad[i] = 1.0 if s != s else sbad[i]
                        lower = s < sbest[i]
                        sbest[i] = s if lower else sbest[i]
                        sarg[i] = jj if lower else sarg[i]
            # the block's area-weighted sums in registers, added to the vector after the block
            s_area = 0.0
            s_change = 0.0
            s_cells = 0.0
            s_now = 0.0
            s_later = 0.0
            s_novel = 0.0
            for i in range(m):
                col = b0 + i
                # ceiling and limiting factor
                if bad[i] != 0.0:
                    c64 = np.nan
                    code = 255
                else:
                    e = best[i] if best[i] > 0.0 else 0.0
                    if transform == 1:
                        e = math.expm1(e)
                    elif transform == 2:
                        e = e * e
                    c64 = e
                    code = np.uint8(arg[i])
                mess64 = np.nan if sbad[i] != 0.0 else sbest[i]
                if mask_novel and mess64 < 0:
                    c64 = np.nan
                    code = 255
                c32 = np.float32(c64)
                mess32 = np.float32(mess64)
                out_c[r, col] = c32
                out_code[r, col] = code
                out_mess[r, col] = mess32
                out_far[r, col] = 255 if sbad[i] != 0.0 else np.uint8(sarg[i])
                ext = 255 if mess32 != mess32 else (1 if mess32 < 0 else 0)
                out_ext[r, col] = ext
                fc = np.float64(c32)
                if future:
                    p32 = pc[r, col]
                    pcode = pl[r, col]
                    pv = np.float64(p32)
                    d = fc - pv
                    out_change[r, col] = np.float32(d)
                    out_pct[r, col] = np.float32(100.0 * d / pv) if pv > 0 else np.float32(np.nan)
                    if pv != pv or fc != fc:
                        zone = 255
                    else:
                        pz = pv <= zero
                        fz = fc <= zero
                        up = release * pv
                        up = up if up > floor else floor
                        down = constraint * pv
                        down = down if down > floor else floor
                        if pz and fz:
                            zone = ABSENT
                        elif fz:
                            zone = CLOSES
                        elif pz:
                            zone = OPENS
                        elif d < -down:
                            zone = CONSTRAINT
                        elif d > up:
                            zone = RELEASE
                        else:
                            zone = STABLE
                    out_zone[r, col] = zone
                    out_switch[r, col] = 255 if (pcode == 255 or code == 255) else np.uint8(pcode * k + code)
                else:
                    pv = fc
                    pcode = code
                    d = 0.0
                    zone = 255 if fc != fc else (STABLE if fc > 0 else ABSENT)
                # statistics: cells where both ceilings are finite, weighted by the cell's area
                if np.isfinite(pv) and np.isfinite(fc):
                    wt = area[r, col]
                    if zone < n_zones:
                        v[o_zone + zone] += wt
                    if pcode < k:
                        v[o_now + pcode] += wt
                    if code < k:
                        v[o_later + code] += wt
                    sw = np.int64(pcode) * k + np.int64(code)
                    if sw < k * k:
                        v[o_switch + sw] += wt
                    s_area += wt
                    s_change += d * wt
                    s_cells += 1.0
                    s_now += pv * wt
                    s_later += fc * wt
                    if ext == 1:
                        s_novel += wt
                        if zone < n_zones:
                            v[o_zone_novel + zone] += wt
                    # histogram bin: the number of edges at or below d (searchsorted, side="right")
                    t = math.floor((d + hist_max) * hscale)
                    if t < 0.0:
                        g = 0
                    elif t > nb:
                        g = nb + 1
                    else:
                        g = int(t) + 1
                    while g > 0 and hedges[g - 1] > d:
                        g -= 1
                    while g < nb + 1 and hedges[g] <= d:
                        g += 1
                    v[o_hist + g] += wt
            v[o_area] += s_area
            v[o_change] += s_change
            v[o_cells] += s_cells
            v[o_now_area] += s_now
            v[o_later_area] += s_later
            v[o_novel] += s_novel


if HAVE_NUMBA:
    import numba

    from .kernels_fast import fold_factor as _fold_factor

    _fused = numba.njit(_loop, nogil=True, cache=True, error_model="numpy")
else:  # pragma: no cover - without numba the reference runs
    _fused = None


def _offsets(k: int, params: ChunkParams) -> tuple[np.ndarray, int]:
    from .projection import StatsLayout

    lay = StatsLayout(k=k, n_zones=params.n_zones, hist_bins=params.hist_bins, hist_max=params.hist_max)
    sl = lay.slices()
    names = ("zone", "lim_now", "lim_later", "switch", "area", "change_area", "cells", "now_area", "later_area",
             "novel", "zone_novel", "hist")
    return np.array([sl[n].start for n in names], dtype=np.int64), lay.size


def climate_chunk(
    model: Any, values: Mapping[str, np.ndarray], area: np.ndarray, *, params: ChunkParams,
    present: tuple[np.ndarray, np.ndarray] | None = None, use_numba: bool | None = None,
) -> tuple[dict[str, np.ndarray], np.ndarray]:
    """The maps and statistics of one chunk (see :func:`climate_chunk_reference`), in one pass."""
    fast = HAVE_NUMBA if use_numba is None else (use_numba and HAVE_NUMBA)
    if not fast or not qualifies(model) or len(model.factors) > 15:
        return climate_chunk_reference(model, values, area, params=params, present=present)
    pm: PackedModel = pack(model)
    tab = _model_table(model)
    first = np.asarray(values[pm.names[0]])
    shape = first.shape
    xs = tuple(np.ascontiguousarray(values[f], dtype=np.float32).reshape(shape) for f in pm.names)
    area = np.ascontiguousarray(np.broadcast_to(area, shape), dtype=np.float64)
    future = present is not None
    if future:
        pc = np.ascontiguousarray(present[0], dtype=np.float32)
        pl = np.ascontiguousarray(present[1], dtype=np.uint8)
    else:
        pc, pl = np.empty((1, 1), np.float32), np.empty((1, 1), np.uint8)
    k = len(pm.names)
    off, size = _offsets(k, params)
    stats = np.zeros(size)
    hedges = np.linspace(-params.hist_max, params.hist_max, params.hist_bins + 1)
    f32, u8 = (lambda: np.empty(shape, np.float32)), (lambda: np.empty(shape, np.uint8))
    c, code, mess, far, ext = f32(), u8(), f32(), u8(), u8()
    if future:
        change, pct, zone, switch = f32(), f32(), u8(), u8()
    else:
        change, pct, zone, switch = np.empty((1, 1), np.float32), np.empty((1, 1), np.float32), \
            np.empty((1, 1), np.uint8), np.empty((1, 1), np.uint8)
    _fused(xs, pm.kind, pm.center, pm.scale, pm.clip, pm.lo, pm.hi, pm.coef, pm.knots, pm.n_knots, pm.transform,
           tab.ref, tab.n, tab.below, tab.inv_width, tab.pct, bool(params.similarity),
           future, pc, pl, area, float(params.release), float(params.constraint), float(params.floor),
           float(params.zero), params.novel == "mask", int(params.n_zones), hedges, float(params.hist_max),
           c, code, mess, far, ext, change, pct, zone, switch, stats, off)
    maps = {"ceiling": c, "limiting": code, "similarity": mess, "least_similar": far, "extrapolated": ext}
    if not params.similarity:  # only their signs were computed
        del maps["similarity"], maps["least_similar"]
    if future:
        maps.update(change=change, change_pct=pct, zone=zone, switch=switch)
    return maps, stats
