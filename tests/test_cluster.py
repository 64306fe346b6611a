"""Runs on dask.distributed, for real, on 127.0.0.1.

A scheduler and two workers are started here as subprocesses, the way a user
starts them on workstations (``dask scheduler`` / ``dask worker``, found
through a scheduler file), plus a ``LocalCluster`` and the local schedulers.
Every result is compared with the ``threads`` result of the same config: the
fixed-order tree reduction must make them agree to 1e-12 whatever ran the
tasks and however many workers there were, also when a worker is killed in
the middle of a run.  Every wait has a timeout and every process started here
is killed in a ``finally``.
"""

from __future__ import annotations

import io
import json
import logging
import os
import signal
import socket
import subprocess
import sys
import threading
import time

import numpy as np
import pyarrow.parquet as pq
import pytest

import pcapipe
import pcapipe.engine
from conftest import ROOT, known_spectrum, make_config, run_cli, write_parquet, retained
from pcapipe.cluster import blas_shares
from pcapipe.compute import Runner
from pcapipe.config import ComputeConfig
from pcapipe.errors import ClusterError

# Well separated eigenvalues (made up for the test) so both methods converge
# in a few dozen passes; the mean of 50 makes centering matter.
_SPECTRUM = [9.0, 5.0, 3.0, 2.0, 1.5, 1.0, 0.8, 0.6, 0.5, 0.4]
_METHODS = ["covariance", "direct", "matrix-free"]
_TOLERANCE = 1e-12  # the bound on differences between schedulers
_MEMORY = "1GiB"    # per worker, everywhere, so block sizes and caching are the same
_MEMORY_BYTES = 2**30  # 1 GiB (IEC 80000-13 binary prefix)
_START_SECONDS = 60.0
_BLAS_ENV = ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS")


def _wait_until(test, timeout: float, what: str, interval: float = 0.05):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = test()
        if value:
            return value
        time.sleep(interval)
    pytest.fail(f"timed out after {timeout:g} s waiting for {what}")


class _Cluster:
    """A dask scheduler and workers as subprocesses on 127.0.0.1, each in its own session."""

    def __init__(self, directory):
        self.dir = str(directory)
        self.file = os.path.join(self.dir, "scheduler.json")
        self.procs: list[subprocess.Popen] = []
        self.monitor = None
        self.address = ""
        self.pids: dict[str, int] = {}

    def _spawn(self, name: str, args: list[str]) -> None:
        log = open(os.path.join(self.dir, f"{name}.log"), "w")
        # Started as from a fresh shell: a LocalCluster's nanny leaves
        # OMP/MKL/OPENBLAS_NUM_THREADS=1 in this process's environment.
        env = {k: v for k, v in os.environ.items() if k not in _BLAS_ENV}
        # Idle/death timeouts: should this test process die, they end by themselves.
        self.procs.append(subprocess.Popen([sys.executable, "-m", *args], stdout=log, stderr=subprocess.STDOUT,
                                           cwd=ROOT, env=env, start_new_session=True))
        log.close()

    def _read_address(self) -> str:
        try:
            with open(self.file) as f:
                return json.load(f)["address"]
        except (OSError, ValueError, KeyError):
            return ""

    def start(self, n_workers: int = 2) -> "_Cluster":
        from distributed import Client

        self._spawn("scheduler", ["distributed.cli.dask_scheduler", "--host", "127.0.0.1", "--port", "0",
                                  "--scheduler-file", self.file, "--dashboard-address", "127.0.0.1:0",
                                  "--idle-timeout", "600s"])
        self.address = _wait_until(self._read_address, _START_SECONDS, "the scheduler file")
        for i in range(n_workers):
            self._spawn(f"worker{i}", ["distributed.cli.dask_worker", "--scheduler-file", self.file,
                                       "--host", "127.0.0.1", "--nthreads", "1", "--memory-limit", _MEMORY,
                                       "--no-nanny", "--no-dashboard", "--name", f"w{i}",
                                       "--local-directory", os.path.join(self.dir, f"w{i}"),
                                       "--death-timeout", "60s"])
        self.monitor = Client(self.address, timeout=_START_SECONDS, set_as_default=False)
        self.monitor.wait_for_workers(n_workers, timeout=_START_SECONDS)
        self.pids = self.monitor.run(os.getpid)
        return self

    def workers(self) -> dict:
        return self.monitor.scheduler_info(n_workers=-1)["workers"]

    def kill_worker(self, address: str) -> None:
        os.kill(self.pids[address], signal.SIGKILL)

    def logs(self) -> str:
        out = []
        for name in sorted(os.listdir(self.dir)):
            if name.endswith(".log"):
                with open(os.path.join(self.dir, name)) as f:
                    out.append(f"--- {name}\n{f.read()[-3000:]}")
        return "\n".join(out)

    def close(self) -> None:
        try:
            if self.monitor is not None:
                self.monitor.close(timeout=10)
        finally:
            for p in self.procs:
                if p.poll() is None:
                    os.killpg(p.pid, signal.SIGKILL)
                p.wait(timeout=30)


