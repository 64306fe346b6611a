"""Row weights (input.row_weight) and feature weights (model.feature_weights) through whole runs.

References: numpy's ``np.cov`` with ``fweights`` (our convention) or ``aweights``
(converted by the factor README "Weights" documents) and ``np.linalg.eigh``.
"""

from __future__ import annotations

import json
import os

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import pcapipe
from conftest import count_stream_calls, known_spectrum, make_config, retained, write_parquet
from pcapipe.checkpoint import Checkpoint
from pcapipe.moments import batch_moments
from pcapipe.weighted import reliability_factor

METHODS = ["covariance", "direct", "matrix-free"]


def _eigh(c, k):
    """Leading k eigenpairs of c from numpy, each vector's largest entry made positive (our sign rule)."""
    vals, vecs = np.linalg.eigh(c)
    vals, vecs = vals[::-1][:k], vecs[:, ::-1][:, :k]
    idx = np.argmax(np.abs(vecs), axis=0)
    return vals, vecs * np.sign(vecs[idx, np.arange(k)])


def _scores(res):
    parts = sorted(os.listdir(os.path.join(res.directory, "scores")))
    t = pa.concat_tables([pq.read_table(os.path.join(res.directory, "scores", p)) for p in parts])
    return np.column_stack([t[c].to_numpy() for c in res.loadings.columns])


def _data(rng, n=400, d=6):
    values = [9.0, 4.0, 2.0, 1.0, 0.5, 0.25, 0.2, 0.1][:d]
    return known_spectrum(n, d, values, rng, mean=rng.uniform(-3, 3, d))


@pytest.mark.parametrize("method", METHODS)
def test_integer_weights_equal_repeated_rows(tmp_path, rng, method):
    x = _data(rng)
    w = rng.integers(0, 4, x.shape[0])  # 0 included: rows that take no part
    write_parquet(tmp_path / "w", x, files=3, row_group=53, keep={"w": w})
    write_parquet(tmp_path / "rep", np.repeat(x, w, axis=0), files=2, row_group=97)
    model = {"components": 3, "method": method, "tolerance": 1e-12}
    a = pcapipe.run(make_config(str(tmp_path / "w"), tmp_path / "a", input={"row_weight": "w"}, model=model))
    b = pcapipe.run(make_config(str(tmp_path / "rep"), tmp_path / "b", model=model))
    scale = retained(b)[0]
    np.testing.assert_allclose(retained(a), retained(b), rtol=0, atol=1e-12 * scale)
    np.testing.assert_allclose(a.loadings, b.loadings, rtol=0, atol=1e-10)
    np.testing.assert_allclose(a.features["mean"], b.features["mean"], rtol=0, atol=1e-12 * np.abs(x).max())
    np.testing.assert_allclose(a.features["std"], b.features["std"], rtol=1e-12)
    assert a.manifest["weights"]["sum"] == w.sum() == b.manifest["rows"]
    assert a.manifest["rows"] == int((w > 0).sum())
    # every row gets a score, weight 0 or not, with the same loadings and means
    s = _scores(a)
    assert s.shape == (x.shape[0], 3) and np.isfinite(s).all()
    want = (x - a.features["mean"].to_numpy()) @ a.loadings.to_numpy()
    np.testing.assert_allclose(s, want, rtol=0, atol=1e-10 * np.abs(want).max())


@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize("scale", [False, True])
def test_real_weights_match_numpy(tmp_path, rng, method, scale):
    x = _data(rng)
    w = rng.uniform(0.0, 2.5, x.shape[0])
    write_parquet(tmp_path / "d", x, files=2, row_group=71, keep={"w": w})
    res = pcapipe.run(make_config(str(tmp_path / "d"), tmp_path / "r", input={"row_weight": "w"},
                                  model={"components": 3, "method": method, "scale": scale, "tolerance": 1e-12}))
    # numpy aweights divide by W - W2/W; frequency weights by W - 1: convert (numpy docs, cov)
    cov = np.cov(x, rowvar=False, aweights=w) / reliability_factor(w.sum(), (w * w).sum())
    if scale:
        sd = np.sqrt(np.diag(cov))
        cov = cov / np.outer(sd, sd)
    vals, vecs = _eigh(cov, 3)
    np.testing.assert_allclose(retained(res), vals, rtol=1e-11)
    np.testing.assert_allclose(res.loadings.to_numpy(), vecs, rtol=0, atol=1e-9)
    np.testing.assert_allclose(res.manifest["total_variance"], np.trace(cov), rtol=1e-12)
    np.testing.assert_allclose(res.features["mean"], np.average(x, axis=0, weights=w), rtol=1e-12)


