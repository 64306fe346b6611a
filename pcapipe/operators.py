"""Covariance operators: the seam between the data passes and the solver.

An operator has ``n_features``, ``trace`` and ``matmat(V) -> C @ V``.  The
solver calls nothing else.

* :class:`DenseOperator` holds the d x d matrix assembled in the moments pass.
* :class:`MatrixFreeOperator` never forms C: each ``matmat`` is one pass over
  the blocks computing ``sum_b Xb~^T (Xb~ V) / (n - 1)``; the pass itself is a
  callable supplied by the engine, so this module knows no dask and no Parquet.

:func:`choose_method` is the cost model behind ``model.method = "auto"``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

import numpy as np

__all__ = ["DenseOperator", "MatrixFreeOperator", "MethodChoice", "choose_method",
           "EXPECTED_PASSES"]

# Passes the Krylov solver typically needs for separated components at 1e-9
# (measured on the benchmark shapes, see DEVELOPERS.md); used only to compare costs.
EXPECTED_PASSES = 14
# Sustained rates per core used to compare the methods (common practice, no
# source: a 2020s x86 core does ~10-20 GFLOP/s in DGEMM and decodes Parquet
# at a few hundred MB/s).
_FLOPS_PER_CORE = 10e9
_DECODE_BYTES_PER_CORE = 300e6


class DenseOperator:
    """``C @ V`` with C held in memory (the covariance method)."""

    def __init__(self, matrix: np.ndarray):
        self.matrix = np.ascontiguousarray(matrix)
        self.n_features = matrix.shape[0]
        self.trace = float(np.trace(matrix))
        self.passes = 0

    def matmat(self, v: np.ndarray) -> np.ndarray:
        return self.matrix @ v


class MatrixFreeOperator:
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
        self.trace = float(trace)
        self.n_features = n_features
        self.passes = 0

    def matmat(self, v: np.ndarray) -> np.ndarray:
        self.passes += 1
        return self._pass(np.ascontiguousarray(v, dtype=np.float64)) / (self.n_samples - 1)


@dataclass(frozen=True)
class MethodChoice:
    """The method used, why, and the estimates behind the choice."""

    method: str
    reason: str
    estimates: dict = field(default_factory=dict)


def choose_method(requested: str, n: int, d: int, block: int, data_bytes: int,
                  memory_per_worker: int, workers: int, cores: int) -> MethodChoice:
    """Pick ``covariance`` or ``matrix-free`` by estimated time and memory.

    The covariance method costs one pass (``n d^2`` flops in ``syrk``) and
    holds d x d matrices: one per task in flight, the merge, and the solver's
    copy.  The matrix-free method costs ``EXPECTED_PASSES`` passes of
    ``4 n d b`` flops each, re-decoding the data each time (the estimate
    ignores caching, which only makes it cheaper).  Covariance wins when its
    matrices fit in half the memory of a worker and it is estimated faster.
    """
    gram_bytes = 8 * d * d
    in_flight = max(1, workers)
    cov_memory = gram_bytes * (3 + 2 * in_flight / max(1, workers))
    fits = cov_memory <= 0.5 * memory_per_worker
    decode = data_bytes / (_DECODE_BYTES_PER_CORE * cores)
    t_cov = n * d * d / (_FLOPS_PER_CORE * cores) + decode
    t_mf = EXPECTED_PASSES * (4.0 * n * d * block / (_FLOPS_PER_CORE * cores) + decode)
    est = {"gram_bytes": gram_bytes, "covariance_memory_bytes": int(cov_memory),
           "memory_per_worker": int(memory_per_worker), "covariance_seconds": round(t_cov, 3),
           "matrix_free_seconds": round(t_mf, 3), "expected_passes": EXPECTED_PASSES}
    if requested != "auto":
        return MethodChoice(requested, f"model.method = {requested!r} in the config", est)
    if not fits:
        return MethodChoice("matrix-free", f"the {d} x {d} covariance needs about "
                            f"{cov_memory / 2**20:.0f} MiB, more than half of the "
                            f"{memory_per_worker / 2**20:.0f} MiB per worker", est)
    if t_cov <= t_mf:
        return MethodChoice("covariance", f"the {d} x {d} matrix fits and one Gram pass "
                            f"(~{t_cov:.3g} s) is estimated cheaper than ~{EXPECTED_PASSES} "
                            f"matrix-free passes (~{t_mf:.3g} s)", est)
    return MethodChoice("matrix-free", f"~{EXPECTED_PASSES} matrix-free passes (~{t_mf:.3g} s) are "
                        f"estimated cheaper than one Gram pass (~{t_cov:.3g} s) for d = {d}", est)
