"""The STAC catalogue of a run folder (ceiling/outputs/stac.py), validated by pystac.

pystac's validator (JSON Schema, through ``jsonschema``) checks the collection and every item
against the STAC 1.1.0 core schemas that pystac ships, and against the schemas of the
extensions they declare. Those extension schemas are published on the web, which tests must
not need; the official files (projection v1.1.0, raster v1.1.0, classification v2.0.0, each
checked by its ``$id``) are taken from a package on PyPI that ships them as data: the ``eopf``
wheel (``eopf/product/stac_extensions/extensions/``), downloaded with pip and read without
installing it. They are registered in the validator's schema cache under their URIs, so
validation runs offline. Where PyPI cannot be reached the validation tests skip, naming why.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
import zipfile
from datetime import datetime, timezone
from pathlib import Path

import pystac
import pytest
import rasterio
from projection_helpers import small_run
from pystac.validation import JsonSchemaSTACValidator, RegisteredValidator, set_validator, validate_all_dict
from pystac.validation.stac_validator import STACValidationError

from ceiling.categories import layer_categories
from ceiling.model import load_models
from ceiling.outputs.names import ENSEMBLE, MODEL_FILE, STAC_ROOT_FILE
from ceiling.outputs.stac import EXTENSIONS, class_name, period_range, write_catalogue

SCHEMA_WHEEL = "eopf==2.6.4"
SCHEMA_FILES = {  # extension -> file in the wheel
    "projection": "eopf/product/stac_extensions/extensions/projection_v1.1.0.json",
    "raster": "eopf/product/stac_extensions/extensions/raster_v1.1.0.json",
    "classification": "eopf/product/stac_extensions/extensions/classification_v2.0.0.json",
}


@pytest.fixture(scope="module")
def run(tmp_path_factory) -> Path:
    return small_run(tmp_path_factory)


@pytest.fixture(scope="module")
def validator(tmp_path_factory):
    """pystac's JSON-schema validator with the extension schemas in its cache (no web access)."""
    where = tmp_path_factory.mktemp("stac_schemas")
    res = subprocess.run([sys.executable, "-m", "pip", "download", "--no-deps", "--quiet", "-d", str(where), SCHEMA_WHEEL],
                         capture_output=True, text=True, timeout=300)
    wheels = sorted(where.glob("eopf-*.whl"))
    if res.returncode != 0 or not wheels:
        pytest.skip(f"the STAC extension schemas come from the {SCHEMA_WHEEL} wheel on PyPI, which pip could not "
                    f"download: {res.stderr.strip()[-300:]}")
    v = JsonSchemaSTACValidator()
    with zipfile.ZipFile(wheels[0]) as z:
        for ext, name in SCHEMA_FILES.items():
            schema = json.loads(z.read(name))
            assert schema["$id"].rstrip("#") == EXTENSIONS[ext], (name, schema["$id"])
            v.schema_cache[EXTENSIONS[ext]] = schema
    before = RegisteredValidator._validator
    set_validator(v)
    yield v
    RegisteredValidator._validator = before


def items(run: Path) -> list[pystac.Item]:
    return list(pystac.Collection.from_file(str(run / STAC_ROOT_FILE)).get_items())


def item_docs(run: Path) -> list[tuple[Path, dict]]:
    """Each item file with its JSON as written (pystac's reader migrates extensions to their
    newest versions in memory)."""
    return [(p, json.loads(p.read_text())) for p in sorted((run / "stac").glob("*/*.json"))]


def href_path(doc_path: Path, href: str) -> Path:
    assert not Path(href).is_absolute() and ".partial" not in href, href
    return (doc_path.parent / href).resolve()


def test_the_catalogue_validates(run, validator):
    validate_all_dict(json.loads((run / STAC_ROOT_FILE).read_text()), str(run / STAC_ROOT_FILE))
    # one item per species and climate: 2 species x (present, 2 climate models, their ensemble)
    assert len(items(run)) == 8
    for path in sorted((run / "stac").glob("*/*.json")):  # as written (pystac migrates what it reads)
        used = pystac.validation.validate_dict(json.loads(path.read_text()), href=str(path))
        assert set(used) >= set(EXTENSIONS.values()), used  # every extension schema was applied


@pytest.mark.parametrize("break_it", [
    lambda d: d["assets"]["zone"]["raster:bands"][0].update(data_type="byte"),
    lambda d: d["assets"]["zone"]["classification:classes"][0].update(value="zero"),
    lambda d: d["properties"].update({"proj:shape": [30]}),
    lambda d: d["properties"].pop("end_datetime"),
], ids=["raster data type", "class value", "projection shape", "time range"])
def test_the_validator_refuses_a_broken_item(run, validator, break_it):
    path = next((run / "stac").glob("sp1__s1__m0__*/*.json"))
    doc = json.loads(path.read_text())
    break_it(doc)
    with pytest.raises(STACValidationError):
        pystac.validation.validate_dict(doc)


