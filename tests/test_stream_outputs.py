"""Map files written from chunks (ceiling.outputs.stream) and NetCDF chunks written directly
(ceiling.outputs.netcdf), against GDAL and netCDF4 as outside references.

- Overviews computed by the chunk tasks must equal the ones GDAL's COG driver computes itself
  from the same map (AVERAGE for values, NEAREST for categories).
- The COG must be valid (rio-cogeo's validator) and carry nodata, description, units, colour
  table and tags.
- HDF5 chunks encoded by the tasks and stored with direct chunk writes must read back through
  netCDF4 (the netCDF-C library) as the values written, and be exactly the zlib stream of HDF5's
  shuffle layout, the same bytes every time.
"""

from __future__ import annotations

from pathlib import Path

import netCDF4
import numpy as np
import pytest
import rasterio
import rasterio.shutil
from rasterio.transform import from_origin

from ceiling.categories import ZONES
from ceiling.grids import GridSpec
from ceiling.outputs.geotiff import FLOAT_NODATA, cog_block
from ceiling.outputs.netcdf import NetcdfVariable, create_netcdf, encode_chunk
from ceiling.outputs.stream import MapStream, decimate, overview_levels, to_disk
from ceiling.tasks import chunk_windows

CHUNK = 256


def _grid(h: int, w: int) -> GridSpec:
    return GridSpec(rasterio.crs.CRS.from_epsg(4326).to_wkt(), tuple(from_origin(10.0, 50.0, 0.01, 0.01))[:6], w, h)


def _map(h: int, w: int, *, categorical: bool, seed: int = 1) -> np.ndarray:
    rng = np.random.default_rng(seed)
    if categorical:
        a = rng.integers(0, 6, (h, w)).astype(np.uint8)
        a[rng.uniform(size=(h, w)) < 0.1] = 255
        return a
    yy, xx = np.mgrid[0:h, 0:w]
    a = (np.sin(xx / 37.0) * 20 + yy / 9.0 + rng.normal(0, 1, (h, w))).astype(np.float32)
    a[rng.uniform(size=(h, w)) < 0.1] = np.nan
    a[100:180, 300:420] = np.nan  # whole blocks of nodata
    return a


def _stream(tmp: Path, a: np.ndarray, *, categorical: bool) -> Path:
    g = _grid(*a.shape)
    dtype = "uint8" if categorical else "float32"
    levels = overview_levels(g.width, g.height, CHUNK)
    s = MapStream(tmp / "map.tif", g, dtype, "a map", "" if categorical else "1", CHUNK,
                  ZONES if categorical else None, {"layer": "test"}, levels)
    for rows, cols in chunk_windows(g, CHUNK):
        block = a[rows, cols]
        s.write(rows, cols, to_disk(block, dtype), decimate(block, levels, categorical=categorical))
    return s.finalize()[0]


def _gdal_cog(tmp: Path, a: np.ndarray, *, categorical: bool) -> Path:
    """The same map made into a COG by GDAL alone, which computes the overviews itself."""
    g = _grid(*a.shape)
    nodata = 255 if categorical else FLOAT_NODATA
    plain = tmp / "plain.tif"
    with rasterio.open(plain, "w", driver="GTiff", width=g.width, height=g.height, count=1, dtype=a.dtype, crs=g.crs,
                       transform=g.affine, nodata=nodata, tiled=True) as dst:
        dst.write(to_disk(a, "uint8" if categorical else "float32"), 1)
    out = tmp / "gdal.tif"
    rasterio.shutil.copy(str(plain), str(out), driver="COG", COMPRESS="DEFLATE", PREDICTOR="YES",
                         OVERVIEW_RESAMPLING="NEAREST" if categorical else "AVERAGE",
                         BLOCKSIZE=cog_block(g.width, g.height))
    return out


@pytest.mark.parametrize("categorical", [False, True])
def test_overviews_equal_gdals_own(tmp_path, categorical):
    # 1100 x 1300 with chunks of 256: odd edges and partial chunks at the right and bottom
    a = _map(1100, 1300, categorical=categorical)
    ours = _stream(tmp_path, a, categorical=categorical)
    ref = _gdal_cog(tmp_path, a, categorical=categorical)
    with rasterio.open(ours) as s1, rasterio.open(ref) as s2:
        assert s1.overviews(1) == s2.overviews(1) == [2, 4]
        np.testing.assert_array_equal(s1.read(1), s2.read(1))
        for i, f in enumerate(s1.overviews(1)):
            with rasterio.open(ours, overview_level=i) as o1, rasterio.open(ref, overview_level=i) as o2:
                x, y = o1.read(1, masked=True), o2.read(1, masked=True)
                assert x.shape == y.shape
                np.testing.assert_array_equal(np.ma.getmaskarray(x), np.ma.getmaskarray(y), err_msg=f"level {f}")
                # Source: GDAL's AVERAGE (mean of the valid cells of each block) and NEAREST
                np.testing.assert_allclose(x.compressed(), y.compressed(), rtol=2e-7, err_msg=f"level {f}")


