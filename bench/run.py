"""The benchmark suite: every figure printed next to the reference it is measured against.

    python -m bench            # full sizes (about 15 minutes on 2 cores)
    python -m bench --quick    # small sizes, a smoke run (under 2 minutes)
    python -m bench --only kernel,e2e   # a subset: kernel, e2e, naive, memory, parallel, fit, scale

Inputs are synthetic and generated here: smooth fields plus noise, written as tiled (512) deflate
float32 GeoTIFFs with predictor 3, six factors, a present and several futures. The model is
built in code: six quadratic ceilings with a reference sample for novelty (MESS), saved as a
model file that ``ceiling project --model`` reads. Every timing of a whole run is a child
process; peak memory is the child's ``wait4`` maximum resident set size.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve()
K = 6
UNITS = "1"
CHUNK = 1024
PERIODS = ("p1", "p2", "p3", "p4", "p5", "p6", "p7", "p8")


# ----------------------------------------------------------------------------- inputs

def _field(r0: int, r1: int, n: int, k: int, shift: float, rng: np.random.Generator) -> np.ndarray:
    yy = (np.arange(r0, r1) / n)[:, None]
    xx = (np.arange(n) / n)[None, :]
    base = (0.5 + 0.25 * np.sin(2 * np.pi * (xx * (1 + k) + 0.3 * k)) + 0.2 * np.cos(2 * np.pi * yy * (2 + k))
            + shift)
    return (base + 0.02 * rng.standard_normal(base.shape)).astype(np.float32)


def write_climate(folder: Path, n: int, shift: float, seed: int) -> None:
    import rasterio
    from rasterio.transform import from_origin

    folder.mkdir(parents=True, exist_ok=True)
    profile = dict(driver="GTiff", width=n, height=n, count=1, dtype="float32", crs="EPSG:4326",
                   transform=from_origin(-140.0, -38.0, 10.0 / n, 10.0 / n), nodata=-9999.0, tiled=True,
                   blockxsize=512, blockysize=512, compress="deflate", predictor=3)
    for k in range(K):
        path = folder / f"f{k}.tif"
        if path.exists():
            continue
        rng = np.random.default_rng(seed * 100 + k)
        tmp = path.with_suffix(".part")
        with rasterio.Env(GDAL_NUM_THREADS="2"), rasterio.open(tmp, "w", NUM_THREADS="2", **profile) as dst:
            dst.units = (UNITS,)
            for r0 in range(0, n, 1024):
                r1 = min(n, r0 + 1024)
                dst.write(_field(r0, r1, n, k, shift, rng)[None], window=((r0, r1), (0, n)))
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


def write_case(root: Path, n: int, futures: int) -> Path:
    """Inputs, survey, model file and config for an n x n grid; returns the config path."""
    from ceiling.model import ModelSet

    write_climate(root / "present", n, 0.0, 1)
    for i in range(futures):
        write_climate(root / "future" / PERIODS[i], n, 0.03 * (i + 1), 2 + i)
    rng = np.random.default_rng(7)
    lon, lat = rng.uniform(-139.9, -130.1, 300), rng.uniform(-47.9, -38.1, 300)
    (root / "survey.csv").write_text("lon,lat,count\n" + "".join(
        f"{x:.5f},{y:.5f},{c}\n" for x, y, c in zip(lon, lat, rng.poisson(20, 300))))
    ModelSet({"bench": build_model()}).save(root / "model.json")
    fac = "".join(f'[[factors]]\nname = "f{k}"\nlayer = "{root / "present" / f"f{k}.tif"}"\nunits = "{UNITS}"\n\n'
                  for k in range(K))
    fut = "".join(f'[[futures]]\nscenario = "s1"\nmodel = "m1"\nperiod = "{PERIODS[i]}"\n'
                  f'pattern = "{root}/future/{PERIODS[i]}/{{factor}}.tif"\n\n' for i in range(futures))
    cfg = root / f"config{futures}.toml"
    cfg.write_text(f'[survey]\npath = "{root / "survey.csv"}"\nx = "lon"\ny = "lat"\nabundance = "count"\n'
                   f'crs = "EPSG:4326"\n\n{fac}[fit]\nwedge_replicates = 0\n\n[present]\nperiod = "now"\n\n{fut}'
                   f"[projection]\nchunk = {CHUNK}\n")
    return cfg


# ----------------------------------------------------------------------------- helpers

_LAUNCH = (
    "import os,subprocess,sys;p=subprocess.Popen(sys.argv[2:]);_,st,ru=os.wait4(p.pid,0);"
    "open(sys.argv[1],'w').write(str(ru.ru_maxrss));sys.exit(os.waitstatus_to_exitcode(st))"
)


def measure(cmd: list[str], env: dict | None = None) -> tuple[float, float, str]:
    """(wall seconds, peak RSS MiB, stdout) of a child process.

    The child is started by a small launcher process that reads its ``wait4`` rusage: Linux
    carries the peak RSS of the process that calls ``exec`` over into the new program, so a child
    started straight from this (large) process would report at least this process's peak.
    """
    t0 = time.perf_counter()
    with tempfile.TemporaryFile() as out, tempfile.TemporaryFile() as err, \
            tempfile.NamedTemporaryFile(suffix=".rss", delete=False) as rss_file:
        proc = subprocess.Popen([sys.executable, "-S", "-c", _LAUNCH, rss_file.name, *map(str, cmd)], stdout=out,
                                stderr=err, env={**os.environ, **(env or {})})
        code = proc.wait()
        wall = time.perf_counter() - t0
        out.seek(0)
        err.seek(0)
        text = out.read().decode()
        if code != 0:
            raise SystemExit(f"command failed: {' '.join(map(str, cmd))}\n{err.read().decode()[-3000:]}")
        rss = float(Path(rss_file.name).read_text()) / 1024.0
        os.unlink(rss_file.name)
    return wall, rss, text


PROJECT_RUNS: dict[tuple, tuple[float, float]] = {}


def project_run(work: Path, n: int, futures: int, threads: int = 2, keep: Path | None = None) -> tuple[float, float]:
    """(wall s, peak RSS MiB) of ``ceiling project --threads`` on the n x n case (measured once per run)."""
    key = (n, futures, threads)
    if key in PROJECT_RUNS and keep is None:
        return PROJECT_RUNS[key]
    cfg = write_case(work / f"grid{n}", n, futures)
    out = keep or work / f"proj-{n}-{futures}-{threads}"
    t, rss, _ = measure(ceiling_cmd(cfg, out, "--threads", str(threads)))
    man = next(out.glob("manifest*.json"), None)
    if man is not None:
        try:
            timing = json.loads(man.read_text()).get("timing_s", {})
            print("    (manifest timing_s: " + ", ".join(f"{k} {v:.1f}" for k, v in timing.items()) + ")")
        except (ValueError, AttributeError):
            pass
    if keep is None:
        shutil.rmtree(out, ignore_errors=True)
    PROJECT_RUNS[key] = (t, rss)
    return t, rss


def ceiling_cmd(cfg: Path, out: Path, *extra: str) -> list[str]:
    exe = shutil.which("ceiling") or sys.exit("the ceiling command is not installed (pip install -e .)")
    return [exe, "-q", "project", str(cfg), "--model", str(cfg.parent / "model.json"), "--out", str(out),
            "--overwrite", *extra]


def self_cmd(*args: str) -> list[str]:
    return [sys.executable, str(HERE), *args]


def verdict(ok: bool) -> str:
    return "met" if ok else "NOT met"


def tif_hashes(folder: Path) -> dict[str, str]:
    """sha256 of every GeoTIFF's pixels and georeferencing (the file bytes hold GDAL's creation
    metadata, which is the same; the pixel data are compared so the check names the layer)."""
    out = {}
    for p in sorted(folder.rglob("*.tif")):
        out[str(p.relative_to(folder))] = hashlib.sha256(p.read_bytes()).hexdigest()
    return out


RESULTS: list[dict] = []


def record(bench: str, figure: str, reference: str, ratio: float | None, target: str, ok: bool | None, cmd: str) -> None:
    RESULTS.append(dict(bench=bench, figure=figure, reference=reference, ratio=ratio, target=target,
                        verdict="-" if ok is None else verdict(ok), command=cmd))
    r = "" if ratio is None else f"  ratio {ratio:.2f}"
    v = "" if ok is None else f"  target {target}: {verdict(ok)}"
    print(f"  => {figure}  |  reference: {reference}{r}{v}", flush=True)


# ----------------------------------------------------------------------------- 1. kernel

def bench_kernel(cells: int) -> None:
    from ceiling.kernels_fast import ceiling_and_limiting

    print(f"\n[1] kernel: ceiling + limiting factor, {K} quadratic factors, {cells / 1e6:.0f} M cells, one thread")
    # compile time: a child with an empty numba cache (cold), then again with the cache filled
    cache = Path(tempfile.mkdtemp(prefix="numba-cache-"))
    code = ("import time,numpy as np;t=time.perf_counter();import ceiling.kernels_fast as f;"
            "from bench.run import build_model;m=build_model();v={n:np.ones(10,np.float32) for n in m.factor_names};"
            "t0=time.perf_counter();f.ceiling_and_limiting(m,v);print(time.perf_counter()-t0)")
    env = {"NUMBA_CACHE_DIR": str(cache), "PYTHONPATH": str(HERE.parent.parent)}
    cold = float(measure([sys.executable, "-c", code], env)[2])
    warm = float(measure([sys.executable, "-c", code], env)[2])
    shutil.rmtree(cache, ignore_errors=True)
    print(f"  first call: {cold:.2f} s compiling (empty cache), {warm:.3f} s loading from the cache (cache=True)")
    RESULTS.append(dict(bench="1 kernel: numba first call", figure=f"{cold:.2f} s compile (cold), {warm:.3f} s from cache",
                        reference="-", ratio=None, target="reported", verdict="-", command="python -m bench --only kernel"))

    m = build_model()
    rng = np.random.default_rng(0)
    xs = {f"f{k}": rng.uniform(0.0, 1.05, cells).astype(np.float32) for k in range(K)}
    for a in xs.values():
        a[rng.integers(0, cells, cells // 100)] = np.nan
    nbytes = sum(a.nbytes for a in xs.values())

    def best(fn, reps=3):
        ts = []
        for _ in range(reps):
            t0 = time.perf_counter()
            fn()
            ts.append(time.perf_counter() - t0)
        return min(ts)

    ceiling_and_limiting(m, {k: v[:10] for k, v in xs.items()})  # compile / load outside the timing
    t_floor = best(lambda: [np.sum(a) for a in xs.values()])
    t_fast = best(lambda: ceiling_and_limiting(m, xs))

    def plain():  # what one writes in NumPy: full-size float64 stacks
        eta = np.stack([f.basis.predictor(np.clip(xs[f.factor].astype(np.float64), *f.observed), f.params)
                        for f in m.factors])
        c = np.maximum(eta, 0.0).min(axis=0)
        code = np.argmin(np.where(np.isnan(eta), np.inf, eta), axis=0).astype(np.uint8)
        bad = np.isnan(eta).any(axis=0)
        return np.where(bad, np.nan, c).astype(np.float32), np.where(bad, 255, code).astype(np.uint8)

    t_plain = best(plain, 2)
    t_ref = best(lambda: m.evaluate(xs), 1)
    c1, k1 = ceiling_and_limiting(m, xs)
    c2, k2 = m.evaluate(xs)
    assert np.array_equal(k1, k2), "fast kernel codes differ from the reference"
    rate = cells / t_fast
    print(f"  fused kernel {rate / 1e6:.1f} M cells/s ({t_fast:.3f} s); memory floor np.sum over the same "
          f"{nbytes / 2**20:.0f} MiB: {cells / t_floor / 1e6:.1f} M cells/s ({t_floor:.3f} s, {nbytes / t_floor / 1e9:.1f} GB/s)")
    print(f"  plain NumPy expression {cells / t_plain / 1e6:.1f} M cells/s ({t_plain:.3f} s); "
          f"CeilingModel.evaluate (reference) {cells / t_ref / 1e6:.1f} M cells/s")
    record("1a kernel vs memory floor", f"{rate / 1e6:.1f} M cells/s", f"np.sum floor {cells / t_floor / 1e6:.1f} M cells/s",
           t_floor / t_fast, ">= 0.25x floor", t_floor / t_fast >= 0.25, "python -m bench --only kernel")
    record("1b kernel vs plain NumPy", f"{rate / 1e6:.1f} M cells/s", f"plain NumPy {cells / t_plain / 1e6:.1f} M cells/s",
           t_plain / t_fast, ">= 5x plain NumPy", t_plain / t_fast >= 5, "python -m bench --only kernel")


# ----------------------------------------------------------------------------- 2. I/O floor

def io_floor(cfg_path: Path, project_out: Path, out: Path, threads: int) -> None:
    """Decode the same input tiles and encode the same output files, nothing else.

    Every chunk of every input layer of every climate is decoded (as the projection reads it);
    every GeoTIFF the projection wrote is written again with the same streaming path (tiled
    uncompressed, chunk by chunk, then the same COG copy: deflate, predictor, overviews), from a
    decoded input chunk, so the encoder sees comparable data. The run's NetCDF is written again
    with the same settings from the GeoTIFFs just written. ``threads`` threads do the chunks.
    """
    import rasterio
    from rasterio.windows import Window

    from ceiling.grids import GridSpec
    from ceiling.outputs.geotiff import WindowTarget, create_tiled, finalize_cog

    climates = [cfg_path.parent / "present"] + sorted((cfg_path.parent / "future").iterdir())
    n_fut = int(cfg_path.stem.replace("config", ""))
    climates = climates[: 1 + n_fut]
    with rasterio.open(climates[0] / "f0.tif") as src:
        grid = GridSpec(src.crs.to_wkt(), tuple(src.transform)[:6], src.width, src.height)
    # the outputs, per climate folder, as written by the projection
    written = sorted(p for p in project_out.rglob("*.tif"))
    by_climate: dict[int, list[Path]] = {}
    for p in written:
        rel = p.relative_to(project_out)
        per = 0 if "present" in str(rel) or "now" in str(rel) else 1 + PERIODS.index(next(
            s for s in PERIODS if f"/{s}" in "/" + str(rel) or s in rel.parts))
        by_climate.setdefault(per, []).append(rel)
    chunks = [(r, c) for r in range(0, grid.height, CHUNK) for c in range(0, grid.width, CHUNK)]
    pool = ThreadPoolExecutor(threads)
    for ci, folder in enumerate(climates):
        outs = []
        for rel in by_climate.get(ci, []):
            with rasterio.open(project_out / rel) as s:
                dtype = s.dtypes[0]
            final = out / rel
            final.parent.mkdir(parents=True, exist_ok=True)
            tmp = final.with_name(".stream-" + final.name)
            create_tiled(tmp, grid, dtype=dtype, description=rel.stem, chunk=CHUNK)
            outs.append((tmp, final, dtype, WindowTarget(tmp, dtype)))

        def one(rc, folder=folder, outs=outs):
            r, c = rc
            h, w = min(CHUNK, grid.height - r), min(CHUNK, grid.width - c)
            first = None
            for k in range(K):
                with rasterio.Env(GDAL_CACHEMAX=64, GDAL_PAM_ENABLED="NO"), rasterio.open(folder / f"f{k}.tif") as src:
                    a = src.read(1, window=Window(c, r, w, h), masked=True)
                first = a if first is None else first
            data = np.ma.filled(first.astype(np.float32), np.nan)
            for _, _, dtype, target in outs:
                target[slice(r, r + h), slice(c, c + w)] = data if dtype == "float32" else (data * 100).astype(np.uint8) % 7

        list(pool.map(one, chunks))
        for tmp, final, dtype, _ in outs:
            finalize_cog(tmp, final, categorical=dtype == "uint8")
    pool.shutdown()
    nc = next(project_out.glob("*.nc"), None)
    if nc is not None:
        import netCDF4

        with netCDF4.Dataset(nc) as ref, netCDF4.Dataset(out / nc.name, "w") as dst:
            for d, dim in ref.dimensions.items():
                dst.createDimension(d, len(dim))
            for name, var in ref.variables.items():
                f = var.filters() or {}
                kw = dict(zlib=bool(f.get("zlib")), complevel=f.get("complevel", 4), shuffle=bool(f.get("shuffle")))
                ch = var.chunking()
                if ch != "contiguous" and var.ndim:
                    kw["chunksizes"] = ch
                v = dst.createVariable(name, var.dtype, var.dimensions, **kw)
                if var.ndim < 2:
                    v[:] = var[:]
                    continue
                # write chunk by chunk, from the GeoTIFF data (decoded again), like the projection
                lead = var.shape[:-2]
                for idx in np.ndindex(*lead) if lead else [()]:
                    for r in range(0, grid.height, CHUNK):
                        h = min(CHUNK, grid.height - r)
                        with rasterio.open(climates[0] / "f0.tif") as src:
                            block = src.read(1, window=Window(0, r, grid.width, h))
                        v[idx + (slice(r, r + h), slice(None))] = (block if var.dtype.kind == "f"
                                                                   else (block * 100).astype(np.int64) % 7).astype(var.dtype)


# ----------------------------------------------------------------------------- 3. naive

def naive(cfg_path: Path, out: Path, n_fut: int) -> None:
    """The whole-grid approach: every layer opened fully with rioxarray, NumPy, rioxarray writes."""
    import rioxarray
    import xarray as xr

    from ceiling.kernels import change_kernel, switch_kernel, zone_kernel
    from ceiling.model import load_model
    from ceiling.novelty import mess_kernel

    m = load_model(cfg_path.parent / "model.json")
    root = cfg_path.parent
    climates = [("present", root / "present")] + [(PERIODS[i], root / "future" / PERIODS[i]) for i in range(n_fut)]
    present = None
    for name, folder in climates:
        layers = {f: rioxarray.open_rasterio(folder / f"{f}.tif", masked=True).squeeze("band", drop=True).load()
                  for f in m.factor_names}
        tpl = layers[m.factor_names[0]]
        values = {f: a.values.astype(np.float64) for f, a in layers.items()}
        c, code = m.evaluate(values)
        mess, far = mess_kernel([values[f] for f in m.factor_names], [m.reference[f] for f in m.factor_names])
        maps = {"ceiling": c.astype(np.float32), "limiting": code, "novelty": mess.astype(np.float32),
                "novel_factor": np.where(np.isnan(mess), 255, far).astype(np.uint8),
                "extrapolated": np.where(np.isnan(mess), 255, mess < 0).astype(np.uint8)}
        if present is None:
            present = (maps["ceiling"], code)
        else:
            ch, pct = change_kernel(present[0], maps["ceiling"])
            maps.update(change=ch, change_pct=pct, zone=zone_kernel(present[0], maps["ceiling"]),
                        switch=switch_kernel(present[1], code, K))
        (out / name).mkdir(parents=True, exist_ok=True)
        for lname, arr in maps.items():
            nodata = 255 if arr.dtype == np.uint8 else np.float32(-3.4028234663852886e38)
            if arr.dtype != np.uint8:
                arr = np.where(np.isnan(arr), nodata, arr).astype(np.float32)
            da_ = xr.DataArray(arr, dims=("y", "x"), coords={"y": tpl.y, "x": tpl.x})
            da_ = da_.rio.write_crs(tpl.rio.crs).rio.write_transform(tpl.rio.transform()).rio.write_nodata(nodata)
            da_.rio.to_raster(out / name / f"{lname}.tif", driver="COG", compress="DEFLATE", predictor="YES",
                              num_threads="ALL_CPUS")
        del layers, values, maps


# ----------------------------------------------------------------------------- benches 2-7

def bench_e2e(work: Path, n: int, futures: int) -> float:
    print(f"\n[2] end to end: ceiling project, {n} x {n}, {K} factors, present + {futures} futures, 2 threads")
    cfg = write_case(work / f"grid{n}", n, futures)
    t_p, rss_p = project_run(work, n, futures, keep=work / f"out{n}-{futures}")
    PROJECT_RUNS[(n, futures, 2)] = (t_p, rss_p)
    t_f, rss_f, _ = measure(self_cmd("_iofloor", str(cfg), str(work / f"out{n}-{futures}"), str(work / f"floor{n}"), "2"))
    print(f"  ceiling project {t_p:.1f} s (peak {rss_p:.0f} MiB); I/O floor (decode inputs, encode the same "
          f"outputs, 2 threads) {t_f:.1f} s (peak {rss_f:.0f} MiB)")
    record(f"2 end to end vs I/O floor ({n}^2, 1+{futures} climates)", f"{t_p:.1f} s", f"I/O floor {t_f:.1f} s",
           t_p / t_f, "<= 1.3x floor", t_p / t_f <= 1.3, "python -m bench --only e2e")
    return t_p


def bench_naive(work: Path, n: int, futures: int) -> None:
    print(f"\n[3] against the whole-grid approach: {n} x {n}, {K} factors, present + {futures} futures")
    cfg = write_case(work / f"grid{n}", n, futures)
    t_p, rss_p = project_run(work, n, futures)
    t_n, rss_n, _ = measure(self_cmd("_naive", str(cfg), str(work / f"naive{n}"), str(futures)))
    print(f"  ceiling project {t_p:.1f} s, peak {rss_p:.0f} MiB; whole grid (rioxarray + NumPy) {t_n:.1f} s, "
          f"peak {rss_n:.0f} MiB")
    record(f"3a speed vs whole-grid ({n}^2, 1+{futures})", f"{t_p:.1f} s", f"whole-grid {t_n:.1f} s", t_n / t_p,
           ">= 2x faster", t_n / t_p >= 2, "python -m bench --only naive")
    record(f"3b peak memory vs whole-grid ({n}^2, 1+{futures})", f"{rss_p:.0f} MiB", f"whole-grid {rss_n:.0f} MiB",
           rss_p / rss_n, "<= 0.25x", rss_p / rss_n <= 0.25, "python -m bench --only naive")
    shutil.rmtree(work / f"naive{n}", ignore_errors=True)


def bench_memory(work: Path, small: int, large: int) -> None:
    print(f"\n[4] memory scaling: peak RSS at {small}^2 and {large}^2, chunk {CHUNK}, present + 1 future")
    res = {}
    for n in (small, large):
        t, rss = project_run(work, n, 1)
        res[n] = (t, rss)
        print(f"  {n}^2: {t:.1f} s, peak {rss:.0f} MiB")
    r = res[large][1] / res[small][1]
    record(f"4 memory {large}^2 vs {small}^2", f"{res[large][1]:.0f} MiB", f"{small}^2: {res[small][1]:.0f} MiB", r,
           "<= 1.3x and < 1.5 GiB", r <= 1.3 and res[large][1] < 1536, "python -m bench --only memory")


def bench_parallel(work: Path, n: int) -> None:
    print(f"\n[5] parallel scaling on {n} x {n}: --threads 1, --threads 2, --workers 2")
    cfg = write_case(work / f"grid{n}", n, 1)
    # compute-heavy case: the whole projection (kernels, novelty, statistics, encoding);
    # I/O-bound case: the I/O floor itself (decode + encode only) with 1 and 2 threads.
    times, hashes = {}, {}
    for label, extra in (("threads 1", ["--threads", "1"]), ("threads 2", ["--threads", "2"]),
                         ("workers 2", ["--workers", "2"])):
        out = work / f"par-{label.replace(' ', '')}"
        t, rss, _ = measure(ceiling_cmd(cfg, out, *extra))
        times[label] = t
        hashes[label] = tif_hashes(out)
        print(f"  whole projection (ceiling project) {label}: {t:.1f} s, peak {rss:.0f} MiB")
    same = hashes["threads 1"] == hashes["threads 2"] == hashes["workers 2"]
    ref_out = work / "par-threads1"
    for th in (1, 2):
        t, _, _ = measure(self_cmd("_iofloor", str(cfg), str(ref_out), str(work / f"parfloor{th}"), str(th)))
        times[f"io {th}"] = t
        print(f"  I/O-bound (decode + encode only) {th} thread(s): {t:.1f} s")
    s2 = times["threads 1"] / times["threads 2"]
    sw = times["threads 1"] / times["workers 2"]
    sio = times["io 1"] / times["io 2"]
    print(f"  outputs identical across threads 1 / threads 2 / workers 2 (sha256 of {len(hashes['threads 1'])} GeoTIFFs): {same}")
    record("5a speed-up 2 threads (project)", f"{s2:.2f}x", f"1 thread {times['threads 1']:.1f} s", s2, "reported (ideal 2x)", None,
           "python -m bench --only parallel")
    record("5b speed-up --workers 2 (project)", f"{sw:.2f}x", f"1 thread {times['threads 1']:.1f} s", sw, "reported (ideal 2x)", None,
           "python -m bench --only parallel")
    record("5c speed-up 2 threads (I/O only)", f"{sio:.2f}x", f"1 thread {times['io 1']:.1f} s", sio, "reported (ideal 2x)", None,
           "python -m bench --only parallel")
    record("5d outputs identical", str(same), "sha256 of every GeoTIFF", None, "identical", same, "python -m bench --only parallel")
    for p in work.glob("par*"):
        shutil.rmtree(p, ignore_errors=True)


def bench_fit(points: int, replicates: int) -> None:
    print(f"\n[6] fitting: {points} points x {K} factors, with and without {replicates} bootstrap replicates")
    sys.path.insert(0, str(HERE.parent))
    import warnings

    from bootstrap_timing import synthetic

    from ceiling.model import FactorSpec, fit
    from ceiling.uncertainty import bootstrap_model

    warnings.simplefilter("ignore")
    s = synthetic(points, K, 1)
    t0 = time.perf_counter()
    m = fit(s, [FactorSpec(c) for c in s.values.columns], wedge_replicates=0, seed=1)
    t_fit = time.perf_counter() - t0
    t0 = time.perf_counter()
    bootstrap_model(m, s, replicates=replicates, seed=1)
    t_boot = time.perf_counter() - t0
    print(f"  fit {t_fit:.2f} s; fit + {replicates} pairs-bootstrap replicates {t_fit + t_boot:.2f} s "
          f"({1e3 * t_boot / replicates:.1f} ms per replicate)")
    record("6 fit, no bootstrap", f"{t_fit:.2f} s", "-", None, "reported", None, "python -m bench --only fit")
    record(f"6 fit + {replicates} bootstrap", f"{t_fit + t_boot:.2f} s", f"fit alone {t_fit:.2f} s",
           (t_fit + t_boot) / t_fit, "reported", None, "python -m bench --only fit")


def bench_scale(work: Path, sizes: list[int], futures: int) -> None:
    print(f"\n[7] scale estimate: wall time vs cells at {sizes}, present + {futures} futures, 2 threads")
    cells, walls = [], []
    for n in sizes:
        t, _ = project_run(work, n, futures)
        cells.append(n * n * (1 + futures))
        walls.append(t)
        print(f"  {n}^2 x {1 + futures} climates = {cells[-1] / 1e6:.0f} M climate-cells: {t:.1f} s")
    slope, icpt = np.polyfit(np.array(cells, float), np.array(walls), 1)
    pred = icpt + slope * np.array(cells)
    r2 = 1 - ((np.array(walls) - pred) ** 2).sum() / ((np.array(walls) - np.mean(walls)) ** 2).sum()
    glob = 43200 * 21600 * 9
    est = icpt + slope * glob
    print(f"  fit: wall = {icpt:.2f} s + {slope * 1e9:.2f} s per 10^9 climate-cells (R^2 {r2:.4f})")
    print(f"  30-arc-second global grid (43200 x 21600), {K} factors, present + 8 futures = {glob / 1e9:.2f} G "
          f"climate-cells: {est / 3600:.1f} h on this 2-core machine; with W added 2-core workers, about "
          f"{est / 3600:.1f} / (1 + W) h if the work scales linearly (see [5] for the measured parallel efficiency)")
    record("7 linear fit", f"{slope * 1e9:.1f} s per 1e9 climate-cells + {icpt:.1f} s (R^2 {r2:.3f})",
           f"sizes {sizes}", None, "reported", None, "python -m bench --only scale")
    record("7 global 30'' estimate", f"{est / 3600:.1f} h (2 cores)", "extrapolated from the fit", None, "reported", None,
           "python -m bench --only scale")


# ----------------------------------------------------------------------------- main

def main(argv: list[str] | None = None) -> None:
    argv = sys.argv[1:] if argv is None else argv
    if argv and argv[0] == "_iofloor":
        io_floor(Path(argv[1]), Path(argv[2]), Path(argv[3]), int(argv[4]))
        return
    if argv and argv[0] == "_naive":
        naive(Path(argv[1]), Path(argv[2]), int(argv[3]))
        return
    ap = argparse.ArgumentParser(prog="python -m bench", description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small sizes: a smoke run of every benchmark")
    ap.add_argument("--only", default="kernel,e2e,naive,memory,parallel,fit,scale")
    ap.add_argument("--naive-size", type=int, default=None)
    ap.add_argument("--work", type=Path, default=None, help="keep the generated inputs here (reused when present)")
    ap.add_argument("--json", type=Path, default=None, help="write the results table here")
    a = ap.parse_args(argv)
    only = set(a.only.split(","))
    q = a.quick
    work = a.work or Path(tempfile.mkdtemp(prefix="ceiling-bench-"))
    work.mkdir(parents=True, exist_ok=True)
    print(f"ceiling benchmarks ({'quick' if q else 'full'}), {os.cpu_count()} CPUs, inputs in {work}")
    t0 = time.perf_counter()
    if "kernel" in only:
        bench_kernel(2_000_000 if q else 16_000_000)
    # sizes: the largest that keep the full suite within 15 minutes on 2 cores (see BENCHMARKS.md)
    if "e2e" in only:
        bench_e2e(work, 512 if q else 2048, 1)
    if "naive" in only:
        bench_naive(work, a.naive_size or (512 if q else 1536), 1 if q else 4)
    if "memory" in only:
        bench_memory(work, 256 if q else 1024, 512 if q else 2048)
    if "parallel" in only:
        bench_parallel(work, 512 if q else 1024)
    if "fit" in only:
        bench_fit(2000 if q else 20_000, 20 if q else 200)
    if "scale" in only:
        bench_scale(work, [256, 384, 512] if q else [1024, 1536, 2048], 1)
    print(f"\nall done in {time.perf_counter() - t0:.0f} s\n")
    print(f"{'benchmark':<48} {'figure':<40} {'reference':<34} {'ratio':>6}  {'target':<24} verdict")
    for r in RESULTS:
        ratio = "" if r["ratio"] is None else f"{r['ratio']:.2f}"
        print(f"{r['bench']:<48} {r['figure']:<40} {r['reference']:<34} {ratio:>6}  {r['target']:<24} {r['verdict']}")
    if a.json:
        a.json.write_text(json.dumps(RESULTS, indent=2))
    if a.work is None:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