def test_items_carry_the_climate_and_its_period_as_time_range(run):
    for path, doc in item_docs(run):
        key = "ceiling" if "ceiling" in doc["assets"] else "median_ceiling"
        with rasterio.open(href_path(path, doc["assets"][key]["href"])) as src:
            tags = src.tags()
        p = doc["properties"]
        assert (p["ceiling:species"], p["ceiling:scenario"], p["ceiling:climate_model"], p["ceiling:period"]) == (
            tags["species"], tags["scenario"], tags.get("climate_model", ""), tags["period"])
        first, last = ("1991", "2020") if p["ceiling:scenario"] == "present" else ("2041", "2070")
        assert p["datetime"] is None
        assert (p["start_datetime"], p["end_datetime"]) == (f"{first}-01-01T00:00:00Z", f"{last}-12-31T23:59:59Z")


def test_every_map_is_an_asset_as_rasterio_reads_it(run):
    factors = {m.species: m.factor_names for m in load_models(run / MODEL_FILE)}
    for path, doc in item_docs(run):
        props = doc["properties"]
        folder = href_path(path, next(iter(doc["assets"].values()))["href"]).parent
        assert sorted(doc["assets"]) == sorted(p.stem for p in folder.glob("*.tif"))
        for key, asset in doc["assets"].items():
            with rasterio.open(href_path(path, asset["href"])) as src:
                band = asset["raster:bands"][0]
                assert band["data_type"] == src.dtypes[0] and band["nodata"] == src.nodata
                assert band.get("unit", "") == (src.units[0] or "")
                assert [src.height, src.width] == props["proj:shape"]
                assert props["proj:epsg"] == src.crs.to_epsg()
                assert props["proj:transform"] == list(src.transform)[:6]
            assert asset["type"] == pystac.MediaType.COG and asset["roles"] == ["data"]
            cats = layer_categories(key, list(factors[props["ceiling:species"]]),
                                    ensemble=props["ceiling:climate_model"] == ENSEMBLE)
            classes = asset.get("classification:classes")
            if cats is None:
                assert classes is None, key
            else:
                assert [(c["value"], c["title"], "#" + c["color_hint"].lower()) for c in classes[:-1]] == [
                    (c.code, c.name, c.colour.lower()) for c in cats]
                assert classes[-1] == {"value": 255, "name": "nodata", "title": "no data", "nodata": True}


def test_run_files_are_collection_assets_and_the_folder_can_move(run, tmp_path):
    moved = tmp_path / "elsewhere"
    shutil.copytree(run, moved)
    coll = pystac.Collection.from_file(str(moved / STAC_ROOT_FILE))
    assert {"ceiling", "summary", "transitions", "model", "report", "manifest"} <= set(coll.assets)
    assert coll.assets["ceiling"].media_type == "application/x-netcdf"
    for asset in [*coll.assets.values(), *(a for i in coll.get_items() for a in i.assets.values())]:
        assert Path(asset.get_absolute_href()).is_file(), asset.href
        assert str(moved) in asset.get_absolute_href()


def test_periods_that_are_not_years_are_left_out_and_named(run, tmp_path):
    copy = tmp_path / "run"
    shutil.copytree(run, copy)
    for sp in ("sp1", "sp2"):
        with rasterio.open(copy / sp / "present" / "ceiling.tif", "r+", IGNORE_COG_LAYOUT_BREAK="YES") as dst:
            dst.update_tags(period="now")
    species = {m.species: m.factor_names for m in load_models(copy / MODEL_FILE)}
    written = write_catalogue(copy, title="a run", species_factors=species)
    coll = pystac.Collection.from_file(str(copy / STAC_ROOT_FILE))
    assert sorted(i.id for i in coll.get_items()) == sorted(i.id for i in items(run) if "present" not in i.id)
    assert "'now'" in coll.description and len(written) == 7
    assert coll.extent.temporal.intervals == [[datetime(2041, 1, 1, tzinfo=timezone.utc),
                                               datetime(2070, 12, 31, 23, 59, 59, tzinfo=timezone.utc)]]


def test_period_labels_and_class_names():
    assert period_range("2071-2100") == (datetime(2071, 1, 1, tzinfo=timezone.utc),
                                         datetime(2100, 12, 31, 23, 59, 59, tzinfo=timezone.utc))
    assert period_range("2050")[1].year == 2050
    assert period_range("baseline") is None and period_range("2100-2071") is None
    assert class_name("tmax -> precip") == "tmax_to_precip"
    assert class_name("precip (unchanged)") == "precip_unchanged"
    assert class_name("low agreement") == "low_agreement"


def test_the_catalogue_is_listed_in_the_manifest(run):
    listed = {e["path"] for e in json.loads((run / "manifest.json").read_text())["outputs"]}
    assert STAC_ROOT_FILE in listed
    assert all(str(Path(i.get_self_href()).relative_to(run)) in listed for i in items(run))
