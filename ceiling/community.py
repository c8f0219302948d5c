"""Community layers: the species of a run taken together, cell by cell, per climate.

From the per-species maps a run wrote (read back block by block with
:class:`ceiling.grids.BlockReader`, never a whole grid at once), for the present and every
future climate (scenario / climate model / period; ensembles are not combined here):

- ``total_ceiling``: the sum of the species' ceilings, the potential total abundance of the
  run's species (in the survey's abundance units, summed over species);
- ``total_change`` (futures): the change of that sum, future minus present;
- ``richness``: potential richness, the number of species whose ceiling exceeds the richness
  threshold (``[outputs.community] richness_threshold``, default 1.0, in abundance units);
- ``richness_change`` (futures): future minus present richness;
- ``n_release`` / ``n_constraint`` (futures): the number of species whose zone class is
  ``release`` / ``constraint`` (ceiling/categories.py ZONES).

A cell is valid when every species has a valid ceiling there (the present: now; a future: now and
later), so every layer of a climate covers the same cells and sums never mix different species
sets; elsewhere the layers are nodata. Files: ``community/present/{total_ceiling,richness}.tif``
and ``community/{scenario}/{model}/{period}/{total_ceiling,total_change,richness,
richness_change,n_release,n_constraint}.tif``: Cloud-Optimised GeoTIFFs on the run's grid,
float32 with nodata the lowest float32 for sums and changes, uint8 with nodata 255 for counts
(float32 when a run has more than 254 species). ``community.csv``, one row per climate:

==============================  =================================================================
``scenario, model, period``     the climate (``present`` with an empty model for the present)
``n_species``                   species combined
``richness_threshold``          the threshold of potential richness
``area_km2``                    area of the valid cells (ellipsoidal cell areas)
``mean_total_ceiling_now``      area-weighted mean of the present summed ceiling
``mean_total_ceiling_later``    the same for the future (empty for the present)
``mean_total_change``           area-weighted mean change of the summed ceiling
``mean_richness_now``           area-weighted mean present potential richness
``mean_richness_later``         the same for the future
``mean_richness_change``        area-weighted mean change of potential richness
``area_km2_richness_gain``      area where potential richness rises
``area_km2_richness_loss``      area where it falls
``area_km2_richness_same``      area where it stays
``mean_n_release``              area-weighted mean number of species in release
``mean_n_constraint``           area-weighted mean number of species in constraint
``area_km2_any_release``        area where at least one species is in release
``area_km2_any_constraint``     area where at least one species is in constraint
==============================  =================================================================

``ceiling run`` builds the community layers when the config has an ``[outputs.community]`` table
(it may be empty, or set ``richness_threshold``), for any number of species; without the table a
run writes what it wrote before. From Python, :func:`build_community` works on any run folder.
"""

from __future__ import annotations

import os
import shutil
import time
from collections.abc import Callable, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from pydantic import Field

from .categories import ZONE_CODE
from .errors import DataError
from .grids import BlockReader, GridSpec, inspect_layer
from .outputs.atomic import TMP_PREFIX, atomic_write_text
from .outputs.geotiff import CODE_NODATA, WindowTarget, create_tiled, finalize_cog
from .outputs.names import COMMUNITY_DIR, ENSEMBLE, climate_dir, layer_path, safe_part
from .scenarios import PRESENT, LayerRef, _Strict, _validate

__all__ = [
    "COMMUNITY_DIR", "COMMUNITY_FILE", "COMMUNITY_PRESENT_LAYERS", "COMMUNITY_FUTURE_LAYERS", "COMMUNITY_COLUMNS",
    "CommunityOptions", "CommunityRun", "community_options", "build_community", "community_path",
]

