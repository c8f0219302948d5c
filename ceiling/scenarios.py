"""The climates of a run: the present baseline and the futures, with their layers.

A climate is identified by (scenario, model, period); the present is ("present", "", its
period). Futures are listed in the config either one by one::

    [[futures]]
    scenario = "ssp245"
    model = "model-a"
    period = "2041-2070"
    layers = { tmax_warm = "future/a/tmax.tif", precip = { path = "f.nc", variable = "pr" } }

or as a product of names with a path pattern (``{scenario}``, ``{climate_model}`` or ``{model}``,
``{period}`` and ``{factor}`` are filled in, names only; ``{{`` and ``}}`` stand for braces;
``variable`` names the NetCDF variable and may use them too)::

    [[futures]]
    scenarios = ["ssp245", "ssp585"]
    models = ["model-c"]
    periods = ["2041-2070", "2071-2100"]
    pattern = "future/{scenario}/{model}/{period}.nc"
    variable = "{factor}"

or, for a climate delivered as raw climate-model series, with the series' glob patterns
(``{variable}`` is filled by the derive stage, which turns them into factor layers on the way:
:mod:`ceiling.derive`; ``climate_model(s)`` may stand for ``model(s)``)::

    [[futures]]
    scenarios = ["ssp245", "ssp585"]
    climate_models = ["model-d"]
    periods = ["2041-2070", "2071-2100"]
    series = "series/{climate_model}/{scenario}/{variable}_*.nc"
    historical = "series/{climate_model}/historical/{variable}_*.nc"

Relative paths are resolved against the config's folder. The projection options
(``[projection]``) are validated here too. Scenario, climate-model and period names become
folders of the run; two names that would share a folder are refused
(:func:`ceiling.outputs.names.path_parts`).
"""

from __future__ import annotations

import itertools
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, model_validator

from .config import RunConfig, validate_section
from .errors import ConfigError
from .outputs.names import path_parts

__all__ = ["LayerRef", "SeriesRef", "Climate", "ProjectionOptions", "climates", "projection_options", "check_sections",
           "fill_placeholders", "option_path", "PLACEHOLDERS", "PRESENT"]

PRESENT = "present"
# the names a path pattern may use; {model} is the short form of {climate_model}
PLACEHOLDERS = ("scenario", "climate_model", "model", "period", "factor")
_TOKEN = re.compile(r"\{\{|\}\}|\{([^{}]*)\}|[{}]")


@dataclass(frozen=True)
class LayerRef:
    """Where one factor of one climate comes from."""

    path: Path
    variable: str | None = None
    units: str | None = None

    def describe(self) -> str:
        return f"{self.path}" + (f" (variable '{self.variable}')" if self.variable else "")


@dataclass(frozen=True)
class SeriesRef:
    """A climate delivered as climate-model series: glob patterns with ``{variable}`` left to fill."""

    future: str
    historical: str


@dataclass(frozen=True)
class Climate:
    scenario: str
    model: str
    period: str
    layers: dict[str, LayerRef]
    series: SeriesRef | None = None  # raw series: layers are derived (ceiling.derive) before use

    @property
    def is_present(self) -> bool:
        return self.scenario == PRESENT

    @property
    def key(self) -> tuple[str, str, str]:
        return (self.scenario, self.model, self.period)

    @property
    def label(self) -> str:
        return "present" if self.is_present else f"{self.scenario} / {self.model} / {self.period}"


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class _LayerSpec(_Strict):
    path: str
    variable: str | None = None
    units: str | None = None


class _PresentSpec(_Strict):
    period: str = "baseline"
    layers: dict[str, str | _LayerSpec] = Field(default_factory=dict)
    units: dict[str, str] = Field(default_factory=dict)


class _FutureSpec(_Strict):
    scenario: str | None = None
    model: str | None = None
    period: str | None = None
    scenarios: list[str] | None = None
    models: list[str] | None = None
    periods: list[str] | None = None
    layers: dict[str, str | _LayerSpec] = Field(default_factory=dict)
    pattern: str | None = None
    variable: str | None = None
    units: dict[str, str] = Field(default_factory=dict)
    series: str | None = None
    historical: str | None = None

    @model_validator(mode="before")
    @classmethod
    def _climate_model_words(cls, data: Any) -> Any:
        if isinstance(data, dict):
            for new, old in (("climate_model", "model"), ("climate_models", "models")):
                if new in data:
                    if old in data:
                        raise ValueError(f"give '{new}' or '{old}', not both")
                    data = {**{k: v for k, v in data.items() if k != new}, old: data[new]}
        return data

    @model_validator(mode="after")
    def _one_form(self) -> _FutureSpec:
        for one, many in (("scenario", "scenarios"), ("model", "models"), ("period", "periods")):
            if (getattr(self, one) is None) == (getattr(self, many) is None):
                raise ValueError(f"give either '{one}' or '{many}' (a list) for each future")
            if getattr(self, many) == []:
                raise ValueError(f"'{many}' is an empty list; name at least one {one}, or leave this future out")
        if (self.series is None) != (self.historical is None):
            raise ValueError("raw series need both 'series' (the scenario run) and 'historical' (the historical run)")
        if self.series and (self.layers or self.pattern):
            raise ValueError("a future takes raw 'series' or ready-made 'layers' / 'pattern', not both")
        if not self.layers and not self.pattern and not self.series:
            raise ValueError("a future needs 'layers' (one path per factor), a 'pattern' or raw 'series'")
        return self


