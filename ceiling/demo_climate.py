"""Invented monthly climate of the demo island: a fine monthly baseline and one climate model's raw series.

Part of the invented demo (:mod:`ceiling.demo`); nothing here describes a real place or model.

- :func:`make_baseline` builds twelve monthly means of daily maximum and minimum temperature and
  monthly precipitation totals on the demo grid, from the demo's factor fields, so that the
  warmest month's maximum and the coldest month's minimum are those fields and the months'
  precipitation adds up to the yearly total. The present factor layers are then computed from
  this baseline by the derive code (:func:`present_factors`), so the present and the futures
  derived from the series share one baseline and one set of factor definitions.
- :func:`write_series` writes an invented climate model (``model-d``) as raw monthly series in
  CF NetCDF on a coarse 1-degree grid with longitudes 0-360, latitudes ascending and a ``noleap``
  calendar, temperatures in K and precipitation as a flux: a historical run (1991-2020) and each
  scenario (2041-2070, 2071-2100), one file per variable and span of years.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import cftime
import netCDF4
import numpy as np
from scipy import ndimage

from .derive.calendars import days_in_month
from .derive.indices import MonthlyFields, compute_index

__all__ = ["SERIES_MODEL", "FACTOR_DEFINITIONS", "COARSE_LON", "COARSE_LAT", "make_baseline", "present_factors",
           "write_series", "write_series_file", "SERIES_SPANS"]

SERIES_MODEL = "model-d"
# the demo's factor definitions ([derive.factors] of configs/demo.toml)
FACTOR_DEFINITIONS = {
    "tmax_warm": {"index": "warmest_month_tmax"},
    "tmin_cold": {"index": "coldest_month_tmin"},
    "precip": {"index": "annual_precipitation"},
    "moisture": {"index": "moisture_index", "pet": "hargreaves"},
}
COARSE_LON = np.arange(218.5, 232.0, 1.0)   # 0-360 longitudes, 1-degree cell centres
COARSE_LAT = np.arange(-49.5, -37.9, 1.0)   # ascending
SERIES_SPANS = {"historical": ((1991, 2020),), "scenario": ((2041, 2070), (2071, 2100))}
# the year's cycle, southern hemisphere: +1 in January (warmest), -1 in July (coldest)
CYCLE = np.cos(2.0 * np.pi * np.arange(12) / 12.0)
DAYS_NOLEAP = np.array([days_in_month(2001, m, "noleap") for m in range(1, 13)], dtype="float64")
SECONDS_PER_DAY = 86400.0


def make_baseline(fields: dict[str, np.ndarray], land: np.ndarray, rng: np.random.Generator,
                  smooth: Callable[[np.random.Generator, float], np.ndarray]) -> dict[str, np.ndarray]:
    """Monthly tasmax, tasmin (degC) and pr (mm per month), shape (12, rows, cols), NaN over sea.

    ``fields`` holds the warmest month's maximum (``tmax_warm``), the coldest month's minimum
    (``tmin_cold``), the yearly precipitation (``precip``) and a humidity field in 0..1
    (``humidity``). With ``D`` the difference of the two temperatures and ``a = 0.1 + 0.3
    humidity``, ``tasmax`` falls from its warmest month by ``a D (1 - cycle)`` and ``tasmin``
    rises from its coldest month by ``0.8 a D (1 + cycle)``: humid air keeps the daily range
    small. Precipitation is shared among the months by weights that make winters wetter where a
    smooth seasonality field is strong.
    """
    tx, tn, pr = fields["tmax_warm"], fields["tmin_cold"], fields["precip"]
    d = (tx - tn)[None]
    a = (0.1 + 0.3 * fields["humidity"])[None]
    c = CYCLE[:, None, None]
    tasmax = tx[None] - a * d * (1.0 - c)
    tasmin = tn[None] + 0.8 * a * d * (1.0 + c)
    season = 0.15 + 0.35 * (0.5 + 0.5 * np.tanh(smooth(rng, 12.0)))  # 0.15-0.5, smooth
    weights = DAYS_NOLEAP[:, None, None] * (1.0 - season[None] * c)
    weights = weights / weights.sum(axis=0, keepdims=True)
    monthly_pr = pr[None] * weights
    sea = ~land
    for arr in (tasmax, tasmin, monthly_pr):
        arr[:, sea] = np.nan
    return {"tasmax": tasmax, "tasmin": tasmin, "pr": monthly_pr}


def present_factors(baseline: dict[str, np.ndarray], lat: np.ndarray, land: np.ndarray) -> dict[str, np.ndarray]:
    """The demo's factors from the baseline (as stored, float32), by the derive code's definitions."""
    stored = {k: v.astype("float32").astype("float64") for k, v in baseline.items()}
    lat2 = np.broadcast_to(lat[:, None], land.shape)
    fields = MonthlyFields(stored["tasmax"][:, land], stored["tasmin"][:, land], stored["pr"][:, land], None, lat2[land])
    out = {}
    for name, definition in FACTOR_DEFINITIONS.items():
        grid = np.full(land.shape, np.nan)
        grid[land] = compute_index(definition, fields)
        out[name] = grid.astype("float32").astype("float64")
    return out


def _coarse_climate(rng: np.random.Generator) -> dict[str, np.ndarray]:
    """The invented model's own historical climatology on the coarse grid (it need not match the baseline)."""
    lat = COARSE_LAT[:, None] * np.ones((1, COARSE_LON.size))
    lon = np.ones((COARSE_LAT.size, 1)) * COARSE_LON[None, :]
    c = CYCLE[:, None, None]
    wobble = ndimage.gaussian_filter(rng.standard_normal(lat.shape), 1.5)
    tx = 27.0 + 0.7 * (lat + 44.0) - 0.2 * (lon - 225.0) + 2.0 * wobble
    tasmax = tx[None] - 4.0 * (1.0 - c)
    tasmin = tasmax - 9.0 - 1.5 * c
    pr = (90.0 - 2.0 * (lon - 225.0) + 10 * wobble)[None] * (1.0 - 0.3 * c)
    return {"tasmax": tasmax, "tasmin": tasmin, "pr": np.maximum(pr, 5.0)}


