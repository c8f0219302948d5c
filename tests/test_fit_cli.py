"""``ceiling fit`` through the command line: bad input is refused in one line, and the demo works.

Every refusal must exit with code 2, print exactly one line on stderr starting with "error:",
name the file or field at fault and the fix, show no traceback, and leave the output folder
uncreated (or untouched).
"""

from __future__ import annotations

import csv
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from ceiling.cli.main import cli
from ceiling.outputs.names import DIAGNOSTICS_FILE, MODEL_FILE

REPO = Path(__file__).resolve().parents[1]


def _cli(args: list[str]):
    return CliRunner().invoke(cli, [str(a) for a in args], catch_exceptions=True)


def _subprocess(args: list[str], cwd: Path | None = None):
    return subprocess.run(
        # the console-script entry point (ceiling = ceiling.cli.main:main) in this interpreter
        [sys.executable, "-c", "from ceiling.cli.main import main; main()", *map(str, args)],
        capture_output=True, text=True, cwd=cwd, timeout=300,
    )


def _assert_refused(code: int, stderr: str, out: Path, *keywords: str, exc=None) -> str:
    assert exc is None or isinstance(exc, SystemExit), f"unexpected exception {exc!r}"
    lines = [ln for ln in stderr.splitlines() if ln.strip()]
    assert code == 2, stderr
    assert "Traceback" not in stderr
    assert len(lines) == 1, lines
    line = lines[0]
    assert line.startswith("error: "), line
    for k in keywords:
        assert k.lower() in line.lower(), (k, line)
    assert not out.exists(), f"{out} was created"
    assert not any(p.name.startswith(".partial-") for p in out.parent.iterdir())
    return line


def refuse(tiny, config: Path | str, *keywords: str, extra: tuple[str, ...] = ()) -> str:
    res = _cli(["fit", config, "--out", tiny.out, *extra])
    return _assert_refused(res.exit_code, res.stderr, tiny.out, *keywords, exc=res.exception)


# --- a working tiny case, so that each refusal below differs from it in one thing -------------

def test_tiny_case_fits(tiny):
    res = _cli(["fit", tiny.config(), "--out", tiny.out])
    assert res.exit_code == 0, res.output
    assert (tiny.out / MODEL_FILE).is_file() and (tiny.out / DIAGNOSTICS_FILE).is_file()
    assert "error" not in res.stderr


def test_dropped_points_are_reported_not_fatal(tiny, build):
    rows = build.survey_rows()
    rows += [dict(rows[0], site="far", lon=build.WEST - 5.0), dict(rows[1], site="far2", lat=-80.0)]
    build.write_csv(tiny.survey, rows)
    res = _cli(["fit", tiny.config(), "--out", tiny.out])
    assert res.exit_code == 0, res.output
    # one 'warning:' line on stderr (the summary on stdout repeats it)
    assert res.stderr.splitlines() == [
        "warning: species 'species': dropped 2 of 42 survey points (2 outside grid)"
    ]
    assert "dropped: 2 outside grid" in res.stdout
    assert "Traceback" not in res.output


# --- subprocess: the real entry point, stderr as a user sees it -------------------------------

def test_missing_config_file_subprocess(tiny):
    res = _subprocess(["fit", tiny.data / "nope.toml", "--out", tiny.out])
    _assert_refused(res.returncode, res.stderr, tiny.out, "nope.toml", "not found", "check the path")


def test_missing_survey_file_subprocess(tiny):
    cfg = tiny.config(survey={"path": tiny.data / "absent.csv"})
    res = _subprocess(["fit", cfg, "--out", tiny.out])
    _assert_refused(res.returncode, res.stderr, tiny.out, "absent.csv", "not found", "survey.path")


def test_binary_junk_subprocess(tiny):
    rng = np.random.default_rng(0)
    tiny.survey.write_bytes(bytes(rng.integers(0, 256, 4000, dtype=np.uint8)))
    res = _subprocess(["fit", tiny.config(), "--out", tiny.out])
    _assert_refused(res.returncode, res.stderr, tiny.out, "survey.csv", "csv")


