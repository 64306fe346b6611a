"""The covariance method's decomposition of its in-memory matrix: LAPACK, or block Krylov for few components.

Reference: ``numpy.linalg.eigh`` (LAPACK ``syevd``) of the same matrix.
"""

from __future__ import annotations

import numpy as np
import pytest

import pcapipe.eigen as eigen
from pcapipe.eigen import eigensolve
from pcapipe.methods import dense_eigen_cost
from pcapipe.operators import DenseOperator

SOLVER = dict(tolerance=1e-10, max_iterations=300, oversample=8)


@pytest.mark.parametrize("d, k, how", [
    (10_000, 10, "krylov"),  # issue 9's 10,000 scalar columns: LAPACK would take minutes
    (4096, 10, "krylov"),    # embeddings, few components
    (2000, 100, "lapack"),   # a block of 108 and its Rayleigh-Ritz cost more than syevr (issue 9)
    (4096, 256, "lapack"),
    (1024, 10, "lapack"),    # small: LAPACK gives every eigenvalue for little
])
def test_krylov_only_for_few_components_of_a_large_matrix(d, k, how):
    assert dense_eigen_cost(d, k, k + 8, 2)[0] == how


@pytest.fixture
def matrix():
    rng = np.random.default_rng(5)
    d = 700
    q = np.linalg.qr(rng.standard_normal((d, d)))[0]
    values = np.where(np.arange(d) < 6, 50 * 0.7 ** np.arange(d), 0.5 / (1 + np.arange(d) / 50))
    return (q * values) @ q.T


def test_block_krylov_on_the_matrix_matches_lapack(matrix, monkeypatch):
    monkeypatch.setattr(eigen, "dense_eigen_cost", lambda *a: ("krylov", 0.0))
    res = eigensolve(DenseOperator(matrix), 5, rng=np.random.default_rng(0), **SOLVER)
    w, v = np.linalg.eigh(matrix)
    assert "Krylov" in res.method and res.matvecs > 0 and res.converged.all()
    np.testing.assert_allclose(res.values, w[::-1][:5], rtol=1e-12)
    overlap = np.abs(np.sum(res.vectors * v[:, ::-1][:, :5], axis=0))
    np.testing.assert_allclose(overlap, 1.0, atol=1e-9)


def test_lapack_after_all_when_krylov_does_not_converge(matrix, monkeypatch):
    monkeypatch.setattr(eigen, "dense_eigen_cost", lambda *a: ("krylov", 0.0))
    res = eigensolve(DenseOperator(matrix), 5, rng=np.random.default_rng(0),
                     **{**SOLVER, "max_iterations": 1})  # one product cannot converge
    assert "LAPACK" in res.method and res.converged.all()
    np.testing.assert_allclose(res.values, np.linalg.eigvalsh(matrix)[::-1][:5], rtol=1e-12)
