"""Atomic writes: every output is written under a temporary name and renamed into place.

A reader never sees a half-written file under its final name: either the old file, the new
complete file, or nothing. The temporary name sits in the same folder (so the rename is atomic
on the same file system) and starts with a dot so it is easy to recognise and clean.
"""

from __future__ import annotations

import contextlib
import hashlib
import os
from collections.abc import Iterator
from pathlib import Path

__all__ = ["atomic_path", "atomic_write_text", "atomic_write_bytes", "sha256_file", "tmp_name"]

TMP_PREFIX = ".partial-"


def tmp_name(path: Path) -> Path:
    return path.with_name(f"{TMP_PREFIX}{os.getpid()}-{path.name}")


@contextlib.contextmanager
def atomic_path(path: str | Path) -> Iterator[Path]:
    """Yield a temporary path; on success fsync and rename it to ``path``, else remove it."""
    path = Path(path)
    tmp = tmp_name(path)
    try:
        yield tmp
        with open(tmp, "rb") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()


def atomic_write_bytes(path: str | Path, data: bytes) -> Path:
    path = Path(path)
    with atomic_path(path) as tmp:
        tmp.write_bytes(data)
    return path


def atomic_write_text(path: str | Path, text: str) -> Path:
    return atomic_write_bytes(path, text.encode("utf-8"))


def sha256_file(path: str | Path, chunk: int = 1 << 20) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while block := fh.read(chunk):
            h.update(block)
    return h.hexdigest()
