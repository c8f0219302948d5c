"""``ceiling demo --out DIR``: regenerate the invented demo scenario."""

from __future__ import annotations

from pathlib import Path

import click

from ..outputs.folder import check_output_folder, staged_folder
from .options import handle_errors, out_opt, overwrite_opt


@click.command("demo")
@out_opt
@overwrite_opt
@click.option("--seed", type=click.IntRange(min=0), default=None, help="Random seed (default: the shipped demo's seed).")
@click.pass_context
@handle_errors
def demo(ctx: click.Context, out: Path, overwrite: bool, seed: int | None) -> None:
    """Write the invented demo region, species, survey and climate layers."""
    from ..demo import DEFAULT_SEED, make_demo

    target = check_output_folder(out, overwrite=overwrite)
    with staged_folder(target, overwrite=overwrite) as stage:
        info = make_demo(stage, seed=DEFAULT_SEED if seed is None else seed)
    if not ctx.obj.get("quiet"):
        click.echo(f"wrote the invented demo scenario to {out} ({info.get('n_files', 'all')} files)")