def _change(rng: np.random.Generator, warming: float) -> dict[str, np.ndarray]:
    """The invented model's change at a given mean warming: patterned, and drier summers."""
    shape = (COARSE_LAT.size, COARSE_LON.size)
    pats = [ndimage.gaussian_filter(rng.standard_normal(shape), 2.0) for _ in range(3)]
    pats = [p / (np.abs(p).max() + 1e-12) for p in pats]
    c = CYCLE[:, None, None]
    d_tx = warming * 1.1 * (1.0 + 0.25 * pats[0])[None] * (1.0 + 0.1 * c)
    d_tn = warming * 1.25 * (1.0 + 0.25 * pats[1])[None] * np.ones_like(c)
    ratio = 1.0 + warming / 3.6 * (-0.04 + 0.12 * pats[2])[None] - warming / 3.6 * 0.08 * c
    return {"tasmax": d_tx, "tasmin": d_tn, "pr": ratio}


def _series(clim: dict[str, np.ndarray], years: tuple[int, int], rng: np.random.Generator) -> dict[str, np.ndarray]:
    """Monthly values of ``years``: the climatology plus year-to-year noise (temperatures shared by max and min)."""
    n = years[1] - years[0] + 1
    shape = (n, 12) + clim["tasmax"].shape[1:]
    t_noise = rng.normal(0.0, 0.7, shape)
    p_noise = np.exp(rng.normal(-0.045, 0.3, shape))
    tasmax = (clim["tasmax"][None] + t_noise).reshape((-1,) + shape[2:])
    tasmin = (clim["tasmin"][None] + 0.8 * t_noise).reshape((-1,) + shape[2:])
    pr = (clim["pr"][None] * p_noise).reshape((-1,) + shape[2:])
    return {"tasmax": tasmax, "tasmin": tasmin, "pr": pr}


