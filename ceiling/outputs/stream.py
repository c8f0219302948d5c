"""A map file while its climate is computed: an uncompressed stream with overviews, then a COG.

The GeoTIFF writer of :mod:`ceiling.outputs.geotiff` streams chunks into an uncompressed tiled
file and lets GDAL's COG driver compress it and compute the overviews. Computing the overviews
reads the whole map again, on one thread, after the projection: most of the time of the copy.
Here the overviews are computed by the chunk tasks instead, from the chunk they just computed
(:func:`decimate`), and written beside the map:

- the stream file holds the map (columns 0..W) and, to its right, every overview level stacked
  top to bottom (an atlas), so one file is opened per chunk and map;
- at the end a small VRT describes the map with its overview levels (one VRT per level, cut
  from the atlas), and GDAL's COG driver copies that: it compresses the map and the given
  overviews (on all cores) and computes nothing.

Overview levels are those GDAL's COG driver would make (factors 2, 4, ... until a level fits
in one COG block), as far as one chunk covers them (factors up to the chunk size), with the
values GDAL would give them: each float level averages the valid cells of 2 x 2 blocks of the
level before, each category level takes the first cell of each block (AVERAGE and NEAREST).
"""

from __future__ import annotations

import math
import os
import threading
from collections import OrderedDict
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from xml.sax.saxutils import escape, quoteattr

import numpy as np
import rasterio
import rasterio.shutil
from rasterio.windows import Window

from ..categories import Category, hex_to_rgba
from .atomic import tmp_name
from .geotiff import CODE_NODATA, FLOAT_NODATA, cog_block, stream_tile
from .sidecars import write_category_sidecars

__all__ = ["overview_levels", "decimate", "to_disk", "MapStream", "StreamReader", "COG_OPTIONS"]

COG_OPTIONS = {"COMPRESS": "DEFLATE", "PREDICTOR": "YES", "BIGTIFF": "IF_SAFER"}


