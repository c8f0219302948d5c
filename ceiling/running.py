"""The projection stage as a whole: models + climates -> maps, NetCDF, tables, manifest.

:func:`project_to_folder` checks everything it can before computing, then, inside a staging
folder that replaces the output folder only when complete:

1. projects the present once (all species in one pass over the present layers) and writes its
   maps; the futures read the present back from those files instead of recomputing it;
2. for every future, reads each layer once, projects all species, compares with the present and
   writes the maps, with the summary statistics reduced in the same pass;
3. writes the run's CF NetCDF from the written maps, the summary and transition tables, and the
   manifest (checksums of every input and output).
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import dask.array as da
import numpy as np
import pandas as pd
import xarray as xr

from .areas import cell_areas
from .categories import (
    ENSEMBLE_ZONES,
    ZONES,
    layer_categories,
)
from .cluster import Compute, compute_context
from .config import RunConfig
from .errors import DataError
from .grids import BlockReader, GridSpec, inspect_layer, template_grid
from .kernels import NODATA_CODE
from .model import CeilingModel, ModelSet
from .outputs.atomic import atomic_write_text
from .outputs.geotiff import WindowTarget, create_tiled, finalize_cog
from .outputs.names import (
    ENSEMBLE,
    ENSEMBLE_LAYERS,
    FUTURE_LAYERS,
    NETCDF_FILE,
    PRESENT_LAYERS,
    SUMMARY_FILE,
    TRANSITIONS_FILE,
    layer_path,
)
from .outputs.netcdf import write_netcdf
from .projection import (
    FUTURE_BOUNDS,
    PRESENT_BOUNDS,
    StatsLayout,
    climate_stats,
    compare,
    has_replicates,
    model_units,
    novel_rule,
    open_climate,
    project,
    uncertainty,
    valid_counts,
)
from .scenarios import PRESENT, Climate, LayerRef, ProjectionOptions, climates, projection_options

__all__ = ["ProjectionRun", "RunResult", "run_projection", "project_to_folder", "LAYER_META"]

log = logging.getLogger(__name__)

# dtype, long name, units
LAYER_META: dict[str, tuple[str, str, str]] = {
    "ceiling": ("float32", "potential maximum abundance (ceiling), in survey abundance units", "1"),
    "change": ("float32", "change of the ceiling, future minus present", "1"),
    "change_pct": ("float32", "change of the ceiling relative to the present", "%"),
    "limiting": ("uint8", "limiting factor (law of the minimum)", ""),
    "zone": ("uint8", "zone class of ceiling change", ""),
    "switch": ("uint8", "limiting-factor switch, present to future", ""),
    "novelty": ("float32", "similarity of the climate to the survey's climates (MESS); negative: novel", "%"),
    "novel_factor": ("uint8", "most dissimilar factor (MESS)", ""),
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


@dataclass
class ProjectionRun:
    """What a projection wrote and measured."""

    climates: list[Climate]
    grid: GridSpec
    summary: pd.DataFrame
    transitions: pd.DataFrame
    written: list[Path] = field(default_factory=list)
    timings: dict[str, float] = field(default_factory=dict)
    compute: str = ""
    warnings: list[str] = field(default_factory=list)

    def headline(self) -> pd.DataFrame:
        cols = ["species", "scenario", "model", "period", "area_km2_release", "area_km2_constraint",
                "area_km2_stable", "area_km2_opens", "area_km2_closes", "mean_change", "median_change"]
        fut = self.summary[(self.summary["scenario"] != PRESENT) & (self.summary["model"] != ENSEMBLE)]
        return fut[[c for c in cols if c in fut.columns]]

    def summary_text(self) -> str:
        h = self.headline()
        if h.empty:
            return "present only: no futures in the config"
        with pd.option_context("display.width", 160, "display.max_columns", 20):
            return h.to_string(index=False, float_format=lambda v: f"{v:,.1f}")


def _read_back(path: Path, grid: GridSpec, chunk: int, *, code: bool) -> da.Array:
    info = inspect_layer(LayerRef(path), factor=path.stem)
    reader = BlockReader(info, grid, resampling="nearest")
    arr = da.from_array(reader, chunks=(chunk, chunk), asarray=True, lock=False, fancy=False,
                        name=f"readback-{path}", meta=np.empty((0, 0), np.float32))
    if code:
        return da.where(da.isnan(arr), NODATA_CODE, arr).astype(np.uint8)
    return arr


def _layout(m: CeilingModel) -> StatsLayout:
    peaks = [f.diagnostics.peak_ceiling for f in m.factors if np.isfinite(f.diagnostics.peak_ceiling)]
    top = min(peaks) if peaks else 1.0
    return StatsLayout(k=len(m.factors), hist_max=max(top, 1e-6) * (1.0 if m.outside == "hold" else 4.0))


def _stats_rows(models, climate: Climate, vectors, layouts) -> tuple[list[dict], list[dict]]:
    rows, trans = [], []
    for m, v, lay in zip(models, vectors, layouts):
        sl = lay.slices()
        area = float(v[sl["area"]][0])
        row: dict[str, Any] = {"species": m.species, "scenario": climate.scenario, "model": climate.model,
                               "period": climate.period, "area_km2": area / 1e6}
        row["mean_ceiling_now"] = float(v[sl["now_area"]][0]) / area if area else np.nan
        novel = float(v[sl["novel"]][0])
        row["area_km2_novel"] = novel / 1e6
        row["share_novel"] = novel / area if area else np.nan
        if not climate.is_present:
            row["mean_ceiling_later"] = float(v[sl["later_area"]][0]) / area if area else np.nan
            for z in ZONES:
                row[f"area_km2_{z.name}"] = float(v[sl["zone"]][z.code]) / 1e6
            for z in ZONES:
                row[f"area_km2_{z.name}_novel"] = float(v[sl["zone_novel"]][z.code]) / 1e6
        for i, f in enumerate(m.factor_names):
            row[f"area_km2_limited_now_{f}"] = float(v[sl["lim_now"]][i]) / 1e6
            if not climate.is_present:
                row[f"area_km2_limited_later_{f}"] = float(v[sl["lim_later"]][i]) / 1e6
        if not climate.is_present:
            row["mean_change"] = float(v[sl["change_area"]][0]) / area if area else np.nan
            row["median_change"] = _weighted_median(v[sl["hist"]], lay)
            k = lay.k
            mat = v[sl["switch"]].reshape(k, k)
            for i, a in enumerate(m.factor_names):
                for j, b in enumerate(m.factor_names):
                    trans.append({"species": m.species, "scenario": climate.scenario, "model": climate.model,
                                  "period": climate.period, "limiting_now": a, "limiting_later": b,
                                  "area_km2": float(mat[i, j]) / 1e6})
        rows.append(row)
    return rows, trans


def _weighted_median(hist: np.ndarray, lay: StatsLayout) -> float:
    """Area-weighted median from the change histogram (exact to one bin width)."""
    total = hist.sum()
    if total <= 0:
        return float("nan")
    cum = np.cumsum(hist)
    i = int(np.searchsorted(cum, 0.5 * total))
    if i == 0 or i == hist.size - 1:
        return float("nan")  # beyond the histogram's range
    edges = lay.edges()
    lo, hi = edges[i - 1], edges[i]
    before = cum[i - 1] if i > 0 else 0.0
    frac = (0.5 * total - before) / hist[i] if hist[i] > 0 else 0.5
    return float(lo + frac * (hi - lo))


def _group_size(comp: Compute) -> int:
    """Chunks per compute: enough to keep every worker busy, few enough to bound memory."""
    return max(2, 2 * comp.workers) if comp.kind == "threads" else max(4, 4 * comp.workers)


def _block_groups(chunks: tuple[tuple[int, ...], ...], *, per_group: int):
    """((block rows, block cols), (row slice, col slice)) for groups of blocks, row by row."""
    rows = np.cumsum((0, *chunks[0]))
    cols = np.cumsum((0, *chunks[1]))
    for bi in range(len(chunks[0])):
        for bj0 in range(0, len(chunks[1]), per_group):
            bj1 = min(bj0 + per_group, len(chunks[1]))
            yield (bi, bi + 1, bj0, bj1), (slice(int(rows[bi]), int(rows[bi + 1])), slice(int(cols[bj0]), int(cols[bj1])))


def _write_climate(
    comp: Compute, stage: Path, grid: GridSpec, climate: Climate, layers: dict[str, da.Array],
    models: Sequence[CeilingModel], factor_lists: list[list[str]], stats, valid, chunk: int,
    used: Sequence[str], say: Callable[[str], None] | None = None, novel: str = "", ensemble: bool = False,
) -> tuple[list[Path], list[np.ndarray]]:
    """Stream every map of one climate and reduce its statistics, a group of blocks at a time.

    Each group (a few chunks of one chunk row) is one compute: its maps are written and its
    statistics reduced before the next group starts, so memory is bounded by the group, not by
    the grid. Within a group, every chunk of every input is read once for all outputs.
    """
    record = stage / done_record_name(climate.key)
    reused = _reuse_climate(record, stage, len(stats))
    if reused is not None:
        if say is not None:
            say(f"      {climate.label}: reused {len(reused[0])} complete files (--resume)")
        return reused
    sources, targets, finals = [], [], []
    for i, m in enumerate(models):
        for name in layers:
            dtype, long_name, units = LAYER_META[name]
            final = stage / layer_path(m.species, climate.key, name)
            final.parent.mkdir(parents=True, exist_ok=True)
            tmp = final.with_name(f".stream-{final.name}")
            cats = layer_categories(name, factor_lists[i], ensemble=ensemble)
            tags = {"species": m.species, "scenario": climate.scenario, "climate_model": climate.model,
                    "period": climate.period, "layer": name, "novel_cells": novel,
                    "caution": "potential upper limit of abundance, not a forecast; needs expert review"}
            create_tiled(tmp, grid, dtype=dtype, description=long_name, units=units, chunk=chunk, categories=cats, tags=tags)
            sources.append(layers[name][i])
            targets.append(WindowTarget(tmp, dtype))
            finals.append((tmp, final, cats, long_name))
    vectors = [np.zeros(st.shape[-1]) for st in stats]
    counts = np.zeros(len(valid), dtype=np.int64)
    groups = list(_block_groups(sources[0].chunks[-2:], per_group=_group_size(comp)))
    for g, ((bi0, bi1, bj0, bj1), (rs, cs)) in enumerate(groups, start=1):
        srcs = [s[rs, cs] for s in sources]
        stored = da.store(srcs, targets, regions=[(rs, cs)] * len(srcs), lock=comp.lock, compute=False)
        parts = [st[bi0:bi1, bj0:bj1].sum(axis=(0, 1)) for st in stats]
        vparts = [v[bi0:bi1, bj0:bj1].sum() for v in valid]
        res = comp.compute(stored, *parts, *vparts)
        for k, v in enumerate(res[1 : 1 + len(parts)]):
            vectors[k] += np.asarray(v)
        counts += np.asarray(res[1 + len(parts):], dtype=np.int64)
        if say is not None and len(groups) >= 20 and g % max(1, len(groups) // 10) == 0:
            say(f"      {climate.label}: {100 * g // len(groups)}% of the grid")
    for f, n in zip(used, counts):
        if int(n) == 0:
            raise DataError(
                f"layer of '{f}' for {climate.label} ({climate.layers[f].describe()}) is all nodata inside the "
                "study area; check the file and the mask"
            )
    written = []
    for tmp, final, cats, long_name in finals:
        written += finalize_cog(tmp, final, categorical=cats is not None, categories=cats, description=long_name)
    _write_done_record(record, stage, written, vectors)
    return written, vectors


# --- resume records: one per climate, written once its files are final ------------------------

def done_record_name(key: tuple[str, str, str]) -> str:
    from .outputs.folder import DONE_PREFIX
    from .outputs.names import safe_part

    return DONE_PREFIX + "__".join(safe_part(k) for k in key) + ".json"


def _write_done_record(record: Path, stage: Path, written: list[Path], vectors: list[np.ndarray]) -> None:
    """List a climate's finished files (with sha256) and its summary vectors, for ``--resume``."""
    import json

    from .outputs.atomic import sha256_file

    doc = {"files": {str(p.relative_to(stage)): sha256_file(p) for p in written},
           "vectors": [np.asarray(v, dtype=np.float64).tolist() for v in vectors]}
    atomic_write_text(record, json.dumps(doc))


