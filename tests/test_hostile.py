"""Hostile input, config and output: nothing is ever lost or corrupted (issue 10).

One table, ``CASES``: each row builds a directory (data written by the suite or by
other real Parquet writers, a config, maybe a previous run or something in the
way) and runs the real command line on it.  Every row asserts the exit status,
the words of the one ``error:`` line (no traceback), that every file that was
there before is byte-identical afterwards (inputs, config, a previous run), and
that nothing new is left on disk apart from a successful run's own directory
(no stray ``.incomplete``).
"""

from __future__ import annotations

import hashlib
import json
import os
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
import pytest

import pcapipe
from conftest import make_config, run_cli, write_parquet, write_toml


@dataclass
class Setup:
    """What a builder made: the config to run, the run directory it names, extra CLI args."""

    config: str
    output: str
    args: tuple[str, ...] = ()


@dataclass
class Case:
    build: Callable[[str], Setup]
    status: int                        # exit status of every command
    words: tuple[str, ...] = ()        # all in the one error: line (status 2)
    commands: tuple[str, ...] = ("check", "run")
    expect: Callable | None = None     # further checks of a successful run: expect(d, setup, outputs)
    extra: dict = field(default_factory=dict)


# ---------------------------------------------------------------- helpers

def _data(d, rows=60, cols=4, seed=0, sub="data", **kw):
    x = np.random.default_rng(seed).standard_normal((rows, cols)) * np.arange(cols, 0, -1)
    return write_parquet(os.path.join(d, sub), x, **kw)


def _config(d, out, paths=("data",), where=None, **sections):
    """Write the config (relative paths resolve against its directory) and return the Setup."""
    sections.setdefault("model", {}).setdefault("components", 2)
    cfg = make_config(list(paths)[0], out, **sections)
    cfg["input"]["paths"] = list(paths)
    where = where or d
    os.makedirs(where, exist_ok=True)
    path = write_toml(os.path.join(where, "cfg.toml"), cfg)
    return Setup(path, os.path.normpath(os.path.join(where, out)))


def _previous_run(d, name="prev", components=2):
    """A finished run of pcapipe at d/name, made in-process (faster than a subprocess)."""
    _data(d, sub="old-data", seed=7)
    pcapipe.run(make_config(os.path.join(d, "old-data"), os.path.join(d, name),
                            model={"components": components}))
    return os.path.join(d, name)


def _snapshot(root) -> dict:
    """Every file and symlink below ``root``: a hash of the bytes, or the link target."""
    out = {}
    for top, dirs, files in os.walk(root):
        for name in dirs + files:
            p = os.path.join(top, name)
            rel = os.path.relpath(p, root)
            if os.path.islink(p):
                out[rel] = "link:" + os.readlink(p)
            elif os.path.isfile(p):
                with open(p, "rb") as f:
                    out[rel] = hashlib.sha256(f.read()).hexdigest()
    return out


def _manifest(output) -> dict:
    with open(os.path.join(output, "manifest.json")) as f:
        return json.load(f)


# ------------------------------------------------------ 1. data loss, 7. path in the way

def b_out_is_input_dir(d):
    _data(d)
    return _config(d, "data", output={"overwrite": True})


def b_out_is_dot(d):
    _data(d)
    return _config(d, ".", output={"overwrite": True})


def b_out_is_parent(d):
    _data(d)
    return _config(d, "..", paths=["../data/*.parquet"], where=os.path.join(d, "conf"),
                   output={"overwrite": True})


def b_out_inside_input_dir(d):
    _data(d)
    return _config(d, "data/run")


def b_out_reached_by_glob(d):
    _data(d)
    return _config(d, "data/runs/a", paths=["data/**/*.parquet"])


def b_out_contains_config(d):
    _data(d)
    os.makedirs(os.path.join(d, "proj"))
    with open(os.path.join(d, "proj", "notes.txt"), "w") as f:
        f.write("mine")
    return _config(d, "..", paths=[os.path.join(d, "data")], where=os.path.join(d, "proj", "conf"),
                   output={"overwrite": True})


def b_out_symlink_to_input(d):
    _data(d)
    os.symlink(os.path.join(d, "data"), os.path.join(d, "alias"))
    return _config(d, "alias", output={"overwrite": True})


def b_out_holds_input_via_symlink(d):
    # PCA of an earlier run's scores, written back over that run
    prev = _previous_run(d)
    os.makedirs(os.path.join(d, "data"))
    os.symlink(os.path.join(prev, "scores", "part-00000.parquet"), os.path.join(d, "data", "s.parquet"))
    return _config(d, "prev", paths=["data/*.parquet"], output={"overwrite": True})


def b_overwrite_foreign_dir(d):
    _data(d)
    os.makedirs(os.path.join(d, "out", "sub"))
    with open(os.path.join(d, "out", "notes.txt"), "w") as f:
        f.write("a week of work")
    return _config(d, "out", output={"overwrite": True})


def b_overwrite_foreign_manifest(d):
    _data(d)
    os.makedirs(os.path.join(d, "out"))
    with open(os.path.join(d, "out", "manifest.json"), "w") as f:
        json.dump({"project": "another tool's manifest"}, f)
    return _config(d, "out", output={"overwrite": True})


def b_existing_run_no_overwrite(d):
    _previous_run(d)
    _data(d)
    return _config(d, "prev")


def b_overwrite_previous_run(d):
    _previous_run(d, components=2)
    _data(d)
    return _config(d, "prev", model={"components": 1}, output={"overwrite": True})


