"""Options shared by several commands, declared once."""

from __future__ import annotations

import errno
import sys
from collections.abc import Callable
from functools import wraps
from pathlib import Path
from typing import Any

import click

from ..errors import CeilingError, CeilingWarning

config_arg = click.argument("config", type=click.Path(path_type=Path, dir_okay=False))
out_opt = click.option("--out", "out", required=True, type=click.Path(path_type=Path, file_okay=False), help="Output folder (created; a symbolic link is followed; refused if it exists and is not empty unless --overwrite).")
overwrite_opt = click.option("--overwrite", is_flag=True, help="Replace an earlier output of ceiling in --out (never a folder holding other files or an input of this run).")
bootstrap_opt = click.option("--bootstrap", "bootstrap", type=int, default=None,
                             help="Refit on B bootstrap resamples of the survey (seeded; overrides fit.bootstrap; 0 turns it off).")


def with_bootstrap(cfg, bootstrap):
    """The config with ``fit.bootstrap`` replaced by the command-line value, validated as in a file."""
    if bootstrap is None:
        return cfg
    from pydantic import ValidationError

    from ..config import FitConfig, format_error

    try:
        fit = FitConfig.model_validate({**cfg.fit.model_dump(), "bootstrap": bootstrap})
    except ValidationError as exc:
        raise_config(format_error({**exc.errors()[0], "loc": ("--bootstrap",)}, "command line"))
    return cfg.model_copy(update={"fit": fit})


def raise_config(msg: str):
    from ..errors import ConfigError

    raise ConfigError(msg)

EXIT_BAD_INPUT = 2


def show_warning(message: Any, category: type[Warning], *args: Any, **kwargs: Any) -> None:
    if issubclass(category, CeilingWarning):
        click.echo(f"warning: {' '.join(str(message).split())}", err=True)


def handle_errors(fn: Callable[..., Any]) -> Callable[..., Any]:
    """Turn the tool's own errors, and a full disk, into one line on stderr and exit code 2."""

    @wraps(fn)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        try:
            return fn(*args, **kwargs)
        except CeilingError as exc:
            click.echo(f"error: {exc}", err=True)
            sys.exit(EXIT_BAD_INPUT)
        except OSError as exc:
            if exc.errno not in (errno.ENOSPC, errno.EDQUOT):
                raise
            click.echo(f"error: {exc.filename or 'a file'}: {exc.strerror}; free some space or write to another disk",
                       err=True)
            sys.exit(EXIT_BAD_INPUT)

    return wrapper


