"""Where numba keeps the compiled kernels between runs.

numba writes its cache beside the module (``__pycache__``) unless told otherwise. For a source
checkout that puts build products into the repository, and an installed package may sit in a
folder the user cannot write. In both cases the cache goes to a folder the user owns: the user
cache directory (``~/.cache/ceiling/numba`` on Linux, via platformdirs). numba reads
``NUMBA_CACHE_DIR`` when it is imported and picks each function's cache folder when the
function is decorated, so :func:`configure_numba_cache` runs when ``ceiling`` is imported,
before any kernel module. A ``NUMBA_CACHE_DIR`` set by the user is left alone.
"""

from __future__ import annotations

import os
import sys
from collections.abc import Mapping
from pathlib import Path

import platformdirs

__all__ = ["numba_cache_dir", "configure_numba_cache"]

PACKAGE_DIR = Path(__file__).resolve().parent


def _is_checkout(package_dir: Path) -> bool:
    root = package_dir.parent
    return (root / "pyproject.toml").is_file() or (root / ".git").exists()


def _writable(folder: Path) -> bool:
    cache = folder / "__pycache__"
    return os.access(folder, os.W_OK | os.X_OK) and (not cache.exists() or os.access(cache, os.W_OK | os.X_OK))


def numba_cache_dir(package_dir: Path = PACKAGE_DIR, *, environ: Mapping[str, str] = os.environ) -> Path | None:
    """The folder numba should cache ceiling's kernels in, or None for numba's own choice (beside
    the modules of an installed, writable package, or the user's ``NUMBA_CACHE_DIR``)."""
    if environ.get("NUMBA_CACHE_DIR"):
        return None
    if _writable(package_dir) and not _is_checkout(package_dir):
        return None
    return Path(platformdirs.user_cache_dir("ceiling", appauthor=False)) / "numba"


def configure_numba_cache(package_dir: Path = PACKAGE_DIR) -> Path | None:
    """Point numba's cache at :func:`numba_cache_dir` (for this process and its children)."""
    where = numba_cache_dir(package_dir)
    if where is None:
        return None
    os.environ["NUMBA_CACHE_DIR"] = str(where)
    numba = sys.modules.get("numba")
    if numba is not None:  # imported before ceiling: its configuration was read already
        numba.config.CACHE_DIR = str(where)
    return where
