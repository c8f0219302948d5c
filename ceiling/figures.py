"""Figures (matplotlib, Agg backend, PNG).

Fit figures: per factor, the survey cloud, the fitted ceiling, the median line and the observed
range; and one panel figure with every factor of a species.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from .outputs.atomic import atomic_path  # noqa: E402

__all__ = ["fit_figure", "fit_panel", "DPI"]

DPI = 150
CEILING_COLOUR = "#b2182b"
MEDIAN_COLOUR = "#2166ac"
POINT_COLOUR = "#4d4d4d"


def _axis_label(fc: Any) -> str:
    name = fc.label or fc.factor.replace("_", " ")
    return f"{name} ({fc.units})" if fc.units and fc.units != "1" else name


def _draw(ax: Any, fc: Any, x: np.ndarray, y: np.ndarray) -> None:
    lo, hi = fc.observed
    pad = 0.05 * (hi - lo if hi > lo else 1.0)
    grid = np.linspace(lo - pad, hi + pad, 400)
    ax.axvspan(lo - pad, lo, color="#eeeeee", zorder=0)
    ax.axvspan(hi, hi + pad, color="#eeeeee", zorder=0)
    ax.scatter(x, y, s=6, alpha=0.45, color=POINT_COLOUR, linewidths=0, label="survey points", zorder=1)
    ax.plot(grid, fc.predict(grid), color=CEILING_COLOUR, lw=2.2, label=f"ceiling (tau {fc.tau:g})", zorder=3)
    ax.plot(grid, fc.predict_median(grid), color=MEDIAN_COLOUR, lw=1.4, ls="--", label="median", zorder=2)
    ax.axvline(lo, color="#999999", lw=0.8, ls=":")
    ax.axvline(hi, color="#999999", lw=0.8, ls=":")
    ax.set_xlim(lo - pad, hi + pad)
    ax.set_ylim(bottom=0)
    ax.set_xlabel(_axis_label(fc))
    ax.set_ylabel("abundance")
    verdict = fc.diagnostics.verdict
    ax.set_title(f"{fc.factor.replace('_', ' ')}: {verdict}", fontsize=9)


def fit_figure(fc: Any, x: np.ndarray, y: np.ndarray, path: str | Path, *, species: str = "") -> Path:
    """One factor's cloud, ceiling, median and observed range, written to ``path`` (PNG)."""
    fig, ax = plt.subplots(figsize=(5.0, 3.6), dpi=DPI, layout="constrained")
    _draw(ax, fc, x, y)
    if species:
        fig.suptitle(f"{species}", fontsize=10)
    ax.legend(loc="upper left", fontsize=7, frameon=False)
    return _save(fig, path)


def fit_panel(model: Any, samples: Any, path: str | Path) -> Path:
    """All factors of one species side by side."""
    k = len(model.factors)
    cols = min(k, 3)
    rows = int(np.ceil(k / cols))
    fig, axes = plt.subplots(rows, cols, figsize=(4.2 * cols, 3.4 * rows), dpi=DPI, layout="constrained", squeeze=False)
    for ax, fc in zip(axes.flat, model.factors):
        _draw(ax, fc, np.asarray(samples.values[fc.factor]), np.asarray(samples.abundance))
    for ax in list(axes.flat)[k:]:
        ax.set_visible(False)
    axes.flat[0].legend(loc="upper left", fontsize=7, frameon=False)
    fig.suptitle(f"Ceiling fits for {model.species} (grey bands: outside the observed range)", fontsize=11)
    return _save(fig, path)


def _save(fig: Any, path: str | Path) -> Path:
    path = Path(path)
    with atomic_path(path) as tmp:
        fig.savefig(tmp, format=path.suffix.lstrip(".") or "png")
    plt.close(fig)
    return path
