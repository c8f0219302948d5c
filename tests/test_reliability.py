"""Reliability of ``ceiling project``: kills, resumption, repeatability, worker loss, disk space,
and safety of inputs.

1. Kill trials: a run is killed with SIGKILL at seeded random moments; the final folder never
   exists half-written (it appears in one rename when complete), every file under its final
   name inside the leftover staging folder opens and reads fully, and the next run removes or
   reuses the leftovers.
2. ``--resume`` after a kill gives outputs byte-identical to an uninterrupted run.
3. Two runs on the same inputs give byte-identical GeoTIFFs, NetCDF and tables (the manifest
   differs only in its timings).
4. A local dask.distributed cluster that loses a worker mid-run finishes with the same outputs.
5. A target without the free space the outputs need is refused before writing.
6. Model files and configs are data; names cannot escape the output folder; arbitrary config
   dictionaries give the tool's own error, never a crash.
"""

from __future__ import annotations

import hashlib
import json
import os
import random
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
import rasterio
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from projection_helpers import (
    SMALL_RAIN,
    SMALL_TEMP,
    SmallCase,
    assert_refused,
    cli,
    model_document,
    write_json,
)

from ceiling.errors import CeilingError

MAPS = (".tif", ".nc", ".csv")


def _sha(p: Path) -> str:
    return hashlib.sha256(p.read_bytes()).hexdigest()


def _checksums(root: Path, suffixes=MAPS) -> dict[str, str]:
    return {str(p.relative_to(root)): _sha(p) for p in sorted(root.rglob("*"))
            if p.is_file() and p.suffix in suffixes and not any(s.startswith(".") for s in p.relative_to(root).parts)}


def _start(args: list, stderr_path: Path, env: dict | None = None) -> subprocess.Popen:
    e = dict(os.environ, PYTHONWARNINGS="ignore::DeprecationWarning", **(env or {}))
    with open(stderr_path, "w") as err:
        return subprocess.Popen([sys.executable, "-c", "from ceiling.cli.main import main; main()", *map(str, args)],
                                stdout=subprocess.DEVNULL, stderr=err, env=e, start_new_session=True)


def _wait_for(pred, timeout: float, proc: subprocess.Popen | None = None) -> bool:
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if pred():
            return True
        if proc is not None and proc.poll() is not None:
            return False
        time.sleep(0.05)
    return False


