"""Peak memory of ``ceiling project`` at two grid sizes with the same chunk size.

Generates synthetic inputs (smooth fields plus noise, tiled deflate float32 GeoTIFFs with
predictor 3, like real climate layers) for four factors, a present and one future, fits a
model on a synthetic survey, then projects a small and a large grid in child processes and
reports the peak resident memory of each (``wait4`` rusage). The claim measured: at a fixed
chunk size, peak memory does not grow with the grid.

    python bench/memory_scaling.py [--small 2048] [--large 8192] [--chunk 1024] [--keep DIR]
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import rasterio
from rasterio.transform import from_origin

FACTORS = {"tmax_warm": ("degC", 16.0, 34.0), "tmin_cold": ("degC", -8.0, 8.0),
           "precip": ("mm year-1", 300.0, 2500.0), "moisture": ("1", 0.2, 2.0)}


def _field(rows: np.ndarray, cols: np.ndarray, n: int, k: int, shift: float, rng: np.random.Generator) -> np.ndarray:
    yy, xx = np.meshgrid(rows / n, cols / n, indexing="ij")
    base = 0.5 + 0.25 * np.sin(2 * np.pi * (xx * (1 + k) + 0.3 * k)) + 0.2 * np.cos(2 * np.pi * (yy * (2 + k)))
    return base + 0.02 * rng.standard_normal(base.shape) + shift


def write_grid(folder: Path, n: int, shift: float, seed: int) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    cell = 10.0 / n
    transform = from_origin(-140.0, -38.0, cell, cell)
    for k, (name, (units, lo, hi)) in enumerate(FACTORS.items()):
        rng = np.random.default_rng(seed + k)
        profile = dict(driver="GTiff", width=n, height=n, count=1, dtype="float32", crs="EPSG:4326",
                       transform=transform, nodata=-9999.0, tiled=True, blockxsize=512, blockysize=512,
                       compress="deflate", predictor=3)
        with rasterio.open(folder / f"{name}.tif", "w", **profile) as dst:
            dst.units = (units,)
            step = 1024
            for r0 in range(0, n, step):
                rows = np.arange(r0, min(n, r0 + step))
                f = _field(rows, np.arange(n), n, k, shift, rng)
                dst.write((lo + (hi - lo) * np.clip(f, 0, 1)).astype(np.float32)[None], window=((r0, r0 + rows.size), (0, n)))


def write_survey(path: Path, present: Path, n_points: int = 600, seed: int = 7) -> None:
    rng = np.random.default_rng(seed)
    with rasterio.open(present / "tmax_warm.tif") as src:
        b = src.bounds
    lon = rng.uniform(b.left, b.right, n_points)
    lat = rng.uniform(b.bottom, b.top, n_points)
    counts = rng.poisson(30 * rng.beta(2.5, 0.6, n_points))
    lines = ["lon,lat,count"] + [f"{x:.5f},{y:.5f},{c}" for x, y, c in zip(lon, lat, counts)]
    path.write_text("\n".join(lines) + "\n")


def write_config(path: Path, root: Path, chunk: int) -> None:
    fac = "\n".join(f'[[factors]]\nname = "{n}"\nlayer = "{root / "present" / (n + ".tif")}"\n' for n in FACTORS)
    path.write_text(
        f'[survey]\npath = "{root / "survey.csv"}"\ncrs = "EPSG:4326"\n\n{fac}\n'
        f"[fit]\nwedge_replicates = 0\n\n[present]\nperiod = \"now\"\n\n"
        f'[[futures]]\nscenario = "s1"\nmodel = "m1"\nperiod = "later"\npattern = "{root}/future/{{factor}}.tif"\n\n'
        f"[projection]\nchunk = {chunk}\n"
    )


def measure(cmd: list[str]) -> tuple[float, float]:
    """(wall seconds, peak RSS MiB) of a child process."""
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t0
    if os.waitstatus_to_exitcode(status) != 0:
        raise SystemExit(f"command failed: {' '.join(cmd)}\n{proc.stderr.read().decode()}")
    return wall, usage.ru_maxrss / 1024.0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--small", type=int, default=2048)
    ap.add_argument("--large", type=int, default=8192)
    ap.add_argument("--chunk", type=int, default=1024)
    ap.add_argument("--keep", type=Path, default=None, help="keep the generated inputs here")
    a = ap.parse_args()
    exe = shutil.which("ceiling") or sys.exit("the ceiling command is not installed (pip install -e .)")
    work = a.keep or Path(tempfile.mkdtemp(prefix="ceiling-bench-"))
    results = {}
    for n in (a.small, a.large):
        root = work / f"grid{n}"
        t0 = time.perf_counter()
        write_grid(root / "present", n, 0.0, 1)
        write_grid(root / "future", n, 0.05, 2)
        write_survey(root / "survey.csv", root / "present")
        write_config(root / "config.toml", root, a.chunk)
        gen = time.perf_counter() - t0
        fit_wall, _ = measure([exe, "-q", "fit", str(root / "config.toml"), "--out", str(root / "fit"), "--overwrite"])
        wall, rss = measure([exe, "-q", "project", str(root / "config.toml"), "--model", str(root / "fit" / "model.json"),
                             "--out", str(root / "out"), "--overwrite"])
        results[n] = (wall, rss)
        print(f"{n:>6} x {n:<6} cells={n * n / 1e6:7.1f} M  inputs generated in {gen:5.1f} s  "
              f"project: {wall:6.1f} s, peak RSS {rss:7.1f} MiB")
    (ws, rs), (wl, rl) = results[a.small], results[a.large]
    ratio = rl / rs
    print(f"\npeak memory, large / small grid ({(a.large / a.small) ** 2:.0f}x the cells, chunk {a.chunk}): "
          f"{ratio:.2f}x  (target: at most 1.3x)  -> {'met' if ratio <= 1.3 else 'NOT met'}")
    print(f"time, large / small: {wl / ws:.1f}x for {(a.large / a.small) ** 2:.0f}x the cells")
    if a.keep is None:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
