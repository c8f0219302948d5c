"""Run the virtual-species suite: every scenario at every seed, every candidate, one table.

    python -m bench --only recovery                       # the suite, as in BENCHMARKS.md
    python -m bench --only recovery --quick               # one seed, defaults vs plain
    python -m bench.virtual.suite --candidates defaults,plain,joint_all --families size,clustered

Each (scenario, seed) is one task: build the case, fit every candidate on the sites outside the
held-out blocks, score. Tasks run in ``--jobs`` processes (2 by default); each process runs
its numerical libraries on one thread, and the rows are sorted afterwards, so the table does
not depend on the order in which tasks finish (every random draw is seeded by the scenario's
name and the seed).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
import warnings
from concurrent.futures import ProcessPoolExecutor
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd

__all__ = ["run_suite", "table", "markdown", "main", "METRICS", "no_worse", "recovery", "TOLERANCE"]

# metric -> (label, higher is better); calibration is judged by its distance from 1 - tau
METRICS = {
    "rho_now": "rank corr. now", "rho_later": "rank corr. later", "lim_now": "limiting right now",
    "lim_later": "limiting right later", "sign": "sign of large changes", "above": "held-out share above",
}
TAU = 0.95
TOLERANCE = 0.01  # the no-worse rule: a family's median rank correlation at most this much below the plain fit's


def _one_thread() -> None:
    for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS"):
        os.environ.setdefault(var, "1")


def _subset(samples, keep: np.ndarray):
    return replace(samples, abundance=samples.abundance[keep], values=samples.values[keep].reset_index(drop=True),
                   x=samples.x[keep], y=samples.y[keep])


def run_task(task: tuple[int, int, tuple[str, ...]]) -> list[dict]:
    """Fit and score every candidate on one (scenario index, seed)."""
    from .candidates import candidate
    from .scenarios import build, scenarios
    from .score import score

    index, seed, names = task
    sc = scenarios()[index]
    case = build(sc, seed)
    train = _subset(case.samples, ~case.held_out)
    held = case.samples.values[case.held_out]
    held_x = {n: held[n].to_numpy(dtype=np.float64) for n in held.columns}
    held_y = case.samples.abundance[case.held_out]
    rows = []
    for name in names:
        t0 = time.process_time()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            model = candidate(name).fit(train)
        seconds = time.process_time() - t0
        s = score(model, case.truth, case.land, held_x, held_y)
        left_out = [f.factor for f in model.screened]
        rows.append({"family": sc.family, "scenario": sc.name, "seed": seed, "candidate": name,
                     "sites": int(train.n), "seconds": seconds, "left_out": ",".join(left_out),
                     "edgeless_factors": ",".join(case.truth.edgeless), **s.to_dict()})
    return rows


def run_suite(candidates: list[str], *, seeds: tuple[int, ...], families: list[str] | None = None,
              jobs: int = 2, progress=print) -> pd.DataFrame:
    """Every (scenario, seed) of the chosen families, fitted by every candidate; one row per fit."""
    from .scenarios import scenarios

    _one_thread()
    tasks = [(i, s, tuple(candidates)) for i, sc in enumerate(scenarios())
             if families is None or sc.family in families for s in seeds]
    rows: list[dict] = []
    t0 = time.perf_counter()
    with ProcessPoolExecutor(max_workers=jobs) as pool:
        for k, out in enumerate(pool.map(run_task, tasks), 1):
            rows += out
            if k % 10 == 0 or k == len(tasks):
                progress(f"  {k}/{len(tasks)} cases, {time.perf_counter() - t0:.0f} s")
    df = pd.DataFrame(rows)
    return df.sort_values(["family", "scenario", "seed", "candidate"], kind="stable").reset_index(drop=True)


def table(df: pd.DataFrame) -> pd.DataFrame:
    """Per family and candidate: the median and the worst of every metric (worst calibration:
    farthest from 1 - tau), and the median fit time; an ``all`` family over every run."""
    parts = []
    for fam, g in list(df.groupby("family", sort=False)) + [("all", df)]:
        for cand, h in g.groupby("candidate", sort=False):
            row = {"family": fam, "candidate": cand, "runs": len(h)}
            for m in METRICS:
                v = h[m].to_numpy(dtype=float)
                row[f"{m}_median"] = float(np.nanmedian(v))
                if m == "above":
                    row[f"{m}_worst"] = float(v[np.nanargmax(np.abs(v - (1 - TAU)))])
                else:
                    row[f"{m}_worst"] = float(np.nanmin(v))
            row["seconds_median"] = float(h["seconds"].median())
            parts.append(row)
    return pd.DataFrame(parts)


def markdown(tab: pd.DataFrame, candidates: list[str]) -> str:
    """The table as Markdown: per family, one row per candidate, 'median (worst)' per metric."""
    head = "| family | candidate | " + " | ".join(METRICS.values()) + " | fit s |"
    lines = [head, "|" + "---|" * (3 + len(METRICS))]
    for fam in dict.fromkeys(tab["family"]):
        for cand in candidates:
            r = tab[(tab["family"] == fam) & (tab["candidate"] == cand)]
            if r.empty:
                continue
            r = r.iloc[0]
            cells = [f"{r[f'{m}_median']:.3f} ({r[f'{m}_worst']:.3f})" for m in METRICS]
            lines.append(f"| {fam} | {cand} | " + " | ".join(cells) + f" | {r['seconds_median']:.2f} |")
    return "\n".join(lines)


def no_worse(tab: pd.DataFrame, candidate: str = "defaults", reference: str = "plain") -> dict[str, tuple[str, bool]]:
    """Per family, the no-worse rule: the median rank correlation now and later of ``candidate``
    within ``TOLERANCE`` of ``reference``'s or better; for ``all``, better on the median."""
    out = {}
    for fam in dict.fromkeys(tab["family"]):
        a = tab[(tab["family"] == fam) & (tab["candidate"] == candidate)].iloc[0]
        b = tab[(tab["family"] == fam) & (tab["candidate"] == reference)].iloc[0]
        d = [a[f"{m}_median"] - b[f"{m}_median"] for m in ("rho_now", "rho_later")]
        figure = (f"rank corr. now {a['rho_now_median']:.3f} vs {b['rho_now_median']:.3f}, later "
                  f"{a['rho_later_median']:.3f} vs {b['rho_later_median']:.3f}")
        ok = all(x > 0 for x in d) if fam == "all" else all(x >= -TOLERANCE for x in d)
        out["median" if fam == "all" else fam] = (figure, bool(ok))
    return out


