"""Units of climate layers: K / precipitation flux give the same ceilings as degC / mm per year.

Source for the conversions: the CF conventions take units from UDUNITS-2
(Unidata/UDUNITS-2, lib/udunits2-common.xml and udunits2-base.xml / -derived.xml):
- degC is K with an offset: value_degC = value_K - 273.15;
- "year" (and "yr") is the tropical year, 3.15569259747e7 s (udunits2-common.xml, Time section);
- a precipitation flux in kg m-2 s-1 becomes a water depth rate through the density of liquid
  water, 1000 kg m-3 (CF standard name precipitation_flux; 1 kg m-2 of water is 1 mm deep).
"""

from __future__ import annotations

import netCDF4
import numpy as np
import pyproj
import pytest
import rasterio
from projection_helpers import (
    NODATA,
    assert_refused,
    cli,
    config_text,
    factor_entry,
    model_document,
    read_float,
    write_json,
    write_survey,
    write_tif,
)

from ceiling.grids import open_layer, template_grid
from ceiling.scenarios import LayerRef
from ceiling.units import linear_conversion

UDUNITS_YEAR_S = 3.15569259747e7  # Source: UDUNITS-2 udunits2-common.xml, "year" = tropical year
KELVIN_OFFSET = 273.15  # Source: UDUNITS-2 / SI, degC = K - 273.15
WATER_KG_PER_M2_PER_MM = 1.0  # Source: 1000 kg m-3 * 0.001 m = 1 kg m-2 per mm of water

WEST, NORTH, CELL, NY, NX = 150.0, -30.0, 0.25, 10, 12

# temp: linear, ceiling 60 - 2 T (slope -2 per degC); rain: quadratic around 1000 mm,
# 50 - 50 ((R - 1000) / 500)^2 (slope up to 0.2 per mm): both steep enough that a wrong
# offset or a wrong year length shows in the ceiling.
TEMP = factor_entry("temp", "linear", 10.0, 10.0, [40.0, -20.0], (-5.0, 40.0), "degC", peak=70.0)
RAIN = factor_entry("rain", "quadratic", 1000.0, 500.0, [50.0, 0.0, -50.0], (200.0, 2000.0), "mm year-1", peak=50.0)


def _fields():
    rows = np.arange(NY)[:, None]
    cols = np.arange(NX)[None, :]
    t = 5.0 + 1.7 * cols + 0.9 * rows + 0.123
    r = 600.0 + 55.0 * cols + 31.0 * rows + 0.37
    t[0, 0] = np.nan  # a nodata cell
    r[NY - 1, 3] = np.nan
    return t, r


def _write_nc(path, temp_k, flux):
    lat = NORTH - CELL * (np.arange(NY) + 0.5)
    lon = WEST + CELL * (np.arange(NX) + 0.5)
    path.parent.mkdir(parents=True, exist_ok=True)
    with netCDF4.Dataset(path, "w", format="NETCDF4") as nc:
        nc.Conventions = "CF-1.10"
        nc.createDimension("lat", NY)
        nc.createDimension("lon", NX)
        for name, values, std, units in (("lat", lat, "latitude", "degrees_north"), ("lon", lon, "longitude", "degrees_east")):
            v = nc.createVariable(name, "f8", (name,))
            v.setncatts({"standard_name": std, "units": units})
            v[:] = values
        crs = nc.createVariable("crs", "i4")
        crs.setncatts({"grid_mapping_name": "latitude_longitude", "semi_major_axis": 6378137.0,
                       "inverse_flattening": 298.257223563, "crs_wkt": pyproj.CRS.from_epsg(4326).to_wkt()})
        for name, values, units, std in (("temp", temp_k, "K", "air_temperature"),
                                         ("rain", flux, "kg m-2 s-1", "precipitation_flux")):
            v = nc.createVariable(name, "f4", ("lat", "lon"), fill_value=np.float32(NODATA))
            v.setncatts({"units": units, "standard_name": std, "grid_mapping": "crs"})
            v[:] = np.ma.masked_invalid(values.astype("float32"))
    return path


