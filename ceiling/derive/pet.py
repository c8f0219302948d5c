"""Potential evapotranspiration (PET) from monthly climatologies, in mm per month.

Three methods, named in the config (``pet = "..."`` on a moisture-index factor):

- ``"hargreaves"``: Hargreaves & Samani (1985) as written in FAO Irrigation and Drainage Paper 56
  (Allen, Pereira, Raes & Smith 1998, Eq. 52): ``ET0 = 0.0023 (Tmean + 17.8) (Tmax - Tmin)^0.5
  Ra`` mm day-1, with ``Ra`` the extraterrestrial radiation as evaporation equivalent (0.408 mm
  per MJ m-2, FAO-56 Eq. 20), ``Tmean`` the mean of the monthly ``Tmax`` and ``Tmin`` unless a
  mean temperature is given, and ``Ra`` taken on the middle day of each month
  (``J = int(30.4 M - 15)``, FAO-56, note to Eq. 21) and multiplied by the month's days. The
  climate-index library computes ``Ra`` (``xclim.indices.helpers.extraterrestrial_solar_radiation``,
  with FAO-56's solar constant 0.0820 MJ m-2 min-1); the monthly form of the equation is our own
  code, because xclim's Hargreaves takes daily values only.
- ``"thornthwaite"``: Thornthwaite (1948), computed by xclim
  (``xclim.indices.potential_evapotranspiration(method="thornthwaite48")``) on the monthly means.
- ``"droogers_allen"``: the monthly modified Hargreaves of Droogers & Allen (2002), computed by
  xclim (``method="droogersallen02"``), which also uses the monthly precipitation.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import xarray as xr

from .calendars import NOMINAL_YEAR, nominal_days, nominal_months
from .library import xclim

__all__ = ["PET_METHODS", "MID_MONTH_DAY", "ra_on_days", "monthly_ra", "hargreaves_monthly", "monthly_pet"]

PET_METHODS = ("hargreaves", "thornthwaite", "droogers_allen")
# FAO-56, note to Eq. 21: for monthly values, J of the middle of month M is int(30.4 M - 15)
MID_MONTH_DAY = np.array([int(30.4 * m - 15) for m in range(1, 13)])
FAO_SOLAR_CONSTANT = "0.0820 MJ m-2 min-1"  # FAO-56, Eq. 21
MJ_TO_MM = 0.408  # FAO-56, Eq. 20: evaporation equivalent of 1 MJ m-2 (1 / 2.45 MJ kg-1)


def _doy_times(days: np.ndarray) -> xr.DataArray:
    times = pd.Timestamp(f"{NOMINAL_YEAR}-01-01") + pd.to_timedelta(np.asarray(days) - 1, unit="D")
    return xr.DataArray(times, dims="time", coords={"time": times}, name="time")


def ra_on_days(days: np.ndarray, lat: np.ndarray) -> np.ndarray:
    """Extraterrestrial radiation (MJ m-2 day-1) on days of the year ``days``, shape (len(days), n)."""
    lib = xclim()
    lat = np.asarray(lat, dtype="float64")
    uniq, inverse = np.unique(lat, return_inverse=True)  # rows of a lon-lat grid share one latitude
    la = xr.DataArray(uniq, dims="cell", attrs={"units": "degrees_north"})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        # every day of the year (xclim takes a daily series as whole days), then the days asked for
        ra = lib.helpers.extraterrestrial_solar_radiation(_doy_times(np.arange(1, 366))["time"], la,
                                                          solar_constant=FAO_SOLAR_CONSTANT, method="simple")
        ra = lib.convert_units_to(ra, "MJ m-2 d-1")
    return np.asarray(ra.transpose("time", "cell").values)[np.asarray(days) - 1][:, inverse.reshape(-1)]


def monthly_ra(lat: np.ndarray) -> np.ndarray:
    """Extraterrestrial radiation (MJ m-2 day-1) on each month's middle day, shape (12, n)."""
    return ra_on_days(MID_MONTH_DAY, lat)


def hargreaves_monthly(tasmax: np.ndarray, tasmin: np.ndarray, lat: np.ndarray, tas: np.ndarray | None = None) -> np.ndarray:
    """Hargreaves PET (mm per month of the nominal year) from monthly means (degC), shape (12, n)."""
    tmean = 0.5 * (tasmax + tasmin) if tas is None else tas
    ra = monthly_ra(lat) * MJ_TO_MM
    daily = 0.0023 * (tmean + 17.8) * np.sqrt(np.maximum(tasmax - tasmin, 0.0)) * ra
    return np.maximum(daily, 0.0) * nominal_days()[:, None]


def _xclim_pet(method: str, tasmax: np.ndarray, tasmin: np.ndarray, pr: np.ndarray | None, lat: np.ndarray) -> np.ndarray:
    lib = xclim()
    time = nominal_months()
    days = nominal_days()

    def da(values, units):
        return xr.DataArray(values, dims=("time", "cell"), coords={"time": time.values}, attrs={"units": units})

    kw = {"tasmax": da(tasmax, "degC"), "tasmin": da(tasmin, "degC"),
          "lat": xr.DataArray(np.asarray(lat, dtype="float64"), dims="cell", attrs={"units": "degrees_north"})}
    if pr is not None:
        kw["pr"] = da(pr / days[:, None], "mm/d")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        pet = lib.indices.potential_evapotranspiration(method=method, **kw)
        rate = lib.convert_units_to(pet, "mm/d", context="hydro")
    return np.asarray(rate.transpose("time", "cell").values) * days[:, None]


def monthly_pet(method: str, tasmax: np.ndarray, tasmin: np.ndarray, lat: np.ndarray, *,
                tas: np.ndarray | None = None, pr: np.ndarray | None = None) -> np.ndarray:
    """PET in mm per month, shape (12, n), by ``method`` (one of :data:`PET_METHODS`)."""
    if method == "hargreaves":
        return hargreaves_monthly(tasmax, tasmin, lat, tas)
    if method == "thornthwaite":
        return _xclim_pet("thornthwaite48", tasmax, tasmin, None, lat)
    if method == "droogers_allen":
        return _xclim_pet("droogersallen02", tasmax, tasmin, pr, lat)
    raise ValueError(f"unknown PET method {method!r}; use one of {PET_METHODS}")
