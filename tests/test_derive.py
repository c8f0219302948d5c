"""Deriving factor layers from climate-model output (``ceiling derive``), against outside references.

1. Calendars: month lengths of the CF calendars (CF Conventions 1.10, 4.4.1); a flux in
   kg m-2 s-1 to mm per month through each month's days (1 kg of water per m2 is 1 mm: water
   density 1000 kg m-3, the CF convention for precipitation_flux).
2. Potential evapotranspiration: FAO-56 (Allen et al. 1998) Examples 8 and 10 for the
   extraterrestrial radiation, FAO-56 Eq. 52 (Hargreaves) by hand, and an independent
   implementation from PyPI (pyet) on the demo's baseline.
3. Indices: xclim's results on a small series against the formulas computed by hand.
4. The change-factor method: identities that must hold exactly (zero change returns the
   baseline; +2 K raises every temperature factor by 2 K; x1.1 precipitation raises the yearly
   total by 10%), through the whole stage (series files in 0-360 longitudes, noleap and 360_day).
5. Bad input: one-line errors with exit code 2 (missing month, mismatched calendar, unknown
   variable, units that cannot be converted).
"""

from __future__ import annotations

import math

import cftime
import netCDF4
import numpy as np
import pytest
import rasterio
from click.testing import CliRunner
from conftest import DEMO_GRIDS, write_tif
from reference_values import CF_MONTH_DAYS, FAO56_RA

from ceiling.cli.main import cli
from ceiling.config import load_config
from ceiling.derive import derive_to_folder
from ceiling.derive.calendars import days_in_month, month_lengths
from ceiling.derive.indices import INDICES, MonthlyFields, compute_index
from ceiling.derive.pet import MID_MONTH_DAY, hargreaves_monthly, ra_on_days
from ceiling.derive.regrid import Interpolator
from ceiling.errors import DataError


# --- 1. calendars and units ------------------------------------------------------------------------

@pytest.mark.parametrize("calendar,year", list(CF_MONTH_DAYS))
def test_month_lengths_follow_the_cf_calendars(calendar, year):
    assert tuple(month_lengths(calendar, year).astype(int)) == CF_MONTH_DAYS[(calendar, year)]


def _series_file(path, variable, values, *, years, calendar="noleap", lon=(159.0, 160.0, 161.0, 162.0),
                 lat=(-51.0, -50.0, -49.0), units=None, drop=None):
    """A monthly CF series (time, lat, lon) of ``values`` (12 per year, broadcast over the grid)."""
    path.parent.mkdir(parents=True, exist_ok=True)
    months = [(y, m) for y in range(years[0], years[1] + 1) for m in range(1, 13)]
    if drop is not None:
        months.remove(drop)
    vals = np.asarray(values, dtype="float64")
    with netCDF4.Dataset(path, "w") as nc:
        nc.createDimension("time", None)
        nc.createDimension("lat", len(lat))
        nc.createDimension("lon", len(lon))
        t = nc.createVariable("time", "f8", ("time",))
        t.setncatts({"units": "days since 1850-01-01", "calendar": calendar, "standard_name": "time"})
        t[:] = [netCDF4.date2num(cftime.datetime(y, m, 15, calendar=calendar), t.units, calendar=calendar) for y, m in months]
        for name, v, u in (("lat", lat, "degrees_north"), ("lon", lon, "degrees_east")):
            c = nc.createVariable(name, "f8", (name,))
            c.units = u
            c[:] = v
        var = nc.createVariable(variable, "f4", ("time", "lat", "lon"))
        var.units = units or ("kg m-2 s-1" if variable == "pr" else "K")
        data = np.array([vals[(m - 1) % vals.size] if vals.ndim == 1 else vals[i] for i, (_, m) in enumerate(months)])
        var[:] = np.broadcast_to(data[:, None, None], (len(months), len(lat), len(lon)))
    return path


