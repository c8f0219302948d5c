"""The run's CF NetCDF: every map of every species and climate in one file.

Layout (CF-1.10): dimensions ``species``, ``climate``, ``y``, ``x``. The present is stored as
``ceiling_present`` and ``limiting_present`` (species, y, x); each future map is a variable on
(species, climate, y, x), and the climate dimension carries the auxiliary coordinates
``scenario``, ``climate_model`` and ``period`` (a documented equivalent of separate scenario /
model / period dimensions, which would be sparse when not every combination exists).
Categorical variables carry ``flag_values`` / ``flag_meanings``; every map names the grid
mapping variable ``crs`` and the cell measure ``cell_area`` (m2). The file is assembled lazily
from the written GeoTIFFs and written with netCDF4 directly, one HDF5 chunk after another in a
fixed order (so repeated runs give byte-identical files), under a temporary name, then renamed.
"""

from __future__ import annotations

import itertools
import os
import re
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import dask
import dask.array as da
import netCDF4
import numpy as np
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
    gm = pcrs.to_cf()
    gm["crs_wkt"] = grid.crs_wkt
    h, w = grid.height, grid.width
    ch, cw = min(256, h), min(256, w)
    gattrs = {
        "Conventions": "CF-1.10",
        "title": attrs.get("title", "ceilings of species abundance"),
        "institution": attrs.get("institution", "not specified"),
        "source": f"ceiling {__version__}",
        "history": f"written by ceiling {__version__} (no timestamp, so repeated runs give identical files)",
        "comment": "Ceilings are potential upper limits of abundance, not forecasts; results need expert review, "
                   "and decisions defer to local regulations and agency guidance.",
        **{k: v for k, v in attrs.items() if k not in ("title", "institution")},
    }
    tmp = tmp_name(path)
    try:
        # with a small HDF5 chunk cache: the default is per variable, so it would grow with the
        # number of variables up to hundreds of MB
        netCDF4.set_chunk_cache(CHUNK_CACHE_BYTES, 1009, 0.75)
        with netCDF4.Dataset(tmp, "w", format="NETCDF4") as nc:
            nc.setncatts(gattrs)
            nc.createDimension("y", h)
            nc.createDimension("x", w)
            nc.createDimension("species", len(species))
            if futures:
                nc.createDimension("climate", len(futures))
            v = nc.createVariable("crs", "i4", ())
            v.setncatts(gm)
            v.assignValue(np.int32(0))
            v = nc.createVariable("cell_area", "f8", ("y", "x"), zlib=True, complevel=4, shuffle=True,
                                  chunksizes=(ch, cw), fill_value=np.float64(np.nan))
            v.setncatts({"standard_name": "cell_area", "long_name": "area of the grid cell on the ellipsoid",
                         "units": "m2", "grid_mapping": "crs"})
            _write_blocks(v, area, (), h, w, ch, cw, np.float64)
            for name, (arr, long_name, units, cats) in layers.items():
                present = name.endswith("_present")
                dims = ("species", "y", "x") if present else ("species", "climate", "y", "x")
                a: dict[str, Any] = {"long_name": long_name, "grid_mapping": "crs", "cell_measures": "area: cell_area"}
                if cats is None:
                    a["units"] = units
                    fill: Any = np.float32(FLOAT_NODATA)
                    dtype = np.dtype(np.float32)
                else:
                    a["flag_values"] = np.array([k.code for k in cats], dtype=np.uint8)
                    a["flag_meanings"] = " ".join(flag_meaning(k.name) for k in cats)
                    fill = np.uint8(255)
                    dtype = np.dtype(np.uint8)
                # auxiliary string coordinates (CF: named in 'coordinates', sorted as before)
                a["coordinates"] = "species_name" if present else "climate_model period scenario species_name"
                var = nc.createVariable(name, dtype, dims, zlib=True, complevel=4, shuffle=True,
                                        chunksizes=tuple(1 for _ in dims[:-2]) + (ch, cw), fill_value=fill)
                var.setncatts(a)
                lead = [range(n) for n in arr.shape[:-2]]
                for idx in itertools.product(*lead):
                    _write_blocks(var, arr[idx], idx, h, w, ch, cw, dtype, fill=fill if cats is None else None)
            v = nc.createVariable("x", "f8", ("x",), fill_value=False)
            v.setncatts(xattrs)
            v[:] = c["x"]
            v = nc.createVariable("y", "f8", ("y",), fill_value=False)
            v.setncatts(yattrs)
            v[:] = c["y"]
            _strings(nc, "species_name", "species", list(species), "species code")
            if futures:
                v = nc.createVariable("climate", "i4", ("climate",), fill_value=False)
                v.setncatts({"long_name": "index of the future climate"})
                v[:] = np.arange(len(futures), dtype=np.int32)
                _strings(nc, "scenario", "climate", [f[0] for f in futures], "emission scenario")
                _strings(nc, "climate_model", "climate", [f[1] for f in futures], "climate model")
                _strings(nc, "period", "climate", [f[2] for f in futures], "period")
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()
    return path


def _strings(nc: Any, name: str, dim: str, values: list[str], long_name: str) -> None:
    v = nc.createVariable(name, str, (dim,))
    v.setncatts({"long_name": long_name})
    v[:] = np.array(values, dtype=object)


def _write_blocks(var: Any, arr: Any, lead: tuple[int, ...], h: int, w: int, ch: int, cw: int, dtype: Any,
                  fill: Any = None) -> None:
    """Write a (y, x) lazy array into ``var[lead]``, one HDF5 chunk after another, row by row.

    Every HDF5 chunk is computed and written exactly once, in a fixed order: HDF5 places chunks
    in the order they arrive, so writing the same data in a different order (a parallel write,
    or dask tasks ordered by key names that contain the run's staging path) gives a different,
    equally valid byte layout. In this order repeated runs give byte-identical files.
    """
    for r0 in range(0, h, ch):
        for c0 in range(0, w, cw):
            r1, c1 = min(r0 + ch, h), min(c0 + cw, w)
            with dask.config.set(scheduler="synchronous"):
                block = np.asarray(arr[r0:r1, c0:c1].compute() if hasattr(arr, "compute") else arr[r0:r1, c0:c1])
            block = block.astype(dtype, copy=False)
            if fill is not None:  # float maps: NaN is stored as the declared _FillValue
                block = np.where(np.isnan(block), fill, block).astype(dtype, copy=False)
            var[(*lead, slice(r0, r1), slice(c0, c1))] = block
