"""The multi-factor ceiling model and its JSON model file.

A :class:`CeilingModel` holds one species' per-factor ceilings and combines them by the law of
the minimum. A :class:`ModelSet` holds the models of every species of a run and is what a model
file stores. The file is JSON with a schema version; loading validates every field and never
executes code.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from . import __version__
from .boundary import FactorCeiling, fit_factor
from .config import MIN_REPLICATES
from .errors import FitError, InputFileError, ModelFileError
from .kernels import combine_minimum
from .outputs.atomic import atomic_write_text

__all__ = ["SCHEMA_VERSION", "FactorSpec", "FitOptions", "CeilingModel", "ModelSet", "fit", "load_model", "load_models"]

SCHEMA_VERSION = 1
FILE_KIND = "ceiling-model"


@dataclass(frozen=True)
class FactorSpec:
    """How one factor's ceiling is shaped and estimated."""

    name: str
    basis: str = "quadratic"
    df: int = 4
    estimator: str = "quantile"
    bins: int = 10
    units: str | None = None
    label: str | None = None

    @classmethod
    def coerce(cls, f: Any) -> FactorSpec:
        if isinstance(f, FactorSpec):
            return f
        if isinstance(f, str):
            return cls(name=f)
        if isinstance(f, Mapping):
            return cls(**{k: v for k, v in f.items() if k in cls.__dataclass_fields__})
        # a validated config section (ceiling.config.FactorConfig)
        return cls(**{k: getattr(f, k) for k in cls.__dataclass_fields__ if hasattr(f, k)})


