"""Tests of pcapipe.weighted: weighted moments and their merge against numpy, cancellation, zero weights."""

import numpy as np
import pytest

from pcapipe.moments import Moments, batch_moments, covariance_from, merge, tree_merge
from pcapipe.weighted import reliability_factor, weight_features, weighted_batch_moments


def _bounds(n, rng, pieces):
    cuts = np.sort(rng.choice(np.arange(1, n), size=pieces - 1, replace=False)) if pieces > 1 else []
    return np.r_[0, cuts, n].astype(int)


def _weighted(x, w, bounds, full=True, missing="fail", fill=None):
    parts = [batch_moments(x[a:b].copy(), full, missing, fill, weights=w[a:b])
             for a, b in zip(bounds[:-1], bounds[1:])]
    return tree_merge(parts)


@pytest.mark.parametrize("n, d, pieces", [
    (200, 5, 1),    # one batch
    (200, 5, 9),    # the engine's pairwise tree
    (40, 3, 40),    # a batch per row
    (300, 12, 4),   # wider
])
def test_integer_weights_equal_repeated_rows(n, d, pieces):
    rng = np.random.default_rng(n * d + pieces)
    x = rng.standard_normal((n, d)) @ rng.standard_normal((d, d)) + rng.uniform(-3, 3, d)
    w = rng.integers(0, 5, n).astype(float)  # includes weight 0: rows that take no part
    weighted = _weighted(x, w, _bounds(n, rng, pieces))
    rep = np.repeat(x, w.astype(int), axis=0)
    rb = _bounds(rep.shape[0], rng, pieces)
    plain = tree_merge([batch_moments(rep[a:b].copy(), True, "fail") for a, b in zip(rb[:-1], rb[1:])])
    assert weighted.weight == w.sum() == plain.n
    assert weighted.n == int((w > 0).sum())
    scale = np.abs(np.cov(rep, rowvar=False)).max()
    np.testing.assert_allclose(weighted.mean, plain.mean, rtol=0, atol=1e-12 * np.abs(x).max())
    np.testing.assert_allclose(covariance_from(weighted, True, None), covariance_from(plain, True, None),
                               rtol=0, atol=1e-12 * scale)
    # numpy's frequency weights are the same convention (numpy docs, cov: "fweights")
    np.testing.assert_allclose(covariance_from(weighted, True, None),
                               np.cov(x, rowvar=False, fweights=w.astype(int)), rtol=0, atol=1e-12 * scale)


def test_real_weights_equal_numpy_aweights_converted():
    rng = np.random.default_rng(7)
    n, d = 500, 6
    x = rng.standard_normal((n, d)) * [1, 2, 3, 0.5, 10, 1] + 4
    w = rng.uniform(0.1, 3.0, n)
    m = _weighted(x, w, _bounds(n, rng, 11))
    c = covariance_from(m, True, None)
    # np.cov(aweights=w) divides by W - W2/W (numpy docs, cov); ours by W - 1 (frequency weights)
    ref = np.cov(x, rowvar=False, aweights=w) / reliability_factor(w.sum(), (w * w).sum())
    np.testing.assert_allclose(c, ref, rtol=0, atol=1e-12 * np.abs(ref).max())
    np.testing.assert_allclose(m.mean, np.average(x, axis=0, weights=w), rtol=1e-13)
    np.testing.assert_allclose(m.weight2, (w * w).sum(), rtol=1e-13)
    np.testing.assert_allclose(m.variance(), np.diag(ref), rtol=1e-12)
    # about zero (center = false): sum w x x^T / (W - 1)
    raw = (x * w[:, None]).T @ x / (w.sum() - 1)
    np.testing.assert_allclose(covariance_from(m, False, None), raw, rtol=1e-12)


