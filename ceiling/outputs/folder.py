"""An output folder that appears complete or not at all.

:func:`staged_folder` yields a hidden staging folder beside the target; when the block ends
without error, the staging folder replaces the target in one rename (an existing target is only
replaced with ``overwrite=True``). On error the staging folder is removed and the target is left
as it was.

:func:`check_output_folder` decides, before any work, whether ``--out`` may be used: a symbolic
link is followed to its folder; the current folder (or one holding it) is refused; a folder that
holds any input of the run is refused; a non-empty folder is replaced only with ``--overwrite``
and only when it holds an earlier output of ceiling (:func:`earlier_output`).
"""

from __future__ import annotations

import contextlib
import errno
import os
import re
import shutil
from collections.abc import Iterator, Sequence
from pathlib import Path

from ..errors import CeilingError, InputFileError, OutputError
from .atomic import TMP_PREFIX

__all__ = ["check_output_folder", "output_target", "earlier_output", "staged_folder", "stage_path",
           "remove_stale_stages", "free_bytes", "check_free_space", "remove_entry", "real_path", "OUTPUT_MARKERS", "disk_full"]

LAYER_SUFFIXES = (".tif", ".tiff", ".nc", ".vrt", ".img")
# what shows that a folder was written by ceiling: (file, JSON key, start of its value), read from
# the file's first bytes: a run's or a derive's manifest, a fit's model file, the demo's truth
OUTPUT_MARKERS = (("manifest.json", "kind", "ceiling-run-manifest"), ("manifest.json", "kind", "ceiling-derive-manifest"),
                  ("model.json", "kind", "ceiling-model"),
                  ("truth.json", "description", "invented demo truth"))


def real_path(p: str | Path, *, what: str = "input") -> Path:
    """``p`` with every symbolic link followed; a link loop is one line naming the file."""
    try:
        return Path(p).resolve()
    except (RuntimeError, OSError) as exc:  # Python 3.11 raises RuntimeError for a loop
        raise InputFileError(f"{what} {p}: cannot follow its symbolic links ({exc}); fix or remove the link") from None


def output_target(out: str | Path) -> Path:
    """The folder an output goes to: ``out`` made absolute and, when it is a symbolic link,
    the folder the link points to (the link itself is left alone)."""
    absolute = Path(os.path.abspath(Path(out).expanduser()))
    if not absolute.is_symlink():
        return absolute
    try:
        target = absolute.resolve(strict=True)
    except (RuntimeError, OSError):
        raise OutputError(f"--out {out} is a symbolic link that leads nowhere (a loop or a missing target); "
                          "fix the link or choose another --out") from None
    if not target.is_dir():
        raise OutputError(f"--out {out} is a symbolic link to {target}, which is not a folder; choose another --out")
    return target


def earlier_output(folder: Path) -> str | None:
    """The file that shows ``folder`` holds an earlier output of ceiling, or None."""
    for name, key, start in OUTPUT_MARKERS:
        p = Path(folder) / name
        try:
            if not p.is_file() or p.is_symlink():
                continue
            with p.open("rb") as fh:
                head = fh.read(4096).decode("utf-8", errors="replace")
        except OSError:
            continue
        if re.search(rf'"{key}"\s*:\s*"{re.escape(start)}', head):
            return name
    return None


def _inside(path: Path, folder: Path) -> bool:
    return path == folder or path.is_relative_to(folder)


def check_output_folder(out: Path, *, overwrite: bool, inputs: Sequence[Path] = ()) -> Path:
    """Refuse an unusable output folder before any work is done; return the folder to write
    (:func:`output_target`)."""
    target = output_target(out)
    if _inside(Path.cwd(), target):
        raise OutputError(f"--out {out} is the current folder or holds it, and a run replaces its output folder as a "
                          "whole: choose a new or empty subfolder (e.g. --out results)")
    if target.exists() and not target.is_dir():
        raise OutputError(f"output path {out} exists and is not a folder; choose another --out")
    real_target = real_path(target, what="--out")
    for p in inputs:
        ap = Path(os.path.abspath(p))
        for path, folder in ((ap, ap.parent), (real_path(p), real_path(p).parent)):
            if _inside(path, target) or _inside(path, real_target):
                raise OutputError(
                    f"output folder {out} contains the input {p}; replacing it would delete the input: choose another --out"
                )
            # outputs inside a folder of climate layers would mix with them (and with any pattern over them)
            if _inside(real_target, folder) and Path(p).suffix.lower() in LAYER_SUFFIXES:
                raise OutputError(
                    f"output folder {out} lies inside the layer folder {folder}; write outputs outside the input layers"
                )
    entries = sorted(e.name for e in target.iterdir()) if target.is_dir() else []
    if entries and not overwrite:
        raise OutputError(f"output folder {out} exists and is not empty; pass --overwrite to replace an earlier output "
                          "of ceiling, or choose another --out")
    if entries and earlier_output(target) is None:
        shown = next((e for e in entries if not e.startswith(".")), entries[0])
        raise OutputError(f"output folder {out} holds files that ceiling did not write (e.g. {shown}); --overwrite "
                          "replaces only an earlier output of ceiling: choose an empty or new --out")
    parent = real_target.parent
    while not parent.exists():
        parent = parent.parent
    if not os.access(parent, os.W_OK | os.X_OK):
        raise OutputError(f"cannot write to {parent} (permission denied); choose a writable --out")
    return target


def remove_entry(p: Path) -> None:
    """Remove a file, a symbolic link (never what it points to) or a folder tree."""
    if p.is_symlink() or not p.is_dir():
        p.unlink(missing_ok=True)
    else:
        shutil.rmtree(p, ignore_errors=True)


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
        remove_entry(p)
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


# less free space than this after a failed write: the disk is taken to be full
FULL_BELOW = 16 * 2**20


def disk_full(exc: BaseException, folder: Path) -> str | None:
    """One line saying the disk of ``folder`` is full, when ``exc`` (or an error it came from) says
    so or the disk has less than :data:`FULL_BELOW` free after the failure; else None."""
    chain, e = [], exc
    while e is not None and e not in chain:
        chain.append(e)
        e = e.__cause__ or e.__context__
    said = [x for x in chain if (isinstance(x, OSError) and x.errno in (errno.ENOSPC, errno.EDQUOT))
            or "no space left on device" in str(x).lower()]
    try:
        free = shutil.disk_usage(folder).free
    except OSError:
        free = None
    if not said and (free is None or free >= FULL_BELOW):
        return None
    cause = (said or [exc])[0]
    detail = (str(cause).splitlines() or [""])[0] or type(cause).__name__
    left = f"{_size(free)} free" if free is not None else "full"
    return (f"the disk holding {Path(folder).parent} ran out of space ({left}; {detail}); nothing was kept: "
            "free some space or choose another --out")


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
    out = output_target(out)
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
            if any(out.iterdir()) and not (overwrite and earlier_output(out)):
                raise OutputError(f"output folder {out} was filled while running; choose another --out")
            old_out = out.with_name(f"{TMP_PREFIX}old-{os.getpid()}-{out.name}")
            os.replace(out, old_out)
            os.replace(stage, out)
            remove_entry(old_out)
        else:
            os.replace(stage, out)
    except KeyboardInterrupt:
        keep = True  # interrupted, not wrong: left for --resume
        raise
    except CeilingError:
        raise
    except Exception as exc:  # a full disk surfaces as many kinds of error (GDAL, HDF5, Python)
        full = disk_full(exc, stage)
        if full is not None:
            raise OutputError(full) from None
        raise
    finally:
        if stage.exists() and not keep:
            shutil.rmtree(stage, ignore_errors=True)
