"""Hostile conditions at run time: overflow, empty columns, full disks, lost clusters, resume.

Every case runs ``pcapipe run`` in a subprocess, as a user would, and checks
the same four things: the exit status, the words of the one ``error:`` line
(no traceback, no library noise), that the input files are byte-identical
afterwards, and exactly what is left on disk.  Cases that fit one shape are
rows of ``CASES``; the ones that need a real small filesystem, a real dask
cluster or an interrupted run are focused tests below.
"""

from __future__ import annotations

import hashlib
import json
import os
import shlex
import shutil
import signal
import subprocess
import sys

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import pcapipe
from conftest import ROOT, wait_for_checkpoint, known_spectrum, make_config, run_cli, write_parquet, write_toml

_NOISE = ("Traceback", "asyncio", "Task was destroyed", "Exception ignored", "CommClosedError",
          "distributed.", "RuntimeWarning", "tornado")


# ---------------------------------------------------------------- helpers
def _digests(root) -> dict:
    """sha256 of every file below ``root`` (the inputs)."""
    out = {}
    for dirpath, _, files in os.walk(root):
        for name in files:
            path = os.path.join(dirpath, name)
            with open(path, "rb") as f:
                out[os.path.relpath(path, root)] = hashlib.sha256(f.read()).hexdigest()
    return out


def _tree(root) -> list[str]:
    """Every path below ``root``, relative, sorted (what is left on disk)."""
    out = []
    for dirpath, dirs, files in os.walk(root):
        for name in dirs + files:
            out.append(os.path.relpath(os.path.join(dirpath, name), root))
    return sorted(out)


def _one_error_line(stderr: str) -> str:
    """The single ``error:`` line, which must be the last line; no traceback or library noise."""
    lines = [ln for ln in stderr.splitlines() if ln.strip()]
    errors = [ln for ln in lines if ln.startswith("error:")]
    assert len(errors) == 1 and lines[-1] == errors[0], stderr
    for word in _NOISE:
        assert word not in stderr, stderr
    return errors[0]


def _assert_words(line: str, words) -> None:
    for w in words:
        assert w in line, f"{w!r} not in {line!r}"


# ---------------------------------------------------------------- table
# Each builder gets an empty directory with data/ below it to fill, and
# returns (config dict, extra CLI args).  The config writes to <dir>/out.

def _table(d, columns: dict, rows=400):
    os.makedirs(os.path.join(d, "data"), exist_ok=True)
    pq.write_table(pa.table(columns), os.path.join(d, "data", "x.parquet"), row_group_size=100)


def b_overflow(d, method):
    rng = np.random.default_rng(5)
    # Values of 1e160: their squares (1e320) are beyond float64's largest, 1.8e308 (IEEE 754).
    _table(d, {"a": rng.standard_normal(400), "big": rng.standard_normal(400) * 1e160,
               "c": rng.standard_normal(400)})
    return make_config(os.path.join(d, "data"), os.path.join(d, "out"),
                       model={"components": 2, "method": method}), []


def b_overflow_uncentered(d):
    # Mean 1e155, spread 1: the variance is fine, but the second moment about zero overflows.
    rng = np.random.default_rng(6)
    _table(d, {"a": rng.standard_normal(400), "far": 1e155 + rng.standard_normal(400)})
    return make_config(os.path.join(d, "data"), os.path.join(d, "out"),
                       model={"components": 1, "center": False}), []


def b_all_null_impute(d):
    rng = np.random.default_rng(7)
    _table(d, {"a": rng.standard_normal(400), "b": rng.standard_normal(400),
               "empty": pa.array([None] * 400, type=pa.float64())})
    return make_config(os.path.join(d, "data"), os.path.join(d, "out"),
                       input={"missing": "impute-mean"}, model={"components": 1}), []


def b_all_nan_impute(d):
    rng = np.random.default_rng(8)
    _table(d, {"a": rng.standard_normal(400), "b": rng.standard_normal(400), "nans": np.full(400, np.nan)})
    return make_config(os.path.join(d, "data"), os.path.join(d, "out"),
                       input={"missing": "impute-mean"}, model={"components": 1}), []


