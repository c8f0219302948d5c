"""The bad-input catalogue, continued: names that become folders, output folders, resumption,
helper processes, and the command line's own errors.

Each case is tried as a user would try it, through the command line. The promise checked is the
README's: bad input gives exit code 2 and exactly one ``error:`` line naming the file, field or
value and the fix, with no traceback; nothing outside ``--out`` is written or deleted (a folder
that existed keeps exactly its files); an output folder is complete or absent. Cases that look
suspicious but are valid must work, checked on what they write.
"""

from __future__ import annotations

import errno
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rasterio
from affine import Affine
from projection_helpers import (
    REPO,
    demo_run,
    SMALL_RAIN,
    SMALL_TEMP,
    SmallCase,
    assert_refused,
    cli,
    model_document,
    read_float,
    write_json,
    write_tif,
)

# --- helpers ------------------------------------------------------------------------------------------


@pytest.fixture
def case(tmp_path):
    return SmallCase(tmp_path / "case", ny=30, nx=40, futures=2)


def _fut(case: SmallCase, k: int = 0, **names) -> dict:
    return dict(case.futures[k], **names)


def _with(cfg: Path, text: str) -> Path:
    cfg.write_text(cfg.read_text() + text)
    return cfg


def _tree(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def _listing(folder: Path) -> dict[str, tuple[int, int]]:
    """Every entry under ``folder`` (links not followed), a file's with its size and modification time."""
    got = {}
    for root, dirs, files in os.walk(folder):
        for name in dirs:
            got[os.path.relpath(os.path.join(root, name), folder)] = (-1, -1)
        for name in files:
            st = os.lstat(os.path.join(root, name))
            got[os.path.relpath(os.path.join(root, name), folder)] = (st.st_size, st.st_mtime_ns)
    return got


def _one_error_line(res, *keywords: str) -> str:
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert res.exit_code == 2, res.output
    assert "Traceback" not in res.stderr and len(lines) == 1 and lines[0].startswith("error: "), lines
    for k in keywords:
        assert k.lower() in lines[0].lower(), (k, lines[0])
    return lines[0]


def _earlier_run(folder: Path) -> Path:
    """A folder as an earlier run leaves it (its manifest is what marks it)."""
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "manifest.json").write_text(json.dumps({"kind": "ceiling-run-manifest", "schema_version": 1}))
    (folder / "summary.csv").write_text("species\n")
    return folder


# --- refused before any work: names, placeholders, sections, options, files --------------------------
# each: (id, build(case, tmp) -> {"cfg", "model", "out", "args"}, key words of the one error line)


