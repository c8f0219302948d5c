"""The benchmark suite: every figure printed next to the reference it is measured against.

    python -m bench                      # full sizes (13-26 minutes on 2 cores); or python bench/run.py
    python -m bench --quick              # small sizes, a smoke run (a few minutes)
    python -m bench --only kernel,e2e    # a subset: kernel, e2e, naive, memory, parallel, fit, scale, lean, recovery
    python -m bench --only recovery      # the virtual-species suite (bench/virtual/): defaults vs the plain fit
    python -m bench --work DIR           # keep the generated inputs in DIR (reused when present)
    python -m bench --json FILE          # also write the results table as JSON

Inputs are synthetic and generated here (bench/inputs.py). Every whole run is a child process,
timed from start to exit, with its peak resident memory read by a small launcher (see
:func:`measure`). The references are measured in the same invocation, one after the other on
the same machine, so the ratios compare like with like even when absolute times drift.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import shutil
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import numpy as np

if __package__ in (None, ""):  # run as a script, python bench/run.py: import the suite as a package
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
    __package__ = "bench"

from .inputs import K, build_model, field_rows, write_case  # noqa: E402
from .lean import bench_lean  # noqa: E402

SIZES = {
    # the sizes the benchmarks ask for; 13.3 minutes on the faster of two 2-core machines, see BENCHMARKS.md
    "full": dict(kernel=16_000_000, e2e=8192, naive=8192, naive_futures=4, memory=(4096, 16384), parallel=4096,
                 parallel_chunks=16, fit=(20_000, 200), lean=(4096, 5)),
    "quick": dict(kernel=2_000_000, e2e=512, naive=512, naive_futures=2, memory=(256, 1024), parallel=512,
                  parallel_chunks=4, fit=(2_000, 20), lean=(512, 2)),
}
GLOBAL = (43_200, 21_600, 8)  # 30 arc-second global grid: columns, rows, futures


# ----------------------------------------------------------------------------- measuring

_LAUNCH = (
    "import os,subprocess,sys;p=subprocess.Popen(sys.argv[2:]);_,st,ru=os.wait4(p.pid,0);"
    "open(sys.argv[1],'w').write(str(ru.ru_maxrss));sys.exit(os.waitstatus_to_exitcode(st))"
)


def measure(cmd: list, env: dict | None = None) -> tuple[float, float, str]:
    """(wall seconds, peak RSS MiB, stdout) of a child process.

    Dirty pages left by the previous step are written out first (``os.sync``), so that no
    measurement pays for another's writes. The child is started by a small launcher process
    that reads its ``wait4`` rusage: Linux
    carries the peak RSS of the process that calls ``exec`` over into the new program, so a
    child started straight from this (large) process would report at least this one's peak.
    """
    os.sync()  # the previous step's writes reach the disk now, not during this measurement
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


@dataclass
class Run:
    """One measured ``ceiling project``."""

    n: int
    futures: int
    threads: str
    wall: float
    rss: float
    timing: dict

    @property
    def present_cells(self) -> int:
        return self.n * self.n

    @property
    def future_cells(self) -> int:
        return self.n * self.n * self.futures


RUNS: list[Run] = []


def ceiling_cmd(cfg: Path, out: Path, *extra: str) -> list:
    exe = shutil.which("ceiling") or sys.exit("the ceiling command is not installed (pip install -e .)")
    return [exe, "-q", "project", str(cfg), "--model", str(cfg.parent / "model.json"), "--out", str(out),
            "--overwrite", *extra]


def project(work: Path, n: int, futures: int, *extra: str, keep: bool = False) -> tuple[Run, Path]:
    """Measure ``ceiling project`` on the n x n case with ``futures`` futures."""
    cfg = write_case(work / f"grid{n}", n, futures)
    out = work / f"out{n}-{futures}-{'-'.join(extra) or 'default'}"
    wall, rss, _ = measure(ceiling_cmd(cfg, out, *extra))
    timing = json.loads((out / "manifest.json").read_text()).get("timing_s", {})
    run = Run(n, futures, " ".join(extra) or "--threads 2 (default)", wall, rss, timing)
    RUNS.append(run)
    shown = ", ".join(f"{k} {v:.1f}" for k, v in timing.items())
    print(f"  ceiling project {n}^2, present + {futures}, {run.threads}: {wall:.1f} s, peak {rss:.0f} MiB  ({shown})",
          flush=True)
    if not keep:
        shutil.rmtree(out, ignore_errors=True)
    return run, out


def self_cmd(module: str, *args) -> list:
    return [sys.executable, "-m", f"bench.{module}", *map(str, args)]


RESULTS: list[dict] = []


def record(bench: str, figure: str, reference: str, ratio: float | None, target: str, ok: bool | None, cmd: str) -> None:
    RESULTS.append(dict(bench=bench, figure=figure, reference=reference, ratio=ratio, target=target,
                        verdict="-" if ok is None else ("met" if ok else "NOT met"), command=cmd))
    r = "" if ratio is None else f"  ratio {ratio:.2f}"
    v = "" if ok is None else f"  target {target}: {'met' if ok else 'NOT met'}"
    print(f"  => {figure}  |  reference: {reference}{r}{v}", flush=True)


def digests(folder: Path) -> dict[str, str]:
    """sha256 of every map, table and NetCDF of a run (not the manifest, report or figures, which hold timings)."""
    from ceiling.outputs.atomic import sha256_file

    out = {}
    for p in sorted(folder.rglob("*")):
        rel = p.relative_to(folder)
        if p.is_file() and p.suffix in (".tif", ".nc", ".csv") and rel.parts[0] != "figures":
            out[str(rel)] = sha256_file(p)
    return out


# ----------------------------------------------------------------------------- 1. kernel

def bench_kernel(cells: int) -> None:
    from ceiling.kernels_fast import ceiling_and_limiting

    print(f"\n[1] kernel: ceiling + limiting factor, {K} quadratic factors, {cells / 1e6:.0f} M cells, one thread")
    cache = Path(tempfile.mkdtemp(prefix="numba-cache-"))
    code = ("import time,numpy as np;import ceiling.kernels_fast as f;"
            "from bench.inputs import build_model;m=build_model();v={n:np.ones(10,np.float32) for n in m.factor_names};"
            "t0=time.perf_counter();f.ceiling_and_limiting(m,v);print(time.perf_counter()-t0)")
    env = {"NUMBA_CACHE_DIR": str(cache), "PYTHONPATH": str(Path(__file__).resolve().parent.parent)}
    cold = float(measure([sys.executable, "-c", code], env)[2])
    warm = float(measure([sys.executable, "-c", code], env)[2])
    shutil.rmtree(cache, ignore_errors=True)
    print(f"  first call: {cold:.2f} s compiling (empty cache), {warm:.3f} s loading from the cache")
    record("1 numba first call", f"{cold:.2f} s compile, {warm:.2f} s from cache", "-", None, "reported", None,
           "python -m bench --only kernel")
    m = build_model()
    rng = np.random.default_rng(0)
    xs = {f"f{k}": rng.uniform(0.0, 1.05, cells).astype(np.float32) for k in range(K)}
    for a in xs.values():
        a[rng.integers(0, cells, cells // 100)] = np.nan
    nbytes = sum(a.nbytes for a in xs.values())

    def best(fn, reps=5):
        ts = []
        for _ in range(reps):
            t0 = time.perf_counter()
            fn()
            ts.append(time.perf_counter() - t0)
        return min(ts)

    from .naive import ceiling_plain

    ceiling_and_limiting(m, {k: v[:10] for k, v in xs.items()})  # compile / load outside the timing
    t_floor = best(lambda: [np.sum(a) for a in xs.values()])
    t_fast = best(lambda: ceiling_and_limiting(m, xs))
    t_plain = best(lambda: ceiling_plain(m, {k: v.astype(np.float64) for k, v in xs.items()}), 2)
    c1, k1 = ceiling_and_limiting(m, xs)
    c2, k2 = m.evaluate(xs)
    assert np.array_equal(k1, k2), "fast kernel codes differ from the reference"
    assert np.allclose(c1, c2, rtol=2e-7, equal_nan=True), "fast kernel ceilings differ from the reference"
    rate, floor, plain = cells / t_fast, cells / t_floor, cells / t_plain
    print(f"  fused kernel {rate / 1e6:.1f} M cells/s; memory floor (numpy.sum over the same {nbytes / 2**20:.0f} MiB) "
          f"{floor / 1e6:.1f} M cells/s ({nbytes / t_floor / 1e9:.1f} GB/s); plain NumPy expression {plain / 1e6:.1f} M cells/s")
    record("1a kernel vs memory floor", f"{rate / 1e6:.0f} M cells/s", f"numpy.sum {floor / 1e6:.0f} M cells/s",
           rate / floor, ">= 0.25x", rate / floor >= 0.25, "python -m bench --only kernel")
    record("1b kernel vs plain NumPy", f"{rate / 1e6:.0f} M cells/s", f"plain NumPy {plain / 1e6:.1f} M cells/s",
           rate / plain, ">= 5x", rate / plain >= 5, "python -m bench --only kernel")


# ----------------------------------------------------------------------------- 2. end to end vs I/O floor

def bench_e2e(work: Path, n: int, rounds: int = 2) -> None:
    print(f"\n[2] end to end: ceiling project, {n} x {n}, {K} factors, present + 1 future, 2 threads, vs the I/O floor")
    cfg = write_case(work / f"grid{n}", n, 1)
    raw = work / f"raw{n}"
    floor_out = work / f"floor{n}"
    runs, floors = [], []
    for i in range(rounds):  # alternated, so that drift on a shared machine touches both alike
        run, out = project(work, n, 1, keep=i == 0)
        runs.append(run)
        if i == 0:
            shutil.rmtree(raw, ignore_errors=True)
            measure(self_cmd("floor", "prepare", out, raw))  # untimed: the run's maps as raw arrays
            shutil.rmtree(out, ignore_errors=True)
        shutil.rmtree(floor_out, ignore_errors=True)
        t_f, rss_f, _ = measure(self_cmd("floor", "run", cfg, raw, floor_out, 2))
        floors.append(t_f)
        print(f"  I/O floor (decode the inputs, encode the same maps with the same writers, 2 threads): {t_f:.1f} s, "
              f"peak {rss_f:.0f} MiB")
    t_p, t_f = float(np.mean([r.wall for r in runs])), float(np.mean(floors))
    fixed = float(np.mean([r.timing.get("figures_and_report", 0.0) for r in runs]))
    each = ", ".join(f"{r.wall / f:.2f}" for r, f in zip(runs, floors))
    record(f"2a ceiling project vs I/O floor ({n}^2, present + 1; mean of {rounds})", f"{t_p:.1f} s",
           f"I/O floor {t_f:.1f} s (rounds: {each})", t_p / t_f, "<= 1.3x", t_p / t_f <= 1.3,
           "python -m bench --only e2e")
    record(f"2b same, without figures and report ({fixed:.1f} s)", f"{t_p - fixed:.1f} s", f"I/O floor {t_f:.1f} s",
           (t_p - fixed) / t_f, "reported", None, "python -m bench --only e2e")
    for p in (raw, floor_out):
        shutil.rmtree(p, ignore_errors=True)


# ----------------------------------------------------------------------------- 3. whole-grid approach

def bench_naive(work: Path, n: int, futures: int) -> None:
    print(f"\n[3] against the whole-grid approach: {n} x {n}, {K} factors, present + {futures} futures")
    cfg = write_case(work / f"grid{n}", n, futures)
    run, _ = project(work, n, futures)
    naive_out = work / f"naive{n}"
    t_n, rss_n, _ = measure(self_cmd("naive", cfg, naive_out, futures))
    shutil.rmtree(naive_out, ignore_errors=True)
    print(f"  whole grid (rioxarray + NumPy, GeoTIFFs only): {t_n:.1f} s, peak {rss_n:.0f} MiB")
    record(f"3a speed vs whole-grid ({n}^2, present + {futures})", f"{run.wall:.1f} s", f"whole-grid {t_n:.1f} s",
           t_n / run.wall, ">= 2x faster", t_n / run.wall >= 2, "python -m bench --only naive")
    record(f"3b peak memory vs whole-grid ({n}^2, present + {futures})", f"{run.rss:.0f} MiB",
           f"whole-grid {rss_n:.0f} MiB", run.rss / rss_n, "<= 0.25x", run.rss / rss_n <= 0.25,
           "python -m bench --only naive")


# ----------------------------------------------------------------------------- 4. memory scaling

def bench_memory(work: Path, small: int, large: int) -> None:
    print(f"\n[4] memory scaling: peak RSS at {small}^2 and {large}^2, chunk 1024, the present")
    a, _ = project(work, small, 0)
    b, _ = project(work, large, 0)
    r = b.rss / a.rss
    record(f"4 peak memory {large}^2 vs {small}^2", f"{b.rss:.0f} MiB", f"{small}^2: {a.rss:.0f} MiB", r,
           "<= 1.3x and < 1.5 GiB", r <= 1.3 and b.rss < 1536, "python -m bench --only memory")


# ----------------------------------------------------------------------------- 5. parallel scaling

def _kernel_task(chunk):
    from ceiling.kernels_climate import ChunkParams, climate_chunk

    values, area, model = chunk
    return climate_chunk(model, values, area, params=ChunkParams(hist_max=60.0))[1]


def bench_parallel(work: Path, n: int, chunks: int) -> None:
    print("\n[5] parallel scaling: 1 vs 2 threads and a 2-worker local cluster (loopback)")
    # kernel-bound: the fused per-chunk kernel on chunks already in memory
    m = build_model()
    rng = np.random.default_rng(1)
    data = [({f"f{k}": field_rows(0, 1024, 1024, k, 0.01 * i, rng) for k in range(K)}, np.ones((1024, 1024)), m)
            for i in range(chunks)]
    _kernel_task(data[0])  # compiled before timing
    times, stats = {}, {}
    for threads in (1, 2):
        with ThreadPoolExecutor(threads) as pool:
            t0 = time.perf_counter()
            stats[f"threads {threads}"] = list(pool.map(_kernel_task, data))
            times[f"threads {threads}"] = time.perf_counter() - t0
    from distributed import Client, LocalCluster

    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1", dashboard_address=None,
                      silence_logs=40) as cluster, Client(cluster) as client:
        client.run(lambda: _kernel_task(data[0]))  # compiled (or loaded from the cache) in each worker
        remote = client.scatter(data, broadcast=True)  # inputs in the workers before timing
        t0 = time.perf_counter()
        stats["workers 2"] = client.gather(client.map(_kernel_task, remote, pure=False))
        times["workers 2"] = time.perf_counter() - t0
    same_k = all(np.array_equal(np.asarray(stats["threads 1"]), np.asarray(v)) for v in stats.values())
    cells = chunks * 1024 * 1024
    for k, t in times.items():
        print(f"  kernel-bound, {k}: {t:.2f} s ({cells / t / 1e6:.1f} M cells/s)")
    record("5a kernel-bound: 2 threads vs 1", f"{times['threads 1'] / times['threads 2']:.2f}x",
           f"1 thread {times['threads 1']:.2f} s", times["threads 1"] / times["threads 2"], "reported (ideal 2x)", None,
           "python -m bench --only parallel")
    record("5b kernel-bound: 2 workers vs 1 thread", f"{times['threads 1'] / times['workers 2']:.2f}x",
           f"1 thread {times['threads 1']:.2f} s", times["threads 1"] / times["workers 2"], "reported (ideal 2x)", None,
           "python -m bench --only parallel")
    # I/O-bound: the whole projection, and the I/O floor itself
    cfg = write_case(work / f"grid{n}", n, 1)
    walls, hashes = {}, {}
    for label, extra in (("threads 1", ("--threads", "1")), ("threads 2", ("--threads", "2")),
                         ("workers 2", ("--workers", "2"))):
        run, out = project(work, n, 1, *extra, keep=True)
        walls[label] = run.wall
        hashes[label] = digests(out)
        if label != "threads 1":
            shutil.rmtree(out, ignore_errors=True)
    raw = work / f"raw{n}"
    ref_out = work / f"out{n}-1---threads-1"
    measure(self_cmd("floor", "prepare", ref_out, raw))
    shutil.rmtree(ref_out, ignore_errors=True)
    for th in (1, 2):
        fo = work / f"floor{n}-{th}"
        walls[f"floor {th}"] = measure(self_cmd("floor", "run", cfg, raw, fo, th))[0]
        print(f"  I/O floor, {th} thread(s): {walls[f'floor {th}']:.1f} s")
        shutil.rmtree(fo, ignore_errors=True)
    shutil.rmtree(raw, ignore_errors=True)
    same = hashes["threads 1"] == hashes["threads 2"] == hashes["workers 2"]
    record(f"5c ceiling project {n}^2: 2 threads vs 1", f"{walls['threads 1'] / walls['threads 2']:.2f}x",
           f"1 thread {walls['threads 1']:.1f} s", walls["threads 1"] / walls["threads 2"], "reported (ideal 2x)", None,
           "python -m bench --only parallel")
    record(f"5d ceiling project {n}^2: --workers 2 vs 1 thread", f"{walls['threads 1'] / walls['workers 2']:.2f}x",
           f"1 thread {walls['threads 1']:.1f} s", walls["threads 1"] / walls["workers 2"], "reported (ideal 2x)", None,
           "python -m bench --only parallel")
    record(f"5e I/O floor {n}^2: 2 threads vs 1", f"{walls['floor 1'] / walls['floor 2']:.2f}x",
           f"1 thread {walls['floor 1']:.1f} s", walls["floor 1"] / walls["floor 2"], "reported (ideal 2x)", None,
           "python -m bench --only parallel")
    record("5f same outputs", f"kernel stats {same_k}; {len(hashes['threads 1'])} files by sha256 {same}",
           "threads 1 / threads 2 / workers 2", None, "identical", same and same_k, "python -m bench --only parallel")


# ----------------------------------------------------------------------------- 6. fitting

def bench_fit(points: int, replicates: int) -> None:
    print(f"\n[6] fitting: {points} points x {K} factors, with and without {replicates} bootstrap replicates")
    import warnings

    from ceiling.model import FactorSpec, fit
    from ceiling.uncertainty import bootstrap_model

    from .bootstrap_timing import synthetic

    warnings.simplefilter("ignore")
    s = synthetic(points, K, 1)
    t0 = time.perf_counter()
    m = fit(s, [FactorSpec(c) for c in s.values.columns], wedge_replicates=0, seed=1)
    t_fit = time.perf_counter() - t0
    t0 = time.perf_counter()
    bootstrap_model(m, s, replicates=replicates, seed=1)
    t_boot = time.perf_counter() - t0
    print(f"  fit {t_fit:.2f} s; + {replicates} bootstrap replicates {t_boot:.2f} s ({1e3 * t_boot / replicates:.1f} ms each)")
    record(f"6a fit {points} x {K}", f"{t_fit:.2f} s", "-", None, "reported", None, "python -m bench --only fit")
    record(f"6b fit + {replicates} bootstrap replicates", f"{t_fit + t_boot:.2f} s", f"fit alone {t_fit:.2f} s",
           (t_fit + t_boot) / t_fit, "reported", None, "python -m bench --only fit")


# ----------------------------------------------------------------------------- 7. scale estimate

def bench_scale(work: Path, quick: bool) -> None:
    print("\n[7] scale estimate: wall time = a + b (present cells) + c (future cells), from the runs above")
    runs = [r for r in RUNS if r.threads.startswith("--threads 2")]
    if len({(r.n, r.futures) for r in runs}) < 3:  # run alone: measure three configurations
        for n, f in ((256, 0), (384, 1), (512, 1)) if quick else ((1024, 0), (2048, 1), (4096, 1)):
            project(work, n, f)
        runs = [r for r in RUNS if r.threads.startswith("--threads 2")]
    X = np.array([[1.0, r.present_cells, r.future_cells] for r in runs])
    y = np.array([r.wall for r in runs])
    coef, *_ = np.linalg.lstsq(X, y, rcond=None)
    pred = X @ coef
    r2 = 1 - ((y - pred) ** 2).sum() / ((y - y.mean()) ** 2).sum()
    for r, p in zip(runs, pred):
        print(f"  {r.n}^2, present + {r.futures}: measured {r.wall:.1f} s, fitted {p:.1f} s")
    a, b, c = coef
    print(f"  fit: {a:.1f} s + {b * 1e9:.0f} s per 10^9 present cells + {c * 1e9:.0f} s per 10^9 future cells (R^2 {r2:.4f})")
    w, h, nf = GLOBAL
    cells = w * h
    est = a + b * cells + c * cells * nf
    # on a cluster the chunk tasks and the COG copies run on the workers; copying chunks into
    # the stream files and the NetCDF stays in this process (measured: writes_here, and the
    # stream writes that threads make inside their tasks, stream_writes_in_tasks_here)
    big = [r for r in runs if r.n == max(q.n for q in runs)]
    share = float(np.mean([(r.timing.get("writes_here", 0.0) + r.timing.get("stream_writes_in_tasks_here", 0.0))
                           / max(1e-9, r.wall - a) for r in big]))
    print(f"  30-arc-second global grid ({w} x {h}), {K} factors, present + {nf} futures: {est / 3600:.1f} h on this "
          f"2-core machine")
    per = ", ".join(f"+{wk}: {(a + (est - a) * (share + (1 - share) / (1 + wk))) / 3600:.2f} h" for wk in (1, 2, 4, 8))
    print(f"  with W added 2-core workers, if all but the writes here ({100 * share:.0f}% of the work) spread "
          f"evenly: {per}")
    record("7a linear fit (all runs above)", f"{a:.1f} s + {b * 1e9:.0f} s/Gcell present + {c * 1e9:.0f} s/Gcell future",
           f"{len(runs)} runs, R^2 {r2:.4f}", None, "reported", None, "python -m bench --only scale")
    record("7b 30'' global, present + 8 futures", f"{est / 3600:.1f} h (2 cores)", per, None, "reported", None,
           "python -m bench")


# ----------------------------------------------------------------------------- main

def machine() -> str:
    import importlib.metadata as md

    import rasterio

    mem = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30
    vers = ", ".join(f"{p} {md.version(p)}" for p in ("numpy", "numba", "rasterio", "dask", "distributed", "h5py",
                                                        "netCDF4", "deflate"))
    return (f"{os.cpu_count()} CPUs ({platform.processor() or platform.machine()}), {mem:.0f} GiB, Python "
            f"{platform.python_version()}, GDAL {rasterio.__gdal_version__}, {vers}; load average at start "
            f"{os.getloadavg()[0]:.2f}")


def bench_recovery(quick: bool) -> None:
    """The virtual-species suite: the defaults against the plain per-factor fit on every family."""
    from .virtual.suite import recovery

    print("\n== recovery: virtual species (bench/virtual/), defaults vs plain per-factor fit", flush=True)
    t0 = time.perf_counter()
    verdicts = recovery(quick=quick)
    wall = time.perf_counter() - t0
    for name, (figure, ok) in verdicts.items():
        record(f"recovery {name}", figure, "plain per-factor quadratic, tau 0.95", None,
               "within 0.01 of plain or better" if name != "median" else "better than plain", ok,
               "python -m bench --only recovery")
    print(f"  recovery suite: {wall:.0f} s", flush=True)


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(prog="python -m bench", description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small sizes: a smoke run of every benchmark")
    ap.add_argument("--only", default="kernel,e2e,naive,memory,parallel,fit,scale,lean,recovery")
    ap.add_argument("--work", type=Path, default=None, help="keep the generated inputs here (reused when present)")
    ap.add_argument("--json", type=Path, default=None, help="write the results table here")
    a = ap.parse_args(argv)
    only = set(a.only.split(","))
    size = SIZES["quick" if a.quick else "full"]
    work = a.work or Path(tempfile.mkdtemp(prefix="ceiling-bench-"))
    work.mkdir(parents=True, exist_ok=True)
    print(f"ceiling benchmarks ({'quick' if a.quick else 'full'}); {machine()}; inputs in {work}", flush=True)
    t0 = time.perf_counter()
    try:
        if "kernel" in only:
            bench_kernel(size["kernel"])
        if "e2e" in only:
            bench_e2e(work, size["e2e"])
        if "naive" in only:
            bench_naive(work, size["naive"], size["naive_futures"])
        if "memory" in only:
            bench_memory(work, *size["memory"])
        if "parallel" in only:
            bench_parallel(work, size["parallel"], size["parallel_chunks"])
        if "fit" in only:
            bench_fit(*size["fit"])
        if "scale" in only:
            bench_scale(work, a.quick)
        if "lean" in only:
            bench_lean(work, *size["lean"], record, ceiling_cmd)
        if "recovery" in only:
            bench_recovery(a.quick)
    finally:
        if a.work is None:
            shutil.rmtree(work, ignore_errors=True)
    total = time.perf_counter() - t0
    print(f"\nall done in {total:.0f} s ({total / 60:.1f} min)\n")
    print(f"{'benchmark':<52} {'figure':<42} {'reference':<38} {'ratio':>6}  {'target':<22} verdict")
    for r in RESULTS:
        ratio = "" if r["ratio"] is None else f"{r['ratio']:.2f}"
        print(f"{r['bench']:<52} {r['figure']:<42} {r['reference'][:38]:<38} {ratio:>6}  {r['target']:<22} {r['verdict']}")
    if a.json:
        a.json.write_text(json.dumps({"machine": machine(), "seconds": total, "results": RESULTS}, indent=2))


if __name__ == "__main__":
    main()