@pytest.fixture(scope="module")
def units_case(tmp_path_factory):
    root = tmp_path_factory.mktemp("units")
    d = root / "data"
    kw = dict(west=WEST, north=NORTH, cell=CELL)
    t, r = _fields()
    write_tif(d / "present" / "temp.tif", t, units="degC", **kw)
    write_tif(d / "present" / "rain.tif", r, units="mm year-1", **kw)
    ft, fr = t + 1.5, r * 0.9  # the future, in the model's units
    write_tif(d / "f1" / "temp.tif", ft, units="degC", **kw)
    write_tif(d / "f1" / "rain.tif", fr, units="mm year-1", **kw)
    # the same future in K and as a mass flux (mm per UDUNITS year -> kg m-2 s-1)
    kelvin = ft + KELVIN_OFFSET
    flux = fr * WATER_KG_PER_M2_PER_MM / UDUNITS_YEAR_S
    _write_nc(d / "f2" / "climate.nc", kelvin, flux)
    write_tif(d / "f3" / "temp.tif", kelvin, units=None, **kw)  # units only in the config
    write_tif(d / "f3" / "rain.tif", flux, units=None, **kw)
    text = config_text(
        survey=write_survey(d / "survey.csv"),
        factors=[{"name": "temp", "layer": d / "present" / "temp.tif", "basis": "linear"},
                 {"name": "rain", "layer": d / "present" / "rain.tif", "basis": "quadratic"}],
        futures=[
            {"scenario": "s", "model": "celsius", "period": "p", "layers": {"temp": d / "f1" / "temp.tif", "rain": d / "f1" / "rain.tif"}},
            {"scenario": "s", "model": "netcdf", "period": "p",
             "layers": {"temp": {"path": d / "f2" / "climate.nc", "variable": "temp"},
                        "rain": {"path": d / "f2" / "climate.nc", "variable": "rain"}}},
            {"scenario": "s", "model": "geotiff", "period": "p", "layers": {"temp": d / "f3" / "temp.tif", "rain": d / "f3" / "rain.tif"},
             "units": {"temp": "K", "rain": "kg m-2 s-1"}},
        ],
        projection={"chunk": 64},
    )
    cfg = d / "units.toml"
    cfg.write_text(text, encoding="utf-8")
    model = write_json(d / "model.json", model_document({"sp1": [TEMP, RAIN]}, outside="extend"))
    out = root / "out"
    res = cli(["project", cfg, "--model", model, "--out", out])
    assert res.exit_code == 0, (res.stderr, res.exception)
    return {"root": root, "data": d, "out": out, "cfg": cfg, "model": model, "text": text}


def test_conversion_factors_follow_udunits():
    assert linear_conversion("K", "degC", where="t") == pytest.approx((1.0, -KELVIN_OFFSET), rel=1e-15)
    assert linear_conversion("degC", "K", where="t") == pytest.approx((1.0, KELVIN_OFFSET), rel=1e-15)
    scale, offset = linear_conversion("kg m-2 s-1", "mm year-1", where="t")
    assert offset == 0.0
    assert scale == pytest.approx(UDUNITS_YEAR_S / WATER_KG_PER_M2_PER_MM, rel=1e-12)
    # a day is 86400 s in UDUNITS; mm per day to mm per (tropical) year
    assert linear_conversion("mm day-1", "mm year-1", where="t")[0] == pytest.approx(UDUNITS_YEAR_S / 86400.0, rel=1e-12)


def test_kelvin_and_flux_layers_convert_on_reading(units_case):
    d = units_case["data"]
    grid = template_grid(LayerRef(d / "present" / "temp.tif"), factor="temp")
    t, r = _fields()
    ft, fr = t + 1.5, r * 0.9
    for ref_t, ref_r in (
        (LayerRef(d / "f2" / "climate.nc", "temp"), LayerRef(d / "f2" / "climate.nc", "rain")),
        (LayerRef(d / "f3" / "temp.tif", None, "K"), LayerRef(d / "f3" / "rain.tif", None, "kg m-2 s-1")),
    ):
        gt = open_layer(ref_t, grid, factor="temp", units="degC", chunk=64).values.astype(np.float64)
        gr = open_layer(ref_r, grid, factor="rain", units="mm year-1", chunk=64).values.astype(np.float64)
        np.testing.assert_array_equal(np.isnan(gt), np.isnan(ft))
        np.testing.assert_array_equal(np.isnan(gr), np.isnan(fr))
        ok_t, ok_r = ~np.isnan(ft), ~np.isnan(fr)
        # float32 storage of ~300 K: spacing 3.05e-5 K
        np.testing.assert_allclose(gt[ok_t], ft[ok_t], rtol=0, atol=float(np.spacing(np.float32(330.0))))
        # the flux is a float32 of the exact value: a few float32 ulps, far below the 2.1e-5
        # a Julian instead of a tropical year would make
        np.testing.assert_allclose(gr[ok_r], fr[ok_r], rtol=3e-7)


