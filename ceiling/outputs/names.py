"""Every output file name comes from here, so the CLI, manifest, report and tests agree.

User-given names (species, scenarios, climate models, periods) become path parts through
:func:`safe_part`; :func:`path_parts` refuses two names of one kind that would share a part
(case-insensitively, as on macOS and Windows file systems), empty names, names reserved for the
run's own folders, and names that end like a file the run writes (``model.json``,
``report.html``), so a run's folders and files can never collide.
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Mapping
from pathlib import Path

from ..errors import CeilingError, DataError

__all__ = [
    "MODEL_FILE", "DIAGNOSTICS_FILE", "FIGURES_DIR", "NETCDF_FILE", "SUMMARY_FILE", "TRANSITIONS_FILE",
    "MANIFEST_FILE", "PRESENT_LAYERS", "FUTURE_LAYERS", "ENSEMBLE_LAYERS", "ENSEMBLE", "fit_figure_name", "fit_panel_name", "safe_part",
    "climate_dir", "layer_path", "aux_path", "style_path", "STAC_DIR", "STAC_ROOT_FILE", "DERIVED_DIR", "stac_item_path",
    "COMMUNITY_DIR", "RUN_FOLDERS", "FILE_SUFFIXES", "RESERVED", "path_parts", "check_distinct",
    "PRESENT_BOUNDS", "FUTURE_BOUNDS", "WITHOUT_SIMILARITY", "MAP_NAMES",
]

MODEL_FILE = "model.json"
DIAGNOSTICS_FILE = "diagnostics.csv"
FIGURES_DIR = "figures"
NETCDF_FILE = "ceiling.nc"
SUMMARY_FILE = "summary.csv"
TRANSITIONS_FILE = "transitions.csv"
MANIFEST_FILE = "manifest.json"
PRESENT_LAYERS = ("ceiling", "limiting", "similarity", "least_similar", "extrapolated")
FUTURE_LAYERS = ("ceiling", "change", "change_pct", "limiting", "zone", "switch", "similarity", "least_similar", "extrapolated")
ENSEMBLE_LAYERS = ("median_ceiling", "mean_ceiling", "median_change", "mean_change", "change_min", "change_max",
                   "change_iqr", "agreement", "robustness", "zone", "limiting", "limiting_share")
# bootstrap bounds, written beside the maps when the model file carries replicates
PRESENT_BOUNDS = ("ceiling_lower", "ceiling_upper")
FUTURE_BOUNDS = ("ceiling_lower", "ceiling_upper", "change_lower", "change_upper", "p_release", "p_constraint")
# the projected maps made without the full similarity computation (MESS): the extrapolated flag
# needs only each factor's range; a run that writes any other projected map computes it in full
WITHOUT_SIMILARITY = ("ceiling", "limiting", "extrapolated", "change", "change_pct", "zone", "switch")
# every map name a run can write, the names [outputs] maps chooses from
MAP_NAMES = tuple(dict.fromkeys(PRESENT_LAYERS + FUTURE_LAYERS + ENSEMBLE_LAYERS + PRESENT_BOUNDS + FUTURE_BOUNDS))
ENSEMBLE = "ensemble"  # the climate-model name under which ensemble maps are written
COMMUNITY_DIR = "community"  # the community layers, beside the species folders
STAC_DIR = "stac"  # the STAC catalogue's items (ceiling/outputs/stac.py)
DERIVED_DIR = "derived"  # factor layers derived from raw climate-model series during a run (ceiling/derive)
# folders of a run that sit beside the species folders (at the top and in figures/)
RUN_FOLDERS = (FIGURES_DIR, COMMUNITY_DIR, STAC_DIR, DERIVED_DIR)
# the kinds of file a run writes; a folder named like one (``model.json``) could collide with a file
FILE_SUFFIXES = (".tif", ".tiff", ".xml", ".qml", ".nc", ".csv", ".json", ".html", ".png", ".svg", ".gpkg")
# per kind of name, the path parts its folders must not take, and what holds them
RESERVED: dict[str, dict[str, str]] = {
    "species": {FIGURES_DIR: "the run's figures folder", COMMUNITY_DIR: "the community layers' folder",
                STAC_DIR: "the run's catalogue folder", DERIVED_DIR: "the run's derived factor layers"},
    "scenario": {"present": "the present climate's folder"},
    "climate model": {ENSEMBLE: "the ensembles' folder"},
    "period": {},
}

_SAFE = re.compile(r"[^A-Za-z0-9._-]+")


def safe_part(text: str) -> str:
    """A name usable as one path component: no separators, no '..', no leading dot."""
    s = _SAFE.sub("_", str(text)).strip("._") or "unnamed"
    return s


def path_parts(kind: str, names: Iterable[str], *, where: str, error: type[CeilingError] = DataError,
               reserved: Mapping[str, str] | None = None) -> dict[str, str]:
    """Each name's path part (:func:`safe_part`), after refusing, with one line naming both:
    two names that give the same part (compared case-insensitively), an empty name, a part
    reserved for the run's own folders (``RESERVED[kind]`` unless ``reserved`` is given) and a
    part that ends like a file the run writes."""
    holder = {k.casefold(): v for k, v in (RESERVED.get(kind, {}) if reserved is None else reserved).items()}
    out: dict[str, str] = {}
    for name in dict.fromkeys(str(n) for n in names):
        if not name.strip():
            raise error(f"{where}: a {kind} name is empty; give every {kind} a name")
        part = safe_part(name)
        key = part.casefold()
        if key.endswith(FILE_SUFFIXES):
            raise error(f"{where}: {kind} '{name}' ends like a file name ('{Path(part).suffix}'), and its folder could "
                        f"collide with the run's files; rename the {kind}")
        if key in holder:
            raise error(f"{where}: {kind} '{name}' and {holder[key]} would share the folder '{part}' (names become "
                        f"folders with letters, digits, '.', '-' and '_' only, case ignored); rename the {kind}")
        holder[key] = f"{kind} '{name}'"
        out[name] = part
    return out


def check_distinct(items: Iterable[tuple[str, str]], *, what: str, where: str,
                   error: type[CeilingError] = DataError) -> None:
    """Refuse two ``(description, name)`` items whose names are equal ignoring case: ``what``
    (e.g. "figure") would be written twice."""
    seen: dict[str, str] = {}
    for desc, name in items:
        key = str(name).casefold()
        if key in seen and seen[key] != desc:
            raise error(f"{where}: {seen[key]} and {desc} would share the {what} '{name}'; rename one of them")
        seen.setdefault(key, desc)


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


def stac_item_path(item_id: str) -> Path:
    """``stac/{item id}/{item id}.json`` (the layout STAC's best practices recommend)."""
    return Path(STAC_DIR) / safe_part(item_id) / f"{safe_part(item_id)}.json"
