"""Zonal summaries: a run's maps summarised over polygons (reserves, management units, regions).

``ceiling summarize RUN_DIR --zones FILE [--id-field NAME]``, :func:`summarize_zones`, or an
``[outputs.zones]`` table in the config (``path``, ``id_field``, optional ``layer``; the path is
resolved against the config's folder) so that ``ceiling run`` does it too. The zones are read
from any vector file geopandas reads (GeoPackage, Shapefile, GeoJSON, ...), reprojected to the
run's grid CRS and summarised for every species and every climate of the run (the rows of
``summary.csv``: the present, each scenario / climate model / period, and each ensemble).

How cells are weighted
    exactextract computes, for each polygon, the grid cells it touches and the fraction of each
    cell it covers (the coverage fraction, 0 to 1, exact for partial cells). The weight of a cell
    in a zone is its coverage fraction times its area on the ellipsoid
    (:func:`ceiling.areas.cell_areas`): areas are km2 on the ellipsoid and means are
    area-weighted. The coverage fraction is the planar share of the cell in the grid's CRS (for
    a lon/lat grid, of the cell in degrees); polygon edges are straight lines in that CRS. Zones
    may overlap; each is summarised on its own. The coverage is computed once per zone and every
    map is then read block by block (only the blocks the zones touch), never as a whole grid.

Which cells count
    A present row uses the cells with a valid present ceiling; a future row the cells valid now
    and later (as ``summary.csv``); an ensemble row the cells where the ensemble zone map and the
    present ceiling are valid. Ensemble rows (model ``ensemble``) describe the ensemble median:
    the later ceiling is ``median_ceiling``, the change ``median_change``, the zone classes and
    the limiting factor those of the ensemble maps, and ``mean_agreement`` is the area-weighted
    mean of the ``agreement`` map.

``zones.csv`` (tidy: one row per zone x species x scenario x model x period, in the order of
``summary.csv`` with the zones in file order):

=========================  =====================================================================
``zone_id``                value of the id field (``--id-field`` / ``id_field``); without one,
                           the features are numbered 1..N in file order
``species``                species
``scenario``               ``present`` or the emission scenario
``model``                  climate model; empty for the present, ``ensemble`` for ensembles
``period``                 period
``zone_area_km2``          area of the zone on the grid (every covered cell, nodata included)
``area_km2``               area of the zone's valid cells (see "Which cells count")
``area_km2_{class}``       area of each zone class of ceiling change: ``stable``, ``release``,
                           ``constraint``, ``opens``, ``closes``, ``absent`` (futures and
                           ensembles), ``uncertain`` (ensembles only); empty for the present
``area_km2_novel``         area of novel climate (``extrapolated`` == 1, MESS < 0) of the row's
                           climate; empty for ensembles (no such map)
``mean_ceiling_now``       area-weighted mean of the present ceiling
``median_ceiling_now``     area-weighted median of the present ceiling (the smallest value at
                           which the cumulative weight reaches half the zone's weight)
``mean_ceiling_later``     area-weighted mean of the future ceiling (empty for the present)
``median_ceiling_later``   area-weighted median of the future ceiling (empty for the present)
``mean_change``            area-weighted mean of the change, future minus present
``limiting_now``           the factor limiting the largest share of the zone now (ties to the
                           first factor in the model's order)
``share_limiting_now``     that share (0 to 1) of the zone's valid area
``limiting_later``         the same for the future (empty for the present)
``share_limiting_later``   its share
``mean_agreement``         area-weighted mean of ``agreement`` (ensemble rows only)
=========================  =====================================================================

``zones.gpkg`` (a GeoPackage; geometries in the grid's CRS so they overlay the maps): the layer
``zones`` holds the zones with their own attributes, ``zone_id`` and ``zone_area_km2``; then one
layer per species and climate, named ``{species}_present`` and
``{species}_{scenario}_{model}_{period}`` (ensembles: model ``ensemble``), each holding the zones
with their attributes and the columns of ``zones.csv`` for that species and climate. Every layer
has the same columns, so a GIS user colours one (say ``mean_change``, or
``area_km2_release``) and applies the same style to the others.

Bad input is refused with one line naming the file or field and the fix, before anything is
written: a missing or unreadable file, a file without the id field (the message lists its
fields), duplicate or empty ids, non-polygon features, no CRS, zones outside the grid (the message
names them, or says none overlaps), attribute names that clash with output columns, or a
RUN_DIR that is not a run folder. Invalid polygons (self-intersections and the like) are repaired
with ``shapely.make_valid`` (keeping the polygonal parts) and a warning names them.
"""

