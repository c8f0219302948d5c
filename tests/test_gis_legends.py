"""Every categorical map of a run, opened in a real desktop GIS: exactly its classes, our colours.

The GIS is QGIS from Debian's packages (``qgis``, ``python3-qgis``), run headless
(``QT_QPA_PLATFORM=offscreen``) through ``tests/qgis_layers.py`` with the system Python it is
built for. Each map is opened as a user opens a file (the default style beside it is loaded),
and its legend (the paletted renderer's classes) and the map drawn one pixel per cell are
compared with the category table (ceiling/categories.py). Which layers are categorical comes
from that table too, so a renamed or new layer is covered without editing this test.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
from pathlib import Path

import pytest
import rasterio
from projection_helpers import REPO, small_run

from ceiling.categories import hex_to_rgba, layer_categories
from ceiling.model import load_models
from ceiling.outputs.names import ENSEMBLE, MODEL_FILE

SYSTEM_PYTHON = "/usr/bin/python3"  # Debian's python3-qgis is built for it
SCRIPT = REPO / "tests" / "qgis_layers.py"


def qgis_available() -> bool:
    if not Path(SYSTEM_PYTHON).exists():
        return False
    res = subprocess.run([SYSTEM_PYTHON, "-c", "import qgis.core"], capture_output=True, timeout=60,
                         env=dict(os.environ, QT_QPA_PLATFORM="offscreen"))
    return res.returncode == 0


needs_qgis = pytest.mark.skipif(
    not qgis_available(),
    reason="QGIS is not installed (Debian: apt-get install -y qgis python3-qgis; see the README's test command)")


@pytest.fixture(scope="module")
def run(tmp_path_factory) -> Path:
    return small_run(tmp_path_factory)


def categorical_maps(run: Path) -> dict[Path, tuple]:
    """Every map whose layer has a category table, with that table (the species' factors name
    the limiting-factor codes)."""
    factors = {m.species: m.factor_names for m in load_models(run / MODEL_FILE)}
    out = {}
    for tif in sorted(run.rglob("*.tif")):
        species = tif.relative_to(run).parts[0]
        if species not in factors:
            continue
        cats = layer_categories(tif.stem, list(factors[species]), ensemble=ENSEMBLE in tif.parts)
        if cats is not None:
            out[tif] = cats
    return out


@pytest.fixture(scope="module")
def seen(run) -> dict:
    maps = categorical_maps(run)
    env = dict(os.environ, QT_QPA_PLATFORM="offscreen", XDG_RUNTIME_DIR=str(run.parent / "xdg"))
    Path(env["XDG_RUNTIME_DIR"]).mkdir(mode=0o700, exist_ok=True)
    res = subprocess.run([SYSTEM_PYTHON, str(SCRIPT), *map(str, maps)], capture_output=True, text=True,
                         timeout=600, env=env)
    assert res.returncode == 0, res.stderr[-2000:]
    return json.loads(res.stdout)


def test_the_run_has_each_kind_of_categorical_map(run):
    layers = {(p.stem, ENSEMBLE in p.parts) for p in categorical_maps(run)}
    assert {("limiting", False), ("zone", False), ("switch", False), ("extrapolated", False),
            ("zone", True), ("robustness", True), ("limiting", True)} <= layers, layers


def test_every_category_layer_is_in_the_table(run):
    """No uint8 map of a species escapes the category table (it would come up with 256 classes)."""
    maps = categorical_maps(run)
    for tif in run.rglob("*.tif"):
        if tif.relative_to(run).parts[0] not in {m.species for m in load_models(run / MODEL_FILE)}:
            continue
        with rasterio.open(tif) as src:
            if src.dtypes[0] == "uint8":
                assert tif in maps, f"{tif} is uint8 but has no category table"


@needs_qgis
def test_qgis_shows_exactly_the_named_classes_in_our_colours(run, seen):
    maps = categorical_maps(run)
    assert seen["qgis"].startswith("3."), seen["qgis"]
    for tif, cats in maps.items():
        got = seen["layers"][str(tif)]
        where = tif.relative_to(run)
        assert got["valid"] and got["bands"] == 1 and got["crs"] == "EPSG:4326", (where, got)
        assert got["renderer"] == "paletted", (where, got["renderer"])
        assert got["nodata"] == 255, where
        expected = [[float(c.code), c.name, c.colour[:7].lower(), 255] for c in cats]
        assert got["classes"] == expected, (where, got["classes"])


@needs_qgis
def test_qgis_draws_each_cell_in_its_class_colour_and_nodata_transparent(run, seen):
    n_checked = 0
    for tif, cats in categorical_maps(run).items():
        drawn = seen["layers"][str(tif)]["drawn"]
        n_checked += len(drawn) - 1
        colours = {str(c.code): [list(hex_to_rgba(c.colour))] for c in cats}
        for value, rgba in drawn.items():
            if value == "nodata":
                assert all(a == 0 for *_, a in rgba), (tif, rgba)  # the canvas shows through
            else:
                assert rgba == colours[value], (tif.relative_to(run), value, rgba)
        assert "nodata" in drawn and len(drawn) >= 2, (tif, sorted(drawn))  # the sea corner and a class at least
    assert n_checked >= 40  # classes drawn, summed over the maps: most maps show several


@needs_qgis
def test_without_the_style_file_the_gis_falls_back_to_what_gdal_offers(run, tmp_path):
    """QGIS 3.22 then makes a class of each of the colour table's 256 entries (why the style file
    is written); QGIS 3.30 and later build the legend from the attribute table in the .aux.xml."""
    tif, cats = next((p, c) for p, c in categorical_maps(run).items() if p.stem == "zone")
    for src in (tif, tif.with_name(tif.name + ".aux.xml")):
        shutil.copy(src, tmp_path / src.name)
    res = subprocess.run([SYSTEM_PYTHON, str(SCRIPT), str(tmp_path / tif.name)], capture_output=True, text=True,
                         timeout=300, env=dict(os.environ, QT_QPA_PLATFORM="offscreen"))
    doc = json.loads(res.stdout)
    got = doc["layers"][str(tmp_path / tif.name)]
    assert got["renderer"] == "paletted"
    if tuple(int(x) for x in doc["qgis"].split("-")[0].split(".")[:2]) >= (3, 30):
        assert [c[1] for c in got["classes"]] == [c.name for c in cats]
    else:
        assert len(got["classes"]) == 256


def test_gdalinfo_reads_names_colours_and_the_attribute_table(run):
    """Debian's gdalinfo (a GDAL build apart from rasterio's) reads the .aux.xml: category names,
    the 256-entry colour table with transparent nodata, and the attribute table (one map of each
    kind)."""
    exe = shutil.which("gdalinfo")
    if exe is None:
        pytest.skip("gdalinfo (Debian gdal-bin) is not installed")
    kinds = {(p.stem, ENSEMBLE in p.parts): (p, c) for p, c in categorical_maps(run).items()}
    for tif, cats in kinds.values():
        res = subprocess.run([exe, "-json", str(tif)], capture_output=True, text=True, timeout=60)
        doc = json.loads(res.stdout)
        band = doc["bands"][0]
        assert band["categories"] == [c.name for c in cats] and band["noDataValue"] == 255
        assert band["colorTable"]["entries"][255] == [0, 0, 0, 0]
        rat = doc["rat"]
        assert rat["tableType"] == "thematic"
        assert [f["name"] for f in rat["fieldDefn"]] == ["value", "class", "red", "green", "blue", "alpha"]
        assert [r["f"] for r in rat["row"]] == [[c.code, c.name, *hex_to_rgba(c.colour)] for c in cats]
