"""``ceiling fit CONFIG --out DIR``: fit the upper-boundary models of a config."""

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


@click.command("fit")
@config_arg
@out_opt
@overwrite_opt
@bootstrap_opt
@click.option("--detail", is_flag=True, help="Print every coefficient with its standard error and interval.")
@click.pass_context
@handle_errors
def fit(ctx: click.Context, config: Path, out: Path, overwrite: bool, bootstrap: int | None, detail: bool) -> None:
    """Fit per-factor ceilings and write the model file, diagnostics and figures."""
    from ..config import load_config
    from ..fitting import fit_to_folder

    cfg = with_bootstrap(load_config(config), bootstrap)
    run, written = fit_to_folder(cfg, out, overwrite=overwrite)
    if not ctx.obj.get("quiet"):
        for w in run.warnings:  # collected during the fit; one 'warning:' line each on stderr
            click.echo(f"warning: {w}", err=True)
        click.echo(run.summary(detail=detail))
        click.echo(f"\nwrote {len(written)} files to {out} (model: {out / 'model.json'})")
