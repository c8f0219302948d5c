"""Worker processes that end with the process that started them.

A run killed with SIGKILL cannot stop its helpers; :func:`worker_init` is run first in each
helper process (``ProcessPoolExecutor(initializer=worker_init, initargs=(os.getpid(),))``) and
makes it end with its parent: on Linux the kernel sends it SIGKILL when the parent dies
(``prctl(PR_SET_PDEATHSIG)``); elsewhere a watchdog thread checks the parent once a second.
:func:`parent_gone` lets a helper check between two pieces of work (is the parent, is the run's
folder still there?), so that it never writes into the folder of a run that has ended.
"""

from __future__ import annotations

import ctypes
import os
import signal
import sys
import threading
import time

__all__ = ["worker_init", "parent_gone"]

PR_SET_PDEATHSIG = 1  # <linux/prctl.h>
_PARENT: list[int] = []


def _kernel_ends_with_parent() -> bool:
    """Ask Linux to send this process SIGKILL when its parent ends; False where unavailable."""
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(None, use_errno=True)  # the C library is already loaded
        return libc.prctl(PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0) == 0
    except (OSError, AttributeError):
        return False


def _watch(parent: int) -> None:
    while True:
        if os.getppid() != parent:
            os._exit(1)
        time.sleep(1.0)


def worker_init(parent: int) -> None:
    """Make this helper process end with ``parent`` (the pid that started it)."""
    _PARENT[:] = [parent]
    if not _kernel_ends_with_parent():
        threading.Thread(target=_watch, args=(parent,), name="ceiling-parent-watch", daemon=True).start()
    if os.getppid() != parent:  # the parent died before the request took effect
        os._exit(1)


def parent_gone(folder: str | os.PathLike[str] | None = None) -> bool:
    """True in a helper process whose parent has ended, or whose run ``folder`` is gone
    (always False in the main process)."""
    if not _PARENT:
        return False
    return os.getppid() != _PARENT[0] or (folder is not None and not os.path.isdir(folder))
