"""Map figures of a run folder (matplotlib, Agg backend): PNG at print resolution, SVG on request.

Every figure is built from the files of a run folder (the GeoTIFFs, ``summary.csv``,
``transitions.csv``, ``model.json``), so it can be remade at any time with
:func:`make_figures`. Figures written, all under ``figures/``:

- a map sheet per species and climate (:func:`climate_sheet_name`): the present (ceiling,
  limiting factor, similarity), each scenario / climate model / period (ceiling, change, zone,
  limiting factor, similarity) and each ensemble (median ceiling, median change with the cells of
  low agreement hatched, zone, most common limiting factor, agreement); novel-climate
  (extrapolated) cells are hatched on the similarity maps;
- comparison sheets (:func:`comparison_sheet_name`): scenarios across, periods down, one sheet
  per climate model and one for the ensemble, with one shared colour bar or legend (change and
  zone; with bootstrap layers also the probabilities of release and of constraint);
- with bootstrap layers, the bounds of the present ceiling (:func:`uncertainty_sheet_name`);
- limiting-factor figures (:func:`limiting_figure_name`): the area limited by each factor now
  and under each climate (stacked bars), and the present-to-future transition matrices with the
  areas written in the cells (both from ``transitions.csv``);
- a sheet of the community layers per climate when the run has ``community/``.

Conventions: north up; axes in the grid's CRS units (degrees with a graticule for geographic
grids); nodata drawn as a neutral grey background inside a darker outline of the valid cells;
continuous colour maps perceptually uniform (viridis, cividis) or diverging and colour-blind
readable (RdBu for change, centred on zero with symmetric limits shared by every climate of a
species; PRGn for similarity); categorical colours from :mod:`ceiling.categories`, the same as
in the GeoTIFF colour tables. Big grids are read decimated (at most :data:`MAX_SIDE` cells
along the longer side, through the GeoTIFF overviews), so figures of huge grids stay cheap.
Figures have fixed sizes in inches (a whole number of pixels at :data:`DPI`); no layout engine.
"""

from __future__ import annotations

import functools
import json
import math
import multiprocessing
import os
import warnings
import weakref
from collections.abc import Callable, Iterable, Sequence
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import matplotlib

matplotlib.use("Agg")
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
import rasterio  # noqa: E402
from matplotlib import colors as mcolors  # noqa: E402
from matplotlib import ticker  # noqa: E402
from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.patches import Patch  # noqa: E402
from rasterio.enums import Resampling  # noqa: E402

from .categories import (  # noqa: E402
    NODATA_GREY,
    Category,
    factor_categories,
    layer_categories,
)
from .outputs.atomic import atomic_path  # noqa: E402
from .outputs.names import (  # noqa: E402
    DIAGNOSTICS_FILE,
    ENSEMBLE,
    FIGURES_DIR,
    MODEL_FILE,
    SUMMARY_FILE,
    TRANSITIONS_FILE,
    climate_dir,
    safe_part,
)
from .processes import parent_gone, worker_init  # noqa: E402

__all__ = [
    "DPI", "MAX_SIDE", "MapLayer", "RunInfo", "read_layer", "run_info", "species_limits",
    "climate_sheet", "uncertainty_sheet", "comparison_sheet", "limiting_area_figure", "switch_matrix_figure",
    "community_sheet", "save_figure", "make_figures", "figure_tasks", "legend_labels", "climate_title",
    "climate_sheet_name", "uncertainty_sheet_name", "comparison_sheet_name", "limiting_figure_name",
    "community_figure_name", "PRESENT_PANELS", "FUTURE_PANELS", "ENSEMBLE_PANELS", "UNCERTAINTY_PANELS",
    "COMPARED_PROBABILITIES", "TITLES", "NOVEL_HATCH_LABEL", "LOW_AGREEMENT_LABEL", "COMMUNITY_SCALES",
]

DPI = 200
MAX_SIDE = 1000  # cells read along the longer side of a grid; bigger grids are read decimated
NODATA_BG = NODATA_GREY  # apart from every class colour and the light ends of the scales (categories.py)
OUTLINE = "#636363"
GRATICULE = "#8c8c8c"
HATCH_COLOUR = "#252525"
HATCH = "//////"
CMAP_CEILING = "viridis"
CMAP_CHANGE = "RdBu"  # red: the ceiling falls, blue: it rises (as constraint/release in the zone colours)
CMAP_SIMILARITY = "PRGn"  # purple: novel climate (as the 'novel climate' class), green: familiar
CMAP_SHARE = "cividis"

PRESENT_PANELS = ("ceiling", "limiting", "similarity")
FUTURE_PANELS = ("ceiling", "change", "zone", "limiting", "similarity")
ENSEMBLE_PANELS = ("median_ceiling", "median_change", "zone", "limiting", "agreement")
UNCERTAINTY_PANELS = ("ceiling_lower", "ceiling_upper", "change_lower", "change_upper", "p_release", "p_constraint")
COMPARED_PROBABILITIES = ("p_release", "p_constraint")  # bootstrap layers drawn on comparison sheets
CEILING_LIKE = ("ceiling", "median_ceiling", "mean_ceiling", "ceiling_lower", "ceiling_upper")
CHANGE_LIKE = ("change", "median_change", "mean_change", "change_lower", "change_upper", "change_min", "change_max")
SHARE_LIKE = ("agreement", "limiting_share", "p_release", "p_constraint")
CATEGORICAL = ("zone", "limiting", "least_similar", "extrapolated", "robustness", "switch")

TITLES = {
    "ceiling": "Potential maximum abundance (ceiling)",
    "change": "Change of the ceiling",
    "zone": "Zone of change",
    "limiting": "Limiting factor",
    "similarity": "Climate similarity to the survey (MESS)",
    "least_similar": "Least similar factor",
    "median_ceiling": "Ceiling, median of the climate models",
    "mean_ceiling": "Ceiling, mean of the climate models",
    "median_change": "Change, median of the climate models",
    "mean_change": "Change, mean of the climate models",
    "agreement": "Share of climate models agreeing on the sign",
    "limiting_share": "Share of climate models naming the limiting factor",
    "ceiling_lower": "Ceiling, lower bootstrap bound",
    "ceiling_upper": "Ceiling, upper bootstrap bound",
    "change_lower": "Change, lower bootstrap bound",
    "change_upper": "Change, upper bootstrap bound",
    "p_release": "Probability of release",
    "p_constraint": "Probability of constraint",
}
SCALE_LABELS = {
    **{n: "abundance (survey units)" for n in CEILING_LIKE + CHANGE_LIKE},
    "similarity": "MESS (%); below 0: novel climate",
    "agreement": "share of climate models",
    "limiting_share": "share of climate models",
    "p_release": "share of bootstrap replicates",
    "p_constraint": "share of bootstrap replicates",
}
LEGEND_TITLES = {"zone": "zone class", "limiting": "limiting factor", "least_similar": "least similar factor",
                 "extrapolated": "climate", "robustness": "agreement"}
NOVEL_HATCH_LABEL = "novel climate (outside the survey's range)"
LOW_AGREEMENT_LABEL = "low agreement between climate models"
CAUTION = "A ceiling is a potential upper limit of abundance, not a forecast."
STYLE = {"hatch.linewidth": 0.35, "hatch.color": HATCH_COLOUR, "font.size": 7, "svg.fonttype": "none",
         "axes.unicode_minus": True, "svg.hashsalt": "ceiling"}


def _styled(fn: Callable[..., Any]) -> Callable[..., Any]:
    """Build (and save) figures under the module's style, whatever the caller's rcParams."""

    @functools.wraps(fn)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        with matplotlib.rc_context(STYLE):
            return fn(*args, **kwargs)

    return wrapper


