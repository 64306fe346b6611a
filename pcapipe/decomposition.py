"""The result of every eigensolver: retained pairs, their evidence, and the rest of the spectrum.

One frozen type for LAPACK (covariance, direct) and the iterative solver
(matrix-free), so the engine and the outputs never ask which method ran.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np

__all__ = ["SolverResult", "history_array", "gap_to_others"]


@dataclass(frozen=True)
class SolverResult:
    """Eigenpairs found, largest first, with the evidence of convergence.

    ``residual_norms`` are absolute ``||C v - theta v||``; ``history`` has one
    row per iteration with the relative residual of each wanted pair (NaN
    before a pair appears); ``gaps`` are relative distances to the nearest
    other Ritz value, the quantity that limits how fast a pair converges.
    ``matvecs`` counts operator applications over the whole run (for the
    matrix-free method each is one pass over the data; 0 for LAPACK).

    Beyond the k retained pairs, ``extra_values`` (largest first) are the
    other eigenvalues the method determined: every eigenvalue for LAPACK
    (up to :data:`pcapipe.eigen.SPECTRUM_LIMIT`), the remaining Ritz values of
    the block for the iterative solver, with ``extra_residuals`` (absolute)
    and ``extra_converged`` (False: an estimate, a Ritz value below the true
    eigenvalue).  :meth:`spectrum` lists retained and extra together.
    ``method`` names the algorithm that produced the result.
    """

    values: np.ndarray
    vectors: np.ndarray
    residual_norms: np.ndarray
    converged: np.ndarray
    gaps: np.ndarray
    iterations: int
    matvecs: int
    history: np.ndarray
    depth: int
    block: int
    method: str = "block Krylov (power iteration with Rayleigh-Ritz, locking)"
    extra_values: np.ndarray = field(default_factory=lambda: np.zeros(0))
    extra_residuals: np.ndarray = field(default_factory=lambda: np.zeros(0))
    extra_converged: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=bool))

    def spectrum(self) -> dict:
        """Every eigenvalue determined, largest first, as arrays of equal length.

        Keys: ``values``, ``residuals`` (absolute), ``converged``, ``gaps``
        (relative to the largest eigenvalue, over every value listed) and
        ``retained`` (True for the k pairs whose vectors are kept).
        """
        values = np.concatenate([self.values, self.extra_values])
        ref = max(float(values[0]), np.finfo(float).tiny) if values.size else 1.0
        gaps = np.array([gap_to_others(v, values) / ref for v in values])
        return {"values": values,
                "residuals": np.concatenate([self.residual_norms, self.extra_residuals]),
                "converged": np.concatenate([self.converged, self.extra_converged]).astype(bool),
                "gaps": gaps,
                "retained": np.arange(values.size) < self.values.size}

    def retain(self, k: int) -> "SolverResult":
        """The first ``k`` pairs retained, the rest moved to the extra eigenvalues."""
        return replace(self, values=self.values[:k], vectors=self.vectors[:, :k],
                       residual_norms=self.residual_norms[:k], converged=self.converged[:k],
                       gaps=self.gaps[:k], history=self.history[:, :k],
                       extra_values=np.concatenate([self.values[k:], self.extra_values]),
                       extra_residuals=np.concatenate([self.residual_norms[k:], self.extra_residuals]),
                       extra_converged=np.concatenate([self.converged[k:], self.extra_converged]))


def history_array(history: list, k: int) -> np.ndarray:
    """Rows of relative residuals padded with NaN to ``k`` columns (k grows with a fraction)."""
    out = np.full((len(history), k), np.nan)
    for i, row in enumerate(history):
        out[i, : len(row)] = row[:k]
    return out


def gap_to_others(value: float, every: np.ndarray) -> float:
    """Distance from ``value`` to the nearest different entry of ``every`` (inf if none)."""
    others = np.abs(every - value)
    others = others[others > 0]
    return float(others.min()) if others.size else np.inf
