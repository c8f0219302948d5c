"""Where the chunks are computed: local threads (default), a local cluster, or a remote one.

:func:`compute_context` yields a :class:`Compute`. The projection hands it one task per chunk
(:meth:`Compute.imap`): read the chunk's layers, compute its maps and statistics, encode them.
On threads the tasks also write their maps; on a cluster they run on dask.distributed workers,
their results come back to the calling process, which writes them, and the workers then make the
COGs (inputs and the staging folder must be on a file system the workers share). The
lazy xarray API (:mod:`ceiling.projection`) and the other stages use :meth:`Compute.compute`
(dask's threaded scheduler, or the cluster), with :attr:`Compute.lock` serialising GeoTIFF
window writes. Outputs are the same on all three: every chunk is computed by the same
functions on the same inputs, and written in a fixed order.
"""

from __future__ import annotations

import contextlib
import numbers
import os
import threading
import uuid
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from typing import Any

import dask

from .errors import ConfigError

__all__ = ["Compute", "compute_context", "check_compute"]


@dataclass
class Compute:
    kind: str  # "threads", "local-cluster" or "cluster"
    workers: int
    lock: Any
    client: Any = None
    kwargs: dict[str, Any] = field(default_factory=dict)

    def compute(self, *args: Any) -> tuple[Any, ...]:
        return dask.compute(*args, **self.kwargs)

    def imap(self, fn: Callable[[Any, Any], Any], plan: Any, items: Sequence[Any], *,
             window: int | None = None) -> Iterator[tuple[int, Any]]:
        """``(i, fn(plan, items[i]))`` for every item, in the order they finish.

        At most ``window`` tasks (default: twice the workers, plus two) are under way at once,
        so the results waiting to be written stay few. The first task to fail cancels the rest
        and raises its error here.
        """
        window = window or 2 * self.workers + 2
        if self.client is None:
            yield from _imap_threads(fn, plan, items, self.workers, window)
        else:
            yield from _imap_cluster(self.client, fn, plan, items, window)

    def describe(self) -> str:
        if self.kind == "threads":
            return f"{self.workers} threads"
        return f"dask.distributed {self.kind} ({self.workers} workers)"


def check_compute(*, workers: int | None = None, address: str | None = None, threads: int | None = None) -> None:
    """Refuse compute settings that cannot work (before any work is done)."""
    if workers is not None and address is not None:
        raise ConfigError("--workers and --scheduler exclude each other; give one")
    for name, v in (("--threads", threads), ("--workers", workers)):
        if v is not None and (isinstance(v, bool) or not isinstance(v, numbers.Integral) or v < 1):
            raise ConfigError(f"{name} must be a whole number of at least 1; got {v!r}; leave it out to use every core")


@contextlib.contextmanager
def compute_context(*, workers: int | None = None, address: str | None = None, threads: int | None = None) -> Iterator[Compute]:
    check_compute(workers=workers, address=address, threads=threads)
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
    with LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None, silence_logs=logging.WARNING) as cluster, Client(cluster) as client:
        yield Compute("local-cluster", workers, Lock("ceiling-write"), client, {"scheduler": client})


def _imap_threads(fn, plan, items, workers: int, window: int) -> Iterator[tuple[int, Any]]:
    from concurrent.futures import FIRST_COMPLETED, ThreadPoolExecutor, wait

    pool = ThreadPoolExecutor(max_workers=max(1, workers), thread_name_prefix="ceiling-chunk")
    pending: dict[Any, int] = {}
    nxt = 0
    try:
        while nxt < len(items) or pending:
            while nxt < len(items) and len(pending) < window:
                pending[pool.submit(fn, plan, items[nxt])] = nxt
                nxt += 1
            done, _ = wait(pending, return_when=FIRST_COMPLETED)
            for fut in sorted(done, key=pending.__getitem__):
                i = pending.pop(fut)
                yield i, fut.result()
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


def _imap_cluster(client, fn, plan, items, window: int) -> Iterator[tuple[int, Any]]:
    from distributed import as_completed

    # the plan as the result of a task (not scattered data): a worker that dies with it loses
    # nothing the scheduler cannot recompute; the others fetch it once each
    remote = client.submit(_identity, plan, pure=False)
    token = uuid.uuid4().hex  # task keys unique to this call
    pending: dict[Any, int] = {}
    nxt = 0

    def submit() -> Any:
        nonlocal nxt
        fut = client.submit(fn, remote, items[nxt], pure=False, key=f"ceiling-chunk-{token}-{nxt}")
        pending[fut] = nxt
        nxt += 1
        return fut

    started = [submit() for _ in range(min(window, len(items)))]
    queue = as_completed(started)
    try:
        for fut in queue:
            i = pending.pop(fut)
            result = fut.result()
            fut.release()
            if nxt < len(items):
                queue.add(submit())
            yield i, result
    finally:
        for fut in pending:
            fut.cancel()
        remote.release()


def _identity(x: Any) -> Any:
    return x