def overview_levels(width: int, height: int, chunk: int) -> list[int]:
    """Overview factors for a COG of this size: 2, 4, ... while the previous level is larger
    than one COG block, and no larger than the chunk (each chunk makes its own part)."""
    block = cog_block(width, height)
    out: list[int] = []
    f = 2
    while max(math.ceil(width / (f // 2)), math.ceil(height / (f // 2))) > block and f <= chunk:
        out.append(f)
        f *= 2
    return out


def to_disk(a: np.ndarray, dtype: str) -> np.ndarray:
    """The values as stored: float32 with NaN as the nodata value, or uint8 codes."""
    if dtype == "float32":
        out = np.asarray(a, dtype=np.float32).copy()
        out[np.isnan(out)] = np.float32(FLOAT_NODATA)
        return out
    return np.asarray(a).astype(np.uint8, copy=False)


def decimate(a: np.ndarray, levels: Sequence[int], *, categorical: bool) -> list[np.ndarray]:
    """The overview blocks of one chunk (its origin a multiple of every factor), as stored.

    ``a`` holds NaN for nodata (float maps) or 255 (codes). Each float level holds the means
    of the valid cells of 2 x 2 blocks of the level before (nodata where none), code levels take
    the block's first cell: GDAL's AVERAGE and NEAREST overviews.
    """
    out = []
    h, w = a.shape
    if categorical:
        for f in levels:
            out.append(np.ascontiguousarray(a[::f, ::f]).astype(np.uint8))
        return out
    level = np.ascontiguousarray(a, dtype=np.float32)
    step = 1
    for f in levels:
        while step < f:  # each level from the one before, as GDAL does: means of 2 x 2 means
            s, n = _first_level(level)
            with np.errstate(invalid="ignore", divide="ignore"):
                level = np.where(n > 0, s / np.maximum(n, 1.0), np.nan).astype(np.float32)
            step *= 2
        out.append(to_disk(level, "float32"))
    return out


def _first_level_py(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sums (float64) and counts of the valid cells of each 2 x 2 block."""
    h, w = a.shape
    hh, ww = (h + 1) // 2, (w + 1) // 2
    s = np.zeros((hh, ww))
    n = np.zeros((hh, ww))
    for r in range(h):
        for c in range(w):
            v = a[r, c]
            if np.isfinite(v):
                s[r // 2, c // 2] += np.float64(v)
                n[r // 2, c // 2] += 1.0
    return s, n


try:
    import numba

    _first_level = numba.njit(_first_level_py, nogil=True, cache=True)
except ImportError:  # pragma: no cover - numba is a dependency; this is the slow way
    def _first_level(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        valid = np.isfinite(a)
        return _pairs(np.where(valid, a, 0.0).astype(np.float64)), _pairs(valid.astype(np.float64))


def _pairs(x: np.ndarray) -> np.ndarray:
    """Sums of 2 x 2 blocks (zero beyond an odd edge), in the order (a + b) + (c + d)."""
    h, w = x.shape
    if h % 2 or w % 2:
        x = np.pad(x, ((0, h % 2), (0, w % 2)))
    top = x[0::2, 0::2] + x[0::2, 1::2]
    top += x[1::2, 0::2]
    top += x[1::2, 1::2]
    return top


@dataclass
class MapStream:
    """One output map of one climate, from its first chunk to its COG."""

    final: Path
    grid: Any
    dtype: str
    description: str
    units: str = ""
    chunk: int = 1024
    categories: tuple[Category, ...] | None = None
    tags: dict[str, str] = field(default_factory=dict)
    levels: list[int] = field(default_factory=list)
    deflate_level: int = 1
    threads: int | None = None  # GDAL's compression threads for the COG (None: all cores)

    def __post_init__(self) -> None:
        self.final = Path(self.final)
        self.path = self.final.with_name(f".stream-{self.final.name}")
        w, h = self.grid.width, self.grid.height
        self.sizes = [(math.ceil(w / f), math.ceil(h / f)) for f in self.levels]
        self.offsets = list(np.cumsum([0] + [s[1] for s in self.sizes])[:-1])
        width = w + (self.sizes[0][0] if self.levels else 0)
        height = max(h, int(sum(s[1] for s in self.sizes)))
        self.nodata = CODE_NODATA if self.dtype == "uint8" else FLOAT_NODATA
        tile = stream_tile(self.chunk)
        profile = dict(driver="GTiff", width=width, height=height, count=1, dtype=self.dtype, nodata=self.nodata,
                       crs=self.grid.crs, transform=self.grid.affine,
                       tiled=True, blockxsize=tile, blockysize=tile, compress="none", SPARSE_OK="TRUE",
                       BIGTIFF="IF_SAFER")
        with rasterio.Env(GDAL_PAM_ENABLED="NO"), rasterio.open(self.path, "w", **profile):
            pass
        self._lock = threading.Lock()

    def __getstate__(self) -> dict:  # to a cluster worker (which makes the COG): no lock
        state = dict(self.__dict__)
        state.pop("_lock", None)
        return state

    def __setstate__(self, state: dict) -> None:
        self.__dict__.update(state)
        self._lock = threading.Lock()

    def write(self, rows: slice, cols: slice, data: np.ndarray, overviews: Sequence[np.ndarray]) -> None:
        """Write one chunk (values as stored, see :func:`to_disk`) and its overview blocks.

        Threads may call it at once: each file has its own lock, and stays open between chunks
        (a few dozen handles at most, see :data:`OPEN_STREAMS`), which halves the cost of a
        chunk's write. GDAL guards each dataset against block-cache flushes from other threads.
        """
        with self._lock:
            dst = _open_stream(self)
            dst.write(data, 1, window=Window(cols.start, rows.start, data.shape[1], data.shape[0]))
            x0 = self.grid.width
            for f, off, ov in zip(self.levels, self.offsets, overviews):
                dst.write(ov, 1, window=Window(x0 + cols.start // f, int(off) + rows.start // f, ov.shape[1],
                                               ov.shape[0]))

    # --- the COG ---------------------------------------------------------------------------

    def _band_xml(self, src_rect: tuple[int, int, int, int], size: tuple[int, int], *, main: bool) -> str:
        x, y, w, h = src_rect
        dtype = "Float32" if self.dtype == "float32" else "Byte"
        nodata = repr(float(np.float32(self.nodata))) if self.dtype == "float32" else str(CODE_NODATA)
        parts = [f'<VRTRasterBand dataType="{dtype}" band="1">', f"<NoDataValue>{nodata}</NoDataValue>"]
        if main:
            parts.append(f"<Description>{escape(self.description)}</Description>")
            if self.units:
                parts.append(f"<UnitType>{escape(self.units)}</UnitType>")
            if self.categories is not None:
                cmap = {c.code: hex_to_rgba(c.colour) for c in self.categories}
                cmap[CODE_NODATA] = (0, 0, 0, 0)
                entries = "".join(
                    '<Entry c1="{}" c2="{}" c3="{}" c4="{}"/>'.format(*cmap.get(i, (0, 0, 0, 255))) for i in range(256))
                parts.append(f"<ColorInterp>Palette</ColorInterp><ColorTable>{entries}</ColorTable>")
        parts.append(
            f"<SimpleSource><SourceFilename relativeToVRT=\"1\">{escape(self.path.name)}</SourceFilename>"
            f"<SourceBand>1</SourceBand><SrcRect xOff=\"{x}\" yOff=\"{y}\" xSize=\"{w}\" ySize=\"{h}\"/>"
            f"<DstRect xOff=\"0\" yOff=\"0\" xSize=\"{size[0]}\" ySize=\"{size[1]}\"/></SimpleSource>")
        if main:
            for f in self.levels:
                parts.append(f"<Overview><SourceFilename relativeToVRT=\"1\">{escape(self._level_vrt(f).name)}"
                             "</SourceFilename><SourceBand>1</SourceBand></Overview>")
        parts.append("</VRTRasterBand>")
        return "".join(parts)

    def _level_vrt(self, f: int) -> Path:
        return self.path.with_name(f"{self.path.name}.ovr{f}.vrt")

    def _dataset_xml(self, size: tuple[int, int], transform: Any, band: str, tags: dict[str, str] | None) -> str:
        gt = ", ".join(repr(float(v)) for v in transform.to_gdal())
        md = ""
        if tags:
            md = "<Metadata>" + "".join(f"<MDI key={quoteattr(k)}>{escape(str(v))}</MDI>" for k, v in tags.items()) + "</Metadata>"
        return (f'<VRTDataset rasterXSize="{size[0]}" rasterYSize="{size[1]}"><SRS>{escape(self.grid.crs_wkt)}</SRS>'
                f"<GeoTransform>{gt}</GeoTransform>{md}{band}</VRTDataset>")

    def finalize(self, *, keep: bool = False) -> list[Path]:
        """Copy the map and its overviews into a COG at ``final`` (atomically); return the files
        written (the COG and, for categories, its ``.aux.xml`` and ``.qml``). With ``keep`` the
        uncompressed stream file stays, for :class:`StreamReader` (the caller removes it)."""
        _close_stream(self)
        w, h = self.grid.width, self.grid.height
        aff = self.grid.affine
        vrts = []
        for f, off, size in zip(self.levels, self.offsets, self.sizes):
            p = self._level_vrt(f)
            band = self._band_xml((w, int(off), size[0], size[1]), size, main=False)
            p.write_text(self._dataset_xml(size, aff * rasterio.Affine.scale(w / size[0], h / size[1]), band, None),
                         encoding="utf-8")
            vrts.append(p)
        main = self.path.with_name(self.path.name + ".vrt")
        main.write_text(self._dataset_xml((w, h), aff, self._band_xml((0, 0, w, h), (w, h), main=True), self.tags),
                        encoding="utf-8")
        vrts.append(main)
        staging = tmp_name(self.final)
        try:
            with rasterio.Env(GDAL_PAM_ENABLED="NO", GDAL_CACHEMAX=64):
                rasterio.shutil.copy(
                    str(main), str(staging), driver="COG", BLOCKSIZE=cog_block(w, h), NUM_THREADS=str(self.threads) if self.threads else "ALL_CPUS",
                    OVERVIEWS="FORCE_USE_EXISTING" if self.levels else "NONE", LEVEL=self.deflate_level,
                    **COG_OPTIONS)
            os.replace(staging, self.final)
        finally:
            staging.unlink(missing_ok=True)
            for p in vrts:
                p.unlink(missing_ok=True)
        written = [self.final]
        if self.categories is not None:  # names, attribute table, layer style (outputs/sidecars.py)
            written += write_category_sidecars(self.final, self.categories, self.description)
        if not keep:
            self.path.unlink(missing_ok=True)
        return written

    def close(self) -> None:
        """Close the file if this process holds it open (before another process copies it)."""
        _close_stream(self)

    def discard(self) -> None:
        _close_stream(self)
        self.path.unlink(missing_ok=True)


class StreamReader:
    """Windows of a map from its kept stream file (uncompressed: reading is a copy, not a decode).

    Float maps come back with NaN for nodata, codes as uint8. Picklable (a path and numbers).
    """

    def __init__(self, path: Path, dtype: str) -> None:
        self.path, self.dtype = str(path), dtype

    def __getitem__(self, key: tuple[slice, slice]) -> np.ndarray:
        rows, cols = key
        window = Window(cols.start, rows.start, cols.stop - cols.start, rows.stop - rows.start)
        with rasterio.Env(GDAL_PAM_ENABLED="NO"), rasterio.open(self.path) as src:
            a = src.read(1, window=window)
        if self.dtype == "float32":
            a[a == np.float32(FLOAT_NODATA)] = np.nan
        return a


# Stream files open for writing, most recently used last. Their number is capped, so a run with
# many species and layers stays well inside the limit of open files; a closed one reopens on its
# next chunk.
OPEN_STREAMS = 64
_OPEN: OrderedDict[int, tuple[MapStream, Any]] = OrderedDict()
_OPEN_LOCK = threading.Lock()


def _open_stream(s: MapStream) -> Any:
    """The open dataset of a stream (the caller holds the stream's lock)."""
    key = id(s)
    with _OPEN_LOCK:
        if key in _OPEN:
            _OPEN.move_to_end(key)
            return _OPEN[key][1]
        for victim in list(_OPEN):  # close the least recently used files that no thread is writing
            if len(_OPEN) < OPEN_STREAMS:
                break
            other = _OPEN[victim][0]
            if other._lock.acquire(blocking=False):
                try:
                    _OPEN.pop(victim)[1].close()
                finally:
                    other._lock.release()
        with rasterio.Env(GDAL_PAM_ENABLED="NO"):
            dst = rasterio.open(s.path, "r+")
        _OPEN[key] = (s, dst)
        return dst


def _close_stream(s: MapStream) -> None:
    with _OPEN_LOCK:
        entry = _OPEN.pop(id(s), None)
    if entry is not None:
        entry[1].close()
