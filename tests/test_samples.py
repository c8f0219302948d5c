"""Survey ingest: tables and vector files, layer sampling, dropped points, reprojection."""

from __future__ import annotations

import warnings

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from pyproj import CRS, Transformer
from shapely.geometry import Point

from ceiling.config import parse_config
from ceiling.errors import DataError, DroppedPointsWarning, InputFileError
from ceiling.samples import load_samples, read_survey, sample_layer


def _cfg(tiny, survey=None, factors=None):
    s = dict(tiny.survey_cfg, **(survey or {}))
    return parse_config({"survey": s, "factors": factors or tiny.factors})


def _load(cfg, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("error", DroppedPointsWarning)
        return load_samples(cfg, **kw)


def test_csv_samples_take_the_cell_values(tiny, build):
    samples = _load(_cfg(tiny))
    s = samples["species"]
    grid = build.factor_grid()
    rows = pd.read_csv(tiny.survey)
    assert s.n == len(rows) and np.array_equal(s.abundance, rows["count"].to_numpy(float))
    col = np.floor((rows["lon"] - build.WEST) / build.CELL).astype(int)
    row = np.floor((build.NORTH - rows["lat"]) / build.CELL).astype(int)
    assert_allclose(s.values["f1"], grid[row, col].astype("float32"), rtol=0, atol=0)
    assert s.crs == "EPSG:4326" and s.dropped == {"outside grid": 0, "nodata": 0, "missing factor value": 0}


def test_geopackage_gives_the_same_samples_as_csv(tiny, build):
    rows = pd.read_csv(tiny.survey)
    gdf = gpd.GeoDataFrame(
        {"site": rows["site"], "count": rows["count"]},
        geometry=[Point(x, y) for x, y in zip(rows["lon"], rows["lat"])],
        crs="EPSG:4326",
    )
    gpkg = tiny.data / "survey.gpkg"
    gdf.to_file(gpkg, driver="GPKG", engine="pyogrio")
    from_csv = _load(_cfg(tiny))["species"]
    from_gpkg = _load(_cfg(tiny, survey={"path": gpkg, "crs": None}))["species"]
    assert np.array_equal(from_csv.abundance, from_gpkg.abundance)
    assert np.array_equal(from_csv.x, from_gpkg.x) and np.array_equal(from_csv.y, from_gpkg.y)
    pd.testing.assert_frame_equal(from_csv.values, from_gpkg.values)
    assert CRS.from_user_input(from_gpkg.crs) == CRS.from_epsg(4326)
    assert from_csv.sha256 == from_gpkg.sha256


def test_vector_file_with_other_geometry_is_refused(tiny):
    gdf = gpd.GeoDataFrame({"count": [1, 2]}, geometry=[Point(160.1, -50.1).buffer(0.01)] * 2, crs="EPSG:4326")
    p = tiny.data / "poly.gpkg"
    gdf.to_file(p, driver="GPKG", engine="pyogrio")
    with pytest.raises(DataError, match="must be points.*Polygon"):
        read_survey(p)


def test_points_outside_and_on_nodata_are_dropped_and_counted(tiny, build):
    grid = build.factor_grid()
    grid[0, :] = np.nan  # the northern row is nodata
    layer = build.write_tif(tiny.data / "holes.tif", grid)
    pts = []
    for c in range(8):  # 8 on nodata
        pts.append(build.cell_centre(0, c))
    for r in range(1, 6):  # 40 good
        for c in range(8):
            pts.append(build.cell_centre(r, c))
    pts += [(build.WEST - 0.05, -50.3), (build.WEST + 0.85, -50.3), (160.4, build.NORTH + 0.01)]  # 3 outside
    df = pd.DataFrame({"lon": [p[0] for p in pts], "lat": [p[1] for p in pts], "count": 1})
    df.to_csv(tiny.survey, index=False)
    cfg = _cfg(tiny, factors=[{"name": "f1", "layer": layer}])
    with pytest.warns(DroppedPointsWarning, match=r"dropped 11 of 51 survey points \(3 outside grid, 8 nodata\)"):
        s = load_samples(cfg)["species"]
    assert s.n == 40
    assert dict(s.dropped) == {"outside grid": 3, "nodata": 8, "missing factor value": 0}
    assert np.all(np.isfinite(s.values["f1"]))


def test_missing_table_factor_value_is_counted_once(tiny, build):
    rows = pd.read_csv(tiny.survey)
    rows["elev"] = np.arange(len(rows), dtype=float)
    rows.loc[[3, 5], "elev"] = np.nan
    rows.loc[0, "lon"] = build.WEST - 1.0  # outside the grid *and* fine elevation
    rows.loc[5, "lon"] = build.WEST - 1.0  # outside and missing: counted once, as outside
    rows.to_csv(tiny.survey, index=False)
    cfg = _cfg(tiny, factors=[{"name": "f1", "layer": tiny.layer}, {"name": "elev", "column": "elev"}])
    with pytest.warns(DroppedPointsWarning):
        s = load_samples(cfg)["species"]
    assert dict(s.dropped) == {"outside grid": 2, "nodata": 0, "missing factor value": 1}
    assert s.n == len(rows) - 3
    assert list(s.values.columns) == ["f1", "elev"]


def test_bilinear_sampling_follows_its_definition(tmp_path, build):
    # Source: definition of bilinear interpolation: at a cell centre it returns that cell's
    # value; halfway between two cell centres the mean of the two; at the corner shared by four
    # cells the mean of the four.
    grid = np.arange(48, dtype=float).reshape(6, 8) ** 1.3
    layer = build.write_tif(tmp_path / "g.tif", grid)
    crs = CRS.from_epsg(4326)
    centre = np.array([build.cell_centre(2, 3), build.cell_centre(4, 6)])
    between_cols = np.array([(build.WEST + 0.4, build.cell_centre(2, 3)[1])])  # cells (2,3)|(2,4)
    between_rows = np.array([(build.cell_centre(2, 3)[0], build.NORTH - 0.3)])  # cells (2,3)/(3,3)
    corner = np.array([(build.WEST + 0.4, build.NORTH - 0.3)])  # cells (2,3),(2,4),(3,3),(3,4)

    def at(p, method):
        v, inside, _ = sample_layer(layer, p[:, 0], p[:, 1], crs, method=method)
        assert inside.all()
        return v

    g32 = grid.astype("float32").astype(float)
    assert_allclose(at(centre, "bilinear"), at(centre, "nearest"), rtol=1e-12)
    assert_allclose(at(centre, "nearest"), [g32[2, 3], g32[4, 6]], rtol=0)
    assert_allclose(at(between_cols, "bilinear"), [(g32[2, 3] + g32[2, 4]) / 2], rtol=1e-9)
    assert_allclose(at(between_rows, "bilinear"), [(g32[2, 3] + g32[3, 3]) / 2], rtol=1e-9)
    assert_allclose(at(corner, "bilinear"), [g32[2:4, 3:5].mean()], rtol=1e-9)
    # a quarter of the way from one centre to the next: weights 3/4 and 1/4
    q = np.array([(build.cell_centre(2, 3)[0] + 0.025, build.cell_centre(2, 3)[1])])
    assert_allclose(at(q, "bilinear"), [0.75 * g32[2, 3] + 0.25 * g32[2, 4]], rtol=1e-9)


def test_bilinear_next_to_nodata_falls_back_to_the_nearest_cell(tmp_path, build):
    grid = build.factor_grid()
    grid[2, 4] = np.nan
    layer = build.write_tif(tmp_path / "g.tif", grid)
    # inside cell (2, 3), close to its eastern neighbour (2, 4), which is nodata
    p = np.array([(build.WEST + 0.39, build.cell_centre(2, 3)[1] + 0.01)])
    v, _, _ = sample_layer(layer, p[:, 0], p[:, 1], CRS.from_epsg(4326), method="bilinear")
    assert_allclose(v, [np.float32(grid[2, 3])], rtol=1e-7)


def test_reprojected_survey_samples_the_same_cells(tiny, build):
    # Survey in Web Mercator, layer in EPSG:4326; pyproj is the reference for the conversion.
    rows = pd.read_csv(tiny.survey)
    to_merc = Transformer.from_crs("EPSG:4326", "EPSG:3857", always_xy=True)
    mx, my = to_merc.transform(rows["lon"].to_numpy(), rows["lat"].to_numpy())
    merc = rows.assign(lon=mx, lat=my).rename(columns={"lon": "east", "lat": "north"})
    mpath = tiny.data / "survey_3857.csv"
    merc.to_csv(mpath, index=False, float_format="%.6f")
    a = _load(_cfg(tiny))["species"]
    b = _load(_cfg(tiny, survey={"path": mpath, "x": "east", "y": "north", "crs": "EPSG:3857"}))["species"]
    assert b.crs == "EPSG:3857"
    assert np.array_equal(a.values["f1"].to_numpy(), b.values["f1"].to_numpy())
    assert np.array_equal(a.abundance, b.abundance)
    # ...and also bilinear, away from cell centres, agrees to within float noise
    a2 = _load(_cfg(tiny, survey={"sampling": "bilinear"}))["species"]
    b2 = _load(_cfg(tiny, survey={"path": mpath, "x": "east", "y": "north", "crs": "EPSG:3857",
                                  "sampling": "bilinear"}))["species"]
    assert_allclose(a2.values["f1"], b2.values["f1"], rtol=1e-6)


def test_layer_in_projected_crs(tmp_path, build):
    # a layer on a 10 km grid in EPSG:3857 sampled at lon/lat points: each point lands in the
    # cell pyproj puts it in
    grid = np.arange(30, dtype=float).reshape(5, 6)
    west, north, cell = 17_800_000.0, -6_400_000.0, 10_000.0
    layer = build.write_tif(tmp_path / "m.tif", grid, west=west, north=north, cell=cell, crs="EPSG:3857")
    to_ll = Transformer.from_crs("EPSG:3857", "EPSG:4326", always_xy=True)
    cx = west + cell * (np.array([0, 3, 5]) + 0.5)
    cy = north - cell * (np.array([0, 2, 4]) + 0.5)
    lon, lat = to_ll.transform(cx, cy)
    v, inside, _ = sample_layer(layer, np.asarray(lon), np.asarray(lat), CRS.from_epsg(4326))
    assert inside.all()
    assert_allclose(v, [grid[0, 0], grid[2, 3], grid[4, 5]])


def test_species_column_splits_the_survey(tiny):
    rows = pd.read_csv(tiny.survey)
    rows["taxon"] = np.where(np.arange(len(rows)) % 2 == 0, "alpha", "beta")
    rows.to_csv(tiny.survey, index=False)
    cfg = _cfg(tiny, survey={"species": "taxon"})
    samples = _load(cfg)
    assert list(samples) == ["alpha", "beta"]
    assert samples["alpha"].n == 20 and samples["beta"].n == 20
    assert np.array_equal(samples["beta"].abundance, rows["count"].to_numpy(float)[1::2])
    assert _load(cfg, species=["beta"]).keys() == {"beta"}
    with pytest.raises(DataError, match="species gamma not in the survey; it has alpha, beta"):
        load_samples(cfg, species=["gamma"])


def test_unknown_survey_format(tiny):
    p = tiny.data / "survey.xlsx"
    p.write_bytes(b"PK\x03\x04")
    with pytest.raises(InputFileError, match="unknown survey format '.xlsx'"):
        read_survey(p, crs="EPSG:4326")


def test_csv_without_crs_is_refused(tiny):
    with pytest.raises(DataError, match="set survey.crs"):
        read_survey(tiny.survey)


def test_missing_coordinate_value_is_refused(tiny):
    rows = pd.read_csv(tiny.survey)
    rows.loc[2, "lat"] = np.nan
    rows.to_csv(tiny.survey, index=False)
    with pytest.raises(DataError, match="row 3 has a missing or non-numeric coordinate"):
        read_survey(tiny.survey, crs="EPSG:4326")


def test_species_with_every_point_dropped_does_not_vanish(tiny, build):
    from ceiling.fitting import fit_config

    rows = pd.read_csv(tiny.survey)
    rows["taxon"] = np.where(np.arange(len(rows)) < 30, "alpha", "beta")
    rows.loc[rows["taxon"] == "beta", "lon"] -= 10.0  # all of beta's points off the grid
    rows.to_csv(tiny.survey, index=False)
    cfg = _cfg(tiny, survey={"species": "taxon"})
    with pytest.warns(DroppedPointsWarning, match="species 'beta': dropped 10 of 10"):
        samples = load_samples(cfg)
    assert samples["alpha"].n == 30 and samples["beta"].n == 0
    assert dict(samples["beta"].dropped)["outside grid"] == 10
    with pytest.raises(DataError, match="species 'beta': no usable survey points"):
        fit_config(cfg)


def test_duplicate_points_are_dropped_on_request(tiny):
    rows = pd.read_csv(tiny.survey)
    pd.concat([rows, rows.iloc[:3]]).to_csv(tiny.survey, index=False)
    assert _load(_cfg(tiny))["species"].n == 43
    with pytest.warns(DroppedPointsWarning, match=r"dropped 3 of 43 survey points \(3 duplicate\)"):
        s = load_samples(_cfg(tiny, survey={"drop_duplicates": True}))["species"]
    assert s.n == 40 and dict(s.dropped)["duplicate"] == 3
