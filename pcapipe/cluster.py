"""The dask.distributed backend of :class:`pcapipe.compute.Runner`.

``local-cluster`` starts a ``LocalCluster`` on this machine for the run;
``tcp://host:port`` connects to a running scheduler (started with
``dask scheduler`` / ``dask worker``).  Before any data are read the scheduler
must answer within ``compute.connect_timeout`` and every worker must be able
to open the first input file (:meth:`ClusterBackend.probe`).  BLAS inside each
worker is limited to the worker's share of its host's cores by a worker
plugin, so that tasks in parallel do not oversubscribe the machine.

Failures split in two: a cluster that cannot be used from the start (nothing
answers, no workers, a worker that cannot see the input, a memory limit too
small for a worker) is a :class:`~pcapipe.errors.ClusterError`, fixed in the
config (exit status 2); a cluster lost in the middle of a run (the scheduler
gone, workers dying again and again) is an
:class:`~pcapipe.errors.InfrastructureError` (exit status 3): the checkpoint
is kept and the same command with ``--resume`` continues.
"""

from __future__ import annotations

import asyncio
import concurrent.futures
import contextlib
import logging
import os
import signal
import socket
import sys
import threading
import time

from .compute import WorkerInfo, cores, physical_memory
from .config import format_size
from .errors import ClusterError, InfrastructureError

__all__ = ["ClusterBackend", "blas_shares", "MIN_WORKER_MEMORY"]

log = logging.getLogger("pcapipe")

_BLAS_PLUGIN = "pcapipe-blas-limit"

# Smallest memory_limit a local-cluster worker can live with.  Measured here
# (distributed 2026.8, 2 workers, a 200k x 16 matrix-free job): a worker that
# has imported pcapipe's task modules (numpy, pyarrow, dask) holds 134 MiB
# resident before its first task, and dask pauses a worker at 80% of its
# limit; with 160 or 192 MiB the workers were paused (156-164 MiB) and the run
# stalled, 256 MiB ran the job in 9 s.
MIN_WORKER_MEMORY = 256 * 2**20

# What distributed raises in the client when the scheduler goes away mid-pass.
_LOST = ("CommClosedError", "StreamClosedError", "CancelledError", "FutureCancelledError")


def _host_facts() -> dict:
    """Cores, RAM and process id of the worker this runs on (called through ``Client.run``)."""
    return {"cores": cores(), "memory": physical_memory(), "pid": os.getpid(), "host": socket.gethostname()}