# --- names -------------------------------------------------------------------------------------------

def climate_sheet_name(species: str, key: tuple[str, str, str], fmt: str = "png") -> Path:
    """``figures/{species}/present/maps.png``, ``figures/{species}/{scenario}/{model}/{period}/maps.png``."""
    return Path(FIGURES_DIR) / climate_dir(species, *key) / f"maps.{fmt}"


def uncertainty_sheet_name(species: str, key: tuple[str, str, str], fmt: str = "png") -> Path:
    return Path(FIGURES_DIR) / climate_dir(species, *key) / f"uncertainty.{fmt}"


def comparison_sheet_name(species: str, model: str, layer: str, fmt: str = "png") -> Path:
    """``figures/{species}/compare_{layer}_{model}.png`` (model ``ensemble`` for the ensemble)."""
    return Path(FIGURES_DIR) / safe_part(species) / f"compare_{safe_part(layer)}_{safe_part(model)}.{fmt}"


def limiting_figure_name(species: str, kind: str, fmt: str = "png") -> Path:
    """``figures/{species}/limiting_areas.png`` (bars) or ``figures/{species}/limiting_switch.png`` (matrices)."""
    return Path(FIGURES_DIR) / safe_part(species) / f"limiting_{safe_part(kind)}.{fmt}"


def community_figure_name(rel: Path, fmt: str = "png") -> Path:
    """``figures/community/present/maps.png``, ``figures/community/{scenario}/{model}/{period}/maps.png``
    for the folder ``rel`` (``community/...``) of community layers."""
    return Path(FIGURES_DIR) / rel / f"maps.{fmt}"


# --- what a run folder holds ---------------------------------------------------------------------------

@dataclass(frozen=True)
class RunInfo:
    """The species, their factors and climates of a run folder, read from its tables."""

    root: Path
    species: tuple[str, ...]
    factors: dict[str, tuple[str, ...]]
    factor_labels: dict[str, dict[str, str]]
    climates: dict[str, tuple[tuple[str, str, str], ...]]  # per species, in summary order

    def present(self, species: str) -> tuple[str, str, str] | None:
        return next((k for k in self.climates[species] if k[0] == "present"), None)

    def futures(self, species: str) -> list[tuple[str, str, str]]:
        return [k for k in self.climates[species] if k[0] != "present" and k[1] != ENSEMBLE]

    def ensembles(self, species: str) -> list[tuple[str, str, str]]:
        return [k for k in self.climates[species] if k[0] != "present" and k[1] == ENSEMBLE]

    def path(self, species: str, key: tuple[str, str, str], layer: str) -> Path:
        return self.root / climate_dir(species, *key) / f"{layer}.tif"

    def has(self, species: str, key: tuple[str, str, str], layer: str) -> bool:
        return self.path(species, key, layer).is_file()

    def categories(self, species: str, layer: str, *, ensemble: bool = False) -> tuple[Category, ...] | None:
        """The category table of a layer: the same tables the GeoTIFF writer uses."""
        if layer == "switch":  # drawn from the transition table, not as a categorical map
            return None
        return layer_categories(layer, list(self.factors[species]), ensemble=ensemble)


def run_info(run_dir: str | Path) -> RunInfo:
    root = Path(run_dir)
    summary = pd.read_csv(root / SUMMARY_FILE, dtype=str, keep_default_na=False)
    species = tuple(dict.fromkeys(summary["species"]))
    climates = {}
    for sp in species:
        rows = summary[summary["species"] == sp]
        climates[sp] = tuple(dict.fromkeys((r.scenario, r.model, r.period) for r in rows.itertuples()))
    factors: dict[str, tuple[str, ...]] = {}
    labels: dict[str, dict[str, str]] = {}
    model_file = root / MODEL_FILE
    if model_file.is_file():
        # the factors in each species' minimum, in the order of the limiting-factor codes (the
        # order the GeoTIFF writer used); screened-out factors are not among them
        doc = json.loads(model_file.read_text(encoding="utf-8"))
        for sp, m in doc.get("species", {}).items():
            kept = [f for f in m["factors"] if f.get("in_minimum", True)]
            factors[sp] = tuple(f["name"] for f in kept)
            labels[sp] = {f["name"]: f.get("label") or f["name"] for f in m["factors"]}
    elif (root / DIAGNOSTICS_FILE).is_file():
        diag = pd.read_csv(root / DIAGNOSTICS_FILE, dtype=str, keep_default_na=False)
        for sp in species:
            factors[sp] = tuple(diag.loc[diag["species"] == sp, "factor"])
    for sp in species:  # last resort: the summary's per-factor columns
        if sp not in factors:
            factors[sp] = tuple(c[len("area_km2_limited_now_"):] for c in summary.columns if c.startswith("area_km2_limited_now_"))
        labels.setdefault(sp, {f: f for f in factors[sp]})
    return RunInfo(root, species, factors, labels, climates)


# --- reading ---------------------------------------------------------------------------------------------

@dataclass
class MapLayer:
    """A layer read for drawing: values (masked where nodata), extent and CRS."""

    data: np.ma.MaskedArray
    extent: tuple[float, float, float, float]  # left, right, bottom, top
    crs: Any
    full_shape: tuple[int, int]

    @property
    def valid(self) -> np.ndarray:
        return ~np.ma.getmaskarray(self.data)


def read_layer(path: str | Path, *, categorical: bool = False, max_side: int = MAX_SIDE) -> MapLayer:
    """Read band 1, decimated so that neither side exceeds ``max_side`` cells (GDAL picks the
    overview; nearest for categories, average for values)."""
    with rasterio.open(path) as src:
        h, w = src.height, src.width
        f = max(1.0, max(h, w) / max_side)
        shape = (max(1, round(h / f)), max(1, round(w / f)))
        resampling = Resampling.nearest if categorical else Resampling.average
        a = src.read(1, out_shape=shape, masked=True, resampling=resampling)
        b = src.bounds
        crs = src.crs
    if not categorical:
        a = np.ma.masked_invalid(a.astype(np.float64))
    return MapLayer(a, (b.left, b.right, b.bottom, b.top), crs, (h, w))


def _finite(layer: MapLayer) -> np.ndarray:
    return np.ma.compressed(layer.data)


def _nice_up(v: float) -> float:
    """The smallest of 1, 1.2, 1.5, 2, 2.5, 3, 4, 5, 6, 8, 10 x 10^k at or above ``v``."""
    if not np.isfinite(v) or v <= 0:
        return 1.0
    e = math.floor(math.log10(v))
    for m in (1, 1.2, 1.5, 2, 2.5, 3, 4, 5, 6, 8, 10):
        if m * 10**e >= v * (1 - 1e-12):
            return float(m * 10**e)
    return float(10 ** (e + 1))


@dataclass(frozen=True)
class Limits:
    """Colour limits shared by every climate of one species, so that panels compare fairly."""

    ceiling: float
    change: float
    similarity_low: float
    similarity_high: float


def species_limits(info: RunInfo, species: str) -> Limits:
    """The colour limits of the layers drawn for a species, over all its climates."""
    ceil_max, change_max, nov_min, nov_max = 0.0, 0.0, 0.0, 0.0
    for key in info.climates[species]:
        drawn = ("ceiling", "median_ceiling", "change", "median_change", "similarity")
        if key[0] == "present":
            drawn += ("ceiling_lower", "ceiling_upper")  # the present's uncertainty sheet
        for layer in drawn:
            if not info.has(species, key, layer):
                continue
            v = _finite(read_layer(info.path(species, key, layer)))
            if v.size == 0:
                continue
            if layer in CEILING_LIKE:
                ceil_max = max(ceil_max, float(v.max()))
            elif layer in CHANGE_LIKE:
                change_max = max(change_max, float(np.abs(v).max()))
            else:
                nov_min, nov_max = min(nov_min, float(v.min())), max(nov_max, float(v.max()))
    high = _nice_up(nov_max) if nov_max > 0 else 100.0
    low = _nice_up(-nov_min) if nov_min < 0 else high
    return Limits(_nice_up(ceil_max), _nice_up(change_max), -low, high)


