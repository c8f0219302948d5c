"""The run report: one self-contained HTML file, ``report.html``, in the run folder.

:func:`build_report` reads the run folder (``summary.csv``, ``diagnostics.csv``,
``transitions.csv``, ``model.json``, the figures, and ``manifest.json`` when it exists) and
renders ``template.html.j2`` with Jinja2 (autoescaped). Every image is embedded as a base64
``data:`` URI (a screen-resolution copy of the print-resolution PNG in ``figures/``); the page
loads nothing else: no scripts, no external style sheets or fonts, and a content security
policy that forbids any other source.

Sections, results first: what the run found (ceiling/report/results.py); the maps and
comparison sheets; the summary tables; the model and its diagnostics; the cautions; then, folded
(``<details>``), what was run (config, climates, inputs, versions) and provenance (checksums). A
table of contents stays in view beside the page (CSS ``position: sticky``, no script).
"""

from __future__ import annotations

import json
import math
import tomllib
from collections.abc import Iterable
from importlib.resources import files
from pathlib import Path
from typing import Any

import pandas as pd

from .. import __version__
from ..errors import InputFileError
from ..outputs.atomic import atomic_write_text, sha256_file
from ..outputs.names import (
    DIAGNOSTICS_FILE,
    ENSEMBLE,
    MANIFEST_FILE,
    MODEL_FILE,
    SUMMARY_FILE,
    TRANSITIONS_FILE,
    fit_panel_name,
)
from .figures import community_section, embed, figure, maps_section, overview_figures
from .formatting import format_km2, format_percent, format_size, format_value, missing
from .results import ZONES_FILE, RunTables, results_section
from .tables import MAX_TABLE_ROWS, ensemble_table, future_table, generic_table, present_table, read_csv

__all__ = ["REPORT_FILE", "build_report", "report_context", "render_report", "format_km2", "format_percent",
           "format_value", "CAUTIONS"]

REPORT_FILE = "report.html"
TEMPLATE = "template.html.j2"

CAUTIONS = (
    "A ceiling is the potential upper limit of abundance that the climate factors allow (law of the "
    "minimum over the factors' upper boundaries). It is not a forecast of abundance: dispersal, land use, "
    "habitat, competitors, disease and chance keep real abundance below the ceiling in most places.",
    "Cells whose climate lies outside the range sampled by the survey (novel climate, MESS below 0) are "
    "extrapolations; they are hatched on the similarity maps, and their share is given in the tables.",
    "Climate models disagree. The ensemble maps hatch the cells where too few models agree on the sign of "
    "the change, and the ensemble table gives the agreement; a change that only one model shows is weak evidence.",
    "The results need review by experts who know the species and the region before any use.",
    "Local regulations and the guidance of the responsible agencies decide how such results may be used; "
    "this report does not replace them.",
)


# --- reading the run folder ---------------------------------------------------------------------------------

def _manifest(root: Path) -> dict[str, Any] | None:
    p = root / MANIFEST_FILE
    if not p.is_file():
        return None
    try:
        return json.loads(p.read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError):
        return None


def _config_block(manifest: dict[str, Any] | None, config: Path | None) -> dict[str, Any] | None:
    if manifest and manifest.get("config"):
        c = manifest["config"]
        return {"path": c.get("path", ""), "sha256": c.get("sha256", ""), "text": c.get("text", "")}
    if config is not None and Path(config).is_file():
        return {"path": str(config), "sha256": sha256_file(config), "text": Path(config).read_text(encoding="utf-8")}
    return None


def _run_name(cfg: dict[str, Any] | None, root: Path) -> str:
    if cfg and cfg.get("text"):
        try:
            name = tomllib.loads(cfg["text"]).get("name")
            if name:
                return str(name)
        except tomllib.TOMLDecodeError:
            pass
    return root.name


def _novel_rule(info: Any) -> str:
    """The 'novel_cells' tag of the present ceiling map (how cells beyond the survey's range were treated)."""
    import rasterio

    for sp in info.species:
        key = info.present(sp)
        if key is not None and info.has(sp, key, "ceiling"):
            with rasterio.open(info.path(sp, key, "ceiling")) as src:
                return src.tags().get("novel_cells", "")
    return ""


NOVEL_RULES = {
    "hold": "beyond the survey's range each factor's ceiling is held at its value at the edge of the range",
    "extend": "beyond the survey's range each factor's fitted curve is extended (extrapolated)",
    "mask": "cells beyond the survey's range are left without a ceiling (nodata)",
}


# --- model section ----------------------------------------------------------------------------------------------

LIMITING = "acts as a limiting factor"  # the verdict of diagnostics.csv for a factor that acts as a limit


def _in_minimum(r: Any) -> bool:
    v = r.get("in_minimum", True)
    if isinstance(v, str):
        return v.strip().lower() not in ("false", "0", "no")
    return True if missing(v) else bool(v)