def recovery(quick: bool = False, progress=print) -> dict[str, tuple[str, bool]]:
    """The suite as ``python -m bench --only recovery`` runs it: the defaults and the plain fit on
    every scenario (seeds ``SEEDS``; one seed with ``quick``); prints the table, returns the
    no-worse verdicts (:func:`no_worse`)."""
    from .scenarios import SEEDS

    cands = ["defaults", "plain"]
    df = run_suite(cands, seeds=SEEDS[:1] if quick else SEEDS, progress=progress)
    tab = table(df)
    progress(markdown(tab, cands))
    return no_worse(tab)


def main(argv: list[str] | None = None) -> pd.DataFrame:
    from .candidates import CANDIDATES
    from .scenarios import SEEDS

    ap = argparse.ArgumentParser(prog="python -m bench.virtual.suite", description=__doc__.splitlines()[0])
    ap.add_argument("--candidates", default="defaults,plain,joint_all,previous")
    ap.add_argument("--families", default=None, help="comma-separated family names (default: all)")
    ap.add_argument("--seeds", default=",".join(map(str, SEEDS)))
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--csv", type=Path, default=None, help="write every run's scores here")
    a = ap.parse_args(argv)
    cands = a.candidates.split(",") if a.candidates != "all" else list(CANDIDATES)
    t0 = time.perf_counter()
    df = run_suite(cands, seeds=tuple(int(s) for s in a.seeds.split(",")),
                   families=a.families.split(",") if a.families else None, jobs=a.jobs)
    wall = time.perf_counter() - t0
    tab = table(df)
    print(markdown(tab, cands))
    print(f"\n{len(df)} fits of {df[['family', 'scenario', 'seed']].drop_duplicates().shape[0]} cases in {wall:.0f} s")
    if a.csv:
        df.to_csv(a.csv, index=False, float_format="%.5g")
        a.csv.with_suffix(".json").write_text(json.dumps({"seconds": wall, "candidates": cands}, indent=2))
    return df


if __name__ == "__main__":
    if __package__ in (None, ""):
        sys.path.insert(0, str(Path(__file__).resolve().parents[2]))
    main()
