"""Chunking, compute back ends, misaligned layers and laziness of the projection.

- the chunk size changes how the work is cut, never the result: byte-identical GeoTIFFs and
  identical tables for chunk = 64, 128 and 1024;
- a 2-worker dask.distributed cluster on loopback writes the same bytes as the threads;
- a future layer on a coarser grid or shifted by half a cell is warped onto the template grid;
  bilinear interpolation reproduces a linear field exactly (a property of the interpolant,
  Source: bilinear interpolation is exact for functions linear in x and y), so interior cells
  are checked against the hand formula;
- projecting builds a dask graph and reads nothing until the writers compute.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import dask
import dask.array as da
import numpy as np
import pytest
import rasterio
from dask.callbacks import Callback
from projection_helpers import (
    SmallCase,
    cli,
    config_text,
    factor_entry,
    model_document,
    read_code,
    read_float,
    subprocess_cli,
    write_json,
    write_survey,
    write_tif,
)


def _files(root: Path) -> dict[str, bytes]:
    return {str(p.relative_to(root)): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}


def _project(cfg: Path, model: Path, out: Path, *extra: str) -> Path:
    res = cli(["project", cfg, "--model", model, "--out", out, *extra])
    assert res.exit_code == 0, (res.stderr, res.exception)
    return out


@pytest.fixture(scope="module")
def small(tmp_path_factory) -> SmallCase:
    return SmallCase(tmp_path_factory.mktemp("small"), ny=150, nx=200)


@pytest.fixture(scope="module")
def by_chunk(small, tmp_path_factory) -> dict[int, Path]:
    root = tmp_path_factory.mktemp("chunks")
    return {c: _project(small.config(f"chunk{c}.toml", projection={"chunk": c}), small.model, root / f"c{c}")
            for c in (64, 128, 1024)}


def test_chunk_size_gives_identical_geotiffs(by_chunk):
    ref = by_chunk[1024]
    tifs = sorted(p.relative_to(ref) for p in ref.rglob("*.tif"))
    from ceiling.outputs.names import ENSEMBLE_LAYERS, FUTURE_LAYERS, PRESENT_LAYERS

    # 2 species; 2 futures of one scenario and period, so one ensemble
    assert len(tifs) == 2 * (len(PRESENT_LAYERS) + 2 * len(FUTURE_LAYERS) + len(ENSEMBLE_LAYERS))
    for c in (64, 128):
        for rel in tifs:
            a, b = ref / rel, by_chunk[c] / rel
            with rasterio.open(a) as sa, rasterio.open(b) as sb:
                np.testing.assert_array_equal(sa.read(1), sb.read(1), err_msg=f"chunk {c}: {rel}")
            assert hashlib.sha256(a.read_bytes()).digest() == hashlib.sha256(b.read_bytes()).digest(), f"chunk {c}: {rel}"


def test_chunk_size_gives_identical_tables_and_sidecars(by_chunk):
    ref = _files(by_chunk[1024])
    for c in (64, 128):
        other = _files(by_chunk[c])
        for name in ("summary.csv", "transitions.csv"):
            assert other[name] == ref[name], f"chunk {c}: {name}"
        sidecars = [k for k in ref if k.endswith(".aux.xml")]
        assert sidecars
        for k in sidecars:
            assert other[k] == ref[k], k


def test_chunk_size_gives_identical_netcdf_values(by_chunk):
    """The NetCDF's decoded values do not depend on the chunk size (its byte layout may: HDF5
    places compressed chunks in the order they are written)."""
    import netCDF4

    with netCDF4.Dataset(by_chunk[1024] / "ceiling.nc") as ref, netCDF4.Dataset(by_chunk[64] / "ceiling.nc") as other:
        ref.set_auto_mask(False)
        other.set_auto_mask(False)
        for name in ("ceiling_present", "limiting_present", "ceiling", "change", "change_pct", "limiting", "zone",
                     "switch", "cell_area"):
            a, b = ref[name][:], other[name][:]
            assert a.shape == b.shape
            np.testing.assert_array_equal(a, b, err_msg=name)


def test_chunked_run_covers_the_whole_grid(by_chunk, small):
    """With chunk 64 the 150 x 200 grid is cut into 3 x 4 uneven chunks; every valid cell is
    written (no chunk lost at the ragged edges)."""
    c = read_float(by_chunk[64] / "sp1" / "present" / "ceiling.tif")
    valid = ~np.isnan(small.present["temp"]) & ~np.isnan(small.present["rain"])
    np.testing.assert_array_equal(~np.isnan(c), valid)
    z = read_code(by_chunk[64] / "sp2" / "s1" / "m1" / "p1" / "zone.tif")
    np.testing.assert_array_equal(z != 255, valid)


def test_invalid_chunk_is_refused(small, tmp_path):
    out = tmp_path / "out"
    res = cli(["project", small.config("bad_chunk.toml", projection={"chunk": 100}), "--model", small.model, "--out", out])
    assert res.exit_code == 2
    assert "multiple of 16" in res.stderr and "chunk" in res.stderr
    assert not out.exists()


def test_local_cluster_gives_the_same_bytes_as_threads(tmp_path):
    pytest.importorskip("distributed", reason="dask.distributed is not installed")
    case = SmallCase(tmp_path / "case", ny=80, nx=100, futures=1)
    cfg = case.config(projection={"chunk": 64})
    threads = _project(cfg, case.model, tmp_path / "threads", "--threads", "2")
    cluster = tmp_path / "cluster"
    # a separate process with a deadline: a hung cluster fails the test instead of the suite
    res = subprocess_cli(["project", cfg, "--model", case.model, "--out", cluster, "--workers", "2"], timeout=240)
    assert res.returncode == 0, res.stderr
    assert "local-cluster (2 workers)" in res.stdout
    a, b = _files(threads), _files(cluster)
    tifs = [k for k in a if k.endswith(".tif")]
    from ceiling.outputs.names import FUTURE_LAYERS, PRESENT_LAYERS

    assert len(tifs) == 2 * (len(PRESENT_LAYERS) + len(FUTURE_LAYERS))
    for k in tifs:
        assert a[k] == b[k], k
    for k in ("summary.csv", "transitions.csv"):
        assert a[k] == b[k], k


# --- misaligned future layers ----------------------------------------------------------------------

W, N, C, NY, NX = 10.0, 50.0, 0.1, 40, 60


def _temp(lon, lat):
    return 2.0 + 3.0 * (lon - W) + 2.0 * (N - lat)  # degC, linear in lon and lat


def _rain(lon, lat):
    return 600.0 + 100.0 * (N - lat) + 50.0 * (lon - W)  # mm year-1, linear


def _centres(west, north, cell, ny, nx):
    lon = west + cell * (np.arange(nx) + 0.5)
    lat = north - cell * (np.arange(ny) + 0.5)
    return np.meshgrid(lon, lat)


# model with outside = "extend": eta_T = 60 - 2 T, eta_R = 50 - 50 ((R - 1000) / 500)^2
TEMP = factor_entry("temp", "linear", 10.0, 10.0, [40.0, -20.0], (-5.0, 40.0), "degC", peak=70.0)
RAIN = factor_entry("rain", "quadratic", 1000.0, 500.0, [50.0, 0.0, -50.0], (200.0, 2000.0), "mm year-1", peak=50.0)


def _ceiling(t, r):
    ct = np.maximum(60.0 - 2.0 * t, 0.0)
    cr = np.maximum(50.0 - 50.0 * ((r - 1000.0) / 500.0) ** 2, 0.0)
    return np.minimum(ct, cr)


@pytest.fixture(scope="module")
def misaligned(tmp_path_factory):
    root = tmp_path_factory.mktemp("misaligned")
    d = root / "data"
    lon, lat = _centres(W, N, C, NY, NX)
    write_tif(d / "present" / "temp.tif", _temp(lon, lat), west=W, north=N, cell=C, units="degC")
    write_tif(d / "present" / "rain.tif", _rain(lon, lat), west=W, north=N, cell=C, units="mm year-1")
    # temp: a grid of twice the cell size over the same extent
    clon, clat = _centres(W, N, 2 * C, NY // 2, NX // 2)
    write_tif(d / "future" / "temp_coarse.tif", _temp(clon, clat) + 1.0, west=W, north=N, cell=2 * C, units="degC")
    # rain: the template's cell size, shifted by half a cell east and south
    slon, slat = _centres(W + C / 2, N - C / 2, C, NY, NX)
    write_tif(d / "future" / "rain_shifted.tif", 0.9 * _rain(slon, slat), west=W + C / 2, north=N - C / 2, cell=C,
              units="mm year-1")
    model = write_json(d / "model.json", model_document({"sp1": [TEMP, RAIN]}, outside="extend"))
    cfg = d / "mis.toml"
    cfg.write_text(config_text(
        survey=write_survey(d / "survey.csv"),
        factors=[{"name": "temp", "layer": d / "present" / "temp.tif"}, {"name": "rain", "layer": d / "present" / "rain.tif"}],
        futures=[{"scenario": "s", "model": "warped", "period": "p",
                  "layers": {"temp": d / "future" / "temp_coarse.tif", "rain": d / "future" / "rain_shifted.tif"}}],
        projection={"chunk": 64, "resampling": "bilinear"}), encoding="utf-8")
    out = _project(cfg, model, root / "out")
    return {"out": out, "template": d / "present" / "temp.tif", "lon": lon, "lat": lat}


def test_misaligned_outputs_keep_the_template_grid(misaligned):
    with rasterio.open(misaligned["template"]) as t:
        crs, transform, shape = t.crs, t.transform, (t.height, t.width)
    for p in sorted((misaligned["out"] / "sp1").rglob("*.tif")):
        with rasterio.open(p) as src:
            assert src.crs == crs and src.transform == transform and (src.height, src.width) == shape, p


def test_coarse_and_shifted_layers_are_interpolated_bilinearly(misaligned):
    lon, lat = misaligned["lon"], misaligned["lat"]
    fut = read_float(misaligned["out"] / "sp1" / "s" / "warped" / "p" / "ceiling.tif")
    expected = _ceiling(_temp(lon, lat) + 1.0, 0.9 * _rain(lon, lat))
    inner = (slice(2, NY - 2), slice(2, NX - 2))  # away from the edges of the coarse / shifted grids
    got, exp = fut[inner], expected[inner]
    assert np.isfinite(got).all()
    # float32 inputs and GDAL's float32 warp: about 1e-4 on values up to 50
    np.testing.assert_allclose(got, exp, rtol=0, atol=2e-3)
    assert np.ptp(exp) > 10  # the field varies: a constant would pass trivially
    # the present, read directly, is exact to float32
    pres = read_float(misaligned["out"] / "sp1" / "present" / "ceiling.tif")
    np.testing.assert_allclose(pres, _ceiling(_temp(lon, lat), _rain(lon, lat)), rtol=0, atol=2e-4)


# --- laziness ------------------------------------------------------------------------------------------

class _Count(Callback):
    def __init__(self):
        super().__init__()
        self.tasks = 0

    def _pretask(self, key, dsk, state):
        self.tasks += 1


def _no_compute(*args, **kwargs):
    raise AssertionError("something computed while the graph was being built")


def test_projection_builds_a_graph_without_reading(small, monkeypatch):
    from ceiling.config import load_config
    from ceiling.grids import BlockReader, template_grid
    from ceiling.model import load_models
    from ceiling.projection import compare, model_units, open_climate, project
    from ceiling.scenarios import climates, projection_options

    reads: list[tuple[int, int]] = []
    original = BlockReader.__getitem__

    def counting(self, key):
        out = original(self, key)
        reads.append(out.shape)
        return out

    monkeypatch.setattr(BlockReader, "__getitem__", counting)
    cfg = load_config(small.config("lazy.toml", projection={"chunk": 64}))
    models = list(load_models(small.model))
    opts = projection_options(cfg)
    cl = climates(cfg)
    units = model_units(models, ["temp", "rain"])
    grid = template_grid(cl[0].layers["temp"], factor="temp")
    counter = _Count()
    with dask.config.set(scheduler=_no_compute), counter:
        now = project(models, open_climate(cl[0], grid, ["temp", "rain"], units, opts))
        later = project(models, open_climate(cl[1], grid, ["temp", "rain"], units, opts))
        cmp = compare(now, later, n_factors=[2, 2], opts=opts)
    assert counter.tasks == 0 and reads == []
    for ds, names in ((now, ("ceiling", "limiting")), (cmp, ("change", "change_pct", "zone", "switch"))):
        for n in names:
            assert isinstance(ds[n].data, da.Array), n
            assert ds[n].shape == (2, small.ny, small.nx)
            assert ds[n].data.chunksize[1:] == (64, 64)
    # computing one chunk reads one chunk of each layer, no more
    with _Count() as c2:
        block = cmp["zone"].data[:, :64, :64].compute(scheduler="synchronous")
    assert c2.tasks > 0 and block.shape == (2, 64, 64)
    assert reads and max(h * w for h, w in reads) <= 64 * 64


def test_a_whole_run_reads_chunk_by_chunk(small, monkeypatch, tmp_path):
    """No read during a run loads more than one chunk of a layer (memory bounded by chunks)."""
    from ceiling.grids import BlockReader

    shapes: list[tuple[int, int]] = []
    original = BlockReader.__getitem__

    def recording(self, key):
        out = original(self, key)
        shapes.append(out.shape)
        return out

    monkeypatch.setattr(BlockReader, "__getitem__", recording)
    _project(small.config("whole.toml", projection={"chunk": 64}), small.model, tmp_path / "out", "--threads", "2")
    assert len(shapes) > 3 * 4 * 2  # at least every chunk of both factors of the present
    assert max(h for h, w in shapes) <= 64 and max(w for h, w in shapes) <= 64