def _table(path, names, weights):
    df = pd.DataFrame({"feature": list(names), "weight": list(weights)})
    if str(path).endswith(".csv"):
        df.to_csv(path, index=False)
    else:
        df.to_parquet(path)
    return str(path)


@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize("scale, kind", [(False, "csv"), (True, "parquet")])
def test_feature_weights_are_eigh_of_wcw(tmp_path, rng, method, scale, kind):
    x = _data(rng)
    d = x.shape[1]
    f = np.array([1.0, 0.5, 2.0, 0.0, 1.3, 0.8])  # one feature weighted out entirely
    names = [f"f{j}" for j in range(d)]
    order = rng.permutation(d)  # the table's row order is not the columns'
    table = _table(tmp_path / f"fw.{kind}", [names[j] for j in order], f[order])
    write_parquet(tmp_path / "d", x, files=2, row_group=90)
    res = pcapipe.run(make_config(str(tmp_path / "d"), tmp_path / "r",
                                  model={"components": 3, "method": method, "scale": scale,
                                         "feature_weights": table, "tolerance": 1e-12}))
    c = np.cov(x, rowvar=False)
    if scale:
        c = np.corrcoef(x, rowvar=False)
    wcw = np.diag(f) @ c @ np.diag(f)
    vals, vecs = _eigh(wcw, 3)
    np.testing.assert_allclose(retained(res), vals, rtol=1e-11)
    np.testing.assert_allclose(res.loadings.to_numpy(), vecs, rtol=0, atol=1e-9)
    np.testing.assert_allclose(res.manifest["total_variance"], np.trace(wcw), rtol=1e-12)
    np.testing.assert_array_equal(res.features["weight"].to_numpy(), f)
    assert res.manifest["weights"]["feature_weights"] == table
    # scores and project use the same weights
    sd = x.std(axis=0, ddof=1) if scale else np.ones(d)
    want = ((x - x.mean(axis=0)) / sd * f) @ vecs
    np.testing.assert_allclose(_scores(res), want, rtol=0, atol=1e-9 * np.abs(want).max())
    frame = pd.DataFrame(x, columns=names)
    got = res.project(frame)[list(res.loadings.columns)].to_numpy()
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-9 * np.abs(want).max())
    # the correlation loadings are of the input features; a weight-0 feature has none
    r = res.correlation_loadings.to_numpy()
    s = _scores(res)
    ref = np.array([[np.corrcoef(x[:, j], s[:, i])[0, 1] for i in range(3)] for j in range(d)])
    ok = f > 0
    np.testing.assert_allclose(r[ok], ref[ok], rtol=0, atol=1e-9)
    assert np.isnan(r[~ok]).all()


def test_both_weights_with_a_vector_column(tmp_path, rng):
    x = _data(rng, n=300, d=5)
    w = rng.uniform(0, 3, 300)
    f = rng.uniform(0.2, 2.0, 5)
    table = _table(tmp_path / "fw.csv", [f"emb[{j}]" for j in range(5)], f)
    write_parquet(tmp_path / "d", x, files=2, row_group=64, vector="list", keep={"w": w})
    res = pcapipe.run(make_config(str(tmp_path / "d"), tmp_path / "r", input={"vector_column": "emb", "row_weight": "w"},
                                  model={"components": 2, "feature_weights": table, "method": "matrix-free",
                                         "tolerance": 1e-12}))
    cov = np.cov(x, rowvar=False, aweights=w) / reliability_factor(w.sum(), (w * w).sum())
    vals, vecs = _eigh(np.diag(f) @ cov @ np.diag(f), 2)
    np.testing.assert_allclose(retained(res), vals, rtol=1e-11)
    np.testing.assert_allclose(res.loadings.to_numpy(), vecs, rtol=0, atol=1e-9)


