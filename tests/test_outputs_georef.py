"""Georeferencing and file formats of the demo run's outputs, checked with external readers.

- GDAL through rasterio (CRS, transform, shape, nodata, colour tables, band metadata);
- Debian's ``gdalinfo -json`` (a separate GDAL build: CRS, nodata, category names from the
  PAM sidecar, the COG layout flag);
- rio-cogeo's ``cog_validate`` (Cloud-Optimised GeoTIFF rules);
- the IOOS compliance-checker, CF-1.10 suite, on the run's NetCDF; netCDF4 for its attributes.
"""

from __future__ import annotations

import json
import shutil
import subprocess
from pathlib import Path

import netCDF4
import numpy as np
import pytest
import rasterio
from projection_helpers import REPO, demo_run, geod_row_areas

from ceiling.model import load_models

TEMPLATE = REPO / "demo_grids" / "present" / "tmax_warm.tif"
FACTORS = ["tmax_warm", "tmin_cold", "precip", "moisture"]  # configs/demo.toml order
SPECIES = ["sp_a", "sp_b", "sp_c"]
# Category names as documented (ceiling/categories.py; README): codes 0..5
ZONE_NAMES = ["stable", "release", "constraint", "opens", "closes", "absent"]
SWITCH_NAMES = [f"{a} (unchanged)" if a == b else f"{a} -> {b}" for a in FACTORS for b in FACTORS]
CATEGORICAL = {"limiting": FACTORS, "zone": ZONE_NAMES, "switch": SWITCH_NAMES, "least_similar": FACTORS,
               "extrapolated": ["within sampled range", "novel climate"]}
ENSEMBLE_CATEGORICAL = {"robustness", "zone", "limiting"}
FLOAT_UNITS = {"ceiling": "1", "change": "1", "change_pct": "%"}
FUTURE = Path("ssp585") / "model-b" / "2071-2100"


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> Path:
    return demo_run(tmp_path_factory)[0]


@pytest.fixture(scope="module")
def template():
    with rasterio.open(TEMPLATE) as src:
        return {"crs": src.crs, "transform": src.transform, "shape": (src.height, src.width),
                "valid": src.read_masks(1).astype(bool)}  # True where the template has data


def _all_tifs(root: Path) -> list[Path]:
    return sorted(root.rglob("*.tif"))


def test_every_map_has_the_template_grid(demo, template):
    everything = _all_tifs(demo)  # the community maps too: every map keeps the template grid
    tifs = [p for p in everything if p.relative_to(demo).parts[0] in SPECIES]
    from ceiling.outputs.names import ENSEMBLE_LAYERS, FUTURE_LAYERS, PRESENT_LAYERS
    from ceiling.projection import FUTURE_BOUNDS, PRESENT_BOUNDS

    # 16 futures (2 scenarios x 4 climate models x 2 periods) and 4 ensembles per species; the demo
    # fits bootstrap replicates, so present and futures also carry their bounds
    per_species = (len(PRESENT_LAYERS) + len(PRESENT_BOUNDS) + 16 * (len(FUTURE_LAYERS) + len(FUTURE_BOUNDS))
                   + 4 * len(ENSEMBLE_LAYERS))
    assert len(tifs) == len(SPECIES) * per_species
    for p in everything:
        with rasterio.open(p) as src:
            assert src.crs == template["crs"], p
            assert src.transform == template["transform"], p
            assert (src.height, src.width) == template["shape"], p
            assert src.count == 1
            layer = p.stem
            if src.dtypes[0] == "uint8" and p not in tifs:  # community counts
                assert src.nodata == 255, p
            elif layer in CATEGORICAL or ("ensemble" in p.parts and layer in ENSEMBLE_CATEGORICAL):
                assert src.dtypes[0] == "uint8" and src.nodata == 255, p
            else:
                assert src.dtypes[0] == "float32", p
                # nodata is the lowest float32 (declared, and NaN nowhere in the file)
                assert src.nodata == float(np.finfo(np.float32).min), p


def test_nodata_cells_are_the_template_sea(demo, template):
    """Outputs are nodata exactly where the present layers are (the demo's sea cells)."""
    for sp in SPECIES:
        with rasterio.open(demo / sp / "present" / "ceiling.tif") as src:
            valid = src.read_masks(1).astype(bool)
        np.testing.assert_array_equal(valid, template["valid"])
        with rasterio.open(demo / sp / "present" / "limiting.tif") as src:
            np.testing.assert_array_equal(src.read(1) != 255, template["valid"])


