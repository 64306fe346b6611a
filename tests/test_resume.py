"""Checkpoints, kill -9 / Ctrl-C and ``--resume``: never a wrong or half-written result.

The runs here are killed for real (SIGKILL, SIGINT) in a subprocess partway
through, resumed, and compared with an uninterrupted run of the same config.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

import pcapipe
from conftest import ROOT, wait_for_checkpoint, known_spectrum, make_config, run_cli, write_parquet, write_toml, retained

# Slowly decaying spectrum so the matrix-free solver needs many passes
# (made up for the test; the values only need gaps that converge slowly).
_SPECTRUM = np.concatenate([[10.0, 9.0, 8.2, 7.6, 7.1], np.linspace(6.8, 0.5, 35)])


@pytest.fixture(scope="module")
def slow_job(tmp_path_factory):
    """A matrix-free job with many blocks, re-read every pass (memory_limit small)."""
    root = tmp_path_factory.mktemp("resume")
    rng = np.random.default_rng(7)
    # 360k rows: faster reading left too little time after the first checkpoint with 120k
    x = known_spectrum(360_000, _SPECTRUM.size, _SPECTRUM, rng, mean=3.0)
    write_parquet(root / "data", x, files=4, row_group=2_000, keep={"row": np.arange(x.shape[0])})
    cfg = make_config(str(root / "data" / "*.parquet"), root / "ref",
                      input={"keep": ["row"]},
                      model={"components": 4, "method": "matrix-free", "tolerance": 1e-12, "oversample": 2},
                      compute={"scheduler": "synchronous", "memory_limit": "16MiB"})
    ref = pcapipe.run(cfg)
    assert ref.manifest["blocks_cached"].startswith("re-read")
    assert ref.manifest["passes_over_data"] >= 8  # enough passes to interrupt in the middle
    return root, cfg, ref


def _start(config_path, *extra):
    return subprocess.Popen([sys.executable, "-m", "pcapipe", "run", str(config_path), *extra],
                            cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _same(a, b):
    np.testing.assert_allclose(retained(a), retained(b), rtol=1e-12)
    np.testing.assert_allclose(a.loadings.to_numpy(), b.loadings.to_numpy(), atol=1e-12)
    sa, sb = a.scores().compute(), b.scores().compute()
    pd.testing.assert_frame_equal(sa.reset_index(drop=True), sb.reset_index(drop=True), atol=1e-10, rtol=0)


@pytest.mark.parametrize("sig", [signal.SIGKILL, signal.SIGINT])  # kill -9 / Ctrl-C
def test_interrupted_run_resumes_to_the_same_answer(slow_job, tmp_path, sig):
    root, cfg, ref = slow_job
    cfg = json.loads(json.dumps(cfg))
    out = tmp_path / "run"
    cfg["output"]["directory"] = str(out)
    path = write_toml(tmp_path / "job.toml", cfg)
    proc = _start(path)
    partial = str(out) + ".incomplete"
    seen = wait_for_checkpoint(partial, proc, 3, stage="solver")
    proc.send_signal(sig)
    _, err = proc.communicate(timeout=60)
    if sig == signal.SIGINT:
        assert proc.returncode == 130, err
        assert "--resume" in err  # the resume command is printed
    assert not out.exists()  # no directory that looks complete
    assert os.path.isfile(os.path.join(partial, "checkpoint", "state.json"))
    r = run_cli("run", path, "--resume", "-q")
    assert r.returncode == 0, r.stderr
    assert not os.path.exists(partial)  # a finished run removes the partial state
    res = pcapipe.load(out)
    _same(res, ref)
    (resume,) = res.manifest["resumed"]
    assert resume["from_stage"] == "solver" and resume["passes_before"] >= seen["passes"]
    assert not os.path.exists(os.path.join(out, "checkpoint"))


def test_resume_refuses_changed_config_or_inputs(slow_job, tmp_path):
    root, cfg, _ = slow_job
    cfg = json.loads(json.dumps(cfg))
    cfg["output"]["directory"] = str(tmp_path / "run")
    path = write_toml(tmp_path / "job.toml", cfg)
    proc = _start(path)
    wait_for_checkpoint(str(tmp_path / "run") + ".incomplete", proc, 2, stage="solver")
    proc.kill()
    proc.communicate(timeout=60)
    # a model key changed
    r = run_cli("run", path, "--resume", "--set", "model.components=3")
    assert r.returncode == 2 and "model.components changed" in r.stderr
    # without --resume, an unfinished run is not silently thrown away
    r = run_cli("run", path)
    assert r.returncode == 2 and "--resume" in r.stderr and "unfinished run" in r.stderr
    # an input file changed (modification time)
    victim = sorted((root / "data").glob("*.parquet"))[0]
    st = victim.stat()
    os.utime(victim, ns=(st.st_atime_ns, st.st_mtime_ns + 1_000_000_000))
    try:
        r = run_cli("run", path, "--resume")
        assert r.returncode == 2 and str(victim) in r.stderr and "changed" in r.stderr
    finally:
        os.utime(victim, ns=(st.st_atime_ns, st.st_mtime_ns))
    # the compute section may change: same answer on another scheduler
    r = run_cli("run", path, "--resume", "--set", "compute.scheduler=threads", "-q")
    assert r.returncode == 0, r.stderr


def test_resume_without_checkpoint_is_an_error(tmp_path, rng):
    write_parquet(tmp_path / "d", rng.standard_normal((50, 4)))
    cfg = make_config(str(tmp_path / "d" / "*.parquet"), tmp_path / "run", model={"components": 2})
    with pytest.raises(pcapipe.ResumeError, match="no checkpoint"):
        pcapipe.run(cfg, resume=True)
    assert not (tmp_path / "run").exists() and not (tmp_path / "run.incomplete").exists()


def test_bad_input_found_in_a_pass_leaves_nothing(tmp_path, rng):
    x = rng.standard_normal((200, 3))
    x[17, 1] = np.nan
    write_parquet(tmp_path / "d", x)
    cfg = make_config(str(tmp_path / "d" / "*.parquet"), tmp_path / "run", model={"components": 2})
    with pytest.raises(pcapipe.InputError, match=r"f1 \(1\)"):
        pcapipe.run(cfg)
    assert not (tmp_path / "run").exists() and not (tmp_path / "run.incomplete").exists()


@pytest.mark.parametrize("method", ["covariance", "direct"])  # direct: the rows are read again
def test_run_resumes_after_the_moments_pass(tmp_path, rng, method):
    x = known_spectrum(3000, 6, [5, 3, 2, 1, 0.5, 0.2], rng)
    write_parquet(tmp_path / "d", x, files=2, row_group=500)
    cfg = make_config(str(tmp_path / "d" / "*.parquet"), tmp_path / "run", model={"components": 3, "method": method})
    ref = pcapipe.run(dict(cfg, output=dict(cfg["output"], directory=str(tmp_path / "ref"))))
    # Leave the state a kill after the moments pass leaves: run, then put the
    # checkpoint back as it was after that pass and drop the finished run.
    from pcapipe.checkpoint import Checkpoint, job_identity
    from pcapipe.engine import prepare

    p = prepare(cfg)
    ck = Checkpoint(p.writer.partial, job_identity(p.cfg, p.plan))
    os.makedirs(p.writer.partial)
    from pcapipe.screening import moments_pass
    from pcapipe.compute import Runner
    from pcapipe.passes import DataPasses

    with Runner(p.cfg.compute) as runner:
        m = moments_pass(p.cfg, p.plan, DataPasses(p.plan, runner), full=method == "covariance")
    ck.save("moments", moments=m, method=method, method_reason="test", method_estimates={}, passes=1)
    res = pcapipe.run(cfg, resume=True)
    np.testing.assert_allclose(retained(res), retained(ref), rtol=1e-12)
    assert res.manifest["method"] == method
    assert res.manifest["resumed"][0]["from_stage"] == "moments"
