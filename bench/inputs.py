"""Synthetic inputs for the benchmarks, generated here (invented, not real climate data).

Six factors on an n x n geographic grid: smooth fields (a sine across, a cosine down, a shift per
future) plus Gaussian noise, written as tiled (512) deflate float32 GeoTIFFs with predictor 3,
like the climate layers users project. The model is built in code: six quadratic ceilings
peaking inside the fields' range, with a 2,000-value reference sample per factor for the similarity layer (MESS).
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

K = 6
UNITS = "1"
PERIODS = ("p1", "p2", "p3", "p4", "p5", "p6", "p7", "p8")
ROWS = 1024  # rows generated and written at a time


def field_rows(r0: int, r1: int, n: int, k: int, shift: float, rng: np.random.Generator) -> np.ndarray:
    """Rows r0..r1 of factor ``k`` (float32): separable smooth terms plus noise (sd 0.02)."""
    y = np.arange(r0, r1) / n
    x = np.arange(n) / n
    across = (0.5 + 0.25 * np.sin(2 * np.pi * (x * (1 + k) + 0.3 * k)) + shift).astype(np.float32)
    down = (0.2 * np.cos(2 * np.pi * y * (2 + k))).astype(np.float32)
    noise = rng.standard_normal((r1 - r0, n), dtype=np.float32)
    noise *= np.float32(0.02)
    noise += across[None, :]
    noise += down[:, None]
    return noise


def write_climate(folder: Path, n: int, shift: float, seed: int) -> None:
    """The six layers of one climate (skipped when already there)."""
    import rasterio
    from rasterio.transform import from_origin

    folder.mkdir(parents=True, exist_ok=True)
    profile = dict(driver="GTiff", width=n, height=n, count=1, dtype="float32", crs="EPSG:4326",
                   transform=from_origin(-140.0, -38.0, 10.0 / n, 10.0 / n), nodata=-9999.0, tiled=True,
                   blockxsize=512, blockysize=512, compress="deflate", predictor=3, zlevel=1,
                   BIGTIFF="IF_SAFER")
    for k in range(K):
        path = folder / f"f{k}.tif"
        if path.exists():
            continue
        rng = np.random.default_rng(seed * 100 + k)
        tmp = path.with_suffix(".part")
        with rasterio.Env(GDAL_NUM_THREADS="ALL_CPUS", GDAL_CACHEMAX=256), \
                rasterio.open(tmp, "w", NUM_THREADS="ALL_CPUS", **profile) as dst:
            dst.units = (UNITS,)
            for r0 in range(0, n, ROWS):
                r1 = min(n, r0 + ROWS)
                dst.write(field_rows(r0, r1, n, k, shift, rng)[None], window=((r0, r1), (0, n)))
        os.replace(tmp, path)


def build_model(seed: int = 3):
    """Six quadratic ceilings peaking inside the fields' range, with a reference sample."""
    from ceiling.boundary.bases import QuadraticBasis
    from ceiling.boundary.ceiling import FactorCeiling
    from ceiling.boundary.diagnostics import FactorDiagnostics
    from ceiling.model import CeilingModel

    rng = np.random.default_rng(seed)
    diag = FactorDiagnostics(2000, 0.05, 1.0, 0.5, 0.5, 50.0, 0.0, 1.0, np.nan, 0, np.nan, 0, "not tested")
    fs, ref = [], {}
    for k in range(K):
        lo, hi = 0.1, 0.95  # the survey's range; the fields reach a little beyond it
        coef = np.array([50.0 + 10 * rng.uniform(), 5 * rng.normal(), -40.0 - 10 * rng.uniform()])
        fs.append(FactorCeiling(f"f{k}", QuadraticBasis(0.5 * (lo + hi), 0.5 * (hi - lo)), coef, np.zeros(3),
                                np.zeros((3, 2)), coef, 0.95, "none", "hold", (lo, hi), "quantile", diag, units=UNITS))
        ref[f"f{k}"] = np.sort(rng.uniform(lo, hi, 2000))
    return CeilingModel("bench", tuple(fs), 0.95, "none", "hold", n_points=2000, reference=ref)


def write_case(root: Path, n: int, futures: int, *, chunk: int = 1024, outputs: str = "", name: str = "config") -> Path:
    """Inputs, survey, model file and config ``{name}{futures}.toml`` for an n x n grid.

    ``outputs`` is extra TOML for the ``[outputs]`` table (e.g. ``report = false``).
    """
    from ceiling.model import ModelSet

    write_climate(root / "present", n, 0.0, 1)
    for i in range(futures):
        write_climate(root / "future" / PERIODS[i], n, 0.03 * (i + 1), 2 + i)
    rng = np.random.default_rng(7)
    lon, lat = rng.uniform(-139.9, -130.1, 300), rng.uniform(-47.9, -38.1, 300)
    (root / "survey.csv").write_text("lon,lat,count\n" + "".join(
        f"{x:.5f},{y:.5f},{c}\n" for x, y, c in zip(lon, lat, rng.poisson(20, 300))))
    if not (root / "model.json").exists():
        ModelSet({"bench": build_model()}).save(root / "model.json")
    fac = "".join(f'[[factors]]\nname = "f{k}"\nlayer = "{root / "present" / f"f{k}.tif"}"\nunits = "{UNITS}"\n\n'
                  for k in range(K))
    fut = "".join(f'[[futures]]\nscenario = "s1"\nmodel = "m1"\nperiod = "{PERIODS[i]}"\n'
                  f'pattern = "{root}/future/{PERIODS[i]}/{{factor}}.tif"\n\n' for i in range(futures))
    cfg = root / f"{name}{futures}.toml"
    out_table = f"[outputs]\n{outputs}\n" if outputs else ""
    cfg.write_text(f'[survey]\npath = "{root / "survey.csv"}"\nx = "lon"\ny = "lat"\nabundance = "count"\n'
                   f'crs = "EPSG:4326"\n\n{fac}[fit]\nwedge_replicates = 0\n\n[present]\nperiod = "now"\n\n{fut}'
                   f"[projection]\nchunk = {chunk}\n\n{out_table}")
    return cfg
