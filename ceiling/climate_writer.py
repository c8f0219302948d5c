"""Writing one climate: chunk tasks in, map files, NetCDF chunks and summary vectors out.

:func:`write_climate` sends one task per chunk (:func:`ceiling.tasks.run_chunk`) to the compute
back end and, as results come back in any order, copies each chunk's maps and overview blocks
into the climate's stream files (:class:`ceiling.outputs.stream.MapStream`) and its encoded
NetCDF chunks into the run's NetCDF, the latter strictly in chunk order (a short reorder
buffer), so the files do not depend on the scheduler. When every chunk is in, the statistics are
summed in chunk order, the stream files become COGs, and a completion record lists the files
with their checksums for ``--resume``.
"""

from __future__ import annotations

import functools
import json
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from .categories import layer_categories
from .cluster import Compute
from .errors import DataError
from .grids import BlockReader, GridSpec, inspect_layer
from .outputs.atomic import Prefetch, atomic_write_text
from .outputs.names import layer_path
from .outputs.netcdf import NetcdfVariable, NetcdfWriter
from .outputs.stream import MapStream, overview_levels
from .scenarios import Climate, LayerRef
from .tasks import MapSpec, ReadbackPlan, chunk_windows, run_chunk

__all__ = ["write_climate", "map_specs", "netcdf_variables", "readback_reader", "done_record_name", "LAYER_META"]

# dtype, long name, units
LAYER_META: dict[str, tuple[str, str, str]] = {
    "ceiling": ("float32", "potential maximum abundance (ceiling), in survey abundance units", "1"),
    "change": ("float32", "change of the ceiling, future minus present", "1"),
    "change_pct": ("float32", "change of the ceiling relative to the present", "%"),
    "limiting": ("uint8", "limiting factor (law of the minimum)", ""),
    "zone": ("uint8", "zone class of ceiling change", ""),
    "switch": ("uint8", "limiting-factor switch, present to future", ""),
    "similarity": ("float32", "similarity of the climate to the survey's climates (MESS); negative: novel", "%"),
    "least_similar": ("uint8", "least similar factor (MESS)", ""),
    "extrapolated": ("uint8", "novel climate: at least one factor outside the survey's range", ""),
    "median_ceiling": ("float32", "ensemble median of the future ceiling", "1"),
    "mean_ceiling": ("float32", "ensemble mean of the future ceiling", "1"),
    "median_change": ("float32", "ensemble median of the change of the ceiling", "1"),
    "mean_change": ("float32", "ensemble mean of the change of the ceiling", "1"),
    "change_min": ("float32", "smallest change of the ceiling across climate models", "1"),
    "change_max": ("float32", "largest change of the ceiling across climate models", "1"),
    "change_iqr": ("float32", "interquartile range of the change across climate models", "1"),
    "agreement": ("float32", "fraction of climate models whose change has the sign of the ensemble median", "1"),
    "robustness": ("uint8", "agreement class of the change across climate models", ""),
    "limiting_share": ("float32", "share of climate models naming the most common limiting factor", "1"),
    "ceiling_lower": ("float32", "lower bootstrap bound of the ceiling", "1"),
    "ceiling_upper": ("float32", "upper bootstrap bound of the ceiling", "1"),
    "change_lower": ("float32", "lower bootstrap bound of the change of the ceiling", "1"),
    "change_upper": ("float32", "upper bootstrap bound of the change of the ceiling", "1"),
    "p_release": ("float32", "probability of release: share of bootstrap replicates", "1"),
    "p_constraint": ("float32", "probability of constraint: share of bootstrap replicates", "1"),
}

CAUTION = "potential upper limit of abundance, not a forecast; needs expert review"


def readback_reader(path: Path, grid: GridSpec) -> BlockReader:
    """A reader of a map written earlier in the run (float32, NaN for nodata)."""
    info = inspect_layer(LayerRef(path), factor=path.stem)
    return BlockReader(info, grid, resampling="nearest")


def netcdf_variables(present: Sequence[str], future: Sequence[str], factors: Sequence[str]) -> list[NetcdfVariable]:
    """The map variables of the run's NetCDF: ``{layer}_present`` for the present's layers, one
    (species, climate) variable per future layer (none without futures)."""
    out = []
    for name in present:
        _, long_name, units = LAYER_META[name]
        out.append(NetcdfVariable(f"{name}_present", f"{long_name}, present", units,
                                  layer_categories(name, list(factors)), True))
    for name in future:
        _, long_name, units = LAYER_META[name]
        out.append(NetcdfVariable(name, long_name, units, layer_categories(name, list(factors)), False))
    return out