def test_flux_becomes_monthly_totals_through_each_months_days(tmp_path):
    from ceiling.derive.climatology import monthly_climatology
    from ceiling.derive.series import Region, read_series

    region = Region(160.0, 160.8, -50.6, -50.0)
    flux = 1.0e-5  # kg m-2 s-1 = 1e-5 mm s-1 (water: 1 kg m-2 is 1 mm)
    for calendar in ("noleap", "360_day"):
        _series_file(tmp_path / calendar / "pr_1.nc", "pr", [flux], years=(2001, 2002), calendar=calendar)
        s = read_series(str(tmp_path / calendar / "{variable}_*.nc"), "pr", region, (2001, 2002), where="test")
        clim = monthly_climatology(s, (2001, 2002))
        expected = flux * 86400.0 * np.array(CF_MONTH_DAYS[("noleap", 2001)] if calendar == "noleap" else (30,) * 12)
        np.testing.assert_allclose(clim.values[:, 0, 0], expected, rtol=1e-6)  # float32 storage


# --- 2. potential evapotranspiration ----------------------------------------------------------------

def _fao_ra(lat_deg: float, day: int) -> float:
    """FAO-56 Eqs. 21-25 (Allen et al. 1998): extraterrestrial radiation, MJ m-2 day-1."""
    phi = math.radians(lat_deg)
    dr = 1 + 0.033 * math.cos(2 * math.pi * day / 365)
    delta = 0.409 * math.sin(2 * math.pi * day / 365 - 1.39)
    ws = math.acos(-math.tan(phi) * math.tan(delta))
    return 24 * 60 / math.pi * 0.0820 * dr * (ws * math.sin(phi) * math.sin(delta) + math.cos(phi) * math.cos(delta) * math.sin(ws))


def test_extraterrestrial_radiation_matches_fao56_examples():
    got = ra_on_days(np.array([246, 135]), np.array([-20.0, -22.9]))
    for value, ref in zip((got[0, 0], got[1, 1]), (FAO56_RA["example_8"], FAO56_RA["example_10"])):
        assert value == pytest.approx(ref.value, rel=ref.rtol, abs=ref.atol), ref.source


def test_hargreaves_follows_fao56_eq52_by_hand():
    tmax = np.full((12, 1), 31.0)
    tmin = np.full((12, 1), 17.0)
    got = hargreaves_monthly(tmax, tmin, np.array([-20.0]))[:, 0]
    days = month_lengths("noleap", 2001)
    for m in range(12):  # FAO-56 Eq. 52: ET0 = 0.0023 (Tmean + 17.8) (Tmax - Tmin)^0.5 Ra, Ra in mm day-1 (x 0.408)
        by_hand = 0.0023 * (24.0 + 17.8) * math.sqrt(14.0) * 0.408 * _fao_ra(-20.0, int(MID_MONTH_DAY[m])) * days[m]
        assert got[m] == pytest.approx(by_hand, rel=0.01), m


def test_hargreaves_agrees_with_pyet_on_the_demo_baseline():
    """pyet (an independent PET library) on the mid-month days of the demo's baseline cells."""
    pd = pytest.importorskip("pandas")
    pyet = pytest.importorskip("pyet")

    def month(var, m):
        with rasterio.open(DEMO_GRIDS / "baseline" / f"{var}_{m:02d}.tif") as src:
            return src.read(1, masked=True).astype("float64").filled(np.nan), src.transform
    tx = np.stack([month("tasmax", m)[0] for m in range(1, 13)])
    tn = np.stack([month("tasmin", m)[0] for m in range(1, 13)])
    transform = month("tasmax", 1)[1]
    rows, cols = np.nonzero(np.isfinite(tx).all(axis=0))
    pick = np.random.default_rng(0).choice(rows.size, 40, replace=False)
    r, c = rows[pick], cols[pick]
    lat = transform.f + transform.e * (r + 0.5)
    ours = hargreaves_monthly(tx[:, r, c], tn[:, r, c], lat)
    dates = pd.Timestamp("2002-01-01") + pd.to_timedelta(MID_MONTH_DAY - 1, unit="D")
    days = month_lengths("noleap", 2002)
    for k in range(r.size):
        tmax, tmin = pd.Series(tx[:, r[k], c[k]], index=dates), pd.Series(tn[:, r[k], c[k]], index=dates)
        tmean = (tmax + tmin) / 2
        pet = pyet.hargreaves(tmean, tmax, tmin, math.radians(lat[k]), k=0.0135)
        # pyet divides by a latent heat of 2.501 - 0.002361 T MJ kg-1; FAO-56 Eq. 52 by 2.45
        pet_fao = pet.to_numpy() * (2.501 - 0.002361 * tmean.to_numpy()) / 2.45 * days
        # pyet's Ra follows FAO-56 Eqs. 23-24, xclim's a slightly different declination: up to
        # 1.5% apart in a winter month at 44 S, within 0.5% over the year
        np.testing.assert_allclose(ours[:, k], pet_fao, rtol=0.02)
        assert ours[:, k].sum() == pytest.approx(pet_fao.sum(), rel=0.005)


