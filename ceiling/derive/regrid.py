"""From a coarse regular lon-lat grid to the cells of the template grid.

The template's cell centres are put in geographic coordinates (pyproj when the template is
projected) and in the coarse grid's longitude frame; each coarse field is then interpolated
bilinearly (default) or taken from the nearest coarse cell. Beyond the outermost coarse cell
centres (at most half a cell: the series reader checks the cover) the edge values hold. Coarse
cells without a value (a land or sea mask of the model) are first filled from the nearest valid
cell, so a fine cell next to a masked coarse cell still gets a change.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from pyproj import Transformer
from scipy import ndimage

from ..grids import GridSpec

__all__ = ["chunk_lonlat", "fill_gaps", "Interpolator"]


def chunk_lonlat(grid: GridSpec, rows: slice, cols: slice) -> tuple[np.ndarray, np.ndarray]:
    """Longitudes and latitudes (degrees, 2-D) of the cell centres of one window of the grid."""
    xy = grid.coords()
    x, y = np.meshgrid(xy["x"][cols], xy["y"][rows])
    if grid.crs.is_geographic:
        return x, y
    tr = Transformer.from_crs(grid.crs, "EPSG:4326", always_xy=True)
    lon, lat = tr.transform(x, y)
    return np.asarray(lon), np.asarray(lat)


def fill_gaps(field: np.ndarray) -> np.ndarray:
    """``field`` (..., n_lat, n_lon) with cells missing in any layer filled from the nearest complete cell."""
    bad = ~np.all(np.isfinite(field.reshape(-1, *field.shape[-2:])), axis=0)
    if not bad.any():
        return field
    if bad.all():
        return field
    _, (iy, ix) = ndimage.distance_transform_edt(bad, return_indices=True)
    return field[..., iy, ix]


@dataclass(frozen=True)
class Interpolator:
    """Weights that take fields on a coarse (lat, lon) grid to a set of points: four flat indices
    into the coarse grid and their weights (one index, weight 1, for the nearest cell)."""

    index: tuple[np.ndarray, ...]
    weight: tuple[np.ndarray, ...]

    @classmethod
    def build(cls, lon: np.ndarray, lat: np.ndarray, qlon: np.ndarray, qlat: np.ndarray, *, method: str,
              centre: float) -> Interpolator:
        """``lon``, ``lat``: ascending coarse centres (lon in the frame around ``centre``)."""
        q = (np.asarray(qlon, dtype="float64") - centre + 180.0) % 360.0 - 180.0 + centre
        fx = np.interp(q, lon, np.arange(lon.size, dtype="float64"))
        fy = np.interp(np.asarray(qlat, dtype="float64"), lat, np.arange(lat.size, dtype="float64"))
        nx = lon.size
        if method == "nearest":
            return cls((np.rint(fy).astype(np.intp) * nx + np.rint(fx).astype(np.intp),), (np.ones_like(fx),))
        i0 = np.clip(np.floor(fx).astype(np.intp), 0, max(lon.size - 2, 0))
        j0 = np.clip(np.floor(fy).astype(np.intp), 0, max(lat.size - 2, 0))
        i1, j1 = np.minimum(i0 + 1, lon.size - 1), np.minimum(j0 + 1, lat.size - 1)
        wx, wy = fx - i0, fy - j0
        return cls((j0 * nx + i0, j0 * nx + i1, j1 * nx + i0, j1 * nx + i1),
                   ((1 - wx) * (1 - wy), wx * (1 - wy), (1 - wx) * wy, wx * wy))

    def __call__(self, field: np.ndarray) -> np.ndarray:
        """(..., n_lat, n_lon) -> (..., n_points)."""
        f = fill_gaps(field)
        flat = f.reshape(f.shape[:-2] + (-1,))
        out = np.take(flat, self.index[0], axis=-1) * self.weight[0]
        for k, w in zip(self.index[1:], self.weight[1:]):
            out += np.take(flat, k, axis=-1) * w
        return out
