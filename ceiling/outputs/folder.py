"""An output folder that appears complete or not at all.

:func:`staged_folder` yields a hidden staging folder beside the target; when the block ends
without error, the staging folder replaces the target in one rename (an existing target is only
replaced with ``overwrite=True``). On error the staging folder is removed and the target is left
as it was.
"""

from __future__ import annotations

import contextlib
import os
import shutil
from collections.abc import Iterator, Sequence
from pathlib import Path

from ..errors import OutputError
from .atomic import TMP_PREFIX

__all__ = ["check_output_folder", "staged_folder"]

LAYER_SUFFIXES = (".tif", ".tiff", ".nc", ".vrt", ".img")


def check_output_folder(out: Path, *, overwrite: bool, inputs: Sequence[Path] = ()) -> None:
    """Refuse an unusable output folder before any work is done."""
    out = Path(out)
    resolved = out.resolve()
    if out.exists() and not out.is_dir():
        raise OutputError(f"output path {out} exists and is not a folder; choose another --out")
    if out.is_dir() and any(out.iterdir()) and not overwrite:
        raise OutputError(f"output folder {out} exists and is not empty; pass --overwrite to replace it or choose another --out")
    for p in inputs:
        folder = Path(p).resolve().parent
        if resolved == folder or folder.is_relative_to(resolved):
            raise OutputError(
                f"output folder {out} contains the input {p}; replacing it would delete the input: choose another --out"
            )
        # outputs inside a folder of climate layers would mix with them (and with any pattern over them)
        if resolved.is_relative_to(folder) and Path(p).suffix.lower() in LAYER_SUFFIXES:
            raise OutputError(
                f"output folder {out} lies inside the layer folder {folder}; write outputs outside the input layers"
            )
    parent = resolved.parent
    while not parent.exists():
        parent = parent.parent
    if not os.access(parent, os.W_OK | os.X_OK):
        raise OutputError(f"cannot write to {parent} (permission denied); choose a writable --out")


@contextlib.contextmanager
def staged_folder(out: str | Path, *, overwrite: bool) -> Iterator[Path]:
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    stage = out.with_name(f"{TMP_PREFIX}{os.getpid()}-{out.name}")
    if stage.exists():
        shutil.rmtree(stage)
    stage.mkdir()
    try:
        yield stage
        if out.exists():
            if any(out.iterdir()) and not overwrite:
                raise OutputError(f"output folder {out} appeared while running; pass --overwrite to replace it")
            old = out.with_name(f"{TMP_PREFIX}old-{os.getpid()}-{out.name}")
            os.replace(out, old)
            os.replace(stage, out)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(stage, out)
    finally:
        if stage.exists():
            shutil.rmtree(stage, ignore_errors=True)