def map_specs(
    species_count: int, layers: Sequence[str], grid: GridSpec, chunk: int, *,
    netcdf: Callable[[int, str], tuple[str, tuple[int, ...], np.ndarray | None] | None] | None = None,
) -> tuple[MapSpec, ...]:
    """One :class:`MapSpec` per species and layer (species first, layers in the given order).

    ``netcdf(i, layer)`` gives the NetCDF variable, its leading index and the recoding of its
    codes, or None when the map is not in the NetCDF.
    """
    levels = tuple(overview_levels(grid.width, grid.height, chunk))
    out = []
    for i in range(species_count):
        for name in layers:
            nc = netcdf(i, name) if netcdf is not None else None
            out.append(MapSpec(i, name, LAYER_META[name][0], levels, *(nc if nc else (None, (), None))))
    return tuple(out)


def write_climate(
    comp: Compute, stage: Path, grid: GridSpec, climate: Climate, plan: Any, *, species: Sequence[str],
    factor_lists: Sequence[Sequence[str]], chunk: int, used: Sequence[str] = (), n_stats: int,
    nc: NetcdfWriter | None = None, novel: str = "", ensemble: bool = False,
    say: Callable[[str], None] | None = None, record: bool = True, timings: dict[str, float] | None = None,
    deflate_level: int = 1, keep: dict[tuple[int, str], Path] | None = None,
) -> tuple[list[Path], list[np.ndarray]]:
    """Compute and write every map of one climate; return the files and the summary vectors.

    With ``record`` (the default) a completion record makes the climate reusable by ``--resume``.
    ``timings`` accumulates the seconds this process spends copying chunks into files
    (``writes``) and making the COGs (``cogs``), the part of the work that stays here on a cluster.
    ``keep``, when given, maps (species index, layer) to nothing yet: those layers' uncompressed
    stream files are kept and their paths filled in (the caller removes them).
    """
    timings = timings if timings is not None else {}
    done = stage / done_record_name(climate.key)
    reused = _reuse_climate(done, stage, n_stats, climate.key) if record else None
    if reused is not None:
        if say is not None:
            say(f"      {climate.label}: reused {len(reused[0])} complete files (--resume)")
        if nc is not None and any(s.nc_name for s in plan.maps):  # its NetCDF part, from the files
            readers = tuple(readback_reader(stage / layer_path(species[s.species], climate.key, s.layer), grid)
                            for s in plan.maps)
            _stream(comp, ReadbackPlan(readers, plan.maps, plan.nc_chunk), grid, chunk, [], nc, climate, say, timings)
        return reused
    streams = []
    for spec in plan.maps:
        _, long_name, units = LAYER_META[spec.layer]
        cats = layer_categories(spec.layer, list(factor_lists[spec.species]), ensemble=ensemble)
        final = stage / layer_path(species[spec.species], climate.key, spec.layer)
        final.parent.mkdir(parents=True, exist_ok=True)
        tags = {"species": species[spec.species], "scenario": climate.scenario, "climate_model": climate.model,
                "period": climate.period, "layer": spec.layer, "novel_cells": novel, "caution": CAUTION}
        streams.append(MapStream(final, grid, spec.dtype, long_name, units, chunk, cats, tags, list(spec.levels),
                                 deflate_level, comp.workers if comp.kind == "threads" else None))
    # the finished files' checksums (for the completion record and the manifest), each read
    # while the next COG is copied
    sums = Prefetch()
    try:
        stats, counts = _stream(comp, plan, grid, chunk, streams, nc, climate, say, timings)
        for f, n in zip(used, counts):
            if int(n) == 0:
                raise DataError(
                    f"layer of '{f}' for {climate.label} ({climate.layers[f].describe()}) is all nodata inside the "
                    "study area; check the file and the mask"
                )
        written = []
        t0 = time.perf_counter()
        keeps = [keep is not None and (spec.species, spec.layer) in keep for spec in plan.maps]
        if comp.client is None:  # here, one COG after another, each on all cores
            finished = []
            for s, k in zip(streams, keeps):
                finished.append(s.finalize(keep=k))
                sums.add(finished[-1])
        else:  # on a cluster the workers make the COGs, several at once (they see the files)
            for s in streams:
                s.close()
            out: dict[int, list[Path]] = dict(comp.imap(_finalize, None, list(zip(streams, keeps))))
            finished = [out[i] for i in range(len(streams))]
            sums.add(p for files in finished for p in files)
        for spec, s, k, files in zip(plan.maps, streams, keeps, finished):
            written += files
            if k:
                keep[(spec.species, spec.layer)] = s.path
        timings["cogs"] = timings.get("cogs", 0.0) + time.perf_counter() - t0
    except BaseException:
        sums.close(finish=False)
        for s in streams:
            s.discard()
        raise
    sums.close()
    if record:
        _write_done_record(done, stage, written, stats, climate.key)
    return written, stats


