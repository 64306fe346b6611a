"""Where the tasks run: a dask scheduler chosen by ``compute.scheduler``.

``synchronous``, ``threads`` and ``processes`` use dask's local schedulers;
``local-cluster`` starts a dask.distributed ``LocalCluster`` for the run;
``tcp://host:port`` connects to a running dask.distributed scheduler (started
with ``dask scheduler`` / ``dask worker``).  The engine only calls
:meth:`Runner.compute` and :meth:`Runner.persist`, so every pass is the same
graph whatever runs it, and the fixed-order tree reduction of
:mod:`pcapipe.passes` makes the numbers the same too.

On a cluster, before any data are read, the scheduler must answer within
``compute.connect_timeout`` and every worker must be able to open the first
input file (:meth:`Runner.probe`).  BLAS inside each worker is limited to the
worker's share of its host's cores by a worker plugin, so that tasks in
parallel do not oversubscribe the machine.
"""

from __future__ import annotations

import asyncio
import concurrent.futures
import contextlib
import logging
import os
import socket
import sys
import time
from dataclasses import dataclass

import dask

from .config import ComputeConfig, format_size, parse_memory
from .errors import ClusterError

__all__ = ["Runner", "WorkerInfo", "physical_memory", "blas_shares"]

log = logging.getLogger("pcapipe")

_BLAS_PLUGIN = "pcapipe-blas-limit"


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


def _host_facts() -> dict:
    """Cores, RAM and process id of the worker this runs on (called through ``Client.run``)."""
    return {"cores": _cores(), "memory": physical_memory(), "pid": os.getpid(), "host": socket.gethostname()}


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


