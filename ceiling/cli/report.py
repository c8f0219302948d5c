"""``ceiling report RUN_DIR [--svg]``: the figures (those missing) and the report of a run folder."""

from __future__ import annotations

from pathlib import Path

import click

from ..errors import InputFileError
from ..outputs.names import MANIFEST_FILE, SUMMARY_FILE
from .options import handle_errors


def _check_run_folder(run_dir: Path) -> None:
    if not run_dir.is_dir():
        raise InputFileError(f"{run_dir} is not a run folder (no such folder); give the --out folder of 'ceiling run' or 'ceiling project'")
    missing = [n for n in (MANIFEST_FILE, SUMMARY_FILE) if not (run_dir / n).is_file()]
    if missing:
        raise InputFileError(f"{run_dir} is not a run folder: it has no {' and no '.join(missing)}; "
                             "give the --out folder of 'ceiling run' or 'ceiling project'")


@click.command("report")
@click.argument("run_dir", type=click.Path(path_type=Path))
@click.option("--svg", is_flag=True, help="Also write every map figure as SVG.")
@click.pass_context
@handle_errors
def report(ctx: click.Context, run_dir: Path, svg: bool) -> None:
    """Make the missing figures of RUN_DIR, then its self-contained report.html."""
    from ..maps import make_figures
    from ..report import build_report

    _check_run_folder(run_dir)
    made = make_figures(run_dir, formats=("png", "svg") if svg else ("png",), missing_only=True)
    path = build_report(run_dir)
    if not ctx.obj.get("quiet"):
        click.echo(f"made {len(made)} figure file(s) in {run_dir / 'figures'}; wrote {path}")
