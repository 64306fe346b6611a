"""End-to-end numerical checks: pcapipe.run on Parquet written here, against numpy and scikit-learn.

numpy references are ``numpy.linalg.eigh`` / ``eigvalsh`` of ``numpy.cov`` (ddof=1) or
``numpy.corrcoef`` of the same float64 values pcapipe reads.  scikit-learn's PCA
(``svd_solver="full"``, an exact LAPACK SVD) is the reference library on the
datasets it ships.
"""

import glob
import os

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from conftest import known_spectrum, make_config, write_parquet, retained
from scipy.linalg import subspace_angles
from sklearn import datasets
from sklearn.decomposition import PCA

import pcapipe

VALUE_RTOL = 1e-9  # eigenvalues (the assignment's bound)
ANGLE_MAX = 1e-6  # largest principal angle between loading subspaces, radians (the assignment's bound)
# scores against (X - mean) @ our loadings: the same products in another order, so only
# rounding of a <= 64-term dot product differs (common practice, no source)
SCORE_RTOL = 1e-11
METHODS = ["covariance", "direct", "matrix-free"]
SPIKES = [25.0, 12.0, 6.0, 3.0]  # population eigenvalues above a flat tail


def _spectrum(d, spikes=SPIKES, tail=(1.0, 0.3)):
    return np.r_[spikes, np.linspace(tail[0], tail[1], d - len(spikes))]


def _fit(tmp_path, x, tag, *, files=1, row_group=None, vector=None, dtype=None, keep=None, **sections):
    """Write ``x`` as Parquet under tmp_path/data-TAG and run pcapipe on it."""
    data = tmp_path / f"data-{tag}"
    write_parquet(data, x, files=files, row_group=row_group, vector=vector, dtype=dtype, keep=keep)
    sections = {name: dict(values) for name, values in sections.items()}
    inp = sections.setdefault("input", {})
    if vector:
        inp["vector_column"] = "emb"
    if keep:
        inp["keep"] = list(keep)
    return pcapipe.run(make_config(str(data / "*.parquet"), tmp_path / f"out-{tag}", **sections))


def _pcs(res):
    return list(res.loadings.columns)


def _scores(res) -> np.ndarray:
    return res.scores().compute()[_pcs(res)].to_numpy()


def _numpy_pca(c, k):
    """Largest k eigenpairs of the symmetric matrix c (numpy.linalg.eigh), largest first."""
    w, v = np.linalg.eigh(c)
    return w[::-1][:k], v[:, ::-1][:, :k]


def _max_angle(a, b) -> float:
    return float(np.max(subspace_angles(a, b)))


def _assert_close_scores(ours, expected):
    scale = np.abs(expected).max()
    np.testing.assert_allclose(ours, expected, rtol=0, atol=SCORE_RTOL * scale)


def _assert_oriented(loadings: np.ndarray):
    """README: each loading vector's entry of largest magnitude is positive."""
    idx = np.argmax(np.abs(loadings), axis=0)
    assert (loadings[idx, np.arange(loadings.shape[1])] > 0).all()


def _check_against(res, x64, c, k):
    """Eigenvalues, ratios, loadings and orientation against the matrix c of the data x64."""
    ref_values, ref_vectors = _numpy_pca(c, k)
    ours = retained(res)
    loadings = res.loadings.to_numpy()
    assert loadings.shape == (x64.shape[1], k)
    np.testing.assert_allclose(ours, ref_values, rtol=VALUE_RTOL, atol=0)
    np.testing.assert_allclose(retained(res, "share"), ref_values / np.trace(c),
                               rtol=VALUE_RTOL, atol=0)
    assert _max_angle(loadings, ref_vectors) <= ANGLE_MAX
    np.testing.assert_allclose(loadings.T @ loadings, np.eye(k), rtol=0, atol=1e-12)
    _assert_oriented(loadings)
    assert res.manifest["converged"]


