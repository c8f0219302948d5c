"""The coarse monthly changes of every climate delivered as series, computed once before the chunks.

For each (climate model, scenario, period) and each baseline variable: the historical
climatology over the reference years and the future climatology over the period, from the
model's own series, then their change (:mod:`ceiling.derive.delta`). A historical climatology is
read once per climate model and variable, whatever the number of scenarios and periods.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..errors import DataError
from ..scenarios import Climate
from .calendars import parse_period
from .climatology import Climatology, monthly_climatology
from .delta import DeltaOptions, change_factor
from .series import Region, read_series, series_files

__all__ = ["CoarseChange", "coarse_changes", "series_inputs"]


@dataclass(frozen=True)
class CoarseChange:
    """One climate's monthly changes on its climate model's grid."""

    climate: Climate
    lon: np.ndarray
    lat: np.ndarray
    change: dict[str, np.ndarray]  # variable -> (12, n_lat, n_lon)
    record: dict = field(default_factory=dict)  # years, calendar, files: for the manifest


def _where(c: Climate) -> str:
    return f"climate {c.scenario} / {c.model} / {c.period}"


def coarse_changes(climates: list[Climate], variables: list[str], region: Region, historical: tuple[int, int],
                   opts: DeltaOptions, *, say=lambda s: None) -> list[CoarseChange]:
    """The coarse changes of every climate that has series (others are skipped)."""
    hist_cache: dict[tuple[str, str], tuple[Climatology, tuple]] = {}
    out = []
    for c in climates:
        if c.series is None:
            continue
        years = parse_period(c.period, where=f"{_where(c)}: period")
        change, record, grid = {}, {"historical_years": list(historical), "future_years": list(years), "variables": {}}, None
        for var in variables:
            key = (c.series.historical, var)
            if key not in hist_cache:
                s = read_series(c.series.historical, var, region, historical, where=f"{_where(c)}: historical run")
                hist_cache[key] = (monthly_climatology(s, historical), s.files)
            h, h_files = hist_cache[key]
            fs = read_series(c.series.future, var, region, years, where=f"{_where(c)}: {c.scenario} run")
            f = monthly_climatology(fs, years)
            where = f"{_where(c)} ({var})"
            if h.calendar != f.calendar:
                raise DataError(f"{where}: the historical run uses the '{h.calendar}' calendar and the {c.scenario} run "
                                f"'{f.calendar}'; supply both runs of the climate model in its one calendar")
            change[var] = change_factor(h, f, opts, where=where)
            if grid is not None and (grid[0].shape != h.lon.shape or not np.allclose(grid[0], h.lon) or not np.allclose(grid[1], h.lat)):
                raise DataError(f"{where}: the variables of {c.model} are on different grids; supply them on the model's one grid")
            grid = (h.lon, h.lat)
            record["variables"][var] = {"calendar": f.calendar, "frequency": fs.frequency,
                                        "historical_files": [str(p) for p in h_files],
                                        "future_files": [str(p) for p in fs.files]}
        say(f"changes of {c.scenario} / {c.model} / {c.period} on a {grid[1].size} x {grid[0].size} grid")
        out.append(CoarseChange(c, grid[0], grid[1], change, record))
    return out


def series_inputs(climates: list[Climate], variables: list[str]) -> list:
    """Every series file the climates read (for checksums and the output-folder check)."""
    files = []
    for c in climates:
        if c.series is None:
            continue
        for var in variables:
            for pattern in (c.series.historical, c.series.future):
                files += series_files(pattern, var, where=_where(c))
    return list(dict.fromkeys(files))
