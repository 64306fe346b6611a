"""Block power iteration with Rayleigh-Ritz, locking and Krylov acceleration.

The solver sees the covariance only through an operator ``matmat(V) -> C @ V``
(one pass over the data for the matrix-free method); it never touches
Parquet.  Each iteration applies the operator exactly once, to one block.

The method is block power (subspace) iteration in which the last ``depth``
power iterates are kept and Rayleigh-Ritz is done over all of them, i.e. a
block Krylov subspace, restarted by keeping the best Ritz vectors:

* Rutishauser (1970), "Simultaneous iteration method for symmetric matrices",
  Numer. Math. 16 -- subspace iteration with Rayleigh-Ritz (``depth = 1``);
* Musco & Musco (2015), "Randomized block Krylov methods for stronger and
  faster approximate singular value decomposition", NeurIPS -- keeping the
  Krylov iterates, which needs far fewer passes than subspace iteration;
* Stathopoulos, Saad & Wu (1998), "Dynamic thick restarting of the Davidson
  and the implicitly restarted Arnoldi methods", SIAM J. Sci. Comput. 19 --
  restarting by keeping Ritz vectors (thick restart);
* Saad (2011), "Numerical Methods for Large Eigenvalue Problems", 2nd ed.,
  SIAM, sections 4.2 (locking / deflation) and 5.2 (Rayleigh-Ritz).

With ``depth = 1`` and a block of one vector this is exactly the power
method: ``v <- C v / ||C v||`` and the Rayleigh quotient ``v^T C v``.

Expansion uses the residuals ``C u - theta u`` of the active Ritz vectors:
they are orthogonal to the current basis (Galerkin condition) and span the
same new directions as ``C Q``, so the subspace is the block Krylov space.
A pair is locked once its relative residual ``||C u - theta u|| / theta_1``
is at most ``tolerance`` and every larger pair is locked; the active basis is
kept orthogonal to the locked vectors (deflation).

Memory: the basis and its image, ``2 * d * depth * block`` floats, plus the
locked vectors.
"""

from __future__ import annotations

import logging
import warnings
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from .errors import NotConvergedWarning

__all__ = ["SolverResult", "SolverState", "BlockPowerSolver", "solve"]

log = logging.getLogger("pcapipe")

_DROP = 1e-10  # a new direction shorter than this (relative) adds nothing but noise