@dataclass(frozen=True)
class CeilingModel:
    """One species' ceiling: the minimum over its per-factor ceilings."""

    species: str
    factors: tuple[FactorCeiling, ...]
    tau: float
    transform: str
    outside: str
    n_points: int = 0
    dropped: Mapping[str, int] = field(default_factory=dict)
    # bootstrap replicates (ceiling.uncertainty.bootstrap_model): factor name -> array
    # (replicates, n_params) of coefficients in that factor's basis, and the settings used
    replicates: Mapping[str, np.ndarray] | None = None
    bootstrap: Mapping[str, Any] | None = None
    # the reference sample for the similarity layer (MESS): factor name -> sorted values at the survey points
    reference: Mapping[str, np.ndarray] | None = None
    # factors fitted but left out of the minimum by screening (in_minimum False, with reason);
    # ``factors`` holds only the factors in the minimum, in config order, and limiting codes
    # are indices into ``factor_names``
    screened: tuple[FactorCeiling, ...] = ()
    # how the curves were chosen: {"method": "per_factor"} or the joint fit's diagnostics
    fit_info: Mapping[str, Any] | None = None

    @property
    def factor_names(self) -> list[str]:
        """The factors in the minimum (the order of the limiting-factor codes)."""
        return [f.factor for f in self.factors]

    @property
    def all_factors(self) -> tuple[FactorCeiling, ...]:
        """Every fitted factor, in the minimum or screened out."""
        return tuple(self.factors) + tuple(self.screened)

    @property
    def n_replicates(self) -> int:
        """Number of bootstrap replicates held (0 without a bootstrap)."""
        if not self.replicates:
            return 0
        return int(next(iter(self.replicates.values())).shape[0])

    def __getitem__(self, name: str) -> FactorCeiling:
        for f in self.all_factors:
            if f.factor == name:
                return f
        raise KeyError(f"no factor {name!r} in the model of {self.species!r}; it has {self.factor_names}")

    def _column(self, values: Any, name: str) -> np.ndarray:
        try:
            return np.asarray(values[name], dtype=np.float64)
        except (KeyError, IndexError):
            raise FitError(
                f"values for factor '{name}' are missing; the model of '{self.species}' needs "
                f"{', '.join(self.factor_names)}"
            ) from None

    def linear_predictors(self, values: Any) -> np.ndarray:
        """Unclipped predictors, shape (K, ...), factor axis first, in model factor order."""
        return np.stack([f.linear_predictor(self._column(values, f.factor)) for f in self.factors])

    def per_factor(self, values: Any) -> np.ndarray:
        """Each factor's ceiling, shape (K, ...)."""
        return np.stack([f.predict(self._column(values, f.factor)) for f in self.factors])

    def evaluate(self, values: Any) -> tuple[np.ndarray, np.ndarray]:
        """(ceiling, limiting-factor code) at the given factor values."""
        return combine_minimum(self.linear_predictors(values), self.transform)

    def predict(self, values: Any) -> np.ndarray:
        return self.evaluate(values)[0]

    def limiting(self, values: Any) -> np.ndarray:
        return self.evaluate(values)[1]

    def diagnostics_table(self) -> pd.DataFrame:
        rows = []
        info = dict(self.fit_info or {})
        shares = info.get("limiting_share", {})
        for f in self.all_factors:
            d = f.diagnostics
            row: dict[str, Any] = {
                "species": self.species,
                "factor": f.factor,
                "units": f.units or "",
                "estimator": f.estimator,
                "basis": f.basis.name,
                "tau": f.tau,
                "transform": f.transform,
                "n": d.n,
                "observed_min": f.observed[0],
                "observed_max": f.observed[1],
                "share_above": d.share_above,
                "expected_share_above": 1 - f.tau,
                "pinball_loss": d.pinball_loss,
                "pseudo_r1": d.pseudo_r1,
                "peak_at": d.peak_at,
                "peak_ceiling": d.peak_ceiling,
                "positive_from": d.positive_from,
                "positive_to": d.positive_to,
                "wedge_stat": d.wedge_stat,
                "wedge_df": d.wedge_df,
                "wedge_p": d.wedge_p,
                "verdict": d.verdict,
                "in_minimum": bool(f.in_minimum),
                "screened_reason": f.screened_reason,
                "method": info.get("method", "per_factor"),
                "limiting_share": shares.get(f.factor, np.nan),
            }
            for i, b in enumerate(f.params):
                row[f"b{i}"] = b
                row[f"b{i}_se"] = f.bse[i]
                row[f"b{i}_ci_low"] = f.conf_int[i, 0]
                row[f"b{i}_ci_high"] = f.conf_int[i, 1]
            rows.append(row)
        return pd.DataFrame(rows)

    def summary(self) -> str:
        head = (
            f"Ceiling model for '{self.species}': {len(self.factors)} factors, tau={self.tau:g}, "
            f"transform={self.transform}, outside the observed range: {self.outside}; "
            f"{self.n_points} survey points used"
        )
        dropped = sum(self.dropped.values())
        if dropped:
            parts = ", ".join(f"{k}: {v}" for k, v in self.dropped.items() if v)
            head += f"; {dropped} dropped ({parts})"
        if self.n_replicates:
            meta = dict(self.bootstrap or {})
            how = (f"spatial blocks of {meta['block']:g} map units" if meta.get("block")
                   else "survey points")
            head += f"; {self.n_replicates} bootstrap replicates (resampling {how}, seed {meta.get('seed', 0)})"
        info = dict(self.fit_info or {})
        if info.get("method") == "joint":
            share = ", ".join(f"{k} {v:.2f}" for k, v in info.get("limiting_share", {}).items())
            head += (
                f"\njoint law-of-the-minimum fit: mean check loss {info['objective_start']:.4g} -> "
                f"{info['objective_end']:.4g} ({info['iterations']} iterations, {info['starts']} starts); "
                f"share of points above the combined ceiling {info['share_above']:.3f} (expected about "
                f"{1 - self.tau:.3f}); share of points each factor limits: {share}"
            )
        for f in self.screened:
            head += f"\n{f.factor} left out of the minimum: {f.screened_reason}"
        return "\n".join([head] + [f.summary() for f in self.all_factors])

    def to_dict(self) -> dict[str, Any]:
        out = {
            "tau": self.tau,
            "transform": self.transform,
            "outside": self.outside,
            "n_points": self.n_points,
            "dropped": dict(self.dropped),
            "factors": [f.to_dict() for f in self.all_factors],
        }
        if self.fit_info:
            out["fit"] = _plain(self.fit_info)
        if self.reference:
            out["reference"] = {k: [float(v) for v in np.asarray(a)] for k, a in self.reference.items()}
        if self.n_replicates:
            boot = {k: v for k, v in dict(self.bootstrap or {}).items() if k != "coefficients"}
            boot["replicates"] = self.n_replicates
            boot["coefficients"] = {
                f.factor: [[float(v) for v in row] for row in np.asarray(self.replicates[f.factor], dtype=np.float64)]
                for f in self.factors
            }
            out["bootstrap"] = boot
        return out

    def save(self, path: str | Path, *, provenance: Mapping[str, Any] | None = None) -> Path:
        return ModelSet({self.species: self}, dict(provenance or {})).save(path)