def test_categorical_layers_carry_colour_tables(demo):
    d = demo / "sp_a" / FUTURE
    for layer, names in CATEGORICAL.items():
        with rasterio.open(d / f"{layer}.tif") as src:
            cmap = src.colormap(1)
            data = src.read(1)
        colours = [cmap[i] for i in range(len(names))]
        assert all(c[3] == 255 for c in colours), layer  # opaque classes
        if layer != "switch":  # the switch shares one grey for every "unchanged" class
            assert len(set(colours)) == len(names), layer
        assert cmap[255][3] == 0, layer  # nodata transparent
        assert set(np.unique(data)) <= set(range(len(names))) | {255}


def test_float_layers_carry_description_and_units(demo):
    d = demo / "sp_b" / FUTURE
    for layer, units in FLOAT_UNITS.items():
        with rasterio.open(d / f"{layer}.tif") as src:
            assert src.units[0] == units, layer
            assert src.descriptions[0], layer
            tags = src.tags()
        assert tags["species"] == "sp_b" and tags["scenario"] == "ssp585" and tags["layer"] == layer


def _gdalinfo(path: Path) -> dict:
    exe = shutil.which("gdalinfo")
    if exe is None:
        pytest.skip("gdalinfo (Debian gdal-bin) is not installed")
    res = subprocess.run([exe, "-json", str(path)], capture_output=True, text=True, timeout=60)
    assert res.returncode == 0, res.stderr
    return json.loads(res.stdout)


def _assert_epsg_4326(info: dict) -> None:
    wkt = info["coordinateSystem"]["wkt"]
    assert 'ID["EPSG",4326]' in wkt.replace(" ", "").replace("\n", ""), wkt[-200:]


def test_gdalinfo_reads_ceiling_tif(demo):
    info = _gdalinfo(demo / "sp_a" / FUTURE / "ceiling.tif")
    _assert_epsg_4326(info)
    assert info["metadata"]["IMAGE_STRUCTURE"]["LAYOUT"] == "COG"
    band = info["bands"][0]
    assert band["type"] == "Float32"
    assert band["noDataValue"] == pytest.approx(float(np.finfo(np.float32).min), rel=1e-7)
    assert band["unit"] == "1"
    assert "ceiling" in band["description"]
    with rasterio.open(TEMPLATE) as src:
        t = src.transform
        assert info["size"] == [src.width, src.height]
    assert info["geoTransform"] == pytest.approx([t.c, t.a, t.b, t.f, t.d, t.e], abs=1e-12)


@pytest.mark.parametrize("layer", ["zone", "limiting", "switch"])
def test_gdalinfo_reads_category_names(demo, layer):
    info = _gdalinfo(demo / "sp_c" / FUTURE / f"{layer}.tif")
    _assert_epsg_4326(info)
    assert info["metadata"]["IMAGE_STRUCTURE"]["LAYOUT"] == "COG"
    band = info["bands"][0]
    assert band["noDataValue"] == 255
    assert band["categories"] == CATEGORICAL[layer]
    assert band["colorInterpretation"] == "Palette"
    assert band["colorTable"]["entries"][255] == [0, 0, 0, 0]


def test_present_layers_read_by_gdalinfo(demo):
    from ceiling.model import load_models

    info = _gdalinfo(demo / "sp_a" / "present" / "limiting.tif")
    # the codes index the factors in the species' minimum (config order; screening may drop some)
    assert info["bands"][0]["categories"] == load_models(demo / "model.json")["sp_a"].factor_names
    assert info["metadata"]["IMAGE_STRUCTURE"]["LAYOUT"] == "COG"


def test_rio_cogeo_validates_the_maps(demo):
    cogeo = pytest.importorskip("rio_cogeo.cogeo", reason="rio-cogeo is not installed")
    d = demo / "sp_a"
    paths = [d / "present" / "ceiling.tif", d / "present" / "limiting.tif"]
    paths += [d / FUTURE / f"{n}.tif" for n in ("ceiling", "change", "change_pct", "limiting", "zone", "switch")]
    for p in paths:
        valid, errors, warnings = cogeo.cog_validate(str(p))
        assert valid and errors == [], (p, errors)
        assert warnings == [], (p, warnings)


# --- NetCDF ----------------------------------------------------------------------------------------

@pytest.mark.filterwarnings("ignore::DeprecationWarning")  # the checker's own deprecation notices
def test_netcdf_passes_cf_1_10_checks(demo, tmp_path):
    runner = pytest.importorskip("compliance_checker.runner", reason="compliance-checker is not installed")
    from compliance_checker.runner import CheckSuite

    CheckSuite.load_all_available_checkers()
    report = tmp_path / "cf.json"
    runner.ComplianceChecker.run_checker(str(demo / "ceiling.nc"), ["cf:1.10"], 0, "normal",
                                         output_filename=str(report), output_format="json")
    result = json.loads(report.read_text())["cf:1.10"]
    assert result["possible_points"] > 100  # the suite really ran
    high = [r for r in result["high_priorities"] if r["value"][0] < r["value"][1]]
    assert not high, [(r["name"], r["msgs"]) for r in high]
    medium = [r for r in result["medium_priorities"] if r["value"][0] < r["value"][1]]
    assert not medium, [(r["name"], r["msgs"]) for r in medium]


