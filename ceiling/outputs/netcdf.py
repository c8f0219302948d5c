"""The run's CF NetCDF: every map of every species and climate in one file.

Layout (CF-1.10): dimensions ``species``, ``climate``, ``y``, ``x``. The present is stored as
``ceiling_present`` and ``limiting_present`` (species, y, x); each future map is a variable on
(species, climate, y, x), and the climate dimension carries the auxiliary coordinates
``scenario``, ``climate_model`` and ``period`` (a documented equivalent of separate scenario /
model / period dimensions, which would be sparse when not every combination exists).
Categorical variables carry ``flag_values`` / ``flag_meanings``; every map names the grid
mapping variable ``crs`` and the cell measure ``cell_area`` (m2).

Writing: :func:`create_netcdf` lays out the file with netCDF4 (dimensions, coordinates,
attributes; no map data) under a temporary name. The maps are then written as whole HDF5 chunks
already compressed (:func:`encode_chunk`: the byte shuffle and deflate that the variables
declare), by the projection's chunk tasks, in parallel; :class:`NetcdfWriter` stores them with
HDF5's direct chunk write, in a fixed order (HDF5 places chunks in the order they arrive, so a
fixed order gives byte-identical files from run to run, whatever the scheduler did).
:meth:`NetcdfWriter.close` renames the file into place.
"""

from __future__ import annotations

import os
import re
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import netCDF4
import numpy as np
from pyproj import CRS

from .. import __version__
from ..categories import Category
from .atomic import tmp_name
from .geotiff import FLOAT_NODATA

__all__ = ["create_netcdf", "NetcdfWriter", "NetcdfVariable", "encode_chunk", "chunk_side", "flag_meaning"]

# deflate level declared in the variables' filters and used for the streams (libdeflate's level 1:
# about 2.5x zlib's speed at a similar size, and its output depends only on the input and the level,
# so repeated and resumed runs give identical files; a zlib reader decodes it)
DEFLATE_LEVEL = 1


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


def chunk_side(chunk: int) -> int:
    """HDF5 chunk side for a projection chunk: the largest power of two (16..512) dividing it
    (512 x 512 float32 is 1 MiB, a usual size for reading whole maps or windows of them)."""
    t = 512
    while t > 16 and chunk % t:
        t //= 2
    return t


def _compress(data: bytes) -> bytes:
    import deflate  # libdeflate; releases the GIL, so the chunk tasks compress in parallel

    return deflate.zlib_compress(data, DEFLATE_LEVEL)


def encode_chunk(block: np.ndarray, shape: tuple[int, int], fill: Any) -> bytes:
    """One HDF5 chunk as stored: padded to ``shape`` with ``fill``, byte-shuffled and deflated
    (a zlib stream), as the variables' filters (shuffle, deflate) expect."""
    h, w = block.shape[-2:]
    if (h, w) != tuple(shape):
        full = np.full(shape, fill, dtype=block.dtype)
        full[:h, :w] = block
        block = full
    raw = np.ascontiguousarray(block)
    size = raw.dtype.itemsize
    if size > 1:
        raw = np.ascontiguousarray(raw.view(np.uint8).reshape(-1, size).T)
    return _compress(raw.tobytes())


@dataclass(frozen=True)
class NetcdfVariable:
    """One map variable: ``present`` ones are (species, y, x), the others (species, climate, y, x)."""

    name: str
    long_name: str
    units: str
    categories: tuple[Category, ...] | None
    present: bool

    @property
    def dtype(self) -> np.dtype:
        return np.dtype(np.float32 if self.categories is None else np.uint8)

    @property
    def fill(self) -> Any:
        return np.float32(FLOAT_NODATA) if self.categories is None else np.uint8(255)