@pytest.fixture(scope="module")
def cluster(tmp_path_factory):
    c = _Cluster(tmp_path_factory.mktemp("cluster"))
    try:
        yield c.start(2)
    finally:
        c.close()


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    """10 features, 4 000 rows in 3 files of 400-row row groups (11 blocks), with a keep column."""
    root = tmp_path_factory.mktemp("data")
    rng = np.random.default_rng(20240605)
    x = known_spectrum(4_000, len(_SPECTRUM), _SPECTRUM, rng, mean=50.0)
    write_parquet(root / "d", x, files=3, row_group=400, keep={"row": np.arange(x.shape[0])})
    return str(root / "d" / "*.parquet")


def _config(glob: str, out, method: str, **compute):
    return make_config(glob, out, input={"keep": ["row"]},
                       model={"components": 3, "method": method, "tolerance": 1e-10},
                       compute=compute)


@pytest.fixture(scope="module")
def reference(data, tmp_path_factory):
    """The threads result (2 workers) of each method: what every other scheduler must reproduce."""
    root = tmp_path_factory.mktemp("reference")
    return {m: pcapipe.run(_config(data, root / m, m, scheduler="threads", workers=2, memory_limit=_MEMORY))
            for m in _METHODS}


def _outputs(res) -> dict:
    directory = os.path.join(res.directory, "scores")
    parts = sorted(os.path.join(directory, p) for p in os.listdir(directory))
    tables = [pq.read_table(p) for p in parts]
    pcs = [c for c in tables[0].column_names if c.startswith("PC")]
    return {
        "eigenvalue": retained(res),
        "loadings": res.loadings.to_numpy(),
        "mean": res.features["mean"].to_numpy(),
        "std": res.features["std"].to_numpy(),
        "scores": np.vstack([np.column_stack([t[c].to_numpy() for c in pcs]) for t in tables]),
        "rows": np.concatenate([t["row"].to_numpy() for t in tables]),
        "parts": np.array(len(parts)),
    }


def _assert_same(res, ref) -> None:
    got, want = _outputs(res), _outputs(ref)
    for name, expected in want.items():
        assert got[name].shape == expected.shape, name
        scale = max(1.0, float(np.max(np.abs(expected))))
        err = float(np.max(np.abs(got[name] - expected))) / scale
        assert err <= _TOLERANCE, f"{name}: differs from the threads result by {err:.3g} (relative to {scale:.3g})"


# -- local schedulers ----------------------------------------------------------

@pytest.mark.cluster
@pytest.mark.parametrize("method", _METHODS)
@pytest.mark.parametrize("scheduler, workers", [
    ("synchronous", 0),  # one task at a time, in this thread
    ("threads", 1),      # a different worker count from the reference's 2
    ("processes", 2),    # tasks and results pickled between processes
])
def test_local_schedulers_match_threads(data, reference, tmp_path, scheduler, workers, method):
    res = pcapipe.run(_config(data, tmp_path / "run", method, scheduler=scheduler, workers=workers,
                              memory_limit=_MEMORY))
    assert res.manifest["compute"]["scheduler"] == scheduler
    _assert_same(res, reference[method])


@pytest.fixture(scope="module")
def local_cluster():
    # One worker, unlike the reference's two threads.
    with Runner(ComputeConfig(scheduler="local-cluster", workers=1, memory_limit=_MEMORY, progress=False)) as r:
        yield r


@pytest.mark.cluster
def test_local_cluster_matches_threads(data, reference, local_cluster, tmp_path):
    for method in _METHODS:
        res = pcapipe.run(_config(data, tmp_path / method, method, scheduler="local-cluster"),
                          runner=local_cluster)
        record = res.manifest["compute"]
        assert (record["scheduler"], record["workers"], record["threads_per_worker"]) == ("local-cluster", 1, 1)
        assert record["memory_per_worker"] == _MEMORY_BYTES
        _assert_same(res, reference[method])


@pytest.mark.cluster
def test_local_cluster_worker_blas_uses_all_its_cores(local_cluster):
    """One single-threaded worker on the host: its BLAS may use every core (the nanny starts it at 1)."""
    from threadpoolctl import threadpool_info

    cores = len(os.sched_getaffinity(0))
    for worker, info in local_cluster.run_on_workers(threadpool_info).items():
        blas = [lib["num_threads"] for lib in info if lib["user_api"] == "blas"]
        assert blas and all(n == cores for n in blas), (worker, info)