def b_local_cluster_tiny_memory(d):
    _table(d, {"a": np.arange(400.0), "b": np.sin(np.arange(400.0))})
    return make_config(os.path.join(d, "data"), os.path.join(d, "out"), model={"components": 1},
                       compute={"scheduler": "local-cluster", "workers": 2, "memory_limit": "128MiB"}), []


CASES = [
    # item 5: |x| ~ 1e160, covariance method: the d x d matrix overflows; named, before any checkpoint
    pytest.param(lambda d: b_overflow(d, "covariance"), 2,
                 ["big", "too large for float64", "rescale", "input.exclude"], id="overflow-covariance"),
    # item 5, matrix-free: the moments pass already overflows; the solver never starts
    pytest.param(lambda d: b_overflow(d, "matrix-free"), 2,
                 ["big", "too large for float64", "rescale"], id="overflow-matrix-free"),
    # item 5, center = false: the uncentred second moment squares the mean (1e310)
    pytest.param(b_overflow_uncentered, 2, ["far", "too large for float64"], id="overflow-uncentered"),
    # item 13: a column of nulls only has no mean to impute; refused instead of filled with 0
    pytest.param(b_all_null_impute, 2,
                 ["empty", "no finite value", "400 rows", "impute-mean", "input.exclude"], id="all-null-impute"),
    # item 13: the same with NaN instead of null
    pytest.param(b_all_nan_impute, 2, ["nans", "no finite value", "impute-mean"], id="all-nan-impute"),
    # item 8: 128 MiB per local-cluster worker: refused before any worker starts, minimum stated
    pytest.param(b_local_cluster_tiny_memory, 2,
                 ["compute.memory_limit", "128.0 MiB", "at least 256.0 MiB", "compute.workers"],
                 id="local-cluster-memory"),
]


@pytest.mark.parametrize("build, status, words", CASES)
def test_hostile_runtime_case(tmp_path, build, status, words):
    cfg, extra = build(str(tmp_path))
    before = _digests(tmp_path / "data")
    config = write_toml(tmp_path / "job.toml", cfg)
    proc = run_cli("run", config, *extra, timeout=120)
    assert proc.returncode == status, proc.stderr
    _assert_words(_one_error_line(proc.stderr), words)
    assert _digests(tmp_path / "data") == before
    # nothing written: no run directory, no .incomplete sibling, no checkpoint
    assert sorted(os.listdir(tmp_path)) == ["data", "job.toml"]


# ---------------------------------------------------------------- item 6: a full disk
# A driver run inside a private mount namespace (``unshare -m``; as a normal
# user ``unshare -rm``): it mounts a real tmpfs of a given size at the output's
# parent, runs pcapipe, lists what is left, then grows the tmpfs
# (``mount -o remount,size=``) and runs the resume command the error printed.
# The mount disappears with the namespace, whatever happens to the test.
_DRIVER = r"""
import json, os, shlex, subprocess, sys
mnt, size, config, report = sys.argv[1:5]
if subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", mnt]).returncode:
    sys.exit(99)
def listing():
    out = []
    for dirpath, dirs, files in os.walk(mnt):
        out += [os.path.relpath(os.path.join(dirpath, n), mnt) for n in dirs + files]
    return sorted(out)
run = [sys.executable, "-m", "pcapipe"]
first = subprocess.run(run + ["run", config], capture_output=True, text=True)
result = {"status": first.returncode, "stderr": first.stderr, "left": listing()}
line = [ln for ln in first.stderr.splitlines() if ln.startswith("error:")]
if line and "continue with: " in line[-1]:
    command = line[-1].split("continue with: ", 1)[1].split(" once there is room")[0]
    subprocess.run(["mount", "-o", "remount,size=256m", mnt], check=True)
    words = shlex.split(command)
    assert words[:2] == ["pcapipe", "run"], command
    second = subprocess.run(run + words[1:], capture_output=True, text=True)
    result.update(resume_command=command, resume_status=second.returncode, resume_stderr=second.stderr,
                  after=listing())
    if second.returncode == 0:
        import pcapipe
        res = pcapipe.load(os.path.join(mnt, "out"))
        result["eigenvalues"] = res.spectrum["eigenvalue"].to_list()
        result["rows"] = int(res.scores()["PC1"].count().compute())
with open(report, "w") as f:
    json.dump(result, f)
"""