COMMUNITY_FILE = "community.csv"
COMMUNITY_PRESENT_LAYERS = ("total_ceiling", "richness")
COMMUNITY_FUTURE_LAYERS = ("total_ceiling", "total_change", "richness", "richness_change", "n_release", "n_constraint")
COMMUNITY_COLUMNS = [
    "scenario", "model", "period", "n_species", "richness_threshold", "area_km2",
    "mean_total_ceiling_now", "mean_total_ceiling_later", "mean_total_change",
    "mean_richness_now", "mean_richness_later", "mean_richness_change",
    "area_km2_richness_gain", "area_km2_richness_loss", "area_km2_richness_same",
    "mean_n_release", "mean_n_constraint", "area_km2_any_release", "area_km2_any_constraint",
]
_COUNTS = ("richness", "n_release", "n_constraint")


class CommunityOptions(_Strict):
    """``[outputs.community]`` in the config."""

    richness_threshold: float = Field(default=1.0, ge=0)


def community_options(cfg: Any) -> CommunityOptions | None:
    """The ``[outputs.community]`` table of a RunConfig, or None when the config has none."""
    outputs = cfg.outputs or {}
    if "community" not in outputs:
        return None
    return _validate(CommunityOptions, outputs["community"], "outputs.community", cfg.source)


def community_path(key: tuple[str, str, str], layer: str) -> Path:
    """``community/present/{layer}.tif`` or ``community/{scenario}/{model}/{period}/{layer}.tif``."""
    return climate_dir(COMMUNITY_DIR, *key) / f"{layer}.tif"


def _meta(layer: str, threshold: float, n_species: int) -> tuple[str, str, str]:
    count = "uint8" if n_species <= 254 else "float32"
    return {
        "total_ceiling": ("float32", "sum of the ceilings of the run's species (potential total abundance)", "1"),
        "total_change": ("float32", "change of the summed ceiling, future minus present", "1"),
        "richness": (count, f"potential richness: number of species whose ceiling exceeds {threshold:g}", "1"),
        "richness_change": ("float32", "change of potential richness, future minus present", "1"),
        "n_release": (count, "number of species whose ceiling is in release", "1"),
        "n_constraint": (count, "number of species whose ceiling is in constraint", "1"),
    }[layer]


@dataclass
class CommunityRun:
    """What :func:`build_community` wrote and measured."""

    table: pd.DataFrame
    species: list[str]
    written: list[Path] = field(default_factory=list)
    seconds: float = 0.0

    def summary(self) -> str:
        with pd.option_context("display.width", 200, "display.max_columns", 30):
            cols = ["scenario", "model", "period", "area_km2", "mean_total_ceiling_now", "mean_total_change",
                    "mean_richness_now", "mean_richness_change", "area_km2_richness_gain", "area_km2_richness_loss"]
            return (f"community of {len(self.species)} species ({', '.join(self.species)})\n"
                    + self.table[cols].to_string(index=False, float_format=lambda v: f"{v:,.2f}"))


# --- what the run folder holds ----------------------------------------------------------------------

def _tags(path: Path) -> dict[str, str]:
    import rasterio

    with rasterio.Env(GDAL_PAM_ENABLED="NO"), rasterio.open(path) as src:
        return dict(src.tags())


def _discover(run_dir: Path) -> tuple[list[str], list[tuple[str, str, str]]]:
    """Species (folders with a present ceiling) and climates (present first, no ensembles)."""
    dirs = sorted(d for d in run_dir.iterdir() if d.is_dir() and d.name != COMMUNITY_DIR
                  and not d.name.startswith(".") and (d / "present" / "ceiling.tif").is_file())
    if not dirs:
        raise DataError(f"{run_dir} holds no species maps ({{species}}/present/ceiling.tif); give a run folder")
    species, keys = [], []
    for d in dirs:
        species.append(_tags(d / "present" / "ceiling.tif").get("species") or d.name)
    first = dirs[0]
    keys.append((PRESENT, "", _tags(first / "present" / "ceiling.tif").get("period", "")))
    for p in sorted(first.glob("*/*/*/ceiling.tif")):
        sc, mo, pe = p.relative_to(first).parts[:3]
        if mo == ENSEMBLE:
            continue
        t = _tags(p)
        keys.append((t.get("scenario", sc), t.get("climate_model", mo), t.get("period", pe)))
    return species, keys