def _reuse_climate(record: Path, stage: Path, n_vectors: int) -> tuple[list[Path], list[np.ndarray]] | None:
    """The files and summary vectors of a climate completed by an interrupted run, or None when
    there is no record or any listed file is missing or differs from its checksum."""
    import json

    from .outputs.atomic import sha256_file

    if not record.is_file():
        return None
    try:
        doc = json.loads(record.read_text(encoding="utf-8"))
        files = [(stage / rel, sha) for rel, sha in doc["files"].items()]
        vectors = [np.asarray(v, dtype=np.float64) for v in doc["vectors"]]
    except (ValueError, KeyError, TypeError, AttributeError):
        return None
    if len(vectors) != n_vectors or not all(p.is_file() and sha256_file(p) == sha for p, sha in files):
        record.unlink(missing_ok=True)
        return None
    return [p for p, _ in files], vectors


def output_bytes(grid: GridSpec, n_species: int, climates_: Sequence[Climate], *, bootstrap: bool) -> int:
    """Upper bound of a projection's output size: every map uncompressed, twice (GeoTIFF + NetCDF)."""
    def per_cell(names) -> int:
        return sum(np.dtype(LAYER_META[n][0]).itemsize for n in names)

    futures = [c for c in climates_ if not c.is_present]
    ensembles = len({(c.scenario, c.period) for c in futures})
    present = per_cell(PRESENT_LAYERS + (PRESENT_BOUNDS if bootstrap else ()))
    future = per_cell(FUTURE_LAYERS + (FUTURE_BOUNDS if bootstrap else ()))
    return int(2 * grid.width * grid.height * n_species * (present + future * len(futures) + per_cell(ENSEMBLE_LAYERS) * ensembles))