# --- drawing helpers ---------------------------------------------------------------------------------------

def _new_figure(width: float, height: float) -> Figure:
    fig = Figure(figsize=(width, height), dpi=DPI)
    FigureCanvasAgg(fig)
    return fig


def _round_in(v: float) -> float:
    """Inches rounded up to 1/20: with DPI 200 every figure is a whole number of pixels."""
    return math.ceil(v * 20 - 1e-9) / 20


def _map_ratio(layer_extent: tuple[float, float, float, float], crs: Any) -> tuple[float, float]:
    """(height/width of the drawn map, y-axis aspect)."""
    left, right, bottom, top = layer_extent
    aspect = 1.0
    if crs is not None and crs.is_geographic:
        mid = math.radians(0.5 * (top + bottom))
        aspect = 1.0 / max(math.cos(mid), 0.2)
    w = max(right - left, 1e-12)
    return min(max((top - bottom) * aspect / w, 0.3), 2.5), aspect


def _lon(v: float, _pos: Any = None) -> str:
    v = round(v, 6)
    return f"{abs(v):g}°{'E' if v > 0 else 'W' if v < 0 else ''}"


def _lat(v: float, _pos: Any = None) -> str:
    v = round(v, 6)
    return f"{abs(v):g}°{'N' if v > 0 else 'S' if v < 0 else ''}"


def _style_axes(ax: Any, layer: MapLayer, aspect: float, *, labels: bool = True, xlabels: bool = True,
                ylabels: bool = True) -> list[Any]:
    """Limits, aspect, ticks in CRS units and a graticule at the ticks; returns the artists drawn
    over the map (graticule and frame)."""
    left, right, bottom, top = layer.extent
    ax.set_xlim(left, right)
    ax.set_ylim(bottom, top)
    ax.set_aspect(aspect, adjustable="box", anchor="C")
    ax.set_facecolor(NODATA_BG)
    steps = [1, 2, 2.5, 5, 10]
    xt = [v for v in ticker.MaxNLocator(4, steps=steps).tick_values(left, right) if left <= v <= right]
    yt = [v for v in ticker.MaxNLocator(4, steps=steps).tick_values(bottom, top) if bottom <= v <= top]
    ax.set_xticks(xt)
    ax.set_yticks(yt)
    ax.tick_params(labelsize=6, length=2, pad=1.5, labelbottom=xlabels, labelleft=ylabels)
    grid = dict(colors=GRATICULE, linewidths=0.35, linestyles=(0, (2, 2)), zorder=2.5)
    graticule = [ax.vlines(xt, bottom, top, **grid), ax.hlines(yt, left, right, **grid)]
    for g in graticule:
        g.set_gid("graticule")
    crs = layer.crs
    if crs is not None and crs.is_geographic:
        ax.xaxis.set_major_formatter(ticker.FuncFormatter(_lon))
        ax.yaxis.set_major_formatter(ticker.FuncFormatter(_lat))
    elif crs is not None:
        unit = (crs.linear_units or "unit").lower()
        span = max(right - left, top - bottom)
        if unit in ("metre", "meter", "m") and span > 20_000:
            ax.xaxis.set_major_formatter(ticker.FuncFormatter(lambda v, _p: f"{v / 1000:g}"))
            ax.yaxis.set_major_formatter(ticker.FuncFormatter(lambda v, _p: f"{v / 1000:g}"))
            unit = "km"
        elif unit in ("metre", "meter"):
            unit = "m"
        if labels and xlabels:
            ax.set_xlabel(f"easting ({unit})", fontsize=6, labelpad=1)
        if labels and ylabels:
            ax.set_ylabel(f"northing ({unit})", fontsize=6, labelpad=1)
    for s in ax.spines.values():
        s.set_linewidth(0.5)
        s.set_color("#525252")
    return [*graticule, *ax.spines.values()]


def _centres(layer: MapLayer) -> tuple[np.ndarray, np.ndarray]:
    left, right, bottom, top = layer.extent
    h, w = layer.data.shape
    x = left + (np.arange(w) + 0.5) * (right - left) / w
    y = top - (np.arange(h) + 0.5) * (top - bottom) / h
    return x, y


def _outline(ax: Any, layer: MapLayer) -> Any:
    """A thin grey line around the valid cells (contour lines straight from contourpy: cheap)."""
    valid = layer.valid
    if valid.all() or not valid.any():
        return None
    import contourpy
    from matplotlib.collections import LineCollection

    x, y = _centres(layer)
    lines = contourpy.contour_generator(x, y, valid.astype(np.float64), line_type="Separate").lines(0.5)
    return ax.add_collection(LineCollection(lines, colors=OUTLINE, linewidths=0.45, zorder=2), autolim=False)


def _hatch(ax: Any, layer: MapLayer, mask: np.ndarray) -> list[Any]:
    """Hatch (and outline) the cells where ``mask`` is true; the artists drawn (none without such cells)."""
    if not mask.any():
        return []
    x, y = _centres(layer)
    m = mask.astype(np.float32)
    cs = ax.contourf(x, y, m, levels=[0.5, 1.5], colors="none", hatches=[HATCH])
    cs.set_edgecolor(HATCH_COLOUR)
    cs.set_linewidth(0)
    return [cs, ax.contour(x, y, m, levels=[0.5], colors=HATCH_COLOUR, linewidths=0.4)]


def _north_arrow(ax: Any) -> Any:
    return ax.annotate("N", xy=(0.93, 0.97), xytext=(0.93, 0.80), xycoords="axes fraction", ha="center", va="center",
                fontsize=6, fontweight="bold", arrowprops=dict(arrowstyle="-|>", lw=0.7, color="#252525",
                                                               shrinkA=4, shrinkB=0, mutation_scale=6))


def _rgba(codes: np.ma.MaskedArray, cats: Sequence[Category]) -> np.ndarray:
    lut = np.zeros((256, 4), dtype=np.float32)  # codes outside the table and nodata: transparent
    for c in cats:
        lut[c.code] = mcolors.to_rgba(c.colour)
    idx = np.ma.filled(codes, 255).astype(np.int64).clip(0, 255)
    return lut[idx]


def _hatch_handle(label: str) -> Patch:
    return Patch(facecolor="none", edgecolor=HATCH_COLOUR, hatch=HATCH, linewidth=0.4, label=label)


def _category_handles(cats: Sequence[Category], labels: dict[str, str] | None = None) -> list[Patch]:
    return [Patch(facecolor=c.colour, edgecolor="#737373", linewidth=0.3, label=(labels or {}).get(c.name, c.name))
            for c in cats]


def _nodata_handle() -> Patch:
    return Patch(facecolor=NODATA_BG, edgecolor=OUTLINE, linewidth=0.4, label="no data")


def _norm_for(layer: str, limits: Limits) -> tuple[str, mcolors.Normalize]:
    if layer in CEILING_LIKE:
        return CMAP_CEILING, mcolors.Normalize(0.0, limits.ceiling)
    if layer in CHANGE_LIKE:
        return CMAP_CHANGE, mcolors.Normalize(-limits.change, limits.change)
    if layer == "similarity":
        return CMAP_SIMILARITY, mcolors.TwoSlopeNorm(0.0, limits.similarity_low, limits.similarity_high)
    if layer in SHARE_LIKE:
        return CMAP_SHARE, mcolors.Normalize(0.0, 1.0)
    return CMAP_CEILING, mcolors.Normalize()


