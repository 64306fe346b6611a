"""Operators (scipy LinearOperators), the one eigensolver entry point, and the ``auto`` cost model.

References: ``numpy.linalg.eigh`` / ``svd`` and ``scipy.sparse.linalg.eigsh`` (ARPACK,
an implicitly restarted Lanczos method independent of ours) on the same matrices.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.linalg import subspace_angles
from scipy.sparse.linalg import eigsh

import pcapipe
from conftest import known_spectrum, make_config, write_parquet
from pcapipe.eigen import SPECTRUM_LIMIT, eigensolve
from pcapipe.methods import choose_method
from pcapipe.operators import DataOperator, DenseOperator, MatrixFreeOperator

GiB = 1 << 30
# What `memory_limit = "auto"` gives on the development machine: half of 24 GiB over 2 workers.
AUTO_WORKER = 6 * GiB
SOLVER = dict(tolerance=1e-12, max_iterations=500, oversample=8)


# One row per benchmark shape of issue 9 (DEVELOPERS.md, "Benchmarks"); 2 workers, 2 cores,
# float32 input (4 bytes per value on disk).  The cost model is pure: no data are read.
@pytest.mark.parametrize(
    "n, d, k, method, because",
    [
        (1_000_000, 256, 10, "covariance", "matrix-free ~"),  # tall: one Gram pass, 256 x 256 LAPACK
        (100_000, 4096, 10, "matrix-free", "rows held in memory"),  # embeddings, few components
        (100_000, 4096, 100, "covariance", "matrix-free ~"),  # a block of 108 costs more than the Gram
        (100_000, 4096, 256, "covariance", "matrix-free ~"),
        (500_000, 1024, 10, "covariance", "matrix-free ~"),   # d = 1024: the Gram is cheap
        (500_000, 1024, 100, "covariance", "matrix-free ~"),
        (500_000, 1024, 256, "covariance", "matrix-free ~"),
        (50_000, 10_000, 10, "matrix-free", "rows held in memory"),  # 10^4 scalar columns
        (64, 6830, 5, "direct", "covariance ~"),              # gene-expression-sized: n << d
        (200_000, 2000, 100, "covariance", "direct ~"),       # d = 2000, k = 100
    ],
)
def test_auto_picks_the_method_for_each_benchmark_shape(n, d, k, method, because):
    choice = choose_method("auto", n, d, k + 8, n * d * 4, AUTO_WORKER, 2, 2, k=k, client_memory=2 * AUTO_WORKER,
                           held_itemsize=4)
    assert choice.method == method, choice.reason
    assert choice.reason.startswith(f"{method} is estimated fastest") and because in choice.reason
    est = choice.estimates
    assert est[f"{method.replace('-', '_')}_seconds"] == min(
        est[f"{m}_seconds"] for m in ("covariance", "direct", "matrix_free")
        if m == "matrix_free" or est[f"{m}_fits"])
    assert est["rates"] and est["k"] == k


def test_memory_leaves_out_a_faster_method_and_says_so():
    # 4096 features, 256 MiB workers: the 128 MiB matrix (x3) does not fit half of a worker
    choice = choose_method("auto", 100_000, 4096, 264, 1, 256 << 20, 2, 2, k=256)
    assert choice.method == "matrix-free"
    assert "covariance (~" in choice.reason and "is left out" in choice.reason
    # nor does caching 3 GiB of decoded rows in 2 x 256 MiB
    assert "data re-read every pass" in choice.reason and not choice.estimates["matrix_free_cached"]


def test_processes_cannot_cache_and_costs_more():
    kwargs = dict(k=10, client_memory=2 * AUTO_WORKER)
    cached = choose_method("auto", 100_000, 4096, 18, 1, AUTO_WORKER, 2, 2, **kwargs)
    uncached = choose_method("auto", 100_000, 4096, 18, 1, AUTO_WORKER, 2, 2, can_cache=False, **kwargs)
    assert cached.estimates["matrix_free_cached"] and not uncached.estimates["matrix_free_cached"]
    assert uncached.estimates["matrix_free_seconds"] > cached.estimates["matrix_free_seconds"]


@pytest.mark.parametrize("method", ["covariance", "direct", "matrix-free"])
def test_explicit_method_is_obeyed_and_recorded(method):
    choice = choose_method(method, 10, 100_000, 16, 1, 1 << 20, 1, 1)
    assert choice.method == method and "in the config" in choice.reason


def test_auto_choice_is_recorded_in_the_manifest(tmp_path, rng):
    write_parquet(tmp_path / "d", rng.standard_normal((300, 6)))
    res = pcapipe.run(make_config(str(tmp_path / "d" / "*.parquet"), tmp_path / "run", model={"components": 2}))
    m = res.manifest
    assert m["method"] in {"covariance", "direct"} and "estimated fastest" in m["method_reason"]
    assert set(m["method_estimates"]) >= {"covariance_seconds", "direct_seconds", "matrix_free_seconds", "rates"}


def test_auto_goes_matrix_free_when_memory_is_short(tmp_path, rng):
    # 600 features: the 2.9 MB matrix (x3) does not fit half of a 16 MiB worker (less than that would
    # not hold pyarrow's buffers for 600 columns plus a batch: the layout would be refused), nor do
    # the 1400 decoded rows twice (13 MB) for the direct method
    x = rng.standard_normal((1400, 600))
    x[:, :3] *= [30.0, 20.0, 10.0]  # two clear leading components, so the iteration is short
    write_parquet(tmp_path / "d", x, row_group=350)
    res = pcapipe.run(make_config(str(tmp_path / "d" / "*.parquet"), tmp_path / "run", model={"components": 2},
                                  compute={"memory_limit": "16MiB", "scheduler": "synchronous"}))
    assert res.manifest["method"] == "matrix-free"
    assert res.manifest["method_estimates"]["covariance_fits"] is False
    assert res.manifest["method_estimates"]["direct_fits"] is False


def _centered(rng, n, d):
    x = rng.standard_normal((n, d)) @ rng.standard_normal((d, d)) + 5.0
    return x - x.mean(axis=0)


def _operators(xc):
    n = xc.shape[0]
    c = xc.T @ xc / (n - 1)
    return c, {"dense": DenseOperator(c), "data": DataOperator(xc),
               "matrix-free": MatrixFreeOperator(lambda v: xc.T @ (xc @ v), n, np.trace(c), xc.shape[1])}


def test_operators_are_linear_operators_that_agree_with_eigsh(rng):
    xc = _centered(rng, 400, 30)
    c, ops = _operators(xc)
    ref = np.linalg.eigvalsh(c)[::-1][:4]  # numpy
    v = rng.standard_normal((30, 3))
    for name, op in ops.items():
        assert op.shape == (30, 30) and op.trace == pytest.approx(np.trace(c), rel=1e-13), name
        np.testing.assert_allclose(op.matmat(v), c @ v, rtol=1e-12, atol=1e-12 * np.abs(c).max())
        np.testing.assert_allclose(op @ v[:, 0], c @ v[:, 0], rtol=1e-12, atol=1e-12 * np.abs(c).max())
        # scipy's ARPACK, through the LinearOperator interface only
        w = eigsh(op, k=4, which="LA", return_eigenvectors=False, tol=1e-13)
        np.testing.assert_allclose(np.sort(w)[::-1], ref, rtol=1e-10)
        assert not hasattr(op, "passes")


@pytest.mark.parametrize("n, d", [(400, 30), (12, 80)])  # tall, and wide (n << d: the Gram of rows)
def test_every_method_of_the_entry_point_matches_numpy(rng, n, d):
    xc = _centered(rng, n, d)
    c, ops = _operators(xc)
    w, v = np.linalg.eigh(c)  # numpy reference
    w, v = w[::-1], v[:, ::-1]
    k = 5
    for name, op in ops.items():
        res = eigensolve(op, k, rng=np.random.default_rng(0), **SOLVER)
        np.testing.assert_allclose(res.values, w[:k], rtol=1e-9, err_msg=name)
        assert float(np.max(subspace_angles(res.vectors, v[:, :k]))) < 1e-7, name
        assert res.converged.all() and res.residual_norms.max() <= 1e-10 * w[0], name
    dense, data = (eigensolve(ops[m], k, rng=np.random.default_rng(0), **SOLVER) for m in ("dense", "data"))
    assert dense.matvecs == 0 and data.matvecs == 0 and "LAPACK" in dense.method and "LAPACK" in data.method
    # every eigenvalue is determined: all d from the matrix; from the rows, all min(n, d)
    assert dense.spectrum()["values"].size == d
    assert data.spectrum()["values"].size == min(n, d)
    nonzero = min(n - 1, d)  # centering removes one dimension
    np.testing.assert_allclose(data.spectrum()["values"][:nonzero], w[:nonzero], rtol=1e-8)
    assert data.spectrum()["retained"].sum() == k and data.spectrum()["converged"].all()


def test_direct_wide_can_return_every_component_including_null_ones(rng):
    xc = _centered(rng, 6, 40)  # rank 5 after centering
    res = eigensolve(DataOperator(xc), 6, rng=np.random.default_rng(0), **SOLVER)
    np.testing.assert_allclose(res.vectors.T @ res.vectors, np.eye(6), atol=1e-12)
    assert res.values[-1] <= 1e-12 * res.values[0]
    np.testing.assert_allclose(res.values[:5], np.linalg.svd(xc, compute_uv=False)[:5] ** 2 / 5, rtol=1e-10)


def test_covariance_lists_at_most_the_limit_beyond_k(rng):
    d = SPECTRUM_LIMIT + 40
    a = rng.standard_normal((d + 10, d))
    op = DenseOperator(a.T @ a / d)
    res = eigensolve(op, 3, rng=np.random.default_rng(0), **SOLVER)
    ref = np.linalg.eigvalsh(op.matrix)[::-1]  # numpy
    spec = res.spectrum()
    assert spec["values"].size == SPECTRUM_LIMIT and "syevr" in res.method
    np.testing.assert_allclose(spec["values"], ref[:SPECTRUM_LIMIT], rtol=1e-10)
    assert (spec["residuals"] <= 1e-10 * ref[0]).all()


@pytest.mark.parametrize("kind", ["dense", "data", "matrix-free"])
def test_fraction_is_the_smallest_count_reaching_it(rng, kind):
    xc = _centered(rng, 300, 25)
    c, ops = _operators(xc)
    w = np.linalg.eigvalsh(c)[::-1]  # numpy
    cum = np.cumsum(w) / w.sum()
    k_ref = int(np.flatnonzero(cum >= 0.8)[0]) + 1
    res = eigensolve(ops[kind], 0.8, rng=np.random.default_rng(0), **SOLVER)
    assert res.values.size == k_ref
    np.testing.assert_allclose(res.values, w[:k_ref], rtol=1e-9)


# -- direct: one read, the moments from the rows held ---------------------------------------------
def _nan_rows(x, rng, share=0.05):
    x = x.copy()
    rows = rng.choice(x.shape[0], int(share * x.shape[0]), replace=False)
    x[rows, rng.integers(0, x.shape[1], rows.size)] = np.nan
    return x


def _numpy_cov(x, missing, w=None):
    """numpy's covariance (ddof=1, fweights-style weights) after the missing rule."""
    bad = ~np.isfinite(x)
    if missing == "impute-mean":  # the finite values' (weighted) mean fills the gaps
        ww = np.ones(x.shape[0]) if w is None else w
        fill = np.nansum(x * ww[:, None], axis=0) / ((~bad) * ww[:, None]).sum(axis=0)
        x = np.where(bad, fill, x)
    elif missing == "drop-rows":
        ok = ~bad.any(axis=1)
        x, w = x[ok], None if w is None else w[ok]
    if w is None:
        return np.cov(x, rowvar=False)
    from pcapipe.weighted import reliability_factor  # numpy aweights -> our frequency convention (numpy docs, cov)

    return np.cov(x, rowvar=False, aweights=w) / reliability_factor(w.sum(), (w * w).sum())