def test_bad_tau_subprocess(tiny):
    res = _subprocess(["fit", tiny.config(fit={"tau": 1.0}), "--out", tiny.out])
    _assert_refused(res.returncode, res.stderr, tiny.out, "fit.tau", "between 0.5 and 1")


# --- the rest through click's runner (same code path, faster) ---------------------------------

def test_semicolon_csv(tiny):
    tiny.survey.write_text(tiny.survey.read_text().replace(",", ";"))
    refuse(tiny, tiny.config(), "survey.csv", "semicolons", "comma-separated")


def test_header_only_csv(tiny):
    tiny.survey.write_text("site,lon,lat,count\n")
    refuse(tiny, tiny.config(), "survey.csv", "no rows", "add the survey records")


def test_empty_survey_file(tiny):
    tiny.survey.write_bytes(b"")
    refuse(tiny, tiny.config(), "survey.csv", "empty", "header row")


def test_missing_coordinate_column(tiny):
    refuse(tiny, tiny.config(survey={"x": "longitude"}), "'longitude'", "survey.x", "columns are")


def test_missing_abundance_column(tiny):
    refuse(tiny, tiny.config(survey={"abundance": "individuals"}), "'individuals'", "survey.abundance", "columns are")


def _edit_counts(tiny, row: int, value: str) -> None:
    df = pd.read_csv(tiny.survey, dtype=str)
    df.loc[row, "count"] = value
    df.to_csv(tiny.survey, index=False, quoting=csv.QUOTE_MINIMAL)


def test_non_numeric_abundance(tiny):
    _edit_counts(tiny, 4, "many")
    refuse(tiny, tiny.config(), "survey.csv", "row 5", "'many'", "not a finite number", ">= 0")


def test_negative_abundance(tiny):
    _edit_counts(tiny, 2, "-3")
    refuse(tiny, tiny.config(), "survey.csv", "row 3", "negative", ">= 0")


@pytest.mark.parametrize("value,shown", [("", "row 1 is empty"), ("NaN", "row 1 is 'NaN' (a missing-value marker)")],
                         ids=["blank", "NaN"])
def test_missing_abundance_value(tiny, value, shown):
    """A blank cell is called empty; a missing-value marker is quoted as written."""
    _edit_counts(tiny, 0, value)
    line = refuse(tiny, tiny.config(), "survey.csv", shown, "not a finite number", "record absences as 0")
    assert "np.float64" not in line


def test_unknown_crs(tiny):
    refuse(tiny, tiny.config(survey={"crs": "EPSG:999999"}), "survey.crs", "EPSG:999999", "not recognised", "EPSG:4326")


def test_swapped_coordinate_columns(tiny):
    refuse(tiny, tiny.config(survey={"x": "lat", "y": "lon"}), "latitudes beyond", "swapped", "survey.x", "survey.crs")


def test_all_points_outside_the_grid(tiny):
    df = pd.read_csv(tiny.survey)
    df["lon"] = df["lon"] - 20.0
    df.to_csv(tiny.survey, index=False)
    refuse(tiny, tiny.config(), "survey.csv", "none of the 40 survey points", "survey.crs", "extent")


def test_factor_without_source(tiny):
    refuse(tiny, tiny.config(factors=[{"name": "f1", "basis": "linear"}]), "factor 'f1'", "needs a source", "'layer'", "'column'")


def test_factor_column_absent_from_table(tiny):
    refuse(tiny, tiny.config(factors=[{"name": "elev", "column": "elevation"}]), "factor 'elev'", "'elevation'", "lacks", "columns are")


def test_factor_layer_missing(tiny):
    refuse(tiny, tiny.config(factors=[{"name": "f1", "layer": tiny.data / "gone.tif"}]), "gone.tif", "factor 'f1'", "factors.layer")


