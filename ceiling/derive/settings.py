"""The ``[derive]`` section of a config: the fine monthly baseline, the factor definitions and the method.

::

    [derive]
    # the fine monthly baseline: 12 layers per variable, {month} is 01..12
    baseline = { tasmax = "baseline/tasmax_{month}.tif", tasmin = "baseline/tasmin_{month}.tif",
                 pr = "baseline/pr_{month}.tif" }
    historical_period = "1991-2020"   # the climate models' reference years (default: [present] period)
    interpolation = "bilinear"        # or "nearest": coarse changes to the fine grid
    precip_cap = 3.0                  # largest multiplicative precipitation change
    precip_floor = 3.0                # mm per month: least historical monthly total in a ratio
    anchor = false                    # true: apply each factor's change to the present layers

    [derive.factors]                  # one definition per factor of [[factors]], by index name
    tmax_warm = { index = "warmest_month_tmax" }
    moisture = { index = "moisture_index", pet = "hargreaves" }
    gdd5 = { index = "growing_degree_days", base = 5.0 }

Validated here with the project's one error formatter (:func:`ceiling.config.validate_section`).
"""

from __future__ import annotations

from pathlib import Path
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, model_validator

from ..config import RunConfig, validate_section
from ..errors import ConfigError
from .calendars import parse_period
from .indices import INDICES
from .pet import PET_METHODS

__all__ = ["BaselineLayer", "FactorDefinition", "DeriveSection", "derive_section", "historical_years", "base_folder"]

IndexName = Literal[tuple(INDICES)]  # type: ignore[valid-type]
PetMethod = Literal[PET_METHODS]  # type: ignore[valid-type]
BaselineVariable = Literal["tasmax", "tasmin", "tas", "pr"]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class BaselineLayer(_Strict):
    """One variable of the baseline: a path with ``{month}`` (01..12), a NetCDF variable, units."""

    path: str
    variable: str | None = None
    units: str | None = None


class FactorDefinition(_Strict):
    """A factor by index name and parameters."""

    index: IndexName
    base: float = 5.0             # growing_degree_days: base temperature, degC
    pet: PetMethod = "hargreaves"  # moisture_index: potential evapotranspiration method


class DeriveSection(_Strict):
    """How factor layers are derived from a fine monthly baseline and climate-model series."""

    baseline: dict[BaselineVariable, str | BaselineLayer]
    factors: dict[str, FactorDefinition] = Field(min_length=1)
    historical_period: str | None = None
    interpolation: Literal["bilinear", "nearest"] = "bilinear"
    precip_cap: float = Field(default=3.0, gt=1.0, le=100.0)
    precip_floor: float = Field(default=3.0, gt=0.0)
    chunk: int = Field(default=512, ge=64, le=8192)
    template: str | None = None
    # false: every layer is the factor of the (adjusted) baseline; true: the present is the config's
    # present layers and each future is that layer with the factor's change from the baseline
    # applied (added, or multiplied for precipitation totals and ratios)
    anchor: bool = False

    @model_validator(mode="after")
    def _consistent(self) -> DeriveSection:
        for name, d in self.factors.items():
            missing = [v for v in INDICES[d.index].needs if v not in self.baseline]
            if missing:
                raise ValueError(f"factor '{name}' ({d.index}) needs the baseline variable(s) {', '.join(missing)}; "
                                 f"add derive.baseline.{missing[0]}")
        for var, spec in self.baseline.items():
            path = spec if isinstance(spec, str) else spec.path
            if "{month" not in path:
                raise ValueError(f"derive.baseline.{var} must hold '{{month}}' (01..12) in its path; got '{path}'")
        if self.chunk % 16:
            raise ValueError(f"chunk must be a multiple of 16 (GeoTIFF tiles); got {self.chunk}")
        return self

    def layer(self, variable: str) -> BaselineLayer:
        spec = self.baseline[variable]  # type: ignore[index]
        return BaselineLayer(path=spec) if isinstance(spec, str) else spec


def derive_section(cfg: RunConfig) -> DeriveSection:
    """The validated ``[derive]`` section; every factor of the config must have a definition."""
    if cfg.derive is None:
        raise ConfigError(f"{cfg.source or 'config'}: no [derive] section; add one with the baseline and the factor "
                          "definitions to derive factor layers from climate-model series")
    sec = validate_section(DeriveSection, cfg.derive, where="derive", source=cfg.source)
    missing = [f for f in cfg.factor_names if f not in sec.factors]
    extra = [f for f in sec.factors if f not in cfg.factor_names]
    if missing or extra:
        which = f"has no definition for factor(s) {', '.join(missing)}" if missing else f"defines unknown factor(s) {', '.join(extra)}"
        raise ConfigError(f"{cfg.source or 'config'}: 'derive.factors' {which}; give one definition per [[factors]] name "
                          f"({', '.join(cfg.factor_names)})")
    return sec


def historical_years(cfg: RunConfig, sec: DeriveSection) -> tuple[int, int]:
    """The climate models' reference years: ``derive.historical_period``, else the present's period."""
    text = sec.historical_period or (cfg.present or {}).get("period")
    if text is None:
        raise ConfigError(f"{cfg.source or 'config'}: set derive.historical_period (e.g. '1991-2020'), the years the "
                          "baseline describes")
    return parse_period(str(text), where=f"{cfg.source or 'config'}: derive.historical_period")


def base_folder(cfg: RunConfig) -> Path:
    return Path(cfg.source).resolve().parent if cfg.source else Path.cwd()
