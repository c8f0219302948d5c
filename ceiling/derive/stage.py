"""The derive stage: factor layers on the template grid from a fine monthly baseline and model series.

:func:`derive_to_folder` (``ceiling derive CONFIG --out DIR``) writes the present (the factors of
the baseline itself) and every future declared as raw series, in the layout a ``[[futures]]``
pattern reads (``present/{factor}.tif``, ``{scenario}/{climate_model}/{period}/{factor}.tif``), with
a manifest; :func:`derive_for_run` does the same for the series futures of a ``ceiling run``,
into the run's staging folder, and returns the climates with their layers filled in.

Memory stays bounded by the chunk: the coarse changes are small and computed once; then, chunk by
chunk of the template grid, the baseline's twelve months are read once, every climate's monthly
fields are made from them (change interpolated and applied), every factor computed and its
window written, so no full fine grid of all months is ever held.
"""

from __future__ import annotations

import contextlib
import os
import time
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
import rasterio
from rasterio.windows import Window

from ..config import RunConfig
from ..grids import BlockReader, GridSpec, layer_reader, template_grid
from ..outputs.atomic import tmp_name
from ..outputs.names import DERIVED_DIR, safe_part
from ..outputs.geotiff import FLOAT_NODATA
from ..scenarios import PRESENT, Climate, LayerRef, climates
from .baseline import Baseline, baseline_refs, open_baseline
from .changes import CoarseChange, coarse_changes, series_inputs
from .delta import DeltaOptions, apply_change
from .indices import INDICES, MonthlyFields, compute_index
from .manifest import write_derive_manifest
from .regrid import Interpolator, chunk_lonlat
from .series import template_region
from .settings import DeriveSection, base_folder, derive_section, historical_years

__all__ = ["DERIVED_FOLDER", "DerivePlan", "DeriveResult", "plan_derive", "write_layers", "derived_layer_path",
           "derive_to_folder", "derive_for_run", "derive_inputs", "method_record"]

DERIVED_FOLDER = DERIVED_DIR  # inside a run's output folder


def derived_layer_path(folder: Path, climate: Climate, factor: str) -> Path:
    """Where a derived factor layer goes: the layout a ``[[futures]]`` pattern reads."""
    if climate.is_present:
        return Path(folder) / PRESENT / f"{safe_part(factor)}.tif"
    parts = (safe_part(climate.scenario), safe_part(climate.model), safe_part(climate.period))
    return Path(folder).joinpath(*parts) / f"{safe_part(factor)}.tif"


@dataclass(frozen=True)
class DerivePlan:
    """Everything checked and opened before the chunks: grid, baseline readers, coarse changes."""

    section: DeriveSection
    grid: GridSpec
    baseline: Baseline
    climates: tuple[Climate, ...]
    changes: tuple[CoarseChange, ...]
    historical: tuple[int, int]
    present: dict[str, BlockReader] | None = None  # anchoring: the present layers on the grid


@dataclass
class DeriveResult:
    """What a derive wrote."""

    folder: Path
    climates: list[Climate]
    written: list[Path]
    grid: GridSpec
    seconds: float = 0.0
    record: dict = field(default_factory=dict)

    def summary(self) -> str:
        n_f = len({p.name for p in self.written})
        return (f"derived {n_f} factor(s) for {len(self.climates)} climate(s) on a {self.grid.height} x {self.grid.width} "
                f"grid in {self.seconds:.1f} s: {len(self.written)} layers in {self.folder}")


def _template(cfg: RunConfig, sec: DeriveSection, base: Path) -> GridSpec:
    text = sec.template or (cfg.projection or {}).get("template")
    if text:
        p = Path(str(text)).expanduser()
        return template_grid(LayerRef(p if p.is_absolute() else base / p), factor="template")
    var = next(iter(sec.baseline))
    return template_grid(baseline_refs(sec.layer(var), base)[0], factor=f"baseline {var} month 01")


def plan_derive(cfg: RunConfig, todo: list[Climate], *, say: Callable[[str], None] = lambda s: None) -> DerivePlan:
    """Check the section, open the baseline, read the series and compute their coarse changes."""
    sec = derive_section(cfg)
    base = base_folder(cfg)
    hist = historical_years(cfg, sec)
    grid = _template(cfg, sec, base)
    baseline = open_baseline({v: sec.layer(v) for v in sec.baseline}, grid, base)
    opts = DeltaOptions(sec.precip_cap, sec.precip_floor)
    changes = coarse_changes(todo, baseline.variables, template_region(grid), hist, opts, say=say)
    present = None
    if sec.anchor:
        layers = climates(cfg)[0].layers
        present = {f: layer_reader(layers[f], grid, factor=f, units=INDICES[d.index].units)
                   for f, d in sec.factors.items()}
    return DerivePlan(sec, grid, baseline, tuple(todo), tuple(changes), hist, present)