def run_fingerprint(cfg: RunConfig, inputs: Sequence[Path], model_path: Path | None) -> str:
    """What an interrupted run must share with its resumption: config text, model file and the
    inputs (path, size, modification time)."""
    import hashlib
    import json

    from . import __version__

    def stat(p: Path):
        try:
            st = Path(p).stat()
            return [str(Path(p).resolve()), st.st_size, st.st_mtime_ns]
        except OSError:
            return [str(p), None, None]

    src = Path(cfg.source) if cfg.source else None
    doc = {"version": __version__, "config": src.read_text(encoding="utf-8") if src and src.is_file() else cfg.model_dump_json(),
           "model": stat(model_path) if model_path else None, "inputs": sorted(stat(p) for p in inputs)}
    return hashlib.sha256(json.dumps(doc, sort_keys=True).encode()).hexdigest()


def run_projection(
    cfg: RunConfig, models: ModelSet, stage: Path, *, workers: int | None = None, address: str | None = None,
    threads: int | None = None, progress: Callable[[str], None] | None = None,
) -> ProjectionRun:
    """Project every species onto every climate of ``cfg``, writing into ``stage``."""
    say = progress or (lambda s: None)
    opts: ProjectionOptions = projection_options(cfg)
    cl = climates(cfg)
    factors = cfg.factor_names
    ms = list(models)
    for m in ms:
        extra = [f for f in m.factor_names if f not in factors]
        if extra:
            raise DataError(f"the model of '{m.species}' uses factor(s) {', '.join(extra)} that the config does not list; "
                            "use the model file fitted with this config")
    used = [f for f in factors if any(f in m.factor_names for m in ms)]
    units = model_units(ms, used)
    tref = LayerRef(Path(opts.template)) if opts.template else cl[0].layers[used[0]]
    grid = template_grid(tref, factor=used[0])
    area = cell_areas(grid, chunk=opts.chunk)
    mask = _mask(opts, grid, cfg)
    layouts = [_layout(m) for m in ms]
    factor_lists = [m.factor_names for m in ms]
    timings: dict[str, float] = {}
    notes: list[str] = []
    written: list[Path] = []
    rows: list[dict] = []
    trans: list[dict] = []
    # open every climate's layers first, so that a bad layer is refused before any computing
    opened = [open_climate(c, grid, used, units, opts) for c in cl]
    from .outputs.folder import check_free_space

    check_free_space(stage, output_bytes(grid, len(ms), cl, bootstrap=has_replicates(ms)), what="the projection's maps")
    with compute_context(workers=workers, address=address, threads=threads) as comp:
        t0 = time.perf_counter()
        pres_ds = project(ms, opened[0], mask=mask, novel=opts.novel)
        pres_layers = {n: pres_ds[n].data for n in PRESENT_LAYERS}
        boot = has_replicates(ms)
        if boot:
            unc = uncertainty(ms, opened[0], None, opts=opts, novel=opts.novel)
            pres_layers.update({n: unc[n].data for n in PRESENT_BOUNDS})
        stats = climate_stats(pres_ds, pres_ds, _present_zone(pres_ds), area, layouts)
        valid = [valid_counts(opened[0][f].data) for f in used]
        w, vec = _write_climate(comp, stage, grid, cl[0], pres_layers, ms, factor_lists, stats, valid, opts.chunk, used, progress, novel_rule(ms, opts.novel))
        written += w
        r, _ = _stats_rows(ms, cl[0], vec, layouts)
        rows += r
        timings["present"] = time.perf_counter() - t0
        say(f"[1/{len(cl)}] present ({cl[0].period}): {len(w)} files in {timings['present']:.1f} s")
        back = xr.Dataset(
            {
                "ceiling": (("species", "y", "x"), da.stack([_read_back(stage / layer_path(m.species, cl[0].key, "ceiling"), grid, opts.chunk, code=False) for m in ms]).rechunk({0: -1})),
                "limiting": (("species", "y", "x"), da.stack([_read_back(stage / layer_path(m.species, cl[0].key, "limiting"), grid, opts.chunk, code=True) for m in ms]).rechunk({0: -1})),
            }
        )
        for j, (c, lay) in enumerate(zip(cl[1:], opened[1:]), start=2):
            t0 = time.perf_counter()
            fut = project(ms, lay, mask=mask, novel=opts.novel)
            cmp = compare(back, fut, n_factors=[len(m.factors) for m in ms], opts=opts)
            maps = {"ceiling": fut["ceiling"].data, "change": cmp["change"].data, "change_pct": cmp["change_pct"].data,
                    "limiting": fut["limiting"].data, "zone": cmp["zone"].data, "switch": cmp["switch"].data,
                    **{n: fut[n].data for n in ("novelty", "novel_factor", "extrapolated")}}
            stats = climate_stats(back, fut, cmp, area, layouts)
            valid = [valid_counts(lay[f].data) for f in used]
            layers_out = {n: maps[n] for n in FUTURE_LAYERS}
            if boot:
                unc = uncertainty(ms, opened[0], lay, opts=opts, novel=opts.novel)
                layers_out.update({n: unc[n].data for n in FUTURE_BOUNDS})
            w, vec = _write_climate(comp, stage, grid, c, layers_out, ms, factor_lists, stats, valid, opts.chunk, used, progress, novel_rule(ms, opts.novel))
            written += w
            r, t = _stats_rows(ms, c, vec, layouts)
            rows += r
            trans += t
            timings["/".join(c.key)] = time.perf_counter() - t0
            say(f"[{j}/{len(cl)}] {c.label}: {len(w)} files in {timings['/'.join(c.key)]:.1f} s")
        for sc, pe, members, missing in ensemble_groups(cl[1:], opts.ensemble_min_models, warn=notes.append):
            t0 = time.perf_counter()
            ens = Climate(sc, ENSEMBLE, pe, {})
            layers = _ensemble_layers(stage, grid, ms, back, members, opts)
            estats = [_ensemble_stats(layers["zone"][i], layers["robustness"][i], layers["agreement"][i], area) for i in range(len(ms))]
            w, vec = _write_climate(comp, stage, grid, ens, layers, ms, factor_lists, estats, [], opts.chunk, used, progress,
                                    novel_rule(ms, opts.novel), ensemble=True)
            written += w
            rows += _ensemble_rows(ms, ens, vec, members, missing)
            timings["/".join(ens.key)] = time.perf_counter() - t0
            say(f"ensemble {sc} / {pe} ({len(members)} models): {len(w)} files in {timings['/'.join(ens.key)]:.1f} s")
        t0 = time.perf_counter()
        written.append(_netcdf(stage, grid, ms, cl, area, opts, cfg))
        timings["netcdf"] = time.perf_counter() - t0
        say(f"wrote {NETCDF_FILE} in {timings['netcdf']:.1f} s")
        summary = pd.DataFrame(rows)
        transitions = pd.DataFrame(trans)
        written.append(atomic_write_text(stage / SUMMARY_FILE, summary.to_csv(index=False, float_format="%.6g")))
        written.append(atomic_write_text(stage / TRANSITIONS_FILE, transitions.to_csv(index=False, float_format="%.6g")))
        run = ProjectionRun(cl, grid, summary, transitions, written, timings, comp.describe(), notes)
    return run


