"""The fitting stage as a whole: config -> samples -> one model per species -> files.

:func:`fit_config` does the work in memory and returns a :class:`FitRun`;
:func:`write_fit` writes the model file, the diagnostics table and the figures into a folder
that appears complete or not at all. ``ceiling fit`` is these two calls.
"""

from __future__ import annotations

import hashlib
import warnings
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
import rasterio

from . import __version__
from .companions import config_inputs, with_companions
from .config import FitConfig, RunConfig
from .errors import CeilingError, CeilingWarning, DataError, InputFileError
from .figures import fit_figure, fit_panel
from .grids import layer_reader, template_grid
from .model import CeilingModel, FactorSpec, ModelSet, fit
from .outputs.atomic import atomic_write_text
from .outputs.folder import check_output_folder, staged_folder
from .outputs.names import (
    DIAGNOSTICS_FILE,
    MODEL_FILE,
    check_distinct,
    fit_figure_name,
    fit_panel_name,
    path_parts,
)
from .samples import Samples, load_samples
from .scenarios import check_sections, climates
from .uncertainty import bootstrap_model

SELECTION_FILE = "selection.csv"

__all__ = ["FitRun", "fit_config", "write_fit", "fit_to_folder", "factor_specs", "config_inputs", "check_species_names",
           "with_companions", "fit_options", "future_samples"]

# the cells of each future sampled for the fit's decoupling note: the whole grid when it is
# small, else WINDOWS seeded windows of WINDOW x WINDOW cells (a few reads per layer)
WINDOWS, WINDOW = 16, 64


@dataclass(frozen=True)
class FitRun:
    """The outcome of fitting a config: the models, their samples and the warnings raised."""

    models: ModelSet
    samples: dict[str, Samples]
    warnings: list[str] = field(default_factory=list)
    # model selection by blocked cross-validation (ceiling.selection), when fit.select is set
    selection: Any = None

    def summary(self, *, detail: bool = False) -> str:
        """A table of every species and factor; ``detail=True`` adds coefficients."""
        lines = []
        if detail:
            lines += [m.summary() + "\n" for m in self.models]
        for m in self.models:
            s = self.samples[m.species]
            lines.append(f"{m.species}: tau={m.tau:g}, {s.summary().split(': ', 1)[1]}")
        head = f"  {'species':<10} {'factor':<12} {'n':>5} {'above':>6} {'R1':>6} {'peak at':>10}  {'wedge p':>9}  verdict"
        lines.append(head)
        for m in self.models:
            for f in m.all_factors:
                d = f.diagnostics
                out = "" if f.in_minimum else f"; left out of the minimum: {f.screened_reason}"
                lines.append(
                    f"  {m.species:<10} {f.factor:<12} {d.n:>5d} {d.share_above:>6.3f} {d.pseudo_r1:>6.3f} "
                    f"{d.peak_at:>10.4g}  {d.wedge_p:>9.3g}  {d.verdict}{out}"
                )
        for m in self.models:
            info = dict(m.fit_info or {})
            if info.get("method") == "joint":
                lines.append(
                    f"{m.species}: joint fit, mean check loss {info['objective_start']:.4g} -> "
                    f"{info['objective_end']:.4g}; share above the combined ceiling "
                    f"{info['share_above']:.3f} (expected about {1 - m.tau:.3f})"
                )
        if self.selection is not None:
            ch = ", ".join(f"{k}={v}" for k, v in self.selection.chosen.items())
            lines.append(
                f"selected by spatially blocked cross-validation ({', '.join(self.selection.selected)}; "
                f"{len(self.selection.table)} candidates, table in selection.csv): {ch}"
            )
        if self.warnings:
            lines.append(f"{len(self.warnings)} warning(s): " + "; ".join(self.warnings))
        return "\n".join(lines)


def _layer_units(path: Path) -> str | None:
    try:
        with rasterio.open(path) as src:
            u = (src.units or (None,))[0] or src.tags(1).get("units")
    except rasterio.errors.RasterioIOError:
        return None
    return u or None


def factor_specs(cfg: RunConfig) -> list[FactorSpec]:
    """Per-factor fitting options, with units from the config or else from the layer."""
    out = []
    for f in cfg.factors:
        units = f.units or (_layer_units(f.layer) if f.layer is not None else None)
        out.append(
            FactorSpec(name=f.name, basis=f.basis, df=f.df, estimator=f.estimator, bins=f.bins,
                       units=units, label=f.label)
        )
    return out


