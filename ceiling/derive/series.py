"""Climate-model series: CF NetCDF files of monthly or daily values on a regular lon-lat grid.

A series is one variable (``tas``, ``tasmax``, ``tasmin`` or ``pr``) of one run of one climate
model, spread over one or more files (one per span of years), found by a glob pattern in which
``{variable}`` is filled in. Reading it:

- decodes time with ``cftime`` in the file's own calendar, refuses files of one series (or the
  historical run and a scenario) in different calendars, and refuses a period with a missing
  month (or, for daily series, a month with missing days);
- keeps only the region around the template grid, with longitudes put in one frame around the
  region's centre, so grids in 0-360 and in -180-180 alike work, with latitudes ascending;
- converts units through pint (CF strings such as ``K`` or ``kg m-2 s-1``) to degC for
  temperatures and mm day-1 for precipitation (through the density of water for a mass flux);
- turns daily values into monthly means (temperatures) and monthly mean rates (precipitation).
"""

from __future__ import annotations

import glob
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import xarray as xr
from rasterio.warp import transform_bounds

from ..errors import DataError, InputFileError
from ..grids import GridSpec
from ..units import linear_conversion
from .calendars import canonical_calendar, days_in_month

__all__ = ["VARIABLES", "CANONICAL_UNITS", "Region", "MonthlySeries", "template_region", "series_files", "read_series"]

# the variables a series may hold (CMIP short names) and the quantity each is
VARIABLES = {"tas": "temperature", "tasmax": "temperature", "tasmin": "temperature", "pr": "precipitation"}
CANONICAL_UNITS = {"temperature": "degC", "precipitation": "mm day-1"}
MARGIN_CELLS = 2  # coarse cells kept around the region (bilinear interpolation needs one)


@dataclass(frozen=True)
class Region:
    """The template grid's extent in geographic degrees."""

    west: float
    east: float
    south: float
    north: float

    @property
    def centre(self) -> float:
        return 0.5 * (self.west + self.east)


def template_region(grid: GridSpec) -> Region:
    """The lon-lat box that holds the template grid (densified edges for projected grids)."""
    if grid.crs.is_geographic:
        w, s, e, n = grid.bounds
    else:
        w, s, e, n = transform_bounds(grid.crs, "EPSG:4326", *grid.bounds, densify_pts=101)
    return Region(float(w), float(e), float(s), float(n))


@dataclass(frozen=True)
class MonthlySeries:
    """Monthly values of one variable on a (lat, lon) grid, latitudes ascending, in canonical units."""

    variable: str
    values: np.ndarray  # (n_months, n_lat, n_lon), float64: degC, or mm day-1 (monthly mean rate)
    years: np.ndarray
    months: np.ndarray
    lon: np.ndarray  # in the region's frame (centre +/- 180)
    lat: np.ndarray
    calendar: str
    frequency: str  # "monthly" or "daily" (as read; values are monthly)
    files: tuple[Path, ...]


def series_files(pattern: str, variable: str, *, where: str) -> list[Path]:
    """The files of one variable's series (``{variable}`` filled into the glob pattern)."""
    if variable not in VARIABLES:
        raise DataError(f"{where}: unknown variable '{variable}'; series variables are {', '.join(VARIABLES)}")
    pat = pattern.replace("{variable}", variable)
    files = sorted(Path(p) for p in glob.glob(pat))
    if not files:
        raise InputFileError(f"{where}: no file matches '{pat}' (variable '{variable}'); check the series pattern in the config")
    return files


def _axis(ds: xr.Dataset, var: xr.DataArray, kind: str, path: Path) -> str:
    names = {"lon": ("lon", "longitude", "x", "nav_lon"), "lat": ("lat", "latitude", "y", "nav_lat")}[kind]
    units = {"lon": ("degrees_east", "degree_east", "degrees_E", "degreesE"), "lat": ("degrees_north", "degree_north", "degrees_N", "degreesN")}[kind]
    std = {"lon": "longitude", "lat": "latitude"}[kind]
    for name in var.coords:
        c = ds[name]
        if c.attrs.get("standard_name") == std or c.attrs.get("units") in units or str(name).lower() in names:
            if c.ndim != 1:
                raise DataError(f"{path}: the {std} coordinate '{name}' is not one-dimensional (a curvilinear grid); "
                                "regrid the series to a regular lon-lat grid first")
            return str(name)
    raise DataError(f"{path}: variable '{var.name}' has no {std} coordinate; give it a CF '{kind}' coordinate")