@pytest.mark.parametrize("full", [True, False])
def test_large_mean_offset_keeps_accuracy(full):
    rng = np.random.default_rng(11)
    n, d = 4000, 4
    z = rng.standard_normal((n, d)) * [1.0, 0.5, 2.0, 1.5]
    x = 1e8 + z  # a mean of 1e8 next to unit spread
    w = rng.uniform(0.0, 2.0, n)
    # x - 1e8 is exact in float64 (Sterbenz lemma), so this reference sees the same numbers
    ref = np.cov(x - 1e8, rowvar=False, aweights=w) / reliability_factor(w.sum(), (w * w).sum())
    m = _weighted(x, w, _bounds(n, rng, 17), full=full)
    got = covariance_from(m, True, None) if full else m.variance()
    want = ref if full else np.diag(ref)
    np.testing.assert_allclose(got, want, rtol=1e-9, atol=1e-9 * np.abs(np.diag(ref)).max())
    # the textbook one-pass formula loses it all here, so the test can tell the difference
    naive = ((x * w[:, None]).T @ x - w.sum() * np.outer(m.mean, m.mean)) / (w.sum() - 1)
    assert np.abs(naive - ref).max() > 1e-3 * np.abs(ref).max()


def test_zero_weight_rows_equal_dropping_them():
    rng = np.random.default_rng(5)
    x = rng.standard_normal((120, 4))
    w = rng.uniform(0.5, 2.0, 120)
    w[::3] = 0.0
    x[::3] += 1e6  # outliers: they must not move anything
    m = _weighted(x, w, _bounds(120, rng, 6))
    keep = w > 0
    ref = _weighted(x[keep], w[keep], _bounds(int(keep.sum()), rng, 5))
    np.testing.assert_allclose(m.mean, ref.mean, rtol=1e-13)
    np.testing.assert_allclose(covariance_from(m, True, None), covariance_from(ref, True, None), rtol=1e-12)
    assert m.n == keep.sum() and m.rows_seen == 120


def test_all_zero_batch_is_empty_and_merges_away():
    rng = np.random.default_rng(6)
    x = rng.standard_normal((30, 3))
    w = rng.uniform(1, 2, 30)
    empty = weighted_batch_moments(x[:10].copy(), np.zeros(10), True, "fail")
    assert empty.n == 0 and empty.weight == 0.0 and empty.rows_seen == 10
    full = weighted_batch_moments(x[10:].copy(), w[10:], True, "fail")
    both = merge(empty, full)
    np.testing.assert_array_equal(both.mean, full.mean)
    assert both.rows_seen == 30 and both.weight == full.weight


def test_missing_values_weighted():
    rng = np.random.default_rng(8)
    x = rng.standard_normal((200, 4)) + 2
    w = rng.uniform(0.2, 3, 200)
    holes = rng.random((200, 4)) < 0.05
    x[holes] = np.nan
    bounds = _bounds(200, rng, 7)
    dropped = _weighted(x, w, bounds, missing="drop-rows")
    ok = ~holes.any(axis=1)
    ref = np.cov(x[ok], rowvar=False, aweights=w[ok]) / reliability_factor(w[ok].sum(), (w[ok] ** 2).sum())
    np.testing.assert_allclose(covariance_from(dropped, True, None), ref, rtol=0, atol=1e-12 * np.abs(ref).max())
    np.testing.assert_array_equal(dropped.missing, holes.sum(axis=0))
    # impute-mean fills with the weighted mean of each feature's finite values
    want = np.array([np.average(x[~holes[:, j], j], weights=w[~holes[:, j]]) for j in range(4)])
    np.testing.assert_allclose(dropped.valid_mean, want, rtol=1e-13)
    filled = _weighted(x, w, bounds, missing="impute-mean", fill=dropped.valid_mean)
    xf = np.where(holes, want, x)
    ref = np.cov(xf, rowvar=False, aweights=w) / reliability_factor(w.sum(), (w * w).sum())
    np.testing.assert_allclose(covariance_from(filled, True, None), ref, rtol=0, atol=1e-12 * np.abs(ref).max())


def test_weighted_and_unweighted_parts_do_not_mix():
    x = np.arange(12.0).reshape(6, 2)
    a = batch_moments(x[:3].copy(), True, "fail")
    b = batch_moments(x[3:].copy(), True, "fail", weights=np.ones(3))
    with pytest.raises(ValueError, match="weighted"):
        merge(a, b)


