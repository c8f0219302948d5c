"""The ``ceiling`` command line: a thin layer over the Python API.

Each command parses its options, calls the API and prints. A user mistake (any
:class:`~ceiling.errors.CeilingError`) is printed as one ``error:`` line and exits with code 2;
warnings are printed as one ``warning:`` line each.
"""

from __future__ import annotations

import logging
import warnings

import click

from .. import __version__
from .options import show_warning


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="ceiling")
@click.option("-v", "--verbose", count=True, help="More log output (repeat for debug).")
@click.option("-q", "--quiet", is_flag=True, help="Only errors.")
@click.pass_context
def cli(ctx: click.Context, verbose: int, quiet: bool) -> None:
    """Ceilings of species abundance under climate scenarios (potential upper limits, not forecasts)."""
    level = logging.ERROR if quiet else (logging.DEBUG if verbose > 1 else logging.INFO if verbose else logging.WARNING)
    logging.basicConfig(level=level, format="%(levelname)s: %(message)s")
    ctx.obj = {"quiet": quiet}
    warnings.showwarning = show_warning


def _register() -> None:
    from . import demo as demo_cmd
    from . import fit as fit_cmd
    from . import project as project_cmd

    cli.add_command(fit_cmd.fit)
    cli.add_command(project_cmd.project)
    cli.add_command(project_cmd.run)
    cli.add_command(demo_cmd.demo)
    from .summarize import summarize as summarize_cmd  # regions: zones.csv / zones.gpkg
    cli.add_command(summarize_cmd)
    from .report import report as report_cmd; cli.add_command(report_cmd)  # noqa: E702, I001  figures + report.html
    from .derive import derive as derive_cmd; cli.add_command(derive_cmd)  # noqa: E702, I001  factor layers from series


_register()


def main(argv: list[str] | None = None) -> None:
    cli.main(args=argv, prog_name="ceiling")


