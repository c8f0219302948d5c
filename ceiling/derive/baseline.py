"""The fine monthly baseline: twelve layers per variable, read window by window on the template grid.

Each month of each variable is one single-band layer (GeoTIFF, or a NetCDF variable), found by
filling ``{month}`` (``01``..``12``; ``{month:d}`` gives ``1``..``12``) into the configured
path. Every layer is read through the project's chunk reader (:class:`ceiling.grids.BlockReader`:
aligned reads, or a warp per window when the layer is on another grid; nodata to NaN; units
converted). Temperatures come out in degC; precipitation as the month's total in mm: a depth
(``mm``) is taken as that total, a rate (``mm day-1``, ``kg m-2 s-1``) is multiplied by the
month's mean length in the Gregorian calendar (February 28.2425 days).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import DataError
from ..grids import BlockReader, GridSpec, inspect_layer, layer_reader
from ..scenarios import LayerRef
from ..units import linear_conversion
from .calendars import MEAN_MONTH_DAYS
from .series import VARIABLES
from .settings import BaselineLayer

__all__ = ["Baseline", "baseline_refs", "open_baseline"]


def baseline_refs(spec: BaselineLayer, base: Path) -> list[LayerRef]:
    """The twelve layers of one baseline variable."""
    out = []
    for m in range(1, 13):
        p = Path(spec.path.format(month=f"{m:02d}") if "{month}" in spec.path else spec.path.format(month=m)).expanduser()
        out.append(LayerRef(p if p.is_absolute() else base / p, spec.variable, spec.units))
    return out


def _precip_reader(ref: LayerRef, grid: GridSpec, where: str, month: int, resampling: str) -> tuple[BlockReader, float]:
    info = inspect_layer(ref, factor=where)
    if info.units is None:
        raise DataError(f"baseline layer {ref.describe()}: has no units; set a units attribute or derive.baseline.pr.units "
                        "(e.g. 'mm' for a monthly total)")
    try:
        linear_conversion(info.units, "mm", where=where)
        return layer_reader(ref, grid, factor=where, units="mm", resampling=resampling), 1.0
    except DataError:
        pass
    try:
        linear_conversion(info.units, "mm day-1", where=where)
    except DataError:
        raise DataError(f"baseline layer {ref.describe()}: units '{info.units}' are neither a precipitation depth nor a "
                        "rate; use e.g. 'mm' (the month's total) or 'mm day-1'") from None
    return layer_reader(ref, grid, factor=where, units="mm day-1", resampling=resampling), float(MEAN_MONTH_DAYS[month - 1])


@dataclass(frozen=True)
class Baseline:
    """Readers of the twelve months of every baseline variable, on one grid."""

    readers: dict[str, tuple[tuple[BlockReader, float], ...]]  # variable -> 12 x (reader, multiplier)
    refs: dict[str, list[LayerRef]]

    @property
    def variables(self) -> list[str]:
        return list(self.readers)

    def files(self) -> list[Path]:
        return [r.path for refs in self.refs.values() for r in refs]

    def read(self, rows: slice, cols: slice) -> dict[str, np.ndarray]:
        """Every variable's twelve months in one window: (12, h, w) float64, NaN outside the data."""
        out = {}
        for var, months in self.readers.items():
            out[var] = np.stack([np.asarray(r[rows, cols], dtype="float64") * k for r, k in months])
        return out


def open_baseline(layers: dict[str, BaselineLayer], grid: GridSpec, base: Path, *, resampling: str = "bilinear") -> Baseline:
    """Check and open every baseline layer (headers only; nothing is read)."""
    readers, refs = {}, {}
    for var, spec in layers.items():
        refs[var] = baseline_refs(spec, base)
        months = []
        for m, ref in enumerate(refs[var], start=1):
            where = f"baseline {var} month {m:02d}"
            if VARIABLES[var] == "precipitation":
                months.append(_precip_reader(ref, grid, where, m, resampling))
            else:
                months.append((layer_reader(ref, grid, factor=where, units="degC", resampling=resampling), 1.0))
        readers[var] = tuple(months)
    return Baseline(readers, refs)