def fit_options(fit_cfg: FitConfig) -> dict[str, Any]:
    """The keyword arguments of :func:`ceiling.model.fit` that a ``[fit]`` section sets."""
    return dict(
        tau=fit_cfg.tau, transform=fit_cfg.transform, outside=fit_cfg.outside,
        wedge_replicates=fit_cfg.wedge_replicates, wedge_alpha=fit_cfg.wedge_alpha, seed=fit_cfg.seed,
        screen=fit_cfg.screen, keep=tuple(fit_cfg.keep), drop=tuple(fit_cfg.drop), method=fit_cfg.method,
        joint_starts=fit_cfg.joint_starts, cv_folds=fit_cfg.cv_folds, cv_block=fit_cfg.cv_block,
        shape=fit_cfg.shape, edge_test=fit_cfg.edge_test,
    )


def _windows(shape: tuple[int, int], seed: int) -> list[tuple[slice, slice]]:
    h, w = shape
    if h * w <= WINDOWS * WINDOW * WINDOW:
        return [(slice(0, h), slice(0, w))]
    rng = np.random.default_rng(seed)
    hh, ww = min(WINDOW, h), min(WINDOW, w)
    return [(slice(r, r + hh), slice(c, c + ww))
            for r, c in zip(rng.integers(0, h - hh + 1, WINDOWS), rng.integers(0, w - ww + 1, WINDOWS))]


def future_samples(cfg: RunConfig, names: list[str], *, seed: int = 0) -> dict[str, dict[str, np.ndarray]]:
    """Factor values at a sample of cells of every future of ``cfg``: {climate label: {factor: values}}.

    The cells are those of the present template grid (the first factor's present layer): all
    of them on a small grid, else seeded windows; each future's layers are read on that grid
    (warped when they lie on another) in their own units, which is enough for rank
    correlations. The fit uses them to say when two factors that move together at the survey
    sites part ways in the future (:mod:`ceiling.screening`).
    """
    if not cfg.futures or not names:
        return {}
    cl = climates(cfg)
    tpl = template_grid(cl[0].layers[names[0]], factor=names[0])
    wins = _windows(tpl.shape, seed)
    out = {}
    for c in cl[1:]:
        if c.series is not None:  # raw climate-model series: no factor layers until derived in the run
            continue
        vals = {}
        for f in names:
            rd = layer_reader(c.layers[f], tpl, factor=f, units=None, resampling="nearest")
            vals[f] = np.concatenate([np.asarray(rd[r, q], dtype=np.float64).ravel() for r, q in wins])
        out[c.label] = vals
    return out


def _futures_or_warn(cfg: RunConfig, names: list[str]) -> dict[str, dict[str, np.ndarray]]:
    try:
        return future_samples(cfg, names, seed=cfg.fit.seed)
    except CeilingError as exc:
        warnings.warn(f"the future layers could not be sampled ({exc}); the fit cannot say whether factors "
                      "left out of the minimum part ways in the future", CeilingWarning, stacklevel=2)
        return {}


