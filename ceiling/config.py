"""Run configuration: a TOML file read with the standard library, validated by pydantic.

Relative paths in a config are resolved against the folder that holds the config file, so a
config and its data can be moved together. Unknown keys are refused with the closest valid key
suggested; every bad value gets the same kind of one-line message naming the field.
"""

from __future__ import annotations

import difflib
import math
import tomllib
import typing
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, StrictBool, ValidationError, field_validator, model_validator

from .errors import ConfigError, InputFileError
from .outputs.names import MAP_NAMES

__all__ = [
    "MIN_REPLICATES",
    "RunConfig",
    "SurveyConfig",
    "FactorConfig",
    "FitConfig",
    "load_config",
    "parse_config",
    "OutputsConfig",
    "validate_section",
    "format_error",
]

Basis = Literal["linear", "quadratic", "spline"]
Estimator = Literal["quantile", "binned"]
Transform = Literal["none", "log1p", "sqrt"]
Outside = Literal["hold", "extend"]
Sampling = Literal["nearest", "bilinear"]

# percentile bounds from fewer bootstrap replicates than this are too coarse to report
MIN_REPLICATES = 20


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class SurveyConfig(_Section):
    """Where the survey points are and which columns hold what."""

    path: Path
    x: str = "lon"
    y: str = "lat"
    crs: str | None = None
    abundance: str = "count"
    species: str | None = None
    layer: str | None = None
    sampling: Sampling = "nearest"
    drop_duplicates: bool = False


class FactorConfig(_Section):
    """One climate factor: where its present-day values come from and how its ceiling is shaped."""

    name: str = Field(pattern=r"^[A-Za-z][A-Za-z0-9_]*$")
    layer: Path | None = None
    column: str | None = None
    units: str | None = None
    label: str | None = None
    # natural cubic splines with 3 degrees of freedom (kept concave by the joint fit's shape
    # rule): chosen on the virtual-species suite (BENCHMARKS.md, "Recovery")
    basis: Basis = "spline"
    df: int = Field(default=3, ge=1, le=20)
    estimator: Estimator = "quantile"
    bins: int = Field(default=10, ge=3, le=200)

    @model_validator(mode="after")
    def _has_source(self) -> FactorConfig:
        if self.layer is None and self.column is None:
            raise ValueError(
                f"factor '{self.name}' needs a source: set 'layer' (a present-day raster) or "
                "'column' (a column of the survey table)"
            )
        return self


class FitConfig(_Section):
    """How the upper boundaries are fitted."""

    tau: float = 0.95
    transform: Transform = "none"
    outside: Outside = "hold"
    wedge_replicates: int = Field(default=50, ge=0, le=10_000)
    wedge_alpha: float = Field(default=0.05, gt=0, lt=1)
    seed: int = 0
    species: list[str] | None = None
    bootstrap: int = Field(default=0, le=100_000)
    bootstrap_block: float | None = None
    bootstrap_seed: int = 0
    # factor screening (ceiling.screening): leave out of the minimum a factor without a distinct
    # upper edge; correlation alone never leaves a factor out. edge_test: "both" (the
    # block-bootstrap wedge test finds no edge and blocked cross-validation finds the held-out
    # loss no worse without it), "cv" (blocked cross-validation alone) or "wedge" (the wedge test alone)
    screen: bool = True
    edge_test: Literal["both", "cv", "wedge"] = "both"
    keep: list[str] = Field(default_factory=list)
    drop: list[str] = Field(default_factory=list)
    # how the curves are chosen: each on its own, or together under the minimum (ceiling.joint)
    method: Literal["per_factor", "joint"] = "joint"
    joint_starts: int = Field(default=3, ge=1, le=50)
    # shape rule of the joint fit's curves (ceiling.boundary.shapes): "concave" or "free"
    shape: Literal["concave", "free"] = "concave"
    # model selection by spatially blocked cross-validation (ceiling.selection)
    select: list[Literal["basis", "tau", "transform"]] = Field(default_factory=list)
    cv_block: float | None = None
    cv_folds: int = Field(default=5, ge=2, le=50)

    @field_validator("cv_block")
    @classmethod
    def _positive_cv_block(cls, v: float | None) -> float | None:
        if v is not None and not (math.isfinite(v) and v > 0):
            raise ValueError(
                f"the cross-validation block size must be a positive number of map units; got {v}; "
                "set fit.cv_block to the side of a square block, or leave it out"
            )
        return v

    @model_validator(mode="after")
    def _keep_drop_disjoint(self) -> FitConfig:
        both = sorted(set(self.keep) & set(self.drop))
        if both:
            raise ValueError(
                f"factor(s) {', '.join(both)} are listed in both fit.keep and fit.drop; list each in one of them"
            )
        return self

    @field_validator("bootstrap")
    @classmethod
    def _enough_replicates(cls, v: int) -> int:
        if v != 0 and v < MIN_REPLICATES:
            raise ValueError(
                f"bounds need at least {MIN_REPLICATES} replicates; got {v}; set fit.bootstrap "
                f"to 0 (no bootstrap) or to {MIN_REPLICATES} or more (200 is usual)"
            )
        return v

    @field_validator("bootstrap_block")
    @classmethod
    def _positive_block(cls, v: float | None) -> float | None:
        if v is not None and not (math.isfinite(v) and v > 0):
            raise ValueError(
                f"the bootstrap block size must be a positive number of map units of the survey "
                f"CRS; got {v}; set fit.bootstrap_block to the side of a square block, or leave it "
                "out to resample single points"
            )
        return v

    @field_validator("tau")
    @classmethod
    def _tau_range(cls, v: float) -> float:
        if not 0.5 < v < 1:
            raise ValueError(
                f"tau must lie strictly between 0.5 and 1 for an upper boundary; got {v} "
                "(0.9 to 0.99 is usual)"
            )
        return v


