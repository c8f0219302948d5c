"""Survey samples: abundance at points plus the factor values there.

Reads a CSV (coordinate columns and a declared CRS) or any vector file geopandas reads (point
geometry), checks the abundance column, and takes each factor's value either from a column of
the table or by sampling a present-day layer at the points (points are reprojected to the
layer's CRS; nearest cell by default, bilinear on request). Points outside a layer or on its
nodata are dropped, counted by reason and reported in a warning.

The coordinates, abundance and species are kept apart from the table's other columns
(:class:`SurveyTable`), so no user column can stand in for them, whatever its name.
"""

from __future__ import annotations

import csv
import hashlib
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from pyproj import CRS, Transformer
from pyproj.exceptions import CRSError

from .errors import DataError, DroppedPointsWarning, InputFileError

__all__ = ["Samples", "SurveyTable", "read_survey", "sample_layer", "load_samples", "parse_crs"]

VECTOR_SUFFIXES = {".gpkg", ".shp", ".geojson", ".json", ".fgb", ".gml", ".kml"}
TABLE_SUFFIXES = {".csv", ".txt", ".tsv"}
# cell texts that spreadsheets and R write for a missing value (read as text, reported as such)
MISSING_MARKERS = frozenset({"NA", "N/A", "n/a", "#N/A", "#NA", "NULL", "null", "None", "<NA>", "nan", "NaN", "-nan", "-NaN"})


@dataclass(frozen=True)
class SurveyTable:
    """A survey as read: coordinates, abundance and species (None without a species column),
    kept apart from ``columns``, the table's other columns under their own names."""

    x: np.ndarray
    y: np.ndarray
    abundance: np.ndarray
    species: np.ndarray | None
    columns: pd.DataFrame

    def __len__(self) -> int:
        return int(self.abundance.size)


@dataclass(frozen=True)
class Samples:
    """One species' usable survey points."""

    species: str
    abundance: np.ndarray
    values: pd.DataFrame
    x: np.ndarray
    y: np.ndarray
    crs: str
    dropped: Mapping[str, int] = field(default_factory=dict)
    sha256: str = ""

    @property
    def n(self) -> int:
        return int(self.abundance.size)

    def summary(self) -> str:
        zeros = int(np.sum(self.abundance == 0))
        dropped = ", ".join(f"{v} {k}" for k, v in self.dropped.items() if v) or "none"
        return (
            f"{self.species}: {self.n} points ({zeros} zeros), factors "
            f"{', '.join(self.values.columns)}; dropped: {dropped}"
        )


def parse_crs(text: Any, *, where: str) -> CRS:
    try:
        return CRS.from_user_input(text)
    except (CRSError, TypeError) as exc:
        raise DataError(
            f"{where}: CRS {text!r} is not recognised ({str(exc).splitlines()[0]}); "
            "use an EPSG code such as 'EPSG:4326' or a WKT/PROJ string"
        ) from None


def _read_table(path: Path) -> pd.DataFrame:
    """The table as text (every cell a string, missing-value markers kept as written)."""
    if path.stat().st_size == 0:
        raise InputFileError(f"{path}: the file is empty; export the survey table with a header row and data")
    sep = "\t" if path.suffix.lower() == ".tsv" else ","
    try:
        df = pd.read_csv(path, sep=sep, dtype=str, keep_default_na=False)
    except pd.errors.EmptyDataError:
        raise InputFileError(f"{path}: the file is empty; export the survey table with a header row and data") from None
    except (pd.errors.ParserError, UnicodeDecodeError) as exc:
        raise InputFileError(f"{path}: not a readable CSV table ({str(exc).splitlines()[0]}); save it as comma-separated UTF-8") from None
    if df.shape[1] == 1:
        head = str(df.columns[0])
        for sep, name in ((";", "semicolons"), ("\t", "tabs"), ("|", "pipes")):
            if sep in head:
                raise InputFileError(
                    f"{path}: columns are separated by {name}, not commas; save the table as "
                    "comma-separated CSV (or use a .tsv suffix for tabs)"
                )
    _check_header(path, sep)
    if df.empty:
        raise DataError(f"{path}: the table has a header but no rows; add the survey records")
    return df


def _check_header(path: Path, sep: str) -> None:
    """Refuse repeated column names (a reader would rename or drop one of them silently)."""
    with path.open(newline="", encoding="utf-8-sig", errors="replace") as fh:
        header = [h.strip() for h in next(csv.reader(fh, delimiter=sep), [])]
    seen: dict[str, int] = {}
    for i, name in enumerate(header, start=1):
        if name in seen:
            raise DataError(
                f"{path}: column '{name}' appears twice in the header (columns {seen[name]} and {i}); give each "
                "column a distinct name"
            )
        seen[name] = i


