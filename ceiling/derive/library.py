"""The climate-index library (xclim), imported on first use.

xclim takes a few seconds to import and defines units on its own pint registry on the way (it
logs each redefinition); importing it here, once, with pint's log quietened, keeps both out of
every command that derives nothing. Its registry is not the project's (:mod:`ceiling.units`), so
the project's UDUNITS year is untouched.
"""

from __future__ import annotations

import contextlib
import logging
from collections.abc import Iterator
from functools import lru_cache
from types import ModuleType, SimpleNamespace

__all__ = ["xclim", "xsdba"]


@contextlib.contextmanager
def _quiet_pint() -> Iterator[None]:
    """pint's log at ERROR while a climate library defines its units."""
    log = logging.getLogger("pint")
    level = log.level
    log.setLevel(logging.ERROR)
    try:
        yield
    finally:
        log.setLevel(level)


@lru_cache(maxsize=1)
def xclim() -> SimpleNamespace:
    """``indices``, ``helpers`` (xclim.indices.helpers), ``convert_units_to`` and ``atmos``."""
    with _quiet_pint():
        import xclim.indices as indices
        import xclim.indices.helpers as helpers
        from xclim import atmos
        from xclim.core.units import convert_units_to
    return SimpleNamespace(indices=indices, helpers=helpers, convert_units_to=convert_units_to, atmos=atmos)


@lru_cache(maxsize=1)
def xsdba() -> ModuleType:
    """The bias-adjustment library (xsdba), imported on first use like :func:`xclim`."""
    with _quiet_pint():
        import xsdba as module
    return module
