"""Optional study-area mask: a raster (non-zero, valid cells are inside) or polygons.

Polygons are reprojected to the grid's CRS and rasterised chunk by chunk (a cell is inside when
its centre is), so the mask stays lazy like every other layer.
"""

from __future__ import annotations

from pathlib import Path

import dask.array as da
import numpy as np
import xarray as xr

from .errors import DataError, InputFileError
from .grids import BlockReader, GridSpec, inspect_layer
from .scenarios import LayerRef

__all__ = ["open_mask"]

VECTOR = {".gpkg", ".shp", ".geojson", ".json", ".fgb"}


def _rasterise_block(geoms, transform, block_info=None):
    from rasterio.features import geometry_mask
    from rasterio.windows import Window
    from rasterio.windows import transform as wtransform

    (r0, r1), (c0, c1) = block_info[None]["array-location"]
    win = Window(c0, r0, c1 - c0, r1 - r0)
    return geometry_mask(geoms, out_shape=(r1 - r0, c1 - c0), transform=wtransform(win, transform), invert=True)


def open_mask(path: Path, grid: GridSpec, *, chunk: int) -> xr.DataArray:
    if not path.is_file():
        raise InputFileError(f"mask file not found: {path}; check projection.mask in the config")
    coords = grid.coords()
    if path.suffix.lower() in VECTOR:
        import geopandas as gpd

        try:
            gdf = gpd.read_file(path, engine="pyogrio")
        except Exception as exc:
            raise InputFileError(f"{path}: cannot read the mask polygons ({str(exc).splitlines()[0]})") from None
        if gdf.crs is None:
            raise DataError(f"{path}: the mask has no CRS; assign one before use")
        geoms = list(gdf.to_crs(grid.crs_wkt).geometry.make_valid())
        arr = da.map_blocks(_rasterise_block, geoms, grid.affine, chunks=da.core.normalize_chunks((chunk, chunk), grid.shape), dtype=bool)
    else:
        info = inspect_layer(LayerRef(path), factor="mask")
        reader = BlockReader(info, grid, resampling="nearest")
        raw = da.from_array(reader, chunks=(chunk, chunk), asarray=True, lock=False, fancy=False, meta=np.empty((0, 0), np.float32))
        arr = da.isfinite(raw) & (raw != 0)
    return xr.DataArray(arr, dims=("y", "x"), coords=coords, name="mask")
