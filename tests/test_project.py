"""Tests of pcapipe.project: Result.project() and ``pcapipe project`` reproduce the stored scores."""

import glob
import os

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import pcapipe
from conftest import known_spectrum, make_config, run_cli, write_parquet
from pcapipe.errors import InputError, OutputError
from pcapipe.project import project_to_directory

_SPREAD = np.array([2.0, 0.5, 30.0, 1.0, 7.0])
_OFFSET = np.array([50.0, -3.0, 400.0, 0.0, 12.0])


def _data(rng, n=600):
    return known_spectrum(n, 5, [6, 3, 1.5, 0.7, 0.2], rng) * _SPREAD + _OFFSET


def _run(tmp_path, x, vector=None, files=3, input_=None, **model):
    ids = np.arange(x.shape[0])
    paths = write_parquet(tmp_path / "in", x, files=files, row_group=97, vector=vector, keep={"row_id": ids})
    inp = {"keep": ["row_id"], **({"vector_column": "emb"} if vector else {}), **(input_ or {})}
    cfg = make_config(str(tmp_path / "in" / "*.parquet"), tmp_path / "run", model={"components": 3, **model},
                      input=inp)
    return pcapipe.run(cfg), paths


def _stored(res):
    return res.scores().compute().reset_index(drop=True)


def _pcs(df, res):
    return df[list(res.loadings.columns)].to_numpy()