class OutputsConfig(_Section):
    """``[outputs]``: what a run writes. ``maps`` chooses the maps (every map when left out),
    ``netcdf`` the NetCDF and ``report`` the report with its figures; the summary tables and the
    manifest are always written. The tables ``zones`` and ``community`` are validated by the
    stages that make them (ceiling.zones, ceiling.community); here only their names."""

    maps: list[str] | None = None
    netcdf: StrictBool = True
    report: StrictBool = True
    zones: dict[str, Any] | None = None
    community: dict[str, Any] | None = None

    @field_validator("maps")
    @classmethod
    def _known_maps(cls, v: list[str] | None) -> list[str] | None:
        if v is None:
            return v
        unknown = [m for m in v if m not in MAP_NAMES]
        if unknown:
            raise ValueError(f"unknown map name(s) {', '.join(repr(m) for m in unknown)}; valid map names: "
                             f"{', '.join(MAP_NAMES)}")
        if not v:
            raise ValueError(f"no maps listed; name at least one of {', '.join(MAP_NAMES)}, or leave the key out "
                             "to write every map")
        return list(dict.fromkeys(v))


class RunConfig(_Section):
    """A whole run: the survey, the factors and the fit settings.

    Sections for projection, scenarios and outputs are accepted as free tables here and
    validated by the stages that use them.
    """

    name: str = "run"
    survey: SurveyConfig
    factors: list[FactorConfig] = Field(min_length=1)
    fit: FitConfig = FitConfig()
    present: dict[str, Any] | None = None
    futures: list[dict[str, Any]] | None = None
    projection: dict[str, Any] | None = None
    outputs: dict[str, Any] | None = None
    derive: dict[str, Any] | None = None  # factor layers from climate-model series (ceiling.derive.settings)
    source: Path | None = Field(default=None, exclude=True)

    @field_validator("factors")
    @classmethod
    def _unique_factors(cls, v: list[FactorConfig]) -> list[FactorConfig]:
        seen: set[str] = set()
        for f in v:
            if f.name in seen:
                raise ValueError(
                    f"factor name '{f.name}' is listed twice; give each factor a distinct name"
                )
            seen.add(f.name)
        return v

    @model_validator(mode="after")
    def _known_screen_names(self) -> RunConfig:
        names = [f.name for f in self.factors]
        for key in ("keep", "drop"):
            unknown = [n for n in getattr(self.fit, key) if n not in names]
            if unknown:
                raise ValueError(
                    f"fit.{key} names factor(s) {', '.join(unknown)} that the config does not list; "
                    f"use names from [[factors]] ({', '.join(names)})"
                )
        if len(self.fit.drop) >= len(names):
            raise ValueError("fit.drop leaves no factor in the minimum; keep at least one factor")
        return self

    @property
    def factor_names(self) -> list[str]:
        return [f.name for f in self.factors]


def _models_in(annotation: Any) -> list[type[BaseModel]]:
    """The pydantic models an annotation holds (``list[M]``, ``dict[str, str | M]``, ``M | None``)."""
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return [annotation]
    return [m for a in typing.get_args(annotation) for m in _models_in(a)]