def _in_frame(lon: np.ndarray, centre: float) -> np.ndarray:
    return (np.asarray(lon, dtype="float64") - centre + 180.0) % 360.0 - 180.0 + centre


def _subset(var: xr.DataArray, lon_name: str, lat_name: str, region: Region, path: Path) -> xr.DataArray:
    """The region (plus a margin) of a (time, lat, lon) variable, lon in frame and sorted, lat ascending."""
    lon = _in_frame(var[lon_name].values, region.centre)
    var = var.assign_coords({lon_name: lon}).sortby(lon_name).sortby(lat_name)
    lon, lat = var[lon_name].values, var[lat_name].values
    keep = []
    for coords, lo, hi, name in ((lon, region.west, region.east, "longitude"), (lat, region.south, region.north, "latitude")):
        step = float(np.median(np.diff(coords))) if coords.size > 1 else 0.0
        if coords.size < 2 or coords[0] - 0.5 * step > lo + 1e-9 or coords[-1] + 0.5 * step < hi - 1e-9:
            raise DataError(f"{path}: the series' {name}s ({coords.min():g} to {coords.max():g}) do not cover the template "
                            f"grid ({lo:g} to {hi:g}); supply a series over the whole region")
        idx = np.flatnonzero((coords >= lo - MARGIN_CELLS * step) & (coords <= hi + MARGIN_CELLS * step))
        if idx.size < 2:  # a region smaller than one coarse cell: the two nearest
            idx = np.argsort(np.abs(coords - 0.5 * (lo + hi)))[:2]
            idx.sort()
        keep.append(slice(int(idx[0]), int(idx[-1]) + 1))
    return var.isel({lon_name: keep[0], lat_name: keep[1]})


def _convert(var: xr.DataArray, variable: str, path: Path) -> np.ndarray:
    target = CANONICAL_UNITS[VARIABLES[variable]]
    units = var.attrs.get("units")
    if not units:
        raise DataError(f"{path}: variable '{variable}' has no units attribute; set it (e.g. 'K' or 'kg m-2 s-1')")
    try:
        scale, offset = linear_conversion(str(units), target, where=f"{path}: variable '{variable}'")
    except DataError:
        raise DataError(f"{path}: units '{units}' of variable '{variable}' cannot be converted to {target} "
                        f"({VARIABLES[variable]}); fix the file's units attribute") from None
    return np.asarray(var.values, dtype="float64") * scale + offset


def _read_file(path: Path, variable: str, region: Region, years: tuple[int, int]):
    try:
        ds = xr.open_dataset(path, decode_times=xr.coders.CFDatetimeCoder(use_cftime=True))
    except Exception as exc:  # noqa: BLE001 - any reader failure is a bad file for the user
        raise InputFileError(f"{path}: cannot be read as NetCDF ({str(exc).splitlines()[0]}); is it a complete CF file?") from None
    with ds:
        if variable not in ds.data_vars:
            have = ", ".join(v for v in ds.data_vars if ds[v].ndim >= 3) or "none"
            raise DataError(f"{path}: no variable '{variable}' (it has: {have}); check the file or the series pattern")
        var = ds[variable]
        if "time" not in var.dims:
            raise DataError(f"{path}: variable '{variable}' has no time dimension; a series needs one")
        calendar = canonical_calendar(ds["time"].encoding.get("calendar", ds["time"].attrs.get("calendar")), where=str(path))
        lon_name, lat_name = _axis(ds, var, "lon", path), _axis(ds, var, "lat", path)
        var = var.transpose("time", lat_name, lon_name)
        yr = np.array([t.year for t in var["time"].values])
        var = var.isel(time=np.flatnonzero((yr >= years[0]) & (yr <= years[1])))
        var = _subset(var, lon_name, lat_name, region, path).load()
        times = var["time"].values
        return (_convert(var, variable, path), times, var[lon_name].values, var[lat_name].values, calendar)


