"""Daily series: quantile-mapping bias adjustment and the indices that need daily values.

For users with daily climate-model series and a daily reference (observations on the same grid):

- :func:`quantile_mapping` adjusts a model's daily series by empirical quantile mapping, trained
  per calendar month on the model's historical run against the reference over the same years
  (``xsdba.EmpiricalQuantileMapping``; additive for temperatures, multiplicative for
  precipitation). Each value is moved to the reference's value at the quantile it holds in the
  historical run: ``F_ref^-1(F_hist(x))`` (Panofsky & Brier 1968; Themessl, Gobiet & Leuprecht
  2011, International Journal of Climatology 31, 1530-1544).
- :func:`daily_index` computes an index that needs daily values with xclim's indicators, which
  check the units and that the input is daily: ``frost_days`` (days with a minimum below 0 degC)
  and ``growing_degree_days`` (above ``base``), each the mean over the period's years.

These work on xarray objects in memory (a coarse grid or points); the derive stage's chunked route
is the monthly change-factor method (:mod:`ceiling.derive.stage`).
"""

from __future__ import annotations

import warnings

import xarray as xr

from ..errors import DataError
from .library import xclim, xsdba
from .series import VARIABLES

__all__ = ["DAILY_INDICES", "quantile_mapping", "daily_index"]

DAILY_INDICES = {"frost_days": "tasmin", "growing_degree_days": "tas"}


def quantile_mapping(ref: xr.DataArray, hist: xr.DataArray, sim: xr.DataArray, *, variable: str,
                     nquantiles: int = 50) -> xr.DataArray:
    """``sim`` adjusted by empirical quantile mapping trained on ``hist`` against ``ref`` (daily, per month)."""
    if variable not in VARIABLES:
        raise DataError(f"quantile mapping: unknown variable '{variable}'; use one of {', '.join(VARIABLES)}")
    kind = "+" if VARIABLES[variable] == "temperature" else "*"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        qm = xsdba().EmpiricalQuantileMapping.train(ref, hist, nquantiles=nquantiles, group="time.month", kind=kind)
        return qm.adjust(sim, extrapolation="constant", interp="nearest")


def daily_index(name: str, series: xr.DataArray, *, base: float = 5.0) -> xr.DataArray:
    """The mean over the years of ``series`` of a daily index (xclim indicator; refuses non-daily input)."""
    if name not in DAILY_INDICES:
        raise DataError(f"unknown daily index '{name}'; use one of {', '.join(DAILY_INDICES)}")
    atmos = xclim().atmos
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            if name == "frost_days":
                out = atmos.frost_days(tasmin=series, thresh="0 degC", freq="YS")
            else:
                out = atmos.growing_degree_days(tas=series, thresh=f"{base} degC", freq="YS")
        except Exception as exc:  # noqa: BLE001 - xclim's checks (frequency, units) become one line
            raise DataError(f"daily index '{name}': {str(exc).splitlines()[0]}; supply daily values with CF units") from None
    return out.mean("time", keep_attrs=True)
