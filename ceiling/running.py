"""The projection stage as a whole: models + climates -> maps, NetCDF, tables, manifest.

:func:`project_to_folder` checks everything it can before computing, then, inside a staging
folder that replaces the output folder only when complete:

1. lays out the run's CF NetCDF, then projects the present once (one task per chunk: every layer
   read once, every species in one fused pass, see :mod:`ceiling.tasks`) and writes its maps;
   the futures read the present back instead of recomputing it;
2. for every future, the same, compared with the present, with the summary statistics reduced in
   the same pass and each climate's NetCDF chunks stored as its maps are written
   (:func:`ceiling.climate_writer.write_climate`);
3. builds the multi-model ensembles from the maps written, then the summary and transition
   tables, figures, report and the manifest (checksums of every input and output).
"""

from __future__ import annotations

import contextlib
import logging
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import rasterio
import xarray as xr

from .areas import window_areas
from .categories import ENSEMBLE_ZONES, ZONES
from .climate_writer import (
    LAYER_META,
    done_record_name,
    map_specs,
    netcdf_variables,
    readback_reader,
    write_climate,
)
from .cluster import check_compute, compute_context
from .config import RunConfig
from .derive.stage import derive_for_run, derive_inputs
from .errors import DataError
from .grids import GridSpec, template_grid
from .kernels import NODATA_CODE
from .kernels_climate import ChunkParams
from .model import CeilingModel, ModelSet
from .outputs.atomic import atomic_write_text
from .outputs.choice import Needs, OutputChoice, computed_in_order, output_choice, similarity_needed
from .outputs.names import (
    ENSEMBLE,
    ENSEMBLE_LAYERS,
    FUTURE_BOUNDS,
    FUTURE_LAYERS,
    NETCDF_FILE,
    PRESENT_BOUNDS,
    PRESENT_LAYERS,
    SUMMARY_FILE,
    TRANSITIONS_FILE,
    layer_path,
    path_parts,
)
from .outputs.netcdf import NetcdfWriter, create_netcdf
from .outputs.stream import StreamReader
from .projection import (
    StatsLayout,
    climate_readers,
    has_replicates,
    model_units,
    novel_rule,
    with_policy,
)
from .scenarios import (
    PRESENT,
    Climate,
    LayerRef,
    ProjectionOptions,
    climates,
    option_path,
    projection_options,
)
from .tasks import ClimatePlan, EnsemblePlan

__all__ = ["ProjectionRun", "RunResult", "run_projection", "project_to_folder", "run_inputs", "LAYER_META",
           "done_record_name"]

log = logging.getLogger(__name__)


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


def output_bytes(grid: GridSpec, n_species: int, climates_: Sequence[Climate], *, bootstrap: bool,
                 maps: frozenset[str] | None = None, netcdf: bool = True) -> int:
    """Upper bound of a projection's output size: every map (of ``maps``, None: all) uncompressed,
    twice with the NetCDF (GeoTIFF + NetCDF)."""
    def per_cell(names) -> int:
        return sum(np.dtype(LAYER_META[n][0]).itemsize for n in names if maps is None or n in maps)

    futures = [c for c in climates_ if not c.is_present]
    ensembles = len({(c.scenario, c.period) for c in futures})
    present = per_cell(PRESENT_LAYERS + (PRESENT_BOUNDS if bootstrap else ()))
    future = per_cell(FUTURE_LAYERS + (FUTURE_BOUNDS if bootstrap else ()))
    return int((2 if netcdf else 1) * grid.width * grid.height * n_species * (present + future * len(futures) + per_cell(ENSEMBLE_LAYERS) * ensembles))


def run_fingerprint(cfg: RunConfig, inputs: Sequence[Path], model_path: Path | None) -> str:
    """What an interrupted run must share with its resumption: the config's text and its
    validated form (which holds command-line overrides such as --bootstrap), the model file and
    every input that shapes the result (path, size, modification time; :func:`run_inputs`)."""
    import hashlib
    import json

    from . import __version__

    def stat(p: Path):
        try:
            st = Path(p).stat()
            return [str(Path(p).resolve()), st.st_size, st.st_mtime_ns]
        except (OSError, RuntimeError):
            return [str(p), None, None]

    src = Path(cfg.source) if cfg.source else None
    doc = {"version": __version__, "config": src.read_text(encoding="utf-8") if src and src.is_file() else "",
           "settings": cfg.model_dump_json(), "model": stat(model_path) if model_path else None,
           "inputs": sorted(stat(p) for p in inputs)}
    return hashlib.sha256(json.dumps(doc, sort_keys=True).encode()).hexdigest()


