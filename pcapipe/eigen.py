"""The one eigensolver entry point: LAPACK when the matrix or the data are in memory, else iterative.

:func:`eigensolve` takes a covariance operator (:mod:`pcapipe.operators`) and
the wanted components (a count k, or a fraction of the variance) and returns
one :class:`~pcapipe.decomposition.SolverResult` whatever ran:

* :class:`~pcapipe.operators.DenseOperator` (covariance method): LAPACK
  ``syevd`` on the whole matrix when d <= :data:`SPECTRUM_LIMIT` (every
  eigenvalue), else ``syevr`` by index subset for the leading
  ``max(k, SPECTRUM_LIMIT)`` pairs (Dhillon, Parlett & Voemel 2006, "The
  design and implementation of the MRRR algorithm", ACM TOMS 32), through
  :func:`scipy.linalg.eigh`.  For few components of a large matrix
  (:func:`pcapipe.methods.dense_eigen_cost`: d = 10,000, k = 10) the
  reduction to tridiagonal form alone costs minutes, so the block Krylov
  solver runs on the matrix in memory instead (a product is ``2 d^2 b``
  flops); should it not converge, LAPACK is run after all;
* :class:`~pcapipe.operators.DataOperator` (direct method): with X~ the
  n x d preprocessed rows, ``C = X~^T X~ / (n - 1)``.  When n < d, the n x n
  Gram ``G = X~ X~^T`` has the same nonzero eigenvalues (times n - 1) and
  ``v = X~^T u / sqrt(lambda_G)`` maps its eigenvectors to C's (Golub & Van
  Loan 2013, "Matrix Computations", 4th ed., section 8.6, the SVD via a
  symmetric eigenproblem); otherwise a thin SVD of X~ (LAPACK ``gesdd``);
* any other operator (matrix-free method): the block Krylov solver
  (:func:`pcapipe.solver.solve`), which grows k inside one run for a fraction.

LAPACK results carry every pair's true residual ``||C v - theta v||`` and are
flagged converged (exact to working precision); ``matvecs`` is 0.
"""

from __future__ import annotations

import logging
import warnings
from dataclasses import replace

import numpy as np
import scipy.linalg as sl

from .compute import cores
from .decomposition import SolverResult, gap_to_others
from .errors import NotConvergedWarning
from .methods import dense_eigen_cost
from .operators import DataOperator, DenseOperator
from .solver import solve

__all__ = ["eigensolve", "SPECTRUM_LIMIT", "start_count"]

log = logging.getLogger("pcapipe")

# Eigenvalues listed beyond k by the LAPACK methods: all of them up to this many
# (a scree plot shows no more; common practice, no source).
SPECTRUM_LIMIT = 512


def start_count(components, d: int, oversample: int) -> int:
    """Components to look for first: k itself, or for a fraction a small start that grows."""
    return components if isinstance(components, int) else min(d, max(2, oversample))


def _count_for(values: np.ndarray, components, trace: float) -> int:
    if isinstance(components, int):
        return components
    reach = np.flatnonzero(np.cumsum(values) / trace >= components - 1e-12) if trace > 0 else np.zeros(0, int)
    return int(reach[0]) + 1 if reach.size else values.size


def _exact(values, vectors, residuals, k: int, method: str) -> SolverResult:
    """A LAPACK result: the first k retained, the rest (up to the limit) as extra values."""
    ref = max(float(values[0]), np.finfo(float).tiny) if values.size else 1.0
    gaps = np.array([gap_to_others(v, values) / ref for v in values[:k]])
    listed = max(k, min(values.size, SPECTRUM_LIMIT))
    return SolverResult(values[:k], vectors[:, :k], residuals[:k], np.ones(k, bool), gaps, 0, 0,
                        np.zeros((0, k)), 0, 0, method=method, extra_values=values[k:listed],
                        extra_residuals=residuals[k:listed], extra_converged=np.ones(listed - k, bool))


def _residuals(op, values: np.ndarray, vectors: np.ndarray) -> np.ndarray:
    return np.linalg.norm(op.matmat(vectors) - vectors * values, axis=0)


def _covariance(op: DenseOperator, components) -> SolverResult:
    c, d = op.matrix, op.n_features
    want = start_count(components, d, 0)
    if d <= SPECTRUM_LIMIT or not isinstance(components, int):
        w, v = sl.eigh(c, driver="evd", check_finite=False)
        how = "LAPACK syevd, every eigenvalue"
    else:
        m = min(d, max(want, SPECTRUM_LIMIT))
        w, v = sl.eigh(c, subset_by_index=[d - m, d - 1], driver="evr", check_finite=False)
        how = f"LAPACK syevr, leading {m} of {d} eigenvalues"
    w, v = w[::-1], v[:, ::-1]
    k = _count_for(w, components, op.trace)
    m = max(k, min(w.size, SPECTRUM_LIMIT))
    return _exact(w[:m], v[:, :m], _residuals(op, w[:m], v[:, :m]), k, how)


