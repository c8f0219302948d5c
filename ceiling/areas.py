"""Cell areas on the ellipsoid (m2).

- Geographic grids: the exact area of each cell of a latitude-longitude grid on the ellipsoid,
  by row, from the closed form of the area of a zone between two parallels,
  A = (b^2 dlon / 2) [q(phi2) - q(phi1)], with
  q(phi) = sin(phi) / (1 - e^2 sin^2 phi) + (1 / 2e) ln((1 + e sin phi) / (1 - e sin phi))
  (the authalic-latitude form; e.g. Snyder 1987, Map Projections: A Working Manual, USGS PP 1395,
  eq. 3-12).
- Equal-area projections: every cell has the area of its size (|a * e| of the transform).
- Other projections: the geodesic area of each cell polygon, densified along its edges, with
  pyproj.Geod on the CRS's ellipsoid (per chunk, so large grids stay lazy).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
from pyproj import CRS, Geod, Transformer

if TYPE_CHECKING:  # dask is imported where the lazy arrays are built, not at start-up
    import dask.array as da

__all__ = ["cell_areas", "window_areas", "zone_area", "EQUAL_AREA_METHODS"]

EQUAL_AREA_METHODS = (
    "lambert azimuthal equal area", "albers equal area", "mollweide", "sinusoidal", "equal earth",
    "lambert cylindrical equal area", "cylindrical equal area", "eckert iv", "eckert vi", "goode homolosine",
)


def _ellipsoid(crs: CRS) -> tuple[float, float]:
    el = crs.ellipsoid
    return float(el.semi_major_metre), float(el.semi_minor_metre)


def zone_area(lat1_deg: np.ndarray, lat2_deg: np.ndarray, dlon_deg: float, a: float, b: float) -> np.ndarray:
    """Area between two parallels over ``dlon_deg`` of longitude on the ellipsoid (a, b)."""
    e2 = 1.0 - (b * b) / (a * a)
    e = np.sqrt(e2)

    def q(lat: np.ndarray) -> np.ndarray:
        s = np.sin(np.radians(lat))
        if e == 0:
            return 2.0 * s
        return s / (1.0 - e2 * s * s) + np.log((1.0 + e * s) / (1.0 - e * s)) / (2.0 * e)

    return np.abs(b * b * np.radians(dlon_deg) / 2.0 * (q(np.asarray(lat2_deg)) - q(np.asarray(lat1_deg))))


def _is_equal_area(crs: CRS) -> bool:
    op = crs.coordinate_operation
    name = (op.method_name if op is not None else "").lower()
    return any(m in name for m in EQUAL_AREA_METHODS)


def window_areas(grid, rows: slice, cols: slice) -> np.ndarray:
    """Cell areas in m2 of one window of a :class:`~ceiling.grids.GridSpec` (float64, rows x cols;
    a read-only broadcast view where the area does not vary along a row)."""
    crs = CRS.from_wkt(grid.crs_wkt)
    t = grid.affine
    r0, r1, c0, c1 = rows.start, rows.stop, cols.start, cols.stop
    shape = (r1 - r0, c1 - c0)
    if crs.is_geographic:
        a, b = _ellipsoid(crs)
        top = t.f + t.e * np.arange(r0, r1)
        return np.broadcast_to(zone_area(top, top + t.e, abs(t.a), a, b)[:, None], shape)
    if _is_equal_area(crs):
        return np.broadcast_to(np.float64(abs(t.a * t.e)), shape)
    return _geodesic_block(grid.crs_wkt, tuple(t)[:6], r0, r1, c0, c1)


def cell_areas(grid, *, chunk: int = 1024) -> da.Array:
    """Lazy (y, x) float64 array of cell areas in m2 for a :class:`~ceiling.grids.GridSpec`."""
    import dask.array as da

    ny, nx = grid.shape

    def block(block_info=None):
        (r0, r1), (c0, c1) = block_info[None]["array-location"]
        return np.array(window_areas(grid, slice(r0, r1), slice(c0, c1)))

    return da.map_blocks(block, chunks=da.core.normalize_chunks((chunk, chunk), (ny, nx)), dtype=np.float64)


def _geodesic_block(wkt: str, tr: tuple, r0: int, r1: int, c0: int, c1: int, densify: int = 8) -> np.ndarray:
    crs = CRS.from_wkt(wkt)
    geod = Geod(ellps="WGS84") if crs.ellipsoid is None else Geod(a=crs.ellipsoid.semi_major_metre, b=crs.ellipsoid.semi_minor_metre)
    to_ll = Transformer.from_crs(crs, crs.geodetic_crs, always_xy=True)
    out = np.empty((r1 - r0, c1 - c0))
    s = np.linspace(0.0, 1.0, densify + 1)[:-1]
    for i, r in enumerate(range(r0, r1)):
        for j, c in enumerate(range(c0, c1)):
            xs = np.concatenate([c + s, np.full_like(s, c + 1), c + 1 - s, np.full_like(s, c)])
            ys = np.concatenate([np.full_like(s, r), r + s, np.full_like(s, r + 1), r + 1 - s])
            px = tr[2] + tr[0] * xs + tr[1] * ys
            py = tr[5] + tr[3] * xs + tr[4] * ys
            lon, lat = to_ll.transform(px, py)
            out[i, j] = abs(geod.polygon_area_perimeter(lon, lat)[0])
    return out