class ProjectionOptions(_Strict):
    """How the projection runs and classifies change (``[projection]`` in the config)."""

    chunk: int = Field(default=1024, ge=64, le=16384)
    resampling: Literal["nearest", "bilinear", "cubic", "average"] = "bilinear"
    template: str | None = None
    mask: str | None = None
    release_threshold: float = Field(default=0.10, ge=0)
    constraint_threshold: float = Field(default=0.10, ge=0)
    absolute_floor: float = Field(default=0.5, ge=0)
    zero_level: float = Field(default=0.0, ge=0)
    gdal_cache_mb: int = Field(default=64, ge=8, le=65536)
    # GeoTIFF deflate level (GDAL with libdeflate: 1-12). Level 1 writes the maps about twice as fast
    # as GDAL's default 6, for files about 2% larger (measured on the benchmark maps, BENCHMARKS.md)
    deflate_level: int = Field(default=1, ge=1, le=12)
    # what the projection does beyond the survey's range; None keeps the model's own setting
    # (fit.outside, "hold" by default)
    novel: Literal["hold", "extend", "mask"] | None = None
    ensemble_min_models: int = Field(default=2, ge=2)
    agreement_threshold: float = Field(default=0.8, gt=0.5, le=1.0)
    lower_percentile: float = Field(default=5.0, ge=0.0, lt=50.0)
    upper_percentile: float = Field(default=95.0, gt=50.0, le=100.0)

    @model_validator(mode="after")
    def _chunk_multiple(self) -> ProjectionOptions:
        if self.chunk % 16:
            raise ValueError(f"chunk must be a multiple of 16 (GeoTIFF tiles); got {self.chunk}")
        return self


def _validate(model: type[BaseModel], data: Any, where: str, source: Any):
    return validate_section(model, data, where, source)


def projection_options(cfg: RunConfig) -> ProjectionOptions:
    return _validate(ProjectionOptions, cfg.projection, "projection", cfg.source)


def _base(cfg: RunConfig) -> Path:
    return Path(cfg.source).resolve().parent if cfg.source else Path.cwd()


def option_path(cfg: RunConfig, value: str | None) -> Path | None:
    """A path given in a free section (``projection.template``, ``projection.mask``), resolved
    against the config's folder like every other path of the config."""
    if not value:
        return None
    p = Path(value).expanduser()
    return p if p.is_absolute() else _base(cfg) / p


def fill_placeholders(text: str, values: dict[str, str], *, where: str) -> str:
    """``text`` with ``{name}`` replaced by ``values[name]`` for the names of :data:`PLACEHOLDERS`
    (``{{`` and ``}}`` are literal braces). Anything else in braces, or a lone brace, is refused:
    placeholders are names only (no attributes, indices or format specifications)."""
    def one(m: re.Match) -> str:
        tok = m.group(0)
        if tok in ("{{", "}}"):
            return tok[0]
        name = m.group(1)
        if name is None:
            raise ConfigError(f"{where}: unmatched '{tok}' in '{text}'; close the placeholder or write '{tok * 2}' for a "
                              "literal brace")
        if name not in values:
            raise ConfigError(f"{where}: unknown placeholder '{{{name}}}' in '{text}'; use "
                              + ", ".join(f"{{{n}}}" for n in PLACEHOLDERS if n in values))
        return values[name]

    return _TOKEN.sub(one, text)


def _ref(spec: str | _LayerSpec, base: Path, fmt: dict[str, str], units: str | None, where: str) -> LayerRef:
    if isinstance(spec, str):
        path, variable, u = spec, None, None
    else:
        path, variable, u = spec.path, spec.variable, spec.units
    p = Path(fill_placeholders(path, fmt, where=where)).expanduser()
    return LayerRef(
        path=p if p.is_absolute() else base / p,
        variable=fill_placeholders(variable, fmt, where=f"{where} (variable)") if variable else None,
        units=u or units,
    )


def _series_ref(spec: _FutureSpec, base: Path, fmt: dict[str, str], where: str) -> SeriesRef:
    """The series' glob patterns with the climate's names filled in; ``{variable}`` stays for the
    derive stage (:func:`ceiling.derive.series.series_files`)."""
    values = {**fmt, "variable": "{variable}"}

    def one(pattern: str, what: str) -> str:
        p = Path(fill_placeholders(pattern, values, where=f"{where}.{what}")).expanduser()
        return str(p if p.is_absolute() else base / p)

    return SeriesRef(one(spec.series or "", "series"), one(spec.historical or "", "historical"))


