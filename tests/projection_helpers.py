"""Shared builders for the projection-stage tests (a plain module, imported by the test files).

Everything built here is invented test data: tiny GeoTIFFs, hand-written model files (JSON in the
documented model-file schema, with chosen coefficients), and TOML configs written as text. The
reference computations the tests compare against (cell areas from pyproj.Geod, hand formulas)
live here too, so that no test compares the package with itself.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import rasterio
from affine import Affine
from click.testing import CliRunner

REPO = Path(__file__).resolve().parents[1]
DEMO_CONFIG = REPO / "configs" / "demo.toml"
NODATA = -9999.0


# --- rasters ------------------------------------------------------------------------------------

def write_tif(
    path: Path, data: np.ndarray, *, west: float, north: float, cell: float | tuple[float, float],
    crs: str | None = "EPSG:4326", nodata: float = NODATA, units: str | None = None,
) -> Path:
    """Write ``data`` (rows north to south, NaN = nodata) as a float32 single-band GeoTIFF."""
    path.parent.mkdir(parents=True, exist_ok=True)
    cx, cy = (cell, cell) if np.isscalar(cell) else cell
    arr = np.where(np.isnan(data), nodata, data).astype("float32")
    profile = dict(driver="GTiff", width=arr.shape[1], height=arr.shape[0], count=1, dtype="float32",
                   transform=Affine(cx, 0.0, west, 0.0, -cy, north), nodata=nodata)
    if crs is not None:
        profile["crs"] = crs
    with rasterio.Env(GDAL_PAM_ENABLED="NO"), rasterio.open(path, "w", **profile) as dst:
        dst.write(arr, 1)
        if units is not None:
            dst.units = (units,)
    return path


def read_float(path: Path) -> np.ndarray:
    """A float layer with its nodata cells as NaN (float64)."""
    with rasterio.open(path) as src:
        a = src.read(1, masked=True)
    return np.ma.filled(a.astype(np.float64), np.nan)


def read_code(path: Path) -> np.ndarray:
    with rasterio.open(path) as src:
        return src.read(1)


# --- model files ----------------------------------------------------------------------------------

def factor_entry(name: str, basis: str, center: float, scale: float, coefficients: list[float],
                 observed: tuple[float, float], units: str, peak: float) -> dict[str, Any]:
    """One factor of a model file, in the schema the package documents (model.json, version 1)."""
    n = len(coefficients)
    return {
        "name": name, "units": units, "label": name, "estimator": "quantile",
        "basis": {"name": basis, "center": center, "scale": scale},
        "coefficients": list(coefficients), "std_errors": [0.1] * n,
        "conf_int": [[c - 0.2, c + 0.2] for c in coefficients],
        "median_coefficients": [0.5 * c for c in coefficients],
        "observed_range": [observed[0], observed[1]],
        "diagnostics": {"n": 100, "share_above": 0.05, "pinball_loss": 1.0, "pseudo_r1": 0.5,
                        "peak_at": 0.0, "peak_ceiling": peak, "positive_from": observed[0],
                        "positive_to": observed[1], "wedge_stat": 9.0, "wedge_df": n - 1,
                        "wedge_p": 0.001, "wedge_replicates": 20, "verdict": "acts as a limiting factor"},
    }


def model_document(species: dict[str, list[dict[str, Any]]], *, outside: str = "hold",
                   transform: str = "none", tau: float = 0.95, schema_version: int = 1) -> dict[str, Any]:
    return {
        "kind": "ceiling-model", "schema_version": schema_version,
        "package": {"name": "ceiling", "version": "test"}, "provenance": {"note": "written by hand in a test"},
        "species": {sp: {"tau": tau, "transform": transform, "outside": outside, "n_points": 100,
                         "dropped": {}, "factors": fs, "reference": {f["name"]: _reference(f) for f in fs}}
                    for sp, fs in species.items()},
    }


def _reference(factor: dict[str, Any]) -> list[float]:
    """A reference sample for the similarity layer (MESS): 101 values spread evenly over the observed range."""
    lo, hi = factor["observed_range"]
    return [float(v) for v in np.linspace(lo, hi, 101)]


def write_json(path: Path, doc: dict[str, Any]) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(doc, indent=2), encoding="utf-8")
    return path


# --- configs ----------------------------------------------------------------------------------------

def q(v: Any) -> str:
    """A TOML value (strings and paths quoted with JSON escaping, which TOML accepts)."""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int | float):
        return repr(v)
    if isinstance(v, Path):
        return json.dumps(v.as_posix())
    if isinstance(v, list):
        return "[" + ", ".join(q(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{k} = {q(x)}" for k, x in v.items()) + " }"
    return json.dumps(str(v))


def write_survey(path: Path) -> Path:
    """A small survey table (the projection does not read it; the config must name one)."""
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text("species,lon,lat,count\nsp1,0.5,0.5,3\n", encoding="utf-8")
    return path


def config_text(*, survey: Path, factors: list[dict[str, Any]], futures: list[dict[str, Any]],
                projection: dict[str, Any] | None = None, present: dict[str, Any] | None = None,
                fit: dict[str, Any] | None = None, name: str = "test") -> str:
    out = [f"name = {q(name)}", "", "[survey]", f"path = {q(survey)}", 'x = "lon"', 'y = "lat"',
           'crs = "EPSG:4326"', 'abundance = "count"', 'species = "species"']
    for f in factors:
        out += ["", "[[factors]]"] + [f"{k} = {q(v)}" for k, v in f.items()]
    if fit:
        out += ["", "[fit]"] + [f"{k} = {q(v)}" for k, v in fit.items()]
    out += ["", "[present]"] + [f"{k} = {q(v)}" for k, v in (present or {"period": "now"}).items()]
    for fu in futures:
        out += ["", "[[futures]]"] + [f"{k} = {q(v)}" for k, v in fu.items()]
    if projection:
        out += ["", "[projection]"] + [f"{k} = {q(v)}" for k, v in projection.items()]
    return "\n".join(out) + "\n"


# --- command line ---------------------------------------------------------------------------------

def cli(args: list[Any]):
    """``ceiling ARGS`` in this process (stderr kept apart from stdout)."""
    from ceiling.cli.main import cli as group

    return CliRunner().invoke(group, [str(a) for a in args], catch_exceptions=True)


def subprocess_cli(args: list[Any], cwd: Path | None = None, timeout: float = 1200):
    """``ceiling ARGS`` as a user runs it: the console-script entry point in a new interpreter.
    The timeout only guards against a hang (the demo run takes minutes on a loaded 2-core machine);
    speed is measured in bench/, never here."""
    env = dict(os.environ, PYTHONWARNINGS="ignore::DeprecationWarning")
    return subprocess.run([sys.executable, "-c", "from ceiling.cli.main import main; main()", *map(str, args)],
                          capture_output=True, text=True, cwd=cwd, env=env, timeout=timeout)


def assert_refused(code: int, stderr: str, out: Path, *keywords: str, exc: BaseException | None = None) -> str:
    """Exit code 2, one 'error:' line naming ``keywords``, no traceback, no output left behind."""
    assert exc is None or isinstance(exc, SystemExit), f"unexpected exception {exc!r}"
    lines = [ln for ln in stderr.splitlines() if ln.strip()]
    assert code == 2, stderr
    assert "Traceback" not in stderr, stderr
    assert len(lines) == 1, lines
    line = lines[0]
    assert line.startswith("error: "), line
    for k in keywords:
        assert k.lower() in line.lower(), (k, line)
    assert not out.exists(), f"{out} was created"
    if out.parent.is_dir():
        left = [p.name for p in out.parent.iterdir() if p.name.startswith(".partial-") or p.name.startswith(".stream-")]
        assert not left, f"left behind: {left}"
    return line


# --- reference cell areas (pyproj.Geod, independent of ceiling.areas) -----------------------------

def geod_cell_area(lon0: float, lat0: float, lon1: float, lat1: float, *, n: int = 1000, geod=None) -> float:
    """Area (m2) of the lon/lat rectangle, as a geodesic polygon whose parallels are densified
    with ``n`` points per edge (the geodesic between two points of a parallel is not the parallel;
    with many points the polygon follows the parallels closely)."""
    from pyproj import Geod

    g = geod or Geod(ellps="WGS84")
    s = np.linspace(0.0, 1.0, n, endpoint=False)
    lons = np.concatenate([lon0 + (lon1 - lon0) * s, np.full(n, lon1), lon1 - (lon1 - lon0) * s, np.full(n, lon0)])
    lats = np.concatenate([np.full(n, lat0), lat0 + (lat1 - lat0) * s, np.full(n, lat1), lat1 - (lat1 - lat0) * s])
    return abs(g.polygon_area_perimeter(lons, lats)[0])


def geod_row_areas(transform: Affine, height: int, *, n: int = 400) -> np.ndarray:
    """Per-row cell areas (m2) of a north-up lon/lat grid, from pyproj.Geod."""
    t = transform
    out = np.empty(height)
    for r in range(height):
        top = t.f + t.e * r
        out[r] = geod_cell_area(t.c, top + t.e, t.c + t.a, top, n=n)
    return out


# --- the demo, run once per test session through the real command line ------------------------

_DEMO: dict[str, Any] = {}


def demo_run(tmp_path_factory) -> tuple[Path, subprocess.CompletedProcess]:
    """``ceiling run configs/demo.toml --out DIR`` once per session (about 25 s): (DIR, process)."""
    if "run" not in _DEMO:
        out = tmp_path_factory.mktemp("demo") / "run"
        res = subprocess_cli(["run", DEMO_CONFIG, "--out", out], cwd=REPO)
        _DEMO["run"] = (out, res)
    out, res = _DEMO["run"]
    assert res.returncode == 0, res.stderr
    return out, res


def small_run(tmp_path_factory) -> Path:
    """A small two-species run with two climate models (so an ensemble), once per session, with
    periods written as years (``1991-2020`` now, ``2041-2070`` later): the run folder."""
    if "small" not in _DEMO:
        root = tmp_path_factory.mktemp("small_run")
        c = SmallCase(root / "case", ny=30, nx=40, futures=2)
        futures = [dict(f, period="2041-2070") for f in c.futures]
        cfg = c.data / "years.toml"
        cfg.write_text(config_text(survey=c.survey, factors=c.factors(), futures=futures,
                                   present={"period": "1991-2020"}, projection={"chunk": 64}), encoding="utf-8")
        out = root / "run"
        res = cli(["project", cfg, "--model", c.model, "--out", out])
        assert res.exit_code == 0, res.output
        _DEMO["small"] = out
    return _DEMO["small"]


# --- a small two-factor case with a hand-written model -------------------------------------------

# temp: linear, eta = 60 - 2 T (center 10, scale 10, b = 40, -20), observed -5..40 degC
# rain: quadratic, eta = 50 - 50 ((R - 1000) / 500)^2, observed 200..2000 mm year-1
SMALL_TEMP = factor_entry("temp", "linear", 10.0, 10.0, [40.0, -20.0], (-5.0, 40.0), "degC", peak=70.0)
SMALL_RAIN = factor_entry("rain", "quadratic", 1000.0, 500.0, [50.0, 0.0, -50.0], (200.0, 2000.0), "mm year-1", peak=50.0)
# a second species: eta_T = 30 + 8 (T - 15) / 10 rising with temperature, a flatter rain hump
SMALL_TEMP_2 = factor_entry("temp", "linear", 15.0, 10.0, [30.0, 8.0], (-5.0, 40.0), "degC", peak=50.0)
SMALL_RAIN_2 = factor_entry("rain", "quadratic", 1200.0, 600.0, [40.0, 5.0, -30.0], (200.0, 2000.0), "mm year-1", peak=40.0)


def small_fields(ny: int, nx: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Smooth invented temp (degC) and rain (mm year-1) fields with a sea (nodata) corner."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:ny, 0:nx]
    t = 2.0 + 26.0 * xx / max(nx - 1, 1) + 3.0 * np.sin(yy / 7.0) + rng.normal(0, 0.3, (ny, nx))
    r = 500.0 + 1100.0 * yy / max(ny - 1, 1) + 150.0 * np.cos(xx / 9.0) + rng.normal(0, 10.0, (ny, nx))
    sea = (xx + yy) < min(nx, ny) // 3
    t[sea] = np.nan
    r[sea] = np.nan
    return t, r


class SmallCase:
    """Present + futures of two factors on an ny x nx lon/lat grid, a model file, configs."""

    def __init__(self, root: Path, *, ny: int = 150, nx: int = 200, west: float = 10.0, north: float = 50.0,
                 cell: float = 0.05, futures: int = 2):
        self.root, self.ny, self.nx, self.west, self.north, self.cell = root, ny, nx, west, north, cell
        self.data = root / "data"
        self.grid_kw = dict(west=west, north=north, cell=cell)
        t, r = small_fields(ny, nx)
        self.present = {"temp": t, "rain": r}
        write_tif(self.data / "present" / "temp.tif", t, units="degC", **self.grid_kw)
        write_tif(self.data / "present" / "rain.tif", r, units="mm year-1", **self.grid_kw)
        self.futures = []
        for k in range(futures):
            ft, fr = t + 1.0 + 0.8 * k, r * (0.95 - 0.05 * k)
            d = self.data / "future" / f"m{k}"
            write_tif(d / "temp.tif", ft, units="degC", **self.grid_kw)
            write_tif(d / "rain.tif", fr, units="mm year-1", **self.grid_kw)
            self.futures.append({"scenario": "s1", "model": f"m{k}", "period": "p1",
                                 "layers": {"temp": d / "temp.tif", "rain": d / "rain.tif"}})
        self.survey = write_survey(self.data / "survey.csv")
        self.model = write_json(self.data / "model.json",
                                model_document({"sp1": [SMALL_TEMP, SMALL_RAIN], "sp2": [SMALL_TEMP_2, SMALL_RAIN_2]}))

    def factors(self) -> list[dict[str, Any]]:
        return [{"name": "temp", "layer": self.data / "present" / "temp.tif", "basis": "linear"},
                {"name": "rain", "layer": self.data / "present" / "rain.tif", "basis": "quadratic"}]

    def config(self, name: str = "small.toml", *, projection: dict[str, Any] | None = None,
               futures: list[dict[str, Any]] | None = None, factors: list[dict[str, Any]] | None = None) -> Path:
        text = config_text(survey=self.survey, factors=factors or self.factors(),
                           futures=self.futures if futures is None else futures,
                           projection={"chunk": 64, **(projection or {})})
        p = self.data / name
        p.write_text(text, encoding="utf-8")
        return p
