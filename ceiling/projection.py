"""Applying fitted ceilings to climate grids, lazily and chunk by chunk.

:func:`open_climate` turns one climate's layers into lazy aligned arrays; :func:`project`
evaluates every species' ceiling and limiting factor on them in one blockwise pass (each chunk of
each layer is read once for all species); :func:`compare` derives change, percent change, zone
class and limiting-factor switch between the present and a future; :func:`climate_stats`
reduces a comparison to areas per class in the same pass. Nothing here computes: the writers do.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING

import numpy as np
import xarray as xr

from .errors import DataError
from .grids import BlockReader, GridSpec, layer_reader, open_layer
from .kernels import NODATA_CODE, change_kernel, switch_kernel, zone_kernel
from .kernels_fast import evaluate as evaluate_fast
from .model import CeilingModel
from .mess import check_reference, mess_kernel
from .outputs.names import FUTURE_BOUNDS, PRESENT_BOUNDS
from .scenarios import Climate, ProjectionOptions

if TYPE_CHECKING:  # dask is imported where the lazy arrays are built, not at start-up
    import dask.array as da

__all__ = ["climate_readers", "uncertainty", "has_replicates", "PRESENT_BOUNDS", "FUTURE_BOUNDS", "open_climate", "project", "novel_rule", "with_policy", "compare", "climate_stats", "valid_counts", "StatsLayout", "model_units"]


def model_units(models: Sequence[CeilingModel], factors: Sequence[str]) -> dict[str, str]:
    """The units each factor was fitted in (the same for every species of a run)."""
    out: dict[str, str] = {}
    for name in factors:
        for m in models:
            if name in m.factor_names and m[name].units:
                out[name] = m[name].units  # type: ignore[assignment]
                break
        else:
            raise DataError(
                f"the model has no units for factor '{name}'; set factors.units in the config (or units on the "
                "present-day layer) and fit again"
            )
    return out


def climate_readers(
    climate: Climate, template: GridSpec, factors: Sequence[str], units: dict[str, str], opts: ProjectionOptions
) -> dict[str, BlockReader]:
    """The chunk readers of one climate's layers (checked now; nothing is read)."""
    missing = [f for f in factors if f not in climate.layers]
    if missing:
        raise DataError(f"climate {climate.label} has no layer for factor(s) {', '.join(missing)}; add them to the config")
    return {f: layer_reader(climate.layers[f], template, factor=f, units=units[f], resampling=opts.resampling,
                            cache_mb=opts.gdal_cache_mb, chunk=opts.chunk) for f in factors}


def open_climate(
    climate: Climate, template: GridSpec, factors: Sequence[str], units: dict[str, str], opts: ProjectionOptions
) -> dict[str, xr.DataArray]:
    missing = [f for f in factors if f not in climate.layers]
    if missing:
        raise DataError(f"climate {climate.label} has no layer for factor(s) {', '.join(missing)}; add them to the config")
    return {
        f: open_layer(climate.layers[f], template, factor=f, units=units[f], chunk=opts.chunk,
                      resampling=opts.resampling, cache_mb=opts.gdal_cache_mb)
        for f in factors
    }


def _project_block(
    *blocks: np.ndarray, factors: tuple[str, ...], models: tuple[CeilingModel, ...], has_mask: bool,
    novel: str | None,
) -> np.ndarray:
    arrays = list(blocks)
    mask = arrays.pop() if has_mask else None
    values = {f: a.astype(np.float64) for f, a in zip(factors, arrays)}
    if mask is not None:
        for a in values.values():
            a[~mask] = np.nan
    s = len(models)
    out = np.empty((4 * s, *arrays[0].shape), dtype=np.float32)
    for i, m in enumerate(models):
        c, code = evaluate_fast(m, values)  # fused kernel when the model qualifies
        mess, far = mess_kernel([values[f] for f in m.factor_names], [m.reference[f] for f in m.factor_names])
        if novel == "mask":
            outside = mess < 0
            c = np.where(outside, np.nan, c)
            code = np.where(outside, NODATA_CODE, code)
        out[i] = c
        out[s + i] = code
        out[2 * s + i] = mess
        out[3 * s + i] = far
    return out


