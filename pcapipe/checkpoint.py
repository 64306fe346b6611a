"""Checkpoints of an unfinished run, for ``pcapipe run CONFIG --resume``.

After every pass over the data the state needed to go on is saved in
``<directory>.incomplete/checkpoint/``: JSON for the small things (stage,
config, input identities, counters, the random generator's state) and
``.npz`` for arrays (moments, the solver's basis).  Each file is written
under a temporary name and renamed, and ``state.json`` is renamed last, so a
kill at any moment leaves the previous complete checkpoint.  No pickle: the
``.npz`` files are loaded with ``allow_pickle=False``.

A checkpoint is used only for the same job: the same ``input`` and ``model``
sections and ``output.scores``, and the same files (path, size, modification
time and a fingerprint of the Parquet footer, so a file rewritten with the
same size and time is noticed).  The ``compute`` section may change between
attempts (see README, "Determinism").  The ``--set`` overrides of the
interrupted run are stored with it, so ``pcapipe run CONFIG --resume``
applies them again (overrides given with ``--resume`` come on top).
"""

from __future__ import annotations

import contextlib
import json
import os
import tempfile

import numpy as np

from .config import config_to_dict
from .errors import ResumeError
from .moments import Moments
from .solver import SolverState
from .writer import write_json_atomic

__all__ = ["Checkpoint", "job_identity", "saved_overrides", "merge_overrides"]

_VERSION = 2  # 2: input footer fingerprints and the --set overrides


def job_identity(cfg, plan) -> dict:
    """What must not change between an interrupted run and its resumption."""
    d = config_to_dict(cfg)
    return {"input": d["input"], "model": d["model"], "scores": d["output"]["scores"],
            "inputs": plan.inputs_record(),
            # the table's contents, not only its name (model.feature_weights)
            "feature_weights": list(plan.feature_weights) if plan.feature_weights is not None else None}


def saved_overrides(partial_dir: str) -> list[str]:
    """The ``--set`` overrides stored with the checkpoint in ``partial_dir`` ([] when there is none)."""
    try:
        with open(os.path.join(partial_dir, "checkpoint", "state.json")) as f:
            overrides = json.load(f).get("overrides", [])
    except (OSError, ValueError, AttributeError):
        return []  # no usable checkpoint: Checkpoint.load says so
    return [str(o) for o in overrides] if isinstance(overrides, list) else []


def merge_overrides(first, then) -> list[str]:
    """``--set`` overrides ``first`` then ``then``, one per key, the later one winning."""
    merged: dict[str, str] = {}
    for item in (*first, *then):
        key = str(item).partition("=")[0].strip()
        merged.pop(key, None)
        merged[key] = str(item)
    return list(merged.values())


def _save_npz(path: str, arrays: dict) -> None:
    fd, tmp = tempfile.mkstemp(prefix=".tmp-", suffix=".npz", dir=os.path.dirname(path))
    os.close(fd)
    try:
        with open(tmp, "wb") as f:
            np.savez(f, **arrays)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        # a full disk must not keep a half-written array (the previous one stays valid)
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def _load_npz(path: str) -> dict:
    with np.load(path, allow_pickle=False) as z:
        return {k: z[k] for k in z.files}


