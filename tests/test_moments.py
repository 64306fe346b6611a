"""Tests of pcapipe.moments: the Chan-Golub-LeVeque merge against numpy, missing values, cancellation."""

import numpy as np
import pytest

from pcapipe.moments import Moments, batch_moments, covariance_from, merge, tree_merge


def _split(n, rng, pieces):
    """Random split points 0 = s0 < ... < n (pieces may be of a single row)."""
    cuts = np.sort(rng.choice(np.arange(1, n), size=pieces - 1, replace=False)) if pieces > 1 else []
    return np.r_[0, cuts, n].astype(int)


def _parts(x, bounds, full, missing="fail", fill=None):
    return [batch_moments(x[a:b].copy(), full, missing, fill) for a, b in zip(bounds[:-1], bounds[1:])]


def _fold(parts):
    out = parts[0]
    for p in parts[1:]:
        out = merge(out, p)
    return out


def _cov_scale(c):
    return np.abs(np.diag(c)).max()


@pytest.mark.parametrize(
    "n, d, pieces, combine",
    [
        (500, 7, 1, "fold"),    # one batch: no merge at all
        (500, 7, 2, "fold"),    # one merge
        (500, 7, 13, "fold"),   # left fold, as a stream would merge
        (500, 7, 13, "tree"),   # the fixed pairwise tree of the engine
        (64, 3, 64, "tree"),    # every batch a single row (M2 = 0 in each)
        (1000, 1, 9, "tree"),   # one feature
        (301, 20, 7, "fold"),   # more features than pieces
    ],
)
def test_merge_matches_numpy_mean_and_cov(n, d, pieces, combine):
    rng = np.random.default_rng(n + d + pieces)
    x = rng.standard_normal((n, d)) @ rng.standard_normal((d, d)) + rng.uniform(-5, 5, d)
    bounds = _split(n, rng, pieces)
    parts = _parts(x, bounds, full=True)
    m = _fold(parts) if combine == "fold" else tree_merge(parts)
    ref_cov = np.cov(x, rowvar=False, ddof=1).reshape(d, d)  # numpy two-pass covariance
    assert m.n == n and m.rows_seen == n
    np.testing.assert_allclose(m.mean, x.mean(axis=0), rtol=0, atol=1e-13 * np.abs(x).max())
    c = covariance_from(m, center=True, scale=None)
    np.testing.assert_allclose(c, ref_cov, rtol=0, atol=1e-12 * _cov_scale(ref_cov))
    np.testing.assert_array_equal(c, c.T)
    np.testing.assert_allclose(m.variance(), np.var(x, axis=0, ddof=1), rtol=1e-12)


def test_full_and_diagonal_agree():
    rng = np.random.default_rng(2)
    x = rng.standard_normal((400, 6)) * [1, 10, 100, 0.1, 3, 7] + 50
    bounds = _split(400, rng, 9)
    full = tree_merge(_parts(x, bounds, full=True))
    diag = tree_merge(_parts(x, bounds, full=False))
    assert full.full and not diag.full
    assert diag.m2.shape == (6,)
    np.testing.assert_allclose(np.diag(full.symmetric()), diag.m2, rtol=1e-13)
    np.testing.assert_allclose(full.mean, diag.mean, rtol=1e-15)
    np.testing.assert_allclose(full.variance(), diag.variance(), rtol=1e-13)
    np.testing.assert_allclose(diag.variance(), np.var(x, axis=0, ddof=1), rtol=1e-12)  # numpy


def test_symmetric_is_built_from_the_upper_triangle():
    rng = np.random.default_rng(3)
    x = rng.standard_normal((50, 4))
    m = batch_moments(x.copy(), full=True, missing="fail")
    m.m2 = np.triu(m.m2)  # the merge may only keep the upper triangle right; symmetric() must not need more
    xc = x - x.mean(axis=0)
    np.testing.assert_allclose(m.symmetric(), xc.T @ xc, rtol=1e-13, atol=1e-13)


def _with_holes(rng, n=300, d=5):
    x = rng.standard_normal((n, d)) + np.arange(d)
    holes = rng.random((n, d)) < 0.05
    x[holes] = np.nan
    x[3, 1] = np.inf
    x[7, 2] = -np.inf
    x[:, 4] = np.where(np.arange(n) < 40, np.nan, x[:, 4])  # a run of missing values
    return x


@pytest.mark.parametrize("pieces", [1, 4, 25])  # 25: some batches lie inside the run
def test_missing_values_drop_rows_bookkeeping(pieces):
    rng = np.random.default_rng(4)
    x = _with_holes(rng)
    n, d = x.shape
    bounds = _split(n, rng, pieces)
    m = tree_merge(_parts(x, bounds, full=True, missing="drop-rows"))
    finite = np.isfinite(x)
    complete = x[finite.all(axis=1)]
    assert m.rows_seen == n
    assert m.n == complete.shape[0]
    np.testing.assert_array_equal(m.missing, (~finite).sum(axis=0))
    np.testing.assert_array_equal(m.valid_n, finite.sum(axis=0))
    valid_mean = np.array([x[finite[:, j], j].mean() for j in range(d)])  # mean over finite values
    np.testing.assert_allclose(m.valid_mean, valid_mean, rtol=1e-13)
    np.testing.assert_allclose(m.mean, complete.mean(axis=0), rtol=1e-13)
    np.testing.assert_allclose(covariance_from(m, True, None), np.cov(complete, rowvar=False), rtol=1e-12,
                               atol=1e-13)