def test_too_few_points_for_the_basis(tiny, build):
    build.write_csv(tiny.survey, build.survey_rows(n=6))
    line = refuse(tiny, tiny.config(), "species 'species'", "factor 'f1'", "6 usable points", "needs at least 10",
                  "simpler basis")
    assert "quadratic" in line


def test_too_few_distinct_values_for_a_spline(tiny, build):
    build.write_csv(tiny.survey, build.survey_rows(n=12))
    refuse(tiny, tiny.config(factors=[{"name": "f1", "layer": tiny.layer, "basis": "spline", "df": 15}]),
           "factor 'f1'", "df=15", "needs at least 16 distinct values", "fewer degrees of freedom")


@pytest.mark.parametrize("tau", [1, 1.0, 0.3, 0.5])
def test_tau_outside_upper_half_in_config(tiny, tau):
    refuse(tiny, tiny.config(fit={"tau": tau}), "config.toml", "'fit.tau'", "strictly between 0.5 and 1", "0.9 to 0.99")


def test_unknown_key_with_suggestion(tiny):
    cfg = tiny.config(fit={"tua": 0.9})
    refuse(tiny, cfg, "config.toml", "unknown key 'fit.tua'", "did you mean 'tau'?")


def test_unknown_key_in_factor(tiny):
    cfg = tiny.config(factors=[{"name": "f1", "layr": tiny.layer}])
    refuse(tiny, cfg, "unknown key", "layr", "did you mean 'layer'?")


def test_duplicate_factor_names(tiny):
    f = {"name": "f1", "layer": tiny.layer}
    refuse(tiny, tiny.config(factors=[f, dict(f)]), "config.toml", "'f1'", "listed twice", "distinct name")


def test_not_toml(tiny):
    cfg = tiny.data / "broken.toml"
    cfg.write_text("[survey\npath = 3\n")
    refuse(tiny, cfg, "broken.toml", "not valid TOML", "fix the syntax")


def test_output_folder_exists_and_is_not_empty(tiny):
    tiny.out.mkdir()
    keep = tiny.out / "notes.txt"
    keep.write_text("mine")
    res = _cli(["fit", tiny.config(), "--out", tiny.out])
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert res.exit_code == 2 and len(lines) == 1 and lines[0].startswith("error: ")
    assert "not empty" in lines[0] and "--overwrite" in lines[0] and str(tiny.out) in lines[0]
    assert "Traceback" not in res.stderr
    assert sorted(p.name for p in tiny.out.iterdir()) == ["notes.txt"] and keep.read_text() == "mine"
    # --overwrite does not replace a folder of the user's own files ...
    res = _cli(["fit", tiny.config(), "--out", tiny.out, "--overwrite"])
    assert res.exit_code == 2 and "did not write" in res.stderr and keep.read_text() == "mine"
    # ... only an earlier output of ceiling, by a complete fit
    keep.unlink()
    assert _cli(["fit", tiny.config(), "--out", tiny.out]).exit_code == 0
    (tiny.out / MODEL_FILE).write_text((tiny.out / MODEL_FILE).read_text().replace('"tau": 0.9,', '"tau": 0.8,', 1))
    res = _cli(["fit", tiny.config(), "--out", tiny.out, "--overwrite"])
    assert res.exit_code == 0, res.output
    assert '"tau": 0.9,' in (tiny.out / MODEL_FILE).read_text()


def test_output_folder_inside_the_inputs_is_refused(tiny):
    inside = tiny.data / "results"
    res = _cli(["fit", tiny.config(), "--out", inside])
    _assert_refused(res.exit_code, res.stderr, inside, "lies inside the", str(tiny.data), "write outputs outside")


def test_empty_existing_output_folder_is_used(tiny):
    tiny.out.mkdir()
    res = _cli(["fit", tiny.config(), "--out", tiny.out])
    assert res.exit_code == 0, res.output
    assert (tiny.out / MODEL_FILE).is_file()


# --- the demo end to end ---------------------------------------------------------------------