def _on_small_disk(tmp_path, size: str, config: str) -> dict:
    mnt = tmp_path / "disk"
    mnt.mkdir()
    (tmp_path / "driver.py").write_text(_DRIVER)
    report = tmp_path / "report.json"
    flags = "-m" if os.geteuid() == 0 else "-rm"
    if shutil.which("unshare") is None:
        pytest.skip("no unshare(1) to make a private small filesystem")
    proc = subprocess.run(["unshare", flags, sys.executable, str(tmp_path / "driver.py"), str(mnt), size, config,
                           str(report)], capture_output=True, text=True, cwd=ROOT, timeout=300)
    if proc.returncode == 99 or (proc.returncode and "unshare" in proc.stderr):
        pytest.skip(f"cannot mount a small tmpfs here: {proc.stderr.strip()[:200]}")
    assert proc.returncode == 0, proc.stderr
    assert os.listdir(mnt) == []  # the tmpfs went away with the namespace
    return json.loads(report.read_text())


@pytest.fixture(scope="module")
def scores_job(tmp_path_factory):
    """120k rows x 8 features in 4 files: scores of ~6 MB, a checkpoint of a few kB."""
    root = tmp_path_factory.mktemp("disk")
    rng = np.random.default_rng(11)
    # Eigenvalues made up for the test; only that they are distinct matters.
    x = known_spectrum(120_000, 8, [8.0, 5.0, 3.0, 2.0, 1.0, 0.5, 0.3, 0.1], rng, mean=2.0)
    write_parquet(root / "data", x, files=4, row_group=10_000, keep={"row": np.arange(x.shape[0])})
    ref = pcapipe.run(make_config(str(root / "data"), root / "ref", input={"keep": ["row"]},
                                  model={"components": 3}))
    return root, ref


@pytest.mark.parametrize("method", [
    "covariance",                                          # scores after one pass
    pytest.param("matrix-free", marks=pytest.mark.slow),   # scores after the solver's passes
])
def test_full_disk_while_writing_scores(scores_job, tmp_path, method):
    root, ref = scores_job
    before = _digests(root / "data")
    cfg = make_config(str(root / "data"), tmp_path / "disk" / "out", input={"keep": ["row"]},
                      model={"components": 3, "method": method})
    config = write_toml(tmp_path / "job.toml", cfg)
    r = _on_small_disk(tmp_path, "2m", config)
    assert r["status"] == 2, r["stderr"]
    line = _one_error_line(r["stderr"])
    _assert_words(line, [f"no space left on {tmp_path / 'disk'}", "MB or choose another output.directory",
                         "checkpoint of the", "kept in", "continue with: pcapipe run", "--resume"])
    # partial score parts and temporary files are gone; the checkpoint and our marker stay
    assert all(p.startswith("out.incomplete") for p in r["left"]), r["left"]
    assert not any("scores" in p or ".tmp" in p for p in r["left"]), r["left"]
    assert "out.incomplete/checkpoint/state.json" in r["left"]
    # the printed command works once there is room, and gives the uninterrupted answer
    assert r["resume_status"] == 0, r["resume_stderr"]
    np.testing.assert_allclose(r["eigenvalues"][:3], ref.spectrum["eigenvalue"].to_numpy()[:3], rtol=1e-10)
    assert r["rows"] == 120_000
    assert r["after"][0] == "out" and not any(p.startswith("out.incomplete") for p in r["after"])
    assert _digests(root / "data") == before