def create_netcdf(
    path: Path, *, grid: Any, species: Sequence[str], futures: Sequence[tuple[str, str, str]],
    variables: Sequence[NetcdfVariable], attrs: dict[str, str], chunk: int,
) -> NetcdfWriter:
    """Lay out the run's NetCDF (no map data yet) and return the writer that fills it."""
    pcrs = CRS.from_wkt(grid.crs_wkt)
    c = grid.coords()
    xattrs, yattrs = _axis_attrs(pcrs)
    gm = pcrs.to_cf()
    gm["crs_wkt"] = grid.crs_wkt
    h, w = grid.height, grid.width
    side = chunk_side(chunk)
    cs = (min(side, h), min(side, w))  # HDF5 chunks may not exceed a fixed dimension
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
            v = nc.createVariable("cell_area", "f8", ("y", "x"), zlib=True, complevel=DEFLATE_LEVEL, shuffle=True,
                                  chunksizes=cs, fill_value=np.float64(np.nan))
            v.setncatts({"standard_name": "cell_area", "long_name": "area of the grid cell on the ellipsoid",
                         "units": "m2", "grid_mapping": "crs"})
            for var in variables:
                dims = ("species", "y", "x") if var.present else ("species", "climate", "y", "x")
                a: dict[str, Any] = {"long_name": var.long_name, "grid_mapping": "crs",
                                     "cell_measures": "area: cell_area"}
                if var.categories is None:
                    a["units"] = var.units
                else:
                    a["flag_values"] = np.array([k.code for k in var.categories], dtype=np.uint8)
                    a["flag_meanings"] = " ".join(flag_meaning(k.name) for k in var.categories)
                # auxiliary string coordinates (CF: named in 'coordinates', sorted as before)
                a["coordinates"] = "species_name" if var.present else "climate_model period scenario species_name"
                v = nc.createVariable(var.name, var.dtype, dims, zlib=True, complevel=DEFLATE_LEVEL, shuffle=True,
                                      chunksizes=tuple(1 for _ in dims[:-2]) + cs, fill_value=var.fill)
                v.setncatts(a)
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
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return NetcdfWriter(path, tmp, cs, grid)


class NetcdfWriter:
    """Stores encoded HDF5 chunks (see :func:`encode_chunk`) into the laid-out file, in the
    order given; :meth:`close` renames the file into place, :meth:`discard` removes it."""

    def __init__(self, path: Path, tmp: Path, chunk_shape: tuple[int, int], grid: Any) -> None:
        import h5py

        self.path, self.tmp, self.chunk_shape, self.grid = Path(path), Path(tmp), chunk_shape, grid
        self._h5 = h5py.File(self.tmp, "r+")

    def write(self, name: str, lead: tuple[int, ...], row: int, col: int, data: bytes) -> None:
        """Store one encoded chunk of ``name`` at ``lead`` (species[, climate]) whose first cell is
        (``row``, ``col``) (multiples of the chunk side)."""
        self._h5[name].id.write_direct_chunk((*lead, row, col), data, 0)

    def write_areas(self, area_block: Any) -> None:
        """``cell_area``: ``area_block(rows, cols)`` gives the areas of a window."""
        h, w = self.grid.height, self.grid.width
        ch, cw = self.chunk_shape
        for r0 in range(0, h, ch):
            for c0 in range(0, w, cw):
                rows, cols = slice(r0, min(h, r0 + ch)), slice(c0, min(w, c0 + cw))
                block = np.asarray(area_block(rows, cols), dtype=np.float64)
                self.write("cell_area", (), r0, c0, encode_chunk(block, self.chunk_shape, np.float64(np.nan)))

    def close(self) -> Path:
        self._h5.close()
        os.replace(self.tmp, self.path)
        return self.path

    def discard(self) -> None:
        try:
            self._h5.close()
        finally:
            self.tmp.unlink(missing_ok=True)


def _strings(nc: Any, name: str, dim: str, values: list[str], long_name: str) -> None:
    v = nc.createVariable(name, str, (dim,))
    v.setncatts({"long_name": long_name})
    v[:] = np.array(values, dtype=object)