def _shown(value: Any) -> str:
    """A cell as the user wrote it, for a message."""
    if value is None or (not isinstance(value, str) and pd.isna(value)) or str(value).strip() == "":
        return "empty"
    text = str(value).strip()
    return f"'{text}' (a missing-value marker)" if text in MISSING_MARKERS else repr(value) if isinstance(value, str) else text


def read_survey(
    path: str | Path,
    *,
    x: str = "lon",
    y: str = "lat",
    crs: str | None = None,
    abundance: str = "count",
    species: str | None = None,
    layer: str | None = None,
) -> tuple[SurveyTable, CRS]:
    """Read the survey: coordinates, abundance and species apart from the other columns."""
    path = Path(path)
    if not path.is_file():
        raise InputFileError(f"survey file not found: {path}; check survey.path in the config")
    suffix = path.suffix.lower()
    if suffix in TABLE_SUFFIXES:
        df = _read_table(path)
        for col, key in ((x, "survey.x"), (y, "survey.y")):
            if col not in df.columns:
                raise DataError(
                    f"{path}: coordinate column '{col}' ({key}) not found; columns are "
                    f"{', '.join(map(str, df.columns))}"
                )
        if crs is None:
            raise DataError(f"{path}: a CSV survey needs its CRS; set survey.crs (e.g. 'EPSG:4326')")
        the_crs = parse_crs(crs, where=f"{path} (survey.crs)")
        xs = pd.to_numeric(df[x], errors="coerce").to_numpy(dtype=float)
        ys = pd.to_numeric(df[y], errors="coerce").to_numpy(dtype=float)
    elif suffix in VECTOR_SUFFIXES:
        import geopandas as gpd

        try:
            gdf = gpd.read_file(path, layer=layer, engine="pyogrio")
        except Exception as exc:  # pyogrio raises several types for unreadable files
            raise InputFileError(f"{path}: cannot read the vector file ({str(exc).splitlines()[0]}); check the file and survey.layer") from None
        if gdf.empty:
            raise DataError(f"{path}: the vector file has no features; add the survey points")
        if gdf.crs is None and crs is None:
            raise DataError(f"{path}: the vector file declares no CRS; set survey.crs in the config")
        the_crs = parse_crs(crs, where=f"{path} (survey.crs)") if crs else CRS.from_user_input(gdf.crs)
        types = set(gdf.geometry.geom_type.dropna())
        if not types <= {"Point"}:
            raise DataError(f"{path}: survey geometry must be points; found {', '.join(sorted(types))}")
        xs, ys = gdf.geometry.x.to_numpy(dtype=float), gdf.geometry.y.to_numpy(dtype=float)
        df = pd.DataFrame(gdf.drop(columns=gdf.geometry.name))
    else:
        raise InputFileError(
            f"{path}: unknown survey format '{suffix}'; use CSV or a vector file (GeoPackage, Shapefile, GeoJSON)"
        )
    if not np.all(np.isfinite(xs) & np.isfinite(ys)):
        row = int(np.flatnonzero(~(np.isfinite(xs) & np.isfinite(ys)))[0])
        raise DataError(f"{path}: row {row + 1} has a missing or non-numeric coordinate; fix or remove it")
    if the_crs.is_geographic and (np.any(np.abs(ys) > 90) or np.any(np.abs(xs) > 360)):
        raise DataError(
            f"{path}: latitudes beyond +/-90 in column '{y}' under geographic CRS {the_crs.to_string()}; "
            "the x and y columns look swapped or the CRS is wrong: check survey.x, survey.y and survey.crs"
        )
    if abundance not in df.columns:
        raise DataError(
            f"{path}: abundance column '{abundance}' (survey.abundance) not found; columns are "
            f"{', '.join(map(str, df.columns))}"
        )
    ab = pd.to_numeric(df[abundance], errors="coerce").to_numpy(dtype=float)
    raw = df[abundance]
    bad = ~np.isfinite(ab)
    if bad.any():
        row = int(np.flatnonzero(bad)[0])
        raise DataError(
            f"{path}: abundance '{abundance}' in row {row + 1} is {_shown(raw.iloc[row])}, not a finite "
            "number; abundances must be counts or densities >= 0 (record absences as 0)"
        )
    if np.any(ab < 0):
        row = int(np.flatnonzero(ab < 0)[0])
        raise DataError(f"{path}: abundance '{abundance}' in row {row + 1} is negative ({ab[row]:g}); abundances must be >= 0")
    names_out = None
    if species is not None:
        if species not in df.columns:
            raise DataError(
                f"{path}: species column '{species}' (survey.species) not found; columns are "
                f"{', '.join(map(str, df.columns))}"
            )
        names = df[species].astype("string").str.strip()
        empty = names.isna() | (names == "") | names.isin(MISSING_MARKERS)
        if empty.any():
            row = int(np.flatnonzero(empty.to_numpy())[0])
            raise DataError(f"{path}: species column '{species}' is {_shown(df[species].iloc[row])} in row {row + 1}; "
                            "name every record's species")
        names_out = names.to_numpy(dtype=object)
    others = df[[c for c in df.columns if c not in (x, y, abundance, species)]].reset_index(drop=True)
    return SurveyTable(xs, ys, ab, names_out, others), the_crs


