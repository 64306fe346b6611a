"""Covariance operators: the seam between the data passes and the eigensolvers.

Every operator is a :class:`scipy.sparse.linalg.LinearOperator` of shape
(d, d) for the symmetric positive semi-definite matrix C the PCA is about,
with one extra attribute, ``trace`` (the total variance), so tests can hand
it to :func:`scipy.sparse.linalg.eigsh` and the solvers call only ``matmat``.

* :class:`DenseOperator` holds C in memory (the covariance method: assembled
  in the moments pass, decomposed by LAPACK).
* :class:`DataOperator` holds the preprocessed n x d data matrix X~ in memory
  (the direct method: ``C = X~^T X~ / (n - 1)``, decomposed by an SVD of X~ or
  an eigendecomposition of the n x n Gram ``X~ X~^T``).
* :class:`MatrixFreeOperator` never forms C: each ``matmat`` is one pass over
  the blocks computing ``sum_b Xb~^T (Xb~ V) / (n - 1)``; the pass is a
  callable supplied by the engine, so this module knows no dask and no Parquet.
"""

from __future__ import annotations

from typing import Callable

import numpy as np
from scipy.sparse.linalg import LinearOperator

__all__ = ["DenseOperator", "DataOperator", "MatrixFreeOperator"]


class _Covariance(LinearOperator):
    """A symmetric (d, d) float64 operator with a known trace."""

    def __init__(self, d: int, trace: float):
        super().__init__(dtype=np.dtype(np.float64), shape=(d, d))
        self.trace = float(trace)

    @property
    def n_features(self) -> int:
        return self.shape[0]

    def _matvec(self, x):
        return self._matmat(np.asarray(x, dtype=np.float64).reshape(-1, 1)).ravel()

    def _adjoint(self):
        return self  # C is symmetric


class DenseOperator(_Covariance):
    """``C @ V`` with the d x d matrix C held in memory (the covariance method)."""

    def __init__(self, matrix: np.ndarray):
        self.matrix = np.ascontiguousarray(matrix, dtype=np.float64)
        super().__init__(self.matrix.shape[0], float(np.trace(self.matrix)))

    def _matmat(self, v):
        return self.matrix @ v


class DataOperator(_Covariance):
    """``C @ V = X~^T (X~ V) / (n - 1)`` with the preprocessed rows X~ in memory (the direct method).

    Parameters
    ----------
    data : ndarray (n, d) float64
        The centered (and scaled) rows that enter the covariance, weighted
        rows as ``sqrt(w) x``; kept, not copied.
    n_samples : float, optional
        The n of the denominator ``n - 1`` (the total weight with row
        weights); default: the rows of ``data``.
    trace : float, optional
        Trace of C when known from the moments pass; default: from ``data``.
    """

    def __init__(self, data: np.ndarray, n_samples: float | None = None, trace: float | None = None):
        self.data = data
        self.n_samples = data.shape[0] if n_samples is None else n_samples
        self.denominator = max(self.n_samples - 1, 1)
        if trace is None:
            trace = float(np.einsum("ij,ij->", data, data)) / self.denominator
        super().__init__(data.shape[1], trace)

    def _matmat(self, v):
        return self.data.T @ (self.data @ v) / self.denominator


class MatrixFreeOperator(_Covariance):
    """``C @ V`` as one pass over the data (the matrix-free method).

    Parameters
    ----------
    data_pass : callable
        ``data_pass(V) -> sum_b Xb~^T (Xb~ V)`` over all blocks, where Xb~ is
        the centered (and scaled) block.
    n_samples : int
        Rows used; the result is divided by ``n_samples - 1``.
    trace : float
        Trace of C, known from the moments pass.
    n_features : int
    """

    def __init__(self, data_pass: Callable, n_samples: int, trace: float, n_features: int):
        self._pass = data_pass
        self.n_samples = n_samples
        super().__init__(n_features, trace)

    def _matmat(self, v):
        return self._pass(np.ascontiguousarray(v, dtype=np.float64)) / (self.n_samples - 1)