def _project_cases():
    def scenario_names_share_a_folder(c, t):
        return {"cfg": c.config("f.toml", futures=[_fut(c, 0, scenario="a b"), _fut(c, 1, scenario="a_b")])}

    def model_names_differ_in_case(c, t):
        return {"cfg": c.config("f.toml", futures=[_fut(c, 0, model="GCM 1"), _fut(c, 1, model="gcm_1")])}

    def period_names_share_a_folder(c, t):
        return {"cfg": c.config("f.toml", futures=[_fut(c, 0, period="2041/2070"), _fut(c, 1, period="2041_2070")])}

    def scenario_named_like_the_present(c, t):
        return {"cfg": c.config("f.toml", futures=[_fut(c, 0, scenario="Present")])}

    def model_named_like_a_file(c, t):
        return {"cfg": c.config("f.toml", futures=[_fut(c, 0, model="model.json")])}

    def species_names_share_a_folder(c, t):
        return {"model": write_json(c.data / "two.json", model_document({"sp a": [SMALL_TEMP, SMALL_RAIN],
                                                                         "sp/a": [SMALL_TEMP, SMALL_RAIN]}))}

    def species_named_like_a_run_file(c, t):
        return {"model": write_json(c.data / "rf.json", model_document({"report.html": [SMALL_TEMP, SMALL_RAIN]}))}

    def species_named_figures(c, t):
        return {"model": write_json(c.data / "fg.json", model_document({"Figures": [SMALL_TEMP, SMALL_RAIN]}))}

    def pattern(text):
        def build(c, t):
            fut = {"scenarios": ["s1"], "models": ["m0"], "periods": ["p1"], "pattern": str(c.data / text)}
            return {"cfg": c.config("f.toml", futures=[fut])}
        return build

    def empty_scenarios(c, t):
        fut = {"scenarios": [], "models": ["m0"], "periods": ["p1"], "pattern": str(c.data / "future/{model}/{factor}.tif")}
        return {"cfg": c.config("f.toml", futures=[fut])}

    def outputs_typo(c, t):
        return {"cfg": _with(c.config("f.toml"), "\n[outputs.communty]\nrichness_threshold = 1.0\n")}

    def model_nested_deeply(c, t):
        p = c.data / "deep.json"
        p.write_text("[" * 100_000 + "]" * 100_000)
        return {"model": p}

    def config_nested_deeply(c, t):
        p = c.data / "deep.toml"
        p.write_text('name = "x"\nx = ' + "[" * 100_000 + "]" * 100_000 + "\n")
        return {"cfg": p}

    def layer_symlink_loop(c, t):
        a, b = c.data / "loop_a.tif", c.data / "loop_b.tif"
        a.symlink_to(b)
        b.symlink_to(a)
        return {"cfg": c.config("f.toml", futures=[dict(c.futures[0], layers={**c.futures[0]["layers"], "rain": a})])}

    def layer_of_a_million_squared(c, t):
        # a 10^6 x 10^6 layer over the grid (sparse: only its header and strip table are on disk)
        p = c.data / "huge" / "temp.tif"
        p.parent.mkdir()
        n = 1_000_000
        tr = Affine(c.cell * c.nx / n, 0, c.west, 0, -c.cell * c.ny / n, c.north)
        with rasterio.open(p, "w", driver="GTiff", width=n, height=n, count=1, dtype="float32", crs="EPSG:4326",
                           transform=tr, nodata=-9999.0, sparse_ok=True, blockysize=512, bigtiff="YES") as dst:
            dst.units = ("degC",)
        return {"cfg": c.config("f.toml", futures=[dict(c.futures[0], layers={**c.futures[0]["layers"], "temp": p})])}

    def netcdf_path_with_quote(c, t):
        import netCDF4

        p = c.data / 'clim"2050.nc'
        with netCDF4.Dataset(p, "w") as nc:
            nc.createDimension("lat", c.ny)
            nc.createDimension("lon", c.nx)
            nc.createVariable("pr", "f4", ("lat", "lon"))[:] = np.ones((c.ny, c.nx), np.float32)
        fut = dict(c.futures[0], layers={**c.futures[0]["layers"], "rain": {"path": p, "variable": "pr"}})
        return {"cfg": c.config("f.toml", futures=[fut])}

    def threads_negative(c, t):
        return {"args": ["--threads", "-1"]}

    def threads_zero(c, t):
        return {"args": ["--threads", "0"]}

    def out_is_a_file(c, t):
        f = t / "results.txt"
        f.write_text("mine")
        return {"out": f, "exists": True}

    def out_dangling_link(c, t):
        link = t / "out"
        link.symlink_to(t / "nowhere")
        return {"out": link, "exists": True}

    def unknown_option(c, t):
        return {"args": ["--thread", "2"]}

    return [
        ("scenario-names-share-a-folder", scenario_names_share_a_folder, ("'a b'", "'a_b'", "share the folder", "rename")),
        ("model-names-differ-in-case-and-space", model_names_differ_in_case, ("'GCM 1'", "'gcm_1'", "case ignored")),
        ("period-names-share-a-folder", period_names_share_a_folder, ("'2041/2070'", "'2041_2070'", "share the folder")),
        ("scenario-named-like-the-present", scenario_named_like_the_present, ("'Present'", "present climate's folder")),
        ("model-named-like-a-file", model_named_like_a_file, ("'model.json'", "ends like a file name", "rename")),
        ("species-names-share-a-folder", species_names_share_a_folder, ("two.json", "'sp a'", "'sp/a'", "share the folder")),
        ("species-named-like-a-run-file", species_named_like_a_run_file, ("'report.html'", "ends like a file name")),
        ("species-named-like-the-figures-folder", species_named_figures, ("'Figures'", "figures folder")),
        ("pattern-unknown-placeholder", pattern("future/{foo}/{factor}.tif"), ("futures.0.pattern", "'{foo}'", "{scenario}")),
        ("pattern-unclosed-placeholder", pattern("future/{factor.tif"), ("futures.0.pattern", "unmatched '{'")),
        ("pattern-positional-placeholder", pattern("future/{0}/{factor}.tif"), ("'{0}'", "unknown placeholder")),
        ("pattern-attribute-access", pattern("future/{factor.__class__}.tif"), ("'{factor.__class__}'", "unknown placeholder")),
        ("futures-empty-scenario-list", empty_scenarios, ("futures.0", "'scenarios' is an empty list")),
        ("outputs-unknown-table", outputs_typo, ("f.toml", "outputs.communty", "did you mean 'community'")),
        ("model-json-nested-deeply", model_nested_deeply, ("deep.json", "nested too deeply")),
        ("config-nested-deeply", config_nested_deeply, ("deep.toml", "nested too deeply")),
        ("layer-symlink-loop", layer_symlink_loop, ("loop_a.tif", "symbolic link")),
        ("layer-of-a-million-squared-cells", layer_of_a_million_squared, ("temp.tif", "1,000,000 x 1,000,000", "size is the cause")),
        ("netcdf-path-with-a-quote", netcdf_path_with_quote, ('clim"2050.nc', "double quote", "rename")),
        ("threads-negative", threads_negative, ("--threads", "-1", ">=1", "--help")),
        ("threads-zero", threads_zero, ("--threads", "0", ">=1")),
        ("unknown-option", unknown_option, ("--thread", "--threads", "ceiling project --help")),
        ("out-is-a-file", out_is_a_file, ("--out", "results.txt", "is a file")),
        ("out-dangling-symlink", out_dangling_link, ("--out", "symbolic link", "leads nowhere")),
    ]