def run_inputs(cfg: RunConfig, cl: Sequence[Climate], model_path: Path | None, zones: Path | None) -> list[Path]:
    """Every file that shapes a projection's result, once each: the survey and factor layers,
    every climate's layers, the template, the mask, the zones and the model file. They are
    listed in the manifest, fingerprinted for --resume and protected from --overwrite."""
    from .companions import config_inputs, with_companions

    opts = projection_options(cfg)
    files = config_inputs(cfg) + _all_layer_paths(list(cl)) + derive_inputs(cfg, list(cl))
    files += with_companions([p for p in (option_path(cfg, opts.template), option_path(cfg, opts.mask)) if p])
    files += [Path(model_path)] if model_path else []
    files += with_companions([Path(zones)]) if zones else []
    return list(dict.fromkeys(Path(p) for p in files))


def run_projection(
    cfg: RunConfig, models: ModelSet, stage: Path, *, workers: int | None = None, address: str | None = None,
    threads: int | None = None, progress: Callable[[str], None] | None = None,
) -> ProjectionRun:
    """Project every species onto every climate of ``cfg``, writing into ``stage``."""
    say = progress or (lambda s: None)
    opts: ProjectionOptions = projection_options(cfg)
    # climates declared as raw series get their factor layers here, chunk by chunk (ceiling.derive)
    cl = derive_for_run(cfg, climates(cfg), stage, progress=progress)
    factors = cfg.factor_names
    ms = list(models)
    for m in ms:
        extra = [f for f in m.factor_names if f not in factors]
        if extra:
            raise DataError(f"the model of '{m.species}' uses factor(s) {', '.join(extra)} that the config does not list; "
                            "use the model file fitted with this config")
    used = [f for f in factors if any(f in m.factor_names for m in ms)]
    units = model_units(ms, used)
    path_parts("species", [m.species for m in ms], where="the model's species")
    tref = LayerRef(option_path(cfg, opts.template)) if opts.template else cl[0].layers[used[0]]
    grid = template_grid(tref, factor=used[0])
    mask = _mask(opts, grid, cfg)
    layouts = [_layout(m) for m in ms]
    factor_lists = [m.factor_names for m in ms]
    species = [m.species for m in ms]
    timings: dict[str, float] = {}
    work: dict[str, float] = {}  # seconds spent writing chunks and making COGs (all climates)
    notes: list[str] = []
    written: list[Path] = []
    rows: list[dict] = []
    trans: list[dict] = []
    # open every climate's layers first, so that a bad layer is refused before any computing
    opened = [climate_readers(c, grid, used, units, opts) for c in cl]
    from .mess import check_reference
    from .outputs.folder import check_free_space

    for m in ms:
        check_reference(m.reference or {}, m.factor_names, species=m.species)
    boot = has_replicates(ms)
    # what is written ([outputs]), and what is computed for it: the maps asked for and those other outputs read
    choice = output_choice(cfg)
    groups = list(ensemble_groups(cl[1:], opts.ensemble_min_models, warn=notes.append))
    tables = cfg.outputs or {}
    computed = choice.computed(Needs(futures=len(cl) > 1, ensembles=bool(groups), zones="zones" in tables,
                                     community="community" in tables))
    present_names = computed_in_order(PRESENT_LAYERS + (PRESENT_BOUNDS if boot else ()), computed)
    future_names = computed_in_order(FUTURE_LAYERS + (FUTURE_BOUNDS if boot else ()), computed)
    check_free_space(stage, output_bytes(grid, len(ms), cl, bootstrap=boot, maps=computed, netcdf=choice.netcdf),
                     what="the projection's maps")
    policy = tuple(with_policy(ms, opts.novel))
    similarity = similarity_needed(computed)  # else only the sign of the similarity: the extrapolated flag
    params = tuple(ChunkParams(opts.release_threshold, opts.constraint_threshold, opts.absolute_floor, opts.zero_level,
                               opts.novel, lay.hist_bins, lay.hist_max, lay.n_zones, similarity) for lay in layouts)
    rule = novel_rule(ms, opts.novel)
    nc, nc_spec = _netcdf(stage, grid, ms, cl, opts, cfg, boot, choice)
    # the present's ceiling and limiting factor stay uncompressed until the run ends: every
    # future reads them back by copying, not decoding (removed here in any case)
    kept: dict[tuple[int, str], Path | None] = (
        {(i, n): None for i in range(len(ms)) for n in ("ceiling", "limiting")} if len(cl) > 1 else {})
    # per run, not process-wide: GDAL's block cache for the reads and writes of this process
    with rasterio.Env(GDAL_CACHEMAX=opts.gdal_cache_mb), contextlib.ExitStack() as cleanup, \
            compute_context(workers=workers, address=address, threads=threads) as comp:
        cleanup.callback(lambda: [Path(p).unlink(missing_ok=True) for p in kept.values() if p is not None])
        try:
            t0 = time.perf_counter()
            if nc is not None:
                nc.write_areas(lambda r, c: window_areas(grid, r, c))
            readers = tuple((f, opened[0][f]) for f in used)
            plan = ClimatePlan(grid, readers, policy, params,
                               map_specs(len(ms), present_names, grid, opts.chunk, netcdf=nc_spec(None)),
                               mask=None if mask is None else mask.data, bootstrap=opts if boot else None,
                               nc_chunk=nc.chunk_shape if nc is not None else (0, 0))
            w, vec = write_climate(comp, stage, grid, cl[0], plan, species=species, factor_lists=factor_lists,
                                   chunk=opts.chunk, used=used, n_stats=len(ms), nc=nc, novel=rule, say=progress,
                                   timings=work, deflate_level=opts.deflate_level, keep=kept or None)
            written += w
            r, _ = _stats_rows(ms, cl[0], vec, layouts)
            rows += r
            timings["present"] = time.perf_counter() - t0
            say(f"[1/{len(cl)}] present ({cl[0].period}): {len(w)} files in {timings['present']:.1f} s")
            back = tuple(tuple(StreamReader(kept[(i, n)], LAYER_META[n][0]) if kept.get((i, n)) is not None
                               else readback_reader(stage / layer_path(sp, cl[0].key, n), grid)  # resumed run
                               for n in ("ceiling", "limiting")) for i, sp in enumerate(species))
            for j, (c, lay) in enumerate(zip(cl[1:], opened[1:]), start=2):
                t0 = time.perf_counter()
                plan = ClimatePlan(grid, tuple((f, lay[f]) for f in used), policy, params,
                                   map_specs(len(ms), future_names, grid, opts.chunk, netcdf=nc_spec(j - 2)),
                                   present=back, mask=None if mask is None else mask.data,
                                   bootstrap=opts if boot else None, boot_readers=readers if boot else None,
                                   nc_chunk=nc.chunk_shape if nc is not None else (0, 0))
                w, vec = write_climate(comp, stage, grid, c, plan, species=species, factor_lists=factor_lists,
                                       chunk=opts.chunk, used=used, n_stats=len(ms), nc=nc, novel=rule, say=progress,
                                       timings=work, deflate_level=opts.deflate_level)
                written += w
                r, t = _stats_rows(ms, c, vec, layouts)
                rows += r
                trans += t
                timings["/".join(c.key)] = time.perf_counter() - t0
                say(f"[{j}/{len(cl)}] {c.label}: {len(w)} files in {timings['/'.join(c.key)]:.1f} s")
            if nc is not None:
                written.append(nc.close())  # its chunks went in climate by climate
        except BaseException:
            if nc is not None:
                nc.discard()
            raise
        for sc, pe, members, missing in groups:
            t0 = time.perf_counter()
            ens = Climate(sc, ENSEMBLE, pe, {})
            plan = _ensemble_plan(stage, grid, ms, back, members, opts, computed_in_order(ENSEMBLE_LAYERS, computed))
            w, vec = write_climate(comp, stage, grid, ens, plan, species=species, factor_lists=factor_lists,
                                   chunk=opts.chunk, n_stats=len(ms), novel=rule, ensemble=True, say=progress,
                                   timings=work, deflate_level=opts.deflate_level)
            written += w
            rows += _ensemble_rows(ms, ens, vec, members, missing)
            timings["/".join(ens.key)] = time.perf_counter() - t0
            say(f"ensemble {sc} / {pe} ({len(members)} models): {len(w)} files in {timings['/'.join(ens.key)]:.1f} s")
        timings.update({f"{k}_here": v for k, v in work.items()})
        summary = pd.DataFrame(rows)
        transitions = pd.DataFrame(trans)
        written.append(atomic_write_text(stage / SUMMARY_FILE, summary.to_csv(index=False, float_format="%.6g")))
        written.append(atomic_write_text(stage / TRANSITIONS_FILE, transitions.to_csv(index=False, float_format="%.6g")))
        run = ProjectionRun(cl, grid, summary, transitions, written, timings, comp.describe(), notes)
    return run