@dataclass
class _Panel:
    """What one map panel needs: the layer, how to colour it, and what to hatch."""

    name: str
    layer: MapLayer
    categories: tuple[Category, ...] | None = None
    hatch: np.ndarray | None = None
    hatch_label: str = ""
    title: str = ""
    cmap: str | None = None  # colour map and norm when not the layer's usual ones (community layers)
    norm: Any = None
    scale: str | None = None


def _load_panel(info: RunInfo, species: str, key: tuple[str, str, str], layer: str) -> _Panel | None:
    if not info.has(species, key, layer):
        return None
    ensemble = key[1] == ENSEMBLE
    cats = info.categories(species, layer, ensemble=ensemble)
    ml = read_layer(info.path(species, key, layer), categorical=layer in CATEGORICAL)
    p = _Panel(layer, ml, cats, title=TITLES.get(layer, layer.replace("_", " ")))
    if layer == "similarity" and info.has(species, key, "extrapolated"):
        ex = read_layer(info.path(species, key, "extrapolated"), categorical=True, max_side=max(ml.data.shape))
        if ex.data.shape == ml.data.shape:
            p.hatch, p.hatch_label = np.ma.filled(ex.data, 0) == 1, NOVEL_HATCH_LABEL
    if layer in ("median_change", "mean_change") and info.has(species, key, "robustness"):
        rb = read_layer(info.path(species, key, "robustness"), categorical=True, max_side=max(ml.data.shape))
        if rb.data.shape == ml.data.shape:
            p.hatch, p.hatch_label = np.ma.filled(rb.data, 1) == 0, LOW_AGREEMENT_LABEL
    return p


def _draw_panel(ax: Any, p: _Panel, limits: Limits, aspect: float, acc: _Layers, *, xlabels: bool = True,
                ylabels: bool = True) -> Any:
    """Draw the map; returns the image (continuous) for a colour bar, or None (categorical)."""
    on_top = _style_axes(ax, p.layer, aspect, xlabels=xlabels, ylabels=ylabels)
    im = None
    if p.categories is not None:
        shown = ax.imshow(_rgba(p.layer.data, p.categories), extent=p.layer.extent, origin="upper",
                          interpolation="nearest", aspect=aspect, zorder=1)
    else:
        cmap_name, norm = (p.cmap, p.norm) if p.norm is not None else _norm_for(p.name, limits)
        cmap = matplotlib.colormaps[cmap_name or CMAP_CEILING].with_extremes(bad=(0, 0, 0, 0))
        im = shown = ax.imshow(p.layer.data, cmap=cmap, norm=norm, extent=p.layer.extent, origin="upper",
                               interpolation="nearest", aspect=aspect, zorder=1)
    acc.map_axes.append(ax)
    acc.dynamic(shown, _outline(ax, p.layer), *(_hatch(ax, p.layer, p.hatch) if p.hatch is not None else []))
    acc.dynamic(*on_top)
    ax.set_title(p.title, fontsize=7.5, pad=3)
    return im


def _side_key(fig: Figure, ax: Any, rect: Sequence[float], p: _Panel, im: Any, acc: _Layers) -> None:
    """A colour bar, or a legend of the classes, in the strip to the right of a panel."""
    x, y, w, h = rect
    hatch = [_hatch_handle(p.hatch_label)] if p.hatch is not None and p.hatch.any() else []
    if im is not None:
        cax = fig.add_axes((x, y + 0.16 * h, w * 0.11, 0.68 * h))
        cb = fig.colorbar(im, cax=cax)
        cb.ax.yaxis.set_major_locator(ticker.MaxNLocator(5, integer=isinstance(p.norm, mcolors.BoundaryNorm)))
        cb.ax.tick_params(labelsize=5.5, length=2, pad=1)
        cb.outline.set_linewidth(0.4)
        cb.set_label(p.scale if p.scale is not None else SCALE_LABELS.get(p.name, ""), fontsize=5.5, labelpad=2)
        if hatch:
            acc.dynamic(ax.legend(handles=hatch, loc="upper left", bbox_to_anchor=(0.0, -0.04), fontsize=5.5,
                                  frameon=False, handlelength=1.4, borderaxespad=0.0))
    else:
        handles = _category_handles(p.categories or ())
        leg = ax.legend(handles=[*handles, _nodata_handle(), *hatch], title=LEGEND_TITLES.get(p.name, p.name),
                        title_fontsize=6, fontsize=5.5, loc="center left", bbox_to_anchor=(1.03, 0.5), frameon=False,
                        handlelength=1.2, handleheight=0.9, borderaxespad=0.0, labelspacing=0.35)
        if hatch:  # the classes are the same for every climate; the hatch entry is not
            acc.dynamic(leg)


def _norm_sig(norm: Any) -> tuple[Any, ...] | None:
    if norm is None:
        return None
    extra = tuple(np.asarray(norm.boundaries).tolist()) if isinstance(norm, mcolors.BoundaryNorm) else ()
    return (type(norm).__name__, norm.vmin, norm.vmax, getattr(norm, "vcenter", None), extra)


def _panel_sig(p: _Panel) -> tuple[Any, ...]:
    """What the static parts of a panel depend on (its frame, ticks, title, colour bar or legend)."""
    return (p.name, p.title, p.categories, p.cmap, _norm_sig(p.norm), p.scale)


def _layer_sig(layer: MapLayer) -> tuple[Any, ...]:
    return (layer.extent, layer.data.shape, layer.crs.to_wkt() if layer.crs is not None else None)


class _Layers:
    """The parts of a map sheet that change from climate to climate (maps, outlines, hatching,
    titles, notes) apart from the static ones (frames, ticks, colour bars, class legends).

    The static parts of sheets with the same ``key`` are identical, so a worker draws them once
    and then, for each sheet, draws only the changing parts over a copy of that background, in
    the order of a full draw: the same pixels in about half the time. What lies over the maps
    (graticule, frame, north arrow) is drawn with the changing parts."""

    def __init__(self, key: tuple[Any, ...]):
        self.key = (key, _rc_fingerprint())
        self.map_axes: list[Any] = []
        self.order: list[Any] = []
        self.changing: list[Any] = []

    def dynamic(self, *artists: Any) -> None:
        for a in artists:
            if a is not None:
                self.order.append(a)
                self.changing.append(a)

    def attach(self, fig: Figure) -> None:
        _LAYERS[fig] = self


def _rc_fingerprint() -> int:
    """The matplotlib settings in force (fonts, colours, line widths): part of every background key."""
    return hash(repr(sorted((k, repr(v)) for k, v in matplotlib.rcParams.items())))


_LAYERS: weakref.WeakKeyDictionary = weakref.WeakKeyDictionary()
_BACKGROUNDS: dict[tuple[Any, ...], Any] = {}  # per process: key -> pixels of the static parts
_MAX_BACKGROUNDS = 6