@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize(
    "vector, dtype",
    [
        (None, "float64"),     # one scalar column per feature
        (None, "float32"),     # float32 columns, upcast exactly to float64
        ("fixed", "float64"),  # one fixed-size-list column
        ("list", "float64"),   # one variable-length list column (all rows of length d)
        ("fixed", "float32"),  # float32 vectors
        ("list", "float32"),
    ],
)
def test_known_spectrum_matches_numpy(tmp_path, rng, method, vector, dtype):
    n, d, k = 6000, 60, 4
    x = known_spectrum(n, d, _spectrum(d), rng, mean=3.0)
    # oversample 2: block 6, a Krylov basis of at most 48 < 60 columns, so the
    # solver iterates instead of holding the whole space after one step
    res = _fit(tmp_path, x, "ks", vector=vector, dtype=dtype,
               model={"components": k, "method": method, "oversample": 2})
    x64 = x.astype(dtype).astype(np.float64)  # the values pcapipe reads
    assert res.manifest["method"] == method
    assert res.manifest["rows"] == n
    _check_against(res, x64, np.cov(x64, rowvar=False, ddof=1), k)
    np.testing.assert_allclose(res.features["mean"].to_numpy(), x64.mean(axis=0), rtol=1e-13)
    _assert_close_scores(_scores(res), (x64 - x64.mean(axis=0)) @ res.loadings.to_numpy())


# Datasets shipped with scikit-learn (no download):
SKLEARN_DATA = [
    # UCI ML Iris data, Fisher (1936), Annals of Eugenics 7; sklearn.datasets.load_iris documentation
    ("iris", datasets.load_iris, 3),
    # UCI ML Wine recognition data, Aeberhard, Coomans & de Vel (1992); sklearn.datasets.load_wine documentation
    ("wine", datasets.load_wine, 5),
    # UCI ML Breast Cancer Wisconsin (Diagnostic), Street, Wolberg & Mangasarian (1993);
    # sklearn.datasets.load_breast_cancer documentation
    ("breast_cancer", datasets.load_breast_cancer, 6),
    # UCI ML optical recognition of handwritten digits, Alpaydin & Kaynak (1998), 8x8 pixels,
    # some pixels constant (zero variance; fine with scale = false); sklearn.datasets.load_digits documentation
    ("digits", datasets.load_digits, 10),
]


@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize("name, loader, k", SKLEARN_DATA, ids=[row[0] for row in SKLEARN_DATA])
def test_matches_scikit_learn_pca(tmp_path, method, name, loader, k):
    x = loader().data.astype(np.float64)
    # wine and breast cancer span 5-6 decades of variance: the residual bound 1e-9 * theta_1
    # of the default tolerance would allow a loading error of 1e-9 theta_1 / gap ~ 3e-4 for
    # their last component (Davis & Kahan 1970), so ask for 1e-13 to compare at 1e-6
    res = _fit(tmp_path, x, name, model={"components": k, "method": method, "tolerance": 1e-13})
    ref = PCA(n_components=k, svd_solver="full").fit(x)  # scikit-learn, exact SVD
    np.testing.assert_allclose(retained(res), ref.explained_variance_, rtol=VALUE_RTOL)
    # scikit-learn divides by the total variance of all components, i.e. the trace, as we do
    np.testing.assert_allclose(retained(res, "share"), ref.explained_variance_ratio_,
                               rtol=VALUE_RTOL)
    loadings = res.loadings.to_numpy()
    signs = np.sign(np.sum(loadings * ref.components_.T, axis=0))
    np.testing.assert_allclose(loadings * signs, ref.components_.T, rtol=0, atol=ANGLE_MAX)
    assert _max_angle(loadings, ref.components_.T) <= ANGLE_MAX
    expected = ref.transform(x) * signs
    scores = _scores(res)
    np.testing.assert_allclose(scores, expected, rtol=0, atol=ANGLE_MAX * np.abs(x - x.mean(0)).sum(1).max())
    # and tightly against the transform with our own loadings
    _assert_close_scores(scores, (x - x.mean(axis=0)) @ loadings)


def test_iris_correlation_eigenvalues(tmp_path):
    x = datasets.load_iris().data  # UCI ML Iris data, Fisher 1936; sklearn.datasets.load_iris documentation
    res = _fit(tmp_path, x, "iris-corr", model={"components": 4, "scale": True})
    ours = retained(res)
    # Eigenvalues of the iris correlation matrix, widely reproduced in textbooks and
    # tutorials: from memory, to 3 decimals.
    np.testing.assert_array_equal(np.round(ours, 3), [2.918, 0.914, 0.147, 0.021])
    ref = np.linalg.eigvalsh(np.corrcoef(x, rowvar=False))[::-1]  # numpy corrcoef
    np.testing.assert_allclose(ours, ref, rtol=1e-12)
    np.testing.assert_allclose(ours.sum(), 4.0, rtol=1e-12)  # trace of a 4 x 4 correlation matrix


