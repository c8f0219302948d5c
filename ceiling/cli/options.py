"""Options shared by several commands, declared once."""

from __future__ import annotations

from pathlib import Path

import click

config_arg = click.argument("config", type=click.Path(path_type=Path, dir_okay=False))
out_opt = click.option("--out", "out", required=True, type=click.Path(path_type=Path, file_okay=False), help="Output folder (created; refused if it exists and is not empty unless --overwrite).")
overwrite_opt = click.option("--overwrite", is_flag=True, help="Replace an existing output folder.")
