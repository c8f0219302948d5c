"""The summary tables of the report, built from ``summary.csv`` (and any other table)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pandas as pd

from ..categories import ENSEMBLE_ZONES, ZONES
from ..outputs.names import ENSEMBLE
from .formatting import format_km2, format_percent, format_value, missing

__all__ = ["MAX_TABLE_ROWS", "read_csv", "cell", "row_key", "present_table", "future_table", "ensemble_table", "generic_table"]



MAX_TABLE_ROWS = 500  # longer optional tables (zones, community) are cut, saying so


def read_csv(path: Path) -> pd.DataFrame:
    if not path.is_file() or path.stat().st_size == 0:
        return pd.DataFrame()
    try:
        return pd.read_csv(path, keep_default_na=False, na_values=[""], dtype={"model": str, "scenario": str, "period": str})
    except pd.errors.EmptyDataError:
        return pd.DataFrame()


def cell(col: str, text: str, *, num: bool = True) -> dict[str, Any]:
    return {"col": col, "text": text, "num": num}


def row_key(r: Any) -> dict[str, str]:
    return {"species": str(r["species"]), "scenario": str(r["scenario"]),
            "model": "" if missing(r.get("model")) else str(r["model"]), "period": str(r["period"])}


def present_table(summary: pd.DataFrame, factors: dict[str, list[str]]) -> dict[str, Any] | None:
    rows = summary[summary["scenario"] == "present"]
    if rows.empty:
        return None
    allf = list(dict.fromkeys(f for fs in factors.values() for f in fs))
    head = ["species", "period", "area", "mean ceiling", "novel climate", "novel share",
            *[f"limited by {f}" for f in allf]]
    out = []
    for _, r in rows.iterrows():
        cells = [cell("species", str(r["species"]), num=False), cell("period", str(r["period"]), num=False),
                 cell("area_km2", format_km2(r.get("area_km2"))),
                 cell("mean_ceiling_now", format_value(r.get("mean_ceiling_now"))),
                 cell("area_km2_novel", format_km2(r.get("area_km2_novel"))),
                 cell("share_novel", format_percent(r.get("share_novel")))]
        cells += [cell(f"area_km2_limited_now_{f}", format_km2(r.get(f"area_km2_limited_now_{f}"))) for f in allf]
        out.append({"key": row_key(r), "cells": cells})
    return {"id": "table-present", "caption": "Present climate: area, mean ceiling (survey abundance units), "
            "novel climate and the area limited by each factor", "head": head, "rows": out}


def future_table(summary: pd.DataFrame) -> dict[str, Any] | None:
    rows = summary[(summary["scenario"] != "present") & (summary["model"] != ENSEMBLE)]
    if rows.empty:
        return None
    head = ["species", "scenario", "climate model", "period", *[z.name for z in ZONES], "novel share",
            "mean change", "median change"]
    out = []
    for _, r in rows.iterrows():
        area = r.get("area_km2")
        share = r.get("share_novel")
        if missing(share) and not missing(r.get("area_km2_novel")) and area:
            share = float(r["area_km2_novel"]) / float(area)
        cells = [cell("species", str(r["species"]), num=False), cell("scenario", str(r["scenario"]), num=False),
                 cell("model", str(r["model"]), num=False), cell("period", str(r["period"]), num=False)]
        cells += [cell(f"area_km2_{z.name}", format_km2(r.get(f"area_km2_{z.name}"))) for z in ZONES]
        cells += [cell("share_novel", format_percent(share)),
                  cell("mean_change", format_value(r.get("mean_change"))),
                  cell("median_change", format_value(r.get("median_change")))]
        out.append({"key": row_key(r), "cells": cells})
    return {"id": "table-futures", "caption": "Each scenario, climate model and period: area of each zone class, "
            "share of novel climate, and the area-weighted mean and median change of the ceiling "
            "(survey abundance units)", "head": head, "rows": out}


def ensemble_table(summary: pd.DataFrame) -> dict[str, Any] | None:
    rows = summary[summary["model"] == ENSEMBLE]
    if rows.empty:
        return None
    head = ["species", "scenario", "period", "climate models", *[z.name for z in ENSEMBLE_ZONES],
            "robust area", "robust share", "mean agreement"]
    out = []
    for _, r in rows.iterrows():
        area = r.get("area_km2")
        robust = r.get("area_km2_robust")
        share = float(robust) / float(area) if not missing(robust) and not missing(area) and float(area) else float("nan")
        n = r.get("n_models")
        cells = [cell("species", str(r["species"]), num=False), cell("scenario", str(r["scenario"]), num=False),
                 cell("period", str(r["period"]), num=False),
                 cell("n_models", "–" if missing(n) else f"{int(float(n))}")]
        cells += [cell(f"area_km2_{z.name}", format_km2(r.get(f"area_km2_{z.name}"))) for z in ENSEMBLE_ZONES]
        cells += [cell("area_km2_robust", format_km2(robust)), cell("share_robust", format_percent(share)),
                  cell("mean_agreement", format_percent(r.get("mean_agreement")))]
        out.append({"key": row_key(r), "cells": cells})
    return {"id": "table-ensemble", "caption": "Ensembles: area of each zone class, area where enough climate models "
            "agree on the sign of the change (robust), and the area-weighted mean agreement", "head": head, "rows": out}


def generic_table(df: pd.DataFrame, table_id: str, caption: str) -> dict[str, Any]:
    """Any table (zones.csv, community tables): numbers formatted by their column names."""
    out = []
    for _, r in df.iterrows():
        cells = []
        for c in df.columns:
            v = r[c]
            name = str(c).lower()
            if isinstance(v, str):
                cells.append(cell(str(c), v, num=False))
            elif missing(v):
                cells.append(cell(str(c), "–"))
            elif "km2" in name:
                cells.append(cell(str(c), format_km2(v)))
            elif "share" in name or name.startswith("p_") or "fraction" in name:
                cells.append(cell(str(c), format_percent(v)))
            elif "pct" in name or "percent" in name:
                cells.append(cell(str(c), "–" if missing(v) else f"{float(v):.1f} %"))
            elif isinstance(v, int | bool) or (isinstance(v, float) and v.is_integer() and abs(v) < 1e15):
                cells.append(cell(str(c), f"{int(v):,}" if not isinstance(v, bool) else str(v)))
            else:
                cells.append(cell(str(c), format_value(v)))
        out.append({"key": {}, "cells": cells})
    return {"id": table_id, "caption": caption, "head": [str(c) for c in df.columns], "rows": out}