def _render(fig: Figure) -> None:
    """Draw ``fig`` on its Agg canvas (over a cached background of its static parts when it has one)."""
    canvas = fig.canvas
    layers = _LAYERS.get(fig)
    if layers is None:
        canvas.draw()
        return
    for ax in layers.map_axes:
        ax.apply_aspect()
    background = _BACKGROUNDS.get(layers.key)
    if background is None:
        for a in layers.changing:
            a.set_animated(True)  # left out of the full draw
        try:
            canvas.draw()
        finally:
            for a in layers.changing:
                a.set_animated(False)
        background = canvas.copy_from_bbox(fig.bbox)
        while len(_BACKGROUNDS) >= _MAX_BACKGROUNDS:
            _BACKGROUNDS.pop(next(iter(_BACKGROUNDS)))
        _BACKGROUNDS[layers.key] = background
    else:
        canvas.restore_region(background)
    renderer = canvas.get_renderer()
    for a in layers.order:
        a.draw(renderer)


class _Grid:
    """Fixed panel geometry in inches (no layout engine: fast, and the pixel size is known)."""

    def __init__(self, nrows: int, ncols: int, ratio: float, *, panel_w: float, side_w: float,
                 left: float = 0.55, right: float = 0.15, top: float = 0.95, bottom: float = 0.4,
                 wgap: float = 0.35, hgap: float = 0.55, extra_right: float = 0.0):
        self.nrows, self.ncols = nrows, ncols
        self.panel_w, self.panel_h, self.side_w = panel_w, panel_w * ratio, side_w
        self.left, self.top, self.bottom, self.wgap, self.hgap = left, top, bottom, wgap, hgap
        self.width = _round_in(left + ncols * (panel_w + side_w) + (ncols - 1) * wgap + right + extra_right)
        self.height = _round_in(top + nrows * self.panel_h + (nrows - 1) * hgap + bottom)

    def _frac(self, x: float, y: float, w: float, h: float) -> tuple[float, float, float, float]:
        return (x / self.width, y / self.height, w / self.width, h / self.height)

    def panel(self, r: int, c: int) -> tuple[float, float, float, float]:
        x = self.left + c * (self.panel_w + self.side_w + self.wgap)
        y = self.height - self.top - (r + 1) * self.panel_h - r * self.hgap
        return self._frac(x, y, self.panel_w, self.panel_h)

    def side(self, r: int, c: int) -> tuple[float, float, float, float]:
        x = self.left + c * (self.panel_w + self.side_w + self.wgap) + self.panel_w + 0.08
        y = self.height - self.top - (r + 1) * self.panel_h - r * self.hgap
        return self._frac(x, y, self.side_w - 0.08, self.panel_h)

    def right_strip(self) -> tuple[float, float, float, float]:
        x = self.left + self.ncols * (self.panel_w + self.side_w) + (self.ncols - 1) * self.wgap + 0.15
        y = self.bottom
        return self._frac(x, y, self.width - x - 0.1, self.height - self.top - self.bottom)


def _titles(fig: Figure, g: _Grid, title: str, acc: _Layers, subtitle: str = CAUTION) -> None:
    acc.dynamic(fig.text(0.5, 1 - 0.12 / g.height, title, ha="center", va="top", fontsize=10, fontweight="bold"))
    if subtitle:
        fig.text(0.5, 1 - 0.40 / g.height, subtitle, ha="center", va="top", fontsize=7, color="#525252")


def climate_title(species: str, key: tuple[str, str, str]) -> str:
    scenario, model, period = key
    if scenario == "present":
        return f"{species}: present climate ({period})"
    if model == ENSEMBLE:
        return f"{species}: scenario {scenario}, {period}, ensemble of the climate models"
    return f"{species}: scenario {scenario}, climate model {model}, {period}"


def _sheet(info: RunInfo, species: str, key: tuple[str, str, str], layers: Sequence[str], limits: Limits,
           title: str, note: str) -> Figure | None:
    panels = [p for p in (_load_panel(info, species, key, n) for n in layers) if p is not None]
    return _panel_sheet(panels, limits, title, note)


def _panel_sheet(panels: list[_Panel], limits: Limits, title: str, note: str) -> Figure | None:
    """Map panels three (four) to a row, each with its colour bar or legend, and a note."""
    if not panels:
        return None
    ratio, aspect = _map_ratio(panels[0].layer.extent, panels[0].layer.crs)
    n = len(panels)
    ncols = 2 if n == 3 else min(3, n + 1)
    nrows = math.ceil((n + 1) / ncols)
    g = _Grid(nrows, ncols, ratio, panel_w=2.35, side_w=1.05, wgap=0.25)
    fig = _new_figure(g.width, g.height)
    acc = _Layers(("sheet", g.width, g.height, ncols, tuple(_panel_sig(p) for p in panels), limits,
                   _layer_sig(panels[0].layer)))
    for i, p in enumerate(panels):
        r, c = divmod(i, ncols)
        ax = fig.add_axes(g.panel(r, c))
        # degrees (or CRS units) on the outer edges only: every panel has the same extent
        im = _draw_panel(ax, p, limits, aspect, acc, xlabels=i + ncols >= n, ylabels=c == 0)
        _side_key(fig, ax, g.side(r, c), p, im, acc)
        if i == 0:
            acc.dynamic(_north_arrow(ax))
    r, c = divmod(len(panels), ncols)
    tx = fig.add_axes(g.panel(r, c))
    tx.set_axis_off()
    acc.dynamic(tx.text(0.0, 1.0, note, ha="left", va="top", fontsize=6.5, transform=tx.transAxes, linespacing=1.5))
    _titles(fig, g, title, acc)
    acc.attach(fig)
    return fig


def _note(info: RunInfo, species: str, key: tuple[str, str, str]) -> str:
    scenario, model, period = key
    if model == ENSEMBLE:
        hatch = "Hatched: low agreement between\nthe climate models on the sign."
    else:
        hatch = "Hatched: novel climate, outside\nthe survey's range (extrapolated)."
    return (f"{species}\n\nThe ceiling is the highest abundance\nthe climate allows (law of the\nminimum): "
            f"a potential upper\nlimit, not a forecast.\n\n{hatch}\n\nResults need expert review.")


@_styled
def climate_sheet(info: RunInfo, species: str, key: tuple[str, str, str], limits: Limits | None = None) -> Figure | None:
    """The map sheet of one species and climate (present, one climate model, or the ensemble)."""
    limits = limits or species_limits(info, species)
    layers = PRESENT_PANELS if key[0] == "present" else ENSEMBLE_PANELS if key[1] == ENSEMBLE else FUTURE_PANELS
    return _sheet(info, species, key, layers, limits, climate_title(species, key), _note(info, species, key))


@_styled
def uncertainty_sheet(info: RunInfo, species: str, key: tuple[str, str, str], limits: Limits | None = None) -> Figure | None:
    """Bootstrap bounds and probabilities of one climate, when the run has them (else None)."""
    if not any(info.has(species, key, n) for n in UNCERTAINTY_PANELS):
        return None
    limits = limits or species_limits(info, species)
    note = "\n".join([f"species: {species}", "", "Bounds: percentiles of the ceilings", "of the bootstrap replicates of the",
                      "fit (fit uncertainty only; the", "spread between climate models is", "shown by the ensemble maps).",
                      "", "Results need expert review."])
    return _sheet(info, species, key, UNCERTAINTY_PANELS, limits,
                  climate_title(species, key) + ": fit uncertainty", note)


