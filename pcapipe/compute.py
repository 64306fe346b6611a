"""Where the tasks run: a dask scheduler chosen by ``compute.scheduler``.

:class:`Runner` is the one object the engine talks to; it opens one of two
backends.  ``synchronous``, ``threads`` and ``processes`` use dask's local
schedulers (:class:`LocalBackend`, here); ``local-cluster`` and
``tcp://host:port`` use dask.distributed (:class:`pcapipe.cluster.ClusterBackend`).
The engine only calls :meth:`Runner.compute` and :meth:`Runner.persist`, so
every pass is the same graph whatever runs it, and the fixed-order tree
reduction of :mod:`pcapipe.passes` makes the numbers the same too.
"""

from __future__ import annotations

import concurrent.futures
import contextlib
import logging
import os
import sys
from dataclasses import dataclass

import dask

from .config import ComputeConfig, format_size, parse_memory

__all__ = ["Runner", "LocalBackend", "WorkerInfo", "physical_memory", "cores"]

log = logging.getLogger("pcapipe")


def physical_memory() -> int:
    """Bytes of RAM on this machine."""
    try:
        return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):
        return 8 << 30


def cores() -> int:
    """Cores this process may run on."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:
        return os.cpu_count() or 1


@dataclass
class WorkerInfo:
    """What ran the tasks, as recorded in the manifest.

    ``threads_per_worker`` and ``memory_per_worker`` are the smallest over the
    workers (what every task can count on); ``total_threads`` is the sum.
    """

    scheduler: str
    workers: int
    threads_per_worker: int
    memory_per_worker: int
    dashboard: str = ""
    total_threads: int = 0
    hosts: int = 1

    def __post_init__(self) -> None:
        if not self.total_threads:
            self.total_threads = self.workers * self.threads_per_worker

    def record(self) -> dict:
        return {"scheduler": self.scheduler, "workers": self.workers,
                "threads_per_worker": self.threads_per_worker,
                "memory_per_worker": self.memory_per_worker, "total_threads": self.total_threads,
                "hosts": self.hosts, "dashboard": self.dashboard}


class LocalBackend:
    """dask's local schedulers: ``synchronous``, ``threads`` or ``processes`` (one pool per run).

    Parameters
    ----------
    kind : str
    workers : int
    memory : int
        Bytes per worker.
    stack : contextlib.ExitStack
        Receives the callback that shuts the process pool down.
    """

    distributed = False
    client = None

    def __init__(self, kind: str, workers: int, memory: int, stack: contextlib.ExitStack):
        self.kind = kind
        self.info = WorkerInfo(kind, workers, 1, memory)
        self._pool = None
        if kind == "processes":
            from dask.multiprocessing import get_context, initialize_worker_process

            # One pool for the whole run: a pool per pass would start fresh
            # interpreters for every matrix-free product.
            self._pool = concurrent.futures.ProcessPoolExecutor(
                workers, mp_context=get_context(), initializer=initialize_worker_process)
            stack.callback(self._pool.shutdown, wait=True, cancel_futures=True)

    def blas_threads(self) -> int:
        # threads: limited process-wide around each compute; synchronous: one
        # task at a time may use every core; processes: each its share.
        if self.kind == "processes":
            return max(1, cores() // max(1, self.info.workers))
        return 0

    def compute(self, objs: list, label: str, show: bool, in_flight: int | None = None):
        with contextlib.ExitStack() as stack:
            if show:
                from .progress import PassProgressBar

                stack.enter_context(PassProgressBar(f"{label:<10}", out=sys.stderr))
            if self.kind == "threads":
                from threadpoolctl import threadpool_limits

                lanes = max(1, min(self.info.workers, in_flight or self.info.workers))
                per = max(1, cores() // lanes)
                stack.enter_context(threadpool_limits(limits=per, user_api="blas"))
                return dask.compute(*objs, scheduler="threads", num_workers=lanes)
            if self.kind == "processes":
                return dask.compute(*objs, scheduler="processes", pool=self._pool)
            return dask.compute(*objs, scheduler="synchronous")

    def persist(self, objs, label: str, show: bool):
        with contextlib.ExitStack() as stack:
            if show:
                from .progress import PassProgressBar

                stack.enter_context(PassProgressBar(f"{label:<10}", out=sys.stderr))
            if self.kind == "synchronous":
                return list(dask.persist(*objs, scheduler="synchronous"))
            return list(dask.persist(*objs, scheduler="threads", num_workers=self.info.workers))

    def probe(self, path: str) -> None:
        return None  # the plan already opened every file in this process

    def run_on_workers(self, fn, *args) -> dict:
        return {"local": fn(*args)}


class Runner:
    """Context manager owning the scheduler (and the client, for distributed ones).

    Parameters
    ----------
    cfg : ComputeConfig

    Raises
    ------
    ClusterError
        On entry, when a ``tcp://`` scheduler does not answer within
        ``cfg.connect_timeout`` or has no workers by then, or a local-cluster
        memory limit is too small for a worker.
    """

    def __init__(self, cfg: ComputeConfig):
        self.cfg = cfg
        self._stack = contextlib.ExitStack()
        self._backend = None

    def __enter__(self) -> "Runner":
        try:
            self._backend = self._open()
        except BaseException:
            self._stack.close()
            raise
        info = self.info
        log.info("compute: %s, %d worker(s) x %d thread(s), %s per worker%s", info.scheduler,
                 info.workers, info.threads_per_worker, format_size(info.memory_per_worker),
                 f", dashboard {info.dashboard}" if info.dashboard else "")
        return self

    def _open(self):
        kind = self.cfg.scheduler
        budget = parse_memory(self.cfg.memory_limit)
        workers = 1 if kind == "synchronous" else (self.cfg.workers or cores())
        memory = budget or int(physical_memory() * 0.5 / workers)
        if kind in ("synchronous", "threads", "processes"):
            return LocalBackend(kind, workers, memory, self._stack)
        from .cluster import ClusterBackend

        backend = ClusterBackend(self.cfg, self._stack)
        if kind == "local-cluster":
            backend.start_local(workers, memory)
        else:
            backend.connect(kind, warn_ignored=bool(self.cfg.workers or budget))
        return backend

    def __exit__(self, *exc) -> None:
        self._stack.close()

    @property
    def info(self) -> WorkerInfo:
        return self._backend.info

    @property
    def client(self):
        """The dask.distributed client, or None for the local schedulers."""
        return self._backend.client

    @property
    def distributed(self) -> bool:
        return self._backend.distributed

    @property
    def parallelism(self) -> int:
        return self.info.total_threads

    def blas_threads(self) -> int:
        """BLAS threads each task should set in its process; 0 means "do not touch"."""
        return self._backend.blas_threads()

    def compute(self, objs, label: str, in_flight: int | None = None, quiet: bool = False):
        """Compute dask objects (a list), with a progress bar when asked for and useful (not ``quiet``).

        ``in_flight`` (local ``threads`` scheduler only) runs at most that many
        tasks at once, each allowed ``cores // in_flight`` BLAS threads: the
        memory estimate of :mod:`pcapipe.layout` may ask for fewer, larger tasks.

        Raises
        ------
        InfrastructureError
            When workers keep dying on the same task, or the scheduler is lost.
        """
        log.debug("pass: %s", label)
        show = self.cfg.progress and sys.stderr.isatty() and not quiet
        if self.distributed:
            return self._backend.compute(list(objs), label, show)
        return self._backend.compute(list(objs), label, show, in_flight)

    def persist(self, objs, label: str = "decode"):
        """Keep computed objects in (worker) memory for later passes (a pass of its own, with its bar)."""
        return self._backend.persist(objs, label, self.cfg.progress and sys.stderr.isatty())

    def probe(self, path: str) -> None:
        """Check that every worker can open ``path`` (the first input file) before any data is read.

        Raises
        ------
        ClusterError
            Naming the worker and the path; on a cluster the input must be on a
            filesystem every worker shares.
        """
        self._backend.probe(path)

    def run_on_workers(self, fn, *args) -> dict:
        """Run ``fn(*args)`` as one task on each worker; returns {worker address: result}.

        Raises
        ------
        ClusterError
            When a worker does not answer within ``max(30 s, 3 x connect_timeout)``.
        """
        return self._backend.run_on_workers(fn, *args)