@pytest.mark.parametrize("method", METHODS)
def test_scaled_is_correlation_and_denominator_is_n_minus_1(tmp_path, method):
    rng = np.random.default_rng(21)
    n, d = 50, 6  # small n: ddof 0 and 1 differ by 2%
    # unequal spreads (so scaling matters) but a modest condition number, so that
    # eigvalsh's own error (~eps * lambda_1) stays far below 1e-9 * lambda_min
    x = rng.standard_normal((n, d)) * [1.0, 3.0, 0.5, 2.0, 1.5, 4.0] + np.arange(d)
    cov = _fit(tmp_path, x, "cov", model={"components": d, "method": method})
    ev = retained(cov)
    ddof1 = np.linalg.eigvalsh(np.cov(x, rowvar=False, ddof=1))[::-1]  # numpy, n - 1
    ddof0 = np.linalg.eigvalsh(np.cov(x, rowvar=False, ddof=0))[::-1]  # numpy, n
    np.testing.assert_allclose(ev, ddof1, rtol=VALUE_RTOL)
    assert not np.allclose(ev, ddof0, rtol=VALUE_RTOL * 1e3, atol=0)
    # README conventions: std_error = eigenvalue * sqrt(2/n) (North, Bell, Cahalan &
    # Moeng 1982, Mon. Wea. Rev. 110)
    np.testing.assert_allclose(retained(cov, "std_error"), ddof1 * np.sqrt(2.0 / n), rtol=1e-9)
    np.testing.assert_allclose(cov.features["std"].to_numpy(), x.std(axis=0, ddof=1), rtol=1e-12)

    corr = _fit(tmp_path, x, "corr", model={"components": d, "method": method, "scale": True})
    r = np.corrcoef(x, rowvar=False)  # numpy corrcoef
    _check_against(corr, x, r, d)
    np.testing.assert_allclose(corr.features["scale_used"].to_numpy(), x.std(axis=0, ddof=1), rtol=1e-12)
    z = (x - x.mean(axis=0)) / x.std(axis=0, ddof=1)
    _assert_close_scores(_scores(corr), z @ corr.loadings.to_numpy())


@pytest.mark.parametrize("method", METHODS)
def test_large_mean_offset_keeps_relative_accuracy(tmp_path, method):
    rng = np.random.default_rng(22)
    n, d, k = 5000, 8, 3
    x = known_spectrum(n, d, _spectrum(d, spikes=[4.0, 2.0, 1.5], tail=(1.0, 0.5)), rng, mean=1e8)
    res = _fit(tmp_path, x, "offset", model={"components": k, "method": method})
    # x[i] - x[0] is exact (Sterbenz's lemma: P. H. Sterbenz 1974, "Floating-Point
    # Computation"), and the covariance does not depend on the shift
    c = np.cov(x - x[0], rowvar=False)
    ref = np.linalg.eigvalsh(c)[::-1][:k]
    np.testing.assert_allclose(retained(res), ref, rtol=1e-6)
    np.testing.assert_allclose(res.features["std"].to_numpy(), np.sqrt(np.diag(c)), rtol=1e-6)
    # the test can fail: the one-pass textbook formula sum(x x^T) - n mu mu^T does on these data
    mu = x.sum(axis=0) / n
    naive = (x.T @ x - n * np.outer(mu, mu)) / (n - 1)
    naive_err = np.abs(np.sort(np.linalg.eigvalsh(naive))[::-1][:k] / ref - 1).max()
    assert naive_err > 1e-2


LAYOUTS = [
    # (files, rows per row group)
    (1, None),   # one file, one row group
    (1, 250),    # one file, many row groups
    (5, 97),     # many files, odd row groups (last group of each file short)
    (7, 1000),   # many files, one row group each
]