def blas_shares(workers: dict, cores: dict) -> dict:
    """BLAS threads for each worker: its host's cores over all worker threads on that host.

    Parameters
    ----------
    workers : dict
        ``{address: {"host": str, "nthreads": int}}`` as in ``scheduler_info()``.
    cores : dict
        ``{address: usable cores}`` as seen by each worker.

    Returns
    -------
    dict
        ``{address: threads}``, at least 1.
    """
    threads_on: dict[str, int] = {}
    cores_on: dict[str, int] = {}
    for address, w in workers.items():
        threads_on[w["host"]] = threads_on.get(w["host"], 0) + max(1, int(w["nthreads"]))
        cores_on[w["host"]] = max(cores_on.get(w["host"], 1), int(cores.get(address, 1)))
    return {a: max(1, cores_on[w["host"]] // threads_on[w["host"]]) for a, w in workers.items()}


def _limit_worker_blas(worker, per_host: dict):
    """Cap BLAS threads in a worker process; returns the threadpoolctl limiter."""
    from distributed.comm import get_address_host
    from threadpoolctl import threadpool_limits

    threads = per_host.get(get_address_host(worker.address))
    if threads is None:  # joined after the shares were computed: its own cores over its own threads
        threads = max(1, _cores() // max(1, worker.state.nthreads))
    return threadpool_limits(limits=threads, user_api="blas")


def _blas_plugin(per_host: dict):
    """A worker plugin applying :func:`_limit_worker_blas` to every worker, present and future.

    The class is built here so that importing pcapipe does not import
    distributed; dask ships it to the workers by value.
    """
    from distributed.diagnostics.plugin import WorkerPlugin

    class BlasLimit(WorkerPlugin):
        def __init__(self, per_host: dict):
            self.per_host = dict(per_host)
            self.limit = None

        def setup(self, worker) -> None:
            self.limit = _limit_worker_blas(worker, self.per_host)

        def teardown(self, worker) -> None:
            if self.limit is not None:
                self.limit.restore_original_limits()

    return BlasLimit(per_host)


async def _identify(address: str, timeout: float) -> dict:
    from distributed.comm import connect

    async with asyncio.timeout(timeout):
        comm = await connect(address, timeout=timeout)
        try:
            await comm.write({"op": "identity"})
            return await comm.read()
        finally:
            comm.abort()


def _ask_scheduler(address: str, timeout: float) -> dict:
    """The scheduler's identity, or ClusterError if nothing answers within ``timeout``.

    dask's own connect gives up on the TCP connection in time but then waits
    without limit for the handshake, so a port held by something else (or a
    hung host) would hang the run; the whole exchange is bounded here.  It runs
    in its own thread so that it works under a running event loop (notebooks).
    """
    hint = "start one with `dask scheduler` (and workers with `dask worker`) or fix the address"
    with concurrent.futures.ThreadPoolExecutor(1, thread_name_prefix="pcapipe-connect") as pool:
        try:
            answer = pool.submit(asyncio.run, _identify(address, timeout)).result()
        except (OSError, TimeoutError) as e:
            raise ClusterError(f"compute.scheduler: no dask scheduler answered at {address} within "
                               f"{timeout:g} s (compute.connect_timeout); {hint}") from e
        except Exception as e:  # something answered, but not in dask's protocol
            raise ClusterError(f"compute.scheduler: {address} answered but is not a dask scheduler "
                               f"({type(e).__name__}: {e}); {hint}") from e
    kind = answer.get("type") if isinstance(answer, dict) else None
    if kind != "Scheduler":
        raise ClusterError(f"compute.scheduler: {address} is a dask {kind or 'service'}, not a scheduler; "
                           "give the address `dask scheduler` printed (port 8786 by default)")
    return answer


class Runner:
    """Context manager owning the scheduler (and the client, for distributed ones).

    Parameters
    ----------
    cfg : ComputeConfig

    Raises
    ------
    ClusterError
        On entry, when a ``tcp://`` scheduler does not answer within
        ``cfg.connect_timeout`` or has no workers by then.
    """

    def __init__(self, cfg: ComputeConfig):
        self.cfg = cfg
        self.client = None
        self._pool = None
        self._stack = contextlib.ExitStack()
        self.info: WorkerInfo | None = None

    # -- setup ---------------------------------------------------------------
    def __enter__(self) -> "Runner":
        try:
            self._open()
        except BaseException:
            self._stack.close()
            raise
        log.info("compute: %s, %d worker(s) x %d thread(s), %s per worker%s", self.info.scheduler,
                 self.info.workers, self.info.threads_per_worker, format_size(self.info.memory_per_worker),
                 f", dashboard {self.info.dashboard}" if self.info.dashboard else "")
        return self

    def _open(self) -> None:
        kind = self.cfg.scheduler
        budget = parse_memory(self.cfg.memory_limit)
        workers = 1 if kind == "synchronous" else (self.cfg.workers or _cores())
        memory = budget or int(physical_memory() * 0.5 / workers)
        if kind in ("synchronous", "threads"):
            self.info = WorkerInfo(kind, workers, 1, memory)
        elif kind == "processes":
            from dask.multiprocessing import get_context, initialize_worker_process

            # One pool for the whole run: a pool per pass would start fresh
            # interpreters for every matrix-free product.
            self._pool = concurrent.futures.ProcessPoolExecutor(
                workers, mp_context=get_context(), initializer=initialize_worker_process)
            self._stack.callback(self._pool.shutdown, wait=True, cancel_futures=True)
            self.info = WorkerInfo(kind, workers, 1, memory)
        elif kind == "local-cluster":
            self._start_local_cluster(workers, memory)
        else:
            self._connect(kind)

    def _start_local_cluster(self, workers: int, memory: int) -> None:
        from distributed import Client, LocalCluster

        cluster = LocalCluster(n_workers=workers, threads_per_worker=1, memory_limit=memory,
                               processes=True, host="127.0.0.1", dashboard_address="127.0.0.1:0",
                               silence_logs=logging.WARNING)
        self._stack.callback(cluster.close)
        # Not the default client: a notebook's own dask work must not land here.
        self.client = Client(cluster, set_as_default=False)
        self._stack.callback(self.client.close)
        self._setup_workers("local-cluster")

    def _connect(self, address: str) -> None:
        from distributed import Client

        if self.cfg.workers or parse_memory(self.cfg.memory_limit):
            log.warning("compute.workers and compute.memory_limit are ignored with a tcp:// scheduler; "
                        "the cluster's workers bring their own (dask worker --nthreads/--memory-limit)")
        timeout = self.cfg.connect_timeout
        _ask_scheduler(address, timeout)
        try:
            self.client = Client(address, timeout=timeout, set_as_default=False)
        except (OSError, TimeoutError) as e:
            raise ClusterError(f"compute.scheduler: could not connect to the dask scheduler at {address} "
                               f"within {timeout:g} s: {e}") from e
        self._stack.callback(self.client.close)
        try:
            self.client.wait_for_workers(1, timeout=timeout)
        except TimeoutError as e:
            raise ClusterError(f"compute.scheduler: the scheduler at {address} has no workers after "
                               f"{timeout:g} s; start some with `dask worker {address}`") from e
        self._setup_workers(address)

    def _workers(self) -> dict:
        if _takes_n_workers():
            return self.client.scheduler_info(n_workers=-1)["workers"]
        return self.client.scheduler_info()["workers"]

    def _setup_workers(self, label: str) -> None:
        """Learn the workers (for the manifest) and cap BLAS in each of them."""
        workers = self._workers()
        # A worker lost meanwhile is left out ("ignore"); the plugin covers it if it comes back.
        facts = self.client.run(_host_facts, on_error="ignore")
        shares = blas_shares(workers, {a: f["cores"] for a, f in facts.items()})
        per_host = {workers[a]["host"]: s for a, s in shares.items()}
        self.client.register_plugin(_blas_plugin(per_host), name=_BLAS_PLUGIN)
        log.debug("BLAS threads per worker: %s", shares)
        memory = min(_memory_limits(workers, facts)) or physical_memory()
        try:
            dashboard = self.client.dashboard_link or ""
        except (KeyError, AttributeError):  # scheduler started without a dashboard
            dashboard = ""
        self.info = WorkerInfo(label, len(workers), min(w["nthreads"] for w in workers.values()), memory,
                               dashboard, sum(w["nthreads"] for w in workers.values()),
                               len({w["host"] for w in workers.values()}))

    def __exit__(self, *exc) -> None:
        self._stack.close()

    # -- use -----------------------------------------------------------------
    @property
    def distributed(self) -> bool:
        return self.client is not None

    @property
    def parallelism(self) -> int:
        return self.info.total_threads

    def blas_threads(self) -> int:
        """BLAS threads each task should set in its process; 0 means "do not touch".

        threads: limited process-wide around each :meth:`compute`; synchronous:
        one task at a time may use every core; local-cluster and tcp: set once
        per worker by the worker plugin, from each host's own core count.
        """
        if self.info.scheduler == "processes":
            return max(1, _cores() // max(1, self.info.workers))
        return 0

    def compute(self, objs, label: str, in_flight: int | None = None):
        """Compute dask objects (a list), with a progress bar when asked for and useful.

        ``in_flight`` (local ``threads`` scheduler only) runs at most that many
        tasks at once, each allowed ``cores // in_flight`` BLAS threads: the
        memory estimate of :mod:`pcapipe.layout` may ask for fewer, larger tasks.

        Raises
        ------
        ClusterError
            When workers keep dying on the same task, or the scheduler is lost.
        """
        show = self.cfg.progress and sys.stderr.isatty()
        log.debug("pass: %s", label)
        if self.distributed:
            return self._compute_distributed(list(objs), label, show)
        with contextlib.ExitStack() as stack:
            if show:
                from .progress import PassProgressBar

                stack.enter_context(PassProgressBar(f"{label:<10}", out=sys.stderr))
            if self.info.scheduler == "threads":
                from threadpoolctl import threadpool_limits

                lanes = max(1, min(self.info.workers, in_flight or self.info.workers))
                per = max(1, _cores() // lanes)
                stack.enter_context(threadpool_limits(limits=per, user_api="blas"))
                return dask.compute(*objs, scheduler="threads", num_workers=lanes)
            if self.info.scheduler == "processes":
                return dask.compute(*objs, scheduler="processes", pool=self._pool)
            return dask.compute(*objs, scheduler="synchronous")

    def _compute_distributed(self, objs: list, label: str, show: bool):
        from distributed import KilledWorker

        futures = self.client.compute(objs)
        try:
            if show:
                from .progress import wait_with_progress

                wait_with_progress(futures, f"{label:<10}", out=sys.stderr)
            return self.client.gather(futures)
        except KilledWorker as e:
            raise ClusterError(
                f"the {label} pass failed: workers died repeatedly while running one of its tasks ({e}); "
                "this is usually a worker running out of memory: give workers more with "
                "`dask worker --memory-limit`, or fewer threads each"
            ) from e
        except concurrent.futures.CancelledError as e:
            raise ClusterError(f"the {label} pass was cancelled: the connection to the dask scheduler "
                               f"{self.info.scheduler} was lost ({e})") from e
        finally:
            # On failure the rest of the pass must not keep the cluster busy.
            pending = [f for f in futures if not f.done()]
            if pending:
                self.client.cancel(pending)

    def persist(self, objs, label: str = "decode"):
        """Keep computed objects in (worker) memory for later passes (a pass of its own, with its bar)."""
        show = self.cfg.progress and sys.stderr.isatty()
        if self.distributed:
            kept = self.client.persist(list(objs))
            if show:
                from distributed import futures_of

                from .progress import wait_with_progress

                wait_with_progress(futures_of(kept), f"{label:<10}", out=sys.stderr)
            return kept
        with contextlib.ExitStack() as stack:
            if show:
                from .progress import PassProgressBar

                stack.enter_context(PassProgressBar(f"{label:<10}", out=sys.stderr))
            if self.info.scheduler == "synchronous":
                return list(dask.persist(*objs, scheduler="synchronous"))
            return list(dask.persist(*objs, scheduler="threads", num_workers=self.info.workers))

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
                    "on a cluster every input path must be on a shared filesystem that every worker "
                    "sees under the same absolute path"
                )

    def run_on_workers(self, fn, *args) -> dict:
        """Run ``fn(*args)`` as one task on each worker; returns {worker address: result}.

        Raises
        ------
        ClusterError
            When a worker does not answer within ``max(30 s, 3 x connect_timeout)``.
        """
        if not self.distributed:
            return {"local": fn(*args)}
        futures = {w: self.client.submit(fn, *args, workers=[w], allow_other_workers=False, pure=False,
                                         priority=100)
                   for w in self._workers()}
        timeout = max(30.0, 3 * self.cfg.connect_timeout)
        deadline = time.monotonic() + timeout
        answers = {}
        try:
            for w, f in futures.items():
                answers[w] = f.result(timeout=max(0.0, deadline - time.monotonic()))
        except TimeoutError as e:
            late = [w for w in futures if w not in answers]
            self.client.cancel(list(futures.values()))
            raise ClusterError(f"worker(s) {', '.join(late)} did not run a one-task check within "
                               f"{timeout:g} s; are they overloaded or gone?") from e
        return answers


def _memory_limits(workers: dict, facts: dict) -> list[int]:
    """Each worker's memory limit; for one started without (0), its share of its host's RAM."""
    per_host: dict[str, int] = {}
    for w in workers.values():
        per_host[w["host"]] = per_host.get(w["host"], 0) + 1
    return [w["memory_limit"] or facts.get(a, {}).get("memory", 0) // per_host[w["host"]]
            for a, w in workers.items()]


def _takes_n_workers() -> bool:
    import inspect

    from distributed import Client

    return "n_workers" in inspect.signature(Client.scheduler_info).parameters


