"""Names, codes and colours of every categorical layer, in one table.

The GeoTIFF writer (colour table and category names), the NetCDF writer (``flag_values`` /
``flag_meanings``), the figures and the report all read from here. 255 is nodata everywhere.
Colours are the project's own choice: blue for release, orange for constraint (distinguishable
with the common colour-vision deficiencies), and for factors the colour-blind-safe qualitative
palette of Okabe & Ito (2008, "Color Universal Design").
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["layer_categories", "Category", "ZONES", "ZONE_CODE", "ENSEMBLE_ZONES", "ROBUSTNESS", "EXTRAPOLATION", "FACTOR_COLOURS", "NODATA_COLOUR", "factor_categories",
           "switch_categories", "switch_code", "hex_to_rgba"]

NODATA_COLOUR = "#00000000"


@dataclass(frozen=True)
class Category:
    code: int
    name: str
    colour: str
    description: str = ""


ZONES: tuple[Category, ...] = (
    Category(0, "stable", "#d9d9d9", "ceiling changes by less than the thresholds"),
    Category(1, "release", "#2166ac", "ceiling rises by more than the release threshold"),
    Category(2, "constraint", "#e66101", "ceiling falls by more than the constraint threshold"),
    Category(3, "opens", "#92c5de", "zero now, above zero later"),
    Category(4, "closes", "#fdb863", "above zero now, zero later"),
    Category(5, "absent", "#f7f7f7", "zero now and later"),
)
ZONE_CODE = {c.name: c.code for c in ZONES}

# the ensemble zone map adds one class: release or constraint on whose sign the models disagree
ENSEMBLE_ZONES: tuple[Category, ...] = (
    *ZONES,
    Category(6, "uncertain", "#c2a5cf", "release or constraint in the median, but the models disagree on the sign"),
)
ROBUSTNESS: tuple[Category, ...] = (
    Category(0, "low agreement", "#bababa", "fewer models than the threshold agree on the sign of the change"),
    Category(1, "robust", "#4d4d4d", "at least the threshold share of models agree on the sign of the change"),
)
EXTRAPOLATION: tuple[Category, ...] = (
    Category(0, "within sampled range", "#f0f0f0", "MESS >= 0: every factor within the survey's range"),
    Category(1, "novel climate", "#762a83", "MESS < 0: at least one factor outside the survey's range"),
)

FACTOR_COLOURS = ("#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00", "#CC79A7", "#999999")


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
            colour = "#bdbdbd" if i == j else FACTOR_COLOURS[j % len(FACTOR_COLOURS)]
            out.append(Category(switch_code(i, j, k), name, colour, f"limited by {a} now, by {b} later"))
    return tuple(out)


def hex_to_rgba(h: str) -> tuple[int, int, int, int]:
    h = h.lstrip("#")
    if len(h) == 6:
        h += "ff"
    return tuple(int(h[i : i + 2], 16) for i in (0, 2, 4, 6))  # type: ignore[return-value]


def layer_categories(layer: str, factors: list[str], *, ensemble: bool = False) -> tuple[Category, ...] | None:
    """The category table of an output layer (None for continuous layers); used by every writer."""
    if layer in ("limiting", "novel_factor"):
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