def with_policy(models: Sequence[CeilingModel], novel: str | None) -> list[CeilingModel]:
    """Models whose factors follow the projection's rule for values beyond the sampled range.

    ``hold`` holds each factor at its sampled limit, ``extend`` evaluates the curve beyond it,
    ``mask`` holds and then sets the ceiling to nodata wherever MESS < 0; None keeps each model's
    own setting.
    """
    if novel is None:
        return list(models)
    outside = "extend" if novel == "extend" else "hold"
    return [replace(m, outside=outside, factors=tuple(replace(f, outside=outside) for f in m.factors)) for m in models]


def novel_rule(models: Sequence[CeilingModel], novel: str | None) -> str:
    """The rule for cells beyond the survey's range, as recorded in the outputs' metadata."""
    if novel is not None:
        return novel
    rules = sorted({m.outside for m in models})
    return rules[0] if len(rules) == 1 else "per species: " + ", ".join(f"{m.species}={m.outside}" for m in models)


def project(
    models: Sequence[CeilingModel], layers: dict[str, xr.DataArray], *, mask: xr.DataArray | None = None,
    novel: str | None = None,
) -> xr.Dataset:
    """Lazy ceiling, limiting factor, similarity (MESS) and least similar factor for every species.

    Factor codes follow each model's own factor order; 255 marks nodata (any factor missing).
    ``novel`` is the rule for cells beyond the sampled range (see :func:`with_policy`).
    """
    import dask.array as da

    factors = tuple(layers)
    for m in models:
        lacking = [f for f in m.factor_names if f not in layers]
        if lacking:
            raise DataError(f"the model of '{m.species}' needs factor(s) {', '.join(lacking)}, which the layers lack; the model and the config must name the same factors")
        check_reference(m.reference or {}, m.factor_names, species=m.species)
    models = with_policy(models, novel)
    arrays = [layers[f].data for f in factors]
    if mask is not None:
        arrays.append(mask.data)
    s = len(models)
    first = layers[factors[0]]
    stacked = da.map_blocks(
        _project_block, *arrays, factors=factors, models=tuple(models), has_mask=mask is not None,
        novel=novel, new_axis=0, chunks=((4 * s,), *first.data.chunks), dtype=np.float32,
        meta=np.empty((0, 0, 0), np.float32),
    )
    coords = {"species": [m.species for m in models], "y": first.y, "x": first.x}

    def code(a: da.Array) -> da.Array:
        return da.where(da.isnan(a), NODATA_CODE, a).astype(np.uint8)

    mess = stacked[2 * s : 3 * s]
    extrapolated = da.where(da.isnan(mess), NODATA_CODE, (mess < 0).astype(np.uint8)).astype(np.uint8)
    dims = ("species", "y", "x")
    return xr.Dataset(
        {
            "ceiling": (dims, stacked[:s]),
            "limiting": (dims, code(stacked[s : 2 * s])),
            "similarity": (dims, mess),
            "least_similar": (dims, code(stacked[3 * s :])),
            "extrapolated": (dims, extrapolated),
        },
        coords=coords,
        attrs={"novel_cells": novel_rule(models, novel)},
    )


def compare(present: xr.Dataset, future: xr.Dataset, *, n_factors: Sequence[int], opts: ProjectionOptions) -> xr.Dataset:
    """Change, percent change, zone and switch between present and future (lazy)."""
    import dask.array as da

    p, f = present["ceiling"].data, future["ceiling"].data

    def changes(pb: np.ndarray, fb: np.ndarray) -> np.ndarray:
        ch, pct = change_kernel(pb, fb)
        z = zone_kernel(pb, fb, release=opts.release_threshold, constraint=opts.constraint_threshold,
                        floor=opts.absolute_floor, zero=opts.zero_level)
        return np.stack([ch, pct, z.astype(np.float32)])

    out = da.map_blocks(changes, p, f, new_axis=0, chunks=((3,), *p.chunks), dtype=np.float32,
                        meta=np.empty((0, 0, 0, 0), np.float32))
    ks = np.asarray(n_factors).reshape(-1, 1, 1)
    switch = da.map_blocks(
        lambda a, b: np.stack([switch_kernel(a[i], b[i], int(ks[i, 0, 0])) for i in range(a.shape[0])]),
        present["limiting"].data, future["limiting"].data, dtype=np.uint8,
    )
    dims = ("species", "y", "x")
    return xr.Dataset(
        {
            "change": (dims, out[0]),
            "change_pct": (dims, out[1]),
            "zone": (dims, out[2].astype(np.uint8)),
            "switch": (dims, switch),
        },
        coords=present.coords,
    )


