"""Climate grids: layers opened lazily, aligned to one template grid, in the model's units.

Each layer becomes a lazy ``xarray.DataArray`` (y, x) backed by dask: every chunk is read on
demand through :class:`BlockReader`, which reads the window directly when the layer already
shares the template's CRS, transform and shape, and otherwise through GDAL's warped virtual
dataset (``WarpedVRT``), which resamples just that window onto the template. Nothing loads a
whole grid (``reproject_match`` would). Nodata becomes NaN; unit conversion is a linear
scale and offset applied per chunk. GDAL's block cache is capped inside every read.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import rasterio
import xarray as xr
from rasterio.enums import MaskFlags, Resampling
from rasterio.errors import RasterioIOError
from rasterio.vrt import WarpedVRT
from rasterio.windows import Window

from .errors import DataError, InputFileError
from .scenarios import LayerRef
from .units import linear_conversion

__all__ = ["GridSpec", "LayerInfo", "BlockReader", "inspect_layer", "layer_reader", "open_layer", "gdal_name", "template_grid",
           "source_cells_per_chunk", "MAX_WARP_CELLS"]


@dataclass(frozen=True)
class GridSpec:
    """A grid: CRS (WKT), affine transform (6 numbers) and shape."""

    crs_wkt: str
    transform: tuple[float, float, float, float, float, float]
    width: int
    height: int

    @property
    def affine(self) -> rasterio.Affine:
        return rasterio.Affine(*self.transform)

    @property
    def crs(self) -> rasterio.crs.CRS:
        return rasterio.crs.CRS.from_wkt(self.crs_wkt)

    @property
    def shape(self) -> tuple[int, int]:
        return (self.height, self.width)

    @property
    def bounds(self) -> tuple[float, float, float, float]:
        return rasterio.transform.array_bounds(self.height, self.width, self.affine)[::1]

    def coords(self) -> dict[str, np.ndarray]:
        a = self.affine
        x = a.c + a.a * (np.arange(self.width) + 0.5)
        y = a.f + a.e * (np.arange(self.height) + 0.5)
        return {"y": y, "x": x}

    def matches(self, other: GridSpec) -> bool:
        if self.shape != other.shape:
            return False
        if self.crs != other.crs:
            return False
        tol = 1e-9 * max(abs(self.transform[0]), abs(self.transform[4]))
        return all(math.isclose(a, b, abs_tol=tol) for a, b in zip(self.transform, other.transform))


@dataclass(frozen=True)
class LayerInfo:
    name: str  # what GDAL opens
    grid: GridSpec
    nodata: float | None
    dtype: str
    units: str | None
    # packing (CF scale_factor / add_offset, GDAL band scale / offset): GDAL reads the stored
    # values, so the reader unpacks them: value = stored * scale + offset
    scale: float = 1.0
    offset: float = 0.0


def gdal_name(ref: LayerRef) -> str:
    if ref.variable:
        return f'NETCDF:"{ref.path}":{ref.variable}'
    return str(ref.path)


def _variable_names(path: Path) -> list[str]:
    try:
        import netCDF4

        with netCDF4.Dataset(path) as ds:
            return [v for v, var in ds.variables.items() if var.ndim >= 2]
    except Exception:
        return []


def inspect_layer(ref: LayerRef, *, factor: str) -> LayerInfo:
    """Open a layer's header and check it can be used (one line per problem)."""
    path = Path(ref.path)
    where = f"layer of '{factor}' ({ref.describe()})"
    if not path.is_file():
        raise InputFileError(f"{where}: file not found; check the path in the config")
    if ref.variable and '"' in str(path):
        raise DataError(f"{where}: the path holds a double quote (\"), which GDAL cannot open as a NetCDF variable "
                        "(NETCDF:\"file\":variable); rename the file or its folder without the quote")
    if ref.variable and ref.variable not in (names := _variable_names(path)):
        raise DataError(
            f"{where}: the NetCDF file has no variable '{ref.variable}'; it has {', '.join(names) or 'none'}: fix 'variable'"
        )
    try:
        with rasterio.Env(GDAL_PAM_ENABLED="NO"), rasterio.open(gdal_name(ref)) as src:
            if src.count != 1:
                raise DataError(f"{where}: has {src.count} bands; give one single-band layer per factor")
            if src.crs is None:
                raise DataError(f"{where}: has no CRS; assign one (e.g. gdal_edit.py -a_srs EPSG:4326) before use")
            t = src.transform
            if t.b != 0 or t.d != 0:
                raise DataError(f"{where}: the grid has rotation terms in its transform; warp it to a north-up grid first")
            if t.a <= 0 or t.e >= 0:
                raise DataError(f"{where}: the grid is not north-up (transform {tuple(t)[:6]}); warp it first")
            if src.nodata is None and (bad := sentinel_in_sample(src)) is not None:
                raise DataError(
                    f"{where}: declares no nodata value but holds {bad:g}, a usual nodata marker; declare nodata "
                    f"(e.g. gdal_edit.py -a_nodata {bad:g} {path.name}) so those cells are not read as values"
                )
            units = ref.units or (src.units[0] if src.units and src.units[0] else None) or src.tags(1).get("units")
            grid = GridSpec(src.crs.to_wkt(), tuple(t)[:6], src.width, src.height)  # type: ignore[arg-type]
            pack_scale = float(src.scales[0]) if src.scales and src.scales[0] is not None else 1.0
            pack_offset = float(src.offsets[0]) if src.offsets and src.offsets[0] is not None else 0.0
            return LayerInfo(gdal_name(ref), grid, src.nodata, src.dtypes[0], units or None, pack_scale, pack_offset)
    except RasterioIOError as exc:
        raise InputFileError(f"{where}: cannot be opened as a raster ({str(exc).splitlines()[0]}); is it a complete GeoTIFF or NetCDF?") from None