def _reader(path: Path, grid: GridSpec | None) -> tuple[BlockReader, GridSpec]:
    info = inspect_layer(LayerRef(path), factor=path.stem)
    if grid is not None and not info.grid.matches(grid):
        raise DataError(f"{path} is not on the grid of the other maps; the run folder is inconsistent: run it again")
    g = grid or info.grid
    return BlockReader(info, g, resampling="nearest"), g


def _need(run_dir: Path, species: str, key: tuple[str, str, str], layer: str) -> Path:
    p = run_dir / layer_path(species, key, layer)
    if not p.is_file():
        raise DataError(f"run folder {run_dir} lacks {p.relative_to(run_dir)}; the run is incomplete: run it again")
    return p


# --- per block ---------------------------------------------------------------------------------------

def _present_block(now: np.ndarray, thr: float) -> tuple[dict[str, np.ndarray], np.ndarray]:
    ok = np.isfinite(now).all(axis=0)
    total = np.where(ok, np.nansum(now, axis=0), np.nan)
    rich = np.where(ok, (np.nan_to_num(now, nan=-np.inf) > thr).sum(axis=0), np.nan)
    return {"total_ceiling": total, "richness": rich}, ok


def _future_block(now: np.ndarray, later: np.ndarray, zone: np.ndarray, thr: float) -> tuple[dict[str, np.ndarray], np.ndarray]:
    ok = np.isfinite(now).all(axis=0) & np.isfinite(later).all(axis=0)
    nan = np.nan
    t_now = np.nansum(now, axis=0)
    t_later = np.nansum(later, axis=0)
    r_now = (np.nan_to_num(now, nan=-np.inf) > thr).sum(axis=0)
    r_later = (np.nan_to_num(later, nan=-np.inf) > thr).sum(axis=0)
    out = {
        "total_ceiling": np.where(ok, t_later, nan),
        "total_change": np.where(ok, t_later - t_now, nan),
        "richness": np.where(ok, r_later, nan),
        "richness_change": np.where(ok, r_later - r_now, nan),
        "n_release": np.where(ok, (zone == ZONE_CODE["release"]).sum(axis=0), nan),
        "n_constraint": np.where(ok, (zone == ZONE_CODE["constraint"]).sum(axis=0), nan),
        "_total_now": np.where(ok, t_now, nan),
        "_richness_now": np.where(ok, r_now, nan),
    }
    return out, ok


def _block_windows(grid: GridSpec, chunk: int):
    for bi, r0 in enumerate(range(0, grid.height, chunk)):
        for bj, c0 in enumerate(range(0, grid.width, chunk)):
            yield bi, bj, slice(r0, min(r0 + chunk, grid.height)), slice(c0, min(c0 + chunk, grid.width))


def _sums(values: dict[str, np.ndarray], ok: np.ndarray, area: np.ndarray, future: bool) -> np.ndarray:
    """Per block: area, sum(area x v) for the means, and the richness / release areas."""
    w = np.where(ok, area, 0.0)
    v = np.zeros(12)
    v[0] = w.sum()
    if future:
        now_t, now_r = values["_total_now"], values["_richness_now"]
    else:
        now_t, now_r = values["total_ceiling"], values["richness"]
    v[1] = (w * np.nan_to_num(now_t)).sum()
    v[2] = (w * np.nan_to_num(now_r)).sum()
    if future:
        v[3] = (w * np.nan_to_num(values["total_ceiling"])).sum()
        v[4] = (w * np.nan_to_num(values["richness"])).sum()
        dr = np.nan_to_num(values["richness_change"])
        v[5] = w[dr > 0].sum()
        v[6] = w[dr < 0].sum()
        v[7] = w[ok & (dr == 0)].sum()
        nr, nc = np.nan_to_num(values["n_release"]), np.nan_to_num(values["n_constraint"])
        v[8] = (w * nr).sum()
        v[9] = (w * nc).sum()
        v[10] = w[nr > 0].sum()
        v[11] = w[nc > 0].sum()
    return v


