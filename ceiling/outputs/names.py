"""Every output file name comes from here, so the CLI, manifest, report and tests agree."""

from __future__ import annotations

import re
from pathlib import Path

__all__ = ["MODEL_FILE", "DIAGNOSTICS_FILE", "FIGURES_DIR", "fit_figure_name", "fit_panel_name", "safe_part"]

MODEL_FILE = "model.json"
DIAGNOSTICS_FILE = "diagnostics.csv"
FIGURES_DIR = "figures"

_SAFE = re.compile(r"[^A-Za-z0-9._-]+")


def safe_part(text: str) -> str:
    """A name usable as one path component: no separators, no '..', no leading dot."""
    s = _SAFE.sub("_", str(text)).strip("._") or "unnamed"
    return s


def fit_figure_name(species: str, factor: str) -> Path:
    return Path(FIGURES_DIR) / f"fit_{safe_part(species)}_{safe_part(factor)}.png"


def fit_panel_name(species: str) -> Path:
    return Path(FIGURES_DIR) / f"fit_{safe_part(species)}_all_factors.png"
