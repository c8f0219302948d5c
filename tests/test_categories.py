"""The category table (ceiling/categories.py): codes, and colours that can be told apart.

Colour differences are CIEDE2000 (Sharma, Wu & Dalal 2005, "The CIEDE2000 color-difference
formula: implementation notes, supplementary test data, and mathematical observations", Color
Research & Application 30(1): 21-30) between CIELAB coordinates of the sRGB colours (IEC
61966-2-1, D65), both computed by colour-science, an outside library; its CIEDE2000 is checked
here against the paper's first test pair. The bar of 10 units for "clearly different at a
glance" is a rule of thumb (common practice); a difference of 1-2 units is about the smallest a
viewer notices (from memory).
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from ceiling.categories import (
    ENSEMBLE_ZONES,
    EXTRAPOLATION,
    FACTOR_COLOURS,
    NODATA_GREY,
    ROBUSTNESS,
    ZONES,
    factor_categories,
    layer_categories,
    switch_categories,
)

colour = pytest.importorskip("colour", reason="colour-science is a test dependency (pip install -e .[test])")

CLEARLY_DIFFERENT = 10.0  # CIEDE2000 units (common practice, see the module docstring)
WHITE = "#ffffff"  # a GIS draws transparent nodata over its canvas, white by default
FACTORS = [f"f{i}" for i in range(len(FACTOR_COLOURS))]  # every factor colour once
TABLES = {
    "zones": ZONES, "ensemble zones": ENSEMBLE_ZONES, "robustness": ROBUSTNESS,
    "extrapolation": EXTRAPOLATION, "factors": factor_categories(FACTORS),
}


def lab(hex_colour: str) -> np.ndarray:
    rgb = np.array([int(hex_colour[i:i + 2], 16) for i in (1, 3, 5)]) / 255.0
    return colour.XYZ_to_Lab(colour.sRGB_to_XYZ(rgb))


def delta_e(a: str, b: str) -> float:
    return float(colour.delta_E(lab(a), lab(b), method="CIE 2000"))


def test_ciede2000_reproduces_the_published_test_pair():
    # Sharma, Wu & Dalal (2005), Table 1, pair 1: (50, 2.6772, -79.7751) vs (50, 0, -82.7485): 2.0425
    d = colour.delta_E(np.array([50.0, 2.6772, -79.7751]), np.array([50.0, 0.0, -82.7485]), method="CIE 2000")
    assert float(d) == pytest.approx(2.0425, abs=1e-4)


@pytest.mark.parametrize("name", sorted(TABLES))
def test_codes_run_from_zero_without_gaps(name):
    assert [c.code for c in TABLES[name]] == list(range(len(TABLES[name])))


def test_switch_codes_run_from_zero_without_gaps():
    cats = switch_categories(["a", "b", "c"])
    assert [c.code for c in cats] == list(range(9))


def every_class_colour() -> list[tuple[str, str]]:
    out = [(f"{name}: {c.name}", c.colour) for name, cats in TABLES.items() for c in cats]
    out += [(f"switch: {c.name}", c.colour) for c in switch_categories(FACTORS)]
    return out


@pytest.mark.parametrize("background", [NODATA_GREY, WHITE], ids=["figure nodata grey", "white GIS canvas"])
def test_no_class_colour_looks_like_nodata(background):
    close = [(label, c, round(delta_e(background, c), 1)) for label, c in every_class_colour()
             if delta_e(background, c) < CLEARLY_DIFFERENT]
    assert not close, f"class colours too close to {background}: {close}"


@pytest.mark.parametrize("name", sorted(TABLES))
def test_classes_of_one_layer_differ_from_each_other(name):
    pairs = [(a.name, b.name, round(delta_e(a.colour, b.colour), 1)) for a, b in itertools.combinations(TABLES[name], 2)
             if delta_e(a.colour, b.colour) < CLEARLY_DIFFERENT]
    assert not pairs, pairs


def test_the_switch_colours_each_transition_by_its_future_factor_and_every_unchanged_class_alike():
    cats = {c.name: c.colour for c in switch_categories(["a", "b"])}
    assert cats["a -> b"] == factor_categories(["a", "b"])[1].colour
    assert cats["b -> a"] == factor_categories(["a", "b"])[0].colour
    assert cats["a (unchanged)"] == cats["b (unchanged)"] == ZONES[0].colour  # the colour of "no change"


def test_layer_categories_names_every_categorical_layer():
    assert layer_categories("zone", ["a"]) == ZONES
    assert layer_categories("zone", ["a"], ensemble=True) == ENSEMBLE_ZONES
    assert layer_categories("ceiling", ["a"]) is None


def test_the_figures_draw_nodata_in_the_tested_grey():
    from ceiling import maps

    assert maps.NODATA_BG == NODATA_GREY
