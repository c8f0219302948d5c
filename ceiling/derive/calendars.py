"""Calendars of climate-model output: month lengths, periods and the nominal climatological year.

Month lengths follow the CF conventions' calendars (CF 1.10, section 4.4.1 "Calendar"): ``standard``
(``gregorian``), ``proleptic_gregorian``, ``julian``, ``noleap`` (``365_day``), ``all_leap``
(``366_day``) and ``360_day``; ``cftime`` does the date arithmetic. A period is written
``"YYYY-YYYY"`` (first and last year, both included).

Climatologies live on a nominal year: twelve month starts of 2002, a common year (its months have
the lengths of the ``noleap`` calendar), as numpy dates, so that a monthly total divided by its
month's length and multiplied back (as the climate-index library does for monthly rates)
returns the same total.
"""

from __future__ import annotations

import re
from functools import lru_cache

import cftime
import numpy as np
import pandas as pd
import xarray as xr

from ..errors import ConfigError, DataError

__all__ = [
    "CALENDARS", "NOMINAL_CALENDAR", "canonical_calendar", "days_in_month", "month_lengths", "parse_period",
    "nominal_months", "nominal_days", "MEAN_MONTH_DAYS",
]

# CF calendar names and their aliases (CF 1.10, 4.4.1)
CALENDARS = {
    "standard": "standard", "gregorian": "standard", "proleptic_gregorian": "proleptic_gregorian",
    "julian": "julian", "noleap": "noleap", "365_day": "noleap", "all_leap": "all_leap", "366_day": "all_leap",
    "360_day": "360_day",
}
NOMINAL_CALENDAR = "noleap"
NOMINAL_YEAR = 2002  # a common year; 2001 too (the year before, for wrapped seasons)
# mean month lengths of the Gregorian calendar (400-year cycle: February 28.2425 days), for
# baseline normals given as rates
MEAN_MONTH_DAYS = np.array([31, 28.2425, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31], dtype="float64")


def canonical_calendar(name: str | None, *, where: str) -> str:
    """The CF calendar name (aliases resolved); a missing attribute means ``standard`` (CF default)."""
    key = "standard" if name is None else str(name).strip().lower()
    if key not in CALENDARS:
        raise DataError(f"{where}: calendar '{name}' is not a CF calendar; use one of {', '.join(sorted(set(CALENDARS)))}")
    return CALENDARS[key]


@lru_cache(maxsize=4096)
def days_in_month(year: int, month: int, calendar: str) -> int:
    """Days in one month of a CF calendar (cftime's date arithmetic)."""
    start = cftime.datetime(year, month, 1, calendar=calendar)
    nxt = cftime.datetime(year + month // 12, month % 12 + 1, 1, calendar=calendar)
    return int(round((nxt - start).total_seconds() / 86400.0))


def month_lengths(calendar: str, year: int) -> np.ndarray:
    """The twelve month lengths (days) of ``year`` in ``calendar``."""
    return np.array([days_in_month(year, m, calendar) for m in range(1, 13)], dtype="float64")


def parse_period(text: str, *, where: str) -> tuple[int, int]:
    """``"1991-2020"`` -> (1991, 2020)."""
    m = re.fullmatch(r"\s*(\d{4})\s*-\s*(\d{4})\s*", str(text))
    if not m or int(m.group(1)) > int(m.group(2)):
        raise ConfigError(f"{where}: period '{text}' is not 'FIRST-LAST' in years (e.g. '2041-2070'); write it so")
    return int(m.group(1)), int(m.group(2))


def nominal_months(n_years: int = 1) -> xr.DataArray:
    """Month starts of the nominal year (and of the ``n_years - 1`` years before it): a climatology's time axis."""
    if n_years not in (1, 2):
        raise ValueError("a climatology's time axis spans one or two nominal years")
    times = pd.date_range(f"{NOMINAL_YEAR - n_years + 1}-01-01", periods=12 * n_years, freq="MS")
    return xr.DataArray(times, dims="time", coords={"time": times}, name="time")


def nominal_days() -> np.ndarray:
    """Month lengths of the nominal year (``noleap``)."""
    return month_lengths(NOMINAL_CALENDAR, NOMINAL_YEAR)