def test_missing_values_impute_mean_second_pass():
    rng = np.random.default_rng(5)
    x = _with_holes(rng)
    bounds = _split(x.shape[0], rng, 6)
    first = tree_merge(_parts(x, bounds, full=True, missing="impute-mean"))
    # without a fill the first pass only drops rows, and still counts everything
    assert first.n == int(np.isfinite(x).all(axis=1).sum())
    second = tree_merge(_parts(x, bounds, full=True, missing="impute-mean", fill=first.valid_mean))
    imputed = np.where(np.isfinite(x), x, first.valid_mean)
    assert second.n == x.shape[0]
    np.testing.assert_array_equal(second.missing, first.missing)
    np.testing.assert_allclose(second.mean, imputed.mean(axis=0), rtol=1e-13)
    # imputing the mean leaves the mean where it was
    np.testing.assert_allclose(second.mean, first.valid_mean, rtol=1e-13)
    np.testing.assert_allclose(covariance_from(second, True, None), np.cov(imputed, rowvar=False),
                               rtol=1e-12, atol=1e-13)


def test_batch_with_every_row_dropped_is_neutral():
    x = np.array([[1.0, np.nan], [np.nan, 2.0]])
    empty = batch_moments(x.copy(), True, "drop-rows")
    assert empty.n == 0 and empty.rows_seen == 2
    np.testing.assert_array_equal(empty.valid_n, [1, 1])
    np.testing.assert_array_equal(empty.valid_mean, [1.0, 2.0])
    y = np.random.default_rng(6).standard_normal((20, 2))
    full = batch_moments(y.copy(), True, "drop-rows")
    both = merge(empty, full)
    assert both.n == 20 and both.rows_seen == 22
    np.testing.assert_allclose(both.mean, y.mean(axis=0), rtol=1e-15)
    np.testing.assert_allclose(both.symmetric(), full.symmetric(), rtol=1e-15)
    np.testing.assert_allclose(both.valid_mean, (np.r_[[1.0, 2.0]] + y.sum(axis=0)) / 21, rtol=1e-14)


def test_empty_and_tree_merge_of_nothing():
    e = Moments.empty(3, full=True)
    assert e.n == 0 and e.m2.shape == (3, 3)
    with pytest.raises(ValueError, match="at least one part"):
        tree_merge([])


def _naive_variance(x):
    """sum(x^2) - n mu^2: the formula the README warns against (cancellation), kept here to prove the test can fail."""
    n = x.shape[0]
    mu = x.sum(axis=0) / n
    return ((x * x).sum(axis=0) - n * mu * mu) / (n - 1)


@pytest.mark.parametrize("pieces", [1, 10])
def test_large_offset_keeps_relative_accuracy(pieces):
    rng = np.random.default_rng(8)
    n = 2000
    x = 1e8 + rng.standard_normal((n, 3)) * [1.0, 0.5, 2.0]  # mean 1e8, unit spread
    # Reference: shift by a data value first.  x[0] and x[i] are within a factor 2,
    # so x[i] - x[0] is exact (Sterbenz's lemma: P. H. Sterbenz 1974, "Floating-Point
    # Computation", Prentice-Hall),
    # and the covariance does not depend on the shift.
    ref_cov = np.cov(x - x[0], rowvar=False)
    ref_var = np.diag(ref_cov)
    m = tree_merge(_parts(x, _split(n, rng, pieces), full=True))
    np.testing.assert_allclose(m.variance(), ref_var, rtol=1e-6)
    np.testing.assert_allclose(covariance_from(m, True, None), ref_cov, rtol=0, atol=1e-6 * ref_var.max())
    d = tree_merge(_parts(x, _split(n, rng, pieces), full=False))
    np.testing.assert_allclose(d.variance(), ref_var, rtol=1e-6)
    # the naive formula misses by far more than the tolerance on the same data
    naive_err = np.abs(_naive_variance(x) / ref_var - 1).max()
    assert naive_err > 1e-2


def test_covariance_from_about_zero_and_scaled():
    rng = np.random.default_rng(9)
    x = rng.standard_normal((300, 4)) * [1, 2, 3, 4] + [10, -5, 0, 2]
    m = tree_merge(_parts(x, _split(300, rng, 5), full=True))
    n = x.shape[0]
    np.testing.assert_allclose(covariance_from(m, center=False, scale=None), x.T @ x / (n - 1), rtol=1e-12)
    std = np.sqrt(m.variance())
    np.testing.assert_allclose(covariance_from(m, center=True, scale=std), np.corrcoef(x, rowvar=False),
                               rtol=0, atol=1e-13)  # numpy corrcoef