@pytest.mark.parametrize("method", METHODS)
def test_file_and_row_group_layout_does_not_change_the_answer(tmp_path, method):
    rng = np.random.default_rng(23)
    x = known_spectrum(3000, 12, _spectrum(12), rng, mean=-2.0)
    runs = [_fit(tmp_path, x, f"layout{i}", files=f, row_group=g, model={"components": 4, "method": method})
            for i, (f, g) in enumerate(LAYOUTS)]
    first = runs[0]
    s0 = _scores(first)
    for res in runs[1:]:
        np.testing.assert_allclose(retained(res), retained(first),
                                   rtol=1e-12, atol=0)
        np.testing.assert_allclose(res.loadings.to_numpy(), first.loadings.to_numpy(), rtol=0, atol=1e-12)
        np.testing.assert_allclose(_scores(res), s0, rtol=0, atol=1e-12 * np.abs(s0).max())
    assert [r.manifest["scores"]["parts"] for r in runs] == [f for f, _ in LAYOUTS]


@pytest.mark.parametrize("method", METHODS)
def test_uncentered_is_second_moment_about_zero(tmp_path, method):
    rng = np.random.default_rng(24)
    n, d, k = 2000, 10, 3
    x = known_spectrum(n, d, _spectrum(d), rng) + np.linspace(-3, 5, d)
    res = _fit(tmp_path, x, "nocenter", model={"components": k, "method": method, "center": False})
    _check_against(res, x, x.T @ x / (n - 1), k)  # numpy, X^T X / (n - 1)
    _assert_close_scores(_scores(res), x @ res.loadings.to_numpy())


@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize("fraction", [0.5, 0.9])
def test_components_fraction_is_smallest_k_reaching_it(tmp_path, method, fraction):
    rng = np.random.default_rng(25)
    n, d = 4000, 40
    x = known_spectrum(n, d, np.linspace(1.0, 0.05, d) ** 2, rng)
    ref = np.linalg.eigvalsh(np.cov(x, rowvar=False))[::-1]  # numpy
    cum = np.cumsum(ref) / ref.sum()
    k_ref = int(np.searchsorted(cum, fraction) + 1)  # smallest k with cum[k-1] >= fraction
    assert cum[k_ref - 1] >= fraction and (k_ref == 1 or cum[k_ref - 2] < fraction)
    assert np.abs(cum - fraction).min() > 1e-6  # not a knife-edge case
    # oversample 2 makes the engine start from a small k and grow it
    res = _fit(tmp_path, x, "frac", model={"components": fraction, "method": method, "oversample": 2})
    assert res.manifest["components"] == k_ref
    assert k_ref > 4
    np.testing.assert_allclose(retained(res), ref[:k_ref], rtol=VALUE_RTOL)
    np.testing.assert_allclose(retained(res, "cumulative_share"), cum[:k_ref], rtol=1e-9)


def _write_with_holes(directory, x, holes, nulls, files=2):
    """Scalar columns f0.. where ``holes`` are NaN and ``nulls`` are Parquet nulls; returns the paths."""
    os.makedirs(directory, exist_ok=True)
    bounds = np.linspace(0, x.shape[0], files + 1).astype(int)
    paths = []
    for i in range(files):
        sl = slice(bounds[i], bounds[i + 1])
        cols = {"row": pa.array(np.arange(bounds[i], bounds[i + 1]))}
        for j in range(x.shape[1]):
            values = np.where(holes[sl, j], np.nan, x[sl, j])
            cols[f"f{j}"] = pa.array(values, mask=nulls[sl, j])
        path = os.path.join(directory, f"part-{i:03d}.parquet")
        pq.write_table(pa.table(cols), path, row_group_size=300)
        paths.append(path)
    return paths


