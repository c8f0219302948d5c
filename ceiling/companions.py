"""The files a config reads: the survey (with a shapefile's companion files) and the factor layers.

Apart from the fitting stage so that a projection from a model file lists its inputs without
importing the fitting stack (statsmodels, the figures' matplotlib).
"""

from __future__ import annotations

from pathlib import Path

from .config import RunConfig

__all__ = ["SHAPEFILE_COMPANIONS", "config_inputs", "with_companions"]


def config_inputs(cfg: RunConfig) -> list[Path]:
    """The survey (with a shapefile's companion files) and the factor layers."""
    return with_companions([cfg.survey.path]) + [f.layer for f in cfg.factors if f.layer is not None]


# files GDAL reads beside a shapefile: they shape what is read as much as the .shp itself
SHAPEFILE_COMPANIONS = (".shx", ".dbf", ".prj", ".cpg")


def with_companions(paths: list[Path]) -> list[Path]:
    """``paths`` with the existing companion files of each shapefile after it."""
    out = []
    for p in paths:
        out.append(Path(p))
        if Path(p).suffix.lower() == ".shp":
            out += [q for ext in SHAPEFILE_COMPANIONS for q in (Path(p).with_suffix(ext),) if q.is_file()]
    return out