# values that exports write for "no data" when the file does not declare it
SENTINELS = (-9999.0, -99999.0, -32768.0, -32767.0, -999.0)
SENTINEL_FLOAT_MIN = -1e38  # -3.4e38 (float32 lowest) and -1.7e308


def sentinel_in_sample(src: Any, size: int = 256) -> float | None:
    """A nodata-like sentinel found in a decimated sample (at most ``size`` x ``size`` cells, read
    from overviews or by skipping rows and columns) of an open single-band raster, or None."""
    try:
        sample = src.read(1, out_shape=(min(size, src.height), min(size, src.width)), masked=False)
    except (RasterioIOError, rasterio.errors.RasterioError, ValueError):
        return None  # unreadable data is reported when the layer is read
    vals = np.asarray(sample, dtype=np.float64)
    if np.dtype(src.dtypes[0]).kind == "f":
        low = vals[np.isfinite(vals)]
        if low.size and low.min() <= SENTINEL_FLOAT_MIN:
            return float(np.float32(low.min())) if low.min() > -3.5e38 else float(low.min())
    for v in SENTINELS:
        if np.any(vals == v):
            return v
    return None


def template_grid(ref: LayerRef, *, factor: str) -> GridSpec:
    return inspect_layer(ref, factor=factor).grid


def _overlaps(src_grid: GridSpec, tpl: GridSpec) -> bool:
    from rasterio.warp import transform_bounds

    try:
        west, south, east, north = transform_bounds(src_grid.crs, tpl.crs, *src_grid.bounds, densify_pts=21)
    except Exception:
        return True  # cannot tell; the warp will produce nodata where it does not overlap
    w2, s2, e2, n2 = tpl.bounds
    return west < e2 and east > w2 and south < n2 and north > s2


class BlockReader:
    """Array-like (2-D, float32) that reads any window of a layer on the template grid.

    Picklable (holds only names and numbers), so dask.distributed workers can use it.
    """

    def __init__(
        self, info: LayerInfo, template: GridSpec, *, resampling: str = "bilinear",
        scale: float = 1.0, offset: float = 0.0, cache_mb: int = 64, units: str = "", source: str = "",
        source_units: str = "",
    ) -> None:
        self.name = info.name
        self.dtype_in = info.dtype
        self.units, self.source, self.source_units = units, source, source_units
        self.nodata = info.nodata
        self.template = template
        self.aligned = info.grid.matches(template)
        self.resampling = resampling
        self.scale = scale
        self.offset = offset
        self.cache_mb = cache_mb
        self.shape = template.shape
        self.dtype = np.dtype("float32")
        self.ndim = 2

    def _plain(self, src: Any) -> bool:
        """True when the window can be read as float32 and its nodata marked by one comparison:
        float32 values, a nodata value exact in float32 (or none) as the only mask, no rescaling."""
        if self.dtype_in != "float32" or self.scale != 1.0 or self.offset != 0.0:
            return False
        if self.nodata is not None and not math.isnan(self.nodata) and float(np.float32(self.nodata)) != self.nodata:
            return False
        flags = src.mask_flag_enums[0]
        return all(f in (MaskFlags.nodata, MaskFlags.all_valid) for f in flags)

    def _read(self, window: Window) -> np.ndarray | np.ma.MaskedArray:
        with rasterio.Env(GDAL_CACHEMAX=self.cache_mb, GDAL_PAM_ENABLED="NO"), rasterio.open(self.name) as src:
            if self.aligned:
                if self._plain(src):  # the common case, without float64 and masked temporaries
                    a = src.read(1, window=window)
                    if self.nodata is not None and not math.isnan(self.nodata):
                        a[a == np.float32(self.nodata)] = np.nan
                    return a
                return src.read(1, window=window, masked=True)
            with WarpedVRT(
                src, crs=self.template.crs, transform=self.template.affine,
                width=self.template.width, height=self.template.height,
                resampling=Resampling[self.resampling], src_nodata=self.nodata, nodata=np.nan,
                dtype="float32",
            ) as vrt:
                return vrt.read(1, window=window, masked=True)

    def __getitem__(self, key: Any) -> np.ndarray:
        rows, cols = key
        r0, r1, _ = rows.indices(self.shape[0])
        c0, c1, _ = cols.indices(self.shape[1])
        window = Window(c0, r0, c1 - c0, r1 - r0)
        try:
            data = self._read(window)
        except (RasterioIOError, rasterio.errors.WarpOperationError) as exc:
            detail = str(exc.__cause__ or exc.__context__ or exc).splitlines()[0]
            if "cannot allocate" in detail.lower() or "out of memory" in detail.lower():
                raise DataError(
                    f"layer {self.name}: reading rows {r0}-{r1}, columns {c0}-{c1} needs more memory than there is "
                    f"({detail}); the layer is too large for its window of the template grid: resample it nearer "
                    "to the template's resolution first (e.g. gdalwarp -tr)"
                ) from None
            raise InputFileError(
                f"layer {self.name}: reading rows {r0}-{r1}, columns {c0}-{c1} failed ({detail}); the file is "
                "truncated or corrupt: re-create or re-download it"
            ) from None
        if not isinstance(data, np.ma.MaskedArray):
            return data
        out = np.ma.filled(data.astype(np.float64), np.nan)
        if self.scale != 1.0 or self.offset != 0.0:
            out = out * self.scale + self.offset
        return out.astype(np.float32)


