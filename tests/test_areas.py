"""Cell areas on the ellipsoid, checked against published values and pyproj.Geod."""

from __future__ import annotations

import numpy as np
import pytest
from affine import Affine
from projection_helpers import geod_cell_area
from pyproj import CRS, Geod, Transformer

from ceiling.areas import cell_areas
from ceiling.grids import GridSpec

WGS84 = CRS.from_epsg(4326).to_wkt()


def _grid(crs_wkt: str, transform: Affine, width: int, height: int) -> GridSpec:
    return GridSpec(crs_wkt, tuple(transform)[:6], width, height)


def _areas(grid: GridSpec, chunk: int = 64) -> np.ndarray:
    return np.asarray(cell_areas(grid, chunk=chunk).compute())


def test_one_degree_cell_at_the_equator():
    # Source: exact area on the WGS84 ellipsoid of the 1 x 1 degree cell from 0 to 1 deg N
    # (value given in the project brief; cross-checked here with pyproj.Geod)
    g = _grid(WGS84, Affine(1.0, 0, 0.0, 0, -1.0, 1.0), 1, 1)
    a = _areas(g)[0, 0]
    assert a == pytest.approx(12_308_463_894, abs=1.0)
    # Source: pyproj.Geod(ellps="WGS84") on the cell polygon with densified parallels
    assert a == pytest.approx(geod_cell_area(0.0, 0.0, 1.0, 1.0, n=2000), rel=1e-9)


def test_one_degree_cell_at_sixty_north():
    # Source: exact WGS84 area of the 1 x 1 degree cell from 60 to 61 deg N (project brief)
    g = _grid(WGS84, Affine(1.0, 0, 10.0, 0, -1.0, 61.0), 1, 1)
    a = _areas(g)[0, 0]
    assert a == pytest.approx(6_123_140_879, abs=1.0)
    assert a == pytest.approx(geod_cell_area(10.0, 60.0, 11.0, 61.0, n=2000), rel=1e-9)


def test_four_corner_geodesic_polygon_is_not_the_cell():
    """The cell is bounded by parallels, not geodesics: a 4-corner geodesic polygon differs by
    about 3e-5 relative (so the densified polygon above is the right comparison)."""
    four = abs(Geod(ellps="WGS84").polygon_area_perimeter([0, 1, 1, 0], [0, 0, 1, 1])[0])
    exact = _areas(_grid(WGS84, Affine(1.0, 0, 0.0, 0, -1.0, 1.0), 1, 1))[0, 0]
    assert 1e-5 < abs(four - exact) / exact < 1e-4


def test_global_one_degree_grid_sums_to_the_ellipsoid_area():
    g = _grid(WGS84, Affine(1.0, 0, -180.0, 0, -1.0, 90.0), 360, 180)
    a = _areas(g, chunk=64)
    assert a.shape == (180, 360)
    total = a.sum()
    # Source: surface area of the WGS84 ellipsoid, 5.10065621724e14 m2 (from memory of the
    # standard value: 4 pi R_q^2 with the authalic radius R_q = 6371007.1809 m)
    assert total == pytest.approx(5.10065621724e14, rel=1e-11)
    # Source: pyproj.Geod, one densified 1-degree cell per latitude band, times 360
    geod = Geod(ellps="WGS84")
    bands = sum(geod_cell_area(0.0, lat, 1.0, lat + 1.0, n=400, geod=geod) for lat in range(-90, 90)) * 360
    assert total == pytest.approx(bands, rel=1e-7)
    # every cell of a row has the same area; the grid is symmetric about the equator
    assert np.all(a == a[:, :1])
    np.testing.assert_allclose(a[:90, 0], a[::-1][:90, 0], rtol=1e-10)


def test_rows_follow_latitude_in_chunks_smaller_than_the_grid():
    """Row areas are right in every chunk (chunk 64 on a 150-row grid cuts it three times)."""
    t = Affine(0.5, 0, 100.0, 0, -0.5, 70.0)
    g = _grid(WGS84, t, 80, 150)
    a = _areas(g, chunk=64)
    geod = Geod(ellps="WGS84")
    for r in (0, 63, 64, 127, 128, 149):
        top = 70.0 - 0.5 * r
        ref = geod_cell_area(100.0, top - 0.5, 100.5, top, n=400, geod=geod)
        assert a[r, 17] == pytest.approx(ref, rel=1e-8), r


@pytest.mark.parametrize("epsg", [6933, 3035])
def test_equal_area_projection_gives_the_cell_size(epsg):
    """EPSG:6933 (cylindrical equal area) and EPSG:3035 (Lambert azimuthal equal area): every
    cell's area is |a * e| of the transform; pyproj.Geod on the unprojected cell agrees."""
    crs = CRS.from_epsg(epsg)
    if epsg == 6933:
        t = Affine(25_000.0, 0, 1_000_000.0, 0, -25_000.0, 5_000_000.0)
    else:
        t = Affine(10_000.0, 0, 4_000_000.0, 0, -10_000.0, 3_200_000.0)
    g = _grid(crs.to_wkt(), t, 20, 12)
    a = _areas(g)
    assert np.all(a == abs(t.a * t.e))
    # Source: pyproj.Geod on the projection's ellipsoid, cell (5, 7) densified and unprojected
    to_ll = Transformer.from_crs(crs, crs.geodetic_crs, always_xy=True)
    e = crs.ellipsoid
    geod = Geod(a=e.semi_major_metre, b=e.semi_minor_metre)
    ref = _projected_cell_geod_area(t, 5, 7, to_ll, geod)
    assert a[5, 7] == pytest.approx(ref, rel=1e-6)


def _projected_cell_geod_area(t: Affine, r: int, c: int, to_ll, geod, n: int = 500) -> float:
    s = np.linspace(0.0, 1.0, n, endpoint=False)
    cols = np.concatenate([c + s, np.full(n, c + 1.0), c + 1.0 - s, np.full(n, float(c))])
    rows = np.concatenate([np.full(n, float(r)), r + s, np.full(n, r + 1.0), r + 1.0 - s])
    x = t.c + t.a * cols
    y = t.f + t.e * rows
    lon, lat = to_ll.transform(x, y)
    return abs(geod.polygon_area_perimeter(lon, lat)[0])


def test_web_mercator_cells_match_geodesic_areas():
    """EPSG:3857 is not equal area: each cell gets its own area, close to pyproj.Geod's area of
    the unprojected cell polygon, and cells shrink towards the pole (nominal size overstates)."""
    crs = CRS.from_epsg(3857)
    t = Affine(100_000.0, 0, 0.0, 0, -100_000.0, 8_000_000.0)  # about 58 to 47 deg N over 12 rows
    g = _grid(crs.to_wkt(), t, 5, 12)
    a = _areas(g)
    to_ll = Transformer.from_crs(crs, crs.geodetic_crs, always_xy=True)
    geod = Geod(ellps="WGS84")
    for r, c in ((0, 0), (5, 3), (11, 4)):
        ref = _projected_cell_geod_area(t, r, c, to_ll, geod)
        assert a[r, c] == pytest.approx(ref, rel=1e-5), (r, c)
    # Mercator cells bounded by meridians and parallels: same as the lon/lat rectangle
    lon0, lat_top = to_ll.transform(0.0, 8_000_000.0)
    lon1, lat_bot = to_ll.transform(100_000.0, 7_900_000.0)
    assert a[0, 0] == pytest.approx(geod_cell_area(lon0, lat_bot, lon1, lat_top, n=2000), rel=1e-5)
    assert np.all(np.diff(a[:, 0]) > 0)  # further south, larger true area
    assert a.max() < abs(t.a * t.e)