@dataclass(frozen=True)
class SolverResult:
    """Eigenpairs found, largest first, with the evidence of convergence.

    ``residual_norms`` are absolute ``||C v - theta v||``; ``history`` has one
    row per iteration with the relative residual of each wanted pair (NaN
    before a pair appears); ``gaps`` are relative distances to the nearest
    other Ritz value, the quantity that limits how fast a pair converges.

    Beyond the k retained pairs, ``extra_values`` (largest first) are the
    other eigenvalues the method determined (the remaining Ritz values of the
    block here; every eigenvalue for the covariance method), with
    ``extra_residuals`` (absolute, NaN when not computed) and
    ``extra_converged``.  :meth:`spectrum` lists both together.
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
    extra_values: np.ndarray = field(default_factory=lambda: np.zeros(0))
    extra_residuals: np.ndarray = field(default_factory=lambda: np.zeros(0))
    extra_converged: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=bool))

    def spectrum(self) -> dict:
        """Every eigenvalue determined, largest first: ``values``, ``residuals``,
        ``converged``, ``gaps`` (relative to the largest, over every value listed)
        and ``retained`` (True for the k pairs whose vectors are kept)."""
        values = np.concatenate([self.values, self.extra_values])
        ref = max(float(values[0]), np.finfo(float).tiny) if values.size else 1.0
        return {"values": values,
                "residuals": np.concatenate([self.residual_norms, self.extra_residuals]),
                "converged": np.concatenate([self.converged, self.extra_converged]).astype(bool),
                "gaps": np.array([_gap(v, values) / ref for v in values]),
                "retained": np.arange(values.size) < self.values.size}


@dataclass
class SolverState:
    """Everything needed to continue an iteration (saved in checkpoints)."""

    basis: np.ndarray
    image: np.ndarray
    locked: np.ndarray
    locked_values: np.ndarray
    locked_residuals: np.ndarray
    iterations: int = 0
    matvecs: int = 0
    history: list = field(default_factory=list)

    def arrays(self) -> dict:
        """Plain arrays for ``numpy.savez`` (no pickle)."""
        hist = np.array(self.history, dtype=float) if self.history else np.zeros((0, 0))
        return {"basis": self.basis, "image": self.image, "locked": self.locked,
                "locked_values": self.locked_values, "locked_residuals": self.locked_residuals,
                "iterations": np.array(self.iterations), "matvecs": np.array(self.matvecs),
                "history": hist}

    @classmethod
    def from_arrays(cls, a) -> "SolverState":
        hist = [list(row) for row in np.asarray(a["history"])]
        return cls(np.asarray(a["basis"]), np.asarray(a["image"]), np.asarray(a["locked"]),
                   np.asarray(a["locked_values"]), np.asarray(a["locked_residuals"]),
                   int(a["iterations"]), int(a["matvecs"]), hist)


def _project_out(p: np.ndarray, bases) -> np.ndarray:
    # Two rounds of classical Gram-Schmidt ("twice is enough", Giraud et al.
    # 2005, Numer. Math. 101) keep the new block orthogonal to working precision.
    for _ in range(2):
        for b in bases:
            if b.shape[1]:
                p = p - b @ (b.T @ p)
    return p


def _orthonormal_block(p: np.ndarray, bases) -> np.ndarray:
    """Orthonormal basis of the part of ``p`` orthogonal to ``bases``.

    Directions that are (numerically) already in the span are dropped, so the
    result may have fewer columns than ``p``, or none.
    """
    if p.shape[1] == 0:
        return p
    norms = np.linalg.norm(p, axis=0)
    p = p / np.where(norms > 0, norms, 1.0)
    p = _project_out(p, bases)
    u, s, _ = np.linalg.svd(p, full_matrices=False)
    u = u[:, s > _DROP]
    if u.shape[1]:
        u = _project_out(u, bases)
        u, _ = np.linalg.qr(u)
    return u


class BlockPowerSolver:
    """Iterate towards the ``k`` largest eigenpairs of a symmetric PSD operator.

    Parameters
    ----------
    matmat : callable
        ``matmat(V) -> C @ V`` for ``V`` of shape (d, m).
    n_features : int
        d.
    k : int
        Number of wanted eigenpairs, ``1 <= k <= d``.
    tolerance : float
        Relative residual ``||C v - theta v|| / theta_1`` at which a pair is
        converged.
    max_iterations : int
        Operator applications allowed (one per iteration).
    oversample : int
        Extra vectors in the block; they speed up the wanted ones when the
        spectrum has no gap right after ``k``.
    rng : numpy.random.Generator
        Source of the random start block.
    depth : int
        Power iterates kept in the basis; 1 is plain subspace iteration.
    start : ndarray (d, m), optional
        Initial block (warm start); random columns complete it.
    """

    def __init__(self, matmat: Callable, n_features: int, k: int, *, tolerance: float,
                 max_iterations: int, oversample: int, rng: np.random.Generator,
                 depth: int = 8, start: np.ndarray | None = None):
        if not 1 <= k <= n_features:
            raise ValueError(f"k must be in [1, {n_features}], got {k}")
        self.matmat = matmat
        self.d = n_features
        self.k = k
        self.tolerance = tolerance
        self.max_iterations = max_iterations
        self.block = min(k + oversample, n_features)
        self.oversample = self.block - k
        self.depth = max(1, depth)
        self.rng = rng
        self._start = start
        self.state: SolverState | None = None

    # -- state ---------------------------------------------------------------
    def _apply(self, q: np.ndarray) -> np.ndarray:
        w = np.asarray(self.matmat(q), dtype=np.float64)
        self.state.matvecs += 1
        return w

    def initialize(self) -> None:
        """Build the start block and apply the operator to it (one pass)."""
        d, b = self.d, self.block
        p = self.rng.standard_normal((d, b))
        if self._start is not None and self._start.size:
            s = np.asarray(self._start, dtype=np.float64)[:, :b]
            p[:, : s.shape[1]] = s
        empty = np.zeros((d, 0))
        self.state = SolverState(empty, empty, empty.copy(), np.zeros(0), np.zeros(0))
        q = _orthonormal_block(p, [])
        self.state.basis = q
        self.state.image = self._apply(q)

    def resume(self, state: SolverState) -> None:
        """Continue from a saved state."""
        self.state = state

    # -- one iteration -------------------------------------------------------
    def _ritz(self):
        st = self.state
        h = st.basis.T @ st.image
        h = 0.5 * (h + h.T)
        theta, y = np.linalg.eigh(h)
        order = np.argsort(theta)[::-1]
        theta, y = theta[order], y[:, order]
        u = st.basis @ y
        cu = st.image @ y
        res = cu - u * theta
        return theta, u, cu, np.linalg.norm(res, axis=0), res

    def _reference(self, theta) -> float:
        st = self.state
        top = st.locked_values[0] if st.locked_values.size else (theta[0] if theta.size else 0.0)
        return max(float(top), np.finfo(float).tiny)

    def _lock(self, theta, u, rnorm, ref) -> int:
        """Lock the leading converged pairs; returns how many were locked."""
        st = self.state
        want = self.k - st.locked.shape[1]
        n = 0
        while n < min(want, theta.size) and rnorm[n] <= self.tolerance * ref:
            n += 1
        if n:
            st.locked = np.hstack([st.locked, u[:, :n]])
            st.locked_values = np.concatenate([st.locked_values, theta[:n]])
            st.locked_residuals = np.concatenate([st.locked_residuals, rnorm[:n]])
        return n

    def step(self) -> bool:
        """One Rayleigh-Ritz, lock, expand, apply. Returns True when done."""
        st = self.state
        theta, u, cu, rnorm, res = self._ritz()
        ref = self._reference(theta)
        self._record(theta, rnorm, ref)
        st.iterations += 1
        n_lock = self._lock(theta, u, rnorm, ref)
        theta, u, cu, rnorm, res = theta[n_lock:], u[:, n_lock:], cu[:, n_lock:], rnorm[n_lock:], res[:, n_lock:]
        # The basis must not hold the pairs just locked, or result() would count them twice.
        st.basis, st.image = u, cu
        remaining = self.k - st.locked.shape[1]
        if remaining == 0:
            return True
        if st.matvecs >= self.max_iterations:
            return True
        active = min(remaining + self.oversample, theta.size)
        unconverged = rnorm[:active] > self.tolerance * ref
        if self.depth == 1:
            keep_u, keep_cu = np.zeros((self.d, 0)), np.zeros((self.d, 0))
            p = cu[:, :active]
        else:
            room = self.depth * self.block - active
            keep = max(min(theta.size, room), active)
            keep_u, keep_cu = u[:, :keep], cu[:, :keep]
            p = res[:, :active][:, unconverged] if unconverged.any() else res[:, :active]
        q = _orthonormal_block(p, [st.locked, keep_u])
        if q.shape[1] == 0:
            # The basis holds an invariant subspace; fresh random directions
            # are the only way on (needed when the block spans a zero space).
            q = _orthonormal_block(self.rng.standard_normal((self.d, active)), [st.locked, keep_u])
            if q.shape[1] == 0:
                return True
        w = self._apply(q)
        st.basis = np.hstack([keep_u, q])
        st.image = np.hstack([keep_cu, w])
        return False

    def _record(self, theta, rnorm, ref) -> None:
        st = self.state
        row = list(st.locked_residuals / ref)
        want = self.k - len(row)
        row += list(rnorm[:want] / ref)
        row += [np.nan] * (self.k - len(row))
        st.history.append(row[: self.k])
        log.debug("iteration %d: max relative residual %.3g", st.iterations + 1, np.nanmax(row))

    # -- result --------------------------------------------------------------
    def result(self) -> SolverResult:
        """Current best eigenpairs (locked first, then the best active ones)."""
        st = self.state
        theta, u, _, rnorm, _ = self._ritz()
        want = self.k - st.locked.shape[1]
        values = np.concatenate([st.locked_values, theta[:want]])
        vectors = np.hstack([st.locked, u[:, :want]])
        resid = np.concatenate([st.locked_residuals, rnorm[:want]])
        order = np.argsort(values)[::-1]
        values, vectors, resid = values[order], vectors[:, order], resid[order]
        ref = max(values[0], np.finfo(float).tiny) if values.size else 1.0
        converged = resid <= self.tolerance * ref
        every = np.sort(np.concatenate([st.locked_values, theta]))[::-1]
        gaps = np.array([_gap(v, every) / ref for v in values])
        # the rest of the block: estimates from below (Cauchy interlacing) unless converged
        extra = slice(want, want + max(self.oversample, 0))
        return SolverResult(values, vectors, resid, converged, gaps, st.iterations, st.matvecs,
                            np.array(st.history, dtype=float), self.depth, self.block,
                            theta[extra], rnorm[extra], rnorm[extra] <= self.tolerance * ref)


def _gap(value: float, every: np.ndarray) -> float:
    others = np.abs(every - value)
    others = others[others > 0]
    return float(others.min()) if others.size else np.inf


def solve(matmat: Callable, n_features: int, k: int, *, tolerance: float, max_iterations: int,
          oversample: int, rng: np.random.Generator, depth: int = 8, start=None,
          state: SolverState | None = None, callback: Callable | None = None) -> SolverResult:
    """Run :class:`BlockPowerSolver` to convergence or to the iteration limit.

    ``callback(solver)`` is called after every operator application (the
    engine checkpoints there).  Emits one :class:`NotConvergedWarning` naming
    the components that did not reach the tolerance, with the residual reached
    and the gap to their neighbours.
    """
    solver = BlockPowerSolver(matmat, n_features, k, tolerance=tolerance, max_iterations=max_iterations,
                              oversample=oversample, rng=rng, depth=depth, start=start)
    if state is None:
        solver.initialize()
        if callback:
            callback(solver)
    else:
        solver.resume(state)
    while not solver.step():
        if callback:
            callback(solver)
    res = solver.result()
    if not res.converged.all():
        bad = np.flatnonzero(~res.converged)
        ref = max(res.values[0], np.finfo(float).tiny)
        detail = ", ".join(
            f"PC{i + 1} residual {res.residual_norms[i] / ref:.2g} (gap {res.gaps[i]:.2g})" for i in bad
        )
        warnings.warn(
            f"{bad.size} of {k} components did not reach tolerance {tolerance:g} in "
            f"{res.matvecs} operator applications: {detail}; a relative gap this small needs more "
            "iterations (model.max_iterations) or a looser model.tolerance",
            NotConvergedWarning,
            stacklevel=2,
        )
    return res
