"""Shared fixtures and small input builders for the fitting-slice tests.

Every input built here is tiny and lives under ``tmp_path``: GeoTIFFs in EPSG:4326 with a few
dozen float32 cells and nodata -9999, survey tables, and TOML configs written as text.
"""

from __future__ import annotations

import json
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import rasterio
from affine import Affine

REPO = Path(__file__).resolve().parents[1]
DEMO_CONFIG = REPO / "configs" / "demo.toml"
DEMO_GRIDS = REPO / "demo_grids"
TRUTH_FILE = DEMO_GRIDS / "truth.json"

NODATA = -9999.0
# The tiny test grid: 8 columns x 6 rows of 0.1 degree cells, north-west corner at (160E, 50S)
# (open ocean; longitudes above 90 so that swapped coordinate columns are detectable).
WEST, NORTH, CELL, NX, NY = 160.0, -50.0, 0.1, 8, 6


def write_tif(
    path: Path,
    data: np.ndarray,
    *,
    west: float = WEST,
    north: float = NORTH,
    cell: float = CELL,
    crs: str = "EPSG:4326",
    nodata: float = NODATA,
) -> Path:
    """Write ``data`` (rows north to south, NaN = nodata) as a float32 single-band GeoTIFF."""
    path.parent.mkdir(parents=True, exist_ok=True)
    arr = np.where(np.isnan(data), nodata, data).astype("float32")
    with rasterio.open(
        path, "w", driver="GTiff", width=arr.shape[1], height=arr.shape[0], count=1,
        dtype="float32", crs=crs, transform=Affine(cell, 0.0, west, 0.0, -cell, north), nodata=nodata,
    ) as dst:
        dst.write(arr, 1)
    return path


def cell_centre(row: int, col: int) -> tuple[float, float]:
    """(lon, lat) of the centre of a cell of the tiny grid."""
    return WEST + CELL * (col + 0.5), NORTH - CELL * (row + 0.5)


def factor_grid(seed: int = 0) -> np.ndarray:
    """A factor layer for the tiny grid: a west-east gradient plus a little noise."""
    rng = np.random.default_rng(seed)
    cols = np.arange(NX)[np.newaxis, :].repeat(NY, axis=0)
    rows = np.arange(NY)[:, np.newaxis].repeat(NX, axis=1)
    return 10.0 + 2.0 * cols + 0.5 * rows + rng.uniform(-0.2, 0.2, (NY, NX))


def survey_rows(n: int = 40, seed: int = 1) -> list[dict[str, Any]]:
    """``n`` survey points at distinct cell centres of the tiny grid, hump-shaped counts."""
    rng = np.random.default_rng(seed)
    cells = rng.permutation(NX * NY)[:n]
    rows = []
    for i, k in enumerate(cells):
        r, c = divmod(int(k), NX)
        lon, lat = cell_centre(r, c)
        top = 50.0 * (1 - ((c - 3.5) / 4.0) ** 2)
        rows.append({"site": f"s{i}", "lon": round(lon, 6), "lat": round(lat, 6),
                     "count": int(rng.integers(0, max(1, int(top)) + 1))})
    return rows


def write_csv(path: Path, rows: list[dict[str, Any]], *, sep: str = ",") -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    keys = list(rows[0])
    lines = [sep.join(keys)] + [sep.join(str(r[k]) for k in keys) for r in rows]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int | float):
        return repr(v)
    if isinstance(v, Path):
        return json.dumps(v.as_posix())
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    return json.dumps(str(v))


def toml_text(
    survey: dict[str, Any], factors: list[dict[str, Any]], fit: dict[str, Any] | None = None,
    *, name: str = "test",
) -> str:
    """A config as TOML text (values are written with json quoting, which TOML accepts)."""
    out = [f"name = {_toml_value(name)}", "", "[survey]"]
    out += [f"{k} = {_toml_value(v)}" for k, v in survey.items()]
    for f in factors:
        out += ["", "[[factors]]"] + [f"{k} = {_toml_value(v)}" for k, v in f.items()]
    if fit:
        out += ["", "[fit]"] + [f"{k} = {_toml_value(v)}" for k, v in fit.items()]
    return "\n".join(out) + "\n"


class TinyCase:
    """A complete small fitting case under ``tmp_path``: data in ``data/``, output ``out/``."""

    def __init__(self, root: Path):
        self.root = root
        self.data = root / "data"
        self.out = root / "out"
        self.layer = write_tif(self.data / "f1.tif", factor_grid())
        self.survey = write_csv(self.data / "survey.csv", survey_rows())
        self.survey_cfg: dict[str, Any] = {
            "path": self.survey, "x": "lon", "y": "lat", "crs": "EPSG:4326", "abundance": "count",
        }
        self.factors: list[dict[str, Any]] = [{"name": "f1", "layer": self.layer, "basis": "quadratic"}]
        self.fit: dict[str, Any] = {"tau": 0.9, "wedge_replicates": 0}

    def config(self, *, survey: dict[str, Any] | None = None, factors: list[dict[str, Any]] | None = None,
               fit: dict[str, Any] | None = None, extra: str = "", name: str = "config.toml") -> Path:
        s = dict(self.survey_cfg, **(survey or {}))
        text = toml_text(s, factors if factors is not None else self.factors,
                         dict(self.fit, **(fit or {})))
        path = self.data / name
        path.write_text(text + extra, encoding="utf-8")
        return path


@pytest.fixture
def tiny(tmp_path: Path) -> TinyCase:
    return TinyCase(tmp_path)


@pytest.fixture(scope="session")
def demo_truth() -> dict[str, Any]:
    from ceiling.demo import load_truth

    return load_truth(TRUTH_FILE)


@pytest.fixture(scope="session")
def demo_run():
    """The demo config fitted once for the whole session (few wedge replicates: the
    coefficients do not depend on them, only the wedge p-values do)."""
    from ceiling.config import load_config
    from ceiling.fitting import fit_config

    cfg = load_config(DEMO_CONFIG)
    cfg = cfg.model_copy(update={"fit": cfg.fit.model_copy(update={"wedge_replicates": 10})})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fit_config(cfg)


@pytest.fixture
def build():
    """The input builders of this module, for tests that need them directly."""
    import types

    return types.SimpleNamespace(
        write_tif=write_tif, write_csv=write_csv, cell_centre=cell_centre, factor_grid=factor_grid,
        survey_rows=survey_rows, toml_text=toml_text, NODATA=NODATA, WEST=WEST, NORTH=NORTH,
        CELL=CELL, NX=NX, NY=NY,
    )


def pytest_configure(config):
    # third-party deprecation noise (affine's '*' operator used inside rioxarray and rasterio)
    config.addinivalue_line("filterwarnings", "ignore:Use `@` matmul:PendingDeprecationWarning")