def test_full_disk_before_any_checkpoint_keeps_nothing(scores_job, tmp_path):
    root, _ = scores_job
    before = _digests(root / "data")
    # A feature wide enough that the first checkpoint (moments, d x d for covariance) does not fit 64 kB.
    rng = np.random.default_rng(12)
    write_parquet(tmp_path / "wide", rng.standard_normal((200, 120)))
    cfg = make_config(str(tmp_path / "wide"), tmp_path / "disk" / "out", model={"components": 2,
                                                                               "method": "covariance"})
    r = _on_small_disk(tmp_path, "64k", write_toml(tmp_path / "job.toml", cfg))
    assert r["status"] == 2, r["stderr"]
    _assert_words(_one_error_line(r["stderr"]), ["no space left on", "nothing was kept"])
    assert r["left"] == []
    assert _digests(root / "data") == before


# ---------------------------------------------------------------- item 10: the cluster fails mid-run
# A real scheduler and two workers (``dask scheduler`` / ``dask worker`` as
# subprocesses on 127.0.0.1, the helper of tests/test_cluster.py), a real
# ``pcapipe run`` in a subprocess, and a real kill.

@pytest.fixture(scope="module")
def cluster_job(tmp_path_factory):
    """A matrix-free job needing many passes (close eigenvalues, tight tolerance), and its threads answer."""
    root = tmp_path_factory.mktemp("clusterjob")
    rng = np.random.default_rng(21)
    # Eigenvalues made up for the test: slowly decaying, so that the solver needs several passes
    # and the run lasts a few seconds after its first checkpoint.
    spectrum = np.concatenate([[10.0, 9.0, 8.2, 7.6, 7.1], np.linspace(6.8, 0.5, 19)])
    x = known_spectrum(400_000, 24, spectrum, rng, mean=-3.0)
    write_parquet(root / "data", x, files=4, row_group=25_000, keep={"row": np.arange(x.shape[0])})
    cfg = make_config(str(root / "data"), root / "ref", input={"keep": ["row"]},
                      model={"components": 4, "method": "matrix-free", "tolerance": 1e-13, "oversample": 2},
                      compute={"scheduler": "threads", "workers": 2, "memory_limit": "1GiB"})
    ref = pcapipe.run(cfg)
    assert ref.manifest["passes_over_data"] >= 6
    return root, cfg, ref


@pytest.fixture
def live_cluster(tmp_path, monkeypatch):
    from test_cluster import _Cluster

    # A worker that dies while running a task makes that task fail at once
    # (dask's default retries it on another worker three times).
    monkeypatch.setenv("DASK_DISTRIBUTED__SCHEDULER__ALLOWED_FAILURES", "0")
    c = _Cluster(tmp_path / "cluster")
    os.makedirs(c.dir)
    try:
        yield c.start(2)
    finally:
        c.close()


