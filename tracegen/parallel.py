"""One executor seam: the same tasks in this process, in local worker processes, or on a Dask cluster.

``runner(workers=None, cluster=None)`` returns a :class:`Runner` whose ``map(fn, items)`` yields
``fn(item)`` for every item, in the order of the items, keeping at most ``2 * workers`` tasks in flight
so results stream through with flat memory:

* ``cluster`` given (``tcp://HOST:PORT`` or the path of a Dask scheduler file): tasks go to that Dask
  distributed cluster (``pip install '.[dask]'``). Functions and their arguments travel by pickle, so
  they are module-level functions taking plain data (a model as its JSON text, seeds, file paths,
  traces); results come back to this process, which writes every output.
* else ``workers`` local processes (default: the machine's cores), forked from this process where the
  system can (so they start with tracegen imported and need no main module to re-run), else spawned;
  ``workers=1``, and any map of a single item, runs in this process.

Every task is a pure function of its item (seeds derive from a trace's index, never from a worker or
an order), so any number of workers, any partitioning and any cluster give the same bytes.
"""

from __future__ import annotations

import collections
import math
import multiprocessing
import os
from concurrent.futures import Executor, ProcessPoolExecutor
from pathlib import Path
from typing import Any, Callable, Iterable, Iterator, Sequence, TypeVar

from .errors import TracegenError

T = TypeVar("T")
R = TypeVar("R")


def default_workers() -> int:
    """The cores this process may use."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not Linux
        return max(1, os.cpu_count() or 1)


def chunks(count: int, workers: int, *, per_worker: int = 4, most: int = 256) -> list[tuple[int, int]]:
    """``(start, size)`` pieces of ``range(count)``: about ``per_worker`` per worker, none above ``most``."""
    if count <= 0:
        return []
    size = max(1, min(most, math.ceil(count / max(1, workers * per_worker))))
    return [(a, min(size, count - a)) for a in range(0, count, size)]


class Runner:
    """Runs a function over items somewhere (module docstring); a context manager that releases its
    processes or its cluster connection on exit."""

    kind = "serial"

    def __init__(self, workers: int = 1) -> None:
        self.workers = workers

    def map(self, fn: Callable[[T], R], items: Iterable[T]) -> Iterator[R]:
        """``fn(item)`` for each item, in order."""
        return (fn(item) for item in items)

    def close(self) -> None:
        pass

    def describe(self) -> str:
        return "this process"

    def __enter__(self) -> "Runner":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def _ordered(submit: Callable[[Any], Any], result: Callable[[Any], R], items: Iterable[Any], inflight: int,
             cancel: Callable[[Any], None]) -> Iterator[R]:
    """Results of ``submit(item)`` in item order with at most ``inflight`` tasks pending."""
    pending: collections.deque = collections.deque()
    it = iter(items)
    try:
        for item in it:
            pending.append(submit(item))
            if len(pending) >= inflight:
                yield result(pending.popleft())
        while pending:
            yield result(pending.popleft())
    finally:
        for fut in pending:  # an abandoned or failed map: drop what is still queued
            cancel(fut)


def _forked_worker() -> None:
    """First thing in a local worker: let go of any catalog lock inherited from the parent, and on Linux
    ask to be killed with the parent (prctl PR_SET_PDEATHSIG), so a killed run leaves no workers behind."""
    import signal
    import sys

    catalog = sys.modules.get("tracegen.catalog")
    if catalog is not None:
        catalog.release_inherited_locks()
    if sys.platform.startswith("linux"):
        try:
            import ctypes

            ctypes.CDLL(None, use_errno=True).prctl(1, int(signal.SIGKILL))  # 1 = PR_SET_PDEATHSIG
        except (OSError, AttributeError):
            pass


class ProcessRunner(Runner):
    """Local worker processes (forked where the system can)."""

    kind = "processes"

    def __init__(self, workers: int) -> None:
        super().__init__(workers)
        self._pool: Executor | None = None

    def _executor(self) -> Executor:
        if self._pool is None:
            methods = multiprocessing.get_all_start_methods()
            ctx = multiprocessing.get_context("fork" if "fork" in methods else "spawn")
            self._pool = ProcessPoolExecutor(max_workers=self.workers, mp_context=ctx, initializer=_forked_worker)
        return self._pool

    def map(self, fn: Callable[[T], R], items: Iterable[T]) -> Iterator[R]:
        items = list(items) if not isinstance(items, Sequence) else items
        if len(items) <= 1:
            return super().map(fn, items)
        pool = self._executor()
        return _ordered(lambda it: pool.submit(fn, it), lambda f: f.result(), items, 2 * self.workers,
                        lambda f: f.cancel())

    def close(self) -> None:
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None

    def describe(self) -> str:
        return f"{self.workers} local processes"


class DaskRunner(Runner):
    """Tasks submitted to a Dask distributed cluster through a client this runner owns."""

    kind = "dask"

    def __init__(self, cluster: str) -> None:
        try:
            from distributed import Client
        except ImportError:
            raise TracegenError("Dask distributed is not installed", field="cluster",
                                hint="pip install 'tracegen[dask]' (or '.[dask]' from a checkout)") from None
        try:
            if cluster.startswith(("tcp://", "tls://", "inproc://", "ucx://")):
                client = Client(cluster, timeout="20s")
            elif Path(cluster).is_file():
                client = Client(scheduler_file=cluster, timeout="20s")
            else:
                raise TracegenError(f"'{cluster}' is neither a scheduler address nor a scheduler file",
                                    field="cluster", hint="e.g. --cluster tcp://10.0.0.5:8786 or --cluster scheduler.json")
        except (OSError, TimeoutError) as exc:
            raise TracegenError(f"cannot reach the Dask scheduler at {cluster} ({exc})", field="cluster",
                                hint="is `dask scheduler` running there, and are workers attached?") from None
        self.client = client
        workers = len(client.scheduler_info().get("workers", {}))
        super().__init__(max(1, workers))
        self.address = cluster

    def map(self, fn: Callable[[T], R], items: Iterable[T]) -> Iterator[R]:
        return _ordered(lambda it: self.client.submit(fn, it, pure=False), lambda f: f.result(), items,
                        2 * self.workers, lambda f: f.cancel())

    def close(self) -> None:
        self.client.close()

    def describe(self) -> str:
        return f"the Dask cluster at {self.address} ({self.workers} workers)"


def runner(workers: int | None = None, cluster: str | None = None) -> Runner:
    """The runner for ``--workers`` / ``--cluster`` (module docstring)."""
    if cluster:
        if workers not in (None, 1):
            raise TracegenError("give --workers or --cluster, not both", field="workers",
                                hint="a cluster has its own workers")
        return DaskRunner(str(cluster))
    n = default_workers() if workers is None else workers
    if isinstance(n, bool) or not isinstance(n, int) or n < 1:
        raise TracegenError(f"workers must be a whole number >= 1, got {workers!r}", field="workers")
    return Runner(1) if n == 1 else ProcessRunner(n)


__all__ = ["runner", "Runner", "ProcessRunner", "DaskRunner", "chunks", "default_workers"]
