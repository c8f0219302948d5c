"""Benchmark of ``ceiling derive``: peak memory and time deriving onto a large fine baseline.

Generates (into ``--work``) a synthetic fine monthly baseline of N x N cells (12 months each of
tasmax, tasmin and pr: smooth fields, tiled deflate float32 GeoTIFFs, written window by window)
and one synthetic climate model's monthly series (a coarse 1-degree grid, 0-360 longitudes,
``noleap``), then runs ``ceiling derive`` on it as a child process: the present and one future,
four factors (warmest month's maximum, coldest month's minimum, yearly precipitation, moisture
index with Hargreaves PET). It reports the wall time and the child's peak resident memory next
to the size of one month of one variable held in float64 (N x N x 8 bytes) and of the whole
baseline in float64 (36 of them), the reference a whole-grid script would need at least.

    python -m bench.derive --size 8192 --work /tmp/bench-derive     # the BENCHMARKS.md figure
    python -m bench.derive --size 1024                               # a quick run
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import rasterio
from rasterio.transform import from_origin
from rasterio.windows import Window

from ceiling.demo_climate import write_series_file

WEST, NORTH, EXTENT = 160.0, -40.0, 8.0  # degrees; open ocean, as every synthetic input here
BLOCK = 1024

LAUNCHER = ("import os,sys,resource;pid=os.fork()\n"
            "if pid==0: os.execvp(sys.argv[2],sys.argv[2:])\n"
            "_,st,ru=os.wait4(pid,0);open(sys.argv[1],'w').write(str(ru.ru_maxrss));"
            "sys.exit(os.waitstatus_to_exitcode(st))")


def _field(kind: str, month: int, rows: np.ndarray, cols: np.ndarray, n: int) -> np.ndarray:
    y, x = (rows / n)[:, None], (cols / n)[None, :]
    c = np.cos(2 * np.pi * (month - 1) / 12)
    smooth = np.sin(6.0 * x) * np.cos(4.0 * y)
    if kind == "tasmax":
        return (24.0 + 4.0 * c - 8.0 * y + 2.0 * smooth).astype("float32")
    if kind == "tasmin":
        return (12.0 + 3.0 * c - 8.0 * y + 1.5 * smooth).astype("float32")
    return (40.0 + 60.0 * x * (1.0 - 0.3 * c) + 10.0 * smooth).astype("float32")


def write_baseline(folder: Path, n: int) -> None:
    cell = EXTENT / n
    profile = dict(driver="GTiff", width=n, height=n, count=1, dtype="float32", crs="EPSG:4326",
                   transform=from_origin(WEST, NORTH, cell, cell), nodata=-9999.0, tiled=True,
                   blockxsize=512, blockysize=512, compress="deflate", predictor=3, zlevel=1, num_threads=2,
                   BIGTIFF="IF_SAFER")
    folder.mkdir(parents=True, exist_ok=True)
    units = {"tasmax": "degC", "tasmin": "degC", "pr": "mm"}
    for var in ("tasmax", "tasmin", "pr"):
        for m in range(1, 13):
            path = folder / f"{var}_{m:02d}.tif"
            if path.exists():
                continue
            tmp = path.with_suffix(".part.tif")
            with rasterio.open(tmp, "w", **profile) as dst:
                dst.update_tags(1, units=units[var])
                dst.units = (units[var],)
                for r0 in range(0, n, BLOCK):
                    rows = np.arange(r0, min(r0 + BLOCK, n))
                    dst.write(_field(var, m, rows, np.arange(n), n), 1, window=Window(0, r0, n, rows.size))
            os.replace(tmp, path)


def write_series(folder: Path) -> None:
    """A synthetic model: uniform +3 K (tasmax), +3.6 K (tasmin), -9% precipitation by 2071-2100."""
    lon = np.arange(WEST - 2.5, WEST + EXTENT + 3.0, 1.0) % 360.0
    lat = np.arange(NORTH - EXTENT - 2.5, NORTH + 3.0, 1.0)
    for run, years, dt in (("historical", (1991, 2020), 0.0), ("ssp585", (2071, 2100), 3.0)):
        months = (years[1] - years[0] + 1) * 12
        c = np.cos(2 * np.pi * (np.arange(months) % 12) / 12)[:, None, None] * np.ones((1, lat.size, lon.size))
        for var, values in (("tasmax", 22.0 + 4.0 * c + dt), ("tasmin", 11.0 + 3.0 * c + 1.2 * dt),
                            ("pr", 80.0 * (1.0 - 0.3 * c) * (1.0 - 0.03 * dt))):
            path = folder / run / f"{var}_{years[0]}-{years[1]}.nc"
            if not path.exists():
                write_series_file(path, var, values, years, run, lon=lon, lat=lat)


CONFIG = """
[survey]
path = "survey.csv"
[[factors]]
name = "tmax_warm"
layer = "baseline/tasmax_01.tif"
[[factors]]
name = "tmin_cold"
layer = "baseline/tasmin_07.tif"
[[factors]]
name = "precip"
layer = "baseline/pr_01.tif"
[[factors]]
name = "moisture"
layer = "baseline/pr_02.tif"
[present]
period = "1991-2020"
[[futures]]
scenario = "ssp585"
climate_model = "bench-model"
period = "2071-2100"
series = "series/ssp585/{variable}_*.nc"
historical = "series/historical/{variable}_*.nc"
[derive]
baseline = { tasmax = "baseline/tasmax_{month}.tif", tasmin = "baseline/tasmin_{month}.tif", pr = "baseline/pr_{month}.tif" }
chunk = CHUNK
[derive.factors]
tmax_warm = { index = "warmest_month_tmax" }
tmin_cold = { index = "coldest_month_tmin" }
precip = { index = "annual_precipitation" }
moisture = { index = "moisture_index", pet = "hargreaves" }
"""


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=8192)
    ap.add_argument("--chunk", type=int, default=512)
    ap.add_argument("--work", type=Path, default=None)
    args = ap.parse_args(argv)
    work = args.work or Path(tempfile.mkdtemp(prefix="bench-derive-"))
    t0 = time.perf_counter()
    write_baseline(work / "baseline", args.size)
    write_series(work / "series")
    (work / "survey.csv").write_text("lon,lat,count\n161,-41,1\n")
    (work / "derive.toml").write_text(CONFIG.replace("CHUNK", str(args.chunk)))
    print(f"inputs ready in {time.perf_counter() - t0:.0f} s ({work})", flush=True)
    rss_file = work / "rss.txt"
    t1 = time.perf_counter()
    cmd = [sys.executable, "-c", LAUNCHER, str(rss_file), sys.executable, "-m", "ceiling", "derive",
           str(work / "derive.toml"), "--out", str(work / "out"), "--overwrite"]
    subprocess.run(cmd, check=True)
    wall = time.perf_counter() - t1
    rss_mib = int(rss_file.read_text()) / 1024
    month = args.size * args.size * 8 / 2**20
    print(f"derive {args.size}^2, present + 1 future, 4 factors, chunk {args.chunk}: {wall:.0f} s wall, "
          f"peak RSS {rss_mib:.0f} MiB; one month of one variable in float64: {month:.0f} MiB; "
          f"the whole baseline in float64: {36 * month:.0f} MiB ({rss_mib / (36 * month):.3f}x)")


if __name__ == "__main__":
    main()