def _sha256(path: Path | None) -> str | None:
    if path is None or not Path(path).is_file():
        return None
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def fit_config(cfg: RunConfig) -> FitRun:
    """Fit every species of the config's survey (or ``fit.species``).

    With ``fit.bootstrap`` > 0 each species' model also carries that many bootstrap
    replicates (:func:`ceiling.uncertainty.bootstrap_model`, seeded by ``fit.bootstrap_seed``,
    resampling spatial blocks of ``fit.bootstrap_block`` map units when set).
    """
    check_sections(cfg)  # the sections this stage does not use are refused now too, not at projection
    for f in cfg.factors:
        if f.layer is not None and not Path(f.layer).is_file():
            raise InputFileError(f"layer file not found for factor '{f.name}': {f.layer}; check factors.layer in the config")
    caught_all: list[str] = []
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", CeilingWarning)
        samples = load_samples(cfg, species=cfg.fit.species)
        check_species_names(list(samples), [f.name for f in cfg.factors], where=f"{cfg.survey.path} (survey.species)")
        specs = factor_specs(cfg)
        models: dict[str, CeilingModel] = {}
        for sp, s in samples.items():
            if s.n == 0:
                raise DataError(f"species '{sp}': no usable survey points; check the survey and the layers")
            if not np.any(s.abundance > 0):
                warnings.warn(
                    f"species '{sp}': all {s.n} usable survey points have abundance 0, so its ceilings are 0 "
                    f"everywhere; check survey.abundance ('{cfg.survey.abundance}') and the survey", CeilingWarning,
                    stacklevel=2,
                )
        tau, transform, selection = cfg.fit.tau, cfg.fit.transform, None
        if cfg.fit.select:
            from .selection import select_settings

            selection = select_settings(
                samples, specs, select=cfg.fit.select, tau=tau, transform=transform,
                block=cfg.fit.cv_block, folds=cfg.fit.cv_folds, seed=cfg.fit.seed,
                fit_options=dict(outside=cfg.fit.outside, screen=False, keep=cfg.fit.keep,
                                 drop=cfg.fit.drop, method=cfg.fit.method, joint_starts=1, shape=cfg.fit.shape),
            )
            tau, transform = selection.chosen["tau"], selection.chosen["transform"]
            if "basis" in selection.chosen:
                specs = [replace(f, basis=selection.chosen["basis"], df=selection.chosen["df"]) for f in specs]
        futures = _futures_or_warn(cfg, [f.name for f in specs]) if cfg.fit.screen else {}
        for sp, s in samples.items():
            models[sp] = fit(s, specs, **{**fit_options(cfg.fit), "tau": tau, "transform": transform,
                                          "futures": futures})
            if cfg.fit.bootstrap > 0:
                models[sp] = bootstrap_model(
                    models[sp], s, replicates=cfg.fit.bootstrap, seed=cfg.fit.bootstrap_seed,
                    block=cfg.fit.bootstrap_block, bins={f.name: f.bins for f in specs},
                )
    for w in caught:
        if issubclass(w.category, CeilingWarning):
            caught_all.append(" ".join(str(w.message).split()))
        else:
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    provenance = {
        "package_version": __version__,
        "config_sha256": _sha256(cfg.source),
        "survey_file": Path(cfg.survey.path).name,
        "survey_sha256": _sha256(cfg.survey.path),
        "species_data_sha256": {sp: s.sha256 for sp, s in samples.items()},
        "warnings": len(caught_all),
    }
    return FitRun(ModelSet(models, provenance), samples, caught_all, selection)


def check_species_names(species: list[str], factors: list[str], *, where: str) -> None:
    """Refuse species whose folders, or whose fit figures (``fit_{species}_{factor}.png``), would
    coincide (:func:`ceiling.outputs.names.path_parts`)."""
    path_parts("species", species, where=where)
    figures = [(f"species '{sp}' factor '{f}'", fit_figure_name(sp, f).name) for sp in species for f in factors]
    figures += [(f"species '{sp}' (all factors)", fit_panel_name(sp).name) for sp in species]
    check_distinct(figures, what="figure", where=where)


def write_fit(run: FitRun, out_dir: Path) -> list[Path]:
    """Write the model file, the diagnostics CSV and the fit figures into ``out_dir``."""
    out_dir = Path(out_dir)
    written = [run.models.save(out_dir / MODEL_FILE)]
    table = run.models.diagnostics_table()
    written.append(atomic_write_text(out_dir / DIAGNOSTICS_FILE, table.to_csv(index=False, float_format="%.6g")))
    if run.selection is not None:
        written.append(atomic_write_text(out_dir / SELECTION_FILE, run.selection.table.to_csv(index=False, float_format="%.6g")))
    for m in run.models:
        s = run.samples[m.species]
        (out_dir / fit_panel_name(m.species)).parent.mkdir(parents=True, exist_ok=True)
        for fc in m.all_factors:
            written.append(
                fit_figure(fc, np.asarray(s.values[fc.factor]), s.abundance, out_dir / fit_figure_name(m.species, fc.factor), species=m.species)
            )
        written.append(fit_panel(m, s, out_dir / fit_panel_name(m.species)))
    return written


def fit_to_folder(cfg: RunConfig, out_dir: Path, *, overwrite: bool = False) -> tuple[FitRun, list[Path]]:
    """Check the output folder, fit, then write everything into it at once."""
    protect = config_inputs(cfg) + ([Path(cfg.source)] if cfg.source else [])
    target = check_output_folder(out_dir, overwrite=overwrite, inputs=protect)
    run = fit_config(cfg)
    with staged_folder(target, overwrite=overwrite) as stage:
        written = write_fit(run, stage)
    return run, [Path(out_dir) / p.relative_to(stage) for p in written]