def test_ceilings_match_the_degc_future(units_case):
    base = units_case["out"] / "sp1" / "s"
    c1 = read_float(base / "celsius" / "p" / "ceiling.tif")
    assert np.isfinite(c1).sum() > 100 and np.nanmax(c1) > 10
    # tolerance from float32 rounding of the inputs: |dC/dT| * spacing(330 K) + |dC/dR| * R * 2^-23 * 2,
    # plus float32 spacing of the ceiling itself
    tol = 2.0 * float(np.spacing(np.float32(330.0))) + 0.2 * 2000.0 * 2.0 ** -22 + float(np.spacing(np.float32(64.0)))
    for name in ("netcdf", "geotiff"):
        c = read_float(base / name / "p" / "ceiling.tif")
        np.testing.assert_array_equal(np.isnan(c), np.isnan(c1), err_msg=name)
        ok = np.isfinite(c1)
        np.testing.assert_allclose(c[ok], c1[ok], rtol=0, atol=tol, err_msg=name)


def _refuse_units(units_case, tmp_path, *, temp_units: str | None, keywords: tuple[str, ...]):
    d = units_case["data"]
    t, _ = _fields()
    bad = write_tif(tmp_path / "bad" / "temp.tif", t + 1.0, west=WEST, north=NORTH, cell=CELL, units=temp_units)
    text = units_case["text"].replace((d / "f1" / "temp.tif").as_posix(), bad.as_posix())
    cfg = tmp_path / "bad.toml"
    cfg.write_text(text, encoding="utf-8")
    out = tmp_path / "out"
    res = cli(["project", cfg, "--model", units_case["model"], "--out", out])
    return assert_refused(res.exit_code, res.stderr, out, *keywords, exc=res.exception)


def test_incompatible_units_are_refused(units_case, tmp_path):
    line = _refuse_units(units_case, tmp_path, temp_units="m", keywords=("temp", "'m'", "degC", "bad/temp.tif"))
    assert "units" in line


def test_missing_units_are_refused(units_case, tmp_path):
    line = _refuse_units(units_case, tmp_path, temp_units=None, keywords=("temp", "no units", "bad/temp.tif"))
    assert "config" in line  # says where to set them


def test_unknown_units_string_is_refused(units_case, tmp_path):
    _refuse_units(units_case, tmp_path, temp_units="degrees_bogus", keywords=("temp", "degrees_bogus", "not recognised"))


# --- packed layers (CF scale_factor / add_offset; GDAL band scale / offset) ---------------------------
# Source: CF conventions 1.10, section 8.1 "Packed Data": unpacked = packed * scale_factor + add_offset.
# GDAL reports the packing as band scale / offset and returns the stored values, so the reader
# must unpack them (gdalinfo shows "Offset: ..., Scale: ...").

def _hand_ceiling(t, r):
    # the model above, outside = "extend": min(max(60 - 2 T, 0), max(50 - 50 ((R - 1000) / 500)^2, 0))
    return np.minimum(np.maximum(60.0 - 2.0 * t, 0.0), np.maximum(50.0 - 50.0 * ((r - 1000.0) / 500.0) ** 2, 0.0))


def _write_packed_tif(path, stored, *, scale, offset, units, nodata):
    path.parent.mkdir(parents=True, exist_ok=True)
    from affine import Affine

    with rasterio.open(path, "w", driver="GTiff", width=NX, height=NY, count=1, dtype=stored.dtype.name, crs="EPSG:4326",
                       transform=Affine(CELL, 0, WEST, 0, -CELL, NORTH), nodata=nodata) as dst:
        dst.write(stored, 1)
        dst.scales = (scale,)
        dst.offsets = (offset,)
        dst.units = (units,)
    return path


