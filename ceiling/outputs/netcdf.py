"""The run's CF NetCDF: every map of every species and climate in one file.

Layout (CF-1.10): dimensions ``species``, ``climate``, ``y``, ``x``. The present is stored as
``ceiling_present`` and ``limiting_present`` (species, y, x); each future map is a variable on
(species, climate, y, x), and the climate dimension carries the auxiliary coordinates
``scenario``, ``climate_model`` and ``period`` (a documented equivalent of separate scenario /
model / period dimensions, which would be sparse when not every combination exists).
Categorical variables carry ``flag_values`` / ``flag_meanings``; every map names the grid
mapping variable ``crs`` and the cell measure ``cell_area`` (m2). The file is assembled lazily
from the written GeoTIFFs and written under a temporary name, then renamed.
"""

from __future__ import annotations

import os
import re
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import dask
import dask.array as da
import netCDF4
import numpy as np
import xarray as xr
from pyproj import CRS

from .. import __version__
from ..categories import Category
from .atomic import tmp_name
from .geotiff import FLOAT_NODATA

__all__ = ["write_netcdf", "flag_meaning"]

CHUNK_CACHE_BYTES = 4 * 1024 * 1024


def flag_meaning(name: str) -> str:
    """A CF flag meaning: one word of letters, digits and underscores."""
    s = name.replace("->", "to").replace("(unchanged)", "unchanged")
    return re.sub(r"[^A-Za-z0-9_]+", "_", s).strip("_")


def _axis_attrs(crs: CRS) -> tuple[dict[str, str], dict[str, str]]:
    if crs.is_geographic:
        return ({"standard_name": "longitude", "long_name": "longitude", "units": "degrees_east", "axis": "X"},
                {"standard_name": "latitude", "long_name": "latitude", "units": "degrees_north", "axis": "Y"})
    unit = crs.axis_info[0].unit_name if crs.axis_info else "m"
    unit = "m" if unit in ("metre", "meter") else unit
    return ({"standard_name": "projection_x_coordinate", "long_name": "x coordinate", "units": unit, "axis": "X"},
            {"standard_name": "projection_y_coordinate", "long_name": "y coordinate", "units": unit, "axis": "Y"})


def write_netcdf(
    path: Path,
    *,
    grid: Any,
    species: Sequence[str],
    futures: Sequence[tuple[str, str, str]],
    layers: dict[str, tuple[Any, str, str, tuple[Category, ...] | None]],
    area: da.Array,
    attrs: dict[str, str],
) -> Path:
    """Write ``layers``: name -> (lazy array, long name, units, categories or None).

    Arrays are (species, y, x) for names ending in ``_present`` and (species, climate, y, x)
    otherwise.
    """
    pcrs = CRS.from_wkt(grid.crs_wkt)
    c = grid.coords()
    xattrs, yattrs = _axis_attrs(pcrs)
    coords: dict[str, Any] = {
        "x": ("x", c["x"], xattrs),
        "y": ("y", c["y"], yattrs),
        # string labels are auxiliary coordinates: CF coordinate variables must be numeric
        "species_name": ("species", np.array(list(species), dtype=object), {"long_name": "species code"}),
    }
    if futures:
        coords["climate"] = ("climate", np.arange(len(futures), dtype=np.int32), {"long_name": "index of the future climate"})
        coords["scenario"] = ("climate", np.array([f[0] for f in futures], dtype=object), {"long_name": "emission scenario"})
        coords["climate_model"] = ("climate", np.array([f[1] for f in futures], dtype=object), {"long_name": "climate model"})
        coords["period"] = ("climate", np.array([f[2] for f in futures], dtype=object), {"long_name": "period"})
    gm = pcrs.to_cf()
    gm["crs_wkt"] = grid.crs_wkt
    data_vars: dict[str, Any] = {
        "crs": ((), np.int32(0), gm),
        "cell_area": (("y", "x"), area, {"standard_name": "cell_area", "long_name": "area of the grid cell on the ellipsoid", "units": "m2", "grid_mapping": "crs"}),
    }
    encoding: dict[str, dict[str, Any]] = {"cell_area": {"zlib": True, "complevel": 4, "chunksizes": (min(256, grid.height), min(256, grid.width))}}
    for name, (arr, long_name, units, cats) in layers.items():
        dims = ("species", "y", "x") if name.endswith("_present") else ("species", "climate", "y", "x")
        a: dict[str, Any] = {"long_name": long_name, "grid_mapping": "crs", "cell_measures": "area: cell_area"}
        if cats is None:
            a["units"] = units
            fill: Any = np.float32(FLOAT_NODATA)
        else:
            a["flag_values"] = np.array([k.code for k in cats], dtype=np.uint8)
            a["flag_meanings"] = " ".join(flag_meaning(k.name) for k in cats)
            fill = np.uint8(255)
        data_vars[name] = (dims, arr, a)
        chunks = tuple(1 for _ in dims[:-2]) + (min(256, grid.height), min(256, grid.width))
        encoding[name] = {"zlib": True, "complevel": 4, "chunksizes": chunks, "_FillValue": fill}
    ds = xr.Dataset(data_vars, coords=coords)
    ds.attrs = {
        "Conventions": "CF-1.10",
        "title": attrs.get("title", "ceilings of species abundance"),
        "institution": attrs.get("institution", "not specified"),
        "source": f"ceiling {__version__}",
        "history": f"written by ceiling {__version__} (no timestamp, so repeated runs give identical files)",
        "comment": "Ceilings are potential upper limits of abundance, not forecasts; results need expert review, "
                   "and decisions defer to local regulations and agency guidance.",
        **{k: v for k, v in attrs.items() if k not in ("title", "institution")},
    }
    for v in ("x", "y"):
        encoding[v] = {"_FillValue": None}
    tmp = tmp_name(path)
    try:
        # one chunk after another, in order: HDF5 places chunks in the order they arrive, so a
        # parallel write would give a different (equally valid) byte layout on every run
        # and with a small HDF5 chunk cache: the default is per variable, so it would grow with the
        # number of variables up to hundreds of MB
        netCDF4.set_chunk_cache(CHUNK_CACHE_BYTES, 1009, 0.75)
        with dask.config.set(scheduler="synchronous"):
            ds.to_netcdf(tmp, engine="netcdf4", format="NETCDF4", encoding=encoding)
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()
    return path
