"""``ceiling project`` and ``ceiling run``: project fitted ceilings onto climate grids."""

from __future__ import annotations

from pathlib import Path

import click

from .options import (
    bootstrap_opt,
    config_arg,
    handle_errors,
    out_opt,
    overwrite_opt,
    with_bootstrap,
)

compute_opts = [
    click.option("--workers", type=click.IntRange(min=1), default=None,
                 help="Start a local dask.distributed cluster with N worker processes (loopback; N >= 1)."),
    click.option("--scheduler", "address", default=None, help="Join an existing dask.distributed cluster at ADDRESS."),
    click.option("--threads", type=click.IntRange(min=1), default=None,
                 help="Threads for the default threaded scheduler and figure processes (N >= 1; default: all cores)."),
]


def _with_compute(fn):
    for opt in reversed(compute_opts):
        fn = opt(fn)
    return fn


resume_opt = click.option(
    "--resume", is_flag=True,
    help="Continue an interrupted run into the same --out: climates whose files match their checksums are reused, the rest recomputed.")


def _run(ctx: click.Context, config: Path, out: Path, model: Path | None, overwrite: bool, workers, address, threads,
         bootstrap: int | None = None, resume: bool = False) -> None:
    from ..config import load_config
    from ..running import project_to_folder  # imported per command: a quick start for the others

    cfg = with_bootstrap(load_config(config), bootstrap)
    quiet = ctx.obj.get("quiet")
    res = project_to_folder(
        cfg, out, model_path=model, overwrite=overwrite, workers=workers, address=address, threads=threads,
        progress=None if quiet else (lambda s: click.echo(s, err=True)), resume=resume,
    )
    if not quiet:
        for w in (res.fit.warnings if res.fit is not None else []) + list(res.projection.warnings):
            click.echo(f"warning: {w}", err=True)
        click.echo(res.summary())


@click.command("project")
@config_arg
@click.option("--model", "model", required=True, type=click.Path(path_type=Path, dir_okay=False), help="Model file written by 'ceiling fit'.")
@out_opt
@overwrite_opt
@resume_opt
@_with_compute
@click.pass_context
@handle_errors
def project(ctx, config, model, out, overwrite, resume, workers, address, threads) -> None:
    """Project a fitted model onto the present and every future of CONFIG."""
    _run(ctx, config, out, model, overwrite, workers, address, threads, resume=resume)


@click.command("run")
@config_arg
@out_opt
@click.option("--model", "model", default=None, type=click.Path(path_type=Path, dir_okay=False), help="Reuse this model file instead of fitting.")
@overwrite_opt
@bootstrap_opt
@resume_opt
@_with_compute
@click.pass_context
@handle_errors
def run(ctx, config, out, model, overwrite, bootstrap, resume, workers, address, threads) -> None:
    """Fit (or reuse a model file) and project: the whole job on CONFIG."""
    _run(ctx, config, out, model, overwrite, workers, address, threads, bootstrap, resume=resume)