@_styled
def comparison_sheet(info: RunInfo, species: str, model: str, layer: str, limits: Limits | None = None) -> Figure | None:
    """Scenarios across, periods down, for one climate model (or ``ensemble``); one shared key.

    ``layer`` is ``change`` or ``zone`` (for the ensemble, ``change`` draws the median change
    with low-agreement cells hatched)."""
    limits = limits or species_limits(info, species)
    keys = [k for k in info.climates[species] if k[0] != "present" and k[1] == model]
    if not keys:
        return None
    scenarios = list(dict.fromkeys(k[0] for k in keys))
    periods = list(dict.fromkeys(k[2] for k in keys))
    name = "median_change" if (layer == "change" and model == ENSEMBLE) else layer
    panels = {(k[0], k[2]): _load_panel(info, species, k, name) for k in keys}
    first = next((p for p in panels.values() if p is not None), None)
    if first is None:
        return None
    ratio, aspect = _map_ratio(first.layer.extent, first.layer.crs)
    panel_w = min(2.8, 9.0 / len(scenarios))
    g = _Grid(len(periods), len(scenarios), ratio, panel_w=panel_w, side_w=0.0, wgap=0.45, hgap=0.5,
              extra_right=1.6, top=1.0)
    fig = _new_figure(g.width, g.height)
    for (sc, pe), p in panels.items():
        if p is not None:
            p.title = f"scenario {sc}, {pe}"
    sub = CAUTION + (" Colour limits shared by every climate of this species." if first.categories is None else "")
    grid = tuple((sc, pe, None if panels.get((sc, pe)) is None else _panel_sig(panels[(sc, pe)]))
                 for pe in periods for sc in scenarios)
    acc = _Layers(("compare", g.width, g.height, len(scenarios), grid, limits, _layer_sig(first.layer), name, sub))
    im, hatched = None, False
    for r, pe in enumerate(periods):
        for c, sc in enumerate(scenarios):
            ax = fig.add_axes(g.panel(r, c))
            p = panels.get((sc, pe))
            if p is None:
                ax.set_axis_off()
                ax.text(0.5, 0.5, f"scenario {sc}, {pe}:\nnot in this run", ha="center", va="center", fontsize=7,
                        transform=ax.transAxes)
                continue
            drawn = _draw_panel(ax, p, limits, aspect, acc, xlabels=r == len(periods) - 1, ylabels=c == 0)
            im = im if drawn is None else drawn
            hatched = hatched or (p.hatch is not None and bool(p.hatch.any()))
            if r == 0 and c == 0:
                acc.dynamic(_north_arrow(ax))
    strip = g.right_strip()
    x, y, w, h = strip
    if first.categories is None:
        cax = fig.add_axes((x, y + 0.2 * h, 0.14 / g.width, 0.6 * h))
        cb = fig.colorbar(im, cax=cax)
        cb.ax.tick_params(labelsize=6, length=2, pad=1)
        cb.outline.set_linewidth(0.4)
        cb.set_label(SCALE_LABELS.get(name, ""), fontsize=6.5)
        if hatched:
            lax = fig.add_axes((x, y, w, 0.15 * h))
            lax.set_axis_off()
            acc.dynamic(lax.legend(handles=[_hatch_handle(LOW_AGREEMENT_LABEL if model == ENSEMBLE else NOVEL_HATCH_LABEL)],
                                   loc="upper left", fontsize=6, frameon=False, handlelength=1.4))
    else:
        lax = fig.add_axes(strip)
        lax.set_axis_off()
        lax.legend(handles=[*_category_handles(first.categories), _nodata_handle()],
                   title=LEGEND_TITLES.get(name, name), title_fontsize=7, fontsize=6.5, loc="center left",
                   frameon=False, borderaxespad=0.0)
    what = {"change": "Change of the ceiling", "zone": "Zone of change", "ceiling": "Ceiling"}.get(layer, TITLES.get(layer, layer))
    who = "median of the climate models" if model == ENSEMBLE else f"climate model {model}"
    if model == ENSEMBLE and layer == "zone":
        who = "ensemble of the climate models"
    _titles(fig, g, f"{species}: {what}, {who}", acc, sub)
    acc.attach(fig)
    return fig


# --- limiting-factor figures ---------------------------------------------------------------------------------

def _transitions(info: RunInfo, species: str) -> pd.DataFrame:
    path = info.root / TRANSITIONS_FILE
    if not path.is_file() or path.stat().st_size == 0:
        return pd.DataFrame()
    try:
        t = pd.read_csv(path, keep_default_na=False, na_values=[""], dtype={"model": str, "scenario": str, "period": str})
    except pd.errors.EmptyDataError:
        return pd.DataFrame()
    return t[t["species"] == species] if "species" in t.columns else pd.DataFrame()


def _climate_label(key: tuple[str, str, str]) -> str:
    return "\n".join(key)


@_styled
def limiting_area_figure(info: RunInfo, species: str) -> Figure | None:
    """Area limited by each factor: the present and every climate (stacked bars, km2)."""
    t = _transitions(info, species)
    if t.empty:
        return None
    factors = list(info.factors[species])
    cats = factor_categories(factors)
    keys = list(dict.fromkeys(zip(t["scenario"], t["model"], t["period"])))
    first = t[(t["scenario"] == keys[0][0]) & (t["model"] == keys[0][1]) & (t["period"] == keys[0][2])]
    present = first.groupby("limiting_now")["area_km2"].sum()
    rows = [present.reindex(factors, fill_value=0.0).to_numpy()]
    labels = ["present"]
    for k in keys:
        sub = t[(t["scenario"] == k[0]) & (t["model"] == k[1]) & (t["period"] == k[2])]
        rows.append(sub.groupby("limiting_later")["area_km2"].sum().reindex(factors, fill_value=0.0).to_numpy())
        labels.append(_climate_label(k))
    data = np.array(rows)
    width = _round_in(max(6.0, 1.6 + 0.55 * len(labels) + 1.8))
    height = 4.6
    fig = _new_figure(width, height)
    ax = fig.add_axes((1.0 / width, 1.15 / height, (width - 3.0) / width, (height - 1.85) / height))
    xs = np.arange(len(labels))
    bottom = np.zeros(len(labels))
    for j, c in enumerate(cats):
        ax.bar(xs, data[:, j], bottom=bottom, color=c.colour, edgecolor="white", linewidth=0.4, width=0.75,
               label=c.name)
        bottom += data[:, j]
    ax.set_xticks(xs, labels, fontsize=5.5)
    ax.tick_params(axis="y", labelsize=6.5)
    ax.yaxis.set_major_formatter(ticker.FuncFormatter(lambda v, _p: f"{v:,.0f}"))
    ax.set_ylabel("area (km²)", fontsize=7)
    ax.axvline(0.5, color="#969696", lw=0.6, ls=":")
    ax.grid(axis="y", color="#d9d9d9", lw=0.5)
    ax.set_axisbelow(True)
    for s in ("top", "right"):
        ax.spines[s].set_visible(False)
    ax.legend(title="limiting factor", title_fontsize=7, fontsize=6.5, loc="center left", bbox_to_anchor=(1.02, 0.5),
              frameon=False)
    fig.text(0.5, 1 - 0.12 / height, f"{species}: area limited by each factor, present and each climate",
             ha="center", va="top", fontsize=10, fontweight="bold")
    fig.text(0.5, 1 - 0.40 / height, "From transitions.csv: present = row sums, each climate = column sums "
             "of the present-to-future areas.", ha="center", va="top", fontsize=7, color="#525252")
    return fig


