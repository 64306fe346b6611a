"""Atomic run directories and safe loading: a damaged run never gives numbers."""

from __future__ import annotations

import json
import os
import pathlib

import numpy as np
import pytest

import pcapipe
from conftest import ROOT, make_config, write_parquet
from pcapipe.errors import OutputError, RunDirectoryError
from pcapipe.writer import RunWriter, partial_dir_for


@pytest.fixture
def finished(tmp_path, rng):
    x = rng.standard_normal((400, 5)) * [3, 2, 1, 0.5, 0.2]
    write_parquet(tmp_path / "d", x, files=2, row_group=100)
    res = pcapipe.run(make_config(str(tmp_path / "d" / "*.parquet"), tmp_path / "run", model={"components": 3}))
    return tmp_path, res


def _damage_truncate(run):  # a Parquet file cut in half
    p = run / "loadings.parquet"
    p.write_bytes(p.read_bytes()[: p.stat().st_size // 2])
    return "loadings.parquet"


def _damage_score_part(run):  # one scores part lost
    (run / "scores" / "part-00001.parquet").unlink()
    return "part files"


def _damage_manifest_json(run):  # manifest not JSON
    (run / "manifest.json").write_text("{ not json")
    return "not valid JSON"


def _damage_manifest_missing(run):  # manifest gone: not a complete run
    (run / "manifest.json").unlink()
    return "manifest.json is missing"


def _damage_components_rows(run):  # the manifest says more components than the table has
    m = json.loads((run / "manifest.json").read_text())
    m["components"] = 4
    (run / "manifest.json").write_text(json.dumps(m))
    return "spectrum.parquet"


@pytest.mark.parametrize("damage", [_damage_truncate, _damage_score_part, _damage_manifest_json,
                                    _damage_manifest_missing, _damage_components_rows])
def test_damaged_run_directory_is_refused(finished, damage):
    _, res = finished
    words = damage(pathlib.Path(res.directory))
    with pytest.raises(RunDirectoryError, match=words):
        pcapipe.load(res.directory)


def test_damaged_run_directory_through_the_cli(finished):
    from conftest import run_cli

    _, res = finished
    _damage_truncate(pathlib.Path(res.directory))
    r = run_cli("describe", res.directory)
    assert r.returncode == 2
    assert r.stderr.startswith("error: ") and "loadings.parquet" in r.stderr and "Traceback" not in r.stderr


def test_unfinished_run_is_not_loadable_and_says_so(tmp_path):
    os.makedirs(partial_dir_for(str(tmp_path / "run")))
    with pytest.raises(RunDirectoryError, match="--resume"):
        pcapipe.load(tmp_path / "run")


def test_overwrite_replaces_only_when_the_new_run_is_complete(finished, monkeypatch):
    tmp_path, res = finished
    before = res.loadings.copy()
    cfg = make_config(str(tmp_path / "d" / "*.parquet"), res.directory, model={"components": 2},
                      output={"overwrite": True})

    def crash(*a, **k):
        raise RuntimeError("disk died while writing the tables")

    monkeypatch.setattr("pcapipe.writer.RunWriter.write_table", crash)
    with pytest.raises(RuntimeError):
        pcapipe.run(cfg)
    monkeypatch.undo()
    kept = pcapipe.load(res.directory)  # the old run is untouched
    np.testing.assert_array_equal(kept.loadings.to_numpy(), before.to_numpy())
    # the computation was finished: its checkpoint waits for --resume beside the old run
    assert os.path.isfile(os.path.join(partial_dir_for(res.directory), "checkpoint", "state.json"))
    new = pcapipe.run(cfg, resume=True)
    assert not os.path.exists(partial_dir_for(res.directory))
    assert new.loadings.shape == (5, 2)
    leftovers = [p for p in os.listdir(tmp_path) if ".replaced-" in p]
    assert leftovers == []


def test_manifest_is_written_last(tmp_path, monkeypatch):
    order = []
    real_table, real_json = RunWriter.write_table, pcapipe.writer.write_json_atomic
    monkeypatch.setattr(RunWriter, "write_table", lambda self, name, t: (order.append(name), real_table(self, name, t)))
    monkeypatch.setattr(pcapipe.writer, "write_json_atomic",
                        lambda path, obj: (order.append(os.path.basename(path)), real_json(path, obj)))
    write_parquet(tmp_path / "d", np.random.default_rng(0).standard_normal((50, 3)))
    pcapipe.run(make_config(str(tmp_path / "d" / "*.parquet"), tmp_path / "run", model={"components": 2}))
    assert order[-1] == "manifest.json"
    assert {"spectrum.parquet", "loadings.parquet", "features.parquet"} <= set(order[:-1])


def test_existing_directory_refused_before_any_work(finished):
    tmp_path, res = finished
    with pytest.raises(OutputError, match="already exists.*overwrite"):
        pcapipe.run(make_config(str(tmp_path / "d" / "*.parquet"), res.directory))


def test_no_pickle_anywhere_in_the_package():
    # Outputs and checkpoints are JSON, Parquet and npz loaded with allow_pickle=False.
    for path in pathlib.Path(ROOT, "pcapipe").glob("*.py"):
        text = path.read_text()
        assert "import pickle" not in text and "cloudpickle" not in text, path
        assert "allow_pickle=True" not in text, path
        assert "read_pickle" not in text and "to_pickle" not in text, path
