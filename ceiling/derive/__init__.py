"""From climate-model output to factor layers: climatologies, change factors and climate indices.

The stage (:mod:`ceiling.derive.stage`) reads a fine monthly baseline (:mod:`.baseline`) and
climate-model series (:mod:`.series`, calendars in :mod:`.calendars`), makes period
climatologies (:mod:`.climatology`) and monthly change factors (:mod:`.delta`), interpolates them
to the template grid (:mod:`.regrid`), and computes the configured factors (:mod:`.indices`,
potential evapotranspiration in :mod:`.pet`) chunk by chunk. Daily series: the reader turns
them into monthly means; quantile mapping (xsdba) and the indices that need daily values (frost
days, degree days) are in :mod:`.daily` (Python API, not yet a route of the stage). ``ceiling derive CONFIG --out DIR`` is :func:`derive_to_folder`; ``ceiling run``
derives raw-series climates on the way (:func:`derive_for_run`).
"""

from .settings import DeriveSection, FactorDefinition, derive_section
from .stage import DeriveResult, derive_for_run, derive_inputs, derive_to_folder

__all__ = ["DeriveSection", "FactorDefinition", "derive_section", "DeriveResult", "derive_to_folder",
           "derive_for_run", "derive_inputs"]