def _section_for(root: type[BaseModel], loc: tuple[Any, ...]) -> tuple[type[BaseModel], tuple[Any, ...]]:
    """The model whose key ``loc[-1]`` is, and ``loc`` without pydantic's union-member tags."""
    model, shown = root, []
    for part in loc[:-1]:
        if isinstance(part, str) and part in model.model_fields:
            inner = _models_in(model.model_fields[part].annotation)
            model = inner[0] if inner else model
        elif isinstance(part, str) and (part in ("str", "int", "float", "bool") or part.startswith(("list[", "dict["))
                                        or part == model.__name__):
            continue  # the tag of a union member (e.g. '_LayerSpec'), not a key of the config
        shown.append(part)
    return model, (*shown, loc[-1]) if loc else ()


def format_error(err: dict[str, Any], path: Path | str, root: type[BaseModel] | None = None,
                 where: tuple[Any, ...] = ()) -> str:
    """One line for one pydantic error of a config ``root`` section at ``where`` (the only
    formatter of config errors: unknown keys get the closest valid key or the list of keys)."""
    root = RunConfig if root is None else root
    model, loc = _section_for(root, tuple(err.get("loc", ())))
    dotted = ".".join(str(p) for p in (*where, *loc)) or "(top level)"
    kind = err.get("type", "")
    if kind == "extra_forbidden":
        key = str(loc[-1])
        allowed = [k for k in model.model_fields if k != "source"]
        close = difflib.get_close_matches(key, allowed, n=1, cutoff=0.5)
        hint = f"did you mean '{close[0]}'?" if close else f"valid keys: {', '.join(allowed)}"
        return f"{path}: unknown key '{dotted}'; {hint}"
    if kind == "missing":
        return f"{path}: required key '{dotted}' is missing; add it to the config"
    msg = str(err.get("msg", "invalid value"))
    msg = msg.removeprefix("Value error, ")
    value = err.get("input")
    plain = not isinstance(value, dict | list) and value is not None and "got" not in msg
    shown = f" (got {value!r})" if plain else ""
    return f"{path}: '{dotted}': {msg}{shown}"


def _format_error(err: dict[str, Any], path: Path | str) -> str:  # kept for existing callers
    return format_error(err, path)


def validate_section(model: type[BaseModel], data: Any, where: str, source: Path | str | None) -> Any:
    """Validate one table of a config (``where``: its dotted name) against ``model``; the first
    error, unknown keys first, becomes one :class:`ConfigError` line from :func:`format_error`."""
    try:
        return model.model_validate(data if data is not None else {})
    except ValidationError as exc:
        errors = exc.errors()
        extra = [e for e in errors if e.get("type") == "extra_forbidden"]
        where_loc = tuple(p for p in where.split(".") if p)
        raise ConfigError(format_error((extra or errors)[0], source or "config", model, where_loc)) from None


def parse_config(data: dict[str, Any], *, base: Path | None = None, source: Path | str = "config") -> RunConfig:
    """Validate a config mapping and resolve relative paths against ``base``."""
    try:
        cfg = RunConfig.model_validate(data)
    except ValidationError as exc:
        errors = exc.errors()
        extra = [e for e in errors if e.get("type") == "extra_forbidden"]
        raise ConfigError(format_error((extra or errors)[0], source)) from None
    validate_section(OutputsConfig, cfg.outputs, "outputs", source)  # its tables are checked by their stages
    if base is None:
        return cfg
    return resolve_paths(cfg, base, source)


def _resolve(p: Path | None, base: Path) -> Path | None:
    if p is None:
        return None
    p = Path(p).expanduser()
    return p if p.is_absolute() else (base / p)


def resolve_paths(cfg: RunConfig, base: Path, source: Path | str | None = None) -> RunConfig:
    """Return a copy of ``cfg`` with every relative path joined to ``base``."""
    survey = cfg.survey.model_copy(update={"path": _resolve(cfg.survey.path, base)})
    factors = [f.model_copy(update={"layer": _resolve(f.layer, base)}) for f in cfg.factors]
    return cfg.model_copy(
        update={"survey": survey, "factors": factors, "source": Path(source) if source else None}
    )


def load_config(path: str | Path) -> RunConfig:
    """Read and validate a TOML config file."""
    path = Path(path)
    if not path.is_file():
        raise InputFileError(f"config file not found: {path}; check the path")
    try:
        with path.open("rb") as fh:
            data = tomllib.load(fh)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: not valid TOML ({exc}); fix the syntax at that line") from None
    except UnicodeDecodeError:
        raise ConfigError(f"{path}: not a text file; a config must be UTF-8 TOML") from None
    except RecursionError:
        raise ConfigError(f"{path}: tables nested too deeply; a config needs a few levels at most") from None
    return parse_config(data, base=path.resolve().parent, source=path)