def _present_zone(ds: xr.Dataset) -> xr.Dataset:
    from .kernels import ABSENT, STABLE

    c = ds["ceiling"].data
    z = da.where(da.isnan(c), NODATA_CODE, da.where(c > 0, STABLE, ABSENT)).astype(np.uint8)
    return xr.Dataset({"zone": (("species", "y", "x"), z)})


def _mask(opts: ProjectionOptions, grid: GridSpec, cfg: RunConfig) -> xr.DataArray | None:
    if not opts.mask:
        return None
    from .masks import open_mask

    base = Path(cfg.source).resolve().parent if cfg.source else Path.cwd()
    p = Path(opts.mask)
    return open_mask(p if p.is_absolute() else base / p, grid, chunk=opts.chunk)


def _netcdf(stage: Path, grid: GridSpec, ms: list[CeilingModel], cl: list[Climate], area: da.Array,
            opts: ProjectionOptions, cfg: RunConfig) -> Path:
    """Assemble the run's NetCDF from the maps just written (lazy, chunk by chunk)."""
    # Each species' GeoTIFF codes index that model's own factor list (m.factor_names, the
    # factors in its minimum). When factor screening leaves species with different lists, the
    # NetCDF's codes index the config's factor list instead, remapped here; with one shared
    # list the two are the same list and the codes pass through unchanged.
    factors = ms[0].factor_names
    luts: list[np.ndarray | None] = [None] * len(ms)
    switch_luts: list[np.ndarray | None] = [None] * len(ms)
    if any(m.factor_names != factors for m in ms):
        factors = [f for f in cfg.factor_names if any(f in m.factor_names for m in ms)]
        big = len(factors)
        for i, m in enumerate(ms):
            where = [factors.index(f) for f in m.factor_names]
            lut = np.full(256, NODATA_CODE, dtype=np.uint8)
            lut[: len(where)] = where
            sw = np.full(256, NODATA_CODE, dtype=np.uint8)
            k = len(where)
            for a, ga in enumerate(where):
                for b, gb in enumerate(where):
                    sw[a * k + b] = ga * big + gb
            luts[i], switch_luts[i] = lut, sw

    def _recode(arr: da.Array, name: str, i: int) -> da.Array:
        table = switch_luts[i] if name == "switch" else luts[i] if name in ("limiting", "novel_factor") else None
        if table is None:
            return arr
        return arr.map_blocks(lambda b, t=table: t[b], dtype=np.uint8)

    layers: dict[str, Any] = {}
    boot = has_replicates(ms)
    for name in PRESENT_LAYERS + (PRESENT_BOUNDS if boot else ()):
        dtype, long_name, units = LAYER_META[name]
        arrs = [_recode(_read_back(stage / layer_path(m.species, cl[0].key, name), grid, opts.chunk, code=dtype == "uint8"), name, i)
                for i, m in enumerate(ms)]
        layers[f"{name}_present"] = (da.stack(arrs), f"{long_name}, present", units, layer_categories(name, factors))
    futures = cl[1:]
    if futures:
        for name in FUTURE_LAYERS + (FUTURE_BOUNDS if boot else ()):
            dtype, long_name, units = LAYER_META[name]
            arrs = [da.stack([_recode(_read_back(stage / layer_path(m.species, c.key, name), grid, opts.chunk, code=dtype == "uint8"), name, i)
                              for c in futures]) for i, m in enumerate(ms)]
            layers[name] = (da.stack(arrs), long_name, units, layer_categories(name, factors))
    return write_netcdf(
        stage / NETCDF_FILE, grid=grid, species=[m.species for m in ms], futures=[c.key for c in futures],
        layers=layers, area=area, attrs={"title": f"ceilings of species abundance: {cfg.name}",
                                         "present_period": cl[0].period, "novel_cells": novel_rule(ms, opts.novel)},
    )