def test_packed_layers_are_unpacked(tmp_path):
    t, r = _fields()
    d = tmp_path / "data"
    # present temp stored as uint16 tenths of a kelvin, read as degC: degC = stored * 0.1 - 273.15
    stored_now = np.where(np.isnan(t), 0, np.round((t + 273.15) * 10.0)).astype(np.uint16)
    _write_packed_tif(d / "temp_now.tif", stored_now, scale=0.1, offset=-273.15, units="degC", nodata=0)
    write_tif(d / "rain_now.tif", r, west=WEST, north=NORTH, cell=CELL, units="mm year-1")
    # future temp as CF-packed NetCDF int16 in K: K = stored * 0.01 + 273.15
    ft = t + 2.0
    stored_later = np.where(np.isnan(ft), -32767, np.round(ft / 0.01)).astype(np.int16)
    nc = d / "later.nc"
    lat = NORTH - CELL * (np.arange(NY) + 0.5)
    lon = WEST + CELL * (np.arange(NX) + 0.5)
    with netCDF4.Dataset(nc, "w", format="NETCDF4") as ds:
        ds.createDimension("lat", NY)
        ds.createDimension("lon", NX)
        for name, values, std, units in (("lat", lat, "latitude", "degrees_north"), ("lon", lon, "longitude", "degrees_east")):
            v = ds.createVariable(name, "f8", (name,))
            v.setncatts({"standard_name": std, "units": units})
            v[:] = values
        crs = ds.createVariable("crs", "i4")
        crs.setncatts({"grid_mapping_name": "latitude_longitude", "semi_major_axis": 6378137.0,
                       "inverse_flattening": 298.257223563})
        v = ds.createVariable("temp", "i2", ("lat", "lon"), fill_value=np.int16(-32767))
        v.set_auto_maskandscale(False)
        v.setncatts({"units": "K", "scale_factor": 0.01, "add_offset": 273.15, "grid_mapping": "crs"})
        v[:] = stored_later
    write_tif(d / "rain_later.tif", r, west=WEST, north=NORTH, cell=CELL, units="mm year-1")
    cfg = d / "packed.toml"
    cfg.write_text(config_text(
        survey=write_survey(d / "survey.csv"),
        factors=[{"name": "temp", "layer": d / "temp_now.tif"}, {"name": "rain", "layer": d / "rain_now.tif"}],
        futures=[{"scenario": "s", "model": "packed", "period": "p",
                  "layers": {"temp": {"path": nc, "variable": "temp"}, "rain": d / "rain_later.tif"}}],
        projection={"chunk": 64}), encoding="utf-8")
    model = write_json(d / "model.json", model_document({"sp1": [TEMP, RAIN]}, outside="extend"))
    out = tmp_path / "out"
    res = cli(["project", cfg, "--model", model, "--out", out])
    assert res.exit_code == 0, res.stderr
    t_now = np.where(stored_now == 0, np.nan, stored_now * 0.1 - 273.15)
    t_later = np.where(stored_later == -32767, np.nan, stored_later * 0.01)  # K - 273.15
    r32 = r.astype(np.float32).astype(np.float64)
    for path, temp in ((out / "sp1" / "present" / "ceiling.tif", t_now),
                       (out / "sp1" / "s" / "packed" / "p" / "ceiling.tif", t_later)):
        got = read_float(path)
        exp = _hand_ceiling(temp, r32)
        np.testing.assert_array_equal(np.isnan(got), np.isnan(exp))
        ok = np.isfinite(exp)
        np.testing.assert_allclose(got[ok], exp[ok], rtol=0, atol=1e-4, err_msg=str(path))
    # the fitting stage samples the same unpacked values at points (fit and projection agree)
    from pyproj import CRS

    from ceiling.samples import sample_layer

    lon_c = WEST + CELL * (np.arange(NX) + 0.5)
    lat_c = NORTH - CELL * (np.arange(NY) + 0.5)
    vals, inside, units = sample_layer(d / "temp_now.tif", lon_c[[1, 5, 9]], lat_c[[2, 4, 8]], CRS.from_epsg(4326))
    assert inside.all() and units == "degC"
    np.testing.assert_allclose(vals, t_now[[2, 4, 8], [1, 5, 9]], rtol=0, atol=1e-4)