def _open_layer(path: Path):
    import rioxarray  # noqa: F401  (registers the .rio accessor)
    import xarray as xr

    if not Path(path).is_file():
        raise InputFileError(f"layer file not found: {path}; check the factor's 'layer' path")
    try:
        # mask_and_scale: unpack stored values (scale_factor / add_offset) as the projection does
        da = rioxarray.open_rasterio(path, masked=True, mask_and_scale=True, chunks={"x": 1024, "y": 1024})
    except Exception as exc:
        raise InputFileError(f"{path}: cannot open the layer ({str(exc).splitlines()[0]}); is it a GeoTIFF or NetCDF?") from None
    if isinstance(da, list | xr.Dataset):
        raise InputFileError(f"{path}: holds several variables; name one layer per file")
    return da.isel(band=0, drop=True) if "band" in da.dims else da


def sample_layer(
    path: str | Path, xs: np.ndarray, ys: np.ndarray, crs: CRS, *, method: str = "nearest"
) -> tuple[np.ndarray, np.ndarray, str | None]:
    """Values of a raster at points; returns (values, inside-grid mask, layer units)."""
    path = Path(path)
    da = _open_layer(path)
    _check_declared_nodata(path, da)
    lcrs = da.rio.crs
    if lcrs is None:
        raise DataError(f"{path}: the layer has no CRS; assign one (e.g. with gdal_edit.py -a_srs) before use")
    t = da.rio.transform()
    if t.b != 0 or t.d != 0:
        raise DataError(f"{path}: the grid has rotation terms in its transform; warp it to a north-up grid first")
    tr = Transformer.from_crs(crs, CRS.from_user_input(lcrs.to_wkt()), always_xy=True)
    px, py = tr.transform(xs, ys)
    col_f = (np.asarray(px) - t.c) / t.a
    row_f = (np.asarray(py) - t.f) / t.e
    ny, nx = da.shape
    inside = (col_f >= 0) & (col_f < nx) & (row_f >= 0) & (row_f < ny) & np.isfinite(col_f) & np.isfinite(row_f)
    vals = np.full(xs.shape, np.nan)
    if not inside.any():
        return vals, inside, layer_units(da)
    import xarray as xr

    def take(r: np.ndarray, c: np.ndarray) -> np.ndarray:
        r = np.clip(r, 0, ny - 1)
        c = np.clip(c, 0, nx - 1)
        sel = da.isel(y=xr.DataArray(r, dims="p"), x=xr.DataArray(c, dims="p"))
        return np.asarray(sel.values, dtype=np.float64)

    r0 = np.floor(row_f[inside]).astype(np.int64)
    c0 = np.floor(col_f[inside]).astype(np.int64)
    nearest = take(r0, c0)
    if method == "bilinear":
        rr, cc = row_f[inside] - 0.5, col_f[inside] - 0.5
        ri, ci = np.floor(rr).astype(np.int64), np.floor(cc).astype(np.int64)
        wr, wc = rr - ri, cc - ci
        v = (
            take(ri, ci) * (1 - wr) * (1 - wc) + take(ri, ci + 1) * (1 - wr) * wc
            + take(ri + 1, ci) * wr * (1 - wc) + take(ri + 1, ci + 1) * wr * wc
        )
        # next to nodata or the edge of the grid, fall back to the nearest cell
        nearest = np.where(np.isfinite(v), v, nearest)
    vals[inside] = nearest
    return vals, inside, layer_units(da)


def _check_declared_nodata(path: Path, da: Any) -> None:
    """Refuse a layer without declared nodata whose decimated sample holds a nodata marker
    (-9999, -3.4e38, ...): sampled there, the marker would be read as a factor value."""
    if da.rio.nodata is not None or da.rio.encoded_nodata is not None:
        return
    import rasterio

    from .grids import sentinel_in_sample

    try:
        with rasterio.Env(GDAL_PAM_ENABLED="NO"), rasterio.open(path) as src:
            if src.nodata is not None:
                return
            bad = sentinel_in_sample(src)
    except rasterio.errors.RasterioIOError:
        return
    if bad is not None:
        raise DataError(
            f"{path}: the layer declares no nodata value but holds {bad:g}, a usual nodata marker; declare nodata "
            f"(e.g. gdal_edit.py -a_nodata {bad:g} {path.name}) so those cells are not read as values"
        )