# --- 3. indices: xclim against the formulas by hand ---------------------------------------------

def _small_fields():
    tx = np.array([[25, 24, 22, 18, 14, 11, 10, 11, 14, 17, 20, 23.0]]).T + np.array([[0.0, 3.0, -6.0]])
    tn = tx - np.array([[10.0, 6.0, 12.0]])
    pr = np.array([[100, 80, 60, 40, 20, 10, 5, 10, 30, 50, 70, 90.0]]).T * np.array([[1.0, 0.5, 2.0]])
    pr[0, 2], pr[1, 2], pr[11, 2] = 1.0, 3.0, 2.0  # a dry December-February in the third cell
    return MonthlyFields(tx, tn, pr, None, np.array([-44.0, -30.0, -10.0]))


def test_indices_equal_their_formulas_by_hand():
    f = _small_fields()
    tas = (f.tasmax + f.tasmin) / 2
    circ = np.concatenate([f.pr, f.pr[:2]])  # three months in a row, across the year's end
    quarters = circ[:-2] + circ[1:-1] + circ[2:]
    expected = {
        "warmest_month_tmax": f.tasmax.max(axis=0),
        "coldest_month_tmin": f.tasmin.min(axis=0),
        "annual_mean_temperature": tas.mean(axis=0),
        "annual_precipitation": f.pr.sum(axis=0),
        "wettest_quarter_precipitation": quarters.max(axis=0),
        "driest_quarter_precipitation": quarters.min(axis=0),
        # coefficient of variation of the monthly means in kelvin, population standard deviation
        "temperature_seasonality": 100 * (tas + 273.15).std(axis=0) / (tas + 273.15).mean(axis=0),
        # monthly-mean degree days: each month max(T - base, 0) times its days (a common year)
        "growing_degree_days": (np.maximum(tas - 5.0, 0) * np.array(CF_MONTH_DAYS[("noleap", 2001)])[:, None]).sum(axis=0),
        "moisture_index": f.pr.sum(axis=0) / hargreaves_monthly(f.tasmax, f.tasmin, f.lat).sum(axis=0),
    }
    assert set(expected) == set(INDICES)
    for name, want in expected.items():
        np.testing.assert_allclose(compute_index({"index": name, "base": 5.0, "pet": "hargreaves"}, f), want,
                                   rtol=1e-9, err_msg=name)
    assert expected["driest_quarter_precipitation"][2] == pytest.approx(2.0 + 1.0 + 3.0)  # December-February


def test_bilinear_interpolation_is_exact_for_a_plane_in_either_longitude_frame():
    lon = np.array([358.0, 359.0, 360.0, 361.0])  # 0-360 grid around the meridian, in the frame of centre 0
    lat = np.array([-2.0, -1.0, 0.0])
    field = (2.0 + 0.5 * (lon[None, :] - 360.0) - 3.0 * lat[:, None])[None]
    qlon, qlat = np.array([-1.5, -0.25, 0.7]), np.array([-1.7, -0.5, -0.1])
    ip = Interpolator.build(lon - 360.0, lat, qlon, qlat, method="bilinear", centre=0.0)
    np.testing.assert_allclose(ip(field)[0], 2.0 + 0.5 * qlon - 3.0 * qlat, rtol=1e-12)


# --- 4. the change-factor method through the stage ----------------------------------------------

TEMP_CYCLE = np.array([290, 289, 287, 284, 281, 279, 278, 279, 281, 284, 286, 289.0])  # K
PR_CYCLE = np.array([3, 2.5, 2, 1.5, 1, 0.8, 0.6, 0.8, 1.2, 1.8, 2.2, 2.8]) * 1e-5  # kg m-2 s-1


