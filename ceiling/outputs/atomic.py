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

__all__ = ["atomic_path", "atomic_write_text", "atomic_write_bytes", "sha256_file", "tmp_name", "Prefetch"]

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


_DIGESTS: dict[tuple, str] = {}  # (path, device, inode, size, mtime, ctime) -> sha256, for this process
_MAX_DIGESTS = 100_000


def _stat_key(path: str | Path) -> tuple:
    st = os.stat(path)
    return (os.path.realpath(path), st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns, st.st_ctime_ns)


def sha256_file(path: str | Path, chunk: int = 1 << 20) -> str:
    """The file's sha256. Remembered for the file as it is (path, inode, size, modification and
    change times), so a run that lists its files in several places (completion records, the report, the
    manifest) reads each file once; a file rewritten since gets a new digest."""
    key = _stat_key(path)
    hit = _DIGESTS.get(key)
    if hit is not None:
        return hit
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while block := fh.read(chunk):
            h.update(block)
    if len(_DIGESTS) >= _MAX_DIGESTS:  # a long-lived process: forget, do not grow
        _DIGESTS.clear()
    _DIGESTS[key] = digest = h.hexdigest()
    return digest


class Prefetch:
    """Checksums of files computed in a background thread, in the order given (their digests are
    remembered by :func:`sha256_file`); :meth:`add` queues more files. :meth:`close` waits until
    every queued file is done, or with ``finish=False`` stops between files."""

    def __init__(self, paths=()) -> None:
        import queue
        import threading

        self._stop = threading.Event()
        self._queue: queue.SimpleQueue[Path | None] = queue.SimpleQueue()
        self.add(paths)
        self._thread = threading.Thread(target=self._run, name="ceiling-checksums", daemon=True)
        self._thread.start()

    def add(self, paths) -> None:
        for p in paths:
            self._queue.put(Path(p))

    def _run(self) -> None:
        while (p := self._queue.get()) is not None and not self._stop.is_set():
            with contextlib.suppress(OSError):
                if p.is_file():
                    sha256_file(p)

    def close(self, *, finish: bool = True) -> None:
        if not finish:
            self._stop.set()
        self._queue.put(None)
        self._thread.join()