def _run_and_write(streams: list[MapStream], seconds: list[float], plan: Any, window: tuple[slice, slice]) -> Any:
    """A chunk task that also writes its maps into the stream files (threads of this process)."""
    res = run_chunk(plan, window)
    t0 = time.perf_counter()
    for s, data, ovs in zip(streams, res.data, res.overviews):
        s.write(res.rows, res.cols, data, ovs)
    seconds.append(time.perf_counter() - t0)
    res.data, res.overviews = [], []
    return res


def _finalize(_: Any, item: tuple[MapStream, bool]) -> list[Path]:
    stream, keep = item
    return stream.finalize(keep=keep)


def _stream(comp: Compute, plan: Any, grid: GridSpec, chunk: int, streams: list[MapStream],
            nc: NetcdfWriter | None, climate: Climate, say: Callable[[str], None] | None,
            timings: dict[str, float]) -> tuple[list[np.ndarray], np.ndarray]:
    windows = chunk_windows(grid, chunk)
    per_chunk: list[list[np.ndarray]] = [[] for _ in windows]
    counts = None
    waiting: dict[int, list] = {}
    next_nc = 0
    report = max(1, len(windows) // 10) if (say is not None and len(windows) >= 20) else 0
    spent = 0.0
    # threads of this process write their chunk's maps themselves (one lock per file); from a
    # cluster the results come back and are written here
    direct = comp.client is None and bool(streams)
    in_tasks: list[float] = []
    task = functools.partial(_run_and_write, streams, in_tasks) if direct else run_chunk
    for done, (i, res) in enumerate(comp.imap(task, plan, windows), start=1):
        t0 = time.perf_counter()
        for s, data, ovs in zip(streams if not direct else (), res.data, res.overviews):
            s.write(res.rows, res.cols, data, ovs)
        per_chunk[i] = res.stats
        counts = res.valid.copy() if counts is None else counts + res.valid
        if nc is not None:
            waiting[i] = res.netcdf
            while next_nc in waiting:  # HDF5 lays chunks out in arrival order: keep one order
                for spec, chunks in zip(plan.maps, waiting.pop(next_nc)):
                    for r0, c0, data in chunks:
                        nc.write(spec.nc_name, spec.nc_lead, r0, c0, data)
                next_nc += 1
        spent += time.perf_counter() - t0
        if report and done % report == 0:
            say(f"      {climate.label}: {100 * done // len(windows)}% of the grid")
    timings["writes"] = timings.get("writes", 0.0) + spent
    timings["stream_writes_in_tasks"] = timings.get("stream_writes_in_tasks", 0.0) + sum(in_tasks)
    # sums in chunk order: the same figures whatever order the chunks finished in
    stats = [np.sum([v[k] for v in per_chunk], axis=0) for k in range(len(per_chunk[0]))] if per_chunk[0] else []
    return stats, counts if counts is not None else np.zeros(0, dtype=np.int64)


# --- resume records: one per climate, written once its files are final ------------------------

def done_record_name(key: tuple[str, str, str]) -> str:
    """The record of one climate, named from its full names (scenario, climate model, period),
    not from its folder: names that differ only where folder names cannot never share one."""
    import hashlib

    from .outputs.folder import DONE_PREFIX

    digest = hashlib.sha256(json.dumps([str(k) for k in key]).encode("utf-8")).hexdigest()[:24]
    return f"{DONE_PREFIX}{digest}.json"


def _write_done_record(record: Path, stage: Path, written: list[Path], vectors: list[np.ndarray],
                       key: tuple[str, str, str]) -> None:
    """List a climate's finished files (with sha256) and its summary vectors, for ``--resume``."""
    from .outputs.atomic import sha256_file

    doc = {"climate": [str(k) for k in key], "files": {str(p.relative_to(stage)): sha256_file(p) for p in written},
           "vectors": [np.asarray(v, dtype=np.float64).tolist() for v in vectors]}
    atomic_write_text(record, json.dumps(doc))


def _reuse_climate(record: Path, stage: Path, n_vectors: int,
                   key: tuple[str, str, str]) -> tuple[list[Path], list[np.ndarray]] | None:
    """The files and summary vectors of a climate completed by an interrupted run, or None when
    there is no record, the record is of another climate, or any listed file is missing or
    differs from its checksum."""
    from .outputs.atomic import sha256_file

    if not record.is_file():
        return None
    try:
        doc = json.loads(record.read_text(encoding="utf-8"))
        if doc["climate"] != [str(k) for k in key]:
            return None
        files = [(stage / rel, sha) for rel, sha in doc["files"].items()]
        vectors = [np.asarray(v, dtype=np.float64) for v in doc["vectors"]]
    except (ValueError, KeyError, TypeError, AttributeError, RecursionError):
        return None
    if len(vectors) != n_vectors or not all(p.is_file() and sha256_file(p) == sha for p, sha in files):
        record.unlink(missing_ok=True)
        return None
    return [p for p, _ in files], vectors