@dataclass(frozen=True)
class ModelSet:
    """The ceiling models of every species of a run, as stored in one model file."""

    models: Mapping[str, CeilingModel]
    provenance: Mapping[str, Any] = field(default_factory=dict)

    def __getitem__(self, species: str) -> CeilingModel:
        try:
            return self.models[species]
        except KeyError:
            raise KeyError(f"no species {species!r} in the model file; it has {list(self.models)}") from None

    def __iter__(self):
        return iter(self.models.values())

    def __len__(self) -> int:
        return len(self.models)

    @property
    def species(self) -> list[str]:
        return list(self.models)

    def summary(self) -> str:
        return "\n\n".join(m.summary() for m in self)

    def diagnostics_table(self) -> pd.DataFrame:
        return pd.concat([m.diagnostics_table() for m in self], ignore_index=True)

    def to_dict(self) -> dict[str, Any]:
        return {
            "kind": FILE_KIND,
            "schema_version": SCHEMA_VERSION,
            "package": {"name": "ceiling", "version": __version__},
            "provenance": dict(self.provenance),
            "species": {k: m.to_dict() for k, m in self.models.items()},
        }

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), indent=2, sort_keys=False, allow_nan=False) + "\n"

    def save(self, path: str | Path) -> Path:
        return atomic_write_text(Path(path), self.to_json())


def _plain(d: Any) -> Any:
    """JSON-ready copy of a small diagnostics mapping (NaN becomes null)."""
    if isinstance(d, Mapping):
        return {str(k): _plain(v) for k, v in d.items()}
    if isinstance(d, list | tuple):
        return [_plain(v) for v in d]
    if isinstance(d, float | np.floating):
        return float(d) if math.isfinite(d) else None
    if isinstance(d, np.integer):
        return int(d)
    return d


@dataclass(frozen=True)
class FitOptions:
    """Every option of :func:`fit`. These library defaults fit one curve per factor with every
    factor in the minimum; a config's defaults are :func:`ceiling.fitting.fit_options`."""

    tau: float = 0.95
    transform: str = "none"
    outside: str = "hold"
    wedge_replicates: int = 50
    wedge_alpha: float = 0.05
    seed: int = 0
    # factor screening (ceiling.screening): leave out of the minimum the factors that held-out
    # sites do not confirm; keep / drop force factors in / out
    screen: bool = False
    keep: tuple[str, ...] = ()
    drop: tuple[str, ...] = ()
    # how the curves are chosen: each on its own, or together under the minimum (ceiling.joint)
    method: str = "per_factor"
    joint_starts: int = 3
    # shape rule of the joint fit's curves: "concave" (ceiling.boundary.shapes) or "free"
    shape: str = "free"
    # the screening's test: "cv" (blocked cross-validation of the joint fit) or "wedge" (wedge
    # test, bootstrapping spatial blocks)
    edge_test: str = "cv"
    cv_folds: int = 5
    cv_block: float | None = None
    # factor values at a sample of cells of each future ({label: {factor: values}}), to say in
    # the reasons when a factor left out parts ways in the future with one kept
    futures: Mapping[str, Mapping[str, np.ndarray]] | None = None

    def check(self) -> FitOptions:
        if self.transform not in ("none", "log1p", "sqrt"):
            raise FitError(f"The 'transform' parameter must be none, log1p or sqrt; got {self.transform!r}")
        if self.method not in ("per_factor", "joint"):
            raise FitError(f"The 'method' parameter must be 'per_factor' or 'joint'; got {self.method!r}")
        if self.shape not in ("free", "concave"):
            raise FitError(f"The 'shape' parameter must be 'free' or 'concave'; got {self.shape!r}")
        if self.edge_test not in ("cv", "wedge", "both"):
            raise FitError(f"The 'edge_test' parameter must be 'cv', 'wedge' or 'both'; got {self.edge_test!r}")
        return replace(self, keep=tuple(self.keep), drop=tuple(self.drop))


