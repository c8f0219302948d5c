"""A STAC catalogue of a run folder, so a GIS or a notebook can browse it without our layout.

Written with pystac in every run folder (SpatioTemporal Asset Catalog 1.1, stacspec.org):

- ``collection.json``: a Collection for the run, with its spatial and temporal extent and the
  run-wide files as assets (the NetCDF, the CSV tables, the model file, the report, the
  manifest);
- ``stac/{item}/{item}.json``: one Item per species and climate (the present, each scenario /
  climate model / period, each ensemble), with ``ceiling:species``, ``ceiling:scenario``,
  ``ceiling:climate_model`` and ``ceiling:period`` as properties, the period (``2041-2070``)
  as the time range (``start_datetime`` 2041-01-01, ``end_datetime`` 2070-12-31 23:59:59 UTC),
  the grid in the projection extension (v1.1.0: EPSG code or WKT2, shape, transform, bbox) and
  each map as an asset: Cloud-Optimised GeoTIFF media type, role ``data``, and in the raster
  extension (v1.1.0) its data type, nodata and unit; categorical maps list their classes in
  the classification extension (v2.0.0: value, name, title, colour, and the nodata class).

Every href is relative, so the folder can be moved or published as it is. The catalogue holds
no timestamps (runs stay comparable byte for byte). A period that is not a year or a year range
has no time range, which a STAC Item needs: such climates are left out, and the collection's
description names them.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np
import pystac
import rasterio
from rasterio.warp import transform_bounds

from ..categories import Category, layer_categories
from .geotiff import CODE_NODATA, FLOAT_NODATA
from .names import (
    ENSEMBLE,
    MANIFEST_FILE,
    MODEL_FILE,
    NETCDF_FILE,
    STAC_ROOT_FILE,
    stac_item_path,
)

__all__ = ["write_catalogue", "period_range", "class_name", "EXTENSIONS", "COG_TYPE", "MEDIA_TYPES"]

COG_TYPE = "image/tiff; application=geotiff; profile=cloud-optimized"
EXTENSIONS = {
    "projection": "https://stac-extensions.github.io/projection/v1.1.0/schema.json",
    "raster": "https://stac-extensions.github.io/raster/v1.1.0/schema.json",
    "classification": "https://stac-extensions.github.io/classification/v2.0.0/schema.json",
}
MEDIA_TYPES = {".nc": "application/x-netcdf", ".json": "application/json", ".html": "text/html", ".csv": "text/csv"}
TITLES = {NETCDF_FILE: "every map of the run in one CF-1.10 NetCDF", MODEL_FILE: "the fitted ceiling models",
          MANIFEST_FILE: "inputs, outputs with checksums, versions, timing", "report.html": "the run report"}
CAUTION = ("A ceiling is a potential upper limit of abundance, not a forecast; results need expert review, and "
           "decisions defer to local regulations and agency guidance.")
_YEARS = re.compile(r"^\s*(\d{4})\s*(?:[-/]\s*(\d{4}))?\s*$")


def period_range(period: str) -> tuple[datetime, datetime] | None:
    """``"2041-2070"`` -> (2041-01-01T00:00:00Z, 2070-12-31T23:59:59Z); ``"2050"`` -> that year;
    None for any other label."""
    m = _YEARS.match(period)
    if m is None:
        return None
    first, last = int(m.group(1)), int(m.group(2) or m.group(1))
    if last < first:
        return None
    return (datetime(first, 1, 1, tzinfo=timezone.utc), datetime(last, 12, 31, 23, 59, 59, tzinfo=timezone.utc))


def class_name(name: str) -> str:
    """A class name as the classification extension spells names (letters, digits, - and _)."""
    return re.sub(r"[^0-9A-Za-z_-]+", "_", name.replace("->", " to ")).strip("_") or "class"


@dataclass(frozen=True)
class ClimateFolder:
    """One species x climate folder of maps, with the names its GeoTIFFs carry."""

    folder: Path
    species: str
    scenario: str
    climate_model: str
    period: str

    @property
    def item_id(self) -> str:
        if self.scenario == "present":
            return f"{self.species}__present"
        return f"{self.species}__{self.scenario}__{self.climate_model}__{self.period}"


def _climate_folders(root: Path, species: Sequence[str]) -> list[ClimateFolder]:
    out = []
    firsts: dict[Path, Path] = {}  # each folder of maps by its first map (a lean run may lack the ceiling)
    for tif in sorted(root.glob("*/**/*.tif")):
        if not tif.name.startswith("."):
            firsts.setdefault(tif.parent, tif)
    for tif in firsts.values():
        with rasterio.open(tif) as src:
            tags = src.tags()
        if tags.get("species") in species and tags.get("layer"):
            out.append(ClimateFolder(tif.parent, tags["species"], tags.get("scenario", ""),
                                     tags.get("climate_model", ""), tags.get("period", "")))
    return sorted(out, key=lambda c: (list(species).index(c.species), c.scenario != "present", c.item_id))


def _classes(cats: tuple[Category, ...]) -> list[dict[str, Any]]:
    out: list[dict[str, Any]] = [{"value": c.code, "name": class_name(c.name), "title": c.name,
                                  "description": c.description, "color_hint": c.colour[1:7].upper()} for c in cats]
    out.append({"value": CODE_NODATA, "name": "nodata", "title": "no data", "nodata": True})
    return out


def _map_asset(tif: Path, factors: Sequence[str], ensemble: bool) -> pystac.Asset:
    with rasterio.open(tif) as src:
        dtype, title, unit = src.dtypes[0], src.descriptions[0] or tif.stem, src.units[0] or None
    band: dict[str, Any] = {"data_type": dtype, "nodata": CODE_NODATA if dtype == "uint8" else float(np.float32(FLOAT_NODATA))}
    if unit:
        band["unit"] = unit
    extra: dict[str, Any] = {"raster:bands": [band]}
    cats = layer_categories(tif.stem, list(factors), ensemble=ensemble)
    if cats is not None:
        extra["classification:classes"] = _classes(cats)
    return pystac.Asset(href=str(tif), media_type=COG_TYPE, title=title, roles=["data"], extra_fields=extra)


def _grid(tif: Path) -> tuple[dict[str, Any], list[float], dict[str, Any]]:
    """(GeoJSON footprint in lon/lat, its bbox, projection-extension fields) of a map."""
    with rasterio.open(tif) as src:
        crs, t, b, shape = src.crs, src.transform, src.bounds, [src.height, src.width]
    w, s, e, n = transform_bounds(crs, "EPSG:4326", *b, densify_pts=21)
    footprint = {"type": "Polygon", "coordinates": [[[w, s], [e, s], [e, n], [w, n], [w, s]]]}
    epsg = crs.to_epsg()
    proj: dict[str, Any] = {"proj:epsg": epsg, "proj:shape": shape, "proj:bbox": [b.left, b.bottom, b.right, b.top],
                            "proj:transform": [t.a, t.b, t.c, t.d, t.e, t.f]}
    if epsg is None:
        proj["proj:wkt2"] = crs.to_wkt()
    return footprint, [w, s, e, n], proj


def _item(c: ClimateFolder, factors: Sequence[str], span: tuple[datetime, datetime]) -> pystac.Item:
    tifs = sorted(p for p in c.folder.glob("*.tif") if not p.name.startswith("."))
    footprint, bbox, proj = _grid(tifs[0])
    props = {"ceiling:species": c.species, "ceiling:scenario": c.scenario, "ceiling:climate_model": c.climate_model,
             "ceiling:period": c.period, "start_datetime": pystac.utils.datetime_to_str(span[0]),
             "end_datetime": pystac.utils.datetime_to_str(span[1]), **proj}
    item = pystac.Item(id=c.item_id, geometry=footprint, bbox=bbox, datetime=None, properties=props,
                       stac_extensions=list(EXTENSIONS.values()))
    ensemble = c.climate_model == ENSEMBLE
    for tif in tifs:
        item.add_asset(tif.stem, _map_asset(tif, factors, ensemble))
    return item


def _description(left_out: Sequence[ClimateFolder]) -> str:
    text = ("Maximum potential abundance (the ceiling) of each species under the present climate and each "
            "future climate: one item per species and climate, every map an asset. " + CAUTION)
    if left_out:
        labels = sorted({c.period for c in left_out})
        text += (" Not listed, because their period is not a year or a year range (such as 2041-2070) and so has "
                 "no time range: periods " + ", ".join(repr(p) for p in labels) + ".")
    return text


def write_catalogue(root: Path, *, title: str, species_factors: dict[str, Sequence[str]],
                    to_come: Sequence[str] = ()) -> list[Path]:
    """Write ``collection.json`` and the items under ``stac/`` in the run folder ``root``;
    return the files written. ``species_factors``: each species' factors in code order;
    ``to_come``: run-wide files written after the catalogue (listed as assets all the same)."""
    root = Path(root)
    folders = _climate_folders(root, list(species_factors))
    spans = {c.item_id: period_range(c.period) for c in folders}
    listed = [c for c in folders if spans[c.item_id] is not None]
    items = [_item(c, species_factors[c.species], spans[c.item_id]) for c in listed]  # type: ignore[arg-type]
    bbox = ([min(i.bbox[0] for i in items), min(i.bbox[1] for i in items), max(i.bbox[2] for i in items),
             max(i.bbox[3] for i in items)] if items else [-180.0, -90.0, 180.0, 90.0])
    starts = [spans[c.item_id][0] for c in listed]  # type: ignore[index]
    ends = [spans[c.item_id][1] for c in listed]  # type: ignore[index]
    extent = pystac.Extent(pystac.SpatialExtent([bbox]),
                           pystac.TemporalExtent([[min(starts), max(ends)] if starts else [None, None]]))
    coll = pystac.Collection(id=class_name(title), title=title, description=_description(
        [c for c in folders if spans[c.item_id] is None]), extent=extent, license="other")
    present = [p.name for p in sorted(root.iterdir()) if p.is_file() and p.suffix in MEDIA_TYPES
               and not p.name.startswith(".") and p.name != STAC_ROOT_FILE]
    for name in sorted(set(present) | set(to_come)):  # hrefs relative to collection.json
        role = "data" if Path(name).suffix in (".nc", ".csv") else "overview" if name.endswith(".html") else "metadata"
        coll.add_asset(Path(name).stem, pystac.Asset(href=f"./{name}", media_type=MEDIA_TYPES[Path(name).suffix],
                                                     roles=[role], title=TITLES.get(name, name)))
    coll.set_self_href(str(root / STAC_ROOT_FILE))
    for item in items:
        coll.add_item(item)
        item.set_self_href(str(root / stac_item_path(item.id)))
    coll.make_all_asset_hrefs_relative()
    coll.save(catalog_type=pystac.CatalogType.SELF_CONTAINED)
    return [root / STAC_ROOT_FILE] + [root / stac_item_path(i.id) for i in items]
