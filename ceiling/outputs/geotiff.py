"""GeoTIFF outputs: streamed tiled writes, then a cloud-optimised copy with category names.

1. :func:`create_tiled` makes an empty tiled, uncompressed GeoTIFF under a temporary name (sparse,
   so untouched tiles cost nothing; uncompressed, so the data are compressed once, by the COG copy), with the template's CRS and transform, nodata, band description, units and,
   for categorical layers, the colour table.
2. :class:`WindowTarget` is a dask ``store`` target: each chunk is written into its window,
   under a lock, so the write streams and memory stays bounded by the chunk size.
3. :func:`finalize_cog` copies the temporary file to a Cloud-Optimised GeoTIFF (GDAL's COG
   driver: tiled, deflate with a predictor, overviews) under a temporary name, renames it into
   place, and then, for categorical layers, writes the ``.aux.xml`` sidecar (GDAL's PAM format:
   category names and attribute table) and the ``.qml`` layer style that make a GIS show exactly
   the named classes (:mod:`ceiling.outputs.sidecars`). The sidecars come last because
   reopening a file for writing deletes the ``.aux.xml``.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import numpy as np
import rasterio
import rasterio.shutil
from rasterio.windows import Window

from ..categories import Category, hex_to_rgba
from .atomic import tmp_name
from .sidecars import pam_xml, write_category_sidecars

__all__ = ["FLOAT_NODATA", "CODE_NODATA", "stream_tile", "cog_block", "create_tiled", "WindowTarget", "finalize_cog", "pam_xml"]

FLOAT_NODATA = -3.4028234663852886e38  # the lowest float32; written for NaN
CODE_NODATA = 255


def stream_tile(chunk: int) -> int:
    """Tile size of the streamed file: the largest power of two (16..256) dividing the chunk."""
    t = 256
    while t > 16 and chunk % t:
        t //= 2
    return t


def cog_block(width: int, height: int) -> int:
    """COG block size: 512 for large grids, smaller for small ones so overviews still exist."""
    for b in (512, 256, 128):  # GDAL's COG driver takes 128 at the least
        if max(width, height) > b:
            return b
    return 128


def create_tiled(
    path: Path, grid: Any, *, dtype: str, description: str, units: str = "", chunk: int = 1024,
    categories: tuple[Category, ...] | None = None, tags: dict[str, str] | None = None,
) -> Path:
    nodata = CODE_NODATA if dtype == "uint8" else FLOAT_NODATA
    profile = dict(
        driver="GTiff", width=grid.width, height=grid.height, count=1, dtype=dtype,
        crs=grid.crs, transform=grid.affine, nodata=nodata, tiled=True, blockxsize=stream_tile(chunk),
        blockysize=stream_tile(chunk), compress="none", SPARSE_OK="TRUE", BIGTIFF="IF_SAFER",
    )
    with rasterio.Env(GDAL_PAM_ENABLED="NO"), rasterio.open(path, "w", **profile) as dst:
        dst.set_band_description(1, description)
        if units:
            dst.set_band_unit(1, units)
        if categories is not None:
            cmap = {c.code: hex_to_rgba(c.colour) for c in categories}
            cmap[CODE_NODATA] = (0, 0, 0, 0)
            dst.write_colormap(1, cmap)
        if tags:
            dst.update_tags(**tags)
    return path


class WindowTarget:
    """``target[rows, cols] = block`` writes one window of a GeoTIFF (a dask store target)."""

    def __init__(self, path: Path, dtype: str, cache_mb: int = 64) -> None:
        self.path = str(path)
        self.dtype = dtype
        self.cache_mb = cache_mb

    def __setitem__(self, key: tuple[slice, slice], value: np.ndarray) -> None:
        rows, cols = key
        window = Window(cols.start, rows.start, cols.stop - cols.start, rows.stop - rows.start)
        if self.dtype == "float32":
            value = np.where(np.isnan(value), FLOAT_NODATA, value).astype(np.float32)
        else:
            value = np.asarray(value).astype(np.uint8)
        with rasterio.Env(GDAL_CACHEMAX=self.cache_mb, GDAL_PAM_ENABLED="NO"), rasterio.open(self.path, "r+") as dst:
            dst.write(value, 1, window=window)


def finalize_cog(
    tmp: Path, final: Path, *, categorical: bool, categories: tuple[Category, ...] | None = None,
    description: str = "",
) -> list[Path]:
    """Copy the streamed file to a COG at ``final`` (atomically); return the files written."""
    staging = tmp_name(final)
    with rasterio.Env(GDAL_PAM_ENABLED="NO", GDAL_CACHEMAX=64):
        with rasterio.open(tmp) as src:
            block = cog_block(src.width, src.height)
        rasterio.shutil.copy(
            str(tmp), str(staging), driver="COG", COMPRESS="DEFLATE", PREDICTOR="YES", BLOCKSIZE=block,
            OVERVIEW_RESAMPLING="NEAREST" if categorical else "AVERAGE", BIGTIFF="IF_SAFER",
            NUM_THREADS="ALL_CPUS",
        )
    os.replace(staging, final)
    written = [final]
    if categories is not None:  # names, attribute table and layer style (outputs/sidecars.py)
        written += write_category_sidecars(final, categories, description)
    Path(tmp).unlink(missing_ok=True)
    return written