def _blocks(samples: Any, opts: FitOptions) -> np.ndarray | None:
    """Spatial block labels of the points (for the wedge test's bootstrap), when they have coordinates."""
    from .selection import default_block
    from .uncertainty import spatial_blocks

    x, y = getattr(samples, "x", None), getattr(samples, "y", None)
    if x is None or y is None or not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
        return None
    x, y = np.asarray(x, dtype=np.float64), np.asarray(y, dtype=np.float64)
    return spatial_blocks(x, y, opts.cv_block if opts.cv_block is not None else default_block(x, y))


def fit(samples: Any, factors: Sequence[Any] | None = None, options: FitOptions | None = None,
        **kwargs: Any) -> CeilingModel:
    """Fit one species' multi-factor ceiling.

    ``samples`` is a :class:`ceiling.samples.Samples` (or anything with ``abundance``,
    ``values`` (a table of factor columns), ``species`` and, for spatial blocks, ``x`` and
    ``y``). ``factors`` lists factor names or :class:`FactorSpec` (per-factor basis and
    estimator); by default every column of ``samples.values`` with a quadratic basis. Options
    come as a :class:`FitOptions` and/or as keywords of its fields.

    Every factor is first fitted on its own (:func:`ceiling.boundary.fit_factor`; the wedge
    test resamples spatial blocks when the samples have coordinates). With
    ``method="joint"`` the curves of the factors in the minimum are then chosen together
    (:func:`ceiling.joint.joint_fit`; binned-maxima curves stay as fitted). With ``screen``
    some factors are left out of the minimum (:mod:`ceiling.screening`); they stay in the
    model as ``screened``, with the reason; ``keep`` / ``drop`` force factors in / out.
    """
    from .screening import choose_factors

    opts = replace(options or FitOptions(), **kwargs).check()
    values = samples.values
    specs = [FactorSpec.coerce(f) for f in (factors if factors is not None else list(values.columns))]
    y = np.asarray(samples.abundance, dtype=np.float64)
    blocks = _blocks(samples, opts) if opts.wedge_replicates else None
    fitted = []
    for i, s in enumerate(specs):
        if s.name not in values:
            raise FitError(f"factor '{s.name}' has no values in the samples; it has {list(values.columns)}")
        try:
            fc = fit_factor(
                np.asarray(values[s.name], dtype=np.float64), y, factor=s.name, tau=opts.tau,
                basis=s.basis, df=s.df, transform=opts.transform, outside=opts.outside,
                estimator=s.estimator, bins=s.bins, wedge_replicates=opts.wedge_replicates,
                wedge_alpha=opts.wedge_alpha, seed=opts.seed + i, units=s.units, label=s.label, blocks=blocks,
            )
        except FitError as exc:  # name the species: a run fits several
            raise FitError(f"species '{getattr(samples, 'species', 'species')}': {exc}") from None
        fitted.append(fc)
    chosen = choose_factors(fitted, samples, opts)
    kept = [f for f in chosen.factors if f.factor not in chosen.left_out]
    screened = [replace(f, in_minimum=False, screened_reason=chosen.left_out[f.factor])
                for f in chosen.factors if f.factor in chosen.left_out]
    return CeilingModel(
        species=str(getattr(samples, "species", "species")),
        factors=tuple(kept),
        tau=float(opts.tau),
        transform=opts.transform,
        outside=opts.outside,
        n_points=int(y.size),
        dropped=dict(getattr(samples, "dropped", {}) or {}),
        reference={f.factor: _sorted_finite(values[f.factor]) for f in kept},
        screened=tuple(screened),
        fit_info=chosen.info,
    )


def _sorted_finite(v: Any) -> np.ndarray:
    a = np.asarray(v, dtype=np.float64)
    return np.sort(a[np.isfinite(a)])


def _parse_reference(ref: Any, names: Sequence[str], where: str) -> dict[str, np.ndarray] | None:
    """Validate a species' optional 'reference' section (factor -> list of numbers)."""
    if ref is None:
        return None
    fix = "re-create the model file with 'ceiling fit'"
    if not isinstance(ref, Mapping):
        raise ModelFileError(f"{where}: 'reference' must map factor names to lists of numbers; {fix}")
    out = {}
    for name in names:
        vals = ref.get(name)
        if not isinstance(vals, list) or not vals or not all(isinstance(v, int | float) and not isinstance(v, bool) for v in vals):
            raise ModelFileError(f"{where}: 'reference.{name}' must be a non-empty list of numbers; {fix}")
        out[name] = _sorted_finite(vals)
    return out


