"""A lean run against GDAL's raster calculator (``python -m bench --only lean``).

On n x n x 6 float32 factors (tiled deflate GeoTIFFs, bench/inputs.py), the present only:

- ``ceiling project`` with ``[outputs] maps = ["ceiling", "limiting"]``, ``netcdf = false``,
  ``report = false`` (the summary tables, catalogue and manifest are written all the same);
- ``gdal_calc.py`` (Debian's ``gdal-bin``) computing the ceiling alone with the same expression
  (the minimum of the six quadratics of the held-in-range factors, floored at zero) into one
  deflate GeoTIFF (tiled 512, level 1 and the floating-point predictor, as the run's maps);
- for reference, ``ceiling project`` with every output (the default).

The commands alternate (the first of each round moves on), so drift on a shared machine touches
all alike; the figures are medians. Peak memory is that of the process tree: the sum of the
resident sizes of the command and its descendants sampled every 10 ms, or the largest peak of a
single process (``VmHWM``) if higher, whichever is larger.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

from .inputs import K, build_model, write_case

LEAN = 'maps = ["ceiling", "limiting"]\nnetcdf = false\nreport = false'


def _tree(pid: int) -> list[int]:
    """``pid`` and its descendants (from /proc)."""
    children: dict[int, list[int]] = {}
    for d in os.listdir("/proc"):
        if d.isdigit():
            try:
                with open(f"/proc/{d}/stat") as fh:
                    ppid = int(fh.read().rsplit(")", 1)[1].split()[1])
            except (OSError, ValueError, IndexError):
                continue
            children.setdefault(ppid, []).append(int(d))
    out, todo = [], [pid]
    while todo:
        p = todo.pop()
        out.append(p)
        todo += children.get(p, [])
    return out


def _status_kib(pid: int, key: str) -> int:
    try:
        with open(f"/proc/{pid}/status") as fh:
            for line in fh:
                if line.startswith(key):
                    return int(line.split()[1])
    except OSError:
        pass
    return 0


def measure_tree(cmd: list, out_file: Path | None = None) -> tuple[float, float]:
    """(wall seconds, peak RSS MiB of the process tree) of ``cmd``; stdout to ``out_file``."""
    os.sync()
    peak = [0, 0]  # summed VmRSS, largest VmHWM (KiB)
    t0 = time.perf_counter()
    with tempfile.TemporaryFile() as err, open(out_file or os.devnull, "wb") as out:
        proc = subprocess.Popen([str(c) for c in cmd], stdout=out, stderr=err)
        stop = threading.Event()

        def watch() -> None:
            while not stop.is_set():
                pids = _tree(proc.pid)
                peak[0] = max(peak[0], sum(_status_kib(p, "VmRSS:") for p in pids))
                peak[1] = max([peak[1]] + [_status_kib(p, "VmHWM:") for p in pids])
                stop.wait(0.01)

        th = threading.Thread(target=watch, daemon=True)
        th.start()
        code = proc.wait()
        wall = time.perf_counter() - t0
        stop.set()
        th.join()
        if code != 0:
            err.seek(0)
            raise SystemExit(f"command failed: {' '.join(map(str, cmd))}\n{err.read().decode()[-3000:]}")
    return wall, max(peak) / 1024.0


def calc_expression() -> str:
    """The ceiling of bench/inputs.build_model as a gdal_calc expression over A..F."""
    terms = []
    for k, f in enumerate(build_model().factors):
        v = f"clip({chr(65 + k)}, {f.observed[0]!r}, {f.observed[1]!r})"
        z = f"(({v} - {f.basis.center!r}) / {f.basis.scale!r})"
        c0, c1, c2 = (float(c) for c in f.params)
        terms.append(f"({c0!r} + {z} * ({c1!r} + {z} * {c2!r}))")
    expr = terms[0]
    for t in terms[1:]:
        expr = f"minimum({expr}, {t})"
    return f"maximum({expr}, 0)"


def calc_cmd(cfg: Path, out: Path) -> list:
    exe = shutil.which("gdal_calc.py") or shutil.which("gdal_calc")
    if exe is None:
        raise SystemExit("gdal_calc.py is not installed (Debian: apt-get install gdal-bin)")
    files = [a for k in range(K) for a in (f"-{chr(65 + k)}", cfg.parent / "present" / f"f{k}.tif")]
    return [exe, *files, "--outfile", out, "--calc", calc_expression(), "--type", "Float32",
            "--NoDataValue=-3.4028234663852886e+38", "--overwrite", "--quiet", "--co", "COMPRESS=DEFLATE", "--co", "ZLEVEL=1",
            "--co", "PREDICTOR=3", "--co", "TILED=YES", "--co", "BLOCKXSIZE=512", "--co", "BLOCKYSIZE=512"]


def same_ceiling(ours: Path, theirs: Path) -> float:
    """Largest relative difference between the two ceilings (NaN-aware; inf if nodata differs)."""
    import rasterio

    with rasterio.open(ours) as a, rasterio.open(theirs) as b:
        worst = 0.0
        for _, win in a.block_windows(1):
            x = a.read(1, window=win, masked=True).filled(np.nan).astype(np.float64)
            y = b.read(1, window=win, masked=True).filled(np.nan).astype(np.float64)
            if not np.array_equal(np.isnan(x), np.isnan(y)):
                return float("inf")
            ok = ~np.isnan(x)
            if ok.any():
                worst = max(worst, float(np.max(np.abs(x[ok] - y[ok]) / np.maximum(1.0, np.abs(x[ok])))))
    return worst


def bench_lean(work: Path, n: int, rounds: int, record, ceiling_cmd) -> None:
    print(f"\n[8] lean run vs GDAL's raster calculator: {n} x {n}, {K} factors, the present, {rounds} rounds alternated")
    lean_cfg = write_case(work / f"grid{n}", n, 0, outputs=LEAN, name="lean")
    full_cfg = write_case(work / f"grid{n}", n, 0)
    cmds = {
        "lean": lambda i: ceiling_cmd(lean_cfg, work / f"lean{n}"),
        "calc": lambda i: calc_cmd(lean_cfg, work / f"calc{n}.tif"),
        "full": lambda i: ceiling_cmd(full_cfg, work / f"full{n}"),
    }
    times: dict[str, list[float]] = {k: [] for k in cmds}
    rss: dict[str, list[float]] = {k: [] for k in cmds}
    order = list(cmds)
    load = [os.getloadavg()[0]]
    for i in range(rounds):
        for name in order[i % 3:] + order[: i % 3]:
            wall, peak = measure_tree(cmds[name](i))
            times[name].append(wall)
            rss[name].append(peak)
            print(f"  round {i + 1} {name}: {wall:.2f} s, peak {peak:.0f} MiB", flush=True)
        load.append(os.getloadavg()[0])
    wrote = sorted(str(p.relative_to(work / f"lean{n}")) for p in (work / f"lean{n}").rglob("*") if p.is_file())
    diff = same_ceiling(work / f"lean{n}" / "bench" / "present" / "ceiling.tif", work / f"calc{n}.tif")
    print(f"  the lean run wrote: {', '.join(wrote)}")
    print(f"  ceilings agree with the calculator's to {diff:.2e} (relative); load average {min(load):.1f}-{max(load):.1f}")
    med = {k: float(np.median(v)) for k, v in times.items()}
    mrss = {k: float(np.median(v)) for k, v in rss.items()}
    per = ", ".join(f"{a / b:.2f}" for a, b in zip(times["lean"], times["calc"]))
    record(f"8a lean ceiling project ({n}^2 x {K}, present; ceiling + limiting) vs gdal_calc (median of {rounds})",
           f"{med['lean']:.2f} s", f"gdal_calc {med['calc']:.2f} s (rounds: {per})", med["lean"] / med["calc"],
           "<= 1.0x", med["lean"] / med["calc"] <= 1.0, "python -m bench --only lean")
    record("8b same, peak RSS of the process tree", f"{mrss['lean']:.0f} MiB", f"gdal_calc {mrss['calc']:.0f} MiB",
           mrss["lean"] / mrss["calc"], "<= 0.5x", mrss["lean"] / mrss["calc"] <= 0.5, "python -m bench --only lean")
    record("8c the default run (every output), same inputs", f"{med['full']:.2f} s, {mrss['full']:.0f} MiB",
           f"lean {med['lean']:.2f} s", med["full"] / med["lean"], "reported", None, "python -m bench --only lean")
    for p in (work / f"lean{n}", work / f"full{n}", work / f"calc{n}.tif"):
        shutil.rmtree(p, ignore_errors=True) if p.is_dir() else p.unlink(missing_ok=True)


if __name__ == "__main__":  # python -m bench.lean N ROUNDS WORK
    from .run import ceiling_cmd, record

    bench_lean(Path(sys.argv[3]), int(sys.argv[1]), int(sys.argv[2]), record, ceiling_cmd)
