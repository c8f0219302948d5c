"""``ceiling derive CONFIG --out DIR``: factor layers from a fine monthly baseline and climate-model series."""

from __future__ import annotations

from pathlib import Path

import click

from .options import config_arg, handle_errors, out_opt, overwrite_opt


@click.command("derive")
@config_arg
@out_opt
@overwrite_opt
@click.pass_context
@handle_errors
def derive(ctx: click.Context, config: Path, out: Path, overwrite: bool) -> None:
    """Write one layer per factor for the present and every future of CONFIG declared as raw series."""
    from ..config import load_config
    from ..derive import derive_to_folder

    quiet = ctx.obj.get("quiet")
    res = derive_to_folder(load_config(config), out, overwrite=overwrite,
                           progress=None if quiet else (lambda s: click.echo(s, err=True)))
    if not quiet:
        click.echo(res.summary())