from __future__ import annotations

import contextlib
import json
import logging
import time
import warnings
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .categories import ENSEMBLE_ZONES, ZONES
from .errors import CeilingWarning, DataError, InputFileError, OutputError
from .grids import BlockReader, GridSpec, inspect_layer
from .outputs.atomic import atomic_path, atomic_write_text
from .outputs.names import ENSEMBLE, MANIFEST_FILE, MODEL_FILE, SUMMARY_FILE, layer_path, safe_part
from .scenarios import PRESENT, LayerRef, _Strict, _validate

__all__ = [
    "ZONES_CSV", "ZONES_GPKG", "ZONE_COLUMNS", "ZonesOptions", "Zones", "ZoneSummary", "RepairedGeometryWarning",
    "zones_options", "load_zones", "load_zones_config", "summarize_zones",
]

ZONES_CSV = "zones.csv"
ZONES_GPKG = "zones.gpkg"
ZONES_LAYER = "zones"  # the first layer of zones.gpkg: the zones and their attributes
# a fixed GeoPackage timestamp (gpkg_contents.last_change), so the same inputs give the same bytes
GPKG_DATE = "2000-01-01T00:00:00.000Z"
_KEY = "_ceiling_zone_index"  # internal column passed through exactextract (never a user attribute)
_BLOCK = 512  # cells per side of a read window
log = logging.getLogger(__name__)

KEYS = ["zone_id", "species", "scenario", "model", "period"]
_CLASSES = [c.name for c in ENSEMBLE_ZONES]  # the six zone classes, then 'uncertain'
ZONE_COLUMNS = [
    *KEYS, "zone_area_km2", "area_km2", *[f"area_km2_{c}" for c in _CLASSES], "area_km2_novel",
    "mean_ceiling_now", "median_ceiling_now", "mean_ceiling_later", "median_ceiling_later", "mean_change",
    "limiting_now", "share_limiting_now", "limiting_later", "share_limiting_later", "mean_agreement",
]


class RepairedGeometryWarning(CeilingWarning):
    """Invalid zone polygons were repaired (shapely make_valid)."""


class ZonesOptions(_Strict):
    """``[outputs.zones]`` in the config."""

    path: str
    id_field: str | None = None
    layer: str | None = None


def zones_options(cfg: Any) -> ZonesOptions | None:
    """The ``[outputs.zones]`` table of a RunConfig, with its path resolved, or None."""
    outputs = cfg.outputs or {}
    if "zones" not in outputs:
        return None
    opts = _validate(ZonesOptions, outputs["zones"], "outputs.zones", cfg.source)
    p = Path(opts.path).expanduser()
    if not p.is_absolute():
        base = Path(cfg.source).resolve().parent if cfg.source else Path.cwd()
        p = base / p
    return opts.model_copy(update={"path": str(p)})


# --- reading and checking the zones -------------------------------------------------------------

@dataclass
class Zones:
    """Checked zones: a GeoDataFrame (file CRS) with one id per feature."""

    gdf: Any
    ids: list[Any]
    id_field: str | None
    source: Path
    warnings: list[str] = field(default_factory=list)

    @property
    def id_column(self) -> str:
        return self.id_field or "zone_id"

    def shown(self, idx) -> str:
        vals = [str(self.ids[i]) for i in idx]
        return ", ".join(vals[:10]) + (f" and {len(vals) - 10} more" if len(vals) > 10 else "")


def _attribute_columns(gdf) -> list[str]:
    return [c for c in gdf.columns if c != gdf.geometry.name]