def layer_units(da: Any) -> str | None:
    """Units recorded on a layer (CF ``units`` attribute or GDAL band unit), if any."""
    u = da.attrs.get("units") or da.attrs.get("UNITS") or da.attrs.get("unit")
    return str(u) if u not in (None, "") else None


def _hash_frame(df: pd.DataFrame) -> str:
    return hashlib.sha256(pd.util.hash_pandas_object(df, index=False).to_numpy().tobytes()).hexdigest()


def load_samples(cfg: Any, *, species: Sequence[str] | None = None) -> dict[str, Samples]:
    """Read the survey of a :class:`~ceiling.config.RunConfig` and build each species' samples."""
    s = cfg.survey
    table, crs = read_survey(
        s.path, x=s.x, y=s.y, crs=s.crs, abundance=s.abundance, species=s.species, layer=s.layer
    )
    n_all = len(table)
    user = table.columns
    values: dict[str, np.ndarray] = {}
    reasons = {"outside grid": np.zeros(n_all, bool), "nodata": np.zeros(n_all, bool),
               "missing factor value": np.zeros(n_all, bool)}
    cell_key = None
    for f in cfg.factors:
        if f.column is not None:
            if f.column not in user.columns:
                used = {s.x: "survey.x", s.y: "survey.y", s.abundance: "survey.abundance", s.species: "survey.species"}
                taken = f" (it is {used[f.column]})" if f.column in used else ""
                raise DataError(
                    f"{s.path}: factor '{f.name}' reads column '{f.column}'{taken}, which the survey table "
                    f"lacks as a factor column; columns are {', '.join(map(str, user.columns)) or 'none'}"
                )
            v = pd.to_numeric(user[f.column], errors="coerce").to_numpy(dtype=float)
            reasons["missing factor value"] |= ~np.isfinite(v)
        else:
            v, inside, _ = sample_layer(f.layer, table.x, table.y, crs, method=s.sampling)
            reasons["outside grid"] |= ~inside
            reasons["nodata"] |= inside & ~np.isfinite(v)
            if cell_key is None:
                cell_key = f.name
        values[f.name] = v
    keep = ~(reasons["outside grid"] | reasons["nodata"] | reasons["missing factor value"])
    if not keep.any():
        raise DataError(
            f"{s.path}: none of the {n_all} survey points has values for every factor (outside the "
            "grid or on nodata); check survey.crs, the coordinate columns and the layers' extent"
        )
    frame = pd.DataFrame(values)
    species_col = pd.Series(table.species if table.species is not None else ["species"] * n_all)
    # every species of the survey, also one whose points were all dropped (it must not vanish)
    wanted = list(species) if species else list(dict.fromkeys(species_col))
    present = set(species_col)
    missing = [sp for sp in wanted if sp not in present]
    if missing:
        raise DataError(f"{s.path}: species {', '.join(missing)} not in the survey; it has {', '.join(sorted(present))}")
    # the frame the per-species checksums are computed from (their column names are part of the hash)
    hashed = pd.DataFrame({"_x": table.x, "_y": table.y, "_abundance": table.abundance})
    out: dict[str, Samples] = {}
    for sp in wanted:
        mine = (species_col == sp).to_numpy()
        dropped = {k: int(np.sum(m & mine & ~_earlier(reasons, k))) for k, m in reasons.items()}
        use = mine & keep
        if s.drop_duplicates and cell_key is not None:
            dup = pd.DataFrame({"v": values[cell_key], "x": table.x, "y": table.y}).round(9)
            first = ~dup.assign(use=use).loc[use].duplicated(subset=["x", "y"])
            keep_idx = np.flatnonzero(use)[first.to_numpy()]
            dropped["duplicate"] = int(use.sum() - keep_idx.size)
            use = np.zeros(n_all, bool)
            use[keep_idx] = True
        n_drop = sum(dropped.values())
        if n_drop:
            warnings.warn(
                f"species '{sp}': dropped {n_drop} of {int(mine.sum())} survey points ("
                + ", ".join(f"{v} {k}" for k, v in dropped.items() if v) + ")",
                DroppedPointsWarning,
                stacklevel=2,
            )
        sub = frame.loc[use].reset_index(drop=True)
        out[sp] = Samples(
            species=sp,
            abundance=table.abundance[use],
            values=sub,
            x=table.x[use],
            y=table.y[use],
            crs=crs.to_string(),
            dropped=dropped,
            sha256=_hash_frame(hashed.loc[mine]),
        )
    return out


def _earlier(reasons: dict[str, np.ndarray], key: str) -> np.ndarray:
    """Points already counted under an earlier reason (each dropped point counts once)."""
    acc = np.zeros_like(next(iter(reasons.values())))
    for k, m in reasons.items():
        if k == key:
            return acc
        acc = acc | m
    return acc