@dataclass
class RunResult:
    """A finished ``ceiling run`` / ``ceiling project``."""

    out: Path
    projection: ProjectionRun
    fit: Any = None
    seconds: float = 0.0

    def summary(self) -> str:
        head = f"projected {len(self.projection.climates)} climates on a {self.projection.grid.height} x {self.projection.grid.width} grid with {self.projection.compute} in {self.seconds:.1f} s"
        n_warn = len(self.fit.warnings if self.fit is not None else []) + len(self.projection.warnings)
        tail = f"\n\nwarnings: {n_warn} (listed in manifest.json)" if n_warn else ""
        return head + "\n" + self.projection.summary_text() + tail + f"\n\noutputs in {self.out}"


def _all_layer_paths(cl: list[Climate]) -> list[Path]:
    return [ref.path for c in cl for ref in c.layers.values()]


def project_to_folder(
    cfg: RunConfig, out: Path, *, model_path: Path | None = None, overwrite: bool = False,
    workers: int | None = None, address: str | None = None, threads: int | None = None,
    progress: Callable[[str], None] | None = None, resume: bool = False,
) -> RunResult:
    """Fit (unless ``model_path`` is given) and project, into a folder that appears complete.

    With ``resume``, the staging folder of an interrupted run on the same config and inputs is
    kept, and every climate whose completion record matches the files on disk is reused.
    """
    from .fitting import config_inputs, fit_config, write_fit
    from .model import load_models
    from .outputs.folder import check_output_folder, staged_folder
    from .outputs.manifest import write_manifest
    from .outputs.names import MANIFEST_FILE, MODEL_FILE

    t_start = time.perf_counter()
    cl = climates(cfg)
    projection_options(cfg)
    inputs = config_inputs(cfg) + _all_layer_paths(cl) + ([Path(model_path)] if model_path else [])
    # regions and community layers ([outputs.zones], [outputs.community]): a bad table or zones file is refused now
    from .community import build_community, community_options
    from .zones import load_zones_config, summarize_zones
    zones_in, community_opts = load_zones_config(cfg), community_options(cfg)
    inputs += [zones_in.source] if zones_in is not None else []
    check_output_folder(out, overwrite=overwrite, inputs=inputs)
    fit_run = None
    if model_path is not None:
        models = load_models(model_path)
    else:
        fit_run = fit_config(cfg)
        models = fit_run.models
        if progress:
            progress(f"fitted {len(models)} species: " + ", ".join(
                f"{m.species} ({sum(f.is_limiting for f in m.factors)}/{len(m.factors)} factors act as limits)" for m in models))
    with staged_folder(out, overwrite=overwrite, resume=resume, fingerprint=run_fingerprint(cfg, inputs, model_path)) as stage:
        if fit_run is not None:
            write_fit(fit_run, stage)
        else:
            models.save(stage / MODEL_FILE)
        run = run_projection(cfg, models, stage, workers=workers, address=address, threads=threads, progress=progress)
        if zones_in is not None:  # zones.csv, zones.gpkg (ceiling/zones.py)
            run.timings["zones"] = summarize_zones(stage, zones_in, update_manifest=False, progress=progress).seconds
        if community_opts is not None:  # community/, community.csv (ceiling/community.py)
            run.timings["community"] = build_community(
                stage, species=[m.species for m in models], climates=[c.key for c in run.climates],
                richness_threshold=community_opts.richness_threshold, chunk=projection_options(cfg).chunk,
                threads=threads, progress=progress).seconds
        # figures and report.html (ceiling/maps.py, ceiling/report/), before the manifest that lists them
        from .maps import make_figures
        from .report import build_report
        t_report = time.perf_counter()
        n_figures = len(make_figures(stage))
        build_report(stage, config=cfg.source, inputs=inputs)
        run.timings["figures_and_report"] = time.perf_counter() - t_report
        if progress:
            progress(f"wrote {n_figures} figures and report.html in {run.timings['figures_and_report']:.1f} s")
        seconds = time.perf_counter() - t_start
        outputs = [p for p in stage.rglob("*") if p.is_file()]
        warnings_list = (list(fit_run.warnings) if fit_run is not None else []) + list(run.warnings)  # fit + projection notes
        write_manifest(
            stage / MANIFEST_FILE, root=stage, config=cfg.source, inputs=inputs, outputs=outputs,
            extra={
                "model": {"path": MODEL_FILE, "sha256": _sha(stage / MODEL_FILE),
                          "fitted_in_this_run": fit_run is not None},
                "climates": [{"scenario": c.scenario, "model": c.model, "period": c.period} for c in cl],
                "compute": run.compute,
                "timing_s": {k: round(v, 3) for k, v in {**run.timings, "total": seconds}.items()},
                "warnings": {"count": len(warnings_list), "messages": warnings_list},
            },
        )
    return RunResult(Path(out), run, fit_run, seconds)


