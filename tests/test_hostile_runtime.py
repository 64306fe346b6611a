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
import time

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import pcapipe
from conftest import ROOT, known_spectrum, make_config, run_cli, write_parquet, write_toml

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