PROJECT_CASES = _project_cases()


@pytest.mark.parametrize("build_case,keywords", [c[1:] for c in PROJECT_CASES], ids=[c[0] for c in PROJECT_CASES])
def test_project_refuses(case, tmp_path, monkeypatch, build_case, keywords):
    monkeypatch.chdir(tmp_path)
    got = build_case(case, tmp_path)
    out = got.get("out", tmp_path / "out")
    cfg = got.get("cfg", case.config())
    before = _listing(tmp_path)  # the inputs, the current folder and, when it exists, the given --out
    res = cli(["project", cfg, "--model", got.get("model", case.model), "--out", out, *got.get("args", [])])
    if got.get("exists"):  # the given --out is left exactly as it was
        _one_error_line(res, *keywords)
    else:
        assert_refused(res.exit_code, res.stderr, out, *keywords, exc=res.exception)
    assert _listing(tmp_path) == before  # nothing written or deleted anywhere


def _fit_cases():
    def rows(t, b, **cols):
        df = pd.DataFrame(b.survey_rows())
        for k, v in cols.items():
            df[k] = v
        return df

    def species_share_a_folder(t, b):
        df = rows(t, b)
        df["species"] = np.where(np.arange(len(df)) % 2, "Sp a", "sp_A")
        df.to_csv(t.survey, index=False)
        return t.config(survey={"species": "species"})

    def species_named_like_the_model_file(t, b):
        rows(t, b, species="model.json").to_csv(t.survey, index=False)
        return t.config(survey={"species": "species"})

    def factor_named_like_the_panel(t, b):
        return t.config(factors=[{"name": "all_factors", "layer": t.layer}, {"name": "f1", "layer": t.layer}])

    def duplicate_header(t, b):
        t.survey.write_text(t.survey.read_text().replace("site,lon,lat,count", "count,lon,lat,count", 1))
        return t.config()

    def na_abundance(t, b):
        df = pd.read_csv(t.survey, dtype=str)
        df.loc[4, "count"] = "NA"
        df.to_csv(t.survey, index=False)
        return t.config()

    def projection_typo_at_fit(t, b):
        return t.config(extra="\n[projection]\nchunks = 64\n")

    def futures_pattern_at_fit(t, b):
        return t.config(extra='\n[present]\nperiod = "now"\n\n[[futures]]\nscenario = "s"\nmodel = "m"\nperiod = "p"\n'
                              'pattern = "f/{factor.__class__}.tif"\n')

    def outputs_typo_at_fit(t, b):
        return t.config(extra="\n[outputs]\nzone = 1\n")

    return [
        ("fit-species-share-a-folder", species_share_a_folder, ("survey.csv", "'Sp a'", "'sp_A'", "share the folder")),
        ("fit-species-named-like-the-model-file", species_named_like_the_model_file, ("'model.json'", "ends like a file")),
        ("fit-factor-named-like-the-panel", factor_named_like_the_panel, ("'all_factors'", "fit_species_all_factors.png")),
        ("survey-duplicate-column-header", duplicate_header, ("survey.csv", "column 'count' appears twice", "columns 1 and 4")),
        ("survey-na-abundance", na_abundance, ("row 5", "'NA' (a missing-value marker)", "not a finite number")),
        ("fit-projection-typo", projection_typo_at_fit, ("projection.chunks", "did you mean 'chunk'")),
        ("fit-futures-attribute-placeholder", futures_pattern_at_fit, ("futures.0.pattern", "'{factor.__class__}'")),
        ("fit-outputs-typo", outputs_typo_at_fit, ("outputs.zone", "did you mean 'zones'")),
    ]