def _model_section(root: Path, diag: pd.DataFrame, model_doc: dict[str, Any]) -> list[dict[str, Any]]:
    out = []
    species_docs = model_doc.get("species", {})
    names = list(species_docs) or (list(dict.fromkeys(diag["species"])) if not diag.empty else [])
    for sp in names:
        sd = species_docs.get(sp, {})
        labels = {f["name"]: f.get("label") or "" for f in sd.get("factors", [])}
        d = diag[diag["species"] == sp] if not diag.empty else pd.DataFrame()
        rows = []
        for _, r in d.iterrows():
            rows.append({
                "factor": r["factor"], "label": labels.get(r["factor"], ""), "units": r.get("units", ""),
                "basis": r.get("basis", ""), "estimator": r.get("estimator", ""), "n": format_value(r.get("n"), 0),
                "observed": f"{format_value(r.get('observed_min'))} to {format_value(r.get('observed_max'))}",
                "peak": format_value(r.get("peak_ceiling")),
                "share_above": f"{format_percent(r.get('share_above'))} (expected {format_percent(r.get('expected_share_above'))})",
                "pseudo_r1": format_value(r.get("pseudo_r1"), 3),
                "wedge_p": "–" if missing(r.get("wedge_p")) else f"{float(r['wedge_p']):.3g}",
                "verdict": r.get("verdict", ""),
                "in_minimum": _in_minimum(r),
                "screened_reason": "" if missing(r.get("screened_reason")) else str(r.get("screened_reason")),
                "limiting_share": format_percent(r.get("limiting_share")) if "limiting_share" in r else "",
            })
        limits = [r["factor"] for r in rows if r["verdict"] == LIMITING]
        others = [(r["factor"], r["verdict"]) for r in rows if r["verdict"] != LIMITING]
        screened = [(r["factor"], r["screened_reason"] or r["verdict"]) for r in rows if not r["in_minimum"]]
        tau = sd.get("tau", d["tau"].iloc[0] if not d.empty and "tau" in d else "")
        out.append({
            "name": sp, "tau": tau, "transform": sd.get("transform", ""), "outside": sd.get("outside", ""),
            "n_points": sd.get("n_points", ""), "dropped": sd.get("dropped", {}), "factors": rows,
            "limits": limits, "others": others, "screened": screened,
            "has_share": any(r["limiting_share"] not in ("", "–") for r in rows),
            "fit_figure": figure(root, fit_panel_name(sp), f"Ceiling fits for {sp}",
                                  f"Survey points, fitted ceiling and median line of each factor for {sp}"),
        })
    return out


# --- provenance ----------------------------------------------------------------------------------------------------

def _provenance(root: Path, manifest: dict[str, Any] | None, report_path: Path) -> dict[str, Any]:
    """Output checksums: the manifest's, each checked against the file now; without a manifest,
    computed from the files when this report is built (the report itself cannot list its own)."""
    entries = []
    if manifest is not None:
        for e in manifest.get("outputs", []):
            p = root / e["path"]
            if p.resolve() == report_path.resolve():
                status = "this report (re-built after the manifest)"
            elif not p.is_file():
                status = "missing"
            else:
                status = "matches" if sha256_file(p) == e.get("sha256") else "changed since the manifest"
            entries.append({"path": e["path"], "size": format_size(int(e.get("size", 0))), "sha256": e.get("sha256", ""),
                            "status": status})
        source = f"{MANIFEST_FILE}, checked against the files when this report was built"
    else:
        for p in sorted(q for q in root.rglob("*") if q.is_file()):
            rel = p.relative_to(root)
            if p.resolve() == report_path.resolve() or rel.name.startswith("."):
                continue
            entries.append({"path": rel.as_posix(), "size": format_size(p.stat().st_size), "sha256": sha256_file(p),
                            "status": "computed now"})
        source = (f"computed from the files when this report was built; {MANIFEST_FILE} (written after the report) "
                  "lists every input and output, this report included")
    return {"source": source, "outputs": entries}


def _inputs(manifest: dict[str, Any] | None, inputs: Iterable[Path]) -> list[dict[str, str]]:
    if manifest is not None:
        return [{"path": e["path"], "size": format_size(int(e.get("size", 0))), "sha256": e.get("sha256", "")}
                for e in manifest.get("inputs", [])]
    out, seen = [], set()
    for p in inputs:
        p = Path(p)
        key = str(p.resolve())
        if key in seen or not p.is_file():
            continue
        seen.add(key)
        out.append({"path": str(p), "size": format_size(p.stat().st_size), "sha256": ""})
    return out


# --- the whole report ----------------------------------------------------------------------------------------------

