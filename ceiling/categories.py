"""Names, codes and colours of every categorical layer, in one table.

The GeoTIFF writer (colour table, category names, attribute table and layer style), the NetCDF
writer (``flag_values`` / ``flag_meanings``), the figures and the report all read from here. 255
is nodata everywhere; codes run from 0 without gaps.

Colours. Blue for release, orange for constraint, purple for novel climate: these come unchanged
from the ColorBrewer schemes (Cynthia A. Brewer, Mark Harrower and The Pennsylvania State
University, colorbrewer2.org, Apache License 2.0; Harrower & Brewer 2003, "ColorBrewer.org: an
online tool for selecting colour schemes for maps", The Cartographic Journal 40(1): 27-37), named
beside each colour below (the 11-class schemes that matplotlib ships list them, except
``#e66101``, which is in PuOr's 3- to 5-class schemes, from memory). The neutral classes
("stable", "unchanged", "absent", "low agreement", "within sampled range") are our own choice: a
pale sand and a taupe, chosen so that every class differs clearly from the grey that marks
no data in the figures (:data:`NODATA_GREY`) and from white, the usual GIS canvas behind the
transparent nodata cells (CIEDE2000 >= 10: ``tests/test_categories.py``). Factor colours: the
colour-blind-safe qualitative palette of Okabe & Ito (2008, "Color Universal Design"),
including its black.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["layer_categories", "Category", "ZONES", "ZONE_CODE", "ENSEMBLE_ZONES", "ROBUSTNESS", "EXTRAPOLATION", "FACTOR_COLOURS", "NODATA_COLOUR",
           "NODATA_GREY", "NO_CHANGE", "factor_categories", "switch_categories", "switch_code", "hex_to_rgba"]

NODATA_COLOUR = "#00000000"  # on disk: nodata is transparent in colour tables and styles
NODATA_GREY = "#bdbdbd"  # in the figures: the background of nodata cells (ColorBrewer Greys)
NO_CHANGE = "#e6dcc3"  # pale sand: "stable" zones and "unchanged" limiting factors (our own)


@dataclass(frozen=True)
class Category:
    code: int
    name: str
    colour: str
    description: str = ""


ZONES: tuple[Category, ...] = (
    Category(0, "stable", NO_CHANGE, "ceiling changes by less than the thresholds"),
    Category(1, "release", "#2166ac", "ceiling rises by more than the release threshold"),  # ColorBrewer RdBu
    Category(2, "constraint", "#e66101", "ceiling falls by more than the constraint threshold"),  # ColorBrewer PuOr
    Category(3, "opens", "#92c5de", "zero now, above zero later"),  # ColorBrewer RdBu
    Category(4, "closes", "#fdb863", "above zero now, zero later"),  # ColorBrewer PuOr
    Category(5, "absent", "#8c7b6b", "zero now and later"),  # taupe (our own)
)
ZONE_CODE = {c.name: c.code for c in ZONES}

# the ensemble zone map adds one class: release or constraint on whose sign the models disagree
ENSEMBLE_ZONES: tuple[Category, ...] = (
    *ZONES,
    Category(6, "uncertain", "#c2a5cf", "release or constraint in the median, but the models disagree on the sign"),  # ColorBrewer PRGn
)
ROBUSTNESS: tuple[Category, ...] = (
    Category(0, "low agreement", "#efe6cf", "fewer models than the threshold agree on the sign of the change"),  # our own
    Category(1, "robust", "#4d4d4d", "at least the threshold share of models agree on the sign of the change"),  # ColorBrewer RdGy
)
EXTRAPOLATION: tuple[Category, ...] = (
    Category(0, "within sampled range", "#efe6cf", "MESS >= 0: every factor within the survey's range"),  # our own
    Category(1, "novel climate", "#762a83", "MESS < 0: at least one factor outside the survey's range"),  # ColorBrewer PRGn
)

# Okabe & Ito (2008): orange, sky blue, bluish green, yellow, blue, vermillion, reddish purple, black
FACTOR_COLOURS = ("#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00", "#CC79A7", "#000000")


def factor_categories(factors: list[str]) -> tuple[Category, ...]:
    return tuple(
        Category(i, f, FACTOR_COLOURS[i % len(FACTOR_COLOURS)], f"limited by {f}") for i, f in enumerate(factors)
    )


def switch_code(present: int, future: int, k: int) -> int:
    return present * k + future


def switch_categories(factors: list[str]) -> tuple[Category, ...]:
    """Codes ``present * K + future``: 'a -> b', or 'a (unchanged)'."""
    k = len(factors)
    if k * k > 255:
        raise ValueError(f"switch codes need K*K <= 255; got K={k}")
    out = []
    for i, a in enumerate(factors):
        for j, b in enumerate(factors):
            name = f"{a} (unchanged)" if i == j else f"{a} -> {b}"
            colour = NO_CHANGE if i == j else FACTOR_COLOURS[j % len(FACTOR_COLOURS)]
            out.append(Category(switch_code(i, j, k), name, colour, f"limited by {a} now, by {b} later"))
    return tuple(out)


def hex_to_rgba(h: str) -> tuple[int, int, int, int]:
    h = h.lstrip("#")
    if len(h) == 6:
        h += "ff"
    return tuple(int(h[i : i + 2], 16) for i in (0, 2, 4, 6))  # type: ignore[return-value]


def layer_categories(layer: str, factors: list[str], *, ensemble: bool = False) -> tuple[Category, ...] | None:
    """The category table of an output layer (None for continuous layers); used by every writer."""
    if layer in ("limiting", "least_similar"):
        return factor_categories(factors)
    if layer == "zone":
        return ENSEMBLE_ZONES if ensemble else ZONES
    if layer == "extrapolated":
        return EXTRAPOLATION
    if layer == "robustness":
        return ROBUSTNESS
    if layer == "switch":
        return switch_categories(factors)
    return None