@dataclass(frozen=True)
class StatsLayout:
    """Where each figure sits in the per-block statistics vector of one species."""

    k: int
    n_zones: int = 6
    hist_bins: int = 4000
    hist_max: float = 1.0

    @property
    def size(self) -> int:
        return 2 * self.n_zones + 2 * self.k + self.k * self.k + 6 + self.hist_bins + 2

    def slices(self) -> dict[str, slice]:
        i = 0
        out = {}
        for name, n in (("zone", self.n_zones), ("lim_now", self.k), ("lim_later", self.k),
                        ("switch", self.k * self.k), ("area", 1), ("change_area", 1), ("cells", 1),
                        ("now_area", 1), ("later_area", 1), ("novel", 1), ("zone_novel", self.n_zones),
                        ("hist", self.hist_bins + 2)):
            out[name] = slice(i, i + n)
            i += n
        return out

    def edges(self) -> np.ndarray:
        return np.linspace(-self.hist_max, self.hist_max, self.hist_bins + 1)


def _stats_block(pc, pl, fc, fl, zone, area, novel, layout: StatsLayout) -> np.ndarray:
    sl = layout.slices()
    v = np.zeros(layout.size)
    ok = np.isfinite(pc) & np.isfinite(fc)
    w = area[ok]
    v[sl["zone"]] = np.bincount(zone[ok], weights=w, minlength=layout.n_zones)[: layout.n_zones]
    k = layout.k
    v[sl["lim_now"]] = np.bincount(pl[ok], weights=w, minlength=k)[:k]
    v[sl["lim_later"]] = np.bincount(fl[ok], weights=w, minlength=k)[:k]
    v[sl["switch"]] = np.bincount(pl[ok].astype(np.int64) * k + fl[ok], weights=w, minlength=k * k)[: k * k]
    d = (fc[ok].astype(np.float64) - pc[ok])
    v[sl["area"]] = w.sum()
    v[sl["change_area"]] = (d * w).sum()
    v[sl["cells"]] = ok.sum()
    v[sl["now_area"]] = (pc[ok].astype(np.float64) * w).sum()
    v[sl["later_area"]] = (fc[ok].astype(np.float64) * w).sum()
    nov = (novel[ok] == 1)
    v[sl["novel"]] = w[nov].sum()
    v[sl["zone_novel"]] = np.bincount(zone[ok][nov], weights=w[nov], minlength=layout.n_zones)[: layout.n_zones]
    idx = np.searchsorted(layout.edges(), d, side="right")  # 0 = below, bins+1 = above
    v[sl["hist"]] = np.bincount(idx, weights=w, minlength=layout.hist_bins + 2)
    return v


def climate_stats(present: xr.Dataset, future: xr.Dataset, cmp: xr.Dataset, area: da.Array, layouts: Sequence[StatsLayout]) -> list[da.Array]:
    """Per-species statistic vectors per block (lazy): arrays (n_block_rows, n_block_cols, L).

    Summing over the first two axes gives the statistics of the whole grid (or of any group of
    blocks, which is how the writer reduces them group by group).
    """
    import dask.array as da

    out = []
    for i, lay in enumerate(layouts):
        def block(pc, pl, fc, fl, z, a, nv, lay=lay):
            return _stats_block(pc, pl, fc, fl, z, a, nv, lay)[None, None, :]

        out.append(da.map_blocks(
            block, present["ceiling"].data[i], present["limiting"].data[i], future["ceiling"].data[i],
            future["limiting"].data[i], cmp["zone"].data[i], area, future["extrapolated"].data[i], new_axis=2,
            chunks=(tuple(1 for _ in area.chunks[0]), tuple(1 for _ in area.chunks[1]), (lay.size,)),
            dtype=np.float64,
        ))
    return out