def e_replaced(d, setup, outputs):
    m = _manifest(setup.output)
    assert m["components"] == 1 and m["inputs"][0]["path"].startswith(os.path.join(d, "data"))


def b_bad_config_over_previous_run(d):
    _previous_run(d)
    _data(d)
    return _config(d, "prev", model={"components": 9}, output={"overwrite": True})


def b_incomplete_is_file(d):
    _data(d)
    with open(os.path.join(d, "out.incomplete"), "w") as f:
        f.write("not a directory")
    return _config(d, "out")


def b_incomplete_foreign_dir(d):
    _data(d)
    os.makedirs(os.path.join(d, "out.incomplete"))
    with open(os.path.join(d, "out.incomplete", "draft.txt"), "w") as f:
        f.write("mine")
    return _config(d, "out", output={"overwrite": True})


CASES = [
    # output = the input directory, overwrite = true: used to delete the inputs and exit 0
    ("out-is-input-dir", Case(b_out_is_input_dir, 2, ("output.directory", "is the input path",
                                                      "outside every input path"))),
    # output = "." (the config's directory, holding data/ and the config)
    ("out-is-dot", Case(b_out_is_dot, 2, ("output.directory", "contains the input path", "data"))),
    # output = a parent of the inputs and of the config
    ("out-is-parent", Case(b_out_is_parent, 2, ("output.directory", "contains the input path"))),
    # output inside an input directory: the next run would read the scores as data
    ("out-inside-input-dir", Case(b_out_inside_input_dir, 2, ("lies inside the input directory",
                                                              "read as input"))),
    # output where a recursive glob of the inputs would find its Parquet files
    ("out-reached-by-glob", Case(b_out_reached_by_glob, 2, ("data/**/*.parquet", "would find its files"))),
    # output = a directory holding the config file (inputs elsewhere)
    ("out-contains-config", Case(b_out_contains_config, 2, ("contains the config file", "cfg.toml"))),
    # output is a symlink to the input directory
    ("out-symlink-to-input", Case(b_out_symlink_to_input, 2, ("alias", "is the input path"))),
    # an input file is a symlink into the previous run that overwrite would replace
    ("out-holds-input-via-symlink", Case(b_out_holds_input_via_symlink, 2,
                                         ("contains the input file", "s.parquet"))),
    # overwrite = true over a directory that is not a pcapipe run: say what is there
    ("overwrite-foreign-dir", Case(b_overwrite_foreign_dir, 2, ("not a pcapipe run", "notes.txt", "sub/",
                                                                "choose another output.directory"))),
    # overwrite = true over someone else's manifest.json
    ("overwrite-foreign-manifest", Case(b_overwrite_foreign_manifest, 2, ("not a pcapipe run",
                                                                          "manifest.json"))),
    # an existing run without overwrite: refused, kept
    ("existing-run-no-overwrite", Case(b_existing_run_no_overwrite, 2, ("already exists",
                                                                        "output.overwrite = true"))),
    # overwrite = true over a finished pcapipe run: replaced (check writes nothing)
    ("overwrite-previous-run", Case(b_overwrite_previous_run, 0, expect=e_replaced)),
    # a bad config over a previous run with overwrite = true: the previous run stays intact
    ("bad-config-over-previous-run", Case(b_bad_config_over_previous_run, 2, ("model.components", "at most"))),
    # 7. a plain file where the .incomplete sibling goes
    ("incomplete-is-file", Case(b_incomplete_is_file, 2, ("out.incomplete", "is a file"))),
    # a foreign directory where the .incomplete sibling goes: never emptied
    ("incomplete-foreign-dir", Case(b_incomplete_foreign_dir, 2, ("out.incomplete", "draft.txt",
                                                                  "not written by pcapipe"))),
]


@pytest.mark.parametrize("case", [c[1] for c in CASES], ids=[c[0] for c in CASES])
def test_hostile(tmp_path, case):
    d = str(tmp_path)
    setup = case.build(d)
    before = _snapshot(d)
    outputs = {}
    for command in case.commands:
        proc = run_cli(command, setup.config, *setup.args)
        outputs[command] = proc
        assert proc.returncode == case.status, (command, proc.stderr)
        assert "Traceback" not in proc.stderr, proc.stderr
        errors = [line for line in proc.stderr.splitlines() if line.startswith("error:")]
        if case.status:
            assert len(errors) == 1, proc.stderr
            for word in case.words:
                assert word in errors[0], (word, errors[0])
            assert _snapshot(d) == before, f"{command} changed files on disk"
        else:
            assert errors == [], proc.stderr
    after = _snapshot(d)
    out_rel = os.path.relpath(setup.output, d)
    produced = case.status == 0 and "run" in case.commands
    for rel, digest in before.items():
        if produced and (rel == out_rel or rel.startswith(out_rel + os.sep)):
            continue  # the run directory that overwrite replaced
        assert after.get(rel) == digest, f"{rel} changed or vanished"
    new = set(after) - set(before)
    assert all(produced and rel.startswith(out_rel + os.sep) for rel in new), sorted(new)
    assert not any(rel.endswith(".incomplete") or ".incomplete" + os.sep in rel for rel in new)
    if produced:
        assert os.path.isfile(os.path.join(setup.output, "manifest.json"))
        assert not os.path.exists(os.path.join(setup.output, ".pcapipe-incomplete"))
    if case.expect:
        case.expect(d, setup, outputs)