def _mask(opts: ProjectionOptions, grid: GridSpec, cfg: RunConfig) -> xr.DataArray | None:
    if not opts.mask:
        return None
    from .masks import open_mask

    return open_mask(option_path(cfg, opts.mask), grid, chunk=opts.chunk)


def _netcdf(stage: Path, grid: GridSpec, ms: list[CeilingModel], cl: list[Climate], opts: ProjectionOptions,
            cfg: RunConfig, boot: bool, choice: OutputChoice) -> tuple[NetcdfWriter | None, Callable[[int | None], Callable]]:
    """Lay out the run's NetCDF (the maps asked for; None when it is not asked for or would hold
    no map); return its writer and, per climate (None: the present; j: the j-th future), the
    function that names each map's variable, index and code recoding (None: not in the NetCDF)."""
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
    present = [n for n in PRESENT_LAYERS + (PRESENT_BOUNDS if boot else ()) if choice.in_netcdf(n)]
    future = [n for n in FUTURE_LAYERS + (FUTURE_BOUNDS if boot else ()) if choice.in_netcdf(n)] if len(cl) > 1 else []
    if not present and not future:
        return None, lambda j: (lambda i, layer: None)
    variables = netcdf_variables(present, future, factors)
    writer = create_netcdf(
        stage / NETCDF_FILE, grid=grid, species=[m.species for m in ms], futures=[c.key for c in cl[1:]],
        variables=variables, chunk=opts.chunk,
        attrs={"title": f"ceilings of species abundance: {cfg.name}", "present_period": cl[0].period,
               "novel_cells": novel_rule(ms, opts.novel)},
    )

    def spec(j: int | None) -> Callable:
        def one(i: int, layer: str):
            if not choice.in_netcdf(layer):
                return None
            lut = switch_luts[i] if layer == "switch" else luts[i] if layer in ("limiting", "least_similar") else None
            if j is None:
                return f"{layer}_present", (i,), lut
            return layer, (i, j), lut
        return one

    return writer, spec


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
    from .outputs.atomic import Prefetch
    from .outputs.folder import check_output_folder

    t_start = time.perf_counter()
    check_compute(workers=workers, address=address, threads=threads)
    cl = climates(cfg)
    projection_options(cfg)
    # regions and community layers ([outputs.zones], [outputs.community]): a bad table or zones file is refused now
    from .community import community_options
    from .zones import load_zones_config
    zones_in, community_opts = load_zones_config(cfg), community_options(cfg)
    inputs = run_inputs(cfg, cl, model_path, zones_in.source if zones_in is not None else None)
    given = Path(out)  # the folder as the user named it (the report's header), before links are followed
    out = check_output_folder(out, overwrite=overwrite, inputs=inputs + ([Path(cfg.source)] if cfg.source else []))
    # the inputs' checksums for the manifest, read beside the projection rather than after it
    checksums = Prefetch(dict.fromkeys(inputs))
    try:
        return _project_to_folder(cfg, out, cl, inputs, checksums, model_path=model_path, overwrite=overwrite,
                                  workers=workers, address=address, threads=threads, progress=progress, resume=resume,
                                  zones_in=zones_in, community_opts=community_opts, t_start=t_start, given=given)
    finally:
        checksums.close(finish=False)