def load_zones(path: str | Path, *, id_field: str | None = None, layer: str | None = None) -> Zones:
    """Read and check a zones file (any CRS); refuse what cannot be summarised."""
    import geopandas as gpd
    import pyogrio
    import shapely

    path = Path(path)
    if not path.exists():
        raise InputFileError(f"zones file not found: {path}; check the path (--zones or outputs.zones.path)")
    try:
        layers = [str(x[0]) for x in pyogrio.list_layers(path)]
    except Exception as exc:
        raise InputFileError(
            f"zones file {path} cannot be read as a vector file ({_first_line(exc)}); give a GeoPackage, Shapefile or GeoJSON"
        ) from None
    if layer is None and len(layers) > 1:
        raise DataError(f"zones file {path} has {len(layers)} layers ({', '.join(layers)}); name one with outputs.zones.layer")
    if layer is not None and layer not in layers:
        raise DataError(f"zones file {path} has no layer '{layer}'; it has {', '.join(layers)}: fix outputs.zones.layer")
    try:
        gdf = gpd.read_file(path, layer=layer, engine="pyogrio")
    except Exception as exc:
        raise InputFileError(
            f"zones file {path} cannot be read as a vector file ({_first_line(exc)}); give a GeoPackage, Shapefile or GeoJSON"
        ) from None
    if len(gdf) == 0:
        raise DataError(f"zones file {path} has no features; give a file with at least one polygon")
    if gdf.crs is None:
        raise DataError(f"zones file {path} has no CRS; assign one (e.g. save it again with its CRS) before use")
    attrs = _attribute_columns(gdf)
    if id_field is not None:
        if id_field not in attrs:
            raise DataError(
                f"zones file {path} has no field '{id_field}'; its fields are {', '.join(attrs) or 'none'}: fix the id field"
            )
        col = gdf[id_field]
        if col.isna().any():
            rows = [str(i + 1) for i in np.flatnonzero(col.isna().to_numpy())[:10]]
            raise DataError(f"zones file {path}: field '{id_field}' is empty for feature(s) {', '.join(rows)} (numbered from 1); give every zone an id")
        ids = [_plain(v) for v in col]
        dup = col[col.duplicated(keep=False)]
        if len(dup):
            shown = ", ".join(dict.fromkeys(str(v) for v in dup))
            raise DataError(f"zones file {path}: field '{id_field}' has duplicate value(s) {shown}; give each zone a distinct id or choose another id field")
    else:
        if any(c.lower() == "zone_id" for c in attrs):
            raise DataError(f"zones file {path} has a 'zone_id' field; pass it as the id field (--id-field zone_id) or rename it")
        ids = list(range(1, len(gdf) + 1))
    reserved = {c.lower() for c in ZONE_COLUMNS} - ({id_field.lower()} if id_field else set())
    clash = [c for c in attrs if c.lower() in reserved or c == _KEY]
    if clash:
        raise DataError(f"zones file {path}: field(s) {', '.join(clash)} clash with the output columns; rename them in the zones file")
    zones = Zones(gdf.reset_index(drop=True), ids, id_field, path)
    geom = zones.gdf.geometry
    missing = np.flatnonzero((geom.isna() | geom.is_empty).to_numpy())
    if missing.size:
        raise DataError(f"zones file {path}: feature(s) {zones.shown(missing)} have no geometry; remove them or draw their polygons")
    kinds = geom.geom_type.to_numpy()
    bad = np.flatnonzero(~np.isin(kinds, ["Polygon", "MultiPolygon"]))
    if bad.size:
        raise DataError(
            f"zones file {path}: feature(s) {zones.shown(bad)} are {', '.join(sorted(set(kinds[bad])))}, not polygons; zones must be polygons"
        )
    invalid = np.flatnonzero(~geom.is_valid.to_numpy())
    if invalid.size:
        fixed = []
        for i in invalid:
            parts = [p for p in shapely.get_parts(shapely.make_valid(geom.iloc[i])) if p.geom_type in ("Polygon", "MultiPolygon")]
            fixed.append(shapely.union_all(parts) if parts else None)
        empty = [i for i, g in zip(invalid, fixed) if g is None or g.is_empty]
        if empty:
            raise DataError(f"zones file {path}: feature(s) {zones.shown(empty)} have invalid polygons without area; redraw them")
        zones.gdf.loc[invalid, zones.gdf.geometry.name] = fixed
        msg = (f"zones file {path}: repaired the invalid polygon(s) of feature(s) {zones.shown(invalid)} "
               "(shapely make_valid, polygonal parts kept); check them in a GIS")
        zones.warnings.append(msg)
        warnings.warn(msg, RepairedGeometryWarning, stacklevel=2)
    return zones


def _plain(v: Any) -> Any:
    """A numpy scalar as a plain Python value (for tables and messages)."""
    return v.item() if isinstance(v, np.generic) else v


def _first_line(exc: BaseException) -> str:
    return (str(exc).strip().splitlines() or [type(exc).__name__])[0]


# --- the run folder -----------------------------------------------------------------------------

@dataclass(frozen=True)
class _Row:
    species: str
    scenario: str
    model: str
    period: str

    @property
    def key(self) -> tuple[str, str, str]:
        return (self.scenario, self.model, self.period)

    @property
    def kind(self) -> str:
        return "present" if self.scenario == PRESENT else ("ensemble" if self.model == ENSEMBLE else "future")


