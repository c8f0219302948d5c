"""An output folder that appears complete or not at all.

:func:`staged_folder` yields a hidden staging folder beside the target; when the block ends
without error, the staging folder replaces the target in one rename (an existing target is only
replaced with ``overwrite=True``). On error the staging folder is removed and the target is left
as it was.
"""

from __future__ import annotations

import contextlib
import os
import re
import shutil
from collections.abc import Iterator, Sequence
from pathlib import Path

from ..errors import OutputError
from .atomic import TMP_PREFIX

__all__ = ["check_output_folder", "staged_folder", "stage_path", "remove_stale_stages", "free_bytes", "check_free_space"]

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


LOCK_FILE = ".lock"
FINGERPRINT_FILE = ".fingerprint"
DONE_PREFIX = ".done-"
FREE_BYTES_ENV = "CEILING_FREE_BYTES"


def stage_path(out: Path) -> Path:
    """The staging folder of ``out``: named from the output path alone, so that an interrupted run
    can be found (and resumed) by the next one."""
    return out.with_name(f"{TMP_PREFIX}{out.name}")


def _pid_alive(pid: int) -> bool:
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True  # exists, owned by someone else
    return True


def _lock_pid(stage: Path) -> int:
    try:
        return int((stage / LOCK_FILE).read_text().strip() or 0)
    except (OSError, ValueError):
        return 0


def remove_stale_stages(out: Path, *, include_stage: bool = True) -> list[Path]:
    """Remove hidden staging leftovers beside ``out`` whose writing process is dead.

    Covers the staging folder of ``out`` (pid in its lock file) and pid-named temporary entries
    (``.partial-<pid>-<name>``, ``.partial-old-<pid>-<name>``) left by a killed process.
    """
    removed = []
    parent = out.parent
    if not parent.is_dir():
        return removed
    for p in parent.iterdir():
        if p.name == stage_path(out).name:
            if not include_stage:
                continue
            pid = _lock_pid(p)
        else:
            m = re.fullmatch(rf"{re.escape(TMP_PREFIX)}(?:old-)?(\d+)-{re.escape(out.name)}", p.name)
            if not m:
                continue
            pid = int(m.group(1))
        if pid == os.getpid() or _pid_alive(pid):
            continue
        if p.is_dir():
            shutil.rmtree(p, ignore_errors=True)
        else:
            p.unlink(missing_ok=True)
        removed.append(p)
    return removed


def free_bytes(path: Path) -> int:
    """Free space on the file system of ``path``; the environment variable CEILING_FREE_BYTES,
    when set, replaces the reading (tests and dry runs)."""
    fake = os.environ.get(FREE_BYTES_ENV)
    if fake not in (None, ""):
        try:
            return int(float(fake))
        except ValueError:
            raise OutputError(f"environment variable {FREE_BYTES_ENV}={fake!r} is not a number of bytes; unset it or give one") from None
    p = Path(path)
    while not p.exists():
        p = p.parent
    return shutil.disk_usage(p).free


def check_free_space(target: Path, need: int, *, what: str) -> None:
    """Refuse before writing when the file system of ``target`` has less than ``need`` bytes free."""
    have = free_bytes(target)
    if have < need:
        raise OutputError(
            f"not enough free space for {what} in {Path(target).parent}: about {_size(need)} needed "
            f"(uncompressed upper bound), {_size(have)} free; free some space or choose another --out"
        )


def _size(n: float) -> str:
    for unit in ("B", "KB", "MB", "GB", "TB"):
        if abs(n) < 1024 or unit == "TB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1024
    return f"{n} B"


@contextlib.contextmanager
def staged_folder(out: str | Path, *, overwrite: bool, resume: bool = False, fingerprint: str = "") -> Iterator[Path]:
    """A staging folder that replaces ``out`` only when the body completes.

    The folder is ``.partial-<name>`` beside ``out``, with a lock file holding the writing
    process's pid. A run refuses a staging folder whose process is alive; one of a dead process
    is removed, or with ``resume`` kept when its ``fingerprint`` (config and inputs) matches, so
    that the completed climates in it are reused. An error removes the staging folder; a kill
    (or Ctrl-C) leaves it for ``--resume``.
    """
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    stage = stage_path(out)
    if stage.exists():
        pid = _lock_pid(stage)
        if pid != os.getpid() and _pid_alive(pid):
            raise OutputError(f"another run (process {pid}) is writing {out}; wait for it or choose another --out")
    remove_stale_stages(out, include_stage=False)  # the staging folder itself is decided below
    if stage.exists():
        old = (stage / FINGERPRINT_FILE).read_text() if (stage / FINGERPRINT_FILE).is_file() else None
        if not resume or old != fingerprint:
            shutil.rmtree(stage)
        else:  # temporary files of the interrupted writer
            for p in list(stage.rglob(f"{TMP_PREFIX}*")) + list(stage.rglob(".stream-*")):
                if p.is_file():
                    p.unlink(missing_ok=True)
    stage.mkdir(exist_ok=True)
    (stage / LOCK_FILE).write_text(str(os.getpid()))
    (stage / FINGERPRINT_FILE).write_text(fingerprint)
    keep = False
    try:
        yield stage
        for p in [stage / LOCK_FILE, stage / FINGERPRINT_FILE, *stage.glob(f"{DONE_PREFIX}*")]:
            p.unlink(missing_ok=True)
        if out.exists():
            if any(out.iterdir()) and not overwrite:
                raise OutputError(f"output folder {out} appeared while running; pass --overwrite to replace it")
            old_out = out.with_name(f"{TMP_PREFIX}old-{os.getpid()}-{out.name}")
            os.replace(out, old_out)
            os.replace(stage, out)
            shutil.rmtree(old_out, ignore_errors=True)
        else:
            os.replace(stage, out)
    except KeyboardInterrupt:
        keep = True  # interrupted, not wrong: left for --resume
        raise
    finally:
        if stage.exists() and not keep:
            shutil.rmtree(stage, ignore_errors=True)