def _frequency(times: np.ndarray, where: str) -> str:
    if times.size < 2:
        return "monthly"
    steps = np.array([(b - a).total_seconds() / 86400.0 for a, b in zip(times[:-1], times[1:])])
    step = float(np.median(steps))
    if 0.9 < step < 1.1:
        return "daily"
    if 27.5 < step < 31.5:
        return "monthly"
    raise DataError(f"{where}: time steps of {step:g} days are neither daily nor monthly; supply monthly or daily values")


def read_series(pattern: str, variable: str, region: Region, years: tuple[int, int], *, where: str) -> MonthlySeries:
    """Read the years ``years`` of one variable's series: monthly values in canonical units."""
    files = series_files(pattern, variable, where=where)
    parts, calendar, grid = [], None, None
    for f in files:
        values, times, lon, lat, cal = _read_file(f, variable, region, years)
        if calendar is not None and cal != calendar:
            raise DataError(f"{f}: calendar '{cal}' differs from '{calendar}' of {files[0].name}; "
                            "a series must use one calendar throughout")
        if grid is not None and (lon.shape != grid[0].shape or not np.allclose(lon, grid[0]) or not np.allclose(lat, grid[1])):
            raise DataError(f"{f}: grid differs from that of {files[0].name}; all files of a series must share one grid")
        calendar, grid = cal, (lon, lat)
        if times.size:
            parts.append((values, times))
    if not parts:
        raise DataError(f"{where}: the files of '{variable}' hold no time step in {years[0]}-{years[1]}; "
                        "supply the period's years or change the period")
    values = np.concatenate([p[0] for p in parts])
    times = np.concatenate([p[1] for p in parts])
    order = np.argsort(times)
    values, times = values[order], times[order]
    if np.any(times[1:] == times[:-1]):
        raise DataError(f"{where}: the files of '{variable}' overlap in time; remove the duplicate span")
    freq = _frequency(times, where)
    values, ys, ms = _monthly(values, times, calendar, freq, where=f"{where} ({variable})", years=years)
    return MonthlySeries(variable, values, ys, ms, grid[0], grid[1], calendar, freq, tuple(files))


def _monthly(values: np.ndarray, times: np.ndarray, calendar: str, freq: str, *, where: str,
             years: tuple[int, int]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Monthly means in year-month order, with every month of ``years`` present (and complete)."""
    ym = np.array([t.year * 12 + (t.month - 1) for t in times])
    keys, first, counts = np.unique(ym, return_index=True, return_counts=True)
    expected = np.arange(years[0] * 12, (years[1] + 1) * 12)
    missing = np.setdiff1d(expected, keys)
    if missing.size:
        y, m = divmod(int(missing[0]), 12)
        raise DataError(f"{where}: month {y:04d}-{m + 1:02d} is missing ({missing.size} month(s) missing in "
                        f"{years[0]}-{years[1]}); supply the whole period or change it")
    if freq == "monthly":
        if np.any(counts > 1):
            y, m = divmod(int(keys[np.argmax(counts > 1)]), 12)
            raise DataError(f"{where}: month {y:04d}-{m + 1:02d} appears more than once; remove the duplicate")
        out = values
    else:
        full = np.array([days_in_month(int(k) // 12, int(k) % 12 + 1, calendar) for k in keys])
        short = np.flatnonzero(counts != full)
        if short.size:
            y, m = divmod(int(keys[short[0]]), 12)
            raise DataError(f"{where}: month {y:04d}-{m + 1:02d} has {counts[short[0]]} daily values of "
                            f"{full[short[0]]} ({calendar} calendar); supply complete months")
        out = np.add.reduceat(values, first, axis=0) / counts[:, None, None]
    return out, keys // 12, keys % 12 + 1