def _run_rows(run_dir: Path) -> tuple[list[_Row], dict[str, list[str]]]:
    from .model import load_models

    if not run_dir.is_dir():
        raise InputFileError(f"run folder not found: {run_dir}; give the folder written by 'ceiling run' or 'ceiling project'")
    missing = [n for n in (SUMMARY_FILE, MODEL_FILE) if not (run_dir / n).is_file()]
    if missing:
        raise DataError(
            f"{run_dir} is not a run folder (no {' or '.join(missing)}); give the folder written by 'ceiling run' or 'ceiling project'"
        )
    try:
        s = pd.read_csv(run_dir / SUMMARY_FILE, dtype=str, keep_default_na=False)
    except Exception as exc:
        raise DataError(f"{run_dir / SUMMARY_FILE} cannot be read ({_first_line(exc)}); run the projection again") from None
    if not {"species", "scenario", "model", "period"} <= set(s.columns) or s.empty:
        raise DataError(f"{run_dir / SUMMARY_FILE} lacks the species/scenario/model/period rows; run the projection again")
    models = load_models(run_dir / MODEL_FILE)
    factors = {m.species: list(m.factor_names) for m in models}
    rows = [_Row(r.species, r.scenario, r.model, r.period) for r in s.itertuples(index=False)]
    unknown = sorted({r.species for r in rows} - set(factors))
    if unknown:
        raise DataError(f"{run_dir / MODEL_FILE} has no model for species {', '.join(unknown)} of {SUMMARY_FILE}; the run folder is inconsistent: run it again")
    return rows, factors


def _present_of(rows: list[_Row], species: str) -> _Row:
    for r in rows:
        if r.species == species and r.kind == "present":
            return r
    raise DataError(f"summary.csv has no present row for species '{species}'; run the projection again")


def _map(run_dir: Path, row: _Row, layer: str) -> Path:
    p = run_dir / layer_path(row.species, row.key, layer)
    if not p.is_file():
        raise DataError(f"run folder {run_dir} lacks {p.relative_to(run_dir)}; the run is incomplete: run it again")
    return p


# --- coverage and block reads ---------------------------------------------------------------------

