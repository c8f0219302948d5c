"""``ceiling run`` / ``ceiling project`` through the command line.

1. The demo end to end (``ceiling run configs/demo.toml``, once per session): progress, the
   headline table, every output file, the tables, and a manifest whose checksums match; zone
   areas add up to the valid area computed independently (Source: the zone classes partition
   the cells valid now and later; cell areas from pyproj.Geod).
2. Bad input: exit code 2, one "error:" line on stderr naming the file or key at fault and the
   fix, no traceback, no output folder and no hidden staging folder left behind.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rasterio
from projection_helpers import (
    REPO,
    SMALL_RAIN,
    SMALL_TEMP,
    SmallCase,
    assert_refused,
    cli,
    demo_run,
    geod_row_areas,
    model_document,
    small_fields,
    subprocess_cli,
    write_json,
    write_tif,
)

SPECIES = ["sp_a", "sp_b", "sp_c"]
FUTURES = [(s, m, p) for m in ("model-a", "model-b", "model-c", "model-d") for s in ("ssp245", "ssp585")
           for p in ("2041-2070", "2071-2100")]  # model-d: raw series, derived in the run
N_CLIMATES = 1 + len(FUTURES)
ZONES = ["stable", "release", "constraint", "opens", "closes", "absent"]


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    return demo_run(tmp_path_factory)


def _sha(p: Path) -> str:
    return hashlib.sha256(p.read_bytes()).hexdigest()


def test_demo_prints_progress_and_the_headline_table(demo):
    out, res = demo
    err = res.stderr.splitlines()
    progress = [ln for ln in err if re.match(rf"^\[\d+/{N_CLIMATES}\] ", ln)]
    assert len(progress) == N_CLIMATES, err
    assert progress[0].startswith(f"[1/{N_CLIMATES}] present")
    for s, m, p in FUTURES:
        assert any(f"{s} / {m} / {p}" in ln for ln in progress), (s, m, p)
    assert "Traceback" not in res.stderr and "error:" not in res.stderr
    header = next(ln for ln in res.stdout.splitlines() if "area_km2_release" in ln)
    for col in ("species", "scenario", "model", "period", "area_km2_release", "area_km2_constraint", "mean_change"):
        assert col in header.split()
    body = [ln for ln in res.stdout.splitlines() if ln.split()[:1] and ln.split()[0] in SPECIES]
    assert len(body) == len(SPECIES) * len(FUTURES)
    assert str(out) in res.stdout


def test_demo_writes_every_map(demo):
    out, _ = demo
    for sp in SPECIES:
        for layer in ("ceiling", "limiting"):
            assert (out / sp / "present" / f"{layer}.tif").is_file()
        for s, m, p in FUTURES:
            for layer in ("ceiling", "change", "change_pct", "limiting", "zone", "switch"):
                assert (out / sp / s / m / p / f"{layer}.tif").is_file(), (sp, s, m, p, layer)
    for name in ("ceiling.nc", "summary.csv", "transitions.csv", "manifest.json", "model.json"):
        assert (out / name).is_file(), name
    assert not [p for p in out.rglob(".*")], "hidden temporary files left in the output"
    assert not [p for p in out.parent.iterdir() if p.name.startswith(".partial-")]


def test_demo_tables(demo):
    out, _ = demo
    s = pd.read_csv(out / "summary.csv")
    ensembles = s[s["model"] == "ensemble"]
    assert len(ensembles) == len(SPECIES) * 4  # 2 scenarios x 2 periods
    s = s[s["model"] != "ensemble"]
    assert len(s) == len(SPECIES) * (1 + len(FUTURES))
    keys = set(zip(s["species"], s["scenario"], s["model"].fillna(""), s["period"]))
    for sp in SPECIES:
        assert (sp, "present", "", "1991-2020") in keys
        for f in FUTURES:
            assert (sp, *f) in keys
    fut = s[s["scenario"] != "present"]
    for z in ZONES:
        assert fut[f"area_km2_{z}"].notna().all(), z
        assert (fut[f"area_km2_{z}"] >= 0).all()
    t = pd.read_csv(out / "transitions.csv")
    from ceiling.model import load_models

    # K x K transitions per species and future, K the factors in that species' minimum
    ks = {m.species: len(m.factor_names) for m in load_models(out / "model.json")}
    assert len(t) == sum(ks[sp] ** 2 for sp in SPECIES) * len(FUTURES)
    # transitions partition the valid area of each species and future
    sums = t.groupby(["species", "scenario", "model", "period"])["area_km2"].sum()
    for _, row in fut.iterrows():
        total = sums[(row["species"], row["scenario"], row["model"], row["period"])]
        assert total == pytest.approx(row["area_km2"], rel=1e-5)


def test_demo_zone_areas_add_up_to_the_valid_area(demo):
    out, _ = demo
    s = pd.read_csv(out / "summary.csv")
    with rasterio.open(out / "sp_a" / "present" / "ceiling.tif") as src:
        t = src.transform
        height = src.height
    # Source: pyproj.Geod areas of the cells (WGS84), one per row of the lon/lat grid
    rows = geod_row_areas(t, height)
    for sp in SPECIES:
        with rasterio.open(out / sp / "present" / "ceiling.tif") as src:
            now = src.read_masks(1).astype(bool)
        pres = s[(s["species"] == sp) & (s["scenario"] == "present")].iloc[0]
        assert pres["area_km2"] == pytest.approx((now * rows[:, None]).sum() / 1e6, rel=1e-5)
        for sc, m, p in FUTURES:
            with rasterio.open(out / sp / sc / m / p / "ceiling.tif") as src:
                later = src.read_masks(1).astype(bool)
            valid_km2 = ((now & later) * rows[:, None]).sum() / 1e6
            row = s[(s["species"] == sp) & (s["scenario"] == sc) & (s["model"] == m) & (s["period"] == p)].iloc[0]
            zone_sum = sum(row[f"area_km2_{z}"] for z in ZONES)
            assert zone_sum == pytest.approx(valid_km2, rel=1e-5), (sp, sc, m, p)
            assert row["area_km2"] == pytest.approx(valid_km2, rel=1e-5)
    # and the zone map agrees with the table for one case
    with rasterio.open(out / "sp_b" / "ssp585" / "model-a" / "2071-2100" / "zone.tif") as src:
        z = src.read(1)
    row = s[(s["species"] == "sp_b") & (s["scenario"] == "ssp585") & (s["model"] == "model-a") & (s["period"] == "2071-2100")].iloc[0]
    for code, name in enumerate(ZONES):
        assert row[f"area_km2_{name}"] == pytest.approx(((z == code) * rows[:, None]).sum() / 1e6, rel=1e-5, abs=1e-3)


def test_demo_manifest(demo):
    out, _ = demo
    man = json.loads((out / "manifest.json").read_text())
    listed = {e["path"]: e for e in man["outputs"]}
    on_disk = {str(p.relative_to(out)) for p in out.rglob("*") if p.is_file()} - {"manifest.json"}
    assert set(listed) == on_disk
    for rel, e in listed.items():
        p = out / rel
        assert e["size"] == p.stat().st_size, rel
        assert e["sha256"] == _sha(p), rel
    ins = man["inputs"]
    resolved = {str(Path(e["path"]).resolve()) for e in ins}
    grids = REPO / "demo_grids"
    expected = {grids / "survey.csv"} | set((grids / "present").glob("*.tif")) | set((grids / "future").rglob("*.tif")) \
        | set((grids / "future").rglob("*.nc")) | set((grids / "baseline").glob("*.tif")) | set((grids / "series").rglob("*.nc"))
    assert {str(p.resolve()) for p in expected} <= resolved
    assert len(expected) == 1 + 4 + 8 * 4 + 4 + 36 + 15  # + the monthly baseline and model-d's series
    for e in ins:
        p = Path(e["path"])
        assert e["size"] == p.stat().st_size and e["sha256"] == _sha(p), e["path"]
    assert man["config"]["sha256"] == _sha(REPO / "configs" / "demo.toml")
    assert man["model"]["sha256"] == _sha(out / "model.json")
    assert len(man["climates"]) == N_CLIMATES


# --- bad input ------------------------------------------------------------------------------------

@pytest.fixture
def case(tmp_path) -> SmallCase:
    return SmallCase(tmp_path / "case", ny=30, nx=40, futures=1)


def _future(case: SmallCase, **layers) -> list[dict]:
    fut = dict(case.futures[0])
    fut["layers"] = {**fut["layers"], **layers}
    return [fut]


def _refuse(case: SmallCase, tmp_path: Path, *keywords: str, cfg: Path | None = None, model: Path | None = None,
            out: Path | None = None, progress_ok: bool = False) -> str:
    out = out or tmp_path / "out"
    res = cli(["project", cfg or case.config(), "--model", model or case.model, "--out", out])
    stderr = res.stderr
    if progress_ok:  # errors found while computing come after the progress of finished climates
        lines = [ln for ln in stderr.splitlines() if ln.strip()]
        assert all(re.match(r"^\[\d+/\d+\] ", ln) for ln in lines[:-1]), lines
        stderr = lines[-1] if lines else ""
    return assert_refused(res.exit_code, stderr, out, *keywords, exc=res.exception)


def test_future_missing_a_factor(case, tmp_path):
    fut = dict(case.futures[0])
    fut["layers"] = {"temp": fut["layers"]["temp"]}
    _refuse(case, tmp_path, "rain", "futures.0.layers", "pattern", cfg=case.config("f.toml", futures=[fut]))


def test_layer_file_not_found(case, tmp_path):
    missing = case.data / "future" / "m0" / "nope.tif"
    _refuse(case, tmp_path, "rain", "nope.tif", "not found", "check the path",
            cfg=case.config("f.toml", futures=_future(case, rain=missing)))


def test_layer_is_not_a_raster(case, tmp_path):
    junk = case.data / "junk.tif"
    junk.write_bytes(bytes(np.random.default_rng(3).integers(0, 256, 4096, dtype=np.uint8)))
    _refuse(case, tmp_path, "rain", "junk.tif", "cannot be opened as a raster",
            cfg=case.config("f.toml", futures=_future(case, rain=junk)))


def test_truncated_geotiff_header(case, tmp_path):
    """GDAL's GeoTIFF writer puts the image directory at the end: cutting the file loses it."""
    src = case.data / "future" / "m0" / "rain.tif"
    cut = case.data / "cut.tif"
    cut.write_bytes(src.read_bytes()[: src.stat().st_size // 2])
    _refuse(case, tmp_path, "rain", "cut.tif", "cannot be opened as a raster",
            cfg=case.config("f.toml", futures=_future(case, rain=cut)))


def test_truncated_geotiff_data(case, tmp_path):
    """A cloud-optimised file has its directory first: the header opens, the tiles do not."""
    import rasterio.shutil

    big = SmallCase(tmp_path / "big", ny=200, nx=240, futures=1)
    cog = big.data / "cog.tif"
    rasterio.shutil.copy(str(big.data / "future" / "m0" / "rain.tif"), str(cog), driver="COG", BLOCKSIZE=128)
    cut = big.data / "cut_cog.tif"
    cut.write_bytes(cog.read_bytes()[: int(cog.stat().st_size * 0.6)])
    line = _refuse(big, tmp_path, "cut_cog.tif", "truncated or corrupt", cfg=big.config("f.toml", futures=_future(big, rain=cut)),
                   progress_ok=True)
    assert "re-create" in line


def test_layer_without_crs(case, tmp_path):
    t, _ = small_fields(case.ny, case.nx)
    nocrs = write_tif(case.data / "nocrs.tif", t, crs=None, units="degC", **case.grid_kw)
    _refuse(case, tmp_path, "temp", "nocrs.tif", "no CRS", "assign one",
            cfg=case.config("f.toml", futures=_future(case, temp=nocrs)))


def test_layer_not_overlapping_the_template(case, tmp_path):
    t, _ = small_fields(case.ny, case.nx)
    far = write_tif(case.data / "far.tif", t, west=-120.0, north=-10.0, cell=case.cell, units="degC")
    _refuse(case, tmp_path, "temp", "far.tif", "does not overlap", cfg=case.config("f.toml", futures=_future(case, temp=far)))


def test_model_with_a_newer_schema(case, tmp_path):
    newer = write_json(case.data / "newer.json", model_document({"sp1": [SMALL_TEMP, SMALL_RAIN]}, schema_version=2))
    _refuse(case, tmp_path, "newer.json", "schema version 2", "upgrade", model=newer)


def test_model_with_factors_the_config_lacks(case, tmp_path):
    other = dict(SMALL_RAIN, name="humidity")
    m = write_json(case.data / "other.json", model_document({"sp1": [SMALL_TEMP, other]}))
    _refuse(case, tmp_path, "humidity", "config", model=m)


def test_future_layer_all_nodata(case, tmp_path):
    empty = write_tif(case.data / "empty.tif", np.full((case.ny, case.nx), np.nan), units="mm year-1", **case.grid_kw)
    _refuse(case, tmp_path, "rain", "empty.tif", "all nodata", cfg=case.config("f.toml", futures=_future(case, rain=empty)),
            progress_ok=True)


def test_present_layer_all_nodata(case, tmp_path):
    empty = write_tif(case.data / "empty_now.tif", np.full((case.ny, case.nx), np.nan), units="mm year-1", **case.grid_kw)
    factors = case.factors()
    factors[1] = dict(factors[1], layer=empty)
    _refuse(case, tmp_path, "rain", "empty_now.tif", "all nodata", cfg=case.config("f.toml", factors=factors))


def test_output_folder_not_writable(case, tmp_path):
    """An unusable --out is refused before any work. Permissions do not stop root (CI runs tests
    as root), so the folder is made unusable by placing it below an existing file; as another
    user a read-only parent folder is tried too."""
    blocker = tmp_path / "a_file"
    blocker.write_text("not a folder")
    _refuse(case, tmp_path, "a_file", "--out", out=blocker / "out")
    assert blocker.read_text() == "not a folder"
    if os.geteuid() != 0:
        locked = tmp_path / "locked"
        locked.mkdir()
        locked.chmod(0o555)
        try:
            _refuse(case, tmp_path, "locked", "permission", out=locked / "out")
        finally:
            locked.chmod(0o755)


def test_future_listed_twice(case, tmp_path):
    _refuse(case, tmp_path, "listed twice", "s1 / m0 / p1", cfg=case.config("f.toml", futures=case.futures * 2))


def test_unknown_projection_key_suggests_the_right_one(case, tmp_path):
    line = _refuse(case, tmp_path, "projection.chunks", "did you mean 'chunk'", cfg=case.config("f.toml", projection={"chunks": 64}))
    assert "f.toml" in line


def test_unknown_future_key_suggests_the_right_one(case, tmp_path):
    fut = dict(case.futures[0], perod="p1")
    _refuse(case, tmp_path, "futures.0.perod", "did you mean 'period'", cfg=case.config("f.toml", futures=[fut]))


def test_existing_output_is_kept(case, tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    (out / "keep.txt").write_text("mine")
    res = cli(["project", case.config(), "--model", case.model, "--out", out])
    assert res.exit_code == 2 and res.stderr.startswith("error: ") and "--overwrite" in res.stderr
    assert (out / "keep.txt").read_text() == "mine" and len(list(out.iterdir())) == 1


def test_refusal_in_a_real_process(case, tmp_path):
    """The console entry point as a user runs it: one line, no traceback, nothing left."""
    cut = case.data / "cut.tif"
    src = case.data / "future" / "m0" / "temp.tif"
    cut.write_bytes(src.read_bytes()[:100])
    out = tmp_path / "out"
    res = subprocess_cli(["project", case.config("f.toml", futures=_future(case, temp=cut)), "--model", case.model, "--out", out])
    assert_refused(res.returncode, res.stderr, out, "temp", "cut.tif")
