"""The ``ceiling`` command line: a thin layer over the Python API.

Each command parses its options, calls the API and prints. A user mistake (any
:class:`~ceiling.errors.CeilingError`, and click's own usage errors: an unknown option, a bad
option value) is printed as one ``error:`` line and exits with code 2; warnings are printed as
one ``warning:`` line each. GDAL's own messages are shown with ``-v`` only: what they report
reaches the user as an error line.
"""

from __future__ import annotations

import logging
import sys
import warnings
from typing import Any

import click

from .. import __version__
from .native import quiet_native_messages
from .options import EXIT_BAD_INPUT, show_warning


class CeilingGroup(click.Group):
    """The command group, with click's usage errors as one ``error:`` line (exit code 2)."""

    def main(self, args: Any = None, prog_name: str | None = None, complete_var: str | None = None,
             standalone_mode: bool = True, **extra: Any) -> Any:
        try:
            rv = super().main(args, prog_name, complete_var, standalone_mode=False, **extra)
        except click.UsageError as exc:
            where = " ".join(["ceiling", *(exc.ctx.command_path.split()[1:] if exc.ctx is not None else [])])
            msg = " ".join(exc.format_message().split())
            click.echo(f"error: {msg}; see '{where} --help'", err=True)
            sys.exit(EXIT_BAD_INPUT)
        except click.ClickException as exc:
            click.echo(f"error: {' '.join(exc.format_message().split())}", err=True)
            sys.exit(exc.exit_code)
        except click.Abort:  # Ctrl-C: the staging folder is kept for --resume
            click.echo("Aborted!", err=True)
            sys.exit(1)
        if standalone_mode:
            sys.exit(rv if isinstance(rv, int) else 0)
        return rv


@click.group(cls=CeilingGroup, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="ceiling")
@click.option("-v", "--verbose", count=True, help="More log output (repeat for debug).")
@click.option("-q", "--quiet", is_flag=True, help="Only errors.")
@click.pass_context
def cli(ctx: click.Context, verbose: int, quiet: bool) -> None:
    """Ceilings of species abundance under climate scenarios (potential upper limits, not forecasts)."""
    level = logging.ERROR if quiet else (logging.DEBUG if verbose > 1 else logging.INFO if verbose else logging.WARNING)
    logging.basicConfig(level=level, format="%(levelname)s: %(message)s")
    if not verbose:  # GDAL and libtiff print some failures themselves (a full disk); they reach the user as an error line
        quiet_native_messages()
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