def _case(tmp_path, *, d_temp=0.0, x_pr=1.0, hist_calendar="noleap", fut_calendar="noleap", fut_units=None,
          drop=None, anchor=False):
    """A tiny fine baseline (8 x 6 cells at 160E 50S) and one climate model's series; the config path."""
    rng = np.random.default_rng(1)
    for var, lo, hi in (("tasmax", 12.0, 24.0), ("tasmin", 2.0, 9.0), ("pr", 20.0, 140.0)):
        for m in range(1, 13):
            write_tif(tmp_path / "base" / f"{var}_{m:02d}.tif", rng.uniform(lo, hi, (6, 8)))
    for var in ("tasmax", "tasmin", "pr"):
        hist = PR_CYCLE if var == "pr" else TEMP_CYCLE - (8.0 if var == "tasmin" else 0.0)
        fut = hist * x_pr if var == "pr" else hist + d_temp
        _series_file(tmp_path / "series" / "hist" / f"{var}_a.nc", var, hist, years=(1991, 2000), calendar=hist_calendar)
        _series_file(tmp_path / "series" / "ssp1" / f"{var}_a.nc", var, fut, years=(2051, 2060), calendar=fut_calendar,
                     units=fut_units if var == "tasmax" else None, drop=drop if var == "tasmax" else None)
    for name, col in (("tmax_warm", 0), ("tmin_cold", 1), ("precip", 2), ("mean_t", 3)):
        write_tif(tmp_path / "present" / f"{name}.tif", np.full((6, 8), 10.0 + col))
    text = f'''
[survey]
path = "survey.csv"
[[factors]]
name = "tmax_warm"
layer = "present/tmax_warm.tif"
units = "degC"
[[factors]]
name = "tmin_cold"
layer = "present/tmin_cold.tif"
units = "degC"
[[factors]]
name = "precip"
layer = "present/precip.tif"
units = "mm year-1"
[[factors]]
name = "mean_t"
layer = "present/mean_t.tif"
units = "degC"
[present]
period = "1991-2000"
[[futures]]
scenario = "ssp1"
climate_model = "cm"
period = "2051-2060"
series = "series/{{scenario}}/{{variable}}_*.nc"
historical = "series/hist/{{variable}}_*.nc"
[derive]
baseline.tasmax = {{ path = "base/tasmax_{{month}}.tif", units = "degC" }}
baseline.tasmin = {{ path = "base/tasmin_{{month}}.tif", units = "degC" }}
baseline.pr = {{ path = "base/pr_{{month}}.tif", units = "mm" }}
anchor = {str(anchor).lower()}
[derive.factors]
tmax_warm = {{ index = "warmest_month_tmax" }}
tmin_cold = {{ index = "coldest_month_tmin" }}
precip = {{ index = "annual_precipitation" }}
mean_t = {{ index = "annual_mean_temperature" }}
'''
    (tmp_path / "survey.csv").write_text("lon,lat,count\n160.05,-50.05,1\n")
    (tmp_path / "run.toml").write_text(text)
    return tmp_path / "run.toml"


def _layers(folder, key):
    out = {}
    for f in ("tmax_warm", "tmin_cold", "precip", "mean_t"):
        with rasterio.open(folder / key / f"{f}.tif") as src:
            out[f] = src.read(1, masked=True).astype("float64")
    return out


@pytest.mark.parametrize("d_temp,x_pr,calendar", [(0.0, 1.0, "noleap"), (2.0, 1.0, "360_day"), (0.0, 1.1, "noleap")])
def test_change_factor_identities(tmp_path, d_temp, x_pr, calendar):
    cfg = load_config(_case(tmp_path, d_temp=d_temp, x_pr=x_pr, hist_calendar=calendar, fut_calendar=calendar))
    res = derive_to_folder(cfg, tmp_path / "out")
    now, later = _layers(res.folder, "present"), _layers(res.folder, "ssp1/cm/2051-2060")
    for f in ("tmax_warm", "tmin_cold", "mean_t"):  # additive: exactly +d_temp everywhere
        np.testing.assert_allclose(later[f] - now[f], d_temp, atol=2e-5, err_msg=f)
    np.testing.assert_allclose(later["precip"] / now["precip"], x_pr, rtol=1e-6)  # multiplicative
    assert not now["precip"].mask.any()


def test_anchored_futures_keep_the_present_layers_and_add_the_change(tmp_path):
    cfg = load_config(_case(tmp_path, d_temp=2.0, x_pr=1.1, anchor=True))
    res = derive_to_folder(cfg, tmp_path / "out")
    now, later = _layers(res.folder, "present"), _layers(res.folder, "ssp1/cm/2051-2060")
    np.testing.assert_allclose(now["tmax_warm"], 10.0)  # the config's present layer, not the baseline's
    np.testing.assert_allclose(later["tmax_warm"], 12.0, atol=2e-5)
    np.testing.assert_allclose(later["precip"], 12.0 * 1.1, rtol=1e-6)