# -- a cluster started with dask's own commands ---------------------------------

@pytest.mark.cluster
def test_tcp_matches_threads_over_one_connection(cluster, data, reference, tmp_path, monkeypatch, caplog):
    def no_second_runner(*args, **kwargs):
        raise AssertionError("engine.run opened its own Runner instead of using the one passed in")

    caplog.set_level(logging.INFO, logger="pcapipe")
    cfg = ComputeConfig(scheduler=cluster.address, connect_timeout=10.0, progress=False)
    with Runner(cfg) as runner:
        monkeypatch.setattr(pcapipe.engine, "Runner", no_second_runner)
        client_id = runner.client.id
        for method in _METHODS:
            res = pcapipe.run(_config(data, tmp_path / method, method, scheduler=cluster.address),
                              runner=runner)
            assert res.manifest["compute"] == {
                "scheduler": cluster.address, "workers": 2, "threads_per_worker": 1,
                "memory_per_worker": _MEMORY_BYTES, "total_threads": 2, "hosts": 1,
                "dashboard": runner.info.dashboard}
            _assert_same(res, reference[method])
        assert runner.client.id == client_id and runner.client.status == "running"
    assert runner.info.dashboard.startswith("http://127.0.0.1:")
    assert any(f"dashboard {runner.info.dashboard}" in r.getMessage() for r in caplog.records)


