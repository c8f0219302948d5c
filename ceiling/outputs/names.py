"""Every output file name comes from here, so the CLI, manifest, report and tests agree."""

from __future__ import annotations

import re
from pathlib import Path

__all__ = [
    "MODEL_FILE", "DIAGNOSTICS_FILE", "FIGURES_DIR", "NETCDF_FILE", "SUMMARY_FILE", "TRANSITIONS_FILE",
    "MANIFEST_FILE", "PRESENT_LAYERS", "FUTURE_LAYERS", "ENSEMBLE_LAYERS", "ENSEMBLE", "fit_figure_name", "fit_panel_name", "safe_part",
    "climate_dir", "layer_path", "aux_path", "style_path", "STAC_DIR", "STAC_ROOT_FILE", "stac_item_path",
]

MODEL_FILE = "model.json"
DIAGNOSTICS_FILE = "diagnostics.csv"
FIGURES_DIR = "figures"
NETCDF_FILE = "ceiling.nc"
SUMMARY_FILE = "summary.csv"
TRANSITIONS_FILE = "transitions.csv"
MANIFEST_FILE = "manifest.json"
PRESENT_LAYERS = ("ceiling", "limiting", "novelty", "novel_factor", "extrapolated")
FUTURE_LAYERS = ("ceiling", "change", "change_pct", "limiting", "zone", "switch", "novelty", "novel_factor", "extrapolated")
ENSEMBLE_LAYERS = ("median_ceiling", "mean_ceiling", "median_change", "mean_change", "change_min", "change_max",
                   "change_iqr", "agreement", "robustness", "zone", "limiting", "limiting_share")
ENSEMBLE = "ensemble"  # the climate-model name under which ensemble maps are written

_SAFE = re.compile(r"[^A-Za-z0-9._-]+")


def safe_part(text: str) -> str:
    """A name usable as one path component: no separators, no '..', no leading dot."""
    s = _SAFE.sub("_", str(text)).strip("._") or "unnamed"
    return s


def fit_figure_name(species: str, factor: str) -> Path:
    return Path(FIGURES_DIR) / f"fit_{safe_part(species)}_{safe_part(factor)}.png"


def fit_panel_name(species: str) -> Path:
    return Path(FIGURES_DIR) / f"fit_{safe_part(species)}_all_factors.png"


def climate_dir(species: str, scenario: str, model: str, period: str) -> Path:
    """``{species}/present``, ``{species}/{scenario}/{model}/{period}``; ensembles use the model
    name ``ensemble``: ``{species}/{scenario}/ensemble/{period}``."""
    if scenario == "present":
        return Path(safe_part(species)) / "present"
    return Path(safe_part(species)) / safe_part(scenario) / safe_part(model) / safe_part(period)


def layer_path(species: str, climate_key: tuple[str, str, str], layer: str) -> Path:
    return climate_dir(species, *climate_key) / f"{layer}.tif"


def aux_path(tif: Path) -> Path:
    """GDAL's sidecar of a GeoTIFF (category names, attribute table): ``{name}.tif.aux.xml``."""
    return Path(tif).with_name(Path(tif).name + ".aux.xml")


def style_path(tif: Path) -> Path:
    """The QGIS layer style beside a GeoTIFF, loaded as its default style: ``{name}.qml``."""
    return Path(tif).with_suffix(".qml")


# the STAC catalogue of a run folder (ceiling/outputs/stac.py)
STAC_ROOT_FILE = "collection.json"
STAC_DIR = "stac"


def stac_item_path(item_id: str) -> Path:
    """``stac/{item id}/{item id}.json`` (the layout STAC's best practices recommend)."""
    return Path(STAC_DIR) / safe_part(item_id) / f"{safe_part(item_id)}.json"