class _Cells:
    """Every (zone, cell) pair with its weight (coverage x ellipsoidal cell area), grouped by block."""

    def __init__(self, grid: GridSpec, feat: np.ndarray, cell: np.ndarray, cov: np.ndarray, block: int = _BLOCK):
        from .areas import cell_areas

        self.grid, self.block = grid, block
        rows, cols = np.divmod(cell, grid.width)
        nbc = -(-grid.width // block)
        bid = (rows // block) * nbc + cols // block
        order = np.argsort(bid, kind="stable")
        self.feat, self.rows, self.cols, bid = feat[order], rows[order], cols[order], bid[order]
        cov = cov[order]
        starts = np.flatnonzero(np.r_[True, bid[1:] != bid[:-1]]) if bid.size else np.array([], int)
        stops = np.r_[starts[1:], bid.size] if bid.size else np.array([], int)
        self.groups = [(int(bid[a]) // nbc, int(bid[a]) % nbc, int(a), int(b)) for a, b in zip(starts, stops)]
        areas = cell_areas(grid, chunk=block)
        self.area = np.empty(bid.size)
        for bi, bj, a, b in self.groups:
            ab = np.asarray(areas.blocks[bi, bj].compute(scheduler="sync"))
            self.area[a:b] = ab[self.rows[a:b] - bi * block, self.cols[a:b] - bj * block]
        self.weight = cov * self.area

    def read(self, path: Path) -> np.ndarray:
        """The layer's value at every pair (float64, NaN for nodata), read one window per block."""
        info = inspect_layer(LayerRef(path), factor=path.stem)
        if not info.grid.matches(self.grid):
            raise DataError(f"{path} is not on the grid of the run; the run folder is inconsistent: run it again")
        reader = BlockReader(info, self.grid, resampling="nearest")
        out = np.empty(self.feat.size)
        for _, _, a, b in self.groups:
            r, c = self.rows[a:b], self.cols[a:b]
            r0, r1, c0, c1 = int(r.min()), int(r.max()) + 1, int(c.min()), int(c.max()) + 1
            win = reader[slice(r0, r1), slice(c0, c1)]
            out[a:b] = win[r - r0, c - c0]
        return out


def _coverage(zones_gdf, grid_raster: Path, grid: GridSpec):
    """The cells each zone covers and by what fraction: exactextract, one call for all zones,
    checked zone by zone against the zone's planar area (see :func:`_checked`)."""
    import rasterio
    from exactextract import exact_extract

    src = zones_gdf[[zones_gdf.geometry.name]].copy()
    # exactextract replaces an attribute named 'id' by the frame's index when it is passed through
    # include_cols, so only an internal integer column goes through it
    src[_KEY] = np.arange(len(src), dtype=np.int64)
    with warnings.catch_warnings():
        # the zones were reprojected to the grid CRS just before; WKT spellings may still differ
        warnings.filterwarnings("ignore", message="Spatial reference system of input features", category=RuntimeWarning)
        with rasterio.open(grid_raster) as ds:
            # default_value: nodata cells are covered too (the zone's area includes them; which
            # cells count is decided per map afterwards)
            res = exact_extract(ds, src, ["cell_id(default_value=0)", "coverage(default_value=0)"], include_cols=[_KEY],
                                output="pandas", strategy="feature-sequential")
    feat, cell, cov = [], [], []
    for k, ids, fr in zip(res[_KEY], res["cell_id"], res["coverage"]):
        ids = np.asarray(ids, dtype=np.int64)
        feat.append(np.full(ids.size, int(k), dtype=np.int64))
        cell.append(ids)
        cov.append(np.asarray(fr, dtype=np.float64))
    if not feat:
        return np.array([], np.int64), np.array([], np.int64), np.array([])
    return _checked(zones_gdf, grid, np.concatenate(feat), np.concatenate(cell), np.concatenate(cov))


def _checked(zones_gdf, grid: GridSpec, feat, cell, cov):
    """Replace the coverage of any zone whose covered area disagrees with its planar area.

    The coverage fractions of a zone, times the cell's planar area, add up to the zone's planar
    area inside the grid (both in the grid's CRS). exactextract keeps them in single precision,
    about 1e-7 per cell, but polygon edges that run exactly through cell corners can make it
    drop a whole cell (seen with exactextract 0.3 on a diagonal through corners). A zone off by
    more than 1e-5 of its area gets its fractions from exact cell-by-cell intersections with
    shapely instead (slower, so only for such zones; row bands bound the memory).
    """
    import shapely

    t = grid.affine
    cell_area = abs(t.a * t.e)
    n = len(zones_gdf)
    geoms = np.asarray(zones_gdf.geometry.values)
    inside = shapely.area(shapely.intersection(geoms, shapely.box(*grid.bounds)))
    got = np.bincount(feat, weights=cov, minlength=n)[:n] * cell_area
    bad = np.flatnonzero(np.abs(got - inside) > 1e-5 * np.maximum(inside, cell_area))
    if bad.size == 0:
        return feat, cell, cov
    log.info("zones %s: coverage recomputed from exact intersections", ", ".join(map(str, bad)))
    keep = ~np.isin(feat, bad)
    parts = [(feat[keep], cell[keep], cov[keep])]
    for i in bad:
        parts.append(_exact_cells(geoms[i], grid, int(i)))
    return tuple(np.concatenate(x) for x in zip(*parts))


def _exact_cells(geom, grid: GridSpec, i: int, band: int = 256):
    """(zone index, cell ids, coverage fractions) of one polygon by shapely intersections."""
    import shapely

    t = grid.affine
    west, south, east, north = geom.bounds
    c0 = max(0, int(np.floor((west - t.c) / t.a)))
    c1 = min(grid.width, int(np.ceil((east - t.c) / t.a)))
    r0 = max(0, int(np.floor((north - t.f) / t.e)))
    r1 = min(grid.height, int(np.ceil((south - t.f) / t.e)))
    shapely.prepare(geom)
    cols = np.arange(c0, c1)
    feat, cells, fracs = [], [], []
    for b0 in range(r0, r1, band):
        rows = np.arange(b0, min(b0 + band, r1))
        rr, cc = np.meshgrid(rows, cols, indexing="ij")
        boxes = shapely.box(t.c + t.a * cc, t.f + t.e * (rr + 1), t.c + t.a * (cc + 1), t.f + t.e * rr)
        hit = shapely.intersects(geom, boxes)
        frac = np.zeros(boxes.shape)
        frac[hit] = shapely.area(shapely.intersection(boxes[hit], geom)) / abs(t.a * t.e)
        ok = frac > 0
        cells.append((rr[ok] * grid.width + cc[ok]).astype(np.int64))
        fracs.append(np.minimum(frac[ok], 1.0))
        feat.append(np.full(int(ok.sum()), i, dtype=np.int64))
    if not cells:
        return np.array([], np.int64), np.array([], np.int64), np.array([])
    return np.concatenate(feat), np.concatenate(cells), np.concatenate(fracs)


# --- weighted statistics over all zones at once ---------------------------------------------------

def _wsum(feat, w, n):
    return np.bincount(feat, weights=w, minlength=n)[:n]


def _wmean(feat, v, w, n):
    tot = _wsum(feat, w, n)
    s = _wsum(feat, w * np.nan_to_num(v), n)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(tot > 0, s / np.where(tot > 0, tot, 1.0), np.nan)


def _wmedian(feat, v, w, n):
    """Per zone: the smallest value at which the cumulative weight reaches half the total."""
    out = np.full(n, np.nan)
    keep = w > 0
    feat, v, w = feat[keep], v[keep], w[keep]
    if feat.size == 0:
        return out
    order = np.lexsort((v, feat))
    f, vv, ww = feat[order], v[order], w[order]
    tot = np.bincount(f, weights=ww, minlength=n)
    before = np.r_[0.0, np.cumsum(tot)[:-1]]
    within = np.cumsum(ww) - before[f]
    reached = np.flatnonzero(within >= 0.5 * tot[f] * (1 - 1e-12))
    first, idx = np.unique(f[reached], return_index=True)
    out[first] = vv[reached[idx]]
    return out


def _dominant(feat, code, w, n, names: list[str]):
    k = len(names)
    ok = (code >= 0) & (code < k)
    m = np.bincount(feat[ok] * k + code[ok], weights=w[ok], minlength=n * k)[: n * k].reshape(n, k)
    tot = m.sum(axis=1)
    arg = np.argmax(m, axis=1)  # ties go to the first factor in the model's order
    name = [names[a] if t > 0 else None for a, t in zip(arg, tot)]
    with np.errstate(invalid="ignore", divide="ignore"):
        share = np.where(tot > 0, m.max(axis=1) / np.where(tot > 0, tot, 1.0), np.nan)
    return name, share


def _codes(v: np.ndarray) -> np.ndarray:
    return np.where(np.isnan(v), 255, v).astype(np.int64)


def _row_stats(cells: _Cells, run_dir: Path, row: _Row, present: dict[str, np.ndarray], names: list[str], n: int) -> dict[str, Any]:
    f, w = cells.feat, cells.weight
    cols: dict[str, Any] = {c: np.full(n, np.nan) for c in ZONE_COLUMNS[len(KEYS):]}
    c_now = present["ceiling"]
    if row.kind == "present":
        ok = np.isfinite(c_now)
        novel = present["extrapolated"]
    else:
        if row.kind == "future":
            c_later = cells.read(_map(run_dir, row, "ceiling"))
            change = cells.read(_map(run_dir, row, "change"))
            novel = cells.read(_map(run_dir, row, "extrapolated"))
        else:
            c_later = cells.read(_map(run_dir, row, "median_ceiling"))
            change = cells.read(_map(run_dir, row, "median_change"))
            novel = None
            agreement = cells.read(_map(run_dir, row, "agreement"))
        zone = _codes(cells.read(_map(run_dir, row, "zone")))
        lim_later = _codes(cells.read(_map(run_dir, row, "limiting")))
        ok = np.isfinite(c_now) & (zone != 255)
        if row.kind == "future":
            ok &= np.isfinite(c_later)
        wz = np.where(ok, w, 0.0)
        classes = ENSEMBLE_ZONES if row.kind == "ensemble" else ZONES
        for c in classes:
            cols[f"area_km2_{c.name}"] = _wsum(f, wz * (zone == c.code), n) / 1e6
        cols["mean_ceiling_later"] = _wmean(f, c_later, wz, n)
        cols["median_ceiling_later"] = _wmedian(f[ok], c_later[ok], w[ok], n)
        cols["mean_change"] = _wmean(f, change, wz, n)
        cols["limiting_later"], cols["share_limiting_later"] = _dominant(f[ok], lim_later[ok], w[ok], n, names)
        if row.kind == "ensemble":
            cols["mean_agreement"] = _wmean(f, agreement, wz, n)
    wv = np.where(ok, w, 0.0)
    cols["zone_area_km2"] = _wsum(f, w, n) / 1e6
    cols["area_km2"] = _wsum(f, wv, n) / 1e6
    if novel is not None:
        cols["area_km2_novel"] = _wsum(f, wv * (novel == 1), n) / 1e6
    cols["mean_ceiling_now"] = _wmean(f, c_now, wv, n)
    cols["median_ceiling_now"] = _wmedian(f[ok], c_now[ok], w[ok], n)
    lim_now = _codes(present["limiting"])
    cols["limiting_now"], cols["share_limiting_now"] = _dominant(f[ok], lim_now[ok], w[ok], n, names)
    if row.kind == "present":
        cols["limiting_later"] = [None] * n
    return cols


# --- the result -------------------------------------------------------------------------------------

@dataclass
class ZoneSummary:
    """What :func:`summarize_zones` measured and wrote."""

    table: pd.DataFrame
    zones: Any  # GeoDataFrame in the grid CRS, with zone_id and zone_area_km2
    id_field: str | None
    source: Path
    written: list[Path] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    seconds: float = 0.0

    def headline(self) -> pd.DataFrame:
        """Ensemble rows if the run has ensembles, otherwise every future row."""
        t = self.table
        ens = t[t["model"] == ENSEMBLE]
        fut = ens if len(ens) else t[t["scenario"] != PRESENT]
        cols = ["zone_id", "species", "scenario", "model", "period", "area_km2", "area_km2_release",
                "area_km2_constraint", "area_km2_novel", "mean_ceiling_now", "mean_ceiling_later", "mean_change",
                "limiting_now", "limiting_later", "mean_agreement"]
        return fut[[c for c in cols if c in fut.columns and not fut[c].isna().all()]]

    def summary(self) -> str:
        n_z = len(self.zones)
        n_c = len(self.table) // max(n_z, 1)
        head = f"{n_z} zones x {n_c} species-climates from {self.source}"
        h = self.headline()
        if h.empty:
            return head + " (present only)"
        with pd.option_context("display.width", 200, "display.max_columns", 30, "display.max_rows", 500):
            return head + "\n" + h.to_string(index=False, float_format=lambda v: f"{v:,.2f}")


# --- writing ---------------------------------------------------------------------------------------

@contextlib.contextmanager
def gpkg_writing() -> Iterator[None]:
    """GDAL settings while writing a GeoPackage: a fixed timestamp (GDAL writes the current time
    otherwise), so the same inputs give the same bytes; and no SQLite sync after every layer
    (ten times faster; the finished file is synced once before it is renamed into place)."""
    import pyogrio

    options = {"OGR_CURRENT_DATE": GPKG_DATE, "OGR_SQLITE_SYNCHRONOUS": "OFF"}
    old = {k: pyogrio.get_gdal_config_option(k) for k in options}
    pyogrio.set_gdal_config_options(options)
    try:
        yield
    finally:
        pyogrio.set_gdal_config_options(old)


def _layer_name(row: _Row) -> str:
    parts = [row.species, PRESENT] if row.kind == "present" else [row.species, row.scenario, row.model, row.period]
    return "_".join(safe_part(p) for p in parts)


def _write_gpkg(path: Path, base, layers: list[tuple[str, str, pd.DataFrame]]) -> None:
    import geopandas as gpd
    import pyogrio

    with gpkg_writing():
        pyogrio.write_dataframe(base, path, layer=ZONES_LAYER, driver="GPKG", promote_to_multi=True,
                                layer_options={"DESCRIPTION": "zones (reprojected to the grid CRS)"})
        for name, description, frame in layers:
            gdf = gpd.GeoDataFrame(frame, geometry=base.geometry.values, crs=base.crs)
            pyogrio.write_dataframe(gdf, path, layer=name, driver="GPKG", promote_to_multi=True,
                                    layer_options={"DESCRIPTION": description})


def _update_manifest(run_dir: Path, written: list[Path], source: Path) -> None:
    """Keep an existing manifest true: list the new outputs and the zones file among the inputs."""
    from .outputs.manifest import file_entry

    man_path = run_dir / MANIFEST_FILE
    if not man_path.is_file():
        return
    try:
        man = json.loads(man_path.read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError):
        return
    names = {str(p.relative_to(run_dir)) for p in written}
    outs = [e for e in man.get("outputs", []) if e.get("path") not in names]
    outs += [file_entry(p, run_dir) for p in written]
    man["outputs"] = sorted(outs, key=lambda e: e["path"])
    src = Path(source).resolve()
    man["inputs"] = [e for e in man.get("inputs", []) if Path(e.get("path", "")).resolve() != src] + [file_entry(src)]
    atomic_write_text(man_path, json.dumps(man, indent=2, default=str) + "\n")


def summarize_zones(
    run_dir: str | Path, zones_path: str | Path | Zones, *, id_field: str | None = None, layer: str | None = None,
    overwrite: bool = True, update_manifest: bool = True, progress: Callable[[str], None] | None = None,
) -> ZoneSummary:
    """Summarise every map of a run folder over the zones; write ``zones.csv`` and ``zones.gpkg``.

    ``zones_path`` is a vector file (or zones already read with :func:`load_zones`). Everything is
    checked and computed before anything is written; both files then appear atomically. With
    ``overwrite=False`` existing zone outputs are refused. An existing manifest is updated.
    """
    t0 = time.perf_counter()
    run_dir = Path(run_dir)
    rows, factors = _run_rows(run_dir)
    zones = zones_path if isinstance(zones_path, Zones) else load_zones(zones_path, id_field=id_field, layer=layer)
    first = _present_of(rows, rows[0].species)
    grid_raster = _map(run_dir, first, "ceiling")
    grid = inspect_layer(LayerRef(grid_raster), factor="ceiling").grid
    try:
        gdf = zones.gdf.to_crs(grid.crs_wkt)
    except Exception as exc:
        raise DataError(f"zones file {zones.source}: cannot be reprojected to the grid CRS ({_first_line(exc)}); check its CRS") from None
    feat, cell, cov = _coverage(gdf, grid_raster, grid)
    n = len(gdf)
    covered = np.bincount(feat, weights=cov, minlength=n)[:n] if feat.size else np.zeros(n)
    outside = np.flatnonzero(covered <= 0)
    if outside.size:
        b = ", ".join(f"{v:.6g}" for v in grid.bounds)
        zb = ", ".join(f"{v:.6g}" for v in gdf.total_bounds)
        if outside.size == n:
            raise DataError(
                f"none of the {n} zones in {zones.source} overlaps the grid of the run (grid bounds {b}; zones bounds {zb}, "
                "in the grid CRS); check the zones file's CRS and extent"
            )
        raise DataError(
            f"zone(s) {zones.shown(outside)} in {zones.source} do not overlap the grid of the run (grid bounds {b}); "
            "remove them from the zones file or clip it to the grid"
        )
    if not overwrite:
        for name in (ZONES_CSV, ZONES_GPKG):
            if (run_dir / name).exists():
                raise OutputError(f"{run_dir / name} exists; pass --overwrite to replace it")
    cells = _Cells(grid, feat, cell, cov)
    frames: list[pd.DataFrame] = []
    layers: list[tuple[str, str, pd.DataFrame]] = []
    attrs = _attribute_columns(zones.gdf)
    user = pd.DataFrame({c: zones.gdf[c].to_numpy() for c in attrs})
    present_cache: dict[str, dict[str, np.ndarray]] = {}
    seen_names: set[str] = {ZONES_LAYER}
    for row in rows:
        if row.species not in present_cache:
            p = _present_of(rows, row.species)
            present_cache[row.species] = {name: cells.read(_map(run_dir, p, name)) for name in ("ceiling", "limiting", "extrapolated")}
        stats = _row_stats(cells, run_dir, row, present_cache[row.species], factors[row.species], n)
        frame = pd.DataFrame({"zone_id": zones.ids, "species": row.species, "scenario": row.scenario,
                              "model": row.model, "period": row.period, **stats})[ZONE_COLUMNS]
        frames.append(frame)
        name = _layer_name(row)
        while name in seen_names:
            name += "_"
        seen_names.add(name)
        desc = f"ceiling summaries per zone: {row.species}, " + (
            f"present ({row.period})" if row.kind == "present" else f"{row.scenario} / {row.model} / {row.period}")
        # the user's attributes, then the columns of zones.csv (zone_id once, if it is the id field)
        wide = pd.concat([user, frame.drop(columns=["zone_id"] if "zone_id" in attrs else [])], axis=1)
        layers.append((name, desc, wide))
    table = pd.concat(frames, ignore_index=True)
    base = gdf.copy()
    if "zone_id" not in attrs:
        base["zone_id"] = zones.ids
    base["zone_area_km2"] = frames[0]["zone_area_km2"].to_numpy()
    written = [run_dir / ZONES_GPKG, run_dir / ZONES_CSV]
    with atomic_path(written[0]) as tmp_gpkg, atomic_path(written[1]) as tmp_csv:
        _write_gpkg(tmp_gpkg, base, layers)
        tmp_csv.write_text(table.to_csv(index=False, float_format="%.8g"), encoding="utf-8", newline="\n")
    if update_manifest:
        _update_manifest(run_dir, written, zones.source)
    out = ZoneSummary(table, base, zones.id_field, zones.source, written, list(zones.warnings), time.perf_counter() - t0)
    if progress is not None:
        progress(f"zones: {n} zones x {len(rows)} species-climates -> {ZONES_CSV}, {ZONES_GPKG} in {out.seconds:.1f} s")
    return out


def load_zones_config(cfg: Any) -> Zones | None:
    """The zones of a config's ``[outputs.zones]`` table, read and checked, or None without one."""
    opts = zones_options(cfg)
    if opts is None:
        return None
    return load_zones(opts.path, id_field=opts.id_field, layer=opts.layer)