def _zones_table(zdf: pd.DataFrame) -> dict[str, Any] | None:
    shown = zdf.head(MAX_TABLE_ROWS)
    caption = f"{ZONES_FILE}: every zone, species and climate" if len(zdf) <= MAX_TABLE_ROWS else \
        f"{ZONES_FILE}: the first {MAX_TABLE_ROWS} of {len(zdf):,} rows (the whole table is in {ZONES_FILE})"
    return generic_table(shown, "table-zones", caption) if len(shown) else None


def report_context(run_dir: str | Path, *, config: Path | None = None, inputs: Iterable[Path] = (),
                   folder: str | Path | None = None) -> dict[str, Any]:
    """Everything the template shows, as plain data. ``folder`` is the run folder as the user
    named it (the report may be built in a staging folder of another name)."""
    from ..maps import run_info
    from ..outputs.manifest import package_versions

    root = Path(run_dir)
    if not (root / SUMMARY_FILE).is_file():
        raise InputFileError(f"{root} is not a run folder: it has no {SUMMARY_FILE}")
    manifest = _manifest(root)
    info = run_info(root)
    summary = read_csv(root / SUMMARY_FILE)
    diag = read_csv(root / DIAGNOSTICS_FILE)
    model_doc = json.loads((root / MODEL_FILE).read_text(encoding="utf-8")) if (root / MODEL_FILE).is_file() else {}
    cfg = _config_block(manifest, config)
    packages = (manifest or {}).get("packages") or package_versions()
    climates = [{"scenario": k[0], "model": k[1], "period": k[2]}
                for k in dict.fromkeys(k for sp in info.species for k in info.climates[sp])]
    factors = {sp: list(fs) for sp, fs in info.factors.items()}
    tables = [t for t in (present_table(summary, factors), future_table(summary), ensemble_table(summary)) if t]
    zdf = read_csv(root / ZONES_FILE)
    overview = overview_figures(root, info)
    labels = {sp: {f["name"]: f.get("label") or "" for f in d.get("factors", [])}
              for sp, d in model_doc.get("species", {}).items()}
    results = results_section(RunTables(summary, read_csv(root / TRANSITIONS_FILE), zdf, labels), overview)
    max_novel = float(pd.to_numeric(summary.get("share_novel"), errors="coerce").max()) if "share_novel" in summary else float("nan")
    ens = summary[summary["model"] == ENSEMBLE] if "model" in summary else summary
    min_agree = float(pd.to_numeric(ens.get("mean_agreement"), errors="coerce").min()) if not ens.empty else float("nan")
    rule = _novel_rule(info)
    return {
        "title": f"Ceiling run report: {_run_name(cfg, root)}",
        "version": __version__,
        "folder": str(folder) if folder is not None else root.name,
        "results": results,
        "config": cfg,
        "inputs": _inputs(manifest, inputs),
        "packages": sorted(packages.items(), key=lambda kv: kv[0].lower()),
        "climates": climates,
        "compute": (manifest or {}).get("compute", ""),
        "timing": (manifest or {}).get("timing_s", {}),
        "warnings": ((manifest or {}).get("warnings") or {}).get("messages", []),
        "has_manifest": manifest is not None,
        "species": _model_section(root, diag, model_doc),
        "maps": maps_section(root, info, {f["file"] for f in overview.values() if f}),
        "community": community_section(root),
        "tables": tables,
        "zones": _zones_table(zdf),
        "zones_gpkg": (root / "zones.gpkg").is_file(),
        "cautions": CAUTIONS,
        "novel_rule": rule,
        "novel_rule_text": NOVEL_RULES.get(rule, rule),
        "max_novel": format_percent(max_novel) if math.isfinite(max_novel) else "",
        "min_agreement": format_percent(min_agree) if math.isfinite(min_agree) else "",
    }


def render_report(context: dict[str, Any]) -> str:
    from jinja2 import Environment, StrictUndefined, select_autoescape

    env = Environment(autoescape=select_autoescape(default=True, default_for_string=True), undefined=StrictUndefined,
                      trim_blocks=True, lstrip_blocks=True, keep_trailing_newline=True)
    template = env.from_string(files(__package__).joinpath(TEMPLATE).read_text(encoding="utf-8"))
    return template.render(**context)


def build_report(run_dir: str | Path, *, config: Path | None = None, inputs: Iterable[Path] = (),
                 folder: str | Path | None = None) -> Path:
    """Write ``run_dir/report.html`` (atomically) and return its path.

    ``config`` and ``inputs`` describe the run while its manifest is not written yet (``ceiling
    run`` builds the report just before the manifest); once ``manifest.json`` exists, it is the
    source of the config text, inputs, versions and checksums. ``folder`` is the run folder's
    name as the user gave it, shown in the header (default: ``run_dir``'s name).
    """
    root = Path(run_dir)
    path = root / REPORT_FILE
    ctx = report_context(root, config=config, inputs=inputs, folder=folder)
    embed(ctx)
    ctx["provenance"] = _provenance(root, _manifest(root), path)
    return atomic_write_text(path, render_report(ctx))