def test_the_demo_baseline_gives_the_demo_present_layers():
    """The demo's baseline reproduces its hottest-month maximum, coldest-month minimum and yearly total."""
    from ceiling.demo import HEIGHT, NORTH, CELL, make_land, make_monthly, make_present, DEFAULT_SEED
    from ceiling.demo_climate import present_factors

    land = make_land(DEFAULT_SEED)
    present = make_present(land, DEFAULT_SEED)
    derived = present_factors(make_monthly(land, DEFAULT_SEED, present), NORTH - CELL * (np.arange(HEIGHT) + 0.5), land)
    for f in ("tmax_warm", "tmin_cold"):
        np.testing.assert_allclose(derived[f][land], present[f][land], atol=1e-5)
    np.testing.assert_allclose(derived["precip"][land], present["precip"][land], rtol=1e-6)


# --- 5. bad input: one line, exit code 2 ---------------------------------------------------------

@pytest.mark.parametrize("case,words", [
    ({"drop": (2053, 7)}, "month 2053-07 is missing"),
    ({"fut_calendar": "360_day"}, "calendar"),
    ({"fut_units": "m"}, "cannot be converted"),
])
def test_bad_series_are_refused_in_one_line(tmp_path, case, words):
    config = _case(tmp_path, **case)
    res = CliRunner().invoke(cli, ["derive", str(config), "--out", str(tmp_path / "out")])
    assert res.exit_code == 2, res.output
    lines = [ln for ln in res.output.splitlines() if ln.startswith("error:")]
    assert len(lines) == 1 and words in lines[0], res.output
    assert not (tmp_path / "out").exists()


def test_unknown_variable_is_refused(tmp_path):
    config = _case(tmp_path)
    config.write_text(config.read_text().replace('baseline.pr =', 'baseline.prec ='))
    res = CliRunner().invoke(cli, ["derive", str(config), "--out", str(tmp_path / "out")])
    assert res.exit_code == 2 and "derive.baseline.prec" in res.output, res.output
    from ceiling.derive.series import series_files

    with pytest.raises(DataError, match="unknown variable 'tmax'"):
        series_files(str(tmp_path / "series/hist/{variable}_*.nc"), "tmax", where="test")


def test_days_in_month_of_the_cf_calendars_match_cftime_date_arithmetic():
    assert days_in_month(2100, 2, "standard") == 28 and days_in_month(2100, 2, "julian") == 29


def _daily_file(path, *, years, calendar, drop_day=None):
    path.parent.mkdir(parents=True, exist_ok=True)
    start = cftime.datetime(years[0], 1, 1, calendar=calendar)
    n = int(round((cftime.datetime(years[1] + 1, 1, 1, calendar=calendar) - start).total_seconds() / 86400))
    days = [d for d in range(n) if d != drop_day]
    with netCDF4.Dataset(path, "w") as nc:
        for name, size in (("time", None), ("lat", 2), ("lon", 2)):
            nc.createDimension(name, size)
        t = nc.createVariable("time", "f8", ("time",))
        t.setncatts({"units": f"days since {years[0]}-01-01", "calendar": calendar})
        t[:] = np.array(days, dtype="float64") + 0.5
        for name, v, u in (("lat", (-51.0, -49.0), "degrees_north"), ("lon", (159.0, 162.0), "degrees_east")):
            c = nc.createVariable(name, "f8", (name,))
            c.units = u
            c[:] = v
        var = nc.createVariable("tasmin", "f4", ("time", "lat", "lon"))
        var.units = "K"
        var[:] = np.broadcast_to((273.15 + np.array(days) % 7)[:, None, None], (len(days), 2, 2))


