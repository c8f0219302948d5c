"""Where the chunks are computed: dask's threads (default), a local cluster, or a remote one.

:func:`compute_context` yields a :class:`Compute` that the projection uses for every
``dask.compute`` call, with a lock that serialises GeoTIFF window writes (a
``distributed.Lock`` across worker processes, a thread lock otherwise). Outputs are the same
on all three: every chunk is computed by the same functions on the same inputs.
"""

from __future__ import annotations

import contextlib
import os
import threading
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

import dask

from .errors import ConfigError

__all__ = ["Compute", "compute_context"]


@dataclass
class Compute:
    kind: str  # "threads", "local-cluster" or "cluster"
    workers: int
    lock: Any
    client: Any = None
    kwargs: dict[str, Any] = field(default_factory=dict)

    def compute(self, *args: Any) -> tuple[Any, ...]:
        return dask.compute(*args, **self.kwargs)

    def describe(self) -> str:
        if self.kind == "threads":
            return f"dask threads ({self.workers})"
        return f"dask.distributed {self.kind} ({self.workers} workers)"


@contextlib.contextmanager
def compute_context(*, workers: int | None = None, address: str | None = None, threads: int | None = None) -> Iterator[Compute]:
    if workers is not None and address is not None:
        raise ConfigError("--workers and --scheduler exclude each other; give one")
    if workers is None and address is None:
        n = threads or os.cpu_count() or 1
        yield Compute("threads", n, threading.Lock(), kwargs={"scheduler": "threads", "num_workers": n})
        return
    try:
        import logging

        from distributed import Client, LocalCluster, Lock
    except ImportError:
        raise ConfigError("a cluster needs dask.distributed; install it with pip install 'ceiling[distributed]'") from None
    for name in ("distributed", "distributed.scheduler", "distributed.nanny", "distributed.worker", "distributed.core"):
        logging.getLogger(name).setLevel(logging.WARNING)
    if address is not None:
        try:
            client = Client(address, timeout="10s")
        except OSError as exc:
            raise ConfigError(f"cannot reach the dask scheduler at {address} ({exc}); check the address") from None
        with client:
            n = len(client.scheduler_info().get("workers", {}))
            yield Compute("cluster", n, Lock("ceiling-write"), client, {"scheduler": client})
        return
    if workers < 1:
        raise ConfigError(f"--workers must be at least 1; got {workers}")
    with LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None, silence_logs=logging.WARNING) as cluster, Client(cluster) as client:
        yield Compute("local-cluster", workers, Lock("ceiling-write"), client, {"scheduler": client})
