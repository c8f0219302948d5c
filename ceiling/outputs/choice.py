"""What a run writes: the maps chosen in ``[outputs] maps``, the NetCDF and the report.

``[outputs] maps`` names the maps to write (every map when left out), ``netcdf`` and ``report``
switch the NetCDF and the report with its figures; the summary tables, the manifest and the
catalogue are always written (the catalogue lists only what was written). A lean run computes
less as well as writing less: no NetCDF is laid out when it is off, the similarity to the
survey's climates (MESS) is computed in full only when a map needs it (the extrapolated flag and
the novel-area statistics need only each factor's range), and no figures are drawn without the
report. Maps another output needs are computed anyway and removed before the run is complete:
a future is compared with the present's ceiling and limiting factor, an ensemble reads its
members' ceiling and limiting factor, the zone summaries and community layers read the maps
listed below, and the figures draw every map.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from ..config import OutputsConfig, validate_section
from .names import (
    FUTURE_LAYERS,
    MAP_NAMES,
    PRESENT_LAYERS,
    WITHOUT_SIMILARITY,
    aux_path,
    style_path,
)

__all__ = ["OutputChoice", "Needs", "output_choice", "with_outputs", "similarity_needed", "computed_in_order", "COMPARED",
           "ZONE_MAPS", "COMMUNITY_MAPS"]

# what a future reads of the present, and an ensemble of each member future
COMPARED = ("ceiling", "limiting")
# what the zone summaries read (ceiling.zones) and the community layers (ceiling.community)
ZONE_MAPS = ("ceiling", "change", "extrapolated", "zone", "limiting", "median_ceiling", "median_change", "agreement")
COMMUNITY_MAPS = ("ceiling", "zone")


@dataclass(frozen=True)
class Needs:
    """The other outputs of a run that read its maps."""

    futures: bool = False
    ensembles: bool = False
    zones: bool = False
    community: bool = False


@dataclass(frozen=True)
class OutputChoice:
    """The maps to write (``maps``), and whether to write the NetCDF and the report."""

    maps: tuple[str, ...] = MAP_NAMES
    netcdf: bool = True
    report: bool = True

    def computed(self, needs: Needs) -> frozenset[str]:
        """The maps to compute: those asked for and those another output reads."""
        out = set(self.maps)
        if self.report:
            out |= set(MAP_NAMES)  # the figures draw every map
        if needs.futures or needs.ensembles:
            out |= set(COMPARED)
        if needs.zones:
            out |= set(ZONE_MAPS)
        if needs.community:
            out |= set(COMMUNITY_MAPS)
        return frozenset(out)

    def in_netcdf(self, layer: str) -> bool:
        return self.netcdf and layer in self.maps

    def unasked(self, files: Iterable[Path]) -> list[Path]:
        """Of a run's map files (GeoTIFFs and their sidecars), those of maps not asked for."""
        drop = set(MAP_NAMES) - set(self.maps)
        out = []
        for p in map(Path, files):
            for layer in drop:
                tif = p.parent / f"{layer}.tif"
                if p in (tif, aux_path(tif), style_path(tif)):
                    out.append(p)
        return out


def similarity_needed(layers: Iterable[str]) -> bool:
    """Whether any projected map among ``layers`` needs the full similarity (MESS) values."""
    projected = set(PRESENT_LAYERS) | set(FUTURE_LAYERS)
    return any(n in projected and n not in WITHOUT_SIMILARITY for n in layers)


def computed_in_order(names: Sequence[str], computed: frozenset[str]) -> tuple[str, ...]:
    """``names`` (a climate's maps, in order) that are computed."""
    return tuple(n for n in names if n in computed)


def output_choice(cfg: Any) -> OutputChoice:
    """The choice in a config's ``[outputs]`` table (validated, one error line when wrong)."""
    o = validate_section(OutputsConfig, cfg.outputs, "outputs", cfg.source)
    return OutputChoice(tuple(o.maps) if o.maps is not None else MAP_NAMES, o.netcdf, o.report)


def with_outputs(cfg: Any, *, maps: Sequence[str] | None = None, netcdf: bool | None = None,
                 report: bool | None = None) -> Any:
    """A copy of the RunConfig ``cfg`` whose ``[outputs]`` writes ``maps`` (None: unchanged), the
    NetCDF and the report as given; checked as the config file would be. What a run writes is
    part of the run's settings, so ``--resume`` continues only a run with the same choice."""
    table = dict(cfg.outputs or {})
    for key, value in (("maps", None if maps is None else list(maps)), ("netcdf", netcdf), ("report", report)):
        if value is not None:
            table[key] = value
    validate_section(OutputsConfig, table, "outputs", cfg.source)
    return cfg.model_copy(update={"outputs": table})

