"""The figures of the report: embedded screen copies of the run's PNGs, the map sheets of each
species, the overview figure that opens its results, and the community layers."""

from __future__ import annotations

import base64
import io
from pathlib import Path
from typing import Any

from ..outputs.names import ENSEMBLE
from .tables import MAX_TABLE_ROWS, generic_table, read_csv

__all__ = ["SCREEN_WIDTH", "data_uri", "figure", "figures_in", "embed", "overview_figures", "maps_section",
           "community_section"]

SCREEN_WIDTH = 1300  # embedded copies are reduced by the whole factor that brings them nearest this width


# --- images -----------------------------------------------------------------------------------------------

def data_uri(path: Path) -> str:
    """A screen copy of a PNG (reduced by the whole factor that brings it nearest SCREEN_WIDTH
    pixels across, 256-colour palette) as a ``data:image/png;base64`` URI."""
    from PIL import Image

    with Image.open(path) as im:
        im = im.convert("RGB")
        f = max(1, round(im.width / SCREEN_WIDTH))
        if f > 1:
            im = im.reduce(f)
        im = im.quantize(256, method=Image.Quantize.FASTOCTREE)
        buf = io.BytesIO()
        im.save(buf, format="PNG")
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def figure(root: Path, rel: Path, title: str, alt: str | None = None) -> dict[str, Any] | None:
    """A figure to embed (its data URI is filled in by :func:`embed`), or None if the file is missing."""
    p = root / rel
    if not p.is_file():
        return None
    return {"title": title, "alt": alt or title, "uri": "", "file": rel.as_posix(), "path": p}


def figures_in(obj: Any):
    if isinstance(obj, dict):
        if "path" in obj and "uri" in obj:
            yield obj
        else:
            for v in obj.values():
                yield from figures_in(v)
    elif isinstance(obj, list | tuple):
        for v in obj:
            yield from figures_in(v)


def embed(context: dict[str, Any]) -> None:
    """Fill in the data URI of every figure of the context (a few worker processes for many)."""
    import multiprocessing
    import os
    from concurrent.futures import ProcessPoolExecutor

    figs = list(figures_in(context))
    paths = [f["path"] for f in figs]
    cpus = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    n = min(cpus, 4, len(paths) // 8)
    if n > 1 and "fork" in multiprocessing.get_all_start_methods():
        with ProcessPoolExecutor(max_workers=n, mp_context=multiprocessing.get_context("fork")) as pool:
            uris = list(pool.map(data_uri, paths, chunksize=4))
    else:
        uris = [data_uri(p) for p in paths]
    for f, uri in zip(figs, uris):
        f["uri"] = uri
        del f["path"]


# --- maps section ------------------------------------------------------------------------------------------------

def overview_figures(root: Path, info: Any) -> dict[str, dict[str, Any] | None]:
    """Per species, the figure that opens its results: the ensemble's zone sheet (scenarios
    across, periods down), or the first climate model's when the run has no ensemble."""
    from .. import maps

    out: dict[str, dict[str, Any] | None] = {}
    for sp in info.species:
        models = list(dict.fromkeys(k[1] for k in info.climates[sp] if k[0] != "present"))
        model = ENSEMBLE if ENSEMBLE in models else (models[0] if models else None)
        who = "ensemble of the climate models (release and constraint only where they agree)" if model == ENSEMBLE \
            else f"climate model {model}"
        out[sp] = None if model is None else figure(
            root, maps.comparison_sheet_name(sp, model, "zone"), f"{sp}: zone of change, {who}",
            f"Zone of change of {sp} for each scenario (across) and period (down), {who}")
    return out


def maps_section(root: Path, info: Any, shown: set[str] = frozenset()) -> list[dict[str, Any]]:
    """The map sheets of each species; ``shown`` lists the figure files already in the results
    (referred to, not embedded twice)."""
    from .. import maps

    out = []
    for sp in info.species:
        present = info.present(sp)
        block: dict[str, Any] = {"name": sp, "present": None, "comparisons": [], "ensembles": [], "limiting": [],
                                 "uncertainty": [], "climates": [], "shown_above": []}
        if present is not None:
            block["present"] = figure(root, maps.climate_sheet_name(sp, present), maps.climate_title(sp, present),
                                       f"Maps of the present ceiling, limiting factor and climate similarity for {sp}")
        models = list(dict.fromkeys(k[1] for k in info.climates[sp] if k[0] != "present"))
        for model in [m for m in models if m != ENSEMBLE] + ([ENSEMBLE] if ENSEMBLE in models else []):
            for layer in ("change", "zone"):
                who = "ensemble of the climate models" if model == ENSEMBLE else f"climate model {model}"
                what = "change of the ceiling" if layer == "change" else "zone of change"
                f = figure(root, maps.comparison_sheet_name(sp, model, layer), f"{sp}: {what}, {who}",
                            f"{what} for each scenario (across) and period (down), {who}")
                if f and f["file"] in shown:
                    block["shown_above"].append(f["title"])
                elif f:
                    block["comparisons"].append(f)
        for key in info.ensembles(sp):
            f = figure(root, maps.climate_sheet_name(sp, key), maps.climate_title(sp, key))
            if f:
                block["ensembles"].append(f)
        for kind, title in (("areas", "area limited by each factor"), ("switch", "limiting factor now and later")):
            f = figure(root, maps.limiting_figure_name(sp, kind), f"{sp}: {title}")
            if f:
                block["limiting"].append(f)
        if present is not None:
            f = figure(root, maps.uncertainty_sheet_name(sp, present), maps.climate_title(sp, present) + ": fit uncertainty")
            if f:
                block["uncertainty"].append(f)
        for model in [m for m in models if m != ENSEMBLE]:
            for layer in maps.COMPARED_PROBABILITIES:
                what = maps.TITLES[layer].lower()
                f = figure(root, maps.comparison_sheet_name(sp, model, layer), f"{sp}: {what}, climate model {model}",
                            f"{what} (share of bootstrap replicates) for each scenario and period, climate model {model}")
                if f:
                    block["uncertainty"].append(f)
        for key in info.futures(sp):
            rel = maps.climate_sheet_name(sp, key)
            if (root / rel).is_file():
                block["climates"].append({"title": maps.climate_title(sp, key), "file": rel.as_posix()})
        out.append(block)
    return out


def community_section(root: Path) -> dict[str, Any] | None:
    from .. import maps

    d = root / "community"
    if not d.is_dir():
        return None
    figs = []
    for rel in maps.community_climates(root):
        parts = rel.parts[1:]
        title = "Community: present climate" if parts[:1] == ("present",) else "Community: " + ", ".join(
            f"{k} {v}" for k, v in zip(("scenario", "climate model", "period"), parts))
        f = figure(root, maps.community_figure_name(rel), title)
        if f:
            figs.append(f)
    csvs = sorted(d.rglob("*.csv")) + ([root / "community.csv"] if (root / "community.csv").is_file() else [])
    tables = [generic_table(read_csv(c).head(MAX_TABLE_ROWS), f"table-community-{i}", c.relative_to(root).as_posix())
              for i, c in enumerate(csvs)]
    return {"figures": figs, "tables": [t for t in tables if t["rows"]]}