def _complete(v: np.ndarray, good: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Replace the columns not ``good`` (null directions) by an orthonormal completion."""
    bad = np.flatnonzero(~good)
    if bad.size:
        keep = v[:, good]
        q = rng.standard_normal((v.shape[0], bad.size))
        for _ in range(2):
            q -= keep @ (keep.T @ q)
        v[:, bad] = np.linalg.qr(q)[0]
    return v


def _direct(op: DataOperator, components, rng: np.random.Generator) -> SolverResult:
    x, (n, d) = op.data, op.data.shape
    denom = op.denominator
    if n < d:
        w, u = sl.eigh(x @ x.T, driver="evd", check_finite=False)
        w, u = np.maximum(w[::-1], 0.0), u[:, ::-1]
        values, how = w / denom, f"LAPACK syevd on the {n} x {n} Gram of the rows"
        k = _count_for(values, components, op.trace)
        m = max(k, min(n, SPECTRUM_LIMIT))
        s = np.sqrt(w[:m])
        # directions with (numerically) zero variance have no image x^T u to normalise
        good = s > np.sqrt(w[0]) * n * np.finfo(float).eps
        v = _complete((x.T @ u[:, :m]) / np.where(good, s, 1.0), good, rng)
    else:
        _, s, vt = sl.svd(x, full_matrices=False, check_finite=False)
        values, v, how = s * s / denom, vt.T, f"LAPACK gesdd, thin SVD of the {n} x {d} rows"
        k = _count_for(values, components, op.trace)
        m = max(k, min(values.size, SPECTRUM_LIMIT))
    res = _residuals(op, values[:m], v[:, :m])
    return _exact(values[:m], v[:, :m], res, k, how)


def _dense_krylov(op: DenseOperator, k: int, tolerance: float, max_iterations: int, oversample: int,
                  rng: np.random.Generator, depth: int) -> SolverResult | None:
    """Block Krylov on the in-memory matrix; None (LAPACK instead) when a pair did not converge."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", NotConvergedWarning)
        res = solve(op.matmat, op.n_features, k, tolerance=tolerance, max_iterations=max_iterations,
                    oversample=oversample, rng=rng, depth=depth)
    if not res.converged.all():
        log.info("block Krylov on the %d x %d matrix did not converge in %d products; LAPACK instead",
                 op.n_features, op.n_features, res.matvecs)
        return None
    return replace(res, method=f"block Krylov on the in-memory {op.n_features} x {op.n_features} matrix "
                              f"({res.matvecs} products; LAPACK would reduce the whole matrix)")


def eigensolve(op, components, *, tolerance: float, max_iterations: int, oversample: int,
               rng: np.random.Generator, depth: int = 8, state=None, callback=None) -> SolverResult:
    """Leading eigenpairs of the covariance operator ``op``, by the method its type calls for.

    Parameters
    ----------
    op : DenseOperator, DataOperator or MatrixFreeOperator
    components : int or float
        k, or a fraction in (0, 1): the smallest k whose eigenvalues reach
        that share of ``op.trace``.
    tolerance, max_iterations, oversample, depth, state, callback
        For the iterative solver (:func:`pcapipe.solver.solve`); ignored by LAPACK.
    rng : numpy.random.Generator
        Start block of the iterative solver; completion of null directions.

    Returns
    -------
    SolverResult
        Retained pairs largest first, and every other eigenvalue determined.
    """
    if isinstance(op, DenseOperator):
        if isinstance(components, int) and op.n_features > SPECTRUM_LIMIT:
            how, _ = dense_eigen_cost(op.n_features, components, components + oversample, cores())
            if how == "krylov":
                res = _dense_krylov(op, components, tolerance, max_iterations, oversample, rng, depth)
                if res is not None:
                    return res
        return _covariance(op, components)
    if isinstance(op, DataOperator):
        return _direct(op, components, rng)
    d = op.n_features
    fraction = None if isinstance(components, int) else float(components)
    return solve(op.matmat, d, start_count(components, d, oversample), tolerance=tolerance,
                 max_iterations=max_iterations, oversample=oversample, rng=rng, depth=depth, state=state,
                 callback=callback, fraction=fraction, trace=op.trace if fraction is not None else None)