def write_series_file(path: Path, variable: str, values: np.ndarray, years: tuple[int, int], run: str, *,
                      lon: np.ndarray = COARSE_LON, lat: np.ndarray = COARSE_LAT) -> Path:
    """One variable of one run as a monthly CF series (``values``: degC or mm per month, (months, lat, lon))."""
    path.parent.mkdir(parents=True, exist_ok=True)
    months = [(y, m) for y in range(years[0], years[1] + 1) for m in range(1, 13)]
    start = [netCDF4.date2num(cftime.datetime(y, m, 1, calendar="noleap"), "days since 1850-01-01",
                              calendar="noleap") for y, m in months]
    length = np.array([days_in_month(y, m, "noleap") for y, m in months], dtype="float64")
    bounds = np.stack([start, np.asarray(start) + length], axis=1)
    meta = {"tasmax": ("air_temperature", "K", "daily maximum near-surface air temperature", "time: maximum within days time: mean over days"),
            "tasmin": ("air_temperature", "K", "daily minimum near-surface air temperature", "time: minimum within days time: mean over days"),
            "pr": ("precipitation_flux", "kg m-2 s-1", "precipitation", "time: mean")}[variable]
    if variable == "pr":
        data = values / (length[:, None, None] * SECONDS_PER_DAY)  # mm per month -> kg m-2 s-1
    else:
        data = values + 273.15
    with netCDF4.Dataset(path, "w", format="NETCDF4") as nc:
        nc.setncatts({"Conventions": "CF-1.10", "title": f"Invented demo climate model {SERIES_MODEL}, {run}",
                      "comment": "Invented demo data for a fictional region; not a real climate model, run or place.",
                      "scenario_note": "invented demo data", "climate_model": SERIES_MODEL, "experiment": run,
                      "frequency": "mon"})
        nc.createDimension("time", None)
        nc.createDimension("bnds", 2)
        nc.createDimension("lat", lat.size)
        nc.createDimension("lon", lon.size)
        t = nc.createVariable("time", "f8", ("time",))
        t.setncatts({"standard_name": "time", "units": "days since 1850-01-01", "calendar": "noleap", "axis": "T",
                     "bounds": "time_bnds"})
        t[:] = bounds.mean(axis=1)
        nc.createVariable("time_bnds", "f8", ("time", "bnds"))[:] = bounds
        for name, vals, std, units, axis in (("lat", lat, "latitude", "degrees_north", "Y"),
                                             ("lon", lon, "longitude", "degrees_east", "X")):
            v = nc.createVariable(name, "f8", (name,))
            v.setncatts({"standard_name": std, "units": units, "axis": axis})
            v[:] = vals
        var = nc.createVariable(variable, "f4", ("time", "lat", "lon"), zlib=True, complevel=6, shuffle=True,
                                fill_value=np.float32(1e20), significant_digits=4)  # invented values: 4 digits
        var.setncatts({"standard_name": meta[0], "units": meta[1], "long_name": meta[2], "cell_methods": meta[3]})
        var[:] = data.astype("float32")
    return path


def write_series(out: Path, seed: int, warming: dict[tuple[str, str], float], scenarios: tuple[str, ...]) -> list[Path]:
    """Write the invented model's historical run and scenario runs under ``out/series/model-d/``."""
    rng = np.random.default_rng([seed, 7])
    clim = _coarse_climate(rng)
    written = []
    folder = Path(out) / "series" / SERIES_MODEL
    runs = [("historical", years, clim) for years in SERIES_SPANS["historical"]]
    for sc in scenarios:
        for years in SERIES_SPANS["scenario"]:
            ch = _change(np.random.default_rng([seed, 8]), warming[(sc, f"{years[0]}-{years[1]}")])
            fut = {"tasmax": clim["tasmax"] + ch["tasmax"], "tasmin": clim["tasmin"] + ch["tasmin"],
                   "pr": clim["pr"] * ch["pr"]}
            runs.append((sc, years, fut))
    for run, years, c in runs:
        values = _series(c, years, rng)
        for var in ("tasmax", "tasmin", "pr"):
            name = f"{var}_mon_{SERIES_MODEL}_{run}_{years[0]}01-{years[1]}12.nc"
            written.append(write_series_file(folder / run / name, var, values[var], years, run))
    return written