class Checkpoint:
    """The checkpoint folder of one unfinished run.

    Parameters
    ----------
    partial_dir : str
        The run's ``.incomplete`` sibling.
    identity : dict
        :func:`job_identity` of the current config and plan.
    """

    def __init__(self, partial_dir: str, identity: dict, overrides=()):
        self.dir = os.path.join(partial_dir, "checkpoint")
        self.identity = identity
        self.overrides = [str(o) for o in overrides]
        self.state: dict = {}

    @property
    def exists(self) -> bool:
        return os.path.isfile(os.path.join(self.dir, "state.json"))

    # -- reading -------------------------------------------------------------
    def load(self, command_hint: str) -> dict:
        """Read and check the saved state; raise ResumeError when it cannot be used."""
        if not self.exists:
            raise ResumeError(f"--resume: no checkpoint in {self.dir}; there is nothing to resume, "
                              f"run without --resume ({command_hint})")
        try:
            with open(os.path.join(self.dir, "state.json")) as f:
                state = json.load(f)
        except (OSError, json.JSONDecodeError) as e:
            raise ResumeError(f"--resume: {self.dir}/state.json is unreadable ({e}); "
                              "delete the .incomplete directory and run again") from e
        if state.get("version") != _VERSION:
            raise ResumeError(f"--resume: checkpoint version {state.get('version')!r} is not {_VERSION}; "
                              "delete the .incomplete directory and run again")
        self._check_identity(state["identity"])
        self.state = state
        return state

    def _check_identity(self, saved: dict) -> None:
        now = self.identity
        for key in ("input", "model"):
            for name, value in now[key].items():
                if saved[key].get(name) != value:
                    raise ResumeError(
                        f"--resume: {key}.{name} changed since the interrupted run "
                        f"({saved[key].get(name)!r} -> {value!r}); restore it, or run without --resume"
                    )
        if saved.get("feature_weights") != now["feature_weights"]:
            raise ResumeError("--resume: the weights in the model.feature_weights table changed since the "
                              "interrupted run; restore the table, or run without --resume")
        if saved["scores"] != now["scores"]:
            raise ResumeError("--resume: output.scores changed since the interrupted run; restore it, "
                              "or run without --resume")
        old = {f["path"]: f for f in saved["inputs"]}
        new = {f["path"]: f for f in now["inputs"]}
        for path in sorted(set(old) | set(new)):
            a, b = old.get(path), new.get(path)
            if a is None or b is None:
                raise ResumeError(f"--resume: input file {path} was {'added' if a is None else 'removed'} "
                                  "since the interrupted run; run without --resume")
            for key, what in (("bytes", "size"), ("mtime_ns", "modification time"),
                              ("footer", "contents: its Parquet footer differs")):
                if a.get(key) != b.get(key):
                    raise ResumeError(f"--resume: input file {path} changed since the interrupted run "
                                      f"({what}); run without --resume")

    def moments(self) -> Moments:
        a = _load_npz(os.path.join(self.dir, "moments.npz"))
        weights = (float(a["weight"]), float(a["weight2"]), a["valid_weight"]) if "weight" in a else ()
        return Moments(int(a["n"]), a["mean"], a["m2"], a["missing"], a["valid_n"], a["valid_mean"],
                       int(a["rows_seen"]), *weights)

    def solver_state(self) -> SolverState | None:
        path = os.path.join(self.dir, "solver.npz")
        return SolverState.from_arrays(_load_npz(path)) if os.path.isfile(path) else None

    def solution(self) -> dict:
        return _load_npz(os.path.join(self.dir, "solution.npz"))

    def probe(self) -> dict | None:
        """The solver's first block and its image (the matrix-free theta_2 estimate), if saved."""
        path = os.path.join(self.dir, "probe.npz")
        return _load_npz(path) if os.path.isfile(path) else None

    # -- writing -------------------------------------------------------------
    def save(self, stage: str, *, moments: Moments | None = None, solver: SolverState | None = None,
             solution: dict | None = None, probe: dict | None = None, **info) -> None:
        """Save the arrays given, then ``state.json`` (last, by rename)."""
        os.makedirs(self.dir, exist_ok=True)
        if moments is not None:
            _save_npz(os.path.join(self.dir, "moments.npz"), {
                "n": np.array(moments.n), "mean": moments.mean, "m2": moments.m2, "missing": moments.missing,
                "valid_n": moments.valid_n, "valid_mean": moments.valid_mean,
                "rows_seen": np.array(moments.rows_seen),
                **({} if moments.weight is None else {
                    "weight": np.array(moments.weight), "weight2": np.array(moments.weight2),
                    "valid_weight": moments.valid_weight})})
        if solver is not None:
            _save_npz(os.path.join(self.dir, "solver.npz"), solver.arrays())
        if solution is not None:
            _save_npz(os.path.join(self.dir, "solution.npz"), solution)
        if probe is not None and not os.path.isfile(os.path.join(self.dir, "probe.npz")):
            _save_npz(os.path.join(self.dir, "probe.npz"), probe)
        self.state.update(info)
        self.state.update({"version": _VERSION, "stage": stage, "identity": self.identity,
                           "overrides": self.overrides})
        write_json_atomic(os.path.join(self.dir, "state.json"), self.state)

    def size(self) -> int:
        """Bytes the checkpoint occupies on disk."""
        total = 0
        for root, _, files in os.walk(self.dir):
            for name in files:
                with contextlib.suppress(OSError):
                    total += os.lstat(os.path.join(root, name)).st_size
        return total