FIT_CASES = _fit_cases()


@pytest.mark.parametrize("build_case,keywords", [c[1:] for c in FIT_CASES], ids=[c[0] for c in FIT_CASES])
def test_fit_refuses(tiny, build, build_case, keywords):
    cfg = build_case(tiny, build)
    before = _listing(tiny.root)
    res = cli(["fit", cfg, "--out", tiny.out])
    assert_refused(res.exit_code, res.stderr, tiny.out, *keywords, exc=res.exception)
    assert _listing(tiny.root) == before  # nothing written or deleted anywhere


# --- suspicious but valid ------------------------------------------------------------------------------

def test_survey_columns_named_like_internal_ones_are_ordinary_columns(tiny, build):
    """Columns '_x', '_y', '_abundance' and '_species' beside the declared ones change nothing: the
    model equals the one fitted without them, and a factor may read such a column."""
    from ceiling.config import load_config
    from ceiling.fitting import fit_config

    quick = {"method": "per_factor", "screen": False}
    plain = fit_config(load_config(tiny.config(fit=quick)))
    df = pd.read_csv(tiny.survey)
    df["_x"], df["_y"], df["_abundance"], df["_species"] = np.arange(len(df)) - 500.0, 99.0, 1e6, "ghost"
    df.to_csv(tiny.survey, index=False)
    factors = [dict(tiny.factors[0]), {"name": "f2", "column": "_x", "basis": "linear"}]
    odd = fit_config(load_config(tiny.config(factors=factors, fit=quick)))
    assert odd.models.species == plain.models.species == ["species"]
    a, b = odd.models["species"], plain.models["species"]
    assert a.n_points == b.n_points == 40
    np.testing.assert_array_equal(a.factors[0].params, b.factors[0].params)
    np.testing.assert_array_equal(odd.samples["species"].abundance, plain.samples["species"].abundance)
    np.testing.assert_array_equal(odd.samples["species"].values["f2"], np.arange(40) - 500.0)


def test_all_zero_abundance_fits_with_a_warning(tiny, tmp_path):
    df = pd.read_csv(tiny.survey)
    df["count"] = 0
    df.to_csv(tiny.survey, index=False)
    res = cli(["fit", tiny.config(), "--out", tiny.out])
    assert res.exit_code == 0, res.output
    warned = [ln for ln in res.stderr.splitlines() if ln.startswith("warning: ")]
    assert any("abundance 0" in ln and "ceilings are 0" in ln and "survey.abundance" in ln for ln in warned), res.stderr


def test_resume_records_are_keyed_by_the_full_names():
    """Two climates whose names give one folder name still get two records."""
    from ceiling.running import done_record_name

    assert done_record_name(("a b", "m0", "p1")) != done_record_name(("a_b", "m0", "p1"))
    assert done_record_name(("a", "b__c", "d")) != done_record_name(("a__b", "c", "d"))