@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize("missing", ["drop-rows", "impute-mean"])
def test_missing_values_match_cleaned_data(tmp_path, method, missing):
    rng = np.random.default_rng(26)
    n, d, k = 2000, 6, 3
    x = known_spectrum(n, d, _spectrum(d, spikes=[5.0, 3.0, 2.0], tail=(1.0, 0.5)), rng, mean=1.0)
    holes = rng.random((n, d)) < 0.02
    nulls = (rng.random((n, d)) < 0.01) & ~holes
    holes[5, 0] = holes[5, 1] = True  # a row with two gaps
    bad = holes | nulls
    _write_with_holes(tmp_path / "data", x, holes, nulls)
    cfg = make_config(str(tmp_path / "data" / "*.parquet"), tmp_path / "out",
                      input={"missing": missing, "keep": ["row"]},
                      model={"components": k, "method": method})
    res = pcapipe.run(cfg)
    np.testing.assert_array_equal(res.features["missing"].to_numpy(), bad.sum(axis=0))
    scores_df = res.scores().compute()
    assert len(scores_df) == n
    np.testing.assert_array_equal(scores_df["row"].to_numpy(), np.arange(n))
    scores = scores_df[_pcs(res)].to_numpy()
    loadings = res.loadings.to_numpy()
    if missing == "drop-rows":
        ok = ~bad.any(axis=1)
        clean = x[ok]
        assert res.manifest["rows"] == ok.sum()
        _check_against(res, clean, np.cov(clean, rowvar=False), k)
        assert np.isnan(scores[~ok]).all()
        _assert_close_scores(scores[ok], (clean - clean.mean(axis=0)) @ loadings)
    else:
        col_mean = np.array([x[~bad[:, j], j].mean() for j in range(d)])  # mean of the present values
        clean = np.where(bad, col_mean, x)
        assert res.manifest["rows"] == n
        _check_against(res, clean, np.cov(clean, rowvar=False), k)
        np.testing.assert_allclose(res.features["mean"].to_numpy(), col_mean, rtol=1e-12)
        _assert_close_scores(scores, (clean - clean.mean(axis=0)) @ loadings)


def test_scores_keep_row_order_and_columns_one_part_per_file(tmp_path):
    rng = np.random.default_rng(27)
    n, d = 3001, 5
    x = known_spectrum(n, d, _spectrum(d, spikes=[4.0, 2.0], tail=(1.0, 0.5)), rng)
    keep = {"id": rng.permutation(n), "label": np.array([f"r{i}" for i in range(n)])}
    res = _fit(tmp_path, x, "keep", files=3, row_group=400, keep=keep, model={"components": 2})
    parts = sorted(glob.glob(os.path.join(res.directory, "scores", "part-*.parquet")))
    inputs = sorted(glob.glob(str(tmp_path / "data-keep" / "*.parquet")))
    assert len(parts) == len(inputs) == 3
    for part, inp in zip(parts, inputs):
        assert pq.ParquetFile(part).metadata.num_rows == pq.ParquetFile(inp).metadata.num_rows
        assert pq.read_table(part).column_names == ["id", "label", "PC1", "PC2", "t2", "spe", "t2_alarm",
                                                    "spe_alarm"]
    ddf = res.scores()
    assert ddf.npartitions == 3
    df = ddf.compute()
    np.testing.assert_array_equal(df["id"].to_numpy(), keep["id"])
    assert list(df["label"]) == list(keep["label"])
    _assert_close_scores(df[["PC1", "PC2"]].to_numpy(), (x - x.mean(axis=0)) @ res.loadings.to_numpy())
    assert res.manifest["scores"]["rows"] == n


@pytest.mark.parametrize("vector", [None, "fixed"])
def test_project_training_rows_equals_stored_scores(tmp_path, vector):
    rng = np.random.default_rng(28)
    n, d = 1500, 7
    x = known_spectrum(n, d, _spectrum(d, spikes=[4.0, 2.0, 1.5], tail=(1.0, 0.5)), rng, mean=2.0)
    keep = {"id": np.arange(n)}
    res = _fit(tmp_path, x, "proj", files=2, vector=vector, keep=keep, model={"components": 3})
    stored = res.scores().compute()
    if vector:
        frame = pd.DataFrame({"id": keep["id"], "emb": list(x)})
    else:
        frame = pd.DataFrame({"id": keep["id"], **{f"f{j}": x[:, j] for j in range(d)}})
    frame.index = frame.index + 100  # the frame's index is kept
    projected = res.project(frame)
    assert list(projected.index) == list(frame.index)
    np.testing.assert_array_equal(projected["id"].to_numpy(), stored["id"].to_numpy())
    np.testing.assert_allclose(projected[_pcs(res)].to_numpy(), stored[_pcs(res)].to_numpy(), rtol=0,
                               atol=1e-13 * np.abs(stored[_pcs(res)].to_numpy()).max())
    from_files = res.project(str(tmp_path / "data-proj" / "*.parquet")).compute()
    np.testing.assert_allclose(from_files[_pcs(res)].to_numpy(), stored[_pcs(res)].to_numpy(), rtol=0,
                               atol=1e-13 * np.abs(stored[_pcs(res)].to_numpy()).max())