def _sha(p: Path) -> str:
    from .outputs.atomic import sha256_file

    return sha256_file(p)


def ensemble_groups(futures: Sequence[Climate], min_models: int, *, warn: Callable[[str], None]):
    """(scenario, period, member climates, missing model names) for each ensemble to build.

    The expected models are every climate model of the run; a scenario and period with fewer
    than ``min_models`` of them is skipped with a warning naming the missing ones.
    """
    expected = list(dict.fromkeys(c.model for c in futures))
    keys = list(dict.fromkeys((c.scenario, c.period) for c in futures))
    for sc, pe in keys:
        members = [c for c in futures if (c.scenario, c.period) == (sc, pe)]
        have = {c.model for c in members}
        missing = [m for m in expected if m not in have]
        if len(members) < min_models:
            if len(expected) >= min_models:
                warn(f"no ensemble for {sc} / {pe}: {len(members)} climate model(s), at least {min_models} needed"
                     + (f" (missing: {', '.join(missing)})" if missing else ""))
            continue
        if missing:
            warn(f"ensemble for {sc} / {pe} lacks climate model(s) {', '.join(missing)}; built from {len(members)}")
        yield sc, pe, members, missing


def _ensemble_layers(stage: Path, grid: GridSpec, ms: list[CeilingModel], back: xr.Dataset, members: list[Climate],
                     opts: ProjectionOptions) -> dict[str, da.Array]:
    from .ensemble import ensemble_kernel

    names = ENSEMBLE_LAYERS
    per_species = []
    for i, m in enumerate(ms):
        fut = da.stack([_read_back(stage / layer_path(m.species, c.key, "ceiling"), grid, opts.chunk, code=False) for c in members])
        lim = da.stack([_read_back(stage / layer_path(m.species, c.key, "limiting"), grid, opts.chunk, code=True) for c in members])
        k = len(m.factors)

        def block(p, f, lim_block, k=k):
            r = ensemble_kernel(p, f, lim_block, k, robust=opts.agreement_threshold, release=opts.release_threshold,
                                constraint=opts.constraint_threshold, floor=opts.absolute_floor, zero=opts.zero_level)
            return np.stack([r[n].astype(np.float32) for n in names])

        out = da.map_blocks(block, back["ceiling"].data[i], fut.rechunk({0: -1}), lim.rechunk({0: -1}),
                            chunks=((len(names),), *back["ceiling"].data[i].chunks), dtype=np.float32,
                            meta=np.empty((0, 0, 0), np.float32))
        per_species.append(out)
    layers = {}
    for j, n in enumerate(names):
        arr = da.stack([o[j] for o in per_species])
        layers[n] = arr.astype(np.uint8) if LAYER_META[n][0] == "uint8" else arr
    return layers