def valid_counts(arr: da.Array) -> da.Array:
    """Number of finite cells per block, shape (n_block_rows, n_block_cols)."""
    import dask.array as da

    return da.map_blocks(
        lambda a: np.array([[np.isfinite(a).sum()]], dtype=np.int64), arr,
        chunks=tuple(tuple(1 for _ in c) for c in arr.chunks), dtype=np.int64,
    )


_FROM_KERNEL = {"ceiling_lower": "future_low", "ceiling_upper": "future_high", "change_lower": "change_low",
                "change_upper": "change_high", "p_release": "release_probability", "p_constraint": "constraint_probability"}


def has_replicates(models: Sequence[CeilingModel]) -> bool:
    """True when every species carries bootstrap replicates (all or none)."""
    counts = [m.n_replicates for m in models]
    if any(counts) and not all(counts):
        missing = [m.species for m in models if not m.n_replicates]
        raise DataError(f"species {', '.join(missing)} have no bootstrap replicates while others do; fit all with fit.bootstrap")
    return bool(counts) and all(counts)


def _uncertainty_block(*blocks: np.ndarray, factors: tuple[str, ...], models: tuple[CeilingModel, ...],
                       future: bool, opts: ProjectionOptions) -> np.ndarray:
    from .uncertainty import chunk_uncertainty

    k = len(factors)
    present = {f: b.astype(np.float64) for f, b in zip(factors, blocks[:k])}
    later = {f: b.astype(np.float64) for f, b in zip(factors, blocks[k : 2 * k])} if future else None
    names = FUTURE_BOUNDS if future else PRESENT_BOUNDS
    out = np.empty((len(models) * len(names), *blocks[0].shape), dtype=np.float32)
    for i, m in enumerate(models):
        # slab by slab: memory near replicates x slab, whatever the chunk size
        lay = chunk_uncertainty(m, present, later, lower=opts.lower_percentile, upper=opts.upper_percentile,
                                release=opts.release_threshold, constraint=opts.constraint_threshold,
                                floor=opts.absolute_floor, zero=opts.zero_level)
        for j, n in enumerate(names):
            key = _FROM_KERNEL[n] if future else {"ceiling_lower": "present_low", "ceiling_upper": "present_high"}[n]
            out[i * len(names) + j] = lay[key]
    return out


def uncertainty(
    models: Sequence[CeilingModel], present: dict[str, xr.DataArray], future: dict[str, xr.DataArray] | None,
    *, opts: ProjectionOptions, novel: str | None = None,
) -> xr.Dataset:
    """Lazy bootstrap bounds (and zone probabilities for a future) for every species.

    All replicates are evaluated inside one blockwise kernel (a replicate axis in the kernel).
    A future's bounds need the present replicates cell by cell, so the present layers are read
    again with the future's: K extra layer reads per future, instead of storing B replicate
    grids of the present.
    """
    import dask.array as da

    models = with_policy(models, novel)
    factors = tuple(present)
    arrays = [present[f].data for f in factors] + ([future[f].data for f in factors] if future else [])
    names = FUTURE_BOUNDS if future else PRESENT_BOUNDS
    s = len(models)
    first = present[factors[0]]
    stacked = da.map_blocks(
        _uncertainty_block, *arrays, factors=factors, models=tuple(models), future=future is not None, opts=opts,
        new_axis=0, chunks=((s * len(names),), *first.data.chunks), dtype=np.float32,
        meta=np.empty((0, 0, 0), np.float32),
    )
    dims = ("species", "y", "x")
    data = {n: (dims, stacked[j :: len(names)]) for j, n in enumerate(names)}
    return xr.Dataset(data, coords={"species": [m.species for m in models], "y": first.y, "x": first.x})
