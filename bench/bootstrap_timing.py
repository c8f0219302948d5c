"""Cost of the bootstrap of a ceiling model, and agreement of its solver with exact fits.

Synthetic survey: ``--points`` points (default 20,000) with ``--factors`` factors (default 6),
each with a quadratic ceiling; counts are Poisson around the law-of-the-minimum ceiling times
a beta-distributed share, with a quarter of the points empty. Times

(a) the plain fit (``ceiling.model.fit``, ``--wedge`` wedge-test replicates, default 0),
(b) the fit plus ``--replicates`` bootstrap replicates (default 200), pairs and spatial blocks,

and prints the per-replicate cost; (c) times the replicate kernel and the uncertainty layers
on a ``--chunk`` x ``--chunk`` chunk of present and future cells. Then refits ``--exact`` of the same resamples (default 5)
per factor with exact quantile regression (statsmodels QuantReg, as the fit uses) to give
its per-replicate cost and the gap between the smoothed replicates and the exact ones, in
units of the bootstrap standard deviation of each coefficient.

    python bench/bootstrap_timing.py [--points 20000] [--factors 6] [--replicates 200]
"""

from __future__ import annotations

import argparse
import os
import time
import warnings

import numpy as np
import pandas as pd

from ceiling.boundary.quantreg import quantile_fit
from ceiling.kernels import forward_transform
from ceiling.model import FactorSpec, fit
from ceiling.samples import Samples
from ceiling.uncertainty import (
    bootstrap_counts,
    bootstrap_model,
    chunk_uncertainty,
    counts_to_indices,
)


def synthetic(n: int, k: int, seed: int) -> Samples:
    rng = np.random.default_rng(seed)
    # sites clustered around 200 centres in a 100 km square (metres)
    centres = rng.uniform(0, 100_000, (200, 2))
    which = rng.integers(0, 200, n)
    xy = centres[which] + rng.normal(0, 2_000, (n, 2))
    values = {}
    caps = []
    for j in range(k):
        v = rng.uniform(-1.0, 1.0, n) * (1 + j) + 10 * j
        opt = 10 * j + 0.3 * (1 + j) * (j % 3 - 1)
        cap = 80.0 * (1 - 0.7 * ((v - opt) / (1 + j)) ** 2)
        values[f"f{j}"] = v
        caps.append(cap)
    ceiling = np.maximum(np.min(caps, axis=0), 0.0)
    mean = ceiling * rng.beta(2.5, 0.6, n) * (rng.uniform(size=n) > 0.25)
    counts = rng.poisson(mean).astype(float)
    return Samples(species="bench", abundance=counts, values=pd.DataFrame(values),
                   x=xy[:, 0], y=xy[:, 1], crs="EPSG:3857")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--points", type=int, default=20_000)
    ap.add_argument("--factors", type=int, default=6)
    ap.add_argument("--replicates", type=int, default=200)
    ap.add_argument("--block", type=float, default=5_000.0, help="block side in metres")
    ap.add_argument("--exact", type=int, default=5)
    ap.add_argument("--wedge", type=int, default=0)
    ap.add_argument("--tau", type=float, default=0.95)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--chunk", type=int, default=512, help="side of the chunk of cells for (c)")
    a = ap.parse_args()
    warnings.simplefilter("ignore")
    s = synthetic(a.points, a.factors, a.seed)
    specs = [FactorSpec(c) for c in s.values.columns]
    print(f"{a.points} points x {a.factors} quadratic factors, tau={a.tau}, {os.cpu_count()} CPUs")

    t0 = time.perf_counter()
    m = fit(s, specs, tau=a.tau, wedge_replicates=a.wedge, seed=a.seed)
    t_fit = time.perf_counter() - t0
    print(f"(a) plain fit ({a.wedge} wedge replicates): {t_fit:.2f} s")

    for label, block in (("pairs", None), ("spatial blocks", a.block)):
        t0 = time.perf_counter()
        mb = bootstrap_model(m, s, replicates=a.replicates, seed=a.seed, block=block)
        t_boot = time.perf_counter() - t0
        extra = f", {mb.bootstrap['blocks']} blocks of {a.block:g} m" if block else ""
        print(
            f"(b) fit + {a.replicates} bootstrap replicates ({label}{extra}): {t_fit + t_boot:.2f} s "
            f"(bootstrap {t_boot:.2f} s; {1e3 * t_boot / a.replicates:.1f} ms per replicate of "
            f"{a.factors} factors, {1e3 * t_boot / (a.replicates * a.factors):.2f} ms per factor fit)"
        )

    # exact refits of the first few pairs resamples, for cost and agreement
    mb = bootstrap_model(m, s, replicates=a.replicates, seed=a.seed)
    counts = bootstrap_counts(s.n, a.replicates, seed=a.seed)
    y = np.asarray(s.abundance)
    t_exact = 0.0
    gaps = []
    for fc in m.factors:
        X = fc.basis.design(np.asarray(s.values[fc.factor]))
        yt = forward_transform(y, fc.transform)
        reps = mb.replicates[fc.factor]
        sd = reps.std(axis=0, ddof=1)
        for b in range(a.exact):
            idx = counts_to_indices(counts[b])
            t0 = time.perf_counter()
            exact = quantile_fit(yt[idx], X[idx], fc.tau, with_errors=False).params
            t_exact += time.perf_counter() - t0
            gaps.append(np.abs(reps[b] - exact) / sd)
    g = np.concatenate(gaps)
    per = t_exact / (a.exact * a.factors)
    print(
        f"exact QuantReg: {1e3 * per:.1f} ms per factor fit; {a.replicates} replicates x "
        f"{a.factors} factors would take {per * a.replicates * a.factors:.1f} s"
    )
    print(
        f"smoothed vs exact on {a.exact} resamples x {a.factors} factors: |gap| / bootstrap sd "
        f"median {np.median(g):.3f}, 90th percentile {np.quantile(g, 0.9):.3f}, max {g.max():.3f}"
    )

    # the replicate kernel and the layers on one chunk of a present and a future grid
    side = a.chunk
    rng = np.random.default_rng(a.seed)
    present = {f.factor: rng.uniform(*f.observed, (side, side)) for f in m.factors}
    future = {k: v + 0.05 * (f.observed[1] - f.observed[0]) for (k, v), f in zip(present.items(), m.factors)}
    t0 = time.perf_counter()
    lay = chunk_uncertainty(mb, present, future)
    t_kernel = time.perf_counter() - t0
    print(
        f"(c) {a.replicates} replicate ceilings and {len(lay)} uncertainty layers on a "
        f"{side} x {side} chunk (present and future): {t_kernel:.2f} s, "
        f"{side * side / t_kernel / 1e6:.2f} M cells/s"
    )


if __name__ == "__main__":
    main()