def _ensemble_stats(zone: da.Array, robust: da.Array, agreement: da.Array, area: da.Array) -> da.Array:
    def block(z, r, a, w):
        ok = z != NODATA_CODE
        v = np.zeros(10)
        v[:7] = np.bincount(z[ok], weights=w[ok], minlength=7)[:7]
        v[7] = w[ok & (r == 1)].sum()
        v[8] = w[ok].sum()
        v[9] = (np.nan_to_num(a[ok]) * w[ok]).sum()
        return v[None, None, :]

    return da.map_blocks(block, zone, robust, agreement, area, new_axis=2,
                         chunks=(tuple(1 for _ in area.chunks[0]), tuple(1 for _ in area.chunks[1]), (10,)), dtype=np.float64)


def _ensemble_rows(ms, ens: Climate, vectors, members, missing) -> list[dict]:
    rows = []
    for m, v in zip(ms, vectors):
        row: dict[str, Any] = {"species": m.species, "scenario": ens.scenario, "model": ENSEMBLE, "period": ens.period,
                               "area_km2": v[8] / 1e6, "n_models": len(members),
                               "models": " ".join(c.model for c in members), "missing_models": " ".join(missing)}
        for z in ENSEMBLE_ZONES:
            row[f"area_km2_{z.name}"] = v[z.code] / 1e6
        row["area_km2_robust"] = v[7] / 1e6
        row["mean_agreement"] = v[9] / v[8] if v[8] else np.nan
        rows.append(row)
    return rows