def _row(key: tuple[str, str, str], v: np.ndarray, n_species: int, thr: float) -> dict[str, Any]:
    a = v[0]

    def mean(x: float) -> float:
        return x / a if a > 0 else np.nan

    row: dict[str, Any] = {c: np.nan for c in COMMUNITY_COLUMNS}
    row.update(scenario=key[0], model=key[1], period=key[2], n_species=n_species, richness_threshold=thr,
               area_km2=a / 1e6, mean_total_ceiling_now=mean(v[1]), mean_richness_now=mean(v[2]))
    if key[0] != PRESENT:
        row.update(mean_total_ceiling_later=mean(v[3]), mean_total_change=mean(v[3] - v[1]),
                   mean_richness_later=mean(v[4]), mean_richness_change=mean(v[4] - v[2]),
                   area_km2_richness_gain=v[5] / 1e6, area_km2_richness_loss=v[6] / 1e6,
                   area_km2_richness_same=v[7] / 1e6, mean_n_release=mean(v[8]), mean_n_constraint=mean(v[9]),
                   area_km2_any_release=v[10] / 1e6, area_km2_any_constraint=v[11] / 1e6)
    return row


# --- the whole folder ----------------------------------------------------------------------------------

def build_community(
    run_dir: str | Path, *, out_dir: str | Path | None = None, species: Sequence[str] | None = None,
    climates: Sequence[tuple[str, str, str]] | None = None, richness_threshold: float = 1.0, chunk: int = 512,
    threads: int | None = None, progress: Callable[[str], None] | None = None,
) -> CommunityRun:
    """Write the community layers and ``community.csv`` of the run folder ``run_dir``.

    ``species`` and ``climates`` (keys ``(scenario, model, period)``, the present first as
    ``("present", "", period)``) default to what the folder holds. The layers go to
    ``out_dir/community/`` (``out_dir`` defaults to ``run_dir``), built in a hidden staging folder
    that replaces ``community/`` when complete; ``community.csv`` is written atomically after it.
    """
    from .areas import cell_areas

    t0 = time.perf_counter()
    run_dir = Path(run_dir)
    out_dir = Path(out_dir) if out_dir is not None else run_dir
    if not run_dir.is_dir():
        raise DataError(f"run folder not found: {run_dir}; give the folder written by 'ceiling run' or 'ceiling project'")
    if species is None or climates is None:
        found_sp, found_cl = _discover(run_dir)
        species = list(species) if species is not None else found_sp
        climates = list(climates) if climates is not None else found_cl
    species, climates = list(species), [tuple(c) for c in climates]
    if not species:
        raise DataError(f"no species to combine in {run_dir}; give a run folder with species maps")
    if any(safe_part(s) == COMMUNITY_DIR for s in species):
        raise DataError(f"a species named '{COMMUNITY_DIR}' collides with the community folder; rename the species")
    if not climates or climates[0][0] != PRESENT:
        raise DataError("the climates must start with the present ('present', '', period)")
    thr = float(richness_threshold)
    if not (np.isfinite(thr) and thr >= 0):
        raise DataError(f"richness_threshold must be a number >= 0 (abundance units); got {richness_threshold}")
    pres_key = climates[0]
    # every input exists and lies on one grid before anything is written
    grid = None
    readers: dict[tuple[str, tuple[str, str, str], str], BlockReader] = {}
    for key in climates:
        layers = ("ceiling",) if key[0] == PRESENT else ("ceiling", "zone")
        for s in species:
            for name in layers:
                readers[(s, key, name)], grid = _reader(_need(run_dir, s, key, name), grid)
    assert grid is not None
    area = cell_areas(grid, chunk=chunk)
    windows = list(_block_windows(grid, chunk))
    n = len(species)
    workers = max(1, min(threads or os.cpu_count() or 1, 8))
    out_dir.mkdir(parents=True, exist_ok=True)
    stage = out_dir / f"{TMP_PREFIX}{os.getpid()}-{COMMUNITY_DIR}"
    if stage.exists():
        shutil.rmtree(stage)
    rows: list[dict[str, Any]] = []
    written: list[Path] = []
    try:
        for key in climates:
            future = key[0] != PRESENT
            names = COMMUNITY_FUTURE_LAYERS if future else COMMUNITY_PRESENT_LAYERS
            targets, finals = {}, []
            for name in names:
                dtype, long_name, units = _meta(name, thr, n)
                final = stage / community_path(key, name).relative_to(COMMUNITY_DIR)
                final.parent.mkdir(parents=True, exist_ok=True)
                tmp = final.with_name(f".stream-{final.name}")
                tags = {"layer": name, "scenario": key[0], "climate_model": key[1], "period": key[2],
                        "species": " ".join(species), "richness_threshold": f"{thr:g}",
                        "caution": "potential upper limit of abundance, not a forecast; needs expert review"}
                create_tiled(tmp, grid, dtype=dtype, description=long_name, units=units, chunk=chunk, tags=tags)
                targets[name] = WindowTarget(tmp, dtype)
                finals.append((tmp, final, dtype, long_name))

            def compute(win, key=key, future=future):
                bi, bj, rs, cs = win
                now = np.stack([readers[(s, pres_key, "ceiling")][rs, cs] for s in species]).astype(np.float64)
                if future:
                    later = np.stack([readers[(s, key, "ceiling")][rs, cs] for s in species]).astype(np.float64)
                    zone = np.stack([readers[(s, key, "zone")][rs, cs] for s in species])
                    values, ok = _future_block(now, later, zone, thr)
                else:
                    values, ok = _present_block(now, thr)
                a = np.asarray(area.blocks[bi, bj].compute(scheduler="sync"))
                return win, values, _sums(values, ok, a, future)

            totals = np.zeros(12)
            with ThreadPoolExecutor(max_workers=workers) as pool:
                for g0 in range(0, len(windows), 2 * workers):  # bounded: a group of blocks at a time
                    for (_, _, rs, cs), values, sums in pool.map(compute, windows[g0 : g0 + 2 * workers]):
                        for name in names:
                            v = values[name]
                            if targets[name].dtype == "uint8":  # counts: nodata is 255
                                v = np.where(np.isnan(v), CODE_NODATA, v)
                            targets[name][rs, cs] = v
                        totals += sums
            for tmp, final, dtype, long_name in finals:
                finalize_cog(tmp, final, categorical=dtype == "uint8", description=long_name)
                written.append(out_dir / final.relative_to(stage))
            rows.append(_row(key, totals, n, thr))
            if progress is not None:
                label = "present" if not future else " / ".join(key)
                progress(f"community {label}: {len(names)} files")
        target = out_dir / COMMUNITY_DIR
        if target.exists():
            old = out_dir / f"{TMP_PREFIX}old-{os.getpid()}-{COMMUNITY_DIR}"
            os.replace(target, old)
            os.replace(stage, target)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(stage, target)
    finally:
        if stage.exists():
            shutil.rmtree(stage, ignore_errors=True)
    table = pd.DataFrame(rows, columns=COMMUNITY_COLUMNS)
    written.append(atomic_write_text(out_dir / COMMUNITY_FILE, table.to_csv(index=False, float_format="%.6g")))
    run = CommunityRun(table, species, written, time.perf_counter() - t0)
    if progress is not None:
        progress(f"community: {n} species x {len(climates)} climates -> {COMMUNITY_DIR}/, {COMMUNITY_FILE} in {run.seconds:.1f} s")
    return run
