"""Options shared by several commands, declared once."""

from __future__ import annotations

import sys
from collections.abc import Callable
from functools import wraps
from pathlib import Path
from typing import Any

import click

from ..errors import CeilingError, CeilingWarning

config_arg = click.argument("config", type=click.Path(path_type=Path, dir_okay=False))
out_opt = click.option("--out", "out", required=True, type=click.Path(path_type=Path, file_okay=False), help="Output folder (created; refused if it exists and is not empty unless --overwrite).")
overwrite_opt = click.option("--overwrite", is_flag=True, help="Replace an existing output folder.")

EXIT_BAD_INPUT = 2


def show_warning(message: Any, category: type[Warning], *args: Any, **kwargs: Any) -> None:
    if issubclass(category, CeilingWarning):
        click.echo(f"warning: {' '.join(str(message).split())}", err=True)


def handle_errors(fn: Callable[..., Any]) -> Callable[..., Any]:
    """Turn the tool's own errors into one line on stderr and exit code 2."""

    @wraps(fn)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        try:
            return fn(*args, **kwargs)
        except CeilingError as exc:
            click.echo(f"error: {exc}", err=True)
            sys.exit(EXIT_BAD_INPUT)

    return wrapper