def _project_to_folder(cfg: RunConfig, out: Path, cl: list[Climate], inputs: list[Path], checksums: Any, *,
                       model_path: Path | None, overwrite: bool, workers: int | None, address: str | None,
                       threads: int | None, progress: Callable[[str], None] | None, resume: bool, zones_in: Any,
                       community_opts: Any, t_start: float, given: Path) -> RunResult:
    from .community import build_community
    from .model import load_models
    from .outputs.atomic import Prefetch
    from .outputs.folder import staged_folder
    from .outputs.manifest import write_manifest
    from .outputs.names import MANIFEST_FILE, MODEL_FILE
    from .zones import summarize_zones

    fit_run = None
    if model_path is not None:
        models = load_models(model_path)
        path_parts("species", models.species, where=str(model_path))
    else:
        from .fitting import fit_config

        fit_run = fit_config(cfg)
        models = fit_run.models
        if progress:
            progress(f"fitted {len(models)} species: " + ", ".join(
                f"{m.species} ({sum(f.is_limiting for f in m.factors)}/{len(m.factors)} factors act as limits)" for m in models))
    with staged_folder(out, overwrite=overwrite, resume=resume, fingerprint=run_fingerprint(cfg, inputs, model_path)) as stage, \
            contextlib.ExitStack() as cleanup:
        if fit_run is not None:
            from .fitting import write_fit

            write_fit(fit_run, stage)
        else:
            models.save(stage / MODEL_FILE)
        run = run_projection(cfg, models, stage, workers=workers, address=address, threads=threads, progress=progress)
        choice = output_choice(cfg)
        unasked = set(choice.unasked(run.written))  # maps computed for other outputs only, removed below
        run.written = [p for p in run.written if p not in unasked]
        # the NetCDF's and the tables' checksums, read beside the regions, community layers and figures
        sums = Prefetch(run.written)
        cleanup.callback(sums.close, finish=False)
        if zones_in is not None:  # zones.csv, zones.gpkg (ceiling/zones.py)
            run.timings["zones"] = summarize_zones(stage, zones_in, update_manifest=False, progress=progress).seconds
        if community_opts is not None:  # community/, community.csv (ceiling/community.py)
            run.timings["community"] = build_community(
                stage, species=[m.species for m in models], climates=[c.key for c in run.climates],
                richness_threshold=community_opts.richness_threshold, chunk=projection_options(cfg).chunk,
                threads=threads, progress=progress).seconds
        from .outputs.stac import write_catalogue
        from .report import REPORT_FILE
        t_report = time.perf_counter()
        n_figures = 0
        if choice.report:  # the figures (ceiling/maps.py) draw every map: before the maps not asked for go
            from .maps import make_figures
            n_figures = len(make_figures(stage, workers=threads))  # --threads caps the figure processes too
        _remove(unasked)
        # the STAC catalogue of the folder (collection.json, stac/), before the report and the manifest that list it
        write_catalogue(stage, title=cfg.name, species_factors={m.species: m.factor_names for m in models},
                        to_come=((REPORT_FILE,) if choice.report else ()) + (MANIFEST_FILE,))
        if choice.report:  # report.html (ceiling/report/), before the manifest that lists it
            from .report import build_report
            build_report(stage, config=cfg.source, inputs=inputs, folder=given)  # named as given, not the staging folder
            run.timings["figures_and_report"] = time.perf_counter() - t_report
            if progress:
                progress(f"wrote {n_figures} figures and report.html in {run.timings['figures_and_report']:.1f} s")
        checksums.close()
        sums.close()
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


def _remove(files: set[Path]) -> None:
    """Remove map files computed only for other outputs, and the folders they leave empty."""
    for p in files:
        p.unlink(missing_ok=True)
    for d in sorted({p.parent for p in files}, key=lambda d: len(d.parts), reverse=True):
        with contextlib.suppress(OSError):  # not empty (other maps remain): kept
            while True:
                d.rmdir()
                d = d.parent


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


def _ensemble_plan(stage: Path, grid: GridSpec, ms: list[CeilingModel], back, members: list[Climate],
                   opts: ProjectionOptions, names: Sequence[str]) -> EnsemblePlan:
    readers = tuple(tuple((readback_reader(stage / layer_path(m.species, c.key, "ceiling"), grid),
                           readback_reader(stage / layer_path(m.species, c.key, "limiting"), grid)) for c in members)
                    for m in ms)
    return EnsemblePlan(grid, tuple(b[0] for b in back), readers, tuple(len(m.factors) for m in ms), opts,
                        map_specs(len(ms), names, grid, opts.chunk))


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
