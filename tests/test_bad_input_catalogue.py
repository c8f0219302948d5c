"""A catalogue of bad inputs, each tried through the command line.

Every case must be refused with exit code 2, exactly one ``error:`` line on stderr that names
the offending file, field or value and says how to fix it (checked by key words), no Python
traceback, and nothing left in (or beside) the output folder. Cases that look suspicious but
are valid must work, and are tested with positive assertions on the maps they give.

Warnings (dropped points, skipped ensembles) are counted in the manifest and the summary, not
only printed.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rasterio
from affine import Affine
from projection_helpers import (
    SMALL_RAIN,
    SMALL_TEMP,
    SmallCase,
    assert_refused,
    cli,
    model_document,
    read_float,
    small_fields,
    write_json,
    write_tif,
)

# --- builders ---------------------------------------------------------------------------------------


@pytest.fixture
def case(tmp_path):
    return SmallCase(tmp_path / "case", ny=40, nx=50, futures=2)


def _future(case: SmallCase, k: int = 0, **layers) -> list[dict]:
    fut = dict(case.futures[k])
    fut["layers"] = {**fut["layers"], **layers}
    return [fut]


def _edit_survey(tiny, fn: Callable[[pd.DataFrame], pd.DataFrame]) -> None:
    df = pd.read_csv(tiny.survey, dtype=str)
    fn(df).to_csv(tiny.survey, index=False)


def _set_count(row: int, value: str):
    def f(df):
        df.loc[row, "count"] = value
        return df
    return f


def _raw_tif(path: Path, arr: np.ndarray, *, transform: Affine, dtype: str, nodata=None, units: str | None = None,
             crs: str = "EPSG:4326", scale: float | None = None) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    prof = dict(driver="GTiff", width=arr.shape[1], height=arr.shape[0], count=1, dtype=dtype, crs=crs,
                transform=transform)
    if nodata is not None:
        prof["nodata"] = nodata
    with rasterio.Env(GDAL_PAM_ENABLED="NO"), rasterio.open(path, "w", **prof) as dst:
        dst.write(arr.astype(dtype), 1)
        if units:
            dst.units = (units,)
        if scale is not None:  # packed values: value = stored * scale
            dst.scales = (scale,)
    return path


def _case_transform(case: SmallCase) -> Affine:
    return Affine(case.cell, 0.0, case.west, 0.0, -case.cell, case.north)


# --- fit-stage cases (survey table, config), on the tiny fitting case of conftest ---------------------
# each: (id, how to break the tiny case -> config path, key words of the one error line)


def _fit_cases():
    def empty(t, b):
        t.survey.write_bytes(b"")
        return t.config()

    def header_only(t, b):
        t.survey.write_text("site,lon,lat,count\n")
        return t.config()

    def semicolons(t, b):
        t.survey.write_text(t.survey.read_text().replace(",", ";"))
        return t.config()

    def tabs(t, b):
        t.survey.write_text(t.survey.read_text().replace(",", "\t"))
        return t.config()

    def nan_count(t, b):
        _edit_survey(t, _set_count(3, "NaN"))
        return t.config()

    def inf_count(t, b):
        _edit_survey(t, _set_count(5, "inf"))
        return t.config()

    def neg_inf_count(t, b):
        _edit_survey(t, _set_count(6, "-inf"))
        return t.config()

    def words_count(t, b):
        _edit_survey(t, _set_count(2, "many"))
        return t.config()

    def negative_count(t, b):
        _edit_survey(t, _set_count(1, "-4"))
        return t.config()

    def swapped(t, b):
        return t.config(survey={"x": "lat", "y": "lon"})

    def bad_crs(t, b):
        return t.config(survey={"crs": "WGS84 please"})

    def unknown_epsg(t, b):
        return t.config(survey={"crs": "EPSG:999999"})

    def missing_column(t, b):
        return t.config(survey={"abundance": "individuals"})

    def typo_key(t, b):
        return t.config(fit={"tua": 0.9})

    def typo_factor_key(t, b):
        return t.config(factors=[{"name": "f1", "layr": t.layer}])

    def tau_one(t, b):
        return t.config(fit={"tau": 1})

    def too_many_df(t, b):
        b.write_csv(t.survey, b.survey_rows(n=12))
        return t.config(factors=[{"name": "f1", "layer": t.layer, "basis": "spline", "df": 15}])

    def duplicate_factors(t, b):
        f = {"name": "f1", "layer": t.layer}
        return t.config(factors=[f, dict(f)])

    def not_toml(t, b):
        p = t.data / "broken.toml"
        p.write_text("[survey\npath = 3\n")
        return p

    def empty_config(t, b):
        p = t.data / "blank.toml"
        p.write_text("")
        return p

    def missing_config(t, b):
        return t.data / "nope.toml"

    def missing_survey(t, b):
        return t.config(survey={"path": t.data / "absent.csv"})

    def undeclared_nodata_layer(t, b):
        # the fitting layer exported without a nodata tag: its sea cells hold -9999
        v = b.factor_grid()
        v[0, :3] = -9999.0
        _raw_tif(t.layer, v, transform=Affine(b.CELL, 0, b.WEST, 0, -b.CELL, b.NORTH), dtype="float32")
        return t.config()

    def out_inside_layer_folder(t, b):
        return t.config()

    return [
        ("empty-survey", empty, ("survey.csv", "empty", "header row"), None),
        ("header-only-csv", header_only, ("survey.csv", "no rows", "add the survey records"), None),
        ("semicolon-csv", semicolons, ("survey.csv", "semicolons", "comma-separated"), None),
        ("tab-csv", tabs, ("survey.csv", "tabs", "comma-separated"), None),
        ("nan-abundance", nan_count, ("survey.csv", "row 4", "not a finite number"), None),
        ("inf-abundance", inf_count, ("survey.csv", "row 6", "not a finite number"), None),
        ("neg-inf-abundance", neg_inf_count, ("survey.csv", "row 7", "not a finite number"), None),
        ("text-abundance", words_count, ("survey.csv", "row 3", "'many'", ">= 0"), None),
        ("negative-abundance", negative_count, ("survey.csv", "row 2", "negative", ">= 0"), None),
        ("swapped-coordinates", swapped, ("latitudes beyond", "swapped", "survey.x"), None),
        ("unparsable-crs", bad_crs, ("survey.crs", "WGS84 please", "not recognised", "EPSG:4326"), None),
        ("unknown-epsg", unknown_epsg, ("survey.crs", "EPSG:999999", "EPSG:4326"), None),
        ("missing-abundance-column", missing_column, ("'individuals'", "survey.abundance", "columns are"), None),
        ("typo-in-key", typo_key, ("config.toml", "fit.tua", "did you mean 'tau'"), None),
        ("typo-in-factor-key", typo_factor_key, ("layr", "did you mean 'layer'"), None),
        ("tau-equals-1", tau_one, ("fit.tau", "strictly between 0.5 and 1"), None),
        ("basis-df-above-distinct-values", too_many_df, ("factor 'f1'", "df=15", "distinct values", "fewer degrees of freedom"), None),
        ("duplicate-factor-names", duplicate_factors, ("'f1'", "listed twice", "distinct name"), None),
        ("config-not-toml", not_toml, ("broken.toml", "not valid TOML", "fix the syntax"), None),
        ("config-empty", empty_config, ("blank.toml",), None),
        ("config-missing", missing_config, ("nope.toml", "not found", "check the path"), None),
        ("survey-missing", missing_survey, ("absent.csv", "not found", "survey.path"), None),
        ("fit-layer-undeclared-nodata", undeclared_nodata_layer, ("f1.tif", "no nodata", "-9999", "gdal_edit.py -a_nodata"), None),
        ("fit-out-inside-layer-folder", out_inside_layer_folder, ("lies inside the", "write outputs outside"), "data/results"),
    ]


FIT_CASES = _fit_cases()


@pytest.mark.parametrize("build_case,keywords,out_rel", [c[1:] for c in FIT_CASES], ids=[c[0] for c in FIT_CASES])
def test_fit_refuses(tiny, build, build_case, keywords, out_rel):
    cfg = build_case(tiny, build)
    out = tiny.root / out_rel if out_rel else tiny.out
    res = cli(["fit", cfg, "--out", out])
    assert_refused(res.exit_code, res.stderr, out, *keywords, exc=res.exception)


# --- projection-stage cases (layers, model file, futures, output folder) -----------------------------


def _project_cases():
    def truncated_half(c):
        src = c.data / "future" / "m0" / "rain.tif"
        cut = c.data / "half.tif"
        cut.write_bytes(src.read_bytes()[: src.stat().st_size // 2])
        return {"cfg": c.config("f.toml", futures=_future(c, rain=cut))}

    def netcdf_without_variable(c):
        import netCDF4

        p = c.data / "clim.nc"
        with netCDF4.Dataset(p, "w") as nc:
            nc.createDimension("lat", c.ny)
            nc.createDimension("lon", c.nx)
            v = nc.createVariable("tas", "f4", ("lat", "lon"))
            v[:] = np.zeros((c.ny, c.nx), np.float32)
        fut = _future(c)
        fut[0]["layers"]["rain"] = {"path": p, "variable": "pr"}
        return {"cfg": c.config("f.toml", futures=fut)}

    def model_missing_coefficient(c):
        doc = json.loads(c.model.read_text())
        doc["species"]["sp1"]["factors"][1]["coefficients"].pop()  # a quadratic with 2 coefficients
        return {"model": write_json(c.data / "edited.json", doc)}

    def model_coefficient_removed_key(c):
        doc = json.loads(c.model.read_text())
        del doc["species"]["sp2"]["factors"][0]["coefficients"]
        return {"model": write_json(c.data / "nokey.json", doc)}

    def model_unknown_schema(c):
        return {"model": write_json(c.data / "v7.json", model_document({"sp1": [SMALL_TEMP, SMALL_RAIN]}, schema_version=7))}

    def model_pickle_payload(c):
        p = c.data / "pickled.json"
        import pickle

        p.write_bytes(pickle.dumps({"__reduce__": "os.system"}))
        return {"model": p}

    def model_code_string(c):
        doc = json.loads(c.model.read_text())
        doc["species"]["sp1"]["tau"] = "__import__('os').system('touch HACKED')"
        return {"model": write_json(c.data / "code.json", doc)}

    def model_reduce_object(c):
        doc = json.loads(c.model.read_text())
        doc["species"]["sp1"]["factors"][0]["coefficients"] = {"__reduce__": ["os.system", ["touch HACKED"]]}
        return {"model": write_json(c.data / "reduce.json", doc)}

    def model_empty(c):
        p = c.data / "empty.json"
        p.write_bytes(b"")
        return {"model": p}

    def model_missing(c):
        return {"model": c.data / "absent.json"}

    def model_factor_not_in_config(c):
        other = dict(SMALL_RAIN, name="humidity")
        return {"model": write_json(c.data / "other.json", model_document({"sp1": [SMALL_TEMP, other]}))}

    def scenario_twice(c):
        return {"cfg": c.config("f.toml", futures=c.futures[:1] * 2)}

    def out_inside_layer_folder(c):
        return {"out": c.data / "future" / "m0" / "results"}

    def rotated(c):
        t, _ = small_fields(c.ny, c.nx)
        tr = Affine(c.cell, 0.001, c.west, 0.001, -c.cell, c.north)
        p = _raw_tif(c.data / "rotated.tif", np.nan_to_num(t, nan=-9999.0), transform=tr, dtype="float32",
                     nodata=-9999.0, units="degC")
        return {"cfg": c.config("f.toml", futures=_future(c, temp=p))}

    def undeclared_9999(c):
        t, _ = small_fields(c.ny, c.nx)
        p = _raw_tif(c.data / "no_nodata.tif", np.nan_to_num(t + 1, nan=-9999.0), transform=_case_transform(c),
                     dtype="float32", units="degC")
        return {"cfg": c.config("f.toml", futures=_future(c, temp=p))}

    def undeclared_float_lowest(c):
        _, r = small_fields(c.ny, c.nx)
        p = _raw_tif(c.data / "no_nodata_low.tif", np.nan_to_num(r, nan=np.finfo(np.float32).min),
                     transform=_case_transform(c), dtype="float32", units="mm year-1")
        return {"cfg": c.config("f.toml", futures=_future(c, rain=p))}

    def undeclared_int16(c):
        t, _ = small_fields(c.ny, c.nx)
        p = _raw_tif(c.data / "no_nodata_i16.tif", np.nan_to_num(t * 10, nan=-32768), transform=Affine(
            c.cell, 0, c.west, 0, -c.cell, c.north), dtype="int16", units="degC", scale=0.1)
        return {"cfg": c.config("f.toml", futures=_future(c, temp=p))}

    def no_crs(c):
        t, _ = small_fields(c.ny, c.nx)
        p = write_tif(c.data / "nocrs.tif", t, crs=None, units="degC", **c.grid_kw)
        return {"cfg": c.config("f.toml", futures=_future(c, temp=p))}

    def layer_missing(c):
        return {"cfg": c.config("f.toml", futures=_future(c, rain=c.data / "gone.tif"))}

    def layer_junk(c):
        p = c.data / "junk.tif"
        p.write_bytes(bytes(np.random.default_rng(5).integers(0, 256, 3000, dtype=np.uint8)))
        return {"cfg": c.config("f.toml", futures=_future(c, rain=p))}

    def layer_empty_file(c):
        p = c.data / "zero.tif"
        p.write_bytes(b"")
        return {"cfg": c.config("f.toml", futures=_future(c, rain=p))}

    def layer_far_away(c):
        t, _ = small_fields(c.ny, c.nx)
        p = write_tif(c.data / "far.tif", t, west=-120.0, north=-10.0, cell=c.cell, units="degC")
        return {"cfg": c.config("f.toml", futures=_future(c, temp=p))}

    def layer_wrong_units(c):
        t, _ = small_fields(c.ny, c.nx)
        p = write_tif(c.data / "kg.tif", t, units="kg", **c.grid_kw)
        return {"cfg": c.config("f.toml", futures=_future(c, temp=p))}

    def typo_projection_key(c):
        return {"cfg": c.config("f.toml", projection={"chunks": 64})}

    def future_missing_factor(c):
        fut = dict(c.futures[0])
        fut["layers"] = {"temp": fut["layers"]["temp"]}
        return {"cfg": c.config("f.toml", futures=[fut])}

    return [
        ("geotiff-truncated-half-way", truncated_half, ("half.tif", "cannot be opened as a raster", "complete GeoTIFF")),
        ("netcdf-without-variable", netcdf_without_variable, ("clim.nc", "no variable 'pr'", "tas", "fix 'variable'")),
        ("model-missing-coefficient", model_missing_coefficient, ("edited.json", "sp1", "rain", "ceiling fit")),
        ("model-coefficients-key-removed", model_coefficient_removed_key, ("nokey.json", "coefficients", "missing", "ceiling fit")),
        ("model-unknown-schema", model_unknown_schema, ("v7.json", "schema version 7", "upgrade ceiling", "re-fit")),
        ("model-pickle-bytes", model_pickle_payload, ("pickled.json", "not valid JSON", "ceiling fit")),
        ("model-python-code-string", model_code_string, ("code.json", "tau", "number")),
        ("model-reduce-object", model_reduce_object, ("reduce.json", "sp1", "temp", "ceiling fit")),
        ("model-empty-file", model_empty, ("empty.json", "ceiling fit")),
        ("model-missing-file", model_missing, ("absent.json", "not found")),
        ("model-factor-not-in-config", model_factor_not_in_config, ("humidity", "config")),
        ("scenario-listed-twice", scenario_twice, ("listed twice", "s1 / m0 / p1")),
        ("out-inside-layer-folder", out_inside_layer_folder, ("lies inside the layer folder", "write outputs outside")),
        ("rotated-transform", rotated, ("rotated.tif", "rotation terms", "north-up")),
        ("undeclared-nodata-9999", undeclared_9999, ("no_nodata.tif", "-9999", "declare nodata", "gdal_edit.py -a_nodata")),
        ("undeclared-nodata-float-lowest", undeclared_float_lowest, ("no_nodata_low.tif", "-3.40282e+38", "declare nodata")),
        ("undeclared-nodata-int16", undeclared_int16, ("no_nodata_i16.tif", "-32768", "declare nodata")),
        ("layer-without-crs", no_crs, ("nocrs.tif", "no CRS", "assign one")),
        ("layer-missing", layer_missing, ("gone.tif", "not found", "check the path")),
        ("layer-junk-bytes", layer_junk, ("junk.tif", "cannot be opened as a raster")),
        ("layer-empty-file", layer_empty_file, ("zero.tif", "cannot be opened as a raster")),
        ("layer-not-overlapping", layer_far_away, ("far.tif", "does not overlap")),
        ("layer-incompatible-units", layer_wrong_units, ("kg.tif", "kg", "degC")),
        ("typo-in-projection-key", typo_projection_key, ("projection.chunks", "did you mean 'chunk'")),
        ("future-missing-a-factor", future_missing_factor, ("rain", "futures.0.layers")),
    ]


PROJECT_CASES = _project_cases()


@pytest.mark.parametrize("build_case,keywords", [c[1:] for c in PROJECT_CASES], ids=[c[0] for c in PROJECT_CASES])
def test_project_refuses(case, tmp_path, monkeypatch, build_case, keywords):
    monkeypatch.chdir(tmp_path)  # a payload that ran would leave HACKED here
    got = build_case(case)
    out = got.get("out", tmp_path / "out")
    res = cli(["project", got.get("cfg", case.config()), "--model", got.get("model", case.model), "--out", out])
    assert_refused(res.exit_code, res.stderr, out, *keywords, exc=res.exception)
    assert not (tmp_path / "HACKED").exists()


def test_catalogue_size():
    """The catalogue tries at least 35 distinct bad inputs (ids are unique)."""
    ids = [c[0] for c in FIT_CASES] + [c[0] for c in PROJECT_CASES] + [c[0] for c in ZONES_CASES]
    assert len(ids) == len(set(ids))
    assert len(ids) >= 35, len(ids)


# --- zones (``ceiling summarize RUN_DIR --zones FILE``) --------------------------------------------


def _zones_cases():
    def missing(run, d):
        return d / "nozones.gpkg"

    def junk(run, d):
        p = d / "junk.geojson"
        p.write_text("{ not json")
        return p

    def empty(run, d):
        p = d / "empty.geojson"
        p.write_text("")
        return p

    return [
        ("zones-file-missing", missing, ("nozones.gpkg",)),
        ("zones-file-junk", junk, ("junk.geojson",)),
        ("zones-file-empty", empty, ("empty.geojson",)),
    ]


ZONES_CASES = _zones_cases()


@pytest.fixture(scope="module")
def small_run(tmp_path_factory):
    root = tmp_path_factory.mktemp("zrun")
    c = SmallCase(root / "case", ny=30, nx=40, futures=1)
    out = root / "run"
    res = cli(["project", c.config(), "--model", c.model, "--out", out])
    assert res.exit_code == 0, res.output
    return out


@pytest.mark.parametrize("build_case,keywords", [c[1:] for c in ZONES_CASES], ids=[c[0] for c in ZONES_CASES])
def test_summarize_refuses(small_run, tmp_path, build_case, keywords):
    before = sorted(p.name for p in small_run.iterdir())
    zones = build_case(small_run, tmp_path)
    res = cli(["summarize", small_run, "--zones", zones])
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert res.exit_code == 2, res.output
    assert "Traceback" not in res.stderr and len(lines) == 1 and lines[0].startswith("error: "), lines
    for k in keywords:
        assert k.lower() in lines[0].lower(), (k, lines[0])
    assert sorted(p.name for p in small_run.iterdir()) == before  # nothing written into the run


# --- suspicious but valid: these must work ------------------------------------------------------------


def _project_ok(case: SmallCase, tmp_path: Path, cfg: Path, name: str = "out") -> Path:
    out = tmp_path / name
    res = cli(["project", cfg, "--model", case.model, "--out", out])
    assert res.exit_code == 0, res.output
    assert "Traceback" not in res.stderr
    return out


def test_integer_layer_with_nodata_works(case, tmp_path):
    """An int16 layer packed in tenths of a degree (band scale 0.1) with nodata -32768: unpacked to
    float degC, nodata -> NaN; the maps equal those of the same values stored as float32."""
    t = case.present["temp"] + 1.0
    stored = np.where(np.isnan(t), -32768, np.round(t * 10)).astype(np.int16)
    p = _raw_tif(case.data / "t_i16.tif", stored, transform=_case_transform(case), dtype="int16", nodata=-32768,
                 units="degC", scale=0.1)
    float_ref = write_tif(case.data / "t_f32.tif", stored.astype(np.float64) / 10 * np.where(np.isnan(t), np.nan, 1.0),
                          units="degC", **case.grid_kw)
    out_i = _project_ok(case, tmp_path, case.config("i.toml", futures=_future(case, temp=p)), "int")
    out_f = _project_ok(case, tmp_path, case.config("f.toml", futures=_future(case, temp=float_ref)), "flt")
    a = read_float(out_i / "sp1" / "s1" / "m0" / "p1" / "ceiling.tif")
    b = read_float(out_f / "sp1" / "s1" / "m0" / "p1" / "ceiling.tif")
    assert np.array_equal(np.isnan(a), np.isnan(b)) and np.isnan(a).sum() == np.isnan(t).sum()
    np.testing.assert_allclose(a, b, rtol=1e-5, atol=1e-4)


def test_future_layers_on_a_coarser_grid_work(case, tmp_path):
    """Future layers at twice the cell size are aligned onto the present grid."""
    t = case.present["temp"] + 1.0
    coarse = np.nanmean(t.reshape(case.ny // 2, 2, case.nx // 2, 2), axis=(1, 3))
    p = write_tif(case.data / "coarse.tif", coarse, west=case.west, north=case.north, cell=2 * case.cell, units="degC")
    out = _project_ok(case, tmp_path, case.config("c.toml", futures=_future(case, temp=p)))
    with rasterio.open(out / "sp1" / "s1" / "m0" / "p1" / "ceiling.tif") as src:
        assert src.shape == (case.ny, case.nx)
        assert src.transform.almost_equals(_case_transform(case))
    c = read_float(out / "sp1" / "s1" / "m0" / "p1" / "ceiling.tif")
    assert np.isfinite(c).sum() > 0.5 * np.isfinite(t).sum()


def test_future_layers_shifted_by_half_a_cell_are_warped(case, tmp_path):
    """Layers offset by half a cell are not refused: they are warped (bilinear) onto the present grid.
    For a field that is linear in the column, bilinear resampling halfway between two cells gives
    their mean, which the test computes by hand."""
    yy, xx = np.mgrid[0:case.ny, 0:case.nx]
    t = 5.0 + 0.4 * xx + 0.0 * yy
    shifted = write_tif(case.data / "shifted.tif", t, west=case.west + case.cell / 2, north=case.north,
                        cell=case.cell, units="degC")
    rain = write_tif(case.data / "rain_full.tif", np.full((case.ny, case.nx), 1000.0), units="mm year-1", **case.grid_kw)
    out = _project_ok(case, tmp_path, case.config("s.toml", futures=_future(case, temp=shifted, rain=rain)))
    got = read_float(out / "sp1" / "s1" / "m0" / "p1" / "ceiling.tif")
    # on the present grid, column j lies half a cell west of the shifted column j: T = 5 + 0.4 (j - 0.5)
    j = np.arange(1, case.nx - 1)
    temp = 5.0 + 0.4 * (j - 0.5)
    eta_t = 40.0 - 20.0 * (temp - 10.0) / 10.0  # SMALL_TEMP: linear, centre 10, scale 10
    eta_r = 50.0  # SMALL_RAIN at its peak (1000 mm)
    want = np.minimum(eta_t, eta_r)
    row = case.ny - 2  # a row outside the sea corner
    np.testing.assert_allclose(got[row, 1:-1], np.maximum(want, 0.0), rtol=1e-4, atol=1e-3)


def test_relative_paths_are_resolved_against_the_config_folder(case, tmp_path, monkeypatch):
    """README: relative paths in a config are resolved against the folder holding the config."""
    text = case.config().read_text()
    text = text.replace(json.dumps(case.data.as_posix()) [:-1] + "/", '"')
    assert str(case.data) not in text  # every path is now relative
    cfg = case.data / "relative.toml"
    cfg.write_text(text)
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    out = _project_ok(case, tmp_path, cfg, "rel")
    ref = _project_ok(case, tmp_path, case.config(), "abs")
    for p in ("sp1/present/ceiling.tif", "sp2/s1/m1/p1/change.tif"):
        np.testing.assert_array_equal(read_float(out / p), read_float(ref / p))


# --- warnings are counted in the manifest and the summary --------------------------------------------


def test_projection_warnings_are_counted_in_the_manifest(case, tmp_path):
    """Two climate models for one scenario and one for another, with ensembles of at least 2 models:
    the lone scenario gets no ensemble, and that warning is printed, counted in the summary and
    listed in manifest.json."""
    futs = [case.futures[0], case.futures[1], dict(case.futures[0], scenario="s2")]
    cfg = case.config("w.toml", futures=futs, projection={"ensemble_min_models": 2})
    out = tmp_path / "out"
    res = cli(["project", cfg, "--model", case.model, "--out", out])
    assert res.exit_code == 0, res.output
    warned = [ln for ln in res.stderr.splitlines() if ln.startswith("warning: ")]
    assert any("no ensemble for s2 / p1" in ln for ln in warned), res.stderr
    man = json.loads((out / "manifest.json").read_text())
    msgs = man["warnings"]["messages"]
    assert man["warnings"]["count"] == len(msgs) == len(warned)
    assert any("no ensemble for s2 / p1" in m and "m1" in m for m in msgs)
    assert f"warnings: {len(msgs)} (listed in manifest.json)" in res.stdout


def test_dropped_points_are_counted_in_the_manifest(tiny, build, tmp_path):
    rows = build.survey_rows()
    rows += [dict(rows[0], site="far", lon=build.WEST - 5.0)]
    build.write_csv(tiny.survey, rows)
    out = tmp_path / "run"
    # one future = the present layer: a complete run (fit + project) on the tiny case
    tiny.factors = [dict(tiny.factors[0], units="degC")]
    cfg = tiny.config(extra=f'\n[present]\nperiod = "now"\n\n[[futures]]\nscenario = "s"\nmodel = "m"\nperiod = "p"\n'
                            f'layers = {{ f1 = {{ path = {json.dumps(tiny.layer.as_posix())}, units = "degC" }} }}\n')
    res = cli(["run", cfg, "--out", out])
    assert res.exit_code == 0, res.output
    man = json.loads((out / "manifest.json").read_text())
    assert man["warnings"]["count"] >= 1
    assert any("dropped 1 of 41" in m for m in man["warnings"]["messages"]), man["warnings"]
    assert "warnings: " in res.stdout