@_styled
def switch_matrix_figure(info: RunInfo, species: str) -> Figure | None:
    """Present-to-future limiting-factor transitions, scenarios across and periods down: the area
    (km2, mean over the climate models) of each (now, later) pair written in its cell."""
    t = _transitions(info, species)
    if t.empty:
        return None
    factors = list(info.factors[species])
    k = len(factors)
    scenarios = list(dict.fromkeys(t["scenario"]))
    periods = list(dict.fromkeys(t["period"]))
    mats, counts = {}, {}
    for sc in scenarios:
        for pe in periods:
            sub = t[(t["scenario"] == sc) & (t["period"] == pe)]
            if sub.empty:
                continue
            n = sub["model"].nunique()
            piv = sub.pivot_table(index="limiting_now", columns="limiting_later", values="area_km2", aggfunc="sum")
            mats[(sc, pe)] = piv.reindex(index=factors, columns=factors, fill_value=0.0).fillna(0.0).to_numpy() / n
            counts[(sc, pe)] = n
    vmax = max((m.max() for m in mats.values()), default=1.0) or 1.0
    cell = 0.42 if k <= 6 else 0.32
    panel = max(1.6, cell * k)
    left, gap = 1.3, 0.9
    width = _round_in(left + len(scenarios) * panel + (len(scenarios) - 1) * gap + 1.5)
    height = _round_in(1.1 + len(periods) * panel + (len(periods) - 1) * 0.95 + 0.9)
    fig = _new_figure(width, height)
    norm = mcolors.Normalize(0.0, vmax)
    cmap = matplotlib.colormaps[CMAP_SHARE]
    im = None
    for r, pe in enumerate(periods):
        for c, sc in enumerate(scenarios):
            x = left + c * (panel + gap)
            y = height - 1.1 - (r + 1) * panel - r * 0.95
            ax = fig.add_axes((x / width, y / height, panel / width, panel / height))
            m = mats.get((sc, pe))
            if m is None:
                ax.set_axis_off()
                continue
            im = ax.imshow(m, cmap=cmap, norm=norm, interpolation="nearest", aspect="equal")
            for i in range(k):
                for j in range(k):
                    rgb = cmap(norm(m[i, j]))[:3]
                    lum = 0.2126 * rgb[0] + 0.7152 * rgb[1] + 0.0722 * rgb[2]
                    ax.text(j, i, f"{m[i, j]:,.0f}", ha="center", va="center", fontsize=5 if k > 5 else 5.5,
                            color="black" if lum > 0.5 else "white")
            ax.set_xticks(range(k), factors, rotation=45, ha="right", fontsize=5.5)
            ax.set_yticks(range(k), factors if c == 0 else [""] * k, fontsize=5.5)
            ax.tick_params(length=0)
            ax.set_xlabel("limiting later", fontsize=6, labelpad=1)
            if c == 0:
                ax.set_ylabel("limiting now", fontsize=6)
            n = counts[(sc, pe)]
            ax.set_title(f"scenario {sc}, {pe}\n(mean of {n} climate model{'s' if n != 1 else ''})", fontsize=6.5, pad=3)
    if im is not None:
        cax = fig.add_axes(((width - 1.2) / width, 0.25, 0.12 / width, 0.5))
        cb = fig.colorbar(im, cax=cax)
        cb.ax.tick_params(labelsize=6)
        cb.set_label("area (km²)", fontsize=6.5)
    fig.text(0.5, 1 - 0.12 / height, f"{species}: limiting factor now (rows) and later (columns)",
             ha="center", va="top", fontsize=10, fontweight="bold")
    fig.text(0.5, 1 - 0.40 / height, "Area in km²; the diagonal keeps its limiting factor.", ha="center", va="top",
             fontsize=7, color="#525252")
    return fig


# --- community layers (community/..., when the run has them) ---------------------------------------------

COMMUNITY_ORDER = ("total_ceiling", "total_change", "richness", "richness_change", "n_release", "n_constraint")
COMMUNITY_TITLES = {
    "total_ceiling": "Sum of the species' ceilings",
    "total_change": "Change of the summed ceiling",
    "richness": "Potential richness",
    "richness_change": "Change of potential richness",
    "n_release": "Species in release",
    "n_constraint": "Species in constraint",
}
# the colour-bar label of each community panel, by what the layer holds (not by how it is stored:
# richness_change is float32, so that the loss of a species can be negative)
COMMUNITY_SCALES = {
    "total_ceiling": "abundance summed over species (survey units)",
    "total_change": "change of the summed abundance (survey units)",
    "richness": "number of species",
    "richness_change": "change in the number of species",
    "n_release": "number of species",
    "n_constraint": "number of species",
}
COMMUNITY_COUNTS = ("richness", "richness_change", "n_release", "n_constraint")  # whole numbers of species


def community_climates(root: str | Path) -> list[Path]:
    """The folders (relative to the run folder) of community layers: present first."""
    root = Path(root)
    base = root / "community"
    if not base.is_dir():
        return []
    dirs = sorted({p.parent.relative_to(root) for p in base.rglob("*.tif")}, key=lambda d: (d.parts[1:2] != ("present",), d.parts))
    return dirs


def community_limits(root: str | Path) -> dict[str, float]:
    """Per layer name, the largest value (or absolute value, for changes) over every climate."""
    out: dict[str, float] = {}
    for rel in community_climates(root):
        for tif in (Path(root) / rel).glob("*.tif"):
            v = _finite(read_layer(tif))
            if v.size:
                top = float(np.abs(v).max()) if "change" in tif.stem else float(v.max())
                out[tif.stem] = max(out.get(tif.stem, 0.0), top)
    return out


def _community_panel(path: Path, limits: dict[str, float]) -> _Panel:
    name = path.stem
    with rasterio.open(path) as src:
        integer = np.dtype(src.dtypes[0]).kind in "iu"
    layer = read_layer(path, categorical=integer)
    data = np.ma.masked_invalid(layer.data.astype(np.float64))
    layer = MapLayer(data, layer.extent, layer.crs, layer.full_shape)
    top = limits.get(name, 0.0)
    change = "change" in name
    counts = integer or name in COMMUNITY_COUNTS
    if counts and top <= 40:  # counts of species: one colour per whole number
        n = max(1, int(math.ceil(top)))
        edges = np.arange(-n - 0.5, n + 1.5) if change else np.arange(-0.5, n + 1.5)
        cmap = CMAP_CHANGE if change else CMAP_CEILING
        norm = mcolors.BoundaryNorm(edges, matplotlib.colormaps[cmap].N)
    elif change:
        cmap, norm = CMAP_CHANGE, mcolors.Normalize(-_nice_up(top), _nice_up(top))
    else:
        cmap, norm = CMAP_CEILING, mcolors.Normalize(0.0, _nice_up(top))
    scale = COMMUNITY_SCALES.get(name, "number of species" if integer else "value of the layer")
    return _Panel(name, layer, None, title=COMMUNITY_TITLES.get(name, name.replace("_", " ")), cmap=cmap, norm=norm,
                  scale=scale)


@_styled
def community_sheet(root: str | Path, rel: Path, limits: dict[str, float] | None = None) -> Figure | None:
    """The community layers of one climate folder (``community/present`` or ``community/{scenario}/{model}/{period}``)."""
    root = Path(root)
    limits = limits if limits is not None else community_limits(root)
    tifs = sorted((root / rel).glob("*.tif"), key=lambda p: (COMMUNITY_ORDER.index(p.stem) if p.stem in COMMUNITY_ORDER
                                                            else len(COMMUNITY_ORDER), p.stem))
    panels = [_community_panel(t, limits) for t in tifs]
    parts = rel.parts[1:]
    if parts[:1] == ("present",):
        where = "present climate"
    else:
        where = ", ".join(f"{k} {v}" for k, v in zip(("scenario", "climate model", "period"), parts))
    note = ("All species of the run together.\n\nSums and counts of potential upper\nlimits, not forecasts "
            "of abundance\nor of the species present.\n\nResults need expert review.")
    return _panel_sheet(panels, Limits(1.0, 1.0, -100.0, 100.0), f"Community: {where}", note)


# --- saving and the whole run ------------------------------------------------------------------------------