def _start_on(cluster, cluster_job, tmp_path):
    root, cfg, _ = cluster_job
    cfg = json.loads(json.dumps(cfg))
    cfg["compute"] = {"scheduler": cluster.address, "progress": False}
    config = write_toml(tmp_path / "job.toml", cfg)
    proc = subprocess.Popen([sys.executable, "-m", "pcapipe", "run", config, "--set",
                             f"output.directory={tmp_path / 'out'}"], cwd=ROOT, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    return proc, config


def _resume(line: str, *extra):
    command = line.split("continue with: ", 1)[1].split(" once ")[0]
    words = shlex.split(command)
    assert words[:2] == ["pcapipe", "run"] and "--resume" in words, command
    return run_cli(*words[1:], *extra, timeout=300)


def _same_answer(res, ref):
    np.testing.assert_allclose(res.spectrum["eigenvalue"].to_numpy(), ref.spectrum["eigenvalue"].to_numpy(),
                               rtol=1e-11)


@pytest.mark.slow
@pytest.mark.cluster
def test_lost_scheduler_exits_3_with_one_line_and_resumes(live_cluster, cluster_job, tmp_path):
    root, _, ref = cluster_job
    before = _digests(root / "data")
    proc, config = _start_on(live_cluster, cluster_job, tmp_path)
    try:
        wait_for_checkpoint(str(tmp_path / "out.incomplete"), proc)
        os.killpg(live_cluster.procs[0].pid, signal.SIGKILL)  # the scheduler
        _, stderr = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 3, stderr
    line = _one_error_line(stderr)
    _assert_words(line, ["connection to the dask scheduler", live_cluster.address, "was lost",
                         "checkpoint of the", "continue with: pcapipe run", "--resume", "once the cluster is back"])
    assert not (tmp_path / "out").exists() and (tmp_path / "out.incomplete" / "checkpoint" / "state.json").exists()
    # the printed command continues the run (here on the local threads scheduler: compute may change)
    r = _resume(line, "--set", "compute.scheduler=threads", "-q")
    assert r.returncode == 0, r.stderr
    res = pcapipe.load(tmp_path / "out")
    _same_answer(res, ref)
    assert res.manifest["resumed"] and not (tmp_path / "out.incomplete").exists()
    assert _digests(root / "data") == before


@pytest.mark.slow
@pytest.mark.cluster
def test_ctrl_c_on_a_cluster_is_quiet_and_resumable(live_cluster, cluster_job, tmp_path):
    root, _, ref = cluster_job
    proc, config = _start_on(live_cluster, cluster_job, tmp_path)
    try:
        wait_for_checkpoint(str(tmp_path / "out.incomplete"), proc)
        proc.send_signal(signal.SIGINT)
        _, stderr = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 130, stderr
    for word in _NOISE:
        assert word not in stderr, stderr
    lines = [ln for ln in stderr.splitlines() if ln.strip()]
    assert lines[-1] == "interrupted", stderr
    hint = [ln for ln in lines if "continue with: " in ln]
    assert len(hint) == 1 and "--resume" in hint[0], stderr
    r = _resume(hint[0], "-q")  # the cluster is still there
    assert r.returncode == 0, r.stderr
    _same_answer(pcapipe.load(tmp_path / "out"), ref)


@pytest.mark.cluster
def test_workers_dying_exit_3_and_nothing_left(live_cluster, cluster_job, tmp_path):
    from test_cluster import _victim, _wait_until

    root, _, _ = cluster_job
    before = _digests(root / "data")
    proc, _ = _start_on(live_cluster, cluster_job, tmp_path)
    try:
        victim = _wait_until(lambda: _victim(live_cluster, "first pass") or (proc.poll() is not None and "ended"),
                             60, "a read task on a worker", interval=0.005)
        assert victim != "ended", proc.stderr.read()
        live_cluster.kill_worker(victim)
        _, stderr = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 3, stderr
    _assert_words(_one_error_line(stderr), ["moments pass failed", "worker(s) died while running its task pcapipe-held-",
                                            "running out of memory",
                                            "nothing was kept", "once the cluster is back"])
    assert sorted(os.listdir(tmp_path)) == ["cluster", "job.toml"]
    assert _digests(root / "data") == before


# ---------------------------------------------------------------- item 17: determinism, sentence by sentence
# README, "The answer does not depend on the cluster".  Eigenvalues made up
# for the test; 64 features in 8 row groups of 4000 rows, mean 50.
@pytest.fixture(scope="module")
def det_data(tmp_path_factory):
    root = tmp_path_factory.mktemp("det")
    rng = np.random.default_rng(31)
    x = known_spectrum(32_000, 64, np.geomspace(10.0, 0.1, 64), rng, mean=50.0)
    write_parquet(root / "data", x, files=2, row_group=4_000)
    return root


def _det_run(root, name, method, **compute):
    compute = {"memory_limit": "1GiB", **compute}
    cfg = make_config(str(root / "data"), root / f"{method}-{name}", model={"components": 5, "method": method,
                                                                            "tolerance": 1e-12},
                      compute=compute, output={"scores": False, "overwrite": True})
    res = pcapipe.run(cfg)
    return res.spectrum["eigenvalue"].to_numpy()[:5], res.loadings.to_numpy(), res.manifest


_SCHEDULERS = {
    "threads, 2 workers": dict(scheduler="threads", workers=2),        # 1 BLAS thread per task
    "threads, 1 worker": dict(scheduler="threads", workers=1),         # 2 BLAS threads per task (2 cores)
    "synchronous": dict(scheduler="synchronous"),                      # all cores to BLAS
    "processes, 2 workers": dict(scheduler="processes", workers=2),    # re-reads instead of caching
    "local-cluster, 2 workers": dict(scheduler="local-cluster", workers=2),
}


@pytest.mark.slow
@pytest.mark.cluster
def test_covariance_method_identical_bits_on_every_scheduler(det_data):
    """Sentence: "the covariance method gives identical bits on every scheduler and any number of workers"."""
    runs = {name: _det_run(det_data, name.replace(" ", "").replace(",", "-"), "covariance", **c)
            for name, c in _SCHEDULERS.items()}
    values, vectors, _ = runs["threads, 2 workers"]
    for name, (v, u, _) in runs.items():
        assert np.array_equal(v, values) and np.array_equal(u, vectors), name


@pytest.mark.slow
@pytest.mark.cluster
def test_matrix_free_agrees_to_1e_11_and_repeats_bit_for_bit(det_data):
    """Sentences: "matrix-free: the same config and compute section repeat bit for bit; other schedulers,
    worker counts, BLAS threads or caching agree to 1e-11 relative in eigenvalues"."""
    runs = {name: _det_run(det_data, name.replace(" ", "").replace(",", "-"), "matrix-free", **c)
            for name, c in _SCHEDULERS.items()}
    again = _det_run(det_data, "again", "matrix-free", **_SCHEDULERS["threads, 2 workers"])
    values, vectors, manifest = runs["threads, 2 workers"]
    assert np.array_equal(again[0], values) and np.array_equal(again[1], vectors)
    cached = {name: m["blocks_cached"].startswith("rows read once") for name, (_, _, m) in runs.items()}
    assert cached["threads, 2 workers"] and not cached["processes, 2 workers"]  # both kinds are compared
    for name, (v, u, _) in runs.items():
        np.testing.assert_allclose(v, values, rtol=1e-11, atol=0, err_msg=name)
        # loadings: a vector's error is residual / gap (Davis-Kahan); gaps here are >= 0.07 x theta_1
        np.testing.assert_allclose(np.abs(u), np.abs(vectors), atol=1e-9, err_msg=name)


# ---------------------------------------------------------------- item 9: resume
@pytest.mark.slow
def test_resume_command_after_ctrl_c_keeps_the_overrides(cluster_job, tmp_path):
    """The printed command alone continues the run: --set model.components=3 is stored with the checkpoint."""
    root, cfg, ref = cluster_job
    before = _digests(root / "data")
    # 64 MiB x 2 is too little to hold the rows, so every pass re-reads the files and the run
    # lasts long enough after its first checkpoint for the interrupt to land mid-run
    cfg = {**cfg, "compute": {**cfg["compute"], "memory_limit": "64MiB"}}
    config = write_toml(tmp_path / "job.toml", cfg)  # its own output.directory is another one
    out = tmp_path / "elsewhere"
    proc = subprocess.Popen([sys.executable, "-m", "pcapipe", "run", config, "--set", f"output.directory={out}",
                             "--set", "model.components=3"], cwd=ROOT, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    try:
        wait_for_checkpoint(str(out) + ".incomplete", proc)
        proc.send_signal(signal.SIGINT)
        _, stderr = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 130, stderr
    hint = [ln for ln in stderr.splitlines() if "continue with: " in ln]
    assert len(hint) == 1, stderr
    command = hint[0].split("continue with: ", 1)[1]
    assert command == shlex.join(["pcapipe", "run", config, "--resume", "--set", f"output.directory={out}"])
    r = _resume(hint[0], "-q")
    assert r.returncode == 0, r.stderr
    res = pcapipe.load(out)
    assert res.manifest["resumed"] and res.loadings.shape[1] == 3
    assert res.manifest["blocks_cached"].startswith("re-read"), res.manifest["blocks_cached"]
    np.testing.assert_allclose(res.spectrum["eigenvalue"].to_numpy()[:3], ref.spectrum["eigenvalue"].to_numpy()[:3],
                               rtol=1e-10)
    assert sorted(os.listdir(tmp_path)) == ["elsewhere", "job.toml"]
    assert _digests(root / "data") == before


def _write_plain(path, values):
    # Uncompressed, plain-encoded: the file's size depends only on the number of values.
    pq.write_table(pa.table({"a": values[:, 0], "b": values[:, 1], "c": values[:, 2]}), path,
                   compression="none", use_dictionary=False, row_group_size=500)


def test_resume_notices_a_file_rewritten_with_the_same_size_and_time(tmp_path, monkeypatch):
    rng = np.random.default_rng(41)
    os.makedirs(tmp_path / "data")
    path = tmp_path / "data" / "x.parquet"
    _write_plain(path, rng.standard_normal((2000, 3)))
    cfg = make_config(str(tmp_path / "data"), tmp_path / "out", model={"components": 2})
    config = write_toml(tmp_path / "job.toml", cfg)
    # An interruption right after the first checkpoint (standing in for Ctrl-C; the real
    # one is tested above and in tests/test_resume.py).
    from pcapipe.checkpoint import Checkpoint

    save = Checkpoint.save

    def save_then_stop(self, *args, **kwargs):
        save(self, *args, **kwargs)
        raise KeyboardInterrupt

    monkeypatch.setattr(Checkpoint, "save", save_then_stop)
    with pytest.raises(KeyboardInterrupt):
        pcapipe.run(config)
    monkeypatch.undo()
    st = path.stat()
    _write_plain(path, rng.standard_normal((2000, 3)))  # other values, same layout
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns))
    assert (path.stat().st_size, path.stat().st_mtime_ns) == (st.st_size, st.st_mtime_ns)
    before = _digests(tmp_path / "data")
    r = run_cli("run", config, "--resume", timeout=120)
    assert r.returncode == 2, r.stderr
    _assert_words(_one_error_line(r.stderr), [str(path), "changed since the interrupted run",
                                              "Parquet footer differs", "run without --resume"])
    assert _digests(tmp_path / "data") == before
    # the refused resume left the checkpoint as it was, and wrote nothing else
    assert sorted(os.listdir(tmp_path)) == ["data", "job.toml", "out.incomplete"]
    assert (tmp_path / "out.incomplete" / "checkpoint" / "state.json").exists()


