"""Zonal summaries (``ceiling summarize``, ``ceiling.zones.summarize_zones``, ``[outputs.zones]``).

The references are outside the package: cell and polygon areas from pyproj.Geod, the definition
of the coverage fraction (the share of a cell's area inside the polygon, as exactextract
documents it), hand computations from the map values read with rasterio, and partition
properties (zone classes partition the valid cells; the demo's management units partition the
island). Bad input goes through the command line: exit code 2, one "error:" line, nothing written.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pytest
import rasterio
import shapely
from projection_helpers import REPO, SmallCase, assert_refused, cli, demo_run, geod_cell_area
from pyproj import Geod

from ceiling.zones import ZONE_COLUMNS, summarize_zones

WEST, NORTH, CELL = 10.0, 50.0, 0.05  # SmallCase's grid: 40 x 30 cells, sea where col + row < 10
GEOD = Geod(ellps="WGS84")
CLASSES = ["stable", "release", "constraint", "opens", "closes", "absent"]


def cell_box(r0: int, c0: int, r1: int | None = None, c1: int | None = None) -> shapely.Polygon:
    """The polygon of whole cells rows r0..r1-1, columns c0..c1-1 of the small grid."""
    r1, c1 = (r0 + 1 if r1 is None else r1), (c0 + 1 if c1 is None else c1)
    return shapely.box(WEST + CELL * c0, NORTH - CELL * r1, WEST + CELL * c1, NORTH - CELL * r0)


def geod_cell(r: int, c: int) -> float:
    """Area (m2) of one cell of the small grid (pyproj.Geod, densified parallels)."""
    return geod_cell_area(WEST + CELL * c, NORTH - CELL * (r + 1), WEST + CELL * (c + 1), NORTH - CELL * r, n=400)


def write_zones(path: Path, geoms, **attrs) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    gpd.GeoDataFrame(attrs, geometry=list(geoms), crs="EPSG:4326").to_file(path)
    return path


def read_zones_csv(path: Path) -> pd.DataFrame:
    return pd.read_csv(path, keep_default_na=False, na_values=[""], dtype={"zone_id": str, "model": str})


@pytest.fixture(scope="module")
def small(tmp_path_factory) -> tuple[SmallCase, Path]:
    case = SmallCase(tmp_path_factory.mktemp("zones") / "case", ny=30, nx=40, futures=2)
    out = case.root / "run"
    res = cli(["project", case.config(), "--model", case.model, "--out", out])
    assert res.exit_code == 0, res.stderr
    return case, out


@pytest.fixture(scope="module")
def clean_run(small, tmp_path_factory) -> Path:
    """A copy of the small run without zone outputs (for the refusals)."""
    dst = tmp_path_factory.mktemp("clean") / "run"
    shutil.copytree(small[1], dst)
    for name in ("zones.csv", "zones.gpkg"):
        (dst / name).unlink(missing_ok=True)
    return dst


def _row(table: pd.DataFrame, zone: str, species: str, scenario: str, model: str, period: str) -> pd.Series:
    model_col = table["model"].fillna("")
    t = table[(table["zone_id"] == zone) & (table["species"] == species) & (table["scenario"] == scenario)
              & (model_col == model) & (table["period"] == period)]
    assert len(t) == 1, (zone, species, scenario, model, period)
    return t.iloc[0]


# --- areas -------------------------------------------------------------------------------------------

def test_whole_cells_have_the_sum_of_their_ellipsoidal_areas(small, tmp_path):
    _, run = small
    z = write_zones(tmp_path / "z.gpkg", [cell_box(10, 20, 15, 30)], code=["block"])
    res = summarize_zones(run, z, id_field="code")
    # Source: pyproj.Geod on each densified cell (independent of ceiling.areas and exactextract)
    expected = sum(geod_cell(r, c) for r in range(10, 15) for c in range(20, 30)) / 1e6
    for _, row in res.table.iterrows():
        assert row["zone_area_km2"] == pytest.approx(expected, rel=1e-7)
        assert row["area_km2"] == pytest.approx(expected, rel=1e-7)  # all land: every cell valid


def test_half_a_cell_gets_half_its_area(small, tmp_path):
    _, run = small
    r, c = 20, 25
    lon0, lat0, lat1 = WEST + CELL * c, NORTH - CELL * (r + 1), NORTH - CELL * r
    z = write_zones(tmp_path / "z.gpkg", [shapely.box(lon0, lat0, lon0 + CELL / 2, lat1)], code=["half"])
    res = summarize_zones(run, z, id_field="code")
    # Source: coverage fraction = share of the cell's area inside the polygon (exactextract
    # documentation); the west half of a lon/lat cell is half its ellipsoidal area by symmetry
    # in longitude. Reference area from pyproj.Geod.
    assert res.table["zone_area_km2"].iloc[0] == pytest.approx(0.5 * geod_cell(r, c) / 1e6, rel=1e-7)


def test_geodesic_polygon_area_matches_pyproj(small, tmp_path):
    _, run = small
    lons, lats = [10.23, 11.87, 11.52, 10.41], [48.61, 48.74, 49.93, 49.45]
    ring = []
    for i in range(4):  # follow each geodesic edge with 400 intermediate points
        a, b = (lons[i], lats[i]), (lons[(i + 1) % 4], lats[(i + 1) % 4])
        ring += [a, *GEOD.npts(a[0], a[1], b[0], b[1], 400)]
    z = write_zones(tmp_path / "z.gpkg", [shapely.Polygon(ring)], code=["quad"])
    res = summarize_zones(run, z, id_field="code")
    # Source: pyproj.Geod, area of the geodesic quadrilateral (Karney's algorithm)
    truth = abs(GEOD.polygon_area_perimeter(lons, lats)[0]) / 1e6
    got = res.table["zone_area_km2"].iloc[0]
    # measured: relative difference 2.7e-7 (coverage fractions are planar in degrees, and kept in
    # single precision, inside the partial cells along the edges); tolerance 1e-6
    assert got == pytest.approx(truth, rel=1e-6)


def test_zones_in_another_crs_are_reprojected(small, tmp_path):
    _, run = small
    box = cell_box(10, 20, 15, 30)
    merc = gpd.GeoDataFrame({"code": ["m"]}, geometry=[box], crs="EPSG:4326").to_crs("EPSG:3857")
    merc.to_file(tmp_path / "merc.gpkg")
    got = summarize_zones(run, tmp_path / "merc.gpkg", id_field="code").table["zone_area_km2"].iloc[0]
    # Source: pyproj.Geod on the cells (a lon/lat box is a rectangle in Web Mercator, so it maps back exactly)
    assert got == pytest.approx(sum(geod_cell(r, c) for r in range(10, 15) for c in range(20, 30)) / 1e6, rel=1e-6)


def test_edges_through_cell_corners(small, tmp_path):
    _, run = small
    # a triangle whose slanted edges run exactly through cell corners (a case where exactextract
    # 0.3 drops a whole cell; the package then intersects the cells itself)
    tri = shapely.Polygon([(11.0, 49.0), (11.25, 49.25), (11.0, 49.5)])
    z = write_zones(tmp_path / "z.gpkg", [tri], code=["T"])
    got = summarize_zones(run, z, id_field="code").table["zone_area_km2"].iloc[0]
    # Source: pyproj.Geod on the triangle with its edges densified along straight lon/lat lines
    truth = abs(GEOD.geometry_area_perimeter(shapely.segmentize(tri, 1e-4))[0]) / 1e6
    assert got == pytest.approx(truth, rel=1e-6)


# --- the id attribute, formats ------------------------------------------------------------------------

@pytest.mark.parametrize("suffix", [".gpkg", ".shp", ".geojson"])
def test_the_id_attribute_survives(small, tmp_path, suffix):
    _, run = small
    # exactextract replaces an attribute named 'id' passed through include_cols by the frame's
    # index (from memory of its GeoPandas feature source; checked with exactextract 0.3): the
    # ids below differ from any index, in an order that is not sorted
    ids = ["R-7", "Z9", "id-3"]
    geoms = [cell_box(12, 12, 16, 18), cell_box(20, 30, 24, 36), cell_box(5, 20, 8, 26)]
    z = write_zones(tmp_path / f"z{suffix}", geoms, id=ids, name=["north", "east", "top"])
    res = summarize_zones(run, z, id_field="id")
    table = read_zones_csv(run / "zones.csv")
    assert list(table["zone_id"].iloc[:3]) == ids
    assert set(table["zone_id"]) == set(ids)
    assert list(res.table["zone_id"].iloc[:3]) == ids
    # areas follow the ids: zone "Z9" is the 4 x 6 block of rows 20..23, columns 30..35
    z9 = table[table["zone_id"] == "Z9"]["zone_area_km2"]
    assert np.allclose(z9, sum(geod_cell(r, c) for r in range(20, 24) for c in range(30, 36)) / 1e6, rtol=1e-7)
    layers = [str(x[0]) for x in pyogrio.list_layers(run / "zones.gpkg")]
    assert layers[:3] == ["zones", "sp1_present", "sp2_present"]
    assert "sp1_s1_ensemble_p1" in layers
    for layer in ("zones", "sp1_s1_m0_p1"):
        g = gpd.read_file(run / "zones.gpkg", layer=layer)
        assert list(g["id"]) == ids and list(g["name"]) == ["north", "east", "top"]


def test_integer_ids_and_no_id_field(small, tmp_path):
    _, run = small
    geoms = [cell_box(12, 12, 16, 18), cell_box(20, 30, 24, 36)]
    z = write_zones(tmp_path / "z.gpkg", geoms, code=[205, 17])
    t = summarize_zones(run, z, id_field="code").table
    assert list(t["zone_id"].iloc[:2]) == [205, 17]
    t = summarize_zones(run, z).table  # no id field: numbered in file order
    assert list(t["zone_id"].iloc[:2]) == [1, 2]


# --- statistics by hand -----------------------------------------------------------------------------

def _read(path: Path) -> np.ndarray:
    with rasterio.open(path) as src:
        a = src.read(1, masked=True)
    return np.ma.filled(a.astype(np.float64), np.nan)


def _wmedian(values: list[float], weights: list[float]) -> float:
    """Smallest value at which the cumulative weight reaches half the total (common practice:
    the lower weighted median), written as a plain loop."""
    pairs = sorted(zip(values, weights))
    half, acc = 0.5 * sum(weights), 0.0
    for v, w in pairs:
        acc += w
        if acc >= half * (1 - 1e-12):
            return v
    raise AssertionError("unreachable")


def test_statistics_by_hand(small, tmp_path):
    _, run = small
    # zone A: 3 x 4 whole cells; zone B: half of cell (25, 8) (west half) and all of cell (25, 9)
    half = shapely.box(WEST + CELL * 8, NORTH - CELL * 26, WEST + CELL * 8.5, NORTH - CELL * 25)
    zone_b = shapely.union_all([half, cell_box(25, 9)])
    z = write_zones(tmp_path / "z.gpkg", [cell_box(16, 30, 19, 34), zone_b], code=["A", "B"])
    table = summarize_zones(run, z, id_field="code").table
    cells = {"A": [(r, c, 1.0) for r in range(16, 19) for c in range(30, 34)], "B": [(25, 8, 0.5), (25, 9, 1.0)]}
    fut = run / "sp1" / "s1" / "m0" / "p1"
    now, later, change = _read(run / "sp1" / "present" / "ceiling.tif"), _read(fut / "ceiling.tif"), _read(fut / "change.tif")
    lim_now, lim_later, zone = _read(run / "sp1" / "present" / "limiting.tif"), _read(fut / "limiting.tif"), _read(fut / "zone.tif")
    ens = run / "sp1" / "s1" / "ensemble" / "p1"
    agreement, med_change = _read(ens / "agreement.tif"), _read(ens / "median_change.tif")
    factors = ["temp", "rain"]  # the model's factor order (SmallCase's model file)
    for zid, cs in cells.items():
        # weights: coverage fraction x pyproj.Geod cell area
        w = [f * geod_cell(r, c) for r, c, f in cs]
        val = lambda a, cs=cs: [a[r, c] for r, c, _ in cs]  # noqa: E731
        W = sum(w)
        row = _row(table, zid, "sp1", "s1", "m0", "p1")
        assert row["area_km2"] == pytest.approx(W / 1e6, rel=1e-7)
        assert row["mean_ceiling_now"] == pytest.approx(np.dot(w, val(now)) / W, rel=1e-6)
        assert row["mean_ceiling_later"] == pytest.approx(np.dot(w, val(later)) / W, rel=1e-6)
        assert row["mean_change"] == pytest.approx(np.dot(w, val(change)) / W, rel=1e-5, abs=1e-6)
        assert row["median_ceiling_now"] == pytest.approx(_wmedian(val(now), w), rel=1e-6)
        assert row["median_ceiling_later"] == pytest.approx(_wmedian(val(later), w), rel=1e-6)
        for code, name in enumerate(CLASSES):
            want = sum(wi for wi, zc in zip(w, val(zone)) if zc == code) / 1e6
            assert row[f"area_km2_{name}"] == pytest.approx(want, rel=1e-7, abs=1e-9), name
        for col, lim in (("now", lim_now), ("later", lim_later)):
            by = {f: sum(wi for wi, code in zip(w, val(lim)) if code == i) for i, f in enumerate(factors)}
            top = max(factors, key=lambda f: (by[f], -factors.index(f)))
            assert row[f"limiting_{col}"] == top
            assert row[f"share_limiting_{col}"] == pytest.approx(by[top] / W, rel=1e-7)
        e = _row(table, zid, "sp1", "s1", "ensemble", "p1")
        assert e["mean_agreement"] == pytest.approx(np.dot(w, val(agreement)) / W, rel=1e-6)
        assert e["mean_change"] == pytest.approx(np.dot(w, val(med_change)) / W, rel=1e-5, abs=1e-6)
        p = _row(table, zid, "sp1", "present", "", "now")
        assert p["mean_ceiling_now"] == pytest.approx(np.dot(w, val(now)) / W, rel=1e-6)
        assert pd.isna(p["mean_ceiling_later"]) and pd.isna(p["limiting_later"])


def test_zone_classes_partition_the_valid_area_and_sea_is_left_out(small, tmp_path):
    _, run = small
    # one zone over the sea corner (col + row < 10 is nodata) and land: rows 0..7, cols 0..11
    z = write_zones(tmp_path / "z.gpkg", [cell_box(0, 0, 8, 12), cell_box(14, 14, 22, 26)], code=["coast", "inland"])
    table = read_zones_csv(summarize_zones(run, z, id_field="code").written[1])
    assert list(table.columns) == ZONE_COLUMNS
    coast = [(r, c) for r in range(8) for c in range(12)]
    # Source: SmallCase's sea is the cells with col + row < min(nx, ny) // 3 = 10 (its definition)
    land = sum(geod_cell(r, c) for r, c in coast if r + c >= 10) / 1e6
    total = sum(geod_cell(r, c) for r, c in coast) / 1e6
    pres = table[(table["zone_id"] == "coast") & (table["scenario"] == "present")]
    assert np.allclose(pres["area_km2"], land, rtol=1e-7)
    assert np.allclose(pres["zone_area_km2"], total, rtol=1e-7)
    # Source: the zone classes partition the cells valid now and later (definition of the classes)
    fut = table[table["scenario"] != "present"]
    ens = fut["model"] == "ensemble"
    classes = [f"area_km2_{c}" for c in CLASSES]
    assert np.allclose(fut.loc[~ens, classes].sum(axis=1), fut.loc[~ens, "area_km2"], rtol=1e-7)
    assert np.allclose(fut.loc[ens, [*classes, "area_km2_uncertain"]].sum(axis=1), fut.loc[ens, "area_km2"], rtol=1e-7)
    assert fut.loc[~ens, "area_km2_uncertain"].isna().all() and fut.loc[ens, "mean_agreement"].notna().all()


def test_invalid_polygon_is_repaired_with_a_warning(small, tmp_path):
    _, run = small
    bowtie = shapely.Polygon([(11.0, 49.0), (11.5, 49.5), (11.5, 49.0), (11.0, 49.5)])
    assert not bowtie.is_valid
    z = write_zones(tmp_path / "z.gpkg", [bowtie, cell_box(20, 30)], code=["BOW", "ok"])
    res = cli(["summarize", run, "--zones", z, "--id-field", "code", "--overwrite"])
    assert res.exit_code == 0, res.stderr
    warn = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert len(warn) == 1 and warn[0].startswith("warning: ") and "BOW" in warn[0] and "repaired" in warn[0], warn
    # Source: pyproj.Geod, the two triangles of the bowtie with edges densified along straight
    # lon/lat lines (the zone's edges on the grid), 1e-4 degree steps
    tri = [shapely.Polygon([(11.0, 49.0), (11.25, 49.25), (11.0, 49.5)]),
           shapely.Polygon([(11.5, 49.0), (11.25, 49.25), (11.5, 49.5)])]
    truth = sum(abs(GEOD.geometry_area_perimeter(shapely.segmentize(t, 1e-4))[0]) for t in tri) / 1e6
    got = read_zones_csv(run / "zones.csv").query("zone_id == 'BOW'")["zone_area_km2"].iloc[0]
    # measured: 6.6e-8 relative; tolerance 1e-6
    assert got == pytest.approx(truth, rel=1e-6)


# --- the command line and the config ------------------------------------------------------------------

def test_cli_prints_the_table_and_writes_both_files(clean_run, tmp_path):
    run = tmp_path / "run"
    shutil.copytree(clean_run, run)
    z = write_zones(tmp_path / "z.geojson", [cell_box(12, 12, 16, 18)], id=["Q1"])
    res = cli(["summarize", run, "--zones", z, "--id-field", "id"])
    assert res.exit_code == 0, res.stderr
    assert "Q1" in res.stdout and "zones.csv" in res.stdout and "zones.gpkg" in res.stdout
    assert (run / "zones.csv").is_file() and (run / "zones.gpkg").is_file()
    assert not [p.name for p in run.iterdir() if p.name.startswith(".")]
    # the manifest stays true: it lists the new files with their checksums and the zones file
    man = json.loads((run / "manifest.json").read_text())
    listed = {e["path"] for e in man["outputs"]}
    on_disk = {str(p.relative_to(run)) for p in run.rglob("*") if p.is_file()} - {"manifest.json"}
    assert listed == on_disk
    assert str(z.resolve()) in {e["path"] for e in man["inputs"]}
    # existing outputs are kept without --overwrite
    before = (run / "zones.csv").read_bytes()
    again = cli(["summarize", run, "--zones", z, "--id-field", "id"])
    assert again.exit_code == 2 and "--overwrite" in again.stderr and "zones.csv" in again.stderr
    assert (run / "zones.csv").read_bytes() == before


def _refused(run: Path, zones: Path | str, *keywords: str, extra: tuple[str, ...] = ()) -> str:
    res = cli(["summarize", run, "--zones", zones, *extra])
    line = assert_refused(res.exit_code, res.stderr, run / "zones.csv", *keywords, exc=res.exception)
    assert not (run / "zones.gpkg").exists()
    return line


def test_refuses_a_missing_zones_file(clean_run, tmp_path):
    _refused(clean_run, tmp_path / "nope.gpkg", "nope.gpkg", "not found")


def test_refuses_a_file_that_is_not_vector(clean_run, tmp_path):
    p = tmp_path / "zones.gpkg"
    p.write_text("not a geopackage\n")
    _refused(clean_run, p, "zones.gpkg", "cannot be read")


def test_refuses_a_missing_id_field_and_lists_the_fields(clean_run, tmp_path):
    z = write_zones(tmp_path / "z.gpkg", [cell_box(12, 12, 16, 18)], code=["a"], label=["x"])
    _refused(clean_run, z, "'id'", "code", "label", extra=("--id-field", "id"))


def test_refuses_duplicate_ids(clean_run, tmp_path):
    z = write_zones(tmp_path / "z.gpkg", [cell_box(12, 12), cell_box(14, 14), cell_box(16, 16)], id=["R1", "R2", "R1"])
    _refused(clean_run, z, "duplicate", "R1", "'id'", extra=("--id-field", "id"))


def test_refuses_zones_outside_the_grid(clean_run, tmp_path):
    far = shapely.box(100.0, 10.0, 101.0, 11.0)
    z = write_zones(tmp_path / "none.gpkg", [far, shapely.box(120.0, 10.0, 121.0, 11.0)], id=["F1", "F2"])
    _refused(clean_run, z, "none of the 2 zones", "overlaps", "none.gpkg", extra=("--id-field", "id"))
    z = write_zones(tmp_path / "some.gpkg", [cell_box(12, 12), far], id=["IN", "FAR"])
    line = _refused(clean_run, z, "FAR", "do not overlap", extra=("--id-field", "id"))
    assert "IN," not in line


def test_refuses_points_and_files_without_crs(clean_run, tmp_path):
    z = write_zones(tmp_path / "p.gpkg", [shapely.Point(11.0, 49.0)], id=["P1"])
    _refused(clean_run, z, "P1", "not polygons", "Point", extra=("--id-field", "id"))
    shp = write_zones(tmp_path / "nocrs" / "z.shp", [cell_box(12, 12)], id=["A"])
    shp.with_suffix(".prj").unlink()
    _refused(clean_run, shp, "no CRS", "z.shp", extra=("--id-field", "id"))


def test_refuses_a_folder_that_is_not_a_run(small, tmp_path):
    case, _ = small
    z = write_zones(tmp_path / "z.gpkg", [cell_box(12, 12)], id=["A"])
    _refused(case.data, z, "not a run folder", str(case.data.name))
    _refused(tmp_path / "missing", z, "run folder not found")


def test_config_table_runs_the_zones_with_the_projection(small, tmp_path):
    case, _ = small
    write_zones(case.data / "zones" / "z.gpkg", [cell_box(12, 12, 16, 18), cell_box(20, 30, 24, 36)], id=["A", "B"])
    cfg = case.config("zones.toml")
    text = cfg.read_text() + '\n[outputs.zones]\npath = "zones/z.gpkg"\nid_field = "id"\n'  # relative to the config
    cfg.write_text(text)
    out = tmp_path / "out"
    res = cli(["project", cfg, "--model", case.model, "--out", out])
    assert res.exit_code == 0, res.stderr
    assert "zones: 2 zones" in res.stderr
    table = read_zones_csv(out / "zones.csv")
    assert len(table) == 2 * 8  # 2 zones x (2 species x (present + 2 futures + 1 ensemble))
    man = json.loads((out / "manifest.json").read_text())
    listed = {e["path"] for e in man["outputs"]}
    assert {"zones.csv", "zones.gpkg"} <= listed
    assert str(case.data / "zones" / "z.gpkg") in {e["path"] for e in man["inputs"]}
    # a bad zones table or file is refused before any computing
    cfg.write_text(text.replace("id_field", "id_feild"))
    res = cli(["project", cfg, "--model", case.model, "--out", tmp_path / "bad"])
    assert_refused(res.exit_code, res.stderr, tmp_path / "bad", "outputs.zones.id_feild", "id_field", exc=res.exception)
    cfg.write_text(text.replace('id_field = "id"', 'id_field = "code"'))
    res = cli(["project", cfg, "--model", case.model, "--out", tmp_path / "bad"])
    assert_refused(res.exit_code, res.stderr, tmp_path / "bad", "'code'", "z.gpkg", exc=res.exception)


# --- the demo -----------------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> Path:
    return demo_run(tmp_path_factory)[0]


def test_demo_units_partition_the_island(demo):
    table = read_zones_csv(demo / "zones.csv")
    summary = pd.read_csv(demo / "summary.csv", keep_default_na=False, na_values=[""])
    assert len(table) == 8 * len(summary)  # 8 invented zones x every row of summary.csv
    units = table[table["zone_id"].str.startswith("M")]
    pres = units[units["scenario"] == "present"]
    # Source: the three invented management units tile lon -139.9..-130.1, lat -40.1..-47.9,
    # which holds every land cell (the island keeps 3 cells off the grid edge), so their valid
    # areas add up to the species' valid area and their area-weighted means to its mean
    for sp, g in pres.groupby("species"):
        s = summary[(summary["species"] == sp) & (summary["scenario"] == "present")].iloc[0]
        # (summary.csv keeps 6 significant digits: rel 1e-5)
        assert g["area_km2"].sum() == pytest.approx(s["area_km2"], rel=1e-5)
        assert (g["area_km2"] * g["mean_ceiling_now"]).sum() / g["area_km2"].sum() == pytest.approx(s["mean_ceiling_now"], rel=1e-5)
    fut = units[(units["model"] == "model-b") & (units["period"] == "2071-2100") & (units["scenario"] == "ssp585")]
    for sp, g in fut.groupby("species"):
        s = summary[(summary["species"] == sp) & (summary["model"] == "model-b") & (summary["period"] == "2071-2100")
                    & (summary["scenario"] == "ssp585")].iloc[0]
        for col in ("area_km2_release", "area_km2_constraint", "area_km2_novel"):
            assert g[col].sum() == pytest.approx(s[col], rel=1e-5, abs=1e-3), (sp, col)


def test_demo_zones_file_is_reproducible(tmp_path):
    from ceiling.demo import write_demo_zones

    # the shipped file is what the generator writes, byte for byte (a fixed GeoPackage timestamp)
    a = write_demo_zones(tmp_path / "a.gpkg").read_bytes()
    assert a == (REPO / "demo_grids" / "zones.gpkg").read_bytes()
    g = gpd.read_file(REPO / "demo_grids" / "zones.gpkg")
    assert g["id"].is_unique and g.is_valid.all() and (g["note"] == "invented demo data").all()