# the most cells of a layer that one chunk of the template may need to read when the layer is
# warped (8 GiB of float32); a far finer layer is refused before any work, with its size as the cause
MAX_WARP_CELLS = 2**31


def source_cells_per_chunk(info: LayerInfo, template: GridSpec, chunk: int) -> float:
    """About how many cells of a layer not on the template grid one template chunk covers."""
    from rasterio.warp import transform_bounds

    if info.grid.matches(template):
        return float(min(chunk, template.height) * min(chunk, template.width))
    try:
        west, south, east, north = transform_bounds(template.crs, info.grid.crs, *template.bounds, densify_pts=21)
    except Exception:
        return 0.0  # cannot tell; the read reports what goes wrong
    cell = abs(info.grid.transform[0] * info.grid.transform[4])
    per_cell = abs(east - west) * abs(north - south) / cell / (template.width * template.height)
    return per_cell * min(chunk, template.height) * min(chunk, template.width)


def layer_reader(
    ref: LayerRef, template: GridSpec, *, factor: str, units: str | None, resampling: str = "bilinear",
    cache_mb: int = 64, chunk: int = 1024,
) -> BlockReader:
    """The chunk reader of a layer on the template grid, in ``units`` (checked, nothing read)."""
    info = inspect_layer(ref, factor=factor)
    where = f"layer of '{factor}' ({ref.describe()})"
    if not _overlaps(info.grid, template):
        raise DataError(f"{where}: does not overlap the template grid (bounds {info.grid.bounds}); check the layer's extent and CRS")
    need = source_cells_per_chunk(info, template, chunk)
    if need > MAX_WARP_CELLS:
        raise DataError(
            f"{where}: {info.grid.width:,} x {info.grid.height:,} cells, so fine beside the template grid "
            f"({template.width:,} x {template.height:,}) that one chunk would read about {need:.2g} of its cells "
            f"({need * 4 / 2**30:,.0f} GiB); its size is the cause: resample it nearer to the template's resolution "
            "first (e.g. gdalwarp -tr)"
        )
    if units is None:
        scale, offset = 1.0, 0.0
    elif info.units is None:
        raise DataError(f"{where}: has no units; set a 'units' attribute on the layer or units for it in the config (model units: '{units}')")
    else:
        scale, offset = linear_conversion(info.units, units, where=where)
    # unpack first, then convert: (stored * s + o) * scale + offset
    scale, offset = info.scale * scale, info.offset * scale + offset
    return BlockReader(info, template, resampling=resampling, scale=scale, offset=offset, cache_mb=cache_mb,
                       units=units or info.units or "", source=str(ref.path), source_units=info.units or "")


def open_layer(
    ref: LayerRef, template: GridSpec, *, factor: str, units: str | None, chunk: int = 1024,
    resampling: str = "bilinear", cache_mb: int = 64,
) -> xr.DataArray:
    """A lazy, aligned, unit-converted layer on the template grid."""
    import dask.array as da
    from dask.base import tokenize

    reader = layer_reader(ref, template, factor=factor, units=units, resampling=resampling, cache_mb=cache_mb,
                          chunk=chunk)
    arr = da.from_array(reader, chunks=(chunk, chunk), asarray=True, fancy=False, lock=False,
                        name=f"layer-{factor}-{tokenize(reader.name, template, reader.scale, reader.offset, resampling)}",
                        meta=np.empty((0, 0), np.float32))
    return xr.DataArray(
        arr, dims=("y", "x"), coords=template.coords(), name=factor,
        attrs={"units": reader.units, "source": reader.source, "source_units": reader.source_units},
    )