def _need(d: Mapping[str, Any], key: str, where: str) -> Any:
    if not isinstance(d, Mapping) or key not in d:
        raise ModelFileError(f"{where}: field '{key}' is missing; re-create the model file with 'ceiling fit'")
    return d[key]


def _parse_bootstrap(
    boot: Any, factors: Sequence[FactorCeiling], where: str
) -> tuple[dict[str, np.ndarray] | None, dict[str, Any] | None]:
    """Validate a species' optional 'bootstrap' section: replicate coefficients per factor."""
    if boot is None:
        return None, None
    w = f"{where}: 'bootstrap'"
    fix = "re-create the model file with 'ceiling fit' (fit.bootstrap)"
    if not isinstance(boot, Mapping):
        raise ModelFileError(f"{w} must be a table of bootstrap settings and coefficients; {fix}")
    n_rep = _need(boot, "replicates", w)
    if isinstance(n_rep, bool) or not isinstance(n_rep, int) or n_rep < MIN_REPLICATES:
        raise ModelFileError(
            f"{w}: 'replicates' must be an integer of at least {MIN_REPLICATES}; got {n_rep!r}; {fix}"
        )
    method = boot.get("method", "pairs")
    if method not in ("pairs", "spatial-blocks"):
        raise ModelFileError(f"{w}: 'method' must be 'pairs' or 'spatial-blocks'; got {method!r}; {fix}")
    block = boot.get("block")
    if block is not None and (isinstance(block, bool) or not isinstance(block, int | float)
                              or not math.isfinite(block) or block <= 0):
        raise ModelFileError(f"{w}: 'block' must be a positive number of map units or null; got {block!r}; {fix}")
    coefs = _need(boot, "coefficients", w)
    names = [f.factor for f in factors]
    if not isinstance(coefs, Mapping) or sorted(coefs) != sorted(names):
        got = sorted(coefs) if isinstance(coefs, Mapping) else type(coefs).__name__
        raise ModelFileError(f"{w}: 'coefficients' must map every factor ({', '.join(names)}) to replicates; got {got}; {fix}")
    out: dict[str, np.ndarray] = {}
    for f in factors:
        raw = coefs[f.factor]
        fw = f"{w} 'coefficients' of factor '{f.factor}'"
        shape = (n_rep, f.basis.n_params)
        rows_ok = isinstance(raw, list) and len(raw) == n_rep and all(
            isinstance(r, list) and len(r) == f.basis.n_params for r in raw
        )
        if not rows_ok:
            raise ModelFileError(
                f"{fw}: must be {shape[0]} rows (replicates) of {shape[1]} numbers (the "
                f"{f.basis.name} basis); {fix}"
            )
        if not all(isinstance(v, int | float) and not isinstance(v, bool) for r in raw for v in r):
            raise ModelFileError(f"{fw}: holds a non-number; {fix}")
        arr = np.array(raw, dtype=np.float64).reshape(shape)
        if not np.all(np.isfinite(arr)):
            raise ModelFileError(f"{fw}: holds a non-finite number; {fix}")
        out[f.factor] = arr
    meta = {k: v for k, v in boot.items() if k != "coefficients"}
    return out, meta