@pytest.fixture(scope="module")
def weighted_data(tmp_path_factory):
    rng = np.random.default_rng(77)
    x = known_spectrum(600, 8, [6, 3, 2, 1, 0.8, 0.6, 0.4, 0.2], rng, mean=5.0)
    w = rng.uniform(0, 2, 600).round(2)
    f = rng.uniform(0.5, 1.5, 8)
    root = tmp_path_factory.mktemp("layouts")
    table = _table(root / "fw.csv", [f"f{j}" for j in range(8)], f)
    layouts = {
        "one": write_parquet(root / "one", x, files=1, keep={"w": w}),
        "many": write_parquet(root / "many", x, files=5, row_group=29, keep={"w": w}),
        "small": write_parquet(root / "small", x, files=40, keep={"w": w}),  # 15-row files gathered into batches
    }
    return root, table, layouts


def _weighted_config(root, table, layout, out, method, **compute):
    return make_config(str(root / layout), out, input={"row_weight": "w"},
                       model={"components": 3, "method": method, "feature_weights": table, "tolerance": 1e-11},
                       compute={"memory_limit": "512MiB", **compute})


@pytest.fixture(scope="module")
def weighted_reference(weighted_data, tmp_path_factory):
    """The threads result on the many-file layout, per method: what every other run must reproduce."""
    root, table, _ = weighted_data
    out = tmp_path_factory.mktemp("reference")
    return {m: pcapipe.run(_weighted_config(root, table, "many", out / m, m, scheduler="threads", workers=2))
            for m in METHODS}


@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize("layout, scheduler, workers", [
    ("many", "synchronous", 0),   # one task at a time
    ("many", "processes", 2),     # tasks and results pickled between processes
    ("one", "threads", 1),        # one file, one row group
    ("small", "threads", 2),      # 40 small files, their weights gathered with the rows
])
def test_same_answer_across_schedulers_and_layouts(tmp_path, weighted_data, weighted_reference, method, layout,
                                                   scheduler, workers):
    root, table, _ = weighted_data
    ref = weighted_reference[method]
    res = pcapipe.run(_weighted_config(root, table, layout, tmp_path / "r", method, scheduler=scheduler,
                                       workers=workers))
    scale = retained(ref)[0]
    np.testing.assert_allclose(retained(res), retained(ref), rtol=0, atol=1e-11 * scale)
    np.testing.assert_allclose(res.loadings, ref.loadings, rtol=0, atol=1e-9)
    np.testing.assert_allclose(_scores(res), _scores(ref), rtol=0, atol=1e-9 * np.abs(_scores(ref)).max())


@pytest.mark.parametrize("method", METHODS)
def test_one_weighted_row_group_is_decoded_column_parallel(tmp_path, rng, monkeypatch, method):
    """A lone streamed row group with row weights decodes on two cores, with the answer of one core."""
    x = _data(rng, n=30_000, d=8)
    w = rng.uniform(0, 2, x.shape[0])
    write_parquet(tmp_path / "one", x, keep={"w": w})  # one row group of 2.2 MB (features and weights)
    write_parquet(tmp_path / "many", x, files=4, row_group=3000, keep={"w": w})
    streamed = count_stream_calls(monkeypatch)
    model = {"components": 3, "method": method, "tolerance": 1e-12}
    # 16 MiB a worker: the row group is too large to read whole, so it is streamed by the lone task's 2 threads
    res = pcapipe.run(make_config(str(tmp_path / "one"), tmp_path / "a", input={"row_weight": "w"}, model=model,
                                  compute={"scheduler": "threads", "workers": 2, "memory_limit": "16MiB"}))
    assert streamed and all(p.endswith("part-000.parquet") for p, _ in streamed)
    ref = pcapipe.run(make_config(str(tmp_path / "many"), tmp_path / "b", input={"row_weight": "w"}, model=model,
                                  compute={"scheduler": "synchronous"}))
    scale = retained(ref)[0]
    np.testing.assert_allclose(retained(res), retained(ref), rtol=0, atol=1e-11 * scale)
    np.testing.assert_allclose(res.loadings, ref.loadings, rtol=0, atol=1e-9)
    # numpy aweights -> frequency weights (numpy docs, cov)
    cov = np.cov(x, rowvar=False, aweights=w) / reliability_factor(w.sum(), (w * w).sum())
    np.testing.assert_allclose(retained(res), np.linalg.eigvalsh(cov)[::-1][:3], rtol=1e-9)


