"""Where the tasks run: a dask scheduler chosen by ``compute.scheduler``.

``synchronous``, ``threads`` and ``processes`` use dask's local schedulers;
``local-cluster`` starts a dask.distributed ``LocalCluster`` for the run;
``tcp://host:port`` connects to a running dask.distributed scheduler.  The
engine only calls :meth:`Runner.compute`, so every pass is the same graph
whatever runs it.
"""

from __future__ import annotations

import contextlib
import logging
import os
import sys
from dataclasses import dataclass

import dask

from .config import ComputeConfig, parse_memory
from .errors import ClusterError

__all__ = ["Runner", "physical_memory"]

log = logging.getLogger("pcapipe")


def physical_memory() -> int:
    """Bytes of RAM on this machine."""
    try:
        return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):
        return 8 << 30


def _cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:
        return os.cpu_count() or 1


@dataclass
class WorkerInfo:
    """What ran the tasks, as recorded in the manifest."""

    scheduler: str
    workers: int
    threads_per_worker: int
    memory_per_worker: int
    dashboard: str = ""

    def record(self) -> dict:
        return {"scheduler": self.scheduler, "workers": self.workers,
                "threads_per_worker": self.threads_per_worker,
                "memory_per_worker": self.memory_per_worker, "dashboard": self.dashboard}


class Runner:
    """Context manager owning the scheduler (and the client, for distributed ones).

    Parameters
    ----------
    cfg : ComputeConfig
    """

    def __init__(self, cfg: ComputeConfig):
        self.cfg = cfg
        self.client = None
        self._cluster = None
        self._stack = contextlib.ExitStack()
        self.info: WorkerInfo | None = None

    # -- setup ---------------------------------------------------------------
    def __enter__(self) -> "Runner":
        kind = self.cfg.scheduler
        cores = _cores()
        budget = parse_memory(self.cfg.memory_limit)
        if kind in ("synchronous", "threads", "processes"):
            workers = 1 if kind == "synchronous" else (self.cfg.workers or cores)
            memory = budget or int(physical_memory() * 0.5 / workers)
            self.info = WorkerInfo(kind, workers, 1, memory)
        elif kind == "local-cluster":
            self._start_local_cluster(cores, budget)
        else:
            self._connect(kind)
        log.info("compute: %s, %d worker(s) x %d thread(s), %s per worker%s", self.info.scheduler,
                 self.info.workers, self.info.threads_per_worker, _size(self.info.memory_per_worker),
                 f", dashboard {self.info.dashboard}" if self.info.dashboard else "")
        return self

    def _start_local_cluster(self, cores: int, budget: int | None) -> None:
        from distributed import Client, LocalCluster

        workers = self.cfg.workers or cores
        memory = budget or int(physical_memory() * 0.5 / workers)
        cluster = LocalCluster(n_workers=workers, threads_per_worker=1, memory_limit=memory,
                               processes=True, host="127.0.0.1", dashboard_address=":0",
                               silence_logs=logging.WARNING)
        self._stack.callback(cluster.close)
        self.client = Client(cluster)
        self._stack.callback(self.client.close)
        self.info = WorkerInfo("local-cluster", workers, 1, memory, self.client.dashboard_link or "")

    def _connect(self, address: str) -> None:
        from distributed import Client

        try:
            self.client = Client(address, timeout=self.cfg.connect_timeout)
        except (OSError, TimeoutError) as e:
            raise ClusterError(
                f"compute.scheduler: no dask scheduler answered at {address} within "
                f"{self.cfg.connect_timeout:g} s; start one with `dask scheduler` or fix the address"
            ) from e
        self._stack.callback(self.client.close)
        workers = self.client.scheduler_info(n_workers=-1)["workers"] if _takes_n_workers() \
            else self.client.scheduler_info()["workers"]
        if not workers:
            raise ClusterError(f"compute.scheduler: the scheduler at {address} has no workers; "
                               "start some with `dask worker " + address + "`")
        threads = min(w["nthreads"] for w in workers.values())
        memory = min(w["memory_limit"] for w in workers.values()) or physical_memory()
        self.info = WorkerInfo(address, len(workers), threads, memory, self.client.dashboard_link or "")

    def __exit__(self, *exc) -> None:
        self._stack.close()

    # -- use -----------------------------------------------------------------
    @property
    def distributed(self) -> bool:
        return self.client is not None

    @property
    def parallelism(self) -> int:
        return self.info.workers * self.info.threads_per_worker

    def blas_threads(self) -> int:
        """BLAS threads each task may use, so that tasks x BLAS threads <= cores.

        0 means "do not touch" (threads: limited process-wide by ``compute``;
        synchronous: one task at a time may use every core).  A remote worker's
        core count is unknown here, so each of its threads gets one.
        """
        kind = self.info.scheduler
        if kind in ("threads", "synchronous"):
            return 0
        if kind in ("processes", "local-cluster"):
            return max(1, _cores() // max(1, self.info.workers))
        return 1

    def compute(self, objs, label: str):
        """Compute dask objects (a list), with a progress bar when asked for and useful."""
        show = self.cfg.progress and sys.stderr.isatty()
        log.debug("pass: %s", label)
        if self.distributed:
            futures = self.client.compute(objs)
            if show:
                from distributed import progress

                progress(futures)
            return self.client.gather(futures)
        with contextlib.ExitStack() as stack:
            if show:
                from dask.diagnostics import ProgressBar

                stack.enter_context(ProgressBar(out=sys.stderr))
            if self.info.scheduler == "threads":
                from threadpoolctl import threadpool_limits

                per = max(1, _cores() // max(1, self.info.workers))
                stack.enter_context(threadpool_limits(limits=per, user_api="blas"))
                return dask.compute(*objs, scheduler="threads", num_workers=self.info.workers)
            if self.info.scheduler == "processes":
                return dask.compute(*objs, scheduler="processes", num_workers=self.info.workers)
            return dask.compute(*objs, scheduler="synchronous")

    def persist(self, objs):
        """Keep computed objects in (worker) memory for later passes."""
        if self.distributed:
            return self.client.persist(objs)
        return list(dask.persist(*objs, scheduler="threads" if self.info.scheduler != "synchronous"
                                 else "synchronous"))

    def probe(self, path: str) -> None:
        """Check that every worker can open ``path`` (the first input file) before any data is read.

        Raises
        ------
        ClusterError
            Naming the worker and the path; on a cluster the input must be on a
            filesystem every worker shares.
        """
        if not self.distributed:
            return
        from .tasks import probe_task

        for worker, answer in self.run_on_workers(probe_task, path).items():
            if not answer["ok"]:
                raise ClusterError(
                    f"worker {worker} (host {answer['host']}) cannot read {path}: {answer['error']}; "
                    "on a cluster every input path must be on a filesystem all workers share"
                )

    def run_on_workers(self, fn, *args):
        """Run ``fn(*args)`` once on every worker; returns {worker address: result}."""
        if not self.distributed:
            return {"local": fn(*args)}
        workers = list(self.client.scheduler_info()["workers"])
        futures = {w: self.client.submit(fn, *args, workers=[w], pure=False, allow_other_workers=False)
                   for w in workers}
        return {w: f.result() for w, f in futures.items()}


def _takes_n_workers() -> bool:
    import inspect

    from distributed import Client

    return "n_workers" in inspect.signature(Client.scheduler_info).parameters


def _size(n: int) -> str:
    for unit in ("B", "KiB", "MiB", "GiB", "TiB"):
        if n < 1024 or unit == "TiB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1024
    return str(n)