@pytest.mark.parametrize(
    "files, row_group, missing, weighted",
    [
        (1, None, "fail", False),          # one task: its rows transformed where they are
        (4, 90, "fail", False),            # several tasks stacked
        (4, 90, "drop-rows", False),       # rows with a gap left out of the stacked matrix
        (3, 77, "impute-mean", False),     # the filled moments from the rows held, no second read
        (3, 77, "drop-rows", True),        # row weights (0 included), rows dropped
        (1, None, "impute-mean", True),    # one task, weighted, imputed
    ],
)
def test_direct_reads_the_data_once_and_agrees_with_covariance_and_numpy(tmp_path, rng, files, row_group,
                                                                           missing, weighted):
    x = known_spectrum(700, 7, [9.0, 4.0, 2.0, 1.0, 0.5, 0.3, 0.1], rng, mean=rng.uniform(-50, 50, 7))
    if missing != "fail":
        x = _nan_rows(x, rng)
    w = rng.integers(0, 4, x.shape[0]).astype(float) if weighted else None
    write_parquet(tmp_path / "d", x, files=files, row_group=row_group, keep={"w": w} if weighted else None)
    runs = {}
    for method in ("direct", "covariance", "matrix-free"):
        runs[method] = pcapipe.run(make_config(
            str(tmp_path / "d" / "*.parquet"), tmp_path / method, model={"components": 3, "method": method},
            input={"missing": missing, **({"row_weight": "w"} if weighted else {})},
            output={"scores": False, "report": False}))
    direct, cov = runs["direct"], runs["covariance"]
    # one pass over the data (the old code read twice: moments, then the rows; three times for impute-mean)
    assert direct.manifest["passes_over_data"] == 1
    assert cov.manifest["passes_over_data"] == (2 if missing == "impute-mean" else 1)
    # matrix-free: the rows are read once into memory, every product (and impute-mean's refill) from there
    mf = runs["matrix-free"]
    assert mf.manifest["blocks_cached"].startswith("rows read once")
    assert mf.manifest["passes_over_data"] == 1 + mf.manifest["solver"]["operator_applications"]
    np.testing.assert_allclose(mf.features["mean"], cov.features["mean"], rtol=1e-12)
    ref = np.linalg.eigvalsh(_numpy_cov(x, missing, w))[::-1]  # numpy
    np.testing.assert_allclose(mf.spectrum["eigenvalue"].to_numpy()[:3], ref[:3], rtol=1e-9)
    for res in (direct, cov):
        np.testing.assert_allclose(res.spectrum["eigenvalue"].to_numpy()[:7], ref, rtol=1e-9)
    np.testing.assert_allclose(direct.loadings, cov.loadings, rtol=0, atol=1e-9)
    np.testing.assert_allclose(direct.features["mean"], cov.features["mean"], rtol=1e-12)
    np.testing.assert_allclose(direct.features["std"], cov.features["std"], rtol=1e-12)
    assert direct.manifest["total_variance"] == pytest.approx(np.trace(_numpy_cov(x, missing, w)), rel=1e-12)