def test_netcdf_attributes(demo):
    with netCDF4.Dataset(demo / "ceiling.nc") as ds:
        assert ds.Conventions == "CF-1.10"
        flags = {"limiting": FACTORS, "limiting_present": FACTORS, "zone": ZONE_NAMES,
                 "switch": [n.replace(" -> ", "_to_").replace(" (unchanged)", "_unchanged") for n in SWITCH_NAMES]}
        for name, meanings in flags.items():
            v = ds[name]
            np.testing.assert_array_equal(v.flag_values, np.arange(len(meanings)))
            assert v.flag_meanings.split() == meanings, name
            assert v.dtype == np.uint8 and v._FillValue == 255
            assert not hasattr(v, "units") or v.units in ("1", "")
        for name, units in (("ceiling", "1"), ("change", "1"), ("change_pct", "%"), ("ceiling_present", "1")):
            assert ds[name].units == units
        for name in ("ceiling", "change", "change_pct", "limiting", "zone", "switch", "ceiling_present", "limiting_present"):
            v = ds[name]
            assert v.long_name
            assert v.grid_mapping == "crs"
            assert v.cell_measures == "area: cell_area"
            assert v.shape[-2:] == (160, 200)
        assert ds["crs"].grid_mapping_name == "latitude_longitude"
        assert ds["crs"].semi_major_axis == 6378137.0
        assert list(ds["species_name"][:]) == SPECIES
        assert ds.dimensions["climate"].size == 16  # 2 scenarios x 4 climate models x 2 periods
        assert ds["x"].units == "degrees_east" and ds["y"].units == "degrees_north"
        area = ds["cell_area"]
        assert area.units == "m2" and area.standard_name == "cell_area"
        a = np.asarray(area[:], dtype=np.float64)
        x, y = ds["x"][:], ds["y"][:]
    with rasterio.open(TEMPLATE) as src:
        t = src.transform
    np.testing.assert_allclose(x, t.c + t.a * (np.arange(200) + 0.5), rtol=0, atol=1e-9)
    np.testing.assert_allclose(y, t.f + t.e * (np.arange(160) + 0.5), rtol=0, atol=1e-9)
    # Source: pyproj.Geod (WGS84) area of each row's cell polygon, parallels densified
    rows = geod_row_areas(t, 160)
    np.testing.assert_allclose(a, np.broadcast_to(rows[:, None], a.shape), rtol=1e-8)


def test_netcdf_maps_match_the_geotiffs(demo):
    """The NetCDF holds the same maps as the GeoTIFFs (one species and future, all layers)."""
    with netCDF4.Dataset(demo / "ceiling.nc") as ds:
        keys = list(zip(ds["scenario"][:], ds["climate_model"][:], ds["period"][:]))
        k = keys.index(("ssp585", "model-b", "2071-2100"))
        s = SPECIES.index("sp_b")
        for layer in ("ceiling", "change_pct", "zone", "switch"):
            v = ds[layer][s, k]
            nc = np.ma.filled(v.astype(np.float64), np.nan)
            with rasterio.open(demo / "sp_b" / FUTURE / f"{layer}.tif") as src:
                m = src.read(1, masked=True)
            tif = np.ma.filled(m.astype(np.float64), np.nan)
            if layer == "switch":  # by names: each GeoTIFF codes its own model's factors, the NetCDF all used ones
                nc, tif = _switch_names(nc, demo, None), _switch_names(tif, demo, "sp_b")
            np.testing.assert_array_equal(nc, tif, err_msg=layer)


def _switch_names(codes: np.ndarray, demo, species: str | None) -> np.ndarray:
    """Switch codes (present * K + future) as 'a->b' names: of ``species``'s own factors, or
    (None) of the factors any species uses, in config order (the NetCDF's list)."""
    models = list(load_models(demo / "model.json"))
    if species is None:
        names = [f for f in FACTORS if any(f in m.factor_names for m in models)]
    else:
        names = next(m for m in models if m.species == species).factor_names
    k = len(names)
    return np.array([("" if np.isnan(c) else f"{names[int(c) // k]}->{names[int(c) % k]}") for c in codes.ravel()],
                    dtype=object).reshape(codes.shape)