def check_sections(cfg: RunConfig) -> None:
    """Validate ``[present]``, every ``[[futures]]`` (keys, values and path placeholders) and
    ``[projection]`` without opening anything: a command that does not project (``ceiling fit``)
    still refuses a typo."""
    dummy = dict.fromkeys(PLACEHOLDERS, "x")
    pres = _validate(_PresentSpec, cfg.present, "present", cfg.source)
    for name, spec in pres.layers.items():
        _ref(spec, Path("."), dummy, None, f"{cfg.source}: present.layers.{name}")
    for i, raw in enumerate(cfg.futures or []):
        spec = _validate(_FutureSpec, raw, f"futures.{i}", cfg.source)
        for name, layer in spec.layers.items():
            _ref(layer, Path("."), dummy, None, f"{cfg.source}: futures.{i}.layers.{name}")
        if spec.pattern:
            _ref(_LayerSpec(path=spec.pattern, variable=spec.variable), Path("."), dummy, None,
                 f"{cfg.source}: futures.{i}.pattern")
        if spec.series:
            _series_ref(spec, Path("."), dummy, f"{cfg.source}: futures.{i}")
    projection_options(cfg)


def climates(cfg: RunConfig) -> list[Climate]:
    """The present (first) and every future of the config, with one layer per factor."""
    base = _base(cfg)
    names = cfg.factor_names
    pres = _validate(_PresentSpec, cfg.present, "present", cfg.source)
    unknown = set(pres.layers) - set(names)
    if unknown:
        raise ConfigError(f"{cfg.source}: present.layers names unknown factor(s) {sorted(unknown)}; factors are {names}")
    layers = {}
    for f in cfg.factors:
        if f.name in pres.layers:
            layers[f.name] = _ref(pres.layers[f.name], base, {"factor": f.name}, pres.units.get(f.name) or f.units,
                                  f"{cfg.source}: present.layers.{f.name}")
        elif f.layer is not None:
            layers[f.name] = LayerRef(Path(f.layer), None, f.units)
        else:
            raise ConfigError(
                f"{cfg.source}: factor '{f.name}' has no present-day layer (only a table column); "
                f"set factors.layer or present.layers.{f.name} to project it"
            )
    out = [Climate(PRESENT, "", pres.period, layers)]
    seen: set[tuple[str, str, str]] = set()
    for i, raw in enumerate(cfg.futures or []):
        spec = _validate(_FutureSpec, raw, f"futures.{i}", cfg.source)
        for sc, mo, pe in itertools.product(
            spec.scenarios if spec.scenarios is not None else [spec.scenario],
            spec.models if spec.models is not None else [spec.model],
            spec.periods if spec.periods is not None else [spec.period],
        ):
            key = (str(sc), str(mo), str(pe))
            if key in seen:
                raise ConfigError(f"{cfg.source}: future {sc} / {mo} / {pe} is listed twice; list each scenario, model and period once")
            if sc == PRESENT:
                raise ConfigError(f"{cfg.source}: '{PRESENT}' is reserved for the baseline; rename the scenario in futures.{i}")
            if mo == "ensemble":
                raise ConfigError(f"{cfg.source}: 'ensemble' is reserved for the combined models; rename the climate model in futures.{i}")
            seen.add(key)
            if spec.series:
                names_of = {"scenario": str(sc), "climate_model": str(mo), "model": str(mo), "period": str(pe)}
                out.append(Climate(str(sc), str(mo), str(pe), {}, _series_ref(spec, base, names_of, f"{cfg.source}: futures.{i}")))
                continue
            fl = {}
            for name in names:
                fmt = {"scenario": str(sc), "climate_model": str(mo), "model": str(mo), "period": str(pe), "factor": name}
                u = spec.units.get(name)
                if name in spec.layers:
                    fl[name] = _ref(spec.layers[name], base, fmt, u, f"{cfg.source}: futures.{i}.layers.{name}")
                elif spec.pattern:
                    fl[name] = _ref(_LayerSpec(path=spec.pattern, variable=spec.variable), base, fmt, u,
                                    f"{cfg.source}: futures.{i}.pattern")
                else:
                    raise ConfigError(
                        f"{cfg.source}: future {sc} / {mo} / {pe} has no layer for factor '{name}'; "
                        f"add it to futures.{i}.layers or give a pattern"
                    )
            extra = set(spec.layers) - set(names)
            if extra:
                raise ConfigError(f"{cfg.source}: futures.{i}.layers names unknown factor(s) {sorted(extra)}; factors are {names}")
            out.append(Climate(str(sc), str(mo), str(pe), fl))
    # each name becomes a folder: two that would share one are refused (the run's records and
    # files are keyed by the full names, but one folder cannot hold two climates)
    futures = out[1:]
    where = f"{cfg.source or 'config'}: [[futures]]"
    for kind, names in (("scenario", [c.scenario for c in futures]), ("climate model", [c.model for c in futures]),
                        ("period", [c.period for c in futures])):
        path_parts(kind, names, where=where, error=ConfigError)
    return out