def test_species_folders_cannot_collide_with_what_a_run_writes(tmp_path_factory):
    """Every entry at the top of a real run (the demo, shared with the other modules) is a species
    folder, a folder reserved against species names, or a file whose suffix species names may
    not end with: a species folder can never take the place of anything the run writes."""
    from ceiling.outputs.names import FILE_SUFFIXES, RESERVED

    out, _ = demo_run(tmp_path_factory)
    species = set(pd.read_csv(out / "summary.csv", dtype=str, keep_default_na=False)["species"])
    for p in out.iterdir():
        if p.is_dir():
            assert p.name in species or p.name.casefold() in RESERVED["species"], p.name
        else:
            assert p.name.casefold().endswith(FILE_SUFFIXES), p.name
    for p in (out / "figures").iterdir():  # fit figures beside the species' (and community's) map folders
        if p.is_dir():
            assert p.name in species or p.name.casefold() in RESERVED["species"], p.name
        else:
            assert p.name.casefold().endswith(FILE_SUFFIXES), p.name


# --- --overwrite replaces only an earlier output of ceiling, never an input -------------------------------

def _overwrite_cases():
    def user_files(c, out):
        out.mkdir()
        (out / "notes.txt").write_text("mine")
        return c.config(), ("notes.txt", "did not write", "choose an empty or new --out")

    def config_inside(c, out):
        _earlier_run(out)
        cfg = out / "run.toml"
        shutil.copy(c.config(), cfg)
        return cfg, ("run.toml", "contains the input", "choose another --out")

    def mask_inside(c, out):
        _earlier_run(out)
        write_tif(out / "mask.tif", np.ones((c.ny, c.nx)), **c.grid_kw)
        return c.config("m.toml", projection={"mask": str(out / "mask.tif")}), ("mask.tif", "contains the input")

    def template_inside(c, out):
        _earlier_run(out)
        shutil.copy(c.data / "present" / "temp.tif", out / "grid.tif")
        return c.config("g.toml", projection={"template": str(out / "grid.tif")}), ("grid.tif", "contains the input")

    return [("overwrite-user-folder", user_files), ("overwrite-folder-holding-the-config", config_inside),
            ("overwrite-folder-holding-the-mask", mask_inside), ("overwrite-folder-holding-the-template", template_inside)]


OVERWRITE_CASES = _overwrite_cases()


@pytest.mark.parametrize("build_case", [c[1] for c in OVERWRITE_CASES], ids=[c[0] for c in OVERWRITE_CASES])
def test_overwrite_keeps_what_ceiling_did_not_write(case, tmp_path, build_case):
    out = tmp_path / "out"
    cfg, keywords = build_case(case, out)
    before, everything = _tree(out), _listing(tmp_path)
    res = cli(["project", cfg, "--model", case.model, "--out", out, "--overwrite"])
    _one_error_line(res, *keywords)
    assert _tree(out) == before and _listing(tmp_path) == everything
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".partial")]


def test_out_that_is_the_current_folder_is_refused(case, tmp_path, monkeypatch):
    here = tmp_path / "empty"
    here.mkdir()
    monkeypatch.chdir(here)
    for out in (".", ".."):
        res = cli(["project", case.config(), "--model", case.model, "--out", out])
        _one_error_line(res, "current folder", "choose a new or empty subfolder")
    assert list(here.iterdir()) == [] and sorted(p.name for p in tmp_path.iterdir()) == ["case", "empty"]


# --- a full disk -----------------------------------------------------------------------------------------

def test_a_full_disk_is_one_error_line_and_nothing_is_left(case, tmp_path, monkeypatch):
    """A write that fails for want of space (here the run's NetCDF) ends the run with one line."""
    import ceiling.running

    def full(*args, **kwargs):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(tmp_path / ".partial-out" / "ceiling.nc"))

    monkeypatch.setattr(ceiling.running, "create_netcdf", full)
    out = tmp_path / "out"
    res = cli(["project", case.config(), "--model", case.model, "--out", out])
    assert_refused(res.exit_code, res.stderr, out, "no space left", "free some space", exc=res.exception)


def _tmpfs(path: Path, size: str) -> bool:
    path.mkdir()
    ok = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(path)], capture_output=True).returncode == 0
    return ok