@pytest.mark.cluster
def test_local_cluster_matches_threads_weighted(tmp_path, weighted_data, weighted_reference):
    from pcapipe.compute import Runner
    from pcapipe.config import ComputeConfig

    root, table, _ = weighted_data
    ref = weighted_reference["matrix-free"]
    with Runner(ComputeConfig(scheduler="local-cluster", workers=1, memory_limit="512MiB", progress=False)) as r:
        res = pcapipe.run(_weighted_config(root, table, "many", tmp_path / "r", "matrix-free",
                                           scheduler="local-cluster"), runner=r)
    np.testing.assert_allclose(retained(res), retained(ref), rtol=1e-11)
    np.testing.assert_allclose(res.loadings, ref.loadings, rtol=0, atol=1e-9)


def test_manifest_features_and_report_say_weighted(tmp_path, rng):
    x = _data(rng, n=120, d=4)
    w = rng.uniform(0, 3, 120)
    table = _table(tmp_path / "fw.csv", [f"f{j}" for j in range(4)], [1, 2, 1, 0.5])
    write_parquet(tmp_path / "d", x, keep={"w": w})
    res = pcapipe.run(make_config(str(tmp_path / "d"), tmp_path / "r", input={"row_weight": "w"},
                                  model={"components": 2, "feature_weights": table},
                                  output={"report": True}))
    with open(os.path.join(res.directory, "manifest.json")) as fh:
        rec = json.load(fh)["weights"]
    assert rec["row_weight"] == "w" and rec["feature_weights"] == table
    np.testing.assert_allclose(rec["sum"], w.sum(), rtol=1e-13)
    np.testing.assert_allclose(rec["sum_of_squares"], (w * w).sum(), rtol=1e-13)
    assert list(res.features["weight"]) == [1, 2, 1, 0.5]
    with open(os.path.join(res.directory, "report.html")) as fh:
        page = fh.read()
    assert "rows weighted by column &#x27;w&#x27;" in page or "rows weighted by column 'w'" in page
    assert "features weighted by" in page


def test_unweighted_run_records_no_weights(tmp_path, rng):
    write_parquet(tmp_path / "d", _data(rng, n=50, d=4))
    res = pcapipe.run(make_config(str(tmp_path / "d"), tmp_path / "r", model={"components": 2}))
    assert res.manifest["weights"] == {"row_weight": None, "feature_weights": None}
    assert list(res.features["weight"]) == [1.0] * 4


def test_checkpoint_keeps_weight_sums(tmp_path, rng):
    x = rng.standard_normal((20, 3))
    m = batch_moments(x.copy(), True, "fail", weights=rng.uniform(0, 2, 20))
    ck = Checkpoint(str(tmp_path), {"input": {}, "model": {}, "scores": True, "inputs": []})
    ck.save("moments", moments=m)
    back = ck.moments()
    assert (back.weight, back.weight2) == (m.weight, m.weight2)
    np.testing.assert_array_equal(back.valid_weight, m.valid_weight)
    np.testing.assert_array_equal(back.m2, m.m2)