def test_daily_series_become_monthly_means_and_a_missing_day_is_refused(tmp_path):
    """Daily values in a 360_day calendar: each month's mean of its 30 days; a gap is one clear error."""
    from ceiling.derive.series import Region, read_series

    region = Region(160.0, 161.0, -50.5, -50.0)
    _daily_file(tmp_path / "ok" / "tasmin_d.nc", years=(2001, 2001), calendar="360_day")
    s = read_series(str(tmp_path / "ok" / "{variable}_*.nc"), "tasmin", region, (2001, 2001), where="test")
    assert s.frequency == "daily" and s.values.shape[0] == 12
    by_hand = [np.mean([d % 7 for d in range(30 * m, 30 * m + 30)]) for m in range(12)]
    np.testing.assert_allclose(s.values[:, 0, 0], by_hand, atol=1e-4)
    _daily_file(tmp_path / "gap" / "tasmin_d.nc", years=(2001, 2001), calendar="noleap", drop_day=40)
    with pytest.raises(DataError, match="month 2001-02 has 27 daily values of 28"):
        read_series(str(tmp_path / "gap" / "{variable}_*.nc"), "tasmin", region, (2001, 2001), where="test")


def test_the_demo_run_derives_its_raw_series_climate(tmp_path_factory):
    """``ceiling run configs/demo.toml`` (once per session) derives model-d from its series on the way."""
    import json

    from projection_helpers import demo_run

    out, _ = demo_run(tmp_path_factory)
    man = json.loads((out / "derived" / "manifest.json").read_text())
    assert man["kind"] == "ceiling-derive-manifest" and man["anchor"] is True
    assert {(c["scenario"], c["climate_model"], c["period"]) for c in man["climates"]} == {
        (s, "model-d", p) for s in ("ssp245", "ssp585") for p in ("2041-2070", "2071-2100")}
    assert {v["calendar"] for c in man["climates"] for v in c["variables"].values()} == {"noleap"}
    for e in man["outputs"]:
        assert (out / "derived" / e["path"]).is_file()
    assert len(man["outputs"]) == 16 and len([e for e in man["inputs"] if e["path"].endswith(".nc")]) == 15
    for sp in ("sp_a", "sp_b", "sp_c"):
        assert (out / sp / "ssp585" / "model-d" / "2071-2100" / "ceiling.tif").is_file()


# --- daily series: quantile mapping (xsdba) and daily indices (xclim) ---------------------------

def _daily(values, start="2001-01-01", units="degC"):
    import pandas as pd

    t = pd.date_range(start, periods=len(values), freq="D")
    return xr_da(values, t, units)


def xr_da(values, t, units):
    import xarray as xr

    return xr.DataArray(np.asarray(values, dtype="float64"), dims="time", coords={"time": t}, attrs={"units": units})


def test_quantile_mapping_maps_the_historical_distribution_onto_the_reference():
    """Empirical quantile mapping, F_ref^-1(F_hist(x)) (Panofsky & Brier 1968): adjusting the
    historical run itself gives, month by month, the reference's distribution."""
    from ceiling.derive.daily import quantile_mapping

    rng = np.random.default_rng(3)
    n = 365 * 10
    doy = np.arange(n) % 365
    season = 10 * np.cos(2 * np.pi * doy / 365)
    ref = _daily(12 + season + rng.normal(0, 3, n))
    hist = _daily(15 + 0.8 * season + rng.normal(0, 2, n))  # biased: warmer, narrower
    adj = quantile_mapping(ref, hist, hist, variable="tasmax", nquantiles=50)
    for m in (1, 7):
        a = adj.where(adj.time.dt.month == m, drop=True).values
        r = ref.where(ref.time.dt.month == m, drop=True).values
        h = hist.where(hist.time.dt.month == m, drop=True).values
        q = np.linspace(0.05, 0.95, 10)
        assert np.max(np.abs(np.quantile(a, q) - np.quantile(r, q))) < 0.3  # vs about 3 K before
        assert np.max(np.abs(np.quantile(h, q) - np.quantile(r, q))) > 1.5


def test_daily_indices_by_hand_and_monthly_input_refused():
    from ceiling.derive.daily import daily_index

    tmin = np.tile(np.r_[np.full(40, -2.0), np.full(325, 6.0)], 2)  # 40 frost days a year
    assert float(daily_index("frost_days", _daily(tmin))) == 40
    tas = np.tile(np.r_[np.full(100, 8.0), np.full(265, 4.0)], 2)
    # degree days above 5 degC: sum over days of max(T - 5, 0), a year's mean: 100 x 3
    assert float(daily_index("growing_degree_days", _daily(tas), base=5.0)) == pytest.approx(300.0)
    import pandas as pd

    monthly = xr_da(np.full(24, 3.0), pd.date_range("2001-01-01", periods=24, freq="MS"), "degC")
    with pytest.raises(DataError, match="daily index 'frost_days'"):
        daily_index("frost_days", monthly)