def _parse(data: Any, where: str) -> ModelSet:
    if not isinstance(data, Mapping) or data.get("kind") != FILE_KIND:
        raise ModelFileError(f"{where}: not a ceiling model file (no kind '{FILE_KIND}'); pass a model.json written by 'ceiling fit'")
    version = data.get("schema_version")
    if not isinstance(version, int) or isinstance(version, bool):
        raise ModelFileError(
            f"{where}: 'schema_version' must be an integer; got {version!r}; re-create the model "
            "file with 'ceiling fit'"
        )
    if version > SCHEMA_VERSION:
        raise ModelFileError(
            f"{where}: schema version {version} is newer than this ceiling {__version__} reads "
            f"(up to {SCHEMA_VERSION}); upgrade ceiling or re-fit with this version"
        )
    if version < 1:
        raise ModelFileError(f"{where}: unknown schema version {version}; re-create the model file with 'ceiling fit'")
    species = _need(data, "species", where)
    if not isinstance(species, Mapping) or not species:
        raise ModelFileError(f"{where}: 'species' must map species names to models; re-create the model file")
    models = {}
    for name, m in species.items():
        w = f"{where}: species '{name}'"
        tau = _need(m, "tau", w)
        if not isinstance(tau, int | float) or not 0.5 < tau < 1:
            raise ModelFileError(f"{w}: 'tau' must be a number in (0.5, 1); got {tau!r}")
        transform = _need(m, "transform", w)
        outside = _need(m, "outside", w)
        if transform not in ("none", "log1p", "sqrt") or outside not in ("hold", "extend"):
            raise ModelFileError(f"{w}: bad 'transform' ({transform!r}) or 'outside' ({outside!r})")
        flist = _need(m, "factors", w)
        if not isinstance(flist, list) or not flist:
            raise ModelFileError(f"{w}: 'factors' must be a non-empty list")
        factors = []
        for i, fd in enumerate(flist):
            fw = f"{w} factor {i}"
            for key in ("name", "basis", "coefficients", "std_errors", "conf_int",
                        "median_coefficients", "observed_range", "diagnostics", "estimator"):
                _need(fd, key, fw)
            fw = f"{w} factor '{fd['name']}'"
            try:
                factors.append(FactorCeiling.from_dict(fd, tau=float(tau), transform=transform, outside=outside, where=fw))
            except ModelFileError:
                raise
            except (TypeError, ValueError, KeyError) as exc:
                raise ModelFileError(f"{fw}: invalid value ({exc}); re-create the model file with 'ceiling fit'") from None
        names = [f.factor for f in factors]
        if len(set(names)) != len(names):
            raise ModelFileError(f"{w}: factor names repeat ({names}); each factor must appear once")
        screened = [f for f in factors if not f.in_minimum]
        factors = [f for f in factors if f.in_minimum]
        if not factors:
            raise ModelFileError(f"{w}: no factor is in the minimum (every 'in_minimum' is false); re-create the model file with 'ceiling fit'")
        fit_info = m.get("fit")
        if fit_info is not None and not isinstance(fit_info, Mapping):
            raise ModelFileError(f"{w}: 'fit' must be a table of fit diagnostics; re-create the model file with 'ceiling fit'")
        replicates, boot = _parse_bootstrap(m.get("bootstrap"), factors, w)
        models[str(name)] = CeilingModel(
            species=str(name), factors=tuple(factors), tau=float(tau), transform=transform,
            outside=outside, n_points=int(m.get("n_points", 0)), dropped=dict(m.get("dropped", {})),
            replicates=replicates, bootstrap=boot,
            reference=_parse_reference(m.get("reference"), [f.factor for f in factors], w),
            screened=tuple(screened), fit_info=dict(fit_info) if fit_info is not None else None,
        )
    return ModelSet(models, dict(data.get("provenance", {})))


def load_models(path: str | Path) -> ModelSet:
    """Read and validate a model file (JSON; never executes code)."""
    path = Path(path)
    if not path.is_file():
        raise InputFileError(f"model file not found: {path}; run 'ceiling fit' first or check the path")
    try:
        data = json.loads(path.read_text(encoding="utf-8"), parse_constant=lambda c: math.nan)
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ModelFileError(f"{path}: not valid JSON ({exc}); re-create it with 'ceiling fit'") from None
    except RecursionError:
        raise ModelFileError(f"{path}: nested too deeply to be a model file; re-create it with 'ceiling fit'") from None
    return _parse(data, str(path))


def load_model(path: str | Path, species: str | None = None) -> CeilingModel:
    """Read one species' model from a model file (``species`` needed when it holds several)."""
    ms = load_models(path)
    if species is None:
        if len(ms) != 1:
            raise ModelFileError(f"{path}: holds {len(ms)} species ({', '.join(ms.species)}); name one")
        return next(iter(ms))
    if species not in ms.models:
        raise ModelFileError(f"{path}: no species '{species}'; it has {', '.join(ms.species)}")
    return ms[species]