def test_resume_refuses_a_changed_feature_weight_table(tmp_path, rng):
    from pcapipe.checkpoint import job_identity
    from pcapipe.engine import prepare
    from pcapipe.errors import ResumeError

    write_parquet(tmp_path / "d", _data(rng, n=50, d=3))
    table = _table(tmp_path / "fw.csv", ["f0", "f1", "f2"], [1.0, 2.0, 1.0])
    cfg = make_config(str(tmp_path / "d"), tmp_path / "r", model={"components": 2, "feature_weights": table})
    p = prepare(cfg)
    Checkpoint(str(tmp_path / "ck"), job_identity(p.cfg, p.plan)).save("moments", passes=1)
    Checkpoint(str(tmp_path / "ck"), job_identity(p.cfg, p.plan)).load("hint")  # same table: accepted
    _table(tmp_path / "fw.csv", ["f0", "f1", "f2"], [1.0, 2.5, 1.0])  # same name, other weights
    p = prepare(cfg)
    with pytest.raises(ResumeError, match="feature_weights table changed"):
        Checkpoint(str(tmp_path / "ck"), job_identity(p.cfg, p.plan)).load("hint")


@pytest.mark.parametrize("method", METHODS)
def test_control_limits_count_the_sum_of_the_weights(tmp_path, rng, method):
    """With frequency weights the limits' n is sum(w): the same limits as the data with rows repeated."""
    from scipy import stats

    x = _data(rng)
    w = rng.integers(0, 4, x.shape[0])  # weight 0 included: such rows are not in n
    write_parquet(tmp_path / "w", x, files=3, row_group=53, keep={"w": w})
    write_parquet(tmp_path / "rep", np.repeat(x, w, axis=0), files=2, row_group=97)
    model = {"components": 3, "method": method, "tolerance": 1e-12}
    a = pcapipe.run(make_config(str(tmp_path / "w"), tmp_path / "a", input={"row_weight": "w"}, model=model))
    b = pcapipe.run(make_config(str(tmp_path / "rep"), tmp_path / "b", model=model))
    n, k, c = float(w.sum()), 3, a.limits["confidence"]
    # Tracy, Young & Mason (1992), J. Quality Technology 24(2): eq. 5 (training rows), eq. 7 (new rows)
    t2_new = k * (n - 1) * (n + 1) / (n * (n - k)) * stats.f.ppf(c, k, n - k)
    t2_training = (n - 1) ** 2 / n * stats.beta.ppf(c, k / 2, (n - k - 1) / 2)
    # Box (1954) / Nomikos & MacGregor (1995) eq. 16 from the discarded eigenvalues of numpy's fweights covariance
    lam = np.linalg.eigvalsh(np.cov(x, rowvar=False, fweights=w))[::-1][k:]
    theta1, theta2 = lam.sum(), (lam**2).sum()
    spe = theta2 / theta1 * stats.chi2.ppf(c, theta1**2 / theta2)
    for res in (a, b):
        lim = res.limits
        assert lim["rows"] == n
        assert lim["t2"] == pytest.approx(t2_new, rel=1e-12)
        assert lim["t2_training"] == pytest.approx(t2_training, rel=1e-12)
        assert lim["spe"] == pytest.approx(spe, rel=1e-9)
    # the training alarms of the weighted run: the stored t2 against that limit, row by row
    t2 = a.scores().compute()["t2"].to_numpy()
    alarms = a.scores().compute()["t2_alarm"].to_numpy()
    np.testing.assert_array_equal(alarms, t2 > a.limits["t2_training"])


def test_control_limits_with_real_weights_use_their_sum(tmp_path, rng):
    from scipy import stats

    x = _data(rng)
    w = rng.uniform(0.0, 2.5, x.shape[0])
    write_parquet(tmp_path / "d", x, files=2, row_group=71, keep={"w": w})
    res = pcapipe.run(make_config(str(tmp_path / "d"), tmp_path / "r", input={"row_weight": "w"},
                                  model={"components": 2}))
    n, c = w.sum(), res.limits["confidence"]
    assert res.limits["rows"] == pytest.approx(n, rel=1e-13) and res.manifest["rows"] == x.shape[0]
    # Tracy, Young & Mason (1992) eq. 7 with n = sum(w), a non-integer degree of freedom
    want = 2 * (n - 1) * (n + 1) / (n * (n - 2)) * stats.f.ppf(c, 2, n - 2)
    assert res.limits["t2"] == pytest.approx(want, rel=1e-12)
