"""The change-factor ("delta") method: a climate model's change, brought onto a fine baseline.

For each calendar month and variable, the change between the model's future and historical
climatologies is computed on the model's own grid, interpolated to the fine grid and applied to
the fine baseline of the same month:

- temperatures (additive): ``future_fine = baseline + (model_future - model_historical)``;
- precipitation (multiplicative): ``future_fine = baseline * min(cap, model_future /
  max(model_historical, floor))``. The floor on the denominator keeps a nearly dry historical
  month from turning a few millimetres of future rain into a huge ratio; the cap bounds what
  remains. Both are stated in the config (``[derive] precip_floor``, ``precip_cap``) and written
  to the manifest.

The factors are then computed from the adjusted monthly fields, never changed themselves, so a
factor's change follows from the monthly changes through its own definition.

References: Anandhi, A., Frei, A., Pierson, D. C., et al. (2011). Examination of change factor
methodologies for climate change impact assessment. Water Resources Research 47, W03501
(additive and multiplicative change factors, per month). Hay, L. E., Wilby, R. L. &
Leavesley, G. H. (2000). A comparison of delta change and downscaled GCM scenarios for three
mountainous basins in the United States. Journal of the American Water Resources Association
36(2), 387-397.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import DataError
from .climatology import Climatology
from .series import VARIABLES

__all__ = ["DeltaOptions", "change_factor", "apply_change", "is_additive"]


@dataclass(frozen=True)
class DeltaOptions:
    """The bounds of the multiplicative (precipitation) change."""

    precip_cap: float = 3.0     # largest ratio future / historical
    precip_floor: float = 3.0   # mm per month: the historical denominator is at least this


def is_additive(variable: str) -> bool:
    return VARIABLES[variable] == "temperature"


def change_factor(hist: Climatology, fut: Climatology, opts: DeltaOptions, *, where: str) -> np.ndarray:
    """Per calendar month, the change from ``hist`` to ``fut`` on their (shared) grid."""
    if hist.values.shape != fut.values.shape or not (np.allclose(hist.lon, fut.lon) and np.allclose(hist.lat, fut.lat)):
        raise DataError(f"{where}: the historical and future series of '{hist.variable}' are on different grids; "
                        "supply both runs of a climate model on its one grid")
    if hist.calendar != fut.calendar:
        raise DataError(f"{where}: the historical run of '{hist.variable}' uses the '{hist.calendar}' calendar and the "
                        f"future run '{fut.calendar}'; supply both runs in the model's one calendar")
    if is_additive(hist.variable):
        return fut.values - hist.values
    ratio = fut.values / np.maximum(hist.values, opts.precip_floor)
    return np.minimum(ratio, opts.precip_cap)


def apply_change(variable: str, baseline: np.ndarray, change: np.ndarray) -> np.ndarray:
    """The baseline with the (interpolated) change applied: added, or multiplied for precipitation."""
    return baseline + change if is_additive(variable) else baseline * change
