"""Shared helpers for the tests: write arrays as Parquet, build configs, run the CLI."""

from __future__ import annotations

import json
import logging
import os
import subprocess
import sys
import time

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def write_parquet(directory, x, *, files=1, row_group=None, vector=None, prefix="f", keep=None,
                  dtype=None, name="part"):
    """Write the rows of ``x`` into ``files`` Parquet files (row order kept); returns the paths.

    ``vector``: None for one scalar column per feature (``f0``, ``f1``, ...), or
    ``"fixed"`` / ``"list"`` for one vector column ``emb``.  ``keep``: extra
    columns (dict name -> array over all rows).
    """
    os.makedirs(directory, exist_ok=True)
    x = np.asarray(x)
    if dtype is not None:
        x = x.astype(dtype)
    bounds = np.linspace(0, x.shape[0], files + 1).astype(int)
    paths = []
    for i in range(files):
        sl = slice(bounds[i], bounds[i + 1])
        part = x[sl]
        cols = {}
        for k, v in (keep or {}).items():
            cols[k] = np.asarray(v)[sl]
        if vector is None:
            for j in range(x.shape[1]):
                cols[f"{prefix}{j}"] = part[:, j]
        else:
            flat = pa.array(np.ascontiguousarray(part).ravel())
            if vector == "fixed":
                cols["emb"] = pa.FixedSizeListArray.from_arrays(flat, x.shape[1])
            else:
                offsets = pa.array(np.arange(0, part.size + 1, x.shape[1], dtype=np.int32))
                cols["emb"] = pa.ListArray.from_arrays(offsets, flat)
        path = os.path.join(directory, f"{name}-{i:03d}.parquet")
        pq.write_table(pa.table(cols), path, row_group_size=row_group or max(1, part.shape[0]))
        paths.append(path)
    return paths


def make_config(data_glob, out_dir, **sections):
    """A config dict; ``sections`` like ``model={"components": 3}`` update the defaults."""
    cfg = {
        "input": {"paths": [data_glob]},
        "model": {},
        "compute": {"scheduler": "threads", "progress": False},
        "output": {"directory": str(out_dir), "report": False},
    }
    for key, values in sections.items():
        cfg.setdefault(key, {}).update(values)
    return cfg


def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, str):
        return json.dumps(v)  # a JSON string is a valid TOML basic string
    return repr(v)


def toml_text(cfg: dict) -> str:
    """A config dict (sections of scalars and lists) as TOML text."""
    lines = []
    for section, table in cfg.items():
        lines.append(f"[{section}]")
        lines += [f"{k} = {_toml_value(v)}" for k, v in table.items()]
    return "\n".join(lines) + "\n"


def write_toml(path, cfg: dict) -> str:
    """Write ``cfg`` as a TOML file; returns the path as a string."""
    with open(path, "w") as f:
        f.write(toml_text(cfg))
    return str(path)


def run_cli(*args, cwd=None, timeout=300, env=None):
    """Run ``python -m pcapipe ARGS`` in a subprocess; returns the CompletedProcess."""
    full_env = dict(os.environ)
    full_env.update(env or {})
    return subprocess.run([sys.executable, "-m", "pcapipe", *map(str, args)], capture_output=True,
                          text=True, cwd=cwd or ROOT, timeout=timeout, env=full_env)


def known_spectrum(n, d, values, rng, mean=0.0):
    """Rows whose population covariance has eigenvalues ``values`` (padded with a flat tail)."""
    values = np.asarray(values, dtype=float)
    q, _ = np.linalg.qr(rng.standard_normal((d, d)))
    z = rng.standard_normal((n, d)) * np.sqrt(values)
    return z @ q.T + mean


@pytest.fixture
def restore_logging():
    """For tests calling cli.main in this process: it points the pcapipe logger at this test's stderr."""
    log = logging.getLogger("pcapipe")
    saved = log.handlers[:], log.level, log.propagate
    yield
    log.handlers[:], log.level, log.propagate = saved


@pytest.fixture
def rng():
    return np.random.default_rng(12345)


def retained(res, column="eigenvalue"):
    """``column`` of the spectrum on the retained components (PC1..PCk) only, as a numpy array."""
    spec = res.spectrum
    return spec.loc[spec["retained"], column].to_numpy()


def wait_for_checkpoint(partial, proc, min_passes=1, stage=None, timeout=120.0) -> dict:
    """Poll ``partial``'s checkpoint until it records ``min_passes`` passes (at ``stage``, if given).

    Fails the test when ``proc`` (the run) ends first or nothing appears within ``timeout``; returns
    the checkpoint state.
    """
    state = os.path.join(partial, "checkpoint", "state.json")
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            pytest.fail(f"the run ended before it could be interrupted: {proc.stderr.read()}")
        try:
            with open(state) as f:
                s = json.load(f)
            if s["passes"] >= min_passes and stage in (None, s["stage"]):
                return s
        except (OSError, ValueError, KeyError):
            pass
        time.sleep(0.01)
    proc.kill()
    pytest.fail(f"no checkpoint{f' at stage {stage}' if stage else ''} within {timeout} s")


def count_stream_calls(monkeypatch) -> list:
    """Record the path of every row group the reader streams column-parallel (the real reader still runs)."""
    from pcapipe import reader

    calls = []
    real = reader._parallel_stream

    def counted(*args, **kwargs):
        calls.append((args[0], args[1]))
        yield from real(*args, **kwargs)

    monkeypatch.setattr(reader, "_parallel_stream", counted)
    return calls
