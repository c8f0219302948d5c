"""Units of climate layers: parsing CF/udunits strings and converting to the model's units.

Parsing and conversion go through pint with cf-xarray's udunits-aware registry, so strings
such as ``"kg m-2 s-1"`` or ``"mm year-1"`` work as they appear in CF files. A precipitation
flux given as a mass flux (kg m-2 s-1) converts to a depth rate (mm per year) through the
density of liquid water, 1000 kg m-3 (the CF convention for ``precipitation_flux``).
A ``year`` is UDUNITS' year, the tropical year of 3.15569259747e7 s (udunits2-common.xml), as CF
units strings mean it; cf-xarray's registry would otherwise take the Julian year (365.25 days).
"""

from __future__ import annotations

from functools import lru_cache

from .errors import DataError

__all__ = ["linear_conversion", "same_units", "WATER_DENSITY"]

WATER_DENSITY = "1000 kg m-3"
UDUNITS_YEAR = "year = 3.15569259747e7 * second = yr"  # udunits2-common.xml: year = tropical year


@lru_cache(maxsize=1)
def _registry():
    import logging

    pint_log = logging.getLogger("pint")
    level = pint_log.level
    pint_log.setLevel(logging.ERROR)  # cf-xarray redefines a few units on import, by design
    try:
        from cf_xarray.units import units

        units.define(UDUNITS_YEAR)
        if hasattr(units, "_build_cache"):  # drop conversions cached before the redefinition
            units._build_cache()
    finally:
        pint_log.setLevel(level)
    return units


def _parse(text: str, where: str):
    ureg = _registry()
    try:
        return ureg.parse_units(str(text).strip())
    except Exception:
        raise DataError(f"{where}: units '{text}' are not recognised; use a CF/udunits string such as 'degC', 'K', 'mm year-1'") from None


def same_units(a: str, b: str) -> bool:
    return linear_conversion(a, b, where="units") == (1.0, 0.0)


@lru_cache(maxsize=256)
def linear_conversion(source: str, target: str, *, where: str) -> tuple[float, float]:
    """(scale, offset) with ``value_in_target = value_in_source * scale + offset``."""
    if str(source).strip() == str(target).strip():  # the same units: no conversion (and no unit registry to load)
        return 1.0, 0.0
    ureg = _registry()
    su, tu = _parse(source, where), _parse(target, where)
    if su == tu:
        return 1.0, 0.0
    q = ureg.Quantity
    try:
        a = q(0.0, su).to(tu).magnitude
        b = q(1.0, su).to(tu).magnitude
    except Exception:
        try:  # mass flux of water -> depth rate
            rho = q(WATER_DENSITY)
            a = (q(0.0, su) / rho).to(tu).magnitude
            b = (q(1.0, su) / rho).to(tu).magnitude
        except Exception:
            raise DataError(
                f"{where}: units '{source}' cannot be converted to the model's '{target}'; "
                "supply the layer in compatible units or fix its units attribute"
            ) from None
    return float(b - a), float(a)