@pytest.mark.parametrize("center, scale, vector", [
    (True, False, None),      # the default: covariance PCA
    (True, True, None),       # correlation PCA
    (False, False, None),     # uncentred
    (False, True, None),      # uncentred, scaled
    (True, True, "fixed"),    # fixed-size-list vector column
    (True, False, "list"),    # variable list vector column
])
def test_project_reproduces_the_stored_scores(tmp_path, rng, center, scale, vector):
    x = _data(rng)
    res, paths = _run(tmp_path, x, vector=vector, center=center, scale=scale)
    stored = _stored(res)
    frame = pd.concat([pq.read_table(p).to_pandas() for p in paths], ignore_index=True)
    from_frame = res.project(frame)
    assert list(from_frame.columns) == ["row_id", "PC1", "PC2", "PC3", "t2", "spe", "t2_alarm", "spe_alarm"]
    assert (from_frame["row_id"].to_numpy() == stored["row_id"].to_numpy()).all()
    # the same decode, transform and product as the scores pass; only BLAS blocking may differ
    np.testing.assert_allclose(_pcs(from_frame, res), _pcs(stored, res), rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(from_frame[["t2", "spe"]], stored[["t2", "spe"]], rtol=1e-10, atol=1e-12)
    lazy = res.project(paths)
    assert lazy.npartitions == len(paths)
    from_paths = lazy.compute().reset_index(drop=True)
    assert (from_paths["row_id"].to_numpy() == stored["row_id"].to_numpy()).all()
    np.testing.assert_allclose(_pcs(from_paths, res), _pcs(stored, res), rtol=1e-12, atol=1e-12)


def test_project_applies_the_documented_preprocessing(tmp_path, rng):
    """New rows: ((x - mean) / std) @ loadings, from features.parquet and loadings.parquet (README, "Run directory")."""
    res, _ = _run(tmp_path, _data(rng), scale=True)
    new = _data(np.random.default_rng(7), n=50)
    frame = pd.DataFrame(new, columns=[f"f{j}" for j in range(5)], index=np.arange(100, 150))
    got = res.project(frame)
    f = res.features
    want = ((new - f["mean"].to_numpy()) / f["std"].to_numpy()) @ res.loadings.to_numpy()
    np.testing.assert_allclose(_pcs(got, res), want, rtol=1e-12, atol=1e-12)
    assert list(got.index) == list(frame.index)
    # no keep column in the frame, none copied
    assert list(got.columns) == ["PC1", "PC2", "PC3", "t2", "spe", "t2_alarm", "spe_alarm"]


def test_project_matches_scikit_learn_up_to_sign(tmp_path, rng):
    from sklearn.decomposition import PCA  # reference library, tests only

    x = _data(rng)
    res, _ = _run(tmp_path, x)
    new = _data(np.random.default_rng(3), n=40)
    got = _pcs(res.project(pd.DataFrame(new, columns=[f"f{j}" for j in range(5)])), res)
    ref = PCA(n_components=3, svd_solver="full").fit(x).transform(new)
    signs = np.sign(np.sum(got * ref, axis=0))
    np.testing.assert_allclose(got, ref * signs, rtol=1e-8, atol=1e-8)


@pytest.mark.parametrize("center", [True, False])  # without centring the imputed value is not 0
def test_project_imputes_the_mean_for_impute_mean_runs(tmp_path, rng, center):
    x = _data(rng)
    x[rng.random(x.shape) < 0.05] = np.nan
    res, paths = _run(tmp_path, x, input_={"missing": "impute-mean"}, center=center, method="covariance")
    filled = np.where(np.isnan(x), np.nanmean(x, axis=0), x)
    shift = np.nanmean(x, axis=0) if center else 0.0
    want = (filled - shift) @ res.loadings.to_numpy()
    got = res.project(paths).compute()
    np.testing.assert_allclose(_pcs(got, res), want, rtol=1e-9, atol=1e-9)


def test_project_gives_nan_scores_to_dropped_rows(tmp_path, rng):
    x = _data(rng)
    x[rng.random(x.shape) < 0.05] = np.nan
    res, paths = _run(tmp_path, x, input_={"missing": "drop-rows"})
    stored = _stored(res)
    got = res.project(paths).compute().reset_index(drop=True)
    bad = ~np.isfinite(x).all(axis=1)
    assert bad.any() and np.isnan(_pcs(got, res)[bad]).all()
    np.testing.assert_allclose(_pcs(got, res)[~bad], _pcs(stored, res)[~bad], rtol=1e-12, atol=1e-12)


def test_project_refuses_gaps_when_the_run_failed_on_them(tmp_path, rng):
    res, _ = _run(tmp_path, _data(rng))
    frame = pd.DataFrame(_data(rng, 10), columns=[f"f{j}" for j in range(5)])
    frame.loc[3, "f2"] = np.nan
    with pytest.raises(InputError, match=r"'f2'.*missing = \"fail\""):
        res.project(frame)


def test_missing_or_non_numeric_features_are_clear_errors(tmp_path, rng):
    res, _ = _run(tmp_path, _data(rng))
    frame = pd.DataFrame(_data(rng, 10), columns=[f"f{j}" for j in range(5)])
    with pytest.raises(InputError, match=r"'f1', 'f3' of the run are missing \(2 of 5\)"):
        res.project(frame.drop(columns=["f1", "f3"]))
    with pytest.raises(InputError, match=r"'f4' has type (large_)?string; the run needs a number"):
        res.project(frame.assign(f4=frame["f4"].astype(str)))
    part = tmp_path / "short.parquet"
    pq.write_table(pa.Table.from_pandas(frame.drop(columns=["f0"])), part)
    with pytest.raises(InputError, match=r"short.parquet: feature column\(s\) 'f0'"):
        res.project([str(part)])
    with pytest.raises(InputError, match="matches no Parquet file"):
        res.project(str(tmp_path / "nowhere" / "*.parquet"))
    with pytest.raises(InputError, match="keep column 'nope'"):
        res.project(frame, keep=["nope"])


def test_project_to_directory_writes_one_part_per_file(tmp_path, rng):
    res, paths = _run(tmp_path, _data(rng))
    out = tmp_path / "projected"
    written = project_to_directory(res, [str(tmp_path / "in")], str(out))
    assert [os.path.basename(p) for p in written] == [f"part-{i:05d}.parquet" for i in range(len(paths))]
    stored_parts = sorted(glob.glob(os.path.join(res.directory, "scores", "part-*.parquet")))
    for mine, theirs in zip(written, stored_parts):
        a, b = pq.read_table(mine).to_pandas(), pq.read_table(theirs).to_pandas()
        assert list(a.columns) == list(b.columns)
        assert (a["row_id"] == b["row_id"]).all()
        np.testing.assert_allclose(_pcs(a, res), _pcs(b, res), rtol=1e-12, atol=1e-12)
    with pytest.raises(OutputError, match="already holds part"):
        project_to_directory(res, [str(tmp_path / "in")], str(out))


def test_cli_project(tmp_path, rng):
    res, paths = _run(tmp_path, _data(rng))
    out = tmp_path / "cli-out"
    done = run_cli("project", res.directory, *paths, "--out", out)
    assert done.returncode == 0, done.stderr
    parts = sorted(glob.glob(str(out / "part-*.parquet")))
    assert len(parts) == len(paths)
    got = pd.concat([pq.read_table(p).to_pandas() for p in parts], ignore_index=True)
    np.testing.assert_allclose(_pcs(got, res), _pcs(_stored(res), res), rtol=1e-12, atol=1e-12)
    bad = tmp_path / "bad.parquet"
    pq.write_table(pa.table({"f0": [1.0, 2.0]}), bad)
    done = run_cli("project", res.directory, bad, "--out", tmp_path / "cli-bad")
    assert done.returncode == 2
    assert done.stderr.startswith("error: ") and "bad.parquet" in done.stderr and "'f1'" in done.stderr
    assert "Traceback" not in done.stderr


@pytest.mark.parametrize("where", [
    "in",          # --out is the input directory: the next run over in/ would read the parts as data
    "in/proj",     # --out below the input directory given on the command line
    ".",           # --out contains the input directory
])
def test_cli_project_refuses_an_out_directory_overlapping_the_input(tmp_path, rng, where):
    res, paths = _run(tmp_path, _data(rng))
    before = {p: open(p, "rb").read() for p in paths}
    listing = sorted(os.listdir(tmp_path / "in"))
    done = run_cli("project", res.directory, tmp_path / "in", "--out", tmp_path / where)
    assert done.returncode == 2, done.stderr
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: --out:") and "overlaps the input" in lines[0]
    assert sorted(os.listdir(tmp_path / "in")) == listing
    assert all(open(p, "rb").read() == data for p, data in before.items())


@pytest.mark.parametrize("center, missing", [
    (True, "impute-mean"),   # gaps filled with the mean (0 after centring)
    (False, "impute-mean"),  # uncentred: the fill is the scaled, weighted mean itself
    (True, "drop-rows"),     # rows with a gap get NaN scores on every path
])
def test_run_scores_project_and_result_share_one_preprocessing(tmp_path, rng, center, missing):
    """The run's scores pass, ``project`` to a directory and ``Result.project`` apply the same conventions.

    Scaled, with feature weights and gaps: every convention of pcapipe.conventions is exercised.
    """
    x = _data(rng)
    x[rng.choice(x.shape[0], 30, replace=False), rng.integers(0, 5, 30)] = np.nan
    pd.DataFrame({"feature": [f"f{j}" for j in range(5)], "weight": [1.0, 0.5, 2.0, 0.7, 1.3]}).to_csv(
        tmp_path / "fw.csv", index=False)
    res, paths = _run(tmp_path, x, center=center, scale=True, feature_weights=str(tmp_path / "fw.csv"),
                      input_={"missing": missing})
    stored = _stored(res)
    written = project_to_directory(res, paths, str(tmp_path / "projected"))
    again = pd.concat([pq.read_table(p).to_pandas() for p in written], ignore_index=True)
    frame = pd.concat([pq.read_table(p).to_pandas() for p in paths], ignore_index=True)
    from_result = res.project(frame)
    # the same transform and product on every path: identical scores (NaN where a row was dropped)
    for other in (again, from_result):
        np.testing.assert_array_equal(_pcs(other, res), _pcs(stored, res))
        # the residual's sum of squares may round differently by batch (BLAS blocking): ulps
        np.testing.assert_allclose(other[["t2", "spe"]], stored[["t2", "spe"]], rtol=1e-12, atol=0)
    # and the documented preprocessing, written out here: ((x - shift) / std * weight) @ loadings
    f = res.features
    shift = f["mean"].to_numpy() if center else 0.0
    filled = np.where(np.isnan(x), f["mean"].to_numpy(), x) if missing == "impute-mean" else x
    want = ((filled - shift) / f["std"].to_numpy() * f["weight"].to_numpy()) @ res.loadings.to_numpy()
    got = _pcs(stored, res)
    np.testing.assert_array_equal(np.isnan(got), np.isnan(want))
    ok = ~np.isnan(want)
    np.testing.assert_allclose(got[ok], want[ok], rtol=1e-12, atol=1e-12 * np.abs(want[ok]).max())