def _windows(grid: GridSpec, chunk: int):
    for r0 in range(0, grid.height, chunk):
        for c0 in range(0, grid.width, chunk):
            yield slice(r0, min(r0 + chunk, grid.height)), slice(c0, min(c0 + chunk, grid.width))


def _open_target(path: Path, grid: GridSpec, factor: str, definition: dict, tags: dict[str, str]):
    spec = INDICES[definition["index"]]
    path.parent.mkdir(parents=True, exist_ok=True)
    tile = 256 if min(grid.width, grid.height) >= 256 else 16 * max(1, min(grid.width, grid.height) // 16)
    profile = dict(driver="GTiff", width=grid.width, height=grid.height, count=1, dtype="float32", crs=grid.crs,
                   transform=grid.affine, nodata=FLOAT_NODATA, tiled=True, blockxsize=tile, blockysize=tile,
                   compress="deflate", predictor=3, zlevel=1, BIGTIFF="IF_SAFER")
    dst = rasterio.open(tmp_name(path), "w", **profile)
    dst.set_band_description(1, f"{factor}: {spec.label}")
    dst.set_band_unit(1, spec.units)
    params = {k: v for k, v in definition.items() if k != "index"}
    dst.update_tags(1, units=spec.units, long_name=spec.label)
    dst.update_tags(factor=factor, index=definition["index"], parameters=str(params), computed_by=spec.computed_by, **tags)
    return dst


def _fields(values: dict[str, np.ndarray], lat: np.ndarray) -> MonthlyFields:
    return MonthlyFields(values.get("tasmax"), values.get("tasmin"), values.get("pr"), values.get("tas"), lat)


def _anchored(spec_change: str, present: np.ndarray, value: np.ndarray, base: np.ndarray) -> np.ndarray:
    """A present layer with a factor's change from its baseline value applied (added, or multiplied)."""
    if spec_change == "additive":
        return present + (value - base)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(base > 0, present * (value / base), present)


def _chunk(plan: DerivePlan, rows: slice, cols: slice, definitions: dict[str, dict]):
    """Every climate's factors in one window: {(climate index, factor): (h, w) float32}."""
    values = plan.baseline.read(rows, cols)
    valid = np.all([np.isfinite(v).all(axis=0) for v in values.values()], axis=0)
    anchors = None
    if plan.present is not None:
        anchors = {f: np.asarray(r[rows, cols], dtype="float64") for f, r in plan.present.items()}
        valid &= np.all([np.isfinite(a) for a in anchors.values()], axis=0)
    shape = valid.shape
    out = {}
    if not valid.any():
        return {(i, f): np.full(shape, np.nan, np.float32) for i in range(len(plan.climates)) for f in definitions}
    lon, lat = chunk_lonlat(plan.grid, rows, cols)
    qlon, qlat = lon[valid], lat[valid]
    everywhere = bool(valid.all())
    base = {v: (a.reshape(12, -1) if everywhere else a[:, valid]) for v, a in values.items()}
    by_climate = {ch.climate.key: ch for ch in plan.changes}
    centre = template_region(plan.grid).centre
    interps: dict[int, Interpolator] = {}
    at_base = None
    if anchors is not None:
        mf = _fields(base, qlat)
        at_base = {f: compute_index(d, mf) for f, d in definitions.items()}
    for i, c in enumerate(plan.climates):
        if c.is_present:
            fields = base
        else:
            ch = by_climate[c.key]
            key = id(ch.lon)
            if key not in interps:
                interps[key] = Interpolator.build(ch.lon, ch.lat, qlon, qlat, method=plan.section.interpolation, centre=centre)
            fields = {v: apply_change(v, base[v], interps[key](ch.change[v])) for v in base}
        mf = _fields(fields, qlat)
        for f, d in definitions.items():
            grid_values = np.full(shape, np.nan, np.float32)
            if anchors is None:
                grid_values[valid] = compute_index(d, mf)
            elif c.is_present:
                grid_values[valid] = anchors[f][valid]
            else:
                grid_values[valid] = _anchored(INDICES[d["index"]].change, anchors[f][valid], compute_index(d, mf), at_base[f])
            out[(i, f)] = grid_values
    return out


def write_layers(plan: DerivePlan, folder: Path, *, say: Callable[[str], None] = lambda s: None) -> DeriveResult:
    """Derive every climate of ``plan`` into ``folder``, chunk by chunk (files renamed into place at the end)."""
    t0 = time.perf_counter()
    definitions = {f: d.model_dump() for f, d in plan.section.factors.items()}
    paths = {(i, f): derived_layer_path(folder, c, f) for i, c in enumerate(plan.climates) for f in definitions}
    windows = list(_windows(plan.grid, plan.section.chunk))
    with rasterio.Env(GDAL_CACHEMAX=64, GDAL_PAM_ENABLED="NO"), contextlib.ExitStack() as stack:
        targets = {}
        for (i, f), p in paths.items():
            c = plan.climates[i]
            tags = {"scenario": c.scenario, "climate_model": c.model, "period": c.period}
            targets[(i, f)] = stack.enter_context(_open_target(p, plan.grid, f, definitions[f], tags))
        for k, (rows, cols) in enumerate(windows, start=1):
            window = Window(cols.start, rows.start, cols.stop - cols.start, rows.stop - rows.start)
            for key, arr in _chunk(plan, rows, cols, definitions).items():
                targets[key].write(np.where(np.isnan(arr), np.float32(FLOAT_NODATA), arr), 1, window=window)
            if k % 16 == 0 or k == len(windows):
                say(f"derived chunk {k}/{len(windows)} ({len(plan.climates)} climates x {len(definitions)} factors)")
    for p in paths.values():
        os.replace(tmp_name(p), p)
    done = []
    for i, c in enumerate(plan.climates):
        layers = {f: LayerRef(paths[(i, f)], None, INDICES[d["index"]].units) for f, d in definitions.items()}
        done.append(replace(c, layers=layers, series=None) if not c.is_present else replace(c, layers=layers))
    return DeriveResult(Path(folder), done, list(paths.values()), plan.grid, time.perf_counter() - t0, method_record(plan))


def method_record(plan: DerivePlan) -> dict:
    """The method, its settings and the climatologies used, for the manifest."""
    sec = plan.section
    return {
        "method": "change factors (delta): per calendar month, additive for temperatures, multiplicative for "
                  "precipitation; Anandhi et al. 2011, Water Resources Research 47, W03501",
        "historical_period": f"{plan.historical[0]}-{plan.historical[1]}",
        "interpolation": sec.interpolation,
        "precip_cap": sec.precip_cap,
        "precip_floor_mm_per_month": sec.precip_floor,
        "chunk": sec.chunk,
        "anchor": sec.anchor,
        "baseline": {v: [str(r.path) for r in refs] for v, refs in plan.baseline.refs.items()},
        "factors": {f: {**d.model_dump(), "label": INDICES[d.index].label, "units": INDICES[d.index].units,
                        "computed_by": INDICES[d.index].computed_by} for f, d in sec.factors.items()},
        "climates": [{"scenario": ch.climate.scenario, "climate_model": ch.climate.model, "period": ch.climate.period,
                      **ch.record} for ch in plan.changes],
    }


def derive_for_run(cfg: RunConfig, cl: list[Climate], stage: Path, *,
                   progress: Callable[[str], None] | None = None) -> list[Climate]:
    """The run hook: derive the series climates of ``cl`` into ``stage/derived``; others pass through."""
    todo = [c for c in cl if c.series is not None]
    if not todo:
        return cl
    say = progress or (lambda s: None)
    plan = plan_derive(cfg, todo, say=say)
    res = write_layers(plan, Path(stage) / DERIVED_FOLDER, say=say)
    write_derive_manifest(res, plan, root=Path(stage) / DERIVED_FOLDER, config=cfg.source)
    say(f"derived {len(todo)} climate(s) from series in {res.seconds:.1f} s")
    done = {c.key: c for c in res.climates}
    return [done.get(c.key, c) for c in cl]


def derive_inputs(cfg: RunConfig, cl: list[Climate] | None = None, *, with_baseline: bool = False) -> list[Path]:
    """The files a derive reads: the baseline's layers and the series (none when no climate has series,
    unless ``with_baseline``: the present is derived too)."""
    cl = climates(cfg) if cl is None else cl
    todo = [c for c in cl if c.series is not None]
    if not todo and not with_baseline:
        return []
    sec = derive_section(cfg)
    base = base_folder(cfg)
    files = [r.path for v in sec.baseline for r in baseline_refs(sec.layer(v), base)]
    return files + series_inputs(todo, list(sec.baseline))


def derive_to_folder(cfg: RunConfig, out: str | Path, *, overwrite: bool = False,
                     progress: Callable[[str], None] | None = None) -> DeriveResult:
    """``ceiling derive``: the present and every series future of ``cfg`` into ``out`` (appears complete or not at all)."""
    from ..outputs.folder import check_output_folder, staged_folder

    say = progress or (lambda s: None)
    cl = climates(cfg)
    todo = [cl[0]] + [c for c in cl[1:] if c.series is not None]
    inputs = derive_inputs(cfg, cl, with_baseline=True)
    check_output_folder(Path(out), overwrite=overwrite, inputs=inputs)
    plan = plan_derive(cfg, todo, say=say)
    with staged_folder(out, overwrite=overwrite) as stage:
        res = write_layers(plan, stage, say=say)
        write_derive_manifest(res, plan, root=stage, config=cfg.source)
    written = [Path(out) / p.relative_to(stage) for p in res.written]
    done = [replace(c, layers={f: replace(r, path=Path(out) / r.path.relative_to(stage)) for f, r in c.layers.items()})
            for c in res.climates]
    return replace(res, folder=Path(out), written=written, climates=done)
