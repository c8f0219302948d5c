"""The report's opening section: what the run found, per species, from the run's own tables.

For each species: one compact table (scenario x period: area of release and of constraint, the
part of each that is robust across climate models, the share of novel climate), the main shift
of limiting factor in plain words, and, with zones, the zones ranked by the share of their area
in constraint. Every number carries its source (table file and column) in a ``title`` and a
``data-src`` attribute, and each table names its sources below it.

Across climate models the table shows the median of the climate-model rows of ``summary.csv``;
the robust part is the ensemble row (model ``ensemble``), whose release and constraint count
only the cells where enough climate models agree on the sign of the change.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any

import pandas as pd

from ..outputs.names import ENSEMBLE, SUMMARY_FILE, TRANSITIONS_FILE
from .formatting import format_km2, format_percent

__all__ = ["RunTables", "results_section", "last_period", "main_shift", "zone_ranking", "overview_table"]

ZONES_FILE = "zones.csv"
TOP_ZONES = 10  # zones listed in the ranking (the whole table is in zones.csv)


@dataclass(frozen=True)
class RunTables:
    """The tables of a run folder that the results section reads (empty frames when absent)."""

    summary: pd.DataFrame
    transitions: pd.DataFrame
    zones: pd.DataFrame
    labels: dict[str, dict[str, str]]  # species -> factor -> label (model.json)


def _year(period: str) -> float:
    m = re.search(r"\d{4}", str(period))
    return float(m.group()) if m else float("nan")


def last_period(periods: list[str]) -> str:
    """The latest period: by its first year when every period has one, else the last listed."""
    periods = list(dict.fromkeys(str(p) for p in periods))
    years = [_year(p) for p in periods]
    if periods and all(y == y for y in years):
        return max(zip(years, range(len(periods)), periods))[2]
    return periods[-1] if periods else ""


def _median(rows: pd.DataFrame, col: str) -> float:
    if col not in rows:
        return float("nan")
    v = pd.to_numeric(rows[col], errors="coerce").dropna()
    return float(v.median()) if len(v) else float("nan")


def _value(text: str, src: str, col: str) -> dict[str, str]:
    return {"text": text, "src": src, "col": col}


def _models_of(summary: pd.DataFrame, sp: str) -> pd.DataFrame:
    s = summary[(summary["species"] == sp) & (summary["scenario"] != "present")]
    return s[s["model"].astype(str) != ENSEMBLE]


def _overview_row(models: pd.DataFrame, ens: pd.DataFrame, n: int) -> list[dict[str, str]]:
    """The cells of one scenario and period: release, robust release, constraint, robust
    constraint (km2) and the share of novel climate."""
    med = f"{SUMMARY_FILE}: {{}}, median of {n} climate-model row{'s' if n != 1 else ''}"
    rob = f"{SUMMARY_FILE}: {{}}, row of model '{ENSEMBLE}' (robust cells only)"
    e = ens.iloc[0] if len(ens) else None
    cells = []
    for zone in ("release", "constraint"):
        col = f"area_km2_{zone}"
        cells.append(_value(format_km2(_median(models, col)), med.format(col), col))
        robust = format_km2(e.get(col)) if e is not None else "–"
        cells.append(_value(robust, rob.format(col) if e is not None else "no ensemble (fewer than two climate models)",
                            f"robust_{col}"))
    cells.append(_value(format_percent(_median(models, "share_novel")), med.format("share_novel"), "share_novel"))
    return cells


def overview_table(summary: pd.DataFrame, sp: str) -> dict[str, Any] | None:
    """Scenario x period for one species (see the module's docstring)."""
    models = _models_of(summary, sp)
    if models.empty:
        return None
    ens_all = summary[(summary["species"] == sp) & (summary["model"].astype(str) == ENSEMBLE)]
    rows = []
    for (scenario, period), m in models.groupby(["scenario", "period"], sort=False):
        ens = ens_all[(ens_all["scenario"] == scenario) & (ens_all["period"] == period)]
        n = int(m["model"].nunique())
        rows.append({"scenario": str(scenario), "period": str(period), "n": n, "cells": _overview_row(m, ens, n)})
    return {"rows": rows,
            "head": [("release", "median of the models"), ("robust release", "ensemble"),
                     ("constraint", "median of the models"), ("robust constraint", "ensemble"),
                     ("novel climate", "median of the models")]}


def _label(labels: dict[str, str], factor: str) -> str:
    """'yearly rainfall total (precip)' from the factor's label in model.json, else its name."""
    text = labels.get(factor, "").strip()
    return f"{text[:1].lower()}{text[1:]} ({factor})" if text else factor


def main_shift(transitions: pd.DataFrame, sp: str, labels: dict[str, str]) -> list[dict[str, Any]]:
    """Per scenario, at the last period: the largest move of area from one limiting factor to
    another (median over climate models), as a share of the area that factor limits now."""
    t = transitions[transitions["species"] == sp] if not transitions.empty else transitions
    if t.empty:
        return []
    t = t.assign(area_km2=pd.to_numeric(t["area_km2"], errors="coerce").fillna(0.0))
    out = []
    for scenario, ts in t.groupby("scenario", sort=False):
        period = last_period(list(ts["period"]))
        tp = ts[ts["period"] == period]
        now = tp.groupby(["model", "limiting_now"])["area_km2"].transform("sum")
        moved = tp.assign(share=tp["area_km2"] / now.where(now > 0))
        moved = moved[moved["limiting_now"] != moved["limiting_later"]]
        if moved.empty:
            continue
        pairs = moved.groupby(["limiting_now", "limiting_later"], sort=False).agg(
            area=("area_km2", "median"), share=("share", "median"), n=("model", "nunique"))
        (frm, to), top = pairs["area"].idxmax(), pairs.loc[pairs["area"].idxmax()]
        if not top["area"] > 0:
            continue
        out.append({"scenario": str(scenario), "period": period, "share": format_percent(top["share"]),
                    "from": _label(labels, str(frm)), "to": _label(labels, str(to)), "area": format_km2(top["area"]),
                    "n": int(top["n"]),
                    "src": f"{TRANSITIONS_FILE}: area_km2 of the rows limiting_now = {frm}, limiting_later = {to}, "
                           f"divided by the area with limiting_now = {frm}; median of {int(top['n'])} climate models"})
    return out


def _zone_rows(zones: pd.DataFrame, sp: str, scenario: str, period: str) -> tuple[pd.DataFrame, str]:
    z = zones[(zones["species"] == sp) & (zones["scenario"] == scenario) & (zones["period"] == period)]
    ens = z[z["model"].astype(str) == ENSEMBLE]
    if len(ens):
        return ens, f"model '{ENSEMBLE}' (robust cells only)"
    z = z[~z["model"].astype(str).isin(["", "nan"])]
    n = z["model"].nunique()
    grouped = z.groupby("zone_id", sort=False)[["area_km2", "area_km2_constraint", "area_km2_release"]].median()
    return grouped.reset_index(), f"median of {n} climate-model rows"


def zone_ranking(zones: pd.DataFrame, sp: str) -> list[dict[str, Any]]:
    """Per scenario at the last period, the zones by the share of their area (with data) in
    constraint, largest first (at most TOP_ZONES)."""
    need = {"zone_id", "species", "scenario", "model", "period", "area_km2", "area_km2_constraint", "area_km2_release"}
    if zones.empty or not need <= set(zones.columns):
        return []
    z = zones[(zones["species"] == sp) & (zones["scenario"] != "present")]
    out = []
    for scenario, zs in z.groupby("scenario", sort=False):
        period = last_period(list(zs["period"]))
        rows, how = _zone_rows(zones, sp, str(scenario), period)
        area = pd.to_numeric(rows["area_km2"], errors="coerce")
        rows = rows.assign(share_c=pd.to_numeric(rows["area_km2_constraint"], errors="coerce") / area.where(area > 0),
                           share_r=pd.to_numeric(rows["area_km2_release"], errors="coerce") / area.where(area > 0))
        rows = rows.sort_values("share_c", ascending=False, kind="stable").head(TOP_ZONES)
        src = f"{ZONES_FILE}: area_km2_{{}} / area_km2, {how}"
        out.append({"scenario": str(scenario), "period": period, "total": int(z["zone_id"].nunique()),
                    "src_constraint": src.format("constraint"), "src_release": src.format("release"),
                    "rows": [{"zone": str(r["zone_id"]), "constraint": format_percent(r["share_c"]),
                              "release": format_percent(r["share_r"])} for _, r in rows.iterrows()]})
    return out


def results_section(tables: RunTables, overview: dict[str, Any]) -> list[dict[str, Any]]:
    """One block per species: its table, main shifts of limiting factor, zone ranking and the
    overview figure given for it (``overview``: species -> figure or None)."""
    species = list(dict.fromkeys(tables.summary["species"].astype(str))) if "species" in tables.summary else []
    out = []
    for sp in species:
        out.append({"name": sp, "table": overview_table(tables.summary, sp), "figure": overview.get(sp),
                    "shifts": main_shift(tables.transitions, sp, tables.labels.get(sp, {})),
                    "zones": zone_ranking(tables.zones, sp)})
    return out