def _assert_readable(folder: Path) -> int:
    """Every non-hidden file opens and reads fully: GeoTIFFs with rasterio (all bands, all
    overviews), NetCDF with netCDF4 (every variable), JSON parses. Returns the number checked."""
    import netCDF4

    n = 0
    for p in folder.rglob("*"):
        rel = p.relative_to(folder).parts
        if not p.is_file() or any(s.startswith(".") for s in rel):
            continue
        if p.suffix == ".tif":
            with rasterio.open(p) as src:
                a = src.read(1)
                assert a.shape == (src.height, src.width)
                for f in src.overviews(1):
                    src.read(1, out_shape=(src.height // f, src.width // f))
        elif p.suffix == ".nc":
            with netCDF4.Dataset(p) as ds:
                for v in ds.variables.values():
                    v[...]
        elif p.suffix == ".json":
            json.loads(p.read_text())
        n += 1
    return n


def _assert_manifest_complete(out: Path) -> None:
    man = json.loads((out / "manifest.json").read_text())
    listed = {e["path"] for e in man["outputs"]}
    for e in man["outputs"]:
        p = out / e["path"]
        assert p.is_file() and p.stat().st_size == e["size"] and _sha(p) == e["sha256"], e["path"]
    on_disk = {str(p.relative_to(out)) for p in out.rglob("*") if p.is_file()} - {"manifest.json"}
    assert on_disk == listed
    assert not any(s.startswith(".") for p in listed for s in Path(p).parts)


# --- one case, run uninterrupted twice, killed, resumed --------------------------------------------

@pytest.fixture(scope="module")
def big(tmp_path_factory):
    root = tmp_path_factory.mktemp("rel")
    case = SmallCase(root / "case", ny=100, nx=140, futures=3)
    return case, case.config(), root


@pytest.fixture(scope="module")
def reference(big):
    """Two uninterrupted runs in separate processes (different pids, hash seeds, staging paths)."""
    case, cfg, root = big
    outs = []
    for k in range(2):
        out = root / f"ref{k}"
        t0 = time.monotonic()
        p = _start(["project", cfg, "--model", case.model, "--out", out], root / f"ref{k}.err")
        assert p.wait(timeout=240) == 0, (root / f"ref{k}.err").read_text()
        outs.append((out, time.monotonic() - t0))
    return outs


def test_two_runs_are_byte_identical(reference):
    (a, _), (b, _) = reference
    ca, cb = _checksums(a), _checksums(b)
    assert "ceiling.nc" in ca and "summary.csv" in ca and sum(k.endswith(".tif") for k in ca) == 2 * (5 + 3 * 9 + 12)
    assert ca == cb
    # the manifest's checksums of maps and tables agree entry by entry (report.html carries the
    # run's timings, like the manifest itself)
    ma, mb = ([e for e in json.loads((o / "manifest.json").read_text())["outputs"] if Path(e["path"]).suffix in MAPS]
              for o in (a, b))
    assert ma == mb and len(ma) == len(ca)
    _assert_manifest_complete(a)


def test_kill_trials_leave_no_half_written_output_and_resume_matches(big, reference, tmp_path):
    """Three SIGKILLs of a run into the same --out, each followed by checks: two at seeded random
    moments, the last once two future climates are finished (so that the resumption must reuse
    them); then ``--resume`` finishes the job and the outputs equal the uninterrupted run byte for
    byte."""
    case, cfg, root = big
    (ref, seconds), _ = reference
    out = tmp_path / "out"
    rng = random.Random(20261202)
    trials = []
    for k in range(3):
        err = tmp_path / f"kill{k}.err"
        # without --resume: each trial also shows that a new run clears the dead run's staging folder
        p = _start(["project", cfg, "--model", case.model, "--out", out], err)
        if k < 2:
            delay = rng.uniform(0.5, 0.8 * seconds)
            _wait_for(lambda: False, delay, proc=p)  # sleep, unless the run ends first
        else:
            assert _wait_for(lambda err=err: "[3/" in err.read_text(), 240, proc=p), err.read_text()
        if p.poll() is None:
            os.killpg(p.pid, signal.SIGKILL)
        p.wait(timeout=30)
        trials.append(p.returncode)
        # (a) the final folder does not exist, or is complete
        if out.exists():  # the run finished before the kill (a loaded machine): it must be complete
            assert k < 2 and p.returncode == 0
            _assert_manifest_complete(out)
            shutil.rmtree(out)
            continue
        # (b) the leftover staging folder holds only complete files under final names
        stages = [s for s in tmp_path.iterdir() if s.name.startswith(".partial-")]
        assert [s.name for s in stages] in ([], [".partial-out"])
        if stages:
            _assert_readable(stages[0])
    assert trials[-1] == -signal.SIGKILL, trials
    res = subprocess.run([sys.executable, "-c", "from ceiling.cli.main import main; main()", "project", cfg,
                          "--model", case.model, "--out", out, "--resume"], capture_output=True, text=True, timeout=240)
    assert res.returncode == 0, res.stderr
    assert "reused" in res.stderr and "(--resume)" in res.stderr  # at least present and one future
    assert _checksums(out) == _checksums(ref)
    _assert_manifest_complete(out)
    assert not [s for s in tmp_path.iterdir() if s.name.startswith(".partial-")]


def test_without_resume_a_dead_runs_staging_is_removed(big, tmp_path):
    """Leftovers of dead processes (the deterministic staging folder with a dead pid in its lock
    file, and pid-named temporary entries) are removed by the next run; a live writer is respected."""
    case, _, _ = big
    small = SmallCase(tmp_path / "s", ny=30, nx=40, futures=1)
    out = tmp_path / "out"
    dead = subprocess.Popen(["true"])
    dead.wait()
    stage = tmp_path / ".partial-out"
    stage.mkdir()
    (stage / ".lock").write_text(str(dead.pid))
    (stage / "junk.tif").write_bytes(b"half")
    old = tmp_path / f".partial-{dead.pid}-out"
    old.mkdir()
    other = tmp_path / f".partial-{dead.pid}-other"  # another output's leftovers: not ours to touch
    other.mkdir()
    res = cli(["project", small.config(), "--model", small.model, "--out", out])
    assert res.exit_code == 0, res.output
    assert not stage.exists() and not old.exists() and other.exists()
    assert not (out / "junk.tif").exists()
    _assert_manifest_complete(out)
    # a staging folder whose writer is alive is not touched: the second run is refused
    live = subprocess.Popen(["sleep", "30"])
    try:
        out2 = tmp_path / "out2"
        stage2 = tmp_path / ".partial-out2"
        stage2.mkdir()
        (stage2 / ".lock").write_text(str(live.pid))
        res = cli(["project", small.config(), "--model", small.model, "--out", out2])
        lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
        assert res.exit_code == 2 and len(lines) == 1, res.output
        assert f"process {live.pid}" in lines[0] and "is writing" in lines[0] and str(out2) in lines[0]
        assert stage2.is_dir() and (stage2 / ".lock").read_text() == str(live.pid) and not out2.exists()
    finally:
        live.kill()
        live.wait()


def test_resume_discards_a_stage_of_other_inputs(tmp_path):
    """A stage left by a run on different inputs is not reused: the fingerprint differs."""
    c = SmallCase(tmp_path / "c", ny=30, nx=40, futures=1)
    out = tmp_path / "out"
    stage = tmp_path / ".partial-out"
    stage.mkdir()
    (stage / ".fingerprint").write_text("of another run")
    (stage / ".done-present__present__now.json").write_text(json.dumps({"files": {}, "vectors": []}))
    res = cli(["project", c.config(), "--model", c.model, "--out", out, "--resume"])
    assert res.exit_code == 0, res.output
    assert "reused" not in res.stderr
    ref = tmp_path / "ref"
    assert cli(["project", c.config(), "--model", c.model, "--out", ref]).exit_code == 0
    assert _checksums(out) == _checksums(ref)


# --- a lost worker ------------------------------------------------------------------------------------

def test_a_killed_worker_is_replaced_and_the_outputs_are_the_same(tmp_path):
    import psutil

    c = SmallCase(tmp_path / "c", ny=80, nx=100, futures=2)
    cfg = c.config()
    ref = tmp_path / "ref"
    assert cli(["project", cfg, "--model", c.model, "--out", ref]).exit_code == 0
    out = tmp_path / "out"
    err = tmp_path / "w.err"
    p = _start(["project", cfg, "--model", c.model, "--out", out, "--workers", "2"], err,
               env={"DASK_DISTRIBUTED__SCHEDULER__LOCKS__LEASE_TIMEOUT": "2s"})
    try:
        def workers():
            try:
                kids = psutil.Process(p.pid).children(recursive=True)
                return [k for k in kids if "spawn_main" in " ".join(k.cmdline())]
            except psutil.Error:
                return []

        assert _wait_for(lambda: "[1/" in err.read_text() and len(workers()) >= 2, 120, proc=p), err.read_text()
        victim = workers()[0]
        victim.kill()  # SIGKILL: dask's nanny restarts it and the scheduler reschedules its tasks
        rc = p.wait(timeout=150)
    finally:
        if p.poll() is None:
            os.killpg(p.pid, signal.SIGKILL)
            p.wait()
    assert rc == 0, err.read_text()
    assert not victim.is_running()
    assert _checksums(out) == _checksums(ref)


# --- disk space -----------------------------------------------------------------------------------------

def test_too_little_free_space_is_refused_before_writing(tmp_path, monkeypatch):
    c = SmallCase(tmp_path / "c", ny=30, nx=40, futures=1)
    out = tmp_path / "out"
    monkeypatch.setenv("CEILING_FREE_BYTES", "1000")
    res = cli(["project", c.config(), "--model", c.model, "--out", out])
    assert_refused(res.exit_code, res.stderr, out, "not enough free space", "needed", "1000 B free", "choose another --out",
                   exc=res.exception)
    monkeypatch.setenv("CEILING_FREE_BYTES", "lots")
    res = cli(["project", c.config(), "--model", c.model, "--out", out])
    assert_refused(res.exit_code, res.stderr, out, "CEILING_FREE_BYTES", "not a number", exc=res.exception)


def test_the_space_estimate_bounds_the_written_maps(tmp_path, monkeypatch):
    """The estimate is an upper bound of the GeoTIFFs + NetCDF actually written, and a target with
    just that much free space is accepted."""
    from ceiling.config import load_config
    from ceiling.grids import template_grid
    from ceiling.running import output_bytes
    from ceiling.scenarios import LayerRef, climates

    c = SmallCase(tmp_path / "c", ny=40, nx=50, futures=1)
    cfg = c.config()
    grid = template_grid(LayerRef(c.data / "present" / "temp.tif"), factor="temp")
    need = output_bytes(grid, 2, climates(load_config(cfg)), bootstrap=False)
    monkeypatch.setenv("CEILING_FREE_BYTES", str(need))
    out = tmp_path / "out"
    res = cli(["project", cfg, "--model", c.model, "--out", out])
    assert res.exit_code == 0, res.output
    written = sum(p.stat().st_size for p in out.rglob("*") if p.suffix in (".tif", ".nc"))
    assert written <= need
    cells = 40 * 50 * 2  # every map of every species holds at least a byte per cell uncompressed
    assert need >= cells * (5 + 9 + 12)


# --- inputs are data; names stay inside the output folder -----------------------------------------------

def test_names_with_dots_and_slashes_stay_inside_the_output_folder(tmp_path):
    c = SmallCase(tmp_path / "c", ny=30, nx=40, futures=1)
    fut = dict(c.futures[0], scenario="../../x", model="/etc/m", period="..")
    model = write_json(c.data / "evil.json", model_document({"../../evil": [SMALL_TEMP, SMALL_RAIN]}))
    out = tmp_path / "deep" / "out"
    res = cli(["project", c.config("e.toml", futures=[fut]), "--model", model, "--out", out])
    assert res.exit_code == 0, res.output
    tifs = list(out.rglob("*.tif"))
    assert tifs and all(p.resolve().is_relative_to(out.resolve()) for p in tifs)
    assert (out / "evil" / "x" / "etc_m").is_dir()
    assert sorted(p.name for p in (tmp_path / "deep").iterdir()) == ["out"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["c", "deep"]


def test_model_file_is_parsed_as_data_not_code(tmp_path, monkeypatch):
    """A pickle whose __reduce__ would run a command, and JSON holding Python code, are refused
    without running anything."""
    import pickle

    c = SmallCase(tmp_path / "c", ny=30, nx=40, futures=1)
    monkeypatch.chdir(tmp_path)
    marker = tmp_path / "RAN"

    class Payload:
        def __reduce__(self):
            return (os.system, (f"touch {marker}",))

    pk = c.data / "model.pkl"
    pk.write_bytes(pickle.dumps(Payload()))
    doc = json.loads(c.model.read_text())
    doc["species"]["sp1"]["outside"] = f"__import__('os').system('touch {marker}')"
    code = write_json(c.data / "code.json", doc)
    for m, words in ((pk, ("model.pkl", "not valid JSON")), (code, ("code.json", "outside"))):
        out = tmp_path / "out"
        res = cli(["project", c.config(), "--model", m, "--out", out])
        assert_refused(res.exit_code, res.stderr, out, *words, exc=res.exception)
    assert not marker.exists()
    src = Path(__import__("ceiling").__file__).parent
    for py in src.rglob("*.py"):  # nothing in the package unpickles or evaluates input text
        text = py.read_text()
        assert "pickle.load" not in text and "eval(" not in text.replace("literal_eval(", "") and "exec(" not in text, py


KEYS = ["name", "survey", "path", "x", "y", "crs", "abundance", "species", "factors", "layer", "column", "basis", "df",
        "units", "fit", "tau", "present", "period", "futures", "scenario", "model", "layers", "projection", "chunk",
        "mask", "ensemble_min_models", "novel", "outputs", "bootstrap", "transform", "outside"]
scalars = st.one_of(st.none(), st.booleans(), st.integers(-5, 2000), st.floats(allow_nan=True, allow_infinity=True),
                    st.text(max_size=12), st.sampled_from(["linear", "quadratic", "spline", "EPSG:4326", "a.tif", "..", ""]))
values = st.recursive(scalars, lambda inner: st.one_of(st.lists(inner, max_size=3),
                                                       st.dictionaries(st.sampled_from(KEYS) | st.text(max_size=6), inner, max_size=4)),
                      max_leaves=12)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(data=st.dictionaries(st.sampled_from(KEYS), values, max_size=8))
def test_config_loader_never_crashes_with_anything_but_its_own_error(data, tmp_path):
    from ceiling.config import parse_config
    from ceiling.scenarios import climates, projection_options

    try:
        cfg = parse_config(data, base=tmp_path, source="h.toml")
        climates(cfg)
        projection_options(cfg)
    except CeilingError as exc:
        assert "\n" not in str(exc) and str(exc)
