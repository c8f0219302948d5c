"""Period climatologies: the mean of each calendar month over a run of years.

Temperatures are averaged as they are (monthly means of daily values, degC). Precipitation is
first turned from each month's mean rate into that month's total through the number of days of
that month in the series' own calendar (``noleap``, ``360_day``, ...), then averaged over the
years: a climatological monthly total in mm.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .calendars import days_in_month
from .series import VARIABLES, MonthlySeries

__all__ = ["Climatology", "monthly_climatology", "monthly_totals"]


@dataclass(frozen=True)
class Climatology:
    """Twelve monthly means of one variable over ``years`` (degC, or mm per month for precipitation)."""

    variable: str
    values: np.ndarray  # (12, n_lat, n_lon)
    lon: np.ndarray
    lat: np.ndarray
    years: tuple[int, int]
    calendar: str

    def describe(self) -> dict:
        return {"variable": self.variable, "years": list(self.years), "calendar": self.calendar,
                "grid": [int(self.lat.size), int(self.lon.size)]}


def monthly_totals(rate: np.ndarray, years: np.ndarray, months: np.ndarray, calendar: str) -> np.ndarray:
    """Monthly totals (mm) from monthly mean rates (mm day-1), through each month's length."""
    days = np.array([days_in_month(int(y), int(m), calendar) for y, m in zip(years, months)], dtype="float64")
    return rate * days.reshape((-1,) + (1,) * (rate.ndim - 1))


def monthly_climatology(series: MonthlySeries, years: tuple[int, int]) -> Climatology:
    """The climatology of ``series`` over ``years`` (every month of them must be in the series)."""
    sel = (series.years >= years[0]) & (series.years <= years[1])
    values = series.values[sel]
    ms = series.months[sel]
    if VARIABLES[series.variable] == "precipitation":
        values = monthly_totals(values, series.years[sel], ms, series.calendar)
    out = np.stack([values[ms == m].mean(axis=0) for m in range(1, 13)])
    return Climatology(series.variable, out, series.lon, series.lat, years, series.calendar)