@_styled
def save_figure(fig: Figure, path: str | Path) -> Path:
    """Write ``fig`` atomically (format from the suffix: png or svg)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fmt = path.suffix.lstrip(".").lower() or "png"
    with atomic_path(path) as tmp:
        if fmt == "png":
            # opaque figures: an RGB PNG (a quarter less to compress than matplotlib's RGBA)
            from PIL import Image, PngImagePlugin

            fig.set_dpi(DPI)
            _render(fig)
            rgb = np.asarray(fig.canvas.buffer_rgba())[..., :3]
            info = PngImagePlugin.PngInfo()
            info.add_text("Software", f"ceiling (matplotlib {matplotlib.__version__})")
            Image.fromarray(np.ascontiguousarray(rgb)).save(tmp, format="PNG", dpi=(DPI, DPI), pnginfo=info)
        else:
            fig.savefig(tmp, format=fmt, dpi=DPI, facecolor="white", metadata={"Date": None})
    return path


def legend_labels(fig: Figure) -> dict[str, list[str]]:
    """Every legend of a figure: its title (or '') -> its entry texts, in order."""
    out: dict[str, list[str]] = {}
    for ax in fig.axes:
        leg = ax.get_legend()
        if leg is None:
            continue
        title = leg.get_title().get_text()
        out.setdefault(title, []).extend(t.get_text() for t in leg.get_texts())
    return out


def _formats(formats: Iterable[str]) -> tuple[str, ...]:
    fs = tuple(dict.fromkeys(f.lower().lstrip(".") for f in formats))
    bad = [f for f in fs if f not in ("png", "svg")]
    if bad:
        raise ValueError(f"figure formats must be png or svg; got {', '.join(bad)}")
    return fs


@dataclass(frozen=True)
class _Task:
    """One figure to make: what it shows, and its path without the format suffix."""

    kind: str
    species: str
    args: tuple[Any, ...]
    stem: str

    def names(self, formats: Sequence[str]) -> list[Path]:
        return [Path(f"{self.stem}.{f}") for f in formats]


def _stem(p: Path) -> str:
    return p.with_suffix("").as_posix()


def figure_tasks(info: RunInfo) -> list[_Task]:
    """Every figure :func:`make_figures` makes for this run folder, in order."""
    tasks: list[_Task] = []
    for sp in info.species:
        for key in info.climates[sp]:
            tasks.append(_Task("climate", sp, (key,), _stem(climate_sheet_name(sp, key))))
        # bootstrap layers, when the run has them: the present bounds on a sheet of their own, and
        # for the futures the probabilities of release and constraint on comparison sheets
        present = info.present(sp)
        if present is not None and any(info.has(sp, present, n) for n in UNCERTAINTY_PANELS):
            tasks.append(_Task("uncertainty", sp, (present,), _stem(uncertainty_sheet_name(sp, present))))
        models = list(dict.fromkeys(k[1] for k in info.climates[sp] if k[0] != "present"))
        models = [m for m in models if m != ENSEMBLE] + [m for m in models if m == ENSEMBLE]
        for layer in ("change", "zone", *COMPARED_PROBABILITIES):  # by layer: alike sheets one after another
            for model in models:
                keys = [k for k in info.climates[sp] if k[0] != "present" and k[1] == model]
                if layer in COMPARED_PROBABILITIES:
                    wanted = any(info.has(sp, k, layer) for k in keys)
                else:  # with a single scenario and period the panel would repeat the map sheet
                    wanted = len(keys) > 1
                if wanted:
                    tasks.append(_Task("compare", sp, (model, layer), _stem(comparison_sheet_name(sp, model, layer))))
        if models:
            tasks.append(_Task("areas", sp, (), _stem(limiting_figure_name(sp, "areas"))))
            tasks.append(_Task("switch", sp, (), _stem(limiting_figure_name(sp, "switch"))))
    for rel in community_climates(info.root):
        tasks.append(_Task("community", "", (rel,), _stem(community_figure_name(rel))))
    return tasks


def _build(info: RunInfo, task: _Task, limits: Limits | None) -> Figure | None:
    sp = task.species
    if task.kind == "climate":
        return climate_sheet(info, sp, task.args[0], limits)
    if task.kind == "uncertainty":
        return uncertainty_sheet(info, sp, task.args[0], limits)
    if task.kind == "compare":
        return comparison_sheet(info, sp, task.args[0], task.args[1], limits)
    if task.kind == "areas":
        return limiting_area_figure(info, sp)
    if task.kind == "switch":
        return switch_matrix_figure(info, sp)
    if task.kind == "community":
        return community_sheet(info.root, task.args[0], limits)
    raise ValueError(f"unknown figure kind {task.kind!r}")


_INFO: dict[str, RunInfo] = {}


def _run_tasks(job: tuple[str, list[tuple[_Task, Limits | None]], tuple[str, ...]]) -> list[str]:
    """Make a batch of figures (in this process or a worker): the paths written."""
    root, batch, formats = job
    info = _INFO.get(root)
    if info is None:
        info = _INFO[root] = run_info(root)
    written = []
    for task, limits in batch:
        if parent_gone(root):  # a figure process whose run has ended writes nothing more
            os._exit(1)
        fig = _build(info, task, limits)
        if fig is None:
            continue
        for name in task.names(formats):
            written.append(str(save_figure(fig, Path(root) / name)))
        fig.clear()
    return written


def _workers(n_tasks: int, workers: int | None) -> int:
    if workers is not None:
        return max(1, int(workers))
    if "fork" not in multiprocessing.get_all_start_methods():
        return 1
    cpus = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    return max(1, min(cpus, 4, n_tasks // 2))


def make_figures(run_dir: str | Path, *, formats: Sequence[str] = ("png",), missing_only: bool = False,
                 workers: int | None = None) -> list[Path]:
    """Every map, comparison and limiting-factor figure of a run folder, into ``run_dir/figures/``.

    Returns the paths written. Needs ``summary.csv`` and the maps; the bootstrap layers,
    ``transitions.csv`` and ``community/`` are drawn when present. ``missing_only`` makes only
    the figures not yet on disk. Figures are independent, so with many of them they are made
    by a few worker processes (``workers``: default up to 4, by the CPUs available; 1: here).
    """
    root = Path(run_dir)
    fmts = _formats(formats)
    info = run_info(root)
    tasks = [t for t in figure_tasks(info)
             if not missing_only or not all((root / n).is_file() for n in t.names(fmts))]
    limits: dict[str, Any] = {sp: species_limits(info, sp) for sp in dict.fromkeys(t.species for t in tasks if t.species)}
    if any(t.kind == "community" for t in tasks):
        limits[""] = community_limits(root)
    items = [(t, limits.get(t.species)) for t in tasks]
    n = _workers(len(items), workers)
    if n <= 1:
        return [Path(p) for p in _run_tasks((str(root), items, fmts))]
    # contiguous batches: alike sheets stay together, so each worker reuses its drawn backgrounds
    size = math.ceil(len(items) / (2 * n))
    batches = [items[i:i + size] for i in range(0, len(items), size)]
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*multi-threaded.*fork.*", category=DeprecationWarning)
        # the workers end with this process, even when it is killed (ceiling.processes)
        with ProcessPoolExecutor(max_workers=n, mp_context=multiprocessing.get_context("fork"),
                                 initializer=worker_init, initargs=(os.getpid(),)) as pool:
            done = list(pool.map(_run_tasks, [(str(root), b, fmts) for b in batches if b]))
    order = {t.stem: i for i, t in enumerate(tasks)}
    paths = [Path(p) for batch in done for p in batch]
    return sorted(paths, key=lambda p: (order.get(_stem(p.relative_to(root)), len(order)), p.suffix))