def test_unit_weights_equal_unweighted():
    rng = np.random.default_rng(9)
    x = rng.standard_normal((100, 5)) + 7
    b = _bounds(100, rng, 5)
    m1 = _weighted(x, np.ones(100), b)
    m0 = tree_merge([batch_moments(x[s:e].copy(), True, "fail") for s, e in zip(b[:-1], b[1:])])
    np.testing.assert_allclose(m1.mean, m0.mean, rtol=1e-15)
    np.testing.assert_allclose(covariance_from(m1, True, None), covariance_from(m0, True, None), rtol=1e-13)
    assert isinstance(m0, Moments) and m0.weight is None and m1.weight == 100.0


def test_feature_weights_are_f_c_f():
    rng = np.random.default_rng(10)
    a = rng.standard_normal((5, 5))
    c = a @ a.T
    f = rng.uniform(0, 2, 5)
    np.testing.assert_allclose(weight_features(c, f), np.diag(f) @ c @ np.diag(f), rtol=1e-14)
    assert weight_features(c, None) is c


@pytest.mark.parametrize("full", [True, False])
@pytest.mark.parametrize("missing", ["fail", "drop-rows", "impute-mean"])
def test_accumulator_folds_weighted_batches_in_place(full, missing):
    """Weighted batches folded into one accumulator: numpy's weighted covariance, one d x d buffer throughout."""
    from pcapipe.moments import Accumulator

    rng = np.random.default_rng(11)
    n, d = 400, 5
    x = rng.standard_normal((n, d)) @ rng.standard_normal((d, d)) + rng.uniform(-1e4, 1e4, d)  # large means
    w = rng.uniform(0.0, 3.0, n)
    w[40:80] = 0.0  # a whole batch of weight 0 folds away
    holes = np.zeros((n, d), bool)
    if missing != "fail":
        holes = rng.random((n, d)) < 0.03
        x[holes] = np.nan
    fill = None
    if missing == "impute-mean":  # the weighted mean of each feature's finite values (the first pass)
        fill = np.array([np.average(x[~holes[:, j], j], weights=w[~holes[:, j]]) for j in range(d)])
    acc = Accumulator(d, full, missing, fill, weighted=True)
    buffers = set()
    for a in range(0, n, 40):
        acc.add(x[a:a + 40].copy(), w[a:a + 40].copy())
        if acc.result().n:
            buffers.add(id(acc.result().m2))
    m = acc.result()
    if full:  # folded in place: one d x d co-moment array, never a per-batch partial
        assert len(buffers) == 1
    xs, ws = x, w
    if missing == "drop-rows":
        ok = ~holes.any(axis=1)
        xs, ws = x[ok], w[ok]
    elif missing == "impute-mean":
        xs = np.where(holes, fill, x)
    # numpy aweights -> frequency weights: divide by (W - 1) / (W - W2/W) (numpy docs, cov)
    ref = np.cov(xs, rowvar=False, aweights=ws) / reliability_factor(ws.sum(), (ws * ws).sum())
    got = covariance_from(m, True, None) if full else m.variance()
    want = ref if full else np.diag(ref)
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-12 * np.abs(ref).max())
    np.testing.assert_allclose(m.mean, np.average(xs, axis=0, weights=ws), rtol=1e-14)
    assert m.weight == pytest.approx(ws.sum(), rel=1e-14) and m.n == int((ws > 0).sum()) and m.rows_seen == n
    np.testing.assert_array_equal(m.missing, holes.sum(axis=0))
    # the same numbers as the per-batch moments merged pairwise (the former route)
    merged = tree_merge([weighted_batch_moments(x[a:a + 40].copy(), w[a:a + 40], full, missing, fill)
                         for a in range(0, n, 40)])
    np.testing.assert_allclose(m.mean, merged.mean, rtol=1e-14)
    np.testing.assert_allclose(m.valid_mean, merged.valid_mean, rtol=1e-14)
    np.testing.assert_allclose(covariance_from(m, True, None) if full else m.variance(),
                               covariance_from(merged, True, None) if full else merged.variance(),
                               rtol=0, atol=1e-12 * np.abs(ref).max())
