"""The work of one chunk of one climate, as a task a worker runs.

A task reads the chunk of every layer the climate needs, computes every map of every species
(:mod:`ceiling.kernels_climate` for a projected climate, :func:`ceiling.ensemble.ensemble_kernel`
for an ensemble), reduces the chunk's summary statistics, and prepares what the writer stores:
each map as stored on disk (nodata values filled in), its overview blocks, and its NetCDF
chunks already compressed. The calling process only copies these into files, in a fixed order
(:mod:`ceiling.running`). Plans hold only names, numbers and models, so they pickle to
dask.distributed workers.

Every chunk of every input is read once per climate, for all species and all maps.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .areas import window_areas
from .grids import BlockReader, GridSpec
from .kernels import NODATA_CODE
from .kernels_climate import ChunkParams, climate_chunk

__all__ = ["MapSpec", "ClimatePlan", "EnsemblePlan", "ReadbackPlan", "ChunkResult", "run_chunk", "chunk_windows"]


@dataclass(frozen=True)
class MapSpec:
    """One output map of one species: its layer name, stored type, overview factors and NetCDF
    variable (None: not in the NetCDF), with the recoding of its codes for the NetCDF."""

    species: int
    layer: str
    dtype: str
    levels: tuple[int, ...] = ()
    nc_name: str | None = None
    nc_lead: tuple[int, ...] = ()
    nc_lut: np.ndarray | None = field(default=None, compare=False)


@dataclass
class ChunkResult:
    """What the writer stores for one chunk (lists follow the plan's ``maps``)."""

    rows: slice
    cols: slice
    data: list[np.ndarray]
    overviews: list[list[np.ndarray]]
    netcdf: list[list[tuple[int, int, bytes]]]
    stats: list[np.ndarray]
    valid: np.ndarray


def chunk_windows(grid: GridSpec, chunk: int) -> list[tuple[slice, slice]]:
    """The chunks of a grid, row by row: the order in which results are written."""
    return [(slice(r, min(grid.height, r + chunk)), slice(c, min(grid.width, c + chunk)))
            for r in range(0, grid.height, chunk) for c in range(0, grid.width, chunk)]


def _read(reader: Any, rows: slice, cols: slice) -> np.ndarray:
    return np.asarray(reader[rows, cols])


def _codes(a: np.ndarray) -> np.ndarray:
    """Category codes as uint8 (a COG read back comes as float32 with NaN for nodata)."""
    return a if a.dtype == np.uint8 else np.where(np.isnan(a), NODATA_CODE, a).astype(np.uint8)


@dataclass(frozen=True)
class ClimatePlan:
    """A projected climate: the present (``present`` None) or a future read against it.

    ``readers``: the climate's layer of every factor used (config order); ``present``: for a
    future, per species the present ceiling and limiting-factor maps already written;
    ``boot_readers``: the present's layers, when bootstrap bounds need them for a future.
    ``models`` already follow the run's rule for novel cells.
    """

    grid: GridSpec
    readers: tuple[tuple[str, BlockReader], ...]
    models: tuple[Any, ...]
    params: tuple[ChunkParams, ...]
    maps: tuple[MapSpec, ...]
    present: tuple[tuple[BlockReader, BlockReader], ...] | None = None
    mask: Any = None  # a lazy boolean dask array on the grid, or None
    bootstrap: Any = None  # ProjectionOptions when the models carry bootstrap replicates
    boot_readers: tuple[tuple[str, BlockReader], ...] | None = None
    nc_chunk: tuple[int, int] = (0, 0)
    write_maps: bool = True

    def compute(self, rows: slice, cols: slice) -> tuple[dict[tuple[int, str], np.ndarray], list[np.ndarray], np.ndarray]:
        raw = {f: _read(r, rows, cols) for f, r in self.readers}
        valid = np.array([np.count_nonzero(~np.isnan(raw[f])) for f, _ in self.readers], dtype=np.int64)
        values = raw
        if self.mask is not None:
            inside = np.asarray(self.mask[rows, cols].compute(scheduler="synchronous"), dtype=bool)
            values = {f: np.where(inside, a, np.float32(np.nan)) for f, a in raw.items()}
        area = window_areas(self.grid, rows, cols)
        out: dict[tuple[int, str], np.ndarray] = {}
        stats = []
        for i, (m, params) in enumerate(zip(self.models, self.params)):
            present = None
            if self.present is not None:
                pc = _read(self.present[i][0], rows, cols)
                present = (pc, _codes(_read(self.present[i][1], rows, cols)))
            maps, st = climate_chunk(m, {f: values[f] for f in m.factor_names}, area, params=params, present=present)
            for name, a in maps.items():
                out[(i, name)] = a
            stats.append(st)
        if self.bootstrap is not None:
            out.update(self._bounds(raw, rows, cols))
        return out, stats, valid

    def _bounds(self, raw: dict[str, np.ndarray], rows: slice, cols: slice) -> dict[tuple[int, str], np.ndarray]:
        from .projection import FUTURE_BOUNDS, PRESENT_BOUNDS, _uncertainty_block

        factors = tuple(f for f, _ in self.readers)
        future = self.present is not None
        if future:
            base = dict(self.boot_readers or ())
            blocks = [_read(base[f], rows, cols) for f in factors] + [raw[f] for f in factors]
        else:
            blocks = [raw[f] for f in factors]
        arr = _uncertainty_block(*blocks, factors=factors, models=self.models, future=future, opts=self.bootstrap)
        names = FUTURE_BOUNDS if future else PRESENT_BOUNDS
        return {(i, n): arr[i * len(names) + j] for i in range(len(self.models)) for j, n in enumerate(names)}


@dataclass(frozen=True)
class EnsemblePlan:
    """A multi-model ensemble from the member futures' maps already written."""

    grid: GridSpec
    present: tuple[BlockReader, ...]  # per species: present ceiling
    members: tuple[tuple[tuple[BlockReader, BlockReader], ...], ...]  # per species, per model: ceiling, limiting
    n_factors: tuple[int, ...]
    opts: Any  # ProjectionOptions
    maps: tuple[MapSpec, ...]
    nc_chunk: tuple[int, int] = (0, 0)
    write_maps: bool = True

    def compute(self, rows: slice, cols: slice) -> tuple[dict[tuple[int, str], np.ndarray], list[np.ndarray], np.ndarray]:
        from .ensemble import ensemble_kernel

        o = self.opts
        out: dict[tuple[int, str], np.ndarray] = {}
        stats = []
        area = window_areas(self.grid, rows, cols)
        for i, members in enumerate(self.members):
            p = _read(self.present[i], rows, cols)
            fut = np.stack([_read(c, rows, cols) for c, _ in members])
            lim = _codes(np.stack([_read(lr, rows, cols) for _, lr in members]))
            r = ensemble_kernel(p, fut, lim, self.n_factors[i], robust=o.agreement_threshold, release=o.release_threshold,
                                constraint=o.constraint_threshold, floor=o.absolute_floor, zero=o.zero_level)
            for name, a in r.items():
                out[(i, name)] = a
            stats.append(_ensemble_stats(r["zone"], r["robustness"], r["agreement"], area))
        return out, stats, np.zeros(0, dtype=np.int64)


def _ensemble_stats(z: np.ndarray, r: np.ndarray, a: np.ndarray, w: np.ndarray) -> np.ndarray:
    w = np.asarray(w)
    ok = z != NODATA_CODE
    v = np.zeros(10)
    v[:7] = np.bincount(z[ok], weights=w[ok], minlength=7)[:7]
    v[7] = w[ok & (r == 1)].sum()
    v[8] = w[ok].sum()
    v[9] = (np.nan_to_num(a[ok]) * w[ok]).sum()
    return v


@dataclass(frozen=True)
class ReadbackPlan:
    """Maps of a climate already written (a resumed run), read back for the NetCDF only."""

    readers: tuple[BlockReader, ...]  # follows ``maps``
    maps: tuple[MapSpec, ...]
    nc_chunk: tuple[int, int] = (0, 0)
    write_maps: bool = False

    def compute(self, rows: slice, cols: slice) -> tuple[dict[tuple[int, str], np.ndarray], list[np.ndarray], np.ndarray]:
        out = {}
        for spec, reader in zip(self.maps, self.readers):
            a = _read(reader, rows, cols)
            out[(spec.species, spec.layer)] = a if spec.dtype == "float32" else _codes(a)
        return out, [], np.zeros(0, dtype=np.int64)


def run_chunk(plan: Any, window: tuple[slice, slice]) -> ChunkResult:
    """Compute one chunk of ``plan`` and prepare everything the writer stores (for a
    :class:`ReadbackPlan`, the NetCDF chunks only)."""
    from .outputs.geotiff import FLOAT_NODATA
    from .outputs.netcdf import encode_chunk
    from .outputs.stream import decimate, to_disk

    rows, cols = window
    maps, stats, valid = plan.compute(rows, cols)
    data, overviews, netcdf = [], [], []
    ch, cw = plan.nc_chunk
    for spec in plan.maps:
        a = maps[(spec.species, spec.layer)]
        stored = to_disk(a, spec.dtype)
        if plan.write_maps:
            data.append(stored)
            overviews.append(decimate(a, spec.levels, categorical=spec.dtype == "uint8"))
        else:
            data.append(np.empty((0, 0), stored.dtype))
            overviews.append([])
        chunks = []
        if spec.nc_name is not None and ch:
            nc = stored if spec.nc_lut is None else spec.nc_lut[stored]
            fill = np.float32(FLOAT_NODATA) if spec.dtype == "float32" else np.uint8(NODATA_CODE)
            for r0 in range(0, nc.shape[0], ch):
                for c0 in range(0, nc.shape[1], cw):
                    block = nc[r0 : r0 + ch, c0 : c0 + cw]
                    chunks.append((rows.start + r0, cols.start + c0, encode_chunk(block, (ch, cw), fill)))
        netcdf.append(chunks)
    return ChunkResult(rows, cols, data, overviews, netcdf, stats, valid)