@pytest.mark.cluster
def test_tcp_worker_blas_is_its_share_of_the_cores(cluster):
    """Two single-threaded workers on one host: each gets half the cores (at least 1)."""
    from threadpoolctl import threadpool_info

    expected = max(1, len(os.sched_getaffinity(0)) // 2)
    with Runner(ComputeConfig(scheduler=cluster.address, progress=False)) as runner:
        answers = runner.run_on_workers(threadpool_info)
    assert sorted(answers) == sorted(cluster.workers())
    for worker, info in answers.items():
        blas = [lib["num_threads"] for lib in info if lib["user_api"] == "blas"]
        assert blas and all(n == expected for n in blas), (worker, info)


@pytest.mark.cluster
def test_probe_names_the_worker_and_the_path(cluster, data, tmp_path):
    import glob

    missing = str(tmp_path / "only-on-my-laptop" / "part-000.parquet")
    with Runner(ComputeConfig(scheduler=cluster.address, progress=False)) as runner:
        runner.probe(sorted(glob.glob(data))[0])  # readable by every worker: no error
        with pytest.raises(ClusterError) as e:
            runner.probe(missing)
    message = str(e.value)
    assert any(f"worker {w} " in message for w in cluster.workers()), message
    assert missing in message and "shared" in message, message


@pytest.mark.cluster
def test_progress_bar_on_a_terminal_goes_to_stderr(cluster, monkeypatch, capsys):
    from dask import delayed

    class Terminal(io.StringIO):
        def isatty(self):
            return True

    terminal = Terminal()
    with Runner(ComputeConfig(scheduler=cluster.address, progress=True)) as runner:
        monkeypatch.setattr(sys, "stderr", terminal)
        (total,) = runner.compute([delayed(sum)([1, 2, 3])], "test")
        monkeypatch.undo()
    assert total == 6
    last = terminal.getvalue().rstrip("\n").split("\r")[-1]  # the final redraw of pcapipe.progress's line
    assert last.startswith("test ") and "[" + "#" * 30 + "] 100% |" in last
    assert capsys.readouterr().out == ""


def test_blas_shares_split_each_host_between_its_worker_threads():
    # Expected values from the definition (host cores // worker threads on
    # that host, at least 1); common practice, no source.
    workers = {
        "tcp://a:1": {"host": "a", "nthreads": 4}, "tcp://a:2": {"host": "a", "nthreads": 4},
        "tcp://b:1": {"host": "b", "nthreads": 1},
        "tcp://c:1": {"host": "c", "nthreads": 1}, "tcp://c:2": {"host": "c", "nthreads": 1},
        "tcp://c:3": {"host": "c", "nthreads": 1},
    }
    cores = {"tcp://a:1": 16, "tcp://a:2": 16, "tcp://b:1": 8, "tcp://c:1": 2, "tcp://c:2": 2, "tcp://c:3": 2}
    assert blas_shares(workers, cores) == {"tcp://a:1": 2, "tcp://a:2": 2, "tcp://b:1": 8,
                                           "tcp://c:1": 1, "tcp://c:2": 1, "tcp://c:3": 1}


# -- faults ----------------------------------------------------------------------

@pytest.fixture
def doomed_cluster(tmp_path):
    c = _Cluster(tmp_path / "cluster")
    os.makedirs(c.dir)
    try:
        yield c.start(2)
    except BaseException:
        print(c.logs())
        raise
    finally:
        c.close()


@pytest.fixture(scope="module")
def long_job(tmp_path_factory):
    """A matrix-free job of 24 blocks of 10 000 rows (a first pass long enough to catch), and its threads result."""
    root = tmp_path_factory.mktemp("long")
    rng = np.random.default_rng(99)
    # Eigenvalues made up for the test; only their sizes of order 1 matter.
    x = known_spectrum(240_000, 16, np.linspace(8.0, 4.0, 16), rng, mean=-20.0)
    write_parquet(root / "d", x, files=4, row_group=10_000, keep={"row": np.arange(x.shape[0])})
    glob = str(root / "d" / "*.parquet")
    ref = pcapipe.run(_config(glob, root / "ref", "matrix-free", scheduler="threads", workers=2,
                              memory_limit=_MEMORY))
    assert ref.manifest["passes_over_data"] >= 3  # moments, product(s), scores: passes after the first
    return glob, ref


def _victim(cluster, when: str):
    """A worker that holds work of the run right now, or None."""
    # matrix-free: the first pass reads the rows into worker memory, kept there for every later pass
    prefix = "pcapipe-held-"
    if when == "first pass":  # tasks of the read assigned to it
        held = cluster.monitor.processing()
    else:  # rows held in its memory for the moments and the products
        held = cluster.monitor.has_what()
    for worker, keys in held.items():
        if any(str(k).startswith(prefix) for k in keys):
            return worker
    return None


@pytest.mark.cluster
@pytest.mark.parametrize("when", [
    "first pass",     # its queued and running tasks are lost
    "held rows",      # rows held in its memory are lost; dask recomputes them from the graph
])
def test_worker_killed_mid_run_same_answer(doomed_cluster, long_job, tmp_path, when):
    glob, ref = long_job
    outcome: dict = {}

    def job():
        try:
            outcome["result"] = pcapipe.run(_config(glob, tmp_path / "tcp", "matrix-free",
                                                    scheduler=doomed_cluster.address))
        except BaseException as e:  # reported by the assertions below
            outcome["error"] = e

    thread = threading.Thread(target=job, daemon=True)
    thread.start()
    def victim_or_end():
        return _victim(doomed_cluster, when) or (not thread.is_alive() and "ended")

    victim = _wait_until(victim_or_end, _START_SECONDS, f"the run's {when} on a worker", interval=0.01)
    assert victim != "ended", f"the run ended before its {when} was seen on a worker: {outcome}"
    running_at_kill = thread.is_alive()
    doomed_cluster.kill_worker(victim)
    thread.join(timeout=120)
    assert not thread.is_alive(), "the run did not finish within 120 s after a worker was killed"
    assert running_at_kill, "the run ended before the worker was killed; the test proved nothing"
    assert "error" not in outcome, repr(outcome.get("error"))
    assert victim not in doomed_cluster.workers()
    assert outcome["result"].manifest["blocks_cached"].startswith("rows read once and held")
    _assert_same(outcome["result"], ref)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _write_toml(path, glob: str, out, address: str) -> str:
    path.write_text(
        f'[input]\npaths = [{json.dumps(glob)}]\n[model]\ncomponents = 2\nmethod = "covariance"\n'
        f'[compute]\nscheduler = "{address}"\nconnect_timeout = 2.0\nprogress = false\n'
        f'[output]\ndirectory = {json.dumps(str(out))}\nreport = false\n'
    )
    return str(path)


def _assert_one_error_line(proc, address: str) -> None:
    assert proc.returncode == 2, proc.stderr
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
    errors = [ln for ln in lines if ln.startswith("error:")]
    assert len(errors) == 1 and lines[-1] == errors[0], proc.stderr
    assert address in errors[0] and "within 2 s" in errors[0] and "dask scheduler" in errors[0], errors[0]
    assert "Traceback" not in proc.stderr


@pytest.mark.cluster
def test_nothing_listening_exits_2_naming_the_address(data, tmp_path):
    address = f"tcp://127.0.0.1:{_free_port()}"
    proc = run_cli("run", _write_toml(tmp_path / "job.toml", data, tmp_path / "run", address), timeout=60)
    _assert_one_error_line(proc, address)
    assert not (tmp_path / "run").exists()


@pytest.mark.cluster
def test_silent_listener_exits_2_within_the_timeout(data, tmp_path):
    """A port that accepts connections but never speaks dask's protocol must not hang the run."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        s.listen(8)  # never accept(): the kernel completes the TCP handshake, nobody answers
        address = f"tcp://127.0.0.1:{s.getsockname()[1]}"
        proc = run_cli("run", _write_toml(tmp_path / "job.toml", data, tmp_path / "run", address), timeout=60)
    _assert_one_error_line(proc, address)