def test_a_really_full_disk_in_a_real_process(case, tmp_path):
    """On a 600 KB file system (tmpfs; needs the right to mount one) the maps do not fit: GDAL's own
    messages stay hidden, one error line names the full disk, and the file system is left empty."""
    disk = tmp_path / "disk"
    if not _tmpfs(disk, "600k"):
        pytest.skip("cannot mount a small tmpfs here (needs root and the right to mount)")
    try:
        env = dict(os.environ, CEILING_FREE_BYTES=str(10**12), PYTHONWARNINGS="ignore")  # pass the estimate
        res = subprocess.run([sys.executable, "-c", "from ceiling.cli.main import main; main()", "-q", "project",
                              str(case.config()), "--model", str(case.model), "--out", str(disk / "out")],
                             capture_output=True, text=True, env=env, timeout=300)
        lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
        assert res.returncode == 2 and len(lines) == 1 and lines[0].startswith("error: "), res.stderr[-3000:]
        assert "space" in lines[0] and "free some space" in lines[0], lines[0]
        assert list(disk.iterdir()) == []
    finally:
        subprocess.run(["umount", str(disk)], capture_output=True)


# --- runs: a symbolic link as --out, resuming after the mask and template changed -------------------------

def test_every_file_that_shapes_a_run_is_one_of_its_inputs(case):
    """The mask and the template (given relative to the config's folder, like every path of a
    config) are inputs of the run: listed in the manifest, fingerprinted for --resume, protected
    from --overwrite."""
    from ceiling.config import load_config
    from ceiling.running import run_inputs
    from ceiling.scenarios import climates

    write_tif(case.data / "mask.tif", np.ones((case.ny, case.nx)), **case.grid_kw)
    shutil.copy(case.data / "present" / "temp.tif", case.data / "grid.tif")
    cfg = load_config(case.config("r.toml", projection={"mask": "mask.tif", "template": "grid.tif"}))
    got = [p.resolve() for p in run_inputs(cfg, climates(cfg), case.model, None)]
    for p in ("mask.tif", "grid.tif", "model.json", "survey.csv", "present/temp.tif", "future/m1/rain.tif"):
        assert (case.data / p).resolve() in got, p
    assert len(got) == len(set(got))