def test_stream_cog_is_valid_and_keeps_its_metadata(tmp_path):
    pytest.importorskip("rio_cogeo")
    from rio_cogeo.cogeo import cog_validate

    a = _map(700, 900, categorical=True)
    path = _stream(tmp_path, a, categorical=True)
    valid, errors, _ = cog_validate(str(path))
    assert valid, errors
    with rasterio.open(path) as src:
        assert src.nodata == 255 and src.descriptions == ("a map",)
        assert src.tags()["layer"] == "test"
        assert src.colormap(1)[1][:3] == tuple(int(ZONES[1].colour[i:i + 2], 16) for i in (1, 3, 5))
        assert src.profile["compress"] == "deflate"
    assert (tmp_path / "map.tif.aux.xml").is_file()
    assert not list(tmp_path.glob(".stream-*")), "the stream files are removed"


def test_direct_netcdf_chunks_read_back_through_netcdf4(tmp_path):
    h, w = 300, 520
    g = _grid(h, w)
    a = _map(h, w, categorical=False)
    c = _map(h, w, categorical=True, seed=2)
    variables = [NetcdfVariable("ceiling", "a map", "1", None, False),
                 NetcdfVariable("zone", "zones", "", ZONES, False),
                 NetcdfVariable("ceiling_present", "present", "1", None, True)]
    nc = create_netcdf(tmp_path / "x.nc", grid=g, species=["sp"], futures=[("s", "m", "p"), ("s", "m", "q")],
                       variables=variables, attrs={}, chunk=CHUNK)
    ch, cw = nc.chunk_shape
    nc.write_areas(lambda r, cc: np.full((r.stop - r.start, cc.stop - cc.start), 7.0))
    for name, lead, arr, fill in (("ceiling", (0, 1), a, np.float32(FLOAT_NODATA)), ("zone", (0, 0), c, np.uint8(255)),
                                  ("ceiling_present", (0,), a, np.float32(FLOAT_NODATA))):
        stored = to_disk(arr, "float32" if arr.dtype == np.float32 else "uint8")
        for r0 in range(0, h, ch):
            for c0 in range(0, w, cw):
                nc.write(name, lead, r0, c0, encode_chunk(stored[r0:r0 + ch, c0:c0 + cw], (ch, cw), fill))
    path = nc.close()
    with netCDF4.Dataset(path) as ds:
        np.testing.assert_array_equal(np.ma.filled(ds["ceiling"][0, 1], np.nan), a)
        np.testing.assert_array_equal(np.ma.filled(ds["ceiling_present"][0], np.nan), a)
        np.testing.assert_array_equal(np.ma.filled(ds["zone"][0, 0].astype(np.int16), 255), c)
        assert ds["zone"][0, 1].mask.all(), "chunks never written read as the fill value"
        assert np.all(ds["cell_area"][:] == 7.0)
        assert ds["ceiling"].filters()["shuffle"] and ds["ceiling"].filters()["zlib"]


def test_encoded_chunk_is_a_zlib_stream_of_the_hdf5_shuffle_layout_and_repeats_exactly():
    """The chunk bytes are what HDF5's filters would store: a zlib stream (RFC 1950, decoded here by
    Python's zlib) of the byte-shuffled block (HDF5 shuffle filter, H5Z_FILTER_SHUFFLE: byte k of
    every element together, k = 0, 1, ...), padded to the chunk shape with the fill value; and the
    same block gives the same bytes every time, also from threads at once (repeated and resumed
    runs must write identical NetCDF files)."""
    import zlib
    from concurrent.futures import ThreadPoolExecutor

    a = to_disk(_map(200, 230, categorical=False), "float32")
    fill = np.float32(FLOAT_NODATA)
    got = encode_chunk(a, (256, 256), fill)
    full = np.full((256, 256), fill, dtype=np.float32)
    full[:200, :230] = a
    as_bytes = full.tobytes()
    shuffled = b"".join(as_bytes[k::4] for k in range(4))
    assert zlib.decompress(got) == shuffled
    with ThreadPoolExecutor(2) as pool:
        again = list(pool.map(lambda _: encode_chunk(a, (256, 256), fill), range(16)))
    assert all(b == got for b in again)