@pytest.mark.slow
@pytest.mark.cluster
def test_ctrl_c_in_a_terminal_on_a_local_cluster_is_quiet(cluster_job, tmp_path):
    """Ctrl-C in a terminal signals the whole process group, the worker processes included."""
    root, cfg, _ = cluster_job
    cfg = json.loads(json.dumps(cfg))
    cfg["compute"] = {"scheduler": "local-cluster", "workers": 2, "memory_limit": "1GiB", "progress": False}
    cfg["output"]["directory"] = str(tmp_path / "out")
    proc = subprocess.Popen([sys.executable, "-m", "pcapipe", "run", write_toml(tmp_path / "job.toml", cfg)],
                            cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            start_new_session=True)
    try:
        wait_for_checkpoint(str(tmp_path / "out.incomplete"), proc)
        os.killpg(proc.pid, signal.SIGINT)
        _, stderr = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
    assert proc.returncode == 130, stderr
    for word in (*_NOISE, "KeyboardInterrupt", "CancelledError", "Nanny"):
        assert word not in stderr, stderr
    lines = [ln for ln in stderr.splitlines() if ln.strip()]
    assert lines[-1] == "interrupted" and "continue with: pcapipe run" in lines[-2], stderr
    assert (tmp_path / "out.incomplete" / "checkpoint" / "state.json").exists()
