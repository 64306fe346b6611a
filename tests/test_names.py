"""pcapipe's names are its own (issue 12): the old set is gone from outputs, API and docs,
and run directories of the previous format version still open."""

from __future__ import annotations

import glob
import json
import os
import re
import shutil

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

import pcapipe
from conftest import ROOT, known_spectrum, make_config, run_cli, write_parquet
from pcapipe.errors import RunDirectoryError
from pcapipe.terminal import describe_json, describe_text

# The names of format version 1, which reproduced one machine-learning library's
# attribute names as a set; none may reappear in what users see.
OLD_NAMES = ("explained_variance", "singular_value", "n_components", "n_samples", "n_features",
             "ConvergenceWarning", "components.parquet", "cumulative_ratio", "residual_norm", "n_rows_read")
_OLD = re.compile("|".join(re.escape(n) for n in OLD_NAMES))
FIXTURE = os.path.join(ROOT, "tests", "data", "format_v1")


def _old_in(text: str) -> list[str]:
    return sorted(set(_OLD.findall(text)))


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("names")
    rng = np.random.default_rng(12)
    x = known_spectrum(300, 6, [6, 4, 2, 1, 0.5, 0.25], rng)
    write_parquet(tmp / "in", x, files=2, keep={"id": np.arange(300)})
    cfg = make_config(str(tmp / "in" / "*.parquet"), tmp / "run", input={"keep": ["id"]},
                      model={"components": 3}, output={"report": True})
    return pcapipe.run(cfg)


def _keys(obj, path=""):
    """Every key of a nested JSON object, as dotted paths."""
    if isinstance(obj, dict):
        for k, v in obj.items():
            yield f"{path}.{k}" if path else k
            yield from _keys(v, f"{path}.{k}" if path else k)
    elif isinstance(obj, list):
        for v in obj:
            yield from _keys(v, path)


def test_run_directory_has_no_old_names(run):
    names = sorted(os.listdir(run.directory))
    assert "spectrum.parquet" in names and not _old_in(" ".join(names))
    with open(os.path.join(run.directory, "manifest.json")) as f:
        manifest = json.load(f)
    assert not _old_in(" ".join(_keys(manifest)))
    assert {"rows", "features", "components"} <= set(manifest)
    for path in glob.glob(os.path.join(run.directory, "**", "*.parquet"), recursive=True):
        assert not _old_in(" ".join(pq.read_schema(path).names)), path
    spectrum = pq.read_schema(os.path.join(run.directory, "spectrum.parquet")).names
    assert spectrum == ["component", "eigenvalue", "share", "cumulative_share", "residual", "std_error",
                        "converged", "gap", "retained"]
    with open(os.path.join(run.directory, "report.html"), encoding="utf-8") as f:
        assert not _old_in(f.read())


def test_api_has_no_old_names(run):
    assert not _old_in(" ".join(pcapipe.__all__))
    public = [a for a in dir(run) if not a.startswith("_")]
    assert not _old_in(" ".join(public))
    assert "components" not in public  # it meant the eigenvalue table here, the eigenvectors elsewhere
    assert "spectrum" in public
    assert not _old_in(" ".join(run.spectrum.columns) + " " + " ".join(run.summary().columns))
    assert not _old_in(json.dumps(describe_json(run, top=2)))
    assert not _old_in(describe_text(run, top=2) + repr(run) + run._repr_html_())


def test_docs_and_help_have_no_old_names():
    for name in ("README.md", "DEVELOPERS.md", "configs/demo.toml", "data_demo/README.md"):
        with open(os.path.join(ROOT, name), encoding="utf-8") as f:
            assert not _old_in(f.read()), name
    for command in ("run", "check", "describe", "project", "report"):
        out = run_cli(command, "--help").stdout
        assert not _old_in(out), command


# -- format version 1 ------------------------------------------------------------------
def _v1_copy(tmp_path) -> str:
    target = tmp_path / "v1"
    shutil.copytree(os.path.join(FIXTURE, "run"), target)
    return str(target)


def test_load_reads_a_format_1_directory_under_the_new_names(tmp_path):
    res = pcapipe.load(_v1_copy(tmp_path))
    old = pq.read_table(os.path.join(FIXTURE, "run", "components.parquet")).to_pandas().set_index("component")
    with open(os.path.join(FIXTURE, "run", "manifest.json")) as f:
        old_manifest = json.load(f)
    assert res.manifest["format_version"] == 1  # what is on disk, unchanged
    assert res.manifest["rows"] == old_manifest["n_samples"] == 60  # fixture: 2 files of 30 rows
    assert res.manifest["features"] == old_manifest["n_features"] == 4
    assert res.manifest["components"] == old_manifest["n_components"] == 2
    assert list(res.spectrum.columns) == ["eigenvalue", "share", "cumulative_share", "residual", "std_error",
                                          "converged", "gap", "retained"]
    pd.testing.assert_series_equal(res.spectrum["eigenvalue"], old["explained_variance"], check_names=False)
    pd.testing.assert_series_equal(res.spectrum["share"], old["explained_variance_ratio"], check_names=False)
    pd.testing.assert_series_equal(res.spectrum["residual"], old["residual_norm"], check_names=False)
    assert res.spectrum["retained"].all()
    # the eigenvalues are those of the fixture's own input (numpy, ddof = 1)
    frames = [pd.read_parquet(p) for p in sorted(glob.glob(os.path.join(FIXTURE, "input", "*.parquet")))]
    x = pd.concat(frames)[[f"ch_{j}" for j in range(4)]].to_numpy()
    ref = np.linalg.eigvalsh(np.cov(x, rowvar=False))[::-1][:2]
    np.testing.assert_allclose(res.spectrum["eigenvalue"].to_numpy(), ref, rtol=1e-10)


def test_a_format_1_directory_works_with_describe_project_and_report(tmp_path):
    directory = _v1_copy(tmp_path)
    res = pcapipe.load(directory)
    assert "60 rows x 4 features" in describe_text(res, top=2)
    new = res.project(sorted(glob.glob(os.path.join(FIXTURE, "input", "*.parquet")))).compute()
    stored = res.scores().compute()
    np.testing.assert_allclose(new[["PC1", "PC2"]].to_numpy(), stored[["PC1", "PC2"]].to_numpy(), rtol=1e-10,
                               atol=1e-12)
    proc = run_cli("report", directory)
    assert proc.returncode == 0, proc.stderr
    again = pcapipe.load(directory)  # the report rewrote the manifest: still readable
    assert again.manifest["rows"] == 60 and again.spectrum.shape[0] == 2


def test_an_unknown_format_version_is_refused_with_one_clear_line(tmp_path):
    directory = _v1_copy(tmp_path)
    path = os.path.join(directory, "manifest.json")
    with open(path) as f:
        m = json.load(f)
    with open(path, "w") as f:
        json.dump({**m, "format_version": 3}, f)
    with pytest.raises(RunDirectoryError, match=r"format_version 3 is not one this pcapipe reads \(1, 2\)"):
        pcapipe.load(directory)
    proc = run_cli("describe", directory)
    assert proc.returncode == 2
    assert proc.stderr.count("\n") == 1 and proc.stderr.startswith("error: ")