@pytest.fixture(scope="module")
def demo_cli(tmp_path_factory):
    """``ceiling fit configs/demo.toml --out .../tmp/x`` exactly as shipped, run from the
    repository root as a subprocess (the slowest test of the suite: 50 wedge replicates)."""
    out = tmp_path_factory.mktemp("demo") / "tmp" / "x"
    res = _subprocess(["fit", "configs/demo.toml", "--out", out], cwd=REPO)
    return res, out


def test_demo_fit_exits_zero_and_prints_the_verdicts(demo_cli):
    res, out = demo_cli
    assert res.returncode == 0, res.stderr
    assert "Traceback" not in res.stderr
    assert "verdict" in res.stdout
    for sp in ("sp_a", "sp_b", "sp_c"):
        for f in ("tmax_warm", "tmin_cold", "precip", "moisture"):
            assert any(ln.split()[:2] == [sp, f] for ln in res.stdout.splitlines()), (sp, f)
    assert "acts as a limiting factor" in res.stdout
    assert f"model: {out / MODEL_FILE}" in res.stdout


def test_demo_fit_writes_model_and_diagnostics(demo_cli):
    _, out = demo_cli
    from ceiling.model import load_models

    models = load_models(out / MODEL_FILE)
    assert models.species == ["sp_a", "sp_b", "sp_c"]
    diag = pd.read_csv(out / DIAGNOSTICS_FILE)
    need = {"species", "factor", "n", "tau", "share_above", "pinball_loss", "pseudo_r1", "wedge_p", "verdict"}
    need |= {f"b{i}{s}" for i in range(3) for s in ("", "_se", "_ci_low", "_ci_high")}
    assert need <= set(diag.columns), need - set(diag.columns)
    assert len(diag) == 12
    assert diag["n"].tolist() == [600] * 4 + [500] * 4 + [700] * 4  # the survey's site counts
    assert set(diag["verdict"]) <= {"acts as a limiting factor", "no distinct upper edge"}
    assert np.all(diag["b0_ci_low"] < diag["b0"]) and np.all(diag["b0"] < diag["b0_ci_high"])
    assert np.all(diag["pinball_loss"] > 0) and np.all((diag["pseudo_r1"] > 0) & (diag["pseudo_r1"] < 1))
    # about 1 - tau of the points above each ceiling (common practice; p/n bound of a
    # quantile fit, Koenker & Bassett 1978)
    assert np.all(np.abs(diag["share_above"] - (1 - diag["tau"])) <= 0.02)


def test_demo_fit_writes_figures_that_are_not_blank(demo_cli):
    _, out = demo_cli
    import matplotlib.image as mpimg
    from PIL import Image

    figs = sorted((out / "figures").glob("*.png"))
    assert len(figs) == 3 * 4 + 3
    for p in figs:
        with Image.open(p) as im:
            im.verify()
        img = mpimg.imread(p)
        assert img.ndim == 3 and img.shape[0] > 200 and img.shape[1] > 300
        grey = img[..., :3].mean(axis=2)
        # a blank (single-colour) image has variance 0; a plot with axes, points and curves
        # has many dark pixels on white
        # (measured on the demo: variance about 0.02, 3 % dark pixels)
        assert grey.var() > 5e-3, p.name
        assert np.mean(grey < 0.5) > 0.01, p.name
    assert not [p for p in out.rglob("*") if p.name.startswith(".partial-")]


def test_demo_fit_with_original_config_paths(tmp_path):
    # the shipped config resolves its relative data paths against its own folder, wherever
    # the command is run from (fast check through the API, no fit)
    from ceiling.config import load_config

    cfg = load_config(REPO / "configs" / "demo.toml")
    assert cfg.survey.path.resolve() == (REPO / "demo_grids" / "survey.csv").resolve()
    assert all(f.layer.is_file() for f in cfg.factors)
    shutil.copy(REPO / "configs" / "demo.toml", tmp_path / "demo.toml")
    moved = load_config(tmp_path / "demo.toml")
    assert not moved.survey.path.exists()