def blas_shares(workers: dict, cores_of: dict) -> dict:
    """BLAS threads for each worker: its host's cores over all worker threads on that host.

    Parameters
    ----------
    workers : dict
        ``{address: {"host": str, "nthreads": int}}`` as in ``scheduler_info()``.
    cores_of : dict
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
        cores_on[w["host"]] = max(cores_on.get(w["host"], 1), int(cores_of.get(address, 1)))
    return {a: max(1, cores_on[w["host"]] // threads_on[w["host"]]) for a, w in workers.items()}


def _limit_worker_blas(worker, per_host: dict):
    """Cap BLAS threads in a worker process; returns the threadpoolctl limiter."""
    from distributed.comm import get_address_host
    from threadpoolctl import threadpool_limits

    threads = per_host.get(get_address_host(worker.address))
    if threads is None:  # joined after the shares were computed: its own cores over its own threads
        threads = max(1, cores() // max(1, worker.state.nthreads))
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


def check_worker_memory(memory: int, workers: int) -> None:
    """Refuse a local-cluster memory limit too small for a worker, before starting any.

    Raises
    ------
    ClusterError
        Stating the limit, the minimum and the fix.
    """
    if memory < MIN_WORKER_MEMORY:
        raise ClusterError(
            f"compute.memory_limit: {format_size(memory)} per worker is too small for a local-cluster "
            f"worker process (at least {format_size(MIN_WORKER_MEMORY)}: the process alone holds about "
            f"135 MiB and dask pauses it at 80% of its limit); raise compute.memory_limit or use fewer "
            f"compute.workers (now {workers})"
        )


class ClusterBackend:
    """A dask.distributed client, to a LocalCluster started here or to a ``tcp://`` scheduler.

    Parameters
    ----------
    cfg : ComputeConfig
    stack : contextlib.ExitStack
        Receives the callbacks that close the client and the cluster.
    """

    distributed = True

    def __init__(self, cfg, stack: contextlib.ExitStack):
        self.cfg = cfg
        self._stack = stack
        self.client = None
        self.info: WorkerInfo | None = None

    # -- setup ---------------------------------------------------------------
    def start_local(self, workers: int, memory: int) -> None:
        from distributed import Client, LocalCluster

        check_worker_memory(memory, workers)
        # The workers write to our stderr; what they would say there (a cancelled task
        # after Ctrl-C, memory warnings) the run says itself, once, unless asked for debug output.
        quiet = logging.WARNING if log.isEnabledFor(logging.DEBUG) else logging.CRITICAL
        with _children_ignore_sigint():
            cluster = LocalCluster(n_workers=workers, threads_per_worker=1, memory_limit=memory,
                                   processes=True, host="127.0.0.1", dashboard_address="127.0.0.1:0",
                                   silence_logs=quiet)
        self._stack.callback(cluster.close)
        # Not the default client: a notebook's own dask work must not land here.
        self.client = Client(cluster, set_as_default=False)
        self._stack.callback(self._close_client)
        self._setup_workers("local-cluster")

    def connect(self, address: str, warn_ignored: bool) -> None:
        from distributed import Client

        if warn_ignored:
            log.warning("compute.workers and compute.memory_limit are ignored with a tcp:// scheduler; "
                        "the cluster's workers bring their own (dask worker --nthreads/--memory-limit)")
        timeout = self.cfg.connect_timeout
        _ask_scheduler(address, timeout)
        try:
            self.client = Client(address, timeout=timeout, set_as_default=False)
        except (OSError, TimeoutError) as e:
            raise ClusterError(f"compute.scheduler: could not connect to the dask scheduler at {address} "
                               f"within {timeout:g} s: {e}") from e
        self._stack.callback(self._close_client)
        try:
            self.client.wait_for_workers(1, timeout=timeout)
        except TimeoutError as e:
            raise ClusterError(f"compute.scheduler: the scheduler at {address} has no workers after "
                               f"{timeout:g} s; start some with `dask worker {address}`") from e
        self._setup_workers(address)

    def _close_client(self) -> None:
        # With the scheduler gone, closing waits for it and then logs; bound it and keep quiet.
        with _quiet_distributed():
            try:
                self.client.close(timeout=5)
            except Exception as e:  # noqa: BLE001 - the run's own error is what the user needs
                log.debug("closing the dask client: %s: %s", type(e).__name__, e)

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

    # -- use -----------------------------------------------------------------
    def blas_threads(self) -> int:
        return 0  # set once per worker by the plugin

    def compute(self, objs: list, label: str, show: bool):
        """Gather the results of ``objs``; lost infrastructure becomes InfrastructureError."""
        from distributed import KilledWorker

        futures = []
        try:
            futures = self.client.compute(objs)
            if show:
                from .progress import wait_with_progress

                wait_with_progress(futures, f"{label:<10}", out=sys.stderr)
            return self.client.gather(futures)
        except KilledWorker as e:
            try:
                what = (f"{e.allowed_failures + 1} worker(s) died while running its task {e.task}, the last "
                        f"one {e.last_worker.address}")
            except (AttributeError, IndexError, TypeError):  # another version's KilledWorker
                what = "workers died repeatedly while running one of its tasks"
            raise InfrastructureError(
                f"the {label} pass failed: {what}; this is usually a worker running out of memory (see "
                "its log): give workers more with `dask worker --memory-limit`, or fewer threads each"
            ) from e
        except Exception as e:
            if not self._lost(e):
                raise
            raise InfrastructureError(f"the {label} pass stopped: the connection to the dask scheduler "
                                      f"{self.info.scheduler} was lost ({type(e).__name__})") from e
        finally:
            self._cancel([f for f in futures if not f.done()])

    def _lost(self, e: BaseException) -> bool:
        """Whether ``e`` means the scheduler went away (rather than a task's own error)."""
        if type(e).__name__ in _LOST or isinstance(e, concurrent.futures.CancelledError):
            return True
        if isinstance(e, (OSError, TimeoutError)):
            return self.client.status != "running"
        return False

    def _cancel(self, pending: list) -> None:
        # On failure the rest of the pass must not keep the cluster busy; with
        # the scheduler gone there is nothing to cancel and nobody to tell.
        if not pending or self.client.status != "running":
            return
        with _quiet_distributed(), contextlib.suppress(Exception):
            self.client.cancel(pending)

    def persist(self, objs, label: str, show: bool):
        kept = self.client.persist(list(objs))
        if show:
            from distributed import futures_of

            from .progress import wait_with_progress

            wait_with_progress(futures_of(kept), f"{label:<10}", out=sys.stderr)
        return kept

    def probe(self, path: str) -> None:
        """Check that every worker can open ``path`` (the first input file)."""
        from .tasks import probe_task

        for worker, answer in self.run_on_workers(probe_task, path).items():
            if not answer["ok"]:
                raise ClusterError(
                    f"worker {worker} (host {answer['host']}) cannot read {path}: {answer['error']}; "
                    "on a cluster every input path must be on a shared filesystem that every worker "
                    "sees under the same absolute path"
                )

    def run_on_workers(self, fn, *args) -> dict:
        """Run ``fn(*args)`` as one task on each worker; returns {worker address: result}."""
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


@contextlib.contextmanager
def _children_ignore_sigint():
    """Start worker processes with SIGINT ignored (an ignored signal stays ignored across exec).

    Ctrl-C in a terminal reaches the whole process group; the workers would
    each print a KeyboardInterrupt traceback, while this process alone stops
    the run, keeps the checkpoint and closes the cluster.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)


@contextlib.contextmanager
def _quiet_distributed():
    """Silence distributed's and asyncio's loggers for a moment (their tracebacks repeat our one line)."""
    loggers = [logging.getLogger(n) for n in ("distributed", "asyncio", "tornado")]
    levels = [lg.level for lg in loggers]
    for lg in loggers:
        lg.setLevel(logging.CRITICAL + 1)
    try:
        yield
    finally:
        for lg, level in zip(loggers, levels):
            lg.setLevel(level)


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
