"""Factor definitions: climate indices computed from twelve monthly means per cell.

A factor is defined in the config by the name of an index and its parameters
(``[derive.factors] tmax_warm = { index = "warmest_month_tmax" }``). The climate-index library
xclim computes every index it has (its ``xclim.indices`` functions check the units of their
inputs); the few lines of our own are said so below. The inputs are the climatological months
of one nominal year (:func:`~ceiling.derive.calendars.nominal_months`): temperatures in degC,
precipitation as the month's total in mm (passed to xclim as a rate, total / days of the month,
which xclim turns back into the total).

| index | meaning | computed by |
|---|---|---|
| ``warmest_month_tmax`` | daily maximum temperature of the warmest month (degC) | ``xclim.indices.tx_max`` over the 12 months |
| ``coldest_month_tmin`` | daily minimum temperature of the coldest month (degC) | ``xclim.indices.tn_min`` |
| ``annual_mean_temperature`` | mean of the 12 monthly mean temperatures (degC) | ``xclim.indices.tg_mean`` |
| ``annual_precipitation`` | yearly precipitation total (mm) | ``xclim.indices.prcptot`` |
| ``wettest_quarter_precipitation`` / ``driest_quarter_precipitation`` | precipitation of the wettest / driest three consecutive months, December-February included (mm) | ``xclim.indices.prcptot_wetdry_quarter`` on the year repeated twice (so the three months may span the year's end), second year kept |
| ``temperature_seasonality`` | coefficient of variation of the monthly mean temperatures in kelvin (%) | ``xclim.indices.temperature_seasonality`` |
| ``growing_degree_days`` | degree days above ``base`` (K d), estimated from monthly means | our own: each month adds ``max(T - base, 0)`` times its days (the monthly-mean method; it underestimates where daily temperatures straddle the base within a month, common practice). xclim's ``growing_degree_days`` counts daily values; on monthly means it scales by a "month" whose length depends on the state of its unit registry, so it is not used here |
| ``moisture_index`` | yearly precipitation over yearly potential evapotranspiration (1) | PET by :mod:`ceiling.derive.pet` (method ``pet``); the ratio is our own code |

With ``[derive] anchor = true`` a factor's change (future minus baseline value, or their ratio for
the precipitation totals and the moisture index: ``change`` below) is applied to a given present
layer instead (:mod:`ceiling.derive.stage`).

Mean temperature is the monthly ``tas`` when the baseline has it, else the mean of ``tasmax`` and
``tasmin`` (common practice). Daily-only indices (frost days, degree days from daily values) are
in :mod:`ceiling.derive.daily`.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import xarray as xr

from .calendars import nominal_days, nominal_months
from .library import xclim
from .pet import monthly_pet

__all__ = ["MonthlyFields", "IndexSpec", "INDICES", "needed_variables", "compute_index"]


@dataclass(frozen=True)
class MonthlyFields:
    """Twelve monthly values per cell: temperatures (degC) and precipitation totals (mm), shape (12, n)."""

    tasmax: np.ndarray | None = None
    tasmin: np.ndarray | None = None
    pr: np.ndarray | None = None
    tas_given: np.ndarray | None = None
    lat: np.ndarray | None = None  # degrees north, shape (n,)

    @property
    def tas(self) -> np.ndarray:
        if self.tas_given is not None:
            return self.tas_given
        return 0.5 * (self.tasmax + self.tasmin)  # type: ignore[operator]


@dataclass(frozen=True)
class IndexSpec:
    """One index: its meaning (in our words), units, the monthly variables it needs and who computes it."""

    label: str
    units: str
    needs: tuple[str, ...]
    computed_by: str
    func: Callable[[MonthlyFields, dict], np.ndarray]
    change: str = "additive"  # how a change of this index is applied to a given present layer (anchoring)


def _da(values: np.ndarray, units: str, years: int = 1) -> xr.DataArray:
    time = nominal_months(years)
    if years == 2:
        values = np.concatenate([values, values])
    return xr.DataArray(values, dims=("time", "cell"), coords={"time": time.values}, attrs={"units": units})


def _rate(total: np.ndarray, years: int = 1) -> xr.DataArray:
    return _da(total / nominal_days()[:, None], "mm/d", years)


def _xclim(name: str, *args, convert: str | None = None, **kw) -> np.ndarray:
    lib = xclim()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        out = getattr(lib.indices, name)(*args, freq="YS", **kw)
        if convert:
            out = lib.convert_units_to(out, convert)
    return np.asarray(out.isel(time=-1).values, dtype="float64")


def _moisture(f: MonthlyFields, p: dict) -> np.ndarray:
    pet = monthly_pet(p.get("pet", "hargreaves"), f.tasmax, f.tasmin, f.lat, tas=f.tas_given, pr=f.pr).sum(axis=0)
    total = f.pr.sum(axis=0)  # type: ignore[union-attr]
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(pet > 0, total / pet, np.nan)


INDICES: dict[str, IndexSpec] = {
    "warmest_month_tmax": IndexSpec(
        "hottest-month daily maximum", "degC", ("tasmax",), "xclim.indices.tx_max",
        lambda f, p: _xclim("tx_max", _da(f.tasmax, "degC"), convert="degC")),
    "coldest_month_tmin": IndexSpec(
        "coldest-month daily minimum", "degC", ("tasmin",), "xclim.indices.tn_min",
        lambda f, p: _xclim("tn_min", _da(f.tasmin, "degC"), convert="degC")),
    "annual_mean_temperature": IndexSpec(
        "yearly mean temperature", "degC", ("tasmax", "tasmin"), "xclim.indices.tg_mean",
        lambda f, p: _xclim("tg_mean", _da(f.tas, "degC"), convert="degC")),
    "annual_precipitation": IndexSpec(
        "yearly precipitation total", "mm year-1", ("pr",), "xclim.indices.prcptot",
        lambda f, p: _xclim("prcptot", _rate(f.pr), convert="mm"), "multiplicative"),
    "wettest_quarter_precipitation": IndexSpec(
        "precipitation of the wettest three months in a row", "mm", ("pr",), "xclim.indices.prcptot_wetdry_quarter",
        lambda f, p: _xclim("prcptot_wetdry_quarter", _rate(f.pr, 2), op="wettest", convert="mm"), "multiplicative"),
    "driest_quarter_precipitation": IndexSpec(
        "precipitation of the driest three months in a row", "mm", ("pr",), "xclim.indices.prcptot_wetdry_quarter",
        lambda f, p: _xclim("prcptot_wetdry_quarter", _rate(f.pr, 2), op="driest", convert="mm"), "multiplicative"),
    "temperature_seasonality": IndexSpec(
        "spread of the monthly mean temperatures (coefficient of variation)", "%", ("tasmax", "tasmin"),
        "xclim.indices.temperature_seasonality",
        lambda f, p: _xclim("temperature_seasonality", _da(f.tas, "degC"))),
    "growing_degree_days": IndexSpec(
        "degree days above a base temperature, from monthly means", "K d", ("tasmax", "tasmin"),
        "ceiling.derive.indices (monthly-mean method)",
        lambda f, p: (np.maximum(f.tas - float(p.get("base", 5.0)), 0.0) * nominal_days()[:, None]).sum(axis=0)),
    "moisture_index": IndexSpec(
        "moisture index: yearly precipitation over potential evapotranspiration", "1", ("tasmax", "tasmin", "pr"),
        "ceiling.derive.indices (ratio) over ceiling.derive.pet", _moisture, "multiplicative"),
}


def needed_variables(definitions: dict[str, dict]) -> list[str]:
    """The monthly variables the factor definitions need, in a fixed order."""
    need = {v for d in definitions.values() for v in INDICES[d["index"]].needs}
    return [v for v in ("tasmax", "tasmin", "tas", "pr") if v in need]


def compute_index(definition: dict, fields: MonthlyFields) -> np.ndarray:
    """One factor (shape (n,)) from the monthly fields, by its definition (``{"index": ..., params}``)."""
    return INDICES[definition["index"]].func(fields, definition)