def test_resume_after_the_mask_changed_and_out_a_link(tmp_path, monkeypatch):
    """A run interrupted after every climate is done, resumed after the mask changed: nothing is
    reused, every map follows the new mask. --out is a symbolic link: the run goes into its
    folder, the link stays a link, and --overwrite through it replaces the run leaving nothing
    behind."""
    import ceiling.running
    from ceiling.config import load_config
    from ceiling.running import project_to_folder

    c = SmallCase(tmp_path / "case", ny=30, nx=40, futures=1)
    mask = np.zeros((c.ny, c.nx))
    mask[:, : c.nx // 2] = 1  # the western half
    write_tif(c.data / "mask.tif", mask, **c.grid_kw)
    cfg = c.config("masked.toml", projection={"mask": str(c.data / "mask.tif")})
    target = tmp_path / "results"
    target.mkdir()
    link = tmp_path / "latest"
    link.symlink_to(target)

    def interrupt(*args, **kwargs):
        raise KeyboardInterrupt

    with monkeypatch.context() as m:
        m.setattr(ceiling.running, "ProjectionRun", interrupt)  # built once every climate is written
        with pytest.raises(KeyboardInterrupt):
            project_to_folder(load_config(cfg), link, model_path=c.model, threads=2)
    assert any((tmp_path / ".partial-results").glob(".done-*.json"))  # present and future were done
    mask = np.zeros((c.ny, c.nx))
    mask[: c.ny // 2, :] = 1  # now the northern half (same size of file)
    write_tif(c.data / "mask.tif", mask, **c.grid_kw)
    res = cli(["project", cfg, "--model", c.model, "--out", link, "--resume", "--threads", "2"])
    assert res.exit_code == 0, res.output
    assert "reused" not in res.stderr
    assert link.is_symlink() and link.resolve() == target.resolve()
    valid = np.isfinite(read_float(target / "sp1" / "s1" / "m0" / "p1" / "ceiling.tif"))
    assert not valid[c.ny // 2:, :].any() and valid[: c.ny // 2, c.nx // 2:].any()
    assert np.array_equal(valid, np.isfinite(read_float(target / "sp1" / "present" / "ceiling.tif")))
    inputs = {Path(e["path"]).name for e in json.loads((target / "manifest.json").read_text())["inputs"]}
    assert {"mask.tif", "model.json", "temp.tif", "rain.tif"} <= inputs
    assert sorted(p.name for p in tmp_path.iterdir()) == ["case", "latest", "results"]
    # --overwrite through the link: the earlier run is replaced, nothing is left beside it
    stamp = (target / "manifest.json").read_bytes()
    res = cli(["project", cfg, "--model", c.model, "--out", link, "--overwrite", "--threads", "2"])
    assert res.exit_code == 0, res.output
    assert link.is_symlink() and link.resolve() == target.resolve()
    assert (target / "manifest.json").read_bytes() != stamp  # timings differ: a new run
    assert sorted(p.name for p in tmp_path.iterdir()) == ["case", "latest", "results"]


# --- helper processes end with the run ---------------------------------------------------------------------

def test_figure_processes_end_with_a_killed_run(tmp_path):
    """kill -9 of a run while its figure processes draw: they end too, and write nothing after."""
    import psutil

    c = SmallCase(tmp_path / "c", ny=30, nx=40, futures=1)
    out = tmp_path / "out"
    env = dict(os.environ, PYTHONWARNINGS="ignore")
    p = subprocess.Popen([sys.executable, "-c", "from ceiling.cli.main import main; main()", "project", str(c.config()),
                          "--model", str(c.model), "--out", str(out), "--threads", "2"],
                         stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env, start_new_session=True)
    kids: list = []
    try:
        end = time.monotonic() + 240
        while time.monotonic() < end and p.poll() is None and len(kids) < 2:
            try:
                kids = psutil.Process(p.pid).children(recursive=True)
            except psutil.Error:
                kids = []
            time.sleep(0.02)
        assert len(kids) >= 2, "the figure processes were not seen"
        p.kill()
        p.wait()
        gone, alive = psutil.wait_procs(kids, timeout=5)
        assert not alive, f"still running: {[k.pid for k in alive]}"
        stage = tmp_path / ".partial-out"
        files = sorted(x for x in stage.rglob("*") if x.is_file())
        time.sleep(1.0)
        assert sorted(x for x in stage.rglob("*") if x.is_file()) == files  # nothing written after
    finally:
        if p.poll() is None:
            os.killpg(p.pid, signal.SIGKILL)
        for k in kids:
            try:
                k.kill()
            except psutil.Error:
                pass


# --- the command line's own usage errors and the numba cache ------------------------------------------------

def test_usage_errors_are_one_error_line(case, tmp_path):
    for args, keywords in (
        (["project", case.config()], ("missing option", "--model")),
        (["fit"], ("missing argument", "config")),
        (["frobnicate"], ("no such command", "frobnicate")),
        (["demo", "--out", tmp_path / "d", "--seed", "-3"], ("--seed", "-3", ">=0")),
    ):
        _one_error_line(cli(args), *keywords)


def test_numba_cache_is_kept_where_the_user_can_write(tmp_path):
    """Run from this source checkout, the compiled kernels are cached under the user cache folder
    (XDG_CACHE_HOME here), not beside the package's modules; a user's NUMBA_CACHE_DIR stands."""
    env = {k: v for k, v in os.environ.items() if k != "NUMBA_CACHE_DIR"}
    env["XDG_CACHE_HOME"] = str(tmp_path / "cache")
    code = "import ceiling.kernels_fast as k; print(k.predictor.stats.cache_path)"
    got = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, cwd=REPO, timeout=120)
    assert got.returncode == 0, got.stderr
    where = Path(got.stdout.strip())
    assert where.is_relative_to(tmp_path / "cache" / "ceiling") and where.is_dir(), where
    assert not where.is_relative_to(REPO)
    # the rule itself: an installed, writable package keeps numba's own choice; a user's choice stands
    from ceiling.numba_cache import numba_cache_dir

    installed = tmp_path / "site" / "ceiling"
    installed.mkdir(parents=True)
    assert numba_cache_dir(installed, environ={}) is None
    assert numba_cache_dir(REPO / "ceiling", environ={"NUMBA_CACHE_DIR": "/x"}) is None
    assert numba_cache_dir(REPO / "ceiling", environ={}) is not None
    if os.geteuid() != 0:  # root may write anywhere
        installed.chmod(0o555)
        try:
            assert numba_cache_dir(installed, environ={}) is not None
        finally:
            installed.chmod(0o755)
